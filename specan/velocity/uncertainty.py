"""Velocity errors: the Tonry & Davis r-statistic and noise resampling.

``rv_err_td`` is the Tonry & Davis (1979) estimate, written ``w / (2.3548 r)`` with
``r = h / (sqrt 2 sigma_a)`` (see :func:`tonry_davis` for why not their 3/8 w/(1+r));
``rv_err_mc`` re-measures the velocity after adding noise with the spectrum's own error array
(or the DER_SNR noise, Stoehr et al. 2008) ``n_resample`` times: for an estimator linear in the
noise the scatter of those velocities about the measured one equals its error. The reported
error is the larger (:func:`reported_error`).
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np
from scipy import fft as sfft

from ..contents import forgettable
from .correlation import Correlation
from .prepared import full_cover
from .grid import fast_length, gauss_kernel_single, gauss_smooth, highpass, kms_per_pixel, smoothed_coverage, spline_operators, turns

__all__ = ["TonryDavis", "VelocityErrors", "SegmentErrors", "tonry_davis", "resample_error", "estimate_errors",
           "reported_error", "segment_errors", "segment_windows", "SEGMENT_REACH", "SPLINE_REACH", "zero_point_error", "content_seed", "spline_adjoint", "ErrorBudget", "error_budget"]


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
    # (np.nanmean's own steps: NaN to zero, the sum over all, divided by the count; without its wrapper)
    r2 = about.residual[~core] ** 2
    missing = np.isnan(r2)
    sig_a = float(np.sqrt(np.sum(np.where(missing, 0.0, r2)) / (r2.size - np.count_nonzero(missing))) / math.sqrt(2.0))
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
    rng = np.random.default_rng(content_seed(observed, seed))
    noise = rng.normal(size=(observed.native_flux.size, k)) * observed.native_sigma[:, None]
    # the same cubic interpolation the data went through, applied to each realisation
    f = spline_operators(observed.spline_x, observed.grid, observed.cell).forward(observed.native_flux[:, None] + noise)  # (n, k)
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
    # elementwise products and numpy's sums, not a BLAS product: BLAS changes its summation
    # order with the thread count, and the error would differ between ways of running
    return np.stack([np.sum(a * pint[:, j], axis=1) for j in range(pint.shape[1])], axis=1) / m


def _cubic_maxima(offs, ccf, h):
    """Offset of the maximum near the centre of a cubic through each row of ``ccf`` at ``offs`` (Newton)."""
    from .bank import fit_matrix

    coef = np.sum(ccf[:, None, :] * fit_matrix(offs, 3)[None, :, :], axis=2)  # (k, 4), fixed fit matrix
    x = np.zeros(ccf.shape[0])
    for _ in range(6):
        g1 = coef[:, 1] + 2 * coef[:, 2] * x + 3 * coef[:, 3] * x * x
        g2 = 2 * coef[:, 2] + 6 * coef[:, 3] * x
        x = np.clip(x - g1 / np.where(g2 < 0, g2, -1e-9), -2 * h, 2 * h)
    return x


def content_seed(observed, seed):
    """A seed made from the spectrum's own numbers and ``seed``: the same spectrum gets the same noise
    realisations in any process, in any order, whatever else was measured before."""
    import zlib

    crc = zlib.crc32(np.ascontiguousarray(observed.native_flux, float).tobytes())
    crc = zlib.crc32(np.ascontiguousarray(observed.native_sigma, float).tobytes(), crc)
    return np.random.SeedSequence([int(seed), crc])


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
    rv_err_td = abs(td.err_px * dvds) if which in ("auto", "both", "td") and np.isfinite(td.err_px) else None
    # empirical error: add noise like the spectrum's own and re-measure (vectorised)
    rv_err_mc = None
    if which in ("both", "mc") and n_resample and n_resample >= 5:
        err_px = resample_error(observed, search.side.weight, template, lags.pad, lags.m, peak.lag, td.err_px,
                                n_resample, seed, lags.hp_sigma)
        rv_err_mc = abs(err_px * dvds)
        notes.append(f"empirical error from {n_resample} noise realisations ({observed.noise_source})")
    return VelocityErrors(rv_err_td, rv_err_mc)


def reported_error(errors, notes):
    """The larger of the two :class:`VelocityErrors` (km/s or None): the error reported before the
    error budget (:func:`error_budget`), kept for comparison."""
    # Reported error: the larger of the two. With a matched template they agree (injections); with a
    # mismatched one the residual CCF (hence the TD estimate) also carries the mismatch, which noise
    # resampling cannot see.
    candidates = [e for e in (errors.mc, errors.td) if e is not None and np.isfinite(e)]
    rv_err = max(candidates) if candidates else None
    if errors.mc is not None and errors.td is not None and errors.td > 2 * errors.mc:
        notes.append("Tonry-Davis error well above the noise-resampling one: template mismatch dominates")
    return rv_err


# ---------------------------------------------------------------------------
# The noise error by propagation, and the segments' scatter (template mismatch)
# ---------------------------------------------------------------------------
def spline_adjoint(x, grid, cell=0.0):
    """A function u -> S^T u, S the cubic interpolation (not-a-knot) from samples at ``x`` to ``grid``
    (its mean over cells of ``cell`` about the grid points where ``cell`` > 0).

    The interpolant is B A^-1 y (A, B the B-spline design matrices at the samples and on the
    grid), so its transpose is A^-T B^T: a sparse LU of A^T, made once per set-up (shared with
    the forward interpolation, :func:`~.grid.spline_operators`).
    """
    return spline_operators(x, grid, cell).adjoint


def _highpass_adjoint(y, sigma, valid):
    """Transpose of :func:`~.grid.highpass` applied to ``y`` or its columns: H = V (I - Gv^-1 G V)."""
    v = valid.astype(float)
    v = v if y.ndim == 1 else v[:, None]
    if not sigma:
        return v * y
    den = smoothed_coverage(valid, sigma)
    den = den if y.ndim == 1 else den[:, None]
    # (single precision: an error estimate, to ~1e-6 of itself)
    return v * y - v * gauss_smooth(v * y / den, sigma, single=True)


#: Reach (in high-pass sigmas) of the Gaussian beyond a segment that :func:`_segments_highpass_adjoint`
#: keeps: the kernel has fallen to exp(-18) = 1.5e-8 of its peak there, below the single precision
#: the smoothing is done in (our choice).
SEGMENT_REACH = 6.0


def segment_windows(starts, n, sigma):
    """(lo, hi): the grid pixels where the high-pass adjoint of a column restricted to each segment
    (starting at ``starts``; ``n`` pixels in all) is not zero: the segment and :data:`SEGMENT_REACH`
    high-pass sigmas on both sides."""
    ends = np.append(starts[1:], n)
    reach = int(math.ceil(SEGMENT_REACH * sigma)) if sigma else 0
    return np.maximum(starts - reach, 0), np.minimum(ends + reach, n)


def _segments_highpass_adjoint(g, starts, sigma, valid, colour=None):
    """(n, K) :func:`_highpass_adjoint` of the columns g 1_k (``g`` restricted to segment k, the
    segments starting at ``starts``), each column smoothed on its own segment's window only;
    with ``colour`` (K integers), the columns of one colour added into one, (n, max colour + 1).

    A column is zero outside its segment, so its smoothed copy matters only within
    :data:`SEGMENT_REACH` sigmas of it (:func:`segment_windows`): every segment's window goes into
    one row of a 2-D real transform of the longest window's length (a few times shorter than the
    spectrum's; the signal sits inside its row with that reach on both sides, so nothing wraps
    around), instead of one transform of the whole spectrum per segment. The same numbers to
    ~1e-7 (single precision, as :func:`_highpass_adjoint`).
    """
    n = g.size
    ends = np.append(starts[1:], n)
    colour = np.arange(starts.size) if colour is None else np.asarray(colour)
    v = valid.astype(float)
    vg = v * g
    out = np.zeros((int(colour.max()) + 1, n))   # a row per colour (rows: contiguous writes), transposed at the end
    # the loops below index with Python ints (one conversion each): numpy scalars as indices and slice
    # bounds cost a conversion at every use
    starts_l, ends_l, colour_l = starts.tolist(), ends.tolist(), colour.tolist()
    for c, a, b in zip(colour_l, starts_l, ends_l):
        out[c, a:b] = vg[a:b]
    if not sigma:
        return out.T
    lo, hi = segment_windows(starts, n, sigma)
    lo_l, hi_l = lo.tolist(), hi.tolist()
    q = (vg / smoothed_coverage(valid, sigma)).astype(np.float32)
    for group, size in _transform_groups(ends - starts, 2 * int(math.ceil(SEGMENT_REACH * sigma))):
        rows = np.zeros((group.size, size), np.float32)
        group = group.tolist()
        for i, j in enumerate(group):
            rows[i, starts_l[j] - lo_l[j]:ends_l[j] - lo_l[j]] = q[starts_l[j]:ends_l[j]]
        smooth = sfft.irfft(sfft.rfft(rows, axis=1) * gauss_kernel_single(size, float(sigma)), size, axis=1)
        # back to the spectrum's pixels: each window's span of its row (a few segments' worth of pixels)
        for i, j in enumerate(group):
            a, b = lo_l[j], hi_l[j]
            out[colour_l[j], a:b] -= v[a:b] * smooth[i, :b - a]
    return out.T


#: What one more transform call costs, in transformed points (our estimate, for :func:`_transform_groups`).
CALL_POINTS = 2000


def _transform_groups(lengths, margin):
    """[(segment indices, transform length)]: the segments in one or two batches of transforms, the
    shorter ones apart where that saves more points than a call costs (:data:`CALL_POINTS`): one long
    segment otherwise sets the length of every row (equal-information segments differ in length by
    ten times, measured)."""
    order = np.argsort(lengths, kind="stable")
    sizes = [fast_length(int(lengths[j]) + margin) for j in order]
    best, split = len(order) * sizes[-1], len(order)
    for k in range(1, len(order)):
        cost = k * sizes[k - 1] + (len(order) - k) * sizes[-1] + CALL_POINTS
        if cost < best:
            best, split = cost, k
    groups = [(order[:split], sizes[split - 1]), (order[split:], sizes[-1])]
    return [(g, size) for g, size in groups if g.size]


#: Native pixels kept on each side of a segment's window when its column shares a transposed spline
#: solve with others (:func:`segment_errors`): the cubic interpolation's inverse falls by a factor
#: of ~0.27 a pixel (2 - sqrt 3 for cubic splines, from memory; checked in tests/test_velocity_fast_path.py),
#: 1e-36 over this many.
SPLINE_REACH = 64


def _colours(lo, hi):
    """Colours (0, 1, ...) of the windows [lo, hi) in order such that windows of one colour are
    disjoint: each takes the first colour whose last window ended at or before its start."""
    last_end, colour = [], []
    for a, b in zip(np.asarray(lo).tolist(), np.asarray(hi).tolist()):   # (Python ints: numpy scalars compare slower)
        c = next((i for i, e in enumerate(last_end) if e <= a), len(last_end))
        if c == len(last_end):
            last_end.append(b)
        else:
            last_end[c] = b
        colour.append(c)
    return np.asarray(colour)




class SegmentErrors(NamedTuple):
    """Noise error (grid pixels) of the peak, and the velocity segments' scatter about it.

    ``offsets`` and ``sigmas`` (pixels) are the velocities of the ``n`` wavelength segments
    relative to the whole spectrum's and their noise errors; ``birge`` is the Birge ratio
    sqrt(chi^2 / (n - 1)) of the segments (1 for noise alone), NaN with fewer than 2.
    """

    noise_px: float
    offsets: np.ndarray
    sigmas: np.ndarray
    birge: float
    n: int


def _segments(info, n_seg, fwhm_px):
    """Start indices of ``n_seg`` segments holding about equal shares of the velocity information ``info``.

    Each boundary is moved to the quietest pixel (least information, smoothed over a resolution
    element) within two resolution elements of the equal-share point: a line cut in two pulls
    the velocities of its two segments in opposite directions, a scatter the whole spectrum's
    velocity does not have (Birge ratios of 2-4 at S/N 100 with matched templates, measured).
    """
    cum = np.cumsum(info)
    if cum[-1] <= 0:
        return np.array([0])
    box = max(1, int(round(fwhm_px)))
    quiet = np.convolve(info, np.ones(box) / box, mode="same")
    reach = max(1, int(round(2 * fwhm_px)))
    equal = np.searchsorted(cum, cum[-1] * np.arange(1, n_seg) / n_seg, side="right")
    # the common case in one call: every window whole inside the spectrum, each past the one before
    # (where :func:`_quietest_one_by_one` starts each window at its own q - reach, ends it at q + reach + 1)
    lo = equal - reach
    if equal.size and lo[0] >= 1 and equal[-1] + reach + 1 <= info.size - 1:
        found = lo + np.argmin(quiet[lo[:, None] + np.arange(2 * reach + 1)], axis=1)
        if np.all(lo[1:] > found[:-1]):
            return np.concatenate([[0], found])
    return _quietest_one_by_one(quiet, equal, reach)


def _quietest_one_by_one(quiet, equal, reach):
    """:func:`_segments`' boundaries one by one: each the quietest pixel within ``reach`` of its equal-share
    point ``equal``, past the boundary before it and inside the spectrum (increasing, 0 first)."""
    starts = [0]
    for q in equal:
        lo, hi = max(starts[-1] + 1, q - reach), min(quiet.size - 1, q + reach + 1)
        if hi > lo:
            starts.append(lo + int(np.argmin(quiet[lo:hi])))
    return np.asarray(starts)


@functools.lru_cache(maxsize=32)
def _offset_phases(offsets, m, nf):
    """(L, nf) exp(2 pi i f o / m) for fixed offsets o (cached: the same few for every spectrum)."""
    return np.exp(2j * np.pi * np.outer(np.asarray(offsets, float), np.arange(nf)) / m)


_STACKED_SINGLE = forgettable({})


def _stacked_single(templates, m):
    """(T, 3, nf) the ``templates``' :meth:`~.prepared.PreparedTemplate.ffts_single` at length ``m`` stacked
    (read-only), kept for the last few sets of templates: the mixtures of a survey's spectra repeat, and the
    stack copied every template's three transforms again for each spectrum. The prepared templates are cached
    objects and the set is kept with the stack, so an identity stays theirs while kept."""
    key = (tuple(id(t) for t in templates), m)
    found = _STACKED_SINGLE.get(key)
    if found is None or any(a is not b for a, b in zip(found[0], templates)):
        stacked = np.stack([t.ffts_single(m) for t in templates])
        stacked.flags.writeable = False
        found = (templates, stacked)
        while len(_STACKED_SINGLE) >= 16:   # oldest out first; the array is returned, not looked up again
            _STACKED_SINGLE.pop(next(iter(_STACKED_SINGLE)), None)
        _STACKED_SINGLE[key] = found
    return found[1]


def _shifted_templates(search, members, m, h, full=False):
    """(T, 3, 3, n): each member template's arrays T, T^2 (weighted) and V on the data window at lags
    s0 + h, s0 and s0 - h (s0 its peak), all in one inverse transform (lag s uses template pixels
    x + pad - s); (T, 2, 3, n), T and T^2 only, where the coverages are ``full`` (1 on every pixel
    used, :func:`full_cover`): V is then 1 at every lag and not transformed."""
    lags = search.lags
    F = _stacked_single(tuple(template for template, _, _ in members), m)              # (T, 3, nf)
    if full:
        F = F[:, :2]
    # the members' shifts in one call: exp(2 pi i f (pad - s0) / m) times the cached offset phases
    angles = (2.0 * np.pi / m) * (lags.pad - np.array([s0 for _, s0, _ in members], float))
    ph = turns(angles, F.shape[-1])[:, None, :] * _offset_phases((h, 0.0, -h), m, F.shape[-1])[None]
    # in single precision (half the time of the transforms): what these give is an error estimate,
    # the segments' vertices and their noise, not the velocity (refined at double precision)
    shifted = F[:, :, None, :] * ph.astype(np.complex64)[:, None, :, :]
    # returned as doubles (exact), contiguous: every product with the data's double arrays would
    # otherwise convert them again (mixed-precision products took twice the time, measured)
    return np.array(sfft.irfft(shifted, m, axis=-1)[..., :lags.n], dtype=np.float64)


def _template_segments(search, shifted, starts, h, weights):
    """(offsets, good, segment gradient, whole gradient) of the member templates' segment velocities
    about their peaks, from their :func:`_shifted_templates`.

    ``offsets`` and ``good`` (T, K + 1: the segments, then the whole) are vertex offsets in pixels;
    the gradients (n) are the derivatives of the ``weights``-weighted mean of the templates'
    vertices with respect to the data on the grid: at each pixel, that of its own segment's vertex
    (the others' are zero there), and that of the whole's.
    """
    n = search.lags.n
    a1, a2, a3 = search.side.arrays
    w = search.side.weight
    full = shifted.shape[1] == 2      # the coverage 1 on every pixel used (:func:`_shifted_templates`)
    bT, bT2 = shifted[:, 0], shifted[:, 1]                                            # each (T, 3 lags, n)

    def sums(products):  # (..., n) -> (..., segments + whole); the segments cover the spectrum
        seg = np.add.reduceat(products, starts, axis=-1)
        return np.concatenate([seg, np.sum(seg, axis=-1, keepdims=True)], axis=-1)

    # the products of every row in one array and their segment sums in one call (the same sums, in the
    # same order, as row by row: a call and two temporaries a row fewer)
    k_rows = 3 if full else 6
    products = np.empty((k_rows,) + bT.shape)
    np.multiply(a1, bT, out=products[0])
    np.multiply(a2, bT, out=products[1])
    np.multiply(a2, bT2, out=products[2])
    if not full:
        bV = shifted[:, 2]
        np.multiply(a1, bV, out=products[3])
        np.multiply(a3, bV, out=products[4])
        np.multiply(a2, bV, out=products[5])
    rows = tuple(sums(products))
    if full:
        # the coverage sums are the data's own over each segment, the same for every template and lag
        # (the rows a1, a2, a3 summed as the side keeps them stacked, then ordered a1, a3, a2: each row's
        # sums are its own, whatever the order of the rows)
        stacked = search.side.stacked
        data = sums(np.stack([a1, a2, a3]) if stacked is None else stacked)[[0, 2, 1]]
        rows += tuple(np.broadcast_to(data[:, None, None, :], (3,) + bT.shape[:2] + (starts.size + 1,)))
    c, _ = Correlation.combine(rows)                                  # (T, 3 lags, K + 1)
    with np.errstate(invalid="ignore"):  # a segment with no overlap gives inf - inf: marked not good
        den = c[:, 0] - 2.0 * c[:, 1] + c[:, 2]
        good = np.isfinite(den) & (den < 0)
        offsets = np.where(good, h * (c[:, 0] - c[:, 2]) / (2.0 * np.where(good, den, -1.0)), np.nan)
    curv = den / h ** 2
    # derivative of each vertex with respect to the data: -(dc(+h) - dc(-h)) / (2h c''), with
    # dc/dd = w (T - mu V) / sqrt(E D) (mu the template's mean over the overlap, E and D the
    # template's and the data's energies there; the data energy's own change cancels at the peak)
    c2v = np.maximum(rows[5], 1e-300)
    mu = rows[1] / c2v
    energy = np.maximum(rows[2] - rows[1] ** 2 / c2v, 1e-300)
    data_energy = np.maximum(rows[4][:, 1] - rows[3][:, 1] ** 2 / c2v[:, 1], 1e-300)
    # a segment where the template (e.g. a line mask) or the data carry no signal has no velocity of
    # its own: its vertex is 0/0 and its gradient ~1/sqrt(1e-300), which overflowed the single-precision
    # adjoint (measured: a G2 V line mask on the Kurucz Sun); such segments are not good
    tiny = 1e-12
    good &= ((energy[:, 0] > tiny * energy[:, 0, -1:]) & (energy[:, 2] > tiny * energy[:, 2, -1:])
             & (data_energy > tiny * data_energy[:, -1:]))
    # per template and segment (T, K + 1): gradient = w (a+ T(+h) - b+ V(+h) - a- T(-h) + b- V(-h)),
    # the coefficients made per segment (the templates' weights in them) and only then spread over
    # its pixels, the templates summed in the same product
    scale = np.where(good, -1.0 / (2.0 * h * np.where(good, curv, -1.0) * np.sqrt(data_energy)), 0.0)
    scale = scale * np.asarray(weights, float)[:, None]
    a_plus, a_minus = scale / np.sqrt(energy[:, 2]), scale / np.sqrt(energy[:, 0])
    coef = np.stack([a_plus, -mu[:, 2] * a_plus, -a_minus, mu[:, 0] * a_minus], axis=1)   # (T, 4, K + 1)
    k = starts.size
    lengths = np.diff(np.append(starts, n))
    if full:
        # V(+h) = V(-h) = 1: their terms are the coefficients themselves, summed over the templates
        arrays = shifted[:, (0, 0), (2, 0)]                           # T(+h), T(-h): (T, 2, n)
        coef_t, coef_v = coef[:, (0, 2)], np.sum(coef[:, 1] + coef[:, 3], axis=0)    # (T, 2, K + 1), (K + 1)
        g_seg = w * (np.einsum("tan,tan->n", arrays, np.repeat(coef_t[..., :k], lengths, axis=-1))
                     + np.repeat(coef_v[:k], lengths))
        g_whole = w * (np.einsum("tan,ta->n", arrays, coef_t[..., k]) + coef_v[k])
        return offsets, good, g_seg, g_whole
    arrays = shifted[:, (0, 2, 0, 2), (2, 2, 0, 0)]                   # T(+h), V(+h), T(-h), V(-h): (T, 4, n)
    g_seg = w * np.einsum("tan,tan->n", arrays, np.repeat(coef[..., :k], lengths, axis=-1))
    g_whole = w * np.einsum("tan,ta->n", arrays, coef[..., k])
    return offsets, good, g_seg, g_whole


def _propagated_sigmas(observed, g_seg, g_whole, starts, hp_sigma):
    """(K + 1) noise sigmas of linear functions of the grid's data: gradient ``g_seg`` restricted to
    each segment (starting at ``starts``), then ``g_whole``, propagated back through the high-pass
    filter and the spline to the native pixels' errors.

    Each segment's vertex depends on its own pixels only, the whole's on all. The segments' columns
    go through the transposed spline solve packed: those whose native windows (the high-pass
    window and :data:`SPLINE_REACH` pixels) do not overlap share a column (a colour), and each
    segment's error is summed over its own window (5-6 columns for 10 segments instead of 10,
    measured; what leaks between segments of one colour is below 1e-36 of them).
    """
    lo, hi = segment_windows(starts, g_seg.size, hp_sigma)
    x = observed.spline_x
    nlo = np.maximum(np.searchsorted(x, observed.grid[lo]) - SPLINE_REACH, 0)
    nhi = np.minimum(np.searchsorted(x, observed.grid[hi - 1], side="right") + SPLINE_REACH, x.size)
    colour = _colours(nlo, nhi)
    u = np.concatenate([_segments_highpass_adjoint(g_seg, starts, hp_sigma, observed.valid, colour),
                        _highpass_adjoint(g_whole, hp_sigma, observed.valid)[:, None]], axis=1)
    z = spline_adjoint(x, observed.grid, observed.cell)(u)          # (native pixels, colours + 1)
    sz2 = np.ascontiguousarray((observed.native_sigma[:, None] * z).T) ** 2   # (colours + 1, native pixels)
    # each segment's sum over its window in its colour's row, all in one call: the windows of one colour
    # are disjoint, so (start, end) pairs in the flattened rows, in order, bound each window's sum
    size = sz2.shape[1]
    bounds = np.stack([colour * size + nlo, colour * size + nhi], axis=1)
    order = np.argsort(bounds[:, 0], kind="stable")
    sig = np.empty(starts.size + 1)
    sig[order] = np.add.reduceat(sz2.ravel(), bounds[order].ravel())[::2]   # (the whole's row last: no end out of range)
    sig[-1] = np.sum(sz2[-1])
    return np.sqrt(sig)


def segment_errors(observed, search, members, m, resels):
    """:class:`SegmentErrors` of a velocity averaged over templates.

    ``members`` are (template, peak lag, weight) of the averaged templates, the best first. The
    spectrum is cut into segments of equal velocity information (weight times the squared
    slope of the best template); each segment's velocity against each template is the vertex
    of the normalised CCF through lags s0 - 1/2, s0, s0 + 1/2 from its own sums, averaged with
    the templates' weights as the whole velocity is. The noise error of each, and of the whole,
    is the linear propagation of the native pixels' errors through every step the data went
    through (spline onto the grid, high-pass, weights, correlation, average): exactly the
    scatter noise resampling would find, without random numbers. ``m`` is the set-up's FFT
    length; ``resels`` the number of resolution elements in the spectrum (segments hold at
    least 25 each, at most 10 segments: our choice, enough lines in each for a velocity, enough
    segments for a scatter).
    """
    lags = search.lags
    n = lags.n
    h = 0.5
    full = full_cover([t for t, _, _ in members], [s0 for _, s0, _ in members], lags.pad, n, h)
    shifted = _shifted_templates(search, members, m, h, full)
    # the best template at s0 + h minus at s0 - h (a difference of the single-precision transforms'
    # values, in single precision as they came)
    slope = shifted[0, 0, 0].astype(np.float32) - shifted[0, 0, 2].astype(np.float32)
    starts = _segments(search.side.weight * slope ** 2, int(np.clip(resels // 25, 2, 10)), n / max(resels, 1.0))
    total_w = sum(wt for _, _, wt in members)
    mean_lag = sum(wt * s0 for _, s0, wt in members) / total_w
    offsets = np.zeros(starts.size + 1)
    good = np.ones(starts.size + 1, bool)
    off, ok, g_seg, g_whole = _template_segments(search, shifted, starts, h, [wt / total_w for _, _, wt in members])
    for i, (_, s0, wt) in enumerate(members):
        offsets += wt / total_w * (s0 + np.where(ok[i], off[i], 0.0) - mean_lag)
        good &= ok[i]
    sig = _propagated_sigmas(observed, g_seg, g_whole, starts, lags.hp_sigma)
    seg_off, seg_sig = np.where(good, offsets, np.nan)[:-1], sig[:-1]
    # a segment's noise error far below the whole spectrum's is no segment's own: its information would be
    # more than the whole's (measured: a 2-pixel segment at a crowded boundary with sigma 5e-149 pixel and a
    # vertex of 9e-16 from rounding, Birge ratio 6e116; an F3 IV star at -773 km/s, linear pixels, R 2000)
    use = good[:-1] & (seg_sig > (1e-6 * sig[-1] if np.isfinite(sig[-1]) else 0.0))
    birge = float("nan")
    if use.sum() >= 2:
        wt = 1.0 / seg_sig[use] ** 2
        mean = np.sum(wt * seg_off[use]) / np.sum(wt)
        birge = math.sqrt(float(np.sum(wt * (seg_off[use] - mean) ** 2)) / (use.sum() - 1))
    return SegmentErrors(float(sig[-1]) if good[-1] else float("nan"), seg_off, seg_sig, birge, int(use.sum()))


class ErrorBudget(NamedTuple):
    """The reported error and its parts, km/s.

    ``total`` = sqrt(noise^2 max(1, birge^2) + choice^2 + zero_point^2); ``mismatch`` is the
    part of the segments' scatter beyond noise, ``noise sqrt(max(0, birge^2 - 1))``; ``template``
    collects what the template contributes (mismatch, choice, zero point) in quadrature.
    """

    total: float
    noise: float
    mismatch: float
    choice: float
    zero_point: float
    template: float


def error_budget(noise, birge, choice, zero_point):
    """:class:`ErrorBudget` from the noise error, the Birge ratio of the segments, the spread of the
    templates' velocities and their zero-point error (all km/s but the ratio)."""
    # Birge (1932): a scatter beyond the stated errors scales them; only an excess counts, so
    # noise alone keeps the propagated error (the ratio's own scatter would otherwise shrink it)
    excess = max(0.0, birge * birge - 1.0) if np.isfinite(birge) else 0.0
    mismatch = noise * math.sqrt(excess)
    template = math.sqrt(mismatch ** 2 + choice ** 2 + zero_point ** 2)
    return ErrorBudget(math.sqrt(noise ** 2 + template ** 2), noise, mismatch, choice, zero_point, template)


def zero_point_error(mixture):
    """Rest-frame uncertainty (km/s) of the templates averaged: each library template's error of
    its zero point against laboratory wavelengths (:attr:`specan.templates.LibraryTemplate.zero_point_err_kms`,
    measured when the file is built: see :mod:`specan.templates`), weighted as the velocities
    are; 0 for synthetic and user templates (their zero point is the line list's, or the user's
    ``template_rv``)."""
    from .. import templates

    zp = {t.name: t.zero_point_err_kms for t in templates.library_templates()}
    total = 0.0
    for member in mixture:
        cand = member.candidate
        if cand is not None and cand.kind == "library":
            total += member.weight * zp.get(cand.name, 0.0) ** 2
    return math.sqrt(total)
