"""Per-spectrum figures: what they show must be readable."""

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
