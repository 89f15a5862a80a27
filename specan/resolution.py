"""Resolution: how sharp a spectrum is, how to estimate it, and how to make it blunter.

Shared by the stages that need a resolving power the file does not state (lines,
velocity, classify) and by those that match one resolution to another (templates,
calibration standards). ``R = lambda / FWHM`` throughout; instrumental profiles are
Gaussian (common practice at R ~ 1,000-20,000), so widths add in quadrature.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.signal import find_peaks

from .doppler import C_KMS, doppler_factor
from .errors import AnalysisError
from .obsinfo import META_KEY, get_info, replace_parts, spectrum_arrays, wavelength_in

__all__ = [
    "on_rest_grid",
    "rest_pixels",
    "RestPixels",
    "GAUSS_FWHM",
    "FWHM_TO_SIGMA",
    "DEFAULT_PIXELS_PER_FWHM",
    "NormalisedArrays",
    "normalised_arrays",
    "narrowest_line_width",
    "grid_medians",
    "parabola_normal_equations",
    "dersnr_sigma",
    "caruana_fwhms",
    "estimate_resolving_power",
    "degrade",
    "smooth_to_fwhm",
]

#: FWHM / sigma of a Gaussian, 2 sqrt(2 ln 2) = 2.3548 (common practice).
GAUSS_FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: sigma / FWHM of a Gaussian.
FWHM_TO_SIGMA = 1.0 / GAUSS_FWHM
#: Pixels per resolution element assumed when neither the caller nor the file gives R and the
#: spectrum has too few clean lines to measure it (common practice: ~2-3 pixels per FWHM).
DEFAULT_PIXELS_PER_FWHM = 2.5


class NormalisedArrays(NamedTuple):
    """Plain arrays of a continuum-normalised spectrum, ready for line work."""

    wave: np.ndarray      #: Angstrom, in the spectrum's medium
    flux: np.ndarray      #: masked pixels interpolated from their neighbours
    sigma: np.ndarray     #: per-pixel noise (error array, else from the flux), never below 1e-5
    good: np.ndarray      #: True where the pixel is usable
    noise_source: str     #: "error array" or how the flux-based noise was measured


def _dersnr_noise(wave, flux, good):
    """Noise per pixel of the normalised flux by DER_SNR (Stoehr et al. 2008).

    The arithmetic of specutils' ``snr_derived`` on the good pixels, to the bit, on plain
    arrays: packing them into a ``Spectrum`` for it cost ~2 ms a spectrum (its WCS), a tenth
    of the lines stage (benchmarks/bench_lines.py).
    """
    f = flux[good]
    n = f.size
    if n <= 4:
        return 1e-5
    signal = np.median(f)
    # 0.6052697 = 1.482602 / sqrt(6) (Stoehr et al. 2008)
    noise = 0.6052697 * np.median(np.abs(2.0 * f[2:n - 2] - f[0:n - 4] - f[4:n]))
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = float(signal / noise)
    med = float(signal)
    if not np.isfinite(snr) or snr <= 0:
        return 1e-5
    return max(med / snr, 1e-5)


def dersnr_sigma(flux, good):
    """The per-pixel noise ``normalised_arrays(..., dersnr=True)`` gives, from its own ``flux`` and ``good``.

    For a caller that has the arrays already (no error array): one DER_SNR value for every
    good pixel, infinite on the others.
    """
    return np.where(good, max(_dersnr_noise(None, flux, good), 1e-5), np.inf)


def _telluric_noise_pixels(spectrum, flux, mask):
    """The masked pixels inside the telluric bands that hold usable flux: noise like any other pixel.

    ``prepare`` masks the bands for the lines, not for a defect; left out of the plateau test of
    :func:`specan.noise.flux_noise` (its ``noise_only``) they leave a spectrum reaching past 6800 A
    mostly its blue, line-rich pixels, whose lines tip the test (H beta of the Kurucz Sun at S/N 300
    without an error array read 1.75 A instead of 4.2, measured). Pixels masked for a defect stay out:
    non-finite or non-positive flux (``prepare``'s defects) or no continuum there.
    """
    if not mask.any():
        return np.zeros(mask.shape, bool)
    from .linelist import in_bands, masked_telluric_bands

    # the bands' edges are air wavelengths, as prepare reads them
    usable = in_bands(wavelength_in(spectrum, "air"), masked_telluric_bands()) & mask & np.isfinite(flux) & (flux > 0)
    cont = spectrum.meta.get("continuum") if spectrum.meta else None
    if cont is not None and np.shape(cont) == flux.shape:
        c = np.asarray(getattr(cont, "value", cont), float)
        usable &= np.isfinite(c) & (c > 0)
    return usable


def normalised_arrays(spectrum, min_good=10, resolving_power=None, dersnr=False):
    """Wavelength, flux, noise and good-pixel mask of a normalised spectrum as plain arrays.

    Masked pixels get the flux interpolated from their neighbours (so integrals and filters
    are defined) and are marked in ``good``; without an error array the noise is
    :func:`specan.noise.flux_noise` of the normalised flux (the noise plateau near Nyquist
    with the lines' leak removed, block by block along the spectrum), at
    ``resolving_power`` (default ``info.resolving_power``, else 2.5 pixels per FWHM).
    ``dersnr=True`` gives instead one DER_SNR value (Stoehr et al. 2008) for every pixel:
    the narrowest-line search of :func:`estimate_resolving_power` had its thresholds set with
    it, and the stages that estimate R (classification, velocity) keep it.

    Raises
    ------
    specan.errors.AnalysisError
        With fewer than ``min_good`` usable pixels.
    """
    info = get_info(spectrum)
    wave, flux, sigma, mask = spectrum_arrays(spectrum)
    wave = np.asarray(wave, float)
    bad = ~np.isfinite(flux) | mask
    if sigma is not None:
        bad |= ~np.isfinite(sigma) | (sigma <= 0)
    good = ~bad
    if good.sum() < min_good:
        raise AnalysisError(f"fewer than {min_good} usable pixels: no lines can be measured", info.path)
    idx = np.flatnonzero(good)
    measured = flux
    flux = np.where(bad, np.interp(wave, wave[idx], flux[idx]), flux)
    if sigma is None and dersnr:
        sigma = np.full(flux.shape, _dersnr_noise(wave, flux, good))
        source = "DER_SNR"
    elif sigma is None:
        from .noise import correlated_pixels, kept_flux_noise, pixels_per_fwhm

        # whether the pixels are correlated: as prepare found on the flux before normalisation
        # (info.snr_flux_method), so that the S/N and the lines' errors rest on one decision
        # the telluric pixels with their measured flux (not the interpolation the lines get)
        telluric = _telluric_noise_pixels(spectrum, measured, mask)
        # (kept: the velocity stage has made the same estimate of these pixels, specan.noise.kept_flux_noise)
        est = kept_flux_noise(np.where(telluric, measured, flux), good,
                         pixels_per_fwhm(wave, resolving_power or info.resolving_power),
                         correlated=correlated_pixels(info.snr_flux_method), noise_only=telluric)
        # no noise found (a noiseless model): the floor below stands in
        sigma = np.where(np.isfinite(est.sigma), est.sigma, 1e-5)
        source = est.method
    else:
        source = "error array"
    # floor: noiseless models would give infinite weights
    sigma = np.where(bad, np.inf, np.maximum(sigma, 1e-5))
    return NormalisedArrays(wave, flux, sigma, good, source)


def narrowest_line_width(wave, flux, sigma, good, medians=None):
    """FWHM / lambda of the narrowest clean lines of a normalised spectrum, or None.

    Log-parabola (Caruana) fits below the local crest level to up to 40 isolated features of
    middling significance found with a 1-pixel matched filter (the strongest
    tenth are left out: saturated and pressure-broadened lines); the 10th
    percentile of their FWHM / lambda (10th: at low resolution most features are
    blends; measured on the Kurucz solar model). Lines are never narrower than the
    instrument, so this is the instrument's width where lines are
    unresolved, and the stars' own broadening (rotation) where they are not.

    ``medians``: ``(median pixel step, median wavelength)`` of the grid (:func:`grid_medians`) where
    the caller keeps them per grid; made here otherwise.
    """
    dx, mid = grid_medians(wave) if medians is None else medians
    d = np.where(good, 1.0 - flux, 0.0)
    w = np.where(good, 1.0 / sigma**2, 0.0)
    s = 1.0
    num = gaussian_filter1d(w * d, s, mode="nearest")
    den = gaussian_filter1d(w, s / np.sqrt(2.0), mode="nearest")
    sig = num / np.sqrt(np.maximum(den, 1e-300))
    peaks, _ = find_peaks(sig, height=max(5.0, float(np.nanpercentile(sig, 50))), distance=3)
    # isolated peaks only (no other peak within 5 pixels), and not the strongest tenth:
    # those are the broad (saturated, pressure-broadened) lines
    if peaks.size > 2:
        gap = np.diff(peaks)
        iso = np.ones(peaks.size, bool)
        iso[1:] &= gap >= 5
        iso[:-1] &= gap >= 5
        peaks = peaks[iso]
    if peaks.size < 5:
        return None
    order = np.argsort(sig[peaks])[::-1]
    peaks = peaks[order[peaks.size // 10:][:40]]
    fwhms = caruana_fwhms(wave, flux, peaks, step=dx)
    fwhms = fwhms[np.isfinite(fwhms)]
    if fwhms.size < 5:
        return None
    return float(max(np.percentile(fwhms, 10), 1.5 * dx / mid))


def grid_medians(wave):
    """``(median pixel step, median wavelength)`` of a grid, as :func:`narrowest_line_width` uses them."""
    return float(np.median(np.diff(wave))), float(np.median(wave))


def _caruana_fwhm(wave, flux, p):
    """FWHM / lambda of the feature at pixel ``p`` from a parabola through log depth, or None."""
    lo, hi = max(p - 5, 0), min(p + 6, wave.size)
    if hi - lo < 7:
        return None
    # depth below the local upper level (crowded spectra sit below the continuum)
    j = p - lo
    seg = flux[lo:hi]
    depth = min(seg[:j + 1].max(), seg[j:].max()) - seg
    if depth[j] <= 0:
        return None
    # core points above half depth, at least the three around the minimum
    core = np.flatnonzero(depth >= 0.5 * depth[j])
    core = core[np.abs(core - j) <= max(1, np.abs(core - j).min() + 3)]
    if core.size < 3:
        core = np.arange(j - 1, j + 2)
    dd = depth[core]
    if core.min() < 0 or core.max() >= depth.size or np.any(dd <= 0):
        return None
    # a Gaussian's log is a parabola: ln d = c - (x - x0)^2 / (2 sigma^2) (Caruana's method)
    xx = wave[lo:hi][core] - wave[p]
    a2 = np.polyfit(xx, np.log(dd), 2)[0]
    if a2 >= 0:
        return None
    return GAUSS_FWHM * np.sqrt(-0.5 / a2) / wave[p]


#: the power k = a + b of the parabola's normal matrix entry (a, b), a and b the powers 2, 1, 0
_MOMENT_OF = np.array([[4, 3, 2], [3, 2, 1], [2, 1, 0]])


def parabola_normal_equations(t, wgt, y):
    """Normal equations ``(m, rhs)`` of weighted least-squares parabolas y = c2 t^2 + c1 t + c0, one per row
    of ``t``, ``wgt``, ``y`` (coefficients in the order c2, c1, c0): ``m[a, b] = sum(w t^(a+b))``,
    ``rhs[a] = sum(w t^a y)``. The five distinct sums of w t^k are each made once (an entry's value is
    its k's, the same as made entry by entry)."""
    wt = [wgt * t ** k for k in range(5)]
    sums = np.stack([w_k.sum(axis=1) for w_k in wt], axis=-1)
    return sums[:, _MOMENT_OF], np.stack([(wt[a] * y).sum(axis=1) for a in (2, 1, 0)], axis=-1)


def caruana_fwhms(wave, flux, peaks, step=None):
    """:func:`_caruana_fwhm` of every pixel of ``peaks`` at once (NaN where it gives None).

    The same windows, cores and rules; the parabolas by their 3x3 normal equations in pixel
    offsets, all solved together, instead of one ``np.polyfit`` each (a tenth of the lines
    stage, benchmarks/bench_lines.py); the two differ by rounding only
    (``tests/test_lines.py``). ``step``: the grid's median pixel step, where known.
    """
    peaks = np.asarray(peaks, int)
    n = wave.size
    out = np.full(peaks.size, np.nan)
    if not peaks.size:
        return out
    k = np.arange(-5, 6)
    idx = peaks[:, None] + k[None, :]                       # (peaks, 11): offsets -5..5
    inside = (idx >= 0) & (idx < n)
    idc = np.minimum(np.maximum(idx, 0), n - 1)
    seg = np.where(inside, flux[idc], -np.inf)
    # the window lo..hi-1 of _caruana_fwhm needs 7 pixels at least
    enough = inside.sum(axis=1) >= 7
    left = np.where(k[None, :] <= 0, seg, -np.inf).max(axis=1)
    right = np.where(k[None, :] >= 0, seg, -np.inf).max(axis=1)
    depth = np.minimum(left, right)[:, None] - seg
    d0 = depth[:, 5]
    ok = enough & (d0 > 0)
    # the core: pixels within 3 of the minimum at half its depth or more (the minimum itself
    # always is, so _caruana_fwhm's "nearest core pixel + 3" is 3), else the three around it
    core = inside & (np.abs(k)[None, :] <= 3) & (depth >= 0.5 * d0[:, None])
    few = core.sum(axis=1) < 3
    three = np.abs(k)[None, :] <= 1
    core = np.where(few[:, None], three, core)
    ok &= ~(few & ((~inside) & three).any(axis=1))
    with np.errstate(invalid="ignore", divide="ignore"):
        ok &= ~np.any(core & ~(depth > 0), axis=1)
        logd = np.where(core & ok[:, None], np.log(np.where(depth > 0, depth, 1.0)), 0.0)
    # least squares ln d = c2 t^2 + c1 t + c0 in pixel offsets t = x / step (well conditioned)
    step = np.median(np.diff(wave)) if step is None else step
    t = np.where(core, (wave[idc] - wave[peaks][:, None]) / step, 0.0)
    wgt = core.astype(float)
    m, rhs = parabola_normal_equations(t, wgt, logd)
    m[~ok] = np.eye(3)
    rhs[~ok] = 0.0
    a2 = np.linalg.solve(m, rhs[..., None])[:, 0, 0] / step**2
    ok &= a2 < 0
    with np.errstate(invalid="ignore", divide="ignore"):
        out[ok] = GAUSS_FWHM * np.sqrt(-0.5 / a2[ok]) / wave[peaks[ok]]
    return out


def estimate_resolving_power(spectrum):
    """Resolving power of a continuum-normalised spectrum from its narrowest lines, or None.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Continuum-normalised (``specan.prepare`` output); :func:`specan.lines.estimate_resolving_power`
        takes one that is not.

    Returns
    -------
    float or None
        R = lambda / FWHM. Measured: 1847 on the Kurucz solar model at R = 2000;
        about 750-800 on the JHC (1984) spectra, whose 4.5 A FWHM is R ~ 1100 at
        5000 A (at that resolution most features are blends and read broad).
    """
    if not get_info(spectrum).normalized:
        raise ValueError("estimate_resolving_power needs a continuum-normalised spectrum (specan.prepare)")
    try:
        a = normalised_arrays(spectrum, dersnr=True)
    except AnalysisError:
        return None
    narrow = narrowest_line_width(a.wave, a.flux, a.sigma, a.good)
    return None if narrow is None else 1.0 / narrow


def degrade(spectrum, resolving_power, from_resolving_power=None):
    """Convolve to a lower resolving power with a Gaussian in log wavelength.

    The kernel's FWHM in velocity is c * sqrt(1/R_out^2 - 1/R_in^2) (Gaussians add in
    quadrature). The flux is interpolated onto a uniform log-wavelength grid, smoothed
    with ``scipy.ndimage.gaussian_filter1d`` and interpolated back onto the original
    pixels (linear interpolation done with numpy: this is on hot paths).

    Parameters
    ----------
    spectrum : specutils.Spectrum
    resolving_power : float
        Target R = lambda / FWHM.
    from_resolving_power : float, optional
        The spectrum's own R; defaults to ``info.resolving_power``, else treated as infinite.

    Returns
    -------
    specutils.Spectrum
        Same pixels, degraded flux; ``info.resolving_power`` set to the target.
    """
    info = get_info(spectrum)
    r_in = from_resolving_power or info.resolving_power
    r_out = float(resolving_power)
    if r_in is not None and r_in <= r_out:
        return spectrum
    fwhm_kms = C_KMS * np.sqrt(1.0 / r_out**2 - (0.0 if r_in is None else 1.0 / r_in**2))
    wave, flux, err, mask = spectrum_arrays(spectrum)
    good = ~mask
    if good.sum() < 4:
        raise AnalysisError("too few usable pixels to degrade", info.path)
    lw = np.log(wave)
    # Native sampling: a coarser grid would alias lines narrower than the kernel away.
    dlog = float(np.min(np.diff(lw)))
    grid = np.arange(lw[0], lw[-1] + dlog / 2, dlog)
    fg = np.interp(grid, lw[good], flux[good])
    sigma_pix = fwhm_kms / C_KMS / dlog / 2.3548
    sm = gaussian_filter1d(fg, sigma_pix, mode="nearest")
    nflux = np.interp(lw, grid, sm)
    nerr = None
    if err is not None:
        # Smoothing over n_eff independent pixels lowers the per-pixel noise by sqrt(n_eff)
        # (approximate: neighbouring output pixels become correlated).
        pix_kms = C_KMS * np.median(np.diff(lw)) if lw.size > 1 else fwhm_kms
        n_eff = max(1.0, 2.0 * np.sqrt(np.pi) * (fwhm_kms / 2.3548) / pix_kms)
        nerr = np.where(np.isfinite(err), err / np.sqrt(n_eff), np.inf)
    meta = dict(spectrum.meta)
    new_info = info.copy()
    new_info.resolving_power = r_out
    meta[META_KEY] = new_info
    return replace_parts(spectrum, flux=nflux, err=nerr, meta=meta)


def smooth_to_fwhm(wave, flux, good, fwhm_in, fwhm_out):
    """Gaussian smoothing from an instrumental FWHM ``fwhm_in(wave)`` to ``fwhm_out(wave)`` (A).

    Hand-written rather than :func:`degrade` because a calibration's or a library's resolution
    is constant in Angstrom (a grating spectrograph, like the reference libraries), while
    ``degrade`` works at constant resolving power. The flux goes onto a uniform grid; the
    kernel width varies with wavelength when one side is at constant R, so the flux is
    smoothed at a few kernel widths and each pixel interpolates between the two bracketing
    ones. Either FWHM is a scalar or an array over ``wave``; where ``fwhm_out`` is not above
    ``fwhm_in`` the flux is left as it is.

    Returns
    -------
    grid, smoothed flux, good-pixel mask on the grid : numpy.ndarray
    """
    step = float(np.median(np.diff(wave)))
    grid = np.arange(wave[0], wave[-1] + step / 2, step)
    # with every pixel good the mask is 1 everywhere, and stays so smoothed (to rounding): not made
    all_good = bool(good.all())
    fg = np.interp(grid, wave, flux) if all_good else np.interp(grid, wave[good], flux[good])
    gg = None if all_good else np.interp(grid, wave, good.astype(float))
    fin = np.broadcast_to(np.interp(grid, wave, np.broadcast_to(fwhm_in, wave.shape)), grid.shape)
    fout = fwhm_out if np.ndim(fwhm_out) == 0 else np.interp(grid, wave, fwhm_out)
    # FWHM = 2 sqrt(2 ln 2) sigma = 2.3548 sigma for a Gaussian (common practice)
    sig = np.sqrt(np.clip(fout ** 2 - fin ** 2, 0.0, None)) / 2.3548 / step   # pixels
    if np.all(sig < 0.3):
        return grid, fg, np.ones(grid.size, bool) if all_good else gg > 0.5
    levels = np.unique(np.round(np.linspace(sig.min(), sig.max(), 5), 3))
    ok = np.ones(grid.size, bool) if all_good else gaussian_filter1d(gg, float(levels.max()), mode="nearest") > 0.5
    if len(levels) == 1:
        return grid, _smoothed_where(fg, levels[0], 0, grid.size), ok
    j = np.clip(np.searchsorted(levels, sig) - 1, 0, len(levels) - 2)
    t = np.clip((sig - levels[j]) / (levels[j + 1] - levels[j]), 0.0, 1.0)
    # each level is needed only where it brackets sig, about two fifths of the grid: smoothed there
    # alone (with its kernel's reach beside), the same numbers as smoothing the whole grid
    smooth = np.empty((len(levels), grid.size))
    for i, lv in enumerate(levels):
        used = np.flatnonzero((j == i) | (j == i - 1))
        if used.size:
            first, last = int(used[0]), int(used[-1]) + 1
            smooth[i, first:last] = _smoothed_where(fg, lv, first, last)
    idx = np.arange(grid.size)
    out = smooth[j, idx] * (1.0 - t) + smooth[j + 1, idx] * t
    return grid, out, ok


def _smoothed_where(flux, sigma, first, last):
    """``gaussian_filter1d(flux, sigma, mode="nearest")[first:last]`` (``flux`` itself for sigma <= 0.3).

    Filtered over ``first:last`` and the kernel's reach on either side only: every output pixel
    sees the same input pixels (the same edge pixels repeated at the spectrum's ends) and the
    same weights as in the whole array's filtering, so the numbers are the same to the bit
    (tests/test_smoothing.py).
    """
    if sigma <= 0.3:
        return flux[first:last]
    reach = int(4.0 * float(sigma) + 0.5)    # gaussian_filter1d's kernel radius at its default truncate=4
    lo, hi = max(first - reach, 0), min(last + reach, flux.size)
    return gaussian_filter1d(flux[lo:hi], sigma, mode="nearest")[first - lo:last - lo]


class RestGrid(NamedTuple):
    """A spectrum at rest, smoothed and on a grid (see :func:`on_rest_grid`)."""

    flux: np.ndarray       # smoothed flux on the grid
    ok: np.ndarray         # grid pixels inside the spectrum, made of usable pixels only
    fwhm_in: object        # the input FWHM used (Angstrom, scalar or per input pixel)
    fwhm_assumed: bool     # neither fwhm_in nor an R was given: 2.5 pixels were taken
    wave: np.ndarray       # the input wavelengths kept (air, rest), for the callers' notes


class RestPixels(NamedTuple):
    """A spectrum's pixels at rest in air wavelengths, sorted (see :func:`rest_pixels`)."""

    wave: np.ndarray       # Angstrom, air, velocity removed, increasing
    flux: np.ndarray
    good: np.ndarray       # finite flux and wavelength, not masked


def rest_pixels(spectrum, rv=None):
    """The pixels :func:`on_rest_grid` starts from: air wavelengths, sorted, the velocity ``rv`` removed.

    Made once and handed to several :func:`on_rest_grid` calls (the parameter model's and the
    library comparison's grids) they give the same numbers as each making its own.
    """
    import astropy.units as u

    wave = wavelength_in(spectrum, "air")
    flux = np.asarray(spectrum.flux.value, float)
    good = np.isfinite(flux) & np.isfinite(wave)
    if spectrum.mask is not None:
        good &= ~np.asarray(spectrum.mask, bool)
    if not np.all(wave[1:] > wave[:-1]):   # as read, the axis increases already: nothing to reorder
        order = np.argsort(wave)
        wave, flux, good = wave[order], flux[order], good[order]
    if rv is not None:
        rv = u.Quantity(rv, u.km / u.s)
        if np.isfinite(rv.value):
            wave = wave / float(doppler_factor(rv))
    return RestPixels(wave, flux, good)


def on_rest_grid(spectrum, grid, fwhm_out, rv=None, fwhm_in=None, resolving_power=None, positive=False,
                 min_pixels=50, what="the grid", pixels=None):
    """A spectrum at rest in air wavelengths, smoothed to ``fwhm_out`` and interpolated onto ``grid``.

    The path the parameter model and the library comparison share (their shipped numbers were
    made through it): air wavelengths, sorted, the velocity removed, the pixels within five
    output FWHM of the grid kept, smoothed from ``fwhm_in`` (default lambda / R from
    ``resolving_power`` or the metadata, else 2.5 pixels) to ``fwhm_out``, then interpolated.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    grid : numpy.ndarray
        Output wavelengths (Angstrom, air, increasing).
    fwhm_out : float
        Output FWHM (Angstrom).
    rv : astropy.units.Quantity, optional
        Velocity seen in the data (removed when finite); None: at rest.
    fwhm_in : float or numpy.ndarray, optional
    resolving_power : float, optional
        R when the metadata give none.
    positive : bool
        Count non-positive flux as unusable.
    min_pixels : int
        Fewest usable input pixels near the grid.
    what : str
        The grid's name, for the error message.
    pixels : RestPixels, optional
        ``rest_pixels(spectrum, rv)`` made already (``rv`` is then not used again).

    Returns
    -------
    RestGrid

    Raises
    ------
    specan.errors.AnalysisError
        When fewer than ``min_pixels`` usable pixels lie near the grid.
    """
    info = get_info(spectrum)
    wave, flux, good = rest_pixels(spectrum, rv) if pixels is None else pixels
    if positive:
        good = good & (flux > 0)
    near = (wave >= grid[0] - 5 * fwhm_out) & (wave <= grid[-1] + 5 * fwhm_out)
    if (good & near).sum() < min_pixels:
        raise AnalysisError(f"the spectrum does not overlap {what}", info.path)
    wave, flux, good = wave[near], flux[near], good[near]
    assumed = False
    if fwhm_in is None:
        r = info.resolving_power or resolving_power
        assumed = not r
        fwhm_in = wave / float(r) if r else 2.5 * float(np.median(np.diff(wave)))
    fine, smooth, fine_good = smooth_to_fwhm(wave, np.where(good, flux, 0.0), good, fwhm_in, fwhm_out)
    inside = (grid >= fine[0]) & (grid <= fine[-1])
    on = np.interp(grid, fine, smooth)
    ok = inside if fine_good.all() else inside & (np.interp(grid, fine, fine_good.astype(float)) > 0.99)
    return RestGrid(on, ok, fwhm_in, assumed, wave)
