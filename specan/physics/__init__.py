"""From an MK type to physical quantities.

Effective temperature and absolute visual magnitude from the type and luminosity
class come from the published scales of :mod:`specan.mkscales` (re-exported here).

Also here: a colour temperature from a Planck fit to continuum windows
(:func:`colour_temperature`), spectroscopic distances as a mixture over the
luminosity-class probabilities (:func:`spectroscopic_distance`), Galactocentric
space velocities (:func:`space_velocity`), a per-object photometry file
(:func:`load_photometry`) and one entry point combining them (:func:`derive`).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import astropy.units as u
import numpy as np
from scipy import optimize, stats

from ..errors import AnalysisError, MetadataError, ReadError
from ..io import parse_angle
from ..frames import ESCAPE_SPEED, GALACTOCENTRIC_PARAMETERS, galactocentric_frame, galactocentric_parameters
from ..mkscales import absolute_magnitude, load_scales, lumclass_number, scale_range, teff_from_type
from ..mktypes import number_to_lumclass

__all__ = [
    "load_scales",
    "scale_range",
    "teff_from_type",
    "absolute_magnitude",
    "DEFAULT_WINDOWS",
    "colour_temperature",
    "spectroscopic_distance",
    "space_velocity",
    "ESCAPE_SPEED",
    "GALACTOCENTRIC_PARAMETERS",
    "PHOTOMETRY_COLUMNS",
    "load_photometry",
    "photometry_for",
    "photometry_from_header",
    "derive",
]

# ============================================================ colour temperature

#: Continuum windows (Angstrom; 30-150 A wide, so air/vacuum does not matter) chosen to
#: avoid the Balmer lines (+-80 A of the cores), Ca II H&K, the G band, Mg b, Na D, the
#: Ca II triplet and the strong telluric bands (B 6867-6950 A, A 7590-7700 A, water
#: 7160-7340 and 8130-8350 A). Positions of those features: common practice.
DEFAULT_WINDOWS = (
    (4020.0, 4060.0), (4150.0, 4190.0), (4440.0, 4500.0), (4560.0, 4620.0),
    (4700.0, 4760.0), (5040.0, 5120.0), (5220.0, 5260.0), (5560.0, 5620.0),
    (5800.0, 5860.0), (6040.0, 6100.0), (6240.0, 6290.0), (6660.0, 6740.0),
    (6760.0, 6840.0), (7040.0, 7140.0), (7400.0, 7560.0), (7800.0, 8100.0),
    (8400.0, 8480.0), (8700.0, 8820.0),
)

_FLAMBDA = u.erg / (u.cm**2 * u.s * u.AA)
# Extinction law: Fitzpatrick (1999) as implemented in dust_extinction (valid 1000 A - 3.3 um).
EXTINCTION_LAW = "Fitzpatrick (1999), dust_extinction.parameter_averages.F99"


def _flux_as_flambda(spectrum):
    """(wave_AA, F_lambda, relative) as plain arrays; relative=True for dimensionless flux."""
    from ..obsinfo import get_info

    info = get_info(spectrum)
    wave = spectrum.spectral_axis.to_value(u.AA, equivalencies=u.spectral())
    flux = spectrum.flux
    unit = flux.unit
    if unit.physical_type == "dimensionless" or unit == u.dimensionless_unscaled:
        if info.normalized:
            raise AnalysisError("spectrum is continuum-normalised: a colour temperature needs its flux shape",
                                path=info.path)
        return wave, np.asarray(flux.value, float), True
    if (unit * u.sr).is_equivalent(_FLAMBDA, u.spectral_density(1 * u.AA)):
        # Surface flux moments per steradian (model atmospheres) have the same shape.
        flux = flux * u.sr
    try:
        fl = flux.to_value(_FLAMBDA, equivalencies=u.spectral_density(spectrum.spectral_axis))
    except u.UnitConversionError:
        raise AnalysisError(f"flux unit {unit} is not a spectral flux density: not flux-calibrated",
                            path=info.path) from None
    return wave, np.asarray(fl, float), False


def _window_points(wave, flux, good, windows, min_pixels=5):
    """One continuum point per window: straight line with low points clipped, taken at the window centre.

    Absorption lines only push flux down, so the clipping is one-sided (points
    more than 2 robust sigma below the line are dropped, 5 passes). The loop is
    written here because the clipping is about the fitted line, refitted each
    pass; astropy's ``sigma_clip`` clips about a central value of the data.
    """
    from astropy.stats import mad_std

    pts = []
    for lo, hi in windows:
        sel = good & (wave >= lo) & (wave <= hi)
        if sel.sum() < min_pixels:
            continue
        x, y = wave[sel], flux[sel]
        keep = np.ones(x.size, bool)
        for _ in range(5):
            coef = np.polyfit(x[keep] - x.mean(), y[keep], 1)
            resid = y - np.polyval(coef, x - x.mean())
            sig = mad_std(resid[keep])   # robust sigma (1.4826 x median absolute deviation)
            new = resid > -2.0 * sig if sig > 0 else keep
            if new.sum() < min_pixels or np.array_equal(new, keep):
                break
            keep = new
        centre = 0.5 * (lo + hi)
        level = np.polyval(coef, centre - x.mean())
        if level > 0 and np.isfinite(level):
            pts.append((centre, level))
    return np.array(pts).reshape(-1, 2)


#: Temperature range of the Planck fit (K); a fit that runs to either end is refused.
_T_BOUNDS = (1500.0, 100000.0)


def _planck_fit(w_pts, f_pts, t_bounds=_T_BOUNDS):
    """Fit scale * B_lambda(T) to window points with astropy's BlackBody; equal relative weights.

    A log-spaced grid search (scale solved analytically) gives the start, so the
    least-squares fit cannot settle on a far local minimum.
    """
    from astropy.modeling import fitting
    from astropy.modeling.physical_models import BlackBody

    unit = u.erg / (u.cm**2 * u.s * u.AA * u.sr)
    norm = np.median(f_pts)
    y = f_pts / norm
    grid = np.geomspace(t_bounds[0], t_bounds[1], 400)
    bb = BlackBody(temperature=grid[:, None] * u.K, scale=1.0 * unit)
    shapes = bb(w_pts[None, :] * u.AA).to_value(unit)
    # Relative residuals: minimise sum((y/(a*s) - 1)^2) ~ sum(((y - a s)/y)^2); a in closed form.
    wts = 1.0 / y**2
    a = np.sum(wts * y * shapes, axis=1) / np.sum(wts * shapes**2, axis=1)
    chi = np.sum(wts * (y - a[:, None] * shapes) ** 2, axis=1)
    best = int(np.argmin(chi))
    model = BlackBody(temperature=grid[best] * u.K, scale=a[best] * unit)
    model.temperature.bounds = t_bounds
    fitter = fitting.TRFLSQFitter(calc_uncertainties=True)
    fit = fitter(model, w_pts * u.AA, y * unit, weights=1.0 / y)
    t = float(fit.temperature.value)
    resid = (y - fit(w_pts * u.AA).to_value(unit)) / y
    dof = max(len(y) - 2, 1)
    cov = fitter.fit_info.get("param_cov")
    t_err = float(np.sqrt(cov[0, 0])) if cov is not None and np.isfinite(cov[0, 0]) else float("nan")
    return t, t_err, resid, dof, float(fit.scale.value) * norm


def colour_temperature(spectrum, ebv=0.0, windows=None, ebv_err=0.0, r_v=3.1, wave_range=None,
                       return_details=False):
    """Colour temperature from a Planck fit to the continuum windows of a flux-calibrated spectrum.

    The flux is converted to F_lambda, dereddened for ``ebv`` with the Fitzpatrick
    (1999) law at ``r_v`` (``dust_extinction`` F99), reduced to one continuum point
    per window (a straight line through the window with absorption-line pixels
    clipped from below) and fitted with ``scale * B_lambda(T)`` (astropy
    ``BlackBody``) with equal relative weights.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Flux in a spectral flux density unit (F_lambda, F_nu, or either per
        steradian). Dimensionless flux that is not continuum-normalised is taken
        as relative F_lambda (noted in the details).
    ebv : float or Quantity (mag), optional
        Colour excess E(B-V) to correct for.
    windows : sequence of (lo, hi), optional
        Continuum windows in Angstrom (or Quantity pairs); default
        :data:`DEFAULT_WINDOWS`. Only windows with 5 or more good pixels count.
    ebv_err : float or Quantity (mag), optional
        Uncertainty of ``ebv``; its effect (refit at ebv +- ebv_err) is added in quadrature.
    r_v : float, optional
        Ratio of total to selective extinction (3.1, common practice for the diffuse ISM).
    wave_range : (lo, hi), optional
        Only use windows inside this range (Angstrom or Quantity).
    return_details : bool, optional
        Also return a dict with the window points, relative residuals and notes.

    Returns
    -------
    t, t_err : Quantity (K)
        ``t_err`` is the fit covariance error scaled by the reduced chi-square
        (so the window-to-window scatter, i.e. residual line blanketing and flux
        calibration, sets it), with the E(B-V) error added in quadrature.
    details : dict, only if ``return_details``

    Raises
    ------
    AnalysisError
        Normalised or non-flux spectrum, fewer than 3 usable windows, or a fit
        that runs to the temperature bounds (1,500 or 100,000 K): the optical
        continuum of stars hotter than ~20,000 K is nearly Rayleigh-Jeans and
        does not fix a temperature.
    """
    from dust_extinction.parameter_averages import F99

    ebv = float(u.Quantity(ebv, u.mag).value) if ebv is not None else 0.0
    ebv_err = float(u.Quantity(ebv_err, u.mag).value) if ebv_err is not None else 0.0
    wave, flux, relative = _flux_as_flambda(spectrum)
    good = np.isfinite(wave) & np.isfinite(flux) & (flux > 0)
    if spectrum.mask is not None:
        good &= ~np.asarray(spectrum.mask, bool)
    law = F99(Rv=r_v)
    # Keep to the law's validity range (x = 1/lambda in 1/um).
    lam_lo, lam_hi = 1e4 / law.x_range[1], 1e4 / law.x_range[0]
    good &= (wave > lam_lo) & (wave < lam_hi)
    wins = [(float(u.Quantity(lo, u.AA).value), float(u.Quantity(hi, u.AA).value))
            for lo, hi in (windows if windows is not None else DEFAULT_WINDOWS)]
    if wave_range is not None:
        rlo, rhi = (float(u.Quantity(v, u.AA).value) for v in wave_range)
        wins = [(lo, hi) for lo, hi in wins if lo >= rlo and hi <= rhi]
    notes = []
    if relative:
        notes.append("flux is dimensionless: taken as relative F_lambda")

    def fit_for(e):
        f = flux
        if e:
            f = flux / law.extinguish(np.where(good, wave, 5500.0) * u.AA, Ebv=e)
        pts = _window_points(wave, f, good, wins)
        if len(pts) < 3:
            raise AnalysisError(f"only {len(pts)} usable continuum windows (need 3) for a colour temperature")
        return pts, _planck_fit(pts[:, 0], pts[:, 1])

    pts, (t, t_err, resid, dof, scale) = fit_for(ebv)
    if t > 0.98 * _T_BOUNDS[1] or t < 1.02 * _T_BOUNDS[0]:
        raise AnalysisError(f"colour temperature fit ran to its bound ({t:.0f} K): the continuum is "
                            "not Planck-like over these windows (over-corrected reddening, a hot star's "
                            "Rayleigh-Jeans tail, or flux calibration)")
    chi2_red = float(np.sum(resid**2) / dof)
    # Scale the covariance by the reduced chi-square: the weights were relative, not absolute errors.
    t_err = t_err * math.sqrt(max(chi2_red, 1e-30))
    if ebv_err > 0:
        t_hi = fit_for(ebv + ebv_err)[1][0]
        t_lo = fit_for(max(ebv - ebv_err, 0.0))[1][0]
        t_err = math.hypot(t_err, 0.5 * abs(t_hi - t_lo))
    if t > 20000:
        notes.append("optical continuum near the Rayleigh-Jeans limit: colour temperature poorly constrained")
    if not np.isfinite(t_err):
        t_err = float("nan")
    out = (t * u.K, t_err * u.K)
    if not return_details:
        return out
    details = {
        "window_wave": pts[:, 0] * u.AA,
        "window_flux": pts[:, 1] * _FLAMBDA,
        "relative_residuals": resid,
        "chi2_reduced": chi2_red,
        "n_windows": int(len(pts)),
        "ebv": ebv,
        "r_v": r_v,
        "extinction_law": EXTINCTION_LAW,
        "notes": notes,
    }
    return out + (details,)


# ============================================================ spectroscopic distance

def _as_float(value, unit):
    """Quantity or number -> float in ``unit``; None stays None."""
    if value is None:
        return None
    if isinstance(value, u.Quantity):
        return float(value.to_value(unit))
    v = float(value)
    return None if not math.isfinite(v) else v


def _mixture(weights, values, errors):
    """Mean and standard deviation of a mixture of Gaussians N(values_k, errors_k) with weights summing to 1."""
    w, m, s = (np.asarray(a, float) for a in (weights, values, errors))
    mean = float(np.sum(w * m))
    return mean, float(math.sqrt(max(np.sum(w * (s**2 + m**2)) - mean**2, 0.0)))


def _normalise_probs(lumclass_prob):
    """Class-probability dict (any keys I..V, Ia...) -> {class number: prob}, summing to 1."""
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
    v = _as_float(v_mag, u.mag)
    v_e = _as_float(v_err, u.mag) or 0.0
    if v is None:
        raise ValueError("no apparent magnitude given")
    probs = _normalise_probs(lumclass_prob)
    notes = []
    if ebv is None:
        a_v, a_v_err = 0.0, 0.0
        notes.append("E(B-V) not given: A_V = 0, so the distance is an upper estimate if there is dust")
    else:
        a_v = r_v * _as_float(ebv, u.mag)
        a_v_err = r_v * (_as_float(ebv_err, u.mag) or 0.0)
    ns = np.array(list(probs))
    p = np.array([probs[n] for n in ns])
    m = np.empty(ns.size)
    s = np.empty(ns.size)
    for i, n in enumerate(ns):
        mv, mv_err = absolute_magnitude(code, int(n), code_err or 0.0)
        m[i], s[i] = mv.to_value(u.mag), mv_err.to_value(u.mag)
    mu_k = v - a_v - m
    sig_k = np.sqrt(v_e**2 + a_v_err**2 + s**2)

    def cdf(mu):
        return float(np.sum(p * stats.norm.cdf((mu - mu_k) / sig_k)))

    lo_b, hi_b = float(np.min(mu_k - 10 * sig_k)), float(np.max(mu_k + 10 * sig_k))
    # The mixture's percentiles at -1, 0 and +1 sigma of a Gaussian.
    mu16, mu50, mu84 = (optimize.brentq(lambda x: cdf(x) - level, lo_b, hi_b, xtol=1e-10)
                        for level in stats.norm.cdf([-1.0, 0.0, 1.0]))
    d = lambda mu: 10.0 ** (mu / 5.0 + 1.0)  # noqa: E731  distance modulus definition, pc
    k = math.log(10.0) / 5.0
    # E[10^(mu/5+1)] of a Gaussian mu is exp(k mu + k^2 s^2 / 2) * 10 (lognormal mean).
    d_mean = float(np.sum(p * d(mu_k) * np.exp(0.5 * (k * sig_k) ** 2)))
    m_mean, m_sd = _mixture(p, m, s)
    components = [
        {"lumclass": number_to_lumclass(n), "prob": float(pk), "m_v_abs": float(mk) * u.mag,
         "m_v_abs_err": float(sk) * u.mag, "distance": float(d(muk)) * u.pc}
        for n, pk, mk, sk, muk in zip(ns, p, m, s, mu_k)
    ]
    return {
        "distance": d(mu50) * u.pc,
        "distance_err": 0.5 * (d(mu84) - d(mu16)) * u.pc,
        "distance_lo": d(mu16) * u.pc,
        "distance_hi": d(mu84) * u.pc,
        "distance_mean": d_mean * u.pc,
        "distance_modulus": mu50 * u.mag,
        "m_v_abs": m_mean * u.mag,
        "m_v_abs_err": m_sd * u.mag,
        "a_v": a_v * u.mag,
        "a_v_err": a_v_err * u.mag,
        "components": components,
        "method": "analytic Gaussian mixture in distance modulus over luminosity classes",
        "notes": notes,
    }


# ============================================================ space velocity


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
    from astropy.coordinates import SkyCoord

    params = galactocentric_parameters()
    frame = galactocentric_frame()   # the one (cached) frame the velocity stage's v_GRF uses too
    kms = u.km / u.s
    ra_d = u.Quantity(ra, u.deg).value
    dec_d = u.Quantity(dec, u.deg).value
    d_pc = u.Quantity(distance, u.pc).value
    pma = u.Quantity(pmra, u.mas / u.yr).value
    pmd = u.Quantity(pmdec, u.mas / u.yr).value
    v_r = u.Quantity(rv, kms).value
    if not d_pc > 0:
        raise ValueError(f"distance must be positive, got {distance}")

    def transform(d, a, b, r):
        c = SkyCoord(ra=np.broadcast_to(ra_d, np.shape(d)) * u.deg, dec=np.broadcast_to(dec_d, np.shape(d)) * u.deg,
                     distance=d * u.pc, pm_ra_cosdec=a * u.mas / u.yr, pm_dec=b * u.mas / u.yr,
                     radial_velocity=r * kms, frame="icrs")
        g = c.transform_to(frame)
        return np.asarray(g.velocity.d_xyz.to_value(kms))

    vxyz = transform(np.atleast_1d(d_pc), np.atleast_1d(pma), np.atleast_1d(pmd), np.atleast_1d(v_r))[:, 0]
    v_total = float(np.linalg.norm(vxyz))
    # 4.740470 km/s = 1 AU per year (common practice): v_t = 4.74047 mu[mas/yr] d[kpc].
    v_tan = 4.740470446 * math.hypot(pma, pmd) * d_pc / 1000.0
    v_esc = float(u.Quantity(escape_speed, kms).value)
    errs = [distance_err, pmra_err, pmdec_err, rv_err]
    v_total_err = p_unbound = None
    if any(e is not None for e in errs):
        rng = np.random.default_rng(seed)
        de = u.Quantity(distance_err, u.pc).value if distance_err is not None else 0.0
        sd = rng.normal(np.log(d_pc), de / d_pc, n_samples)
        sa = rng.normal(pma, u.Quantity(pmra_err, u.mas / u.yr).value if pmra_err is not None else 0.0, n_samples)
        sb = rng.normal(pmd, u.Quantity(pmdec_err, u.mas / u.yr).value if pmdec_err is not None else 0.0, n_samples)
        sr = rng.normal(v_r, u.Quantity(rv_err, kms).value if rv_err is not None else 0.0, n_samples)
        speeds = np.linalg.norm(transform(np.exp(sd), sa, sb, sr), axis=0)
        lo, hi = np.percentile(speeds, 100.0 * stats.norm.cdf([-1.0, 1.0]))   # +-1 sigma of a Gaussian
        v_total_err = 0.5 * (hi - lo) * kms
        p_unbound = float(np.mean(speeds > v_esc))
    return {
        "v_xyz": vxyz * kms,
        "v_total": v_total * kms,
        "v_total_err": v_total_err,
        "v_tangential": v_tan * kms,
        "p_unbound": p_unbound,
        "unbound_candidate": bool(v_total > v_esc),
        "unbound_basis": "v_total_grf",
        "escape_speed": v_esc * kms,
        "frame": {"name": GALACTOCENTRIC_PARAMETERS, "references": params["references"]},
    }


# ============================================================ photometry file

#: Accepted column names of the photometry CSV (case, spaces and punctuation ignored:
#: "E(B-V)" matches "ebv", "V_err" matches "verr"). Units are fixed: V and E(B-V) in mag,
#: parallax in mas, proper motions in mas/yr (pmra = mu_alpha cos dec), ra/dec in degrees
#: or sexagesimal (ra "hh mm ss.s", dec "dd mm ss").
PHOTOMETRY_COLUMNS = {
    "object": ("object", "name", "objectname", "objname", "star", "id"),
    "v": ("v", "vmag", "magv"),
    "v_err": ("verr", "ev", "verror", "vmagerr", "evmag", "sigmav"),
    "ebv": ("ebv", "ebminusv", "reddening"),
    "ebv_err": ("ebverr", "eebv", "ebverror"),
    "parallax": ("parallax", "plx", "parallaxmas", "plxmas"),
    "parallax_err": ("parallaxerr", "plxerr", "eplx", "eparallax", "parallaxerror"),
    "pmra": ("pmra", "pmracosdec", "pmramasyr"),
    "pmra_err": ("pmraerr", "epmra", "pmraerror"),
    "pmdec": ("pmdec", "pmde", "pmdecmasyr"),
    "pmdec_err": ("pmdecerr", "epmdec", "epmde", "pmdecerror"),
    "ra": ("ra", "radeg", "raj2000", "raicrs"),
    "dec": ("dec", "decdeg", "dej2000", "decj2000", "deicrs"),
}
_PHOT_UNITS = {"v": u.mag, "v_err": u.mag, "ebv": u.mag, "ebv_err": u.mag, "parallax": u.mas,
               "parallax_err": u.mas, "pmra": u.mas / u.yr, "pmra_err": u.mas / u.yr,
               "pmdec": u.mas / u.yr, "pmdec_err": u.mas / u.yr}


def _squash(name: str) -> str:
    return re.sub(r"[^a-z0-9]", "", str(name).lower())


def load_photometry(path, bad_rows=None):
    """Read a per-object photometry/astrometry CSV.

    The file is comma-separated with a header line; lines starting with ``#``
    are comments. Required columns: an object name and V. Optional: V error,
    E(B-V) and its error, parallax (mas) and error, proper motions (mas/yr;
    pmra = mu_alpha cos dec) and errors, ra/dec. Accepted names are listed in
    :data:`PHOTOMETRY_COLUMNS`; other columns are ignored. Empty cells mean "not
    known".

    Parameters
    ----------
    path : str or Path
    bad_rows : dict, optional
        When given, a data line that cannot be used (a value that is not a number or an
        angle, an empty name, an object listed twice) does not stop the reading: it is
        left out and recorded here as object name -> reason (an empty name as
        ``"line N"``), so one typo costs one star, not the night.

    Returns
    -------
    dict
        Object name (as written, stripped) -> row dict with keys ``object``,
        ``v``, ``v_err``, ``ebv``, ``ebv_err``, ``parallax``, ``parallax_err``,
        ``pmra``, ``pmra_err``, ``pmdec``, ``pmdec_err``, ``ra``, ``dec``: Quantities
        in the units above, or None.

    Raises
    ------
    ReadError
        Missing or unreadable file, or missing object/V column; without ``bad_rows``
        also a non-numeric value, an empty name or an object listed twice.
    """
    import csv

    path = Path(path)
    if not path.is_file():
        raise ReadError("photometry file not found", path=path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    except (OSError, UnicodeDecodeError) as err:
        raise ReadError(f"cannot read photometry file: {err}", path=path) from None
    if not lines:
        raise ReadError("photometry file has no header line", path=path)
    # The csv module rather than astropy's readers: cells are kept as text so that
    # sexagesimal coordinates and empty cells survive without type guessing.
    reader = csv.reader(lines)
    header = next(reader)
    where = {}
    for i, name in enumerate(header):
        key = _squash(name)
        for canon, aliases in PHOTOMETRY_COLUMNS.items():
            if key in aliases and canon not in where:
                where[canon] = i
    for need in ("object", "v"):
        if need not in where:
            raise ReadError(f"photometry file needs a '{need}' column (accepted names: "
                            f"{', '.join(PHOTOMETRY_COLUMNS[need])}); found {header}", path=path)
    out, seen = {}, set()
    for lineno, row in enumerate(reader, start=2):
        if not any(c.strip() for c in row):
            continue
        cell = lambda key: row[where[key]].strip() if key in where and where[key] < len(row) else ""  # noqa: E731
        name = cell("object")
        try:
            rec = _photometry_record(lineno, name, cell, header, where, seen, path)
        except ReadError as exc:
            if bad_rows is None:
                raise
            bad_rows[name or f"line {lineno}"] = exc.reason
            out.pop(name, None)     # listed twice: no line of it is trusted
            continue
        finally:
            seen.add(name)
        out[name] = rec
    return out


def _photometry_record(lineno, name, cell, header, where, seen, path):
    """One data line of a photometry file as a row dict (see :func:`load_photometry`)."""
    if not name:
        raise ReadError(f"data line {lineno}: empty object name", path=path)
    if name in seen:
        raise ReadError(f"object {name!r} listed twice (data line {lineno})", path=path)
    rec = {"object": name}
    for key, unit in _PHOT_UNITS.items():
        text = cell(key)
        if text == "" or text.lower() in ("nan", "na", "none", "--"):
            rec[key] = None
            continue
        try:
            val = float(text)
        except ValueError:
            raise ReadError(f"data line {lineno} ({name}): {header[where[key]]!r} = {text!r} is not a number",
                            path=path) from None
        rec[key] = None if not math.isfinite(val) else val * unit
    for key in ("ra", "dec"):
        text = cell(key)
        try:
            deg = parse_angle(text, u.hourangle if key == "ra" else u.deg, key) if text else None
        except MetadataError:
            raise ReadError(f"data line {lineno} ({name}): {key} = {text!r} is not an angle",
                            path=path) from None
        rec[key] = None if deg is None else deg * u.deg
    return rec


def photometry_for(photometry, name):
    """The row of ``photometry`` (from :func:`load_photometry`) for object ``name``, or None.

    Exact match first, then ignoring case, spaces and punctuation ("HD 12345" = "hd12345").
    """
    if not photometry or name is None:
        return None
    if name in photometry:
        return photometry[name]
    key = _squash(name)
    for k, row in photometry.items():
        if _squash(k) == key:
            return row
    return None


def photometry_from_header(spectrum, v_key, v_err_key=None, ebv_key=None):
    """A photometry row (as :func:`load_photometry` gives) from header keywords the user names.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Read by :func:`specan.read`; its ``ObsInfo.header`` holds the cards.
    v_key : str
        Keyword holding the apparent V magnitude (e.g. "VMAG"; no default, since
        headers use many names and a wrong guess would give a wrong distance).
    v_err_key, ebv_key : str, optional
        Keywords of the V error and E(B-V).

    Returns
    -------
    dict or None
        Row dict (``object``, ``v``, ``v_err``, ``ebv``, position from the
        pointing), or None when the V keyword is absent or not a number.
    """
    from ..obsinfo import get_info

    info = get_info(spectrum)
    header = {str(k).upper(): v for k, v in (info.header or {}).items()}

    def number(key):
        if not key:
            return None
        try:
            val = float(header.get(key.upper()))
        except (TypeError, ValueError):
            return None
        return val if math.isfinite(val) else None

    v = number(v_key)
    if v is None:
        return None
    v_err, ebv = number(v_err_key), number(ebv_key)
    row = {key: None for key in _PHOT_UNITS}
    row.update({"object": info.object, "v": v * u.mag, "v_err": None if v_err is None else v_err * u.mag,
                "ebv": None if ebv is None else ebv * u.mag, "ra": None, "dec": None})
    if info.ra_deg is not None and info.dec_deg is not None:
        c = info.coord.icrs
        row["ra"], row["dec"] = c.ra.to(u.deg), c.dec.to(u.deg)
    return row


# ============================================================ one entry point

#: Parallax precision from which the parallax distance (1/parallax) is preferred over the
#: spectroscopic one for space velocities (common practice: 1/plx is unbiased enough at >5 sigma).
PARALLAX_MIN_SNR = 5.0


def _get(mapping, key, unit=None):
    """Value of ``key`` in a dict as float in ``unit`` (Quantity or number), or None."""
    if not mapping:
        return None
    val = mapping.get(key)
    if val is None:
        return None
    if np.ma.is_masked(val):
        return None
    try:
        out = float(val.value if isinstance(val, u.Quantity) else val) if unit is None else _as_float(val, unit)
    except (TypeError, ValueError, u.UnitsError):
        return None
    return out if out is not None and math.isfinite(out) else None


def _class_probs(classification, notes):
    probs = classification.get("lumclass_prob")
    if probs:
        try:
            return _normalise_probs(probs)
        except ValueError as err:
            notes.append(f"lumclass_prob unusable ({err}); using lumclass")
    lum = classification.get("lumclass")
    if lum:
        try:
            return {lumclass_number(lum): 1.0}
        except ValueError:
            notes.append(f"luminosity class {lum!r} not understood")
    return None


#: Units of the plain floats :func:`derive` returns (their keys also carry them: ``_k``, ``_pc``...).
DERIVED_UNITS = {
    "teff_k": "K", "teff_err_k": "K", "teff_color_k": "K", "teff_color_err_k": "K",
    "m_v_abs": "mag", "m_v_abs_err": "mag", "a_v": "mag",
    "distance_pc": "pc", "distance_err_pc": "pc", "distance_lo_pc": "pc", "distance_hi_pc": "pc",
    "distance_parallax_pc": "pc",
    "v_total_kms": "km / s", "v_total_err_kms": "km / s", "v_tangential_kms": "km / s",
}


def derive(classification, velocity=None, photometry=None, spectrum=None, escape_speed=ESCAPE_SPEED, r_v=3.1):
    """Physical quantities of one star from its classification, velocity, photometry and spectrum.

    Parameters
    ----------
    classification : dict
        Result of :func:`specan.classify`: keys ``code`` (numeric type), ``subclass_err``,
        ``lumclass``, ``lumclass_prob`` (class -> probability), ...
    velocity : dict, optional
        Result of ``specan.velocity.measure``: ``rv``, ``rv_err`` (Quantity km/s), ``frame``, ...
    photometry : dict, optional
        One row of :func:`load_photometry` (``v``, ``v_err``, ``ebv``, ``ebv_err``,
        ``parallax``, ``pmra``, ``pmdec``, ``ra``, ``dec`` and errors; Quantities or
        plain numbers in mag, mas, mas/yr, deg).
    spectrum : specutils.Spectrum, optional
        For a colour temperature (only if its flux unit is a spectral flux density)
        and for the pointing when the photometry has no ra/dec.
    escape_speed : Quantity, optional
        For ``unbound_candidate`` (default 533 km/s, Piffl et al. 2014, from memory).
    r_v : float, optional
        A_V = r_v E(B-V) (3.1, common practice).

    Returns
    -------
    dict
        JSON-ready plain floats (units in the key names) or None where the inputs
        do not allow a value: ``teff_k``, ``teff_err_k`` (class-probability mixture
        of the type's Teff), ``teff_color_k``, ``teff_color_err_k``, ``m_v_abs``,
        ``m_v_abs_err`` (mixture from type and class; no photometry needed),
        ``a_v``, ``distance_pc``, ``distance_err_pc``, ``distance_lo_pc``,
        ``distance_hi_pc``, ``distance_parallax_pc``, ``v_total_kms``,
        ``v_total_err_kms``, ``v_tangential_kms``, ``unbound_basis``, ``flags``
        (list of str) and ``notes`` (list of str, one sentence each).
    """
    out = {k: None for k in (
        "teff_k", "teff_err_k", "teff_color_k", "teff_color_err_k", "m_v_abs", "m_v_abs_err", "a_v",
        "distance_pc", "distance_err_pc", "distance_lo_pc", "distance_hi_pc", "distance_parallax_pc",
        "distance_source", "v_total_kms", "v_total_err_kms", "v_tangential_kms", "p_unbound", "unbound_basis")}
    flags, notes = [], []
    out["flags"], out["notes"] = flags, notes
    classification = classification or {}
    code = _get(classification, "code")
    code_err = _get(classification, "subclass_err")
    if code is not None and code_err is None:
        code_err = 0.0
        notes.append("no subclass error given: Teff and M_V carry the scales' scatter only")
    probs = _class_probs(classification, notes) if code is not None else None

    # --- Teff and M_V from the type: mixture over the class probabilities.
    if code is None:
        notes.append("no spectral type: no Teff, M_V or distance")
    else:
        mix = probs or {5: 1.0}
        if probs is None:
            notes.append("luminosity class unknown: Teff from the dwarf scale, no M_V or distance")
        w = list(mix.values())
        given = _get(classification, "teff", u.K), _get(classification, "teff_err", u.K)
        if None not in given:
            # specan.classify already gives this same class-probability mixture of the scales
            out["teff_k"], out["teff_err_k"] = given
        else:
            t, te = zip(*[(a.to_value(u.K), b.to_value(u.K))
                          for a, b in (teff_from_type(code, n, code_err) for n in mix)])
            out["teff_k"], out["teff_err_k"] = _mixture(w, t, te)
        if probs is not None:
            mv = [absolute_magnitude(code, n, code_err) for n in probs]
            out["m_v_abs"], out["m_v_abs_err"] = _mixture(w, [a.to_value(u.mag) for a, _ in mv],
                                                          [b.to_value(u.mag) for _, b in mv])

    # --- reddening
    ebv = _get(photometry, "ebv", u.mag)
    ebv_err = _get(photometry, "ebv_err", u.mag) or 0.0
    if ebv is not None:
        out["a_v"] = r_v * ebv

    # --- colour temperature (flux-calibrated spectra only)
    if spectrum is not None:
        unit = spectrum.flux.unit
        calibrated = unit.physical_type != "dimensionless" and (
            unit.is_equivalent(_FLAMBDA, u.spectral_density(1 * u.AA))
            or (unit * u.sr).is_equivalent(_FLAMBDA, u.spectral_density(1 * u.AA)))
        if not calibrated:
            notes.append(f"flux unit '{unit}' is not a calibrated flux density: no colour temperature")
        else:
            try:
                tc, tce = colour_temperature(spectrum, ebv=ebv or 0.0, ebv_err=ebv_err, r_v=r_v)
                out["teff_color_k"] = float(tc.to_value(u.K))
                out["teff_color_err_k"] = float(tce.to_value(u.K))
                if ebv is None:
                    notes.append("colour temperature not corrected for reddening (no E(B-V))")
            except AnalysisError as err:
                notes.append(f"no colour temperature: {err.reason}")
    if out["teff_color_k"] is not None and out["teff_k"] is not None:
        tc, ts = out["teff_color_k"], out["teff_k"]
        comb = math.hypot(out["teff_color_err_k"] or 0.0, out["teff_err_k"] or 0.0)
        # Disagree: more than 2 combined sigma AND more than 10 per cent apart (our convention).
        if abs(tc - ts) > 2 * comb and abs(tc - ts) > 0.1 * ts:
            flags.append("teff_colour_disagrees")
            why = ("reddening not (fully) corrected or flux calibration too red" if tc < ts
                   else "reddening over-corrected or flux calibration too blue")
            if tc > ts and ts > 7500:
                # Measured on the JHC (1984) library: A stars' optical colour temperatures run 1.2-3x Teff.
                why += ("; for A and hotter stars the optical (Paschen) continuum is steeper than a "
                        "Planck curve at Teff, so a higher colour temperature is expected")
            notes.append(f"colour temperature {tc:.0f} K vs {ts:.0f} K from the type: {why}?")

    # --- spectroscopic distance
    v = _get(photometry, "v", u.mag)
    if photometry and v is None:
        notes.append("no V magnitude in the photometry: no distance")
    if v is not None and code is not None and probs is not None:
        res = spectroscopic_distance(v, _get(photometry, "v_err", u.mag) or 0.0, code, code_err, probs,
                                     ebv=ebv, ebv_err=ebv_err, r_v=r_v)
        out["distance_pc"] = float(res["distance"].to_value(u.pc))
        out["distance_err_pc"] = float(res["distance_err"].to_value(u.pc))
        out["distance_lo_pc"] = float(res["distance_lo"].to_value(u.pc))
        out["distance_hi_pc"] = float(res["distance_hi"].to_value(u.pc))
        out["a_v"] = float(res["a_v"].to_value(u.mag))
        out["distance_source"] = "spectroscopic"
        notes.extend(res["notes"])

    # --- parallax
    plx = _get(photometry, "parallax", u.mas)
    plx_err = _get(photometry, "parallax_err", u.mas)
    plx_good = plx is not None and plx > 0 and plx_err is not None and plx_err > 0 and plx / plx_err >= PARALLAX_MIN_SNR
    if plx is not None and plx > 0:
        out["distance_parallax_pc"] = 1000.0 / plx
        if out["distance_pc"] is not None and plx_err:
            # Compare in parallax space, where the parallax error is Gaussian.
            spec_plx = 1000.0 / out["distance_pc"]
            spec_plx_err = spec_plx * out["distance_err_pc"] / out["distance_pc"]
            if abs(plx - spec_plx) > 3 * math.hypot(plx_err, spec_plx_err):
                flags.append("distance_parallax_disagree")
                notes.append(f"spectroscopic distance {out['distance_pc']:.0f} pc disagrees with parallax "
                             f"{plx:.3f} +- {plx_err:.3f} mas: check the class, photometry or binarity")

    # --- space velocity
    pmra, pmdec = _get(photometry, "pmra", u.mas / u.yr), _get(photometry, "pmdec", u.mas / u.yr)
    rv = _get(velocity, "rv", u.km / u.s)
    ra, dec = _get(photometry, "ra", u.deg), _get(photometry, "dec", u.deg)
    if (ra is None or dec is None) and spectrum is not None:
        from ..obsinfo import get_info

        info = get_info(spectrum)
        if info.ra_deg is not None and info.dec_deg is not None:
            c = info.coord.icrs
            ra, dec = float(c.ra.deg), float(c.dec.deg)
    if plx_good:
        dist, dist_err, dsrc = 1000.0 / plx, 1000.0 * plx_err / plx**2, "parallax"
    elif out["distance_pc"] is not None:
        dist, dist_err, dsrc = out["distance_pc"], out["distance_err_pc"], "spectroscopic"
    else:
        dist = dist_err = dsrc = None
    missing = [name for name, val in (("proper motion", pmra if pmdec is not None else None),
                                      ("distance", dist), ("radial velocity", rv),
                                      ("position", ra if dec is not None else None)) if val is None]
    if missing:
        notes.append("no total space velocity (missing: " + ", ".join(missing) + "); "
                     "any unbound flag from the velocity stage rests on the radial velocity alone")
    else:
        frame = (velocity or {}).get("frame")
        if frame and str(frame).lower() not in ("barycentric", "heliocentric"):
            notes.append(f"radial velocity is {frame}, used as heliocentric for the space velocity")
        pmra_e = _get(photometry, "pmra_err", u.mas / u.yr)
        pmdec_e = _get(photometry, "pmdec_err", u.mas / u.yr)
        rv_e = _get(velocity, "rv_err", u.km / u.s)
        sv = space_velocity(
            ra * u.deg, dec * u.deg, dist * u.pc, pmra * u.mas / u.yr, pmdec * u.mas / u.yr, rv * u.km / u.s,
            distance_err=dist_err * u.pc if dist_err else None,
            pmra_err=None if pmra_e is None else pmra_e * u.mas / u.yr,
            pmdec_err=None if pmdec_e is None else pmdec_e * u.mas / u.yr,
            rv_err=None if rv_e is None else rv_e * u.km / u.s,
            escape_speed=escape_speed)
        out["v_total_kms"] = float(sv["v_total"].to_value(u.km / u.s))
        out["v_tangential_kms"] = float(sv["v_tangential"].to_value(u.km / u.s))
        if sv["v_total_err"] is not None:
            out["v_total_err_kms"] = float(sv["v_total_err"].to_value(u.km / u.s))
        out["p_unbound"] = sv["p_unbound"]
        out["unbound_basis"] = sv["unbound_basis"]
        notes.append(f"space velocity with the {dsrc} distance; {GALACTOCENTRIC_PARAMETERS}")
        if sv["unbound_candidate"]:
            flags.append("unbound_candidate")
            notes.append(f"unbound_candidate: total Galactic rest-frame speed {out['v_total_kms']:.0f} km/s "
                         f"exceeds the escape speed {sv['escape_speed'].to_value(u.km / u.s):.0f} km/s")
    return out
