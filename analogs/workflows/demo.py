"""``analogs demo``: the whole job on the synthetic archive of :mod:`reanalysis_demo`."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs.constants import G0
from analogs.stages.outcomes import Region
from analogs.presentation.report import write_text_atomic
from analogs.workflows.store import write_dataset


def write_forecast_like_field(archive: xr.Dataset, day, path) -> Path:
    """Write one canonical archive day as a model centre might: 0.5 degree grid,
    longitudes 0-360, latitude descending, geopotential in m2 s-2, specific humidity
    on a ``pressure_level`` axis in hPa — a file to try ``analogs find --field`` on."""
    one = archive.sel(time=day, method="nearest")
    lat = np.arange(float(one.lat.max()), float(one.lat.min()) - 0.01, -0.5)
    lon = np.arange(float(one.lon.min()), float(one.lon.max()) + 0.01, 0.5)
    fine = one.interp(lat=lat, lon=lon)
    fine = fine.assign_coords(lon=np.mod(fine["lon"].values, 360.0))
    valid = pd.Timestamp(one["time"].values)
    levels = [500.0, 850.0]
    shape = (1, len(levels), lat.size, lon.size)
    geopotential = np.full(shape, np.nan, dtype="float32")
    geopotential[0, 0] = fine["z500"].values * G0
    variables = {"z": (geopotential, {"standard_name": "geopotential", "units": "m2 s-2",
                                      "long_name": "Geopotential"})}
    if "q850" in fine.data_vars:
        humidity = np.full(shape, np.nan, dtype="float32")
        humidity[0, 1] = fine["q850"].values
        variables["q"] = (humidity, {"standard_name": "specific_humidity", "units": "kg kg-1",
                                     "long_name": "Specific humidity"})
    dims = ("valid_time", "pressure_level", "latitude", "longitude")
    out = xr.Dataset(
        {name: (dims, values, attrs) for name, (values, attrs) in variables.items()},
        coords={"valid_time": ("valid_time", [valid], {"standard_name": "time", "axis": "T"}),
                "pressure_level": ("pressure_level", levels,
                                   {"units": "hPa", "standard_name": "air_pressure", "axis": "Z",
                                    "positive": "down"}),
                "latitude": ("latitude", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                "longitude": ("longitude", fine["lon"].values,
                              {"units": "degrees_east", "standard_name": "longitude"})},
        attrs={"title": "analogs demo: one synthetic day written as a model forecast file",
               "Conventions": "CF-1.8"})
    path = Path(path)
    temporary = path.with_name(f".{path.name}.tmp")
    write_dataset(out, temporary)
    temporary.replace(path)
    return path


def _pick_target(tags: pd.DataFrame) -> pd.Timestamp:
    """A warm-season north-west-flow day of the last archive year (else the last day)."""
    last_year = tags.index.year.max()
    warm = tags[(tags.index.year == last_year) & tags.index.month.isin([6, 7, 8])]
    nw = warm[warm["regime"] == "northwest_flow"]
    if len(nw):
        return nw["confidence"].idxmax()
    return tags.index[-1]


def run_demo(out, *, years=10, seed=0, progress=True) -> int:
    """Generate, build, tag, query and report; print a summary. Returns 0."""
    import reanalysis_demo

    from analogs.api import build_store
    from analogs.presentation.figures import find_figures
    from analogs.presentation.report import find_html, find_text
    from analogs.stages.sources import open_archive

    out = Path(out)
    started = time.perf_counter()
    written = reanalysis_demo.write_archive(out, years=years, seed=seed, progress=progress)
    files = sorted((out / "archive").glob("*.nc"))
    region = Region.box(*reanalysis_demo.CENTRAL_REGION)
    store = build_store(files, out / "store", events=out / "events.csv", region=region,
                        progress=progress)
    tags = store.tags.reset_index()
    tags["date"] = tags["date"].dt.strftime("%Y-%m-%d")
    write_text_atomic(out / "tags.csv", tags.to_csv(index=False))
    target = _pick_target(store.tags)
    archive = open_archive(files, progress=False)
    forecast = write_forecast_like_field(archive, target, out / "forecast_field.nc")
    result = store.find(date=str(target.date()))
    figures = find_figures(store, result)
    write_text_atomic(out / "report" / "index.html",
                      find_html(result, store.manifest, figures=figures))
    print(find_text(result))
    print()
    print(f"demo written to {out} in {time.perf_counter() - started:.0f} s:")
    print(f"  archive     {out / 'archive'} ({len(files)} files), events {written.get('events', out / 'events.csv')}")
    print(f"  store       {out / 'store'} ({len(store.times)} days, {store.eof.n_modes_} EOF modes)")
    print(f"  tags        {out / 'tags.csv'}")
    print(f"  report      {out / 'report' / 'index.html'}")
    print(f"  try also    analogs find --store {out / 'store'} --field {forecast} "
          f"--time {target.date()}T12:00")
    return 0
