"""The night's Hertzsprung-Russell diagram: Teff against absolute visual magnitude.

Stars are placed by effective temperature (decreasing to the right, by
convention) and absolute magnitude M_V (bright at the top), with error bars, over
the main-sequence, giant and supergiant loci of the same calibration table the
numbers come from (``specan/data/mk_scales.ecsv`` via :mod:`specan.mkscales`), so
a star of type X and class Y sits on the locus of class Y by construction unless
its Teff or M_V came from elsewhere (colour temperature, parallax).
"""

from __future__ import annotations

import math
from pathlib import Path

import astropy.units as u
import numpy as np

from . import mkscales

__all__ = ["hr_points", "plot_hr", "HRPoints", "LABEL_LIMIT"]

_LOCI = (("I", "supergiants (I)", "tab:red"), ("III", "giants (III)", "tab:orange"),
         ("V", "main sequence (V)", "tab:blue"))
_NAME_KEYS = ("object", "name", "file")


def _present(row, keys):
    """The values of ``keys`` that the row (dict or table row) has and that are not masked or None."""
    for key in keys:
        try:
            val = row[key]
        except (KeyError, IndexError, ValueError):
            continue
        if val is not None and not np.ma.is_masked(val):
            yield val


def _value(row, *keys, unit=None):
    """First finite value among ``keys`` of a row (dict or table row), as float, or None."""
    for val in _present(row, keys):
        try:
            if isinstance(val, u.Quantity):
                val = val.to_value(unit) if unit is not None else val.value
            val = float(val)
        except (TypeError, ValueError, u.UnitsError):
            continue
        if math.isfinite(val):
            return val
    return None


def _text(row, *keys):
    """First non-empty text among ``keys`` of a row, or None."""
    for val in _present(row, keys):
        val = str(val).strip()
        if val and val.lower() not in ("nan", "none", "--"):
            return val
    return None


def _rows(table_or_rows):
    if hasattr(table_or_rows, "colnames"):  # astropy Table / QTable
        names = table_or_rows.colnames
        return [{n: row[n] for n in names} for row in table_or_rows]
    return [dict(r) for r in table_or_rows]


def hr_points(table_or_rows):
    """Diagram coordinates of each star, from the keys :func:`specan.physics.derive` writes.

    Teff: ``teff_k`` (else ``teff``, else from ``code`` and ``lumclass`` through the
    scale). M_V: ``m_v_abs`` (else from ``code`` and ``lumclass``). A star with a
    type but neither number is placed from its type, so every classified star
    appears.

    Parameters
    ----------
    table_or_rows : astropy Table or iterable of dict

    Returns
    -------
    placed : list of dict
        ``name``, ``teff_k``, ``teff_err_k``, ``m_v_abs``, ``m_v_abs_err``, ``lumclass``, ``origin``.
    skipped : list of (name, reason)
    """
    placed, skipped = [], []
    for i, row in enumerate(_rows(table_or_rows)):
        name = _text(row, *_NAME_KEYS) or f"row {i + 1}"
        status = _text(row, "status")
        code = _value(row, "code")
        lum = _text(row, "lumclass")
        teff = _value(row, "teff_k") or _value(row, "teff", unit=u.K)
        teff_err = _value(row, "teff_err_k") or _value(row, "teff_err", unit=u.K)
        m_v = _value(row, "m_v_abs", unit=u.mag)
        m_v_err = _value(row, "m_v_abs_err", unit=u.mag)
        origin = "derived"
        try:
            if (teff is None or m_v is None) and code is not None:
                cls = lum or "V"
                if teff is None:
                    t, te = mkscales.teff_from_type(code, cls, _value(row, "subclass_err") or 0.0)
                    teff, teff_err = float(t.to_value(u.K)), float(te.to_value(u.K))
                    origin = "from type"
                if m_v is None and lum is not None:
                    m, me = mkscales.absolute_magnitude(code, cls, _value(row, "subclass_err") or 0.0)
                    m_v, m_v_err = float(m.to_value(u.mag)), float(me.to_value(u.mag))
                    origin = "from type"
        except ValueError as err:
            skipped.append((name, f"type not understood: {err}"))
            continue
        if teff is None or m_v is None:
            why = "not classified" if code is None else "no luminosity class"
            if status == "error":
                why = "error row"
            skipped.append((name, why))
            continue
        placed.append({"name": name, "teff_k": teff, "teff_err_k": teff_err, "m_v_abs": m_v,
                       "m_v_abs_err": m_v_err, "lumclass": lum, "origin": origin})
    return placed, skipped


#: Stars named on the diagram at most: beyond, names would cover the diagram (and placing them
#: costs the square of their number); the points are still all drawn.
LABEL_LIMIT = 150

#: Names kept for the result's ``plotted`` list at most (a night of 100,000 keeps the first ones).
NAMES_KEPT = 10000

#: Above this many stars, points without error bars (a hundred thousand error bars are a grey cloud).
ERRORBAR_LIMIT = 2000


class HRPoints:
    """The diagram's stars, gathered a chunk of rows at a time: a few numbers per star.

    :func:`hr_points` of each chunk, kept as arrays (Teff, M_V and their errors), with the
    names of the first ``NAMES_KEPT`` stars placed and of the first few skipped, so that a
    night of any size is drawn without holding its rows.
    """

    def __init__(self):
        self._parts = []
        self.names = []
        self.lumclasses = []
        self.skipped = []
        self.n_skipped = 0

    def add(self, table_or_rows):
        """Place the stars of a table or of rows (see :func:`hr_points`)."""
        if hasattr(table_or_rows, "colnames"):
            # only the columns the diagram reads, as plain rows (a table row per star was slow)
            names = [n for n in _DIAGRAM_KEYS if n in table_or_rows.colnames]
            units = {n: table_or_rows[n].unit for n in names}
            columns = [_plain_values(table_or_rows[n]) for n in names]
            table_or_rows = [{n: (v * units[n] if units[n] is not None and v is not None else v)
                              for n, v in zip(names, values)} for values in zip(*columns)]
        placed, skipped = hr_points(table_or_rows)
        if placed:
            self._parts.append(np.array([[p["teff_k"], _nan(p["teff_err_k"]), p["m_v_abs"], _nan(p["m_v_abs_err"])]
                                         for p in placed], float))
            room = NAMES_KEPT - len(self.names)
            self.names.extend(p["name"] for p in placed[:max(room, 0)])
        self.n_skipped += len(skipped)
        self.skipped.extend(skipped[:max(0, 20 - len(self.skipped))])

    @property
    def values(self):
        """(n, 4) array: Teff, its error, M_V, its error (NaN: no error)."""
        return np.concatenate(self._parts) if self._parts else np.zeros((0, 4))

    def __len__(self):
        return sum(len(a) for a in self._parts)


#: The columns :func:`hr_points` reads.
_DIAGRAM_KEYS = (*_NAME_KEYS, "status", "code", "lumclass", "teff_k", "teff", "teff_err_k", "teff_err", "m_v_abs",
                 "m_v_abs_err", "subclass_err")


def _plain_values(column):
    """A column's values as Python objects, None where masked."""
    if getattr(column, "mask", None) is not None and np.any(column.mask):
        return [None if m else v for v, m in zip(np.asarray(column).tolist(), np.asarray(column.mask).tolist())]
    return np.asarray(column).tolist()


def _nan(value):
    return np.nan if value is None else float(value)


# Candidate label positions around a point (offset in points, horizontal alignment), tried in turn.
_LABEL_SPOTS = ((3, 3, "left"), (3, -9, "left"), (-3, 3, "right"), (-3, -9, "right"),
                (3, 11, "left"), (3, -17, "left"), (-3, 11, "right"), (-3, -17, "right"))


def _label_points(ax, placed, fontsize):
    """Name each star beside its point, moving a label to the first free spot around it.

    Stars of the same type crowd one place on the diagram, and labels written at one fixed
    offset covered each other. Box sizes are estimated from the font size (a character is
    about 0.6 em wide in sans-serif faces, common practice), which is enough to keep names apart
    without drawing twice.
    """
    pts = ax.transData.transform([(p["teff_k"], p["m_v_abs"]) for p in placed]) * 72.0 / ax.figure.dpi
    taken = []

    def free(box):
        return all(box[2] <= b[0] or box[0] >= b[2] or box[3] <= b[1] or box[1] >= b[3] for b in taken)

    for (px, py), p in sorted(zip(pts, placed), key=lambda t: -t[0][1]):
        name = p["name"][:20]
        w, h = 0.6 * fontsize * len(name), fontsize
        for dx, dy, ha in _LABEL_SPOTS:
            x0 = px + dx if ha == "left" else px + dx - w
            box = (x0, py + dy, x0 + w, py + dy + h)
            if free(box):
                break
        else:   # every spot taken: the first one, overlapping
            dx, dy, ha = _LABEL_SPOTS[0]
            box = (px + dx, py + dy, px + dx + w, py + dy + h)
        taken.append(box)
        ax.annotate(name, (p["teff_k"], p["m_v_abs"]), fontsize=fontsize, xytext=(dx, dy),
                    textcoords="offset points", ha=ha, zorder=4)


def plot_hr(table_or_rows, path, title="HR diagram of the night", label=True, dpi=110):
    """Draw the HR diagram of a set of stars to a PNG file.

    Parameters
    ----------
    table_or_rows : astropy Table or iterable of dict
        One row per star with (some of) ``object``, ``teff_k``, ``teff_err_k``,
        ``m_v_abs``, ``m_v_abs_err``, ``code``, ``lumclass`` (see :func:`hr_points`).
        Catalogue rows of ``specan run`` qualify.
    path : str or Path
        Output PNG; written to a temporary file and renamed, so a reader never
        sees half a file.
    title : str, optional
    label : bool, optional
        Write each star's name beside it.
    dpi : int, optional

    Returns
    -------
    dict
        ``path``, ``plotted`` (names placed), ``skipped`` ((name, reason) pairs),
        ``xlim``/``ylim`` (axis limits as drawn: Teff decreases to the right,
        M_V increases downwards) and ``loci`` (class -> number of table points drawn).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    points = table_or_rows
    if not isinstance(points, HRPoints):
        points = HRPoints()
        points.add(table_or_rows)
    values = points.values
    fig = Figure(figsize=(7.0, 6.0))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.set_xscale("log")
    scales = mkscales.load_scales()
    loci = _draw_loci(ax, scales)
    _draw_stars(ax, values)
    _set_limits_and_ticks(ax, scales, values)
    if len(values) and label and len(values) <= LABEL_LIMIT:
        placed = [{"name": n, "teff_k": v[0], "m_v_abs": v[2]} for n, v in zip(points.names, values)]
        _label_points(ax, placed, fontsize=7 if len(placed) <= 40 else 5)
    _annotate(fig, ax, title, points.n_skipped, len(values) if len(values) > LABEL_LIMIT and label else 0)
    fig.tight_layout()

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    # written in place: a caller that needs the file to appear whole (the night run) writes
    # to a temporary path of its own (specan.night.files.atomic_path)
    fig.savefig(path, format="png", dpi=dpi)
    return {"path": str(path), "plotted": list(points.names[:len(values)]), "skipped": points.skipped,
            "xlim": tuple(ax.get_xlim()), "ylim": tuple(ax.get_ylim()), "loci": loci}


def _draw_loci(ax, scales) -> dict:
    """The supergiant, giant and main-sequence loci of the scale table; class -> points drawn."""
    loci = {}
    for cls, text, colour in _LOCI:
        rows = scales[scales["lumclass"] == cls]
        rows = rows[np.argsort(rows["code"])]
        ax.plot(rows["teff"].to_value(u.K), rows["m_v"].to_value(u.mag), "-", color=colour, alpha=0.45,
                lw=2.0, label=text, zorder=1)
        loci[cls] = len(rows)
    return loci


def _draw_stars(ax, values):
    """The stars with their error bars (a missing error drawn as none), or a note that there are none."""
    if not len(values):
        ax.text(0.5, 0.5, "no classified stars", ha="center", va="center", transform=ax.transAxes)
        return
    x, xe, y, ye = values.T
    if len(values) > ERRORBAR_LIMIT:
        ax.plot(x, y, ".", ms=1.5, color="k", alpha=0.3, zorder=3, label="stars of the night", rasterized=True)
        return
    ax.errorbar(x, y, xerr=np.where(np.isfinite(xe), xe, 0.0), yerr=np.where(np.isfinite(ye), ye, 0.0),
                fmt="o", ms=4, color="k", ecolor="0.45", elinewidth=0.8, capsize=1.5, zorder=3,
                label="stars of the night")


def _set_limits_and_ticks(ax, scales, values):
    """Limits from the loci and the stars, then inverted: hot on the left, bright at the top."""
    from matplotlib.ticker import FixedLocator, NullFormatter, NullLocator

    allx = np.concatenate([scales["teff"].to_value(u.K), values[:, 0]])
    ally = np.concatenate([scales["m_v"].to_value(u.mag), values[:, 2]])
    ax.set_xlim(allx.max() * 1.15, allx.min() / 1.15)
    ticks = [t for t in (50000, 30000, 20000, 15000, 10000, 7000, 5000, 4000, 3000, 2500)
             if allx.min() / 1.15 <= t <= allx.max() * 1.15]
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.set_xticklabels([f"{t:,}" for t in ticks], fontsize=8)
    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_ylim(ally.max() + 1.0, ally.min() - 1.0)


def _annotate(fig, ax, title, n_skipped, unlabelled=0):
    """Axis labels, title, legend, how many stars were not placed, and where the loci come from."""
    ax.set_xlabel("effective temperature (K)")
    ax.set_ylabel("absolute visual magnitude $M_V$")
    ax.set_title(title, fontsize=10)
    ax.legend(loc="lower left", fontsize=7, framealpha=0.8)
    notes = []
    if n_skipped:
        notes.append(f"{n_skipped} not placed (no type or class, or error)")
    if unlabelled:
        notes.append(f"{unlabelled} stars: too many to name")
    if notes:
        ax.text(0.99, 0.01, "; ".join(notes), ha="right", va="bottom",
                fontsize=6, transform=ax.transAxes, color="0.4")
    fig.text(0.01, 0.005, "loci: specan/data/mk_scales.ecsv (Pecaut & Mamajek 2013; Martins et al. 2005; "
             "Schmidt-Kaler 1982; Alonso et al. 1999; Levesque et al. 2005; values from memory)",
             fontsize=5, color="0.4")
