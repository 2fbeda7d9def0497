"""The block-wise passes of the climatology and EOF stages give, bit for bit, what
numpy's whole-block operations give (analogs.stages.blockwise, the in-memory anomalies
of analogs.stages.daily_climatology, the moments, scaling and QRs of analogs.stages.eof).

The references are numpy's own reductions, matrix products and LAPACK QR applied to
whole blocks, as the stages computed them before they worked in cache-sized steps and
threads: speed must not change an answer (the store's basis and PCs stay identical).
"""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.stages import eof as eof_stage
from analogs.stages.blockwise import ColumnMoments, block_length, cache_steps, even_ranges
from analogs.stages.daily_climatology import HarmonicClimatology, harmonic_design_matrix


def _numpy_block_moments(x, origin, block_rows):
    """Per block of rows: NaN count, sum and einsum sum of squares of ``x - origin`` in
    float64, summed over blocks (numpy reductions of whole blocks)."""
    total = 0
    for start in range(0, x.shape[0], block_rows):
        shifted = x[start:start + block_rows].astype(np.float64) - origin
        total = total + np.stack([np.isnan(shifted).sum(axis=0), shifted.sum(axis=0),
                                  np.einsum("ij,ij->j", shifted, shifted)])
    return total


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")  # inf - inf
@pytest.mark.parametrize("width, block_rows", [(7, 50), (300, 37), (40000, 3)])
def test_column_moments_in_steps_equal_whole_block_reductions(width, block_rows):
    """ColumnMoments fed cache-sized steps (one row per step at 40000 columns, many at
    7) equals numpy's whole-block reductions bit for bit, NaN counts included and a
    column holding +inf and -inf (whose sum is NaN with no NaN in it)."""
    rng = np.random.default_rng(4)
    x = (rng.normal(5.0, 3.0, (211, width))).astype(np.float32)
    x[rng.random(x.shape) < 0.01] = np.nan
    x[10, 1], x[150, 1] = np.inf, -np.inf
    origin = x[0].astype(np.float64)
    moments = ColumnMoments(origin)
    for start, stop, starts_block, ends_block in cache_steps(x.shape[0], width, block_rows):
        moments.add(x[start:stop], starts_block, ends_block)
    expected = _numpy_block_moments(x, origin, block_rows)
    np.testing.assert_array_equal(moments.totals, expected)
    assert moments.totals[0, 1] == np.isnan(x[:, 1]).sum()


def test_eof_column_moments_split_over_threads_equal_whole_blocks():
    """The EOF fit's in-memory moments (columns split over threads, cache-sized steps)
    are numpy's whole-block reductions over blocks of block_length rows."""
    rng = np.random.default_rng(5)
    x = rng.normal(0.0, 2.0, (3001, 2557)).astype(np.float32)
    origin = x[0].astype(np.float64)
    np.testing.assert_array_equal(eof_stage._column_moments(x, origin),
                                  _numpy_block_moments(x, origin, block_length(x.shape[1])))


def test_even_ranges_cover_once():
    ranges = even_ranges(1001, max_width=100)
    assert ranges[0].start == 0 and ranges[-1].stop == 1001
    assert all(a.stop == b.start for a, b in zip(ranges, ranges[1:]))
    assert max(r.stop - r.start for r in ranges) <= 100


@pytest.mark.parametrize("dtype, freq", [("float32", "D"), ("float64", "6h")])
def test_in_memory_anomalies_equal_design_times_coefficients(dtype, freq):
    """The in-memory anomalies (climatology looked up per day of the year, cache-sized
    steps, threads) equal ``y - X a`` with ``X a`` numpy's product of the design
    matrix rows of each block of times with the coefficients, taken in float64 and
    rounded to the field's precision: bit for bit."""
    rng = np.random.default_rng(6)
    times = pd.date_range("2003-01-01", periods=3 * 365 + 40, freq=freq)[:1500]
    lat, lon = np.linspace(20.0, 50.0, 31), np.linspace(-120.0, -60.0, 61)
    values = (5600.0 + rng.normal(0.0, 40.0, (times.size, lat.size, lon.size))).astype(dtype)
    ds = xr.Dataset({"z500": (("time", "lat", "lon"), values)},
                    coords={"time": times, "lat": lat, "lon": lon})
    climatology = HarmonicClimatology(n_harmonics=3).fit(ds)
    anomalies = climatology.transform(ds)["z500"].values
    coef = climatology.coefficients_["z500_coef"].values.reshape(7, -1)
    flat = values.reshape(times.size, -1)
    step = block_length(flat.shape[1])
    expected = np.concatenate([
        (flat[s:s + step] - harmonic_design_matrix(times[s:s + step], 3) @ coef).astype(dtype)
        for s in range(0, times.size, step)])
    assert anomalies.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(anomalies.reshape(flat.shape), expected)


def _float32_fields(n_time=700, n_lat=30, n_lon=41, seed=7):
    rng = np.random.default_rng(seed)
    lat, lon = np.linspace(20.0, 50.0, n_lat), np.linspace(-120.0, -60.0, n_lon)
    data = {name: (("time", "lat", "lon"),
                   rng.normal(0.0, scale, (n_time, n_lat, n_lon)).astype(np.float32))
            for name, scale in (("z500", 40.0), ("q850", 1e-3))}
    return xr.Dataset(data, coords={"time": pd.date_range("2001-01-01", periods=n_time),
                                    "lat": lat, "lon": lon})


@pytest.mark.parametrize("overwrite", [False, True])
def test_scaled_blocks_and_row_energy_equal_whole_block_numpy(overwrite):
    """The EOF fit's data matrix, scaled in cache-sized steps over threads (in place or
    into new blocks), equals ``(x - mean) * factor`` in float32 by numpy on the whole
    field, and the squared norm of each row taken on the way equals numpy's einsum of
    the finished rows in float64 summed over fields: bit for bit."""
    ds = _float32_fields()
    model = eof_stage.MultivariateEOF(n_modes=5)
    model._preprocess(ds)
    expected_blocks, expected_energy = [], 0
    for field in model.fields_:
        raw = ds[field].values.reshape(ds.sizes["time"], -1)
        block = ((raw - model._means[field].astype(np.float32))
                 * model._point_factor[field].astype(np.float32))
        expected_blocks.append(block)
        wide = block.astype(np.float64)
        expected_energy = expected_energy + np.einsum("ij,ij->i", wide, wide)
    blocks, energy = model._column_blocks(ds.copy(deep=True), np.float32, overwrite=overwrite)
    for block, expected in zip(blocks, expected_blocks):
        np.testing.assert_array_equal(block, expected)
    np.testing.assert_array_equal(energy, expected_energy)


def test_thin_qr_on_one_thread_is_numpy_qr():
    """The randomized SVD's QR on one BLAS thread gives numpy.linalg.qr's Q (LAPACK on
    every thread) bit for bit, for the tall thin shapes of the solver."""
    rng = np.random.default_rng(8)
    for shape in [(14610, 40), (5112, 40), (1461, 30)]:
        columns = rng.standard_normal(shape).astype(np.float32)
        np.testing.assert_array_equal(eof_stage._orthonormal(columns),
                                      np.linalg.qr(columns)[0])


def test_strided_field_gives_the_anomalies_of_its_contiguous_copy():
    """A field that is a strided view (every other longitude of a larger array) gets
    the anomalies of its C-ordered copy, bit for bit."""
    rng = np.random.default_rng(9)
    times = pd.date_range("2003-01-01", periods=800)
    lat, lon = np.linspace(20.0, 50.0, 11), np.linspace(-120.0, -60.0, 40)
    wide = xr.Dataset({"z500": (("time", "lat", "lon"),
                                rng.normal(5600.0, 40.0, (800, 11, 40)).astype(np.float32))},
                      coords={"time": times, "lat": lat, "lon": lon})
    strided = wide.isel(lon=slice(0, None, 2))
    assert not strided["z500"].values.flags.c_contiguous
    contiguous = strided.copy(deep=True)
    climatology = HarmonicClimatology().fit(contiguous)
    np.testing.assert_array_equal(climatology.transform(strided)["z500"].values,
                                  climatology.transform(contiguous)["z500"].values)


def test_empty_without_hugepage_advice_restores_numpy_switch():
    """The array is numpy.empty's (shape, dtype, writeable, C order), and numpy's
    process-wide huge-page switch is as it was before the call, whichever it was."""
    from numpy._core.multiarray import _set_madvise_hugepage

    from analogs.stages.blockwise import empty_without_hugepage_advice

    before = _set_madvise_hugepage(True)
    try:
        for setting in (True, False):
            _set_madvise_hugepage(setting)
            array = empty_without_hugepage_advice((300, 5000), np.float32)
            assert array.shape == (300, 5000) and array.dtype == np.float32
            assert array.flags.c_contiguous and array.flags.writeable
            assert _set_madvise_hugepage(setting) is setting
    finally:
        _set_madvise_hugepage(before)
