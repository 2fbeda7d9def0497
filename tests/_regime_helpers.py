"""Hand-built single 500 hPa / 850 hPa fields for the diagnostics and regime tests.

Each pattern is a textbook sketch (common practice, no source): a zonal basic
state with heights falling poleward, plus a wave, a trough or a compact vortex.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from analogs.geo import great_circle_km

#: The plains box of the tests, (south, north, west, east) in degrees.
REGION = (30.0, 45.0, -105.0, -85.0)
LAT = np.arange(15.0, 61.0, 1.0)
LON = np.arange(-135.0, -54.0, 1.0)


def _grid():
    return np.meshgrid(LAT, LON, indexing="ij")


def zonal_height(gradient_gpm_per_deg: float = 8.0) -> np.ndarray:
    """Heights falling poleward at a uniform rate: a flat zonal flow of ~8-10 m/s."""
    lat, _ = _grid()
    return 5900.0 - gradient_gpm_per_deg * (lat - LAT[0])


def wave(amplitude_gpm: float, ridge_lon: float, wavelength_deg: float,
         centre_lat: float = 42.0, width_deg: float = 12.0) -> np.ndarray:
    """A standing wave with its ridge at ``ridge_lon`` and a Gaussian envelope in lat."""
    lat, lon = _grid()
    envelope = np.exp(-0.5 * ((lat - centre_lat) / width_deg) ** 2)
    return amplitude_gpm * envelope * np.cos(2 * np.pi * (lon - ridge_lon) / wavelength_deg)


def vortex(lat0: float, lon0: float, depth_gpm: float, sigma_km: float) -> np.ndarray:
    """A compact Gaussian low centred at (lat0, lon0)."""
    lat, lon = _grid()
    r = great_circle_km(lat0, lon0, lat, lon)
    return -depth_gpm * np.exp(-0.5 * (r / sigma_km) ** 2)


def humidity(south_q: float = 0.017, north_q: float = 0.006) -> np.ndarray:
    """Specific humidity (kg/kg) falling poleward, moist over the warm southern sea."""
    lat, _ = _grid()
    return north_q + (south_q - north_q) * np.exp(-(lat - LAT[0]) / 20.0)


def moist_blob(lat0: float, lon0: float, q_gain: float, sigma_km: float) -> np.ndarray:
    lat, lon = _grid()
    r = great_circle_km(lat0, lon0, lat, lon)
    return q_gain * np.exp(-0.5 * (r / sigma_km) ** 2)


def as_dataset(z500: np.ndarray, q850: np.ndarray | None = None,
               day: str = "2001-07-15") -> xr.Dataset:
    """A one-day canonical Dataset."""
    coords = {"time": pd.DatetimeIndex([day]), "lat": LAT, "lon": LON}
    data = {"z500": (("time", "lat", "lon"), z500[None],
                     {"units": "gpm", "long_name": "500 hPa geopotential height"})}
    if q850 is not None:
        data["q850"] = (("time", "lat", "lon"), q850[None],
                        {"units": "kg kg-1", "long_name": "850 hPa specific humidity"})
    return xr.Dataset(data, coords=coords)


def northwest_flow_case() -> xr.Dataset:
    """Amplified ridge over the western high terrain, trough downstream of the plains,
    summer moisture returning to the region's southern edge beneath the flow."""
    return as_dataset(zonal_height() + wave(150.0, ridge_lon=-118.0, wavelength_deg=60.0),
                      humidity(south_q=0.019, north_q=0.008))


def tropical_case() -> xr.Dataset:
    """Compact closed low near 27 N under weak summer flow, in very moist air."""
    z = zonal_height(3.0) + vortex(27.0, -93.0, depth_gpm=60.0, sigma_km=250.0)
    q = humidity() + moist_blob(27.0, -93.0, q_gain=0.008, sigma_km=400.0)
    return as_dataset(z, q)


def strong_trough_case() -> xr.Dataset:
    """A deep, amplified short-wave trough over the western part of the plains box."""
    z = zonal_height(10.0) + wave(200.0, ridge_lon=-125.0, wavelength_deg=50.0,
                                  centre_lat=40.0, width_deg=8.0)
    return as_dataset(z, humidity())


def zonal_case() -> xr.Dataset:
    """Flat zonal flow: no wave, no vortex."""
    return as_dataset(zonal_height(), humidity())
