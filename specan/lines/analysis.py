"""All line work on one spectrum at once: lines, band indices and unidentified features."""

from __future__ import annotations

import astropy.units as u
import numpy as np

from .bands import band_indices
from .data import LineData, normalised
from .identification import identify
from .measurement import measure

__all__ = ["analyse"]


def analyse(spectrum, linelist=None, bands=None, rv=0 * u.km / u.s, resolving_power=None,
            unidentified=True, **options):
    """Lines, band indices and unidentified features of one spectrum, preparing it once.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    linelist, bands : str, path or QTable, optional
        Line list for :func:`measure`, band definitions for :func:`band_indices`.
    rv : Quantity or None
        Radial velocity (``None``: estimated by :func:`measure`; the indices use it too).
    resolving_power : float, optional
    unidentified : bool
        Also run :func:`identify` and return its unidentified strong features.
    **options
        Passed to :func:`measure`.

    Returns
    -------
    dict
        ``{"lines": QTable from measure, "indices": QTable from band_indices,
        "unidentified": rows of identify with status "unidentified" (or None)}``.
    """
    spec = normalised(spectrum)
    data = LineData(spec, resolving_power)   # built once for measure and identify (~30 ms)
    table = measure(spec, linelist, rv=rv, resolving_power=resolving_power, _data=data, **options)
    indices = band_indices(spec, bands, rv=table.meta["rv"])
    unknown = None
    if unidentified:
        ident = identify(spec, linelist, rv=table.meta["rv"], resolving_power=resolving_power, _data=data,
                         **{k: v for k, v in options.items() if k in ("window", "detect_sigma", "min_depth")})
        unknown = ident[np.asarray(ident["status"]) == "unidentified"]
    return {"lines": table, "indices": indices, "unidentified": unknown}
