"""Benchmark: ms per spectrum to MK-classify with the default calibration, whole and by part.

Input: Kurucz's model solar flux carried by ``rms-solar`` (3000-10000 A, vacuum,
R = 2000, ~4,800 pixels), S/N stated as 500. Timings, median of repeats:

- ``classify``: the whole call, velocity measured with specan.velocity and removed;
- ``classify, rv given``: velocity known (what a pipeline that already measured it pays);
- ``classify, rv given, new each call``: the same with another velocity at every call (-150 to
  +150 km/s), as a night's stars come: anything kept per set-up of the pixels at rest is then
  made again at every call (a fixed velocity flatters such caches; this row does not);
- ``classify, rv given, no library comparison``: the same without the comparison with the
  library stars (``neighbours=False``), so its cost shows;
- the parts of ``classify, rv given``: the criteria measured (``spectrum_criteria``), the
  criteria -> type posterior and flags (``classify_criteria``), the spectrum on the parameter
  model's pixels (``parameters.on_model_grid``: rest, smoothed, normalised), the label fit
  (``parameters.fit_labels``), the spectrum on the library comparison's pixels
  (``neighbours.on_grid``) and the comparison with the 459 library stars (``neighbours.compare``).

If the reference library is present, also the time to fit a calibration on its
criteria (94 standards, with the internal 5-fold cross-validation).

Run: ``python benchmarks/bench_classify.py [repeats]``.

Side by side with another checkout (e.g. an older commit, ``git archive <commit> | tar -x -C DIR``):
``python benchmarks/bench_classify.py [repeats] --before DIR [--rounds N]`` runs this same harness
on DIR's ``specan`` and on this one's, alternately, ``N`` rounds each (default 3), and prints the
median over the rounds of each figure, before and after, with their ratio (also of this process's
CPU time, less moved than the clock by other work on a shared machine). Set
``OPENBLAS_NUM_THREADS=1`` for figures comparable with the README's.
"""

import importlib
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from specutils import Spectrum

from specan.obsinfo import ObsInfo

C = importlib.import_module("specan.classify")
ROOT = Path(__file__).resolve().parents[1]
#: Issue 12's target for the classify stage with the velocity given (ms per spectrum, one core).
TARGET_MS = 10.0


def sun():
    import solar

    data = np.loadtxt(Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt")
    w, f = data[:, 0] * 10.0, data[:, 1]
    keep = (w > 3000) & (w < 10000)
    info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0, snr=500.0)
    return Spectrum(flux=f[keep] * u.dimensionless_unscaled, spectral_axis=w[keep] * u.AA,
                    meta={"specan": info})


def timed(fn, repeats, cpu=False):
    """(median ms, best ms) of ``repeats`` calls; with ``cpu`` also the median of this process's CPU time."""
    fn()  # warm-up: caches (calibration, velocity templates)
    t, c = [], []
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        t.append(time.perf_counter() - t0)
        c.append(time.process_time() - c0)
    out = 1e3 * float(np.median(t)), 1e3 * float(np.min(t))
    return out + (1e3 * float(np.median(c)),) if cpu else out


def _velocities():
    """A new velocity (km/s) at every call: -150 to +150 km/s in 0.37 km/s steps, cycling (a night's stars)."""
    k = 0
    while True:
        yield (-150.0 + 0.37 * (k % 811)) * u.km / u.s
        k += 1


def rows(spec):
    """(name, callable) of every timing, in print order."""
    from specan import parameters
    from specan.classify import neighbours

    rv = 0 * u.km / u.s
    cal = C.default_calibration()
    model = parameters.default_model()
    meas = C.spectrum_criteria(spec, cal.resolution, rv=rv)
    flux, good = neighbours.on_grid(spec, rv=rv)
    on_model = parameters.on_model_grid(spec, rv=rv)
    velocities = _velocities()
    return [
        ("classify (velocity measured)", lambda: C.classify(spec)),
        ("classify, rv given", lambda: C.classify(spec, rv=rv)),
        ("classify, rv given, new each call", lambda: C.classify(spec, rv=next(velocities))),
        ("  ... no library comparison", lambda: C.classify(spec, rv=rv, neighbours=False)),
        ("  criteria measured", lambda: C.spectrum_criteria(spec, cal.resolution, rv=rv)),
        ("  criteria -> type and flags", lambda: cal.classify_criteria(meas["values"], meas["noise"], meas["snr"])),
        ("  parameters: model pixels", lambda: parameters.on_model_grid(spec, rv=rv)),
        ("  parameters: label fit", lambda: parameters.fit_labels(model, on_model.flux, on_model.good)),
        ("  library: comparison pixels", lambda: neighbours.on_grid(spec, rv=rv)),
        ("  library: comparison", lambda: neighbours.compare(flux, good)),
    ]


def measure_all(repeats):
    """{name: (median ms, best ms, median CPU ms)} of every row."""
    return {name: timed(fn, repeats, cpu=True) for name, fn in rows(sun())}


def side_by_side(repeats, before, rounds):
    """Run this harness on ``before``'s specan and on this checkout's, alternately; print both."""
    runs = {"before": [], "after": []}
    for _ in range(rounds):
        for label, path in (("before", Path(before).resolve()), ("after", ROOT)):
            env = dict(os.environ, PYTHONPATH=str(path))
            out = subprocess.run([sys.executable, __file__, str(repeats), "--json"], env=env, check=True,
                                 capture_output=True, text=True).stdout
            runs[label].append(json.loads(out.strip().splitlines()[-1]))
    print(f"side by side: before = {Path(before).resolve()}, after = {ROOT}; {rounds} rounds of {repeats} repeats, "
          "median over the rounds of each round's median; best: the least of every round's best "
          f"(less moved by other load; load average {os.getloadavg()[0]:.1f} at the end)")
    print(f"  {'ms per spectrum':32s} {'before':>8s} {'after':>8s} {'ratio':>7s}   {'best: before':>12s} {'after':>8s} "
          f"{'ratio':>7s}   {'CPU: before':>11s} {'after':>8s} {'ratio':>7s}")
    for name in runs["after"][0]:
        b = float(np.median([r[name]["median"] for r in runs["before"] if name in r]))
        a = float(np.median([r[name]["median"] for r in runs["after"]]))
        bb = float(np.min([r[name]["best"] for r in runs["before"] if name in r]))
        ab = float(np.min([r[name]["best"] for r in runs["after"]]))
        bc = float(np.median([r[name]["cpu"] for r in runs["before"] if name in r]))
        ac = float(np.median([r[name]["cpu"] for r in runs["after"]]))
        print(f"  {name:32s} {b:8.2f} {a:8.2f} {b / a:6.1f}x   {bb:12.2f} {ab:8.2f} {bb / ab:6.1f}x   "
              f"{bc:11.2f} {ac:8.2f} {bc / ac:6.2f}x")
    a = float(np.median([r["classify, rv given"]["median"] for r in runs["after"]]))
    print(f"  target: classify, rv given <= {TARGET_MS:g} ms: {'met' if a <= TARGET_MS else 'not met'} ({a:.1f} ms)")
    a = float(np.median([r["classify, rv given"]["cpu"] for r in runs["after"]]))
    print(f"  target, CPU time: {'met' if a <= TARGET_MS else 'not met'} ({a:.1f} ms)")


def main(repeats=20):
    spec = sun()
    cal = C.default_calibration()
    print(f"{spec.flux.size} pixels, default calibration ({len(cal.standards_)} standards), {repeats} repeats "
          f"(load average {os.getloadavg()[0]:.1f})")
    for name, fn in rows(spec):
        med, best, cpu = timed(fn, repeats, cpu=True)
        print(f"  {name:32s} {med:8.2f} ms per spectrum (median; best {best:.2f}; CPU {cpu:.2f})")
        if name == "classify, rv given":
            print(f"  {'  target <= %g ms' % TARGET_MS:32s} {'met' if med <= TARGET_MS else 'not met'}")
    lib = ROOT.parent / "shared" / "reference" / "jhc1984" / "catalog.csv"
    if lib.is_file():
        X = np.array([s["criteria"] for s in cal.standards_])
        labels = [(s["sptype"], s["lumclass"]) for s in cal.standards_]
        med, best = timed(lambda: C.Calibration().fit_criteria(X, labels), max(3, repeats // 5))
        print(f"  {'fit on 94 standards (criteria given)':32s} {med:8.1f} ms (median; best {best:.1f})")


if __name__ == "__main__":
    args = sys.argv[1:]
    n = int(args[0]) if args and args[0].isdigit() else 20
    if "--json" in args:
        print(json.dumps({k: {"median": m, "best": b, "cpu": c} for k, (m, b, c) in measure_all(n).items()}))
    elif "--before" in args:
        rounds = int(args[args.index("--rounds") + 1]) if "--rounds" in args else 3
        side_by_side(n, args[args.index("--before") + 1], rounds)
    else:
        main(n)
