"""The automatic choice's pre-cut scores fewer templates in full and chooses what full scoring chooses.

``specan.velocity.bank.precut_scores`` estimates every template's height from the bank's principal
components and scores in full only those that can enter the mixture; ``automatic_mixture`` tries
the best synthetic type's neighbours only where they can reach it. Both are checked here against
full scoring of every template, on the Kurucz model Sun (``rms-solar``, an outside model: skipped
where absent), on specan's synthetic stars of types the grid lacks and on the demo night: the same
templates, weights and velocities. Measured on the 272 spectra of benchmarks/bench_velocity.py
--precut (with JHC 1984 and MILES stars): estimates within 0.030 of the full heights, neighbours
at most 0.049 above the best grid type, no choice changed; on 402 spectra (those sets, the user
path's and the whole JHC library) every velocity the same to the bit, errors within 1.2e-14 (an
inverse FFT rounds a row in its last bit differently in another batch of rows).
"""

from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import StdDevUncertainty
from scipy.interpolate import make_interp_spline
from specutils import Spectrum

import specan
from specan import synth, templates, velocity
from specan.obsinfo import META_KEY, ObsInfo
from specan.velocity import bank, choice
from specan.velocity.correlation import PeakSearch, observed_side
from specan.velocity.grid import lag_window, normalised, observe_on_grid

ROOT = Path(__file__).resolve().parents[1]
KMS = u.km / u.s


def kurucz_spectrum(kurucz_sun, v, seed, snr=50.0):
    """The Kurucz model Sun (R 2000 as carried) at ``v`` km/s on 4,000 linear pixels."""
    w, f, c = kurucz_sun
    model = make_interp_spline(np.log(w), f / c, k=3)
    pix = np.arange(4000.0, 4000.0 + 4000 * 0.625, 0.625)
    flux = model(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
    sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
    flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=2000.0,
                   normalized=True)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                    uncertainty=StdDevUncertainty(sig), meta={META_KEY: info})


def bank_and_search(spectrum):
    """(the automatic choice's first bank: library and synthetic grid, the spectrum's PeakSearch)."""
    notes = []
    spec = normalised(spectrum, notes)
    observed = observe_on_grid(spec, telluric=True, clip_emission=True, notes=notes)
    power = choice.settle_resolving_power(observed, spec, notes)
    lags = lag_window(observed, 2000 * KMS, power.value, 8.0)
    search = PeakSearch(observed_side(observed, lags), lags, 0.3)
    r = power.template_key
    cands = [choice.BuiltinCandidate(t.sptype, t.lumclass, r, "library", t.name) for t in templates.library_templates()]
    cands += [choice.BuiltinCandidate(st, lc, r) for st, lc in templates.automatic_types()]
    return bank.template_bank(cands, lags), search


def summary(res):
    return (res["template"], res["rv"].to_value(KMS), res["rv_err"].to_value(KMS), res["rv_err_noise"].to_value(KMS),
            [(m["name"], m["weight"], m["score"]) for m in res["templates"]])


def full_scoring(monkeypatch):
    """Every template scored in full, every best type's neighbours tried (the choice before the pre-cut)."""
    monkeypatch.setattr(bank, "PRECUT_MIN_BANK", 10 ** 9)
    monkeypatch.setattr(choice, "NEIGHBOUR_GAIN", np.inf)


def inputs(kurucz_sun):
    out = [kurucz_spectrum(kurucz_sun, v, seed) for v, seed in ((-250.0, 201), (180.0, 204))]
    out += [synth.spectrum(st, lc, resolving_power=r, rv=v * KMS, snr=snr, seed=7, wave_range=(3850, 7300) * u.AA)
            for st, lc, r, v, snr in (("F3", "IV", 2000.0, 400.0, 100.0), ("K2.5", "II", 1000.0, -700.0, 10.0),
                                      ("A7", "III", 5000.0, 120.0, 30.0))]
    out += [specan.prepare(specan.read(ROOT / "sample_spectra" / name)) for name in ("trf3_01.fits", "trf3_08.fits")]
    return out


def test_precut_chooses_what_full_scoring_chooses(kurucz_sun, monkeypatch):
    spectra = inputs(kurucz_sun)
    fast = [summary(velocity.measure(s, barycentric=False)) for s in spectra]
    with monkeypatch.context() as m:
        full_scoring(m)
        slow = [summary(velocity.measure(s, barycentric=False)) for s in spectra]
    for a, b in zip(fast, slow):
        assert a[0] == b[0] and [x[0] for x in a[4]] == [x[0] for x in b[4]]
        # the same numbers: the templates scored in full get the full scoring's own heights (to the
        # last bits: an inverse FFT may round a row differently in another batch of rows)
        assert a[1:4] == pytest.approx(b[1:4], rel=1e-12, abs=1e-12)
        assert np.array([x[1:] for x in a[4]]) == pytest.approx(np.array([x[1:] for x in b[4]]), rel=1e-12)


def test_precut_scores_in_full_only_what_can_enter_the_mixture(kurucz_sun):
    for s in inputs(kurucz_sun):
        bk, search = bank_and_search(s)
        data = search.side.ffts
        full = bank.score_bank(search, bk, data)
        pre = bank.precut_scores(search, bk, data)
        assert len(bk) >= bank.PRECUT_MIN_BANK and pre.rough is not None
        assert 0 < pre.exact.sum() < len(bk)      # it cut something, and kept the best
        ex = pre.exact
        np.testing.assert_allclose(pre.scores.height[ex], full.height[ex], rtol=1e-12)
        assert [pre.scores.lag[i] for i in np.flatnonzero(ex)] == [full.lag[i] for i in np.flatnonzero(ex)]
        # those left out could not have entered the mixture, and the estimates hold within the margin
        threshold = bank.mixture_threshold(full.height)
        assert np.all(full.height[~ex] < threshold)
        ok = np.isfinite(full.height)
        assert np.max(np.abs(pre.rough - full.height)[ok]) < 0.5 * bank.PRECUT_MARGIN


def test_precut_scores_everything_when_its_estimates_are_off(kurucz_sun):
    s = kurucz_spectrum(kurucz_sun, 35.0, 203)
    bk, search = bank_and_search(s)
    data = search.side.ffts
    pre = bank.precut_scores(search, bk, data, margin=1e-9)   # no estimate is that good
    assert pre.exact.all() and pre.worst > 0.5e-9
    np.testing.assert_allclose(pre.scores.height, bank.score_bank(search, bk, data).height, rtol=1e-12)


def test_mixture_threshold_is_where_weights_stop():
    h = np.array([0.9, 0.89, 0.2, 0.85, -np.inf, 0.84, 0.83, 0.3])
    cut = bank.mixture_threshold(h)
    index, _ = bank.mixture_weights(h)
    assert set(index) == set(np.flatnonzero(h >= cut))
    h2 = np.array([0.9, 0.6, 0.76])     # fewer than MAX_MIXTURE: the weight MIN_WEIGHT decides
    index2, _ = bank.mixture_weights(h2)
    assert set(index2) == set(np.flatnonzero(h2 >= bank.mixture_threshold(h2))) == {0, 2}


def test_neighbours_skipped_only_out_of_reach(kurucz_sun, monkeypatch):
    s = kurucz_spectrum(kurucz_sun, -90.0, 202)
    res = velocity.measure(s, barycentric=False)
    # the Sun: library stars correlate far better than any synthetic type (measured 0.91 against 0.49)
    assert any("neighbouring synthetic types not tried" in n for n in res["notes"])
    assert not any(name.startswith("synthetic") and name.split(" ", 1)[1] not in
                   {f"{a} {b}" for a, b in templates.automatic_types()} for name in res["template_scores"])
    monkeypatch.setattr(choice, "NEIGHBOUR_GAIN", np.inf)
    tried = velocity.measure(s, barycentric=False)
    assert len(tried["template_scores"]) > len(res["template_scores"])
    a, b = summary(tried), summary(res)
    assert a[0] == b[0] and a[1:4] == pytest.approx(b[1:4], rel=1e-12)
    assert [x[0] for x in a[4]] == [x[0] for x in b[4]]
