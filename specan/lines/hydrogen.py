"""The fitted hydrogen lines as a transmission model, divided out before the other lines are measured."""

from __future__ import annotations

import astropy.units as u
import numpy as np

from .components import MIN_SEPARATION
from .data import find_features
from .profiles import profiles, voigt_wide

__all__ = ["hydrogen_model", "without_hydrogen"]


def without_hydrogen(data, features, results, targets, ep_low, detect_sigma, min_depth):
    """The arrays and their features with the fitted hydrogen lines divided out.

    Parameters
    ----------
    data : LineData
    features : Features
        Found on ``data``.
    results : dict of int to LineResult
        The hydrogen lines measured so far.
    targets : Targets
    ep_low : Quantity
        Lower-level excitation of each listed line.
    detect_sigma, min_depth : float
        For the features of the divided arrays (see :func:`specan.lines.data.find_features`).

    Returns
    -------
    (LineData, Features)
        ``data`` and ``features`` themselves when no hydrogen line can be divided out.
    """
    model = hydrogen_model(data, results, targets, ep_low.to_value(u.eV))
    if model is None:
        return data, features
    divided = data.divided(model)
    return divided, find_features(divided, detect_sigma, min_depth)


def hydrogen_model(data, results, targets, ep_low):
    """Transmission of the fitted hydrogen absorption lines on the pixel grid, or None.

    A hydrogen line with a listed low-excitation line (lower level below 1 eV, e.g.
    Ca II H beside H epsilon) closer than 0.6 line widths is left out: in cool stars
    that partner can outweigh the hydrogen line and the fit cannot tell them apart.
    High-excitation partners (He II Pickering lines beside the Balmer lines) do not
    block: their share of an unresolvable blend goes to hydrogen.
    """
    pred, is_h = targets.pred, targets.hydrogen
    others = pred[(~is_h) & (np.nan_to_num(ep_low, nan=0.0) < 1.0)]
    kept = []
    for i, result in results.items():
        fit = result.fit
        if fit is None or not is_h[i] or not result.detected or fit["sign"] < 0 or fit["ew"] <= 0:
            continue
        if not abs(fit["ew"] - fit["ew_int"]) <= 0.3 * abs(fit["ew_int"]):
            continue  # the profile does not describe the line (continuum trouble): leave it
        kept.append((i, fit))
    if kept and others.size:
        # an unresolvable blend with a listed line: keep it whole (each line's nearest such line, all
        # lines at once: the same distances and test as line by line)
        idx = np.array([i for i, _ in kept])
        centres = np.array([fit["centre"] for _, fit in kept], float)
        blend = np.abs(others[None, :] - centres[:, None]).min(axis=1) < MIN_SEPARATION * targets.fwhm[idx]
        kept = [k for k, b in zip(kept, blend.tolist()) if not b]
    fits = [fit for _, fit in kept]
    if not fits:
        return None
    # the Voigt profiles over the whole spectrum, their far wings from their series (voigt_wide), of
    # all lines in one call, a line a row with its sigma and gamma as a column: each point's arithmetic
    # is the one of a call per line, so the same values, in one pass instead of one per line
    voigt = [fit for fit in fits if fit["profile"] == "voigt"]
    if voigt:
        prof = voigt_wide(data.wave[None, :] - np.array([f["centre"] for f in voigt])[:, None],
                          np.array([[f["sigma"]] for f in voigt]), np.array([[f["gamma"]] for f in voigt]))
        rows = iter(prof)
    model = np.ones(data.wave.size)
    for fit in fits:   # (in the lines' order: the same products)
        if fit["profile"] == "voigt":
            line = next(rows)
        else:
            line = profiles(data.wave, np.array([fit["centre"]]), 0.0, fit["sigma"], fit["gamma"], fit["profile"])[1][0]
        model *= 1.0 - fit["ew"] * line
    return np.clip(model, 0.05, 1.0)
