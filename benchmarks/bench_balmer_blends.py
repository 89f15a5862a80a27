"""Benchmark: the metal lines inside the Balmer lines' windows (specan.lines.hydrogen_blends).

Prints, with the specan on ``PYTHONPATH`` (run it against another checkout for a before/after):

* the solar H beta and H alpha at R 2000 on the Kurucz model of ``rms-solar`` against the
  published values (Moore, Minnaert & Houtgast 1966, recalled: 3.68 and 4.02 A), with the
  continuum specan fits and with the model's own;
* on noiseless synthetic stars (``specan.synth``, A2 V to K5 V) the metal lines' absorption
  inside each of H beta, H alpha and H gamma's reported windows (the flux of the hydrogen lines
  alone, ``species=("H I",)``, less the full flux), what the measurement takes out, and the sum
  of what is left in, at R 2000 and 5000 (needs the ``species`` option of ``synth.spectrum``);
* the lines stage's CPU time on the 40 synthetic spectra of ``bench_lines.py`` and the share of
  it spent in taking the metal lines out (when the specan being run has it);
* with ``--miles K``: H beta and H alpha of every K-th MILES star (``../shared/reference/miles``).

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_balmer_blends.py
    OPENBLAS_NUM_THREADS=1 PYTHONPATH=/path/to/old/checkout python benchmarks/bench_balmer_blends.py
"""

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from specutils import Spectrum

import specan
from specan import lines, synth
from specan.obsinfo import ObsInfo

sys.path.insert(0, str(Path(__file__).resolve().parent))

PUBLISHED = {"H_beta": 3.68, "H_alpha": 4.02}   # Moore, Minnaert & Houtgast (1966), from memory
TYPES = (("A2", "V"), ("F0", "V"), ("F5", "V"), ("G2", "V"), ("G8", "III"), ("K2", "III"), ("K5", "V"))


def _spectrum(wave, flux, normalized):
    info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0, normalized=normalized)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=wave * u.AA,
                    uncertainty=StdDevUncertainty(flux / 500.0), meta={"specan": info})


def _row(table, line_id):
    return table[list(table["id"]).index(line_id)]


def sun():
    import solar

    from specan.prepare import prepare

    data = np.loadtxt(Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt")
    w, f, c = data[:, 0] * 10.0, data[:, 1], data[:, 2]
    keep = (w > 3700) & (w < 8800)
    w, f, c = w[keep], f[keep], c[keep]
    for name, spec in (("fitted continuum", prepare(_spectrum(w, f, False))),
                       ("true continuum", _spectrum(w, f / c, True))):
        t = lines.measure(spec)
        for line_id, published in PUBLISHED.items():
            r = _row(t, line_id)
            ew = r["ew"].to_value(u.AA)
            print(f"  Sun R 2000, {name:16s} {line_id:8s} {ew:6.3f} +- {r['ew_err'].to_value(u.AA):.3f} A "
                  f"({100 * (ew / published - 1):+5.1f}% of {published}); integral {r['ew_int'].to_value(u.AA):6.3f}; "
                  f"{r['method']}")


def synthetic(resolving_power):
    from specan.lines.data import pixel_edges

    left_plain = left_now = 0.0
    for sptype, lumclass in TYPES:
        full = synth.spectrum(sptype, lumclass, resolving_power=resolving_power)
        try:
            alone = synth.spectrum(sptype, lumclass, resolving_power=resolving_power, species=("H I",))
        except TypeError:
            print("  (this synth has no species option)")
            return
        t = lines.measure(full)
        w = full.spectral_axis.to_value(u.AA)
        dx = np.diff(pixel_edges(w))
        parts = []
        for line_id in ("H_beta", "H_alpha", "H_gamma"):
            r = _row(t, line_id)
            sel = (w >= r["window_min"].to_value(u.AA)) & (w <= r["window_max"].to_value(u.AA))
            metal = float(np.sum((alone.flux.value - full.flux.value)[sel] * dx[sel]))
            taken = (r["ew_int"] - r["ew"]).to_value(u.AA)
            left_plain += abs(metal)
            left_now += abs(metal - taken)
            parts.append(f"{line_id} {metal:5.3f}/{taken:5.3f}")
        print(f"  R {resolving_power:5.0f} {sptype:>3s} {lumclass:3s} metal lines in window / taken out (A): " + ", ".join(parts))
    print(f"  R {resolving_power:5.0f}: metal absorption left in the hydrogen lines, sum over {len(TYPES)} stars x 3 lines: "
          f"{left_plain:.3f} A by the plain integral, {left_now:.3f} A as measured")


def timing(count):
    import bench_lines

    from specan.lines import measurement

    real = getattr(measurement, "less_blends", None)
    spent = [0.0]

    def timed(*args):
        t = time.process_time()
        real(*args)
        spent[0] += time.process_time() - t

    if real is not None:
        measurement.less_blends = timed
    with tempfile.TemporaryDirectory() as work:
        cases = bench_lines.pipeline_spectra(count, Path(work))
        runs = []
        for _ in range(3):
            spent[0] = 0.0
            c0 = time.process_time()
            for spec, known in cases:
                lines.measure(spec, **known)
            runs.append((time.process_time() - c0, spent[0]))
    total, inside = sorted(runs)[1]
    share = f"; taking the metal lines out {1e3 * inside / count:.3f} ms ({100 * inside / total:.1f}%)" if real else ""
    print(f"  lines stage on {count} pipeline spectra: {1e3 * total / count:.1f} ms CPU per spectrum{share}; "
          f"load {os.getloadavg()[0]:.1f}")


def miles(step):
    from astropy.table import Table

    from specan.io import read
    from specan.prepare import prepare

    folder = Path(__file__).resolve().parents[2] / "shared" / "reference" / "miles"
    if not (folder / "catalog.csv").is_file():
        print(f"  MILES not at {folder}")
        return
    catalog = Table.read(folder / "catalog.csv", format="ascii.csv")
    for row in catalog[::step]:
        spec = prepare(read(folder / row["file"], medium="air", resolving_power=5500.0 / 2.5))
        t = lines.measure(spec, rv=0 * u.km / u.s)
        parts = []
        for line_id in PUBLISHED:
            r = _row(t, line_id)
            parts.append(f"{line_id} {r['ew'].to_value(u.AA):6.3f} +- {r['ew_err'].to_value(u.AA):.3f} "
                         f"(integral {r['ew_int'].to_value(u.AA):6.3f})")
        print(f"  {row['id']} {str(row['sptype']):>5s} {str(row['lumclass']):>4s}  " + "; ".join(parts))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--count", type=int, default=40, help="pipeline spectra timed")
    parser.add_argument("--miles", type=int, default=0, metavar="K", help="every K-th MILES star")
    args = parser.parse_args(argv)
    print(f"# specan from {Path(specan.__file__).parent}; OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}")
    sun()
    for resolving_power in (2000, 5000):
        synthetic(resolving_power)
    timing(args.count)
    if args.miles:
        miles(args.miles)


if __name__ == "__main__":
    main()
