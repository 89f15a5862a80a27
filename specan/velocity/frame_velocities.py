"""From the measured shift to velocities: template velocity, barycentric, Galactic rest frame.

Shifts compose as Doppler factors (1 + z): the lag gives the spectrum's factor relative to the
template; a user template's own velocity is composed in (its barycentric velocity made
topocentric with its own correction when it has the metadata); the barycentric correction
``v_corr`` (astropy's ``SkyCoord.radial_velocity_correction``, defined so that redshifts
compose) enters as (1 + z_bary) = (1 + z_topo)(1 + v_corr/c). A velocity relative to a reference
exposure is made barycentric with both exposures' corrections.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import astropy.units as u

from .._offline import IERS_NOTE
from ..doppler import C_KMS, doppler_factor
from ..doppler import velocity_kms as _kms
from ..frames import (barycentric_correction, galactic_frame_note, missing_for_barycentric, pointing_direction,
                      sun_motion_toward_kms)

_KMS = u.km / u.s   # made once (composing a unit costs tens of microseconds)

__all__ = ["FrameVelocities", "template_factor", "barycentric_factor", "galactic_rest_frame", "apply_frames"]


def template_factor(template, relative, notes):
    """Doppler factor of a user template's own velocity, topocentric at its exposure (1 for none)."""
    factor = 1.0
    if template.rv_kms and not relative:
        factor = float(doppler_factor(template.rv_kms * u.km / u.s))
        tinfo = template.info
        if tinfo is not None and not missing_for_barycentric(tinfo):
            factor /= 1.0 + barycentric_correction(tinfo).value / C_KMS
        else:
            notes.append("template velocity taken as topocentric (template lacks time/site/pointing)")
    return factor


def barycentric_factor(f_topo, info, template, *, relative, barycentric, notes):
    """(v_corr km/s or None, barycentric Doppler factor or None) of a topocentric factor ``f_topo``.

    None when not asked for (``barycentric`` False) or when the metadata lack; a relative
    velocity also needs the reference exposure's (``template.info``).
    """
    bary = None
    missing = missing_for_barycentric(info)
    if barycentric and not missing:
        bary = barycentric_correction(info).value
        if relative:
            rinfo = template.info
            if rinfo is not None and not missing_for_barycentric(rinfo):
                f_b = f_topo * (1.0 + bary / C_KMS) / (1.0 + barycentric_correction(rinfo).value / C_KMS)
            else:
                f_b = None
                notes.append("reference exposure lacks time/site/pointing: relative velocity is topocentric")
        else:
            f_b = f_topo * (1.0 + bary / C_KMS)
        notes.append(IERS_NOTE)
    else:
        f_b = None
        if barycentric:
            notes.append("topocentric velocity only: missing " + "; ".join(missing))
    return bary, f_b


def galactic_rest_frame(rv, info, *, topocentric, high_velocity, escape_speed, notes):
    """(v_grf km/s, flags) of velocity ``rv`` (km/s) towards the pointing of ``info``; (None, ()) without one.

    ``topocentric``: ``rv`` lacks the barycentric correction (said in a note). The flags are
    ``high_velocity`` and ``unbound_candidate`` for |v_grf| above the two thresholds.
    """
    if info.ra_deg is None or info.dec_deg is None:
        notes.append("no Galactic rest-frame velocity: pointing unknown (header RA/DEC or --ra/--dec)")
        return None, ()
    v_grf = rv + sun_motion_toward_kms(pointing_direction(info))   # frames.galactic_rest_frame_velocity, in floats
    notes.append(galactic_frame_note())
    if topocentric:
        notes.append("v_grf from the topocentric velocity: uncertain by up to 30 km/s (Earth's orbit)")
    notes.append("v_grf is the line-of-sight component only: a lower bound on the star's Galactic speed")
    hv = u.Quantity(high_velocity, _KMS).value
    vesc = u.Quantity(escape_speed, _KMS).value
    flags = []
    if abs(v_grf) > hv:
        flags.append("high_velocity")
    if abs(v_grf) > vesc:
        flags.append("unbound_candidate")
        notes.append(f"|v_grf| exceeds the local escape speed {vesc:.0f} km/s (Piffl et al. 2014)")
    return v_grf, tuple(flags)


class FrameVelocities(NamedTuple):
    """The velocities (km/s) and Doppler factors of one measurement in the frames it can be had in.

    ``rv`` is barycentric when ``f_bary`` is not None, else topocentric; ``second_rv`` (a
    companion's, or None) is in the same frame; ``v_grf`` and ``grf_flags`` are those of
    :func:`galactic_rest_frame`, None and () when not computed.
    """

    template_factor: float
    f_topo: float
    rv_topo: float
    bary_corr: float | None
    f_bary: float | None
    rv: float
    second_rv: float | None
    v_grf: float | None
    grf_flags: tuple


def apply_frames(companion, step, template, info, *, relative, barycentric, high_velocity, escape_speed, notes):
    """:class:`FrameVelocities` of the lags of a :class:`~.companion.Companion` (grid ``step``)."""
    # velocities: shift -> topocentric (template's own velocity composed) -> barycentric
    t_factor = template_factor(template, relative, notes)
    f_topo = math.exp(companion.primary * step) * t_factor
    rv_topo = _kms(f_topo)
    bary, f_b = barycentric_factor(f_topo, info, template, relative=relative, barycentric=barycentric, notes=notes)
    rv = _kms(f_b) if f_b is not None else rv_topo
    second_rv = None
    if companion.second is not None:  # in the same frame as rv
        second_rv = _kms(math.exp(companion.second * step) * t_factor * (f_b / f_topo if f_b else 1.0))
    v_grf, grf_flags = None, ()
    if not relative:
        v_grf, grf_flags = galactic_rest_frame(rv, info, topocentric=f_b is None, high_velocity=high_velocity,
                                               escape_speed=escape_speed, notes=notes)
    return FrameVelocities(t_factor, f_topo, rv_topo, bary, f_b, rv, second_rv, v_grf, grf_flags)
