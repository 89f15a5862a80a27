"""The calibration model on plain arrays: relations of the criteria with type and class, and the posterior.

For every criterion, its mean value is a smooth function of type code (O0 = 0 ...
M0 = 60, :mod:`specan.mktypes`) and luminosity class (I..V as 1..5), with a
scatter about that mean, learnt from labelled standards by kernel-weighted local
regression on a grid of codes. A spectrum's criteria give a weighted Student-t
likelihood on the lattice of (code, class), with a free line-strength scale per
half of the spectrum; tempered, it is the posterior the classifier reads.

Nothing here knows about spectra or files: criteria matrices in, arrays out.
A *model* is a dict ``grid`` (G,), ``mean`` (G, J), ``offsets`` (G, J, 2),
``scatter`` (G, J), ``weights`` (J,); the *fine* model is the same on the
classification lattice (:func:`fine_model`), with ``scale_sigma``.
"""

from __future__ import annotations

import numpy as np

from .criteria import SIDES

__all__ = [
    "LUMS",
    "lum_basis",
    "code_grid",
    "fit_relations",
    "fit_two_scale",
    "fit_model",
    "fine_model",
    "class_means",
    "loglike",
    "posterior",
    "posterior_and_split",
    "summarise",
    "fit_quality",
    "split_distance",
]

LUMS = np.arange(1.0, 6.0)   # luminosity classes I..V as numbers
_FINE_STEP = 0.25


def lum_basis(lum):
    """Piecewise-linear basis in luminosity class with a knot at III.

    Column 0 runs V=0, IV=0.5, III=II=I=1 (dwarf to giant), column 1 runs
    III..V=0, II=0.5, I=1 (giant to supergiant), so giants and supergiants can
    differ from dwarfs by different amounts, and the sparsely represented
    classes II and IV sit halfway between their neighbours.
    """
    lum = np.asarray(lum, float)
    return np.stack([np.clip((5.0 - lum) / 2.0, 0.0, 1.0), np.clip((3.0 - lum) / 2.0, 0.0, 1.0)], axis=-1)


def code_grid(code, step):
    """Grid of type codes, ``step`` apart, covering the codes of a set of standards."""
    return np.arange(np.floor(code.min() / step) * step, code.max() + step / 2, step)


# ---------------------------------------------------------------------------
# Fitting
# ---------------------------------------------------------------------------

def fit_relations(X, code, lum, grid, bandwidth, neighbours, ridge, scatter_floor):
    """Kernel-weighted local regression of every criterion on (code, class).

    At each grid code ``g`` the standards get Gaussian weights in code of width
    ``max(bandwidth, distance to the neighbours-th nearest standard)`` (adaptive,
    so sparse parts of a library are not fitted from one star; NaN criteria get
    zero weight), and each criterion is fitted as
    ``a + b (code - g) + c . lum_basis`` by weighted least squares with a ridge
    (relative to the summed weight) on ``b`` and ``c``, so class terms that the
    local standards cannot constrain shrink to zero. Returns the mean ``a``
    (G, J), class offsets ``c`` (G, J, 2), the residual scatter (G, J) and the
    effective number of standards behind each value (G, J).
    """
    n, nj = X.shape
    dist = np.abs(code[None, :] - grid[:, None])                      # (G, n)
    k = min(neighbours, n) - 1
    h = np.maximum(bandwidth, np.partition(dist, k, axis=1)[:, k])    # (G,)
    w = np.exp(-0.5 * (dist / h[:, None]) ** 2)
    ok = np.isfinite(X)
    Xz = np.where(ok, X, 0.0)
    lb = lum_basis(lum)
    A = np.concatenate([np.ones_like(dist)[..., None], (code[None, :] - grid[:, None])[..., None],
                        np.broadcast_to(lb[None], dist.shape + (2,))], axis=-1)  # (G, n, 4)
    W = w[:, :, None] * ok[None, :, :]                                 # (G, n, J)
    AtWA = np.einsum("gnp,gnj,gnq->gjpq", A, W, A)
    pen = np.diag([0.0, ridge[0], ridge[1], ridge[1]])
    sumw = W.sum(axis=1)
    AtWA = AtWA + pen[None, None] * np.maximum(sumw, 1e-9)[:, :, None, None]
    AtWx = np.einsum("gnp,gnj,nj->gjp", A, W, Xz)
    beta = np.linalg.solve(AtWA, AtWx[..., None])[..., 0]              # (G, J, 4)
    resid = Xz[None] - np.einsum("gnp,gjp->gnj", A, beta)
    neff = sumw ** 2 / np.maximum((W ** 2).sum(axis=1), 1e-12)
    var = (resid ** 2 * W).sum(axis=1) / np.maximum(sumw, 1e-12) * neff / np.maximum(neff - 4.0, 1.0)
    scatter = np.sqrt(var + scatter_floor ** 2)
    return beta[..., 0], beta[..., 2:], scatter, neff


def fit_two_scale(X, code, lum, grid, settings):
    """Class offsets from a wide window in type, then the mean relation from a narrow one.

    The luminosity-class terms of a criterion change slowly with type, but a window
    of a few standards (enough for the mean relation) holds one or two giants at
    most, so fitted there they are mostly noise. They are therefore fitted with the
    wider ``class_bandwidth`` / ``class_neighbours`` window; each standard is then
    moved to class V with those offsets and the mean relation and scatter are fitted
    in the narrow window, class terms fixed (an infinite ridge).
    With ``class_bandwidth`` 0 (and in calibrations saved before it existed) the one-window fit.
    """
    cb = settings.get("class_bandwidth")
    if not cb:
        return fit_relations(X, code, lum, grid, settings["bandwidth"], settings["neighbours"],
                             settings["ridge"], settings["scatter_floor"])
    _, offsets, _, _ = fit_relations(X, code, lum, grid, cb, settings["class_neighbours"],
                                     (settings["ridge"][0], settings["class_ridge"]), settings["scatter_floor"])
    at_code = np.stack([np.stack([np.interp(code, grid, offsets[:, j, k]) for k in range(2)], axis=-1)
                        for j in range(X.shape[1])], axis=1)                   # (n, J, 2)
    lb = lum_basis(lum)
    dwarf = X - np.einsum("njk,nk->nj", at_code, lb)
    mean, _, scatter, neff = fit_relations(dwarf, code, lum, grid, settings["bandwidth"], settings["neighbours"],
                                           (settings["ridge"][0], 1e9), settings["scatter_floor"])
    return mean, offsets, scatter, neff


def fit_model(X, code, lum, settings, grid):
    """Relations, scatter and redundancy weights from a criteria matrix (one fit).

    Parameters
    ----------
    X : ndarray, shape (n_standards, n_criteria)
        The standards' criteria (NaN where not measured).
    code, lum : ndarray
        Their type codes and luminosity classes as numbers.
    settings : dict
        :class:`specan.classify.Calibration` settings.
    grid : ndarray
        Type codes to tabulate the relations at (:func:`code_grid`).

    Returns
    -------
    dict
        The model: ``grid``, ``mean``, ``offsets``, ``scatter``, ``neff``, ``weights``.
    """
    mean, offsets, scatter, neff = fit_two_scale(X, code, lum, grid, settings)
    z = _standardised_residuals(X, code, lum, grid, mean, offsets, scatter)
    weights = _redundancy_weights(z, settings["redundancy_power"])
    return {"grid": grid, "mean": mean, "offsets": offsets, "scatter": scatter, "neff": neff,
            "weights": weights}


def _standardised_residuals(X, code, lum, grid, mean, offsets, scatter):
    """Residuals of the standards about the model at their own type and class, in scatters (NaN -> 0)."""
    gi = np.clip(np.round((code - grid[0]) / (grid[1] - grid[0])).astype(int), 0, len(grid) - 1)
    model = mean[gi] + np.einsum("njk,nk->nj", offsets[gi], lum_basis(lum))
    z = (X - model) / scatter[gi]
    return np.where(np.isfinite(z), z, 0.0)


def _redundancy_weights(z, power):
    """Weight per criterion from the correlations of the standardised residuals ``z``.

    A criterion correlated with many others (e.g. four measures of one Balmer line) would
    otherwise count several times: weight 1 / (sum of squared correlations)^power.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        R = np.corrcoef(z.T)
    R = np.where(np.isfinite(R), R, 0.0)
    np.fill_diagonal(R, 1.0)
    return 1.0 / np.sum(R ** 2, axis=1) ** power


def _interp_rows(fine_grid, grid, a):
    """``a`` (tabulated along its first axis on ``grid``) interpolated onto ``fine_grid``."""
    flat = a.reshape(len(grid), -1)
    out = np.empty((len(fine_grid), flat.shape[1]))
    for j in range(flat.shape[1]):
        out[:, j] = np.interp(fine_grid, grid, flat[:, j])
    return out.reshape((len(fine_grid),) + a.shape[1:])


def fine_model(model, scale_sigma=0.0):
    """The model interpolated onto a finer grid of codes (the classification lattice)."""
    g = model["grid"]
    fg = np.arange(g[0], g[-1] + 1e-9, _FINE_STEP)
    fine = {"grid": fg, "mean": _interp_rows(fg, g, model["mean"]),
            "offsets": _interp_rows(fg, g, model["offsets"]), "scatter": _interp_rows(fg, g, model["scatter"]),
            "weights": model["weights"], "scale_sigma": scale_sigma}
    # every criterion's mean at every (code, class), once: class_means of a subset of the criteria
    # is this array's columns, to the bit (the einsum is elementwise in the criteria)
    fine["class_means"] = class_means(fine["mean"], fine["offsets"], np.ones(fine["mean"].shape[1], bool))
    return fine


# ---------------------------------------------------------------------------
# Likelihood and posterior on the (code, class) lattice
# ---------------------------------------------------------------------------

def class_means(mean, offsets, ok):
    """Model value of the criteria ``ok`` at every (grid code, class): (G, 5, J)."""
    return mean[:, None, ok] + np.einsum("gjk,lk->glj", offsets[:, ok], lum_basis(LUMS))


def _scale_line_strengths_per_side(xo, m, s, weights, side, scale_sigma):
    """Multiply the model ``m`` in place by the best line-strength scale per half; each half's prior penalty.

    ``k`` is the weighted least-squares value at each lattice point, with a Gaussian
    prior ``k ~ 1 +- scale_sigma``, clipped to 0.25-4. Returns {side: penalty (G, 5)}.
    """
    penalties = {}
    a = weights / s ** 2
    prior = 1.0 / scale_sigma ** 2
    for sd in (-1, 0, 1):
        sel = side == sd
        if not sel.any():
            continue
        # the side's part of the lattice copied out once for both sums and the scaling, then put back:
        # the values three selections per side gave, to the bit (tests/test_classify.py)
        ms, asel = m[..., sel], a[..., sel]
        num = np.sum(asel * xo[sel] * ms, axis=-1) + prior
        den = np.sum(asel * ms ** 2, axis=-1) + prior
        k = np.clip(num / den, 0.25, 4.0)
        ms *= k[..., None]
        m[..., sel] = ms
        penalties[sd] = 0.5 * (k - 1.0) ** 2 * prior
    return penalties


def _lattice_terms(x, noise, mean, offsets, scatter, weights, dof, ok, scale_sigma, means=None):
    """Each criterion's weighted term of :func:`loglike`, the z^2, and each half's scale penalty.

    Returns ``(wterm (G, 5, J_ok), z2 (G, 5, J_ok), penalties {side: (G, 5)})``; ``means`` is
    :func:`class_means` of all the criteria when already at hand.
    """
    m = class_means(mean, offsets, ok) if means is None else means[..., ok]
    s = np.sqrt(scatter[:, None, ok] ** 2 + noise[ok] ** 2)
    xo = x[ok]
    penalties = {}
    if scale_sigma > 0:
        penalties = _scale_line_strengths_per_side(xo, m, s, weights[ok], SIDES[ok], scale_sigma)
    # in place where the values allow it (the same numbers: each step is the one written out before,
    # ((xo - m) / s) ** 2 and weights * (0.5 (dof + 1) log1p(z2 / dof) + log s)), fewer fresh arrays
    z2 = np.subtract(xo, m)
    z2 /= s
    np.square(z2, out=z2)
    term = z2 / dof
    np.log1p(term, out=term)
    term *= 0.5 * (dof + 1.0)
    term += np.log(s)
    term *= weights[ok]
    return term, z2, penalties


def _summed(wterm, penalties):
    """Log-likelihood from :func:`_lattice_terms` (penalties added in the order loglike adds them)."""
    penalty = 0.0
    for sd in (-1, 0, 1):
        if sd in penalties:
            penalty = penalty + penalties[sd]
    return -np.sum(wterm, axis=-1) - penalty


def loglike(x, noise, mean, offsets, scatter, weights, dof, ok=None, scale_sigma=0.0):
    """Weighted Student-t log-likelihood of criteria ``x`` on the (grid code, class) lattice.

    A Student-t (``dof`` degrees of freedom) rather than a Gaussian, so one
    criterion hit by a defect, an emission line or a peculiarity costs a bounded
    penalty instead of deciding the type. ``weights`` down-weight criteria that
    repeat the information of others (see :func:`fit_model`).
    The measurement noise adds in quadrature to the standards' scatter.

    With ``scale_sigma > 0`` the model's criteria are multiplied by a free
    line-strength scale ``k`` per half of the spectrum (blue of, red of and
    across :data:`specan.classify.criteria.SPLIT_WAVELENGTH`), with a Gaussian prior
    ``k ~ 1 +- scale_sigma``: spectrographs differ in scattered light and line spread
    wings, which dilute or deepen all features of a region together; only the *pattern*
    of the criteria (their ratios, as the MK criteria are defined) then decides the
    type. ``k`` is the weighted least-squares value at each lattice point.

    Returns
    -------
    ll, z2 : ndarray
        Log-likelihood (G, 5) and squared standardised residuals (G, 5, J_ok).
    """
    if ok is None:
        ok = np.isfinite(x)
    wterm, z2, penalties = _lattice_terms(x, noise, mean, offsets, scatter, weights, dof, ok, scale_sigma)
    return _summed(wterm, penalties), z2


def _normalised(ll, tau):
    p = np.exp((ll - ll.max()) / tau)
    p /= p.sum()
    return p


def posterior(x, noise, fine, dof, tau, ok=None):
    """Posterior over (code, class), its marginals and the lattice log-likelihood.

    Parameters
    ----------
    x, noise : ndarray
        Criteria and their 1-sigma noise (in :func:`criteria_names` order).
    fine : dict
        Model on the classification lattice (:func:`fine_model`).
    dof : float
        Degrees of freedom of the Student-t likelihood.
    tau : float
        Likelihood temperature (the posterior is ``exp(ll / tau)``, normalised).
    ok : ndarray of bool, optional
        The criteria to use (default: the finite ones).

    Returns
    -------
    p, ll, z2 : ndarray
        Posterior (G, 5), log-likelihood (G, 5), squared standardised residuals.
    """
    if ok is None:
        ok = np.isfinite(x)
    wterm, z2, penalties = _lattice_terms(x, noise, fine["mean"], fine["offsets"], fine["scatter"], fine["weights"],
                                          dof, ok, fine.get("scale_sigma", 0.0), fine.get("class_means"))
    ll = _summed(wterm, penalties)
    return _normalised(ll, tau), ll, z2


def posterior_and_split(x, noise, fine, dof, tau):
    """:func:`posterior` of all the finite criteria and :func:`split_distance`, from one lattice pass.

    Each half's likelihood is made of the same per-criterion terms as the whole's (the
    line-strength scale is fitted per half in both), so it is taken from them: the same
    numbers as the separate calls give, to the bit (tests/test_classify.py), for a third of
    the work.

    Returns
    -------
    p, ll, z2, split
    """
    ok = np.isfinite(x)
    wterm, z2, penalties = _lattice_terms(x, noise, fine["mean"], fine["offsets"], fine["scatter"], fine["weights"],
                                          dof, ok, fine.get("scale_sigma", 0.0), fine.get("class_means"))
    ll = _summed(wterm, penalties)
    sides = SIDES[ok]
    codes = []
    for side in (-1, 1):
        if not _half_is_whole_enough(x, side):
            codes.append(None)
            continue
        half = sides == side
        ll_half = _summed(wterm[..., half], {side: penalties[side]} if side in penalties else {})
        codes.append(summarise(_normalised(ll_half, tau), fine["grid"])[0])
    split = None if None in codes else abs(codes[0] - codes[1])
    return _normalised(ll, tau), ll, z2, split


def _half_is_whole_enough(x, side):
    ok = np.isfinite(x) & (SIDES == side)
    return ok.sum() >= max(5, 0.5 * np.sum(SIDES == side))


def summarise(p, grid):
    """Most probable code, half the 16-84% interval, class probabilities.

    The mode of the marginal code posterior, not its median: when the criteria
    allow two types (an A supergiant and an F dwarf share Balmer strengths),
    the median lands between them, on a type neither supports (in
    cross-validation on the reference library the mode was right within two
    subclasses 4-8% more often).
    """
    pc = p.sum(axis=1)
    cdf = np.cumsum(pc) - 0.5 * pc
    q16, q84 = np.interp([0.16, 0.84], cdf, grid)
    return float(grid[np.argmax(pc)]), float(0.5 * (q84 - q16)), p.sum(axis=0)


def fit_quality(z2, weights, ok, gi, li):
    """Weighted mean squared standardised residual at one lattice point (1 ~ a typical standard)."""
    w = weights[ok]
    return float(np.sum(w * z2[gi, li]) / np.sum(w))


def split_distance(x, noise, fine, dof, tau):
    """|code from blue criteria - code from red criteria| (None if either half is too thin).

    Each half needs at least half of its criteria: the threshold comes from standards with
    both halves whole, and a half reduced to a few criteria gives a far noisier type (an A1 V
    star cut to 3900-5100 A, the classic MK range, has 7 of the 21 red criteria and was
    flagged composite, measured).
    """
    codes = []
    for side in (-1, 1):
        if not _half_is_whole_enough(x, side):
            return None
        p, _, _ = posterior(x, noise, fine, dof, tau, np.isfinite(x) & (SIDES == side))
        codes.append(summarise(p, fine["grid"])[0])
    return abs(codes[0] - codes[1])
