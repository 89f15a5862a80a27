"""The night catalogue: one row per input record, with units, written in several formats."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from .files import atomic_path, inside

__all__ = ["CORE_COLUMNS", "CATALOGUE_FORMATS", "status_counts", "catalogue_meta", "assemble_catalogue",
           "write_catalogue"]

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
    ("resolving_power", None, "resolving power R = lambda / FWHM"),
    ("resolving_power_source", None, "where R comes from: file (or option), narrowest lines, "
                                     "template-width scan (see the velocity notes)"),
    ("snr", None, "median S/N per pixel (DER_SNR)"),
    ("n_lines", None, "lines detected by the lines stage"),
    ("n_emission", None, "detected lines in emission"),
    ("warnings", None, "assumptions and doubts recorded while reading and analysing"),
    ("plot", None, "per-spectrum figure, relative to the output folder"),
    ("thumbnail", None, "thumbnail of the figure, relative to the output folder"),
)

_CORE_STRINGS = {"file", "object", "status", "reason", "flags", "stages_run", "medium", "warnings", "plot",
                 "thumbnail"}


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
    from astropy.table import Table

    names, units = _names_and_units(records)
    descriptions = {n: d for n, _, d in CORE_COLUMNS}
    table = Table(meta=dict(meta or {}))
    for name in names:
        col = _column(name, [r["values"].get(name) for r in records])
        col.unit = units.get(name)
        col.description = descriptions.get(name)
        table.add_column(col)
    return table


def _names_and_units(records):
    """Column names (core first, then in order of first appearance) and their units."""
    names = [n for n, _, _ in CORE_COLUMNS]
    units = {n: u for n, u, _ in CORE_COLUMNS if u}
    for r in records:
        for k in r["values"]:
            if k not in names:
                names.append(k)
        for k, unit in r.get("units", {}).items():
            units.setdefault(k, unit)
    return names, units


def _column_kind(name, present):
    """(type, fill value for a missing entry) of a column from its values present."""
    if name in _CORE_STRINGS:
        return str, ""
    if not present:
        return np.float64, np.nan  # nothing measured anywhere (e.g. no second CCF peak)
    if all(isinstance(v, bool) for v in present):
        return bool, False
    if all(isinstance(v, int) and not isinstance(v, bool) for v in present):
        return np.int64, 0
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
        return np.float64, np.nan
    return str, ""


def _column(name, raw):
    """One catalogue column from its raw values (None where missing)."""
    from astropy.table import Column, MaskedColumn

    kind, fill = _column_kind(name, [v for v in raw if v is not None])
    if kind is str:
        data = ["" if v is None else str(v) for v in raw]
        # Strings are never masked: an empty string reads back the same in every format.
        return Column(data, name=name, dtype=str)
    mask = np.array([v is None for v in raw], bool)
    data = np.array([fill if v is None else v for v in raw], dtype=kind)
    return MaskedColumn(data, name=name, mask=mask)


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
