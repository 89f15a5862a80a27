"""The lines stage's work made in fewer, larger numpy calls (issue 12: lines <= 15 ms a spectrum)
against the calls it replaces: the same values, to the last bit.

Each rewrite below keeps every element's arithmetic and only changes how many elements one numpy
call takes (or where its temporaries live), so it is held to equality with the code it replaced,
written out here. The outside checks of the quantities themselves stay where they were:
``tests/test_lines_batched.py`` (scipy's ``voigt_profile`` and ``least_squares``),
``tests/test_lines_quick.py`` (injected lines, the solar strong lines of Moore, Minnaert &
Houtgast 1966, damped lines of known area).
"""

import numpy as np
import pytest
from scipy.special import voigt_profile
from test_lines_quick import _injected

from specan.lines.data import LineData, normalised
from specan.lines.profiles import _FAR_SERIES, FAR_Z, WIDE_BLOCK, fit_summary, start_and_bounds, voigt_wide, \
    window_arrays


def _line_data(seed=3):
    spec, _ = _injected(seed, 1.0)   # every listed line injected, S/N 100 (tests/test_lines_quick.py)
    return LineData(normalised(spec))


def _problems(data, rng, count=40):
    """Voigt problems as the batch gets them: windows, local continua, components, shifts, widths,
    signs, skipped pixels, free widths; some with too few pixels to fit."""
    out = []
    n = data.wave.size
    for k in range(count):
        length = int(rng.integers(2, 120))
        lo = int(rng.integers(0, n - length))
        hi = lo + length - 1
        ncomp = int(rng.integers(1, 5))
        centres = np.sort(rng.uniform(data.wave[lo], data.wave[hi], ncomp))
        levels = rng.uniform(0.8, 1.05, 2)
        cont = np.ones(length) if k % 3 == 0 else np.linspace(levels[0], levels[1], length)
        skip = (rng.uniform(size=length) < 0.2) if k % 4 == 1 else None
        sig = float(rng.uniform(0.3, 2.0))
        out.append((lo, hi, cont, centres, float(rng.uniform(0.1, 2.0)), sig, -1.0 if k % 5 == 2 else 1.0, skip,
                    bool(k % 2)))
    return out


def _setup_one_by_one(data, problems):
    """(problems kept, their (start, lower, upper)) as the loop over problems made them before."""
    live, starts = [], []
    for k, (lo, hi, cont, centres, max_shift, sig, sign, skip, free_width) in enumerate(problems):
        x, _, wts = window_arrays(data, lo, hi, skip)
        if (wts > 0).sum() < 3 + len(centres):
            continue
        p0, lb, ub = start_and_bounds(data, x, cont, centres, True, max_shift, sig, sign, free_width)
        if np.any(lb >= ub) or not np.all(np.isfinite(p0)):
            continue
        live.append(k)
        starts.append((p0, lb, ub))
    return live, starts


@pytest.mark.parametrize("at_once", [1, 4, 1000])
def test_voigt_setup_as_start_and_bounds(monkeypatch, at_once):
    # batchfit._voigt_setup: profiles.start_and_bounds (Voigt) of every problem at once (batches of
    # SETUP_AT_ONCE problems or more; smaller ones problem by problem), and the same problems left out
    # (too few weighted pixels; crossed bounds), as the loop over problems it replaced
    from specan.lines import batchfit
    from specan.lines.batchfit import _padded, _voigt_setup

    monkeypatch.setattr(batchfit, "SETUP_AT_ONCE", at_once)
    data = _line_data()
    rng = np.random.default_rng(8)
    for size in (40, 40, 40, 3, 1):
        problems = _problems(data, rng, size)
        live, starts = _setup_one_by_one(data, problems)
        got = _voigt_setup(data, problems)
        if not live:
            assert got is None
            continue
        if size == 40:
            assert len(live) < len(problems)   # some left out
        assert got[0] == live
        padded = _padded(data, problems, live, skip_index=7)
        for mine, theirs in zip(got[1:6], padded):
            assert np.array_equal(mine, theirs)
        ncomp, centres, p, lb, ub, real = got[6:]
        assert p.shape == (len(live), 3 + max(s[0].size - 3 for s in starts))
        for row, (p0, lb0, ub0) in enumerate(starts):
            n = p0.size
            assert ncomp[row] == n - 3
            assert np.array_equal(centres[row, :n - 3], problems[live[row]][3])
            assert np.array_equal(p[row, :n], p0) and np.array_equal(lb[row, :n], lb0)
            assert np.array_equal(ub[row, :n], ub0)
            assert real[row, :n].all() and not real[row, n:].any()
            # padded components held at zero in [-1, 1]
            assert np.all(p[row, n:] == 0.0) and np.all(lb[row, n:] == -1.0) and np.all(ub[row, n:] == 1.0)


def test_voigt_summaries_as_fit_summary():
    # batchfit._voigt_summaries: profiles.fit_summary (Voigt) of many fits from arrays, the same values
    from specan.lines.batchfit import _voigt_summaries

    rng = np.random.default_rng(4)
    nb, npar = 4000, 6   # (enough fits that x ** 2 by pow and by x * x part somewhere)
    p = np.column_stack([rng.normal(0.0, 0.3, nb), rng.uniform(0.2, 3.0, nb),
                         rng.uniform(0.0, 5.0, nb) * (rng.uniform(size=nb) < 0.9), rng.uniform(-1.0, 20.0, (nb, 3))])
    a = rng.normal(size=(nb, npar, npar))
    cov = a @ a.transpose(0, 2, 1) - 0.05   # some negative variances: clipped at zero as fit_summary does
    centres = rng.uniform(3800.0, 7000.0, (nb, 3))
    chi2, dof = rng.uniform(10.0, 500.0, nb), rng.integers(1, 300, nb)
    made = _voigt_summaries(p, cov[:, 3, 3], centres[:, 0], chi2, dof)
    for row in range(nb):
        assert made[row] == fit_summary(p[row], cov[row], centres[row], True, float(chi2[row]) / int(dof[row]))


def test_wide_series_in_blocks_as_written():
    # profiles.voigt_wide sums the far points' series in blocks, in place: the same values as the series
    # written out over all points at once (its form before, kept here); scipy's voigt_profile is its
    # outside check in tests/test_lines_batched.py
    rng = np.random.default_rng(5)
    x = np.linspace(3700.0, 7300.0, 4000)
    nl = 11
    sigma = np.repeat(rng.uniform(0.3, 5.0, nl), x.size)
    gamma = np.repeat(np.concatenate([[0.0], rng.uniform(0.0, 20.0, nl - 1)]), x.size)
    dx = (x[None, :] - rng.uniform(3700.0, 7300.0, nl)[:, None]).ravel()
    inv = 1.0 / (sigma * np.sqrt(2.0))
    far = dx * dx + gamma * gamma >= (FAR_Z / inv) ** 2
    assert far.sum() > 3 * WIDE_BLOCK   # several blocks
    written = np.empty(dx.size)
    written[~far] = voigt_profile(dx[~far], sigma[~far], gamma[~far])
    r = 1.0 / ((dx[far] + 1j * gamma[far]) * inv[far])
    u2 = r * r
    acc = _FAR_SERIES[-1] * u2
    for c in _FAR_SERIES[-2:0:-1]:
        acc = (acc + c) * u2
    written[far] = ((acc + 1.0) * r).imag * (-1.0 / (np.sqrt(np.pi) * sigma[far] * np.sqrt(2.0 * np.pi)))
    assert np.array_equal(voigt_wide(dx, sigma, gamma), written)
    # one line, sigma and gamma as numbers
    assert np.array_equal(voigt_wide(dx[:x.size], sigma[0], gamma[0]), written[:x.size])


def test_voigt_and_derivatives_into_the_batch_layout_as_written():
    # profiles.voigt_and_derivatives with ``out`` (the batched fits' layout: z from its real and
    # imaginary parts, the four rows scattered in one call) against its written form (without
    # ``out``), to the bit; the written form is checked against scipy and finite differences in
    # tests/test_lines_batched.py
    from specan.lines.profiles import voigt_and_derivatives

    rng = np.random.default_rng(6)
    n = 5000
    dx = rng.normal(0.0, 5.0, n)
    dx[:10] = 0.0
    dx[10:20] = -0.0
    sigma, gamma = rng.uniform(0.2, 3.0, n), rng.uniform(0.0, 10.0, n) * (rng.uniform(size=n) < 0.9)
    at = np.sort(rng.choice(3 * n, n, replace=False))
    out = np.full((4, 3 * n), 7.0)
    got = voigt_and_derivatives(dx, sigma, gamma, out=out, at=at)
    assert got is out
    written = voigt_and_derivatives(dx, sigma, gamma)
    for row in range(4):
        assert np.array_equal(out[row, at], written[row])
    untouched = np.ones(3 * n, bool)
    untouched[at] = False
    assert np.all(out[:, untouched] == 7.0)


def test_median_as_numpys():
    # data.median: np.median's value (the middle one, or the middle two summed and halved) to the bit,
    # for odd and even counts, ties and one value
    from specan.lines.data import median

    rng = np.random.default_rng(11)
    for n in list(range(1, 40)) + [3999, 4000]:
        for values in (rng.normal(size=n), rng.uniform(1e-5, 1e-2, n), np.round(rng.normal(size=n), 1)):
            assert median(values) == float(np.median(values))
            assert np.float64(median(values)).tobytes() == np.median(values).tobytes()


def test_parabola_normal_equations_as_entry_by_entry():
    # resolution.parabola_normal_equations (the narrowest-line search's Caruana parabolas): each
    # distinct power's sum made once, the same bits as the normal matrix and right-hand side made
    # entry by entry (their form before)
    from specan.resolution import parabola_normal_equations

    rng = np.random.default_rng(13)
    t = rng.uniform(-5.0, 5.0, (200, 11))
    wgt = (rng.uniform(size=(200, 11)) < 0.6).astype(float)
    y = rng.normal(size=(200, 11))
    m, rhs = parabola_normal_equations(t, wgt, y)
    m0 = np.stack([np.stack([(wgt * t ** (a + b)).sum(axis=1) for b in (2, 1, 0)], axis=-1)
                   for a in (2, 1, 0)], axis=-2)
    rhs0 = np.stack([(wgt * t ** a * y).sum(axis=1) for a in (2, 1, 0)], axis=-1)
    assert np.array_equal(m, m0) and np.array_equal(rhs, rhs0)


def test_wing_problem_weak_lines_as_the_complement():
    # measurement._wing_problem takes the weaker listed lines as others[~deep] instead of
    # np.setdiff1d(others, others[deep]): the same indices in the same order wherever ``others`` is
    # sorted and unique (nonzero's indices, less the line itself), NaN depths (not deep) included
    rng = np.random.default_rng(7)
    for _ in range(2000):
        others = np.flatnonzero(rng.uniform(size=int(rng.integers(0, 60))) < 0.4)
        others = others[others != int(rng.integers(0, 60))]
        depth = rng.uniform(0.0, 1.0, others.size)
        depth[rng.uniform(size=others.size) < 0.05] = np.nan
        deep = depth > 0.5
        mine, before = others[~deep], np.setdiff1d(others, others[deep])
        assert mine.dtype == before.dtype and np.array_equal(mine, before)


def test_width_step_leaves_a_singular_stack_as_it_is():
    # batchfit._step_widths with a singular normal matrix among the fits: _width_scores returned one
    # array where two are unpacked (a ValueError for any number of fits but two); now no step is taken
    # and every fit keeps its held width and values
    from specan.lines.batchfit import _step_widths, _width_scores

    rng = np.random.default_rng(3)
    lines, comps, pix = 3, 2, 25
    x = np.tile(np.linspace(-3.0, 3.0, pix), (lines, 1))
    centres = np.zeros((lines, comps))                      # two components on one place: singular
    sig = np.ones(lines)
    a = np.exp(-0.5 * (x[:, None, :] - centres[:, :, None]) ** 2)
    b = rng.normal(size=(lines, pix))
    ata = a @ a.transpose(0, 2, 1)
    ata[:] = 0.0                                             # exactly singular: LAPACK refuses it
    w = np.ones((lines, comps))
    z, step = _width_scores(x, b, a, ata, w, centres, sig)
    assert z.shape == step.shape == (lines,) and np.all(np.isinf(z)) and not np.any(np.isfinite(step))
    best = np.zeros(lines, int)
    held = (sig.copy(), ata.copy(), w.copy(), np.ones(lines))
    sig_best, ata_best, wbest, cbest = (v.copy() for v in held)
    _step_widths(x, b, a[:, None], a.sum(axis=1), centres, np.zeros((lines, 1)), sig, np.ones(lines), best,
                 sig_best, ata_best, wbest, cbest)
    for before, after in zip(held, (sig_best, ata_best, wbest, cbest)):
        assert np.array_equal(before, after)


def test_metal_lines_without_share_errors_as_with_them():
    # hydrogen_blends.metal_lines(share_errors=False), as less_blends calls it: the same sum, its error,
    # shares and kept positions to the bit as with the shares' errors made (which it then leaves out)
    from specan.linelist import load_linelist
    from specan.lines.hydrogen_blends import metal_lines
    from specan.lines.windows import Window

    data = _line_data()
    rows = load_linelist()
    listed = rows["wave_air"].to_value("AA")[(rows["species"] != "H I") & (rows["kind"] == "atomic")]
    rng = np.random.default_rng(8)
    compared = 0
    for centre in (3970.1, 4101.7, 4340.5, 4861.3, 6562.8):
        lo, hi = (int(v) for v in data.wave.searchsorted([centre - 40.0, centre + 40.0]))
        window = Window(lo, hi, (1.0, 1.0), False)
        cont = np.linspace(rng.uniform(0.95, 1.0), rng.uniform(0.95, 1.0), hi - lo + 1)
        fit = {"centre": centre, "sigma": rng.uniform(0.8, 2.0), "gamma": rng.uniform(0.1, 3.0),
               "ew": rng.uniform(1.0, 8.0)}
        # the listed metal lines there (every listed line is injected) and a few places with none
        positions = np.sort(np.concatenate([listed[np.abs(listed - centre) < 38.0],
                                            rng.uniform(centre - 38.0, centre + 38.0, 3)]))
        fwhm = float(data.line_fwhm[(lo + hi) // 2])
        full = metal_lines(data, window, cont, fit, fwhm, positions)
        lean = metal_lines(data, window, cont, fit, fwhm, positions, share_errors=False)
        assert lean[3] is None and full[3] is not None
        for a, b in zip(full[:3] + full[4:], lean[:3] + lean[4:]):
            assert np.asarray(a).tobytes() == np.asarray(b).tobytes()
        compared += int(np.count_nonzero(full[2]))
    assert compared > 10


def test_feature_candidates_as_written():
    # data._candidates takes find_peaks' height test as a comparison and the line width at each peak
    # by index: the same candidates as find_peaks(..., height=) and np.interp at the peaks (its form
    # before, written out here), on a spectrum, a noisier copy and one divided by a ripple
    from scipy.signal import find_peaks, peak_prominences

    from specan.lines.data import DETECT_SIGMA, _candidates

    def written(data, s, sign, detect_sigma, noise):
        peaks, _ = find_peaks(s, height=detect_sigma)
        fwp = np.interp(peaks, np.arange(s.size), data.line_fwhm) if peaks.size else peaks
        flipped = np.where(data.good, -sign * data.flux, -np.inf)
        raw, _ = find_peaks(flipped)
        raw = raw[s[raw] >= detect_sigma]
        if raw.size:
            raw = raw[peak_prominences(flipped, raw)[0] >= 3.0 * noise]
        if raw.size and peaks.size:
            near = np.abs(data.wave[raw][:, None] - data.wave[peaks][None, :]) < 0.5 * fwp[None, :]
            raw = raw[~near.any(axis=1)]
        return np.concatenate([peaks, raw]).astype(int)

    compared = 0
    for seed in (3, 4):
        data = _line_data(seed)
        for d in (data, data.divided(0.97 + 0.03 * np.cos(data.wave / 50.0))):
            noise = d.typical_noise()
            for sign in (1.0, -1.0):
                for sigma in (DETECT_SIGMA, 1.0):
                    s = sign * np.where(d.good, d.signif, 0.0)
                    mine = _candidates(d, s, sign, sigma, noise)
                    assert mine.dtype == written(d, s, sign, sigma, noise).dtype
                    assert np.array_equal(mine, written(d, s, sign, sigma, noise))
                    compared += mine.size
    assert compared > 500


def test_hydrogen_starts_as_written():
    # windows.hydrogen_starts finds every line's deepest wide-smoothed pixel within its width at once
    # (rows padded with -inf): the same pixels as the loop over the lines it replaced, written out here,
    # for absorption and emission, widths of a fraction of a pixel to many, near the spectrum's ends
    from specan.lines.windows import hydrogen_starts

    def written(data, ic, sign, fwhm):
        smooth = data.smooth_wide
        n = smooth.size
        out = np.array(ic, int)
        for m in range(out.size):
            reach = max(int(round(float(fwhm[m]) / float(data.dx[out[m]]))), 1)
            a, b = max(out[m] - reach, 0), min(out[m] + reach + 1, n)
            out[m] = a + int((sign[m] * (1.0 - smooth[a:b])).argmax())
        return out

    data = _line_data()
    rng = np.random.default_rng(9)
    n = data.wave.size
    for _ in range(50):
        count = int(rng.integers(1, 15))
        ic = np.concatenate([rng.integers(0, n, count), [0, n - 1]])
        sign = rng.choice([-1.0, 1.0], ic.size)
        fwhm = rng.uniform(0.1, 20.0, ic.size) * np.median(data.dx)
        assert np.array_equal(hydrogen_starts(data, ic, sign, fwhm), written(data, ic, sign, fwhm))


def test_blanketing_as_written():
    # hydrogen_blends.blanketing takes each side's crest over its own stretch of the window: the same
    # absorption under the crests, to the bit, as over the whole window with the other side at -inf
    # (its form before, written out here); centres inside, at the edges of and outside the window
    from specan.lines.hydrogen_blends import blanketing
    from specan.lines.windows import Window

    def written(data, window, cont, centre):
        sel = slice(window.lo, window.hi + 1)
        x = data.wave[sel]
        if x.size < 2:
            return 0.0
        level = np.minimum(data.smooth[sel] / cont, 1.0)
        split = centre if x[0] < centre < x[-1] else 0.5 * (x[0] + x[-1])
        blue = x < split
        kb = np.where(blue, level, -np.inf).argmax()
        kr = np.where(blue, -np.inf, level).argmax()
        crest = np.interp(x, [x[kb], x[kr]], [level[kb], level[kr]])
        return float(np.maximum(1.0 - crest, 0.0) @ data.dx[sel])

    data = _line_data()
    rng = np.random.default_rng(10)
    n = data.wave.size
    for _ in range(300):
        lo = int(rng.integers(0, n - 2))
        hi = min(lo + int(rng.integers(0, 200)), n - 1)
        window = Window(lo, hi, (1.0, 1.0), False)
        cont = np.linspace(rng.uniform(0.9, 1.05), rng.uniform(0.9, 1.05), hi - lo + 1)
        x0, x1 = data.wave[lo], data.wave[hi]
        centre = rng.choice([rng.uniform(x0, x1), x0, x1, x0 - 5.0, x1 + 5.0, data.wave[(lo + hi) // 2]])
        mine = blanketing(data, window, cont, centre)
        assert np.float64(mine).tobytes() == np.float64(written(data, window, cont, centre)).tobytes()


def test_hydrogen_model_as_written():
    # hydrogen.hydrogen_model tests every kept line's blend with a listed low-excitation line at once,
    # and takes the profiles a line a row: the same transmission, to the bit, as its form before
    # (line by line, the profiles' widths one per point), written out here; lines placed on, near and
    # far from listed lines, some not detected, some emission, some failing the integral test
    import astropy.units as u

    from specan.lines.hydrogen import hydrogen_model
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import LineResult, line_targets

    def written(data, results, targets, ep_low):
        pred, is_h = targets.pred, targets.hydrogen
        others = pred[(~is_h) & (np.nan_to_num(ep_low, nan=0.0) < 1.0)]
        fits = []
        for i, result in results.items():
            fit = result.fit
            if fit is None or not is_h[i] or not result.detected or fit["sign"] < 0 or fit["ew"] <= 0:
                continue
            if not abs(fit["ew"] - fit["ew_int"]) <= 0.3 * abs(fit["ew_int"]):
                continue
            if others.size and np.min(np.abs(others - fit["centre"])) < 0.6 * targets.fwhm[i]:
                continue
            fits.append(fit)
        if not fits:
            return None
        n = data.wave.size
        prof = voigt_wide((data.wave[None, :] - np.array([f["centre"] for f in fits])[:, None]).ravel(),
                          np.repeat([f["sigma"] for f in fits], n), np.repeat([f["gamma"] for f in fits], n))
        model = np.ones(n)
        for fit, line in zip(fits, prof.reshape(len(fits), n)):
            model *= 1.0 - fit["ew"] * line
        return np.clip(model, 0.05, 1.0)

    data = _line_data()
    listed = lines_in_range(data, None, ("atomic",), 0 * u.km / u.s)
    targets = line_targets(data, listed, None)
    ep_low = listed.rows["ep_low"].to_value(u.eV)
    hydrogen = np.flatnonzero(targets.hydrogen)
    low = targets.pred[~targets.hydrogen & (np.nan_to_num(ep_low, nan=0.0) < 1.0)]
    rng = np.random.default_rng(11)
    blocked = 0
    for _ in range(60):
        results = {}
        for i in hydrogen:
            near = low[np.argmin(np.abs(low - targets.pred[i]))]
            centre = rng.choice([targets.pred[i], near + rng.uniform(-1.0, 1.0) * targets.fwhm[i],
                                 targets.pred[i] + rng.normal(0.0, 2.0)])
            ew = rng.uniform(0.5, 10.0)
            fit = {"centre": float(centre), "sigma": rng.uniform(0.5, 3.0), "gamma": rng.uniform(0.0, 4.0),
                   "ew": ew, "ew_int": ew * rng.choice([1.0, 1.2, 2.0]), "sign": rng.choice([1.0, 1.0, -1.0]),
                   "profile": "voigt"}
            results[int(i)] = LineResult(detected=bool(rng.uniform() < 0.9), fit=fit)
            blocked += abs(centre - near) < 0.6 * targets.fwhm[i]
        mine, theirs = hydrogen_model(data, results, targets, ep_low), written(data, results, targets, ep_low)
        assert (mine is None) == (theirs is None)
        if mine is not None:
            assert mine.tobytes() == theirs.tobytes()
    assert blocked > 20


def test_series_limits_of_many_lines_as_written():
    # windows.series_limits of many lines at once (the sorted series' stretches below and above each
    # line, as line_windows calls it) and of one: the same limits, to the bit, as the form it replaced
    # (one line at a time over the series as given), written out here; lines on members, within a width
    # of one, beyond the series' ends, series given unsorted, of one member and of none
    from specan.lines.windows import series_limits

    def written(centre, fwhm, series):
        series = np.asarray(series, float)
        blue = series[series < centre - fwhm]
        red = series[series > centre + fwhm]
        lo = 0.5 * (centre + blue.max()) if blue.size else -np.inf
        hi = 0.5 * (centre + red.min()) if red.size else np.inf
        if not blue.size and red.size:
            lo = centre - (hi - centre)
        return lo, hi

    rng = np.random.default_rng(12)
    for trial in range(200):
        series = rng.permutation(rng.uniform(3650.0, 6600.0, int(rng.integers(0, 12))))
        count = int(rng.integers(1, 12))
        centre = rng.uniform(3500.0, 6800.0, count)
        if series.size:
            picks = rng.integers(0, series.size, count)
            near = series[picks] + rng.choice([0.0, 1.0, -1.0], count)   # on a member, or a width off it
            centre = np.where(rng.uniform(size=count) < 0.5, near, centre)
        fwhm = rng.choice([1.0, 2.5, rng.uniform(0.5, 5.0)], count)
        lo, hi = series_limits(centre, fwhm, series)
        for m in range(count):
            one = series_limits(centre[m], fwhm[m], series)
            for mine in ((lo[m], hi[m]), one):
                assert np.float64(mine[0]).tobytes() == np.float64(written(centre[m], fwhm[m], series)[0]).tobytes()
                assert np.float64(mine[1]).tobytes() == np.float64(written(centre[m], fwhm[m], series)[1]).tobytes()
