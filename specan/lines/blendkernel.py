"""The metal lines in a hydrogen line's window compiled (numba): numpy's cost per call, not
arithmetic, is their time.

:func:`specan.lines.hydrogen_blends.less_blends` works on a hydrogen line's window (~40 pixels) and a
few positions in it with some fifty numpy calls; three of its steps are made here in one call each,
the same comparisons and arithmetic on the same numbers in the same order, so the same values
(tests/test_lines_blendkernel.py holds them to the numpy code, which stays the fallback:
:mod:`.compiled`):

- :func:`metal_candidates`: the positions modelled (the listed lines there, the features no listed
  line stands for, none at the hydrogen lines' own profiles nor in the line's core);
- :func:`crest_excess`: the absorption under the window's crests before its sum
  (:func:`specan.lines.hydrogen_blends.blanketing`; the sum stays numpy's);
- :func:`dips`: whether the spectrum dips at each listed line (:func:`specan.lines.hydrogen_blends._dips`).

Their interpolation is np.interp's, rules and arithmetic (:func:`_interp`, tested against it).
Measured: less_blends replayed on the bench's, the dense and the demo spectra's 534 calls 0.91-0.95 ->
0.63-0.64 ms a spectrum (CPU, alternated in one process, load 1-2).

Compiled on first use, or loaded from numba's on-disk cache (``cache=True``); :func:`warm` (the
stage's ``warm_up``) does it ahead, so that forked workers inherit the machine code.
"""

from __future__ import annotations

import numpy as np

try:   # a dependency; should it fail to import (a platform without its wheels), the numpy code runs
    from numba import njit
    AVAILABLE = True
except ImportError:   # pragma: no cover - exercised where numba is absent
    AVAILABLE = False

__all__ = ["AVAILABLE", "metal_candidates", "crest_excess", "dips", "warm"]


if AVAILABLE:
    @njit(cache=True)
    def _apart(value, others, sep):
        """Whether ``value`` lies farther than ``sep`` from each of ``others``: numpy's
        ``np.abs(value - others).min() > sep`` (NaN anywhere: False)."""
        for other in others:
            if not abs(value - other) > sep:
                return False
        return True

    @njit(cache=True)
    def metal_candidates(pred, hydrogen, ep_low, below, lo, hi, found, centres, sep, centre, clearance,
                         positions, owner):
        """The positions a hydrogen line's window holds metal lines at, into ``positions`` and ``owner``
        (the listed line's index, -1 for a feature); returns how many.

        The listed lines (``pred``) that are not hydrogen, arise from below ``below`` eV (``ep_low``;
        NaN: unknown, taken) and lie within ``lo``..``hi``; before them the ``found`` features farther
        than ``sep`` from every such line; of all these, those farther than ``sep`` from each of the
        hydrogen lines' ``centres`` and farther than ``clearance`` from the line's fitted ``centre``,
        in that order (``positions`` and ``owner`` at least ``found.size + pred.size`` long).
        """
        listed = np.empty(pred.shape[0], np.int64)
        nl = 0
        for k in range(pred.shape[0]):
            if not hydrogen[k] and pred[k] >= lo and pred[k] <= hi and not (ep_low[k] >= below):
                listed[nl] = k
                nl += 1
        at = np.empty(nl)
        for j in range(nl):
            at[j] = pred[listed[j]]
        m = 0
        for f in found:
            # (a feature no listed line stands for; with no listed line, every feature)
            if (nl == 0 or _apart(f, at, sep)) and _apart(f, centres, sep) and abs(f - centre) > clearance:
                positions[m] = f
                owner[m] = -1
                m += 1
        for j in range(nl):
            a = at[j]
            if _apart(a, centres, sep) and abs(a - centre) > clearance:
                positions[m] = a
                owner[m] = listed[j]
                m += 1
        return m


if AVAILABLE:
    @njit(cache=True)
    def _interp(key, xp, fp):
        """``np.interp(key, xp, fp)`` of one number over increasing ``xp``: its rules (the ends' values
        beyond them, a point's own value at it, the last point's at the last, NaN at NaN but for a single
        node) and its arithmetic
        (``slope (key - xp[j]) + fp[j]``, the slope ``(fp[j+1] - fp[j]) / (xp[j+1] - xp[j])``; NaN there:
        from the right end of the interval; still NaN over a flat interval: its value)."""
        n = xp.shape[0]
        if n == 1:
            return fp[0]   # (np.interp's one node: its value everywhere, NaN too)
        if key != key:
            return key
        if key > xp[n - 1]:
            return fp[n - 1]
        if key < xp[0]:
            return fp[0]
        # the last point at or below key (bisection: xp[j] <= key < xp[j + 1], or the last point)
        lo, hi = 0, n
        while lo < hi:
            mid = (lo + hi) >> 1
            if key >= xp[mid]:
                lo = mid + 1
            else:
                hi = mid
        j = lo - 1
        if j == n - 1 or xp[j] == key:
            return fp[j]
        slope = (fp[j + 1] - fp[j]) / (xp[j + 1] - xp[j])
        value = slope * (key - xp[j]) + fp[j]
        if value != value:
            value = slope * (key - xp[j + 1]) + fp[j + 1]
            if value != value and fp[j] == fp[j + 1]:
                value = fp[j]
        return value

    @njit(cache=True)
    def crest_excess(x, smooth, cont, centre, out):
        """:func:`specan.lines.hydrogen_blends.blanketing`'s absorption under the crests before its sum, into
        ``out``: ``max(1 - crest, 0)`` at each of the window's pixels ``x`` (at least two), the crest the
        straight line (np.interp's) through the highest ``min(smooth / cont, 1)`` on either side of
        ``centre`` (the window's middle where ``centre`` lies outside), the first of the highest."""
        n = x.shape[0]
        split = centre if x[0] < centre < x[-1] else 0.5 * (x[0] + x[-1])
        # (np.searchsorted's left side: the first pixel at or above the split; NaN sorts last)
        m = 0 if split == split else n
        while m < n and x[m] < split:
            m += 1
        level = np.empty(n)
        for i in range(n):
            v = smooth[i] / cont[i]
            level[i] = v if not v > 1.0 else 1.0   # (np.minimum(v, 1): NaN stays)
        kb = _first_highest(level, 0, m) if m else 0
        kr = _first_highest(level, m, n) if m < n else 0
        xp, fp = np.array([x[kb], x[kr]]), np.array([level[kb], level[kr]])
        for i in range(n):
            d = 1.0 - _interp(x[i], xp, fp)
            out[i] = d if (d >= 0.0 or d != d) else 0.0   # (np.maximum(d, 0): NaN stays)

    @njit(cache=True)
    def _first_highest(values, a, b):
        """``a + np.argmax(values[a:b])``: the first of the highest (the first NaN, where one is)."""
        k = a
        best = values[a]
        if best != best:
            return a
        for i in range(a + 1, b):
            v = values[i]
            if v != v:
                return i
            if v > best:
                best, k = v, i
        return k

    @njit(cache=True)
    def dips(x, smooth, smooth_err, cont, ew, profile, centre, fwhm, positions, near, significance, min_dip, out):
        """:func:`specan.lines.hydrogen_blends._dips` into ``out``: whether the depth left once ``ew`` times
        the hydrogen line's ``profile`` is taken off (``1 - smooth / cont``) is deeper at each position
        than 1.5 ``fwhm`` to either side (the sides farther than ``near`` from ``centre``; both: their
        mean) by ``significance`` times the smoothed flux's noise there, and ``min_dip``; numpy's
        operations in its order, np.interp's values."""
        n = x.shape[0]
        left = np.empty(n)
        for i in range(n):
            left[i] = 1.0 - smooth[i] / cont[i] - ew * profile[i]
        off = 1.5 * fwhm
        for k in range(positions.shape[0]):
            p = positions[k]
            at = _interp(p, x, left)
            blue, red = p - off, p + off
            use_b, use_r = abs(blue - centre) > near, abs(red - centre) > near
            lb, lr = _interp(blue, x, left), _interp(red, x, left)
            side = 0.5 * (lb + lr) if (use_b and use_r) else (lb if use_b else lr)
            floor = significance * _interp(p, x, smooth_err)
            if not floor >= min_dip and floor == floor:
                floor = min_dip   # (np.maximum: NaN stays)
            out[k] = at - side > floor


def warm():
    """Compile (or load from numba's cache) the kernels for the types :func:`specan.lines.hydrogen_blends.less_blends`
    passes, on a tiny problem. Does nothing without numba."""
    if not AVAILABLE:
        return
    pred = np.array([1.0, 2.0, 3.0])
    out = np.empty(5)
    metal_candidates(pred, np.zeros(3, bool), np.zeros(3), 10.0, 0.0, 4.0, np.array([2.5, 3.5]), np.array([1.0]),
                     0.1, 1.0, 0.5, out, np.empty(5, np.int64))
    x = np.linspace(1.0, 2.0, 6)
    flux = np.full(10, 0.9)
    crest_excess(x, flux[2:8], np.ones(6), 1.5, np.empty(6))
    dips(x, flux[2:8], flux[2:8], np.ones(6), 0.1, np.ones(6), 1.5, 0.2, np.array([1.2]), 0.2, 3.0, 0.01,
         np.empty(1, bool))
