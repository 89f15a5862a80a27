"""What specan knows about an observation, carried with the spectrum.

A specutils ``Spectrum`` is the one data type passed between stages. Everything
specan learns about the observation (object, times, pointing, site, medium,
resolving power, S/N, continuum state) travels in ``spectrum.meta["specan"]`` as
an :class:`ObsInfo`. Unknown items are ``None`` and are never guessed silently:
an assumption (for example the air medium of a file that does not say) is
written to ``warnings``.
"""

from __future__ import annotations

import dataclasses
import functools
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.time import Time

__all__ = ["ObsInfo", "get_info", "air_to_vacuum", "vacuum_to_air", "AIR_VACUUM_FORMULA", "wavelength_in",
           "spectrum_arrays", "replace_parts", "air_vacuum_velocity_kms"]

META_KEY = "specan"

#: Refractive index of air used for every air <-> vacuum conversion in specan.
#: Morton (2000, ApJS 130, 403), as implemented by specutils.
AIR_VACUUM_FORMULA = "Morton2000"


@dataclass
class ObsInfo:
    """Metadata of one observed spectrum.

    Attributes
    ----------
    path : str or None
        File the spectrum came from.
    object : str or None
        Object name (OBJECT keyword or file name stem, see ``warnings``).
    medium : {"air", "vacuum"}
        Medium of the wavelength axis as stored.
    medium_assumed : bool
        True when the file did not say and specan assumed ``medium``.
    time_start, time_mid : astropy.time.Time or None
        Start and middle of the exposure.
    exptime : astropy.units.Quantity or None
        Exposure time.
    ra_deg, dec_deg : float or None
        Pointing in degrees (ICRS unless ``radesys`` says otherwise).
    radesys, equinox : str, float or None
        Reference system of the pointing as stated.
    site : astropy.coordinates.EarthLocation or None
        Observatory location.
    site_source : str or None
        Where ``site`` came from (keywords or an override).
    resolving_power : float or None
        R = lambda / FWHM of the instrument profile, when known.
    hdu : int or str or None
        HDU the spectrum was read from.
    format : str or None
        Name of the reader that understood the file.
    snr : float or None
        Median S/N per pixel, the best estimate available: ``snr_err_array`` when the file
        has an error array, else ``snr_flux`` (``snr_source`` says which).
    snr_source : str or None
        ``"error array"`` or ``"flux"``.
    snr_err_array : float or None
        Median flux / error over the usable pixels.
    snr_flux : float or None
        Median S/N per pixel from the flux alone (:func:`specan.noise.flux_noise`: the
        high-frequency noise plateau with the lines' leak removed, or DER_SNR where the
        pixels are correlated; ``snr_flux_method`` says which).
    snr_flux_method : str or None
        How ``snr_flux`` was measured.
    normalized : bool
        True once the flux has been divided by a fitted continuum.
    warnings : list of str
        Everything assumed or doubtful about this spectrum.
    header : mapping
        Original header cards (name -> value), for reference (read-only when a reader filled it).
    """

    path: str | None = None
    object: str | None = None
    medium: str = "air"
    medium_assumed: bool = True
    time_start: Time | None = None
    time_mid: Time | None = None
    exptime: u.Quantity | None = None
    ra_deg: float | None = None
    dec_deg: float | None = None
    radesys: str | None = None
    equinox: float | None = None
    site: EarthLocation | None = None
    site_source: str | None = None
    resolving_power: float | None = None
    hdu: int | str | None = None
    format: str | None = None
    snr: float | None = None
    snr_err_array: float | None = None
    snr_source: str | None = None
    snr_flux: float | None = None
    snr_flux_method: str | None = None
    normalized: bool = False
    warnings: list = field(default_factory=list)
    header: dict = field(default_factory=dict)

    def warn(self, message: str) -> None:
        """Record an assumption or doubt (once)."""
        if message not in self.warnings:
            self.warnings.append(message)

    @property
    def pointing_frame(self) -> str:
        """The frame :attr:`coord` is in: "fk5" or "fk4" as RADESYS says, else "icrs"."""
        frame = (self.radesys or "ICRS").strip().lower()
        return frame if frame in ("fk5", "fk4") else "icrs"

    @property
    def coord(self) -> SkyCoord | None:
        """Pointing as a SkyCoord, or None when unknown (one object per pointing, shared)."""
        if self.ra_deg is None or self.dec_deg is None:
            return None
        return _pointing_coord(float(self.ra_deg), float(self.dec_deg), self.pointing_frame, self.equinox)

    @property
    def mjd_mid(self) -> float | None:
        """Mid-exposure MJD (UTC), or None."""
        return None if self.time_mid is None else float(self.time_mid.utc.mjd)

    def copy(self) -> "ObsInfo":
        """A copy whose lists and dicts are not shared."""
        new = dataclasses.replace(self)
        new.warnings = list(self.warnings)
        # a dict is copied; a read-only mapping (the reader's cards, parsed when read) is shared as it is
        new.header = dict(self.header) if isinstance(self.header, dict) else self.header
        return new

    def to_dict(self) -> dict:
        """JSON-friendly summary (no header)."""
        site = None
        if self.site is not None:
            lon, lat, h = self.site.lon.deg, self.site.lat.deg, self.site.height.to_value(u.m)
            site = {"lat_deg": float(lat), "lon_deg": float(lon), "height_m": float(h)}
        return {
            "file": self.path,
            "object": self.object,
            "medium": self.medium,
            "medium_assumed": self.medium_assumed,
            "mjd_mid": self.mjd_mid,
            "exptime_s": None if self.exptime is None else float(self.exptime.to_value(u.s)),
            "ra_deg": self.ra_deg,
            "dec_deg": self.dec_deg,
            "site": site,
            "site_known": self.site is not None,
            "resolving_power": self.resolving_power,
            "snr": self.snr,
            "snr_source": self.snr_source,
            "snr_err_array": self.snr_err_array,
            "snr_flux": self.snr_flux,
            "warnings": list(self.warnings),
        }



@functools.lru_cache(maxsize=1024)
def _pointing_coord(ra_deg, dec_deg, frame, equinox):
    """The SkyCoord of a pointing, built once (a SkyCoord costs ~0.6 ms; a night's stages ask for
    the same pointing several times); specan never modifies a SkyCoord, so one can be shared."""
    if frame == "fk5":
        eq = Time(equinox or 2000.0, format="jyear")
        return SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="fk5", equinox=eq)
    if frame == "fk4":
        eq = Time(equinox or 1950.0, format="byear")
        return SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="fk4", equinox=eq)
    return SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")


def get_info(spectrum) -> ObsInfo:
    """Return the :class:`ObsInfo` of ``spectrum``, attaching an empty one if absent.

    Parameters
    ----------
    spectrum : specutils.Spectrum

    Returns
    -------
    ObsInfo
    """
    info = spectrum.meta.get(META_KEY)
    if not isinstance(info, ObsInfo):
        info = ObsInfo()
        info.warn("spectrum built in Python without specan metadata; medium assumed air")
        spectrum.meta[META_KEY] = info
    return info


def air_to_vacuum(wavelength):
    """Convert air wavelengths to vacuum (Morton 2000, via specutils).

    Parameters
    ----------
    wavelength : astropy.units.Quantity
        Air wavelength(s).

    Returns
    -------
    astropy.units.Quantity
        Vacuum wavelength(s), in the input unit.
    """
    from specutils.utils.wcs_utils import air_to_vac

    w = u.Quantity(wavelength)
    n_min = _refraction_at_formula_limit()
    return _below_limit_held(w, w.to_value(u.AA) < _FORMULA_MIN_AA / n_min, w * n_min,   # limit in air
                             lambda q: air_to_vac(q, method=AIR_VACUUM_FORMULA, scheme="inversion"))


def air_vacuum_velocity_kms(wavelength=5500.0 * u.AA) -> float:
    """The velocity (km/s) that mistaking vacuum wavelengths for air adds: (n - 1) c.

    ``n`` is the refractive index of air at ``wavelength`` (Morton 2000, as in
    :func:`air_to_vacuum`): about 83 km/s across the optical. Positive; the sign of a given
    mistake is the caller's.
    """
    from astropy.constants import c

    w = u.Quantity(wavelength, u.AA)
    n = float(air_to_vacuum(w).to_value(u.AA) / w.to_value(u.AA))
    return (n - 1.0) * c.to_value(u.km / u.s)


def vacuum_to_air(wavelength):
    """Convert vacuum wavelengths to air (Morton 2000, via specutils).

    Parameters
    ----------
    wavelength : astropy.units.Quantity
        Vacuum wavelength(s).

    Returns
    -------
    astropy.units.Quantity
        Air wavelength(s), in the input unit.
    """
    from specutils.utils.wcs_utils import vac_to_air

    w = u.Quantity(wavelength)
    return _below_limit_held(w, w.to_value(u.AA) < _FORMULA_MIN_AA, w / _refraction_at_formula_limit(),
                             lambda q: vac_to_air(q, method=AIR_VACUUM_FORMULA))


#: Shortest wavelength (Angstrom) for which specutils accepts the Morton (2000) formula. Below
#: it the refractive index of this wavelength is held, so that a spectrum reaching into the
#: ultraviolet still converts (continuously) instead of failing; air wavelengths are not used
#: below 2000 A anyway (common practice), and the index changes by 6% of (n - 1) from 2500 to
#: 2000 A (Greisen et al. 2006 formula in specutils, measured), about 0.04 A there.
_FORMULA_MIN_AA = 2500.0


@functools.lru_cache(maxsize=1)
def _refraction_at_formula_limit() -> float:
    from specutils.utils.wcs_utils import refraction_index

    return float(refraction_index(_FORMULA_MIN_AA * u.AA, method=AIR_VACUUM_FORMULA))


def _below_limit_held(w, low, held, formula):
    """``formula(w)`` where the formula is defined, ``held`` (converted with the index of the limit) below."""
    if not np.any(low):
        return formula(w).to(w.unit)
    out = np.atleast_1d(held).astype(float)
    high = ~np.atleast_1d(low)
    if high.any():
        out[high] = formula(np.atleast_1d(w)[high]).to(w.unit)
    return out.reshape(w.shape)


def wavelength_in(spectrum, medium: str) -> np.ndarray:
    """Spectral axis of ``spectrum`` in Angstrom, converted to ``medium`` if needed."""
    info = get_info(spectrum)
    w = _angstrom(spectrum.spectral_axis)
    if medium == info.medium:
        return w
    if medium == "vacuum":
        return np.asarray(air_to_vacuum(w * u.AA).to_value(u.AA))
    return _vacuum_to_air_angstrom(np.asarray(w, float))


def _angstrom(axis):
    """A spectral axis's values in Angstrom, a fresh array: ``axis.to_value(u.AA)``'s numbers.

    An axis in Angstrom already (what :func:`specan.read` makes) is copied as it is; the spectral
    coordinate's conversion machinery costs 45 us a call even then, and every stage asks (measured).
    """
    if axis.unit is u.AA:
        return np.array(axis.value)
    return np.array(axis.to_value(u.AA))


#: Angstrom -> micron as astropy scales it (the factor specutils' formula meets, so the same numbers).
_ANGSTROM_IN_MICRON = float(u.AA.to(u.um))


def _vacuum_to_air_angstrom(w):
    """:func:`vacuum_to_air` of plain wavelengths in Angstrom: the same numbers, without Quantities.

    Morton (2000, ApJS 130, 403) eq. 8, written as specutils' ``refraction_index`` writes it, step by
    step (tests/test_io.py compares the two bit for bit); every classification converts a vacuum
    spectrum three times, and the Quantity path cost ~0.1 ms each (measured). The index of the
    formula's limit is held below it, as in :func:`vacuum_to_air`.
    """
    if AIR_VACUUM_FORMULA != "Morton2000":   # pragma: no cover - the constants below are that formula's
        return np.asarray(vacuum_to_air(w * u.AA).to_value(u.AA))
    low = w < _FORMULA_MIN_AA
    if low.any():
        out = w / _refraction_at_formula_limit()
        out[~low] = _vacuum_to_air_angstrom(w[~low])
        return out
    sigma2 = (1 / (w * _ANGSTROM_IN_MICRON)) ** 2
    refr = 8.34254e-5 + 2.406147e-2 / (130 - sigma2) + 1.5998e-4 / (38.9 - sigma2)
    return w / (refr + 1)


def spectrum_arrays(spectrum):
    """Wavelength (Angstrom, the spectrum's medium), flux, sigma (or None) and mask as plain arrays.

    The mask is a fresh boolean array (True = bad), all False when the spectrum has none.
    """
    from astropy.nddata import StdDevUncertainty

    wave = _angstrom(spectrum.spectral_axis)
    flux = np.asarray(spectrum.flux.value, dtype=float)
    err = None
    if spectrum.uncertainty is not None:
        err = np.asarray(spectrum.uncertainty.represent_as(StdDevUncertainty).array, dtype=float)
    mask = np.zeros(flux.shape, bool) if spectrum.mask is None else np.asarray(spectrum.mask, bool).copy()
    return wave, flux, err, mask


def replace_parts(spectrum, flux=None, err=None, mask=None, unit=None, meta=None):
    """A new Spectrum on the same spectral axis with some parts replaced (plain arrays in ``unit``)."""
    from astropy.nddata import StdDevUncertainty
    from specutils import Spectrum

    unit = spectrum.flux.unit if unit is None else unit
    flux_q = spectrum.flux if flux is None else flux * unit
    unc = spectrum.uncertainty if err is None else StdDevUncertainty(err * unit)
    new_meta = dict(spectrum.meta) if meta is None else meta
    # the same spectral axis, so the same WCS: handed on rather than made again (specutils builds a
    # lookup-table WCS for every Spectrum given only its axis, ~1 ms, a sixth of prepare(), measured)
    return Spectrum(spectral_axis=spectrum.spectral_axis, wcs=spectrum.wcs, flux=flux_q, uncertainty=unc,
                    mask=spectrum.mask if mask is None else mask, meta=new_meta)
