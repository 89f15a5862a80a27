"""The metal lines inside a hydrogen line's window, modelled and taken out of its equivalent width.

A hydrogen line is integrated over a window tens of Angstrom wide (:mod:`specan.lines.windows`);
in a G or K star that window holds metal lines, whose absorption the plain integral counts as
hydrogen (the solar H beta at R 2000 read 5.46 A against 3.68 A published, measured). Here
they are modelled: the window's depth below its local continuum is fitted as the line's own
fitted profile (its shape held, its strength free) plus one Gaussian of the spectrum's line
width at each absorption feature found in the window away from the line's core, every strength
at least zero; the Gaussians' area inside the window is taken off the integral.

The profile's shape is held because its fit was made on the pixels the metal lines leave
(:func:`~specan.lines.components.wing_mask`), and a free shape in this fit would trade its
wings for the metal lines (measured: one Gauss-Newton step of the full problem from that fit
took the solar H beta's damping width from 3.9 to 7.6 A); with the shape held the problem is
linear, one small non-negative least-squares solve per line.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import nnls
from scipy.special import voigt_profile

from ..resolution import GAUSS_FWHM
from .components import MIN_SEPARATION, window_features

__all__ = ["CORE_CLEARANCE", "metal_absorption", "less_blends"]

#: Metal lines closer than this many line widths to the hydrogen line's fitted centre are left
#: in it: inside its core the profile's shape is least certain, and a Gaussian there takes up
#: the mismatch between a Voigt and the line's core (measured on a synthetic G2 V spectrum at
#: S/N 100: a Gaussian at the listed He II 6560 line, absent at G2, 0.8 line widths from H alpha,
#: took 0.22 A from it).
CORE_CLEARANCE = 1.0


def metal_absorption(data, window, cont, fit, fwhm, positions):
    """Equivalent width of the metal lines at ``positions`` inside ``window``, and its error.

    Parameters
    ----------
    data : LineData
    window : Window
        The hydrogen line's window; ``cont`` its local continuum over the window's pixels.
    fit : dict
        The hydrogen line's Voigt fit (``centre``, ``sigma``, ``gamma``).
    fwhm : float
        The spectrum's line width there, Angstrom.
    positions : array
        Metal line positions, Angstrom.

    Returns
    -------
    (float, float, int)
        Their summed equivalent width inside the window (Angstrom), its error from the fit's
        covariance, and the number of metal lines given some strength.
    """
    positions = np.asarray(positions, float)
    positions = positions[np.abs(positions - fit["centre"]) > CORE_CLEARANCE * fwhm]
    if not positions.size:
        return 0.0, 0.0, 0
    sel = slice(window.lo, window.hi + 1)
    x = data.wave[sel]
    # depth below the local continuum; the flux's weights carry over times the continuum
    # (pixels of no weight are rows of zeros: they change nothing)
    wts = np.sqrt(data.weight[sel]) * cont
    if np.count_nonzero(wts) < positions.size + 2:
        return 0.0, 0.0, 0
    sig = fwhm / GAUSS_FWHM
    cols = np.empty((positions.size + 1, x.size))
    cols[0] = voigt_profile(x - fit["centre"], fit["sigma"], fit["gamma"])
    cols[1:] = np.exp(-0.5 * ((x[None, :] - positions[:, None]) / sig) ** 2) / (sig * np.sqrt(2.0 * np.pi))
    a = (cols * wts).T
    # scaled columns: nnls is not scale-invariant in its tolerance
    scale = np.sqrt(np.einsum("ij,ij->j", a, a))
    scale[scale == 0] = 1.0
    try:
        sol, _ = nnls(a / scale, np.where(wts > 0, (1.0 - data.flux[sel] / cont) * wts, 0.0))
    except RuntimeError:   # no convergence
        return 0.0, 0.0, 0
    sol = sol / scale
    area = cols[1:] @ data.dx[sel]                     # each unit-area Gaussian inside the window
    metal = float(sol[1:] @ area)
    # error from the covariance of the strengths left free (those at zero are held there)
    free = sol > 0
    free[0] = True
    g = np.concatenate([[0.0], area])[free]
    normal = a[:, free].T @ a[:, free]
    try:
        var = float(g @ np.linalg.solve(normal, g))
    except np.linalg.LinAlgError:   # two features on one pixel: their sum is still known
        var = float(g @ np.linalg.pinv(normal) @ g)
    return metal, float(np.sqrt(max(var, 0.0))), int(np.count_nonzero(sol[1:]))


def less_blends(data, features, targets, i, plan):
    """Take the metal lines inside hydrogen line ``i``'s window out of its integrated equivalent width.

    Changes ``plan.result`` in place (``method`` "integration_less_blends", ``ew``, ``ew_err``)
    where the line is an absorption line integrated over its window with a Voigt fit and
    metal lines of some strength lie in the window; otherwise leaves it.

    Parameters
    ----------
    data : LineData
    features : Features
    targets : Targets
    i : int
        The hydrogen line's index in ``targets``.
    plan : LinePlan
        Its plan, fit made (:func:`specan.lines.measurement.finish_line`).
    """
    result, fit, window = plan.result, plan.fit, plan.window
    if (window is None or fit is None or not plan.hydrogen or plan.sign < 0 or not plan.voigt
            or result.method != "integration"):
        return
    # the features found in the window, not the listed lines without one: a line put where the
    # spectrum shows none would only take up noise (never less than zero, so always some)
    positions = window_features(data, features, window, plan.sign)
    if positions.size:
        positions = positions[np.abs(positions[:, None] - plan.centres[None, :]).min(axis=1)
                              > MIN_SEPARATION * plan.fw]
    if not positions.size:
        return
    metal, err, used = metal_absorption(data, window, plan.cont, fit, plan.fw, positions)
    if not used:
        return
    result.method = "integration_less_blends"
    result.ew = result.ew_int - metal
    # (the integral and the fit share pixels, so the two errors are not independent: their
    # quadratic sum is the larger, cautious figure)
    result.ew_err = float(np.hypot(result.ew_int_err, err))
