"""Cross-validated skill: the leave-one-year-out hindcast and the tuning scan.

Every archive day is forecast from analogs found in the other calendar years only (so
its own year's peculiarities cannot help), chosen by the live query's own selection
(:func:`~analogs.stages.selection.candidate_ids` and
:func:`~analogs.stages.selection.rank_many`: the same season window, de-clustering and
fetch size), its own year removed as an extra restriction together with the days within the
query's exclusion window of the target (:func:`~analogs.stages.selection.held_out_mask`,
default 10 days): near 1 January the neighbouring days of the previous or next year are
the same weather episode, so they are neither analogs, random draws nor climatology. The forecast is the fraction of analog days
with at least one event in the region; it is scored against what happened that day
with the scores of :mod:`analogs.stages.scores`, and against the season-window climatology of
the other years (the reference of the Brier skill score) and a random-analog baseline
drawn from the same candidates (same N, same window).
"""

from __future__ import annotations

import collections
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from analogs._validation import check_choice
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.stages.index import AnalogIndex
from analogs.stages.outcomes import analog_weights
from analogs.stages.scores import (brier_score, brier_skill_score,
                                   brier_skill_score_interval, roc_auc_interval,
                                   roc_auc_within, verification_summary)
from analogs.stages.selection import (BATCH_MAX_MASK, DEFAULT_EXCLUDE, DEFAULT_SEPARATION,
                                      DEFAULT_TOP, DEFAULT_WINDOW, candidate_ids,
                                      day_numbers, day_of_year, decluster_many,
                                      held_out_days, held_out_mask, rank_many, rank_windows)

HINDCAST_METHODS = ("analogs", "random")
#: Folds of the event-weighted hindcast worked at once (threads; see ``fold_slots``).
FOLD_THREADS = 2
#: Annual harmonics beside the PCs in the logistic-regression baseline.
N_HARMONICS = 2


def leave_one_year_out(pcs, times, observed, *, top=DEFAULT_TOP, window=DEFAULT_WINDOW,
                       separation=DEFAULT_SEPARATION, n_modes=None, method="analogs",
                       months=None, seed=0, exclude=DEFAULT_EXCLUDE, restrict=None,
                       targets=None, weights=P.weights.default, metric=P.metric.default,
                       sequence=0, fold_slots=None, progress=False):
    """Forecast every day from analogs in the other years.

    The analogs of a day are those the live query would choose
    (:func:`analogs.stages.selection.find_analogs`) with the day's own year and the days
    within ``exclude`` days of it removed as a restriction: see :func:`held_out_analogs`.

    Parameters
    ----------
    pcs : array (n_days, n_modes) of principal components, row i for ``times[i]``.
    times : DatetimeIndex of the archive days.
    observed : bool array (n_days,), whether the event happened on each day.
    top, window, separation : as in :func:`analogs.stages.selection.find_analogs`.
    n_modes : use only the leading modes (default all).
    method : ``"analogs"`` (nearest neighbours) or ``"random"`` (``top`` days drawn at
        random from the same candidates: the no-skill baseline of the same size).
    months : iterable of months (1-12) of the target days to forecast (default all);
        analogs may come from any month inside the season window.
    seed : random seed of the random baseline.
    exclude : days within this many days of the target (its own episode, across the turn
        of the year) are left out as well as its year; ``None`` leaves out the year only.
    metric : ``"plain"`` (Euclidean distance of the PCs) or ``"event_weighted"``: the
        days of each year are forecast in the space of
        :func:`~analogs.stages.predictor_weights.fit_predictor_weights` fitted on the
        days of the other years only (``observed`` of the held-out year never enters it).
    restrict : bool array (n_days,), optional: the days allowed as analogs (and random
        draws), as the live query's ``restrict`` (``--regime``: the days of that regime;
        ``--sequence``: the days with their preceding days). The climatology reference
        stays the season window's days of the other years, as the query prints it.
    targets : bool array (n_days,), optional: the days to forecast (with ``months``).
    weights : how the analogs are weighed in the forecast (``--weights``;
        :func:`analogs.stages.outcomes.analog_weights` of their distances): ``"equal"``
        is the fraction of analogs with the event.
    sequence : the rows of ``pcs`` are sequence vectors of the day and its ``sequence``
        preceding days (``[pc_t, 0.5 pc_{t-1}, ...]``, the live query's ``--sequence``):
        the event-weighted map is fitted on the first block, the day's own PCs, and
        maps each block alike
        (:func:`~analogs.stages.predictor_weights.block_transform`).
    fold_slots : semaphore, optional: with ``metric="event_weighted"`` the folds (one
        year each) run on up to :data:`FOLD_THREADS` threads, each started once it has
        taken one of these slots and giving it back when it ends (default: a semaphore
        of FOLD_THREADS slots); a caller running other work beside holds some
        meanwhile. The same answers whatever the threads.

    Returns
    -------
    DataFrame indexed like the forecast days with ``time``, ``year``, ``forecast``
    (fraction of analogs with the event), ``observed`` (0/1), ``climatology`` (event
    frequency over the season-window days the target may take) and ``n_analogs``.
    """
    owner = "leave_one_year_out"
    check_choice(method, "method", owner, HINDCAST_METHODS)
    metric = P.metric.check(metric, owner)
    weights = P.weights.check(weights, owner)
    pcs, times, top, window, separation = _checked(pcs, times, top, window, separation,
                                                   n_modes, owner, exclude)
    observed = np.asarray(observed, dtype=bool)
    years = times.year.to_numpy()
    targets = (np.ones(len(times), dtype=bool) if targets is None
               else np.asarray(targets, dtype=bool).copy())
    if months is not None:
        targets &= np.isin(times.month, list(months))
    rng = np.random.default_rng(seed)
    forecast = np.full(len(times), np.nan)
    climatology = np.full(len(times), np.nan)
    n_analogs = np.zeros(len(times), dtype=int)
    if method == "analogs" and metric == "event_weighted":
        batches = _weighted_fold_batches(pcs, times, observed, targets, window, exclude,
                                         top=top, separation=separation, restrict=restrict,
                                         sequence=sequence, fold_slots=fold_slots,
                                         progress=progress)
    else:
        batches = _calendar_day_batches(times, targets, window, exclude, progress=progress)
    if method == "analogs" and metric == "plain":
        batches = _with_analogs(batches, pcs, times, top=top, separation=separation,
                                restrict=restrict)
    if restrict is not None:
        restrict = np.asarray(restrict, dtype=bool)
    for queries, columns, held, chosen in batches:
        # Climatology of the days the target may take: their share of event days.
        n_others = held.sum(axis=1)
        n_events = (held & observed[columns]).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            climatology[queries] = np.where(n_others > 0, n_events / n_others, np.nan)
        forecast_at = np.flatnonzero(n_others > 0)
        if method == "random":
            candidates = np.broadcast_to(columns, held.shape)
            picked = []
            for position in forecast_at:
                others = candidates[position][held[position]]
                if restrict is not None:
                    others = others[restrict[others]]
                picked.append((rng.choice(others, size=min(top, others.size), replace=False),
                               None))
        else:
            picked = [chosen[position] for position in forecast_at]
        sizes = np.fromiter((rows.size for rows, _ in picked), dtype=np.int64,
                            count=len(picked))
        if weights == "equal" or method == "random":
            values = _event_fractions(observed, [rows for rows, _ in picked], sizes)
        else:  # weights sum to 1 up to round-off: clipped into [0, 1]
            values = np.array([min(1.0, float(analog_weights(distances, scheme=weights)
                                              @ observed[rows])) if rows.size else np.nan
                               for rows, distances in picked])
        answered = queries[forecast_at[sizes > 0]]
        forecast[answered] = values[sizes > 0]
        n_analogs[answered] = sizes[sizes > 0]
    done = np.isfinite(forecast) & np.isfinite(climatology)
    return pd.DataFrame({
        "time": times[done], "year": years[done], "forecast": forecast[done],
        "observed": observed[done].astype(int), "climatology": climatology[done],
        "n_analogs": n_analogs[done],
    })


def _event_fractions(observed, picked, sizes) -> np.ndarray:
    """The fraction of event days among each list of rows in ``picked`` (``sizes``
    rows each): ``observed[rows].mean()`` of each, from one cumulative count (the same
    integer sums divided by the same counts); NaN for an empty list."""
    ends = np.cumsum(sizes)
    counted = np.concatenate([[0], np.cumsum(observed[np.concatenate(picked)])
                              if picked else []]).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (counted[ends] - counted[ends - sizes]) / sizes


def held_out_analogs(pcs, times, *, rows=None, top=DEFAULT_TOP, window=DEFAULT_WINDOW,
                     separation=DEFAULT_SEPARATION, n_modes=None,
                     exclude=DEFAULT_EXCLUDE, restrict=None) -> pd.DataFrame:
    """The analogs the leave-one-year-out hindcast takes for the archive days ``rows``.

    For each target day: the season-window candidates of its calendar day
    (:func:`~analogs.stages.selection.candidate_ids`), less the days of its own year
    and those within ``exclude`` days of it (:func:`~analogs.stages.selection.held_out_mask`),
    ranked by exact Euclidean distance and de-clustered
    (:func:`~analogs.stages.selection.rank_many`): what
    :func:`~analogs.stages.selection.find_analogs` returns for that day with
    ``exclude=exclude`` and ``restrict`` = "not the target's year".

    Parameters
    ----------
    pcs, times, top, window, separation, n_modes, exclude, restrict : as in
        :func:`leave_one_year_out`.
    rows : int array of target rows (default every day).

    Returns
    -------
    DataFrame with one line per (target, analog): ``target`` (row of the target day),
    ``rank`` (1 = closest), ``row``, ``time`` and ``distance`` of the analog.
    """
    pcs, times, top, window, separation = _checked(pcs, times, top, window, separation,
                                                   n_modes, "held_out_analogs", exclude)
    targets = np.zeros(len(times), dtype=bool)
    targets[np.arange(len(times)) if rows is None else np.asarray(rows, dtype=np.int64)] = True
    parts = {"target": [], "rank": [], "row": [], "distance": []}
    batches = _with_analogs(_calendar_day_batches(times, targets, window, exclude), pcs, times,
                            top=top, separation=separation, restrict=restrict)
    for queries, _, _, chosen in batches:
        for row, (analog_rows, distances) in zip(queries, chosen):
            parts["target"].append(np.full(analog_rows.size, row, dtype=np.int64))
            parts["rank"].append(np.arange(1, analog_rows.size + 1))
            parts["row"].append(analog_rows)
            parts["distance"].append(distances)
    table = {name: np.concatenate(values) if values else np.zeros(0, dtype=np.int64)
             for name, values in parts.items()}
    frame = pd.DataFrame(table)
    frame.insert(3, "time", times[frame["row"].to_numpy()])
    return frame.sort_values(["target", "rank"], ignore_index=True)


def _checked(pcs, times, top, window, separation, n_modes, owner, exclude=None):
    """Validated hindcast inputs: (pcs of the modes used, DatetimeIndex, top, window,
    separation)."""
    top = P.top.check(top, owner)
    window = P.window.check(window, owner)
    separation = P.separation.check(separation, owner)
    times = times if isinstance(times, pd.DatetimeIndex) else pd.DatetimeIndex(times)
    pcs = np.asarray(pcs, dtype=float)
    if n_modes is not None:
        n_modes = P.query_modes.check(n_modes, owner, maximum=pcs.shape[1])
        pcs = pcs[:, :n_modes]
    if exclude is not None:
        P.exclude.check(exclude, owner)
    if np.unique(times.year).size < 2:
        raise AnalogsInputError("a leave-one-year-out hindcast needs an archive of at least two years")
    return pcs, times, top, window, separation


def _calendar_day_batches(times, targets, window, exclude=DEFAULT_EXCLUDE, *, progress=False):
    """The target days grouped by calendar day, with what their analogs may be.

    Yields ``(queries, season, held, None)``: the rows of the targets of one calendar
    day; the season-window candidates they share (computed once, by the live query's
    :func:`~analogs.stages.selection.candidate_ids` for the first of them, with no
    exclusion window: it differs between the years of one calendar day); and a boolean
    array (len(queries), len(season)), the leave-one-year-out restriction of each target
    over those candidates (:func:`~analogs.stages.selection.held_out_mask`: other years,
    outside its own episode).
    """
    calendar_day = day_of_year(times)
    days = np.unique(calendar_day[targets])
    for day in tqdm(days, desc="hindcast", unit="calendar day", disable=not progress):
        queries = np.flatnonzero(targets & (calendar_day == day))
        season = candidate_ids(times, times[queries[0]], window=window, exclude=None)
        held = held_out_mask(times, queries, exclude,
                             columns=np.broadcast_to(season, (queries.size, season.size)))
        yield queries, season, held, None


def _with_analogs(batches, pcs, times, *, top, separation, restrict=None):
    """``batches`` of :func:`_calendar_day_batches` with each target's analogs, ``(rows,
    distances)`` from :func:`~analogs.stages.selection.rank_many` over an exact (flat)
    index of ``pcs``, each target's held-out restriction its per-target ``restrict``.
    ``restrict`` (bool per day) narrows the candidates as the live query's does
    (:func:`~analogs.stages.selection.candidate_ids`)."""
    index = AnalogIndex(kind="flat").fit(pcs)
    if restrict is not None:
        restrict = np.asarray(restrict, dtype=bool)
    for queries, season, held, _ in batches:
        other_years = np.zeros((queries.size, len(times)), dtype=bool)
        other_years[:, season] = held
        chosen = rank_many(index, times, pcs[queries], _restricted(season, restrict), top=top,
                           separation=separation, restrict=other_years)
        yield queries, season, held, chosen


def _restricted(season, restrict):
    """The season window's candidates that the restriction allows: candidate_ids with
    the query's restrict (its conditions are combined by "and")."""
    return season if restrict is None else season[restrict[season]]


def _weighted_fold_batches(pcs, times, observed, targets, window, exclude, *, top,
                           separation, restrict=None, sequence=0, fold_slots=None,
                           progress=False):
    """The batches of :func:`_with_analogs`, year by year: the targets of year Y ranked
    in the event-weighted space fitted on the days of the other years only
    (:func:`~analogs.stages.predictor_weights.fit_predictor_weights`; nested, so no day
    of Y, neither its fields nor its events, shapes the metric of its forecasts). With a
    ``sequence``, the map is fitted on each vector's first block (the day's PCs) and
    applied to every block. The year's targets are ranked at once, each among its own
    season window's allowed days (:func:`~analogs.stages.selection.rank_windows`); the
    batch's ``season`` is the union of their windows."""
    from analogs.stages.predictor_weights import (block_transform, fit_predictor_weights,
                                                  one_blas_thread)
    years = times.year.to_numpy()
    n_blocks = 1 + int(sequence)
    n_modes = pcs.shape[1] // n_blocks
    calendar_day = day_of_year(times)
    # The season window of each target's calendar day, the same in every fold: found
    # once (candidate_ids), rows ascending, padded with -1.
    target_rows = np.flatnonzero(targets)
    _, first, slot = np.unique(calendar_day[target_rows], return_index=True,
                               return_inverse=True)
    seasons = [candidate_ids(times, times[row], window=window, exclude=None)
               for row in target_rows[first]]
    windows_by_day = np.full((len(seasons), max(map(len, seasons))), -1, dtype=np.int64)
    for position, season in enumerate(seasons):
        windows_by_day[position, :season.size] = season
    window_of = np.zeros(len(times), dtype=np.int64)
    window_of[target_rows] = slot
    in_window = windows_by_day >= 0
    columns_by_day = np.maximum(windows_by_day, 0)
    # The calendar years and day numbers of those days (held_out_days' inputs), gathered
    # once, in 32 bits: half the bytes to copy per target.
    days = day_numbers(times)
    window_years = years.astype(np.int32)[columns_by_day]
    window_days = days.astype(np.int32)[columns_by_day]
    # The regression's seasonal inputs, the same values in every fold: computed once.
    harmonics = seasonal_harmonics(times)
    # Targets ranked at once: their masks over every day stay within the batch budget.
    per_batch = max(1, BATCH_MAX_MASK // len(times))
    if restrict is not None:
        restrict = np.asarray(restrict, dtype=bool)
    slots = fold_slots if fold_slots is not None else threading.BoundedSemaphore(FOLD_THREADS)

    def fold(year):
        """The batches of the targets of ``year``, ranked in the map fitted without it;
        the slot its start took is given back when it ends."""
        try:
            train = years != year
            transform = fit_predictor_weights(pcs[train, :n_modes], times[train],
                                              observed[train], harmonics=harmonics[train])
            mapped = pcs @ block_transform(transform, n_blocks)
            rows = np.flatnonzero(targets & ~train)
            batches = []
            for start in range(0, rows.size, per_batch):
                queries = rows[start:start + per_batch]
                own = _as_slice(window_of[queries])
                windows, columns = windows_by_day[own], columns_by_day[own]
                # Each target's own season days of the other years, outside its own
                # episode (held_out_mask's rule).
                held = held_out_days(window_years[own], window_days[own], years[queries],
                                     days[queries], exclude) & in_window[own]
                allowed = held if restrict is None else held & restrict[columns]
                chosen = rank_windows(mapped, times, queries, windows, allowed, top=top,
                                      separation=separation)
                batches.append((queries, columns, held, chosen))
            return batches
        finally:
            slots.release()

    # The folds are independent: worked on up to FOLD_THREADS threads (the fit's solver
    # and the ranking's kernels give the GIL up), each started once a slot is free (so a
    # slot a caller holds delays no particular year), given back in the years' order.
    # The (days x ~21) products run on one BLAS thread throughout, as the fit
    # (predictor_weights): the same values, and no BLAS thread spinning beside the fold
    # threads; one limit held over every fold (limits set and restored by each thread
    # would cross).
    fold_years = np.unique(years[targets])
    running = collections.deque()
    with one_blas_thread(), ThreadPoolExecutor(FOLD_THREADS) as pool, tqdm(
            total=fold_years.size, desc="hindcast", unit="year", disable=not progress) as bar:
        try:
            for year in fold_years:
                slots.acquire()
                running.append(pool.submit(fold, year))
                while running and running[0].done():
                    yield from running.popleft().result()
                    bar.update()
            while running:
                yield from running.popleft().result()
                bar.update()
        finally:
            for future in running:  # an error, or the batches no longer wanted
                if future.cancel():
                    slots.release()


def _as_slice(positions):
    """``positions`` (int array, not empty) as a slice when they are consecutive and
    ascending (a whole year's targets take consecutive calendar days): the arrays of
    every calendar day are then indexed by views instead of copies, the same values."""
    first = int(positions[0])
    if np.array_equal(positions, np.arange(first, first + positions.size)):
        return slice(first, first + positions.size)
    return positions


class HeldOutNeighbours:
    """Every leave-one-year-out hindcast of a scan, from one neighbour search.

    :func:`leave_one_year_out` searches the index once per setting. A scan over numbers
    of analogs and of modes, and the inner folds of nested tuning (the archive without
    one year), need many hindcasts of the same days: here each target's held-out
    candidates (the same season window and :func:`~analogs.stages.selection.held_out_mask`
    as the hindcast) are ranked once per mode count, from squared differences summed
    over the leading modes (every prefix of the modes from one pass), deep enough for
    the largest number of analogs after de-clustering and, for the inner folds, after
    any one year's days are dropped. Each hindcast is then a vectorised de-clustering
    (:func:`~analogs.stages.selection.decluster_many`, once per mode count and dropped
    year: the first k kept are the k analogs for every k) and prefix sums.
    :meth:`hindcast` returns what :func:`leave_one_year_out` returns for the same
    setting (and, with ``drop_year``, for the archive without that year): the tests
    check it day by day.

    Parameters
    ----------
    pcs, times, observed, window, separation, months, exclude : as in
        :func:`leave_one_year_out`.
    modes : the numbers of leading modes that will be asked for.
    top : the largest number of analogs that will be asked for.
    drop_years : whether :meth:`hindcast` will be asked to drop a year (nested tuning):
        the ranked lists are then one year's season window deeper.
    """

    def __init__(self, pcs, times, observed, *, modes, top, window=DEFAULT_WINDOW,
                 separation=DEFAULT_SEPARATION, months=None, exclude=DEFAULT_EXCLUDE,
                 drop_years=False, progress=False):
        owner = "HeldOutNeighbours"
        pcs, times, top, window, separation = _checked(pcs, times, top, window, separation,
                                                       None, owner, exclude)
        self.modes = sorted({int(m) for m in modes})
        if not self.modes or self.modes[0] < 1 or self.modes[-1] > pcs.shape[1]:
            raise AnalogsInputError(f"{owner}: mode counts must lie in 1..{pcs.shape[1]}; "
                                    f"got {list(modes)}")
        self.times, self.top, self.separation = times, top, separation
        self.observed = np.asarray(observed, dtype=bool)
        self.years = times.year.to_numpy()
        self.year_values = np.unique(self.years)
        self.days = day_numbers(times)
        targets = np.ones(len(times), dtype=bool)
        if months is not None:
            targets &= np.isin(times.month, list(months))
        self.targets = np.flatnonzero(targets)
        depth = top * (2 * separation + 1) + (2 * window + 2 if drop_years else 0)
        n_targets = self.targets.size
        self.rows = {m: np.full((n_targets, depth), -1, dtype=np.int64) for m in self.modes}
        self.distances = {m: np.full((n_targets, depth), np.inf) for m in self.modes}
        # Per target and year: season-window days it may take, and those with the event
        # (the climatology reference, with or without a dropped year).
        self.n_allowed = np.zeros((n_targets, self.year_values.size))
        self.n_events = np.zeros((n_targets, self.year_values.size))
        year_column = np.searchsorted(self.year_values, self.years)
        position = np.full(len(times), -1)
        position[self.targets] = np.arange(n_targets)
        batches = _calendar_day_batches(times, targets, window, exclude, progress=progress)
        top_modes = self.modes[-1]
        for queries, season, allowed, _ in batches:
            at = position[queries]
            one_hot = np.eye(self.year_values.size)[year_column[season]]
            self.n_allowed[at] = allowed @ one_hot
            self.n_events[at] = (allowed & self.observed[season]) @ one_hot
            squared = np.cumsum((pcs[queries][:, None, :top_modes]
                                 - pcs[season][None, :, :top_modes]) ** 2, axis=2)
            keep = min(depth, season.size)
            for m in self.modes:
                distance = np.where(allowed, np.sqrt(squared[:, :, m - 1]), np.inf)
                order = np.argsort(distance, axis=1, kind="stable")[:, :keep]
                ranked = np.take_along_axis(distance, order, axis=1)
                self.rows[m][at, :keep] = np.where(np.isfinite(ranked), season[order], -1)
                self.distances[m][at, :keep] = ranked

    def analogs(self, n_modes, drop_year=None):
        """The analogs of every target: (targets kept, rows, distances), the rows and
        distances arrays (n, top) best first, row -1 past the last analog. Targets of
        ``drop_year`` are left out and its days are not analogs."""
        rows, distances = self.rows[n_modes], self.distances[n_modes]
        days = self.days[np.maximum(rows, 0)]
        targets = np.ones(self.targets.size, dtype=bool)
        valid = rows >= 0
        if drop_year is not None:
            targets = self.years[self.targets] != drop_year
            rows, distances, valid, days = (rows[targets], distances[targets],
                                            valid[targets], days[targets])
            valid &= self.years[np.maximum(rows, 0)] != drop_year
        kept = decluster_many(days, valid, self.separation, self.top)
        found = kept >= 0
        safe = np.maximum(kept, 0)
        return (targets, np.where(found, np.take_along_axis(rows, safe, axis=1), -1),
                np.where(found, np.take_along_axis(distances, safe, axis=1), np.nan))

    def climatology(self, drop_year=None) -> np.ndarray:
        """The season-window climatology of every target (of the targets outside
        ``drop_year``, without that year's days), as in :func:`leave_one_year_out`."""
        n_allowed, n_events = self.n_allowed, self.n_events
        if drop_year is not None:
            targets = self.years[self.targets] != drop_year
            column = np.searchsorted(self.year_values, drop_year)
            n_allowed = np.delete(n_allowed[targets], column, axis=1)
            n_events = np.delete(n_events[targets], column, axis=1)
        total = n_allowed.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(total > 0, n_events.sum(axis=1) / total, np.nan)

    def hindcasts(self, tops, n_modes, drop_year=None) -> dict:
        """``{top: hindcast}`` for each number of analogs in ``tops`` with ``n_modes``
        modes: the frames of :func:`leave_one_year_out` (without ``drop_year``)."""
        targets, rows, _ = self.analogs(n_modes, drop_year)
        found = rows >= 0
        hits = np.cumsum(np.where(found, self.observed[np.maximum(rows, 0)], False), axis=1)
        count = found.sum(axis=1)
        climatology = self.climatology(drop_year)
        target_rows = self.targets[targets]
        frames = {}
        for top in tops:
            n_analogs = np.minimum(count, top)
            with np.errstate(invalid="ignore", divide="ignore"):
                forecast = np.where(
                    n_analogs > 0,
                    hits[np.arange(hits.shape[0]), np.maximum(n_analogs - 1, 0)] / n_analogs,
                    np.nan)
            done = np.isfinite(forecast) & np.isfinite(climatology)
            chosen = target_rows[done]
            frames[top] = pd.DataFrame({
                "time": self.times[chosen], "year": self.years[chosen],
                "forecast": forecast[done], "observed": self.observed[chosen].astype(int),
                "climatology": climatology[done], "n_analogs": n_analogs[done],
            })
        return frames


def seasonal_harmonics(times, n_harmonics=N_HARMONICS) -> np.ndarray:
    """cos and sin of k * 2 pi * day of year / 365.2425 for k = 1 .. ``n_harmonics``:
    array (n_days, 2 n_harmonics), the smooth seasonal cycle as regression inputs."""
    from analogs.stages.selection import DAYS_PER_YEAR
    angle = 2 * np.pi * day_of_year(pd.DatetimeIndex(times)).astype(float) / DAYS_PER_YEAR
    k = np.arange(1, n_harmonics + 1)
    return np.column_stack([np.cos(angle[:, None] * k), np.sin(angle[:, None] * k)])


def logistic_hindcast(pcs, times, observed, hindcast: pd.DataFrame, *, n_modes=None,
                      n_harmonics=N_HARMONICS, C=1.0) -> pd.DataFrame:
    """The same-fold logistic-regression baseline of a hindcast.

    For each year of ``hindcast`` (a :func:`leave_one_year_out` frame), a logistic
    regression (scikit-learn; inputs standardised) on the leading ``n_modes`` PCs plus
    ``n_harmonics`` annual harmonics (:func:`seasonal_harmonics`) is fitted on the days
    of the other years and forecasts that year's days: the comparison Hamill & Whitaker
    (2006) make between analogs and regression on the same predictors. Returns
    ``hindcast`` with ``forecast`` replaced (same days, observations and climatology
    reference), so the two are scored on the same folds.
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    times = times if isinstance(times, pd.DatetimeIndex) else pd.DatetimeIndex(times)
    pcs = np.asarray(pcs, dtype=float)
    if n_modes is not None:
        pcs = pcs[:, :n_modes]
    inputs = np.column_stack([pcs, seasonal_harmonics(times, n_harmonics)])
    observed = np.asarray(observed, dtype=bool)
    years = times.year.to_numpy()
    rows = times.get_indexer(pd.DatetimeIndex(hindcast["time"]))
    forecast = np.full(len(hindcast), np.nan)
    for year in np.unique(hindcast["year"]):
        train = years != year
        targets = hindcast["year"].to_numpy() == year
        if observed[train].all() or not observed[train].any():
            forecast[targets] = float(observed[train].mean())
            continue
        model = make_pipeline(StandardScaler(), LogisticRegression(C=C, max_iter=2000))
        model.fit(inputs[train], observed[train])
        forecast[targets] = model.predict_proba(inputs[rows[targets]])[:, 1]
    result = hindcast.copy()
    result["forecast"] = forecast
    return result


def score_hindcast(hindcast: pd.DataFrame, *, threshold=P.threshold.default, n_bins=10,
                   n_resamples=P.n_resamples.default, confidence=0.9, seed=0) -> dict:
    """Scores of a hindcast (:func:`leave_one_year_out`) with year-block bootstrap intervals.

    Returns the :func:`analogs.stages.scores.verification_summary` dict plus
    ``brier_skill_score_ci`` and ``roc_auc_ci`` (block bootstrap over years, since days
    within one year are not independent).
    """
    threshold = P.threshold.check(threshold, "score_hindcast")
    if hindcast.empty:
        raise AnalogsInputError("the hindcast produced no forecasts (archive too short or "
                                "no target days in the chosen months)")
    p = hindcast["forecast"].to_numpy()
    o = hindcast["observed"].to_numpy()
    reference = hindcast["climatology"].to_numpy()
    summary = verification_summary(p, o, reference, threshold=threshold, n_bins=n_bins)
    blocks = hindcast["year"].to_numpy()
    summary["brier_skill_score_ci"] = list(brier_skill_score_interval(
        p, o, reference, n_resamples=n_resamples, confidence=confidence,
        seed=seed, block=blocks))
    if 0 < o.sum() < o.size:
        summary["roc_auc_ci"] = list(roc_auc_interval(
            p, o, n_resamples=n_resamples, confidence=confidence, seed=seed, block=blocks))
    summary["roc_auc_within_month"] = roc_auc_within(
        p, o, pd.DatetimeIndex(hindcast["time"]).month.to_numpy())
    summary["reliability_share"] = (summary["murphy"]["reliability"] / summary["brier_score"]
                                    if summary["brier_score"] > 0 else float("nan"))
    summary["confidence"] = confidence
    return summary


def tune(pcs, times, observed, *, tops=P.tops.default, modes=P.scan_modes.default,
         window=DEFAULT_WINDOW, separation=DEFAULT_SEPARATION, months=None,
         progress=False) -> pd.DataFrame:
    """Scan the number of analogs and of EOF modes; Brier skill score of each pair.

    Returns a DataFrame (top, n_modes, brier_score, brier_skill_score) sorted best first.
    Modes above the number the store holds are skipped.
    """
    available = np.asarray(pcs).shape[1]
    modes = sorted({int(m) for m in modes if m <= available})
    if not modes:
        raise AnalogsInputError(f"no mode count to scan: the store holds {available} modes")
    neighbours = HeldOutNeighbours(pcs, times, observed, modes=modes, top=max(tops),
                                   window=window, separation=separation, months=months,
                                   progress=progress)
    rows = []
    for n_modes in modes:
        for top, hindcast in neighbours.hindcasts(tops, n_modes).items():
            p, o = hindcast["forecast"].to_numpy(), hindcast["observed"].to_numpy()
            rows.append({"top": top, "n_modes": n_modes, "brier_score": brier_score(p, o),
                         "brier_skill_score": brier_skill_score(
                             p, o, hindcast["climatology"].to_numpy())})
    return pd.DataFrame(rows).sort_values("brier_skill_score", ascending=False, ignore_index=True)


def nested_tune(pcs, times, observed, *, tops=P.tops.default, modes=P.scan_modes.default,
                window=DEFAULT_WINDOW, separation=DEFAULT_SEPARATION, months=None,
                reference=(DEFAULT_TOP, None), n_resamples=P.n_resamples.default,
                confidence=0.9, seed=0, progress=False) -> dict:
    """The tuning scan with an honest score for the setting it chooses (nested
    cross-validation).

    Outer loop, leave one year out: for each year Y, every (number of analogs, modes)
    pair is scored by a leave-one-year-out hindcast of the archive *without Y* (inner
    loop: Y's days are neither targets nor analogs), the best pair is chosen there, and
    Y's days are forecast with it from all the other years. The pooled outer forecasts
    are scored against the same climatology reference as every hindcast: a score
    measured on folds that did not choose the setting (Varma & Simon 2006, BMC
    Bioinformatics, from memory; common practice in model selection). The non-nested
    score (the best pair's score on the folds that chose it) is returned beside it.

    Costs one neighbour search (:class:`HeldOutNeighbours`) and (number of years + 1) x
    (number of mode counts) vectorised de-clusterings.

    Returns
    -------
    dict with ``table`` (the non-nested scan, as :func:`tune`), ``best`` (the pair chosen
    on every year, which ``--save`` records), ``chosen_by_year``, ``nested`` (Brier
    skill score of the outer forecasts with its year-bootstrap interval),
    ``reference`` (the ``reference`` pair's score on the same days: the gain is
    measured against it), ``non_nested_gain`` and ``nested_gain``.
    """
    times = times if isinstance(times, pd.DatetimeIndex) else pd.DatetimeIndex(times)
    pcs, observed = np.asarray(pcs, dtype=float), np.asarray(observed, dtype=bool)
    available = pcs.shape[1]
    modes = sorted({int(m) for m in modes if m <= available})
    if not modes:
        raise AnalogsInputError(f"no mode count to scan: the store holds {available} modes")
    years = np.unique(times.year)
    if years.size < 3:
        raise AnalogsInputError("nested tuning needs an archive of at least three years (one "
                                "held out, two for the inner leave-one-year-out)")
    pairs = [(t, m) for m in modes for t in tops]
    reference = (int(reference[0]), int(reference[1] or available))
    common = dict(window=window, separation=separation, months=months)

    def skill(hindcast):
        p, o = hindcast["forecast"].to_numpy(), hindcast["observed"].to_numpy()
        return brier_skill_score(p, o, hindcast["climatology"].to_numpy())

    neighbours = HeldOutNeighbours(pcs, times, observed, modes=modes + [reference[1]],
                                   top=max([*tops, reference[0]]), drop_years=True,
                                   progress=progress, **common)
    full = {}
    for n_modes in sorted(set(modes + [reference[1]])):
        wanted = [t for t, m in pairs + [reference] if m == n_modes]
        full.update({(t, n_modes): frame
                     for t, frame in neighbours.hindcasts(wanted, n_modes).items()})
    table = pd.DataFrame([{"top": t, "n_modes": m,
                           "brier_score": brier_score(full[(t, m)]["forecast"].to_numpy(),
                                                      full[(t, m)]["observed"].to_numpy()),
                           "brier_skill_score": skill(full[(t, m)])} for t, m in pairs])
    table = table.sort_values("brier_skill_score", ascending=False, ignore_index=True)
    chosen, parts = {}, []
    for year in tqdm(years, desc="nested tuning", disable=not progress):
        inner = {}
        for n_modes in modes:
            for t, frame in neighbours.hindcasts(tops, n_modes, drop_year=year).items():
                inner[(t, n_modes)] = skill(frame)
        best = max(pairs, key=lambda pair: (np.nan_to_num(inner[pair], nan=-np.inf)))
        chosen[int(year)] = {"top": best[0], "n_modes": best[1]}
        outer = full[best]
        parts.append(outer[outer["year"] == year])
    nested = pd.concat(parts).sort_values("time", ignore_index=True)
    base = full[reference]
    base = base[base["time"].isin(nested["time"])].sort_values("time", ignore_index=True)

    def scored(hindcast):
        p, o, r = (hindcast[c].to_numpy() for c in ("forecast", "observed", "climatology"))
        interval = brier_skill_score_interval(p, o, r, n_resamples=n_resamples,
                                              confidence=confidence, seed=seed,
                                              block=hindcast["year"].to_numpy())
        return {"brier_skill_score": skill(hindcast), "brier_skill_score_ci": list(interval)}

    best = table.iloc[0]
    best_pair = (int(best["top"]), int(best["n_modes"]))
    nested_score, reference_score = scored(nested), scored(base)
    apparent = float(best["brier_skill_score"])
    return {
        "table": table, "best": {"top": best_pair[0], "n_modes": best_pair[1]},
        "chosen_by_year": chosen,
        "nested": nested_score,
        "non_nested": {"brier_skill_score": apparent},
        "reference": {"top": reference[0], "n_modes": reference[1], **reference_score},
        "non_nested_gain": apparent - reference_score["brier_skill_score"],
        "nested_gain": nested_score["brier_skill_score"] - reference_score["brier_skill_score"],
        "confidence": confidence,
        "method": "nested leave-one-year-out: outer year held out, setting chosen by an "
                  "inner leave-one-year-out on the other years",
    }
