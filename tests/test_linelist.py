"""Tests of specan/linelist.py and the packaged lists in linelists/."""

import astropy.units as u
import numpy as np
import pytest

from specan.errors import SpecanError
from specan.linelist import LINE_COLUMNS, load_bands, load_linelist, load_telluric
from specan.obsinfo import air_to_vacuum, vacuum_to_air


@pytest.fixture(scope="module")
def stellar():
    return load_linelist()


def test_columns_units_and_unique_ids(stellar):
    assert tuple(stellar.colnames[: len(LINE_COLUMNS)]) == LINE_COLUMNS
    assert stellar["wave_air"].unit == u.AA and stellar["wave_vac"].unit == u.AA
    assert stellar["ep_low"].unit == u.eV
    assert len(set(stellar["id"])) == len(stellar)
    assert set(stellar["kind"]) == {"atomic", "molecular_head"}
    assert np.all(stellar["ion"][stellar["kind"] == "molecular_head"] == 0)
    assert np.all(stellar["ion"][stellar["kind"] == "atomic"] >= 1)
    assert all(len(s) > 0 for s in stellar["source"])
    # the issue asks for 3700-8000 A at least; the Ca II triplet takes it to 8700 A
    assert stellar["wave_air"].min() < 3760 * u.AA and stellar["wave_air"].max() > 8660 * u.AA


def test_issue_features_present(stellar):
    ids = set(stellar["id"])
    wanted = {"H_alpha", "H_beta", "H_gamma", "H_delta", "H_epsilon", "H_8", "H_9", "H_10", "H_11", "H_12",
              "HeI_4026", "HeI_4388", "HeI_4471", "HeI_4713", "HeI_4922", "HeI_5876", "HeI_6678",
              "HeII_4200", "HeII_4542", "HeII_4686", "HeII_5412", "CII_4267", "MgII_4481",
              "CaII_K", "CaII_H", "CaII_8498", "CaII_8542", "CaII_8662", "CaI_4227", "SrII_4078",
              "SrII_4216", "BaII_4554", "MgI_b1", "MgI_b2", "MgI_b4", "NaI_D1", "NaI_D2", "KI_7665",
              "OI_7772", "OI_7774", "OI_7775", "CH_4300", "CN_3883", "CN_4216", "MgH_4780", "CaH_6382",
              "TiO_4761", "TiO_4955", "TiO_5167", "TiO_5448", "TiO_5847", "TiO_6159", "TiO_6651",
              "TiO_7054", "TiO_7589"}
    assert wanted <= ids, sorted(wanted - ids)
    species = set(stellar["species"])
    assert {"Si II", "Si III", "Si IV", "Fe I", "Fe II", "Cr I", "Mn I", "Ti II"} <= species


# Air wavelengths as listed by the NIST Atomic Spectra Database (values recalled,
# not looked up: no network when written -- "NIST ASD, from memory").
NIST_AIR = {
    "H_alpha": 6562.79, "H_beta": 4861.35, "H_gamma": 4340.47, "H_delta": 4101.74,  # NIST ASD (from memory)
    "CaII_K": 3933.66, "CaII_H": 3968.47, "CaI_4227": 4226.73,  # NIST ASD (from memory)
    "NaI_D2": 5889.95, "NaI_D1": 5895.92,  # NIST ASD (from memory)
    "MgI_b1": 5183.60, "MgI_b2": 5172.68, "MgI_b4": 5167.32,  # NIST ASD (from memory)
    "HeI_5876": 5875.62, "HeI_4471": 4471.48, "HeII_4686": 4685.70,  # NIST ASD (from memory)
    "KI_7665": 7664.90, "KI_7699": 7698.96, "CaII_8542": 8542.09,  # NIST ASD (from memory)
}


@pytest.mark.parametrize("line_id", sorted(NIST_AIR))
def test_laboratory_wavelengths_agree_with_nist(stellar, line_id):
    row = stellar[list(stellar["id"]).index(line_id)]
    assert row["wave_air"].to_value(u.AA) == pytest.approx(NIST_AIR[line_id], abs=0.02)


def test_vacuum_hydrogen_from_rydberg(stellar):
    # Independent of any list: 1/lambda_vac = R_H (1/4 - 1/n^2), R_H = 109677.58 cm^-1
    # (CODATA Rydberg with hydrogen reduced mass; from memory). Fine structure shifts the
    # gf-weighted Balmer lines by < 0.1 A, so 0.15 A tolerance.
    r_h = 109677.58
    for n, line_id in [(3, "H_alpha"), (4, "H_beta"), (5, "H_gamma"), (6, "H_delta")]:
        lam = 1e8 / (r_h * (0.25 - 1.0 / n**2))
        row = stellar[list(stellar["id"]).index(line_id)]
        assert row["wave_vac"].to_value(u.AA) == pytest.approx(lam, abs=0.15)


def test_air_vacuum_columns_agree_with_reader_formula(stellar):
    # the reader's conversion is specan.obsinfo (Morton 2000, via specutils)
    vac = air_to_vacuum(stellar["wave_air"]).to_value(u.AA)
    assert np.max(np.abs(vac - stellar["wave_vac"].to_value(u.AA))) < 0.01
    air = vacuum_to_air(stellar["wave_vac"]).to_value(u.AA)
    assert np.max(np.abs(air - stellar["wave_air"].to_value(u.AA))) < 0.01


def test_telluric_and_bands_lists():
    tel = load_telluric()
    assert {"O2_A", "O2_B"} <= set(tel["id"])
    a = tel[list(tel["id"]).index("O2_A")]
    # O2 A-band head at 7593.7 A in air (common practice)
    assert a["wave_min_air"] < 7594 * u.AA < a["wave_max_air"]
    assert np.all(tel["wave_max_air"] > tel["wave_min_air"])
    bands = load_bands()
    assert {"G4300", "Mg2", "TiO5", "CaH2", "NaD"} <= set(bands["name"])
    fmin, fmax = bands["feature_min_air"].to_value(u.AA), bands["feature_max_air"].to_value(u.AA)
    assert np.all(fmax > fmin)
    for edge in ("feature_min", "blue_max", "red_min"):
        d = air_to_vacuum(bands[f"{edge}_air"]).to_value(u.AA) - bands[f"{edge}_vac"].to_value(u.AA)
        assert np.nanmax(np.abs(d)) < 0.01
    assert all(len(s) > 0 for s in bands["source"])


def test_user_list_minimal(tmp_path):
    path = tmp_path / "mine.ecsv"
    path.write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: id, datatype: string}\n"
                    "# - {name: wave_vac, unit: Angstrom, datatype: float64}\n"
                    "# schema: astropy-2.0\nid wave_vac\nX_1 5000.0\nX_2 4000.0\n")
    t = load_linelist(path)
    assert list(t["id"]) == ["X_2", "X_1"]
    assert t["wave_air"][0].to_value(u.AA) == pytest.approx(
        vacuum_to_air(4000.0 * u.AA).to_value(u.AA), abs=1e-6)
    assert np.isnan(t["loggf"][0])


def test_errors(tmp_path):
    with pytest.raises(SpecanError):
        load_linelist("no_such_list")
    with pytest.raises(SpecanError):
        load_linelist(tmp_path / "missing.ecsv")
    dup = tmp_path / "dup.ecsv"
    dup.write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: id, datatype: string}\n"
                   "# - {name: wave_air, datatype: float64}\n# schema: astropy-2.0\nid wave_air\nA 5000\nA 5001\n")
    with pytest.raises(SpecanError, match="duplicate"):
        load_linelist(dup)
