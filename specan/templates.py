"""Velocity templates behind one interface: "this template, on this grid, at this resolution".

The velocity stage asks for built-in templates by type and kind and gets plain arrays on its
ln(vacuum wavelength) grid; where a template comes from is decided here, not there.
Today the built-in kinds are the synthetic spectra of :mod:`specan.synth` (``"synth"``) and
weighted line masks made from the same line strengths (``"mask"``).
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np

from . import synth
from .resolution import FWHM_TO_SIGMA

__all__ = ["KINDS", "automatic_types", "on_log_grid"]

#: The kinds of built-in template, by the name the velocity stage asks for.
KINDS = ("synth", "mask")


def automatic_types():
    """(sptype, lumclass) pairs tried by the automatic template choice, O to M."""
    return tuple(synth.TEMPLATE_TYPES)


def on_log_grid(sptype, lumclass, resolving_power, ln0, step, n, kind="synth"):
    """A built-in template on the grid ln(lambda_vac / A) = ln0 + step * k, k = 0 ... n-1.

    Parameters
    ----------
    sptype, lumclass : str
        MK type of the template, e.g. "G2", "V".
    resolving_power : float
        Resolution the template is made at (the spectrum's).
    ln0, step : float
        Grid start and step in ln(vacuum wavelength in Angstrom), rest frame.
    n : int
        Grid length.
    kind : {"synth", "mask"}
        Synthetic spectrum or weighted line mask.

    Returns
    -------
    name : str
    flux : numpy.ndarray
        Normalised flux (1 = continuum), length ``n``.
    valid : numpy.ndarray of bool
        Where the template is defined (everywhere for these kinds).
    """
    grid = ln0 + step * np.arange(n)
    if kind == "synth":
        flux = synth.normalised_flux(sptype, lumclass, np.exp(grid), resolving_power)
        name = f"synthetic {sptype} {lumclass}"
    elif kind == "mask":
        flux = _mask_flux(grid, sptype, lumclass, resolving_power)
        name = f"line mask {sptype} {lumclass}"
    else:
        raise ValueError(f"template kind must be one of {', '.join(KINDS)}, not {kind!r}")
    return name, flux, np.ones(n, bool)


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
