#!/usr/bin/env python
"""Regenerate specan/data/neighbours_miles.fits, the library stars the classifier compares a spectrum with.

From the development part of the MILES stellar library (Sanchez-Blazquez et al. 2006, MNRAS 371,
703; 2.50 A FWHM: Falcon-Barroso et al. 2011, A&A 532, A95), ``../shared/reference/miles``: the
stars the default MK calibration uses as standards (``miles_usable`` in
``scripts/fit_default_calibration.py``: a full MK type, not uncertain, peculiar, weak-lined or
metal-poor), each at rest (the library's frame), smoothed from 2.5 A to 13 A FWHM, on 4 A pixels
over 3650-7350 A (air), continuum-normalised by ``specan.prepare`` with the telluric bands masked
(:func:`specan.classify.neighbours.on_grid`, as every spectrum to be classified is treated).
Written: the normalised fluxes (float32, NaN where unusable) and a table of the stars (id, name,
type code and the MK type the calibration reads), with the library's citation in the header.

Usage::

    python scripts/build_neighbour_set.py [--miles DIR] [--out PATH]
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))
from miles_catalog import read_catalog  # noqa: E402
REFERENCE = ROOT.parent / "shared" / "reference"

CITATION = ("MILES stellar library v9.1, development part: Sanchez-Blazquez et al. (2006, MNRAS 371, 703); "
            "resolution 2.50 A FWHM: Falcon-Barroso et al. (2011, A&A 532, A95); published MK types of its "
            "catalogue; smoothed to 13 A FWHM and continuum-normalised by specan")
#: The library's resolution (its README; Falcon-Barroso et al. 2011).
MILES_FWHM_AA = 2.5


def _recipe():
    spec = importlib.util.spec_from_file_location("fit_default_calibration", ROOT / "scripts" / "fit_default_calibration.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def library_rows(folder):
    """(flux rows, good rows, table of stars) of the usable MILES stars on the comparison pixels."""
    import astropy.units as u
    from astropy.table import Table

    import specan
    from specan.classify import neighbours
    from specan.mktypes import sptype_to_code

    fit = _recipe()
    cat = read_catalog(folder, "build_neighbour_set")
    F, G, rows = [], [], []
    for row in cat:
        ok, _ = fit.miles_usable(row)
        if not ok:
            continue
        s = specan.read(folder / str(row["file"]), medium="air")
        f, g = neighbours.on_grid(s, rv=0 * u.km / u.s, fwhm_in=MILES_FWHM_AA)
        sp, lc = fit.miles_label(row)
        F.append(np.where(g, f, np.nan))
        G.append(g)
        rows.append((f"miles:{row['id']}", str(row["name"]), sptype_to_code(sp), f"{sp} {lc}"))
        print(f"  {rows[-1][0]}", file=sys.stderr)
    table = Table(rows=rows, names=("id", "name", "code", "mk"))
    return np.array(F), np.array(G), table


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--miles", default=str(REFERENCE / "miles"))
    parser.add_argument("--out", default=str(ROOT / "specan" / "data" / "neighbours_miles.fits"))
    args = parser.parse_args(argv)
    folder = Path(args.miles)
    if read_catalog(folder, "build_neighbour_set") is None:
        return 1
    from astropy.io import fits

    from specan.classify import neighbours

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        F, _, table = library_rows(folder)
    primary = fits.PrimaryHDU(F.astype(np.float32))
    h = primary.header
    h["CTYPE1"], h["CUNIT1"], h["CRPIX1"] = "AWAV", "Angstrom", 1.0
    h["CRVAL1"], h["CDELT1"] = neighbours.WAVE_RANGE[0], neighbours.STEP
    h["FWHM"] = (neighbours.FWHM, "resolution, Angstrom")
    h["NORMED"] = (True, "continuum-normalised by specan.prepare")
    for k, start in enumerate(range(0, len(CITATION), 68)):
        h[f"CITE{k}"] = CITATION[start:start + 68]
    hdus = fits.HDUList([primary, fits.table_to_hdu(table)])
    hdus[1].name = "STARS"
    hdus.writeto(args.out, overwrite=True)
    print(f"wrote {args.out}: {len(table)} MILES stars on {F.shape[1]} pixels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
