"""Analog selection: season window, exclusion window, de-clustering, ranking.

Analog searches are restricted to a window of about one to two months around the
target's calendar day, and analogs within a few days of a better analog belong to the
same weather episode, so they are dropped (common practice, no source).
"""

from __future__ import annotations

import weakref

import numpy as np
import pandas as pd

from analogs._validation import check_int
from analogs.stages.index import AnalogIndex

#: Mean length of the year in days, for circular calendar-day distances.
DAYS_PER_YEAR = 365.2425
#: Default number of analogs returned.
DEFAULT_TOP = 20
#: Default half-width of the season window, calendar days (about three months in all).
DEFAULT_WINDOW = 45
#: Default exclusion around a --date target's own date, days: its own episode.
DEFAULT_EXCLUDE = 10
#: Default de-clustering distance, days.
DEFAULT_SEPARATION = 3


def _as_datetime64(times) -> np.ndarray:
    """``times`` as a numpy datetime64 array, in its own unit (no pandas index is built:
    queries are hot)."""
    values = times.to_numpy() if isinstance(times, pd.DatetimeIndex) else np.asarray(times)
    return values if values.dtype.kind == "M" else values.astype("datetime64[ns]")


#: Calendar arrays of recently queried DatetimeIndex objects (immutable), by identity:
#: a loaded store asks about the same index at every query. Bounded, weakly referenced.
_CALENDAR_CACHE: dict[int, tuple] = {}
_CALENDAR_CACHE_SIZE = 8


def _calendar(times) -> tuple[np.ndarray, np.ndarray]:
    """(day of year, whole days since 1970-01-01) of each time."""
    if isinstance(times, pd.DatetimeIndex):
        hit = _CALENDAR_CACHE.get(id(times))
        if hit is not None and hit[0]() is times:
            return hit[1], hit[2]
    stamps = _as_datetime64(times)
    days = stamps.astype("datetime64[D]")
    arrays = ((days - stamps.astype("datetime64[Y]")).astype(np.int64) + 1,
              days.astype(np.int64))
    if isinstance(times, pd.DatetimeIndex):
        if len(_CALENDAR_CACHE) >= _CALENDAR_CACHE_SIZE:
            _CALENDAR_CACHE.pop(next(iter(_CALENDAR_CACHE)))
        _CALENDAR_CACHE[id(times)] = (weakref.ref(times), *arrays)
    return arrays


def day_of_year(times) -> np.ndarray:
    """Day of the year (1 on 1 January) of each time, as pandas' ``day_of_year``."""
    return _calendar(times)[0]


def calendar_distance_days(times, target_time):
    """Distance in days between the calendar days of ``times`` and ``target_time``.

    Circular over the year, so 28 December and 3 January are 6 days apart whatever
    their years. Leap days count as the day they fall on (day of year 60).
    """
    return circular_day_gap(day_of_year(times), pd.Timestamp(target_time).day_of_year)


def circular_day_gap(day_of_year, target_day_of_year):
    """Circular distance in days between days of the year (arrays broadcast)."""
    difference = np.abs(np.asarray(day_of_year) - np.asarray(target_day_of_year)).astype(float)
    return np.minimum(difference, DAYS_PER_YEAR - difference)


def season_mask(times, target_time, window_days):
    """True where ``times`` fall within ``window_days`` calendar days of the target."""
    return calendar_distance_days(times, target_time) <= window_days


def exclusion_mask(times, target_time, exclude_days):
    """True where ``times`` lie within ``exclude_days`` days of the target date itself."""
    target = day_numbers(np.atleast_1d(pd.Timestamp(target_time).to_datetime64()))[0]
    return np.abs(day_numbers(times) - target) <= exclude_days


def day_numbers(times) -> np.ndarray:
    """Whole days since 1970-01-01 of each time (the calendar day it falls on)."""
    return _calendar(times)[1]


def decluster(times, separation_days, limit=None):
    """Indices of ``times`` (ordered best first) kept after de-clustering.

    Going down the ranking, a day within ``separation_days`` of a day already kept is
    dropped: it belongs to the same episode as a better analog. ``separation_days=0``
    keeps everything. Stops once ``limit`` days are kept.
    """
    return decluster_days(day_numbers(times), separation_days, limit)


def decluster_days(days, separation_days, limit=None):
    """:func:`decluster` on integer day numbers (see :func:`day_numbers`)."""
    kept: list[int] = []
    shadowed: set[int] = set()  # days within the separation of a kept day
    for position, day in enumerate(np.asarray(days).tolist()):
        if day in shadowed:
            continue
        kept.append(position)
        if separation_days > 0:
            shadowed.update(range(day - separation_days, day + separation_days + 1))
        if limit is not None and len(kept) >= limit:
            break
    return np.asarray(kept, dtype=np.int64)


def candidate_ids(times, target_time=None, *, window=45, exclude=0, restrict=None):
    """Row numbers of archive days allowed as analogs of a target.

    Parameters
    ----------
    times : DatetimeIndex of the archive days (row order of the index).
    target_time : timestamp or None
        Valid time of the target; ``None`` (a field with no valid time) applies neither
        the season nor the exclusion window.
    window : int or None
        Half-width of the season window in calendar days; ``None`` for all seasons.
    exclude : int or None
        Days within this many days of the target date are excluded (0 excludes the
        target day only); ``None`` excludes nothing.
    restrict : boolean array, optional
        Extra condition on each day (for example a regime).
    """
    allowed = np.ones(len(times), dtype=bool)
    if target_time is not None and not pd.isna(target_time):
        if window is not None:
            allowed &= season_mask(times, target_time, window)
        if exclude is not None:
            allowed &= ~exclusion_mask(times, target_time, exclude)
    if restrict is not None:
        allowed &= np.asarray(restrict, dtype=bool)
    return np.flatnonzero(allowed)


def find_analogs(index: AnalogIndex, times, target_vector, *, target_time=None, top=20,
                 window=45, exclude=0, separation=3, restrict=None):
    """The ``top`` closest archive days to a target vector, best first.

    Parameters
    ----------
    index : fitted :class:`~analogs.stages.index.AnalogIndex` whose row i is ``times[i]``.
    times : DatetimeIndex of the indexed days.
    target_vector : array (d,) in the index's space (PCs of the target).
    target_time, window, exclude, restrict : see :func:`candidate_ids`.
    top : int, number of analogs wanted.
    separation : int, de-clustering distance in days (see :func:`decluster`).

    Returns
    -------
    DataFrame with columns ``rank`` (1 = closest), ``time``, ``distance`` (Euclidean in
    the weighted, balanced anomaly space of the kept EOF modes) and ``row`` (the day's
    row in the archive). Fewer than ``top`` rows when fewer days are allowed.
    """
    owner = "find_analogs"
    top = check_int(top, "top", owner, min_value=1)
    if window is not None:
        check_int(window, "window", owner, min_value=0, max_value=183)
    if exclude is not None:
        check_int(exclude, "exclude", owner, min_value=0)
    separation = check_int(separation, "separation", owner, min_value=0)
    times = pd.DatetimeIndex(times)
    allowed = candidate_ids(times, target_time, window=window, exclude=exclude, restrict=restrict)
    return rank_candidates(index, times, target_vector, allowed, top=top, separation=separation)


def _empty_ranking() -> pd.DataFrame:
    return pd.DataFrame({"rank": np.array([], dtype=int), "time": pd.DatetimeIndex([]),
                         "distance": np.array([], dtype=float), "row": np.array([], dtype=int)})


def fetch_size(top, separation, n_allowed, extra=0):
    """Neighbours to fetch so that ``top`` survive de-clustering.

    Each kept analog can shadow at most ``2 * separation`` others, so ``top * (2 *
    separation + 1)`` neighbours always hold ``top`` de-clustered ones when enough days
    are allowed; ``extra`` adds room for rows the caller removes afterwards.
    """
    return min(n_allowed, top * (2 * separation + 1) + extra)


def rank_candidates(index: AnalogIndex, times, target_vector, allowed, *, top, separation):
    """Rank the ``allowed`` rows by distance to the target, de-cluster, keep ``top``."""
    times = pd.DatetimeIndex(times)
    fetch = fetch_size(top, separation, len(allowed))
    if fetch == 0:
        return _empty_ranking()
    distances, ids = index.search(target_vector, fetch, allowed=allowed)
    return ranking_from_neighbours(times, distances[0], ids[0], top=top, separation=separation)


def ranking_from_neighbours(times, distances, ids, *, top, separation):
    """Turn one query's neighbour list (best first, ``-1`` padded) into the ranking."""
    found = ids >= 0
    distances, ids = distances[found], ids[found]
    keep = decluster(times[ids], separation, limit=top)
    rows = ids[keep]
    return pd.DataFrame({
        "rank": np.arange(1, len(rows) + 1),
        "time": times[rows],
        "distance": distances[keep],
        "row": rows,
    })
