"""Internal cross-validation of a calibration on its own standards.

Each standard is classified by relations refitted without its fold. From those
held-out classifications come the two likelihood temperatures (the criteria are
correlated, so the raw likelihood is too sharp), the thresholds of the
``peculiar``, ``out_of_range`` and ``composite`` flags, and the figures a
calibration file reports about itself.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .relations import code_grid, fine_model, fit_model, fit_quality, posterior, split_distance, summarise

__all__ = ["TEMPERATURES", "HeldOut", "cross_validate", "interleaved_folds", "held_out_results",
           "coverage_temperature", "class_temperature", "flag_limits", "lum_group_rate"]

#: Likelihood temperatures tried.
TEMPERATURES = (1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0)


class HeldOut(NamedTuple):
    """One standard classified by relations fitted without it."""
    loglike: np.ndarray   # on the (code, class) lattice
    grid: np.ndarray      # codes of the lattice
    code: float           # the standard's published type code
    lum_index: int        # its published class, 0 (I) ... 4 (V)


def cross_validate(X, code, lum, settings):
    """k-fold CV inside the training set: likelihood temperatures, flag thresholds and a summary.

    Parameters
    ----------
    X : ndarray, shape (n_standards, n_criteria)
        The standards' criteria as fitted.
    code, lum : ndarray
        Their type codes and luminosity classes as numbers.
    settings : dict
        :class:`specan.classify.Calibration` settings (``cv_folds``, ``dof``...).

    Returns
    -------
    dict
        ``tau`` (temperature of the type posterior), ``tau_class`` (of the class
        probabilities), ``limits`` (flag thresholds) and ``summary`` (the figures).
    """
    k = max(2, min(settings["cv_folds"], len(code) // 4))
    fold = interleaved_folds(code, k)
    held, quality, splits = held_out_results(X, code, lum, fold, settings)
    tau, coverage, errors = coverage_temperature(held)
    tau_class = class_temperature(held)
    err = np.abs(errors)
    group_rate = lum_group_rate(held, tau_class)
    summary = {"folds": int(k), "n": int(len(code)), "within_2_subclasses": float(np.mean(err <= 2)),
               "median_abs_error": float(np.median(err)), "interval_coverage": coverage,
               "lum_group_right_B_to_K": group_rate,
               "note": "internal k-fold cross-validation of this calibration's own standards, "
                       "refitting per fold (folds interleaved in type)"}
    return {"tau": tau, "tau_class": tau_class, "limits": flag_limits(quality, splits), "summary": summary}


def interleaved_folds(code, k):
    """Fold number of each standard: every k-th in type order, so every fold spans the whole type range."""
    order = np.argsort(code, kind="stable")
    fold = np.empty(len(code), int)
    fold[order] = np.arange(len(code)) % k
    return fold


def held_out_results(X, code, lum, fold, settings):
    """Classify every standard with relations fitted without its fold.

    Returns
    -------
    held : list of HeldOut
        Per standard, the lattice log-likelihood at temperature 1.
    quality : list of float
        Fit quality at each standard's most probable (code, class).
    splits : list of float or None
        Blue-red code disagreement (:func:`split_distance`) of each standard.
    """
    step, dof = settings["grid_step"], settings["dof"]
    held, quality, splits = [], [], []
    for f in range(fold.max() + 1):
        tr = fold != f
        fine = fine_model(fit_model(X[tr], code[tr], lum[tr], settings, code_grid(code[tr], step)),
                          settings["depth_scale_sigma"])
        for i in np.where(~tr)[0]:
            ok = np.isfinite(X[i])
            p, ll, z2 = posterior(X[i], np.zeros(X.shape[1]), fine, dof, 1.0, ok)
            held.append(HeldOut(ll, fine["grid"], code[i], int(lum[i]) - 1))
            c, _, pl = summarise(p, fine["grid"])
            gi = int(np.argmin(np.abs(fine["grid"] - c)))
            quality.append(fit_quality(z2, fine["weights"], ok, gi, int(np.argmax(pl))))
            splits.append(split_distance(X[i], np.zeros(X.shape[1]), fine, dof, 1.0))
    return held, quality, splits


def coverage_temperature(held):
    """The temperature whose 16-84% intervals hold the true type 68% of the time.

    The correlated criteria make the raw likelihood too sharp. Returns the temperature,
    the coverage it reaches and the held-out type errors (code - truth) at it.
    """
    best = None
    for tau in TEMPERATURES:
        hits, e = [], []
        for h in held:
            p = np.exp((h.loglike - h.loglike.max()) / tau)
            p /= p.sum()
            c, err, _ = summarise(p, h.grid)
            hits.append(abs(c - h.code) <= max(err, 0.5))
            e.append(c - h.code)
        cover = float(np.mean(hits))
        # 0.683: probability within 1 sigma of a Gaussian (common practice)
        if best is None or abs(cover - 0.683) < abs(best[1] - 0.683):
            best = (tau, cover, np.array(e))
    return best


def class_temperature(held):
    """The class probabilities' own temperature.

    The one that maximises the mean log-probability of the standards' published classes
    (a proper score) in the CV.
    """
    scores = []
    for tau in TEMPERATURES:
        logp = []
        for h in held:
            p = np.exp((h.loglike - h.loglike.max()) / tau).sum(axis=0)
            logp.append(np.log(max(p[h.lum_index] / p.sum(), 1e-6)))
        scores.append(float(np.mean(logp)))
    return TEMPERATURES[int(np.argmax(scores))]


def flag_limits(quality, splits):
    """Thresholds of the flags from the held-out fit qualities and blue-red disagreements."""
    quality = np.array(quality)
    splits = np.array([s for s in splits if s is not None])
    return {
        "quality_p90": float(np.percentile(quality, 90)),
        "quality_p975": float(np.percentile(quality, 97.5)),
        "split_p975": float(max(6.0, np.percentile(splits, 97.5))) if splits.size else 10.0,
    }


def _group(lumnum):
    """Luminosity group of a class number: 0 supergiants (I), 1 giants (II-III), 2 dwarfs (IV-V)."""
    return 0 if lumnum <= 1 else (1 if lumnum <= 3 else 2)


def lum_group_rate(held, tau_class):
    """Fraction of the B-K standards whose most probable class is in their published group (None if none)."""
    groups = []
    for h in held:
        if 10 <= h.code < 60:
            p = np.exp((h.loglike - h.loglike.max()) / tau_class).sum(axis=0)
            groups.append(_group(h.lum_index + 1) == _group(int(np.argmax(p)) + 1))
    groups = np.array(groups)
    return float(np.mean(groups)) if groups.size else None
