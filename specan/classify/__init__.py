"""MK classification from line ratios and band depths, calibrated on standards.

Criteria
--------
Every criterion is a *three-band index*, the depth of a feature band below a
straight pseudo-continuum through a blue and a red side band, or the log ratio of
two such features (:mod:`specan.classify.criteria`, where the bands and their
sources are listed).

Calibration
-----------
:class:`Calibration` learns, for every criterion, its mean value as a smooth
function of type code (O0 = 0 ... M0 = 60, :mod:`specan.mktypes`) and
luminosity class (I..V as 1..5), and its scatter about that mean, from a
labelled set of standards (kernel-weighted local regression on a grid of codes).
A spectrum is classified by a weighted Student-t likelihood of its criteria on
the lattice of (code, class), with a free line-strength scale per half of the
spectrum (instruments differ in scattered light and line-spread wings); the
mode of the marginal code posterior gives the type, the posterior (tempered by
a factor learnt in internal cross-validation, because the criteria are
correlated) gives the subclass uncertainty and the class probabilities.

Before measuring, the spectrum is shifted to rest with :mod:`specan.velocity`
and smoothed to the calibration's resolution (constant FWHM in Angstrom).

Modules
-------
- :mod:`~specan.classify.criteria`: the criteria and their measurement on plain arrays;
- :mod:`~specan.classify.measure`: from a Spectrum to its criteria (rest frame, resolution, S/N);
- :mod:`~specan.classify.relations`: fitting the relations, the likelihood and posterior;
- :mod:`~specan.classify.crossval`: the internal cross-validation (temperatures, flag thresholds);
- :mod:`~specan.classify.verdict` and :mod:`~specan.classify.flags`: from a posterior to
  type, class, Teff, flags and notes;
- :mod:`~specan.classify.calibration`: the :class:`Calibration` estimator and its file;
- :mod:`~specan.classify.catalog`: fitting one from a CSV catalogue of standards;
- :mod:`~specan.classify.classifier`: the shipped calibration and :func:`classify`.

``specan.classify`` is both this package and, by the public API, the function
:func:`classify`: ``specan.classify(spectrum)``.
"""

from __future__ import annotations

# used through this package by scripts/fit_default_calibration.py (``classify.u``) and
# benchmarks/cv_classify.py (``C.number_to_lumclass``)
import astropy.units as u  # noqa: F401

from ..mktypes import number_to_lumclass  # noqa: F401
from .calibration import FORMAT_NAME, FORMAT_VERSION, Calibration
from .catalog import calibrate_catalog
from .classifier import DEFAULT_FILE, classify, default_calibration
from .criteria import CRITERIA, RATIOS, SPLIT_WAVELENGTH, band_means, criteria_names, measure_criteria
from .flags import EMISSION_DEPTH, FEATURELESS, FLAGS, LOW_SNR
from .measure import spectrum_criteria
from .relations import posterior

__all__ = [
    "CRITERIA",
    "RATIOS",
    "FLAGS",
    "criteria_names",
    "measure_criteria",
    "spectrum_criteria",
    "Calibration",
    "calibrate_catalog",
    "default_calibration",
    "classify",
]

# ``specan.classify`` is both this package and, by the public API, a function:
# make the module callable as :func:`classify` (see specan/_callable.py).
from .._callable import make_callable as _make_callable  # noqa: E402

_make_callable(__name__, "classify")
