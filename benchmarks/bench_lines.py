"""Benchmark: ms per spectrum to identify and measure the default line list.

A synthetic 4,000-pixel normalised spectrum (3800-7000 A, 0.8 A pixels, R = 3000,
S/N 100 per pixel) carrying every atomic line of the default stellar list
(Gaussians of random equivalent width; Voigt Balmer lines), in the spirit of an
F/G star. Run: ``python benchmarks/bench_lines.py [repeats]``.
"""

import sys
import time

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from scipy.special import voigt_profile
from specutils import Spectrum

from specan import lines
from specan.linelist import load_linelist
from specan.obsinfo import ObsInfo


def synthetic_spectrum(npix=4000, resolving_power=3000.0, snr=100.0, seed=42):
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


def main(repeats=5):
    spec = synthetic_spectrum()
    lines.measure(spec)  # warm-up (imports, caches)
    t_id, t_me = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        ident = lines.identify(spec)
        t1 = time.perf_counter()
        table = lines.measure(spec)
        t2 = time.perf_counter()
        t_id.append(t1 - t0)
        t_me.append(t2 - t1)
    n_id = int(np.sum(ident["status"] == "identified"))
    print(f"spectrum: {spec.flux.size} pixels, {len(table)} listed atomic lines covered, "
          f"{int(table['detected'].sum())} detected, {n_id} list entries identified")
    print(f"identify: {1e3 * np.median(t_id):.1f} ms per spectrum (median of {repeats})")
    print(f"measure:  {1e3 * np.median(t_me):.1f} ms per spectrum (median of {repeats})")
    print(f"total:    {1e3 * (np.median(t_id) + np.median(t_me)):.1f} ms per spectrum")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 5)
