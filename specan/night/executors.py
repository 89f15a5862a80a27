"""Where the per-input analysis runs: in this process, in local processes, or on dask.

Every executor runs the same function on each input and yields ``(path,
result)`` pairs as they come; the function returns plain data and writes
nothing, so results do not depend on where they were computed, and only the
calling process writes files.

Inputs travel in chunks (:func:`chunk_size` of them per task, up to
:data:`MAX_CHUNK`), not one task per spectrum: a task's round trip (pickling, the queue, the scheduler) costs
more than a fast analysis of one spectrum, and a worker keeps what it set up
once (templates, calibration, the figure it draws on) for the whole chunk.

Every worker computes with one thread per numerical library (BLAS, OpenMP):
the same thread count everywhere gives the same sums in the same order, so a
catalogue is bit-identical whether it was computed here, in local processes or
on dask (dask's own workers start with these variables set to 1 too); it also
keeps ``--jobs 2`` from running four threads on two cores.
"""

from __future__ import annotations

import contextlib
import math
import multiprocessing
import os
import signal
import sys

from ..errors import SpecanError
from ..threads import single_threaded
from . import heap
from .heap import GiveBackEvery

__all__ = ["results", "results_local", "local_workers", "results_dask", "sigterm_as_interrupt", "chunk_size", "run_chunk",
           "THREAD_VARIABLES", "single_threaded", "start_method", "START_METHOD_VARIABLE", "import_modules"]

#: Environment variables that set the thread pools of the numerical libraries; 1 in every worker.
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS",
                    "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")

#: Largest chunk. A task's round trip costs about a millisecond; eight spectra take from 40 ms
#: (reading only) to 2 s (every stage), so the round trip is paid back, while the last chunks
#: still end close together (with 32 a chunk, one worker idled for up to 6 s at the end of a
#: 300-spectrum night, a tenth of it).
MAX_CHUNK = 8

#: Tasks per worker at least, when there are enough inputs: the work is shared out as it goes.
TASKS_PER_WORKER = 16


def chunk_size(count, workers) -> int:
    """Inputs per task: at least TASKS_PER_WORKER tasks per worker where possible, 1 to MAX_CHUNK."""
    if count <= 0:
        return 1
    return max(1, min(MAX_CHUNK, math.ceil(count / (TASKS_PER_WORKER * max(1, workers)))))


def _chunks(todo, size, workers=1):
    """Consecutive chunks of ``todo``, ``size`` long until the last inputs, then shorter.

    Each chunk is at most a ``2 * workers``-th of what is left: the last few are of one or two
    inputs, so the workers end within about a spectrum of one another (measured: 0.02-0.04 s apart at the
    end of two-job runs of 1,000 spectra). With chunks of eight to the end, one worker would wait for the
    other's last chunk half a chunk on average (estimated: ~0.16 s at ~40 ms a spectrum).
    """
    i, n = 0, len(todo)
    while i < n:
        step = max(1, min(size, math.ceil((n - i) / (2 * max(1, workers)))))
        yield todo[i:i + step]
        i += step


#: This process's count of spectra analysed, handing freed memory back every so many (see
#: :mod:`specan.night.heap`): a worker's memory stays flat over a night of any length.
_ANALYSED = GiveBackEvery()


def run_chunk(func, paths, settings):
    """``[(path, func(path, settings)) ...]`` for one chunk, single-threaded: what a worker runs."""
    with single_threaded():
        done = [(path, func(path, settings)) for path in paths]
    _ANALYSED.add(len(paths))
    return done


def import_modules(names):
    """Import each of ``names`` that can be; one that cannot is left for its user to report."""
    import importlib

    for name in names:
        with contextlib.suppress(Exception):  # its user imports it again, and says what failed
            importlib.import_module(name)


def _meanwhile(task):
    """Run ``task()`` (if any) while other processes work; what it raises is left for later."""
    if task is not None:
        with contextlib.suppress(Exception):  # the work it prepares for does it again, and reports
            task()


def results(func, todo, settings, jobs=1, dask=None, pool=None, meanwhile=None):
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
    pool : multiprocessing.pool.Pool, optional
        Local workers started already (:func:`local_workers`); not used with ``dask``.
    meanwhile : callable, optional
        Called once, with no arguments, in this process once other processes (local workers or
        dask's) have the work, before the first result is taken: for what this process will need
        after the analysis (imports), done while it would otherwise wait. Not called when the work
        runs in this process. What it raises is ignored.

    Returns
    -------
    generator
        Of ``(path, result)`` in the order they finish (a chunk at a time); ``close()`` it to stop early.
    """
    if dask:
        return results_dask(func, todo, settings, dask, meanwhile=meanwhile)
    return results_local(func, todo, settings, max(1, int(jobs)), pool=pool, meanwhile=meanwhile)


def _worker_init(preload=()):
    # The parent decides when to stop: a Ctrl-C must not print a traceback per worker.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # A forked worker inherits the caller's handlers; the pool stops its workers with SIGTERM.
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    # Plots are drawn without pyplot; make sure no GUI backend is ever picked.
    os.environ.setdefault("MPLBACKEND", "Agg")
    # the modules the work needs, imported now, while the parent is still finding out what to do
    with heap.collector_paused():
        import_modules(preload)   # (a stage that cannot be imported is reported by the parent)
        _warm_up(preload)
        # what the modules hold lives as long as the worker: kept out of every full collection's visits
        # (a forked worker's were set aside by the parent before the fork, which this then leaves alone)
        heap.set_aside_now()


def _warm_up(modules):
    """Call ``warm_up()`` of each of ``modules`` that is imported and has one (the lines stage: its
    compiled kernels made or loaded once, here, rather than on each worker's first spectrum)."""
    for name in modules:
        warm = getattr(sys.modules.get(name), "warm_up", None)
        if callable(warm):
            with contextlib.suppress(Exception):  # a stage that fails here fails, and is reported, in its work
                warm()


def _task(args):
    func, paths, settings = args
    return run_chunk(func, paths, settings)


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


@contextlib.contextmanager
def _worker_environment(alarm=None):
    """The environment spawned workers inherit: one thread per numerical library (and the alarm file's name)."""
    saved = {k: os.environ.get(k) for k in (*THREAD_VARIABLES, ALARM_VARIABLE)}
    os.environ.update({k: "1" for k in THREAD_VARIABLES})
    if alarm:
        os.environ[ALARM_VARIABLE] = alarm
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


#: Set in the environment the workers start with: a file a worker creates when it finds itself re-running
#: the caller's script from the top (see :func:`_refuse_start_in_worker`), which the parent watches for.
ALARM_VARIABLE = "SPECAN_WORKER_ALARM"
#: Seconds between the parent's looks at that file while it waits for results.
ALARM_POLL = 0.5
UNGUARDED_SCRIPT = (
    "specan's worker processes re-ran the script that called specan.pipeline.run(..., jobs=N) from its "
    "top: Python starts each worker by importing the main script again, and this one starts a run at "
    "import. Put the call under `if __name__ == \"__main__\":` (or run with jobs=1, or use `specan run "
    "--jobs N` from the command line)")


def _refuse_start_in_worker():
    """Refuse to start workers inside a worker that is importing the caller's main script.

    A script that calls :func:`specan.pipeline.run` with ``jobs`` > 1 at its top level, without
    ``if __name__ == "__main__":``, is imported again by every spawned worker; multiprocessing's own
    error there kills the worker, the pool starts another, and the parent waited for ever (measured:
    21,000 lines of tracebacks in 3 minutes, no result). The worker leaves the alarm file for the
    parent, which stops with :data:`UNGUARDED_SCRIPT`.
    """
    # (the variable is in the environment of specan's workers only: the parent sets it while it starts
    # them; multiprocessing.parent_process() is not known yet while a worker imports the script)
    alarm = os.environ.get(ALARM_VARIABLE)
    if alarm:
        with contextlib.suppress(OSError):
            open(alarm, "a").close()
        raise SpecanError(UNGUARDED_SCRIPT)


def _alarm_raised(pool):
    """Whether a worker of ``pool`` has left the alarm file (:func:`_refuse_start_in_worker`)."""
    alarm = getattr(pool, "specan_alarm", None)
    return bool(alarm) and os.path.exists(alarm)


#: Environment variable that sets how local workers start ("fork" or "spawn"), for tests and benchmarks;
#: unset, :func:`start_method` chooses.
START_METHOD_VARIABLE = "SPECAN_START_METHOD"


def start_method() -> str:
    """How local workers start: ``"fork"`` on Linux in a single-threaded process, ``"spawn"`` elsewhere.

    A forked worker starts with the modules this process imported before the pool was made
    (:func:`local_workers`' ``preload``), where a spawned one imports them again (numpy, scipy,
    astropy, specutils with the matplotlib and dask it brings, specan's stages: 1.5-2.7 s of CPU a
    worker, measured). Fork is only safe where no other thread can hold a lock at the moment of the
    copy, hence one thread only; macOS's system libraries are not fork-safe at all (Python spawns
    there by default), nor is there fork on Windows. The numerical libraries' thread pools are limited
    in the worker itself (:func:`run_chunk`), so the results are those of a spawned worker, to the bit.
    """
    forced = os.environ.get(START_METHOD_VARIABLE, "").strip()
    if forced:
        if forced not in ("fork", "spawn", "forkserver"):
            raise SpecanError(f"{START_METHOD_VARIABLE}={forced!r}: use fork, spawn or forkserver")
        return forced
    import sys
    import threading

    if (sys.platform.startswith("linux") and "fork" in multiprocessing.get_all_start_methods()
            and threading.active_count() == 1):
        return "fork"
    return "spawn"


def _start_pool(jobs, preload=()):
    import tempfile

    _refuse_start_in_worker()
    method = start_method()
    aside = contextlib.ExitStack()
    if method == "fork":
        # imported here once, inherited by every worker (a spawned worker imports them in _worker_init);
        # their objects then set aside from the collector's passes before the fork (see
        # heap.long_lived_set_aside): every worker inherits them set aside, and its collections then
        # neither visit them nor copy the pages they share with this process; given back in _stop_pool
        with heap.collector_paused():
            import_modules(preload)   # (a stage that cannot be imported is reported by the parent)
            _warm_up(preload)
            aside.enter_context(heap.long_lived_set_aside())
    ctx = multiprocessing.get_context(method)
    # (a name no file has yet: a worker that creates it raises the alarm)
    alarm = os.path.join(tempfile.gettempdir(), f"specan-alarm-{os.getpid()}-{os.urandom(6).hex()}")
    try:
        with _worker_environment(alarm):
            pool = ctx.Pool(processes=jobs, initializer=_worker_init, initargs=(tuple(preload),))
    except BaseException:
        aside.close()
        raise
    pool.specan_alarm = alarm
    pool.specan_aside = aside
    return pool


def _stop_pool(pool):
    pool.terminate()
    pool.join()
    aside = getattr(pool, "specan_aside", None)
    if aside is not None:
        aside.close()
    alarm = getattr(pool, "specan_alarm", None)
    if alarm:
        with contextlib.suppress(OSError):
            os.remove(alarm)


@contextlib.contextmanager
def local_workers(jobs, preload=()):
    """``jobs`` local worker processes started now (None when ``jobs`` <= 1), for :func:`results_local`'s ``pool``.

    A spawned worker spends 1.5-2.7 s starting (Python, numpy, scipy, astropy, specutils and
    specan's modules; measured). Started before the caller collects its inputs, checks its
    stages and finds which inputs are current already, the workers do that while it does,
    instead of after. ``preload``: modules the workers need; forked workers (:func:`start_method`)
    inherit them from this process, which imports them first, spawned ones import them as they start.
    On leaving, the workers are stopped: by then every result was taken, or the run was interrupted
    and what they still had queued is not wanted.
    """
    if jobs <= 1:
        yield None
        return
    pool = _start_pool(jobs, preload)
    try:
        yield pool
    finally:
        _stop_pool(pool)


def results_local(func, todo, settings, jobs, pool=None, meanwhile=None):
    """Yield (path, result) for each input, in this process or in ``jobs`` local processes.

    ``pool``: workers started already (:func:`local_workers`), used instead of starting new ones
    and left running for their owner to stop. ``meanwhile``: see :func:`results` (called only when
    the work runs in other processes).
    """
    jobs = min(jobs, len(todo))
    if jobs <= 1:  # also when there is nothing (left) to do: no workers to start
        with single_threaded(), contextlib.ExitStack() as aside:
            for i, path in enumerate(todo):
                if i == 0:
                    # the first input imports the stages' modules and makes the set-up's templates and
                    # calibration, kept from then on out of the collector's passes (heap.long_lived_set_aside)
                    with heap.collector_paused():
                        result = func(path, settings)
                        aside.enter_context(heap.long_lived_set_aside())
                else:
                    result = func(path, settings)
                _ANALYSED.add()
                yield path, result
        return
    own = pool is None
    if own:
        pool = _start_pool(jobs)
    size = chunk_size(len(todo), jobs)
    try:
        chunks = pool.imap_unordered(_task, ((func, c, settings) for c in _chunks(todo, size, jobs)))
        # (the pool hands the chunks out from its own thread: the workers have them already)
        _meanwhile(meanwhile)
        while True:
            try:
                chunk = chunks.next(timeout=ALARM_POLL)
            except StopIteration:
                break
            except multiprocessing.TimeoutError:
                # (waiting in short steps: a worker that cannot start is replaced by another for ever)
                if _alarm_raised(pool):
                    raise SpecanError(UNGUARDED_SCRIPT) from None
                continue
            yield from chunk
        if own:
            pool.close()
            pool.join()
    finally:
        if own:
            _stop_pool(pool)


def results_dask(func, todo, settings, address, meanwhile=None):
    """Yield (path, result) for each input from a dask.distributed cluster, a chunk per task.

    ``meanwhile``: see :func:`results`.
    """
    from distributed import Client, as_completed

    try:
        client = Client(address, set_as_default=False, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise SpecanError(f"cannot reach the dask scheduler at {address} ({exc}); "
                          "check the address or run with --jobs instead") from exc
    with client:
        workers = max(1, sum(client.nthreads().values()))
        chunks = list(_chunks(todo, chunk_size(len(todo), workers), workers))
        futures = [client.submit(run_chunk, func, c, settings, pure=False) for c in chunks]
        _meanwhile(meanwhile)
        try:
            for fut in as_completed(futures, loop=client.loop):
                chunk = fut.result()
                fut.release()
                yield from chunk
        finally:
            client.cancel(futures)
