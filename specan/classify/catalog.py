"""Fitting a :class:`Calibration` from a CSV catalogue of standard spectra."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import AnalysisError, ReadError, SpecanError
from .calibration import Calibration, parse_labels

__all__ = ["calibrate_catalog", "read_catalog"]


def calibrate_catalog(catalog, source=None, reader_options=None, progress=None, **settings):
    """Fit a :class:`Calibration` from a CSV catalogue of standards.

    Parameters
    ----------
    catalog : str or Path
        CSV with columns ``file`` (path relative to the catalogue) and either
        ``sptype`` and ``lumclass`` or ``mk`` (``"G2 V"``); optional ``id``. The
        reference library's ``catalog.csv`` has this form.
    source : str, optional
        Description written to the calibration (default: the catalogue path).
    reader_options : dict, optional
        Overrides passed to :func:`specan.read` for every file.
    progress : callable, optional
        Called with each file path as it is read.
    **settings
        Passed to :class:`Calibration`.

    Returns
    -------
    Calibration
        Fitted. A row whose file cannot be read or measured, or whose type cannot be
        parsed, is left out and listed in ``skipped_`` (file, reason), which the
        calibration file records; the fit needs at least 8 usable standards.
    """
    catalog = Path(catalog)
    table = read_catalog(catalog)
    cal = Calibration(source=source or str(catalog), **settings)
    X, labels, ids, skipped = _measure_rows(table, catalog.parent, cal, reader_options or {}, progress)
    if not X:
        raise AnalysisError(f"no usable standard in the catalogue ({len(skipped)} rows skipped; first: "
                            f"{skipped[0]['file']}: {skipped[0]['reason']})" if skipped else
                            "the catalogue lists no standards", catalog)
    cal.fit_criteria(np.array(X), labels, ids=ids)
    cal.skipped_ = skipped
    return cal


def read_catalog(catalog):
    """The catalogue as a Table, checked to have a ``file`` column and the types.

    Raises
    ------
    ReadError
        When the file is missing, not a readable CSV, or lacks the columns.
    """
    from astropy.table import Table

    try:
        table = Table.read(catalog, format="ascii.csv")
    except FileNotFoundError:
        raise ReadError("catalogue not found", catalog) from None
    except Exception as exc:  # noqa: BLE001 - any parse failure becomes one clear line
        raise ReadError(f"catalogue is not a readable CSV ({exc})", catalog) from None
    if "file" not in table.colnames or not (_split_columns(table) or "mk" in table.colnames):
        raise ReadError("catalogue needs a file column and either sptype and lumclass or mk "
                        f"(it has {', '.join(table.colnames)})", catalog)
    return table


def _split_columns(table):
    """Whether the catalogue gives the type as ``sptype`` and ``lumclass`` (else as ``mk``)."""
    return "sptype" in table.colnames and "lumclass" in table.colnames


def _measure_rows(table, folder, cal, reader_options, progress):
    """Criteria, labels and ids of the rows that could be read; the skipped rows with the reason."""
    from ..io import read

    split = _split_columns(table)
    X, labels, ids, skipped = [], [], [], []
    for row in table:
        path = folder / str(row["file"])
        if progress is not None:
            progress(path)
        try:
            label = _row_label(row, split)
            parse_labels([label])   # refuses a type or class it cannot read
            values = cal.measure_standard(read(path, **reader_options))
        except (SpecanError, ValueError) as exc:
            skipped.append({"file": str(row["file"]), "reason": str(getattr(exc, "reason", exc))})
            continue
        X.append(values)
        labels.append(label)
        ids.append(str(row["id"]) if "id" in table.colnames else Path(str(row["file"])).stem)
    return X, labels, ids, skipped


def _row_label(row, split):
    """(temperature type, luminosity class) of a catalogue row."""
    if split:
        return (str(row["sptype"]), str(row["lumclass"]))
    parts = str(row["mk"]).split(maxsplit=1)
    return (parts[0], parts[1] if len(parts) > 1 else "")
