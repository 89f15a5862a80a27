"""The batched line measurement of specan/lines/ against the one-by-one path it replaces.

``lines.measure`` finds every line's start and window at once and makes all its profile fits
together (``_batched=True``, the default: specan/lines/batchfit.py); ``_batched=False`` walks
and fits the lines one by one (scipy ``least_squares`` for the Voigt fits), the slow path.

Stated tolerance: the same lines detected, the same method, profile and emission flag; every
equivalent width (``ew``, ``ew_int``, ``ew_fit``) within 0.05 of the line's own error, taken
times sqrt(reduced chi2) where the profile model rather than the noise limits the fit (chi2 > 1:
the errors count noise only, see ``lines.measure``); the errors within 1% of each other; centre
and FWHM within 1% of the FWHM. Where a fit's optimum is ill-determined ``least_squares`` stops
(its ftol, 1e-6) before the batched fit does; such a fit may differ by more ("another optimum"),
but then the batched fit must reach a chi2 no higher than the slow path's.

Measured (tests below; the velocities of the demo night as planted): demo night, 18 spectra,
2773 lines, 1573 fits: largest differences 0.026 of the error (EW), 5.2e-3 (errors), 1.4e-3
of the FWHM (centre, FWHM); none at another optimum (one, He II 6560 in trf3_11, before the
Voigt batch started single lines from their direct integral and solved bound-crossing steps
again: -0.3439 against -0.3397 A, 0.14 of its error 0.030 A; chi2 1.149 batched, 1.156 one by
one). Kurucz Sun (fitted / true continuum), 132 / 138 fits: 7e-4 / 2.9e-3 of the error, errors
3e-4 / 1.3e-3, none at another optimum. MILES stars (every 45th, 17 stars O-M, 1771 fits):
0.024 of the error, 2.9e-3, 1.2e-3 of the FWHM, none at another optimum, since ill-determined
batched Voigt fits (error above the equivalent width) are made one by one and that fit reported
(where the batch stops in their flat valleys depends on its path: Fe I 3820 in a G9.5 III star
stopped at chi2 0.748 against 0.639; Fe I 3860 in two M dwarfs, 0 +- 3e5 A, at FWHM 43 against
15 A). The windows and line starts are the same to the last bit (the tests at the end). The fits the
batch leaves to the one-by-one algorithm (ill-determined, unconverged, or ill-determined in the
batch's tail) are made by specan/lines/leastsq.py, scipy's least_squares algorithm written for small
problems: the same fits to the last bit (test_lean_trust_region_fit_equals_scipys); with it the
figures above are unchanged (measured again with the tail left to it).
"""

from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from test_lines import make_spectrum

from specan import lines, prepare, read

DEMO = Path(__file__).resolve().parents[1] / "sample_spectra"


def demo_line_setups(count):
    """(file, data, listed, targets, features) of the first ``count`` readable demo-night spectra, as
    measure() makes them."""
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import line_targets

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:count]:
        data = LineData(prepare(read(DEMO / row["file"])))
        listed = lines_in_range(data, None, ("atomic",), row["rv_topo"] * u.km / u.s)
        yield row["file"], data, listed, line_targets(data, listed, None), find_features(data, DETECT_SIGMA, MIN_DEPTH)
EW_TOL = 0.05      # of the line's own error
ERR_TOL = 0.01     # relative, between the two paths' errors
PLACE_TOL = 0.01   # of the FWHM, for the centre and the FWHM

def demo_line_plans(count, kind):
    """(file, data, targets, features, which, starts, windows, plans) of the demo spectra of
    :func:`demo_line_setups`: every listed line's start, window and plan (``plan_lines`` with ``kind``)."""
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import line_starts, plan_lines
    from specan.lines.windows import line_windows

    for name, data, listed, targets, features in demo_line_setups(count):
        which = list(range(targets.pred.size))
        starts = dict(zip(which, line_starts(data, features, targets, np.array(which), DETECT_SIGMA)))
        found = [i for i in which if starts[i] is not None]
        windows = dict(zip(found, line_windows(data, [starts[i] for i in found], targets.fwhm[found],
                                               targets.hydrogen[found])))
        plans = plan_lines(data, features, targets, which, kind, starts, windows)
        yield name, data, targets, features, which, starts, windows, plans


def _values(t, col):
    return np.asarray(getattr(t[col], "value", t[col]), float)


def _compare(slow, fast):
    """Assert the stated tolerance; return the number of fits that reached another optimum."""
    assert list(slow["id"]) == list(fast["id"])
    for col in ("detected", "method", "profile", "emission"):
        assert list(slow[col]) == list(fast[col]), col
    # where the profile model, not the noise, limits a fit (reduced chi2 >> 1) the errors, which
    # count noise only, understate the uncertainty by sqrt(chi2) (see lines.measure): the
    # tolerance scales with it
    chi2 = _values(slow, "fit_chi2")
    inflate = np.where(np.isfinite(chi2), np.sqrt(np.maximum(chi2, 1.0)), 1.0)
    fit_err = _values(slow, "ew_fit_err") * inflate
    other = np.abs(_values(slow, "ew_fit") - _values(fast, "ew_fit")) > EW_TOL * fit_err
    # another optimum: the batched fit must be at least as good a fit
    assert np.all(_values(fast, "fit_chi2")[other] <= _values(slow, "fit_chi2")[other] * (1 + 1e-9))
    same = ~other
    for col, err in (("ew", "ew_err"), ("ew_int", "ew_int_err"), ("ew_fit", "ew_fit_err")):
        d = np.abs(_values(slow, col) - _values(fast, col))[same]
        e = (_values(slow, err) * inflate)[same]
        ok = (d <= EW_TOL * e) | (np.isnan(d) & np.isnan(_values(slow, col)[same]))
        assert ok.all(), (col, np.nanmax(d / e))
    for col in ("ew_err", "ew_int_err", "ew_fit_err", "ew_err_cayrel"):
        a, b = _values(slow, col)[same], _values(fast, col)[same]
        both = np.isfinite(a) & np.isfinite(b)
        assert np.array_equal(np.isfinite(a), np.isfinite(b)), col
        assert np.all(np.abs(a - b)[both] <= ERR_TOL * np.abs(a[both])), col
    for col in ("wave_obs", "fwhm"):
        a, b = _values(slow, col)[same], _values(fast, col)[same]
        scale = _values(slow, "fwhm")[same]
        both = np.isfinite(a) & np.isfinite(scale)
        assert np.all(np.abs(a - b)[both] <= PLACE_TOL * scale[both]), col
    return int(other.sum())


def test_batched_fits_match_one_by_one_on_the_demo_night():
    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    other = 0
    compared = 0
    for row in truth:
        if row["broken"]:
            continue
        spec = prepare(read(DEMO / row["file"]))
        rv = row["rv_topo"] * u.km / u.s   # the velocity the demo night planted (the pipeline measures it)
        slow = lines.measure(spec, rv=rv, _batched=False)
        fast = lines.measure(spec, rv=rv, exact_fits=True)
        other += _compare(slow, fast)
        compared += int(np.isfinite(_values(slow, "ew_fit")).sum())
    assert compared > 500
    assert other <= 1   # measured: 0 (1, HeII 6560 in trf3_11, before the Voigt batch's direct starts)


def kurucz_spectrum(kurucz_sun, true_continuum):
    """The Kurucz solar model (rms-solar; R 2000, vacuum wavelengths) over 3700-8800 A at S/N 500,
    normalised by its true continuum or by ``prepare``'s fitted one."""
    w, f, c = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    w, f, c = w[keep], f[keep], c[keep]
    if true_continuum:
        return make_spectrum(w, f / c, sigma=f / c / 500.0, medium="vacuum", resolving_power=2000.0)
    return prepare(make_spectrum(w, f, sigma=f / 500.0, medium="vacuum", resolving_power=2000.0, normalized=False))


@pytest.mark.parametrize("true_continuum", [False, True])
def test_batched_fits_match_one_by_one_on_the_kurucz_sun(kurucz_sun, true_continuum):
    spec = kurucz_spectrum(kurucz_sun, true_continuum)
    slow = lines.measure(spec, _batched=False)
    fast = lines.measure(spec, exact_fits=True)
    assert (slow["profile"] == "voigt").sum() >= 5   # the Voigt path is exercised (Balmer, Ca II, Mg b)
    assert _compare(slow, fast) == 0


def test_batched_fits_match_one_by_one_on_miles_stars(miles):
    # observed stars of the MILES library (Sanchez-Blazquez et al. 2006; at rest, air, 2.5 A FWHM:
    # Falcon-Barroso et al. 2011), every 45th of the catalogue: O to M, dwarfs to supergiants
    catalog = Table.read(miles / "catalog.csv", format="ascii.csv")
    other = compared = 0
    for row in catalog[::45]:
        spec = prepare(read(miles / row["file"], medium="air", resolving_power=5500.0 / 2.5))
        slow = lines.measure(spec, rv=0 * u.km / u.s, _batched=False)
        fast = lines.measure(spec, rv=0 * u.km / u.s, exact_fits=True)
        other += _compare(slow, fast)
        compared += int(np.isfinite(_values(slow, "ew_fit")).sum())
    assert compared > 300
    assert other <= 0.01 * compared   # measured: 0 of 1771


def test_batched_voigt_converges_where_it_stops():
    # a single Voigt line with damping wings: both fits reach the same optimum
    from scipy.special import voigt_profile

    from specan.lines import batchfit
    from specan.lines.data import LineData
    from specan.lines.profiles import fit_profile

    wave = np.arange(4800.0, 4920.0, 0.5)
    rng = np.random.default_rng(7)
    flux = 1.0 - 4.0 * voigt_profile(wave - 4861.3, 1.0, 1.2) + rng.normal(0, 0.005, wave.size)
    data = LineData(make_spectrum(wave, flux, sigma=0.005, resolving_power=2000.0))
    lo, hi = 10, wave.size - 10
    cont = np.ones(hi - lo + 1)
    args = (data, lo, hi, cont, np.array([4861.3]), "voigt", 1.0, 1.03, 1.0, None, True)
    slow, fast = fit_profile(*args), batchfit.fit_batched_voigt(*args)
    assert fast["ew"] == pytest.approx(4.0, abs=5 * fast["ew_err"])
    assert abs(fast["ew"] - slow["ew"]) < EW_TOL * slow["ew_err"]
    assert fast["chi2"] <= slow["chi2"] * (1 + 1e-9)


def test_vectorised_windows_equal_the_walks():
    # line_windows walks every line at once; each window must be the one line_window walks
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import line_start
    from specan.lines.windows import line_window, line_windows

    compared = 0
    for name, data, listed, targets, features in demo_line_setups(8):
        # on the spectrum and on a copy with a ripple (other plateaus, other cuts)
        for d in (data, data.divided(0.97 + 0.03 * np.cos(data.wave / 50.0))):
            starts = [line_start(d, features, targets, i, DETECT_SIGMA) for i in range(targets.pred.size)]
            # every line together (hydrogen walks among the others), and the other lines alone (measure's
            # second pass: no walk on the wide smoothing)
            for chosen in (np.ones(targets.pred.size, bool), ~targets.hydrogen):
                idx = [i for i, st in enumerate(starts) if st is not None and chosen[i]]
                batch = line_windows(d, [starts[i] for i in idx], targets.fwhm[idx], targets.hydrogen[idx])
                for i, window in zip(idx, batch):
                    st = starts[i]
                    one = line_window(d, st.ic, st.centre, st.sign, targets.fwhm[i], bool(targets.hydrogen[i]),
                                      st.matched)
                    assert tuple(one) == tuple(window), (name, listed.rows["id"][i])
                    compared += 1
    assert compared > 2000


def test_hydrogen_windows_alone_equal_the_walks():
    # the hydrogen lines are walked on their own (measure's first pass), with their own look-ahead
    # (specan/lines/windows.py, _walks, WIDE_WALK_AHEAD): each window must be the one line_window walks
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import line_start
    from specan.lines.windows import line_window, line_windows

    compared = 0
    for name, data, listed, targets, features in demo_line_setups(12):
        for d in (data, data.divided(0.97 + 0.03 * np.cos(data.wave / 50.0))):
            idx = [i for i in np.flatnonzero(targets.hydrogen)
                   if line_start(d, features, targets, i, DETECT_SIGMA) is not None]
            starts = [line_start(d, features, targets, i, DETECT_SIGMA) for i in idx]
            series = targets.pred[targets.hydrogen]
            batch = line_windows(d, starts, targets.fwhm[idx], targets.hydrogen[idx], series)
            for i, st, window in zip(idx, starts, batch):
                one = line_window(d, st.ic, st.centre, st.sign, targets.fwhm[i], True, st.matched, series)
                assert tuple(one) == tuple(window), (name, listed.rows["id"][i])
                compared += 1
    assert compared > 150


def test_vectorised_line_starts_equal_one_by_one():
    # line_starts: matching, nearest pixel, saturated cores, masked cores, sign and detection
    import copy

    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import line_start, line_starts

    masked = compared = 0
    for name, data, listed, targets, features in demo_line_setups(6):
        holed = copy.copy(data)
        holed.good = data.good.copy()
        for c in targets.pred[::7]:   # holes over the cores of some lines
            holed.good[np.abs(data.wave - c) < 3.0] = False
        for d in (data, holed):
            which = np.arange(targets.pred.size)
            batch = line_starts(d, features, targets, which, DETECT_SIGMA)
            for i, st in zip(which, batch):
                one = line_start(d, features, targets, i, DETECT_SIGMA)
                assert (one is None) == (st is None)
                if one is None:
                    masked += 1
                else:
                    assert tuple(one) == tuple(st)
                compared += 1
    assert masked > 10 and compared > 1000


def test_vectorised_narrowest_line_fits_equal_one_by_one():
    # resolution.caruana_fwhms (every parabola at once) against _caruana_fwhm (one np.polyfit each),
    # at every pixel of demo spectra: the same lines kept, the widths to rounding (measured 4.7e-11)
    from specan import resolution

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    compared = 0
    for row in truth[~truth["broken"]][:4]:
        a = resolution.normalised_arrays(prepare(read(DEMO / row["file"])), dersnr=True)
        peaks = np.arange(a.wave.size)
        one = np.array([np.nan if f is None else f for f in (resolution._caruana_fwhm(a.wave, a.flux, p)
                                                            for p in peaks)])
        many = resolution.caruana_fwhms(a.wave, a.flux, peaks)
        assert np.array_equal(np.isfinite(one), np.isfinite(many))
        both = np.isfinite(one)
        assert np.all(np.abs(one[both] - many[both]) <= 1e-9 * one[both])
        compared += int(both.sum())
    assert compared > 1000


def test_dersnr_from_arrays_equals_specutils():
    # resolution.dersnr_sigma on plain arrays: specutils' snr_derived (Stoehr et al. 2008) to the bit
    import warnings

    from specutils import Spectrum
    from specutils.analysis import snr_derived

    from specan import resolution

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:4]:
        a = resolution.normalised_arrays(prepare(read(DEMO / row["file"])))
        packed = Spectrum(spectral_axis=a.wave[a.good] * u.AA, flux=a.flux[a.good] * u.dimensionless_unscaled)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            snr = float(snr_derived(packed).value)
        expected = max(float(np.median(a.flux[a.good])) / snr, 1e-5)
        sigma = resolution.dersnr_sigma(a.flux, a.good)
        assert np.all(sigma[a.good] == expected) and np.all(np.isinf(sigma[~a.good]))


def test_vectorised_plans_equal_one_by_one():
    # plan_lines (continua, integrals, depths of all lines as array operations) against plan_line
    from dataclasses import fields

    from specan.lines.data import DETECT_SIGMA
    from specan.lines.components import window_features
    from specan.lines.measurement import LineResult, plan_line

    compared = hydrogen_features = 0
    for name, data, targets, features, which, starts, windows, many in demo_line_plans(6, "auto"):
        for i in which:
            one = plan_line(data, features, targets, i, "auto", DETECT_SIGMA, starts[i], windows.get(i))
            two = many[i]
            assert (one.window is None) == (two.window is None)
            if one.window is None:
                assert two.result.method == "masked"
                continue
            for name in ("fw", "hydrogen", "ic", "sign", "detected", "max_shift", "voigt", "wants_fit"):
                assert getattr(one, name) == getattr(two, name), name
            assert tuple(one.window) == tuple(two.window)
            np.testing.assert_array_equal(one.centres, two.centres)
            assert (one.skip is None) == (two.skip is None)
            if one.skip is not None:
                np.testing.assert_array_equal(one.skip, two.skip)
            # the features a hydrogen line's blends are taken from, kept with its plan: window_features'
            assert (two.in_win is not None) == two.hydrogen
            if two.hydrogen:
                found = window_features(data, features, two.window, two.sign)
                assert two.in_win.dtype == found.dtype and two.in_win.tobytes() == found.tobytes()
                hydrogen_features += found.size
            np.testing.assert_allclose(two.cont, one.cont, rtol=1e-14, atol=1e-15)
            for name in ("wave_obs", "significance", "window_min", "window_max", "emission", "method"):
                assert getattr(one.result, name) == getattr(two.result, name), name
            for name in ("ew_int", "ew_int_err", "depth"):
                assert getattr(two.result, name) == pytest.approx(getattr(one.result, name), rel=1e-12, abs=1e-14)
            # every other field as plan_line's keywords leave it
            for f in fields(LineResult):
                if f.name not in ("ew_int", "ew_int_err", "depth"):
                    a, b = getattr(one.result, f.name), getattr(two.result, f.name)
                    assert a == b or (a != a and b != b), f.name
            compared += 1
    assert compared > 500 and hydrogen_features > 20


def test_block_medians_equal_one_median_per_block():
    # specan.noise._block_power reads every block's median off one sorted array: np.median's values
    from specan import noise

    rng = np.random.default_rng(1)
    for trial in range(300):
        n = int(rng.integers(50, 5000))
        y = rng.normal(size=n) * rng.uniform(0.1, 10)
        valid = rng.uniform(size=n) > rng.uniform(0, 0.9)
        if trial % 5 == 0:
            valid[: n // 2] = False
        block = int(rng.choice([16, 64, 256]))
        centres, power = noise._block_power(y, valid, block)
        edges = np.linspace(0, n, max(n // block, 1) + 1).astype(int)
        for b in range(edges.size - 1):
            v = y[edges[b]:edges[b + 1]][valid[edges[b]:edges[b + 1]]]
            expected = np.median(v * v) / noise._CHI2_1_MEDIAN if v.size >= block // 4 else np.nan
            assert power[b] == expected or (np.isnan(power[b]) and np.isnan(expected))
        np.testing.assert_array_equal(centres, 0.5 * (edges[:-1] + edges[1:]) - 0.5)


def test_window_noises_equal_one_median_per_window():
    # window_noises (one sort of every window's noise) against window_noise: the same values
    from specan.lines.data import LineData
    from specan.lines.measurement import window_noise, window_noises
    from specan.lines.windows import Window

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    data = LineData(prepare(read(DEMO / truth[~truth["broken"]]["file"][0])))
    rng = np.random.default_rng(3)
    lo = rng.integers(0, data.wave.size - 2, 500)
    hi = np.minimum(lo + rng.integers(0, 120, 500), data.wave.size - 1)
    holed = data.sigma.copy()
    holed[rng.uniform(size=holed.size) < 0.2] = np.inf   # masked pixels: no noise known there
    data.sigma = holed
    windows = [Window(int(a), int(b), (1.0, 1.0), False) for a, b in zip(lo, hi)]
    many = window_noises(data, windows)
    one = np.array([window_noise(data, w) for w in windows])
    assert np.array_equal(one, many, equal_nan=True)


def test_cached_gaussian_kernels_equal_scipys_filter():
    # the matched filter correlates with kernels made once per width (specan/lines/data.py); they
    # must give scipy.ndimage.gaussian_filter1d's values to the bit, at the ladder's widths and others
    from scipy.ndimage import gaussian_filter1d

    from specan.lines import data as line_data

    rng = np.random.default_rng(5)
    values = rng.normal(size=(3, 700))
    widths = [float(np.exp(level * np.log(1.05))) for level in range(-20, 70, 3)] + [0.31, 2.5, 7.77]
    for s in widths:
        for w in (s, s / np.sqrt(2.0)):
            assert np.array_equal(line_data._gaussian_filter(values, w, axis=1),
                                  gaussian_filter1d(values, w, mode="nearest", axis=1)), w
            assert np.array_equal(line_data._gaussian_filter(values[0], w),
                                  gaussian_filter1d(values[0], w, mode="nearest")), w


def test_voigt_and_derivatives_against_scipy_and_finite_differences():
    # the profile and analytic Jacobian both fit paths use (specan/lines/profiles.py): the profile
    # against scipy.special.voigt_profile, the derivatives against central differences of it;
    # the batched layout (out=, at=) writes the same numbers at the given points and nothing else
    from scipy.special import voigt_profile

    from specan.lines.profiles import voigt_and_derivatives

    rng = np.random.default_rng(11)
    dx = rng.uniform(-60.0, 60.0, 2000)
    sigma = rng.uniform(0.3, 5.0, 2000)
    gamma = rng.uniform(0.01, 8.0, 2000)
    v, d_x, d_s, d_g = voigt_and_derivatives(dx, sigma, gamma)
    np.testing.assert_allclose(v, voigt_profile(dx, sigma, gamma), rtol=1e-12, atol=1e-15)
    h = 1e-5
    for analytic, (a, b) in ((d_x, ((dx + h, sigma, gamma), (dx - h, sigma, gamma))),
                             (d_s, ((dx, sigma + h, gamma), (dx, sigma - h, gamma))),
                             (d_g, ((dx, sigma, gamma + h), (dx, sigma, gamma - h)))):
        numerical = (voigt_profile(*a) - voigt_profile(*b)) / (2 * h)
        np.testing.assert_allclose(analytic, numerical, rtol=1e-5, atol=1e-9 * np.abs(numerical).max())
    at = np.arange(0, 4000, 2)
    out = voigt_and_derivatives(dx, sigma, gamma, out=np.zeros((4, 4000)), at=at)
    for mine, plain in zip(out[:, at], (v, d_x, d_s, d_g)):
        assert np.array_equal(mine, plain)
    assert not out[:, 1::2].any()


def test_wide_voigt_profile_against_scipy():
    # profiles.voigt_wide (the hydrogen model's profile over the whole spectrum: far points from the
    # Faddeeva function's asymptotic series) against scipy.special.voigt_profile: Gaussian widths
    # 0.3-5 A, damping 1e-4 to 30 times that, over a 3600 A spectrum of 4000 px. Measured: at most
    # 1.7e-15 of the profile's peak apart (at gamma 26 sigma, where the whole line is in the series).
    from scipy.special import voigt_profile

    from specan.lines.profiles import FAR_Z, voigt_wide

    rng = np.random.default_rng(12)
    x = np.linspace(3700.0, 7300.0, 4000)
    far_points = 0
    for _ in range(500):
        sigma = rng.uniform(0.3, 5.0)
        gamma = sigma * 10 ** rng.uniform(-4.0, 1.5)
        dx = x - rng.uniform(3700.0, 7300.0)
        mine, scipys = voigt_wide(dx, sigma, gamma), voigt_profile(dx, sigma, gamma)
        assert np.max(np.abs(mine - scipys)) <= 3e-15 * scipys.max()
        far = dx * dx + gamma * gamma >= (FAR_Z / (1.0 / (sigma * np.sqrt(2.0)))) ** 2   # as voigt_wide
        assert np.array_equal(mine[~far], scipys[~far])   # the near points are scipy's own
        far_points += far.sum()
    assert far_points > 0.8 * 500 * x.size   # most of the points took the series


def test_one_component_gaussian_solves_are_lapacks():
    # batchfit._gauss_group solves the normal equations of one-component fits by division: LAPACK's
    # solve and inverse of 1 x 1 systems (np.linalg) give those very bits (measured: all 200,000)
    rng = np.random.default_rng(13)
    ata = rng.lognormal(0.0, 3.0, (200000, 1, 1)) + 1e-12
    atb = rng.normal(0.0, 1.0, (200000, 1, 1)) * rng.lognormal(0.0, 3.0, (200000, 1, 1))
    assert np.array_equal(np.linalg.solve(ata, atb), atb / ata)
    assert np.array_equal(np.linalg.inv(ata), 1.0 / ata)
    # batchfit._solve_normal (the quick design's width step and its score test): the same
    from specan.lines.batchfit import _solve_normal

    assert _solve_normal(ata, atb).tobytes() == np.linalg.solve(ata, atb).tobytes()
    with pytest.raises(np.linalg.LinAlgError):
        _solve_normal(np.zeros((2, 1, 1)), np.ones((2, 1, 1)))


def test_best_grid_point_as_solving_in_turn():
    # profiles.best_grid_point skips the constrained (NNLS) solves of grid points that a later point
    # of the right sign overrules: the same choice as solving the five best points in turn
    from scipy.optimize import nnls

    from specan.lines.profiles import best_grid_point

    def in_turn(a, b, w, chi2, sign):
        best = wbest = cbest = None
        for m in np.argsort(chi2)[:5]:
            if np.all(sign * w[m] >= 0):
                return m, w[m], chi2[m]
            wn, rn = nnls((sign * a[m]).T, b * sign)
            if best is None or rn**2 < cbest:
                best, wbest, cbest = m, sign * wn, rn**2
        return best, wbest, cbest

    rng = np.random.default_rng(14)
    constrained = 0
    for _ in range(400):
        grid, ncomp, npix = int(rng.integers(3, 30)), int(rng.integers(1, 4)), int(rng.integers(8, 30))
        a = rng.normal(0.0, 1.0, (grid, ncomp, npix))
        b = rng.normal(0.0, 1.0, npix)
        w = rng.normal(0.3, 1.0, (grid, ncomp))
        chi2 = rng.uniform(0.0, 10.0, grid)
        sign = 1.0 if rng.uniform() < 0.8 else -1.0
        mine, theirs = best_grid_point(a, b, w, chi2, sign), in_turn(a, b, w, chi2, sign)
        assert mine[0] == theirs[0] and np.array_equal(mine[1], theirs[1]) and mine[2] == theirs[2]
        constrained += not np.any(np.all(sign * w[np.argsort(chi2)[:5]] >= 0, axis=1))
    assert constrained > 20   # the constrained path is exercised too


def test_voigt_model_of_some_problems_as_made_from_them():
    # _VoigtModel.rows picks the remaining problems' points out of the whole batch's model: the same
    # points, residuals and Jacobian as a model made of those problems alone
    from specan.lines.batchfit import _VoigtModel

    rng = np.random.default_rng(15)
    nb, ncomp, npix = 9, 3, 40
    x = np.sort(rng.uniform(4000.0, 4100.0, (nb, npix)), axis=1)
    y = 1.0 - rng.uniform(0.0, 0.3, (nb, npix))
    cont = rng.uniform(0.9, 1.1, (nb, npix))
    wts = np.where(rng.uniform(size=(nb, npix)) < 0.2, 0.0, rng.uniform(10.0, 100.0, (nb, npix)))
    centres = rng.uniform(4020.0, 4080.0, (nb, ncomp))
    components = np.arange(ncomp)[None, :] < rng.integers(1, ncomp + 1, nb)[:, None]
    p = np.column_stack([rng.normal(0.0, 0.1, nb), rng.uniform(0.5, 2.0, nb), rng.uniform(0.0, 1.0, nb),
                         rng.uniform(0.0, 2.0, (nb, ncomp)) * components])
    whole = _VoigtModel(x, y, cont, wts, centres, components)
    for rows in (np.array([0, 3, 4, 8]), np.array([5]), np.arange(nb)):
        picked, made = whole.rows(rows), _VoigtModel(x[rows], y[rows], cont[rows], wts[rows], centres[rows],
                                                      components[rows])
        assert np.array_equal(picked.at, made.at)
        for a, b in zip(picked(p[rows]), made(p[rows])):
            assert np.array_equal(a, b)


def test_windows_whatever_the_walks_look_ahead(monkeypatch):
    # the vectorised walks test WALK_AHEAD steps first and walk the ones still going again in full:
    # the same windows as testing every walk over its whole reach, looking ahead 1, 3 or 10 steps
    # (most walks then walked again) or the default. (The numpy walks: the compiled ones, which
    # tests/test_lines_walkkernel.py holds to them, walk each line to its end and look nowhere ahead.)
    from specan.lines import compiled, windows
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import line_starts

    monkeypatch.setattr(compiled, "COMPILED", False)
    default = windows.WALK_AHEAD
    compared = 0
    for name, data, listed, targets, features in demo_line_setups(4):
        starts = line_starts(data, features, targets, np.arange(targets.pred.size), DETECT_SIGMA)
        idx = [i for i, st in enumerate(starts) if st is not None]
        args = (data, [starts[i] for i in idx], targets.fwhm[idx], targets.hydrogen[idx])
        monkeypatch.setattr(windows, "WALK_AHEAD", 10**9)
        whole = windows.line_windows(*args)
        for ahead in (1, 3, 10, default):
            monkeypatch.setattr(windows, "WALK_AHEAD", ahead)
            assert windows.line_windows(*args) == whole, (name, ahead)
        compared += len(whole)
    assert compared > 400


def test_flux_extrema_as_find_peaks_with_prominence():
    # data._candidates measures the prominence of the flux extrema only where the matched filter is
    # significant: the same candidates as scipy's find_peaks(..., prominence=) over all of them, then
    # kept where significant (the demo spectra, absorption and emission, two thresholds)
    from scipy.signal import find_peaks

    from specan.lines.data import DETECT_SIGMA, _candidates

    compared = 0
    for name, data, listed, targets, features in demo_line_setups(6):
        noise = float(np.median(data.sigma[data.good]))
        for sign in (1.0, -1.0):
            s = sign * np.where(data.good, data.signif, 0.0)
            for detect in (DETECT_SIGMA, 1.0):
                mine = _candidates(data, s, sign, detect, noise)
                peaks, _ = find_peaks(s, height=detect)
                fwp = np.interp(peaks, np.arange(s.size), data.line_fwhm) if peaks.size else peaks
                raw, _ = find_peaks(np.where(data.good, -sign * data.flux, -np.inf), prominence=3.0 * noise)
                raw = raw[s[raw] >= detect]
                if raw.size and peaks.size:
                    near = np.abs(data.wave[raw][:, None] - data.wave[peaks][None, :]) < 0.5 * fwp[None, :]
                    raw = raw[~near.any(axis=1)]
                assert np.array_equal(mine, np.concatenate([peaks, raw]).astype(int)), name
                compared += mine.size
    assert compared > 500


def test_lean_trust_region_fit_equals_scipys():
    # profiles.fit_profile_lean (leastsq.trf_bounded: scipy's trust-region reflective algorithm written
    # for small problems, which the batched path's ill-determined and unconverged Voigt fits go to)
    # against profiles.fit_profile (scipy's least_squares): every Voigt fit of demo spectra, the
    # hydrogen lines with their free width and every other detected line forced to a Voigt profile
    # (flat valleys, bounds, blends). Measured: the same fit to the last bit in all of them.
    from specan.lines.profiles import fit_profile, fit_profile_lean

    compared = failed = 0
    for name, data, targets, features, which, starts, windows, plans in demo_line_plans(5, "voigt"):
        for plan in plans.values():
            if not plan.wants_fit:
                continue
            args = (data, plan.window.lo, plan.window.hi, plan.cont, plan.centres, "voigt", plan.max_shift,
                    plan.fw / lines.GAUSS_FWHM, plan.sign, plan.skip, plan.hydrogen)
            slow, lean = fit_profile(*args), fit_profile_lean(*args)
            assert (slow is None) == (lean is None), name
            if slow is None:
                failed += 1
                continue
            assert slow == lean, (name, slow, lean)
            compared += 1
    assert compared > 200


def test_half_widths_equal_one_by_one():
    # half_widths (every window's half-depth crossings at once) against half_width, on windows of
    # every size around every pixel of a demo spectrum, absorption and emission, with masked
    # (NaN) pixels: the same values to the bit
    from specan.lines.data import LineData
    from specan.lines.measurement import half_width, half_widths

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    data = LineData(prepare(read(DEMO / truth[~truth["broken"]]["file"][0])))
    rng = np.random.default_rng(9)
    n = data.wave.size
    ic = rng.integers(0, n, 3000)
    lo = np.maximum(ic - rng.integers(0, 40, ic.size), 0)
    hi = np.minimum(ic + rng.integers(0, 40, ic.size), n - 1)
    sign = np.where(rng.uniform(size=ic.size) < 0.2, -1.0, 1.0)
    for flux in (data.flux, np.where(rng.uniform(size=n) < 0.05, np.nan, data.flux)):
        data.flux = flux
        many = half_widths(data, ic, lo, hi, sign)
        one = np.array([half_width(data, *args) for args in zip(ic, lo, hi, sign)])
        assert np.array_equal(one, many, equal_nan=True)
        assert np.isfinite(one).sum() > 300


def test_wide_voigt_profiles_of_several_lines_in_one_call():
    # hydrogen.hydrogen_model evaluates every hydrogen line's profile in one voigt_wide call (a line a
    # row, sigma and gamma a column; also given one per point): the same bits as one call per line,
    # and within voigt_wide's tolerance of scipy.special.voigt_profile (the outside reference) at each
    # line's own widths
    from scipy.special import voigt_profile

    from specan.lines.profiles import voigt_wide

    rng = np.random.default_rng(21)
    x = np.linspace(3700.0, 7300.0, 4000)
    for _ in range(20):
        nl = int(rng.integers(1, 12))
        sigma = rng.uniform(0.3, 5.0, nl)
        gamma = sigma * 10 ** rng.uniform(-4.0, 1.5, nl)
        centre = rng.uniform(3700.0, 7300.0, nl)
        together = voigt_wide((x[None, :] - centre[:, None]).ravel(), np.repeat(sigma, x.size),
                              np.repeat(gamma, x.size)).reshape(nl, x.size)
        assert np.array_equal(voigt_wide(x[None, :] - centre[:, None], sigma[:, None], gamma[:, None]), together)
        for k in range(nl):
            alone = voigt_wide(x - centre[k], sigma[k], gamma[k])
            assert np.array_equal(together[k], alone)
            scipys = voigt_profile(x - centre[k], sigma[k], gamma[k])
            assert np.max(np.abs(together[k] - scipys)) <= 3e-15 * scipys.max()


def test_features_as_found_one_by_one():
    # data.find_features gathers each sign's features as arrays and orders them by a lexical sort:
    # the same arrays as made feature by feature and ordered as a sort of the tuples (position,
    # significance, depth, emission), on the demo night's spectra and on their hydrogen-divided copies
    from specan.lines.data import (
        DETECT_SIGMA,
        MIN_DEPTH,
        _candidates,
        _refined_positions,
        _standing_out,
        find_features,
    )

    def one_by_one(data):
        out = []
        noise = float(np.median(data.sigma[data.good]))
        for sign in (1.0, -1.0):
            s = sign * np.where(data.good, data.signif, 0.0)
            kept = _standing_out(data, _candidates(data, s, sign, DETECT_SIGMA, noise), sign, MIN_DEPTH)
            for pos, p in zip(_refined_positions(data, s, kept).tolist(), kept):
                out.append((pos, sign * float(s[p]), 1.0 - float(data.smooth[p]), sign < 0))
        out.sort()
        return [np.array(v) for v in zip(*out)]

    count = 0
    for name, data, listed, targets, features in demo_line_setups(6):
        for arrays in (data, data.divided(np.linspace(0.9, 1.0, data.wave.size))):
            found = find_features(arrays, DETECT_SIGMA, MIN_DEPTH)
            for mine, theirs in zip(found, one_by_one(arrays)):
                assert mine.dtype == theirs.dtype and np.array_equal(mine, theirs)
            count += found.position.size
    assert count > 500
