"""The MILES library's catalogue as the scripts read it (../shared/reference/miles, its README).

Shared by the scripts that build shipped numbers from MILES (templates, parameter model, library
neighbours, default calibration): one reading of the catalogue, one way to say it is missing.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

#: The library's own pixels, Angstrom in air (its README: CRVAL1 3540.5, CDELT1 0.9, 4300 pixels).
WAVE_AA = 3540.5 + 0.9 * np.arange(4300)


def text(x) -> str:
    """A catalogue cell as stripped text ("" where masked)."""
    return "" if np.ma.is_masked(x) else str(x).strip()


def value(x) -> float:
    """A catalogue cell as a float (NaN where masked)."""
    return np.nan if np.ma.is_masked(x) else float(x)


def read_catalog(folder, script):
    """``folder``'s catalog.csv as an astropy Table, or None after saying on stderr that it is missing."""
    from astropy.table import Table

    path = Path(folder) / "catalog.csv"
    if not path.is_file():
        print(f"{script}: no catalog.csv in {folder}", file=sys.stderr)
        return None
    return Table.read(path, format="ascii.csv")
