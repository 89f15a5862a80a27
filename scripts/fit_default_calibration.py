#!/usr/bin/env python
"""Regenerate specan/data/calibration_jhc1984.json, the default MK calibration.

Fits :class:`specan.classify.Calibration` on the development part of the
Jacoby, Hunter & Christian (1984, ApJS 56, 257) library of low-resolution
(~4.5 A FWHM) stellar spectra, expected in ``../shared/reference/jhc1984``
next to the project (or give its folder). Only derived numbers are written:
the criteria of each standard and the fitted relations, never the spectra.

Usage::

    python scripts/fit_default_calibration.py [LIBRARY_DIR] [--out PATH]
"""

from __future__ import annotations

import argparse
import importlib
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SOURCE = ("Jacoby, Hunter & Christian (1984, ApJS 56, 257) library of stellar spectra, "
          "development part ({n} stars, catalog.csv of ../shared/reference/jhc1984); "
          "published MK types from that catalogue; criteria measured by specan, no spectra copied")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("library", nargs="?", default=str(ROOT.parent / "shared" / "reference" / "jhc1984"))
    parser.add_argument("--out", default=str(ROOT / "specan" / "data" / "calibration_jhc1984.json"))
    args = parser.parse_args(argv)
    classify = importlib.import_module("specan.classify")   # the module, not specan.classify()

    catalog = Path(args.library) / "catalog.csv"
    if not catalog.is_file():
        print(f"fit_default_calibration: no catalog.csv in {args.library}", file=sys.stderr)
        return 1
    # The library is at 4.5 A FWHM (its README); velocities are measured and removed per star.
    cal = classify.calibrate_catalog(catalog, resolution=4.5 * classify.u.AA,
                                     progress=lambda p: print(f"  {p.name}", file=sys.stderr))
    n = len(cal.standards_)   # the rows calibrate_catalog actually read
    cal.source = SOURCE.format(n=n)
    cal.save(args.out)
    cv = cal.cv_
    print(f"wrote {args.out}: {n} standards, likelihood temperature {cal.tau_:g}; internal "
          f"{cv['folds']}-fold CV: {cv['within_2_subclasses']:.0%} within 2 subclasses, median error "
          f"{cv['median_abs_error']:.2f}, luminosity group right for {cv['lum_group_right_B_to_K']:.0%} of B-K")
    return 0


if __name__ == "__main__":
    sys.exit(main())
