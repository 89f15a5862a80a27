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


def test_rest_pixels_made_once_give_each_grid_its_own_numbers(kurucz_sun):
    # classify makes the pixels at rest once for the parameter model's and the library comparison's
    # grids: each grid gets, bit for bit, what it makes from the spectrum itself (Kurucz solar flux
    # from rms-solar in vacuum, at a velocity, with masked pixels)
    import astropy.units as u
    from specutils import Spectrum

    from specan import parameters
    from specan.classify import neighbours
    from specan.obsinfo import ObsInfo
    from specan.resolution import on_rest_grid, rest_pixels

    w, f, _ = kurucz_sun
    mask = np.zeros(w.size, bool)
    mask[::97] = True
    spec = Spectrum(flux=f * u.dimensionless_unscaled, spectral_axis=w * u.AA, mask=mask,
                    meta={"specan": ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0)})
    rv = 42.0 * u.km / u.s
    pixels = rest_pixels(spec, rv)
    for grid, fwhm, positive in ((parameters.model_wavelengths(), parameters.MODEL_FWHM, False),
                                 (neighbours.wavelengths(), neighbours.FWHM, True)):
        own = on_rest_grid(spec, grid, fwhm, rv=rv, positive=positive)
        shared = on_rest_grid(spec, grid, fwhm, rv=rv, positive=positive, pixels=pixels)
        for a, b in zip(own, shared):
            assert np.array_equal(a, b)
    a, b = parameters.on_model_grid(spec, rv=rv), parameters.on_model_grid(spec, rv=rv, pixels=pixels)
    assert np.array_equal(a.flux, b.flux) and np.array_equal(a.good, b.good)
    a, b = neighbours.on_grid(spec, rv=rv), neighbours.on_grid(spec, rv=rv, pixels=pixels)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])
