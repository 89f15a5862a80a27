"""Per-spectrum figures: what they show must be readable."""

import astropy.units as u
import numpy as np

from specan import lines, plots, prepare, synth


def test_line_names_do_not_cover_each_other_and_the_deepest_is_named():
    # A K giant at R = 2000 has a listed line every few Angstrom in the blue; thirty names at
    # their lines' positions covered each other (measured on the demo night's K3 III star).
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    spec = prepare.prepare(synth.spectrum("K3", "III", resolving_power=2000, snr=100, seed=4))
    table = lines.measure(spec)
    fig = Figure(figsize=(10, 7))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    plots._draw_spectrum(ax, spec, table, normalized=True)
    renderer = fig.canvas.get_renderer()
    texts = [t for t in ax.texts if t.get_rotation() == 90]
    assert 10 <= len(texts) <= 30
    boxes = sorted((t.get_window_extent(renderer) for t in texts), key=lambda b: b.x0)
    assert all(a.x1 <= b.x0 for a, b in zip(boxes, boxes[1:]))     # side by side, never on top
    detected = table[np.asarray(table["detected"], bool)]
    deepest = detected[int(np.nanargmax(np.abs(np.asarray(detected["depth"], float))))]
    assert str(deepest["id"]) in {t.get_text() for t in texts}


def __drawn(spec, table, kept_text):
    fig = plots._canvas(10, 7, cached_text=kept_text)
    fig.set_dpi(plots.FIGURE_DPI)
    ax = fig.add_subplot()
    plots._draw_spectrum(ax, spec, table, normalized=True)
    ax.set_title("K3 III, S/N 100", y=1.0)
    fig.canvas.draw()
    fig.canvas.draw()   # the second drawing keeps the texts' pixels,
    fig.canvas.draw()   # the third draws from them
    if kept_text:
        assert len(fig.canvas.get_renderer()._texts) > 30
    return fig, np.asarray(fig.canvas.buffer_rgba())[:, :, :3].astype(int)


def test_kept_text_pixels_change_nothing_but_the_texts_by_a_subpixel():
    # The figure's renderer draws each string once with Agg and keeps its pixels; a text then
    # starts on a whole pixel. Everything else must be Agg's own drawing to the bit, and each
    # text must stay within a pixel of where Agg writes it.
    spec = prepare.prepare(synth.spectrum("K3", "III", resolving_power=2000, snr=100, seed=4))
    table = lines.measure(spec)
    fig, kept = __drawn(spec, table, kept_text=True)
    _, agg = __drawn(spec, table, kept_text=False)
    renderer = fig.canvas.get_renderer()
    texts = [t for ax in fig.axes for t in [*ax.texts, ax.title, ax.xaxis.label, ax.yaxis.label,
                                               *ax.get_xticklabels(), *ax.get_yticklabels()] if t.get_text()]
    assert len(texts) > 30
    inside_text = np.zeros(agg.shape[:2], bool)
    height = agg.shape[0]
    for t in texts:
        box = t.get_window_extent(renderer)
        rows = slice(max(int(height - box.y1) - 2, 0), int(height - box.y0) + 3)
        inside_text[rows, max(int(box.x0) - 2, 0):int(box.x1) + 3] = True
    differ = np.abs(kept - agg).max(axis=2) > 0
    assert differ.any()                       # texts moved to whole pixels
    assert not (differ & ~inside_text).any()  # and nothing else changed
    # each text's ink where Agg's is: the dark pixels' centre within a pixel in x and in y
    for t in texts:
        box = t.get_window_extent(renderer)
        rows = slice(max(int(height - box.y1) - 2, 0), int(height - box.y0) + 3)
        cols = slice(max(int(box.x0) - 2, 0), int(box.x1) + 3)
        ink = [255 - img[rows, cols].min(axis=2) for img in (kept, agg)]
        if ink[1].sum() == 0:
            continue
        rows_at, cols_at = np.indices(ink[1].shape)
        centres = [np.array([(w * rows_at).sum(), (w * cols_at).sum()]) / w.sum() for w in ink]
        assert np.all(np.abs(centres[0] - centres[1]) <= 1.0), t.get_text()


def test_texts_drawn_once_are_not_kept_and_the_store_is_bounded(monkeypatch):
    # A night's figures each have a title of their own; keeping those pixels grew a long
    # night's memory (~3 kB a figure, tracemalloc). A text is kept from its second drawing on,
    # the same pixels either way, and the store never passes TEXT_CACHE_SIZE texts.
    monkeypatch.setattr(plots, "TEXT_CACHE_SIZE", 5)
    fig = plots._canvas(4, 2, cached_text=True)
    ax = fig.add_subplot()
    ax.set_axis_off()
    renderer = fig.canvas.get_renderer()
    pictures = []
    for title in ["star 1", "star 2", "star 3", "star 2", "star 2"]:
        ax.set_title(title)
        fig.canvas.draw()
        pictures.append(np.asarray(fig.canvas.buffer_rgba()).copy())
    kept = {key[0] for key in renderer._texts}
    assert kept == {"star 2"}                                    # drawn thrice: kept; the others once
    assert np.array_equal(pictures[1], pictures[3]) and np.array_equal(pictures[1], pictures[4])
    for i in range(8):                                           # eight more texts kept: past the bound
        for _ in range(2):
            ax.set_title(f"again {i}")
            fig.canvas.draw()
    assert {key[0] for key in renderer._texts} >= {"again 7"}
    assert len(renderer._texts) <= 5 and len(renderer._seen_once) <= 5


def _analysed(sptype, lumclass, seed, binary=False):
    import specan
    from specan import velocity

    if binary:   # a double-lined binary: the CCF panel marks a second peak
        # as tests/test_velocity.py's well separated pair
        raw = synth.binary(("G0", "V"), ("K0", "V"), rv1=-120 * u.km / u.s, rv2=180 * u.km / u.s, light_ratio=0.6,
                           resolving_power=5000, snr=100, seed=seed)
    else:
        raw = synth.spectrum(sptype, lumclass, resolving_power=2000, snr=60, seed=seed, rv=40.0 * u.km / u.s)
    spec = prepare.prepare(raw)
    vel = velocity.measure(spec)
    return spec, lines.measure(spec, rv=vel["rv_topo"]), vel, specan.classify(spec, rv=vel["rv_topo"])


def _drawn(item):
    """The PNG bytes of an analysed star's figure (see :func:`_analysed`)."""
    spec, table, vel, cls = item
    return plots.spectrum_figures(spec, lines=table, velocity=vel, classification=cls, title="t")


def test_reused_figure_keeps_nothing_of_the_spectrum_before():
    # The figure and its artists are made once per process and given each spectrum's data; a
    # spectrum drawn after another must be the picture a fresh figure gives it, pixel for pixel
    # (a cool star with thirty names, then a hot one with few: no name, marker, point or
    # legend entry of the first may be left, and the limits must follow the new data).
    cool, hot = _analysed("K3", "III", 4), _analysed("A0", "V", 1)

    plots._REUSED.clear()
    fresh_hot = _drawn(hot)
    plots._REUSED.clear()
    fresh_cool = _drawn(cool)
    reused_hot = _drawn(hot)       # on the figure the cool star was drawn on
    reused_cool = _drawn(cool)
    assert reused_hot == fresh_hot and reused_cool == fresh_cool
    figure = plots._REUSED["figure"]
    named = [t for t in figure.axes[0].texts if t.get_visible()]
    assert 10 <= len(named) <= plots.MAX_NAMED_LINES   # the cool star's names, not the hidden rest
    assert figure.axes[1].get_legend() is not None and figure.axes[2].get_legend() is not None


def test_reused_figure_after_a_binary_has_no_second_peak_left():
    # A binary's CCF panel has a second peak and a two-entry legend; the single star drawn
    # after it on the same figure must look as on a fresh figure.
    pair, single = _analysed(None, None, 8, binary=True), _analysed("G2", "V", 2)
    assert pair[2]["second_peak_rv"] is not None and single[2]["second_peak_rv"] is None

    plots._REUSED.clear()
    fresh_single = _drawn(single)
    plots._REUSED.clear()
    fresh_pair = _drawn(pair)
    legend = plots._REUSED["figure"].axes[1].get_legend()
    assert [t.get_text() for t in legend.get_texts()] == ["peak", "second peak"]
    assert _drawn(single) == fresh_single and _drawn(pair) == fresh_pair
    legend = plots._REUSED["figure"].axes[1].get_legend()
    assert [t.get_text() for t in legend.get_texts()] == ["peak", "second peak"]
