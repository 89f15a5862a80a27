"""The night catalogue: one row per input record, with units, written in several formats."""

from __future__ import annotations

import contextlib
import io
import time
from pathlib import Path

import numpy as np

from .files import atomic_path, inside

__all__ = ["CORE_COLUMNS", "CATALOGUE_FORMATS", "status_counts", "catalogue_meta", "assemble_catalogue",
           "write_catalogue", "CatalogueSchema", "CatalogueWriter"]

#: Catalogue formats: name -> (file suffix, astropy writer format).
CATALOGUE_FORMATS = {
    "ecsv": (".ecsv", "ascii.ecsv"),
    "csv": (".csv", "ascii.csv"),
    "fits": (".fits", "fits"),
    "votable": (".vot", "votable"),
}

#: Columns every catalogue has, in this order, with units and descriptions.
#: Stage results follow, in stage order, under the names the stages give them.
CORE_COLUMNS = (
    ("file", None, "input file as given on the command line"),
    ("object", None, "object name from the header (or the file name, see warnings)"),
    ("status", None, "ok: every available stage ran; partial: a stage declined "
                     "(see reason); error: unreadable input or a stage failed unexpectedly; "
                     "not_run: the run was interrupted before this input"),
    ("reason", None, "why a stage failed or declined, one clause per stage"),
    ("flags", None, "comma-separated flags raised by the stages, plus emission_lines (the lines "
                    "stage detected H alpha or H beta in emission) and low_snr (S/N per pixel below LOW_SNR)"),
    ("stages_run", None, "stages that produced a result for this input"),
    ("mjd_mid", "d", "mid-exposure MJD (UTC)"),
    ("exptime", "s", "exposure time"),
    ("ra", "deg", "right ascension of the pointing"),
    ("dec", "deg", "declination of the pointing"),
    ("site_known", None, "observatory location known (needed for the barycentric correction)"),
    ("medium", None, "medium of the wavelength scale as stored"),
    ("medium_assumed", None, "the file does not state its medium and the reader assumed it: if that is "
                             "wrong the velocity is off by about 83 km/s (see the report; --medium fixes it)"),
    ("resolving_power", None, "resolving power R = lambda / FWHM"),
    ("resolving_power_source", None, "where R comes from: file (or option), narrowest lines, "
                                     "template-width scan (see the velocity notes)"),
    ("snr", None, "median S/N per pixel: from the error array where the file has one, else from the flux "
                  "(specan.noise; see snr_source)"),
    ("snr_source", None, "where snr comes from: error array, or flux"),
    ("n_lines", None, "lines detected by the lines stage"),
    ("n_emission", None, "detected lines in emission"),
    ("warnings", None, "assumptions and doubts recorded while reading and analysing"),
    ("plot", None, "per-spectrum figure, relative to the output folder"),
    ("thumbnail", None, "thumbnail of the figure, relative to the output folder"),
)

_CORE_STRINGS = {"file", "object", "status", "reason", "flags", "stages_run", "medium", "warnings", "plot",
                 "thumbnail", "snr_source"}


def status_counts(records) -> dict:
    """Records per status (``ok``, ``partial``, ``error``, ``not_run``), in order of first appearance."""
    counts = {}
    for r in records:
        s = r["values"].get("status", "error")
        counts[s] = counts.get(s, 0) + 1
    return counts


def catalogue_meta(inputs, counts, interrupted, stages, overrides) -> dict:
    """The catalogue's metadata: what made it, when, from how many inputs, with which stages.

    Parameters
    ----------
    inputs : int
        Inputs named on the run.
    counts : dict
        Rows per status (see :func:`status_counts`).
    interrupted : bool
        The run stopped before every input was done.
    stages : dict
        Stage -> None if it ran, else why it did not.
    overrides : dict
        Reader overrides given for every input.

    Returns
    -------
    dict
    """
    from .. import __version__

    return {
        "specan_version": __version__,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "inputs": inputs,
        "counts": counts,
        "interrupted": interrupted,
        "stages_available": [n for n, why in stages.items() if why is None],
        "stages_not_run": {n: why for n, why in stages.items() if why is not None},
        "reader_overrides": overrides,
    }


class CatalogueSchema:
    """The catalogue's columns, learnt one record at a time (memory: the columns, not the rows).

    Column names come core first (``CORE_COLUMNS``), then in order of first appearance; a
    column's unit is the first one given; its type is decided from every value present
    (all booleans: bool; all integers: int64; all numbers: float64; anything else: string).
    """

    def __init__(self):
        self.names = [n for n, _, _ in CORE_COLUMNS]
        self._known = set(self.names)
        self.units = {n: u for n, u, _ in CORE_COLUMNS if u}
        # per column: [any value present, all bool, all int, all number]
        self._seen = {}

    def add(self, record):
        """Take in one record's columns, units and value types."""
        for k, v in record["values"].items():
            if k not in self._known:
                self._known.add(k)
                self.names.append(k)
            if v is None or k in _CORE_STRINGS:
                continue
            seen = self._seen.setdefault(k, [False, True, True, True])
            seen[0] = True
            is_bool = isinstance(v, bool)
            seen[1] &= is_bool
            seen[2] &= isinstance(v, int) and not is_bool
            seen[3] &= isinstance(v, (int, float)) and not is_bool
        for k, unit in record.get("units", {}).items():
            self.units.setdefault(k, unit)

    def kind(self, name):
        """(type, fill value for a missing entry) of a column."""
        if name in _CORE_STRINGS:
            return str, ""
        seen = self._seen.get(name)
        if not seen or not seen[0]:
            return np.float64, np.nan  # nothing measured anywhere (e.g. no second CCF peak)
        if seen[1]:
            return bool, False
        if seen[2]:
            return np.int64, 0
        if seen[3]:
            return np.float64, np.nan
        return str, ""

    def table(self, records, meta=None):
        """The rows of ``records`` as a table with this schema's columns, types and units."""
        from astropy.table import Table

        descriptions = {n: d for n, _, d in CORE_COLUMNS}
        table = Table(meta=dict(meta or {}))
        for name in self.names:
            col = _column(self.kind(name), name, [r["values"].get(name) for r in records])
            col.unit = self.units.get(name)
            col.description = descriptions.get(name)
            table.add_column(col)
        return table


def assemble_catalogue(records, meta=None):
    """Build the catalogue table (one row per record, in the given order).

    Parameters
    ----------
    records : list of dict
        ``{"values": {...}, "units": {...}}`` per input.
    meta : dict, optional
        Table metadata.

    Returns
    -------
    astropy.table.Table
        Core columns first (see ``CORE_COLUMNS``), then the stage results in
        order of first appearance; units on the columns; missing values masked.
    """
    schema = CatalogueSchema()
    for r in records:
        schema.add(r)
    return schema.table(records, meta)


def _column(kind_and_fill, name, raw):
    """One catalogue column from its raw values (None where missing)."""
    from astropy.table import Column, MaskedColumn

    kind, fill = kind_and_fill
    if kind is str:
        data = ["" if v is None else str(v) for v in raw]
        # Strings are never masked: an empty string reads back the same in every format.
        return Column(data, name=name, dtype=str)
    mask = np.array([v is None for v in raw], bool)
    data = np.array([fill if v is None else v for v in raw], dtype=kind)
    return MaskedColumn(data, name=name, mask=mask)


class CatalogueWriter:
    """Write the catalogue a chunk of rows at a time, in each format, atomically.

    ECSV and CSV are streamed: the header (written by astropy from the table with no rows)
    and then each chunk's rows as astropy's own writer formats them, so the memory used
    does not grow with the night. FITS and VOTable need the whole table at once: those
    copies (on request only) collect the chunks and are written at the end.

    Parameters
    ----------
    schema : CatalogueSchema
        The columns (every record already added).
    out_dir : pathlib.Path
        Output folder.
    formats : sequence of str
        Among ``CATALOGUE_FORMATS``.
    meta : dict
        Table metadata.
    """

    def __init__(self, schema, out_dir, formats, meta):
        self.schema, self.out, self.formats, self.meta = schema, Path(out_dir), list(formats), dict(meta)
        self.paths = {f: inside(self.out, Path("catalogue" + CATALOGUE_FORMATS[f][0])) for f in self.formats}
        self._stack = contextlib.ExitStack()
        self._streams = {}
        self._held = []

    def __enter__(self):
        empty = self.schema.table([], self.meta)
        for fmt in self.formats:
            if fmt not in _STREAMED:
                continue
            tmp = self._stack.enter_context(atomic_path(self.paths[fmt]))
            fh = self._stack.enter_context(open(tmp, "w", encoding="utf-8", newline=""))
            self._streams[fmt] = fh
            fh.write(_written(empty, fmt))
        return self

    def write(self, chunk):
        """Append a chunk of rows (a table from :meth:`CatalogueSchema.table`)."""
        if self._streams:
            text = _as_text(chunk)
            for fmt, fh in self._streams.items():
                fh.write(_rows_only(_written(text, fmt), fmt))
        if any(f not in _STREAMED for f in self.formats):
            self._held.append(chunk)

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                held = [f for f in self.formats if f not in _STREAMED]
                if held:
                    from astropy.table import vstack

                    table = vstack(self._held) if self._held else self.schema.table([])
                    table.meta = dict(self.meta)
                    write_catalogue(table, self.out, held)
        finally:
            self._stack.__exit__(exc_type, exc, tb)   # renames the streamed files into place
        return False


#: Formats written a chunk at a time (text formats whose header does not depend on the rows).
_STREAMED = ("ecsv", "csv")


def _as_text(chunk):
    """The chunk with each masked column as the text astropy writes for it ("" where masked).

    astropy's text writers take a masked column element by element (a tenth of a
    millisecond each, most of the catalogue's writing time); a column's values formatted by
    astropy itself (``info.iter_str_vals``) and written as text come out the same (numbers
    and booleans need no quoting, a masked entry is ``""`` either way), and only the
    rows are kept (the header comes from the typed table).
    """
    from astropy.table import Column, MaskedColumn

    out = chunk.copy(copy_data=False)
    for name in out.colnames:
        col = out[name]
        if not isinstance(col, MaskedColumn):
            continue
        mask = np.asarray(col.mask, bool)
        plain = Column(np.asarray(col.data.data if hasattr(col.data, "data") else col.data), name=name)
        if not mask.any():
            out.replace_column(name, plain)
            continue
        text = [("" if m else v) for v, m in zip(plain.info.iter_str_vals(), mask.tolist())]
        out.replace_column(name, Column(text, name=name, dtype=str))
    return out


def _written(table, fmt) -> str:
    buf = io.StringIO()
    table.write(buf, format=CATALOGUE_FORMATS[fmt][1])
    return buf.getvalue()


def _rows_only(text, fmt) -> str:
    """The data rows of a written chunk, without the header (ECSV: comment lines and the names line)."""
    pos = 0
    if fmt == "ecsv":
        while text.startswith("#", pos):
            pos = text.index("\n", pos) + 1
    return text[text.index("\n", pos) + 1:]


def write_catalogue(table, out_dir, formats=("ecsv",)) -> list:
    """Write the catalogue in each format atomically; returns the paths written."""
    out = Path(out_dir)
    written = []
    for fmt in formats:
        suffix, writer = CATALOGUE_FORMATS[fmt]
        target = inside(out, Path("catalogue" + suffix))
        t = table
        if fmt == "fits":
            # FITS cards hold short scalar keywords only.
            t = table.copy(copy_data=False)
            t.meta = _fits_meta(table.meta)
        with atomic_path(target) as tmp:
            t.write(tmp, format=writer, overwrite=True)
        written.append(target)
    return written


def _fits_meta(meta):
    m = meta
    return {
        "SPECANV": str(m.get("specan_version", "")),
        "CREATED": str(m.get("created_utc", "")),
        "NINPUTS": int(m.get("inputs", 0)),
        "INTERRUP": bool(m.get("interrupted", False)),
        "STAGES": ",".join(m.get("stages_available", [])),
        "NOTRUN": ",".join(m.get("stages_not_run", {})),
        "COMMENT": ["specan night catalogue; status per row: ok, partial, error, not_run"],
    }
