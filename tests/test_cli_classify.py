"""`specan classify --photometry`: the physics numbers appear in the JSON (issue 7, item 5)."""

import json
import subprocess
import sys

import pytest


@pytest.mark.reference
def test_classify_json_carries_distance_with_photometry(jhc1984, tmp_path):
    phot = tmp_path / "phot.csv"
    phot.write_text("object,V,V_err,EBV\nHD66171,6.1,0.02,0.0\n")  # V invented for the test
    res = subprocess.run([sys.executable, "-m", "specan", "classify", "--json", "--photometry", str(phot),
                          str(jhc1984 / "spectra" / "HD66171.csv")], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout.splitlines()[0])
    for key in ("teff_k", "teff_color_k", "distance_pc", "distance_err_pc", "m_v_abs", "sptype", "lumclass", "mk"):
        assert key in d
    assert d["distance_lo_pc"] < d["distance_pc"] < d["distance_hi_pc"]
    # distance modulus V - M_V = 5 log10(d / 10 pc) (common practice), for the class-mixture M_V within its spread
    implied = 10 ** ((6.1 - d["m_v_abs"] + 5) / 5)
    assert d["distance_lo_pc"] < implied < d["distance_hi_pc"]
    assert d["teff_color_k"] is None  # the library's flux is relative, not calibrated: no colour temperature


@pytest.mark.reference
def test_classify_command_weighs_like_the_api_with_the_shipped_calibration(miles):
    # `specan classify` without --calibration loads the shipped calibration itself; it must weigh
    # the library neighbours and the log g as specan.classify(spectrum) does (it had weighed
    # neither). MILES star m0081 (G1 V in the library's catalogue).
    import specan

    path = miles / "spectra" / "MILES_res2.50_star_m0081V.fits"
    res = subprocess.run([sys.executable, "-m", "specan", "classify", "--json", str(path)],
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout.splitlines()[0])
    api = specan.classify(specan.read(path))
    assert d["type_evidence"] == api["type_evidence"] == "criteria and library neighbours"
    assert d["mk"] == api["mk"]
    assert d["lumclass_prob"] == pytest.approx(api["lumclass_prob"], abs=1e-12)
