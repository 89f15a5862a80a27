"""Tests of specan.synth: the synthetic spectrum model used for templates and the demo."""

import astropy.units as u
import numpy as np
import pytest

from specan import synth
from specan.obsinfo import get_info

C_KMS = 299792.458  # CODATA/IAU exact speed of light


def _line_min(spec, centre, half=6.0):
    w = spec.spectral_axis.to_value(u.AA)
    f = spec.flux.value
    sel = np.abs(w - centre) < half
    i = np.argmin(f[sel])
    # parabola through the three lowest samples for a sub-pixel minimum
    j = np.flatnonzero(sel)[i]
    y0, y1, y2 = f[j - 1], f[j], f[j + 1]
    d = 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    return w[j] + d * (w[j + 1] - w[j - 1]) / 2


def _ew(spec, centre, half):
    w = spec.spectral_axis.to_value(u.AA)
    f = spec.flux.value
    sel = np.abs(w - centre) < half
    return np.trapezoid(1 - f[sel], w[sel])


def test_metadata_and_units():
    s = synth.spectrum("G2", "V", resolving_power=3000, medium="vacuum")
    info = get_info(s)
    assert info.medium == "vacuum" and not info.medium_assumed
    assert info.resolving_power == 3000 and info.normalized
    assert s.spectral_axis.unit == u.AA and s.flux.unit == u.dimensionless_unscaled
    # default grid: log-uniform with 2.5 pixels per FWHM
    dl = np.diff(np.log(s.spectral_axis.value))
    assert np.allclose(dl, 1 / (3000 * 2.5), rtol=1e-9)


def test_air_and_vacuum_positions():
    # Na D2: NIST ASD 5889.95 A air, 5891.58 A vacuum (from memory; Morton 2000 conversion)
    kw = dict(resolving_power=20000, wave_range=(5850, 5930) * u.AA, pixels_per_fwhm=5)
    air = synth.spectrum("K0", medium="air", **kw)
    vac = synth.spectrum("K0", medium="vacuum", **kw)
    assert _line_min(air, 5889.95, 0.5) == pytest.approx(5889.95, abs=0.02)
    assert _line_min(vac, 5891.58, 0.5) == pytest.approx(5891.58, abs=0.02)


@pytest.mark.parametrize("rv", [-800.0, 250.0, 900.0])
def test_doppler_shift_is_relativistic(rv):
    # astropy's relativistic spectral equivalency is the reference
    rest = 6564.61 * u.AA  # H alpha vacuum (NIST ASD, from memory)
    expected = (rv * u.km / u.s).to(u.AA, equivalencies=u.doppler_relativistic(rest))
    s = synth.spectrum("A0", resolving_power=20000, medium="vacuum", rv=rv * u.km / u.s,
                       wave_range=(6500, 6600) * u.AA, pixels_per_fwhm=6)
    ident = synth.line_strengths("A0")
    w0 = ident["wave_vac"][ident["id"] == "H_alpha"][0]
    exp2 = (rv * u.km / u.s).to(u.AA, equivalencies=u.doppler_relativistic(w0))
    assert _line_min(s, exp2.value, 3.0) == pytest.approx(exp2.value, abs=0.01)
    assert exp2.value == pytest.approx(expected.value, abs=0.2)  # the list's H alpha is where NIST has it


def _strength(sptype, ident, lumclass="V"):
    t = synth.line_strengths(sptype, lumclass)
    return float(t["strength"][t["id"] == ident][0])


def _vac(ident):
    t = synth.line_strengths("G2")
    return float(t["wave_vac"][t["id"] == ident][0].to_value(u.AA))


def test_balmer_peaks_at_early_a_and_is_broader_in_dwarfs():
    # common practice (MK atlases): Balmer strength peaks near A0-A2; A supergiants have weak, narrow lines
    ews = {t: _strength(t, "H_gamma") for t in ("O5", "B2", "B8", "A1", "A7", "F5", "G5", "K5", "M2")}
    assert max(ews, key=ews.get) == "A1"
    assert ews["B2"] < ews["B8"] < ews["A1"] > ews["A7"] > ews["F5"] > ews["G5"] > ews["K5"] > ews["M2"]
    # in the spectrum: the A1 dwarf's H gamma (plus wings) holds much more absorption than the supergiant's
    dwarf = _ew(synth.spectrum("A1", "V", wave_range=(4200, 4480) * u.AA), 4340.47, 60)
    sg = _ew(synth.spectrum("A1", "I", wave_range=(4200, 4480) * u.AA), 4340.47, 60)
    assert sg < 0.6 * dwarf
    # wings: 20 A from the core the dwarf is still clearly depressed, the supergiant hardly
    def depth(lc):
        s = synth.spectrum("A1", lc, wave_range=(4200, 4480) * u.AA)
        return 1 - np.interp(4360.5, s.spectral_axis.value, s.flux.value)

    assert depth("V") > 0.05 > depth("I")


def test_helium_and_metal_trends():
    # common practice: He II only in O stars, He I peaks near B2, Ca I 4227 and TiO grow towards M
    he2 = {t: _strength(t, "HeII_4686") for t in ("O5", "O9", "B2")}
    assert he2["O5"] > 0.3 and he2["B2"] == 0
    he1 = {t: _strength(t, "HeI_4471") for t in ("O5", "B2", "B8", "A5")}
    assert max(he1, key=he1.get) == "B2" and he1["A5"] == 0
    ca1 = [_strength(t, "CaI_4227") for t in ("A0", "F5", "G5", "K5", "M2")]
    assert np.all(np.diff(ca1) > 0)
    feI = [_strength(t, "FeI_4046") for t in ("A0", "F0", "G0", "K0")]
    assert np.all(np.diff(feI) > 0)

    # TiO 7054 band in the spectrum: depth just redward of the head
    def tio(t):
        s = synth.spectrum(t, "V", wave_range=(7000, 7200) * u.AA)
        w, f = s.spectral_axis.value, s.flux.value
        return 1 - np.median(f[(w > 7060) & (w < 7100)])

    assert tio("K0") < 0.01 < 0.1 < tio("M2") < tio("M5")


def test_noise_matches_snr():
    s = synth.spectrum("A0", snr=80, seed=3, wave_range=(5000, 5800) * u.AA)
    clean = synth.spectrum("A0", wave_range=(5000, 5800) * u.AA)
    resid = (s.flux - clean.flux).value / s.uncertainty.array
    assert np.std(resid) == pytest.approx(1.0, abs=0.05)
    # continuum S/N per pixel is the requested one
    assert np.median(s.uncertainty.array[clean.flux.value > 0.999]) == pytest.approx(1 / 80, rel=0.01)


def test_blackbody_continuum():
    s = synth.spectrum("B0", continuum="blackbody")
    cont = s.meta["continuum"].value
    w = s.spectral_axis.value
    assert not get_info(s).normalized
    # a hot star is bluer: F_lambda falls with wavelength over the optical (Planck, Rayleigh-Jeans side)
    assert cont[0] > cont[-1]
    m = synth.spectrum("M2", continuum="blackbody").meta["continuum"].value
    assert m[0] < m[-1]
    assert np.interp(5556, w, cont) == pytest.approx(1.0, rel=1e-3)


def test_binary_and_emission():
    kw = dict(resolving_power=10000, medium="vacuum", wave_range=(6350, 6700) * u.AA)
    b = synth.binary(("K0", "V"), ("K0", "V"), rv1=-150 * u.km / u.s, rv2=150 * u.km / u.s, light_ratio=0.6, **kw)
    w0 = _vac("CaI_6439")
    # two Ca I 6439 minima at the component velocities (relativistic Doppler, astropy), the deeper the brighter
    depths = []
    for rv in (-150, 150):
        x = (rv * u.km / u.s).to(u.AA, equivalencies=u.doppler_relativistic(w0 * u.AA)).value
        assert _line_min(b, x, 1.0) == pytest.approx(x, abs=0.05)
        depths.append(1 - np.interp(x, b.spectral_axis.value, b.flux.value))
    assert depths[1] / depths[0] == pytest.approx(0.6, abs=0.08)
    e = synth.spectrum("B2", "V", emission={"H_alpha": 20.0}, resolving_power=10000, medium="vacuum",
                       wave_range=(6450, 6700) * u.AA)
    ew = _ew(e, 6564.61, 30)
    assert ew == pytest.approx(-20.0, abs=1.0)  # an emission line has negative absorption EW
    with pytest.raises(ValueError):
        synth.spectrum("B2", emission={"no_such_line": 1.0})


def test_normalised_flux_is_the_spectrum_flux():
    # The velocity stage's templates come from synth.normalised_flux: the same numbers as spectrum()
    w = np.exp(np.log(3800.0) + 1e-4 * np.arange(6000))
    full = synth.spectrum("K1", "III", resolving_power=2000, wave=w * u.AA, medium="vacuum").flux.value
    assert np.array_equal(synth.normalised_flux("K1", "III", w, 2000), full)
