"""Cross-validated skill: the leave-one-year-out hindcast and the tuning scan.

Every archive day is forecast from analogs found in the other years only (so its own
weather episode, and its own year's peculiarities, cannot help), with the same season
window and de-clustering as a live query. The forecast is the fraction of analog days
with at least one event in the region; it is scored against what happened that day
with the scores of :mod:`analogs.stages.scores`, and against the season-window climatology of
the other years (the reference of the Brier skill score) and a random-analog baseline
drawn from the same candidates (same N, same window).
"""

from __future__ import annotations

import faiss
import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from analogs._validation import check_choice, check_float, check_int
from analogs.errors import AnalogsInputError
from analogs.stages.selection import circular_day_gap, day_numbers, decluster_days, fetch_size
from analogs.stages.scores import bootstrap_interval, brier_skill_score, roc_auc, verification_summary

HINDCAST_METHODS = ("analogs", "random")


def leave_one_year_out(pcs, times, observed, *, top=20, window=45, separation=3,
                       n_modes=None, method="analogs", months=None, seed=0, progress=False):
    """Forecast every day from analogs in the other years.

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

    Returns
    -------
    DataFrame indexed like the forecast days with ``time``, ``year``, ``forecast``
    (fraction of analogs with the event), ``observed`` (0/1), ``climatology`` (event
    frequency over the other years' season-window days) and ``n_analogs``.
    """
    owner = "leave_one_year_out"
    top = check_int(top, "top", owner, min_value=1)
    window = check_int(window, "window", owner, min_value=0, max_value=183)
    separation = check_int(separation, "separation", owner, min_value=0)
    check_choice(method, "method", owner, HINDCAST_METHODS)
    times = pd.DatetimeIndex(times)
    pcs = np.asarray(pcs, dtype=float)
    observed = np.asarray(observed, dtype=bool)
    if n_modes is not None:
        n_modes = check_int(n_modes, "n_modes", owner, min_value=1, max_value=pcs.shape[1])
        pcs = pcs[:, :n_modes]
    years = times.year.to_numpy()
    if np.unique(years).size < 2:
        raise AnalogsInputError("a leave-one-year-out hindcast needs an archive of at least two years")
    day_of_year = times.day_of_year.to_numpy()
    days = day_numbers(times)
    year_code = years - years.min()
    n_years = int(year_code.max()) + 1
    targets = np.ones(len(times), dtype=bool)
    if months is not None:
        targets &= np.isin(times.month, list(months))
    vectors = np.ascontiguousarray(pcs, dtype=np.float32)
    faiss.omp_set_num_threads(1)  # batches of a few dozen queries: threads cost more
    rng = np.random.default_rng(seed)
    forecast = np.full(len(times), np.nan)
    climatology = np.full(len(times), np.nan)
    n_analogs = np.zeros(len(times), dtype=int)
    calendar_days = np.unique(day_of_year[targets])
    for day in tqdm(calendar_days, desc="hindcast", unit="calendar day", disable=not progress):
        queries = np.flatnonzero(targets & (day_of_year == day))
        season = np.flatnonzero(circular_day_gap(day_of_year, day) <= window)
        season_codes = year_code[season]
        # Climatology of the other years: the season's totals less each target's own year.
        days_by_year = np.bincount(season_codes, minlength=n_years)
        events_by_year = np.bincount(season_codes, weights=observed[season], minlength=n_years)
        n_others = season.size - days_by_year[year_code[queries]]
        n_events = events_by_year.sum() - events_by_year[year_code[queries]]
        with np.errstate(invalid="ignore", divide="ignore"):
            climatology[queries] = np.where(n_others > 0, n_events / n_others, np.nan)
        if method == "analogs":
            # Exact search over this day's season only (faiss brute force on the subset:
            # the same neighbours as the flat index with an ID selector, without
            # scanning the other seasons). Fetch enough to survive removing the
            # target's own year and de-clustering.
            fetch = fetch_size(top, separation, season.size, extra=int(days_by_year.max()))
            _, local = faiss.knn(vectors[queries], vectors[season], fetch)
        for position, row in enumerate(queries):
            if n_others[position] == 0:
                continue
            if method == "random":
                others = season[season_codes != year_code[row]]
                chosen = rng.choice(others, size=min(top, others.size), replace=False)
            else:
                neighbours = season[local[position][local[position] >= 0]]
                neighbours = neighbours[year_code[neighbours] != year_code[row]]
                chosen = neighbours[decluster_days(days[neighbours], separation, limit=top)]
            if chosen.size:
                forecast[row] = observed[chosen].mean()
                n_analogs[row] = chosen.size
    done = np.isfinite(forecast) & np.isfinite(climatology)
    return pd.DataFrame({
        "time": times[done], "year": years[done], "forecast": forecast[done],
        "observed": observed[done].astype(int), "climatology": climatology[done],
        "n_analogs": n_analogs[done],
    })


def score_hindcast(hindcast: pd.DataFrame, *, threshold=0.3, n_bins=10, n_resamples=500,
                   confidence=0.9, seed=0) -> dict:
    """Scores of a hindcast (:func:`leave_one_year_out`) with year-block bootstrap intervals.

    Returns the :func:`analogs.stages.scores.verification_summary` dict plus
    ``brier_skill_score_ci`` and ``roc_auc_ci`` (block bootstrap over years, since days
    within one year are not independent).
    """
    threshold = check_float(threshold, "threshold", "score_hindcast", min_value=0.0, max_value=1.0)
    if hindcast.empty:
        raise AnalogsInputError("the hindcast produced no forecasts (archive too short or "
                                "no target days in the chosen months)")
    p = hindcast["forecast"].to_numpy()
    o = hindcast["observed"].to_numpy()
    reference = hindcast["climatology"].to_numpy()
    summary = verification_summary(p, o, reference, threshold=threshold, n_bins=n_bins)
    blocks = hindcast["year"].to_numpy()
    summary["brier_skill_score_ci"] = list(bootstrap_interval(
        brier_skill_score, p, o, reference, n_resamples=n_resamples, confidence=confidence,
        seed=seed, block=blocks))
    if 0 < o.sum() < o.size:
        summary["roc_auc_ci"] = list(bootstrap_interval(
            roc_auc, p, o, n_resamples=n_resamples, confidence=confidence, seed=seed,
            block=blocks))
    summary["confidence"] = confidence
    return summary


def tune(pcs, times, observed, *, tops=(10, 20, 30, 50), modes=(5, 10, 15, 20), window=45,
         separation=3, months=None, progress=False) -> pd.DataFrame:
    """Scan the number of analogs and of EOF modes; Brier skill score of each pair.

    Returns a DataFrame (top, n_modes, brier_score, brier_skill_score) sorted best first.
    Modes above the number the store holds are skipped.
    """
    available = np.asarray(pcs).shape[1]
    modes = sorted({int(m) for m in modes if m <= available})
    if not modes:
        raise AnalogsInputError(f"no mode count to scan: the store holds {available} modes")
    rows = []
    pairs = [(t, m) for m in modes for t in tops]
    for top, n_modes in tqdm(pairs, desc="tuning", disable=not progress):
        hindcast = leave_one_year_out(pcs, times, observed, top=top, window=window,
                                      separation=separation, n_modes=n_modes, months=months)
        p, o = hindcast["forecast"].to_numpy(), hindcast["observed"].to_numpy()
        rows.append({"top": top, "n_modes": n_modes,
                     "brier_score": float(np.mean((p - o) ** 2)),
                     "brier_skill_score": brier_skill_score(p, o, hindcast["climatology"].to_numpy())})
    return pd.DataFrame(rows).sort_values("brier_skill_score", ascending=False, ignore_index=True)
