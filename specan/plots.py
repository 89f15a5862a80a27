"""Figures of a night run: one per spectrum, and the night diagram.

Figures are drawn on ``matplotlib.figure.Figure`` with the Agg canvas rather
than through pyplot: no global figure registry (memory stays flat over
thousands of spectra) and no GUI backend, so this works in worker processes
and on machines without a display.

A process draws every spectrum on one figure, made once with its artists (the
spectrum, the line markers and names, the CCF and its peaks, the criteria's
points, the legends), which each spectrum gives new data; anything else a
spectrum drew is removed before the next (making the figure and its grid of
axes was a fifth of a drawing, making the artists again another fifth). Its
x labels are held where matplotlib first put them, below tick labels whose
height never changes (placing them again lays out every tick label a second
time). The figure is rendered once: the PNG is encoded from the rendered pixels, and
the thumbnail is the spectrum panel of the same pixels, shrunk. The figure's
renderer keeps the pixels of every string it has drawn (tick values, line and
criterion names, axis labels: the same few hundred on every figure of a night),
which halved a figure's time, and the PNG is written with one fixed row filter.
"""

from __future__ import annotations

import io
import struct
import zlib

import numpy as np

#: Resolution (dots per inch) of the per-spectrum figure, and the thumbnail's size in pixels.
FIGURE_DPI = 90
THUMB_SIZE = (144, 54)

__all__ = ["spectrum_figures", "night_diagram"]


def _canvas(width, height, cached_text=False):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    (_cached_text_canvas() if cached_text else FigureCanvasAgg)(fig)
    return fig


#: Texts whose pixels a process keeps (tick values, line and criterion names, axis labels; a
#: night's figures share most of them). Past this many the store starts again; so does the
#: list of texts drawn only once so far.
TEXT_CACHE_SIZE = 4000

_TEXT_CLASSES = {}
_NOT_KEPT = object()


def _cached_text_canvas():
    """An Agg canvas whose renderer keeps the pixels of every text it has drawn.

    Drawing a text with Agg lays the string out with FreeType and renders it glyph by glyph
    in Python: two thirds of a spectrum's figure went there, and the figures of a night
    write the same few hundred strings (tick values, line names, criterion names, axis
    labels) again and again. Matplotlib keeps the text's size but not its pixels, so this
    renderer keeps them: the first time a string is drawn in a font, angle and colour, the
    glyph images Agg would blend in are collected into one image (blended as Agg blends
    them), which is then drawn in one call there and every later time. The one difference
    from Agg's own drawing: a text starts on a whole pixel (Agg places it to a 64th of a
    pixel), so a name can sit up to half a pixel from where Agg would put it.
    """
    if "canvas" in _TEXT_CLASSES:
        return _TEXT_CLASSES["canvas"]
    from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag

    class _Recorder:
        """Stands in for the Agg core while a text is drawn: keeps the glyph images, draws none."""

        def __init__(self, core):
            self.core, self.glyphs, self.usable = core, [], True

        def draw_text_image(self, image, x, y, angle, gc):
            if angle != 0 or not isinstance(image, np.ndarray) or image.ndim != 2:
                self.usable = False   # not the glyph-by-glyph drawing this cache knows: Agg draws it
                self.core.draw_text_image(image, x, y, angle, gc)
                return
            self.glyphs.append((np.array(image, np.uint8), int(x), int(y)))

        def __getattr__(self, name):
            self.usable = False       # anything else (boxes of math text): Agg draws it
            return getattr(self.core, name)

    class CachedTextRenderer(RendererAgg):
        def __init__(self, width, height, dpi):
            super().__init__(width, height, dpi)
            self._texts, self._heights, self._seen_once = {}, {}, set()

        def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
            if ismath or not np.isfinite(x) or not np.isfinite(y):
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            # what Agg's drawing of a string depends on besides its place (the colour and the
            # clipping come with gc when the kept image is drawn); font features and language
            # exist from matplotlib 3.11 on
            key = (s, hash(prop), angle, gc.get_antialiased(), get_hinting_flag(),
                   getattr(mtext, "get_fontfeatures", lambda: None)(), getattr(mtext, "get_language", lambda: None)())
            x0, y0 = round(x), round(y)
            entry = self._texts.get(key, _NOT_KEPT)
            if entry is _NOT_KEPT:
                # drawn by Agg itself, at the origin moved to a whole pixel, with the glyphs kept
                core, recorder = self._renderer, _Recorder(self._renderer)
                self._renderer = recorder
                try:
                    super().draw_text(gc, x0, y0, s, prop, angle, ismath=ismath, mtext=mtext)
                finally:
                    self._renderer = core
                entry = _merged_glyphs(recorder.glyphs, x0, y0) if recorder.usable else False
                # Kept from a text's second drawing on: a figure's title (the object's and the
                # file's names) is drawn once in a night, and keeping every title's pixels made a
                # long night's memory grow by ~3 kB a figure until the store was cleared
                # (tracemalloc on 2,600 spectra). Only the key's hash is noted the first time.
                seen = hash(key)
                if seen in self._seen_once:
                    if len(self._texts) >= TEXT_CACHE_SIZE:
                        self._texts.clear()
                    self._texts[key] = entry
                    self._seen_once.discard(seen)
                else:
                    if len(self._seen_once) >= TEXT_CACHE_SIZE:
                        self._seen_once.clear()
                    self._seen_once.add(seen)
                if entry is False:
                    return
            elif entry is False:
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            if entry is not None:
                image, dx, dy = entry
                self._renderer.draw_text_image(image, x0 + dx, y0 + dy, 0, gc)

        def _get_font_height_metrics(self, prop):
            # The font's ascent, descent and line gap that every text layout asks for (the
            # hook matplotlib's text layout looks for on a renderer): read from the font file
            # once per font and size rather than at each layout, as matplotlib reads them.
            key = (hash(prop), self.dpi)
            if key not in self._heights:
                self._heights[key] = _font_height_metrics(prop, self.dpi)
            return self._heights[key]

    class CachedTextCanvas(FigureCanvasAgg):
        def get_renderer(self):
            w, h = self.get_width_height(physical=True)
            key = w, h, self.figure.dpi
            if self._lastKey != key:
                self.renderer = CachedTextRenderer(w, h, self.figure.dpi)
                self._lastKey = key
            return self.renderer

    _TEXT_CLASSES["canvas"] = CachedTextCanvas
    return CachedTextCanvas


def _merged_glyphs(glyphs, x0, y0):
    """One image of a text's glyphs and where it goes relative to the text's origin, or None (empty).

    ``glyphs`` are (coverage image, x of its left column, y of the row below its bottom row)
    as Agg's ``draw_text_image`` takes them. Where glyphs overlap, coverages combine as
    blending one after the other does: 1 - (1 - a)(1 - b).
    """
    glyphs = [(img, x, y) for img, x, y in glyphs if img.size]
    if not glyphs:
        return None
    left = min(x for _, x, _ in glyphs)
    right = max(x + img.shape[1] for img, x, _ in glyphs)
    bottom = max(y for _, _, y in glyphs)
    top = min(y - img.shape[0] for img, _, y in glyphs)
    clear = np.ones((bottom - top, right - left))
    for img, x, y in glyphs:
        rows, cols = slice(y - img.shape[0] - top, y - top), slice(x - left, x - left + img.shape[1])
        clear[rows, cols] *= 1.0 - img / 255.0
    image = np.rint(255.0 * (1.0 - clear)).astype(np.uint8)
    return image, left - x0, bottom - y0


def _font_height_metrics(prop, dpi):
    """(ascent, descent, line gap) in pixels of the font of ``prop``, as matplotlib's text layout reads them."""
    try:
        from matplotlib.font_manager import fontManager, get_font

        font = get_font(fontManager._find_fonts_by_props(prop))
        for table, gap, ascent, descent in (("OS/2", "sTypoLineGap", "sTypoAscender", "sTypoDescender"),
                                            ("hhea", "lineGap", "ascent", "descent")):
            values = font.get_sfnt_table(table)
            if values is None:
                continue
            # in matplotlib's order of operations: the same floats as its own reading
            scale = 1 / font.get_sfnt_table("head")["unitsPerEm"] * prop.get_size_in_points() * dpi / 72
            return values[ascent] * scale, -values[descent] * scale, values[gap] * scale
    except Exception:  # noqa: BLE001 - matplotlib then measures the font itself
        pass
    return None, None, None


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


#: Font size (points) of the line names on the spectrum, and how many lines are named at most.
LINE_LABEL_SIZE = 6
MAX_NAMED_LINES = 30


class _SpectrumArtists:
    """The spectrum panel's artists: the spectrum, the line markers and the line names.

    Made once on the reused figure and given each spectrum's data (making them again for
    every spectrum, the thirty names above all, was a fifth of a figure's time); on a
    fresh axes they are made for that one drawing. Names are made as many as are needed.
    """

    def __init__(self, ax, small=False):
        self.ax = ax
        self.line = ax.plot([], [], lw=0.5 if small else 0.6, color="k")[0]
        # one collection for the markers (an axvline each was a tenth of the drawing)
        self.markers = ax.vlines([], 0.0, 1.0, transform=ax.get_xaxis_transform(), color="tab:blue", lw=0.4,
                                 alpha=0.5)
        self.names = []

    def artists(self):
        return [self.line, self.markers, *self.names]

    def name(self, k):
        """The k-th line name's text artist (made when first needed)."""
        while len(self.names) <= k:
            self.names.append(self.ax.text(0.0, 0.0, "", rotation=90, fontsize=LINE_LABEL_SIZE, ha="center",
                                           va="top", color="tab:blue", clip_on=True, visible=False))
        return self.names[k]


def _draw_spectrum(ax, spectrum, lines, normalized, small=False, artists=None):
    artists = artists or _SpectrumArtists(ax, small)
    wave, flux = _spectrum_arrays(spectrum)
    artists.line.set_data(wave, flux)
    artists.line.set_visible(True)
    _autoscaled(ax)
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
            if len(kept) == MAX_NAMED_LINES:
                break
            if all(abs(x_pt[i] - x_pt[j]) >= 1.3 * LINE_LABEL_SIZE for j in kept):
                kept.append(i)
        artists.markers.set_segments([[(candidates[i][0], 0.0), (candidates[i][0], 1.0)] for i in kept])
        artists.markers.set_visible(True)
        for k, i in enumerate(sorted(kept)):
            w, label = candidates[i]
            text = artists.name(k)
            text.set_position((w, top))
            text.set_text(label)
            text.set_visible(True)
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


def _autoscaled(ax):
    """The axes' limits from the artists shown now, as plotting them would set them.

    An artist given new data does not move the limits as a new one does (the data limits
    are the shown artists' again, then the view follows them where no limit is set).
    """
    ax.relim(visible_only=True)
    ax.autoscale_view()



def _kept_legend(legends, ax, entries, with_second, loc):
    """Put on ``ax`` the legend of the first entry, or of both with ``with_second``: made by
    ``ax.legend`` once for each choice and kept in ``legends``, then reused."""
    if with_second not in legends:
        chosen = entries if with_second else entries[:1]
        legends[with_second] = ax.legend([h for h, _ in chosen], [t for _, t in chosen], fontsize=6, loc=loc)
    ax.legend_ = legends[with_second]

class _CCFArtists:
    """The CCF panel's artists (the function, its peak and second peak) and its two legends."""

    def __init__(self, ax):
        # "_" names: a legend gathered from the panel (the rest-frame profiles') leaves them out
        self.line = ax.plot([], [], color="k", lw=0.7, label="_ccf")[0]
        self.peak = ax.axvline(0.0, color="tab:red", lw=0.7, label="_peak", visible=False)
        self.second = ax.axvline(0.0, color="tab:orange", lw=0.7, ls="--", label="_second peak", visible=False)
        self.legends = {}

    def artists(self):
        return [self.line, self.peak, self.second]

    def legend(self, ax, with_second):
        """The panel's legend (made once for each set of entries, as ``ax.legend`` makes it)."""
        _kept_legend(self.legends, ax, [(self.peak, "peak"), (self.second, "second peak")], with_second,
                     "upper right")


def _draw_ccf(ax, velocity, spectrum=None, lines=None, artists=None):
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

    artists = artists or _CCFArtists(ax)
    v = ccf[0].to_value(u.km / u.s) if hasattr(ccf[0], "unit") else np.asarray(ccf[0], float)
    c = np.asarray(getattr(ccf[1], "value", ccf[1]), float)
    artists.line.set_data(v, c)
    artists.line.set_visible(True)
    peak = v[np.nanargmax(c)] if np.isfinite(c).any() else 0.0
    artists.peak.set_xdata([peak, peak])
    artists.peak.set_visible(True)
    second = velocity.get("second_peak_rv")
    if second is not None:
        second = second.to_value(u.km / u.s) if hasattr(second, "unit") else float(second)
        rv, rv_topo = velocity.get("rv"), velocity.get("rv_topo")
        if rv is not None and rv_topo is not None:
            # second_peak_rv is in the frame of rv; the CCF axis is topocentric
            second -= float(u.Quantity(rv, u.km / u.s).value - u.Quantity(rv_topo, u.km / u.s).value)
        if np.isfinite(second):
            artists.second.set_xdata([second, second])
            artists.second.set_visible(True)
    _autoscaled(ax)
    # the peak and its neighbourhood (a companion within 1,500 km/s), not the whole lag range
    ax.set_xlim(peak - 1500, peak + 1500)
    artists.legend(ax, artists.second.get_visible())
    ax.set_xlabel("velocity of the template shift (km/s)")
    ax.set_ylabel("CCF")


class _CriteriaArtists:
    """The criteria panel's two sets of points (the star's, the standards') and its two legends."""

    def __init__(self, ax):
        self.star = ax.scatter([], [], color="k", s=10, label="_this star", zorder=3)
        self.standard = ax.scatter([], [], facecolor="none", edgecolor="tab:red", s=25, label="_standard",
                                   visible=False)
        self.legends = {}

    def artists(self):
        return [self.star, self.standard]

    def legend(self, ax, with_standard):
        """The panel's legend (made once for each set of entries, as ``ax.legend`` makes it)."""
        _kept_legend(self.legends, ax, [(self.star, "this star"), (self.standard, "standard")], with_standard,
                     "best")


def _points(x, y):
    """(n, 2) offsets of the finite points (what ``scatter`` draws of x, y with NaNs)."""
    good = np.isfinite(x) & np.isfinite(y)
    return np.column_stack([x[good], y[good]])


def _draw_criteria(ax, classification, artists=None):
    """Classification criteria measured on this star against the standards' values, if given."""
    crit = classification.get("criteria") if isinstance(classification, dict) else None
    if not crit:
        text = "no classification criteria"
        if isinstance(classification, dict) and classification.get("mk"):
            text = f"{classification.get('mk')}\n(classifier returned no criteria)"
        ax.text(0.5, 0.5, text, ha="center", va="center", fontsize=7, transform=ax.transAxes)
        ax.set_axis_off()
        return
    artists = artists or _CriteriaArtists(ax)
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
    artists.star.set_offsets(_points(star, y))
    artists.star.set_visible(True)
    if np.isfinite(standard).any():
        artists.standard.set_offsets(_points(standard, y))
        artists.standard.set_visible(True)
    ax.set_yticks(y, names, fontsize=6)
    _autoscaled(ax)   # after the ticks: naming them widened the view
    artists.legend(ax, artists.standard.get_visible())
    mk = classification.get("mk")
    ax.set_title(f"strongest criteria, against the standards' relations at {mk}" if mk else
                 "strongest criteria", fontsize=7, y=1.0)
    ax.set_xlabel("criterion value")


class _ReusedFigure:
    """This process's figure for spectra: three axes (spectrum, CCF, criteria) and their artists, made once."""

    def __init__(self):
        fig = _canvas(10, 7, cached_text=True)
        fig.set_dpi(FIGURE_DPI)
        # fixed margins: tight_layout would draw the figure twice (a fifth of the time per spectrum)
        grid = fig.add_gridspec(2, 2, height_ratios=[1.2, 1], left=0.07, right=0.98, bottom=0.08, top=0.95,
                                hspace=0.3, wspace=0.3)
        self.figure = fig
        self.axes = (fig.add_subplot(grid[0, :]), fig.add_subplot(grid[1, 0]), fig.add_subplot(grid[1, 1]))
        self.spectrum = _SpectrumArtists(self.axes[0])
        self.ccf = _CCFArtists(self.axes[1])
        self.criteria = _CriteriaArtists(self.axes[2])
        self._fixed_label_places()

    def _fixed_label_places(self):
        """The axes' x labels held where matplotlib puts them, below the tick labels.

        At every draw matplotlib lays out every tick label of an axis a second time to place
        the axis label clear of them (a sixth of a figure's time). Below the axes that place
        does not depend on the spectrum: tick labels of one font are one line high whatever
        their digits, so it is found once here, on a first draw, and kept. The y labels stay
        matplotlib's to place (beside the tick labels, whose width changes); the criteria
        panel has no y label, so its names are not measured for one.
        """
        for ax in self.axes:
            ax.set_xlabel("x")
        self.figure.canvas.draw()
        for ax in self.axes:
            _, y = ax.xaxis.label.get_position()   # in pixels, under the axes
            ax.xaxis.set_label_coords(0.5, (y - ax.bbox.y0) / ax.bbox.height)
            ax.set_xlabel("")
        self.axes[2].yaxis.set_label_coords(0.0, 0.5)

    def emptied(self):
        """The figure without what the previous spectrum drew (its own artists hidden, the rest removed)."""
        for ax, kept in zip(self.axes, (self.spectrum, self.ccf, self.criteria)):
            _emptied(ax, kept.artists())
        return self


_REUSED = {}


def _spectrum_figure():
    """This process's :class:`_ReusedFigure`, emptied."""
    if "figure" not in _REUSED:
        _REUSED["figure"] = _ReusedFigure()
    return _REUSED["figure"].emptied()


def _emptied(ax, kept=()):
    """The axes without what the previous spectrum drew: ``kept`` artists hidden, others removed, ticks kept.

    ``Axes.clear`` would drop the tick objects too, and making them again on the next draw
    was a third of a figure's time.
    """
    from matplotlib.ticker import AutoLocator, ScalarFormatter

    kept = {id(a) for a in kept}
    for artist in [*ax.lines, *ax.collections, *ax.texts, *ax.patches, *ax.images]:
        if id(artist) in kept:
            artist.set_visible(False)
        else:
            artist.remove()
    if ax.get_legend() is not None:
        ax.get_legend().remove()
    ax.set_title("")
    ax.set_xlabel("")
    ax.set_ylabel("")
    for axis in (ax.xaxis, ax.yaxis):   # the criteria panel names its ticks
        axis.set_major_locator(AutoLocator())
        axis.set_major_formatter(ScalarFormatter())
    ax.relim(visible_only=True)
    ax.set_autoscale_on(True)
    ax.set_axis_on()   # a panel with nothing to show was switched off for the previous spectrum


def _encode_png(image) -> bytes:
    """PNG bytes (RGB) of an (h, w, 3) or (h, w, 4) uint8 image, each row stored as its change from the row above.

    Written here rather than by Pillow: Pillow's encoder took 15 ms for a 900 x 630 figure at
    compression level 1 (and 9 ms with no compression at all), a sixth of the figure's time;
    these line drawings on white are mostly rows equal to the one above, so one fixed filter
    ("up", PNG filter type 2) and zlib at level 1 give a file of the same size in 7–8 ms. An
    alpha channel is dropped (the figure is opaque).
    """
    height, width = image.shape[:2]
    image = np.ascontiguousarray(image)
    # on the image's own contiguous rows (with alpha, 4 bytes a pixel): subtracting on its RGB
    # view, strided, was twice as slow
    change = np.empty_like(image)
    change[0] = image[0]
    np.subtract(image[1:], image[:-1], out=change[1:])   # modulo 256, as PNG's "up" filter is
    raw = np.empty((height, 1 + 3 * width), np.uint8)
    raw[:, 0] = 2                       # the filter type, at the start of every row
    raw[:, 1:].reshape(height, width, 3)[...] = change[:, :, :3]   # through a view of the rows
    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)   # 8 bits, RGB, no interlace
    return b"".join((b"\x89PNG\r\n\x1a\n", _png_chunk(b"IHDR", header),
                     _png_chunk(b"IDAT", zlib.compress(raw, 1)), _png_chunk(b"IEND", b"")))


def _png_chunk(kind, data) -> bytes:
    """One PNG chunk: length, type, data, CRC-32 of type and data (the PNG specification)."""
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def _thumbnail(rgb, ax) -> bytes:
    """The spectrum panel of the rendered figure (inside its frame), shrunk to THUMB_SIZE."""
    from PIL import Image

    height = rgb.shape[0]
    box = ax.get_window_extent()
    x0, x1 = int(np.ceil(box.x0)) + 1, int(np.floor(box.x1)) - 1
    y0, y1 = height - int(np.floor(box.y1)) + 1, height - int(np.ceil(box.y0)) - 1   # pixel rows from the top
    panel = Image.fromarray(np.ascontiguousarray(rgb[y0:y1, x0:x1]))
    return _encode_png(np.asarray(panel.resize(THUMB_SIZE, Image.Resampling.BOX)))


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
    reused = _spectrum_figure()
    fig, (ax, ax_ccf, ax_criteria) = reused.figure, reused.axes
    _draw_spectrum(ax, spectrum, lines, normalized, artists=reused.spectrum)
    # y given: matplotlib then does not measure the tick labels to see whether the title must
    # move up (it never must here: no ticks on top), a tenth of the drawing
    ax.set_title(title, fontsize=9, y=1.0)
    _draw_ccf(ax_ccf, velocity, spectrum, lines, artists=reused.ccf)
    _draw_criteria(ax_criteria, classification, artists=reused.criteria)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    return {"full": _encode_png(rgba), "thumb": _thumbnail(rgba[:, :, :3], ax)}


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
