"""Velocity errors: the Tonry & Davis r-statistic and noise resampling.

``rv_err_td`` is the Tonry & Davis (1979) estimate, written ``w / (2.3548 r)`` with
``r = h / (sqrt 2 sigma_a)`` (see :func:`tonry_davis` for why not their 3/8 w/(1+r));
``rv_err_mc`` re-measures the velocity after adding noise with the spectrum's own error array
(or the DER_SNR noise, Stoehr et al. 2008) ``n_resample`` times: for an estimator linear in the
noise the scatter of those velocities about the measured one equals its error. The reported
error is the larger (:func:`reported_error`).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline

from .correlation import Correlation
from .grid import SPLINE_K, highpass, kms_per_pixel

__all__ = ["TonryDavis", "VelocityErrors", "tonry_davis", "resample_error", "estimate_errors", "reported_error"]


# ---------------------------------------------------------------------------
# Tonry & Davis
# ---------------------------------------------------------------------------
class TonryDavis(NamedTuple):
    """Tonry & Davis r, the rms antisymmetric CCF noise sigma_a, and the error in grid pixels."""

    r: float
    sigma_a: float
    err_px: float


def tonry_davis(about, peak):
    """:class:`TonryDavis` of the CCF ``about`` (:class:`~.correlation.PeakCCF`) its ``peak``."""
    h, curv, j = peak.height, peak.curvature, about.j
    # Tonry & Davis: r = h / (sqrt2 sigma_a), sigma_a the rms antisymmetric part of the CCF. The
    # template's own correlation shape is removed first (window edges and broad features make it
    # asymmetric, which is not noise), and the peak width w is the Gaussian-equivalent FWHM of
    # the peak curvature, 2.3548 sqrt(h/|c''|): broad bands and Balmer wings widen the CCF but do
    # not set the precision, the sharp lines do.
    # For noise alone the antisymmetric part has variance sigma_n^2 (1 - rho(2j)) / 2, biased low
    # where CCF noise is correlated over many lags (broad template features); the residual
    # itself has variance sigma_n^2 at every lag, so sigma_a = rms(residual) / sqrt2.
    w_curv = 2.3548 * math.sqrt(h / abs(curv)) if curv < 0 else about.fwhm_px
    core = np.abs(j) <= max(2.0, w_curv if curv < 0 else 2.0)
    sig_a = float(np.sqrt(np.nanmean(about.residual[~core] ** 2)) / math.sqrt(2.0))
    r_td = h / (math.sqrt(2.0) * sig_a) if sig_a > 0 else float("inf")
    # Tonry & Davis write sigma = (3/8) w / (1 + r), the constant calibrated for their CCF and filter.
    # For this normalised CCF the small-noise limit is exact: the peak moves by
    # n'(s0)/|c''|, with var n' = sigma_n^2 |c''| / h for a matched template, so
    # sigma = sqrt(h/|c''|) / r = w / (2.3548 r). Injections confirm it (tests/test_velocity.py);
    # the published 3/8 and 1 + r underestimate our errors by ~25%.
    return TonryDavis(r_td, sig_a, w_curv / (2.3548 * r_td))


# ---------------------------------------------------------------------------
# Noise resampling
# ---------------------------------------------------------------------------
def _noisy_data_ffts(observed, weight, hp, m, k, seed):
    """FFTs (k, nf) of w d and w d^2 for ``k`` noise realisations added to the spectrum."""
    rng = np.random.default_rng(seed)
    noise = rng.normal(size=(observed.native_flux.size, k)) * observed.native_sigma[:, None]
    # the same cubic interpolation the data went through, applied to each realisation
    f = make_interp_spline(observed.spline_x, observed.native_flux[:, None] + noise, k=SPLINE_K,
                           axis=0)(observed.grid)  # (n, k)
    d = np.ascontiguousarray(highpass(f - 1.0, hp, observed.valid).T)  # (k, n): rows are realisations
    d -= (d @ weight)[:, None] / weight.sum()
    a1 = d * weight
    a3 = a1 * d
    return sfft.rfft(a1, m, axis=1), sfft.rfft(a3, m, axis=1)  # (k, nf), C-contiguous


def _phase_sums(A, B, ph, m, kmax):
    """sum_f Re(conj(A_f) B_f ph_f) / m over the first ``kmax`` frequencies, for every row of A."""
    # as one real matrix product on the interleaved (re, im) view: Re(conj(a) p) = a.re p.re + a.im p.im
    p = B[:kmax, None] * ph[:kmax]
    pint = np.empty((2 * kmax, p.shape[1]))
    pint[0::2], pint[1::2] = p.real, p.imag
    a = np.ascontiguousarray(np.atleast_2d(A)[:, :kmax]).view(np.float64)
    return (a @ pint) / m


def _cubic_maxima(offs, ccf, h):
    """Offset of the maximum near the centre of a cubic through each row of ``ccf`` at ``offs`` (Newton)."""
    coef = np.polynomial.polynomial.polyfit(offs, ccf.T, 3)  # (4, k)
    d1 = np.polynomial.polynomial.polyder(coef, 1)
    d2 = np.polynomial.polynomial.polyder(coef, 2)
    x = np.zeros(ccf.shape[0])
    for _ in range(6):
        g1 = np.polynomial.polynomial.polyval(x, d1, tensor=False)
        g2 = np.polynomial.polynomial.polyval(x, d2, tensor=False)
        x = np.clip(x - g1 / np.where(g2 < 0, g2, -1e-9), -2 * h, 2 * h)
    return x


def resample_error(observed, weight, template, pad, m, s0, err_px, k, seed, hp):
    """Scatter (pixels) of the peak over ``k`` noise realisations added to the spectrum."""
    A1, A3 = _noisy_data_ffts(observed, weight, hp, m, k, seed)
    A2 = sfft.rfft(weight, m)
    BT, BT2, BV = template.ffts(m)
    nf = A2.size
    freq = np.arange(nf)
    wts = np.full(nf, 2.0)
    wts[0] = 1.0
    if m % 2 == 0:
        wts[-1] = 1.0
    h = float(np.clip(3.0 * (err_px if np.isfinite(err_px) else 0.2), 0.05, 0.6))
    offs = np.linspace(-h, h, 5)
    ph = np.exp(2j * np.pi * np.outer(freq, pad - (s0 + offs)) / m) * wts[:, None]  # (nf, 5)
    # the coverage window is smooth: its spectrum (and the terms it multiplies) ends early
    pv = np.abs(BV) ** 2
    tail = np.cumsum(pv[::-1])[::-1] / pv.sum()
    kv = min(int(np.searchsorted(-tail, -1e-14)) + 1, nf)   # (never past the last frequency)
    rows = (_phase_sums(A1, BT, ph, m, nf),  # (k, 5)
            _phase_sums(A2, BT, ph, m, nf),
            _phase_sums(A2, BT2, ph, m, nf),
            _phase_sums(A1, BV, ph, m, kv),
            _phase_sums(A3, BV, ph, m, kv),
            _phase_sums(A2, BV, ph, m, nf))
    ccf, _ = Correlation.combine(rows)
    # cubic through the stencil of each realisation; its maximum near the centre (Newton)
    return float(np.std(_cubic_maxima(offs, ccf, h), ddof=1))


# ---------------------------------------------------------------------------
# Both, in km/s
# ---------------------------------------------------------------------------
class VelocityErrors(NamedTuple):
    """Tonry & Davis and noise-resampling errors (km/s), None where not computed."""

    td: float | None
    mc: float | None


def estimate_errors(which, td, peak, observed, search, template, n_resample, seed, notes):
    """:class:`VelocityErrors` of ``which`` ("both", "td", "mc") for the velocity at ``peak``.

    ``td`` is the :class:`TonryDavis` statistic; the noise resampling needs the spectrum
    (``observed``, ``search``: :class:`~.correlation.PeakSearch`) and the ``template``.
    """
    lags = search.lags
    dvds = kms_per_pixel(peak.lag, lags.step)
    rv_err_td = abs(td.err_px * dvds) if which in ("both", "td") and np.isfinite(td.err_px) else None
    # empirical error: add noise like the spectrum's own and re-measure (vectorised)
    rv_err_mc = None
    if which in ("both", "mc") and n_resample and n_resample >= 5:
        err_px = resample_error(observed, search.side.weight, template, lags.pad, lags.m, peak.lag, td.err_px,
                                n_resample, seed, lags.hp_sigma)
        rv_err_mc = abs(err_px * dvds)
        notes.append(f"empirical error from {n_resample} noise realisations ({observed.noise_source})")
    return VelocityErrors(rv_err_td, rv_err_mc)


def reported_error(errors, notes):
    """The error to report (km/s or None): the larger of the two :class:`VelocityErrors`."""
    # Reported error: the larger of the two. With a matched template they agree (injections); with a
    # mismatched one the residual CCF (hence the TD estimate) also carries the mismatch, which noise
    # resampling cannot see.
    candidates = [e for e in (errors.mc, errors.td) if e is not None and np.isfinite(e)]
    rv_err = max(candidates) if candidates else None
    if errors.mc is not None and errors.td is not None and errors.td > 2 * errors.mc:
        notes.append("Tonry-Davis error well above the noise-resampling one: template mismatch dominates")
    return rv_err
