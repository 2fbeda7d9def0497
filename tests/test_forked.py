"""Work forked beside the caller (analogs._forked) and the report's archive days
read by two processes (workflows.find._archive_days): the answer, the warnings and the
errors are those of one process reading every file (the design of the reader; no
outside source), the arrays cross bit for bit (xarray's own ``assert_identical``), and
no child process outlives its work."""

from __future__ import annotations

import os
import time
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs import _forked as forked
from analogs.workflows import find

pytestmark = pytest.mark.skipif(not forked.can_fork(), reason="work is forked on Linux only")


def _no_child_left():
    with pytest.raises(ChildProcessError):
        os.waitpid(-1, os.WNOHANG)


def test_arrays_cross_as_bytes_bit_for_bit():
    """Float, integer and boolean values with datetime, float and integer coordinates and
    text and number attributes come back identical; anything else is refused."""
    times = pd.date_range("2001-06-01T12:00", periods=3, freq="D")
    arrays = [
        xr.DataArray(np.random.default_rng(0).normal(size=(3, 2, 4)).astype("float32"),
                     dims=("time", "lat", "lon"),
                     coords={"time": ("time", times.values, {"standard_name": "time"}),
                             "lat": ("lat", [10.0, 11.5], {"units": "degrees_north"}),
                             "lon": ("lon", np.arange(4) * 2.5, {})},
                     name="z500", attrs={"units": "gpm", "scale": 0.5, "count": 3,
                                         "flag": True}),
        xr.DataArray(np.array([[1, -2], [3, 4]], dtype="int16"), dims=("a", "b"),
                     coords={"b": [7, 9]}, name="counts"),
        xr.DataArray(np.array([True, False]), dims="x", name="mask")]
    arrays[0][1, 0, 0] = np.nan
    back, notes = forked.arrays_from_bytes(forked.arrays_to_bytes(arrays, {"said": ["x"]}))
    assert notes == {"said": ["x"]}
    for a, b in zip(arrays, back, strict=True):
        xr.testing.assert_identical(a, b)
        assert a.dtype == b.dtype
        assert np.array_equal(a.values.view("u1"), b.values.view("u1"))
    with pytest.raises(TypeError, match="plain bytes"):
        forked.arrays_to_bytes([arrays[0].assign_attrs(scale=np.float32(0.5))])
    with pytest.raises(TypeError, match="plain bytes"):
        forked.arrays_to_bytes([xr.DataArray(np.array(["a", "b"], dtype=object), name="t")])


def _fails():
    raise ValueError("the child's error")


def _sleeps():
    time.sleep(60)
    return b"late"


def test_a_child_answers_or_leaves_the_work_to_the_caller():
    """An answer comes back as the child's bytes; a child that fails or answers too late
    gives None (the caller then does the work) and is reaped, killed if need be."""
    with forked.beside(lambda: b"x" * 3_000_000) as child:  # beyond a pipe's buffer
        assert child.answer(timeout=30) == b"x" * 3_000_000
    with forked.beside(_fails) as child:
        assert child.answer(timeout=30) is None
    started = time.monotonic()
    with forked.beside(_sleeps) as child:
        assert child.answer(timeout=0.5) is None
    assert time.monotonic() - started < 10
    with pytest.raises(KeyError), forked.beside(_sleeps):
        raise KeyError("the caller's own error")
    _no_child_left()


def _write_year(folder, year, *, infinite=False):
    times = pd.date_range(f"{year}-06-01T12:00", periods=10, freq="D")
    lat, lon = np.arange(30.0, 41.0), np.arange(-100.0, -84.0)
    rng = np.random.default_rng(year)
    z = 5600 + 40 * rng.normal(size=(times.size, lat.size, lon.size))
    q = 0.008 + 0.001 * rng.random((times.size, lat.size, lon.size))
    if infinite:
        z[4, 2, 2] = np.inf  # 06-05, a day read
    paths = []
    for name, values, units in (("zg", z, "m"), ("hus", q, "kg kg-1")):
        path = folder / f"{name}_{year}.nc"
        xr.Dataset({name: (("time", "lat", "lon"), values.astype("float32"),
                           {"units": units})},
                   coords={"time": times, "lat": ("lat", lat, {"units": "degrees_north"}),
                           "lon": ("lon", lon, {"units": "degrees_east"}),
                           "plev": ((), 50000.0 if name == "zg" else 85000.0,
                                    {"units": "Pa"})}).to_netcdf(path)
        paths.append(path)
    return paths


@pytest.mark.parametrize("infinite_in", [None, 2003])
def test_archive_days_read_by_two_processes_are_one_process_reading(
        tmp_path, monkeypatch, infinite_in):
    """Four years of per-field files (eight files: the child reads the last four): the
    days' parts, in file order, and the warnings (an infinite value in a file the child
    reads, made missing with open_target's warning) are those of one process."""
    paths = [p for year in (2001, 2002, 2003, 2004)
             for p in _write_year(tmp_path, year, infinite=year == infinite_in)]
    inputs = [{"path": str(p)} for p in sorted(paths)]
    wanted = pd.DatetimeIndex([t for year in (2004, 2001, 2003, 2002) for t in
                               pd.date_range(f"{year}-06-02T12:00", periods=3, freq="3D")])
    forks = []
    beside = forked.beside

    def counted(*args):
        forks.append(args[1])
        return beside(*args)

    def read():
        with warnings.catch_warnings(record=True) as said:
            warnings.simplefilter("always")
            found = find._archive_days(inputs, wanted, ["z500", "q850"])
        return found, [str(w.message) for w in said]

    monkeypatch.setattr(forked, "beside", counted)
    two, said_two = read()
    assert forks == [inputs[4:]]
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    one, said_one = read()
    assert len(forks) == 1
    assert said_two == said_one
    assert len(said_one) == (1 if infinite_in else 0)
    assert list(two) == list(one)
    for name in one:
        assert len(two[name]) == len(one[name]) == 4
        for a, b in zip(two[name], one[name], strict=True):
            xr.testing.assert_identical(a, b)
    _no_child_left()


def test_a_failing_child_leaves_its_files_to_the_caller(tmp_path, monkeypatch):
    """When the child's reading fails (here: its answer cannot be made), its files are
    read by the caller: the same parts as one process gives."""
    paths = [p for year in (2001, 2002) for p in _write_year(tmp_path, year)]
    inputs = [{"path": str(p)} for p in sorted(paths)]
    wanted = pd.DatetimeIndex(["2001-06-03T12:00", "2002-06-05T12:00"])
    monkeypatch.setattr(find, "_days_in_files_as_bytes", lambda *args: _fails())
    found = find._archive_days(inputs, wanted, ["z500", "q850"])
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    expected = find._archive_days(inputs, wanted, ["z500", "q850"])
    for name in expected:
        for a, b in zip(found[name], expected[name], strict=True):
            xr.testing.assert_identical(a, b)
    _no_child_left()


def test_report_page_is_the_same_drawn_by_one_process(demo_store, monkeypatch):
    """The find report of a demo day (the archive's days read by two processes, the
    analog grid drawn in a child) is the page one process draws, byte for byte; when
    the child drawing the grid fails, the caller draws it: the same page again."""
    from analogs.workflows.page import report_page
    result = demo_store.find(date=str(demo_store.days[420].date()))
    forks = []
    beside = forked.beside

    def counted(work, *args):
        forks.append(work.__name__)
        return beside(work, *args)

    monkeypatch.setattr(forked, "beside", counted)
    two = report_page(demo_store, result)
    assert sorted(forks) == ["_days_in_files_as_bytes", "_grid_cells_as_bytes"]
    monkeypatch.setattr(find, "_grid_cells_as_bytes", lambda *args: _fails())
    assert report_page(demo_store, result) == two
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    one = report_page(demo_store, result)
    assert one == two
    assert 'id="analog-map-1"' in one and "archive&#x27;s fields" in one
    _no_child_left()


def test_archive_read_in_memory_by_two_processes_is_one_process_reading(
        demo_files, monkeypatch):
    """open_archive in memory of the demo archive (a file a year and field): the later
    half of each field's files read by a forked child straight into the joined array
    (memory shared with it) gives the archive one process reads, bit for bit; a child
    that fails leaves its files to the caller, with the same archive."""
    from analogs.stages import sources

    forks = []
    beside = forked.beside

    def counted(work, *args):
        forks.append((work.__name__, len(args[0])))
        return beside(work, *args)

    monkeypatch.setattr(forked, "beside", counted)
    two = sources.open_archive(demo_files, progress=False)
    n_files = len(demo_files) // 2
    assert n_files >= sources.MIN_PIECES_FORKED
    assert forks == [("_looks_in_child", len(demo_files) - len(demo_files) // 2)] + [
        ("_read_into_in_child", n_files - n_files // 2)] * 2
    monkeypatch.setattr(sources, "_read_into_in_child", lambda pieces: _fails())
    failed = sources.open_archive(demo_files, progress=False)
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    one = sources.open_archive(demo_files, progress=False)
    for other in (two, failed):
        xr.testing.assert_identical(other, one)
        for name in one.data_vars:
            assert np.array_equal(other[name].values.view("u4"), one[name].values.view("u4"))
    _no_child_left()


def _opened_with_warnings(paths):
    """open_archive's archive, its same-header map and the warnings it issued."""
    from analogs.stages import sources

    same_header = {}
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        archive = sources.open_archive([str(p) for p in paths], progress=False,
                                       same_header=same_header)
    return archive, same_header, sorted(str(w.message) for w in said)


def _assert_one_process(other, one):
    xr.testing.assert_identical(other[0], one[0])
    for name in one[0].data_vars:
        assert np.array_equal(other[0][name].values.view("u4"), one[0][name].values.view("u4"))
    assert other[1:] == one[1:]


@pytest.mark.parametrize("order", ["by_field", "by_year"])
def test_files_recognised_in_two_processes_are_one_process_recognising(
        tmp_path, monkeypatch, order):
    """open_archive with the later half of the files recognised in a forked child: the
    archive, the files found with an earlier one's header and the warnings are those of
    one process looking at every file in order. This process recognises its half and
    only the child's files that it leaves (read in full: the first of a field in its
    half; the one that warns: a file without a supported variable). Ordered by year,
    the child's first file of a field is laid out by this process as the first half's
    file of that field, and the child's later files, laid out by the child as that
    file, take its layout. A child that fails leaves every file to this process."""
    from analogs.stages import sources

    years = [_write_year(tmp_path, year) for year in range(2001, 2007)]
    paths = (sorted(p for pair in years for p in pair) if order == "by_field"
             else [p for pair in years for p in pair])
    stray = tmp_path / "notes_2003.nc"
    xr.Dataset({"notes": ("n", np.arange(3.0))}).to_netcdf(stray)
    paths = paths[:6] + [stray] + paths[6:]
    half = len(paths) // 2
    assert len(paths) >= sources.MIN_FILES_LOOKED_IN_CHILD and paths[half] == stray
    looked_here = []
    recognised_in = sources._recognised_in

    def counted(path, *args):
        looked_here.append(os.path.basename(path))
        return recognised_in(path, *args)

    monkeypatch.setattr(sources, "_recognised_in", counted)
    two = _opened_with_warnings(paths)
    first_of_field = {"by_field": ["zg_2001.nc"], "by_year": ["zg_2004.nc", "hus_2004.nc"]}
    assert looked_here == [p.name for p in paths[:half]] + ["notes_2003.nc"] + first_of_field[
        order]
    monkeypatch.setattr(sources, "_looks_in_child", lambda *args: _fails())
    failed = _opened_with_warnings(paths)
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    looked_here.clear()
    one = _opened_with_warnings(paths)
    assert len(looked_here) == len(paths)
    assert any("notes_2003.nc: no supported variable" in text for text in one[2])
    assert len(one[1]) == len(paths) - 3
    for other in (two, failed):
        _assert_one_process(other, one)
    _no_child_left()


def test_a_child_leaves_files_not_laid_out_alike_to_the_caller(tmp_path, monkeypatch):
    """Files whose headers all differ (a variable attribute of its own in each): the
    child's looks stop after MAX_LEFT_BY_CHILD + 1 files read in full and send nothing
    back, so the caller recognises every file itself, without waiting for a whole pass;
    the archive and the warnings are one process's."""
    from analogs.stages import sources

    paths = []
    for year in range(2001, 2011):
        written = _write_year(tmp_path, year)
        for path in written:
            with xr.open_dataset(path) as ds:
                ds = ds.load()
            name = next(iter(ds.data_vars))
            ds[name].attrs["comment"] = f"processed for {year}"
            ds.to_netcdf(path)
        paths.extend(written)
    paths = sorted(paths)
    recognised = []
    recognised_in = sources._recognised_in

    def counted(path, *args):
        recognised.append(path)
        return recognised_in(path, *args)

    monkeypatch.setattr(sources, "_recognised_in", counted)
    assert sources._looks_from(sources._looks_in_child([str(p) for p in paths], None), 0) == {}
    assert len(recognised) == sources.MAX_LEFT_BY_CHILD + 1 < len(paths)
    recognised.clear()
    two = _opened_with_warnings(paths)
    assert recognised == [str(p) for p in paths]   # the caller's own looks: every file
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    _assert_one_process(two, _opened_with_warnings(paths))
    _no_child_left()


def test_a_child_starts_with_the_netcdf_lock_free_and_no_hdf5_call_under_way():
    """A fork waits for netCDF4's lock (another thread in an HDF5 call holds it), and
    the child can take that lock itself: a lock held by another thread at the fork
    would stay held in the child for ever (the design of the fork; POSIX fork keeps
    only the calling thread)."""
    import threading

    from analogs._netcdf_lock import netcdf_lock

    lock = netcdf_lock()
    holding, release = threading.Event(), threading.Event()

    def hold():
        with lock:
            holding.set()
            release.wait()

    def takes_the_lock():
        if not lock.acquire(blocking=False):
            raise RuntimeError("the lock stayed held")
        lock.release()
        return b"free"

    thread = threading.Thread(target=hold)
    thread.start()
    holding.wait()
    threading.Timer(0.3, release.set).start()
    started = time.monotonic()
    with forked.beside(takes_the_lock) as child:
        assert time.monotonic() - started >= 0.25  # the fork waited for the lock
        assert child.answer(timeout=30) == b"free"
    thread.join()
    _no_child_left()


def test_a_fork_that_fails_leaves_the_work_to_the_caller(monkeypatch):
    """When no process can be made (os.fork raises, as it does without memory or under
    a process limit), the child gives no answer and nothing is left open or frozen out
    of garbage collection."""
    import gc

    def no_room():
        raise OSError(12, "Cannot allocate memory")

    monkeypatch.setattr(os, "fork", no_room)
    frozen = gc.get_freeze_count()
    with forked.beside(lambda: b"never") as child:
        assert child.answer(timeout=1) is None
    assert gc.get_freeze_count() == frozen


@pytest.mark.parametrize("fork", [True, False])
def test_report_figures_without_analogs_and_with_fewer_panels(demo_store, monkeypatch,
                                                              fork):
    """A query left with no analog draws the target's map alone; a grid limited to its
    first panels draws those maps alone (with the forked child or without)."""
    import dataclasses

    if not fork:
        monkeypatch.setattr(forked, "can_fork", lambda: False)
    result = demo_store.find(date=str(demo_store.days[420].date()))
    none_left = dataclasses.replace(result, analogs=result.analogs.head(0))
    figures = find.report_figures(demo_store, none_left)
    assert [caption.split(":")[0] for caption, _, _ in figures] == [
        f"Target {result.target['date']}"]
    views = []
    figures = find.report_figures(demo_store, result, n_panel=7, views=views)
    assert [view[0] for view in views] == [f"analog-map-{rank}" for rank in range(1, 8)]
    grid = next(svg for caption, svg, _ in figures if caption.startswith("The closest"))
    assert grid.count('id="analog-map-') == 7
    _no_child_left()
