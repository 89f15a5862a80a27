"""Reading spectra: a list of small format readers tried in order.

``read(source, **overrides)`` returns a specutils ``Spectrum`` with an
:class:`~specan.obsinfo.ObsInfo` in ``meta["specan"]``. FITS files go to the
image reader, then the table reader; text files to the text reader; anything
else to specutils' own registry. Every problem is a :class:`~specan.errors.SpecanError`
with a one-line reason.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty

from ..errors import (CorruptFileError, EmptyFileError, MetadataError, NoWavelengthError,
                      NonMonotonicError, ReadError, SpecanError, UnitError)
from ..obsinfo import META_KEY, ObsInfo
from . import fits_image, fits_table, text
from ._common import RawSpectrum, parse_angle, parse_site
from .._imports import import_specutils

# Every spectrum specan reads becomes a specutils Spectrum, so import it now, the light way
# (see specan/_imports.py), before any "from specutils import ..." below or elsewhere.
import_specutils()

__all__ = ["read", "READERS", "OVERRIDES", "parse_angle", "parse_site"]

#: Format readers tried in order; each has NAME, identify(path, head) and read(path, **opts).
READERS = (fits_image, fits_table, text)

#: Keyword overrides ``read`` accepts (also the CLI's reader options).
OVERRIDES = ("hdu", "wave_unit", "medium", "site", "ra", "dec", "resolving_power", "object", "format")


def read(source, **overrides):
    """Read one spectrum into a specutils ``Spectrum`` with specan metadata.

    Parameters
    ----------
    source : str, os.PathLike or specutils.Spectrum
        A file (FITS image or table, text, or anything specutils can read) or a
        ``Spectrum`` already in memory (returned with metadata attached).
    **overrides
        ``hdu`` (index or EXTNAME), ``wave_unit`` (e.g. ``"nm"``), ``medium``
        (``"air"``/``"vacuum"``), ``site`` (``"lat,lon,height"`` or EarthLocation),
        ``ra``/``dec`` (degrees or sexagesimal; RA strings in hours),
        ``resolving_power``, ``object``, ``format`` (a reader NAME to force).

    Returns
    -------
    specutils.Spectrum
        Wavelength increasing, in the file's own medium (``info.medium``); flux with
        its unit or dimensionless; uncertainty as standard deviation when known;
        ``mask`` True for unusable pixels.

    Raises
    ------
    SpecanError
        With a one-line reason naming the file and the fix.
    """
    unknown = set(overrides) - set(OVERRIDES)
    if unknown:
        raise TypeError(f"read() got unknown options {sorted(unknown)}; known: {', '.join(OVERRIDES)}")
    from specutils import Spectrum

    if isinstance(source, Spectrum):
        return _from_spectrum(source, overrides)
    path = Path(source)
    try:
        raw = _read_file(path, overrides)
        raw.info.path = str(path)
        if raw.info.format is None:
            raw.info.format = "unknown"
        with np.errstate(all="ignore"):
            return _build(raw, path, overrides)
    except SpecanError as exc:
        if exc.path is None:
            raise type(exc)(exc.reason, path) from exc
        raise
    except (ValueError, TypeError, KeyError, IndexError, OverflowError, ZeroDivisionError,
            AttributeError, UnicodeError, OSError) as exc:
        # Content we did not foresee (odd keyword types, broken values): still one line
        # about this file, so a batch can carry on; --debug shows the cause.
        raise ReadError(f"unreadable content ({type(exc).__name__}: {exc}); check the file's header and "
                        "data, or convert it to a FITS image or a text table", path) from exc


def _read_file(path: Path, overrides) -> RawSpectrum:
    if not path.exists():
        raise ReadError("no such file", path)
    if path.is_dir():
        raise ReadError("is a folder, not a spectrum file", path)
    try:
        size = path.stat().st_size
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError as exc:
        raise ReadError(f"cannot open: {exc.strerror or exc}", path) from exc
    if size == 0:
        raise EmptyFileError("the file is empty (0 bytes)", path)
    forced = overrides.get("format")
    opts = {k: overrides.get(k) for k in ("hdu", "wave_unit")}
    gzipped = head.startswith(b"\x1f\x8b")   # gzip magic: astropy opens .fits.gz itself
    inner = head
    if gzipped:
        import gzip

        try:
            with gzip.open(path, "rb") as fh:
                inner = fh.read(9)
        except (OSError, EOFError):
            raise CorruptFileError("gzip-compressed but cannot be decompressed: is it truncated?", path) from None
    if inner.startswith(b"SIMPLE  =") and forced in (None, "fits-image", "fits-table"):
        return _read_fits(path, None if gzipped else size, forced, opts)
    if forced in (None, "text") and text.identify(path, head):
        raw = text.read(path, **opts)
        raw.info.format = text.NAME
        return raw
    return _read_fallback(path)


def _read_fits(path, size, forced, opts) -> RawSpectrum:
    truncated = CorruptFileError(f"size {size} bytes is not a multiple of 2880 and the file does not end where "
                                 "its last HDU's data ends: the FITS file is truncated (copy or export it again "
                                 "from the original)", path)
    unpadded = size is not None and size % 2880 != 0   # (size None: compressed, checked when decompressed)
    if unpadded and size < 2880:     # not even one whole header record
        raise truncated
    hdul = _open_fits(path, unpadded, truncated)
    with hdul:
        unpadded_note = _check_complete(hdul, path, size, unpadded, truncated)
        return _fits_spectrum(hdul, path, forced, opts, unpadded_note)


def _open_fits(path, unpadded, truncated):
    """The file's HDU list, every HDU loaded; a file astropy cannot open is corrupt (or ``truncated``)."""
    from astropy.io import fits

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", fits.verify.VerifyWarning)
            warnings.filterwarnings("ignore", category=fits.verify.VerifyWarning, message=".*(card|Card|keyword).*")
            if unpadded:
                # astropy's notes on a short file ("may have been truncated", null bytes in a cut
                # header) would reach the user's terminal; the sizes are judged below instead
                from astropy.utils.exceptions import AstropyUserWarning

                warnings.filterwarnings("ignore", category=AstropyUserWarning)
            return fits.open(path, memmap=False, lazy_load_hdus=False)
    except (OSError, EOFError, ValueError, fits.verify.VerifyError, fits.verify.VerifyWarning, IndexError,
            TypeError) as exc:
        raise (truncated if unpadded else
               CorruptFileError(f"not a readable FITS file ({exc}); is it truncated?", path)) from exc


def _check_complete(hdul, path, size, unpadded, truncated):
    """Read every HDU's data; None for a whole file, a note for a complete but unpadded one."""
    try:
        for h in hdul:
            _ = h.data  # force the read: truncation shows here
    except (OSError, EOFError, ValueError, TypeError, IndexError) as exc:
        if unpadded:   # short of whole records and the data cannot be read: cut, say so plainly
            raise truncated from exc
        raise CorruptFileError(f"FITS data cannot be read ({exc}); is the file truncated?", path) from exc
    if not unpadded:
        return None
    # FITS files are whole 2880-byte records (FITS standard 4.0, sect. 3.1), but some writers
    # omit the final padding. Such a file is complete when it ends exactly where its last
    # HDU's data ends; anything else (e.g. a cut in a later header, which astropy drops
    # with a warning) is a truncated file.
    last = len(hdul) - 1
    if hdul.fileinfo(last)["datLoc"] + hdul[last].size != size:
        raise truncated
    return "FITS file not padded to whole 2880-byte records (FITS standard 4.0 sect. 3.1); " \
           "its data are complete and were read"


def _fits_spectrum(hdul, path, forced, opts, unpadded_note) -> RawSpectrum:
    """The spectrum of the first FITS reader (image, then table) that finds one."""
    readers = [r for r in (fits_image, fits_table) if forced in (None, r.NAME)]
    errors = []
    for reader in readers:
        try:
            raw = reader.read(path, hdul=hdul, **opts)
            raw.info.format = reader.NAME
            if unpadded_note:
                raw.info.warn(unpadded_note)
            return raw
        except NoWavelengthError as exc:
            errors.append(exc)
            if opts.get("hdu") is not None and forced is None:
                continue
    if errors:
        # When no reader found a spectrum say so once, with the most specific reason.
        specific = [e for e in errors if "try --hdu" not in e.reason] or errors
        raise specific[0]
    raise NoWavelengthError("no spectrum found in any HDU; try --hdu", path)


def _read_fallback(path) -> RawSpectrum:
    """Anything specutils' own registry identifies (its loaders, not ours)."""
    from specutils import Spectrum

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            spec = Spectrum.read(path)
    except Exception as exc:  # the registry raises many types; all mean "not readable"
        raise ReadError(f"not a format specan knows (FITS image/table, text) and specutils could not read it "
                        f"({type(exc).__name__}); convert it or name the format", path) from exc
    if isinstance(spec, (list, tuple)) or getattr(spec, "flux", None) is None or spec.flux.ndim != 1:
        raise ReadError("specutils read several or multi-dimensional spectra; specan needs one 1-D spectrum", path)
    raw = _raw_from_spectrum(spec, ObsInfo())
    raw.info.format = "specutils"
    if "header" in spec.meta:
        from ._common import header_metadata

        try:
            header_metadata(spec.meta["header"], raw.info)
        except (SpecanError, TypeError, KeyError, AttributeError):
            raw.info.warn("header from specutils not usable for metadata")
    return raw


def _raw_from_spectrum(spec, info) -> RawSpectrum:
    """The arrays of a specutils Spectrum (errors as standard deviations, mask) with ``info``."""
    raw = RawSpectrum(wave=np.asarray(spec.spectral_axis.value, dtype=float), wave_unit=spec.spectral_axis.unit,
                      flux=np.asarray(spec.flux.value, dtype=float), flux_unit=spec.flux.unit, info=info)
    if spec.uncertainty is not None:
        raw.err = np.asarray(spec.uncertainty.represent_as(StdDevUncertainty).array, dtype=float)
    if spec.mask is not None:
        raw.mask = np.asarray(spec.mask, dtype=bool)
    return raw


def _from_spectrum(spec, overrides):
    from specutils import Spectrum

    info = spec.meta.get(META_KEY)
    if isinstance(info, ObsInfo):
        info = info.copy()
        if not overrides:
            # the same axis, so its WCS too (specutils would make another, ~1 ms)
            new = Spectrum(spectral_axis=spec.spectral_axis, wcs=spec.wcs, flux=spec.flux,
                           uncertainty=spec.uncertainty, mask=spec.mask, meta=dict(spec.meta))
            new.meta[META_KEY] = info
            return new
    raw = _raw_from_spectrum(spec, info if isinstance(info, ObsInfo) else ObsInfo())
    raw.info.format = raw.info.format or "python"
    return _build(raw, raw.info.path, overrides)


def _build(raw: RawSpectrum, path, overrides):
    """Validate arrays, apply overrides, and make the ``Spectrum``."""
    from specutils import Spectrum

    info = raw.info
    wave_q, order = _wavelengths(raw, path)
    flux, err, mask = _flux_and_mask(raw, order, path)
    _apply_overrides(info, overrides, path)
    _warn_missing(info, path)
    flux_unit = raw.flux_unit if raw.flux_unit is not None else u.dimensionless_unscaled
    uncertainty = None if err is None else StdDevUncertainty(err * flux_unit)
    spec = Spectrum(spectral_axis=wave_q, wcs=linear_wcs(wave_q.value, info.medium), flux=flux * flux_unit,
                    uncertainty=uncertainty, mask=mask, meta={META_KEY: info})
    return spec


#: Largest departure of a wavelength from the straight line through the axis's ends, relative to the
#: longest wavelength, for the axis to be described by a linear FITS WCS (our choice: a few thousand
#: times float64's resolution; a log-linear axis departs by 1e-5 and more).
LINEAR_TOLERANCE = 1e-12


def linear_wcs(wave, medium="air"):
    """A 1-D FITS WCS (Angstrom, AWAV or WAVE) of an increasing linear spectral axis, else None.

    specutils describes a spectrum given only its axis by a lookup-table WCS (gwcs), ~1 ms to make,
    a quarter of a read (measured); a linear dispersion, what most 1-D spectra have, is
    ``CRVAL1 + CDELT1 (p - CRPIX1)`` and its FITS WCS costs a fifth of that. It is only the
    description: the spectral axis stays the wavelengths read, which the WCS gives to
    :data:`LINEAR_TOLERANCE` (tests/test_io.py). None (specutils then makes its own) for
    any other axis.
    """
    wave = np.asarray(wave, float)
    n = wave.size
    if n < 2:
        return None
    step = (wave[-1] - wave[0]) / (n - 1)
    if not (np.isfinite(step) and step > 0):
        return None
    if np.max(np.abs(wave[0] + step * np.arange(n) - wave)) > LINEAR_TOLERANCE * abs(wave[-1]):
        return None
    from astropy.wcs import WCS

    wcs = WCS(naxis=1)
    wcs.wcs.ctype = ["AWAV" if medium == "air" else "WAVE"]   # FITS WCS paper III (Greisen et al. 2006)
    wcs.wcs.cunit = ["Angstrom"]
    wcs.wcs.crval = [float(wave[0])]
    wcs.wcs.cdelt = [float(step)]
    wcs.wcs.crpix = [1.0]
    return wcs


def _wavelengths(raw: RawSpectrum, path):
    """(wavelengths in Angstrom, increasing; the pixel order that makes them so), checked."""
    wave = np.asarray(raw.wave, dtype=float).ravel()
    flux = np.asarray(raw.flux, dtype=float).ravel()
    n = wave.size
    if n < 2:
        raise EmptyFileError(f"only {n} pixel(s): not a spectrum", path)
    if flux.size != n:
        raise ReadError(f"{n} wavelengths but {flux.size} flux values", path)
    if raw.wave_unit is None:
        raise NoWavelengthError("wavelength unit unknown; give --wave-unit", path)
    if not np.all(np.isfinite(wave)):
        i = int(np.flatnonzero(~np.isfinite(wave))[0])
        raise NonMonotonicError(f"wavelength at pixel {i} is not a finite number", path)
    order = _increasing(wave, path)
    try:
        wave_q = (wave[order] * raw.wave_unit).to(u.AA)
    except u.UnitConversionError as exc:
        raise UnitError(f"wavelength unit {raw.wave_unit} is not a length; give --wave-unit", path) from exc
    if wave_q.value[0] <= 0:
        raise NoWavelengthError(f"wavelengths start at {wave_q[0]:.4g}, not positive; check --wave-unit", path)
    if raw.unit_source.startswith("guessed"):
        raw.info.warn(f"wavelength unit {raw.wave_unit} {raw.unit_source}; override with --wave-unit")
    return wave_q, order


def _increasing(wave, path):
    """The slice that makes a strictly monotonic axis increase; a non-monotonic one is refused."""
    step = np.diff(wave)
    if np.all(step < 0):
        return slice(None, None, -1)
    if np.all(step > 0):
        return slice(None)
    sign = np.sign(np.median(step)) or 1.0
    i = int(np.flatnonzero(step * sign <= 0)[0]) + 1
    raise NonMonotonicError(f"wavelengths are not monotonic at pixel {i} "
                            f"({wave[i - 1]:.6g} then {wave[i]:.6g}); the file needs sorting or repair", path)


def _flux_and_mask(raw: RawSpectrum, order, path):
    """(flux with unusable pixels zeroed, standard deviations or None, mask True where unusable)."""
    flux = np.asarray(raw.flux, dtype=float).ravel()[order]
    mask = ~np.isfinite(flux)
    err = None
    if raw.err is not None:
        err = np.asarray(raw.err, dtype=float).ravel()[order]
        mask |= ~np.isfinite(err) | (err <= 0)
        err = np.where(mask, np.inf, err)
    elif raw.ivar is not None:
        ivar = np.asarray(raw.ivar, dtype=float).ravel()[order]
        mask |= ~np.isfinite(ivar) | (ivar <= 0)  # zero weight = unusable (common practice)
        with np.errstate(divide="ignore", invalid="ignore"):
            err = np.where(mask, np.inf, 1.0 / np.sqrt(ivar))
    if raw.mask is not None:
        mask |= np.asarray(raw.mask, dtype=bool).ravel()[order]
    flux = np.where(np.isfinite(flux), flux, 0.0)
    if mask.all():
        raise ReadError("every pixel is non-finite or has zero weight", path)
    return flux, err, mask


def _warn_missing(info: ObsInfo, path):
    """Say what the file does not state and what is assumed instead (naming the object after the file)."""
    if info.medium_assumed:
        info.warn("medium not stated (no CTYPE1 AWAV/WAVE); air assumed, as for ground-based arc calibrations; "
                  "set --medium if wrong")
    if info.object is None and path is not None:
        info.object = Path(path).stem
        info.warn("no OBJECT keyword; object named after the file")
    if info.time_mid is None:
        info.warn("no observation time (DATE-OBS/MJD-OBS): no barycentric correction possible")
    if info.site is None:
        info.warn("no observatory position (OBSGEO-*): give --site lat,lon,height for a barycentric correction")
    if info.ra_deg is None:
        info.warn("no pointing (RA/DEC): give --ra/--dec for a barycentric correction")


def _apply_overrides(info: ObsInfo, overrides, path):
    try:
        if overrides.get("medium") is not None:
            medium = str(overrides["medium"]).lower()
            if medium not in ("air", "vacuum"):
                raise MetadataError(f"medium must be 'air' or 'vacuum', not {medium!r}")
            info.medium, info.medium_assumed = medium, False
        if overrides.get("site") is not None:
            info.site = parse_site(overrides["site"])
            info.site_source = "override"
        if overrides.get("ra") is not None:
            info.ra_deg = parse_angle(overrides["ra"], u.hourangle, "RA")
            info.radesys = info.radesys or "ICRS"
        if overrides.get("dec") is not None:
            info.dec_deg = parse_angle(overrides["dec"], u.deg, "DEC")
        if overrides.get("resolving_power") is not None:
            info.resolving_power = float(overrides["resolving_power"])
        if overrides.get("object") is not None:
            info.object = str(overrides["object"])
    except SpecanError as exc:
        raise type(exc)(exc.reason, path) from exc
