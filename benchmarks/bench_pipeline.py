#!/usr/bin/env python
"""Throughput and memory of ``specan run`` (specan/pipeline.py).

Writes N synthetic spectra (FITS images with a linear air-wavelength WCS, R =
2000, 3800-7200 A at 1 A per pixel, S/N 50-150, types O-M; made by
``specan.synth``) and runs the real command on them in a fresh process for
each case, with a fresh output folder:

* spectra per second for each count and number of jobs (wall clock of the
  whole command: start-up, every stage, plots, catalogue, report);
* peak resident memory (largest process: the run itself or one of its
  workers, from ``wait4``), which must stay flat as the count grows;
* the same command run again on the finished folder (everything current,
  nothing recomputed).

Usage::

    python benchmarks/bench_pipeline.py                      # 100 and 1,000 spectra, 1 and 2 jobs
    python benchmarks/bench_pipeline.py --counts 100 --jobs 1,2
    python benchmarks/bench_pipeline.py --counts 100,1000 --jobs 1 --stages read --no-plots

The full default is long (the science stages take seconds per spectrum on
one core); the figures measured for the README are in the issue notes with
the exact command used.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TYPES = [("O9", "V"), ("B2", "V"), ("B8", "III"), ("A0", "V"), ("A5", "V"), ("F0", "IV"), ("F5", "V"),
         ("G0", "V"), ("G5", "III"), ("K0", "III"), ("K2", "V"), ("K5", "III"), ("M0", "III"), ("M3", "V"),
         ("F2", "I"), ("G8", "II"), ("B5", "I"), ("K7", "V"), ("A2", "III"), ("G2", "V")]
DISTINCT = 40  # distinct synthetic spectra; the rest are copies with their own header (own content hash)


def make_spectra(folder: Path, count: int) -> list:
    """Write ``count`` FITS spectra into ``folder`` (reusing files already there)."""
    import astropy.units as u
    from astropy.io import fits

    from specan import synth

    folder.mkdir(parents=True, exist_ok=True)
    wave = np.arange(3800.0, 7200.5, 1.0)
    base = []
    for i in range(min(DISTINCT, count)):
        sptype, lumclass = TYPES[i % len(TYPES)]
        rng = np.random.default_rng(i)
        spec = synth.spectrum(sptype, lumclass, resolving_power=2000, wave=wave * u.AA,
                              rv=float(rng.uniform(-80, 80)) * u.km / u.s, continuum="blackbody",
                              snr=float(rng.uniform(50, 150)), seed=i)
        base.append((np.asarray(spec.flux.value, np.float32) * 1.0e4, sptype, lumclass))
    paths = []
    for i in range(count):
        path = folder / f"bench_{i:05d}.fits"
        paths.append(path)
        if path.exists():
            continue
        flux, sptype, lumclass = base[i % len(base)]
        h = fits.Header()
        h["OBJECT"] = f"BENCH-{i:05d}"
        h["CTYPE1"], h["CUNIT1"], h["CRPIX1"], h["CRVAL1"], h["CDELT1"] = "AWAV", "Angstrom", 1.0, 3800.0, 1.0
        h["DATE-OBS"] = "2025-09-14T22:00:00"
        h["EXPTIME"] = 600.0
        h["RA"], h["DEC"] = float(i % 360), 30.0
        h["OBSGEO-B"], h["OBSGEO-L"], h["OBSGEO-H"] = 39.3, -6.8, 640.0
        h["SPEC_RP"] = 2000.0
        fits.PrimaryHDU(flux, header=h).writeto(path)
    return paths


def run_once(folder, out, jobs, extra):
    """Run ``specan run``; return (seconds, peak RSS in MB, exit status)."""
    cmd = [sys.executable, "-m", "specan", "run", str(folder), "--out", str(out), "--jobs", str(jobs), *extra]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    # wait4: the child's resource use, including the workers it waited for;
    # ru_maxrss (kB on Linux) is the largest of those processes.
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    err = proc.stderr.read().decode(errors="replace")
    if proc.returncode not in range(0, 101):
        raise SystemExit(f"specan run failed ({proc.returncode}): {err[-2000:]}")
    return seconds, usage.ru_maxrss / 1024.0, proc.returncode


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--counts", default="100,1000", help="numbers of spectra, comma-separated")
    parser.add_argument("--jobs", default="1,2", help="numbers of jobs, comma-separated")
    parser.add_argument("--stages", default=None, help="passed to specan run --stages (default: all)")
    parser.add_argument("--no-plots", action="store_true", help="passed to specan run")
    parser.add_argument("--workdir", type=Path, default=None, help="where to write spectra and outputs")
    args = parser.parse_args(argv)
    counts = [int(c) for c in args.counts.split(",")]
    jobs_list = [int(j) for j in args.jobs.split(",")]
    extra = (["--stages", args.stages] if args.stages else []) + (["--no-plots"] if args.no_plots else [])
    work = args.workdir or Path(tempfile.mkdtemp(prefix="specan-bench-"))

    t0 = time.perf_counter()
    make_spectra(work / "spectra_all", max(counts))
    print(f"# wrote {max(counts)} spectra in {time.perf_counter() - t0:.1f} s to {work}")
    print(f"# python {sys.version.split()[0]}, {os.cpu_count()} CPUs, extra options: {' '.join(extra) or 'none'}, "
          f"load average before: {os.getloadavg()[0]:.1f}")
    print(f"{'spectra':>8} {'jobs':>5} {'seconds':>9} {'spectra/s':>10} {'peak MB':>8} {'rerun s':>8} {'failed':>7}")
    for count in counts:
        folder = work / f"spectra_{count}"
        if not folder.exists():
            folder.mkdir()
            for i in range(count):
                name = f"bench_{i:05d}.fits"
                os.link(work / "spectra_all" / name, folder / name)
        for jobs in jobs_list:
            out = work / f"out_{count}_{jobs}"
            shutil.rmtree(out, ignore_errors=True)  # the first run must compute everything
            seconds, peak, failed = run_once(folder, out, jobs, extra)
            again, _, _ = run_once(folder, out, jobs, extra)
            print(f"{count:>8} {jobs:>5} {seconds:>9.1f} {count / seconds:>10.2f} {peak:>8.0f} {again:>8.1f} "
                  f"{failed:>7}   load {os.getloadavg()[0]:.1f}", flush=True)


if __name__ == "__main__":
    main()
