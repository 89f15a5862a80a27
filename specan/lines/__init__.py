"""Lines: identification, equivalent widths, widths, uncertainties and band indices.

Three public functions, each taking a specutils ``Spectrum`` and returning an
astropy ``QTable`` with units:

- :func:`identify` finds absorption (and emission) features with a matched
  filter at the spectrum's resolution and matches them to a line list within a
  velocity window; it marks blends and reports strong unidentified features.
- :func:`measure` measures every listed atomic line the spectrum covers:
  centroid, depth, FWHM and equivalent width by direct integration over an
  adaptive window and by profile fitting (Gaussian or Voigt, several components
  for blends), with uncertainties from the error array and from Cayrel (1988).
- :func:`band_indices` measures band indices (feature window against a
  pseudo-continuum through side windows) as equivalent widths, magnitudes or ratios.

Spectra that are not continuum-normalised go through :func:`specan.prepare.prepare`
first (band indices use the un-normalised flux, which their definitions assume).
The spectral axis stays in its own medium; the list's ``wave_air`` or ``wave_vac``
column is chosen to match.

The modules, one concern each:

- :mod:`.data`: the observed side (plain arrays, matched filter, features);
- :mod:`.listed`: the listed side (lines covered, velocity, matching windows, blends);
- :mod:`.identification`: :func:`identify`;
- :mod:`.windows`: measurement windows and the local continuum;
- :mod:`.components`: the components of a blend fit;
- :mod:`.profiles`: Gaussian and Voigt profiles and their fits;
- :mod:`.batchfit`: all the fits of a spectrum at once (the default path of :func:`measure`);
- :mod:`.lmkernel`: the Voigt batch's iteration compiled (numba);
- :mod:`.walkkernel`, :mod:`.wingkernel`, :mod:`.blendkernel`, :mod:`.filterkernel`: the windows' walks, the
  hydrogen lines' far wings, the metal lines in their windows and the matched filter's and wide
  smoothing's correlations compiled (numba; :mod:`.compiled` says whether they run);
- :mod:`.hydrogen`: the fitted hydrogen lines divided out;
- :mod:`.hydrogen_blends`: the metal lines inside a hydrogen line's window taken out of it, and the share
  of the high Balmer lines no one can assign (``ew_err_blend``);
- :mod:`.expected`: which species a star of a given type can show (the rest are not counted as found);
- :mod:`.measurement`: :func:`measure`, step by step;
- :mod:`.bands`: :func:`band_indices`;
- :mod:`.analysis`: :func:`analyse`, all of the above on one spectrum.
"""

from __future__ import annotations

from ..doppler import C_KMS, doppler_factor
from ..linelist import load_bands, load_linelist
from ..resolution import GAUSS_FWHM
from .analysis import analyse
from .bands import band_indices
from .data import DETECT_SIGMA, MIN_DEPTH, estimate_resolving_power
from .identification import identify
from .measurement import cayrel_error, measure

__all__ = ["identify", "measure", "band_indices", "analyse", "cayrel_error", "doppler_factor",
           "estimate_resolving_power", "warm_up"]


def warm_up():
    """Compile the stage's kernels now (or load them from numba's on-disk cache); nothing where they do
    not run (``SPECAN_COMPILED=0``, no numba).

    They are otherwise compiled on the first spectrum that uses each. A process that forks workers
    calls this first (:mod:`specan.night.executors`), so that every worker inherits the machine code
    instead of loading it (~0.5 s each) or, on a new installation, compiling it (~17 s each, at once).
    """
    from . import compiled

    for kernels in (compiled.lm(), compiled.walks(), compiled.wings(), compiled.blends(), compiled.filters()):
        if kernels is not None:
            kernels.warm()
