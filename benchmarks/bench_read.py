"""Benchmark: read + prepare N FITS spectra, against a bare astropy.io.fits read of the same files.

Run:  python benchmarks/bench_read.py [--n 1000] [--pixels 4000]
Prints ms per spectrum for specan.read, for specan.read + prepare, for fits.getdata
alone, and the ratios.
"""

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

import specan


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


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--pixels", type=int, default=4000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        paths = make_files(Path(tmp), args.n, args.pixels)
        specan.prepare(specan.read(paths[0]))  # warm imports
        t0 = time.perf_counter()
        for p in paths:
            fits.getdata(p, header=True)
        t_fits = time.perf_counter() - t0
        t0 = time.perf_counter()
        for p in paths:
            specan.read(p)
        t_read = time.perf_counter() - t0
        t0 = time.perf_counter()
        for p in paths:
            specan.prepare(specan.read(p))
        t_prep = time.perf_counter() - t0
    n = args.n
    print(f"spectra: {n}, pixels each: {args.pixels}")
    print(f"astropy fits.getdata:      {1e3 * t_fits / n:8.2f} ms/spectrum")
    print(f"specan.read:               {1e3 * t_read / n:8.2f} ms/spectrum  (x{t_read / t_fits:.1f} of bare read)")
    print(f"specan.read + prepare:     {1e3 * t_prep / n:8.2f} ms/spectrum  (x{t_prep / t_fits:.1f} of bare read)")


if __name__ == "__main__":
    main()
