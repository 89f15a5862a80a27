"""Measurement windows: the pixels a line is measured over and the local continuum under it."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from . import compiled

__all__ = ["Window", "line_window", "line_windows", "hydrogen_starts", "adaptive_window", "adaptive_windows", "fixed_window",
           "fixed_windows",
           "profile_window", "wing_reach", "local_continuum", "series_limits", "MAX_WING"]

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


def line_window(data, ic, centre, sign, fwhm, hydrogen, matched, series=None):
    """The window of one line centred on pixel ``ic`` (wavelength ``centre``).

    A line matched to a feature gets an :func:`adaptive_window` reaching out to 25
    line widths (hydrogen: 80 Angstrom at least, on the widely smoothed flux); a line
    with no feature a :func:`fixed_window`. ``series``: the predicted positions of the
    hydrogen lines (Angstrom); a hydrogen line's window then ends half-way to its
    neighbours in it (:func:`series_limits`).
    """
    if not matched:
        return fixed_window(data, centre, fwhm)
    max_half = max(25.0 * fwhm, 80.0) if hydrogen else 25.0 * fwhm
    walk_from = ic
    if hydrogen:
        walk_from = int(hydrogen_starts(data, np.array([ic]), np.array([sign], float), np.array([fwhm], float))[0])
    window = adaptive_window(data, walk_from, sign, fwhm, max_half, wide=hydrogen)
    if hydrogen and series is not None:
        window = _within(data, window, *series_limits(data.wave[ic], fwhm, series))
    return window


def hydrogen_starts(data, ic, sign, fwhm):
    """Where hydrogen lines' walks start: the deepest point of the wide smoothing within one line width
    ``fwhm`` of each matched pixel ``ic`` (``sign`` -1, emission: the highest).

    The matched feature is a peak of the narrow matched filter, which a metal line on the wing can pull
    off the broad line's bottom; walked from there on the wide smoothing, the side toward the bottom
    stopped at once (the flux falls that way) and the window missed that side of the line (the Kurucz
    Sun at R 2000: H11 at 3770.5 A got 3771.9-3781.4 A, H8 at 3888.9 A 3889.7-3898.5 A; the demo
    night's F8 star H epsilon at 3969.5 A 3970.0-3984.5 A; measured). The series limits
    (:func:`series_limits`) stay those of the matched pixel.
    """
    smooth = data.smooth_wide
    n = smooth.size
    ic = np.asarray(ic, int)
    if not ic.size:
        return ic.copy()
    # each line's pixels within its width, as the rows of one array (past a row's own pixels -inf, which
    # no depth reaches: argmax, the first of the greatest, picks what it picks over the row's own slice)
    # (np.round rounds halves to even, as Python's round)
    reach = np.maximum(np.round(np.asarray(fwhm, float) / data.dx[ic]).astype(int), 1)
    a, b = np.maximum(ic - reach, 0), np.minimum(ic + reach + 1, n)
    k = np.arange(int((b - a).max()))
    pix = a[:, None] + k[None, :]
    depth = np.asarray(sign, float)[:, None] * (1.0 - smooth[np.minimum(pix, n - 1)])
    return a + np.where(pix < b[:, None], depth, -np.inf).argmax(axis=1)


def series_limits(centre, fwhm, series):
    """The wavelengths half-way from ``centre`` to its nearest neighbours in ``series`` (-inf, +inf: none).

    Two lines of one series (H9 and H10 are 37 A apart, H11 and H12 20 A) overlap in their wings,
    and a window walked outward on the smoothed flux of a crowded spectrum can pass the neighbour's
    core (measured, Kurucz Sun at R 2000: H12's window 3750-3781 A held H11 at 3771.7 A). Beyond
    half-way the absorption is more the neighbour's than the line's own; there the window ends.
    Lines of the series within one line width of ``centre`` are the line itself. The last line
    listed toward the series limit (H12 in the packaged list) has no listed neighbour there, though
    the series goes on closer still: that side ends as far out as the other (measured, Kurucz Sun at
    R 1000: H12's window reached 3715 A, past the unlisted H13-H15).

    ``centre`` and ``fwhm`` may be arrays (one element a line): the limits are then arrays.
    """
    series = np.sort(np.asarray(series, float))
    centre, fwhm = np.asarray(centre, float), np.asarray(fwhm, float)
    if not series.size:
        shape = np.broadcast_shapes(centre.shape, fwhm.shape)
        return np.full(shape, -np.inf)[()], np.full(shape, np.inf)[()]
    # the members below centre - fwhm are a first stretch of the sorted series and those above centre +
    # fwhm a last one: the nearest of each is the stretch's end (the greatest below, the least above)
    below = series.searchsorted(centre - fwhm, side="left")
    above = series.searchsorted(centre + fwhm, side="right")
    blue, red = below > 0, above < series.size
    lo = np.where(blue, 0.5 * (centre + series[np.maximum(below - 1, 0)]), -np.inf)
    hi = np.where(red, 0.5 * (centre + series[np.minimum(above, series.size - 1)]), np.inf)
    lo = np.where(~blue & red, centre - (hi - centre), lo)
    return lo[()], hi[()]


def _within(data, window, lo, hi):
    """``window`` with its edges moved in to the wavelengths ``lo``, ``hi`` where it passes them.

    A moved edge keeps the walk's level (the continuum it found farther out) and marks the window cut.
    """
    a, b = window.lo, window.hi
    if data.wave[a] < lo:
        a = min(int(np.searchsorted(data.wave, lo)), b)
    if data.wave[b] > hi:
        b = max(int(np.searchsorted(data.wave, hi, side="right")) - 1, a)
    if (a, b) == (window.lo, window.hi):
        return window
    return Window(a, b, window.levels, True)


def line_windows(data, starts, fwhm, hydrogen, series=None):
    """:func:`line_window` of many lines at once: the same windows, the walks vectorised.

    Parameters
    ----------
    data : LineData
    starts : sequence
        Per line ``(centre, max_shift, matched, ic, sign, ...)``
        (:class:`~specan.lines.measurement.LineStart`).
    fwhm, hydrogen : array
        Per line: its line width (Angstrom) and whether it is a hydrogen line.
    series : array, optional
        The predicted positions of the hydrogen lines (see :func:`series_limits`).

    Returns
    -------
    list of Window
    """
    out = [None] * len(starts)
    walk = [k for k, st in enumerate(starts) if st[2]]
    fixed = [k for k, st in enumerate(starts) if not st[2]]
    if fixed:
        for k, window in zip(fixed, fixed_windows(data, np.fromiter((starts[k][0] for k in fixed), float, len(fixed)),
                                                  np.asarray(fwhm, float)[fixed])):
            out[k] = window
    if walk:
        k = np.array(walk)
        fw = np.asarray(fwhm, float)[k]
        wide = np.asarray(hydrogen, bool)[k]
        # (np.fromiter, types given: the same arrays as np.array of the lists)
        ic = np.fromiter((starts[j][3] for j in walk), int, len(walk))
        sign = np.fromiter((starts[j][4] for j in walk), float, len(walk))
        limits = {}
        if series is not None and wide.any():
            # each hydrogen line's limits in its series, from its matched pixel (all lines in one call)
            h = np.flatnonzero(wide)
            lo, hi = series_limits(data.wave[ic[h]], fw[h], series)
            limits = dict(zip(h.tolist(), zip(lo.tolist(), hi.tolist())))
        if wide.any():
            ic[wide] = hydrogen_starts(data, ic[wide], sign[wide], fw[wide])
        max_half = np.where(wide, np.maximum(25.0 * fw, 80.0), 25.0 * fw)
        for m, (j, window) in enumerate(zip(walk, adaptive_windows(data, ic, sign, fw, max_half, wide))):
            out[j] = _within(data, window, *limits[m]) if m in limits else window
    return out


def adaptive_windows(data, ic, sign, min_half, max_half, wide):
    """:func:`adaptive_window` of many lines (arrays, one element per line): the same windows.

    The walks of :func:`_walk` step by step for all lines and both directions at once: each
    stopping rule becomes a test over the pixels of the walk, and a walk stops at the first
    pixel where one holds (in the order :func:`_walk` tests them). The comparisons are the
    same, so are the windows.
    """
    # both directions' walks as the rows of one set of arrays (blue walks first, then red): each row's
    # tests are its own, so the same as one direction at a time, in half the calls (the arrays are
    # small: a call's cost is mostly its number of numpy operations)
    nl = ic.size
    step = np.repeat(np.array([-1, 1]), nl)
    twice = (np.concatenate([a, a]) for a in (ic, sign, min_half, max_half, wide))
    ic2, sign2, min_half2, max_half2, wide2 = twice
    end, level, cut = _walks(data, ic2, sign2, min_half2, max_half2, wide2, step)
    err_end = _on_smoothing(wide2, lambda: data.smooth_wide_err[end], data.smooth_err[end])
    # a plateau within the noise of the continuum is the continuum
    level = np.where(np.abs(1.0 - level) <= 3.0 * err_end, 1.0, level)
    ends, levels, cuts = end.tolist(), level.tolist(), cut.tolist()
    out = []
    # (the arrays as Python numbers once: the same values as element by element)
    for e0, e1, l0, l1, c0, c1 in zip(ends[:nl], ends[nl:], levels[:nl], levels[nl:], cuts[:nl], cuts[nl:]):
        if e0 > e1:
            e0, e1, l0, l1 = e1, e0, l1, l0
        out.append(Window(e0, e1, (l0, l1), bool(c0 or c1)))
    return out


#: The vectorised walks look this many steps ahead first; the few walks still going on (no rule held,
#: spectrum and reach not ended) are walked again in full. Most windows end within it, and the test
#: arrays of a walk to the full reach (25 line widths, hydrogen 80 A) were mostly past every window's
#: end: adaptive_windows 1.47 -> 1.10 ms a spectrum on benchmarks/bench_lines.py's 40 (16 steps: 1.21,
#: 24: 1.17; measured, alternated, load 2.6). With both directions walked in one call (their walks still
#: going are walked again in one call too) 24 steps read 0.55 ms against 32 steps' 0.58 (16: 0.54, 20:
#: 0.56, 28: 0.57, 40: 0.62, 48: 0.65; the bench's 80 calls replayed, CPU, least of 20 rounds
#: alternated with c258075's, load 1.6-1.8).
WALK_AHEAD = 24
#: The look-ahead of a call whose walks are all on the wide smoothing (the hydrogen lines, walked farther:
#: 80 A at least). Walked in full at once they read 0.57-0.58 ms a spectrum in adaptive_windows against
#: 0.55 with 64 steps ahead (48: 0.54, 96: 0.56; the same replay, load 1.4-1.6).
WIDE_WALK_AHEAD = 64


def _walks(data, ic, sign, min_half, max_half, wide, step):
    """:func:`_walk` of every line in its direction ``step`` (-1 or 1 per line): (edge pixels, levels there, cut).

    Every walk is tested over its first :data:`WALK_AHEAD` steps; those that no rule stopped by then
    and that could go on are tested again over their whole reach. A walk's tests at a step depend on
    that step and the ones before it only, so the first step a rule holds is the same either way.
    Walks on the wide smoothing alone (the hydrogen lines, a few to a call) look farther ahead
    (:data:`WIDE_WALK_AHEAD`): one of them went on past 32 steps in most calls (benchmarks/bench_lines.py's
    40 spectra: 50 of 80 calls, 127 of 784 walks), and two passes of 32 steps cost more than walking in
    full (0.51 -> 0.34 ms a spectrum, CPU, the same windows; measured, load 4-5, a direction a call).

    Compiled (:func:`specan.lines.walkkernel.walks`, where :func:`specan.lines.compiled.walks`
    gives it) each walk goes a step at a time to its end instead: the same tests on the same values,
    the same windows (tests/test_lines_walkkernel.py)."""
    kernels = compiled.walks()
    if kernels is not None:
        nl = ic.size
        end, level, cut = np.empty(nl, np.int64), np.empty(nl), np.empty(nl, bool)
        # (the wide smoothing made only where a walk is on it; the narrow one stands in otherwise, unread)
        some_wide = bool(wide.any())
        kernels.walks(data.wave, data.dx, data.smooth, data.smooth_err,
                      data.smooth_wide if some_wide else data.smooth, data.smooth_wide_err if some_wide else data.smooth_err,
                      ic.astype(np.int64, copy=False), sign.astype(float, copy=False),
                      min_half.astype(float, copy=False), max_half.astype(float, copy=False),
                      wide.astype(bool, copy=False), step.astype(np.int64, copy=False), end, level, cut)
        return end, level, cut
    end, level, cut, going = _walks_upto(data, ic, sign, min_half, max_half, wide, step,
                                         WIDE_WALK_AHEAD if wide.all() else WALK_AHEAD)
    if going.any():
        k = going.nonzero()[0]
        end[k], level[k], cut[k], _ = _walks_upto(data, ic[k], sign[k], min_half[k], max_half[k], wide[k],
                                                  step[k], None)
    return end, level, cut


def _walks_upto(data, ic, sign, min_half, max_half, wide, step, ahead):
    """:func:`_walks` over at most ``ahead`` steps (None: the whole reach), and which walks were still
    going at its end (no rule held, every step valid)."""
    n = data.wave.size
    nl = ic.size
    x0 = data.wave[ic]
    # steps a walk can take before the spectrum ends or max_half is passed (each its own direction's)
    up = step > 0
    limit = np.where(up, data.wave.searchsorted(x0 + max_half, side="right") - 1 - ic,
                     ic - data.wave.searchsorted(x0 - max_half, side="left"))
    # (the steps past a walk's own limit are not valid: tested over more of them, as for the longest
    # walk of the other direction, it ends where it did)
    jmax = int(max(limit.max() + 2, 2))
    if ahead is not None:
        jmax = min(jmax, ahead)
    j = np.arange(1, jmax + 1)
    step_c = step[:, None]
    idx = ic[:, None] + step_c * j[None, :]                        # (lines, steps)
    inside = (idx >= 0) & (idx < n)
    idc = np.minimum(np.maximum(idx, 0), n - 1)
    dist = np.abs(data.wave[idc] - x0[:, None])
    valid = inside & (dist <= max_half[:, None])
    # the first step that leaves the spectrum or passes max_half ends the walk one pixel back
    valid &= np.logical_and.accumulate(valid, axis=1)
    w = wide[:, None]
    smooth = _on_smoothing(w, lambda: data.smooth_wide[idc], data.smooth[idc])
    err = _on_smoothing(w, lambda: data.smooth_wide_err[idc], data.smooth_err[idc])
    depth = sign[:, None] * (1.0 - smooth)
    s0 = _on_smoothing(wide, lambda: data.smooth_wide[ic], data.smooth[ic])
    depth0 = sign * (1.0 - s0)
    d0 = np.maximum(depth0, 0.0)
    # the running minimum of the depth (the walk's ``best``) and the step it was last lowered at
    best = np.minimum.accumulate(np.concatenate([depth0[:, None], depth], axis=1), axis=1)
    lowered = depth < best[:, :-1]
    last = np.maximum.accumulate(np.where(lowered, j[None, :], 0), axis=1)
    best = best[:, 1:]
    mh = min_half[:, None]
    at_continuum = (depth <= np.maximum(err, 2e-3)) & (dist >= mh)
    neighbour = (depth > best + np.maximum(3.0 * err, 5e-3)) & (dist >= 0.5 * mh)
    # the plateau test of _on_plateau: one line width back (hydrogen: five) along the walk. (A call's
    # walks are mostly all hydrogen or all not: the other kind's tests, which np.where would make over
    # every step and discard, are made only where some walk is of that kind; the same values.)
    some_wide = bool(wide.any())
    all_wide = some_wide and bool(wide.all())
    back_steps = np.ceil((5.0 if all_wide else np.where(w, 5.0, 1.0) if some_wide else 1.0) * mh
                         / data.dx[idc]).astype(int)
    # (clipped: steps past the spectrum's end are not valid anyway)
    back = np.minimum(np.maximum(ic[:, None] + step_c * np.maximum(j[None, :] - back_steps, 0), 0), n - 1)
    fall = _depth_at(data, back, sign, wide) - depth
    if all_wide:
        flat = (dist >= 10.0 * mh) & (fall < np.maximum(2.0 * err, 0.1 * depth))
    elif not some_wide:
        flat = (dist >= 2.0 * mh) & (fall < np.maximum(2.0 * err, 0.01 * d0[:, None]))
    else:
        flat = np.where(w, (dist >= 10.0 * mh) & (fall < np.maximum(2.0 * err, 0.1 * depth)),
                        (dist >= 2.0 * mh) & (fall < np.maximum(2.0 * err, 0.01 * d0[:, None])))
    plateau = ~(depth > 0.5 * d0[:, None]) & flat
    stops = valid & (at_continuum | neighbour | plateau)
    any_stop = stops.any(axis=1)
    first = np.where(any_stop, stops.argmax(axis=1), -1)
    rows = np.arange(nl)
    nvalid = valid.sum(axis=1)
    # no rule held: the walk ends at its last valid pixel (the limit), level 1, not cut
    end = ic + step * nvalid
    level = np.ones(nl)
    cut = np.zeros(nl, bool)
    f = np.maximum(first, 0)
    hit = any_stop
    pix = idc[rows, f]
    is_cont = hit & at_continuum[rows, f]
    is_nb = hit & ~is_cont & neighbour[rows, f]
    is_pl = hit & ~is_cont & ~is_nb
    end = np.where(is_cont | is_pl, pix, end)
    end = np.where(is_nb, ic + step * last[rows, f], end)
    cut = is_nb
    level = np.where(is_pl, smooth[rows, f], level)
    return end.astype(int), level, cut, ~any_stop & (nvalid == jmax)


def _on_smoothing(wide, on_wide, on_line):
    """``np.where(wide, on_wide(), on_line)``, the wide smoothing not asked for where no line walks on it."""
    return np.where(wide, on_wide(), on_line) if wide.any() else on_line


def _depth_at(data, pixels, sign, wide):
    """Depth ``sign (1 - smoothed flux)`` at ``pixels`` (lines x steps), on the wide smoothing where ``wide``."""
    return sign[:, None] * (1.0 - _on_smoothing(wide[:, None], lambda: data.smooth_wide[pixels], data.smooth[pixels]))


def fixed_window(data, centre, fwhm):
    """+-1 line width around ``centre`` against the smoothed flux at its edges.

    Nothing found here: the integral is an upper limit, and inside another line's wing
    that wing is the continuum.
    """
    lo = int(data.wave.searchsorted(centre - fwhm))
    hi = min(max(int(data.wave.searchsorted(centre + fwhm)), lo + 1), data.wave.size - 1)
    lo = min(lo, hi - 1)
    return Window(lo, hi, (float(data.smooth[lo]), float(data.smooth[hi])), False)


def fixed_windows(data, centre, fwhm):
    """:func:`fixed_window` of many lines (arrays of centres and widths): the same windows."""
    n = data.wave.size
    lo = data.wave.searchsorted(centre - fwhm)
    hi = np.minimum(np.maximum(data.wave.searchsorted(centre + fwhm), lo + 1), n - 1)
    lo = np.minimum(lo, hi - 1)
    left, right = data.smooth[lo], data.smooth[hi]
    # (as Python numbers read once: the same values)
    return [Window(a, b, (c, d), False) for a, b, c, d in zip(lo.tolist(), hi.tolist(), left.tolist(), right.tolist())]


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
    lo = min(max(int(data.wave.searchsorted(centre - half)), 0), data.wave.size - 2)
    hi = min(max(int(data.wave.searchsorted(centre + half)), lo + 1), data.wave.size - 1)
    return Window(lo, hi, (1.0, 1.0), False)


def local_continuum(data, window):
    """Straight line between the two edge levels over the window's pixels."""
    lo, hi, levels = window.lo, window.hi, window.levels
    x = data.wave[lo:hi + 1]
    if hi == lo:
        return np.full(1, levels[0])
    t = (x - x[0]) / (x[-1] - x[0])
    return levels[0] * (1.0 - t) + levels[1] * t
