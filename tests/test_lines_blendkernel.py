"""The metal lines of a hydrogen line's window chosen, its crests and its dips, by numba kernels
(specan/lines/blendkernel.py), against the numpy code they stand in for (specan/lines/hydrogen_blends.py:
``_metal_candidates``, ``blanketing``, ``_dips``; the fallback, SPECAN_COMPILED=0 or no numba), and
their interpolation against np.interp.

Stated tolerance: none; the same positions, owners, sums and flags to the bit (the kernels make the same
comparisons and arithmetic on the same numbers, in the same order). Measured on the bench's 40 spectra,
the dense spectrum and the demo night (benchmarks/bench_lines.py --against): the same tables to the bit
as before the kernels.
"""


import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from specan import prepare, read

pytest.importorskip("numba", reason="numba not installed: the numpy code alone runs")

from specan.lines import blendkernel, compiled, hydrogen_blends  # noqa: E402

from kernel_pairs import DEMO, demo_line_inputs, same_bits, with_and_without  # noqa: E402


def _hydrogen_plans(count):
    """(file, data, features, targets, plans) of the hydrogen lines of the first ``count`` readable demo
    spectra, fits made, as measure_lines hands them to less_blends."""
    from specan.lines.batchfit import fit_planned
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import line_starts, line_targets, plan_lines
    from specan.lines.windows import line_windows

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:count]:
        data = LineData(prepare(read(DEMO / row["file"])))
        listed = lines_in_range(data, None, ("atomic",), row["rv_topo"] * u.km / u.s)
        targets = line_targets(data, listed, None)
        features = find_features(data, DETECT_SIGMA, MIN_DEPTH)
        which = np.flatnonzero(targets.hydrogen)
        starts = dict(zip(which.tolist(), line_starts(data, features, targets, which, DETECT_SIGMA)))
        found = [i for i, st in starts.items() if st is not None]
        windows = dict(zip(found, line_windows(data, [starts[i] for i in found], targets.fwhm[found],
                                               targets.hydrogen[found], targets.pred[targets.hydrogen])))
        plans = plan_lines(data, features, targets, list(starts), "auto", starts, windows)
        wanted = [p for p in plans.values() if p.wants_fit]
        for plan, fit in zip(wanted, fit_planned(data, wanted)):
            plan.fit = fit
        yield row["file"], data, features, targets, plans




def test_compiled_candidates_are_numpys(monkeypatch):
    # every fitted hydrogen line of the demo spectra, with its window's features and with made-up ones
    # (on listed lines, on the hydrogen centres, in the core, none), and the lines' list without its
    # excitation energies (unknown: every line taken)
    rng = np.random.default_rng(11)
    chosen = 0
    for name, data, features, targets, plans in _hydrogen_plans(12):
        for i, plan in plans.items():
            if plan.fit is None or plan.window is None:
                continue
            lo, hi = data.wave[plan.window.lo], data.wave[plan.window.hi]
            inside = targets.pred[(targets.pred >= lo) & (targets.pred <= hi)]
            made_up = np.sort(np.concatenate([rng.uniform(lo, hi, 6), inside[:3] + rng.normal(0, 0.3, inside[:3].size),
                                              plan.centres, [plan.fit["centre"] + 0.5 * plan.fw]]))
            no_ep = targets._replace(ep_low=None)
            for found in (plan.in_win if plan.in_win is not None else np.zeros(0), made_up, np.zeros(0)):
                for t in (targets, no_ep):
                    made, reference = with_and_without(monkeypatch, compiled.blends, blendkernel, hydrogen_blends._metal_candidates, data, t, plan,
                                            plan.fit, found)
                    assert same_bits(made[0], reference[0]) and same_bits(made[1], reference[1]), (name, i)
                    chosen += made[0].size
    assert chosen > 500


def test_hydrogen_lines_the_same(monkeypatch):
    # the hydrogen lines' results (less_blends among the steps: method, ew, its error, the listed lines
    # inside) of the demo spectra, every field to the bit
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.measurement import measure_lines

    less = 0
    for k, (data, _, features, targets) in enumerate(demo_line_inputs(12)):
        made, reference = with_and_without(monkeypatch, compiled.blends, blendkernel, measure_lines, data, features, targets, np.flatnonzero(targets.hydrogen),
                                "auto", DETECT_SIGMA)
        assert made.keys() == reference.keys()
        for i, a in made.items():
            b = reference[i]
            for key in vars(a):
                x, y = getattr(a, key), getattr(b, key)
                same = (np.float64(x).tobytes() == np.float64(y).tobytes()) if isinstance(x, float) else \
                    (x == y if not isinstance(x, dict) else x.keys() == y.keys() and all(
                        np.float64(x[k]).tobytes() == np.float64(y[k]).tobytes() if isinstance(x[k], float) else x[k] == y[k]
                        for k in x))
                assert same, (k, i, key)
            less += a.method == "integration_less_blends"
    assert less > 10


def test_interp_is_numpys():
    # the kernels' interpolation against np.interp itself: points between, at and beyond the nodes, the
    # last node, NaN, flat stretches, one node, and (fused arithmetic would show here) long mantissas
    rng = np.random.default_rng(4)
    for trial in range(300):
        n = int(rng.integers(1, 60))
        xp = np.cumsum(rng.uniform(0.1, 2.0, n)) + 3800.0
        fp = rng.normal(size=n)
        if n > 3:
            fp[1:3] = fp[0]
        keys = np.concatenate([rng.uniform(xp[0] - 3.0, xp[-1] + 3.0, 40), xp, [xp[0], xp[-1], np.nan]])
        for key in keys:
            mine, numpys = blendkernel._interp(key, xp, fp), np.interp(key, xp, fp)
            assert np.float64(mine).tobytes() == np.float64(numpys).tobytes(), (trial, key)


def test_crests_and_dips_are_numpys(monkeypatch):
    # blanketing (the absorption under the crests) and _dips (the listed lines the spectrum shows) of every
    # fitted hydrogen line of the demo spectra, at its window's listed lines and at made-up positions
    # (ends, outside, on the core), with its own centre and with one outside its window
    rng = np.random.default_rng(6)
    tested = 0
    for name, data, features, targets, plans in _hydrogen_plans(12):
        for i, plan in plans.items():
            if plan.fit is None or plan.window is None or plan.window.hi - plan.window.lo < 1:
                continue
            fit, window = plan.fit, plan.window
            lo, hi = data.wave[window.lo], data.wave[window.hi]
            for centre in (fit["centre"], lo - 5.0, 0.5 * (lo + hi)):
                made, reference = with_and_without(monkeypatch, compiled.blends, blendkernel, hydrogen_blends.blanketing, data, window, plan.cont, centre)
                assert np.float64(made).tobytes() == np.float64(reference).tobytes(), (name, i)
            inside = targets.pred[(targets.pred >= lo) & (targets.pred <= hi)]
            positions = np.concatenate([inside, rng.uniform(lo - 2.0, hi + 2.0, 8), [lo, hi, fit["centre"]]])
            made, reference = with_and_without(monkeypatch, compiled.blends, blendkernel, hydrogen_blends._dips, data, window, plan.cont, fit, plan.fw,
                                    positions)
            assert made.dtype == reference.dtype and np.array_equal(made, reference), (name, i)
            tested += 1
    assert tested > 40
