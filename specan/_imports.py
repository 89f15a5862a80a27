"""Third-party imports that cost a specan process more start-up than they give it.

Every ``specan run`` pays its imports once before any spectrum is read, and with
several jobs they do not divide: on this 2-core machine they were about half of
the ~4.5 s of a 1,000-spectrum night that two workers cannot share
(``python -X importtime``, 2026-12-04). Where a library loads far more than
specan uses, and can be kept from it safely, that is done here, in one place.
(scipy.signal, 0.52 s for the peak finding, cannot: its submodules load the
whole package.)
"""

from __future__ import annotations

import sys

__all__ = ["import_specutils"]

_PLOTTER = "ndcube.visualization.mpl_plotter"


def import_specutils():
    """Import specutils without the matplotlib plotter that ndcube resolves at class definition.

    specutils' ``Spectrum`` is an ndcube ``NDCube``. When that class is defined, ndcube imports
    its default matplotlib plotter only to copy the plot method's docstring, and that imports
    matplotlib.pyplot, astropy's WCS axes and pytest: 0.56 s of each specan process's start here,
    in runs that draw nothing or draw through matplotlib's object API with Agg. ndcube treats the
    plotter as optional (it catches the ImportError) and imports it again when ``.plotter`` is
    first used, so hiding it while specutils is imported changes nothing but that docstring.
    Does nothing if specutils is already imported.
    """
    if "specutils" in sys.modules:
        return
    hidden = _PLOTTER not in sys.modules
    if hidden:
        sys.modules[_PLOTTER] = None   # makes "import" raise ImportError (Python's documented rule)
    try:
        import specutils  # noqa: F401
    finally:
        if hidden and _PLOTTER in sys.modules and sys.modules[_PLOTTER] is None:
            del sys.modules[_PLOTTER]
