"""One input's catalogue row, collected while its stages run.

A stage's scalar results become columns, its flags join the row's flags, and a
stage that declines or fails adds a clause to the row's reason instead of
stopping the night.
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..errors import SpecanError
from .catalogue import CORE_COLUMNS

__all__ = ["Recorder", "info_columns", "lines_columns", "final_info", "EMISSION_FLAG_LINES", "LOW_SNR",
           "PLOT_CHOICES", "plot_wanted"]

#: Which inputs get a per-spectrum figure: ``flagged`` (the default: rows with a flag or a
#: declined or failed stage, and those named), ``all``, ``none``.
PLOT_CHOICES = ("flagged", "all", "none")

#: Lines whose detection in emission raises the ``emission_lines`` flag.
EMISSION_FLAG_LINES = ("H_alpha", "H_beta")

#: S/N per pixel below which a spectrum is flagged ``low_snr``: the classification
#: criteria and line measurements become unreliable well before S/N 20 at R ~ 2000
#: (common practice).
LOW_SNR = 20.0

_MAX_REASON = 500
_CORE_NAMES = {name for name, _, _ in CORE_COLUMNS}


def _plain(value):
    """(value, unit) of a scalar stage result for the catalogue, or None if not a scalar."""
    import astropy.units as u

    unit = None
    if isinstance(value, u.Quantity):
        if not value.isscalar:
            return None
        unit = _unit_name(value.unit)
        value = value.value
    if value is None:
        return (None, unit)
    if isinstance(value, (bool, np.bool_)):
        return (bool(value), None)
    if isinstance(value, (int, np.integer)):
        return (int(value), unit)
    if isinstance(value, (float, np.floating)):
        return (float(value), unit)
    if isinstance(value, str):
        return (value, None)
    return None


#: The catalogue name of each unit met (None: dimensionless), by the unit object's identity,
#: the object kept so that its identity is not reused. Comparing a unit with dimensionless
#: and writing its name cost ~20 us each in astropy, some 20 times a spectrum (0.7 ms).
_UNIT_NAMES = {}
_UNIT_NAMES_KEPT = 1000


def _unit_name(unit):
    """The catalogue's name of ``unit``: its string, or None when dimensionless."""
    kept = _UNIT_NAMES.get(id(unit))
    if kept is None:
        import astropy.units as u

        if len(_UNIT_NAMES) >= _UNIT_NAMES_KEPT:
            _UNIT_NAMES.clear()
        kept = _UNIT_NAMES[id(unit)] = (unit, None if unit == u.dimensionless_unscaled else unit.to_string())
    return kept[1]


def _json_safe(value):
    """None for an infinity, which JSON cannot hold (NaN stays: Python's json reads it back)."""
    if isinstance(value, float) and math.isinf(value):
        return None
    return value


class Recorder:
    """Collects one input's results while the stages run."""

    def __init__(self, path):
        self.values = {"file": str(path), "object": None, "status": "ok"}
        self.units = {}
        self.reasons = []
        self.flags = set()
        self.stages_run = []
        self.warnings = []

    def set(self, name, value, unit=None):
        self.values[name] = _json_safe(value)
        if unit:
            self.units[name] = unit

    def add_stage_dict(self, stage, result, units=None):
        """Scalar entries of a stage's result dict become columns (prefixed on a clash).

        ``units`` maps keys whose values are plain floats to their unit (the physics
        stage returns such floats, see ``specan.physics.DERIVED_UNITS``).
        """
        for key, raw in result.items():
            if key == "flags":
                self.add_flags(raw)
                continue
            plain = _plain(raw)
            if plain is None:
                continue
            name = str(key)
            unit = plain[1] or (units or {}).get(name)
            if name in self.values or name in _CORE_NAMES:
                name = f"{stage}_{name}"
            self.set(name, plain[0], unit)

    def add_flags(self, flags):
        if flags is None:
            return
        if isinstance(flags, str):
            flags = [f for f in re.split(r"[,\s]+", flags) if f]
        self.flags.update(str(f) for f in flags)

    def failed(self, stage, exc, unexpected):
        if unexpected:
            self.values["status"] = "error"
            text = f"{stage}: internal error {type(exc).__name__}: {exc}"
        else:
            if self.values["status"] == "ok":
                self.values["status"] = "partial"
            text = f"{stage}: {getattr(exc, 'reason', str(exc))}"
        self.reasons.append(" ".join(text.split())[:_MAX_REASON])

    def run_stage(self, stage, func, *args, **kwargs):
        """Run one stage; a diagnosed problem or an unexpected exception becomes part of the row."""
        try:
            result = func(*args, **kwargs)
        except SpecanError as exc:
            self.failed(stage, exc, unexpected=False)
            return None
        except Exception as exc:  # noqa: BLE001 - one bad input must never stop the night
            self.failed(stage, exc, unexpected=True)
            return None
        self.stages_run.append(stage)
        return result

    def finish(self):
        self.values["reason"] = "; ".join(self.reasons)
        self.values["flags"] = ",".join(sorted(self.flags))
        self.values["stages_run"] = " ".join(self.stages_run)
        self.values["warnings"] = " | ".join(dict.fromkeys(self.warnings))
        return {"values": self.values, "units": self.units}


def info_columns(rec, spectrum):
    """The carried metadata's columns (object, time, pointing, site, medium, R, S/N) and warnings."""
    import astropy.units as u

    from ..obsinfo import get_info

    info = get_info(spectrum)
    rec.set("object", info.object)
    rec.set("mjd_mid", info.mjd_mid, "d")
    rec.set("exptime", None if info.exptime is None else float(info.exptime.to_value(u.s)), "s")
    rec.set("ra", info.ra_deg, "deg")
    rec.set("dec", info.dec_deg, "deg")
    rec.set("site_known", info.site is not None)
    rec.set("medium", info.medium)
    # the reader assumed the medium (the file does not state it): a velocity off by ~83 km/s
    # if the assumption is wrong, so the row says so (the velocity stage names it the same way)
    rec.set("medium_assumed", bool(info.medium_assumed))
    rec.set("resolving_power", info.resolving_power)
    if info.resolving_power is not None:
        rec.set("resolving_power_source", "file")
    rec.set("snr", info.snr)
    rec.set("snr_source", info.snr_source)
    rec.warnings.extend(str(w) for w in info.warnings)


def lines_columns(rec, table):
    """Counts of detected and emission lines from the lines stage's table, and the emission flag."""
    cols = table.colnames
    detected = np.asarray(table["detected"], bool) if "detected" in cols else np.ones(len(table), bool)
    rec.set("n_lines", int(detected.sum()))
    if "emission" in cols:
        emission = np.asarray(table["emission"], bool) & detected
        rec.set("n_emission", int(emission.sum()))
        # An emission-line star (Be, Me, T Tauri...) is recognised by its Balmer
        # lines, H alpha first (common practice); a single weak metal "emission"
        # is more often a continuum ripple than a star worth a second look.
        if "id" in cols and any(str(i) in EMISSION_FLAG_LINES for i in table["id"][emission]):
            rec.add_flags(["emission_lines"])


def final_info(rec, spectrum):
    """What the stages left in the carried metadata: their warnings, and the low_snr flag."""
    from ..obsinfo import get_info

    # The stages may add warnings to the carried metadata as they go.
    info = get_info(spectrum)
    rec.warnings.extend(str(w) for w in info.warnings)
    if info.snr is not None and np.isfinite(info.snr) and info.snr < LOW_SNR:
        rec.add_flags(["low_snr"])


def plot_wanted(values, choice="flagged", named=()) -> bool:
    """Whether a row's per-spectrum figure is asked for.

    Parameters
    ----------
    values : dict
        The row (``file``, ``object``, ``status``, ``flags``).
    choice : {"flagged", "all", "none"}
        ``flagged``: rows with a flag, or whose status is not ``ok`` (a stage declined or
        failed); ``all``; ``none`` (only the named ones).
    named : iterable of str
        Objects or files (as given, or their file name, with or without the suffix) always drawn.

    Returns
    -------
    bool
    """
    if named and _is_named(values, named):
        return True
    if choice == "all":
        return True
    if choice == "flagged":
        return bool(values.get("flags")) or values.get("status") not in ("ok", None)
    return False


def _is_named(values, named) -> bool:
    import os

    file = str(values.get("file") or "")
    base = os.path.basename(file)
    candidates = {file, base, base.split(".")[0], str(values.get("object") or "")} - {""}
    return any(str(n) in candidates for n in named)
