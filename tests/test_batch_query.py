"""Queries at the floor and batch queries (issue 18).

- A store loads only what a date query reads: PCs and times (read with netCDF4 and
  checked here against xarray's reading of the same file), tags, events and the daily
  counts kept in the store; the climatology and EOFs are read when first used.
- ``find --dates FILE`` / ``AnalogStore.find_many`` answer many dates in one process,
  each answer equal to the single query's.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.cli import main
from analogs.errors import AnalogsInputError, StoreError
from analogs.presentation.report import dumps
from analogs.stages.outcomes import daily_event_counts
from analogs.workflows import store as store_io
from analogs.workflows.analog_store import AnalogStore


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _dates(store, count=6):
    rows = np.linspace(20, len(store.times) - 20, count).astype(int)
    return [str(store.days[row].date()) for row in rows]


# ---------------------------------------------------------------- what a load reads

def test_the_pcs_read_without_xarray_equal_xarrays_reading(demo_store):
    """netCDF4's decoding of scores.nc (values, CF time units) against xarray's."""
    store = AnalogStore.load(demo_store.path)
    with xr.open_dataset(store.path / store_io.SCORES) as scores:
        expected = scores["pcs"].load()
    np.testing.assert_array_equal(store.pc_values, expected.values)
    assert store.times.equals(pd.DatetimeIndex(expected["time"].values))
    assert store.times.dtype == np.dtype("datetime64[ns]")
    xr.testing.assert_identical(store.pcs.drop_attrs(), expected.drop_attrs())


@pytest.mark.parametrize("units", ["hours since 1850-01-01 00:00", "seconds since 2000-03-01",
                                   "days since 1900-01-01 12:00:00"])
def test_the_times_of_scores_nc_in_other_units_equal_xarrays_decoding(tmp_path, units):
    """Other CF time units and times off the hour (06:30 UTC): the times read for a query
    (netCDF4's decoding, converted by pandas) equal xarray's CF decoding of the file."""
    times = pd.date_range("1999-12-30 06:30", periods=40, freq="D")
    pcs = xr.DataArray(np.arange(80.0).reshape(40, 2), dims=("time", "mode"),
                       coords={"time": times, "mode": [1, 2]}, name="pcs")
    pcs.to_dataset().to_netcdf(tmp_path / "scores.nc",
                               encoding={"time": {"units": units, "dtype": "float64"}})
    read = store_io.read_scores(tmp_path / "scores.nc")["times"]
    with xr.open_dataset(tmp_path / "scores.nc") as decoded:
        assert read.equals(pd.DatetimeIndex(decoded["time"].values))
    assert read.equals(times) and read.dtype == np.dtype("datetime64[ns]")


@pytest.mark.parametrize("units, calendar", [
    ("days since 1900-01-01", "standard"), ("hours since 1800-1-1 06:00:00", "gregorian"),
    ("minutes since 2000-02-29 12:30", "proleptic_gregorian"),
    ("seconds since 1970-01-01T00:00", "standard"),
    ("days since 1700-01-01", "standard"), ("days since 1680-01-01", "proleptic_gregorian")])
def test_the_times_computed_in_whole_seconds_are_num2dates(units, calendar):
    """The query's fast decoding of the stored times (store._gregorian_times, whole
    seconds added to the reference date) against netCDF4's num2date (cftime), the
    reference (CF conventions 4.4.1); values that are no whole number of seconds,
    dates of the Julian calendar, other calendars, time zones and missing values are
    left to num2date (None)."""
    import netCDF4
    step = 1.0 if units.startswith("seconds") else 0.5       # whole seconds
    values = np.concatenate([np.arange(0.0, 3000.0, step),
                             np.random.default_rng(3).integers(0, 60_000, 500).astype(float)])
    fast = store_io._gregorian_times(values, units, calendar)
    expected = netCDF4.num2date(values, units, calendar, only_use_cftime_datetimes=False,
                                only_use_python_datetimes=True)
    assert fast is not None and fast.dtype == np.dtype("datetime64[ns]")
    assert fast.equals(pd.DatetimeIndex(expected).as_unit("ns"))
    assert store_io._gregorian_times(np.array([0.1, 0.25]), "seconds since 2000-01-01",
                                     calendar) is None           # fractions of a second
    assert store_io._gregorian_times(np.ma.masked_array([0.0, 1.0], [False, True]), units,
                                     calendar) is None           # a missing time
    assert store_io._gregorian_times(values, units, "noleap") is None
    assert store_io._gregorian_times(values, f"{units} UTC", calendar) is None
    # NCEP-style: the reference date in the Julian calendar (mixed calendar).
    assert store_io._gregorian_times(values, "hours since 1-1-1 00:00:0.0", "standard") is None


def test_a_date_query_reads_neither_climatology_nor_eofs(demo_store):
    store = AnalogStore.load(demo_store.path)
    store.find(date=_dates(store)[2])
    assert "_eof" not in store.__dict__ and "_climatology" not in store.__dict__
    assert store.eof.n_modes_ == store.pc_values.shape[1]  # read when asked for


def test_the_stored_daily_counts_are_the_counts_of_the_events(demo_store):
    """counts.parquet against the on-demand count of the store's events table, and its
    totals against a plain pandas count of the events inside the region box."""
    store = AnalogStore.load(demo_store.path)
    assert store.stored_counts is not None
    computed = daily_event_counts(store.events, store.days, store.region)
    pd.testing.assert_frame_equal(store.stored_counts, computed, check_freq=False)
    region = store.region
    inside = store.events[store.events["lat"].between(region.south, region.north)
                          & store.events["lon"].between(region.west, region.east)]
    per_day = pd.to_datetime(inside["day"]).value_counts()
    expected = per_day.reindex(store.days, fill_value=0).to_numpy()
    np.testing.assert_array_equal(store.stored_counts["total"].to_numpy(), expected)


def test_a_store_replaced_after_loading_is_not_mixed_in(demo_store, tmp_path):
    copy = tmp_path / "store"
    shutil.copytree(demo_store.path, copy)
    store = AnalogStore.load(copy)
    basis = copy / store_io.BASIS
    basis.write_bytes(basis.read_bytes() + b"\0")  # another version's basis
    with pytest.raises(StoreError, match="replaced by a new version"):
        store.eof


def test_a_date_query_imports_no_build_dask_or_figures(demo_store):
    """Nor scipy (the intervals' Beta quantiles are analogs' own), xarray, the writers'
    lock or the maps' coastline reader."""
    code = ("import sys; from analogs.cli import main; "
            f"main(['find', '--store', {str(demo_store.path)!r}, '--date', "
            f"{_dates(demo_store)[1]!r}, '--json']); "
            "print('MODULES', [m for m in ('dask', 'matplotlib', 'sklearn', 'scipy', "
            "'xarray', 'filelock', 'shapefile', 'cartopy', 'analogs.workflows.geography', "
            "'analogs.workflows.build', 'analogs.stages.sources', 'analogs.stages.eof', "
            "'analogs.stages.daily_climatology') if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip().splitlines()[-1] == "MODULES []"


# ------------------------------------------------------------------- batch queries

@pytest.mark.parametrize("settings", [dict(top=7, window=30),
                                      dict(sequence=1, separation=0, top=12),
                                      dict(window=183, exclude=0, weights="inverse_distance"),
                                      dict(metric="event_weighted", top=15)])
def test_find_many_equals_single_queries(demo_store, settings):
    """find_many ranks its dates in batched searches (find_analogs_many); each answer,
    JSON text and all, is the single query's (dates on neighbouring calendar days of
    several years, so that groups form)."""
    store = AnalogStore.load(demo_store.path)
    dates = _dates(store) + [str(day.date()) for day in store.days[[40, 41, 45, 406, 772]]]
    # The skill of these settings is measured by the first query and kept in the store
    # (its "source" says so); measure it once first so every answer reads the kept one.
    store.find(date=dates[0], **settings)
    store = AnalogStore.load(demo_store.path)
    many = store.find_many(dates, **settings)
    fresh = AnalogStore.load(demo_store.path)  # single queries from their own load
    assert [dumps(result) for result in many] == [
        dumps(fresh.find(date=date, **settings)) for date in dates]


def test_find_dates_on_the_command_line_equals_find_date(demo_store, tmp_path, capsys):
    dates = _dates(demo_store, 4)
    path = tmp_path / "dates.txt"
    path.write_text("# target days\n" + "\n\n".join(dates) + "\n")
    code, out, _ = _run(["find", "--store", demo_store.path, "--dates", path, "--json"],
                        capsys)
    assert code == 0
    batch = json.loads(out)
    singles = []
    for date in dates:
        code, single, _ = _run(["find", "--store", demo_store.path, "--date", date, "--json"],
                               capsys)
        assert code == 0
        singles.append(json.loads(single))
    assert batch == singles
    code, out, _ = _run(["find", "--store", demo_store.path, "--dates", path,
                         "--json-lines"], capsys)
    assert code == 0
    assert [json.loads(line) for line in out.splitlines()] == singles


@pytest.mark.parametrize("content, line", [("2003-07-01\nnot a date\n", "line 2"),
                                           ("2003-07-01\n1850-06-01\n", "line 2"),
                                           ("# only a comment\n\n", "lists no date")])
def test_a_bad_dates_file_names_the_file_and_line(demo_store, tmp_path, capsys, content,
                                                  line):
    path = tmp_path / "dates.txt"
    path.write_text(content)
    code, out, err = _run(["find", "--store", demo_store.path, "--dates", path, "--json"],
                          capsys)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1
    assert str(path) in err and line in err


def test_dates_that_cannot_be_answered_together_are_refused(demo_store, tmp_path, capsys):
    path = tmp_path / "dates.txt"
    path.write_text("2003-07-01\n")
    code, _, err = _run(["find", "--store", demo_store.path, "--dates", path, "--report",
                         tmp_path / "page"], capsys)
    assert code == 2 and "--report" in err
    code, _, err = _run(["find", "--store", demo_store.path, "--dates", tmp_path / "none.txt"],
                        capsys)
    assert code == 2 and "none.txt" in err
    with pytest.raises(AnalogsInputError, match=r"dates\[1\]"):
        demo_store.find_many(["2003-07-01", "July"])
