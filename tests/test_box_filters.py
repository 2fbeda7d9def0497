"""The numpy box filters against scipy.ndimage, their reference, to the last bit.

Reference: ``scipy.ndimage.uniform_filter`` and ``scipy.ndimage.maximum_filter``
(scipy's documentation: separable 1-D filters along each axis; modes "constant",
"wrap", "nearest"). The numpy path is forced by making the dispatch answer "numpy".
"""

import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

import reanalysis_demo
from analogs.stages import box_filters
from analogs.stages import diagnostics as dg


@pytest.fixture
def numpy_path(monkeypatch):
    monkeypatch.setattr(box_filters, "_use_scipy", lambda values: False)


shapes = st.tuples(st.integers(1, 6), st.integers(1, 30), st.integers(1, 40))
sizes = st.tuples(st.just(1), st.integers(1, 25), st.integers(1, 25))


@settings(max_examples=150, deadline=None)
@given(shape=shapes, size=sizes, lon_mode=st.sampled_from(["constant", "wrap"]),
       seed=st.integers(0, 2 ** 16), sparse=st.booleans())
def test_uniform_filter_is_scipys_to_the_last_bit(shape, size, lon_mode, seed, sparse):
    """Box means of heights (large, close values: rounding shows) and of 0/1 counts,
    boxes wider than the array, even sizes, both edge modes."""
    rng = np.random.default_rng(seed)
    values = (rng.random(shape) < 0.7).astype(float) if sparse else (
        5600.0 + 80.0 * rng.standard_normal(shape))
    modes = ("constant", "constant", lon_mode)
    expected = ndimage.uniform_filter(values, size=size, mode=modes)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(box_filters, "_use_scipy", lambda values: False)
        found = box_filters.uniform_filter(values, size, modes)
    assert found.dtype == expected.dtype
    assert np.array_equal(found, expected)


@settings(max_examples=150, deadline=None)
@given(shape=shapes, size=sizes, lon_mode=st.sampled_from(["nearest", "wrap"]),
       seed=st.integers(0, 2 ** 16))
def test_maximum_filter_is_scipys(shape, size, lon_mode, seed):
    """Box maxima with -inf where the screen has no value, both edge modes."""
    rng = np.random.default_rng(seed)
    values = rng.standard_normal(shape)
    values[rng.random(shape) < 0.2] = -np.inf
    modes = ("nearest", "nearest", lon_mode)
    expected = ndimage.maximum_filter(values, size=size, mode=modes)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(box_filters, "_use_scipy", lambda values: False)
        found = box_filters.maximum_filter(values, size, modes)
    assert np.array_equal(found, expected)


def test_filters_leave_their_input_alone(numpy_path):
    values = np.arange(12.0).reshape(1, 3, 4)
    kept = values.copy()
    for out in (box_filters.uniform_filter(values, (1, 3, 3), ("constant",) * 3),
                box_filters.maximum_filter(values, (1, 1, 1), ("nearest",) * 3)):
        assert out is not values
    assert np.array_equal(values, kept)


def test_closed_lows_of_demo_days_are_the_same_on_either_path():
    """The closed-low search of a warm season of demo days (lows and sharp troughs on a
    limited grid) finds the same centres, depths and radii, bit for bit, whichever path
    filters (scipy's is the reference); so does a copy of them on a grid round the
    globe (the longitudes wrap)."""
    z = reanalysis_demo.generate(years=1, seed=5).fields["zg"].isel(time=slice(120, 270))
    ring = z.isel(lon=np.arange(360) % z.sizes["lon"]).assign_coords(
        lon=np.arange(360.0) - 180.0)
    for field in (z, ring):
        on_scipy = dg.find_closed_lows(field)
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(box_filters, "_use_scipy", lambda values: False)
            on_numpy = dg.find_closed_lows(field)
        assert len(on_scipy) > 5
        assert on_numpy.equals(on_scipy)


def test_a_few_maps_are_filtered_without_importing_scipy_ndimage():
    """The report's marks (a few dozen maps) never import scipy.ndimage (its import
    costs more than their filtering); a stack beyond NUMPY_UP_TO does."""
    code = ("import sys, numpy as np; from analogs.stages import box_filters as b; "
            "b.uniform_filter(np.ones((50, 30, 70)), (1, 5, 5), ('constant',) * 3); "
            "print('scipy.ndimage' in sys.modules); "
            "b.maximum_filter(np.ones(b.NUMPY_UP_TO + 1), (3,), ('nearest',)); "
            "print('scipy.ndimage' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "True"]
