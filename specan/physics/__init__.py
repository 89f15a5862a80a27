"""From an MK type to physical quantities.

Effective temperature and absolute visual magnitude from the type and luminosity
class come from the published scales of :mod:`specan.mkscales` (re-exported here).

The rest, one module per concern:

- :mod:`.temperature`: a colour temperature from a Planck fit to continuum windows
  (:func:`colour_temperature`);
- :mod:`.distance`: spectroscopic distances as a mixture over the luminosity-class
  probabilities, with extinction (:func:`spectroscopic_distance`);
- :mod:`.motion`: Galactocentric space velocities (:func:`space_velocity`);
- :mod:`.photometry`: the per-object photometry file (:func:`load_photometry`);
- :mod:`.steps`: the steps of :func:`derive`, the one entry point combining them.
"""

from __future__ import annotations

from ..errors import AnalysisError
from ..frames import ESCAPE_SPEED, GALACTOCENTRIC_PARAMETERS
from ..mkscales import absolute_magnitude, load_scales, scale_range, teff_from_type
from . import steps
from .distance import spectroscopic_distance
from .motion import space_velocity
from .photometry import PHOTOMETRY_COLUMNS, load_photometry, photometry_for, photometry_from_header
from .steps import DERIVED_UNITS, PARALLAX_MIN_SNR
from .temperature import DEFAULT_WINDOWS, EXTINCTION_LAW, colour_temperature

__all__ = [
    "load_scales",
    "scale_range",
    "teff_from_type",
    "absolute_magnitude",
    "DEFAULT_WINDOWS",
    "colour_temperature",
    "spectroscopic_distance",
    "space_velocity",
    "ESCAPE_SPEED",
    "GALACTOCENTRIC_PARAMETERS",
    "PHOTOMETRY_COLUMNS",
    "load_photometry",
    "photometry_for",
    "photometry_from_header",
    "derive",
]


def derive(classification, velocity=None, photometry=None, spectrum=None, escape_speed=ESCAPE_SPEED, r_v=3.1):
    """Physical quantities of one star from its classification, velocity, photometry and spectrum.

    Parameters
    ----------
    classification : dict
        Result of :func:`specan.classify`: keys ``code`` (numeric type), ``subclass_err``,
        ``lumclass``, ``lumclass_prob`` (class -> probability), ...
    velocity : dict, optional
        Result of ``specan.velocity.measure``: ``rv``, ``rv_err`` (Quantity km/s), ``frame``, ...
    photometry : dict, optional
        One row of :func:`load_photometry` (``v``, ``v_err``, ``ebv``, ``ebv_err``,
        ``parallax``, ``pmra``, ``pmdec``, ``ra``, ``dec`` and errors; Quantities or
        plain numbers in mag, mas, mas/yr, deg).
    spectrum : specutils.Spectrum, optional
        For a colour temperature (only if its flux unit is a spectral flux density)
        and for the pointing when the photometry has no ra/dec.
    escape_speed : Quantity, optional
        For ``unbound_candidate`` (default 533 km/s, Piffl et al. 2014, from memory).
    r_v : float, optional
        A_V = r_v E(B-V) (3.1, common practice).

    Returns
    -------
    dict
        JSON-ready plain floats (units in the key names) or None where the inputs
        do not allow a value: ``teff_k``, ``teff_err_k`` (class-probability mixture
        of the type's Teff), ``teff_color_k``, ``teff_color_err_k``, ``m_v_abs``,
        ``m_v_abs_err`` (mixture from type and class; no photometry needed),
        ``a_v``, ``distance_pc``, ``distance_err_pc``, ``distance_lo_pc``,
        ``distance_hi_pc``, ``distance_parallax_pc``, ``v_total_kms``,
        ``v_total_err_kms``, ``v_tangential_kms``, ``unbound_basis``, ``flags``
        (list of str) and ``notes`` (list of str, one sentence each).
    """
    classification = classification or {}
    star, type_notes = steps.spectral_type(classification)
    from_type = steps.type_estimates(star, classification)                  # Teff, M_V
    ebv, ebv_err = steps.reddening(photometry)
    colour = steps.colour_temperature_of(spectrum, ebv, ebv_err, r_v)
    spectro = steps.spectroscopic_distance_of(photometry, star, ebv, ebv_err, r_v)
    plx, plx_err = steps.parallax(photometry)
    distance = steps.distance_for_motion(plx, plx_err, spectro.values)      # parallax if precise
    motion = steps.space_motion(photometry, velocity, steps.position(photometry, spectrum), distance, escape_speed)
    return steps.combine(type_notes, from_type, steps.extinction(ebv, r_v),
                         colour, steps.compare_temperatures(colour.values, from_type.values),
                         spectro, steps.compare_parallax(plx, plx_err, spectro.values), motion)
