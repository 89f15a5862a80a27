#!/usr/bin/env python
"""Regenerate specan/data/parameters_miles.fits, the atmospheric-parameter model, and print its CV.

Fits :class:`specan.parameters.ParameterModel` on the development part of the MILES library
(Sanchez-Blazquez et al. 2006, MNRAS 371, 703; 2.50 A FWHM: Falcon-Barroso et al. 2011, A&A
532, A95; Teff, log g, [Fe/H]: Cenarro et al. 2007, MNRAS 374, 664 and Prugniel et al. 2011,
A&A 531, A165), expected in ``../shared/reference/miles`` (or give its folder). Every star goes
through :func:`specan.parameters.on_model_grid`, the path a user's spectrum takes.

Training stars: every star with all three parameters, except those whose published type marks
a composite (``+``), uncertain (``:``) or peculiar (``p``) spectrum, and those whose parameters
contradict their published MK type (Teff more than 0.1 dex from the type's on specan's scale,
or a dwarf with log g < 3.5, a giant or supergiant cooler than 7500 K with log g > 4.0): label
errors the model should not learn. The cross-validated scatter (10 folds, every star predicted
by a model that never saw it, clipped at 4 sigma) of each label near each node goes into the
file as the model's systematic error. Only derived numbers are written, never a spectrum.

Usage::

    python scripts/fit_parameter_model.py [LIBRARY_DIR] [--out PATH] [--cv-only]
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))
from miles_catalog import read_catalog, text, value  # noqa: E402

SOURCE = ("MILES stellar library v9.1, development part ({n} training stars): Sanchez-Blazquez et al. 2006; "
          "Falcon-Barroso et al. 2011 (2.50 A); parameters Cenarro et al. 2007, Prugniel et al. 2011; "
          "quadratic-in-labels model (Ness et al. 2015) at Teff nodes; fitted by scripts/fit_parameter_model.py")
#: Temperature nodes (K) of the piecewise model; spacing ~8-15% in Teff, wider where the library is thin.
NODES_K = (3300, 3700, 4100, 4500, 4900, 5300, 5800, 6300, 6900, 7700, 9000, 11000, 14000, 20000)
FOLDS = 10
SEED = 1


def contradicted(row, teff, logg):
    """True when a star's parameters contradict its published MK type (see the module docstring)."""
    from specan.mkscales import teff_from_type
    from specan.mktypes import lumclass_to_number, sptype_to_code

    sp, lc = text(row["sptype"]), text(row["lumclass"])
    if sp:
        t_type = teff_from_type(sptype_to_code(sp), lc or "V")[0].value
        if abs(np.log10(teff / t_type)) > 0.1:
            return True
    if lc:
        n = lumclass_to_number(lc)
        if (n == 5 and logg < 3.5) or (n <= 3 and logg > 4.0 and teff < 7500):
            return True
    return False


def library_fluxes(library, catalog):
    """(flux rows on the model pixels, NaN where unusable; labels (n, 3); trainable mask)."""
    import specan
    from specan.parameters import on_model_grid

    rows, labels, trainable = [], [], []
    for row in catalog:
        lab = [value(row[c]) for c in ("teff_k", "logg", "feh")]
        s = specan.read(library / text(row["file"]), medium="air")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            flux, good, _ = on_model_grid(s, rv=None, fwhm_in=2.5)   # the library: 2.5 A, at rest (its README)
        rows.append(np.where(good, flux, np.nan))
        labels.append(lab)
        pub = text(row["sptype_published"])
        odd = any(c in pub for c in "+:p")
        ok = np.all(np.isfinite(lab)) and not odd and not contradicted(row, lab[0], lab[1])
        trainable.append(bool(ok))
    return np.array(rows), np.array(labels), np.array(trainable)


def cross_validate(flux, labels, trainable, nodes):
    """Held-out predictions (n, 3) for every star with labels (NaN for the others)."""
    from specan.parameters import ParameterModel, fit_labels

    have = np.all(np.isfinite(labels), axis=1)
    fold = np.random.default_rng(SEED).permutation(len(labels)) % FOLDS
    pred = np.full(labels.shape, np.nan)
    for f in range(FOLDS):
        train = trainable & (fold != f)
        model = ParameterModel.fit(flux[train], labels[train], nodes)
        for i in np.flatnonzero(have & (fold == f)):
            good = np.isfinite(flux[i])
            pred[i] = fit_labels(model, np.nan_to_num(flux[i], nan=1.0), good)["labels"]
        print(f"  fold {f + 1}/{FOLDS}", file=sys.stderr, flush=True)
    return pred


def node_scatter(pred, labels, trainable, nodes):
    """Robust CV scatter (Teff fraction, log g, [Fe/H]) of the training stars nearest each node."""
    lt = np.log10(labels[:, 0])
    out = np.zeros((len(nodes), 3))
    d = np.column_stack([(pred[:, 0] - labels[:, 0]) / labels[:, 0], pred[:, 1] - labels[:, 1],
                         pred[:, 2] - labels[:, 2]])
    for k, node in enumerate(nodes):
        sel = trainable & np.all(np.isfinite(d), axis=1)
        near = np.argsort(np.where(sel, np.abs(lt - node), np.inf))[:40]   # the 40 nearest (common practice)
        near = near[sel[near]]
        for j in range(3):
            x = d[near, j]
            sd = 1.4826 * np.median(np.abs(x - np.median(x)))      # MAD -> sd of a Gaussian
            out[k, j] = np.sqrt(np.mean(x[np.abs(x - np.median(x)) < 4 * sd] ** 2))
    return out


def class_gravity(catalog, labels, trainable):
    """Table of log g against log Teff per luminosity class (quadratic and scatter) from the library."""
    from astropy.table import Table

    from specan.mktypes import lumclass_to_number, number_to_lumclass

    lum = np.array([lumclass_to_number(text(r["lumclass"])) if text(r["lumclass"]) else 0 for r in catalog])
    rows = []
    for n in range(1, 6):
        sel = trainable & (lum == n)
        x = np.log10(labels[sel, 0]) - 3.7
        g = labels[sel, 1]
        deg = 2 if sel.sum() >= 30 else 1
        coef = np.polynomial.polynomial.polyfit(x, g, deg)
        resid = g - np.polynomial.polynomial.polyval(x, coef)
        coef = np.pad(coef, (0, 3 - len(coef)))
        rows.append((number_to_lumclass(n), *coef, float(np.std(resid, ddof=deg + 1)), int(sel.sum()),
                     float(labels[sel, 0].min()), float(labels[sel, 0].max())))
    t = Table(rows=rows, names=("lumclass", "c0", "c1", "c2", "scatter_dex", "n_stars", "teff_min_k", "teff_max_k"))
    t.meta["comments"] = [
        "log g = c0 + c1 x + c2 x^2, x = log10(Teff / K) - 3.7, per MK luminosity class, with the scatter about it",
        "fitted on the MILES library's stars with a full MK type (development part; Teff, log g: Cenarro et al. 2007,",
        "Prugniel et al. 2011) by scripts/fit_parameter_model.py; training-quality labels only (see that script)"]
    return t


def summary(pred, labels, sel, name):
    d = np.column_stack([(pred[:, 0] - labels[:, 0]) / labels[:, 0], pred[:, 1] - labels[:, 1],
                         pred[:, 2] - labels[:, 2]])[sel]
    d = d[np.all(np.isfinite(d), axis=1)]
    rms = np.sqrt(np.mean(d ** 2, axis=0))
    mad = 1.4826 * np.median(np.abs(d - np.median(d, axis=0)), axis=0)
    keep = np.all(np.abs(d) <= 3 * np.maximum(mad, 1e-9), axis=1)
    clipped = np.sqrt(np.mean(d[keep] ** 2, axis=0))
    return (f"{name}: n={len(d)}  rms Teff {100 * rms[0]:.2f}%  log g {rms[1]:.3f}  [Fe/H] {rms[2]:.3f} | "
            f"robust sd {100 * mad[0]:.2f}%  {mad[1]:.3f}  {mad[2]:.3f} | 3-sigma-clipped rms ({(~keep).sum()} out) "
            f"{100 * clipped[0]:.2f}%  {clipped[1]:.3f}  {clipped[2]:.3f}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("library", nargs="?", default=str(ROOT.parent / "shared" / "reference" / "miles"))
    parser.add_argument("--out", default=str(ROOT / "specan" / "data" / "parameters_miles.fits"))
    parser.add_argument("--cv-only", action="store_true", help="print the cross-validation, write nothing")
    parser.add_argument("--save-cv", help="also write the held-out predictions (id, Teff, log g, [Fe/H]) to this CSV")
    args = parser.parse_args(argv)

    from specan.parameters import ParameterModel

    library = Path(args.library)
    catalog = read_catalog(library, "fit_parameter_model")
    if catalog is None:
        return 1
    nodes = np.log10(np.array(NODES_K, float))
    flux, labels, trainable = library_fluxes(library, catalog)
    pred = cross_validate(flux, labels, trainable, nodes)
    teff = labels[:, 0]
    fk = (teff >= 4000) & (teff <= 7000)   # F-K by temperature (the figure)
    for name, sel in (("F-K (4000-7000 K), all with parameters", fk),
                      ("F-K, training-quality labels", fk & trainable),
                      ("cooler than 4000 K", (teff < 4000) & trainable),
                      ("hotter than 7000 K", (teff > 7000) & trainable)):
        print(summary(pred, labels, sel, name))
    if args.save_cv:
        from astropy.table import Table

        Table({"id": [str(i) for i in catalog["id"]], "teff_k": pred[:, 0], "logg": pred[:, 1], "feh": pred[:, 2],
                "trainable": trainable}).write(args.save_cv, format="ascii.csv", overwrite=True)
    if args.cv_only:
        return 0
    model = ParameterModel.fit(flux[trainable], labels[trainable], nodes,
                               source=SOURCE.format(n=int(trainable.sum())))
    model.cv_sd = node_scatter(pred, labels, trainable, nodes)
    model.save(args.out)
    gravity = Path(args.out).with_name("lumclass_logg.ecsv")
    class_gravity(catalog, labels, trainable).write(gravity, format="ascii.ecsv", overwrite=True)
    print(f"wrote {args.out}: {len(nodes)} nodes, {int(trainable.sum())} training stars; and {gravity}",
          file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
