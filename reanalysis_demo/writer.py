"""Write the archive year by year: CF-1.8 NetCDF fields, truth.csv and events.csv.

Files (``out_dir`` given by the caller):

- ``archive/zg500_YYYY.nc``: ``zg`` float32 (time, plev, lat, lon), plev = 50000 Pa.
- ``archive/hus850_YYYY.nc``: ``hus`` float32 (time, plev, lat, lon), plev = 85000 Pa.
- ``archive/static/land_sea_mask.nc``: ``lsm`` float32 (lat, lon), 1 on land and 0 at sea
  (standard_name ``land_binary_mask``), on the same lat/lon coordinates as the yearly files;
  in a subfolder, so a glob of ``archive/*.nc`` finds the daily fields only.
- ``truth.csv`` and ``events.csv`` (``time,lat,lon,kind,magnitude``, times ISO 8601 UTC).
- ``chances.csv``: per day, whether a report was recorded in the box and in the point region
  and the generator's own chance of it (:mod:`.chances`; not something a forecaster has).
- ``demo_metadata.json``: the regions, the reporting history (growth by kind, the 2006
  change), the base rates and the best attainable Brier skill scores of this archive.

Encoding follows what a CF checker looks for: float64 time in "hours since
1900-01-01 00:00:00" with calendar "standard" (written as numbers, so the
units string is kept verbatim), no ``_FillValue`` on
coordinate variables, standard_name / units / axis on every coordinate.
"""

from __future__ import annotations

import datetime as _dt
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import json

import numpy as np
import pandas as pd
import xarray as xr

from . import reporting, trigger
from .chances import POINT_REGION, POINT_TOWN, best_attainable_skill
from .events import KINDS
from .generator import _iter_years, check_options
from .geography import CENTRAL_REGION, DEFAULT_DOMAIN, land_mask, make_grid

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
    _set_horizontal_coords(ds)
    ds["plev"] = ds["plev"].astype(np.float64)
    ds.attrs = _global_attrs(f"Synthetic demo reanalysis: {long_name}, daily at 12 UTC", seed, grid)
    return ds


def _set_horizontal_coords(ds):
    """The lat/lon coordinates (float64, CF attributes) shared by every file of the archive."""
    ds["lat"] = ds["lat"].astype(np.float64)
    ds["lon"] = ds["lon"].astype(np.float64)
    ds["lat"].attrs = {"standard_name": "latitude", "long_name": "latitude",
                       "units": "degrees_north", "axis": "Y"}
    ds["lon"].attrs = {"standard_name": "longitude", "long_name": "longitude",
                       "units": "degrees_east", "axis": "X"}


def _global_attrs(title, seed, grid):
    created = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    return {
        "Conventions": "CF-1.8",
        "title": title,
        "institution": "analogs project (synthetic data, no observations)",
        "source": f"reanalysis_demo {_version()} (seed={seed}, grid={grid} deg)",
        "history": f"{created} created by reanalysis_demo",
        "comment": "Invented continent and weather; not real data.",
    }


def land_sea_mask_dataset(domain, grid, *, seed):
    """The continent's land-sea mask as a CF-1.8 Dataset: ``lsm`` float32 (lat, lon), 1 land, 0 sea."""
    lat1d, lon1d = make_grid(domain, grid)
    lon2d, lat2d = np.meshgrid(lon1d, lat1d)
    ds = xr.Dataset(
        {"lsm": (("lat", "lon"), land_mask(lat2d, lon2d).astype(np.float32),
                 {"standard_name": "land_binary_mask", "units": "1",
                  "long_name": "land-sea mask (1 land, 0 sea)"})},
        coords={"lat": lat1d, "lon": lon1d})
    _set_horizontal_coords(ds)
    ds.attrs = _global_attrs("Synthetic demo reanalysis: land-sea mask", seed, grid)
    return ds


def reporting_history(start_year, years):
    """The reporting history of the archive's years, for its metadata: growth by kind and the change."""
    last = start_year + years - 1
    return {
        "reporting_change": {
            "year": reporting.REPORTING_CHANGE_YEAR,
            "what": "from 1 January of this year hail and wind reports from trained spotters away "
                    "from towns are accepted: their recording floor far from towns and roads rises "
                    "from {0[0]} to {0[1]}; tornado reporting is unchanged".format(
                        reporting.RECORDING_FLOOR["hail"])},
        "reporting_growth": {kind: {"half_maturity_year": reporting.REPORTING_GROWTH[kind][0],
                                    "width_years": reporting.REPORTING_GROWTH[kind][1],
                                    f"factor_{start_year}": round(reporting.reporting_trend(kind, start_year), 3),
                                    f"factor_{last}": round(reporting.reporting_trend(kind, last), 3)}
                             for kind in KINDS},
        "towns": [{"name": name, "lat": lat, "lon": lon, "population_thousands": pop}
                  for name, lat, lon, pop in reporting.TOWNS],
    }


def demo_metadata(chances: pd.DataFrame, *, start_year, years, seed, grid) -> dict:
    """What the archive is and the best skill its outcomes allow (:mod:`.chances`)."""
    p_lat, p_lon, radius = POINT_REGION
    south, north, west, east = CENTRAL_REGION
    return {
        "generator": "reanalysis_demo", "seed": seed, "grid_deg": grid,
        "first_year": start_year, "last_year": start_year + years - 1,
        "box_region": {"south": south, "north": north, "west": west, "east": east,
                       "option": f"{south:g},{north:g},{west:g},{east:g}"},
        "point_region": {"town": POINT_TOWN, "lat": p_lat, "lon": p_lon, "radius_km": radius,
                         "option": f"{p_lat:g},{p_lon:g},{radius:g}"},
        "hidden_trigger": {"node_spacing_deg": trigger.NODE_SPACING_DEG,
                           "lag_one_coefficient": trigger.NODE_AR,
                           "note": "a daily cap-breaking index that drives storms and is not "
                                   "in the archive"},
        **reporting_history(start_year, years),
        "best_attainable": best_attainable_skill(chances),
        "best_attainable_note": "Brier skill score of the generator's own chance of at least one "
                                "recorded report in the region, against the season climatology "
                                "of the other years (within 45 days, as analogs verify): "
                                "bss_full_state knows the hidden trigger, bss_fields_only knows "
                                "only the archive's fields. No method on this archive can "
                                "expect to beat bss_full_state.",
    }


def _encoding(variable):
    coords = {name: {"_FillValue": None, "dtype": "float64"} for name in ("lat", "lon")}
    if variable != "lsm":
        coords["plev"] = {"_FillValue": None, "dtype": "float64"}
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
             "events": out / "events.csv", "chances": out / "chances.csv",
             "land_sea_mask": archive / "static" / "land_sea_mask.nc",
             "metadata": out / "demo_metadata.json"}
    paths["land_sea_mask"].parent.mkdir(exist_ok=True)
    land_sea_mask_dataset(domain, grid, seed=seed).to_netcdf(
        paths["land_sea_mask"], encoding=_encoding("lsm"), format="NETCDF4")
    year_iter = _iter_years(years, start_year, grid, seed, domain)
    if progress:
        from tqdm.auto import tqdm

        year_iter = tqdm(year_iter, total=years, desc="reanalysis_demo", unit="year")
    chance_parts = []
    with open(paths["truth"], "w", newline="") as truth_file, \
            open(paths["events"], "w", newline="") as events_file, \
            open(paths["chances"], "w", newline="") as chances_file:
        for i, part in enumerate(year_iter):
            for stem, variable, plev, long_name, standard_name, units in LEVEL_FILES:
                path = archive / f"{stem}_{part.year}.nc"
                ds = cf_dataset(part.fields, variable, plev, long_name, standard_name, units,
                                seed=seed, grid=grid)
                ds.to_netcdf(path, encoding=_encoding(variable), format="NETCDF4")
                paths[variable].append(path)
            part.truth.to_csv(truth_file, index=False, header=i == 0)
            part.events.to_csv(events_file, index=False, header=i == 0)
            part.chances.to_csv(chances_file, index=False, header=i == 0)
            chance_parts.append(part.chances)
    metadata = demo_metadata(pd.concat(chance_parts, ignore_index=True), start_year=start_year,
                             years=years, seed=seed, grid=grid)
    paths["metadata"].write_text(json.dumps(metadata, indent=1, allow_nan=False) + "\n")
    return paths
