"""The matched filter's and the wide smoothing's correlations compiled with numba
(specan/lines/filterkernel.py) against numpy's banded filter they stand in for (specan/lines/data.py,
``_band_filter``: the fallback, SPECAN_COMPILED=0 or no numba) and against scipy's ``correlate1d``.

Stated tolerance: none; the same values to the bit, zeros' signs included (the same terms in the same
order, none fused). Measured on the bench's 40 spectra, the dense spectrum and the demo night
(benchmarks/bench_lines.py --against): the same tables to the bit as before the kernels.
"""


import numpy as np
import pytest
from astropy.table import Table
from scipy.ndimage import correlate1d, gaussian_filter1d

from specan import prepare, read

pytest.importorskip("numba", reason="numba not installed: the numpy filters alone run")

from specan.lines import compiled, data as linedata, filterkernel  # noqa: E402

from kernel_pairs import DEMO, same_bits, with_and_without  # noqa: E402




def _values(rng, shape):
    """Noise with exact zeros of both signs and runs of one value (a masked stretch's weights)."""
    v = rng.normal(size=shape)
    v[..., 5:40] = 0.0
    v[..., 60:80] = -0.0
    v[..., 100:130] = 1.25
    return v


def test_band_filter_is_numpys(monkeypatch):
    # per-pixel kernels of the demo night's set-ups, on their spectra's rows and on made-up values, and on
    # spectra shorter than twice the reach (every pixel at an end)
    rng = np.random.default_rng(2)
    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    banded = 0
    for row in truth[~truth["broken"]][:6]:
        data = linedata.LineData(prepare(read(DEMO / row["file"])))
        band = data._rungs.band
        if band is None:
            continue
        main, half = band[0], band[1]
        n = data.wave.size
        rows = np.stack([data.weight * (1.0 - data.flux), data.weight * data.flux, data.weight])
        for values, weights in ((rows, main), (data.weight, half), (_values(rng, (3, n)), main)):
            made, reference = with_and_without(monkeypatch, compiled.filters, filterkernel, linedata._band_filter, values, weights)
            assert same_bits(made, reference), row["file"]
        for m in (1, 5, 2 * main.shape[0] - 3):
            made, reference = with_and_without(monkeypatch, compiled.filters, filterkernel, linedata._band_filter, _values(rng, (2, m)), main[:, :m])
            assert same_bits(made, reference), (row["file"], m)
        banded += 1
    assert banded >= 4


def test_matched_filter_is_numpys(monkeypatch):
    # the significance, smoothed flux and its noise of demo spectra and of copies divided by a ripple
    truth = Table.read(DEMO / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]][:6]:
        data = linedata.LineData(prepare(read(DEMO / row["file"])))
        for d in (data, data.divided(0.97 + 0.03 * np.cos(data.wave / 50.0))):
            made, reference = with_and_without(monkeypatch, compiled.filters, filterkernel, linedata.matched_filter, d.flux, d.weight, d.sig_pix, d._rungs)
            assert all(same_bits(a, b) for a, b in zip(made, reference)), row["file"]
            made, reference = with_and_without(monkeypatch, compiled.filters, filterkernel, linedata.wide_smooth, d.flux, d.weight, d._wide_width)
            assert all(same_bits(a, b) for a, b in zip(made, reference)), row["file"]


def test_symmetric_filter_is_scipys():
    # scipy's correlate1d (mode "nearest") and gaussian_filter1d, the outside reference, to the bit: the
    # wide smoothing's widths (3 line widths: 4-12 pixels here) and narrower, rows of a spectrum's length
    # and shorter than the kernel
    rng = np.random.default_rng(3)
    for s in (0.7, 1.3, 3.89, 4.99, 6.73, 11.39, 25.0):
        weights = linedata._gauss_weights(s)
        for shape in ((2, 4000), (1, 4000), (3, 7), (1, 1), (2, weights.size + 1)):
            values = _values(rng, shape)
            out = np.empty(shape)
            filterkernel.symmetric_filter(values, weights, out)
            assert same_bits(out, correlate1d(values, weights, axis=1, mode="nearest")), (s, shape)
            assert same_bits(out, gaussian_filter1d(values, s, axis=1, mode="nearest")), (s, shape)
