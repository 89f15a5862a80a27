"""The automatic choice tries the best synthetic type's neighbours only where they can enter the mixture.

``automatic_mixture`` scores the library and the synthetic grid, then the neighbouring subtypes and
classes of the best synthetic type; where that type falls more than ``choice.NEIGHBOUR_GAIN`` below
the least height that enters the mixture, no neighbour can enter it and they are not scored. Checked
here against trying them always, on the Kurucz model Sun (``rms-solar``, an outside model: skipped
where absent), on specan's synthetic stars of types the grid lacks and on the demo night: the same
templates, weights and velocities. Measured on the 272 spectra of benchmarks/bench_velocity.py
--neighbours (with JHC 1984 and MILES stars): neighbours at most 0.049 above the best grid type,
no choice changed.
"""

from pathlib import Path

import astropy.units as u
import numpy as np

import specan
from specan import synth, templates, velocity
from specan.velocity import bank, choice
from test_velocity_fast_path import kurucz_spectrum  # the Kurucz model Sun at v km/s, S/N 50

ROOT = Path(__file__).resolve().parents[1]
KMS = u.km / u.s
GRID = {f"synthetic {a} {b}" for a, b in templates.automatic_types()}


def summary(res):
    return (res["template"], res["rv"].to_value(KMS), res["rv_err"].to_value(KMS), res["rv_err_noise"].to_value(KMS),
            [(m["name"], m["weight"], m["score"]) for m in res["templates"]])


def tried_neighbours(res):
    return any(name.startswith("synthetic") and name not in GRID for name in res["template_scores"])


def test_skipping_neighbours_changes_nothing(kurucz_sun, monkeypatch):
    spectra = [kurucz_spectrum(kurucz_sun, v, seed) for v, seed in ((-250.0, 201), (180.0, 204))]
    spectra += [synth.spectrum(st, lc, resolving_power=r, rv=v * KMS, snr=snr, seed=7, wave_range=(3850, 7300) * u.AA)
                for st, lc, r, v, snr in (("F3", "IV", 2000.0, 400.0, 100.0), ("K2.5", "II", 1000.0, -700.0, 10.0),
                                          ("A7", "III", 5000.0, 120.0, 30.0))]
    spectra += [specan.prepare(specan.read(ROOT / "sample_spectra" / name)) for name in ("trf3_01.fits", "trf3_08.fits")]
    fast = [velocity.measure(s, barycentric=False) for s in spectra]
    monkeypatch.setattr(choice, "NEIGHBOUR_GAIN", np.inf)
    slow = [velocity.measure(s, barycentric=False) for s in spectra]
    skipped = 0
    for a, b in zip(fast, slow):
        assert tried_neighbours(b)
        skipped += not tried_neighbours(a)
        assert summary(a) == summary(b)     # the same templates and weights: the same numbers
    assert skipped >= 2      # the Sun's two at least (library stars correlate far above any synthetic type)


def test_neighbours_tried_where_the_synthetic_grid_wins():
    # a synthetic star of a type the grid lacks: synthetic templates are the best, and the neighbours
    # of the best grid type are what the mixture holds
    s = synth.spectrum("K2.5", "II", resolving_power=2000.0, rv=50 * KMS, snr=100.0, seed=3)
    res = velocity.measure(s, barycentric=False)
    assert tried_neighbours(res)
    assert not any("neighbouring synthetic types not tried" in n for n in res["notes"])


def test_neighbours_skipped_for_the_sun_are_noted(kurucz_sun):
    res = velocity.measure(kurucz_spectrum(kurucz_sun, -90.0, 202), barycentric=False)
    assert not tried_neighbours(res)
    assert any("neighbouring synthetic types not tried" in n for n in res["notes"])
    # every grid type still scored
    assert GRID < set(res["template_scores"])


def test_mixture_threshold_is_where_weights_stop():
    h = np.array([0.9, 0.89, 0.2, 0.85, -np.inf, 0.84, 0.83, 0.3])
    index, _ = bank.mixture_weights(h)
    assert set(index) == set(np.flatnonzero(h >= bank.mixture_threshold(h)))    # the five best
    h2 = np.array([0.9, 0.6, 0.76])     # fewer than MAX_MIXTURE: the weight MIN_WEIGHT decides
    index2, _ = bank.mixture_weights(h2)
    assert set(index2) == set(np.flatnonzero(h2 >= bank.mixture_threshold(h2))) == {0, 2}
    h3 = np.array([0.9, 0.6, 0.74])     # 0.74 weighs exp(-3.2) < MIN_WEIGHT of the best
    assert set(bank.mixture_weights(h3)[0]) == set(np.flatnonzero(h3 >= bank.mixture_threshold(h3))) == {0}
    assert bank.mixture_threshold(np.array([-np.inf])) == -np.inf
