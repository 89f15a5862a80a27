"""Tests of specan/lines.py: identification, equivalent widths, errors, band indices."""

import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import StdDevUncertainty
from astropy.table import QTable
from scipy.special import voigt_profile
from specutils import Spectrum

from specan import lines
from specan.obsinfo import ObsInfo, air_to_vacuum

GAUSS_FWHM = 2.0 * np.sqrt(2.0 * np.log(2.0))
C_KMS = 299792.458


def make_spectrum(wave, flux, sigma=None, medium="air", resolving_power=None, normalized=True):
    """A specutils Spectrum with specan metadata (what specan.read + prepare would give)."""
    info = ObsInfo(medium=medium, medium_assumed=False, resolving_power=resolving_power,
                   normalized=normalized)
    unc = None if sigma is None else StdDevUncertainty(np.broadcast_to(sigma, np.shape(flux)).copy())
    return Spectrum(spectral_axis=np.asarray(wave) * u.AA, flux=np.asarray(flux) * u.dimensionless_unscaled,
                    uncertainty=unc, meta={"specan": info})


def one_line_list(wave_air, name="X_test", species="Fe I"):
    t = QTable()
    t["id"] = [name]
    t["species"] = [species]
    t["ion"] = [1]
    t["wave_air"] = [wave_air] * u.AA
    t["wave_vac"] = air_to_vacuum(t["wave_air"])
    t["ep_low"] = [np.nan] * u.eV
    t["loggf"] = [np.nan]
    t["kind"] = ["atomic"]
    t["source"] = ["test"]
    return t


def gaussian(x, centre, ew, fwhm):
    sig = fwhm / GAUSS_FWHM
    return ew / (sig * np.sqrt(2 * np.pi)) * np.exp(-0.5 * ((x - centre) / sig) ** 2)


# ----------------------------------------------------------------------------- closed-form EWs


@pytest.mark.parametrize("pix_per_fwhm", [2.0, 3.0, 5.0, 7.5, 10.0])
def test_gaussian_ew_matches_closed_form(pix_per_fwhm):
    # Closed form: a Gaussian of depth d and width sigma has EW = d * sigma * sqrt(2 pi)
    # (exact integral); we build the line from its EW directly.
    fwhm, ew_true, centre = 2.0, 0.35, 5000.3
    dx = fwhm / pix_per_fwhm
    wave = np.arange(4950.0, 5050.0, dx)
    flux = 1.0 - gaussian(wave, centre, ew_true, fwhm)
    spec = make_spectrum(wave, flux, sigma=1e-4, resolving_power=centre / fwhm)
    m = lines.measure(spec, one_line_list(centre))
    row = m[0]
    assert row["detected"] and not row["emission"]
    assert row["ew"].to_value(u.AA) == pytest.approx(ew_true, rel=0.005)
    assert row["ew_int"].to_value(u.AA) == pytest.approx(ew_true, rel=0.005)
    assert row["ew_fit"].to_value(u.AA) == pytest.approx(ew_true, rel=0.005)
    assert row["fwhm"].to_value(u.AA) == pytest.approx(fwhm, rel=0.06)
    assert row["wave_obs"].to_value(u.AA) == pytest.approx(centre, abs=0.05 * fwhm)


@pytest.mark.parametrize("pix_per_fwhm", [2.0, 3.0, 5.0, 10.0])
def test_voigt_ew_matches_closed_form(pix_per_fwhm):
    # scipy.special.voigt_profile has unit area, so 1 - W * V has EW = W exactly.
    sigma, gamma, ew_true, centre = 0.8, 0.4, 0.5, 6000.2
    fl, fg = 2 * gamma, GAUSS_FWHM * sigma
    fwhm = 0.5346 * fl + np.sqrt(0.2166 * fl**2 + fg**2)  # Olivero & Longbothum (1977)
    dx = fwhm / pix_per_fwhm
    wave = np.arange(5850.0, 6150.0, dx)
    flux = 1.0 - ew_true * voigt_profile(wave - centre, sigma, gamma)
    spec = make_spectrum(wave, flux, sigma=1e-4, resolving_power=centre / fg)
    m = lines.measure(spec, one_line_list(centre), profile="voigt")
    row = m[0]
    assert row["profile"] == "voigt"
    assert row["ew_fit"].to_value(u.AA) == pytest.approx(ew_true, rel=0.005)
    assert row["fwhm"].to_value(u.AA) == pytest.approx(fwhm, rel=0.05)


# ----------------------------------------------------------------------------- Cayrel errors


def test_cayrel_error_matches_monte_carlo_scatter():
    # Cayrel (1988): sigma_EW = 1.5 sqrt(FWHM * pixel) / (S/N). Compared with the
    # scatter of the reported EW over noisy realisations of one Gaussian line.
    rng = np.random.default_rng(1988)
    fwhm, ew_true, centre, snr = 1.5, 0.12, 5500.0, 80.0
    dx = fwhm / 3.0
    wave = np.arange(5470.0, 5530.0, dx)
    clean = 1.0 - gaussian(wave, centre, ew_true, fwhm)
    ll = one_line_list(centre)
    ews, cay, errs = [], [], []
    for _ in range(150):
        spec = make_spectrum(wave, clean + rng.normal(0, 1 / snr, wave.size), sigma=1 / snr,
                             resolving_power=centre / fwhm)
        row = lines.measure(spec, ll)[0]
        ews.append(row["ew"].to_value(u.AA))
        cay.append(row["ew_err_cayrel"].to_value(u.AA))
        errs.append(row["ew_err"].to_value(u.AA))
    scatter = np.std(ews, ddof=1)
    ratio = np.median(cay) / scatter
    assert 0.8 <= ratio <= 1.25, (ratio, scatter, np.median(cay))
    # the error-array estimate is also honest
    assert 0.7 <= np.median(errs) / scatter <= 1.4
    # and the mean is unbiased to within its error
    assert abs(np.mean(ews) - ew_true) < 4 * scatter / np.sqrt(len(ews)) + 0.01 * ew_true


def test_fit_chi2_near_one_for_a_true_model_and_large_for_a_wrong_one():
    # Common practice: with the right model and the right errors the reduced chi-square of a
    # least-squares fit scatters about 1. A line with damping wings fitted by the Gaussian at
    # the instrument's width (what ``auto`` uses for weak lines) must show a large chi-square at
    # high S/N: the column is how a user tells model-limited from noise-limited lines.
    rng = np.random.default_rng(7)
    fwhm, ew_true, centre = 1.5, 0.12, 5500.0
    dx = fwhm / 3.0
    wave = np.arange(5470.0, 5530.0, dx)
    ll = one_line_list(centre)
    good = []
    for _ in range(40):
        flux = 1.0 - gaussian(wave, centre, ew_true, fwhm) + rng.normal(0, 1 / 80, wave.size)
        row = lines.measure(make_spectrum(wave, flux, sigma=1 / 80, resolving_power=centre / fwhm), ll)[0]
        good.append(float(row["fit_chi2"]))
    assert 0.7 <= np.nanmedian(good) <= 1.3, np.nanmedian(good)
    sig = fwhm / GAUSS_FWHM
    wings = 1.0 - 3 * ew_true * voigt_profile(wave - centre, sig, 0.8) + rng.normal(0, 1 / 1000, wave.size)
    row = lines.measure(make_spectrum(wave, wings, sigma=1 / 1000, resolving_power=centre / fwhm), ll,
                        profile="gauss")[0]
    assert row["fit_chi2"] > 5.0


def test_cayrel_formula_value():
    # Cayrel (1988) formula (from memory) evaluated by hand for FWHM 0.1 A, pixel 0.02 A, S/N 100:
    # 1.5*sqrt(0.002)/100 = 0.67 mA
    assert lines.cayrel_error(0.1, 0.02, 100.0) == pytest.approx(6.708e-4, rel=1e-3)


# ----------------------------------------------------------------------------- the Sun

# Solar equivalent widths from Moore, Minnaert & Houtgast (1966), "The solar spectrum
# 2935 A to 8770 A" (NBS Monograph 61) -- values recalled, not looked up: "from memory".
# That atlas is of the disk centre; the Kurucz model is integrated flux at R~2000.
MMH_EW_AA = {
    "NaI_D2": 0.752,  # from memory
    "NaI_D1": 0.564,  # from memory
    "MgI_b2": 1.259,  # Mg I 5172.7, from memory
    "MgI_b1": 1.584,  # Mg I 5183.6, from memory
    "CaII_K": 20.253,  # from memory
}


@pytest.fixture(scope="module")
def sun_lines(kurucz_sun):
    from specan.prepare import prepare

    w, f, c = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    w, f = w[keep], f[keep]
    # noiseless model: a nominal S/N of 500 sets the significance scale only
    spec = make_spectrum(w, f, sigma=f / 500.0, medium="vacuum", resolving_power=2000.0, normalized=False)
    return lines.measure(prepare(spec))


@pytest.mark.parametrize("line_id", sorted(MMH_EW_AA))
def test_solar_equivalent_widths_within_20_percent(sun_lines, line_id):
    row = sun_lines[list(sun_lines["id"]).index(line_id)]
    assert row["detected"]
    assert row["ew"].to_value(u.AA) == pytest.approx(MMH_EW_AA[line_id], rel=0.20)


def test_solar_lines_found_at_vacuum_positions(sun_lines):
    # the model is in vacuum: the vacuum column must be used, so offsets are small
    # (Kurucz model, measured minima e.g. Ca II K at 3934.78 A vacuum, tests/conftest.py)
    strong = sun_lines[sun_lines["detected"] & (sun_lines["depth"] > 0.3)]
    assert len(strong) > 10
    assert abs(np.median(strong["velocity"].to_value(u.km / u.s))) < 15.0


# ----------------------------------------------------------------------------- emission


def test_emission_line_negative_ew_and_flag():
    rng = np.random.default_rng(3)
    wave = np.arange(6400.0, 6700.0, 0.5)
    flux = 1.0 + gaussian(wave, 6562.79, 3.0, 4.0)  # H alpha in emission, EW -3 A
    flux -= gaussian(wave, 6495.0, 0.3, 2.0)  # Fe I 6495 in absorption
    flux += rng.normal(0, 0.005, wave.size)
    spec = make_spectrum(wave, flux, sigma=0.005, resolving_power=6563 / 2.0)
    m = lines.measure(spec)
    ha = m[list(m["id"]).index("H_alpha")]
    assert ha["emission"] and ha["detected"]
    assert ha["ew"].to_value(u.AA) == pytest.approx(-3.0, rel=0.05)
    fe = m[list(m["id"]).index("FeI_6495")]
    assert not fe["emission"] and fe["ew"].to_value(u.AA) == pytest.approx(0.3, rel=0.15)
    ident = lines.identify(spec)
    row = ident[list(ident["id"]).index("H_alpha")]
    assert row["emission"] and row["status"] == "identified"


# ----------------------------------------------------------------------------- identification


def _synthetic(rv_kms=0.0, extra=None, medium="air", noise=0.003, seed=0):
    """Normalised spectrum with some stellar-list lines (+ extra unlisted ones) at a velocity."""
    rng = np.random.default_rng(seed)
    wave = np.arange(4000.0, 6800.0, 0.6)
    ll = lines.load_linelist()
    use = ["H_delta", "H_gamma", "H_beta", "H_alpha", "CaI_4227", "FeI_4384", "MgI_b2", "MgI_b1",
           "NaI_D2", "NaI_D1", "BaII_4554", "FeI_5270"]
    col = "wave_vac" if medium == "vacuum" else "wave_air"
    factor = lines.doppler_factor(rv_kms * u.km / u.s)
    flux = np.ones(wave.size)
    for lid in use:
        lam = ll[list(ll["id"]).index(lid)][col].to_value(u.AA) * factor
        flux -= gaussian(wave, lam, 3.0 if lid.startswith("H_") else 0.4, 5.0 if lid.startswith("H_") else 2.0)
    for lam in extra or []:
        flux -= gaussian(wave, lam, 0.6, 2.0)
    flux += rng.normal(0, noise, wave.size)
    return make_spectrum(wave, flux, sigma=noise, medium=medium, resolving_power=5000 / 2.0), use


def test_identify_matches_lines_at_given_velocity():
    spec, used = _synthetic(rv_kms=120.0)
    t = lines.identify(spec, rv=120 * u.km / u.s)
    for lid in used:
        row = t[list(t["id"]).index(lid)]
        assert row["status"] == "identified", lid
        assert row["velocity"].to_value(u.km / u.s) == pytest.approx(120.0, abs=15.0), lid


def test_identify_estimates_velocity_when_not_given():
    spec, used = _synthetic(rv_kms=-80.0)
    t = lines.identify(spec, rv=None)
    assert t.meta["rv"].to_value(u.km / u.s) == pytest.approx(-80.0, abs=15.0)
    assert sum(t["status"] == "identified") >= len(used) - 1


def test_unidentified_strong_feature_reported():
    spec, _ = _synthetic(extra=[6100.0])  # no listed line within 6095-6105 A
    t = lines.identify(spec)
    un = t[t["status"] == "unidentified"]
    assert len(un) >= 1
    assert np.min(np.abs(un["wave_obs"].to_value(u.AA) - 6100.0)) < 0.5


def test_blends_marked_within_one_resolution_element():
    # Mg I b4 5167.32 and Fe I 5167.49 (both in the list) are 0.17 A apart
    spec, _ = _synthetic()
    m = lines.measure(spec)
    b4 = m[list(m["id"]).index("MgI_b4")]
    assert "FeI_5167" in b4["blend"].split(",")
    fe = m[list(m["id"]).index("FeI_5167")]
    assert "MgI_b4" in fe["blend"].split(",")
    # Na D1 and D2 are 6 A apart: more than one resolution element (2 A) here
    d2 = m[list(m["id"]).index("NaI_D2")]
    assert "NaI_D1" not in d2["blend"].split(",")


def test_vacuum_spectrum_uses_vacuum_wavelengths():
    spec, used = _synthetic(medium="vacuum")
    m = lines.measure(spec)
    found = m[np.isin(m["id"], used)]
    assert np.all(found["detected"])
    assert np.max(np.abs(found["velocity"].to_value(u.km / u.s))) < 10.0
    # the same spectrum wrongly called air is off by ~85 km/s (air vs vacuum at 5000 A)
    spec.meta["specan"].medium = "air"
    t = lines.identify(spec, window=30 * u.km / u.s)
    assert np.sum(t["status"][np.isin(t["id"], used)] == "identified") < len(used) // 2


def test_measure_table_columns_and_units():
    spec, _ = _synthetic()
    m = lines.measure(spec)
    for name in ("id", "species", "wave_air", "wave_vac", "wave_obs", "ew", "ew_err", "ew_err_cayrel",
                 "ew_fit", "fwhm", "depth", "fit_chi2", "method", "blend", "detected", "emission"):
        assert name in m.colnames
    assert m["ew"].unit == u.AA and m["wave_obs"].unit == u.AA
    assert set(m["method"]) <= {"integration", "gauss_fit", "voigt_fit", "multi_gauss_fit",
                                "multi_voigt_fit", "masked", "none"}
    # undetected lines still carry an EW with an error (an upper limit)
    # (lines more than two resolution elements (2 x 2 A) from any line put into the spectrum;
    # closer ones integrate part of their neighbour's profile)
    weak = m[~m["detected"]]
    assert len(weak) > 0 and np.all(np.isfinite(weak["ew_err"]))
    put = m["wave_air"][m["detected"]].to_value(u.AA)
    far = np.array([np.min(np.abs(put - w)) > 4.0 for w in weak["wave_air"].to_value(u.AA)])
    assert far.sum() > 20
    assert np.all(np.abs(weak["ew"][far]) < 5 * weak["ew_err"][far] + 0.02 * u.AA)


def test_unnormalised_input_is_prepared():
    spec, _ = _synthetic()
    wave = spec.spectral_axis.to_value(u.AA)
    slope = 2.0 + (wave - 4000.0) / 2800.0
    raw = make_spectrum(wave, spec.flux.value * slope, sigma=0.003 * slope, normalized=False,
                        resolving_power=2500.0)
    m = lines.measure(raw)
    row = m[list(m["id"]).index("NaI_D2")]
    assert row["ew"].to_value(u.AA) == pytest.approx(0.4, rel=0.1)


@pytest.mark.parametrize("with_errors", [True, False])
@pytest.mark.parametrize("snr", [30, 100])
def test_no_lines_detected_in_pure_noise(snr, with_errors):
    # A featureless, unnormalised spectrum with white noise, with or without its error array:
    # a 4-sigma matched filter over the default list's ~140 windows should find about nothing
    # (common practice). Measured: 0-1 lines; 13-20 before the continuum stopped riding the noise.
    wave = np.arange(4000.0, 7000.0, 1.0)
    flux = 100.0 * (1.0 + np.random.default_rng(snr).normal(0.0, 1.0 / snr, wave.size))
    raw = make_spectrum(wave, flux, sigma=100.0 / snr if with_errors else None, normalized=False,
                        resolving_power=2000.0)
    assert int(np.sum(lines.measure(raw)["detected"])) <= 2


def test_analyse_equals_measure_and_identify_called_apart():
    # analyse shares one internal build between measure and identify: same results as apart.
    from specan import synth

    spec = synth.spectrum("G2", "V", snr=80, seed=2)
    both = lines.analyse(spec)
    m = lines.measure(spec)
    ident = lines.identify(spec, rv=m.meta["rv"])
    assert np.allclose(both["lines"]["ew"].value, m["ew"].value, equal_nan=True)
    assert list(both["unidentified"]["id"]) == [i for i, st in zip(ident["id"], ident["status"])
                                                if st == "unidentified"]


def test_resolving_power_estimated_when_unknown():
    rng = np.random.default_rng(5)
    wave = np.arange(5000.0, 5600.0, 0.4)
    flux = np.ones(wave.size)
    for lam in rng.uniform(5010, 5590, 60):
        flux -= gaussian(wave, lam, rng.uniform(0.05, 0.2), 1.2)
    flux += rng.normal(0, 0.002, wave.size)
    spec = make_spectrum(wave, flux, sigma=0.002)
    t = lines.identify(spec)
    assert t.meta["resolving_power_source"].startswith("estimated")
    assert t.meta["resolving_power"] == pytest.approx(5300 / 1.2, rel=0.2)


# ----------------------------------------------------------------------------- band indices


def _band_table(kind, feature, blue, red):
    t = QTable()
    t["name"] = ["test"]
    for edge, (lo, hi) in (("feature", feature), ("blue", blue), ("red", red)):
        t[f"{edge}_min_air"] = [lo] * u.AA
        t[f"{edge}_max_air"] = [hi] * u.AA
        t[f"{edge}_min_vac"] = air_to_vacuum(t[f"{edge}_min_air"])
        t[f"{edge}_max_vac"] = air_to_vacuum(t[f"{edge}_max_air"])
    t["kind"] = [kind]
    t["source"] = ["test"]
    return t


@pytest.mark.parametrize("kind", ["ew", "magnitude", "ratio"])
def test_band_index_box_feature_on_sloped_continuum(kind):
    # A box of depth 0.3 over 20 A on a linear continuum: the straight pseudo-continuum
    # through the side windows is exact, so EW = 0.3 * 20 A, mag = -2.5 log10(0.7), ratio 0.7.
    wave = np.arange(5000.0, 5200.0, 0.25)
    cont = 100.0 + 0.2 * (wave - 5000.0)
    flux = cont * np.where((wave >= 5090) & (wave <= 5110), 0.7, 1.0)
    spec = make_spectrum(wave, flux, sigma=0.001 * cont, normalized=False)
    t = lines.band_indices(spec, _band_table(kind, (5092.0, 5108.0), (5040.0, 5060.0), (5140.0, 5160.0)))
    expected = {"ew": 0.3 * 16.0, "magnitude": -2.5 * np.log10(0.7), "ratio": 0.7}[kind]
    assert t["value"][0] == pytest.approx(expected, rel=0.01)
    assert t["unit"][0] == {"ew": "Angstrom", "magnitude": "mag", "ratio": ""}[kind]


def test_band_index_errors_match_monte_carlo():
    rng = np.random.default_rng(7)
    wave = np.arange(5000.0, 5200.0, 0.5)
    clean = np.where((wave >= 5090) & (wave <= 5110), 0.6, 1.0) * 50.0
    bands = _band_table("magnitude", (5092.0, 5108.0), (5040.0, 5060.0), (5140.0, 5160.0))
    vals, errs = [], []
    for _ in range(200):
        spec = make_spectrum(wave, clean + rng.normal(0, 1.0, wave.size), sigma=1.0, normalized=False)
        t = lines.band_indices(spec, bands)
        vals.append(t["value"][0])
        errs.append(t["err"][0])
    assert 0.8 <= np.median(errs) / np.std(vals, ddof=1) <= 1.25


def test_default_bands_on_solar_model(kurucz_sun):
    w, f, c = kurucz_sun
    spec = make_spectrum(w, f, medium="vacuum", normalized=False)
    t = lines.band_indices(spec)
    row = {n: (v, e) for n, v, e in zip(t["name"], t["value"], t["err"])}
    # The Sun's G band and Mg b are strong, TiO absent (common practice: Lick indices of a
    # G2 V star, e.g. G4300 ~5 A, Mgb ~3-4 A, TiO2 ~0 mag -- from memory, loose bounds)
    assert 2.0 < row["G4300"][0] < 9.0
    assert 2.0 < row["Mgb"][0] < 6.0
    assert abs(row["TiO2"][0]) < 0.05
    assert np.isfinite(row["NaD"][0])


# ----------------------------------------------------------------------------- reference library


@pytest.fixture(scope="module")
def jhc_balmer(jhc1984, jhc_catalog):
    """(type code, MK type, mean EW of H beta, H gamma, H delta, identify table or None) per star."""
    import specan
    from specan.mktypes import sptype_to_code
    from specan.prepare import prepare

    balmer = lines.load_linelist()
    balmer = balmer[np.isin(balmer["id"], ["H_beta", "H_gamma", "H_delta"])]
    out = []
    for row in jhc_catalog:
        spec = prepare(specan.read(jhc1984 / row["file"]))
        m = lines.measure(spec, balmer)
        ident = lines.identify(spec) if str(row["sptype"]).startswith("A") else None
        out.append((sptype_to_code(row["sptype"]), str(row["mk"]), float(np.nanmean(m["ew"].value)), ident))
    return out


@pytest.mark.reference
@pytest.mark.slow
def test_balmer_lines_identified_in_every_a_star(jhc_balmer):
    a_stars = [r for r in jhc_balmer if r[3] is not None]
    assert len(a_stars) >= 10
    for _, mk, _, ident in a_stars:
        for lid in ("H_alpha", "H_beta", "H_gamma"):
            row = ident[list(ident["id"]).index(lid)]
            assert row["status"] == "identified", (mk, lid)
            assert not row["emission"], (mk, lid)


@pytest.mark.reference
@pytest.mark.slow
def test_balmer_strength_peaks_between_late_b_and_early_f(jhc_balmer):
    # common practice: hydrogen lines are strongest near A0-A2 (Balmer maximum)
    groups = {"O": (0, 10), "early B": (10, 15), "late B": (15, 20), "A": (20, 30), "early F": (30, 35),
              "late F": (35, 40), "G": (40, 50), "K": (50, 60), "M": (60, 70)}
    medians = {}
    for name, (lo, hi) in groups.items():
        ews = [ew for code, _, ew, _ in jhc_balmer if lo <= code < hi and np.isfinite(ew)]
        if ews:
            medians[name] = float(np.median(ews))
    peak = max(medians, key=medians.get)
    assert peak in ("late B", "A", "early F"), medians
    # and clearly above the hot and cool ends
    for far in ("O", "early B", "G"):
        assert medians[peak] > 1.5 * medians[far], medians


# ----------------------------------------------------------------------------- command line


def test_cli_lines_json_and_table(tmp_path):
    import json

    from click.testing import CliRunner

    from specan.cli import cli

    spec, used = _synthetic()
    wave = spec.spectral_axis.to_value(u.AA)
    path = tmp_path / "star.txt"
    # a plain two-column text file as an observer would have it (wavelength in Angstrom)
    np.savetxt(path, np.column_stack([wave, 1000.0 * spec.flux.value]),
               header="Wavelength [Angstrom]    Flux", fmt="%.4f")
    runner = CliRunner()
    res = runner.invoke(cli, ["lines", str(path), "--json", "--resolving-power", "2500"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output.strip().splitlines()[-1])
    assert d["file"] == str(path)
    row = {r["id"]: r for r in d["lines"]}["NaI_D2"]
    for key in ("id", "species", "wave_air_aa", "wave_vac_aa", "ew_aa", "ew_err_aa", "fwhm_aa", "depth", "fit_chi2",
                "method", "blend", "detected"):
        assert key in row
    assert row["detected"] and row["ew_aa"] == pytest.approx(0.4, rel=0.15)
    assert "NaD" in d["indices"] and set(d["indices"]["NaD"]) >= {"value", "err"}
    assert d["unidentified"] == []  # every line put in is listed
    res = runner.invoke(cli, ["lines", str(path), "--resolving-power", "2500"])
    assert res.exit_code == 0 and "NaI_D2" in res.output and "indices:" in res.output
    missing = runner.invoke(cli, ["lines", str(tmp_path / "absent.fits"), "--json"])
    assert missing.exit_code != 0


def test_cli_lines_of_a_fast_star(tmp_path):
    # A synthetic K1 III (specan.synth) at +600 km/s, R = 2000: by default the CLI takes the
    # velocity stage's velocity, so the lines are found as for the star at rest (at rv 0 most
    # of them fall outside their one-resolution-element windows).
    import json

    from click.testing import CliRunner

    from specan import synth
    from specan.cli import cli

    counts = {}
    for name, rv in (("rest", 0.0), ("fast", 600.0)):
        s = synth.spectrum("K1", "III", resolving_power=2000, rv=rv * u.km / u.s, snr=100, seed=5)
        path = tmp_path / f"{name}.txt"
        np.savetxt(path, np.column_stack([s.spectral_axis.to_value(u.AA), 1000.0 * s.flux.value]),
                   header="Wavelength [Angstrom]    Flux", fmt="%.4f")
        res = CliRunner().invoke(cli, ["lines", str(path), "--json", "--resolving-power", "2000"])
        assert res.exit_code == 0, res.output
        d = json.loads(res.output.strip().splitlines()[-1])
        counts[name] = sum(r["detected"] for r in d["lines"])
        assert d["rv_source"].startswith("velocity stage")
        assert d["rv_kms"] == pytest.approx(rv, abs=5.0)
    assert counts["fast"] >= 0.9 * counts["rest"] > 0


def test_masked_line_core_is_not_measured():
    spec, _ = _synthetic()
    wave = spec.spectral_axis.to_value(u.AA)
    mask = np.abs(wave - 5889.95) < 2.0  # e.g. a cosmic-ray hit flagged by the reader
    masked = Spectrum(spectral_axis=spec.spectral_axis, flux=spec.flux, uncertainty=spec.uncertainty,
                      mask=mask, meta=spec.meta)
    m = lines.measure(masked)
    d2 = m[list(m["id"]).index("NaI_D2")]
    assert d2["method"] == "masked" and not d2["detected"] and np.isnan(d2["ew"])
    d1 = m[list(m["id"]).index("NaI_D1")]
    assert d1["detected"] and d1["ew"].to_value(u.AA) == pytest.approx(0.4, rel=0.15)


def test_user_line_list_path(tmp_path):
    spec, _ = _synthetic()
    path = tmp_path / "mine.ecsv"
    one_line_list(5889.95, name="my_D2", species="Na I").write(path, format="ascii.ecsv")
    m = lines.measure(spec, path)
    assert list(m["id"]) == ["my_D2"] and m["detected"][0]


def test_metal_lines_in_a_balmer_wing_measured_against_the_wing():
    # An A-star-like H gamma (Voigt, EW 12 A; closed form as in the Voigt test) with two
    # weak lines in its wings, multiplied in (F = F_H * F_metal): their EWs relative to the
    # wing are the ones put in (0.10 and 0.08 A).
    rng = np.random.default_rng(11)
    wave = np.arange(4200.0, 4500.0, 0.5)
    hyd = 1.0 - 12.0 * voigt_profile(wave - 4340.47, 2.0, 4.0)
    metal = 1.0 - gaussian(wave, 4325.76, 0.10, 2.0) - gaussian(wave, 4351.77, 0.08, 2.0)
    spec = make_spectrum(wave, hyd * metal + rng.normal(0, 0.002, wave.size), sigma=0.002,
                         resolving_power=4340 / 2.0)
    m = lines.measure(spec)
    row = {r["id"]: r for r in m}
    # the Voigt fit recovers the closed form; direct integration stops where the Stark
    # wings sink into the noise (here +-67 A) and misses ~6% of them
    assert row["H_gamma"]["ew_fit"].to_value(u.AA) == pytest.approx(12.0, rel=0.03)
    assert row["H_gamma"]["ew"].to_value(u.AA) == pytest.approx(12.0, rel=0.10)
    # (within 20%: residuals of the hydrogen fit near its core remain; measured +-10-18%)
    assert row["FeI_4326"]["ew"].to_value(u.AA) == pytest.approx(0.10, rel=0.20)
    assert row["FeII_4352"]["ew"].to_value(u.AA) == pytest.approx(0.08, rel=0.20)
    # without dividing out hydrogen the wing lines come out far too weak
    plain = lines.measure(spec, divide_hydrogen=False)
    fe = plain[list(plain["id"]).index("FeII_4352")]
    assert fe["ew"].to_value(u.AA) < 0.5 * 0.08


# ----------------------------------------------------------------------------- errors without an error array
# Issue 13: equivalent-width errors without an error array within 1.3x those the true error
# array gives (median over the lines detected both ways). With DER_SNR noise they were
# 1.9x (S/N 30) and 4.0x (S/N 100) on the Kurucz Sun at R 2000, 1.1-1.7x on the synthetic
# stars (measured before the change; after: 0.96-1.16x, see benchmarks/bench_noise.py).


def _ew_error_ratio(wave, flux, err, resolving_power, medium):
    # unnormalised input: prepare() fits the continuum, as for a user's file
    with_err = lines.measure(make_spectrum(wave, flux, sigma=err, medium=medium, resolving_power=resolving_power,
                                           normalized=False))
    without = lines.measure(make_spectrum(wave, flux, medium=medium, resolving_power=resolving_power,
                                          normalized=False))
    assert without.meta["noise_source"].startswith("flux")
    both = np.asarray(with_err["detected"]) & np.asarray(without["detected"])
    assert list(with_err["id"]) == list(without["id"]) and both.sum() >= 10
    return float(np.median(without["ew_err"][both] / with_err["ew_err"][both]))


@pytest.mark.parametrize("snr", [30, 100])
def test_ew_errors_without_error_array_on_kurucz_sun(kurucz_sun, snr):
    w, f, _ = kurucz_sun   # Kurucz solar model (rms-solar), R 2000
    keep = (w > 3700) & (w < 8800)
    w, f = w[keep], f[keep]
    sigma = np.full(f.size, np.median(f) / snr)
    noisy = f + np.random.default_rng(snr).normal(0.0, 1.0, f.size) * sigma
    ratio = _ew_error_ratio(w, noisy, sigma, 2000.0, "vacuum")
    assert 1 / 1.3 <= ratio <= 1.3, ratio


@pytest.mark.parametrize("sptype", ["A2", "K2"])
@pytest.mark.parametrize("resolving_power", [1000, 20000])
def test_ew_errors_without_error_array_on_synthetic_stars(sptype, resolving_power):
    from specan import synth

    for snr in (30, 100):
        s = synth.spectrum(sptype, "V", resolving_power=resolving_power, snr=snr, seed=1,
                           wave_range=(3800, 6800) * u.AA, continuum="blackbody")
        ratio = _ew_error_ratio(s.spectral_axis.to_value(u.AA), s.flux.value, s.uncertainty.array,
                                float(resolving_power), "air")
        assert 1 / 1.3 <= ratio <= 1.3, (snr, ratio)


# ----------------------------------------------------------------------------- strong lines
# Issue 13: strong lines measured over windows their own wings set. Published solar
# equivalent widths: Moore, Minnaert & Houtgast (1966), "The solar spectrum 2935 A to
# 8770 A" (NBS Monograph 61), disk centre; values recalled, not looked up.
SOLAR_STRONG_EW_AA = {
    "CaII_K": 20.253,   # from memory (MMH 1966)
    "CaII_H": 15.467,   # from memory (MMH 1966)
    "NaI_D2": 0.752,    # from memory (MMH 1966)
    "NaI_D1": 0.564,    # from memory (MMH 1966)
    "MgI_b4": 0.935,    # Mg I 5167.3, from memory (MMH 1966)
    "MgI_b2": 1.259,    # Mg I 5172.7, from memory (MMH 1966)
    "MgI_b1": 1.584,    # Mg I 5183.6, from memory (MMH 1966)
    "H_alpha": 4.020,   # from memory (MMH 1966)
    "H_beta": 3.680,    # from memory (MMH 1966)
}
# The project has no solar spectrum above R 2000 (the Kurucz model of rms-solar is R 2000),
# so the R >= 5000 solar check cannot be made; damped synthetic lines stand in below.

# Measured at R 2000 against the continuum prepare() fits (a pseudo-continuum, ~11% low in
# the blue, see tests/test_prepare.py) and against the model's own continuum:
#   K 17.70 / 23.50, H 17.10 / 25.38, D2 0.858 / 0.888, D1 0.653 / 0.694, b4 0.730 / 0.797,
#   b2 1.453 / 1.538, b1 1.539 / 1.619, Halpha 3.281 / 3.823, Hbeta 4.422 / 5.708 A.
# The Balmer lines are integrated with the metal lines inside their windows taken out
# (specan.lines.hydrogen_blends): before, Hbeta read 5.464 / 6.863 A and Halpha 3.502 / 4.048 A.
_HBETA_GAP = ("against the true continuum H beta at R 2000 reads 5.71 A (+55%): of the 6.86 A its window "
              "(4848-4882 A) holds, the metal lines found there carry 1.16 A; the rest of the excess is the "
              "blanketing of weak lines no feature stands for (the crests between the lines, 8-17 A from the "
              "centre, lie at 0.85-0.91 of the true continuum, 0.89-0.95 of the fitted one)")
_TRUE_CONTINUUM_GAPS = {
    "H_beta": _HBETA_GAP,
    "CaII_H": ("against the true continuum Ca II H at R 2000 reads 25.4 A (+64%): its wings, fitted out to "
               "100 A, take up the ~11% line blanketing of the unresolved weak lines around it, which the "
               "fitted pseudo-continuum removes (17.1 A, +11%)"),
}


@pytest.fixture(scope="module")
def sun_lines_true_continuum(kurucz_sun):
    w, f, c = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    w, f, c = w[keep], f[keep] / c[keep], c[keep]
    spec = make_spectrum(w, f, sigma=f / 500.0, medium="vacuum", resolving_power=2000.0, normalized=True)
    return lines.measure(spec)


def _strong_param(gaps):
    return [pytest.param(k, marks=pytest.mark.xfail(strict=True, reason=gaps[k])) if k in gaps else k
            for k in sorted(SOLAR_STRONG_EW_AA)]


@pytest.mark.parametrize("line_id", _strong_param({}))
def test_solar_strong_lines_within_25_percent(sun_lines, line_id):
    # against the continuum specan fits (what a user gets)
    row = sun_lines[list(sun_lines["id"]).index(line_id)]
    assert row["detected"]
    assert row["ew"].to_value(u.AA) == pytest.approx(SOLAR_STRONG_EW_AA[line_id], rel=0.25)


@pytest.mark.parametrize("line_id", _strong_param(_TRUE_CONTINUUM_GAPS))
def test_solar_strong_lines_against_the_true_continuum(sun_lines_true_continuum, line_id):
    t = sun_lines_true_continuum
    row = t[list(t["id"]).index(line_id)]
    assert row["detected"]
    assert row["ew"].to_value(u.AA) == pytest.approx(SOLAR_STRONG_EW_AA[line_id], rel=0.25)


def test_solar_ca_k_window_reaches_its_wings(sun_lines):
    # the window is reported with each line; Ca II K's reaches tens of Angstrom (its wings)
    row = sun_lines[list(sun_lines["id"]).index("CaII_K")]
    assert row["method"] == "wing_voigt_fit"
    assert (row["window_max"] - row["window_min"]).to_value(u.AA) > 60.0


def _damped_line(resolving_power, seed=4, weak_lines=True, snr=200.0):
    """A Ca II K-like line (pure damping wings, EW 22 A) among weak lines, and its own EW."""
    from scipy.ndimage import gaussian_filter1d

    rng = np.random.default_rng(seed)
    centre = 3933.66
    fine = np.arange(3700.0, 4170.0, 0.01)
    tau_line = 40.0 * voigt_profile(fine - centre, 0.05, 1.0) / voigt_profile(0.0, 0.05, 1.0)
    tau = tau_line.copy()
    if weak_lines:
        for x in rng.uniform(3710.0, 4160.0, 250):
            tau += rng.uniform(0.05, 0.6) * np.exp(-0.5 * ((fine - x) / 0.05) ** 2)
    ew_true = float(np.trapezoid(1.0 - np.exp(-tau_line), fine))
    smooth = gaussian_filter1d(np.exp(-tau), centre / resolving_power / GAUSS_FWHM / 0.01)
    wave = np.arange(3720.0, 4150.0, centre / resolving_power / 2.5)
    flux = np.interp(wave, fine, smooth) + rng.normal(0.0, 1.0 / snr, wave.size)
    spec = make_spectrum(wave, flux, sigma=np.full(wave.size, 1.0 / snr), resolving_power=resolving_power)
    return spec, ew_true


@pytest.mark.parametrize("resolving_power", [2000, 5000, 20000])
@pytest.mark.parametrize("weak_lines", [False, True])
def test_damped_line_equivalent_width_from_its_wings(resolving_power, weak_lines):
    # Issue 13: at R 5000 the solar K line read 3.5 A of ~20 (its wings not integrated);
    # before this change this line read 17.0-17.2 A at R 2000, 2.1-2.5 A at R 5000 and 0.17-0.19 A
    # at R 20000 (measured). Measured now: 23.3-24.2 A for a true 22.0 A (a Voigt is not quite the
    # shape of a saturated line; the weak lines' blanketing in the wings adds up to 0.9 A).
    spec, ew_true = _damped_line(resolving_power, weak_lines=weak_lines)
    row = lines.measure(spec, one_line_list(3933.66, "CaII_K", "Ca II"))[0]
    assert row["method"] == "wing_voigt_fit"
    assert row["ew"].to_value(u.AA) == pytest.approx(ew_true, rel=0.15)
    assert row["window_min"].to_value(u.AA) < 3933.66 - 40 and row["window_max"].to_value(u.AA) > 3933.66 + 40


def test_solar_h_beta_metal_lines_taken_out(sun_lines):
    # the metal lines inside H beta's window are modelled and taken out of its integral, and the
    # row says so; the window stays the one reported
    row = sun_lines[list(sun_lines["id"]).index("H_beta")]
    assert row["method"] == "integration_less_blends"
    assert row["ew"] < row["ew_int"] - 0.5 * u.AA     # measured: 4.42 of 5.46 A
    assert row["window_min"].to_value(u.AA) < 4855 and row["window_max"].to_value(u.AA) > 4870


_BLEND_TYPES = (("A2", "V"), ("F0", "V"), ("F5", "V"), ("G2", "V"), ("G8", "III"), ("K2", "III"), ("K5", "V"))


def test_hydrogen_lines_leave_out_the_metal_lines_in_their_windows():
    # Noiseless synthetic stars (specan.synth), R 2000: the metal lines' absorption inside each
    # Balmer line's reported window is the flux of the hydrogen lines alone (synth's species=)
    # less the full flux, summed over the window. The plain integral counts all of it as hydrogen;
    # what is taken out must match it. (H delta is left out: the metal lines within one line
    # width of its core stay in it, 0.45-0.60 A in G8-K5 stars, measured.)
    from specan import synth
    from specan.lines.data import pixel_edges

    left_plain = left_now = 0.0
    for sptype, lumclass in _BLEND_TYPES:
        full = synth.spectrum(sptype, lumclass, resolving_power=2000)
        alone = synth.spectrum(sptype, lumclass, resolving_power=2000, species=("H I",))
        t = lines.measure(full)
        w = full.spectral_axis.to_value(u.AA)
        dx = np.diff(pixel_edges(w))
        for line_id in ("H_beta", "H_alpha", "H_gamma"):
            row = t[list(t["id"]).index(line_id)]
            sel = (w >= row["window_min"].to_value(u.AA)) & (w <= row["window_max"].to_value(u.AA))
            metal = float(np.sum((alone.flux.value - full.flux.value)[sel] * dx[sel]))
            taken = (row["ew_int"] - row["ew"]).to_value(u.AA)
            # never more than the metal lines hold (measured: at most 0.04 A more, A2 V H alpha)
            assert taken <= metal + 0.05, (sptype, line_id, metal, taken)
            left_plain += abs(metal)
            left_now += abs(metal - taken)
    # measured: 2.22 A left in by the plain integral, 0.64 A now
    assert left_now < 0.4 * left_plain, (left_plain, left_now)


def test_hydrogen_alone_keeps_its_integral():
    # Without metal lines nothing may be taken out: noise dips are no metal lines (only the
    # features found are modelled, and a strength is never below zero, so a line put where the
    # spectrum shows none would always take something)
    from specan import synth
    from specan.prepare import prepare

    shift, errors = [], []
    for sptype, lumclass in _BLEND_TYPES:
        for seed in (3, 4):
            spec = synth.spectrum(sptype, lumclass, resolving_power=2000, continuum="blackbody", snr=100,
                                  seed=seed, species=("H I",))
            t = lines.measure(prepare(spec))
            for line_id in ("H_beta", "H_alpha", "H_gamma"):
                row = t[list(t["id"]).index(line_id)]
                shift.append((row["ew_int"] - row["ew"]).to_value(u.AA))
                errors.append(row["ew_err"].to_value(u.AA))
    # measured: 0.014 A in all over 42 lines of errors 0.05-0.15 A
    assert np.sum(np.abs(shift)) < 0.1 * np.sum(errors), (np.sum(shift), np.sum(errors))


def _balmer_among_metal_lines(seeds, snr=100.0, resolving_power=2000.0):
    """A Voigt H beta (6 A) with four Gaussian metal lines (0.62 A) in its wings, noisy draws:
    per draw (ew, ew_err, ew_int, the H line alone integrated over the reported window)."""
    from specan.lines.data import pixel_edges

    wave = np.arange(4700.0, 5000.0, 4861.3 / resolving_power / 2.5)
    sig = 4861.3 / resolving_power / GAUSS_FWHM
    alone = 1.0 - 6.0 * voigt_profile(wave - 4861.3, 1.2, 2.0)
    metal = sum(ew * np.exp(-0.5 * ((wave - c) / sig) ** 2) / (sig * np.sqrt(2 * np.pi))
                for c, ew in ((4849.0, 0.15), (4855.5, 0.10), (4871.5, 0.25), (4877.0, 0.12)))
    dx = np.diff(pixel_edges(wave))
    out = []
    for seed in seeds:
        flux = alone * (1.0 - metal) + np.random.default_rng(seed).normal(0.0, 1.0 / snr, wave.size)
        t = lines.measure(make_spectrum(wave, flux, sigma=np.full(wave.size, 1.0 / snr),
                                        resolving_power=resolving_power))
        row = t[list(t["id"]).index("H_beta")]
        sel = (wave >= row["window_min"].to_value(u.AA)) & (wave <= row["window_max"].to_value(u.AA))
        out.append((row["ew"].to_value(u.AA), row["ew_err"].to_value(u.AA), row["ew_int"].to_value(u.AA),
                    float(np.sum((1.0 - alone[sel]) * dx[sel]))))
    return np.array(out).T


def test_balmer_line_among_metal_lines_nearer_its_own_width():
    ew, _, ew_int, alone = _balmer_among_metal_lines(range(12))
    # measured (40 draws): 0.17 A above the H line alone against 0.57 A for the plain integral
    # (in some draws a metal line on the steep wing is not found as a feature, and stays in)
    assert np.mean(np.abs(ew - alone)) < 0.5 * np.mean(np.abs(ew_int - alone))


@pytest.mark.xfail(strict=True, reason=(
    "measured over 40 draws at S/N 100: (ew - the H line alone) / ew_err has mean 2.07 and sd 2.15; "
    "ew scatters by 0.18 A against a median error of 0.083 A (the plain integral already by 0.12 A): "
    "whether a weak metal line on the wing is found as a feature changes from draw to draw, and "
    "the error counts the noise of the fit only"))
def test_balmer_line_among_metal_lines_error_covers_its_scatter():
    ew, err, _, alone = _balmer_among_metal_lines(range(40))
    pull = (ew - alone) / err
    assert abs(np.mean(pull)) < 0.5 and 0.7 < np.std(pull, ddof=1) < 1.4
