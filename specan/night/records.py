"""One stored record per input, and when a stored record is current.

Each input's result is one small JSON record, ``records/<id>.json``, written
atomically after its plots (``plots/<file>-<id>.png`` and its thumbnail), so a
record always has its plots and an interrupted run never leaves half a
result. A record is current when its key matches: the input's content hash and
the hash of the run settings (which include specan's own code, see
:func:`code_fingerprint`).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from ..contents import code_fingerprint
from .files import atomic_write_bytes, inside
from .inputs import path_id, safe_stem, sha256_file

__all__ = ["RECORD_VERSION", "code_fingerprint", "content_hash", "record_key", "not_run_record", "RecordStore"]

RECORD_VERSION = 2


def content_hash(path) -> str:
    """What identifies an input's content in a record key (its SHA-256, or why there is none)."""
    try:
        return sha256_file(path) if os.path.isfile(path) else "missing"
    except OSError as exc:
        return f"unreadable: {exc}"


def record_key(path, settings_hash, content=None) -> dict:
    """What a stored record of ``path`` must match to be current: its content and the settings.

    ``content`` is the content hash when already known (the worker hashes the file before it
    reads it, so a file changed meanwhile makes its record stale, never wrong).
    """
    return {"input": content_hash(path) if content is None else content, "settings": settings_hash}


def not_run_record(path, why) -> dict:
    """The record of an input the run did not reach."""
    values = {"file": str(path), "status": "not_run", "reason": why, "flags": "", "stages_run": ""}
    return {"values": values, "units": {}}


class RecordStore:
    """The records and per-spectrum plots of one output folder.

    Parameters
    ----------
    out_dir : str or os.PathLike
        The run's output folder; every file goes inside it.
    """

    def __init__(self, out_dir):
        self.out = Path(out_dir)
        # resolved once: a record's path is asked for several times per input (stored? current?
        # load, put), and resolving the folder each time was most of a night's end-of-run reading
        self._records = os.fspath(inside(self.out, Path("records")))

    def _record_path(self, pid) -> str:
        # a path id is hexadecimal (see specan.night.inputs.path_id): a name inside the folder.
        # A plain string, not a Path: Python 3.11's pathlib interns every name it parses; after
        # exists() on 100,000 inputs the interpreter's intern table held 1.9 MB more (measured).
        if not pid.isalnum():
            raise ValueError(f"record id {pid!r} is not a path id")
        return os.path.join(self._records, f"{pid}.json")

    def put(self, path, key, result) -> dict:
        """Write one input's plots, then its record (so a record always has its plots).

        Parameters
        ----------
        path : str
            The input.
        key : dict
            Its record key (see :func:`record_key`).
        result : dict
            What :func:`specan.pipeline.analyse_file` returned for it.

        Returns
        -------
        dict
            The record as stored: ``version``, ``key``, ``values`` (with the plot
            paths relative to the output folder) and ``units``.
        """
        pid = path_id(path)
        values = dict(result["values"])
        values["plot"] = values["thumbnail"] = None
        plots = result.get("plots") or {}
        if plots.get("full"):
            stem = f"{safe_stem(path)}-{pid[:8]}"
            full = Path("plots") / f"{stem}.png"
            thumb = Path("plots") / f"{stem}_thumb.png"
            atomic_write_bytes(inside(self.out, full), plots["full"])
            values["plot"] = full.as_posix()
            if plots.get("thumb"):
                atomic_write_bytes(inside(self.out, thumb), plots["thumb"])
                values["thumbnail"] = thumb.as_posix()
        record = {"version": RECORD_VERSION, "key": key, "values": values, "units": result.get("units", {}),
                  "drawable": bool(result.get("drawable", False))}
        atomic_write_bytes(self._record_path(pid), json.dumps(record, allow_nan=True).encode())
        return record

    def exists(self, path) -> bool:
        """Whether a record of this input is stored (current or not)."""
        return os.path.isfile(self._record_path(path_id(path)))

    def load(self, path):
        """The stored record of an input as it is (None when there is none or it cannot be read)."""
        try:
            with open(self._record_path(path_id(path)), "rb") as fh:
                return json.loads(fh.read())
        except (OSError, ValueError):
            return None

    def current(self, path, key, plot_wanted=None):
        """The stored record of an input when it is current, else None.

        Current: same content and settings, its figures on disk, and a figure when
        ``plot_wanted(values)`` asks for one and the input could be drawn (the figures
        asked for are not part of the settings: asking for more redraws only those).
        """
        record = self.load(path)   # None too when there is no record (a first run reads no file)
        if record is None or record.get("version") != RECORD_VERSION or record.get("key") != key:
            return None
        values = record["values"]
        for col in ("plot", "thumbnail"):
            rel = values.get(col)
            if rel and not (self.out / rel).is_file():
                return None
        if plot_wanted is not None and not values.get("plot") and record.get("drawable") and plot_wanted(values):
            return None
        return record
