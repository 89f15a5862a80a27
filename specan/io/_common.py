"""Pieces shared by the format readers: the raw result, header metadata, units."""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from astropy.coordinates import Angle, EarthLocation
from astropy.time import Time

from ..errors import MetadataError, UnitError
from ..obsinfo import ObsInfo

__all__ = ["RawSpectrum", "parse_unit", "header_metadata", "parse_site", "parse_angle"]


@dataclass
class RawSpectrum:
    """What a format reader hands back before specan builds the ``Spectrum``."""

    wave: np.ndarray  # float64, in ``wave_unit``
    wave_unit: u.Unit | None
    flux: np.ndarray
    flux_unit: u.Unit | None = None
    err: np.ndarray | None = None
    ivar: np.ndarray | None = None
    mask: np.ndarray | None = None
    info: ObsInfo = field(default_factory=ObsInfo)
    #: how the wavelength unit was decided ("header", "guessed from range", ...)
    unit_source: str = "header"

    def set_uncertainty(self, kind: str, values) -> None:
        """Store an uncertainty array given as ``"std"``, ``"var"`` or ``"ivar"``.

        A variance becomes a standard deviation here (non-positive: unknown, NaN); an
        inverse variance is kept as it is, because its zeros mark unusable pixels and
        ``specan.read`` turns them into the mask.
        """
        values = np.asarray(values, dtype=float)
        if kind == "std":
            self.err = values
        elif kind == "var":
            self.err = np.sqrt(np.where(values > 0, values, np.nan))
        elif kind == "ivar":
            self.ivar = values
        else:
            raise ValueError(f"uncertainty kind {kind!r}: expected 'std', 'var' or 'ivar'")


# Unit spellings met in headers and text files; astropy parses the rest.
_UNIT_WORDS = {
    "a": u.AA, "aa": u.AA, "å": u.AA, "angstrom": u.AA, "angstroms": u.AA, "ang": u.AA,
    "angs": u.AA, "angstroem": u.AA, "0.1nm": u.AA,
    "nm": u.nm, "nanometer": u.nm, "nanometers": u.nm, "nanometre": u.nm, "nanometres": u.nm,
    "um": u.um, "µm": u.um, "μm": u.um, "micron": u.um, "microns": u.um, "micrometer": u.um,
    "micrometre": u.um, "m": u.m, "meter": u.m, "metre": u.m,
}


def parse_unit(text, kind="wavelength"):
    """Parse a unit string (``'Angstrom'``, ``'nm'``, ``'um'``, FITS spellings).

    Returns the unit, or None for an empty string. Raises :class:`UnitError` when
    the text is not a unit of the expected physical type.
    """
    if text is None:
        return None
    s = str(text).strip()
    if not s:
        return None
    key = s.lower()
    unit = _UNIT_WORDS.get(key) if kind == "wavelength" else None
    if unit is None:
        try:
            unit = u.Unit(s, format="fits", parse_strict="raise")
        except ValueError:
            try:
                unit = u.Unit(s, parse_strict="raise")
            except ValueError as exc:
                raise UnitError(f"cannot understand unit {s!r}") from exc
    if kind == "wavelength" and unit.physical_type != "length":
        raise UnitError(f"unit {s!r} is not a wavelength unit; give the right one with --wave-unit")
    return unit


def guess_wave_unit(wave: np.ndarray):
    """Guess the unit of an optical/near-IR wavelength axis from its range.

    Ground-based spectra lie in 3000-25000 Angstrom (common practice); only ranges
    that fit exactly one of Angstrom, nm or micron inside 2500-25000 Angstrom are
    accepted. Returns the unit or None.
    """
    finite = wave[np.isfinite(wave)]
    if finite.size == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    hits = [unit for unit, scale in ((u.AA, 1.0), (u.nm, 10.0), (u.um, 1e4))
            if 2500.0 <= lo * scale and hi * scale <= 25000.0]
    return hits[0] if len(hits) == 1 else None


def parse_angle(value, unit_if_sexagesimal, what):
    """Degrees from a number or a sexagesimal string (RA strings are in hours)."""
    if value is None:
        return None
    if isinstance(value, (int, float, np.integer, np.floating)):
        return float(value)
    s = str(value).strip()
    if not s:
        return None
    try:
        return float(s)
    except ValueError:
        pass
    try:
        if re.search(r"[hdms°:]|\s", s):
            return float(Angle(s, unit=unit_if_sexagesimal).deg)
        return float(Angle(s, unit=u.deg).deg)
    except Exception as exc:  # astropy raises several types for bad angles
        raise MetadataError(f"cannot read {what} {s!r}; give it as degrees or sexagesimal") from exc


def parse_site(value):
    """An EarthLocation from 'lat,lon,height' (deg, deg east, m), a tuple or an EarthLocation."""
    if value is None or isinstance(value, EarthLocation):
        return value
    if isinstance(value, str):
        parts = [p for p in re.split(r"[,\s]+", value.strip()) if p]
    else:
        parts = list(value)
    if len(parts) != 3:
        raise MetadataError(f"site {value!r} is not 'lat,lon,height' (degrees, degrees east, metres)")
    try:
        lat, lon, height = (float(p) for p in parts)
    except ValueError as exc:
        raise MetadataError(f"site {value!r} is not three numbers 'lat,lon,height'") from exc
    if not (-90 <= lat <= 90):
        raise MetadataError(f"site latitude {lat} is outside -90..90 degrees (order is lat,lon,height)")
    return EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, height * u.m)


def _card(header, *names):
    for name in names:
        if name in header:
            value = header[name]
            if value is None or (isinstance(value, str) and not value.strip()):
                continue
            return value
    return None


def _float_card(header, info, *names):
    """A numeric card's value as float, or None (with a warning when it is not a number)."""
    value = _card(header, *names)
    if value is None:
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        info.warn(f"{names[0]} {value!r} is not a number; ignored")
        return None


def _time(value, fmt, scale):
    try:
        if fmt == "mjd":
            return Time(float(value), format="mjd", scale=scale)
        s = str(value).strip()
        return Time(s, format="isot" if "T" in s else None, scale=scale)
    except Exception as exc:  # astropy raises ValueError or its own types
        raise MetadataError(f"cannot read observation time {value!r}") from exc


class HeaderCards(Mapping):
    """A header's cards as name -> value (no COMMENT, HISTORY or blank cards), each parsed when first read.

    What ``{k: header[k] for k in header.keys()}`` gives, without parsing every card of every
    file: astropy parses a card's value on first access, ~20 us a card (measured), and most
    cards are never read again (a night's 300-card headers would cost 6 ms a file). The values
    are astropy's own (``header[k]``: the first card of a repeated name), the names in the
    order of their first card. Works on any mapping with ``keys()`` (a FITS ``Header``, a dict).
    """

    _SKIPPED = ("COMMENT", "HISTORY", "")

    def __init__(self, header):
        self._header = header
        self._names = list(dict.fromkeys(k for k in header.keys() if k not in self._SKIPPED))
        self._known = set(self._names)

    def __getitem__(self, name):
        if name not in self._known:
            raise KeyError(name)
        return self._header[name]

    def __iter__(self):
        return iter(self._names)

    def __len__(self):
        return len(self._names)

    def __repr__(self):
        return f"HeaderCards({dict(self)!r})"


def header_metadata(header, info: ObsInfo) -> ObsInfo:
    """Fill ``info`` from FITS-style header cards (FITS standard 4.0 keywords).

    Times: DATE-AVG/MJD-AVG, else DATE-BEG/MJD-BEG or DATE-OBS/MJD-OBS plus half
    of EXPTIME (or of DATE-END - DATE-BEG); TIMESYS gives the scale (UTC default).
    Pointing: RA/DEC (degrees, or sexagesimal strings with RA in hours), RADESYS,
    EQUINOX. Site: OBSGEO-X/Y/Z (m, geocentric) or OBSGEO-B/L/H (deg, deg, m).
    Medium from CTYPE1 (AWAV air, WAVE vacuum).
    """
    info.header = HeaderCards(header)
    obj = _card(header, "OBJECT", "OBJNAME", "TARGNAME")
    if obj is not None:
        info.object = str(obj).strip()
    scale = _time_scale(header, info)
    exptime = _float_card(header, info, "EXPTIME", "EXPOSURE", "TELAPSE")
    if exptime is not None:
        info.exptime = exptime * u.s
    _times(header, info, scale)
    _pointing(header, info)
    _site(header, info)
    info.medium, info.medium_assumed = _medium(header)
    info.resolving_power = _float_card(header, info, "SPEC_RP", "RESPOWER")
    return info


def _time_scale(header, info) -> str:
    """The time scale TIMESYS names (lower case), UTC when it names none or one not understood."""
    scale = str(_card(header, "TIMESYS") or "UTC").strip().lower()
    if scale not in ("utc", "tt", "tai", "tdb", "tcb", "tcg", "ut1"):
        info.warn(f"TIMESYS {scale!r} not understood; UTC assumed")
        scale = "utc"
    return scale


def _times(header, info, scale):
    """Start and mid-exposure times: the mid-time as stated, else from the start."""
    mid = _card(header, "DATE-AVG")
    if mid is not None:
        info.time_mid = _time(mid, "iso", scale)
    elif _card(header, "MJD-AVG") is not None:
        info.time_mid = _time(_card(header, "MJD-AVG"), "mjd", scale)
    info.time_start = _start_time(header, info, scale)
    if info.time_mid is None and info.time_start is not None:
        info.time_mid = _mid_from_start(header, info, info.time_start, scale)


def _start_time(header, info, scale):
    """Start of the exposure from DATE-BEG/DATE-OBS (with TIME-OBS or UT for a bare date) or MJD-BEG/MJD-OBS."""
    date_obs = _card(header, "DATE-BEG", "DATE-OBS")
    if date_obs is None:
        mjd = _card(header, "MJD-BEG", "MJD-OBS")
        return None if mjd is None else _time(mjd, "mjd", scale)
    s = str(date_obs).strip()
    ut = _card(header, "TIME-OBS", "UT", "UTSTART", "UT-START")
    if "T" not in s and len(s) <= 10 and ut is not None:
        s = f"{s}T{str(ut).strip()}"
    elif "T" not in s and len(s) <= 10:
        info.warn(f"DATE-OBS {s!r} has no time of day; the start is taken as 00:00 and the mid-time is unreliable")
    return _time(s, "iso", scale)


def _mid_from_start(header, info, start, scale):
    """Mid-exposure time from the start: halfway to DATE-END/MJD-END, else plus half of EXPTIME."""
    end = _card(header, "DATE-END")
    end_mjd = _card(header, "MJD-END")
    if end is not None or end_mjd is not None:
        stop = _time(end, "iso", scale) if end is not None else _time(end_mjd, "mjd", scale)
        return start + (stop - start) / 2
    if info.exptime is not None:
        return start + info.exptime / 2
    info.warn("no EXPTIME: the start of the exposure is used as its mid-time")
    return start


def _pointing(header, info):
    """RA/DEC in degrees (checked to be in range), the reference system and the equinox."""
    ra = _card(header, "RA", "OBJRA", "OBJCTRA", "RA_OBJ", "TARG_RA")
    dec = _card(header, "DEC", "OBJDEC", "OBJCTDEC", "DEC_OBJ", "TARG_DEC")
    if ra is not None and dec is not None:
        info.ra_deg = parse_angle(ra, u.hourangle, "RA")
        info.dec_deg = parse_angle(dec, u.deg, "DEC")
        if not (0 <= info.ra_deg < 360 and -90 <= info.dec_deg <= 90):
            raise MetadataError(f"pointing RA={ra!r}, DEC={dec!r} is out of range")
    radesys = _card(header, "RADESYS", "RADECSYS")
    if radesys is not None:
        info.radesys = str(radesys).strip().upper()
    info.equinox = _float_card(header, info, "EQUINOX", "EPOCH")
    if info.radesys is None and info.equinox is not None and info.ra_deg is not None:
        # FITS standard: without RADESYS, EQUINOX < 1984 means FK4, otherwise FK5.
        info.radesys = "FK4" if info.equinox < 1984.0 else "FK5"


def _site(header, info):
    """The observatory from OBSGEO-X/Y/Z or OBSGEO-B/L/H; other site keywords are named, not used."""
    try:
        x, y, z = (_card(header, k) for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z"))
        if None not in (x, y, z):
            info.site = _geocentric_site(float(x), float(y), float(z))
            info.site_source = "OBSGEO-X/Y/Z"
        else:
            b, l_, h = (_card(header, k) for k in ("OBSGEO-B", "OBSGEO-L", "OBSGEO-H"))
            if None not in (b, l_, h):
                info.site = _geodetic_site(float(l_), float(b), float(h))
                info.site_source = "OBSGEO-B/L/H"
    except (TypeError, ValueError) as exc:
        raise MetadataError(f"observatory position keywords are not numbers ({exc})") from exc
    if info.site is None:
        # Acquisition programs write the site under other names, with differing longitude sign
        # conventions (east- or west-positive); a wrong guess would silently bias the
        # barycentric correction by up to twice the Earth's rotation speed, so say what is
        # there and how to give it rather than guess.
        found = {k: _card(header, k) for k in ("SITELAT", "SITELONG", "SITEELEV", "LATITUDE", "LONGITUD",
                                               "LONGITUDE", "ALTITUDE", "OBS-LAT", "OBS-LONG", "OBS-ELEV")}
        found = {k: v for k, v in found.items() if v is not None}
        if found:
            listed = ", ".join(f"{k}={v}" for k, v in found.items())
            info.warn(f"site keywords {listed} not used (their longitude sign convention varies); "
                      "give the site as --site lat,lon,height with longitude east-positive")


# A night's files share one observatory: its EarthLocation is made once per process (making one
# was a sixth of a FITS read). The location is never modified after reading, so sharing it is safe.
@functools.lru_cache(maxsize=64)
def _geocentric_site(x, y, z):
    return EarthLocation.from_geocentric(x, y, z, unit=u.m)


@functools.lru_cache(maxsize=64)
def _geodetic_site(lon, lat, height):
    return EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, height * u.m)


def _medium(header):
    """(medium, assumed) from CTYPE1 (AWAV air, WAVE vacuum), else from the other cards."""
    ctype = str(_card(header, "CTYPE1") or "").strip().upper()
    if ctype.startswith("AWAV"):
        return "air", False
    if ctype.startswith("WAVE"):
        return "vacuum", False
    return _medium_from_cards(header)


def _medium_from_cards(header):
    """Air unless a card says vacuum; assumed (True) when nothing says."""
    for key in ("AIRORVAC", "VACUUM", "WAVEMED", "MEDIUM"):
        if key in header:
            v = str(header[key]).strip().lower()
            if v in ("vac", "vacuum", "t", "true", "1"):
                return "vacuum", False
            if v in ("air", "f", "false", "0"):
                return "air", False
    return "air", True
