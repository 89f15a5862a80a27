"""All the profile fits of a spectrum at once: the same fits as :mod:`.profiles`, batched.

:func:`specan.lines.measurement.measure` asks for one small fit per line (a Gaussian by
variable projection, or a Voigt by bounded nonlinear least squares): a few parameters
each, some 150 per spectrum. Made one by one, the Python overhead of each call outweighs
its arithmetic (scipy's ``least_squares`` alone spent ~2.7 ms a Voigt fit, measured in
``benchmarks/bench_lines.py``). Here every fit of one kind advances together:

- :func:`gauss_batch`: the variable-projection grid of :func:`.profiles.fit_gauss`,
  solved for all lines with the same number of components and grid in one stack of
  normal equations (windows padded with pixels of zero weight, which add nothing);
  the same arithmetic, so the same answers to rounding.
- :func:`voigt_batch`: the model of :func:`.profiles.fit_profile` fitted by a
  vectorised Levenberg-Marquardt iteration, each problem with its own parameters
  (a block-diagonal Jacobian: one small block per line), its own damping and its own
  convergence. scipy has no solver for many small least-squares problems at once
  (``least_squares`` takes one problem; stacking them into one sparse problem would
  couple their damping and stopping), so this one is written here. Bounds are those of
  :func:`.profiles.start_and_bounds`, kept by holding a parameter on its bound while the
  gradient pushes it outward and by taking a parameter a step would carry past its bound to
  that bound and solving the step again for the others (an active-set projected
  Levenberg-Marquardt, common practice); single absorption lines start from their direct
  integral (:func:`_direct_starts`). Where the optimum is well determined it converges to
  the one ``least_squares`` finds, more tightly than that one stops (its ``ftol`` of 1e-6);
  where it is not (flat valleys where the equivalent width is below its own error) the
  one-by-one fit is made and reported (by :func:`.profiles.fit_profile_lean`: scipy's algorithm
  without scipy's overhead, :mod:`.leastsq`). Both are measured in ``tests/test_lines_batched.py``.

That is the exact design (``exact=True`` here, ``lines.measure(exact_fits=True)``). The quick
design, ``lines.measure``'s default, gives up the one-by-one path's answers where they cost most
for least: Gaussian fits hold the width at the line width (:data:`QUICK_WIDTHS`) and take the full
width grid only where a score test of that width asks for it (:data:`QUICK_WIDTH_Z`); Voigt fits
stop at a looser decrement (:data:`QUICK_DECREMENT`) and none is made again one by one (an
ill-determined fit stands where the batch leaves it). Its tolerance against the exact design, and
its check against outside truth (injected lines, the solar strong lines, damped lines), are in
``tests/test_lines_quick.py``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import voigt_profile, wofz

from ..resolution import GAUSS_FWHM
from . import compiled as switch
from .profiles import (
    best_grid_point,
    fit_profile_lean,
    fit_summary,
    start_and_bounds,
    voigt_and_derivatives,
    window_arrays,
)

#: Damping widths (times the Gaussian sigma) a start is chosen from (:func:`_direct_starts`).
_DAMPING_GRID = np.logspace(-2.0, 2.5, 46)

__all__ = ["fit_planned", "fit_batched_voigt", "gauss_batch", "voigt_batch", "interp_rows"]

#: The iteration stops when a full Gauss-Newton step would lower the cost (half the
#: chi-square) by less than this: 1e-6 puts the fit within ~sqrt(2e-6) = 0.0014 of each
#: parameter's own error from the optimum (a chi-square rise of 1 is one error), where the
#: convergence is quadratic; where it is slow and linear (the long valleys of damped lines)
#: the decrement underestimates the distance left, by 1/(1 - rate). ``least_squares`` stops
#: at a relative cost change of 1e-6 (its ftol), no closer on a chi-square of a few hundred.
DECREMENT = 1e-6
#: ... or by less than this fraction of the cost (fits whose chi-square is huge: the profile
#: model, not the noise, limits them, and their errors understate the uncertainty).
COST_TOL = 1e-12
#: Most iterations of the batch; a problem not converged by then (6 of 502 Voigt fits on the
#: 40 spectra of ``benchmarks/bench_lines.py``, measured, 11 before the bound-crossing steps were
#: solved again; mostly hydrogen lines whose equivalent
#: width and damping width trade along a long curved valley) is fitted on its own by
#: :func:`specan.lines.profiles.fit_profile_lean`, the one-by-one path's algorithm.
MAX_ITER = 40
#: The batch's tail: once no more than ``TAIL_SIZE`` problems are left after ``TAIL_START``
#: iterations, and each is ill-determined where it stands, they are left to the one-by-one fit.
#: On the 40 spectra of ``benchmarks/bench_lines.py`` two thirds of the batch's model evaluations
#: carried one or two problems, all of them hydrogen fits with a free width, a fifth of the
#: iterations only problems that ended ill-determined or unconverged (measured). With the tail
#: left to the one-by-one fit: 30.6 -> 24.8 batch iterations a spectrum, 0.85 -> 0.9 fits one by
#: one; a problem left that would have converged determined gets the one-by-one fit, which is the
#: reference the batch is tested against (the 40 spectra: 2 moved, by at most 0.002 of an error).
TAIL_SIZE = 2
TAIL_START = 6
#: The damping every problem starts with (relative to the curvature of each parameter). Batch
#: iterations a spectrum on ``benchmarks/bench_lines.py``'s sets (pipeline / dense), measured:
#: 1e-4: 26.4 / -, 1e-3: 24.8 / 55, 1e-2: 23.2 / 52, 0.1: 21.4 / 51, 0.3: 23.4 / 46, 1: 25.9 / -,
#: 10: 30.5 / -. Not taken: from another damping the free-width hydrogen fits stop elsewhere in
#: their long valleys, and through the division by them every line moves (with 0.1, all 40
#: spectra, equivalent widths by up to 0.048 of their error, FWHM by up to 1%: measured).
LAMBDA0 = 1e-3
#: The quick design's stopping rule (``voigt_batch(exact=False)``, the default of
#: :func:`specan.lines.measure`): a full Gauss-Newton step would lower the cost by less than this,
#: i.e. the fit is within ~sqrt(2 QUICK_DECREMENT) = 0.045 of each parameter's own error from the
#: optimum where the convergence is quadratic.
QUICK_DECREMENT = 1e-3
#: The Gaussian fits' widths, times the line width: :func:`.profiles.fit_gauss`'s grid, and the
#: quick design's (``gauss_batch(exact=False)``), the line width held.
_GRID_WIDTHS = np.array([0.95, 1.0, 1.05])
QUICK_WIDTHS = np.array([1.0])
#: ... moved by one Gauss-Newton step in the width where the data ask for another: the score test
#: of the held width (:func:`_width_scores`) beyond this many standard errors
QUICK_WIDTH_Z = 2.0
#: Voigt batches of this many problems or more make their starts and bounds all at once
#: (:func:`_voigt_setup`); smaller ones problem by problem (:func:`_voigt_setup_each`), where the
#: fixed cost of the ~60 calls at once exceeds the ~25 us a problem of the loop (benchmarks/
#: bench_lines.py's spectra: the hydrogen batch holds ~10 problems, the metal lines' ~1.5; measured)
SETUP_AT_ONCE = 4
#: the signs of the Jacobian's shift, sigma and gamma columns against the weighted sums of the
#: profile's derivatives (the model is ``cont (1 - sum W V)``: d/dshift = -d/dx)
_JAC_SIGNS = np.array([1.0, -1.0, -1.0])


def fit_planned(data, plans, exact=True):
    """The profile fits ``plans`` ask for (:class:`~specan.lines.measurement.LinePlan`), in order.

    ``exact``: see :func:`voigt_batch` and :func:`gauss_batch` (False: the quick design).

    Returns
    -------
    list of dict or None
        One fit (see :mod:`specan.lines.profiles`) per plan, None where it failed.
    """
    fits = [None] * len(plans)
    gauss = [k for k, p in enumerate(plans) if not p.voigt]
    voigt = [k for k, p in enumerate(plans) if p.voigt]
    g = gauss_batch(data, [(p.window.lo, p.window.hi, p.cont, p.centres, p.max_shift, p.fw / GAUSS_FWHM, p.sign)
                           for p in (plans[k] for k in gauss)], exact=exact)
    v = voigt_batch(data, [(p.window.lo, p.window.hi, p.cont, p.centres, p.max_shift, p.fw / GAUSS_FWHM, p.sign,
                            p.skip, p.hydrogen) for p in (plans[k] for k in voigt)], exact=exact)
    for k, fit in zip(gauss + voigt, g + v):
        fits[k] = fit
    return fits


def fit_batched_voigt(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign=1.0, skip=None,
                      free_width=False):
    """:func:`specan.lines.profiles.fit_profile` (Voigt) by :func:`voigt_batch`, for a single fit."""
    if profile != "voigt":
        raise ValueError("the batched fit is a Voigt fit")
    return voigt_batch(data, [(lo, hi, cont, centres, max_shift, sig_inst, sign, skip, free_width)])[0]


# ----------------------------------------------------------------------------- Gaussian


def gauss_batch(data, problems, exact=True, compiled=None):
    """:func:`specan.lines.profiles.fit_gauss` of every problem.

    Parameters
    ----------
    data : LineData
    problems : list of tuple
        ``(lo, hi, cont, centres, max_shift, sig_line, sign)`` as :func:`fit_gauss` takes them.
    exact : bool
        True: :func:`fit_gauss`'s grid (widths 0.95, 1 and 1.05 times the line width). False (the
        quick design): the grid at the line width alone, the spectrum's own (:data:`QUICK_WIDTHS`),
        a third of it: a line the instrument does not resolve has the instrument's width. Where
        the data ask for another (a score test of the held width beyond :data:`QUICK_WIDTH_Z`),
        one Gauss-Newton step in the width within the same 0.95-1.05 (:func:`_step_widths`).
    compiled : bool, optional
        Each group by the compiled kernels (:func:`_compiled_gauss_group`) or in numpy; None (default):
        compiled where :data:`specan.lines.compiled.COMPILED` and numba imports.

    Returns
    -------
    list of dict or None
    """
    out = [None] * len(problems)
    groups = {}
    for k, (lo, hi, cont, centres, max_shift, sig_line, sign) in enumerate(problems):
        nsh = math.floor(max_shift / (sig_line / 4.0))   # (np.floor's integer, without a ufunc call a problem)
        groups.setdefault((len(centres), nsh), []).append(k)
    widths = _GRID_WIDTHS if exact else QUICK_WIDTHS
    for (ncomp, nsh), ks in groups.items():
        _gauss_group(data, problems, ks, ncomp, nsh, out, widths, not exact, compiled)
    return out


def _padded(data, problems, ks, skip_index=None):
    """Window arrays of problems ``ks`` padded to one length: x, y, cont, sqrt weights, good pixels."""
    lo = np.array([problems[k][0] for k in ks])
    hi = np.array([problems[k][1] for k in ks])
    n = hi - lo + 1
    size = int(n.max())
    inside = np.arange(size)[None, :] < n[:, None]
    # each window's pixels, the last one repeated past its end (window_arrays' values, gathered at once)
    pix = np.minimum(lo[:, None] + np.arange(size)[None, :], hi[:, None])
    x = data.wave[pix]
    y = np.where(inside, data.flux[pix], 0.0)
    wts = np.where(inside, np.sqrt(data.weight[pix]), 0.0)
    cont = np.zeros(x.shape)
    # (a continuum given as one value per pixel is taken as it is; np.broadcast_to, ~10 us a call,
    # only for the others: the same values. The shape read as the attribute: np.shape is a dispatched
    # call a problem)
    cont[inside] = np.concatenate([c if getattr(c, "shape", None) == (m,) else np.broadcast_to(c, (m,))
                                   for c, m in zip((problems[k][2] for k in ks), n.tolist())])
    if skip_index is not None:
        for row, k in enumerate(ks):
            skip = problems[k][skip_index]
            if skip is not None:
                wts[row, :n[row]] = np.where(skip, 0.0, wts[row, :n[row]])
    return x, y, cont, wts, (wts > 0).sum(axis=1)


def _gauss_group(data, problems, ks, ncomp, nsh, out, widths=None, width_step=False, compiled=None):
    """The problems ``ks`` (``ncomp`` components, shift grid of ``2 nsh + 1`` steps) into ``out``.

    ``widths``: the grid's widths (times the line width; default :func:`fit_gauss`'s three).
    ``width_step``: with one width held (the quick design), the fits whose data ask for another
    width take one Gauss-Newton step in it (:func:`_step_widths`). ``compiled``: the group by
    :func:`_compiled_gauss_group` (None: see :func:`_kernels`), else in numpy
    below (the fallback, and the reference tests/test_lines_compiled.py holds it to).
    """
    # enough pixels of non-zero weight (counted from one running count of them, not per window)
    count = _positive_counts(data)
    ks = [k for k in ks if count[problems[k][1] + 1] - count[problems[k][0]] >= 3 + ncomp]
    if not ks:
        return
    centres = np.array([problems[k][3] for k in ks], float)          # (L, C)
    sig_line = np.array([problems[k][5] for k in ks], float)
    sign = np.array([problems[k][6] for k in ks], float)
    step = sig_line / 4.0
    # the grid of shift_width_grid, line by line: shifts in steps of sigma/4, widths 0.95-1.05
    # (the quick design: the line width alone)
    widths = _GRID_WIDTHS if widths is None else widths
    nw = widths.size
    sh = np.repeat(np.arange(-nsh, nsh + 1), nw)[None, :] * step[:, None]      # (L, G)
    sg = sig_line[:, None] * np.tile(widths, 2 * nsh + 1)[None, :]
    singular = False
    if _kernels(compiled):
        if _compiled_gauss_group(data, problems, ks, centres, sh, sg, sig_line, step, sign, nsh, nw, width_step, out):
            return
        singular = True
    x, y, cont, wts, ngood = _padded(data, problems, ks)
    b = (cont - y) * wts
    cw = cont * wts
    dx = x[:, None, None, :] - (centres[:, None, :, None] + sh[:, :, None, None])   # (L, G, C, P)
    s4 = sg[:, :, None, None]
    a = np.exp(-0.5 * (dx / s4) ** 2) / (s4 * np.sqrt(2 * np.pi)) * cw[:, None, None, :]
    ata = a @ a.transpose(0, 1, 3, 2) + 1e-12 * np.eye(ncomp)
    atb = a @ b[:, None, :, None]
    try:
        if singular:   # (the compiled grid found a singular system: fitted line by line, below)
            raise np.linalg.LinAlgError("Singular matrix")
        if ncomp == 1:
            # one component: LAPACK's solve of a 1 x 1 system is the division (the same bits, tested),
            # without the solver's per-system overhead; a zero pivot stops it as it stops the solver
            if not np.all(ata != 0):
                raise np.linalg.LinAlgError("Singular matrix")
            w = (atb / ata)[..., 0]
        else:
            w = np.linalg.solve(ata, atb)[..., 0]                        # (L, G, C)
    except np.linalg.LinAlgError:
        # one singular normal matrix stops the whole stack: fit that group line by line
        from .profiles import fit_gauss

        for k in ks:
            lo, hi, cnt, cen, max_shift, sig, sgn = problems[k]
            out[k] = fit_gauss(data, lo, hi, cnt, cen, max_shift, sig, sgn)
        return
    atb = atb[..., 0]
    chi2 = np.einsum("lp,lp->l", b, b)[:, None] - (w * atb).sum(axis=2)     # (L, G)
    best = chi2.argmin(axis=1)
    rows = np.arange(len(ks))
    wbest = w[rows, best]
    cbest = chi2[rows, best]
    wrong = (~(sign[:, None] * wbest >= 0).all(axis=1)).nonzero()[0]
    if wrong.size:
        # the one-by-one rule's first step for all these lines at once: the first of the five best grid
        # points whose components all have the line's sign (profiles.best_grid_point: the same order,
        # argsort row by row, and the same choice)
        top = np.argsort(chi2[wrong], axis=1)[:, :5]
        valid = np.all(sign[wrong, None, None] * w[wrong[:, None], top] >= 0, axis=2)
        found = valid.any(axis=1)
        pick = top[np.arange(wrong.size), np.argmax(valid, axis=1)][found]
        rows_found = wrong[found]
        best[rows_found], wbest[rows_found], cbest[rows_found] = pick, w[rows_found, pick], chi2[rows_found, pick]
        wrong = wrong[~found]
    # none of them has: the one-by-one rule (NNLS on the best few grid points) over each line's own pixels
    _one_by_one_rule(wrong, problems, ks, a, b, w, chi2, sign, best, wbest, cbest)
    ok = best >= 0
    # each fit's width and normal matrix at its chosen grid point (the quick design may move the width)
    sig_best, ata_best = sg[rows, np.maximum(best, 0)], ata[rows, np.maximum(best, 0)]
    if width_step:
        _step_widths(x, b, a, cw, centres, sh, sig_line, sign, best, sig_best, ata_best, wbest, cbest)
    try:
        chosen = ata_best[ok]
        if ncomp == 1:   # (the inverse of a 1 x 1 matrix: LAPACK's is the division, the same bits)
            if not np.all(chosen != 0):
                raise np.linalg.LinAlgError("Singular matrix")
            cov = 1.0 / chosen
        else:
            cov = np.linalg.inv(chosen)
    except np.linalg.LinAlgError:
        cov = None
    shifts = _refined_shifts(chi2, sh, np.maximum(best, 0), step, nsh, nw)
    if cov is not None:
        # every fit's summary from arrays (the same operations as row by row below, element by element)
        okr = ok.nonzero()[0]
        sig = sig_best[okr]
        ew = wbest[okr, 0]
        columns = (ew, np.sqrt(np.maximum(cov[:, 0, 0], 0.0)), centres[okr, 0] + shifts[okr], GAUSS_FWHM * sig,
                   ew / (sig * np.sqrt(2 * np.pi)), cbest[okr] / np.maximum(ngood[okr] - ncomp - 2, 1), sig)
        for row, e, err, cen, fw, peak, c2, sg_ in zip(okr.tolist(), *(c.tolist() for c in columns)):
            out[ks[row]] = {"ew": e, "ew_err": err, "centre": cen, "fwhm": fw, "depth": peak, "chi2": c2,
                            "sigma": sg_, "gamma": 0.0}
        return
    j = 0
    for row, k in enumerate(ks):
        if not ok[row]:
            continue
        if cov is None:
            try:
                c00 = np.linalg.inv(ata_best[row])[0, 0]
            except np.linalg.LinAlgError:
                continue
        else:
            c00 = cov[j, 0, 0]
            j += 1
        sig = sig_best[row]
        shift = shifts[row]
        dof = max(int(ngood[row]) - ncomp - 2, 1)
        peak = wbest[row, 0] / (sig * np.sqrt(2 * np.pi))
        out[k] = {"ew": float(wbest[row, 0]), "ew_err": float(np.sqrt(max(c00, 0.0))),
                  "centre": float(centres[row, 0] + shift), "fwhm": float(GAUSS_FWHM * sig),
                  "depth": float(peak), "chi2": float(cbest[row]) / dof, "sigma": float(sig), "gamma": 0.0}


def _one_by_one_rule(rows, problems, ks, a, b, w, chi2, sign, best, wbest, cbest):
    """:func:`.profiles.best_grid_point` (NNLS on the best few grid points, over the line's own pixels) for
    each of ``rows``, written into ``best``, ``wbest`` and ``cbest`` (-1 in ``best``: no grid point)."""
    for row in rows:
        m = problems[ks[row]][1] - problems[ks[row]][0] + 1
        bg, wb, cb = best_grid_point(a[row, :, :, :m], b[row, :m], w[row], chi2[row], sign[row])
        if bg is None:
            best[row] = -1
            continue
        best[row], wbest[row], cbest[row] = bg, wb, cb


def _compiled_gauss_group(data, problems, ks, centres, sh, sg, sig_line, step, sign, nsh, nw, width_step, out):
    """:func:`_gauss_group`'s padded windows, grid, choice of grid point, width step, covariance and refined
    shift by three compiled calls (:func:`.lmkernel.gauss_windows`, :func:`.lmkernel.gauss_grid_choice`,
    :func:`.lmkernel.gauss_finish`); the one-by-one rule's NNLS (the lines none of whose five best grid
    points has every component of the line's sign) in the kernel too (:func:`.lmkernel.nnls_rows`; where
    it fails, :func:`.profiles.best_grid_point` between the last two). The same steps as the numpy path, its sums
    made in another order (tests/test_lines_compiled.py states how far the tables may move). Fits into
    ``out``; False where a normal matrix of the grid is singular (nothing written: the caller fits the
    group line by line, as the numpy path does). The padded windows are :func:`_padded`'s values (tested)."""
    from . import lmkernel

    lo = np.fromiter((problems[k][0] for k in ks), np.int64, len(ks))
    hi = np.fromiter((problems[k][1] for k in ks), np.int64, len(ks))
    # (each continuum as one value per pixel, as _padded takes it)
    conts = [problems[k][2] for k in ks]
    flat = np.concatenate([c if getattr(c, "shape", None) == (m,) else np.broadcast_to(c, (m,))
                           for c, m in zip(conts, (hi - lo + 1).tolist())])
    x, b, cw, ngood = lmkernel.gauss_windows(lo, hi, data.wave, data.flux, data.weight, np.asarray(flat, float))
    a, ata, w, chi2, best, wbest, cbest, ok = lmkernel.gauss_grid_choice(x, b, cw, centres, sh, sg, step, nw, sign)
    if not ok:
        return False
    # (a sign-constrained solve the kernel left to scipy)
    _one_by_one_rule((best == -2).nonzero()[0].tolist(), problems, ks, a, b, w, chi2, sign, best, wbest, cbest)
    cols, fitted = lmkernel.gauss_finish(x, b, cw, a, ata, chi2, centres, sh, sg, sig_line, step, sign, ngood, best,
                                         wbest, cbest, nsh, nw, width_step, QUICK_WIDTH_Z, _GRID_WIDTHS[0],
                                         _GRID_WIDTHS[-1], GAUSS_FWHM)
    for row, (e, err, cen, fw, peak, c2, sg_) in zip(fitted.nonzero()[0].tolist(), cols[fitted].tolist()):
        out[ks[row]] = {"ew": e, "ew_err": err, "centre": cen, "fwhm": fw, "depth": peak, "chi2": c2,
                        "sigma": sg_, "gamma": 0.0}
    return True


def _width_scores(x, b, a, ata, w, centres, sig):
    """The score test of the Gaussian width at the fitted point: how many standard errors the
    chi-square's slope in the width stands from zero, the equivalent widths refitted (profiled).

    ``x`` (L, P), ``b`` the weighted data (L, P), ``a`` the weighted design (L, C, P) and ``ata`` its
    normal matrix (L, C, C) at the fitted shift and width ``sig`` (L), ``w`` the fitted equivalent
    widths (L, C), ``centres`` the components' fitted places (L, C). The model's derivative in the
    width, ``d = sum_c w_c a_c ((x - c)^2 / sig^3 - 1 / sig)``, less its part the equivalent widths
    can take (its projection on the design); the residual is already orthogonal to the design, so
    ``z = d.r / sqrt(d.d - d.A'(AA')^-1 A d)``: about N(0, 1) where the held width is right and
    the noise (weights) is right (score test; common practice).
    """
    s = sig[:, None, None]
    dx = x[:, None, :] - centres[:, :, None]
    d = np.einsum("lc,lcp->lp", w, a * (dx * dx / s**3 - 1.0 / s))
    r = b - np.einsum("lc,lcp->lp", w, a)
    ad = np.einsum("lcp,lp->lc", a, d)
    try:
        proj = np.einsum("lc,lc->l", ad, _solve_normal(ata, ad[..., None])[..., 0])
    except np.linalg.LinAlgError:
        # a singular normal matrix in the stack: no score, and no step (the held width stands); the
        # caller unpacks two arrays (one was returned: a ValueError unless exactly two fits)
        return np.full(sig.size, np.inf), np.full(sig.size, np.nan)
    info = np.maximum(np.einsum("lp,lp->l", d, d) - proj, 0.0)
    score = np.einsum("lp,lp->l", d, r)
    with np.errstate(divide="ignore", invalid="ignore"):
        return score / np.sqrt(info), score / info


def _step_widths(x, b, a, cw, centres, sh, sig_line, sign, best, sig_best, ata_best, wbest, cbest):
    """The quick design's width: where the score test of the held width (:func:`_width_scores`)
    stands beyond :data:`QUICK_WIDTH_Z`, one Gauss-Newton step in the width (the equivalent widths
    profiled: ``score / information``), kept within 0.95-1.05 of the line width (the exact grid's
    range), the equivalent widths solved again there; taken where it lowers the chi-square and
    keeps every component's sign. Updates ``sig_best``, ``ata_best``, ``wbest``, ``cbest`` in place.
    """
    okr = (best >= 0).nonzero()[0]
    if not okr.size:
        return
    cen = centres[okr] + sh[okr, best[okr]][:, None]
    z, dsig = _width_scores(x[okr], b[okr], a[okr, best[okr]], ata_best[okr], wbest[okr], cen, sig_best[okr])
    f = ~(np.abs(z) <= QUICK_WIDTH_Z) & np.isfinite(dsig)
    if not f.any():
        return
    rows, cen = okr[f], cen[f]
    s1 = np.minimum(np.maximum(sig_best[rows] + dsig[f], _GRID_WIDTHS[0] * sig_line[rows]), _GRID_WIDTHS[-1] * sig_line[rows])
    s = s1[:, None, None]
    dx = x[rows][:, None, :] - cen[:, :, None]
    a1 = np.exp(-0.5 * (dx / s) ** 2) / (s * np.sqrt(2 * np.pi)) * cw[rows][:, None, :]
    ata1 = a1 @ a1.transpose(0, 2, 1) + 1e-12 * np.eye(a1.shape[1])
    atb1 = np.einsum("lcp,lp->lc", a1, b[rows])
    try:
        w1 = _solve_normal(ata1, atb1[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return
    c1 = np.einsum("lp,lp->l", b[rows], b[rows]) - (w1 * atb1).sum(axis=1)
    take = (c1 <= cbest[rows]) & (sign[rows, None] * w1 >= 0).all(axis=1)
    rows = rows[take]
    sig_best[rows], ata_best[rows], wbest[rows], cbest[rows] = s1[take], ata1[take], w1[take], c1[take]


def _solve_normal(m, rhs):
    """``np.linalg.solve(m, rhs)`` of stacked normal matrices; one-component ones (1 x 1) by division,
    LAPACK's very bits without its per-system overhead (tests/test_lines_batched.py), a zero pivot
    raising as the solver raises."""
    if m.shape[-1] != 1:
        return np.linalg.solve(m, rhs)
    if not np.all(m != 0):
        raise np.linalg.LinAlgError("Singular matrix")
    return rhs / m


def _positive_counts(data):
    """Running count of the pixels of non-zero weight: pixels lo..hi hold ``c[hi + 1] - c[lo]``
    (:meth:`~specan.lines.data.LineData.positive_counts`, made once per weight array)."""
    return data.positive_counts()


def _refined_shifts(chi2, sh, best, step, nsh, nw=3):
    """:func:`specan.lines.profiles.refined_shift` of every row (grid: shifts repeated over ``nw`` widths).

    On that grid the points of the best width are every ``nw``-th one, so the neighbours in shift
    are ``best -+ nw``; the same parabola, the same arithmetic, for all rows at once.
    """
    rows = np.arange(best.size)
    k = best // nw
    inner = (k > 0) & (k < 2 * nsh)
    c0 = chi2[rows, np.where(inner, best - nw, best)]
    c1 = chi2[rows, best]
    c2 = chi2[rows, np.where(inner, best + nw, best)]
    den = c0 - 2 * c1 + c2
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.minimum(np.maximum(0.5 * (c0 - c2) / den, -0.5), 0.5)
    shift = sh[rows, best]
    return np.where(inner & (den > 0), shift + step * frac, shift)


# ----------------------------------------------------------------------------- Voigt


def voigt_batch(data, problems, max_iter=MAX_ITER, decrement=DECREMENT, cost_tol=COST_TOL, exact=True,
                compiled=None):
    """:func:`specan.lines.profiles.fit_profile` (Voigt) of every problem, all iterated together.

    Parameters
    ----------
    data : LineData
    problems : list of tuple
        ``(lo, hi, cont, centres, max_shift, sig_inst, sign, skip, free_width)`` as
        :func:`fit_profile` takes them.
    max_iter : int
        Most iterations; a problem not converged by then is fitted by
        :func:`~specan.lines.profiles.fit_profile_lean` (the one-by-one fit, the same iterates).
    decrement, cost_tol : float
        Convergence: a full Gauss-Newton step would lower the cost by less than ``decrement``
        or than ``cost_tol`` times the cost.
    exact : bool
        True: the fits the one-by-one path makes (problems the batch leaves unconverged or
        ill-determined are fitted again by :func:`~specan.lines.profiles.fit_profile_lean`).
        False (the quick design, :data:`QUICK_DECREMENT`): every problem is reported where the
        batch stops, none fitted again; an ill-determined fit (equivalent width below its
        error) then stands where the batch left it in its flat valley.

    Returns
    -------
    list of dict or None
    """
    out = [None] * len(problems)
    if not exact:
        decrement = max(decrement, QUICK_DECREMENT)
    setup = _voigt_setup(data, problems)
    if setup is None:
        return out
    live, x, y, cont, wts, ngood, ncomp, centres, p, lb, ub, real = setup
    _direct_starts(data, problems, live, x, y, cont, wts, ncomp, p, lb, ub)
    model = _VoigtModel(x, y, cont, wts, centres, real[:, 3:])
    r, jac = model(p)
    cost = 0.5 * np.einsum("bp,bp->b", r, r)
    finite = np.isfinite(cost)   # least_squares: "residuals are not finite in the initial point"
    converged = np.zeros(p.shape[0], bool)
    if _kernels(compiled):
        act = _compiled_iterations(model, p, r, jac, cost, lb, ub, real, finite, converged, max_iter, decrement,
                                   cost_tol)
    else:
        act = _numpy_iterations(model, p, r, jac, cost, lb, ub, real, finite, converged, max_iter, decrement,
                                cost_tol)
    return _voigt_results(data, problems, out, live, p, jac, cost, converged, finite, act, ngood, ncomp, centres,
                          exact)


def _kernels(choice=None):
    """Whether the fits run compiled (:mod:`.lmkernel`, numba): in numpy a Voigt iteration or a Gaussian
    group is ~60-125 calls on a handful of small problems, and their count, not their arithmetic, is the
    cost. ``choice`` (the ``compiled`` argument of :func:`voigt_batch` and :func:`gauss_batch`) decides
    where given, else :data:`specan.lines.compiled.COMPILED` (``SPECAN_COMPILED=0``: the numpy code, within
    tests/test_lines_compiled.py's tolerance); never without numba. lmkernel is imported here, on the
    first fit, as numba's import alone takes ~0.2 s."""
    if choice is None:
        return switch.lm() is not None
    if not choice:
        return False
    from . import lmkernel

    return lmkernel.AVAILABLE


def _compiled_iterations(model, p, r, jac, cost, lb, ub, real, finite, converged, max_iter, decrement, cost_tol):
    """:func:`_numpy_iterations` compiled (:mod:`.lmkernel`): the same steps, three compiled calls an
    iteration around scipy's Faddeeva function; the full arrays updated in place, the problems still
    iterating returned (indices)."""
    from . import lmkernel

    nb = p.shape[0]
    act = finite.nonzero()[0]
    padded = ~real
    lam, nu = np.full(nb, LAMBDA0), np.full(nb, 2.0)
    # (the kernels write into these arrays in place, compiled for C-contiguous ones: the model's are)
    assert r.flags.c_contiguous and jac.flags.c_contiguous and p.flags.c_contiguous
    # the model's points laid out once: problem b's are first[b]:first[b + 1] (model.at is sorted)
    first = np.searchsorted(model.problem_at, np.arange(nb + 1))
    comp_at, pix_at = np.divmod(model.offset_at, model.shape[2])
    for it in range(max_iter):
        if not act.size:
            break
        tail = act.size <= TAIL_SIZE and it >= TAIL_START
        small, stop, pn, predicted, ill, singular = lmkernel.lm_propose(act, p, r, jac, cost, lb, ub, padded, lam,
                                                                      decrement, cost_tol, tail)
        if tail and not singular and ill.all():
            break   # the batch's tail (see _numpy_iterations)
        if stop.any():
            converged[act[stop]] = small[stop]
            go = ~stop
            act, pn, predicted = act[go], pn[go], predicted[go]
            if not act.size:
                break
        z = lmkernel.lm_points(act, pn, first, model.x_at, model.centre_at)
        lmkernel.lm_accept_model(act, pn, z, wofz(z), predicted, first, comp_at, pix_at, model.cont, model.y,
                                 model.wts, p, r, jac, cost, lam, nu)
    return act


def _numpy_iterations(model, p, r, jac, cost, lb, ub, real, finite, converged, max_iter, decrement, cost_tol):
    """The batch's Levenberg-Marquardt iterations in numpy: ``p``, ``jac``, ``cost`` and ``converged``
    updated in place for the problems that stop; returns the problems still iterating (indices) with
    their state written back."""
    eye = np.eye(p.shape[1])
    # the problems still iterating, their state packed together (unpacked as each stops)
    act = finite.nonzero()[0]
    P, R, J, C = p[act], r[act], jac[act], cost[act]
    LB, UB = lb[act], ub[act]
    PADDED = ~real[act]   # (the padding's parameters: held at every step)
    span = UB - LB
    near_lo, near_hi = LB + 1e-12 * span, UB - 1e-12 * span
    lam, nu = np.full(act.size, LAMBDA0), np.full(act.size, 2.0)
    work = model.rows(act)
    # (a tiny predicted decrease overflows rho, which is clipped to [0, 1] below)
    with np.errstate(over="ignore"):
        for it in range(max_iter):
            if not act.size:
                break
            grad = (R[:, None, :] @ J)[:, 0]
            jtj = J.transpose(0, 2, 1) @ J
            if act.size <= TAIL_SIZE and it >= TAIL_START and _all_ill_determined(P, jtj, ~PADDED):
                # the batch's tail: the few problems left are ill-determined where they are, and an
                # ill-determined fit is reported from the one-by-one algorithm anyway (below); left
                # unconverged, they go to it now instead of iterating on alone (the quick design
                # reports them where they stand: ill-determined, they are known no better anywhere
                # along their valley)
                break
            # on a bound with the gradient pushing outward: held there this step
            held = PADDED | ((P <= near_lo) & (grad > 0)) | ((P >= near_hi) & (grad < 0))
            diag = jtj.diagonal(axis1=1, axis2=2)
            # Marquardt's scaling by the curvature of each parameter (floored: a flat direction)
            diag = np.maximum(diag, 1e-12 * diag.max(axis=1, keepdims=True) + 1e-300)
            free = ~held
            keep = free[:, :, None] & free[:, None, :]
            held_eye = held[:, :, None] * eye
            diag_eye = diag[:, :, None] * eye
            rhs = np.where(held, 0.0, -grad)
            # the Gauss-Newton step (its decrement, the cost a full undamped step would remove, is
            # ~0 only at an optimum, whatever the damping, so it is what tells convergence) and the
            # damped step, both systems solved in one call
            gn, step = _solve_pair(keep, jtj, diag_eye, held_eye, rhs, lam)
            small = 0.5 * (rhs * gn).sum(axis=1) <= np.maximum(decrement, cost_tol * C)
            # stop: at the optimum (the decrement a negligible fraction of the cost), or the damping
            # has grown so large that no step lowers the cost; before the step, whose model
            # evaluation a converged problem does not need
            stop = small | (lam > 1e12)
            if stop.any():
                rows = act[stop]
                p[rows], jac[rows], cost[rows] = P[stop], J[stop], C[stop]
                converged[rows] = small[stop]
                go = ~stop
                act = act[go]
                if not act.size:
                    break
                P, R, J, C, LB, UB, PADDED = P[go], R[go], J[go], C[go], LB[go], UB[go], PADDED[go]
                near_lo, near_hi, lam, nu = near_lo[go], near_hi[go], lam[go], nu[go]
                grad, jtj, held, keep, held_eye, diag_eye, rhs, step = (
                    grad[go], jtj[go], held[go], keep[go], held_eye[go], diag_eye[go], rhs[go],
                    step[go] if step is not None else None)
                work = model.rows(act)
            if step is None:   # (a singular system: solved again alone, as before the pairing)
                step = _solve(np.where(keep, jtj + lam[:, None, None] * diag_eye, 0.0) + held_eye, rhs)
            # a step that would cross bounds: those parameters go to their bound and the others are
            # solved again with them held there. Clipping the step alone spoils it (its predicted
            # decrease can turn negative, and the damping then grows over several failed steps): with
            # it the batch took ~12 iterations a fit, with this ~8, and left 6 of 502 unconverged
            # instead of 11 (benchmarks/bench_lines.py's spectra, measured)
            to = P + step
            cross = (to < LB) | (to > UB)
            if cross.any():
                to_bound = np.where(cross, np.minimum(np.maximum(to, LB), UB) - P, 0.0)
                held2 = held | cross
                free2 = ~held2
                rhs2 = np.where(held2, 0.0, -grad - (jtj @ to_bound[:, :, None])[:, :, 0])
                step2 = _solve(np.where(free2[:, :, None] & free2[:, None, :], jtj + lam[:, None, None] * diag_eye,
                                        0.0) + held2[:, :, None] * eye, rhs2)
                step = np.where(cross.any(axis=1)[:, None], step2 + to_bound, step)
                to = P + step
            pn = np.minimum(np.maximum(to, LB), UB)
            st = pn - P
            predicted = -(grad * st).sum(axis=1) - 0.5 * np.einsum("bn,bnm,bm->b", st, jtj, st)
            rn, jn = work(pn)
            cn = 0.5 * (rn * rn).sum(axis=1)
            # (C is finite, so cn < C holds only for a finite cn: the test of a finite, lower cost)
            better = cn < C
            # Nielsen's (1999) damping update: by how well the linearised model predicted the
            # decrease (rho), gently; doubling factors after failures (from memory)
            rho = (C - cn) / np.maximum(predicted, 1e-300)
            gentle = lam * np.maximum(1.0 / 3.0, 1.0 - (2.0 * np.minimum(np.maximum(rho, 0.0), 1.0) - 1.0) ** 3)
            if better.all():
                # (the same values as the general case below, which then takes every first choice)
                lam = np.maximum(gentle, 1e-15)
                nu = np.full(nu.shape, 2.0)
                P, R, J, C = pn, rn, jn, cn
            else:
                lam = np.maximum(np.where(better, gentle, lam * nu), 1e-15)
                nu = np.where(better, 2.0, 2.0 * nu)
                P = np.where(better[:, None], pn, P)
                R = np.where(better[:, None], rn, R)
                J = np.where(better[:, None, None], jn, J)
                C = np.where(better, cn, C)
    if act.size:
        p[act], jac[act], cost[act] = P, J, C
    return act


def _voigt_results(data, problems, out, live, p, jac, cost, converged, finite, act, ngood, ncomp, centres, exact):
    """The fits of :func:`voigt_batch` from the iterations' end state (``act``: problems not stopped)."""
    if not exact and act.size:
        # the quick design: the problems still iterating (the tail, or past max_iter) reported where
        # they stand, not fitted again one by one
        converged[act] = True
    # the covariances of all converged problems in one call: a padded parameter's Jacobian column
    # is zero, so its row and column of the normal matrix are too, and the pseudo-inverse of the
    # rest is that of the problem's own block (to rounding)
    done = converged.nonzero()[0]
    try:
        covs = np.linalg.pinv(jac[done].transpose(0, 2, 1) @ jac[done]) if done.size else None
    except np.linalg.LinAlgError:
        covs = None
    if covs is not None:
        # every converged fit's summary from arrays (fit_summary's arithmetic, element by element)
        dof = np.maximum(ngood[done] - (3 + ncomp[done]), 1)
        made = _voigt_summaries(p[done], covs[:, 3, 3], centres[done, 0], 2.0 * cost[done], dof)
        for row, fit in zip(done.tolist(), made):
            out[live[row]] = fit
    for row, k in enumerate(live):
        if not converged[row]:
            if finite[row]:
                lo, hi, cnt, cen, max_shift, sig_inst, sign, skip, free_width = problems[k]
                out[k] = fit_profile_lean(data, lo, hi, cnt, cen, "voigt", max_shift, sig_inst, sign, skip, free_width)
            continue
        if covs is None:
            n = 3 + ncomp[row]
            jr = jac[row][:, :n]
            try:
                cov = np.linalg.pinv(jr.T @ jr)
            except np.linalg.LinAlgError:
                continue
            dof = max(int(ngood[row]) - n, 1)
            out[k] = fit_summary(p[row, :n], cov, problems[k][3], True, float(2.0 * cost[row]) / dof)
        if exact and not abs(out[k]["ew"]) > out[k]["ew_err"]:
            # an ill-determined fit (a flat valley where depth and damping trade): where the batch
            # stops in it depends on its path (Fe I 3820 in a MILES G9.5 III star: chi2 0.748
            # against least_squares' 0.639; Fe I 3860 in two MILES M dwarfs, equivalent width 0
            # +- 3e5 A, FWHM 43 against 15 A at about the same chi2: measured), so the one-by-one
            # fit is made and reported, as the one-by-one path reports it
            lo, hi, cnt, cen, max_shift, sig_inst, sign, skip, free_width = problems[k]
            slow = fit_profile_lean(data, lo, hi, cnt, cen, "voigt", max_shift, sig_inst, sign, skip, free_width)
            if slow is not None:
                out[k] = slow
    return out


def _voigt_summaries(p, var_ew, centre0, chi2_sum, dof):
    """:func:`~specan.lines.profiles.fit_summary` (Voigt) of many fits at once, as a list of dicts.

    ``p`` the parameters (fits, 3 + components), ``var_ew`` the variance of component 0's equivalent
    width, ``centre0`` component 0's listed centre, ``chi2_sum`` the chi-square and ``dof`` its degrees
    of freedom: fit_summary's operations element by element (the same values), one call each for all.
    """
    sigma, gamma, ew = p[:, 1], p[:, 2], p[:, 3]
    fl, fg = 2.0 * gamma, GAUSS_FWHM * sigma
    # (np.float_power: C's pow, as a Python float's ** 2 in fit_summary; an array's ** 2 is the product
    # x * x, which differs from pow in the last bit now and then, measured)
    fwhm = 0.5346 * fl + np.sqrt(0.2166 * np.float_power(fl, 2.0) + np.float_power(fg, 2.0))   # Olivero & Longbothum (1977), from memory
    peak = ew * voigt_profile(0.0, sigma, gamma)
    columns = (ew, np.sqrt(np.maximum(var_ew, 0.0)), centre0 + p[:, 0], fwhm, peak, chi2_sum / dof, sigma, gamma)
    keys = ("ew", "ew_err", "centre", "fwhm", "depth", "chi2", "sigma", "gamma")
    return [dict(zip(keys, values)) for values in zip(*(c.tolist() for c in columns))]


def _voigt_setup(data, problems):
    """The batch's padded arrays, starts and bounds of the problems a fit can be made of, or None.

    :func:`~specan.lines.profiles.start_and_bounds` (Voigt) of every problem at once, element by
    element the same arithmetic (the same values; one call per problem, with its interpolations,
    was a tenth of the batch, benchmarks/bench_lines.py). A problem is left out (no fit) with fewer
    than 3 + its components pixels of non-zero weight, or where its bounds cross or its start is not
    finite (``least_squares`` refuses those). The arrays are padded to the problems kept, as before.

    Returns
    -------
    tuple or None
        ``(live, x, y, cont, wts, ngood, ncomp, centres, p, lb, ub, real)``: the problems kept (indices
        into ``problems``), their windows padded (:func:`_padded`), their counts of components, the
        components' centres (padded with zeros), starts, lower and upper bounds (padded components held
        at zero within [-1, 1]) and which parameters are the problems' own.
    """
    ks = list(range(len(problems)))
    if not ks:
        return None
    if len(ks) < SETUP_AT_ONCE:
        return _voigt_setup_each(data, problems)
    x, y, cont, wts, ngood = _padded(data, problems, ks, skip_index=7)
    ncomp = np.array([len(pr[3]) for pr in problems])
    width = int(ncomp.max())
    real_c = np.arange(width)[None, :] < ncomp[:, None]
    centres = np.zeros((len(ks), width))
    centres[real_c] = np.concatenate([np.asarray(pr[3], float).ravel() for pr in problems])
    max_shift = np.array([pr[4] for pr in problems], float)
    sig = np.array([pr[5] for pr in problems], float)
    sign = np.array([pr[6] for pr in problems], float)
    free_width = np.array([bool(pr[8]) for pr in problems])
    length = np.array([pr[1] - pr[0] + 1 for pr in problems])
    # start_and_bounds, element by element
    span = np.maximum(data.wave[[pr[1] for pr in problems]] - data.wave[[pr[0] for pr in problems]], 2 * sig)
    row_c = np.nonzero(real_c)[0]
    at = centres[real_c]
    with np.errstate(divide="ignore", invalid="ignore"):
        d0 = 1.0 - np.interp(at, data.wave, data.smooth) / interp_rows(at, x[row_c], cont[row_c], length[row_c])
    w0 = np.zeros((len(ks), width))
    w0[real_c] = d0 * sig[row_c] * np.sqrt(2 * np.pi) * 1.2
    wmax = 2.0 * span
    w_lo = np.where(sign > 0, 0.0, -50.0 * wmax)
    w_hi = np.where(sign > 0, wmax, 0.0)
    p0 = np.column_stack([np.zeros(len(ks)), sig, 0.2 * sig, w0])
    lb = np.column_stack([-max_shift, 0.95 * sig, np.zeros(len(ks)), np.repeat(w_lo[:, None], width, axis=1)])
    ub = np.column_stack([max_shift, np.where(free_width, span, 1.05 * sig), span,
                          np.repeat(w_hi[:, None], width, axis=1)])
    real = np.column_stack([np.ones((len(ks), 3), bool), real_c])
    with np.errstate(invalid="ignore"):
        p0 = np.minimum(np.maximum(p0, lb + 1e-6 * (ub - lb)), ub - 1e-6 * (ub - lb))
        usable = (ngood >= 3 + ncomp) & ~np.any(real & (lb >= ub), axis=1) & np.all(~real | np.isfinite(p0), axis=1)
    live = np.flatnonzero(usable)
    if not live.size:
        return None
    if live.size < len(ks):
        # padded again to the problems kept (the padding's size enters the sums' rounding)
        x, y, cont, wts, ngood = _padded(data, problems, live.tolist(), skip_index=7)
        width = int(ncomp[live].max())
        ncomp, centres, p0, lb, ub, real = (ncomp[live], centres[live, :width], p0[live, :3 + width],
                                            lb[live, :3 + width], ub[live, :3 + width], real[live, :3 + width])
    # padded components: no width, held at zero (their columns never enter a step)
    p = np.where(real, p0, 0.0)
    lb = np.where(real, lb, -1.0)
    ub = np.where(real, ub, 1.0)
    return live.tolist(), x, y, cont, wts, ngood, ncomp, centres, p, lb, ub, real


def _voigt_setup_each(data, problems):
    """:func:`_voigt_setup` problem by problem (:func:`~specan.lines.profiles.start_and_bounds` of each):
    the same arrays, for batches of a few problems."""
    live, starts = [], []
    for k, (lo, hi, cont, centres, max_shift, sig_inst, sign, skip, free_width) in enumerate(problems):
        x, _, wts = window_arrays(data, lo, hi, skip)
        if (wts > 0).sum() < 3 + len(centres):
            continue
        p0, lb, ub = start_and_bounds(data, x, cont, centres, True, max_shift, sig_inst, sign, free_width)
        if np.any(lb >= ub) or not np.all(np.isfinite(p0)):
            continue   # least_squares refuses these (a ValueError, so no fit)
        live.append(k)
        starts.append((p0, lb, ub))
    if not live:
        return None
    x, y, cont, wts, ngood = _padded(data, problems, live, skip_index=7)
    nb = len(live)
    ncomp = np.array([len(problems[k][3]) for k in live])
    npar = 3 + int(ncomp.max())
    # padded components: no width, held at zero (their columns never enter a step)
    centres = np.zeros((nb, npar - 3))
    p, lb, ub = np.zeros((nb, npar)), np.full((nb, npar), -1.0), np.ones((nb, npar))
    real = np.zeros((nb, npar), bool)
    for row, k in enumerate(live):
        n = 3 + ncomp[row]
        centres[row, :ncomp[row]] = problems[k][3]
        p[row, :n], lb[row, :n], ub[row, :n] = starts[row]
        real[row, :n] = True
    return live, x, y, cont, wts, ngood, ncomp, centres, p, lb, ub, real


def interp_rows(xv, xp, fp, length):
    """``np.interp(xv[m], xp[m, :length[m]], fp[m, :length[m]])`` for every row m, with np.interp's rules
    and arithmetic (the same values)."""
    rows = np.arange(xv.size)
    inside = np.arange(xp.shape[1])[None, :] < length[:, None]
    j = (inside & (xp <= xv[:, None])).sum(axis=1) - 1      # xp[j] <= x < xp[j + 1]
    last = length - 1
    jc = np.minimum(np.maximum(j, 0), np.maximum(last - 1, 0))
    jn = np.minimum(jc + 1, last)
    xa, xb, fa, fb = xp[rows, jc], xp[rows, jn], fp[rows, jc], fp[rows, jn]
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (fb - fa) / (xb - xa)
        val = slope * (xv - xa) + fa
        # np.interp's fallback where the first form is NaN
        val = np.where(np.isnan(val), np.where(fa == fb, fa, slope * (xv - xb) + fb), val)
    val = np.where(xa == xv, fa, val)
    val = np.where(j >= last, fp[rows, last], val)
    val = np.where(xv > xp[rows, last], fp[rows, last], val)
    return np.where(xv < xp[:, 0], fp[:, 0], val)


def _all_ill_determined(p, jtj, real):
    """Whether every problem's equivalent width (component 0, parameter 3) is no larger than its
    error from the normal matrix ``jtj`` at parameters ``p`` (``real``: the problem's own
    parameters, not padding): the test the converged fits get, from the inverse of the normal
    matrix (a padded parameter's row and column are zero: a one on its diagonal leaves the
    problem's own block as it is); False where a normal matrix is singular."""
    unit = np.zeros((p.shape[0], p.shape[1], 1))
    unit[:, 3] = 1.0
    try:
        var = np.linalg.solve(jtj + (~real)[:, :, None] * np.eye(p.shape[1]), unit)[:, 3, 0]
    except np.linalg.LinAlgError:
        return False
    return bool(np.all(~(np.abs(p[:, 3]) > np.sqrt(np.maximum(var, 0.0)))))


def _direct_starts(data, problems, live, x, y, cont, wts, ncomp, p, lb, ub):
    """Start the equivalent width and damping width of single absorption lines from the data (in ``p``).

    :func:`~specan.lines.profiles.start_and_bounds` starts every component from its core depth as
    a Gaussian, far below the equivalent width of a line with wings (hydrogen, mostly): here the
    equivalent width starts from the direct integral over the window's weighted pixels (scaled to
    the whole window) and the damping width from the one that gives a profile of that area the
    line's core depth (on a grid of damping widths). Where the optimum is well determined the
    fits end where they did (tests/test_lines_batched.py), in fewer iterations (11.8 -> 10.3 a
    fit on benchmarks/bench_lines.py's 40 pipeline spectra, measured; 7.9 with the bound-crossing
    steps solved again).
    """
    rows = np.flatnonzero((ncomp == 1) & np.array([problems[k][6] > 0 for k in live]))
    if not rows.size:
        return
    lo = np.array([problems[live[r]][0] for r in rows])
    size = x.shape[1]
    pix = np.minimum(lo[:, None] + np.arange(size)[None, :], data.wave.size - 1)
    inside = np.arange(size)[None, :] < np.array([problems[live[r]][1] + 1 for r in rows])[:, None] - lo[:, None]
    dx = np.where(inside, data.dx[pix], 0.0)
    good = wts[rows] > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        ew = (np.where(good, (1.0 - y[rows] / cont[rows]) * dx, 0.0).sum(axis=1)
              * dx.sum(axis=1) / np.where(good, dx, 0.0).sum(axis=1))
    sig, w0 = p[rows, 1], p[rows, 3]
    # the core depth start_and_bounds took (its start is that depth as a Gaussian's area, times 1.2)
    depth = w0 / (1.2 * sig * np.sqrt(2.0 * np.pi))
    grid = sig[:, None] * _DAMPING_GRID[None, :]
    peak = ew[:, None] * voigt_profile(0.0, sig[:, None], grid)
    gamma = grid[np.arange(rows.size), np.abs(peak - depth[:, None]).argmin(axis=1)]
    ok = np.isfinite(ew) & (ew > 0) & (depth > 0)
    rows, gamma, ew = rows[ok], gamma[ok], ew[ok]
    span = ub[rows] - lb[rows]
    for col, value in ((2, gamma), (3, ew)):
        p[rows, col] = np.minimum(np.maximum(value, lb[rows, col] + 1e-6 * span[:, col]), ub[rows, col] - 1e-6 * span[:, col])


def _solve_pair(keep, jtj, diag_eye, held_eye, rhs, lam):
    """The undamped (1e-12) and damped (``lam``) systems of every problem in one solve: ``(gn, step)``.

    np.linalg.solve solves each matrix of a stack on its own, so these are the values of two
    separate calls; where one system is singular, ``step`` is None (then solved alone by
    :func:`_solve`, for the problems that go on) and ``gn`` comes from :func:`_solve`, as before.
    """
    coef = np.empty((2, lam.size, 1, 1))
    coef[0], coef[1, :, 0, 0] = 1e-12, lam
    both = np.where(keep, jtj + coef * diag_eye, 0.0) + held_eye
    try:
        sol = np.linalg.solve(both, rhs[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return _solve(both[0], rhs), None
    return sol[0], sol[1]


def _solve(m, rhs):
    """Solutions of the stacked systems ``m x = rhs`` (least squares where one is singular)."""
    try:
        return np.linalg.solve(m, rhs[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return np.stack([np.linalg.lstsq(mi, ri, rcond=None)[0] for mi, ri in zip(m, rhs)])


class _VoigtModel:
    """Weighted residuals and Jacobian of the Voigt window model, for a set of problems.

    Model (as :func:`specan.lines.profiles.fit_profile`): ``cont (1 - sum_k W_k V(x - c_k - shift;
    sigma, gamma))``; parameters ``(shift, sigma, gamma, W_1..W_n)``; profile and derivatives
    from one Faddeeva evaluation (:func:`specan.lines.profiles.voigt_and_derivatives`).

    The Faddeeva function is most of a fit's cost (~0.12 us a point, against a few ns for the
    rest), so it is evaluated only where it counts: at the real components (not the padding of
    problems with fewer) and the pixels of non-zero weight (not the padding of shorter windows,
    nor masked pixels). Elsewhere profile and derivatives are set to zero: there they are
    multiplied by a zero weight or a zero equivalent width, so residuals and Jacobian are the
    same as with every point evaluated (to rounding: the weighted sums are made in another order).
    """

    def __init__(self, x, y, cont, wts, centres, components):
        self.x, self.y, self.cont, self.wts, self.centres = x, y, cont, wts, centres
        self.components = components
        where = components[:, :, None] & (wts > 0)[:, None, :]     # (b, C, P)
        self.shape = where.shape
        self.at = where.ravel().nonzero()[0]   # the evaluated points, as flat indices
        # each evaluated point's problem, wavelength and component centre, made once: a model
        # evaluation then takes the points' shift, sigma and gamma from their problem's
        # parameters (the same offsets x - (centre + shift) as on the whole grid, at those points)
        b_at, c_at, p_at = np.unravel_index(self.at, where.shape)
        self.problem_at, self.x_at, self.centre_at = b_at, x[b_at, p_at], centres[b_at, c_at]
        self.offset_at = self.at - b_at * (where.shape[1] * where.shape[2])   # the point within its problem
        # the model's constant factors (the continuum times the weights, with the Jacobian's signs)
        self.cw = cont * wts
        self.cw_signs = self.cw[:, :, None] * _JAC_SIGNS
        self.minus_cw = -self.cw[:, None, :]
        # profile and derivatives at every point of the grid; those never evaluated stay zero
        self.parts = np.zeros((4, where.size))

    def rows(self, rows):
        """The model of the problems ``rows`` only (indices in increasing order).

        Their evaluated points picked out of this model's and renumbered, not found again: the same
        points in the same order as a model made of those problems (each time problems leave the
        batch, finding them again was a tenth of the batch's loop, measured)."""
        new = object.__new__(_VoigtModel)
        new.x, new.y, new.cont, new.wts = self.x[rows], self.y[rows], self.cont[rows], self.wts[rows]
        new.centres, new.components = self.centres[rows], self.components[rows]
        per_problem = self.shape[1] * self.shape[2]
        new.shape = (len(rows),) + self.shape[1:]
        renumbered = np.full(self.shape[0], -1)
        renumbered[rows] = np.arange(len(rows))
        new_b = renumbered[self.problem_at]
        keep = new_b >= 0
        new.problem_at, new.offset_at = new_b[keep], self.offset_at[keep]
        new.at = new.problem_at * per_problem + new.offset_at
        new.x_at, new.centre_at = self.x_at[keep], self.centre_at[keep]
        new.cw, new.cw_signs, new.minus_cw = self.cw[rows], self.cw_signs[rows], self.minus_cw[rows]
        new.parts = np.zeros((4, len(rows) * per_problem))
        return new

    def __call__(self, p):
        q = np.take(p[:, :3], self.problem_at, axis=0)   # (the same rows as p[at, :3], gathered in half the time)
        dx = self.x_at - (self.centre_at + q[:, 0])
        # profile and its three derivatives in one array (4, b, C, P) and their sums over the
        # components weighted by the equivalent widths in one call: a model evaluation is a
        # dozen numpy calls on small arrays, their count (not the arithmetic) its cost
        parts = voigt_and_derivatives(dx, q[:, 1], q[:, 2], out=self.parts, at=self.at).reshape((4,) + self.shape)
        sums = np.einsum("bc,kbcp->bpk", p[:, 3:], parts)
        r = (self.cont * (1.0 - sums[:, :, 0]) - self.y) * self.wts
        jac = np.empty((p.shape[0], self.shape[2], p.shape[1]))
        # (the products written into the Jacobian's columns: the same values, no temporaries)
        np.multiply(sums[:, :, 1:], self.cw_signs, out=jac[:, :, :3])
        np.multiply(parts[0], self.minus_cw, out=jac[:, :, 3:].transpose(0, 2, 1))
        return r, jac
