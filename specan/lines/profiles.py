"""Line profiles (Gaussian, Voigt) and their least-squares fits over a window.

Model of a window: ``cont(x) * (1 - sum_k W_k P(x - c_k - shift; sigma[, gamma]))`` with P a
unit-area profile, so each W_k is that component's equivalent width. Component 0 is the
target line; the others are its blended neighbours.

A fit returns a dict: ``ew``, ``ew_err`` (of component 0), ``centre``, ``fwhm``,
``depth`` (peak of the fitted profile), ``chi2`` (reduced), ``sigma``, ``gamma``.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import least_squares, nnls
from scipy.special import voigt_profile, wofz

from ..resolution import GAUSS_FWHM
from . import compiled
from .leastsq import trf_bounded

__all__ = ["profiles", "voigt_wide", "fit_profile", "fit_profile_lean", "fit_gauss"]

#: :func:`voigt_wide` takes points this many Gaussian widths (|z| in the Faddeeva function's
#: argument) from the centre from the asymptotic series; nearer ones from scipy's voigt_profile.
FAR_Z = 14.0
#: the series' coefficients (2k - 1)!! / 2^k, k = 0..8, of w(z) ~ i / (sqrt(pi) z) sum_k c_k z^(-2k)
#: (Abramowitz & Stegun 7.1.23, from memory); the first term left out, c_9 / |z|^18, is below
#: 1.7e-16 of |w| from |z| = 14 on
_FAR_SERIES = (1.0, 0.5, 0.75, 1.875, 6.5625, 29.53125, 162.421875, 1055.7421875, 7918.06640625)
#: the same, as the compiled series takes them (:func:`specan.lines.wingkernel.far_wings`)
_SERIES = np.array(_FAR_SERIES)
_SERIES.flags.writeable = False


def profiles(x, centres, shift, sigma, gamma, profile):
    """Offsets from each centre and unit-area profiles there, shape (components, pixels)."""
    dx = x[None, :] - (centres[:, None] + shift)
    if profile == "voigt":
        return dx, voigt_profile(dx, sigma, gamma)
    return dx, np.exp(-0.5 * (dx / sigma) ** 2) / (sigma * np.sqrt(2 * np.pi))


#: :func:`voigt_wide` sums the series in blocks of this many points, in place in three arrays
#: made once a call: new arrays of all the far points at every operation (ten hydrogen lines over a
#: spectrum: ~40,000 points) were most of its time (2.3 -> 0.86 ms for ten lines over 4,000 pixels,
#: the same values; measured)
WIDE_BLOCK = 8192


def voigt_wide(dx, sigma, gamma):
    """``scipy.special.voigt_profile(dx, sigma, gamma)`` over a range of many line widths (a hydrogen
    line's fitted profile over the whole spectrum).

    Points nearer than :data:`FAR_Z` Gaussian widths (in the Faddeeva function's argument) are
    voigt_profile's own; farther ones, most of a spectrum, come from the asymptotic series of the
    Faddeeva function (:data:`_FAR_SERIES`), which there agrees with it to a few units of the last
    bit of the profile's scale (tests/test_lines_batched.py measures it) at less than half the cost
    (scipy's Faddeeva function spends ~60 ns a point in the wings, measured). ``sigma`` and
    ``gamma`` may be arrays that broadcast against ``dx``: one per point, or one per row of ``dx``
    (several lines at once: a line a row, its widths a column).
    """
    dx = np.asarray(dx, float)
    inv = 1.0 / (sigma * np.sqrt(2.0))
    kernels = compiled.wings()
    if kernels is not None and dx.ndim in (1, 2):
        out = _compiled_wide(kernels, dx, sigma, gamma, inv)
        if out is not None:
            return out
    far = dx * dx + gamma * gamma >= (FAR_Z / inv) ** 2
    if not far.any():
        return voigt_profile(dx, sigma, gamma)
    # (sigma and gamma: numbers, one per point or one per row; each point's arithmetic is the same
    # either way: what depends on the widths alone is made once for each width given, and broadcast)
    factor = -1.0 / (np.sqrt(np.pi) * sigma * np.sqrt(2.0 * np.pi))
    out = np.empty(dx.shape)
    # every operand laid out as the points' rows (a row of dx each, or one row of all), broadcast
    # views where an operand is given per row or as a number
    cols = dx.shape[-1] if dx.ndim else 1
    rows = dx.size // cols

    def laid(values):
        return np.broadcast_to(values, dx.shape).reshape(rows, cols)

    dx2, inv2, gamma2, factor2, out2 = laid(dx), laid(inv), laid(gamma), laid(factor), out.reshape(rows, cols)
    # the blocks: whole rows, as many as make WIDE_BLOCK points (a row longer than that, in pieces)
    block_rows, block_cols = (max(WIDE_BLOCK // cols, 1), cols) if cols < WIDE_BLOCK else (1, WIDE_BLOCK)
    size = min(block_rows, rows) * min(block_cols, cols)
    z, u2, acc = np.empty(size, complex), np.empty(size, complex), np.empty(size, complex)
    # z = (dx + i gamma) inv is made from its real and imaginary parts, which are exactly those
    # products (the written form's complex promotions only add and multiply zeros); the series is
    # then summed in place, block by block, over every point: the far points' arithmetic as written,
    # the same values, on slices (gathering the far points and scattering them back was a third of
    # the time, measured); the near points' values, which the series does not give (overflow, 1 / 0
    # at the centre), are replaced by voigt_profile's after
    with np.errstate(all="ignore"):
        for r0 in range(0, rows, block_rows):
            for c0 in range(0, cols, block_cols):
                k = (slice(r0, r0 + block_rows), slice(c0, c0 + block_cols))
                d = dx2[k]
                zb, ub, ab = (a[:d.size].reshape(d.shape) for a in (z, u2, acc))
                np.multiply(d, inv2[k], out=zb.real)
                np.multiply(gamma2[k], inv2[k], out=zb.imag)
                r = np.divide(1.0, zb, out=zb)                                   # 1 / z, the only division
                np.multiply(r, r, out=ub)
                np.multiply(_FAR_SERIES[-1], ub, out=ab)
                for c in _FAR_SERIES[-2:0:-1]:
                    ab += c
                    ab *= ub
                ab += 1.0
                ab *= r
                # Re w = Re(i q / sqrt(pi)) = -Im(q) / sqrt(pi), q = (1 + acc) / z
                np.multiply(ab.imag, factor2[k], out=out2[k])
    near = ~far
    if near.any():
        out[near] = voigt_profile(dx[near], np.broadcast_to(sigma, dx.shape)[near],
                                  np.broadcast_to(gamma, dx.shape)[near])
    return out


def _compiled_wide(kernels, dx, sigma, gamma, inv):
    """:func:`voigt_wide` by the compiled series (:func:`specan.lines.wingkernel.far_wings`: numpy's
    arithmetic point by point, the same values), where the widths are given one per row of ``dx`` (or
    as numbers); None otherwise (then the numpy code runs)."""
    rows = dx.shape[0] if dx.ndim == 2 else 1

    def per_row(values):
        v = np.asarray(values, float)
        if v.ndim == 0:
            return np.full(rows, v)
        if v.shape == (rows, 1) and dx.ndim == 2:
            return np.ascontiguousarray(v[:, 0])
        return None

    inv_r, gamma_r, sigma_r = per_row(inv), per_row(gamma), per_row(sigma)
    if inv_r is None or gamma_r is None or sigma_r is None:
        return None
    # (the far test's limit and the factor as the numpy code makes them, of the row's widths)
    limit = per_row((FAR_Z / inv) ** 2)
    factor = -1.0 / (np.sqrt(np.pi) * sigma_r * np.sqrt(2.0 * np.pi))
    out = np.empty(dx.shape)
    near = np.empty(dx.shape, bool)
    if kernels.far_wings(np.ascontiguousarray(dx).reshape(rows, -1), inv_r, gamma_r, factor, limit, _SERIES,
                         out.reshape(rows, -1), near.reshape(rows, -1)):
        at = near.nonzero()
        out[at] = voigt_profile(dx[at], np.broadcast_to(sigma, dx.shape)[at], np.broadcast_to(gamma, dx.shape)[at])
    return out


#: sqrt(2), sqrt(2 pi) and 2i / sqrt(pi), made once (the same values as made in every call)
_SQRT2, _SQRT2PI, _DW0 = np.sqrt(2.0), np.sqrt(2.0 * np.pi), 2j / np.sqrt(np.pi)


def voigt_and_derivatives(dx, sigma, gamma, out=None, at=None):
    """Voigt profile and its derivatives in x, sigma and gamma via the Faddeeva function.

    V = Re w(z) / (sigma sqrt(2 pi)), z = (x + i gamma) / (sigma sqrt 2), and
    w'(z) = -2 z w(z) + 2i / sqrt(pi) (Abramowitz & Stegun 7.1.20), so one call of
    ``scipy.special.wofz`` gives the analytic Jacobian of a Voigt fit.

    Returns ``(v, d_x, d_sigma, d_gamma)``; or, with ``out`` (4, N) and flat indices ``at``,
    writes them into ``out[:, at]`` (the batched fits' layout) and returns ``out``. The divisions
    by the per-point factors are made once, as reciprocals: in the batched fits this function is
    most of a model evaluation's arithmetic.
    """
    inv_s2 = 1.0 / (sigma * _SQRT2)
    inv_norm = 1.0 / (sigma * _SQRT2PI)
    if out is None:
        z = (dx + 1j * gamma) * inv_s2
    else:
        # z from its real and imaginary parts, which are exactly those products (the written form's
        # complex promotions only add and multiply zeros): the same values in fewer, real operations
        z = np.empty(np.shape(dx), complex)
        np.multiply(dx, inv_s2, out=z.real)
        np.multiply(gamma, inv_s2, out=z.imag)
    w = wofz(z)
    dw = _DW0 - 2.0 * z * w
    v = w.real * inv_norm
    scale = inv_s2 * inv_norm
    if out is None:
        d_x = dw.real * scale
        d_sigma = -((dw * z).real * inv_norm + v) / sigma
        d_gamma = -dw.imag * scale
        return v, d_x, d_sigma, d_gamma
    # the four rows made in one block and scattered into out in one call (the same operations)
    parts = np.empty((4, v.size))
    parts[0] = v
    np.multiply(dw.real, scale, out=parts[1])
    np.divide(-((dw * z).real * inv_norm + v), sigma, out=parts[2])
    np.multiply(-dw.imag, scale, out=parts[3])
    out[:, at] = parts
    return out


def window_arrays(data, lo, hi, skip=None):
    """Wavelengths, flux and sqrt weights over pixels lo..hi (``skip``: pixels given no weight)."""
    sel = slice(lo, hi + 1)
    wts = np.sqrt(data.weight[sel])
    if skip is not None:
        wts = np.where(skip, 0.0, wts)
    return data.wave[sel], data.flux[sel], wts


# ----------------------------------------------------------------------------- iterative fit


def fit_profile(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign=1.0, skip=None,
                free_width=False):
    """Least-squares profile fit over pixels lo..hi; component 0 is the target.

    Model: ``cont(x) * (1 - sum_k W_k P(x - c_k - shift; sigma[, gamma]))`` with P a
    unit-area Gaussian or Voigt (``scipy.special.voigt_profile``), so each W_k is
    that component's equivalent width. One shift and one width for all components:
    at these resolutions blended lines share the instrumental profile, and free
    widths for overlapping components are degenerate.

    Returns
    -------
    dict or None
        See the module docstring; None when the fit fails or has too few pixels.
    """
    return _fit_profile(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign, skip, free_width, False)


def fit_profile_lean(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign=1.0, skip=None,
                     free_width=False):
    """:func:`fit_profile` with the same algorithm written for small problems
    (:func:`specan.lines.leastsq.trf_bounded`): the same fit, without scipy's overhead per iteration."""
    return _fit_profile(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign, skip, free_width, True)


def _fit_profile(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign, skip, free_width, lean):
    x, y, wts = window_arrays(data, lo, hi, skip)
    if (wts > 0).sum() < (3 + len(centres)):
        return None
    voigt = profile == "voigt"
    p0, lb, ub = start_and_bounds(data, x, cont, centres, voigt, max_shift, sig_inst, sign, free_width)
    jac = _jacobian_voigt if voigt else _jacobian_gauss
    args = (x, y, cont, wts, centres, voigt)
    try:
        if lean:
            if np.any(lb >= ub):
                raise ValueError("each lower bound must be below its upper bound")   # as least_squares
            px, fun, jm, status = trf_bounded(lambda q: _residuals(q, *args), lambda q: jac(q, *args), p0, lb, ub,
                                              ftol=1e-6, xtol=1e-6, gtol=1e-8, max_nfev=100)
        else:
            res = least_squares(_residuals, p0, jac=jac, bounds=(lb, ub), args=args,
                                x_scale="jac", max_nfev=100, ftol=1e-6, xtol=1e-6, gtol=1e-8)
            px, fun, jm, status = res.x, res.fun, res.jac, res.status
    except (ValueError, FloatingPointError):
        return None
    if status <= 0:
        return None
    try:
        cov = np.linalg.pinv(jm.T @ jm)
    except np.linalg.LinAlgError:
        return None
    dof = max(int((wts > 0).sum()) - px.size, 1)
    return fit_summary(px, cov, centres, voigt, float(np.sum(fun**2)) / dof)


def start_and_bounds(data, x, cont, centres, voigt, max_shift, sig_inst, sign, free_width):
    """Start values and bounds of (shift, sigma[, gamma], W_1..W_n)."""
    ncomp = len(centres)
    span = max(x[-1] - x[0], 2 * sig_inst)
    w0 = []
    for c in centres:
        d0 = 1.0 - np.interp(c, data.wave, data.smooth) / np.interp(c, x, cont)
        w0.append(d0 * sig_inst * np.sqrt(2 * np.pi) * 1.2)
    wmax = 2.0 * span
    p0 = [0.0, sig_inst] + ([0.2 * sig_inst] if voigt else []) + w0
    # absorption components absorb, emission components emit (a free sign lets
    # neighbouring components cancel each other)
    # (a start value of the wrong sign is clipped into these bounds below)
    w_lo, w_hi = (0.0, wmax) if sign > 0 else (-50.0 * wmax, 0.0)
    # The Gaussian width stays near the spectrum's line width: at these resolutions the
    # instrument (or the star's rotation) sets it, and a free width soaks up the
    # wings of unresolved neighbours. Damping wings go to the Voigt's Lorentzian part.
    lb = [-max_shift, 0.95 * sig_inst] + ([0.0] if voigt else []) + [w_lo] * ncomp
    # (hydrogen: thermal and Stark broadening widen the core beyond the instrument)
    ub = [max_shift, span if free_width else 1.05 * sig_inst] + ([span] if voigt else []) + [w_hi] * ncomp
    lb, ub = np.array(lb), np.array(ub)
    p0 = np.minimum(np.maximum(np.array(p0, float), lb + 1e-6 * (ub - lb)), ub - 1e-6 * (ub - lb))
    return p0, lb, ub


def _residuals(p, x, y, cont, wts, centres, voigt):
    k = 3 if voigt else 2
    _, prof = profiles(x, centres, p[0], p[1], p[2] if voigt else 0.0, "voigt" if voigt else "gauss")
    return (cont * (1.0 - p[k:] @ prof) - y) * wts


def _jacobian_gauss(p, x, y, cont, wts, centres, voigt):
    # analytic Jacobian of the Gaussian model (hot path: most lines are Gaussian fits)
    k = 3 if voigt else 2
    dx, prof = profiles(x, centres, p[0], p[1], 0.0, "gauss")
    sig, ws = p[1], p[k:]
    j = np.empty((x.size, p.size))
    j[:, 0] = -cont * (ws[:, None] * prof * dx / sig**2).sum(axis=0)
    j[:, 1] = -cont * (ws[:, None] * prof * (dx**2 / sig**3 - 1.0 / sig)).sum(axis=0)
    j[:, k:] = -(cont[:, None] * prof.T)
    return j * wts[:, None]


def _jacobian_voigt(p, x, y, cont, wts, centres, voigt):
    k = 3
    dx = x[None, :] - (centres[:, None] + p[0])
    v, d_x, d_s, d_g = voigt_and_derivatives(dx, p[1], p[2])
    ws = p[k:][:, None]
    j = np.empty((x.size, p.size))
    j[:, 0] = cont * (ws * d_x).sum(axis=0)
    j[:, 1] = -cont * (ws * d_s).sum(axis=0)
    j[:, 2] = -cont * (ws * d_g).sum(axis=0)
    j[:, k:] = -(cont[:, None] * v.T)
    return j * wts[:, None]


def fit_summary(p, cov, centres, voigt, chi2):
    """The fit dict of best parameters ``p`` with covariance ``cov``."""
    k = 3 if voigt else 2
    w_err = float(np.sqrt(max(cov[k, k], 0.0)))
    sigma = p[1]
    gamma = p[2] if voigt else 0.0
    if voigt:
        fl, fg = 2.0 * gamma, GAUSS_FWHM * sigma
        fwhm = 0.5346 * fl + np.sqrt(0.2166 * fl**2 + fg**2)  # Olivero & Longbothum (1977), from memory
        peak = p[k] * voigt_profile(0.0, sigma, gamma)
    else:
        fwhm = GAUSS_FWHM * sigma
        peak = p[k] / (sigma * np.sqrt(2 * np.pi))
    return {"ew": float(p[k]), "ew_err": w_err, "centre": float(centres[0] + p[0]), "fwhm": float(fwhm),
            "depth": float(peak), "chi2": chi2, "sigma": float(sigma), "gamma": float(gamma)}


# ----------------------------------------------------------------------------- Gaussian fast path


def fit_gauss(data, lo, hi, cont, centres, max_shift, sig_line, sign=1.0):
    """Gaussian components by variable projection (fast path of :func:`fit_profile`).

    Same model as :func:`fit_profile` with Gaussian profiles. For fixed shift and width
    the model is linear in the equivalent widths, so they are solved exactly
    (batched normal equations) on a grid of shifts (steps of sigma/4) and widths
    (0.95, 1.00, 1.05 times the line width); the best grid point is refined by a
    parabola in shift. Ten times faster than iterating on all parameters.

    Returns
    -------
    dict or None
        See the module docstring.
    """
    x, y, wts = window_arrays(data, lo, hi)
    ncomp = len(centres)
    if (wts > 0).sum() < (3 + ncomp):
        return None
    b = (cont - y) * wts
    step = sig_line / 4.0
    sh, sg = shift_width_grid(max_shift, step, sig_line)
    try:
        a, ata, atb, w = _solve_on_grid(x, cont * wts, b, centres, sh, sg)
    except np.linalg.LinAlgError:
        return None
    chi2 = b @ b - np.sum(w * atb, axis=1)
    best, wbest, cbest = best_grid_point(a, b, w, chi2, sign)
    if best is None:
        return None
    sig = sg[best]
    shift = refined_shift(chi2, sh, sg, best, step)
    try:
        cov = np.linalg.inv(ata[best])
    except np.linalg.LinAlgError:
        return None
    dof = max(int((wts > 0).sum()) - ncomp - 2, 1)
    peak = wbest[0] / (sig * np.sqrt(2 * np.pi))
    return {"ew": float(wbest[0]), "ew_err": float(np.sqrt(max(cov[0, 0], 0.0))),
            "centre": float(centres[0] + shift), "fwhm": float(GAUSS_FWHM * sig), "depth": float(peak),
            "chi2": float(cbest) / dof, "sigma": float(sig), "gamma": 0.0}


def shift_width_grid(max_shift, step, sig_line):
    """Shifts (steps of ``step`` up to ``max_shift``) times widths (0.95, 1, 1.05 ``sig_line``), flattened."""
    nsh = int(np.floor(max_shift / step))
    shifts = np.arange(-nsh, nsh + 1) * step
    sigmas = sig_line * np.array([0.95, 1.0, 1.05])
    return np.repeat(shifts, sigmas.size), np.tile(sigmas, shifts.size)


def _solve_on_grid(x, cw, b, centres, sh, sg):
    """Design matrices, normal equations and their solutions at every grid point.

    Raises
    ------
    numpy.linalg.LinAlgError
        When a normal matrix is singular.
    """
    ncomp = len(centres)
    dx = x[None, None, :] - (centres[None, :, None] + sh[:, None, None])
    g = np.exp(-0.5 * (dx / sg[:, None, None]) ** 2) / (sg[:, None, None] * np.sqrt(2 * np.pi))
    a = g * cw[None, None, :]
    ata = a @ a.transpose(0, 2, 1) + 1e-12 * np.eye(ncomp)[None]
    atb = a @ b
    w = np.linalg.solve(ata, atb[..., None])[..., 0]
    return a, ata, atb, w


def best_grid_point(a, b, w, chi2, sign):
    """The grid point of least chi-square whose components all have the line's sign.

    Grid points whose solution has components of the wrong sign are solved with
    the sign constraint (NNLS) only if they would win. Returns (index, widths,
    chi-square), or (None, None, None).
    """
    order = np.argsort(chi2)
    # the first of the five best points whose components all have the line's sign wins, whatever
    # the constrained solutions of the points before it gave: those are made only when none has
    # (the same choice as solving them in turn, without the solves it discards)
    valid = np.all(sign * w[order[:5]] >= 0, axis=1)
    if valid.any():
        m = order[int(np.argmax(valid))]
        return m, w[m], chi2[m]
    best, wbest, cbest = None, None, None
    for m in order[:5]:
        wm = w[m]
        if np.all(sign * wm >= 0):
            best, wbest, cbest = m, wm, chi2[m]
            break
        wn, rn = nnls((sign * a[m]).T, b * sign)
        c = rn**2
        if best is None or c < cbest:
            best, wbest, cbest = m, sign * wn, c
    return best, wbest, cbest


def refined_shift(chi2, sh, sg, best, step):
    """Shift of grid point ``best`` refined by a parabola through chi2 at its neighbouring shifts (same width)."""
    shift, sig = sh[best], sg[best]
    same = np.flatnonzero(sg == sig)
    k = int(np.flatnonzero(same == best)[0])
    if 0 < k < same.size - 1:
        c0, c1, c2 = chi2[same[k - 1]], chi2[same[k]], chi2[same[k + 1]]
        den = c0 - 2 * c1 + c2
        if den > 0:
            shift = shift + step * float(np.clip(0.5 * (c0 - c2) / den, -0.5, 0.5))
    return shift
