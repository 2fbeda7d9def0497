"""``analogs demo``: the whole job on the synthetic archive of :mod:`reanalysis_demo`."""

from __future__ import annotations

import json
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
                "forecast_field.nc", "chances.csv", "demo_metadata.json")


def skill_notes(metadata: dict) -> list[str]:
    """What skill to expect on the demo, from the archive's metadata: the generator's own best
    attainable Brier skill score for the box and the point region, and how demo skill relates
    to real archives."""
    point = metadata["point_region"]
    lines = []
    for name, label in (("box", f"box {metadata['box_region']['option']}"),
                        ("point", f"point {point['option']} ({point['town']}, "
                                  f"{point['radius_km']:g} km)")):
        best = metadata["best_attainable"][name]
        scores = ", ".join(f"{text} {best[key]:.2f}" if best[key] is not None else f"{text} n/a"
                           for key, text in (("bss_full_state", "knowing everything"),
                                             ("bss_fields_only", "knowing only the fields")))
        lines.append(f"{label}: base rate {100 * best['base_rate']:.1f} % of days; best "
                     f"attainable BSS {scores}")
    lines.append("The demo's skill is an upper bound by construction: its reports come from "
                 "a generator driven by the very fields the store compresses (plus a hidden "
                 "trigger). On real report archives, published analog guidance for severe "
                 "reports is far less skilful (from memory).")
    return lines


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

    Writes, under ``out``: ``archive/`` (NetCDF, with the land-sea mask in
    ``archive/static/``), ``events.csv``, ``truth.csv``, ``chances.csv`` and
    ``demo_metadata.json`` (by :mod:`reanalysis_demo`), ``store/``, ``tags.csv``, ``forecast_field.nc`` (one day
    written as a model centre might, to try ``find --field`` on) and
    ``report/index.html``. A folder that already holds a store, events or another of
    these outputs is refused unless ``replace=True`` (then they are replaced; archive
    files of an earlier, longer demo are left alone but not used). ``out`` is never
    inside a store. Returns what was made: ``store`` (the built store), ``result`` (the
    query's result), ``target`` (its day), ``files`` (the archive files), ``paths``
    (name -> path of every output) and ``metadata`` (the archive's ``demo_metadata.json``:
    its regions, reporting history and best attainable skill), for the caller to show.
    """
    import reanalysis_demo

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
    result, page = _query_with_page(store, str(target.date()))
    report = output.write_text(out / "report" / "index.html", page)
    paths = {"archive": out / "archive", "events": written.get("events", out / "events.csv"),
             "store": out / "store", "tags": out / "tags.csv", "forecast_field": forecast,
             "report": report, "metadata": written["metadata"]}
    metadata = json.loads(Path(written["metadata"]).read_text())
    return {"store": store, "result": result, "target": target, "files": files,
            "paths": paths, "metadata": metadata}


def _query_with_page(store, date):
    """The demo's query and its report page, through the find workflow (the target's
    fields gathered once) and the page workflow."""
    from analogs.workflows import find as find_workflow
    from analogs.workflows.page import report_page
    result = find_workflow.find(store, date=date)
    return result, report_page(store, result)
