"""The lines stage's work done once per set-up (grid, resolving power, line list) instead of per
spectrum, against what it replaces and against scipy.

Stated tolerance: none. Everything kept per set-up must give the same values to the last bit as
the same work done for each spectrum; the matched filter made with every pixel's kernel laid out
at once (specan/lines/data.py, ``_banded``) must give scipy.ndimage.gaussian_filter1d's sums,
pixel by pixel, at that pixel's width.
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d

from specan import contents
from specan.contents import content_key
from specan.lines import data as line_data


def _grid(rng, n, resolving_power, broadening):
    wave = np.linspace(3700.0, 7300.0, n)
    dx = np.diff(line_data.pixel_edges(wave))
    sig_pix = np.maximum(wave / resolving_power, dx) * broadening / line_data.GAUSS_FWHM / dx
    flux = 1.0 - rng.uniform(0.0, 1.0, n) * (rng.uniform(size=n) < 0.3)
    weight = rng.uniform(100.0, 1e4, n)
    weight[rng.uniform(size=n) < 0.05] = 0.0          # masked pixels: weight zero
    return wave, sig_pix, flux, weight


@pytest.mark.parametrize("n, resolving_power, broadening", [
    (4000, 2000.0, 1.0), (4000, 1000.0, 1.0), (3000, 5000.0, 2.7), (200, 800.0, 1.0), (4000, 1000.0, 1.6)])
def test_banded_matched_filter_is_scipys_filter_at_each_pixels_width(n, resolving_power, broadening):
    # every pixel's value from scipy.ndimage.gaussian_filter1d of the whole arrays at its own rung's
    # width (the ladder of widths 5% apart the filter is defined on), with the kernel sums of that width
    rng = np.random.default_rng(n + int(resolving_power))
    wave, sig_pix, flux, weight = _grid(rng, n, resolving_power, broadening)
    ladder = line_data._ladder(sig_pix)
    assert ladder.band is not None
    signif, smooth, smooth_err = line_data.matched_filter(flux, weight, sig_pix, ladder)
    want = [np.empty(n), np.empty(n), np.empty(n)]
    for s, idx, _, _, k1, k2 in ladder.rungs:
        f_wd, f_wf, f_w = (gaussian_filter1d(v, s, mode="nearest")[idx]
                           for v in (weight * (1.0 - flux), weight * flux, weight))
        f_w2 = gaussian_filter1d(weight, s / np.sqrt(2.0), mode="nearest")[idx]
        want[0][idx] = k1 * f_wd / np.sqrt(np.maximum(k2 * f_w2, 1e-300))
        want[1][idx] = f_wf / np.maximum(f_w, 1e-300)
        want[2][idx] = np.sqrt(k2 * f_w2 / np.maximum((k1 * f_w) ** 2, 1e-300))
    want[1] = np.where(np.isfinite(want[1]), want[1], 1.0)
    for got, expected in zip((signif, smooth, smooth_err), want):
        assert np.array_equal(got, expected)
    # and the rung-by-rung path (kept for kernels past BAND_REACH) gives the same
    for got, rungs in zip((signif, smooth, smooth_err),
                          line_data.matched_filter(flux, weight, sig_pix, ladder._replace(band=None))):
        assert np.array_equal(got, rungs)


def test_wide_kernels_are_filtered_rung_by_rung():
    # lines broadened past BAND_REACH pixels: the banded layout is not made (it would cost more than
    # the rungs), and the filter still runs
    rng = np.random.default_rng(3)
    wave, sig_pix, flux, weight = _grid(rng, 4000, 2000.0, 20.0)
    ladder = line_data._ladder(sig_pix)
    assert ladder.band is None
    signif, smooth, _ = line_data.matched_filter(flux, weight, sig_pix, ladder)
    assert np.all(np.isfinite(signif)) and np.all(np.isfinite(smooth))


def test_set_up_kept_per_grid_and_resolving_power():
    # two spectra on one grid at one R share the kept arrays; another R or another grid do not,
    # and what is kept cannot be written to (a LineData never changes it)
    wave = np.linspace(3700.0, 7300.0, 4000)
    other = wave.copy()
    other[-1] += 1e-9
    key = content_key(wave)
    assert content_key(wave.copy()) == key
    assert content_key(other) != key
    dx = line_data._grid_setup(key, wave)
    assert line_data._grid_setup(content_key(wave.copy()), wave.copy()) is dx
    assert np.array_equal(dx, np.diff(line_data.pixel_edges(wave)))
    first = line_data._width_setup(key, wave, dx, 2000.0, 1.0)
    assert line_data._width_setup(key, wave, dx, 2000.0, 1.0) is first
    assert line_data._width_setup(key, wave, dx, 2001.0, 1.0) is not first
    assert line_data._width_setup(key, wave, dx, 2000.0, 1.3) is not first
    for a in first[:3] + (dx,):
        assert not a.flags.writeable
    fwhm = np.maximum(wave / 2000.0, dx)
    assert np.array_equal(first[0], fwhm)
    assert np.array_equal(first[2], fwhm * 1.0 / line_data.GAUSS_FWHM / dx)


def test_line_data_the_same_from_kept_set_up(monkeypatch):
    # a spectrum measured with the set-up kept from an earlier one and with nothing kept: the same
    # arrays to the bit
    from test_lines import make_spectrum

    rng = np.random.default_rng(11)
    wave = np.linspace(4000.0, 6000.0, 3000)
    flux = 1.0 - 0.5 * np.exp(-0.5 * ((wave - 5000.0) / 1.0) ** 2) + rng.normal(0.0, 0.01, wave.size)
    spec = make_spectrum(wave, flux, 0.01, resolving_power=2000.0)
    line_data.LineData(spec)                     # fills the kept set-up
    kept = line_data.LineData(spec)
    monkeypatch.setattr(line_data, "_GRIDS", {})
    monkeypatch.setattr(line_data, "_WIDTHS", {})
    monkeypatch.setattr(contents, "_CONTENTS", [])
    fresh = line_data.LineData(spec)
    for name in ("dx", "fwhm", "line_fwhm", "sig_pix", "signif", "smooth", "smooth_err", "weight"):
        assert np.array_equal(getattr(kept, name), getattr(fresh, name)), name


def test_packaged_rows_kept_give_the_tables_of_the_list_given():
    # the packaged list's covered rows and their values kept per coverage: the same table as the
    # same list handed in as a table (nothing kept), column by column to the bit; and each table
    # owns its columns (writing to one leaves the next as measured)
    from test_lines import make_spectrum

    from specan import lines
    from specan.linelist import load_linelist

    rng = np.random.default_rng(12)
    wave = np.linspace(4800.0, 5400.0, 1500)
    flux = 1.0 + rng.normal(0.0, 0.01, wave.size)
    for centre in (4861.3, 5167.3, 5172.7, 5183.6):          # H beta, Mg b (NIST ASD, air)
        flux -= 0.4 * np.exp(-0.5 * ((wave - centre) / 0.6) ** 2)
    spec = make_spectrum(wave, flux, 0.01, resolving_power=3000.0)
    first = lines.measure(spec)
    kept = lines.measure(spec)
    given = lines.measure(spec, linelist=load_linelist())
    assert len(first) > 10
    for name in first.colnames:
        a, b = np.asarray(getattr(kept[name], "value", kept[name])), np.asarray(getattr(given[name], "value", given[name]))
        assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), name
    # the list's columns as they are described there
    for name in ("wave_air", "wave_vac"):
        assert first[name].info.description == load_linelist()[name].info.description
        assert first[name].info.description
    first["wave_air"][0] = 0.0 * first["wave_air"].unit
    first["id"][0] = "changed"
    again = lines.measure(spec)
    assert again["wave_air"][0] == kept["wave_air"][0] and again["id"][0] == kept["id"][0]
