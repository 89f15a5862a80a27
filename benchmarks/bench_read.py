"""Benchmark: read + prepare N FITS spectra, against a bare astropy.io.fits read of the same files.

Run:  python benchmarks/bench_read.py [--n 1000] [--pixels 4000]
Prints ms per spectrum for specan.read, for specan.read + prepare, for fits.getdata
alone, and the ratios; also this process's CPU time per spectrum (less moved by other work on
a shared machine than the clock).

Side by side with another checkout (e.g. an older commit, ``git archive <commit> | tar -x -C DIR``):
``python benchmarks/bench_read.py --before DIR [--rounds 3]`` times this same harness on DIR's
``specan`` and on this one's, alternately (the same files), and prints the median over the rounds
of each figure, before and after, with their ratio. Set ``OPENBLAS_NUM_THREADS=1`` for figures
comparable with the README's.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

ROOT = Path(__file__).resolve().parents[1]
#: Issue 12's target for read + prepare (ms per 4,000-pixel spectrum, one core).
TARGET_MS = 8.0


def make_files(folder: Path, n: int, pixels: int):
    rng = np.random.default_rng(42)
    w = 3800.0 + 1.2 * np.arange(pixels)
    lines = np.array([3933.7, 3968.5, 4101.7, 4340.5, 4861.3, 5167.3, 5889.9, 6562.8])
    base = 1 - sum(0.5 * np.exp(-0.5 * ((w - l) / 2.5) ** 2) for l in lines)
    paths = []
    for i in range(n):
        h = fits.Header()
        h.update({"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": 3800.0, "CDELT1": 1.2, "OBJECT": f"bench-{i}",
                  "DATE-OBS": "2026-11-30T22:00:00", "EXPTIME": 300.0, "RA": 10.0 + i % 300, "DEC": -20.0,
                  "OBSGEO-B": -30.0, "OBSGEO-L": 20.0, "OBSGEO-H": 1500.0})
        flux = (base * (w / 5000.0) ** -1.5 + rng.normal(0, 0.02, pixels)).astype(np.float32)
        p = folder / f"s{i:05d}.fits"
        fits.PrimaryHDU(flux, header=h).writeto(p)
        paths.append(p)
    return paths


def timings(paths):
    """{figure: ms per spectrum} of the bare read, specan.read and specan.read + prepare of ``paths``."""
    import specan

    specan.prepare(specan.read(paths[0]))  # warm imports
    out = {}
    for name, fn in (("astropy fits.getdata", lambda p: fits.getdata(p, header=True)),
                     ("specan.read", specan.read),
                     ("specan.read + prepare", lambda p: specan.prepare(specan.read(p)))):
        t0, c0 = time.perf_counter(), time.process_time()
        for p in paths:
            fn(p)
        out[name] = 1e3 * (time.perf_counter() - t0) / len(paths)
        # this process's CPU time: less moved than the clock by other work on a shared machine
        out[name + " (CPU)"] = 1e3 * (time.process_time() - c0) / len(paths)
    return out


def side_by_side(args, folder):
    """This harness on ``args.before``'s specan and on this checkout's, alternately, on the same files."""
    runs = {"before": [], "after": []}
    for _ in range(args.rounds):
        for label, path in (("before", Path(args.before).resolve()), ("after", ROOT)):
            env = dict(os.environ, PYTHONPATH=str(path))
            out = subprocess.run([sys.executable, __file__, "--files", str(folder), "--json"], env=env, check=True,
                                 capture_output=True, text=True).stdout
            runs[label].append(json.loads(out.strip().splitlines()[-1]))
    print(f"side by side: before = {Path(args.before).resolve()}, after = {ROOT}; {args.rounds} rounds of "
          f"{args.n} spectra of {args.pixels} pixels, median over the rounds (load average "
          f"{os.getloadavg()[0]:.1f} at the end)")
    print(f"  {'ms per spectrum':30s} {'before':>8s} {'after':>8s} {'ratio':>7s}")
    for name in runs["after"][0]:
        if name not in runs["before"][0]:
            continue
        b = float(np.median([r[name] for r in runs["before"]]))
        a = float(np.median([r[name] for r in runs["after"]]))
        print(f"  {name:30s} {b:8.2f} {a:8.2f} {b / a:6.2f}x")
    a = float(np.median([r["specan.read + prepare"] for r in runs["after"]]))
    print(f"  target: read + prepare <= {TARGET_MS:g} ms: {'met' if a <= TARGET_MS else 'not met'} ({a:.2f} ms)")
    a = float(np.median([r["specan.read + prepare (CPU)"] for r in runs["after"]]))
    print(f"  target, CPU time: {'met' if a <= TARGET_MS else 'not met'} ({a:.2f} ms)")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--pixels", type=int, default=4000)
    ap.add_argument("--before", help="another checkout to time side by side with this one")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--files", help=argparse.SUPPRESS)     # the side-by-side runs' shared files
    ap.add_argument("--json", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.files:
        t = timings(sorted(Path(args.files).glob("s*.fits")))
        print(json.dumps(t) if args.json else t)
        return
    with tempfile.TemporaryDirectory() as tmp:
        paths = make_files(Path(tmp), args.n, args.pixels)
        if args.before:
            side_by_side(args, Path(tmp))
            return
        t = timings(paths)
    n, bare = args.n, t["astropy fits.getdata"]
    print(f"spectra: {n}, pixels each: {args.pixels}")
    print(f"astropy fits.getdata:      {bare:8.2f} ms/spectrum")
    print(f"specan.read:               {t['specan.read']:8.2f} ms/spectrum  (x{t['specan.read'] / bare:.1f} of bare read)")
    print(f"specan.read + prepare:     {t['specan.read + prepare']:8.2f} ms/spectrum  "
          f"(x{t['specan.read + prepare'] / bare:.1f} of bare read)")
    print(f"CPU time, read + prepare:  {t['specan.read + prepare (CPU)']:8.2f} ms/spectrum  (read "
          f"{t['specan.read (CPU)']:.2f}; load average {os.getloadavg()[0]:.1f})")
    print(f"target: read + prepare <= {TARGET_MS:g} ms: {'met' if t['specan.read + prepare'] <= TARGET_MS else 'not met'}")


if __name__ == "__main__":
    main()
