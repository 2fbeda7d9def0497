"""The one atomic writer of every file the tool writes.

Every function here writes to a temporary sibling of the target in the same directory,
flushes and fsyncs it, gives it the mode a newly created file would have under the
user's umask (``0o666 & ~umask``), renames it over the target (``os.replace``) and fsyncs
the directory. A reader therefore sees the old file or the new one, never half a file;
a failure (or a kill) before the rename leaves the old file as it was and removes the
temporary (a killed process leaves at most a hidden ``.NAME.*.tmp`` sibling). Parent
directories are created. No file is ever written inside an analogs store
(:func:`analogs.workflows.paths.refuse_inside_store`): a store's own files go to its
staging directory, a sibling of the store.

NetCDF files are CF-tidied (:func:`analogs.stages.cf.cf_tidy`) on the way out.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
import threading
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from analogs._validation import fail
from analogs.errors import AnalogsInputError
from analogs.workflows.paths import check_output, refuse_inside_store

if TYPE_CHECKING:  # xarray is imported where a NetCDF file is written: a query reads none
    import xarray as xr

#: Suffixes :func:`write_table` knows, and the pandas writer of each.
TABLE_SUFFIXES = (".csv", ".parquet")

#: Serialises this process's NetCDF (HDF5) writes here and store reads
#: (:func:`analogs.workflows.store.read_dataset`): the HDF5 library is not thread-safe,
#: and a thread opening a store while another loads or writes one can crash the process.
#: Taken before, never inside, the lock of each netCDF4 call
#: (:func:`analogs._netcdf_lock.netcdf_lock`, which xarray's reads and writes take).
NETCDF_LOCK = threading.RLock()


def current_umask() -> int:
    """The process's umask, read without changing it where the system allows
    (``/proc/self/status`` on Linux), else by setting and restoring it."""
    try:
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def file_mode() -> int:
    """Permission bits of a new file under the current umask (``0o666 & ~umask``)."""
    return 0o666 & ~current_umask()


def directory_mode() -> int:
    """Permission bits of a new directory under the current umask (``0o777 & ~umask``)."""
    return 0o777 & ~current_umask()


def fsync_path(path) -> None:
    """Flush a file or a directory (its entries) to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary sibling path of ``path`` to write; on success it is fsynced,
    given the umask's mode and renamed over ``path`` (then the directory is fsynced);
    on failure it is removed and ``path`` is left as it was.

    The temporary exists (empty) when yielded, for writers that need a path rather
    than a handle (``to_netcdf``, ``to_parquet``, ``savefig``).
    """
    path = Path(path)
    refuse_inside_store(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    temporary = Path(name)
    try:
        yield temporary
        fsync_path(temporary)
        os.chmod(temporary, file_mode())
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    fsync_path(path.parent)


def write_bytes(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically; return the path."""
    path = Path(path)
    with atomic_path(path) as temporary:
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
    return path


def write_text(path, text: str, *, encoding: str = "utf-8") -> Path:
    """Write ``text`` to ``path`` atomically (UTF-8); return the path."""
    return write_bytes(path, text.encode(encoding))


def write_table(frame: pd.DataFrame, path, **options) -> Path:
    """Write a table as CSV or Parquet, by the suffix of ``path``, without its index;
    ``options`` go to ``DataFrame.to_csv`` / ``to_parquet`` (e.g. ``float_format``)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in TABLE_SUFFIXES:
        raise AnalogsInputError(f"{path}: expected a file name ending in .csv or .parquet")
    options.setdefault("index", False)
    with atomic_path(path) as temporary:
        if suffix == ".csv":
            frame.to_csv(temporary, **options)
        else:
            frame.to_parquet(temporary, **options)
    return path


def write_netcdf(ds: xr.Dataset, path, *, group=None, mode="w", encoding=None) -> Path:
    """Write a Dataset as CF NetCDF-4 (:func:`~analogs.stages.cf.cf_tidy`; float64 time,
    no fill values on coordinates), atomically.

    ``mode="a"`` adds ``group`` to an existing file: the file is copied to the temporary
    sibling, the group appended there and the copy renamed over the file, so a file of
    several groups (the store's ``basis.nc``) is also replaced whole. ``encoding``
    (variable -> settings) is merged over the default encoding.
    """
    path = Path(path)
    if mode not in ("w", "a"):
        raise ValueError(f"write_netcdf: mode must be 'w' or 'a', not {mode!r}")
    from analogs._duck_arrays import scheduler_probe_without_distributed
    from analogs.stages.cf import cf_tidy, netcdf_encoding
    tidy = cf_tidy(ds)
    # No import of dask.distributed (0.3 s) only to learn that there is no client.
    with atomic_path(path) as temporary, NETCDF_LOCK, scheduler_probe_without_distributed():
        if mode == "a" and path.exists():
            shutil.copyfile(path, temporary)
        else:
            mode = "w"
        tidy.to_netcdf(temporary, mode=mode, group=group, engine="netcdf4",
                       encoding=netcdf_encoding(tidy, encoding))
    return path


def write_maps(ds: xr.Dataset, path) -> Path:
    """Write outcome maps (:func:`analogs.stages.outcomes.outcome_maps`) as CF NetCDF,
    atomically: data variables float32 with NaN fill, coordinates without fill values.
    The directory must exist (it is an output the user named) and lie outside any store."""
    import numpy as np
    path = Path(path)
    check_output(path, "maps", None, kind="file")
    if not path.parent.is_dir():
        fail("maps", None, "a file in an existing directory", str(path))
    encoding = {name: {"dtype": "float32", "_FillValue": np.float32(np.nan)}
                for name in ds.data_vars}
    return write_netcdf(ds, path, encoding=encoding)
