"""The hydrogen lines' far wings compiled with numba (specan/lines/wingkernel.py) against the numpy
series they stand in for (specan/lines/profiles.py, ``voigt_wide``: the fallback, SPECAN_COMPILED=0,
no numba, or a numpy whose complex arithmetic is another) and against scipy's Voigt profile.

Stated tolerance: none; the same values to the bit. The kernel makes numpy's operations on the same
numbers: its division of 1 by z, its complex products with each part rounded once (numpy's loops for
processors with FMA units, as on this machine), its promoted zero imaginary parts. Where numpy's
arithmetic is found to be another (``wingkernel.numpy_agrees``), the kernel is not used. Measured on the
bench's 40 spectra, the dense spectrum and the demo night (benchmarks/bench_lines.py --against): the same
tables to the bit as before the kernel.
"""


import astropy.units as u
import numpy as np
import pytest
from scipy.special import voigt_profile


pytest.importorskip("numba", reason="numba not installed: the numpy series alone runs")

from specan.lines import compiled, wingkernel  # noqa: E402
from specan.lines.profiles import FAR_Z, voigt_wide  # noqa: E402

from kernel_pairs import demo_line_inputs, with_and_without  # noqa: E402

needs_agreement = pytest.mark.skipif(not wingkernel.numpy_agrees(),
                                     reason="numpy's complex arithmetic here is not the kernel's: not used")



def test_fused_rounding_reference():
    # the check of numpy's arithmetic rests on an exact fused multiply-add: (1 + 2^-30)^2 - 1 is
    # 2^-29 + 2^-60 rounded once, 2^-29 rounded twice
    a = 1.0 + 2.0 ** -30
    assert wingkernel._fused(a, a, -1.0) == 2.0 ** -29 + 2.0 ** -60
    assert a * a - 1.0 == 2.0 ** -29


@needs_agreement
def test_compiled_wings_are_numpys(monkeypatch):
    # a line a row with its widths as a column (as hydrogen_model calls it), one line with numbers, over
    # 4,000 pixels: narrow and broad cores, no damping at all, lines off the spectrum's ends
    rng = np.random.default_rng(5)
    x = np.linspace(3700.0, 7300.0, 4000)
    for trial in range(60):
        nl = int(rng.integers(1, 12))
        centre = rng.uniform(3600.0, 7400.0, nl)
        sigma = rng.uniform(0.2, 6.0, nl)
        gamma = rng.uniform(0.0, 10.0, nl)
        if trial % 4 == 0:
            gamma[0] = 0.0
        for args in ((x[None, :] - centre[:, None], sigma[:, None], gamma[:, None]),
                     (x - centre[0], sigma[0], gamma[0]), (x - centre[0], float(sigma[0]), float(gamma[0]))):
            made, reference = with_and_without(monkeypatch, compiled.wings, wingkernel, voigt_wide, *args)
            assert made.shape == reference.shape and made.tobytes() == reference.tobytes(), trial


@needs_agreement
def test_compiled_wings_against_scipys_profile(monkeypatch):
    # the series itself, compiled, against scipy's Voigt profile (the Faddeeva function): within the few
    # units of the last bit of the profile's scale that tests/test_lines_batched.py allows the numpy series
    monkeypatch.setattr(compiled, "COMPILED", True)
    x = np.linspace(3700.0, 7300.0, 4000)
    centre = np.array([3835.4, 4101.7, 4861.3, 6562.8])
    sigma, gamma = np.array([0.8, 1.1, 1.5, 2.0]), np.array([0.5, 2.0, 4.0, 8.0])
    dx = x[None, :] - centre[:, None]
    mine = voigt_wide(dx, sigma[:, None], gamma[:, None])
    scipys = voigt_profile(dx, sigma[:, None], gamma[:, None])
    far = dx * dx + gamma[:, None] ** 2 >= (FAR_Z * sigma[:, None] * np.sqrt(2.0)) ** 2
    assert far.sum() > 15000
    scale = voigt_profile(0.0, sigma, gamma)[:, None]
    assert np.abs(mine - scipys).max() <= 8 * np.finfo(float).eps * scale.max()
    assert np.array_equal(mine[~far], scipys[~far])   # the near points are scipy's own


@needs_agreement
def test_hydrogen_models_the_same(monkeypatch):
    # the transmission of the fitted hydrogen lines the other lines are measured against, on demo spectra
    from specan.lines.data import DETECT_SIGMA
    from specan.lines.hydrogen import hydrogen_model
    from specan.lines.measurement import measure_lines

    models = 0
    for k, (data, listed, features, targets) in enumerate(demo_line_inputs(8)):
        results = measure_lines(data, features, targets, np.flatnonzero(targets.hydrogen), "auto", DETECT_SIGMA)
        ep = listed.rows["ep_low"].to_value(u.eV)
        made, reference = with_and_without(monkeypatch, compiled.wings, wingkernel, hydrogen_model, data, results, targets, ep)
        if reference is None:
            assert made is None
            continue
        assert made.tobytes() == reference.tobytes(), k
        models += 1
    assert models >= 5


def test_kernel_used_only_where_numpy_agrees(monkeypatch):
    # a numpy whose arithmetic is another (told by numpy_agrees) keeps the numpy series
    monkeypatch.setattr(compiled, "_WINGS_AGREE", [False])
    assert compiled.wings() is None
    monkeypatch.setattr(compiled, "_WINGS_AGREE", [])
    monkeypatch.setattr(wingkernel, "numpy_agrees", lambda: False)
    assert compiled.wings() is None
    monkeypatch.setattr(compiled, "_WINGS_AGREE", [])
    monkeypatch.setattr(compiled, "COMPILED", False)
    assert compiled.wings() is None
