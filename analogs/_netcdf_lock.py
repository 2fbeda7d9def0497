"""The one lock the package holds around its own netCDF4 calls.

The HDF5 library is not thread-safe, and netCDF4 gives the GIL up inside its calls (as
the package's direct reads, :func:`analogs.stages.sources._read_stored_into`, do while
HDF5 decompresses): two threads in netCDF4 at once can crash the process. xarray's
netCDF4 reader holds its lock (``NETCDF4_PYTHON_LOCK``) around each of its calls, so the
package's direct calls hold the same lock: every HDF5 call of the package's threads then
runs alone. A query reads its store without importing xarray; until xarray is imported
no xarray reader can run, and a lock of the package's own serialises those calls.

The lock is not reentrant: nothing that reads through xarray (a lazily loaded variable,
``open_dataset``) may run while it is held.
"""

from __future__ import annotations

import sys
import threading

_BEFORE_XARRAY = threading.Lock()


def netcdf_lock():
    """The lock to hold around direct netCDF4 calls (see the module docstring)."""
    reader = sys.modules.get("xarray.backends.netCDF4_")
    return getattr(reader, "NETCDF4_PYTHON_LOCK", _BEFORE_XARRAY)
