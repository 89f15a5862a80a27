"""Tests of specan/classify/: MK classification calibrated on standards.

Outside references:
- the Jacoby, Hunter & Christian (1984, ApJS 56, 257) library in ../shared/reference/jhc1984
  (``jhc1984`` fixture): published MK types of 94 stars; cross-validated, refitting per fold;
- the MILES library (Sanchez-Blazquez et al. 2006; Falcon-Barroso et al. 2011) in
  ../shared/reference/miles (``miles`` fixture): published MK types of its stars with a full one;
- Kurucz's model solar flux from ``rms-solar`` (``kurucz_sun`` fixture); the Sun is G2 V and
  Teff = 5772 K (IAU 2015 Resolution B3);
- interstellar extinction from ``dust_extinction`` (Cardelli, Clayton & Mathis 1989 law, R_V = 3.1).
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import warnings
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from specutils import Spectrum

from specan.mktypes import luminosity_group, sptype_to_code
from specan.obsinfo import ObsInfo

C = importlib.import_module("specan.classify")   # the module; specan.classify is the function

SUN_TEFF = 5772.0  # K, IAU 2015 Resolution B3 (nominal solar effective temperature)
#: The JHC copies' resolution: ~13 A FWHM, fitted against MILES stars of the same types (12-13.5 A,
#: measured), not the 4.5 A of its README; the default calibration is at this common resolution.
JHC_FWHM = 13.0 * u.AA
FOLDS = 10
ROOT = Path(__file__).resolve().parents[1]


def _default_recipe():
    """scripts/fit_default_calibration.py as a module: the default calibration's measuring recipe."""
    spec = importlib.util.spec_from_file_location("fit_default_calibration",
                                                  ROOT / "scripts" / "fit_default_calibration.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# ---------------------------------------------------------------------------------------------
# Fixtures: the libraries read once per session, their criteria measured once (k-fold refits are cheap)
# ---------------------------------------------------------------------------------------------

@pytest.fixture(scope="session")
def jhc_spectra(jhc1984, jhc_catalog):
    """{id: Spectrum} of the whole development library."""
    import specan

    return {str(row["id"]): specan.read(jhc1984 / str(row["file"])) for row in jhc_catalog}


@pytest.fixture(scope="session")
def jhc_measured(jhc1984):
    """(ids, criteria matrix, labels, codes, classes, velocities) of the JHC library, measured once.

    Measured as the shipped default calibration measures its standards and as ``classify``
    measures any spectrum: each star's velocity is measured and removed first, at 13 A.
    """
    velocities = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        X, labels, ids = _default_recipe().measure_jhc(jhc1984, C, velocities)
    codes = np.array([sptype_to_code(s) for s, _ in labels])
    return ids, np.array(X), labels, codes, [lc for _, lc in labels], velocities


@pytest.fixture(scope="session")
def jhc_criteria(jhc_measured):
    """(ids, criteria matrix, labels, codes, classes) of the JHC library, measured once."""
    return jhc_measured[:5]


@pytest.fixture(scope="session")
def jhc_evidence(jhc_measured, jhc_spectra):
    """The library comparison of every JHC star, at its removed velocity and the copies' 13 A, as
    ``classify`` makes it (HD 94028, the one star in both libraries, is not in the comparison set:
    metal-poor)."""
    from specan.classify import neighbours

    ids, _, _, _, _, velocities = jhc_measured
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return [neighbours.measure(jhc_spectra[i.split(":", 1)[1]], rv=v, fwhm_in=JHC_FWHM.value)
                for i, v in zip(ids, velocities)]


@pytest.fixture(scope="session")
def miles_criteria(miles):
    """(ids, criteria, labels, codes, classes, standard) of the MILES stars with a full MK type.

    ``standard`` marks those the default calibration uses (see scripts/fit_default_calibration.py).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        X, labels, ids, _, usable = _default_recipe().measure_miles(miles, C, everyone=True)
    codes = np.array([sptype_to_code(s) for s, _ in labels])
    return ids, np.array(X), labels, codes, [lc for _, lc in labels], usable


@pytest.fixture(scope="session")
def miles_evidence(miles, miles_criteria):
    """The library comparison of every MILES star with a full MK type, leave-one-out: the star itself
    and any star of the same name are left out of the comparison set."""
    import specan
    from astropy.table import Table

    from specan.classify import neighbours

    cat = Table.read(miles / "catalog.csv", format="ascii.csv")
    rows = {f"miles:{r['id']}": r for r in cat}
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i in miles_criteria[0]:
            r = rows[i]
            flux, good = neighbours.on_grid(specan.read(miles / str(r["file"]), medium="air"), rv=0 * u.km / u.s,
                                            fwhm_in=2.5)   # MILES: 2.5 A FWHM (Falcon-Barroso et al. 2011)
            out.append(neighbours.compare(flux, good, exclude=(i, str(r["name"]))))
    return out


def _interleaved(codes):
    order = np.argsort(codes, kind="stable")
    fold = np.empty(len(codes), int)
    fold[order] = np.arange(len(codes)) % FOLDS
    return fold


def _cv(X, labels, codes, classes, train_ok, X_other, labels_other, name, evidence):
    """Predictions from calibrations fitted on the other folds (of train_ok stars) plus the other library,
    with each star's library comparison weighing the type, as ``classify`` does by default."""
    fold = _interleaved(codes)
    results = [None] * len(labels)
    for f in range(FOLDS):
        train = np.flatnonzero((fold != f) & train_ok)
        cal = C.Calibration(resolution=JHC_FWHM).fit_criteria(
            np.vstack([X[train], X_other]), [labels[i] for i in train] + list(labels_other))
        for i in np.flatnonzero(fold == f):
            results[i] = cal.classify_criteria(X[i], neighbours=evidence[i])
    err = np.array([r["code"] for r in results]) - codes
    groups = ["I", "II-III", "IV-V"]
    table = np.zeros((3, 3), int)
    for r, lc, c in zip(results, classes, codes):
        if 10 <= c < 60:
            table[groups.index(luminosity_group(lc)), groups.index(luminosity_group(r["lumclass"]))] += 1
    lines = [f"{FOLDS}-fold CV on {len(labels)} {name} stars: within 2 subclasses {np.mean(np.abs(err) <= 2):.1%}, "
             f"median |error| {np.median(np.abs(err)):.2f}, mean error {np.mean(err):+.2f}",
             "luminosity groups, B-K stars (rows published, columns classified):",
             "          " + "".join(f"{g:>8s}" for g in groups)]
    lines += [f"{g:>10s}" + "".join(f"{v:8d}" for v in row) for g, row in zip(groups, table)]
    print("\n".join(lines))
    return {"results": results, "err": err, "table": table, "codes": codes, "classes": classes}


@pytest.fixture(scope="session")
def cross_validation(jhc_criteria, miles_criteria, jhc_evidence):
    """JHC stars predicted by calibrations fitted on the other JHC folds plus the MILES standards.

    Folds are interleaved in type (every FOLDS-th star in type order), so each fold's
    calibration spans the whole O-M range it is tested on. (The one star in both libraries,
    HD 94028, is metal-poor and so not a MILES standard.)
    """
    ids, X, labels, codes, classes = jhc_criteria
    mids, MX, mlabels, _, _, standard = miles_criteria
    out = _cv(X, labels, codes, classes, np.ones(len(ids), bool), MX[standard],
              [mlabels[i] for i in np.flatnonzero(standard)], "JHC", jhc_evidence)
    out["ids"] = ids
    return out


@pytest.fixture(scope="session")
def cross_validation_miles(jhc_criteria, miles_criteria, miles_evidence):
    """Every MILES star with a full MK type predicted by calibrations fitted on the other folds'
    MILES standards plus the JHC stars."""
    _, JX, jlabels, _, _ = jhc_criteria
    ids, X, labels, codes, classes, standard = miles_criteria
    return _cv(X, labels, codes, classes, standard, JX, jlabels, "MILES", miles_evidence)


def _spectrum(wave_aa, flux, medium="air", resolving_power=None, snr=None, path="test"):
    spec = Spectrum(flux=np.asarray(flux, float) * u.dimensionless_unscaled, spectral_axis=wave_aa * u.AA)
    spec.meta["specan"] = ObsInfo(path=path, object=path, medium=medium, medium_assumed=False,
                                  resolving_power=resolving_power, snr=snr)
    return spec


@pytest.fixture(scope="session")
def sun_spectrum(kurucz_sun):
    """The Kurucz solar model as a Spectrum: vacuum wavelengths, R = 2000 (the fixture's)."""
    w, f, _ = kurucz_sun
    # A noiseless model: its S/N is stated, not estimated (DER_SNR would read lines as noise).
    return _spectrum(w, f, medium="vacuum", resolving_power=2000.0, snr=500.0, path="kurucz_sun")


# ---------------------------------------------------------------------------------------------
# Criteria
# ---------------------------------------------------------------------------------------------

def test_criteria_names_and_sources():
    names = C.criteria_names()
    assert len(names) == len(set(names)) == len(C.CRITERIA) + len(C.RATIOS)
    for spec in C.CRITERIA.values():
        assert spec["source"]   # every criterion names the published criterion behind it
        lo = min(b[0] for b in spec["feature"])
        hi = max(b[1] for b in spec["feature"])
        assert spec["blue"][1] <= hi and spec["red"][0] >= lo


def test_criteria_ignore_a_continuum_slope(jhc_spectra):
    # A smooth tilt of the whole spectrum by a factor 3 (as E(B-V) ~ 1 does across the optical)
    # changes no criterion by more than 0.005: only three-band indices are used.
    spec = jhc_spectra["HD66171"]
    w = spec.spectral_axis.to_value(u.AA)
    f = spec.flux.value
    base, _ = C.measure_criteria(w, f)
    tilted, _ = C.measure_criteria(w, f * (w / 5500.0) ** 3)
    assert np.nanmax(np.abs(tilted - base)) < 0.005


def test_band_good_fraction_follows_the_mask():
    # The good-pixel fraction of a band is the masked length over the band length (trapezoid of a
    # 0/1 mask, common practice): a band 30% masked keeps the criterion (min_good 0.5), one 70%
    # masked loses it, and nothing else changes. (A bool-array sum once made every fraction ~half.)
    wave = np.arange(3800.0, 7400.0, 1.0)
    flux = 1.0 - 0.3 * np.exp(-0.5 * ((wave - 4340.5) / 3.0) ** 2)   # invented line at Hgamma
    lo, hi = C.CRITERIA["hgamma_core"]["feature"][0]
    j = C.criteria_names().index("hgamma_core")
    base, _ = C.measure_criteria(wave, flux)
    for masked, measured in ((0.3, True), (0.7, False)):
        mask = (wave >= lo) & (wave < lo + masked * (hi - lo))
        vals, _ = C.measure_criteria(wave, flux, mask=mask)
        assert np.isfinite(vals[j]) == measured
        if measured:   # bad pixels are bridged by interpolation, so the depth hardly moves
            assert abs(vals[j] - base[j]) < 0.05
    mean, frac = C.band_means(wave, flux, np.ones(wave.size, bool), np.array([[4000.0, 4100.0]]))
    assert frac[0] == pytest.approx(1.0)


def test_depths_at_once_are_the_loop_over_criteria(kurucz_sun):
    # _depths works on all criteria at once (padded feature table); it must give what a loop over
    # the criteria gives, to the bit: band means of the Kurucz Sun (rms-solar) at several tilts,
    # and random ones with missing, zero and negative bands.
    from specan.classify import criteria as cr

    def loop(mean):
        depth = np.empty(len(cr.CRITERIA))
        for i, feat in enumerate(cr._FEAT):
            xb, xr = cr._BAND_MID[cr._BLUE[i]], cr._BAND_MID[cr._RED[i]]
            cont = mean[cr._BLUE[i]] + (mean[cr._RED[i]] - mean[cr._BLUE[i]]) * (cr._BAND_MID[feat] - xb) / (xr - xb)
            widths = cr._BANDS[feat, 1] - cr._BANDS[feat, 0]
            depth[i] = 1.0 - np.sum(widths * mean[feat] / cont) / widths.sum() if np.all(cont > 0) else np.nan
        return depth

    w, f, _ = kurucz_sun
    means = [cr.band_means(w, f * (w / 5000.0) ** p, np.ones(w.size, bool), cr._BANDS)[0] for p in (-2, 0, 3)]
    rng = np.random.default_rng(12)
    for _ in range(500):
        m = rng.lognormal(0.0, 0.3, cr._BANDS.shape[0])
        r = rng.random(m.size)
        means.append(np.where(r < 0.05, np.nan, np.where(r < 0.08, -0.1, np.where(r < 0.1, 0.0, m))))
    for mean in means:
        assert np.array_equal(cr._depths(mean), loop(mean), equal_nan=True)


def test_one_lattice_pass_gives_the_posterior_and_split_of_separate_passes(sun_spectrum):
    # classify_criteria takes the whole's posterior and the halves' (composite flag) from one set
    # of per-criterion terms; they must be the separate calls' to the bit. Inputs: the default
    # calibration's 553 JHC and MILES standards' criteria (measured from the libraries by
    # scripts/fit_default_calibration.py), with and without noise and with criteria missing, and
    # the Kurucz Sun's (rms-solar).
    from specan.classify import relations
    from specan.classify.criteria import SIDES

    cal = C.default_calibration()
    fine, dof, tau = cal.lattice_model(), cal.settings["dof"], cal.tau_
    sun = C.spectrum_criteria(sun_spectrum, cal.resolution, rv=0 * u.km / u.s)
    rng = np.random.default_rng(12)
    cases = [(sun["values"], sun["noise"])]
    for st in cal.standards_[::4]:
        x = np.array(st["criteria"], float)
        cases.append((x, np.zeros(x.size)))
        cases.append((x, np.abs(rng.normal(0.0, 0.02, x.size))))
        cases.append((np.where(rng.random(x.size) < 0.3, np.nan, x), np.full(x.size, 0.01)))
        # one half cut short (the classic blue range): the split is not measured
        cases.append((np.where((SIDES == 1) & (rng.random(x.size) < 0.7), np.nan, x), np.zeros(x.size)))
    splits = []
    for x, noise in cases:
        p, ll, z2, split = relations.posterior_and_split(x, noise, fine, dof, tau)
        p0, ll0, z20 = relations.posterior(x, noise, fine, dof, tau, np.isfinite(x))
        assert np.array_equal(p, p0) and np.array_equal(ll, ll0) and np.array_equal(z2, z20)
        assert split == relations.split_distance(x, noise, fine, dof, tau)
        splits.append(split)
    assert sum(s is None for s in splits) > 50 and sum(s is not None for s in splits) > 100   # both paths seen


def _scaled_per_side_by_selection(xo, m, s, weights, side, scale_sigma):
    """The line-strength scale per half as first written, three selections per side (the reference)."""
    penalties = {}
    a = weights / s ** 2
    prior = 1.0 / scale_sigma ** 2
    for sd in (-1, 0, 1):
        sel = side == sd
        if not sel.any():
            continue
        num = np.sum(a[..., sel] * xo[sel] * m[..., sel], axis=-1) + prior
        den = np.sum(a[..., sel] * m[..., sel] ** 2, axis=-1) + prior
        k = np.clip(num / den, 0.25, 4.0)
        m[..., sel] *= k[..., None]
        penalties[sd] = 0.5 * (k - 1.0) ** 2 * prior
    return penalties


def test_line_strength_scales_from_one_copy_per_side_are_the_selections(sun_spectrum):
    # the per-side scale copies each side's part of the lattice once: the same model and penalties to
    # the bit as selecting it for each use. Inputs: the default calibration's standards' criteria (JHC
    # and MILES, scripts/fit_default_calibration.py), some with criteria or a whole side missing, and the
    # Kurucz Sun's (rms-solar)
    from specan.classify import relations
    from specan.classify.criteria import SIDES

    cal = C.default_calibration()
    fine = cal.lattice_model()
    sun = C.spectrum_criteria(sun_spectrum, cal.resolution, rv=0 * u.km / u.s)
    rng = np.random.default_rng(7)
    cases = [(sun["values"], sun["noise"])]
    for st in cal.standards_[::25]:
        x = np.array(st["criteria"], float)
        cases.append((x, np.abs(rng.normal(0.0, 0.02, x.size))))
        cases.append((np.where(rng.random(x.size) < 0.3, np.nan, x), np.full(x.size, 0.01)))
        cases.append((np.where(SIDES == -1, np.nan, x), np.zeros(x.size)))
    for x, noise in cases:
        ok = np.isfinite(x)
        s = np.sqrt(fine["scatter"][:, None, ok] ** 2 + noise[ok] ** 2)
        m_new, m_ref = fine["class_means"][..., ok], fine["class_means"][..., ok]
        args = (s, fine["weights"][ok], SIDES[ok], fine["scale_sigma"])
        new = relations._scale_line_strengths_per_side(x[ok], m_new, *args)
        ref = _scaled_per_side_by_selection(x[ok], m_ref, *args)
        assert np.array_equal(m_new, m_ref) and new.keys() == ref.keys()
        assert all(np.array_equal(new[k], ref[k]) for k in ref)


def test_criteria_hand_on_the_pixels_at_rest_that_rest_pixels_makes(sun_spectrum):
    # The parameter model and the library comparison start from the spectrum's pixels at rest in air
    # (specan.resolution.rest_pixels); the criteria's measurement makes the same arrays on its way and
    # hands them on: the same numbers to the bit (the Kurucz Sun, vacuum, from rms-solar; at rest, receding,
    # approaching, an axis that decreases, a masked stretch)
    from specan.resolution import rest_pixels

    w, f = sun_spectrum.spectral_axis.to_value(u.AA), sun_spectrum.flux.value
    masked = Spectrum(flux=sun_spectrum.flux, spectral_axis=sun_spectrum.spectral_axis, mask=(w > 5000) & (w < 5100),
                      meta=dict(sun_spectrum.meta))
    backwards = _spectrum(w[::-1], f[::-1], medium="vacuum", resolving_power=2000.0, snr=500.0)
    cal = C.default_calibration()
    for spec in (sun_spectrum, masked, backwards):
        for rv in (0.0, 35.0, -120.0):
            got = C.spectrum_criteria(spec, cal.resolution, rv=rv * u.km / u.s)["pixels"]
            want = rest_pixels(spec, rv * u.km / u.s)
            assert got is not None
            for a, b in zip(got, want):
                assert np.array_equal(a, b)


def test_criteria_track_temperature(jhc_criteria):
    # Published behaviour of the MK criteria (Gray & Corbally 2009, from memory): the Balmer
    # lines peak in the A stars, Ca II K grows from A to K, TiO appears only in M stars.
    ids, X, labels, codes, classes = jhc_criteria
    names = C.criteria_names()
    col = {n: X[:, names.index(n)] for n in names}
    a_stars, g_stars, m_stars, b_stars = ((codes >= lo) & (codes < hi) for lo, hi in
                                          ((20, 25), (40, 50), (60, 70), (10, 15)))
    assert np.median(col["hdelta_core"][a_stars]) > np.median(col["hdelta_core"][g_stars]) + 0.2
    assert np.median(col["caii_k"][g_stars]) > np.median(col["caii_k"][a_stars]) + 0.2
    assert np.median(col["tio_2"][m_stars]) > 0.2 > np.max(col["tio_2"][codes < 50])
    assert np.median(col["hei_4471"][b_stars]) > np.median(col["hei_4471"][g_stars]) + 0.03


# ---------------------------------------------------------------------------------------------
# Acceptance: cross-validation on the reference library
# ---------------------------------------------------------------------------------------------

@pytest.mark.reference
def test_cv_median_error_at_most_1_5_subclasses(cross_validation):
    # JHC (1984) published types; acceptance: median |error| <= 1.5 subclasses
    assert np.median(np.abs(cross_validation["err"])) <= 1.5


@pytest.mark.reference
@pytest.mark.xfail(strict=True, reason="measured 75.5% within 2 subclasses (interleaved 10-fold CV; 75.2% +- 1.6% over 3 random partitions), JHC stars against the combined JHC+MILES calibration at 13 A with the MILES library neighbours weighing the type (criteria alone: 67.0%, 67.4% +- 1.6%); target 85%; benchmarks/cv_classify.py. The published types limit it: JHC's second published type (alt_mk) lies within 2 subclasses of the first for 9 of the 14 stars that have one (64.3%)")
def test_cv_jhc_type_within_2_subclasses_for_85_percent(cross_validation):
    # JHC (1984) published types, calibration fitted on the other folds and the MILES standards;
    # acceptance: within 2 subclasses for >= 85% of stars
    assert np.mean(np.abs(cross_validation["err"]) <= 2.0) >= 0.85


@pytest.mark.reference
def test_cv_type_within_3_subclasses_for_78_percent(cross_validation):
    # Weaker than the acceptance above, which fails today: guards against regressions
    # (measured 81% before the combined calibration; held with it).
    assert np.mean(np.abs(cross_validation["err"]) <= 3.0) >= 0.78


@pytest.mark.reference
@pytest.mark.xfail(strict=True, reason="measured 68.4% of B-K stars in the right luminosity group (interleaved 10-fold CV; 68.0% +- 0.8% over 3 random partitions; target 80%); the measured log g does not help at the JHC copies' ~13 A (62% with it), so it is not used for spectra broader than the parameter model's 4.5 A; the MILES library neighbours' classes do not help either (57.9% from them alone, 64.5-65.8% multiplied in at the settings best on MILES), so the class stays the criteria's")
def test_cv_jhc_luminosity_group_for_80_percent_of_b_to_k(cross_validation):
    # JHC (1984) published classes; acceptance: group (I / II-III / IV-V) right for >= 80% of B-K
    t = cross_validation["table"]
    assert np.trace(t) / t.sum() >= 0.80


@pytest.mark.reference
def test_cv_miles_type_within_2_subclasses_for_80_percent(cross_validation_miles):
    # MILES published types (every star with a full MK type; Sanchez-Blazquez et al. 2006 catalogue),
    # calibration fitted on the other folds' MILES standards and the JHC stars; acceptance: >= 80%
    assert np.mean(np.abs(cross_validation_miles["err"]) <= 2.0) >= 0.80


@pytest.mark.reference
def test_cv_miles_luminosity_group_for_75_percent_of_b_to_k(cross_validation_miles):
    # MILES published classes; acceptance: group right for >= 75% of B-K stars
    t = cross_validation_miles["table"]
    assert np.trace(t) / t.sum() >= 0.75


@pytest.mark.reference
def test_cv_supergiants_are_recognised(cross_validation):
    # Weaker than the acceptance: the supergiant row of the confusion table, which works.
    t = cross_validation["table"]
    assert t[0, 0] / t[0].sum() >= 0.7
    assert np.trace(t) / t.sum() >= 0.5   # better than any single-group guess (max 38% here)


@pytest.mark.reference
def test_cv_uncertainties_are_honest(cross_validation):
    # The quoted subclass_err (1 sigma) should hold the published type about 2/3 of the time.
    res = cross_validation["results"]
    inside = np.abs(cross_validation["err"]) <= np.array([r["subclass_err"] for r in res])
    assert 0.5 <= np.mean(inside) <= 0.85


@pytest.mark.reference
def test_cv_teff_follows_type(cross_validation):
    # Teff comes from specan.physics' published scales: it must fall with later types.
    res = cross_validation["results"]
    codes = np.array([r["code"] for r in res])
    teff = np.array([r["teff"].to_value(u.K) for r in res])
    assert np.all(teff > 2000) and np.all(teff < 60000)
    from scipy.stats import spearmanr

    assert spearmanr(codes, teff)[0] < -0.97


# ---------------------------------------------------------------------------------------------
# Acceptance: the Sun
# ---------------------------------------------------------------------------------------------

_SUN_TYPE_GAP = pytest.mark.xfail(strict=True, reason=(
    "measured with the default JHC+MILES calibration at 13 A: the Kurucz solar model reads G6 V "
    "(code 46.0 with the library neighbours, whose nearest MILES stars are G5-G8 V; 45.5-45.75 from the criteria "
    "alone; Teff from the type 5542-5589 K, within 250 K), not G0-G5; the MILES-trained parameter "
    "model reads it 5370 K while observed MILES G2 V stars come back at 5640-5840 K, so the model spectrum "
    "looks later than the observed G2 V stars both methods learnt from (the JHC-only calibration read it G2)"))


def _check_sun(res):
    # The Sun is G2 V, Teff 5772 K (IAU 2015 Resolution B3); acceptance: G0-G5, Teff +-250 K
    assert 40.0 <= res["code"] <= 45.0, res["mk"]
    assert abs(res["teff"].to_value(u.K) - SUN_TEFF) <= 250.0


@_SUN_TYPE_GAP
def test_sun_r2000(sun_spectrum):
    res = C.classify(sun_spectrum)
    _check_sun(res)
    assert abs(res["rv"].to_value(u.km / u.s)) < 30   # a model at rest


@_SUN_TYPE_GAP
def test_sun_degraded_to_r1000(sun_spectrum):
    from specan.prepare import degrade

    res = C.classify(degrade(sun_spectrum, 1000.0))
    _check_sun(res)


@_SUN_TYPE_GAP
def test_sun_without_a_stated_resolving_power(kurucz_sun):
    # The same Kurucz Sun with no resolving power in its metadata: specan estimates R from the
    # narrowest lines (true R = 2000, the fixture's) and gets the type it gets when told.
    w, f, _ = kurucz_sun
    res = C.classify(_spectrum(w, f, medium="vacuum", snr=500.0, path="kurucz_sun_no_r"))
    _check_sun(res)
    assert any("estimated from the narrowest lines" in n for n in res["notes"])


@_SUN_TYPE_GAP
def test_sun_over_the_whole_model_range(sun_spectrum):
    # The Kurucz model from 0.15 to 300 microns (rms-solar) in one spectrum: the continuum fit
    # once asked for a 74 GB matrix there, and the criteria's smoothing grid took its step from
    # the infrared pixels (K0.5 III instead of G2 V, measured). It must classify as the
    # optical part does.
    from conftest import _kurucz_arrays

    w, f, _ = _kurucz_arrays()
    full = C.classify(_spectrum(w, f, medium="vacuum", resolving_power=2000.0, snr=500.0, path="sun_full"))
    optical = C.classify(sun_spectrum)
    _check_sun(full)
    assert abs(full["code"] - optical["code"]) <= 0.5 and full["lumclass"] == optical["lumclass"]


def test_sun_is_more_likely_a_dwarf_than_a_giant(sun_spectrum):
    # Beyond the class acceptance below: the class probabilities, not only the most probable class,
    # favour a dwarf (measured IV + V = 0.57 with the default calibration, R = 2000).
    p = C.classify(sun_spectrum)["lumclass_prob"]
    assert p["IV"] + p["V"] > p["I"] + p["II"] + p["III"]


def test_sun_class_iv_or_v(sun_spectrum):
    # The Sun is G2 V (IAU 2015 Resolution B3 context); acceptance: class IV-V, also at R=1000
    from specan.prepare import degrade

    for spec in (sun_spectrum, degrade(sun_spectrum, 1000.0)):
        assert C.classify(spec)["lumclass"] in ("IV", "V")


# ---------------------------------------------------------------------------------------------
# Acceptance: velocity and reddening do not change the type
# ---------------------------------------------------------------------------------------------

ROBUST_STARS = ("HD116608", "HD66171", "HD26946", "HD13256")   # A1 V, G2 V, K3 III, B1 I (E(B-V) 1.4)


def _shifted(spec, v_kms):
    from specan.velocity import doppler_factor

    w = spec.spectral_axis.to_value(u.AA) * float(doppler_factor(v_kms * u.km / u.s))
    return _spectrum(w, spec.flux.value, path=f"{spec.meta['specan'].path} +{v_kms} km/s")


@pytest.mark.reference
@pytest.mark.parametrize("sid", ROBUST_STARS)
def test_shift_by_900_kms_gives_same_type(jhc_spectra, sid):
    spec = jhc_spectra[sid]
    base = C.classify(spec)
    moved = C.classify(_shifted(spec, 900.0))
    assert abs(moved["rv"].to_value(u.km / u.s) - base["rv"].to_value(u.km / u.s) - 900.0) < 30
    # same type: within one half-subclass step of the quoted type, same class
    assert abs(moved["code"] - base["code"]) <= 0.5 and moved["lumclass"] == base["lumclass"]


@pytest.mark.reference
@pytest.mark.parametrize("sid", ROBUST_STARS)
def test_reddening_by_ebv_1_5_gives_same_type(jhc_spectra, sid):
    from dust_extinction.parameter_averages import CCM89

    spec = jhc_spectra[sid]
    w = spec.spectral_axis.to(u.AA)
    # Cardelli, Clayton & Mathis (1989) law, R_V = 3.1 (diffuse ISM, common practice)
    red = spec.flux.value * CCM89(Rv=3.1).extinguish(w, Ebv=1.5)
    rv = 0 * u.km / u.s   # isolate reddening from any velocity-measurement difference
    base = C.classify(spec, rv=rv)
    reddened = C.classify(_spectrum(w.value, red, path=sid + " reddened"), rv=rv)
    # same type: within one half-subclass step of the quoted type, same class. Not exact: the
    # extinction curve's curvature over the 150-400 A baselines of the widest indices shifts
    # them by up to ~0.4 of their scatter (measured for HD 66171).
    assert abs(reddened["code"] - base["code"]) <= 0.5 and reddened["lumclass"] == base["lumclass"]


# ---------------------------------------------------------------------------------------------
# Flags
# ---------------------------------------------------------------------------------------------

@pytest.fixture(scope="session")
def calibration_without(jhc_criteria):
    """A calibration fitted on the library minus the stars a flag test uses (held out)."""
    ids, X, labels, codes, classes = jhc_criteria
    held = {"SAO81292", "HD116608", "HD26946", "HD66171"}
    keep = [i for i, s in enumerate(ids) if s not in held]
    return C.Calibration(resolution=JHC_FWHM, measure_velocity=False).fit_criteria(
        X[keep], [labels[i] for i in keep], ids=[ids[i] for i in keep])


@pytest.mark.reference
def test_emission_flag_on_published_emission_star(jhc_spectra, calibration_without):
    # SAO 81292 is M4.5e V in the JHC catalogue (trailing E: emission); held out of the fit.
    res = calibration_without.classify(jhc_spectra["SAO81292"], rv=0 * u.km / u.s)
    assert "emission" in res["flags"]
    assert res["code"] >= 60   # still an M star


@pytest.mark.reference
def test_emission_flag_with_the_emission_star_among_the_standards(jhc_spectra):
    # The shipped calibration keeps SAO 81292 (M4.5e V) as a standard. Its emission lines must
    # not enter the relations: kept in, they widened the M-type H-alpha scatter sixfold and this
    # star's own H-alpha, 19% above the pseudo-continuum, went unflagged (measured).
    res = C.default_calibration().classify(jhc_spectra["SAO81292"], rv=0 * u.km / u.s)
    assert "emission" in res["flags"]


def test_type_prefixes_and_white_dwarfs():
    # MK notation (Gray & Corbally 2009, from memory): MP metal-poor (as the JHC catalogue writes
    # it), sd subdwarf, d the Mount Wilson dwarf prefix. A white dwarf type (DA2, DB) has no MK
    # subclass and must be refused, not read as A2 or B: a calibration catalogue then skips it.
    assert sptype_to_code("MPF4") == 34.0 and sptype_to_code("sdB5") == 15.0 and sptype_to_code("dG2") == 42.0
    for wd in ("DA2", "DB", "DZ8"):
        with pytest.raises(ValueError):
            sptype_to_code(wd)


def test_emission_marked_standards_do_not_shape_the_balmer_relations():
    # MK notation (Gray & Corbally 2009, from memory): a suffix e marks emission lines, f the
    # emission of Of stars, pec is only peculiar.
    from specan.mktypes import marks_emission

    assert marks_emission("M4.5E") and marks_emission("B2", "Ve") and marks_emission("O5", "If")
    assert not any(marks_emission(*t) for t in (("A2pec", "V"), ("G2", "V"), ("MPF4", "V"), ("B1", "Iab")))
    # invented criteria: 40 standards on smooth relations; one marked e gets an absurd H-alpha
    rng = np.random.default_rng(3)
    names = C.criteria_names()
    codes = np.linspace(20.0, 59.0, 40)
    X = np.array([np.sin(codes / 10.0 + j) * 0.2 + 0.3 for j in range(len(names))]).T
    X += rng.normal(0, 0.005, X.shape)
    labels = [(f"{'AFGK'[int(c // 10) - 2]}{c % 10:.1f}", "V") for c in codes]
    marked = list(labels)
    marked[20] = (marked[20][0] + "e", "V")
    ha = names.index("halpha")
    odd = X.copy()
    odd[20, ha] = -0.9
    plain = C.Calibration().fit_criteria(X, labels).model_
    with_e = C.Calibration().fit_criteria(odd, marked).model_
    without_e = C.Calibration().fit_criteria(odd, labels).model_
    near = np.abs(plain["grid"] - codes[20]) < 2
    assert np.allclose(with_e["mean"][near, ha], plain["mean"][near, ha], atol=0.02)
    # H-alpha in emission is left out even where the type does not mark it (the MILES M6 V star
    # m0884 shows -0.28 unmarked); an absorption outlier, unmarked, does shape the relation
    assert np.allclose(without_e["mean"][near, ha], plain["mean"][near, ha], atol=0.02)
    deep = X.copy()
    deep[20, ha] = 0.9
    shaped = C.Calibration().fit_criteria(deep, labels).model_
    assert np.max(np.abs(shaped["mean"][near, ha] - plain["mean"][near, ha])) > 0.05
    # criteria away from the emission lines still learn from the marked standard
    mg = names.index("mg_b")
    assert np.array_equal(with_e["mean"][:, mg], without_e["mean"][:, mg])


def test_featureless_spectrum_is_flagged_not_quietly_typed():
    # A spectrum with no lines at all (a blank or featureless object, noise S/N 200): the
    # hottest types, whose lines are weakest, fit it within their scatter, so without this check
    # it came out "O5 I" with no word of warning (measured).
    rng = np.random.default_rng(5)
    w = np.arange(3600.0, 7400.0, 1.4)
    res = C.classify(_spectrum(w, 1.0 + rng.normal(0, 0.005, w.size), resolving_power=1200.0, snr=200.0,
                               path="blank"), rv=0 * u.km / u.s)
    assert "peculiar" in res["flags"]
    assert any("no absorption features" in n for n in res["notes"])


@pytest.mark.reference
def test_no_flags_on_plain_standards(jhc_spectra, calibration_without):
    for sid in ("HD116608", "HD66171", "HD26946"):
        res = calibration_without.classify(jhc_spectra[sid], rv=0 * u.km / u.s)
        assert res["flags"] == [], (sid, res["notes"])


@pytest.mark.reference
def test_no_composite_flag_on_the_classic_blue_range(jhc_spectra):
    # 3900-5100 A, the range MK classification spectrographs cover: the red half of the criteria
    # is mostly missing there, so blue and red cannot be compared, and a plain A1 V star was
    # flagged composite by the shipped calibration (measured). The type must still come out.
    for sid, code in (("HD116608", 21.0), ("HD66171", 42.0)):     # A1 V, G2 V (JHC 1984)
        s = jhc_spectra[sid]
        w = s.spectral_axis.to_value(u.AA)
        keep = (w > 3900) & (w < 5100)
        res = C.default_calibration().classify(_spectrum(w[keep], s.flux.value[keep], path=sid + " blue"))
        assert "composite" not in res["flags"], (sid, res["notes"])
        # HD 116608 is classed A5 even with its whole range (its metal lines pull late): the
        # type is checked on the G dwarf only
        if sid == "HD66171":
            assert abs(res["code"] - code) <= 2.0, res["mk"]


@pytest.mark.reference
def test_composite_flag_on_a_plus_k_blend(jhc_spectra, calibration_without):
    # An A1 V and a K3 III star of equal flux at 5500 A: hot lines in the blue, cool in the red.
    a, k = jhc_spectra["HD116608"], jhc_spectra["HD26946"]
    w = a.spectral_axis.to_value(u.AA)
    fa = a.flux.value / np.median(a.flux.value[(w > 5400) & (w < 5600)])
    fk = np.interp(w, k.spectral_axis.to_value(u.AA), k.flux.value)
    fk = fk / np.median(fk[(w > 5400) & (w < 5600)])
    res = calibration_without.classify(_spectrum(w, fa + fk, path="A1V+K3III"), rv=0 * u.km / u.s)
    assert "composite" in res["flags"], res["notes"]


@pytest.mark.reference
def test_low_snr_flag(jhc_spectra, calibration_without):
    spec = jhc_spectra["HD66171"]
    f = spec.flux.value
    rng = np.random.default_rng(5)
    noisy = f + rng.normal(0.0, np.median(f) / 8.0, f.size)   # S/N ~ 8 per pixel
    res = calibration_without.classify(_spectrum(spec.spectral_axis.to_value(u.AA), noisy), rv=0 * u.km / u.s)
    assert "low_snr" in res["flags"]
    assert res["subclass_err"] > 1.0


@pytest.mark.reference
def test_peculiar_flag_on_inverted_lines(jhc_spectra, calibration_without):
    # Absorption turned into emission (2 - normalised flux) matches no standard.
    spec = jhc_spectra["HD66171"]
    w = spec.spectral_axis.to_value(u.AA)
    from scipy.ndimage import maximum_filter1d, uniform_filter1d

    cont = uniform_filter1d(maximum_filter1d(spec.flux.value, 61), 61)
    flipped = cont * (2.0 - spec.flux.value / cont)
    res = calibration_without.classify(_spectrum(w, flipped, path="inverted"), rv=0 * u.km / u.s)
    assert "peculiar" in res["flags"], res["notes"]


@pytest.mark.reference
def test_out_of_range_when_coverage_is_short(jhc_spectra, calibration_without):
    spec = jhc_spectra["HD66171"]
    w = spec.spectral_axis.to_value(u.AA)
    keep = w > 5800   # only the red third: most criteria cannot be measured
    res = calibration_without.classify(_spectrum(w[keep], spec.flux.value[keep]), rv=0 * u.km / u.s)
    assert "out_of_range" in res["flags"]


# ---------------------------------------------------------------------------------------------
# Library neighbours (specan.classify.neighbours)
# ---------------------------------------------------------------------------------------------

def test_library_comparison_matches_a_fit_per_star():
    # The batched normal equations give, for every library star, the mean squared residual of an
    # ordinary least-squares fit of (polynomial x that star) to the spectrum over the pixels both have.
    from specan.classify import neighbours

    ref = neighbours.default_reference()
    rng = np.random.default_rng(7)
    flux = ref.flux[10] * (1.0 + 0.01 * rng.standard_normal(ref.flux.shape[1]))
    good = ref.good[10] & (rng.random(ref.flux.shape[1]) > 0.1)
    msd, n = neighbours.mean_square_differences(flux, good, ref)
    P = np.polynomial.legendre.legvander(np.linspace(-1, 1, flux.size), neighbours.POLY_DEGREE)
    for s in (0, 10, 200, len(ref.ids) - 1):
        both = good & ref.good[s]
        A = P[both] * ref.flux[s][both, None]
        c, *_ = np.linalg.lstsq(A, flux[both], rcond=None)
        assert n[s] == both.sum()
        assert msd[s] == pytest.approx(np.mean((flux[both] - A @ c) ** 2), rel=1e-6, abs=1e-12)


def test_library_comparison_with_unusable_pixels_taken_off_the_kept_sums():
    # The library stars' normal matrices are kept summed over all pixels and a star's unusable pixels
    # taken off (or, where most are unusable, its usable ones summed afresh): whatever the pixels,
    # in any order, a comparison gives what a per-star least-squares fit gives, as above
    from specan.classify import neighbours

    ref = neighbours.default_reference()
    rng = np.random.default_rng(8)
    flux = ref.flux[30] * (1.0 + 0.01 * rng.standard_normal(ref.flux.shape[1]))
    cols = np.arange(ref.flux.shape[1])
    goods = [ref.good[30] & (rng.random(cols.size) > 0.1), ref.good[30] & (cols > 40) & (cols < 900),
             ref.good[30] & (cols > 300) & (cols < 600), np.ones(cols.size, bool)]
    P = np.polynomial.legendre.legvander(np.linspace(-1, 1, flux.size), neighbours.POLY_DEGREE)
    for good in goods + goods[::-1]:
        msd, n = neighbours.mean_square_differences(flux, good, ref)
        for s in (0, 30, 300):
            both = good & ref.good[s]
            A = P[both] * ref.flux[s][both, None]
            c, *_ = np.linalg.lstsq(A, flux[both], rcond=None)
            assert n[s] == both.sum()
            assert msd[s] == pytest.approx(np.mean((flux[both] - A @ c) ** 2), rel=1e-6, abs=1e-12)


def test_library_comparison_absorbs_a_tilt_and_leaves_out_what_it_is_told():
    # A library star tilted by a straight line in wavelength (what a response or reddening residue
    # leaves after normalisation) still matches itself exactly; left out, it is not among its neighbours.
    from specan.classify import neighbours

    ref = neighbours.default_reference()
    k = 42
    tilt = np.linspace(0.9, 1.1, ref.flux.shape[1])
    ev = neighbours.compare(ref.flux[k] * tilt, ref.good[k], ref)
    # (normal equations: rounding leaves ~1e-12 where another star differs by ~1e-4)
    assert ev.nearest(1)[0] == k and ev.msd[k] < 1e-9 < 1e-6 < np.sort(ev.msd)[1]
    ev = neighbours.compare(ref.flux[k] * tilt, ref.good[k], ref, exclude=[ref.ids[k]])
    assert k not in ev.nearest() and np.isinf(ev.msd[k])
    lk = ev.type_likelihood(np.arange(0.0, 70.0, 0.25))
    assert np.all(lk > 0) and abs(np.arange(0.0, 70.0, 0.25)[np.argmax(lk)] - ref.codes[k]) <= 3


def test_library_set_is_what_its_script_writes(miles):
    # scripts/build_neighbour_set.py's treatment of a MILES star (at rest, 2.5 -> 13 A, specan's
    # continuum) reproduces the shipped rows.
    import specan
    from astropy.table import Table

    from specan.classify import neighbours

    ref = neighbours.default_reference()
    cat = {f"miles:{r['id']}": r for r in Table.read(miles / "catalog.csv", format="ascii.csv")}
    for k in (0, 150, 300, len(ref.ids) - 1):
        row = cat[ref.ids[k]]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            flux, good = neighbours.on_grid(specan.read(miles / str(row["file"]), medium="air"), rv=0 * u.km / u.s,
                                            fwhm_in=2.5)
        assert np.array_equal(good, ref.good[k])
        assert np.allclose(flux[good], ref.flux[k][good], atol=1e-5)
    assert "Sanchez-Blazquez" in ref.source and "Falcon-Barroso" in ref.source


def test_classify_reports_the_library_neighbours(sun_spectrum):
    res = C.classify(sun_spectrum, rv=0 * u.km / u.s, parameters=False)
    assert res["type_evidence"] == "criteria and library neighbours"
    near = res["library_neighbours"]
    assert len(near) == 5 and all(n["id"].startswith("miles:") for n in near)
    assert [n["rms"] for n in near] == sorted(n["rms"] for n in near)
    # a solar-type star's nearest library stars are late-F to early-K (Kurucz's model Sun, G2 V)
    assert all(35 <= sptype_to_code(n["mk"].split()[0]) <= 52 for n in near)
    plain = C.classify(sun_spectrum, rv=0 * u.km / u.s, parameters=False, neighbours=False)
    assert plain["type_evidence"] == "criteria" and plain["library_neighbours"] == []
    # a calibration of one's own standards types in its own system: no library comparison unless asked
    own = C.classify(sun_spectrum, calibration=ROOT / "sample_spectra" / "tordo_calibration.json",
                     rv=0 * u.km / u.s, parameters=False)
    assert own["type_evidence"] == "criteria"


def test_classify_goes_on_without_the_library_comparison():
    # A spectrum too short for the comparison (4000-4600 A: fewer than MIN_PIXELS comparison pixels)
    # is typed by the criteria alone, and says so.
    from specan import synth

    s = synth.spectrum("G2", "V", resolving_power=2000.0, snr=200.0)
    w = s.spectral_axis.to_value(u.AA)
    keep = (w > 3900) & (w < 4700)
    short = _spectrum(w[keep], s.flux.value[keep], resolving_power=2000.0, snr=200.0)
    res = C.classify(short, rv=0 * u.km / u.s, parameters=False)
    assert res["type_evidence"] == "criteria" and res["library_neighbours"] == []
    assert any("no library comparison" in n for n in res["notes"])


# ---------------------------------------------------------------------------------------------
# Calibration file, default calibration, CLI
# ---------------------------------------------------------------------------------------------

def test_save_load_round_trip(jhc_criteria, tmp_path, jhc_spectra):
    ids, X, labels, codes, classes = jhc_criteria
    cal = C.Calibration(resolution=JHC_FWHM, source="JHC (1984) development part").fit_criteria(X, labels, ids=ids)
    path = cal.save(tmp_path / "cal.json")
    data = json.loads(path.read_text())
    assert data["format"] == "specan-mk-calibration" and data["format_version"] == 1
    assert data["source"] == "JHC (1984) development part"
    assert data["resolution_fwhm_angstrom"] == JHC_FWHM.value
    assert data["code_version"]
    back = C.Calibration.load(path)
    for sid in ("HD66171", "HD26946"):
        a = cal.classify(jhc_spectra[sid], rv=0 * u.km / u.s)
        b = back.classify(jhc_spectra[sid], rv=0 * u.km / u.s)
        assert a["mk"] == b["mk"]
        assert abs(a["code"] - b["code"]) <= 0.25   # the file keeps 5 significant digits


def test_load_rejects_other_files(tmp_path):
    from specan.errors import ReadError

    bad = tmp_path / "x.json"
    bad.write_text(json.dumps({"format": "something else"}))
    with pytest.raises(ReadError, match="not a specan MK calibration"):
        C.Calibration.load(bad)
    with pytest.raises(ReadError, match="not found"):
        C.Calibration.load(tmp_path / "missing.json")
    # a calibration measured with other band limits must not be applied silently
    data = C.default_calibration().to_dict()
    data["criteria"][0]["blue"] = [4500.0, 4510.0]
    with pytest.raises(ReadError, match="other criteria definitions"):
        C.Calibration.from_dict(data)


def test_default_calibration_provenance():
    cal = C.default_calibration()
    data = cal.to_dict()
    assert "Jacoby, Hunter & Christian (1984" in data["source"] and "MILES" in data["source"]
    assert data["resolution_fwhm_angstrom"] == 13.0
    ids = [s["id"] for s in data["standards"]]
    assert sum(i.startswith("jhc1984:") for i in ids) == 94 and sum(i.startswith("miles:") for i in ids) > 400
    # numbers only: per standard its criteria, never a spectrum
    assert all(len(s["criteria"]) == len(C.criteria_names()) for s in data["standards"])


def test_classify_result_keys(sun_spectrum):
    import specan

    res = specan.classify(sun_spectrum)
    for key in ("sptype", "lumclass", "mk", "code", "subclass_err", "lumclass_prob", "teff", "teff_err",
                "nearest_standards", "flags", "notes"):
        assert key in res
    assert res["mk"] == f"{res['sptype']} {res['lumclass']}"
    assert set(res["lumclass_prob"]) == {"I", "II", "III", "IV", "V"}
    assert abs(sum(res["lumclass_prob"].values()) - 1.0) < 1e-9
    assert res["teff"].unit == u.K and res["teff_err"].unit == u.K
    assert set(res["flags"]) <= set(C.FLAGS)
    assert len(res["nearest_standards"]) == 3


@pytest.mark.reference
def test_cli_classify_json(jhc1984):
    from click.testing import CliRunner

    from specan.cli import cli

    f = str(jhc1984 / "spectra" / "HD66171.csv")
    out = CliRunner().invoke(cli, ["classify", "--json", f], obj={})
    assert out.exit_code == 0, out.output
    row = json.loads(out.output.strip().splitlines()[-1])
    for key in ("file", "sptype", "lumclass", "mk", "subclass_err", "lumclass_prob", "teff_k",
                "teff_err_k", "flags"):
        assert key in row
    assert row["sptype"].startswith("G")   # published G2 V (in the default calibration's standards)


def _calibrate_from_rows(rows, tmp_path):
    """Write a catalogue of ``rows`` (CSV lines), run ``specan calibrate`` on it (no velocities):
    (click result, the calibration written, its path)."""
    from click.testing import CliRunner

    from specan.cli import cli

    cat = tmp_path / "standards.csv"
    cat.write_text("\n".join(rows) + "\n")
    out_file = tmp_path / "mine.json"
    res = CliRunner().invoke(cli, ["calibrate", str(cat), "--out", str(out_file), "--no-velocity"], obj={})
    return res, (C.Calibration.load(out_file) if out_file.is_file() else None), out_file


@pytest.mark.reference
def test_cli_calibrate_then_classify(jhc1984, jhc_catalog, tmp_path):
    from click.testing import CliRunner

    from specan.cli import cli

    # a small catalogue of 16 standards, paths relative to it
    import os

    rows = ["file,sptype,lumclass,id"]
    for row in jhc_catalog[::6]:
        rel = os.path.relpath(jhc1984 / str(row["file"]), tmp_path)
        rows.append(f"{rel},{row['sptype']},{row['lumclass']},{row['id']}")
    res, cal, out_file = _calibrate_from_rows(rows, tmp_path)
    assert res.exit_code == 0, res.output
    assert "16 standards" in res.output
    assert len(cal.standards_) == 16
    f = str(jhc1984 / "spectra" / "HD26946.csv")
    res = CliRunner().invoke(cli, ["classify", "--json", "--calibration", str(out_file), f], obj={})
    assert res.exit_code == 0, res.output
    assert json.loads(res.output.strip().splitlines()[-1])["mk"]


@pytest.mark.reference
def test_calibrate_with_an_mk_column_skips_bad_rows_and_says_so(jhc1984, jhc_catalog, tmp_path):
    # An observer's catalogue: one "mk" column, absolute paths, a missing file and a type that
    # is not MK. The good rows are fitted; the others are listed (stderr, the file) and counted
    # in the exit status, as the other commands count failed files.
    rows = ["file,mk"] + [f"{jhc1984 / str(r['file'])},{r['mk']}" for r in jhc_catalog[::6]]
    rows += [f"{tmp_path / 'gone.fits'},G2 V", f"{jhc1984 / str(jhc_catalog[0]['file'])},Q9 X"]
    res, cal, _ = _calibrate_from_rows(rows, tmp_path)
    assert res.exit_code == 2, res.output
    assert "16 standards" in res.output
    assert "skipped standard" in res.output and "gone.fits" in res.output and "'X'" in res.output
    assert len(cal.standards_) == 16 and len(cal.skipped_) == 2


def test_cli_calibrate_reports_missing_columns(tmp_path):
    from specan.cli import main

    cat = tmp_path / "bad.csv"
    cat.write_text("file,type\na.csv,G2\n")
    assert main(["calibrate", str(cat), "--out", str(tmp_path / "o.json")]) == 2


# ---------------------------------------------------------------------------------------------
# Surface gravity and the luminosity class
# ---------------------------------------------------------------------------------------------

def test_gravity_weights_follow_the_classes():
    # At 5800 K a dwarf has log g ~4.4 and a giant ~2.5-3 (Gray 2005 table of gravities, from
    # memory); the relations fitted on MILES must put each measured value with its class.
    from specan.classify import gravity

    w_dwarf, _ = gravity.class_weights(4.4, 0.1, 5800.0)
    w_giant, _ = gravity.class_weights(2.6, 0.1, 4800.0)
    assert int(np.argmax(w_dwarf)) == 4                       # V
    assert int(np.argmax(w_giant)) in (1, 2)                  # II or III
    assert w_dwarf[0] < 1e-3 and w_giant[4] < 1e-3           # never a supergiant / a dwarf
    mu_v, _ = gravity.expected_logg(5, 5772.0)
    assert abs(mu_v - 4.44) < 0.25                            # the Sun, log g 4.438 (IAU 2015 B3)


def test_gravity_conflict_flag():
    from specan.classify.atmosphere import gravity_agreement

    res = {"lumclass": "V", "flags": [], "notes": []}
    gravity_agreement(res, np.array([0.0, 0.0, 0.0, 1.0, -4.2]))
    assert res["flags"] == ["gravity_conflict"] and "4.2 sigma" in res["notes"][0]
    res = {"lumclass": "III", "flags": [], "notes": []}
    gravity_agreement(res, np.array([3.0, 2.0, 0.5, -1.0, -4.2]))
    assert res["flags"] == []


def test_sun_gravity_makes_it_a_dwarf(sun_spectrum):
    # Class V with probability >= 0.6 (issue acceptance), the measured log g beside it.
    res = C.classify(sun_spectrum)
    assert res["lumclass"] == "V" and res["lumclass_prob"]["V"] >= 0.6, res["lumclass_prob"]
    assert res["logg"] is not None and 3.8 < res["logg"].value < 4.8
    assert "gravity_conflict" not in res["flags"]
    without = C.classify(sun_spectrum, parameters=False)
    assert without["logg"] is None and without["lumclass_prob"]["V"] < res["lumclass_prob"]["V"]


def test_gravity_weighs_the_classes_only_when_asked(sun_spectrum):
    # With the shipped calibration the log g weighs the classes by default; gravity_weighs=False (the
    # default with one's own calibration) keeps the criteria's classes and still reports the log g.
    # Kurucz solar model (rms-solar), a G2 V star.
    weighed = C.classify(sun_spectrum)
    kept = C.classify(sun_spectrum, gravity_weighs=False)
    criteria_only = C.classify(sun_spectrum, parameters=False)
    assert kept["lumclass_prob"] == criteria_only["lumclass_prob"]
    assert kept["lumclass_prob"] != weighed["lumclass_prob"]
    assert kept["logg"] == weighed["logg"]
    assert any("calibration's own standards define the classes" in n for n in kept["notes"])


def test_teff_estimate_kept_per_code_is_the_scales_average():
    # the classes' Teffs at a code are kept per (code, error): the same Teff and error as asking
    # the scales (specan.mkscales: Pecaut & Mamajek 2013 for dwarfs and the others named there) each time
    from specan.classify.relations import LUMS
    from specan.classify.verdict import teff_estimate
    from specan.mkscales import teff_from_type
    from specan.mktypes import number_to_lumclass

    rng = np.random.default_rng(3)
    for code, err in ((42.0, 0.5), (42.0, 0.5), (10.25, 1.7), (63.5, 0.5), (0.0, 3.0), (42.0, 0.9)):
        prob = rng.dirichlet(np.ones(5))
        tk = np.array([teff_from_type(code, number_to_lumclass(n), err)[0].to_value(u.K) for n in LUMS])
        te = np.array([teff_from_type(code, number_to_lumclass(n), err)[1].to_value(u.K) for n in LUMS])
        mean = float(np.sum(prob * tk))
        spread = float(np.sqrt(np.sum(prob * (te ** 2 + (tk - mean) ** 2))))
        teff, teff_err = teff_estimate(code, err, prob)
        assert teff.to_value(u.K) == mean and teff_err.to_value(u.K) == spread


def test_band_integrals_are_scipys_cumulative_trapezoid(sun_spectrum):
    # the criteria's band integrals are scipy's cumulative trapezoid, summed in its order: the same
    # numbers (Kurucz Sun from rms-solar, its wavelengths and a mask)
    from scipy.integrate import cumulative_trapezoid

    from specan.classify.criteria import _cumulative_trapezoid

    w = sun_spectrum.spectral_axis.to_value(u.AA)
    f = sun_spectrum.flux.value
    good = np.ones(w.size, bool)
    good[::13] = False
    for y in (f, good.astype(float), f[:2]):
        x = w[:y.size]
        assert np.array_equal(_cumulative_trapezoid(y, np.diff(x)), cumulative_trapezoid(y, x, initial=0.0))
