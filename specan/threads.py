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

__all__ = ["single_threaded"]


@contextlib.contextmanager
def single_threaded():
    """Numerical libraries limited to one thread within the block (where threadpoolctl is installed).

    Environment variables (``OMP_NUM_THREADS`` and the like) only act on libraries not yet
    loaded; in a process that has loaded them already the limit is set through the libraries
    themselves.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a dependency; without it the environment must say 1
        yield
        return
    with threadpool_limits(limits=1):
        yield
