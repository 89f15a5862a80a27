"""Velocity templates behind one interface: "this template, on this grid, at this resolution".

The velocity stage asks for built-in templates by kind and name and gets plain arrays on its
ln(vacuum wavelength) grid; where a template comes from is decided here, not there.

Kinds:

- ``"library"`` (the default): empirical templates, medians of groups of observed stars of the
  MILES library (Sanchez-Blazquez et al. 2006, MNRAS 371, 703; Cenarro et al. 2007, MNRAS 374,
  664; 2.50 A FWHM: Falcon-Barroso et al. 2011, A&A 532, A95), continuum-normalised by specan,
  in ``specan/data/templates_miles.fits`` (``scripts/build_library_templates.py`` regenerates
  it). They cover 3545-7405 A (air), B0 to M6 and four metal-poor groups; beyond that range, and
  for O stars, the synthetic kind serves.
- ``"synth"``: specan's synthetic spectra (:mod:`specan.synth`), any type, any wavelength.
- ``"mask"``: weighted line masks made from the same line strengths.
"""

from __future__ import annotations

import functools
import math
from importlib import resources
from typing import NamedTuple

import astropy.units as u
import numpy as np
from scipy.interpolate import make_interp_spline

from . import synth
from .obsinfo import vacuum_to_air
from .resolution import FWHM_TO_SIGMA, smooth_to_fwhm

__all__ = ["KINDS", "LIBRARY_FILE", "LibraryTemplate", "automatic_types", "library_templates", "library_coverage",
           "on_log_grid"]

#: The kinds of built-in template, by the name the velocity stage asks for.
KINDS = ("library", "synth", "mask")
#: The packaged library templates (see the module docstring).
LIBRARY_FILE = "templates_miles.fits"


def automatic_types():
    """(sptype, lumclass) pairs of the synthetic grid tried by the automatic choice, O to M."""
    return tuple(synth.TEMPLATE_TYPES)


class LibraryTemplate(NamedTuple):
    """One library template: its name, nominal MK type, members and median parameters."""

    name: str
    sptype: str
    lumclass: str
    n_stars: int
    teff_k: float
    logg: float
    feh: float
    zero_point_err_kms: float


@functools.lru_cache(maxsize=1)
def _library():
    """(air wavelengths A, fluxes (k, n), FWHM A, tuple of LibraryTemplate) of the packaged file."""
    from astropy.io import fits
    from astropy.table import Table

    with resources.as_file(resources.files("specan.data") / LIBRARY_FILE) as path:
        with fits.open(path) as hdus:
            h = hdus[0].header
            flux = np.asarray(hdus[0].data, float)
            wave = h["CRVAL1"] + h["CDELT1"] * (np.arange(flux.shape[1]) + 1.0 - h["CRPIX1"])
            table = Table(hdus["GROUPS"].data)
            fwhm = float(h["FWHM"])
    entries = tuple(LibraryTemplate(str(r["name"]), str(r["sptype"]), str(r["lumclass"]), int(r["n_stars"]),
                                    float(r["teff_k"]), float(r["logg"]), float(r["feh"]),
                                    float(r["zero_point_err_kms"])) for r in table)
    return wave, flux, fwhm, entries


def library_templates():
    """The library templates (:class:`LibraryTemplate`), in file order."""
    return _library()[3]


def library_coverage():
    """(first, last) air wavelength in Angstrom where the library templates are defined."""
    wave, flux, _, _ = _library()
    defined = np.isfinite(flux).any(axis=0)
    return float(wave[defined][0]), float(wave[defined][-1])


def _library_index(name):
    for i, t in enumerate(library_templates()):
        if t.name == name:
            return i
    raise KeyError(f"no library template named {name!r}; they are: "
                   f"{', '.join(t.name for t in library_templates())}")


def on_log_grid(sptype, lumclass, resolving_power, ln0, step, n, kind="synth", name=None):
    """A built-in template on the grid ln(lambda_vac / A) = ln0 + step * k, k = 0 ... n-1.

    Parameters
    ----------
    sptype, lumclass : str
        MK type of a synthetic template or mask, e.g. "G2", "V" (for the library: its nominal type).
    resolving_power : float
        Resolution the template is wanted at (the spectrum's). Library templates are degraded
        to it where they are sharper, and used as they are where they are broader.
    ln0, step : float
        Grid start and step in ln(vacuum wavelength in Angstrom), rest frame.
    n : int
        Grid length.
    kind : {"library", "synth", "mask"}
    name : str, optional
        Library template name (:func:`library_templates`); default "<sptype> <lumclass>".

    Returns
    -------
    name : str
    flux : numpy.ndarray
        Normalised flux (1 = continuum), length ``n``.
    valid : numpy.ndarray of bool
        Where the template is defined (everywhere for the synthetic kinds).
    """
    grid = ln0 + step * np.arange(n)
    if kind == "library":
        index = _library_index(name or f"{sptype} {lumclass}")
        flux, valid = _library_on_grid(index, grid, resolving_power)
        return f"library {library_templates()[index].name}", flux, valid
    if kind == "synth":
        flux = synth.normalised_flux(sptype, lumclass, np.exp(grid), resolving_power)
        label = f"synthetic {sptype} {lumclass}"
    elif kind == "mask":
        flux = _mask_flux(grid, sptype, lumclass, resolving_power)
        label = f"line mask {sptype} {lumclass}"
    else:
        raise ValueError(f"template kind must be one of {', '.join(KINDS)}, not {kind!r}")
    return label, flux, np.ones(n, bool)


def _library_on_grid(index, grid, resolving_power):
    """(flux, valid) of library template ``index`` on a vacuum ln-lambda grid at ``resolving_power``."""
    wave, fluxes, fwhm, _ = _library()
    f = fluxes[index]
    good = np.isfinite(f)
    first, last = np.flatnonzero(good)[[0, -1]]
    wave, f, good = wave[first:last + 1], f[first:last + 1], good[first:last + 1]
    if resolving_power:
        # sharper than the spectrum: Gaussian to the spectrum's FWHM (lambda / R) at every wavelength
        on, smoothed, _ = smooth_to_fwhm(wave, np.where(good, f, 1.0), good, fwhm, wave / float(resolving_power))
        f = np.interp(wave, on, smoothed)
    w_air = vacuum_to_air(np.exp(grid) * u.AA).to_value(u.AA)
    inside = (w_air >= wave[0]) & (w_air <= wave[-1])
    flux = np.ones(grid.size)
    flux[inside] = make_interp_spline(wave, np.where(good, f, 1.0), k=3)(w_air[inside])
    bad = np.interp(w_air, wave, (~good).astype(float), left=1.0, right=1.0) > 1e-6
    return flux, inside & ~bad


def _mask_flux(grid, sptype, lumclass, resolving_power):
    """Weighted line mask: a Gaussian of the instrumental width per atomic line, depth ~ model strength."""
    t = synth.line_strengths(sptype, lumclass)
    sel = (np.asarray(t["kind"]) == "atomic") & (np.asarray(t["strength"]) > 0)
    lnc = np.log(t["wave_vac"].to_value(u.AA)[sel])
    ew = np.asarray(t["strength"])[sel]
    sig = FWHM_TO_SIGMA / float(resolving_power)
    # weight = central depth a line of that EW would have at this resolution, capped (# common practice)
    depth = np.minimum(ew / (np.exp(lnc) * sig * math.sqrt(2 * math.pi)), 0.8)
    out = np.zeros_like(grid)
    for c, dep in zip(lnc, depth):
        j0, j1 = np.searchsorted(grid, [c - 6 * sig, c + 6 * sig])
        out[j0:j1] += dep * np.exp(-0.5 * ((grid[j0:j1] - c) / sig) ** 2)
    return 1.0 - out
