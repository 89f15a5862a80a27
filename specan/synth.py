"""Synthetic stellar spectra built from specan's line list.

A deliberately simple model for velocity templates, tests and the demo night,
not a stellar atmosphere: every line of ``specan.linelist.load_linelist("stellar")``
gets an equivalent width that is a smooth function of the temperature type
(numeric code of :mod:`specan.mktypes`, O0 = 0 ... M0 = 60) and the luminosity
class, a Voigt (or Gaussian) profile of the instrumental width, and the lines are
combined as optical depths so that overlapping strong lines saturate instead of
going below zero flux. Molecular bands (TiO, CaH, MgH, CN, CH) are exponential
"sawtooth" bands from their heads, convolved with the instrumental Gaussian
analytically. All strengths are rough, recalled trends (``# from memory`` /
``# common practice``), good enough that a template of the right type
correlates best with a star of that type; they are not abundances.

Everything is analytic in wavelength, so a spectrum can be evaluated on any
wavelength array (for example the logarithmic grid of the velocity engine)
without resampling. Line positions are computed in vacuum and the requested
axis converted, so the air/vacuum difference (83 km/s at Na D) is exact.
"""

from __future__ import annotations

import functools

import astropy.units as u
import numpy as np
from astropy.constants import c as _c
from scipy.special import erfcx, voigt_profile

from .mktypes import lumclass_to_number, sptype_to_code
from .obsinfo import META_KEY, ObsInfo, air_to_vacuum
from .doppler import doppler_factor as _doppler_factor
from .mkscales import teff_from_type

__all__ = [
    "spectrum",
    "template",
    "normalised_flux",
    "binary",
    "line_strengths",
    "log_wavelength_grid",
    "doppler_factor",
    "TEMPLATE_TYPES",
]

C_KMS = _c.to_value(u.km / u.s)
FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))

#: Types of the built-in template grid (O to M, dwarfs plus a few giants).
TEMPLATE_TYPES = (
    ("O7", "V"), ("B1", "V"), ("B5", "V"), ("A0", "V"), ("A5", "V"), ("F0", "V"), ("F5", "V"),
    ("G2", "V"), ("G8", "III"), ("K2", "V"), ("K3", "III"), ("K7", "V"), ("M2", "V"), ("M4", "III"),
)

# ---------------------------------------------------------------------------
# Strength model: equivalent width (Angstrom) of a reference line of each group
# versus type code, for dwarfs; luminosity factors below. Node values are rough
# trends recalled from MK atlases and equivalent-width compilations (# from memory).
# ---------------------------------------------------------------------------
_CODES = np.array([0, 5, 10, 12, 15, 20, 22, 25, 30, 35, 40, 42, 45, 50, 55, 60, 63, 66, 69.9])

_EW_NODES = {
    # Balmer Hgamma-scale EW, peak at A1-A2 (# from memory)
    "balmer":  [2.0, 2.5, 3.5, 4.5, 7.0, 14.0, 15.0, 13.0, 9.0, 6.0, 4.0, 3.5, 3.0, 2.0, 1.2, 0.8, 0.6, 0.4, 0.3],
    # He II 4686-scale: O stars only (# from memory)
    "he2":     [1.0, 0.8, 0.05, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0],
    # He I 4471-scale: peak near B2 (# from memory)
    "he1":     [0.2, 0.4, 0.9, 1.2, 0.9, 0.15, 0.05, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0],
    # Si IV / N III / C III / O II / N II: hot B0-B2 (# from memory)
    "hot_ion": [0.3, 0.35, 0.4, 0.3, 0.1, 0.0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0],
    # Si III peak B1, Si II / C II / Mg II peak late B - A0 (# from memory)
    "si3":     [0.0, 0.05, 0.35, 0.3, 0.1, 0.0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0],
    "si2":     [0.0, 0.0, 0.05, 0.15, 0.3, 0.35, 0.3, 0.2, 0.12, 0.06, 0.03, 0.02, 0.0, 0, 0, 0, 0, 0, 0],
    "mg2":     [0.05, 0.08, 0.15, 0.25, 0.4, 0.45, 0.45, 0.4, 0.35, 0.3, 0.2, 0.15, 0.1, 0.05, 0.0, 0, 0, 0, 0],
    # Ca II K: weak in B, rising through A-F, saturated in G-K (# from memory)
    "ca2k":    [0.05, 0.05, 0.1, 0.15, 0.25, 0.5, 0.8, 2.0, 5.0, 8.0, 11.0, 12.0, 14.0, 16.0, 16.0, 14.0, 12.0, 10.0, 8.0],
    # Ca II infrared triplet 8542-scale (# from memory)
    "ca2ir":   [0.2, 0.2, 0.3, 0.4, 0.6, 1.0, 1.2, 1.6, 2.2, 2.8, 3.2, 3.4, 3.5, 3.6, 3.4, 3.0, 2.6, 2.2, 2.0],
    # ionised metals (Fe II, Ti II, Sc II, Sr II, Ba II, Y II) peak at F (# from memory)
    "ion":     [0.0, 0.0, 0.01, 0.02, 0.05, 0.12, 0.16, 0.22, 0.3, 0.3, 0.26, 0.24, 0.22, 0.18, 0.14, 0.1, 0.08, 0.06, 0.05],
    # neutral metals (Fe I, Cr I, Mg I, Ti I, ...) rise through F-K (# common practice)
    "neutral": [0.0, 0.0, 0.0, 0.0, 0.005, 0.02, 0.03, 0.06, 0.12, 0.2, 0.3, 0.33, 0.4, 0.5, 0.6, 0.6, 0.58, 0.55, 0.5],
    # low-excitation resonance lines (Ca I 4227, Na D, K I, Mn I): strongest in late K-M (# from memory)
    "resonance": [0.0, 0.0, 0.0, 0.0, 0.005, 0.02, 0.04, 0.08, 0.2, 0.35, 0.6, 0.7, 0.9, 1.4, 2.2, 3.0, 3.4, 3.6, 3.6],
    # O I 7774 triplet: late B to F (# from memory)
    "oi":      [0.0, 0.0, 0.05, 0.1, 0.2, 0.4, 0.45, 0.5, 0.45, 0.35, 0.2, 0.15, 0.1, 0.05, 0.0, 0, 0, 0, 0],
    # TiO band optical depth scale: appears at K5-K7, dominant in M (# common practice)
    "tio":     [0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0.0, 0.25, 0.6, 1.0, 1.3],
    # CaH/MgH: K-M dwarfs (# from memory)
    "hydride": [0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0.02, 0.08, 0.15, 0.25, 0.35, 0.45, 0.5],
    # CN violet / CH G band: G-K, CN enhanced in giants (# from memory)
    "cn":      [0, 0, 0, 0, 0, 0, 0, 0, 0.0, 0.02, 0.06, 0.08, 0.12, 0.18, 0.2, 0.15, 0.1, 0.05, 0.0],
    "ch":      [0, 0, 0, 0, 0, 0, 0, 0, 0.05, 0.15, 0.3, 0.35, 0.4, 0.45, 0.4, 0.3, 0.2, 0.15, 0.1],
    "vo":      [0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0.3, 0.6],
}

# Balmer/Paschen EW relative to Hgamma (# from memory, rough).
_HYDROGEN_SCALE = {
    "H_alpha": 0.9, "H_beta": 1.0, "H_gamma": 1.0, "H_delta": 0.95, "H_epsilon": 0.85, "H_8": 0.75,
    "H_9": 0.65, "H_10": 0.55, "H_11": 0.45, "H_12": 0.4,
    "H_P13": 0.35, "H_P14": 0.3, "H_P15": 0.27, "H_P16": 0.24,
}

# Molecular bands: (group, shading direction, e-folding length in A, relative strength).
# Direction +1 = degraded to the red (absorption longward of the head). (# from memory)
_BANDS = {
    "TiO": ("tio", +1, 60.0, 1.0),
    "VO": ("vo", +1, 80.0, 1.0),
    "CaH": ("hydride", +1, 40.0, 0.8),
    "MgH": ("hydride", -1, 50.0, 0.8),
    "CN": ("cn", -1, 40.0, 1.0),
    "CH": ("ch", -1, 18.0, 1.0),
    "C2": (None, -1, 40.0, 0.0),  # carbon stars only: absent from the O-M model
}


def _nodes(group, code):
    return np.interp(code, _CODES, _EW_NODES[group])


def _bell(x, centre, width):
    return np.exp(-0.5 * ((x - centre) / width) ** 2)


def _group_of(species: str, ion: int, ident: str, ep: float) -> str:
    """Strength group of a line (see ``_EW_NODES``)."""
    element = species.split()[0]
    if element == "H":
        return "balmer"
    if element == "He":
        return "he2" if ion == 2 else "he1"
    if ident.startswith("CaII_8"):
        return "ca2ir"
    if ident in ("CaII_K", "CaII_H"):
        return "ca2k"
    if element == "O" and ion == 1:
        return "oi"
    if element == "Si" and ion == 3:
        return "si3"
    if (element == "Si" and ion == 2) or (element == "C" and ion == 2):
        return "si2"
    if element == "Mg" and ion == 2:
        return "mg2"
    if ion >= 3 or element in ("N", "O") or (element == "C" and ion >= 2):
        return "hot_ion"
    if ion == 2:
        return "ion"
    if ion == 1 and np.isfinite(ep) and ep < 0.1:
        return "resonance"
    return "neutral"


def _luminosity_factor(group: str, code: float, lumnum: int) -> float:
    """Multiplier of a group's EW for luminosity class 1 (I) ... 5 (V) (# from memory)."""
    giant = (5 - lumnum) / 4.0  # 0 for dwarfs, 1 for supergiants
    if group == "balmer":
        # Balmer lines of A-B supergiants are much weaker and narrower than in dwarfs
        return 1.0 - 0.65 * giant * _bell(code, 20.0, 9.0)
    if group in ("ion", "si2", "si3", "oi", "ca2ir"):
        return 1.0 + 0.8 * giant  # ionised lines, O I and the Ca triplet strengthen with luminosity
    if group == "resonance":
        return 1.0 - 0.3 * giant  # pressure-sensitive low-excitation lines weaker in giants
    return 1.0


def _band_factor(group: str, lumnum: int) -> float:
    giant = (5 - lumnum) / 4.0
    if group == "hydride":
        return 1.0 - 0.8 * giant  # hydrides are dwarf features
    if group == "cn":
        return 1.0 + 1.5 * giant  # CN strong in giants
    return 1.0


def _loggf_factor(group: str, loggf: float, ep: float) -> float:
    """Within-group scaling by oscillator strength and excitation (a crude curve of growth)."""
    if not np.isfinite(loggf):
        return 1.0
    ref = {"he1": 0.0, "hot_ion": 0.0, "si2": 0.3, "si3": 0.0, "oi": 0.2, "mg2": 0.7,
           "ion": -0.5, "neutral": -0.5, "resonance": 0.0, "ca2ir": -0.36, "ca2k": 0.0}.get(group, 0.0)
    eps = 0.0 if not np.isfinite(ep) else ep
    # square-root dependence ~ saturated part of the curve of growth (# common practice)
    f = 10.0 ** (0.45 * (loggf - ref))
    if group in ("neutral", "ion"):
        f *= 10.0 ** (-0.12 * (eps - 1.5))
    return float(np.clip(f, 0.1, 3.0))


@functools.lru_cache(maxsize=4)
def _linelist(name="stellar"):
    from .linelist import load_linelist

    t = load_linelist(name)
    return (
        np.asarray(t["id"]).astype(str),
        np.asarray(t["species"]).astype(str),
        np.asarray(t["ion"], dtype=int),
        np.asarray(t["wave_vac"].to_value(u.AA), dtype=float),
        np.asarray(t["wave_air"].to_value(u.AA), dtype=float),
        np.asarray(t["ep_low"].to_value(u.eV), dtype=float),
        np.asarray(t["loggf"], dtype=float),
        np.asarray(t["kind"]).astype(str),
    )


@functools.lru_cache(maxsize=256)
def _strengths(code: float, lumnum: int):
    """Per-line (id, species, wave_vac, wave_air, kind, strength, lorentz_frac, group) arrays."""
    ids, species, ion, wvac, wair, ep, loggf, kind = _linelist()
    strength = np.zeros(len(ids))
    lorentz = np.zeros(len(ids))  # Lorentzian HWHM as a fraction of the EW (pressure wings)
    groups = []
    giant = (5 - lumnum) / 4.0
    for i in range(len(ids)):
        if kind[i] == "molecular_head":
            mol = species[i].split()[0]
            group = _BANDS.get(mol, (None,))[0]
            groups.append(group or "none")
            if group is None:
                continue
            strength[i] = _nodes(group, code) * _BANDS[mol][3] * _band_factor(group, lumnum)
            continue
        group = _group_of(species[i], ion[i], ids[i], ep[i])
        groups.append(group)
        if group == "balmer":
            w = _nodes("balmer", code) * _HYDROGEN_SCALE.get(ids[i], 0.3)
            if ids[i].startswith("H_P"):
                w *= 0.5  # Paschen lines weaker than the Balmer lines of similar upper level (# from memory)
            strength[i] = w * _luminosity_factor(group, code, lumnum)
            # Stark wings: broad in dwarfs, narrow in supergiants (# common practice)
            lorentz[i] = 0.4 * (1.0 - 0.85 * giant)
            continue
        w = _nodes(group, code) * _loggf_factor(group, loggf[i], ep[i]) * _luminosity_factor(group, code, lumnum)
        strength[i] = w
        if group in ("ca2k", "resonance") and w > 1.0:
            lorentz[i] = 0.04 * (1.0 - 0.5 * giant)  # damping wings of saturated resonance lines
    return ids, species, wvac, wair, kind, strength, lorentz, np.array(groups)


def line_strengths(sptype="G2", lumclass="V"):
    """Model equivalent widths of the line list for one MK type.

    Parameters
    ----------
    sptype : str
        Temperature type ("G2", "B2.5", ...).
    lumclass : str
        Luminosity class "I" ... "V".

    Returns
    -------
    astropy.table.QTable
        Columns ``id``, ``species``, ``wave_air``, ``wave_vac`` (Angstrom), ``kind``,
        ``group`` (strength family) and ``strength``: the model equivalent width in
        Angstrom for atomic lines, a band optical-depth scale for ``molecular_head`` rows.
    """
    from astropy.table import QTable

    ids, species, wvac, wair, kind, strength, _, groups = _strengths(
        float(sptype_to_code(sptype)), lumclass_to_number(lumclass))
    return QTable({"id": ids, "species": species, "wave_air": wair * u.AA, "wave_vac": wvac * u.AA,
                   "kind": kind, "group": groups, "strength": strength})


def doppler_factor(rv) -> float:
    """Relativistic Doppler factor 1 + z = sqrt((1 + beta) / (1 - beta)) of a radial velocity.

    Parameters
    ----------
    rv : astropy.units.Quantity
        Line-of-sight velocity, positive receding.

    Returns
    -------
    float
    """
    return float(_doppler_factor(rv))


def log_wavelength_grid(wave_range=(3700, 8800) * u.AA, resolving_power=2000, pixels_per_fwhm=2.5):
    """Wavelengths equally spaced in log(lambda), ``pixels_per_fwhm`` pixels per resolution element.

    Parameters
    ----------
    wave_range : astropy.units.Quantity
        (start, end) wavelengths.
    resolving_power : float
        R = lambda / FWHM.
    pixels_per_fwhm : float
        Sampling.

    Returns
    -------
    astropy.units.Quantity
        Wavelength array in the unit of ``wave_range``.
    """
    wr = u.Quantity(wave_range)
    lo, hi = wr.to_value(u.AA)
    step = 1.0 / (float(resolving_power) * float(pixels_per_fwhm))
    n = int(np.floor(np.log(hi / lo) / step)) + 1
    return (lo * np.exp(step * np.arange(n)) * u.AA).to(wr.unit)


def _exp_gauss(x, sigma, length):
    """One-sided exponential exp(-x/L) for x > 0 convolved with a unit-area Gaussian.

    Written with ``erfcx`` so that it is stable far from the head.
    """
    # exp(-x/L) * exp(s^2/2L^2) * 0.5 erfc((s/L - x/s)/sqrt2) = 0.5 exp(-x^2/2s^2) erfcx(arg)
    arg = (sigma / length - x / sigma) / np.sqrt(2.0)
    out = np.empty_like(x)
    pos = arg > 0
    out[pos] = 0.5 * np.exp(-0.5 * (x[pos] / sigma) ** 2) * erfcx(arg[pos])
    out[~pos] = 0.5 * np.exp(0.5 * (sigma / length) ** 2 - x[~pos] / length) * (2.0 - np.exp(
        -arg[~pos] ** 2) * erfcx(-arg[~pos]))
    return out


def _optical_depth(wvac_rest, code, lumnum, resolving_power, vbroad_kms, emission_ids=(), only=None):
    """Summed line and band 'optical depth' on rest-frame vacuum wavelengths (Angstrom).

    ``only``: a tuple of species ("H I", ...) whose lines alone are put in; None, all.
    """
    ids, species, wline, _, kind, strength, lorentz, groups = _strengths(float(code), int(lumnum))
    if only is not None:
        strength = np.where(np.isin(species, list(only)) & (kind != "molecular_head"), strength, 0.0)
    tau = np.zeros_like(wvac_rest)
    sig_v = np.hypot(C_KMS / float(resolving_power), vbroad_kms) * FWHM_TO_SIGMA  # km/s
    lo, hi = wvac_rest[0], wvac_rest[-1]
    for i in np.flatnonzero(strength > 0):
        if ids[i] in emission_ids:
            continue
        w0 = wline[i]
        sigma = w0 * sig_v / C_KMS
        if kind[i] == "molecular_head":
            mol = species[i].split()[0]
            _, direction, length, _ = _BANDS[mol]
            a, b = (w0 - 6 * sigma, w0 + 8 * length) if direction > 0 else (w0 - 8 * length, w0 + 6 * sigma)
            if b < lo or a > hi:
                continue
            j0, j1 = np.searchsorted(wvac_rest, [a, b])
            x = direction * (wvac_rest[j0:j1] - w0)
            tau[j0:j1] += strength[i] * _exp_gauss(x, sigma, length)
            continue
        gamma = lorentz[i] * strength[i]
        half = 8 * sigma + 400 * gamma
        if w0 + half < lo or w0 - half > hi:
            continue
        j0, j1 = np.searchsorted(wvac_rest, [w0 - half, w0 + half])
        dx = wvac_rest[j0:j1] - w0
        if gamma > 0:
            tau[j0:j1] += strength[i] * voigt_profile(dx, sigma, gamma)
        else:
            tau[j0:j1] += strength[i] / (sigma * np.sqrt(2 * np.pi)) * np.exp(-0.5 * (dx / sigma) ** 2)
    return tau


# Strong lines keep ~10% residual core flux instead of going black (# common practice).
_CORE_LIMIT = 0.9


def _model_flux(wvac_obs, code, lumnum, resolving_power, rv_kms, vbroad_kms, emission, only=None):
    """Continuum-normalised model flux at observed vacuum wavelengths (Angstrom)."""
    rest = wvac_obs / doppler_factor(rv_kms * u.km / u.s)
    emission = dict(emission or {})
    tau = _optical_depth(rest, code, lumnum, resolving_power, vbroad_kms, tuple(emission), only)
    flux = 1.0 - _CORE_LIMIT * (1.0 - np.exp(-tau / _CORE_LIMIT))
    if emission:
        ids, _, wline, *_ = _strengths(float(code), int(lumnum))
        sig_v = np.hypot(C_KMS / float(resolving_power), max(vbroad_kms, 100.0)) * FWHM_TO_SIGMA
        for ident, ew in emission.items():
            hit = np.flatnonzero(ids == ident)
            if hit.size == 0:
                raise ValueError(f"no line {ident!r} in the line list for an emission component")
            w0 = wline[hit[0]]
            sigma = w0 * sig_v / C_KMS
            flux = flux + float(ew) / (sigma * np.sqrt(2 * np.pi)) * np.exp(-0.5 * ((rest - w0) / sigma) ** 2)
    return flux


def _teff(code, lumclass):
    teff, _ = teff_from_type(code, lumclass)
    return float(u.Quantity(teff, u.K).value)


def _blackbody(wave_aa, teff):
    from astropy.modeling.models import BlackBody

    bb = BlackBody(temperature=teff * u.K, scale=1.0 * u.erg / (u.cm ** 2 * u.s * u.AA * u.sr))
    f = bb(wave_aa * u.AA).value
    return f / bb(5556.0 * u.AA).value  # unity near V (# common practice)


def _axis(wave, wave_range, resolving_power, pixels_per_fwhm, medium):
    if medium not in ("air", "vacuum"):
        raise ValueError(f"medium must be 'air' or 'vacuum', not {medium!r}")
    if wave is None:
        wave = log_wavelength_grid(wave_range, resolving_power, pixels_per_fwhm)
    wave = u.Quantity(wave)
    w_aa = wave.to_value(u.AA)
    wvac = w_aa if medium == "vacuum" else np.asarray(air_to_vacuum(w_aa * u.AA).to_value(u.AA))
    return wave, w_aa, wvac


def _make(wave, flux, *, medium, resolving_power, snr, seed, continuum_array, name, params):
    from astropy.nddata import StdDevUncertainty
    from specutils import Spectrum

    uncertainty = None
    if snr is not None:
        rng = np.random.default_rng(seed)
        level = np.median(continuum_array) if continuum_array is not None else 1.0
        # photon-like noise: S/N = snr per pixel at the (median) continuum level (# common practice)
        sigma = np.sqrt(np.clip(flux, 1e-6, None) * level) / float(snr)
        flux = flux + rng.normal(size=flux.size) * sigma
        uncertainty = StdDevUncertainty(sigma)
    info = ObsInfo(object=name, medium=medium, medium_assumed=False, resolving_power=float(resolving_power),
                   normalized=continuum_array is None, snr=None if snr is None else float(snr), format="synthetic")
    meta = {META_KEY: info, "synth": params}
    if continuum_array is not None:
        meta["continuum"] = continuum_array * u.dimensionless_unscaled
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=wave, uncertainty=uncertainty, meta=meta)


def _with_continuum(flux, continuum, w_aa, code, lumclass):
    """(flux, continuum array or None): normalised flux, or times a Planck curve at the type's Teff."""
    if continuum is None:
        return flux, None
    if continuum != "blackbody":
        raise ValueError(f"continuum must be None or 'blackbody', not {continuum!r}")
    cont = _blackbody(w_aa, _teff(code, lumclass))
    return flux * cont, cont


def spectrum(sptype="G2", lumclass="V", *, resolving_power=2000, wave=None, wave_range=(3700, 8800) * u.AA,
             pixels_per_fwhm=2.5, rv=0 * u.km / u.s, medium="air", continuum=None, snr=None, seed=None,
             vbroad=0 * u.km / u.s, emission=None, species=None):
    """A synthetic spectrum of an MK type.

    Parameters
    ----------
    sptype : str
        Temperature type, e.g. "G2", "B2.5", "M3".
    lumclass : str
        Luminosity class "I" ... "V".
    resolving_power : float
        R = lambda / FWHM of the Gaussian instrumental profile.
    wave : astropy.units.Quantity, optional
        Wavelengths to evaluate at (in ``medium``); default a log-lambda grid over
        ``wave_range`` with ``pixels_per_fwhm`` pixels per resolution element.
    wave_range : astropy.units.Quantity
        (start, end) of the default grid.
    pixels_per_fwhm : float
        Sampling of the default grid.
    rv : astropy.units.Quantity
        Radial velocity, applied with the relativistic Doppler formula.
    medium : {"air", "vacuum"}
        Medium of the wavelength axis.
    continuum : None or "blackbody"
        None: continuum-normalised flux. "blackbody": multiplied by a Planck curve at
        the type's Teff (unity at 5556 A); the curve is in ``meta["continuum"]``.
    snr : float, optional
        S/N per pixel at the continuum; adds Gaussian noise with photon-like scaling and
        an uncertainty array.
    seed : int, optional
        Random seed of the noise.
    vbroad : astropy.units.Quantity
        Extra Gaussian broadening FWHM (rotation, macroturbulence), added in quadrature.
    emission : dict, optional
        Line id -> emission equivalent width in Angstrom (positive); the line's absorption
        is replaced by a Gaussian emission line (FWHM at least 100 km/s), e.g. ``{"H_alpha": 20}``.
    species : sequence of str, optional
        Only the lines of these species (e.g. ``("H I",)``: the hydrogen lines without the
        metal lines around them), no molecular bands; default every line and band.

    Returns
    -------
    specutils.Spectrum
        With an :class:`~specan.obsinfo.ObsInfo` in ``meta["specan"]`` and the model
        parameters in ``meta["synth"]``.
    """
    code = float(sptype_to_code(sptype))
    lumnum = lumclass_to_number(lumclass)
    wave, w_aa, wvac = _axis(wave, wave_range, resolving_power, pixels_per_fwhm, medium)
    rv_kms = u.Quantity(rv, u.km / u.s).value
    vb = u.Quantity(vbroad, u.km / u.s).value
    only = None if species is None else tuple(str(sp) for sp in species)
    flux, cont = _with_continuum(_model_flux(wvac, code, lumnum, resolving_power, rv_kms, vb, emission, only),
                                 continuum, w_aa, code, lumclass)
    params = {"sptype": sptype, "lumclass": lumclass, "resolving_power": float(resolving_power),
              "rv_kms": rv_kms, "vbroad_kms": vb, "snr": snr, "seed": seed, "emission": dict(emission or {})}
    if only is not None:
        params["species"] = list(only)
    return _make(wave, flux, medium=medium, resolving_power=resolving_power, snr=snr, seed=seed,
                 continuum_array=cont, name=f"synthetic {sptype} {lumclass}", params=params)


def normalised_flux(sptype, lumclass, wave_vac, resolving_power):
    """Continuum-normalised model flux at rest, at vacuum wavelengths given as plain Angstrom.

    The flux :func:`spectrum` computes, without building a Spectrum around it (the
    velocity stage makes some twenty templates per measurement from this).
    """
    return _model_flux(np.asarray(wave_vac, float), float(sptype_to_code(sptype)), lumclass_to_number(lumclass),
                       resolving_power, 0.0, 0.0, None)


def template(sptype, resolving_power, wave, lumclass="V", medium="air"):
    """Noiseless, continuum-normalised rest-frame template (see :func:`spectrum`)."""
    return spectrum(sptype, lumclass, resolving_power=resolving_power, wave=wave, medium=medium)


def binary(primary=("G2", "V"), secondary=("K3", "V"), *, rv1=0 * u.km / u.s, rv2=0 * u.km / u.s,
           light_ratio=0.5, resolving_power=2000, wave=None, wave_range=(3700, 8800) * u.AA,
           pixels_per_fwhm=2.5, medium="air", continuum=None, snr=None, seed=None):
    """A double-lined binary: two synthetic components with their own velocities.

    Parameters
    ----------
    primary, secondary : tuple of str
        (temperature type, luminosity class) of each component.
    rv1, rv2 : astropy.units.Quantity
        Radial velocities of the components.
    light_ratio : float
        Continuum flux of the secondary over the primary (at 5556 A when ``continuum``
        is "blackbody", everywhere otherwise).
    Other parameters as in :func:`spectrum`.

    Returns
    -------
    specutils.Spectrum
    """
    wave, w_aa, wvac = _axis(wave, wave_range, resolving_power, pixels_per_fwhm, medium)
    parts = []
    for (st, lc), rv in ((primary, rv1), (secondary, rv2)):
        code, lumnum = float(sptype_to_code(st)), lumclass_to_number(lc)
        f = _model_flux(wvac, code, lumnum, resolving_power, u.Quantity(rv, u.km / u.s).value, 0.0, None)
        c = _blackbody(w_aa, _teff(code, lc)) if continuum == "blackbody" else np.ones_like(w_aa)
        parts.append((f, c))
    (f1, c1), (f2, c2) = parts
    q = float(light_ratio)
    cont = c1 + q * c2
    flux = f1 * c1 + q * f2 * c2
    if continuum != "blackbody":
        flux, cont = flux / cont, None
    params = {"primary": list(primary), "secondary": list(secondary),
              "rv1_kms": u.Quantity(rv1, u.km / u.s).value, "rv2_kms": u.Quantity(rv2, u.km / u.s).value,
              "light_ratio": q, "resolving_power": float(resolving_power), "snr": snr, "seed": seed}
    name = f"synthetic binary {primary[0]}{primary[1]}+{secondary[0]}{secondary[1]}"
    return _make(wave, flux, medium=medium, resolving_power=resolving_power, snr=snr, seed=seed,
                 continuum_array=cont, name=name, params=params)
