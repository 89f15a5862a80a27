"""The metal lines of a hydrogen line's window chosen by a numba kernel (specan/lines/blendkernel.py)
against the numpy code it stands in for (specan/lines/hydrogen_blends.py, ``_metal_candidates``: the
fallback, SPECAN_COMPILED=0 or no numba).

Stated tolerance: none; the same positions and owners, in the same order, to the bit (the kernel makes
the same comparisons on the same numbers). Measured on the bench's 40 spectra, the dense spectrum and
the demo night (benchmarks/bench_lines.py --against): the same tables to the bit as before the kernel.
"""

import copy
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from specan import prepare, read

pytest.importorskip("numba", reason="numba not installed: the numpy code alone runs")

from specan.lines import blendkernel, compiled, hydrogen_blends  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "sample_spectra"


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


def _both(monkeypatch, func, *args):
    monkeypatch.setattr(compiled, "COMPILED", True)
    assert compiled.blends() is blendkernel
    made = func(*args)
    monkeypatch.setattr(compiled, "COMPILED", False)
    assert compiled.blends() is None
    reference = func(*args)
    monkeypatch.setattr(compiled, "COMPILED", True)
    return made, reference


def _same(a, b):
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


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
                    made, reference = _both(monkeypatch, hydrogen_blends._metal_candidates, data, t, plan,
                                            plan.fit, found)
                    assert _same(made[0], reference[0]) and _same(made[1], reference[1]), (name, i)
                    chosen += made[0].size
    assert chosen > 500


def test_hydrogen_lines_the_same(monkeypatch):
    # the hydrogen lines' results (less_blends among the steps: method, ew, its error, the listed lines
    # inside) of the demo spectra, every field to the bit
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import line_targets, measure_lines

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    less = 0
    for row in truth[~truth["broken"]][:12]:
        data = LineData(prepare(read(DEMO / row["file"])))
        listed = lines_in_range(data, None, ("atomic",), row["rv_topo"] * u.km / u.s)
        targets = line_targets(data, listed, None)
        features = find_features(data, DETECT_SIGMA, MIN_DEPTH)
        made, reference = _both(monkeypatch, measure_lines, data, features, targets, np.flatnonzero(targets.hydrogen),
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
                assert same, (row["file"], i, key)
            less += a.method == "integration_less_blends"
    assert less > 10
