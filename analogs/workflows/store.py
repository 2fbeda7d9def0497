"""The store: the one persisted state, a directory of plain, portable files.

Layout::

    STORE/manifest.json   format version, build config, provenance, sha256 of every file
    STORE/basis.nc        grid, climatology (group /climatology), EOFs (group /eof)
    STORE/scores.nc       pcs (time, mode) of every archive day
    STORE/events.parquet  the events table attached at build (optional)
    STORE/tags.parquet    regime and diagnostics of every day (optional)

Nothing is pickled. Every write is one :func:`transaction`: the writer lock (a file
beside the store) is taken first, the current version is read and its checksums checked
under the lock, the new version is written into a temporary sibling directory, every
file is fsynced, and the directory is swapped into place (``renameat2(RENAME_EXCHANGE)``
on Linux, two renames elsewhere) before the lock is released. So two writers never lose
each other's changes, a failed or killed write leaves the previous store untouched and
readers never see half a store. Loading checks the format version and the checksums
(:func:`check_checksums`). Files are written by :mod:`analogs.workflows.files`.
"""

from __future__ import annotations

import contextlib
import copy
import ctypes
import ctypes.util
import datetime as _dt
import errno
import glob
import hashlib
import json
import os
import re
import shutil
import tempfile
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs import __version__
from analogs._netcdf_lock import netcdf_lock
from analogs.errors import StoreError
from analogs.workflows import files as _files
from analogs.workflows import paths as _paths

if TYPE_CHECKING:  # xarray is imported to read or write a NetCDF file whole
    import xarray as xr
    from filelock import FileLock

FORMAT_VERSION = 1
MANIFEST = "manifest.json"
BASIS = "basis.nc"
SCORES = "scores.nc"
EVENTS = "events.parquet"
TAGS = "tags.parquet"
MODELS = "models.nc"
#: Events in the store's region on every day, per kind (what every query counts; written
#: at build and update from events.parquet, read back instead of counted per process).
COUNTS = "counts.parquet"
#: Group of ``basis.nc`` holding the land fraction on the store grid (variable ``land``),
#: when the build was given or found a land-sea mask (only to draw maps).
LAND_GROUP = "land"
#: Seconds a second writer waits for the lock before giving up (default).
LOCK_TIMEOUT = 600.0
#: Environment variable that overrides :data:`LOCK_TIMEOUT` (seconds).
LOCK_TIMEOUT_ENV = "ANALOGS_LOCK_TIMEOUT"


def file_entry(path) -> dict:
    """A file's entry in the manifest's ``files``: its sha256 and size."""
    return {"sha256": sha256_file(path), "bytes": Path(path).stat().st_size}


def sha256_file(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two directories (Linux renameat2); False when unsupported."""
    libc_name = ctypes.util.find_library("c")
    if not libc_name:
        return False
    libc = ctypes.CDLL(libc_name, use_errno=True)
    renameat2 = getattr(libc, "renameat2", None)
    if renameat2 is None:
        return False
    at_fdcwd, rename_exchange = -100, 2
    result = renameat2(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    return result == 0


def _swap_into_place(staged: Path, target: Path) -> None:
    if not target.exists():
        os.rename(staged, target)
    elif _exchange(staged, target):
        shutil.rmtree(staged)  # now holds the previous version
    else:
        retired = target.with_name(f".{target.name}.old-{os.getpid()}")
        os.rename(target, retired)
        os.rename(staged, target)
        shutil.rmtree(retired)
    _files.fsync_path(target.parent)


def lock_for(path) -> FileLock:
    """The lock that keeps two writers of one store apart (a file beside the store)."""
    from filelock import FileLock  # imported here: only writers lock (readers retry)
    path = Path(path)
    return FileLock(str(path.with_name(f".{path.name}.lock")))


def lock_timeout(timeout=None) -> float:
    """Seconds to wait for the writer's lock: ``timeout``, else the environment variable
    ``ANALOGS_LOCK_TIMEOUT``, else :data:`LOCK_TIMEOUT`."""
    if timeout is None:
        text = os.environ.get(LOCK_TIMEOUT_ENV)
        if text is None or not text.strip():
            return LOCK_TIMEOUT
        try:
            timeout = float(text)
        except ValueError:
            timeout = float("nan")
        if not timeout >= 0:
            raise StoreError(f"environment variable {LOCK_TIMEOUT_ENV}={text!r}: expected a "
                             "number of seconds >= 0")
        return timeout
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout >= 0:
        raise StoreError(f"The 'timeout' parameter of writing must be a number of seconds "
                         f">= 0. Got {timeout!r} instead.")
    return float(timeout)


def _staging_prefix(path: Path) -> str:
    return f".{path.name}.tmp-"


def remove_stale_staging(path) -> list[str]:
    """Remove temporary siblings left by writers of the store at ``path`` that died.

    Staging directories are named ``.NAME.tmp-PID-XXXX`` (``.NAME.old-PID`` for the
    retired copy of the two-rename swap). One whose process is no longer alive belongs to
    a writer that was killed or crashed before it could clean up, and is removed. Call it
    while holding the store's lock (the lock dies with its process, so no live writer is
    using them). Returns the names removed.
    """
    path = Path(path)
    removed = []
    for prefix in (_staging_prefix(path), f".{path.name}.old-"):
        for item in path.parent.glob(f"{glob.escape(prefix)}*"):
            pid = item.name[len(prefix):].split("-", 1)[0]
            if item.is_dir() and not _process_alive(pid):
                shutil.rmtree(item, ignore_errors=True)
                removed.append(item.name)
    return removed


def _process_alive(pid_text: str) -> bool:
    """Whether the process of this PID (text from a directory name) is running."""
    try:
        pid = int(pid_text)
    except ValueError:
        return False
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by another user
        return True
    return True


class Transaction:
    """One write of the store at ``path``, made while holding its writer lock.

    Made by :func:`transaction`. ``manifest`` is the manifest of the version current
    when the lock was taken, its checksums checked (None for a whole new version);
    ``staging`` the directory the new version is written into. :meth:`carry` copies
    files of the current version unchanged; :meth:`commit` writes the manifest and
    swaps the new version in (still under the lock). A transaction left without a
    commit writes nothing.
    """

    def __init__(self, path: Path, manifest: dict | None, staging: Path):
        self.path = path
        self.manifest = manifest
        self.staging = staging
        self.committed: dict | None = None

    def carry(self, *names) -> None:
        """Copy the files ``names`` of the current version into the new one unchanged
        (names the current version does not list are skipped)."""
        listed = None if self.manifest is None else self.manifest["files"]
        for name in names:
            if Path(name).name != name:
                raise StoreError(f"cannot carry {name!r}: not a file name of the store")
            if (listed is None or name in listed) and (self.path / name).is_file():
                shutil.copy2(self.path / name, self.staging / name)
                os.chmod(self.staging / name, _files.file_mode())

    def commit(self, manifest: dict) -> dict:
        """Write the manifest (``manifest`` plus format, version, time and the sha256 of
        every staged file), fsync, and swap the staged version in place of the store.
        Files and folders in the store directory that the store did not write are kept
        (:func:`keep_foreign_entries`). Returns the manifest written."""
        if self.committed is not None:
            raise StoreError(f"store {self.path}: this transaction was already committed")
        full = _finish_manifest(self.staging, manifest)
        keep_foreign_entries(self.path, self.staging,
                             listed=() if self.manifest is None else self.manifest["files"])
        _swap_into_place(self.staging, self.path)
        self.committed = full
        return full


@contextlib.contextmanager
def transaction(path, *, new=False, timeout=None):
    """Take the writer lock of the store at ``path`` and yield a :class:`Transaction`.

    Every write of a store is a load-modify-write done entirely inside this block: the
    current version is read AFTER the lock is held (``txn.manifest``, checksums checked;
    load its arrays from ``txn.path`` with it), the new version is written into
    ``txn.staging`` and swapped in by ``txn.commit(manifest)``. No other writer can swap
    a version in between, so nothing another writer committed is lost. ``new=True``
    writes a whole new version (a build): the current one, if any, is not read (it may
    be damaged; a rebuild replaces it). A second writer waits up to ``timeout`` seconds
    (:func:`lock_timeout`) for the lock, then fails with
    :class:`~analogs.errors.StoreError`. Staging directories of writers that died are
    removed first (:func:`remove_stale_staging`). Any exception before the commit leaves
    the store exactly as it was.

    Example::

        with store_io.transaction(path) as txn:
            current = AnalogStore._load_version(path, manifest=txn.manifest)
            ...                                   # write changed files into txn.staging
            txn.carry(BASIS)                      # and carry unchanged ones
            txn.commit({**editable(txn.manifest), "query_defaults": {...}})
    """
    path = checked_store_path(path, new=new)
    seconds = lock_timeout(timeout)
    if not new:
        read_manifest(path)  # a clear error for a path that is no store, before any lock
    with write_errors(path):
        path.parent.mkdir(parents=True, exist_ok=True)
        _check_writable(path)
        from filelock import Timeout
        try:
            lock = lock_for(path)
            lock.acquire(timeout=seconds)
        except Timeout as error:
            raise StoreError(f"store {path} is locked by another writer (lock "
                             f"{error.lock_file}, waited {seconds:g} s); try again when it "
                             "has finished") from None
    try:
        remove_stale_staging(path)
        manifest = None if new else check_checksums(path)
        if new and path.is_dir() and not _paths.is_store(path):
            _refuse_foreign_folder(path)
        with write_errors(path):
            staged = Path(tempfile.mkdtemp(prefix=f"{_staging_prefix(path)}{os.getpid()}-",
                                           dir=path.parent))
            os.chmod(staged, _files.directory_mode())
        txn = Transaction(path, manifest, staged)
        try:
            with write_errors(path, staged):
                yield txn
        finally:
            if txn.committed is None:
                shutil.rmtree(staged, ignore_errors=True)
    finally:
        lock.release()


def writable(path) -> bool:
    """Whether a writer could write the store at ``path`` (its folder and the one around
    it, where the new version is staged and the lock kept, accept writes): False on a
    read-only folder or file system. Readers that only add to a store (a cached
    measurement) ask before doing work they could not keep."""
    path = Path(path)
    return all(os.access(folder, os.W_OK | os.X_OK) for folder in (path.parent, path))


def keep_in_manifest(path, section, key, fields, entry, *, limit, timeout=None) -> bool:
    """Keep a derived result in the manifest of the store at ``path``: ``entry`` (a
    JSON-ready dict) with its ``fields`` under ``manifest[section][key]``, the newest
    last, through :func:`edit_manifest`. ``fields["data"]`` names the checksums of the
    files it was derived from: nothing is written when the store's files changed since
    (a result of older data), entries of other data are dropped, and the oldest beyond
    ``limit``. False when it could not be kept (a read-only store, or the lock held by
    another writer beyond ``timeout``)."""
    def edit(manifest, files):
        if {name: files.get(name) for name in fields["data"]} != fields["data"]:
            return None
        kept = {k: v for k, v in (manifest.get(section) or {}).items()
                if v.get("key", {}).get("data") == fields["data"]}
        kept.pop(key, None)
        kept[key] = {"key": fields, **entry}
        manifest[section] = dict(list(kept.items())[-limit:])
        return manifest

    try:
        return edit_manifest(path, edit, timeout=timeout) is not None
    except StoreError:
        return False


def edit_manifest(path, edit, *, timeout=None) -> dict | None:
    """One transaction that changes only the manifest of the store at ``path``.

    ``edit(manifest, files)`` gets the current version's manifest (a copy,
    :func:`editable`, read under the writer lock, so what other writers committed is
    there) and the checksums of its files, and returns the manifest to write, or None to
    write nothing. Every file is carried unchanged.
    Returns the manifest written, or None.
    """
    with transaction(path, timeout=timeout) as txn:
        manifest = edit(editable(txn.manifest), dict(txn.manifest["files"]))
        if manifest is None:
            return None
        txn.carry(*txn.manifest["files"])
        return txn.commit(manifest)


def checked_store_path(path, *, new=False) -> Path:
    """The real directory a store path names (symbolic links and ``..`` resolved), so
    that a write through a link goes to the store it points at and leaves the link as
    it is. Refused: a path that is a file, lies inside another store, or (``new``) is an
    existing folder, not a store, that holds files of its own."""
    given = path
    path = _paths.real_path(path)
    if path.exists() and not path.is_dir():
        raise StoreError(f"store path {given} exists and is not a directory")
    outer = _paths.enclosing_store(path.parent)
    if outer is not None:
        raise StoreError(f"store path {given} lies inside the analogs store {outer}; a store "
                         "is a folder of its own, never inside another (from inside a store, "
                         "'--store .' names it)")
    if path == Path(path.anchor):
        raise StoreError(f"store path {given} is the root of the file system; give a folder")
    return path


def check_new_store_path(path) -> Path:
    """:func:`checked_store_path` for a new version (a build), with the refusal of an
    existing folder that is not a store: called before a build's work, so a bad store
    path is refused at once (the transaction checks again under the lock)."""
    path = checked_store_path(path, new=True)
    if path.is_dir() and not _paths.is_store(path):
        _refuse_foreign_folder(path)
    return path


def _refuse_foreign_folder(path: Path) -> None:
    """Refuse to build a store into an existing folder that holds files of its own (a
    build replaces the whole folder)."""
    foreign = _paths.foreign_entries(path)
    if foreign:
        shown = ", ".join(foreign[:5]) + (", ..." if len(foreign) > 5 else "")
        raise StoreError(f"store path {path} is an existing folder that is not an analogs "
                         f"store (it holds {shown}); build into a new or empty folder")


def _check_writable(path: Path) -> None:
    """Refuse, before any work, a store whose folder (or the folder around it, where the
    new version is staged and the lock kept) cannot be written."""
    for folder, what in ((path.parent, f"the folder {path.parent} around store {path}"),
                         (path, f"store {path}")):
        if folder.exists() and not os.access(folder, os.W_OK | os.X_OK):
            raise StoreError(f"cannot write {what}: it is read-only (no write permission "
                             "or a read-only file system); the store was left as it was")


#: errno values of a write that cannot succeed: the disk (or the quota) is full, or the
#: file system is read-only.
_FULL = (errno.ENOSPC, errno.EDQUOT)
_READ_ONLY = (errno.EROFS,)
_DENIED = (errno.EACCES, errno.EPERM)


@contextlib.contextmanager
def write_errors(path, *where):
    """Turn a write that cannot succeed (disk or quota full, read-only file system,
    permission denied on the store or its staging directory) into one clear
    :class:`~analogs.errors.StoreError` saying the store was left as it was. Other
    errors pass unchanged."""
    try:
        yield
    except OSError as error:
        number = error.errno
        filename = str(getattr(error, "filename", "") or "")
        places = [str(path), str(Path(path).parent), *map(str, where)]
        ours = not filename or any(filename.startswith(place) for place in places)
        if number in _FULL:
            reason = "no space left on the device (or the quota is full)"
        elif number in _READ_ONLY:
            reason = "the file system is read-only"
        elif number in _DENIED and ours:
            reason = "permission denied"
        else:
            raise
        raise StoreError(f"cannot write store {path}: {reason}; the store was left as it "
                         "was") from None


def keep_foreign_entries(path, staging, *, listed=()) -> list[str]:
    """Carry the files and folders of the store directory ``path`` that the store did
    not write (:func:`analogs.workflows.paths.foreign_entries`) into ``staging``, so
    the swap keeps them: hard links where the file system allows (no copy), else
    copies; symbolic links as links. Names the new version writes itself win. Returns
    the names kept."""
    path, staging = Path(path), Path(staging)
    if not path.is_dir():
        return []
    kept = []
    for name in _paths.foreign_entries(path, listed):
        source, target = path / name, staging / name
        if os.path.lexists(target):
            continue
        if source.is_symlink():
            os.symlink(os.readlink(source), target)
        elif source.is_dir():
            shutil.copytree(source, target, symlinks=True, copy_function=_link_or_copy)
        else:
            _link_or_copy(source, target)
        kept.append(name)
    return kept


def _link_or_copy(source, target) -> None:
    try:
        os.link(source, target)
    except OSError:
        shutil.copy2(source, target)


@contextlib.contextmanager
def writing(path, manifest: dict, *, keep=(), timeout=None):
    """Stage a whole new version of the store at ``path`` and swap it in on success.

    Yields the staging directory; the caller writes its files there. ``keep`` names files
    of the existing store that are carried over unchanged. On leaving the block the
    manifest (with checksums of every file) is written, everything is fsynced and the
    directory replaces ``path``. Any exception leaves the existing store exactly as it
    was. A :func:`transaction` with ``new=True``; a change of the current version
    (load-modify-write) needs :func:`transaction` itself.
    """
    with transaction(path, new=True, timeout=timeout) as txn:
        txn.carry(*keep)
        yield txn.staging
        txn.commit(manifest)


def _finish_manifest(staged: Path, manifest: dict) -> dict:
    listed = {}
    for item in sorted(staged.iterdir()):
        if item.name == MANIFEST:
            continue
        _files.fsync_path(item)
        listed[item.name] = file_entry(item)
    full = {
        "format": "analogs-store",
        "format_version": FORMAT_VERSION,
        "package_version": __version__,
        "written": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        **manifest,
        "files": listed,
    }
    text = json.dumps(full, indent=2, sort_keys=False, default=_json_default) + "\n"
    _files.write_text(staged / MANIFEST, text)  # fsyncs the file and the staging directory
    return json.loads(text)


def _json_default(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return float(value)
    if isinstance(value, (np.ndarray,)):
        return value.tolist()
    if isinstance(value, (pd.Timestamp, _dt.datetime, _dt.date)):
        return value.isoformat()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot write {type(value).__name__} to the manifest")


#: Manifest keys the store writes itself on every write (see :meth:`Transaction.commit`).
_WRITTEN_KEYS = ("format", "format_version", "package_version", "written", "files")


def editable(manifest: dict) -> dict:
    """A copy of the part of a manifest a new version carries over (without what
    :meth:`Transaction.commit` adds); changing it leaves ``manifest`` as it was."""
    return copy.deepcopy({key: value for key, value in manifest.items()
                          if key not in _WRITTEN_KEYS})


def version_token(path):
    """What changes when a new version of the store is swapped in: the directory's inode
    and the manifest's modification time (None when there is no store)."""
    try:
        return os.stat(path).st_ino, os.stat(Path(path) / MANIFEST).st_mtime_ns
    except OSError:
        return None


def read_manifest(path) -> dict:
    """Read and check the manifest of the store at ``path`` (no checksum test)."""
    path = Path(path)
    manifest_path = path / MANIFEST
    if not path.is_dir():
        raise StoreError(f"store {path} does not exist or is not a directory; "
                         "build one with 'analogs build --store DIR FILE...'")
    if not manifest_path.is_file():
        raise StoreError(f"store {path} has no {MANIFEST}: it is not an analogs store "
                         "or it is incomplete")
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as error:
        raise StoreError(f"{manifest_path} is not valid JSON ({error})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != "analogs-store":
        raise StoreError(f"{manifest_path} is not an analogs store manifest")
    version = manifest.get("format_version")
    if version != FORMAT_VERSION:
        raise StoreError(f"store {path} has format version {version!r}; this analogs "
                         f"{__version__} reads version {FORMAT_VERSION}: rebuild the store")
    if not isinstance(manifest.get("files"), dict):
        raise StoreError(f"{manifest_path} lists no files")
    return manifest


def check_checksums(path) -> dict:
    """Check every file listed in the manifest of the store at ``path`` against its
    sha256 (and the format version); return the manifest."""
    path = Path(path)
    manifest = read_manifest(path)
    for name, entry in manifest["files"].items():
        if Path(name).name != name:
            raise StoreError(f"{path / MANIFEST} lists a file outside the store: {name!r}")
        item = path / name
        if not item.is_file():
            raise StoreError(f"store {path} is missing {name}, listed in its manifest; "
                             "rebuild the store")
        if sha256_file(item) != entry.get("sha256"):
            raise StoreError(f"store file {item} does not match its checksum in "
                             f"{MANIFEST}: it was altered or damaged; rebuild the store")
    extra = sorted(p.name for p in path.iterdir()
                   if p.name != MANIFEST and p.name not in manifest["files"])
    if extra:
        warnings.warn(f"store {path} holds files not listed in its manifest "
                      f"({', '.join(extra[:5])}{', ...' if len(extra) > 5 else ''}); "
                      "they are ignored (and kept as they are by writes)", UserWarning,
                      stacklevel=2)
    return manifest


def write_dataset(ds: xr.Dataset, path, *, group=None, mode="w") -> None:
    """Write a Dataset of the store as CF NetCDF (:func:`analogs.workflows.files.write_netcdf`);
    ``mode="a"`` adds ``group`` to the file (the store's ``basis.nc`` holds several)."""
    _files.write_netcdf(ds, path, group=group, mode=mode)


def read_dataset(path, *, group=None) -> xr.Dataset:
    """Read a NetCDF file of the store fully into memory and close it."""
    try:
        import xarray as xr
        with _files.NETCDF_LOCK, xr.open_dataset(path, group=group, engine="netcdf4") as ds:
            return ds.load()
    except (OSError, ValueError, KeyError) as error:
        where = f"{path}" + (f" (group {group})" if group else "")
        raise StoreError(f"cannot read store file {where}: {error}") from None


def read_scores(path) -> dict:
    """The PCs of ``scores.nc`` at ``path`` without xarray (a query reads nothing else
    of the file, and xarray with dask costs more to import than the query takes):
    ``values`` (time, mode) float64, ``times`` (DatetimeIndex, decoded by netCDF4 from
    the CF units), ``modes`` and the variable's ``attrs``."""
    import netCDF4
    path = Path(path)
    try:
        with _files.NETCDF_LOCK, netcdf_lock(), netCDF4.Dataset(path) as scores:
            if "pcs" not in scores.variables:
                raise StoreError(f"store {path.parent}: {SCORES} holds no variable 'pcs' (it "
                                 f"holds {', '.join(scores.variables) or 'none'}); rebuild "
                                 "the store")
            variable = scores["pcs"]
            if variable.ndim != 2 or "time" not in variable.dimensions:
                raise StoreError(f"store {path.parent}: {SCORES} holds pcs of dims "
                                 f"{variable.dimensions}, not (time, mode); rebuild the store")
            variable.set_auto_mask(False)
            values = np.asarray(variable[:], dtype=float)
            if variable.dimensions[0] != "time":
                values = values.T
            mode_name = next(d for d in variable.dimensions if d != "time")
            modes = (np.asarray(scores[mode_name][:]) if mode_name in scores.variables
                     else np.arange(values.shape[1]))
            time = scores["time"]
            times = _gregorian_times(time[:], time.units, getattr(time, "calendar", "standard"))
            if times is None:
                times = netCDF4.num2date(time[:], time.units,
                                         getattr(time, "calendar", "standard"),
                                         only_use_cftime_datetimes=False,
                                         only_use_python_datetimes=True)
            attrs = {name: variable.getncattr(name) for name in variable.ncattrs()
                     if not name.startswith("_")}
    except (OSError, ValueError, KeyError, AttributeError, IndexError) as error:
        raise StoreError(f"cannot read store file {path}: {error}") from None
    # pandas converts the datetimes in C (numpy's object cast took 13 ms of 10 years' days)
    times = pd.DatetimeIndex(times).as_unit("ns")
    return {"values": values, "times": times, "modes": modes, "mode_name": mode_name,
            "attrs": attrs}


#: CF time units "UNIT since YYYY-MM-DD[ hh:mm[:ss]]" (no time zone) of a time decoded
#: by :func:`_gregorian_times`, and the seconds of each unit.
_PLAIN_TIME_UNITS = re.compile(r"\s*(days|hours|minutes|seconds) since (\d{4})-(\d{1,2})-(\d{1,2})"
                               r"(?:[ T](\d{1,2}):(\d{2})(?::(\d{2}))?)?\s*")
_UNIT_SECONDS = {"days": 86_400, "hours": 3_600, "minutes": 60, "seconds": 1}
#: The first day of the Gregorian calendar: a "standard" calendar is Julian before it.
_GREGORIAN_START = pd.Timestamp(1582, 10, 15)


def _gregorian_times(values, units: str, calendar: str):
    """Times of a CF time variable as a DatetimeIndex (ns), computed in whole seconds,
    when that is exact: plain units (:data:`_PLAIN_TIME_UNITS`), a Gregorian calendar
    (``standard`` from its first day on), whole seconds within float64's exact integers
    and no missing value. None otherwise (netCDF4's num2date decodes it: 18 ms for the
    14,610 days of a 40-year store, making each a Python datetime, against 0.5 ms). The same
    instants as num2date, which adds the same whole seconds to the reference date
    (CF conventions, section 4.4)."""
    match = _PLAIN_TIME_UNITS.fullmatch(str(units))
    if (match is None or np.ma.is_masked(values)
            or str(calendar).lower() not in ("standard", "gregorian", "proleptic_gregorian")):
        return None
    seconds = np.asarray(np.ma.getdata(values), dtype=float) * _UNIT_SECONDS[match[1]]
    if seconds.ndim != 1 or not (np.all(np.abs(seconds) < 2.0 ** 53)
                                 and np.array_equal(seconds, np.round(seconds))):
        return None
    try:
        reference = pd.Timestamp(*(int(part or 0) for part in match.groups()[1:]))
        times = pd.DatetimeIndex(reference + pd.to_timedelta(seconds.astype(np.int64), "s"))
        times = times.as_unit("ns")
    except (ValueError, OverflowError):  # a date of no nanosecond time stamp: num2date's way
        return None
    if str(calendar).lower() != "proleptic_gregorian" and (
            reference < _GREGORIAN_START or (times.size and times.min() < _GREGORIAN_START)):
        return None  # dates of the Julian calendar: num2date's mixed calendar
    return times


def read_grid(path) -> tuple[np.ndarray, np.ndarray]:
    """Latitudes and longitudes (degrees) of the store grid, from the root of ``basis.nc``
    at ``path`` (without reading the climatology or the EOFs)."""
    import netCDF4
    try:
        with _files.NETCDF_LOCK, netcdf_lock(), netCDF4.Dataset(path) as basis:
            return (np.asarray(basis["lat"][:], dtype=float),
                    np.asarray(basis["lon"][:], dtype=float))
    except (OSError, IndexError, KeyError) as error:
        raise StoreError(f"cannot read the grid of store file {path}: {error}") from None


def write_table(frame: pd.DataFrame, path) -> None:
    """Write a table of the store as Parquet (without the frame's index)."""
    _files.write_table(frame, path)


def read_table(path) -> pd.DataFrame:
    try:
        return pd.read_parquet(path)
    except (OSError, ValueError) as error:
        raise StoreError(f"cannot read store table {path}: {error}") from None
