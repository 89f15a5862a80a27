"""A night's run: every input file through every stage, one catalogue row each.

``run(paths, out_dir)`` sends each spectrum through read -> prepare -> velocity ->
lines -> classify -> physics (each stage only if it exists in this
installation; the catalogue says which ran), draws its plots and writes:

``out_dir/``
    ``catalogue.ecsv`` (and on request ``.csv``, ``.fits``, ``.vot``)
        one row per input: the results with units, or ``status=error`` and the
        reason;
    ``plots/<file>-<id>.png``, ``plots/<file>-<id>_thumb.png``
        per-spectrum figure and its thumbnail;
    ``night_diagram.png``
        the classified stars by temperature and luminosity;
    ``report.html``
        one self-contained page (see :mod:`specan.report`);
    ``records/<id>.json``
        the per-input results the catalogue is assembled from.

Safety of results (why the work is laid out this way):

* each input's result is one small JSON record written atomically (temporary
  file, then ``os.replace``) after its plots; the catalogue is assembled from
  the records of the inputs named on this run, so an interrupted run never
  leaves half a row, and a rerun never duplicates one;
* a record is current when the input's content hash and the run settings
  (reader overrides, plot choice, specan's own code) match; current inputs
  are not recomputed unless ``force``;
* all workers (in-process, local processes, dask) run the same function,
  :func:`analyse_file`, and return plain data; only this process writes
  files, so results do not depend on how they were computed;
* output file names are built from a sanitised file stem plus a hash of the
  input path, never from header strings, and checked to stay inside
  ``out_dir``.
"""

from __future__ import annotations

import contextlib
import glob
import hashlib
import importlib
import json
import math
import os
import re
import signal
import sys
import tempfile
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import SpecanError

__all__ = [
    "STAGES",
    "RunSummary",
    "available_stages",
    "collect_inputs",
    "analyse_file",
    "run",
    "assemble_catalogue",
    "write_catalogue",
    "CATALOGUE_FORMATS",
]

#: Stages in the order they run, with the module and function that implement them.
STAGES = (
    ("read", "specan.io", "read"),
    ("prepare", "specan.prepare", "prepare"),
    ("velocity", "specan.velocity", "measure"),
    ("lines", "specan.lines", "measure"),
    ("classify", "specan.classify", "classify"),
    ("physics", "specan.physics", "derive"),
)

#: Catalogue formats: name -> (file suffix, astropy writer format).
CATALOGUE_FORMATS = {
    "ecsv": (".ecsv", "ascii.ecsv"),
    "csv": (".csv", "ascii.csv"),
    "fits": (".fits", "fits"),
    "votable": (".vot", "votable"),
}

#: File suffixes taken from a folder given as input (a folder also holds notes,
#: tables and plots, which are not spectra). Files named explicitly or matched
#: by a glob are always taken, whatever their suffix.
SPECTRUM_SUFFIXES = (
    ".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fz",
    ".txt", ".dat", ".csv", ".tsv", ".asc", ".ascii", ".spec",
)

#: Columns every catalogue has, in this order, with units and descriptions.
#: Stage results follow, in stage order, under the names the stages give them.
CORE_COLUMNS = (
    ("file", None, "input file as given on the command line"),
    ("object", None, "object name from the header (or the file name, see warnings)"),
    ("status", None, "ok: every available stage ran; partial: a stage declined "
                     "(see reason); error: unreadable input or a stage failed unexpectedly; "
                     "not_run: the run was interrupted before this input"),
    ("reason", None, "why a stage failed or declined, one clause per stage"),
    ("flags", None, "comma-separated flags raised by the stages, plus emission_lines (the lines "
                    "stage detected H alpha or H beta in emission) and low_snr (S/N per pixel below LOW_SNR)"),
    ("stages_run", None, "stages that produced a result for this input"),
    ("mjd_mid", "d", "mid-exposure MJD (UTC)"),
    ("exptime", "s", "exposure time"),
    ("ra", "deg", "right ascension of the pointing"),
    ("dec", "deg", "declination of the pointing"),
    ("site_known", None, "observatory location known (needed for the barycentric correction)"),
    ("medium", None, "medium of the wavelength scale as stored"),
    ("resolving_power", None, "resolving power R = lambda / FWHM"),
    ("resolving_power_source", None, "where R comes from: file (or option), narrowest lines, "
                                     "template-width scan (see the velocity notes)"),
    ("snr", None, "median S/N per pixel (DER_SNR)"),
    ("n_lines", None, "lines detected by the lines stage"),
    ("n_emission", None, "detected lines in emission"),
    ("warnings", None, "assumptions and doubts recorded while reading and analysing"),
    ("plot", None, "per-spectrum figure, relative to the output folder"),
    ("thumbnail", None, "thumbnail of the figure, relative to the output folder"),
)

_MAX_REASON = 500
_RECORD_VERSION = 1


# --------------------------------------------------------------------------- stages


def available_stages() -> dict:
    """Which stages this installation can run.

    Returns
    -------
    dict
        Stage name -> ``None`` when available, otherwise a one-line reason.
    """
    out = {}
    for name, module, func in STAGES:
        try:
            mod = importlib.import_module(module)
        except ModuleNotFoundError as exc:
            if exc.name and module.startswith(exc.name) or exc.name == module:
                out[name] = f"{module} is not part of this installation"
                continue
            out[name] = f"{module} cannot be imported: {type(exc).__name__}: {exc}"
            continue
        except Exception as exc:  # noqa: BLE001 - a broken stage must not stop the others
            out[name] = f"{module} cannot be imported: {type(exc).__name__}: {exc}"
            continue
        out[name] = None if callable(getattr(mod, func, None)) else f"{module} has no {func}()"
    return out


def _stage_function(name):
    module, func = next((m, f) for n, m, f in STAGES if n == name)
    return getattr(importlib.import_module(module), func)


# --------------------------------------------------------------------------- inputs


def collect_inputs(paths) -> list:
    """Expand files, folders and glob patterns into a list of input paths.

    Parameters
    ----------
    paths : iterable of str or os.PathLike
        Files (taken whatever their suffix), folders (their files with a
        spectrum suffix, see ``SPECTRUM_SUFFIXES``, not descending into
        sub-folders) and glob patterns (``**`` descends).

    Returns
    -------
    list of str
        Paths in a stable order (folders and globs sorted), each input once
        (same file reached twice is kept at its first place). A path that does
        not exist, or a pattern matching nothing, is kept as given so that the
        run records it as an error row rather than dropping it silently.
    """
    out, seen = [], set()

    def add(p):
        key = os.path.realpath(p)
        if key not in seen:
            seen.add(key)
            out.append(str(p))

    for p in paths:
        p = os.fspath(p)
        if os.path.isdir(p):
            names = sorted(os.listdir(p))
            for name in names:
                full = os.path.join(p, name)
                if (not name.startswith(".") and os.path.isfile(full)
                        and name.lower().endswith(SPECTRUM_SUFFIXES)):
                    add(full)
        elif os.path.exists(p):
            add(p)
        elif glob.has_magic(p):
            matches = sorted(m for m in glob.glob(p, recursive=True) if os.path.isfile(m))
            if not matches:
                add(p)
            for m in matches:
                add(m)
        else:
            add(p)
    return out


def _sha256_file(path, chunk=1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def _path_id(path) -> str:
    """Short stable id of an input path (names its record and plots)."""
    return hashlib.sha256(os.path.realpath(path).encode("utf-8", "surrogateescape")).hexdigest()[:16]


_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_stem(path, limit=60) -> str:
    """File-system-safe stem of ``path``: ASCII letters, digits, ``._-`` only, never hidden."""
    name = os.path.basename(os.fspath(path))
    for suffix in sorted(SPECTRUM_SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix):
            name = name[: -len(suffix)]
            break
    stem = _UNSAFE.sub("_", name).strip("._-")[:limit]
    return stem or "spectrum"


def _inside(base: Path, target: Path) -> Path:
    """``target`` resolved, refusing anything outside ``base`` (defence in depth)."""
    full = (base / target).resolve()
    if not full.is_relative_to(base.resolve()):
        raise ValueError(f"output path {target} would leave the output folder")
    return full


def code_fingerprint() -> str:
    """Hash of specan's own code and data files: results computed by other code are not current."""
    root = Path(__file__).resolve().parent
    h = hashlib.sha256()
    files = sorted(p for p in root.rglob("*") if p.suffix in (".py", ".ecsv", ".json") and p.is_file())
    linelists = root.parent / "linelists"
    if linelists.is_dir():
        files += sorted(linelists.glob("*.ecsv"))
    for p in files:
        h.update(str(p.relative_to(p.parents[1])).encode())
        h.update(p.read_bytes())
    return h.hexdigest()


# --------------------------------------------------------------------------- one input


def _plain(value):
    """(value, unit) of a scalar stage result for the catalogue, or None if not a scalar."""
    import astropy.units as u

    unit = None
    if isinstance(value, u.Quantity):
        if not value.isscalar:
            return None
        unit = None if value.unit == u.dimensionless_unscaled else value.unit.to_string()
        value = value.value
    if value is None:
        return (None, unit)
    if isinstance(value, (bool, np.bool_)):
        return (bool(value), None)
    if isinstance(value, (int, np.integer)):
        return (int(value), unit)
    if isinstance(value, (float, np.floating)):
        return (float(value), unit)
    if isinstance(value, str):
        return (value, None)
    return None


def _json_safe(value):
    """None for an infinity, which JSON cannot hold (NaN stays: Python's json reads it back)."""
    if isinstance(value, float) and math.isinf(value):
        return None
    return value


class _Recorder:
    """Collects one input's results while the stages run."""

    def __init__(self, path):
        self.values = {"file": str(path), "object": None, "status": "ok"}
        self.units = {}
        self.reasons = []
        self.flags = set()
        self.stages_run = []
        self.warnings = []

    def set(self, name, value, unit=None):
        self.values[name] = _json_safe(value)
        if unit:
            self.units[name] = unit

    def add_stage_dict(self, stage, result, units=None):
        """Scalar entries of a stage's result dict become columns (prefixed on a clash).

        ``units`` maps keys whose values are plain floats to their unit (the physics
        stage returns such floats, see ``specan.physics.DERIVED_UNITS``).
        """
        for key, raw in result.items():
            if key == "flags":
                self.add_flags(raw)
                continue
            plain = _plain(raw)
            if plain is None:
                continue
            name = str(key)
            unit = plain[1] or (units or {}).get(name)
            if name in self.values or name in _CORE_NAMES:
                name = f"{stage}_{name}"
            self.set(name, plain[0], unit)

    def add_flags(self, flags):
        if flags is None:
            return
        if isinstance(flags, str):
            flags = [f for f in re.split(r"[,\s]+", flags) if f]
        self.flags.update(str(f) for f in flags)

    def failed(self, stage, exc, unexpected):
        if unexpected:
            self.values["status"] = "error"
            text = f"{stage}: internal error {type(exc).__name__}: {exc}"
        else:
            if self.values["status"] == "ok":
                self.values["status"] = "partial"
            text = f"{stage}: {getattr(exc, 'reason', str(exc))}"
        self.reasons.append(" ".join(text.split())[:_MAX_REASON])

    def finish(self):
        self.values["reason"] = "; ".join(self.reasons)
        self.values["flags"] = ",".join(sorted(self.flags))
        self.values["stages_run"] = " ".join(self.stages_run)
        self.values["warnings"] = " | ".join(dict.fromkeys(self.warnings))
        return {"values": self.values, "units": self.units}


_CORE_NAMES = {name for name, _, _ in CORE_COLUMNS}
_CORE_STRINGS = {"file", "object", "status", "reason", "flags", "stages_run", "medium", "warnings", "plot",
                 "thumbnail"}


def _guarded(rec, stage, func, *args, **kwargs):
    """Run one stage; a diagnosed problem or an unexpected exception becomes part of the row."""
    try:
        result = func(*args, **kwargs)
    except SpecanError as exc:
        rec.failed(stage, exc, unexpected=False)
        return None
    except Exception as exc:  # noqa: BLE001 - one bad input must never stop the night
        rec.failed(stage, exc, unexpected=True)
        return None
    rec.stages_run.append(stage)
    return result


def _info_columns(rec, spectrum):
    import astropy.units as u

    from .obsinfo import get_info

    info = get_info(spectrum)
    rec.set("object", info.object)
    rec.set("mjd_mid", info.mjd_mid, "d")
    rec.set("exptime", None if info.exptime is None else float(info.exptime.to_value(u.s)), "s")
    rec.set("ra", info.ra_deg, "deg")
    rec.set("dec", info.dec_deg, "deg")
    rec.set("site_known", info.site is not None)
    rec.set("medium", info.medium)
    rec.set("resolving_power", info.resolving_power)
    if info.resolving_power is not None:
        rec.set("resolving_power_source", "file")
    rec.set("snr", info.snr)
    rec.warnings.extend(str(w) for w in info.warnings)


def _lines_columns(rec, table):
    cols = table.colnames
    detected = np.asarray(table["detected"], bool) if "detected" in cols else np.ones(len(table), bool)
    rec.set("n_lines", int(detected.sum()))
    if "emission" in cols:
        emission = np.asarray(table["emission"], bool) & detected
        rec.set("n_emission", int(emission.sum()))
        # An emission-line star (Be, Me, T Tauri...) is recognised by its Balmer
        # lines, H alpha first (common practice); a single weak metal "emission"
        # is more often a continuum ripple than a star worth a second look.
        if "id" in cols and any(str(i) in EMISSION_FLAG_LINES for i in table["id"][emission]):
            rec.add_flags(["emission_lines"])


#: Lines whose detection in emission raises the ``emission_lines`` flag.
EMISSION_FLAG_LINES = ("H_alpha", "H_beta")

#: S/N per pixel below which a spectrum is flagged ``low_snr``: the classification
#: criteria and line measurements become unreliable well before S/N 20 at R ~ 2000
#: (common practice).
LOW_SNR = 20.0


_PHOTOMETRY_CACHE = {}
_CALIBRATION_CACHE = {}


def _calibration(path):
    """The MK calibration in ``path`` (loaded once per process), or None for the default."""
    if not path:
        return None
    if path not in _CALIBRATION_CACHE:
        _CALIBRATION_CACHE[path] = importlib.import_module("specan.classify").Calibration.load(path)
    return _CALIBRATION_CACHE[path]


def _photometry_row(path, name, rec):
    """This object's row of the photometry file (loaded once per process), or None."""
    if not path:
        return None
    try:
        from .physics import load_photometry, photometry_for

        key = (path, os.stat(path).st_mtime_ns)
        if key not in _PHOTOMETRY_CACHE:
            _PHOTOMETRY_CACHE.clear()
            bad = {}
            _PHOTOMETRY_CACHE[key] = (load_photometry(path, bad_rows=bad), bad)
        rows, bad = _PHOTOMETRY_CACHE[key]
        row = photometry_for(rows, name)
    except (OSError, SpecanError) as exc:
        rec.warnings.append(f"photometry not used: {getattr(exc, 'reason', exc)}")
        return None
    if row is None:
        # a line of the file that could not be used costs its own star only, and says why
        # (the problems are keyed by name as the rows are, so the same matching finds them)
        reason = photometry_for(bad, name)
        rec.warnings.append(f"photometry for {name!r} not used: {reason}" if reason else
                            f"no photometry for {name!r} in {os.path.basename(path)}")
    return row


def analyse_file(path, settings=None) -> dict:
    """Run every available stage on one input and draw its plots.

    This is the unit of work sent to local processes and dask workers; it
    writes nothing and returns plain data, so results do not depend on where
    it ran.

    Parameters
    ----------
    path : str
        Input file.
    settings : dict, optional
        ``{"overrides": {...}, "plots": bool, "stages": [...], "photometry":
        path}``; ``overrides`` go to ``specan.read``; ``stages`` (default
        all) names the stages to run; ``photometry`` is a per-object CSV
        (see ``specan.physics.load_photometry``) for distances.

    Returns
    -------
    dict
        ``{"values": {column: value}, "units": {column: unit}, "plots":
        {"full": bytes, "thumb": bytes} or {}}``.
    """
    settings = settings or {}
    overrides = dict(settings.get("overrides") or {})
    stages = available_stages()
    wanted = settings.get("stages")
    if wanted:
        stages = {n: (why if n in wanted or n == "read" else "not asked for") for n, why in stages.items()}
    rec = _Recorder(path)

    if stages["read"] is not None:
        rec.failed("read", SpecanError(stages["read"]), unexpected=False)
        rec.values["status"] = "error"
        return {**rec.finish(), "plots": {}}
    if not os.path.isfile(path):
        rec.failed("read", SpecanError("no such file" if not os.path.exists(path) else "not a file"),
                   unexpected=False)
        rec.values["status"] = "error"
        return {**rec.finish(), "plots": {}}

    raw = _guarded(rec, "read", _stage_function("read"), path, **overrides)
    if raw is None:
        rec.values["status"] = "error"
        return {**rec.finish(), "plots": {}}
    _info_columns(rec, raw)

    spectrum = raw
    if stages["prepare"] is None:
        prepared = _guarded(rec, "prepare", _stage_function("prepare"), raw)
        if prepared is not None:
            spectrum = prepared
            _info_columns(rec, prepared)  # S/N and warnings are known only after preparing

    lines = velocity = classification = physics = None
    # The velocity first: the lines stage matches each listed line within one resolution
    # element of its shifted position, so it needs the star's velocity (at rest it lost most
    # lines of the 560 km/s demo star, and of any star faster than c/R at high resolution).
    if stages["velocity"] is None:
        velocity = _guarded(rec, "velocity", _stage_function("velocity"), spectrum)
        if isinstance(velocity, dict):
            r_keys = ("resolving_power", "resolving_power_source")
            rec.add_stage_dict("velocity", {k: v for k, v in velocity.items() if k not in r_keys})
            if rec.values.get("resolving_power") is None:   # not stated: the velocity stage's estimate
                for key in r_keys:
                    rec.set(key, velocity.get(key))
    # A resolving power the velocity stage had to estimate (the file states none) serves the
    # later stages too, rather than each estimating it again.
    r_estimated = {}
    if isinstance(velocity, dict) and velocity.get("resolving_power_source") == "narrowest lines":
        r_estimated["resolving_power"] = velocity["resolving_power"]
    if stages["lines"] is None:
        options = dict(r_estimated)
        if isinstance(velocity, dict) and velocity.get("rv_topo") is not None:
            options["rv"] = velocity["rv_topo"]   # the shift seen in the data
        lines = _guarded(rec, "lines", _stage_function("lines"), spectrum, **options)
        if lines is not None:
            _lines_columns(rec, lines)
    if stages["classify"] is None:
        options = dict(r_estimated)
        calibration = _calibration(settings.get("calibration"))
        if calibration is not None:
            options["calibration"] = calibration
        if isinstance(velocity, dict) and velocity.get("rv_topo") is not None:
            # The velocity stage has measured the shift already (in the spectrum's frame).
            options["rv"] = velocity["rv_topo"]
        classification = _guarded(rec, "classify", _stage_function("classify"), spectrum, **options)
        if isinstance(classification, dict):
            rec.add_stage_dict("classify", classification)
    if stages["physics"] is None and isinstance(classification, dict):
        photometry = _photometry_row(settings.get("photometry"), rec.values.get("object"), rec)
        # The spectrum as read (not normalised) keeps its flux unit for a colour temperature.
        physics = _guarded(rec, "physics", _stage_function("physics"),
                           classification, velocity, photometry, raw)
        if isinstance(physics, dict):
            if "teff" in rec.values:
                # the physics stage repeats the classifier's Teff (the same class-probability
                # mixture of the same scales): one column, not two
                physics = {k: v for k, v in physics.items() if k not in ("teff_k", "teff_err_k")}
            from .physics import DERIVED_UNITS

            rec.add_stage_dict("physics", physics, units=DERIVED_UNITS)

    # The stages may add warnings to the carried metadata as they go.
    from .obsinfo import get_info

    info = get_info(spectrum)
    rec.warnings.extend(str(w) for w in info.warnings)
    if info.snr is not None and np.isfinite(info.snr) and info.snr < LOW_SNR:
        rec.add_flags(["low_snr"])

    plots = {}
    if settings.get("plots", True):
        try:
            from .plots import spectrum_figures

            plots = spectrum_figures(spectrum, lines=lines, velocity=velocity,
                                     classification=classification,
                                     title=f"{rec.values.get('object') or ''}  ({os.path.basename(path)})")
        except Exception as exc:  # noqa: BLE001 - a plot is never worth losing the row
            rec.warnings.append(f"plot failed: {type(exc).__name__}: {exc}")
    return {**rec.finish(), "plots": plots}


# --------------------------------------------------------------------------- writing


def _file_mode():
    """Permissions a new file gets here (mkstemp makes 0600 files; outputs are meant to be shared)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def _atomic_write_bytes(path: Path, data: bytes):
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, _FILE_MODE)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


_FILE_MODE = _file_mode()


@contextlib.contextmanager
def atomic_path(path: Path):
    """Yield a temporary path beside ``path``; on success it replaces ``path`` atomically."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    os.fchmod(fd, _FILE_MODE)
    os.close(fd)
    try:
        yield Path(tmp)
        os.chmod(tmp, _FILE_MODE)  # the writer may have replaced our file with its own temporary one
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _record_path(out: Path, pid: str) -> Path:
    return _inside(out, Path("records") / f"{pid}.json")


def _store(out: Path, path, pid, key, result) -> dict:
    """Write one input's plots, then its record (so a record always has its plots)."""
    values = dict(result["values"])
    values["plot"] = values["thumbnail"] = None
    plots = result.get("plots") or {}
    if plots.get("full"):
        stem = f"{safe_stem(path)}-{pid[:8]}"
        full = Path("plots") / f"{stem}.png"
        thumb = Path("plots") / f"{stem}_thumb.png"
        _atomic_write_bytes(_inside(out, full), plots["full"])
        values["plot"] = full.as_posix()
        if plots.get("thumb"):
            _atomic_write_bytes(_inside(out, thumb), plots["thumb"])
            values["thumbnail"] = thumb.as_posix()
    record = {"version": _RECORD_VERSION, "key": key, "values": values, "units": result.get("units", {})}
    _atomic_write_bytes(_record_path(out, pid), json.dumps(record, allow_nan=True).encode())
    return record


def _load_current(out: Path, pid, key):
    """The stored record of an input when it is current (same content and settings), else None."""
    p = _record_path(out, pid)
    try:
        record = json.loads(p.read_text())
    except (OSError, ValueError):
        return None
    if record.get("version") != _RECORD_VERSION or record.get("key") != key:
        return None
    for col in ("plot", "thumbnail"):
        rel = record["values"].get(col)
        if rel and not (out / rel).is_file():
            return None
    return record


def _not_run_record(path, why):
    values = {"file": str(path), "status": "not_run", "reason": why, "flags": "", "stages_run": ""}
    return {"values": values, "units": {}}


def assemble_catalogue(records, meta=None):
    """Build the catalogue table (one row per record, in the given order).

    Parameters
    ----------
    records : list of dict
        ``{"values": {...}, "units": {...}}`` per input.
    meta : dict, optional
        Table metadata.

    Returns
    -------
    astropy.table.Table
        Core columns first (see ``CORE_COLUMNS``), then the stage results in
        order of first appearance; units on the columns; missing values masked.
    """
    from astropy.table import Column, MaskedColumn, Table

    names = [n for n, _, _ in CORE_COLUMNS]
    units = {n: u for n, u, _ in CORE_COLUMNS if u}
    descriptions = {n: d for n, _, d in CORE_COLUMNS}
    for r in records:
        for k in r["values"]:
            if k not in names:
                names.append(k)
        for k, unit in r.get("units", {}).items():
            units.setdefault(k, unit)

    table = Table(meta=dict(meta or {}))
    for name in names:
        raw = [r["values"].get(name) for r in records]
        present = [v for v in raw if v is not None]
        if name in _CORE_STRINGS:
            kind, fill = str, ""
        elif not present:
            kind, fill = np.float64, np.nan  # nothing measured anywhere (e.g. no second CCF peak)
        elif all(isinstance(v, bool) for v in present):
            kind, fill = bool, False
        elif all(isinstance(v, int) and not isinstance(v, bool) for v in present):
            kind, fill = np.int64, 0
        elif all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
            kind, fill = np.float64, np.nan
        else:
            kind, fill = str, ""
        if kind is str:
            data = ["" if v is None else str(v) for v in raw]
            # Strings are never masked: an empty string reads back the same in every format.
            col = Column(data, name=name, dtype=str)
        else:
            mask = np.array([v is None for v in raw], bool)
            data = np.array([fill if v is None else v for v in raw], dtype=kind)
            col = MaskedColumn(data, name=name, mask=mask)
        col.unit = units.get(name)
        col.description = descriptions.get(name)
        table.add_column(col)
    return table


def write_catalogue(table, out_dir, formats=("ecsv",)) -> list:
    """Write the catalogue in each format atomically; returns the paths written."""
    out = Path(out_dir)
    written = []
    for fmt in formats:
        suffix, writer = CATALOGUE_FORMATS[fmt]
        target = _inside(out, Path("catalogue" + suffix))
        t = table
        if fmt == "fits":
            # FITS cards hold short scalar keywords only.
            t = table.copy(copy_data=False)
            t.meta = _fits_meta(table.meta)
        with atomic_path(target) as tmp:
            t.write(tmp, format=writer, overwrite=True)
        written.append(target)
    return written


def _fits_meta(meta):
    m = meta
    return {
        "SPECANV": str(m.get("specan_version", "")),
        "CREATED": str(m.get("created_utc", "")),
        "NINPUTS": int(m.get("inputs", 0)),
        "INTERRUP": bool(m.get("interrupted", False)),
        "STAGES": ",".join(m.get("stages_available", [])),
        "NOTRUN": ",".join(m.get("stages_not_run", {})),
        "COMMENT": ["specan night catalogue; status per row: ok, partial, error, not_run"],
    }


# --------------------------------------------------------------------------- run


@dataclass
class RunSummary:
    """What a run did.

    Attributes
    ----------
    catalogue : astropy.table.Table
        The catalogue as written.
    outputs : dict
        Name -> path of each output (catalogues, report, night diagram).
    counts : dict
        Rows per status (``ok``, ``partial``, ``error``, ``not_run``).
    reused : int
        Inputs whose stored results were current and were not recomputed.
    stages : dict
        Stage -> None if it ran, else why it did not.
    interrupted : bool
        True if the run was stopped before every input was done.
    seconds : float
        Wall-clock duration.
    """

    catalogue: object
    outputs: dict
    counts: dict
    reused: int
    stages: dict
    interrupted: bool = False
    seconds: float = 0.0
    notes: list = field(default_factory=list)

    @property
    def failed(self) -> int:
        """Inputs that failed (status ``error``)."""
        return int(self.counts.get("error", 0))


def _worker_init():
    # The parent decides when to stop: a Ctrl-C must not print a traceback per worker.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # Plots are drawn without pyplot; make sure no GUI backend is ever picked.
    os.environ.setdefault("MPLBACKEND", "Agg")


def _analyse_task(args):
    path, settings = args
    return path, analyse_file(path, settings)


@contextlib.contextmanager
def _sigterm_as_interrupt():
    """Treat SIGTERM like Ctrl-C so a killed run still writes a consistent catalogue."""
    def handler(signum, frame):
        raise KeyboardInterrupt(f"signal {signum}")

    try:
        previous = signal.signal(signal.SIGTERM, handler)
    except ValueError:  # not the main thread: leave signals alone
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def _results_local(todo, settings, jobs):
    """Yield (path, result) for each input, in this process or in ``jobs`` local processes."""
    jobs = min(jobs, len(todo))
    if jobs <= 1:  # also when there is nothing (left) to do: no workers to start
        for path in todo:
            yield path, analyse_file(path, settings)
        return
    import multiprocessing

    # spawn: workers start clean (no copied threads or locks from this process).
    ctx = multiprocessing.get_context("spawn")
    pool = ctx.Pool(processes=jobs, initializer=_worker_init)
    try:
        for item in pool.imap_unordered(_analyse_task, ((p, settings) for p in todo), chunksize=1):
            yield item
        pool.close()
        pool.join()
    finally:
        pool.terminate()


def _results_dask(todo, settings, address):
    """Yield (path, result) for each input from a dask.distributed cluster."""
    from distributed import Client, as_completed

    try:
        client = Client(address, set_as_default=False, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise SpecanError(f"cannot reach the dask scheduler at {address} ({exc}); "
                          "check the address or run with --jobs instead") from exc
    with client:
        futures = client.map(analyse_file, todo, settings=settings, pure=False)
        path_of = {f.key: p for f, p in zip(futures, todo)}
        try:
            for fut in as_completed(futures, loop=client.loop):
                result = fut.result()
                path = path_of[fut.key]
                fut.release()
                yield path, result
        finally:
            client.cancel(futures)


def run(paths, out_dir, jobs=1, dask=None, force=False, formats=("ecsv",), overrides=None,
        plots=True, report=True, progress=None, stages=None, photometry=None, calibration=None) -> RunSummary:
    """Analyse a night: every input through every available stage, then catalogue and report.

    Parameters
    ----------
    paths : iterable of str
        Files, folders or glob patterns (see :func:`collect_inputs`).
    out_dir : str or os.PathLike
        Output folder (created if needed).
    jobs : int
        Local worker processes (1 = in this process).
    dask : str, optional
        Address of a dask.distributed scheduler to run on instead (its
        workers must see the input files).
    force : bool
        Recompute inputs whose stored results are current.
    formats : sequence of str
        Catalogue formats among ``CATALOGUE_FORMATS``; ECSV is always written.
    overrides : dict, optional
        Reader overrides for every input (see ``specan.read``).
    plots, report : bool
        Draw per-spectrum plots / write the night diagram and HTML report.
    stages : sequence of str, optional
        Run only these stages (``read`` always runs); default every stage.
    photometry : str or os.PathLike, optional
        Per-object photometry CSV (V, E(B-V), parallax...; see
        ``specan.physics.load_photometry``), matched by object name, for
        distances and space velocities. Its content is part of the settings:
        editing it makes the results stale.
    calibration : str or os.PathLike, optional
        MK calibration file from ``specan calibrate`` (default: the shipped
        one); its content is part of the settings too.
    progress : bool, optional
        Show a progress bar; default: only when stderr is a terminal.

    Returns
    -------
    RunSummary
    """
    t0 = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    formats = ["ecsv"] + [f for f in dict.fromkeys(formats or ()) if f != "ecsv"]
    for f in formats:
        if f not in CATALOGUE_FORMATS:
            raise ValueError(f"unknown catalogue format {f!r}; choose from {', '.join(CATALOGUE_FORMATS)}")
    inputs = collect_inputs(paths)
    names = [n for n, _, _ in STAGES]
    wanted = None
    if stages:
        unknown = [n for n in stages if n not in names]
        if unknown:
            raise ValueError(f"unknown stage(s) {', '.join(unknown)}; choose from {', '.join(names)}")
        wanted = [n for n in names if n in stages or n == "read"]
    stages = available_stages()
    if wanted:
        stages = {n: (why if n in wanted else "not asked for") for n, why in stages.items()}
    settings = {"overrides": {k: overrides[k] for k in sorted(overrides or {})}, "plots": bool(plots),
                "stages": wanted, "photometry": None if photometry is None else os.path.abspath(photometry),
                "calibration": None if calibration is None else os.path.abspath(calibration)}
    if calibration is not None and not os.path.isfile(calibration):
        raise ValueError(f"calibration file {calibration} does not exist")
    phot_hash = _sha256_file(photometry) if photometry is not None and os.path.isfile(photometry) else None
    cal_hash = _sha256_file(calibration) if calibration is not None else None
    settings_hash = hashlib.sha256(json.dumps(
        {"settings": settings, "code": code_fingerprint(), "stages": stages, "photometry": phot_hash,
         "calibration": cal_hash},
        sort_keys=True,
        default=str).encode()).hexdigest()

    records, todo, keys, reused = {}, [], {}, 0
    for path in inputs:
        pid = _path_id(path)
        try:
            content = _sha256_file(path) if os.path.isfile(path) else "missing"
        except OSError as exc:
            content = f"unreadable: {exc}"
        keys[path] = {"input": content, "settings": settings_hash}
        current = None if force else _load_current(out, pid, keys[path])
        if current is not None:
            records[path] = current
            reused += 1
        else:
            todo.append(path)

    show = sys.stderr.isatty() if progress is None else bool(progress)
    interrupted = False
    bar = None
    try:
        from tqdm import tqdm

        bar = tqdm(total=len(inputs), initial=reused, disable=not show, unit="spectrum",
                   desc="specan run", file=sys.stderr)
        with _sigterm_as_interrupt():
            if dask:
                results = _results_dask(todo, settings, dask)
            else:
                results = _results_local(todo, settings, max(1, int(jobs)))
            try:
                for path, result in results:
                    records[path] = _store(out, path, _path_id(path), keys[path], result)
                    bar.update(1)
            except KeyboardInterrupt:
                interrupted = True
                results.close()
    finally:
        if bar is not None:
            bar.close()
    if interrupted:
        # The signal may land between a record reaching the disk and its being noted here; the
        # disk is the truth, so an input whose current record exists counts as done.
        for path in todo:
            if path not in records:
                stored = _load_current(out, _path_id(path), keys[path])
                if stored is not None:
                    records[path] = stored

    ordered = [records.get(p) or _not_run_record(p, "run interrupted before this input; rerun to finish")
               for p in inputs]
    counts = {}
    for r in ordered:
        s = r["values"].get("status", "error")
        counts[s] = counts.get(s, 0) + 1
    meta = {
        "specan_version": _version(),
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "inputs": len(inputs),
        "counts": counts,
        "interrupted": interrupted,
        "stages_available": [n for n, why in stages.items() if why is None],
        "stages_not_run": {n: why for n, why in stages.items() if why is not None},
        "reader_overrides": settings["overrides"],
    }
    catalogue = assemble_catalogue(ordered, meta=meta)
    outputs = {}
    # Catalogue first: even if the report fails, the results are safe.
    with _sigterm_as_interrupt():
        for fmt, path in zip(formats, write_catalogue(catalogue, out, formats)):
            outputs[fmt] = path
        notes = []
        if report:
            outputs.update(_write_night_products(catalogue, out, stages, notes))
    summary = RunSummary(catalogue=catalogue, outputs=outputs, counts=counts, reused=reused,
                         stages=stages, interrupted=interrupted,
                         seconds=time.perf_counter() - t0, notes=notes)
    if interrupted:
        raise RunInterrupted(summary)
    return summary


class RunInterrupted(KeyboardInterrupt):
    """The run was stopped; the catalogue written so far is in ``summary``."""

    def __init__(self, summary):
        super().__init__("run interrupted")
        self.summary = summary


def _write_night_products(catalogue, out, stages, notes):
    """Night diagram and HTML report; a failure here costs a note, not the catalogue."""
    outputs = {}
    diagram = _inside(out, Path("night_diagram.png"))
    try:
        from .plots import night_diagram

        with atomic_path(diagram) as tmp:
            how = night_diagram(catalogue, tmp)
        outputs["night_diagram"] = diagram
        if how:
            notes.append(how)
    except Exception as exc:  # noqa: BLE001
        notes.append(f"night diagram not drawn: {type(exc).__name__}: {exc}")
    try:
        from .report import write_report

        target = _inside(out, Path("report.html"))
        with atomic_path(target) as tmp:
            write_report(catalogue, out, tmp, diagram=outputs.get("night_diagram"), stages=stages)
        outputs["report"] = target
    except Exception as exc:  # noqa: BLE001
        notes.append(f"report not written: {type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return outputs


def _version():
    from . import __version__

    return __version__
