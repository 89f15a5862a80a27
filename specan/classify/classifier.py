"""The public entry point: classify a spectrum with the shipped or a given calibration."""

from __future__ import annotations

import functools
import json
from importlib import resources

from ..contents import forgettable
from ..errors import AnalysisError
from .calibration import Calibration

__all__ = ["DEFAULT_FILE", "default_calibration", "classify"]

DEFAULT_FILE = "calibration_default.json"


@forgettable
@functools.lru_cache(maxsize=1)
def default_calibration():
    """The calibration shipped with specan (fitted on the JHC 1984 and MILES libraries at 13 A FWHM)."""
    try:
        ref = resources.files("specan.data").joinpath(DEFAULT_FILE)
        text = ref.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise AnalysisError(f"default calibration {DEFAULT_FILE} missing from specan/data: regenerate it "
                            "with scripts/fit_default_calibration.py") from None
    cal = Calibration.from_dict(json.loads(text), DEFAULT_FILE)
    cal.builtin = True
    return cal


def classify(spectrum, calibration=None, rv=None, resolving_power=None, parameters=True, neighbours=None,
             gravity_weighs=None):
    """MK spectral type, luminosity class, Teff and flags of a spectrum.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum (normalised or not; air or vacuum; any velocity up to
        +-2000 km/s, measured and removed with :mod:`specan.velocity`).
    calibration : Calibration, str or Path, optional
        A fitted calibration or its file; default: the shipped JHC (1984) one.
    rv : astropy.units.Quantity, optional
        Known velocity of the spectrum (skips the velocity measurement).
    resolving_power : float, optional
        Resolving power already estimated from the narrowest lines, used when the
        metadata give none (see :func:`specan.classify.spectrum_criteria`).
    parameters : bool
        Also measure Teff, log g and [Fe/H] (:func:`specan.parameters.measure`) and let the
        surface gravity weigh the luminosity classes (see ``gravity_weighs``).
    neighbours : bool, optional
        Also compare the whole spectrum with the MILES library stars (at rest, 13 A FWHM,
        normalised alike; :mod:`specan.classify.neighbours`) and let the types of the nearest
        weigh the type posterior (the class stays the criteria's and the gravity's). Default:
        with the shipped calibration, whose standards include those stars, yes; with a
        calibration of one's own standards, no (their system, not the library's, defines the
        types: the synthetic demo standards' A3 V star, for one, is most like MILES B6-B8 stars).
    gravity_weighs : bool, optional
        Let the measured surface gravity weigh the luminosity classes (with ``parameters``).
        Default: with the shipped calibration yes, with a calibration of one's own standards no,
        for the same reason as ``neighbours``: the parameter model learnt from MILES stars, and
        one's own standards define the classes (on the demo night's synthetic stars its log g
        turned 7 of 17 classes, e.g. G2 V into G2.5 IV and M3 III into M3 IV; measured). The log g
        is reported either way; ``gravity_conflict`` is raised only where it weighs.

    Returns
    -------
    dict
        ``sptype`` ("G2"), ``lumclass`` ("V"), ``mk`` ("G2 V"), ``code`` (O0=0 ... M0=60),
        ``subclass_err`` (1 sigma, subclasses), ``lumclass_prob`` (class -> probability),
        ``teff`` and ``teff_err`` (Quantity K: the type-Teff scale of each class from
        :func:`specan.mkscales.teff_from_type` -- Pecaut & Mamajek 2013 for dwarfs and the other
        scales named there -- averaged over ``lumclass_prob``, the spread added to the error),
        ``nearest_standards`` (list of {id, mk, distance}), ``flags`` (list of the raised
        ones among :data:`specan.classify.FLAGS`), ``notes`` (list of str), ``fit_quality``,
        ``criteria`` (name -> {value, standard}), ``rv`` (velocity removed),
        ``calibration`` (its source), and with ``parameters`` ``teff_spec``, ``teff_spec_err`` (K),
        ``logg``, ``logg_err``, ``feh``, ``feh_err`` (dex) and ``parameters_chi2`` (None where
        not measured). The flag ``gravity_conflict`` says the log g and the class disagree.
        ``type_evidence`` ("criteria" or "criteria and library neighbours") and
        ``library_neighbours`` (list of {id, name, mk, rms, weight}: the nearest library stars,
        nearest first, ``rms`` their normalised-flux difference, ``weight`` their share of the vote).
    """
    # the shipped calibration, whether asked for by None or passed in (the CLI loads it once)
    builtin = calibration is None or getattr(calibration, "builtin", False)
    if neighbours is None:
        neighbours = builtin
    if gravity_weighs is None:
        gravity_weighs = builtin
    if calibration is None:
        calibration = default_calibration()
    elif not isinstance(calibration, Calibration):
        calibration = Calibration.load(calibration)
    return calibration.classify(spectrum, rv=rv, resolving_power=resolving_power, parameters=parameters,
                                neighbours=neighbours, gravity_weighs=gravity_weighs)
