"""The steps of :func:`specan.physics.derive`, each a function of explicit inputs.

A step takes what it needs (the classification, a photometry row, the spectrum, or
values an earlier step found) and returns :class:`Findings`: JSON-ready plain floats
under the keys of :data:`RECORD_KEYS` (units in the key names, see
:data:`DERIVED_UNITS`), flags and one-sentence notes. :func:`combine` merges the
findings, in order, into the one dict ``derive`` returns.
"""

from __future__ import annotations

import math
from types import MappingProxyType
from typing import NamedTuple

import astropy.units as u

from ..errors import AnalysisError
from ..frames import GALACTOCENTRIC_PARAMETERS
from ..mkscales import absolute_magnitude, lumclass_number, teff_from_type
from ._values import value_of
from .distance import mixture_moments, normalise_class_probs, spectroscopic_distance
from .motion import space_velocity
from .temperature import colour_temperature, is_flux_density

__all__ = [
    "PARALLAX_MIN_SNR", "DERIVED_UNITS", "RECORD_KEYS", "Findings", "SpectralType", "Distance",
    "spectral_type", "type_estimates", "reddening", "extinction", "colour_temperature_of",
    "compare_temperatures", "spectroscopic_distance_of", "parallax", "compare_parallax",
    "distance_for_motion", "position", "space_motion", "combine",
]

_KMS = u.km / u.s
_MASYR = u.mas / u.yr

#: Parallax precision from which the parallax distance (1/parallax) is preferred over the
#: spectroscopic one for space velocities (common practice: 1/plx is unbiased enough at >5 sigma).
PARALLAX_MIN_SNR = 5.0

#: Units of the plain floats :func:`derive` returns (their keys also carry them: ``_k``, ``_pc``...).
DERIVED_UNITS = {
    "teff_k": "K", "teff_err_k": "K", "teff_color_k": "K", "teff_color_err_k": "K",
    "m_v_abs": "mag", "m_v_abs_err": "mag", "a_v": "mag",
    "distance_pc": "pc", "distance_err_pc": "pc", "distance_lo_pc": "pc", "distance_hi_pc": "pc",
    "distance_parallax_pc": "pc",
    "v_total_kms": "km / s", "v_total_err_kms": "km / s", "v_tangential_kms": "km / s",
}

#: Keys of the dict :func:`derive` returns, in order, before ``flags`` and ``notes``; None until a step sets them.
RECORD_KEYS = (
    "teff_k", "teff_err_k", "teff_color_k", "teff_color_err_k", "m_v_abs", "m_v_abs_err", "a_v",
    "distance_pc", "distance_err_pc", "distance_lo_pc", "distance_hi_pc", "distance_parallax_pc",
    "distance_source", "v_total_kms", "v_total_err_kms", "v_tangential_kms", "p_unbound", "unbound_basis")


class Findings(NamedTuple):
    """What one step found: values (keys of :data:`RECORD_KEYS`), flags and notes."""

    values: dict = MappingProxyType({})
    flags: tuple = ()
    notes: tuple = ()


class SpectralType(NamedTuple):
    """The classification as the steps use it: type code, its error (subclasses), class probabilities."""

    code: float | None
    code_err: float | None
    probs: dict | None   # class number -> probability, or None when the class is unknown


class Distance(NamedTuple):
    """The distance a space velocity uses: value and error (pc) and where it came from."""

    pc: float
    err_pc: float | None
    source: str


def _class_probs(classification):
    """(class number -> probability, or None; notes) from ``lumclass_prob``, else ``lumclass``."""
    notes = []
    probs = classification.get("lumclass_prob")
    if probs:
        try:
            return normalise_class_probs(probs), notes
        except ValueError as err:
            notes.append(f"lumclass_prob unusable ({err}); using lumclass")
    lum = classification.get("lumclass")
    if lum:
        try:
            return {lumclass_number(lum): 1.0}, notes
        except ValueError:
            notes.append(f"luminosity class {lum!r} not understood")
    return None, notes


def spectral_type(classification):
    """The type code, its error and the class probabilities of a classification dict.

    Parameters
    ----------
    classification : dict
        Result of :func:`specan.classify` (``code``, ``subclass_err``, ``lumclass``, ``lumclass_prob``).

    Returns
    -------
    SpectralType, Findings
        The findings carry only notes (a missing subclass error, an unusable class).
    """
    code = value_of(classification, "code")
    code_err = value_of(classification, "subclass_err")
    notes = []
    if code is not None and code_err is None:
        code_err = 0.0
        notes.append("no subclass error given: Teff and M_V carry the scales' scatter only")
    probs = None
    if code is not None:
        probs, class_notes = _class_probs(classification)
        notes += class_notes
    return SpectralType(code, code_err, probs), Findings(notes=tuple(notes))


def type_estimates(star, classification):
    """Teff and M_V from the type: mixtures over the class probabilities.

    Parameters
    ----------
    star : SpectralType
    classification : dict
        Its ``teff``/``teff_err``, when both are given, are used as they are.

    Returns
    -------
    Findings
        ``teff_k``, ``teff_err_k``, and ``m_v_abs``, ``m_v_abs_err`` when the class is known.
    """
    if star.code is None:
        return Findings(notes=("no spectral type: no Teff, M_V or distance",))
    notes = []
    mix = star.probs or {5: 1.0}
    if star.probs is None:
        notes.append("luminosity class unknown: Teff from the dwarf scale, no M_V or distance")
    w = list(mix.values())
    values = {}
    given = value_of(classification, "teff", u.K), value_of(classification, "teff_err", u.K)
    if None not in given:
        # specan.classify already gives this same class-probability mixture of the scales
        values["teff_k"], values["teff_err_k"] = given
    else:
        t, te = zip(*[(a.to_value(u.K), b.to_value(u.K))
                      for a, b in (teff_from_type(star.code, n, star.code_err) for n in mix)])
        values["teff_k"], values["teff_err_k"] = mixture_moments(w, t, te)
    if star.probs is not None:
        mv = [absolute_magnitude(star.code, n, star.code_err) for n in star.probs]
        values["m_v_abs"], values["m_v_abs_err"] = mixture_moments(w, [a.to_value(u.mag) for a, _ in mv],
                                                                   [b.to_value(u.mag) for _, b in mv])
    return Findings(values, notes=tuple(notes))


def reddening(photometry):
    """(E(B-V) or None, its error or 0) in mag, from a photometry row."""
    return value_of(photometry, "ebv", u.mag), value_of(photometry, "ebv_err", u.mag) or 0.0


def extinction(ebv, r_v):
    """``a_v`` = r_v E(B-V) when E(B-V) is known."""
    return Findings({"a_v": r_v * ebv}) if ebv is not None else Findings()


def colour_temperature_of(spectrum, ebv, ebv_err, r_v):
    """``teff_color_k`` and its error, for a flux-calibrated spectrum (see :func:`colour_temperature`).

    A spectrum without a calibrated flux unit, or one whose fit fails, gives a note instead.
    """
    if spectrum is None:
        return Findings()
    unit = spectrum.flux.unit
    if not is_flux_density(unit):
        return Findings(notes=(f"flux unit '{unit}' is not a calibrated flux density: no colour temperature",))
    try:
        tc, tce = colour_temperature(spectrum, ebv=ebv or 0.0, ebv_err=ebv_err, r_v=r_v)
    except AnalysisError as err:
        return Findings(notes=(f"no colour temperature: {err.reason}",))
    notes = () if ebv is not None else ("colour temperature not corrected for reddening (no E(B-V))",)
    return Findings({"teff_color_k": float(tc.to_value(u.K)), "teff_color_err_k": float(tce.to_value(u.K))},
                    notes=notes)


def compare_temperatures(colour, from_type):
    """Flag ``teff_colour_disagrees`` when the colour temperature and the type's Teff disagree.

    Parameters
    ----------
    colour, from_type : dict
        Values of :func:`colour_temperature_of` and :func:`type_estimates`.
    """
    tc, ts = colour.get("teff_color_k"), from_type.get("teff_k")
    if tc is None or ts is None:
        return Findings()
    comb = math.hypot(colour.get("teff_color_err_k") or 0.0, from_type.get("teff_err_k") or 0.0)
    # Disagree: more than 2 combined sigma AND more than 10 per cent apart (our convention).
    if not (abs(tc - ts) > 2 * comb and abs(tc - ts) > 0.1 * ts):
        return Findings()
    why = ("reddening not (fully) corrected or flux calibration too red" if tc < ts
           else "reddening over-corrected or flux calibration too blue")
    if tc > ts and ts > 7500:
        # Measured on the JHC (1984) library: A stars' optical colour temperatures run 1.2-3x Teff.
        why += ("; for A and hotter stars the optical (Paschen) continuum is steeper than a "
                "Planck curve at Teff, so a higher colour temperature is expected")
    return Findings(flags=("teff_colour_disagrees",),
                    notes=(f"colour temperature {tc:.0f} K vs {ts:.0f} K from the type: {why}?",))


def spectroscopic_distance_of(photometry, star, ebv, ebv_err, r_v):
    """Distance from V, the type and the class probabilities (see :func:`spectroscopic_distance`).

    Returns
    -------
    Findings
        ``distance_pc``, its error and 16th/84th percentiles, ``a_v`` and
        ``distance_source``; only notes without a V magnitude, type or class.
    """
    v = value_of(photometry, "v", u.mag)
    notes = ("no V magnitude in the photometry: no distance",) if photometry and v is None else ()
    if v is None or star.code is None or star.probs is None:
        return Findings(notes=notes)
    res = spectroscopic_distance(v, value_of(photometry, "v_err", u.mag) or 0.0, star.code, star.code_err,
                                 star.probs, ebv=ebv, ebv_err=ebv_err, r_v=r_v)
    values = {
        "distance_pc": float(res["distance"].to_value(u.pc)),
        "distance_err_pc": float(res["distance_err"].to_value(u.pc)),
        "distance_lo_pc": float(res["distance_lo"].to_value(u.pc)),
        "distance_hi_pc": float(res["distance_hi"].to_value(u.pc)),
        "a_v": float(res["a_v"].to_value(u.mag)),
        "distance_source": "spectroscopic",
    }
    return Findings(values, notes=notes + tuple(res["notes"]))


def parallax(photometry):
    """(parallax, its error) in mas from a photometry row; None where not given."""
    return value_of(photometry, "parallax", u.mas), value_of(photometry, "parallax_err", u.mas)


def compare_parallax(plx, plx_err, spectro):
    """``distance_parallax_pc`` (1/parallax), flagged when it disagrees with the spectroscopic distance.

    Parameters
    ----------
    plx, plx_err : float or None
        Parallax and error (mas).
    spectro : dict
        Values of :func:`spectroscopic_distance_of`.
    """
    if plx is None or not plx > 0:
        return Findings()
    values = {"distance_parallax_pc": 1000.0 / plx}
    d, d_err = spectro.get("distance_pc"), spectro.get("distance_err_pc")
    if d is None or not plx_err:
        return Findings(values)
    # Compare in parallax space, where the parallax error is Gaussian.
    spec_plx = 1000.0 / d
    spec_plx_err = spec_plx * d_err / d
    if abs(plx - spec_plx) <= 3 * math.hypot(plx_err, spec_plx_err):
        return Findings(values)
    return Findings(values, flags=("distance_parallax_disagree",),
                    notes=(f"spectroscopic distance {d:.0f} pc disagrees with parallax "
                           f"{plx:.3f} +- {plx_err:.3f} mas: check the class, photometry or binarity",))


def distance_for_motion(plx, plx_err, spectro):
    """The parallax distance when the parallax is precise (:data:`PARALLAX_MIN_SNR`), else the spectroscopic one.

    Returns
    -------
    Distance or None
    """
    if plx is not None and plx > 0 and plx_err is not None and plx_err > 0 and plx / plx_err >= PARALLAX_MIN_SNR:
        return Distance(1000.0 / plx, 1000.0 * plx_err / plx**2, "parallax")
    if spectro.get("distance_pc") is not None:
        return Distance(spectro["distance_pc"], spectro["distance_err_pc"], "spectroscopic")
    return None


def position(photometry, spectrum):
    """(ra, dec) in degrees from the photometry row, else from the spectrum's pointing; None where unknown."""
    ra, dec = value_of(photometry, "ra", u.deg), value_of(photometry, "dec", u.deg)
    if (ra is None or dec is None) and spectrum is not None:
        from ..obsinfo import get_info

        info = get_info(spectrum)
        if info.ra_deg is not None and info.dec_deg is not None:
            c = info.coord.icrs
            ra, dec = float(c.ra.deg), float(c.dec.deg)
    return ra, dec


def _optional(value, unit):
    """``value * unit``, or None for None."""
    return None if value is None else value * unit


def space_motion(photometry, velocity, ra_dec, distance, escape_speed):
    """Total Galactic rest-frame speed and the unbound assessment (see :func:`space_velocity`).

    Parameters
    ----------
    photometry : dict or None
        Proper motions (``pmra``, ``pmdec``) and their errors.
    velocity : dict or None
        ``rv``, ``rv_err`` and ``frame`` of the velocity stage.
    ra_dec : (float or None, float or None)
        Position in degrees (:func:`position`).
    distance : Distance or None
    escape_speed : Quantity

    Returns
    -------
    Findings
        ``v_total_kms``, its error, ``v_tangential_kms``, ``p_unbound``, ``unbound_basis``
        and the ``unbound_candidate`` flag; only a note when an input is missing.
    """
    pmra, pmdec = value_of(photometry, "pmra", _MASYR), value_of(photometry, "pmdec", _MASYR)
    rv = value_of(velocity, "rv", _KMS)
    ra, dec = ra_dec
    missing = [name for name, val in (("proper motion", pmra if pmdec is not None else None),
                                      ("distance", distance), ("radial velocity", rv),
                                      ("position", ra if dec is not None else None)) if val is None]
    if missing:
        return Findings(notes=("no total space velocity (missing: " + ", ".join(missing) + "); "
                               "any unbound flag from the velocity stage rests on the radial velocity alone",))
    notes, flags = [], []
    frame = (velocity or {}).get("frame")
    if frame and str(frame).lower() not in ("barycentric", "heliocentric"):
        notes.append(f"radial velocity is {frame}, used as heliocentric for the space velocity")
    sv = space_velocity(
        ra * u.deg, dec * u.deg, distance.pc * u.pc, pmra * _MASYR, pmdec * _MASYR, rv * _KMS,
        distance_err=distance.err_pc * u.pc if distance.err_pc else None,
        pmra_err=_optional(value_of(photometry, "pmra_err", _MASYR), _MASYR),
        pmdec_err=_optional(value_of(photometry, "pmdec_err", _MASYR), _MASYR),
        rv_err=_optional(value_of(velocity, "rv_err", _KMS), _KMS),
        escape_speed=escape_speed)
    values = {
        "v_total_kms": float(sv["v_total"].to_value(_KMS)),
        "v_tangential_kms": float(sv["v_tangential"].to_value(_KMS)),
        "v_total_err_kms": None if sv["v_total_err"] is None else float(sv["v_total_err"].to_value(_KMS)),
        "p_unbound": sv["p_unbound"],
        "unbound_basis": sv["unbound_basis"],
    }
    notes.append(f"space velocity with the {distance.source} distance; {GALACTOCENTRIC_PARAMETERS}")
    if sv["unbound_candidate"]:
        flags.append("unbound_candidate")
        notes.append(f"unbound_candidate: total Galactic rest-frame speed {values['v_total_kms']:.0f} km/s "
                     f"exceeds the escape speed {sv['escape_speed'].to_value(_KMS):.0f} km/s")
    return Findings(values, flags=tuple(flags), notes=tuple(notes))


def combine(*findings):
    """One dict of :data:`RECORD_KEYS` (None where no step set them), ``flags`` and ``notes``.

    Later findings override earlier values of the same key; flags and notes keep their order.
    """
    out = {key: None for key in RECORD_KEYS}
    flags, notes = [], []
    out["flags"], out["notes"] = flags, notes
    for part in findings:
        out.update(part.values)
        flags.extend(part.flags)
        notes.extend(part.notes)
    return out
