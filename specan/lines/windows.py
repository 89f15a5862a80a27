"""Measurement windows: the pixels a line is measured over and the local continuum under it."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

__all__ = ["Window", "line_window", "adaptive_window", "fixed_window", "profile_window", "wing_reach",
           "local_continuum", "MAX_WING"]

#: Farthest a strong line's window reaches from its centre, Angstrom: the solar Ca II K
#: wings are tens of Angstrom wide (common practice); beyond ~100 A the continuum fit
#: itself (smoothing scale 300 A) can no longer tell wing from continuum.
MAX_WING = 100.0


class Window(NamedTuple):
    """Pixels lo..hi of a line and the continuum level at each edge."""

    lo: int
    hi: int
    levels: tuple   #: (float, float) local continuum at lo and hi
    cut: bool       #: True when a neighbouring line ended the window


def line_window(data, ic, centre, sign, fwhm, hydrogen, matched):
    """The window of one line centred on pixel ``ic`` (wavelength ``centre``).

    A line matched to a feature gets an :func:`adaptive_window` reaching out to 25
    line widths (hydrogen: 80 Angstrom at least, on the widely smoothed flux); a line
    with no feature a :func:`fixed_window`.
    """
    if not matched:
        return fixed_window(data, centre, fwhm)
    max_half = max(25.0 * fwhm, 80.0) if hydrogen else 25.0 * fwhm
    return adaptive_window(data, ic, sign, fwhm, max_half, wide=hydrogen)


def fixed_window(data, centre, fwhm):
    """+-1 line width around ``centre`` against the smoothed flux at its edges.

    Nothing found here: the integral is an upper limit, and inside another line's wing
    that wing is the continuum.
    """
    lo = int(np.searchsorted(data.wave, centre - fwhm))
    hi = int(np.clip(np.searchsorted(data.wave, centre + fwhm), lo + 1, data.wave.size - 1))
    lo = min(lo, hi - 1)
    return Window(lo, hi, (float(data.smooth[lo]), float(data.smooth[hi])), False)


def adaptive_window(data, ic, sign, min_half, max_half, wide=False):
    """Adaptive integration window around pixel ``ic``.

    Walk outward on the smoothed flux until it is back at the continuum (within
    its noise), stops falling (a plateau: the local pseudo-continuum of a crowded
    spectrum), or starts to deepen again (a neighbouring line: the edge is put at
    the crest between the two), or ``max_half`` Angstrom is reached.

    Returns
    -------
    Window
        Edge pixels; the local continuum at each edge: 1 where the walk reached the
        continuum, a neighbour's crest (wings belong to the line) or the limit, the
        smoothed flux where it stopped on a plateau; whether a neighbouring line cut it.
    """
    # hydrogen lines walk on a flux smoothed over three line widths: the metal lines in
    # their wings must not end the window
    smooth = data.smooth_wide if wide else data.smooth
    depth = sign * (1.0 - smooth)
    err = data.smooth_wide_err if wide else data.smooth_err
    edges, levels, cut = [], [], False
    for step in (-1, 1):
        end, level, cut_here = _walk(data, smooth, depth, err, ic, step, min_half, max_half, wide)
        # a plateau within the noise of the continuum is the continuum
        if abs(1.0 - level) <= 3.0 * err[end]:
            level = 1.0
        edges.append(end)
        levels.append(float(level))
        cut = cut or cut_here
    if edges[0] > edges[1]:
        edges, levels = edges[::-1], levels[::-1]
    return Window(edges[0], edges[1], (levels[0], levels[1]), cut)


def _walk(data, smooth, depth, err, ic, step, min_half, max_half, wide):
    """Walk from ``ic`` in direction ``step``; return (edge pixel, level there, cut by a neighbour)."""
    x0 = data.wave[ic]
    d0 = max(depth[ic], 0.0)
    i, best_i, best = ic, ic, depth[ic]
    trail = [ic]  # pixels walked, to look one resolution element back
    while True:
        nxt = i + step
        if nxt < 0 or nxt >= data.wave.size or abs(data.wave[nxt] - x0) > max_half:
            # still falling at the limit: a wing, not a pseudo-continuum
            return i, 1.0, False
        i = nxt
        trail.append(i)
        di = depth[i]
        dist = abs(data.wave[i] - x0)
        if di < best:
            best, best_i = di, i
        noise = err[i]
        if di <= max(noise, 2e-3) and dist >= min_half:
            return i, 1.0, False
        if di > best + max(3.0 * noise, 5e-3) and dist >= 0.5 * min_half:
            return best_i, 1.0, True
        if _on_plateau(data, depth, trail, dist, noise, d0, min_half, wide):
            return i, smooth[i], False


def _on_plateau(data, depth, trail, dist, noise, d0, min_half, wide):
    """Whether the depth at the walk's last pixel has stopped falling."""
    i = trail[-1]
    di = depth[i]
    if di > 0.5 * d0:
        # still in the line's core: a saturated core is flat, but it is not a pseudo-continuum
        return False
    if not wide and dist >= 2.0 * min_half:
        # the pixel one instrument FWHM back toward the centre
        back = trail[max(len(trail) - 1 - int(np.ceil(min_half / data.dx[i])), 0)]
        return depth[back] - di < max(2.0 * noise, 0.01 * d0)
    if wide and dist >= 10.0 * min_half:
        # hydrogen: Stark wings fall off slowly yet carry much of the EW, so the
        # plateau test looks five widths back and asks for a 10% relative fall
        back = trail[max(len(trail) - 1 - int(np.ceil(5.0 * min_half / data.dx[i])), 0)]
        return depth[back] - di < max(2.0 * noise, 0.1 * di)
    return False


def wing_reach(ew, sigma, gamma, threshold):
    """Distance (A) from the centre at which a Voigt line of ``ew`` falls to ``threshold`` depth.

    The Lorentzian wing ``ew gamma / (pi x^2)`` sets it where it is wider than the Gaussian
    core (3 sigma, where the core has fallen to 1% of its peak).
    """
    lorentz = np.sqrt(max(ew, 0.0) * max(gamma, 0.0) / (np.pi * threshold))
    return float(max(lorentz, 3.0 * sigma))


def profile_window(data, centre, reach, max_half=MAX_WING):
    """The window reaching ``reach`` Angstrom (at most ``max_half``) to each side of ``centre``.

    Its edges are where a fitted profile's wings meet the continuum (see :func:`wing_reach`),
    so the local continuum is the normalised continuum itself, 1.
    """
    half = min(reach, max_half)
    lo = int(np.clip(np.searchsorted(data.wave, centre - half), 0, data.wave.size - 2))
    hi = int(np.clip(np.searchsorted(data.wave, centre + half), lo + 1, data.wave.size - 1))
    return Window(lo, hi, (1.0, 1.0), False)


def local_continuum(data, window):
    """Straight line between the two edge levels over the window's pixels."""
    lo, hi, levels = window.lo, window.hi, window.levels
    x = data.wave[lo:hi + 1]
    if hi == lo:
        return np.full(1, levels[0])
    t = (x - x[0]) / (x[-1] - x[0])
    return levels[0] * (1.0 - t) + levels[1] * t
