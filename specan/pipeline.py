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
This module is the recipe: :func:`run` for the night and :func:`analyse_file`
for one input. The ingredients live in :mod:`specan.night`: the inputs
(``night.inputs``), the row a stage's results become (``night.row``), stored
records (``night.records``), where the analysis runs (``night.executors``), the
catalogue (``night.catalogue``) and the diagram and report
(``night.products``); each can be replaced without touching the others.
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib
import json
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from .errors import SpecanError
from .night import executors
from .night.catalogue import (CATALOGUE_FORMATS, CORE_COLUMNS, assemble_catalogue, catalogue_meta,  # noqa: F401
                              status_counts, write_catalogue)
from .night.files import atomic_path  # noqa: F401 - part of this module's API
from .night.inputs import SPECTRUM_SUFFIXES, collect_inputs, safe_stem, sha256_file  # noqa: F401
from .night.products import write_night_products
from .night.records import RecordStore, code_fingerprint, not_run_record, record_key
from .night.row import EMISSION_FLAG_LINES, LOW_SNR, Recorder, final_info, info_columns, lines_columns  # noqa: F401

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
    """The function that implements a stage, looked up when the stage runs."""
    module, func = next((m, f) for n, m, f in STAGES if n == name)
    return getattr(importlib.import_module(module), func)


def _checked_stages(stages):
    """The stages asked for in run order (``read`` always), or None for every stage."""
    if not stages:
        return None
    names = [n for n, _, _ in STAGES]
    unknown = [n for n in stages if n not in names]
    if unknown:
        raise ValueError(f"unknown stage(s) {', '.join(unknown)}; choose from {', '.join(names)}")
    return [n for n in names if n in stages or n == "read"]


def _stage_status(wanted=None) -> dict:
    """Stage -> None when it runs, else why not (not available here, or not asked for)."""
    stages = available_stages()
    if wanted:
        stages = {n: (why if n in wanted or n == "read" else "not asked for") for n, why in stages.items()}
    return stages


# --------------------------------------------------------------------------- one input


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
        (see ``specan.physics.load_photometry``) for distances;
        ``calibration`` an MK calibration file (default: the shipped one).

    Returns
    -------
    dict
        ``{"values": {column: value}, "units": {column: unit}, "plots":
        {"full": bytes, "thumb": bytes} or {}}``.
    """
    settings = settings or {}
    stages = _stage_status(settings.get("stages"))
    runs = {name for name, why in stages.items() if why is None}
    rec = Recorder(path)
    raw = _read(rec, path, dict(settings.get("overrides") or {}), stages["read"])
    if raw is None:
        rec.values["status"] = "error"
        return {**rec.finish(), "plots": {}}
    spectrum = _prepare(rec, raw) if "prepare" in runs else raw
    # The velocity first: the lines stage matches each listed line within one resolution
    # element of its shifted position, so it needs the star's velocity (at rest it lost most
    # lines of the 560 km/s demo star, and of any star faster than c/R at high resolution).
    velocity = _velocity(rec, spectrum) if "velocity" in runs else None
    known = _known_from_velocity(velocity)
    lines = _lines(rec, spectrum, known) if "lines" in runs else None
    classification = _classify(rec, spectrum, known, settings.get("calibration")) if "classify" in runs else None
    if "physics" in runs and isinstance(classification, dict):
        _physics(rec, raw, velocity, classification, settings.get("photometry"))
    final_info(rec, spectrum)
    plots = _plots(rec, path, spectrum, lines, velocity, classification) if settings.get("plots", True) else {}
    return {**rec.finish(), "plots": plots}


def _read(rec, path, overrides, unavailable=None):
    """The spectrum as read with its metadata columns recorded, or None (the reason is in the row)."""
    if unavailable is not None:
        rec.failed("read", SpecanError(unavailable), unexpected=False)
        return None
    if not os.path.isfile(path):
        rec.failed("read", SpecanError("no such file" if not os.path.exists(path) else "not a file"),
                   unexpected=False)
        return None
    raw = rec.run_stage("read", _stage_function("read"), path, **overrides)
    if raw is not None:
        info_columns(rec, raw)
    return raw


def _prepare(rec, raw):
    """The prepared spectrum, or the spectrum as read when preparing failed."""
    prepared = rec.run_stage("prepare", _stage_function("prepare"), raw)
    if prepared is None:
        return raw
    info_columns(rec, prepared)  # S/N and warnings are known only after preparing
    return prepared


def _velocity(rec, spectrum):
    """The velocity stage's result; its columns, and R where the file states none."""
    velocity = rec.run_stage("velocity", _stage_function("velocity"), spectrum)
    if isinstance(velocity, dict):
        r_keys = ("resolving_power", "resolving_power_source")
        rec.add_stage_dict("velocity", {k: v for k, v in velocity.items() if k not in r_keys})
        if rec.values.get("resolving_power") is None:   # not stated: the velocity stage's estimate
            for key in r_keys:
                rec.set(key, velocity.get(key))
    return velocity


def _known_from_velocity(velocity) -> dict:
    """Options the velocity stage's result gives the later stages: an estimated R and the shift."""
    known = {}
    if not isinstance(velocity, dict):
        return known
    # A resolving power the velocity stage had to estimate (the file states none) serves the
    # later stages too, rather than each estimating it again.
    if velocity.get("resolving_power_source") == "narrowest lines":
        known["resolving_power"] = velocity["resolving_power"]
    if velocity.get("rv_topo") is not None:
        # The velocity stage has measured the shift already: the shift seen in the data
        # (in the spectrum's frame).
        known["rv"] = velocity["rv_topo"]
    return known


def _lines(rec, spectrum, known):
    """The lines stage's table (at the star's velocity when known), with its counts recorded."""
    lines = rec.run_stage("lines", _stage_function("lines"), spectrum, **known)
    if lines is not None:
        lines_columns(rec, lines)
    return lines


def _classify(rec, spectrum, known, calibration_path):
    """The classification (against the run's calibration when one is given), its columns recorded."""
    options = dict(known)
    calibration = _calibration(calibration_path)
    if calibration is not None:
        options["calibration"] = calibration
    classification = rec.run_stage("classify", _stage_function("classify"), spectrum, **options)
    if isinstance(classification, dict):
        rec.add_stage_dict("classify", classification)
    return classification


def _physics(rec, raw, velocity, classification, photometry_path):
    """Record the derived physics of a classified star (with its photometry when given)."""
    photometry = _photometry_row(photometry_path, rec.values.get("object"), rec)
    # The spectrum as read (not normalised) keeps its flux unit for a colour temperature.
    physics = rec.run_stage("physics", _stage_function("physics"), classification, velocity, photometry, raw)
    if isinstance(physics, dict):
        if "teff" in rec.values:
            # the physics stage repeats the classifier's Teff (the same class-probability
            # mixture of the same scales): one column, not two
            physics = {k: v for k, v in physics.items() if k not in ("teff_k", "teff_err_k")}
        from .physics import DERIVED_UNITS

        rec.add_stage_dict("physics", physics, units=DERIVED_UNITS)


def _plots(rec, path, spectrum, lines, velocity, classification) -> dict:
    """The per-spectrum figure and thumbnail as PNG bytes, or {} (with a warning) when drawing failed."""
    try:
        from .plots import spectrum_figures

        return spectrum_figures(spectrum, lines=lines, velocity=velocity, classification=classification,
                                title=f"{rec.values.get('object') or ''}  ({os.path.basename(path)})")
    except Exception as exc:  # noqa: BLE001 - a plot is never worth losing the row
        rec.warnings.append(f"plot failed: {type(exc).__name__}: {exc}")
        return {}


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


# --------------------------------------------------------------------------- the night


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


class RunInterrupted(KeyboardInterrupt):
    """The run was stopped; the catalogue written so far is in ``summary``."""

    def __init__(self, summary):
        super().__init__("run interrupted")
        self.summary = summary


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
    formats = _checked_formats(formats)
    inputs = collect_inputs(paths)
    wanted = _checked_stages(stages)
    stages = _stage_status(wanted)
    settings = _run_settings(overrides, plots, wanted, photometry, calibration)
    settings_hash = _settings_hash(settings, stages, photometry, calibration)
    store = RecordStore(out)
    keys = {path: record_key(path, settings_hash) for path in inputs}
    records = {} if force else _current_records(store, keys)
    reused = len(records)
    with _progress_bar(len(inputs), reused, progress) as bar:
        new, interrupted = _analyse_rest([p for p in inputs if p not in records], settings, store, keys,
                                         executors.results, jobs, dask, bar)
    records.update(new)
    ordered = [records.get(p) or not_run_record(p, "run interrupted before this input; rerun to finish")
               for p in inputs]
    counts = status_counts(ordered)
    catalogue = assemble_catalogue(ordered, meta=catalogue_meta(len(inputs), counts, interrupted, stages,
                                                                settings["overrides"]))
    outputs, notes = _write_outputs(catalogue, out, formats, stages, report)
    summary = RunSummary(catalogue=catalogue, outputs=outputs, counts=counts, reused=reused, stages=stages,
                         interrupted=interrupted, seconds=time.perf_counter() - t0, notes=notes)
    if interrupted:
        raise RunInterrupted(summary)
    return summary


def _checked_formats(formats) -> list:
    """Catalogue formats to write, ECSV first and always; unknown names refused."""
    formats = ["ecsv"] + [f for f in dict.fromkeys(formats or ()) if f != "ecsv"]
    for f in formats:
        if f not in CATALOGUE_FORMATS:
            raise ValueError(f"unknown catalogue format {f!r}; choose from {', '.join(CATALOGUE_FORMATS)}")
    return formats


def _run_settings(overrides, plots, wanted, photometry, calibration) -> dict:
    """The settings every input is analysed with (see :func:`analyse_file`)."""
    settings = {"overrides": {k: overrides[k] for k in sorted(overrides or {})}, "plots": bool(plots),
                "stages": wanted, "photometry": None if photometry is None else os.path.abspath(photometry),
                "calibration": None if calibration is None else os.path.abspath(calibration)}
    if calibration is not None and not os.path.isfile(calibration):
        raise ValueError(f"calibration file {calibration} does not exist")
    return settings


def _settings_hash(settings, stages, photometry, calibration) -> str:
    """Hash of all a result depends on besides its input: settings, stages, code, photometry, calibration."""
    phot_hash = sha256_file(photometry) if photometry is not None and os.path.isfile(photometry) else None
    cal_hash = sha256_file(calibration) if calibration is not None else None
    return hashlib.sha256(json.dumps(
        {"settings": settings, "code": code_fingerprint(), "stages": stages, "photometry": phot_hash,
         "calibration": cal_hash},
        sort_keys=True,
        default=str).encode()).hexdigest()


def _current_records(store, keys) -> dict:
    """Input -> its stored record, for the inputs whose stored record is current."""
    found = {}
    for path, key in keys.items():
        record = store.current(path, key)
        if record is not None:
            found[path] = record
    return found


@contextlib.contextmanager
def _progress_bar(total, done, progress):
    """A progress bar over the inputs (shown when asked, by default only on a terminal)."""
    from tqdm import tqdm

    show = sys.stderr.isatty() if progress is None else bool(progress)
    bar = tqdm(total=total, initial=done, disable=not show, unit="spectrum", desc="specan run", file=sys.stderr)
    try:
        yield bar
    finally:
        bar.close()


def _analyse_rest(todo, settings, store, keys, executor, jobs, dask, bar):
    """Analyse the inputs that have no current record, storing each record as its result comes.

    Parameters
    ----------
    todo : list of str
        Inputs to analyse.
    settings : dict
        See :func:`analyse_file`.
    store : specan.night.records.RecordStore
        Where the records go.
    keys : dict
        Input -> its record key.
    executor : callable
        ``executor(func, todo, settings, jobs=, dask=)`` yielding ``(path, result)``
        (see :func:`specan.night.executors.results`).
    jobs, dask
        Passed to the executor.
    bar : tqdm.tqdm
        Advanced by one per record stored.

    Returns
    -------
    records : dict
        Input -> stored record.
    interrupted : bool
        Ctrl-C or SIGTERM stopped the work before every input was done.
    """
    records, interrupted = {}, False
    with executors.sigterm_as_interrupt():
        results = executor(analyse_file, todo, settings, jobs=jobs, dask=dask)
        try:
            for path, result in results:
                records[path] = store.put(path, keys[path], result)
                bar.update(1)
        except KeyboardInterrupt:
            interrupted = True
            results.close()
    if interrupted:
        # The signal may land between a record reaching the disk and its being noted here; the
        # disk is the truth, so an input whose current record exists counts as done.
        records.update(_current_records(store, {p: keys[p] for p in todo if p not in records}))
    return records, interrupted


def _write_outputs(catalogue, out, formats, stages, report):
    """Write the catalogue in each format, then the night products; (outputs, notes)."""
    outputs, notes = {}, []
    # Catalogue first: even if the report fails, the results are safe.
    with executors.sigterm_as_interrupt():
        for fmt, path in zip(formats, write_catalogue(catalogue, out, formats)):
            outputs[fmt] = path
        if report:
            products, notes = write_night_products(catalogue, out, stages)
            outputs.update(products)
    return outputs, notes
