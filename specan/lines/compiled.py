"""Whether the lines stage's compiled kernels of its own arrays run (:mod:`.walkkernel`, numba).

``SPECAN_COMPILED=0`` in the environment (the switch :mod:`.batchfit` reads for the Voigt batch) or
numba failing to import keeps every caller on its numpy code, which stays the reference the kernels
are tested against (tests/test_lines_walkkernel.py). Set :data:`COMPILED` to False to do the same
in a running process (the tests do, to compare the two).
"""

from __future__ import annotations

import os

__all__ = ["COMPILED", "kernels"]

#: False: the numpy code runs, numba is not imported for it
COMPILED = os.environ.get("SPECAN_COMPILED", "1") != "0"


def kernels():
    """:mod:`.walkkernel` where its kernels run (numba imports, :data:`COMPILED`), else None.

    Imported on first use: numba's own import takes ~0.2 s, which a process that never measures a
    line need not pay.
    """
    if not COMPILED:
        return None
    from . import walkkernel

    return walkkernel if walkkernel.AVAILABLE else None
