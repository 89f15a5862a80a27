"""The lines stage's fits compiled (numba): the Voigt batch's iteration and the Gaussian groups.

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

The Gaussian groups of :func:`.batchfit.gauss_batch` are compiled here too (:func:`gauss_windows`,
:func:`gauss_grid_choice`, :func:`gauss_finish`: the padded windows, the grid, the choice of grid
point, the quick design's width step, the covariance and refined shift, three calls a group;
``batchfit._gauss_group``'s numpy path the fallback and the reference, tests/test_lines_compiled.py).

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

__all__ = ["AVAILABLE", "gauss_finish", "gauss_grid_choice", "gauss_windows", "nnls_rows", "lm_accept_model", "lm_points", "lm_propose", "lu_solve",
           "symmetric_lstsq", "warm"]


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


# ----------------------------------------------------------------------------- Gaussian groups
#
# batchfit._gauss_group in numpy is ~60 calls a group on arrays of a few hundred numbers (the grid's
# design, normal matrices, solves, the choice of grid point, the quick design's width step, the
# covariance, the refined shift): their count, not their arithmetic, was its time. The grid alone
# compiled saved 0.2 ms a spectrum (lines21's prototype, ff87a0b): the rest of the group stayed numpy
# calls. Here the whole group is three compiled calls (:func:`gauss_windows`, :func:`gauss_grid_choice`,
# :func:`gauss_finish`), with the one-by-one rule's NNLS (rare, scipy's) before the last in Python.

#: sqrt(2 pi) as numpy's ``np.sqrt(2 * np.pi)`` gives it (sqrt is correctly rounded in both)
_SQRT_2PI = np.sqrt(2 * np.pi)


@njit(cache=True, error_model="numpy")
def _gauss_design(x, cw, cen, s, at, out):
    """Into ``out`` (C, P): unit-area Gaussians of sigma ``s`` at ``cen`` (C,) on ``x`` (P,), times the
    weighted continuum ``cw`` (P,): batchfit's ``exp(-0.5 (dx / s)^2) / (s sqrt(2 pi)) * cw``, in its
    order of operations, at the pixels ``at`` (those of non-zero ``cw``; elsewhere the product is the
    zero it is in numpy, the exponential being finite, and is left as written before: zero)."""
    norm = s * _SQRT_2PI
    for c in range(cen.shape[0]):
        for q in at:
            t = (x[q] - cen[c]) / s
            out[c, q] = np.exp(-0.5 * (t * t)) / norm * cw[q]


@njit(cache=True, error_model="numpy")
def _normal_solve(a, b, at, ata, atb, mat, sol):
    """``ata = a a' + 1e-12 I`` and ``atb = a b`` of the design ``a`` (C, P) into the given arrays, and the
    solution of ``ata w = atb`` into ``sol``: False where the system is singular (an exactly zero pivot,
    LAPACK's test; a 1 x 1 system is the division, as numpy's path takes it). The sums run over the
    pixels ``at`` only: the others' terms are zeros."""
    C = a.shape[0]
    for c in range(C):
        t = 0.0
        for q in at:
            t += a[c, q] * b[q]
        atb[c] = t
        for d in range(c, C):
            t = 0.0
            for q in at:
                t += a[c, q] * a[d, q]
            ata[c, d] = t
            ata[d, c] = t
        ata[c, c] += 1e-12
    for c in range(C):
        for d in range(C):
            mat[c, d] = ata[c, d]
    return lu_solve(mat, atb, sol)


@njit(cache=True)
def gauss_windows(lo, hi, wave, flux, weight, cont):
    """The windows ``lo[l]..hi[l]`` padded to one length, as ``batchfit._padded`` pads them (the last pixel
    repeated past a window's end, with zero weight): wavelengths ``x``, weighted data ``b = (cont - y) w``
    and weighted continua ``cw = cont w`` (L, P), ``w`` the square root of ``weight``, and the count of
    pixels of non-zero weight (L,); ``cont`` holds the windows' continua one after the other. The same
    values as numpy's (one square root, difference and product each)."""
    L = lo.shape[0]
    P = 0
    for l in range(L):
        P = max(P, hi[l] - lo[l] + 1)
    x = np.empty((L, P))
    b = np.zeros((L, P))
    cw = np.zeros((L, P))
    ngood = np.zeros(L, np.int64)
    k = 0
    for l in range(L):
        n = hi[l] - lo[l] + 1
        for q in range(P):
            x[l, q] = wave[lo[l] + min(q, n - 1)]
        for q in range(n):
            wq = np.sqrt(weight[lo[l] + q])
            c = cont[k + q]
            b[l, q] = (c - flux[lo[l] + q]) * wq
            cw[l, q] = c * wq
            if wq > 0:
                ngood[l] += 1
        k += n
    return x, b, cw, ngood


@njit(cache=True, error_model="numpy")
def nnls_rows(a, b, at, sign, out):
    """Non-negative least squares of ``sign * a`` (C, P: one row a component) against ``sign * b`` (P,) over
    the pixels ``at``: ``min |A' x - r|`` with ``x >= 0``, by Lawson and Hanson's active-set algorithm (as
    scipy's ``nnls``; Lawson & Hanson 1995, ch. 23, from memory), each passive set's least squares by its
    normal equations (LU). ``out`` gets ``sign * x`` (the one-by-one rule's equivalent widths); returns the
    residual's squared norm, or -1 where a passive set's normal matrix is singular or the iterations
    (3 C, scipy's default) run out (the caller then asks scipy)."""
    C = a.shape[0]
    ata = np.empty((C, C))
    atr = np.empty(C)
    for c in range(C):
        t = 0.0
        for q in at:
            t += (sign * a[c, q]) * (sign * b[q])
        atr[c] = t
        for d in range(c, C):
            t = 0.0
            for q in at:
                t += (sign * a[c, q]) * (sign * a[d, q])
            ata[c, d] = t
            ata[d, c] = t
    x = np.zeros(C)
    z = np.zeros(C)
    grad = atr.copy()
    passive = np.zeros(C, np.bool_)
    idx = np.empty(C, np.int64)
    big = 0.0
    for c in range(C):
        big = max(big, abs(atr[c]))
    tol = 1e-13 * big
    it = 0
    while True:
        j = -1
        top = tol
        for c in range(C):
            if not passive[c] and grad[c] > top:
                top = grad[c]
                j = c
        if j < 0:
            break
        passive[j] = True
        while True:
            it += 1
            if it > 3 * C:
                return -1.0
            k = 0
            for c in range(C):
                if passive[c]:
                    idx[k] = c
                    k += 1
            mat = np.empty((k, k))
            rhs = np.empty(k)
            sol = np.empty(k)
            for e in range(k):
                rhs[e] = atr[idx[e]]
                for f in range(k):
                    mat[e, f] = ata[idx[e], idx[f]]
            if not lu_solve(mat, rhs, sol):
                return -1.0
            for c in range(C):
                z[c] = 0.0
            positive = True
            for e in range(k):
                z[idx[e]] = sol[e]
                if sol[e] <= 0:
                    positive = False
            if positive:
                for c in range(C):
                    x[c] = z[c]
                break
            # back along the segment to the first component that reaches zero, which leaves the passive set
            alpha = np.inf
            for c in range(C):
                if passive[c] and z[c] <= 0:
                    alpha = min(alpha, x[c] / (x[c] - z[c]))
            for c in range(C):
                x[c] += alpha * (z[c] - x[c])
                if passive[c] and x[c] <= 0:
                    passive[c] = False
                    x[c] = 0.0
        for c in range(C):
            t = atr[c]
            for d in range(C):
                t -= ata[c, d] * x[d]
            grad[c] = t
    res = 0.0
    for q in at:
        t = -(sign * b[q])
        for c in range(C):
            t += (sign * a[c, q]) * x[c]
        res += t * t
    for c in range(C):
        out[c] = sign * x[c]
    return res


@njit(cache=True, error_model="numpy")
def gauss_grid_choice(x, b, cw, centres, sh, sg, step, nw, sign):
    """The grid of every line of a Gaussian group and its chosen point (``batchfit._gauss_group``'s
    first half, compiled).

    Parameters
    ----------
    x, b, cw : (L, P) the windows' wavelengths, weighted data ``(cont - y) w`` and weighted continua
    centres : (L, C) the components' places
    sh, sg : (L, G) each grid point's shift and width: shifts ``k step`` (k = -nsh..nsh), each over the
        ``nw`` widths (``sh[:, g]`` is shift ``g // nw``, width ``g % nw``: batchfit's grid)
    step : (L,) the grid's shift step
    nw : the grid's number of widths
    sign : (L,) 1 absorption, -1 emission

    Returns
    -------
    a, ata, w, chi2, best, wbest, cbest, ok
        The weighted designs (L, G, C, P), normal matrices (L, G, C, C), equivalent widths (L, G, C) and
        chi-squares (L, G) of the grid; ``best`` the chosen grid point as ``profiles.best_grid_point``
        chooses it (the point of least chi-square whose components all have the line's sign among the
        five best; where none has, the one of least chi-square solved with the sign constraint,
        :func:`nnls_rows`), -2 where that NNLS failed (the caller's scipy decides), and its equivalent
        widths (L, C) and chi-square (L,); ``ok`` False where a normal matrix is singular (the caller
        then fits the group line by line, as numpy's path does).
    """
    L, P = x.shape
    G = sh.shape[1]
    C = centres.shape[1]
    a = np.zeros((L, G, C, P))
    ata = np.empty((L, G, C, C))
    w = np.empty((L, G, C))
    chi2 = np.empty((L, G))
    best = np.full(L, -2, np.int64)
    wbest = np.zeros((L, C))
    cbest = np.zeros(L)
    sol = np.empty(C)
    at = np.empty(P, np.int64)
    atb = np.empty(C)
    mat = np.empty((C, C))
    order = np.empty(G, np.int64)
    for l in range(L):
        bb = 0.0
        for q in range(P):
            bb += b[l, q] * b[l, q]
        # the pixels where the design is not zero (the window's, of non-zero weight: not its padding)
        n_at = 0
        for q in range(P):
            if cw[l, q] != 0.0:
                at[n_at] = q
                n_at += 1
        # the designs of every shift of each width by a recurrence along the shifts (two exponentials a
        # point and width, not one a grid point: the exponentials were most of the grid's time): with
        # u = (x - c - shift) / s and d = step / s, exp(-u'^2 / 2) at the next shift u' = u - d is
        # exp(-u^2 / 2) exp(u d - d^2 / 2), and that factor is the last one times exp(-d^2). Each
        # design within a few units of the last bit of the direct formula's (8 steps; the tolerance
        # test measures the fits)
        for iw in range(nw):
            s = sg[l, iw]
            norm = s * _SQRT_2PI
            dd = step[l] / s
            shrink = np.exp(-dd * dd)
            for c in range(C):
                first = centres[l, c] + sh[l, iw]
                for q in at[:n_at]:
                    u = (x[l, q] - first) / s
                    e = np.exp(-0.5 * (u * u))
                    r = np.exp(u * dd - 0.5 * (dd * dd))
                    for g in range(iw, G, nw):
                        a[l, g, c, q] = e / norm * cw[l, q]
                        e *= r
                        r *= shrink
        for g in range(G):
            if not _normal_solve(a[l, g], b[l], at[:n_at], ata[l, g], atb, mat, w[l, g]):
                return a, ata, w, chi2, best, wbest, cbest, False
            t = 0.0
            for c in range(C):
                t += w[l, g, c] * atb[c]
            chi2[l, g] = bb - t
        # the grid points in order of chi-square (NaN last, ties in grid order: a stable insertion sort)
        for g in range(G):
            order[g] = g
        for g in range(1, G):
            k = order[g]
            v = chi2[l, k]
            j = g - 1
            while j >= 0 and (np.isnan(chi2[l, order[j]]) and not np.isnan(v) or chi2[l, order[j]] > v):
                order[j + 1] = order[j]
                j -= 1
            order[j + 1] = k
        # the first of the five best whose components all have the line's sign (np.argmin's first
        # point of least chi-square is order[0])
        for j in range(min(5, G)):
            g = order[j]
            valid = True
            for c in range(C):
                if not (sign[l] * w[l, g, c] >= 0):
                    valid = False
            if valid:
                best[l] = g
                break
        if best[l] == -2:
            # none has: the one-by-one rule (profiles.best_grid_point), each of the five best solved with
            # the sign constraint, the least of their chi-squares taken (the first of equal ones)
            low = np.inf
            for j in range(min(5, G)):
                g = order[j]
                c2 = nnls_rows(a[l, g], b[l], at[:n_at], sign[l], sol)
                if c2 < 0:   # (left to scipy's nnls, by the caller)
                    best[l] = -2
                    break
                if best[l] == -2 or c2 < low:
                    low = c2
                    best[l] = g
                    for c in range(C):
                        wbest[l, c] = sol[c]
            if best[l] >= 0:
                cbest[l] = low
        elif best[l] >= 0:
            cbest[l] = chi2[l, best[l]]
            for c in range(C):
                wbest[l, c] = w[l, best[l], c]
    return a, ata, w, chi2, best, wbest, cbest, True


@njit(cache=True, error_model="numpy")
def gauss_finish(x, b, cw, a, ata, chi2, centres, sh, sg, sig_line, step, sign, ngood, best, wbest, cbest, nsh, nw,
                 width_step, z_limit, w_lo, w_hi, gauss_fwhm):
    """The rest of a Gaussian group (``batchfit._gauss_group``'s second half, compiled): the quick design's
    width step (``width_step``: ``_step_widths``, its score test beyond ``z_limit``, widths kept within
    ``w_lo``-``w_hi`` times the line width), the covariance, the refined shift and each fit's numbers.

    ``best`` (L,) the chosen grid points (-1: no fit), ``wbest`` (L, C) and ``cbest`` (L,) their equivalent
    widths and chi-squares (the caller's NNLS may have replaced a few); ``step`` (L,) the grid's shift step;
    ``gauss_fwhm``: the FWHM of a Gaussian of unit sigma (``GAUSS_FWHM``).

    Returns
    -------
    cols, fitted
        ``cols`` (L, 7): equivalent width, its error, centre, FWHM, peak depth, reduced chi-square, sigma;
        ``fitted`` (L,) False where no fit is reported (no grid point, or a singular normal matrix).
    """
    L, P = x.shape
    C = centres.shape[1]
    sig_best = np.empty(L)
    ata_best = np.empty((L, C, C))
    wb = wbest.copy()
    cb = cbest.copy()
    for l in range(L):
        g = max(best[l], 0)
        sig_best[l] = sg[l, g]
        for c in range(C):
            for d in range(C):
                ata_best[l, c, d] = ata[l, g, c, d]
    mat = np.empty((C, C))
    sol = np.empty(C)
    rhs = np.empty(C)
    cen = np.empty(C)
    if width_step:
        # the score test of the held width at every fitted point first (_width_scores): a singular
        # normal matrix anywhere in the group means no step for any (as the stacked solve raised)
        z = np.full(L, np.inf)
        dsig = np.full(L, np.nan)
        d = np.empty(P)
        ad = np.empty(C)
        singular = False
        for l in range(L):
            if best[l] < 0:
                continue
            g = best[l]
            s = sig_best[l]
            s3 = s ** 3.0
            dd = 0.0
            score = 0.0
            for c in range(C):
                ad[c] = 0.0
            for q in range(P):
                t = 0.0
                m = 0.0
                for c in range(C):
                    dx = x[l, q] - (centres[l, c] + sh[l, g])
                    t += wb[l, c] * (a[l, g, c, q] * (dx * dx / s3 - 1.0 / s))
                    m += wb[l, c] * a[l, g, c, q]
                r = b[l, q] - m
                d[q] = t
                dd += t * t
                score += t * r
            for c in range(C):
                t = 0.0
                for q in range(P):
                    t += a[l, g, c, q] * d[q]
                ad[c] = t
            for c in range(C):
                for e in range(C):
                    mat[c, e] = ata_best[l, c, e]
            if not lu_solve(mat, ad, sol):
                singular = True
                break
            proj = 0.0
            for c in range(C):
                proj += ad[c] * sol[c]
            info = max(dd - proj, 0.0)
            z[l] = score / np.sqrt(info)
            dsig[l] = score / info
        if not singular:
            a1 = np.empty((C, P))
            at = np.empty(P, np.int64)
            ata1 = np.empty((L, C, C))
            w1 = np.empty((L, C))
            c1 = np.empty(L)
            s1 = np.empty(L)
            step_rows = np.zeros(L, np.bool_)
            for l in range(L):
                if best[l] < 0 or abs(z[l]) <= z_limit or not np.isfinite(dsig[l]):
                    continue
                g = best[l]
                s1[l] = min(max(sig_best[l] + dsig[l], w_lo * sig_line[l]), w_hi * sig_line[l])
                for c in range(C):
                    cen[c] = centres[l, c] + sh[l, g]
                n_at = 0
                for q in range(P):
                    if cw[l, q] != 0.0:
                        at[n_at] = q
                        n_at += 1
                a1[:] = 0.0
                _gauss_design(x[l], cw[l], cen, s1[l], at[:n_at], a1)
                if not _normal_solve(a1, b[l], at[:n_at], ata1[l], rhs, mat, w1[l]):
                    singular = True
                    break
                bb = 0.0
                for q in range(P):
                    bb += b[l, q] * b[l, q]
                t = 0.0
                for c in range(C):
                    t += w1[l, c] * rhs[c]
                c1[l] = bb - t
                step_rows[l] = True
            if not singular:
                for l in range(L):
                    if not step_rows[l] or not (c1[l] <= cb[l]):
                        continue
                    keep = True
                    for c in range(C):
                        if not (sign[l] * w1[l, c] >= 0):
                            keep = False
                    if keep:
                        sig_best[l] = s1[l]
                        cb[l] = c1[l]
                        for c in range(C):
                            wb[l, c] = w1[l, c]
                            for e in range(C):
                                ata_best[l, c, e] = ata1[l, c, e]
    cols = np.full((L, 7), np.nan)
    fitted = np.zeros(L, np.bool_)
    unit = np.zeros(C)
    unit[0] = 1.0
    for l in range(L):
        if best[l] < 0:
            continue
        # the covariance's first element: the first column of the inverse (a 1 x 1 matrix: the division)
        for c in range(C):
            for e in range(C):
                mat[c, e] = ata_best[l, c, e]
        if C == 1:
            if ata_best[l, 0, 0] == 0.0:
                continue
            c00 = 1.0 / ata_best[l, 0, 0]
        else:
            if not lu_solve(mat, unit, sol):
                continue
            c00 = sol[0]
        # the shift refined by a parabola through the chi-squares at the neighbouring shifts, same width
        g = best[l]
        k = g // nw
        shift = sh[l, g]
        if 0 < k < 2 * nsh:
            c0, cm, c2 = chi2[l, g - nw], chi2[l, g], chi2[l, g + nw]
            den = c0 - 2 * cm + c2
            if den > 0:
                shift = shift + step[l] * min(max(0.5 * (c0 - c2) / den, -0.5), 0.5)
        sig = sig_best[l]
        ew = wb[l, 0]
        fitted[l] = True
        cols[l, 0] = ew
        cols[l, 1] = np.sqrt(max(c00, 0.0))
        cols[l, 2] = centres[l, 0] + shift
        cols[l, 3] = gauss_fwhm * sig
        cols[l, 4] = ew / (sig * _SQRT_2PI)
        cols[l, 5] = cb[l] / max(ngood[l] - C - 2, 1)
        cols[l, 6] = sig
    return cols, fitted


def warm():
    """Compile (or load from numba's cache) every kernel for the argument types the Voigt batch and the
    Gaussian groups pass, on a tiny problem: called in a process that forks workers, the workers inherit the machine code
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
    # the Gaussian groups' kernels (batchfit._compiled_gauss_group), on one line of one component
    wave = np.linspace(-2.0, 2.0, m)
    x, b, cw, ngood = gauss_windows(np.zeros(1, np.int64), np.full(1, m - 1), wave, 1.0 - 0.3 * np.exp(-0.5 * wave * wave),
                                    np.ones(m), np.ones(m))
    centres = np.zeros((1, 1))
    sh = np.array([[-0.25, 0.0, 0.25]])
    sg = np.ones((1, 3))
    sign = np.ones(1)
    a, ata, w, chi2, best, wbest, cbest, _ = gauss_grid_choice(x, b, cw, centres, sh, sg, np.full(1, 0.25), 1, sign)
    gauss_finish(x, b, cw, a, ata, chi2, centres, sh, sg, np.ones(1), np.full(1, 0.25), sign, ngood, best,
                 wbest, cbest, 1, 1, True, 2.0, 0.95, 1.05, 2.3548200450309493)
    nnls_rows(a[0, 0], b[0], np.arange(m), 1.0, np.empty(1))
