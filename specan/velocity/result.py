"""The flags of a velocity measurement and the dict :func:`specan.velocity.measure` returns."""

from __future__ import annotations

import astropy.units as u
import numpy as np

from ..doppler import velocity_from_factor
from .grid import kms_per_pixel

__all__ = ["velocity_flags", "result_dict"]


def velocity_flags(relative, companion, frames, vmax_kms, height, notes):
    """The flags, in their fixed order, of a measurement (notes for the search limit and the convention).

    ``companion`` is the :class:`~.companion.Companion`, ``frames`` the
    :class:`~.frame_velocities.FrameVelocities`, ``height`` the normalised peak height.
    """
    flags = ["relative"] if relative else []
    if companion.second is not None:
        flags.append("composite")
    if frames.f_bary is None:
        flags.append("no_barycentric")
    flags += frames.grf_flags
    if abs(frames.rv_topo) > 0.95 * vmax_kms:
        flags.append("at_search_limit")
        notes.append(f"peak at the edge of the +-{vmax_kms:.0f} km/s search range: increase vmax")
    if height < 0.2:  # our own threshold on the normalised peak height, not a published value
        flags.append("weak_correlation")
    notes.append("velocities are relativistic Doppler velocities; 1+z composed multiplicatively")
    return flags


def _kms_or_none(value):
    return None if value is None else value * (u.km / u.s)


def result_dict(choice, peak, about, td, errors, rv_err, companion, frames, flags, notes, step):
    """The result of ``measure`` from its steps' outputs (see its Returns); velocities in km/s."""
    kms = u.km / u.s
    dvds = kms_per_pixel(peak.lag, step)
    return {
        "rv": frames.rv * kms,
        "rv_err": _kms_or_none(rv_err),
        "frame": "barycentric" if frames.f_bary is not None else "topocentric",
        "rv_topo": frames.rv_topo * kms,
        "bary_corr": _kms_or_none(frames.bary_corr),
        "v_grf": _kms_or_none(frames.v_grf),
        "template": choice.template.name,
        "template_type": choice.mk,
        "template_kind": choice.kind,
        "ccf_height": peak.height,
        "flags": flags,
        "second_peak_rv": _kms_or_none(frames.second_rv),
        "rv_err_td": _kms_or_none(errors.td),
        "rv_err_mc": _kms_or_none(errors.mc),
        "notes": notes,
        "template_scores": choice.scores,
        "ccf_fwhm": about.fwhm_px * abs(dvds) * kms if np.isfinite(about.fwhm_px) else None,
        "r_td": td.r,
        "resolving_power": choice.power.value,
        "resolving_power_source": choice.power.source,
        "z_bary": None if frames.f_bary is None else frames.f_bary - 1.0,
        "ccf_velocity": velocity_from_factor(np.exp((companion.primary + about.j) * step) * frames.template_factor),
        "ccf": about.values,
    }
