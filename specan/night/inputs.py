"""A night run's inputs: which files it takes, and the names and hashes that identify them."""

from __future__ import annotations

import array
import glob
import hashlib
import os
import re
from collections.abc import Sequence

import numpy as np

__all__ = ["SPECTRUM_SUFFIXES", "InputList", "collect_inputs", "sha256_file", "path_id", "safe_stem"]

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


class InputList(Sequence):
    """A night's input paths, held as a few arrays rather than one string object each.

    A run keeps its inputs from start to end (what to analyse, then the catalogue's rows in
    their order). As a list of str, 100,000 paths took 12.9 MB of the process (measured),
    a quarter of what a 100,000-spectrum night needed beyond a 1,000-spectrum one; here
    the folder part is kept once per folder and the names in one bytes object: ~38 bytes
    a path with 17-character names (the name, its separator, three array entries). Items
    come back as the exact strings given (any str, surrogates included).

    Parameters
    ----------
    paths : iterable of str
        The paths, in order.
    """

    # UTF-8 with surrogates passed through: a two-way map for every str, including the
    # surrogate-escaped names os.listdir gives for bytes that are not UTF-8
    _ENCODING = ("utf-8", "surrogatepass")

    def __init__(self, paths=()):
        # the names encoded as one string, not one bytes object each: 100,000 small objects,
        # even freed again, left the process ~13 MB larger for the rest of the run (measured)
        heads, head_of, names = {}, array.array("i"), []
        for p in paths:
            p = os.fspath(p)
            cut = max(p.rfind(os.sep), p.rfind(os.altsep) if os.altsep else -1) + 1
            head_of.append(heads.setdefault(p[:cut], len(heads)))
            names.append(p[cut:])
        # one encoding of all the names, cut at the NULs between them (no path holds a NUL)
        self._names = "\0".join(names).encode(*self._ENCODING)
        del names
        self._heads = list(heads)
        self._head_of = np.frombuffer(head_of, np.int32).copy()
        n = len(self._head_of)
        bounds = np.concatenate([[-1], np.flatnonzero(np.frombuffer(self._names, np.uint8) == 0),
                                 [len(self._names)]]).astype(np.int64)
        self._starts, self._ends = bounds[:n] + 1, bounds[1:n + 1]

    def __len__(self):
        return len(self._head_of)

    def __getitem__(self, index):
        if isinstance(index, slice):
            return [self[i] for i in range(*index.indices(len(self)))]
        i = range(len(self))[index]    # IndexError, negative indices, as a list does
        name = self._names[int(self._starts[i]):int(self._ends[i])].decode(*self._ENCODING)
        return self._heads[self._head_of[i]] + name

    def __iter__(self):
        return (self[i] for i in range(len(self)))

    def take(self, indices):
        """An InputList of the items at ``indices`` (in that order), made with array operations."""
        idx = np.asarray(indices, np.int64).reshape(-1)
        new = InputList()
        new._heads = self._heads
        new._head_of = self._head_of[idx]
        starts, ends = self._starts[idx], self._ends[idx]
        lengths = ends - starts
        # each kept name and the NUL after it, copied from the old bytes in one gather
        spans = lengths + 1
        new._starts = np.cumsum(spans) - spans
        new._ends = new._starts + lengths
        source = np.repeat(starts - new._starts, spans) + np.arange(int(spans.sum()))
        new._names = np.frombuffer(self._names + b"\0", np.uint8)[source].tobytes()  # a NUL after the last too
        return new

    def __repr__(self):
        return f"InputList({len(self)} paths)"


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
