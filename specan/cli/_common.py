"""Shared plumbing for per-file subcommands (no science here)."""

from __future__ import annotations

import json
import math
import sys

import click
import numpy as np

from ..errors import SpecanError

__all__ = ["read_options", "overrides_from", "for_each_file", "to_jsonable", "echo_json"]


#: The reader options every file-reading subcommand accepts: ``specan.read`` keyword -> (flag,
#: click settings). One table, so the options and what is passed on cannot drift apart.
_READ_OPTIONS = {
    "hdu": ("--hdu", dict(default=None, help="FITS HDU (index or EXTNAME) holding the spectrum.")),
    "wave_unit": ("--wave-unit", dict(
        default=None, help="Wavelength unit of text files without one in their header (e.g. nm, Angstrom).")),
    "medium": ("--medium", dict(type=click.Choice(["air", "vacuum"]), default=None,
                                help="Medium of the wavelength scale when the file does not state it.")),
    "site": ("--site", dict(default=None,
                            help="Observatory as 'lat,lon,height' (deg, deg east, m), overriding the header.")),
    "ra": ("--ra", dict(default=None, help="Right ascension (deg or h:m:s), overriding the header.")),
    "dec": ("--dec", dict(default=None, help="Declination (deg or d:m:s), overriding the header.")),
    "resolving_power": ("--resolving-power", dict(
        type=float, default=None, help="Resolving power R = lambda/FWHM when the file does not state it.")),
}


def read_options(func):
    """Options every file-reading subcommand accepts (passed to ``specan.read``)."""
    for key, (flag, settings) in reversed(list(_READ_OPTIONS.items())):
        func = click.option(flag, key, **settings)(func)
    return func


def overrides_from(kwargs: dict) -> dict:
    """Pick the reader overrides out of a subcommand's keyword arguments."""
    return {k: kwargs[k] for k in _READ_OPTIONS if kwargs.get(k) is not None}


def to_jsonable(value):
    """Make numpy/astropy values JSON-serialisable; NaN and inf become null."""
    import astropy.units as u

    if isinstance(value, u.Quantity):
        value = value.value
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None
    if value is None or isinstance(value, (str, int)):
        return value
    return str(value)


def echo_json(obj) -> None:
    """Print one JSON object on one line."""
    click.echo(json.dumps(to_jsonable(obj), ensure_ascii=False))


def for_each_file(files, work, on_result, as_json=False, debug=False) -> int:
    """Run ``work(path)`` on each file; report failures on stderr and carry on.

    Returns the number of files that failed. With ``as_json`` a failure also
    prints ``{"file": ..., "error": ...}`` on stdout so scripts see every file.
    """
    failures = 0
    for path in files:
        try:
            result = work(path)
        except SpecanError as exc:
            if debug:
                raise
            failures += 1
            click.echo(f"specan: error: {exc}", err=True)
            if as_json:
                echo_json({"file": str(path), "error": exc.reason})
            continue
        on_result(path, result)
    return failures


def exit_with_failures(failures: int) -> None:
    """Exit status = number of failed files (capped at 100), 0 when all worked."""
    if failures:
        sys.exit(min(failures, 100))
