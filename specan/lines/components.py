"""Blend components: which profiles a line's fit holds besides the line itself, and which
pixels a hydrogen fit leaves to the metal lines in its wings.
"""

from __future__ import annotations

import numpy as np

__all__ = ["window_features", "component_centres", "wing_mask"]

# Lines closer than this many line widths cannot be told apart: they stay one component
# (the target's EW is then theirs together, and ``blend`` names them).
MIN_SEPARATION = 0.6


def window_features(data, features, window, sign):
    """Positions of the features of the line's kind (absorption or emission) inside the window."""
    pos, femis = features.position, features.emission
    if not pos.size:
        return np.zeros(0)
    lo, hi = data.wave[window.lo], data.wave[window.hi]
    return pos[(pos >= lo) & (pos <= hi) & (femis == (sign < 0))]


def component_centres(data, targets, i, centre, window, in_win):
    """Centres of the profiles fitted to line ``i``: the line first, then its companions.

    Companions are the other listed lines of the same broadness class (hydrogen or
    not) inside the window, moved with the line's own offset, and, for lines other
    than hydrogen, the detected features there that no listed line explains
    (deblending, common practice).
    """
    pred, is_h, fw = targets.pred, targets.hydrogen, targets.fwhm[i]
    inside = np.flatnonzero((pred >= data.wave[window.lo]) & (pred <= data.wave[window.hi]) & (is_h == is_h[i]))
    inside = [j for j in inside if j != i]
    shift = centre - pred[i]
    centres = [centre]
    candidates = [pred[j] + shift for j in inside]
    if not is_h[i]:
        candidates += list(in_win)
    for c in candidates:
        if min(abs(c - x) for x in centres) > MIN_SEPARATION * fw:
            centres.append(c)
    return np.array(centres)


def wing_mask(data, targets, i, centre, window, in_win, centres):
    """Pixels of a hydrogen line's window that its fit gives no weight, or None.

    Hydrogen profiles are fitted around the metal lines in their wings: those pixels
    get no weight (a shared Voigt width would give each metal line Stark wings). The
    metal lines are the features found there and the listed lines, which on a steep
    wing may make no local minimum of their own.
    """
    pred, is_h, fw = targets.pred, targets.hydrogen, targets.fwhm[i]
    lo, hi = window.lo, window.hi
    shift = centre - pred[i]
    listed = pred[(~is_h) & (pred >= data.wave[lo]) & (pred <= data.wave[hi])] + shift
    others = np.concatenate([in_win, listed])
    if not others.size:
        return None
    xw = data.wave[lo:hi + 1]
    far = np.abs(others[:, None] - np.asarray(centres)[None, :]).min(axis=1) > MIN_SEPARATION * fw
    if not far.any():
        return None
    return (np.abs(xw[None, :] - others[far][:, None]) < 1.2 * fw).any(axis=0)
