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
dominate the correlation nor make its noise correlated over many lags. Where the automatic
choice's correlation is broader than the stated resolving power allows (a nominal R in the header,
a wide slit: :func:`~.choice.seen_resolving_power`, more than :data:`~.choice.BROADER_THAN_STATED`
coarser), filter and templates are set at the resolution it shows and the velocity measured again
(``resolving_power_source`` :data:`~.choice.SEEN_SOURCE`, and a note).

Templates: with no template given every built-in template is scored in one batch (the empirical
library and the synthetic grid, :mod:`.bank`); the velocity is the weighted mean of those whose
peaks come close to the best, so a star between two templates does not jump from one to the
other with the noise.

Errors (:func:`~specan.velocity.uncertainty.error_budget`): ``rv_err`` combines
``rv_err_noise``, the propagation of the pixel errors through every step of the measurement
(no random numbers); ``rv_err_mismatch``, the scatter of the velocities of independent
wavelength segments against the same template beyond their noise (Birge ratio: template
mismatch differs from line to line); ``rv_err_choice``, the spread of the averaged templates'
velocities; and ``rv_err_zero_point``, the library templates' own rest-frame uncertainty.
``rv_err_td`` (Tonry & Davis r statistic, written ``w / (2.3548 r)`` with
``r = h / (sqrt 2 sigma_a)``, see :func:`~specan.velocity.uncertainty.tonry_davis`) and, on
request, ``rv_err_mc`` (the scatter over ``n_resample`` noise realisations, seeded from the
spectrum's content) are reported beside it.

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

from typing import NamedTuple

import astropy.units as u
import numpy as np

from ..doppler import doppler_factor, shift_to_rest, velocity_from_factor
from ..frames import ESCAPE_SPEED, HIGH_VELOCITY, barycentric_correction, galactic_rest_frame_velocity
from .bank import refine_peaks, short_length, short_side
from .choice import (BROADER_THAN_STATED, SEEN_SOURCE, ResolvingPower, choose_template, parse_template,
                     seen_resolving_power, settle_resolving_power)
from .companion import Companion, detect_companion
from .correlation import Correlation, Peak, PeakSearch, ccf_about_peak, observed_side
from .frame_velocities import apply_frames
from .grid import kms_per_pixel, lag_window, normalised, observe_on_grid
from .result import RESULT_UNITS, assumption_flags, result_dict, velocity_flags
from .uncertainty import error_budget, estimate_errors, segment_errors, tonry_davis, zero_point_error

__all__ = [
    "measure",
    "RESULT_UNITS",
    "barycentric_correction",
    "shift_to_rest",
    "doppler_factor",
    "velocity_from_factor",
    "galactic_rest_frame_velocity",
    "HIGH_VELOCITY",
    "ESCAPE_SPEED",
    "BROADER_THAN_STATED",
    "SEEN_SOURCE",
]


def measure(spectrum, template=None, *, reference=None, template_rv=0 * u.km / u.s, vmax=2000 * u.km / u.s,
            errors="auto", n_resample=40, seed=0, telluric=True, clip_emission=True, barycentric=True,
            high_velocity=HIGH_VELOCITY, escape_speed=ESCAPE_SPEED, min_overlap=0.3,
            composite_min_ratio=0.25, composite_min_sigma=6.0, template_grid=None, highpass=8.0,
            exclude_templates=()):
    """Radial velocity of one spectrum by FFT cross-correlation.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum; normalised with :func:`specan.prepare.prepare` if not yet.
    template : None, str, path or specutils.Spectrum
        ``None``/``"auto"``: every built-in template (the empirical library where it covers
        the spectrum, and the synthetic grid, at the spectrum's resolution and in its medium)
        is scored; the velocity is the weighted mean over those that correlate nearly as well
        as the best; ``"library:<name>"``, ``"G2 V"`` (or ``"synth:G2 V"``): one built-in
        template; ``"synth"``: the best synthetic type; ``"mask"`` / ``"mask:K0 III"``: a
        weighted line mask from the line list (of the best synthetic type if none given); a file
        path or a Spectrum: a user template (e.g. an RV standard; its velocity is ``template_rv``).
    reference : specutils.Spectrum or path, optional
        A reference exposure of the same star: the result is the velocity relative
        to it (flag ``relative``), barycentric if both exposures have the metadata.
    template_rv : astropy.units.Quantity
        Barycentric velocity of a user template (0: at rest).
    vmax : astropy.units.Quantity
        Velocity search range +-vmax.
    errors : {"auto", "both", "td", "mc"}
        Extra error estimates reported beside the error budget: "auto" and "td" the Tonry &
        Davis estimate, "both" and "mc" also noise resampling (``n_resample`` realisations).
    n_resample : int
        Noise realisations for the resampled error.
    seed : int
        Seed of those realisations (combined with the spectrum's own numbers).
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
        Synthetic types tried by the automatic choice (default ``synth.TEMPLATE_TYPES``); given,
        the choice is among synthetic types only.
    highpass : float or None
        Low-frequency cut: a Gaussian of this sigma, in resolution elements, is smoothed out
        of spectrum and template (continuum residuals, band and wing shapes); None disables.
        Resolution elements of the stated R, or of the one the correlation shows where that is
        coarser (see the module's description).
    exclude_templates : sequence of str
        Library template names the automatic choice must not use (e.g. a group the star
        belongs to, when testing on library stars).

    Returns
    -------
    dict
        ``rv``, ``rv_err`` (the error budget's total: noise, template mismatch, template choice
        and zero point), ``frame`` ("barycentric" | "topocentric"), ``rv_topo``, ``bary_corr``,
        ``v_grf`` (Quantities in km/s or None), ``template`` (the best template's name),
        ``template_type``, ``template_kind``, ``templates`` (those averaged: name, kind, type,
        weight, velocity), ``ccf_height``, ``flags`` (list of str), ``second_peak_rv``, the
        error parts ``rv_err_noise``, ``rv_err_template``, ``rv_err_mismatch``,
        ``rv_err_choice``, ``rv_err_zero_point`` and ``birge_ratio``, ``n_segments``,
        ``rv_err_td``, ``rv_err_mc`` (None unless asked), ``medium_assumed`` and
        ``medium_shift`` (the velocity change if the other medium were right), ``notes``, plus
        ``template_scores`` (name -> peak height of the automatic choice), ``ccf_fwhm``,
        ``r_td``, ``z_bary`` and the normalised CCF about the peak, ``ccf`` against topocentric
        ``ccf_velocity``.
    """
    if errors not in ("auto", "both", "td", "mc"):
        raise ValueError(f"errors must be 'auto', 'both', 'td' or 'mc', not {errors!r}")
    notes = []
    spectrum = normalised(spectrum, notes)
    observed = observe_on_grid(spectrum, telluric=telluric, clip_emission=clip_emission, notes=notes)
    power = settle_resolving_power(observed, spectrum, notes)
    request = parse_template(template)
    options = dict(reference=reference, template_rv=template_rv, template_grid=template_grid,
                   clip_emission=clip_emission, where=observed.info.path, exclude=tuple(exclude_templates))
    first = list(notes)
    run = _correlated(observed, power, vmax, highpass, min_overlap, request, options, first)
    seen = seen_resolving_power(run.choice, run.about, observed)
    # the automatic choice only: against one template named by the caller a mismatch widens the CCF
    # too (the Kurucz Sun against library K7 V at R 1000 read R ~700 and moved +10 to +18 km/s, measured)
    if request.kind == "auto" and power.source == "file" and seen is not None and seen * BROADER_THAN_STATED < power.value \
            and not _two_peaks(run, composite_min_ratio, composite_min_sigma):
        # the lines are broader than the stated R says (a nominal R in the header, a wide slit, a
        # fast rotator): a high-pass and templates set at the stated R would strip and sharpen what
        # the data have; both set at the resolution the correlation's own width shows instead
        notes.append(f"lines broader than the stated resolving power R {power.value:.0f}: the correlation's "
                     f"width shows R ~ {seen:.0f}; the low-frequency filter and the templates are set for that")
        # two significant figures: spectra of one set-up share the templates made at it
        power = ResolvingPower(float(f"{seen:.2g}"), True, SEEN_SOURCE)
        run = _correlated(observed, power, vmax, highpass, min_overlap, request, options, notes)
    else:
        notes[:] = first
    lags, search, choice, peaks, best, peak, about = run
    td = tonry_davis(about, peak)
    errs = estimate_errors(errors, td, peak, observed, search, best, n_resample, seed, notes)
    resels = observed.n_data * lags.step * choice.power.value   # the data's span, not the grid's padding
    # the segments of the average over the templates that carry most of its weight (the best always)
    heavy = [(m.template, p.lag, m.weight) for i, (m, p) in enumerate(zip(choice.mixture, peaks))
             if i == 0 or m.weight >= 0.2]
    segments = segment_errors(observed, search, heavy, short_length(lags), resels)
    companion = detect_companion(about, peak, td.sigma_a, lags.smax, composite_min_ratio, composite_min_sigma, notes)
    weights = [m.weight for m in choice.mixture]
    mean_lag = sum(w * p.lag for w, p in zip(weights, peaks))
    spread_px = sum(w * (p.lag - mean_lag) ** 2 for w, p in zip(weights, peaks)) ** 0.5
    if companion.second is None:
        companion = Companion(mean_lag, None)
    frames = apply_frames(companion, lags.step, best, observed.info, relative=choice.relative,
                          barycentric=barycentric, high_velocity=high_velocity, escape_speed=escape_speed, notes=notes)
    dvds = abs(kms_per_pixel(companion.primary, lags.step))
    noise_kms = segments.noise_px * dvds
    if not (noise_kms > 0):  # propagation failed (no curvature): the resampled or Tonry-Davis error
        noise_kms = next((e for e in (errs.mc, errs.td) if e is not None and e > 0), float("nan"))
        notes.append("noise error from the correlation noise (propagation through the segments failed)")
    budget = error_budget(noise_kms, segments.birge, spread_px * dvds, zero_point_error(choice.mixture))
    notes.append(f"error budget: noise {budget.noise:.3g} (pixel errors: {observed.noise_source}), template mismatch {budget.mismatch:.3g} (Birge ratio "
                 f"{segments.birge:.2f} of {segments.n} wavelength segments), template choice {budget.choice:.3g}, "
                 f"template zero point {budget.zero_point:.3g} km/s")
    flags = velocity_flags(choice.relative, companion, frames, lags.vmax_kms, peak.height, notes)
    flags += assumption_flags(spectrum, observed.info, notes)
    return result_dict(choice, peak, peaks, about, td, errs, budget, segments, companion, frames, flags, notes,
                       lags.step, spectrum)


class _Run(NamedTuple):
    """One correlation of the spectrum at one resolving power: the lag window, the peak search, the
    template choice, the refined peaks of its templates (the best first) and the CCF about the best's."""

    lags: object
    search: PeakSearch
    choice: object
    peaks: list
    best: object
    peak: Peak
    about: object


def _correlated(observed, power, vmax, highpass, min_overlap, request, options, notes):
    """:class:`_Run` of ``observed`` with the high-pass and the built-in templates at ``power``."""
    lags = lag_window(observed, vmax, power.value, highpass)
    search = PeakSearch(observed_side(observed, lags), lags, min_overlap)
    data_short = short_side(search)
    choice = choose_template(request, search, power, notes=notes, data_short=data_short, **options)
    peaks = _refined_peaks(search, choice.mixture, data_short, options["where"])
    best, peak = choice.mixture[0].template, peaks[0]
    corr = Correlation(search.side.arrays, best, lags.pad, lags.m, search.side.ffts)
    about = ccf_about_peak(corr, best, observed.valid, search.side.weight, lags, peak)
    return _Run(lags, search, choice, peaks, best, peak, about)


def _two_peaks(run, min_ratio, min_sigma):
    """Whether the CCF of ``run`` holds a second star: a blended pair widens the CCF as broad lines
    do, and is no reason to blunt the templates (that merged the two peaks of a pair two
    resolution elements apart, tests/test_velocity.py)."""
    td = tonry_davis(run.about, run.peak)
    return detect_companion(run.about, run.peak, td.sigma_a, run.lags.smax, min_ratio, min_sigma, []).second is not None


def _refined_peaks(search, mixture, data_short, where):
    """The refined :class:`~.correlation.Peak` of every template of the mixture (its integer peak
    found by a full correlation where the choice did not give it)."""
    from ..errors import AnalysisError
    from .correlation import integer_peak

    lags = search.lags
    found = []
    for member in mixture:
        lag = member.lag
        if lag is None:
            corr = Correlation(search.side.arrays, member.template, lags.pad, lags.m, search.side.ffts)
            pk = integer_peak(corr, lags.pad, lags.smax, search.min_overlap, search.side.total_weight)
            if pk is None or not np.isfinite(pk[1]) or pk[1] <= 0:
                raise AnalysisError(f"no correlation peak with template {member.template.name}", where)
            lag = pk[0]
        found.append(lag)
    # where the scoring gave every template's fractional peak, the refinement starts there
    starts = [m.start for m in mixture]
    starts = None if any(st is None for st in starts) else starts
    x, h, c = refine_peaks([m.template for m in mixture], found, data_short, short_length(lags), lags.pad, starts)
    out = [Peak(float(a), float(b), float(d)) for a, b, d in zip(x, h, c)]
    if not (np.isfinite(out[0].height) and out[0].height > 0):
        raise AnalysisError(f"no correlation peak with template {mixture[0].template.name}", where)
    return out
