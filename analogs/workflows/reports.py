"""Workflow: a store's report history, kept as data.

An events table speaks for the convective days it covers: on a covered day without a
report there was none; a day it does not cover is not known yet ("no reports yet"), for
example a day appended by ``analogs update`` before its reports are in. The store keeps
which days are covered, as periods of convective days in its manifest
(``manifest["events"]["coverage"]``, :data:`COVERAGE_RULE`), and days without coverage
are left out of every outcome statistic: a query's analog probabilities (counted over
the covered analogs, saying how many), its season climatology, the verification
hindcast, the build's skill and the briefing's outcome tables.

Coverage:

* build with ``--events``: every archive day (the table is the report record of the
  archive), or the days of ``--events-period``;
* ``update --events NEW``: the convective days from NEW's first to its last report, or
  ``--events-period``; on those days NEW's reports replace the store's (a merge by
  date: other days keep theirs);
* days appended without events get none; a store built before coverage was recorded
  covers every day when it has an events table.

Reports outside the archive's grid (more than half a grid spacing beyond it) can never
be near a grid point: they are counted, reported in a warning and left out.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from analogs.parameters import P
from analogs.stages.outcomes import (
    covered_days,
    event_period,
    merge_events,
    merged_periods,
    outside_grid,
    parse_period,
    read_events,
)

#: What the manifest says coverage means (``manifest["events"]["coverage"]["rule"]``).
COVERAGE_RULE = (
    "convective days (12 UTC to 12 UTC) for which the events table is the report record: "
    "at build every archive day (or --events-period); update --events adds the days from "
    "the new table's first to its last report (or --events-period), whose reports replace "
    "the store's on those days; days appended without events have none. Days without "
    "coverage are left out of outcome statistics, climatology, verification and skill.")


def load_events(path, lat, lon, *, dates=P.event_dates.default) -> tuple[pd.DataFrame, int]:
    """The events table at ``path`` (:func:`analogs.stages.outcomes.read_events`) without
    the reports outside the grid ``lat``, ``lon``, and how many those were (a warning
    gives the count)."""
    table = read_events(path, dates=dates)
    outside = outside_grid(table, lat, lon)
    n_outside = int(outside.sum())
    if n_outside:
        lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
        warnings.warn(
            f"events file {path}: {n_outside} of {len(table)} reports lie outside the "
            f"archive's grid (lat {lat.min():g} to {lat.max():g}, lon {lon.min():g} to "
            f"{lon.max():g}) and are left out", stacklevel=3)
        table = table.loc[~outside].reset_index(drop=True)
    return table, n_outside


def coverage_period(table, period, *, default, owner):
    """(first, last) convective days an events table covers: ``period`` (text
    ``FIRST,LAST`` or a pair) when given, else ``default`` (a pair, or None: the table's
    own first to last report day, :func:`analogs.stages.outcomes.event_period`).
    None when there is nothing to cover (an empty table and no period)."""
    if period is not None:
        first, last = parse_period(period, "events_period", owner)
        days = table["day"] if len(table) else pd.Series([], dtype="datetime64[ns]")
        stray = ((days < first) | (days > last)).to_numpy()
        if stray.any():
            from analogs._validation import fail
            fail("events_period", owner, f"a period holding every report of the events table "
                 f"({int(stray.sum())} of its {len(table)} reports fall outside it, first "
                 f"{pd.Timestamp(days[stray].min()).date()})", period)
        return first, last
    if default is not None:
        return pd.Timestamp(default[0]).normalize(), pd.Timestamp(default[1]).normalize()
    return event_period(table)


def coverage_periods(manifest) -> list | None:
    """The covered periods recorded in a manifest (``[["YYYY-MM-DD", "YYYY-MM-DD"],
    ...]``), or None when the store predates coverage records."""
    events = manifest.get("events") or {}
    coverage = events.get("coverage")
    return None if coverage is None else [list(p) for p in coverage.get("periods", [])]


def covered_mask(manifest, days, *, has_events: bool) -> np.ndarray:
    """Whether each archive day has report coverage (bool array aligned with ``days``).
    No events table: none; a store without coverage records: every day."""
    if not has_events:
        return np.zeros(len(days), dtype=bool)
    periods = coverage_periods(manifest)
    if periods is None:
        return np.ones(len(days), dtype=bool)
    return covered_days(days, periods)


def events_block(source, table, periods, days, *, n_outside=0, history=()) -> dict:
    """The manifest's ``"events"`` entry: source, counts, kinds and coverage."""
    periods = merged_periods(periods)
    covered = covered_days(days, periods)
    return {
        "source": str(Path(source).resolve()) if source is not None else None,
        "n_events": int(len(table)),
        "kinds": sorted(table["kind"].unique().tolist()),
        "n_outside_grid": int(n_outside),
        "coverage": {"rule": COVERAGE_RULE, "periods": periods,
                     "n_days_covered": int(covered.sum()),
                     "n_days_without_reports": int((~covered).sum())},
        "history": list(history),
    }


def merged_history(held, new, first, last) -> tuple[pd.DataFrame, dict]:
    """The events after ``new`` replaces ``held`` on the convective days ``first`` to
    ``last`` (:func:`analogs.stages.outcomes.merge_events`), and the counts of the merge:
    ``before``, ``replaced`` (held reports on those days), ``added`` and ``after``."""
    merged = merge_events(held, new, first, last)
    before = 0 if held is None else int(len(held))
    kept = int(len(merged)) - int(len(new))
    return merged, {"first_day": str(first.date()), "last_day": str(last.date()),
                    "before": before, "replaced": before - kept, "added": int(len(new)),
                    "after": int(len(merged))}


__all__ = ["COVERAGE_RULE", "coverage_period", "coverage_periods", "covered_mask",
           "events_block", "load_events", "merged_history"]
