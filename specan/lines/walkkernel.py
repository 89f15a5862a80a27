"""The measurement windows' walks compiled (numba): numpy's cost per call, not arithmetic, is their time.

In numpy (:func:`specan.lines.windows._walks_upto`) every walk of a call is tested over a block of
steps at once, ~40 small array operations a call, most of their elements past the walks' ends (a
few dozen lines a call, ending within a few to a hundred steps). :func:`walks` takes each line and
direction a step at a time, as the one-line walk the vectorised one was written from
(:func:`specan.lines.windows.adaptive_window`): the same tests on the same values in the same
order, so the same windows to the bit (tests/test_lines_walkkernel.py holds it to the numpy code,
which stays the fallback: :mod:`.compiled`).

The kernel's signature is given, so it is compiled (or loaded from numba's on-disk cache,
``cache=True``) when this module is imported: :func:`warm` (the stage's ``warm_up``) imports it in a
process that forks workers, which then inherit the machine code. Its inputs are typed as read-only
arrays of any layout (the set-up's read-only arrays and views pass without a copy); its outputs are
C-contiguous arrays the caller makes.

Measured: the bench's (benchmarks/bench_lines.py) 80 calls of ``_walks`` replayed, 0.59-0.62 -> 0.036-0.044
ms a spectrum (CPU, alternated in one process, load 2.2).
"""

from __future__ import annotations

import math

try:   # a dependency; should it fail to import (a platform without its wheels), the numpy code runs
    from numba import njit, types
    AVAILABLE = True
except ImportError:   # pragma: no cover - exercised where numba is absent
    AVAILABLE = False

__all__ = ["AVAILABLE", "walks", "warm"]


if AVAILABLE:
    _F1 = types.Array(types.float64, 1, "A", readonly=True)
    _I1 = types.Array(types.int64, 1, "A", readonly=True)
    _B1 = types.Array(types.boolean, 1, "A", readonly=True)
    _F1_OUT = types.float64[::1]
    _I1_OUT, _B1_OUT = types.int64[::1], types.boolean[::1]

    @njit(types.float64(types.float64, types.float64), cache=True)
    def _maximum(a, b):
        """``np.maximum(a, b)`` of two numbers (NaN where either is)."""
        if a >= b:
            return a if b == b else b
        if b > a:
            return b
        return a + b   # (a NaN)

    @njit(types.void(_F1, _F1, _F1, _F1, _F1, _F1, _I1, _F1, _F1, _F1, _B1, _I1, _I1_OUT, _F1_OUT, _B1_OUT),
          cache=True)
    def walks(wave, dx, smooth, err, smooth_wide, err_wide, ic, sign, min_half, max_half, wide, step,
              end, level, cut):
        """Every line's walk from pixel ``ic[k]`` in direction ``step[k]`` into ``end``, ``level``, ``cut``.

        The rules of :func:`specan.lines.windows.adaptive_window`'s walk, in its order, on the
        smoothed flux and its noise (``smooth_wide``, ``err_wide`` where ``wide[k]``): back at the
        continuum, a neighbour deepening (the edge at the least depth so far, cut), a plateau (its
        level the smoothed flux there), or the spectrum or ``max_half`` ending the walk (level 1).
        The plateau test looks one line width (``wide``: five) back along the walk, as
        :func:`specan.lines.windows._walks_upto` does.
        """
        n = wave.shape[0]
        for k in range(ic.shape[0]):
            w = wide[k]
            sm = smooth_wide if w else smooth
            er = err_wide if w else err
            s, st, c, mh, mx = sign[k], step[k], ic[k], min_half[k], max_half[k]
            x0 = wave[c]
            depth0 = s * (1.0 - sm[c])
            d0 = _maximum(depth0, 0.0)
            best, best_i, i, j = depth0, c, c, 0
            e, lv, ct = c, 1.0, False
            while True:
                nxt = i + st
                if nxt < 0 or nxt >= n or abs(wave[nxt] - x0) > mx:
                    # still falling at the limit: a wing, not a pseudo-continuum
                    e, lv, ct = i, 1.0, False
                    break
                i = nxt
                j += 1
                di = s * (1.0 - sm[i])
                dist = abs(wave[i] - x0)
                if di < best:
                    best, best_i = di, i
                noise = er[i]
                if di <= _maximum(noise, 2e-3) and dist >= mh:
                    e, lv, ct = i, 1.0, False
                    break
                if di > best + _maximum(3.0 * noise, 5e-3) and dist >= 0.5 * mh:
                    e, lv, ct = best_i, 1.0, True
                    break
                if not (di > 0.5 * d0):
                    if w:
                        near, width, floor = dist >= 10.0 * mh, 5.0 * mh, 0.1 * di
                    else:
                        near, width, floor = dist >= 2.0 * mh, 1.0 * mh, 0.01 * d0
                    if near:
                        back = j - int(math.ceil(width / dx[i]))
                        b = c + st * (back if back > 0 else 0)
                        b = min(max(b, 0), n - 1)
                        if s * (1.0 - sm[b]) - di < _maximum(2.0 * noise, floor):
                            e, lv, ct = i, sm[i], False
                            break
            end[k], level[k], cut[k] = e, lv, ct


def warm():
    """Nothing left to do: the kernels are compiled, or loaded from numba's cache, as this module is
    imported (their signatures are given). Called by :func:`specan.lines.warm_up` so that a process
    forking workers imports it first."""
    return AVAILABLE
