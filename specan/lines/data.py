"""The observed side of line work: plain arrays of one normalised spectrum, the matched
filter at the spectrum's line width, and the features (absorption and emission) it finds.

Everything here is derived once per spectrum and shared by identification and measurement.
"""

from __future__ import annotations

import copy
import functools
from typing import NamedTuple

import numpy as np
from scipy.ndimage import correlate1d
from scipy.signal import find_peaks, peak_prominences

from ..contents import content_key, forgettable, kept
from ..obsinfo import get_info
from .. import resolution
from ..resolution import (DEFAULT_PIXELS_PER_FWHM, GAUSS_FWHM, dersnr_sigma, grid_medians, narrowest_line_width,
                          normalised_arrays)
from . import compiled

__all__ = ["DETECT_SIGMA", "MIN_DEPTH", "LineData", "Features", "find_features", "normalised",
           "estimate_resolving_power", "pixel_edges", "median"]

# Matched-filter significance above which a feature counts as detected (common practice: 3-5 sigma).
DETECT_SIGMA = 4.0
# Smallest depth (below the surrounding crests, or the local continuum) counted as a line:
# continuum ripples and flat-field residuals of a few 0.1% are significant at very high
# S/N but are not lines (common practice: ~1% systematic floor at these resolutions).
MIN_DEPTH = 0.01


def normalised(spectrum):
    """The spectrum itself when continuum-normalised, else :func:`specan.prepare.prepare` of it."""
    info = get_info(spectrum)
    if info.normalized:
        return spectrum
    from ..prepare import prepare

    return prepare(spectrum)


def estimate_resolving_power(spectrum):
    """Resolving power from the widths of the narrowest lines, or None when they give none.

    :func:`specan.resolution.estimate_resolving_power` for a spectrum that may not be
    continuum-normalised yet (then :func:`specan.prepare.prepare` is applied first).

    Parameters
    ----------
    spectrum : specutils.Spectrum

    Returns
    -------
    float or None
        R = lambda / FWHM.
    """
    from ..errors import SpecanError

    try:
        return resolution.estimate_resolving_power(normalised(spectrum))
    except SpecanError:
        return None


def pixel_edges(wave):
    """Edges of the pixels centred on ``wave`` (halfway between centres; the end pixels mirrored)."""
    mid = 0.5 * (wave[1:] + wave[:-1])
    return np.concatenate([[1.5 * wave[0] - 0.5 * wave[1]], mid, [1.5 * wave[-1] - 0.5 * wave[-2]]])


def _resolving_power(given, from_file, narrow, wave):
    """Resolving power and where it came from: the caller, the file, the narrowest lines or a guess."""
    if given is not None:
        return given, "argument"
    if from_file is not None:
        return from_file, "file"
    if narrow is not None:
        return 1.0 / narrow, "estimated from the narrowest lines"
    r = float(np.median(wave / (DEFAULT_PIXELS_PER_FWHM * np.median(np.diff(wave)))))
    return r, f"assumed ({DEFAULT_PIXELS_PER_FWHM} pixels per FWHM)"


def _broadening(narrow, resolving_power):
    """Typical line width over the instrument's: the instrument, or broader when the star's lines are resolved.

    Only clearly resolved lines count as broadened: the narrow-line estimate reads
    3-10% above the instrument on unresolved lines at 2 pixels per FWHM (measured on
    the Kurucz solar model at its R = 2000), from blends and pixel sampling.
    """
    ratio = 1.0 if narrow is None else narrow * resolving_power
    return float(min(ratio, 20.0)) if ratio > 1.2 else 1.0


def _kernel_sums(s):
    """Sums of a Gaussian kernel g of width ``s`` pixels and of g**2, over +-4 s."""
    j = np.arange(-int(4 * s + 0.5), int(4 * s + 0.5) + 1)
    return np.exp(-0.5 * (j / s) ** 2).sum(), np.exp(-((j / s) ** 2)).sum()


@functools.lru_cache(maxsize=256)
def _gauss_weights(s):
    """The weights ``scipy.ndimage.gaussian_filter1d(x, s)`` correlates with, made as it makes them.

    Its kernel (truncated at 4 sigma, normalised) computed once per width instead of at every
    call: ``correlate1d`` with these weights gives the filter's values to the bit (the matched
    filter calls it at the same few dozen widths for every spectrum of a set-up).
    """
    radius = int(4.0 * float(s) + 0.5)
    x = np.arange(-radius, radius + 1)
    phi = np.exp(-0.5 / (s * s) * x ** 2)
    weights = (phi / phi.sum())[::-1]
    weights.flags.writeable = False
    return weights


def _gaussian_filter(values, s, axis=-1):
    """``scipy.ndimage.gaussian_filter1d(values, s, mode="nearest", axis=axis)`` with a cached kernel."""
    return correlate1d(values, _gauss_weights(s), axis, mode="nearest")


class _Ladder(NamedTuple):
    """The widths the matched filter is made at and the pixels each serves (see :func:`matched_filter`)."""

    rungs: tuple   #: per width: (s, pixels it serves, stretch filtered, its pixels in that stretch, k1, k2)
    #: the same kernels laid out per pixel (:func:`_banded`), or None where they reach too far
    band: tuple | None = None


#: Widest kernel (pixels from the centre) the banded matched filter (:func:`_banded`) takes; wider
#: ones (lines broadened many times the instrument) are filtered rung by rung.
BAND_REACH = 24


def _ladder(sig_pix):
    """The :class:`_Ladder` of an instrument width (pixels) along the spectrum: depends on it alone."""
    n = sig_pix.size
    step = np.log(1.05)
    q = np.round(np.log(np.maximum(sig_pix, 0.3)) / step).astype(int)
    rungs = []
    for level in np.unique(q):
        s = float(np.exp(level * step))
        sel = q == level
        idx = np.flatnonzero(sel)
        # filter only the stretch this width serves, plus the kernel's reach (gaussian_filter1d
        # truncates at 4 sigma): the same sums at those pixels, for a fraction of the work
        reach = int(4.0 * s + 0.5) + 1
        part = slice(max(idx[0] - reach, 0), min(idx[-1] + reach + 1, n))
        k1, k2 = _kernel_sums(s)  # sums of the kernel g and of g**2
        rungs.append((s, idx, part, sel[part], k1, k2))
    return _Ladder(tuple(rungs), _banded(rungs, n))


def _banded(rungs, n):
    """Every pixel's kernels as columns: ``(main, half, k1, k2)``, or None past :data:`BAND_REACH`.

    ``main[r, i]`` is the weight at distance r of the kernel pixel i is filtered with (its rung's
    width s), ``half[r, i]`` the same of the kernel at s / sqrt(2), zero beyond each kernel's reach;
    ``k1``, ``k2`` the rung's kernel sums at each pixel. Read-only: kept per set-up (:func:`_setup`).
    """
    reach = max(_gauss_weights(s).size // 2 for s, *_ in rungs)
    if reach > BAND_REACH:
        return None
    main, half = np.zeros((reach + 1, n)), np.zeros((reach + 1, n))
    k1, k2 = np.empty(n), np.empty(n)
    for s, idx, _, _, a1, a2 in rungs:
        for out, width in ((main, s), (half, s / np.sqrt(2.0))):
            g = _gauss_weights(width)
            r = g.size // 2
            out[:r + 1, idx] = g[r:, None]      # (a symmetric kernel: g[r + j] = g[r - j])
        k1[idx], k2[idx] = a1, a2
    for a in (main, half, k1, k2):
        a.flags.writeable = False
    return main, half, k1, k2


def _band_filter(values, weights):
    """Each pixel's own symmetric kernel (``weights``, :func:`_banded`) correlated with ``values``
    (rows), the edges extended with the nearest value: ``scipy.ndimage.correlate1d``'s sums to the
    bit, term by term in its order (the centre, then the pairs of pixels at equal distance from the
    outermost in; the zero weights past a pixel's own kernel add exact zeros before its first term).

    Compiled where :func:`specan.lines.compiled.filters` gives the kernels
    (:func:`specan.lines.filterkernel.band_filter`: the same sums, vectorised in one pass a distance)."""
    kernels = compiled.filters()
    if kernels is not None:
        rows = np.ascontiguousarray(values).reshape(-1, values.shape[-1])
        out = np.empty(rows.shape)
        kernels.band_filter(rows, weights, out)
        return out.reshape(values.shape)
    reach = weights.shape[0] - 1
    n = values.shape[-1]
    padded = np.concatenate([np.repeat(values[..., :1], reach, axis=-1), values,
                             np.repeat(values[..., -1:], reach, axis=-1)], axis=-1)
    out = values * weights[0]
    # (each pair's sum and its weighted term made in one array kept for the loop: the same operations,
    # without two new arrays a distance)
    term = np.empty_like(out)
    for r in range(reach, 0, -1):
        np.add(padded[..., reach - r:reach - r + n], padded[..., reach + r:reach + r + n], out=term)
        term *= weights[r]
        out += term
    return out


def matched_filter(flux, weight, sig_pix, ladder=None):
    """Matched-filter significance, weighted smoothed flux and its noise, at each pixel's width.

    The instrument width in pixels (``sig_pix``, a Gaussian sigma) changes along the
    spectrum (constant R on a linear grid), so the arrays are filtered at a ladder of
    widths 5% apart and each pixel takes the result at its own width. ``ladder``: the
    :func:`_ladder` of ``sig_pix`` when already made (kept per set-up, :func:`_setup`).
    """
    n = flux.size
    w = weight
    # the weighted depth, flux and weight made in their rows of one array (the same products as made
    # apart and stacked)
    stacked = np.empty((3, n))
    np.multiply(weight, 1.0 - flux, out=stacked[0])
    np.multiply(weight, flux, out=stacked[1])
    stacked[2] = weight
    if ladder is None:
        ladder = _ladder(sig_pix)
    if ladder.band is not None:
        # all widths at once, each pixel with its own kernel: a few dozen whole-array operations
        # instead of two filter calls and a dozen small ones per width (the same values, bit for bit)
        main, half, k1, k2 = ladder.band
        f_wd, f_wf, f_w = _band_filter(stacked, main)
        kw2 = k2 * _band_filter(w, half)   # (made once for both: the same product)
        signif = k1 * f_wd / np.sqrt(np.maximum(kw2, 1e-300))
        smooth = f_wf / np.maximum(f_w, 1e-300)
        smooth_err = np.sqrt(kw2 / np.maximum((k1 * f_w) ** 2, 1e-300))
        smooth = np.where(np.isfinite(smooth), smooth, 1.0)
        return signif, smooth, smooth_err
    signif, smooth, smooth_err = np.empty(n), np.empty(n), np.empty(n)
    for s, idx, part, sub, k1, k2 in ladder.rungs:
        # the three arrays at width s in one call (row by row: the same sums as one call each)
        f_wd, f_wf, f_w = _gaussian_filter(stacked[:, part], s, axis=1)[:, sub]
        f_w2 = _gaussian_filter(w[part], s / np.sqrt(2.0))[sub]
        # S = sum(w g d) / sqrt(sum(w g^2)): amplitude over its error for a Gaussian at each pixel
        signif[idx] = k1 * f_wd / np.sqrt(np.maximum(k2 * f_w2, 1e-300))
        safe = np.maximum(f_w, 1e-300)
        smooth[idx] = f_wf / safe
        # variance of a weighted mean with kernel weights g: sum(g^2 w) / sum(g w)^2
        smooth_err[idx] = np.sqrt(k2 * f_w2 / np.maximum((k1 * f_w) ** 2, 1e-300))
    smooth = np.where(np.isfinite(smooth), smooth, 1.0)
    return signif, smooth, smooth_err


def _rows_filtered(values, s):
    """``_gaussian_filter(values, s, axis=-1)`` of a 1-D or 2-D array: compiled where
    :func:`specan.lines.compiled.filters` gives the kernels (:func:`specan.lines.filterkernel.symmetric_filter`:
    correlate1d's sums, vectorised; its own loop takes a pixel at a time)."""
    kernels = compiled.filters()
    if kernels is None:
        return _gaussian_filter(values, s, axis=-1)
    rows = np.ascontiguousarray(values).reshape(-1, values.shape[-1])
    out = np.empty(rows.shape)
    kernels.symmetric_filter(rows, _gauss_weights(s), out)
    return out.reshape(values.shape)


def wide_smooth(flux, weight, s):
    """Weighted flux smoothed by a Gaussian of ``s`` pixels, and its noise."""
    wf, w = weight * flux, weight
    f_wf, f_w = _rows_filtered(np.stack([wf, w]), s)
    f_w = np.maximum(f_w, 1e-300)
    smooth = f_wf / f_w
    smooth = np.where(np.isfinite(smooth), smooth, 1.0)
    k1, k2 = _kernel_sums(s)
    f_w2 = _rows_filtered(w, s / np.sqrt(2.0))
    return smooth, np.sqrt(k2 * f_w2 / np.maximum((k1 * f_w) ** 2, 1e-300))


#: How many grids (and, per grid, resolving powers and broadenings) :func:`_grid_setup` and
#: :func:`_width_setup` keep: a night mixes a few set-ups, not hundreds.
SETUPS_KEPT = 8
_GRIDS = {}
_WIDTHS = forgettable({})
#: the grids' median pixel step and wavelength (:func:`specan.resolution.grid_medians`), kept per grid
#: (two numbers a grid: nothing to forget)
_MEDIANS = {}


def _grid_setup(key, wave):
    """The pixel widths of the grid ``wave`` (content ``key``, :func:`specan.contents.content_key`), kept."""
    return kept(_GRIDS, key, lambda: np.diff(pixel_edges(wave)), SETUPS_KEPT)


def _width_setup(key, wave, dx, resolving_power, broadening):
    """``(fwhm, line_fwhm, sig_pix, ladder, wide)`` of a grid at a resolving power and broadening, kept.

    The instrument's FWHM at each pixel (never sampled finer than ~1 pixel per FWHM), the lines'
    (times the broadening), the lines' Gaussian sigma in pixels, the matched filter's
    :func:`_ladder` of it and the width (pixels) of the wide smoothing (:func:`wide_smooth`)."""
    def make():
        fwhm = np.maximum(wave / resolving_power, dx)
        line_fwhm = fwhm * broadening
        sig_pix = line_fwhm / GAUSS_FWHM / dx
        return fwhm, line_fwhm, sig_pix, _ladder(sig_pix), 3.0 * float(np.median(sig_pix))
    return kept(_WIDTHS, (key, float(resolving_power), float(broadening)), make, SETUPS_KEPT)


class LineData:
    """Plain arrays of one normalised spectrum plus everything derived once.

    ``wave``, ``flux``, ``sigma``, ``good`` (from :func:`specan.resolution.normalised_arrays`:
    the error array, else the noise measured from the flux, says ``noise_source``), ``weight``, pixel widths
    ``dx``, the resolving power and the line width ``line_fwhm`` at each pixel, and the
    matched filter at that width (``signif``, ``smooth``, ``smooth_err``, and
    ``smooth_wide``/``smooth_wide_err`` over three line widths).
    """

    def __init__(self, spectrum, resolving_power=None):
        info = get_info(spectrum)
        self.info = info
        self.medium = info.medium
        self.wave, self.flux, self.sigma, self.good, self.noise_source = normalised_arrays(
            spectrum, resolving_power=resolving_power)
        wave_key = content_key(self.wave)
        self.dx = _grid_setup(wave_key, self.wave)  # pixel widths, Angstrom (read-only, kept per grid)
        # the narrowest-line search keeps the one-value DER_SNR noise its thresholds were set with
        # (what normalised_arrays(spectrum, dersnr=True) gives, from the arrays at hand)
        narrow_sigma = self.sigma if self.noise_source == "error array" else dersnr_sigma(self.flux, self.good)
        self.narrow = narrowest_line_width(self.wave, self.flux, narrow_sigma, self.good,
                                           medians=kept(_MEDIANS, wave_key, lambda: grid_medians(self.wave), SETUPS_KEPT))
        r, self.r_source = _resolving_power(resolving_power, info.resolving_power, self.narrow, self.wave)
        self.resolving_power = float(r)
        if self.noise_source != "error array" and resolving_power is None and info.resolving_power is None:
            # the flux-based noise separates noise from lines by the instrument's width:
            # measure it again at the resolving power found from the lines
            self.sigma = normalised_arrays(spectrum, resolving_power=self.resolving_power).sigma
        self.weight = np.where(self.good, 1.0 / self.sigma**2, 0.0)
        self.broadening = _broadening(self.narrow, self.resolving_power)
        # the widths along the spectrum and the matched filter's kernels depend on the grid, R and
        # the broadening alone: made once per set-up (a night's spectra share a few)
        self.fwhm, self.line_fwhm, self.sig_pix, self._rungs, self._wide_width = _width_setup(
            wave_key, self.wave, self.dx, self.resolving_power, self.broadening)
        self._filter()

    def _filter(self):
        # the widths and the pixels each serves: made once per set-up (a copy divided by the hydrogen
        # lines keeps them)
        self.signif, self.smooth, self.smooth_err = matched_filter(self.flux, self.weight, self.sig_pix,
                                                                   self._rungs)
        # the wide smoothing only when a window walks on it (hydrogen lines: the copy divided by
        # the hydrogen lines, which measures the other lines, never needs it)
        self._wide = None

    @property
    def smooth_wide(self):
        """Weighted flux smoothed over three line widths (:func:`wide_smooth`), made on first use."""
        return self._wide_smoothing()[0]

    @property
    def smooth_wide_err(self):
        """The noise of :attr:`smooth_wide`."""
        return self._wide_smoothing()[1]

    def _wide_smoothing(self):
        if self._wide is None:
            # over three line widths (the median's, kept per set-up)
            self._wide = wide_smooth(self.flux, self.weight, self._wide_width)
        return self._wide

    def divided(self, model):
        """A copy with flux and noise divided by ``model`` (filters recomputed)."""
        new = copy.copy(self)
        new.flux = self.flux / model
        new.sigma = self.sigma / model
        new.weight = np.where(self.good, 1.0 / new.sigma**2, 0.0)
        new._filter()
        return new

    def positive_counts(self):
        """Running count of the pixels of non-zero weight (pixels lo..hi hold ``c[hi + 1] - c[lo]``),
        made once per weight array: every group of a spectrum's Gaussian fits asks for it."""
        held = getattr(self, "_counts", None)
        if held is None or held[0] is not self.weight:
            held = self._counts = (self.weight, np.concatenate([[0], np.cumsum(np.sqrt(self.weight) > 0)]))
        return held[1]

    def typical_noise(self):
        """:func:`median` noise of the good pixels, made once per noise array: the features' search and
        the wing fits of the same arrays ask for it."""
        held = getattr(self, "_typical", None)
        if held is None or held[0] is not self.sigma or held[1] is not self.good:
            held = self._typical = (self.sigma, self.good, median(self.sigma[self.good]))
        return held[2]

    def index(self, wave):
        """The first pixel at or above ``wave`` (clipped to the spectrum)."""
        return min(max(int(np.searchsorted(self.wave, wave)), 0), self.wave.size - 1)

    def nearest_pixel(self, wave):
        """The pixel whose centre is nearest ``wave``."""
        ic = self.index(wave)
        if ic > 0 and abs(self.wave[ic - 1] - wave) < abs(self.wave[ic] - wave):
            ic -= 1
        return ic

    def meta(self, rv):
        """Table ``meta`` of a result measured on these arrays at velocity ``rv``."""
        return {"rv": rv, "resolving_power": self.resolving_power,
                "resolving_power_source": self.r_source, "medium": self.medium,
                "noise_source": self.noise_source}


# ----------------------------------------------------------------------------- features


def median(values):
    """``float(np.median(values))`` of a 1-D array without NaN (at least one value), without its
    overhead (~20 us a call, measured): the middle value, or the sum of the middle two halved, as
    np.median takes them (the same value)."""
    n = values.size
    # (partitioned about the places np.median partitions about, the last one included, which it
    # adds for NaN: the same elements there, signed zeros too)
    h = n // 2
    part = np.partition(values, [h, -1] if n % 2 else [h - 1, h, -1])
    # (np.median's mean sums from +0.0: a -0.0 comes out +0.0, as there)
    return float((0.0 + part[h]) if n % 2 else ((0.0 + part[h - 1]) + part[h]) / 2.0)

class Features(NamedTuple):
    """Features found in a spectrum, sorted by position."""

    position: np.ndarray      #: Angstrom
    significance: np.ndarray  #: matched-filter significance (negative: emission)
    depth: np.ndarray         #: 1 - smoothed flux at the feature
    emission: np.ndarray      #: bool


def find_features(data, detect_sigma, min_depth=MIN_DEPTH):
    """Absorption and emission features.

    Peaks of the matched-filter significance, plus local extrema of the flux itself
    that stand out of their surroundings by 3 sigma (prominence) where the matched
    filter is significant: at low resolution neighbouring lines merge into one
    broad filter peak, and the flux minima still separate them (for deblending).
    Every feature must also stand out of the smoothed flux around it by
    ``min_depth`` (prominence): at very high S/N, continuum ripples of a few tenths
    of a per cent are significant but are not lines.
    """
    parts = []
    noise = data.typical_noise()
    for sign in (1.0, -1.0):
        s = sign * np.where(data.good, data.signif, 0.0)
        cand = _candidates(data, s, sign, detect_sigma, noise)
        kept = _standing_out(data, cand, sign, min_depth)
        parts.append((_refined_positions(data, s, kept), sign * s[kept], 1.0 - data.smooth[kept],
                      np.full(kept.size, sign < 0)))
    pos, sig, depth, emis = (np.concatenate(v) for v in zip(*parts))
    if not pos.size:
        return Features(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0, bool))
    # in the order of (position, significance, depth, emission), as a sort of those tuples: the same
    # values as made feature by feature (a Python loop over some 150 features a call, measured)
    order = np.lexsort((emis, depth, sig, pos))
    return Features(pos[order], sig[order], depth[order], emis[order])


def _candidates(data, s, sign, detect_sigma, noise):
    """Pixels of matched-filter peaks, and of flux extrema the filter peaks do not already hold."""
    # (find_peaks' height test is this comparison, made here without its properties' bookkeeping)
    peaks, _ = find_peaks(s)
    peaks = peaks[s[peaks] >= detect_sigma]
    # the line width at each peak's pixel (np.interp at the nodes, as this was made: their own values)
    fwp = data.line_fwhm[peaks]
    # the flux extrema where the filter is significant, prominent by 3 sigma: find_peaks(...,
    # prominence=) measures the prominence of every extremum (most are noise, where the filter is
    # not significant); a peak's prominence does not depend on the other peaks, so measuring it for
    # the significant ones only keeps the same peaks
    flipped = np.where(data.good, -sign * data.flux, -np.inf)
    raw, _ = find_peaks(flipped)
    raw = raw[s[raw] >= detect_sigma]
    if raw.size:
        raw = raw[peak_prominences(flipped, raw)[0] >= 3.0 * noise]
    if raw.size and peaks.size:
        near = np.abs(data.wave[raw][:, None] - data.wave[peaks][None, :]) < 0.5 * fwp[None, :]
        raw = raw[~near.any(axis=1)]
    return np.concatenate([peaks, raw]).astype(int)


def _standing_out(data, cand, sign, min_depth):
    """The candidates whose nearest extremum of the smoothed flux is prominent by ``min_depth``."""
    if not cand.size:
        return cand
    sm = -sign * data.smooth
    ext, _ = find_peaks(sm)
    if not ext.size:
        return cand[:0]
    j = np.minimum(np.maximum(ext.searchsorted(cand), 1), max(ext.size - 1, 1))
    left, right = ext[np.maximum(j - 1, 0)], ext[np.minimum(j, ext.size - 1)]
    nearest = np.where(np.abs(left - cand) <= np.abs(right - cand), left, right)
    prom = peak_prominences(sm, nearest)[0]
    keep = prom >= max(min_depth, 0.0)
    if sign < 0:
        # a crest between absorption lines is prominent too: emission must also
        # rise 3 min_depth above the normalised continuum (continuum placement
        # in cool stars is uncertain by a few per cent)
        keep &= data.smooth[cand] - 1.0 >= 3.0 * min_depth
    return cand[keep]


def _refined_positions(data, s, peaks):
    """Wavelengths of the peaks at pixels ``peaks`` of ``s``, each refined by a parabola (in pixels)."""
    peaks = np.asarray(peaks, int)
    frac = np.zeros(peaks.size)
    inner = (peaks > 0) & (peaks < s.size - 1)
    p = peaks[inner]
    a, b, c = s[p - 1], s[p], s[p + 1]
    den = a - 2 * b + c
    with np.errstate(divide="ignore", invalid="ignore"):
        frac[inner] = np.where(den < 0, 0.5 * (a - c) / den, 0.0)
    return np.interp(peaks + np.minimum(np.maximum(frac, -0.5), 0.5), np.arange(s.size), data.wave)
