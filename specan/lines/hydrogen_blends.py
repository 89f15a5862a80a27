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

The metal lines modelled are the features found in the window and the listed lines there: on a
hydrogen line's steep wing a metal line makes no local minimum of its own (the Kurucz Sun at R 2000:
Mg I 3832 and 3838 beside H9 were no features, measured), so each listed line is given a column too,
and kept where the flux, the hydrogen line's fitted profile taken off, dips at it (a listed line put
where the spectrum shows none would only take up noise: never less than zero, so always some). The
listed lines kept are named in the line's ``blend``.

What cannot be separated is stated as its own error term, ``ew_err_blend`` (:func:`blanketing`,
:func:`series_shares`): at the resolutions this package meets (R 1000-5000) the crests between the
weak lines of a G or K star's blue spectrum lie well below the true continuum (the Kurucz Sun at
R 2000: 0.6-0.8 between 3750 and 3900 A, measured), and whether that depression under a high
Balmer line is its wing or the summed weak lines no feature stands for cannot be told from the
spectrum; nor can a partner closer than a line width (Ca II H, 1.6 A from H epsilon).
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import nnls
from scipy.special import voigt_profile

from ..resolution import GAUSS_FWHM
from . import compiled
from .components import MIN_SEPARATION, window_features

__all__ = ["CORE_CLEARANCE", "LISTED_SIGNIFICANCE", "metal_absorption", "metal_lines", "blanketing",
           "less_blends", "series_shares"]

#: Metal lines closer than this many line widths to the hydrogen line's fitted centre are left
#: in it: inside its core the profile's shape is least certain, and a Gaussian there takes up
#: the mismatch between a Voigt and the line's core (measured on a synthetic G2 V spectrum at
#: S/N 100: a Gaussian at the listed He II 6560 line, absent at G2, 0.8 line widths from H alpha,
#: took 0.22 A from it).
CORE_CLEARANCE = 1.0

#: A listed line with no feature of its own is modelled where the flux dips at it by at least this
#: many times its noise (:func:`_dips`; common practice for a detection: 3-5 sigma).
LISTED_SIGNIFICANCE = 3.0


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
    metal, err, each, _, _ = metal_lines(data, window, cont, fit, fwhm, positions)
    return metal, err, int(np.count_nonzero(each))


def metal_lines(data, window, cont, fit, fwhm, positions, profile=None, share_errors=True):
    """:func:`metal_absorption` with each line's share: ``(metal, err, each, each_err, kept)``.

    ``each`` and ``each_err`` are the equivalent width inside the window of each position in ``kept``
    (the positions left after the core clearance, in their order) and its error (NaN where the
    line's strength is held at zero). ``profile``: the fit's unit-area profile over the window's
    pixels (:func:`_fitted_profile`) when already made. ``share_errors`` False: ``each_err`` is
    None (not made: :func:`less_blends` uses the sum's error alone).
    """
    positions = np.asarray(positions, float)
    kept = positions[np.abs(positions - fit["centre"]) > CORE_CLEARANCE * fwhm]
    none = (0.0, 0.0, np.zeros(kept.size), np.full(kept.size, np.nan) if share_errors else None, kept)
    if not kept.size:
        return none
    sel = slice(window.lo, window.hi + 1)
    x = data.wave[sel]
    # depth below the local continuum; the flux's weights carry over times the continuum
    # (pixels of no weight are rows of zeros: they change nothing)
    wts = np.sqrt(data.weight[sel]) * cont
    if np.count_nonzero(wts) < kept.size + 2:
        return none
    sig = fwhm / GAUSS_FWHM
    cols = np.empty((kept.size + 1, x.size))
    cols[0] = _fitted_profile(data, window, fit) if profile is None else profile
    cols[1:] = np.exp(-0.5 * ((x[None, :] - kept[:, None]) / sig) ** 2) / (sig * np.sqrt(2.0 * np.pi))
    a = (cols * wts).T
    # scaled columns: nnls is not scale-invariant in its tolerance
    scale = np.sqrt(np.einsum("ij,ij->j", a, a))
    scale[scale == 0] = 1.0
    try:
        sol, _ = nnls(a / scale, np.where(wts > 0, (1.0 - data.flux[sel] / cont) * wts, 0.0))
    except RuntimeError:   # no convergence
        return none
    sol = sol / scale
    area = cols[1:] @ data.dx[sel]                     # each unit-area Gaussian inside the window
    each = sol[1:] * area
    metal = float(each.sum())
    # error from the covariance of the strengths left free (those at zero are held there)
    free = sol > 0
    free[0] = True
    g = np.concatenate([[0.0], area])[free]
    normal = a[:, free].T @ a[:, free]
    try:
        cov = np.linalg.inv(normal)
    except np.linalg.LinAlgError:   # two features on one pixel: their sum is still known
        cov = np.linalg.pinv(normal)
    var = float(g @ cov @ g)
    each_err = None
    if share_errors:
        each_err = np.full(kept.size, np.nan)
        each_err[free[1:]] = np.sqrt(np.clip(np.diag(cov)[1:], 0.0, None)) * area[free[1:]]
    return metal, float(np.sqrt(max(var, 0.0))), each, each_err, kept


def blanketing(data, window, cont, centre):
    """Absorption under the crests of a line's window (Angstrom): what cannot be assigned.

    The crests are the highest points of the flux smoothed to the line width on each side of
    ``centre`` (never above the local continuum); the straight line through them (flat beyond
    them) is the level every metal line sits on. Between it and the local continuum lies
    absorption that is either the hydrogen line's wing or the summed weak lines no feature stands
    for: this integral is the part of the equivalent width the spectrum cannot assign, stated as
    a systematic error. Where the window ends on the continuum with clean crests (A stars; H beta
    and H alpha of the Sun) it is small.
    """
    sel = slice(window.lo, window.hi + 1)
    x = data.wave[sel]
    if x.size < 2:
        return 0.0
    kernels = compiled.blends()
    if kernels is not None:
        # compiled (:func:`specan.lines.blendkernel.crest_excess`: the same crests, np.interp's values), the
        # sum as below
        excess = np.empty(x.size)
        kernels.crest_excess(x, data.smooth[sel], cont, centre, excess)
        return float(excess @ data.dx[sel])
    level = np.minimum(data.smooth[sel] / cont, 1.0)
    # the two sides split at the centre, or at the window's middle where the centre lies outside it
    # (a line matched to a feature off its listed place)
    split = centre if x[0] < centre < x[-1] else 0.5 * (x[0] + x[-1])
    # the blue side is the pixels below the split, a first stretch of the (increasing) wavelengths; each
    # side's highest point the first of its greatest, 0 for a side with no pixel (as np.argmax over the
    # window with the other side at -inf, as this was made)
    m = int(x.searchsorted(split))
    kb = int(level[:m].argmax()) if m else 0
    kr = m + int(level[m:].argmax()) if m < x.size else 0
    crest = np.interp(x, [x[kb], x[kr]], [level[kb], level[kr]])
    return float(np.maximum(1.0 - crest, 0.0) @ data.dx[sel])


def _fitted_profile(data, window, fit):
    """The hydrogen line's fitted Voigt profile (unit area) over its window's pixels."""
    return voigt_profile(data.wave[window.lo:window.hi + 1] - fit["centre"], fit["sigma"], fit["gamma"])


def _dips(data, window, cont, fit, fwhm, positions, profile=None):
    """Whether the flux dips at each of ``positions`` once the hydrogen line's fitted profile is taken off.

    The dip is the depth left (smoothed flux to the line width, below the local continuum, less the
    fitted profile) at the position less the mean of that left 1.5 line widths to either side: a
    metal line there makes one of about its own depth, a smooth mismatch between the profile and
    the wing almost none (a noiseless synthetic A2 V H alpha, which holds no metal line 18 A out,
    had the listed Fe I 6546 given 0.04 A by a test on the fit's error alone; measured). It must
    exceed :data:`LISTED_SIGNIFICANCE` times the smoothed flux's noise there and :data:`MIN_DIP`.
    ``profile``: :func:`_fitted_profile`, when already made.
    """
    sel = slice(window.lo, window.hi + 1)
    x = data.wave[sel]
    if profile is None:
        profile = _fitted_profile(data, window, fit)
    kernels = compiled.blends()
    if kernels is not None:
        # compiled (:func:`specan.lines.blendkernel.dips`: the same arithmetic, np.interp's values)
        out = np.empty(np.size(positions), bool)
        kernels.dips(x, data.smooth[sel], data.smooth_err[sel], cont, fit["ew"], profile, fit["centre"], fwhm,
                     np.asarray(positions, float), CORE_CLEARANCE * fwhm, LISTED_SIGNIFICANCE, MIN_DIP, out)
        return out
    left = 1.0 - data.smooth[sel] / cont - fit["ew"] * profile
    at = np.interp(positions, x, left)
    blue, red = positions - 1.5 * fwhm, positions + 1.5 * fwhm
    # a side that falls in the hydrogen line's core (where the profile fits least well) is left out:
    # the other side alone (Mg I 3838, 1.5 line widths from H9 at R 2000)
    near = CORE_CLEARANCE * fwhm
    use_b = np.abs(blue - fit["centre"]) > near
    use_r = np.abs(red - fit["centre"]) > near
    lb, lr = np.interp(blue, x, left), np.interp(red, x, left)
    side = np.where(use_b & use_r, 0.5 * (lb + lr), np.where(use_b, lb, lr))
    noise = np.interp(positions, x, data.smooth_err[sel])
    return at - side > np.maximum(LISTED_SIGNIFICANCE * noise, MIN_DIP)


#: Smallest dip (fraction of the continuum) that shows a listed line with no feature of its own
#: (specan choice: a noiseless spectrum's profile mismatch must not count as one).
MIN_DIP = 0.01

#: Lower level of the Balmer lines, eV (NIST ASD: H I n=2, 10.199 eV).
BALMER_LOWER_LEVEL = 10.199


def _below_hydrogen(targets):
    """Which listed lines arise from levels below the Balmer lines' own (unknown: yes).

    Lines from higher levels (He I at 20-21 eV, N II, Si IV) are strong only in stars hot enough to
    have their lower levels filled; in the cooler stars whose hydrogen lines hold metal lines they
    would only take up whatever other, unlisted line lies there (the Kurucz Sun's H delta named
    Si IV 4116 so; measured), and in hot stars they cannot be told from the wings either.
    """
    ep = getattr(targets, "ep_low", None)
    if ep is None:
        return np.ones(targets.pred.size, bool)
    return ~(np.asarray(ep, float) >= BALMER_LOWER_LEVEL)


def less_blends(data, features, targets, i, plan):
    """Take the metal lines inside hydrogen line ``i``'s window out of its integrated equivalent width.

    Changes ``plan.result`` in place where the line is an absorption line integrated over its
    window: ``blanketing`` (:func:`blanketing`, made into ``ew_err_blend`` by :func:`series_shares`);
    where it has a Voigt fit and metal lines of some strength lie in the window also ``method``
    ("integration_less_blends"), ``ew``, ``ew_err`` and ``blend_inside`` (the listed lines among
    them, indices into ``targets``). Otherwise leaves it.

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
    if window is None or not plan.hydrogen or plan.sign < 0 or result.method != "integration":
        return
    # the absorption under the crests needs no fit (a failed one leaves the integral all the same)
    result.blanketing = blanketing(data, window, plan.cont, result.wave_obs if fit is None else fit["centre"])
    if fit is None or not plan.voigt:
        return
    # the features found in the window (where no listed line stands for them)
    found = plan.in_win if plan.in_win is not None else window_features(data, features, window, plan.sign)
    positions, owner = _metal_candidates(data, targets, plan, fit, found)
    if not positions.size:
        return
    # a listed line with no feature of its own is modelled only where the spectrum dips at it (the
    # fitted profile made once for both: ~40 us a window, measured)
    profile = _fitted_profile(data, window, fit)
    shows = (owner < 0) | _dips(data, window, plan.cont, fit, plan.fw, positions, profile)
    positions, owner = positions[shows], owner[shows]
    if not positions.size:
        return
    metal, err, each, _, _ = metal_lines(data, window, plan.cont, fit, plan.fw, positions, profile, share_errors=False)
    if not np.count_nonzero(each):
        return
    result.method = "integration_less_blends"
    result.ew = result.ew_int - metal
    result.blend_inside = tuple(int(k) for k in owner[(owner >= 0) & (each > 0)])
    # (the integral and the fit share pixels, so the two errors are not independent: their
    # quadratic sum is the larger, cautious figure)
    result.ew_err = float(np.hypot(result.ew_int_err, err))


def _metal_candidates(data, targets, plan, fit, found):
    """The positions (Angstrom) in hydrogen line ``plan``'s window where metal lines may lie, and whose
    they are (the listed line's index, -1 for a feature ``found`` there): the listed lines not hydrogen
    there, before them the features no listed line stands for; none at the hydrogen lines' own profiles
    (``plan.centres``) nor within the core clearance of the line's fitted centre.

    Compiled where :func:`specan.lines.compiled.blends` gives the kernel
    (:func:`specan.lines.blendkernel.metal_candidates`: the same comparisons, the same positions)."""
    window = plan.window
    sep = MIN_SEPARATION * plan.fw
    lo, hi = data.wave[window.lo], data.wave[window.hi]
    kernels = compiled.blends()
    if kernels is not None:
        ep = getattr(targets, "ep_low", None)
        ep = np.full(targets.pred.size, np.nan) if ep is None else np.asarray(ep, float)
        size = found.size + targets.pred.size
        positions, owner = np.empty(size), np.empty(size, np.int64)
        m = kernels.metal_candidates(targets.pred, targets.hydrogen, ep, BALMER_LOWER_LEVEL, lo, hi, found,
                                     plan.centres, sep, fit["centre"], CORE_CLEARANCE * plan.fw, positions, owner)
        return positions[:m], owner[:m]
    # the listed lines inside the window (not hydrogen) where the star's velocity puts them: not moved
    # with the hydrogen line's fitted offset, which the blend itself can pull (H9 of the Kurucz Sun at
    # R 2000 was fitted 0.96 A blue of its place, between Mg I 3832 and 3838; measured)
    listed = np.flatnonzero(~targets.hydrogen & (targets.pred >= lo) & (targets.pred <= hi)
                            & _below_hydrogen(targets))
    at = targets.pred[listed]
    if found.size and at.size:
        found = found[np.abs(found[:, None] - at[None, :]).min(axis=1) > sep]
    positions = np.concatenate([found, at])
    owner = np.concatenate([np.full(found.size, -1), listed])
    if positions.size:
        # none where the hydrogen lines' own profiles are
        far = np.abs(positions[:, None] - plan.centres[None, :]).min(axis=1) > sep
        positions, owner = positions[far], owner[far]
    # (metal_lines leaves out those within the core clearance: so here, to keep the owners in step)
    clear = np.abs(positions - fit["centre"]) > CORE_CLEARANCE * plan.fw
    return positions[clear], owner[clear]


#: H delta's place (Angstrom, between its air and vacuum wavelengths, NIST ASD: 4101.74 air, 4102.89
#: vacuum) and how far from it the line may fall (the two media, and 400 km/s: 5.5 A).
ANCHOR_WAVE, ANCHOR_REACH = 4102.3, 8.0
#: The Balmer series limit, Angstrom (NIST ASD: 3645.8 air, from memory).
SERIES_LIMIT = 3640.0


def series_shares(results, targets):
    """The share of each high Balmer line the spectrum cannot assign: its ``ew_err_blend``.

    Changes the results in place. A Balmer line above H delta (H epsilon, H8 and up, told by
    wavelength: a user's list may name them otherwise) whose :func:`less_blends` measured the
    absorption under its window's crests (``blanketing``) reports the middle of what it can be,
    from all of its share its own to none of it: ``ew`` less half the share, ``ew_err_blend`` half
    the share, ``ew_err`` with it in quadrature. The lower members keep their equivalent widths
    (``ew_err_blend`` NaN): their windows reach farther from the crowded blue and the crests under
    them are nearer the continuum (not assessed further here).

    Without H delta found in the spectrum the share is all the absorption under the crests. With it,
    the higher members' hydrogen holds no more than H delta's (common practice: the higher
    members weaken toward the series limit; measured on 8 MILES A1-A7 V stars, H8-H12 read
    8-14 A below H delta's 14-19 A), so where H delta's least
    hydrogen (its equivalent width less the absorption under its own crests, plus twice its error)
    already accounts for them, their crests are the hydrogen wings of the series (A stars, whose
    crests between the high members lie below the continuum by those wings themselves): their
    share is only what they hold beyond it, never more than under their crests (the Sun: most of
    H8-H12; MILES G0-G2 V read 5-15 A there against H delta's 2-3 A). What they hold beyond all of
    H delta's equivalent width (plus twice its error) is shared in any case, under crests or not:
    an unresolved partner such as Ca II H, 1.6 A from H epsilon, makes no crest of its own.

    Parameters
    ----------
    results : dict of int to LineResult
        The hydrogen lines measured (:func:`specan.lines.measurement.measure_lines`).
    targets : Targets
    """
    anchored, most, least = False, np.inf, np.inf
    near = [i for i in results if targets.hydrogen[i] and abs(targets.pred[i] - ANCHOR_WAVE) < ANCHOR_REACH]
    if near:
        a = results[near[0]]
        # (an H delta not found says nothing of the series: the demo night's A3 V at S/N 7 read
        # 0.03 +- 0.40 A there, and every higher member would have been shared out against it)
        if a.detected and np.isfinite(a.ew) and np.isfinite(a.ew_err) and a.ew > 0:
            anchored = True
            # the most and the least hydrogen H delta holds: all or none of the absorption under
            # its own crests (each with twice its error)
            most = a.ew + 2.0 * a.ew_err
            least = most - np.nan_to_num(a.blanketing)
    for i, result in results.items():
        share = result.blanketing
        if not (targets.hydrogen[i] and np.isfinite(share) and np.isfinite(result.ew)
                and SERIES_LIMIT < targets.pred[i] < ANCHOR_WAVE - ANCHOR_REACH):
            continue
        if anchored:
            # under its crests only what H delta's least hydrogen leaves over; and whatever H
            # delta's most leaves over in any case (an unresolved partner: Ca II H in H epsilon)
            share = max(min(share, result.ew - least), result.ew - most, 0.0)
        result.ew = result.ew - 0.5 * share
        result.ew_err_blend = 0.5 * share
        result.ew_err = float(np.hypot(result.ew_err, 0.5 * share))
