"""The metal lines a hydrogen line's window holds, chosen compiled (numba): numpy's cost per call,
not arithmetic, is their time.

:func:`specan.lines.hydrogen_blends.less_blends` picks the positions it models in a hydrogen line's
window (the listed metal lines there, the features no listed line stands for, none at the hydrogen
lines' own profiles nor in the line's core) with some twenty numpy calls on arrays of a few elements,
~20 us a line; :func:`metal_candidates` makes the same choice in one call: the same comparisons on the
same numbers, so the same positions (tests/test_lines_blendkernel.py holds it to the numpy code, which
stays the fallback: :mod:`.compiled`).

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

__all__ = ["AVAILABLE", "metal_candidates", "warm"]


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


def warm():
    """Compile (or load from numba's cache) :func:`metal_candidates` for the types
    :func:`specan.lines.hydrogen_blends.less_blends` passes, on a tiny problem. Does nothing without numba."""
    if not AVAILABLE:
        return
    pred = np.array([1.0, 2.0, 3.0])
    out = np.empty(5)
    metal_candidates(pred, np.zeros(3, bool), np.zeros(3), 10.0, 0.0, 4.0, np.array([2.5, 3.5]), np.array([1.0]),
                     0.1, 1.0, 0.5, out, np.empty(5, np.int64))
