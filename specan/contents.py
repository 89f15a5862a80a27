"""Keys for the caches that keep per-set-up work (a grid's widths, a spectrum's pixel set-up, spline
operators): a number standing for an array's exact contents, and a small store of what was made.

A night's spectra share a few wavelength grids and masks, spectrum after spectrum; the stages keep
what depends on those alone. Comparing an array's bytes with the few kept costs ~2 us for 4,000
wavelengths, a cryptographic hash of them ~35 us (measured), and a stage asks several times a
spectrum. Used by the lines and velocity stages alike (one copy, at the bottom of the imports).
Also the fingerprint of specan's code and data, which what is kept across runs is keyed on.
"""

from __future__ import annotations

import itertools
import threading

import numpy as np

__all__ = ["CONTENTS_KEPT", "code_fingerprint", "content_key", "kept", "forgettable", "forget_setups"]

#: How many distinct contents :func:`content_key` remembers (a night mixes a few set-ups; each
#: spectrum brings a handful of arrays: wavelengths, masks, grids).
CONTENTS_KEPT = 32
_CONTENTS = []   # (dtype, shape, bytes, number), newest last
_LOCK = threading.Lock()
_NUMBERS = itertools.count()
_FORGETTABLE = []   # the stores and caches forget_setups() empties


def content_key(array):
    """A number standing for the exact contents of ``array`` (its dtype, shape and bytes).

    The same number for equal contents while they are among the last :data:`CONTENTS_KEPT` seen,
    never the same for other contents; a content that comes back after being dropped gets a new
    number: a cache miss, never a wrong hit.
    """
    a = np.ascontiguousarray(array)
    data, kind = a.tobytes(), (a.dtype.str, a.shape)
    with _LOCK:
        for dtype, shape, held, number in reversed(_CONTENTS):
            if (dtype, shape) == kind and held == data:
                return number
        number = next(_NUMBERS)
        _CONTENTS.append((kind[0], kind[1], data, number))
        del _CONTENTS[:-CONTENTS_KEPT]
    return number


def kept(store, key, make, size=8):
    """``store[key]``, made by ``make()`` where absent, its arrays (the value or a tuple's members)
    made read-only; the oldest of ``size`` entries out first. The value is returned, not looked up
    again, so another thread dropping it in between is harmless."""
    with _LOCK:
        found = store.get(key)
    if found is None:
        found = make()
        for a in (found if isinstance(found, tuple) else (found,)):
            if isinstance(a, np.ndarray):
                a.flags.writeable = False
        with _LOCK:
            while len(store) >= size:
                store.pop(next(iter(store)), None)
            store[key] = found
    return found


def forgettable(cache):
    """Register a per-set-up cache so that :func:`forget_setups` can empty it; returns it unchanged.

    ``cache`` is a store dict (as :func:`kept` fills) or a function wrapped by
    :func:`functools.lru_cache` (use as the outermost decorator). Registered are the caches
    that hold megabytes: template banks, calibrations, per-grid operators.
    """
    with _LOCK:
        _FORGETTABLE.append(cache)
    return cache


def forget_setups():
    """Empty every registered per-set-up cache (they are made again when next needed).

    A night run calls this when its analysis is done: the catalogue, diagram and report
    need none of them, and the ~65 MB they held (measured on the benchmark night) make room
    for the writing, so that the run's peak memory does not grow with the number of inputs.
    """
    with _LOCK:
        for cache in _FORGETTABLE:
            (cache.cache_clear if hasattr(cache, "cache_clear") else cache.clear)()
        _CONTENTS.clear()   # numbers are never given twice: a later key cannot hit a dropped entry


def code_fingerprint() -> str:
    """Hash of specan's own code and data files: what was computed by other code is not current
    (the night run's records, the kept velocity templates)."""
    import hashlib
    from pathlib import Path

    root = Path(__file__).resolve().parent   # the specan package
    h = hashlib.sha256()
    # (.fits: the library templates and tables in specan/data, which results depend on as on the code)
    files = sorted(p for p in root.rglob("*") if p.suffix in (".py", ".ecsv", ".json", ".fits") and p.is_file())
    linelists = root.parent / "linelists"
    if linelists.is_dir():
        files += sorted(linelists.glob("*.ecsv"))
    for p in files:
        h.update(str(p.relative_to(p.parents[1])).encode())
        h.update(p.read_bytes())
    return h.hexdigest()
