"""Lines a star of its type cannot show are measured but not counted as found (issue 13's
"K giants show He I lines that are metal blends")."""

import numpy as np
import pytest
from astropy.table import Table

import specan
from specan import lines, synth
from specan.lines.expected import EARLIEST_CODE, LATEST_CODE, expected_lines, star_code


def test_limits_follow_where_the_hot_species_fade():
    # Gray & Corbally (2009), "Stellar Spectral Classification" (from memory): He II fades by
    # B0.5, He I by B9.5-A0; C II 4267 lasts into early A.
    assert list(expected_lines(["He II", "He I", "Fe I"], "O8 V")) == [True, True, False]
    assert list(expected_lines(["He II", "He I", "Fe I"], "B5 V")) == [False, True, False]
    assert list(expected_lines(["He II", "He I", "C II", "Fe I"], "G2 V")) == [False, False, False, True]
    # neutral metals appear in the early A stars (same source); interstellar Na D stays on hot stars
    assert list(expected_lines(["Fe I", "Mg I", "Na I", "Ca II"], "B3 V")) == [False, False, True, True]
    assert list(expected_lines(["Fe I", "Mg I"], "A1 V")) == [True, True]
    assert list(expected_lines(["He I"], None)) == [True]          # no type: nothing ruled out
    assert list(expected_lines(["He I"], "not a type")) == [True]
    assert star_code("K3 III") == 53.0 and star_code(22.5) == 22.5
    assert LATEST_CODE["He II"] < LATEST_CODE["He I"]


def _miles(miles, mk_types, n):
    cat = Table.read(miles / "catalog.csv", format="ascii.csv")
    return [r for r in cat if str(r["mk"]) in mk_types][:n]


@pytest.mark.reference
def test_cool_miles_stars_show_no_helium_absorption(miles):
    # MILES stars of published A5-K3 types (Cenarro et al. 2007 catalogue): He I / He II lines
    # cannot form there (Gray & Corbally 2009, from memory). Without the type 21 such stars had
    # 299 He lines "detected" (metal blends) and 13 a He II 6560 "emission" left by dividing out
    # H alpha; with it none (measured).
    rows = _miles(miles, ("G2 V", "K0 III", "K3 III", "G8 III", "F5 V", "A5 V"), 8)
    assert len(rows) == 8
    for r in rows:
        s = specan.prepare(specan.read(miles / r["file"], resolving_power=2000.0, medium="air"))
        untyped = lines.measure(s, rv=None)
        typed = lines.measure(s, rv=None, star_type=str(r["mk"]))
        he = np.isin([str(x) for x in typed["species"]], ["He I", "He II"])
        assert not np.any(typed["detected"] & he), (r["id"], list(typed["id"][typed["detected"] & he]))
        assert not np.any(typed["expected"][he & ~typed["emission"]])
        # the other lines are untouched: same measurements, same detections
        other = np.asarray(typed["expected"], bool)
        assert np.array_equal(typed["detected"][other], untyped["detected"][other])
        assert np.array_equal(np.asarray(typed["ew"])[other], np.asarray(untyped["ew"])[other], equal_nan=True)
        assert typed.meta["star_type"] == str(r["mk"])


@pytest.mark.reference
def test_hot_miles_stars_keep_their_helium(miles):
    # MILES B2-B5 stars: He I 4471 and 4026 are their classification lines (Gray & Corbally 2009,
    # from memory); the type must not take them away.
    rows = _miles(miles, ("B2 IV", "B3 V", "B5 V"), 3)
    assert rows
    for r in rows:
        s = specan.prepare(specan.read(miles / r["file"], resolving_power=2000.0, medium="air"))
        t = lines.measure(s, rv=None, star_type=str(r["mk"]))
        found = {str(i) for i in t["id"][t["detected"]]}
        assert {"HeI_4471", "HeI_4026"} <= found, (r["id"], sorted(found))


def test_emission_of_a_hot_species_stays_in_a_cool_star():
    # He I 5876 in emission in a cool dwarf (active and flare stars show it; common practice):
    # kept as found. (Specan's synthetic model; a K5 V, where the line reads -1.51 A for 1.5 A.)
    s = synth.spectrum("K5", "V", resolving_power=2000, snr=100, seed=3, emission={"HeI_5876": 1.5})
    t = lines.measure(s, star_type="K5 V")
    row = t[list(t["id"]).index("HeI_5876")]
    assert row["emission"] and row["detected"] and row["expected"]


def test_emission_shared_with_an_allowed_line_is_that_lines():
    # The demo's B3 V star with H alpha and H beta planted in emission (sample_spectra/truth.ecsv,
    # specan's synthetic model): at R 2000 He II 6560 and 4859 blend with them; He II is too hot
    # for a B3 star, so the emission is H alpha's and H beta's alone.
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "sample_spectra" / "trf3_15.fits"
    s = specan.prepare(specan.read(path))
    t = lines.measure(s, rv=None, star_type="B3 V")
    row = {str(r["id"]): r for r in t}
    assert row["H_alpha"]["emission"] and row["H_alpha"]["detected"]
    assert row["H_beta"]["emission"] and row["H_beta"]["detected"]
    for he in ("HeII_6560", "HeII_4859"):
        assert not row[he]["detected"] and not row[he]["expected"], he
    untyped = lines.measure(s, rv=None)
    assert list(untyped["id"][untyped["detected"]]).count("HeII_6560") == 1   # before: both claimed it


def test_blends_name_no_line_the_type_rules_out(kurucz_sun):
    # The Kurucz solar model (rms-solar; R 2000, S/N 500, prepare's continuum): H8, H gamma, H beta and
    # H alpha coincide with He I 3889 and the He II Pickering lines 4339, 4859, 6560, which a G2 V
    # photosphere cannot show (Gray & Corbally 2009, from memory): given the type, the blend column no
    # longer names them; the metal partners stay (Ca II H in H epsilon, Fe I 6546 in H alpha). Without a
    # type nothing is ruled out, and an O8 V type keeps the helium names (and drops the neutral metals).
    from test_lines_batched import kurucz_spectrum

    spec = kurucz_spectrum(kurucz_sun, False)

    def names(star_type):
        table = lines.measure(spec, star_type=star_type)
        hydrogen = table[table["species"] == "H I"]
        return {str(r["id"]): set(str(r["blend"]).split(",")) - {""} for r in hydrogen}

    untyped, sun, hot = names(None), names("G2 V"), names("O8 V")
    helium = {"HeI_3889", "HeII_4339", "HeII_4859", "HeII_6560"}
    assert helium <= set().union(*untyped.values())
    assert not helium & set().union(*sun.values())
    assert "CaII_H" in sun["H_epsilon"] and "FeI_6546" in sun["H_alpha"]
    assert {"HeII_4859"} <= hot["H_beta"] and "FeI_6546" not in hot["H_alpha"]
