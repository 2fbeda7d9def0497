"""Workflow: the find report's page, answer first, with every analog day to browse.

>>> from analogs.workflows.page import report_page
>>> text = report_page(store, result)          # HTML of analogs.presentation.report.find_html

The figures are :func:`analogs.workflows.find.report_figures`'s SVG maps; each analog's
own map in the browsing panel is its map in the analog grid shown again (``<use>``, no
second drawing); each day's reports come from the store's events table.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from analogs.results import FindResult


def analog_days(store, result: FindResult, views=()) -> dict:
    """rank -> {"tile", "alt", "reports", "extent", "markers"} for each analog of
    ``result``: ``tile``, its map in the analog grid ((SVG id, width, height), from
    ``views``: the analogs' maps in rank order, as ``report_figures(..., views=[])``
    fills them) or None; ``alt``, the map's
    description; ``reports``, its convective day's reports on the store's grid by time
    (dicts of time UTC as month-day hour:minute, kind, magnitude, lat, lon and whether
    in the outcome region), None when the store has no events table or no reports for
    that day yet; ``extent``, the map's latitudes and longitudes; ``markers``, kind ->
    (marker, colour) as the grid draws them."""
    from analogs.presentation.map_layers import degrees_east_label, degrees_north_label
    from analogs.presentation.svg_maps import marker_styles
    analogs = result.analogs
    region = result.region if result.region is not None else store.region
    lat, lon = store.grid
    events = store.events
    extent = (f"{degrees_north_label(float(np.min(lat)))} to "
              f"{degrees_north_label(float(np.max(lat)))}, "
              f"{degrees_east_label(float(np.min(lon)))} to "
              f"{degrees_east_label(float(np.max(lon)))}")
    markers = {}
    if events is not None:
        # Only the analog days' events (grouping the whole table by day would cost more
        # than the rest of the page).
        drawn = events[events["day"].isin(pd.to_datetime(analogs["date"]))]
        # The grid's markers: one per kind among every event of the analog days drawn.
        markers = marker_styles(sorted(drawn["kind"].astype(str).unique()))
        on_map = drawn[drawn["lat"].between(float(np.min(lat)), float(np.max(lat)))
                       & drawn["lon"].between(float(np.min(lon)), float(np.max(lon)))]
        by_day = _rows_by_day(on_map, region)
    known = (analogs["reports_known"].to_numpy(dtype=bool) if "reports_known" in analogs
             else np.ones(len(analogs), dtype=bool))
    days = {}
    for i, analog in enumerate(analogs.itertuples(index=False)):
        reports = None
        if events is not None and known[i]:
            reports = by_day.get(pd.Timestamp(analog.date).normalize(), [])
        kinds = sorted({r["kind"] for r in reports or []})
        alt = (f"Map of analog day {analog.date} (rank {analog.rank}, {analog.regime}, "
               f"distance {analog.distance:.2f}) over {extent}: 500 hPa height contours every "
               "60 gpm, the "
               "outcome region dashed, "
               + (f"{len(reports)} reports of the day marked by kind ({', '.join(kinds)})"
                  if reports else "no reports marked") + ".")
        days[int(analog.rank)] = {"tile": views[i] if i < len(views) else None,
                                  "alt": alt, "reports": reports, "markers": markers,
                                  "extent": extent}
    return days


def _rows_by_day(events: pd.DataFrame, region) -> dict[pd.Timestamp, list[dict]]:
    """The report rows of each convective day of ``events`` (by the day's midnight),
    in time order: one pass over the table, sorted by day and then by time (stable:
    reports of the same time keep the table's order)."""
    day = pd.to_datetime(events["day"]).dt.normalize().to_numpy()
    time = pd.to_datetime(events["time"]).to_numpy()
    order = np.lexsort((time, day))
    events, day, time = events.iloc[order], day[order], time[order]
    lat, lon = events["lat"].to_numpy(), events["lon"].to_numpy()
    inside = (region.contains(lat, lon) if region is not None
              else np.ones(len(events), dtype=bool))
    magnitudes = (events["magnitude"].tolist() if "magnitude" in events
                  else [None] * len(events))
    rows = [{"time": text, "kind": str(k), "magnitude": _magnitude(m), "lat": f"{y:.2f}",
             "lon": f"{x:.2f}", "in_region": bool(flag)}
            for text, k, m, y, x, flag in zip(
                pd.DatetimeIndex(time).strftime("%m-%d %H:%M"), events["kind"].tolist(),
                magnitudes, lat.tolist(), lon.tolist(), inside.tolist())]
    starts = np.flatnonzero(np.r_[True, day[1:] != day[:-1]]) if len(day) else []
    ends = list(starts[1:]) + [len(day)]
    return {pd.Timestamp(day[a]): rows[a:b] for a, b in zip(starts, ends)}


def _magnitude(value) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    return f"{value:g}" if isinstance(value, (int, float, np.number)) else str(value)


def report_page(store, result: FindResult, *, maps=None) -> str:
    """The HTML page of one query: figures, each analog's map and reports, answer first
    (:func:`analogs.presentation.report.find_html`)."""
    from analogs.presentation.report import find_html
    from analogs.workflows.find import report_figures
    views = []
    figures = report_figures(store, result, maps=maps, views=views)
    return find_html(result, store.manifest, figures=figures,
                     days=analog_days(store, result, views))
