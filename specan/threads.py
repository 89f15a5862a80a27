"""Numerical libraries held to one thread, so that a sum is the same whoever computes it.

A matrix product through BLAS may split its sums differently with another number of threads,
which changes the result in its last bits. The night run computes with one thread in every
worker (``--jobs``, Dask) so that every way of running gives the same catalogue to the bit; the
sums that the classify stage keeps from one spectrum to the next are made under the same limit,
so that they are the same whether a worker, a single-job run or an earlier call in the same
process (a notebook, a test session) made them.
"""

from __future__ import annotations

import contextlib

__all__ = ["in_one_thread", "single_threaded"]


#: threadpoolctl's controller and the number of modules loaded when it was made (see :func:`_controller`).
_MADE = [None, -1]


def _controller():
    """threadpoolctl's controller of the loaded BLAS/OpenMP libraries, made again only after an import.

    Making one scans the process's loaded libraries (1.1 ms, measured), limiting through one made
    already costs 12 us; a library that limits threads is loaded by an import, which adds to
    ``sys.modules``, so a controller is made again when that count has moved.
    """
    import sys

    from threadpoolctl import ThreadpoolController

    loaded = len(sys.modules)
    if _MADE[0] is None or _MADE[1] != loaded:
        _MADE[:] = [ThreadpoolController(), loaded]
    return _MADE[0]


@contextlib.contextmanager
def single_threaded():
    """Numerical libraries limited to one thread within the block (where threadpoolctl is installed).

    Environment variables (``OMP_NUM_THREADS`` and the like) only act on libraries not yet
    loaded; in a process that has loaded them already the limit is set through the libraries
    themselves.
    """
    try:
        controller = _controller()
    except ImportError:  # pragma: no cover - a dependency; without it the environment must say 1
        yield
        return
    with controller.limit(limits=1):
        yield


def in_one_thread(make):
    """``make`` wrapped to run :func:`single_threaded`: for what is kept from one spectrum to the next."""
    def made():
        with single_threaded():
            return make()
    return made
