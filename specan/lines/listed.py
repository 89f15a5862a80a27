"""The listed side of line work: which lines of a list a spectrum covers, where they fall at
the star's velocity, how far a feature may lie from them, and which of them blend.
"""

from __future__ import annotations

from typing import NamedTuple

import astropy.units as u
import numpy as np
from astropy.table import QTable

from ..doppler import C_KMS, doppler_factor
from ..linelist import load_linelist
from .data import DETECT_SIGMA, find_features

__all__ = ["ListedLines", "RowValues", "row_values", "lines_in_range", "line_widths", "match_windows", "blends", "velocities"]


class ListedLines(NamedTuple):
    """The listed lines a spectrum covers, in the spectrum's medium."""

    rows: QTable            #: their rows of the line list
    lab: np.ndarray         #: laboratory wavelengths, Angstrom
    pred: np.ndarray        #: Doppler-shifted (predicted observed) wavelengths, Angstrom
    rv: u.Quantity          #: the velocity they are shifted by
    pred_all: np.ndarray    #: predicted wavelengths of the whole list (covered or not)
    #: what the rows give every spectrum alike (:func:`row_values`), or None: made when asked for
    values: "RowValues | None" = None


class RowValues(NamedTuple):
    """Plain values of the covered rows, the same for every spectrum that covers them (read-only
    arrays: copy before handing them out)."""

    ids: list               #: the lines' ids, str
    id_array: np.ndarray    #: the same, as an array of str
    species: np.ndarray     #: species, array of str
    hydrogen: np.ndarray    #: bool: a hydrogen line
    ep_low: np.ndarray | None  #: lower-level excitation, eV (NaN unknown), where listed
    wave_air: u.Quantity    #: air wavelengths in Angstrom, with the list column's description
    wave_vac: u.Quantity    #: vacuum wavelengths in Angstrom, the same


def row_values(listed):
    """The :class:`RowValues` of ``listed`` (:class:`ListedLines`): kept with the packaged list's
    rows, made from the rows otherwise."""
    return listed.values if listed.values is not None else _row_values(listed.rows)


def _row_values(rows):
    ids = [str(i) for i in rows["id"]]
    species = np.array([str(s) for s in rows["species"]], str)
    ep = rows["ep_low"] if "ep_low" in rows.colnames else None
    ep = None if ep is None else np.asarray(getattr(ep, "value", ep), float)
    values = RowValues(ids, np.array(ids, str), species, species == "H I", ep,
                       rows["wave_air"].to(u.AA), rows["wave_vac"].to(u.AA))
    for a in values[1:]:
        if isinstance(a, np.ndarray):   # (Quantities too)
            a.flags.writeable = False
    return values


def lines_in_range(data, linelist, kinds, rv):
    """The listed lines the spectrum covers at velocity ``rv`` (estimated when None).

    Returns
    -------
    ListedLines
    """
    table = _prepare_list(linelist, kinds)
    column = _lab_column(data)
    packaged = linelist is None
    lab_all = _packaged_lab(kinds, table, column) if packaged else table[column].to_value(u.AA)
    rv_q = _resolve_rv(data, rv, lab_all)
    pred_all = lab_all * doppler_factor(rv_q)
    cov = _covered(data, pred_all)
    if packaged:
        rows, values = _packaged_rows(kinds, column, table, cov)
        return ListedLines(rows, lab_all[cov], pred_all[cov], rv_q, pred_all, values)
    return ListedLines(table[cov], lab_all[cov], pred_all[cov], rv_q, pred_all)


#: The packaged list's laboratory wavelengths and covered rows (with their :class:`RowValues`), per
#: kind selection, medium and coverage: a night's spectra cover the same lines set-up after set-up,
#: and slicing the table and reading its rows' values took ~0.4 ms a spectrum (benchmarks/bench_lines.py).
#: The packaged table itself is kept for the process (:data:`_PACKAGED`), so the rows are too.
_PACKAGED_ROWS = {}
_PACKAGED_LAB = {}
ROWS_KEPT = 16


def _packaged_lab(kinds, table, column):
    key = (None if kinds is None else tuple(kinds), column)
    lab = _PACKAGED_LAB.get(key)
    if lab is None:
        lab = table[column].to_value(u.AA)
        lab.flags.writeable = False
        _PACKAGED_LAB[key] = lab
    return lab


def _packaged_rows(kinds, column, table, cov):
    key = (None if kinds is None else tuple(kinds), column, cov.tobytes())
    found = _PACKAGED_ROWS.get(key)
    if found is None:
        rows = table[cov]
        found = (rows, _row_values(rows))
        while len(_PACKAGED_ROWS) >= ROWS_KEPT:
            _PACKAGED_ROWS.pop(next(iter(_PACKAGED_ROWS)), None)
        _PACKAGED_ROWS[key] = found
    return found


#: The packaged list, read and filtered once per process and kind selection: reading and
#: filtering it took ~3 ms a spectrum (benchmarks/bench_lines.py). Callers only index it.
_PACKAGED = {}


def _prepare_list(linelist, kinds):
    key = None if kinds is None else tuple(kinds)
    if linelist is None and key in _PACKAGED:
        return _PACKAGED[key]
    table = load_linelist() if linelist is None else (
        linelist if isinstance(linelist, QTable) else load_linelist(linelist))
    if kinds is not None and "kind" in table.colnames:
        table = table[np.isin(np.asarray(table["kind"]).astype(str), list(kinds))]
    if linelist is None:
        _PACKAGED[key] = table
    return table


def _lab_column(data):
    return "wave_vac" if data.medium == "vacuum" else "wave_air"


def _covered(data, lab_obs):
    """Lines whose observed position lies inside the spectrum with one FWHM to spare."""
    lo = data.wave[0] + data.fwhm[0]
    hi = data.wave[-1] - data.fwhm[-1]
    return (lab_obs > lo) & (lab_obs < hi)


#: km/s, made once (a composite unit is ~20 us to make, measured)
_KMS = u.km / u.s


def _resolve_rv(data, rv, lab):
    if rv is not None:
        return u.Quantity(rv, _KMS)
    # crude estimate: offsets of the strongest features to their nearest listed line within
    # +-400 km/s (specan choice: wider than the velocities of nearly all Galactic stars,
    # common practice), histogram mode refined by the median around it
    pos, _, _, emis = find_features(data, 2 * DETECT_SIGMA)
    if pos.size < 3:
        return 0.0 * u.km / u.s
    keep = ~emis
    pos = pos[keep]
    ls = np.sort(lab)
    j = np.minimum(np.maximum(np.searchsorted(ls, pos), 1), ls.size - 1)
    near = np.where(np.abs(ls[j - 1] - pos) < np.abs(ls[j] - pos), ls[j - 1], ls[j])
    v = C_KMS * (pos - near) / near
    v = v[np.abs(v) < 400]
    if v.size < 3:
        return 0.0 * u.km / u.s
    hist, edges = np.histogram(v, bins=np.arange(-400, 401, 25))
    centre = 0.5 * (edges[np.argmax(hist)] + edges[np.argmax(hist) + 1])
    return float(np.median(v[np.abs(v - centre) < 50])) * u.km / u.s


def line_widths(data, pred):
    """The spectrum's line FWHM (Angstrom) at each predicted position."""
    return np.interp(pred, data.wave, data.line_fwhm)


def match_windows(pred, fwhm_at, window):
    """Half-window (Angstrom) within which a feature is matched to each listed line.

    ``window`` is a velocity; None gives one resolution element (c/R), at least 20 km/s.
    """
    if window is None:
        win_kms = np.maximum(C_KMS * fwhm_at / pred, 20.0)
    else:
        win_kms = np.full(pred.shape, u.Quantity(window, u.km / u.s).value)
    return pred * win_kms / C_KMS


def blends(waves, ids, fwhm, inside=None):
    """For each line, the ids of the other listed lines within one resolution element.

    ``inside``: per line, the indices of further listed lines its measurement found inside its
    window and modelled (a hydrogen line's metal lines, :mod:`specan.lines.hydrogen_blends`); they
    are named too, after those within one element.
    """
    waves = np.asarray(waves, float)
    order = np.argsort(waves)
    ws = waves[order]
    lo = ws.searchsorted(waves - fwhm)
    hi = ws.searchsorted(waves + fwhm, side="right")
    out = [""] * len(waves)
    # a line alone in its element (hi - lo == 1: itself) has no partners: only the others loop
    # (the index arrays as Python numbers read once: the same lines)
    order_l, lo_l, hi_l = order.tolist(), lo.tolist(), hi.tolist()
    for i in np.flatnonzero(hi - lo > 1).tolist():
        others = [ids[order_l[j]] for j in range(lo_l[i], hi_l[i]) if order_l[j] != i]
        out[i] = ",".join(others)
    if inside is not None:
        for i, extra in enumerate(inside):
            if len(extra):
                named = [b for b in out[i].split(",") if b]
                more = [ids[k] for k in sorted(extra, key=lambda k: waves[k]) if ids[k] not in named]
                out[i] = ",".join(named + more)
    return out


def velocities(wave_obs, lab):
    """Velocity offsets c (obs - lab) / lab, km/s, of observed against laboratory wavelengths."""
    return C_KMS * (wave_obs - lab) / lab
