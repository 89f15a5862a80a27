"""A companion's correlation peak: the second peak and the two-component deblend.

The CCF a single star identical to the template would give (:func:`~.correlation.single_star_ccf`)
is removed from the measured one; a significant peak in what remains is a second star. Both
velocities then come from fitting the CCF with two copies of that single-star shape.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.interpolate import make_interp_spline

from .correlation import fwhm_pixels

__all__ = ["Companion", "second_peak", "two_component_fit", "detect_companion"]


def second_peak(resid, model, j, s0, h, sig_a, smax, min_ratio, min_sigma):
    """Lag of a significant second peak in the residual CCF, or None.

    Only the core of the single-star shape (its half width at half maximum) is excluded, so a
    companion blended into the wing of the main peak still shows in the residual.
    """
    lag = s0 + j
    hw = 0.5 * fwhm_pixels(j, model, 1.0) if model is not None else float("nan")
    excl = np.abs(j) <= max(hw if np.isfinite(hw) else 2.0, 2.0)
    ok = ~excl & (np.abs(lag) <= smax) & np.isfinite(resid)
    if not ok.any():
        return None
    i = np.argmax(np.where(ok, resid, -np.inf))
    thr = max(min_ratio * h, min_sigma * math.sqrt(2.0) * sig_a)
    if resid[i] < thr or i == 0 or i == len(resid) - 1:
        return None
    y0, y1, y2 = resid[i - 1], resid[i], resid[i + 1]
    den = y0 - 2 * y1 + y2
    d = 0.5 * (y0 - y2) / den if den < 0 else 0.0
    return float(lag[i] + d), float(resid[i])


def two_component_fit(vals, model, j, s0, h, s2, h2):
    """Deblend a composite CCF: vals ~ h1 M(j - d1) + h2 M(j - d2), M the single-star shape.

    Returns (s1, s2, h1, h2) or None when the fit fails.
    """
    from scipy.optimize import least_squares

    shape = make_interp_spline(j.astype(float), model, k=3)
    d2 = s2 - s0
    win = np.abs(j) <= abs(d2) + 2.0 * max(2.0, fwhm_pixels(j, model, 1.0))
    jj, yy = j[win].astype(float), vals[win]
    lo, hi = jj[0] + 1, jj[-1] - 1

    def resid(p):
        h1, a1, hb, a2 = p
        return h1 * shape(np.clip(jj - a1, j[0], j[-1])) + hb * shape(np.clip(jj - a2, j[0], j[-1])) - yy

    try:
        fit = least_squares(resid, [h, 0.0, h2, d2], bounds=([0, lo, 0, lo], [2, hi, 2, hi]))
    except ValueError:
        return None
    if not fit.success:
        return None
    h1, a1, hb, a2 = fit.x
    return s0 + a1, s0 + a2, h1, hb


class Companion(NamedTuple):
    """Lag (grid pixels) of the primary, and of a second star or None (a single star)."""

    primary: float
    second: float | None


def detect_companion(about, peak, sigma_a, smax, min_ratio, min_sigma, notes):
    """The :class:`Companion` read from the CCF ``about`` (:class:`~.correlation.PeakCCF`) its ``peak``.

    A second peak counts when above ``min_ratio`` of the main one and ``min_sigma`` CCF noise
    sigmas (``sigma_a``, Tonry & Davis), within ``|lag| <= smax``.
    """
    s0, h = peak.lag, peak.height
    # second peak: residual after removing the single-star CCF shape
    second = second_peak(about.residual, about.model, about.j, s0, h, sigma_a, smax, min_ratio, min_sigma)
    if second is None:
        return Companion(s0, None)
    fit = two_component_fit(about.values, about.model, about.j, s0, h, *second) if about.model is not None else None
    if fit is None:
        return Companion(s0, second[0])
    s1, s2, h1, h2 = fit
    if h2 > h1:  # the primary is the stronger correlation
        s1, s2 = s2, s1
    notes.append("composite: both velocities from a two-component fit of the CCF (single-star shape "
                 "of the template); rv_err is that of the blended peak")
    return Companion(s1, s2)
