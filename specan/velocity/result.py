"""The flags of a velocity measurement and the dict :func:`specan.velocity.measure` returns."""

from __future__ import annotations

import astropy.units as u
import numpy as np

from ..doppler import C_KMS
from .grid import kms_per_pixel

__all__ = ["velocity_flags", "assumption_flags", "medium_shift_kms", "result_dict", "RESULT_UNITS"]

#: Units of the result's velocities, for tables that must carry them even when every row is
#: missing one (``rv_err_mc`` unless asked for, ``medium_shift`` unless the medium was assumed).
RESULT_UNITS = {k: "km / s" for k in (
    "rv", "rv_err", "rv_topo", "bary_corr", "v_grf", "second_peak_rv", "rv_err_noise", "rv_err_template",
    "rv_err_mismatch", "rv_err_choice", "rv_err_zero_point", "rv_err_td", "rv_err_mc", "medium_shift",
    "ccf_fwhm")}


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


def medium_shift_kms(spectrum, info):
    """Velocity change (km/s) if the wavelengths were in the other medium than ``info.medium``.

    Negative when the file was read as air (vacuum wavelengths read as air look redder by the
    refractive index of air: their true velocity is lower), positive the other way round; the
    index at the spectrum's median wavelength (Morton 2000, via :mod:`specan.obsinfo`).
    """
    from ..obsinfo import air_vacuum_velocity_kms

    shift = air_vacuum_velocity_kms(float(np.median(spectrum.spectral_axis.to_value(u.AA))) * u.AA)
    return -shift if info.medium == "air" else shift


def assumption_flags(spectrum, info, notes):
    """Flags (and notes) for what the reader assumed that moves the velocity.

    ``medium_assumed``: the file did not state its wavelength medium (a vacuum spectrum read as
    air is ~83 km/s too positive); ``wavelength_zero_point_assumed``: no CRPIX1 (a reference
    pixel off by one shifts every wavelength by a pixel); ``wavelength_unit_assumed``: the unit
    was guessed (a wrong guess gives no sensible velocity at all).
    """
    flags = []
    if info.medium_assumed:
        other = "vacuum" if info.medium == "air" else "air"
        shift = medium_shift_kms(spectrum, info)
        flags.append("medium_assumed")
        notes.append(f"wavelength medium not stated: {info.medium} assumed; if the wavelengths are in {other}, "
                     f"the velocity is {abs(shift):.0f} km/s more {'negative' if shift < 0 else 'positive'} "
                     f"(set --medium {other})")
    warned = " ".join(info.warnings)
    if "CRPIX1 missing" in warned:
        w = spectrum.spectral_axis.to_value(u.AA)
        per_pixel = C_KMS * float(np.median(np.diff(w)) / np.median(w))
        flags.append("wavelength_zero_point_assumed")
        notes.append(f"no CRPIX1 in the file: reference pixel assumed; one pixel off moves the velocity by "
                     f"{per_pixel:.0f} km/s")
    if "wavelength unit" in warned and "guessed" in warned:
        flags.append("wavelength_unit_assumed")
        notes.append("wavelength unit guessed by the reader: if wrong the velocity is meaningless (set --wave-unit)")
    return flags


_KMS = u.km / u.s   # made once (composing a unit, then multiplying by it, costs ~20 us a value)


def _kms(value):
    """``value`` km/s as a Quantity (the same as ``value * u.km / u.s``, a quarter of the time)."""
    return u.Quantity(value, _KMS)


def _velocities(factor):
    """:func:`specan.doppler.velocity_from_factor`'s arithmetic on an array of 1 + z, as plain km/s (the same
    bits, without its unit composed and multiplied in: a third of the time)."""
    return (factor * factor - 1.0) / (factor * factor + 1.0) * C_KMS


def _kms_or_none(value):
    return None if value is None else _kms(value)


def _finite_or_none(value):
    return None if value is None or not np.isfinite(value) else float(value)


def result_dict(choice, peak, peaks, about, td, errors, budget, segments, companion, frames, flags, notes, step,
                spectrum):
    """The result of ``measure`` from its steps' outputs (see its Returns); velocities in km/s."""
    dvds = kms_per_pixel(peak.lag, step)
    members = []
    for member, pk in zip(choice.mixture, peaks):
        cand = member.candidate
        members.append({"name": member.template.name, "kind": None if cand is None else cand.kind,
                        "type": None if cand is None else f"{cand.sptype} {cand.lumclass}",
                        "weight": member.weight, "score": member.score,
                        "rv_offset": _kms((pk.lag - companion.primary) * abs(dvds))})
    from ..obsinfo import get_info

    sinfo = get_info(spectrum)
    return {
        "rv": _kms(frames.rv),
        "rv_err": _kms_or_none(_finite_or_none(budget.total)),
        "frame": "barycentric" if frames.f_bary is not None else "topocentric",
        "rv_topo": _kms(frames.rv_topo),
        "bary_corr": _kms_or_none(frames.bary_corr),
        "v_grf": _kms_or_none(frames.v_grf),
        "template": choice.template.name,
        "template_type": choice.mk,
        "template_kind": choice.kind,
        "templates": members,
        "ccf_height": peak.height,
        "flags": flags,
        "second_peak_rv": _kms_or_none(frames.second_rv),
        "rv_err_noise": _kms_or_none(_finite_or_none(budget.noise)),
        "rv_err_template": _kms_or_none(_finite_or_none(budget.template)),
        "rv_err_mismatch": _kms_or_none(_finite_or_none(budget.mismatch)),
        "rv_err_choice": _kms_or_none(_finite_or_none(budget.choice)),
        "rv_err_zero_point": _kms_or_none(_finite_or_none(budget.zero_point)),
        "birge_ratio": _finite_or_none(segments.birge),
        "n_segments": segments.n,
        "rv_err_td": _kms_or_none(errors.td),
        "rv_err_mc": _kms_or_none(errors.mc),
        "medium_assumed": bool(sinfo.medium_assumed),
        "medium_shift": _kms(medium_shift_kms(spectrum, sinfo)) if sinfo.medium_assumed else None,
        "notes": notes,
        "template_scores": choice.scores,
        "ccf_fwhm": _kms(about.fwhm_px * abs(dvds)) if np.isfinite(about.fwhm_px) else None,
        "r_td": td.r,
        "resolving_power": choice.power.value,
        "resolving_power_source": choice.power.source,
        "z_bary": None if frames.f_bary is None else frames.f_bary - 1.0,
        "ccf_velocity": _kms(_velocities(np.exp((peak.lag + about.j) * step) * frames.template_factor)),
        "ccf": about.values,
    }
