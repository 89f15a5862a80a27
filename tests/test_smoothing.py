"""Smoothing to a FWHM (specan.resolution.smooth_to_fwhm)."""

import numpy as np
import pytest

from specan.resolution import smooth_to_fwhm


def test_smoothing_reaches_the_asked_fwhm():
    # a narrow Gaussian line smoothed from 2 A to 10 A FWHM comes out 10 A wide (Gaussians add in quadrature)
    w = np.arange(4000.0, 6000.0, 0.5)
    sigma_in = 2.0 / 2.3548
    flux = 1.0 - 0.5 * np.exp(-0.5 * ((w - 5000.0) / sigma_in) ** 2)
    grid, out, ok = smooth_to_fwhm(w, flux, np.ones(w.size, bool), 2.0, 10.0)
    depth = 1.0 - out
    half = grid[depth >= depth.max() / 2]
    assert half[-1] - half[0] + 0.5 == pytest.approx(10.0, abs=0.5)
    assert ok.all()
