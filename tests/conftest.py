"""Shared fixtures: the reference library and outside models.

``jhc1984``: the Jacoby, Hunter & Christian (1984, ApJS 56, 257) library in
``../shared/reference/jhc1984``; present in development and CI, absent on a
user's machine, where the tests that need it skip saying so.

``kurucz_sun``: Kurucz's model solar flux with its true continuum, as carried by
the ``rms-solar`` package (file fsunallp.2000resam125; wavelengths in vacuum,
measured: Ca II K minimum at 3934.78 A, Halpha at 6564.5 A).
"""

from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
JHC_DIR = ROOT.parent / "shared" / "reference" / "jhc1984"
MILES_DIR = ROOT.parent / "shared" / "reference" / "miles"


@pytest.fixture(scope="session", autouse=True)
def _own_cache_folder(tmp_path_factory):
    """specan's cache (the parsed Earth-orientation table) in a folder of this test session's, for it and
    the commands it starts: tests never write into the user's ~/.cache."""
    import os

    folder = tmp_path_factory.mktemp("specan_cache")
    saved = os.environ.get("SPECAN_CACHE_DIR")
    os.environ["SPECAN_CACHE_DIR"] = str(folder)
    yield folder
    if saved is None:
        os.environ.pop("SPECAN_CACHE_DIR", None)
    else:
        os.environ["SPECAN_CACHE_DIR"] = saved


@pytest.fixture(scope="session")
def jhc1984():
    """Folder of the JHC (1984) reference library, or skip with the reason."""
    if not (JHC_DIR / "catalog.csv").is_file():
        pytest.skip(f"reference library not present at {JHC_DIR} (only on development and CI machines)")
    return JHC_DIR


@pytest.fixture(scope="session")
def miles():
    """Folder of the MILES library's development part, or skip with the reason."""
    if not (MILES_DIR / "catalog.csv").is_file():
        pytest.skip(f"MILES reference library not present at {MILES_DIR} (only on development and CI machines)")
    return MILES_DIR


@pytest.fixture(scope="session")
def jhc_catalog(jhc1984):
    """The library's catalogue as an astropy Table."""
    from astropy.table import Table

    return Table.read(jhc1984 / "catalog.csv", format="ascii.csv")


def _kurucz_arrays():
    solar = pytest.importorskip("solar", reason="rms-solar (a test dependency) is not installed")
    path = Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt"
    data = np.loadtxt(path)
    return data[:, 0] * 10.0, data[:, 1], data[:, 2]


@pytest.fixture(scope="session")
def kurucz_sun():
    """(wave_vac_AA, flux, continuum) of the Kurucz solar model over 3000-10000 A."""
    w, f, c = _kurucz_arrays()
    keep = (w > 3000) & (w < 10000)
    return w[keep], f[keep], c[keep]
