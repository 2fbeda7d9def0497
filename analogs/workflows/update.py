"""Workflow: append new days to a store, projected on its climatology and EOFs, and
merge new reports into its report history by date.

The whole load-modify-write runs inside one :func:`analogs.workflows.store.transaction`:
the current version is loaded after the writer lock is held, so two updates of different
days (or an update and a retag) never lose each other's changes.

Reports (``events``) are merged by date (:mod:`analogs.workflows.reports`): the new
table's reports replace the store's only on the convective days it covers (its first to
its last report day, or ``events_period``); every other day keeps its reports, and the
covered days are added to the store's report coverage. Days appended without reports
have no coverage ("no reports yet") and are left out of outcome statistics until their
reports are merged.

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
from analogs.parameters import P
from analogs.stages.outcomes import EVENT_COLUMNS, merged_periods, parse_period
from analogs.workflows import reports
from analogs.workflows import store as store_io
from analogs.workflows.build import diagnostic_region
from analogs.workflows.paths import provenance
from analogs.workflows.find import stored_daily_counts, with_default_predictor_weights

#: The public function named in this workflow's parameter errors.
OWNER = "update_store"


def update_store(path, files, *, events=None, event_dates=P.event_dates.default,
                 events_period=None, progress=True, timeout=None):
    """Append the new days of ``files`` to the store at ``path`` and merge the reports of
    ``events`` by date; return the new store.

    The days are projected on the store's existing climatology and EOFs and tagged.
    Days already in the store are skipped, so appending the same files twice changes
    nothing (no new version is written). Files on another grid are regridded and their
    coverage checked as ``find --field`` targets are
    (:func:`analogs.workflows.find.days_on_store_grid`); files with other fields are
    refused. When the new days' median EOF reconstruction error exceeds the archive's
    99th percentile, a warning suggests a rebuild: the EOFs no longer describe them
    well. Days appended without reports have no report coverage ("no reports yet").

    ``events`` (a CSV or Parquet table, :func:`analogs.stages.outcomes.read_events`
    with ``dates=event_dates``) is merged by date: its reports replace the store's on
    the convective days it covers, ``events_period`` (``"FIRST,LAST"``) or else its
    first to its last report day, and those days gain report coverage; other days keep
    their reports. Reports outside the store's grid are counted, reported in a warning
    and left out. ``timeout``: seconds to wait for another writer
    (:func:`analogs.workflows.store.lock_timeout`).

    Returns
    -------
    AnalogStore
        The version written (or, when nothing changed, the current one), freshly loaded
        under the writer lock. Its ``last_update`` is the summary of this update: days
        in the files, days added, days already present, the drift figures and, with
        ``events``, ``events`` (the merge: ``before``, ``replaced``, ``added``,
        ``after``, the days covered, ``n_outside_grid``); for a store with events,
        ``days_covered`` and ``days_without_reports`` of the whole store.
    """
    from analogs.workflows.analog_store import AnalogStore
    files = [Path(p) for p in ([files] if isinstance(files, (str, Path)) else files)]
    if not files:
        raise AnalogsInputError("no archive files given to update: pass one or more "
                                "NetCDF/Zarr files")
    event_dates = P.event_dates.check(event_dates, OWNER)
    if events_period is not None:
        parse_period(events_period, "events_period", OWNER)  # refused before any work
    with store_io.transaction(path, timeout=timeout) as txn:
        current = AnalogStore._load_version(txn.path, manifest=txn.manifest)
        summary, change = _appended(current, files, events, event_dates, events_period,
                                    progress=progress)
        if change is None:
            new = current
        else:
            _write_update(txn, current, *change)
            new = AnalogStore._load_version(txn.path, manifest=txn.committed)
    if change is not None:
        # The default query's event-weighted map refitted on the new days and reports
        # (as the build keeps it), so a default query need not fit it.
        new = with_default_predictor_weights(new)
    if new.events is not None:  # report coverage (issue 13) means something with events
        summary["days_covered"] = int(new.covered.sum())
        summary["days_without_reports"] = int((~new.covered).sum())
    new.last_update = summary
    return new


def _appended(current, files, events, event_dates, events_period, *, progress):
    """The update's summary and what it changes: (manifest, pcs, tags, tag attrs, events
    table or None to carry the store's), or None when nothing changes."""
    from analogs.stages.regimes import tag_days
    from analogs.stages.sources import open_archive
    from analogs.workflows import find as find_workflow
    merge = None
    if events is not None:  # merged first: a bad table is refused before the archive is read
        merge = _merged_events(current, events, event_dates, events_period)
    config = current.manifest["config"]
    archive = open_archive(files, fields=current.fields, region=config.get("domain"),
                           hour=config["hour"], daily=config["daily"], progress=progress)
    # 15b: days on another grid are regridded and coverage-checked as `find --field` is.
    archive = find_workflow.days_on_store_grid(current, archive)
    _check_compatible(current, archive, files)
    new_times = pd.DatetimeIndex(archive["time"].values)
    fresh = ~new_times.normalize().isin(current.days)
    summary = {"days_in_files": int(len(new_times)), "days_added": int(fresh.sum()),
               "days_already_present": int((~fresh).sum())}
    if merge is not None:
        summary["events"] = merge["summary"]
    if not fresh.any() and (merge is None or not merge["changed"]):
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
    all_days = pd.DatetimeIndex(pcs["time"].values).normalize()
    event_table = None
    if merge is not None and merge["changed"]:
        event_table = merge["table"]
        previous = current.manifest.get("events") or {}
        manifest["events"] = reports.events_block(
            events, event_table, merge["periods"], all_days,
            n_outside=merge["summary"]["n_outside_grid"],
            history=[*previous.get("history", []), {
                "source": str(Path(events).resolve()),
                "written": pd.Timestamp.now(tz="UTC").isoformat(timespec="seconds"),
                **merge["summary"]}])
    elif current.events is not None:
        # Days appended without reports: not covered (the periods stay as they were).
        previous = current.manifest.get("events") or {}
        manifest["events"] = reports.events_block(
            previous.get("source"), current.events, _held_periods(current), all_days,
            n_outside=previous.get("n_outside_grid", 0), history=previous.get("history", []))
    manifest.setdefault("updates", []).append({
        "written": pd.Timestamp.now(tz="UTC").isoformat(timespec="seconds"),
        "inputs": [str(Path(p).resolve()) for p in files],
        "missing_data": json.loads(archive.attrs.get("missing_data", "{}")), **summary})
    return summary, (manifest, pcs, tags, tag_attrs, event_table)


def _same_reports(a: pd.DataFrame, b: pd.DataFrame) -> bool:
    """Whether two events tables hold the same reports, in any order."""
    if len(a) != len(b):
        return False
    order = ["time", "lat", "lon", "kind", "magnitude"]
    columns = list(EVENT_COLUMNS)
    return a[columns].sort_values(order, ignore_index=True).equals(
        b[columns].sort_values(order, ignore_index=True))


def _held_periods(current) -> list:
    """The store's covered periods; a store without coverage records covers the days it
    holds (every day counted as covered before), from its first to its last day."""
    periods = reports.coverage_periods(current.manifest)
    if periods is not None:
        return periods
    if current.events is None:
        return []
    return [[str(current.days[0].date()), str(current.days[-1].date())]]


def _merged_events(current, events, event_dates, events_period) -> dict:
    """The merge of the events table at ``events`` into the store's, by date: the new
    ``table`` and coverage ``periods``, whether anything ``changed`` and the
    ``summary`` of the merge (counts before and after, days covered)."""
    lat, lon = current.grid
    table, n_outside = reports.load_events(events, lat, lon, dates=event_dates)
    held = current.events
    before = 0 if held is None else int(len(held))
    period = reports.coverage_period(table, events_period, default=None, owner=OWNER)
    periods = _held_periods(current)
    if period is None:
        warnings.warn(f"events file {events} holds no reports and no --events-period was "
                      "given: it covers no day, so nothing was replaced", stacklevel=4)
        return {"changed": False, "table": held, "periods": periods,
                "summary": {"before": before, "replaced": 0, "added": 0, "after": before,
                            "first_day": None, "last_day": None,
                            "n_outside_grid": n_outside}}
    merged, counts = reports.merged_history(held, table, *period)
    new_periods = [*periods, [str(period[0].date()), str(period[1].date())]]
    changed = (held is None or not _same_reports(merged, held)
               or merged_periods(new_periods) != merged_periods(periods))
    return {"changed": changed, "table": merged, "periods": new_periods,
            "summary": {**counts, "n_outside_grid": n_outside}}


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
    events = current.events if event_table is None else event_table
    if events is not None:  # the region's daily counts over the new days and events
        days = pd.DatetimeIndex(pcs["time"].values).normalize()
        store_io.write_table(stored_daily_counts(events, days, current.region),
                             txn.staging / store_io.COUNTS)
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
