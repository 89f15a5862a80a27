"""What the tests of the lines stage's compiled kernels share (tests/test_lines_*kernel.py): a call made
with a kernel and with the numpy code it stands for, byte-for-byte comparison, the demo night's inputs."""

from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table

from specan import prepare, read
from specan.lines import compiled

DEMO = Path(__file__).resolve().parents[1] / "sample_spectra"


def with_and_without(monkeypatch, which, kernel, func, *args):
    """``func(*args)`` with ``kernel``, the module ``which`` (e.g. ``compiled.walks``) gives (checked), then
    with that step's numpy code (``which`` made to give None; every other kernel as it was), as
    ``(made, reference)``."""
    monkeypatch.setattr(compiled, "COMPILED", True)   # (also where SPECAN_COMPILED=0 set it off for the process)
    assert which() is kernel
    made = func(*args)
    monkeypatch.setattr(compiled, which.__name__, lambda: None)
    reference = func(*args)
    monkeypatch.setattr(compiled, which.__name__, which)
    return made, reference


def same_bits(a, b):
    """The same type, shape and bytes."""
    a, b = np.asarray(a), np.asarray(b)
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def demo_line_inputs(count):
    """``(data, listed, features, targets)`` of the demo night's first ``count`` readable spectra, as the lines
    stage makes them (the true topocentric velocity of the night's truth table)."""
    from specan.lines.data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features
    from specan.lines.listed import lines_in_range
    from specan.lines.measurement import line_targets

    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:count]:
        data = LineData(prepare(read(DEMO / row["file"])))
        listed = lines_in_range(data, None, ("atomic",), row["rv_topo"] * u.km / u.s)
        yield data, listed, find_features(data, DETECT_SIGMA, MIN_DEPTH), line_targets(data, listed, None)
