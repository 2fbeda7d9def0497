"""Analog selection: season window, exclusion window, de-clustering, ranking.

Analog searches are restricted to a window of about one to two months around the
target's calendar day, and analogs within a few days of a better analog belong to the
same weather episode, so they are dropped (common practice, no source).

This is the one selection rule of the package: the live query (:func:`find_analogs`)
and the leave-one-year-out hindcast (:mod:`analogs.stages.hindcast`) both choose their
candidates with :func:`candidate_ids` and rank them with :func:`rank_many` (the
hindcast in batches of the targets of one calendar day, its held-out year given as a
per-target restriction).
"""

from __future__ import annotations

import weakref

import numpy as np
import pandas as pd

from analogs.parameters import P
from analogs.errors import AnalogsInputError
from analogs.stages.index import AnalogIndex, sequential_batch_size

#: Mean length of the year in days, for circular calendar-day distances.
DAYS_PER_YEAR = 365.2425
# The defaults of the query, from the parameter table (analogs.parameters), where each
# is defined once: number of analogs; half-width of the season window, calendar days
# (about three months in all); exclusion around a --date target's own date, days (its
# own episode); de-clustering distance, days.
DEFAULT_TOP = P.top.default
DEFAULT_WINDOW = P.window.default
DEFAULT_EXCLUDE = P.exclude.default
DEFAULT_SEPARATION = P.separation.default


def _as_datetime64(times) -> np.ndarray:
    """``times`` as a numpy datetime64 array, in its own unit (no pandas index is built:
    queries are hot)."""
    values = times.to_numpy() if isinstance(times, pd.DatetimeIndex) else np.asarray(times)
    return values if values.dtype.kind == "M" else values.astype("datetime64[ns]")


def _as_index(times) -> pd.DatetimeIndex:
    """``times`` as a DatetimeIndex, the caller's own object when it is one (so that the
    calendar arrays cached for it are found again)."""
    return times if isinstance(times, pd.DatetimeIndex) else pd.DatetimeIndex(times)


#: Calendar arrays of recently queried DatetimeIndex objects (immutable), by identity:
#: a loaded store asks about the same index at every query. Bounded, weakly referenced.
_CALENDAR_CACHE: dict[int, tuple] = {}
_CALENDAR_CACHE_SIZE = 8


def _calendar(times) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(day of year, whole days since 1970-01-01, calendar year) of each time."""
    if isinstance(times, pd.DatetimeIndex):
        hit = _CALENDAR_CACHE.get(id(times))
        if hit is not None and hit[0]() is times:
            return hit[1:]
    stamps = _as_datetime64(times)
    days = stamps.astype("datetime64[D]")
    years = stamps.astype("datetime64[Y]")
    arrays = ((days - years).astype(np.int64) + 1, days.astype(np.int64),
              years.astype(np.int64) + 1970)
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


def held_out_mask(times, target_rows, exclude_days=DEFAULT_EXCLUDE, *, columns=None) -> np.ndarray:
    """What each target of a leave-one-year-out hindcast may take: (m, n_days) booleans.

    Row j is true on the days of the other calendar years than ``times[target_rows[j]]``
    that also lie more than ``exclude_days`` days from that target (its own episode,
    :func:`exclusion_mask`, which counts days across the turn of the year: a target on
    2 January does not take 30 December of the previous year). ``exclude_days=None``
    leaves only the own year out. The per-target ``restrict`` of :func:`rank_many`.
    ``columns`` (int array of rows, optional): only these days are looked at (a season
    window), the others are false; a 2-D array (m, w) gives each target its own rows,
    and the answer is then (m, w), row j for the days ``columns[j]``.
    """
    target_rows = np.asarray(target_rows, dtype=np.int64)
    times = _as_index(times)
    looked_at = slice(None) if columns is None else np.asarray(columns, dtype=np.int64)
    own_columns = columns is not None and looked_at.ndim == 2
    _, days, years = _calendar(times)  # cached per index: the hindcast asks once per batch
    allowed = held_out_days(years[looked_at], days[looked_at], years[target_rows],
                            days[target_rows], exclude_days)
    if columns is None or own_columns:
        return allowed
    whole = np.zeros((target_rows.size, len(times)), dtype=bool)
    whole[:, looked_at] = allowed
    return whole


def held_out_days(years, days, target_years, target_days, exclude_days=DEFAULT_EXCLUDE):
    """The rule of :func:`held_out_mask` on calendar years and day numbers
    (:func:`day_numbers`): ``years`` and ``days`` of the days looked at, (n,) or (m, n),
    those of the m targets (m,); (m, n) booleans, true where the day is of another
    year than the target's and more than ``exclude_days`` days from it. The
    event-weighted hindcast gives the years and days of each calendar day's season
    window, gathered once."""
    allowed = years != np.asarray(target_years)[:, None]
    if exclude_days is not None:
        gap = days - np.asarray(target_days, dtype=days.dtype)[:, None]
        allowed &= np.abs(gap, out=gap) > exclude_days
    return allowed


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


def candidate_ids(times, target_time=None, *, window=DEFAULT_WINDOW, exclude=0, restrict=None):
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


def find_analogs(index: AnalogIndex, times, target_vector, *, target_time=None,
                 top=DEFAULT_TOP, window=DEFAULT_WINDOW, exclude=0,
                 separation=DEFAULT_SEPARATION, restrict=None):
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
    top = P.top.check(top, owner)
    if window is not None:
        P.window.check(window, owner)
    if exclude is not None:
        P.exclude.check(exclude, owner)
    separation = P.separation.check(separation, owner)
    times = _as_index(times)
    allowed = candidate_ids(times, target_time, window=window, exclude=exclude, restrict=restrict)
    return rank_candidates(index, times, target_vector, allowed, top=top, separation=separation)


def fetch_size(top, separation, n_allowed, extra=0):
    """Neighbours to fetch so that ``top`` survive de-clustering.

    Each kept analog can shadow at most ``2 * separation`` others, so ``top * (2 *
    separation + 1)`` neighbours always hold ``top`` de-clustered ones when enough days
    are allowed; ``extra`` adds room for rows the caller removes afterwards.
    """
    return min(n_allowed, top * (2 * separation + 1) + extra)


def rank_candidates(index: AnalogIndex, times, target_vector, allowed, *, top, separation):
    """Rank the ``allowed`` rows by distance to the target, de-cluster, keep ``top``.

    One target of :func:`rank_many`, as the ranking DataFrame of :func:`find_analogs`.
    """
    times = _as_index(times)
    (rows, distances), = rank_many(index, times, np.atleast_2d(target_vector), allowed,
                                   top=top, separation=separation)
    return _ranking_table(times, rows, distances)


def _ranking_table(times, rows, distances) -> pd.DataFrame:
    """The ranking of one target as :func:`find_analogs` returns it."""
    return pd.DataFrame({
        "rank": np.arange(1, len(rows) + 1),
        "time": times[rows],
        "distance": distances,
        "row": rows,
    })


#: Largest spread of calendar days (circular, days) of the targets that
#: :func:`find_analogs_many` ranks in one search: the union of their season windows is
#: searched once and each target drops the rows of the others' windows afterwards, so a
#: wider spread fetches more rows per target for fewer searches.
BATCH_SPREAD_DAYS = 10
#: Most (target, archive day) pairs of one batch's allowed-rows mask (bytes): the batch
#: is cut before the mask of a long archive outgrows this.
BATCH_MAX_MASK = 2 ** 25


def find_analogs_many(index: AnalogIndex, times, target_vectors, target_times, *,
                      top=DEFAULT_TOP, window=DEFAULT_WINDOW, exclude=0,
                      separation=DEFAULT_SEPARATION, restrict=None) -> list[pd.DataFrame]:
    """:func:`find_analogs` for many targets with the same settings, in batched searches.

    Targets are sorted by calendar day and taken in groups whose calendar days lie
    within ``BATCH_SPREAD_DAYS`` of the group's first (and at most
    :func:`~analogs.stages.index.sequential_batch_size` targets, so faiss computes each
    distance as for a target alone, and within ``BATCH_MAX_MASK`` of memory for their
    allowed rows): one :func:`rank_many` call ranks the union of the
    group's allowed rows, and each target keeps only its own (its season window and
    exclusion, ``restrict``), fetching more rows to make up for the others'. So each
    table equals ``find_analogs(index, times, target_vectors[j],
    target_time=target_times[j], ...)``, which an approximate (HNSW) index is asked
    target by target to give: its walk depends on the rows allowed.

    Parameters
    ----------
    target_vectors : array (m, d) in the index's space.
    target_times : m valid times (none missing).
    top, window, exclude, separation, restrict : as in :func:`find_analogs`.

    Returns
    -------
    list of m DataFrames as :func:`find_analogs` returns them, in the targets' order.
    """
    owner = "find_analogs_many"
    top, separation = P.top.check(top, owner), P.separation.check(separation, owner)
    if window is not None:
        P.window.check(window, owner)
    if exclude is not None:
        P.exclude.check(exclude, owner)
    times = _as_index(times)
    target_vectors = np.atleast_2d(np.asarray(target_vectors))
    target_times = pd.DatetimeIndex(target_times)
    settings = {"top": top, "window": window, "exclude": exclude, "separation": separation,
                "restrict": restrict}
    if getattr(index, "kind_", None) != "flat":
        return [find_analogs(index, times, vector, target_time=when, **settings)
                for vector, when in zip(target_vectors, target_times)]
    tables: list = [None] * len(target_times)
    for group in calendar_groups(day_of_year(target_times), target_vectors.shape[1], len(times)):
        allowed = np.zeros((len(group), len(times)), dtype=bool)
        for position, target in enumerate(group):
            allowed[position, candidate_ids(times, target_times[target], window=window,
                                            exclude=exclude, restrict=restrict)] = True
        ranked = rank_many(index, times, target_vectors[group], np.flatnonzero(allowed.any(axis=0)),
                           top=top, separation=separation, restrict=allowed)
        for target, (rows, distances) in zip(group, ranked):
            tables[target] = _ranking_table(times, rows, distances)
    return tables


def calendar_groups(calendar_days, n_dims, n_days):
    """The batches of :func:`find_analogs_many`:
    positions of the targets sorted by calendar day, cut into groups whose calendar days
    lie within ``BATCH_SPREAD_DAYS`` of the group's first, of at most
    :func:`~analogs.stages.index.sequential_batch_size` targets of ``n_dims``
    components (faiss then computes each distance as for a target alone) and within
    ``BATCH_MAX_MASK`` for their allowed-rows mask over ``n_days`` archive days."""
    calendar_days = np.asarray(calendar_days)
    order = np.argsort(calendar_days, kind="stable")
    most = min(sequential_batch_size(n_dims), max(1, BATCH_MAX_MASK // max(1, n_days)))
    start = 0
    while start < len(order):
        stop = start + 1
        while (stop < len(order) and stop - start < most
               and calendar_days[order[stop]] - calendar_days[order[start]] <= BATCH_SPREAD_DAYS):
            stop += 1
        yield order[start:stop]
        start = stop


def rank_many(index: AnalogIndex, times, target_vectors, allowed, *, top, separation,
              restrict=None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Rank the ``allowed`` rows for each of several targets; de-cluster; keep ``top``.

    The targets share one candidate set (for example the days of one calendar day,
    which share a season window) and are searched in one call of the index.

    Parameters
    ----------
    index : fitted :class:`~analogs.stages.index.AnalogIndex` whose row i is ``times[i]``.
    times : DatetimeIndex of the indexed days.
    target_vectors : array (m, d) in the index's space.
    allowed : int array of the rows every target may take (see :func:`candidate_ids`).
    top, separation : as in :func:`find_analogs`.
    restrict : boolean array (m, n_days), optional
        A further condition for each target (row j for target j; the hindcast's "not the
        target's own year"). The index returns the nearest ``allowed`` rows and the
        restricted ones are dropped afterwards; the number fetched grows by the most
        ``allowed`` rows any target's restriction removes, so the answer equals ranking
        ``allowed`` rows with ``restrict[j]`` true for each target alone.

    Returns
    -------
    list of m ``(rows, distances)`` pairs, best first: the kept rows (int64) and their
    Euclidean distances to the target; fewer than ``top`` when fewer rows are allowed.
    """
    ids, distances = _nearest_allowed(index, times, target_vectors, allowed, top=top,
                                      separation=separation, restrict=restrict)
    days = day_numbers(times)
    ranked = []
    for j in range(ids.shape[0]):
        found = ids[j] >= 0
        rows, row_distances = ids[j][found], distances[j][found]
        keep = decluster_days(days[rows], separation, limit=top)
        ranked.append((rows[keep], row_distances[keep]))
    return ranked


def rank_windows(vectors, times, targets, windows, allowed, *, top, separation):
    """:func:`rank_many` for many targets that each have their own candidate rows,
    from one distance computation (:func:`~analogs.stages.index.window_distances`, the
    flat index's own float32 values) and one vectorised de-clustering
    (:func:`decluster_many`): the event-weighted hindcast ranks a whole held-out year so.

    Each target's allowed rows are ordered as the flat search orders them (by distance,
    then by row: faiss keeps the lower id of a tie), the first
    :func:`fetch_size` kept (enough for ``top`` to survive de-clustering), then
    de-clustered: the answer of ``rank_many`` with that target's allowed rows alone.

    Parameters
    ----------
    vectors : array (n_days, d), the vectors of every day (the index's space).
    times : DatetimeIndex of the days.
    targets : int array (m,), the rows of the targets.
    windows : int array (m, w), each target's candidate rows in ascending order, -1
        after the last (padding).
    allowed : bool array (m, w), which of them the target may take.
    top, separation : as in :func:`find_analogs`.

    Returns
    -------
    list of m ``(rows, distances)`` pairs, as :func:`rank_many` returns them.
    """
    from analogs.stages.index import window_distances
    windows = np.asarray(windows, dtype=np.int64)
    allowed = np.asarray(allowed, dtype=bool) & (windows >= 0)
    n_targets, width = windows.shape
    depth = fetch_size(top, separation, int(allowed.sum(axis=1).max(initial=0)))
    if depth == 0:
        return [(np.zeros(0, dtype=np.int64), np.zeros(0))] * n_targets
    squared = window_distances(vectors, np.asarray(vectors)[targets], windows)
    # One integer key per candidate, ordered as (distance, row): the float32 bits of a
    # non-negative distance order as the distances do, and a window's positions as its
    # rows (ascending). Unique keys: a partial sort picks exactly the first ``depth``,
    # and each names its own position, so the keys themselves are partitioned (no index
    # array to gather by).
    last = np.iinfo(np.int64).max
    keys = squared.view(np.int32).astype(np.int64)
    keys <<= 32
    keys |= np.arange(width, dtype=np.int64)
    np.copyto(keys, last, where=~allowed)
    if depth < width:
        keys.partition(depth - 1, axis=1)  # in place: the keys are this function's own
        keys = keys[:, :depth]
    keys.sort(axis=1)
    found = keys != last
    rows = np.take_along_axis(windows, np.where(found, keys & 0xFFFFFFFF, 0), axis=1)
    kept = decluster_many(day_numbers(times)[rows], found, separation, top)
    distances = np.sqrt((keys >> 32).astype(np.int32).view(np.float32).astype(np.float64))
    # The kept positions fill each row's first slots: one gather, then a slice per target.
    safe = np.maximum(kept, 0)
    kept_rows = np.take_along_axis(rows, safe, axis=1)
    kept_distances = np.take_along_axis(distances, safe, axis=1)
    return [(kept_rows[j, :n], kept_distances[j, :n])
            for j, n in enumerate(np.count_nonzero(kept >= 0, axis=1).tolist())]


def _nearest_allowed(index, times, target_vectors, allowed, *, top, separation,
                     restrict=None) -> tuple[np.ndarray, np.ndarray]:
    """The search of :func:`rank_many` before de-clustering: ids and distances (m,
    fetch), nearest first, id -1 where nothing was found or ``restrict`` forbids it."""
    allowed = np.asarray(allowed, dtype=np.int64)
    target_vectors = np.atleast_2d(target_vectors)
    n_targets = target_vectors.shape[0]
    removed = 0
    if restrict is not None:
        restrict = np.asarray(restrict, dtype=bool)
        if restrict.shape != (n_targets, len(times)):
            raise AnalogsInputError(
                "The 'restrict' parameter of rank_many must be a boolean array with one row "
                f"per target and one column per day, shape {(n_targets, len(times))}. "
                f"Got shape {restrict.shape} instead.")
        if allowed.size:
            removed = int((~restrict[:, allowed]).sum(axis=1).max())
    fetch = fetch_size(top, separation, allowed.size, extra=removed)
    if fetch == 0:
        return np.zeros((n_targets, 0), dtype=np.int64), np.zeros((n_targets, 0))
    distances, ids = index.search(target_vectors, fetch, allowed=allowed)
    if restrict is not None:
        found = ids >= 0
        found[found] = restrict[np.nonzero(found)[0], ids[found]]
        ids = np.where(found, ids, -1)
    return ids, distances


def decluster_many(days, valid, separation_days, limit) -> np.ndarray:
    """:func:`decluster_days` for many ranked lists at once, vectorised over the lists.

    Parameters
    ----------
    days : int array (m, n), the day numbers (:func:`day_numbers`) of each list, best first.
    valid : bool array (m, n), False where a list has no candidate (padding or removed).
    separation_days, limit : as in :func:`decluster_days`.

    Returns
    -------
    int array (m, limit): the positions kept in each list, best first, -1 after the last
    one kept. Row j equals ``decluster_days(days[j][valid[j]], separation_days, limit)``
    mapped back to positions of ``days[j]``.
    """
    days = np.asarray(days, dtype=np.int64)
    valid = np.asarray(valid, dtype=bool)
    n_lists, depth = days.shape
    kept = np.full((n_lists, limit), -1, dtype=np.int64)
    # Day numbers kept so far; far from any real day where nothing is kept yet.
    kept_days = np.full((n_lists, limit), np.iinfo(np.int32).min, dtype=np.int64)
    count = np.zeros(n_lists, dtype=np.int64)
    for position in range(depth):
        open_lists = np.flatnonzero(valid[:, position] & (count < limit))
        if open_lists.size == 0:
            if not (count < limit).any():
                break
            continue
        if separation_days > 0:
            day = days[open_lists, position]
            near = np.abs(kept_days[open_lists] - day[:, None]) <= separation_days
            taken = open_lists[~near.any(axis=1)]
        else:
            taken = open_lists
        slot = count[taken]
        kept[taken, slot] = position
        kept_days[taken, slot] = days[taken, position]
        count[taken] += 1
    return kept


#: Weight of the day ``lag`` days before the target in a sequence match: 0.5 ** lag.
SEQUENCE_DECAY = 0.5


def sequence_vectors(pcs, times, sequence) -> tuple[np.ndarray, np.ndarray]:
    """Vectors of each day followed by its ``sequence`` preceding days (``--sequence``).

    Row t is ``[pcs(t), w1 pcs(t-1), ..., ws pcs(t-s)]`` with ``w_lag = SEQUENCE_DECAY **
    lag`` (0.5, 0.25), so the Euclidean distance between two rows is the weighted
    distance of the two short sequences. The boolean array marks the rows whose
    preceding days are all in ``times`` (consecutive calendar days): only those can be
    analogs, and only those are hindcast targets. The live query (a store's cached
    vectors) and the hindcast of its skill take their vectors from here.

    Parameters
    ----------
    pcs : array (n_days, n_modes), row i for ``times[i]`` (times ascending).
    times : the days.
    sequence : 0, 1 or 2 preceding days.
    """
    pcs = np.asarray(pcs)
    days = day_numbers(_as_index(times))
    parts, complete = [pcs], np.ones(len(pcs), dtype=bool)
    for lag in range(1, sequence + 1):
        complete &= np.roll(days, lag) == days - lag
        parts.append(SEQUENCE_DECAY ** lag * np.roll(pcs, lag, axis=0))
    complete[:sequence] = False
    return np.hstack(parts), complete
