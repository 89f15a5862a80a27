"""From the posterior on the (code, class) lattice to the quoted answer.

The type (mode of the marginal code posterior, quoted to half a subclass), its
uncertainty, the luminosity class (most probable), Teff from the published scales,
and the standards nearest to the star's criteria.
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import astropy.units as u
import numpy as np

from ..mkscales import teff_from_type
from ..mktypes import code_to_sptype, number_to_lumclass
from .criteria import criteria_names
from .relations import LUMS, summarise

__all__ = ["TypeEstimate", "read_posterior", "teff_estimate", "nearest_standards", "criteria_table"]


class TypeEstimate(NamedTuple):
    """Type and class read off a posterior."""
    code: float               # most probable type code (O0=0 ... M0=60)
    code_err: float           # 1 sigma, subclasses
    sptype: str               # the code quoted to half a subclass ("G2")
    lumclass: str             # most probable class ("V")
    class_prob: np.ndarray    # probability of each class I..V
    code_index: int           # lattice row of the code
    class_index: int          # lattice column of the class


def read_posterior(p, ll, grid, tau_class, class_weight=None, type_weight=None):
    """Type, its uncertainty and the class probabilities from a posterior.

    Parameters
    ----------
    p : ndarray, shape (G, 5)
        Posterior on the lattice (at the type temperature).
    ll : ndarray, shape (G, 5)
        The log-likelihood it came from, for the class probabilities at ``tau_class``.
    grid : ndarray
        Type codes of the lattice rows.
    tau_class : float
        Temperature of the class probabilities.
    class_weight : ndarray (5,), optional
        An independent likelihood of each class I..V (e.g. from the surface gravity,
        :mod:`specan.classify.gravity`), multiplied into the posterior and the class probabilities.
    type_weight : ndarray (G,), optional
        An independent likelihood of each type code of ``grid`` (e.g. from the library stars most
        like the spectrum, :mod:`specan.classify.neighbours`), multiplied into the type posterior;
        the class probabilities stay the criteria's (and ``class_weight``'s).

    Returns
    -------
    TypeEstimate
    """
    if class_weight is not None:
        p = p * np.asarray(class_weight, float)[None, :]
        p = p / p.sum()
    if type_weight is not None:
        p = p * np.asarray(type_weight, float)[:, None]
        p = p / p.sum()
    code, code_err, _ = summarise(p, grid)
    pl = np.exp((ll - ll.max()) / tau_class).sum(axis=0)
    if class_weight is not None:
        pl = pl * np.asarray(class_weight, float)
    pl /= pl.sum()
    code_err = max(code_err, 0.5)    # standards' own types are quoted to half a subclass at best
    # The most probable class. (Tried on the library in 10-fold CV: the median of the ordered
    # classes, or the most probable group I / II-III / IV-V first, put 57-58% of B-K stars in
    # the right group against 64% for this.)
    li = int(np.argmax(pl))
    gi = int(np.argmin(np.abs(grid - code)))
    shown = round(code * 2.0) / 2.0          # half subclasses, as MK types are quoted
    return TypeEstimate(code, code_err, code_to_sptype(shown), number_to_lumclass(LUMS[li]), pl, gi, li)


def teff_estimate(code, code_err, class_prob):
    """Teff and its error (Quantity K) for a type code, averaged over the class probabilities.

    The published type-Teff scale of each class (specan.mkscales), averaged over the
    class probabilities; the error adds the spread between the classes' values.
    """
    tk, te = _class_teffs(float(code), float(code_err))
    teff_value = float(np.sum(class_prob * tk))
    teff_err = float(np.sqrt(np.sum(class_prob * (te ** 2 + (tk - teff_value) ** 2))))
    return teff_value * u.K, teff_err * u.K


@functools.lru_cache(maxsize=4096)
def _class_teffs(code, code_err):
    """Teff and its error (K) of every class I..V at a type code: the scales' values, kept per (code, error).

    The code is a lattice point and the error is floored at half a subclass (most stars sit on the
    floor), so a night's stars ask for few pairs; the five scale look-ups cost 0.3 ms a star (measured).
    The arrays are read only: every caller gets the same ones.
    """
    tk = np.empty(len(LUMS))
    te = np.empty(len(LUMS))
    for n, lc in enumerate(LUMS):
        t, e = teff_from_type(code, number_to_lumclass(lc), code_err)
        tk[n], te[n] = t.to_value(u.K), e.to_value(u.K)
    tk.flags.writeable = te.flags.writeable = False
    return tk, te


def nearest_standards(standards, x, noise, ok, scatter, weights, k=3, criteria=None):
    """The ``k`` standards whose criteria are nearest to ``x``.

    Distance: weighted RMS difference in units of the relations' ``scatter`` at the
    star's type (noise added in quadrature), over the criteria both have. ``criteria``: the
    standards' criteria as one (standards, criteria) array when the caller keeps it.

    Returns
    -------
    list of dict
        ``id``, ``mk`` and ``distance`` of each, nearest first.
    """
    S = np.array([s["criteria"] for s in standards]) if criteria is None else criteria
    scale = np.sqrt(scatter ** 2 + noise ** 2)
    d2 = (S - x) ** 2 / scale ** 2
    both = np.isfinite(d2) & ok
    dist = np.sqrt(np.sum(np.where(both, weights * d2, 0.0), axis=1) / np.sum(np.where(both, weights, 0.0), axis=1))
    out = []
    for i in np.argsort(dist)[:k]:
        s = standards[i]
        out.append({"id": s["id"], "mk": f"{s['sptype']} {s['lumclass']}", "distance": float(dist[i])})
    return out


def criteria_table(x, ok, model):
    """Name -> {value (None where not measured), standard (the relations' value at the type)}."""
    return {n: {"value": float(x[j]) if ok[j] else None, "standard": float(model[j])}
            for j, n in enumerate(criteria_names())}
