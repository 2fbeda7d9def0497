"""Moving-box mean and maximum over the grid axes of a stack of fields, with the values
of ``scipy.ndimage.uniform_filter`` and ``scipy.ndimage.maximum_filter``.

The closed-low search screens every field with both. Batch tagging filters thousands
of days and uses scipy's compiled filters. A report filters a few dozen maps: there,
importing ``scipy.ndimage`` (about 0.2 s, most of it its array-API layer importing
parts of numpy) costs far more than filtering with numpy. So small stacks are
filtered by numpy with scipy's own arithmetic, equal to the last bit (tests/
test_box_filters.py compares them), and scipy is used whenever the stack is large or
``scipy.ndimage`` is already imported. Which path ran never shows in a result.

No I/O; numpy only until scipy is worth its import.
"""

from __future__ import annotations

import sys

import numpy as np

#: Elements up to which a stack not yet worth scipy's import is filtered by numpy (the
#: numpy mean takes about 0.1 s at this size, scipy's import about 0.2 s; from
#: tests/benchmarks/bench_report.py's runs).
NUMPY_UP_TO = 2_000_000


def _use_scipy(values) -> bool:
    return "scipy.ndimage" in sys.modules or np.size(values) > NUMPY_UP_TO


def uniform_filter(values, size, mode):
    """``scipy.ndimage.uniform_filter(values, size, mode=mode)`` (cval 0, origin 0) of
    a float64 array: the mean over a box of ``size`` (one odd or even length per axis)
    centred on each point; ``mode`` per axis, ``"constant"`` (zeros beyond the edge)
    or ``"wrap"`` (periodic)."""
    return _separable(np.asarray(values, dtype=float), size, mode, "uniform_filter",
                      _running_mean)


def _running_mean(values, size, axis, mode):
    """One axis of the box mean, as scipy's line filter computes it: the sum of the
    first ``size`` extended values, then at each step the entering value less the
    leaving one added to the running sum, each output that sum divided by ``size``."""
    moved = np.moveaxis(values, axis, -1)
    before = size // 2
    extended = np.pad(moved, [(0, 0)] * (moved.ndim - 1) + [(before, size - before - 1)],
                      mode="constant" if mode == "constant" else "wrap")
    out = np.empty_like(moved)
    running = np.zeros(moved.shape[:-1])
    for step in range(size):
        running += extended[..., step]
    out[..., 0] = running / size
    for step in range(1, moved.shape[-1]):
        running += extended[..., step + size - 1] - extended[..., step - 1]
        np.divide(running, size, out=out[..., step])
    return np.moveaxis(out, -1, axis)


def maximum_filter(values, size, mode):
    """``scipy.ndimage.maximum_filter(values, size, mode=mode)`` of a float array
    holding no NaN (infinities allowed): the largest value within a box of ``size``
    centred on each point; ``mode`` per axis, ``"nearest"`` (the edge value repeated)
    or ``"wrap"``."""
    return _separable(np.asarray(values), size, mode, "maximum_filter", _running_maximum)


def _separable(values, size, mode, scipy_name, along_axis):
    """scipy.ndimage's filter ``scipy_name`` of a large stack, or once scipy.ndimage is
    imported; else ``along_axis`` along each axis whose box is longer than one point,
    one axis after the other, as scipy's separable filters go."""
    if _use_scipy(values):
        from scipy import ndimage
        return getattr(ndimage, scipy_name)(values, size=size, mode=mode)
    out = values
    for axis, (length, axis_mode) in enumerate(zip(size, mode)):
        if length > 1:
            out = along_axis(out, int(length), axis, axis_mode)
    return out if out is not values else values.copy()


def _running_maximum(values, size, axis, mode):
    """One axis of the box maximum (exact whatever the order of comparison)."""
    moved = np.moveaxis(values, axis, -1)
    before = size // 2
    extended = np.pad(moved, [(0, 0)] * (moved.ndim - 1) + [(before, size - before - 1)],
                      mode="edge" if mode == "nearest" else "wrap")
    n = moved.shape[-1]
    out = extended[..., :n].copy()
    for step in range(1, size):
        np.maximum(out, extended[..., step:step + n], out=out)
    return np.moveaxis(out, -1, axis)


__all__ = ["NUMPY_UP_TO", "maximum_filter", "uniform_filter"]
