"""MK types as physical quantities: effective temperature and absolute magnitude scales.

Effective temperature and absolute visual magnitude from the type and luminosity
class through the published scales in ``specan/data/mk_scales.ecsv`` (dwarfs:
Pecaut & Mamajek 2013 with Martins et al. 2005 and Schmidt-Kaler 1982 for the
early types; giants: Alonso et al. 1999 and Schmidt-Kaler 1982; supergiants:
Schmidt-Kaler 1982 and Levesque et al. 2005). Every value in that table was
recalled from the publication, not copied from it (no network): the ``source``
column says "(from memory)" and the numbers should be checked against the
printed tables.

Classes II and IV are not tabulated: they are placed halfway between their
neighbours (II between I and III, IV between III and V; log Teff and M_V
averaged), with an extra uncertainty of gap/(4*sqrt(3)), the standard
deviation of a uniform spread over the middle half of the gap. This is our
convention, not a published calibration.

Shared by the synthetic model (continuum temperature), the classifier (Teff of a type) and
physics (distances).
"""

from __future__ import annotations

import functools
from importlib import resources

import astropy.units as u
import numpy as np

from .mktypes import lumclass_to_number

__all__ = ["load_scales", "scale_range", "teff_from_type", "absolute_magnitude", "lumclass_number"]

# Tabulated groups, keyed by luminosity-class number (specan.mktypes: I=1 ... V=5).
_TABULATED = {1: "I", 3: "III", 5: "V"}
# Untabulated classes -> the two tabulated neighbours they sit halfway between.
_BETWEEN = {2: (1, 3), 4: (3, 5)}


@functools.lru_cache(maxsize=1)
def load_scales():
    """The MK calibration table (type code -> Teff, M_V, scatter, source) as a ``QTable``.

    Returns
    -------
    astropy.table.QTable
        Columns ``lumclass`` ("I", "III", "V"), ``sptype``, ``code``, ``teff`` (K),
        ``m_v`` (mag), ``teff_sigma`` (K), ``m_v_sigma`` (mag), ``source``.
        Cached; do not modify it in place.
    """
    from astropy.table import QTable

    with resources.as_file(resources.files("specan.data") / "mk_scales.ecsv") as path:
        return QTable.read(path, format="ascii.ecsv")


@functools.lru_cache(maxsize=8)
def _group_arrays(lumnum: int):
    """Plain float arrays (code, log10 Teff, M_V, Teff sigma fraction, M_V sigma) for one group."""
    t = load_scales()
    rows = t[t["lumclass"] == _TABULATED[lumnum]]
    rows = rows[np.argsort(rows["code"])]
    teff = rows["teff"].to_value(u.K)
    return (
        np.asarray(rows["code"], float),
        np.log10(teff),
        rows["m_v"].to_value(u.mag),
        rows["teff_sigma"].to_value(u.K) / teff,
        rows["m_v_sigma"].to_value(u.mag),
    )


def lumclass_number(lumclass) -> int:
    """Luminosity class as a number 1 (I) ... 5 (V), from "I".."V" (Ia/Iab/Ib count as I) or 1..5."""
    if lumclass is None:
        raise ValueError("luminosity class is None; pass 'I'..'V' (or the default 'V')")
    if isinstance(lumclass, (int, np.integer)) and 1 <= int(lumclass) <= 5:
        return int(lumclass)
    return lumclass_to_number(str(lumclass))


def scale_range(lumclass="V") -> tuple[float, float]:
    """Range of type codes covered by the scale of a luminosity class (codes outside are clamped)."""
    n = lumclass_number(lumclass)
    groups = _BETWEEN.get(n, (n,))
    lo = max(_group_arrays(g)[0][0] for g in groups)
    hi = min(_group_arrays(g)[0][-1] for g in groups)
    return float(lo), float(hi)


def _evaluate(code, lumnum: int):
    """(log10 Teff, M_V, Teff sigma fraction, M_V sigma) at codes, for any class I..V (floats/arrays)."""
    code = np.asarray(code, float)
    if lumnum in _TABULATED:
        c, lt, mv, st, sm = _group_arrays(lumnum)
        # np.interp clamps to the end values outside the tabulated range.
        return (np.interp(code, c, lt), np.interp(code, c, mv),
                np.interp(code, c, st), np.interp(code, c, sm))
    lo_n, hi_n = _BETWEEN[lumnum]
    cmin, cmax = scale_range(lumnum)
    cc = np.clip(code, cmin, cmax)
    a = _evaluate(cc, lo_n)
    b = _evaluate(cc, hi_n)
    lt = 0.5 * (a[0] + b[0])
    mv = 0.5 * (a[1] + b[1])
    # Halfway placement is our convention: add the s.d. of a uniform spread over
    # the middle half of the gap, gap / (4 sqrt 3), to the scatter.
    k = 1.0 / (4.0 * np.sqrt(3.0))
    st = np.hypot(0.5 * (a[2] + b[2]), k * np.abs(10 ** (a[0] - b[0]) - 1.0))
    sm = np.hypot(0.5 * (a[3] + b[3]), k * np.abs(a[1] - b[1]))
    return lt, mv, st, sm


def _propagate(code, code_err, lumnum, index):
    """Value at code and its error from the subclass error: half the change over code +- code_err.

    A finite difference rather than the local slope, so a step in the scale
    (e.g. across O9-B0) is carried in full when code_err straddles it.
    """
    code = np.asarray(code, float)
    code_err = np.abs(np.asarray(code_err, float))
    mid = _evaluate(code, lumnum)
    plus = _evaluate(code + code_err, lumnum)[index]
    minus = _evaluate(code - code_err, lumnum)[index]
    return mid, 0.5 * np.abs(plus - minus)


def teff_from_type(code, lumclass="V", code_err=0.0):
    """Effective temperature from a numeric MK type code and luminosity class.

    Interpolated linearly in log10 Teff between the tabulated types of
    ``specan/data/mk_scales.ecsv`` (see the module docstring for the scales);
    codes outside a scale's range are clamped to its end (:func:`scale_range`).

    Parameters
    ----------
    code : float or array-like
        Type code from :mod:`specan.mktypes` (O0 = 0, B0 = 10, ... M0 = 60; G2 = 42).
    lumclass : str or int, optional
        Luminosity class "I".."V" (Ia/Iab/Ib count as I) or 1..5. Default "V".
    code_err : float or array-like, optional
        1-sigma uncertainty of the code in subclasses.

    Returns
    -------
    teff, teff_err : `~astropy.units.Quantity` (K)
        ``teff_err`` combines in quadrature the subclass error carried through
        the scale (half the Teff change over code +- code_err) and the scale's
        intrinsic scatter at that type.
    """
    n = lumclass_number(lumclass)
    (lt, _, st, _), dlt = _propagate(code, code_err, n, 0)
    teff = 10.0**lt
    # d(Teff) = Teff ln(10) d(log Teff)
    err = np.hypot(teff * np.log(10.0) * dlt, teff * st)
    return teff * u.K, err * u.K


def absolute_magnitude(code, lumclass="V", code_err=0.0):
    """Absolute visual magnitude M_V from a numeric MK type code and luminosity class.

    Interpolated linearly between the tabulated types of
    ``specan/data/mk_scales.ecsv``; codes outside a scale's range are clamped.

    Parameters
    ----------
    code : float or array-like
        Type code from :mod:`specan.mktypes` (G2 = 42).
    lumclass : str or int, optional
        Luminosity class "I".."V" or 1..5. Default "V".
    code_err : float or array-like, optional
        1-sigma uncertainty of the code in subclasses.

    Returns
    -------
    m_v, m_v_err : `~astropy.units.Quantity` (mag)
        ``m_v_err`` combines in quadrature the subclass error through the scale
        and the scale's intrinsic scatter at that type.
    """
    n = lumclass_number(lumclass)
    (_, mv, _, sm), dmv = _propagate(code, code_err, n, 1)
    return mv * u.mag, np.hypot(dmv, sm) * u.mag
