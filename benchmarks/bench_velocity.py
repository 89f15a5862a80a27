"""Speed and accuracy of specan.velocity.measure.

1. Against ``specutils.analysis.template_correlate`` on the same inputs: the Kurucz model Sun
   (``rms-solar``, vacuum, R = 2000) shifted to random velocities, sampled on linear pixels
   with photon noise, and the same noiseless model at rest on the same pixels as the template.
   specutils returns the correlation and lags; its velocity is the lag of the maximum refined
   by a parabola through three points (common practice). Time per spectrum and the scatter of
   (measured - true) are printed for both.
2. Scatter / Cramer-Rao bound for a pure shift (computed from the noiseless model and the
   noise) by S/N and resolving power, matched template.

Run:  python benchmarks/bench_velocity.py [--quick]

Timings depend on the machine's load; on a shared machine OPENBLAS_NUM_THREADS=1 avoids BLAS
threads fighting other processes (the figures in the issue-4 report were measured that way).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline
from scipy.ndimage import gaussian_filter1d
from specutils import Spectrum

from specan import velocity
from specan.obsinfo import META_KEY, ObsInfo

C_KMS = 299792.458  # km/s, exact (SI definition of the metre)
KMS = u.km / u.s
R_KURUCZ = 2000.0


def kurucz():
    """Band-limited (8x FFT-upsampled) Kurucz solar model, normalised, on ln(lambda_vac)."""
    import solar

    path = Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt"
    d = np.loadtxt(path)
    w = d[:, 0] * 10.0
    keep = (w > 3000) & (w < 10000)
    w, f, c = w[keep], d[keep, 1], d[keep, 2]
    lnw = np.log(w)
    step = (lnw[-1] - lnw[0]) / (lnw.size - 1)
    y = f / c - 1.0
    fine = sfft.irfft(sfft.rfft(y), y.size * 8) * 8
    grid = lnw[0] + step / 8 * np.arange(fine.size)
    cache = {}

    def model(r):
        if r not in cache:
            yy = fine
            if r < R_KURUCZ:
                yy = gaussian_filter1d(fine, np.sqrt(1 / r**2 - 1 / R_KURUCZ**2) / 2.3548 / (step / 8))
            sel = (grid > np.log(3300)) & (grid < np.log(9600))
            cache[r] = make_interp_spline(grid[sel], 1.0 + yy[sel], k=3)
        return cache[r]

    return model


def pixels(r, lo=3850.0, hi=8650.0):
    return np.arange(lo, hi, lo / (r * 2.5))


def observe(model, r, v, snr=None, seed=0):
    pix = pixels(r)
    flux = model(r)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
    unc = None
    if snr is not None:
        sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
        flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
        unc = StdDevUncertainty(sig)
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=r, normalized=True)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA, uncertainty=unc,
                    meta={META_KEY: info})


def crb(model, r, v, snr):
    clean = observe(model, r, v).flux.value
    d = (observe(model, r, v + 0.5).flux.value - observe(model, r, v - 0.5).flux.value) / 1.0
    return 1.0 / np.sqrt(np.sum((d / (np.sqrt(clean) / snr)) ** 2))


def specutils_velocity(obs, tmpl, method="direct", subtract_continuum=False):
    from specutils.analysis import template_correlate

    if subtract_continuum:
        obs = Spectrum(flux=obs.flux - 1 * u.dimensionless_unscaled, spectral_axis=obs.spectral_axis,
                       uncertainty=obs.uncertainty)
        tmpl = Spectrum(flux=tmpl.flux - 1 * u.dimensionless_unscaled, spectral_axis=tmpl.spectral_axis)
    corr, lag = template_correlate(obs, tmpl, method=method)
    c, lg = np.asarray(corr.value), np.asarray(lag.to_value(KMS))
    i = int(np.argmax(c))
    y0, y1, y2 = c[i - 1], c[i], c[i + 1]
    d = 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    return lg[i] + d * (lg[i + 1] - lg[i - 1]) / 2


def compare(model, n, snr, r=2000.0):
    rng = np.random.default_rng(1)
    tmpl = observe(model, r, 0.0)
    tmpl.meta[META_KEY] = ObsInfo(object="Kurucz rest", medium="vacuum", medium_assumed=False,
                                  resolving_power=r, normalized=True)
    rows = {k: ([], []) for k in ("specan (both errors)", "specan (errors=td)", "specutils direct",
                                  "specutils fft", "specutils fft, flux-1")}
    for i in range(n):
        v = rng.uniform(-500, 500)
        s = observe(model, r, v, snr=snr, seed=100 + i)
        for name, fn in (
            ("specan (both errors)", lambda: velocity.measure(s, template=tmpl, barycentric=False)["rv"].value),
            ("specan (errors=td)", lambda: velocity.measure(s, template=tmpl, barycentric=False,
                                                            errors="td")["rv"].value),
            ("specutils direct", lambda: specutils_velocity(s, tmpl, "direct")),
            ("specutils fft", lambda: specutils_velocity(s, tmpl, "fft")),
            ("specutils fft, flux-1", lambda: specutils_velocity(s, tmpl, "fft", subtract_continuum=True)),
        ):
            t0 = time.perf_counter()
            got = fn()
            rows[name][0].append(time.perf_counter() - t0)
            rows[name][1].append(got - v)
    print(f"\n== R = {r:.0f}, S/N = {snr}, {n} spectra, Kurucz Sun, matched template on the same pixels ==")
    print(f"{'method':24s} {'median time':>12s} {'rms error':>10s} {'bias':>8s}")
    for name, (t, e) in rows.items():
        e = np.asarray(e)
        print(f"{name:24s} {1e3 * np.median(t):9.1f} ms {np.sqrt(np.mean(e**2)):7.3f} km/s {np.mean(e):+7.3f}")
    return rows


def crb_table(model, n):
    print("\n== scatter / Cramer-Rao bound, matched template, Kurucz Sun ==")
    print(f"{'R':>6s} {'S/N':>5s} {'scatter km/s':>13s} {'CRB km/s':>9s} {'ratio':>6s} {'mean rv_err':>12s}")
    for r in (1000.0, 1500.0, 2000.0):
        tmpl = observe(model, r, 0.0)
        for snr in (10, 30, 100, 300):
            errs, reps = [], []
            for i in range(n):
                v = 123.0
                res = velocity.measure(observe(model, r, v, snr=snr, seed=int(r) * 1000 + snr * 100 + i), template=tmpl,
                                       barycentric=False)
                errs.append(res["rv"].value - v)
                reps.append(res["rv_err"].value)
            sc, b = np.std(errs, ddof=1), crb(model, r, 123.0, snr)
            print(f"{r:6.0f} {snr:5d} {sc:13.3f} {b:9.3f} {sc / b:6.2f} {np.mean(reps):12.3f}")


def auto_speed():
    from specan import synth

    print("\n== specan.velocity.measure timing, automatic template (14-type grid + refinement), R = 2000 ==")
    s = synth.spectrum("K1", "III", rv=-321 * KMS, snr=50, seed=1)
    velocity.measure(s)  # templates built and cached
    for errors in ("both", "td"):
        t = []
        for _ in range(10):
            t0 = time.perf_counter()
            res = velocity.measure(s, errors=errors)
            t.append(time.perf_counter() - t0)
        print(f"errors={errors:5s}: median {1e3 * np.median(t):.1f} ms per spectrum "
              f"({s.flux.size} pixels), rv {res['rv'].value:.2f} (true -321), {res['template']}")


if __name__ == "__main__":
    import os

    quick = "--quick" in sys.argv
    print(f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}")
    model = kurucz()
    n = 10 if quick else 30
    for snr in (30, 100):
        compare(model, n, snr)
    crb_table(model, 10 if quick else 40)
    auto_speed()
