"""The night's HTML report: one static page to share.

The page is self-contained: styles and the little sorting script are inline,
the night diagram and the thumbnails are embedded as data URIs; each thumbnail
links to the full per-spectrum figure in ``plots/`` beside the page. Rows that
need a second look (errors, flags, declined stages) come first.

Every string that can come from an input file (object names, header-derived
warnings, file names, reasons) goes through :func:`html.escape`, so a header
cannot inject markup or script into the page.
"""

from __future__ import annotations

import base64
import html
import math
import shutil
import tempfile
import urllib.parse
from pathlib import Path

import numpy as np

__all__ = ["write_report", "report_rows", "flag_counts", "ReportRows", "write_report_page", "night_of"]

#: Catalogue columns shown in the page (those present), in this order.
SHOWN = (
    ("object", "object"),
    ("file", "file"),
    ("status", "status"),
    ("flags", "flags"),
    ("mk", "MK type"),
    ("sptype", "type"),
    ("lumclass", "class"),
    ("teff", "Teff"),
    ("rv", "RV"),
    ("rv_err", "RV err"),
    ("snr", "S/N"),
    ("n_lines", "lines"),
    ("mjd_mid", "MJD"),
    ("reason", "reason"),
    ("warnings", "warnings"),
)

def flag_counts(catalogue):
    """[(flag, number of rows raising it)], most frequent first, from a night catalogue."""
    counts = {}
    if "flags" in catalogue.colnames:
        for value in catalogue["flags"]:
            text = "" if np.ma.is_masked(value) or value is None else str(value)
            for flag in {f.strip() for f in text.split(",") if f.strip()}:
                counts[flag] = counts.get(flag, 0) + 1
    return sorted(counts.items(), key=lambda t: (-t[1], t[0]))


_STYLE = """
body{font-family:system-ui,sans-serif;margin:1.5em;color:#222}
table{border-collapse:collapse;font-size:13px}
th,td{border:1px solid #ccc;padding:3px 6px;vertical-align:top}
th{background:#eee;cursor:pointer;user-select:none;white-space:nowrap}
th.asc::after{content:" \\25B2"} th.desc::after{content:" \\25BC"}
tr.error td{background:#fde2e2} tr.flagged td{background:#fff4d6} tr.not_run td{background:#e8e8e8}
.flag{display:inline-block;background:#c85;color:#fff;border-radius:3px;padding:0 4px;margin:1px;font-size:12px}
td.long{min-width:16em;max-width:28em;font-size:11px;color:#555}
img.thumb{display:block;width:144px;height:54px}
.muted{color:#777}
.medium-note{display:block;color:#a40;font-size:11px}
"""

# Sorting: click a header to sort by it (numbers by value, text alphabetically),
# click again to reverse. Hand-written because the page must not load anything.
_SCRIPT = """
(function () {
  var table = document.getElementById("catalogue");
  var body = table.tBodies[0];
  var heads = table.tHead.rows[0].cells;
  function key(cell) {
    var v = cell.getAttribute("data-value");
    if (v !== null && v !== "" && !isNaN(Number(v))) return [0, Number(v)];
    return [1, cell.textContent.trim().toLowerCase()];
  }
  function sortBy(index, descending) {
    var rows = Array.prototype.slice.call(body.rows);
    rows.sort(function (a, b) {
      var x = key(a.cells[index]), y = key(b.cells[index]);
      if (x[0] !== y[0]) return x[0] - y[0];          /* blanks and text after numbers */
      var c = x[1] < y[1] ? -1 : (x[1] > y[1] ? 1 : 0);
      if (c === 0) c = Number(a.getAttribute("data-order")) - Number(b.getAttribute("data-order"));
      return descending ? -c : c;
    });
    rows.forEach(function (r) { body.appendChild(r); });
  }
  Array.prototype.forEach.call(heads, function (th, i) {
    if (th.classList.contains("nosort")) return;
    th.addEventListener("click", function () {
      var desc = th.classList.contains("asc");
      Array.prototype.forEach.call(heads, function (h) { h.classList.remove("asc", "desc"); });
      th.classList.add(desc ? "desc" : "asc");
      sortBy(i, desc);
    });
  });
  /* A link can carry its order: report.html#sort=snr or #sort=-snr (descending). */
  var m = /^#sort=(-?)(.+)$/.exec(decodeURIComponent(location.hash || ""));
  if (m) {
    Array.prototype.forEach.call(heads, function (th, i) {
      if (th.getAttribute("data-column") === m[2]) {
        th.classList.add(m[1] ? "desc" : "asc");
        sortBy(i, m[1] === "-");
      }
    });
  }
  document.body.setAttribute("data-sortable", "ready");
})();
"""


def _esc(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _cell_value(col, i, name=""):
    """(text, sort value) of one catalogue cell; masked and NaN are blank."""
    value = col[i]
    masked = bool(np.ma.getmaskarray(col)[i]) if hasattr(col, "mask") else False
    if masked:
        return "", ""
    if col.dtype.kind == "f":
        v = float(value)
        if not math.isfinite(v):
            return "", ""
        if name.startswith("mjd"):
            text = f"{v:.5f}"  # about a second
        elif abs(v) >= 1000:
            text = f"{v:.0f}"  # every integer digit (Teff), no more
        else:
            text = f"{v:.4g}"
        return text, repr(v)
    if col.dtype.kind in "iu":
        return str(int(value)), str(int(value))
    if col.dtype.kind == "b":
        return ("yes" if value else "no"), ""
    return str(value), ""


def _needs_look(status, flags) -> int:
    """Order rows: errors, then flagged or declined, then the rest."""
    if status == "error":
        return 0
    if flags or status in ("partial", "not_run"):
        return 1
    return 2


def report_rows(catalogue):
    """Row indices of the catalogue in report order (needing a look first, then by file)."""
    status = [str(s) for s in catalogue["status"]]
    flags = [str(f) for f in catalogue["flags"]]
    files = [str(f) for f in catalogue["file"]]
    return sorted(range(len(catalogue)),
                  key=lambda i: (_needs_look(status[i], flags[i]), files[i], i))


def _data_uri(path: Path) -> str | None:
    try:
        data = path.read_bytes()
    except OSError:
        return None
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _href(relative: str) -> str:
    # Our own relative path (plots/<safe stem>-<id>.png); quoted anyway.
    return _esc(urllib.parse.quote(relative, safe="/"))


def _distinct(catalogue, name):
    """Distinct non-empty values of a column, as strings."""
    if name not in catalogue.colnames:
        return []
    seen = []
    for v in catalogue[name]:
        text = "" if v is None or (hasattr(v, "mask") and v.mask) else str(v)
        if text and text not in ("--", "nan") and text not in seen:
            seen.append(text)
    return seen


#: Columns whose distinct values in a night the report's assumptions name.
DISTINCT_COLUMNS = ("calibration", "resolving_power", "template_kind", "teff_spec", "type_evidence")


def _assumptions_html(distinct) -> str:
    """What every number in the report rests on (calibration, templates, models, frames, offline data).

    ``distinct`` maps each of :data:`DISTINCT_COLUMNS` to its distinct values in the night (at most 9).
    """
    from ._offline import IERS_NOTE
    from .obsinfo import AIR_VACUUM_FORMULA

    items = []
    cals = distinct.get("calibration") or []
    if cals:
        items.append("MK calibration: " + "; ".join(_esc(c) for c in cals) + ".")
    if any("neighbours" in e for e in distinct.get("type_evidence") or []):
        items.append("Spectral types weighed by the MILES library stars whose whole spectra match best (at rest, "
                     "13 A FWHM; Sanchez-Blazquez et al. 2006), beside the calibration's criteria; the luminosity "
                     "class is the criteria's.")
    powers = distinct.get("resolving_power") or []
    if powers:
        items.append("Resolving power as stated or assumed per file: " + ", ".join(_esc(p) for p in powers[:8])
                     + ("..." if len(powers) > 8 else "") + "; spectra are smoothed to the calibration's "
                     "resolution before classifying.")
    kinds = distinct.get("template_kind") or []
    if kinds:
        items.append("Velocity templates: " + " and ".join(
            {"library": "medians of MILES library stars (Sanchez-Blazquez et al. 2006), each shifted to laboratory "
                        "wavelengths by a zero point measured on its strong lines (uncertain by 3-11 km/s per "
                        "template, counted in rv_err)",
             "synth": "specan's synthetic spectra at laboratory wavelengths",
             "mask": "line masks at laboratory wavelengths",
             "spectrum": "spectra the user gave", "file": "spectra the user gave"}.get(k, _esc(k)) for k in kinds)
            + "; rv_err combines the noise, the segments' scatter beyond it, the templates' spread and the "
            "zero point (columns rv_err_*).")
    if distinct.get("teff_spec"):
        from .parameters import MODEL_FWHM

        items.append(f"Teff from the spectrum, log g and [Fe/H]: a quadratic spectral model learnt from the MILES "
                     f"library at {MODEL_FWHM:g} A FWHM (Cenarro et al. 2007; Prugniel et al. 2011 parameters); its "
                     "errors include its cross-validated scatter; log g weighs the luminosity class only with the "
                     "built-in calibration and for spectra no broader than the model (a calibration of one's own "
                     "standards sets the classes).")
    items.append(f"Air/vacuum wavelengths converted with {_esc(AIR_VACUUM_FORMULA)} (Morton 2000); files that do "
                 "not state their medium are taken as air (see each row's warnings).")
    items.append(_esc(IERS_NOTE) + ". Velocities are barycentric where time, pointing and site are known, "
                 "otherwise topocentric and flagged no_barycentric.")
    from .frames import ESCAPE_SPEED, HIGH_VELOCITY

    items.append("Galactic rest frame: astropy's Galactocentric defaults (v4.0); high_velocity above "
                 f"{HIGH_VELOCITY.to_value('km/s'):.0f} km/s, unbound_candidate above "
                 f"{ESCAPE_SPEED.to_value('km/s'):.0f} km/s (Piffl et al. 2014), on the velocity named in each row.")
    items.append("Distances and extinction only where photometry was given; E(B-V) as given, "
                 "Fitzpatrick (1999) law with R_V = 3.1; no reddening assumed otherwise.")
    return ('<h2>Assumptions</h2><ul id="assumptions">' + "".join(f"<li>{i}</li>" for i in items) + "</ul>")


def write_report(catalogue, out_dir, path, diagram=None, stages=None) -> Path:
    """Write the night's HTML report.

    Parameters
    ----------
    catalogue : astropy.table.Table
        The night catalogue (see :func:`specan.pipeline.assemble_catalogue`).
    out_dir : str or os.PathLike
        Output folder; plot paths in the catalogue are relative to it.
    path : str or os.PathLike
        Where to write the page.
    diagram : str or os.PathLike, optional
        Night diagram PNG to embed.
    stages : dict, optional
        Stage -> None if available, else why it did not run.

    Returns
    -------
    pathlib.Path
    """
    out = Path(out_dir)
    cols = {name: catalogue[name] for name, _ in _shown(catalogue)}
    # Written as it is built: with thumbnails embedded the page grows with the
    # night, the memory used to write it does not.
    target = Path(path)
    with target.open("w", encoding="utf-8") as fh:
        emit = fh.write
        emit(_head_html(night_of(catalogue), stages, diagram))
        emit(_table_head_html(catalogue))
        for order, i in enumerate(report_rows(catalogue)):
            emit(_row_html(catalogue, out, cols, order, i))
        emit(_TAIL)
    return target


_TAIL = f"</tbody></table><script>{_SCRIPT}</script></body></html>"

#: Report groups in page order: rows needing a look first (see :func:`_needs_look`).
_GROUPS = 3


class ReportRows:
    """The report's rows, written as the catalogue's chunks come, a temporary file per group.

    The page shows rows needing a look first (errors, then flagged or declined rows, then
    the rest; within a group in input order): each group's rows go to their own temporary
    file, and :func:`write_report_page` joins them, so no row is held in memory.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Output folder; plot paths in the catalogue are relative to it.
    columns : astropy.table.Table
        The catalogue with no rows: its columns and units make the table head.
    """

    def __init__(self, out_dir, columns):
        self.out = Path(out_dir)
        self.columns = columns
        self._files = [tempfile.TemporaryFile("w+", encoding="utf-8") for _ in range(_GROUPS)]

    def add(self, chunk, first_index=0):
        """Write the rows of a catalogue chunk; ``first_index`` is the input number of its first row."""
        cols = {name: chunk[name] for name, _ in _shown(chunk)}
        status = [str(v) for v in chunk["status"]]
        flags = [str(v) for v in chunk["flags"]]
        for i in range(len(chunk)):
            group = _needs_look(status[i], flags[i])
            # the order a sort falls back on: the page's own (group, then input)
            order = group * 10 ** 12 + first_index + i
            self._files[group].write(_row_html(chunk, self.out, cols, order, i))

    def copy_to(self, fh):
        """Write every row, in page order, to the open page ``fh``."""
        for f in self._files:
            f.flush()
            f.seek(0)
            shutil.copyfileobj(f, fh)

    def close(self):
        """Drop the temporary files."""
        for f in self._files:
            f.close()


def write_report_page(path, rows, night, stages=None, diagram=None) -> Path:
    """Write the HTML report from rows written beforehand (:class:`ReportRows`).

    Parameters
    ----------
    path : str or os.PathLike
        Where to write the page.
    rows : ReportRows
        The catalogue's rows.
    night : dict
        What the page's head says (see :func:`night_of`): ``inputs``, ``counts``,
        ``flags``, ``created_utc``, ``specan_version``, ``distinct``, ``plotted``,
        ``plots``, ``plot_for``, ``medium_assumed``.
    stages : dict, optional
        Stage -> None if available, else why it did not run.
    diagram : str or os.PathLike, optional
        Night diagram PNG to embed.

    Returns
    -------
    pathlib.Path
    """
    target = Path(path)
    with target.open("w", encoding="utf-8") as fh:
        fh.write(_head_html(night, stages, diagram))
        fh.write(_table_head_html(rows.columns))
        rows.copy_to(fh)
        fh.write(_TAIL)
    return target


def night_of(catalogue) -> dict:
    """What the report's head says about a night, from its catalogue table (see :func:`write_report_page`)."""
    counts = {}
    for v in catalogue["status"]:
        counts[str(v)] = counts.get(str(v), 0) + 1
    plotted = 0
    if "plot" in catalogue.colnames:
        plotted = sum(1 for v in catalogue["plot"] if not np.ma.is_masked(v) and str(v))
    assumed = 0
    if "medium_assumed" in catalogue.colnames:
        assumed = int(np.sum(np.ma.filled(np.asarray(catalogue["medium_assumed"]) == True, False)))  # noqa: E712
    return {"inputs": len(catalogue), "counts": counts, "flags": flag_counts(catalogue),
            "created_utc": catalogue.meta.get("created_utc", ""),
            "specan_version": catalogue.meta.get("specan_version", ""),
            "distinct": {name: _distinct(catalogue, name) for name in DISTINCT_COLUMNS},
            "plotted": plotted, "plots": None, "plot_for": [], "medium_assumed": assumed}


def _shown(catalogue):
    """(column, label) of the catalogue columns the page shows, in order."""
    shown = [(name, label) for name, label in SHOWN if name in catalogue.colnames]
    if "mk" in catalogue.colnames:  # the MK type already says both
        shown = [(name, label) for name, label in shown if name not in ("sptype", "lumclass")]
    return shown


def _head_html(night, stages, diagram) -> str:
    """The page's head and what comes before the table: summary, flags, figures, stages, diagram, assumptions."""
    parts = ["\n".join(["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
                        "<title>specan night report</title>", f"<style>{_STYLE}</style></head><body>",
                        "<h1>Night report</h1>"])]
    summary = ", ".join(f"{_esc(n)} {_esc(k)}" for k, n in sorted(night["counts"].items()))
    parts.append(f'<p id="summary">{night["inputs"]} inputs: {summary}. '
                 f'Created {_esc(night.get("created_utc", ""))} by specan '
                 f'{_esc(night.get("specan_version", ""))}.</p>')
    if night["flags"]:
        parts.append('<p id="flags">Flags raised: '
                     + ", ".join(f'<span class="flag">{_esc(k)}</span> {n}' for k, n in night["flags"]) + ".</p>")
    parts.append(_plots_html(night))
    if night.get("medium_assumed"):
        parts.append(f'<p id="medium">{night["medium_assumed"]} of {night["inputs"]} spectra come from files '
                     "that do not state their wavelength medium (air or vacuum); the reader assumed it "
                     "(see the medium column and each row's note). A wrong assumption moves the velocity by "
                     f"about {_medium_shift():.0f} km/s; rerun with --medium air or --medium vacuum.</p>")
    if stages:
        parts.append(_stages_html(stages))
    if diagram is not None:
        uri = _data_uri(Path(diagram))
        if uri:
            parts.append(f'<h2>Night diagram</h2><img id="night-diagram" src="{uri}" '
                         'alt="night diagram: temperature against luminosity class">')
    parts.append(_assumptions_html(night.get("distinct") or {}))
    return "".join(parts)


def _plots_html(night) -> str:
    """Which rows have a per-spectrum figure, and how to ask for the others."""
    how = {"flagged": "drawn for the rows with a flag, a declined or a failed stage",
           "all": "drawn for every spectrum that could be read",
           "none": "not asked for"}.get(night.get("plots"), "as the run asked")
    named = night.get("plot_for") or []
    if named:
        how += ", and for " + ", ".join(_esc(n) for n in named[:10]) + ("..." if len(named) > 10 else "")
    return (f'<p id="plots">Per-spectrum figures: {night.get("plotted", 0)} of {night["inputs"]} rows have one '
            f"({_esc(how)}); the others show \"no plot\". <code>specan run ... --plots all</code> draws every "
            "spectrum, <code>--plot-for NAME</code> the ones named; only the figures missing are drawn.</p>")


def _medium_shift() -> float:
    from .obsinfo import air_vacuum_velocity_kms

    return air_vacuum_velocity_kms()


def _medium_note(catalogue, i) -> str:
    """A row's note when the reader assumed its wavelength medium, saying what a wrong guess costs."""
    if "medium_assumed" not in catalogue.colnames:
        return ""
    value = catalogue["medium_assumed"][i]
    if np.ma.is_masked(value) or not bool(value):
        return ""
    medium = str(catalogue["medium"][i]) if "medium" in catalogue.colnames else "air"
    other, sign = ("vacuum", "more negative") if medium != "vacuum" else ("air", "more positive")
    return (f'<span class="medium-note">medium not stated, {_esc(medium)} assumed: if the wavelengths are '
            f"{other}, the velocity is about {_medium_shift():.0f} km/s {sign}; rerun with "
            f"--medium {other}.</span>")


def _stages_html(stages) -> str:
    """Which stages ran, and why the others did not."""
    ran = [n for n, why in stages.items() if why is None]
    text = f'<p id="stages">Stages run: {_esc(", ".join(ran) or "none")}.'
    missing = [(n, why) for n, why in stages.items() if why is not None]
    if missing:
        text += " Not run: " + "; ".join(f"{_esc(n)} ({_esc(w)})" for n, w in missing) + "."
    return text + "</p>"


def _table_head_html(catalogue) -> str:
    """The catalogue table's heading row (a column's unit beside its label)."""
    parts = ["<h2>Catalogue</h2><p class=\"muted\">Rows needing a look come first; "
             "click a column heading to sort. Full catalogue with units: catalogue.ecsv.</p>",
             '<table id="catalogue"><thead><tr><th class="nosort">plot</th>']
    for name, label in _shown(catalogue):
        unit = catalogue[name].unit
        unit_text = f" ({_esc(unit)})" if unit is not None and str(unit) else ""
        parts.append(f'<th data-column="{_esc(name)}">{_esc(label)}{unit_text}</th>')
    parts.append("</tr></thead><tbody>")
    return "".join(parts)


def _row_html(catalogue, out, cols, order, i) -> str:
    """One catalogue row: its thumbnail (linking to the full figure), then the shown columns."""
    status = str(catalogue["status"][i])
    flags = [f for f in str(catalogue["flags"][i]).split(",") if f]
    cls = status if status in ("error", "not_run") else ("flagged" if flags or status == "partial" else "ok")
    parts = [f'<tr class="{cls}" data-order="{order}" data-file="{_esc(catalogue["file"][i])}">',
             _plot_cell_html(catalogue, out, i)]
    for name, col in cols.items():
        text, sort_value = _cell_value(col, i, name)
        if name == "flags":
            body = "".join(f'<span class="flag">{_esc(f)}</span>' for f in flags)
            parts.append(f'<td data-value="">{body}</td>')
        elif name == "warnings":
            parts.append(f'<td class="long">{_medium_note(catalogue, i)}{_esc(text)}</td>')
        elif name == "reason":
            parts.append(f'<td class="long">{_esc(text)}</td>')
        else:
            parts.append(f'<td data-value="{_esc(sort_value)}">{_esc(text)}</td>')
    parts.append("</tr>")
    return "".join(parts)


def _plot_cell_html(catalogue, out, i) -> str:
    """The row's thumbnail, embedded, linking to its full figure; or "no plot"."""
    thumb = str(catalogue["thumbnail"][i]) if "thumbnail" in catalogue.colnames else ""
    full = str(catalogue["plot"][i]) if "plot" in catalogue.colnames else ""
    uri = _data_uri(out / thumb) if thumb else None
    if uri and full:
        obj = str(catalogue["object"][i]) if "object" in catalogue.colnames else ""
        return (f'<td><a href="{_href(full)}"><img class="thumb" src="{uri}" '
                f'alt="spectrum of {_esc(obj)}"></a></td>')
    return '<td class="muted">no plot</td>'
