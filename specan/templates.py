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

  Zero points. The library's stars were put at rest in the library's own frame (good to "a few
  km/s", its README), and each template keeps its median member's frame. Every template is
  therefore given a zero point against laboratory wavelengths when the file is built
  (:func:`measure_zero_point`), stored in the file's ``zero_point_kms`` column (the template's
  lines sit that far redward of their laboratory air wavelengths) and taken out here, when a
  template is put on a grid: the flux arrays in the file stay as the library gave them. The
  measurement: centres of the strong lines of the line list that no listed line of comparable
  strength crowds (Gaussian fits), each against the same fit to specan's synthetic spectrum of the
  template's type at the library's resolution, whose lines sit at their laboratory (NIST ASD)
  wavelengths, so that listed neighbours pull both fits alike; the median over the lines. Blends
  with lines the list lacks remain and dominate the error (single lines scatter by 10-30 km/s
  at 2.5 A FWHM). The check, from other information: the template cross-correlated against the
  same synthetic spectrum in twelve wavelength segments, Balmer lines masked, median. Each median's
  error is its Maritz-Jarrett standard error (distribution-free: the offsets are heavy-tailed).
  The stored ``zero_point_err_kms`` is the lines' error times the library's Birge ratio of the two
  methods over all templates (:func:`library_birge`, in the file's header ``ZPBIRGE``: 1.06 from
  35 templates, chi^2/n 1.12). The two methods are not averaged: the check reads 7.0 +- 1.9 km/s
  below the lines on average over the templates (weighted mean, measured), a systematic between
  them larger than the check's weight could average away, and its errors are 2-5x the lines'.
  A group with
  fewer than ``ZP_MIN_LINES`` usable lines would keep the library's frame (zero point 0),
  uncertain by the rms of the measured groups' zero points; the 35 groups have 13-60 lines each
  (B and A stars the fewest: mostly He I, Si II, Mg II, Ti II; the metal-poor groups 41-57).
  Real stars' lines carry gravitational redshift and convective blueshift (about +0.6 and -0.3
  km/s for the Sun, # from memory); the laboratory scale removes them from the template, so
  velocities measured with it include the star's own.
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
from .contents import forgettable
from .doppler import C_KMS, doppler_factor
from .obsinfo import vacuum_to_air
from .resolution import FWHM_TO_SIGMA, smooth_to_fwhm

__all__ = ["KINDS", "LIBRARY_FILE", "LibraryTemplate", "ZeroPoint", "automatic_types", "library_templates",
           "library_birge", "library_coverage", "library_fwhm", "measure_zero_point", "on_log_grid", "zero_point_error", "zero_point_lines",
           "ZP_MIN_LINES"]

#: The kinds of built-in template, by the name the velocity stage asks for.
KINDS = ("library", "synth", "mask")
#: The packaged library templates (see the module docstring).
LIBRARY_FILE = "templates_miles.fits"


def automatic_types():
    """(sptype, lumclass) pairs of the synthetic grid tried by the automatic choice, O to M."""
    return tuple(synth.TEMPLATE_TYPES)


class LibraryTemplate(NamedTuple):
    """One library template: its name, nominal MK type, members, median parameters, and its zero point
    against laboratory wavelengths with that zero point's error (km/s; see the module docstring)."""

    name: str
    sptype: str
    lumclass: str
    n_stars: int
    teff_k: float
    logg: float
    feh: float
    zero_point_err_kms: float
    zero_point_kms: float = 0.0


@forgettable
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
                                    float(r["zero_point_err_kms"]),
                                    float(r["zero_point_kms"]) if "zero_point_kms" in table.colnames else 0.0)
                    for r in table)
    return wave, flux, fwhm, entries


def library_templates():
    """The library templates (:class:`LibraryTemplate`), in file order."""
    return _library()[3]


def library_fwhm():
    """FWHM in Angstrom of the library templates' line profile (the same at every wavelength)."""
    return _library()[2]


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
    """(flux, valid) of library template ``index`` on a vacuum ln-lambda grid at ``resolving_power``,
    its zero point taken out (the module docstring)."""
    wave, fluxes, fwhm, entries = _library()
    zp = entries[index].zero_point_kms
    # the template's lines sit at lab * D(zp): reading it at lambda * D(zp) puts them at lab
    factor = float(doppler_factor(zp * u.km / u.s)) if zp else 1.0
    return _resampled(wave, fluxes[index], fwhm, grid, resolving_power, factor)


def _resampled(wave, f, fwhm, grid, resolving_power, factor=1.0):
    """(flux, valid) of a template given on air wavelengths ``wave`` (A) at a FWHM ``fwhm`` (A), on a
    vacuum ln-lambda grid at ``resolving_power``, read at air wavelength x ``factor``."""
    good = np.isfinite(f)
    first, last = np.flatnonzero(good)[[0, -1]]
    wave, f, good = wave[first:last + 1], f[first:last + 1], good[first:last + 1]
    if resolving_power:
        # sharper than the spectrum: Gaussian to the spectrum's FWHM (lambda / R) at every wavelength
        on, smoothed, _ = smooth_to_fwhm(wave, np.where(good, f, 1.0), good, fwhm, wave / float(resolving_power))
        f = np.interp(wave, on, smoothed)
    w_air = vacuum_to_air(np.exp(grid) * u.AA).to_value(u.AA)
    if factor != 1.0:
        w_air = w_air * factor
    inside = (w_air >= wave[0]) & (w_air <= wave[-1])
    flux = np.ones(grid.size)
    flux[inside] = make_interp_spline(wave, np.where(good, f, 1.0), k=3)(w_air[inside])
    bad = np.interp(w_air, wave, (~good).astype(float), left=1.0, right=1.0) > 1e-6
    return flux, inside & ~bad


# ---------------------------------------------------------------------------------------------
# Zero points against laboratory wavelengths (used by scripts/build_library_templates.py)
# ---------------------------------------------------------------------------------------------
#: Fewest usable lines for a measured zero point (our choice: the median of fewer lines, each
#: off by 10-30 km/s through blends, is no better than the library's own frame).
ZP_MIN_LINES = 10
#: Line selection (our choice): model equivalent width at least this (A) for the type ...
ZP_MIN_STRENGTH = 0.15
#: ... and no other listed atomic line within ZP_CROWD_AA stronger than ZP_CROWD_RATIO of it.
ZP_CROWD_AA = 3.5
ZP_CROWD_RATIO = 0.25
#: Half-width (A) of the fitted window about each line (about 1.2 FWHM at 2.5 A).
ZP_HALF_WINDOW_AA = 3.0
#: Segment check: resolving power both spectra are put at (the library's 2.5 A at 3750 A, so that
#: neither is sharper anywhere in 3700-7350 A), ln-lambda step (3 km/s), number of segments.
ZP_CHECK_R = 1500.0
ZP_CHECK_STEP = 1e-5
ZP_CHECK_SEGMENTS = 12
#: Balmer lines masked in the segment check (their ids in the stellar line list, which gives their air
#: wavelengths), with their pressure wings: half-width (A) for stars earlier than F5 and for the rest
#: (# common practice: the wings' reach, roughly)
ZP_BALMER_IDS = ("H_alpha", "H_beta", "H_gamma", "H_delta", "H_epsilon", "H_8", "H_9", "H_10", "H_11", "H_12")
ZP_BALMER_HALF_AA = (60.0, 25.0)


class ZeroPoint(NamedTuple):
    """A template's zero point against laboratory wavelengths, km/s (positive: lines redward).

    ``lines_kms``, ``lines_err_kms``, ``n_lines``: median over line centres and its standard
    error; ``lines``: (line id, air wavelength A, offset km/s) of each line used; ``check_kms``,
    ``check_err_kms``, ``n_segments``: the segment cross-correlation against the synthetic spectrum.
    """

    lines_kms: float
    lines_err_kms: float
    n_lines: int
    lines: tuple
    check_kms: float
    check_err_kms: float
    n_segments: int


def zero_point_error(zero_point, scale=1.0):
    """Error (km/s) of a :class:`ZeroPoint`'s line value: the median's standard error
    (:func:`_median_and_error`) times ``scale``, the library's Birge ratio (:func:`library_birge`).

    Before, a template's own Birge ratio |lines - check| / sqrt(err_lines^2 + err_check^2) scaled it
    where above 1: with one degree of freedom that ratio is mostly its own noise (it exceeds 1 a third
    of the time for errors that are right), and the library's 35 pairs measure it far better together.
    """
    return zero_point.lines_err_kms * float(scale)


def library_birge(points):
    """Birge ratio sqrt(max(1, chi^2 / n)) of the two zero-point methods' disagreement over the
    templates (:class:`ZeroPoint` ``points`` whose check is finite), and the number n of them.

    chi^2 = sum (lines - check)^2 / (err_lines^2 + err_check^2): the two methods see different pixels
    (line centres; whole segments, blends included) against one synthetic spectrum, so for errors
    that hold chi^2 / n is about 1 (Birge 1932: a larger one scales the errors). Their shared part
    (the synthetic spectrum's line list) does not show in it.
    """
    z = [p for p in points if np.isfinite(p.check_kms) and np.isfinite(p.lines_kms)]
    if not z:
        return 1.0, 0
    chi2 = sum((p.lines_kms - p.check_kms) ** 2 / (p.lines_err_kms ** 2 + p.check_err_kms ** 2) for p in z)
    return math.sqrt(max(1.0, chi2 / len(z))), len(z)


def _median_and_error(values):
    """(median, its Maritz-Jarrett standard error, n); NaN below 3.

    The single lines' offsets are heavy-tailed (blends move single lines by 10-90 km/s), where
    1.2533 sd / sqrt(n) (the normal distribution's, used before) is set by the tails the median
    ignores: about 5 km/s for the solar types against 3.2-3.3 from a bootstrap of the median
    (measured). The Maritz & Jarrett (1978) estimate (scipy.stats.mstats.mjci) weighs the order
    statistics by the median's own sampling distribution (a beta distribution, whatever the values'
    distribution): no normality, no random numbers (a bootstrap's would make the file depend on a seed).
    """
    from scipy.stats.mstats import mjci

    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size < 3:
        return float("nan"), float("nan"), int(v.size)
    return float(np.median(v)), float(mjci(v, prob=[0.5])[0]), int(v.size)


def _gaussian_dip(x, centre, sigma, depth, c0, c1):
    return c0 + c1 * (x - centre) - depth * np.exp(-0.5 * ((x - centre) / sigma) ** 2)


def _line_centre(x, y, guess):
    """Centre (A) of a Gaussian dip on a sloping continuum fitted to (x, y); NaN when the fit fails
    or finds no line of plausible width (0.5-2.5 A sigma) within 1.5 A of ``guess``."""
    import warnings

    from scipy.optimize import OptimizeWarning, curve_fit

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)   # the centre is used, not its covariance
            p, _ = curve_fit(_gaussian_dip, x, y, p0=[guess, 1.1, 0.2, 1.0, 0.0], maxfev=2000)
    except (RuntimeError, ValueError):
        return float("nan")
    if abs(p[0] - guess) < 1.5 and 0.5 < p[1] < 2.5 and p[2] > 0.02:
        return float(p[0])
    return float("nan")


def zero_point_lines(sptype, lumclass):
    """(ids, air wavelengths A) of the lines a zero point of this type is measured on: atomic
    lines other than hydrogen's, of model strength at least ``ZP_MIN_STRENGTH``, with no listed
    atomic line of more than ``ZP_CROWD_RATIO`` of their strength within ``ZP_CROWD_AA``."""
    t = synth.line_strengths(sptype, lumclass)
    atomic = np.asarray(t["kind"]) == "atomic"
    wave = t["wave_air"].to_value(u.AA)
    strength = np.asarray(t["strength"], float)
    ids = np.asarray(t["id"]).astype(str)
    keep = []
    for j in np.flatnonzero(atomic & (strength > ZP_MIN_STRENGTH)):
        if ids[j].startswith("H_"):
            continue
        near = atomic & (np.abs(wave - wave[j]) < ZP_CROWD_AA)
        near[j] = False
        if not np.any(strength[near] > ZP_CROWD_RATIO * strength[j]):
            keep.append(j)
    return ids[keep], wave[keep]


def measure_zero_point(wave_air, flux, fwhm, sptype, lumclass):
    """Zero point of a normalised template against laboratory wavelengths (see the module docstring).

    Parameters
    ----------
    wave_air : numpy.ndarray
        Air wavelengths (A), increasing, uniformly spaced.
    flux : numpy.ndarray
        Continuum-normalised flux (NaN where undefined).
    fwhm : float
        The template's resolution, FWHM in A (constant).
    sptype, lumclass : str
        The template's MK type: the synthetic spectrum it is compared with.

    Returns
    -------
    ZeroPoint
    """
    from .obsinfo import air_to_vacuum

    wave_air = np.asarray(wave_air, float)
    flux = np.asarray(flux, float)
    c_kms = float(C_KMS)
    ids, lines = zero_point_lines(sptype, lumclass)
    used = []
    for ident, w0 in zip(ids, lines):
        sel = np.abs(wave_air - w0) < ZP_HALF_WINDOW_AA
        if sel.sum() < 5 or not np.all(np.isfinite(flux[sel])):
            continue
        x = wave_air[sel]
        model = synth.normalised_flux(sptype, lumclass, air_to_vacuum(x * u.AA).to_value(u.AA), w0 / fwhm)
        got, lab = _line_centre(x, flux[sel], w0), _line_centre(x, model, w0)
        if np.isfinite(got) and np.isfinite(lab):
            used.append((str(ident), float(w0), (got - lab) / w0 * c_kms))
    lines_kms, lines_err, n_lines = _median_and_error([u_[2] for u_ in used])
    check, check_err, n_seg = _segment_check(wave_air, flux, fwhm, sptype, lumclass)
    return ZeroPoint(lines_kms, lines_err, n_lines, tuple(used), check, check_err, n_seg)


def _segment_check(wave_air, flux, fwhm, sptype, lumclass):
    """(median, its error, segments) of the template's velocity against the synthetic spectrum of its
    type, per wavelength segment, Balmer lines and their wings masked (see ``ZP_*``)."""
    from scipy.ndimage import gaussian_filter1d

    from .linelist import load_linelist
    from .mktypes import sptype_to_code

    lo, hi = np.log(3700.0), np.log(7350.0)
    n = int((hi - lo) / ZP_CHECK_STEP)
    grid = lo + ZP_CHECK_STEP * np.arange(n)
    wave_vac = np.exp(grid)
    f, valid = _resampled(wave_air, flux, fwhm, grid, ZP_CHECK_R)
    model = synth.normalised_flux(sptype, lumclass, wave_vac, ZP_CHECK_R)
    # continuum residuals and band shapes out: a Gaussian of 8 resolution elements (as the velocity stage)
    sigma = 8.0 / ZP_CHECK_R / ZP_CHECK_STEP
    a = np.where(valid, f - 1.0, 0.0)
    a = a - gaussian_filter1d(a, sigma)
    b = (model - 1.0) - gaussian_filter1d(model - 1.0, sigma)
    weight = valid.astype(float)
    half = ZP_BALMER_HALF_AA[0] if sptype_to_code(sptype) < 35 else ZP_BALMER_HALF_AA[1]
    wave_air_grid = vacuum_to_air(wave_vac * u.AA).to_value(u.AA)
    listed = load_linelist("stellar")
    balmer = listed["wave_air"][np.isin(np.asarray(listed["id"]).astype(str), ZP_BALMER_IDS)].to_value(u.AA)
    for w0 in balmer:
        weight[np.abs(wave_air_grid - w0) < half] = 0.0
    edges = np.linspace(0, n, ZP_CHECK_SEGMENTS + 1).astype(int)
    out = []
    reach = 25   # lags, +-75 km/s
    lags = np.arange(-reach, reach + 1)
    for i0, i1 in zip(edges[:-1], edges[1:]):
        w, x, y = weight[i0:i1], a[i0:i1], b[i0:i1]
        if w.sum() < 0.3 * (i1 - i0):
            continue
        core = slice(reach, x.size - reach)
        cc = np.array([np.sum(w[core] * x[core] * y[reach - k:x.size - reach - k]) for k in lags])
        cc /= math.sqrt(np.sum(w * x * x) * np.sum(w * y * y)) + 1e-300
        k = int(np.argmax(cc))
        if k in (0, cc.size - 1) or cc[k] < 0.3:
            continue
        y0, y1, y2 = cc[k - 1:k + 2]
        out.append((lags[k] + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)) * ZP_CHECK_STEP * float(C_KMS))
    return _median_and_error(out)


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
