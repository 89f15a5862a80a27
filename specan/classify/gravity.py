"""Luminosity class from surface gravity: how likely a measured log g is for each MK class.

At a given temperature the luminosity classes sit at different surface gravities (the MK
classes are gravity classes at heart). ``specan/data/lumclass_logg.ecsv`` holds, per class, log g
as a quadratic in log Teff and the scatter about it, fitted on the MILES library's stars with a
full MK type (Cenarro et al. 2007 and Prugniel et al. 2011 parameters; ``scripts/fit_parameter_model.py``).
A measured log g (with its error) at a measured Teff then weighs each class by a Gaussian
likelihood; :meth:`specan.classify.Calibration.classify_criteria` multiplies its lattice
posterior by these weights, so type, class probabilities and Teff stay one consistent answer.
"""

from __future__ import annotations

import functools
import math
from importlib import resources

import numpy as np

from ..mktypes import lumclass_to_number

__all__ = ["RELATIONS_FILE", "relations", "relations_from_table", "expected_logg", "class_weights", "DISAGREE_SIGMA"]

RELATIONS_FILE = "lumclass_logg.ecsv"
#: A class whose expected log g is further than this many sigma from the measured one disagrees
#: with it (our threshold: 3 sigma of a Gaussian, 0.3% by chance).
DISAGREE_SIGMA = 3.0


@functools.lru_cache(maxsize=1)
def relations():
    """{class number 1..5: (c0, c1, c2, scatter_dex, teff_min, teff_max)} from the packaged table."""
    from astropy.table import Table

    with resources.as_file(resources.files("specan.data") / RELATIONS_FILE) as path:
        return relations_from_table(Table.read(path, format="ascii.ecsv"))


def relations_from_table(t):
    """The :func:`relations` dict of a table with columns lumclass, c0, c1, c2, scatter_dex, teff_min_k, teff_max_k."""
    return {lumclass_to_number(str(r["lumclass"])): (float(r["c0"]), float(r["c1"]), float(r["c2"]),
                                                     float(r["scatter_dex"]), float(r["teff_min_k"]),
                                                     float(r["teff_max_k"])) for r in t}


def expected_logg(lumnum, teff, table=None):
    """(log g, scatter) expected for class number ``lumnum`` at ``teff`` (K), Teff clipped to its range.

    ``table``: relations as :func:`relations` returns them (default: the packaged ones).
    """
    c0, c1, c2, scatter, lo, hi = (table or relations())[int(lumnum)]
    x = math.log10(min(max(float(teff), lo), hi)) - 3.7
    return c0 + c1 * x + c2 * x * x, scatter


def class_weights(logg, logg_err, teff, table=None):
    """Likelihood of a measured log g for each class I..V (array of 5, largest 1) and the z of each.

    Parameters
    ----------
    logg, logg_err : float
        Measured surface gravity and its 1-sigma error (dex).
    teff : float
        Measured effective temperature (K).
    table : dict, optional
        Relations as :func:`relations` returns them (default: the packaged ones).

    Returns
    -------
    weights, z : numpy.ndarray
        Gaussian likelihoods normalised to a maximum of 1, and the distance of the measured log g
        from each class's in combined sigma.
    """
    z = np.empty(5)
    norm = np.empty(5)
    for n in range(1, 6):
        mu, scatter = expected_logg(n, teff, table)
        sigma = math.hypot(scatter, float(logg_err))
        z[n - 1] = (float(logg) - mu) / sigma
        norm[n - 1] = sigma
    lw = -0.5 * z ** 2 - np.log(norm)
    w = np.exp(lw - lw.max())
    return w, z
