"""Workflow: append new days to a store, projected on its climatology and EOFs.

The whole load-modify-write runs inside one :func:`analogs.workflows.store.transaction`:
the current version is loaded after the writer lock is held, so two updates of different
days (or an update and a retag) never lose each other's changes.

>>> from analogs.workflows.update import update_store             # doctest: +SKIP
>>> store = update_store("store", ["era5_2024.nc"], progress=False)  # doctest: +SKIP
>>> store.last_update["days_added"]                                # doctest: +SKIP
366
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs.errors import AnalogsInputError
from analogs.stages.outcomes import read_events
from analogs.workflows import store as store_io
from analogs.workflows.build import diagnostic_region, provenance


def update_store(path, files, *, events=None, progress=True, timeout=None):
    """Append the new days of ``files`` to the store at ``path``; return the new store.

    The days are projected on the store's existing climatology and EOFs and tagged.
    Days already in the store are skipped, so appending the same files twice changes
    nothing (no new version is written). Files on another grid or with other fields are
    refused. When the new days' median EOF reconstruction error exceeds the archive's
    99th percentile, a warning suggests a rebuild: the EOFs no longer describe them
    well. ``events`` (a CSV or Parquet table) replaces the events table. ``timeout``:
    seconds to wait for another writer (:func:`analogs.workflows.store.lock_timeout`).

    Returns
    -------
    AnalogStore
        The version written (or, when nothing changed, the current one), freshly loaded
        under the writer lock. Its ``last_update`` is the summary of this update: days
        in the files, days added, days already present and the drift figures.
    """
    from analogs.workflows.analog_store import AnalogStore
    files = [Path(p) for p in ([files] if isinstance(files, (str, Path)) else files)]
    if not files:
        raise AnalogsInputError("no archive files given to update: pass one or more "
                                "NetCDF/Zarr files")
    event_table = read_events(events) if events is not None else None
    with store_io.transaction(path, timeout=timeout) as txn:
        current = AnalogStore._load_version(Path(path), manifest=txn.manifest)
        summary, change = _appended(current, files, event_table, events, progress=progress)
        if change is None:
            new = current
        else:
            _write_update(txn, current, *change, event_table)
            new = AnalogStore._load_version(Path(path), manifest=txn.committed)
    new.last_update = summary
    return new


def _appended(current, files, event_table, events, *, progress):
    """The update's summary and what it changes: (manifest, pcs, tags, tag attrs), or
    None when nothing changes."""
    from analogs.stages.regimes import tag_days
    from analogs.stages.sources import open_archive
    config = current.manifest["config"]
    archive = open_archive(files, fields=current.fields, region=config.get("domain"),
                           hour=config["hour"], daily=config["daily"], progress=progress)
    _check_compatible(current, archive, files)
    new_times = pd.DatetimeIndex(archive["time"].values)
    fresh = ~new_times.normalize().isin(current.days)
    summary = {"days_in_files": int(len(new_times)), "days_added": int(fresh.sum()),
               "days_already_present": int((~fresh).sum())}
    if not fresh.any() and event_table is None:
        return summary, None
    manifest = store_io.editable(current.manifest)
    pcs, tags, tag_attrs = current.pcs, current.tags, dict(current.tag_attrs)
    if fresh.any():
        added = archive.isel(time=np.flatnonzero(fresh))
        anomalies = current.climatology.transform(added)
        new_pcs = current.eof.transform(anomalies).transpose("time", "mode")
        errors = current.eof.reconstruction_error(anomalies).values
        reference = manifest["archive"].get("reconstruction_error") or {}
        summary["new_days_median_reconstruction_error"] = float(np.median(errors))
        summary["archive_p99_reconstruction_error"] = reference.get("p99")
        if reference.get("p99") and np.median(errors) > reference["p99"]:
            warnings.warn(
                f"the appended days are unlike the archive (median EOF reconstruction error "
                f"{np.median(errors):.3g} above the archive's 99th percentile "
                f"{reference['p99']:.3g}); consider rebuilding the store", stacklevel=3)
        pcs = xr.concat([current.pcs, new_pcs.assign_coords(mode=current.pcs["mode"])],
                        dim="time")
        pcs = pcs.isel(time=np.argsort(pcs["time"].values, kind="stable"))
        new_tags = tag_days(added, diagnostic_region(current.region, added), progress=False)
        new_tags = new_tags.set_index("date")
        tag_attrs = tag_attrs or dict(new_tags.attrs)
        tags = new_tags if current.tags is None else pd.concat([current.tags, new_tags]).sort_index()
        times = pd.DatetimeIndex(pcs["time"].values)
        manifest["archive"] = {**manifest["archive"], "n_days": int(len(times)),
                               "time_start": times[0].isoformat(),
                               "time_end": times[-1].isoformat(),
                               "inputs": manifest["archive"]["inputs"] + provenance(files)}
    if event_table is not None:
        manifest["events"] = {"source": str(Path(events).resolve()),
                              "n_events": int(len(event_table)),
                              "kinds": sorted(event_table["kind"].unique().tolist())}
    manifest.setdefault("updates", []).append({
        "written": pd.Timestamp.now(tz="UTC").isoformat(timespec="seconds"),
        "inputs": [str(Path(p).resolve()) for p in files],
        "missing_data": json.loads(archive.attrs.get("missing_data", "{}")), **summary})
    return summary, (manifest, pcs, tags, tag_attrs)


def _check_compatible(current, archive, files) -> None:
    lat, lon = current.grid
    names = ", ".join(str(p) for p in files)
    if (archive.sizes["lat"], archive.sizes["lon"]) != (lat.size, lon.size) or not (
            np.allclose(archive["lat"].values, lat) and np.allclose(archive["lon"].values, lon)):
        raise AnalogsInputError(
            f"{names}: grid {archive.sizes['lat']} x {archive.sizes['lon']} "
            f"(lat {float(archive.lat.min()):g} to {float(archive.lat.max()):g}, lon "
            f"{float(archive.lon.min()):g} to {float(archive.lon.max()):g}) differs from the "
            f"store's {lat.size} x {lon.size}; update needs the store's grid (or rebuild)")
    extra = sorted(set(archive.data_vars) - set(current.fields))
    if extra:
        raise AnalogsInputError(f"{names}: fields {', '.join(extra)} are not in the store "
                                f"({', '.join(current.fields)}); rebuild to use them")


def _write_update(txn, current, manifest, pcs, tags, tag_attrs, event_table) -> None:
    """Write the changed files into the transaction's staging directory, carry the
    others, and commit."""
    txn.carry(store_io.BASIS, store_io.MODELS)
    if event_table is None:
        txn.carry(store_io.EVENTS)
    else:
        store_io.write_table(event_table, txn.staging / store_io.EVENTS)
    if pcs is current.pcs:  # only the events changed
        txn.carry(store_io.SCORES, store_io.TAGS)
    else:
        store_io.write_dataset(
            xr.Dataset({"pcs": pcs.astype("float64")},
                       attrs={"title": "analogs store principal components",
                              "Conventions": "CF-1.8"}),
            txn.staging / store_io.SCORES)
        if tags is not None:
            table = tags.reset_index()
            table.attrs = tag_attrs
            store_io.write_table(table, txn.staging / store_io.TAGS)
    txn.commit(manifest)
