"""Space velocity: a star's full velocity in the Galactic rest frame and whether it exceeds escape."""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
from scipy import stats

from ..frames import ESCAPE_SPEED, GALACTOCENTRIC_PARAMETERS, galactocentric_frame, galactocentric_parameters

__all__ = ["space_velocity"]

_KMS = u.km / u.s
_MASYR = u.mas / u.yr


def _galactocentric_velocity(ra_d, dec_d, d, a, b, r, frame):
    """Galactocentric Cartesian velocities (km/s, shape (3, n)) of n draws at one ICRS position.

    ``d`` in pc, ``a``/``b`` proper motions in mas/yr, ``r`` radial velocity in km/s (arrays of n).
    """
    from astropy.coordinates import SkyCoord

    c = SkyCoord(ra=np.broadcast_to(ra_d, np.shape(d)) * u.deg, dec=np.broadcast_to(dec_d, np.shape(d)) * u.deg,
                 distance=d * u.pc, pm_ra_cosdec=a * _MASYR, pm_dec=b * _MASYR,
                 radial_velocity=r * _KMS, frame="icrs")
    g = c.transform_to(frame)
    return np.asarray(g.velocity.d_xyz.to_value(_KMS))


def _tangential_speed(pma, pmd, d_pc):
    """Heliocentric tangential speed (km/s) of proper motion (mas/yr) at distance ``d_pc``."""
    # 4.740470 km/s = 1 AU per year (common practice): v_t = 4.74047 mu[mas/yr] d[kpc].
    return 4.740470446 * math.hypot(pma, pmd) * d_pc / 1000.0


def _sigma(err, unit):
    """An optional error as a float in ``unit``; 0 when not given."""
    return u.Quantity(err, unit).value if err is not None else 0.0


def _speed_draws(ra_d, dec_d, d_pc, pma, pmd, v_r, errors, n_samples, seed, frame):
    """Total speeds (km/s) of ``n_samples`` Monte Carlo draws of the inputs.

    ``errors`` are the Quantity (or None) errors of distance, pmra, pmdec and rv; the distance
    is drawn log-normally, the rest Gaussian, with a fixed ``seed``.
    """
    distance_err, pmra_err, pmdec_err, rv_err = errors
    rng = np.random.default_rng(seed)
    de = _sigma(distance_err, u.pc)
    sd = rng.normal(np.log(d_pc), de / d_pc, n_samples)
    sa = rng.normal(pma, _sigma(pmra_err, _MASYR), n_samples)
    sb = rng.normal(pmd, _sigma(pmdec_err, _MASYR), n_samples)
    sr = rng.normal(v_r, _sigma(rv_err, _KMS), n_samples)
    return np.linalg.norm(_galactocentric_velocity(ra_d, dec_d, np.exp(sd), sa, sb, sr, frame), axis=0)


def _speed_spread(speeds, v_esc):
    """(half the 16th-84th percentile range as a Quantity, fraction above ``v_esc``) of speed draws."""
    lo, hi = np.percentile(speeds, 100.0 * stats.norm.cdf([-1.0, 1.0]))   # +-1 sigma of a Gaussian
    return 0.5 * (hi - lo) * _KMS, float(np.mean(speeds > v_esc))


def space_velocity(ra, dec, distance, pmra, pmdec, rv, distance_err=None, pmra_err=None, pmdec_err=None,
                   rv_err=None, escape_speed=ESCAPE_SPEED, n_samples=2000, seed=7):
    """Full Galactocentric velocity of a star and whether its total speed exceeds the escape speed.

    Transforms ICRS position, distance, proper motion and radial velocity to
    astropy's ``Galactocentric`` frame with the pinned "v4.0" solar parameters
    (see :data:`GALACTOCENTRIC_PARAMETERS`). The total speed is the length of
    the velocity in the Galactic rest frame; ``unbound_candidate`` compares that
    (not the radial velocity alone) with ``escape_speed``.

    Parameters
    ----------
    ra, dec : Quantity (angle)
        ICRS position.
    distance : Quantity (length)
    pmra, pmdec : Quantity (angular speed, e.g. mas/yr)
        Proper motion; ``pmra`` is mu_alpha* = mu_alpha cos(dec), as Gaia and Hipparcos give it.
    rv : Quantity (km/s)
        Heliocentric (barycentric) radial velocity.
    distance_err, pmra_err, pmdec_err, rv_err : Quantity, optional
        1-sigma errors. When any is given, the speed error and the probability of
        exceeding the escape speed come from ``n_samples`` Monte Carlo draws
        (distance drawn log-normally, the rest Gaussian; fixed ``seed``).
    escape_speed : Quantity, optional
        Default 533 km/s, the local escape speed of Piffl et al. (2014) (from memory).

    Returns
    -------
    dict
        ``v_xyz`` (Galactocentric Cartesian velocity, km/s), ``v_total`` (km/s),
        ``v_total_err`` (km/s or None), ``v_tangential`` (heliocentric, km/s),
        ``p_unbound`` (fraction of draws above escape, or None),
        ``unbound_candidate`` (bool), ``unbound_basis`` ("v_total_grf"),
        ``escape_speed``, ``frame`` (parameter set and references).
    """
    params = galactocentric_parameters()
    frame = galactocentric_frame()   # the one (cached) frame the velocity stage's v_GRF uses too
    ra_d = u.Quantity(ra, u.deg).value
    dec_d = u.Quantity(dec, u.deg).value
    d_pc = u.Quantity(distance, u.pc).value
    pma = u.Quantity(pmra, _MASYR).value
    pmd = u.Quantity(pmdec, _MASYR).value
    v_r = u.Quantity(rv, _KMS).value
    if not d_pc > 0:
        raise ValueError(f"distance must be positive, got {distance}")

    vxyz = _galactocentric_velocity(ra_d, dec_d, np.atleast_1d(d_pc), np.atleast_1d(pma), np.atleast_1d(pmd),
                                    np.atleast_1d(v_r), frame)[:, 0]
    v_total = float(np.linalg.norm(vxyz))
    v_esc = float(u.Quantity(escape_speed, _KMS).value)
    errors = (distance_err, pmra_err, pmdec_err, rv_err)
    v_total_err = p_unbound = None
    if any(e is not None for e in errors):
        speeds = _speed_draws(ra_d, dec_d, d_pc, pma, pmd, v_r, errors, n_samples, seed, frame)
        v_total_err, p_unbound = _speed_spread(speeds, v_esc)
    return {
        "v_xyz": vxyz * _KMS,
        "v_total": v_total * _KMS,
        "v_total_err": v_total_err,
        "v_tangential": _tangential_speed(pma, pmd, d_pc) * _KMS,
        "p_unbound": p_unbound,
        "unbound_candidate": bool(v_total > v_esc),
        "unbound_basis": "v_total_grf",
        "escape_speed": v_esc * _KMS,
        "frame": {"name": GALACTOCENTRIC_PARAMETERS, "references": params["references"]},
    }
