"""A night's run: every input file through every stage, one catalogue row each.

``run(paths, out_dir)`` sends each spectrum through read -> prepare -> velocity ->
classify -> lines -> physics (each stage only if it exists in this
installation; the catalogue says which ran; the lines stage is told the star's type), draws its plots and writes:

``out_dir/``
    ``catalogue.ecsv`` (and on request ``.csv``, ``.fits``, ``.vot``)
        one row per input: the results with units, or ``status=error`` and the
        reason;
    ``plots/<file>-<id>.png``, ``plots/<file>-<id>_thumb.png``
        per-spectrum figure and its thumbnail, by default for the flagged
        inputs only (see ``plots`` and ``plot_for`` of :func:`run`);
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
* the catalogue, the report and the night diagram are written from the
  records a chunk of rows at a time: the memory of a run does not grow with
  the number of inputs;
* a record is current when the input's content hash and the run settings
  (reader overrides, stages, photometry, calibration, specan's own code)
  match, and it has the figure the run asks for; current inputs are not
  recomputed unless ``force``;
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
import functools
import hashlib
import importlib
import json
import os
import sys
import time
from pathlib import Path

from .contents import forget_setups
from .errors import SpecanError
from .night import executors, heap
from .night.catalogue import (CATALOGUE_FORMATS, CORE_COLUMNS, assemble_catalogue, catalogue_meta,  # noqa: F401
                              status_counts, write_catalogue)
from .night.files import atomic_path, flush_to_disk  # noqa: F401 - atomic_path: part of this module's API
from .night.inputs import SPECTRUM_SUFFIXES, InputList, collect_inputs, safe_stem, sha256_file  # noqa: F401
from .night.records import RecordStore, code_fingerprint, content_hash, not_run_record, record_key
from .night.row import (EMISSION_FLAG_LINES, LOW_SNR, PLOT_CHOICES, Recorder, final_info, info_columns,  # noqa: F401
                        lines_columns, plot_wanted)

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

#: What a local worker imports as it starts (:func:`specan.night.executors.local_workers`): the stages, and
#: specutils, which the reader imports on first use (1.1 s of a worker's start, measured; it brings matplotlib).
WORKER_MODULES = (__name__,) + tuple(module for _, module, _ in STAGES) + ("specutils",)
#: What drawing a figure imports: 0.5-0.7 s, matplotlib's figure and Agg canvas (measured). Workers
#: that will draw import it as they start (forked ones inherit it from the run's process, imported
#: once there), rather than each on its first figure.
DRAWING_MODULES = ("specan.plots", "matplotlib.figure", "matplotlib.backends.backend_agg")
#: What writing the night diagram and the report imports beyond the analysis; with workers, the
#: run's process imports it while they analyse, instead of after them.
PRODUCT_MODULES = ("specan.hrdiagram", "specan.report") + DRAWING_MODULES

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
    """Run every available stage on one input and draw its plots when asked for.

    This is the unit of work sent to local processes and dask workers; it
    writes nothing and returns plain data, so results do not depend on where
    it ran. One carrier flows through the stages: the spectrum is read once,
    prepared once, and that prepared spectrum is what the velocity, lines and
    classify stages (and the figure) see.

    Parameters
    ----------
    path : str
        Input file.
    settings : dict, optional
        ``{"overrides": {...}, "plots": "flagged"|"all"|"none" (or a bool: all
        or none), "plot_for": [names], "stages": [...], "photometry": path,
        "calibration": path}``; ``overrides`` go to ``specan.read``;
        ``plots`` says which inputs get a figure (see
        :func:`specan.night.row.plot_wanted`; default ``all`` here, as before);
        ``stages`` (default all) names the stages to run; ``photometry`` is a
        per-object CSV (see ``specan.physics.load_photometry``) for distances;
        ``calibration`` an MK calibration file (default: the shipped one).

    Returns
    -------
    dict
        ``{"values": {column: value}, "units": {column: unit}, "plots":
        {"full": bytes, "thumb": bytes} or {}, "input_sha256": content hash
        (taken before reading), "drawable": whether a figure can be drawn}``.
    """
    settings = settings or {}
    # hashed before reading: a file replaced meanwhile leaves a record that is stale, never wrong
    content = content_hash(path)
    stages = _stage_status(settings.get("stages"))
    runs = {name for name, why in stages.items() if why is None}
    rec = Recorder(path)
    raw = _read(rec, path, dict(settings.get("overrides") or {}), stages["read"])
    if raw is None:
        rec.values["status"] = "error"
        return {**rec.finish(), "plots": {}, "input_sha256": content, "drawable": False}
    spectrum = _prepare(rec, raw) if "prepare" in runs else raw
    # The velocity first: the lines stage matches each listed line within one resolution
    # element of its shifted position, so it needs the star's velocity (at rest it lost most
    # lines of the 560 km/s demo star, and of any star faster than c/R at high resolution).
    velocity = _velocity(rec, spectrum) if "velocity" in runs else None
    known = _known_from_velocity(velocity)
    # The type before the lines: lines of species too hot for the star (He I in a G star) are
    # then measured but not counted as found.
    classification = _classify(rec, spectrum, known, settings.get("calibration")) if "classify" in runs else None
    lines = _lines(rec, spectrum, {**known, "star_type": _star_type(classification, velocity)}) \
        if "lines" in runs else None
    if "physics" in runs and isinstance(classification, dict):
        _physics(rec, raw, velocity, classification, settings.get("photometry"))
    final_info(rec, spectrum)
    result = rec.finish()
    plots, drawable = {}, True
    if plot_wanted(result["values"], *_plot_choice(settings)):
        plots = _plots(rec, path, spectrum, lines, velocity, classification)
        drawable = bool(plots)   # a figure that failed to draw is not retried on every rerun
        result = rec.finish()    # the figure may have added a warning
    return {**result, "plots": plots, "input_sha256": content, "drawable": drawable}


def _plot_choice(settings):
    """(choice, named) of the settings: which inputs get a figure (see ``plot_wanted``)."""
    choice = settings.get("plots", "all")
    if choice is True or choice is None:
        choice = "all"
    elif choice is False:
        choice = "none"
    return choice, tuple(settings.get("plot_for") or ())


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
        from .velocity import RESULT_UNITS
        r_keys = ("resolving_power", "resolving_power_source")
        # medium_assumed: the reader's column already (the same fact, one column)
        rec.add_stage_dict("velocity", {k: v for k, v in velocity.items()
                                        if k not in r_keys and k != "medium_assumed"}, units=RESULT_UNITS)
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


def _star_type(classification, velocity):
    """The star's MK type for the lines stage: the classification's, else the velocity template's."""
    for result, key in ((classification, "mk"), (velocity, "template_type")):
        if isinstance(result, dict) and result.get(key):
            return str(result[key])
    return None


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


class RunSummary:
    """What a run did.

    Attributes
    ----------
    catalogue : astropy.table.Table
        The catalogue as written (read back from ``catalogue.ecsv`` when first asked
        for: a run keeps no table of the night in memory).
    outputs : dict
        Name -> path of each output (catalogues, report, night diagram).
    counts : dict
        Rows per status (``ok``, ``partial``, ``error``, ``not_run``).
    reused : int
        Inputs whose stored results were current and were not recomputed.
    analysed : int
        Inputs analysed by this run.
    stages : dict
        Stage -> None if it ran, else why it did not.
    interrupted : bool
        True if the run was stopped before every input was done.
    seconds : float
        Wall-clock duration.
    notes : list of str
        How the night products were made, and what could not be.
    flags : list of (str, int)
        Rows raising each flag, most frequent first.
    failed_inputs : list of (str, str)
        (file, reason) of the first :data:`MAX_FAILED_KEPT` failed inputs.
    plotted : int
        Rows with a per-spectrum figure.
    medium_assumed : int
        Rows whose wavelength medium the reader assumed.
    """

    def __init__(self, catalogue=None, outputs=None, counts=None, reused=0, stages=None, interrupted=False,
                 seconds=0.0, notes=None, analysed=0, flags=(), failed_inputs=(), plotted=0, medium_assumed=0):
        self._catalogue = catalogue
        self.outputs = dict(outputs or {})
        self.counts = dict(counts or {})
        self.reused, self.analysed = int(reused), int(analysed)
        self.stages = dict(stages or {})
        self.interrupted, self.seconds = bool(interrupted), float(seconds)
        self.notes = list(notes or [])
        self.flags, self.failed_inputs = list(flags), list(failed_inputs)
        self.plotted, self.medium_assumed = int(plotted), int(medium_assumed)

    @property
    def catalogue(self):
        """The night catalogue (loaded from ``catalogue.ecsv`` on first use)."""
        if self._catalogue is None and self.outputs.get("ecsv") is not None:
            from astropy.table import Table

            self._catalogue = Table.read(self.outputs["ecsv"], format="ascii.ecsv")
        return self._catalogue

    @property
    def inputs(self) -> int:
        """Rows of the catalogue (one per input)."""
        return int(sum(self.counts.values()))

    @property
    def failed(self) -> int:
        """Inputs that failed (status ``error``)."""
        return int(self.counts.get("error", 0))

    @property
    def rate(self) -> float:
        """Inputs analysed per second of the run (0 when none was)."""
        return self.analysed / self.seconds if self.seconds > 0 else 0.0


#: Failed inputs a summary names (the catalogue has them all).
MAX_FAILED_KEPT = 100

#: Records per chunk when the catalogue and report are written (memory per chunk, not per night).
WRITE_CHUNK = 500


class RunInterrupted(KeyboardInterrupt):
    """The run was stopped; the catalogue written so far is in ``summary``."""

    def __init__(self, summary):
        super().__init__("run interrupted")
        self.summary = summary


def run(paths, out_dir, jobs=1, dask=None, force=False, formats=("ecsv",), overrides=None,
        plots="flagged", report=True, progress=None, stages=None, photometry=None, calibration=None,
        plot_for=None) -> RunSummary:
    """Analyse a night: every input through every available stage, then catalogue and report.

    Results are stored one record per input as they come, and the catalogue,
    the night diagram and the report are written from the records a chunk at
    a time, so the memory a run needs does not grow with the number of inputs.

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
    plots : {"flagged", "all", "none"} or bool
        Which inputs get a per-spectrum figure: ``flagged`` (default) the rows
        with a flag or a declined or failed stage, ``all`` every readable input,
        ``none`` none; True and False mean ``all`` and ``none``. The inputs named
        in ``plot_for`` are drawn whatever the choice. The choice is not part of
        the stored results' settings: asking for more figures later redraws only
        the inputs that lack one.
    plot_for : iterable of str, optional
        Objects or files (path, file name, or name without suffix) to draw.
    report : bool
        Write the night diagram and HTML report.
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
        Show a progress bar (rate and time left); default: only when stderr is a terminal.

    Returns
    -------
    RunSummary
    """
    t0 = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    formats = _checked_formats(formats)
    choice = _checked_plot_choice(plots)
    named = tuple(str(n) for n in (plot_for or ()))
    wanted = _checked_stages(stages)
    # what the analysis sets aside from the collector's passes (the imported libraries) stays aside
    # through the writing: its hand-back's full collection then visits what the analysis left
    with heap.held_aside():
        return _run(paths, out, jobs, dask, force, formats, overrides, choice, named, report, progress, wanted,
                    photometry, calibration, t0)


def _run(paths, out, jobs, dask, force, formats, overrides, choice, named, report, progress, wanted,
         photometry, calibration, t0) -> RunSummary:
    """:func:`run`'s analysis and writing, with its arguments checked."""
    import numpy as np

    # local workers start first: their start-up overlaps with finding the inputs and what is current
    draws = choice != "none" or bool(named)
    preload = WORKER_MODULES + (DRAWING_MODULES if draws else ())
    with executors.local_workers(1 if dask else int(jobs), preload=preload) as pool:
        # held compactly: a run keeps its inputs to the end, and 100,000 str took 12.9 MB
        inputs = InputList(collect_inputs(paths))
        stages = _stage_status(wanted)
        settings = _run_settings(overrides, choice, named, wanted, photometry, calibration)
        settings_hash = _settings_hash(settings, stages, photometry, calibration)
        store = RecordStore(out)
        wants = functools.partial(plot_wanted, choice=choice, named=named)
        stale = np.ones(len(inputs), bool) if force else np.fromiter(
            (_current(store, p, settings_hash, wants) is None for p in inputs), bool, count=len(inputs))
        todo = inputs if stale.all() else inputs.take(np.flatnonzero(stale))
        reused = len(inputs) - len(todo)
        del stale
        # what finding the inputs freed (strings and lists: no cycles, nothing to collect) goes
        # back before the set-up is built over it: left, it kept a 100,000-input night ~6 MB above
        # a 1,000-input one throughout (measured)
        heap.give_back(collect=False)
        with _progress_bar(len(inputs), reused, progress) as bar:
            meanwhile = functools.partial(executors.import_modules, PRODUCT_MODULES) if report else None
            executor = functools.partial(executors.results, pool=pool, meanwhile=meanwhile)
            analysed, interrupted = _analyse_rest(todo, settings, settings_hash, store, executor, jobs, dask, bar)
        del todo
    # The writing needs no templates or calibrations: they and the analysis's freed memory go back
    # first, so the writing fits under the analysis's peak however many rows it writes.
    forget_setups()
    heap.give_back()
    night = _write_night(inputs, store, settings_hash, out, formats, stages, settings, report, interrupted,
                         draw_aside=not dask and int(jobs) > 1)
    flush_to_disk()
    summary = RunSummary(outputs=night["outputs"], counts=night["counts"], reused=reused, stages=stages,
                         interrupted=interrupted, seconds=time.perf_counter() - t0, notes=night["notes"],
                         analysed=analysed, flags=night["flags"], failed_inputs=night["failed"],
                         plotted=night["plotted"], medium_assumed=night["medium_assumed"])
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


def _checked_plot_choice(plots) -> str:
    """The plot choice as one of PLOT_CHOICES (True: all, False: none)."""
    if plots is True:
        return "all"
    if plots is False or plots is None:
        return "none"
    if plots not in PLOT_CHOICES:
        raise ValueError(f"unknown plot choice {plots!r}; choose from {', '.join(PLOT_CHOICES)}")
    return plots


def _run_settings(overrides, plots, plot_for, wanted, photometry, calibration) -> dict:
    """The settings every input is analysed with (see :func:`analyse_file`)."""
    settings = {"overrides": {k: overrides[k] for k in sorted(overrides or {})}, "plots": plots,
                "plot_for": list(plot_for), "stages": wanted,
                "photometry": None if photometry is None else os.path.abspath(photometry),
                "calibration": None if calibration is None else os.path.abspath(calibration)}
    if calibration is not None and not os.path.isfile(calibration):
        raise ValueError(f"calibration file {calibration} does not exist")
    return settings


def _settings_hash(settings, stages, photometry, calibration) -> str:
    """Hash of all a result depends on besides its input: settings, stages, code, photometry, calibration.

    Which figures are drawn is not part of it: a record lacking a figure now asked for is
    redone on its own (see :meth:`specan.night.records.RecordStore.current`).
    """
    phot_hash = sha256_file(photometry) if photometry is not None and os.path.isfile(photometry) else None
    cal_hash = sha256_file(calibration) if calibration is not None else None
    results = {k: v for k, v in settings.items() if k not in ("plots", "plot_for")}
    return hashlib.sha256(json.dumps(
        {"settings": results, "code": code_fingerprint(), "stages": stages, "photometry": phot_hash,
         "calibration": cal_hash},
        sort_keys=True,
        default=str).encode()).hexdigest()


def _current(store, path, settings_hash, plot_wanted_for=None):
    """The stored record of ``path`` when it is current, else None (no file is hashed when none is stored)."""
    if not store.exists(path):
        return None
    return store.current(path, record_key(path, settings_hash), plot_wanted_for)


@contextlib.contextmanager
def _progress_bar(total, done, progress):
    """A progress bar over the inputs with the rate and the time left (by default only on a terminal)."""
    from tqdm import tqdm

    class Bar(tqdm):
        # No monitor thread (tqdm's, which would outlive the bar): the bar is advanced once a spectrum
        # and needs none, and with no other thread left the run may fork (DiagramAside) safely.
        monitor_interval = 0

    show = sys.stderr.isatty() if progress is None else bool(progress)
    bar = Bar(total=total, initial=done, disable=not show, unit="spectrum", desc="specan run", file=sys.stderr,
               smoothing=0.05, bar_format="{desc}: {percentage:3.0f}%|{bar}| {n_fmt}/{total_fmt} "
                                         "[{elapsed} elapsed, {remaining} left, {rate_fmt}]")
    try:
        yield bar
    finally:
        bar.close()


def _analyse_rest(todo, settings, settings_hash, store, executor, jobs, dask, bar):
    """Analyse the inputs that have no current record, storing each record as its result comes.

    Parameters
    ----------
    todo : list of str
        Inputs to analyse.
    settings : dict
        See :func:`analyse_file`.
    settings_hash : str
        The settings part of every record key.
    store : specan.night.records.RecordStore
        Where the records go.
    executor : callable
        ``executor(func, todo, settings, jobs=, dask=)`` yielding ``(path, result)``
        (see :func:`specan.night.executors.results`).
    jobs, dask
        Passed to the executor.
    bar : tqdm.tqdm
        Advanced by one per record stored.

    Returns
    -------
    analysed : int
        Records stored.
    interrupted : bool
        Ctrl-C or SIGTERM stopped the work before every input was done.
    """
    analysed, interrupted = 0, False
    with executors.sigterm_as_interrupt():
        results = executor(analyse_file, todo, settings, jobs=jobs, dask=dask)
        try:
            for path, result in results:
                store.put(path, record_key(path, settings_hash, result.get("input_sha256")), result)
                analysed += 1
                bar.update(1)
        except KeyboardInterrupt:
            # The signal may land between a record reaching the disk and its being counted
            # here; the catalogue is made from the disk, which is the truth.
            interrupted = True
            results.close()
    return analysed, interrupted


def _night_records(inputs, store, settings_hash, interrupted, present=None):
    """(index, record) of every input in order: its current record, or a ``not_run`` one.

    ``present`` (a boolean array, one per input) says which inputs have a current record
    when a first pass has found out already; otherwise each is checked (and noted in it).
    """
    why = ("run interrupted before this input; rerun to finish" if interrupted else
           "no current result stored; rerun to finish")
    for i, path in enumerate(inputs):
        record = None
        if present is None or present[i]:
            record = store.load(path) if present is not None else _current(store, path, settings_hash)
        yield i, record if record is not None else not_run_record(path, why)


def _chunked(items, size):
    chunk = []
    for item in items:
        chunk.append(item)
        if len(chunk) == size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


class _Tally:
    """What the summary and the report head say about the night, gathered one record at a time."""

    def __init__(self):
        from .report import DISTINCT_COLUMNS

        self.counts, self.flags, self.failed, self.distinct = {}, {}, [], {name: [] for name in DISTINCT_COLUMNS}
        self.plotted = self.medium_assumed = 0

    def add(self, record):
        v = record["values"]
        status = v.get("status", "error")
        self.counts[status] = self.counts.get(status, 0) + 1
        for flag in {f for f in str(v.get("flags") or "").split(",") if f}:
            self.flags[flag] = self.flags.get(flag, 0) + 1
        if status == "error" and len(self.failed) < MAX_FAILED_KEPT:
            self.failed.append((str(v.get("file")), str(v.get("reason") or "")))
        self.plotted += bool(v.get("plot"))
        self.medium_assumed += v.get("medium_assumed") is True
        for name, seen in self.distinct.items():
            value = v.get(name)
            if value is not None and str(value) not in seen and len(seen) <= 8:
                seen.append(str(value))

    def flag_list(self):
        return sorted(self.flags.items(), key=lambda t: (-t[1], t[0]))


def _write_night(inputs, store, settings_hash, out, formats, stages, settings, report, interrupted,
                 draw_aside=False) -> dict:
    """Catalogue in each format, then the night diagram and report, from the stored records.

    Two passes over the records: the first learns the columns and counts, the second writes
    the rows a chunk at a time (catalogue, report rows, diagram points); memory holds one
    chunk, not the night. ``draw_aside`` (a run given several processes): the diagram is drawn
    by a copy of this process (:class:`specan.night.products.DiagramAside`) during the second
    pass, which gathers its stars from the records itself.
    """
    import numpy as np

    from .night.catalogue import CatalogueSchema, CatalogueWriter

    present = np.zeros(len(inputs), bool)
    schema, tally = CatalogueSchema(), _Tally()
    for i, record in _night_records(inputs, store, settings_hash, interrupted):
        present[i] = record["values"].get("status") != "not_run"
        schema.add(record)
        tally.add(record)
    meta = catalogue_meta(len(inputs), tally.counts, interrupted, stages, settings["overrides"])
    outputs, notes = {}, []

    def tables():
        """(input number of the first row, table of WRITE_CHUNK rows) in input order: the second pass."""
        for chunk in _chunked(_night_records(inputs, store, settings_hash, interrupted, present), WRITE_CHUNK):
            yield chunk[0][0], schema.table([r for _, r in chunk])

    # Catalogue first: even if the report fails, the results are safe.
    with executors.sigterm_as_interrupt():
        night_rows = None
        if report:
            from .night.products import DiagramAside, NightRows

            def gather():
                # the diagram's stars from the same row tables as the second pass below
                from .hrdiagram import HRPoints

                points = HRPoints()
                for _, table in tables():
                    points.add(table)
                return points

            aside = DiagramAside.start(out, gather) if draw_aside else None
            try:
                night_rows = NightRows(out, schema.table([]), aside=aside)
            except BaseException:
                if aside is not None:
                    aside.stop()
                raise
        try:
            with CatalogueWriter(schema, out, formats, meta) as writer:
                for first, table in tables():
                    writer.write(table)
                    if night_rows is not None:
                        night_rows.add(table, first)
            outputs.update(writer.paths)
            if night_rows is not None:
                night = {"inputs": len(inputs), "counts": tally.counts, "flags": tally.flag_list(),
                         "created_utc": meta["created_utc"], "specan_version": meta["specan_version"],
                         "distinct": tally.distinct, "plotted": tally.plotted, "plots": settings["plots"],
                         "plot_for": settings["plot_for"], "medium_assumed": tally.medium_assumed}
                products, notes = night_rows.write_products(night, stages)
                outputs.update(products)
        finally:
            if night_rows is not None:
                night_rows.close()
    return {"outputs": outputs, "notes": notes, "counts": tally.counts, "flags": tally.flag_list(),
            "failed": tally.failed, "plotted": tally.plotted, "medium_assumed": tally.medium_assumed}
