"""Line data: the curated line, telluric and band-index lists shipped with specan.

The lists are ECSV tables with units in the top-level ``linelists/`` folder
(installed as the package ``specan.linelists``). Users extend them by copying a
file, adding rows and passing the path. Every row names its ``source``.
"""

from __future__ import annotations

from functools import lru_cache
from importlib.resources import files
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import QTable

from .errors import SpecanError
from .obsinfo import air_to_vacuum, vacuum_to_air

__all__ = ["load_linelist", "load_telluric", "masked_telluric_bands", "in_bands", "load_bands", "list_path", "LINE_COLUMNS", "BAND_COLUMNS"]

#: Columns every line list has after loading.
LINE_COLUMNS = ("id", "species", "ion", "wave_air", "wave_vac", "ep_low", "loggf", "kind", "source")
#: Columns every band list has after loading (the ``_vac`` twins are filled in when absent).
BAND_COLUMNS = ("name", "feature_min_air", "feature_max_air", "blue_min_air", "blue_max_air",
                "red_min_air", "red_max_air", "kind", "source")

_BAND_EDGES = ("feature_min", "feature_max", "blue_min", "blue_max", "red_min", "red_max")


def list_path(name_or_path) -> Path:
    """Path of a packaged list (``"stellar"``, ``"telluric"``, ``"bands"``) or of a user file.

    Parameters
    ----------
    name_or_path : str or os.PathLike
        A packaged list name or a path to an ECSV file.

    Returns
    -------
    pathlib.Path
    """
    text = str(name_or_path)
    candidate = Path(text)
    if candidate.suffix or candidate.exists() or "/" in text:
        if not candidate.is_file():
            raise SpecanError(f"line list file not found: {text}")
        return candidate
    packaged = files("specan.linelists") / f"{text}.ecsv"
    if not packaged.is_file():
        raise SpecanError(f"no packaged line list called {text!r} (try 'stellar', 'telluric' or 'bands', "
                          "or give a path to an ECSV file)")
    return Path(str(packaged))


@lru_cache(maxsize=16)
def _parse(path: str, mtime_ns: int) -> QTable:
    """Parse an ECSV file once per (path, modification time): YAML headers are slow to read."""
    return QTable.read(path, format="ascii.ecsv")


def _read(name_or_path) -> QTable:
    path = list_path(name_or_path)
    try:
        table = _parse(str(path.resolve()), path.stat().st_mtime_ns).copy()
    except Exception as exc:  # noqa: BLE001 - any parse failure is the user's file
        raise SpecanError(f"cannot read line list {path}: {exc}") from exc
    table.meta.setdefault("path", str(path))
    for name in table.colnames:  # ECSV reads empty strings as masked; keep plain text columns
        col = table[name]
        if getattr(col, "mask", None) is not None and col.dtype.kind in "US" and hasattr(col, "filled"):
            table[name] = col.filled("")
    return table


def _as_angstrom(table, name):
    col = table[name]
    if isinstance(col, u.Quantity):
        table[name] = col.to(u.AA)
    else:  # a user file without units: Angstrom is the documented default
        table[name] = np.asarray(col, dtype=float) * u.AA


def _fill_medium_pair(table, air, vac):
    """Make both the air and the vacuum column exist, converting with Morton (2000)."""
    has_air, has_vac = air in table.colnames, vac in table.colnames
    if not has_air and not has_vac:
        return False
    if has_air:
        _as_angstrom(table, air)
    if has_vac:
        _as_angstrom(table, vac)
    if not has_vac:
        table[vac] = air_to_vacuum(table[air])
    if not has_air:
        table[air] = vacuum_to_air(table[vac])
    return True


def load_linelist(name_or_path="stellar") -> QTable:
    """Load a line list as a ``QTable`` with units.

    Parameters
    ----------
    name_or_path : str or os.PathLike
        ``"stellar"`` (default, 3700-8700 A classification and velocity lines) or
        the path to an ECSV file with at least ``id`` and ``wave_air`` or ``wave_vac``
        (Angstrom when no unit is given). Missing optional columns are filled:
        the other wavelength by Morton (2000), ``species`` from ``id``, ``ion`` 1,
        ``ep_low``/``loggf`` NaN, ``kind`` "atomic", ``source`` "user list".

    Returns
    -------
    astropy.table.QTable
        Columns :data:`LINE_COLUMNS` (plus any extra ones of the file), sorted by
        ``wave_air``.

    Raises
    ------
    SpecanError
        File missing, unreadable, without wavelengths, or with duplicate ids.
    """
    table = _read(name_or_path)
    where = table.meta["path"]
    if "id" not in table.colnames:
        raise SpecanError(f"line list {where} has no 'id' column")
    if not _fill_medium_pair(table, "wave_air", "wave_vac"):
        raise SpecanError(f"line list {where} has neither 'wave_air' nor 'wave_vac'")
    table["id"] = np.asarray(table["id"]).astype(str)
    ids = list(table["id"])
    if len(set(ids)) != len(ids):
        dupes = sorted({i for i in ids if ids.count(i) > 1})
        raise SpecanError(f"line list {where} has duplicate ids: {', '.join(dupes[:5])}")
    n = len(table)
    if "species" not in table.colnames:
        table["species"] = [i.split("_")[0] for i in ids]
    if "ion" not in table.colnames:
        table["ion"] = np.ones(n, dtype=int)
    if "ep_low" not in table.colnames:
        table["ep_low"] = np.full(n, np.nan) * u.eV
    elif not isinstance(table["ep_low"], u.Quantity):
        table["ep_low"] = np.asarray(table["ep_low"], float) * u.eV
    if "loggf" not in table.colnames:
        table["loggf"] = np.full(n, np.nan)
    if "kind" not in table.colnames:
        table["kind"] = ["atomic"] * n
    if "source" not in table.colnames:
        table["source"] = ["user list"] * n
    table.sort("wave_air")
    extra = [c for c in table.colnames if c not in LINE_COLUMNS]
    return table[list(LINE_COLUMNS) + extra]


def load_telluric(name_or_path="telluric") -> QTable:
    """Load the telluric list: Earth-atmosphere bands and night-sky emission lines.

    Parameters
    ----------
    name_or_path : str or os.PathLike
        ``"telluric"`` (default) or an ECSV path with ``id``, ``kind`` and window
        edges ``wave_min_air``/``wave_max_air`` (or the ``_vac`` pair).

    Returns
    -------
    astropy.table.QTable
        One row per window, both media present, sorted by ``wave_min_air``.
    """
    table = _read(name_or_path)
    where = table.meta["path"]
    for edge in ("wave_min", "wave_max"):
        if not _fill_medium_pair(table, f"{edge}_air", f"{edge}_vac"):
            raise SpecanError(f"telluric list {where} has no {edge}_air or {edge}_vac column")
    table.sort("wave_min_air")
    return table


@lru_cache(maxsize=1)
def masked_telluric_bands():
    """(lo, hi, id) in air Angstrom of the absorption bands marked ``masked`` in the telluric list.

    One definition for the whole package (``prepare`` masks them for the lines; the noise estimate
    counts their pixels): ``linelists/telluric.ecsv`` (O2 gamma, B and A bands and the strong water
    bands; common practice, edges from memory).
    """
    t = load_telluric()
    keep = (t["kind"] == "absorption_band") & np.asarray(t["masked"], bool)
    lo, hi = t["wave_min_air"][keep].to_value("Angstrom"), t["wave_max_air"][keep].to_value("Angstrom")
    return tuple((float(a), float(b), str(i)) for a, b, i in zip(lo, hi, t["id"][keep]))


def in_bands(wave, bands):
    """Boolean array, True where ``wave`` (Angstrom) lies inside any ``(lo, hi, ...)`` of ``bands`` (edges included)."""
    wave = np.asarray(wave, float)
    inside = np.zeros(wave.shape, bool)
    for lo, hi, *_ in bands:
        inside |= (wave >= lo) & (wave <= hi)
    return inside


def load_bands(name_or_path="bands") -> QTable:
    """Load band-index definitions (feature window plus blue/red continuum windows).

    Parameters
    ----------
    name_or_path : str or os.PathLike
        ``"bands"`` (default) or an ECSV path with ``name``, ``kind``
        (``"ew"``, ``"magnitude"`` or ``"ratio"``) and the window edges
        ``feature_min``, ``feature_max``, ``blue_min``, ``blue_max``, ``red_min``,
        ``red_max`` with suffix ``_air`` or ``_vac``. A continuum window given as
        NaN is absent (one-sided indices).

    Returns
    -------
    astropy.table.QTable
    """
    table = _read(name_or_path)
    where = table.meta["path"]
    for edge in _BAND_EDGES:
        if not _fill_medium_pair(table, f"{edge}_air", f"{edge}_vac"):
            raise SpecanError(f"band list {where} has no {edge}_air or {edge}_vac column")
    if "name" not in table.colnames or "kind" not in table.colnames:
        raise SpecanError(f"band list {where} needs 'name' and 'kind' columns")
    bad = sorted(set(table["kind"]) - {"ew", "magnitude", "ratio"})
    if bad:
        raise SpecanError(f"band list {where}: unknown kind(s) {bad}; use ew, magnitude or ratio")
    if "source" not in table.colnames:
        table["source"] = ["user list"] * len(table)
    return table
