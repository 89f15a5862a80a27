"""Built-in velocity templates (specan/templates.py): the packaged library templates and their grid.

The library templates are medians of observed MILES stars (Sanchez-Blazquez et al. 2006;
Falcon-Barroso et al. 2011: 2.50 A FWHM) made by scripts/build_library_templates.py.
"""

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from specan import templates
from specan.mktypes import sptype_to_code

ROOT = Path(__file__).resolve().parents[1]


def test_library_templates_cover_b_to_m_and_metal_poor_stars():
    lib = templates.library_templates()
    codes = [sptype_to_code(t.sptype) for t in lib]
    assert min(codes) < 15 and max(codes) >= 63          # B0-B4 ... M3 and later
    assert {t.lumclass for t in lib} == {"I", "III", "V"}
    assert sum("metal-poor" in t.name for t in lib) >= 3
    assert all(t.n_stars >= 2 for t in lib)
    assert all(0 <= t.zero_point_err_kms < 20 for t in lib)
    first, last = templates.library_coverage()
    assert 3540 < first < 3560 and 7390 < last < 7410     # the library's 3540.5-7409.6 A (its README)


def test_library_file_cites_its_source():
    from importlib import resources

    with resources.as_file(resources.files("specan.data") / templates.LIBRARY_FILE) as path:
        header = fits.getheader(path)
    text = "".join(str(header[k]) for k in header if k.startswith("CITE"))
    assert "Sanchez-Blazquez" in text and "Falcon-Barroso" in text and "MILES" in text
    assert header["CTYPE1"] == "AWAV" and header["FWHM"] == 2.5


def _line_depth(flux, ln_grid, wave_vac):
    k = np.argmin(np.abs(ln_grid - np.log(wave_vac)))
    return 1.0 - flux[k - 3:k + 4].min()


def test_library_template_on_a_vacuum_grid_at_lower_resolution():
    # On a vacuum ln-lambda grid H-alpha sits at its vacuum wavelength, 6564.61 A (NIST ASD, from memory),
    # and a spectrum of lower resolution gets a broader, shallower line.
    step = 1.0 / (2000 * 2.5)
    ln0 = np.log(3600.0)
    n = int((np.log(7300.0) - ln0) / step)
    name, sharp, valid = templates.on_log_grid("A1", "V", 3000.0, ln0, step, n, kind="library")
    _, blunt, _ = templates.on_log_grid("A1", "V", 800.0, ln0, step, n, kind="library")
    grid = ln0 + step * np.arange(n)
    assert name == "library A1 V" and valid.mean() > 0.9
    k = np.argmin(np.where(np.abs(grid - np.log(6564.6)) < 0.002, sharp, np.inf))
    assert abs(np.exp(grid[k]) - 6564.61) < 1.0
    assert _line_depth(blunt, grid, 6564.61) < _line_depth(sharp, grid, 6564.61)
    assert not valid[np.exp(grid) < 3540].any()


@pytest.mark.slow
def test_library_templates_are_what_the_script_builds(miles, tmp_path):
    spec = importlib.util.spec_from_file_location("build", ROOT / "scripts" / "build_library_templates.py")
    build = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(build)
    out = tmp_path / "t.fits"
    assert build.main([str(miles), "--out", str(out)]) == 0
    from importlib import resources

    with resources.as_file(resources.files("specan.data") / templates.LIBRARY_FILE) as path:
        shipped, fresh = fits.open(path), fits.open(out)
        assert np.array_equal(shipped[0].data, fresh[0].data, equal_nan=True), \
            "specan/data/templates_miles.fits is stale: rerun scripts/build_library_templates.py"
        assert list(shipped["GROUPS"].data["members"]) == list(fresh["GROUPS"].data["members"])
