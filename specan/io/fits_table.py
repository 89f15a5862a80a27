"""FITS binary-table spectra: wavelength, flux and error columns found by name.

Columns are recognised by common names (case-insensitive) and their TUNITn; an
inverse-variance column (IVAR, INVVAR) or variance column (VAR) is converted; a
``LOGLAM`` column is log10 of the wavelength in Angstrom (common practice). The
table may hold one row per pixel or one row of vector cells.
"""

from __future__ import annotations

import numpy as np

from ..errors import NoWavelengthError, ReadError
from ._common import RawSpectrum, guess_wave_unit, header_metadata, parse_unit

NAME = "fits-table"

WAVE_NAMES = ("WAVELENGTH", "WAVE", "LAMBDA", "LAM", "WAV", "AWAV", "WAVE_AIR", "WAVE_VAC", "LOGLAM")
FLUX_NAMES = ("FLUX", "FLUX_DENSITY", "FLAM", "SPECTRUM", "SPEC", "F", "COUNTS", "INTENSITY", "FLUX_NORM")
ERR_NAMES = {"ERROR": "std", "ERR": "std", "FLUX_ERR": "std", "ERR_FLUX": "std", "FLUXERR": "std",
             "SIGMA": "std", "UNCERTAINTY": "std", "E_FLUX": "std", "STDDEV": "std",
             "IVAR": "ivar", "INVVAR": "ivar", "INV_VAR": "ivar", "IVAR_FLUX": "ivar",
             "VAR": "var", "VARIANCE": "var", "FLUX_VAR": "var"}


def _find(names, wanted):
    upper = {n.upper(): n for n in names}
    for w in wanted:
        if w in upper:
            return upper[w]
    return None


def table_hdu_index(hdul, hdu=None):
    """Index of the first binary table with wavelength and flux columns (or the one asked for)."""
    candidates = range(len(hdul))
    if hdu is not None:
        key = int(hdu) if str(hdu).lstrip("-").isdigit() else str(hdu)
        try:
            candidates = [hdul.index_of(key)]
        except (KeyError, IndexError) as exc:
            raise ReadError(f"no HDU {hdu!r} in this file (it has {len(hdul)})") from exc
    for i in candidates:
        h = hdul[i]
        if h.header.get("XTENSION", "").strip() not in ("BINTABLE", "TABLE"):
            continue
        names = h.columns.names
        if _find(names, WAVE_NAMES) and _find(names, FLUX_NAMES):
            return i
    return None


def read(path, hdul=None, hdu=None, wave_unit=None, **_):
    """Read the spectrum in the first suitable table HDU of an open HDU list."""
    index = table_hdu_index(hdul, hdu)
    if index is None:
        raise NoWavelengthError("no table with wavelength and flux columns; try --hdu", path)
    h = hdul[index]
    names = h.columns.names
    wcol, fcol = _find(names, WAVE_NAMES), _find(names, FLUX_NAMES)
    ecol = next((n for n in names if n.upper() in ERR_NAMES), None)
    data = h.data
    if data is None or len(data) == 0:
        raise ReadError(f"table HDU {index} has no rows", path)

    def column(name):
        arr = np.asarray(data[name], dtype=float)
        return arr.ravel() if arr.ndim > 1 and arr.shape[0] == 1 else (arr.ravel() if arr.ndim > 1 else arr)

    wave, flux = column(wcol), column(fcol)
    if wave.size != flux.size:
        raise ReadError(f"columns {wcol} ({wave.size}) and {fcol} ({flux.size}) differ in length", path)
    tunit = h.columns[wcol].unit
    if wcol.upper() == "LOGLAM":
        with np.errstate(over="ignore"):
            wave = 10.0 ** wave  # overflow -> inf, rejected later as not finite
        import astropy.units as u

        unit, source = u.AA, "LOGLAM (log10 Angstrom)"
    elif wave_unit is not None:
        unit, source = parse_unit(wave_unit), "override"
    elif tunit:
        unit, source = parse_unit(tunit), "header"
    else:
        unit, source = guess_wave_unit(wave), "guessed from range (no TUNIT)"
        if unit is None:
            raise NoWavelengthError(f"column {wcol} has no unit (TUNIT) and its range does not say; give --wave-unit",
                                    path)
    raw = RawSpectrum(wave=wave, wave_unit=unit, flux=flux, unit_source=source)
    funit = h.columns[fcol].unit
    if funit:
        try:
            import astropy.units as u

            raw.flux_unit = u.Unit(funit, format="fits", parse_strict="raise")
        except ValueError:
            raw.info.warn(f"flux unit {funit!r} not understood; flux taken as relative")
    if ecol is not None:
        kind = ERR_NAMES[ecol.upper()]
        e = column(ecol)
        if e.size == flux.size:
            raw.set_uncertainty(kind, e)
    header = hdul[0].header.copy()
    header.update(h.header)
    if wcol.upper() in ("AWAV", "WAVE_AIR"):
        header["CTYPE1"] = "AWAV"
    elif wcol.upper() == "WAVE_VAC":
        header["CTYPE1"] = "WAVE"
    header_metadata(header, raw.info)
    raw.info.hdu = index
    return raw
