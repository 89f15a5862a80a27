"""Colour temperature: a Planck fit to continuum windows of a flux-calibrated spectrum.

The flux is brought to F_lambda, dereddened with the Fitzpatrick (1999) law, reduced
to one continuum point per window and fitted with ``scale * B_lambda(T)``.
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np

from ..errors import AnalysisError

__all__ = ["DEFAULT_WINDOWS", "EXTINCTION_LAW", "colour_temperature", "is_flux_density"]

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

#: Temperature range of the Planck fit (K); a fit that runs to either end is refused.
_T_BOUNDS = (1500.0, 100000.0)


def is_flux_density(unit):
    """Whether a flux unit is a calibrated spectral flux density (F_lambda, F_nu, or either per steradian).

    Parameters
    ----------
    unit : astropy.units.UnitBase

    Returns
    -------
    bool
    """
    return unit.physical_type != "dimensionless" and (
        unit.is_equivalent(_FLAMBDA, u.spectral_density(1 * u.AA))
        or (unit * u.sr).is_equivalent(_FLAMBDA, u.spectral_density(1 * u.AA)))


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


def _clipped_line(x, y, min_pixels):
    """Straight line through (x, y) about x.mean(), low points clipped; its polyfit coefficients.

    Absorption lines only push flux down, so the clipping is one-sided (points
    more than 2 robust sigma below the line are dropped, 5 passes). The loop is
    written here because the clipping is about the fitted line, refitted each
    pass; astropy's ``sigma_clip`` clips about a central value of the data.
    """
    from astropy.stats import mad_std

    keep = np.ones(x.size, bool)
    for _ in range(5):
        coef = np.polyfit(x[keep] - x.mean(), y[keep], 1)
        resid = y - np.polyval(coef, x - x.mean())
        sig = mad_std(resid[keep])   # robust sigma (1.4826 x median absolute deviation)
        new = resid > -2.0 * sig if sig > 0 else keep
        if new.sum() < min_pixels or np.array_equal(new, keep):
            break
        keep = new
    return coef


def _window_points(wave, flux, good, windows, min_pixels=5):
    """One continuum point per window: the clipped straight line taken at the window centre."""
    pts = []
    for lo, hi in windows:
        sel = good & (wave >= lo) & (wave <= hi)
        if sel.sum() < min_pixels:
            continue
        x, y = wave[sel], flux[sel]
        coef = _clipped_line(x, y, min_pixels)
        centre = 0.5 * (lo + hi)
        level = np.polyval(coef, centre - x.mean())
        if level > 0 and np.isfinite(level):
            pts.append((centre, level))
    return np.array(pts).reshape(-1, 2)


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


def _good_pixels(spectrum, wave, flux, law):
    """Finite, positive, unmasked pixels inside the extinction law's validity range."""
    good = np.isfinite(wave) & np.isfinite(flux) & (flux > 0)
    if spectrum.mask is not None:
        good &= ~np.asarray(spectrum.mask, bool)
    # Keep to the law's validity range (x = 1/lambda in 1/um).
    lam_lo, lam_hi = 1e4 / law.x_range[1], 1e4 / law.x_range[0]
    return good & (wave > lam_lo) & (wave < lam_hi)


def _windows_in_range(windows, wave_range):
    """Windows as (lo, hi) floats in Angstrom, keeping those inside ``wave_range`` when it is given."""
    wins = [(float(u.Quantity(lo, u.AA).value), float(u.Quantity(hi, u.AA).value))
            for lo, hi in (windows if windows is not None else DEFAULT_WINDOWS)]
    if wave_range is not None:
        rlo, rhi = (float(u.Quantity(v, u.AA).value) for v in wave_range)
        wins = [(lo, hi) for lo, hi in wins if lo >= rlo and hi <= rhi]
    return wins


def _fit_dereddened(wave, flux, good, wins, law, ebv):
    """Window points of the flux dereddened for ``ebv`` and their Planck fit (see :func:`_planck_fit`)."""
    f = flux
    if ebv:
        f = flux / law.extinguish(np.where(good, wave, 5500.0) * u.AA, Ebv=ebv)
    pts = _window_points(wave, f, good, wins)
    if len(pts) < 3:
        raise AnalysisError(f"only {len(pts)} usable continuum windows (need 3) for a colour temperature")
    return pts, _planck_fit(pts[:, 0], pts[:, 1])


def _check_within_bounds(t):
    """Refuse a fit that ran to the temperature bounds."""
    if t > 0.98 * _T_BOUNDS[1] or t < 1.02 * _T_BOUNDS[0]:
        raise AnalysisError(f"colour temperature fit ran to its bound ({t:.0f} K): the continuum is "
                            "not Planck-like over these windows (over-corrected reddening, a hot star's "
                            "Rayleigh-Jeans tail, or flux calibration)")


def _temperature_error(t_err, chi2_red, ebv, ebv_err, refit):
    """Fit error scaled by the reduced chi-square, with the E(B-V) error in quadrature.

    ``refit(e)`` is the colour temperature for colour excess ``e``.
    """
    # Scale the covariance by the reduced chi-square: the weights were relative, not absolute errors.
    t_err = t_err * math.sqrt(max(chi2_red, 1e-30))
    if ebv_err > 0:
        t_hi = refit(ebv + ebv_err)
        t_lo = refit(max(ebv - ebv_err, 0.0))
        t_err = math.hypot(t_err, 0.5 * abs(t_hi - t_lo))
    return t_err if np.isfinite(t_err) else float("nan")


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
    law = F99(Rv=r_v)
    good = _good_pixels(spectrum, wave, flux, law)
    wins = _windows_in_range(windows, wave_range)
    notes = ["flux is dimensionless: taken as relative F_lambda"] if relative else []

    pts, (t, t_err, resid, dof, _) = _fit_dereddened(wave, flux, good, wins, law, ebv)
    _check_within_bounds(t)
    chi2_red = float(np.sum(resid**2) / dof)
    t_err = _temperature_error(t_err, chi2_red, ebv, ebv_err,
                               lambda e: _fit_dereddened(wave, flux, good, wins, law, e)[1][0])
    if t > 20000:
        notes.append("optical continuum near the Rayleigh-Jeans limit: colour temperature poorly constrained")
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
