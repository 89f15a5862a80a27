"""A night run's inputs: which files it takes, and the names and hashes that identify them."""

from __future__ import annotations

import glob
import hashlib
import os
import re

__all__ = ["SPECTRUM_SUFFIXES", "collect_inputs", "sha256_file", "path_id", "safe_stem"]

#: File suffixes taken from a folder given as input (a folder also holds notes,
#: tables and plots, which are not spectra). Files named explicitly or matched
#: by a glob are always taken, whatever their suffix.
SPECTRUM_SUFFIXES = (
    ".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fz",
    ".txt", ".dat", ".csv", ".tsv", ".asc", ".ascii", ".spec",
)


def collect_inputs(paths) -> list:
    """Expand files, folders and glob patterns into a list of input paths.

    Parameters
    ----------
    paths : iterable of str or os.PathLike
        Files (taken whatever their suffix), folders (their files with a
        spectrum suffix, see ``SPECTRUM_SUFFIXES``, not descending into
        sub-folders) and glob patterns (``**`` descends).

    Returns
    -------
    list of str
        Paths in a stable order (folders and globs sorted), each input once
        (same file reached twice is kept at its first place). A path that does
        not exist, or a pattern matching nothing, is kept as given so that the
        run records it as an error row rather than dropping it silently.
    """
    out, seen = [], set()
    for p in paths:
        for found in _expand(os.fspath(p)):
            key = os.path.realpath(found)
            if key not in seen:
                seen.add(key)
                out.append(str(found))
    return out


def _expand(p) -> list:
    """The inputs one path given stands for, in order (see :func:`collect_inputs`)."""
    if os.path.isdir(p):
        return _folder_spectra(p)
    if os.path.exists(p) or not glob.has_magic(p):
        return [p]
    return sorted(m for m in glob.glob(p, recursive=True) if os.path.isfile(m)) or [p]


def _folder_spectra(folder) -> list:
    """The visible files of ``folder`` with a spectrum suffix, sorted by name."""
    out = []
    for name in sorted(os.listdir(folder)):
        full = os.path.join(folder, name)
        if (not name.startswith(".") and os.path.isfile(full)
                and name.lower().endswith(SPECTRUM_SUFFIXES)):
            out.append(full)
    return out


def sha256_file(path, chunk=1 << 20) -> str:
    """SHA-256 of a file's content, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def path_id(path) -> str:
    """Short stable id of an input path (names its record and plots)."""
    return hashlib.sha256(os.path.realpath(path).encode("utf-8", "surrogateescape")).hexdigest()[:16]


_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_stem(path, limit=60) -> str:
    """File-system-safe stem of ``path``: ASCII letters, digits, ``._-`` only, never hidden."""
    name = os.path.basename(os.fspath(path))
    for suffix in sorted(SPECTRUM_SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix):
            name = name[: -len(suffix)]
            break
    stem = _UNSAFE.sub("_", name).strip("._-")[:limit]
    return stem or "spectrum"
