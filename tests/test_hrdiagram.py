"""Tests of specan.hrdiagram: the night's HR diagram."""

import importlib.util
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest

from specan import hrdiagram, physics
from specan.mktypes import sptype_to_code

ROOT = Path(__file__).resolve().parents[1]


def _classification(sptype, lumclass):
    return {"sptype": sptype, "lumclass": lumclass, "mk": f"{sptype} {lumclass}", "code": sptype_to_code(sptype),
            "subclass_err": 1.0, "lumclass_prob": {lumclass: 1.0}, "teff": None, "flags": []}


def _check_png(path):
    import matplotlib.image as mpimg

    img = mpimg.imread(path)
    assert img.shape[0] > 300 and img.shape[1] > 300
    assert np.std(img[..., :3]) > 0.05  # not a blank canvas


def _demo_stars():
    """(name, sptype, lumclass) of the demo night as planted by scripts/make_demo_night.py."""
    script = ROOT / "scripts" / "make_demo_night.py"
    if not script.is_file():
        pytest.skip("scripts/make_demo_night.py not present")
    spec = importlib.util.spec_from_file_location("make_demo_night", script)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return [(s[0], s[1], s[2]) for s in mod.STARS]


def test_demo_night_every_classified_star_appears(tmp_path):
    # The demo night's stars (types as planted) go through physics.derive, as the night run does, then onto
    # the diagram; the broken file (no classification) is reported as not placed.
    rows = []
    for name, sptype, lumclass in _demo_stars():
        res = physics.derive(_classification(sptype, lumclass), None, None)
        rows.append({"object": name, "code": sptype_to_code(sptype), "lumclass": lumclass, **res})
    rows.append({"object": "TRF3-19", "status": "error", "code": None, "lumclass": None})
    out = hrdiagram.plot_hr(rows, tmp_path / "hr.png")
    assert sorted(out["plotted"]) == sorted(name for name, _, _ in _demo_stars())
    assert out["skipped"] == [("TRF3-19", "error row")]
    _check_png(out["path"])


def test_axes_orientation_and_loci(tmp_path):
    rows = [{"object": "Sun", **physics.derive(_classification("G2", "V"), None, None)}]
    out = hrdiagram.plot_hr(rows, tmp_path / "sun.png")
    # Teff decreases to the right and M_V increases downwards (HR convention, common practice).
    assert out["xlim"][0] > out["xlim"][1]
    assert out["ylim"][0] > out["ylim"][1]
    # The loci are drawn from the same table the numbers come from.
    t = physics.load_scales()
    assert out["loci"] == {c: int(np.sum(t["lumclass"] == c)) for c in ("I", "III", "V")}


def test_points_placed_where_derive_puts_them():
    # The Sun (G2 V): Teff 5770 K, M_V 4.79 in our table (Pecaut & Mamajek 2013, from memory).
    rows = [{"object": "Sun", **physics.derive(_classification("G2", "V"), None, None)}]
    placed, skipped = hrdiagram.hr_points(rows)
    assert not skipped
    assert placed[0]["teff_k"] == pytest.approx(5770, abs=1)
    assert placed[0]["m_v_abs"] == pytest.approx(4.79, abs=0.01)
    # A catalogue row with only a type and class is placed from the scale; Quantity and masked inputs work.
    placed, _ = hrdiagram.hr_points([{"object": "x", "code": 50.0, "lumclass": "III", "teff": np.ma.masked},
                                     {"object": "y", "teff": 4000 * u.K, "m_v_abs": 0.5 * u.mag}])
    assert placed[0]["m_v_abs"] == pytest.approx(0.7) and placed[0]["origin"] == "from type"
    assert placed[1]["teff_k"] == 4000.0


@pytest.mark.reference
def test_reference_library_on_the_diagram(tmp_path, jhc_catalog):
    # All 94 published types of the JHC (1984) library, as an astropy Table input, appear on the diagram.
    from astropy.table import Table

    rows = []
    for r in jhc_catalog:
        res = physics.derive(_classification(str(r["sptype"]), str(r["lumclass"])), None, None)
        rows.append({"object": str(r["id"]), "code": sptype_to_code(str(r["sptype"])),
                     "lumclass": str(r["lumclass"]), "teff_k": res["teff_k"], "teff_err_k": res["teff_err_k"],
                     "m_v_abs": res["m_v_abs"], "m_v_abs_err": res["m_v_abs_err"]})
    out = hrdiagram.plot_hr(Table(rows=rows), tmp_path / "jhc.png")
    assert len(out["plotted"]) == len(jhc_catalog)
    _check_png(out["path"])


def test_crowded_labels_do_not_cover_each_other():
    # Six stars of one type (the common case of a cluster night): every name must stay readable.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6, 5))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    placed = [{"name": f"CLUSTER-STAR-{i}", "teff_k": 5800.0 + 5 * i, "m_v_abs": 4.7 + 0.02 * i} for i in range(6)]
    ax.set_xlim(9000, 3000)
    ax.set_ylim(10, 0)
    hrdiagram._label_points(ax, placed, fontsize=7)
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in ax.texts]
    assert len(boxes) == 6
    for i in range(6):
        for j in range(i + 1, 6):
            assert not boxes[i].overlaps(boxes[j]), (placed[i]["name"], placed[j]["name"])
