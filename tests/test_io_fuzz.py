"""Property-based test: whatever the input, the reader returns a Spectrum or raises a SpecanError."""


import numpy as np
from astropy.io import fits
from hypothesis import HealthCheck, given, settings, strategies as st
from specutils import Spectrum

import specan
from specan.errors import SpecanError

KEYS = ["CTYPE1", "CUNIT1", "CRVAL1", "CDELT1", "CD1_1", "CRPIX1", "DC-FLAG", "BUNIT", "DATE-OBS", "MJD-OBS",
        "EXPTIME", "RA", "DEC", "RADESYS", "EQUINOX", "OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "OBSGEO-B", "OBSGEO-L",
        "OBSGEO-H", "TIMESYS", "OBJECT", "DATE-END", "SPEC_RP"]
values = st.one_of(
    st.floats(allow_nan=True, allow_infinity=False, width=32),
    st.integers(min_value=-10**6, max_value=10**6),
    st.sampled_from(["WAVE", "AWAV", "WAVE-LOG", "AWAV-LOG", "LINEAR", "FREQ", "Angstrom", "nm", "um", "m", "Hz",
                     "2026-01-01T00:00:00", "2026-13-45", "12:30:00", "-05:23:28", "ICRS", "FK5", "", "banana",
                     "erg/s/cm2/Angstrom", "TT", "xx"]),
)
headers = st.dictionaries(st.sampled_from(KEYS), values, max_size=12)
arrays = st.lists(st.floats(allow_nan=True, allow_infinity=True, width=32), min_size=0, max_size=60)


def _outcome(path_or_obj):
    try:
        result = specan.read(path_or_obj)
    except SpecanError:
        return "error"
    assert isinstance(result, Spectrum)
    assert np.all(np.diff(result.spectral_axis.value) > 0)
    return "spectrum"


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(header=headers, data=arrays)
def test_fits_images_with_random_headers(tmp_path_factory, header, data):
    path = tmp_path_factory.mktemp("fz") / "x.fits"
    h = fits.Header()
    for k, v in header.items():
        try:
            h[k] = v
        except (ValueError, TypeError):
            continue
    arr = np.asarray(data, dtype=np.float32) if data else None
    try:
        fits.PrimaryHDU(arr, header=h).writeto(path)
    except (ValueError, TypeError, OSError, fits.verify.VerifyError):
        return  # astropy itself refuses to write this header
    _outcome(path)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=st.text(alphabet=st.sampled_from(list("0123456789.,-+eE# \t\n[]()nmAangstrom%;:=abcXYZ")), max_size=400))
def test_random_text_files(tmp_path_factory, text):
    path = tmp_path_factory.mktemp("tz") / "x.txt"
    path.write_text(text)
    _outcome(path)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(blob=st.binary(max_size=6000), prefix=st.booleans())
def test_random_bytes(tmp_path_factory, blob, prefix):
    path = tmp_path_factory.mktemp("bz") / "x.fits"
    path.write_bytes((b"SIMPLE  =                    T" + b" " * 50 if prefix else b"") + blob)
    _outcome(path)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(cols=st.lists(st.sampled_from(["WAVE", "FLUX", "ERR", "IVAR", "LOGLAM", "FOO", "wavelength", "flux"]),
                     min_size=1, max_size=4, unique=True), data=arrays,
       unit=st.sampled_from(["Angstrom", "nm", "", "Hz", "banana"]))
def test_random_tables(tmp_path_factory, cols, data, unit):
    path = tmp_path_factory.mktemp("tb") / "x.fits"
    arr = np.asarray(data or [1.0], dtype=float)
    columns = [fits.Column(name=c, format="D", array=arr, unit=(unit or None) if c.lower().startswith("wave") else None)
               for c in cols]
    try:
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(columns)]).writeto(path)
    except (ValueError, TypeError, OSError):
        return
    _outcome(path)
