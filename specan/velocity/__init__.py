"""Radial velocities: cross-correlation, barycentric correction, honest errors, flags.

Method (Tonry & Davis 1979, AJ 84, 1511): the continuum-normalised spectrum and a
template are put on one grid uniform in ln(vacuum wavelength), where a Doppler
shift is a translation. The spectrum (minus its weighted mean) is apodised by
a cosine taper at its ends and around masked gaps (tellurics, bad pixels,
emission spikes); the template (minus its continuum) extends beyond the
spectrum by the velocity search range, so no lag loses data, and every lag is
normalised by the overlap actually used (a zero-normalised correlation: means
and energies of both sides over the overlap). All correlations are FFT products;
the peak is refined by evaluating the correlation as a Fourier series at
fractional lags (band-limited interpolation, no parabola "peak locking").

Before correlating, both sides lose their low frequencies (a Gaussian of
``highpass`` resolution elements is smoothed out: Tonry & Davis' filter, done in
pixel space): broad bands, Balmer wings and continuum residuals then neither
dominate the correlation nor make its noise correlated over many lags.

Errors: ``rv_err_td`` is the Tonry & Davis r-statistic estimate, written
``w / (2.3548 r)`` with ``r = h / (sqrt 2 sigma_a)`` (see
:func:`~specan.velocity.uncertainty.tonry_davis` for why not their 3/8 w/(1+r));
``rv_err_mc`` re-measures the velocity after adding noise
with the spectrum's own error array (or the DER_SNR noise, Stoehr et al. 2008)
``n_resample`` times: for an estimator linear in the noise the scatter of those
velocities about the measured one equals its error. ``rv_err`` is the larger.

Velocities are relativistic Doppler velocities, 1 + z = sqrt((1 + b)/(1 - b)).
Barycentric correction: astropy's ``SkyCoord.radial_velocity_correction``
(``v_corr``, defined so that redshifts compose), combined as
(1 + z_bary) = (1 + z_topo)(1 + v_corr/c), i.e. the issue's
(1 + v_b/c) = (1 + v_obs/c)(1 + v_corr/c) written for redshifts.

Modules, in the order :func:`measure` uses them: :mod:`.grid` (the observed side on the
ln-lambda grid, the lag window, the high-pass and taper), :mod:`.prepared` (templates on the
set-up's extended grid), :mod:`.correlation` (the normalised FFT correlation, its peak and the
CCF about it), :mod:`.choice` (resolving power and template choice), :mod:`.uncertainty`
(Tonry & Davis and resampling errors), :mod:`.companion` (second peak, two-component fit),
:mod:`.frame_velocities` (template velocity, barycentric, Galactic rest frame) and
:mod:`.result` (flags and the result dict).
"""

from __future__ import annotations

import astropy.units as u

from ..doppler import doppler_factor, shift_to_rest, velocity_from_factor
from ..frames import ESCAPE_SPEED, HIGH_VELOCITY, barycentric_correction, galactic_rest_frame_velocity
from .choice import choose_template, parse_template, settle_resolving_power
from .companion import detect_companion
from .correlation import PeakSearch, ccf_about_peak, correlate, observed_side
from .frame_velocities import apply_frames
from .grid import lag_window, normalised, observe_on_grid
from .result import result_dict, velocity_flags
from .uncertainty import estimate_errors, reported_error, tonry_davis

__all__ = [
    "measure",
    "barycentric_correction",
    "shift_to_rest",
    "doppler_factor",
    "velocity_from_factor",
    "galactic_rest_frame_velocity",
    "HIGH_VELOCITY",
    "ESCAPE_SPEED",
]


def measure(spectrum, template=None, *, reference=None, template_rv=0 * u.km / u.s, vmax=2000 * u.km / u.s,
            errors="both", n_resample=40, seed=0, telluric=True, clip_emission=True, barycentric=True,
            high_velocity=HIGH_VELOCITY, escape_speed=ESCAPE_SPEED, min_overlap=0.3,
            composite_min_ratio=0.25, composite_min_sigma=6.0, template_grid=None, highpass=8.0):
    """Radial velocity of one spectrum by FFT cross-correlation.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum; normalised with :func:`specan.prepare.prepare` if not yet.
    template : None, str, path or specutils.Spectrum
        ``None``/``"auto"``: the built-in synthetic grid (O-M, at the spectrum's
        resolution and in its medium), best normalised correlation wins;
        ``"G2 V"`` (or ``"synth:G2 V"``): one synthetic type; ``"mask"`` /
        ``"mask:K0 III"``: a weighted line mask from the line list (of the best
        synthetic type if none given); a file path or a Spectrum: a user template
        (e.g. an RV standard; its velocity is ``template_rv``).
    reference : specutils.Spectrum or path, optional
        A reference exposure of the same star: the result is the velocity relative
        to it (flag ``relative``), barycentric if both exposures have the metadata.
    template_rv : astropy.units.Quantity
        Barycentric velocity of a user template (0: at rest).
    vmax : astropy.units.Quantity
        Velocity search range +-vmax.
    errors : {"both", "td", "mc"}
        Which error estimates to compute.
    n_resample : int
        Noise realisations for the empirical error.
    seed : int
        Seed of those realisations.
    telluric, clip_emission : bool
        Mask telluric bands / exclude pixels well above the continuum.
    barycentric : bool
        Compute the barycentric correction when the metadata allow.
    high_velocity, escape_speed : astropy.units.Quantity
        Thresholds on |v_GRF| of the ``high_velocity`` and ``unbound_candidate`` flags.
    min_overlap : float
        Smallest fraction of the spectrum's weight a lag may use.
    composite_min_ratio, composite_min_sigma : float
        A second peak (after removing the expected single-star shape) is significant when
        above this fraction of the main peak and this many CCF noise sigmas.
    template_grid : sequence of (sptype, lumclass), optional
        Types tried by the automatic choice (default ``synth.TEMPLATE_TYPES``).
    highpass : float or None
        Low-frequency cut: a Gaussian of this sigma, in resolution elements, is smoothed out
        of spectrum and template (continuum residuals, band and wing shapes); None disables.

    Returns
    -------
    dict
        ``rv``, ``rv_err``, ``frame`` ("barycentric" | "topocentric"), ``rv_topo``,
        ``bary_corr``, ``v_grf`` (Quantities in km/s or None), ``template`` (name),
        ``ccf_height``, ``flags`` (list of str), ``second_peak_rv``, ``rv_err_td``,
        ``rv_err_mc``, ``notes`` (list of str), plus ``template_scores`` (name -> peak
        height of the automatic choice), ``ccf_fwhm``, ``r_td``, ``z_bary`` and the
        normalised CCF about the peak, ``ccf`` against topocentric ``ccf_velocity``.
    """
    if errors not in ("both", "td", "mc"):
        raise ValueError(f"errors must be 'both', 'td' or 'mc', not {errors!r}")
    notes = []
    spectrum = normalised(spectrum, notes)
    observed = observe_on_grid(spectrum, telluric=telluric, clip_emission=clip_emission, notes=notes)
    where = observed.info.path
    power = settle_resolving_power(observed, spectrum, notes)
    lags = lag_window(observed, vmax, power.value, highpass)
    search = PeakSearch(observed_side(observed, lags), lags, min_overlap)
    choice = choose_template(parse_template(template), search, power, reference=reference, template_rv=template_rv,
                             template_grid=template_grid, clip_emission=clip_emission, notes=notes, where=where)
    corr, peak = correlate(search, choice.template, where)
    about = ccf_about_peak(corr, choice.template, observed.valid, search.side.weight, lags, peak)
    td = tonry_davis(about, peak)
    errs = estimate_errors(errors, td, peak, observed, search, choice.template, n_resample, seed, notes)
    companion = detect_companion(about, peak, td.sigma_a, lags.smax, composite_min_ratio, composite_min_sigma, notes)
    frames = apply_frames(companion, lags.step, choice.template, observed.info, relative=choice.relative,
                          barycentric=barycentric, high_velocity=high_velocity, escape_speed=escape_speed, notes=notes)
    flags = velocity_flags(choice.relative, companion, frames, lags.vmax_kms, peak.height, notes)
    rv_err = reported_error(errs, notes)
    return result_dict(choice, peak, about, td, errs, rv_err, companion, frames, flags, notes, lags.step)
