"""Workflow: one query of a loaded store, and the arrays its report draws.

>>> from analogs.api import AnalogStore                          # doctest: +SKIP
>>> from analogs.workflows.find import find, report_figures
>>> store = AnalogStore.load("store")
>>> result = find(store, field="forecast.nc", top=20)     # same as store.find(...)
>>> figures = report_figures(store, result)                # [(caption, PNG bytes), ...]

Data flow of a query:

1. target: an archive date gives its stored PC vector; a ``field`` is opened once
   (:func:`analogs.stages.sources.open_target`) and regridded once to the store grid
   (:func:`analogs.stages.sources.regrid_to`); the regridded fields are projected
   (daily climatology, then EOFs) and tagged (regime diagnostics), and kept in the
   result (``FindResult.target_fields``) for the report.
2. selection (:func:`analogs.stages.selection.find_analogs`): season window, exclusion,
   de-clustering, optional regime filter or sequence match.
3. outcomes: the analog days' event counts in the region
   (:func:`analogs.stages.outcomes.summarize_outcomes`) beside the season climatology,
   the cyclone-relative composite of the tropical analogs, the stored skill.

:func:`report_figures` gathers what the figures need in one pass (one daily-climatology
evaluation and one EOF reconstruction for the target day and every analog day, the
events of those days, the outcome maps) and hands arrays to the pure figure functions of
:mod:`analogs.presentation.figures`.

Derived arrays of a store version (daily event counts per region, sequence vectors and
their indexes, regime arrays) are computed once per loaded store and kept beside it.
"""

from __future__ import annotations

import weakref

import numpy as np
import pandas as pd
import xarray as xr

from analogs._validation import choice_expected, fail, renamed_errors
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.results import EVENTS_PREFIX, EVENTS_TOTAL, FindResult
from analogs.stages.index import AnalogIndex
from analogs.stages.outcomes import (
    Region,
    analog_weights,
    cyclone_relative_composite,
    daily_event_counts,
    summarize_outcomes,
)
from analogs.stages import outcomes as outcome_stage
from analogs.stages.selection import candidate_ids, find_analogs

# The readers (sources) and the regime diagnostics (regimes) are imported inside the
# functions that use them: a query on an archive date needs neither, and the start-up of
# `analogs find` is part of a forecaster's wait.

#: How the analogs may be weighted in the outcome statistics.
WEIGHT_SCHEMES = P.weights.choices
#: Weight of the day ``lag`` days before the target in a sequence match: 0.5 ** lag.
SEQUENCE_DECAY = 0.5
#: Analog days drawn one by one in the report's panel.
PANEL_ANALOGS = 6

_DERIVED: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _derived(store) -> dict:
    """Arrays derived from one loaded store version, kept as long as the store lives."""
    try:
        return _DERIVED.setdefault(store, {})
    except TypeError:  # an object that cannot be weakly referenced: no caching
        return {}


# ------------------------------------------------------------------------ the query

def find(store, *, date=None, field=None, time=None, top=P.top.api_default,
         window=P.window.default, exclude=P.exclude.api_default,
         separation=P.separation.default, region=None, regime=None,
         weights=P.weights.default, confidence=P.confidence.default,
         sequence=P.sequence.default, kinds=None) -> FindResult:
    """Closest archive days of ``store`` to a target and what they produced.

    Give exactly one of ``date`` (an archive day, YYYY-MM-DD) or ``field`` (a path or a
    canonical Dataset of a forecast field on any grid, with ``time`` its valid time
    when the file holds several). ``exclude`` defaults to ``P.exclude.default`` days for a
    date target and to nothing for a field target. ``top`` defaults to the store's saved
    query default, else ``P.top.default``. ``sequence`` (0, 1 or 2) also matches the
    target's preceding days, so analogs share the pattern's evolution (see
    :func:`sequence_vectors`); a field target then needs those days in its file.
    ``weights`` weighs the analogs in the outcome statistics (one of ``WEIGHT_SCHEMES``);
    ``confidence`` is the level of their intervals; ``kinds`` limits the events counted.

    A field target is opened once and regridded to the store grid once; those fields
    serve the projection, the regime diagnostics and (``FindResult.target_fields``) the
    report. Returns a :class:`analogs.results.FindResult`.
    """
    owner = "find"
    top = store.query_defaults.get("top", P.top.default) if top is None else top
    if (date is None) == (field is None):
        raise AnalogsInputError(f"{owner} needs exactly one target, date (YYYY-MM-DD) or "
                                f"field (a file or Dataset). Got {'both' if date is not None else 'neither'}.")
    top, window, exclude = (P.top.check(top, owner), P.window.check(window, owner),
                            P.exclude.check(exclude, owner))
    separation, sequence = P.separation.check(separation, owner), P.sequence.check(sequence, owner)
    weights, confidence = P.weights.check(weights, owner), P.confidence.check(confidence, owner)
    kinds = P.kinds.check(kinds, owner)
    with renamed_errors(owner, "region", "kinds"):
        region = resolve_region(store, region)
        if kinds is not None and store.events is not None:
            daily_counts(store, region, kinds)  # refuses unknown kinds early; kept for later
    n_modes = store.n_query_modes
    fields = None
    if date is not None:
        row = day_row(store, date)
        vector = store.pcs.values[row, :n_modes]
        if sequence:
            vector = sequence_vectors(store, sequence)[0][row]
        target_time = store.times[row]
        exclude = P.exclude.default if exclude is None else exclude
        target = {"date": str(store.days[row].date()), **regime_of_day(store, row)}
    else:
        with renamed_errors(owner, "time"):
            fields = target_fields(store, field, time)
        target_time = pd.Timestamp(fields["time"].values[0])
        vector = project(store, fields)
        if sequence:
            vector = _field_sequence_vector(store, field, target_time, vector, sequence)
        target = {"date": str(target_time.date()), **regime_of_fields(store, fields, region)}
    restrict = None
    if regime is not None:
        restrict = regime_mask(store, regime)
    index = store.index
    if sequence:
        complete = sequence_vectors(store, sequence)[1]
        restrict = complete if restrict is None else restrict & complete
        index = _sequence_index(store, sequence)
    else:
        vector = vector[:n_modes]
    chosen = find_analogs(index, store.times, vector, target_time=target_time,
                          top=top, window=window, exclude=exclude,
                          separation=separation, restrict=restrict)
    if chosen.empty:
        raise AnalogsInputError(
            "no archive day is allowed as an analog of this target "
            f"(season window +/-{window} d, exclusion {exclude} d"
            + (f", regime {regime}" if regime else "")
            + (f", sequence of {sequence} preceding days" if sequence else "")
            + "); widen the season window or drop the regime")
    analogs = describe_analogs(store, chosen, region, kinds)
    outcomes = outcome_summary(store, analogs, target_time, window, region, weights,
                               confidence, kinds)
    settings = {"top": top, "window_days": window, "exclude_days": exclude,
                "sequence_days": sequence, "kinds": kinds,
                "separation_days": separation, "regime": regime,
                "region": {**region.to_dict(), "label": region.label()}, "weights": weights,
                "n_modes": n_modes, "store": str(store.path)}
    return FindResult(target=target, analogs=analogs, outcomes=outcomes, settings=settings,
                      region=region, target_fields=fields)


# ---------------------------------------------------------------------- targets

def day_row(store, date) -> int:
    """Row of the archive day ``date`` (YYYY-MM-DD) in ``store``."""
    try:
        day = pd.Timestamp(date).normalize()
    except (TypeError, ValueError):
        fail("date", "find", "a date YYYY-MM-DD", date)
    rows = np.flatnonzero(store.days == day)
    if rows.size == 0:
        fail("date", "find", f"a day of the archive of store {store.path} "
             f"({store.days[0].date()} to {store.days[-1].date()}), not outside the archive "
             "or missing from it", str(day.date()))
    return int(rows[0])


def open_field(field, time=None) -> xr.Dataset:
    """A field target as a canonical Dataset (one time, its own grid): ``field`` is a
    path (opened with :func:`analogs.stages.sources.open_target`) or a Dataset."""
    from analogs.stages.sources import open_target
    dataset = field if isinstance(field, xr.Dataset) else open_target(field, time=time)
    if "time" not in dataset.dims or pd.isna(dataset["time"].values[0]):
        raise AnalogsInputError(
            f"the target field {field if not isinstance(field, xr.Dataset) else ''} has no "
            "valid time; its calendar day is needed for the climatology and the season "
            "window: write the valid time into the file")
    return dataset


def target_fields(store, field, time=None) -> xr.Dataset:
    """A field target's store fields, opened once and regridded once to the store grid
    (``time`` of length one)."""
    return on_store_grid(store, open_field(field, time))


def on_store_grid(store, dataset: xr.Dataset) -> xr.Dataset:
    """The store's fields of a canonical Dataset, bilinearly regridded to the store grid."""
    from analogs.stages.sources import regrid_to
    missing = [name for name in store.fields if name not in dataset.data_vars]
    if missing:
        raise AnalogsInputError(
            f"the target field lacks {', '.join(missing)}: the store was built from "
            f"{', '.join(store.fields)}")
    lat, lon = store.grid
    return regrid_to(dataset[store.fields], lat, lon)


def project(store, fields: xr.Dataset) -> np.ndarray:
    """PC vector of one time of fields already on the store grid (:func:`on_store_grid`):
    anomalies from the daily climatology, projected on the EOFs."""
    anomalies = store.climatology.transform(fields[store.fields])
    pcs = store.eof.transform(anomalies)
    return np.asarray(pcs.values, dtype=float).reshape(-1)


def regime_of_fields(store, fields: xr.Dataset, region: Region) -> dict:
    """Regime of one time of fields on the store grid, from the physical diagnostics
    (:func:`analogs.stages.regimes.tag_days`) over ``region``."""
    from analogs.stages.regimes import tag_days
    from analogs.workflows.build import diagnostic_region
    if "time" not in fields.dims:
        fields = fields.expand_dims(time=[pd.Timestamp("2000-01-01")])
    tags = tag_days(fields, diagnostic_region(region, fields), progress=False)
    row = tags.iloc[0]
    return {"regime": str(row["regime"]), "regime_confidence": float(row["confidence"]),
            "reason": str(row.get("reason", ""))}


def regime_of_day(store, row: int) -> dict:
    """Regime, confidence and reason stored for archive row ``row``."""
    if store.tags is None:
        return {"regime": "other", "regime_confidence": 0.0, "reason": "no tags in store"}
    cache = _derived(store)
    if "regime_arrays" not in cache:
        tags = store.tags
        reasons = tags["reason"] if "reason" in tags else pd.Series("", index=tags.index)
        cache["regime_arrays"] = (tags["regime"].astype(str).to_numpy(),
                                  tags["confidence"].to_numpy(dtype=float),
                                  reasons.astype(str).to_numpy())
    regimes, confidences, reasons = cache["regime_arrays"]
    return {"regime": str(regimes[row]), "regime_confidence": float(confidences[row]),
            "reason": str(reasons[row])}


def resolve_region(store, region) -> Region:
    """The outcome region: ``region`` (a Region or its text) or the store's default,
    checked to hold grid points of the store."""
    if region is None:
        region = store.region
    elif isinstance(region, str):
        region = Region.parse(region)
    lat, lon = store.grid
    region.require_grid_points(lat, lon)
    return region


def regime_mask(store, regime) -> np.ndarray:
    """Archive rows tagged ``regime`` (for ``--regime``)."""
    from analogs.stages.regimes import REGIME_LABELS
    if store.tags is None:
        raise AnalogsInputError(f"regime {regime!r}: store {store.path} has no tags to "
                                "choose analogs by (rebuild it)")
    known = sorted(store.tags["regime"].unique())
    labels = set(REGIME_LABELS) | set(known)
    if regime not in labels:
        fail("regime", "find", choice_expected(sorted(labels)), regime)
    return (store.tags["regime"] == regime).to_numpy()


# ---------------------------------------------------------------------- sequences

def sequence_vectors(store, sequence) -> tuple[np.ndarray, np.ndarray]:
    """Vectors of each day followed by its ``sequence`` preceding days.

    Row t is ``[pcs(t), w1 pcs(t-1), ..., ws pcs(t-s)]`` with ``w_lag = 0.5 ** lag``
    (``SEQUENCE_DECAY``), so the Euclidean distance between two rows is the weighted
    distance of the two short sequences. The boolean array marks rows whose preceding
    days are all in the archive (consecutive calendar days); only those can be analogs.
    """
    sequence = P.sequence.check(sequence, "find")
    cache = _derived(store).setdefault("sequence_vectors", {})
    if sequence not in cache:
        pcs = store.pcs.values[:, :store.n_query_modes]
        day_numbers = (store.days - pd.Timestamp("1970-01-01")).days.to_numpy()
        parts, complete = [pcs], np.ones(len(pcs), dtype=bool)
        for lag in range(1, sequence + 1):
            shifted = np.roll(pcs, lag, axis=0)
            complete &= np.roll(day_numbers, lag) == day_numbers - lag
            parts.append(SEQUENCE_DECAY ** lag * shifted)
        complete[:sequence] = False
        cache[sequence] = (np.hstack(parts), complete)
    return cache[sequence]


def _sequence_index(store, sequence) -> AnalogIndex:
    indexes = _derived(store).setdefault("sequence_indexes", {})
    if sequence not in indexes:
        indexes[sequence] = AnalogIndex(kind="auto").fit(sequence_vectors(store, sequence)[0])
    return indexes[sequence]


def _field_sequence_vector(store, field, target_time, vector, sequence) -> np.ndarray:
    """The sequence vector of a field target: its preceding days come from its file."""
    from analogs.stages.sources import open_target
    if isinstance(field, xr.Dataset):
        raise AnalogsInputError("a sequence match of a field needs its file (with the "
                                "preceding days), not a Dataset")
    n_modes = store.n_query_modes
    parts = [vector[:n_modes]]
    for lag in range(1, sequence + 1):
        earlier = target_time - pd.Timedelta(days=lag)
        try:
            previous = open_target(field, time=earlier.isoformat())
        except AnalogsInputError as error:
            fail("sequence", "find", f"at most the number of days before the target that "
                 f"{field} holds: it lacks {earlier:%Y-%m-%dT%H:%M} ({error})", sequence)
        previous = project(store, on_store_grid(store, previous))
        parts.append(SEQUENCE_DECAY ** lag * previous[:n_modes])
    return np.concatenate(parts)


# ---------------------------------------------------------------------- outcomes

def daily_counts(store, region, kinds=None) -> pd.DataFrame:
    """Events in ``region`` on every archive day (rows aligned with ``store.times``),
    one column per kind plus ``total``; computed once per region and kinds and kept."""
    key = (region, None if kinds is None else tuple(sorted(kinds)))
    cache = _derived(store).setdefault("daily_counts", {})
    if key not in cache:
        if store.events is None:
            cache[key] = pd.DataFrame({"total": np.zeros(len(store.days), dtype=int)},
                                      index=store.days)
        else:
            cache[key] = daily_event_counts(store.events, store.days, region, kinds=kinds)
    return cache[key]


def describe_analogs(store, chosen: pd.DataFrame, region, kinds=None) -> pd.DataFrame:
    """The analogs table of a result (see :attr:`analogs.results.FindResult.analogs`)
    from the selection's ``rank``, ``time``, ``distance`` and ``row``."""
    days = pd.DatetimeIndex(chosen["time"]).normalize()
    rows = chosen["row"].to_numpy()
    counts = daily_counts(store, region, kinds).iloc[rows]
    kind_columns = [c for c in counts.columns if c != "total"]
    regimes = [regime_of_day(store, int(r)) for r in rows]
    table = pd.DataFrame({
        "rank": chosen["rank"].to_numpy(),
        "date": [str(d.date()) for d in days],
        "distance": chosen["distance"].to_numpy(),
        "regime": [r["regime"] for r in regimes],
        "regime_confidence": [r["regime_confidence"] for r in regimes],
        EVENTS_TOTAL: counts["total"].to_numpy(dtype=int),
    })
    for kind in kind_columns:
        table[EVENTS_PREFIX + kind] = counts[kind].to_numpy(dtype=int)
    table["row"] = rows
    return table


def outcome_summary(store, analogs, target_time, window, region, weights, confidence,
                    kinds=None):
    """:class:`analogs.results.OutcomeSummary` of the analog days beside the season
    window's climatology, with the cyclone quadrants of the tropical analogs and the
    stored skill."""
    counts = daily_counts(store, region, kinds)
    analog_counts = counts.iloc[analogs["row"].to_numpy()]
    if target_time is not None and window is not None:
        season = candidate_ids(store.times, target_time, window=window, exclude=None)
    else:
        season = np.arange(len(store.times))
    weight_values = None
    if weights != "equal" and len(analogs):
        weight_values = analog_weights(analogs["distance"].to_numpy(), scheme=weights)
    summary = summarize_outcomes(analog_counts, counts.iloc[season], weights=weight_values,
                                 confidence=confidence)
    # Reports around the cyclone of the analogs tagged tropical (the cyclone days that
    # matter for the region); skipped, at no cost, when there are none.
    tropical = analogs.loc[analogs["regime"] == "tropical", "row"].to_numpy()
    composite = cyclone_composite(store, tropical) if tropical.size else None
    return summary.replace(has_events=store.events is not None, cyclone_quadrants=composite,
                           skill=store.skill_for(target_time))


def outcome_maps(store, result: FindResult) -> xr.Dataset:
    """Neighbourhood probability (40 km) and practically-perfect report density of the
    analog days of ``result`` on the store grid
    (:func:`analogs.stages.outcomes.outcome_maps`)."""
    if store.events is None:
        raise AnalogsInputError(f"store {store.path} has no events table: maps need one")
    lat, lon = store.grid
    days = pd.DatetimeIndex(pd.to_datetime(result.analogs["date"]))
    maps = outcome_stage.outcome_maps(store.events, days, lat, lon)
    maps.attrs.update({"target": str(result.target["date"]),
                       "n_analogs": int(len(days)), "source": f"analogs store {store.path}"})
    return maps


def cyclone_centres(store, rows=None) -> pd.DataFrame:
    """Tropical-cyclone centres found by the regime diagnostics (day, lat, lon) on the
    archive days of ``rows`` (default all)."""
    tags = store.tags
    if tags is None or "tc_lat" not in tags:
        return pd.DataFrame(columns=["day", "lat", "lon"])
    rows = np.arange(len(tags)) if rows is None else np.asarray(rows, dtype=int)
    lat = tags["tc_lat"].to_numpy()[rows]
    present = ~np.isnan(lat)
    return pd.DataFrame({"day": tags.index[rows][present], "lat": lat[present],
                         "lon": tags["tc_lon"].to_numpy()[rows][present]})


def cyclone_composite(store, rows=None, *, frame="earth") -> pd.DataFrame | None:
    """Events around tropical-cyclone centres on the archive days of ``rows`` (default
    all) by quadrant and distance (:func:`analogs.stages.outcomes.cyclone_relative_composite`);
    None when no day has a cyclone or the store has no events."""
    centres = cyclone_centres(store, rows)
    if store.events is None or centres.empty:
        return None
    events = store.events[store.events["day"].isin(centres["day"])]
    return cyclone_relative_composite(events, centres, frame=frame)


# ---------------------------------------------------------------------- report

def day_fields(store, rows) -> xr.Dataset:
    """Full fields of archive ``rows`` as the store can give them, ``(analog, lat, lon)``
    with a ``time`` coordinate along ``analog``: the daily climatology of those days
    (one evaluation) plus their anomalies reconstructed from the kept EOFs (one batch).
    The store keeps PCs, not the archive's fields, so detail beyond the kept modes is
    missing. Units and names are the store's (``z500`` in gpm, ...)."""
    rows = np.atleast_1d(np.asarray(rows, dtype=int))
    times = store.times[rows]
    climate = store.climatology.predict(times)[store.fields]
    anomaly = store.eof.reconstruct(store.pcs.isel(time=rows))[store.fields]
    lat, lon = store.grid
    fields = xr.Dataset(coords={"time": ("analog", times.values), "lat": lat, "lon": lon})
    for name in store.fields:
        values = (climate[name].transpose("time", "lat", "lon").values
                  + anomaly[name].transpose("time", "lat", "lon").values)
        attrs = dict(anomaly[name].attrs)
        attrs["long_name"] = attrs.get("long_name", name).removesuffix(" anomaly")
        fields[name] = xr.DataArray(values, dims=("analog", "lat", "lon"), attrs=attrs)
    return fields


def report_figures(store, result: FindResult, *, maps=None, hindcast=None,
                   n_panel=PANEL_ANALOGS) -> list[tuple[str, bytes]]:
    """Figures of one query, as (caption, PNG bytes) for
    :func:`analogs.presentation.report.find_html`.

    Everything is gathered once: the target's fields (``result.target_fields`` for a
    field target; for a date target its store reconstruction), the analog days' fields
    (:func:`day_fields`: one climatology evaluation and one EOF reconstruction for the
    target day and all analog days together), their mean, the events of the days drawn
    and the outcome maps (``maps`` when already computed, e.g. for ``--maps``).
    ``hindcast``: optional DataFrame of :func:`analogs.stages.hindcast.leave_one_year_out`
    for the reliability and ROC figures.
    """
    from analogs.presentation import figures as draw
    region = result.region if result.region is not None else store.region
    when = result.target.get("date") or "the forecast field"
    analogs = result.analogs
    analog_rows = analogs["row"].to_numpy(dtype=int)
    target, source = None, None
    if result.target_fields is not None:
        target = result.target_fields.squeeze("time", drop=True) \
            if "time" in result.target_fields.dims else result.target_fields
        source = "the given field, on the store grid"
    elif result.target.get("date"):
        analog_rows = np.concatenate([[day_row(store, result.target["date"])], analog_rows])
        source = f"climatology + anomaly on {store.eof.n_modes_} kept EOFs"
    gathered = day_fields(store, analog_rows) if analog_rows.size else None
    if target is None and source is not None:
        target, gathered = gathered.isel(analog=0), gathered.isel(analog=slice(1, None))
    figures = []
    if target is not None:
        figures.append((f"Target {when}: 500 hPa height and moisture ({source})",
                        draw.target_map(target, region=region, when=f"Target {when}",
                                        source=source)))
    if len(analogs):
        gathered = gathered.assign_coords(analog=analogs["rank"].to_numpy())
        shown = analogs.head(n_panel)
        days = pd.to_datetime(shown["date"])
        events = None
        if store.events is not None:
            events = store.events[store.events["day"].isin(days)]
        figures.append(("The closest past days and their events",
                        draw.analog_panel(gathered.isel(analog=slice(0, len(shown))), shown,
                                          events, region=region,
                                          title=f"Closest past days to {when}: 500 hPa height "
                                                "(climatology + EOF reconstruction, every "
                                                f"{draw.HEIGHT_INTERVAL_GPM:.0f} gpm)")))
        if target is not None:
            mean = gathered.mean("analog", keep_attrs=True).drop_vars("time", errors="ignore")
            mean.attrs["n_days"] = int(len(analogs))
            figures.append(("Mean of the analog days and its difference from the target",
                            draw.composite_difference(
                                mean, target, region=region,
                                title=f"Analog days and target {when} (analogs: climatology "
                                      f"+ anomaly on {store.eof.n_modes_} kept EOFs; target: "
                                      f"{source})")))
        if store.events is not None:
            maps = outcome_maps(store, result) if maps is None else maps
            figures.append(("Where the analog days had events nearby",
                            draw.probability_map(maps, region=region, when=when)))
    if hindcast is not None:
        from analogs.stages.scores import reliability_table, roc_curve_points
        p = hindcast["forecast"].to_numpy()
        o = hindcast["observed"].to_numpy()
        figures.append(("Reliability of past analog guidance",
                        draw.reliability_diagram(reliability_table(p, o))))
        if 0 < o.sum() < o.size:
            figures.append(("ROC of past analog guidance",
                            draw.roc_diagram(*roc_curve_points(p, o)[:2])))
    return [(caption, draw.figure_png(figure)) for caption, figure in figures]
