"""Atmospheric parameters (specan/parameters.py): Teff, log g and [Fe/H] from the spectrum.

Outside references:
- the MILES library's stars and their published parameters (Cenarro et al. 2007; Prugniel et
  al. 2011), ``miles`` fixture: the model's cross-validation (scripts/fit_parameter_model.py,
  benchmarks/cv_classify.py) and the held-out checks below;
- Kurucz's model solar flux from ``rms-solar`` (``kurucz_sun`` fixture): the Sun's Teff 5772 K and
  log g 4.438 (IAU 2015 Resolution B3), [Fe/H] = 0 by definition.
"""

from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest
from specutils import Spectrum

from specan import parameters
from specan.obsinfo import META_KEY, ObsInfo

SUN = {"teff": 5772.0, "logg": 4.438, "feh": 0.0}   # IAU 2015 Resolution B3; [Fe/H] = 0 by definition


def _sun(kurucz_sun, r=2000.0, rv=0.0):
    w, f, _ = kurucz_sun
    w = w * np.sqrt((1 + rv / 299792.458) / (1 - rv / 299792.458))
    return Spectrum(flux=f * u.dimensionless_unscaled, spectral_axis=w * u.AA,
                    meta={META_KEY: ObsInfo(medium="vacuum", medium_assumed=False, resolving_power=r, snr=500.0)})


def test_model_file_loads_with_provenance():
    model = parameters.default_model()
    assert model.coef.shape[1] == 10 and model.coef.shape[2] == parameters.model_wavelengths().size
    assert np.all(np.diff(model.nodes) > 0) and 3000 < 10 ** model.nodes[0] < 10 ** model.nodes[-1] < 30000
    assert "MILES" in model.source and "Ness et al. 2015" in model.source
    assert np.all(model.cv_sd[:, 0] > 0) and np.all(model.cv_sd[:, 1] > 0)   # systematic errors stored


def test_labels_of_a_model_spectrum_come_back_with_honest_errors():
    # The fit inverts the model: noiseless model spectra give their labels back; with noise
    # (sigma = the model's own scatter, so the errors should describe it) the pulls are ~N(0, 1).
    model = parameters.default_model()
    rng = np.random.default_rng(3)
    pulls = []
    for teff, logg, feh in ((5000.0, 2.6, -0.2), (5800.0, 4.4, 0.0), (6400.0, 4.1, -0.6), (4500.0, 4.6, 0.1)):
        x = parameters.scale_labels([(teff, logg, feh)])[0]
        k = model.nearest(x)
        clean = model.predict(k, x)
        good = np.ones(clean.size, bool)
        back = parameters.fit_labels(model, clean, good)["labels"]
        assert abs(back[0] / teff - 1) < 0.005 and abs(back[1] - logg) < 0.02 and abs(back[2] - feh) < 0.02
        for _ in range(6):
            noisy = clean + rng.normal(size=clean.size) * model.scatter[k]
            r = parameters.fit_labels(model, noisy, good)
            pulls.append((r["labels"] - np.array([teff, logg, feh])) / r["errors"])
    sd = np.std(pulls, axis=0, ddof=1)
    assert np.all((sd > 0.6) & (sd < 1.5)), sd


def test_batched_first_guess_is_the_grid_point_of_least_chi_square(kurucz_sun):
    # The first guess solves every grid point's polynomial at once (normal equations); it must pick
    # the point the one-at-a-time least-squares residuals pick. Kurucz solar flux (rms-solar) as the
    # input, with a third of its pixels unusable.
    flux, good, _ = parameters.on_model_grid(_sun(kurucz_sun))
    _first_guess_is_the_loops(flux, good & (np.arange(good.size) % 3 != 0))
    _first_guess_is_the_loops(flux, good)   # all pixels usable: the model's coefficients are not copied
    # the grid's ends beyond a spectrum's coverage (unusable pixels taken off the kept sums), and a
    # spectrum covering a third of the grid (its usable pixels summed afresh)
    wave = parameters.model_wavelengths()
    _first_guess_is_the_loops(flux, good & (wave > 3760.0) & (wave < 7200.0))
    _first_guess_is_the_loops(flux, good & (wave > 4200.0) & (wave < 5400.0))


def _first_guess_is_the_loops(flux, good):
    model = parameters.default_model()
    basis = parameters._poly_basis(flux.size)
    sigma = np.nanmedian(model.scatter, axis=0)
    best = None
    for k, node in enumerate(model.nodes):
        t = (node - parameters.SCALE_CENTRE[0]) / parameters.SCALE_WIDTH[0]
        for g in parameters._GUESS_G:
            for f in parameters._GUESS_F:
                x = np.array([t, g, f])
                c2 = float(np.sum(parameters._residuals(model, k, x, flux, good, sigma, basis) ** 2))
                if best is None or c2 < best[0]:
                    best = (c2, x)
    np.testing.assert_array_equal(parameters._first_guess(model, flux, good, sigma, basis), best[1])


@pytest.mark.reference
def test_batched_first_guess_on_miles_stars(miles):
    from astropy.table import Table

    import specan

    for row in Table.read(miles / "catalog.csv", format="ascii.csv")[::90]:
        flux, good, _ = parameters.on_model_grid(specan.read(miles / str(row["file"]), medium="air"))
        _first_guess_is_the_loops(flux, good)


def test_projected_jacobian_is_the_derivative_of_the_residuals(kurucz_sun):
    # The LM's analytic Jacobian (variable projection) against central differences of the
    # residuals the polynomial is solved for by least squares; Kurucz solar flux (rms-solar).
    from scipy.optimize._numdiff import approx_derivative

    model = parameters.default_model()
    flux, good, _ = parameters.on_model_grid(_sun(kurucz_sun))
    good = good & (np.arange(good.size) % 7 != 0)
    basis = parameters._poly_basis(flux.size)
    for x in (np.array([0.3, 0.5, -0.2]), np.array([-0.5, -1.0, 0.4]), np.array([1.2, -0.3, 0.9])):
        k = model.nearest(x)
        plain = lambda p, k=k: parameters._residuals(model, k, p, flux, good, model.scatter[k], basis)
        fit = parameters._ProjectedResiduals(model, k, flux, good, model.scatter[k], basis)
        np.testing.assert_allclose(fit.residuals(x), plain(x), rtol=0, atol=1e-10 * np.abs(plain(x)).max())
        numerical = approx_derivative(plain, x, method="3-point")
        assert np.abs(fit.jacobian(x) - numerical).max() < 1e-6 * np.abs(numerical).max()


def _fit_with_numerical_jacobian(model, flux, good):
    """fit_labels as it was before the analytic Jacobian: LM on lstsq residuals, 2-point differences."""
    import math

    from scipy.optimize import least_squares

    y = np.asarray(flux, float)
    good = np.asarray(good, bool) & np.isfinite(y)
    basis = parameters._poly_basis(y.size)
    x = parameters._first_guess(model, y, good, np.nanmedian(model.scatter, axis=0), basis)
    k = model.nearest(x)
    for _ in range(3):
        sig = model.scatter[k]
        sol = least_squares(lambda p, k=k, sig=sig: parameters._residuals(model, k, p, y, good, sig, basis), x,
                            method="lm")
        x = sol.x
        if model.nearest(x) == k:
            break
        k = model.nearest(x)
    dof = max(int(good.sum()) - 3 - (parameters.POLY_DEGREE + 1), 1)
    chi2 = 2.0 * sol.cost / dof
    err = np.sqrt(np.diag(np.linalg.pinv(sol.jac.T @ sol.jac)) * max(chi2, 1.0)) * parameters.SCALE_WIDTH
    labels = parameters._unscale(x)
    return labels, np.array([labels[0] * math.log(10.0) * err[0], err[1], err[2]]), k


def _same_fit_as_with_numerical_jacobian(model, flux, good):
    # tolerance (our choice): labels within 1e-4 of their errors, errors within 1e-4 of themselves;
    # measured on the Kurucz Sun, 62 MILES and 24 JHC stars: at most 1.0e-5 and 3.7e-7
    r = parameters.fit_labels(model, flux, good)
    labels, errors, node = _fit_with_numerical_jacobian(model, flux, good)
    assert r["node"] == node
    assert np.all(np.abs(r["labels"] - labels) <= 1e-4 * errors), (r["labels"], labels, errors)
    np.testing.assert_allclose(r["errors"], errors, rtol=1e-4)


def test_fit_is_the_one_a_numerical_jacobian_gives_on_the_kurucz_sun(kurucz_sun):
    model = parameters.default_model()
    for r in (2000.0, 800.0):
        flux, good, _ = parameters.on_model_grid(_sun(kurucz_sun, r=r))
        _same_fit_as_with_numerical_jacobian(model, flux, good)


@pytest.mark.reference
def test_fit_is_the_one_a_numerical_jacobian_gives_on_miles_stars(miles):
    from astropy.table import Table

    import specan

    model = parameters.default_model()
    for row in Table.read(miles / "catalog.csv", format="ascii.csv")[::25]:
        flux, good, _ = parameters.on_model_grid(specan.read(miles / str(row["file"]), medium="air"))
        _same_fit_as_with_numerical_jacobian(model, flux, good)


def test_velocity_is_removed_before_the_fit(kurucz_sun):
    at_rest = parameters.measure(_sun(kurucz_sun), rv=0 * u.km / u.s)
    moving = parameters.measure(_sun(kurucz_sun, rv=700.0), rv=700 * u.km / u.s)
    assert abs(moving["teff"] - at_rest["teff"]).to_value(u.K) < 30
    assert abs(moving["logg"].value - at_rest["logg"].value) < 0.05


def test_kurucz_sun_logg_and_metallicity_within_their_errors(kurucz_sun):
    # The model never saw the Kurucz spectrum (it learnt from observed MILES stars).
    res = parameters.measure(_sun(kurucz_sun), rv=0 * u.km / u.s)
    assert abs(res["logg"].value - SUN["logg"]) <= 2 * res["logg_err"].value
    assert abs(res["feh"].value - SUN["feh"]) <= 2 * res["feh_err"].value
    assert abs(res["teff"].to_value(u.K) - SUN["teff"]) <= 2.5 * res["teff_err"].to_value(u.K)


@pytest.mark.xfail(strict=True, reason="measured on the Kurucz solar model at R = 2000: Teff 5370 +- 200 K, log g "
                   "4.15 +- 0.31, [Fe/H] -0.34 +- 0.21 (targets: within 150 K, 0.3 dex, 0.2 dex); restricted to "
                   "4500-7350 A or 3700-5000 A the Teff stays 5360-5430 K, and the MK criteria read it G5.5 "
                   "(5577 K): observed MILES G2 V stars come back at 5640-5840 K in cross-validation, so the "
                   "model spectrum looks ~400 K cooler than the observed stars the model learnt from")
def test_kurucz_sun_parameters_within_the_targets(kurucz_sun):
    res = parameters.measure(_sun(kurucz_sun), rv=0 * u.km / u.s)
    assert abs(res["teff"].to_value(u.K) - SUN["teff"]) <= 150
    assert abs(res["logg"].value - SUN["logg"]) <= 0.3
    assert abs(res["feh"].value - SUN["feh"]) <= 0.2


@pytest.mark.reference
def test_held_out_miles_stars(miles):
    # Stars the shipped model trained on cannot judge it; the model refitted without a tenth of the
    # library (every tenth F-K star with training-quality labels) must give those back within
    # 3 sigma of their published values for most of them.
    import importlib.util
    from pathlib import Path

    from astropy.table import Table

    root = Path(__file__).resolve().parents[1]
    spec = importlib.util.spec_from_file_location("fpm", root / "scripts" / "fit_parameter_model.py")
    fpm = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(fpm)
    catalog = Table.read(miles / "catalog.csv", format="ascii.csv")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        flux, labels, trainable = fpm.library_fluxes(miles, catalog)
    fk = trainable & (labels[:, 0] >= 4000) & (labels[:, 0] <= 7000)
    held = np.zeros(len(labels), bool)
    held[np.flatnonzero(fk)[::10]] = True
    model = parameters.ParameterModel.fit(flux[trainable & ~held], labels[trainable & ~held],
                                          np.log10(np.array(fpm.NODES_K, float)))
    model.cv_sd = parameters.default_model().cv_sd
    pulls = []
    for i in np.flatnonzero(held):
        r = parameters.fit_labels(model, np.nan_to_num(flux[i], nan=1.0), np.isfinite(flux[i]))
        k = r["node"]
        err = np.hypot(r["errors"], [r["labels"][0] * model.cv_sd[k, 0], model.cv_sd[k, 1], model.cv_sd[k, 2]])
        pulls.append((r["labels"] - labels[i]) / err)
    pulls = np.array(pulls)
    assert len(pulls) >= 40
    assert np.mean(np.all(np.abs(pulls) < 3, axis=1)) >= 0.85, np.round(pulls, 1)
    assert np.all(np.median(np.abs(pulls), axis=0) < 1.0)   # 0.67 for a unit Gaussian


def test_kept_sums_are_the_same_bits_whatever_thread_count_built_them():
    # The first guess's and the library comparison's sums over all pixels (and the reduced fit's span
    # of each node's model) are kept from one
    # spectrum to the next. A matrix product through BLAS sums in another order with another
    # number of threads (last-bit differences, measured: 3.7e-9 in the first guess's entries),
    # so sums kept from a call made outside the night run's one-thread workers once made a
    # --jobs 1 catalogue differ from a --jobs 2 one in the 14th digit. They are made with one
    # thread, whoever makes them.
    from threadpoolctl import threadpool_limits

    from specan.classify import neighbours

    model = parameters.default_model()
    basis = parameters._poly_basis(parameters.model_wavelengths().size)
    w2 = np.full(basis.shape[0], 2.0)
    good = np.ones(basis.shape[0], bool)
    good[:40] = False
    ref = neighbours.default_reference()
    usable = np.ones(ref.flux.shape[1], bool)
    usable[-25:] = False
    results = []
    for threads in (2, 1):
        parameters._GUESS_SUMS.clear()
        model.__dict__.pop("_guess_products", None)
        model.__dict__.pop("_node_spans", None)
        neighbours._ALL_PIXELS.clear()
        with threadpool_limits(limits=threads):
            results.append((parameters._guess_normal_matrices(model, w2, good, basis),
                            neighbours._pixel_terms(usable, ref), parameters._node_span(model, 5, basis)))
    (g2, (m2, n2), (q2, r2)), (g1, (m1, n1), (q1, r1)) = results
    assert np.array_equal(g2, g1)
    assert np.array_equal(q2, q1) and np.array_equal(r2, r1)   # the reduced fit's span (_node_span)
    assert np.array_equal(m2, m1) and np.array_equal(n2, n1)


def _telluric_like_masks(n):
    """Pixel masks as a night's spectra bring them: bands out (the telluric bands' share of the model's
    pixels: 170 of 2029 on the benchmark night), moved by a pixel or two, ends cut, most pixels out."""
    cols = np.arange(n)
    bands = (np.abs(cols - 0.706 * n) < 0.02 * n) | (np.abs(cols - 0.93 * n) < 0.02 * n) | (cols > n - 4)
    return [~bands, ~np.roll(bands, 1), ~np.roll(bands, -2) & (cols > 30), cols < 0.4 * n]


def test_matrices_kept_per_pixel_mask_are_the_ones_made_afresh_whatever_thread_count():
    # The first guess's normal matrices, each node's Cholesky factor and the library comparison's normal
    # matrices are kept per pixel mask (a night's spectra share a few). Whatever the order the masks come
    # in, and whether the kept ones were made with two threads or one, each is what is made afresh with
    # one thread for that mask, to the bit (a wrong hit, a mask's matrices for another's, fails here).
    from threadpoolctl import threadpool_limits

    from specan.classify import neighbours

    model = parameters.default_model()
    basis = parameters._poly_basis(parameters.model_wavelengths().size)
    w2 = 1.0 / model.typical_scatter ** 2
    ref = neighbours.default_reference()
    masks = _telluric_like_masks(basis.shape[0])
    usables = _telluric_like_masks(ref.flux.shape[1])

    def made(good, usable, k):
        return (parameters._guess_normal_matrices(model, w2, good, basis), parameters._span_factor(model, k, basis, good),
                neighbours._pixel_terms(usable, ref))

    def forget():
        for name in ("_guess_on_masks", "_span_factors"):
            model.__dict__.pop(name, None)
        neighbours._ALL_PIXELS.clear()

    fresh = []
    for good, usable in zip(masks, usables):
        forget()
        with threadpool_limits(limits=1):
            fresh.append(made(good, usable, 5))
    forget()
    for threads in (2, 1):
        with threadpool_limits(limits=threads):
            for i in (0, 1, 2, 3, 1, 0, 3, 2):
                G, L, (M, n) = made(masks[i], usables[i], 5)
                assert np.array_equal(G, fresh[i][0]) and np.array_equal(L, fresh[i][1])
                assert np.array_equal(M, fresh[i][2][0]) and np.array_equal(n, fresh[i][2][1])
    assert len(model.__dict__["_guess_on_masks"]) == len(model.__dict__["_span_factors"]) == len(masks)


# ---------------------------------------------------------------------------
# The fit in the model's 41-dimensional span against the fit over every pixel
# ---------------------------------------------------------------------------
def _fit_over_every_pixel(model, flux, good, monkeypatch):
    """fit_labels with the residuals over every usable pixel (_ProjectedResiduals), as it was before the
    reduced residuals: the reference."""
    with monkeypatch.context() as m:
        m.setattr(parameters, "_residual_function",
                  lambda model, k, y, good, sigma, sig0, basis:
                  parameters._ProjectedResiduals(model, k, y, good, np.hypot(sig0, model.scatter[k]), basis))
        return parameters.fit_labels(model, flux, good)


def _same_fit_over_every_pixel(model, flux, good, monkeypatch, used):
    # tolerance (our choice): labels within 1e-6 of their errors, errors and chi-square within 1e-6 of
    # themselves; measured on the Kurucz Sun (whole and its first 150 pixels out), 11 MILES and 16 JHC
    # stars: labels at most 4.4e-13 of their errors apart, errors 7.8e-15, chi-square 1.1e-14 (relative)
    reduced = parameters.fit_labels(model, flux, good)
    full = _fit_over_every_pixel(model, flux, good, monkeypatch)
    assert reduced["node"] == full["node"]
    assert np.all(np.abs(reduced["labels"] - full["labels"]) <= 1e-6 * full["errors"]), (reduced, full)
    np.testing.assert_allclose(reduced["errors"], full["errors"], rtol=1e-6)
    assert reduced["chi2_reduced"] == pytest.approx(full["chi2_reduced"], rel=1e-6)
    kind = type(parameters._residual_function(model, reduced["node"], np.asarray(flux, float), good & np.isfinite(flux),
                                              None, None, parameters._poly_basis(len(flux))))
    used.append(kind is parameters._ReducedResiduals)


def test_reduced_fit_is_the_fit_over_every_pixel_on_the_kurucz_sun(kurucz_sun, monkeypatch):
    model = parameters.default_model()
    used = []
    for r, rv in ((2000.0, 0.0), (800.0, 0.0), (2000.0, 3000.0)):
        flux, good, _ = parameters.on_model_grid(_sun(kurucz_sun, r=r, rv=rv), rv=rv * u.km / u.s)
        _same_fit_over_every_pixel(model, flux, good, monkeypatch, used)
        # pixels out: the grid's ends beyond a shorter spectrum, a masked stretch, every seventh pixel
        for cut in (good & (np.arange(good.size) > 150), good & ((np.arange(good.size) // 40) % 9 != 4),
                    good & (np.arange(good.size) % 7 != 0), good & (np.arange(good.size) < 600)):
            _same_fit_over_every_pixel(model, flux, cut, monkeypatch, used)
    assert all(used[:3]) and sum(used) >= 10    # the reduced path did run, with and without pixels out


@pytest.mark.reference
def test_reduced_fit_is_the_fit_over_every_pixel_on_library_stars(miles, jhc1984, jhc_catalog, monkeypatch):
    from astropy.table import Table

    import specan

    model = parameters.default_model()
    used = []
    for row in Table.read(miles / "catalog.csv", format="ascii.csv")[::45]:
        flux, good, _ = parameters.on_model_grid(specan.read(miles / str(row["file"]), medium="air"))
        _same_fit_over_every_pixel(model, flux, good, monkeypatch, used)
    for row in jhc_catalog[::10]:
        flux, good, _ = parameters.on_model_grid(specan.read(jhc1984 / str(row["file"])), fwhm_in=13.0)
        _same_fit_over_every_pixel(model, flux, good, monkeypatch, used)
    assert len(used) >= 25 and sum(used) >= 20
