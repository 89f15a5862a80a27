"""Benchmark: ms per spectrum of the lines stage (``specan.lines.measure``), and where they go.

Two sets of spectra:

* ``pipeline``: the 40 distinct synthetic spectra of ``benchmarks/bench_pipeline.py``
  (4,000 px, 3700-7299 A, R = 2000, S/N 12-150, types O-M; made by ``specan.synth``),
  read, prepared and given their velocity by the velocity stage first, so the lines stage
  sees what ``specan run`` gives it (the figure issue 12 sets: lines <= 15 ms); each timed call
  finds the noise estimate of the normalised flux kept, as ``specan run``'s velocity stage leaves
  it for the lines stage (:func:`noise_kept`; ``--cold``: made in every call, as this script timed
  it before 2026-12-04, ~1 ms a spectrum more than the night run spends);
* ``dense``: one normalised 4,000-px spectrum (3800-7000 A, R = 3000, S/N 100) carrying
  every atomic line of the default list (Gaussians of random EW; Voigt Balmer lines).

For each it prints ms per spectrum of ``measure`` (median of ``--repeats`` passes; its default,
the quick fitting design), the exact design (``measure(exact_fits=True)``: the fits of the
one-by-one design, batched) and the one-by-one fits (``measure(_batched=False)``), when the specan
being run has those switches, side by side, and with ``--profile`` the functions with the most time of their own under
cProfile, with ``--work`` the counts of the fitting work (Voigt batch iterations, fits made one
by one: figures the machine's load does not move), and with ``--steps`` the CPU time of each step
of ``measure`` (the arrays and filters, the listed lines, the features, the hydrogen lines, their
division, the other lines, the table); with ``--against DIR --fits`` the batched fits alone, this
checkout's and DIR's, made again by turns on the calls ``measure`` made, and whether they agree
to the bit (:func:`fits_alternated`).
Run the same script against another checkout for a before/after figure::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_lines.py --profile --steps
    OPENBLAS_NUM_THREADS=1 PYTHONPATH=/path/to/old/checkout python benchmarks/bench_lines.py

or, less moved by the machine's load, both in one process by turns (``--against``)::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_lines.py --against /path/to/old/checkout

``--against`` also says whether the two checkouts give the same tables to the bit on each set
(:func:`same_table`, quick and exact design); ``--demo`` adds the demo night's spectra
(``sample_spectra/``, with the type the night run gives them) to the sets.
"""

import argparse
import cProfile
import inspect
import os
import pstats
import sys
import tempfile
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.constants import c as SPEED_OF_LIGHT
from astropy.nddata import StdDevUncertainty
from scipy.special import voigt_profile
from specutils import Spectrum

import specan
import specan.resolution  # (noise_kept)
from specan import lines
from specan.linelist import load_linelist
from specan.obsinfo import ObsInfo

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_pipeline  # noqa: E402  (the same synthetic spectra as the night-run benchmark)


def dense_spectrum(npix=4000, resolving_power=3000.0, snr=100.0, seed=42):
    rng = np.random.default_rng(seed)
    wave = np.linspace(3800.0, 7000.0, npix)
    flux = np.ones(npix)
    ll = load_linelist()
    for row in ll[ll["kind"] == "atomic"]:
        lam = row["wave_air"].to_value(u.AA)
        sig = lam / resolving_power / lines.GAUSS_FWHM
        if row["species"] == "H I":
            flux -= rng.uniform(3.0, 8.0) * voigt_profile(wave - lam, sig, 1.5)
        else:
            ew = rng.uniform(0.02, 0.4)
            flux -= ew / (sig * np.sqrt(2 * np.pi)) * np.exp(-0.5 * ((wave - lam) / sig) ** 2)
    flux = np.clip(flux, 0.02, None) + rng.normal(0, 1 / snr, npix)
    info = ObsInfo(medium="air", medium_assumed=False, resolving_power=resolving_power, normalized=True)
    return Spectrum(spectral_axis=wave * u.AA, flux=flux * u.dimensionless_unscaled,
                    uncertainty=StdDevUncertainty(np.full(npix, 1 / snr)), meta={"specan": info})


def pipeline_spectra(count, workdir):
    """(prepared spectrum, options the velocity stage gives the lines stage) of ``count`` spectra."""
    from specan import prepare, read, velocity
    from specan.pipeline import _known_from_velocity

    out = []
    for path in bench_pipeline.make_spectra(workdir / "spectra", count):
        spec = prepare(read(str(path)))
        out.append((spec, _known_from_velocity(velocity.measure(spec))))
    return out


#: Whether each timed call finds the flux's noise estimate kept, as in the night run (``--cold``: not).
WARM_NOISE = True


def demo_spectra():
    """(prepared spectrum, options) of the demo night's readable spectra (``sample_spectra/``), as
    ``specan run`` hands them to the lines stage: the velocity stage's shift (and R where the file
    states none) and the classification's type (``--demo``: the set whose tables ``--against``
    compares too)."""
    from specan import classify, prepare, read, velocity
    from specan.errors import SpecanError
    from specan.pipeline import _known_from_velocity, _star_type

    out = []
    for path in sorted((Path(__file__).resolve().parents[1] / "sample_spectra").glob("trf3_*")):
        try:
            spec = prepare(read(str(path)))
            vel = velocity.measure(spec)
        except SpecanError:
            continue   # (the demo night's broken inputs)
        known = _known_from_velocity(vel)
        try:
            kind = classify(spec, **known)   # (as the night run calls it, with its default calibration)
        except SpecanError:
            kind = None
        out.append((spec, {**known, "star_type": _star_type(kind, vel)}))
    return out


def noise_kept(package, spec, known):
    """The noise estimate of ``spec``'s normalised flux made (untimed) and kept, as the night run's
    velocity stage leaves it for the lines stage (``specan.noise.kept_flux_noise`` keeps the last
    two; the velocity stage's key and the lines stage's are the same: in ``specan run`` the lines
    stage makes no estimate of its own, checked with a count of ``flux_noise`` calls). Without this,
    timing 40 spectra in a row, each call would make the estimate again (~1 ms) that a night run
    does not. ``package``: ``specan`` or another checkout's copy (its own store)."""
    if WARM_NOISE and spec.meta["specan"].normalized:
        package.resolution.normalised_arrays(spec, resolving_power=known.get("resolving_power"))


def timed(cases, repeats, **options):
    """Median over ``repeats`` passes of the ms per spectrum of measuring ``cases``: (wall, CPU).

    The CPU time of this process depends less on what else runs on the machine. Only the
    ``measure`` calls are timed (:func:`noise_kept` before each is not). One pass first, untimed: what
    a night run does once (the lines stage's set-ups, its compiled kernels loaded from numba's cache,
    ~0.3 s) is not a cost per spectrum.
    """
    for spec, known in cases:
        noise_kept(specan, spec, known)
        lines.measure(spec, **known, **options)
    wall, cpu = [], []
    for _ in range(repeats):
        spent_wall = spent_cpu = 0.0
        for spec, known in cases:
            noise_kept(specan, spec, known)
            t0, c0 = time.perf_counter(), time.process_time()
            lines.measure(spec, **known, **options)
            spent_wall += time.perf_counter() - t0
            spent_cpu += time.process_time() - c0
        wall.append(spent_wall / len(cases))
        cpu.append(spent_cpu / len(cases))
    return 1e3 * float(np.median(wall)), 1e3 * float(np.median(cpu))


def steps(cases, repeats):
    """CPU ms per spectrum of each step of ``measure`` (its recipe, step by step; median of ``repeats``)."""
    from specan.lines import measurement as m
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features, normalised
    from specan.lines.hydrogen import without_hydrogen
    from specan.lines.listed import lines_in_range

    names = ("arrays and filters (LineData)", "listed lines and targets", "features", "hydrogen lines",
             "hydrogen divided out", "other lines", "result table")
    runs = []
    for _ in range(repeats):
        spent = dict.fromkeys(names, 0.0)

        def step(name, func, *args):
            t = time.process_time()
            out = func(*args)
            spent[name] += time.process_time() - t
            return out

        for spec, known in cases:
            noise_kept(specan, spec, known)
            data = step(names[0], LineData, normalised(spec), known.get("resolving_power"))
            listed = step(names[1], lines_in_range, data, None, ("atomic",), known.get("rv", 0 * u.km / u.s))
            targets = step(names[1], m.line_targets, data, listed, None)
            features = step(names[2], find_features, data, DETECT_SIGMA, MIN_DEPTH)
            results = step(names[3], m.measure_lines, data, features, targets, np.flatnonzero(targets.hydrogen),
                           "auto", DETECT_SIGMA)
            data_m, features_m = step(names[4], without_hydrogen, data, features, results, targets,
                                      listed.rows["ep_low"], DETECT_SIGMA, MIN_DEPTH)
            results.update(step(names[5], m.measure_lines, data_m, features_m, targets,
                                np.flatnonzero(~targets.hydrogen), "auto", DETECT_SIGMA))
            step(names[6], m.line_table, data, listed, targets, [results[i] for i in range(targets.pred.size)])
        runs.append(spent)
    n = len(cases)
    print("  CPU ms per spectrum, step by step:")
    for name in names:
        print(f"    {1e3 * float(np.median([r[name] for r in runs])) / n:6.2f}  {name}")


def fitting_work(cases):
    """Counts of the fitting work per spectrum, which the machine's load does not move: Voigt problems
    and the batch's model evaluations (one per iteration of a batch), the Voigt fits made one by one
    (scipy's least_squares algorithm, specan.lines.leastsq: a batch problem not converged, or
    ill-determined), the Gaussian problems."""
    from specan.lines import batchfit

    counts = dict.fromkeys(("voigt problems", "voigt batch iterations", "voigt fits one by one",
                            "gauss problems"), 0)
    real = batchfit.voigt_batch, batchfit._VoigtModel.__call__, batchfit.fit_profile_lean, batchfit.gauss_batch

    def counted(name, func, size=None):
        def call(*args, **kwargs):
            counts[name] += 1 if size is None else len(args[size])
            return func(*args, **kwargs)
        return call

    batchfit.voigt_batch = counted("voigt problems", real[0], 1)
    batchfit._VoigtModel.__call__ = counted("voigt batch iterations", real[1])
    batchfit.fit_profile_lean = counted("voigt fits one by one", real[2])
    batchfit.gauss_batch = counted("gauss problems", real[3], 1)
    from specan.lines import measurement
    held = measurement.voigt_batch
    measurement.voigt_batch = batchfit.voigt_batch   # the wing fits' rounds
    try:
        for spec, known in cases:
            lines.measure(spec, **known)
    finally:
        batchfit.voigt_batch, batchfit._VoigtModel.__call__, batchfit.fit_profile_lean, batchfit.gauss_batch = real
        measurement.voigt_batch = held
    n = len(cases)
    print("  fitting work per spectrum: " + "; ".join(f"{name} {value / n:.1f}" for name, value in counts.items()))


def hot_spots(cases, top):
    """The ``top`` functions with the most own time under cProfile, ms per spectrum."""
    prof = cProfile.Profile()
    for spec, known in cases:
        noise_kept(specan, spec, known)
        prof.enable()
        lines.measure(spec, **known)
        prof.disable()
    rows = []
    for (file, line, func), (cc, nc, tt, ct, callers) in pstats.Stats(prof).stats.items():
        where = file.split("/specan/", 1)[1] if "/specan/" in file else (
            "lib:" + file.split("site-packages/", 1)[1] if "site-packages/" in file else file)
        rows.append((tt, ct, nc, f"{where}:{line}({func})"))
    rows.sort(reverse=True)
    n = len(cases)
    total = sum(r[0] for r in rows)
    print(f"  under cProfile (slower by its own overhead): {1e3 * total / n:.1f} ms per spectrum; "
          f"own / cumulative ms per spectrum, calls per spectrum:")
    for tt, ct, nc, name in rows[:top]:
        print(f"    {1e3 * tt / n:6.2f} {1e3 * ct / n:7.2f} {nc / n:8.1f}  {name}")


def other_checkout(path, name="specan_other"):
    """The ``specan`` package of another checkout, imported under another name (``name``),
    so that both can be timed in one process; None when it cannot be imported."""
    import importlib
    import shutil

    src = Path(path) / "specan"
    if not (src / "__init__.py").is_file():
        return None
    # a copy under another name: the package imports its own modules relatively
    where = Path(tempfile.mkdtemp(prefix="specan-other-"))
    shutil.copytree(src, where / name, ignore=shutil.ignore_patterns("__pycache__"))
    sys.path.insert(0, str(where))
    package = importlib.import_module(name)
    for module in ("lines", "resolution", "obsinfo"):
        importlib.import_module(f"{name}.{module}")
    return package


def copies_alternated(cases, other, rounds):
    """CPU ms per spectrum of this checkout's ``measure`` and ``other``'s, both imported as copies
    (:func:`other_checkout`: neither is the ``specan`` the cases were made with), by turns spectrum by
    spectrum, the order swapped from one spectrum and one round to the next: ``(here, there)`` as the
    sums over the spectra of each spectrum's least and median time over the rounds.

    :func:`alternated` times ``specan`` itself against a copy, in blocks, always in the same order, and
    read 0.92-1.02x for two identical checkouts (2026-12-04, load 0.5-1.6). This read 1.013x (least) and
    0.998x (median) for identical ones on the pipeline set (load 2.0), and 1.020x / 1.042x for the lines20
    branch against b61dd72 (load 2.0; the same method in a script, both orders: 1.022-1.033x least, load
    1.7-2.0), where the block alternation read 1.01-1.07x one way and 0.97-1.00x the other."""
    mine = other_checkout(Path(__file__).resolve().parents[1], "specan_here")
    pairs = []
    for package in (mine, other):
        lines_module = sys.modules[package.__name__ + ".lines"]
        pairs.append((package, lines_module, [spec for (spec, _) in _twins_for(cases, package)]))
    spent = np.zeros((2, rounds, len(cases)))
    for (package, lines_module, specs) in pairs:   # imports, caches
        for spec, (_, known) in zip(specs, cases):
            lines_module.measure(spec, **known)
    for r in range(rounds):
        for i, (_, known) in enumerate(cases):
            for w in ((0, 1) if (i + r) % 2 == 0 else (1, 0)):
                package, lines_module, specs = pairs[w]
                noise_kept(package, specs[i], known)
                c = time.process_time()
                lines_module.measure(specs[i], **known)
                spent[w, r, i] = time.process_time() - c
    n = len(cases)
    least = spent.min(axis=1).sum(axis=1) / n * 1e3
    middle = np.median(spent, axis=1).sum(axis=1) / n * 1e3
    return (least[0], middle[0]), (least[1], middle[1])


def alternated(cases, other, rounds, block=5):
    """CPU ms per spectrum of ``measure`` here and in ``other`` (:func:`other_checkout`), the two run
    by turns on blocks of ``block`` spectra in one process: the machine's load, which moves the CPU
    time of a process by +-20% from one minute to the next, then weighs on both alike."""
    import importlib

    other_lines = importlib.import_module(other.__name__ + ".lines")
    importlib.import_module(other.__name__ + ".resolution")
    # the other package's own carrier of the metadata (it checks for its own class)
    theirs = _twins_for(cases, other)
    for (spec, known), (twin, _) in zip(cases, theirs):   # imports, caches
        lines.measure(spec, **known)
        other_lines.measure(twin, **known)
    here = there = 0.0
    for _ in range(rounds):
        for start in range(0, len(cases), block):
            for spec, known in cases[start:start + block]:
                noise_kept(specan, spec, known)
                c = time.process_time()
                lines.measure(spec, **known)
                here += time.process_time() - c
            for twin, known in theirs[start:start + block]:
                noise_kept(other, twin, known)
                c = time.process_time()
                other_lines.measure(twin, **known)
                there += time.process_time() - c
    n = rounds * len(cases)
    return 1e3 * here / n, 1e3 * there / n


def _same_value(a, b):
    """Whether two table values (numbers, arrays, Quantities, str, None) are the same to the bit."""
    if hasattr(a, "unit") or hasattr(b, "unit"):
        return getattr(a, "unit", None) == getattr(b, "unit", None) and _same_value(np.asarray(a), np.asarray(b))
    if isinstance(a, (np.ndarray, float, np.floating)) or isinstance(b, (np.ndarray, float, np.floating)):
        a, b = np.asarray(a), np.asarray(b)
        return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()
    return type(a) is type(b) and a == b


def same_table(a, b):
    """Whether two tables of ``measure`` are the same to the bit: column names and order, each
    column's class, dtype, unit, description, format, meta and values (bytes: NaNs and signed zeros
    too), and the table's meta."""
    if a.colnames != b.colnames or list(a.meta) != list(b.meta):
        return False
    if not all(_same_value(a.meta[key], b.meta[key]) for key in a.meta):
        return False
    for name in a.colnames:
        ca, cb = a[name], b[name]
        if type(ca) is not type(cb) or not _same_value(ca, cb):
            return False
        if any(getattr(ca.info, attr) != getattr(cb.info, attr) for attr in ("name", "description", "format", "meta")):
            return False
    return True


def same_tables(cases, other):
    """How many of ``cases`` give this checkout's ``measure`` and ``other``'s (:func:`other_checkout`) the
    same table to the bit (:func:`same_table`), in the quick and in the exact design: ``(quick, exact)``."""
    import importlib

    other_lines = importlib.import_module(other.__name__ + ".lines")
    counts = [0, 0]
    for spec, known in _twins(cases, other):
        for k, exact in enumerate((False, True)):
            mine = lines.measure(spec[0], **known, exact_fits=exact)
            theirs = other_lines.measure(spec[1], **known, exact_fits=exact)
            counts[k] += same_table(mine, theirs)
    return tuple(counts)


def table_moves(cases, other, exact=False):
    """How far this checkout's tables stand from ``other``'s (:func:`other_checkout`) on ``cases``, where
    they are not the same to the bit (a compiled fitting loop sums in another order): a dict of the
    lines compared, the lines whose ``method``, ``profile``, ``blend``, ``detected``, ``emission`` or
    ``expected`` differ (or whose row is another line), the largest |change| of ``ew`` and ``ew_fit``
    in units of their own errors (``ew_err``, ``ew_fit_err``, the other checkout's), of ``fwhm``
    (relative) and of ``wave_obs`` (km/s: the table carries no error of either), and how many tables
    differ at all (:func:`same_table`)."""
    import importlib

    other_lines = importlib.import_module(other.__name__ + ".lines")
    out = {"lines": 0, "flags": 0, "tables_differ": 0, "ew/err": 0.0, "ew_fit/err": 0.0, "fwhm_rel": 0.0,
           "wave_obs_kms": 0.0, "ew/err>0.01": 0}
    for (spec, twin), known in _twins(cases, other):
        mine = lines.measure(spec, **known, exact_fits=exact)
        theirs = other_lines.measure(twin, **known, exact_fits=exact)
        out["tables_differ"] += not same_table(mine, theirs)
        if len(mine) != len(theirs) or list(mine["id"]) != list(theirs["id"]):
            out["flags"] += max(len(mine), len(theirs))
            continue
        out["lines"] += len(mine)
        changed = np.zeros(len(mine), bool)
        for col in ("method", "profile", "blend", "detected", "emission", "expected"):
            changed |= np.asarray(mine[col]) != np.asarray(theirs[col])
        out["flags"] += int(changed.sum())
        with np.errstate(divide="ignore", invalid="ignore"):
            for col, err in (("ew", "ew_err"), ("ew_fit", "ew_fit_err")):
                a, b = np.asarray(mine[col].value), np.asarray(theirs[col].value)
                move = np.abs(a - b) / np.asarray(theirs[err].value)
                move = move[np.isfinite(move)]
                out[f"{col}/err"] = max(out[f"{col}/err"], float(move.max(initial=0.0)))
                if col == "ew":
                    out["ew/err>0.01"] += int((move > 0.01).sum())
            a, b = np.asarray(mine["fwhm"].value), np.asarray(theirs["fwhm"].value)
            rel = np.abs(a - b) / np.abs(b)
            out["fwhm_rel"] = max(out["fwhm_rel"], float(rel[np.isfinite(rel)].max(initial=0.0)))
            a, b = np.asarray(mine["wave_obs"].value), np.asarray(theirs["wave_obs"].value)
            kms = np.abs(a - b) / b * SPEED_OF_LIGHT.to_value(u.km / u.s)
            out["wave_obs_kms"] = max(out["wave_obs_kms"], float(kms[np.isfinite(kms)].max(initial=0.0)))
    return out


def _twins(cases, other):
    """``((spectrum, its twin for other), options)`` of each case (:func:`_twins_for`)."""
    return [((spec, twin), known) for (spec, known), (twin, _) in zip(cases, _twins_for(cases, other))]


def _twins_for(cases, package):
    """``(twin, options)`` of each case: the spectrum with ``package``'s own metadata class (each
    checkout's copy checks for its own class)."""
    import copy
    import importlib

    info_class = importlib.import_module(package.__name__ + ".obsinfo").ObsInfo
    out = []
    for spec, known in cases:
        twin = copy.copy(spec)
        twin.meta = dict(spec.meta)
        info = info_class()
        info.__dict__.update(vars(spec.meta["specan"]))
        twin.meta["specan"] = info
        out.append((twin, known))
    return out


def fit_batches(cases):
    """Every call of the batched fits (``batchfit.voigt_batch``, the wing fits' rounds included, and
    ``batchfit.gauss_batch``) that ``measure`` makes on ``cases``, recorded as ``{kind: [(data, problems,
    args, kwargs)]}`` so they can be made again alone (:func:`fits_alternated`)."""
    from specan.lines import batchfit, measurement

    calls = {"voigt": [], "gauss": []}
    real = batchfit.voigt_batch, batchfit.gauss_batch, measurement.voigt_batch

    def recorded(kind, func):
        def call(data, problems, *args, **kwargs):
            calls[kind].append((data, problems, args, kwargs))
            return func(data, problems, *args, **kwargs)
        return call

    batchfit.voigt_batch = measurement.voigt_batch = recorded("voigt", real[0])
    batchfit.gauss_batch = recorded("gauss", real[1])
    try:
        for spec, known in cases:
            noise_kept(specan, spec, known)
            lines.measure(spec, **known)
    finally:
        batchfit.voigt_batch, batchfit.gauss_batch, measurement.voigt_batch = real
    return calls


def _same_fit(a, b):
    """Whether two fits (dicts of numbers, or None) are the same to the bit."""
    if a is None or b is None:
        return a is None and b is None
    return a.keys() == b.keys() and all(np.float64(a[k]).tobytes() == np.float64(b[k]).tobytes() for k in a)


def _same_fits(mine, theirs):
    """Whether two batches' fits (lists of :func:`_same_fit`'s) are as many and each the same to the bit."""
    return len(mine) == len(theirs) and all(_same_fit(a, b) for a, b in zip(mine, theirs))


def fits_alternated(cases, other, rounds, block=10):
    """The batched fits of ``cases`` (:func:`fit_batches`) made again by this checkout's
    ``specan.lines.batchfit`` and by ``other``'s (:func:`other_checkout`), by turns on blocks of
    ``block`` calls in one process: ``{kind: (here CPU ms per spectrum, there, the same fits to the bit)}``.

    The fits are a third or more of the lines stage's time and their inputs are the same for both
    (the arrays this checkout's ``measure`` made), so a change inside them is timed, and checked to
    the bit, without the rest of the stage around it. Its own spread: the same batchfit code on
    both sides read 0.977-1.021x (pipeline set, load 1.7-1.8, 2026-12-04); the whole stage's
    alternation read 0.93-0.96x for the same pair of checkouts (whichever one is "here" reads slow).
    """
    import importlib

    from specan.lines import batchfit

    theirs = importlib.import_module(other.__name__ + ".lines.batchfit")
    calls = fit_batches(cases)
    out = {}
    for kind, here, there in (("voigt", batchfit.voigt_batch, theirs.voigt_batch),
                              ("gauss", batchfit.gauss_batch, theirs.gauss_batch)):
        same = all(_same_fits(here(d, p, *a_, **k), there(d, p, *a_, **k)) for d, p, a_, k in calls[kind])
        spent = [0.0, 0.0]
        for r in range(rounds):
            for start in range(0, len(calls[kind]), block):
                for w in ((0, 1) if (r + start // block) % 2 == 0 else (1, 0)):
                    func = (here, there)[w]
                    c = time.process_time()
                    for d, p, a_, k in calls[kind][start:start + block]:
                        func(d, p, *a_, **k)
                    spent[w] += time.process_time() - c
        n = rounds * len(cases)
        out[kind] = (1e3 * spent[0] / n, 1e3 * spent[1] / n, same)
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--count", type=int, default=40, help="pipeline spectra (at most 40 distinct)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--profile", action="store_true", help="print the cProfile hot spots")
    parser.add_argument("--top", type=int, default=15)
    parser.add_argument("--steps", action="store_true", help="CPU ms per spectrum of each step of measure")
    parser.add_argument("--work", action="store_true", help="counts of the fitting work per spectrum")
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--cold", action="store_true",
                        help="time each spectrum with no noise estimate kept (the night run keeps the "
                             "velocity stage's; before 2026-12-04 this script timed it cold)")
    parser.add_argument("--against", type=Path, default=None, metavar="CHECKOUT",
                        help="also time another checkout's measure, by turns with this one in one process")
    parser.add_argument("--demo", action="store_true",
                        help="also the demo night's spectra (sample_spectra/, with the type the night run gives them)")
    parser.add_argument("--copies", action="store_true",
                        help="with --against: also time both checkouts as copies (neither the specan the spectra were "
                             "made with), by turns spectrum by spectrum, order swapped each time (least and median)")
    parser.add_argument("--moves", action="store_true",
                        help="with --against: how far the tables move against the other checkout's (table_moves)")
    parser.add_argument("--fits", action="store_true",
                        help="with --against: also time the batched fits alone (this checkout's batchfit and the "
                             "other's on the same recorded calls, by turns) and check they give the same fits")
    args = parser.parse_args(argv)
    global WARM_NOISE
    WARM_NOISE = not args.cold
    work = args.workdir or Path(tempfile.mkdtemp(prefix="specan-bench-lines-"))
    has_switch = "_batched" in inspect.signature(lines.measure).parameters
    has_exact = "exact_fits" in inspect.signature(lines.measure).parameters
    print(f"# specan from {Path(specan.__file__).parent}; load average {os.getloadavg()[0]:.1f}; "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}; "
          f"noise estimate {'kept, as in a night run' if WARM_NOISE else 'made in each call (--cold)'}")
    sets = {"pipeline": pipeline_spectra(args.count, work), "dense": [(dense_spectrum(), {})]}
    if args.demo:
        sets["demo"] = demo_spectra()
    for name, cases in sets.items():
        lines.measure(cases[0][0], **cases[0][1])   # imports, caches
        fast, fast_cpu = timed(cases, args.repeats)
        table = lines.measure(cases[0][0], **cases[0][1])
        line = (f"{name:9s} {len(cases):3d} spectra, {len(table)} lines in the first: "
                f"measure {fast:6.1f} ms per spectrum (CPU {fast_cpu:5.1f})")
        if has_exact:
            exact, exact_cpu = timed(cases, args.repeats, exact_fits=True)
            line += f"; exact design {exact:6.1f} ms (CPU {exact_cpu:5.1f}; {exact_cpu / fast_cpu:.2f}x)"
        if has_switch:
            slow, slow_cpu = timed(cases, args.repeats, _batched=False)
            line += f"; one-by-one fits {slow:6.1f} ms (CPU {slow_cpu:5.1f}; {slow_cpu / fast_cpu:.2f}x)"
        print(line, flush=True)
        if name == "pipeline":
            # issue 12's target for the lines stage of a night run
            print(f"# lines stage {fast:.1f} ms per spectrum against <= 15 ms: {'met' if fast <= 15.0 else 'not met'}")
        if args.against is not None:
            other = other_checkout(args.against)
            if other is None:
                print(f"  no specan package in {args.against}")
            else:
                quick, exact = same_tables(cases, other)
                print(f"  the same tables to the bit as {args.against}'s: {quick} of {len(cases)} (quick design), "
                      f"{exact} of {len(cases)} (exact design)")
                here, there = alternated(cases, other, args.repeats)
                print(f"  alternated in one process (load average {os.getloadavg()[0]:.1f}): CPU {here:.1f} ms per "
                      f"spectrum here, {there:.1f} in {args.against} ({there / here:.2f}x)")
                if args.copies:
                    (l0, m0), (l1, m1) = copies_alternated(cases, other, max(args.repeats, 8))
                    print(f"  both as copies, by turns (load average {os.getloadavg()[0]:.1f}): CPU ms per spectrum, "
                          f"least {l0:.2f} here, {l1:.2f} there ({l1 / l0:.3f}x); median {m0:.2f}, {m1:.2f} "
                          f"({m1 / m0:.3f}x)")
                if args.moves:
                    for exact in (False, True):
                        print(f"  {'exact' if exact else 'quick'} design, tables against the other checkout's: "
                              f"{table_moves(cases, other, exact)}", flush=True)
                if args.fits:
                    for kind, (mine, theirs, same) in fits_alternated(cases, other, max(args.repeats, 5)).items():
                        print(f"  {kind} fits alone, alternated (load average {os.getloadavg()[0]:.1f}): CPU "
                              f"{mine:.2f} ms per spectrum here, {theirs:.2f} there ({theirs / mine:.3f}x); the "
                              f"same fits to the bit: {same}")
        if args.work:
            fitting_work(cases)
        if args.steps:
            steps(cases, args.repeats)
        if args.profile:
            hot_spots(cases, args.top)


if __name__ == "__main__":
    main()
