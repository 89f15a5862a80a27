"""The observed side on the ln-lambda grid, the lag window, and the filters both sides share.

A spectrum is resampled onto a grid uniform in ln(vacuum wavelength), where a Doppler shift is
a translation; masked pixels (tellurics, bad pixels, emission spikes) are marked invalid and the
weights taper to zero at the ends and around gaps. Where the resolving power is stated the grid
has no more than :data:`GRID_PER_RESEL` points a resolution element, and where that is coarser
than the native pixels each grid point is the mean of their interpolant over its cell (the
templates are averaged alike), so that the coarser grid keeps the pixels' information. :class:`LagWindow` fixes, for one spectrum,
how far the lags reach and where (and on how many pixels) templates must be prepared so that no
lag loses data. The high-pass filter and the coverage taper are applied alike to the spectrum
and to every template.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import NamedTuple

import astropy.units as u
import numpy as np
from scipy import fft as sfft

from ..contents import content_key, forgettable, kept
from ..doppler import factor_kms
from ..doppler import velocity_kms as _kms
from ..errors import AnalysisError
from ..obsinfo import ObsInfo, get_info, wavelength_in

_KMS = u.km / u.s   # made once (composing a unit costs ~10 us)

__all__ = ["SPLINE_K", "not_a_knot", "COVER_TAPER", "FULL_COVER_MARGIN", "ObservedGrid", "TemplateGrid", "LagWindow", "normalised",
           "observe_on_grid", "lattice_step", "lag_window", "kms_per_pixel", "sigma_array", "hot_pixels",
           "noise_from_flux", "flux_pixel_noise", "fast_length", "turns", "distance_to_invalid",
           "dersnr_sigma", "gauss_smooth", "gauss_kernel", "smoothed_coverage", "highpass", "cover_taper", "cell_mean", "SplineOperators", "spline_operators",
           "NOISE_PROBES", "resampled_noise_variance"]

#: Order of the spline that resamples spectra onto the ln-lambda grid.
SPLINE_K = 3

#: Width (grid pixels) of the cosine taper at the edges of a template's coverage.
COVER_TAPER = 8
#: Grid steps are snapped down to a geometric lattice of 2^(1/16) (4.4% apart, still at least the
#: spectrum's own sampling), and grids start and end on whole blocks of GRID_BLOCK steps counted
#: from ln lambda = 0: spectra of one instrument set-up whose wavelength solutions differ by a
#: few pixels then share one grid, and with it the template banks built for it. Following each
#: spectrum's own pixels instead, an exposure with its own wavelength solution rebuilt every
#: template: 225 CPU ms a spectrum against 18 ms on shared pixels (bench_velocity.py --speed,
#: 4,000 pixels). The numbers are our choice.
STEP_LATTICE = 16
GRID_BLOCK = 128
#: Pixels beyond those a correlation uses over which a template's coverage must be exactly 1 for its
#: coverage sums to be taken as the data's own (``PreparedTemplate.covers``): the band-limited shift of a
#: coverage that steps down (a cosine over :data:`COVER_TAPER` pixels) departs from 1 by less than
#: 1e-5 this far from the step (5.8e-6 measured, fractional shifts to 1.5 pixels; checked in
#: tests/test_velocity_fast_path.py), and the data's weight is tapered where it would enter (our choice).
FULL_COVER_MARGIN = 24
#: Grid points per resolution element (FWHM) at least, where the resolving power is stated: a grid
#: following the finest native pixels is finer than that on most spectra (5.2 points at the red end
#: of R 2000 data sampled 2.5-4 pixels per FWHM); at 3 points a FWHM a Gaussian line profile's
#: transform is down to exp(-9 pi^2 / (16 ln 2)) = 3.3e-4 of its peak at the grid's Nyquist frequency
#: (1.5 / FWHM; the Gaussian's transform), and the grid's cells average the native pixels so that
#: their noise is not aliased into the band a point value would keep (our choice of 3).
GRID_PER_RESEL = 3


# ---------------------------------------------------------------------------
# Pixels, noise and the normalised spectrum
# ---------------------------------------------------------------------------
def sigma_array(spectrum):
    """The spectrum's 1-sigma errors as a float array, or None when it has none."""
    if spectrum.uncertainty is None:
        return None
    from astropy.nddata import StdDevUncertainty

    unc = spectrum.uncertainty
    # standard deviations already (what the readers make): their array as it is (a conversion to
    # the same kind costs a copy and the conversion machinery, ~0.1 ms a spectrum)
    if type(unc) is StdDevUncertainty:
        return np.asarray(unc.array, dtype=float)
    return np.asarray(unc.represent_as(StdDevUncertainty).array, dtype=float)


def hot_pixels(f, sig, bad):
    """Pixels above the continuum by 5 sigma and 5% (emission lines, cosmic rays), widened by 3 pixels.

    Emission lines and cosmic rays anti-correlate with an absorption template. The same rule
    is applied to a user template or reference exposure: a feature above the pseudo-continuum
    that both contain (a real continuum peak) must be excluded from both, or the high-pass
    filter sees it in one only and shifts the peak (a K1 I library spectrum against itself
    read 9.4 km/s instead of 0 when only the star was clipped, measured).
    """
    # (nan_to_num only where something is not finite: it copies and tests the array several times)
    sig = sig if np.isfinite(sig).all() else np.nan_to_num(sig, nan=np.inf)
    hot = (f > 1.0 + np.maximum(5.0 * sig, 0.05)) & ~bad
    if hot.any():
        hot = np.convolve(hot.astype(float), np.ones(7), mode="same") > 0
    return hot


def flux_pixel_noise(w, f, bad, info, noise_only=None):
    """(per-pixel noise, how it was measured) of a normalised spectrum without an error array.

    The estimate ``prepare`` makes for the S/N and the lines stage for their errors
    (:func:`specan.noise.flux_noise`: the white-noise plateau near Nyquist with the lines' leak
    removed, else DER_SNR per block where the pixels are correlated), on the same decision as
    ``prepare`` (``info.snr_flux_method``) where it ran; the telluric bands' pixels (``noise_only``)
    enter its plateau test. DER_SNR at the continuum (:func:`noise_from_flux`, used before) counted
    unresolved line structure as noise at high S/N and cut its own tails at S/N 10 (the Kurucz Sun,
    R 2000, photon noise: noise errors 2.2x too large at S/N 300, 0.5x at S/N 10, measured): a
    velocity error from one, the S/N and equivalent widths from another, disagreed on one spectrum.

    Photon noise is assumed in the lines (sigma as sqrt(flux), common practice for count-limited
    data): each block's level (a median over its pixels) is taken at the block's median flux. Where
    the flux shows no white-noise plateau (correlated pixels, or no noise found) the noise is
    :func:`noise_from_flux`'s, DER_SNR at the continuum, as before.
    """
    from ..noise import BLOCK, block_medians, correlated_pixels, kept_flux_noise, pixels_per_fwhm

    good = ~bad
    # (kept: the lines stage asks for the same estimate of the same pixels next)
    est = kept_flux_noise(f, good, pixels_per_fwhm(w, info.resolving_power),
                     correlated=correlated_pixels(info.snr_flux_method), noise_only=noise_only)
    if correlated_pixels(est.method) is not False or est.snr is None or not np.isfinite(est.sigma).any():
        # No white-noise plateau (pixels correlated, or a noiseless model whose line structure is all
        # there is): DER_SNR either way, and the one taken at the continuum, as before: flux_noise's
        # DER_SNR per block counts the lines as noise where they are dense, a weight that follows the
        # line density, not the noise (the noiseless Kurucz Sun, read so, chose synthetic G5 III / G8 I
        # and read -5.4 to -6.7 km/s instead of library G8 V's -0.5 to +1.6; the library templates'
        # members, MILES stars with smoothed noise, aligned differently by up to 16 km/s, measured)
        return noise_from_flux(f, bad), "DER_SNR at the continuum, scaled as sqrt(flux) (" + est.method + ")"
    level = np.clip(f, 0.05, None)
    n = f.size
    index = np.arange(n)
    # the block's median flux at its centre, interpolated (the blocks flux_noise measured its level on)
    # (all blocks' medians at once, np.median's values: specan.noise.block_medians)
    centres, medians, count = block_medians(level, good, BLOCK)
    use = count >= 8
    ref = np.interp(index, centres[use], medians[use]) if use.any() else np.ones(n)
    # The level along the spectrum as a smooth curve, ln sigma linear in the pixel index: the blocks'
    # own scatter (5-12% each, most in the line-rich blue) moved the weights with every noise
    # realisation, and with them the template mismatch's share of the velocity. Measured on the
    # Kurucz Sun, no error array, 12 realisations at one velocity, velocity scatter / noise error at
    # R 2000, S/N 300: 4.3 with the blocks' levels, 2.9 quadratic, 2.2 linear, 1.15 one level (1.09 with
    # the error array); with a noise 2x higher in the blue than in the red one level read the noise
    # error 15-20% low and scattered 1.4-2.2x it at S/N 30-300, linear 1.2-1.9x; a MILES K4 III star with
    # white noise added (S/N 30; normalised, several times noisier in the blue) scattered 3.5 km/s with
    # one level as its weights, 1.0 linear, 0.8 with its error array (our choice: linear)
    known = good & np.isfinite(est.sigma) & (est.sigma > 0)
    block = est.sigma
    if known.sum() >= 3 * BLOCK:
        x = (index - 0.5 * (n - 1)) / max(0.5 * (n - 1), 1.0)
        coef = np.polynomial.polynomial.polyfit(x[known][::8], np.log(est.sigma[known][::8]), 1)
        block = np.exp(np.polynomial.polynomial.polyval(x, coef))
    return block * np.sqrt(level / ref), est.method


def noise_from_flux(f, bad):
    """Per-pixel noise of a spectrum without errors: DER_SNR at the continuum, scaled as sqrt(flux)
    (the threshold a user template's emission spikes are clipped at; the observed spectrum's noise is
    :func:`flux_pixel_noise`)."""
    good_f = f[~bad]
    noise = dersnr_sigma(good_f) if good_f.size > 10 else np.nan
    # photon noise: sigma proportional to sqrt(flux) (common practice for count-limited data)
    return (noise if noise > 0 else np.nan) * np.sqrt(np.clip(f, 0.05, None))


def dersnr_sigma(flux):
    """Noise at the continuum by DER_SNR (Stoehr et al. 2008): 1.482602/sqrt(6) median|2f_i - f_(i-2) - f_(i+2)|.

    Only triplets near the continuum (0.9 < f < 1.1) are used when there are enough: sharp
    lines and band heads add to the second differences and would inflate the noise.
    """
    d = np.abs(2.0 * flux[2:-2] - flux[:-4] - flux[4:])
    near = (np.abs(flux[2:-2] - 1) < 0.1) & (np.abs(flux[:-4] - 1) < 0.1) & (np.abs(flux[4:] - 1) < 0.1)
    if near.sum() >= 100:
        d = d[near]
    return 1.482602 / math.sqrt(6.0) * float(np.median(d))


def normalised(spectrum, notes):
    """The spectrum itself when continuum-normalised, else :func:`specan.prepare.prepare` of it (noted)."""
    info = get_info(spectrum)
    if info.normalized:
        return spectrum
    try:
        from ..prepare import prepare
    except ImportError as exc:  # pragma: no cover - prepare is part of the package
        raise AnalysisError("spectrum is not continuum-normalised and specan.prepare is unavailable") from exc
    notes.append("spectrum continuum-normalised by specan.prepare.prepare")
    return prepare(spectrum)


# ---------------------------------------------------------------------------
# The observed side on its ln-lambda grid
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class ObservedGrid:
    """The observed side: arrays on the ln-lambda grid.

    ``grid`` (ln lambda_vac, ``n`` points of ``step``) carries ``flux``, ``sigma``, ``valid``
    and the cosine ``taper``; ``spline_x``, ``native_flux`` and ``native_sigma`` are the
    native pixels (masked ones filled with the continuum and zero error) from which noise
    realisations are resampled the way the data were.
    """

    info: ObsInfo
    noise_source: str
    spline_x: np.ndarray
    grid: np.ndarray
    step: float
    n: int
    flux: np.ndarray
    sigma: np.ndarray
    native_flux: np.ndarray
    native_sigma: np.ndarray
    valid: np.ndarray
    taper: np.ndarray
    #: grid points from the spectrum's first to its last usable pixel (the rest pads the grid
    #: out to whole blocks, :data:`GRID_BLOCK`)
    n_data: int = 0
    #: width (ln lambda) over which the interpolant is averaged onto each grid point, 0 for point
    #: values (:func:`spline_operators`): every resampling of the native pixels uses the same
    cell: float = 0.0


class _Pixels(NamedTuple):
    wave: np.ndarray  # vacuum, sorted
    flux: np.ndarray
    sigma: np.ndarray | None
    bad: np.ndarray
    setup: object     # the wavelengths' :class:`_PixelSetup` (looked up once)


_VACUUM = {}


def _vacuum_wavelengths(spectrum, info):
    """The spectrum's vacuum wavelengths (Angstrom; read-only where converted).

    Air wavelengths are converted once per set of pixels (the last few kept, keyed by their bytes):
    the conversion (:func:`specan.obsinfo.air_to_vacuum`, an inversion of Morton's formula) costs
    ~1 ms a spectrum (measured), the same for every exposure of a survey's wavelength solution.
    """
    if info.medium == "vacuum":
        return wavelength_in(spectrum, "vacuum")
    own = wavelength_in(spectrum, info.medium)
    return kept(_VACUUM, (content_key(own), own.size, info.medium), lambda: wavelength_in(spectrum, "vacuum"))


def _usable_pixels(spectrum, info, telluric):
    """Sorted vacuum pixels with their bad-pixel mask (non-finite, masked, zero error, tellurics)."""
    w = _vacuum_wavelengths(spectrum, info)
    f = np.asarray(spectrum.flux.value, dtype=float)
    sig = sigma_array(spectrum)
    bad = ~np.isfinite(f) | ~np.isfinite(w)
    if spectrum.mask is not None:
        bad |= np.asarray(spectrum.mask, bool)
    if sig is not None:
        bad |= ~np.isfinite(sig) | (sig <= 0)
    if not (w.size > 1 and bool(np.all(w[1:] > w[:-1]))):
        # (strictly increasing, as almost every file's: argsort's order is then the identity, and the
        # sort and four copies are not made)
        order = np.argsort(w)
        w, f, bad = w[order], f[order], bad[order]
        sig = None if sig is None else sig[order]
    if (~bad).sum() < 50:
        raise AnalysisError("fewer than 50 usable pixels: no velocity", info.path)
    setup = _pixel_setup(w)
    if telluric:
        bad |= setup.telluric
    return _Pixels(w, f, sig, bad, setup)


class _PixelSetup(NamedTuple):
    telluric: np.ndarray   # the telluric bands' pixels (read-only)
    native_step: float     # :func:`_native_step` of the pixels


_PIXEL_SETUPS = {}


def _pixel_setup(w):
    """What depends on a spectrum's sorted vacuum wavelengths ``w`` alone, made once per set of pixels:
    the telluric mask (:func:`specan.prepare.telluric_mask`: air wavelengths, band look-ups) and the
    native step (a percentile and a median), 0.6 ms a spectrum between them (measured) for the same
    pixels spectrum after spectrum in a survey. Keyed by the wavelengths' bytes, a few at a time."""
    from ..prepare import telluric_mask

    key = (content_key(w), w.size)
    found = _PIXEL_SETUPS.get(key)
    if found is None:
        mask = np.asarray(telluric_mask(w, "vacuum"), bool)
        mask.flags.writeable = False
        found = _PixelSetup(mask, _native_step(np.log(w)))
        while len(_PIXEL_SETUPS) >= 8:   # oldest out first; the tuple is returned, not looked up again
            _PIXEL_SETUPS.pop(next(iter(_PIXEL_SETUPS)), None)
        _PIXEL_SETUPS[key] = found
    return found


def _native_step(lnw):
    """Grid step (in ln lambda) of a spectrum with native pixels at ``lnw``."""
    dl = np.diff(lnw)
    dl = dl[dl > 0]
    # sample the finest part of the spectrum natively, but not a few stray close pixels
    # (overlapping merged orders) at the cost of a huge grid
    return max(float(np.percentile(dl, 5)), float(np.median(dl)) / 3.0)


def lattice_step(step):
    """``step`` (ln lambda) snapped down to the lattice 2^(k / :data:`STEP_LATTICE`)."""
    return 2.0 ** (math.floor(math.log2(step) * STEP_LATTICE) / STEP_LATTICE)


def distance_to_invalid(valid):
    """Pixels from each pixel to the nearest invalid one, the ends counting as invalid (0 where invalid).

    What ``scipy.ndimage.distance_transform_edt`` of the mask padded with one invalid pixel at
    each end gives; in one dimension the nearest invalid pixel on either side is a running
    maximum of their indices, a tenth of the time of the general transform.
    """
    n = valid.size
    index = np.arange(n)
    before = np.maximum.accumulate(np.where(valid, -1, index))           # last invalid at or before
    after = np.minimum.accumulate(np.where(valid, n, index)[::-1])[::-1]   # first invalid at or after
    return np.minimum(index - before, after - index).astype(float)


_TAPERS = {}


def _edge_taper(valid, first=0, last=None):
    """Weights rising as a cosine over ~ 2% of the data's range (grid points ``first`` to ``last``)
    at both ends and 5 pixels at gap edges (read-only; the last few masks' kept: spectra of a
    survey share their masks, and a hash of the mask costs a tenth of making the taper)."""
    n = valid.size
    last = n - 1 if last is None else last
    return kept(_TAPERS, (content_key(valid), n, first, last), lambda: _make_edge_taper(valid, first, last))


def _make_edge_taper(valid, first, last):
    n = valid.size
    ntap_end = max(5, int(0.02 * (last - first + 1)))
    dist = distance_to_invalid(valid)
    edge = np.minimum(np.arange(n) - first + 1, last - np.arange(n) + 1)
    taper = np.clip(np.minimum(dist / 5.0, edge / ntap_end), 0.0, 1.0)
    return np.where(valid, 0.5 - 0.5 * np.cos(np.pi * taper), 0.0)


class SplineOperators(NamedTuple):
    """The cubic interpolation (not-a-knot) from fixed sample positions to a fixed grid, as
    operators: ``forward(y)`` = S y (what ``make_interp_spline(x, y, k=3)(grid)`` gives, to
    rounding, or its mean over each grid cell), ``adjoint(u)`` = S^T u (y and u may have columns)."""

    forward: object
    adjoint: object


_SPLINES = forgettable({})


def not_a_knot(x):
    """The knots of the cubic interpolating spline through samples at ``x`` with not-a-knot ends: what
    ``make_interp_spline(x, y, k=3).t`` holds, to the bit (``tests/test_velocity_setup.py``), without
    solving for a spline to read them off (the knots do not depend on ``y``; de Boor's not-a-knot
    condition drops the second and last-but-one samples as knots, common practice)."""
    return np.r_[(x[0],) * (SPLINE_K + 1), x[2:-2], (x[-1],) * (SPLINE_K + 1)]


def _design_matrix(points, t):
    """``BSpline.design_matrix(points, t, 3)`` for points inside the knots' span (every caller's are:
    the samples themselves, or grid points clipped to them). Asked with ``extrapolate=True``, which for
    such points gives the same matrix to the bit (``tests/test_velocity_setup.py``) but skips scipy's
    range check, a Python ``min`` and ``max`` over the points (1.3 ms each for a 20,000-point cell
    grid, measured): once per new pixel set-up, which a night of exposures on their own wavelength
    solutions pays for every spectrum."""
    from scipy.interpolate import BSpline

    return BSpline.design_matrix(points, t, SPLINE_K, extrapolate=True)


#: Points per grid cell at least, and per native pixel in a cell at least, of the midpoint rule that
#: averages the interpolant over a cell (:func:`spline_operators` with ``cell``): the cubic pieces
#: are about a native pixel long; four points a piece put the rule within ~1e-3 of the exact mean of
#: a spline through white noise (the worst case; tests/test_velocity_fast_path.py), and the average
#: is a filter whatever the rule's own error (forward and adjoint are one matrix). Our choice.
CELL_POINTS = 4


def spline_operators(x, grid, cell=0.0):
    """The (cached) :class:`SplineOperators` from samples at ``x`` to ``grid``.

    The interpolant is B A^-1 y (A, B the B-spline design matrices at the samples and on the
    grid): one sparse LU of A^T serves both directions (A c = y by its transposed solve). Made
    once per set-up, keyed by the sample positions and the grid: spectra of a survey share
    their pixels, and a factorised solve costs a fraction of building the spline anew.

    ``cell`` > 0: the interpolant's mean over [g - cell/2, g + cell/2] about each grid point g
    instead of its value there (B then the mean of the design matrix over the cell, by the midpoint
    rule): on a grid coarser than the samples a point value keeps one sample's noise per grid point
    and aliases the rest, where the cell's mean keeps every sample's share (the anti-aliasing of a
    rebinning, common practice).
    """
    key = (content_key(x), float(grid[0]), float(grid[-1]), grid.size, float(cell))
    found = _SPLINES.get(key)
    if found is None:
        # (imported here, on a miss only: three imports cost more than the look-up itself)
        from scipy import sparse
        from scipy.sparse.linalg import splu

        t = not_a_knot(x)
        if cell > 0:
            dx = np.diff(x)
            q = max(CELL_POINTS, int(math.ceil(CELL_POINTS * cell / float(np.min(dx[dx > 0])))))
            nodes = (grid[:, None] + cell * ((np.arange(q) + 0.5) / q - 0.5)).ravel()
            b_fine = _design_matrix(np.clip(nodes, x[0], x[-1]), t).tocsr()
            mean = sparse.csr_matrix((np.full(nodes.size, 1.0 / q), np.arange(nodes.size),
                                      np.arange(0, nodes.size + 1, q)), shape=(grid.size, nodes.size))
            b_grid = (mean @ b_fine).tocsr()
        else:
            b_grid = _design_matrix(np.clip(grid, x[0], x[-1]), t).tocsr()
        lu = splu(_design_matrix(x, t).T.tocsc())
        bt = b_grid.T.tocsr()
        found = SplineOperators(lambda y: np.asarray(b_grid @ lu.solve(np.asarray(y, float), trans="T")),
                                lambda u: lu.solve(np.asarray(bt @ u)))
        # a few set-ups at a time (oldest out first); the operators are returned, not looked up
        # again, so that another thread's eviction cannot take them away in between
        while len(_SPLINES) > 8:
            _SPLINES.pop(next(iter(_SPLINES)), None)
        _SPLINES[key] = found
    return found


#: Seeded white-noise rows pushed through a set-up's resampling by :func:`resampled_noise_variance` (our
#: choice: the sum over a spectrum's ~5,000 grid points of their mean square is then known to ~0.5%).
NOISE_PROBES = 16
_NOISE_VARIANCE = {}


@functools.lru_cache(maxsize=4)
def _noise_probes(size):
    """The seeded probes of :func:`resampled_noise_variance` for ``size`` samples (read-only), kept: the
    same numbers for every set-up of that many pixels, which a night of exposures on their own
    wavelength solutions makes anew for each spectrum (0.9 ms of drawing for 4,000 pixels, measured)."""
    probes = np.random.default_rng(20261204).standard_normal((size, NOISE_PROBES))
    probes.flags.writeable = False
    return probes


def resampled_noise_variance(x, grid, cell=0.0):
    """Variance, at each grid point, of unit white noise on the samples ``x`` carried onto ``grid`` by
    :func:`spline_operators` (``cell`` as there): what the resampling leaves of a pixel's noise (a cell
    mean over several pixels keeps their share, an interpolant between two pixels a little less than
    one). The mean square of :data:`NOISE_PROBES` seeded realisations (the same numbers every run), kept
    per set-up; read-only."""
    key = (content_key(x), float(grid[0]), float(grid[-1]), grid.size, float(cell))
    found = _NOISE_VARIANCE.get(key)
    if found is None:
        found = np.mean(np.asarray(spline_operators(x, grid, cell).forward(_noise_probes(x.size))) ** 2, axis=1)
        found.flags.writeable = False
        while len(_NOISE_VARIANCE) > 8:   # oldest out first; the array is returned, not looked up again
            _NOISE_VARIANCE.pop(next(iter(_NOISE_VARIANCE)), None)
        _NOISE_VARIANCE[key] = found
    return found


def observe_on_grid(spectrum, *, step=None, telluric=True, clip_emission=True, notes=None):
    """The normalised ``spectrum`` on a ln-lambda grid of ``step`` (default: its finest sampling, or
    :data:`GRID_PER_RESEL` points per resolution element where that is coarser and the resolving
    power is stated; the grid's values are then means over its cells, :func:`spline_operators`).

    Tellurics (``telluric``) and pixels well above the continuum (``clip_emission``,
    :func:`hot_pixels`) are masked; a spectrum without errors gets the flux's own noise
    (:func:`flux_pixel_noise`). Notes are appended to ``notes``.
    """
    notes = notes if notes is not None else []
    info = get_info(spectrum)
    w, f, sig, bad, setup = _usable_pixels(spectrum, info, telluric)
    if sig is None:
        # the telluric bands hold noise like any pixel: they enter the plateau test (not the lines)
        noise_only = setup.telluric & bad & np.isfinite(f) & (f > 0)
        sig, noise_source = flux_pixel_noise(w, f, bad, info, noise_only)
    else:
        noise_source = "error array"
    if clip_emission:
        hot = hot_pixels(f, sig, bad)
        if hot.any():
            notes.append(f"{int(hot.sum())} pixels above the continuum (emission/cosmic rays) excluded")
            bad |= hot
    lnw = np.log(w)
    if step is None:
        step = setup.native_step
        if info.resolving_power:
            step = max(step, 1.0 / (GRID_PER_RESEL * float(info.resolving_power)))
        step = lattice_step(step)
    # cells wider than the finest native pixels: each grid point the mean over its cell (anti-aliased)
    cell = step if step > setup.native_step else 0.0
    good = ~bad
    lo, hi = lnw[good][0], lnw[good][-1]
    # whole blocks of the lattice of steps from ln lambda = 0 (GRID_BLOCK), covering the data
    k0 = math.floor(lo / step / GRID_BLOCK) * GRID_BLOCK
    k1 = math.ceil(hi / step / GRID_BLOCK) * GRID_BLOCK
    grid = step * np.arange(k0, k1 + 1, dtype=float)
    n = grid.size
    inside = (grid >= lo) & (grid <= hi)
    first, last = int(np.argmax(inside)), int(n - 1 - np.argmax(inside[::-1]))
    f_fill = np.where(bad, 1.0, f)
    valid = inside & ~(np.interp(grid, lnw, bad.astype(float)) > 1e-6)
    # (the median and the replacements only where some error is not finite: the same arrays)
    finite = bool(np.isfinite(sig).all())
    return ObservedGrid(
        info=info, noise_source=noise_source, spline_x=lnw, grid=grid, step=step, n=n,
        flux=spline_operators(lnw, grid, cell).forward(f_fill),
        sigma=np.interp(grid, lnw, sig if finite else np.where(np.isfinite(sig), sig, np.nanmedian(sig))),
        native_flux=f_fill, native_sigma=np.where(bad, 0.0, sig if finite else np.nan_to_num(sig)),
        valid=valid, taper=_edge_taper(valid, first, last), n_data=last - first + 1, cell=cell)


# ---------------------------------------------------------------------------
# Lags, and the extended grid templates are prepared on
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class TemplateGrid:
    """Where templates are prepared for one set-up: ``n`` points of ``step`` from ``ln0`` (ln lambda_vac).

    It extends the spectrum's grid by the lag window on both sides; ``hp_sigma`` is the
    high-pass sigma (grid pixels) both sides are filtered with, None for none; ``cell`` the width
    (ln lambda) both sides are averaged over about each grid point, 0 for point values.
    """

    ln0: float
    step: float
    n: int
    hp_sigma: float | None
    #: the observed grid's cell (:attr:`ObservedGrid.cell`): templates are averaged over it as the data are
    cell: float = 0.0


@dataclass(frozen=True)
class LagWindow:
    """The lags of one spectrum's correlations, in pixels of its grid.

    Lag s (positive = spectrum redshifted relative to the template) is searched within
    ``|s| <= smax`` (``vmax_kms``); the CCF about the peak is examined for ``|j| <= half``;
    templates start ``pad`` pixels before the spectrum (on ``template_grid``), and FFTs have
    length ``m``.
    """

    step: float
    n: int
    vmax_kms: float
    smax: int
    half: int
    pad: int
    m: int
    template_grid: TemplateGrid

    @property
    def hp_sigma(self):
        """High-pass sigma (grid pixels) of both sides, None for none."""
        return self.template_grid.hp_sigma


def lag_window(observed, vmax, resolving_power, highpass):
    """The :class:`LagWindow` of ``observed`` for a search range +-``vmax`` at ``resolving_power``.

    ``highpass`` is the high-pass sigma in resolution elements (None or 0: no filter).
    """
    vmax_kms = vmax.to_value(_KMS) if isinstance(vmax, u.Quantity) else u.Quantity(vmax, _KMS).value
    highpass = float(highpass) if highpass else None
    # (kept per set-up: the same few windows spectrum after spectrum, two frozen dataclasses and a unit
    # conversion each)
    return _lag_window(observed.step, observed.n, float(observed.grid[0]), observed.cell, float(vmax_kms),
                       float(resolving_power), highpass)


@functools.lru_cache(maxsize=64)
def _lag_window(step, n, grid0, cell, vmax_kms, resolving_power, highpass):
    smax = int(math.ceil(math.log(factor_kms(vmax_kms)) / step))
    fwhm_grid = 1.0 / (resolving_power * step)  # resolution element in grid pixels
    hp = highpass * fwhm_grid if highpass else None
    # lags examined for the error and second-peak statistics: the search range, and several
    # high-pass lengths so that the CCF noise decorrelates within the window
    half = int(max(smax, 40, math.ceil(6 * (hp or 0))))
    # templates reach past the data by every lag the CCF about any allowed peak uses, so that one
    # FFT length just above the template's serves every correlation: no lag ever wraps around
    pad = half + smax + COVER_TAPER + 4
    ln0 = grid0 - pad * step
    m = fast_length(n + 2 * pad)
    return LagWindow(step=step, n=n, vmax_kms=vmax_kms, smax=smax, half=half, pad=pad, m=m,
                     template_grid=TemplateGrid(ln0=ln0, step=step, n=n + 2 * pad, hp_sigma=hp, cell=cell))


@functools.lru_cache(maxsize=256)
def fast_length(n):
    """The smallest transform length >= ``n`` with no prime factor above 5.

    ``scipy.fft.next_fast_len`` also offers factors 7 and 11, and pocketfft is much slower on
    those: 5929 = 7^2 11^2 points took 53 us a row against 22 us at 6000 = 2^4 3 5^3 (inverse
    real transforms on this machine, measured), and such lengths came up for the set-ups of a
    survey. Written here because scipy has no option to leave 7 and 11 out.
    """
    best = None
    p5 = 1
    while p5 < 2 * n:
        p35 = p5
        while p35 < 2 * n:
            # the smallest power of two taking p35 to n or beyond
            m = p35 << max(0, (math.ceil(n / p35) - 1).bit_length())
            best = m if best is None or m < best else best
            p35 *= 3
        p5 *= 5
    return best


#: Frequencies per block of :func:`turns` (our choice: ~sqrt of a spectrum's frequencies).
TURN_BLOCK = 64


def turns(angle, nf):
    """exp(i angle f) for f = 0 .. nf - 1, a row per angle: (nf,) for a scalar ``angle``, (T, nf) for T.

    As the product of exp(i angle TURN_BLOCK a) and exp(i angle b) over f = TURN_BLOCK a + b: two
    short rows of cosines and sines instead of one per frequency (the phases of every shift cost
    more than the products they enter); within a few units in the last place of the direct values.
    """
    angle = np.asarray(angle, float)
    blocks = -(-nf // TURN_BLOCK)
    outer = angle[..., None] * (TURN_BLOCK * np.arange(blocks))
    inner = angle[..., None] * np.arange(TURN_BLOCK)
    hi = np.empty(outer.shape, complex)
    lo = np.empty(inner.shape, complex)
    np.cos(outer, out=hi.real)
    np.sin(outer, out=hi.imag)
    np.cos(inner, out=lo.real)
    np.sin(inner, out=lo.imag)
    return (hi[..., :, None] * lo[..., None, :]).reshape(angle.shape + (blocks * TURN_BLOCK,))[..., :nf]


def kms_per_pixel(s, step):
    """Velocity (km/s) spanned by one grid pixel of lag about lag ``s``."""
    return _kms(math.exp((s + 0.5) * step)) - _kms(math.exp((s - 0.5) * step))


# ---------------------------------------------------------------------------
# Filters shared by both sides
# ---------------------------------------------------------------------------
def gauss_smooth(x, sigma, single=False):
    """Gaussian smoothing along axis 0 with zero boundaries, by FFT.

    Hand-written rather than ``scipy.ndimage.gaussian_filter1d(mode="constant")`` because the
    high-pass sigma is tens of pixels and the noise realisations arrive as an (n, k) block: one
    FFT per column costs the same at any sigma, and the kernel is the exact Gaussian transform
    (no truncation at 4 sigma). ``single``: the transforms in single precision (half the time;
    ~1e-7 of the largest value), returned as double.
    """
    n = x.shape[0]
    size = fast_length(n + int(math.ceil(8 * sigma)))  # zero padding: no wrap-around
    if single:
        x, kern = np.asarray(x, np.float32), gauss_kernel_single(size, float(sigma))
    else:
        kern = gauss_kernel(size, float(sigma))
    if x.ndim == 2:
        kern = kern[:, None]
    return np.asarray(sfft.irfft(sfft.rfft(x, size, axis=0) * kern, size, axis=0)[:n], np.float64)


@functools.lru_cache(maxsize=32)
def gauss_kernel(size, sigma):
    """Fourier transform of a Gaussian of ``sigma`` pixels at the ``size // 2 + 1`` frequencies of a real
    transform of length ``size`` (read-only: one per set-up, shared)."""
    k = np.arange(size // 2 + 1) / size
    kern = np.exp(-2.0 * (np.pi * sigma * k) ** 2)
    kern.flags.writeable = False
    return kern


@functools.lru_cache(maxsize=32)
def gauss_kernel_single(size, sigma):
    """:func:`gauss_kernel` in single precision (read-only, one per set-up: the same values as converting
    it at each use)."""
    kern = gauss_kernel(size, sigma).astype(np.float32)
    kern.flags.writeable = False
    return kern


_COVERAGE = {}


def smoothed_coverage(valid, sigma):
    """``gauss_smooth(valid, sigma)`` floored at 1e-3: the high-pass filter's local weight, the
    same for a spectrum's data and its error propagation (kept for the last few coverages)."""
    key = (content_key(valid), valid.size, float(sigma))
    found = _COVERAGE.get(key)
    if found is None:
        found = np.maximum(gauss_smooth(valid.astype(float), sigma), 1e-3)
        found.flags.writeable = False
        while len(_COVERAGE) >= 8:   # oldest out first; the array is returned, not looked up again
            _COVERAGE.pop(next(iter(_COVERAGE)), None)
        _COVERAGE[key] = found
    return found


def highpass(x, sigma, valid, single=False):
    """Subtract the local mean: a Gaussian-smoothed copy over the valid pixels only.

    Tonry & Davis' low-frequency cut, done in pixel space so that spectrum and template get the
    same filter before the normalisation sums. The mean is a normalised convolution (smoothed
    values over smoothed coverage), so masked gaps and the ends of the data do not pull it
    towards zero: otherwise lines next to a gap would be filtered differently in a star and in
    its shifted template, a bias growing with the velocity. ``single``: the smoothing's transforms
    in single precision (:func:`gauss_smooth`).
    """
    if not sigma:
        return np.where(valid if x.ndim == 1 else valid[:, None], x, 0.0)
    v = valid.astype(float)
    vv = v if x.ndim == 1 else v[:, None]
    num = gauss_smooth(x * vv, sigma, single)
    den = smoothed_coverage(valid, sigma)
    den = den if x.ndim == 1 else den[:, None]
    low = num / den
    return (x - low) * vv


def cell_mean(x, width):
    """The band-limited samples ``x`` (zero beyond their ends) averaged over a box of ``width`` pixels
    about each sample: the box's transfer function sinc(f width) applied by FFT, exact for samples of a
    band-limited function (a template at its resolution on the grid), so that templates carry the
    same cell means as the data (:func:`spline_operators` with a cell)."""
    n = x.size
    size = fast_length(n + 2 * int(math.ceil(width)) + 2)
    f = np.arange(size // 2 + 1) / size
    return sfft.irfft(sfft.rfft(x, size) * np.sinc(f * width), size)[:n]


def cover_taper(valid, ntap=COVER_TAPER):
    """Coverage weights of a template: 1 inside, a cosine over ``ntap`` pixels at every edge, 0 outside."""
    dist = distance_to_invalid(valid)
    return np.where(valid, 0.5 - 0.5 * np.cos(np.pi * np.clip(dist / ntap, 0, 1)), 0.0)
