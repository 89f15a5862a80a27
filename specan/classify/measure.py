"""From a Spectrum to its classification criteria: rest frame, calibration resolution, S/N.

The criteria are measured the same way on the standards and on the star: shifted to
rest (the bands are 10-40 A wide), cut to the wavelengths the criteria use, smoothed
from the spectrum's own resolution to the calibration's FWHM, then measured with
:func:`specan.classify.criteria.measure_criteria`.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np

from ..doppler import doppler_factor
from ..errors import AnalysisError
from ..lines import estimate_resolving_power
from ..obsinfo import get_info, wavelength_in
from ..resolution import RestPixels, smooth_to_fwhm
from .criteria import criteria_span, measure_criteria

__all__ = ["spectrum_criteria", "snr_of"]

#: km/s, made once (``u.km / u.s`` makes a new composite unit at every call: 5 us each, measured)
_KMS = u.km / u.s


def spectrum_criteria(spectrum, resolution=4.5 * u.AA, rv=None, measure_velocity=True,
                      assume_resolution=None, resolving_power=None):
    """Measure the classification criteria of a spectrum in its rest frame at a given resolution.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum, normalised or not (only local ratios are used), in air or vacuum.
    resolution : astropy.units.Quantity
        FWHM (Angstrom) the criteria are measured at (the calibration's).
    rv : astropy.units.Quantity, optional
        Velocity to remove. If None and ``measure_velocity``, it is measured with
        :func:`specan.velocity.measure` (topocentric velocity, i.e. the shift seen in the data).
    measure_velocity : bool
        Measure the velocity when ``rv`` is not given.
    assume_resolution : astropy.units.Quantity, optional
        FWHM of the spectrum when its metadata do not give a resolving power.
        Default: the pixel size decides, see Notes.
    resolving_power : float, optional
        Resolving power already estimated from the narrowest lines (the velocity stage
        reports it), used when the metadata give none: saves estimating it again.

    Returns
    -------
    dict
        ``values`` and ``noise`` (ndarrays in :func:`criteria_names` order),
        ``snr``, ``rv`` (Quantity or None), ``notes`` (list of str), ``input_fwhm`` (A) or
        ``input_resolving_power`` (the resolution taken), ``pixels``: the whole spectrum at rest as
        :func:`specan.resolution.rest_pixels` gives it at ``rv`` (None where the axis is not
        strictly increasing; then make it with that function).

    Notes
    -----
    Without a resolving power in the metadata, it is estimated from the widths of
    the narrowest lines (:mod:`specan.lines`). Where that fails, a spectrum sampled
    at a quarter of the calibration's FWHM or coarser is taken to be at the
    calibration's resolution (low-resolution data like the standards), and a
    finer-sampled one is taken to be sampled at 2.5 pixels per FWHM. Each of these
    says so in ``notes``; give the resolving power to the reader to avoid them.
    """
    info = get_info(spectrum)
    fwhm_out = float(u.Quantity(resolution, u.AA).value)
    wave, flux, good = _usable_pixels(spectrum, info)
    snr = snr_of(spectrum, info)
    notes, lines_asked = [], False
    if rv is None and measure_velocity:
        rv, lines_r, lines_asked, notes = _measured_velocity(spectrum, info)
        resolving_power = lines_r if resolving_power is None else resolving_power
    wave, rv = _to_rest(wave, rv)
    # the whole spectrum at rest is what rest_pixels(spectrum, rv) makes for the parameter model and the
    # library comparison: the same wavelength conversion, velocity division and mask (where the axis is
    # strictly increasing, as rest_pixels then leaves it): handed on instead of made again
    pixels = RestPixels(wave, flux, good) if np.all(wave[1:] > wave[:-1]) else None
    wave, flux, good = _near_criteria(wave, flux, good, margin=10.0 * fwhm_out)
    pixel = float(np.median(np.diff(wave)))
    fwhm_in, note = _input_fwhm(spectrum, info, wave, pixel, fwhm_out, assume_resolution,
                                resolving_power, lines_asked)
    grid, fs, gs = smooth_to_fwhm(wave, flux, good, fwhm_in, fwhm_out)
    values, noise = measure_criteria(grid, fs, ~gs, snr=snr, pixel=pixel)
    constant = np.ndim(fwhm_in) == 0
    return {"values": values, "noise": noise, "snr": snr,
            "rv": None if rv is None else u.Quantity(rv, _KMS), "notes": notes + note,
            "input_fwhm": float(fwhm_in) if constant else None,
            "input_resolving_power": None if constant else float(np.median(wave / fwhm_in)),
            "pixels": pixels}


def _usable_pixels(spectrum, info):
    """Air wavelengths (increasing), flux and good-pixel mask; at least 20 good pixels or AnalysisError."""
    wave = wavelength_in(spectrum, "air")
    flux = np.asarray(spectrum.flux.value, float)
    good = np.isfinite(flux) & np.isfinite(wave)
    if spectrum.mask is not None:
        good &= ~np.asarray(spectrum.mask, bool)
    if wave[0] > wave[-1]:
        wave, flux, good = wave[::-1], flux[::-1], good[::-1]
    if good.sum() < 20:
        raise AnalysisError("fewer than 20 usable pixels: cannot classify", info.path)
    return wave, flux, good


def snr_of(spectrum, info):
    """S/N per pixel: the carried value, else DER_SNR (Stoehr et al. 2008) via specutils.

    Returns None when neither gives a positive finite value.
    """
    if info.snr is not None and np.isfinite(info.snr) and info.snr > 0:
        return float(info.snr)
    import warnings

    from specutils.analysis import snr_derived

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)   # 0/0 on a flat or empty spectrum
            value = float(snr_derived(spectrum))
    except Exception:  # noqa: BLE001 - a failed S/N estimate only drops the noise term
        return None
    return value if np.isfinite(value) and value > 0 else None


def _measured_velocity(spectrum, info):
    """Velocity seen in the data, measured by the velocity stage.

    Returns ``(rv, resolving_power, lines_asked, notes)``: the topocentric velocity
    (None if not measured), the resolving power the stage estimated from the
    narrowest lines (None if it had it from elsewhere), whether the narrowest lines
    were asked for it already (so they need not be asked again), and notes on failure.
    """
    try:
        from .. import velocity

        vres = velocity.measure(spectrum, errors="td", barycentric=False)
    except ImportError:
        return None, None, False, ["velocity stage not available: criteria measured in the observed frame"]
    except Exception as exc:  # noqa: BLE001 - classification can go on in the observed frame
        return None, None, False, [f"velocity not measured ({exc}): criteria measured in the observed frame"]
    # without R in the metadata the velocity stage has asked the narrowest lines already
    lines_asked = not info.resolving_power
    lines_r = vres["resolving_power"] if vres.get("resolving_power_source") == "narrowest lines" else None
    rv = vres.get("rv_topo")
    if rv is None:
        rv = vres.get("rv")
    return rv, lines_r, lines_asked, []


def _to_rest(wave, rv):
    """Wavelengths with the velocity ``rv`` removed, and ``rv`` (None when absent or not finite).

    Criteria bands are 10-40 A wide, so a shift of 1000 km/s (13 A at 4000 A) would move
    features out of their bands.
    """
    if rv is None:
        return wave, None
    v = float(u.Quantity(rv, _KMS).value)
    if not np.isfinite(v):
        return wave, None
    # the air/vacuum distinction of the factor is below 3e-4 of the shift, negligible here
    return wave / doppler_factor(u.Quantity(v, _KMS)), rv


def _near_criteria(wave, flux, good, margin):
    """Only the wavelengths the criteria use, and ``margin`` (Angstrom) beside them for the smoothing.

    The pixel size and the smoothing grid come from medians, which a spectrum reaching far
    outside (a model from the ultraviolet to the infrared, measured) would set from pixels
    nowhere near the bands. Left whole when fewer than 20 good pixels would remain.
    """
    lo, hi = criteria_span()
    near = (wave >= lo - margin) & (wave <= hi + margin)
    if (good & near).sum() >= 20 and not near.all():
        first, last = np.flatnonzero(near)[[0, -1]]
        wave, flux, good = wave[first:last + 1], flux[first:last + 1], good[first:last + 1]
    return wave, flux, good


def _input_fwhm(spectrum, info, wave, pixel, fwhm_out, assume_resolution, resolving_power, lines_asked):
    """FWHM (Angstrom, scalar or per pixel) of the input, and the notes saying how it was found.

    In order: the metadata's resolving power, ``assume_resolution``, a resolving power
    from the narrowest lines (given, or estimated here unless ``lines_asked``), else
    from the pixel size (see :func:`spectrum_criteria`).
    """
    if info.resolving_power:
        return wave / float(info.resolving_power), []
    if assume_resolution is not None:
        return float(u.Quantity(assume_resolution, u.AA).value), []
    r_est = resolving_power or (None if lines_asked else estimate_resolving_power(spectrum))
    if r_est is not None:
        return wave / r_est, [f"resolving power unknown: R ~ {r_est:.0f} estimated from the narrowest lines "
                              "(give the resolving power to the reader to avoid the estimate)"]
    if pixel >= fwhm_out / 4.0:
        return fwhm_out, [f"resolving power unknown: assumed already at the calibration's {fwhm_out:g} A FWHM"]
    return 2.5 * pixel, [f"resolving power unknown: assumed 2.5 pixels per resolution element ({2.5 * pixel:.2g} A)"]
