"""Reader tests: real library files, FITS round trips, metadata, air/vacuum, bad input."""

import numpy as np
import pytest
import astropy.units as u
from astropy.io import fits
from astropy.time import Time
from astropy.wcs import WCS
from astropy.coordinates import EarthLocation

import specan
from specan.errors import (CorruptFileError, EmptyFileError, NoWavelengthError, NonMonotonicError,
                           ReadError, SpecanError)
from specan.obsinfo import air_to_vacuum, get_info, vacuum_to_air

N = 1500


def _flux(n=N):
    x = np.linspace(0, 1, n)
    return 1.0 + 0.2 * x - 0.5 * np.exp(-0.5 * ((x - 0.4) / 0.003) ** 2)


# --- the real reference library ---------------------------------------------------------

@pytest.mark.reference
def test_every_reference_file_reads_in_nm(jhc1984, jhc_catalog):
    # JHC (1984) library as distributed here: nm, 349.70-744.2 nm every 0.14 nm, 2819 pixels (its README)
    for row in jhc_catalog:
        s = specan.read(jhc1984 / row["file"])
        w = s.spectral_axis.to_value(u.AA)
        assert w.size == 2819, row["id"]
        assert w[0] == pytest.approx(3497.0, abs=1e-6), row["id"]
        assert w[-1] == pytest.approx(7442.0, abs=2.0), row["id"]
        assert np.allclose(np.diff(w), 1.4, atol=1e-6)
        assert get_info(s).object == row["id"]


# --- FITS conventions (Greisen et al. 2006); astropy.wcs is the outside reference -------

def _expected_from_wcs(header, n):
    """Wavelengths in Angstrom by astropy's own WCS implementation of Greisen et al. (2006)."""
    w = WCS(header, naxis=1)
    world = w.all_pix2world(np.arange(n, dtype=float), 0)[0]
    unit = u.Unit(w.wcs.cunit[0]) if str(w.wcs.cunit[0]) else u.m
    return (world * unit).to_value(u.AA)


@pytest.mark.parametrize("ctype,cunit,crval,step,key,crpix", [
    ("WAVE", "Angstrom", 4000.0, 1.25, "CDELT1", 1.0),
    ("AWAV", "nm", 400.0, 0.125, "CD1_1", 11.5),
    ("WAVE-LOG", "m", 4.0e-7, 1.0e-11, "CDELT1", 1.0),
    ("AWAV-LOG", "um", 0.4, 1.0e-5, "CD1_1", 3.0),
])
def test_fits_image_wcs_round_trip(tmp_path, ctype, cunit, crval, step, key, crpix):
    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h[key], h["CRPIX1"] = ctype, cunit, crval, step, crpix
    h["BUNIT"] = "erg / (s cm2 Angstrom)"
    path = tmp_path / "s.fits"
    fits.PrimaryHDU(_flux().astype(np.float32), header=h).writeto(path)
    s = specan.read(path)
    expected = _expected_from_wcs(h, N)
    got = s.spectral_axis.to_value(u.AA)
    assert np.allclose(got, expected, rtol=1e-7, atol=0)
    assert get_info(s).medium == ("air" if ctype.startswith("AWAV") else "vacuum")
    assert not get_info(s).medium_assumed
    assert s.flux.unit == u.erg / u.s / u.cm**2 / u.AA


def test_fits_image_without_ctype_or_cunit_guesses_angstrom_and_says_so(tmp_path):
    h = fits.Header()
    h["CRVAL1"], h["CDELT1"] = 3800.0, 2.0
    path = tmp_path / "bare.fits"
    fits.PrimaryHDU(_flux(), header=h).writeto(path)
    s = specan.read(path)
    # no CRPIX1: the standard's default 0, as astropy.wcs applies it (units in Angstrom here)
    expected = _expected_from_wcs(h, N) * 1e-10
    assert np.allclose(s.spectral_axis.to_value(u.AA), expected, rtol=1e-12, atol=0)
    assert s.spectral_axis.to_value(u.AA)[0] == pytest.approx(3802.0)
    info = get_info(s)
    assert info.medium_assumed and any("guessed" in w for w in info.warnings)
    assert any("medium not stated" in w for w in info.warnings)
    assert any("CRPIX1 missing" in w for w in info.warnings)


def test_fits_image_pc_matrix_scales_the_step(tmp_path):
    # CDELT1 with PC1_1 = 2: the step is their product (Greisen & Calabretta 2002), as astropy.wcs has it
    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h["CDELT1"], h["PC1_1"], h["CRPIX1"] = \
        "WAVE", "Angstrom", 4000.0, 1.0, 2.0, 1.0
    path = tmp_path / "pc.fits"
    fits.PrimaryHDU(_flux(), header=h).writeto(path)
    got = specan.read(path).spectral_axis.to_value(u.AA)
    assert np.allclose(got, _expected_from_wcs(h, N), rtol=1e-12, atol=0)
    assert got[1] - got[0] == pytest.approx(2.0)


def _linear_header(crval, cdelt):
    """A linear air-wavelength WCS in Angstrom whose first pixel is at ``crval``."""
    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h["CDELT1"], h["CRPIX1"] = "AWAV", "Angstrom", crval, cdelt, 1.0
    return h


def _mef_file(path):
    """An empty primary HDU, the spectrum in extension FLUX and its error in ERR; the path."""
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(_flux(), header=_linear_header(5000.0, 0.5), name="FLUX"),
                  fits.ImageHDU(np.full(N, 0.02), name="ERR")]).writeto(path)
    return path


def test_fits_image_error_extension_and_multi_extension(tmp_path):
    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h["CDELT1"] = "AWAV", "Angstrom", 5000.0, 0.5
    err = np.full(N, 0.02)
    hdul = fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(_flux(), header=h, name="FLUX"),
                         fits.ImageHDU(err, name="ERR")])
    path = tmp_path / "mef.fits"
    hdul.writeto(path)
    s = specan.read(path)
    assert get_info(s).hdu == 1
    assert np.allclose(s.uncertainty.array, 0.02)
    s2 = specan.read(path, hdu="FLUX")
    assert np.allclose(s2.spectral_axis.value, s.spectral_axis.value)


def test_gzipped_fits_read_like_plain_fits(tmp_path):
    # .fits.gz (README, pipeline suffixes): specan's own FITS reader, options included, as astropy opens it
    import gzip

    plain = _mef_file(tmp_path / "mef.fits")
    packed = tmp_path / "mef.fits.gz"
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    a, b = specan.read(plain), specan.read(packed, hdu="FLUX")
    assert get_info(b).format == get_info(a).format == "fits-image"
    assert np.array_equal(a.spectral_axis.value, b.spectral_axis.value)
    assert np.allclose(b.uncertainty.array, 0.02)
    # cut short: a one-line error, not a crash
    (tmp_path / "cut.fits.gz").write_bytes(packed.read_bytes()[:200])
    with pytest.raises(SpecanError, match="truncated"):
        specan.read(tmp_path / "cut.fits.gz")


def test_fits_binary_table_with_inverse_variance(tmp_path):
    wave = np.linspace(4000.0, 7000.0, N)
    ivar = np.full(N, 2500.0)
    ivar[10] = 0.0  # zero weight -> masked
    cols = [fits.Column("WAVELENGTH", "D", unit="Angstrom", array=wave),
            fits.Column("FLUX", "E", unit="erg/(s cm2 Angstrom)", array=_flux()),
            fits.Column("IVAR", "E", array=ivar)]
    path = tmp_path / "tab.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    s = specan.read(path)
    assert np.allclose(s.spectral_axis.to_value(u.AA), wave, rtol=1e-7)
    assert np.allclose(s.uncertainty.array[~s.mask], 0.02)  # 1/sqrt(2500)
    assert s.mask[10] and s.mask.sum() == 1


def test_fits_table_vector_cells_in_nm(tmp_path):
    wave = np.linspace(400.0, 700.0, N)
    cols = [fits.Column("WAVE", f"{N}D", unit="nm", array=wave[None, :]),
            fits.Column("FLUX", f"{N}E", array=_flux()[None, :]),
            fits.Column("ERR", f"{N}E", array=np.full((1, N), 0.01))]
    path = tmp_path / "vec.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    s = specan.read(path)
    assert np.allclose(s.spectral_axis.to_value(u.AA), wave * 10, rtol=1e-7)


# --- metadata: times, pointing, site --------------------------------------------------------

def _image_with(tmp_path, cards, name="m.fits"):
    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h["CDELT1"] = "AWAV", "Angstrom", 4000.0, 1.0
    for k, v in cards.items():
        h[k] = v
    path = tmp_path / name
    fits.PrimaryHDU(_flux(), header=h).writeto(path)
    return path


def test_mid_exposure_from_date_obs_and_exptime(tmp_path):
    path = _image_with(tmp_path, {"DATE-OBS": "2026-03-14T21:05:30.5", "EXPTIME": 1200.0, "TIMESYS": "UTC"})
    info = get_info(specan.read(path))
    expected = Time("2026-03-14T21:15:30.5", scale="utc")  # start + EXPTIME/2 (FITS standard meaning)
    assert abs((info.time_mid - expected).to_value(u.s)) < 1e-3


def test_mid_exposure_from_mjd_obs(tmp_path):
    path = _image_with(tmp_path, {"MJD-OBS": 61000.25, "EXPTIME": 864.0})
    info = get_info(specan.read(path))
    assert info.mjd_mid == pytest.approx(61000.25 + 0.005, abs=1e-9)


@pytest.mark.parametrize("ra,dec", [(83.822083, -5.391111), ("05:35:17.3", "-05:23:28")])
def test_pointing_degrees_and_sexagesimal(tmp_path, ra, dec):
    path = _image_with(tmp_path, {"RA": ra, "DEC": dec, "RADESYS": "ICRS"})
    info = get_info(specan.read(path))
    assert info.ra_deg == pytest.approx(83.822083, abs=1e-4)  # 5h35m17.3s = 83.82208 deg
    assert info.dec_deg == pytest.approx(-5.391111, abs=1e-4)


def test_site_from_obsgeo_xyz_and_blh(tmp_path):
    site = EarthLocation.from_geodetic(-17.8792 * u.deg, 28.7606 * u.deg, 2332.0 * u.m)
    x, y, z = (c.to_value(u.m) for c in site.geocentric)
    a = get_info(specan.read(_image_with(tmp_path, {"OBSGEO-X": x, "OBSGEO-Y": y, "OBSGEO-Z": z}, "a.fits")))
    b = get_info(specan.read(_image_with(tmp_path, {"OBSGEO-B": 28.7606, "OBSGEO-L": -17.8792, "OBSGEO-H": 2332.0},
                                         "b.fits")))
    for info in (a, b):
        assert info.site.lat.deg == pytest.approx(28.7606, abs=1e-7)
        assert info.site.lon.deg == pytest.approx(-17.8792, abs=1e-7)
        assert info.site.height.to_value(u.m) == pytest.approx(2332.0, abs=1e-3)


def test_site_made_once_per_observatory_and_each_file_gets_its_own(tmp_path):
    # The reader keeps the EarthLocation of each observatory it has met (a night shares one);
    # a file from another observatory must still get its own, and a repeat the same place.
    cards = [{"OBSGEO-B": 28.7606, "OBSGEO-L": -17.8792, "OBSGEO-H": 2332.0},
             {"OBSGEO-B": -24.6272, "OBSGEO-L": -70.4042, "OBSGEO-H": 2635.0},
             {"OBSGEO-B": 28.7606, "OBSGEO-L": -17.8792, "OBSGEO-H": 2332.0}]
    sites = [get_info(specan.read(_image_with(tmp_path, c, f"s{i}.fits"))).site for i, c in enumerate(cards)]
    for site, c in zip(sites, cards):
        assert site.lat.deg == pytest.approx(c["OBSGEO-B"], abs=1e-7)
        assert site.lon.deg == pytest.approx(c["OBSGEO-L"], abs=1e-7)
    assert sites[0] is sites[2] and sites[1] is not sites[0]


def test_site_override_and_unknowns_recorded(tmp_path):
    path = _image_with(tmp_path, {})
    s = specan.read(path)
    info = get_info(s)
    assert info.site is None and info.time_mid is None and info.ra_deg is None
    assert any("--site" in w for w in info.warnings)
    s2 = specan.read(path, site="-29.2563,-70.7380,2400", ra="10.5", dec="-20")
    i2 = get_info(s2)
    assert i2.site.lat.deg == pytest.approx(-29.2563) and i2.site_source == "override"
    assert i2.ra_deg == pytest.approx(10.5)


# --- text files ---------------------------------------------------------------------------

@pytest.mark.parametrize("header,scale", [("# wavelength [nm]  flux", 10.0), ("# lambda (Angstrom), flux, err", 1.0),
                                          ("wave_nm,flux", 10.0)])
def test_text_units_from_header_tokens(tmp_path, header, scale):
    wave = np.linspace(4000.0, 7000.0, 200) / scale  # values as written, in the file's unit
    sep = "," if "," in header else " "
    lines = [header] + [sep.join([f"{w:.9f}", "1.0", "0.1"]) for w in wave]
    path = tmp_path / "t.txt"
    path.write_text("\n".join(lines))
    s = specan.read(path)
    assert np.allclose(s.spectral_axis.to_value(u.AA), wave * scale, rtol=1e-7)


def test_text_without_unit_needs_wave_unit(tmp_path):
    path = tmp_path / "nounit.dat"
    path.write_text("\n".join(f"{w} 1.0" for w in np.linspace(4000, 5000, 50)))
    with pytest.raises(NoWavelengthError, match="--wave-unit"):
        specan.read(path)
    s = specan.read(path, wave_unit="Angstrom")
    assert s.spectral_axis.to_value(u.AA)[0] == pytest.approx(4000.0)


def test_text_with_four_columns_is_refused_not_truncated(tmp_path):
    # 2-3 columns are understood (wavelength, flux, error); a fourth would be dropped unseen.
    path = tmp_path / "four.txt"
    path.write_text("# wavelength [Angstrom] flux err sky\n"
                    + "\n".join(f"{w} 1.0 0.1 5.0" for w in np.linspace(4000, 5000, 50)))
    with pytest.raises(SpecanError, match="2-3 columns"):
        specan.read(path)


# --- air / vacuum (NIST ASD laboratory pairs) -----------------------------------------------

@pytest.mark.parametrize("air,vac", [
    (6562.80, 6564.61),   # H alpha, NIST ASD
    (5889.95, 5891.58),   # Na I D2, NIST ASD
    (3933.66, 3934.78),   # Ca II K, NIST ASD
    (4861.33, 4862.68),   # H beta, NIST ASD (from memory)
])
def test_air_vacuum_pairs_match_laboratory_values(air, vac):
    assert air_to_vacuum(air * u.AA).to_value(u.AA) == pytest.approx(vac, abs=0.02)
    assert vacuum_to_air(vac * u.AA).to_value(u.AA) == pytest.approx(air, abs=0.02)
    back = vacuum_to_air(air_to_vacuum(air * u.AA)).to_value(u.AA)
    assert back == pytest.approx(air, abs=1e-4)


# --- bad input: one-line specan errors ------------------------------------------------------

def test_empty_file(tmp_path):
    p = tmp_path / "empty.fits"
    p.write_bytes(b"")
    with pytest.raises(EmptyFileError, match="empty"):
        specan.read(p)


def test_truncated_fits(tmp_path):
    path = _image_with(tmp_path, {})
    data = path.read_bytes()
    cut = tmp_path / "cut.fits"
    cut.write_bytes(data[: len(data) - 3000])
    with pytest.raises(CorruptFileError, match="truncated"):
        specan.read(cut)


def test_non_monotonic_names_the_pixel(tmp_path):
    wave = np.linspace(4000, 5000, 100)
    wave[57] = wave[55]
    p = tmp_path / "nonmono.txt"
    p.write_text("# wavelength [Angstrom] flux\n" + "\n".join(f"{w} 1.0" for w in wave))
    with pytest.raises(NonMonotonicError, match="pixel 57"):
        specan.read(p)


def test_decreasing_wavelengths_are_reversed(tmp_path):
    wave = np.linspace(5000, 4000, 100)
    p = tmp_path / "dec.txt"
    p.write_text("# wavelength [Angstrom] flux\n" + "\n".join(f"{w} {w / 1000}" for w in wave))
    s = specan.read(p)
    assert np.all(np.diff(s.spectral_axis.value) > 0)
    assert s.flux.value[0] == pytest.approx(4.0)


def test_image_hdu_without_wavelength_axis(tmp_path):
    p = tmp_path / "nowcs.fits"
    fits.PrimaryHDU(_flux()).writeto(p)
    with pytest.raises(NoWavelengthError, match="--hdu"):
        specan.read(p)


def test_spectrum_passed_in_python_is_taken_as_is():
    from specutils import Spectrum

    s = Spectrum(spectral_axis=np.linspace(4000, 5000, 50) * u.AA, flux=np.ones(50) * u.Jy)
    out = specan.read(s, medium="vacuum")
    assert get_info(out).medium == "vacuum"
    assert np.allclose(out.flux.value, 1.0)


def test_errors_form_one_hierarchy():
    assert issubclass(NonMonotonicError, SpecanError) and issubclass(CorruptFileError, SpecanError)


def test_fits_without_final_padding_is_read_with_a_warning(tmp_path):
    # FITS standard 4.0 sect. 3.1: files are whole 2880-byte records. Some writers drop the last
    # record's padding; the data are complete, so the file is read and the omission is noted.
    # A cut inside the data, or one that loses the end of a later HDU, is still refused.
    path = _image_with(tmp_path, {})
    data = path.read_bytes()
    with fits.open(path) as hdul:
        end = hdul.fileinfo(len(hdul) - 1)["datLoc"] + hdul[-1].size
    assert end < len(data) and len(data) % 2880 == 0
    short = tmp_path / "unpadded.fits"
    short.write_bytes(data[:end])
    spec = specan.read(short)
    ref = specan.read(path)
    assert np.array_equal(spec.flux.value, ref.flux.value)
    assert any("2880" in w for w in get_info(spec).warnings)
    for cut in (end - 8, end - 1):
        bad = tmp_path / f"cut{cut}.fits"
        bad.write_bytes(data[:cut])
        with pytest.raises(CorruptFileError, match="truncated"):
            specan.read(bad)


def test_fits_cut_inside_an_extension_header_is_refused(tmp_path):
    # astropy drops an HDU whose header is cut, with a warning; specan must not read on silently
    plain = _mef_file(tmp_path / "mef.fits")
    data = plain.read_bytes()
    with fits.open(plain) as hdul:
        err_header = hdul.fileinfo(2)["hdrLoc"]
    cut = tmp_path / "cut.fits"
    cut.write_bytes(data[: err_header + 100])
    with pytest.raises(CorruptFileError, match="truncated"):
        specan.read(cut)


def test_air_vacuum_conversion_reaches_into_the_ultraviolet():
    # specutils refuses the Morton (2000) formula below 2500 A; a spectrum reaching there (a
    # model, or a space-ultraviolet one merged with optical) must still convert: continuous,
    # increasing, and exactly specutils' Morton (2000) values from 2500 A up.
    from specutils.utils.wcs_utils import vac_to_air

    w = np.linspace(1200.0, 9000.0, 20001) * u.AA
    air = vacuum_to_air(w)
    assert np.all(np.diff(air.value) > 0)
    assert np.max(np.abs(np.diff(air.value) - np.diff(w.value))) < 1e-3     # no jump at 2500 A
    high = w >= 2500 * u.AA
    assert np.allclose(air[high].value, vac_to_air(w[high], method="Morton2000").value, rtol=0, atol=1e-9)
    back = air_to_vacuum(air)
    assert np.max(np.abs(back - w).to_value(u.AA)) < 1e-3
    assert vacuum_to_air(5000.0 * u.AA).shape == ()


@pytest.mark.parametrize("shape", ["bands", "bands_apertures"])
def test_multi_band_image_of_one_aperture(tmp_path, shape):
    # The layout long-slit extraction packages write for one aperture (common practice, card
    # names from memory): bands along the last-but-one axes, BANDIDn naming each; band 1 is the
    # optimally extracted spectrum and the band named "sigma" its standard deviation.
    flux = _flux()
    bands = np.stack([flux, flux * 1.1, np.full(N, 0.3), np.full(N, 0.02)])
    data = bands if shape == "bands" else bands[:, None, :]
    h = _linear_header(4000.0, 1.0)
    for k, name in enumerate(["spectrum - background fit, weights variance, clean no",
                              "raw - background fit, weights none, clean no",
                              "background - background fit", "sigma - background fit, weights variance, clean no"]):
        h[f"BANDID{k + 1}"] = name
    path = tmp_path / "bands.fits"
    fits.PrimaryHDU(data, header=h).writeto(path)
    s = specan.read(path)
    assert np.allclose(s.flux.value, flux)
    assert np.allclose(s.uncertainty.array, 0.02)
    assert any("band 4" in w and "sigma" in w for w in get_info(s).warnings)
    # without band names: the first band, no errors, and the warning says so
    for k in range(1, 5):
        del h[f"BANDID{k}"]
    fits.PrimaryHDU(data, header=h).writeto(path, overwrite=True)
    s = specan.read(path)
    assert np.allclose(s.flux.value, flux) and s.uncertainty is None
    assert any("no band named sigma" in w for w in get_info(s).warnings)


def test_unstandard_site_keywords_are_named_not_guessed(tmp_path):
    # SITELAT/SITELONG and the like carry no agreed longitude sign: specan must not guess
    # (a sign error biases the barycentric correction), but must say what it saw and the fix.
    info = get_info(specan.read(_image_with(tmp_path, {"SITELAT": "+28 45 38", "SITELONG": "-17 52 45",
                                                       "DATE-OBS": "2026-03-14T21:05:30"})))
    assert info.site is None
    assert any("SITELONG=-17 52 45" in w and "--site" in w for w in info.warnings)


def test_image_of_several_apertures_is_refused_with_the_fix(tmp_path):
    # Rows that are apertures (APNUMn cards name each), not bands of one: reading row 1 as "the"
    # spectrum would silently drop the others, so the reader says what the file is instead.
    h = _linear_header(4000.0, 1.0)
    h["APNUM1"], h["APNUM2"], h["APNUM3"] = "1 1 10.5 20.5", "2 2 40.1 50.2", "3 3 70.0 80.3"
    path = tmp_path / "apertures.fits"
    fits.PrimaryHDU(np.stack([_flux(), _flux(), _flux()]), header=h).writeto(path)
    with pytest.raises(ReadError, match="3 apertures"):
        specan.read(path)


def test_vacuum_spectrum_in_air_is_vacuum_to_air_to_the_bit(kurucz_sun):
    # wavelength_in converts plain arrays without Quantities: the same numbers as vacuum_to_air
    # (specutils' Morton 2000), on the Kurucz Sun's wavelengths (rms-solar) and into the ultraviolet
    from specutils import Spectrum

    from specan.obsinfo import ObsInfo, wavelength_in

    w_sun, f_sun, _ = kurucz_sun
    rng = np.random.default_rng(3)
    for w in (w_sun, np.sort(rng.uniform(1500.0, 30000.0, 5000)), np.linspace(2000.0, 3000.0, 777)):
        spec = Spectrum(flux=np.ones(w.size) * u.dimensionless_unscaled, spectral_axis=w * u.AA,
                        meta={"specan": ObsInfo(medium="vacuum", medium_assumed=False)})
        assert np.array_equal(wavelength_in(spec, "air"), vacuum_to_air(w * u.AA).to_value(u.AA))
    nm = Spectrum(flux=np.ones(50) * u.dimensionless_unscaled, spectral_axis=np.linspace(400.0, 700.0, 50) * u.nm,
                  meta={"specan": ObsInfo(medium="vacuum", medium_assumed=False)})
    assert np.array_equal(wavelength_in(nm, "air"), vacuum_to_air(nm.spectral_axis.to(u.AA)).to_value(u.AA))


@pytest.mark.parametrize("ctype,cunit,crval,step,key,crpix", [
    ("WAVE", "Angstrom", 4000.0, 1.25, "CDELT1", 1.0),
    ("AWAV", "nm", 400.0, 0.125, "CD1_1", 11.5),
    ("AWAV", "Angstrom", 9000.0, -0.75, "CDELT1", 1.0),   # decreasing: read reversed
    ("WAVE-LOG", "m", 4.0e-7, 1.0e-11, "CDELT1", 1.0),
])
def test_spectrum_wcs_describes_the_wavelengths_read(tmp_path, ctype, cunit, crval, step, key, crpix):
    # a linear axis gets a 1-D FITS WCS (cheaper than specutils' lookup table), a log-linear one
    # specutils' own; either gives the wavelengths read (astropy.wcs's implementation of Greisen et
    # al. 2006 is the outside reference) to 1e-12, and prepare() hands the WCS on with the axis
    from specutils.utils.wcs_utils import SpectralGWCS

    from specan.io import LINEAR_TOLERANCE

    h = fits.Header()
    h["CTYPE1"], h["CUNIT1"], h["CRVAL1"], h[key], h["CRPIX1"] = ctype, cunit, crval, step, crpix
    path = tmp_path / "s.fits"
    fits.PrimaryHDU(_flux().astype(np.float32), header=h).writeto(path)
    s = specan.read(path)
    got = s.spectral_axis.to_value(u.AA)
    expected = _expected_from_wcs(h, N)
    assert np.allclose(got, expected[::-1] if step < 0 else expected, rtol=1e-12, atol=0)
    described = s.wcs.pixel_to_world(np.arange(N)).to_value(u.AA)
    assert np.max(np.abs(described / got - 1.0)) <= 2 * LINEAR_TOLERANCE
    if ctype.endswith("-LOG"):
        assert isinstance(s.wcs, SpectralGWCS)
    else:
        assert isinstance(s.wcs, WCS) and s.wcs.wcs.ctype[0] == ctype
    p = specan.prepare(s)
    assert p.wcs is s.wcs and p.spectral_axis is s.spectral_axis


def test_linear_wcs_only_for_a_linear_axis():
    from specan.io import linear_wcs

    w = 4000.0 + 0.5 * np.arange(3000)
    assert linear_wcs(w) is not None and linear_wcs(w, "vacuum").wcs.ctype[0] == "WAVE"
    bent = w.copy()
    bent[1500] += 1e-6            # 2e-10 relative: not linear
    assert linear_wcs(bent) is None
    assert linear_wcs(np.exp(np.linspace(8.3, 8.6, 3000))) is None
    assert linear_wcs(w[:1]) is None


def test_header_cards_are_the_cards_astropy_parses(tmp_path):
    # ObsInfo.header parses a card when it is read; its names and values are what astropy's own
    # Header gives card by card (repeated names: the first card's value), COMMENT/HISTORY/blank left out
    from specan.io._common import HeaderCards

    h = fits.Header()
    h.update({"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": 4000.0, "CDELT1": 1.25,
              "OBJECT": "HD 1 ", "EXPTIME": 300, "FLAG": True, "BIG": 1.5e300})
    h["COMMENT"] = "a comment"
    h["HISTORY"] = "a history"
    h.append(("", "blank card"))
    h.append(("NOTE", "first"))
    h.append(("NOTE", "second"))
    path = tmp_path / "s.fits"
    fits.PrimaryHDU(_flux().astype(np.float32), header=h).writeto(path)
    info = get_info(specan.read(path))
    on_disk = fits.getheader(path)
    expected = {k: on_disk[k] for k in on_disk.keys() if k not in ("COMMENT", "HISTORY", "")}
    assert isinstance(info.header, HeaderCards)
    assert list(info.header) == list(expected) and dict(info.header) == expected
    assert info.header["NOTE"] == "first" and info.header["OBJECT"] == "HD 1" and info.header["FLAG"] is True
    assert "COMMENT" not in info.header and len(info.header) == len(expected)
    with pytest.raises(KeyError):
        info.header["HISTORY"]
    copied = info.copy()
    assert dict(copied.header) == expected
    prepared = get_info(specan.prepare(specan.read(path)))
    assert dict(prepared.header) == expected


@pytest.mark.parametrize("unit", [u.AA, u.nm, u.um])
def test_wavelengths_in_angstrom_are_astropys_conversion(unit):
    # wavelength_in and spectrum_arrays copy an axis already in Angstrom and convert any other as
    # astropy does: the same numbers, and never a view the caller could write into the spectrum through
    from specutils import Spectrum

    from specan.obsinfo import ObsInfo, spectrum_arrays, wavelength_in

    axis = (np.linspace(4000.0, 5000.0, 700) * u.AA).to(unit)
    s = Spectrum(spectral_axis=axis, flux=np.ones(700) * u.one, meta={"specan": ObsInfo(medium="air")})
    for w in (wavelength_in(s, "air"), spectrum_arrays(s)[0]):
        assert np.array_equal(w, s.spectral_axis.to_value(u.AA))
        w[0] = -1.0
        assert s.spectral_axis[0].to_value(u.AA) > 0


# --- start-up: specutils without ndcube's pyplot (specan/_imports.py) ----------------------

def test_reader_import_leaves_pyplot_out_and_the_plotter_still_works():
    # A fresh interpreter: importing the reader imports specutils but not matplotlib.pyplot
    # (ndcube resolves its plotter at class definition only for a docstring); a Spectrum's
    # .plotter, ndcube's own plotting entry, still imports it when used.
    import subprocess
    import sys

    code = ("import sys, numpy as np, astropy.units as u\n"
            "import specan.io\n"
            "print('specutils' in sys.modules, 'matplotlib.pyplot' in sys.modules,"
            " 'ndcube.visualization.mpl_plotter' in sys.modules)\n"
            "from specutils import Spectrum\n"
            "s = Spectrum(flux=np.ones(5) * u.Jy, spectral_axis=np.arange(1.0, 6.0) * u.AA)\n"
            "print(type(s.plotter).__name__, 'matplotlib.pyplot' in sys.modules)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split("\n")[:2] == ["True False False", "MatplotlibPlotter True"]
