"""Tests of analogs.stages.sources: reading archives in several conventions into canonical form."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.interpolate import RegularGridInterpolator

from _sources_helpers import (LAT, LON, daily_times, era5_dataset, smooth_height,
                              smooth_humidity, write_demo_style, write_ncep_style)
from analogs.errors import AnalogsInputError
from analogs.stages.sources import normalise_grid, open_archive, open_target, regrid_to


def _height_file(path, values, *, times=None, attrs=None, level=None):
    """One `z` variable (time, lat, lon), with a scalar `level` (hPa) if given."""
    times = daily_times(periods=values.shape[0]) if times is None else times
    coords = {"time": times, "lat": LAT, "lon": LON}
    if level is not None:
        coords["level"] = ((), level, {"units": "hPa"})
    xr.Dataset({"z": (("time", "lat", "lon"), values, attrs or {})},
               coords=coords).to_netcdf(path)
    return path


# --------------------------------------------------------------------------- conventions

def test_demo_style_per_variable_per_year_files(tmp_path):
    times = daily_times("2001-12-20", periods=20)  # spans two years -> four files
    paths = write_demo_style(tmp_path, times)
    assert len(paths) == 4
    ds = open_archive(list(reversed(paths)))
    assert list(ds.data_vars) == ["z500", "q850"]
    assert ds["z500"].dims == ("time", "lat", "lon")
    assert ds["z500"].attrs["units"] == "gpm" and ds["q850"].attrs["units"] == "kg kg-1"
    assert ds["q850"].attrs["long_name"]
    assert ds["time"].dtype == np.dtype("datetime64[ns]")
    np.testing.assert_array_equal(ds["time"].values, times.values)
    np.testing.assert_allclose(ds["z500"].values, smooth_height(times))
    np.testing.assert_allclose(ds["q850"].values, smooth_humidity(times))


def test_directory_and_glob_are_expanded(tmp_path):
    times = daily_times("2001-12-30", periods=4)
    write_demo_style(tmp_path, times)
    by_dir = open_archive(tmp_path)
    by_glob = open_archive(str(tmp_path / "zg500_*.nc"))
    assert by_dir.sizes["time"] == 4 and list(by_glob.data_vars) == ["z500"]


def test_three_conventions_give_the_same_canonical_values(tmp_path):
    """Demo, ERA5-style and NCEP-style files of one state normalise identically.

    The geopotential of the ERA5-style file is height * g0 (g0 = 9.80665 m s-2,
    3rd CGPM 1901 / WMO); the reader must divide it back out.
    """
    times = daily_times(periods=6)
    (tmp_path / "demo").mkdir()
    (tmp_path / "ncep").mkdir()
    demo = open_archive(write_demo_style(tmp_path / "demo", times))
    era5_path = tmp_path / "era5.nc"
    era5_dataset(times).to_netcdf(era5_path)
    era5 = open_archive(era5_path)
    ncep = open_archive(write_ncep_style(tmp_path / "ncep", times))
    for ds in (era5, ncep):
        np.testing.assert_array_equal(ds["lat"].values, LAT)
        np.testing.assert_array_equal(ds["lon"].values, LON)
        np.testing.assert_array_equal(ds["time"].values, demo["time"].values)
        xr.testing.assert_allclose(ds["z500"], demo["z500"], rtol=1e-12)
        xr.testing.assert_allclose(ds["q850"], demo["q850"], rtol=1e-12)
    # Canonical reference computed outside the reader.
    np.testing.assert_allclose(era5["z500"].values, smooth_height(times), rtol=1e-12)


def test_geopotential_conversion_uses_standard_gravity(tmp_path):
    """54 000 m2 s-2 / 9.80665 m s-2 = 5506.46 gpm (g0 from the 3rd CGPM 1901 / WMO)."""
    values = np.full((1, LAT.size, LON.size), 54000.0)
    path = _height_file(tmp_path / "phi.nc", values,
                        attrs={"standard_name": "geopotential", "units": "m2 s-2"},
                        level=500.0)
    ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, 54000.0 / 9.80665)
    assert abs(float(ds["z500"][0, 0, 0]) - 5506.46) < 0.01


def test_dam_and_g_per_kg_are_converted(tmp_path):
    times = daily_times(periods=2)
    z = smooth_height(times)
    q = smooth_humidity(times)
    xr.Dataset({"gh": (("time", "lat", "lon"), z / 10.0, {"units": "dam"}),
                "q": (("time", "lat", "lon"), q * 1000.0, {"units": "g/kg"})},
               coords={"time": times, "lat": LAT, "lon": LON, "lev": ((), 500.0, {"units": "hPa"})}
               ).to_netcdf(tmp_path / "a.nc")
    # q has no 850 level stated here: the scalar lev=500 applies to both, so q fails.
    with pytest.raises(AnalogsInputError, match=r"no 850 hPa level in lev=\[500\]"):
        open_archive(tmp_path / "a.nc")
    ds = open_archive(tmp_path / "a.nc", fields=["z500"])
    np.testing.assert_allclose(ds["z500"].values, z)
    xr.Dataset({"shum850": (("time", "lat", "lon"), q * 1000.0, {"units": "g kg**-1"})},
               coords={"time": times, "lat": LAT, "lon": LON}).to_netcdf(tmp_path / "q.nc")
    ds = open_archive(tmp_path / "q.nc", fields=["q850"])
    np.testing.assert_allclose(ds["q850"].values, q)


def test_dewpoint_in_celsius_and_pwat(tmp_path):
    times = daily_times(periods=3)
    td_c = 20.0 * np.cos(np.radians(LAT))[None, :, None] + np.zeros((3, 1, LON.size))
    xr.Dataset({"d2m": (("time", "lat", "lon"), td_c, {"units": "degC"}),
                "tcwv": (("time", "lat", "lon"), td_c + 25.0, {"units": "mm"}),
                "hgt": (("time", "lat", "lon"), smooth_height(times), {"units": "m"})},
               coords={"time": times, "lat": LAT, "lon": LON}).to_netcdf(tmp_path / "s.nc")
    with pytest.warns(UserWarning, match="no pressure level; taken as 500 hPa"):
        ds = open_archive(tmp_path / "s.nc")
    assert list(ds.data_vars) == ["z500", "td2m"]  # preference q850 > td2m > pwat
    np.testing.assert_allclose(ds["td2m"].values, td_c + 273.15)  # 0 degC = 273.15 K (SI)
    ds = open_archive(tmp_path / "s.nc", fields=["pwat"])
    np.testing.assert_allclose(ds["pwat"].values, td_c + 25.0)
    assert ds["pwat"].attrs["units"] == "kg m-2"


def test_eofs_hgt_djf_opens_with_units_inference_warning():
    """eofs' shipped hgt_djf.nc: 65 DJF means of real 500 hPa height, no units attribute;
    its yearly step is said (each value is then taken for one day)."""
    eofs_examples = pytest.importorskip("eofs.examples")
    path = eofs_examples.example_data_path("hgt_djf.nc")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", xr.SerializationWarning)  # its reference date
        with pytest.warns(UserWarning) as record:
            ds = open_archive(path)
        raw = xr.open_dataset(path)
    messages = [str(warning.message) for warning in record]
    assert any("variable 'z' has no units; 'gpm' inferred" in m for m in messages)
    step = pd.Series(pd.DatetimeIndex(raw["time"].values)).diff().median().days  # pandas
    assert step == 365 and any(f"are {step} days apart (median step), not daily" in m
                               for m in messages)
    assert ds.sizes["time"] == 65
    assert ds["z500"].attrs["units"] == "gpm"
    np.testing.assert_array_equal(ds["lat"].values, np.sort(raw["latitude"].values))
    assert np.all(np.diff(ds["lon"].values) > 0) and ds["lon"].max() < 180
    # One sample per winter: passed through, not reduced to the 12 UTC hour.
    np.testing.assert_array_equal(ds["time"].values, raw["time"].values)
    expected = raw["z"].isel(pressure=0).sortby("latitude").values
    np.testing.assert_allclose(ds["z500"].values, expected)


def test_dask_backed_and_lazy(tmp_path):
    """With chunks and stated units, opening, daily means and subsetting read the data
    only once, for the missing-data census (NaN counts per day and per point, one
    reduction each call); the fields come back as dask arrays, nothing held in memory."""
    dask = pytest.importorskip("dask")
    times = daily_times(periods=10)
    paths = write_demo_style(tmp_path, times)
    era5_dataset(pd.date_range("2003-07-01", periods=12, freq="6h")).to_netcdf(tmp_path / "e.nc")
    computes = []

    def counting_scheduler(dsk, keys, **kwargs):
        computes.append(len(keys))
        return dask.get(dsk, keys, **kwargs)

    with dask.config.set(scheduler=counting_scheduler):
        ds = open_archive(paths, chunks={"time": 4})
        sub = open_archive(tmp_path / "e.nc", chunks={"time": 4}, daily="mean",
                           region=(0.0, 40.0, -100.0, 0.0))
    assert len(computes) == 2
    assert ds["z500"].chunks[0] == (4, 4, 2)
    assert isinstance(sub["q850"].data, dask.array.Array) and sub.sizes["time"] == 3
    np.testing.assert_allclose(ds["z500"].values, smooth_height(times))


def test_yearly_files_join_as_xarray_concat_in_float32_and_as_the_lazy_read(tmp_path):
    """Float32 yearly files listed out of order, one holding NaN and infinite values:
    the in-memory archive (the files copied into one preallocated array) holds exactly
    xarray's concatenation of the files sorted by time, stays float32, and equals the
    lazy (dask) read value for value, with the same missing-data report."""
    times = daily_times(start="2001-12-25", periods=12)
    z = smooth_height(times).astype(np.float32)
    z[2, 3, 4], z[9, 5, 6] = np.nan, np.inf
    paths = []
    for year in (2002, 2001):  # the later year first
        sel = np.flatnonzero(times.year == year)
        path = tmp_path / f"zg500_{year}.nc"
        xr.Dataset({"zg": (("time", "lat", "lon"), z[sel], {"units": "m"})},
                   coords={"time": times[sel], "lat": LAT, "lon": LON,
                           "plev": ((), 50000.0, {"units": "Pa"})}).to_netcdf(path)
        paths.append(path)
    reference = xr.concat([xr.open_dataset(p)["zg"] for p in paths], "time").sortby("time")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the NaN and Inf, filled and said
        eager = open_archive(paths)
        lazy = open_archive(paths, chunks={"time": 5})
    assert eager["z500"].dtype == np.float32 and eager["z500"].chunks is None
    np.testing.assert_array_equal(eager["time"].values, reference["time"].values)
    finite = np.isfinite(reference.values)
    np.testing.assert_array_equal(eager["z500"].values[finite], reference.values[finite])
    np.testing.assert_array_equal(eager["z500"].values, lazy["z500"].values)
    assert eager.attrs["missing_data"] == lazy.attrs["missing_data"]
    report = _missing_report(eager)
    assert report["n_infinite_values"] == 1 and report["n_values_filled"] == 2


# --------------------------------------------------------------------------- time handling

def _six_hourly(tmp_path):
    times = pd.date_range("2003-07-01", periods=4 * 5, freq="6h")
    z = smooth_height(times)
    path = tmp_path / "six.nc"
    xr.Dataset({"zg": (("time", "lat", "lon"), z, {"units": "m"})},
               coords={"time": times, "lat": LAT, "lon": LON, "plev": ((), 50000.0,
                                                                    {"units": "Pa"})}
               ).to_netcdf(path)
    return path, times, z


def test_sub_daily_instant_at_12_utc(tmp_path):
    path, times, z = _six_hourly(tmp_path)
    ds = open_archive(path, hour=12, daily="instant")
    noon = times.hour == 12
    np.testing.assert_array_equal(ds["time"].values, times[noon].values)
    np.testing.assert_allclose(ds["z500"].values, z[noon])


def test_sub_daily_daily_mean_matches_pandas_resample(tmp_path):
    """Daily mean against pandas' resample("1D").mean() (calendar days, UTC)."""
    path, times, z = _six_hourly(tmp_path)
    ds = open_archive(path, hour=12, daily="mean")
    point = pd.Series(z[:, 10, 20], index=times).resample("1D").mean()
    np.testing.assert_allclose(ds["z500"].values[:, 10, 20], point.values)
    np.testing.assert_array_equal(ds["time"].values,
                                  (point.index + pd.Timedelta(hours=12)).values)


def test_no_time_at_requested_hour(tmp_path):
    path, _, _ = _six_hourly(tmp_path)
    with pytest.raises(AnalogsInputError, match=r"six.nc fall on 03 UTC \(hours found: 00, 06, 12, 18\)"):
        open_archive(path, hour=3)


def test_daily_at_other_hour_is_kept_with_warning(tmp_path):
    times = daily_times(periods=4, hour=0)
    path = _height_file(tmp_path / "d.nc", smooth_height(times), times=times,
                        attrs={"units": "gpm"}, level=500.0)
    with pytest.warns(UserWarning, match="valid at 00 UTC, not 12 UTC") as record:
        ds = open_archive(path)
    np.testing.assert_array_equal(ds["time"].values, times.values)
    assert not any("not daily" in str(warning.message) for warning in record)


def test_duplicate_times_keep_first(tmp_path):
    times = daily_times(periods=4)
    z = smooth_height(times)
    first = _height_file(tmp_path / "a.nc", z, times=times, attrs={"units": "gpm"},
                         level=500.0)
    second = _height_file(tmp_path / "b.nc", z[2:] + 100.0, times=times[2:],
                          attrs={"units": "gpm"}, level=500.0)
    with pytest.warns(UserWarning, match="2 repeated time"):
        ds = open_archive([first, second])
    np.testing.assert_allclose(ds["z500"].values, z)


def test_region_subset(tmp_path):
    path = tmp_path / "era5.nc"
    era5_dataset(daily_times(periods=2)).to_netcdf(path)
    ds = open_archive(path, region=(20.0, 50.0, -130.0, -60.0))
    np.testing.assert_array_equal(ds["lat"].values, LAT[(LAT >= 20) & (LAT <= 50)])
    np.testing.assert_array_equal(ds["lon"].values, LON[(LON >= -130) & (LON <= -60)])
    across = open_archive(path, region=(0.0, 10.0, 170.0, -170.0))  # crosses 180
    np.testing.assert_array_equal(across["lon"].values, [-180.0, -175.0, -170.0, 170.0,
                                                         175.0])
    with pytest.raises(AnalogsInputError, match="selects no grid point"):
        open_archive(path, region=(21.0, 24.0, -130.0, -60.0))


# --------------------------------------------------------------------------- targets, regrid

def test_open_target_selects_one_time(tmp_path):
    times = daily_times(periods=3)
    path = tmp_path / "era5.nc"
    era5_dataset(times).to_netcdf(path)
    with pytest.raises(AnalogsInputError, match=r"holds 3 times from 2001-12-20T12:00 to 2001-12-22T12:00"):
        open_target(path)
    target = open_target(path, time="2001-12-21T12:00")
    assert target.sizes["time"] == 1
    np.testing.assert_allclose(target["z500"].values[0], smooth_height(times)[1])
    assert open_target(path, time="2001-12-22")["time"].values[0] == times.values[2]
    with pytest.raises(AnalogsInputError, match="no time matches '2002-01-05'"):
        open_target(path, time="2002-01-05")


def test_open_target_without_time(tmp_path):
    z = smooth_height(daily_times(periods=1))[0]
    xr.Dataset({"zg": (("lat", "lon"), z, {"units": "m"})},
               coords={"lat": LAT, "lon": LON, "plev": ((), 500.0, {"units": "hPa"})}
               ).to_netcdf(tmp_path / "t.nc")
    target = open_target(tmp_path / "t.nc")
    assert target.sizes["time"] == 1 and np.isnat(target["time"].values[0])
    np.testing.assert_allclose(target["z500"].values[0], z)


def test_regrid_half_degree_0_360_field_to_store_grid(tmp_path):
    """A 0.5-degree field (lon 0-360, lat descending, m2 s-2) back on a 2.5-degree grid.

    Reference: scipy.interpolate.RegularGridInterpolator (bilinear) on the same field,
    and the smooth analytic field itself within interpolation error.
    """
    fine_lat = np.arange(10.0, 70.01, 0.5)
    fine_lon = np.arange(0.0, 360.0, 0.5)
    when = daily_times(periods=1)
    z = smooth_height(when, fine_lat, fine_lon)[0]
    xr.Dataset({"z": (("latitude", "longitude"), z[::-1] * 9.80665,
                      {"standard_name": "geopotential", "units": "m**2 s**-2"})},
               coords={"latitude": fine_lat[::-1], "longitude": fine_lon,
                       "valid_time": when[0], "pressure_level": ((), 500.0,
                                                                 {"units": "hPa"})}
               ).to_netcdf(tmp_path / "fine.nc")
    target = open_target(tmp_path / "fine.nc")
    assert target["time"].values[0] == when.values[0]  # from the scalar valid_time
    store_lat = np.arange(20.0, 60.01, 2.5)
    store_lon = np.arange(-130.0, -59.9, 2.5)
    out = regrid_to(target, store_lat, store_lon)
    assert out["z500"].shape == (1, store_lat.size, store_lon.size)
    lon360 = np.mod(store_lon, 360.0)
    grid_lat, grid_lon = np.meshgrid(store_lat, lon360, indexing="ij")
    reference = RegularGridInterpolator((fine_lat, fine_lon), z)((grid_lat, grid_lon))
    np.testing.assert_allclose(out["z500"].values[0], reference, rtol=1e-10)
    exact = smooth_height(when, store_lat, store_lon)[0]
    assert np.abs(out["z500"].values[0] - exact).max() < 1.0  # gpm; bilinear error
    # Across the date line on a global grid: the periodic wrap keeps it defined.
    wrap = regrid_to(target, [30.0], [179.8, -179.8])
    assert np.all(np.isfinite(wrap["z500"].values))
    with pytest.raises(AnalogsInputError, match=r"covers lat 10 to 70.*needs lat 0 to 60"):
        regrid_to(target, np.arange(0.0, 60.1, 2.5), store_lon)


# --------------------------------------------------------------------------- errors

def test_missing_variable_names_files(tmp_path):
    times = daily_times(periods=2)
    paths = write_demo_style(tmp_path, times)
    zg_only = [p for p in paths if "zg500" in p.name]
    with pytest.raises(AnalogsInputError, match=r"field 'q850' not found in .*zg500_2001\.nc.*variables: zg500_2001\.nc: zg"):
        open_archive(zg_only, fields=["z500", "q850"])
    xr.Dataset({"t": (("time", "lat", "lon"), np.zeros((2, LAT.size, LON.size)))},
               coords={"time": times, "lat": LAT, "lon": LON}).to_netcdf(tmp_path / "t.nc")
    with pytest.raises(AnalogsInputError, match=r"no 500 hPa height variable .* in .*t\.nc"):
        with pytest.warns(UserWarning, match="no supported variable"):
            open_archive(tmp_path / "t.nc")


def test_unknown_units_with_ambiguous_magnitude(tmp_path):
    values = np.full((2, LAT.size, LON.size), 1500.0)  # neither gpm at 500 hPa nor m2 s-2
    path = _height_file(tmp_path / "u.nc", values, level=500.0)
    with pytest.raises(AnalogsInputError, match=r"u\.nc: variable 'z' has no units .*set its units attribute \(e\.g\. units='gpm'\)"):
        open_archive(path)
    # A furlong is a length (pint's registry: 201.168 m), so 1500 furlongs is 301.752 km:
    # refused by the plausibility gate, naming the units and the values they give.
    path = _height_file(tmp_path / "f.nc", values, attrs={"units": "furlongs"}, level=500.0)
    with pytest.raises(AnalogsInputError, match=r"f\.nc: variable 'z' has units 'furlongs', "
                       r"which give values of 3\.018e\+05 to 3\.018e\+05 gpm: outside the "
                       r"plausible range"):
        open_archive(path)
    path = _height_file(tmp_path / "x.nc", values, attrs={"units": "furlongz"}, level=500.0)
    with pytest.raises(AnalogsInputError, match=r"x\.nc: variable 'z' has unrecognised units "
                                                r"'furlongz'"):
        open_archive(path)


def test_inferred_geopotential_units_warn(tmp_path):
    values = smooth_height(daily_times(periods=2)) * 9.80665
    path = _height_file(tmp_path / "g.nc", values, level=500.0)
    with pytest.warns(UserWarning, match=r"g\.nc: variable 'z' has no units; 'm2 s-2' inferred"):
        ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, values / 9.80665)


def test_no_500_hpa_level(tmp_path):
    times = daily_times(periods=2)
    z = smooth_height(times)
    xr.Dataset({"z": (("time", "pressure_level", "lat", "lon"), np.stack([z, z], 1),
                      {"units": "gpm"})},
               coords={"time": times, "pressure_level": ("pressure_level", [850.0, 700.0],
                                                         {"units": "hPa"}),
                       "lat": LAT, "lon": LON}).to_netcdf(tmp_path / "l.nc")
    with pytest.raises(AnalogsInputError, match=r"l\.nc: variable 'z': no 500 hPa level in pressure_level=\[850, 700\]"):
        open_archive(tmp_path / "l.nc")


def test_height_without_level_at_other_magnitude(tmp_path):
    values = smooth_height(daily_times(periods=2)) - 4000.0  # like an 850 hPa height
    path = _height_file(tmp_path / "h.nc", values, attrs={"units": "m"})
    with pytest.raises(AnalogsInputError, match=r"h\.nc: variable 'z' has no pressure level .*do not look like 500 hPa"):
        open_archive(path)


def test_level_in_pa_without_units_is_inferred(tmp_path):
    values = smooth_height(daily_times(periods=2))
    path = tmp_path / "p.nc"
    xr.Dataset({"z": (("time", "plev", "lat", "lon"), values[:, None], {"units": "m"})},
               coords={"time": daily_times(periods=2), "plev": [50000.0], "lat": LAT,
                       "lon": LON}).to_netcdf(path)
    with pytest.warns(UserWarning, match=r"level coordinate 'plev' has no units; taken as Pa"):
        ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, values)


def test_non_netcdf_and_truncated_files(tmp_path):
    text = tmp_path / "notes.nc"
    text.write_text("time,lat,lon\n")
    with pytest.raises(AnalogsInputError, match=r"notes\.nc: not a NetCDF file"):
        open_archive(text)
    values = smooth_height(daily_times(periods=30))
    for fmt in ("NETCDF4", "NETCDF3_64BIT"):
        full = tmp_path / f"full_{fmt}.nc"
        xr.Dataset({"z": (("time", "lat", "lon"), values, {"units": "gpm"})},
                   coords={"time": daily_times(periods=30), "lat": LAT, "lon": LON,
                           "level": ((), 500.0, {"units": "hPa"})}).to_netcdf(full, format=fmt)
        cut = tmp_path / f"cut_{fmt}.nc"
        cut.write_bytes(full.read_bytes()[: full.stat().st_size // 2])
        with pytest.raises(AnalogsInputError, match=rf"cut_{fmt}\.nc: .*truncated"):
            open_archive(cut)
    with pytest.raises(AnalogsInputError, match=r"absent\.nc: no such file"):
        open_archive(tmp_path / "absent.nc")


def test_missing_latitude(tmp_path):
    xr.Dataset({"z": (("time", "row", "lon"), np.full((1, 3, LON.size), 5500.0),
                      {"units": "gpm"})},
               coords={"time": daily_times(periods=1), "lon": LON, "level": ((), 500.0, {"units": "hPa"})}
               ).to_netcdf(tmp_path / "nolat.nc")
    with pytest.raises(AnalogsInputError, match=r"nolat\.nc: variable 'z' has no latitude coordinate"):
        open_archive(tmp_path / "nolat.nc")


def test_scalar_time_per_file(tmp_path):
    """Daily files holding one time each as a scalar coordinate join into one archive."""
    times = daily_times(periods=3)
    z = smooth_height(times)
    paths = []
    for i, when in enumerate(times):
        path = tmp_path / f"day{i}.nc"
        xr.Dataset({"hgt": (("lat", "lon"), z[i], {"units": "gpm"})},
                   coords={"time": when, "lat": LAT, "lon": LON,
                           "level": ((), 500.0, {"units": "hPa"})}).to_netcdf(path)
        paths.append(path)
    ds = open_archive(paths[::-1])
    np.testing.assert_array_equal(ds["time"].values, times.values)
    np.testing.assert_allclose(ds["z500"].values, z)


def test_projected_grid_is_refused(tmp_path):
    y, x = np.arange(3) * 1e5, np.arange(4) * 1e5
    lat2d = 30.0 + np.add.outer(y, x) / 1e6
    xr.Dataset({"z": (("time", "y", "x"), np.full((1, 3, 4), 5500.0), {"units": "gpm"})},
               coords={"time": daily_times(periods=1), "level": ((), 500.0, {"units": "hPa"}),
                       "y": ("y", y, {"units": "m"}), "x": ("x", x, {"units": "m"}),
                       "lat": (("y", "x"), lat2d), "lon": (("y", "x"), lat2d - 120.0)}
               ).to_netcdf(tmp_path / "lcc.nc")
    with pytest.raises(AnalogsInputError, match=r"lcc\.nc: variable 'z': latitude 'lat' is 2-D"):
        open_archive(tmp_path / "lcc.nc")


def test_missing_time(tmp_path):
    xr.Dataset({"z": (("lat", "lon"), np.full((LAT.size, LON.size), 5500.0),
                      {"units": "gpm"})},
               coords={"lat": LAT, "lon": LON, "level": ((), 500.0, {"units": "hPa"})}).to_netcdf(tmp_path / "nt.nc")
    with pytest.raises(AnalogsInputError, match=r"nt\.nc: variable 'z' has no time dimension"):
        open_archive(tmp_path / "nt.nc")


def test_bad_options():
    with pytest.raises(AnalogsInputError, match="'daily' parameter of open_archive"):
        open_archive("x.nc", daily="median")
    with pytest.raises(AnalogsInputError, match="'fields' parameter of open_archive"):
        open_archive("x.nc", fields=["t2m"])
    with pytest.raises(AnalogsInputError, match="'region' parameter"):
        open_archive("x.nc", region=(50.0, 20.0, 0.0, 10.0))


# --------------------------------------------------------------------------- property test

@settings(max_examples=40, deadline=None)
@given(nlat=st.integers(2, 7), nlon=st.integers(2, 9), step=st.sampled_from([1.0, 2.5, 5.0]),
       start=st.floats(-180.0, 180.0), convention=st.sampled_from(["-180", "0-360", "raw"]),
       reverse_lat=st.booleans(), seed=st.integers(0, 2 ** 16), shuffle_lon=st.booleans())
def test_normalise_grid_property(nlat, nlon, step, start, convention, reverse_lat, seed,
                                 shuffle_lon):
    """Any lon convention / ordering: lat ascends, lon ascends in [-180, 180), values kept."""
    rng = np.random.default_rng(seed)
    lat = np.sort(rng.choice(np.arange(-89.0, 90.0, 1.0), size=nlat, replace=False))
    lon = (round(start) + step * np.arange(nlon)) % 360.0
    if convention == "-180":
        lon = (lon + 180.0) % 360.0 - 180.0
    elif convention == "raw":
        lon = lon + 360.0 * rng.integers(-1, 2, size=nlon)
    values = rng.normal(size=(nlat, nlon))
    lat_in = lat[::-1] if reverse_lat else lat
    vals_in = values[::-1] if reverse_lat else values
    order = rng.permutation(nlon) if shuffle_lon else np.arange(nlon)
    da = xr.DataArray(vals_in[:, order], dims=("lat", "lon"),
                      coords={"lat": lat_in, "lon": lon[order]})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # non-monotonic input warns
        out = normalise_grid(da)
    assert np.all(np.diff(out["lat"].values) > 0)
    assert np.all(np.diff(out["lon"].values) > 0)
    assert out["lon"].min() >= -180.0 and out["lon"].max() < 180.0
    # Each value is still attached to its (lat, lon) location (common practice, no source).
    expected = {(la, (lo + 180.0) % 360.0 - 180.0): values[i, j]
                for i, la in enumerate(lat) for j, lo in enumerate(lon)}
    for i, la in enumerate(out["lat"].values):
        for j, lo in enumerate(out["lon"].values):
            assert out.values[i, j] == expected[(la, lo)]


def test_irregular_and_unsorted_latitude(tmp_path):
    """Gaussian-like uneven spacing is kept; a shuffled latitude is sorted with a warning."""
    lat = np.array([-60.0, -31.0, -2.5, 0.0, 28.7, 61.0])
    shuffled = lat[[0, 2, 1, 3, 5, 4]]
    times = daily_times(periods=2)
    z = smooth_height(times, lat, LON)
    xr.Dataset({"hgt": (("time", "lat", "lon"), z[:, [0, 2, 1, 3, 5, 4]], {"units": "gpm"})},
               coords={"time": times, "lat": shuffled, "lon": LON,
                       "level": ((), 500.0, {"units": "hPa"})}).to_netcdf(tmp_path / "g.nc")
    with pytest.warns(UserWarning, match=r"g\.nc: latitude is not monotonic; it is sorted"):
        ds = open_archive(tmp_path / "g.nc")
    np.testing.assert_array_equal(ds["lat"].values, lat)
    np.testing.assert_allclose(ds["z500"].values, z)


def test_regional_0_360_grid_across_greenwich_needs_no_warning():
    """Longitudes 350, 355, 0, 5 (0-360 convention) roll to -10, -5, 0, 5 silently."""
    da = xr.DataArray(np.arange(8.0).reshape(2, 4), dims=("lat", "lon"),
                      coords={"lat": [10.0, 20.0], "lon": [350.0, 355.0, 0.0, 5.0]})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = normalise_grid(da)
    np.testing.assert_array_equal(out["lon"].values, [-10.0, -5.0, 0.0, 5.0])
    np.testing.assert_array_equal(out.values, da.values)


# --------------------------------------------------------------------------- missing data

def _missing_report(ds):
    import json
    return json.loads(ds.attrs["missing_data"])


def _gappy_height(tmp_path, edit, periods=12):
    """A height file (gpm, 500 hPa) of ``periods`` days after ``edit(z)`` in place."""
    times = daily_times(periods=periods)
    z = smooth_height(times)
    edit(z)
    return _height_file(tmp_path / "gappy.nc", z, times=times, attrs={"units": "gpm"},
                        level=500.0), times, smooth_height(times)


def test_clean_archive_reports_nothing_done(tmp_path):
    path, times, z = _gappy_height(tmp_path, lambda z: None)
    report = _missing_report(open_archive(path))
    assert report == {"days_dropped": [], "n_days_dropped": 0, "n_values_filled": 0,
                      "n_values_filled_in_time": 0, "n_values_filled_in_space": 0,
                      "n_infinite_values": 0, "n_missing_calendar_days": 0,
                      "all_nan_points": 0, "n_duplicate_times_dropped": 0}


def test_all_nan_day_and_mostly_nan_day_are_dropped(tmp_path):
    def edit(z):
        z[3] = np.nan                      # every point missing
        z[7, :, : z.shape[2] // 2] = np.nan  # half the points missing (> 10 %)
    path, times, z = _gappy_height(tmp_path, edit)
    with pytest.warns(UserWarning, match="2 day.s. dropped"):
        ds = open_archive(path)
    kept = np.delete(np.arange(len(times)), [3, 7])
    np.testing.assert_array_equal(ds["time"].values, times[kept].values)
    np.testing.assert_allclose(ds["z500"].values, z[kept])
    report = _missing_report(ds)
    assert report["n_days_dropped"] == 2 and report["n_values_filled"] == 0
    assert report["days_dropped"] == [f"{times[3]:%Y-%m-%d}", f"{times[7]:%Y-%m-%d}"]


def test_isolated_gaps_are_filled_linearly_in_time(tmp_path):
    """Filled values equal numpy.interp between the neighbouring valid days (linear
    interpolation in time; common practice, no source)."""
    def edit(z):
        z[4, 10, 20] = np.nan              # one day
        z[6:8, 12, 30] = np.nan            # two consecutive days: max_gap_days=2
    path, times, z = _gappy_height(tmp_path, edit)
    with pytest.warns(UserWarning, match="3 value.s. filled"):
        ds = open_archive(path)
    assert ds.sizes["time"] == len(times)
    days = np.arange(len(times), dtype=float)
    for (lat_i, lon_i), gap in (((10, 20), [4]), ((12, 30), [6, 7])):
        valid = np.setdiff1d(np.arange(len(times)), gap)
        expected = np.interp(days[gap], days[valid], z[valid, lat_i, lon_i])
        np.testing.assert_allclose(ds["z500"].values[gap, lat_i, lon_i], expected, rtol=1e-6)
    assert _missing_report(ds)["n_values_filled"] == 3


def test_long_gap_and_edge_gaps_are_filled_in_space_and_cost_no_day(tmp_path):
    """A point missing for longer than max_gap_days, or on the first day (no earlier
    value to interpolate from), is filled from its neighbours on the same day: no day is
    dropped for a few points (issue 13: two missing points at the start of a real archive
    cost four of five days). Each filled value is the mean of its four neighbours (the
    five-point discrete Laplace equation; common practice, no source)."""
    def edit(z):
        z[3:6, 10, 20] = np.nan   # three days > max_gap_days
        z[0, 5, 5] = np.nan       # first day: no earlier value to interpolate from
    path, times, z = _gappy_height(tmp_path, edit)
    with pytest.warns(UserWarning, match=r"0 day.s. dropped, 4 value.s. filled \(z500: 4 at "
                      r"2 grid point.s. \(lat -65, lon -155; lat -40, lon -80\) on 4 days between "
                      r"2001-12-20 and 2001-12-25, 0 by linear interpolation in time and 4 from the "
                      r"neighbouring grid points\)"):
        ds = open_archive(path)
    np.testing.assert_array_equal(ds["time"].values, times.values)
    assert not np.isnan(ds["z500"].values).any()
    for day, row, col in ((0, 5, 5), (3, 10, 20), (4, 10, 20), (5, 10, 20)):
        neighbours = z[day, [row - 1, row + 1, row, row], [col, col, col - 1, col + 1]]
        assert ds["z500"].values[day, row, col] == pytest.approx(neighbours.mean(), rel=1e-6)
    report = _missing_report(ds)
    assert report["n_values_filled_in_space"] == 4 and report["n_days_dropped"] == 0
    assert report["fields"]["z500"]["points_filled"] == 2
    # With a longer allowance the three-day gap is filled in time instead.
    with pytest.warns(UserWarning, match=r"0 day.s. dropped, 4 value.s. filled .*3 by linear "
                                         r"interpolation in time and 1 from"):
        wider = open_archive(path, max_gap_days=3)
    assert wider.sizes["time"] == len(times)


def test_land_sea_mask_points_stay_nan_and_do_not_drop_days(tmp_path):
    def edit(z):
        z[:, :6, :] = np.nan  # a third of the grid missing on every day
    path, times, z = _gappy_height(tmp_path, edit)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ds = open_archive(path)
    assert ds.sizes["time"] == len(times)
    assert np.isnan(ds["z500"].values[:, :6]).all()
    assert _missing_report(ds)["all_nan_points"] == 6 * LON.size


def test_missing_calendar_days_are_counted_not_invented(tmp_path):
    times = daily_times(periods=10).delete([2, 3, 8])
    path = _height_file(tmp_path / "holes.nc", smooth_height(times), times=times,
                        attrs={"units": "gpm"}, level=500.0)
    ds = open_archive(path)
    np.testing.assert_array_equal(ds["time"].values, times.values)
    assert _missing_report(ds)["n_missing_calendar_days"] == 3


def test_non_monotonic_time_is_sorted_with_warning(tmp_path):
    times = daily_times(periods=6)
    order = np.array([0, 3, 1, 2, 5, 4])
    z = smooth_height(times)
    path = _height_file(tmp_path / "shuffled.nc", z[order], times=times[order],
                        attrs={"units": "gpm"}, level=500.0)
    with pytest.warns(UserWarning, match="time of z500 is not monotonic; it is sorted"):
        ds = open_archive(path)
    np.testing.assert_array_equal(ds["time"].values, times.values)
    np.testing.assert_allclose(ds["z500"].values, z)


def test_duplicate_times_are_counted_in_the_report(tmp_path):
    times = daily_times(periods=5)
    repeated = times.insert(2, times[1])
    z = smooth_height(repeated)
    path = _height_file(tmp_path / "dup.nc", z, times=repeated, attrs={"units": "gpm"},
                        level=500.0)
    with pytest.warns(UserWarning, match="1 repeated time"):
        ds = open_archive(path)
    assert _missing_report(ds)["n_duplicate_times_dropped"] == 1
    np.testing.assert_array_equal(ds["time"].values, times.values)


def test_every_value_missing_is_refused(tmp_path):
    path, _, _ = _gappy_height(tmp_path, lambda z: z.fill(np.nan))
    with pytest.raises(AnalogsInputError, match=r"gappy\.nc: variable 'z' \(z500\): every value "
                                                r"is missing \(NaN or infinite\)"):
        open_archive(path)


def test_every_day_too_gappy_is_refused(tmp_path):
    def edit(z):
        for day in range(z.shape[0]):  # 5 of 37 latitude rows (14 %), a different band each day
            z[day, 3 * day: 3 * day + 5] = np.nan
    path, _, _ = _gappy_height(tmp_path, edit)
    with pytest.raises(AnalogsInputError, match=r"gappy\.nc: every day has more than 0\.1 of "
                       r"its grid points missing \(NaN or infinite\): z500 "
                       r"\(11% to 14% of its 2664 grid points on 12 day\(s\)\); no day is usable"):
        open_archive(path)


def test_missing_data_options_are_checked(tmp_path):
    path, _, _ = _gappy_height(tmp_path, lambda z: None)
    with pytest.raises(AnalogsInputError, match="'max_missing_fraction' parameter of "
                                                "open_archive must be a number >= 0.0"):
        open_archive(path, max_missing_fraction=1.5)
    with pytest.raises(AnalogsInputError, match="'max_gap_days' parameter"):
        open_archive(path, max_gap_days=-1)


def test_dask_fill_matches_in_memory_fill(tmp_path):
    def edit(z):
        z[4, 10, 20] = np.nan
        z[9] = np.nan
    path, _, _ = _gappy_height(tmp_path, edit)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        eager = open_archive(path)
        lazy = open_archive(path, chunks={"time": 3})
    assert lazy["z500"].chunks is not None
    np.testing.assert_allclose(lazy["z500"].values, eager["z500"].values)
    assert lazy.attrs["missing_data"] == eager.attrs["missing_data"]


@settings(max_examples=60, deadline=None)
@given(n_days=st.integers(3, 25), seed=st.integers(0, 10_000),
       nan_share=st.sampled_from([0.0, 0.02, 0.1, 0.3]), max_gap=st.integers(0, 3),
       mask_rows=st.integers(0, 2))
def test_missing_data_policy_property(n_days, seed, nan_share, max_gap, mask_rows):
    """Whatever the NaN pattern: exactly the days missing more than max_missing_fraction
    of the grid points outside the all-NaN mask are dropped (the rule, recounted here);
    no NaN is left outside the mask; values that were present are unchanged; filled
    values lie within the range of the valid values (linear interpolation in time and the
    Laplace fill in space are both averages, which cannot overshoot); and the report adds
    up."""
    from analogs.stages.sources import apply_missing_data_policy
    rng = np.random.default_rng(seed)
    times = daily_times(periods=n_days)
    lat, lon = LAT[:6], LON[:5]
    z = smooth_height(times, lat, lon)
    z[rng.random(z.shape) < nan_share] = np.nan
    z[:, :mask_rows] = np.nan
    ds = xr.Dataset({"z500": (("time", "lat", "lon"), z)},
                    coords={"time": times, "lat": lat, "lon": lon})
    mask = np.isnan(z).all(axis=0)
    share = (np.isnan(z) & ~mask).sum(axis=(1, 2)) / max(int((~mask).sum()), 1)
    expected_kept = np.flatnonzero((share <= 0.1) & (share < 1.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        try:
            out, report = apply_missing_data_policy(ds, max_gap_days=max_gap)
        except AnalogsInputError as error:
            assert ("every day" in str(error) and expected_kept.size == 0) or (
                "every value" in str(error) and mask.all())
            return
    kept = np.flatnonzero(np.isin(times.values, out["time"].values))
    np.testing.assert_array_equal(kept, expected_kept)
    values, original = out["z500"].values, z[kept]
    assert not np.isnan(values[:, ~mask]).any()
    assert np.isnan(values[:, mask]).all()
    present = ~np.isnan(original)
    np.testing.assert_array_equal(values[present], original[present])
    filled_values = values[~present & ~mask[None]]
    assert np.all(filled_values >= original[present].min() - 1e-6)
    assert np.all(filled_values <= original[present].max() + 1e-6)
    assert report["n_days_dropped"] + out.sizes["time"] == n_days
    filled = int((~present & ~np.isnan(values)).sum())
    assert report["n_values_filled"] == filled
    assert report["n_values_filled_in_time"] + report["n_values_filled_in_space"] == filled
    assert report["all_nan_points"] == int(mask.sum())


# --------------------------------------------------------------------------- level axes (15a)

def _two_level_file(path, dim, levels, attrs, *, scale=1.0):
    """z (m) and q on one vertical axis ``dim`` holding 500 and 850 hPa (in ``levels``
    order, in units of ``attrs``); q at 500 hPa and z at 850 hPa are decoys."""
    times = daily_times(periods=2)
    z, q = smooth_height(times), smooth_humidity(times)
    order = [500.0, 850.0] if levels[0] * scale == 500.0 else [850.0, 500.0]
    zs = np.stack([z if lev == 500.0 else z - 4000.0 for lev in order], 1)
    qs = np.stack([q if lev == 850.0 else q / 3.0 for lev in order], 1)
    xr.Dataset({"zg": (("time", dim, "lat", "lon"), zs, {"units": "m"}),
                "hus": (("time", dim, "lat", "lon"), qs, {"units": "kg kg-1"})},
               coords={"time": times, dim: (dim, levels, attrs), "lat": LAT, "lon": LON}
               ).to_netcdf(path)
    return path, z, q


@pytest.mark.parametrize("dim, levels, attrs, scale", [
    ("isobaric", [50000.0, 85000.0], {"units": "Pa"}, 0.01),  # netCDF-Java names
    ("isobaricInhPa", [850.0, 500.0], {"units": "hPa", "positive": "down",
                                       "stored_direction": "decreasing"}, 1.0),  # cfgrib
    ("lev_2", [500.0, 850.0], {"axis": "Z", "units": "hPa"}, 1.0),  # CDO's second axis
    ("vertical", [50.0, 85.0], {"axis": "Z", "units": "kPa"}, 10.0),  # by units alone
    ("p", [85000.0, 50000.0], {"positive": "down", "units": "Pa"}, 0.01),
    ("level", [500.0, 850.0], {"units": "millibars"}, 1.0),
])
def test_pressure_axes_are_recognised_by_attributes_and_units(tmp_path, dim, levels, attrs,
                                                               scale):
    """A pressure axis is recognised by its CF attributes and its units (hPa, Pa, mbar,
    kPa read through the unit registry), whatever its name, and the 500 hPa height and
    850 hPa humidity are taken from it (values written, common practice, no source)."""
    path, z, q = _two_level_file(tmp_path / "l.nc", dim, levels, attrs, scale=scale)
    ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, z)
    np.testing.assert_allclose(ds["q850"].values, q)


def test_cdo_second_level_axis(tmp_path):
    """CDO writes a second vertical axis ``plev_2`` (``axis: Z``, Pa) when variables are
    on different levels: each field finds its own."""
    times = daily_times(periods=2)
    z, q = smooth_height(times), smooth_humidity(times)
    z_axis = {"axis": "Z", "units": "Pa", "standard_name": "air_pressure"}
    xr.Dataset({"zg": (("time", "plev", "lat", "lon"), np.stack([z - 1500.0, z], 1),
                       {"units": "m"}),
                "hus": (("time", "plev_2", "lat", "lon"), q[:, None], {"units": "kg kg-1"})},
               coords={"time": times, "plev": ("plev", [70000.0, 50000.0], z_axis),
                       "plev_2": ("plev_2", [85000.0], z_axis), "lat": LAT, "lon": LON}
               ).to_netcdf(tmp_path / "cdo.nc")
    ds = open_archive(tmp_path / "cdo.nc")
    np.testing.assert_allclose(ds["z500"].values, z)
    np.testing.assert_allclose(ds["q850"].values, q)


@pytest.mark.parametrize("attrs", [{"units": "m", "positive": "up"}, {"units": "level"},
                                   {"standard_name": "model_level_number", "axis": "Z"},
                                   {"units": "km"}])
def test_vertical_axes_that_are_not_pressure_are_not_taken_as_levels(tmp_path, attrs):
    """A ``lev`` axis of heights or model level numbers is not a pressure axis, whatever
    its name: its two levels are an extra dimension (refused), not 500 and 850 hPa."""
    times = daily_times(periods=2)
    z = smooth_height(times)
    xr.Dataset({"zg": (("time", "lev", "lat", "lon"), np.stack([z, z], 1), {"units": "m"})},
               coords={"time": times, "lev": ("lev", [500.0, 850.0], attrs),
                       "lat": LAT, "lon": LON}).to_netcdf(tmp_path / "h.nc")
    with pytest.raises(AnalogsInputError, match=r"h\.nc: variable 'zg' has extra dimension\(s\)"
                                                r" lev"):
        open_archive(tmp_path / "h.nc")


# --------------------------------------------------------------------------- curvilinear (15a)

def _analytic_height(lat, lon):
    """A smooth 500 hPa height (gpm) at any latitude / longitude (degrees)."""
    phi, lam = np.radians(lat), np.radians(lon)
    return (5500.0 + 300.0 * np.cos(phi) ** 2
            + 80.0 * np.cos(phi) * np.sin(3.0 * lam) * np.sin(2.0 * phi) ** 2)


def _lambert_file(path, *, spacing=60000.0, centre=-97.0):
    """A regional-model file on a Lambert conformal grid computed by pyproj (standard
    parallels 33 and 45 N, centred on ``centre`` degrees east): x / y in metres, 2-D
    latitude / longitude, a grid_mapping variable, and an analytic 500 hPa height at
    every point."""
    pyproj = pytest.importorskip("pyproj")
    lcc = pyproj.Proj(proj="lcc", lat_1=33.0, lat_2=45.0, lat_0=39.0, lon_0=centre,
                      R=6371229.0)
    x = np.arange(-2600e3, 2600e3 + 1, spacing)
    y = np.arange(-1700e3, 1700e3 + 1, spacing)
    lon2d, lat2d = lcc(*np.meshgrid(x, y), inverse=True)
    xr.Dataset(
        {"z": (("time", "y", "x"), _analytic_height(lat2d, lon2d)[None],
               {"units": "gpm", "grid_mapping": "lambert"}),
         "lambert": ((), 0, {"grid_mapping_name": "lambert_conformal_conic",
                             "standard_parallel": [33.0, 45.0],
                             "longitude_of_central_meridian": centre,
                             "latitude_of_projection_origin": 39.0})},
        coords={"time": daily_times(periods=1), "level": ((), 500.0, {"units": "hPa"}),
                "y": ("y", y, {"units": "m", "standard_name": "projection_y_coordinate"}),
                "x": ("x", x, {"units": "m", "standard_name": "projection_x_coordinate"}),
                "lat": (("y", "x"), lat2d, {"units": "degrees_north"}),
                "lon": (("y", "x"), lon2d, {"units": "degrees_east"})}).to_netcdf(path)
    return path, lat2d, lon2d


def test_lambert_conformal_target_is_regridded_by_triangulation(tmp_path, monkeypatch):
    """A Lambert conformal field (grid computed by pyproj) comes back on a regular 1-degree
    grid within 0.05 gpm of the analytic function it was written from (the error of
    linear interpolation on a 60 km grid); store points outside the Lambert domain are
    NaN with ``partial`` and refused without. Triangulating only each target point's
    nearest source points gives the same values as triangulating every point."""
    from analogs.stages import sources
    path, lat2d, lon2d = _lambert_file(tmp_path / "lcc.nc")
    target = open_target(path)
    assert target["z500"].dims == ("time", "y", "x")
    np.testing.assert_allclose(target["lat"].values, lat2d)
    store_lat, store_lon = np.arange(25.0, 50.1, 1.0), np.arange(-120.0, -74.9, 1.0)
    out = regrid_to(target, store_lat, store_lon)
    exact = _analytic_height(*np.meshgrid(store_lat, store_lon, indexing="ij"))
    assert np.abs(out["z500"].values[0] - exact).max() < 0.05
    monkeypatch.setattr(sources, "_NEIGHBOURS", 10**9)  # every source point
    everything = regrid_to(target, store_lat, store_lon)
    np.testing.assert_allclose(out["z500"].values, everything["z500"].values, rtol=1e-12)
    monkeypatch.undo()
    wide_lon = np.arange(-150.0, -74.9, 1.0)
    with pytest.raises(AnalogsInputError, match=r"lcc\.nc: a curvilinear grid over lat .* "
                                                r"leaves \d+ of the \d+ points"):
        regrid_to(target, store_lat, wide_lon)
    partial = regrid_to(target, store_lat, wide_lon, partial=True)["z500"].values[0]
    assert np.isnan(partial[:, wide_lon < -135.0]).all()
    assert not np.isnan(partial[:, wide_lon >= -120.0]).any()
    # A domain across the date line (centred on 180 E): no seam in the interpolation.
    path, _, _ = _lambert_file(tmp_path / "pacific.nc", centre=180.0)
    pacific_lon = np.arange(160.0, 200.1, 1.0)
    out = regrid_to(open_target(path), store_lat, pacific_lon)
    exact = _analytic_height(*np.meshgrid(store_lat, pacific_lon, indexing="ij"))
    assert np.abs(out["z500"].values[0] - exact).max() < 0.05


# --------------------------------------------------------------------------- moisture (15a)

def test_moisture_conversions_against_metpy():
    """Dewpoint, relative humidity and temperature to specific humidity and back at a
    stated pressure (Bolton 1980 saturation vapour pressure; e = q p / (eps + (1 - eps) q),
    eps = 0.622). Reference: MetPy ``specific_humidity_from_dewpoint``,
    ``dewpoint_from_relative_humidity`` (MetPy >= 1.7 computes the saturation vapour
    pressure after Ambaum 2020: within 0.5 % in q and 0.1 K in dewpoint from -40 to 35
    degC), ``dewpoint_from_specific_humidity`` and ``dewpoint`` (Bolton's inverse on both
    sides: within 0.01 K, the difference being MetPy's eps = 0.62196)."""
    mpcalc = pytest.importorskip("metpy.calc")
    units = pytest.importorskip("metpy.units").units
    from analogs.stages import humidity
    dewpoint = np.linspace(-40.0, 30.0, 71) + 273.15
    for pressure in (1000.0, 850.0, 700.0):
        ours = humidity.specific_humidity_from_dewpoint(dewpoint, pressure)
        reference = mpcalc.specific_humidity_from_dewpoint(pressure * units.hPa,
                                                           dewpoint * units.K).to("kg/kg").m
        np.testing.assert_allclose(ours, reference, rtol=5e-3)
        back = humidity.dewpoint_from_specific_humidity(ours, pressure)
        np.testing.assert_allclose(back, dewpoint, rtol=1e-12)  # exact inverse
        reference = mpcalc.dewpoint_from_specific_humidity(pressure * units.hPa,
                                                           ours * units("kg/kg")).to("K").m
        np.testing.assert_allclose(back, reference, atol=0.01)
    temperature = (np.linspace(-30.0, 35.0, 27) + 273.15)[:, None]
    rh = np.linspace(0.05, 1.0, 20)[None, :]
    ours = humidity.dewpoint_from_relative_humidity(temperature, rh)
    reference = mpcalc.dewpoint_from_relative_humidity(temperature * units.K,
                                                       rh * units.dimensionless).to("K").m
    np.testing.assert_allclose(ours, reference, atol=0.1)
    np.testing.assert_allclose(ours[:, -1], temperature[:, 0], rtol=1e-12)  # saturated
    q = humidity.specific_humidity_from_relative_humidity(temperature, rh, 850.0)
    np.testing.assert_allclose(q, humidity.specific_humidity_from_dewpoint(ours, 850.0),
                               rtol=1e-12)
    # Bolton (1980), eq. 10 at 0 degC: es = 6.112 hPa (the formula's constant).
    assert humidity.saturation_vapour_pressure(273.15) == pytest.approx(6.112)
    e = np.linspace(0.5, 40.0, 30)
    np.testing.assert_allclose(humidity.dewpoint_from_vapour_pressure(e),
                               mpcalc.dewpoint(e * units.hPa).to("K").m, atol=1e-9)


def test_store_moisture_from_dewpoint_or_humidity_and_temperature(tmp_path):
    """A file without q850 gives it from the 850 hPa dewpoint (degC, on a pressure axis
    with other levels) or from 850 hPa relative humidity (%) and temperature; one
    without td2m gives it from 2 m relative humidity and temperature or from 2 m
    specific humidity and surface pressure (Pa). Reference: MetPy (tolerances as in
    :func:`test_moisture_conversions_against_metpy`). A file that holds q850 keeps it."""
    mpcalc = pytest.importorskip("metpy.calc")
    units = pytest.importorskip("metpy.units").units
    times = daily_times(periods=3)
    z, q = smooth_height(times), smooth_humidity(times)
    dewpoint = mpcalc.dewpoint_from_specific_humidity(850.0 * units.hPa,
                                                      q * units("kg/kg")).to("degC").m
    temperature = dewpoint + 4.0
    rh = mpcalc.relative_humidity_from_dewpoint(temperature * units.degC,
                                                dewpoint * units.degC).to("percent").m
    levels = ("plev", [100000.0, 85000.0, 70000.0], {"units": "Pa"})
    base = {"time": times, "lat": LAT, "lon": LON}
    on_levels = lambda a: np.stack([a + 5.0, a, a - 8.0], 1)  # noqa: E731
    dims = ("time", "plev", "lat", "lon")
    z_var = {"zg500": (("time", "lat", "lon"), z, {"units": "m"})}
    xr.Dataset({**z_var, "dpt": (dims, on_levels(dewpoint), {"units": "degC"})},
               coords={**base, "plev": levels}).to_netcdf(tmp_path / "td.nc")
    with pytest.warns(UserWarning, match=r"td\.nc: q850 computed from dewpoint 'dpt'"):
        ds = open_archive(tmp_path / "td.nc")
    assert list(ds.data_vars) == ["z500", "q850"]
    np.testing.assert_allclose(ds["q850"].values, q, rtol=5e-3)
    reference = mpcalc.specific_humidity_from_dewpoint(850.0 * units.hPa,
                                                       dewpoint * units.degC).to("kg/kg").m
    np.testing.assert_allclose(ds["q850"].values, reference, rtol=5e-3)

    xr.Dataset({**z_var, "r": (dims, on_levels(rh), {"units": "%",
                                                     "standard_name": "relative_humidity"}),
                "t": (dims, on_levels(temperature + 273.15), {"units": "K"})},
               coords={**base, "plev": levels}).to_netcdf(tmp_path / "rh.nc")
    with pytest.warns(UserWarning, match=r"q850 computed from relative humidity 'r' and "
                                         r"temperature 't'"):
        target = open_target(tmp_path / "rh.nc", time="2001-12-21T12:00")
    np.testing.assert_allclose(target["q850"].values[0], q[1], rtol=5e-3)
    assert "computed from relative humidity" in target["q850"].attrs["comment"]

    surface = 950.0 * 100.0 + 0.0 * z  # Pa
    t2m = dewpoint + 8.0
    rh2m = mpcalc.relative_humidity_from_dewpoint(t2m * units.degC, dewpoint * units.degC
                                                  ).to("dimensionless").m
    xr.Dataset({**z_var, "hurs": (("time", "lat", "lon"), rh2m, {"units": "1"}),
                "tas": (("time", "lat", "lon"), t2m, {"units": "degC"}),
                "huss": (("time", "lat", "lon"), q, {"units": "kg kg-1"}),
                "ps": (("time", "lat", "lon"), surface, {"units": "Pa"})},
               coords=base).to_netcdf(tmp_path / "surface.nc")
    with pytest.warns(UserWarning, match=r"td2m computed from relative humidity 'hurs' and "
                                         r"temperature 'tas'"):
        ds = open_archive(tmp_path / "surface.nc", fields=["z500", "td2m"])
    reference = mpcalc.dewpoint_from_relative_humidity(t2m * units.degC,
                                                       rh2m * units.dimensionless).to("K").m
    np.testing.assert_allclose(ds["td2m"].values, reference, atol=0.1)
    xr.Dataset({**z_var, "huss": (("time", "lat", "lon"), q, {"units": "kg kg-1"}),
                "ps": (("time", "lat", "lon"), surface, {"units": "Pa"})},
               coords=base).to_netcdf(tmp_path / "q2m.nc")
    with pytest.warns(UserWarning, match=r"td2m computed from specific humidity 'huss' and "
                                         r"surface pressure 'ps'"):
        ds = open_archive(tmp_path / "q2m.nc", fields=["z500", "td2m"])
    reference = mpcalc.dewpoint_from_specific_humidity(surface * units.Pa,
                                                       q * units("kg/kg")).to("K").m
    np.testing.assert_allclose(ds["td2m"].values, reference, atol=0.01)

    xr.Dataset({**z_var, "hus": (dims, on_levels(q), {"units": "kg kg-1"}),
                "dpt": (dims, on_levels(dewpoint + 1.0), {"units": "degC"})},
               coords={**base, "plev": levels}).to_netcdf(tmp_path / "both.nc")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # nothing computed, nothing to say
        ds = open_archive(tmp_path / "both.nc")
    np.testing.assert_allclose(ds["q850"].values, q)


# --------------------------------------------------------------------------- common units

def test_common_units_table_agrees_with_the_unit_registry():
    """Every spelling the reader answers without the registry (_COMMON_UNITS) converts
    exactly as cf-xarray's pint registry of CF / UDUNITS units says (the reference), for
    every field and as a pressure level."""
    from analogs.stages.sources import (
        _COMMON_UNITS,
        _UNIT_SPELLINGS,
        _affine,
        _common_conversion,
        _field_conversion,
        _parse_units,
        _pressure_unit,
    )
    spellings = list(_COMMON_UNITS) + [k for k, v in _UNIT_SPELLINGS.items()
                                       if v in _COMMON_UNITS]
    for text in spellings:
        unit = _parse_units(text)
        assert unit is not None, text
        for field in ("z500", "q850", "td2m", "pwat"):
            assert _common_conversion(text, field) == _field_conversion(unit, field), \
                (text, field)
        is_pressure = unit.dimensionality == {"[mass]": 1, "[length]": -1, "[time]": -2}
        assert _pressure_unit(text) == ((True, _affine(unit, "hPa")[0]) if is_pressure
                                        else (False, None)), text
    # Each entry is a pressure, accepted by some field, or a coordinate's angle.
    assert all(_pressure_unit(text)[0] or _COMMON_UNITS[text][0] == "angle" or any(
        _common_conversion(text, f) for f in ("z500", "q850", "td2m", "pwat"))
        for text in _COMMON_UNITS)


def test_units_outside_the_table_still_go_to_the_registry():
    """Spellings not in the table keep the registry's answer: ft is a length (0.3048 m,
    international foot, from memory), percent is no ratio of masses, bar is 1000 hPa."""
    from analogs.stages.sources import _COMMON_UNITS, _conversion_of, _pressure_unit
    assert "ft" not in _COMMON_UNITS and "bar" not in _COMMON_UNITS
    assert _conversion_of("ft", "z500") == (0.3048, 0.0)
    assert _pressure_unit("bar") == (True, 1000.0)
    assert _pressure_unit("percent") == (False, None)


def test_reading_common_units_does_not_build_the_registry(tmp_path):
    """A demo-style archive (m, kg kg-1, levels in Pa) is read without building the
    pint registry (about 0.7 s of a report's archive read): checked in a fresh process,
    where nothing else has imported cf_xarray.units."""
    import subprocess
    import sys
    from pathlib import Path
    paths = write_demo_style(tmp_path, daily_times("2001-06-01", periods=5))
    code = ("import sys; from analogs.stages.sources import open_target, open_archive; "
            f"open_target({str(paths[0])!r}, time='all', fields=['z500']); "
            f"open_target({str(paths[1])!r}, time='all', fields=['q850']); "
            f"open_archive({[str(p) for p in paths]!r}); "
            "print('cf_xarray.units' in sys.modules)")
    root = Path(__file__).resolve().parents[1]
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={**__import__("os").environ, "PYTHONPATH": str(root)})
    assert out.stdout.split() == ["False"]
