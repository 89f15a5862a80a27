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


def _smoothed_whole(wave, flux, good, fwhm_in, fwhm_out):
    """smooth_to_fwhm as it was written first: every level smoothed over the whole grid (the reference)."""
    from scipy.ndimage import gaussian_filter1d

    step = float(np.median(np.diff(wave)))
    grid = np.arange(wave[0], wave[-1] + step / 2, step)
    fg = np.interp(grid, wave[good], flux[good])
    gg = np.interp(grid, wave, good.astype(float))
    fin = np.broadcast_to(np.interp(grid, wave, np.broadcast_to(fwhm_in, wave.shape)), grid.shape)
    fout = fwhm_out if np.ndim(fwhm_out) == 0 else np.interp(grid, wave, fwhm_out)
    sig = np.sqrt(np.clip(fout ** 2 - fin ** 2, 0.0, None)) / 2.3548 / step
    if np.all(sig < 0.3):
        return grid, fg, gg > 0.5
    levels = np.unique(np.round(np.linspace(sig.min(), sig.max(), 5), 3))
    smooth = np.array([gaussian_filter1d(fg, lv, mode="nearest") if lv > 0.3 else fg for lv in levels])
    gsm = gaussian_filter1d(gg, float(levels.max()), mode="nearest")
    if len(levels) == 1:
        return grid, smooth[0], gsm > 0.5
    j = np.clip(np.searchsorted(levels, sig) - 1, 0, len(levels) - 2)
    t = np.clip((sig - levels[j]) / (levels[j + 1] - levels[j]), 0.0, 1.0)
    idx = np.arange(grid.size)
    return grid, smooth[j, idx] * (1.0 - t) + smooth[j + 1, idx] * t, gsm > 0.5


@pytest.mark.parametrize("case", ["constant R to 13 A", "constant R to 4.5 A", "constant FWHMs", "mask",
                                  "output at constant R", "wavy widths", "below the smallest kernel",
                                  "a few pixels"])
def test_smoothing_each_level_where_needed_gives_the_whole_grids_numbers(case, kurucz_sun):
    # each kernel width is applied only where it brackets the pixel's width (with its reach beside):
    # the same numbers, bit for bit, as smoothing the whole grid at every width (Kurucz solar flux
    # from rms-solar, R = 2000)
    w, f, _ = kurucz_sun
    keep = (w > 3600) & (w < 7500)
    w, f = w[keep], f[keep]
    good = np.ones(w.size, bool)
    fin, fout = w / 2000.0, 13.0
    if case == "constant R to 4.5 A":
        fout = 4.5
    elif case == "constant FWHMs":
        fin = 2.0
    elif case == "mask":
        good[::37] = False
        good[500:540] = False
    elif case == "output at constant R":
        fin, fout = 1.0, w / 900.0
    elif case == "wavy widths":
        fin = 2.5 + 1.5 * np.sin(w / 150.0)
    elif case == "below the smallest kernel":
        fin, fout = w / 2000.0, w / 1900.0
    elif case == "a few pixels":
        w, f, good, fin = w[:30], f[:30], good[:30], 2.0
    new = smooth_to_fwhm(w, f, good, fin, fout)
    ref = _smoothed_whole(w, f, good, fin, fout)
    for a, b in zip(new, ref):
        assert np.array_equal(a, b)
