"""Precision benchmark: MK classification cross-validated on the JHC (1984) reference library.

Needs ``../shared/reference/jhc1984`` (development machines and CI only). Every star is
measured as ``specan classify`` measures a spectrum (velocity removed first), then:

- interleaved k-fold CV (the acceptance test's folds: every k-th star in type order);
- the same over several random type-stratified fold partitions, to show how much of a
  figure is the partition (mean and standard deviation);
- the luminosity group given each star's *published* type: how far the luminosity
  criteria alone can go, whatever the type estimate.

Targets (issue "MK classification"): 80% within 2 subclasses, median error at most 1.5,
luminosity group right for 75% of B-K stars.
Run: ``python benchmarks/cv_classify.py [partitions]`` (about 20 s per partition).
"""

import importlib
import sys
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table

import specan
from specan.mktypes import luminosity_group, sptype_to_code

C = importlib.import_module("specan.classify")
ROOT = Path(__file__).resolve().parents[1]
LIBRARY = ROOT.parent / "shared" / "reference" / "jhc1984"
FWHM = 4.5 * u.AA          # the library's resolution (its README)
GROUPS = ["I", "II-III", "IV-V"]


def measure():
    cat = Table.read(LIBRARY / "catalog.csv", format="ascii.csv")
    X, labels = [], []
    for row in cat:
        s = specan.read(LIBRARY / str(row["file"]))
        X.append(C.spectrum_criteria(s, FWHM, measure_velocity=True, assume_resolution=FWHM)["values"])
        labels.append((str(row["sptype"]), str(row["lumclass"])))
    return np.array(X), labels


def cross_validate(X, labels, fold):
    codes = np.array([sptype_to_code(s) for s, _ in labels])
    err, group_right, group_at_type = np.empty(len(codes)), [], []
    for f in range(fold.max() + 1):
        train = np.flatnonzero(fold != f)
        cal = C.Calibration(resolution=FWHM).fit_criteria(X[train], [labels[i] for i in train])
        fine = cal.lattice_model()
        for i in np.flatnonzero(fold == f):
            res = cal.classify_criteria(X[i])
            err[i] = res["code"] - codes[i]
            if 10 <= codes[i] < 60:   # B0-K9
                truth = luminosity_group(labels[i][1])
                group_right.append(luminosity_group(res["lumclass"]) == truth)
                _, ll, _ = C.posterior(X[i], np.zeros(X.shape[1]), fine, cal.settings["dof"], 1.0)
                at = int(np.argmin(np.abs(fine["grid"] - codes[i])))
                best = C.number_to_lumclass(int(np.argmax(ll[at])) + 1)
                group_at_type.append(luminosity_group(best) == truth)
    return (float(np.mean(np.abs(err) <= 2)), float(np.median(np.abs(err))), float(np.mean(group_right)),
            float(np.mean(group_at_type)))


def main(partitions=8, folds=10):
    if not (LIBRARY / "catalog.csv").is_file():
        print(f"reference library not found at {LIBRARY}: nothing to measure")
        return 1
    X, labels = measure()
    codes = np.array([sptype_to_code(s) for s, _ in labels])
    order = np.argsort(codes, kind="stable")
    fold = np.empty(len(codes), int)
    fold[order] = np.arange(len(codes)) % folds
    w2, med, lum, lum_t = cross_validate(X, labels, fold)
    print(f"{len(codes)} JHC stars, interleaved {folds}-fold CV: within 2 subclasses {w2:.1%} (target 80%), "
          f"median |error| {med:.2f} (target <= 1.5), luminosity group B-K {lum:.1%} (target 75%)")
    print(f"  luminosity group B-K given the published type: {lum_t:.1%}")
    rng = np.random.default_rng(2026)
    runs = []
    for _ in range(partitions):
        fold = np.empty(len(codes), int)
        for start in range(0, len(codes), folds):   # each block of `folds` neighbours in type
            block = order[start:start + folds]
            fold[block] = rng.permutation(folds)[:len(block)]
        runs.append(cross_validate(X, labels, fold))
    runs = np.array(runs)
    mean, sd = runs.mean(axis=0), runs.std(axis=0, ddof=1) if partitions > 1 else np.zeros(4)
    print(f"{partitions} random type-stratified partitions (mean +- sd): within 2 {mean[0]:.1%} +- {sd[0]:.1%}, "
          f"median {mean[1]:.2f} +- {sd[1]:.2f}, luminosity group {mean[2]:.1%} +- {sd[2]:.1%}, "
          f"at the published type {mean[3]:.1%} +- {sd[3]:.1%}")
    return 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 8))
