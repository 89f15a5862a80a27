"""scipy's bounded trust-region reflective least squares, written for one small dense problem.

The batched Voigt fits (:mod:`specan.lines.batchfit`) hand the fits they cannot settle (about one
a spectrum: ill-determined hydrogen fits, whose stopping point in a flat valley depends on the
path taken, so the one-by-one path's own algorithm must take it) to the algorithm of
:func:`specan.lines.profiles.fit_profile`: ``scipy.optimize.least_squares(method="trf",
x_scale="jac", tr_solver="exact")``. On problems of four parameters and a few dozen pixels
scipy's general machinery (argument checks, ``scipy.linalg.svd``'s workspace queries, many
``numpy.linalg.norm`` calls) costs ~0.5 ms an iteration, ten times the arithmetic
(``benchmarks/bench_lines.py``, measured): the same steps are written here with plain numpy on
floats. No library offers that algorithm without that overhead, hence this module.

It follows scipy 1.17's ``scipy/optimize/_lsq/trf.py`` (``trf_bounds``) and
``_lsq/common.py`` step by step, the same formulas in the same order (Branch, Coleman & Li
1999; More 1977 for the trust-region subproblem), for a linear loss, ``x_scale="jac"`` and the
exact (SVD) subproblem solver; the SVD is LAPACK's ``gesdd`` through scipy, as there. Tested
against ``least_squares`` in ``tests/test_lines_batched.py`` (to the bit with scipy 1.17; another
scipy release may move those fits within the batched path's tested tolerance).

Derived from SciPy, which is distributed under the BSD 3-Clause License (Copyright (c) 2001-2002
Enthought, Inc. 2003, SciPy Developers); its licence terms apply to this derived part.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg.lapack import dgesdd, dgesdd_lwork

__all__ = ["trf_bounded"]

_EPS = np.finfo(float).eps
_LWORK = {}


def _svd(a):
    """``scipy.linalg.svd(a, full_matrices=False)`` (the ``gesdd`` driver), its workspace asked once per shape."""
    m, n = a.shape
    lwork = _LWORK.get((m, n))
    if lwork is None:
        work, info = dgesdd_lwork(m, n, compute_uv=1, full_matrices=0)
        if info != 0:
            raise np.linalg.LinAlgError("gesdd workspace query failed")
        lwork = _LWORK[(m, n)] = int(work.real)   # as scipy.linalg.svd takes it (double precision)
    u, s, vt, info = dgesdd(a, compute_uv=1, lwork=lwork, full_matrices=0, overwrite_a=0)
    if info > 0:
        raise np.linalg.LinAlgError("SVD did not converge")
    if info < 0:
        raise ValueError("gesdd: a NaN entry or an illegal argument")
    return u, s, vt


def _norm(v):
    return math.sqrt(float(np.dot(v, v)))


def _cl_scaling(x, g, lb, ub):
    """Coleman-Li scaling vector and its derivative (finite bounds).

    scipy's values, each element chosen by np.where instead of assigned through masks (a third of
    the numpy calls on these four-element vectors; the same numbers)."""
    up, down = g > 0, g < 0
    v = np.where(down, ub - x, np.where(up, x - lb, 1.0))
    return v, up * 1.0 - down * 1.0


def _step_to_bound(x, s, lb, ub):
    nz = s != 0
    steps = np.full(x.shape, np.inf)
    with np.errstate(over="ignore"):
        steps[nz] = np.maximum((lb - x)[nz] / s[nz], (ub - x)[nz] / s[nz])
    m = steps.min()
    return m, np.equal(steps, m) * np.sign(s).astype(int)


def _active(x, lb, ub, rtol):
    active = np.zeros(x.shape, int)
    lower_dist, upper_dist = x - lb, ub - x
    active[lower_dist <= np.minimum(upper_dist, rtol * np.maximum(1, np.abs(lb)))] = -1
    active[upper_dist <= np.minimum(lower_dist, rtol * np.maximum(1, np.abs(ub)))] = 1
    return active


def _strictly_feasible(x, lb, ub, rstep):
    if rstep == 0 and ((x > lb) & (x < ub)).all():
        return x.copy()   # strictly inside already: nothing below moves it
    x_new = x.copy()
    if rstep == 0:
        active = np.zeros(x.shape, int)
        active[x <= lb] = -1
        active[x >= ub] = 1
        lo, hi = active == -1, active == 1
        x_new[lo] = np.nextafter(lb[lo], ub[lo])
        x_new[hi] = np.nextafter(ub[hi], lb[hi])
    else:
        active = _active(x, lb, ub, rstep)
        lo, hi = active == -1, active == 1
        x_new[lo] = lb[lo] + rstep * np.maximum(1, np.abs(lb[lo]))
        x_new[hi] = ub[hi] - rstep * np.maximum(1, np.abs(ub[hi]))
    tight = (x_new < lb) | (x_new > ub)
    x_new[tight] = 0.5 * (lb[tight] + ub[tight])
    return x_new


def _quadratic(jh, g, s, diag):
    js = jh.dot(s)
    return 0.5 * (np.dot(js, js) + np.dot(s * diag, s)) + np.dot(s, g)


def _quadratic_1d(jh, g, s, diag, s0=None):
    v = jh.dot(s)
    a = np.dot(v, v)
    a += np.dot(s * diag, s)
    a *= 0.5
    b = np.dot(g, s)
    if s0 is None:
        return a, b, 0
    u = jh.dot(s0)
    b += np.dot(u, v)
    c = 0.5 * np.dot(u, u) + np.dot(g, s0)
    b += np.dot(s0 * diag, s)
    c += 0.5 * np.dot(s0 * diag, s0)
    return a, b, c


def _min_quadratic_1d(a, b, lb, ub, c=0):
    t = [lb, ub]
    if a != 0:
        extremum = -0.5 * b / a
        if lb < extremum < ub:
            t.append(extremum)
    t = np.asarray(t)
    y = t * (a * t + b) + c
    k = np.argmin(y)
    return t[k], y[k]


def _trust_region_line(x, s, delta):
    a = np.dot(s, s)
    if a == 0:
        raise ValueError("`s` is zero.")
    b = np.dot(x, s)
    c = np.dot(x, x) - delta**2
    if c > 0:
        raise ValueError("`x` is not within the trust region.")
    d = np.sqrt(b * b - a * c)
    q = -(b + math.copysign(d, b))
    t1, t2 = q / a, c / q
    return (t1, t2) if t1 < t2 else (t2, t1)


def _subproblem(n, m, uf, s, v, delta, alpha0, rtol=0.01, max_iter=10):
    """scipy's ``solve_lsq_trust_region`` (More's method on one SVD)."""
    def phi_and_derivative(alpha):
        denom = s2 + alpha
        p_norm = _norm(suf / denom)
        return p_norm - delta, -(suf2 / denom**3).sum() / p_norm

    suf = s * uf
    s2, suf2 = s**2, suf**2   # (made once: the same values each call)
    full_rank = s[-1] > _EPS * m * s[0] if m >= n else False
    if full_rank:
        p = -v.dot(uf / s)
        if _norm(p) <= delta:
            return p, 0.0
    alpha_upper = _norm(suf) / delta
    if full_rank:
        phi, phi_prime = phi_and_derivative(0.0)
        alpha_lower = -phi / phi_prime
    else:
        alpha_lower = 0.0
    if alpha0 is None or not full_rank and alpha0 == 0:
        alpha = max(0.001 * alpha_upper, (alpha_lower * alpha_upper)**0.5)
    else:
        alpha = alpha0
    for _ in range(max_iter):
        if alpha < alpha_lower or alpha > alpha_upper:
            alpha = max(0.001 * alpha_upper, (alpha_lower * alpha_upper)**0.5)
        phi, phi_prime = phi_and_derivative(alpha)
        if phi < 0:
            alpha_upper = alpha
        ratio = phi / phi_prime
        alpha_lower = max(alpha_lower, alpha - ratio)
        alpha -= (phi + delta) * ratio / delta
        if abs(phi) < rtol * delta:
            break
    p = -v.dot(suf / (s**2 + alpha))
    p *= delta / _norm(p)
    return p, alpha


def _select_step(x, jh, diag_h, g_h, p, p_h, d, delta, lb, ub, theta):
    """scipy's ``select_step``: the trust-region step, its reflection or the scaled gradient."""
    xp = x + p
    if ((xp >= lb) & (xp <= ub)).all():
        return p, p_h, -_quadratic(jh, g_h, p_h, diag_h)
    p_stride, hits = _step_to_bound(x, p, lb, ub)
    r_h = np.copy(p_h)
    r_h[hits.astype(bool)] *= -1
    r = d * r_h
    p *= p_stride
    p_h *= p_stride
    x_on_bound = x + p
    _, to_tr = _trust_region_line(p_h, r_h, delta)
    to_bound, _ = _step_to_bound(x_on_bound, r, lb, ub)
    r_stride = min(to_bound, to_tr)
    if r_stride > 0:
        r_stride_l = (1 - theta) * p_stride / r_stride
        r_stride_u = theta * to_bound if r_stride == to_bound else to_tr
    else:
        r_stride_l, r_stride_u = 0, -1
    if r_stride_l <= r_stride_u:
        a, b, c = _quadratic_1d(jh, g_h, r_h, diag_h, s0=p_h)
        r_stride, r_value = _min_quadratic_1d(a, b, r_stride_l, r_stride_u, c=c)
        r_h *= r_stride
        r_h += p_h
        r = r_h * d
    else:
        r_value = np.inf
    p *= theta
    p_h *= theta
    p_value = _quadratic(jh, g_h, p_h, diag_h)
    ag_h = -g_h
    ag = d * ag_h
    to_tr = delta / _norm(ag_h)
    to_bound, _ = _step_to_bound(x, ag, lb, ub)
    ag_stride = theta * to_bound if to_bound < to_tr else to_tr
    a, b, _ = _quadratic_1d(jh, g_h, ag_h, diag_h)
    ag_stride, ag_value = _min_quadratic_1d(a, b, 0, ag_stride)
    ag_h *= ag_stride
    ag *= ag_stride
    if p_value < r_value and p_value < ag_value:
        return p, p_h, -p_value
    if r_value < p_value and r_value < ag_value:
        return r, r_h, -r_value
    return ag, ag_h, -ag_value


def trf_bounded(fun, jac, x0, lb, ub, ftol, xtol, gtol, max_nfev):
    """``least_squares(fun, x0, jac=jac, bounds=(lb, ub), method="trf", x_scale="jac", ftol=ftol,
    xtol=xtol, gtol=gtol, max_nfev=max_nfev)`` for finite bounds: the same iterates.

    Parameters
    ----------
    fun, jac : callable
        Residuals (m,) and their Jacobian (m, n) at parameters (n,).
    x0, lb, ub : array
        Start (inside the bounds) and finite bounds, ``lb < ub``.

    Returns
    -------
    (x, f, J, status)
        Best parameters, residuals and Jacobian there, and scipy's termination status
        (0: ``max_nfev`` reached; 1-4: converged by gtol, ftol, xtol, ftol and xtol).

    Raises
    ------
    ValueError
        Residuals not finite at the start (as ``least_squares``).
    """
    lb, ub = np.asarray(lb, float), np.asarray(ub, float)
    x = _strictly_feasible(np.atleast_1d(np.asarray(x0, float)), lb, ub, 1e-10)
    f = np.atleast_1d(fun(x))
    jm = jac(x)
    if not np.all(np.isfinite(f)):
        raise ValueError("Residuals are not finite in the initial point.")
    nfev = 1
    m, n = jm.shape
    cost = 0.5 * np.dot(f, f)
    g = jm.T.dot(f)
    scale_inv = np.sum(jm**2, axis=0)**0.5
    scale_inv[scale_inv == 0] = 1
    scale = 1 / scale_inv
    v, dv = _cl_scaling(x, g, lb, ub)
    v[dv != 0] *= scale_inv[dv != 0]
    delta = _norm(x * scale_inv / v**0.5)
    if delta == 0:
        delta = 1.0
    f_aug = np.zeros(m + n)
    j_aug = np.empty((m + n, n))
    alpha = 0.0
    status = None
    while True:
        v, dv = _cl_scaling(x, g, lb, ub)
        g_norm = np.abs(g * v).max()
        if g_norm < gtol:
            status = 1
        if status is not None or nfev == max_nfev:
            break
        v = np.where(dv != 0, v * scale_inv, v)
        d = v**0.5 * scale
        diag_h = g * dv * scale
        g_h = d * g
        f_aug[:m] = f
        j_aug[:m] = jm * d
        jh = j_aug[:m]
        j_aug[m:] = np.diag(diag_h**0.5)
        if not np.isfinite(j_aug).all():   # scipy.linalg.svd's check_finite
            raise ValueError("array must not contain infs or NaNs")
        u, s, vt = _svd(j_aug)
        vv = vt.T
        uf = u.T.dot(f_aug)
        theta = max(0.995, 1 - g_norm)
        actual_reduction = -1
        while actual_reduction <= 0 and nfev < max_nfev:
            p_h, alpha = _subproblem(n, m, uf, s, vv, delta, alpha)
            p = d * p_h
            step, step_h, predicted = _select_step(x, jh, diag_h, g_h, p, p_h, d, delta, lb, ub, theta)
            x_new = _strictly_feasible(x + step, lb, ub, 0)
            f_new = np.atleast_1d(fun(x_new))
            nfev += 1
            step_h_norm = _norm(step_h)
            if not np.isfinite(f_new).all():
                delta = 0.25 * step_h_norm
                continue
            cost_new = 0.5 * np.dot(f_new, f_new)
            actual_reduction = cost - cost_new
            # update_tr_radius
            if predicted > 0:
                ratio = actual_reduction / predicted
            elif predicted == actual_reduction == 0:
                ratio = 1
            else:
                ratio = 0
            delta_new = delta
            if ratio < 0.25:
                delta_new = 0.25 * step_h_norm
            elif ratio > 0.75 and step_h_norm > 0.95 * delta:
                delta_new = delta * 2.0
            # check_termination
            ftol_ok = actual_reduction < ftol * cost and ratio > 0.25
            xtol_ok = _norm(step) < xtol * (xtol + _norm(x))
            if ftol_ok and xtol_ok:
                status = 4
            elif ftol_ok:
                status = 2
            elif xtol_ok:
                status = 3
            if status is not None:
                break
            alpha *= delta / delta_new
            delta = delta_new
        if actual_reduction > 0:
            x, f, cost = x_new, f_new, cost_new
            jm = jac(x)
            g = jm.T.dot(f)
            scale_inv = np.maximum((jm**2).sum(axis=0)**0.5, scale_inv)
            scale = 1 / scale_inv
    if status is None:
        status = 0
    return x, f, jm, status
