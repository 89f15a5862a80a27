"""The warnings a classification may raise, one check each.

Every check returns a list of ``(flag, note)`` pairs: empty when the flag is not
raised, the flag name (one of :data:`FLAGS`) and a sentence saying why when it is.
"""

from __future__ import annotations

import numpy as np

from ..mktypes import code_to_sptype
from .criteria import criteria_names

__all__ = ["FLAGS", "LOW_SNR", "FEATURELESS", "EMISSION_DEPTH", "low_snr", "out_of_range", "poor_fit",
           "featureless", "emission", "composite", "gravity_conflict"]

#: Flags :func:`specan.classify.classify` may raise (the ``flags`` list holds those raised).
FLAGS = ("low_snr", "out_of_range", "peculiar", "emission", "composite", "gravity_conflict")

#: S/N per pixel below which the ``low_snr`` flag is raised (common practice: criteria at
#: R ~ 1000-2000 become unreliable well before S/N 20; same threshold as specan.pipeline).
LOW_SNR = 20.0
#: A spectrum whose criteria sum to less than this fraction of the weakest standard's absolute
#: depth has no absorption features to classify by (our choice: the JHC standards' weakest, an
#: O5 star, sums to 1.08; noise at S/N 100 adds about 0.2).
FEATURELESS = 0.3
#: A line rising this far above its pseudo-continuum (plus 3 sigma of noise) is emission
#: (our convention, not a published threshold).
EMISSION_DEPTH = -0.05


def low_snr(snr):
    """``low_snr`` when the S/N per pixel is known and below :data:`LOW_SNR`."""
    if snr is not None and snr < LOW_SNR:
        return [("low_snr", f"S/N {snr:.0f} per pixel below {LOW_SNR:g}")]
    return []


def out_of_range(n_ok, n_all, code, grid, quality, quality_limit):
    """``out_of_range`` when under half the criteria are measurable (wavelength coverage), or
    when the type is within a subclass of either end of the calibrated ``grid`` and the fit
    quality is worse than ``quality_limit`` (the type may lie beyond the calibration)."""
    if n_ok < 0.5 * n_all:
        return [("out_of_range", f"only {n_ok} of {n_all} criteria measurable (wavelength coverage)")]
    if (code - grid[0] < 1.0 or grid[-1] - code < 1.0) and quality > quality_limit:
        return [("out_of_range", f"at the end of the calibrated range ({code_to_sptype(grid[0])}-"
                                 f"{code_to_sptype(grid[-1])}) and poorly matched: the type may lie beyond it")]
    return []


def poor_fit(quality, quality_limit, sptype, lumclass):
    """``peculiar`` when the criteria fit the relations of their type worse than ``quality_limit``
    (the fit quality 97.5% of the standards stayed under)."""
    if quality > quality_limit:
        return [("peculiar", f"criteria fit the {sptype} {lumclass} relations worse than 97.5% of the "
                             f"standards did (fit quality {quality:.2f} > {quality_limit:.2f})")]
    return []


def featureless(x, n_depth, weakest):
    """``peculiar`` when the first ``n_depth`` criteria (the depths) sum, in absolute value, to less
    than :data:`FEATURELESS` of the ``weakest`` standard's.

    The hottest types have the weakest lines, so a spectrum without any fits them within
    their wide scatter; say that it has no lines instead of quietly calling it O.
    """
    strength = float(np.nansum(np.abs(x[:n_depth])))
    if strength < FEATURELESS * weakest:
        return [("peculiar", f"no absorption features: summed depth of the criteria {strength:.2f}, under "
                             f"{FEATURELESS:g} of the weakest standard's (a featureless spectrum; the type means little)")]
    return []


def emission(x, noise, ok, model, scatter, code):
    """``emission`` for the first of H-alpha, H-beta and He II 4686 that rises above its pseudo-continuum.

    The line rises above its pseudo-continuum (beyond the standards' own value when that is
    negative, e.g. TiO in the side bands of M stars) by 5% plus 3 sigma of noise, and by 4
    scatters more than the standards of this type (``model``, ``scatter``). He II 4686 only
    in O-B stars (Of emission): in cooler stars its side bands hold metal lines.
    """
    names = criteria_names()
    for name in ("halpha", "hbeta", "heii_4686"):
        j = names.index(name)
        if name == "heii_4686" and code >= 20:
            continue
        limit = min(model[j], 0.0) + EMISSION_DEPTH - 3.0 * noise[j]
        if ok[j] and x[j] < limit and x[j] < model[j] - 4.0 * scatter[j]:
            return [("emission", f"{name} rises {-x[j]:.0%} above its pseudo-continuum")]
    return []


def composite(split, split_limit):
    """``composite`` when the blue and red criteria give types ``split`` subclasses apart, more than
    ``split_limit`` (None: a half too thin to tell)."""
    if split is not None and split > split_limit:
        return [("composite", f"blue and red criteria disagree by {split:.1f} subclasses "
                              "(two stars of different type?)")]
    return []


def gravity_conflict(lumclass, z, limit):
    """``gravity_conflict`` when the measured log g lies more than ``limit`` sigma from the class's.

    ``z`` holds, for classes I..V, the measured log g's distance from each class's expected one
    in combined sigma (:func:`specan.classify.gravity.class_weights`).
    """
    from ..mktypes import lumclass_to_number

    zc = float(z[lumclass_to_number(lumclass) - 1])
    if abs(zc) > limit:
        return [("gravity_conflict", f"the measured log g is {abs(zc):.1f} sigma from class {lumclass}'s at this "
                                     "Teff: luminosity class and gravity disagree")]
    return []
