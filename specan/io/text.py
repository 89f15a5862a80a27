"""Plain-text spectra: 2-3 columns (wavelength, flux[, error]), whitespace or CSV.

Comment lines start with ``#``, ``%``, ``!`` or ``;``. The wavelength unit comes
from a header token such as ``[nm]``, ``(Angstrom)`` or ``wavelength_nm``, else
from the ``wave_unit`` override, else specan stops with an error saying so.
Header lines of the form ``# KEY = value`` or ``# KEY: value`` are read as
header cards (OBJECT, DATE-OBS, EXPTIME, RA, DEC, OBSGEO-*, ...).
"""

from __future__ import annotations

import re

import numpy as np

from ..errors import EmptyFileError, NoWavelengthError, ReadError, UnitError
from ._common import RawSpectrum, header_metadata, parse_unit

NAME = "text"

_COMMENT = ("#", "%", "!", ";")
_UNIT_TOKEN = re.compile(r"[\[(]\s*([A-Za-zµμÅ0-9.]+)\s*[\])]")
_CARD = re.compile(r"^\s*([A-Za-z][A-Za-z0-9_\-]{0,15})\s*[=:]\s*(.+?)\s*$")
_WAVE_WORDS = ("wave", "lambda", "wavelength", "lam", "wl", "awav")


def identify(path, head: bytes) -> bool:
    """True for text files: no NUL bytes and mostly printable in the first block."""
    if not head or b"\x00" in head:
        return False
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError:
        text = head.decode("latin-1")
    if text.startswith("SIMPLE  ="):
        return False
    printable = sum(ch.isprintable() or ch in "\r\n\t" for ch in text)
    return printable >= 0.97 * len(text)


def _is_number(token: str) -> bool:
    try:
        float(token)
        return True
    except ValueError:
        return False


def _unit_from_header(lines):
    """Wavelength unit from header tokens like '[nm]', '(Angstrom)', 'wave_nm'."""
    for line in lines:
        low = line.lower()
        # Only look at the part describing the wavelength column (first field).
        for m in _UNIT_TOKEN.finditer(line):
            before = low[: m.start()]
            if any(w in before for w in _WAVE_WORDS) or before.strip(" #%!;,\t") == "":
                try:
                    return parse_unit(m.group(1))
                except UnitError:
                    continue
        m = re.search(r"(?:wave(?:length)?|lambda)[_ ]?(nm|aa|angstroms?|um|micron)\b", low)
        if m:
            return parse_unit(m.group(1))
    return None


def read(path, wave_unit=None, **_):
    """Read a text spectrum; see the module docstring."""
    header_lines, cards, rows, first_data_line = _parse(_decoded(path), path)
    data = _data_array(rows, first_data_line, path)
    unit, source = _wave_unit(wave_unit, header_lines, path)
    ncol = data.shape[1]
    raw_spec = RawSpectrum(wave=data[:, 0], wave_unit=unit, flux=data[:, 1],
                           err=data[:, 2] if ncol >= 3 else None, unit_source=source)
    if cards:
        header_metadata(_header(cards), raw_spec.info)
    if raw_spec.info.object is None:
        raw_spec.info.object = _object_from_header_lines(header_lines)
    return raw_spec


def _decoded(path) -> str:
    """The file's text (UTF-8, else Latin-1); an empty file is refused."""
    with open(path, "rb") as fh:
        raw = fh.read()
    if not raw.strip():
        raise EmptyFileError("the file is empty", path)
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def _parse(text, path):
    """(header lines, header cards, data rows as tokens, line number of the first data row)."""
    header_lines, cards, rows = [], {}, []
    first_data_line = None
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith(_COMMENT):
            body = stripped.lstrip("#%!; \t")
            header_lines.append(body)
            m = _CARD.match(body)
            if m:
                cards[m.group(1).upper()] = m.group(2).strip().strip("'\"")
            continue
        tokens = [t for t in re.split(r"[,\s;]+", stripped) if t]
        if not all(_is_number(t) for t in tokens):
            if not rows:  # a column-name row before the data
                header_lines.append(stripped)
                continue
            raise ReadError(f"line {lineno} is not numbers: {stripped[:60]!r}", path)
        if first_data_line is None:
            first_data_line = lineno
        rows.append(tokens)
    return header_lines, cards, rows, first_data_line


def _data_array(rows, first_data_line, path):
    """The data rows as a float array of 2 or 3 columns, every row as wide as the first."""
    if not rows:
        raise EmptyFileError("no data rows (only comments or nothing)", path)
    ncol = len(rows[0])
    if ncol < 2 or ncol > 3:
        raise ReadError(f"expected 2-3 columns (wavelength, flux[, error]), found {ncol} on line {first_data_line}", path)
    bad = [i for i, r in enumerate(rows) if len(r) != ncol]
    if bad:
        raise ReadError(f"data row {bad[0] + 1} has {len(rows[bad[0]])} columns, the first has {ncol}", path)
    return np.array(rows, dtype=float)


def _wave_unit(wave_unit, header_lines, path):
    """(wavelength unit, where it came from): the override, else the header; neither is refused."""
    unit, source = None, "header"
    if wave_unit is not None:
        unit, source = parse_unit(wave_unit), "override"
    else:
        unit = _unit_from_header(header_lines)
    if unit is None:
        raise NoWavelengthError(
            "no wavelength unit in the file's header (e.g. '# wavelength [nm]'); give it with --wave-unit", path)
    return unit, source


def _header(cards):
    """A FITS header of the ``KEY = value`` lines (values a FITS card cannot hold are skipped)."""
    from astropy.io.fits import Header

    hdr = Header()
    for key, value in cards.items():
        try:
            hdr[key] = _coerce(value)
        except (ValueError, KeyError):
            continue
    return hdr


def _object_from_header_lines(header_lines):
    """An object name from a 'file|object|star|name <name>' line among the first three, or None."""
    for line in header_lines[:3]:
        m = re.match(r"^(?:file|object|star|name)\s+(\S.*)$", line, re.IGNORECASE)
        if m:
            return m.group(1).strip()
    return None


def _coerce(value: str):
    try:
        return int(value)
    except ValueError:
        pass
    try:
        return float(value)
    except ValueError:
        return value
