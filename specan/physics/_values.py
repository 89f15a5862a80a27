"""Plain floats from the Quantities, numbers and masked cells that reach the physics stage."""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np


def as_float(value, unit):
    """Quantity or number -> float in ``unit``; None stays None, a non-finite number becomes None."""
    if value is None:
        return None
    if isinstance(value, u.Quantity):
        return float(value.to_value(unit))
    v = float(value)
    return None if not math.isfinite(v) else v


def value_of(mapping, key, unit=None):
    """Value of ``key`` in a dict as float in ``unit`` (Quantity or number), or None.

    None also for a missing dict, a masked cell, a value that is not a number or has
    the wrong unit, and a non-finite value.
    """
    if not mapping:
        return None
    val = mapping.get(key)
    if val is None:
        return None
    if np.ma.is_masked(val):
        return None
    try:
        out = float(val.value if isinstance(val, u.Quantity) else val) if unit is None else as_float(val, unit)
    except (TypeError, ValueError, u.UnitsError):
        return None
    return out if out is not None and math.isfinite(out) else None
