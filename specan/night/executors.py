"""Where the per-input analysis runs: in this process, in local processes, or on dask.

Every executor runs the same function on each input and yields ``(path,
result)`` pairs as they come; the function returns plain data and writes
nothing, so results do not depend on where they were computed, and only the
calling process writes files.
"""

from __future__ import annotations

import contextlib
import os
import signal

from ..errors import SpecanError

__all__ = ["results", "results_local", "results_dask", "sigterm_as_interrupt"]


def results(func, todo, settings, jobs=1, dask=None):
    """Yield ``(path, func(path, settings))`` for each input, on dask when an address is given.

    Parameters
    ----------
    func : callable
        ``func(path, settings)``, importable by name (it is sent to other processes).
    todo : list of str
        Inputs to analyse.
    settings : dict
        Passed to ``func`` unchanged.
    jobs : int
        Local worker processes (1 = in this process); ignored with ``dask``.
    dask : str, optional
        Address of a dask.distributed scheduler.

    Returns
    -------
    generator
        Of ``(path, result)`` in the order they finish; ``close()`` it to stop early.
    """
    if dask:
        return results_dask(func, todo, settings, dask)
    return results_local(func, todo, settings, max(1, int(jobs)))


def _worker_init():
    # The parent decides when to stop: a Ctrl-C must not print a traceback per worker.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # Plots are drawn without pyplot; make sure no GUI backend is ever picked.
    os.environ.setdefault("MPLBACKEND", "Agg")


def _task(args):
    func, path, settings = args
    return path, func(path, settings)


@contextlib.contextmanager
def sigterm_as_interrupt():
    """Treat SIGTERM like Ctrl-C so a killed run still writes a consistent catalogue."""
    def handler(signum, frame):
        raise KeyboardInterrupt(f"signal {signum}")

    try:
        previous = signal.signal(signal.SIGTERM, handler)
    except ValueError:  # not the main thread: leave signals alone
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def results_local(func, todo, settings, jobs):
    """Yield (path, result) for each input, in this process or in ``jobs`` local processes."""
    jobs = min(jobs, len(todo))
    if jobs <= 1:  # also when there is nothing (left) to do: no workers to start
        for path in todo:
            yield path, func(path, settings)
        return
    import multiprocessing

    # spawn: workers start clean (no copied threads or locks from this process).
    ctx = multiprocessing.get_context("spawn")
    pool = ctx.Pool(processes=jobs, initializer=_worker_init)
    try:
        for item in pool.imap_unordered(_task, ((func, p, settings) for p in todo), chunksize=1):
            yield item
        pool.close()
        pool.join()
    finally:
        pool.terminate()


def results_dask(func, todo, settings, address):
    """Yield (path, result) for each input from a dask.distributed cluster."""
    from distributed import Client, as_completed

    try:
        client = Client(address, set_as_default=False, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise SpecanError(f"cannot reach the dask scheduler at {address} ({exc}); "
                          "check the address or run with --jobs instead") from exc
    with client:
        futures = client.map(func, todo, settings=settings, pure=False)
        path_of = {f.key: p for f, p in zip(futures, todo)}
        try:
            for fut in as_completed(futures, loop=client.loop):
                result = fut.result()
                path = path_of[fut.key]
                fut.release()
                yield path, result
        finally:
            client.cancel(futures)
