"""Make astropy work offline: nothing in specan may download at run time."""

import warnings

#: Said in outputs whose precision depends on Earth-orientation data.
IERS_NOTE = (
    "Earth orientation from astropy's bundled IERS tables (no download); barycentric "
    "corrections are good to a few cm/s within the tables' span, and UT1-UTC beyond it "
    "is taken as 0 (error below 1 m/s for velocities)"
)


def configure_offline():
    """Set astropy's data and IERS configuration so that nothing is fetched."""
    from astropy.utils import data as _data
    from astropy.utils import iers

    _data.conf.allow_internet = False
    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    # Beyond the bundled table's span astropy would otherwise raise; a velocity
    # error of far below 1 m/s does not justify failing a night's reduction.
    iers.conf.iers_degraded_accuracy = "warn"
    warnings.filterwarnings("ignore", message=".*(IERS|leap-second|dubious year).*")


#: Environment variable naming the folder specan keeps its caches in ("" turns caching off);
#: default ``$XDG_CACHE_HOME/specan``, else ``~/.cache/specan``.
CACHE_ENV = "SPECAN_CACHE_DIR"


def cache_dir():
    """The folder specan keeps its caches in (see :data:`CACHE_ENV`), or None when caching is off."""
    import os
    from pathlib import Path

    chosen = os.environ.get(CACHE_ENV)
    if chosen is not None:
        return Path(chosen).expanduser() if chosen.strip() else None
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base).expanduser() / "specan"


def _earth_orientation_key():
    """What the parsed Earth-orientation table depends on: astropy's version and the bundled files' sizes and times."""
    import hashlib
    import os

    import astropy
    from astropy.utils import iers

    parts = [astropy.__version__]
    for name in (iers.IERS_A_FILE, iers.IERS_B_FILE, iers.IERS_A_README, iers.IERS_B_README):
        st = os.stat(name)
        parts += [str(name), str(st.st_size), str(st.st_mtime_ns)]
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:20]


def load_earth_orientation():
    """Install astropy's Earth-orientation table (bundled IERS A and B, no download), from specan's cache when it can.

    astropy parses its bundled IERS files (text, about 9 MB) on the first barycentric correction
    of every process: 0.8-1.0 s here (measured), as much as reading and analysing ten spectra, and
    paid again by every worker of a parallel or Dask run. The parsed table is kept in
    :func:`cache_dir` as a pickle (a 5 MB file, 11 ms to load, measured), keyed on astropy's version
    and the bundled files' sizes and times, and put where astropy keeps the table it parsed
    (``IERS_Auto.iers_table``), so astropy computes with the same numbers to the bit
    (tests/test_offline.py). Nothing is fetched; a missing, stale or unreadable cache only costs
    the parse, and a folder that cannot be written is left alone.
    """
    import pickle

    from astropy.utils import iers

    if iers.IERS_Auto.iers_table is not None:      # parsed (or set by the caller) already
        return iers.IERS_Auto.iers_table
    folder = cache_dir()
    try:
        path = folder / f"iers-{_earth_orientation_key()}.pickle" if folder is not None else None
    except OSError:                                  # bundled files not found: astropy will say so itself
        path = None
    if path is not None and path.is_file():
        try:
            # our own file in the user's own cache folder, written below from astropy's parse
            table = pickle.loads(path.read_bytes())
            if isinstance(table, iers.IERS_Auto) and len(table) > 0:
                iers.IERS_Auto.iers_table = table
                return table
        except Exception:  # noqa: BLE001, S110 - truncated, or from another environment: parsed again below
            pass
    table = iers.IERS_Auto.open()
    if path is not None:
        _write_whole(path, pickle.dumps(table, protocol=pickle.HIGHEST_PROTOCOL))
    return table


def _write_whole(path, data):
    """Write ``data`` to ``path`` under another name first, then rename: parallel workers never read half a file.
    A folder that cannot be written is left alone (the cache is an optimisation)."""
    import os
    import tempfile

    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix="." + path.name + ".")
    except OSError:
        return
    try:
        with os.fdopen(fd, "wb") as out:
            out.write(data)
        os.replace(tmp, path)
    except OSError:
        try:
            os.unlink(tmp)
        except OSError:
            pass


#: How many megabytes of files of one kind :func:`cached_arrays` keeps, the least recently used going
#: first: one instrument set-up's velocity templates take ~13 files and 9 MB (measured on the
#: benchmark night), so this keeps about ten set-ups.
ARRAYS_KEPT_MB = 100


_CODE_KEY = []


def _code_and_libraries():
    """What computed arrays depend on besides their own arguments: specan's code and data files,
    numpy's and scipy's versions (computed once a process; specan's code does not change under a run)."""
    if not _CODE_KEY:
        import numpy
        import scipy

        from .contents import code_fingerprint

        _CODE_KEY.append(f"{code_fingerprint()} numpy {numpy.__version__} scipy {scipy.__version__}")
    return _CODE_KEY[0]


def cached_arrays(kind, key, build):
    """The arrays ``build()`` returns (a dict of name -> numpy array), from :func:`cache_dir` when kept there.

    For work every new process repeats on the same inputs, such as the velocity templates of an
    instrument set-up (0.2 s a process, measured): a file named by ``kind`` and a hash of ``key``
    (the arguments, as text), of specan's code and data and of numpy's and scipy's versions, so
    that other code or other arguments never meet a kept file. The arrays come back as they were
    saved (numpy's own format, to the bit). A missing or unreadable file costs only ``build()``;
    a folder that cannot be written is left alone; ``SPECAN_CACHE_DIR=""`` turns this off.
    """
    import contextlib
    import hashlib
    import io
    import os

    import numpy as np

    folder = cache_dir()
    if folder is None:
        return build()
    digest = hashlib.sha256(f"{_code_and_libraries()}\n{key}".encode()).hexdigest()[:24]
    path = folder / f"{kind}-{digest}.npz"
    if path.is_file():
        try:
            with np.load(path, allow_pickle=False) as kept:
                arrays = {name: kept[name] for name in kept.files}
            with contextlib.suppress(OSError):
                os.utime(path)   # used: the newest to keep (_prune)
            return arrays
        except Exception:  # noqa: BLE001, S110 - truncated or foreign: made again below
            pass
    arrays = build()
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    _write_whole(path, buffer.getvalue())
    _prune(folder, kind)
    return arrays


def _prune(folder, kind):
    """Keep the newest files of ``kind`` that fit in :data:`ARRAYS_KEPT_MB`."""
    import contextlib

    try:
        files = [(p, p.stat()) for p in folder.glob(f"{kind}-*.npz")]
    except OSError:   # one went meanwhile (another process pruned): next time
        return
    total = 0
    for path, st in sorted(files, key=lambda f: f[1].st_mtime, reverse=True):
        total += st.st_size
        if total > ARRAYS_KEPT_MB * 1e6:
            with contextlib.suppress(OSError):
                path.unlink()
