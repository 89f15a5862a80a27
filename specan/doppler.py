"""Doppler arithmetic shared by every stage: velocity <-> wavelength ratio, shifts to rest.

Velocities are relativistic Doppler velocities, 1 + z = sqrt((1 + beta)/(1 - beta)), and
velocities compose by multiplying their factors 1 + z (special relativity along one line;
common practice). Only numbers and spectra here, no reference frames (see
:mod:`specan.frames`) and no measurement (see :mod:`specan.velocity`).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy.constants import c as _c

from .obsinfo import META_KEY, get_info, vacuum_to_air, wavelength_in

__all__ = ["C_KMS", "doppler_factor", "velocity_from_factor", "factor_kms", "velocity_kms", "shift_to_rest"]

#: km/s, made once (a composite unit is ~20 us to make, measured)
_KMS = u.km / u.s
#: Speed of light in km/s (CODATA, via astropy.constants).
C_KMS = _c.to_value(_KMS)


def doppler_factor(rv, convention="relativistic"):
    """Wavelength ratio 1 + z = lambda_obs / lambda_rest of a radial velocity.

    Parameters
    ----------
    rv : astropy.units.Quantity
        Velocity, positive receding (scalar or array).
    convention : {"relativistic", "optical"}
        ``relativistic``: sqrt((1 + beta) / (1 - beta)); ``optical``: 1 + v/c.

    Returns
    -------
    numpy.ndarray or float
    """
    beta = u.Quantity(rv, _KMS).to_value(_KMS) / C_KMS
    if convention == "optical":
        return 1.0 + beta
    if convention != "relativistic":
        raise ValueError(f"convention must be 'relativistic' or 'optical', not {convention!r}")
    return np.sqrt((1.0 + beta) / (1.0 - beta))


def velocity_from_factor(factor, convention="relativistic"):
    """Radial velocity of a wavelength ratio 1 + z (inverse of :func:`doppler_factor`).

    Returns
    -------
    astropy.units.Quantity
        km/s.
    """
    f = np.asarray(factor, dtype=float)
    if convention == "optical":
        beta = f - 1.0
    elif convention == "relativistic":
        beta = (f * f - 1.0) / (f * f + 1.0)
    else:
        raise ValueError(f"convention must be 'relativistic' or 'optical', not {convention!r}")
    return beta * C_KMS * (u.km / u.s)


def factor_kms(rv_kms):
    """Relativistic 1 + z of one velocity given as a plain float in km/s (for inner loops)."""
    # doppler_factor's arithmetic on a float, without building a Quantity (same bits)
    beta = float(rv_kms) / C_KMS
    return float(np.sqrt((1.0 + beta) / (1.0 - beta)))


def velocity_kms(factor):
    """Relativistic velocity of one wavelength ratio as a plain float in km/s (for inner loops)."""
    # velocity_from_factor's arithmetic on a float, without building a Quantity (same bits)
    f = float(factor)
    return float((f * f - 1.0) / (f * f + 1.0) * C_KMS)


def shift_to_rest(spectrum, rv):
    """Shift a spectrum to its rest frame (relativistic Doppler).

    The division by 1 + z is done on vacuum wavelengths and the axis converted back
    to the spectrum's medium, so the result is exact in air too.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    rv : astropy.units.Quantity
        Velocity of the spectrum (as measured, e.g. ``velocity.measure(s)["rv_topo"]``).

    Returns
    -------
    specutils.Spectrum
        Same flux, uncertainty and mask; ``meta`` copied with a new ObsInfo noting the shift.
    """
    from specutils import Spectrum

    info = get_info(spectrum)
    unit = spectrum.spectral_axis.unit
    f = float(doppler_factor(rv))
    wvac = wavelength_in(spectrum, "vacuum") / f
    w = wvac if info.medium == "vacuum" else vacuum_to_air(wvac * u.AA).to_value(u.AA)
    meta = dict(spectrum.meta)
    new = info.copy()
    new.warn(f"shifted to rest by {u.Quantity(rv, u.km / u.s).value:.2f} km/s")
    meta[META_KEY] = new
    return Spectrum(flux=spectrum.flux, spectral_axis=(w * u.AA).to(unit, equivalencies=u.spectral()),
                    uncertainty=spectrum.uncertainty, mask=spectrum.mask, meta=meta)
