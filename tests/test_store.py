"""Store persistence: atomic swaps, checksums (sha256, FIPS 180-4 via hashlib), versions."""

import hashlib
import json
import os
import stat

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.workflows import store as store_io
from analogs.errors import StoreError


def _write_version(path, value):
    with store_io.writing(path, {"config": {"value": value}}) as staged:
        ds = xr.Dataset({"x": ("time", np.arange(3.0) + value)},
                        coords={"time": pd.date_range("2001-01-01T12", periods=3)})
        store_io.write_dataset(ds, staged / store_io.SCORES)
        store_io.write_table(pd.DataFrame({"a": [value]}), staged / store_io.TAGS)


def test_manifest_checksums_match_hashlib(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    manifest = store_io.check_checksums(path)
    for name in (store_io.SCORES, store_io.TAGS):
        digest = hashlib.sha256((path / name).read_bytes()).hexdigest()
        assert manifest["files"][name]["sha256"] == digest
    assert manifest["format_version"] == store_io.FORMAT_VERSION
    assert manifest["config"] == {"value": 1}


def test_rewrite_replaces_whole_store_and_leaves_no_temporaries(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    _write_version(path, 2)
    assert store_io.read_table(path / store_io.TAGS)["a"].tolist() == [2]
    leftovers = [p.name for p in tmp_path.iterdir() if p.name not in ("store", ".store.lock")]
    assert leftovers == []


def test_failed_write_leaves_previous_store_untouched(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    before = {p.name: p.read_bytes() for p in path.iterdir()}
    with pytest.raises(RuntimeError, match="disk full"):
        with store_io.writing(path, {"config": {}}) as staged:
            (staged / store_io.SCORES).write_bytes(b"partial")
            raise RuntimeError("disk full")
    assert {p.name: p.read_bytes() for p in path.iterdir()} == before
    store_io.check_checksums(path)


def test_altered_file_is_refused(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    with open(path / store_io.TAGS, "ab") as handle:
        handle.write(b"x")
    with pytest.raises(StoreError, match="does not match its checksum"):
        store_io.check_checksums(path)


def test_missing_file_is_refused(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    (path / store_io.SCORES).unlink()
    with pytest.raises(StoreError, match="is missing scores.nc"):
        store_io.check_checksums(path)


def test_other_format_version_is_refused(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    manifest = json.loads((path / store_io.MANIFEST).read_text())
    manifest["format_version"] = 99
    (path / store_io.MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(StoreError, match="format version 99"):
        store_io.read_manifest(path)


def test_not_a_store(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        store_io.read_manifest(tmp_path / "nothing")
    (tmp_path / "empty").mkdir()
    with pytest.raises(StoreError, match="has no manifest.json"):
        store_io.read_manifest(tmp_path / "empty")
    (tmp_path / "empty" / "manifest.json").write_text("{not json")
    with pytest.raises(StoreError, match="not valid JSON"):
        store_io.read_manifest(tmp_path / "empty")


def test_manifest_cannot_point_outside_the_store(tmp_path):
    path = tmp_path / "store"
    _write_version(path, 1)
    manifest = json.loads((path / store_io.MANIFEST).read_text())
    manifest["files"]["../secret"] = {"sha256": "0"}
    (path / store_io.MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(StoreError, match="outside the store"):
        store_io.check_checksums(path)


def test_netcdf_time_is_cf_float_without_fill_values(tmp_path):
    """CF practice (CF conventions 1.8 sec. 4.4): time as a number with units and calendar;
    coordinates carry no _FillValue (what the IOOS compliance checker flags)."""
    path = tmp_path / "store"
    _write_version(path, 1)
    import netCDF4
    with netCDF4.Dataset(path / store_io.SCORES) as nc:
        time = nc.variables["time"]
        assert time.dtype == np.float64
        assert time.units.startswith("days since") and time.calendar == "standard"
        assert "_FillValue" not in time.ncattrs()


# ----------------------------------------------------------------- the one atomic writer

@pytest.mark.parametrize("umask", [0o022, 0o027, 0o077])
def test_written_files_follow_the_umask(tmp_path, umask):
    """A written file has the mode a new file gets under the umask (0o666 & ~umask, as
    open(2) gives), though the temporary sibling is made 0o600 by mkstemp."""
    from analogs.workflows import files
    ds = xr.Dataset({"x": ("time", np.arange(3.0))},
                    coords={"time": pd.date_range("2001-01-01T12", periods=3)})
    previous = os.umask(umask)
    try:
        written = [files.write_text(tmp_path / "a" / "page.html", "<p>hi</p>"),
                   files.write_bytes(tmp_path / "figure.png", b"\x89PNG"),
                   files.write_table(pd.DataFrame({"a": [1]}), tmp_path / "t.csv"),
                   files.write_table(pd.DataFrame({"a": [1]}), tmp_path / "t.parquet"),
                   files.write_netcdf(ds, tmp_path / "x.nc")]
        store_path = tmp_path / "store"
        _write_version(store_path, 1)
    finally:
        os.umask(previous)
    written += [p for p in store_path.iterdir()]
    for path in written:
        assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~umask, path
    assert stat.S_IMODE(store_path.stat().st_mode) == 0o777 & ~umask
    assert (tmp_path / "a" / "page.html").read_text() == "<p>hi</p>"


def test_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    from analogs.workflows import files
    path = files.write_text(tmp_path / "index.html", "old")
    with pytest.raises(RuntimeError, match="disk full"):
        with files.atomic_path(path) as temporary:
            temporary.write_text("half")
            raise RuntimeError("disk full")
    ds = xr.Dataset({"x": ("lat", [1.0])}, coords={"lat": [0.0]})
    nc = files.write_netcdf(ds, tmp_path / "maps.nc")
    broken = ds.assign_attrs(unwritable={"nested": 1})  # NetCDF attributes cannot hold a dict
    with pytest.raises(TypeError, match="unwritable"):
        files.write_netcdf(broken, nc)
    assert path.read_text() == "old"
    with xr.open_dataset(nc) as back:
        assert "unwritable" not in back.attrs and back["x"].values.tolist() == [1.0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["index.html", "maps.nc"]


def test_netcdf_groups_are_added_to_one_file(tmp_path):
    from analogs.workflows import files
    one = xr.Dataset({"a": ("lat", np.arange(2.0))}, coords={"lat": [10.0, 20.0]})
    path = files.write_netcdf(one, tmp_path / "basis.nc")
    files.write_netcdf(one * 2, path, group="eof", mode="a")
    with xr.open_dataset(path) as root, xr.open_dataset(path, group="eof") as eof:
        np.testing.assert_array_equal(root["a"], [0.0, 1.0])
        np.testing.assert_array_equal(eof["a"], [0.0, 2.0])
        assert eof["lat"].attrs["units"] == "degrees_north"  # CF-tidied (stages.cf)
        assert root.attrs["Conventions"] == "CF-1.8"
