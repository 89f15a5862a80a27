"""Tests of specan.velocity against outside references.

Sources named beside each check:
- the star: Kurucz's model solar flux carried by ``rms-solar`` (``kurucz_sun`` fixture; vacuum
  wavelengths, R ~ 2000 sampled at 2 pixels per FWHM, uniform in ln lambda);
- the Cramer-Rao bound for a pure shift, computed here from the noiseless model and the noise
  (the same bound as Bouchy, Pepe & Queloz 2001, A&A 374, 733, in photon-noise form);
- barycentric corrections: astropy's ``SkyCoord.radial_velocity_correction`` called directly on
  the values written into the FITS headers, and the Earth's velocity from astropy's ephemeris;
- Doppler conversions: astropy's ``doppler_optical`` / ``doppler_relativistic`` equivalencies;
- Galactic rest frame: astropy's ``Galactocentric`` solar motion, projected by the textbook
  formula U cos b cos l + V cos b sin l + W sin b (common practice).
"""

from __future__ import annotations

import functools
import json

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.io import fits
from astropy.nddata import StdDevUncertainty
from astropy.time import Time
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline
from scipy.ndimage import gaussian_filter1d
from specutils import Spectrum

from specan import synth, velocity
from specan.obsinfo import META_KEY, ObsInfo, get_info

C_KMS = 299792.458  # exact (SI)
FWHM_TO_SIGMA = 1 / 2.354820045
KMS = u.km / u.s
R_KURUCZ = 2000.0  # resolving power of the rms-solar Kurucz file (its name: fsunallp.2000resam125)


# ---------------------------------------------------------------------------
# The Kurucz star: band-limited interpolation of the model, degraded to R, shifted
# ---------------------------------------------------------------------------
def make_kurucz_model(kurucz_sun):
    """Factory R -> (ln lambda_vac fine grid, normalised flux) of the Kurucz Sun at resolving power R."""
    w, f, c = kurucz_sun
    lnw = np.log(w)
    step = (lnw[-1] - lnw[0]) / (lnw.size - 1)
    y = f / c - 1.0
    up = 8
    # FFT zero-padding = band-limited (sinc) interpolation of the 2-pixel/FWHM table
    fine = sfft.irfft(sfft.rfft(y), y.size * up) * up
    grid = lnw[0] + step / up * np.arange(fine.size)

    @functools.lru_cache(maxsize=8)
    def model(r):
        yy = fine
        if r < R_KURUCZ:
            sig = np.sqrt(1 / r**2 - 1 / R_KURUCZ**2) * FWHM_TO_SIGMA / (step / up)
            yy = gaussian_filter1d(fine, sig, mode="nearest")
        keep = (grid > np.log(3300)) & (grid < np.log(9600))  # away from the FFT's periodic edges
        return grid[keep], 1.0 + yy[keep]

    return model


@pytest.fixture(scope="module")
def kurucz_model(kurucz_sun):
    """See :func:`make_kurucz_model`."""
    return make_kurucz_model(kurucz_sun)


def _pixels(r, lo=3850.0, hi=8650.0, ppf=2.5):
    """Linear wavelength pixels, ppf pixels per FWHM at the blue end (a grating spectrograph)."""
    step = lo / (r * ppf)
    return np.arange(lo, hi, step)


def _observe(model, r, rv_kms, snr=None, seed=0, pixels=None):
    """The Kurucz star at velocity rv (relativistic Doppler) on linear vacuum pixels, with noise."""
    lng, fl = model(r)
    pix = _pixels(r) if pixels is None else pixels
    spl = make_interp_spline(lng, fl, k=3)
    flux = spl(np.log(pix) - np.log(velocity.doppler_factor(rv_kms * KMS)))
    sigma = None
    if snr is not None:
        sigma = np.sqrt(np.clip(flux, 1e-3, None)) / snr  # photon noise, S/N = snr at the continuum
        flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sigma
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=float(r),
                   normalized=True)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                    uncertainty=None if sigma is None else StdDevUncertainty(sigma), meta={META_KEY: info})


def _rest_template(model, r):
    """The matched template: the noiseless Kurucz star at rest, finely sampled."""
    lng, fl = model(r)
    sel = slice(None, None, 2)
    info = ObsInfo(object="Kurucz Sun rest", medium="vacuum", medium_assumed=False, resolving_power=float(r),
                   normalized=True)
    return Spectrum(flux=fl[sel] * u.dimensionless_unscaled, spectral_axis=np.exp(lng[sel]) * u.AA,
                    meta={META_KEY: info})


def _crb(model, r, rv_kms, snr):
    """Cramer-Rao bound (km/s) of a pure shift: 1 / sqrt(sum (df/dv)^2 / sigma^2) on the pixels."""
    pix = _pixels(r)
    clean = _observe(model, r, rv_kms).flux.value
    dv = 0.5
    fp = _observe(model, r, rv_kms + dv).flux.value
    fm = _observe(model, r, rv_kms - dv).flux.value
    dfdv = (fp - fm) / (2 * dv)
    sigma = np.sqrt(clean) / snr
    assert pix.size == clean.size
    return 1.0 / np.sqrt(np.sum((dfdv / sigma) ** 2))


# ---------------------------------------------------------------------------
# Acceptance: injection-recovery with the Kurucz Sun
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_injection_recovery_kurucz(kurucz_model):
    """Bias < 1% of a resolution element; (measured - true)/error has std 0.8-1.25 (issue 4)."""
    rng = np.random.default_rng(2026)
    rows = []
    for r in (1000.0, 1500.0, 2000.0):
        tmpl = _rest_template(kurucz_model, r)
        for snr in (10, 30, 100, 200):
            for k, v in enumerate(np.linspace(-900, 900, 6) + rng.uniform(-20, 20, 6)):
                s = _observe(kurucz_model, r, v, snr=snr, seed=int(1000 * r + 10 * snr + k))
                res = velocity.measure(s, template=tmpl, barycentric=False, n_resample=20, errors="both")
                assert res["frame"] == "topocentric"
                rows.append((r, snr, v, res["rv"].to_value(KMS), res["rv_err_mc"].to_value(KMS),
                             res["rv_err_td"].to_value(KMS), res["rv_err"].to_value(KMS)))
    a = np.array(rows)
    err = a[:, 3] - a[:, 2]
    for r in (1000.0, 1500.0, 2000.0):
        sel = a[:, 0] == r
        resel = C_KMS / r  # one resolution element in km/s
        # weighted mean error (weights 1/sigma^2): the bias, known to +-1/sqrt(sum w)
        w = 1 / a[sel, 4] ** 2
        bias = np.sum(w * err[sel]) / np.sum(w)
        assert abs(bias) < 0.01 * resel, (r, bias)
        # and at high S/N each star on its own is within 1% of a resolution element
        hi = sel & (a[:, 1] >= 100)
        assert np.all(np.abs(err[hi]) < 0.01 * resel + 3 * a[hi, 4])
    # the reported error and both estimates behind it (72 stars: the std of a unit pull is known to ~8%)
    for col in (6, 4, 5):
        pull = err / a[:, col]
        assert 0.8 <= np.std(pull) <= 1.25, (col, np.std(pull))


def test_scatter_within_cramer_rao(kurucz_model):
    """Matched template, S/N >= 30: scatter <= 1.3 x the Cramer-Rao bound (issue 4)."""
    for r, snr in ((2000.0, 30), (1000.0, 100)):
        tmpl = _rest_template(kurucz_model, r)
        v = 317.0
        got = [velocity.measure(_observe(kurucz_model, r, v, snr=snr, seed=int(r) + snr + i), template=tmpl,
                                errors="td", barycentric=False)["rv"].to_value(KMS) for i in range(40)]
        scatter = np.std(got, ddof=1)
        bound = _crb(kurucz_model, r, v, snr)
        # an unbiased estimator cannot beat the bound; 40 trials know the scatter to ~11%
        assert 0.8 * bound < scatter < 1.3 * bound, (r, snr, scatter, bound)


def test_errors_from_the_flux_without_error_array():
    """No error array: the noise comes from the flux (specan.noise.flux_noise, as prepare's S/N); errors still calibrated."""
    pulls = []
    for i in range(24):
        v = -600.0 + 50.0 * i
        s = synth.spectrum("G8" if i % 2 else "K3", "V", resolving_power=2500, rv=v * KMS, snr=40, seed=70 + i)
        s.uncertainty = None
        res = velocity.measure(s, template=s.meta["synth"]["sptype"] + " V", n_resample=20)
        assert any("pixel errors: flux:" in n for n in res["notes"])
        pulls.append((res["rv"].to_value(KMS) - v) / res["rv_err"].to_value(KMS))
    assert 0.7 <= np.std(pulls) <= 1.35, np.std(pulls)


def test_builtin_templates_on_the_kurucz_sun(kurucz_model):
    """Automatic synthetic template (in vacuum, at R) on the Kurucz Sun: right family, small bias."""
    errs = []
    for v in (-640.0, 35.0, 820.0):
        res = velocity.measure(_observe(kurucz_model, 2000.0, v, snr=100, seed=abs(int(v)) + 7), barycentric=False,
                               template="synth")
        assert res["template"].split()[1][0] in "FGK", res["template"]  # the Sun is G2 V
        assert "composite" not in res["flags"]
        errs.append(res["rv"].to_value(KMS) - v)
    # template mismatch (a 220-line model against Kurucz's full line list): within 2% of a resolution element
    assert np.all(np.abs(errs) < 0.02 * C_KMS / 2000.0), errs


def _library_default_on_kurucz(kurucz_model, r=2000.0):
    errs, types = [], []
    for v in (-640.0, 35.0, 820.0):
        res = velocity.measure(_observe(kurucz_model, r, v, snr=100, seed=abs(int(v)) + 7), barycentric=False)
        assert res["template_kind"] == "library", res["template"]
        types.append(res["template_type"])
        errs.append(res["rv"].to_value(KMS) - v)
    return np.array(errs), types


def test_library_templates_by_default_on_the_kurucz_sun(kurucz_model):
    """No template given: an observed library template wins on a realistic spectrum, of the Sun's family.

    The Kurucz model is not one of the library's stars (MILES, observed). Before the library
    templates had laboratory zero points its velocity against the library G1 V group was 5.4
    km/s low at R = 2000 (measured); with them the default (G8 V) reads +0.8 to +1.3 km/s here
    (-0.3 to +1.4 at R 1000; benchmarks/bench_velocity.py --kurucz). The bound guards the
    family and a gross offset.
    """
    errs, types = _library_default_on_kurucz(kurucz_model)
    assert all(t.split()[0][0] == "G" for t in types), types  # the Sun is G2 V
    assert np.all(np.abs(errs) < 0.04 * C_KMS / 2000.0), errs


@pytest.mark.parametrize("r", [
    1000.0,
    2000.0,
    pytest.param(5000.0, marks=pytest.mark.xfail(strict=True, reason=(
        "measured: the library default reads +1.14 to +1.29 km/s on these spectra (S/N 100) on the Kurucz Sun "
        "declared R 5000 (1.9-2.2% of a resolution element; target 1%, 0.6 km/s), measured at the R ~2300 its "
        "correlation width shows (the model file is R 2000; +1.59 to +1.74 with filter and templates at the "
        "stated R 5000); at R 2000 itself the default reads +0.82 to +1.30, already above 0.6 km/s, so this "
        "target needs a bias below what the data's own resolution gives (-4.35 noiseless before the "
        "laboratory zero points)"))),
])
def test_library_default_bias_within_one_percent_of_a_resolution_element(kurucz_model, r):
    """Issue 11's bias target on the Kurucz Sun (an outside model, not used to set the templates' zero
    points, which come from laboratory wavelengths: ``specan.templates``), no template given."""
    errs, _ = _library_default_on_kurucz(kurucz_model, r)
    assert np.all(np.abs(errs) < 0.01 * C_KMS / r), errs


def test_lines_broader_than_the_stated_resolution_set_filter_and_templates(kurucz_model, monkeypatch):
    """The Kurucz Sun (the rms-solar file is R 2000 by its name: ``kurucz-fsunallp.2000resam125``)
    stated R 5000: the correlation's width shows the coarser resolution, the velocity is measured
    at it (said in the notes) and its bias is smaller than with filter and templates at the stated R
    (measured: +1.14 to +1.29 against +1.59 to +1.74 km/s on these spectra, S/N 100; R ~2300 shown)."""
    shown, errs = [], []
    for v in (-640.0, 35.0, 820.0):
        res = velocity.measure(_observe(kurucz_model, 5000.0, v, snr=100, seed=abs(int(v)) + 7), barycentric=False)
        assert res["resolving_power_source"] == velocity.SEEN_SOURCE
        assert any("broader than the stated resolving power R 5000" in n for n in res["notes"])
        shown.append(res["resolving_power"])
        errs.append(res["rv"].to_value(KMS) - v)
    # the file's R 2000, within the spread of a width read from a correlation with an observed template
    assert np.all((np.array(shown) > 1500.0) & (np.array(shown) < 3300.0)), shown
    monkeypatch.setattr(velocity, "BROADER_THAN_STATED", float("inf"))   # the stated R kept
    stated = [velocity.measure(_observe(kurucz_model, 5000.0, v, snr=100, seed=abs(int(v)) + 7),
                               barycentric=False)["rv"].to_value(KMS) - v for v in (-640.0, 35.0, 820.0)]
    assert np.mean(np.abs(errs)) < np.mean(np.abs(stated)) - 0.2, (errs, stated)


@pytest.mark.parametrize("make", ["kurucz 1000", "kurucz 2000", "synth 5000"])
def test_stated_resolution_kept_where_the_lines_agree(kurucz_model, make):
    """Where the stated R is the data's, the velocity is measured at it (no second pass)."""
    kind, r = make.split()
    if kind == "kurucz":
        s = _observe(kurucz_model, float(r), 120.0, snr=50, seed=3)
    else:
        s = synth.spectrum("K2.5", "II", resolving_power=float(r), rv=120 * KMS, snr=50, seed=4)
    res = velocity.measure(s, barycentric=False)
    assert res["resolving_power_source"] == "file"
    assert res["resolving_power"] == float(r)
    assert not any("broader than the stated" in n for n in res["notes"])


def test_line_mask_with_a_segment_of_no_lines_warns_of_nothing(kurucz_model):
    """A line mask leaves segments of the spectrum without template signal: no overflow, an honest error.

    Before the fix, the segment errors' single-precision adjoint overflowed on such a segment
    (gradient ~1/sqrt(1e-300)) and printed numpy's overflow warning to the user. The mask's
    velocity on the Kurucz Sun at rest (a static model: lines at their laboratory wavelengths) is
    10-13 km/s low at R 2000 (measured), within 2 of its reported errors of 6-7 km/s.
    """
    import warnings

    for v in (-300.0, 150.0):
        with warnings.catch_warnings():
            warnings.simplefilter("error", RuntimeWarning)
            res = velocity.measure(_observe(kurucz_model, 2000.0, v), "mask:G2 V", barycentric=False)
        err = res["rv_err"].to_value(KMS)
        assert np.isfinite(err) and err > 0
        assert abs(res["rv"].to_value(KMS) - v) < 2.5 * err, (res["rv"], err)


# ---------------------------------------------------------------------------
# Barycentric correction through FITS headers
# ---------------------------------------------------------------------------
SITES = {  # invented observatories at realistic places (geodetic lat, lon east, height m)
    "Cerro Quimal Station": (-24.6, -70.4, 2635.0),
    "Ridgeback Observatory": (32.4, -110.7, 2790.0),
    "Loch Varan Station": (57.1, -4.2, 250.0),
}


def _write_fits(path, spec, header_cards):
    w = spec.spectral_axis.to_value(u.AA)
    hdr = fits.Header()
    hdr["CTYPE1"] = "WAVE" if get_info(spec).medium == "vacuum" else "AWAV"
    hdr["CUNIT1"] = "Angstrom"
    hdr["CRPIX1"] = 1.0
    hdr["CRVAL1"] = w[0]
    hdr["CDELT1"] = w[1] - w[0]
    hdr["SPEC_RP"] = get_info(spec).resolving_power
    hdr["OBJECT"] = "HV-Test"
    for k, v in header_cards.items():
        hdr[k] = v
    fits.PrimaryHDU(spec.flux.value.astype("f8"), header=hdr).writeto(path, overwrite=True)


def _linear_spec(sptype, rv_kms, r=4000.0, medium="air", snr=200, seed=1):
    wave = np.arange(4000.0, 6800.0, 4000.0 / (r * 2.5)) * u.AA
    return synth.spectrum(sptype, resolving_power=r, wave=wave, rv=rv_kms * KMS, medium=medium, snr=snr,
                          seed=seed)


HEADER_CASES = [
    # (site name, site keywords style, time style, coordinate style, date, ra, dec)
    ("Cerro Quimal Station", "xyz", "date+exptime", "deg", "2024-03-15T03:12:45", 150.25, -33.5),
    ("Ridgeback Observatory", "blh", "mjd", "sex", "2025-07-02T09:40:00", 284.9, 12.25),
    ("Loch Varan Station", "xyz", "mjd", "sex", "2023-12-21T22:05:10", 45.0, 61.3),
    ("Ridgeback Observatory", "blh", "date+exptime", "deg", "2026-09-30T06:00:00", 5.5, -2.0),
]


def _header_cards(site_name, site_style, time_style, coord_style, date, ra, dec, exptime=900.0):
    lat, lon, h = SITES[site_name]
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m)
    cards = {"RADESYS": "ICRS"}
    if site_style == "xyz":
        x, y, z = (q.to_value(u.m) for q in loc.geocentric)
        cards.update({"OBSGEO-X": x, "OBSGEO-Y": y, "OBSGEO-Z": z})
    else:
        cards.update({"OBSGEO-B": lat, "OBSGEO-L": lon, "OBSGEO-H": h})
    start = Time(date, scale="utc")
    if time_style == "date+exptime":
        cards.update({"DATE-OBS": start.isot, "EXPTIME": exptime})
        mid = start + exptime / 2 * u.s
    else:
        cards.update({"MJD-OBS": start.mjd})  # no EXPTIME: the start is the mid-time (reader's rule)
        mid = start
    c = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs")
    if coord_style == "deg":
        cards.update({"RA": ra, "DEC": dec})
    else:
        cards.update({"RA": c.ra.to_string(unit=u.hourangle, sep=":", precision=4),
                      "DEC": c.dec.to_string(unit=u.deg, sep=":", precision=3, alwayssign=True)})
    return cards, loc, mid, c


@pytest.mark.parametrize("case", HEADER_CASES, ids=[f"{c[1]}-{c[2]}-{c[3]}" for c in HEADER_CASES])
def test_barycentric_correction_through_headers(tmp_path, case):
    """Agrees with astropy to 1 m/s via every header path (issue 4)."""
    import specan

    cards, loc, mid, c = _header_cards(*case)
    spec = _linear_spec("G8", 0.0)
    path = tmp_path / "star.fits"
    _write_fits(path, spec, cards)
    read = specan.read(path)
    got = velocity.barycentric_correction(get_info(read)).to_value(u.m / u.s)
    # astropy directly, on the values written (sexagesimal strings are rounded to 1e-4 s / 1e-3")
    ref = c.radial_velocity_correction(kind="barycentric", obstime=mid, location=loc).to_value(u.m / u.s)
    assert abs(got - ref) < 1.0, (got, ref)


def test_barycentric_velocity_and_sign(tmp_path):
    """A star at rest w.r.t. the barycentre, Earth moving towards it: blueshifted, rv_bary ~ 0."""
    import specan
    from astropy.coordinates import get_body_barycentric_posvel

    site, date = "Cerro Quimal Station", "2024-03-15T03:12:45"
    t = Time(date, scale="utc")
    # the Earth's orbital velocity (astropy ephemeris) and the direction it points to
    _, vel = get_body_barycentric_posvel("earth", t)
    x, y, z = vel.xyz.to_value(KMS)
    ra = np.degrees(np.arctan2(y, x)) % 360.0
    dec = np.degrees(np.arcsin(z / np.sqrt(x * x + y * y + z * z)))
    cards, loc, mid, c = _header_cards(site, "xyz", "date+exptime", "deg", date, ra, dec)
    corr = c.radial_velocity_correction(kind="barycentric", obstime=mid, location=loc).to_value(KMS)
    assert corr > 25  # towards the apex the Earth approaches the star at ~30 km/s
    # the observed spectrum: z_topo from (1 + z_bary) = (1 + z_topo)(1 + v_corr/c) with z_bary = 0
    z_topo = 1 / (1 + corr / C_KMS) - 1
    v_topo = velocity.velocity_from_factor(1 + z_topo).to_value(KMS)
    assert v_topo < 0  # blueshift
    spec = _linear_spec("K0", v_topo, r=5000, snr=150)
    path = tmp_path / "apex.fits"
    _write_fits(path, spec, cards)
    res = velocity.measure(specan.read(path))
    assert res["frame"] == "barycentric" and "no_barycentric" not in res["flags"]
    assert res["rv_topo"].to_value(KMS) < -25
    assert res["bary_corr"].to_value(KMS) == pytest.approx(corr, abs=1e-3)
    assert abs(res["rv"].to_value(KMS)) < 4 * res["rv_err"].to_value(KMS) + 0.3
    assert any("IERS" in n for n in res["notes"])


def test_missing_metadata_gives_topocentric_and_says_how_to_fix(tmp_path):
    import specan

    spec = _linear_spec("G2", 42.0)
    path = tmp_path / "bare.fits"
    _write_fits(path, spec, {"DATE-OBS": "2024-05-01T01:00:00", "EXPTIME": 600.0})
    res = velocity.measure(specan.read(path))
    assert res["frame"] == "topocentric" and "no_barycentric" in res["flags"]
    assert res["bary_corr"] is None and res["v_grf"] is None
    assert res["rv"] == res["rv_topo"]
    text = " ".join(res["notes"])
    assert "--site" in text and "--ra/--dec" in text
    assert abs(res["rv"].to_value(KMS) - 42.0) < 1.0
    with pytest.raises(specan.SpecanError, match="--site"):
        velocity.barycentric_correction(get_info(specan.read(path)))


# ---------------------------------------------------------------------------
# Doppler conversions
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("v", [-950.0, -30.0, 0.0, 12.5, 600.0, 29000.0])
def test_doppler_matches_astropy_equivalencies(v):
    rest = 5000.0 * u.AA
    for conv, equiv in (("relativistic", u.doppler_relativistic), ("optical", u.doppler_optical)):
        obs = (v * KMS).to(u.AA, equivalencies=equiv(rest))  # astropy
        f = velocity.doppler_factor(v * KMS, convention=conv)
        assert f * 5000.0 == pytest.approx(obs.value, rel=1e-13)
        back = velocity.velocity_from_factor(obs.value / 5000.0, convention=conv).to_value(KMS)
        assert back == pytest.approx(v, abs=1e-6)
    assert synth.doppler_factor(v * KMS) == pytest.approx(velocity.doppler_factor(v * KMS), rel=1e-15)
    # synth's public factor against astropy too, not only against specan's own copy
    obs = (v * KMS).to(u.AA, equivalencies=u.doppler_relativistic(rest))  # astropy
    assert synth.doppler_factor(v * KMS) * 5000.0 == pytest.approx(obs.value, rel=1e-13)
    # the plain-float forms for inner loops: the same bits as the Quantity forms
    from specan.doppler import factor_kms, velocity_kms

    assert factor_kms(v) == velocity.doppler_factor(v * KMS)
    assert velocity_kms(factor_kms(v)) == velocity.velocity_from_factor(factor_kms(v)).to_value(KMS)


def test_shift_to_rest_in_air_and_vacuum():
    for medium in ("air", "vacuum"):
        s = synth.spectrum("K0", medium=medium, rv=-420 * KMS, resolving_power=5000)
        rest = velocity.shift_to_rest(s, -420 * KMS)
        ref = synth.spectrum("K0", medium=medium, resolving_power=5000, wave=rest.spectral_axis)
        assert np.max(np.abs(rest.flux.value - ref.flux.value)) < 2e-3
        assert get_info(rest).medium == medium


# ---------------------------------------------------------------------------
# Galactic rest frame and flags
# ---------------------------------------------------------------------------
def _solar_projection(c):
    """v_sun . n from astropy's Galactocentric solar motion, textbook formula (common practice)."""
    from astropy.coordinates import Galactocentric

    vsun = Galactocentric().galcen_v_sun
    vx, vy, vz = (vsun.d_xyz if hasattr(vsun, "d_xyz") else vsun.xyz).to_value(KMS)
    g = c.galactic
    lr, br = g.l.rad, g.b.rad
    return vx * np.cos(br) * np.cos(lr) + vy * np.cos(br) * np.sin(lr) + vz * np.sin(br)


@pytest.mark.parametrize("v_target, flagged_hv, flagged_unbound", [
    (150.0, False, False), (-150.0, False, False), (400.0, True, False),
    (700.0, True, True), (-800.0, True, True),
])
def test_rest_frame_flags(v_target, flagged_hv, flagged_unbound):
    """~700 and ~800 km/s rest-frame speeds are unbound candidates, 150 km/s is not (issue 4)."""
    # common practice: local escape speed roughly 500-550 km/s; specan's default 533 (Piffl et al. 2014)
    date, (lat, lon, h) = "2025-02-11T04:30:00", SITES["Ridgeback Observatory"]
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m)
    c = SkyCoord(266.0 * u.deg, -29.0 * u.deg)  # towards the Galactic centre region (ICRS)
    mid = Time(date, scale="utc")
    corr = c.radial_velocity_correction(kind="barycentric", obstime=mid, location=loc).to_value(KMS)
    v_bary = v_target - _solar_projection(c)
    f_topo = velocity.doppler_factor(v_bary * KMS) / (1 + corr / C_KMS)
    v_topo = velocity.velocity_from_factor(f_topo).to_value(KMS)
    s = synth.spectrum("F8", resolving_power=3000, rv=v_topo * KMS, snr=80, seed=3)
    info = get_info(s)
    info.time_mid, info.site, info.ra_deg, info.dec_deg = mid, loc, 266.0, -29.0
    res = velocity.measure(s)
    assert res["v_grf"].to_value(KMS) == pytest.approx(v_target, abs=3.0)
    assert ("high_velocity" in res["flags"]) is flagged_hv
    assert ("unbound_candidate" in res["flags"]) is flagged_unbound
    assert any("Galactocentric" in n for n in res["notes"])


# ---------------------------------------------------------------------------
# Templates, media, robustness
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("sptype, lum, family", [("B3", "V", "OB"), ("A2", "V", "AB"), ("F5", "V", "FG"),
                                                 ("K1", "III", "GK"), ("M3", "V", "KM")])
def test_automatic_choice_and_extreme_velocities(sptype, lum, family):
    for v in (-1000.0, 1000.0):
        s = synth.spectrum(sptype, lum, resolving_power=2500, rv=v * KMS, snr=40, seed=11)
        res = velocity.measure(s)
        assert res["template"].split()[1][0] in family, res["template"]
        assert abs(res["rv"].to_value(KMS) - v) < 4 * res["rv_err"].to_value(KMS) + 0.5
        # the whole grid was tried, then neighbouring subtypes / classes of the best
        assert {f"synthetic {st} {lc}" for st, lc in synth.TEMPLATE_TYPES} < set(res["template_scores"])
        assert res["ccf_height"] == pytest.approx(max(res["template_scores"].values()), abs=0.02)
        assert any("chosen automatically" in n for n in res["notes"])


def test_air_and_vacuum_spectra_give_the_same_velocity():
    """Templates follow the spectrum's medium: air/vacuum mix-ups would cost ~83 km/s at Na D."""
    wave = np.arange(4800.0, 6700.0, 0.5) * u.AA
    air = synth.spectrum("K2", medium="air", wave=wave, rv=55 * KMS, resolving_power=5000, snr=100, seed=2)
    vac = synth.spectrum("K2", medium="vacuum", wave=wave, rv=55 * KMS, resolving_power=5000, snr=100, seed=2)
    ra, rv_ = velocity.measure(air), velocity.measure(vac)
    assert ra["rv"].to_value(KMS) == pytest.approx(55.0, abs=0.5)
    assert rv_["rv"].to_value(KMS) == pytest.approx(55.0, abs=0.5)
    # the same air-wavelength numbers mislabelled as vacuum are off by the air/vacuum offset
    get_info(air).medium = "vacuum"
    wrong = velocity.measure(air)["rv"].to_value(KMS)
    assert 70 < 55.0 - wrong < 90  # (n - 1) c ~ 83 km/s (Morton 2000)


def test_unknown_resolving_power():
    s = synth.spectrum("F5", resolving_power=3000, rv=222 * KMS, snr=50, seed=1)
    get_info(s).resolving_power = None
    res = velocity.measure(s)
    assert any("resolving power unknown" in n and "--resolving-power" in n for n in res["notes"])
    assert abs(res["rv"].to_value(KMS) - 222) < 4 * res["rv_err"].to_value(KMS) + 0.5


def test_unknown_resolving_power_at_the_end_of_the_scan_is_a_bound(monkeypatch):
    # Where the narrowest lines give no R (here made so), a scan of template widths decides.
    # R = 500 sampled at 0.5 A: the first guess (2.5 pixels per FWHM, R ~ 4300) is far too
    # sharp, so even the broadest template tried is sharper than the star; the note must say
    # that the figure is a bound, not an estimate.
    import specan.resolution

    monkeypatch.setattr(specan.resolution, "estimate_resolving_power", lambda spectrum: None)
    s = synth.spectrum("G2", resolving_power=500, wave=np.arange(4000.0, 6800.0, 0.5) * u.AA, snr=100, seed=1)
    get_info(s).resolving_power = None
    notes = [n for n in velocity.measure(s, barycentric=False, errors="td")["notes"] if "resolving power" in n]
    assert notes and "broadest tried" in notes[0] and "may lie beyond" in notes[0]


def test_unknown_resolving_power_estimated_from_the_lines(kurucz_sun):
    # The Kurucz solar model (rms-solar; R = 2000, its fixture) with no R in its metadata:
    # R comes from the narrowest lines, within 15% of the truth (measured 1847).
    w, f, c = kurucz_sun
    keep = (w > 3800) & (w < 9000)
    s = Spectrum(flux=(f[keep] / c[keep]) * u.dimensionless_unscaled, spectral_axis=w[keep] * u.AA,
                 meta={META_KEY: ObsInfo(medium="vacuum", medium_assumed=False, normalized=True)})
    notes = [n for n in velocity.measure(s, barycentric=False, errors="td")["notes"] if "resolving power" in n]
    assert notes and "narrowest lines" in notes[0]
    r_est = float(notes[0].split("R ~ ")[1].split()[0])
    assert r_est == pytest.approx(2000.0, rel=0.15)


def test_line_mask_and_user_template_with_partial_overlap(tmp_path):

    s = synth.spectrum("G5", resolving_power=3000, rv=-233 * KMS, snr=60, seed=4,
                       wave_range=(4500, 8800) * u.AA)
    res = velocity.measure(s, template="mask")
    assert res["template"].startswith("line mask")
    assert abs(res["rv"].to_value(KMS) + 233) < 4 * res["rv_err"].to_value(KMS) + 1.0
    # a template file covering only part of the spectrum (3700-6000 A) at higher resolution
    t = synth.spectrum("G5", resolving_power=10000, wave=np.arange(3700.0, 6000.0, 0.15) * u.AA)
    tpath = tmp_path / "standard.fits"
    _write_fits(tpath, t, {})
    res2 = velocity.measure(s, template=str(tpath))
    assert res2["template"].startswith("user")
    assert any("degraded" in n for n in res2["notes"])
    assert abs(res2["rv"].to_value(KMS) + 233) < 4 * res2["rv_err"].to_value(KMS) + 1.0
    # an RV standard with a known velocity: the target's velocity is composed with it
    std = synth.spectrum("G5", resolving_power=3000, rv=40 * KMS, wave_range=(4500, 8800) * u.AA)
    res3 = velocity.measure(s, template=std, template_rv=40 * KMS)
    assert abs(res3["rv"].to_value(KMS) + 233) < 4 * res3["rv_err"].to_value(KMS) + 1.0


def test_reference_exposure_gives_relative_velocity():
    a = synth.spectrum("K4", "III", resolving_power=6000, rv=12.0 * KMS, snr=80, seed=21)
    b = synth.spectrum("K4", "III", resolving_power=6000, rv=19.5 * KMS, snr=80, seed=22)
    res = velocity.measure(b, reference=a)
    assert "relative" in res["flags"] and res["template"].startswith("reference")
    # relative velocity: (1 + z_b) / (1 + z_a) (relativistic composition)
    expect = velocity.velocity_from_factor(velocity.doppler_factor(19.5 * KMS)
                                           / velocity.doppler_factor(12.0 * KMS)).to_value(KMS)
    assert res["rv"].to_value(KMS) == pytest.approx(expect, abs=4 * res["rv_err"].to_value(KMS) + 0.05)


def test_telluric_bands_are_masked():
    s = synth.spectrum("K0", resolving_power=4000, rv=150 * KMS, snr=150, seed=5,
                       wave_range=(6200, 8000) * u.AA)
    w = s.spectral_axis.to_value(u.AA)
    f = s.flux.value.copy()
    # strong narrow telluric-like lines at fixed observed wavelengths in the O2 B and A bands
    for lo, hi in ((6868, 6884), (7594, 7620)):
        for c in np.arange(lo, hi, 1.3):
            f *= 1 - 0.7 * np.exp(-0.5 * ((w - c) / 0.5) ** 2)
    bad = Spectrum(flux=f * u.dimensionless_unscaled, spectral_axis=s.spectral_axis,
                   uncertainty=s.uncertainty, meta={META_KEY: get_info(s).copy()})
    # the best synthetic type alone: this compares masks, not templates (the default averages
    # several templates, which blurs the comparison: unmasked 0.32 against masked 0.39 km/s, measured)
    good = velocity.measure(bad, template="synth")
    assert abs(good["rv"].to_value(KMS) - 150) < 4 * good["rv_err"].to_value(KMS) + 0.5
    unmasked = velocity.measure(bad, telluric=False, template="synth")
    assert abs(unmasked["rv"].to_value(KMS) - 150) > abs(good["rv"].to_value(KMS) - 150)


@pytest.mark.parametrize("primary, secondary, rv1, rv2, r, snr, seed, tol1, tol2", [
    (("G0", "V"), ("K0", "V"), -120.0, 180.0, 5000, 100, 8, 8, 15),  # well separated
    # blended: separation ~2 resolution elements (R = 4000), different types
    (("F8", "V"), ("G4", "V"), -67.0, 88.0, 4000, 150, 5, 5, 20),
], ids=["separated", "blended"])
def test_composite_spectrum_second_peak(primary, secondary, rv1, rv2, r, snr, seed, tol1, tol2):
    b = synth.binary(primary, secondary, rv1=rv1 * KMS, rv2=rv2 * KMS, light_ratio=0.6,
                     resolving_power=r, snr=snr, seed=seed)
    res = velocity.measure(b)
    assert "composite" in res["flags"]
    assert res["rv"].to_value(KMS) == pytest.approx(rv1, abs=tol1)
    assert res["second_peak_rv"].to_value(KMS) == pytest.approx(rv2, abs=tol2)


def test_single_star_is_not_composite():
    for sp in ("B5", "A0", "G2", "M2"):
        single = velocity.measure(synth.spectrum(sp, resolving_power=5000, rv=30 * KMS, snr=50, seed=9))
        assert "composite" not in single["flags"], sp
        assert single["second_peak_rv"] is None


def test_emission_line_star_and_unnormalised_input():
    e = synth.spectrum("B3", resolving_power=3000, rv=-75 * KMS, snr=100, seed=12, emission={"H_alpha": 25.0},
                       continuum="blackbody")
    assert not get_info(e).normalized
    res = velocity.measure(e)
    assert any("prepare" in n for n in res["notes"])
    assert abs(res["rv"].to_value(KMS) + 75) < 4 * res["rv_err"].to_value(KMS) + 1.0


# ---------------------------------------------------------------------------
# Command line
# ---------------------------------------------------------------------------
def test_cli_json(tmp_path):
    from specan.cli import main

    cards, *_ = _header_cards(*HEADER_CASES[0])
    spec = _linear_spec("G8", 61.0)
    p1 = tmp_path / "a.fits"
    _write_fits(p1, spec, cards)
    p2 = tmp_path / "b.fits"
    _write_fits(p2, spec, {})
    import io
    from contextlib import redirect_stdout

    buf = io.StringIO()
    with redirect_stdout(buf):
        code = main(["velocity", str(p1), str(p2), "--json"])
    lines = [json.loads(x) for x in buf.getvalue().splitlines() if x.strip()]
    assert code == 0 and len(lines) == 2
    keys = {"file", "rv_kms", "rv_err_kms", "frame", "rv_topo_kms", "bary_corr_kms", "v_grf_kms", "template",
            "ccf_height", "flags"}
    assert keys <= set(lines[0]) and keys <= set(lines[1])
    assert lines[0]["frame"] == "barycentric" and lines[1]["frame"] == "topocentric"
    assert abs(lines[1]["rv_kms"] - 61.0) < 1.0
    assert "no_barycentric" in lines[1]["flags"] and lines[1]["bary_corr_kms"] is None


def test_cli_help_quotes_the_module_thresholds():
    # The CLI leaves both thresholds to specan.velocity's constants; its help must quote them rightly.
    from click.testing import CliRunner

    from specan.cli import cli
    from specan.velocity import ESCAPE_SPEED, HIGH_VELOCITY

    text = " ".join(CliRunner().invoke(cli, ["velocity", "--help"]).output.split())
    assert f"[default: {HIGH_VELOCITY.to_value(KMS):g}]" in text
    assert f"[default: {ESCAPE_SPEED.to_value(KMS):g}," in text


@pytest.mark.reference
def test_real_spectra_of_the_reference_library(jhc1984, jhc_catalog):
    """Real, unnormalised JHC (1984) spectra: prepared, measured, sane.

    The library's README (measured, not promised): line minima of B-F stars sit some tens of km/s
    off their laboratory positions with a scatter of about 50 km/s, so no velocity truth here; a
    wrong correlation peak would show up as hundreds of km/s.
    """
    import specan

    picks = [row for row in jhc_catalog if row["lumclass"] in ("V", "III") and row["sptype"][0] in "BAFGK"]
    got = []
    for row in picks[:: max(1, len(picks) // 8)][:8]:
        # The README says 4.5 A FWHM, but these copies are ~13 A (fitted against MILES stars of the
        # same types: 12-13.5 A, measured), R ~ 400 at 5000 A. Stated 3x too sharp (R = 1300), the
        # library templates locked on wrong peaks (+237, +320 km/s for the K0 V and G6 III, measured).
        s = specan.read(jhc1984 / row["file"], resolving_power=400)
        res = velocity.measure(s, errors="td")
        assert res["frame"] == "topocentric" and "no_barycentric" in res["flags"]
        assert any("prepare" in n for n in res["notes"])
        got.append(res["rv"].to_value(KMS))
    assert np.all(np.abs(got) < 300), got
    assert np.std(got) < 120, got


@pytest.mark.reference
def test_a_real_spectrum_against_itself_gives_zero(jhc1984):
    """A spectrum used as its own reference exposure must give 0 (common practice: the CCF of a
    signal with itself peaks at zero lag).

    The JHC (1984) K1 I star SAO 37325 has peaks above its pseudo-continuum that the emission
    clip removes; when only the star and not the template was clipped, the high-pass filter saw
    them in one only and the peak moved to 9.4 km/s (measured). Both are now clipped alike.
    """
    import specan

    s = specan.read(jhc1984 / "spectra" / "SAO37325.csv", resolving_power=1100)
    res = velocity.measure(s, reference=s, errors="td")
    assert any("above the continuum" in n for n in res["notes"])   # the case this guards
    assert abs(res["rv"].to_value(KMS)) < 0.2


def test_short_spectrum_around_h_alpha():
    # 300 A around H-alpha, linearly sampled, resolving power not stated: a common single-order
    # set-up. The empirical-error step once indexed one frequency past the end of its array
    # here ("could not broadcast (424,5) into (425,5)") and the velocity was lost.
    s = synth.spectrum("G5", "V", resolving_power=2000, wave_range=(3800, 7200) * u.AA, snr=50, seed=3,
                       continuum="blackbody")
    w = s.spectral_axis.to_value(u.AA)
    wl = np.linspace(w[0], w[-1], w.size)
    fl = np.interp(wl, w, s.flux.value / np.median(s.flux.value))
    keep = (wl > 6400) & (wl < 6700)
    short = Spectrum(flux=fl[keep].astype("f4").astype(float) * u.dimensionless_unscaled,
                     spectral_axis=wl[keep] * u.AA)
    short.meta[META_KEY] = ObsInfo(medium="air", medium_assumed=False)
    res = velocity.measure(short, errors="both")   # the resampling step is what this guards
    assert np.isfinite(res["rv_err_mc"].to_value(KMS))
    assert abs(res["rv"].to_value(KMS)) < 4 * res["rv_err"].to_value(KMS) + 1.0   # synthesised at rest


# ---------------------------------------------------------------------------
# Reader assumptions carried into the velocity
# ---------------------------------------------------------------------------
def test_undeclared_medium_is_flagged_in_velocity_json(tmp_path):
    """A file that does not state its medium: the velocity says so, by how much it would move, how to fix it.

    The size is the refractive index of air at the spectrum's wavelengths (Morton 2000, via
    specutils): (n - 1) c ~ 83 km/s in the visible (common practice).
    """
    import io
    from contextlib import redirect_stdout

    from specan.cli import main

    spec = _linear_spec("G8", 61.0)
    path = tmp_path / "undeclared.fits"
    _write_fits(path, spec, {})
    with fits.open(path, mode="update") as hdus:
        del hdus[0].header["CTYPE1"]   # no AWAV/WAVE: the reader assumes air
    for extra, assumed in (([], True), (["--medium", "air"], False)):
        buf = io.StringIO()
        with redirect_stdout(buf):
            assert main(["velocity", str(path), "--json", *extra]) == 0
        d = json.loads(buf.getvalue().splitlines()[0])
        assert d["medium_assumed"] is assumed
        assert ("medium_assumed" in d["flags"]) is assumed
        if assumed:
            assert 75 < -d["medium_shift_kms"] < 90
            note = next(n for n in d["notes"] if n.startswith("wavelength medium not stated"))
            assert "--medium vacuum" in note and "more negative" in note
        else:
            assert d["medium_shift_kms"] is None
        assert abs(d["rv_kms"] - 61.0) < 1.0


# ---------------------------------------------------------------------------
# Determinism: the same numbers however the measurement is run
# ---------------------------------------------------------------------------
_DETERMINISM_SCRIPT = """
import json, sys, warnings
import astropy.units as u
warnings.simplefilter("ignore")
from specan import synth, velocity
first = sys.argv[1] == "other-first"
if first:   # fill the template caches with another set-up and star first
    velocity.measure(synth.spectrum("A2", "V", resolving_power=2500, rv=-80 * u.km / u.s, snr=60, seed=9))
s = synth.spectrum("G8", "V", resolving_power=3000, rv=37 * u.km / u.s, snr=40, seed=3)
r = velocity.measure(s, barycentric=False, errors="both")
keys = ("rv", "rv_err", "rv_err_noise", "rv_err_template", "rv_err_td", "rv_err_mc")
print(json.dumps({k: r[k].to_value(u.km / u.s).hex() for k in keys} | {"templates": [t["name"] for t in r["templates"]]}))
"""


def test_velocity_is_bit_identical_across_threads_and_history(tmp_path):
    """BLAS thread counts, cache history and process must not change a single bit of the result.

    Run in fresh processes with 1 and 2 BLAS threads, one of them after measuring another star
    (so the caches hold other templates). The resampled error is seeded from the spectrum.
    """
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = str(Path(__file__).resolve().parents[1])
    outs = []
    for threads, order in (("1", "alone"), ("2", "other-first"), ("2", "alone")):
        env = dict(os.environ, OPENBLAS_NUM_THREADS=threads, OMP_NUM_THREADS=threads,
                   PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", ""))
        run = subprocess.run([sys.executable, "-c", _DETERMINISM_SCRIPT, order], env=env, capture_output=True,
                             text=True, check=True)
        outs.append(json.loads(run.stdout.strip().splitlines()[-1]))
    assert outs[0] == outs[1] == outs[2], outs


# ---------------------------------------------------------------------------
# The user's path: a spectrum no template was made from, no template given
# ---------------------------------------------------------------------------
def _user_file_runs(kurucz_model, r, snr, n=10):
    """The Kurucz Sun times an unknown smooth response, not normalised, on linear pixels, at +-900 km/s;
    error arrays on every other spectrum. Returns (measured - true, rv_err, Cramer-Rao bound) in km/s."""
    lng, fl = kurucz_model(r)
    spl = make_interp_spline(lng, fl, k=3)
    lo, hi = 3850.0, 7300.0
    pix = np.arange(lo, hi, lo / (r * 2.5))
    response = 1.0 + 0.3 * np.sin((pix - lo) / (hi - lo) * 2.5)
    rng = np.random.default_rng(int(r + snr))
    dv, err = [], []
    for i in range(n):
        v = rng.uniform(-900, 900)
        flux = spl(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
        sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
        obs = (flux + rng.normal(size=flux.size) * sig) * response
        info = ObsInfo(object="sun", medium="vacuum", medium_assumed=False, resolving_power=r)
        s = Spectrum(flux=obs * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                     uncertainty=StdDevUncertainty(sig * response) if i % 2 == 0 else None, meta={META_KEY: info})
        res = velocity.measure(s, barycentric=False)
        dv.append(res["rv"].to_value(KMS) - v)
        err.append(res["rv_err"].to_value(KMS))
    clean = spl(np.log(pix))
    slope = spl(np.log(pix) - np.log(velocity.doppler_factor(0.5 * KMS))) - spl(
        np.log(pix) - np.log(velocity.doppler_factor(-0.5 * KMS)))
    bound = 1.0 / np.sqrt(np.sum((slope / (np.sqrt(clean) / snr)) ** 2))  # Bouchy, Pepe & Queloz (2001)
    return np.array(dv), np.array(err), bound


@pytest.mark.slow
def test_user_path_scatter_within_twice_the_cramer_rao_bound(kurucz_model):
    """No template, a star no template was made from: scatter <= 2x the Cramer-Rao bound at S/N >= 30 (issue 11).

    The bound is computed from the noiseless input (Bouchy, Pepe & Queloz 2001, photon-noise
    form). Before the templates were averaged the choice flipped between two library templates
    2.5 km/s apart at R 2000, S/N 100: 4.4x the bound (measured).
    """
    for r, snr in ((2000.0, 30.0), (2000.0, 100.0), (5000.0, 100.0)):
        dv, _, bound = _user_file_runs(kurucz_model, r, snr)
        assert np.std(dv, ddof=1) < 2.0 * bound, (r, snr, np.std(dv, ddof=1), bound)


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="measured (this test's cells: R 2000 S/N 30 and 100, R 5000 S/N 100): bias "
                   "+0.95, +1.38, +1.62 km/s (0.64, 0.92, 2.71% of a resolution element; target 1%; before the template "
                   "weights were scaled by the mismatch beyond the noise: +1.12, +1.41, +1.66; R 5000 is the R 2000 "
                   "file stated finer, measured at the R ~2300 its correlation width shows), pulls "
                   "(measured - true)/rv_err rms 0.27-0.45, sd 0.05-0.11: rv_err (3.6-4.0 km/s) is dominated by "
                   "the library templates' laboratory zero-point errors (G8 V 3.57 km/s, a Maritz-Jarrett standard "
                   "error of the lines' median), a per-template systematic that noise realisations of one star do "
                   "not sample (it cannot average down, so the sd of these pulls measures the noise part only). "
                   "benchmarks/bench_velocity.py --user, 20 spectra a cell: bias -0.24 to +1.86 km/s over "
                   "R 1000-5000, S/N 10-200 (R 2000: +1.86, +1.64, +1.53, +1.49 at S/N 10, 30, 100, 200; 400 a cell, "
                   "--bias-parts: +1.54, +1.52, +1.48 at S/N 10, 30, 100), pull rms 0.13-0.91")
def test_user_path_bias_and_pulls(kurucz_model):
    """Issue 11's acceptance on the Kurucz Sun read as a user's file: bias within 1% of a resolution
    element, and (measured - true)/rv_err with rms and sd in 0.8-1.25."""
    for r, snr in ((2000.0, 30.0), (2000.0, 100.0), (5000.0, 100.0)):
        dv, err, _ = _user_file_runs(kurucz_model, r, snr)
        pull = dv / err
        assert abs(np.mean(dv)) < 0.01 * C_KMS / r, (r, snr, np.mean(dv))
        assert 0.8 <= np.sqrt(np.mean(pull ** 2)) <= 1.25, (r, snr, pull)
        assert 0.8 <= np.std(pull, ddof=1) <= 1.25, (r, snr, pull)


def _sun_as_a_user_file(kurucz_model, r, v, snr, seed, noise=True, errors=True):
    """The Kurucz Sun at ``v`` times an unknown smooth response on linear pixels (the user path's input),
    with photon noise of S/N ``snr`` (``noise``) and its error array (``errors``)."""
    lng, fl = kurucz_model(r)
    lo, hi = 3850.0, 7300.0
    pix = np.arange(lo, hi, lo / (r * 2.5))
    response = 1.0 + 0.3 * np.sin((pix - lo) / (hi - lo) * 2.5)
    flux = make_interp_spline(lng, fl, k=3)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
    sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
    if noise:
        flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
    info = ObsInfo(object="sun", medium="vacuum", medium_assumed=False, resolving_power=r)
    return Spectrum(flux=flux * response * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                    uncertainty=StdDevUncertainty(sig * response) if errors else None, meta={META_KEY: info})


@pytest.mark.parametrize("snr", [10.0, 30.0])
def test_noise_ceiling_is_what_noise_does_to_the_heights(kurucz_model, snr):
    """Noise scales every template's correlation height by one factor, the ceiling the velocity stage
    estimates from the pixel errors (``specan.velocity.correlation.noise_ceiling``): checked against
    the heights themselves, the Kurucz Sun (rms-solar) as a user's file with and without its noise
    (the same error array, so the same weights), one library template. Measured on these spectra: the
    heights' ratio 0.762-0.772 at S/N 10 and 0.961-0.963 at S/N 30, the estimate's mean 0.0034 and 0.0001
    below it (0.0094 and 0.0009 before the high-pass's share of the noise was counted)."""
    from specan.velocity.choice import settle_resolving_power
    from specan.velocity.correlation import observed_side
    from specan.velocity.grid import lag_window, normalised, observe_on_grid

    ceilings, ratios = [], []
    for i, v in enumerate((-613.0, -77.0, 240.0, 815.0)):
        noisy = _sun_as_a_user_file(kurucz_model, 2000.0, v, snr, seed=40 + i)
        clean = _sun_as_a_user_file(kurucz_model, 2000.0, v, snr, seed=40 + i, noise=False)
        h = [velocity.measure(s, template="library:G8 V", barycentric=False)["ccf_height"] for s in (noisy, clean)]
        ratios.append(h[0] / h[1])
        notes = []
        spectrum = normalised(noisy, notes)
        observed = observe_on_grid(spectrum, notes=notes)
        power = settle_resolving_power(observed, spectrum, notes)
        ceilings.append(observed_side(observed, lag_window(observed, 2000 * KMS, power.value, 8.0)).ceiling)
    assert abs(np.mean(ceilings) - np.mean(ratios)) < 0.01, (ceilings, ratios)
    assert np.mean(ratios) < (0.8 if snr == 10.0 else 0.98), ratios     # the noise does lower the heights


def _giants_share(kurucz_model, snr, noise, n=12):
    """Mean weight of luminosity class III library templates in the automatic choice's mixture, Kurucz Sun
    (G2 V) as a user's file at R 2000."""
    share = []
    for i, v in enumerate(np.random.default_rng(3).uniform(-900, 900, n)):
        # noiseless: no error array either (an error array would state noise the flux has not)
        res = velocity.measure(_sun_as_a_user_file(kurucz_model, 2000.0, v, snr, seed=60 + i, noise=noise,
                                                   errors=noise), barycentric=False)
        share.append(sum(m["weight"] for m in res["templates"] if m["type"].split()[1] == "III"))
    return float(np.mean(share))


def test_template_weights_do_not_drift_with_noise(kurucz_model):
    """The automatic choice's weights follow the templates' mismatch with the star, not the noise
    (issue 11: the bias grew as the S/N fell). Kurucz Sun (rms-solar) as a user's file, R 2000: the
    library giants, whose velocities read +2.1 to +2.7 km/s on the noiseless Sun against G8 V's +0.0
    (benchmarks/bench_velocity.py --kurucz), took more of the weight as the noise rose when noise counted
    as mismatch. Measured (their mean share on these spectra): noiseless 0.454, S/N 30 0.458, S/N 10 0.443;
    before (weights scaled by 1 - h_best): 0.460, 0.524, 0.571. On 400 realisations a cell that moved the
    bias from +1.81, +1.71, +1.51 km/s to +1.54, +1.52, +1.48 at S/N 10, 30, 100 (benchmarks/bench_velocity.py
    --bias-parts; noiseless +1.23, the giants' offsets)."""
    clean = _giants_share(kurucz_model, 30.0, noise=False)
    for snr, bound in ((30.0, 0.03), (10.0, 0.07)):
        assert abs(_giants_share(kurucz_model, snr, noise=True) - clean) < bound, snr


#: Types the synthetic grid and its neighbour refinement do not contain (so the template is
#: always another type), dwarfs to bright giants, A to K.
OFF_GRID_TYPES = (("F3", "IV"), ("G4", "IV"), ("K2.5", "II"), ("A7", "III"), ("K5", "III"), ("G0", "III"))


def _off_grid_runs(r, snr):
    rng = np.random.default_rng(int(r + snr))
    dv, err = [], []
    for i, (st, lc) in enumerate(OFF_GRID_TYPES * 2):
        v = rng.uniform(-900, 900)
        s = synth.spectrum(st, lc, resolving_power=r, rv=v * KMS, snr=snr, seed=400 + i, wave_range=(3850, 7300) * u.AA)
        res = velocity.measure(s, barycentric=False)
        assert f"synthetic {st} {lc}" not in res["template_scores"]
        dv.append(res["rv"].to_value(KMS) - v)
        err.append(res["rv_err"].to_value(KMS))
    return np.array(dv), np.array(err)


@pytest.mark.slow
def test_off_grid_types_bias_within_one_percent_of_a_resolution_element():
    """Synthetic stars of types no template has, no template given: bias within 1% of a resolution element (issue 11).

    The bias is known to its standard error; measured 0.07-0.95% over R 1000-5000, S/N 10-200
    (benchmarks/bench_velocity.py --other-types).
    """
    for r, snr in ((2000.0, 30.0), (2000.0, 100.0), (5000.0, 100.0)):
        dv, err = _off_grid_runs(r, snr)
        assert abs(np.mean(dv)) < 0.01 * C_KMS / r + 2 * np.std(dv, ddof=1) / np.sqrt(dv.size), (r, snr, dv)


@pytest.mark.slow
@pytest.mark.parametrize("r, snr", [
    (2000.0, 30.0),
    (2000.0, 100.0),
    (5000.0, 100.0),
    pytest.param(2000.0, 200.0, marks=pytest.mark.xfail(strict=True, reason=(
        "measured: pull sd 0.77 on these 12 stars (0.71 before the template weights' noise ceiling); "
        "benchmarks/bench_velocity.py --other-types, 18 other stars a cell: 0.66-0.79 at R 5000, S/N >= 30 on "
        "2.5 pixels a FWHM, 1.22-1.32 at R 2000, S/N >= 30 on linear pixels (errors too large, resp. too small; "
        "an sd from 12-18 stars is itself uncertain by ~0.2)"))),
])
def test_off_grid_types_pulls(r, snr):
    """Issue 11's acceptance on synthetic types no template has: (measured - true)/rv_err with sd in 0.8-1.25.

    Measured on these stars: 1.20, 0.93, 0.89 in the first three cells (1.30, 0.88, 0.87 before the template
    weights were scaled by the mismatch beyond the noise: the first cell was this test's known gap).
    """
    dv, err = _off_grid_runs(r, snr)
    assert 0.8 <= np.std(dv / err, ddof=1) <= 1.25, (r, snr, dv / err)


def test_spectra_of_one_setup_with_their_own_wavelength_solutions_share_one_grid():
    # A night's exposures each carry their own wavelength solution: pixels a fraction of a pixel
    # (or a few pixels) apart, dispersions a little different. Their ln-lambda grids must be the
    # same, or every exposure rebuilds every template (225 CPU ms against 18 ms a spectrum,
    # benchmarks/bench_velocity.py --speed). The grid still covers each spectrum's data.
    from specan.velocity.grid import GRID_BLOCK, observe_on_grid

    grids = []
    for start, disp in ((4000.0, 0.625), (4000.3, 0.625), (4001.9, 0.6252), (3999.4, 0.6249)):
        s = synth.spectrum("G2", "V", snr=80, seed=3, wave=(start + disp * np.arange(4000)) * u.AA,
                           resolving_power=2000)
        obs = observe_on_grid(velocity.normalised(s, []))
        lnw = np.log(s.spectral_axis.to_value(u.AA))
        assert obs.grid[0] <= lnw[0] + 1e-9 and obs.grid[-1] >= lnw[-1] - 1e-9
        assert obs.n_data >= obs.n - 2 * GRID_BLOCK and obs.valid.sum() <= obs.n_data
        grids.append((obs.grid[0], obs.step, obs.n))
    assert len(set(grids)) == 1, grids


def test_a_degenerate_segment_does_not_blow_up_the_error():
    # An F3 IV star at -773 km/s on linear pixels (R 2000, S/N 100): two segment boundaries 2 grid
    # pixels apart made a segment whose noise error was 5e-149 pixel and whose vertex was rounding
    # (9e-16), a Birge ratio of 6e116 and rv_err 2e116 km/s (measured). Such a segment is not used;
    # the error stays that of its neighbours' cells (0.4-0.6 km/s, bench_velocity.py --other-types).
    wave = np.arange(3850.0, 7300.0, 3850.0 / (2000.0 * 2.5)) * u.AA
    s = synth.spectrum("F3", "IV", resolving_power=2000.0, rv=-773.2429629224457 * u.km / u.s, snr=100.0, seed=306,
                       wave=wave)
    res = velocity.measure(s, barycentric=False)
    assert 0.05 < res["rv_err"].to_value(u.km / u.s) < 3.0
    assert abs(res["rv"].to_value(u.km / u.s) + 773.24) < 3 * res["rv_err"].to_value(u.km / u.s)
    assert np.isfinite(res["birge_ratio"]) and res["birge_ratio"] < 100


@pytest.mark.parametrize("snr", [10.0, 300.0])
def test_noise_error_without_error_array_as_with_it(kurucz_model, snr):
    """The same noisy Kurucz Sun (photon noise of known sigma) with and without its error array: the
    noise error from the flux alone (specan.noise.flux_noise, the estimate prepare's S/N rests on) within
    20% of the one the error array gives (ours). Measured on these spectra before (DER_SNR at the
    continuum): 0.52-0.55x at S/N 10 (its near-continuum cut clipped the noise's tails), 2.22-2.23x at
    S/N 300 (unresolved lines read as noise); now 0.91-0.95x and 0.85-0.89x."""
    ratios = []
    for i, v in enumerate((-345.6, 123.4)):
        s = _observe(kurucz_model, 2000.0, v, snr=snr, seed=500 + i, pixels=np.arange(3850.0, 7300.0, 3850.0 / 5000.0))
        with_array = velocity.measure(s, barycentric=False)["rv_err_noise"].to_value(KMS)
        s.uncertainty = None
        without = velocity.measure(s, barycentric=False)
        assert any("pixel errors: flux:" in n for n in without["notes"])
        ratios.append(without["rv_err_noise"].to_value(KMS) / with_array)
    assert np.all(np.abs(np.array(ratios) - 1.0) < 0.2), ratios


def test_noise_error_without_error_array_follows_correlated_pixels(kurucz_model):
    """Noise smoothed by resampling (each pixel the mean of two neighbours): the flux estimate finds no
    white-noise plateau and falls back on DER_SNR, whose noise is then the pixels' own (not a plateau's
    below it); the velocity's scatter over realisations stays within 2x of the noise error (it is
    propagated as if the pixels were independent, so some excess is expected)."""
    pix = np.arange(3850.0, 7300.0, 3850.0 / 5000.0)
    got, errs = [], []
    for i in range(10):
        s = _observe(kurucz_model, 2000.0, 50.0, snr=40.0, seed=900 + i, pixels=pix)
        f = s.flux.value
        smooth = 0.5 * (f + np.roll(f, 1))
        smooth[0] = f[0]
        s = Spectrum(flux=smooth * u.dimensionless_unscaled, spectral_axis=s.spectral_axis, meta=s.meta)
        res = velocity.measure(s, barycentric=False)
        assert any("DER_SNR" in n for n in res["notes"] if n.startswith("error budget")), res["notes"]
        got.append(res["rv"].to_value(KMS))
        errs.append(res["rv_err_noise"].to_value(KMS))
    ratio = np.std(got, ddof=1) / np.sqrt(np.mean(np.square(errs)))
    assert 0.5 < ratio < 2.0, ratio
