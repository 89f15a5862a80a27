"""Writing inside a night run's output folder: atomically, and never outside it.

A reader (a rerun, the report, a person) never sees half a file: each file is
written to a temporary name beside its target and renamed over it
(``os.replace``), so an interrupted run leaves the old file or the new one.

Files are not flushed to the disk one by one: a flush costs ~4 ms on this
project's machine, three per spectrum (record, figure, thumbnail) were more
than the whole analysis of a spectrum is meant to take. The rename alone is
atomic against a killed process (the file system holds the data until it is
written); against a power cut, :func:`flush_to_disk` is called once at the end
of a run (and ext4, the usual Linux file system, writes a renamed file's data
before the rename itself; ``auto_da_alloc``, its default).
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

__all__ = ["inside", "atomic_write_bytes", "atomic_path", "flush_to_disk"]


def inside(base: Path, target: Path) -> Path:
    """``target`` resolved, refusing anything outside ``base`` (defence in depth)."""
    full = (base / target).resolve()
    if not full.is_relative_to(base.resolve()):
        raise ValueError(f"output path {target} would leave the output folder")
    return full


def _file_mode():
    """Permissions a new file gets here (mkstemp makes 0600 files; outputs are meant to be shared)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


_FILE_MODE = _file_mode()


def atomic_write_bytes(path, data: bytes):
    """Write ``data`` to ``path`` (str or path-like) atomically (temporary file beside it, then renamed over ``path``)."""
    # os.path, not pathlib: called once a record, and 3.11's pathlib interns each name it parses
    folder, name = os.path.split(os.fspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    try:
        os.fchmod(fd, _FILE_MODE)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_path(path: Path):
    """Yield a temporary path beside ``path``; on success it replaces ``path`` atomically."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    os.fchmod(fd, _FILE_MODE)
    os.close(fd)
    try:
        yield Path(tmp)
        os.chmod(tmp, _FILE_MODE)  # the writer may have replaced our file with its own temporary one
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def flush_to_disk():
    """Ask the operating system to write every file of this run to the disk (once, at the end)."""
    if hasattr(os, "sync"):
        os.sync()
