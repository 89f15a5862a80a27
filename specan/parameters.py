"""Atmospheric parameters from the spectrum: Teff, log g and [Fe/H] with uncertainties.

Method: a data-driven spectral model learnt from the MILES library's observed stars and their
published parameters (Cenarro et al. 2007; Prugniel et al. 2011): at every pixel the
continuum-normalised flux is a quadratic function of the scaled labels (log Teff, log g, [Fe/H])
(the generative, quadratic-in-labels model of Ness et al. 2015, ApJ 808, 16), plus an intrinsic
scatter per pixel. One such model is fitted around each of a ladder of temperature nodes, its
training stars weighted by a Gaussian in log Teff about the node (a local, piecewise model: one
quadratic cannot follow the spectra from M to B stars). A star's labels are those whose model
spectrum, times a low-order polynomial (what is left of continuum and response differences),
fits it best in chi-square, with the model of the node nearest the answer.

Inputs are brought to the model's footing exactly as the library was: shifted to rest, air
wavelengths, smoothed to the model's resolution (:data:`MODEL_FWHM`), resampled onto the model's
pixels and continuum-normalised by :func:`specan.prepare.prepare`.

Uncertainties: the fit's own (from its Jacobian, scaled by the reduced chi-square when above 1)
combined in quadrature with the model's cross-validated scatter at that node (stored in the
model file by ``scripts/fit_parameter_model.py``): the part of the error that comes from the
model and the library's labels, which no noise estimate sees.
"""

from __future__ import annotations

import functools
import math
from importlib import resources
from pathlib import Path
from typing import NamedTuple

import astropy.units as u
import numpy as np
from scipy.optimize import leastsq

from .contents import content_key, forgettable, kept
from .errors import AnalysisError
from .obsinfo import get_info
from .resolution import on_rest_grid
from .threads import in_one_thread, single_threaded

__all__ = ["MODEL_FILE", "MODEL_FWHM", "LABELS", "model_wavelengths", "scale_labels", "broader_than_model",
           "ModelInput", "on_model_grid", "ParameterModel",
           "default_model", "fit_labels", "measure"]

#: The packaged model (``scripts/fit_parameter_model.py`` regenerates it).
MODEL_FILE = "parameters_miles.fits"
#: Resolution of the model (FWHM, Angstrom): the library's 2.5 A degraded to what most spectra reach.
MODEL_FWHM = 4.5
#: Model pixels: air wavelengths, 2.5 pixels per FWHM, over the library's range less its ends.
WAVE_RANGE = (3700.0, 7350.0)
PIXEL = MODEL_FWHM / 2.5
LABELS = ("teff", "logg", "feh")
#: Label scaling (x - centre) / width, so that quadratic terms are of order one.
SCALE_CENTRE = np.array([3.7, 3.5, -0.3])     # log10 Teff, log g, [Fe/H]
SCALE_WIDTH = np.array([0.1, 1.0, 0.5])
#: Degree of the multiplicative polynomial fitted with the labels (continuum residuals).
POLY_DEGREE = 3


def model_wavelengths():
    """Air wavelengths (Angstrom) of the model's pixels."""
    return np.arange(WAVE_RANGE[0], WAVE_RANGE[1] + PIXEL / 2, PIXEL)


def scale_labels(labels):
    """Scaled labels from (Teff K, log g, [Fe/H]) rows."""
    labels = np.atleast_2d(np.asarray(labels, float))
    raw = np.column_stack([np.log10(labels[:, 0]), labels[:, 1], labels[:, 2]])
    return (raw - SCALE_CENTRE) / SCALE_WIDTH


def _unscale(scaled):
    raw = np.asarray(scaled, float) * SCALE_WIDTH + SCALE_CENTRE
    return np.array([10.0 ** raw[0], raw[1], raw[2]])


def _design(scaled):
    """Quadratic design matrix: 1, t, g, f, t^2, g^2, f^2, tg, tf, gf for each row of scaled labels."""
    x = np.atleast_2d(scaled)
    t, g, f = x[:, 0], x[:, 1], x[:, 2]
    return np.column_stack([np.ones_like(t), t, g, f, t * t, g * g, f * f, t * g, t * f, g * f])


# ---------------------------------------------------------------------------
# A spectrum on the model's footing
# ---------------------------------------------------------------------------
class ModelInput(NamedTuple):
    """A spectrum on the model's pixels: normalised flux, usable pixels, and whether it is broader."""

    flux: np.ndarray
    good: np.ndarray
    broader: bool


def broader_than_model(wave, fwhm_in):
    """True when a spectrum's FWHM (A, scalar or per pixel) exceeds the model's over its wavelengths.

    The model's errors were measured on spectra at its resolution; broader spectra lose the
    detail it relies on (the JHC copies at ~13 A gave worse luminosity groups with their log g
    than without it: 62% against 67% of B-K stars, measured), so their parameters are not used
    to weigh the luminosity classes.
    """
    return float(np.median(np.broadcast_to(fwhm_in, np.shape(wave)))) > MODEL_FWHM * 1.1


def on_model_grid(spectrum, rv=None, fwhm_in=None, notes=None, resolving_power=None, pixels=None):
    """Rest-frame, air, model-resolution, continuum-normalised flux on the model pixels.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        As read (normalised or not).
    rv : astropy.units.Quantity, optional
        The spectrum's velocity (topocentric, as seen in the data); None: taken as at rest.
    fwhm_in : float, optional
        The spectrum's FWHM in Angstrom; default lambda / R (``resolving_power``, else its
        metadata's), else 2.5 pixels.
    notes : list, optional
        Receives a sentence per assumption.
    resolving_power : float, optional
        The spectrum's R when its metadata do not state it (e.g. estimated by another stage).
    pixels : specan.resolution.RestPixels, optional
        ``rest_pixels(spectrum, rv)`` when the caller has made it already.

    Returns
    -------
    ModelInput
        ``flux`` and ``good`` on :func:`model_wavelengths` (``good`` False outside the spectrum
        and on masked pixels); ``broader`` when the spectrum is broader than the model.
    """
    from .prepare import normalise_arrays

    notes = notes if notes is not None else []
    grid = model_wavelengths()
    rest = on_rest_grid(spectrum, grid, MODEL_FWHM, rv=rv, fwhm_in=fwhm_in, resolving_power=resolving_power,
                        what="the parameter model's 3700-7350 A", pixels=pixels)
    if rest.fwhm_assumed:
        notes.append("resolving power unknown: taken as 2.5 pixels per FWHM for the parameters")
    broader = broader_than_model(rest.wave, rest.fwhm_in)
    if broader:
        notes.append(f"spectrum broader than the parameter model's {MODEL_FWHM:g} A FWHM: parameters less certain "
                     "than their errors say")
    on, ok = rest.flux, rest.ok
    if ok.sum() < 50:
        raise AnalysisError("too few usable pixels on the parameter model's wavelengths", get_info(spectrum).path)
    positive = np.where(ok & (on > 0), on, np.nan)
    # prepare()'s normalisation without its S/N and Spectrum objects: the same flux to the bit
    # (tests/test_parameters.py), which the shipped model was trained on
    out, bad = normalise_arrays(grid, np.nan_to_num(positive, nan=1.0), ~np.isfinite(positive), telluric=False)
    return ModelInput(out, ok & np.isfinite(out) & ~bad, broader)


# ---------------------------------------------------------------------------
# The model
# ---------------------------------------------------------------------------
class ParameterModel:
    """Piecewise quadratic-in-labels spectral model on :func:`model_wavelengths`.

    Attributes
    ----------
    nodes : ndarray (k,)
        log10 Teff of the node models.
    coef : ndarray (k, 10, n)
        Quadratic coefficients of each node's model at each pixel.
    scatter : ndarray (k, n)
        Intrinsic scatter (flux units) of each node's model at each pixel.
    cv_sd : ndarray (k, 3)
        Cross-validated scatter of Teff (fraction), log g (dex), [Fe/H] (dex) at each node.
    source : str
        What the model was fitted on.
    """

    def __init__(self, nodes, coef, scatter, cv_sd, source=""):
        self.nodes = np.asarray(nodes, float)
        self.coef = np.asarray(coef, float)
        self.scatter = np.asarray(scatter, float)
        self.cv_sd = np.asarray(cv_sd, float)
        self.source = source

    @classmethod
    def fit(cls, flux, labels, nodes, width=1.0, source="", clip=4.0):
        """Fit node models to normalised library fluxes (rows, NaN = unusable) and their labels.

        ``width`` is the Gaussian weight's sigma in node spacings. Stars whose mean squared
        residual exceeds ``clip`` times the model scatter are left out of a second pass
        (label or spectrum outliers).
        """
        flux = np.asarray(flux, float)
        x = scale_labels(labels)
        lt = np.log10(np.asarray(labels, float)[:, 0])
        nodes = np.asarray(nodes, float)
        spacing = np.gradient(nodes)
        coefs, scatters = [], []
        for node, sp in zip(nodes, spacing):
            w = np.exp(-0.5 * ((lt - node) / (width * sp)) ** 2)
            coef, s2 = _weighted_fit(x, flux, w, clip)
            coefs.append(coef)
            scatters.append(np.sqrt(s2))
        return cls(nodes, np.array(coefs), np.array(scatters), np.zeros((len(nodes), 3)), source)

    @functools.cached_property
    def typical_scatter(self):
        """Median over the nodes of the model scatter at each pixel (computed once per model)."""
        return np.nanmedian(self.scatter, axis=0)

    def predict(self, k, scaled):
        """Model flux of node ``k`` at scaled labels (one row)."""
        return _design(scaled)[0] @ self.coef[k]

    def nearest(self, scaled):
        """Index of the node nearest a scaled label row's temperature."""
        lt = scaled[0] * SCALE_WIDTH[0] + SCALE_CENTRE[0]
        return int(np.argmin(np.abs(self.nodes - lt)))

    def save(self, path):
        """Write the model as a FITS file (coefficients, scatter, nodes, CV scatter, provenance)."""
        from astropy.io import fits

        primary = fits.PrimaryHDU(self.coef.astype(np.float32))
        h = primary.header
        h["CTYPE1"], h["CUNIT1"], h["CRPIX1"], h["CRVAL1"], h["CDELT1"] = "AWAV", "Angstrom", 1.0, WAVE_RANGE[0], PIXEL
        h["FWHM"] = (MODEL_FWHM, "model resolution, Angstrom")
        h["POLYDEG"] = POLY_DEGREE
        for k, part in enumerate(_chunks(self.source)):
            h[f"SOURCE{k}"] = part
        hdus = [primary, fits.ImageHDU(self.scatter.astype(np.float32), name="SCATTER"),
                fits.ImageHDU(self.nodes, name="NODES"), fits.ImageHDU(self.cv_sd, name="CVSD")]
        fits.HDUList(hdus).writeto(path, overwrite=True)

    @classmethod
    def load(cls, path=None):
        """Read a model written by :meth:`save` (default: the packaged one)."""
        from astropy.io import fits

        if path is None:
            with resources.as_file(resources.files("specan.data") / MODEL_FILE) as p:
                return cls.load(p)
        with fits.open(Path(path)) as hdus:
            h = hdus[0].header
            if abs(h["FWHM"] - MODEL_FWHM) > 1e-6 or abs(h["CDELT1"] - PIXEL) > 1e-9:
                raise AnalysisError(f"parameter model {path} was made for other pixels or resolution")
            source = "".join(str(h[k]) for k in h if k.startswith("SOURCE"))
            return cls(hdus["NODES"].data, hdus[0].data, hdus["SCATTER"].data, hdus["CVSD"].data, source)


def _chunks(text, size=68):
    return [text[i:i + size] for i in range(0, len(text), size)] or [""]


def _weighted_fit(x, flux, w, clip):
    """Per-pixel weighted least squares of flux on the quadratic design, two passes (outliers out)."""
    A = _design(x)
    usable = np.isfinite(flux)
    y = np.where(usable, flux, 0.0)
    for _ in range(2):
        coef = np.empty((A.shape[1], flux.shape[1]))
        # one normal-equation solve per pixel with the pixel's own usable stars (vectorised by
        # stacking: the Gram matrices differ only where stars have unusable pixels)
        W = w[:, None] * usable
        G = np.einsum("si,sj,sp->pij", A, A, W)
        b = np.einsum("si,sp->pi", A, W * y)
        coef = np.linalg.solve(G + 1e-9 * np.eye(A.shape[1]), b[..., None])[..., 0].T
        resid = np.where(usable, y - A @ coef, 0.0)
        s2 = np.maximum((W * resid ** 2).sum(0) / np.maximum(W.sum(0), 1e-12), 1e-8)
        chi = (resid ** 2 / s2 * usable).sum(1) / np.maximum(usable.sum(1), 1)
        w = w * (chi < clip)
    return coef, s2


@forgettable
@functools.lru_cache(maxsize=1)
def default_model():
    """The packaged :class:`ParameterModel` (cached)."""
    return ParameterModel.load()


# ---------------------------------------------------------------------------
# Fitting labels
# ---------------------------------------------------------------------------
@functools.lru_cache(maxsize=4)   # the same n for every spectrum; read only (callers index it, making copies)
def _poly_basis(n):
    x = np.linspace(-1.0, 1.0, n)
    basis = np.polynomial.legendre.legvander(x, POLY_DEGREE)
    basis.flags.writeable = False
    return basis


def _residuals(model, k, scaled, y, good, sigma, basis):
    """Residuals (in sigma) of y against model x best multiplicative polynomial (solved linearly)."""
    m = model.predict(k, scaled)
    B = basis[good] * m[good, None]
    wts = 1.0 / sigma[good]
    c, *_ = np.linalg.lstsq(B * wts[:, None], y[good] * wts, rcond=None)
    return (y[good] - B @ c) * wts


def _design_and_gradient(scaled):
    """:func:`_design`'s row at one point and its derivatives with respect to t, g and f: (4, 10)."""
    t, g, f = (float(v) for v in scaled)
    return np.array([[1.0, t, g, f, t * t, g * g, f * f, t * g, t * f, g * f],
                     [0.0, 1.0, 0.0, 0.0, 2.0 * t, 0.0, 0.0, g, f, 0.0],
                     [0.0, 0.0, 1.0, 0.0, 0.0, 2.0 * g, 0.0, t, 0.0, f],
                     [0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 2.0 * f, 0.0, t, g]])


class _ProjectedResiduals:
    """:func:`_residuals` of one node's model and their exact Jacobian, for the LM fit of the labels.

    The polynomial's coefficients are linear and solved at every step, so the residuals are
    r(p) = P_perp(p) z with A(p) = W diag(m(p)) basis, z = W y and P_perp = I - A A^+ (variable
    projection, Golub & Pereyra 1973, SIAM J. Numer. Anal. 10, 413). Their Jacobian is exact:
    dr/dp_j = -P_perp dA_j c - (A^+)^T dA_j^T r, with dA_j from the model's derivative, which is
    analytic (the model is quadratic in the labels). A numerical Jacobian cost three residual
    evaluations per LM step (~40 per fit, about half of a classification's parameter time, measured).
    One (4, 10) x (10, n) product gives the model and its three derivatives; the polynomial's
    4 x 4 normal matrix G = A^T A gives c = G^-1 A^T z, P_perp u = u - A G^-1 A^T u and
    (A^+)^T v = A G^-1 v (a thin QR of A did the same at twice the cost per LM step; squaring the
    conditioning costs nothing here: cond(A) is 6-7.5 at every step of the fits of the Kurucz Sun and
    75 MILES stars, and the labels are the QR's to 7e-13 of their errors, measured). The
    Jacobian is only formed when asked for (LM evaluates rejected trial steps' residuals only).
    """

    def __init__(self, model, k, y, good, sigma, basis):
        if good.all():   # every pixel: the arrays themselves, not copies of them (the same numbers)
            self.coef, sigma, y, b = model.coef[k], sigma, y, basis
        else:
            self.coef, sigma, y, b = model.coef[k][:, good], sigma[good], y[good], basis[good]
        w = 1.0 / sigma
        self.z = y * w
        # pixels along rows: every product below runs along contiguous rows of length n
        self.wbasis_t = np.ascontiguousarray((b * w[:, None]).T)    # (4, n)
        self._x = None

    def _at(self, scaled):
        if self._x is not None and np.array_equal(scaled, self._x):
            return
        rows = _design_and_gradient(scaled) @ self.coef    # m, dm/dt, dm/dg, dm/df
        A_t = self.wbasis_t * rows[0]                       # A^T, (4, n)
        G_inv = np.linalg.inv(A_t @ A_t.T)
        c = G_inv @ (A_t @ self.z)
        self._x, self._r, self._jac = np.array(scaled, float), self.z - c @ A_t, None
        self._parts = rows[1:], A_t, G_inv, c

    def residuals(self, scaled):
        self._at(scaled)
        return self._r

    def jacobian_rows(self, scaled):
        """The Jacobian transposed, (3, n): one row per label (what LM takes with ``col_deriv``)."""
        self._at(scaled)
        if self._jac is None:
            dm, A_t, G_inv, c = self._parts
            r = self._r
            dAc = dm * (c @ self.wbasis_t)                                        # dA_j c, (3, n)
            first = dAc - ((dAc @ A_t.T) @ G_inv) @ A_t                           # P_perp dA_j c
            second = (G_inv @ (self.wbasis_t @ (dm * r).T)).T @ A_t               # (A^+)^T dA_j^T r, (3, n)
            self._jac = -(first + second)
        return self._jac

    def jacobian(self, scaled):
        """The Jacobian of :meth:`residuals`, (n, 3)."""
        return self.jacobian_rows(scaled).T


_POLY_TERMS = POLY_DEGREE + 1

#: How many pixel masks' matrices are kept per model (in its ``__dict__``): the first guess's normal matrices
#: (61 kB a mask for the packaged model) and each node's Cholesky factor on the mask (13 kB a node and mask).
MASKS_KEPT = 16
NODE_MASKS_KEPT = 64


def _span_factor(model, k, basis, good):
    """The Cholesky factor L of M = Q_g^T Q_g, Q_g node ``k``'s span (:func:`_node_span`) on the ``good`` pixels.

    What :class:`_ReducedResiduals` needs of a pixel mask beyond Q's rows; it depends on the model, the
    node and the mask only, and a night's spectra of one set-up share a few masks (the telluric bands and
    the grid's ends, moved by the velocity: 30 spectra of the benchmark night had 6 masks), so it is kept
    for the last :data:`NODE_MASKS_KEPT` (node, mask) pairs, made with one thread (:func:`specan.threads.in_one_thread`): the
    numbers the night run's one-thread workers made for every spectrum.
    Raises numpy.linalg.LinAlgError where the mask leaves the span ill-conditioned (then not kept).
    """
    def make():
        Q, _ = _node_span(model, k, basis)
        bad = ~good
        # M = I - Q_b^T Q_b when few pixels are out (the sums over all pixels are the identity)
        M = (np.eye(Q.shape[1]) - Q[bad].T @ Q[bad]) if bad.sum() <= good.sum() else Q[good].T @ Q[good]
        L = np.linalg.cholesky(M)
        # condition of M below 1e8 (our choice): the reduced residuals then hold 1e-8 of the data's
        # precision at worst, far below what a fit's errors feel
        if np.min(np.diag(L)) ** 2 < 1e-8 * np.max(np.diag(L)) ** 2:
            raise np.linalg.LinAlgError("usable pixels leave the model's span ill-conditioned")
        return L

    store = model.__dict__.setdefault("_span_factors", {})
    return kept(store, (int(k), basis.shape, content_key(good)), in_one_thread(make), NODE_MASKS_KEPT)


def _node_span(model, k, basis):
    """An orthonormal basis Q (n, 40) of node ``k``'s weighted model columns and their coordinates R in it.

    The columns are ``w coef_i basis_l`` (w = 1 / the node's scatter, i the design's ten terms, l the
    polynomial's four), so the model times any polynomial, and its derivatives, at any labels are
    ``Q R (D(p) x c)``: the residuals and Jacobian of :class:`_ProjectedResiduals` live in a 41-dimensional
    space (these 40 columns and the data). They depend on the model only: made once per node and
    pixel count (a thin Householder QR, LAPACK; 0.65 MB a node) under one thread (the same bits whoever
    makes them, specan.threads) and kept on the model. Returns ``(Q, R)`` with R laid out (10, 40 * 4): the
    design's terms along the rows, for one product with a design row and its gradient.
    """
    cache = model.__dict__.setdefault("_node_spans", {})
    key = (int(k), basis.shape)
    hit = cache.get(key)
    if hit is None:
        w = 1.0 / model.scatter[k]
        columns = (w[:, None, None] * model.coef[k].T[:, :, None] * basis[:, None, :]).reshape(basis.shape[0], -1)
        with single_threaded():
            Q, R = np.linalg.qr(columns)
        Q = np.ascontiguousarray(Q)
        R = np.ascontiguousarray(R.reshape(R.shape[0], model.coef.shape[1], basis.shape[1]).transpose(1, 0, 2)
                                 .reshape(model.coef.shape[1], -1))
        Q.flags.writeable = R.flags.writeable = False
        hit = cache[key] = (Q, R)
    return hit


class _ReducedResiduals:
    """:class:`_ProjectedResiduals` with the model's own scatter as the noise, in 41 numbers instead of n.

    The weighted model times the polynomial is ``A(p) = Q_g A_red(p)`` (:func:`_node_span`; Q_g its rows at
    the usable pixels, ``A_red = sum_i D_i(p) R_i``), so with ``M = Q_g^T Q_g = L L^T`` the data are
    ``z = Q_g a + e``, e orthogonal to every such column, and every residual vector of the fit is
    ``Q_g (a - A_red c) + e``: of length ``|L^T (a - A_red c)|^2 + |e|^2``. Its reduced form
    ``[u - L^T A_red c, |e|]`` (u = L^T a) has the same length, and its Jacobian ``[L^T dr_red/dp, 0]`` the
    same J^T J and J^T r, at every p: Levenberg-Marquardt takes the same steps (it uses nothing else,
    Moré 1978, from memory), the same labels and errors to rounding (tests/test_parameters.py, against the
    full residuals). Each evaluation costs products of 40 x 4 matrices instead of the model over every pixel,
    and MINPACK's QR of the Jacobian 41 rows instead of n (the fit of the Kurucz Sun: 1.2-1.4 ms against
    1.9, measured, the first guess unchanged). With every pixel usable M is the identity (L = I).

    Raises numpy.linalg.LinAlgError where the usable pixels leave the columns' span ill-conditioned
    (the caller then takes the full residuals).
    """

    def __init__(self, model, k, y, good, basis):
        Q, self.R = _node_span(model, k, basis)
        w = 1.0 / model.scatter[k]
        if good.all():
            Qg, z, self.Lt = Q, y * w, None
            a = u = Q.T @ z
        else:
            L = _span_factor(model, k, basis, good)
            Qg, z = Q[good], y[good] * w[good]
            from scipy.linalg import solve_triangular

            u = solve_triangular(L, Qg.T @ z, lower=True)
            a = solve_triangular(L.T, u, lower=False)
            self.Lt = L.T
        self.z = u
        self.rest = float(np.linalg.norm(z - Qg @ a))    # |e|, what no labels or polynomial can fit
        self._x = None

    def _at(self, scaled):
        # LM asks for the residuals and then the Jacobian at the same labels: made once (compared as
        # np.array_equal does, without its wrapping: the fit evaluates ~40 times a star)
        if self._x is not None and self._x.shape == np.shape(scaled) and bool((self._x == scaled).all()):
            return
        # A_red and its three derivatives, (4, 40, 4): the design's row and gradient through R
        parts = (_design_and_gradient(scaled) @ self.R).reshape(4, -1, _POLY_TERMS)
        if self.Lt is not None:
            parts = self.Lt @ parts
        A, dA = parts[0], parts[1:]
        G_inv = np.linalg.inv(A.T @ A)
        c = G_inv @ (A.T @ self.z)
        # the residuals written straight into the vector LM gets, |e| last (np.append's numbers, no copy)
        full = np.empty(self.z.size + 1)
        r = np.subtract(self.z, A @ c, out=full[:-1])
        full[-1] = self.rest
        self._x, self._r, self._jac = np.array(scaled, float), full, None
        self._parts = dA, A, G_inv, c, r

    def residuals(self, scaled):
        self._at(scaled)
        return self._r

    def jacobian_rows(self, scaled):
        """The Jacobian transposed, (3, 41); the last residual (|e|) does not depend on the labels."""
        self._at(scaled)
        if self._jac is None:
            dA, A, G_inv, c, r = self._parts
            dAc = dA @ c                                                    # dA_j c, (3, 40)
            first = dAc - ((dAc @ A) @ G_inv) @ A.T                         # P_perp dA_j c
            second = (G_inv @ (np.swapaxes(dA, 1, 2) @ r).T).T @ A.T        # (A^+)^T dA_j^T r
            jac = np.zeros((3, r.size + 1))
            jac[:, :-1] = -(first + second)
            self._jac = jac
        return self._jac

    def jacobian(self, scaled):
        """The Jacobian of :meth:`residuals`, (41, 3)."""
        return self.jacobian_rows(scaled).T


#: The first guess's coarse grid in scaled labels, beside each node's temperature.
_GUESS_G = np.linspace(-2.5, 1.3, 8)    # log g 1.0 ... 4.8
_GUESS_F = np.linspace(-2.4, 1.0, 5)    # [Fe/H] -1.5 ... +0.2


#: The first guess's model at one node, t fixed: m = E(g, f) . F, with E = (1, g, f, g^2, f^2, gf) and
#: F = _NODE_TERMS(t) . coef (the design's ten terms gathered into six); and the pairs (i <= j) of E's terms.
_PAIRS = np.triu_indices(6)
_PAIR_MULT = np.where(_PAIRS[0] == _PAIRS[1], 1.0, 2.0)


def _node_terms(t):
    """(6, 10) map from the design's coefficients to those of E = (1, g, f, g^2, f^2, gf) at fixed t."""
    return np.array([[1.0, t, 0, 0, t * t, 0, 0, 0, 0, 0],    # 1, t, t^2
                     [0, 0, 1.0, 0, 0, 0, 0, t, 0, 0],        # g, tg
                     [0, 0, 0, 1.0, 0, 0, 0, 0, t, 0],        # f, tf
                     [0, 0, 0, 0, 0, 1.0, 0, 0, 0, 0],        # g^2
                     [0, 0, 0, 0, 0, 0, 1.0, 0, 0, 0],        # f^2
                     [0, 0, 0, 0, 0, 0, 0, 0, 0, 1.0]])       # gf


@functools.lru_cache(maxsize=1)   # constants of the module: made once (read only), not twice a spectrum
def _guess_points():
    """The first guess's (g, f) grid points, E = (1, g, f, g^2, f^2, gf) at each, and E's pair products."""
    gg, ff = np.meshgrid(_GUESS_G, _GUESS_F, indexing="ij")
    g, f = gg.ravel(), ff.ravel()
    E = np.column_stack([np.ones_like(g), g, f, g * g, f * f, g * f])                 # (40, 6)
    EE = E[:, _PAIRS[0]] * E[:, _PAIRS[1]] * _PAIR_MULT                                 # (40, 21)
    for a in (g, f, E, EE):
        a.flags.writeable = False
    return g, f, E, EE


def _node_products(model):
    """Every node's F = _node_terms(t) . coef (k, 6, n) and F's pair products F_i F_j, i <= j (k, 21, n).

    They depend on the model only: made once per model (4.8 MB for the packaged one) instead of
    once per spectrum. With them and the kept sums of :func:`_guess_normal_matrices` the first
    guess took 0.40 ms per spectrum against 2.3 ms before, a new pixel mask every call (measured
    side by side on a loaded machine).
    """
    cached = model.__dict__.get("_guess_products")
    if cached is None:
        t = (model.nodes - SCALE_CENTRE[0]) / SCALE_WIDTH[0]
        with single_threaded():   # the same bits whoever builds them (specan.threads)
            F = np.ascontiguousarray(np.array([_node_terms(tk) for tk in t]) @ model.coef)
        FF = np.ascontiguousarray(F[:, _PAIRS[0]] * F[:, _PAIRS[1]])
        F.flags.writeable = FF.flags.writeable = False
        cached = model.__dict__["_guess_products"] = (F, FF)
    return cached


#: Every grid point's normal-matrix entries summed over all the pixels, for the last pixel weights seen
#: (the model's own scatter, the same for every spectrum classified: the weights are the model's).
_GUESS_SUMS = {}


def _guess_normal_entries(model, w2, basis, pixels=None):
    """G's 10 distinct entries (k * 40, 10) of every grid point, summed over ``pixels`` (default: all).

    At a node (t fixed) the model is m = E(g, f) . F with six terms, so G = B^T W B (B = basis * m)
    is sum_ij E_i E_j T_ij with T_ij = sum_pixels F_i F_j (basis_k basis_l w): one matrix product over
    the pixels for every node and pair (no (points, pixels) arrays).
    """
    _, FF = _node_products(model)
    _, _, _, EE = _guess_points()
    P = basis.shape[1]
    upper = np.triu_indices(P)
    k = FF.shape[0]
    if pixels is None:
        PPw = (basis[:, upper[0]] * basis[:, upper[1]]) * w2[:, None]
        T = FF.reshape(k * FF.shape[1], -1) @ PPw
    else:
        PPw = (basis[pixels][:, upper[0]] * basis[pixels][:, upper[1]]) * w2[pixels, None]
        T = FF[:, :, pixels].reshape(k * FF.shape[1], -1) @ PPw
    return (EE @ T.reshape(k, FF.shape[1], -1)).reshape(-1, PPw.shape[1])


def _guess_normal_matrices(model, w2, good, basis):
    """The polynomial's normal matrices G = B^T W B (B = basis * m) of every grid point, over the ``good`` pixels.

    The sums over all pixels depend on the model and its weights only: kept (:data:`_GUESS_SUMS`),
    and a spectrum's unusable pixels (the grid's ends beyond its coverage, which move with its
    velocity; masked pixels) are taken off them, or, where most are unusable, its usable pixels
    summed afresh. Taking off changes the sums in rounding only (tests/test_parameters.py: the
    same grid point as the one-at-a-time solves).
    """
    key = (id(model), basis.shape, hash(w2.tobytes()))
    hit = _GUESS_SUMS.get(key)
    if hit is None or not np.array_equal(hit[0], w2):
        with single_threaded():   # the same bits whoever builds them (specan.threads)
            hit = (w2.copy(), _guess_normal_entries(model, w2, basis))
        hit[1].flags.writeable = False
        _GUESS_SUMS.clear()
        _GUESS_SUMS[key] = hit
    all_sums = hit[1]

    def make():
        bad = ~good
        n_bad = int(bad.sum())
        if n_bad == 0:
            Gu = all_sums
        elif n_bad <= good.size // 2:
            Gu = all_sums - _guess_normal_entries(model, w2, basis, np.flatnonzero(bad))
        else:
            Gu = _guess_normal_entries(model, w2, basis, np.flatnonzero(good))
        P = basis.shape[1]
        upper = np.triu_indices(P)
        G = np.empty((Gu.shape[0], P, P))
        G[:, upper[0], upper[1]] = Gu
        G[:, upper[1], upper[0]] = Gu
        return G

    # the matrices depend on the model, its weights and the pixel mask, not on the flux: kept on the model
    # for the last few (weights, mask) pairs (a night's spectra of one set-up share a few masks), made with
    # one thread (see _span_factor)
    store = model.__dict__.setdefault("_guess_on_masks", {})
    return kept(store, (basis.shape, content_key(w2), content_key(good)), in_one_thread(make), MASKS_KEPT)


def _first_guess(model, y, good, sigma, basis):
    """Scaled labels of the best chi-square on a coarse grid of each node's model.

    Every grid point's multiplicative polynomial is solved at once through its normal equations
    (the points' chi-squares are what :func:`_residuals` gives, to rounding; a Python loop of
    560 least-squares solves was most of a classification's time, measured): G = B^T W B and
    b = B^T W y with B = basis * m. G does not depend on the flux: its sums over all pixels are
    kept, less the spectrum's unusable pixels (:func:`_guess_normal_matrices`); b = E . (F B^T W y)
    is one product over the pixels for all nodes. The chi-squares agree with the direct sums to
    4e-11 (relative) on the Kurucz Sun and 86 MILES and JHC stars, whose best and second-best grid
    points are at least 3e-5 apart (measured): the same choice (tests/test_parameters.py compares
    it with the one-at-a-time solves).
    """
    w2_all = 1.0 / sigma ** 2
    w2 = np.where(good, w2_all, 0.0)
    yw = np.where(good, y, 0.0)
    F, _ = _node_products(model)
    g, f, E, _ = _guess_points()
    k = F.shape[0]
    G = _guess_normal_matrices(model, w2_all, good, basis)
    Fb = (F.reshape(k * F.shape[1], -1) @ (basis * (w2 * yw)[:, None])).reshape(k, F.shape[1], -1)   # (k, 6, 4)
    b = (E @ Fb).reshape(-1, basis.shape[1])                                                     # (k * 40, 4)
    c = np.linalg.solve(G, b[:, :, None])[:, :, 0]
    chi2 = np.sum(w2 * yw * yw) - np.einsum("gi,gi->g", b, c)
    t = (model.nodes - SCALE_CENTRE[0]) / SCALE_WIDTH[0]
    # the best point's row of the (node, g-f point) table, nodes outer: that row alone, not the table
    node, point = divmod(int(np.argmin(chi2)), g.size)
    return np.array([t[node], g[point], f[point]])


def _residual_function(model, k, y, good, sigma, sig0, basis):
    """The fit's residuals at node ``k``: reduced (:class:`_ReducedResiduals`) where the noise is the
    model's own scatter and the usable pixels allow, else over every usable pixel."""
    if sigma is None and good.sum() >= 4 * _node_span(model, k, basis)[0].shape[1]:
        try:
            return _ReducedResiduals(model, k, y, good, basis)
        except np.linalg.LinAlgError:
            pass
    return _ProjectedResiduals(model, k, y, good, np.hypot(sig0, model.scatter[k]), basis)


def fit_labels(model, flux, good, sigma=None):
    """Best-fitting (Teff, log g, [Fe/H]) of a flux on the model's pixels.

    Returns
    -------
    dict
        ``labels`` (Teff K, log g, [Fe/H]), ``errors`` (statistical, same units), ``node``
        (index), ``chi2_reduced``.
    """
    y = np.asarray(flux, float)
    good = np.asarray(good, bool) & np.isfinite(y)
    basis = _poly_basis(y.size)
    # without a noise estimate the model's own scatter is the error; the reduced chi-square then
    # scales the covariance up when the spectrum's noise or mismatch is larger
    sig0 = np.zeros_like(y) if sigma is None else np.asarray(sigma, float)
    x = _first_guess(model, y, good, np.hypot(sig0, model.typical_scatter), basis)
    k = model.nearest(x)
    for _ in range(3):   # the node nearest the answer, until it settles
        fit = _residual_function(model, k, y, good, sigma, sig0, basis)
        # MINPACK's lmder (Levenberg-Marquardt) with least_squares(method="lm")'s tolerances and
        # evaluation limit, called through leastsq: the same iterations without least_squares'
        # wrapping of every call (a third of the fit's time, measured)
        x = leastsq(fit.residuals, x, Dfun=fit.jacobian_rows, col_deriv=True, ftol=1e-8, xtol=1e-8, gtol=1e-8,
                    maxfev=300)[0]
        k_new = model.nearest(x)
        if k_new == k:
            break
        k = k_new
    r, jac = fit.residuals(x), fit.jacobian(x)
    dof = max(int(good.sum()) - 3 - (POLY_DEGREE + 1), 1)
    chi2 = float(np.dot(r, r)) / dof
    cov = np.linalg.pinv(jac.T @ jac) * max(chi2, 1.0)
    err_scaled = np.sqrt(np.clip(np.diag(cov), 0.0, None)) * SCALE_WIDTH
    labels = _unscale(x)
    errors = np.array([labels[0] * math.log(10.0) * err_scaled[0], err_scaled[1], err_scaled[2]])
    return {"labels": labels, "errors": errors, "node": k, "chi2_reduced": float(chi2)}


#: dex(cm s-2), made once (a function unit costs 30 us to make, measured)
_GRAVITY_UNIT = u.dex(u.cm / u.s ** 2)


def measure(spectrum, rv=None, model=None, fwhm_in=None, resolving_power=None, pixels=None):
    """Teff, log g and [Fe/H] of a spectrum, with uncertainties (see the module docstring).

    Parameters
    ----------
    spectrum : specutils.Spectrum
    rv : astropy.units.Quantity, optional
        Velocity to remove (as seen in the data); None: the spectrum is taken as at rest.
    model : ParameterModel, optional
        Default: the packaged model fitted on the MILES library.
    fwhm_in : float, optional
        FWHM of the spectrum (Angstrom) when its metadata give no resolving power.
    resolving_power : float, optional
        R of the spectrum when its metadata give none (e.g. estimated from its lines).
    pixels : specan.resolution.RestPixels, optional
        ``rest_pixels(spectrum, rv)`` when the caller has made it already.

    Returns
    -------
    dict
        ``teff``, ``teff_err`` (K), ``logg`` (dex(cm s-2)), ``logg_err``, ``feh``, ``feh_err`` (dex)
        as Quantities (``.value`` gives the plain number); ``chi2_reduced``; ``node_teff`` (K, the node model used); ``notes``.
        Errors combine the fit's with the model's cross-validated scatter at the node;
        ``broader_than_model`` says the spectrum is broader than the model (:func:`broader_than_model`).
    """
    notes = []
    model = model or default_model()
    flux, good, broader = on_model_grid(spectrum, rv=rv, fwhm_in=fwhm_in, notes=notes,
                                        resolving_power=resolving_power, pixels=pixels)
    res = fit_labels(model, flux, good)
    k = res["node"]
    teff, logg, feh = res["labels"]
    stat = res["errors"]
    sys_sd = model.cv_sd[k]
    errs = np.hypot(stat, np.array([teff * sys_sd[0], sys_sd[1], sys_sd[2]]))
    lo, hi = 10 ** model.nodes[0], 10 ** model.nodes[-1]
    if not lo <= teff <= hi:
        notes.append(f"Teff {teff:.0f} K outside the model's {lo:.0f}-{hi:.0f} K: parameters extrapolated")
    notes.append(f"atmospheric parameters from a quadratic spectral model of the MILES library at "
                 f"{MODEL_FWHM:g} A (node {10 ** model.nodes[k]:.0f} K; errors include its cross-validated scatter)")
    gravity = _GRAVITY_UNIT
    return {"teff": teff * u.K, "teff_err": errs[0] * u.K, "logg": logg * gravity, "logg_err": errs[1] * u.dex,
            "feh": feh * u.dex, "feh_err": errs[2] * u.dex, "chi2_reduced": res["chi2_reduced"],
            "node_teff": 10 ** model.nodes[k] * u.K, "broader_than_model": broader, "notes": notes}
