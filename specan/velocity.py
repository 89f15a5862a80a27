"""Radial velocities: cross-correlation, barycentric correction, honest errors, flags.

Method (Tonry & Davis 1979, AJ 84, 1511): the continuum-normalised spectrum and a
template are put on one grid uniform in ln(vacuum wavelength), where a Doppler
shift is a translation. The spectrum (minus its weighted mean) is apodised by
a cosine taper at its ends and around masked gaps (tellurics, bad pixels,
emission spikes); the template (minus its continuum) extends beyond the
spectrum by the velocity search range, so no lag loses data, and every lag is
normalised by the overlap actually used (a zero-normalised correlation: means
and energies of both sides over the overlap). All correlations are FFT products;
the peak is refined by evaluating the correlation as a Fourier series at
fractional lags (band-limited interpolation, no parabola "peak locking").

Before correlating, both sides lose their low frequencies (a Gaussian of
``highpass`` resolution elements is smoothed out: Tonry & Davis' filter, done in
pixel space): broad bands, Balmer wings and continuum residuals then neither
dominate the correlation nor make its noise correlated over many lags.

Errors: ``rv_err_td`` is the Tonry & Davis r-statistic estimate, written
``w / (2.3548 r)`` with ``r = h / (sqrt 2 sigma_a)`` (see ``measure`` for why not
their 3/8 w/(1+r)); ``rv_err_mc`` re-measures the velocity after adding noise
with the spectrum's own error array (or the DER_SNR noise, Stoehr et al. 2008)
``n_resample`` times: for an estimator linear in the noise the scatter of those
velocities about the measured one equals its error. ``rv_err`` is the larger.

Velocities are relativistic Doppler velocities, 1 + z = sqrt((1 + b)/(1 - b)).
Barycentric correction: astropy's ``SkyCoord.radial_velocity_correction``
(``v_corr``, defined so that redshifts compose), combined as
(1 + z_bary) = (1 + z_topo)(1 + v_corr/c), i.e. the issue's
(1 + v_b/c) = (1 + v_obs/c)(1 + v_corr/c) written for redshifts.
"""

from __future__ import annotations

import functools
import math
from pathlib import Path

import astropy.units as u
import numpy as np
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline
from scipy.ndimage import distance_transform_edt, gaussian_filter1d

from . import templates
from ._offline import IERS_NOTE
from .doppler import C_KMS, doppler_factor, shift_to_rest, velocity_from_factor
from .doppler import velocity_kms as _kms
from .errors import AnalysisError, SpecanError
from .frames import (ESCAPE_SPEED, HIGH_VELOCITY, barycentric_correction, galactic_frame_note,
                     galactic_rest_frame_velocity, missing_for_barycentric)
from .mktypes import code_to_sptype, parse_mk, sptype_to_code
from .obsinfo import get_info, wavelength_in
from . import resolution
from .resolution import FWHM_TO_SIGMA

__all__ = [
    "measure",
    "barycentric_correction",
    "shift_to_rest",
    "doppler_factor",
    "velocity_from_factor",
    "galactic_rest_frame_velocity",
    "HIGH_VELOCITY",
    "ESCAPE_SPEED",
]

#: Order of the spline that resamples spectra onto the ln-lambda grid.
_SPLINE_K = 3


# ---------------------------------------------------------------------------
# Input preparation: normalised flux on a ln(lambda_vac) grid with weights
# ---------------------------------------------------------------------------
def _sigma_array(spectrum):
    if spectrum.uncertainty is None:
        return None
    from astropy.nddata import StdDevUncertainty

    return np.asarray(spectrum.uncertainty.represent_as(StdDevUncertainty).array, dtype=float)


def _hot_pixels(f, sig, bad):
    """Pixels above the continuum by 5 sigma and 5% (emission lines, cosmic rays), widened by 3 pixels.

    Emission lines and cosmic rays anti-correlate with an absorption template. The same rule
    is applied to a user template or reference exposure: a feature above the pseudo-continuum
    that both contain (a real continuum peak) must be excluded from both, or the high-pass
    filter sees it in one only and shifts the peak (a K1 I library spectrum against itself
    read 9.4 km/s instead of 0 when only the star was clipped, measured).
    """
    hot = (f > 1.0 + np.maximum(5.0 * np.nan_to_num(sig, nan=np.inf), 0.05)) & ~bad
    if hot.any():
        hot = np.convolve(hot.astype(float), np.ones(7), mode="same") > 0
    return hot


def _noise_from_flux(f, bad):
    """Per-pixel noise of a spectrum without errors: DER_SNR at the continuum, scaled as sqrt(flux)."""
    good_f = f[~bad]
    noise = _dersnr_sigma(good_f) if good_f.size > 10 else np.nan
    # photon noise: sigma proportional to sqrt(flux) (common practice for count-limited data)
    return (noise if noise > 0 else np.nan) * np.sqrt(np.clip(f, 0.05, None))


def _dersnr_sigma(flux):
    """Noise at the continuum by DER_SNR (Stoehr et al. 2008): 1.482602/sqrt(6) median|2f_i - f_(i-2) - f_(i+2)|.

    Only triplets near the continuum (0.9 < f < 1.1) are used when there are enough: sharp
    lines and band heads add to the second differences and would inflate the noise.
    """
    d = np.abs(2.0 * flux[2:-2] - flux[:-4] - flux[4:])
    near = (np.abs(flux[2:-2] - 1) < 0.1) & (np.abs(flux[:-4] - 1) < 0.1) & (np.abs(flux[4:] - 1) < 0.1)
    if near.sum() >= 100:
        d = d[near]
    return 1.482602 / math.sqrt(6.0) * float(np.median(d))


def _normalised(spectrum, notes):
    info = get_info(spectrum)
    if info.normalized:
        return spectrum
    try:
        from .prepare import prepare
    except ImportError as exc:  # pragma: no cover - prepare is part of the package
        raise AnalysisError("spectrum is not continuum-normalised and specan.prepare is unavailable") from exc
    notes.append("spectrum continuum-normalised by specan.prepare.prepare")
    return prepare(spectrum)


class _Data:
    """The observed side: arrays on the ln-lambda grid."""

    def __init__(self, spectrum, *, step=None, telluric=True, clip_emission=True, notes=None):
        notes = notes if notes is not None else []
        info = get_info(spectrum)
        self.info = info
        w = wavelength_in(spectrum, "vacuum")
        f = np.asarray(spectrum.flux.value, dtype=float)
        sig = _sigma_array(spectrum)
        bad = ~np.isfinite(f) | ~np.isfinite(w)
        if spectrum.mask is not None:
            bad |= np.asarray(spectrum.mask, bool)
        if sig is not None:
            bad |= ~np.isfinite(sig) | (sig <= 0)
        order = np.argsort(w)
        w, f, bad = w[order], f[order], bad[order]
        sig = None if sig is None else sig[order]
        if (~bad).sum() < 50:
            raise AnalysisError("fewer than 50 usable pixels: no velocity", info.path)
        if telluric:
            from .prepare import telluric_mask

            bad |= telluric_mask(w, "vacuum")
        if sig is None:
            sig = _noise_from_flux(f, bad)
            self.noise_source = "DER_SNR at the continuum, scaled as sqrt(flux)"
        else:
            self.noise_source = "error array"
        if clip_emission:
            hot = _hot_pixels(f, sig, bad)
            if hot.any():
                notes.append(f"{int(hot.sum())} pixels above the continuum (emission/cosmic rays) excluded")
                bad |= hot
        lnw = np.log(w)
        if step is None:
            dl = np.diff(lnw)
            dl = dl[dl > 0]
            # sample the finest part of the spectrum natively, but not a few stray close pixels
            # (overlapping merged orders) at the cost of a huge grid
            step = max(float(np.percentile(dl, 5)), float(np.median(dl)) / 3.0)
        good = ~bad
        lo, hi = lnw[good][0], lnw[good][-1]
        n = int(math.floor((hi - lo) / step)) + 1
        grid = lo + step * np.arange(n)
        f_fill = np.where(bad, 1.0, f)
        self.spline_x = lnw
        self.grid = grid
        self.step = step
        self.flux = make_interp_spline(lnw, f_fill, k=_SPLINE_K)(grid)
        badg = np.interp(grid, lnw, bad.astype(float)) > 1e-6
        self.sigma = np.interp(grid, lnw, np.where(np.isfinite(sig), sig, np.nanmedian(sig)))
        self.native_flux = f_fill
        self.native_sigma = np.where(bad, 0.0, np.nan_to_num(sig))
        self.valid = ~badg
        # cosine taper over ~ 2% of the range at both ends and 5 pixels at gap edges
        ntap_end = max(5, int(0.02 * n))
        dist = distance_transform_edt(np.pad(self.valid, 1, constant_values=False))[1:-1]
        edge = np.minimum(np.arange(n) + 1, n - np.arange(n))
        taper = np.clip(np.minimum(dist / 5.0, edge / ntap_end), 0.0, 1.0)
        self.taper = np.where(self.valid, 0.5 - 0.5 * np.cos(np.pi * taper), 0.0)
        self.n = n


# ---------------------------------------------------------------------------
# Templates on the extended grid
# ---------------------------------------------------------------------------
class _Template:
    """Template side on the grid ln0 - pad*step ... : arrays T (flux - 1, tapered) and V (coverage)."""

    def __init__(self, name, t_minus_1, cover, rv_kms=0.0, info=None, hp_sigma=None):
        self.name = name
        # unfiltered, zero where not covered (as the data are at masked pixels); the single-star
        # model is built from it like the data
        self.T0 = np.where(cover > 0, t_minus_1, 0.0)
        self.hp_sigma = hp_sigma
        th = _highpass(self.T0, hp_sigma, cover > 0)
        # the coverage taper is a weight: T = V t enters the cross term, V t^2 the template energy,
        # so that a noiseless shifted copy correlates to exactly 1 even where the taper is < 1
        self.T = th * cover
        self.T2 = th * th * cover
        self.V = cover
        self.rv_kms = rv_kms
        self.info = info
        self._fft = {}

    def ffts(self, m):
        if m not in self._fft:
            self._fft[m] = (sfft.rfft(self.T, m), sfft.rfft(self.T2, m), sfft.rfft(self.V, m))
        return self._fft[m]


def _gauss_smooth(x, sigma):
    """Gaussian smoothing along axis 0 with zero boundaries, by FFT.

    Hand-written rather than ``scipy.ndimage.gaussian_filter1d(mode="constant")`` because the
    high-pass sigma is tens of pixels and the noise realisations arrive as an (n, k) block: one
    FFT per column costs the same at any sigma, and the kernel is the exact Gaussian transform
    (no truncation at 4 sigma).
    """
    n = x.shape[0]
    size = sfft.next_fast_len(n + int(math.ceil(8 * sigma)))  # zero padding: no wrap-around
    k = np.arange(size // 2 + 1) / size
    kern = np.exp(-2.0 * (np.pi * sigma * k) ** 2)  # Fourier transform of the Gaussian
    if x.ndim == 2:
        kern = kern[:, None]
    return sfft.irfft(sfft.rfft(x, size, axis=0) * kern, size, axis=0)[:n]


def _highpass(x, sigma, valid):
    """Subtract the local mean: a Gaussian-smoothed copy over the valid pixels only.

    Tonry & Davis' low-frequency cut, done in pixel space so that spectrum and template get the
    same filter before the normalisation sums. The mean is a normalised convolution (smoothed
    values over smoothed coverage), so masked gaps and the ends of the data do not pull it
    towards zero: otherwise lines next to a gap would be filtered differently in a star and in
    its shifted template, a bias growing with the velocity.
    """
    if not sigma:
        return np.where(valid if x.ndim == 1 else valid[:, None], x, 0.0)
    v = valid.astype(float)
    vv = v if x.ndim == 1 else v[:, None]
    num = _gauss_smooth(x * vv, sigma)
    den = _gauss_smooth(v, sigma)
    den = den if x.ndim == 1 else den[:, None]
    low = num / np.maximum(den, 1e-3)
    return (x - low) * vv


def _cover_taper(valid, ntap=8):
    dist = distance_transform_edt(np.pad(valid, 1, constant_values=False))[1:-1]
    return np.where(valid, 0.5 - 0.5 * np.cos(np.pi * np.clip(dist / ntap, 0, 1)), 0.0)


@functools.lru_cache(maxsize=160)  # the 14-type grid and refinements for a few instrument set-ups
def _builtin_template(sptype, lumclass, resolving_power, ln0, step, n, kind="synth", hp_sigma=None):
    """A built-in template (:func:`specan.templates.on_log_grid`) ready for correlation."""
    name, flux, valid = templates.on_log_grid(sptype, lumclass, resolving_power, ln0, step, n, kind=kind)
    return _Template(name, flux - 1.0, _cover_taper(valid), hp_sigma=hp_sigma)


def _spectrum_template(spec, ln0, step, n, target_r, name, notes, rv_kms=0.0, hp_sigma=None, clip=True):
    """A user spectrum (template file, RV standard or reference exposure) on the extended grid.

    With ``clip`` its pixels far above the continuum are excluded by the rule the star's are
    (:func:`_hot_pixels`).
    """
    spec = _normalised(spec, notes)
    tinfo = get_info(spec)
    w = wavelength_in(spec, "vacuum")
    f = np.asarray(spec.flux.value, float)
    bad = ~np.isfinite(f)
    if spec.mask is not None:
        bad |= np.asarray(spec.mask, bool)
    from .prepare import telluric_mask

    bad |= telluric_mask(w, "vacuum")  # tellurics sit at the template's own topocentric wavelengths
    order = np.argsort(w)
    w, f, bad = w[order], f[order], bad[order]
    if clip:
        sig = _sigma_array(spec)
        sig = _noise_from_flux(f, bad) if sig is None else sig[order]
        hot = _hot_pixels(f, sig, bad)
        if hot.any():
            notes.append(f"{int(hot.sum())} template pixels above the continuum excluded, as in the spectrum")
            bad |= hot
    lnw = np.log(w)
    grid = ln0 + step * np.arange(n)
    inside = (grid >= lnw[~bad][0]) & (grid <= lnw[~bad][-1])
    flux = np.ones(n)
    flux[inside] = make_interp_spline(lnw, np.where(bad, 1.0, f), k=_SPLINE_K)(grid[inside])
    badg = np.interp(grid, lnw, bad.astype(float), left=1.0, right=1.0) > 1e-6
    valid = inside & ~badg
    tr = tinfo.resolving_power
    if target_r and tr and tr > target_r * 1.05:
        # degrade the template to the spectrum's resolution (Gaussian, constant in ln lambda)
        ker = math.sqrt((1.0 / target_r) ** 2 - (1.0 / tr) ** 2) * FWHM_TO_SIGMA / step
        flux = 1.0 + gaussian_filter1d(np.where(valid, flux - 1.0, 0.0), ker, mode="constant")
        notes.append(f"template degraded from R={tr:.0f} to R={target_r:.0f}")
    elif not (target_r and tr):
        notes.append("template resolution or spectrum resolution unknown: template used as given")
    if valid.sum() < 50:
        raise AnalysisError(f"template {name} does not overlap the spectrum")
    return _Template(name, flux - 1.0, _cover_taper(valid), rv_kms=rv_kms, info=tinfo, hp_sigma=hp_sigma)


# ---------------------------------------------------------------------------
# The correlation
# ---------------------------------------------------------------------------
class _Correlation:
    """Zero-normalised cross-correlation of data-side arrays with one template, at any lag.

    Lag s (pixels of the grid, positive = spectrum redshifted relative to the template)
    maps to FFT index k = pad - s of C(a, b)[k] = sum_x a(x) b(x + k).
    """

    def __init__(self, data_arrays, template, pad, m, d_ffts=None):
        self.pad = pad
        self.m = m
        a1, a2, a3 = data_arrays
        A1, A2, A3 = d_ffts if d_ffts is not None else (sfft.rfft(a1, m), sfft.rfft(a2, m), sfft.rfft(a3, m))
        BT, BT2, BV = template.ffts(m)
        # cross-spectra: rows = C(a1,T), C(a2,T), C(a2,T2), C(a1,V), C(a3,V), C(a2,V)
        self.X = np.stack([np.conj(A1) * BT, np.conj(A2) * BT, np.conj(A2) * BT2,
                           np.conj(A1) * BV, np.conj(A3) * BV, np.conj(A2) * BV])
        self.freq = np.arange(self.X.shape[1])
        wts = np.full(self.X.shape[1], 2.0)
        wts[0] = 1.0
        if m % 2 == 0:
            wts[-1] = 1.0
        self.Xw = self.X * wts

    @staticmethod
    def combine(c):
        c1t, c2t, c2t2, c1v, c3v, c2v = c
        nw = np.where(c2v > 1e-9, c2v, np.nan)
        num = c1t - c1v * c2t / nw
        e = c2t2 - c2t ** 2 / nw
        d = c3v - c1v ** 2 / nw
        with np.errstate(invalid="ignore", divide="ignore"):
            return num / np.sqrt(np.clip(e, 1e-300, None) * np.clip(d, 1e-300, None)), c2v

    def integer_lags(self, frac=0.0):
        """Normalised CCF at lags s = pad - k + ... for k = 0..m-1, shifted by ``frac`` pixels of s."""
        X = self.X
        if frac:
            X = X * np.exp(-2j * np.pi * self.freq * frac / self.m)
        c = sfft.irfft(X, self.m, axis=1)
        return self.combine(c)

    def at(self, s):
        """Normalised CCF at fractional lags ``s`` (array) by Fourier-series evaluation."""
        s = np.atleast_1d(np.asarray(s, float))
        k = self.pad - s
        ph = np.exp(2j * np.pi * np.outer(self.freq, k) / self.m)  # (nf, ns)
        c = (self.Xw @ ph).real / self.m
        return self.combine(c)[0]


def _data_arrays(d_minus_1, weight):
    mean = np.sum(weight * d_minus_1) / np.sum(weight)
    d = d_minus_1 - mean
    return (weight * d, weight, weight * d * d)


def _peak(corr, pad, smax, min_overlap, total_weight):
    """Integer-lag peak within |s| <= smax: (s_int, height), or None (see :func:`_best_lag`)."""
    ccf, c2v = corr.integer_lags()
    return _best_lag(ccf, c2v, pad, smax, min_overlap, total_weight)


def _best_lag(ccf, c2v, pad, smax, min_overlap, total_weight):
    """(lag, height) of the highest CCF value within |lag| <= smax and enough overlap, or None."""
    k = np.arange(0, 2 * pad + 1)
    s = pad - k
    vals = ccf[k]
    ok = (np.abs(s) <= smax) & (c2v[k] >= min_overlap * total_weight) & np.isfinite(vals)
    if not ok.any():
        return None
    j = np.argmax(np.where(ok, vals, -np.inf))
    return int(s[j]), float(vals[j])


def _quick_peak(d_ffts, template, vrows, pad, m, smax, min_overlap, total_weight):
    """Integer-lag peak height of one template, reusing the coverage rows shared by the synthetic grid."""
    A1, A2, _ = d_ffts
    BT, BT2, _ = template.ffts(m)
    c = sfft.irfft(np.stack([np.conj(A1) * BT, np.conj(A2) * BT, np.conj(A2) * BT2]), m, axis=1)
    ccf, c2v = _Correlation.combine((c[0], c[1], c[2], vrows[0], vrows[1], vrows[2]))
    return _best_lag(ccf, c2v, pad, smax, min_overlap, total_weight)


def _coverage_rows(d_ffts, template, m):
    A1, A2, A3 = d_ffts
    BV = template.ffts(m)[2]
    return sfft.irfft(np.stack([np.conj(A1) * BV, np.conj(A3) * BV, np.conj(A2) * BV]), m, axis=1)


def _refine(corr, s_int):
    """Sub-pixel peak of the Fourier-interpolated CCF: (lag, height, curvature)."""
    x0 = float(s_int)
    for h in (0.8, 0.12):
        offs = np.linspace(-h, h, 9)
        vals = corr.at(x0 + offs)
        coef = np.polynomial.polynomial.polyfit(offs, vals, 4)
        d1 = np.polynomial.polynomial.polyder(coef, 1)
        d2 = np.polynomial.polynomial.polyder(coef, 2)
        x = offs[np.argmax(vals)]
        for _ in range(20):
            g2 = np.polynomial.polynomial.polyval(x, d2)
            x = float(np.clip(x - np.polynomial.polynomial.polyval(x, d1) / (g2 if g2 < 0 else -1e-9), -h, h))
        x0 = x0 + x
    height = float(np.polynomial.polynomial.polyval(x, coef))
    curv = float(np.polynomial.polynomial.polyval(x, d2))
    return x0, height, curv


def _ccf_about(corr, s0, half):
    """Normalised CCF at s0 + j for integer j in [-half, half] (exact fractional centring)."""
    frac = s0 - math.floor(s0)
    ccf, c2v = corr.integer_lags(frac=frac)
    base = math.floor(s0)
    j = np.arange(-half, half + 1)
    k = (corr.pad - (base + j)) % corr.m  # lag s = base + frac + j  <->  index pad - base - j after shift
    return j, ccf[k], c2v[k]


def _fwhm_pixels(j, vals, h):
    half = h / 2.0
    mid = np.flatnonzero(j == 0)[0]
    right = mid
    while right + 1 < len(vals) and vals[right + 1] > half:
        right += 1
    left = mid
    while left - 1 >= 0 and vals[left - 1] > half:
        left -= 1
    if right + 1 >= len(vals) or left - 1 < 0:
        return float("nan")
    xr = j[right] + (vals[right] - half) / (vals[right] - vals[right + 1])
    xl = j[left] - (vals[left] - half) / (vals[left] - vals[left - 1])
    return float(xr - xl)


# ---------------------------------------------------------------------------
# Public measurement
# ---------------------------------------------------------------------------
def _parse_template(template):
    """('auto'|'synth'|'mask'|'spectrum', sptype, lumclass, object)."""
    from specutils import Spectrum

    if template is None or (isinstance(template, str) and template.strip().lower() in ("", "auto")):
        return "auto", None, None, None
    if isinstance(template, Spectrum):
        return "spectrum", None, None, template
    if isinstance(template, Path) or (isinstance(template, str) and Path(template).is_file()):
        return "file", None, None, Path(template)
    text = str(template).strip()
    kind = "synth"
    low = text.lower()
    if low.startswith("mask"):
        kind, text = "mask", text[4:].lstrip(":").strip()
    elif low.startswith("synth"):
        text = text[5:].lstrip(":").strip()
    if not text:
        return kind, None, None, None
    try:
        parse_mk(text)
    except ValueError:
        raise SpecanError(f"template {template!r} is neither a file nor an MK type (use e.g. 'G2 V', "
                          "'mask:K0 III', 'auto' or a path)") from None
    parts = text.split()
    return kind, parts[0], (parts[1] if len(parts) > 1 else "V"), None


def _resolving_power(data):
    """(R, known): the stated resolving power, or a first guess from the sampling (2.5 pixels/FWHM)."""
    if data.info.resolving_power:
        return float(data.info.resolving_power), True
    med = float(np.median(np.diff(data.spline_x)))
    return 1.0 / (2.5 * med), False


# Multipliers of the first guess tried when the resolving power is unknown (sampling of 1.7-5
# pixels per FWHM, the range of real spectrographs; common practice).
_R_SCAN = (0.5, 0.6, 0.7, 0.85, 1.0, 1.2, 1.45)


def measure(spectrum, template=None, *, reference=None, template_rv=0 * u.km / u.s, vmax=2000 * u.km / u.s,
            errors="both", n_resample=40, seed=0, telluric=True, clip_emission=True, barycentric=True,
            high_velocity=HIGH_VELOCITY, escape_speed=ESCAPE_SPEED, min_overlap=0.3,
            composite_min_ratio=0.25, composite_min_sigma=6.0, template_grid=None, highpass=8.0):
    """Radial velocity of one spectrum by FFT cross-correlation.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum; normalised with :func:`specan.prepare.prepare` if not yet.
    template : None, str, path or specutils.Spectrum
        ``None``/``"auto"``: the built-in synthetic grid (O-M, at the spectrum's
        resolution and in its medium), best normalised correlation wins;
        ``"G2 V"`` (or ``"synth:G2 V"``): one synthetic type; ``"mask"`` /
        ``"mask:K0 III"``: a weighted line mask from the line list (of the best
        synthetic type if none given); a file path or a Spectrum: a user template
        (e.g. an RV standard; its velocity is ``template_rv``).
    reference : specutils.Spectrum or path, optional
        A reference exposure of the same star: the result is the velocity relative
        to it (flag ``relative``), barycentric if both exposures have the metadata.
    template_rv : astropy.units.Quantity
        Barycentric velocity of a user template (0: at rest).
    vmax : astropy.units.Quantity
        Velocity search range +-vmax.
    errors : {"both", "td", "mc"}
        Which error estimates to compute.
    n_resample : int
        Noise realisations for the empirical error.
    seed : int
        Seed of those realisations.
    telluric, clip_emission : bool
        Mask telluric bands / exclude pixels well above the continuum.
    barycentric : bool
        Compute the barycentric correction when the metadata allow.
    high_velocity, escape_speed : astropy.units.Quantity
        Thresholds on |v_GRF| of the ``high_velocity`` and ``unbound_candidate`` flags.
    min_overlap : float
        Smallest fraction of the spectrum's weight a lag may use.
    composite_min_ratio, composite_min_sigma : float
        A second peak (after removing the expected single-star shape) is significant when
        above this fraction of the main peak and this many CCF noise sigmas.
    template_grid : sequence of (sptype, lumclass), optional
        Types tried by the automatic choice (default ``synth.TEMPLATE_TYPES``).
    highpass : float or None
        Low-frequency cut: a Gaussian of this sigma, in resolution elements, is smoothed out
        of spectrum and template (continuum residuals, band and wing shapes); None disables.

    Returns
    -------
    dict
        ``rv``, ``rv_err``, ``frame`` ("barycentric" | "topocentric"), ``rv_topo``,
        ``bary_corr``, ``v_grf`` (Quantities in km/s or None), ``template`` (name),
        ``ccf_height``, ``flags`` (list of str), ``second_peak_rv``, ``rv_err_td``,
        ``rv_err_mc``, ``notes`` (list of str), plus ``template_scores`` (name -> peak
        height of the automatic choice), ``ccf_fwhm``, ``r_td``, ``z_bary`` and the
        normalised CCF about the peak, ``ccf`` against topocentric ``ccf_velocity``.
    """
    if errors not in ("both", "td", "mc"):
        raise ValueError(f"errors must be 'both', 'td' or 'mc', not {errors!r}")
    notes = []
    flags = []
    spectrum = _normalised(spectrum, notes)
    data = _Data(spectrum, telluric=telluric, clip_emission=clip_emission, notes=notes)
    info = data.info
    step, n = data.step, data.n
    vmax_kms = u.Quantity(vmax, u.km / u.s).value
    smax = int(math.ceil(math.log(float(doppler_factor(vmax_kms * u.km / u.s))) / step))
    ntap = 8
    res_r, r_known = _resolving_power(data)
    r_source = "file" if r_known else "template-width scan"
    if not r_known:
        # The widths of the narrowest lines tell R better than the template-width scan below,
        # which prefers broad templates on real spectra (Kurucz Sun at R = 2000: 1360 by the
        # scan, 1847 by the lines; velocity scatter 1.9 against 1.1 km/s at S/N 100, measured).
        r_est = resolution.estimate_resolving_power(spectrum)
        if r_est is not None:
            res_r, r_known, r_source = float(r_est), True, "narrowest lines"
            notes.append(f"resolving power unknown: R ~ {res_r:.0f} estimated from the narrowest lines "
                         "(use --resolving-power to set it)")
    r_key = float(f"{res_r:.3g}")
    fwhm_grid = 1.0 / (res_r * step)  # resolution element in grid pixels
    hp = float(highpass) * fwhm_grid if highpass else None
    # lags examined for the error and second-peak statistics: the search range, and several
    # high-pass lengths so that the CCF noise decorrelates within the window
    half = int(max(smax, 40, math.ceil(6 * (hp or 0))))
    pad = half + ntap + 4
    ln0 = data.grid[0] - pad * step
    next_ = n + 2 * pad
    m = sfft.next_fast_len(2 * n + 2 * pad)

    # data side: weights = taper x inverse variance (normalised), zero on masked pixels
    w_noise = 1.0 / np.clip(data.sigma, 1e-12, None) ** 2
    w_noise /= np.median(w_noise[data.valid])
    weight = data.taper * w_noise
    arrays = _data_arrays(_highpass(data.flux - 1.0, hp, data.valid), weight)
    d_ffts = tuple(sfft.rfft(a, m) for a in arrays)
    total_w = float(np.sum(weight))

    kind, sptype, lumclass, obj = _parse_template(template)
    scores = {}
    relative = reference is not None
    if relative:
        from . import read as _read

        ref = reference if not isinstance(reference, (str, Path)) else _read(reference)
        rname = get_info(ref).object or get_info(ref).path or "reference exposure"
        chosen = _spectrum_template(ref, ln0, step, next_, res_r if r_known else None, f"reference {rname}", notes,
                                    hp_sigma=hp, clip=clip_emission)
        flags.append("relative")
    elif kind in ("spectrum", "file"):
        from . import read as _read

        tspec = obj if kind == "spectrum" else _read(obj)
        tname = get_info(tspec).object or (str(obj) if kind == "file" else "user template")
        chosen = _spectrum_template(tspec, ln0, step, next_, res_r if r_known else None, f"user {tname}", notes,
                                    rv_kms=u.Quantity(template_rv, u.km / u.s).value, hp_sigma=hp,
                                    clip=clip_emission)
    else:
        if sptype is None:
            grid_types = tuple(template_grid or templates.automatic_types())
            best = None
            vrows = None
            for st, lc in grid_types:
                t = _builtin_template(st, lc, r_key, round(ln0, 12), step, next_, hp_sigma=hp)
                if vrows is None:  # every synthetic template has the same coverage
                    vrows = _coverage_rows(d_ffts, t, m)
                pk = _quick_peak(d_ffts, t, vrows, pad, m, smax, min_overlap, total_w)
                if pk is None:
                    continue
                scores[t.name] = pk[1]
                if best is None or pk[1] > best[0]:
                    best = (pk[1], st, lc)
            if best is None:
                raise AnalysisError("no template correlates with the spectrum", info.path)
            # refine around the best grid type: neighbouring subtypes and the other luminosity classes
            code0 = sptype_to_code(best[1])
            near = {(code_to_sptype(min(max(code0 + dc, 0.0), 69.0), 1), best[2]) for dc in (-3, -1.5, 1.5, 3)}
            near |= {(best[1], lc) for lc in ("V", "III", "I") if lc != best[2]}
            for st, lc in sorted(near - set(grid_types)):
                t = _builtin_template(st, lc, r_key, round(ln0, 12), step, next_, hp_sigma=hp)
                pk = _quick_peak(d_ffts, t, vrows, pad, m, smax, min_overlap, total_w)
                if pk is not None:
                    scores[t.name] = pk[1]
                    if pk[1] > best[0]:
                        best = (pk[1], st, lc)
            sptype, lumclass = best[1], best[2]
            notes.append(f"template chosen automatically: best normalised correlation of {len(scores)} "
                         f"synthetic types ({sptype} {lumclass}, {best[0]:.3f})")
        tkind = "synth" if kind in ("synth", "auto") else "mask"
        chosen = _builtin_template(sptype, lumclass, r_key, round(ln0, 12), step, next_, kind=tkind, hp_sigma=hp)
        if not r_known:
            # resolving power unknown: the template width that correlates best
            best = None
            tried = [float(f"{res_r * fac:.3g}") for fac in _R_SCAN]
            for rr in tried:
                t = _builtin_template(sptype, lumclass, rr, round(ln0, 12), step, next_, kind=tkind, hp_sigma=hp)
                pk = _quick_peak(d_ffts, t, _coverage_rows(d_ffts, t, m), pad, m, smax, min_overlap, total_w)
                if pk is not None and (best is None or pk[1] > best[0]):
                    best = (pk[1], rr, t)
            if best is not None:
                res_r, chosen = best[1], best[2]
            if res_r in (tried[0], tried[-1]):
                r_source = "template-width scan (a bound)"
                # at the end of the scan the estimate is a bound, not a value (the JHC (1984)
                # spectra, R ~ 1100 at 5000 A, all stop at the low end: measured)
                notes.append(f"resolving power unknown: the template width that correlates best is the "
                             f"{'broadest' if res_r == tried[0] else 'sharpest'} tried (R {res_r:.0f}; "
                             f"range {tried[0]:.0f}-{tried[-1]:.0f}), so R may lie beyond it "
                             "(use --resolving-power to set it)")
            else:
                notes.append(f"resolving power unknown: R ~ {res_r:.0f} from the template width that "
                             "correlates best (use --resolving-power to set it)")

    corr = _Correlation(arrays, chosen, pad, m, d_ffts)
    pk = _peak(corr, pad, smax, min_overlap, total_w)
    if pk is None or not np.isfinite(pk[1]) or pk[1] <= 0:
        raise AnalysisError(f"no correlation peak with template {chosen.name}", info.path)
    s0, h, curv = _refine(corr, pk[0])

    # CCF about the peak, and the single-star shape (the template seen through the same window)
    j, vals, _ = _ccf_about(corr, s0, half)
    model = _single_star_ccf(chosen, data.valid, weight, pad, m, s0, half)
    resid = vals - h * model if model is not None else vals
    fwhm_px = _fwhm_pixels(j, vals, h)
    # Tonry & Davis: r = h / (sqrt2 sigma_a), sigma_a the rms antisymmetric part of the CCF. The
    # template's own correlation shape is removed first (window edges and broad features make it
    # asymmetric, which is not noise), and the peak width w is the Gaussian-equivalent FWHM of
    # the peak curvature, 2.3548 sqrt(h/|c''|): broad bands and Balmer wings widen the CCF but do
    # not set the precision, the sharp lines do.
    # For noise alone the antisymmetric part has variance sigma_n^2 (1 - rho(2j)) / 2, biased low
    # where CCF noise is correlated over many lags (broad template features); the residual
    # itself has variance sigma_n^2 at every lag, so sigma_a = rms(residual) / sqrt2.
    w_curv = 2.3548 * math.sqrt(h / abs(curv)) if curv < 0 else fwhm_px
    core = np.abs(j) <= max(2.0, w_curv if curv < 0 else 2.0)
    sig_a = float(np.sqrt(np.nanmean(resid[~core] ** 2)) / math.sqrt(2.0))
    r_td = h / (math.sqrt(2.0) * sig_a) if sig_a > 0 else float("inf")
    # Tonry & Davis write sigma = (3/8) w / (1 + r), the constant calibrated for their CCF and filter.
    # For this normalised CCF the small-noise limit is exact: the peak moves by
    # n'(s0)/|c''|, with var n' = sigma_n^2 |c''| / h for a matched template, so
    # sigma = sqrt(h/|c''|) / r = w / (2.3548 r). Injections confirm it (tests/test_velocity.py);
    # the published 3/8 and 1 + r underestimate our errors by ~25%.
    err_td_px = w_curv / (2.3548 * r_td)

    def vel(s):
        return _kms(math.exp(s * step))

    dvds = (vel(s0 + 0.5) - vel(s0 - 0.5))
    rv_err_td = abs(err_td_px * dvds) if errors in ("both", "td") and np.isfinite(err_td_px) else None

    # empirical error: add noise like the spectrum's own and re-measure (vectorised)
    rv_err_mc = None
    if errors in ("both", "mc") and n_resample and n_resample >= 5:
        rv_err_mc = abs(_resample_error(data, weight, chosen, pad, m, s0, err_td_px, n_resample, seed, hp) * dvds)
        notes.append(f"empirical error from {n_resample} noise realisations ({data.noise_source})")

    # second peak: residual after removing the single-star CCF shape
    second = _second_peak(resid, model, j, s0, h, sig_a, smax, composite_min_ratio, composite_min_sigma)
    if second is not None:
        fit = _two_component_fit(vals, model, j, s0, h, *second) if model is not None else None
        if fit is not None:
            s1, s2, h1, h2 = fit
            if h2 > h1:  # the primary is the stronger correlation
                s1, s2 = s2, s1
            s0, second = s1, s2
            notes.append("composite: both velocities from a two-component fit of the CCF (single-star shape "
                         "of the template); rv_err is that of the blended peak")
        else:
            second = second[0]
    second_rv = None

    # velocities: shift -> topocentric (template's own velocity composed) -> barycentric
    z_s = math.exp(s0 * step)
    tmpl_factor = 1.0
    if chosen.rv_kms and not relative:
        tmpl_factor = float(doppler_factor(chosen.rv_kms * u.km / u.s))
        tinfo = chosen.info
        if tinfo is not None and not missing_for_barycentric(tinfo):
            tmpl_factor /= 1.0 + barycentric_correction(tinfo).value / C_KMS
        else:
            notes.append("template velocity taken as topocentric (template lacks time/site/pointing)")
    f_topo = z_s * tmpl_factor
    rv_topo = _kms(f_topo)
    if second is not None:
        flags.append("composite")

    bary = None
    missing = missing_for_barycentric(info)
    if barycentric and not missing:
        bary = barycentric_correction(info).value
        if relative:
            rinfo = chosen.info
            if rinfo is not None and not missing_for_barycentric(rinfo):
                f_b = f_topo * (1.0 + bary / C_KMS) / (1.0 + barycentric_correction(rinfo).value / C_KMS)
            else:
                f_b = None
                notes.append("reference exposure lacks time/site/pointing: relative velocity is topocentric")
        else:
            f_b = f_topo * (1.0 + bary / C_KMS)
        notes.append(IERS_NOTE)
    else:
        f_b = None
        if barycentric:
            notes.append("topocentric velocity only: missing " + "; ".join(missing))
    frame = "barycentric" if f_b is not None else "topocentric"
    if f_b is None:
        flags.append("no_barycentric")
    rv = _kms(f_b) if f_b is not None else rv_topo
    if second is not None:  # in the same frame as rv
        second_rv = _kms(math.exp(second * step) * tmpl_factor * (f_b / f_topo if f_b else 1.0)) * u.km / u.s

    v_grf = None
    if not relative and info.ra_deg is not None and info.dec_deg is not None:
        v_grf = galactic_rest_frame_velocity(rv * u.km / u.s, info.coord).value
        notes.append(galactic_frame_note())
        if f_b is None:
            notes.append("v_grf from the topocentric velocity: uncertain by up to 30 km/s (Earth's orbit)")
        notes.append("v_grf is the line-of-sight component only: a lower bound on the star's Galactic speed")
        hv = u.Quantity(high_velocity, u.km / u.s).value
        vesc = u.Quantity(escape_speed, u.km / u.s).value
        if abs(v_grf) > hv:
            flags.append("high_velocity")
        if abs(v_grf) > vesc:
            flags.append("unbound_candidate")
            notes.append(f"|v_grf| exceeds the local escape speed {vesc:.0f} km/s (Piffl et al. 2014)")
    elif not relative:
        notes.append("no Galactic rest-frame velocity: pointing unknown (header RA/DEC or --ra/--dec)")
    if abs(rv_topo) > 0.95 * vmax_kms:
        flags.append("at_search_limit")
        notes.append(f"peak at the edge of the +-{vmax_kms:.0f} km/s search range: increase vmax")
    if h < 0.2:  # our own threshold on the normalised peak height, not a published value
        flags.append("weak_correlation")
    notes.append("velocities are relativistic Doppler velocities; 1+z composed multiplicatively")

    # Reported error: the larger of the two. With a matched template they agree (injections); with a
    # mismatched one the residual CCF (hence the TD estimate) also carries the mismatch, which noise
    # resampling cannot see.
    candidates = [e for e in (rv_err_mc, rv_err_td) if e is not None and np.isfinite(e)]
    rv_err = max(candidates) if candidates else None
    if rv_err_mc is not None and rv_err_td is not None and rv_err_td > 2 * rv_err_mc:
        notes.append("Tonry-Davis error well above the noise-resampling one: template mismatch dominates")
    kms = u.km / u.s
    return {
        "rv": rv * kms,
        "rv_err": None if rv_err is None else rv_err * kms,
        "frame": frame,
        "rv_topo": rv_topo * kms,
        "bary_corr": None if bary is None else bary * kms,
        "v_grf": None if v_grf is None else v_grf * kms,
        "template": chosen.name,
        "ccf_height": h,
        "flags": flags,
        "second_peak_rv": second_rv,
        "rv_err_td": None if rv_err_td is None else rv_err_td * kms,
        "rv_err_mc": None if rv_err_mc is None else rv_err_mc * kms,
        "notes": notes,
        "template_scores": scores,
        "ccf_fwhm": fwhm_px * abs(dvds) * kms if np.isfinite(fwhm_px) else None,
        "r_td": r_td,
        "resolving_power": res_r,
        "resolving_power_source": r_source,
        "z_bary": None if f_b is None else f_b - 1.0,
        "ccf_velocity": velocity_from_factor(np.exp((s0 + j) * step) * tmpl_factor),
        "ccf": vals,
    }


def _resample_error(data, weight, template, pad, m, s0, err_px, k, seed, hp):
    """Scatter (pixels) of the peak over ``k`` noise realisations added to the spectrum."""
    rng = np.random.default_rng(seed)
    noise = rng.normal(size=(data.native_flux.size, k)) * data.native_sigma[:, None]
    # the same cubic interpolation the data went through, applied to each realisation
    f = make_interp_spline(data.spline_x, data.native_flux[:, None] + noise, k=_SPLINE_K, axis=0)(data.grid)  # (n, k)
    d = np.ascontiguousarray(_highpass(f - 1.0, hp, data.valid).T)  # (k, n): rows are realisations
    d -= (d @ weight)[:, None] / weight.sum()
    a1 = d * weight
    a3 = a1 * d
    A1 = sfft.rfft(a1, m, axis=1)  # (k, nf), C-contiguous
    A3 = sfft.rfft(a3, m, axis=1)
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

    def ev(A, B, kmax=nf):
        # sum_f Re(conj(A_f) B_f ph_f) for every row of A, as one real matrix product on the
        # interleaved (re, im) view: Re(conj(a) p) = a.re p.re + a.im p.im
        p = B[:kmax, None] * ph[:kmax]
        pint = np.empty((2 * kmax, p.shape[1]))
        pint[0::2], pint[1::2] = p.real, p.imag
        a = np.ascontiguousarray(np.atleast_2d(A)[:, :kmax]).view(np.float64)
        return (a @ pint) / m

    c1t = ev(A1, BT)  # (k, 5)
    c1v = ev(A1, BV, kv)
    c3v = ev(A3, BV, kv)
    c2t = ev(A2, BT)
    c2t2 = ev(A2, BT2)
    c2v = ev(A2, BV)
    ccf, _ = _Correlation.combine((c1t, c2t, c2t2, c1v, c3v, c2v))
    # cubic through the stencil of each realisation; its maximum near the centre (Newton)
    coef = np.polynomial.polynomial.polyfit(offs, ccf.T, 3)  # (4, k)
    d1 = np.polynomial.polynomial.polyder(coef, 1)
    d2 = np.polynomial.polynomial.polyder(coef, 2)
    x = np.zeros(ccf.shape[0])
    for _ in range(6):
        g1 = np.polynomial.polynomial.polyval(x, d1, tensor=False)
        g2 = np.polynomial.polynomial.polyval(x, d2, tensor=False)
        x = np.clip(x - g1 / np.where(g2 < 0, g2, -1e-9), -2 * h, 2 * h)
    return float(np.std(x, ddof=1))


def _single_star_ccf(template, valid, weight, pad, m, s0, half):
    """CCF a noiseless star identical to the template, shifted by s0, would give (1 at the peak).

    The model star goes through the same steps as the data (window, masks, high-pass, weights),
    so edge and gap effects of those steps are in the model, not mistaken for noise.
    """
    n = valid.size
    phase = np.exp(-2j * np.pi * np.arange(m // 2 + 1) * (s0 - pad) / m)
    model = sfft.irfft(sfft.rfft(template.T0, m) * phase, m)[:n]  # template(x - s0) on the data window
    # where the template has gaps (its own tellurics, its ends) the model star is unknown: leave
    # those pixels out rather than treat them as continuum
    known = sfft.irfft(sfft.rfft((template.V > 0).astype(float), m) * phase, m)[:n] > 0.5
    ok = valid & known
    model = _highpass(model, template.hp_sigma, ok)
    mcorr = _Correlation(_data_arrays(model, weight * ok), template, pad, m)
    _, mvals, _ = _ccf_about(mcorr, s0, half)
    if not np.isfinite(mvals[half]) or mvals[half] <= 0:
        return None
    return mvals / mvals[half]


def _second_peak(resid, model, j, s0, h, sig_a, smax, min_ratio, min_sigma):
    """Lag of a significant second peak in the residual CCF, or None.

    Only the core of the single-star shape (its half width at half maximum) is excluded, so a
    companion blended into the wing of the main peak still shows in the residual.
    """
    lag = s0 + j
    hw = 0.5 * _fwhm_pixels(j, model, 1.0) if model is not None else float("nan")
    excl = np.abs(j) <= max(hw if np.isfinite(hw) else 2.0, 2.0)
    ok = ~excl & (np.abs(lag) <= smax) & np.isfinite(resid)
    if not ok.any():
        return None
    i = np.argmax(np.where(ok, resid, -np.inf))
    thr = max(min_ratio * h, min_sigma * math.sqrt(2.0) * sig_a)
    if resid[i] < thr or i == 0 or i == len(resid) - 1:
        return None
    y0, y1, y2 = resid[i - 1], resid[i], resid[i + 1]
    den = y0 - 2 * y1 + y2
    d = 0.5 * (y0 - y2) / den if den < 0 else 0.0
    return float(lag[i] + d), float(resid[i])


def _two_component_fit(vals, model, j, s0, h, s2, h2):
    """Deblend a composite CCF: vals ~ h1 M(j - d1) + h2 M(j - d2), M the single-star shape.

    Returns (s1, s2, h1, h2) or None when the fit fails.
    """
    from scipy.optimize import least_squares

    shape = make_interp_spline(j.astype(float), model, k=3)
    d2 = s2 - s0
    win = np.abs(j) <= abs(d2) + 2.0 * max(2.0, _fwhm_pixels(j, model, 1.0))
    jj, yy = j[win].astype(float), vals[win]
    lo, hi = jj[0] + 1, jj[-1] - 1

    def resid(p):
        h1, a1, hb, a2 = p
        return h1 * shape(np.clip(jj - a1, j[0], j[-1])) + hb * shape(np.clip(jj - a2, j[0], j[-1])) - yy

    try:
        fit = least_squares(resid, [h, 0.0, h2, d2], bounds=([0, lo, 0, lo], [2, hi, 2, hi]))
    except ValueError:
        return None
    if not fit.success:
        return None
    h1, a1, hb, a2 = fit.x
    return s0 + a1, s0 + a2, h1, hb
