"""Preparation tests: continuum against models with a known continuum, S/N, masks, degrading."""

import numpy as np
import pytest
import astropy.units as u
from scipy.special import voigt_profile
from specutils import Spectrum

import specan
from specan.obsinfo import ObsInfo
from specan.prepare import degrade, fit_continuum, mask_telluric, prepare, snr


def _spectrum(wave, flux, err=None, medium="vacuum"):
    from astropy.nddata import StdDevUncertainty

    info = ObsInfo(medium=medium, medium_assumed=False)
    unc = None if err is None else StdDevUncertainty(err)
    return Spectrum(spectral_axis=wave * u.AA, flux=flux * u.dimensionless_unscaled, uncertainty=unc,
                    meta={"specan": info})


RESPONSES = {
    # smooth instrument responses, unknown to the fit (invented for the test)
    "tilted": lambda w: 1 + 0.5 * ((w - 6000) / 3000) - 0.6 * ((w - 6000) / 3000) ** 2,
    "blaze": lambda w: np.exp(-0.5 * ((w - 5500) / 1800) ** 2),
}


@pytest.mark.parametrize("response", sorted(RESPONSES))
def test_continuum_on_kurucz_sun_red(kurucz_sun, response):
    # Kurucz solar flux model with its true continuum (rms-solar package), R~2000
    w, f, c = kurucz_sun
    keep = (w > 3700) & (w < 9000)
    w, f, c = w[keep], f[keep], c[keep]
    r = RESPONSES[response](w)
    fit = fit_continuum(_spectrum(w, f * r)).value
    ratio = fit / (c * r)
    red = (w > 5000) & (w < 6800)
    assert np.median(np.abs(ratio[red] - 1)) < 0.01


def test_continuum_over_the_whole_kurucz_model():
    # The rms-solar Kurucz model from 0.15 to 300 microns in one spectrum. The smoother's
    # matrices grow with the wavelength range; a dense one asked for 74 GB here (measured).
    # Over 5000-6800 A the fit must still follow the model's own continuum, nearly as well as
    # on the optical part alone (1%, above): measured 1.2%, because the anchor windows are set
    # in pixels from the median pixel, here 17 A (1.5 A in the optical).
    from conftest import _kurucz_arrays

    w, f, c = _kurucz_arrays()
    fit = fit_continuum(_spectrum(w, f)).value
    red = (w > 5000) & (w < 6800)
    assert np.median(np.abs(fit[red] / c[red] - 1)) < 0.015


@pytest.mark.xfail(strict=True, reason="known gap: at R~2000 the solar spectrum between 4000 and 5000 A never "
                   "reaches its continuum (highest points 0.82-0.95 of it, measured), so an envelope fit is "
                   "~11% low; meeting 3% needs a blanketing model")
def test_continuum_on_kurucz_sun_blue(kurucz_sun):
    w, f, c = kurucz_sun
    keep = (w > 3700) & (w < 9000)
    w, f, c = w[keep], f[keep], c[keep]
    r = RESPONSES["tilted"](w)
    ratio = fit_continuum(_spectrum(w, f * r)).value / (c * r)
    blue = (w > 4000) & (w < 5000)
    assert np.median(np.abs(ratio[blue] - 1)) < 0.03


@pytest.mark.parametrize("with_errors", [True, False])
@pytest.mark.parametrize("snr_in", [10, 30, 100])
def test_continuum_of_pure_noise_is_its_mean(snr_in, with_errors):
    # A flat spectrum with white noise, with or without its error array: the continuum is the
    # mean level (common practice). An upper envelope of the noise sat 1.1 sigma high with the
    # error array and 2.7-2.9 sigma high without (measured before the noise-aware fit).
    w = np.arange(4000.0, 7000.0, 1.0)
    bias = []
    for seed in range(3):
        flux = 1.0 + np.random.default_rng(seed).normal(0.0, 1.0 / snr_in, w.size)
        err = np.full(w.size, 1.0 / snr_in) if with_errors else None
        fit = fit_continuum(_spectrum(w, flux, err, medium="air")).value
        bias.append(np.median(fit - 1.0) * snr_in)
    assert abs(np.mean(bias)) < 0.4   # in units of the noise; measured 0.2


BALMER_AIR = {6562.80: 25.0, 4861.33: 22.0, 4340.46: 20.0, 4101.74: 18.0, 3970.07: 16.0, 3889.05: 12.0,
              3835.38: 10.0, 3797.90: 8.0}  # NIST ASD wavelengths; Lorentzian FWHM (A) invented for an A dwarf


def _a_star(w, snr=None, seed=0):
    x = np.ones_like(w)
    for l0, gamma in BALMER_AIR.items():
        prof = voigt_profile(w - l0, 2.0, gamma / 2) / voigt_profile(0.0, 2.0, gamma / 2)
        x *= 1 - 0.75 * prof
    cont = (w / 5000.0) ** -2.5 * (1 + 0.3 * np.sin(w / 900.0))
    flux = x * cont
    err = None
    if snr:
        sigma = np.median(flux) / snr
        flux = flux + np.random.default_rng(seed).normal(0, sigma, w.size)
        err = np.full(w.size, sigma)
    return flux, cont, err


@pytest.mark.parametrize("snr_in", [None, 100])
def test_continuum_not_dragged_by_balmer_wings(snr_in):
    w = np.arange(3700.0, 7000.0, 1.5)
    flux, cont, err = _a_star(w, snr_in)
    fit = fit_continuum(_spectrum(w, flux, err, medium="air")).value
    for l0 in (6562.80, 4861.33, 4340.46, 4101.74):  # H alpha ... H delta
        near = np.abs(w - l0) < 150
        assert np.max(np.abs(fit[near] / cont[near] - 1)) < 0.02, l0


def _check_dersnr(w, flux, snr_in, seed):
    noisy = flux + np.random.default_rng(seed).normal(0, np.median(flux) / snr_in, flux.size)
    return snr(_spectrum(w, noisy))["snr"]


@pytest.mark.parametrize("snr_in", [10, 30, 100, 200])
def test_dersnr_recovers_injected_snr_synthetic(snr_in):
    # DER_SNR, Stoehr et al. (2008): unbiased for noise on a spectrum sampled well enough
    w = np.arange(3700.0, 7000.0, 1.5)
    flux, _, _ = _a_star(w)
    got = _check_dersnr(w, flux, snr_in, seed=snr_in)
    assert got == pytest.approx(snr_in, rel=0.15)


@pytest.mark.reference
@pytest.mark.parametrize("snr_in", [10, 50, 200])
def test_dersnr_recovers_injected_snr_real_spectrum(jhc1984, snr_in):
    s = specan.read(jhc1984 / "spectra" / "HD66171.csv")  # a G2 V star of the JHC (1984) library
    w, f = s.spectral_axis.to_value(u.AA), s.flux.value
    assert _check_dersnr(w, f, snr_in, seed=1) == pytest.approx(snr_in, rel=0.15)


def test_snr_from_error_array():
    w = np.linspace(4000, 6000, 1000)
    s = _spectrum(w, np.full(w.size, 50.0), err=np.full(w.size, 2.0))
    assert snr(s)["snr_err_array"] == pytest.approx(25.0)


def test_telluric_bands_masked_in_either_medium():
    # O2 A band, head at 7593.7 A in air, strongest part to ~7621 A (common practice)
    w = np.linspace(7500.0, 7700.0, 2001)
    air = mask_telluric(_spectrum(w, np.ones_like(w), medium="air"))
    assert air.mask[np.abs(w - 7607) < 13].all() and not air.mask[np.abs(w - 7550) < 5].any()
    vac = mask_telluric(_spectrum(w, np.ones_like(w), medium="vacuum"))
    # the same band in vacuum wavelengths lies ~2.1 A redder (Morton 2000): its head at 7595.8 A
    head_air = np.argmin(np.abs(w - 7594.0))
    assert air.mask[head_air] and not vac.mask[head_air]
    assert vac.mask[np.argmin(np.abs(w - 7596.0))]


def test_prepare_returns_normalised_masked_spectrum():
    w = np.arange(3700.0, 7000.0, 1.5)
    flux, cont, err = _a_star(w, snr=80)
    flux[100] = np.nan
    out = prepare(_spectrum(w, flux, err, medium="air"))
    info = specan.get_info(out)
    assert info.normalized and info.snr > 40
    assert out.mask[100]
    assert np.median(out.flux.value[(w > 5200) & (w < 5800)]) == pytest.approx(1.0, abs=0.02)
    assert out.flux.unit == u.dimensionless_unscaled


def test_degrade_gives_the_target_resolution():
    # A delta-like line degraded to R=1000 has FWHM lambda/R (Gaussians add in quadrature)
    w = np.arange(5000.0, 6000.0, 0.02)
    flux = 1 - 0.5 * np.exp(-0.5 * ((w - 5500) / 0.1) ** 2)
    s = _spectrum(w, flux)
    out = degrade(s, 1000.0, from_resolving_power=5500 / (0.1 * 2.3548))
    depth = 1 - out.flux.value
    half = w[depth > depth.max() / 2]
    assert half[-1] - half[0] == pytest.approx(5.5, rel=0.03)
    assert np.trapezoid(depth, w) == pytest.approx(np.trapezoid(1 - flux, w), rel=2e-3)  # EW conserved


def test_prepare_is_callable_from_the_package_and_still_a_module():
    w = np.arange(4000.0, 6000.0, 1.0)
    s = _spectrum(w, 2.0 + 0.0 * w, medium="air")
    out = specan.prepare(s)
    assert specan.get_info(out).normalized
    assert callable(specan.prepare.fit_continuum)


def test_continuum_not_pulled_up_by_emission_lines():
    # An emission-line star (invented: H alpha and H beta in emission, peaks 5x and 2x the continuum)
    w = np.arange(3700.0, 7000.0, 1.5)
    flux, cont, err = _a_star(w, snr=100)
    for l0, peak in ((6562.80, 5.0), (4861.33, 2.0)):
        flux = flux + cont * peak * np.exp(-0.5 * ((w - l0) / 3.0) ** 2)
    fit = fit_continuum(_spectrum(w, flux, err, medium="air")).value
    ratio = fit / cont
    assert np.max(np.abs(ratio[(w > 4000) & (w < 6900)] - 1)) < 0.05
    assert np.median(np.abs(ratio - 1)) < 0.02


# ----------------------------------------------------------------------------- S/N without an error array
# Issue 13: S/N 10-300 injected on the Kurucz solar model (rms-solar) and on synthetic A and K
# dwarfs at R 1,000-20,000, no error array: ``snr`` within 20% of the injected S/N.
# DER_SNR alone read 43 for a true 300 on the Sun at R 2000 (measured before the change).


def _without_errors(spectrum):
    return Spectrum(spectral_axis=spectrum.spectral_axis, flux=spectrum.flux, meta=dict(spectrum.meta))


def _kurucz_with_noise(kurucz_sun, snr_in, seed=13):
    w, f, _ = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    w, f = w[keep], f[keep]
    sigma = np.median(f) / snr_in     # median flux / sigma = the injected S/N
    noisy = f + np.random.default_rng(seed).normal(0.0, sigma, f.size)
    info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0)  # the model's R (conftest)
    return Spectrum(spectral_axis=w * u.AA, flux=noisy * u.dimensionless_unscaled, meta={"specan": info})


@pytest.mark.parametrize("snr_in", [10, 30, 100, 300])
def test_snr_without_errors_on_kurucz_sun(kurucz_sun, snr_in):
    # the median over five noise realisations (one realisation scatters +-8% at S/N 300).
    # Measured over seeds 10-19: 9-11, 28-32, 91-114, 222-282 (median 250 at 300: the
    # noiseless model itself holds white-like structure near Nyquist, equal to noise of
    # S/N ~520, so the combined noise is S/N ~260)
    got = []
    for seed in range(10, 15):
        s = snr(_kurucz_with_noise(kurucz_sun, snr_in, seed))
        assert s["snr_source"] == "flux" and s["snr_err_array"] is None
        got.append(s["snr"])
    assert np.median(got) == pytest.approx(snr_in, rel=0.20)


@pytest.mark.parametrize("sptype", ["A2", "K2"])
@pytest.mark.parametrize("resolving_power", [1000, 2000, 5000, 20000])
def test_snr_without_errors_on_synthetic_stars(sptype, resolving_power):
    from specan import synth

    for snr_in in (10, 30, 100, 300):
        spec = synth.spectrum(sptype, "V", resolving_power=resolving_power, snr=snr_in, seed=snr_in,
                              wave_range=(3800, 6800) * u.AA, continuum="blackbody")
        with_errors = snr(spec)
        s = snr(_without_errors(spec))
        assert s["snr_source"] == "flux"
        assert s["snr"] == pytest.approx(snr_in, rel=0.20), (snr_in, s)
        # the same quantity the error array gives (median flux / sigma)
        assert with_errors["snr_source"] == "error array"
        assert s["snr"] == pytest.approx(with_errors["snr_err_array"], rel=0.20)


def test_snr_reports_the_error_array_and_keeps_the_flux_estimate():
    # An error array that says S/N 30 on a flat spectrum whose real noise is S/N 30: both agree;
    # the error array is the one reported
    w = np.arange(4000.0, 7000.0, 1.0)
    flux = 1.0 + np.random.default_rng(5).normal(0.0, 1.0 / 30, w.size)
    s = snr(_spectrum(w, flux, err=np.full(w.size, 1.0 / 30)))
    assert s["snr_source"] == "error array" and s["snr"] == s["snr_err_array"]
    assert s["snr_err_array"] == pytest.approx(30.0, rel=0.02)
    assert s["snr_flux"] == pytest.approx(30.0, rel=0.10)
    out = specan.get_info(prepare(_spectrum(w, flux, err=np.full(w.size, 1.0 / 30), medium="air")))
    assert out.snr_source == "error array" and out.snr_flux == pytest.approx(30.0, rel=0.10)


def test_resampled_noise_falls_back_to_dersnr():
    # Noise averaged pairwise (linear interpolation half-way between pixels) has no white
    # plateau near Nyquist (power cos^2(pi f)); the estimate must say so rather than read the
    # suppressed high-frequency power as a high S/N (it read 624 for a true per-pixel 141).
    from specan.noise import flux_noise

    x = np.arange(20000.0)
    y = 1.0 + np.random.default_rng(0).normal(0.0, 0.01, x.size)
    est = flux_noise(np.interp(x[:-1] + 0.5, x, y))
    assert "DER_SNR" in est.method
    assert est.snr == pytest.approx(100.0 * np.sqrt(2.0), rel=0.15)   # per-pixel: 0.01 / sqrt(2)


# ---------------------------------------------------------------------------
# The light path of the package's own resampled copies (parameters, library comparison)
# ---------------------------------------------------------------------------
def _checked_light_path(monkeypatch):
    """Make every normalise_arrays call also run prepare() on a Spectrum of the same arrays and compare.

    Returns the list of the calls' pixel counts (so a test can see the callers went through it).
    """
    import specan.prepare as prep

    light = prep.normalise_arrays
    calls = []

    def checked(wave, flux, mask=None, telluric=True, medium="air"):
        out, bad = light(wave, flux, mask, telluric, medium)
        carrier = Spectrum(flux=np.asarray(flux) * u.dimensionless_unscaled, spectral_axis=np.asarray(wave) * u.AA,
                           mask=mask, meta={"specan": ObsInfo(medium=medium, medium_assumed=False)})
        full = prep.prepare(carrier, telluric=telluric)
        # bit for bit: the shipped parameter model and library set were made through prepare()
        assert np.array_equal(out, full.flux.value, equal_nan=True)
        assert np.array_equal(bad, full.mask)
        calls.append(out.size)
        return out, bad

    monkeypatch.setattr(prep, "normalise_arrays", checked)
    return calls


def _classify_inputs(spectrum, **kw):
    from specan import parameters
    from specan.classify import neighbours

    parameters.on_model_grid(spectrum, rv=0 * u.km / u.s, **kw)
    neighbours.on_grid(spectrum, rv=0 * u.km / u.s, **kw)


def test_light_normalisation_is_prepare_to_the_bit_on_the_kurucz_sun(kurucz_sun, monkeypatch):
    w, f, _ = kurucz_sun
    calls = _checked_light_path(monkeypatch)
    for r in (2000.0, 800.0):
        info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=r)
        _classify_inputs(Spectrum(flux=f * u.dimensionless_unscaled, spectral_axis=w * u.AA, meta={"specan": info}))
    assert len(calls) == 4


@pytest.mark.reference
def test_light_normalisation_is_prepare_to_the_bit_on_library_stars(miles, jhc1984, jhc_catalog, monkeypatch):
    from astropy.table import Table

    calls = _checked_light_path(monkeypatch)
    for row in Table.read(miles / "catalog.csv", format="ascii.csv")[::60]:
        _classify_inputs(specan.read(miles / str(row["file"]), medium="air"))
    for row in jhc_catalog[::30]:
        _classify_inputs(specan.read(jhc1984 / str(row["file"])), fwhm_in=13.0)   # JHC copies' FWHM, measured
    assert len(calls) >= 10


def test_continuum_normal_equations_are_the_sparse_product_to_the_bit(kurucz_sun):
    # The continuum spline sums its normal equations into their bands directly; they must be what
    # scipy.sparse's B^T diag(w) B + penalty gives, bit for bit, so that prepare()'s output (and
    # the shipped data made through it) does not move. Anchors: the Kurucz Sun's (rms-solar)
    # window maxima at several window widths, and random ones.
    from scipy import sparse
    from scipy.interpolate import BSpline
    from scipy.linalg import solveh_banded

    from specan.prepare import _PSpline, _window_maxima

    w_sun, f_sun, _ = kurucz_sun
    rng = np.random.default_rng(12)
    cases = [_window_maxima(w_sun, f_sun, k) for k in (3, 7, 20)]
    cases += [(np.sort(rng.uniform(3600.0, 9000.0, n)), rng.normal(1.0, 0.1, n)) for n in (40, 300, 900)]
    for x, y in cases:
        lam = (300.0 / (2 * np.pi)) ** 4
        spline = _PSpline(x, lam=lam, knot_spacing=30.0)
        assert spline.pairs is not None   # the fast path is the one tested
        ncoef = spline.basis.shape[1]
        h = (float(x[-1]) - float(x[0])) / (ncoef - 3)    # the knot spacing, as the class computes it
        d2 = sparse.diags([np.ones(ncoef - 2), -2.0 * np.ones(ncoef - 2), np.ones(ncoef - 2)], [0, 1, 2],
                          shape=(ncoef - 2, ncoef))
        penalty = ((lam / h**3) * (d2.T @ d2)).tocsr()
        for w in (np.ones(x.size), np.where(rng.random(x.size) < 0.4, 0.005, 1.0)):
            normal = (spline.basis.T @ spline.basis.multiply(w[:, None])).tocsr() + penalty
            bands = np.zeros((4, normal.shape[0]))
            for k in range(4):
                bands[3 - k, k:] = normal.diagonal(k)
            assert np.array_equal(spline._normal_bands(w), bands)
            coef = solveh_banded(bands, spline.basis.T @ (w * y))
            sparse_way = BSpline(spline.knots, coef, 3)(np.clip(x, spline.lo, spline.hi))
            assert np.array_equal(spline.fit(y, w)(x), sparse_way)
            # the reweighting's own path: LAPACK's banded solve called directly, and the curve at the
            # anchors as the basis matrix's product, the same numbers as solveh_banded and the spline
            assert np.array_equal(spline.coefficients(y, w), coef)
            assert np.array_equal(spline.basis @ coef, sparse_way)


def test_continuum_pairs_made_once_per_anchor_count_are_the_general_ones(kurucz_sun):
    # design_matrix gives every anchor four consecutive columns, so the spline's pairs of stored
    # entries are made once per anchor count: the same (a, b, band position), in the same order, as
    # the construction from the basis's own indices (anchors: the Kurucz Sun's window maxima, rms-solar)
    from specan.prepare import _PSpline, _window_maxima

    w_sun, f_sun, _ = kurucz_sun
    for k in (3, 7, 20):
        x, _ = _window_maxima(w_sun, f_sun, k)
        spline = _PSpline(x, lam=(300.0 / (2 * np.pi)) ** 4, knot_spacing=30.0)
        B, ncoef, r = spline.basis, spline.basis.shape[1], 4
        a = (B.indptr[:-1, None, None] + np.arange(r)[None, :, None]).repeat(r, axis=2).reshape(-1, r * r)
        b = (B.indptr[:-1, None, None] + np.arange(r)[None, None, :]).repeat(r, axis=1).reshape(-1, r * r)
        offset = B.indices[b] - B.indices[a]
        keep = (offset >= 0) & (offset <= 3)
        general = (a[keep], b[keep], (3 - offset[keep]) * ncoef + B.indices[b[keep]])
        assert all(np.array_equal(p, q) for p, q in zip(spline.pairs, general))


def test_row_nanmedian_is_numpys():
    from specan.prepare import _row_nanmedian

    rng = np.random.default_rng(12)
    for k in (1, 2, 5, 7, 12):
        a = rng.lognormal(size=(400, k))
        a[rng.random(a.shape) < 0.5] = np.nan
        a = a[~np.all(np.isnan(a), axis=1)]
        assert np.array_equal(_row_nanmedian(a), np.nanmedian(a, axis=1))


@pytest.mark.parametrize("with_errors", [False, True])
def test_prepare_is_masking_then_normalize_to_the_bit(kurucz_sun, with_errors):
    # prepare() divides by the continuum on the arrays and builds one Spectrum; the result must be
    # what masking, then normalize() of the masked Spectrum, gives (the Kurucz Sun of rms-solar,
    # with a few bad pixels and, once, an error array), bit for bit
    from specan.obsinfo import get_info, replace_parts
    from specan.prepare import _bad_pixels, normalize, telluric_mask

    w, f, _ = kurucz_sun
    keep = (w > 3500) & (w < 9000)
    w, f = w[keep], f[keep].copy()
    f[[40, 41, 900]] = [np.nan, -1.0, np.inf]
    err = 0.01 * np.abs(np.nan_to_num(f, posinf=1.0)) + 1e-3 if with_errors else None
    spec = _spectrum(w, f, err)
    out = prepare(spec)
    mask = _bad_pixels(f, err, False) | telluric_mask(w, "vacuum")
    masked = replace_parts(spec, mask=mask, meta=dict(spec.meta, specan=get_info(out).copy()))
    get_info(masked).normalized = False
    slow = normalize(masked)
    assert np.array_equal(out.flux.value, slow.flux.value, equal_nan=True)
    assert np.array_equal(out.mask, slow.mask)
    assert np.array_equal(out.meta["continuum"].value, slow.meta["continuum"].value, equal_nan=True)
    assert out.meta["continuum"].unit == slow.meta["continuum"].unit
    if with_errors:
        assert np.array_equal(out.uncertainty.array, slow.uncertainty.array)
    else:
        assert out.uncertainty is None and slow.uncertainty is None
    assert get_info(out).normalized and get_info(out).snr == get_info(slow).snr


def _noise_without_errors_two_calls(flux, half_width=100):
    """The continuum's noise estimate as first written (one running median per difference): the reference."""
    from scipy.ndimage import median_filter

    y = np.asarray(flux, float)
    if y.size < 4 * half_width:
        return np.zeros(y.size)
    d6 = np.pad(np.abs(np.diff(y, 6)) / np.sqrt(924.0), 3, mode="edge")
    d2 = np.pad(np.abs(2.0 * y[2:-2] - y[:-4] - y[4:]) / np.sqrt(6.0), 2, mode="edge")
    size = 2 * half_width + 1
    s6 = 1.4826 * median_filter(d6, size, mode="nearest")
    s2 = 1.4826 * median_filter(d2, size, mode="nearest")
    with np.errstate(divide="ignore", invalid="ignore"):
        weight = np.clip((s6 / s2 - 0.3) / 0.3, 0.0, 1.0)
    return np.where(np.isfinite(weight), weight * s6, 0.0)


def test_continuum_noise_from_one_running_median_call_is_two_calls(kurucz_sun):
    # both differences' running medians come from one call on the two laid end to end: the same values.
    # Inputs: the Kurucz Sun (rms-solar) with and without noise, and invented flat and wavy noisy arrays
    # (some rounded, so that medians meet ties)
    from specan.prepare import _noise_without_errors

    w, f, _ = kurucz_sun
    rng = np.random.default_rng(8)
    cases = [f, f + rng.normal(0.0, 1.0, f.size) * f / 50.0, f[:450]]
    for trial in range(200):
        n = int(rng.integers(400, 6000))
        y = 1 + rng.normal(0, rng.uniform(0, 0.1), n) + rng.uniform(0, 0.5) * np.sin(np.arange(n) / rng.uniform(2, 50))
        cases.append(np.round(y, 2) if trial % 3 == 0 else y)
    for y in cases:
        assert np.array_equal(_noise_without_errors(y), _noise_without_errors_two_calls(y))


def test_continuum_spline_basis_is_scipys_design_matrix():
    # _PSpline asks for the design matrix with extrapolate=True (scipy then skips its check of the
    # anchors against the knots): the same matrix wherever the default does not refuse the anchors
    from scipy.interpolate import BSpline

    from specan.prepare import _PSpline

    rng = np.random.default_rng(9)
    compared = 0
    for _ in range(1000):
        n = int(rng.integers(8, 800))
        lo, span = rng.uniform(1000, 9000), rng.uniform(50, 8000)
        x = np.sort(np.concatenate([[lo, lo + span], rng.uniform(lo, lo + span, n - 2)]))
        spline = _PSpline(x, lam=1e6, knot_spacing=float(rng.choice([30.0, 13.0, rng.uniform(5, 100)])))
        try:
            ref = BSpline.design_matrix(np.clip(x, spline.lo, spline.hi), spline.knots, 3)
        except ValueError:   # the last anchor an ulp past the last knot: the default refuses it
            continue
        got = spline.basis
        assert np.array_equal(got.data, ref.data) and np.array_equal(got.indices, ref.indices)
        assert np.array_equal(got.indptr, ref.indptr) and got.shape == ref.shape
        compared += 1
    assert compared > 900


# ----------------------------------------------------------------------------- the user's path: prepare
# The S/N a user sees comes from prepare(), which masks the telluric bands. Masked out of the noise
# estimate, they left the Kurucz Sun over 3700-8800 A mostly its blue, line-rich pixels, whose lines
# tipped the white-noise test: S/N 39 (DER_SNR) for an injected 300 and for the noiseless model
# (measured before the telluric pixels entered the test, specan.noise.flux_noise's noise_only).


def test_snr_through_prepare_on_kurucz_sun_with_telluric_bands(kurucz_sun):
    # measured (seeds 10-12): 246-271 for 300, method the plateau's
    got = []
    for seed in (10, 11, 12):
        info = specan.get_info(prepare(_kurucz_with_noise(kurucz_sun, 300, seed)))
        assert info.snr_source == "flux" and "DER_SNR" not in info.snr_flux_method
        got.append(info.snr)
    assert np.median(got) == pytest.approx(300, rel=0.20)


def test_noiseless_kurucz_sun_through_prepare_reads_no_low_snr(kurucz_sun):
    # No noise to find: the S/N is None or at least the floor the model's own structure near
    # Nyquist sets (S/N ~420 measured, over 3700-8800 A); 300 is the bound chosen here. DER_SNR
    # read 39, counting the lines as noise.
    w, f, _ = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0)
    spec = Spectrum(spectral_axis=w[keep] * u.AA, flux=f[keep] * u.dimensionless_unscaled, meta={"specan": info})
    out = specan.get_info(prepare(spec))
    assert out.snr is None or out.snr >= 300, (out.snr, out.snr_flux_method)


@pytest.mark.parametrize("snr_in", [300, 1000])
def test_lines_noise_through_prepare_on_kurucz_sun(kurucz_sun, snr_in):
    # The lines stage's noise (resolution.normalised_arrays on the prepared spectrum) without an
    # error array: the plateau as prepare found it, not DER_SNR's lines-as-noise (S/N 34 measured
    # before, which widened H8's window to 3866-3913 A and read 15.7 A). Measured: 272 at 300,
    # 456 at 1000 (the model's own structure near Nyquist reads as S/N ~450).
    from specan.resolution import normalised_arrays

    arrays = normalised_arrays(prepare(_kurucz_with_noise(kurucz_sun, snr_in, 10)))
    assert "DER_SNR" not in arrays.noise_source
    level = np.median(1.0 / arrays.sigma[arrays.good])
    assert level == pytest.approx(snr_in, rel=0.20) if snr_in == 300 else level > 300


def test_balmer_lines_through_prepare_without_errors_are_those_with(kurucz_sun):
    # H beta and H8 of the Kurucz Sun at S/N 300 without an error array against the same with the
    # true error array. Measured before: H beta 1.75 A, H8 15.7 A without (4.24 and 2.44 with);
    # now 5.18 and 2.58 (H beta's metal blends are modelled differently under block-constant noise
    # weights than under the per-pixel error array; that is the lines stage's, not the noise's).
    from astropy.nddata import StdDevUncertainty

    from specan import lines

    w, f, _ = kurucz_sun
    keep = (w > 3700) & (w < 8800)
    w, f = w[keep], f[keep]
    noisy = f + np.random.default_rng(0).normal(0.0, 1.0, f.size) * f / 300
    ew = {}
    for err in (None, f / 300):
        info = ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=2000.0)
        spec = Spectrum(spectral_axis=w * u.AA, flux=noisy * u.dimensionless_unscaled, meta={"specan": info},
                        uncertainty=None if err is None else StdDevUncertainty(err))
        t = lines.measure(prepare(spec), rv=0 * u.km / u.s)
        ew[err is None] = {r["id"]: r["ew"].to_value(u.AA) for r in t if r["id"] in ("H_beta", "H_8")}
    assert ew[True]["H_8"] == pytest.approx(ew[False]["H_8"], rel=0.10)
    assert ew[True]["H_beta"] == pytest.approx(ew[False]["H_beta"], rel=0.25)
