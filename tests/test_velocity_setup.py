"""A new pixel set-up in the velocity stage (a night of exposures, each on its own wavelength solution):
the shortcuts taken when the spline operators are built give what scipy gives, to the bit."""

import numpy as np
import pytest
from scipy.interpolate import BSpline, make_interp_spline

from specan.velocity import grid as vgrid


def _pixels(rng, n):
    """ln(lambda) of ``n`` pixels: a linear wavelength solution shifted by a fraction of a pixel, or
    (every third) one with jittered pixel positions, as merged or resampled files have."""
    lam = 3700.0 + rng.uniform(0.5, 1.5) * np.arange(n) + rng.uniform(0.0, 0.6)
    return np.log(np.sort(lam + rng.normal(0.0, 0.05, n)) if n % 3 == 0 else lam)


def test_not_a_knot_knots_are_scipys():
    # scipy's make_interp_spline (the reference: its knots for k=3 with not-a-knot ends)
    rng = np.random.default_rng(11)
    for n in (8, 9, 57, 1000, 4000, 4001):
        x = _pixels(rng, n)
        assert np.array_equal(vgrid.not_a_knot(x), make_interp_spline(x, np.zeros_like(x), k=3).t)


def test_design_matrix_without_range_check_is_scipys():
    # scipy's BSpline.design_matrix with its range check (extrapolate=False) on points inside the knots
    rng = np.random.default_rng(12)
    for n in (57, 1000, 4000):
        x = _pixels(rng, n)
        t = vgrid.not_a_knot(x)
        outside = np.linspace(x[0] - 0.01, x[-1] + 0.01, n + 333)
        for points in (x, np.clip(outside, x[0], x[-1])):
            want = BSpline.design_matrix(points, t, 3)
            got = vgrid._design_matrix(points, t)
            assert got.shape == want.shape
            assert np.array_equal(got.data, want.data)
            assert np.array_equal(got.indices, want.indices)
            assert np.array_equal(got.indptr, want.indptr)


def test_spline_operators_on_new_pixels_interpolate_as_scipy():
    # scipy's make_interp_spline evaluated on the grid (to rounding: a factorised solve, not scipy's banded one)
    rng = np.random.default_rng(13)
    x = _pixels(rng, 3000)
    grid = np.linspace(x[0], x[-1], 3500)
    y = rng.normal(size=x.size)
    got = vgrid.spline_operators(x, grid).forward(y)
    assert np.allclose(got, make_interp_spline(x, y, k=3)(grid), rtol=0, atol=1e-9)


def test_noise_probes_are_drawn_once_and_unchanged():
    probes = vgrid._noise_probes(1234)
    assert probes is vgrid._noise_probes(1234)
    with pytest.raises(ValueError):
        probes[0, 0] = 1.0
    fresh = np.random.default_rng(20261204).standard_normal((1234, vgrid.NOISE_PROBES))
    assert np.array_equal(probes, fresh)


def _same(a, b):
    """Equal to the bit, through dicts, lists, tuples, quantities and arrays (NaN equal to NaN)."""
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if hasattr(a, "unit") and hasattr(a, "value"):
        return a.unit == b.unit and _same(a.value, b.value)
    if isinstance(a, (np.ndarray, float, np.floating)):
        return np.array_equal(a, b, equal_nan=True)
    return a == b


def test_velocity_templates_kept_on_disk_are_the_templates_made(tmp_path, monkeypatch):
    # specan/_offline.py cached_arrays: a set-up's template bank read back from the cache folder
    # gives the bank made in the process, and the velocity measured with it, to the bit
    import astropy.units as u

    from specan import synth, velocity
    from specan.contents import forget_setups
    from specan.velocity import bank

    banks = []

    class Seen(bank.TemplateBank):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            banks.append(self)

    monkeypatch.setattr(bank, "TemplateBank", Seen)
    star = synth.spectrum("K1", "III", rv=-40.0 * u.km / u.s, snr=60.0, seed=5)

    def measured():
        forget_setups()
        banks.clear()
        return velocity.measure(star, barycentric=False), list(banks)

    monkeypatch.setenv("SPECAN_CACHE_DIR", "")            # no cache: made here
    made, made_banks = measured()
    monkeypatch.setenv("SPECAN_CACHE_DIR", str(tmp_path))
    written, _ = measured()                                # made again, and written
    assert len(list(tmp_path.glob("velocity-bank-*.npz"))) == len(made_banks) > 0

    def not_made(*args):
        raise AssertionError("a kept template bank was made again")

    monkeypatch.setattr(bank, "prepare_builtin", not_made)
    read, read_banks = measured()                          # read back, nothing made
    assert len(read_banks) == len(made_banks) > 0
    for a, b in zip(made_banks, read_banks):
        assert a.names == b.names and a.m == b.m and a.nf == b.nf
        for name in ("T", "T2", "V_unique", "groups", "FT", "FV"):
            assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert _same(made, written) and _same(made, read)


def test_a_damaged_kept_bank_is_made_again(tmp_path, monkeypatch):
    from specan._offline import cached_arrays

    monkeypatch.setenv("SPECAN_CACHE_DIR", str(tmp_path))
    calls = []

    def build():
        calls.append(1)
        return {"x": np.arange(5.0)}

    assert np.array_equal(cached_arrays("test", "key", build)["x"], np.arange(5.0))
    (kept,) = tmp_path.glob("test-*.npz")
    assert np.array_equal(cached_arrays("test", "key", build)["x"], np.arange(5.0)) and len(calls) == 1
    kept.write_bytes(kept.read_bytes()[:40])               # truncated
    assert np.array_equal(cached_arrays("test", "key", build)["x"], np.arange(5.0)) and len(calls) == 2
    assert np.array_equal(cached_arrays("test", "other key", build)["x"], np.arange(5.0)) and len(calls) == 3
    monkeypatch.setenv("SPECAN_CACHE_DIR", "")
    cached_arrays("test", "key", build)
    assert len(calls) == 4 and len(list(tmp_path.glob("test-*.npz"))) == 2


def test_kept_arrays_stay_within_their_room(tmp_path, monkeypatch):
    # once a kind's files pass ARRAYS_KEPT_MB, the least recently used go first
    import os

    from specan import _offline

    monkeypatch.setenv("SPECAN_CACHE_DIR", str(tmp_path))
    monkeypatch.setattr(_offline, "ARRAYS_KEPT_MB", 2.5e-3)      # 2,500 bytes: two files of 1,056
    calls = []

    def keep(key, when=None):
        _offline.cached_arrays("room", key, lambda: calls.append(key) or {"x": np.zeros(100)})
        if when is not None:
            for p in tmp_path.glob("room-*.npz"):
                if p.stat().st_mtime > 1e6:                   # the one just written (the rest are set back)
                    os.utime(p, (when, when))
        return {p.stat().st_mtime for p in tmp_path.glob("room-*.npz")}

    assert keep("a", 100) == {100}
    assert keep("b", 200) == {100, 200}
    assert keep("c", 300) == {200, 300}                          # a went
    keep("b")                                                    # read: b is now the newest
    assert calls == ["a", "b", "c"]
    assert 300 not in keep("d")                                  # c went, b stayed
    assert len(list(tmp_path.glob("room-*.npz"))) == 2
    keep("b")
    assert calls == ["a", "b", "c", "d"]
    keep("c")
    assert calls == ["a", "b", "c", "d", "c"]


def test_the_code_fingerprint_covers_the_library_data(monkeypatch):
    # what is kept across runs (records, template banks) is stale once specan/data's FITS files change
    from pathlib import Path

    from specan.contents import code_fingerprint

    before = code_fingerprint()
    real = Path.read_bytes

    def changed(self):
        data = real(self)
        return data + b"changed" if self.name == "templates_miles.fits" else data

    monkeypatch.setattr(Path, "read_bytes", changed)
    assert code_fingerprint() != before
