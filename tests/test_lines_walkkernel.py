"""The measurement windows' walks compiled with numba (specan/lines/walkkernel.py) against the numpy
walks they stand in for (specan/lines/windows.py, ``_walks_upto``: the fallback, SPECAN_COMPILED=0 or
no numba) and against the one-line walk both were written from (``adaptive_window``).

Stated tolerance: none; the same windows to the bit (edges, levels, cuts). The kernel makes the same
comparisons on the same values (a depth is ``sign (1 - smoothed flux)`` either way; the plateau test's
look back ``ceil(width / dx)`` steps), so there is no rounding to differ in. Measured on the bench's
40 spectra, the dense spectrum and the demo night (benchmarks/bench_lines.py --against): the same
tables to the bit as before the kernel.
"""


import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from specan import prepare, read

pytest.importorskip("numba", reason="numba not installed: the numpy walks alone run")

from specan.lines import compiled, walkkernel, windows  # noqa: E402

from kernel_pairs import DEMO, with_and_without  # noqa: E402


def _setups(count):
    """(file, data, targets, starts) of the first ``count`` readable demo-night spectra, as measure()
    makes them, and of a copy of each with a ripple (other plateaus, other cuts)."""
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import line_starts, line_targets

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:count]:
        data = LineData(prepare(read(DEMO / row["file"])))
        listed = lines_in_range(data, None, ("atomic",), row["rv_topo"] * u.km / u.s)
        targets = line_targets(data, listed, None)
        for d in (data, data.divided(0.97 + 0.03 * np.cos(data.wave / 50.0))):
            features = find_features(d, DETECT_SIGMA, MIN_DEPTH)
            starts = line_starts(d, features, targets, np.arange(targets.pred.size), DETECT_SIGMA)
            yield row["file"], d, targets, starts



def test_compiled_walks_are_numpys(monkeypatch):
    # every line of the demo spectra walked both ways at once, the hydrogen lines on the wide smoothing:
    # the edges, levels and cuts of _walks to the bit, types too
    walked = 0
    for name, data, targets, starts in _setups(10):
        idx = np.array([i for i, st in enumerate(starts) if st is not None and st.matched])
        for chosen in (idx, idx[targets.hydrogen[idx]], idx[~targets.hydrogen[idx]]):
            if not chosen.size:
                continue
            ic = np.array([starts[i].ic for i in chosen])
            sign = np.array([starts[i].sign for i in chosen])
            fw = targets.fwhm[chosen]
            wide = targets.hydrogen[chosen]
            max_half = np.where(wide, np.maximum(25.0 * fw, 80.0), 25.0 * fw)
            step = np.repeat(np.array([-1, 1]), ic.size)
            args = (data, np.concatenate([ic, ic]), np.concatenate([sign, sign]), np.concatenate([fw, fw]),
                    np.concatenate([max_half, max_half]), np.concatenate([wide, wide]), step)
            made, reference = with_and_without(monkeypatch, compiled.walks, walkkernel, windows._walks, *args)
            for a, b in zip(made, reference):
                assert a.dtype == b.dtype and np.array_equal(a, b), name
            walked += step.size
    assert walked > 5000


def test_compiled_walks_at_the_edges_and_limits(monkeypatch):
    # walks from the spectrum's first and last pixels, toward and away from its ends, with reaches of
    # less than a pixel up to the whole spectrum, absorption and emission, narrow and wide smoothing
    name, data, targets, starts = next(_setups(1))
    n = data.wave.size
    rng = np.random.default_rng(7)
    ic = np.concatenate([[0, 0, n - 1, n - 1, 1, n - 2], rng.integers(0, n, 200)])
    m = ic.size
    step = np.where(np.arange(m) % 2 == 0, -1, 1)
    sign = np.where(rng.random(m) < 0.2, -1.0, 1.0)
    min_half = rng.uniform(0.5, 8.0, m)
    max_half = np.concatenate([[1e-3, 5e3, 1e-3, 5e3, 0.0, 1.0], rng.uniform(0.1, 400.0, m - 6)])
    for wide in (np.zeros(m, bool), np.ones(m, bool), rng.random(m) < 0.5):
        made, reference = with_and_without(monkeypatch, compiled.walks, walkkernel, windows._walks, data, ic, sign, min_half, max_half, wide, step)
        for a, b in zip(made, reference):
            assert a.dtype == b.dtype and np.array_equal(a, b)


def test_compiled_windows_are_the_one_line_walks(monkeypatch):
    # the windows line_windows makes with the kernel are the ones adaptive_window's walk (line_window)
    # makes one line at a time, hydrogen lines within their series' limits
    from specan.lines.windows import line_window, line_windows

    monkeypatch.setattr(compiled, "COMPILED", True)
    compared = 0
    for name, data, targets, starts in _setups(6):
        idx = [i for i, st in enumerate(starts) if st is not None]
        series = targets.pred[targets.hydrogen]
        batch = line_windows(data, [starts[i] for i in idx], targets.fwhm[idx], targets.hydrogen[idx], series)
        for i, window in zip(idx, batch):
            st = starts[i]
            one = line_window(data, st.ic, st.centre, st.sign, targets.fwhm[i], bool(targets.hydrogen[i]),
                              st.matched, series)
            assert tuple(one) == tuple(window), (name, i)
            compared += 1
    assert compared > 1500


def test_warm_up_compiles_the_kernels():
    # the stage's warm-up (called before the night run forks its workers) leaves every kernel of the
    # stage's own arrays compiled (or loaded from numba's cache) for the types the stage passes, in a new
    # process that has measured nothing yet
    import os
    import subprocess
    import sys

    code = ("import sys; from specan import lines; lines.warm_up(); "
            "from specan.lines import walkkernel, wingkernel, blendkernel, filterkernel; "
            "print(len(walkkernel.walks.signatures), len(wingkernel.far_wings.signatures), "
            "len(blendkernel.metal_candidates.signatures), len(blendkernel.crest_excess.signatures), "
            "len(blendkernel.dips.signatures), len(filterkernel.band_filter.signatures), "
            "len(filterkernel.symmetric_filter.signatures))")
    out = subprocess.run([sys.executable, "-c", code], env={**os.environ, "SPECAN_COMPILED": "1"},
                         capture_output=True, text=True, check=True).stdout.split()
    assert all(int(k) >= 1 for k in out) and len(out) == 7


def test_switched_off_by_the_environment():
    # SPECAN_COMPILED=0 keeps the numpy walks (and numba unimported for them) in a new process
    import os
    import subprocess
    import sys

    code = ("from specan.lines import compiled; import sys; "
            "print(compiled.walks() is None, 'specan.lines.walkkernel' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], env={**os.environ, "SPECAN_COMPILED": "0"},
                         capture_output=True, text=True, check=True).stdout.split()
    assert out == ["True", "False"]
