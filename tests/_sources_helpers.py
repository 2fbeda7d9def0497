"""Synthetic gridded files in the conventions `analogs.stages.sources` must read.

One smooth physical state (500 hPa height in gpm, 850 hPa specific humidity in kg/kg)
is written in three conventions: the demo archive's (per-variable, per-year files,
`zg` in m and `hus` with `plev` in Pa), ERA5-style (geopotential in m2 s-2, latitude
descending, longitude 0-360, `valid_time`, `pressure_level` in hPa) and NCEP-style
(`hgt` in gpm, `shum`, `level` in millibar, latitude descending, longitude 0-357.5).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from analogs.constants import G0

#: Canonical test grid: global, 5 degrees, lat ascending, lon in [-180, 180).
LAT = np.arange(-90.0, 90.1, 5.0)
LON = np.arange(-180.0, 180.0, 5.0)


def smooth_height(times, lat=LAT, lon=LON):
    """500 hPa height (gpm): a zonal mean decreasing poleward plus a travelling wave."""
    t = (pd.DatetimeIndex(times) - pd.Timestamp("2000-01-01")) / pd.Timedelta(days=1)
    t = np.asarray(t, dtype=float)[:, None, None]
    phi = np.radians(lat)[None, :, None]
    lam = np.radians(lon)[None, None, :]
    return (5500.0 + 300.0 * np.cos(phi) ** 2
            + 80.0 * np.cos(phi) * np.sin(3.0 * lam - 0.2 * t) * np.sin(2 * phi) ** 2)


def smooth_humidity(times, lat=LAT, lon=LON):
    """850 hPa specific humidity (kg/kg), moist at low latitudes."""
    t = (pd.DatetimeIndex(times) - pd.Timestamp("2000-01-01")) / pd.Timedelta(days=1)
    t = np.asarray(t, dtype=float)[:, None, None]
    phi = np.radians(lat)[None, :, None]
    lam = np.radians(lon)[None, None, :]
    return 0.002 + 0.012 * np.cos(phi) ** 4 * (1.0 + 0.2 * np.cos(2.0 * lam + 0.1 * t))


def daily_times(start="2001-12-20", periods=20, hour=12):
    return pd.date_range(start, periods=periods, freq="D") + pd.Timedelta(hours=hour)


def to_360(lon):
    """Longitudes in [0, 360) and the order that sorts them."""
    lon360 = np.mod(lon, 360.0)
    order = np.argsort(lon360)
    return lon360[order], order


def write_demo_style(directory, times):
    """Per-variable, per-year files zg500_YYYY.nc (m, plev Pa) and hus850_YYYY.nc."""
    times = pd.DatetimeIndex(times)
    z, q = smooth_height(times), smooth_humidity(times)
    paths = []
    for year in sorted(set(times.year)):
        sel = np.flatnonzero(times.year == year)
        coords = {"time": times[sel], "lat": ("lat", LAT, {"units": "degrees_north"}),
                  "lon": ("lon", LON, {"units": "degrees_east"})}
        zg = xr.Dataset(
            {"zg": (("time", "plev", "lat", "lon"), z[sel][:, None],
                    {"standard_name": "geopotential_height", "units": "m"})},
            coords={**coords, "plev": ("plev", [50000.0], {"units": "Pa",
                                                           "standard_name": "air_pressure"})})
        hus = xr.Dataset(
            {"hus": (("time", "plev", "lat", "lon"), q[sel][:, None],
                     {"standard_name": "specific_humidity", "units": "kg kg-1"})},
            coords={**coords, "plev": ("plev", [85000.0], {"units": "Pa"})})
        for name, ds in (("zg500", zg), ("hus850", hus)):
            path = directory / f"{name}_{year}.nc"
            ds.to_netcdf(path)
            paths.append(path)
    return paths


def era5_dataset(times, *, z=None, q=None):
    """ERA5-style Dataset: z in m2 s-2, q, latitude descending, longitude 0-360."""
    times = pd.DatetimeIndex(times)
    z = smooth_height(times) if z is None else z
    q = smooth_humidity(times) if q is None else q
    lon360, order = to_360(LON)
    levels = np.array([500.0, 850.0])
    zz = np.stack([z * G0, z * G0 * 0.3], axis=1)[:, :, ::-1][:, :, :, order]
    qq = np.stack([q * 0.3, q], axis=1)[:, :, ::-1][:, :, :, order]
    dims = ("valid_time", "pressure_level", "latitude", "longitude")
    return xr.Dataset(
        {"z": (dims, zz, {"standard_name": "geopotential", "units": "m**2 s**-2",
                          "long_name": "Geopotential"}),
         "q": (dims, qq, {"standard_name": "specific_humidity", "units": "kg kg**-1"})},
        coords={"valid_time": times,
                "pressure_level": ("pressure_level", levels, {"units": "hPa"}),
                "latitude": ("latitude", LAT[::-1], {"units": "degrees_north"}),
                "longitude": ("longitude", lon360, {"units": "degrees_east"}),
                "number": 0})


def write_ncep_style(directory, times):
    """NCEP-style hgt.nc (gpm) and shum.nc (kg/kg) with `level` in millibar."""
    times = pd.DatetimeIndex(times)
    lon360, order = to_360(LON)
    levels = np.array([850.0, 500.0])
    z = smooth_height(times)[:, ::-1][:, :, order]
    q = smooth_humidity(times)[:, ::-1][:, :, order]
    coords = {"time": times, "level": ("level", levels, {"units": "millibar"}),
              "lat": ("lat", LAT[::-1], {"units": "degrees_north"}),
              "lon": ("lon", lon360, {"units": "degrees_east"})}
    dims = ("time", "level", "lat", "lon")
    hgt = xr.Dataset({"hgt": (dims, np.stack([z * 0.3, z], axis=1), {"units": "gpm"})},
                     coords=coords)
    shum = xr.Dataset({"shum": (dims, np.stack([q, q * 0.3], axis=1), {"units": "kg/kg"})},
                      coords=coords)
    paths = [directory / "hgt.nc", directory / "shum.nc"]
    hgt.to_netcdf(paths[0])
    shum.to_netcdf(paths[1])
    return paths
