"""specan: analyse a night of stellar absorption-line spectra.

read -> prepare (mask, S/N, continuum) -> lines -> velocity -> classify -> report.
"""

from ._offline import configure_offline

configure_offline()

from .errors import SpecanError  # noqa: E402
from .obsinfo import ObsInfo, get_info  # noqa: E402

__version__ = "0.1.0"

__all__ = ["read", "prepare", "classify", "SpecanError", "ObsInfo", "get_info", "__version__"]


def read(source, **overrides):
    """Read a spectrum; see :func:`specan.io.read`."""
    from .io import read as _read

    return _read(source, **overrides)


def prepare(spectrum, **kwargs):
    """Mask, measure S/N and normalise; see :func:`specan.prepare.prepare`."""
    from .prepare import prepare as _prepare

    return _prepare(spectrum, **kwargs)


def classify(spectrum, calibration=None, **kwargs):
    """MK-classify a spectrum; see :func:`specan.classify.classify`."""
    from .classify import classify as _classify

    return _classify(spectrum, calibration=calibration, **kwargs)
