"""1-D FITS image spectra with a linear or logarithmic wavelength WCS.

Follows the FITS WCS spectral conventions (Greisen et al. 2006, A&A 446, 747):
CTYPE1 ``WAVE`` (vacuum), ``AWAV`` (air), with the ``-LOG`` algorithm
(lambda = CRVAL1 * exp(w / CRVAL1), w = CDELT1 * (p - CRPIX1)) or linear; CDELT1 or
CD1_1; CUNIT1 (m by the standard's default, but Angstrom is what most files mean
when they omit it: specan guesses from the range and says so). The older
``DC-FLAG = 1`` log10 convention is also read (common practice).
The flux unit comes from BUNIT. An error array is taken from an image extension
called ERR/ERROR/SIGMA/UNCERT (standard deviation) or IVAR (inverse variance)
or VAR/VARIANCE of the same length, or from a band named ``sigma...`` (BANDIDn)
of a multi-band image of one aperture, whose first band is the spectrum.
"""

from __future__ import annotations

import numpy as np

from ..errors import NoWavelengthError, ReadError, UnitError
from ._common import RawSpectrum, guess_wave_unit, header_metadata, parse_unit

NAME = "fits-image"

_ERR_NAMES = {"ERR": "std", "ERROR": "std", "SIGMA": "std", "UNCERT": "std", "STDDEV": "std",
              "IVAR": "ivar", "INVVAR": "ivar", "VAR": "var", "VARIANCE": "var"}


def image_hdu_index(hdul, hdu=None):
    """Index of the first image HDU holding a 1-D spectrum (or the one asked for)."""
    if hdu is not None:
        key = int(hdu) if str(hdu).lstrip("-").isdigit() else str(hdu)
        try:
            index = hdul.index_of(key)
        except (KeyError, IndexError) as exc:
            raise ReadError(f"no HDU {hdu!r} in this file (it has {len(hdul)})") from exc
        return index if hdul[index].is_image else None
    for i, h in enumerate(hdul):
        if h.is_image and h.header.get("NAXIS", 0) >= 1 and h.header.get("NAXIS1", 0) > 1:
            return i
    return None


def _number(header, key, default=None):
    value = header.get(key, default)
    if isinstance(value, bool) or value is None:
        raise NoWavelengthError(f"keyword {key} is missing or not a number")
    try:
        return float(value)
    except (TypeError, ValueError) as exc:
        raise NoWavelengthError(f"keyword {key} = {value!r} is not a number") from exc


def wavelengths_from_header(header, n, wave_unit=None):
    """Wavelength of each pixel from a FITS spectral WCS; returns (wave, unit, unit_source)."""
    if "CRVAL1" not in header:
        raise NoWavelengthError("no CRVAL1: this image has no wavelength axis; try --hdu for another HDU")
    crval = _number(header, "CRVAL1")
    # defaults as the FITS WCS standard sets them (Greisen & Calabretta 2002, from memory; astropy.wcs
    # agrees, tests/test_io.py): CRPIX1 0, PC1_1 1
    crpix = _number(header, "CRPIX1", 0.0)
    if "CDELT1" in header:
        cdelt = _number(header, "CDELT1", 0.0) * _number(header, "PC1_1", 1.0)
    else:
        cdelt = _number(header, "CD1_1", 0.0)
    if cdelt == 0.0 or not np.isfinite(cdelt):
        raise NoWavelengthError("neither CDELT1 nor CD1_1 gives a non-zero wavelength step")
    if not (np.isfinite(crval) and np.isfinite(crpix)):
        raise NoWavelengthError("CRVAL1/CRPIX1 are not finite numbers")
    ctype = str(header.get("CTYPE1", "")).strip().upper()
    pix = np.arange(1, n + 1, dtype=float)
    w = cdelt * (pix - crpix)
    if ctype.endswith("-LOG"):
        wave = crval * np.exp(w / crval)
    elif int(header.get("DC-FLAG", 0) or 0) == 1:
        wave = 10.0 ** (crval + w)  # older DC-FLAG log10 convention (common practice)
    elif ctype in ("", "WAVE", "AWAV", "LINEAR", "LAMBDA", "WAVELENGTH"):
        wave = crval + w
    else:
        raise NoWavelengthError(f"CTYPE1 {ctype!r} is not a wavelength axis (WAVE, AWAV, WAVE-LOG, AWAV-LOG)")

    if wave_unit is not None:
        return wave, parse_unit(wave_unit), "override"
    cunit = header.get("CUNIT1")
    if cunit is not None and str(cunit).strip():
        try:
            return wave, parse_unit(cunit), "header"
        except UnitError as exc:
            raise UnitError(f"CUNIT1 {cunit!r} is not a wavelength unit; give the unit with --wave-unit") from exc
    if int(header.get("DC-FLAG", 0) or 0) == 1 or ctype in ("LINEAR", ""):
        unit = guess_wave_unit(wave)
    else:
        # The standard's default for WAVE/AWAV is metres; files that mean it are rare.
        unit = guess_wave_unit(wave)
        if unit is None and 2.5e-7 <= np.nanmin(wave) and np.nanmax(wave) <= 2.5e-6:
            import astropy.units as u

            return wave, u.m, "FITS default (m)"
    if unit is None:
        raise NoWavelengthError("CUNIT1 is missing and the range does not say the unit; give --wave-unit")
    return wave, unit, "guessed from range (no CUNIT1)"


def _error_extension(hdul, n, skip):
    for i, h in enumerate(hdul):
        if i == skip or not h.is_image or h.data is None:
            continue
        kind = _ERR_NAMES.get(str(h.name).strip().upper())
        if kind and np.asarray(h.data).squeeze().shape == (n,):
            return kind, np.asarray(h.data, dtype=float).squeeze()
    return None, None


def read(path, hdul=None, hdu=None, wave_unit=None, **_):
    """Read the 1-D image spectrum in an open HDU list."""
    index = image_hdu_index(hdul, hdu)
    if index is None:
        raise NoWavelengthError("no 1-D image HDU with data; try --hdu", path)
    h = hdul[index]
    data = np.asarray(h.data, dtype=float)
    sigma_band, band_note = None, None
    if data.ndim > 1:
        squeezed = data.squeeze()
        # multi-band layout of one extracted aperture, (bands, N) or (bands, 1, N): the first band
        # is the spectrum; with BANDIDn cards naming them, a band called "sigma..." is its
        # standard deviation (the layout long-slit extraction packages write, common practice)
        bands = data if data.ndim == 2 else (data[:, 0, :] if data.ndim == 3 and data.shape[1] == 1 else None)
        apertures = sum(1 for key in h.header if key.startswith("APNUM"))
        if squeezed.ndim == 1:
            data = squeezed
        elif apertures > 1 and data.ndim == 2:
            raise ReadError(f"HDU {index} holds {apertures} apertures (APNUMn cards), one spectrum per row; specan "
                            "reads one spectrum per file: write each aperture to its own file", path)
        elif bands is not None and bands.shape[0] <= 4:
            names = [str(h.header.get(f"BANDID{k + 1}", "")).strip() for k in range(bands.shape[0])]
            sigma = [k for k, name in enumerate(names) if name.lower().startswith("sigma")]
            data = bands[0]
            if sigma:
                sigma_band = bands[sigma[0]]
            described = f" ({names[0]!r})" if names[0] else ""
            band_note = (f"{bands.shape[0]}-band image: band 1{described} read as the spectrum"
                         + (f", band {sigma[0] + 1} ({names[sigma[0]]!r}) as its standard deviation" if sigma
                            else "; no band named sigma, so no errors from the file"))
        else:
            raise ReadError(f"HDU {index} is a {data.ndim}-D image of shape {data.shape}, not a 1-D spectrum "
                            "(specan reads extracted spectra; choose another HDU with --hdu)", path)
    n = data.size
    try:
        wave, unit, source = wavelengths_from_header(h.header, n, wave_unit)
    except ReadError as exc:
        raise type(exc)(exc.reason, path) from exc
    raw = RawSpectrum(wave=wave, wave_unit=unit, flux=data, unit_source=source)
    if "CRPIX1" not in h.header:
        raw.info.warn("CRPIX1 missing: reference pixel 0 as the FITS WCS standard sets it (CRVAL1 is the "
                      "wavelength one pixel before the first); write CRPIX1 = 1 if CRVAL1 is the first pixel's")
    bunit = h.header.get("BUNIT")
    if bunit:
        try:
            import astropy.units as u

            raw.flux_unit = u.Unit(str(bunit), format="fits", parse_strict="raise")
        except ValueError:
            raw.info.warn(f"BUNIT {bunit!r} not understood; flux taken as relative")
    if band_note:
        raw.info.warn(band_note)
    kind, err = _error_extension(hdul, n, index)
    if kind is not None:
        raw.set_uncertainty(kind, err)
    elif sigma_band is not None:
        raw.set_uncertainty("std", sigma_band)
    # Primary cards (site, time) count too when the spectrum is in an extension.
    header = hdul[0].header.copy() if index else h.header
    if index:
        header.update(h.header)
    header_metadata(header, raw.info)
    raw.info.hdu = index
    return raw
