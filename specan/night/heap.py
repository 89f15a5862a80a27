"""Handing freed memory back to the system during a long night run.

A night's analysis allocates and frees many mid-sized blocks (numpy temporaries, tables,
decoded records). The C library's allocator keeps freed blocks for reuse instead of returning
them, so a process's resident memory creeps up with the number of spectra and stays at the
high-water mark while the catalogue, diagram and report are written. Measured on this
project's benchmark night (1,000 spectra, one job, ``--plots none``): 295 MB resident at the
end of the analysis, 251 MB after ``malloc_trim(0)``; without it the end's writing at 100,000
rows lifted the peak from 303 to 333 MB.

``malloc_trim`` is glibc's (Linux); elsewhere :func:`give_back` does nothing (other
allocators return memory on their own schedules). No Python library offers it: the call is
made through :mod:`ctypes`. It changes no result, only when memory goes back.
"""

from __future__ import annotations

import atexit
import contextlib
import ctypes
import ctypes.util
import functools
import gc
import threading

__all__ = ["give_back", "GiveBackEvery", "GIVE_BACK_EVERY", "long_lived_set_aside", "set_aside_now", "collector_paused",
           "held_aside", "set_aside_at_exit"]

#: Spectra analysed between two hand-backs in one process. One :func:`give_back` on a ~290 MB
#: heap took 93-103 ms (measured; mostly the full collection, which visits every one of the ~217,000
#: objects the imported libraries hold), so every 200 spectra (~45 ms each) cost ~0.5 ms a spectrum,
#: about 1%; resident memory then held at 286-288 MB over 4,000 spectra. With those objects set aside
#: (:func:`long_lived_set_aside`) the collection visits only what the analysis made since.
GIVE_BACK_EVERY = 200


@functools.lru_cache(maxsize=1)
def _trim():
    """glibc's ``malloc_trim``, or None where there is no glibc."""
    name = ctypes.util.find_library("c")
    if not name:
        return None
    try:
        trim = ctypes.CDLL(name).malloc_trim
    except (OSError, AttributeError):   # not glibc (musl, macOS, Windows)
        return None
    trim.argtypes, trim.restype = [ctypes.c_size_t], ctypes.c_int
    return trim


def give_back(collect=True) -> bool:
    """Collect unreachable cycles, then return the allocator's free memory to the system.

    Parameters
    ----------
    collect : bool
        Run the full collection first; False where what was freed held no cycles (a full
        collection before the libraries' objects are set aside takes ~0.1 s).

    Returns False where the memory cannot be handed back (no glibc): the collection is done anyway.
    """
    # Cycles (tables, units and spectra refer to one another) wait for the oldest generation's
    # rare collection; until they are collected their memory is not free to hand back.
    if collect:
        gc.collect()
    trim = _trim()
    if trim is None:
        return False
    trim(0)
    return True


@contextlib.contextmanager
def long_lived_set_aside():
    """Within the block, the objects alive at its start are left out of the cyclic collector's passes.

    What a night's process holds once its modules are imported (numpy, scipy, astropy, specutils,
    matplotlib, specan's stages: ~217,000 objects the collector tracks, measured) lives as long as
    the process; a full collection, every :data:`GIVE_BACK_EVERY` spectra and whenever Python's own
    thresholds call one, visits them all for nothing: 97 ms each, 0.2 ms with them set aside
    (``gc.freeze``; measured after 20 bench spectra). In a forked worker the visits would also write
    to every page of the parent's objects it shares, copying them. Unreachable cycles are collected
    first, so nothing set aside is garbage; the objects go back to the collector's care at the end
    of the block (``gc.unfreeze``). Where objects are set aside already (by the caller, or an outer
    block), nothing is changed.
    """
    if not set_aside_now():
        yield
        return
    try:
        yield
    finally:
        if _HELD:
            _HELD[-1] = True   # given back when the outermost held_aside block ends
        else:
            gc.unfreeze()


#: One entry per :func:`held_aside` block open: whether a set-aside ended inside it.
_HELD = []


@contextlib.contextmanager
def held_aside():
    """Objects set aside inside the block stay aside until the block ends, not only to the end of
    the :func:`long_lived_set_aside` that set them aside.

    For a night run: its analysis sets the imported libraries' objects aside (in this process, or
    before forking its workers), and its end hands freed memory back (:func:`give_back`, a full
    collection) before writing the catalogue. Given back to the collector's care first, the ~217,000
    objects made that collection take 0.1-0.2 s (measured, the end of a 1,000-spectrum run); held aside
    through the writing, it visits what the analysis left. They go back when the run is over.
    """
    _HELD.append(False)
    try:
        yield
    finally:
        ended = _HELD.pop()
        if ended:
            if _HELD:
                _HELD[-1] = True
            else:
                gc.unfreeze()


@contextlib.contextmanager
def collector_paused():
    """Python's automatic collections paused within the block (``gc.disable``), as they were after it.

    For the block that imports the stages' modules, which :func:`long_lived_set_aside` then sets
    aside: while the ~200,000 objects arrive, Python's own thresholds call full collections that
    visit all of them (four during a night run's first spectrum, 270 ms in all; measured). Nothing
    is lost: the set-aside collects the unreachable cycles first.
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def set_aside_now() -> bool:
    """Collect unreachable cycles, then set every object alive aside from the collector's passes for
    good (``gc.freeze``; see :func:`long_lived_set_aside`): for a worker process, whose objects live
    as long as it does. False, changing nothing, where objects are set aside already."""
    if gc.get_freeze_count():
        return False
    gc.collect()
    gc.freeze()
    return True


class GiveBackEvery:
    """Counts analysed spectra and calls :func:`give_back` every ``every`` of them (thread-safe).

    Parameters
    ----------
    every : int
        Spectra between two hand-backs.
    """

    def __init__(self, every=GIVE_BACK_EVERY):
        self.every = int(every)
        self._count = 0
        self._lock = threading.Lock()

    def add(self, n=1):
        """Count ``n`` spectra done; hand memory back when another ``every`` have been."""
        with self._lock:
            before, self._count = self._count, self._count + n
            due = before // self.every != self._count // self.every
        if due:
            give_back()


_AT_EXIT = []


def set_aside_at_exit():
    """At this process's exit, set every object alive aside from the collector (``gc.freeze``) before
    the interpreter tears itself down; for a command-line process, whose objects all die with it.

    Python's finalisation runs full collections while it clears the modules, each visiting every
    object the imported libraries hold: 0.8-0.9 s of a night run's exit (measured: 200 spectra,
    ``--jobs 2``, 0.94 s from the last exit handler to the process's end, 0.12 s with the objects set
    aside). Objects still go when their last reference does, as at any exit; only reference cycles
    are left to the system, which takes back the whole process anyway. Registered once a process;
    registered early, the handler runs after those registered later (atexit's order).
    """
    if not _AT_EXIT:
        atexit.register(gc.freeze)
        _AT_EXIT.append(True)
