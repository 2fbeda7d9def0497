"""The report's maps draw the archive's own fields when its files are where the build read
them, else the store's EOF reconstruction, and say which (titles, alt text); the
land-sea boundary comes from the store's mask.

References: the demo archive files read directly with xarray (``zg`` in m, CF
geopotential_height at plev 50000 Pa: metres of geopotential height are gpm); the
store's own reconstruction (climatology + EOF anomaly) for the fallback."""

import copy

import numpy as np
import pytest
import xarray as xr

from analogs.workflows.find import archive_day_fields, day_fields, report_figures


@pytest.fixture(scope="module")
def query(demo_store):
    tags = demo_store.tags
    summer = tags[(tags.index.year == tags.index.year.min() + 1) & tags.index.month.isin([7])]
    return demo_store.find(date=str(summer.index[10].date()), top=8)


def with_inputs(store, change):
    """A copy of ``store`` whose manifest's archive inputs are changed by ``change``."""
    other = copy.copy(store)
    other.manifest = copy.deepcopy(store.manifest)
    change(other.manifest["archive"]["inputs"])
    return other


def test_archive_fields_are_the_files_values(demo_store, demo_dir, query):
    row = demo_store.day_row(query.target["date"])
    rows = [row, *query.analogs["row"].head(3)]
    fields, source = archive_day_fields(demo_store, rows)
    assert source == "archive"
    for k, day in enumerate(demo_store.times[rows]):
        with xr.open_dataset(demo_dir / "archive" / f"zg500_{day.year}.nc") as zg:
            expected = zg["zg"].sel(time=day, plev=50000.0).values
        np.testing.assert_allclose(fields["z500"].values[k], expected, rtol=1e-6)
    assert np.array_equal(fields["time"].values, demo_store.times[rows].values)


def test_archive_fields_read_by_layout_are_the_full_readings(demo_store, query,
                                                            monkeypatch):
    """The drawn days of the demo archive's later files, read at those days by the
    first file's layout, are bit for bit what open_target reads of every file (the
    reading with no layout: xarray's own)."""
    from analogs.stages import sources
    rows = [demo_store.day_row(query.target["date"]), *query.analogs["row"]]
    fast, _ = archive_day_fields(demo_store, rows)
    with monkeypatch.context() as patch:
        patch.setattr(sources, "_laid_out_candidates", lambda *args: None)
        full, _ = archive_day_fields(demo_store, rows)
    xr.testing.assert_identical(fast, full)
    for name in full.data_vars:
        assert np.array_equal(fast[name].values.view("u4"), full[name].values.view("u4"))


def test_report_says_where_the_fields_come_from(demo_store, query):
    figures = report_figures(demo_store, query)
    (caption, _, alt), grid = figures[0], figures[1]
    assert "the archive's fields" in caption and "the archive's fields" in alt
    assert "the archive's fields" in grid[2]
    moved = with_inputs(demo_store, lambda inputs: inputs[0].update(
        path=inputs[0]["path"] + ".moved"))
    figures = report_figures(moved, query)
    (caption, _, alt), grid = figures[0], figures[1]
    assert "EOF reconstruction" in caption and "no longer at its recorded path" in caption
    assert "EOF reconstruction" in alt and "EOF reconstruction" in grid[2]


@pytest.mark.parametrize("change, reason", [
    (lambda inputs: inputs[-1].update(bytes=inputs[-1]["bytes"] + 1), "changed size"),
    (lambda inputs: inputs[0].update(path="/nonexistent/zg.nc"), "no longer at its recorded"),
])
def test_changed_archive_falls_back_to_the_reconstruction(demo_store, query, change, reason):
    rows = query.analogs["row"].to_numpy()
    fields, why = archive_day_fields(with_inputs(demo_store, change), rows)
    assert fields is None and reason in why
    # What is drawn instead: climatology + the kept EOFs' anomaly of those days.
    climate = demo_store.climatology.predict(demo_store.times[rows])["z500"]
    anomaly = demo_store.eof.reconstruct(demo_store.pcs.isel(time=rows))["z500"]
    np.testing.assert_allclose(day_fields(demo_store, rows)["z500"].values,
                               climate.values + anomaly.transpose("time", "lat", "lon").values)


def test_store_points_found_among_the_archive_points():
    """The archive days are cut at the store's points when each is an archive point, and
    interpolated otherwise: the positions equal those numpy.isclose finds one by one."""
    from analogs.workflows.find import _positions
    archive = np.arange(-130.0, -59.5, 1.0)
    store = archive[5:40]
    expected = [int(np.flatnonzero(np.isclose(archive, value))[0]) for value in store]
    assert list(_positions(archive, store)) == expected
    assert list(_positions(archive, store + 1e-8)) == expected  # rounding in a file
    assert _positions(archive, store + 0.5) is None  # a shifted grid: interpolated
    assert _positions(archive, np.array([-131.0, -130.0])) is None  # beyond the archive
