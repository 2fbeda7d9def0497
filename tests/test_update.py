"""`analogs update`: new days on the existing EOFs, idempotent, refusing other grids."""

import hashlib

import numpy as np
import pytest
import xarray as xr

from analogs.api import AnalogStore, build_store
from analogs.cli import main


def _digests(path):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(path.iterdir())}


@pytest.fixture(scope="module")
def split_files(demo_files, tmp_path_factory):
    """The demo archive without its last year, and that last year alone."""
    years = sorted({int(f.stem.split("_")[1]) for f in demo_files})
    early = [f for f in demo_files if int(f.stem.split("_")[1]) < years[-1]]
    late = [f for f in demo_files if int(f.stem.split("_")[1]) == years[-1]]
    return early, late


def test_update_appends_projected_days_and_is_idempotent(split_files, demo_dir, tmp_path, capsys):
    early, late = split_files
    store = build_store(early, tmp_path / "store", events=demo_dir / "events.csv", progress=False)
    n_before = len(store.times)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, late)]) == 0
    updated = AnalogStore.load(store.path)
    from analogs.stages.sources import open_archive
    new_days = open_archive(late, progress=False)
    assert len(updated.times) == n_before + new_days.sizes["time"]
    assert updated.times.is_monotonic_increasing
    # The appended PCs are the projection of the new days on the unchanged EOFs.
    expected = store.eof.transform(store.climatology.transform(new_days)).values
    np.testing.assert_allclose(updated.pcs.values[n_before:], expected, rtol=1e-10, atol=1e-10)
    np.testing.assert_array_equal(updated.pcs.values[:n_before], store.pcs.values)
    assert len(updated.tags) == len(updated.times)
    day = str(updated.days[-100].date())
    assert updated.find(date=day).analogs["date"].iloc[0] != day
    # Appending the same days again changes nothing, byte for byte.
    before = _digests(store.path)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, late)]) == 0
    assert _digests(store.path) == before
    assert "0 days added" in capsys.readouterr().out


def test_update_refuses_another_grid(split_files, tmp_path, capsys):
    early, late = split_files
    store = build_store(early, tmp_path / "store", progress=False)
    before = _digests(store.path)
    coarse = []
    for path in late:
        with xr.open_dataset(path) as ds:
            out = tmp_path / f"coarse_{path.name}"
            ds.isel(lat=slice(None, None, 2), lon=slice(None, None, 2)).load().to_netcdf(out)
            coarse.append(out)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, coarse)]) == 2
    err = capsys.readouterr().err
    assert "differs from the store's" in err and len(err.strip().splitlines()) == 1
    assert _digests(store.path) == before


def test_update_from_python_returns_the_new_store(split_files, demo_dir, tmp_path):
    """``store.update`` returns the new version (the README's Python update); an
    events-only update carries the scores and tags over unchanged."""
    early, late = split_files
    store = build_store(early, tmp_path / "store", progress=False)
    assert store.events is None
    new = store.update(late, progress=False)
    summary = new.last_update
    assert summary["days_added"] == len(new.times) - len(store.times) > 0
    assert new.manifest["updates"][-1]["days_added"] == summary["days_added"]
    day = str(new.days[-10].date())
    assert new.find(date=day).target["date"] == day
    assert len(store.times) < len(new.times)  # the old object keeps its version
    files_before = new.manifest["files"]
    with_events = new.update(late, events=demo_dir / "events.csv", progress=False)
    assert with_events.last_update["days_added"] == 0
    assert with_events.events is not None and len(with_events.manifest["updates"]) == 2
    for name in ("scores.nc", "tags.parquet", "basis.nc"):
        assert with_events.manifest["files"][name] == files_before[name]
    assert with_events.find(date=day).outcomes["has_events"]
