"""Whether the lines stage's compiled kernels of its own arrays run (numba): the windows' walks
(:mod:`.walkkernel`), the hydrogen lines' far wings (:mod:`.wingkernel`), the metal lines in
their windows (:mod:`.blendkernel`) and the matched filter's and wide smoothing's correlations
(:mod:`.filterkernel`).

``SPECAN_COMPILED=0`` in the environment (the switch :mod:`.batchfit` reads for the Voigt batch) or
numba failing to import keeps every caller on its numpy code, which stays the reference the kernels
are tested against (tests/test_lines_walkkernel.py, tests/test_lines_wingkernel.py,
tests/test_lines_blendkernel.py, tests/test_lines_filterkernel.py). Set
:data:`COMPILED` to False to do the same in a running process (the tests do, to compare the two).
"""

from __future__ import annotations

import os

__all__ = ["COMPILED", "walks", "wings", "blends", "filters"]

#: False: the numpy code runs, numba is not imported for it
COMPILED = os.environ.get("SPECAN_COMPILED", "1") != "0"

#: whether numpy's complex arithmetic is the wing kernel's (:func:`specan.lines.wingkernel.numpy_agrees`),
#: found once a process
_WINGS_AGREE = []


def walks():
    """:mod:`.walkkernel` where its kernel runs (numba imports, :data:`COMPILED`), else None.

    Imported on first use: numba's own import takes ~0.2 s, which a process that never measures a
    line need not pay.
    """
    if not COMPILED:
        return None
    from . import walkkernel

    return walkkernel if walkkernel.AVAILABLE else None


def wings():
    """:mod:`.wingkernel` where its kernel runs (numba imports, :data:`COMPILED`, and numpy's complex
    arithmetic here is the one it makes), else None. Imported on first use, as :func:`walks`."""
    if not COMPILED:
        return None
    from . import wingkernel

    if not _WINGS_AGREE:
        _WINGS_AGREE.append(wingkernel.AVAILABLE and wingkernel.numpy_agrees())
    return wingkernel if _WINGS_AGREE[0] else None


def blends():
    """:mod:`.blendkernel` where its kernel runs (numba imports, :data:`COMPILED`), else None. Imported on
    first use, as :func:`walks`."""
    if not COMPILED:
        return None
    from . import blendkernel

    return blendkernel if blendkernel.AVAILABLE else None


def filters():
    """:mod:`.filterkernel` where its kernels run (numba imports, :data:`COMPILED`), else None. Imported on
    first use, as :func:`walks`."""
    if not COMPILED:
        return None
    from . import filterkernel

    return filterkernel if filterkernel.AVAILABLE else None
