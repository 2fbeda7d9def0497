"""`analogs update` with new days on another grid: regridded and coverage-checked as a
`find --field` target is (issue 15), instead of refused."""

import shutil
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy.interpolate import RegularGridInterpolator

from analogs.api import AnalogStore, build_store
from analogs.cli import main
from analogs.stages.sources import open_archive

#: The new days: a summer month of the demo's last year.
NEW_DAYS = slice("2004-06-01", "2004-06-30")


@pytest.fixture(scope="module")
def early_store(demo_files, tmp_path_factory):
    """A store of the demo archive without its last year (built once, copied per test)."""
    early = [f for f in demo_files if not f.stem.endswith("2004")]
    path = tmp_path_factory.mktemp("update_regrid") / "store"
    build_store(early, path, progress=False)
    return path


@pytest.fixture()
def store_copy(early_store, tmp_path):
    path = tmp_path / "store"
    shutil.copytree(early_store, path)
    return AnalogStore.load(path)


def _new_day_files(demo_files, tmp_path, select):
    """The new days of the last year, each file passed through ``select`` (a function of
    the Dataset: another grid, a smaller domain)."""
    paths = []
    for path in demo_files:
        if not path.stem.endswith("2004"):
            continue
        with xr.open_dataset(path) as ds:
            out = tmp_path / f"new_{path.name}"
            select(ds.sel(time=NEW_DAYS)).load().to_netcdf(out)
            paths.append(out)
    return paths


def test_update_regrids_days_on_another_grid(store_copy, demo_files, tmp_path, capsys):
    """New days on a 2-degree grid (every other point of the store's 1-degree grid) are
    appended; their PCs are those of the days bilinearly interpolated to the store grid.
    Reference: scipy.interpolate.RegularGridInterpolator (linear) of the coarse days onto
    the store grid, then the store's own climatology and EOF projection."""
    coarse = _new_day_files(demo_files, tmp_path,
                            lambda ds: ds.isel(lat=slice(None, None, 2), lon=slice(None, None, 2)))
    n_before = len(store_copy.times)
    status = main(["update", "--store", str(store_copy.path), "--quiet", *map(str, coarse)])
    assert status == 0, capsys.readouterr().err
    updated = AnalogStore.load(store_copy.path)
    days = open_archive(coarse, progress=False).load()
    assert len(updated.times) == n_before + days.sizes["time"]
    lat, lon = store_copy.grid
    # The coarse grid ends at lat 54 (the store's 55 is within half a coarse step): the
    # interpolator extrapolates linearly there, as the regridding does.
    points = np.stack(np.meshgrid(lat, lon, indexing="ij"), axis=-1)
    reference = {}
    for name in store_copy.fields:
        values = days[name].transpose("time", "lat", "lon").values
        reference[name] = (("time", "lat", "lon"), np.stack([
            RegularGridInterpolator((days["lat"].values, days["lon"].values), day,
                                    bounds_error=False, fill_value=None)(points)
            for day in values]))
    regridded = xr.Dataset(reference, coords={"time": days["time"].values, "lat": lat,
                                              "lon": lon})
    expected = store_copy.eof.transform(store_copy.climatology.transform(regridded)).values
    np.testing.assert_allclose(updated.pcs.values[n_before:], expected, rtol=1e-6,
                               atol=1e-8)
    # The same days on the store's own grid give nearly the same PCs (the regridding
    # only loses detail between coarse points).
    native = open_archive([f for f in demo_files if f.stem.endswith("2004")],
                          progress=False).sel(time=NEW_DAYS)
    direct = store_copy.eof.transform(store_copy.climatology.transform(native)).values
    error = np.linalg.norm(updated.pcs.values[n_before:] - direct, axis=1) \
        / np.linalg.norm(direct, axis=1)
    assert np.median(error) < 0.15
    assert updated.tags is not None and len(updated.tags) == len(updated.times)


def test_update_with_part_of_the_grid_uncovered(store_copy, demo_files, tmp_path):
    """Days that leave 4 of the store's 71 longitude columns uncovered (5.6 %) are
    appended with a warning naming the share; their PCs are the gappy least-squares PCs
    (Everson & Sirovich 1995) that `find --field` gives for the same field, and close to
    the PCs of the full days."""
    lat, lon = store_copy.grid
    east = float(lon.max())
    cropped = _new_day_files(demo_files, tmp_path, lambda ds: ds.sel(lon=slice(None, east - 4)))
    n_before = len(store_copy.times)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        updated = store_copy.update(cropped, progress=False)
    assert any(f"{100 * 4 / lon.size:.1f} % of the store grid" in str(w.message)
               for w in caught)
    from analogs.workflows.find import on_store_grid, project_samples
    days = open_archive(cropped, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        gappy = project_samples(store_copy, on_store_grid(store_copy, days))
    # (float32 fields filled in float64: equal to rounding)
    np.testing.assert_allclose(updated.pcs.values[n_before:], gappy, rtol=1e-6, atol=1e-8)
    native = open_archive([f for f in demo_files if f.stem.endswith("2004")],
                          progress=False).sel(time=NEW_DAYS)
    full = store_copy.eof.transform(store_copy.climatology.transform(native)).values
    error = np.linalg.norm(gappy - full, axis=1) / np.linalg.norm(full, axis=1)
    assert np.median(error) < 0.1
    day = str(pd.Timestamp(days["time"].values[5]).date())
    assert updated.find(date=day, top=5).target["date"] == day


def test_update_refuses_days_that_cover_too_little(store_copy, demo_files, tmp_path,
                                                   capsys):
    """More than 10 % of the store grid uncovered: refused in one line naming the share,
    the store unchanged."""
    lat, lon = store_copy.grid
    cropped = _new_day_files(demo_files, tmp_path,
                             lambda ds: ds.sel(lat=slice(None, float(lat.max()) - 10)))
    before = AnalogStore.load(store_copy.path).manifest["files"]
    status = main(["update", "--store", str(store_copy.path), "--quiet", *map(str, cropped)])
    err = capsys.readouterr().err
    assert status == 2 and len(err.strip().splitlines()) == 1
    assert "% of the store grid uncovered" in err
    assert AnalogStore.load(store_copy.path).manifest["files"] == before
