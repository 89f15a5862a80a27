"""specan: analyse a night of stellar absorption-line spectra.

read -> prepare (mask, S/N, continuum) -> velocity -> lines -> classify -> physics -> report.
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


def __getattr__(name):
    # ``specan.prepare`` and ``specan.classify`` are stage modules that can be called
    # like their main functions (see specan/_callable.py); import them on first use.
    if name in ("prepare", "classify"):
        import importlib

        return importlib.import_module(f".{name}", __name__)
    raise AttributeError(f"module 'specan' has no attribute {name!r}")
