"""``analogs demo``: the whole job on the synthetic archive of :mod:`reanalysis_demo`."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs._validation import fail
from analogs.constants import G0
from analogs.parameters import P
from analogs.stages.outcomes import Region
from analogs.workflows import files as output
from analogs.workflows.tagging import write_tags
from analogs.workflows.paths import check_output


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
    return output.write_netcdf(out, path)


def _pick_target(tags: pd.DataFrame) -> pd.Timestamp:
    """A warm-season north-west-flow day of the last archive year (else the last day)."""
    last_year = tags.index.year.max()
    warm = tags[(tags.index.year == last_year) & tags.index.month.isin([6, 7, 8])]
    nw = warm[warm["regime"] == "northwest_flow"]
    if len(nw):
        return nw["confidence"].idxmax()
    return tags.index[-1]


#: What the demo writes under its folder (a folder holding any of them is refused
#: unless ``replace=True``).
DEMO_OUTPUTS = ("store", "events.csv", "truth.csv", "archive", "tags.csv",
                "tags.csv-metadata.json", "report",
                "forecast_field.nc")


def check_demo_folder(out, *, replace=False, owner="run_demo") -> Path:
    """``out`` as the demo's folder, refused when it is or lies inside an analogs store,
    is a file, or already holds a store or other demo outputs (unless ``replace``)."""
    check_output(out, "out", owner, kind="directory")
    out = Path(out)
    present = [name for name in DEMO_OUTPUTS if (out / name).exists()]
    if present and not replace:
        fail("out", owner, "a folder without an earlier demo's outputs (it holds "
             f"{', '.join(present)}; pass --replace, or replace=True, to replace them)",
             str(out))
    return out


def run_demo(out, *, years=P.years.default, seed=P.seed.default, replace=False,
             progress=True) -> dict:
    """Generate the synthetic archive, build and tag a store, query one day and write
    its report.

    Writes, under ``out``: ``archive/`` (NetCDF), ``events.csv`` and ``truth.csv`` (by
    :mod:`reanalysis_demo`), ``store/``, ``tags.csv``, ``forecast_field.nc`` (one day
    written as a model centre might, to try ``find --field`` on) and
    ``report/index.html``. A folder that already holds a store, events or another of
    these outputs is refused unless ``replace=True`` (then they are replaced; archive
    files of an earlier, longer demo are left alone but not used). ``out`` is never
    inside a store. Returns what was made: ``store`` (the built store), ``result`` (the
    query's result), ``target`` (its day), ``files`` (the archive files) and ``paths``
    (name -> path of every output), for the caller to show.
    """
    import reanalysis_demo

    from analogs.presentation.report import find_html
    from analogs.stages.sources import open_archive
    from analogs.workflows.build import build_store

    years, seed = P.years.check(years, "run_demo"), P.seed.check(seed, "run_demo")
    out = check_demo_folder(out, replace=replace)
    written = reanalysis_demo.write_archive(out, years=years, seed=seed, progress=progress)
    files = sorted(Path(p) for p in [*written["zg"], *written["hus"]])
    region = Region.box(*reanalysis_demo.CENTRAL_REGION)
    # The demo continent's land-sea mask, when reanalysis_demo writes one (maps only).
    mask = out / "archive" / "static" / "land_sea_mask.nc"
    store = build_store(files, out / "store", events=out / "events.csv", region=region,
                        land_mask=mask if mask.is_file() else None, progress=progress)
    write_tags(store, out / "tags.csv")  # with its CSVW sidecar of column units
    target = _pick_target(store.tags)
    archive = open_archive(files, progress=False)
    forecast = write_forecast_like_field(archive, target, out / "forecast_field.nc")
    result, figures = _query_with_figures(store, str(target.date()))
    report = output.write_text(out / "report" / "index.html",
                               find_html(result, store.manifest, figures=figures))
    paths = {"archive": out / "archive", "events": written.get("events", out / "events.csv"),
             "store": out / "store", "tags": out / "tags.csv", "forecast_field": forecast,
             "report": report}
    return {"store": store, "result": result, "target": target, "files": files,
            "paths": paths}


def _query_with_figures(store, date):
    """The demo's query and its report figures, (caption, PNG bytes, alt text), through the find
    workflow (the target's fields gathered once)."""
    from analogs.workflows import find as find_workflow
    result = find_workflow.find(store, date=date)
    return result, find_workflow.report_figures(store, result)
