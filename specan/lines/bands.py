"""Band indices: a feature window against a pseudo-continuum through side windows."""

from __future__ import annotations

from typing import NamedTuple

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from astropy.table import QTable

from ..doppler import doppler_factor
from ..linelist import load_bands
from ..obsinfo import get_info
from .data import pixel_edges

__all__ = ["band_indices", "relative_noise"]

#: Unit of each kind of index.
_UNITS = {"ew": "Angstrom", "magnitude": "mag", "ratio": ""}


def band_indices(spectrum, bands=None, rv=0 * u.km / u.s):
    """Band indices: a feature window against a pseudo-continuum through side windows.

    The pseudo-continuum is the straight line through the mean fluxes of the blue and
    red windows at their centres (Lick convention, Worthey et al. 1994, from memory); with one
    window it is flat. ``kind`` "ew": integral of (1 - F/Fc) in Angstrom;
    "magnitude": -2.5 log10 of the mean of F/Fc over the feature; "ratio": the mean
    of F/Fc. Errors propagate the pixel errors of the feature and of both windows.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not; a normalised one with ``meta["continuum"]`` is measured on
        flux x continuum, since index definitions refer to the observed flux.
    bands : str, path or QTable, optional
        Default: the packaged ``"bands"`` list.
    rv : Quantity
        Radial velocity; the windows are shifted by it.

    Returns
    -------
    astropy.table.QTable
        ``name``, ``value``, ``err``, ``unit`` ("Angstrom", "mag" or ""), ``kind``,
        ``source``; NaN where the spectrum misses a window.
    """
    table = load_bands() if bands is None else (bands if isinstance(bands, QTable) else load_bands(bands))
    info = get_info(spectrum)
    arrays = _band_arrays(spectrum, info)
    suffix = "_vac" if info.medium == "vacuum" else "_air"
    factor = doppler_factor(rv)
    measured = [_band_index(row, suffix, factor, arrays) for row in table]
    out = QTable()
    out["name"] = [str(row["name"]) for row in table]
    out["value"] = [m[0] for m in measured]
    out["err"] = [m[1] for m in measured]
    out["unit"] = [_UNITS[str(row["kind"])] for row in table]
    out["kind"] = [str(k) for k in table["kind"]]
    out["source"] = [str(s) for s in table["source"]]
    out.meta["rv"] = u.Quantity(rv, u.km / u.s)
    out.meta["medium"] = info.medium
    return out


class _BandArrays(NamedTuple):
    """The observed (not normalised) flux as plain arrays; bad pixels are zero and not ``good``."""

    wave: np.ndarray   #: Angstrom
    flux: np.ndarray
    sigma: np.ndarray
    good: np.ndarray
    edges: np.ndarray  #: pixel edges, Angstrom


def _band_arrays(spectrum, info):
    """Wavelength, observed flux, its noise (error array, else :func:`relative_noise`) and good pixels."""
    wave = np.asarray(spectrum.spectral_axis.to_value(u.AA), float)
    flux = np.asarray(spectrum.flux.value, float)
    sigma = None
    if spectrum.uncertainty is not None:
        sigma = np.asarray(spectrum.uncertainty.represent_as(StdDevUncertainty).array, float)
    if info.normalized and "continuum" in spectrum.meta:
        cont = np.asarray(u.Quantity(spectrum.meta["continuum"]).value, float)
        if cont.shape == flux.shape:
            flux = flux * cont
            sigma = None if sigma is None else sigma * cont
    bad = ~np.isfinite(flux)
    if spectrum.mask is not None:
        bad |= np.asarray(spectrum.mask, bool)
    if sigma is None:
        sigma = np.abs(flux) * relative_noise(flux, bad)
    bad |= ~np.isfinite(sigma)
    good = ~bad
    return _BandArrays(wave, np.where(good, flux, 0.0), np.where(good, sigma, 0.0), good, pixel_edges(wave))


def relative_noise(flux, bad):
    """Noise per pixel relative to the local flux, by DER_SNR (Stoehr et al. 2008).

    Written here rather than specutils' snr_derived, which gives one S/N against the
    median flux: un-normalised flux varies across the bands, so each pixel's difference
    is scaled by its own flux first. 0 when no pixel allows it.
    """
    f = np.where(bad, np.nan, flux)
    dd = np.abs(2.0 * f[2:-2] - f[:-4] - f[4:]) / np.abs(f[2:-2])
    return 1.482602 / np.sqrt(6.0) * np.nanmedian(dd) if np.isfinite(dd).any() else 0.0


def _overlap(edges, lo, hi):
    """Length of each pixel inside [lo, hi] (fractional pixels at the window ends)."""
    return np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None)


def _window_mean(edges, flux, sigma, good, lo, hi):
    """Mean flux over [lo, hi] weighted by pixel overlap, and its standard error."""
    dx = _overlap(edges, lo, hi) * good
    if np.count_nonzero(dx) < 2:
        return np.nan, np.nan
    m = np.sum(flux * dx) / dx.sum()
    e = np.sqrt(np.sum((np.where(dx > 0, sigma, 0.0) * dx) ** 2)) / dx.sum()
    return float(m), float(e)


def _edge(row, name, suffix, factor):
    """A window edge of the band in the spectrum's medium, shifted by the Doppler ``factor``."""
    return float(u.Quantity(row[name + suffix], u.AA).value) * factor


def _side_windows(row, suffix, factor, arrays):
    """(centre, mean flux, its error) of each side window the band defines (blue, red)."""
    windows = []
    for side in ("blue", "red"):
        lo, hi = _edge(row, f"{side}_min", suffix, factor), _edge(row, f"{side}_max", suffix, factor)
        if np.isfinite(lo) and np.isfinite(hi):
            m, e = _window_mean(arrays.edges, arrays.flux, arrays.sigma, arrays.good, lo, hi)
            windows.append((0.5 * (lo + hi), m, e))
    return windows


def _band_index(row, suffix, factor, arrays):
    """(value, error) of one band; NaN where the spectrum misses a window or masks the feature."""
    fmin, fmax = _edge(row, "feature_min", suffix, factor), _edge(row, "feature_max", suffix, factor)
    windows = _side_windows(row, suffix, factor, arrays)
    edges = arrays.edges
    dx_all = _overlap(edges, fmin, fmax) * arrays.good
    sel = dx_all > 0
    covered = (edges[0] <= fmin) and (edges[-1] >= fmax)
    masked_frac = 1.0 - dx_all.sum() / (fmax - fmin)
    if (not windows or sel.sum() < 2 or not covered or masked_frac > 0.2
            or not all(np.isfinite(w[1]) for w in windows)):
        return np.nan, np.nan
    total, var_sum = _ratio_sum(arrays.wave[sel], arrays.flux[sel], arrays.sigma[sel], dx_all[sel], windows)
    return _index_value(str(row["kind"]), total, var_sum, dx_all[sel].sum())


def _ratio_sum(x, f, s, dx, windows):
    """Sum of (F/Fc) dx over the feature against the pseudo-continuum Fc, and its variance."""
    if len(windows) == 2:
        (xb, mb, eb), (xr, mr, er) = windows
        t = (x - xb) / (xr - xb)
    else:
        (xb, mb, eb), (mr, er) = windows[0], (windows[0][1], 0.0)
        t = np.zeros_like(x)
    fc = mb * (1.0 - t) + mr * t
    ratio = f / fc
    # derivatives of sum(ratio*dx) with respect to the two window means
    d_mb = -np.sum(f * dx * (1.0 - t) / fc**2)
    d_mr = -np.sum(f * dx * t / fc**2)
    var_sum = np.sum((s * dx / fc) ** 2) + (d_mb * eb) ** 2 + (d_mr * er) ** 2
    return np.sum(ratio * dx), var_sum


def _index_value(kind, total, var_sum, width):
    """(value, error) of an index of ``kind`` from the ratio sum over a feature ``width`` wide."""
    if kind == "ew":
        return float(width - total), float(np.sqrt(var_sum))
    if kind == "magnitude":
        mean = total / width
        if not mean > 0:
            return np.nan, np.nan
        return float(-2.5 * np.log10(mean)), float(2.5 / np.log(10) * np.sqrt(var_sum) / width / mean)
    return float(total / width), float(np.sqrt(var_sum) / width)
