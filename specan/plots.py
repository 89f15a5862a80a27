"""Figures of a night run: one per spectrum, and the night diagram.

Figures are drawn on ``matplotlib.figure.Figure`` with the Agg canvas rather
than through pyplot: no global figure registry (memory stays flat over
thousands of spectra) and no GUI backend, so this works in worker processes
and on machines without a display.

A process draws every spectrum on one figure, made once and cleared between
spectra (making a figure and its grid of axes was a fifth of a drawing), and
the figure is rendered once: the PNG is encoded from the rendered pixels, and
the thumbnail is the spectrum panel of the same pixels, shrunk.
"""

from __future__ import annotations

import io

import numpy as np

#: Resolution (dots per inch) of the per-spectrum figure, and the thumbnail's size in pixels.
FIGURE_DPI = 90
THUMB_SIZE = (144, 54)

__all__ = ["spectrum_figures", "night_diagram"]


def _canvas(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _png(fig, dpi) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def _spectrum_arrays(spectrum):
    import astropy.units as u

    wave = np.asarray(spectrum.spectral_axis.to_value(u.AA), float)
    flux = np.asarray(spectrum.flux.value, float).copy()
    if spectrum.mask is not None:
        flux[np.asarray(spectrum.mask, bool)] = np.nan
    return wave, flux


def _line_positions(lines, limit=None):
    """(wavelength in Angstrom, label) of detected lines, deepest first (the ``limit`` deepest), or []."""
    if lines is None or len(lines) == 0:
        return []
    if "wave_obs" not in lines.colnames:  # the observed wavelength, as specan.lines.measure gives it
        return []
    import astropy.units as u

    wave = lines["wave_obs"]
    wave = np.asarray(wave.to_value(u.AA) if hasattr(wave, "unit") and wave.unit else wave, float)
    detected = np.asarray(lines["detected"], bool) if "detected" in lines.colnames else np.ones(len(lines), bool)
    label_col = "id" if "id" in lines.colnames else ("species" if "species" in lines.colnames else None)
    index = np.flatnonzero(detected & np.isfinite(wave))
    if "depth" in lines.colnames:
        depth = np.abs(np.nan_to_num(np.asarray(getattr(lines["depth"], "value", lines["depth"]), float)[index]))
        index = index[np.argsort(-depth, kind="stable")]
    return [(float(wave[i]), str(lines[label_col][i]) if label_col else "") for i in index[:limit]]


#: Font size (points) of the line names on the spectrum.
LINE_LABEL_SIZE = 6


def _draw_spectrum(ax, spectrum, lines, normalized, small=False):
    wave, flux = _spectrum_arrays(spectrum)
    ax.plot(wave, flux, lw=0.5 if small else 0.6, color="k")
    finite = flux[np.isfinite(flux)]
    if finite.size:
        # the full depth of absorption lines and the full height of emission lines set the scale
        lo, hi = finite.min(), finite.max()
        pad = 0.05 * (hi - lo or 1.0)
        ax.set_ylim(lo - pad, hi + (1 if small else 6) * pad)
    ax.set_xlim(wave[0], wave[-1]) if wave.size > 1 else None
    if small:
        ax.set_xticks([])
        ax.set_yticks([])
        return
    top = ax.get_ylim()[1]
    # Only the deepest lines are named, each at least a label's width from the others (the
    # blue of a cool star has a line every few Angstrom, and thirty names written where the
    # lines fall covered each other); every named line is marked.
    candidates = _line_positions(lines, limit=120)
    if candidates:
        x_pt = ax.transData.transform([(w, 0.0) for w, _ in candidates])[:, 0] * 72.0 / ax.figure.dpi
        kept = []
        for i in range(len(candidates)):   # deepest first
            if len(kept) == 30:
                break
            if all(abs(x_pt[i] - x_pt[j]) >= 1.3 * LINE_LABEL_SIZE for j in kept):
                kept.append(i)
        # one collection for the markers (an axvline each was a tenth of the drawing)
        ax.vlines([candidates[i][0] for i in kept], 0.0, 1.0, transform=ax.get_xaxis_transform(),
                  color="tab:blue", lw=0.4, alpha=0.5)
        for i in sorted(kept):
            w, label = candidates[i]
            ax.text(w, top, label, rotation=90, fontsize=LINE_LABEL_SIZE, ha="center", va="top", color="tab:blue",
                    clip_on=True)
    ax.set_xlabel("wavelength (Angstrom)")
    ax.set_ylabel("normalised flux" if normalized else "flux")


def _draw_rest_frame_lines(ax, spectrum, lines, velocity):
    """Deepest detected lines in velocity space about their rest wavelengths.

    Shown when the velocity stage gives no cross-correlation function: with the
    measured velocity removed, the profiles should be centred on zero.
    """
    import astropy.units as u

    rv = velocity.get("rv_topo", velocity.get("rv")) if isinstance(velocity, dict) else None
    rest_col = "wave_air" if "wave_air" in getattr(lines, "colnames", ()) else None
    if rv is None or lines is None or rest_col is None or "detected" not in lines.colnames:
        return False
    from .obsinfo import get_info

    rest = np.asarray(lines[rest_col].to_value(u.AA) if hasattr(lines[rest_col], "unit") else lines[rest_col], float)
    if get_info(spectrum).medium == "vacuum" and "wave_vac" in lines.colnames:
        rest = np.asarray(getattr(lines["wave_vac"], "value", lines["wave_vac"]), float)
    depth = np.asarray(getattr(lines["depth"], "value", lines["depth"]), float) if "depth" in lines.colnames \
        else np.ones(len(lines))
    emission = np.asarray(lines["emission"], bool) if "emission" in lines.colnames else np.zeros(len(lines), bool)
    # blended features are not centred on one rest wavelength
    blend = np.zeros(len(lines), bool)
    if "blend" in lines.colnames:
        col = lines["blend"]
        blend = (np.asarray([str(b).strip() != "" for b in col]) if col.dtype.kind in "US"
                 else np.asarray(col, bool))
    pick = np.flatnonzero(np.asarray(lines["detected"], bool) & ~emission & ~blend & np.isfinite(depth)
                          & np.isfinite(rest))
    if pick.size == 0:
        return False
    pick = pick[np.argsort(np.abs(depth[pick]))[::-1][:4]]
    rv = float(rv.to_value(u.km / u.s)) if hasattr(rv, "unit") else float(rv)
    from astropy.constants import c as _c

    wave, flux = _spectrum_arrays(spectrum)
    c = _c.to_value(u.km / u.s)
    for k, i in enumerate(pick):
        v = c * (wave / rest[i] - 1.0) - rv
        near = np.abs(v) < 400
        if near.any():
            ax.plot(v[near], flux[near] - 0.3 * k, lw=0.8, label=str(lines["id"][i]) if "id" in lines.colnames else "")
    ax.axvline(0.0, color="tab:red", lw=0.7)
    ax.set_xlim(-400, 400)
    ax.set_xlabel("velocity about the rest wavelength, measured RV removed (km/s)")
    ax.set_ylabel("flux (offset)")
    ax.legend(fontsize=6, loc="lower right")
    return True


def _draw_ccf(ax, velocity, spectrum=None, lines=None):
    """Cross-correlation function if the velocity stage returned one."""
    ccf = None
    # the keys specan.velocity.measure returns
    if isinstance(velocity, dict) and "ccf_velocity" in velocity and "ccf" in velocity:
        ccf = (velocity["ccf_velocity"], velocity["ccf"])
    if ccf is None and _draw_rest_frame_lines(ax, spectrum, lines, velocity):
        return
    if ccf is None:
        ax.text(0.5, 0.5, "no cross-correlation function\n(velocity stage did not run or return one)",
                ha="center", va="center", fontsize=7, transform=ax.transAxes)
        ax.set_axis_off()
        return
    import astropy.units as u

    v = ccf[0].to_value(u.km / u.s) if hasattr(ccf[0], "unit") else np.asarray(ccf[0], float)
    c = np.asarray(getattr(ccf[1], "value", ccf[1]), float)
    ax.plot(v, c, color="k", lw=0.7)
    peak = v[np.nanargmax(c)] if np.isfinite(c).any() else 0.0
    ax.axvline(peak, color="tab:red", lw=0.7, label="peak")
    second = velocity.get("second_peak_rv")
    if second is not None:
        second = second.to_value(u.km / u.s) if hasattr(second, "unit") else float(second)
        rv, rv_topo = velocity.get("rv"), velocity.get("rv_topo")
        if rv is not None and rv_topo is not None:
            # second_peak_rv is in the frame of rv; the CCF axis is topocentric
            second -= float(u.Quantity(rv, u.km / u.s).value - u.Quantity(rv_topo, u.km / u.s).value)
        if np.isfinite(second):
            ax.axvline(second, color="tab:orange", lw=0.7, ls="--", label="second peak")
    # the peak and its neighbourhood (a companion within 1,500 km/s), not the whole lag range
    ax.set_xlim(peak - 1500, peak + 1500)
    ax.legend(fontsize=6, loc="upper right")
    ax.set_xlabel("velocity of the template shift (km/s)")
    ax.set_ylabel("CCF")


def _draw_criteria(ax, classification):
    """Classification criteria measured on this star against the standards' values, if given."""
    crit = classification.get("criteria") if isinstance(classification, dict) else None
    if not crit:
        text = "no classification criteria"
        if isinstance(classification, dict) and classification.get("mk"):
            text = f"{classification.get('mk')}\n(classifier returned no criteria)"
        ax.text(0.5, 0.5, text, ha="center", va="center", fontsize=7, transform=ax.transAxes)
        ax.set_axis_off()
        return
    names, star, standard = [], [], []
    # specan.classify gives {name: {"value": star's or None, "standard": the relation's at the fitted type}}
    for name, value in crit.items():
        s, ref = value.get("value"), value.get("standard")
        names.append(str(name))
        star.append(float(getattr(s, "value", s)) if s is not None else np.nan)
        standard.append(float(getattr(ref, "value", ref)) if ref is not None else np.nan)
    names, star, standard = np.asarray(names), np.asarray(star, float), np.asarray(standard, float)
    # the strongest features at this type, or fifty labels would hide each other
    strength = np.nan_to_num(np.fmax(np.abs(star), np.abs(standard)), nan=-1.0)
    keep = np.sort(np.argsort(strength)[::-1][:15])
    names, star, standard = names[keep], star[keep], standard[keep]
    y = np.arange(len(names))
    ax.scatter(star, y, color="k", s=10, label="this star", zorder=3)
    if np.isfinite(standard).any():
        ax.scatter(standard, y, facecolor="none", edgecolor="tab:red", s=25, label="standard")
    ax.set_yticks(y, names, fontsize=6)
    ax.legend(fontsize=6, loc="best")
    mk = classification.get("mk")
    ax.set_title(f"strongest criteria, against the standards' relations at {mk}" if mk else
                 "strongest criteria", fontsize=7)
    ax.set_xlabel("criterion value")


_REUSED = {}


def _spectrum_figure():
    """This process's figure for spectra and its three axes (spectrum, CCF, criteria), made once."""
    if "figure" not in _REUSED:
        fig = _canvas(10, 7)
        fig.set_dpi(FIGURE_DPI)
        # fixed margins: tight_layout would draw the figure twice (a fifth of the time per spectrum)
        grid = fig.add_gridspec(2, 2, height_ratios=[1.2, 1], left=0.07, right=0.98, bottom=0.08, top=0.95,
                                hspace=0.3, wspace=0.3)
        axes = (fig.add_subplot(grid[0, :]), fig.add_subplot(grid[1, 0]), fig.add_subplot(grid[1, 1]))
        _REUSED["figure"] = (fig, axes)
    fig, axes = _REUSED["figure"]
    for ax in axes:
        _emptied(ax)
    return fig, axes


def _emptied(ax):
    """The axes without what the previous spectrum drew, its ticks kept.

    ``Axes.clear`` would drop the tick objects too, and making them again on the next draw
    was a third of a figure's time.
    """
    from matplotlib.ticker import AutoLocator, ScalarFormatter

    for artist in [*ax.lines, *ax.collections, *ax.texts, *ax.patches, *ax.images]:
        artist.remove()
    if ax.get_legend() is not None:
        ax.get_legend().remove()
    ax.set_title("")
    ax.set_xlabel("")
    ax.set_ylabel("")
    for axis in (ax.xaxis, ax.yaxis):   # the criteria panel names its ticks
        axis.set_major_locator(AutoLocator())
        axis.set_major_formatter(ScalarFormatter())
    ax.relim()
    ax.set_autoscale_on(True)
    ax.set_axis_on()   # a panel with nothing to show was switched off for the previous spectrum


def _encode_png(rgb) -> bytes:
    """PNG bytes of an (h, w, 3) uint8 image."""
    from PIL import Image

    buf = io.BytesIO()
    # fast compression: the figures are line drawings on white, level 1 is within a few per cent
    # of the default's size at a fraction of its time
    Image.fromarray(rgb).save(buf, format="png", compress_level=1)
    return buf.getvalue()


def _thumbnail(rgb, ax) -> bytes:
    """The spectrum panel of the rendered figure (inside its frame), shrunk to THUMB_SIZE."""
    from PIL import Image

    height = rgb.shape[0]
    box = ax.get_window_extent()
    x0, x1 = int(np.ceil(box.x0)) + 1, int(np.floor(box.x1)) - 1
    y0, y1 = height - int(np.floor(box.y1)) + 1, height - int(np.ceil(box.y0)) - 1   # pixel rows from the top
    panel = Image.fromarray(np.ascontiguousarray(rgb[y0:y1, x0:x1]))
    buf = io.BytesIO()
    panel.resize(THUMB_SIZE, Image.Resampling.BOX).save(buf, format="png", compress_level=1)
    return buf.getvalue()


def spectrum_figures(spectrum, lines=None, velocity=None, classification=None, title="") -> dict:
    """Draw one spectrum's figure and thumbnail.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised (or raw, if preparing did not run) spectrum.
    lines : astropy.table.QTable, optional
        Result of the lines stage; detected lines are labelled.
    velocity, classification : dict, optional
        Results of those stages (cross-correlation function, criteria).
    title : str
        Figure title.

    Returns
    -------
    dict
        ``{"full": PNG bytes, "thumb": PNG bytes}``: the figure, and its spectrum
        panel shrunk to ``THUMB_SIZE`` pixels.
    """
    from .obsinfo import get_info

    normalized = bool(get_info(spectrum).normalized)
    fig, (ax, ax_ccf, ax_criteria) = _spectrum_figure()
    _draw_spectrum(ax, spectrum, lines, normalized)
    ax.set_title(title, fontsize=9)
    _draw_ccf(ax_ccf, velocity, spectrum, lines)
    _draw_criteria(ax_criteria, classification)
    fig.canvas.draw()
    rgb = np.asarray(fig.canvas.buffer_rgba())[:, :, :3]
    return {"full": _encode_png(rgb), "thumb": _thumbnail(rgb, ax)}


def night_diagram(catalogue, path) -> str:
    """Draw the night's HR diagram (:func:`specan.hrdiagram.plot_hr`) to ``path``.

    Returns
    -------
    str
        A note for the run's summary ("": the diagram itself counts the stars it could not place).
    """
    from .hrdiagram import plot_hr

    plot_hr(catalogue, path)
    return ""
