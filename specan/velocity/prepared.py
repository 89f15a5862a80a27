"""Templates prepared for correlation on a set-up's extended grid (:class:`~.grid.TemplateGrid`).

A template is anything with a normalised flux: a built-in type from :mod:`specan.templates`
(synthetic spectrum or line mask) or a user spectrum (template file, RV standard, reference
exposure). Preparing it means: resample onto the extended grid, mask what the spectrum's own
rules would mask, degrade to the spectrum's resolution, high-pass filter and taper its coverage.
What comes out (:class:`PreparedTemplate`) depends on the set-up only, not on the spectrum, and
keeps its FFTs per transform length, so one preparation serves every spectrum of the set-up.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline
from scipy.ndimage import gaussian_filter1d

from .. import templates
from ..errors import AnalysisError
from ..obsinfo import get_info, wavelength_in
from ..resolution import FWHM_TO_SIGMA
from .grid import FULL_COVER_MARGIN, SPLINE_K, cell_mean, cover_taper, highpass, hot_pixels, noise_from_flux, normalised, sigma_array

__all__ = ["PreparedTemplate", "full_cover", "BuiltinCandidate", "builtin_template", "prepare_builtin", "spectrum_template"]


class PreparedTemplate:
    """Template side on the grid ln0 - pad*step ... : arrays T (flux - 1, tapered) and V (coverage)."""

    def __init__(self, name, t_minus_1, cover, rv_kms=0.0, info=None, hp_sigma=None):
        self.name = name
        # unfiltered, zero where not covered (as the data are at masked pixels); the single-star
        # model is built from it like the data
        self.T0 = np.where(cover > 0, t_minus_1, 0.0)
        self.hp_sigma = hp_sigma
        th = highpass(self.T0, hp_sigma, cover > 0)
        # the coverage taper is a weight: T = V t enters the cross term, V t^2 the template energy,
        # so that a noiseless shifted copy correlates to exactly 1 even where the taper is < 1
        self.T = th * cover
        self.T2 = th * th * cover
        self.V = cover
        self.rv_kms = rv_kms
        self.info = info
        self._fft = {}

    def ffts(self, m):
        """Real FFTs of length ``m`` of T, T^2 (weighted) and V, computed once per length."""
        if m not in self._fft:
            self._fft[m] = (sfft.rfft(self.T, m), sfft.rfft(self.T2, m), sfft.rfft(self.V, m))
        return self._fft[m]

    def ffts_single(self, m):
        """(3, nf) :meth:`ffts` stacked, in single precision (read-only), computed once per length."""
        key = ("single", m)
        if key not in self._fft:
            stacked = np.stack(self.ffts(m)).astype(np.complex64)
            stacked.flags.writeable = False
            self._fft[key] = stacked
        return self._fft[key]

    def model_ffts(self, m):
        """(2, nf) real FFTs of length ``m`` of the unfiltered template T0 and of its coverage
        (V > 0): what the single-star model is shifted from, computed once per length."""
        key = ("model", m)
        if key not in self._fft:
            self._fft[key] = sfft.rfft(np.stack([self.T0, (self.V > 0).astype(float)]), m, axis=1)
        return self._fft[key]

    def covers(self, lo, hi):
        """Whether the coverage V is exactly 1 on template pixels ``lo`` .. ``hi - 1`` (all inside).

        Where it is over every pixel a correlation's lags use (the template covers the spectrum with
        room to spare, the common case), the coverage sums of the correlation are the data's own
        sums, the same at every lag and for every such template.
        """
        key = "ones"
        if key not in self._fft:
            self._fft[key] = np.concatenate([[0], np.cumsum(self.V == 1.0)])
        ones = self._fft[key]
        return 0 <= lo < hi <= self.V.size and int(ones[hi] - ones[lo]) == hi - lo

    def band_ffts(self, m):
        """:meth:`ffts` each cut where its power has fallen below 1e-14 of its peak for good
        (resolution and smooth coverage band-limit them: the rest adds nothing to a correlation)."""
        key = ("band", m)
        if key not in self._fft:
            cut = []
            for f in self.ffts(m):
                p = np.abs(f) ** 2
                keep = np.flatnonzero(p > 1e-14 * p.max()) if p.max() > 0 else np.array([0])
                cut.append(np.ascontiguousarray(f[:int(keep[-1]) + 1]))
            self._fft[key] = tuple(cut)
        return self._fft[key]


def full_cover(prepared, lags, pad, n, reach):
    """Whether every template's coverage is 1 over all the pixels its correlations at ``lags`` +-
    ``reach`` (pixels) use, :data:`~.grid.FULL_COVER_MARGIN` pixels beyond them included (lag s
    uses template pixels x + pad - s for the ``n`` data pixels x)."""
    margin = FULL_COVER_MARGIN
    return all(t.covers(int(math.floor(pad - s - reach)) - margin, int(math.ceil(pad - s + reach)) + n + margin)
               for t, s in zip(prepared, lags))


# ---------------------------------------------------------------------------
# Built-in templates
# ---------------------------------------------------------------------------
class BuiltinCandidate(NamedTuple):
    """A built-in template to try: MK type, resolving power, kind (:data:`specan.templates.KINDS`)
    and, for the library, the template's name (its type is then the group's nominal one)."""

    sptype: str
    lumclass: str
    resolving_power: float
    kind: str = "synth"
    name: str | None = None


@functools.lru_cache(maxsize=256)  # the library or synthetic grid, refinements, a few instrument set-ups
def builtin_template(sptype, lumclass, resolving_power, ln0, step, n, kind="synth", hp_sigma=None, name=None,
                     cell=0.0):
    """A built-in template (:func:`specan.templates.on_log_grid`) ready for correlation (averaged over
    ``cell`` about each grid point where the data are, :func:`_cell_means`)."""
    label, flux, valid = templates.on_log_grid(sptype, lumclass, resolving_power, ln0, step, n, kind=kind,
                                               name=name)
    return PreparedTemplate(label, _cell_means(flux, valid, cell, step) - 1.0, cover_taper(valid), hp_sigma=hp_sigma)


def _cell_means(flux, valid, cell, step):
    """``flux`` averaged over ``cell`` (ln lambda) about each point of a grid of ``step``, as the data on
    a grid of cell means are (:func:`~.grid.spline_operators`): otherwise the data would be a box of
    one cell broader than a template of the same resolution (2.5% in FWHM at 3 points a FWHM), a
    mismatch of its own (the off-grid synthetic stars on linear pixels read 2-7% more scatter, measured)."""
    if not cell:
        return flux
    return 1.0 + cell_mean(np.where(valid, flux - 1.0, 0.0), cell / step)


def prepare_builtin(candidate, grid):
    """:func:`builtin_template` of a :class:`BuiltinCandidate` on a :class:`~.grid.TemplateGrid`.

    The grid start is rounded (1e-12 in ln lambda) so that spectra of one set-up share cached
    templates.
    """
    return builtin_template(candidate.sptype, candidate.lumclass, candidate.resolving_power,
                            round(grid.ln0, 12), grid.step, grid.n, kind=candidate.kind, hp_sigma=grid.hp_sigma,
                            name=candidate.name, cell=grid.cell)


# ---------------------------------------------------------------------------
# User spectra as templates
# ---------------------------------------------------------------------------
def _template_pixels(spec, clip, notes):
    """Sorted (ln lambda_vac, flux, bad) of a normalised template spectrum."""
    w = wavelength_in(spec, "vacuum")
    f = np.asarray(spec.flux.value, float)
    bad = ~np.isfinite(f)
    if spec.mask is not None:
        bad |= np.asarray(spec.mask, bool)
    from ..prepare import telluric_mask

    bad |= telluric_mask(w, "vacuum")  # tellurics sit at the template's own topocentric wavelengths
    order = np.argsort(w)
    w, f, bad = w[order], f[order], bad[order]
    if clip:
        sig = sigma_array(spec)
        sig = noise_from_flux(f, bad) if sig is None else sig[order]
        hot = hot_pixels(f, sig, bad)
        if hot.any():
            notes.append(f"{int(hot.sum())} template pixels above the continuum excluded, as in the spectrum")
            bad |= hot
    return np.log(w), f, bad


def _on_grid(lnw, f, bad, grid):
    """(flux, valid) of template pixels resampled onto ``grid``: continuum outside their range."""
    n = grid.size
    inside = (grid >= lnw[~bad][0]) & (grid <= lnw[~bad][-1])
    flux = np.ones(n)
    flux[inside] = make_interp_spline(lnw, np.where(bad, 1.0, f), k=SPLINE_K)(grid[inside])
    badg = np.interp(grid, lnw, bad.astype(float), left=1.0, right=1.0) > 1e-6
    return flux, inside & ~badg


def _to_resolution(flux, valid, tr, target_r, step, notes):
    """The template flux degraded from resolving power ``tr`` to ``target_r`` when sharper."""
    if target_r and tr and tr > target_r * 1.05:
        # degrade the template to the spectrum's resolution (Gaussian, constant in ln lambda)
        ker = math.sqrt((1.0 / target_r) ** 2 - (1.0 / tr) ** 2) * FWHM_TO_SIGMA / step
        flux = 1.0 + gaussian_filter1d(np.where(valid, flux - 1.0, 0.0), ker, mode="constant")
        notes.append(f"template degraded from R={tr:.0f} to R={target_r:.0f}")
    elif not (target_r and tr):
        notes.append("template resolution or spectrum resolution unknown: template used as given")
    return flux


def spectrum_template(spec, grid, target_r, name, notes, rv_kms=0.0, clip=True):
    """A user spectrum (template file, RV standard or reference exposure) on the extended grid.

    ``grid`` is a :class:`~.grid.TemplateGrid`; ``target_r`` the spectrum's resolving power
    when known (else None: the template is used at its own). With ``clip`` its pixels far above
    the continuum are excluded by the rule the star's are (:func:`~.grid.hot_pixels`).
    """
    spec = normalised(spec, notes)
    tinfo = get_info(spec)
    lnw, f, bad = _template_pixels(spec, clip, notes)
    flux, valid = _on_grid(lnw, f, bad, grid.ln0 + grid.step * np.arange(grid.n))
    flux = _cell_means(_to_resolution(flux, valid, tinfo.resolving_power, target_r, grid.step, notes), valid,
                       grid.cell, grid.step)
    if valid.sum() < 50:
        raise AnalysisError(f"template {name} does not overlap the spectrum")
    return PreparedTemplate(name, flux - 1.0, cover_taper(valid), rv_kms=rv_kms, info=tinfo,
                            hp_sigma=grid.hp_sigma)
