"""All candidate templates of one set-up, stacked and Fourier-transformed once, scored in one batch.

A :class:`TemplateBank` holds the prepared built-in templates of one set-up (the extended
ln-lambda grid of :class:`~.grid.TemplateGrid` and the resolving power) as 2-D arrays, one row
a template, with their real FFTs. Spectra of the same set-up reuse it (it is cached), so a
spectrum costs one batched product and one 2-D inverse FFT for all candidates
(:func:`score_bank`), not a loop over templates.

The FFT length of the bank is the template length rounded up to a fast size: the correlation
is circular there, but every lag the peak may lie at (``|s| <= smax <= pad``) sums over data
pixels that fall inside the template, so no wrapped term enters (see :func:`short_length`).
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np
from scipy import fft as sfft

from ..contents import forgettable
from .grid import turns
from .prepared import PreparedTemplate, full_cover, prepare_builtin

__all__ = ["TemplateBank", "BankScores", "short_length", "template_bank", "score_bank",
           "WEIGHT_SCALE", "SCORE_PRECISION", "MAX_MIXTURE", "MIN_WEIGHT", "mixture_weights", "mixture_threshold", "fit_matrix", "poly_peaks",
           "short_side", "refine_peaks", "REFINE_OFFSETS"]

#: Scale of the template weights, as a fraction of the best template's unexplained variance
#: 1 - h: a template whose peak is lower by 0.5 (1 - h_best) weighs 1/e of the best (our choice,
#: measured on synthetic types off the grid at R 2000, S/N 100: pulls' rms 1.69, 1.46, 1.30 for
#: scales 0.25, 0.5, 1; but at 1 the wide mixtures moved the velocities of the JHC (1984) M
#: standards by tens of km/s at R ~ 400 and the M4.5e V star SAO 81292 classified K8, against
#: M1 at 0.25 and 0.5: tests/test_classify.py).
WEIGHT_SCALE = 0.5
#: Precision of the bank's transforms in the scores (:func:`score_bank`): single (our choice: the
#: scores rank and weigh the templates; see tests/test_velocity_fast_path.py for what it moves).
SCORE_PRECISION = np.complex64
#: At most this many templates enter the velocity, those of weight >= MIN_WEIGHT (our choice).
MAX_MIXTURE = 5
MIN_WEIGHT = 0.05


def short_length(lags):
    """FFT length of the set-up's correlations: the template length made fast (lags stay within
    +-pad, so no term wraps around; see :func:`~.grid.lag_window`)."""
    return lags.m


class TemplateBank:
    """Prepared built-in templates of one set-up, stacked: names, candidates, arrays and FFTs.

    ``T``, ``T2`` and ``V`` are (K, N) arrays (high-passed template times coverage, its square
    times coverage, coverage); ``FT`` the real FFTs of ``T`` at length ``m`` truncated to the
    ``nf`` frequencies where any template has power, in single precision (:func:`score_bank`);
    coverages are grouped (``groups`` maps each template to a row of ``V_unique``/``FV``).
    """

    def __init__(self, candidates, prepared, m):
        self.candidates = tuple(candidates)
        self.templates = tuple(prepared)
        self.names = tuple(t.name for t in prepared)
        self.m = m
        self.T = np.stack([t.T for t in prepared])
        self.T2 = np.stack([t.T2 for t in prepared])
        # templates sharing a coverage share its sums: group identical coverages (by their bytes:
        # numpy's unique over rows sorts them as structured records, tens of ms a bank)
        first = {}
        groups = [first.setdefault(t.V.tobytes(), len(first)) for t in prepared]
        unique = np.stack([prepared[groups.index(g)].V for g in range(len(first))])
        self.V_unique = unique
        self.groups = np.asarray(groups, dtype=np.intp)
        FT = sfft.rfft(self.T, m, axis=1)
        # the templates are band-limited by the resolution: frequencies where no template has
        # power above 1e-14 of its peak add nothing to any correlation (and cost time)
        power = np.max(np.abs(FT) ** 2, axis=0)
        keep = np.flatnonzero(power > 1e-14 * power.max())
        self.nf = int(keep[-1]) + 1 if keep.size else FT.shape[1]
        self.FT = np.ascontiguousarray(FT[:, :self.nf], dtype=SCORE_PRECISION)
        self.FV = np.ascontiguousarray(sfft.rfft(unique, m, axis=1))
        self._covers = {}

    def __len__(self):
        return len(self.templates)

    def covers(self, pad, smax, n):
        """Whether every template's coverage is 1 on every pixel the lags |s| <= ``smax`` use over
        ``n`` data pixels (:func:`~.prepared.full_cover`; kept per lag window)."""
        key = (pad, smax, n)
        if key not in self._covers:
            self._covers[key] = full_cover(self.templates, [0.0] * len(self.templates), pad, n, smax)
        return self._covers[key]


@forgettable
@functools.lru_cache(maxsize=16)
def _bank(candidates, ln0, step, n, hp_sigma, m, cell=0.0):
    from .._offline import cached_arrays
    from .grid import TemplateGrid

    grid = TemplateGrid(ln0=ln0, step=step, n=n, hp_sigma=hp_sigma, cell=cell)

    made = []

    def build():
        made.extend(prepare_builtin(c, grid) for c in candidates)
        # a template made again from its T0 and V is the same to the bit (PreparedTemplate zeroes T0
        # where V is 0, as T0 is already, and filters T0 where V > 0)
        return {"names": np.array([t.name for t in made]), "T0": np.stack([t.T0 for t in made]),
                "V": np.stack([t.V for t in made])}

    # Made from the synthetic model and the library on this grid, the same in every process of
    # every night on this set-up: 0.2 s of each process's first spectrum (measured), so kept on disk.
    kept = cached_arrays("velocity-bank", repr((candidates, ln0, step, n, hp_sigma, cell)), build)
    prepared = made or [PreparedTemplate(str(name), t0, cover, hp_sigma=hp_sigma)
                        for name, t0, cover in zip(kept["names"], kept["T0"], kept["V"])]
    return TemplateBank(candidates, prepared, m)


_LAST_BANK = [None]


def template_bank(candidates, lags):
    """The (cached) :class:`TemplateBank` of ``candidates`` on the set-up of ``lags``.

    The last bank is also kept with the very candidates tuple it was asked for: the automatic choice asks
    with one kept tuple spectrum after spectrum, and comparing it by identity spares hashing its 49
    candidates for the cache's look-up (~15 us).
    """
    g = lags.template_grid
    setup = (round(g.ln0, 12), g.step, g.n, g.hp_sigma, short_length(lags), g.cell)
    last = _LAST_BANK[0]
    if last is not None and last[0] is candidates and last[1] == setup:
        return last[2]
    bank = _bank(tuple(candidates), *setup)
    if isinstance(candidates, tuple):   # (a list could change under the same identity)
        _LAST_BANK[0] = (candidates, setup, bank)
    return bank


class BankScores(NamedTuple):
    """Per template: integer-lag peak ``lag`` (None where no peak), ``height`` (parabola vertex of
    the normalised CCF about it) and ``start``, the fractional lag of the cross term's parabola
    vertex (where :func:`refine_peaks` may start)."""

    lag: list
    height: np.ndarray
    start: np.ndarray


def score_bank(search, bank, data_short):
    """:class:`BankScores` of every template of ``bank`` against one spectrum.

    The cross term of every template comes from one product and one 2-D inverse FFT; the
    normalisation (template energy and data energy over the overlap) varies slowly with lag
    and is taken at each template's integer peak by direct sums. Heights rank and weight the
    templates; velocities come from :func:`refine_peaks` (exact normalisation at every lag).
    ``data_short`` holds the rFFTs of the data arrays at the bank's length.
    """
    side, lags = search.side, search.lags
    pad, n, m = lags.pad, lags.n, bank.m
    # The cross terms in single precision: half the time of the product and the inverse transforms
    # (0.7-1.0 against 1.9-2.3 ms for 49 templates of 6,000 points, measured), within 2e-7 of the
    # peak (measured); the heights rank and weigh the templates and that moves a weight by ~1e-5
    # of itself, while every velocity is refined at double precision (refine_peaks).
    a1_short = np.conj(data_short[0][:bank.nf]).astype(bank.FT.dtype)
    cross = sfft.irfft(a1_short * bank.FT, m, axis=1)               # C(a1, T)[k], lag s = pad - k
    s = np.arange(-lags.smax, lags.smax + 1)
    c1 = cross[:, pad - s].astype(np.float64)                       # (K, L)
    # the data's sums over each coverage at every lag, C(a2, V), C(a1, V), C(a3, V) (a few coverages:
    # one inverse transform for them all, instead of direct sums per distinct template lag):
    # only lags using enough of the spectrum's weight (the overlap, C(a2, V)) count
    g = bank.FV.shape[0]
    if bank.covers(pad, lags.smax, n):
        # every coverage is 1 on every pixel these lags use: the sums are the data's own, at every lag
        sums = np.array([data_short[1][0].real, data_short[0][0].real, data_short[2][0].real])
        cov = np.repeat(sums[:, None, None], g * s.size, axis=1).reshape(3, g, s.size)
    else:
        cov = sfft.irfft((np.conj(np.stack([data_short[1], data_short[0], data_short[2]]))[:, None, :]
                          * bank.FV[None]).reshape(3 * g, -1), m, axis=1)[:, pad - s].reshape(3, g, -1)
    over = cov[0]
    ok = over[bank.groups] >= search.min_overlap * side.total_weight
    masked = np.where(ok, c1, -np.inf)
    j = np.argmax(masked, axis=1)
    rows = np.arange(len(bank))
    found = np.isfinite(masked[rows, j])
    # parabola vertex of the cross term about the integer peak (a smooth score: ranks must not
    # jump with the sub-pixel phase of the star)
    y1 = c1[rows, j]
    y0 = c1[rows, np.maximum(j - 1, 0)]
    y2 = c1[rows, np.minimum(j + 1, s.size - 1)]
    den = y0 - 2.0 * y1 + y2
    inner = (j > 0) & (j < s.size - 1) & (den < 0)
    vertex = np.where(inner, y1 - 0.125 * (y0 - y2) ** 2 / np.where(inner, den, -1.0), y1)
    vertex_lag = s[j] + np.where(inner, 0.5 * (y0 - y2) / np.where(inner, den, -1.0), 0.0)
    a1, a2, a3 = side.arrays
    # sums over the data window at each template's peak lag: every template's window gathered at
    # once (a view, then one copy); the coverage sums are read from the transforms above
    peak_lag = s[j]
    start = pad - peak_lag              # lag s uses template pixels x + pad - s
    # (einsum's fused multiply-and-sum, not BLAS: no temporary product, and bit-identical whatever
    # the thread count; a product then a sum over the gathered windows took 17 times as long).
    # In double precision: in single, half the memory to gather and sum, 0.13 against 0.24 ms a sum
    # for 49 templates of 5,249 points, but the heights moved by up to 7.5e-7 from the all-double ones
    # instead of 1.6e-7 on 26 spectra, measured; the weights follow the heights.
    c2t, c2t2 = _window_sums((bank.T, bank.T2), start, n, a2)
    c2v, c1v, c3v = cov[:, bank.groups, j]
    c2v = np.maximum(c2v, 1e-300)
    e = c2t2 - c2t ** 2 / c2v
    d = c3v - c1v ** 2 / c2v
    with np.errstate(invalid="ignore", divide="ignore"):
        h = (vertex - c1v * c2t / c2v) / np.sqrt(np.maximum(e, 1e-300) * np.maximum(d, 1e-300))
    h = np.where(found & np.isfinite(h), h, -np.inf)
    # (the lags as plain ints from one conversion, not a numpy scalar per template)
    lag = [int(x) if ok else None for x, ok in zip(s[j].tolist(), np.isfinite(h).tolist())]
    return BankScores(lag, h, vertex_lag)


def _window_sums(arrays, start, n, weight):
    """sum_x weight(x) X[k, start[k] + x] over the ``n`` pixels x, for each row k of each of ``arrays``.

    Most templates peak at one lag (27-49 of 49 on the speed test's spectra and synthetic stars, measured):
    their windows are one slice of the stacked rows, summed in place (a view, no gathered copy of the rows:
    the copies doubled the memory the sums move); the other rows are gathered by lag. The sums are the
    same, row by row, as over gathered copies (the same contiguous inner loop).
    """
    low = int(start.min())
    common = low + int(np.argmax(np.bincount(start - low)))   # (the smallest of the most frequent, as np.unique's)
    out = [np.einsum("kn,n->k", x[:, common:common + n], weight) for x in arrays]
    other = np.flatnonzero(start != common)
    if other.size:
        for x, o in zip(arrays, out):
            o[other] = np.einsum("kn,n->k", _windows(x, n)[other, start[other]], weight)
    return out


def _windows(x, n):
    """(rows, positions, n) read-only view of every length-``n`` window of the rows of ``x`` (no copy; what
    ``sliding_window_view(x, n, axis=1)`` gives, without its checks: 6 against 16 us, measured)."""
    rows, size = x.shape
    s0, s1 = x.strides
    return np.lib.stride_tricks.as_strided(x, (rows, size - n + 1, n), (s0, s1, s1), writeable=False)


def mixture_weights(heights, ceiling=1.0, height_noise=0.0):
    """Weights of templates by peak height: exp(-(h_best - h) / (WEIGHT_SCALE q)), the best
    :data:`MAX_MIXTURE` of weight >= :data:`MIN_WEIGHT` kept; returns (indices, weights).

    ``ceiling`` is the height a perfect template would reach against the spectrum's noise
    (:func:`~.correlation.noise_ceiling`; 1 for noiseless data). Noise scales every height by it, so
    heights over the ceiling are the noiseless ones and ``ceiling - h_best`` is the best template's own
    mismatch, not the noise: with 1 in its place the noise counted as mismatch and flattened the weights
    as the S/N fell, giving more weight to templates further from the star (the Kurucz Sun at R 2000:
    the giants' share of the weight 0.22 noiseless, 0.32 at S/N 10, and the bias +1.24 -> +1.71 km/s,
    benchmarks/bench_velocity.py --user; measured). The scale q is that mismatch and the heights'
    noise ``height_noise`` in quadrature: templates closer than the noise lets one tell apart share
    the weight (a star made from the templates' own spectra has no mismatch at all). With the defaults
    (noiseless) q is 1 - h_best, as before.
    """
    h = np.asarray(heights, float)
    finite = np.isfinite(h)
    if not finite.any():
        return np.array([], int), np.array([])
    best = float(np.max(h[finite]))
    scale = WEIGHT_SCALE * _mismatch(best, ceiling, height_noise)
    w = np.where(finite, np.exp(-(best - np.where(finite, h, best)) / scale), 0.0)
    order = np.argsort(-w, kind="stable")[:MAX_MIXTURE]
    order = order[w[order] >= MIN_WEIGHT]
    return order, w[order] / np.sum(w[order])


def _mismatch(best, ceiling, noise):
    """The best template's shortfall from the noise ceiling (its mismatch), and the heights' noise, in
    quadrature (:func:`mixture_weights`' q; at least 1e-4 of the ceiling)."""
    return max(math.hypot(max(ceiling - best, 0.0), noise), 1e-4 * ceiling)


def mixture_threshold(heights, ceiling=1.0, height_noise=0.0):
    """The least height a template needs to enter the mixture of :func:`mixture_weights` beside
    ``heights`` (the :data:`MAX_MIXTURE`-th best, or the weight :data:`MIN_WEIGHT`); -inf if none."""
    h = np.sort(np.asarray(heights, float)[np.isfinite(heights)])[::-1]
    if not h.size:
        return -np.inf
    cut = h[0] + WEIGHT_SCALE * _mismatch(h[0], ceiling, height_noise) * np.log(MIN_WEIGHT)
    return max(cut, h[MAX_MIXTURE - 1]) if h.size >= MAX_MIXTURE else cut


# ---------------------------------------------------------------------------
# Exact normalised correlation at fractional lags, several templates at once
# ---------------------------------------------------------------------------
@functools.lru_cache(maxsize=64)
def _offset_phases(m, nf, offsets):
    """(L, nf) exp(2 pi i f o / m) (2 / m) for fixed offsets o, the inverse DFT's weights included."""
    f = np.arange(nf)
    ph = np.exp(2j * np.pi * np.outer(np.asarray(offsets), f) / m) * (2.0 / m)
    ph[:, 0] *= 0.5
    if m % 2 == 0 and nf == m // 2 + 1:
        ph[:, -1] *= 0.5
    return ph


@functools.lru_cache(maxsize=16)
def _fit_matrix(offsets, degree):
    vander = np.vander(np.asarray(offsets, float), degree + 1, increasing=True)
    return np.linalg.pinv(vander)


def fit_matrix(offsets, degree):
    """Least-squares polynomial fit as a fixed (degree+1, len(offsets)) matrix (coefficients, low first)."""
    return _fit_matrix(tuple(float(o) for o in offsets), int(degree))


def poly_peaks(offsets, values, degree=4, bound=None):
    """Offset and value of the maximum near 0 of a polynomial fitted to each row of ``values``.

    Newton's method on the fitted polynomial, vectorised over rows; deterministic (a fixed
    fit matrix applied by elementwise sums).
    """
    values = np.atleast_2d(values)
    fm = fit_matrix(offsets, degree)
    coef = np.sum(values[:, None, :] * fm[None, :, :], axis=2)  # (R, degree+1)
    bound = max(abs(float(o)) for o in offsets) if bound is None else bound
    if degree == 4 and values.shape[0] <= SCALAR_ROWS and np.isfinite(coef).all():
        start = [float(offsets[i]) for i in np.argmax(values, axis=1).tolist()]
        return _scalar_newton(coef.tolist(), start, bound)
    powers = np.arange(degree + 1)
    d1 = coef[:, 1:] * powers[1:]
    d2 = d1[:, 1:] * powers[1:-1]
    x = np.asarray(offsets)[np.argmax(values, axis=1)].astype(float)

    def pv(c, xx):  # Horner
        out = c[:, -1].copy()
        for i in range(c.shape[1] - 2, -1, -1):
            out = out * xx + c[:, i]
        return out

    for _ in range(12):
        g1, g2 = pv(d1, x), pv(d2, x)
        step = np.minimum(np.maximum(x - g1 / np.where(g2 < 0, g2, -1e-9), -bound), bound) - x
        x = x + step
        # converged (Newton's steps shrink quadratically): the next step would move no row
        # by more than 1e-12 pixel; the same rows always take the same number of steps
        if np.all(np.abs(step) < 1e-12):
            break
    return x, pv(coef, x), pv(d2, x)


#: Rows up to which :func:`poly_peaks` runs Newton's method on Python floats (our choice: a handful of numpy
#: calls an iteration cost more than a few rows of scalar arithmetic; the mixture has at most 6 templates).
SCALAR_ROWS = 8


def _scalar_newton(coef, x, bound):
    """:func:`poly_peaks`' iterations for quartics on Python floats, row by row but in step (every row takes
    as many steps as the slowest, as there): its Horner sums written out, the same operations in the same
    order as its arrays', so the same bits."""
    d1 = [(c1 * 1, c2 * 2, c3 * 3, c4 * 4) for _, c1, c2, c3, c4 in coef]
    d2 = [(b1 * 1, b2 * 2, b3 * 3) for _, b1, b2, b3 in d1]
    for _ in range(12):
        done = True
        for i, xi in enumerate(x):
            a0, a1, a2, a3 = d1[i]
            b0, b1, b2 = d2[i]
            g1 = ((a3 * xi + a2) * xi + a1) * xi + a0
            g2 = (b2 * xi + b1) * xi + b0
            new = min(max(xi - g1 / (g2 if g2 < 0 else -1e-9), -bound), bound)
            step = new - xi
            x[i] = xi + step
            done = done and abs(step) < 1e-12
        if done:
            break
    height = [(((c4 * xi + c3) * xi + c2) * xi + c1) * xi + c0 for (c0, c1, c2, c3, c4), xi in zip(coef, x)]
    curvature = [(b2 * xi + b1) * xi + b0 for (b0, b1, b2), xi in zip(d2, x)]
    return np.array(x), np.array(height), np.array(curvature)


def short_side(search):
    """rFFTs of the spectrum's three data arrays at the bank length (:func:`short_length`)."""
    return search.side.ffts


#: Lag offsets (pixels) of the two refinement passes about a peak: a quartic through five points
#: within one pixel, then within a fifth of a pixel of the first estimate.
REFINE_OFFSETS = ((-1.0, -0.5, 0.0, 0.5, 1.0), (-0.2, -0.1, 0.0, 0.1, 0.2))


def _stacked(arrays, nf=None):
    """(T, nf) array of 1-D FFTs of different band limits, zero-padded to ``nf`` (default: the longest)."""
    nf = max(x.size for x in arrays) if nf is None else nf
    out = np.zeros((len(arrays), nf), complex)
    for i, x in enumerate(arrays):
        out[i, :x.size] = x
    return out


_STACKED = forgettable({})


def _stacked_bands(templates, m, full):
    """(nf, FT, FT2, FV) of :func:`_refine`: the templates' :meth:`~.prepared.PreparedTemplate.band_ffts` at
    length ``m`` stacked (FV None where ``full``), kept for the last few sets of templates (the mixtures of a
    survey's spectra repeat; the prepared templates are cached objects, and the set is kept with its arrays,
    so an identity stays theirs while kept)."""
    key = (tuple(id(t) for t in templates), m, full)
    found = _STACKED.get(key)
    if found is None or any(a is not b for a, b in zip(found[0], templates)):
        bands = [t.band_ffts(m) for t in templates]
        nf = max(x.size for b in bands for x in b[:2 if full else 3])
        FT, FT2 = (_stacked([b[i] for b in bands], nf) for i in range(2))
        FV = None if full else _stacked([b[2] for b in bands], nf)
        for x in (FT, FT2, FV):
            if x is not None:
                x.flags.writeable = False
        found = (templates, (nf, FT, FT2, FV))
        while len(_STACKED) >= 16:   # oldest out first; the arrays are returned, not looked up again
            _STACKED.pop(next(iter(_STACKED)), None)
        _STACKED[key] = found
    return found[1]


def refine_peaks(templates, lags, data_ffts, m, pad, starts=None):
    """(lag, height, curvature) arrays of each template's normalised-CCF maximum near its integer ``lags``.

    The correlations are evaluated as Fourier series at fractional lags (band-limited
    interpolation: no parabola "peak locking"), all templates at once, and each maximum found
    by Newton's method on a quartic through five lags, twice (:data:`REFINE_OFFSETS`). Sums
    are numpy's own (``einsum`` without BLAS): bit-identical whatever the thread count.

    ``starts`` (fractional lags, e.g. :class:`BankScores` ``start``) skip the first, coarse pass:
    the fine one runs about them, and the templates whose maximum it does not find inside its
    window (the start was more than a fifth of a pixel off) go through both passes after all.
    """
    if starts is None:
        return _refine(templates, lags, data_ffts, m, pad, REFINE_OFFSETS)
    fine = REFINE_OFFSETS[-1]
    x, h, c = _refine(templates, starts, data_ffts, m, pad, (fine,))
    bound = float(np.max(np.abs(fine)))
    # a maximum on the window's edge (or none) is not the maximum: both passes for those
    redo = ~np.isfinite(h) | (np.abs(x - np.asarray(starts, float)) >= bound * (1 - 1e-9))
    if redo.any():
        idx = np.flatnonzero(redo)
        xr, hr, cr = _refine([templates[i] for i in idx], [lags[i] for i in idx], data_ffts, m, pad, REFINE_OFFSETS)
        x, h, c = x.copy(), h.copy(), c.copy()
        x[idx], h[idx], c[idx] = xr, hr, cr
    return x, h, c


def _refine(templates, lags, data_ffts, m, pad, passes):
    """:func:`refine_peaks` from ``lags`` through the offset stencils ``passes``."""
    from .correlation import Correlation

    x0 = np.asarray(lags, float)
    # where every template's coverage is 1 over all the pixels any lag of the passes uses (the data's
    # n pixels: the template's less the pad on both sides), the three coverage rows are the data's own
    # sums (their transforms' zero frequency), the same at every lag: three of the six sums not made
    reach = sum(float(np.max(np.abs(offs))) for offs in passes)
    full = full_cover(templates, x0, pad, templates[0].V.size - 2 * pad, reach)
    nf, FT, FT2, FV = _stacked_bands(tuple(templates), m, full)
    A = [a[:nf] for a in data_ffts]
    height = curv = np.full(x0.size, np.nan)
    pairs = ((0, 0), (1, 0), (1, 1), (0, 2), (2, 2), (1, 2))   # (data, template) arrays of the six rows
    if full:
        pairs = pairs[:3]
        cover = np.array([data_ffts[0][0].real, data_ffts[2][0].real, data_ffts[1][0].real])   # a1, a3, a2
    for offs in passes:
        # row (a, b) at lag s = x0 + o (index k = pad - s) is Re sum_f conj(A_a) B_b e^{i theta_t f} conj(p_o):
        # the per-template phase e^{i theta_t f} goes into the three template arrays, the cached
        # per-offset phase p_o (inverse-DFT weights included) into the three data arrays, and
        # Re(x conj(y)) = x.re y.re + x.im y.im is one real sum over the interleaved (re, im)
        # layout of x = B_b e^{i theta} and y = A_a p_o (numpy's einsum, not BLAS: bit-identical
        # whatever the thread count). Six (T, nf) products instead of six (6, T, nf) arrays.
        turn = turns((2.0 * np.pi / m) * (pad - x0), nf)                     # (T, nf)
        p = _offset_phases(m, nf, tuple(offs))                                # (L, nf), cached
        tv = [(B * turn).view(np.float64) for B in ((FT, FT2) if full else (FT, FT2, FV))]
        dv = [(a[None, :] * p).view(np.float64) for a in (A[:2] if full else A)]
        rows = np.stack([np.einsum("tf,lf->tl", tv[j], dv[i]) for i, j in pairs])
        if full:
            rows = np.concatenate([rows, np.broadcast_to(cover[:, None, None], (3,) + rows.shape[1:])])
        c, _ = Correlation.combine(rows)
        ok = np.all(np.isfinite(c), axis=1)
        dx, h, cv = poly_peaks(offs, np.where(ok[:, None], c, 0.0))
        x0 = np.where(ok, x0 + dx, x0)
        height, curv = np.where(ok, h, np.nan), np.where(ok, cv, np.nan)
    return x0, height, curv
