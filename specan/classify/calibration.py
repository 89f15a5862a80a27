"""The :class:`Calibration` estimator: fit on standards, save, load, classify.

:class:`Calibration` learns, for every criterion, its mean value as a smooth
function of type code and luminosity class and its scatter about that mean
(:mod:`specan.classify.relations`), and calibrates its likelihood temperatures
and flag thresholds by internal cross-validation (:mod:`specan.classify.crossval`).
It persists as a plain, versioned, human-readable JSON file.
"""

from __future__ import annotations

import json
import re
from datetime import datetime, timezone
from pathlib import Path

import astropy.units as u
import numpy as np

from ..errors import AnalysisError, ReadError
from ..mktypes import lumclass_to_number, marks_emission, number_to_lumclass, sptype_to_code
from ..obsinfo import get_info
from ..resolution import rest_pixels
from . import flags, gravity, neighbours as library
from .atmosphere import atmosphere_columns, gravity_agreement, measure_atmosphere
from .criteria import CRITERIA, EMISSION_SENSITIVE, criteria_names, definitions
from .crossval import cross_validate
from .measure import spectrum_criteria
from .relations import LUMS, code_grid, fine_model, fit_model, fit_quality, posterior_and_split
from .verdict import criteria_table, nearest_standards, read_posterior, teff_estimate

__all__ = ["Calibration", "FORMAT_NAME", "FORMAT_VERSION", "parse_labels"]

FORMAT_NAME = "specan-mk-calibration"
FORMAT_VERSION = 1


class Calibration:
    """Relations between classification criteria and MK type, learnt from standards.

    Parameters
    ----------
    resolution : astropy.units.Quantity
        FWHM (Angstrom) of the standards; every spectrum is degraded to it before
        its criteria are measured.
    source : str
        Where the standards come from (written to the file).
    bandwidth : float
        Smallest width (subclasses) of the Gaussian window in type code.
    neighbours : int
        The window widens until it holds this many standards (sparse parts of a library).
    ridge : (float, float)
        Ridge on the local slope in code and on the luminosity-class terms.
    class_bandwidth, class_neighbours, class_ridge : float, int, float
        The wider window (and its ridge) in which the luminosity-class terms are
        fitted (see :func:`specan.classify.relations.fit_two_scale`); ``class_bandwidth=0``
        fits them in the narrow window with ``ridge[1]``.
    scatter_floor : float
        Added in quadrature to every learnt scatter (no criterion is trusted to better than this).
    dof : float
        Degrees of freedom of the Student-t likelihood (robust to single bad criteria).
    redundancy_power : float
        Exponent of the down-weighting of correlated criteria (0: none, 1: full).
    depth_scale_sigma : float
        Prior width of the free line-strength scale per half of the spectrum
        (instrumental dilution; see :func:`specan.classify.relations.loglike`); 0 disables it.
    grid_step : float
        Step (subclasses) of the stored relations.
    cv_folds : int
        Internal cross-validation folds used to calibrate the likelihood temperature,
        the fit-quality and composite thresholds.
    measure_velocity : bool
        Measure and remove each standard's velocity before measuring its criteria.

    Notes
    -----
    Use like an estimator: ``Calibration(...).fit(spectra, labels)``, then
    ``.classify(spectrum)``, ``.save(path)`` and ``Calibration.load(path)``.
    """

    def __init__(self, resolution=4.5 * u.AA, source="", bandwidth=1.5, neighbours=6, ridge=(0.1, 0.5),
                 class_bandwidth=4.0, class_neighbours=16, class_ridge=0.1, scatter_floor=0.003, dof=4.0,
                 redundancy_power=0.5, depth_scale_sigma=0.3, grid_step=1.0, cv_folds=5, measure_velocity=True):
        self.resolution = u.Quantity(resolution, u.AA)
        self.source = str(source)
        #: True only for the calibration shipped with specan (set by ``default_calibration``):
        #: it decides what :func:`specan.classify.classify` weighs by default.
        self.builtin = False
        self.settings = {"bandwidth": float(bandwidth), "neighbours": int(neighbours),
                         "ridge": [float(r) for r in ridge], "class_bandwidth": float(class_bandwidth),
                         "class_neighbours": int(class_neighbours), "class_ridge": float(class_ridge),
                         "scatter_floor": float(scatter_floor),
                         "dof": float(dof), "redundancy_power": float(redundancy_power),
                         "depth_scale_sigma": float(depth_scale_sigma),
                         "grid_step": float(grid_step), "cv_folds": int(cv_folds)}
        self.measure_velocity = bool(measure_velocity)
        self.model_ = None
        self.standards_ = None
        self.tau_ = None
        self.tau_class_ = None
        self.limits_ = None
        self.cv_ = None
        self.skipped_ = []
        self.created_ = None
        self.code_version_ = None
        self._fine = None
        self._weakest = None
        self._criteria = None

    # -- fitting ---------------------------------------------------------------------------
    def fit(self, spectra, labels, ids=None):
        """Learn the relations from standard spectra.

        Parameters
        ----------
        spectra : sequence of specutils.Spectrum
            The standards (any flux scale; air or vacuum; read with :func:`specan.read`).
        labels : sequence of str or (str, str)
            Their MK types, ``"G2 V"`` or ``("G2", "V")``.
        ids : sequence of str, optional
            Names of the standards (default: the ObsInfo object names).

        Returns
        -------
        Calibration
            ``self``, fitted.
        """
        X = [self.measure_standard(spec) for spec in spectra]
        if ids is None:
            ids = [get_info(s).object or f"standard {i + 1}" for i, s in enumerate(spectra)]
        return self.fit_criteria(np.array(X), labels, ids=ids)

    def measure_standard(self, spectrum):
        """A standard's criteria, measured at this calibration's resolution (which it is taken to have).

        Parameters
        ----------
        spectrum : specutils.Spectrum

        Returns
        -------
        ndarray
            Criteria in :func:`criteria_names` order (NaN where not measurable).
        """
        return spectrum_criteria(spectrum, self.resolution, measure_velocity=self.measure_velocity,
                                 assume_resolution=self.resolution)["values"]

    def fit_criteria(self, X, labels, ids=None):
        """Learn the relations from already measured criteria (rows in :func:`criteria_names` order).

        Parameters
        ----------
        X : ndarray, shape (n_standards, n_criteria)
        labels : sequence of str or (str, str)
            MK types as in :meth:`fit`.
        ids : sequence of str, optional

        Returns
        -------
        Calibration
            ``self``, fitted.
        """
        X = np.asarray(X, float)
        code, lum, sptypes, lumclasses, emission = parse_labels(labels)
        _check_standards(X, code)
        ids = [f"standard {i + 1}" for i in range(len(code))] if ids is None else [str(i) for i in ids]
        X_fit = _without_emission_lines(X, emission)
        self.model_ = fit_model(X_fit, code, lum, self.settings, code_grid(code, self.settings["grid_step"]))
        self.standards_ = [{"id": i, "sptype": s, "lumclass": lc, "code": float(c), "criteria": x}
                           for i, s, lc, c, x in zip(ids, sptypes, lumclasses, code, X)]
        self._fine = None
        self._weakest = None
        self._criteria = None
        cv = cross_validate(X_fit, code, lum, self.settings)
        self.tau_, self.tau_class_, self.limits_, self.cv_ = cv["tau"], cv["tau_class"], cv["limits"], cv["summary"]
        from .. import __version__

        self.code_version_ = __version__
        self.created_ = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        return self

    # -- applying --------------------------------------------------------------------------
    def lattice_model(self):
        """The fitted relations on the classification lattice (:func:`specan.classify.relations.fine_model`).

        Raises
        ------
        AnalysisError
            When the calibration is not fitted.
        """
        if self.model_ is None:
            raise AnalysisError("calibration not fitted: call fit() or Calibration.load()")
        if self._fine is None:
            self._fine = fine_model(self.model_, self.settings["depth_scale_sigma"])
        return self._fine

    def classify(self, spectrum, rv=None, resolving_power=None, parameters=True, neighbours=False, gravity_weighs=True):
        """MK type of a spectrum; see :func:`specan.classify.classify` for the result.

        With ``parameters`` the atmospheric parameters are measured too
        (:func:`specan.parameters.measure`) and, with ``gravity_weighs``, the surface gravity weighs the
        luminosity classes (:mod:`specan.classify.gravity`). With ``neighbours`` the whole spectrum is compared with
        the library stars (:mod:`specan.classify.neighbours`) and their types weigh the type
        (:func:`specan.classify.classify` asks for it with the shipped calibration).
        """
        meas = spectrum_criteria(spectrum, self.resolution, rv=rv, resolving_power=resolving_power)
        # the pixels at rest in air, sorted, made once for both grids (by the criteria's measurement already,
        # where the axis increases: the same arrays)
        pixels = None
        if neighbours or parameters:
            pixels = meas["pixels"] if meas["pixels"] is not None else rest_pixels(spectrum, meas["rv"])
        evidence = (_library_evidence(spectrum, meas["rv"], meas["notes"], meas["input_fwhm"],
                                      meas["input_resolving_power"], pixels) if neighbours else None)
        atmosphere = (measure_atmosphere(spectrum, meas["rv"], meas["notes"], meas["input_fwhm"],
                                         meas["input_resolving_power"], pixels) if parameters else None)
        weights = None
        if atmosphere is not None and not gravity_weighs:
            meas["notes"].append("log g not used for the luminosity class: the calibration's own standards "
                                 "define the classes")
        elif atmosphere is not None and atmosphere["broader_than_model"]:
            meas["notes"].append("log g not used for the luminosity class: the spectrum is broader than the "
                                 "parameter model")
        elif atmosphere is not None:
            weights, z = gravity.class_weights(atmosphere["logg"].value, atmosphere["logg_err"].value,
                                               atmosphere["teff"].value)
        out = self.classify_criteria(meas["values"], meas["noise"], snr=meas["snr"], class_weight=weights,
                                     neighbours=evidence)
        out["notes"] = meas["notes"] + out["notes"]
        out["rv"] = meas["rv"]
        out.update(atmosphere_columns(atmosphere))
        if weights is not None:
            gravity_agreement(out, z)
        return out

    def classify_criteria(self, values, noise=None, snr=None, class_weight=None, neighbours=None):
        """MK type from criteria already measured (in :func:`criteria_names` order).

        Parameters
        ----------
        values : ndarray
        noise : ndarray, optional
            1-sigma measurement noise of each criterion (zeros if None).
        snr : float, optional
            S/N per pixel, for the ``low_snr`` flag.
        class_weight : ndarray (5,), optional
            An independent likelihood of each luminosity class I..V (the surface gravity's).
        neighbours : specan.classify.neighbours.Evidence, optional
            The spectrum's comparison with the library stars: their types weigh the type posterior.

        Returns
        -------
        dict
            As :func:`specan.classify.classify`.
        """
        fine = self.lattice_model()
        x, noise, ok = _usable_criteria(values, noise)
        # ok is np.isfinite(x): the whole's posterior and the halves' (the composite flag's) in one pass
        p, ll, z2, split = posterior_and_split(x, noise, fine, self.settings["dof"], self.tau_)
        type_weight = None if neighbours is None else neighbours.type_likelihood(fine["grid"])
        est = read_posterior(p, ll, fine["grid"], self.tau_class_, class_weight, type_weight)
        quality = fit_quality(z2, fine["weights"], ok, est.code_index, est.class_index)
        model = fine["class_means"][est.code_index, est.class_index].copy()
        raised = self._flags(x, noise, ok, snr, est, quality, model, split)
        teff, teff_err = teff_estimate(est.code, est.code_err, est.class_prob)
        return {
            "sptype": est.sptype, "lumclass": est.lumclass, "mk": f"{est.sptype} {est.lumclass}",
            "code": est.code, "subclass_err": est.code_err,
            "lumclass_prob": {number_to_lumclass(n): float(v) for n, v in zip(LUMS, est.class_prob)},
            "teff": teff, "teff_err": teff_err,
            "nearest_standards": nearest_standards(self.standards_, x, noise, ok, fine["scatter"][est.code_index],
                                                   fine["weights"], criteria=self._standard_criteria()),
            "flags": [f for f, _ in raised], "notes": [n for _, n in raised], "fit_quality": quality,
            "criteria": criteria_table(x, ok, model), "calibration": self.source,
            "type_evidence": "criteria" if neighbours is None else "criteria and library neighbours",
            "library_neighbours": [] if neighbours is None else neighbours.named(),
        }

    def _flags(self, x, noise, ok, snr, est, quality, model, split):
        """The (flag, note) pairs raised for criteria ``x`` read as ``est``, in :data:`FLAGS` order.

        ``split``: the blue and red halves' code difference (:func:`specan.classify.relations.split_distance`).
        """
        fine, limits = self.lattice_model(), self.limits_
        return (flags.low_snr(snr)
                + flags.out_of_range(int(ok.sum()), len(x), est.code, fine["grid"], quality, limits["quality_p90"])
                + flags.poor_fit(quality, limits["quality_p975"], est.sptype, est.lumclass)
                + flags.featureless(x, len(CRITERIA), self._weakest_standard())
                + flags.emission(x, noise, ok, model, fine["scatter"][est.code_index], est.code)
                + flags.composite(split, limits["split_p975"]))

    def _standard_criteria(self):
        """The standards' criteria as one (standards, criteria) array, made once per fitted calibration."""
        if self._criteria is None:
            self._criteria = np.array([st["criteria"] for st in self.standards_])
        return self._criteria

    def _weakest_standard(self):
        """Smallest summed absolute depth of the depth criteria among the standards."""
        if self._weakest is None:
            S = np.array([st["criteria"] for st in self.standards_], float)[:, :len(CRITERIA)]
            self._weakest = float(np.min(np.nansum(np.abs(S), axis=1)))
        return self._weakest

    # -- persistence -----------------------------------------------------------------------
    def to_dict(self):
        """Plain, JSON-ready content of the calibration."""
        self.lattice_model()
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "code_version": self.code_version_,
            "created": self.created_,
            "source": self.source,
            "resolution_fwhm_angstrom": float(self.resolution.value),
            "wavelength_medium": "air",
            "type_code_scale": "O0=0, B0=10, A0=20, F0=30, G0=40, K0=50, M0=60 (specan.mktypes)",
            # the basis is specan.classify.relations.lum_basis; the text stays as the shipped files have it
            "luminosity_classes": "I=1 ... V=5; offsets on basis [dwarf->giant, giant->supergiant] "
                                  "(specan.classify._lum_basis)",
            "method": "per criterion: kernel-weighted local regression on type code with class offsets; "
                      "classification by a weighted Student-t likelihood on the (code, class) lattice",
            "settings": self.settings,
            "likelihood_temperature": self.tau_,
            "likelihood_temperature_classes": self.tau_class_,
            "limits": self.limits_,
            "internal_cross_validation": self.cv_,
            "criteria": definitions(),
            "grid_code": _round(self.model_["grid"]),
            "relations": _relations_to_file(self.model_),
            "skipped_standards": list(self.skipped_),
            "standards": [{"id": s["id"], "sptype": s["sptype"], "lumclass": s["lumclass"],
                           "code": s["code"], "criteria": _round(s["criteria"])} for s in self.standards_],
        }

    def save(self, path):
        """Write the calibration as indented JSON (human-readable: one line per tabulated relation)."""
        text = json.dumps(self.to_dict(), indent=1, allow_nan=False)
        # one line per list of numbers/strings, so a relation reads as one row
        text = re.sub(r"\[\s+([^\[\]{}]*?)\s+\]", lambda m: "[" + re.sub(r"\s+", " ", m.group(1)) + "]", text)
        Path(path).write_text(text + "\n", encoding="utf-8")
        return Path(path)

    @classmethod
    def from_dict(cls, data, path=None):
        """Rebuild a calibration from :meth:`to_dict` content."""
        _check_format(data, path)
        cal = cls(resolution=data["resolution_fwhm_angstrom"] * u.AA, source=data.get("source", ""),
                  **_settings_from_file(data["settings"]))
        cal.model_ = _model_from_file(data["relations"], data["grid_code"])
        cal.standards_ = [{"id": st["id"], "sptype": st["sptype"], "lumclass": st["lumclass"],
                           "code": st["code"], "criteria": _floats(st["criteria"])}
                          for st in data["standards"]]
        cal.tau_ = float(data["likelihood_temperature"])
        cal.tau_class_ = float(data.get("likelihood_temperature_classes", cal.tau_))
        cal.limits_ = dict(data["limits"])
        cal.cv_ = data.get("internal_cross_validation")
        cal.skipped_ = list(data.get("skipped_standards", []))
        cal.created_ = data.get("created")
        cal.code_version_ = data.get("code_version")
        return cal

    @classmethod
    def load(cls, path):
        """Read a calibration written by :meth:`save`."""
        path = Path(path)
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ReadError("calibration file not found", path) from None
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise ReadError(f"calibration file is not valid JSON ({exc})", path) from None
        return cls.from_dict(data, path)


def _library_evidence(spectrum, rv, notes, fwhm=None, resolving_power=None, pixels=None):
    """The spectrum's comparison with the library stars, or None (with a note) where it cannot be made.

    ``fwhm`` (A) or ``resolving_power``: the resolution the criteria took the spectrum to have;
    ``pixels``: its :func:`specan.resolution.rest_pixels` at ``rv`` when made already.
    """
    try:
        return library.measure(spectrum, rv=rv, fwhm_in=fwhm, resolving_power=resolving_power, notes=notes,
                               pixels=pixels)
    except AnalysisError as exc:
        notes.append(f"type from the criteria alone, no library comparison: {getattr(exc, 'reason', exc)}")
        return None


# ---------------------------------------------------------------------------
# Standards and their labels
# ---------------------------------------------------------------------------

def parse_labels(labels):
    """MK labels -> (codes, class numbers, temperature types, class names, emission marked).

    Parameters
    ----------
    labels : sequence of str or (str, str)
        ``"G2 V"`` or ``("G2", "V")``.

    Returns
    -------
    tuple
        Type codes and class numbers (ndarrays), temperature types and class names
        (lists of str), and whether each type marks emission lines (ndarray of bool).

    Raises
    ------
    ValueError
        On a type or class that cannot be read.
    """
    codes, lums, sptypes, lumclasses, emission = [], [], [], [], []
    for lab in labels:
        if isinstance(lab, str):
            parts = lab.split()
            if len(parts) < 2:
                raise ValueError(f"MK type {lab!r} has no luminosity class")
            sp, lc = parts[0], " ".join(parts[1:])
        else:
            sp, lc = lab
        n = lumclass_to_number(lc)
        codes.append(sptype_to_code(sp))
        lums.append(float(n))
        sptypes.append(str(sp))
        lumclasses.append(number_to_lumclass(n))
        emission.append(marks_emission(sp, lc))
    return np.array(codes), np.array(lums), sptypes, lumclasses, np.array(emission, bool)


def _check_standards(X, code):
    """Refuse a criteria matrix of the wrong shape, or fewer than 8 standards."""
    if X.shape != (len(code), len(criteria_names())):
        raise ValueError(f"criteria matrix has shape {X.shape}, expected ({len(code)}, "
                         f"{len(criteria_names())})")
    if len(code) < 8:
        raise AnalysisError(f"only {len(code)} standards: at least 8 are needed to calibrate")


def _without_emission_lines(X, emission):
    """The criteria matrix with the emission-sensitive criteria of emission-line standards set to NaN.

    A standard whose type marks emission lines ("M4.5E", "B2 Ve") says nothing about the
    absorption those lines have at its type: its criteria on them are left out of the fit.
    (The JHC library's dMe star, kept in, widened the H-alpha scatter of the M types
    sixfold, so that H-alpha emission 45% above the continuum went unflagged: measured.)
    """
    X_fit = X.copy()
    # A standard whose H-alpha rises above its pseudo-continuum by more than the emission flag's
    # depth shows emission its type does not mark (the MILES M6 V star m0884: -0.28, unmarked,
    # widened the M-dwarf H-alpha scatter so that the JHC dMe star went unflagged: measured).
    halpha = X[:, criteria_names().index("halpha")]
    shows = np.nan_to_num(halpha, nan=0.0) < flags.EMISSION_DEPTH
    X_fit[np.ix_(np.asarray(emission, bool) | shows, EMISSION_SENSITIVE)] = np.nan
    return X_fit


def _usable_criteria(values, noise):
    """Criteria as floats, their noise (zeros if None, NaN -> 0) and which are measured.

    Raises AnalysisError when fewer than 5 are measured.
    """
    x = np.asarray(values, float)
    noise = np.zeros_like(x) if noise is None else np.nan_to_num(np.asarray(noise, float))
    ok = np.isfinite(x)
    n_ok, n_all = int(ok.sum()), len(x)
    if n_ok < 5:
        raise AnalysisError(f"only {n_ok} of {n_all} classification criteria measurable "
                            "(they need positive flux over 3500-7400 A)")
    return x, noise, ok


# ---------------------------------------------------------------------------
# The file
# ---------------------------------------------------------------------------

def _round(a, digits=5):
    """Round to ``digits`` significant digits for a compact, readable file."""
    a = np.asarray(a, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        mag = np.where(np.isfinite(a) & (a != 0), np.floor(np.log10(np.abs(a))), 0)
    scale = 10.0 ** (digits - 1 - mag)
    out = np.round(a * scale) / scale
    return [None if not np.isfinite(v) else float(v) for v in out.ravel()] if out.ndim <= 1 else \
        [_round(row, digits) for row in out]


def _relations_to_file(model):
    """Criterion name -> its weight and tabulated mean, class offsets and scatter (rounded)."""
    return {n: {"weight": _round([model["weights"][j]])[0],
                "mean": _round(model["mean"][:, j]),
                "offset_giant": _round(model["offsets"][:, j, 0]),
                "offset_supergiant": _round(model["offsets"][:, j, 1]),
                "scatter": _round(model["scatter"][:, j])}
            for j, n in enumerate(criteria_names())}


def _check_format(data, path):
    """ReadError unless ``data`` is a calibration of a format and criteria this version reads."""
    if data.get("format") != FORMAT_NAME:
        raise ReadError(f"not a specan MK calibration (format {data.get('format')!r})", path)
    if int(data.get("format_version", -1)) > FORMAT_VERSION:
        raise ReadError(f"calibration format version {data.get('format_version')} is newer than this "
                        f"specan understands ({FORMAT_VERSION}); update specan", path)
    if _bands(data.get("criteria") or []) != _bands(json.loads(json.dumps(definitions()))):
        raise ReadError("calibration was made with other criteria definitions than this specan "
                        "version uses; refit it with 'specan calibrate'", path)


def _bands(defs):
    """What was measured; source texts may be edited freely."""
    return [{k: v for k, v in d.items() if k != "source"} for d in defs]


def _settings_from_file(s):
    """Constructor arguments from a file's settings (defaults for those older files lack)."""
    return dict(bandwidth=s["bandwidth"], neighbours=s["neighbours"], ridge=tuple(s["ridge"]),
                class_bandwidth=s.get("class_bandwidth", 0.0), class_neighbours=s.get("class_neighbours", 0),
                class_ridge=s.get("class_ridge", s["ridge"][1]),
                scatter_floor=s["scatter_floor"], dof=s["dof"], redundancy_power=s["redundancy_power"],
                depth_scale_sigma=s.get("depth_scale_sigma", 0.0),
                grid_step=s["grid_step"], cv_folds=s["cv_folds"])


def _nan_for_none(values):
    return [np.nan if v is None else v for v in values]


def _floats(values):
    """A file's list of numbers (None for not measured) as an array with NaN."""
    return np.array(_nan_for_none(values))


def _model_from_file(rel, grid_code):
    """The model dict from a file's ``relations`` and ``grid_code``."""
    names = criteria_names()

    def table(key):   # (G, J)
        return np.array([_nan_for_none(rel[n][key]) for n in names]).T

    return {"grid": np.array(grid_code, float), "mean": table("mean"),
            "offsets": np.stack([table("offset_giant"), table("offset_supergiant")], axis=-1),
            "scatter": table("scatter"),
            "weights": np.array([rel[n]["weight"] for n in names], float)}
