"""Measurement of listed lines: centres, depths, equivalent widths (integrated and fitted),
FWHM and their uncertainties.

:func:`measure` is the recipe; each step is a function of its own. Per line the steps
are: match a feature (:func:`match_feature`), choose the window
(:func:`specan.lines.windows.line_window`), integrate (:func:`integrated_ew`), fit the
line or blend (:func:`fit_line`), choose the reported equivalent width
(:func:`chosen_ew`) and estimate the errors (:func:`window_noise`, :func:`cayrel_error`).

By default (:func:`measure_lines` with ``batched``) the steps run for all lines together:
the starts (:func:`line_starts`) and windows (:func:`specan.lines.windows.line_windows`)
vectorised, the fits batched (:mod:`specan.lines.batchfit`); the one-by-one path
(:func:`measure_line`) stays as the reference they are tested against.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial
from itertools import chain
from operator import attrgetter
from typing import NamedTuple

import astropy.units as u
import numpy as np
from astropy.table import QTable

from ..resolution import GAUSS_FWHM
from .components import MIN_SEPARATION, component_centres, window_features, wing_mask
from .data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features, normalised
from .hydrogen import without_hydrogen
from .expected import expected_lines, star_code
from .hydrogen_blends import less_blends, series_shares
from .listed import blends, line_widths, lines_in_range, match_windows, row_values, velocities
from .batchfit import fit_planned, interp_rows, voigt_batch
from .profiles import fit_gauss, fit_profile
from .windows import line_window, line_windows, local_continuum, profile_window, wing_reach

__all__ = ["measure", "cayrel_error", "Targets", "LineResult", "line_targets", "measure_lines",
           "measure_line", "LinePlan", "LineStart", "line_start", "line_starts", "plan_line", "plan_lines",
           "finish_line", "finish_lines", "wing_fits", "window_noises", "half_widths",
           "match_feature", "integrated_ew", "central_depth", "use_voigt", "fit_line", "chosen_ew",
           "window_noise", "half_width", "line_table", "wing_fit"]

#: Profiles :func:`measure` can fit.
PROFILES = ("auto", "gauss", "voigt")
#: The quick design's rounds of a strong line's wing fit (:func:`wing_fits`; the exact design
#: makes up to three, each over the reach the last one's profile sets).
QUICK_WING_ROUNDS = 1


def cayrel_error(fwhm, pixel, snr):
    """Equivalent-width error of a Gaussian line from Cayrel (1988).

    ``sigma_EW = 1.5 * sqrt(FWHM * pixel) / (S/N)`` (Cayrel 1988, IAU Symp. 132, 345;
    from memory; continuum placement not included).

    Parameters
    ----------
    fwhm, pixel : astropy.units.Quantity or float
        Line FWHM and pixel size (same unit).
    snr : float
        Continuum signal-to-noise ratio per pixel.

    Returns
    -------
    Quantity or float
        In the unit of ``fwhm``.
    """
    return 1.5 * np.sqrt(fwhm * pixel) / snr


def measure(spectrum, linelist=None, rv=0 * u.km / u.s, resolving_power=None, profile="auto",
            window=None, detect_sigma=DETECT_SIGMA, kinds=("atomic",), min_depth=MIN_DEPTH,
            divide_hydrogen=True, star_type=None, exact_fits=False, _data=None, _batched=True):
    """Measure every listed line the spectrum covers.

    Per line: the centre is the matched feature (see :func:`identify`) or the
    Doppler-shifted laboratory wavelength. The equivalent width is integrated
    directly over an adaptive window (outward until the smoothed flux is back at
    the continuum, levels off on a pseudo-continuum, or a neighbouring line
    begins; the local continuum is taken from the window edges) and fitted with a
    profile (one component per listed line and per unlisted feature inside the
    window; shared shift and width, the width held near the spectrum's line
    width). ``ew`` is the direct integral for isolated lines and the fit when the
    window was cut by a neighbour or holds other components (``method`` says
    which); hydrogen lines are always integrated (their fit is in ``ew_fit``), the
    metal lines found inside their windows modelled and taken out of the integral
    (``integration_less_blends``, :mod:`specan.lines.hydrogen_blends`).
    Hydrogen is measured first and its fitted profiles divided out before the
    other lines are measured, so lines in Balmer wings are measured against the
    wing. Lines with no feature found are not ``detected``; their EW is
    integrated over +-1 line width against the local level (an upper limit).
    Uncertainties: ``ew_err`` from the error array (or DER_SNR noise), and
    ``ew_err_cayrel`` from Cayrel (1988). Emission lines get negative equivalent
    widths and ``emission`` True.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not (then :func:`specan.prepare.prepare` is applied).
    linelist : str, path or QTable, optional
        Default: the packaged ``"stellar"`` list.
    rv : Quantity or None
        Radial velocity of the star (``None``: estimated, see :func:`identify`).
    resolving_power : float, optional
        Overrides ``info.resolving_power``.
    profile : {"auto", "gauss", "voigt"}
        Fitted profile; ``"auto"`` uses Voigt for hydrogen lines and for very deep
        (> 0.7) lines with windows over four line widths wide, Gaussian otherwise.
    window : Quantity, optional
        Matching half-window in velocity (see :func:`identify`).
    detect_sigma : float
        Matched-filter significance above which a line is ``detected``.
    kinds : sequence of str
        Line-list ``kind`` values to measure (band heads are measured by
        :func:`band_indices`).
    min_depth : float
        Features must stand this far out of the smoothed flux around them.
    divide_hydrogen : bool
        Measure the other lines on the spectrum divided by the fitted hydrogen
        profiles (hydrogen lines with a listed low-excitation line closer than 0.6
        line widths, such as H epsilon and Ca II H, are left in).
    star_type : str or float, optional
        The star's MK type (e.g. "G2 V", or its code) when known: lines of species too hot
        for it (He I absorption in a G star, :mod:`specan.lines.expected`) are measured but
        not ``detected``, and ``expected`` says so; emission is never ruled out. None: nothing
        is ruled out.
    exact_fits : bool
        False (default): the quick fitting design. Gaussian fits hold the width at the
        spectrum's line width (one Gauss-Newton step in the width where a score test of the
        held width rejects it, :data:`~specan.lines.batchfit.QUICK_WIDTH_Z`); strong lines' wings
        are fitted in one round (:data:`QUICK_WING_ROUNDS`); Voigt fits stop at a looser decrement
        (:data:`~specan.lines.batchfit.QUICK_DECREMENT`) and every fit is reported where the batch
        leaves it (none made again one by one). True: the fits of the one-by-one design, batched
        (slower; the reference the quick design is tested against in
        ``tests/test_lines_quick.py``, with its stated tolerance).

    Returns
    -------
    astropy.table.QTable
        Columns ``id``, ``species``, ``wave_air``, ``wave_vac``, ``wave_obs``,
        ``velocity``, ``ew``, ``ew_err``, ``ew_err_cayrel``, ``ew_int``,
        ``ew_int_err``, ``ew_fit``, ``ew_fit_err``, ``fwhm``, ``ew_err_blend``, ``depth``,
        ``significance``, ``fit_chi2``, ``window_min``, ``window_max``, ``method``,
        ``profile``, ``blend``, ``detected``, ``emission``, ``expected``. ``ew_err_blend`` (hydrogen
        lines; NaN elsewhere) is half the absorption the spectrum cannot assign between the line's
        wings and the blanketing of the weak lines around it (``ew`` is the middle of that range), a
        systematic term included in ``ew_err`` (:mod:`.hydrogen_blends`); ``blend`` names the listed
        lines within one resolution element and, for a hydrogen line, those modelled inside its
        window. ``meta`` holds rv, R, medium and ``star_type``. ``fit_chi2`` is the reduced
        chi-square of the profile fit (NaN when none was fitted): near 1 when noise limits the
        line; far above 1 when the profile model does (unresolved blends), and the errors, which
        count noise only, then understate the equivalent width's true uncertainty.
    """
    if profile not in PROFILES:
        raise ValueError("profile must be 'auto', 'gauss' or 'voigt'")
    # _batched=False: every line fitted on its own (scipy's least_squares for the Voigt fits), the
    # reference the batched fits are tested against (tests/test_lines_batched.py)
    # _data: the internal arrays already built from this spectrum (analyse builds them once)
    data = _data if _data is not None else LineData(normalised(spectrum), resolving_power)
    listed = lines_in_range(data, linelist, kinds, rv)
    targets = line_targets(data, listed, window)
    features = find_features(data, detect_sigma, min_depth)
    # Hydrogen first: the other lines are then measured on the spectrum divided by the
    # fitted hydrogen profiles, so a metal line in a Balmer wing is measured against the
    # wing (its local continuum), not against a continuum the wing lies far below.
    results = measure_lines(data, features, targets, np.flatnonzero(targets.hydrogen), profile, detect_sigma,
                            _batched, exact_fits)
    series_shares(results, targets)
    data_m, features_m = data, features
    if divide_hydrogen:
        data_m, features_m = without_hydrogen(data, features, results, targets, listed.rows["ep_low"],
                                              detect_sigma, min_depth)
    results.update(measure_lines(data_m, features_m, targets, np.flatnonzero(~targets.hydrogen), profile,
                                 detect_sigma, _batched, exact_fits))
    return line_table(data, listed, targets, [results[i] for i in range(targets.pred.size)], star_type)


class Targets(NamedTuple):
    """Where each listed line is looked for (one element per line)."""

    pred: np.ndarray      #: Doppler-shifted laboratory wavelength, Angstrom
    fwhm: np.ndarray      #: the spectrum's line FWHM there, Angstrom
    match: np.ndarray     #: half-window for matching a feature, Angstrom
    hydrogen: np.ndarray  #: bool: a hydrogen line
    ep_low: np.ndarray | None = None  #: lower-level excitation, eV (NaN unknown), where listed


def line_targets(data, listed, window):
    """:class:`Targets` of the listed lines (``window``: matching half-window in velocity or None)."""
    fwhm_at = line_widths(data, listed.pred)
    # (the rows' own values, kept with the packaged list's rows: copies, the targets are the caller's)
    values = row_values(listed)
    ep = None if values.ep_low is None else values.ep_low.copy()
    return Targets(listed.pred, fwhm_at, match_windows(listed.pred, fwhm_at, window), values.hydrogen.copy(), ep)


@dataclass
class LineResult:
    """What measuring one line gives (NaN where a quantity was not measured)."""

    wave_obs: float = np.nan
    ew: float = np.nan
    ew_err: float = np.nan
    ew_err_cayrel: float = np.nan
    ew_int: float = np.nan
    ew_int_err: float = np.nan
    ew_fit: float = np.nan
    ew_fit_err: float = np.nan
    fwhm: float = np.nan
    depth: float = np.nan
    significance: float = np.nan
    window_min: float = np.nan
    window_max: float = np.nan
    fit_chi2: float = np.nan
    ew_err_blend: float = np.nan   #: what cannot be assigned (hydrogen lines, :mod:`.hydrogen_blends`)
    blanketing: float = np.nan     #: absorption under the window's crests (hydrogen lines, the same)
    blend_inside: tuple = ()       #: listed lines modelled inside the window (indices into the targets)
    method: str = "none"
    profile: str = ""
    detected: bool = False
    emission: bool = False
    #: the profile fit (see :mod:`specan.lines.profiles`) with its ``profile``, ``sign``
    #: and the line's ``ew_int``, or None
    fit: dict | None = None


def measure_lines(data, features, targets, which, profile, detect_sigma, batched=True, exact=False):
    """:func:`measure_line` of each line index in ``which``, as ``{index: LineResult}``.

    ``batched`` (default) fits all the lines together (:func:`specan.lines.batchfit.fit_planned`:
    one vectorised solve per kind of fit instead of one fit call per line); False fits them one
    by one (:func:`measure_line`), the reference the batched path is tested against. ``exact``
    (batched only): the batched fits of the one-by-one design (True) or the quick design (False,
    see :func:`measure`'s ``exact_fits``).
    """
    if not batched:
        return {int(i): measure_line(data, features, targets, i, profile, detect_sigma) for i in which}
    starts = dict(zip(np.asarray(which).tolist(), line_starts(data, features, targets, which, detect_sigma)))
    found = [i for i, st in starts.items() if st is not None]
    windows = dict(zip(found, line_windows(data, [starts[i] for i in found], targets.fwhm[found],
                                           targets.hydrogen[found], targets.pred[targets.hydrogen])))
    plans = plan_lines(data, features, targets, list(starts), profile, starts, windows)
    wanted = [p for p in plans.values() if p.wants_fit]
    fits = fit_planned(data, wanted, exact=exact)
    for plan, fit in zip(wanted, fits):
        plan.fit = fit
    return finish_lines(data, features, targets, plans, exact=exact)


def measure_line(data, features, targets, i, profile, detect_sigma):
    """Measure listed line ``i`` on ``data``, whose features are ``features``.

    Returns
    -------
    LineResult
        ``method`` "masked" (and nothing measured) when the line's core has no good pixel.
    """
    plan = plan_line(data, features, targets, i, profile, detect_sigma)
    if plan.wants_fit:
        plan.fit = fit_line(data, plan.window, plan.cont, plan.centres, plan.voigt, plan.max_shift, plan.fw,
                            plan.sign, plan.skip, plan.hydrogen)
    return finish_line(data, features, targets, i, plan, fit_profile)


@dataclass
class LinePlan:
    """One line up to its profile fit: what :func:`plan_line` found and the fit it asks for."""

    result: LineResult
    fw: float = np.nan
    hydrogen: bool = False
    ic: int = 0
    sign: float = 1.0
    detected: bool = False
    max_shift: float = np.nan
    window: object = None
    cont: np.ndarray | None = None
    centres: np.ndarray | None = None
    skip: np.ndarray | None = None
    voigt: bool = False
    wants_fit: bool = False
    #: the profile fit once made (None: none asked for, or it failed)
    fit: dict | None = None
    #: the positions of the features of the line's kind inside its window (:func:`~specan.lines.components.
    #: window_features`), where the plan kept them (the hydrogen lines': their blends are taken out later)
    in_win: np.ndarray | None = None


class LineStart(NamedTuple):
    """Where a line is measured: what :func:`line_start` finds before its window is chosen."""

    centre: float     #: the matched feature, or the shifted laboratory wavelength, Angstrom
    max_shift: float  #: how far the fit may move the centre, Angstrom
    matched: bool     #: a feature was matched (or the core is saturated at the listed place)
    ic: int           #: the pixel nearest the centre
    sign: float       #: 1 absorption, -1 emission
    detected: bool    #: significant in the matched filter at a matched feature


def line_start(data, features, targets, i, detect_sigma):
    """:class:`LineStart` of listed line ``i``, or None when its core has no good pixel."""
    fw = targets.fwhm[i]
    centre, max_shift, matched = match_feature(features, targets.pred[i], targets.match[i], fw)
    ic = data.nearest_pixel(centre)
    if not matched and data.signif[ic] >= detect_sigma and 1.0 - data.smooth[ic] > 0.5:
        # a saturated core, flat over many line widths, has no single minimum to be found
        # (noise picks one anywhere in it): a deep, significant line at the listed place
        # is the line itself
        matched, max_shift = True, 0.5 * fw
    # the pixels within half a width (found by bisection, then the exact test on those few)
    near = slice(max(int(np.searchsorted(data.wave, centre - 0.6 * fw)) - 1, 0),
                 int(np.searchsorted(data.wave, centre + 0.6 * fw)) + 1)
    if not data.good[near][np.abs(data.wave[near] - centre) <= 0.5 * fw].any():
        return None
    s_c = float(data.signif[ic])
    sign = -1.0 if s_c < -detect_sigma else 1.0
    # a line is detected where identification found a feature for it (significant in
    # the matched filter and standing out of its surroundings by min_depth)
    detected = matched and sign * s_c >= detect_sigma
    return LineStart(centre, max_shift, matched, ic, sign, detected)


def line_starts(data, features, targets, which, detect_sigma):
    """:func:`line_start` of every line index in ``which`` at once (the same tests, vectorised)."""
    which = np.asarray(which, int)
    pred, match, fw = targets.pred[which], targets.match[which], targets.fwhm[which]
    pos = features.position
    if pos.size and which.size:
        dist = np.abs(pos[None, :] - pred[:, None])
        k = dist.argmin(axis=1)
        matched = dist[np.arange(which.size), k] <= match
        centre = np.where(matched, pos[k], pred)
    else:
        matched = np.zeros(which.size, bool)
        centre = pred.copy()
    max_shift = np.where(matched, 0.5 * fw, match)
    n = data.wave.size
    ic = np.minimum(np.maximum(data.wave.searchsorted(centre), 0), n - 1)
    prev = np.maximum(ic - 1, 0)
    ic = ic - ((ic > 0) & (np.abs(data.wave[prev] - centre) < np.abs(data.wave[ic] - centre)))
    # a saturated core at the listed place (see line_start)
    saturated = ~matched & (data.signif[ic] >= detect_sigma) & (1.0 - data.smooth[ic] > 0.5)
    matched = matched | saturated
    max_shift = np.where(saturated, 0.5 * fw, max_shift)
    # a good pixel within half a width (bisection for the candidates, then the exact test)
    lo = np.maximum(data.wave.searchsorted(centre - 0.6 * fw) - 1, 0)
    hi = data.wave.searchsorted(centre + 0.6 * fw) + 1
    span = int(max((hi - lo).max(), 1)) if which.size else 1
    pix = lo[:, None] + np.arange(span)[None, :]
    inside = pix < np.minimum(hi, n)[:, None]
    pix = np.minimum(pix, n - 1)
    near = np.abs(data.wave[pix] - centre[:, None]) <= (0.5 * fw)[:, None]
    usable = (inside & data.good[pix] & near).any(axis=1)
    s_c = data.signif[ic]
    sign = np.where(s_c < -detect_sigma, -1.0, 1.0)
    detected = matched & (sign * s_c >= detect_sigma)
    # (the arrays as Python numbers read once: the same values as element by element; each start made
    # from its fields' tuple, LineStart._make, without unpacking them into a call)
    made = map(LineStart._make, zip(np.asarray(centre, float).tolist(), np.asarray(max_shift, float).tolist(),
                                    matched.tolist(), ic.tolist(), sign.tolist(), detected.tolist()))
    return [start if ok else None for ok, start in zip(usable.tolist(), made)]


def plan_line(data, features, targets, i, profile, detect_sigma, start=None, window=None):
    """Everything about listed line ``i`` that comes before its profile fit (see :class:`LinePlan`).

    ``start`` (:func:`line_start`) and ``window`` (:func:`~specan.lines.windows.line_window`)
    when already found (the batched path finds all windows at once).
    """
    fw, hydrogen = targets.fwhm[i], bool(targets.hydrogen[i])
    if start is None:
        start = line_start(data, features, targets, i, detect_sigma)
    if start is None:
        return LinePlan(LineResult(method="masked"))
    centre, max_shift, matched, ic, sign, detected = start
    s_c = float(data.signif[ic])
    if window is None:
        window = line_window(data, ic, centre, sign, fw, hydrogen, matched, targets.pred[targets.hydrogen])
    cont = local_continuum(data, window)
    ew_int, ew_int_err = integrated_ew(data, window, cont)
    result = LineResult(wave_obs=centre, ew_int=ew_int, ew_int_err=ew_int_err, significance=s_c,
                        depth=central_depth(data, ic, centre, window, cont, sign),
                        window_min=data.wave[window.lo], window_max=data.wave[window.hi], emission=sign < 0)
    in_win = window_features(data, features, window, sign)
    centres = component_centres(data, targets, i, centre, window, in_win)
    skip = wing_mask(data, targets, i, centre, window, in_win, centres) if hydrogen else None
    voigt = use_voigt(profile, hydrogen, result.depth, data, window, fw)
    return LinePlan(result, fw, hydrogen, ic, sign, detected, max_shift, window, cont, centres, skip, voigt,
                    wants_fit=detected)


def plan_lines(data, features, targets, which, profile, starts, windows):
    """:func:`plan_line` of every line index in ``which`` at once, as ``{index: LinePlan}``.

    ``starts`` and ``windows`` map each index to its :class:`LineStart` (None: masked) and
    window. The local continua, direct integrals and central depths of all lines are array
    operations over their windows padded to one length (the pixels past a window's end add
    nothing); the sums may differ from :func:`plan_line`'s by rounding. Only the choice of
    blend components stays a loop per line (each choice depends on the ones before it).
    """
    plans = {int(i): LinePlan(LineResult(method="masked")) for i in which if starts[i] is None}
    found = [int(i) for i in which if starts[i] is not None]
    if not found:
        return plans
    wave, n = data.wave, data.wave.size
    wins = [windows[i] for i in found]
    # (the windows' and starts' fields gathered by one transposition each, not one pass a field: the same
    # tuples of Python numbers, so the same arrays)
    lo_t, hi_t, levels_t, _ = zip(*wins)
    centre_t, _, _, ic_t, sign_t, _ = zip(*[starts[i] for i in found])
    # (read by np.fromiter with their types given: the same arrays as np.array of the tuples, without its
    # discovery of their type and shape)
    nf = len(found)
    lo, hi = np.fromiter(lo_t, int, nf), np.fromiter(hi_t, int, nf)
    lv = np.fromiter(chain.from_iterable(levels_t), float, 2 * nf).reshape(nf, 2)
    centre, ic, sign = np.fromiter(centre_t, float, nf), np.fromiter(ic_t, int, nf), np.fromiter(sign_t, float, nf)
    length = hi - lo + 1
    k = np.arange(int(length.max()))
    inside = k[None, :] < length[:, None]
    pix = np.minimum(lo[:, None] + k[None, :], n - 1)
    x = wave[pix]
    x0, x1 = wave[lo], wave[hi]
    # local_continuum: the straight line between the edge levels
    with np.errstate(divide="ignore", invalid="ignore"):   # one-pixel windows: their level, below
        t = (x - x0[:, None]) / (x1 - x0)[:, None]
        cont = lv[:, :1] * (1.0 - t) + lv[:, 1:] * t
    cont[hi == lo] = lv[hi == lo, :1]
    cont = np.where(inside, cont, 1.0)
    # integrated_ew
    dx = data.dx[pix]
    ew_int = np.where(inside, (1.0 - data.flux[pix] / cont) * dx, 0.0).sum(axis=1)
    sig = data.sigma[pix]
    ok = inside & np.isfinite(sig)
    ew_int_err = np.sqrt((np.where(ok, sig / cont * dx, 0.0) ** 2).sum(axis=1))
    # central_depth: the continuum at the centre as np.interp gives it from the window's pixels
    c_mid = interp_rows(centre, x, cont, length)
    near = ic[:, None] + np.arange(-1, 2)[None, :]
    in_near = (near >= 0) & (near < n)
    fl = data.flux[np.minimum(np.maximum(near, 0), n - 1)]
    extreme = np.where(sign > 0, np.where(in_near, fl, np.inf).min(axis=1), np.where(in_near, fl, -np.inf).max(axis=1))
    depth = 1.0 - extreme / c_mid
    # window_features: the features of each line's kind between its window's edges (positions sorted)
    pos, femis = features.position, features.emission
    kinds = {1.0: pos[~femis], -1.0: pos[femis]} if pos.size else {}
    # component_centres' listed companions of every line at once: the other listed lines of the
    # same class (hydrogen or not) inside its window, in list order
    pred, is_h = targets.pred, targets.hydrogen
    idx = np.asarray(found)
    companion = ((pred[None, :] >= x0[:, None]) & (pred[None, :] <= x1[:, None])
                 & (is_h[None, :] == is_h[idx][:, None]) & (np.arange(pred.size)[None, :] != idx[:, None]))
    signif = data.signif[ic]
    fws = targets.fwhm[idx]
    hyd = is_h[idx]
    # use_voigt of every line: strong lines (deep core, window over four widths) or hydrogen
    voigt = (profile == "voigt") | ((profile == "auto") & (hyd | ((depth > 0.7) & ((x1 - x0) > 4.0 * fws))))
    # window_features: each line's features of its own kind between its window's edges
    bounds = {key: (mine.searchsorted(x0, "left"), mine.searchsorted(x1, "right"))
              for key, mine in kinds.items()}
    # the per-line values as Python floats, read once (the same values; a loop over numpy scalars
    # spent a quarter of the planning on them, benchmarks/bench_lines.py)
    ew_int_l, ew_int_err_l, signif_l, depth_l = ew_int.tolist(), ew_int_err.tolist(), signif.tolist(), depth.tolist()
    x0_l, x1_l, voigt_l, hyd_l, length_l = x0.tolist(), x1.tolist(), voigt.tolist(), hyd.tolist(), length.tolist()
    lo_feature = {key: b[0].tolist() for key, b in bounds.items()}
    hi_feature = {key: b[1].tolist() for key, b in bounds.items()}
    # every line's listed companions shifted as the line is (its centre less its listed place), as lists
    # cut from one array (row by row in list order: the same values as one line at a time)
    rows, cols = companion.nonzero()
    shifted = (pred[cols] + (centre[rows] - pred[idx[rows]])).tolist()
    cuts = np.concatenate([[0], np.cumsum(np.bincount(rows, minlength=len(found)))]).tolist()
    # each kind's feature positions as Python numbers too (a line's features: a slice of the list)
    kinds_l = {key: mine.tolist() for key, mine in kinds.items()}
    for m, i in enumerate(found):
        fw, hydrogen = fws[m], hyd_l[m]
        window = wins[m]
        centre, max_shift, _, ic_m, sign_m, detected = starts[i]   # (LineStart's fields, in their order)
        result = LineResult(wave_obs=centre, ew_int=ew_int_l[m], ew_int_err=ew_int_err_l[m],
                            significance=signif_l[m], depth=depth_l[m],
                            window_min=x0_l[m], window_max=x1_l[m], emission=sign_m < 0)
        if kinds:
            key = 1.0 if sign_m > 0 else -1.0
            a, b = lo_feature[key][m], hi_feature[key][m]
            in_win = kinds_l[key][a:b]
        else:
            key, in_win = None, []
        centres = _centres(shifted[cuts[m]:cuts[m + 1]], in_win, hydrogen, centre, fw)
        # (the hydrogen lines' wing mask takes the features as an array, as before; kept for their blends)
        found_h = skip = None
        if hydrogen:
            found_h = kinds[key][a:b] if key is not None else np.zeros(0)
            skip = wing_mask(data, targets, i, centre, window, found_h, centres)
        plans[i] = LinePlan(result, fw, hydrogen, ic_m, sign_m, detected, max_shift, window,
                            cont[m, :length_l[m]], centres, skip, voigt_l[m], wants_fit=detected, in_win=found_h)
    return plans


def _centres(listed, in_win, hydrogen, centre, fw):
    """:func:`~specan.lines.components.component_centres` from the line's shifted listed companions and its
    window's features (both lists)."""
    candidates = listed if hydrogen else listed + in_win
    if not candidates:
        return np.array([centre])
    centres = [centre]
    # (a Python float: the same product; the test as plain loops: a candidate joins when it is
    # farther than ``apart`` from every centre so far, i.e. when the least distance is; finite
    # positions only. The generator's min was a tenth of the planning, measured with pyinstrument)
    apart = MIN_SEPARATION * float(fw)
    for c in candidates:
        for x in centres:
            if not abs(c - x) > apart:
                break
        else:
            centres.append(c)
    return np.array(centres)


def finish_line(data, features, targets, i, plan, fitter):
    """The :class:`LineResult` of a planned line whose fit (``plan.fit``) is made.

    ``fitter`` makes the wing fits of strong lines (:func:`wing_fit`).
    """
    if plan.window is None:   # masked
        return plan.result
    _fitted(data, plan)
    if plan.hydrogen:
        less_blends(data, features, targets, i, plan)
    wing = None
    if _wants_wings(plan):
        wing = wing_fit(data, features, targets, i, plan.result.wave_obs, plan.fit, plan.fw, fitter=fitter)
    return _finished(data, plan, wing)


def finish_lines(data, features, targets, plans, exact=True):
    """:func:`finish_line` of every plan (``{index: LinePlan}``), the wing fits batched (:func:`wing_fits`;
    ``exact``: see :func:`specan.lines.batchfit.voigt_batch`)."""
    unfitted = [i for i, plan in plans.items() if plan.window is not None and plan.fit is None]
    got = [plans[i] for i in unfitted]
    widths = dict(zip(unfitted, half_widths(data, [p.ic for p in got], [p.window.lo for p in got],
                                            [p.window.hi for p in got], [p.sign for p in got])))
    for i, plan in plans.items():
        if plan.window is not None:
            _fitted(data, plan, widths.get(i))
            if plan.hydrogen:
                less_blends(data, features, targets, i, plan)
    strong = [i for i, plan in plans.items() if plan.window is not None and _wants_wings(plan)]
    wings = wing_fits(data, features, targets, strong, [plans[i].result.wave_obs for i in strong],
                      [plans[i].fit for i in strong], [plans[i].fw for i in strong], exact=exact)
    wing_of = dict(zip(strong, wings))
    done = [i for i, plan in plans.items() if plan.window is not None]
    final = [plans[i].window if wing_of.get(i) is None else wing_of[i][1] for i in done]
    out = {i: plan.result if plan.window is None else _finished(data, plan, wing_of.get(i), cayrel=False)
           for i, plan in plans.items()}
    if done:
        # the Cayrel errors of all lines at once (_finished's arithmetic, element by element)
        # (np.fromiter, types given: the same arrays as np.array of the lists)
        fwhm = np.fromiter((out[i].fwhm for i in done), float, len(done))
        fwhm_c = np.where(np.isfinite(fwhm), fwhm, np.fromiter((plans[i].fw for i in done), float, len(done)))
        pixel = data.dx[np.fromiter((plans[i].ic for i in done), int, len(done))]
        for i, err in zip(done, cayrel_error(fwhm_c, pixel, 1.0 / window_noises(data, final)).tolist()):
            out[i].ew_err_cayrel = err
    return out


def _fitted(data, plan, width=None):
    """The result's fitted (or, without a fit, half-depth) quantities and its chosen equivalent width
    (``width``: its :func:`half_width` when already known)."""
    result, fit, window = plan.result, plan.fit, plan.window
    if fit is not None:
        result.profile = "voigt" if plan.voigt else "gauss"
        result.fit = dict(fit, profile=result.profile, sign=plan.sign, ew_int=result.ew_int)
        result.ew_fit, result.ew_fit_err, result.fit_chi2 = fit["ew"], fit["ew_err"], fit["chi2"]
        result.fwhm, result.wave_obs = fit["fwhm"], fit["centre"]
    else:
        result.fwhm = half_width(data, plan.ic, window.lo, window.hi, plan.sign) if width is None else width
    result.method, result.ew, result.ew_err = chosen_ew(fit, result.profile, window.cut, len(plan.centres) - 1,
                                                        plan.hydrogen, result.ew_int, result.ew_int_err)


def _wants_wings(plan):
    """Whether the line's wings are fitted (:func:`wing_fit`): a fitted Voigt absorption line, not hydrogen."""
    return plan.fit is not None and plan.voigt and not plan.hydrogen and plan.sign > 0


def _finished(data, plan, wing, noise=None, cayrel=True):
    """The result with the wing fit ``(fit, window)`` (or None), detection and Cayrel error.

    ``noise``: :func:`window_noise` of the final window, when already known; ``cayrel`` False: the
    Cayrel error is left to the caller (:func:`finish_lines` makes all at once).
    """
    result, window = plan.result, plan.window
    if wing is not None:
        fit, wwin = wing
        result.fit = dict(fit, profile="voigt", sign=plan.sign, ew_int=result.ew_int)
        result.ew_fit, result.ew_fit_err, result.fit_chi2 = fit["ew"], fit["ew_err"], fit["chi2"]
        result.fwhm, result.wave_obs = fit["fwhm"], fit["centre"]
        result.method, result.ew, result.ew_err = "wing_voigt_fit", fit["ew"], fit["ew_err"]
        result.window_min, result.window_max = data.wave[wwin.lo], data.wave[wwin.hi]
        window = wwin
    # significant in the matched filter AND an equivalent width clear of its error
    result.detected = plan.detected and abs(result.ew) > 2.0 * result.ew_err
    if not cayrel:
        return result
    fwhm_c = result.fwhm if np.isfinite(result.fwhm) else plan.fw
    if noise is None:
        noise = window_noise(data, window)
    result.ew_err_cayrel = cayrel_error(fwhm_c, data.dx[plan.ic], 1.0 / noise)
    return result


def wing_fit(data, features, targets, i, centre, fit, fwhm, max_iter=3, fitter=fit_profile):
    """A strong line's Voigt fit over the window its own wings set, or None.

    The window reaches where the fitted profile's depth falls to the noise
    (:func:`specan.lines.windows.wing_reach`, at most
    :data:`~specan.lines.windows.MAX_WING`), the fit is repeated over it and the window
    set again from the new fit, until it stops growing (``max_iter`` times at most).
    Inside the wings, the other strong lines (listed lines of central depth above 0.5,
    such as Ca II H beside K, or the other Mg b lines) are fitted as components with the
    same profile; the weaker lines and unlisted features there get no weight (their
    pixels, 1.2 line widths around them, are left out, as for the hydrogen wings), so
    blends do not add to the equivalent width. The equivalent width is the fitted
    profile's area, the wings beyond the window included.

    ``fitter`` is :func:`specan.lines.profiles.fit_profile` or a function of the same call
    (the batched path's).

    Returns
    -------
    (dict, Window) or None
        None when the wings reach no farther than the first window or the fit fails.
    """
    best = None
    reach0 = 0.0
    noise = _typical_noise(data)
    for _ in range(max_iter):
        problem = _wing_problem(data, features, targets, i, centre, fit, fwhm, noise, reach0)
        if problem is None:
            break
        win, centres, skip, reach0 = problem
        new = fitter(data, win.lo, win.hi, np.ones(win.hi - win.lo + 1), centres, "voigt", 0.5 * fwhm,
                     fwhm / GAUSS_FWHM, 1.0, skip)
        if not _determined(new, data.wave[win.hi] - data.wave[win.lo]):
            break
        fit, best = new, (new, win)
    return best


def wing_fits(data, features, targets, which, centres, fits, fwhm, max_iter=3, exact=True):
    """:func:`wing_fit` of the lines ``which`` (their centres, first fits and widths), the fits of each
    round made together (:func:`specan.lines.batchfit.voigt_batch`): a list of ``(dict, Window)`` or None."""
    best = [None] * len(which)
    if not which:
        return best
    noise = _typical_noise(data)
    fit, reach0 = list(fits), [0.0] * len(which)
    live = list(range(len(which)))
    for _ in range(max_iter if exact else QUICK_WING_ROUNDS):
        asked = []
        for m in live:
            problem = _wing_problem(data, features, targets, which[m], centres[m], fit[m], fwhm[m], noise, reach0[m])
            if problem is not None:
                asked.append((m, problem))
                reach0[m] = problem[3]
        if not asked:
            break
        made = voigt_batch(data, [(win.lo, win.hi, np.ones(win.hi - win.lo + 1), cen, 0.5 * fwhm[m],
                                   fwhm[m] / GAUSS_FWHM, 1.0, skip, False) for m, (win, cen, skip, _) in asked],
                           exact=exact)
        live = []
        for (m, (win, _, _, _)), new in zip(asked, made):
            if _determined(new, data.wave[win.hi] - data.wave[win.lo]):
                fit[m], best[m] = new, (new, win)
                live.append(m)
    return best


def _typical_noise(data):
    """Median noise of the good pixels (1e-3 without any)."""
    # (the good pixels' noise is finite: np.nanmedian's value is np.median's)
    return data.typical_noise() if data.good.any() else 1e-3


def _wing_problem(data, features, targets, i, centre, fit, fwhm, noise, reach0):
    """One round of :func:`wing_fit`: ``(window, centres, skip, reach)`` of the next fit, or None to stop."""
    from .components import MIN_SEPARATION

    # where the wing's depth is down to the noise of a few pixels, or 0.2%
    # (a continuum placed better than that is rare; common practice)
    threshold = max(noise / np.sqrt(5.0), 2e-3)
    reach = wing_reach(fit["ew"], fit["sigma"], fit["gamma"], threshold)
    if reach <= 1.05 * reach0 or reach <= 3.0 * fwhm:
        return None
    pred = targets.pred
    shift = centre - pred[i]
    win = profile_window(data, centre, reach)
    lo, hi = data.wave[win.lo], data.wave[win.hi]
    others = ((pred >= lo) & (pred <= hi) & ~targets.hydrogen).nonzero()[0]
    others = others[others != i]
    depth_at = 1.0 - np.interp(pred[others] + shift, data.wave, data.smooth)
    deep = depth_at > 0.5
    strong = others[deep]
    centres = [centre]
    for c in pred[strong] + shift:
        if min(abs(c - x) for x in centres) > MIN_SEPARATION * fwhm:
            centres.append(c)
    centres = np.array(centres)
    # (the others not strong: ``others`` is sorted and unique, so these are np.setdiff1d(others, strong),
    # without its sorts)
    weak_pos = np.concatenate([pred[others[~deep]] + shift, features.position[
        (features.position >= lo) & (features.position <= hi)]])
    x = data.wave[win.lo:win.hi + 1]
    far = np.abs(weak_pos[:, None] - centres[None, :]).min(axis=1) > MIN_SEPARATION * fwhm
    skip = (np.abs(x[None, :] - weak_pos[far][:, None]) < 1.2 * fwhm).any(axis=0) if far.any() else None
    return win, centres, skip, reach


def _determined(fit, span):
    """Whether a wing fit measures its line: a finite, positive equivalent width known to 30%, and a
    damping width and equivalent width clear of their bounds (span and twice the span).

    Lines that pass the depth test in a blanketed region (the 3800-4050 A lines of K and M giants
    at 2.5 A) can get wing fits that trade depth for damping without limit: equivalent widths
    of 10-100 A with errors of 10^3-10^6 A, or stuck at a bound (MILES K5 III and M1 III stars,
    measured). Their first fit then stands.
    """
    if fit is None or not (np.isfinite(fit["ew"]) and np.isfinite(fit["ew_err"])) or fit["ew"] <= 0:
        return False
    return fit["ew_err"] <= 0.3 * fit["ew"] and fit["gamma"] < 0.9 * span and fit["ew"] < 1.8 * span


def match_feature(features, pred, match, fwhm):
    """Centre, allowed fit shift and whether a feature lies within ``match`` of ``pred``.

    Without a feature the line is measured at ``pred`` and its fit may shift by ``match``.
    """
    pos = features.position
    if pos.size:
        k = int(np.argmin(np.abs(pos - pred)))
        if abs(pos[k] - pred) <= match:
            # a matched feature fixes the centre; the fit may only refine it (a wide
            # shift would let blended components trade places)
            return pos[k], 0.5 * fwhm, True
    return pred, match, False


def integrated_ew(data, window, cont):
    """Equivalent width integrated directly over the window against ``cont``, and its error."""
    sel = slice(window.lo, window.hi + 1)
    ew_int = float(np.sum((1.0 - data.flux[sel] / cont) * data.dx[sel]))
    sig_sel = data.sigma[sel]
    ok = np.isfinite(sig_sel)
    ew_int_err = float(np.sqrt(np.sum(np.where(ok, sig_sel / cont * data.dx[sel], 0.0) ** 2)))
    return ew_int, ew_int_err


def central_depth(data, ic, centre, window, cont, sign):
    """Depth of the deepest pixel (emission: height of the highest) next to the centre, against ``cont``."""
    near = slice(max(ic - 1, 0), min(ic + 2, data.wave.size))
    fl = data.flux[near]
    c_mid = float(np.interp(centre, data.wave[window.lo:window.hi + 1], cont))
    return 1.0 - (fl.min() if sign > 0 else fl.max()) / c_mid


def use_voigt(profile, hydrogen, depth, data, window, fwhm):
    """Whether the line is fitted with a Voigt profile (else Gaussian)."""
    # strong lines with damping wings: deep core and a window many widths wide
    strong = depth > 0.7 and (data.wave[window.hi] - data.wave[window.lo]) > 4.0 * fwhm
    return profile == "voigt" or (profile == "auto" and (hydrogen or strong))


def fit_line(data, window, cont, centres, voigt, max_shift, fwhm, sign, skip, hydrogen):
    """Profile fit of a line (component 0) and its companions over the window, or None.

    Gaussian fits take the fast variable-projection path; Voigt fits iterate, and a
    hydrogen line's Gaussian width is free (thermal and Stark broadening).
    """
    if voigt:
        return fit_profile(data, window.lo, window.hi, cont, centres, "voigt", max_shift, fwhm / GAUSS_FWHM,
                           sign, skip, free_width=hydrogen)
    return fit_gauss(data, window.lo, window.hi, cont, centres, max_shift, fwhm / GAUSS_FWHM, sign)


def chosen_ew(fit, profile, cut, n_extra, hydrogen, ew_int, ew_int_err):
    """The reported equivalent width: ``(method, ew, ew_err)``.

    The fit where a neighbour cut the window or the fit holds ``n_extra`` other
    components; the direct integral otherwise.
    """
    # hydrogen lines are integrated: on real low-resolution spectra the continuum
    # errors under their broad wings make free Voigt fits unreliable (measured on the
    # JHC library); the fit is reported in ew_fit and used to divide hydrogen out
    if fit is not None and (cut or n_extra) and not hydrogen:
        return ("multi_" if n_extra else "") + profile + "_fit", fit["ew"], fit["ew_err"]
    return "integration", ew_int, ew_int_err


def window_noise(data, window):
    """Typical noise per pixel of the normalised flux over the window (NaN when none is known)."""
    sig_sel = data.sigma[window.lo:window.hi + 1]
    sig_sel = sig_sel[np.isfinite(sig_sel)]
    n = sig_sel.size
    if not n:
        return np.nan
    # np.median's value (the middle one, or the mean of the middle two) without its overhead,
    # which was a tenth of the lines stage once the fits were batched (bench_lines.py)
    part = np.partition(sig_sel, [(n - 1) // 2, n // 2])
    return part[n // 2] if n % 2 else 0.5 * (part[n // 2 - 1] + part[n // 2])


def window_noises(data, windows):
    """:func:`window_noise` of every window at once (one sort of all windows' noise, padded).

    Each window's finite noise values sorted in one row (the rest +inf, past them); the middle
    one, or the mean of the middle two, read off: the same values as one median per window.
    """
    out = np.full(len(windows), np.nan)
    if not windows:
        return out
    lo = np.fromiter((w.lo for w in windows), int, len(windows))
    length = np.fromiter((w.hi for w in windows), int, len(windows)) - lo + 1
    k = np.arange(int(length.max()))
    inside = k[None, :] < length[:, None]
    sig = data.sigma[np.minimum(lo[:, None] + k[None, :], data.wave.size - 1)]
    ok = inside & np.isfinite(sig)
    srt = np.sort(np.where(ok, sig, np.inf), axis=1)
    n = ok.sum(axis=1)
    rows = np.arange(lo.size)
    mid = srt[rows, n // 2 * (n > 0)]
    below = srt[rows, np.maximum(n // 2 - 1, 0)]
    with np.errstate(invalid="ignore"):
        value = np.where(n % 2 == 1, mid, 0.5 * (below + mid))
    return np.where(n > 0, value, out)


def half_width(data, ic, lo, hi, sign):
    """FWHM from the half-depth crossings of the data (no fit available)."""
    d = sign * (1.0 - data.flux[lo:hi + 1])
    j = ic - lo
    if d.size < 3 or d[j] <= 0:
        return np.nan
    half = 0.5 * d[j]
    x = data.wave[lo:hi + 1]
    left = np.flatnonzero(d[:j] < half)
    right = np.flatnonzero(d[j:] < half)
    if not left.size or not right.size:
        return np.nan
    a = left[-1]
    b = j + right[0]
    xl = np.interp(half, [d[a], d[a + 1]], [x[a], x[a + 1]]) if d[a + 1] != d[a] else x[a]
    xr = np.interp(half, [d[b], d[b - 1]], [x[b], x[b - 1]]) if d[b - 1] != d[b] else x[b]
    return float(xr - xl)


def half_widths(data, ic, lo, hi, sign):
    """:func:`half_width` of many lines at once (sequences, one element per line): the same values.

    The half-depth crossings of every window are found on the windows padded to one length, and
    each is interpolated between its two pixels with :func:`numpy.interp`'s arithmetic (the
    crossing lies strictly above the lower pixel's depth, so the interpolation is the plain slope
    form, or the upper pixel itself where it sits exactly at half depth). Windows with a
    non-finite depth near a crossing are left to :func:`half_width` itself.
    """
    ic, lo, hi, sign = (np.asarray(v) for v in (ic, lo, hi, sign))
    out = np.full(ic.size, np.nan)
    if not ic.size:
        return out
    n = data.wave.size
    length = hi - lo + 1
    k = np.arange(int(length.max()))
    inside = k[None, :] < length[:, None]
    pix = np.minimum(lo[:, None] + k[None, :], n - 1)
    d = sign[:, None] * (1.0 - data.flux[pix])
    x = data.wave[pix]
    rows = np.arange(ic.size)
    j = ic - lo
    inner = (j >= 0) & (j < length)
    j = np.where(inner, j, 0)
    dj = np.where(inner, d[rows, j], np.nan)
    half = 0.5 * dj
    below = inside & (d < half[:, None])
    left_ok = (below & (k[None, :] < j[:, None])).any(axis=1)
    after = below & (k[None, :] >= j[:, None])
    right_ok = after.any(axis=1)
    a = np.where(left_ok, k.size - 1 - (below & (k[None, :] < j[:, None]))[:, ::-1].argmax(axis=1), 0)
    b = np.where(right_ok, after.argmax(axis=1), 1)
    ok = (length >= 3) & (dj > 0) & left_ok & right_ok
    a1, b1 = np.minimum(a + 1, k.size - 1), np.maximum(b - 1, 0)
    da, da1, db, db1 = d[rows, a], d[rows, a1], d[rows, b], d[rows, b1]
    xa, xa1, xb, xb1 = x[rows, a], x[rows, a1], x[rows, b], x[rows, b1]
    finite = np.isfinite(da) & np.isfinite(da1) & np.isfinite(db) & np.isfinite(db1) & np.isfinite(half)
    with np.errstate(divide="ignore", invalid="ignore"):
        xl = np.where(half == da1, xa1, (xa1 - xa) / (da1 - da) * (half - da) + xa)
        xr = np.where(half == db1, xb1, (xb1 - xb) / (db1 - db) * (half - db) + xb)
    easy = ok & finite
    out[easy] = (xr - xl)[easy]
    for m in np.flatnonzero((~finite & (length >= 3) & np.isfinite(dj) & (dj > 0)) | ~inner):
        out[m] = half_width(data, int(ic[m]), int(lo[m]), int(hi[m]), float(sign[m]))
    return out


#: km/s, made once (a composite unit is ~20 us to make, measured)
_KMS = u.km / u.s
_FLOAT_COLUMNS = ("wave_obs", "ew", "ew_err", "ew_err_cayrel", "ew_int", "ew_int_err", "ew_fit", "ew_fit_err",
                  "fwhm", "depth", "significance", "window_min", "window_max", "fit_chi2", "ew_err_blend")
_FLOAT_VALUES = attrgetter(*_FLOAT_COLUMNS)


def line_table(data, listed, targets, results, star_type=None):
    """The table :func:`measure` returns, from one :class:`LineResult` per listed line
    (``star_type``: see :func:`measure`)."""
    kept = row_values(listed)
    ids = kept.ids
    # every result's float values read in one pass (one attrgetter per result, not one getattr per value)
    # (as one flat run of Python floats into np.fromiter: the same values as np.array of the tuples, without its
    # nested-sequence discovery)
    values = np.fromiter(chain.from_iterable(map(_FLOAT_VALUES, results)), float,
                         len(results) * len(_FLOAT_COLUMNS)).reshape(len(results), len(_FLOAT_COLUMNS))
    cols = dict(zip(_FLOAT_COLUMNS, np.ascontiguousarray(values.T)))
    # (units attached to the rows made above, no copy: ``values * unit`` copies them again, twice the time)
    aa = partial(u.Quantity, unit=u.AA, copy=False)
    # the columns built once and the table made from them in one call, text columns as arrays:
    # column by column from lists, astropy's conversions were ~2 ms a spectrum (bench_lines.py)
    columns = {
        # (copies of the values kept per set-up: each table owns its columns)
        "id": kept.id_array.copy(),
        "species": kept.species.copy(),
        "wave_air": kept.wave_air.copy(),   # (the list's columns, their descriptions kept)
        "wave_vac": kept.wave_vac.copy(),
        "wave_obs": aa(cols["wave_obs"]),
        "velocity": u.Quantity(velocities(cols["wave_obs"], listed.lab), _KMS, copy=False),
    }
    for name in ("ew", "ew_err", "ew_err_cayrel", "ew_int", "ew_int_err", "ew_fit", "ew_fit_err", "fwhm",
                 "ew_err_blend"):
        columns[name] = aa(cols[name])
    columns["depth"] = cols["depth"]
    columns["significance"] = cols["significance"]
    columns["fit_chi2"] = cols["fit_chi2"]
    columns["window_min"] = aa(cols["window_min"])
    columns["window_max"] = aa(cols["window_max"])
    # (the text columns from the strings as they are: np.array(..., str) makes the same array of any str)
    columns["method"] = np.array([r.method for r in results], str)
    columns["profile"] = np.array([r.profile for r in results], str)
    columns["blend"] = np.array(blends(listed.pred, ids, targets.fwhm, [r.blend_inside for r in results]), str)
    emission = np.fromiter((r.emission for r in results), bool, len(results))
    detected = np.fromiter((r.detected for r in results), bool, len(results))
    expected = expected_lines(columns["species"], star_type)
    # Emission is not ruled out: a cool star's chromosphere or a hot companion can show He I /
    # He II in emission (flare M dwarfs, symbiotics; common practice), unless the "emission"
    # sits inside a line it blends with that the type allows and that is found: in absorption
    # it is what dividing out that line's fitted profile left (He II 6560 inside H alpha was a
    # detected emission line in 13 of 21 MILES A5-K3 stars, significance up to 71; measured),
    # in emission the feature is that line's (H alpha, not He II 6560, in a Be star).
    # The same holds inside the window of any allowed line found in absorption (He II 4859 read
    # as emission in the demo's F8 V star, two line widths from H beta; measured).
    allowed = expected.copy()
    ruled = (emission & ~allowed).nonzero()[0]
    if ruled.size:   # (the rows by id, and the absorbing lines, only where an emission line asks)
        row_of = {name: k for k, name in enumerate(ids)}
        absorbing = (detected & allowed & ~emission).nonzero()[0]
    for k in ruled:
        partners = [row_of[b] for b in str(columns["blend"][k]).split(",") if b in row_of]
        inside = np.any((cols["window_min"][absorbing] <= cols["wave_obs"][k])
                        & (cols["wave_obs"][k] <= cols["window_max"][absorbing]))
        expected[k] = not (inside or any(detected[j] and allowed[j] for j in partners))
    if not expected.all():
        # a line the type rules out is no partner in a blend either: the Sun's H8 and H beta named He I 3889
        # and He II 4859 (measured on the Kurucz model); the names were used above as they came
        ruled_out = {ids[k] for k in np.flatnonzero(~expected)}
        columns["blend"] = np.array([",".join(b for b in str(s).split(",") if b not in ruled_out)
                                     for s in columns["blend"]], str)
    columns["detected"] = detected & expected
    columns["emission"] = emission
    columns["expected"] = expected
    # (added one by one: the same table as QTable(list, names=...), without its default names, which it
    # reads from astropy's configuration once a column, a fifth of the table's making; measured)
    out = QTable()
    for name, column in columns.items():
        out.add_column(column, name=name, copy=False)
    out.meta.update(data.meta(listed.rv))
    out.meta["star_type"] = None if star_code(star_type) is None else str(star_type)
    return out
