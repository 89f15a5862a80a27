"""The normalised FFT cross-correlation, its peak, and the CCF about the peak.

Every lag is normalised by the overlap actually used (a zero-normalised correlation: means
and energies of both sides over the overlap), from six FFT products of the weighted data
arrays with the template arrays (:class:`Correlation`). The integer-lag peak is refined by
evaluating the correlation as a Fourier series at fractional lags (band-limited
interpolation, no parabola "peak locking").

Scoring many candidate templates against one spectrum (:func:`template_peaks`) needs only the
integer-lag peak of each; the spectrum's transforms (:class:`ObservedSide`) are made once.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy import fft as sfft

from ..errors import AnalysisError
from .grid import LagWindow, highpass, resampled_noise_variance, turns
from .prepared import full_cover

__all__ = ["ObservedSide", "PeakSearch", "Correlation", "Peak", "PeakCCF", "correlation_arrays",
           "observed_side", "noise_ceiling", "MIN_CEILING_SQUARED", "best_lag", "integer_peak", "quick_peak", "coverage_rows", "template_peaks",
           "best_index", "refine", "ccf_about", "fwhm_pixels", "single_star_ccf", "correlate", "ccf_about_peak"]


# ---------------------------------------------------------------------------
# The spectrum's side of every correlation
# ---------------------------------------------------------------------------
class ObservedSide(NamedTuple):
    """Weighted data arrays (w d, w, w d^2) of one spectrum, their FFTs and the total weight; ``ceiling``
    the normalised correlation a template equal to the star's noiseless spectrum would reach against
    these data (:func:`noise_ceiling`)."""

    weight: np.ndarray
    arrays: tuple
    ffts: tuple
    total_weight: float
    ceiling: float = 1.0
    height_noise: float = 0.0
    #: the three arrays as the rows of one (3, n) array (``arrays`` are its rows), or None
    stacked: np.ndarray | None = None


class PeakSearch(NamedTuple):
    """Where a correlation peak may lie: one spectrum's side, its lag window, the least overlap.

    A lag counts only where it uses at least ``min_overlap`` of the spectrum's weight.
    """

    side: ObservedSide
    lags: LagWindow
    min_overlap: float


def correlation_arrays(d_minus_1, weight):
    """(w d, w, w d^2) with d the data minus their weighted mean."""
    mean = np.sum(weight * d_minus_1) / np.sum(weight)
    d = d_minus_1 - mean
    return (weight * d, weight, weight * d * d)


def _median(a):
    """``np.median`` of a 1-D float array, the same value (its partition and its mean of the middle two
    values, NaN when any is), without its generic wrapper (10 against 38 us for 3,000 values, measured)."""
    k = a.size // 2
    p = np.partition(a, (k - 1, k, a.size - 1) if a.size % 2 == 0 else (k, a.size - 1))
    if np.isnan(p[-1]):
        return np.nan
    return (p[k - 1] + p[k]) / 2.0 if a.size % 2 == 0 else p[k]


def observed_side(observed, lags):
    """The :class:`ObservedSide` of an :class:`~.grid.ObservedGrid`, high-pass filtered as templates are."""
    # data side: weights = taper x inverse variance (normalised), zero on masked pixels
    w_noise = 1.0 / np.maximum(observed.sigma, 1e-12) ** 2
    w_noise /= _median(w_noise[observed.valid])
    weight = observed.taper * w_noise
    stacked = np.stack(correlation_arrays(highpass(observed.flux - 1.0, lags.hp_sigma, observed.valid), weight))
    stacked.flags.writeable = False
    arrays = tuple(stacked)   # (its rows: the same values, and the stack made once for every use)
    d_ffts = tuple(sfft.rfft(stacked, lags.m, axis=1))   # (one call for the three)
    return ObservedSide(weight, arrays, d_ffts, float(np.sum(weight)),
                        *noise_ceiling(observed, weight, arrays, lags.hp_sigma), stacked=stacked)


#: Least squared ceiling :func:`noise_ceiling` returns (our choice: data read as almost all noise keep a
#: finite scale for the template weights).
MIN_CEILING_SQUARED = 0.01


def noise_ceiling(observed, weight, arrays, hp_sigma=None):
    """(ceiling, height noise): sqrt(1 - noise energy / data energy), the normalised correlation a perfect
    template would reach, and sqrt((1 - ceiling^2) / n), the noise's standard deviation of a height.

    With data d = s + n, the correlation with any template t is <s + n, t> / (|s + n| |t|), whose
    expectation is the noiseless one times |s| / |s + n| (the noise adds to the data's energy, not
    to the cross term): every template's height is scaled by this one factor, the ceiling.
    The noise energy is the weighted sum over the grid of each point's pixel variance
    (``observed.sigma``) times the share of it the resampling keeps
    (:func:`~.grid.resampled_noise_variance`), less what the high-pass (Gaussian of ``hp_sigma`` grid
    pixels) takes out of white noise: x - g * x has variance 1 - 2 g(0) + sum g^2 = 1 - (2 / sqrt(2 pi) -
    1 / (2 sqrt(pi))) / sigma (common practice: a normalised Gaussian kernel's sums; 1.4% at the user path's
    38 pixels). The data energy is the weighted variance of the filtered data (``arrays``: w d, w, w d^2).

    The height's noise is the cross term's, <n, t> / (|d| |t|): its variance is a pixel's noise over
    the data's energy per pixel, (1 - ceiling^2) / n with n the native pixels that carry the data (each
    an independent noise; common practice for white noise), the scale below which two templates' heights
    cannot be told apart.
    """
    a1, a2, a3 = arrays
    total = float(np.sum(a2))
    data = float(np.sum(a3)) - float(np.sum(a1)) ** 2 / total if total > 0 else 0.0
    if not data > 0:
        return 1.0, 0.0
    share = resampled_noise_variance(observed.spline_x, observed.grid, observed.cell)
    noise = float(np.einsum("i,i,i->", weight, observed.sigma, observed.sigma * share))
    if hp_sigma:
        noise *= max(1.0 - (2.0 / math.sqrt(2.0 * math.pi) - 0.5 / math.sqrt(math.pi)) / hp_sigma, 0.0)
    squared = min(1.0, max(1.0 - noise / data, MIN_CEILING_SQUARED))
    pixels = max(int(np.count_nonzero(observed.native_sigma)), 1)
    return math.sqrt(squared), math.sqrt((1.0 - squared) / pixels)


# ---------------------------------------------------------------------------
# The correlation of one template
# ---------------------------------------------------------------------------
class Correlation:
    """Zero-normalised cross-correlation of data-side arrays with one template, at any lag.

    Lag s (pixels of the grid, positive = spectrum redshifted relative to the template)
    maps to FFT index k = pad - s of C(a, b)[k] = sum_x a(x) b(x + k).
    """

    def __init__(self, data_arrays, template, pad, m, d_ffts=None):
        self.pad = pad
        self.m = m
        a1, a2, a3 = data_arrays
        A1, A2, A3 = d_ffts if d_ffts is not None else (sfft.rfft(a1, m), sfft.rfft(a2, m), sfft.rfft(a3, m))
        self._parts = (A1, A2, A3) + tuple(template.ffts(m))
        self._x = self._x3 = None
        # the data's own sums of a1, a3, a2 (their transforms' zero frequency): the three coverage rows
        # at lags where the template's coverage is 1 on every pixel used (:meth:`rows` with ``full``)
        self.cover_sums = np.array([A1[0].real, A3[0].real, A2[0].real])
        self.freq = np.arange(A1.size)
        self._xw = None

    @property
    def X(self):
        """The six cross-spectra, rows C(a1,T), C(a2,T), C(a2,T2), C(a1,V), C(a3,V), C(a2,V), made on first
        use (with a full coverage only the first three are used: :attr:`X3`)."""
        if self._x is None:
            A1, A2, A3, BT, BT2, BV = self._parts
            self._x = np.concatenate([self.X3, np.stack([np.conj(A1) * BV, np.conj(A3) * BV, np.conj(A2) * BV])])
        return self._x

    @property
    def X3(self):
        """The first three rows of :attr:`X` (the same products), made on first use."""
        if self._x3 is None:
            A1, A2, _, BT, BT2, _ = self._parts
            self._x3 = np.stack([np.conj(A1) * BT, np.conj(A2) * BT, np.conj(A2) * BT2])
        return self._x3

    @property
    def Xw(self):
        """The cross-spectra weighted for a real inverse DFT (2, and 1 at zero and Nyquist frequency),
        made on first use: only :meth:`at` needs them."""
        if self._xw is None:
            wts = np.full(self.X.shape[1], 2.0)
            wts[0] = 1.0
            if self.m % 2 == 0:
                wts[-1] = 1.0
            self._xw = self.X * wts
        return self._xw

    @staticmethod
    def combine(c):
        """(normalised CCF, overlap weight) from the six correlation rows."""
        c1t, c2t, c2t2, c1v, c3v, c2v = c
        nw = np.where(c2v > 1e-9, c2v, np.nan)
        num = c1t - c1v * c2t / nw
        e = c2t2 - c2t ** 2 / nw
        d = c3v - c1v ** 2 / nw
        with np.errstate(invalid="ignore", divide="ignore"):
            # (np.maximum, not np.clip: the same values, NaN kept, without clip's wrapper per call)
            return num / np.sqrt(np.maximum(e, 1e-300) * np.maximum(d, 1e-300)), c2v

    def integer_lags(self, frac=0.0, k=None, single=False):
        """Normalised CCF at lags s = pad - k + ... for k = 0..m-1 (or the indices ``k`` only), shifted
        by ``frac`` pixels of s; ``single``: the inverse transforms in single precision (half the
        time, ~1e-7 of the peak), the normalisation in double."""
        return self.combine(self.rows(frac, k, single))

    def rows(self, frac=0.0, k=None, single=False, full=False):
        """The six correlation rows (before :meth:`combine`) of :meth:`integer_lags`, as doubles;
        ``full``: the template's coverage is 1 on every pixel these lags use (see
        :func:`~.prepared.full_cover`), and the three coverage rows are the data's sums, not transformed."""
        X = self.X3 if full else self.X
        if frac:
            X = X * turns(-2.0 * np.pi * frac / self.m, X.shape[1])
        c = sfft.irfft(X.astype(np.complex64) if single else X, self.m, axis=1)
        c = np.asarray(c if k is None else c[:, k], np.float64)
        if full:
            c = np.concatenate([c, np.repeat(self.cover_sums[:, None], c.shape[1], axis=1)])
        return c

    def at(self, s):
        """Normalised CCF at fractional lags ``s`` (array) by Fourier-series evaluation."""
        s = np.atleast_1d(np.asarray(s, float))
        k = self.pad - s
        ph = np.exp(2j * np.pi * np.outer(self.freq, k) / self.m)  # (nf, ns)
        c = (self.Xw @ ph).real / self.m
        return self.combine(c)[0]


# ---------------------------------------------------------------------------
# Integer-lag peaks, one template or many
# ---------------------------------------------------------------------------
def best_lag(ccf, c2v, pad, smax, min_overlap, total_weight):
    """(lag, height) of the highest CCF value within |lag| <= smax and enough overlap, or None."""
    k = np.arange(0, 2 * pad + 1)
    s = pad - k
    vals = ccf[k]
    ok = (np.abs(s) <= smax) & (c2v[k] >= min_overlap * total_weight) & np.isfinite(vals)
    if not ok.any():
        return None
    j = np.argmax(np.where(ok, vals, -np.inf))
    return int(s[j]), float(vals[j])


def integer_peak(corr, pad, smax, min_overlap, total_weight):
    """Integer-lag peak within |s| <= smax: (s_int, height), or None (see :func:`best_lag`)."""
    ccf, c2v = corr.integer_lags()
    return best_lag(ccf, c2v, pad, smax, min_overlap, total_weight)


def quick_peak(d_ffts, template, vrows, pad, m, smax, min_overlap, total_weight):
    """Integer-lag peak height of one template, reusing the coverage rows shared by the synthetic grid."""
    A1, A2, _ = d_ffts
    BT, BT2, _ = template.ffts(m)
    c = sfft.irfft(np.stack([np.conj(A1) * BT, np.conj(A2) * BT, np.conj(A2) * BT2]), m, axis=1)
    ccf, c2v = Correlation.combine((c[0], c[1], c[2], vrows[0], vrows[1], vrows[2]))
    return best_lag(ccf, c2v, pad, smax, min_overlap, total_weight)


def coverage_rows(d_ffts, template, m):
    """The three correlation rows that involve only the template's coverage V."""
    A1, A2, A3 = d_ffts
    BV = template.ffts(m)[2]
    return sfft.irfft(np.stack([np.conj(A1) * BV, np.conj(A3) * BV, np.conj(A2) * BV]), m, axis=1)


def template_peaks(search, candidates, shared_coverage=None):
    """Integer-lag peak, (lag, height) or None, of each prepared template in ``candidates``.

    ``shared_coverage``: the coverage rows (:func:`coverage_rows`) when every candidate has
    the same coverage (built-in templates on one grid); else each candidate's own are used.
    """
    side, lags = search.side, search.lags
    peaks = []
    for t in candidates:
        vrows = shared_coverage if shared_coverage is not None else coverage_rows(side.ffts, t, lags.m)
        peaks.append(quick_peak(side.ffts, t, vrows, lags.pad, lags.m, lags.smax, search.min_overlap,
                                side.total_weight))
    return peaks


def best_index(peaks):
    """Index of the highest of ``peaks`` ((lag, height) or None), the first on ties; None if none."""
    best = None
    for i, pk in enumerate(peaks):
        if pk is not None and (best is None or pk[1] > peaks[best][1]):
            best = i
    return best


# ---------------------------------------------------------------------------
# The refined peak and the CCF about it
# ---------------------------------------------------------------------------
class Peak(NamedTuple):
    """Sub-pixel correlation peak: lag (grid pixels), normalised height, curvature there."""

    lag: float
    height: float
    curvature: float


def refine(corr, s_int):
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
    return Peak(x0, height, curv)


def correlate(search, template, where=None):
    """(:class:`Correlation`, refined :class:`Peak`) of the spectrum with one prepared template.

    Raises :class:`~specan.errors.AnalysisError` (about ``where``) when no positive peak lies
    in the search range.
    """
    side, lags = search.side, search.lags
    corr = Correlation(side.arrays, template, lags.pad, lags.m, side.ffts)
    pk = integer_peak(corr, lags.pad, lags.smax, search.min_overlap, side.total_weight)
    if pk is None or not np.isfinite(pk[1]) or pk[1] <= 0:
        raise AnalysisError(f"no correlation peak with template {template.name}", where)
    return corr, refine(corr, pk[0])


def ccf_about(corr, s0, half, single=False, rows=False, full=False):
    """Normalised CCF at s0 + j for integer j in [-half, half] (exact fractional centring; ``single``:
    see :meth:`Correlation.integer_lags`; ``full``: see :meth:`Correlation.rows`): (j, ccf, overlap
    weight), and the six correlation rows (:meth:`Correlation.rows`) after them with ``rows``."""
    frac = s0 - math.floor(s0)
    base = math.floor(s0)
    j = np.arange(-half, half + 1)
    k = (corr.pad - (base + j)) % corr.m  # lag s = base + frac + j  <->  index pad - base - j after shift
    c = corr.rows(frac=frac, k=k, single=single, full=full)
    ccf, c2v = corr.combine(c)
    return (j, ccf, c2v, c) if rows else (j, ccf, c2v)


def fwhm_pixels(j, vals, h):
    """Full width (pixels) at ``h``/2 of the CCF ``vals`` about j = 0; NaN when it does not fall that low."""
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


def single_star_ccf(template, valid, weight, pad, m, s0, half, data_rows=None, full=False):
    """CCF a noiseless star identical to the template, shifted by s0, would give (1 at the peak).

    The model star goes through the same steps as the data (window, masks, high-pass, weights),
    so edge and gap effects of those steps are in the model, not mistaken for noise.
    ``data_rows``: the data's six correlation rows about s0 (:func:`ccf_about` with ``rows``);
    where the template covers every pixel the data weigh, the model has the data's weights, so
    the three rows of the weights alone are the data's and are not computed again. ``full``: the
    template's coverage is 1 on every pixel the lags s0 +- ``half`` use (:func:`~.prepared.full_cover`):
    the model is known everywhere and its coverage rows are its own sums, not transformed.
    """
    n = valid.size
    shift = turns(-2.0 * np.pi * (s0 - pad) / m, m // 2 + 1)
    # template(x - s0) on the data window, and where the template has gaps (its own tellurics,
    # its ends) the model star is unknown: those pixels are left out rather than treated as
    # continuum (both shifted in one inverse transform of the template's cached spectra)
    # (single precision in the transforms: the model is compared with a CCF whose noise is far above
    # 1e-7 of its peak; it sets error estimates and flags, not the velocity)
    if full:
        model = np.asarray(sfft.irfft((template.model_ffts(m)[0] * shift).astype(np.complex64), m)[:n], np.float64)
        known = np.ones(n, bool)
    else:
        model, known = np.asarray(sfft.irfft((template.model_ffts(m) * shift).astype(np.complex64), m,
                                             axis=1)[:, :n], np.float64)
        known = known > 0.5
    ok = valid & known
    model = highpass(model, template.hp_sigma, ok, single=True)
    if data_rows is not None and not np.any((weight > 0) & ~known):
        # rows (w d, T), (w, T), (w, T2), (w d, V), (w d^2, V), (w, V): those of w alone are the data's
        a1, _, a3 = correlation_arrays(model, weight)
        BT, _, BV = template.ffts(m)
        frac = s0 - math.floor(s0)
        if full:   # the model's coverage rows are its own sums: only its cross row is transformed
            X = (np.conj(sfft.rfft(a1, m)) * BT)[None]
        else:
            A1, A3 = sfft.rfft(np.stack([a1, a3]), m, axis=1)
            X = np.stack([np.conj(A1) * BT, np.conj(A1) * BV, np.conj(A3) * BV])
        if frac:
            X = X * turns(-2.0 * np.pi * frac / m, X.shape[1])
        k = (pad - (math.floor(s0) + np.arange(-half, half + 1))) % m
        c = np.asarray(sfft.irfft(X.astype(np.complex64), m, axis=1)[:, k], np.float64)
        c1v, c3v = (np.sum(a1), np.sum(a3)) if full else (c[1], c[2])
        mvals, _ = Correlation.combine((c[0], data_rows[1], data_rows[2], c1v, c3v, data_rows[5]))
    else:
        mcorr = Correlation(correlation_arrays(model, weight * ok), template, pad, m)
        _, mvals, _ = ccf_about(mcorr, s0, half, single=True)
    if not np.isfinite(mvals[half]) or mvals[half] <= 0:
        return None
    return mvals / mvals[half]


class PeakCCF(NamedTuple):
    """The CCF about the peak: lags ``j`` (pixels from the peak), ``values``, the single-star
    ``model`` (1 at the peak; None when it cannot be formed), the ``residual`` after removing
    it scaled to the peak height, and the FWHM (pixels) of the values."""

    j: np.ndarray
    values: np.ndarray
    model: np.ndarray | None
    residual: np.ndarray
    fwhm_px: float


def ccf_about_peak(corr, template, valid, weight, lags, peak):
    """The :class:`PeakCCF` for ``|j| <= lags.half`` about ``peak`` (data ``valid`` and ``weight``)."""
    s0, h = peak.lag, peak.height
    # CCF about the peak, and the single-star shape (the template seen through the same window), in
    # single precision: they give the Tonry & Davis error, the second peak and the CCF reported
    # (where the template covers every pixel these lags use, the coverage rows are the data's sums)
    full = full_cover([template], [s0], lags.pad, lags.n, lags.half + 1)
    j, vals, _, rows = ccf_about(corr, s0, lags.half, single=True, rows=True, full=full)
    model = single_star_ccf(template, valid, weight, lags.pad, lags.m, s0, lags.half, data_rows=rows, full=full)
    resid = vals - h * model if model is not None else vals
    return PeakCCF(j, vals, model, resid, fwhm_pixels(j, vals, h))
