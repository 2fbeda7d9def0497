"""GRIB / GRIB2 through cfgrib and ecCodes, in the same reader as NetCDF and Zarr.

Every GRIB file is written here with ecCodes itself (``codes_grib_new_from_samples`` on
the ``regular_ll_pl_grib1`` / ``regular_ll_pl_grib2`` / ``GRIB2`` samples that ship
inside the ecCodes library of the ``eccodeslib`` wheel), from analytic fields, and read
back through analogs; the checks compare with the values written (ecCodes' simple
packing at 24 bits keeps about 7 significant digits), with MetPy for the moisture
conversions and with pyproj for the Lambert conformal grid.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from _sources_helpers import daily_times, smooth_height, smooth_humidity
from analogs.constants import G0
from analogs.errors import AnalogsInputError
from analogs.stages.sources import open_archive, open_target, regrid_to

eccodes = pytest.importorskip("eccodes")
pytest.importorskip("cfgrib")

#: Regional grid as a model centre writes it: latitude north to south, longitude 0-360.
GRIB_LAT = np.arange(60.0, 19.9, -2.5)
GRIB_LON = np.arange(230.0, 300.1, 2.5)
#: Packing precision of 24-bit simple packing, relative to the range of a field.
PACKING_RTOL = 1e-6


def _message(short_name, level_type, level, values, valid, *, step=0):
    return {"shortName": short_name, "typeOfLevel": level_type, "level": level,
            "values": np.asarray(values, dtype=float), "run": pd.Timestamp(valid)
            - pd.Timedelta(hours=step), "step": step}


def write_grib(path, messages, *, edition=2, lat=GRIB_LAT, lon=GRIB_LON):
    """A GRIB file of ``messages`` on a regular latitude-longitude grid, written by ecCodes."""
    sample = "regular_ll_pl_grib2" if edition == 2 else "regular_ll_pl_grib1"
    with open(path, "wb") as out:
        for message in messages:
            handle = eccodes.codes_grib_new_from_samples(sample)
            try:
                for key, value in (("Ni", lon.size), ("Nj", lat.size),
                                   ("latitudeOfFirstGridPointInDegrees", lat[0]),
                                   ("longitudeOfFirstGridPointInDegrees", lon[0]),
                                   ("latitudeOfLastGridPointInDegrees", lat[-1]),
                                   ("longitudeOfLastGridPointInDegrees", lon[-1]),
                                   ("iDirectionIncrementInDegrees", abs(lon[1] - lon[0])),
                                   ("jDirectionIncrementInDegrees", abs(lat[1] - lat[0])),
                                   ("jScansPositively", int(lat[1] > lat[0]))):
                    eccodes.codes_set(handle, key, value)
                for key in ("shortName", "typeOfLevel", "level"):
                    eccodes.codes_set(handle, key, message[key])
                run = message["run"]
                eccodes.codes_set(handle, "dataDate", int(f"{run:%Y%m%d}"))
                eccodes.codes_set(handle, "dataTime", run.hour * 100)
                eccodes.codes_set(handle, "stepRange", str(message["step"]))
                eccodes.codes_set(handle, "bitsPerValue", 24)
                eccodes.codes_set_values(handle, message["values"].ravel())
                eccodes.codes_write(handle, out)
            finally:
                eccodes.codes_release(handle)
    return path


def _canonical_lon():
    return np.sort((GRIB_LON + 180.0) % 360.0 - 180.0)


def _fields(when, lat=GRIB_LAT, lon=GRIB_LON):
    """(500 hPa height in gpm, 850 hPa specific humidity) on the GRIB grid, analytic."""
    times = pd.DatetimeIndex([when])
    return smooth_height(times, lat, lon)[0], smooth_humidity(times, lat, lon)[0]


# --------------------------------------------------------------------------- reading

@pytest.mark.parametrize("edition", [1, 2])
def test_grib_is_read_like_netcdf(tmp_path, edition):
    """z (m2 s-2) at 500 hPa and q at 850 hPa among other parameters and levels (z at
    700 hPa and at the surface, q at 700 hPa, t at 850 hPa), GRIB1 and GRIB2: the reader
    picks them by parameter and level, divides by g0 (9.80665 m s-2, 3rd CGPM 1901) and
    gives the values written, on the grid written (latitude reversed, longitude wrapped
    to [-180, 180)), exactly as it reads the same fields from NetCDF. No index file is
    written beside the GRIB file."""
    when = pd.Timestamp("2024-05-03T12:00")
    z, q = _fields(when)
    path = write_grib(tmp_path / f"forecast.grib{edition}", [
        _message("z", "isobaricInhPa", 700, (z - 2500.0) * G0, when),
        _message("z", "surface", 0, np.full_like(z, 3000.0), when),
        _message("z", "isobaricInhPa", 500, z * G0, when),
        _message("q", "isobaricInhPa", 700, q / 2.0, when),
        _message("t", "isobaricInhPa", 850, np.full_like(z, 285.0), when),
        _message("q", "isobaricInhPa", 850, q, when)], edition=edition)
    before = sorted(os.listdir(tmp_path))
    target = open_target(path)
    assert sorted(os.listdir(tmp_path)) == before  # no .idx beside the user's file
    assert list(target.data_vars) == ["z500", "q850"]
    assert target["time"].values[0] == np.datetime64(when)
    np.testing.assert_array_equal(target["lat"].values, GRIB_LAT[::-1])
    np.testing.assert_allclose(target["lon"].values, _canonical_lon())
    # the values written, on the canonical grid
    np.testing.assert_allclose(target["z500"].values[0], z[::-1], rtol=PACKING_RTOL)
    np.testing.assert_allclose(target["q850"].values[0], q[::-1],
                               atol=PACKING_RTOL * np.ptp(q))
    # the same fields from NetCDF (ERA5-like names) give the same canonical Dataset
    nc = tmp_path / "forecast.nc"
    xr.Dataset({"zg500": (("latitude", "longitude"), z * G0, {"units": "m2 s-2"}),
                "hus850": (("latitude", "longitude"), q, {"units": "kg kg-1"})},
               coords={"latitude": GRIB_LAT, "longitude": GRIB_LON, "valid_time": when}
               ).to_netcdf(nc)
    from_netcdf = open_target(nc)
    xr.testing.assert_allclose(target, from_netcdf.assign_attrs(target.attrs), rtol=1e-5)


def test_grib_archive_of_several_days_from_a_directory(tmp_path):
    """A directory of daily GRIB2 files (one run each) opens as a canonical archive:
    one value a day at 12 UTC, the values written."""
    times = daily_times("2003-07-01", periods=4)
    for when in times:
        z, q = _fields(when)
        write_grib(tmp_path / f"an_{when:%Y%m%d}.grb2",
                   [_message("gh", "isobaricInhPa", 500, z, when),
                    _message("q", "isobaricInhPa", 850, q, when)])
    archive = open_archive(tmp_path)
    np.testing.assert_array_equal(archive["time"].values, times.values)
    expected = smooth_height(times, GRIB_LAT, GRIB_LON)[:, ::-1]
    np.testing.assert_allclose(archive["z500"].values, expected, rtol=PACKING_RTOL)
    assert not [f for f in os.listdir(tmp_path) if f.endswith(".idx")]


def test_forecast_steps_become_valid_times(tmp_path):
    """One run with leads 0 to 48 h (cfgrib: ``time`` the run, ``step`` the lead):
    the valid times are run + lead; one is chosen by ``time``, all by ``time='all'``."""
    run = pd.Timestamp("2024-05-03T00:00")
    steps = (0, 12, 24, 36, 48)
    messages = []
    for step in steps:
        z, q = _fields(run + pd.Timedelta(hours=step))
        messages += [_message("z", "isobaricInhPa", 500, z * G0, run + pd.Timedelta(hours=step),
                              step=step),
                     _message("q", "isobaricInhPa", 850, q, run + pd.Timedelta(hours=step),
                              step=step)]
    path = write_grib(tmp_path / "run.grib2", messages)
    with pytest.raises(AnalogsInputError, match=r"run\.grib2 holds 5 times from "
                                                r"2024-05-03T00:00 to 2024-05-05T00:00"):
        open_target(path)
    one = open_target(path, time="2024-05-04T12:00")
    z, _ = _fields(pd.Timestamp("2024-05-04T12:00"))
    np.testing.assert_allclose(one["z500"].values[0], z[::-1], rtol=PACKING_RTOL)
    every = open_target(path, time="all")
    expected = [run + pd.Timedelta(hours=s) for s in steps]
    np.testing.assert_array_equal(every["time"].values, np.array(expected, "datetime64[ns]"))


# --------------------------------------------------------------------------- moisture

def test_grib_dewpoint_and_humidity_become_the_store_moisture(tmp_path):
    """An 850 hPa dewpoint (GRIB2 ``dpt``), 850 hPa relative humidity and temperature
    (GRIB1 ``r`` in %, ``t``) and 2 m relative humidity and temperature (GRIB2 ``2r``,
    ``2t``) give q850 and td2m. Reference: MetPy ``specific_humidity_from_dewpoint``,
    ``dewpoint_from_relative_humidity`` (MetPy >= 1.7 takes the saturation vapour pressure
    from Ambaum 2020, analogs from Bolton 1980: within 0.5 % in q and 0.1 K in dewpoint
    from -40 to 35 degC), and ``dewpoint_from_specific_humidity`` (Bolton's inverse on both
    sides: within 0.01 K)."""
    mpcalc = pytest.importorskip("metpy.calc")
    units = pytest.importorskip("metpy.units").units
    when = pd.Timestamp("2024-06-10T12:00")
    z, q = _fields(when)
    dewpoint = mpcalc.dewpoint_from_specific_humidity(850.0 * units.hPa,
                                                      q * units("kg/kg")).to("K").m
    temperature = dewpoint + 6.0
    rh = mpcalc.relative_humidity_from_dewpoint(temperature * units.K,
                                                dewpoint * units.K).to("percent").m
    path = write_grib(tmp_path / "dpt.grib2", [
        _message("gh", "isobaricInhPa", 500, z, when),
        _message("dpt", "isobaricInhPa", 850, dewpoint, when)])
    with pytest.warns(UserWarning, match=r"q850 computed from dewpoint 'dpt' \(Bolton 1980\)"):
        target = open_target(path)
    reference = mpcalc.specific_humidity_from_dewpoint(850.0 * units.hPa,
                                                       dewpoint * units.K).to("kg/kg").m
    np.testing.assert_allclose(target["q850"].values[0], reference[::-1], rtol=5e-3)
    np.testing.assert_allclose(target["q850"].values[0], q[::-1], rtol=5e-3)

    path = write_grib(tmp_path / "rh.grib1", [
        _message("z", "isobaricInhPa", 500, z * G0, when),
        _message("r", "isobaricInhPa", 850, rh, when),
        _message("t", "isobaricInhPa", 850, temperature, when)], edition=1)
    with pytest.warns(UserWarning, match=r"q850 computed from relative humidity 'r' and "
                                         r"temperature 't'"):
        target = open_target(path)
    reference = mpcalc.specific_humidity_from_dewpoint(
        850.0 * units.hPa, mpcalc.dewpoint_from_relative_humidity(
            temperature * units.K, rh * units.percent)).to("kg/kg").m
    np.testing.assert_allclose(target["q850"].values[0], reference[::-1], rtol=5e-3)

    t2m = dewpoint + 10.0
    rh2m = mpcalc.relative_humidity_from_dewpoint(t2m * units.K, dewpoint * units.K
                                                  ).to("percent").m
    path = write_grib(tmp_path / "surface.grib2", [
        _message("z", "isobaricInhPa", 500, z * G0, when),
        _message("2r", "heightAboveGround", 2, rh2m, when),
        _message("2t", "heightAboveGround", 2, t2m, when)])
    with pytest.warns(UserWarning, match=r"td2m computed from relative humidity 'r2' and "
                                         r"temperature 't2m'"):
        target = open_target(path, fields=["z500", "td2m"])
    reference = mpcalc.dewpoint_from_relative_humidity(t2m * units.K, rh2m * units.percent
                                                       ).to("K").m
    np.testing.assert_allclose(target["td2m"].values[0], reference[::-1], atol=0.1)
    np.testing.assert_allclose(target["td2m"].values[0], dewpoint[::-1], atol=0.1)


# --------------------------------------------------------------------------- Lambert grid

def _analytic_height(lat, lon):
    """A smooth 500 hPa height (gpm) at any latitude and longitude (degrees): a poleward
    decrease and a zonal wave number 3, as in ``_sources_helpers.smooth_height``."""
    phi, lam = np.radians(lat), np.radians(lon)
    return (5500.0 + 300.0 * np.cos(phi) ** 2
            + 80.0 * np.cos(phi) * np.sin(3.0 * lam) * np.sin(2.0 * phi) ** 2)


def test_lambert_conformal_grib_is_regridded_to_the_store_grid(tmp_path):
    """A GRIB2 field on a Lambert conformal grid (60 km, true at 38.5 N, centred on
    97.5 W, sphere of radius 6371229 m as GRIB shapeOfTheEarth 6): its 2-D latitude and
    longitude (computed by ecCodes) agree with pyproj's projection of the same grid, and
    the field, written from an analytic function of latitude and longitude, comes back
    on a regular 1-degree grid within 0.1 gpm of the analytic function (linear
    interpolation error), with the corners outside the Lambert domain refused or NaN."""
    pyproj = pytest.importorskip("pyproj")
    nx, ny, dx = 90, 60, 60000.0
    lcc = pyproj.Proj(proj="lcc", lat_1=38.5, lat_2=38.5, lat_0=38.5, lon_0=-97.5,
                      R=6371229.0)
    x0, y0 = lcc(-120.0, 22.0)
    x, y = np.meshgrid(x0 + dx * np.arange(nx), y0 + dx * np.arange(ny))
    lon2d, lat2d = lcc(x, y, inverse=True)
    z = _analytic_height(lat2d, lon2d)
    handle = eccodes.codes_grib_new_from_samples("GRIB2")
    try:
        for key, value in (("gridType", "lambert"), ("Nx", nx), ("Ny", ny),
                           ("shapeOfTheEarth", 6),
                           ("latitudeOfFirstGridPointInDegrees", 22.0),
                           ("longitudeOfFirstGridPointInDegrees", 240.0),
                           ("LaDInDegrees", 38.5), ("LoVInDegrees", 262.5),
                           ("Latin1InDegrees", 38.5), ("Latin2InDegrees", 38.5),
                           ("DxInMetres", dx), ("DyInMetres", dx), ("scanningMode", 64),
                           ("shortName", "gh"), ("typeOfLevel", "isobaricInhPa"),
                           ("level", 500), ("dataDate", 20240503), ("dataTime", 1200),
                           ("bitsPerValue", 24)):
            eccodes.codes_set(handle, key, value)
        eccodes.codes_set_values(handle, z.ravel())
        with open(tmp_path / "lambert.grib2", "wb") as out:
            eccodes.codes_write(handle, out)
    finally:
        eccodes.codes_release(handle)
    target = open_target(tmp_path / "lambert.grib2", fields=["z500"])
    assert target["z500"].dims == ("time", "y", "x")
    np.testing.assert_allclose(target["lat"].values, lat2d, atol=1e-5)
    np.testing.assert_allclose(target["lon"].values, lon2d, atol=1e-5)
    store_lat = np.arange(25.0, 50.1, 1.0)
    store_lon = np.arange(-115.0, -80.0, 1.0)
    out = regrid_to(target, store_lat, store_lon)
    exact = _analytic_height(*np.meshgrid(store_lat, store_lon, indexing="ij"))
    assert out["z500"].dims == ("time", "lat", "lon")
    assert np.abs(out["z500"].values[0] - exact).max() < 0.1
    wide_lat = np.arange(10.0, 50.1, 1.0)
    with pytest.raises(AnalogsInputError, match=r"lambert\.grib2: a curvilinear grid over "
                                                r"lat .* leaves \d+ of the \d+ points"):
        regrid_to(target, wide_lat, store_lon)
    partial = regrid_to(target, wide_lat, store_lon, partial=True)["z500"].values[0]
    outside = np.isnan(partial)
    assert outside[wide_lat < 20.0].all() and not outside[wide_lat >= 25.0].any()


# --------------------------------------------------------------------------- robustness

def test_grib_and_netcdf_in_one_process_exit_cleanly(tmp_path):
    """ecCodes and HDF5 (netCDF4) loaded in one interpreter: a process that reads a GRIB
    file and a NetCDF file, in either order, then imports pyproj (as MetPy does), exits
    with status 0 and writes nothing to stderr; a crash at interpreter exit would show
    in both. Measured: with the ecCodes library of the ``eccodeslib`` wheel (ecCodes
    >= 2.43), whose helper loads eckit's bundled libcurl and OpenSSL with RTLD_GLOBAL,
    importing pyproj afterwards aborted every such process at exit ("double free or
    corruption"); the self-contained eccodes wheels (< 2.43) do not."""
    when = pd.Timestamp("2024-05-03T12:00")
    z, q = _fields(when)
    grib = write_grib(tmp_path / "f.grib2", [_message("z", "isobaricInhPa", 500, z * G0, when),
                                            _message("q", "isobaricInhPa", 850, q, when)])
    nc = tmp_path / "f.nc"
    xr.Dataset({"z": (("time", "lat", "lon"), z[None, ::-1], {"units": "gpm"})},
               coords={"time": [when], "lat": GRIB_LAT[::-1], "lon": GRIB_LON,
                       "level": ((), 500.0, {"units": "hPa"})}).to_netcdf(nc)
    for first, second in ((grib, nc), (nc, grib)):
        script = textwrap.dedent(f"""
            from analogs.stages.sources import open_target
            a = open_target({str(first)!r}, fields=["z500"])
            b = open_target({str(second)!r}, fields=["z500"])
            assert abs(float(a["z500"].mean()) - float(b["z500"].mean())) < 1e-2
            try:
                import pyproj  # noqa: F401  (bundles its own libcurl and sqlite)
            except ImportError:
                pass
            print("read")
        """)
        done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                              timeout=300, cwd=tmp_path)
        assert done.returncode == 0, done.stderr
        assert done.stdout.strip() == "read" and done.stderr == ""
    assert sorted(os.listdir(tmp_path)) == ["f.grib2", "f.nc"]


def test_damaged_and_unrelated_grib_files(tmp_path):
    when = pd.Timestamp("2024-05-03T12:00")
    z, q = _fields(when)
    full = write_grib(tmp_path / "full.grib2", [_message("z", "isobaricInhPa", 500, z * G0, when),
                                               _message("q", "isobaricInhPa", 850, q, when)])
    cut = tmp_path / "cut.grib2"
    cut.write_bytes(full.read_bytes()[: full.stat().st_size // 3])
    with pytest.raises(AnalogsInputError, match=r"cut\.grib2: cannot be read as GRIB"):
        open_target(cut)
    other = write_grib(tmp_path / "other.grb", [
        _message("2t", "heightAboveGround", 2, np.full_like(z, 290.0), when),
        _message("z", "isobaricInhPa", 700, (z - 2500.0) * G0, when)])
    with pytest.raises(AnalogsInputError, match=r"no 500 hPa height variable .* in .*other\.grb "
                                                r"\(variables: other\.grb: 2t \(heightAboveGround "
                                                r"2\), z \(isobaricInhPa 700\)\)"):
        open_target(other)


# --------------------------------------------------------------------------- end to end

def test_store_from_q850_takes_a_grib_target_with_dewpoint(demo_store, demo_files, tmp_path):
    """A store built from z500 and q850 answers a target that gives the same day as
    geopotential height and 850 hPa dewpoint (GRIB2; the dewpoint computed from q by
    MetPy ``dewpoint_from_specific_humidity``): the same analogs as the NetCDF target
    with q itself, at distances within 0.5 % (the two conversions use epsilon 0.62196
    and 0.622)."""
    mpcalc = pytest.importorskip("metpy.calc")
    units = pytest.importorskip("metpy.units").units
    archive = open_archive(demo_files, progress=False)
    day = archive.isel(time=400)
    when = pd.Timestamp(day["time"].values)
    lat, lon = day["lat"].values[::-1], day["lon"].values
    z, q = day["z500"].values[::-1], day["q850"].values[::-1]
    netcdf = tmp_path / "q.nc"
    xr.Dataset({"z500": (("lat", "lon"), z, {"units": "gpm"}),
                "q850": (("lat", "lon"), q, {"units": "kg kg-1"})},
               coords={"lat": lat, "lon": lon, "time": when}).to_netcdf(netcdf)
    dewpoint = mpcalc.dewpoint_from_specific_humidity(850.0 * units.hPa,
                                                      q * units("kg/kg")).to("K").m
    grib = write_grib(tmp_path / "dpt.grib2", [_message("gh", "isobaricInhPa", 500, z, when),
                                              _message("dpt", "isobaricInhPa", 850, dewpoint,
                                                       when)], lat=lat, lon=np.mod(lon, 360.0))
    with_q = demo_store.find(field=netcdf, top=5, exclude=0)
    with pytest.warns(UserWarning, match="q850 computed from dewpoint"):
        with_dewpoint = demo_store.find(field=grib, top=5, exclude=0)
    np.testing.assert_array_equal(with_dewpoint.analogs["row"].to_numpy(),
                                  with_q.analogs["row"].to_numpy())
    distances = with_q.analogs["distance"].to_numpy()
    np.testing.assert_allclose(with_dewpoint.analogs["distance"].to_numpy(), distances,
                               rtol=5e-3, atol=5e-3 * distances.max())
