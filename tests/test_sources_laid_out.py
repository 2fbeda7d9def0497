"""Files laid out as an earlier one (analogs.stages.sources: the first file of each layout
opened by xarray, the others looked at by their netCDF4 header and read directly) give
the archive the full reading gives, bit for bit, in memory, lazily and through the
out-of-core scratch copy; anything else about a file sends it the full way.

External references: netCDF4's own decoding of each file (``set_auto_maskandscale``:
scale_factor / add_offset, _FillValue / missing_value masked), placed on the canonical
grid by hand, xarray's full reading (the path every file took before) and xarray's CF
decoding (``decode_cf_variable``) of the values masked in place."""

from __future__ import annotations

import shutil
import warnings
from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from _sources_helpers import LAT, LON, daily_times, smooth_height, smooth_humidity, to_360
from analogs import _forked
from analogs.constants import G0
from analogs.errors import AnalogsInputError
from analogs.stages import sources
from analogs.stages.sources import open_archive

YEARS = (2001, 2002, 2003)


def _times(year):
    return pd.DatetimeIndex(daily_times(f"{year}-03-01", periods=8))


def _write(folder, name, variables, coords, encoding, year):
    path = folder / f"{name}_{year}.nc"
    xr.Dataset(variables, coords=coords).to_netcdf(path, encoding=encoding)
    return str(path)


def _packed_360(folder):
    """z500 packed in int16 (scale_factor, add_offset, _FillValue; masked points in the
    later files), latitude descending, longitudes 0-360; q850 float32 with a
    missing_value (NaN written as it, and the value itself), chunked in time."""
    lon360, order = to_360(LON)
    paths = []
    for k, year in enumerate(YEARS):
        times = _times(year)
        z = smooth_height(times)[:, ::-1][:, :, order]
        q = smooth_humidity(times)[:, ::-1][:, :, order].astype(np.float32)
        if k:
            z[k, 3, 5] = np.nan  # written as _FillValue
            q[k + 1, 7, 9] = np.nan
            q[k + 2, 8, 8] = -999.0  # the missing_value
        coords = {"time": times, "lat": ("lat", LAT[::-1], {"units": "degrees_north"}),
                  "lon": ("lon", lon360, {"units": "degrees_east"})}
        paths.append(_write(folder, "zg", {"zg": (("time", "lat", "lon"), z, {
            "standard_name": "geopotential_height", "units": "m"})},
            {**coords, "plev": ((), 50000.0, {"units": "Pa"})},
            {"zg": {"dtype": "int16", "scale_factor": 0.25, "add_offset": 5500.0,
                    "_FillValue": np.int16(-32767)}}, year))
        paths.append(_write(folder, "hus", {"hus": (("time", "lat", "lon"), q, {
            "standard_name": "specific_humidity", "units": "kg kg-1"})},
            {**coords, "plev": ((), 85000.0, {"units": "Pa"})},
            {"hus": {"_FillValue": None, "missing_value": np.float32(-999.0),
                     "chunksizes": (3, 37, 72)}}, year))
    return paths


def _geopotential_levels(folder):
    """Geopotential in m2 s-2 on three pressure levels (time, level, lon, lat: the
    level chosen and the dims put in order), longitudes rolled to start at 100 E;
    dewpoint-free q850 on (time, lat, lon) with an extra dim of length one."""
    roll = np.r_[56:72, 0:56]
    paths = []
    for year in YEARS:
        times = _times(year)
        z = smooth_height(times)[:, :, roll] * G0
        levels = np.stack([z * 0.3, z, z * 1.4], axis=1).transpose(0, 1, 3, 2)
        q = smooth_humidity(times)[:, None, :, roll]
        coords = {"time": times, "lat": ("lat", LAT, {"units": "degrees_north"}),
                  "lon": ("lon", LON[roll], {"units": "degrees_east"})}
        paths.append(_write(folder, "z", {"z": (("time", "level", "lon", "lat"), levels, {
            "standard_name": "geopotential", "units": "m2 s-2"})},
            {**coords, "level": ("level", [850.0, 500.0, 300.0], {"units": "hPa"})},
            {}, year))
        paths.append(_write(folder, "q", {"q": (("time", "member", "lat", "lon"), q, {
            "units": "kg/kg"})}, {**coords, "level": ((), 850.0, {"units": "hPa"})}, {},
            year))
    return paths


def _unsigned(folder):
    """z500 as unsigned bytes (_Unsigned, scale_factor, add_offset) with a scalar level
    named by its ``coordinates`` attribute, NETCDF3 files."""
    paths = []
    for year in YEARS:
        times = _times(year)
        z = np.round((smooth_height(times) - 5000.0) / 4.0)
        path = folder / f"hgt_{year}.nc"
        with netCDF4.Dataset(path, "w", format="NETCDF3_CLASSIC") as out:
            for name, size in (("time", len(times)), ("lat", LAT.size), ("lon", LON.size)):
                out.createDimension(name, size)
            time = out.createVariable("time", "f8", ("time",))
            time.units, time.calendar = "days since 1990-01-01", "standard"
            time[:] = (times - pd.Timestamp("1990-01-01")) / pd.Timedelta(days=1)
            for name, values, units in (("lat", LAT, "degrees_north"),
                                        ("lon", LON, "degrees_east")):
                out.createVariable(name, "f4", (name,)).units = units
                out[name][:] = values
            out.createVariable("level", "f4", ()).units = "hPa"
            out["level"].assignValue(500.0)
            hgt = out.createVariable("hgt", "i1", ("time", "lat", "lon"))
            hgt.set_auto_maskandscale(False)
            hgt.setncatts({"units": "gpm", "_Unsigned": "true", "scale_factor": 4.0,
                           "add_offset": 5000.0, "coordinates": "level"})
            hgt[:] = z.astype(np.uint8).view(np.int8)
        paths.append(str(path))
    return paths


def _both_ways(monkeypatch, paths, **options):
    """(archive read with the layouts, archive read the full way, files xarray opened
    in the first reading)."""
    opened = []
    open_file = sources._open_file

    def counting(path, chunks):
        opened.append(path)
        return open_file(path, chunks)

    with monkeypatch.context() as patch:
        patch.setattr(sources, "_open_file", counting)
        with warnings.catch_warnings(record=True) as said_fast:
            warnings.simplefilter("always")
            fast = open_archive(paths, **options)
    with monkeypatch.context() as patch:
        patch.setattr(sources, "_laid_out_candidates", lambda *args: None)
        with warnings.catch_warnings(record=True) as said_full:
            warnings.simplefilter("always")
            full = open_archive(paths, **options)
    assert [str(w.message) for w in said_fast] == [str(w.message) for w in said_full]
    return fast, full, opened


def _assert_identical(fast, full):
    assert list(fast.data_vars) == list(full.data_vars)
    for name in full.data_vars:
        assert fast[name].dtype == full[name].dtype
        a, b = fast[name].values, full[name].values
        assert np.array_equal(a.view(f"u{a.itemsize}"), b.view(f"u{b.itemsize}"))  # bits
    assert fast.identical(full)
    assert fast.attrs == full.attrs  # the missing-data report among them


def _scratch(shape, dtype):
    return np.zeros(shape, dtype)


@pytest.mark.parametrize("write", [_packed_360, _geopotential_levels, _unsigned])
def test_laid_out_files_read_as_the_full_reading_in_memory_lazily_and_once(
        tmp_path, monkeypatch, write):
    """Packed int16 with a fill value and masked points, float32 with _FillValue and
    missing_value, latitude descending and 0-360 or rolled longitudes, geopotential on
    levels with dims out of order, unsigned bytes in NETCDF3 files: read by the first
    file's layout, every value, time, coordinate and the missing-data report are the
    full reading's, in memory, lazily and decoded once into scratch; xarray opens only
    the first file of each layout; the values are netCDF4's own decoding."""
    paths = write(tmp_path)
    kinds = len({Path(p).name.split("_")[0] for p in paths})
    for options in ({}, {"chunks": {"time": 5}},
                    {"chunks": {"time": 5}, "scratch": _scratch, "region": (-30, 60, 100, -150)}):
        fast, full, opened = _both_ways(monkeypatch, paths[::-1], **options)
        assert len(opened) == kinds
        _assert_identical(fast, full)
    fast, _, _ = _both_ways(monkeypatch, paths)
    name = "zg" if write is _packed_360 else "z" if write is _geopotential_levels else "hgt"
    decoded = []
    for path in sorted(p for p in paths if Path(p).name.startswith(name + "_")):
        with netCDF4.Dataset(path) as handle:
            values = np.ma.filled(handle[name][:].astype(float), np.nan)
            file_lat, file_lon = handle["lat"][:], handle["lon"][:]
        if values.ndim == 4:  # (time, level, lon, lat): the 500 hPa level, (lat, lon)
            values = values[:, 1].transpose(0, 2, 1) / G0
        decoded.append(values)
    decoded = np.concatenate(decoded)
    rows = [int(np.flatnonzero(np.isclose(file_lat, v))[0]) for v in fast["lat"].values]
    cols = [int(np.flatnonzero(np.isclose(np.mod(file_lon, 360.0), v % 360.0))[0])
            for v in fast["lon"].values]
    expected = decoded[:, rows][:, :, cols]
    read = np.isfinite(expected)  # masked points are filled by the missing-data policy
    assert (~read).sum() == (2 if write is _packed_360 else 0)
    np.testing.assert_allclose(fast["z500"].values[read], expected[read], rtol=1e-6)


def _layout_breakers(folder):
    """Yearly z500 files of one layout, and a fourth year that breaks it in one way."""
    def write(year, *, units="hours since 1900-01-01", calendar="standard", lat=LAT,
              order=slice(None), extra=None):
        times = _times(year)[order]
        path = folder / f"zg_{year}.nc"
        ds = xr.Dataset({"zg": (("time", "lat", "lon"), smooth_height(times, lat=lat),
                                {"units": "m", **(extra or {})})},
                        coords={"time": times, "lat": ("lat", lat), "lon": LON,
                                "plev": ((), 50000.0, {"units": "Pa"})})
        ds.to_netcdf(path, encoding={"time": {"units": units, "calendar": calendar}})
        return str(path)
    return [write(year) for year in YEARS], write


@pytest.mark.parametrize("change, laid_out", [
    ("time units", True), ("calendar", False), ("attribute", False), ("reversed times", False)])
def test_a_file_laid_out_otherwise_is_read_the_full_way(tmp_path, monkeypatch, change,
                                                         laid_out):
    """A later file with its own time units is read by the layout (its times decoded
    with its own units); one whose times decode to cftime objects (a noleap calendar),
    with another attribute, or with its times in reverse order (sorted with the full
    reading's warning naming it) is opened by xarray; every one is read as the full
    reading reads it."""
    paths, write = _layout_breakers(tmp_path)
    odd = {"time units": lambda: write(2004, units="hours since 2000-01-01"),
           "calendar": lambda: write(2004, calendar="noleap"),
           "attribute": lambda: write(2004, extra={"comment": "reprocessed"}),
           "reversed times": lambda: write(2004, order=slice(None, None, -1))}[change]()
    fast, full, opened = _both_ways(monkeypatch, paths + [odd])
    assert opened == ([paths[0]] if laid_out else [paths[0], odd])
    _assert_identical(fast, full)


def test_a_file_on_another_grid_gives_the_same_error(tmp_path, monkeypatch):
    """A later file on a shifted grid is opened by xarray, and refused with the message
    the full reading gives."""
    paths, write = _layout_breakers(tmp_path)
    odd = write(2004, lat=LAT + 2.5 * (LAT < 90))
    messages = []
    for patched in (False, True):
        with monkeypatch.context() as patch:
            if patched:
                patch.setattr(sources, "_laid_out_candidates", lambda *args: None)
            with pytest.raises(AnalogsInputError, match="different grids") as refused:
                open_archive(paths + [odd])
            messages.append(str(refused.value))
    assert messages[0] == messages[1]


EOFS_HGT = Path(pytest.importorskip("eofs").__file__).parent / "examples/example_data/hgt_djf.nc"


def test_eofs_hgt_djf_halves_laid_out_and_a_warning_file_read_in_full(tmp_path, monkeypatch):
    """eofs' hgt_djf.nc (NETCDF3, float64 with missing_value, latitude descending, times
    in hours since year 1): as shipped it has no units, so its reading warns and every
    copy is read the full way, each warning naming its file (xarray's warning of its
    time units' ambiguous year 1-1-1 too); its two halves in time, copied by netCDF4
    with units added and the year written 0001, are read by the first's layout, as the
    full reading reads them and as netCDF4 decodes them."""
    copies = [str(shutil.copy(EOFS_HGT, tmp_path / f"hgt_{k}.nc")) for k in (1, 2)]
    fast, full, opened = _both_ways(monkeypatch, copies)  # the same days twice: dropped
    assert opened == copies
    _assert_identical(fast, full)
    halves = []
    with netCDF4.Dataset(EOFS_HGT) as source:
        n_times = source.dimensions["time"].size
        for k, part in enumerate((slice(0, n_times // 2), slice(n_times // 2, n_times))):
            path = tmp_path / f"half_{k}.nc"
            with netCDF4.Dataset(path, "w", format=source.data_model) as out:
                for name, dim in source.dimensions.items():
                    out.createDimension(name, part.stop - part.start if name == "time"
                                        else dim.size)
                for name, variable in source.variables.items():
                    variable.set_auto_maskandscale(False)
                    copy = out.createVariable(name, variable.dtype, variable.dimensions)
                    copy.setncatts({a: variable.getncattr(a) for a in variable.ncattrs()})
                    copy.set_auto_maskandscale(False)
                    copy[:] = variable[part] if "time" in variable.dimensions else variable[:]
                out["z"].units = "m"
                out["time"].units = "hours since 0001-01-01 00:00:00"  # xarray warns of 1-1-1
            halves.append(str(path))
    fast, full, opened = _both_ways(monkeypatch, halves)  # seasonal means: warned
    assert opened == halves[:1]
    _assert_identical(fast, full)
    with netCDF4.Dataset(EOFS_HGT) as source:
        z = np.ma.filled(source["z"][:, 0].astype(float), np.nan)
    np.testing.assert_allclose(fast["z500"].values, z, rtol=1e-12)


def _days_both_ways(monkeypatch, paths, days, *fields):
    """(each file's ``fields``, one after the other, at the ``days`` it holds by
    target_days with its layouts, the same by open_target over their span (the report's
    reading before), files xarray opened in the first, the warnings of the first: the
    second's); a refusal is the message instead of the values."""
    opened = []
    open_file = sources._open_file

    def counting(path, chunks):
        opened.append(path)
        return open_file(path, chunks)

    def each(read):
        out = []
        for path in paths:
            with xr.open_dataset(path) as held:
                inside = days[days.isin(held["time"].values)]
            for field in fields:
                try:
                    out.append(read(path, inside, field))
                except AnalogsInputError as refused:
                    out.append(str(refused))
        return out

    def open_target(path, inside, field):
        part = sources.open_target(
            path, time=f"{inside.min().isoformat()}/{inside.max().isoformat()}",
            fields=[field])[field]
        return part.sel(time=part["time"].isin(inside.values))

    layouts = sources.DayLayouts()
    with monkeypatch.context() as patch, warnings.catch_warnings(record=True) as said_fast:
        warnings.simplefilter("always")
        patch.setattr(sources, "_open_file", counting)
        fast = each(lambda path, inside, field: sources.target_days(
            path, inside.values, field, layouts))
    with warnings.catch_warnings(record=True) as said_full:
        warnings.simplefilter("always")
        full = each(open_target)
    said = [str(w.message) for w in said_fast]
    assert said == [str(w.message) for w in said_full]
    return fast, full, opened, said


@pytest.mark.parametrize("write, field", [
    (_packed_360, "z500"), (_packed_360, "q850"), (_geopotential_levels, "z500"),
    (_geopotential_levels, "q850"), (_unsigned, "z500")])
def test_days_of_laid_out_files_are_open_targets_own(tmp_path, monkeypatch, write, field):
    """The report's days (the first and last of a file, and days apart) of files packed
    in int16 with fill values, latitude descending, 0-360 or rolled longitudes,
    geopotential on levels, unsigned bytes in NETCDF3: read at those days by the first
    file's layout, bit for bit and attribute for attribute what open_target gives over
    their span (its refusal word for word where it refuses, as a member dim); xarray
    opens only the first file of each kind, once, for its layout, which reads it too."""
    paths = [p for p in write(tmp_path)
             if Path(p).name.startswith(("zg_", "z_", "hgt_")) == (field == "z500")]
    days = pd.DatetimeIndex([t for year in YEARS for t in _times(year)[[0, 2, 3, 7]]])
    fast, full, opened, _ = _days_both_ways(monkeypatch, paths, days, field)
    for a, b in zip(fast, full):
        if isinstance(b, str):
            assert a == b
            continue
        a_bits, b_bits = a.values, b.values
        assert a_bits.dtype == b_bits.dtype
        assert np.array_equal(a_bits.view(f"u{a_bits.itemsize}"),
                              b_bits.view(f"u{b_bits.itemsize}"))
        xr.testing.assert_identical(a, b)
    plain = not any(isinstance(b, str) for b in full)
    assert opened == ([paths[0]] if plain else paths)


def test_a_laid_out_day_file_failing_a_gate_is_read_as_open_target_reads_it(
        tmp_path, monkeypatch):
    """A later file of the layout holding decametres labelled m (open_target converts
    them, warning of the scale error: the laid-out reading's gate on its first and last
    days sends it the full way) or an infinite value on a day read (made missing, with
    open_target's warning): the same values, and the same warnings, as open_target."""
    paths, write = _layout_breakers(tmp_path)
    dam = _times(2004)
    xr.Dataset({"zg": (("time", "lat", "lon"), smooth_height(dam) / 10.0, {"units": "m"})},
               coords={"time": dam, "lat": LAT, "lon": LON, "plev": ((), 50000.0, {
                   "units": "Pa"})}).to_netcdf(tmp_path / "zg_2004.nc", encoding={
                       "time": {"units": "hours since 1900-01-01"}})
    with netCDF4.Dataset(paths[1], "a") as handle:
        handle["zg"][4, 2, 3] = np.inf
    paths.append(str(tmp_path / "zg_2004.nc"))
    days = pd.DatetimeIndex([t for year in (*YEARS, 2004) for t in _times(year)[[1, 4]]])
    fast, full, opened, said = _days_both_ways(monkeypatch, paths, days, "z500")
    assert [("infinite" in text, "decametres" in text) for text in said] == [
        (True, False), (False, True)]
    assert opened == [paths[0], paths[-1]]
    for a, b in zip(fast, full):
        xr.testing.assert_identical(a, b)
    assert np.isnan(fast[1].values).sum() == 1


def test_files_of_two_fields_read_by_a_layout_per_field(tmp_path, monkeypatch):
    """Files holding z500 and q850 (one with a member dim of length one): each field's
    days are read by the layout of the first file that field was read from (a layout
    is kept per field: a field never read from a kind of file is read the full way),
    bit for bit open_target's; xarray opens only the first file, once."""
    paths = []
    for year in YEARS:
        times = _times(year)
        coords = {"time": times, "lat": ("lat", LAT, {"units": "degrees_north"}),
                  "lon": ("lon", LON, {"units": "degrees_east"})}
        paths.append(_write(tmp_path, "both", {
            "zg500": (("time", "lat", "lon"), smooth_height(times), {"units": "m"}),
            "hus850": (("time", "member", "lat", "lon"), smooth_humidity(times)[:, None],
                       {"units": "kg kg-1"})}, coords, {}, year))
    days = pd.DatetimeIndex([t for year in YEARS for t in _times(year)[[2, 5]]])
    fast, full, opened, _ = _days_both_ways(monkeypatch, paths, days, "q850", "z500")
    assert len(fast) == len(full) == 2 * len(YEARS)
    for a, b in zip(fast, full):
        xr.testing.assert_identical(a, b)
        assert np.array_equal(a.values.view("u8"), b.values.view("u8"))
    assert opened == [paths[0]]  # for its layout, which gives both fields



def test_laid_out_days_of_later_files_are_target_days_own(tmp_path, monkeypatch):
    """A report's reading of an archive of per-field files (z500 packed, q850 with a
    missing value): the first file of each kind read by target_days (which refuses the
    field it does not hold with open_target's own words, from its layout, without
    reading it the full way), every later file by laid_out_days with the layouts so
    learnt, each field it holds at the days asked for among its times, bit for bit and
    attribute for attribute what target_days gives; a file of a kind not seen yet, or
    with no layout learnt, is None (for the caller to read it as any file)."""
    paths = _packed_360(tmp_path)
    days = pd.DatetimeIndex([t for year in YEARS for t in _times(year)[[0, 3, 7]]])
    layouts = sources.DayLayouts()
    assert sources.laid_out_days(paths[0], days.values, ["z500", "q850"], layouts) is None
    first_days = days[days.isin(_times(YEARS[0]))].values
    pairs = ((paths[0], "z500", "q850"), (paths[1], "q850", "z500"))
    words = []
    for path, _, other in pairs:
        with pytest.raises(AnalogsInputError) as full:
            sources.open_target(path, fields=[other], time="all")
        words.append(str(full.value))
    read_in_full = []
    monkeypatch.setattr(sources, "open_target", lambda *a, **k: read_in_full.append(a))
    for (path, field, other), said in zip(pairs, words):
        sources.target_days(path, first_days, field, layouts)
        with pytest.raises(AnalogsInputError, match="not found") as by_layout:
            sources.target_days(path, first_days, other, layouts)
        assert str(by_layout.value) == said
    assert read_in_full == []
    monkeypatch.undo()
    for path in paths[2:]:
        field = "z500" if Path(path).name.startswith("zg_") else "q850"
        parts = sources.laid_out_days(path, days.values, ["z500", "q850"], layouts)
        assert list(parts) == [field]
        with xr.open_dataset(path) as held:
            inside = days[days.isin(held["time"].values)]
        expected = sources.target_days(path, inside.values, field, layouts)
        xr.testing.assert_identical(parts[field], expected)
        bits = f"u{expected.values.itemsize}"
        assert np.array_equal(parts[field].values.view(bits), expected.values.view(bits))
        elsewhere = days[~days.isin(inside)].values
        assert sources.laid_out_days(path, elsewhere, [field], layouts) == {}
    assert sources.laid_out_days(paths[2], days.values, ["z500"], sources.DayLayouts()) is None

def _demo_like(folder, *, damaged=None):
    """Yearly zg files laid out as the demo's (time, plev, lat, lon), float32 with a
    _FillValue and a few points written as it (masked), zlib chunks of a year: the
    layout read straight into the joined array. ``damaged``: the year whose one chunk
    has bytes inverted (its header reads, its data do not)."""
    paths = []
    for k, year in enumerate(YEARS + (2004,)):
        times = _times(year)
        z = smooth_height(times).astype(np.float32)[:, None]
        z[k, 0, 4, 5 + k] = np.nan
        path = _write(folder, "zg", {"zg": (("time", "plev", "lat", "lon"), z, {
            "standard_name": "geopotential_height", "units": "m"})},
            {"time": times, "plev": ("plev", [50000.0], {"units": "Pa"}),
             "lat": ("lat", LAT, {"units": "degrees_north"}),
             "lon": ("lon", LON, {"units": "degrees_east"})},
            {"zg": {"_FillValue": np.float32(1e20), "zlib": True,
                    "chunksizes": (len(times), 1, LAT.size, LON.size)}}, year)
        if year == damaged:
            data = bytearray(Path(path).read_bytes())
            inside = 3 * len(data) // 4  # in the chunk, written after the header
            data[inside:inside + 256] = bytes(b ^ 0xFF for b in data[inside:inside + 256])
            Path(path).write_bytes(bytes(data))
        paths.append(path)
    return paths


def test_values_read_straight_into_the_joined_array_are_netcdf4s(tmp_path, monkeypatch):
    """Files stored on the canonical axes with a plain float mask are read by netCDF-C's
    nc_get_vara into their place in the joined array (the call netCDF4's own reading
    makes into an array of its own), then masked in place: every value is netCDF4's
    reading of the file masked at its _FillValue, and the archive is the full
    reading's bit for bit."""
    paths = _demo_like(tmp_path)
    straight = []
    read_stored_into = sources._read_stored_into

    def counting(handle, layout, out):
        straight.append(read_stored_into(handle, layout, out))
        return straight[-1]

    monkeypatch.setattr(sources, "_read_stored_into", counting)
    # Every file read in this process, where the reads are counted (tests/test_forked.py
    # checks the reading shared with a forked child).
    monkeypatch.setattr(_forked, "can_fork", lambda: False)
    fast, full, opened = _both_ways(monkeypatch, paths)
    assert opened == paths[:1] and straight == [True] * (len(paths) - 1)
    _assert_identical(fast, full)
    expected = []
    for path in paths:
        with netCDF4.Dataset(path) as handle:
            expected.append(np.ma.filled(handle["zg"][:, 0], np.nan))
    expected = np.concatenate(expected)
    read = np.isfinite(expected)  # the masked points are filled by the missing-data policy
    assert (~read).sum() == len(paths)
    assert np.array_equal(fast["z500"].values[read], expected[read])
    assert np.all(np.abs(fast["z500"].values[~read] - 5500.0) < 400.0)


def test_a_damaged_file_read_straight_gives_the_full_readings_error(tmp_path, monkeypatch):
    """A later file whose one chunk is corrupt: the straight read fails as netCDF4's
    own read does (RuntimeError, netCDF-C's message, the full reading's word for word),
    and read_guard names the file as damaged."""
    paths = _demo_like(tmp_path, damaged=2003)
    refused = []
    for patched in (False, True):
        with monkeypatch.context() as patch:
            if patched:
                patch.setattr(sources, "_laid_out_candidates", lambda *args: None)
            with pytest.raises(RuntimeError) as raised:
                open_archive(paths)
            refused.append(str(raised.value))
            with pytest.raises(AnalogsInputError, match="zg_2003.nc: its data cannot be read"):
                with sources.read_guard(paths):
                    open_archive(paths)
    assert refused[0] == refused[1] and "HDF error" in refused[0]


@pytest.mark.parametrize("dtype, attrs, plain", [
    ("f4", {"_FillValue": np.float32(1e20)}, True),
    ("f4", {"missing_value": np.float32(-999.0)}, True),
    ("f8", {"_FillValue": -9999.0, "units": "m"}, True),
    ("f4", {"_FillValue": np.float64(1e20)}, True),  # compared in float64: never equal
    ("f4", {"_FillValue": np.float32(np.nan)}, True),  # NaN: nothing to mask
    ("f4", {}, True),
    ("f4", {"missing_value": np.array([-999.0, -998.0], "f4")}, False),  # xarray warns
    ("f4", {"_FillValue": np.float32(1e20), "missing_value": np.float32(-1.0)}, False),
    ("f4", {"scale_factor": 2.0}, False),
    ("i2", {"_FillValue": np.int16(-1)}, False),
    (">f4", {"_FillValue": np.float32(1e20)}, False),
])
def test_a_plain_mask_is_xarrays_decoding(dtype, attrs, plain):
    """_plain_mask says when xarray's CF decoding of a variable is a mask set in place
    (:func:`sources._masked`), and with which values; on values holding the fill
    values, neighbours of them, NaN and infinities the mask gives xarray's decoding
    (decode_cf_variable, the reference) bit for bit."""
    fills = sources._plain_mask("v", np.dtype(dtype), attrs)
    assert (fills is not None) == plain
    if not plain:
        return
    with np.errstate(over="ignore"):
        stated = [np.float32(v) if dtype == "f4" else v for key in ("_FillValue",
                  "missing_value") if key in attrs for v in np.ravel(attrs[key])]
        values = np.array([*stated, *np.nextafter(np.array(stated, dtype), np.inf),
                           0.0, -1.0, 1e20, -999.0, np.inf, -np.inf, np.nan], dtype=dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # xarray warns of nothing for a plain mask
        decoded = xr.conventions.decode_cf_variable(
            "v", xr.Variable(("x",), values.copy(), dict(attrs)), stack_char_dim=False).values
    ours = sources._masked(values.copy(), fills)
    assert ours.dtype == decoded.dtype
    assert np.array_equal(ours.view(f"u{ours.itemsize}"), decoded.view(f"u{ours.itemsize}"))


def test_every_direct_netcdf4_opening_holds_the_netcdf_lock():
    """Every netCDF4 file the package opens itself is opened holding netCDF4's lock
    (analogs._netcdf_lock: xarray's readers hold it, and the direct reads give the GIL
    up), on the line that opens it: HDF5 is not thread-safe (its documentation's
    thread-safety notes; common practice, no source)."""
    package = Path(sources.__file__).resolve().parents[1]
    openings = [(path.name, line.strip()) for path in package.rglob("*.py")
                for line in path.read_text().splitlines() if "netCDF4.Dataset(" in line]
    assert len(openings) >= 8
    unlocked = [(name, line) for name, line in openings
                if "NETCDF4_PYTHON_LOCK" not in line and "netcdf_lock()" not in line]
    assert unlocked == []


def test_times_referenced_to_year_one_are_decoded_as_xarray_decodes_them(tmp_path):
    """eofs' hgt_djf.nc (NCEP-style times, "hours since 1-1-1" in the standard, mixed
    Julian-Gregorian calendar): netCDF4's conversion to Python dates refuses that
    reference date, xarray's CF coders decode it (as the build did). A report's look at
    a file's times (sources.held_times) gives xarray's dates, so such an archive's own
    fields are drawn (the file was skipped before, and every map fell back to the EOF
    reconstruction)."""
    path = str(shutil.copy(EOFS_HGT, tmp_path / "hgt.nc"))
    held, names = sources.held_times(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with xr.open_dataset(path) as dataset:
            expected = dataset["time"].values
    assert held is not None and np.array_equal(held.values, expected)
    assert {"time", "z"} <= names
    with netCDF4.Dataset(path) as handle, pytest.raises(ValueError, match="calendar"):
        time = handle["time"]
        netCDF4.num2date(time[:], time.units, time.calendar,
                         only_use_cftime_datetimes=False, only_use_python_datetimes=True)
    assert sources.held_times(str(tmp_path / "missing.nc")) == (None, frozenset())
