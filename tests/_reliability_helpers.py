"""A small synthetic archive, events table and store for the reliability tests.

Our own synthetic fields (no real place, event or data): 500 hPa height in gpm and 850 hPa
specific humidity in kg/kg on a 2.5 degree regional grid, driven by five red-noise
pattern amplitudes (AR(1), coefficient 0.9) on top of an annual cycle, plus white noise, written in the CF
convention of the demo archive (``zg`` in m and ``hus`` with ``plev`` in Pa). Small enough
that a build takes a few seconds, long enough (three years) for a leave-one-year-out
hindcast.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

LAT = np.arange(20.0, 55.1, 2.5)
LON = np.arange(-130.0, -59.9, 2.5)
YEARS = (2001, 2002, 2003)
SEED = 7
#: Query used to compare answers: an archive day and a region inside the grid.
QUERY_DATE = "2002-06-14"
REGION = "30,45,-110,-80"

_SPECS = {"z500": ("zg", 50000.0, "geopotential_height", "m"),
          "q850": ("hus", 85000.0, "specific_humidity", "kg kg-1")}


def archive_times(years=YEARS, hour=12) -> pd.DatetimeIndex:
    return pd.date_range(f"{years[0]}-01-01", f"{years[-1]}-12-31", freq="D") + pd.Timedelta(
        hours=hour)


def synthetic_fields(times, *, lat=LAT, lon=LON, seed=SEED) -> dict[str, np.ndarray]:
    """{"z500": gpm, "q850": kg/kg} arrays (time, lat, lon) of the synthetic weather."""
    times = pd.DatetimeIndex(times)
    rng = np.random.default_rng(seed)
    doy = times.day_of_year.to_numpy(dtype=float)[:, None, None]
    patterns = [np.sin(np.radians(k * lat)[:, None] * 1.5) * np.cos(np.radians(j * lon)[None, :] * 3)
                for k, j in ((1, 1), (2, 1), (1, 2), (3, 2), (2, 3))]
    amplitude = np.zeros((len(times), 5))
    for i in range(1, len(times)):
        amplitude[i] = 0.9 * amplitude[i - 1] + rng.normal(size=5)
    season = np.cos(2 * np.pi * (doy - 200.0) / 365.0)
    z = (5600.0 - 3.0 * (lat[None, :, None] - 35.0) + 40.0 * season
         + sum(amplitude[:, k, None, None] * 20.0 * patterns[k][None] for k in range(5)))
    q = (0.008 + 0.002 * season
         + sum(amplitude[:, k, None, None] * 0.0003 * patterns[(k + 1) % 5][None] for k in range(5)))
    # Small-scale white noise: real fields are not exactly of low rank.
    z = z + rng.normal(scale=2.0, size=z.shape)
    q = np.clip(q + rng.normal(scale=1e-4, size=q.shape), 1e-4, None)
    return {"z500": z, "q850": q}


def field_dataset(field, values, times, *, lat=LAT, lon=LON, units=None, plev=True,
                  lat_attrs=None, lon_attrs=None) -> xr.Dataset:
    """One field as a Dataset in the demo's CF convention (``zg``/``hus``, ``plev`` in Pa)."""
    name, level, standard_name, default_units = _SPECS[field]
    attrs = {"standard_name": standard_name, "units": default_units if units is None else units}
    if units == "":
        del attrs["units"]
    coords = {"time": pd.DatetimeIndex(times),
              "lat": ("lat", lat, {"units": "degrees_north"} if lat_attrs is None else lat_attrs),
              "lon": ("lon", lon, {"units": "degrees_east"} if lon_attrs is None else lon_attrs)}
    data = np.asarray(values, dtype="float32")
    if plev:
        coords["plev"] = ("plev", [level], {"units": "Pa", "standard_name": "air_pressure"})
        return xr.Dataset({name: (("time", "plev", "lat", "lon"), data[:, None], attrs)},
                          coords=coords)
    return xr.Dataset({name: (("time", "lat", "lon"), data, attrs)}, coords=coords)


def write_archive(directory, *, times=None, fields=None, lat=LAT, lon=LON) -> list[Path]:
    """Write ``zg.nc`` and ``hus.nc`` (fields default to :func:`synthetic_fields`)."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    times = archive_times() if times is None else pd.DatetimeIndex(times)
    fields = synthetic_fields(times, lat=lat, lon=lon) if fields is None else fields
    paths = []
    for field, values in fields.items():
        path = directory / f"{_SPECS[field][0]}.nc"
        field_dataset(field, values, times, lat=lat, lon=lon).to_netcdf(path)
        paths.append(path)
    return paths


def write_events(path, times=None, *, n=1500, seed=SEED) -> Path:
    """Synthetic reports (time, lat, lon, kind) spread over the grid and the archive."""
    times = archive_times() if times is None else pd.DatetimeIndex(times)
    rng = np.random.default_rng(seed)
    picked = times[rng.integers(0, len(times), n)] + pd.to_timedelta(rng.integers(0, 20, n), unit="h")
    frame = pd.DataFrame({"time": picked.strftime("%Y-%m-%dT%H:%MZ"),
                          "lat": rng.uniform(25, 50, n).round(3),
                          "lon": rng.uniform(-120, -70, n).round(3),
                          "kind": rng.choice(["hail", "wind", "tornado"], n)})
    frame.to_csv(path, index=False)
    return Path(path)


_CACHE: dict[Path, dict] = {}
_CACHE_LOCK = threading.Lock()


def shared_store(root) -> dict:
    """Archive files, events and a built store under ``root``, built once per session.

    Returns {"files": [...], "events": Path, "store": Path, "dir": Path}. Tests must not
    modify it; tests that write copy it first (:func:`copy_store`).
    """
    root = Path(root)
    with _CACHE_LOCK:
        if root not in _CACHE:
            from analogs.api import build_store
            files = write_archive(root / "archive")
            events = write_events(root / "events.csv")
            build_store(files, root / "store", events=events, region=REGION, progress=False)
            _CACHE[root] = {"files": files, "events": events, "store": root / "store",
                            "dir": root}
        return _CACHE[root]


def session_root(tmp_path_factory) -> Path:
    """One directory for the shared store, whichever reliability module asks first."""
    return tmp_path_factory.getbasetemp() / "reliability_shared"


def copy_store(source, target) -> Path:
    import shutil
    shutil.copytree(source, target)
    return Path(target)


def file_digests(directory) -> dict[str, bytes]:
    """Every file of a directory and its bytes (to show it is exactly as before)."""
    return {p.name: p.read_bytes() for p in sorted(Path(directory).iterdir()) if p.is_file()}


def python_subprocess(code, **kwargs) -> subprocess.Popen:
    """Start ``python -c code`` with the test's interpreter and environment."""
    env = {**os.environ, "PYTHONHASHSEED": "0", **kwargs.pop("env", {})}
    return subprocess.Popen([sys.executable, "-c", code], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kwargs)
