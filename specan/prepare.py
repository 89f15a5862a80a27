"""Preparation: masks, S/N, continuum normalisation, resolution degrading.

``prepare(spectrum)`` is what every later stage starts from: bad and telluric
pixels masked, S/N measured, flux divided by a robust continuum.
"""

from __future__ import annotations

import functools
import warnings

import astropy.units as u
import numpy as np

from .contents import forgettable
from .errors import AnalysisError
from .linelist import in_bands, masked_telluric_bands
from .obsinfo import META_KEY, get_info, replace_parts, spectrum_arrays, vacuum_to_air
from .resolution import degrade

__all__ = ["TELLURIC_BANDS_AIR", "mask_bad", "mask_telluric", "snr", "fit_continuum", "normalize",
           "normalise_arrays", "degrade", "prepare"]

#: Continuum anchors this many standard deviations (of a maximum of noisy pixels) below the
#: fit keep full weight. Measured with error arrays, S/N 10-300: on flat spectra the fit's
#: bias is +0.2 sigma at 1.0 against +1.1 with no tolerance and 0.0 at 2.0; on a synthetic
#: A star +0.1 to 0.0 sigma at 1.0 (+0.7 to +0.9 with none), -0.2 to -0.4 at 2.0; on the
#: Kurucz Sun (5000-6800 A, S/N 30 and 100) 2.3% and 1.5% low at 1.0, 3.3% and 2.0% at 2.0,
#: +0.2% and -0.9% with none, whose noise bias offset the line blanketing by chance.
#: 1.0 is the compromise.
ANCHOR_TOLERANCE = 1.0


#: Telluric absorption bands masked by default: (lo, hi, id), air wavelengths in Angstrom,
#: read from the packaged telluric list (:func:`specan.linelist.masked_telluric_bands`).
TELLURIC_BANDS_AIR = masked_telluric_bands()


def mask_bad(spectrum):
    """Mask non-finite, non-positive and zero-weight pixels.

    Parameters
    ----------
    spectrum : specutils.Spectrum

    Returns
    -------
    specutils.Spectrum
        Same data, ``mask`` True where the pixel is unusable.
    """
    wave, flux, err, mask = spectrum_arrays(spectrum)
    return replace_parts(spectrum, mask=mask | _bad_pixels(flux, err, get_info(spectrum).normalized))


def _bad_pixels(flux, err, normalized):
    """True where flux or error is unusable (non-finite, non-positive flux, zero weight)."""
    bad = ~np.isfinite(flux)
    if not normalized:
        bad |= flux <= 0
    if err is not None:
        bad |= ~np.isfinite(err) | (err <= 0)
    return bad


def telluric_mask(wave_aa, medium="air", bands=TELLURIC_BANDS_AIR):
    """Boolean array, True inside the telluric bands (wavelengths in ``medium``)."""
    wave_aa = np.asarray(wave_aa, float)
    return in_bands(wave_aa if medium == "air" else vacuum_to_air(wave_aa * u.AA).to_value(u.AA), bands)


def mask_telluric(spectrum, bands=TELLURIC_BANDS_AIR):
    """Mask telluric absorption bands (observed frame; air band edges converted to the file's medium).

    Returns
    -------
    specutils.Spectrum
    """
    wave, flux, err, mask = spectrum_arrays(spectrum)
    mask |= telluric_mask(wave, get_info(spectrum).medium, bands)
    return replace_parts(spectrum, mask=mask)


def snr(spectrum, resolving_power=None):
    """Median S/N per pixel: the best estimate, and the error array's and the flux's apart.

    With an error array the S/N is the median of flux / error (the file's own
    statement); the flux-based estimate (:func:`specan.noise.flux_noise`: the white-noise
    plateau of the power spectrum near Nyquist, the lines' leak into it removed, after
    Brault & White 1971) is always made too, so the two can be compared. Without an error
    array the flux-based estimate is the answer. DER_SNR (Stoehr et al. 2008) alone counts
    the lines of line-rich spectra as noise (S/N 43 for the Kurucz Sun at R 2000 and a
    true S/N 300, measured); it remains the fallback where the pixels are correlated.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    resolving_power : float, optional
        Default ``info.resolving_power``; else 2.5 pixels per FWHM are assumed.

    Returns
    -------
    dict
        ``snr`` (the best estimate), ``snr_source`` ("error array" or "flux"),
        ``snr_err_array`` (or None), ``snr_flux`` (or None: a noiseless model),
        ``snr_flux_method``.
    """
    wave, flux, err, mask = spectrum_arrays(spectrum)
    info = get_info(spectrum)
    return _snr_arrays(wave, flux, err, mask, info.path, resolving_power or info.resolving_power)


def _snr_arrays(wave, flux, err, mask, path=None, resolving_power=None, noise_only=None):
    """:func:`snr` on arrays; ``noise_only``: masked pixels that hold noise all the same (see flux_noise)."""
    from .noise import flux_noise, pixels_per_fwhm

    good = ~mask & np.isfinite(flux)
    if good.sum() < 10:
        raise AnalysisError("fewer than 10 usable pixels: cannot measure S/N", path)
    est = flux_noise(flux, good, pixels_per_fwhm(wave, resolving_power), noise_only=noise_only)
    from_err = None
    if err is not None:
        ok = good & np.isfinite(err) & (err > 0)
        if ok.sum() >= 10:
            from_err = float(np.median(flux[ok] / err[ok]))
    best, source = (from_err, "error array") if from_err is not None else (est.snr, "flux")
    return {"snr": best, "snr_source": source, "snr_err_array": from_err, "snr_flux": est.snr,
            "snr_flux_method": est.method}


def fit_continuum(spectrum, smoothing=300.0 * u.AA, window=12.0 * u.AA, below_weight=0.005, max_iter=50):
    """Fit the continuum as a smooth upper envelope (asymmetric smoothing spline).

    1. Anchors: the highest pixel in each ``window`` (the continuum shows between
       lines, so the local maxima are the best continuum points), corrected for the
       upward bias that taking the maximum of noisy pixels brings (expected maximum
       of k normal deviates, Blom's approximation).
    2. A penalised cubic spline (Eilers & Marx 1996; a fast stand-in for a smoothing
       spline, see :class:`_PSpline`) through the anchors with asymmetric weights: anchors below the fit get weight
       ``below_weight``, those above weight 1, iterated to convergence (asymmetric
       least squares in the manner of Eilers' baseline method, turned upside down).
       Anchors less than :data:`ANCHOR_TOLERANCE` times their noise below the fit
       count as above it, so noise does not lift the fit. The noise is the error
       array's or, without one, estimated from the flux (:func:`_noise_without_errors`).
       Anchors inside 100+ Angstrom Balmer wings or molecular bands lie below the fit
       and hardly pull on it; the spline bridges them with minimum curvature.

    Heavily line-blanketed regions (the blue of G-M stars at R ~ 2000) never reach
    the true continuum between lines; there the fit is a pseudo-continuum through the
    highest points (on the Kurucz solar model, 8-12% below the true continuum over
    4000-5000 A; measured).

    Parameters
    ----------
    spectrum : specutils.Spectrum
    smoothing : Quantity
        Wavelength scale below which structure is treated as lines, not continuum.
    window : Quantity
        Width of the anchor windows (a few resolution elements).
    below_weight : float
        Weight of anchors below the fit (0 < w << 1).
    max_iter : int

    Returns
    -------
    astropy.units.Quantity
        Continuum at every pixel, in the flux unit.
    """
    wave, flux, err, mask = spectrum_arrays(spectrum)
    full = _continuum_arrays(wave, flux, err, mask, smoothing, window, below_weight, max_iter,
                             get_info(spectrum).path)
    return full * spectrum.flux.unit


def _continuum_arrays(wave, flux, err, mask, smoothing=300.0 * u.AA, window=12.0 * u.AA, below_weight=0.005,
                      max_iter=50, path=None):
    """:func:`fit_continuum` on plain arrays (the one implementation both paths share)."""
    good = ~mask & np.isfinite(flux)
    if good.sum() < 20:
        raise AnalysisError("fewer than 20 usable pixels: cannot fit a continuum", path)
    x, y = wave[good], flux[good]
    step = np.median(np.diff(x))
    k = int(np.clip(round(window.to_value(u.AA) / step), 1, max(1, x.size // 8)))
    ax, ay = _window_maxima(x, y, k)
    noise = err[good] if err is not None else _noise_without_errors(y)
    ay, sig = _lowered_for_noise(ay, noise, k)
    ax, ay, sig = _without_spikes(ax, ay, sig)
    fit = _upper_envelope(ax, ay, sig, smoothing, below_weight, max_iter)
    full = fit(wave)
    # Outside the anchors hold the end values rather than extrapolating a cubic (both ends in one
    # call: the spline's value at a point does not depend on the other points asked for)
    first, last = fit(ax[[0, -1]])
    full[wave < ax[0]] = first
    full[wave > ax[-1]] = last
    return full


def _window_maxima(x, y, k):
    """(wavelength, flux) of the highest pixel in each run of ``k`` pixels (the last run may be shorter)."""
    n = (x.size // k) * k
    xr, yr = x[:n].reshape(-1, k), y[:n].reshape(-1, k)
    j = np.argmax(yr, axis=1)
    rows = np.arange(j.size)
    ax, ay = xr[rows, j], yr[rows, j].copy()
    if n < x.size:  # the leftover pixels form a last, shorter window
        jl = n + int(np.argmax(y[n:]))
        ax, ay = np.append(ax, x[jl]), np.append(ay, y[jl])
    return ax, ay


def _lowered_for_noise(ay, e, k):
    """Anchors lowered by the expected maximum of ``k`` noisy pixels, and the spread of that maximum.

    Returns the anchors and, per anchor, the standard deviation of a maximum of ``k``
    pixels of its window's noise ``e`` (zeros where there is no noise to tell).
    """
    # Each anchor (the maximum of k pixels) is lowered by the expected maximum of k normal
    # deviates (Blom 1958), and anchors up to ANCHOR_TOLERANCE standard deviations of such a
    # maximum below the fit keep full weight, so the fit runs near the middle of the noise
    # instead of along its upper edge. The noise is the error array's, or, without one,
    # what _noise_without_errors can tell from the flux (nothing, for noiseless models and
    # for spectra whose noise was smoothed by resampling).
    sig = np.zeros(ay.size)
    if not (k > 1 and np.any(e > 0)):
        return ay, sig
    n = (e.size // k) * k
    e = np.where(np.isfinite(e) & (e > 0), e, np.nan)
    windows = e[:n].reshape(-1, k)
    # only the windows with some noise (often few: on noiseless models nanmedian spent most of
    # its time warning about the all-NaN ones; the others' medians are the same)
    some = ~np.all(np.isnan(windows), axis=1)
    sig_w = np.full(windows.shape[0], np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN windows
        if some.any():
            sig_w[some] = _row_nanmedian(windows[some])
        if n < e.size:
            sig_w = np.append(sig_w, np.nanmedian(e[n:]))
    sig = np.where(np.isfinite(sig_w), sig_w, 0.0)
    e_max, sd_max = _normal_maximum_moments(k)
    ay -= sig * e_max
    return ay, sig * sd_max


def _row_nanmedian(a):
    """``np.nanmedian(a, axis=1)`` of a 2-D array whose rows each hold a finite value, the same numbers.

    Sorted rows (NaN last), the middle finite value or the mean of the two middle ones, as
    numpy takes it ((a + b) / 2); numpy's own goes through masked arrays for small inputs,
    ten times slower here (measured).
    """
    srt = np.sort(a, axis=1)
    n = np.sum(np.isfinite(srt), axis=1)
    rows = np.arange(srt.shape[0])
    lo, hi = srt[rows, (n - 1) // 2], srt[rows, n // 2]
    return np.where(n % 2 == 1, lo, (lo + hi) / 2.0)


def _without_spikes(ax, ay, sig):
    """The anchors without spikes (emission lines, cosmic rays)."""
    # Emission lines and cosmic rays make anchors that stand far above their neighbours;
    # an upper envelope would follow them, so they are dropped: an anchor more than
    # 4 robust sigma (and 2%) above the running median of 7 anchors is a spike.
    if ax.size < 7:
        return ax, ay, sig
    from scipy.ndimage import median_filter

    ref = median_filter(ay, size=7, mode="nearest")
    dev = ay - ref
    mad = 1.4826 * np.median(np.abs(dev))
    spike = dev > np.maximum(4.0 * mad, 0.02 * np.abs(ref))
    if spike.any() and (~spike).sum() >= 8:
        return ax[~spike], ay[~spike], sig[~spike]
    return ax, ay, sig


def _upper_envelope(ax, ay, sig, smoothing, below_weight, max_iter):
    """The penalised spline through the anchors, reweighted until anchors below it stop changing."""
    scale = smoothing.to_value(u.AA)
    smoother = _PSpline(ax, lam=(scale / (2 * np.pi)) ** 4, knot_spacing=scale / 10.0)
    weights = np.ones(ax.size)
    tolerance = ANCHOR_TOLERANCE * sig
    for _ in range(max_iter):
        coef = smoother.coefficients(ay, weights)
        # the curve at the anchors as the basis matrix's product: what the spline gives there, to the bit
        # (tests/test_prepare.py), without building and calling a spline each reweighting
        new = np.where(ay >= smoother.basis @ coef - tolerance, 1.0, below_weight)
        if not (new != weights).any():     # np.array_equal's answer (no NaN here), without its checks
            break
        weights = new
    return smoother.curve(coef)


def _noise_without_errors(flux, half_width=100):
    """Per-pixel noise (flux units) of a spectrum without an error array, or zeros.

    DER_SNR's second difference (Stoehr et al. 2008) also measures lines in
    low-resolution, line-rich spectra (S/N 45 for the noiseless Kurucz Sun at R~2000,
    measured). A sixth difference passes white noise as well but suppresses resolved
    structure far more, so the ratio of the two (running medians over
    ``2 * half_width + 1`` pixels) tells noise from lines. Measured: 0.17-0.26 on
    the noiseless Kurucz Sun sampled at 2 pixels per FWHM, about 0.003 on the
    JHC (1984) spectra (their noise is correlated by resampling), 0.75 on the Sun at
    S/N 30 and 0.99 on white noise. The sixth-difference noise is used with weight
    0 below a ratio of 0.3, rising to 1 at 0.6 (our choice between those figures).
    """
    from scipy.ndimage import median_filter

    y = np.asarray(flux, float)
    if y.size < 4 * half_width:
        return np.zeros(y.size)
    # each difference divided by the root of its summed squared coefficients: sd 1 on unit noise
    d6 = np.abs(np.diff(y, 6)) / np.sqrt(924.0)                    # 924 = C(12, 6)
    d2 = np.abs(2.0 * y[2:-2] - y[:-4] - y[4:]) / np.sqrt(6.0)      # DER_SNR's
    size = 2 * half_width + 1
    # both running medians in one call: each difference with its edge values repeated (to the length of
    # the flux, then half a window more on either side: what mode="nearest" does), one after the other;
    # no window reaches the other difference, so each median is of the same values (tests/test_prepare.py)
    n, h = y.size, half_width
    both = median_filter(np.concatenate([np.full(h + 3, d6[0]), d6, np.full(h + 3, d6[-1]),
                                         np.full(h + 2, d2[0]), d2, np.full(h + 2, d2[-1])]), size, mode="nearest")
    s6 = 1.4826 * both[h:h + n]     # MAD -> sigma, normal noise
    s2 = 1.4826 * both[3 * h + n:3 * h + 2 * n]
    with np.errstate(divide="ignore", invalid="ignore"):
        weight = np.clip((s6 / s2 - 0.3) / 0.3, 0.0, 1.0)
    return np.where(np.isfinite(weight), weight * s6, 0.0)


@functools.lru_cache(maxsize=64)   # k is the same for every spectrum of a set-up; the integral is not free
def _normal_maximum_moments(k):
    """Mean and standard deviation of the largest of ``k`` standard normal deviates.

    The mean by Blom's (1958) approximation; the spread by integrating the density of the
    maximum, k phi(x) Phi(x)^(k-1), on a grid (no closed form; cheap).
    """
    from scipy.stats import norm

    mean = float(norm.ppf((k - 0.375) / (k + 0.25)))
    x = np.linspace(-6.0, 8.0, 2801)
    dens = k * norm.pdf(x) * norm.cdf(x) ** (k - 1)
    m1 = np.trapezoid(x * dens, x)
    sd = float(np.sqrt(max(np.trapezoid(x * x * dens, x) - m1 * m1, 0.0)))
    return mean, sd


class _PSpline:
    """Penalised cubic B-spline smoother (Eilers & Marx 1996, Statist. Sci. 11, 89).

    Minimises sum w (y - f)^2 + lam * integral f''^2 like a smoothing spline, with the
    integral approximated by second differences of the coefficients divided by
    knot_spacing^3. Hand-written because scipy's exact ``make_smoothing_spline``
    spends ~30 ms per call in Python loops (measured) and the continuum fit calls it
    many times per spectrum; this costs about a millisecond.

    The normal equations of each reweighting are summed straight into their bands from the
    basis's stored entries (``np.bincount``), adding the same products in the same order
    (anchor by anchor) as the sparse product ``B^T diag(w) B`` does, so the coefficients are
    the same to the bit (tests/test_prepare.py); scipy.sparse's bookkeeping cost 0.3 ms a
    reweighting on 300 anchors, this 0.05 (measured).
    """

    def __init__(self, x, lam, knot_spacing):
        from scipy.interpolate import BSpline

        lo, hi = float(x[0]), float(x[-1])
        n_int = max(int(np.ceil((hi - lo) / knot_spacing)), 1)
        h = (hi - lo) / n_int if hi > lo else 1.0
        self.knots = lo + h * np.arange(-3, n_int + 4)
        # extrapolate=True: the same basis inside the knots (tests/test_prepare.py) without scipy's check of
        # the anchors against them (Python's min and max over the array, a fifth of the call) and without its
        # error where lo + h n_int rounds below hi (the last anchor then lies an ulp past the last knot)
        self.basis = BSpline.design_matrix(np.clip(x, lo, hi), self.knots, 3, extrapolate=True).tocsr()
        ncoef = self.basis.shape[1]
        self.lo, self.hi = lo, hi
        # The penalty D2^T D2 (D2: second differences of the coefficients) straight in LAPACK's
        # upper banded storage, bands[3 - k, j + k] = (D2^T D2)[j, j + k]: never a dense
        # (ncoef, ncoef) matrix, which grows with the square of the wavelength range (a model
        # spectrum from 0.15 to 300 microns asked for 74 GB). Its entries are small integers,
        # exact in any order, times lam / h^3: what scipy.sparse's product gave, to the bit.
        self.penalty_bands = (lam / h**3) * _penalty_counts(ncoef)
        # what every reweighting reads of the basis, looked up once (scipy.sparse's attributes are properties)
        self._stored = (self.basis.indices, self.basis.data, ncoef)
        self._solve = _banded_solver()
        # per pair of stored basis entries of one anchor (columns j <= l <= j + 3), where their
        # product goes in the bands
        B = self.basis
        per_row = np.diff(B.indptr)
        self.rows = np.repeat(np.arange(B.shape[0]), per_row)
        self.pairs = None
        if B.has_sorted_indices and per_row.size and np.all(per_row == per_row[0]):
            r = int(per_row[0])
            if r == 4 and np.all(np.diff(B.indices.reshape(-1, r), axis=1) == 1):
                # each anchor's four consecutive columns (what design_matrix gives): the pairs are the
                # same for every anchor, made once per anchor count (the general way's numbers)
                a, b, offset = _consecutive_pairs(B.shape[0])
            else:
                a, b, offset = _stored_pairs(B.indptr[:-1], B.indices, r)
            self.pairs = (a, b, (3 - offset) * ncoef + B.indices[b])
            # what every reweighting gathers of the basis: gathered once (the same products, elementwise)
            self._pair_data = (B.data[a], B.data[b], self.rows[b])

    def _normal_bands(self, w):
        """Upper bands of B^T diag(w) B + penalty, as the sparse product gives them (see the class docstring)."""
        B = self.basis
        if self.pairs is None:   # rows of unequal length (never seen from design_matrix): the sparse way
            normal = (B.T @ B.multiply(w[:, None])).tocsr()
            bands = np.zeros((4, B.shape[1]))
            for k in range(4):
                bands[3 - k, k:] = normal.diagonal(k)
            return bands + self.penalty_bands
        _, _, target = self.pairs
        data_a, data_b, rows_b = self._pair_data
        # B.data[a] * (B.data * w[rows])[b]: B.multiply(w[:, None]) at the pairs' second entries
        summed = np.bincount(target, weights=data_a * (data_b * w[rows_b]), minlength=4 * self._stored[2])
        return summed.reshape(4, -1) + self.penalty_bands

    def coefficients(self, y, w):
        """The spline's coefficients for data ``y`` with weights ``w`` at the anchors."""
        # The normal equations are banded (bandwidth 3): solve them as such. Dense
        # LAPACK through a busy multi-threaded BLAS was 30x slower here (measured). LAPACK's pbsv
        # called as scipy's solveh_banded calls it (upper bands; finite, since weights and anchors
        # are), without its argument checks, half of the call's time (measured)
        indices, data, ncoef = self._stored
        rhs = np.bincount(indices, weights=data * (w * y)[self.rows], minlength=ncoef)   # B^T (w y)
        _, coef, info = self._solve(self._normal_bands(w), rhs, lower=0, overwrite_ab=1, overwrite_b=1)
        if info != 0:
            from numpy.linalg import LinAlgError

            raise LinAlgError(f"continuum spline: banded solve failed (LAPACK pbsv info {info})")
        return coef

    def curve(self, coef):
        """The spline of coefficients ``coef`` as a function of wavelength (held constant outside the anchors)."""
        from scipy.interpolate import BSpline

        # knots and coefficients are contiguous float64 already: skip BSpline's checks (a third of a reweighting)
        spline = BSpline.construct_fast(self.knots, coef, 3, extrapolate=True)
        return lambda xx: spline(np.clip(np.asarray(xx, float), self.lo, self.hi))

    def fit(self, y, w):
        """:meth:`curve` of :meth:`coefficients`."""
        return self.curve(self.coefficients(y, w))


@functools.lru_cache(maxsize=16)
def _penalty_counts(ncoef):
    """D2^T D2 (second differences of ``ncoef`` coefficients) in LAPACK's upper banded storage (read only)."""
    second = np.array([1.0, -2.0, 1.0])
    counts = np.zeros((4, ncoef))
    for i in range(3):
        for j in range(i, 3):
            counts[3 - (j - i), j:j + ncoef - 2] += second[i] * second[j]
    counts.flags.writeable = False
    return counts


def _stored_pairs(starts, indices, r):
    """(a, b, column offset) of the pairs of stored basis entries of one anchor (row) whose columns
    differ by 0-3, ``starts`` each row's first stored entry, ``r`` entries a row, ``indices`` their
    columns; row by row (C order): each band entry gets its anchors' products in anchor order."""
    a = (starts[:, None, None] + np.arange(r)[None, :, None]).repeat(r, axis=2).reshape(-1, r * r)
    b = (starts[:, None, None] + np.arange(r)[None, None, :]).repeat(r, axis=1).reshape(-1, r * r)
    offset = indices[b] - indices[a]
    keep = (offset >= 0) & (offset <= 3)
    return a[keep], b[keep], offset[keep]


@forgettable
@functools.lru_cache(maxsize=16)
def _consecutive_pairs(rows):
    """(a, b, column offset) of the stored-entry pairs of ``rows`` anchors of four consecutive columns each.

    What :class:`_PSpline`'s general construction gives for such a basis, in its order (anchor by
    anchor, then a, then b): made once per anchor count (read only).
    """
    # stored entries numbered 0 .. 4 rows - 1 stand for their columns: within an anchor they differ as those do
    out = _stored_pairs(4 * np.arange(rows), np.arange(4 * rows), 4)
    for x in out:
        x.flags.writeable = False
    return out


@functools.lru_cache(maxsize=1)
def _banded_solver():
    """LAPACK's dpbsv (symmetric positive-definite banded solve), as scipy.linalg.solveh_banded uses it."""
    from scipy.linalg import get_lapack_funcs

    return get_lapack_funcs("pbsv", (np.zeros(1),))


def normalize(spectrum, continuum=None, **fit_options):
    """Divide by the continuum.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    continuum : Quantity, optional
        Continuum to divide by; fitted with :func:`fit_continuum` when not given.
    **fit_options
        Passed to :func:`fit_continuum`.

    Returns
    -------
    specutils.Spectrum
        Dimensionless normalised flux and uncertainty; ``meta["continuum"]`` holds
        the continuum and ``info.normalized`` is True.
    """
    if continuum is None:
        continuum = fit_continuum(spectrum, **fit_options)
    wave, flux, err, mask = spectrum_arrays(spectrum)
    meta = dict(spectrum.meta)
    return _divided(spectrum, flux, err, mask, continuum, meta, get_info(spectrum).copy())


def _divided(spectrum, flux, err, mask, continuum, meta, info):
    """:func:`normalize`'s result: the arrays divided by ``continuum``, ``info`` (a copy) marked normalised."""
    c = np.asarray(u.Quantity(continuum).to_value(spectrum.flux.unit), float)
    bad = ~np.isfinite(c) | (c <= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        nflux = np.where(bad, 1.0, flux / c)
        nerr = None if err is None else np.where(bad, np.inf, err / c)
    info.normalized = True
    meta[META_KEY] = info
    meta["continuum"] = u.Quantity(continuum)
    return replace_parts(spectrum, flux=nflux, err=nerr, mask=mask | bad, unit=u.dimensionless_unscaled, meta=meta)


def normalise_arrays(wave, flux, mask=None, telluric=True, medium="air"):
    """Continuum-normalised flux and mask of plain arrays, as :func:`prepare` gives them.

    For the package's own resampled copies of a spectrum (the parameter model's and the
    library comparison's pixels): the same masks and the same :func:`fit_continuum` with its
    default settings, so the flux is the one ``prepare`` returns for a Spectrum of these arrays
    (no error array, not yet normalised) to the last bit, without what such copies do not need:
    the S/N estimate (a quarter of ``prepare``'s time on them) and the Spectrum objects
    (specutils builds a WCS for each, three per call; together most of the rest, measured).

    Parameters
    ----------
    wave : numpy.ndarray
        Wavelengths (Angstrom, increasing) in ``medium``.
    flux : numpy.ndarray
        Flux (any unit; no error array).
    mask : numpy.ndarray, optional
        True where a pixel is bad already.
    telluric : bool
        Mask the telluric bands too, as ``prepare`` does by default.
    medium : {"air", "vacuum"}

    Returns
    -------
    flux, mask : numpy.ndarray
        Normalised flux (1 where the continuum is unusable) and the mask (True = bad).
    """
    wave = np.asarray(wave, float)
    flux = np.asarray(flux, float)
    mask = np.zeros(flux.shape, bool) if mask is None else np.array(mask, bool)
    mask |= _bad_pixels(flux, None, normalized=False)
    if telluric:
        mask |= telluric_mask(wave, medium)
    c = _continuum_arrays(wave, flux, None, mask)
    # as normalize() divides
    bad = ~np.isfinite(c) | (c <= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        nflux = np.where(bad, 1.0, flux / c)
    return nflux, mask | bad


def prepare(spectrum, telluric=True, continuum=True, **fit_options):
    """Mask, measure S/N and normalise: the input of every later stage.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        As returned by :func:`specan.read`.
    telluric : bool
        Mask the telluric bands of :data:`TELLURIC_BANDS_AIR`.
    continuum : bool
        Normalise by :func:`fit_continuum` (False: only masks and S/N).
    **fit_options
        Passed to :func:`fit_continuum`.

    Returns
    -------
    specutils.Spectrum
        Normalised (if asked), masked; ``info.snr``, ``info.snr_source``, ``info.snr_err_array``,
        ``info.snr_flux`` and ``info.snr_flux_method`` set (see :func:`snr`).
        A spectrum already normalised is returned unchanged.
    """
    info = get_info(spectrum)
    if info.normalized:
        return spectrum
    # One pass over the arrays (each Spectrum construction costs ~8 ms in specutils).
    wave, flux, err, mask = spectrum_arrays(spectrum)
    mask |= _bad_pixels(flux, err, normalized=False)
    defects = mask.copy()
    if telluric:
        mask |= telluric_mask(wave, info.medium)
    # the telluric bands are masked for the lines, not for their noise: the flux's noise estimate
    # tests its white-noise plateau on them too (specan.noise.flux_noise's noise_only)
    s = _snr_arrays(wave, flux, err, mask, info.path, info.resolving_power, noise_only=mask & ~defects)
    info = info.copy()
    info.snr, info.snr_source, info.snr_err_array = s["snr"], s["snr_source"], s["snr_err_array"]
    info.snr_flux, info.snr_flux_method = s["snr_flux"], s["snr_flux_method"]
    if info.snr is not None and info.snr < 5:
        info.warn(f"low S/N ({info.snr:.1f} per pixel, from the {info.snr_source})")
    meta = dict(spectrum.meta)
    meta[META_KEY] = info
    if not continuum:
        return replace_parts(spectrum, mask=mask, meta=meta)
    # normalize(replace_parts(spectrum, mask=mask, meta=meta)) on the arrays, one Spectrum built instead
    # of two (specutils makes a WCS for each: a seventh of read + prepare, measured); the same numbers
    full = _continuum_arrays(wave, flux, err, mask, path=info.path, **fit_options)
    return _divided(spectrum, flux, err, mask, full * spectrum.flux.unit, meta, info)


from ._callable import make_callable as _make_callable  # noqa: E402

_make_callable(__name__, "prepare")
