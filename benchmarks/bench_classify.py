"""Benchmark: ms per spectrum to MK-classify with the default calibration.

Input: Kurucz's model solar flux carried by ``rms-solar`` (3000-10000 A, vacuum,
R = 2000, ~4,800 pixels), S/N stated as 500. Three timings, median of repeats:

- ``classify``: the whole call, velocity measured with specan.velocity and removed;
- ``classify, rv given``: velocity known (what a pipeline that already measured it pays);
- ``classify, rv given, no library comparison``: the same without the comparison with the
  library stars (``neighbours=False``), so its cost shows;
- ``library comparison``: the spectrum put on the comparison's footing and compared with every
  library star (:func:`specan.classify.neighbours.measure`), and the comparison alone
  (one set of matrix products over the 459 stars);
- ``criteria -> type``: the likelihood on the (code, class) lattice alone.

If the reference library is present, also the time to fit a calibration on its
criteria (94 standards, with the internal 5-fold cross-validation).
Run: ``python benchmarks/bench_classify.py [repeats]``.
"""

import importlib
import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from specutils import Spectrum

from specan.obsinfo import ObsInfo

C = importlib.import_module("specan.classify")
ROOT = Path(__file__).resolve().parents[1]


def sun():
    import solar

    data = np.loadtxt(Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt")
    w, f = data[:, 0] * 10.0, data[:, 1]
    keep = (w > 3000) & (w < 10000)
    info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0, snr=500.0)
    return Spectrum(flux=f[keep] * u.dimensionless_unscaled, spectral_axis=w[keep] * u.AA,
                    meta={"specan": info})


def timed(fn, repeats):
    fn()  # warm-up: caches (calibration, velocity templates)
    t = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        t.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(t)), 1e3 * float(np.min(t))


def main(repeats=20):
    spec = sun()
    cal = C.default_calibration()
    from specan.classify import neighbours

    meas = C.spectrum_criteria(spec, cal.resolution, rv=0 * u.km / u.s)
    flux, good = neighbours.on_grid(spec, rv=0 * u.km / u.s)
    rows = [
        ("classify (velocity measured)", lambda: C.classify(spec)),
        ("classify, rv given", lambda: C.classify(spec, rv=0 * u.km / u.s)),
        ("  ... no library comparison", lambda: C.classify(spec, rv=0 * u.km / u.s, neighbours=False)),
        ("library comparison", lambda: neighbours.measure(spec, rv=0 * u.km / u.s)),
        ("  ... comparison alone", lambda: neighbours.compare(flux, good)),
        ("criteria -> type only", lambda: cal.classify_criteria(meas["values"], meas["noise"], meas["snr"])),
    ]
    print(f"{spec.flux.size} pixels, default calibration ({len(cal.standards_)} standards), {repeats} repeats")
    for name, fn in rows:
        med, best = timed(fn, repeats)
        print(f"  {name:32s} {med:8.1f} ms per spectrum (median; best {best:.1f})")
    lib = ROOT.parent / "shared" / "reference" / "jhc1984" / "catalog.csv"
    if lib.is_file():
        X = np.array([s["criteria"] for s in cal.standards_])
        labels = [(s["sptype"], s["lumclass"]) for s in cal.standards_]
        med, best = timed(lambda: C.Calibration().fit_criteria(X, labels), max(3, repeats // 5))
        print(f"  {'fit on 94 standards (criteria given)':32s} {med:8.1f} ms (median; best {best:.1f})")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)
