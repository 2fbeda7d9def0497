"""Work run in a forked child process beside the caller's own, its answer sent back as
bytes through a pipe, or written into memory shared with the caller (Linux).

HDF5 decompresses the files of an archive one at a time under netCDF4's lock, whatever
the threads: on a machine of two cores, half of the files read in a child while the
caller reads the other half take about half the time (a build writes them straight
into its joined array, :func:`shared_empty`; a report's days come back as bytes). The
child is forked where it is needed: it shares the caller's imports and memory (copied
on write) and costs no start-up. It must run only code that is safe after a fork of a
process with other threads (numpy without BLAS, netCDF4, xarray, contourpy; not faiss's
OpenMP): its work is handed to it by the caller, and its answer crosses as plain bytes
(:func:`arrays_to_bytes`: a JSON header and raw buffers, no pickle).

Whatever goes wrong in the child (an error, a crash, no answer in time) leaves the caller
to do that work itself: the answer, its errors and its warnings are then those of a run
without the child.
"""

from __future__ import annotations

import contextlib
import gc
import json
import os
import select
import signal
import struct
import sys
import time
import warnings

import numpy as np

from analogs._netcdf_lock import netcdf_lock

#: The value kinds that cross as raw buffers: booleans, integers, floats, complex
#: numbers and datetimes.
_PLAIN_KINDS = "biufcM"
#: The types of attribute values that cross unchanged in JSON.
_PLAIN_ATTRS = (str, int, float, bool)


def can_fork() -> bool:
    """Whether work can be forked here: Linux only (a fork of a process that has loaded
    macOS's system frameworks is not safe; Windows has no fork)."""
    return sys.platform.startswith("linux") and hasattr(os, "fork")


class Child:
    """A forked child running ``work(*args)`` (which returns bytes); see :func:`beside`."""

    def __init__(self, work, *args):
        self._read, write = os.pipe()
        # The objects made so far are left out of garbage collection until the child has
        # ended: a collection writes to every object it visits, and in either process
        # each page so written while the child lives is copied (a copy of most of the
        # heap: the child's work took twice as long).
        gc.freeze()
        # netCDF4's lock held across the fork: no other thread is inside HDF5 at that
        # moment, and both processes leave the block with the lock free (one held by
        # another thread would stay held in the child for ever).
        try:
            with netcdf_lock():
                self.pid = os.fork()
        except OSError:  # no room for a process (memory, process limits): no child
            self.pid, self._ended = None, True
            for end in (self._read, write):
                os.close(end)
            gc.unfreeze()
            return
        if self.pid == 0:  # the child: never returns
            code = 1
            try:
                gc.disable()  # a short life: nothing to collect that is worth the copies
                os.close(self._read)
                payload = work(*args)
                with os.fdopen(write, "wb") as pipe:
                    pipe.write(payload)
                code = 0
            finally:
                os._exit(code)  # no atexit handlers, no flush of the caller's buffers
        os.close(write)
        self._ended = False

    def answer(self, timeout: float) -> bytearray | None:
        """The child's bytes, or None when there is no child (the fork failed), it failed
        or it gave no answer within ``timeout`` seconds (it is then killed)."""
        if self.pid is None:
            return None
        received, deadline = bytearray(), time.monotonic() + timeout
        ready = select.poll()  # unlike select(), any descriptor number
        ready.register(self._read, select.POLLIN)
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not ready.poll(left * 1000.0):
                self.end()
                return None
            chunk = os.read(self._read, 1 << 20)
            if not chunk:
                break
            received += chunk
        os.close(self._read)
        _, status = os.waitpid(self.pid, 0)
        self._ended = True
        gc.unfreeze()
        return received if os.waitstatus_to_exitcode(status) == 0 else None

    def end(self):
        """Kill the child if it still runs, and reap it."""
        if self._ended:
            return
        with contextlib.suppress(ProcessLookupError):
            os.kill(self.pid, signal.SIGKILL)
        with contextlib.suppress(ChildProcessError):
            os.waitpid(self.pid, 0)
        with contextlib.suppress(OSError):
            os.close(self._read)
        self._ended = True
        gc.unfreeze()


@contextlib.contextmanager
def beside(work, *args):
    """Fork a child running ``work(*args)`` (returning bytes) while the block runs;
    yields the :class:`Child` (``answer(timeout)`` gives its bytes or None). The child
    has ended when the block is left, also on error (it is killed if it still runs)."""
    child = Child(work, *args)
    try:
        yield child
    finally:
        child.end()


def shared_empty(shape, dtype) -> np.ndarray:
    """An uninitialised array in memory shared with children forked later (an anonymous
    shared mapping): what a child writes there, the caller sees, with nothing sent."""
    import mmap
    dtype = np.dtype(dtype)
    size = dtype.itemsize * int(np.prod(shape, dtype=np.int64))
    if not size:
        return np.empty(shape, dtype)
    return np.frombuffer(mmap.mmap(-1, size, flags=mmap.MAP_SHARED), dtype).reshape(shape)


def arrays_to_bytes(arrays, notes=None) -> bytes:
    """DataArrays (values and coordinates of :data:`_PLAIN_KINDS`, attributes of
    :data:`_PLAIN_ATTRS` values) and JSON-able ``notes`` as bytes: an 8-byte length, a
    JSON header, then every array's raw buffer. TypeError for anything else."""
    header, buffers = {"arrays": [], "notes": notes}, []

    def described(name, variable):
        values = np.ascontiguousarray(variable.values)
        attrs = dict(variable.attrs)
        if values.dtype.kind not in _PLAIN_KINDS or not all(
                type(v) in _PLAIN_ATTRS for v in attrs.values()):
            raise TypeError(f"{name!r} cannot cross as plain bytes")
        buffers.append(values.tobytes())
        return {"name": name, "dims": list(variable.dims), "dtype": values.dtype.str,
                "shape": list(values.shape), "attrs": attrs}

    for array in arrays:
        entry = described(array.name, array.variable)
        entry["coords"] = [described(name, coord.variable)
                           for name, coord in array.coords.items()]
        header["arrays"].append(entry)
    text = json.dumps(header).encode()
    return b"".join([struct.pack("<Q", len(text)), text, *buffers])


def arrays_from_bytes(payload) -> tuple[list, object]:
    """(the DataArrays, the notes) of :func:`arrays_to_bytes`'s bytes."""
    import xarray as xr
    (length,) = struct.unpack_from("<Q", payload)
    header = json.loads(bytes(payload[8:8 + length]))
    at = 8 + length

    def variable(entry):
        nonlocal at
        dtype = np.dtype(entry["dtype"])
        size = dtype.itemsize * int(np.prod(entry["shape"], dtype=np.int64))
        values = np.frombuffer(payload, dtype, size // dtype.itemsize, at)
        at += size
        return xr.Variable(entry["dims"], values.reshape(entry["shape"]), entry["attrs"])

    arrays = []
    for entry in header["arrays"]:
        values = variable(entry)
        coords = {coord["name"]: variable(coord) for coord in entry["coords"]}
        arrays.append(xr.DataArray(values, coords=coords, name=entry["name"]))
    return arrays, header["notes"]


def recorded_warnings(said) -> list:
    """Warnings caught by ``warnings.catch_warnings(record=True)`` as JSON-able
    [category name, message] pairs, for :func:`warn_again`."""
    return [[w.category.__name__, str(w.message)] for w in said]


def warn_again(pairs, categories=(UserWarning, RuntimeWarning, DeprecationWarning,
                                  FutureWarning)):
    """Issue again, in this process, warnings a child recorded (:func:`recorded_warnings`);
    a category not among ``categories`` comes back as a UserWarning."""
    known = {category.__name__: category for category in categories}
    for name, message in pairs:
        warnings.warn(message, known.get(name, UserWarning), stacklevel=2)
