"""Write the archive year by year: CF-1.8 NetCDF fields, truth.csv and events.csv.

Files (``out_dir`` given by the caller):

- ``archive/zg500_YYYY.nc``: ``zg`` float32 (time, plev, lat, lon), plev = 50000 Pa.
- ``archive/hus850_YYYY.nc``: ``hus`` float32 (time, plev, lat, lon), plev = 85000 Pa.
- ``truth.csv`` and ``events.csv`` (``time,lat,lon,kind,magnitude``, times ISO 8601 UTC).

Encoding follows what a CF checker looks for: float64 time in "hours since
1900-01-01 00:00:00" with calendar "standard" (written as numbers, so the
units string is kept verbatim), no ``_FillValue`` on
coordinate variables, standard_name / units / axis on every coordinate.
"""

from __future__ import annotations

import datetime as _dt
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import numpy as np
from .generator import _iter_years, check_options
from .geography import DEFAULT_DOMAIN

TIME_UNITS = "hours since 1900-01-01 00:00:00"
#: (file stem, variable, pressure Pa, long name, standard_name, units)
LEVEL_FILES = (
    ("zg500", "zg", 50000.0, "Geopotential height at 500 hPa", "geopotential_height", "m"),
    ("hus850", "hus", 85000.0, "Specific humidity at 850 hPa", "specific_humidity", "kg kg-1"),
)
_FILL = np.float32(1.0e20)


def _version():
    try:
        return version("analogs")
    except PackageNotFoundError:
        return "unknown"


def cf_dataset(fields, variable, plev_pa, long_name, standard_name, units, *, seed, grid):
    """One variable of ``fields`` as a CF-1.8 Dataset with a length-one ``plev`` axis."""
    data = fields[variable].expand_dims(plev=[plev_pa], axis=1)
    data.attrs = {"standard_name": standard_name, "long_name": long_name, "units": units,
                  "cell_methods": "time: point"}
    ds = data.to_dataset(name=variable)
    hours = (ds["time"].values - np.datetime64("1900-01-01T00:00:00")) / np.timedelta64(1, "h")
    ds["time"] = ("time", hours.astype(np.float64),
                  {"standard_name": "time", "long_name": "time", "axis": "T",
                   "units": TIME_UNITS, "calendar": "standard"})
    ds["plev"].attrs = {"standard_name": "air_pressure", "long_name": "pressure", "units": "Pa",
                        "axis": "Z", "positive": "down"}
    ds["lat"].attrs = {"standard_name": "latitude", "long_name": "latitude",
                       "units": "degrees_north", "axis": "Y"}
    ds["lon"].attrs = {"standard_name": "longitude", "long_name": "longitude",
                       "units": "degrees_east", "axis": "X"}
    ds["plev"] = ds["plev"].astype(np.float64)
    ds["lat"] = ds["lat"].astype(np.float64)
    ds["lon"] = ds["lon"].astype(np.float64)
    created = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": f"Synthetic demo reanalysis: {long_name}, daily at 12 UTC",
        "institution": "analogs project (synthetic data, no observations)",
        "source": f"reanalysis_demo {_version()} (seed={seed}, grid={grid} deg)",
        "history": f"{created} created by reanalysis_demo",
        "comment": "Invented continent and weather; not real data.",
    }
    return ds


def _encoding(variable):
    coords = {name: {"_FillValue": None, "dtype": "float64"} for name in ("plev", "lat", "lon")}
    coords["time"] = {"dtype": "float64", "_FillValue": None}
    coords[variable] = {"dtype": "float32", "_FillValue": _FILL, "zlib": True, "complevel": 1,
                        "shuffle": True}
    return coords


def write_archive(out_dir, years=10, *, start_year=2001, grid=1.0, seed=0, domain=DEFAULT_DOMAIN,
                  progress=True):
    """Generate and write the archive one year at a time (bounded memory).

    Returns a dict of paths: ``archive`` (directory), ``zg`` and ``hus``
    (lists of yearly files), ``truth`` and ``events`` (CSV files).
    """
    years, start_year, grid, seed, domain = check_options(
        years, start_year, grid, seed, domain, "write_archive")
    out = Path(out_dir)
    archive = out / "archive"
    archive.mkdir(parents=True, exist_ok=True)
    paths = {"archive": archive, "zg": [], "hus": [], "truth": out / "truth.csv",
             "events": out / "events.csv"}
    year_iter = _iter_years(years, start_year, grid, seed, domain)
    if progress:
        from tqdm.auto import tqdm

        year_iter = tqdm(year_iter, total=years, desc="reanalysis_demo", unit="year")
    with open(paths["truth"], "w", newline="") as truth_file, \
            open(paths["events"], "w", newline="") as events_file:
        for i, part in enumerate(year_iter):
            for stem, variable, plev, long_name, standard_name, units in LEVEL_FILES:
                path = archive / f"{stem}_{part.year}.nc"
                ds = cf_dataset(part.fields, variable, plev, long_name, standard_name, units,
                                seed=seed, grid=grid)
                ds.to_netcdf(path, encoding=_encoding(variable), format="NETCDF4")
                paths[variable].append(path)
            part.truth.to_csv(truth_file, index=False, header=i == 0)
            part.events.to_csv(events_file, index=False, header=i == 0)
    return paths
