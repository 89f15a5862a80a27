#!/usr/bin/env python
"""Regenerate specan/data/calibration_default.json, the default MK calibration, from two libraries.

Fits :class:`specan.classify.Calibration` on the development parts of

- the Jacoby, Hunter & Christian (1984, ApJS 56, 257) library, ``../shared/reference/jhc1984``:
  every star, its velocity measured and removed as ``specan classify`` does for any spectrum.
  Its README says 4.5 A FWHM; the copies there are about 13 A (12-13.5 A fitted against MILES
  stars of the same types, measured), so they are taken to be at the calibration's 13 A;
- the MILES library (Sanchez-Blazquez et al. 2006, MNRAS 371, 703; 2.50 A FWHM: Falcon-Barroso
  et al. 2011, A&A 532, A95), ``../shared/reference/miles``: the stars with a full MK type, at
  rest (its README), smoothed from 2.5 A to 13 A. Left out: types marked uncertain (``:``),
  peculiar (``p``) or weak-lined (``w``) and metal-poor stars ([Fe/H] < -1.0, Cenarro et al.
  2007 / Prugniel et al. 2011 values), whose line strengths do not follow their MK types.
  Emission-marked types keep all but their Balmer and Ca II criteria (as for every standard).

One common resolution, 13 A FWHM, because the JHC copies cannot be sharpened and every
spectrum specan is given can be smoothed to it; measured in 10-fold cross-validation, the
MILES stars are typed as well at 13 A as at 4.5 or 2.5 A (84% within 2 subclasses at each).
Only derived numbers are written (each standard's criteria and the relations), never a spectrum.

Usage::

    python scripts/fit_default_calibration.py [--jhc DIR] [--miles DIR] [--out PATH]
"""

from __future__ import annotations

import argparse
import importlib
import sys
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))
from miles_catalog import text  # noqa: E402
REFERENCE = ROOT.parent / "shared" / "reference"

#: The calibration's resolution (FWHM, Angstrom): the JHC copies' own (see the module docstring).
RESOLUTION_AA = 13.0
#: The MILES library's resolution (its README; Falcon-Barroso et al. 2011).
MILES_FWHM_AA = 2.5
METAL_POOR_FEH = -1.0
SOURCE = ("Jacoby, Hunter & Christian (1984, ApJS 56, 257) library, development part ({n_jhc} stars, velocities "
          "removed, ~13 A FWHM as measured), and MILES v9.1 (Sanchez-Blazquez et al. 2006; Falcon-Barroso et al. 2011; "
          "{n_miles} stars with a full MK type, smoothed from 2.5 A) at a common 13 A FWHM; published MK types of "
          "each catalogue; criteria measured by specan, no spectra copied")


def miles_usable(row):
    """(usable, reason): a MILES row fit to be a standard (see the module docstring)."""
    sp, lc, pub = text(row["sptype"]), text(row["lumclass"]), text(row["sptype_published"])
    if not (sp and lc):
        return False, "no full MK type"
    tail = pub.split(sp, 1)[-1] if sp in pub else pub
    if ":" in pub or "p" in tail or "w" in tail:
        return False, f"type marked uncertain, peculiar or weak-lined ({pub})"
    feh = row["feh"]
    if not np.ma.is_masked(feh) and float(feh) < METAL_POOR_FEH:
        return False, f"metal-poor ([Fe/H] {float(feh):+.2f})"
    return True, ""


def miles_label(row):
    """(sptype, lumclass) with the published emission mark kept, so the fit leaves its lines out."""
    from specan.mktypes import marks_emission

    sp, lc = text(row["sptype"]), text(row["lumclass"])
    return sp, lc + ("e" if marks_emission(text(row["sptype_published"])) else "")


def measure_jhc(folder, classify, velocities=None):
    """Criteria, labels and ids of the JHC stars; ``velocities`` (a list) receives each one's removed velocity."""
    import astropy.units as u

    import specan
    from astropy.table import Table

    cat = Table.read(folder / "catalog.csv", format="ascii.csv")
    X, labels, ids = [], [], []
    for row in cat:
        s = specan.read(folder / str(row["file"]))
        res = classify.spectrum_criteria(s, RESOLUTION_AA * u.AA, measure_velocity=True,
                                         assume_resolution=RESOLUTION_AA * u.AA)
        X.append(res["values"])
        if velocities is not None:
            velocities.append(res["rv"])
        labels.append((str(row["sptype"]), str(row["lumclass"])))
        ids.append(f"jhc1984:{row['id']}")
        print(f"  {ids[-1]}", file=sys.stderr)
    return X, labels, ids


def measure_miles(folder, classify, everyone=False):
    """Criteria, labels, ids and skipped rows of the MILES standards.

    With ``everyone``, every star with a full MK type is measured (for cross-validation) and a
    fifth item says which of them are standards.
    """
    import astropy.units as u

    import specan
    from astropy.table import Table

    cat = Table.read(folder / "catalog.csv", format="ascii.csv")
    X, labels, ids, skipped, usable = [], [], [], [], []
    for row in cat:
        ok, why = miles_usable(row)
        if not ok:
            if why != "no full MK type":   # the catalogue's own incomplete types are not listed
                skipped.append({"file": f"miles:{row['id']}", "reason": why})
            if not (everyone and why != "no full MK type"):
                continue
        s = specan.read(folder / str(row["file"]), medium="air")
        res = classify.spectrum_criteria(s, RESOLUTION_AA * u.AA, rv=0 * u.km / u.s, measure_velocity=False,
                                         assume_resolution=MILES_FWHM_AA * u.AA)
        X.append(res["values"])
        labels.append(miles_label(row))
        ids.append(f"miles:{row['id']}")
        usable.append(ok)
        print(f"  {ids[-1]}", file=sys.stderr)
    if everyone:
        return X, labels, ids, skipped, np.array(usable)
    return X, labels, ids, skipped


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jhc", default=str(REFERENCE / "jhc1984"))
    parser.add_argument("--miles", default=str(REFERENCE / "miles"))
    parser.add_argument("--out", default=str(ROOT / "specan" / "data" / "calibration_default.json"))
    args = parser.parse_args(argv)
    classify = importlib.import_module("specan.classify")   # the module, not specan.classify()
    import astropy.units as u

    jhc, miles = Path(args.jhc), Path(args.miles)
    for folder in (jhc, miles):
        if not (folder / "catalog.csv").is_file():
            print(f"fit_default_calibration: no catalog.csv in {folder}", file=sys.stderr)
            return 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        Xj, Lj, Ij = measure_jhc(jhc, classify)
        Xm, Lm, Im, skipped = measure_miles(miles, classify)
    cal = classify.Calibration(resolution=RESOLUTION_AA * u.AA,
                               source=SOURCE.format(n_jhc=len(Ij), n_miles=len(Im)))
    cal.fit_criteria(np.array(Xj + Xm), Lj + Lm, ids=Ij + Im)
    cal.skipped_ = skipped
    cal.save(args.out)
    cv = cal.cv_
    print(f"wrote {args.out}: {len(Ij)} JHC + {len(Im)} MILES standards ({len(skipped)} MILES rows left out), "
          f"likelihood temperature {cal.tau_:g}; internal {cv['folds']}-fold CV: {cv['within_2_subclasses']:.0%} "
          f"within 2 subclasses, median error {cv['median_abs_error']:.2f}, luminosity group right for "
          f"{cv['lum_group_right_B_to_K']:.0%} of B-K")
    return 0


if __name__ == "__main__":
    sys.exit(main())
