"""Per-object photometry and astrometry: a CSV file, or header keywords the user names."""

from __future__ import annotations

import math
import re
from pathlib import Path

import astropy.units as u

from ..errors import MetadataError, ReadError
from ..io import parse_angle

__all__ = ["PHOTOMETRY_COLUMNS", "load_photometry", "photometry_for", "photometry_from_header"]

#: Accepted column names of the photometry CSV (case, spaces and punctuation ignored:
#: "E(B-V)" matches "ebv", "V_err" matches "verr"). Units are fixed: V and E(B-V) in mag,
#: parallax in mas, proper motions in mas/yr (pmra = mu_alpha cos dec), ra/dec in degrees
#: or sexagesimal (ra "hh mm ss.s", dec "dd mm ss").
PHOTOMETRY_COLUMNS = {
    "object": ("object", "name", "objectname", "objname", "star", "id"),
    "v": ("v", "vmag", "magv"),
    "v_err": ("verr", "ev", "verror", "vmagerr", "evmag", "sigmav"),
    "ebv": ("ebv", "ebminusv", "reddening"),
    "ebv_err": ("ebverr", "eebv", "ebverror"),
    "parallax": ("parallax", "plx", "parallaxmas", "plxmas"),
    "parallax_err": ("parallaxerr", "plxerr", "eplx", "eparallax", "parallaxerror"),
    "pmra": ("pmra", "pmracosdec", "pmramasyr"),
    "pmra_err": ("pmraerr", "epmra", "pmraerror"),
    "pmdec": ("pmdec", "pmde", "pmdecmasyr"),
    "pmdec_err": ("pmdecerr", "epmdec", "epmde", "pmdecerror"),
    "ra": ("ra", "radeg", "raj2000", "raicrs"),
    "dec": ("dec", "decdeg", "dej2000", "decj2000", "deicrs"),
}
_PHOT_UNITS = {"v": u.mag, "v_err": u.mag, "ebv": u.mag, "ebv_err": u.mag, "parallax": u.mas,
               "parallax_err": u.mas, "pmra": u.mas / u.yr, "pmra_err": u.mas / u.yr,
               "pmdec": u.mas / u.yr, "pmdec_err": u.mas / u.yr}


def _squash(name: str) -> str:
    return re.sub(r"[^a-z0-9]", "", str(name).lower())


def _data_lines(path):
    """The file's lines that are neither blank nor ``#`` comments (header first)."""
    if not path.is_file():
        raise ReadError("photometry file not found", path=path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    except (OSError, UnicodeDecodeError) as err:
        raise ReadError(f"cannot read photometry file: {err}", path=path) from None
    if not lines:
        raise ReadError("photometry file has no header line", path=path)
    return lines


def _column_positions(header, path):
    """Canonical column name -> index in ``header`` (first match wins); object and V are required."""
    where = {}
    for i, name in enumerate(header):
        key = _squash(name)
        for canon, aliases in PHOTOMETRY_COLUMNS.items():
            if key in aliases and canon not in where:
                where[canon] = i
    for need in ("object", "v"):
        if need not in where:
            raise ReadError(f"photometry file needs a '{need}' column (accepted names: "
                            f"{', '.join(PHOTOMETRY_COLUMNS[need])}); found {header}", path=path)
    return where


def _cell(row, where, key):
    """Stripped text of column ``key`` in a data row; empty when the column or the cell is absent."""
    return row[where[key]].strip() if key in where and where[key] < len(row) else ""


def load_photometry(path, bad_rows=None):
    """Read a per-object photometry/astrometry CSV.

    The file is comma-separated with a header line; lines starting with ``#``
    are comments. Required columns: an object name and V. Optional: V error,
    E(B-V) and its error, parallax (mas) and error, proper motions (mas/yr;
    pmra = mu_alpha cos dec) and errors, ra/dec. Accepted names are listed in
    :data:`PHOTOMETRY_COLUMNS`; other columns are ignored. Empty cells mean "not
    known".

    Parameters
    ----------
    path : str or Path
    bad_rows : dict, optional
        When given, a data line that cannot be used (a value that is not a number or an
        angle, an empty name, an object listed twice) does not stop the reading: it is
        left out and recorded here as object name -> reason (an empty name as
        ``"line N"``), so one typo costs one star, not the night.

    Returns
    -------
    dict
        Object name (as written, stripped) -> row dict with keys ``object``,
        ``v``, ``v_err``, ``ebv``, ``ebv_err``, ``parallax``, ``parallax_err``,
        ``pmra``, ``pmra_err``, ``pmdec``, ``pmdec_err``, ``ra``, ``dec``: Quantities
        in the units above, or None.

    Raises
    ------
    ReadError
        Missing or unreadable file, or missing object/V column; without ``bad_rows``
        also a non-numeric value, an empty name or an object listed twice.
    """
    import csv

    path = Path(path)
    # The csv module rather than astropy's readers: cells are kept as text so that
    # sexagesimal coordinates and empty cells survive without type guessing.
    reader = csv.reader(_data_lines(path))
    header = next(reader)
    where = _column_positions(header, path)
    out, seen = {}, set()
    for lineno, row in enumerate(reader, start=2):
        if not any(c.strip() for c in row):
            continue
        name = _cell(row, where, "object")
        try:
            rec = _photometry_record(lineno, name, row, header, where, seen, path)
        except ReadError as exc:
            if bad_rows is None:
                raise
            bad_rows[name or f"line {lineno}"] = exc.reason
            out.pop(name, None)     # listed twice: no line of it is trusted
            continue
        finally:
            seen.add(name)
        out[name] = rec
    return out


def _photometry_record(lineno, name, row, header, where, seen, path):
    """One data line of a photometry file as a row dict (see :func:`load_photometry`)."""
    if not name:
        raise ReadError(f"data line {lineno}: empty object name", path=path)
    if name in seen:
        raise ReadError(f"object {name!r} listed twice (data line {lineno})", path=path)
    rec = {"object": name}
    for key, unit in _PHOT_UNITS.items():
        text = _cell(row, where, key)
        if text == "" or text.lower() in ("nan", "na", "none", "--"):
            rec[key] = None
            continue
        try:
            val = float(text)
        except ValueError:
            raise ReadError(f"data line {lineno} ({name}): {header[where[key]]!r} = {text!r} is not a number",
                            path=path) from None
        rec[key] = None if not math.isfinite(val) else val * unit
    for key in ("ra", "dec"):
        text = _cell(row, where, key)
        try:
            deg = parse_angle(text, u.hourangle if key == "ra" else u.deg, key) if text else None
        except MetadataError:
            raise ReadError(f"data line {lineno} ({name}): {key} = {text!r} is not an angle",
                            path=path) from None
        rec[key] = None if deg is None else deg * u.deg
    return rec


def photometry_for(photometry, name):
    """The row of ``photometry`` (from :func:`load_photometry`) for object ``name``, or None.

    Exact match first, then ignoring case, spaces and punctuation ("HD 12345" = "hd12345").
    """
    if not photometry or name is None:
        return None
    if name in photometry:
        return photometry[name]
    key = _squash(name)
    for k, row in photometry.items():
        if _squash(k) == key:
            return row
    return None


def _header_number(header, key):
    """Finite number in header card ``key`` (upper-cased), or None."""
    if not key:
        return None
    try:
        val = float(header.get(key.upper()))
    except (TypeError, ValueError):
        return None
    return val if math.isfinite(val) else None


def photometry_from_header(spectrum, v_key, v_err_key=None, ebv_key=None):
    """A photometry row (as :func:`load_photometry` gives) from header keywords the user names.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Read by :func:`specan.read`; its ``ObsInfo.header`` holds the cards.
    v_key : str
        Keyword holding the apparent V magnitude (e.g. "VMAG"; no default, since
        headers use many names and a wrong guess would give a wrong distance).
    v_err_key, ebv_key : str, optional
        Keywords of the V error and E(B-V).

    Returns
    -------
    dict or None
        Row dict (``object``, ``v``, ``v_err``, ``ebv``, position from the
        pointing), or None when the V keyword is absent or not a number.
    """
    from ..obsinfo import get_info

    info = get_info(spectrum)
    header = {str(k).upper(): v for k, v in (info.header or {}).items()}
    v = _header_number(header, v_key)
    if v is None:
        return None
    v_err, ebv = _header_number(header, v_err_key), _header_number(header, ebv_key)
    row = {key: None for key in _PHOT_UNITS}
    row.update({"object": info.object, "v": v * u.mag, "v_err": None if v_err is None else v_err * u.mag,
                "ebv": None if ebv is None else ebv * u.mag, "ra": None, "dec": None})
    if info.ra_deg is not None and info.dec_deg is not None:
        c = info.coord.icrs
        row["ra"], row["dec"] = c.ra.to(u.deg), c.dec.to(u.deg)
    return row
