"""The Voigt batch's Levenberg-Marquardt iteration compiled (numba).

In numpy (:func:`.batchfit._numpy_iterations`) an iteration is ~125 calls on a handful of small
problems, and their count, not their arithmetic, is its cost. Here the same steps are three
compiled calls an iteration around scipy's Faddeeva function (which stays scipy's):

- :func:`lm_propose`: gradient and normal matrix, the parameters held on their bounds, the
  Gauss-Newton and the damped solves (small dense systems: LU with partial pivoting, and a
  symmetric least squares where singular, written here because numba's own ``lstsq`` alone took
  5 s to compile), the stopping tests, the bound-crossing re-solve, the trial point and its
  predicted decrease;
- :func:`lm_points`: the Faddeeva function's arguments at the model's points;
- :func:`lm_accept_model`: the trial's model, residuals and Jacobian from the Faddeeva values,
  its cost, acceptance and Nielsen's damping update, written into the batch's arrays in place.

The arithmetic is the numpy loop's step by step, but sums are made in another order, so the
iterates differ in the last bits and a fit can stop an iteration earlier or later:
tests/test_lines_compiled.py states and checks how far the tables may move. ``AVAILABLE`` is False
where numba does not import; :mod:`.batchfit` then takes its numpy loop.

The kernels are compiled on first use and kept in numba's on-disk cache (``cache=True``: ~5 s once
per installation, ~0.3 s loading in each new process after that); :func:`warm` does it ahead, so
that forked workers inherit the machine code.
"""

from __future__ import annotations

import numpy as np

try:   # a dependency; should it fail to import (a platform without its wheels), the numpy loop runs
    from numba import njit
    AVAILABLE = True
except ImportError:   # pragma: no cover - exercised where numba is absent
    AVAILABLE = False

    def njit(*args, **kwargs):
        def wrap(func):
            return func
        return wrap

__all__ = ["AVAILABLE", "lm_accept_model", "lm_points", "lm_propose", "lu_solve", "symmetric_lstsq", "warm"]


@njit(cache=True)
def lu_solve(m, rhs, out):
    """Solve ``m x = rhs`` (n x n, small) by LU with partial pivoting (as LAPACK's gesv) into ``out``.

    ``m`` is overwritten. Returns False where a pivot is exactly zero (LAPACK's singular test).
    """
    n = m.shape[0]
    for i in range(n):
        out[i] = rhs[i]
    for k in range(n):
        piv = k
        best = abs(m[k, k])
        for i in range(k + 1, n):
            if abs(m[i, k]) > best:
                best = abs(m[i, k])
                piv = i
        if m[piv, k] == 0.0:
            return False
        if piv != k:
            for j in range(n):
                t = m[k, j]
                m[k, j] = m[piv, j]
                m[piv, j] = t
            t = out[k]
            out[k] = out[piv]
            out[piv] = t
        inv = 1.0 / m[k, k]
        for i in range(k + 1, n):
            f = m[i, k] * inv
            if f != 0.0:
                m[i, k] = f
                for j in range(k + 1, n):
                    m[i, j] -= f * m[k, j]
                out[i] -= f * out[k]
    for i in range(n - 1, -1, -1):
        s = out[i]
        for j in range(i + 1, n):
            s -= m[i, j] * out[j]
        out[i] = s / m[i, i]
    return True


@njit(cache=True)
def symmetric_lstsq(m, rhs, out):
    """Minimum-norm least-squares solution of ``m x = rhs`` for a small symmetric ``m``, into ``out``.

    The eigen-decomposition by cyclic Jacobi rotations (common practice, Golub & Van Loan ch. 8, from
    memory), eigenvalues below ``n eps max|eigenvalue|`` dropped: for a symmetric matrix the singular
    values are the eigenvalues' sizes, so this is numpy's ``lstsq(m, rhs, rcond=None)`` (tested against
    it). Written here rather than numba's ``np.linalg.lstsq``, whose compilation alone took 5.2 s.
    """
    n = m.shape[0]
    a = m.copy()
    v = np.eye(n)
    for _ in range(100):
        off = 0.0
        for i in range(n):
            for j in range(i + 1, n):
                off += a[i, j] * a[i, j]
        if off == 0.0:
            break
        for i in range(n):
            for j in range(i + 1, n):
                if a[i, j] == 0.0:
                    continue
                theta = (a[j, j] - a[i, i]) / (2.0 * a[i, j])
                t = (1.0 if theta >= 0 else -1.0) / (abs(theta) + np.sqrt(theta * theta + 1.0))
                c = 1.0 / np.sqrt(t * t + 1.0)
                s = t * c
                for k in range(n):   # columns i, j
                    aki, akj = a[k, i], a[k, j]
                    a[k, i] = c * aki - s * akj
                    a[k, j] = s * aki + c * akj
                for k in range(n):   # rows i, j
                    aik, ajk = a[i, k], a[j, k]
                    a[i, k] = c * aik - s * ajk
                    a[j, k] = s * aik + c * ajk
                for k in range(n):
                    vki, vkj = v[k, i], v[k, j]
                    v[k, i] = c * vki - s * vkj
                    v[k, j] = s * vki + c * vkj
    big = 0.0
    for i in range(n):
        big = max(big, abs(a[i, i]))
    cut = n * 2.220446049250313e-16 * big   # (numpy's lstsq, rcond=None: eps times the larger dimension)
    for i in range(n):
        out[i] = 0.0
    for e in range(n):
        if abs(a[e, e]) <= cut:
            continue
        proj = 0.0
        for k in range(n):
            proj += v[k, e] * rhs[k]
        proj /= a[e, e]
        for k in range(n):
            out[k] += proj * v[k, e]


@njit(cache=True)
def _solve_or_lstsq(m, rhs, out):
    """:func:`lu_solve`, and the least-squares solution where the system is singular (as batchfit's
    ``_solve``; the systems here are symmetric)."""
    work = m.copy()
    if not lu_solve(work, rhs, out):
        symmetric_lstsq(m, rhs, out)


@njit(cache=True)
def _damped(jtj, held, diag, damping, mat):
    """Into ``mat``: the normal matrix ``jtj`` damped (``damping`` times ``diag`` added on the diagonal),
    the ``held`` parameters' rows and columns replaced by the identity's (their step is zero)."""
    n = jtj.shape[0]
    for a in range(n):
        for c in range(n):
            mat[a, c] = jtj[a, c] if not (held[a] or held[c]) else 0.0
        if held[a]:
            mat[a, a] = 1.0
        else:
            mat[a, a] = jtj[a, a] + damping * diag[a]


@njit(cache=True)
def lm_propose(act, p, r, jac, cost, lb, ub, padded, lam, decrement, cost_tol, tail):
    """One iteration's proposal for the problems ``act`` (indices into the batch's full arrays).

    Parameters
    ----------
    act : int array (a,)
    p, r, jac, cost : the batch's parameters (b, n), weighted residuals (b, m), Jacobians (b, m, n)
        and costs (b,)
    lb, ub, padded : bounds (b, n) and the padding's parameters (b, n, bool)
    lam : damping (b,)
    decrement, cost_tol : float
        the stopping tests of :func:`.batchfit.voigt_batch`
    tail : bool
        also test whether each problem's equivalent width is within its error (the batch's tail)

    Returns
    -------
    small, stop : bool arrays (a,)
        converged; stopping (converged, or the damping beyond 1e12)
    pn : (a, n) the trial parameters (rows that stop: their parameters)
    predicted : (a,) the linear model's predicted decrease
    ill : (a,) with ``tail``: whether the equivalent width is no larger than its error (False where
        the normal matrix is singular, and for all without ``tail``)
    singular : bool, whether a tail test met a singular matrix (then no problem counts as ill)
    """
    na = act.size
    _, m, n = jac.shape
    small = np.zeros(na, np.bool_)
    stop = np.zeros(na, np.bool_)
    ill = np.zeros(na, np.bool_)
    pn = np.empty((na, n))
    predicted = np.zeros(na)
    singular = False
    grad = np.empty(n)
    jtj = np.empty((n, n))
    diag = np.empty(n)
    held = np.empty(n, np.bool_)
    held2 = np.empty(n, np.bool_)
    mat = np.empty((n, n))
    rhs = np.empty(n)
    gn = np.empty(n)
    step = np.empty(n)
    tob = np.empty(n)
    unit = np.zeros(n)
    sol = np.empty(n)
    for i in range(na):
        b = act[i]
        J = jac[b]
        R = r[b]
        P = p[b]
        # gradient J'r and normal matrix J'J
        for a in range(n):
            grad[a] = 0.0
            for c in range(n):
                jtj[a, c] = 0.0
        for k in range(m):
            rk = R[k]
            for a in range(n):
                ja = J[k, a]
                if ja == 0.0:
                    continue
                grad[a] += ja * rk
                for c in range(a, n):
                    jtj[a, c] += ja * J[k, c]
        for a in range(n):
            for c in range(a):
                jtj[a, c] = jtj[c, a]
        if tail:
            # the variance of the equivalent width (parameter 3): (J'J + padding's ones)^-1 [3, 3]
            for a in range(n):
                unit[a] = 0.0
                for c in range(n):
                    mat[a, c] = jtj[a, c]
                if padded[b, a]:
                    mat[a, a] += 1.0
            unit[3] = 1.0
            if lu_solve(mat, unit, sol):
                var = max(sol[3], 0.0)
                ill[i] = not (abs(P[3]) > np.sqrt(var))
            else:
                singular = True
        # held: the padding, and parameters on a bound with the gradient pushing outward
        dmax = 0.0
        for a in range(n):
            span = ub[b, a] - lb[b, a]
            held[a] = padded[b, a] or (P[a] <= lb[b, a] + 1e-12 * span and grad[a] > 0.0) or \
                (P[a] >= ub[b, a] - 1e-12 * span and grad[a] < 0.0)
            diag[a] = jtj[a, a]
            dmax = max(dmax, diag[a])
        floor = 1e-12 * dmax + 1e-300
        for a in range(n):
            diag[a] = max(diag[a], floor)
            rhs[a] = 0.0 if held[a] else -grad[a]
        # the Gauss-Newton step (damping 1e-12): its decrement tells convergence
        _damped(jtj, held, diag, 1e-12, mat)
        _solve_or_lstsq(mat, rhs, gn)
        dec = 0.0
        for a in range(n):
            dec += rhs[a] * gn[a]
        small[i] = 0.5 * dec <= max(decrement, cost_tol * cost[b])
        stop[i] = small[i] or lam[b] > 1e12
        if stop[i]:
            for a in range(n):
                pn[i, a] = P[a]
            continue
        # the damped step
        lb_ = lam[b]
        _damped(jtj, held, diag, lb_, mat)
        _solve_or_lstsq(mat, rhs, step)
        # a step crossing bounds: those parameters to their bound, the others solved again
        crossed = False
        for a in range(n):
            to = P[a] + step[a]
            c_ = to < lb[b, a] or to > ub[b, a]
            held2[a] = held[a] or c_
            if c_:
                crossed = True
                tob[a] = min(max(to, lb[b, a]), ub[b, a]) - P[a]
            else:
                tob[a] = 0.0
        if crossed:
            for a in range(n):
                if held2[a]:
                    rhs[a] = 0.0
                else:
                    s = -grad[a]
                    for c in range(n):
                        s -= jtj[a, c] * tob[c]
                    rhs[a] = s
            _damped(jtj, held2, diag, lb_, mat)
            _solve_or_lstsq(mat, rhs, step)
            for a in range(n):
                step[a] += tob[a]
        # the trial point within the bounds, and the decrease the linear model predicts
        for a in range(n):
            pn[i, a] = min(max(P[a] + step[a], lb[b, a]), ub[b, a])
            step[a] = pn[i, a] - P[a]
        lin = 0.0
        quad = 0.0
        for a in range(n):
            lin += grad[a] * step[a]
            s = 0.0
            for c in range(n):
                s += jtj[a, c] * step[c]
            quad += step[a] * s
        predicted[i] = -lin - 0.5 * quad
    return small, stop, pn, predicted, ill, singular


# ----------------------------------------------------------------------------- the model around wofz
# (scipy's Faddeeva function called from numpy, once an iteration, on the points these kernels lay out)

_SQRT2 = np.sqrt(2.0)
_SQRT2PI = np.sqrt(2.0 * np.pi)
_DW0 = 2j / np.sqrt(np.pi)   # w'(z) = -2 z w(z) + 2i / sqrt(pi), Abramowitz & Stegun 7.1.20


@njit(cache=True)
def lm_points(act, pn, first, x_at, centre_at):
    """The Faddeeva function's arguments ``z = (x - centre - shift + i gamma) / (sigma sqrt 2)`` at the
    evaluated points of the problems ``act`` (trial parameters ``pn``, one row each), in order; problem
    ``b``'s points are ``first[b]:first[b + 1]`` of ``x_at``, ``centre_at``."""
    total = 0
    for i in range(act.size):
        total += first[act[i] + 1] - first[act[i]]
    z = np.empty(total, np.complex128)
    k = 0
    for i in range(act.size):
        b = act[i]
        inv_s2 = 1.0 / (pn[i, 1] * _SQRT2)
        im = pn[i, 2] * inv_s2
        for q in range(first[b], first[b + 1]):
            z[k] = complex((x_at[q] - (centre_at[q] + pn[i, 0])) * inv_s2, im)
            k += 1
    return z


@njit(cache=True)
def lm_accept_model(act, pn, z, w, predicted, first, comp_at, pix_at, cont, y, wts, p, r, jac, cost, lam, nu):
    """The trials ``pn`` of the problems ``act`` taken where they lower the cost, the damping updated
    (Nielsen 1999, as :func:`.batchfit._numpy_iterations`), in the full arrays ``p, r, jac, cost, lam,
    nu`` in place; the trials' residuals and Jacobians made here from the Faddeeva function's values
    ``w`` at ``z`` (:func:`lm_points`' layout): the model of ``batchfit._VoigtModel``,
    ``cont (1 - sum_c W_c V(x - c_c - shift; sigma, gamma))``, weighted."""
    _, m, n = jac.shape
    rn = np.empty(m)
    jn = np.empty((m, n))
    k = 0
    for i in range(act.size):
        b = act[i]
        sigma = pn[i, 1]
        inv_s2 = 1.0 / (sigma * _SQRT2)
        inv_norm = 1.0 / (sigma * _SQRT2PI)
        scale = inv_s2 * inv_norm
        for q in range(m):
            rn[q] = 0.0   # (holds the weighted sum of profiles until the residual is made)
            for a in range(n):
                jn[q, a] = 0.0
        for q in range(first[b], first[b + 1]):
            zz = z[k]
            ww = w[k]
            k += 1
            dw = _DW0 - 2.0 * zz * ww
            v = ww.real * inv_norm
            d_x = dw.real * scale
            d_sigma = -((dw * zz).real * inv_norm + v) / sigma
            d_gamma = -dw.imag * scale
            c = comp_at[q]
            px = pix_at[q]
            wc = pn[i, 3 + c]
            rn[px] += wc * v
            jn[px, 0] += wc * d_x
            jn[px, 1] += wc * d_sigma
            jn[px, 2] += wc * d_gamma
            jn[px, 3 + c] = v
        cn = 0.0
        for q in range(m):
            cw = cont[b, q] * wts[b, q]
            res = (cont[b, q] * (1.0 - rn[q]) - y[b, q]) * wts[b, q]
            rn[q] = res
            cn += res * res
            # the Jacobian's signs: d/dshift = -d/dx of the profile, and the model is cont (1 - ...)
            jn[q, 0] = jn[q, 0] * cw
            jn[q, 1] = -jn[q, 1] * cw
            jn[q, 2] = -jn[q, 2] * cw
            for a in range(3, n):
                jn[q, a] = -jn[q, a] * cw
        cn *= 0.5
        if cn < cost[b]:
            rho = (cost[b] - cn) / max(predicted[i], 1e-300)
            t = 2.0 * min(max(rho, 0.0), 1.0) - 1.0
            lam[b] = max(lam[b] * max(1.0 / 3.0, 1.0 - t * t * t), 1e-15)
            nu[b] = 2.0
            cost[b] = cn
            for a in range(n):
                p[b, a] = pn[i, a]
            for q in range(m):
                r[b, q] = rn[q]
                for a in range(n):
                    jac[b, q, a] = jn[q, a]
        else:
            lam[b] = max(lam[b] * nu[b], 1e-15)
            nu[b] = 2.0 * nu[b]


def warm():
    """Compile (or load from numba's cache) every kernel for the argument types the Voigt batch passes,
    on a tiny problem: called in a process that forks workers, the workers inherit the machine code
    instead of each loading (~0.27 s CPU) or compiling (~5 s) it on its first spectrum. Does nothing
    without numba."""
    if not AVAILABLE:
        return
    n, m = 4, 6
    act = np.arange(1)
    p = np.array([[0.0, 1.0, 0.2, 0.5]])
    jac = np.ones((1, m, n))
    r = np.ones((1, m))
    cost = np.ones(1)
    lb, ub = p - 1.0, p + 1.0
    padded = np.zeros((1, n), np.bool_)
    lam, nu = np.full(1, 1e-3), np.full(1, 2.0)
    _, _, pn, predicted, _, _ = lm_propose(act, p, r, jac, cost, lb, ub, padded, lam, 1e-6, 1e-12, True)
    first = np.array([0, m])
    x_at = np.linspace(-1.0, 1.0, m)
    z = lm_points(act, pn, first, x_at, np.zeros(m))
    lm_accept_model(act, pn, z, z.copy(), predicted, first, np.zeros(m, np.int64), np.arange(m), np.ones((1, m)),
                    np.ones((1, m)), np.ones((1, m)), p.copy(), r.copy(), jac.copy(), cost.copy(), lam.copy(),
                    nu.copy())
