"""A new pixel set-up in the velocity stage (a night of exposures, each on its own wavelength solution):
the shortcuts taken when the spline operators are built give what scipy gives, to the bit."""

import numpy as np
import pytest
from scipy.interpolate import BSpline, make_interp_spline

from specan.velocity import grid as vgrid


def _pixels(rng, n):
    """ln(lambda) of ``n`` pixels: a linear wavelength solution shifted by a fraction of a pixel, or
    (every third) one with jittered pixel positions, as merged or resampled files have."""
    lam = 3700.0 + rng.uniform(0.5, 1.5) * np.arange(n) + rng.uniform(0.0, 0.6)
    return np.log(np.sort(lam + rng.normal(0.0, 0.05, n)) if n % 3 == 0 else lam)


def test_not_a_knot_knots_are_scipys():
    # scipy's make_interp_spline (the reference: its knots for k=3 with not-a-knot ends)
    rng = np.random.default_rng(11)
    for n in (8, 9, 57, 1000, 4000, 4001):
        x = _pixels(rng, n)
        assert np.array_equal(vgrid.not_a_knot(x), make_interp_spline(x, np.zeros_like(x), k=3).t)


def test_design_matrix_without_range_check_is_scipys():
    # scipy's BSpline.design_matrix with its range check (extrapolate=False) on points inside the knots
    rng = np.random.default_rng(12)
    for n in (57, 1000, 4000):
        x = _pixels(rng, n)
        t = vgrid.not_a_knot(x)
        outside = np.linspace(x[0] - 0.01, x[-1] + 0.01, n + 333)
        for points in (x, np.clip(outside, x[0], x[-1])):
            want = BSpline.design_matrix(points, t, 3)
            got = vgrid._design_matrix(points, t)
            assert got.shape == want.shape
            assert np.array_equal(got.data, want.data)
            assert np.array_equal(got.indices, want.indices)
            assert np.array_equal(got.indptr, want.indptr)


def test_spline_operators_on_new_pixels_interpolate_as_scipy():
    # scipy's make_interp_spline evaluated on the grid (to rounding: a factorised solve, not scipy's banded one)
    rng = np.random.default_rng(13)
    x = _pixels(rng, 3000)
    grid = np.linspace(x[0], x[-1], 3500)
    y = rng.normal(size=x.size)
    got = vgrid.spline_operators(x, grid).forward(y)
    assert np.allclose(got, make_interp_spline(x, y, k=3)(grid), rtol=0, atol=1e-9)


def test_noise_probes_are_drawn_once_and_unchanged():
    probes = vgrid._noise_probes(1234)
    assert probes is vgrid._noise_probes(1234)
    with pytest.raises(ValueError):
        probes[0, 0] = 1.0
    fresh = np.random.default_rng(20261204).standard_normal((1234, vgrid.NOISE_PROBES))
    assert np.array_equal(probes, fresh)
