"""The out-of-core build's scratch copies: written without staying resident, read back
chunk by chunk with plain file reads.

A workflow hands a stage a maker of writeable arrays, ``scratch(shape, dtype)`` (in the
build: a :class:`numpy.memmap` in its temporary folder). Pages written through a mapping
stay in the process's resident memory until they are unmapped, and so do pages read
through it: a pass over a 2 GB copy would leave 2 GB resident. So rows are dropped from
the mapping once written (:func:`release_rows`; the values stay in the file and the page
cache), and the copy is read back as a dask array whose chunks are read from the
file into fresh arrays (:func:`chunked_copy`): a pass holds the chunks it works on, nothing
more. Arrays that are not memory-mapped files (tests hand plain numpy arrays) are used
as they are.
"""

from __future__ import annotations

import mmap

import numpy as np


def _mapped_file(array):
    """The mmap behind ``array`` when it is a whole memory-mapped file array
    (:class:`numpy.memmap` as made, not a view), else None."""
    mapped = getattr(array, "_mmap", None)
    if (isinstance(mapped, mmap.mmap) and array.base is mapped and array.flags.c_contiguous
            and getattr(array, "filename", None)):
        return mapped
    return None


def release_rows(array, start: int, stop: int) -> None:
    """Drop the pages holding rows ``start:stop`` (first axis) of a memory-mapped
    ``array`` from this process's resident memory; other arrays are left alone.

    The mapping is shared, so written values are already in the page cache (the file):
    dropping the pages loses nothing, a later access maps them back."""
    mapped = _mapped_file(array)
    if mapped is None or not hasattr(mapped, "madvise") or stop <= start:
        return
    row = array.strides[0]
    first = array.offset % mmap.ALLOCATIONGRANULARITY + start * row  # position in the map
    low = first - first % mmap.PAGESIZE
    high = min(len(mapped), first + (stop - start) * row)
    mapped.madvise(mmap.MADV_DONTNEED, low, high - low)


class _Rows:
    """A C-ordered array in a file, read a block of rows at a time into a fresh array
    (for :func:`dask.array.from_array`, which asks for one chunk's slices)."""

    def __init__(self, path, offset, shape, dtype):
        self.path, self.offset = path, offset
        self.shape, self.dtype, self.ndim = tuple(shape), np.dtype(dtype), len(shape)
        self.row_bytes = int(np.prod(self.shape[1:], dtype=np.int64)) * self.dtype.itemsize

    def __getitem__(self, key):
        key = key if isinstance(key, tuple) else (key,)
        start, stop, step = key[0].indices(self.shape[0])
        count = max(0, stop - start)
        values = np.fromfile(self.path, dtype=self.dtype,
                             count=count * self.row_bytes // self.dtype.itemsize,
                             offset=self.offset + start * self.row_bytes)
        values = values.reshape((count,) + self.shape[1:])
        return values[(slice(None, None, step),) + key[1:]]


def chunked_copy(array, chunks, name: str):
    """``array`` (from ``scratch``, filled) as a dask array of ``chunks``: a memory-mapped
    file is read chunk by chunk from the file (:class:`_Rows`), anything else is
    wrapped as it is. ``name`` (unique to this copy) labels its dask tasks."""
    import dask.array as da
    source = array
    if _mapped_file(array) is not None:
        source = _Rows(array.filename, array.offset, array.shape, array.dtype)
    return da.from_array(source, chunks=chunks, name=name, fancy=False)
