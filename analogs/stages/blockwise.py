"""Passes over in-memory ``(time, space)`` arrays a block of rows at a time.

The climatology and EOF stages read the archive-sized arrays in blocks of
:func:`block_length` rows (their float64 temporaries stay small beside the field) and
work them in cache-sized steps of rows (:func:`cache_steps`), the columns or the rows
split over the machine's cores (:func:`even_ranges`, :func:`in_threads`; numpy
releases the GIL in its loops). :class:`ColumnMoments` accumulates the EOF fit's
per-column moments in those steps with the rounding of whole-block numpy reductions,
so the results do not depend on the step or the split. Also: a new array without
numpy's huge-page advice, and numpy's BLAS on one thread, for the calls whose bits do
not depend on the thread count.
"""

from __future__ import annotations

import contextlib
import functools
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

__all__ = ["BLOCK_VALUES", "ColumnMoments", "block_length", "cache_rows", "cache_steps",
           "empty_without_hugepage_advice", "even_ranges", "in_threads",
           "numpy_blas_on_one_thread"]

#: Values per block of rows (about 32 MB in float64): large enough for BLAS speed,
#: small enough that the float64 temporaries stay small beside the field.
BLOCK_VALUES = 2 ** 22
#: float64 values per cache-sized step (256 kB, a quarter of this machine's per-core L2).
CACHE_VALUES = 2 ** 15


def block_length(values_per_time: int) -> int:
    """Rows per block of :data:`BLOCK_VALUES` values."""
    return max(1, BLOCK_VALUES // max(int(values_per_time), 1))


def cache_rows(width: int) -> int:
    """Rows of ``width`` columns per cache-sized step."""
    return max(1, CACHE_VALUES // max(int(width), 1))


def cache_steps(n_rows: int, width: int, block_rows: int | None = None):
    """``(start, stop, starts_block, ends_block)`` of the steps of :func:`cache_rows`
    rows over ``n_rows`` rows, in order, never across the edge of a block of
    ``block_rows`` rows (one block by default)."""
    step = cache_rows(width)
    block_rows = block_rows or max(n_rows, 1)
    for block_start in range(0, n_rows, block_rows):
        block_stop = min(block_start + block_rows, n_rows)
        for start in range(block_start, block_stop, step):
            stop = min(start + step, block_stop)
            yield start, stop, start == block_start, stop == block_stop


def even_ranges(length: int, max_width: int | None = None) -> list[slice]:
    """``range(length)`` split into one even range per core, or more so that none is
    wider than ``max_width``."""
    parts = max(os.cpu_count() or 1, -(-length // max_width) if max_width else 1)
    edges = np.linspace(0, length, min(parts, max(length, 1)) + 1).astype(int)
    return [slice(lo, hi) for lo, hi in zip(edges[:-1], edges[1:])]


def in_threads(function, items) -> list:
    """``[function(item) for item in items]``, the items spread over one thread per core."""
    items = list(items)
    workers = min(len(items), os.cpu_count() or 1)
    if workers <= 1:
        return [function(item) for item in items]
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(function, items))


def empty_without_hugepage_advice(shape, dtype) -> np.ndarray:
    """``numpy.empty(shape, dtype)`` without numpy's ``madvise(MADV_HUGEPAGE)`` on the
    new pages (numpy's process-wide switch, set back at once). Where transparent huge
    pages are given only on that advice and compaction fails (here: AnonHugePages stays
    0 kB), the advice makes each first touch try it: the first write of two fresh
    150 MB arrays took 0.34 s with it, 0.09 s without, and later passes ran at the same
    speed."""
    try:
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:  # a numpy without the switch: its own default
        return np.empty(shape, dtype)
    advised = _set_madvise_hugepage(False)
    try:
        return np.empty(shape, dtype)
    finally:
        _set_madvise_hugepage(advised)


@functools.cache
def _blas_libraries():
    """threadpoolctl's handle on the BLAS libraries loaded so far (numpy's among them),
    made once: about 10 ms."""
    from threadpoolctl import ThreadpoolController
    return ThreadpoolController()


@contextlib.contextmanager
def numpy_blas_on_one_thread():
    """Run the enclosed block with numpy's BLAS on one thread. For the thin QR
    factorisations of the randomized SVD (a (days, 40) matrix): measured here, the
    same bits on one or two threads, and on the loaded 2-core machine 0.06 s on one
    thread against 0.98 s on two, whose threads wait on each other at every step."""
    with _blas_libraries().limit(limits=1, user_api="blas"):
        yield


class ColumnMoments:
    """Per column of the rows of a ``(time, space)`` array, fed in order a step at a
    time (:func:`cache_steps`): the NaN count, the sum and the sum of squares of the
    rows minus ``origin``, in float64.

    Bit for bit the sum over blocks of ``block_rows`` rows of each block's
    ``isnan(x).sum(0)``, ``x.sum(0)`` and ``einsum("ij,ij->j", x, x)``: numpy runs
    those axis-0 reductions row after row (the sum from the block's first row, the
    squares from zero), and so does :meth:`add`, by putting the running sums in the
    row before each step's rows and reducing again.
    """

    def __init__(self, origin: np.ndarray):
        self.origin = np.asarray(origin, dtype=np.float64)
        width = self.origin.size
        max_rows = cache_rows(width)
        self._shifted = np.empty((max_rows + 1, width))
        self._squares = np.empty((max_rows + 1, width))
        self._nan_count = np.zeros(width, dtype=np.int64)
        self._sum = np.zeros(width)
        self._sum_of_squares = np.zeros(width)
        #: (3, width): NaN count, sum, sum of squares (0 before the first block ends).
        self.totals = 0

    def add(self, rows: np.ndarray, starts_block: bool, ends_block: bool) -> None:
        """Take in the next ``rows`` (at most :func:`cache_rows`) of the array."""
        n_rows = rows.shape[0]
        shifted = self._shifted[1:n_rows + 1]
        np.copyto(shifted, rows)  # then float64 - float64: a mixed-type ufunc is 2x slower
        shifted -= self.origin
        squares = self._squares[1:n_rows + 1]
        np.multiply(shifted, shifted, out=squares)
        if starts_block:
            self._nan_count[:] = 0
            np.add.reduce(shifted, axis=0, out=self._sum)
            self._squares[0] = 0.0
        else:
            self._shifted[0] = self._sum
            np.add.reduce(self._shifted[:n_rows + 1], axis=0, out=self._sum)
            self._squares[0] = self._sum_of_squares
        np.add.reduce(self._squares[:n_rows + 1], axis=0, out=self._sum_of_squares)
        # A NaN makes its column's running sum NaN: the rows are searched for NaN only
        # then (a third of the time of a step otherwise).
        if np.isnan(self._sum).any():
            self._nan_count += np.isnan(shifted).sum(axis=0)
        if ends_block:
            self.totals = self.totals + np.stack(
                [self._nan_count, self._sum, self._sum_of_squares])
