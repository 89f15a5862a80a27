"""The atmospheric parameters beside the MK type: measured, turned into result keys, checked.

:func:`specan.parameters.measure` gives Teff, log g and [Fe/H]; here a failure to measure them
becomes a note (the MK type does not depend on them), and their agreement with the luminosity
class becomes a flag.
"""

from __future__ import annotations

from .. import parameters
from ..errors import SpecanError
from . import flags
from .gravity import DISAGREE_SIGMA

__all__ = ["ATMOSPHERE_KEYS", "measure_atmosphere", "atmosphere_columns", "gravity_agreement"]

#: Result keys the atmospheric parameters add to a classification (None when not measured).
ATMOSPHERE_KEYS = ("teff_spec", "teff_spec_err", "logg", "logg_err", "feh", "feh_err", "parameters_chi2")


def measure_atmosphere(spectrum, rv, notes, fwhm=None, resolving_power=None, pixels=None):
    """:func:`specan.parameters.measure` of the spectrum at velocity ``rv``, or None (with a note).

    ``fwhm`` (A) or ``resolving_power``: the resolution the criteria took the spectrum to have,
    so that both measurements make the same assumption. ``pixels``: the spectrum's
    :func:`specan.resolution.rest_pixels` at ``rv`` when made already.
    """
    try:
        atmosphere = parameters.measure(spectrum, rv=rv, fwhm_in=fwhm, resolving_power=resolving_power,
                                        pixels=pixels)
    except SpecanError as exc:
        notes.append(f"atmospheric parameters not measured: {getattr(exc, 'reason', exc)}")
        return None
    notes.extend(atmosphere["notes"])
    return atmosphere


def atmosphere_columns(atmosphere):
    """The :data:`ATMOSPHERE_KEYS` of a measurement (Quantities; None when there is none)."""
    if atmosphere is None:
        return dict.fromkeys(ATMOSPHERE_KEYS)
    return {"teff_spec": atmosphere["teff"], "teff_spec_err": atmosphere["teff_err"],
            "logg": atmosphere["logg"], "logg_err": atmosphere["logg_err"],
            "feh": atmosphere["feh"], "feh_err": atmosphere["feh_err"],
            "parameters_chi2": atmosphere["chi2_reduced"]}


def gravity_agreement(result, z):
    """Add the ``gravity_conflict`` flag and note to a classification result when they disagree."""
    for flag, note in flags.gravity_conflict(result["lumclass"], z, DISAGREE_SIGMA):
        result["flags"].append(flag)
        result["notes"].append(note)
