"""Spectroscopic distance: V, extinction and M_V as a mixture over luminosity-class probabilities."""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
from scipy import optimize, stats

from ..mkscales import absolute_magnitude, lumclass_number
from ..mktypes import number_to_lumclass
from ._values import as_float

__all__ = ["spectroscopic_distance", "normalise_class_probs", "mixture_moments"]


def mixture_moments(weights, values, errors):
    """Mean and standard deviation of a mixture of Gaussians N(values_k, errors_k) with weights summing to 1.

    Parameters
    ----------
    weights, values, errors : sequence of float

    Returns
    -------
    mean, sd : float
    """
    w, m, s = (np.asarray(a, float) for a in (weights, values, errors))
    mean = float(np.sum(w * m))
    return mean, float(math.sqrt(max(np.sum(w * (s**2 + m**2)) - mean**2, 0.0)))


def normalise_class_probs(lumclass_prob):
    """Luminosity-class probabilities as {class number: probability}, summing to 1.

    Parameters
    ----------
    lumclass_prob : dict or str
        Class (any of I..V, Ia, ...) -> probability; a single class name means probability 1.

    Returns
    -------
    dict
        Class number (:func:`specan.mkscales.lumclass_number`) -> probability, sorted by class.

    Raises
    ------
    ValueError
        No classes, a negative or non-finite probability, or probabilities summing to zero.
    """
    if isinstance(lumclass_prob, str):
        lumclass_prob = {lumclass_prob: 1.0}
    if not lumclass_prob:
        raise ValueError("no luminosity-class probabilities given")
    probs = {}
    for key, p in lumclass_prob.items():
        p = float(p)
        if not math.isfinite(p) or p < 0:
            raise ValueError(f"probability of class {key!r} is {p}, not a finite non-negative number")
        if p > 0:
            n = lumclass_number(key)
            probs[n] = probs.get(n, 0.0) + p
    total = sum(probs.values())
    if total <= 0:
        raise ValueError("luminosity-class probabilities sum to zero")
    return {n: p / total for n, p in sorted(probs.items())}


def _distance_pc(mu):
    """Distance (pc) of distance modulus ``mu``: the modulus's definition."""
    return 10.0 ** (mu / 5.0 + 1.0)


def _extinction(ebv, ebv_err, r_v):
    """(A_V, its error, notes) for E(B-V) and its error; E(B-V) None means A_V = 0, noted."""
    if ebv is None:
        return 0.0, 0.0, ["E(B-V) not given: A_V = 0, so the distance is an upper estimate if there is dust"]
    return r_v * as_float(ebv, u.mag), r_v * (as_float(ebv_err, u.mag) or 0.0), []


def _class_magnitudes(probs, code, code_err):
    """Class numbers, probabilities, M_V and its error per class, as arrays."""
    ns = np.array(list(probs))
    p = np.array([probs[n] for n in ns])
    m = np.empty(ns.size)
    s = np.empty(ns.size)
    for i, n in enumerate(ns):
        mv, mv_err = absolute_magnitude(code, int(n), code_err or 0.0)
        m[i], s[i] = mv.to_value(u.mag), mv_err.to_value(u.mag)
    return ns, p, m, s


def _mixture_cdf(mu, p, mu_k, sig_k):
    """CDF at ``mu`` of the mixture of N(mu_k, sig_k) with weights ``p``."""
    return float(np.sum(p * stats.norm.cdf((mu - mu_k) / sig_k)))


def _mixture_percentiles(p, mu_k, sig_k):
    """The mixture's percentiles at -1, 0 and +1 sigma of a Gaussian (16th, 50th, 84th), by root finding."""
    lo_b, hi_b = float(np.min(mu_k - 10 * sig_k)), float(np.max(mu_k + 10 * sig_k))
    return tuple(optimize.brentq(lambda x: _mixture_cdf(x, p, mu_k, sig_k) - level, lo_b, hi_b, xtol=1e-10)
                 for level in stats.norm.cdf([-1.0, 0.0, 1.0]))


def _mean_distance(p, mu_k, sig_k):
    """Mean distance (pc) of the mixture in distance modulus."""
    k = math.log(10.0) / 5.0
    # E[10^(mu/5+1)] of a Gaussian mu is exp(k mu + k^2 s^2 / 2) * 10 (lognormal mean).
    return float(np.sum(p * _distance_pc(mu_k) * np.exp(0.5 * (k * sig_k) ** 2)))


def spectroscopic_distance(v_mag, v_err, code, code_err, lumclass_prob, ebv=None, ebv_err=0.0, r_v=3.1):
    """Spectroscopic distance as a mixture over luminosity classes (analytic, no random sampling).

    For each class k with probability p_k, the absolute magnitude M_k and its
    error s_k come from :func:`absolute_magnitude` (subclass error through the
    scale plus the scale's intrinsic scatter). The distance modulus
    ``mu = V - A_V - M_V`` is then a mixture of Gaussians,
    ``sum_k p_k N(V - A_V - M_k, v_err^2 + (R_V ebv_err)^2 + s_k^2)``; distances
    are ``10**(mu/5 + 1)`` pc, so the percentiles of the mixture (found by root
    finding on its CDF) map straight to distance percentiles.

    Parameters
    ----------
    v_mag, v_err : float or Quantity (mag)
        Apparent V magnitude and its error.
    code, code_err : float
        MK type code (:mod:`specan.mktypes`) and its 1-sigma error in subclasses.
    lumclass_prob : dict or str
        Luminosity class -> probability (e.g. ``{"V": 0.7, "IV": 0.2, "III": 0.1}``);
        normalised here. A single class name means probability 1.
    ebv, ebv_err : float or Quantity (mag), optional
        Colour excess E(B-V) and its error; ``None`` means not known (A_V = 0, noted).
    r_v : float, optional
        A_V = r_v * E(B-V); 3.1 for the diffuse ISM (common practice).

    Returns
    -------
    dict
        ``distance`` (median of the mixture, pc), ``distance_lo``/``distance_hi``
        (16th/84th percentiles), ``distance_err`` (half their difference),
        ``distance_mean``, ``m_v_abs`` and ``m_v_abs_err`` (mixture mean and s.d.),
        ``a_v``, ``a_v_err``, ``distance_modulus`` (median, extinction-corrected),
        ``components`` (per class: lumclass, prob, m_v_abs, m_v_abs_err, distance),
        ``method`` and ``notes``. Quantities carry units.
    """
    v = as_float(v_mag, u.mag)
    v_e = as_float(v_err, u.mag) or 0.0
    if v is None:
        raise ValueError("no apparent magnitude given")
    probs = normalise_class_probs(lumclass_prob)
    a_v, a_v_err, notes = _extinction(ebv, ebv_err, r_v)
    ns, p, m, s = _class_magnitudes(probs, code, code_err)
    mu_k = v - a_v - m
    sig_k = np.sqrt(v_e**2 + a_v_err**2 + s**2)
    mu16, mu50, mu84 = _mixture_percentiles(p, mu_k, sig_k)
    m_mean, m_sd = mixture_moments(p, m, s)
    components = [
        {"lumclass": number_to_lumclass(n), "prob": float(pk), "m_v_abs": float(mk) * u.mag,
         "m_v_abs_err": float(sk) * u.mag, "distance": float(_distance_pc(muk)) * u.pc}
        for n, pk, mk, sk, muk in zip(ns, p, m, s, mu_k)
    ]
    return {
        "distance": _distance_pc(mu50) * u.pc,
        "distance_err": 0.5 * (_distance_pc(mu84) - _distance_pc(mu16)) * u.pc,
        "distance_lo": _distance_pc(mu16) * u.pc,
        "distance_hi": _distance_pc(mu84) * u.pc,
        "distance_mean": _mean_distance(p, mu_k, sig_k) * u.pc,
        "distance_modulus": mu50 * u.mag,
        "m_v_abs": m_mean * u.mag,
        "m_v_abs_err": m_sd * u.mag,
        "a_v": a_v * u.mag,
        "a_v_err": a_v_err * u.mag,
        "components": components,
        "method": "analytic Gaussian mixture in distance modulus over luminosity classes",
        "notes": notes,
    }
