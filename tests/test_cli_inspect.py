"""`specan inspect`: JSON per file, one-line errors, exit status."""

import json
import subprocess
import sys

import numpy as np
from astropy.io import fits


def _run(*args):
    return subprocess.run([sys.executable, "-m", "specan", *args], capture_output=True, text=True, timeout=120)


def _good(tmp_path):
    h = fits.Header()
    h.update({"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": 4000.0, "CDELT1": 1.0, "OBJECT": "Vela-17",
              "DATE-OBS": "2026-11-30T22:00:00", "EXPTIME": 600.0, "RA": 150.25, "DEC": -30.5,
              "OBSGEO-B": -30.0, "OBSGEO-L": 20.0, "OBSGEO-H": 1500.0})
    rng = np.random.default_rng(0)
    path = tmp_path / "good.fits"
    fits.PrimaryHDU(1.0 + rng.normal(0, 0.02, 3000), header=h).writeto(path)
    return path


def test_inspect_json_fields(tmp_path):
    res = _run("inspect", "--json", str(_good(tmp_path)))
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout.strip().splitlines()[0])
    for key in ("file", "object", "wave_min_aa", "wave_max_aa", "medium", "n_pixels", "snr", "mjd_mid", "ra_deg",
                "dec_deg", "site_known", "warnings"):
        assert key in d
    assert d["object"] == "Vela-17" and d["medium"] == "air" and d["n_pixels"] == 3000
    assert d["wave_min_aa"] == 4000.0 and d["wave_max_aa"] == 6999.0
    assert 40 < d["snr"] < 60  # injected S/N 50
    assert d["snr_source"] == "flux" and d["snr_err_array"] is None and d["snr_flux"] == d["snr"]
    assert d["site_known"] is True
    from astropy.time import Time

    assert abs(d["mjd_mid"] - Time("2026-11-30T22:05:00", scale="utc").mjd) < 1e-8  # start + EXPTIME/2


def test_bad_file_is_one_line_error_and_the_rest_still_reported(tmp_path):
    bad = tmp_path / "broken.fits"
    bad.write_bytes(b"SIMPLE  =                    T" + b"\0" * 100)
    res = _run("inspect", "--json", str(bad), str(_good(tmp_path)))
    assert res.returncode == 1
    err_lines = [line for line in res.stderr.splitlines() if line.strip()]
    assert len(err_lines) == 1 and "broken.fits" in err_lines[0] and "Traceback" not in res.stderr
    outs = [json.loads(line) for line in res.stdout.splitlines()]
    assert {o["file"].split("/")[-1] for o in outs} == {"broken.fits", "good.fits"}
    assert "error" in next(o for o in outs if o["file"].endswith("broken.fits"))


def test_debug_shows_traceback(tmp_path):
    bad = tmp_path / "empty.txt"
    bad.write_text("")
    res = _run("--debug", "inspect", str(bad))
    assert res.returncode != 0 and "Traceback" in res.stderr


def test_every_reader_option_is_a_read_override_and_reaches_the_reader(tmp_path):
    # the options table in specan.cli._common is the one list; each entry must be a keyword
    # specan.read accepts, and a value given on the command line must arrive there
    from specan.cli import _common
    from specan.io import OVERRIDES

    assert set(_common._READ_OPTIONS) <= set(OVERRIDES)
    res = _run("inspect", "--json", "--medium", "vacuum", "--resolving-power", "1234", "--ra", "10.5",
               "--dec", "-20.25", "--site", "-30,20,1500", str(_good(tmp_path)))
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout.strip().splitlines()[0])
    assert d["medium"] == "vacuum"
    assert d["ra_deg"] == 10.5 and d["dec_deg"] == -20.25
    kwargs = {k: None for k in _common._READ_OPTIONS} | {"hdu": "0", "wave_unit": "nm", "json": True}
    assert _common.overrides_from(kwargs) == {"hdu": "0", "wave_unit": "nm"}


def test_inspect_reports_the_error_array_and_the_flux_estimate(tmp_path):
    # An error array that claims S/N 30 on a spectrum whose real noise is S/N 60: the error
    # array is what the file states and is reported, the flux-based S/N is shown beside it
    # (issue 13: DER_SNR used to be reported even when the file had an error array)
    rng = np.random.default_rng(1)
    w = np.arange(4000.0, 7000.0, 1.0)
    flux = 1.0 + rng.normal(0.0, 1.0 / 60, w.size)
    path = tmp_path / "with_errors.txt"
    np.savetxt(path, np.column_stack([w, flux, np.full(w.size, 1.0 / 30)]))
    res = _run("inspect", "--json", "--wave-unit", "Angstrom", str(path))
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout.strip().splitlines()[0])
    assert d["snr_source"] == "error array"
    assert abs(d["snr"] - 30.0) < 1.0 and d["snr"] == d["snr_err_array"]
    assert abs(d["snr_flux"] - 60.0) < 6.0   # within 10% of the injected noise
    text = _run("inspect", "--wave-unit", "Angstrom", str(path))
    assert text.returncode == 0, text.stderr
    assert "S/N per pixel 30 (from the error array); from the flux " in text.stdout
