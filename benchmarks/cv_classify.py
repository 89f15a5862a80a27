"""Precision benchmark: MK types, luminosity classes and atmospheric parameters, cross-validated.

Needs ``../shared/reference/jhc1984`` and ``../shared/reference/miles`` (development machines and
CI only). Everything is refitted per fold; no star is ever in its own training fold (nor its twin
in the other library: HD 94028 is in both).

1. **MK types** with the default calibration's recipe (``scripts/fit_default_calibration.py``:
   JHC stars with their velocities removed as ``specan classify`` does, MILES stars at rest, all
   at 13 A FWHM). JHC stars are predicted by calibrations fitted on the other JHC folds plus the
   MILES standards; MILES stars with a full MK type by calibrations fitted on the other MILES
   folds plus the JHC stars. Interleaved folds (every k-th star in type order) and random
   type-stratified partitions (mean and standard deviation over them).
2. The same **with the surface gravity** weighing the luminosity classes (specan.classify.gravity):
   MILES stars' log g and Teff are their held-out predictions from the parameter model's 10-fold CV
   (``scripts/fit_parameter_model.py``); JHC stars' come from the packaged model, fitted on MILES
   only. The class-gravity relations are refitted on each fold's MILES training stars.
3. The same **with the library neighbours** weighing the type (specan.classify.neighbours, as
   ``specan.classify`` does by default): each JHC star compared with every MILES star of the shipped
   comparison set (its twin left out), each MILES star with all the others (itself and any star of
   the same name left out: leave-one-out). ``+n`` in the keys; ``MILES+g+n`` and ``JHC+n`` are what
   ``specan classify`` does for spectra like each library's (log g is not used at the JHC's 13 A).
   Also the neighbours alone (weighted median type and weighted class vote of the voting stars),
   and the upper bound set by the published types themselves: how often JHC's second published
   type (``alt_mk``, where given) lies within 2 subclasses of the first, and in the same group.
4. **Atmospheric parameters**: the parameter model's own 10-fold CV on MILES (F-K, cooler, hotter).

Targets (issue "A real reference library"): JHC >= 85% within 2 subclasses and luminosity group
>= 80% (B-K); MILES >= 80% / >= 75%; F-K Teff rms <= 2.5%, log g <= 0.35 dex, [Fe/H] <= 0.2 dex.
Run: ``python benchmarks/cv_classify.py [partitions]`` (default 3; about 20 minutes on 2 cores).
"""

from __future__ import annotations

import importlib.util
import sys
import warnings
from pathlib import Path

import numpy as np

import specan
from specan.mktypes import luminosity_group, sptype_to_code

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = ROOT.parent / "shared" / "reference"
C = importlib.import_module("specan.classify")
#: The one star in both libraries (by name; MILES lists it as HD094028). As a metal-poor star it is
#: not a MILES standard, but the rule stands for any other pair.
TWINS = {"jhc1984:HD94028": "miles:m0394", "miles:m0394": "jhc1984:HD94028"}


def _script(name):
    spec = importlib.util.spec_from_file_location(name, ROOT / "scripts" / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def measure(velocities=None):
    """Criteria, labels, ids of both libraries and the resolution (the default calibration's recipe).

    ``velocities`` (a list) receives the JHC stars' removed velocities.
    """
    fit = _script("fit_default_calibration")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        Xj, Lj, Ij = fit.measure_jhc(REFERENCE / "jhc1984", C, velocities)
        Xm, Lm, Im, _ = fit.measure_miles(REFERENCE / "miles", C)
    return np.array(Xj), Lj, Ij, np.array(Xm), Lm, Im, fit.RESOLUTION_AA


def library_evidence(ids_jhc, velocities, ids_miles):
    """specan.classify.neighbours evidence of every JHC star (at its velocity, ~13 A) and, leave-one-out,
    of every MILES standard (at rest, 2.5 A), against the shipped comparison set."""
    from astropy.table import Table

    from specan.classify import neighbours

    ref = neighbours.default_reference()
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cat = Table.read(REFERENCE / "jhc1984" / "catalog.csv", format="ascii.csv")
        files = {f"jhc1984:{r['id']}": r["file"] for r in cat}
        for i, rv in zip(ids_jhc, velocities):
            s = specan.read(REFERENCE / "jhc1984" / str(files[i]))
            flux, good = neighbours.on_grid(s, rv=rv, fwhm_in=13.0)
            out[i] = neighbours.compare(flux, good, ref, exclude=[TWINS[i]] if i in TWINS else ())
        name = dict(zip(ref.ids, ref.names))
        for i in ids_miles:   # the comparison set holds exactly the MILES standards
            k = ref.ids.index(i)
            out[i] = neighbours.compare(ref.flux[k], ref.good[k], ref, exclude=(i, name[i]))
    return [out[i] for i in ids_jhc], [out[i] for i in ids_miles]


def neighbours_alone(evidence):
    """(code, lumclass) of each star from its voting library stars alone: weighted median type, weighted class vote."""
    from specan.mktypes import lumclass_to_number

    out = []
    for e in evidence:
        idx, w = e.weights()
        codes = e.reference.codes[idx]
        order = np.argsort(codes, kind="stable")
        code = codes[order][np.searchsorted(np.cumsum(w[order]) / w.sum(), 0.5)]
        lums = np.array([lumclass_to_number(e.reference.mk[i].split(None, 1)[1]) for i in idx])
        votes = [w[lums == n].sum() for n in range(1, 6)]
        out.append((float(code), C.number_to_lumclass(1 + int(np.argmax(votes)))))
    return out


def published_agreement():
    """(n, within 2 subclasses, same luminosity group) of JHC's alt_mk against its mk, where given."""
    from astropy.table import Table

    from specan.mktypes import parse_mk

    cat = Table.read(REFERENCE / "jhc1984" / "catalog.csv", format="ascii.csv")
    pairs = []
    for r in cat:
        alt = "" if np.ma.is_masked(r["alt_mk"]) else str(r["alt_mk"]).strip()
        if alt:
            code, lc = parse_mk(alt)
            pairs.append((abs(code - sptype_to_code(str(r["sptype"]))) <= 2,
                          luminosity_group(lc) == luminosity_group(str(r["lumclass"]))))
    pairs = np.array(pairs, bool).reshape(-1, 2)
    return len(pairs), float(pairs[:, 0].mean()), float(pairs[:, 1].mean())


def miles_parameters():
    """MILES catalogue, labels, trainable mask and held-out predictions of the parameter model."""
    from astropy.table import Table

    fit = _script("fit_parameter_model")
    catalog = Table.read(REFERENCE / "miles" / "catalog.csv", format="ascii.csv")
    flux, labels, trainable = fit.library_fluxes(REFERENCE / "miles", catalog)
    pred = fit.cross_validate(flux, labels, trainable, np.log10(np.array(fit.NODES_K, float)))
    return fit, catalog, labels, trainable, pred


def jhc_parameters():
    """(Teff, log g, log g error) of each JHC star from the packaged model (fitted on MILES only;
    HD 94028, in both libraries, is one of its 700 training stars)."""
    from astropy.table import Table

    from specan import parameters, velocity

    cat = Table.read(REFERENCE / "jhc1984" / "catalog.csv", format="ascii.csv")
    out = []
    for row in cat:
        s = specan.read(REFERENCE / "jhc1984" / str(row["file"]))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                rv = velocity.measure(s, errors="td", barycentric=False)["rv_topo"]
                r = parameters.measure(s, rv=rv, fwhm_in=13.0)
            # as specan classify does: a spectrum broader than the model does not weigh the classes
            out.append((np.nan, np.nan, np.nan) if r["broader_than_model"] else
                       (r["teff"].value, r["logg"].value, r["logg_err"].value))
        except specan.SpecanError:
            out.append((np.nan, np.nan, np.nan))
    return np.array(out)


def _folds(codes, k, rng=None):
    order = np.argsort(codes, kind="stable")
    fold = np.empty(len(codes), int)
    if rng is None:
        fold[order] = np.arange(len(codes)) % k
    else:
        for start in range(0, len(codes), k):
            block = order[start:start + k]
            fold[block] = rng.permutation(k)[:len(block)]
    return fold


def _score(pred_codes, pred_lums, codes, lums):
    err = np.asarray(pred_codes) - codes
    bk = (codes >= 10) & (codes < 60)   # B0-K9
    right = [luminosity_group(p) == luminosity_group(t) for p, t, k in zip(pred_lums, lums, bk) if k]
    return float(np.mean(np.abs(err) <= 2)), float(np.median(np.abs(err))), float(np.mean(right))


def cross_validate(X, L, ids, X_other, L_other, ids_other, fold, resolution, gravity_inputs=None, evidence=None):
    """Predictions for (X, L) from calibrations fitted on the other folds plus the other library.

    ``gravity_inputs``: (teff, logg, logg_err) per star of X and a function fold -> relations
    table; when given, also the predictions with the gravity weights. ``evidence``: the
    library comparison of each star of X; when given, a dict of the predictions with it
    (``plain``, ``weighted``) is returned as a third item.
    """
    import astropy.units as u

    from specan.classify import gravity

    plain, weighted = [None] * len(L), [None] * len(L)
    with_n = {"plain": [None] * len(L), "weighted": [None] * len(L)}
    for f in range(fold.max() + 1):
        train = np.flatnonzero(fold != f)
        twins = {TWINS.get(ids[i]) for i in np.flatnonzero(fold == f)}
        other = [j for j, i in enumerate(ids_other) if i not in twins]
        cal = C.Calibration(resolution=resolution * u.AA).fit_criteria(
            np.vstack([X[train], X_other[other]]), [L[i] for i in train] + [L_other[j] for j in other])
        table = gravity_inputs[1](f) if gravity_inputs else None
        for i in np.flatnonzero(fold == f):
            r = cal.classify_criteria(X[i])
            plain[i] = (r["code"], r["lumclass"])
            if evidence is not None:
                r = cal.classify_criteria(X[i], neighbours=evidence[i])
                with_n["plain"][i] = (r["code"], r["lumclass"])
            if gravity_inputs:
                t, g, ge = gravity_inputs[0][i]
                w = gravity.class_weights(g, ge, t, table)[0] if np.isfinite(g) else None
                r = cal.classify_criteria(X[i], class_weight=w)
                weighted[i] = (r["code"], r["lumclass"])
                if evidence is not None:
                    r = cal.classify_criteria(X[i], class_weight=w, neighbours=evidence[i])
                    with_n["weighted"][i] = (r["code"], r["lumclass"])
    if evidence is not None:
        return plain, weighted, with_n
    return plain, weighted


def main(partitions=3, folds=10):
    for lib in ("jhc1984", "miles"):
        if not (REFERENCE / lib / "catalog.csv").is_file():
            print(f"reference library {lib} not found under {REFERENCE}: nothing to measure")
            return 1
    from specan.classify.gravity import relations_from_table

    rvj = []
    Xj, Lj, Ij, Xm, Lm, Im, res = measure(rvj)
    ej, em = library_evidence(Ij, rvj, Im)
    fit, catalog, labels, trainable, pred = miles_parameters()
    teff = labels[:, 0]
    fk = (teff >= 4000) & (teff <= 7000)
    print("atmospheric parameters, 10-fold CV on MILES (held-out predictions against the library's values):")
    for name, sel in (("F-K (4000-7000 K), all with parameters", fk), ("F-K, training-quality labels", fk & trainable),
                      ("cooler than 4000 K", (teff < 4000) & trainable), ("hotter than 7000 K", (teff > 7000) & trainable)):
        print("  " + fit.summary(pred, labels, sel, name))

    # gravity inputs: MILES held-out parameters; JHC from the packaged model
    row_of = {f"miles:{i}": k for k, i in enumerate(catalog["id"])}
    mg = np.array([(pred[row_of[i], 0], pred[row_of[i], 1], 0.3) for i in Im])   # 0.3 dex: the CV's log g scatter
    jg = jhc_parameters()
    miles_ids = [str(i) for i in catalog["id"]]

    def relations_without(held_ids):
        keep = trainable & ~np.isin([f"miles:{i}" for i in miles_ids], list(held_ids))
        return relations_from_table(fit.class_gravity(catalog, labels, keep))

    codes_j = np.array([sptype_to_code(s) for s, _ in Lj])
    codes_m = np.array([sptype_to_code(s) for s, _ in Lm])
    lums_j = [lc for _, lc in Lj]
    lums_m = [lc for _, lc in Lm]
    full = relations_from_table(fit.class_gravity(catalog, labels, trainable))
    runs = {"JHC": [], "JHC+g": [], "JHC+n": [], "MILES": [], "MILES+g": [], "MILES+n": [], "MILES+g+n": []}
    rng = np.random.default_rng(2026)
    for p in range(partitions + 1):
        fj = _folds(codes_j, folds, None if p == 0 else rng)
        fm = _folds(codes_m, folds, None if p == 0 else rng)
        # JHC stars are not in the relations' training set: the full MILES relations serve every fold
        pj, wj, nj = cross_validate(Xj, Lj, Ij, Xm, Lm, Im, fj, res, (jg, lambda f: full), ej)
        pm, wm, nm = cross_validate(Xm, Lm, Im, Xj, Lj, Ij, fm, res,
                                    (mg, lambda f: relations_without({Im[i] for i in np.flatnonzero(fm == f)})), em)
        for key, got, codes, lums in (("JHC", pj, codes_j, lums_j), ("JHC+g", wj, codes_j, lums_j),
                                      ("JHC+n", nj["plain"], codes_j, lums_j),
                                      ("MILES", pm, codes_m, lums_m), ("MILES+g", wm, codes_m, lums_m),
                                      ("MILES+n", nm["plain"], codes_m, lums_m),
                                      ("MILES+g+n", nm["weighted"], codes_m, lums_m)):
            runs[key].append(_score([g[0] for g in got], [g[1] for g in got], codes, lums))
        label = "interleaved folds" if p == 0 else f"random partition {p}"
        print(f"{label}: " + "; ".join(f"{k} within 2 {v[-1][0]:.1%} median {v[-1][1]:.2f} lum group {v[-1][2]:.1%}"
                                       for k, v in runs.items()), flush=True)
    print(f"\nMK types, {len(Lj)} JHC + {len(Lm)} MILES stars at {res:g} A, {folds}-fold CV "
          "(targets: JHC 85% / 80%, MILES 80% / 75%):")
    for key, v in runs.items():
        v = np.array(v)
        rand = v[1:] if len(v) > 1 else v
        sd = rand.std(axis=0, ddof=1) if len(rand) > 1 else np.zeros(3)
        print(f"  {key:8s} interleaved: within 2 {v[0, 0]:.1%}, median {v[0, 1]:.2f}, lum group B-K {v[0, 2]:.1%}; "
              f"{len(rand)} random partitions: {rand[:, 0].mean():.1%} +- {sd[0]:.1%}, "
              f"{rand[:, 1].mean():.2f} +- {sd[1]:.2f}, {rand[:, 2].mean():.1%} +- {sd[2]:.1%}")
    print("\nlibrary neighbours alone (no criteria; JHC against all MILES standards, MILES leave-one-out):")
    for key, ev, codes, lums in (("JHC", ej, codes_j, lums_j), ("MILES", em, codes_m, lums_m)):
        got = neighbours_alone(ev)
        s = _score([g[0] for g in got], [g[1] for g in got], codes, lums)
        print(f"  {key:8s} within 2 {s[0]:.1%}, median {s[1]:.2f}, lum group B-K {s[2]:.1%}")
    n, within, group = published_agreement()
    print(f"\npublished types against each other: JHC's second type (alt_mk, {n} stars) within 2 subclasses of "
          f"the first for {within:.1%}, same luminosity group for {group:.1%}")
    return 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 3))
