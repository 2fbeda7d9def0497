"""Workflow: cross-validated skill of a loaded store (verify, tune, skill by month).

The numbers come from the pure stages: the leave-one-year-out hindcast
(:mod:`analogs.stages.hindcast`, which selects analogs with the live query's own
:mod:`analogs.stages.selection`) and the scores (:mod:`analogs.stages.scores`). This
module only gathers what they need from a loaded store (its PCs, times, events,
region and saved query defaults) and shapes the answers: the dict of
``analogs verify --json``, the tuning table, and the per-month skill that a build
records in the manifest and every query quotes (:func:`skill_for`).

The functions take an :class:`~analogs.workflows.analog_store.AnalogStore`; the store's
``verify``, ``tune``, ``observed`` and ``skill_for`` methods delegate here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from analogs import CAUTION
from analogs._validation import renamed_errors
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.workflows.find import resolve_region

# The hindcast and the scores are imported inside the functions that use them: a query
# on an archive date quotes the stored skill (skill_for) but needs neither, and the
# start-up of `analogs find` is part of a forecaster's wait.


def observed(store, region=None, kinds=None) -> np.ndarray:
    """Whether at least one event (of ``kinds``, default any) fell in ``region`` (default
    the store's) on each archive day: bool array aligned with ``store.times``. Days
    without report coverage (``store.covered`` False) read False: leave them out
    (:func:`hindcast_days`)."""
    if store.events is None:
        raise AnalogsInputError(f"store {store.path} has no events table: verification needs "
                                "one (rebuild with --events FILE)")
    region = resolve_region(store, region)
    return store.daily_counts(region, kinds)["total"].to_numpy() > 0


def hindcast_days(store, events: np.ndarray, *, region=None, kinds=None):
    """The PCs, times and observed events of the days with report coverage: what a
    hindcast may forecast and take analogs from (days without reports yet are not
    known, so neither targets nor analogs). Refuses a store whose covered days hold no
    event (of ``kinds``, in ``region``): there is nothing to verify."""
    covered = store.covered
    n_covered = int(covered.sum())
    if n_covered == 0:
        raise AnalogsInputError(
            f"store {store.path}: no day has report coverage (its days were appended "
            "without reports): pass their reports with analogs update --events")
    if not events[covered].any():
        label = region.label() if region is not None else "the region"
        raise AnalogsInputError(
            f"store {store.path}: its events table holds no report"
            + (f" of kind {', '.join(kinds)}" if kinds else "")
            + f" in {label} on any of its {n_covered} days with report coverage: there is "
            "nothing to verify (a header-only events table, or a region without reports)")
    return store.pcs.values[covered], store.times[covered], events[covered]


def query_vectors(store, n_modes, *, regime=None, sequence=P.sequence.default):
    """The vectors a query with ``regime`` and ``sequence`` searches, and the days it
    allows as analogs, on every archive day: ``(vectors, restrict)``, the live query's
    own (:class:`analogs.workflows.find._Query`): the leading ``n_modes`` PCs, with the
    preceding days' when ``sequence`` (:func:`analogs.stages.selection.sequence_vectors`),
    and ``restrict`` the days tagged ``regime`` that have their preceding days (None
    when neither setting narrows them). A hindcast of these settings forecasts the
    ``restrict`` days only: the days such a query is asked about (of that regime) and
    whose own sequence is known."""
    from analogs.stages.selection import sequence_vectors
    from analogs.workflows.find import regime_mask
    vectors = store.pc_values[:, :n_modes]
    if regime is None and not sequence:
        return vectors, None
    restrict = np.ones(len(store.times), dtype=bool)
    if regime is not None:
        restrict &= regime_mask(store, regime)
    if sequence:
        vectors, complete = sequence_vectors(vectors, store.days, sequence)
        restrict &= complete
    return vectors, restrict


def measured_skill(pcs, times, observed, covered, *, region, top=P.top.default,
                   window=P.window.default, separation=P.separation.default,
                   restrict=None, weights=P.weights.default,
                   exclude=P.exclude.default, metric=P.metric.default,
                   sequence=P.sequence.default, fold_slots=None) -> dict | None:
    """:func:`skill_by_month` over the days with report coverage (``covered``); None when
    it cannot be measured: fewer than two years covered, or no day (or every day) with
    an event there. ``restrict`` (bool per day, :func:`query_vectors`): the days allowed
    as analogs, which are also the days forecast; ``sequence``: ``pcs`` are the sequence
    vectors of that many preceding days (for the event-weighted map); ``fold_slots``:
    :func:`~analogs.stages.hindcast.leave_one_year_out`'s."""
    covered = np.asarray(covered, dtype=bool)
    times = pd.DatetimeIndex(times)
    targets = covered if restrict is None else covered & np.asarray(restrict, dtype=bool)
    events = np.asarray(observed, dtype=bool)[targets]
    if np.unique(times[targets].year).size < 2 or not 0 < events.sum() < events.size:
        return None
    restrict = None if restrict is None else np.asarray(restrict, dtype=bool)[covered]
    return skill_by_month(np.asarray(pcs)[covered], times[covered],
                          np.asarray(observed, dtype=bool)[covered], region=region,
                          top=top, window=window, separation=separation,
                          restrict=restrict, weights=weights, exclude=exclude, metric=metric,
                          sequence=sequence, fold_slots=fold_slots)


def verify(store, *, top=P.top.api_default, window=P.window.default,
           separation=P.separation.default, n_modes=P.query_modes.api_default, region=None,
           months=None, threshold=P.threshold.default, n_resamples=P.n_resamples.default,
           kinds=None, regime=None, sequence=P.sequence.default, weights=P.weights.default,
           exclude=P.exclude.default, metric=P.metric.api_default, progress=False) -> dict:
    """Leave-one-year-out hindcast scores, with the random-analog baseline beside them.

    ``top`` and ``n_modes`` default to the store's saved query defaults (else
    ``P.top.default`` and every mode). ``regime``, ``sequence``, ``weights`` and
    ``exclude`` are find's: the hindcast takes its analogs as such a query does
    (:func:`query_vectors`; with ``regime`` or ``sequence`` it forecasts the days the
    query applies to: that regime's days, the days with their preceding days), weighs
    them as it does, and leaves out the target's year and the days within ``exclude``
    days of it. Returns the ``analogs verify --json`` dict:
    :func:`analogs.stages.hindcast.score_hindcast` of the analog forecasts, plus
    ``random_analogs`` (the same scores of ``top`` days drawn at random from the same
    candidates) and ``settings``. ``metric`` is the analog search's distance
    (``P.metric``, default the store's saved query default, else ``P.metric.default``;
    event-weighted: fitted inside each fold, without the held-out year).
    """
    from analogs.stages.hindcast import logistic_hindcast, leave_one_year_out, score_hindcast
    owner = "verify"
    defaults = store.query_defaults
    top = defaults.get("top", P.top.default) if top is None else top
    n_modes = defaults.get("n_modes") if n_modes is None else n_modes
    metric = defaults.get("metric", P.metric.default) if metric is None else metric
    top, window = P.top.check(top, owner), P.window.check(window, owner)
    separation = P.separation.check(separation, owner)
    n_modes = P.query_modes.check(n_modes, owner, maximum=store.n_modes)
    months, kinds = P.months.check(months, owner), P.kinds.check(kinds, owner)
    threshold = P.threshold.check(threshold, owner)
    n_resamples = P.n_resamples.check(n_resamples, owner)
    metric = P.metric.check(metric, owner)
    sequence, weights = P.sequence.check(sequence, owner), P.weights.check(weights, owner)
    exclude = P.exclude.check(exclude, owner)
    with renamed_errors(owner, "region", "kinds", "regime"):
        region = resolve_region(store, region)
        events = observed(store, region, kinds)
        vectors, restrict = query_vectors(store, int(n_modes or store.n_modes),
                                          regime=regime, sequence=sequence)
    pcs, times, events = hindcast_days(store, events, region=region, kinds=kinds)
    covered = store.covered
    if restrict is not None:
        restrict = restrict[covered]
        if not events[restrict].any():
            raise AnalogsInputError(
                f"store {store.path}: no day it would forecast with these settings "
                + (f"(days tagged {regime}" if regime is not None else "(days")
                + (f" with their {sequence} preceding days" if sequence else "")
                + ") had an event there: there is nothing to verify")
    common = dict(top=top, window=window, separation=separation, months=months,
                  exclude=exclude, restrict=restrict, targets=restrict)
    hindcast = leave_one_year_out(vectors[covered], times, events, progress=progress,
                                  weights=weights, metric=metric, sequence=sequence,
                                  **common)
    summary = score_hindcast(hindcast, threshold=threshold, n_resamples=n_resamples)
    baseline = score_hindcast(leave_one_year_out(vectors[covered], times, events,
                                                 method="random", **common),
                              threshold=threshold, n_resamples=n_resamples)
    summary["random_analogs"] = {k: baseline[k] for k in
                                 ("brier_score", "brier_skill_score", "brier_skill_score_ci",
                                  "roc_auc")}
    # Same-fold baselines: the same days, observations, year folds and reference.
    climatology = hindcast.assign(forecast=hindcast["climatology"])
    regression = logistic_hindcast(pcs, times, events, hindcast, n_modes=n_modes)
    keys = ("brier_score", "brier_skill_score", "brier_skill_score_ci", "roc_auc",
            "roc_auc_within_month", "reliability_share")
    summary["baselines"] = {
        "season_climatology": {k: v for k, v in score_hindcast(
            climatology, threshold=threshold, n_resamples=n_resamples).items() if k in keys},
        "random_analogs": {k: baseline[k] for k in keys},
        "logistic_regression": {k: v for k, v in score_hindcast(
            regression, threshold=threshold, n_resamples=n_resamples).items() if k in keys},
    }
    summary["baselines"]["logistic_regression"]["inputs"] = (
        f"{int(n_modes or store.n_modes)} PCs + 2 annual harmonics, standardised, "
        "fitted on the other years of each fold (scikit-learn LogisticRegression, C=1)")
    summary["settings"] = {"top": top, "n_modes": int(n_modes or store.n_modes),
                           "window": window, "separation": separation,
                           "months": None if months is None else sorted(months),
                           "region": region.to_dict(), "threshold": threshold,
                           "kinds": kinds, "method": "leave-one-year-out",
                           "regime": regime, "sequence_days": sequence, "weights": weights,
                           "exclude_days": exclude, "metric": metric}
    if restrict is not None:  # only then, so earlier answers keep their shape
        summary["settings"]["days_forecast"] = days_forecast(summary["settings"])
    left_out = int((~store.covered).sum())
    if left_out:  # only then, so earlier answers keep their shape
        summary["settings"]["n_days_without_reports"] = left_out
    summary["caution"] = CAUTION
    return summary


def _scan_inputs(store, tops, modes, window, separation, region, months, kinds):
    """The checked settings of a tuning scan (the store's own mode count added to the
    modes scanned) and the days it forecasts: (tops, modes, window, separation, months,
    pcs, times, events)."""
    owner = "tune"
    tops, modes = P.tops.check(tops, owner), P.scan_modes.check(modes, owner)
    window, separation = P.window.check(window, owner), P.separation.check(separation, owner)
    months, kinds = P.months.check(months, owner), P.kinds.check(kinds, owner)
    modes = modes + (store.n_modes,)
    with renamed_errors(owner, "region", "kinds"):
        region = resolve_region(store, region)
        events = observed(store, region, kinds)
    pcs, times, events = hindcast_days(store, events, region=region, kinds=kinds)
    return tops, modes, window, separation, months, pcs, times, events


def tune(store, *, tops=P.tops.default, modes=P.scan_modes.default,
         window=P.window.default, separation=P.separation.default, region=None,
         months=None, kinds=None, progress=False) -> pd.DataFrame:
    """Brier skill score of each (number of analogs, number of modes), best first
    (:func:`analogs.stages.hindcast.tune`; the store's own mode count is scanned too)."""
    from analogs.stages.hindcast import tune as scan
    tops, modes, window, separation, months, pcs, times, events = _scan_inputs(
        store, tops, modes, window, separation, region, months, kinds)
    return scan(pcs, times, events, tops=tops,
                modes=modes, window=window, separation=separation, months=months,
                progress=progress)


#: The metric a tuning scan measures (see :func:`nested_tune`).
TUNED_METRIC = "plain"


def nested_tune(store, *, tops=P.tops.default, modes=P.scan_modes.default,
                window=P.window.default, separation=P.separation.default, region=None,
                months=None, kinds=None, progress=False) -> dict:
    """The tuning scan with the chosen setting scored on folds that did not choose it
    (:func:`analogs.stages.hindcast.nested_tune`), against the store's current number of
    analogs and modes on the same days. The dict of ``verify --tune --json``'s
    ``tuning`` (the table as records).

    The scan measures the plain metric only (:data:`TUNED_METRIC`; one neighbour search
    serves every setting, :class:`~analogs.stages.hindcast.HeldOutNeighbours`, where the
    event-weighted metric would need its map refitted without each held-out year, outer
    and inner): ``metric`` and ``best["metric"]`` say so, and ``verify --tune --save``
    records it with the chosen setting."""
    from analogs.stages.hindcast import nested_tune as scan
    tops, modes, window, separation, months, pcs, times, events = _scan_inputs(
        store, tops, modes, window, separation, region, months, kinds)
    defaults = store.query_defaults
    reference = (defaults.get("top", P.top.default), defaults.get("n_modes"))
    result = scan(pcs, times, events, tops=tops, modes=modes, window=window,
                  separation=separation, months=months, reference=reference,
                  progress=progress)
    result["table"] = result["table"].to_dict(orient="records")
    result["metric"] = TUNED_METRIC
    result["best"] = {**result["best"], "metric": TUNED_METRIC}
    return result


def skill_by_month(pcs, times, observed, *, region, top=P.top.default,
                   window=P.window.default, separation=P.separation.default,
                   restrict=None, weights=P.weights.default,
                   exclude=P.exclude.default, metric=P.metric.default,
                   sequence=P.sequence.default, fold_slots=None) -> dict:
    """Cross-validated skill of the default query settings, overall and by month.

    A leave-one-year-out hindcast (:func:`analogs.stages.hindcast.leave_one_year_out`) of "at
    least one event in the region", scored by the Brier skill score against the
    other years' season-window climatology. Stored in the manifest at build so that
    every query can say how much this kind of guidance has been worth. A month whose
    reference forecasts are perfect has ``brier_skill_score`` null (the manifest is JSON).
    ``restrict`` (bool per day, :func:`query_vectors`) narrows the analogs and the days
    forecast as a ``--regime`` or ``--sequence`` query does; ``weights`` and
    ``exclude`` are the query's; ``fold_slots``: :func:`leave_one_year_out`'s.
    """
    from analogs.stages.hindcast import leave_one_year_out, score_hindcast
    from analogs.stages.scores import brier_score, brier_skill_score, brier_skill_score_interval
    hindcast = leave_one_year_out(pcs, times, observed, top=top, window=window,
                                  separation=separation, restrict=restrict,
                                  targets=restrict, weights=weights, exclude=exclude,
                                  metric=metric, sequence=sequence, fold_slots=fold_slots)
    months = pd.DatetimeIndex(hindcast["time"]).month
    by_month = {}
    for month in range(1, 13):
        part = hindcast[months == month]
        if len(part) == 0:
            continue
        p, o, reference = (part[c].to_numpy() for c in ("forecast", "observed", "climatology"))
        skill = brier_skill_score(p, o, reference)
        try:  # none when too few resampled years have a defined score (no event)
            interval = brier_skill_score_interval(p, o, reference, n_resamples=200,
                                                  block=part["year"].to_numpy())
        except AnalogsInputError:
            interval = (np.nan, np.nan)
        by_month[str(month)] = {
            "n_days": int(len(part)), "base_rate": float(o.mean()),
            "brier_score": brier_score(p, o),
            "brier_skill_score": None if np.isnan(skill) else skill,
            "brier_skill_score_ci": (None if not np.all(np.isfinite(interval))
                                     else [float(v) for v in interval]),
        }
    overall = score_hindcast(hindcast, n_resamples=200)
    measured = {"method": "leave-one-year-out hindcast of P(at least one event in region)",
                "region": region.to_dict(), "top": top, "window_days": window,
                "separation_days": separation}
    if metric != UNNAMED_METRIC:  # only then, so earlier manifests keep their meaning
        measured["metric"] = metric
    return {**measured,
            "brier_skill_score": overall["brier_skill_score"],
            "brier_skill_score_ci": overall["brier_skill_score_ci"],
            "roc_auc": overall["roc_auc"], "by_month": by_month}


def region_argument(region: dict) -> str:
    """The ``--region`` text of a region dict (:meth:`Region.to_dict`); '' for the whole
    domain."""
    if region.get("kind") == "box":
        return ",".join(f"{region[k]:g}" for k in ("south", "north", "west", "east"))
    if region.get("kind") == "point":
        return ",".join(f"{region[k]:g}" for k in ("lat", "lon", "radius_km"))
    return ""


#: The metric of a skill measurement, settings or cache key that names none: those were
#: kept before ``--metric`` existed, or measured with the simple distance, so a store
#: built before the default became event_weighted keeps the meaning of what it holds.
UNNAMED_METRIC = "plain"
#: Entries of measured skill kept in a store's manifest (``skill_cache``): the newest.
SKILL_CACHE_SIZE = 64
#: Seconds a query waits for the store's writer lock to keep a skill it measured (a
#: query does not wait behind an update: the skill is then quoted, not kept).
SKILL_CACHE_LOCK_SECONDS = 5.0
#: What the measured skill is; part of the cache key, so a change of method re-measures.
SKILL_METHOD = "leave-one-year-out hindcast of P(at least one event in region)"
#: Store files whose content the skill depends on (PCs and reports): their checksums
#: are part of the cache key, so an update (new days or new reports) re-measures.
_SKILL_INPUTS = ("scores.nc", "events.parquet")


def skill_settings(store, *, top=None, window=P.window.default,
                   separation=P.separation.default, n_modes=None, regime=None,
                   sequence=P.sequence.default, weights=P.weights.default,
                   exclude=None, metric=None) -> dict:
    """The hindcast settings a query's skill is measured with: its number of analogs,
    season window, de-clustering, modes and metric (defaults: the store's query
    defaults), regime of the analogs, sequence days, analog weights, the exclusion
    around each target (the query's ``exclude`` when wider than ``P.exclude.default``,
    else that default: a hindcast always leaves the target's own episode out; a field
    query excludes nothing because its day is not in the archive). The metric is named
    only when not :data:`UNNAMED_METRIC`, so keys kept before it existed still match."""
    exclude = max(int(exclude or 0), P.exclude.default)
    if metric is None:
        metric = store.query_defaults.get("metric", P.metric.default)
    settings = {"top": int(store.query_defaults.get("top", P.top.default) if top is None
                           else top),
                "window_days": None if window is None else int(window),
                "separation_days": int(separation),
                "n_modes": int(store.n_query_modes if n_modes is None else n_modes),
                "regime": regime, "sequence_days": int(sequence), "weights": weights,
                "exclude_days": exclude}
    if metric != UNNAMED_METRIC:
        settings["metric"] = metric
    return settings


#: Settings of :func:`skill_settings` that the build's measurement has at these values.
_PLAIN_SETTINGS = {"regime": None, "sequence_days": P.sequence.default,
                   "weights": P.weights.default, "exclude_days": P.exclude.default}


def skill_key(store, region: dict, kinds, settings: dict) -> tuple[str, dict]:
    """The cache key of a skill measurement: a short hash, and what it hashes (region,
    kinds, hindcast settings, method and the checksums of the store's PCs and reports)."""
    import hashlib
    import json
    fields = {"region": region, "kinds": sorted(kinds) if kinds else None, **settings,
              "method": SKILL_METHOD,
              "data": {name: store.manifest["files"].get(name) for name in _SKILL_INPUTS}}
    text = json.dumps(fields, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16], fields


def _verify_command(store, region: dict, kinds, settings: dict) -> str:
    """The ``analogs verify`` command that measures a query's skill."""
    argument = region_argument(region)
    defaults = {"top": store.query_defaults.get("top", P.top.default),
                "window_days": P.window.default, "separation_days": P.separation.default,
                "n_modes": store.n_query_modes,
                "metric": store.query_defaults.get("metric", P.metric.default),
                **_PLAIN_SETTINGS}
    options = {"top": "--top", "window_days": "--window", "separation_days": "--separation",
               "n_modes": "--modes", "regime": "--regime", "sequence_days": "--sequence",
               "weights": "--weights", "exclude_days": "--exclude", "metric": "--metric"}
    settings = {"metric": UNNAMED_METRIC, **settings}
    return (f"analogs verify --store {store.path}"
            + (f" --region {argument}" if argument else "")
            + (f" --kind {','.join(kinds)}" if kinds else "")
            + "".join(f" {options[k]} {settings[k]}" for k in options
                      if settings.get(k, defaults[k]) != defaults[k]))


def days_forecast(settings: dict) -> str:
    """Which archive days a hindcast of ``settings`` forecasts, in words."""
    days = "every archive day with report coverage"
    if settings.get("regime") is not None:
        days += f" tagged {settings['regime']}"
    if settings.get("sequence_days"):
        n = settings["sequence_days"]
        days += f" whose {n} preceding day{'s are' if n > 1 else ' is'} in the archive"
    return days


def _measure(store, region, kinds, settings) -> dict | None:
    """:func:`measured_skill` of P(at least one event of ``kinds`` in ``region``) with
    ``settings``; None when it cannot be measured (see :func:`measured_skill`)."""
    events = observed(store, region, kinds)
    vectors, restrict = query_vectors(store, settings["n_modes"], regime=settings["regime"],
                                      sequence=settings["sequence_days"])
    measured = measured_skill(vectors, store.times, events, store.covered, region=region,
                              top=settings["top"], window=settings["window_days"],
                              separation=settings["separation_days"], restrict=restrict,
                              weights=settings["weights"], exclude=settings["exclude_days"],
                              metric=settings.get("metric", UNNAMED_METRIC),
                              sequence=settings["sequence_days"])
    if measured is not None:
        measured["kinds"] = sorted(kinds) if kinds else None
        measured["n_modes"] = settings["n_modes"]
    return measured


def _keep(store, key: str, fields: dict, measured) -> bool:
    """Keep a measurement in the store's manifest (``skill_cache``, the newest
    :data:`SKILL_CACHE_SIZE`; :func:`analogs.workflows.store.keep_in_manifest`). False
    when it could not be kept."""
    import datetime
    from analogs.workflows import store as store_io
    measured_at = datetime.datetime.now(datetime.timezone.utc).isoformat()
    return store_io.keep_in_manifest(store.path, "skill_cache", key, fields,
                                     {"skill": measured, "measured": measured_at},
                                     limit=SKILL_CACHE_SIZE, timeout=SKILL_CACHE_LOCK_SECONDS)


def skill_for(store, target_time=None, *, region=None, kinds=None, settings=None,
              measure=True, progress=False) -> dict | None:
    """The cross-validated skill of what a query forecasts: P(at least one event of
    ``kinds`` in ``region``), overall and for the target's month when known.

    ``settings`` (:func:`skill_settings`; default the store's query settings) are the
    hindcast's number of analogs, window, de-clustering and modes. Where it comes from:

    - the build measured the store's region, any kind, with the default settings
      (:func:`skill_by_month`, ``manifest["skill"]``): quoted (``source`` "build");
    - a measurement kept in the store for this region, kinds and settings, on the
      store's current PCs and reports (``manifest["skill_cache"]``, key
      :func:`skill_key`): quoted (``source`` "kept in the store");
    - otherwise, with ``measure`` and a writable store: measured now (one hindcast, about
      a second for a few years of days) and kept in the store for the next query
      (``source`` "measured now");
    - otherwise ``measured`` False with the ``analogs verify`` command that measures it
      (``reason`` says why: not asked to measure, or a read-only store).

    A region without any report on the covered days (or every day with one) cannot be
    measured: ``measured`` False with ``reason``. None when the store holds no events (no events table, or
    a header-only one).
    """
    from analogs.workflows import store as store_io
    from analogs.workflows.find import _derived
    if store.events is None or len(store.events) == 0:
        return None
    settings = skill_settings(store) if settings is None else settings
    region_object = resolve_region(store, region)
    asked = region_object.to_dict()
    kinds = sorted(kinds) if kinds else None
    built = store.manifest.get("skill")
    measured, source = None, None
    if (built and asked == built["region"] and not kinds
            and all(settings.get(k, v) == v for k, v in _PLAIN_SETTINGS.items())
            and settings["top"] == built.get("top") and settings["n_modes"] == store.n_modes
            and settings["window_days"] == built.get("window_days")
            and settings["separation_days"] == built.get("separation_days")
            and settings.get("metric", UNNAMED_METRIC) == built.get("metric",
                                                                      UNNAMED_METRIC)):
        measured, source = built, "build"
    else:
        key, fields = skill_key(store, asked, kinds, settings)
        memory = _derived(store).setdefault("skill", {})
        kept = (store.manifest.get("skill_cache") or {}).get(key)
        if key in memory:
            measured, source = memory[key]
        elif kept is not None and kept.get("key") == fields:
            measured, source = kept["skill"], "kept in the store"
        else:
            reason = None
            if settings["window_days"] is None:
                reason = "a query without season window is not hindcast"
            elif not measure:
                reason = "not asked to measure it"
            elif not store_io.writable(store.path):
                reason = "the store is read-only, so a measurement could not be kept"
            if reason:
                return {"measured": False, "region": asked, "kinds": kinds,
                        "reason": reason, "settings": settings,
                        "command": _verify_command(store, asked, kinds, settings)}
            measured = _measure(store, region_object, kinds, settings)
            source = "measured now" + (", kept in the store"
                                       if _keep(store, key, fields, measured) else "")
            memory[key] = (measured, "kept in the store" if source.endswith("store")
                           else source)
    if measured is None:
        return {"measured": False, "region": asked, "kinds": kinds,
                "reason": "no day, or every day, of the archive with report coverage had "
                          "such a report there (or it covers fewer than two years)",
                "settings": settings,
                "command": _verify_command(store, asked, kinds, settings)}
    by_month = measured["by_month"]
    n_days = sum(entry["n_days"] for entry in by_month.values())
    answer = {"measured": True, "source": source, "method": measured["method"],
              "region": measured["region"], "kinds": kinds,
              "top": measured.get("top"), "n_modes": measured.get("n_modes",
                                                                  store.n_modes),
              "brier_skill_score": measured["brier_skill_score"],
              "brier_skill_score_ci": measured["brier_skill_score_ci"],
              "interval": "90% year-bootstrap interval of the Brier skill score",
              "roc_auc": measured["roc_auc"],
              "base_rate": (sum(e["base_rate"] * e["n_days"] for e in by_month.values())
                            / n_days) if n_days else None,
              "settings": settings, "days_forecast": days_forecast(settings)}
    if target_time is not None:
        month = by_month.get(str(pd.Timestamp(target_time).month))
        if month:
            answer["month"] = int(pd.Timestamp(target_time).month)
            answer["month_brier_skill_score"] = month["brier_skill_score"]
            answer["month_base_rate"] = month["base_rate"]
            if month.get("brier_skill_score_ci") is not None:
                answer["month_brier_skill_score_ci"] = month["brier_skill_score_ci"]
    return answer
