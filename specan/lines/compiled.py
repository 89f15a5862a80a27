"""Whether the lines stage's compiled kernels run (numba): the Voigt batch's iterations and the
Gaussian groups (:mod:`.lmkernel`), the windows' walks (:mod:`.walkkernel`), the hydrogen lines' far wings (:mod:`.wingkernel`), the metal lines in
their windows (:mod:`.blendkernel`) and the matched filter's and wide smoothing's correlations
(:mod:`.filterkernel`).

``SPECAN_COMPILED=0`` in the environment or
numba failing to import keeps every caller on its numpy code, which stays the reference the kernels
are tested against (tests/test_lines_compiled.py, tests/test_lines_walkkernel.py, tests/test_lines_wingkernel.py,
tests/test_lines_blendkernel.py, tests/test_lines_filterkernel.py). Set
:data:`COMPILED` to False to do the same in a running process (the tests do, to compare the two).
"""

from __future__ import annotations

import importlib
import os

__all__ = ["COMPILED", "walks", "wings", "blends", "filters", "lm"]

#: False: the numpy code runs, numba is not imported for it
COMPILED = os.environ.get("SPECAN_COMPILED", "1") != "0"

#: whether numpy's complex arithmetic is the wing kernel's (:func:`specan.lines.wingkernel.numpy_agrees`),
#: found once a process
_WINGS_AGREE = []


def _kernel(name):
    """Module ``name`` of this package where its kernels run (numba imports, :data:`COMPILED`), else None.

    Imported on first use: numba's own import takes ~0.2 s, which a process that never measures a
    line need not pay.
    """
    if not COMPILED:
        return None
    module = importlib.import_module(f".{name}", __package__)
    return module if module.AVAILABLE else None


def walks():
    """:mod:`.walkkernel` where its kernel runs, else None."""
    return _kernel("walkkernel")


def wings():
    """:mod:`.wingkernel` where its kernel runs and numpy's complex arithmetic here is the one it makes
    (checked once a process), else None."""
    kernels = _kernel("wingkernel")
    if kernels is None:
        return None
    if not _WINGS_AGREE:
        _WINGS_AGREE.append(kernels.numpy_agrees())
    return kernels if _WINGS_AGREE[0] else None


def blends():
    """:mod:`.blendkernel` where its kernel runs, else None."""
    return _kernel("blendkernel")


def filters():
    """:mod:`.filterkernel` where its kernels run, else None."""
    return _kernel("filterkernel")


def lm():
    """:mod:`.lmkernel` (the Voigt batch's iterations and the Gaussian groups) where its kernels run, else None."""
    return _kernel("lmkernel")
