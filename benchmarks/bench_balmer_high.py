"""Benchmark: the high Balmer lines (H epsilon, H8-H12, and H delta beside them) of solar-type stars.

Prints, with the specan on ``PYTHONPATH`` (run it against another checkout for a before/after):

* the Kurucz model Sun of ``rms-solar`` at R 1000 and 2000, S/N 100 (seeded), with and without an
  error array, normalised by the model's own continuum: each line's ``ew +- ew_err``, its
  ``ew_err_blend`` where the specan run has it, its window and ``blend``, and the pull
  ``(ew - bound) / ew_err`` against the most hydrogen alone can hold over that window (one less the
  running maximum of the true flux outward from the line's centre, integrated: a hydrogen wing
  deepens toward its centre, and the metal lines only take flux away);
* the same Sun multiplied back by its continuum, through ``specan lines``'s own path (continuum
  fitted by ``prepare``, velocity measured, type from the velocity template);
* with ``--miles``: MILES G0-G2 V and K0-K5 V stars of near-solar [Fe/H] and A1-A7 V stars
  (``../shared/reference/miles``), each line's values, and per group and line the spread of the
  values, the median error and chi2/dof about the weighted mean (stars whose H delta error is below
  0.05 A left out: their noise estimate is out of reach).

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_balmer_high.py --miles
    OPENBLAS_NUM_THREADS=1 PYTHONPATH=/path/to/old/checkout python benchmarks/bench_balmer_high.py --miles
"""

import argparse
import os
import sys
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from specutils import Spectrum

import specan
from specan import lines
from specan.obsinfo import ObsInfo

# the tests' Kurucz Sun and hydrogen bound: the benchmark prints what they check
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_lines_balmer_high import hydrogen_bound
from test_lines_balmer_high import sun_arrays as _sun_arrays

IDS = ("H_delta", "H_epsilon", "H_8", "H_9", "H_10", "H_11", "H_12")


def _kurucz():
    import solar

    d = np.loadtxt(Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt")
    return d[:, 0] * 10.0, d[:, 1], d[:, 2]


def sun_arrays(resolving_power, snr=100.0, seed=0):
    """(pixels, true normalised flux, noisy normalised flux, noise, continuum) of the Kurucz Sun:
    the tests' own (tests/test_lines_balmer_high.py), so the benchmark prints what they check."""
    return _sun_arrays(*_kurucz(), resolving_power, snr, seed)


def _row(table, line_id):
    return table[list(table["id"]).index(line_id)]


def sun_true_continuum():
    print("== Kurucz Sun, its own continuum, S/N 100: ew +- ew_err [ew_err_blend] window, pull against the bound ==")
    for r in (1000.0, 2000.0):
        pix, clean, noisy, sig, _ = sun_arrays(r)
        for with_errors in (True, False):
            info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=r,
                           normalized=True)
            spec = Spectrum(flux=noisy * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                            uncertainty=StdDevUncertainty(sig) if with_errors else None, meta={"specan": info})
            t = lines.measure(spec, rv=0 * u.km / u.s)
            print(f" R {r:.0f}, {'with' if with_errors else 'without'} an error array")
            for line_id in IDS:
                row = _row(t, line_id)
                lo, hi = row["window_min"].to_value(u.AA), row["window_max"].to_value(u.AA)
                bound = hydrogen_bound(pix, clean, row["wave_vac"].to_value(u.AA), lo, hi)
                ew, err = row["ew"].to_value(u.AA), row["ew_err"].to_value(u.AA)
                share = row["ew_err_blend"].to_value(u.AA) if "ew_err_blend" in t.colnames else np.nan
                print(f"   {line_id:10s} {ew:6.2f} +- {err:5.2f} [{share:5.2f}]  {lo:7.1f}-{hi:7.1f}  "
                      f"bound {bound:6.2f} pull {(ew - bound) / err:+7.1f}  blend {row['blend']}")


def sun_as_a_user_gets_it():
    from specan.cli.lines import lines_file

    print("\n== Kurucz Sun times its continuum, S/N 100, through `specan lines` "
          "(continuum fitted, velocity measured) ==")
    for r in (1000.0, 2000.0):
        pix, _, noisy, sig, cont = sun_arrays(r)
        for with_errors in (True, False):
            info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=r,
                           normalized=False)
            spec = Spectrum(flux=noisy * cont * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                            uncertainty=StdDevUncertainty(sig * cont) if with_errors else None, meta={"specan": info})
            d = lines_file(spec, {}, {"linelist": None, "bands": None, "rv": "measure", "profile": "auto",
                                      "star_type": None})
            got = {row["id"]: row for row in d["lines"]}
            print(f" R {r:.0f}, {'with' if with_errors else 'without'} an error array: "
                  + "; ".join(f"{k[2:]} {got[k]['ew_aa']:.2f} +- {got[k]['ew_err_aa']:.2f}" for k in IDS if k in got))


def miles():
    from astropy.table import Table

    from specan.io import read
    from specan.prepare import prepare

    folder = Path(__file__).resolve().parents[2] / "shared" / "reference" / "miles"
    if not (folder / "catalog.csv").is_file():
        print(f"\n(MILES not at {folder}: skipped)")
        return
    cat = Table.read(folder / "catalog.csv", format="ascii.csv")
    groups = {"G0-G2 V": ("G0", "G1", "G1.5", "G2"), "K0-K5 V": ("K0", "K1", "K2", "K3", "K4", "K5"),
              "A1-A7 V": ("A1", "A2", "A3", "A5", "A7")}
    print("\n== MILES dwarfs (|[Fe/H]| < 0.3 for G and K), at most 12 a group ==")
    for name, types in groups.items():
        rows = [r for r in cat if str(r["lumclass"]) == "V" and str(r["sptype"]) in types
                and (name.startswith("A") or (not np.ma.is_masked(r["feh"]) and abs(float(r["feh"])) < 0.3))][:12]
        values = {k: [] for k in IDS}
        print(f" {name}")
        for r in rows:
            spec = prepare(read(folder / str(r["file"]), medium="air", resolving_power=5500.0 / 2.5))
            t = lines.measure(spec, rv=0 * u.km / u.s)
            cells = []
            for k in IDS:
                row = _row(t, k)
                values[k].append((row["ew"].to_value(u.AA), row["ew_err"].to_value(u.AA)))
                cells.append(f"{k[2:]} {values[k][-1][0]:5.2f}+-{values[k][-1][1]:4.2f}")
            print(f"   {r['id']} {r['mk']!s:7s} " + " ".join(cells))
        ok = np.array([e for _, e in values["H_delta"]]) >= 0.05
        for k in IDS:
            v = np.array(values[k], float)[ok]
            v = v[np.isfinite(v).all(axis=1)]
            mean = np.average(v[:, 0], weights=1 / v[:, 1] ** 2)
            chi2 = np.sum(((v[:, 0] - mean) / v[:, 1]) ** 2) / (len(v) - 1)
            print(f"   {k:10s} {len(v):2d} stars: mean {v[:, 0].mean():6.2f} sd {v[:, 0].std(ddof=1):5.2f} "
                  f"median error {np.median(v[:, 1]):5.2f} chi2/dof {chi2:8.2f}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--miles", action="store_true", help="also the MILES dwarfs")
    args = parser.parse_args(argv)
    print(f"# specan from {Path(specan.__file__).parent}; load {os.getloadavg()[0]:.1f}")
    sun_true_continuum()
    sun_as_a_user_gets_it()
    if args.miles:
        miles()


if __name__ == "__main__":
    main()
