"""Workflow: one query of a loaded store, and the arrays its report draws.

>>> from analogs.api import AnalogStore                          # doctest: +SKIP
>>> from analogs.workflows.find import find, report_figures
>>> store = AnalogStore.load("store")
>>> result = find(store, field="forecast.nc", top=20)     # same as store.find(...)
>>> figures = report_figures(store, result)                # [(caption, SVG text, alt text), ...]

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
events of those days, the outcome maps) and hands arrays to the pure SVG map functions of
:mod:`analogs.presentation.svg_maps`.

Derived arrays of a store version (daily event counts per region, sequence vectors and
their indexes, regime arrays) are computed once per loaded store and kept beside it; the
daily counts of the store's own region are kept in the store (``counts.parquet``,
:func:`stored_daily_counts`) and read back.
"""

from __future__ import annotations

import contextlib
import inspect
import json
import os
import time
import warnings
import weakref
from dataclasses import dataclass
from dataclasses import replace as dataclasses_replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs._validation import choice_expected, fail, renamed_errors
from analogs import _forked
from analogs.errors import AnalogsInputError
from analogs.geo import nearest_index
from analogs.parameters import P
from analogs.results import EVENTS_PREFIX, EVENTS_TOTAL, FindResult, ValidTimesResult
from analogs.stages.index import AnalogIndex
from analogs.stages.outcomes import (
    Region,
    analog_weights,
    binomial_interval,
    cyclone_relative_composite,
    daily_event_counts,
    summarize_outcomes,
)
from analogs.stages import outcomes as outcome_stage
from analogs.stages.selection import (SEQUENCE_DECAY, candidate_ids, find_analogs,
                                      find_analogs_many)
from analogs.stages.selection import sequence_vectors as selection_sequence_vectors

if TYPE_CHECKING:  # xarray is imported by the field targets and the report only
    import xarray as xr

# The readers (sources) and the regime diagnostics (regimes) are imported inside the
# functions that use them: a query on an archive date needs neither, and the start-up of
# `analogs find` is part of a forecaster's wait.

#: How the analogs may be weighted in the outcome statistics.
WEIGHT_SCHEMES = P.weights.choices
#: Largest share of the store grid a field target may leave without values (outside
#: its file, or missing in it); up to it the target is projected by least squares on
#: the covered points (Everson & Sirovich 1995), above it the target is refused.
MAX_UNCOVERED_FRACTION = 0.10
#: A first analog closer than this fraction of the typical length of a day's vector
#: (the square root of the sum of the kept eigenvalues) is a near copy of the target:
#: a regridded copy of an archive day lands around 1e-5 of it on the demo store, the
#: closest day of another year above 0.2 (measured here).
NEAR_DUPLICATE_FRACTION = 0.02

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
         sequence=P.sequence.default, kinds=None, metric=P.metric.api_default,
         skip_skill_hindcast=P.skip_skill_hindcast.api_default) -> FindResult | ValidTimesResult:
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
    ``metric`` is the analog search's distance (``P.metric``; default the store's saved
    query default, else ``P.metric.default``): ``"event_weighted"`` searches the PCs
    transformed by :func:`event_weighted_transform` for the query's region and kinds
    (fitted on the store's days, kept in the store; with ``sequence``, each day of the
    sequence vector by the same map); a store without an events table has nothing to
    weight by, and its default is ``"plain"``.
    The outcomes quote the cross-validated skill of what the query forecasts (its region,
    kinds and settings: :func:`analogs.workflows.skill.skill_for`), measured now and kept
    in the store when no measurement is there, unless ``skip_skill_hindcast`` (the query
    then writes nothing to the store: an event-weighted map it fits is not kept either).

    A field target is opened once and regridded to the store grid once; those fields
    serve the projection, the regime diagnostics and (``FindResult.target_fields``) the
    report. Returns a :class:`analogs.results.FindResult`.

    Field targets (:func:`find_field`) may also be:

    - an ensemble (a member dimension, :func:`analogs.stages.sources.member_dimension`):
      each member gets its regime, analogs and outcomes (``FindResult.members``), the
      outcomes are pooled over all members' analogs, and ``target.regime_probabilities``
      gives the fraction of members in each regime (:func:`ensemble_result`);
    - several valid times: ``time="all"`` or a range ``"START/END"`` gives a
      :class:`analogs.results.ValidTimesResult`, one result per valid time, from one
      opening and one regridding of the file;
    - partly outside the store grid: up to ``MAX_UNCOVERED_FRACTION`` of the grid points
      without a value, the target is projected on the covered points by least squares
      (:meth:`analogs.stages.eof.MultivariateEOF.project_gappy`), with a warning.

    A field that matches an archive day almost exactly (its own day, when valid inside
    the archive) is answered with a warning offering to exclude it
    (:func:`warn_near_duplicate`).
    """
    owner = "find"
    if (date is None) == (field is None):
        raise AnalogsInputError(f"{owner} needs exactly one target, date (YYYY-MM-DD) or "
                                f"field (a file or Dataset). Got {'both' if date is not None else 'neither'}.")
    query = _checked_query(store, owner, top=top, window=window, exclude=exclude,
                           separation=separation, region=region, regime=regime,
                           weights=weights, confidence=confidence, sequence=sequence,
                           kinds=kinds, metric=metric, skip_skill_hindcast=skip_skill_hindcast)
    if date is not None:
        return _day_result(store, query.for_date(), day_row(store, date))
    return find_field(store, field, time, query)


def _checked_query(store, owner, *, top, window, exclude, separation, region, regime,
                   weights, confidence, sequence, kinds, metric, skip_skill_hindcast) -> _Query:
    """The options of :func:`find` but its targets, checked, as a :class:`_Query`."""
    top = store.query_defaults.get("top", P.top.default) if top is None else top
    top, window, exclude = (P.top.check(top, owner), P.window.check(window, owner),
                            P.exclude.check(exclude, owner))
    separation, sequence = P.separation.check(separation, owner), P.sequence.check(sequence, owner)
    weights, confidence = P.weights.check(weights, owner), P.confidence.check(confidence, owner)
    if metric is None:  # nothing to weight by without reports: the simple distance
        metric = store.query_defaults.get(
            "metric", P.metric.default if store.events is not None else "plain")
    kinds, metric = P.kinds.check(kinds, owner), P.metric.check(metric, owner)
    if metric != "plain" and store.events is None:
        raise AnalogsInputError(f"find: metric {metric} is fitted on the store's reports and "
                                f"store {store.path} has no events table; use metric plain")
    with renamed_errors(owner, "region", "kinds"):
        region = resolve_region(store, region)
        if kinds is not None and store.events is not None:
            daily_counts(store, region, kinds)  # refuses unknown kinds early; kept for later
    return _Query.resolve(store, top=top, window=window, exclude=exclude,
                          separation=separation, region=region, regime=regime,
                          weights=weights, confidence=confidence, sequence=sequence,
                          kinds=kinds, metric=metric,
                          skip_skill_hindcast=bool(skip_skill_hindcast))


def _day_vector(store, query: _Query, row: int) -> np.ndarray:
    """The vector searched for archive row ``row`` as a date target; a sequence query
    is refused on a day whose preceding days are not in the archive (nor hindcast)."""
    if query.sequence:
        vectors, complete = sequence_vectors(store, query.sequence)
        if not complete[row]:
            fail("sequence", "find", f"at most the number of days before "
                 f"{store.days[row].date()} that the archive holds", query.sequence)
        return vectors[row]
    return store.pc_values[row, :query.n_modes]


def _day_result(store, query: _Query, row: int, chosen=None) -> FindResult:
    """The answer for archive row ``row`` as a date target; ``chosen``: its selection
    when already made (:func:`find_many` ranks its dates in batches)."""
    target = {"date": str(store.days[row].date()), **regime_of_day(store, row),
              **diagnostics_of_day(store, row)}
    analogs, outcomes = query.answer(store, _day_vector(store, query, row), store.times[row],
                                     chosen=chosen)
    return FindResult(target=target, analogs=analogs, outcomes=outcomes,
                      settings=query.settings(store), region=query.region)


def find_many(store, dates, **options) -> list[FindResult]:
    """:func:`find` for many archive dates in one process: the store is loaded once and
    everything a query derives from it (index, daily counts, regime arrays, the rows a
    regime or sequence allows) is made once, and the dates' analogs are ranked in
    batched searches of the index
    (:func:`analogs.stages.selection.find_analogs_many`), so each date costs what the
    query itself costs. Each answer is the one ``find(store, date=..., **options)`` gives.

    ``dates``: archive days (YYYY-MM-DD text, Timestamps) or the path (``str`` or
    ``Path``) of a text file with one day a line (:func:`read_dates`). ``options`` are
    those of :func:`find` except the targets (``date``, ``field``, ``time``). A date that
    cannot be answered is refused with its place (file and line, or list position).
    """
    for target in ("date", "field", "time"):
        if target in options:
            raise AnalogsInputError(f"find_many takes its targets from 'dates'; "
                                    f"'{target}' is not one of its options")
    unknown = sorted(set(options) - set(_FIND_OPTIONS))
    if unknown:
        raise TypeError(f"find_many() got an unexpected keyword argument {unknown[0]!r}")
    if isinstance(dates, (str, os.PathLike)):
        dates = read_dates(dates)
    else:
        dates = [(f"dates[{position}]", date) for position, date in enumerate(dates)]
    query = _checked_query(store, "find", **{**_FIND_OPTIONS, **options}).for_date()
    rows, vectors, refused = [], [], None
    for where, date in dates:
        try:
            row = day_row(store, date)
            vectors.append(_day_vector(store, query, row))
        except AnalogsInputError as error:  # the dates before it are answered first
            refused = _date_refused(where, date, error)
            break
        rows.append(row)
    vectors = np.array(vectors)
    if rows:
        vectors = query.mapped(vectors)
    rankings = find_analogs_many(
        query.index, store.times, vectors, store.times[rows], top=query.top, window=query.window, exclude=query.exclude,
        separation=query.separation, restrict=query.restrict) if rows else []
    results = []
    for (where, date), row, chosen in zip(dates, rows, rankings):
        try:
            results.append(_day_result(store, query, row, chosen))
        except AnalogsInputError as error:
            raise _date_refused(where, date, error) from None
    if refused is not None:
        raise refused from None
    return results


def _date_refused(where, date, error) -> AnalogsInputError:
    if not where.startswith("dates["):  # a file line: its name and line first
        return AnalogsInputError(f"{where}: {' '.join(str(error).split())}")
    return AnalogsInputError(f"{where} ({date!r}): {error}")


#: find's options but its targets, with their defaults (from its signature, where
#: they are defined once), for find_many.
_FIND_OPTIONS = {name: parameter.default
                 for name, parameter in inspect.signature(find).parameters.items()
                 if parameter.kind is parameter.KEYWORD_ONLY
                 and name not in ("date", "field", "time")}


def read_dates(path) -> list[tuple[str, str]]:
    """The archive days listed in the text file ``path``, one a line (YYYY-MM-DD, or a
    time whose UTC day is meant); blank lines and lines starting with ``#`` are skipped.
    Returns ``("FILE line N", text)`` pairs; a line that is not a date is refused with
    its file and line, and so is a file without any."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise AnalogsInputError(f"dates file {path} is not UTF-8 text with one date "
                                "(YYYY-MM-DD) a line") from None
    dates = []
    for number, line in enumerate(text.splitlines(), start=1):
        item = line.strip()
        if not item or item.startswith("#"):
            continue
        try:
            pd.Timestamp(item)
        except (TypeError, ValueError):
            raise AnalogsInputError(f"dates file {path} line {number}: expected a date "
                                    f"YYYY-MM-DD, got {item[:40]!r}") from None
        dates.append((f"dates file {path} line {number}", item))
    if not dates:
        raise AnalogsInputError(f"dates file {path} lists no date (one YYYY-MM-DD a line "
                                "expected)")
    return dates


@dataclass(frozen=True)
class _Query:
    """The checked settings of a query, and what they make of the store once for every
    target of one call (members, valid times): the index searched and the rows allowed."""

    top: int
    window: int
    exclude: int | None
    separation: int
    region: Region
    regime: str | None
    weights: str
    confidence: float
    sequence: int
    kinds: list | None
    metric: str
    skip_skill_hindcast: bool
    n_modes: int
    index: object
    restrict: np.ndarray | None
    transform: np.ndarray | None  # the event-weighted metric's map of the PCs, or None
    field_target: bool = False  # a --field query (its sequence comes from its file)

    @classmethod
    def resolve(cls, store, **settings) -> _Query:
        restrict, index = None, store.index
        if settings["regime"] is not None:
            restrict = regime_mask(store, settings["regime"])
        if settings["sequence"]:
            complete = sequence_vectors(store, settings["sequence"])[1]
            restrict = complete if restrict is None else restrict & complete
            index = _sequence_index(store, settings["sequence"])
        transform = None
        if settings["metric"] == "event_weighted":
            transform = event_weighted_transform(store, settings["region"], settings["kinds"],
                                                 keep=not settings["skip_skill_hindcast"])
            index = _weighted_index(store, transform, settings["sequence"])
        return cls(**settings, n_modes=store.n_query_modes, index=index, restrict=restrict,
                   transform=transform)

    def mapped(self, vectors) -> np.ndarray:
        """Query vectors (PCs, or sequence vectors) in the space this query searches."""
        if self.transform is None:
            return vectors
        from analogs.stages.predictor_weights import block_transform
        return vectors @ block_transform(self.transform, 1 + self.sequence)

    def with_exclude(self, exclude) -> _Query:
        return dataclasses_replace(self, exclude=exclude)

    def for_date(self) -> _Query:
        """The query of a date target: by default its own episode is excluded."""
        return self.with_exclude(P.exclude.default if self.exclude is None else self.exclude)

    def settings(self, store) -> dict:
        region = self.region
        return {"top": self.top, "window_days": self.window, "exclude_days": self.exclude,
                "sequence_days": self.sequence, "kinds": self.kinds,
                "separation_days": self.separation, "regime": self.regime,
                "region": {**region.to_dict(), "label": region.label()},
                "weights": self.weights, "n_modes": self.n_modes, "store": str(store.path),
                "metric": self.metric}

    def skill(self, store, target_time) -> dict | None:
        """The cross-validated skill of what this query forecasts (its region, kinds and
        hindcast settings; :func:`analogs.workflows.skill.skill_for`)."""
        from analogs.workflows.skill import skill_settings
        settings = skill_settings(store, top=self.top, window=self.window,
                                  separation=self.separation, n_modes=self.n_modes,
                                  regime=self.regime, sequence=self.sequence,
                                  weights=self.weights, exclude=self.exclude,
                                  metric=self.metric)
        skill = store.skill_for(target_time, region=self.region, kinds=self.kinds,
                                settings=settings, measure=not self.skip_skill_hindcast)
        if self.field_target and self.sequence:
            skill = with_caveat(skill, (
                f"the field's {self.sequence} preceding days come from its file, while the "
                "hindcast matched archive days with the archive's own preceding days: a "
                "sequence of forecast fields is not hindcast"))
        return skill

    def answer(self, store, vector, target_time, chosen=None) -> tuple[pd.DataFrame, object]:
        """The analogs table and the outcome summary of one target vector; ``chosen``: its
        selection (:func:`~analogs.stages.selection.find_analogs`) when already made."""
        if chosen is None:
            vector = np.asarray(vector, dtype=float)
            if not self.sequence:
                vector = vector[:self.n_modes]
            if self.transform is not None:
                vector = self.mapped(vector)
            chosen = find_analogs(self.index, store.times, vector, target_time=target_time,
                                  top=self.top, window=self.window, exclude=self.exclude,
                                  separation=self.separation, restrict=self.restrict)
        if chosen.empty:
            raise AnalogsInputError(
                "no archive day is allowed as an analog of this target "
                f"(season window +/-{self.window} d, exclusion {self.exclude} d"
                + (f", regime {self.regime}" if self.regime else "")
                + (f", sequence of {self.sequence} preceding days" if self.sequence else "")
                + "); widen the season window or drop the regime")
        analogs = describe_analogs(store, chosen, self.region, self.kinds)
        outcomes = outcome_summary(store, analogs, target_time, self.window, self.region,
                                   self.weights, self.confidence, self.kinds,
                                   skill=self.skill(store, target_time))
        return analogs, outcomes


POOLED_NOT_VERIFIED = ("the probability pooled over the ensemble's members (skill measured "
                       "for single analyses; the pooled ensemble probability is not "
                       "verified)")


def with_caveat(skill: dict | None, text: str) -> dict | None:
    """``skill`` with ``text`` added to what its measurement does not cover
    (``not_measured``, which the skill line prints after it), or None."""
    if skill is None:
        return None
    known = skill.get("not_measured")
    return {**skill, "not_measured": f"{known}; {text}" if known else text}


# ---------------------------------------------------------------------- targets

def day_row(store, date) -> int:
    """Row of the archive day ``date`` (YYYY-MM-DD) in ``store``."""
    try:
        day = pd.Timestamp(date)
    except (TypeError, ValueError):
        fail("date", "find", "a date YYYY-MM-DD", date)
    if day.tz is not None:  # 2002-06-14T12:00Z: that UTC day (issue 13)
        day = day.tz_convert(None)
    day = day.normalize()
    rows = np.flatnonzero(store.days == day)
    if rows.size == 0:
        fail("date", "find", f"a day of the archive of store {store.path} "
             f"({store.days[0].date()} to {store.days[-1].date()}), not outside the archive "
             "or missing from it", str(day.date()))
    return int(rows[0])


def open_field(field, time=None) -> xr.Dataset:
    """A field target as a canonical Dataset on its own grid: ``field`` is a path
    (opened with :func:`analogs.stages.sources.open_target`, keeping an ensemble's
    members) or a Dataset. Dims ``(time, lat, lon)``, with ``member`` first for an
    ensemble; ``time`` of length one unless ``time`` asks for several
    (:func:`analogs.stages.sources.several_times`)."""
    import xarray as xr
    from analogs.stages.sources import member_dimension, open_target, select_valid_times
    if isinstance(field, xr.Dataset):
        dataset = field
        member = member_dimension(dataset)
        if member is not None and member != "member":
            dataset = dataset.rename({member: "member"})
        if "time" in dataset.dims and (time is not None or dataset.sizes["time"] > 1):
            dataset = select_valid_times(dataset, time, "the target Dataset")
    else:
        dataset = open_target(field, time=time, members=True)
    if "time" not in dataset.dims or pd.isna(dataset["time"].values).any():
        raise AnalogsInputError(
            f"the target field {field if not isinstance(field, xr.Dataset) else ''} has no "
            "valid time; its calendar day is needed for the climatology and the season "
            "window: write the valid time into the file")
    return dataset


def target_fields(store, field, time=None) -> xr.Dataset:
    """A field target's store fields, opened once and regridded once to the store grid
    (:func:`open_field`, :func:`on_store_grid`)."""
    return on_store_grid(store, open_field(field, time))


def on_store_grid(store, dataset: xr.Dataset) -> xr.Dataset:
    """The store's fields of a canonical Dataset, bilinearly regridded to the store grid,
    with the coverage checked (:func:`check_coverage`): store grid points outside the
    field are NaN, up to ``MAX_UNCOVERED_FRACTION`` of them (with a warning)."""
    from analogs.stages.sources import regrid_to
    missing = [name for name in store.fields if name not in dataset.data_vars]
    if missing:
        raise AnalogsInputError(
            f"the target field lacks {', '.join(missing)}: the store was built from "
            f"{', '.join(store.fields)}")
    lat, lon = store.grid
    fields = regrid_to(dataset[store.fields], lat, lon, partial=True)
    check_coverage(store, fields, dataset)
    return fields


def days_on_store_grid(store, days: xr.Dataset) -> xr.Dataset:
    """Archive days (canonical, ``(time, lat, lon)``) brought to the store grid as a
    field target is (for ``update``): unchanged when already on it; else regridded and
    checked by :func:`on_store_grid` (bilinear, at most ``MAX_UNCOVERED_FRACTION``
    uncovered, with a warning), and any uncovered points filled with the daily
    climatology plus the EOF reconstruction of the days' gappy PCs. The filled days
    project exactly onto those PCs (the EOFs are orthonormal, so the projection of the
    reconstruction is the PCs themselves) and their regime diagnostics see no NaN."""
    import xarray as xr
    lat, lon = store.grid
    if (days.sizes.get("lat") == lat.size and days.sizes.get("lon") == lon.size
            and np.allclose(days["lat"].values, lat) and np.allclose(days["lon"].values, lon)):
        return days
    if set(days.data_vars) - set(store.fields):
        return days  # other fields: the caller's field check refuses them
    fields = on_store_grid(store, days)
    if not bool(uncovered_fraction(fields).max() > 0):
        return fields
    pcs = project_samples(store, fields)
    times = fields["time"].values
    climate = store.climatology.predict(times)
    anomaly = store.eof.reconstruct(xr.DataArray(
        pcs, dims=("time", "mode"),
        coords={"time": times, "mode": np.arange(1, pcs.shape[1] + 1)}))
    for name in store.fields:
        values = fields[name].transpose("time", "lat", "lon").values
        estimate = climate[name].values + anomaly[name].transpose("time", "lat", "lon").values
        fields[name] = (("time", "lat", "lon"), np.where(np.isnan(values), estimate, values),
                        fields[name].attrs)
    return fields


def uncovered_fraction(fields: xr.Dataset) -> xr.DataArray:
    """Share of the grid points without a value (NaN in any field) of each time (and
    member) of fields on the store grid: a fraction in [0, 1]."""
    gaps = None
    for name in fields.data_vars:
        missing = fields[name].isnull()
        gaps = missing if gaps is None else gaps | missing
    return gaps.mean(("lat", "lon"))


def check_coverage(store, fields: xr.Dataset, source: xr.Dataset | None = None) -> float:
    """The largest uncovered share of ``fields`` (on the store grid) over its times and
    members; refused above ``MAX_UNCOVERED_FRACTION``, with a warning above 0.

    ``source``: the fields before regridding, whose extent the refusal names.
    """
    worst = float(uncovered_fraction(fields).max())
    if worst == 0.0:
        return worst
    name = fields.attrs.get("source_files", "the target field")
    lat, lon = store.grid
    by_field = ", ".join(
        f"{variable} {100 * float(fields[variable].isnull().mean(('lat', 'lon')).max()):.1f} %"
        for variable in fields.data_vars)
    if worst > MAX_UNCOVERED_FRACTION:
        extent = ""
        if source is not None and "lat" in source.coords and "lon" in source.coords:
            extent = (f"; it covers lat {float(source['lat'].min()):g} to "
                      f"{float(source['lat'].max()):g}, lon {float(source['lon'].min()):g} to "
                      f"{float(source['lon'].max()):g}")
        raise AnalogsInputError(
            f"{name}: the field leaves {100 * worst:.1f} % of the store grid uncovered (no "
            f"value there: missing or outside the file; by field {by_field}), more than the {100 * MAX_UNCOVERED_FRACTION:g} % a projection "
            f"on the covered points allows{extent}; the store needs lat {lat.min():g} to "
            f"{lat.max():g}, lon {lon.min():g} to {lon.max():g}")
    warnings.warn(
        f"{name}: {100 * worst:.1f} % of the store grid has no value in the field (outside "
        f"it or missing; by field {by_field}); the target is projected on the covered points only (least-squares "
        "fit of the EOFs, Everson & Sirovich 1995) and its regime diagnostics use the EOF "
        "reconstruction there", UserWarning, stacklevel=3)
    return worst


def project_samples(store, fields: xr.Dataset) -> np.ndarray:
    """PC vectors of fields already on the store grid (:func:`on_store_grid`):
    anomalies from the daily climatology, projected on the EOFs; grid points without a
    value are left out by the least-squares (gappy) projection
    (:meth:`analogs.stages.eof.MultivariateEOF.project_gappy`). Shape: the fields'
    ``(member, time)`` dims (those present) followed by ``mode``."""
    import xarray as xr
    anomalies = store.climatology.transform(fields[store.fields])
    gappy = bool(uncovered_fraction(fields).max() > 0)
    if "member" not in anomalies.dims:
        pcs = store.eof.transform(anomalies, gappy=gappy) if gappy \
            else store.eof.transform(anomalies)
        return np.asarray(pcs.values, dtype=float)
    anomalies = anomalies.transpose("member", "time", "lat", "lon")
    n_member, n_time = anomalies.sizes["member"], anomalies.sizes["time"]
    stacked = xr.Dataset(
        {name: (("time", "lat", "lon"),
                anomalies[name].values.reshape(n_member * n_time, *anomalies[name].shape[2:]))
         for name in store.fields},
        coords={"time": np.arange(n_member * n_time), "lat": anomalies["lat"].values,
                "lon": anomalies["lon"].values})
    pcs = store.eof.transform(stacked, gappy=gappy)
    return np.asarray(pcs.values, dtype=float).reshape(n_member, n_time, -1)


def project(store, fields: xr.Dataset) -> np.ndarray:
    """PC vector of one time of fields already on the store grid (:func:`on_store_grid`):
    anomalies from the daily climatology, projected on the EOFs (gappy where needed)."""
    return project_samples(store, fields).reshape(-1)


def filled_for_diagnostics(store, fields: xr.Dataset, pcs, uncovered=None) -> xr.Dataset:
    """One time of fields on the store grid with the points that have no value filled
    by the daily climatology plus the EOF reconstruction of ``pcs`` (its gappy PCs), so
    the regime diagnostics (spherical gradients) see no NaN; unchanged when complete
    (``uncovered``: its uncovered share when already known)."""
    import xarray as xr
    if uncovered is None:
        uncovered = float(uncovered_fraction(fields).max())
    if not uncovered > 0:
        return fields
    times = fields["time"].values
    climate = store.climatology.predict(times)
    modes = np.arange(1, len(pcs) + 1)
    anomaly = store.eof.reconstruct(xr.DataArray(np.atleast_2d(pcs), dims=("time", "mode"),
                                                 coords={"time": times, "mode": modes}))
    filled = fields.copy()
    for name in store.fields:
        estimate = (climate[name].values + anomaly[name].transpose("time", "lat", "lon").values)
        values = fields[name].transpose("time", "lat", "lon").values
        filled[name] = (("time", "lat", "lon"), np.where(np.isnan(values), estimate, values),
                        fields[name].attrs)
    return filled


def regime_of_fields(store, fields: xr.Dataset, region: Region, *, all_rows=False):
    """Regime of one time of fields on the store grid, from the physical diagnostics
    (:func:`analogs.stages.regimes.tag_days`) over ``region``; with ``all_rows``, a list
    with one such block per time of ``fields`` (see :func:`member_regimes`)."""
    from analogs.stages.regimes import tag_days
    from analogs.workflows.build import diagnostic_region
    if "time" not in fields.dims:
        fields = fields.expand_dims(time=[pd.Timestamp("2000-01-01")])
    # No region: the synoptic box at the centre of the domain (tag_days says so).
    box = None if region.kind == "whole" else diagnostic_region(region, fields)
    tags = tag_days(fields, box, progress=False)
    # every row (15b: the members of an ensemble are tagged in one call, member_regimes)
    blocks = [{"regime": str(row["regime"]), "regime_confidence": float(row["confidence"]),
               "reason": str(row.get("reason", "")), **diagnostics_block(row, tags.attrs)}
              for _, row in tags.iterrows()]
    return blocks if all_rows else blocks[0]


#: Columns of a tags table that are labels, not physical diagnostics.
_LABEL_COLUMNS = ("date", "regime", "confidence", "reason", "kmeans_regime",
                  "learned_regime", "learned_confidence")


def diagnostics_block(row: pd.Series, attrs: dict) -> dict:
    """The target's ``diagnostics`` (every diagnostic of its tags row, keyed as in the tag
    file, each ``{"value": number or None, "units": str}``) and ``diagnostic_region``
    (the box, whether it was the default, in words) for ``analogs find --json``; units and
    region as in the tag file's metadata (:func:`analogs.stages.regimes.tag_metadata`)."""
    from analogs.stages.regimes import tag_metadata
    names = [name for name in row.index if name not in _LABEL_COLUMNS]
    metadata = tag_metadata(attrs, names)
    diagnostics = {}
    for name in names:
        value = row[name]
        if isinstance(value, (bool, np.bool_)):
            value = bool(value)
        else:
            try:
                value = float(value)
            except (TypeError, ValueError):
                continue
            value = value if np.isfinite(value) else None
        diagnostics[str(name)] = {"value": value, "units": metadata["units"][name]}
    return {"diagnostics": diagnostics, "diagnostic_region": metadata["diagnostic_region"]}


def diagnostics_of_day(store, row: int) -> dict:
    """:func:`diagnostics_block` of archive row ``row`` from the store's tags (empty
    when the store has none)."""
    if store.tags is None:
        return {}
    return diagnostics_block(store.tags.iloc[row], store.tag_attrs)


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


# ------------------------------------------------- field targets: members, valid times

def find_field(store, field, time, query: _Query):
    """The answer for a field target (:func:`find` with ``field``).

    The file is opened once and regridded once for all its members and the valid times
    asked for; every (member, time) is projected in one batch. One valid time gives a
    :class:`FindResult` (an ensemble result when the file has members, see
    :func:`ensemble_result`); ``time="all"`` or a range ``"START/END"`` gives a
    :class:`ValidTimesResult` with one such result per valid time.
    """
    import xarray as xr
    from analogs.stages.sources import several_times
    query = dataclasses_replace(query, field_target=True)
    with renamed_errors("find", "time"):
        opened = open_field(field, time)
    fields = on_store_grid(store, opened)
    uncovered = uncovered_fraction(fields)
    vectors = project_samples(store, fields)
    ensemble = "member" in fields.dims
    times = pd.DatetimeIndex(fields["time"].values)
    if query.sequence:  # preceding days already opened are taken from the batch
        batch = {t: (vectors[:, i] if ensemble else vectors[i]) for i, t in enumerate(times)}
    several = several_times(time)
    results = []
    for i, valid in enumerate(times):
        one = fields.isel(time=[i])
        vector = vectors[:, i] if ensemble else vectors[i]
        full = vector
        if query.sequence:
            vector = _field_sequence_vector(store, field, valid, vector, query.sequence, batch)
        gaps = uncovered.isel(time=i).values
        if ensemble:
            result = ensemble_result(store, one, full, vector, gaps, valid, query)
        else:
            target = {"date": str(valid.date()),
                      **regime_of_fields(store, filled_for_diagnostics(store, one, full, gaps),
                                         query.region)}
            if gaps > 0:
                target["uncovered_fraction"] = float(gaps)
            analogs, outcomes = query.answer(store, vector, valid)
            warn_near_duplicate(store, analogs, valid, query)
            result = FindResult(target=target, analogs=analogs, outcomes=outcomes,
                                settings=query.settings(store), region=query.region,
                                target_fields=one)
        if several:
            result.target["valid_time"] = f"{valid:%Y-%m-%dT%H:%M:%S}Z"
        results.append(result)
    if not several:
        return results[0]
    settings = {**query.settings(store), "field": str(field) if not isinstance(
        field, xr.Dataset) else "a Dataset", "time": time, "n_valid_times": len(results)}
    return ValidTimesResult(results=tuple(results), settings=settings)


def ensemble_result(store, fields: xr.Dataset, pcs, vectors, uncovered, valid,
                    query: _Query) -> FindResult:
    """The answer for one valid time of an ensemble target.

    ``fields``: ``(member, time=1, lat, lon)`` on the store grid; ``pcs``: each member's
    PCs ``(member, mode)``; ``vectors``: the query vectors (PCs, or sequence vectors);
    ``uncovered``: each member's uncovered share. Every member gets its own regime,
    analogs and outcomes (a :class:`FindResult` in ``members``). The outcomes are pooled
    over all members' analogs (each member's analogs count once, so a day chosen by
    several members counts as often; ``n_analogs`` = members x top), with the spread
    across members in ``member_spread``; their skill line is the single analyses'
    hindcast and says so (``POOLED_NOT_VERIFIED``). ``target.regime_probabilities`` gives the
    fraction of members in each regime; ``target.regime`` is the most frequent one
    (ties: the order of ``REGIME_LABELS``) with that fraction as ``regime_confidence``;
    ``target.ensemble_mean`` is the regime of the members' mean field.
    """
    from analogs.parameters import REGIME_LABELS
    labels = fields["member"].values
    settings = query.settings(store)
    members, tables = [], []
    regimes = member_regimes(store, fields, pcs, query.region, uncovered)
    for m, label in enumerate(labels):
        member_label = label.item() if hasattr(label, "item") else label
        target = {"member": member_label, "date": str(valid.date()), **regimes[m]}
        if np.ndim(uncovered) and uncovered[m] > 0:
            target["uncovered_fraction"] = float(uncovered[m])
        analogs, outcomes = query.answer(store, vectors[m], valid)
        members.append(FindResult(target=target, analogs=analogs, outcomes=outcomes,
                                  settings=settings, region=query.region))
        tables.append(analogs.assign(member=[member_label] * len(analogs)))
    pooled = pd.concat(tables, ignore_index=True)
    warn_near_duplicate(store, pd.concat([t.head(1) for t in tables]), valid, query,
                        members=[t["member"].iloc[0] for t in tables])
    outcomes = outcome_summary(store, pooled, valid, query.window, query.region,
                               query.weights, query.confidence, query.kinds,
                               skill=with_caveat(query.skill(store, valid),
                                                 POOLED_NOT_VERIFIED))
    outcomes = outcomes.replace(member_spread=member_spread(members, pooled, query))
    shares = pd.Series([member.target["regime"] for member in members]).value_counts() \
        / len(members)
    order = {label: i for i, label in enumerate(REGIME_LABELS)}
    ranked = sorted(shares.index, key=lambda r: (-shares[r], order.get(r, len(order)), r))
    target = {"date": str(valid.date()), "regime": str(ranked[0]),
              "regime_confidence": float(shares[ranked[0]]),
              "reason": f"{round(shares[ranked[0]] * len(members))} of {len(members)} "
                        f"members are {ranked[0]}",
              "regime_probabilities": {str(r): float(shares[r]) for r in ranked},
              "n_members": len(members),
              "ensemble_mean": regimes[-1]}
    if np.max(uncovered) > 0:
        target["uncovered_fraction"] = float(np.max(uncovered))
    return FindResult(target=target, analogs=consensus_analogs(pooled), outcomes=outcomes,
                      settings=settings, region=query.region, target_fields=fields,
                      members=tuple(members))


def member_regimes(store, fields: xr.Dataset, pcs, region, uncovered=None) -> list[dict]:
    """:func:`regime_of_fields` of each member of one valid time (``fields``: ``(member,
    time=1, lat, lon)`` on the store grid; ``pcs``: their PCs), then of the members'
    mean field, tagged in one call: the samples go along ``time``, all at the valid
    time (nanoseconds apart, so the day and month the rules may use are the valid
    time's). Points without a value are filled first (:func:`filled_for_diagnostics`)."""
    import xarray as xr
    valid = fields["time"].values[0]
    n_member = fields.sizes["member"]
    gaps = [None] * n_member if uncovered is None else np.broadcast_to(uncovered, n_member)
    samples = [filled_for_diagnostics(store, fields.isel(member=m), pcs[m], gaps[m])
               for m in range(n_member)]
    mean = fields.mean("member", keep_attrs=True)
    complete = uncovered is not None and not np.max(uncovered) > 0
    samples.append(filled_for_diagnostics(store, mean, np.mean(pcs, axis=0),
                                          0.0 if complete else None))
    samples = [sample.drop_vars("member", errors="ignore")[store.fields]
               for sample in samples]
    stacked = xr.concat(samples, dim="time", coords="minimal", compat="override",
                        join="override")
    offsets = np.arange(len(samples)).astype("timedelta64[ns]")
    stacked = stacked.assign_coords(time=np.datetime64(valid, "ns") + offsets)
    return regime_of_fields(store, stacked, region, all_rows=True)


def consensus_analogs(pooled: pd.DataFrame) -> pd.DataFrame:
    """The distinct analog days of an ensemble (``pooled``: every member's analogs with
    a ``member`` column), most chosen first: ``n_members`` (members that chose the day),
    ``distance`` its mean over those members; ties by distance."""
    columns = [c for c in pooled.columns if c not in ("rank", "distance", "member")]
    grouped = pooled.groupby("row", sort=False)
    table = grouped[columns].first()
    table["distance"] = grouped["distance"].mean()
    table["n_members"] = grouped["member"].nunique()
    table = table.sort_values(["n_members", "distance"], ascending=[False, True],
                              kind="stable").reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    order = ["rank", "date", "distance", "regime", "regime_confidence"]
    rest = [c for c in table.columns if c not in order]
    return table[order + rest]


def member_spread(members, pooled: pd.DataFrame, query: _Query) -> dict:
    """How the members' outcomes differ, and an interval for the pooled probability that
    does not count a day twice: Kish's (1965) effective number of analogs of the distinct
    days weighted by how many members chose them, ``(sum w)^2 / sum w^2``, with the
    binomial interval at that n (as for the weighted outcomes)."""
    p_members = np.array([m.outcomes.p_any_event for m in members], dtype=float)
    mean_members = np.array([m.outcomes.mean_events for m in members], dtype=float)
    multiplicity = pooled.groupby("row").size().to_numpy(dtype=float)
    n_effective = float(multiplicity.sum() ** 2 / np.sum(multiplicity ** 2))
    p_pooled = float(np.mean(pooled[EVENTS_TOTAL].to_numpy() > 0))
    low, high = binomial_interval(p_pooled * n_effective, n_effective, query.confidence)

    def spread(values):
        return {"min": float(np.min(values)), "median": float(np.median(values)),
                "max": float(np.max(values))}

    return {"n_members": len(members), "n_distinct_days": int(multiplicity.size),
            "n_effective": n_effective, "p_any_event_ci_effective": [float(low), float(high)],
            "p_any_event": spread(p_members), "mean_events": spread(mean_members)}


def warn_near_duplicate(store, analogs: pd.DataFrame, valid, query: _Query,
                        members=None) -> None:
    """Warn when the first analog is a near copy of the target (distance below
    ``NEAR_DUPLICATE_FRACTION`` of the typical length of a day's vector): a field valid
    on an archive day is most likely that day itself, and would be its own first analog
    at distance ~0; the warning offers to exclude its episode. For an ensemble,
    ``analogs`` holds each member's first analog and ``members`` their labels: one
    warning names the members concerned."""
    if analogs.empty:
        return
    if query.transform is None:
        scale = float(np.sqrt(np.sum(store.eof.eigenvalues_.values[:query.n_modes])))
    else:  # the same length in the event-weighted space: the spread of the mapped days
        mapped = store.pc_values[:, :query.n_modes] @ query.transform
        scale = float(np.sqrt(np.sum(mapped.var(axis=0))))
    limit = NEAR_DUPLICATE_FRACTION * scale
    rows = [0] if members is None else list(range(len(analogs)))
    close = [r for r in rows if analogs["distance"].iloc[r] < limit]
    if not close:
        return
    first = analogs.iloc[close[0]]
    who = "the target" if members is None else (
        f"member{'s' if len(close) > 1 else ''} "
        f"{', '.join(str(members[r]) for r in close)} of the target")
    when = f"{valid:%Y-%m-%dT%H:%M}"
    verb = "matches" if len(close) == 1 else "match"
    distance = float(analogs["distance"].iloc[close].max())
    if first["date"] == str(valid.date()):
        warnings.warn(
            f"{who} (valid {when}, inside the archive) {verb} the archive day "
            f"{first['date']} almost exactly (distance {distance:.2g}, below "
            f"{limit:.2g}): probably that day itself, found as its own first analog; "
            f"to leave its episode out pass --time {when} --exclude "
            f"{P.exclude.default} (time=..., exclude=... in Python)", UserWarning,
            stacklevel=4)
    else:
        warnings.warn(
            f"{who} (valid {when}) {verb} the archive day {first['date']} almost exactly "
            f"(distance {distance:.2g}, below {limit:.2g}): is it that day's field with "
            "another valid time? Check the file's valid time", UserWarning, stacklevel=4)


# ---------------------------------------------------------------------- sequences

def sequence_vectors(store, sequence) -> tuple[np.ndarray, np.ndarray]:
    """Vectors of each day followed by its ``sequence`` preceding days, over the store's
    query modes (:func:`analogs.stages.selection.sequence_vectors`, kept per loaded
    store), and the rows whose preceding days are all in the archive."""
    sequence = P.sequence.check(sequence, "find")
    cache = _derived(store).setdefault("sequence_vectors", {})
    if sequence not in cache:
        cache[sequence] = selection_sequence_vectors(
            store.pc_values[:, :store.n_query_modes], store.days, sequence)
    return cache[sequence]


# ------------------------------------------------------------ event-weighted metric

#: Fitted event-weighted metrics kept in a store's manifest (``predictor_weights``): the newest.
PREDICTOR_WEIGHTS_CACHE_SIZE = 32
#: What the fitted map is; part of its key, so a change of method refits.
PREDICTOR_WEIGHTS_METHOD = ("logistic regression (C={C:g}) on standardised PCs + 2 annual "
                            "harmonics: PC j scaled by |beta_j|/sd_j, plus the PC score "
                            "weighted {w:g}")


def _predictor_weights_key(region, kinds, n_modes, files) -> tuple[str, dict]:
    """The cache key of a fitted metric: a short hash and what it hashes (region, kinds,
    modes, method, and the checksums of the store's PCs and reports, from its
    manifest's ``files``)."""
    import hashlib
    import json
    from analogs.stages.predictor_weights import REGRESSION_C, SCORE_WEIGHT
    fields = {"region": region.to_dict(), "kinds": sorted(kinds) if kinds else None,
              "n_modes": n_modes,
              "method": PREDICTOR_WEIGHTS_METHOD.format(C=REGRESSION_C, w=SCORE_WEIGHT),
              "data": {name: files.get(name) for name in ("scores.nc", "events.parquet")}}
    text = json.dumps(fields, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16], fields


def default_predictor_weights(transform, region, n_modes, files) -> dict:
    """The manifest's ``predictor_weights`` section of a new store holding ``transform``,
    the map of its own region (every kind) fitted as :func:`event_weighted_transform`
    fits it (``n_modes``: the store's query modes; ``files``: the manifest entries of
    its ``scores.nc`` and ``events.parquet``, which key it). The build writes it with
    the store's first manifest: a default query does not fit it, and the build neither
    edits the manifest again nor loads the store twice."""
    key, fields = _predictor_weights_key(region, None, n_modes, files)
    return {key: {"key": fields, "transform": np.asarray(transform).tolist()}}


def event_weighted_transform(store, region, kinds=None, keep=True) -> np.ndarray:
    """The map of the store's PCs (its query modes) under which the Euclidean distance
    is the event-weighted metric for reports of ``kinds`` in ``region``
    (:func:`analogs.stages.predictor_weights.fit_predictor_weights` on every day with
    report coverage, the live query's counterpart of the hindcast's in-fold fit).

    Fitted once per store version, region and kinds: kept in the loaded store and in its
    manifest (``predictor_weights``, through one manifest-only transaction,
    :func:`analogs.workflows.store.edit_manifest`; not kept on a read-only store or
    when another writer holds the lock, nor without ``keep``: a query asked to skip the
    skill hindcast writes nothing to the store), keyed by the checksums of the PCs and
    reports so an update refits."""
    from analogs.stages.predictor_weights import fit_predictor_weights
    from analogs.workflows import store as store_io
    from analogs.workflows.skill import SKILL_CACHE_LOCK_SECONDS, observed
    key, fields = _predictor_weights_key(region, kinds, store.n_query_modes,
                                         store.manifest["files"])
    memory = _derived(store).setdefault("predictor_weights", {})
    if key in memory:
        return memory[key]
    kept = (store.manifest.get("predictor_weights") or {}).get(key)
    if kept is not None and kept.get("key") == fields:
        memory[key] = np.asarray(kept["transform"], dtype=float)
        return memory[key]
    covered = store.covered
    events = observed(store, region, kinds)
    transform = fit_predictor_weights(store.pc_values[covered, :store.n_query_modes],
                                      store.times[covered], events[covered])
    memory[key] = transform
    if keep and store_io.writable(store.path):  # else in memory only; the next load fits it
        store_io.keep_in_manifest(store.path, "predictor_weights", key, fields,
                                  {"transform": transform.tolist()},
                                  limit=PREDICTOR_WEIGHTS_CACHE_SIZE,
                                  timeout=SKILL_CACHE_LOCK_SECONDS)
    return transform


def with_default_predictor_weights(store):
    """``store`` with the event-weighted map of its own region (every kind) kept in its
    manifest (:func:`event_weighted_transform`), as the build and ``update`` leave it so
    that a default query does not fit it: the store loaded
    again when the map was written (the version's manifest changed)."""
    from analogs.workflows import store as store_io
    from analogs.workflows.analog_store import AnalogStore
    if store.events is None:
        return store
    version = store_io.version_token(store.path)
    event_weighted_transform(store, store.region)
    if store_io.version_token(store.path) == version:
        return store
    return AnalogStore.load(store.path)


def _weighted_index(store, transform, sequence=0) -> AnalogIndex:
    """An index of the store's query-mode PCs (or ``sequence`` vectors, each day's PCs
    by the same map: :func:`~analogs.stages.predictor_weights.block_transform`) mapped
    by ``transform``, one per map and sequence."""
    from analogs.stages.predictor_weights import block_transform
    indexes = _derived(store).setdefault("weighted_indexes", {})
    key = (transform.tobytes(), sequence)
    if key not in indexes:
        vectors = (sequence_vectors(store, sequence)[0] if sequence
                   else store.pc_values[:, :store.n_query_modes])
        indexes[key] = AnalogIndex(kind="auto").fit(
            vectors @ block_transform(transform, 1 + sequence))
    return indexes[key]


def _sequence_index(store, sequence) -> AnalogIndex:
    indexes = _derived(store).setdefault("sequence_indexes", {})
    if sequence not in indexes:
        indexes[sequence] = AnalogIndex(kind="auto").fit(sequence_vectors(store, sequence)[0])
    return indexes[sequence]


def _field_sequence_vector(store, field, target_time, vector, sequence,
                           batch=None) -> np.ndarray:
    """The sequence vector(s) of a field target: its preceding days come from the times
    already opened (``batch``: valid time -> PC vectors) or else from its file.
    ``vector`` is ``(mode,)``, or ``(member, mode)`` for an ensemble."""
    import xarray as xr
    from analogs.stages.sources import open_target
    n_modes = store.n_query_modes
    vector = np.asarray(vector, dtype=float)
    parts = [vector[..., :n_modes]]
    for lag in range(1, sequence + 1):
        earlier = target_time - pd.Timedelta(days=lag)
        if batch is not None and earlier in batch:
            previous = batch[earlier]
        else:
            if isinstance(field, xr.Dataset):
                raise AnalogsInputError("a sequence match of a field needs its file (with "
                                        "the preceding days), not a Dataset")
            try:
                opened = open_target(field, time=earlier.isoformat(), members=True)
            except AnalogsInputError as error:
                fail("sequence", "find", f"at most the number of days before the target "
                     f"that {field} holds: it lacks {earlier:%Y-%m-%dT%H:%M} ({error})",
                     sequence)
            previous = project_samples(store, on_store_grid(store, opened))
            previous = previous[:, 0] if previous.ndim == 3 else previous[0]
        if previous.shape[:-1] != vector.shape[:-1]:
            raise AnalogsInputError(f"{field}: the day {earlier:%Y-%m-%d} before the target "
                                    "has other ensemble members than the target")
        parts.append(SEQUENCE_DECAY ** lag * previous[..., :n_modes])
    return np.concatenate(parts, axis=-1)


# ---------------------------------------------------------------------- outcomes

def daily_counts(store, region, kinds=None) -> pd.DataFrame:
    """Events in ``region`` on every archive day (rows aligned with ``store.times``),
    one column per kind plus ``total``; computed once per region and kinds and kept."""
    key = (region, None if kinds is None else tuple(sorted(kinds)))
    cache = _derived(store).setdefault("daily_counts", {})
    if key not in cache:
        stored = getattr(store, "stored_counts", None)  # the store region's, every kind
        if stored is not None and kinds is None and region == store.region:
            cache[key] = stored
        elif store.events is None:
            cache[key] = pd.DataFrame({"total": np.zeros(len(store.days), dtype=int)},
                                      index=store.days)
        else:
            cache[key] = daily_event_counts(store.events, store.days, region, kinds=kinds)
    return cache[key]


def stored_daily_counts(events: pd.DataFrame, days, region: Region) -> pd.DataFrame:
    """The daily counts a store keeps (``counts.parquet``, written at build and update):
    :func:`analogs.stages.outcomes.daily_event_counts` of every kind in the store's
    ``region`` on ``days``, the days as a column (a store's tables are written without
    their index), the region named in the table's attrs."""
    from analogs.workflows.analog_store import counts_region_attrs
    table = daily_event_counts(events, days, region).reset_index()
    table.attrs = counts_region_attrs(region)
    return table


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
    if store.events is not None:  # False: no reports yet for that day (issue 13)
        table["reports_known"] = store.covered[rows]
    table["row"] = rows
    return table


def outcome_summary(store, analogs, target_time, window, region, weights, confidence,
                    kinds=None, skill=None):
    """:class:`analogs.results.OutcomeSummary` of the analog days beside the season
    window's climatology, with the cyclone quadrants of the tropical analogs and the
    query's cross-validated ``skill`` (:meth:`_Query.skill`)."""
    counts = daily_counts(store, region, kinds)
    if target_time is not None and window is not None:
        season = candidate_ids(store.times, target_time, window=window, exclude=None)
    else:
        season = np.arange(len(store.times))
    # Only days with report coverage count (issue 13): an analog day without reports yet
    # is left out of the statistics (and counted), and so is such a climatology day.
    known = (store.covered[analogs["row"].to_numpy()] if store.events is not None
             else np.ones(len(analogs), dtype=bool))
    if store.events is not None:
        season = season[store.covered[season]]
    analogs_known = analogs[known]
    analog_counts = counts.iloc[analogs_known["row"].to_numpy()]
    weight_values = None
    if weights != "equal" and len(analogs_known):
        weight_values = analog_weights(analogs_known["distance"].to_numpy(), scheme=weights)
    summary = summarize_outcomes(analog_counts, counts.iloc[season], weights=weight_values,
                                 confidence=confidence, n_without_reports=int((~known).sum()))
    # Reports around the cyclone of the analogs tagged tropical (the cyclone days that
    # matter for the region); skipped, at no cost, when there are none.
    tropical = analogs_known.loc[analogs_known["regime"] == "tropical", "row"].to_numpy()
    composite = cyclone_composite(store, tropical) if tropical.size else None
    return summary.replace(has_events=store.events is not None, cyclone_quadrants=composite,
                           skill=skill)


def outcome_maps(store, result: FindResult) -> xr.Dataset:
    """Neighbourhood probability (40 km) and practically-perfect report density of the
    analog days of ``result`` on the store grid
    (:func:`analogs.stages.outcomes.outcome_maps`)."""
    if store.events is None:
        raise AnalogsInputError(f"store {store.path} has no events table: maps need one")
    lat, lon = store.grid
    days = pd.DatetimeIndex(pd.to_datetime(result.analogs["date"]))
    weights = None
    if "n_members" in result.analogs:  # an ensemble: each day as often as members chose it
        weights = result.analogs["n_members"].to_numpy(dtype=float)
    # Only analog days with reports (issue 13): a day without reports yet is not a day
    # without reports nearby. With none, the maps are undefined (NaN).
    known = (result.analogs["reports_known"].to_numpy(dtype=bool)
             if "reports_known" in result.analogs else np.ones(len(days), dtype=bool))
    chosen = known if known.any() else np.ones(len(days), dtype=bool)
    maps = outcome_stage.outcome_maps(store.events, days[chosen], lat, lon,
                                      weights=None if weights is None else weights[chosen])
    if not known.any():
        maps = maps.where(False)
    maps.attrs.update({"target": str(result.target["date"]),
                       "n_analogs": int(known.sum()), "source": f"analogs store {store.path}"})
    if not known.all():
        maps.attrs["n_analogs_without_reports"] = int((~known).sum())
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
    import xarray as xr
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


def archive_day_fields(store, rows) -> tuple[xr.Dataset | None, str]:
    """The archive's own fields of archive ``rows`` on the store grid, shaped as
    :func:`day_fields`, read from the archive files the manifest lists when every one
    is still at its recorded path with its recorded size; else (None, why not).

    Only the days asked for are read, through the archive reader (:func:`_archive_days`:
    the first file of each kind recognised by ``open_target``, one way of recognising
    variables and units; half of the files in a forked child where there are enough),
    then put on the store grid (:func:`on_store_grid`). A store of daily means (``--daily mean``) keeps the
    reconstruction: its days are not single times of the files."""
    import xarray as xr
    from analogs.workflows.paths import provenance
    rows = np.atleast_1d(np.asarray(rows, dtype=int))
    if store.manifest["config"].get("daily", "instant") != "instant":
        return None, "the store holds daily means"
    inputs = store.manifest["archive"].get("inputs") or []
    for entry in inputs:
        path = Path(entry["path"])
        if not path.exists():
            return None, f"archive file {path} is no longer at its recorded path"
        if provenance([path])[0]["bytes"] != entry["bytes"]:
            return None, f"archive file {path} changed size since the build"
    wanted = pd.DatetimeIndex(store.times[rows])
    try:
        found = _archive_days(inputs, wanted, store.fields)
    except (AnalogsInputError, OSError, ValueError) as error:
        return None, f"the archive could not be read ({' '.join(str(error).split())[:120]})"
    missing = [name for name in store.fields if name not in found or not wanted.isin(
        np.concatenate([part["time"].values for part in found[name]])).all()]
    if missing:
        return None, f"the archive files do not hold every day drawn ({', '.join(missing)})"
    merged = xr.Dataset({name: _at_days(found[name], wanted.values) for name in store.fields})
    lat, lon = store.grid
    rows_at = _positions(merged["lat"].values, lat)
    columns_at = _positions(merged["lon"].values, lon)
    if rows_at is not None and columns_at is not None:
        # The store's grid points are points of the archive (a domain cut at build):
        # taken as they are, where bilinear interpolation would return the same values
        # after importing scipy's interpolators.
        fields = merged.isel(lat=rows_at, lon=columns_at)
    else:
        fields = on_store_grid(store, merged)
    out = xr.Dataset(coords={"time": ("analog", wanted.values), "lat": lat, "lon": lon})
    for name in store.fields:
        out[name] = xr.DataArray(fields[name].transpose("time", "lat", "lon").values,
                                 dims=("analog", "lat", "lon"), attrs=dict(fields[name].attrs))
    return out, "archive"


#: Files of the archive from which a report's days are read by two processes: the
#: second half in a forked child (:mod:`analogs._forked`), the first here.
MIN_FILES_FORKED = 4


def _archive_days(inputs, wanted, fields) -> dict:
    """{field: [DataArray of the days a file holds, in the order of ``inputs``]}: the
    archive files' days among ``wanted`` (:func:`_days_in_files`). With at least
    :data:`MIN_FILES_FORKED` files, and where a fork can be made, the second half of the
    files is read in a child process while this one reads the first half; when the
    child fails or gives no answer in ten times the first half's time (at least 10 s),
    they are read here (the answer, its errors and warnings are those of one process
    reading them all)."""
    half = len(inputs) // 2
    if len(inputs) < MIN_FILES_FORKED or not _forked.can_fork():
        return _days_in_files(inputs, wanted, fields)
    started = time.perf_counter()
    with _forked.beside(_days_in_files_as_bytes, inputs[half:], wanted, fields) as child:
        found = _days_in_files(inputs[:half], wanted, fields)
        answer = child.answer(timeout=max(10.0, 10 * (time.perf_counter() - started)))
    if answer is None:
        more = _days_in_files(inputs[half:], wanted, fields)
    else:
        arrays, said = _forked.arrays_from_bytes(answer)
        _forked.warn_again(said)
        more = {}
        for part in arrays:
            more.setdefault(part.name, []).append(part)
    for name, parts in more.items():
        found.setdefault(name, []).extend(parts)
    return found


def _days_in_files_as_bytes(inputs, wanted, fields) -> bytes:
    """:func:`_days_in_files` in a forked child: its parts and warnings as bytes."""
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        found = _days_in_files(inputs, wanted, fields)
    return _forked.arrays_to_bytes([part for parts in found.values() for part in parts],
                                  _forked.recorded_warnings(said))


def _days_in_files(inputs, wanted, fields) -> dict:
    """{field: [DataArray of the days one file holds]} of the archive files ``inputs``
    (manifest entries) at the days among ``wanted`` (DatetimeIndex) they hold: a file
    laid out as one read before at those of its time steps alone, after one look at its
    header (:func:`analogs.stages.sources.laid_out_days`); any other file's times looked
    at first, then the file read at the days it holds
    (:func:`analogs.stages.sources.target_days`)."""
    from analogs.stages.sources import DayLayouts, held_times, laid_out_days, target_days
    layouts = DayLayouts()
    # fields_of: the fields files of the same variables held
    found, fields_of = {}, {}
    for entry in inputs:
        parts = laid_out_days(entry["path"], wanted.values, fields, layouts)
        if parts is not None:  # laid out as a file read before
            for name, part in parts.items():
                found.setdefault(name, []).append(part)
            continue
        held, variables = held_times(entry["path"])
        if held is None:
            continue
        inside = wanted[wanted.isin(held)].unique().sort_values()
        if inside.empty:
            continue
        known = fields_of.get(variables)
        for name in fields if known is None else known:
            try:
                part = target_days(entry["path"], inside.values, name, layouts)
            except AnalogsInputError:
                continue  # the file holds another field
            if known is None:
                fields_of.setdefault(variables, []).append(name)
            found.setdefault(name, []).append(part)
    return found


def _at_days(parts, days) -> xr.DataArray:
    """The parts (DataArrays on (time, lat, lon)) joined along time at ``days``, each
    day's values from the first part holding it: ``xr.concat(parts, "time")
    .drop_duplicates("time").sel(time=days)``, its values gathered with numpy when the
    parts share their latitudes and longitudes (no alignment to do)."""
    import xarray as xr
    first = parts[0]
    if any(not (part["lat"].equals(first["lat"]) and part["lon"].equals(first["lon"]))
           for part in parts[1:]):
        return xr.concat(parts, dim="time").drop_duplicates("time").sel(time=days)
    times = np.concatenate([part["time"].values for part in parts])
    unique, first_at = np.unique(times, return_index=True)
    at = first_at[np.searchsorted(unique, days)]
    values = np.concatenate([part.values for part in parts])[at]
    return xr.DataArray(values, dims=first.dims, coords={
        "time": xr.Variable("time", times[at], first["time"].attrs),
        "lat": first["lat"], "lon": first["lon"]}, name=first.name, attrs=first.attrs)


def _positions(source, target, tolerance=1e-6) -> np.ndarray | None:
    """Indices of the ascending coordinate ``source`` at each value of ``target``, or
    None when some value of ``target`` is not a point of ``source`` (degrees)."""
    at = nearest_index(source, target)
    return at if np.all(np.abs(source[at] - target) <= tolerance) else None


def _place(values, lat, lon) -> str:
    """Where the largest of ``values`` (lat, lon) is, in degrees N/S and W/E."""
    from analogs.presentation.map_layers import degrees_east_label, degrees_north_label
    i, j = np.unravel_index(int(np.nanargmax(values)), np.shape(values))
    return f"{degrees_north_label(lat[i])} {degrees_east_label(lon[j])}"


def _alt_target(target, when, source) -> str:
    z = target["z500"].values
    lat, lon = target["lat"].values, target["lon"].values
    text = (f"Map of {when} ({source}): 500 hPa height contours every 60 gpm from "
            f"{np.nanmin(z):.0f} to {np.nanmax(z):.0f} gpm, highest near {_place(z, lat, lon)}, "
            f"lowest near {_place(-z, lat, lon)}")
    moisture = next((name for name in ("q850", "td2m", "pwat") if name in target), None)
    if moisture:
        m = target[moisture].values
        text += (f"; {moisture} shaded (viridis), most moist near {_place(m, lat, lon)}")
    return text + "; the outcome region dashed."


def _marks(heights):
    """Trough and ridge axes and closed lows (:func:`analogs.stages.features.synoptic_marks`)
    of the 500 hPa heights (``analog``, lat, lon) of the maps, in one pass; ``panel``
    is the position along ``analog`` (each map's marks are those of its field alone)."""
    from analogs.stages.features import synoptic_marks
    return synoptic_marks(heights.drop_vars(["time", "analog"], errors="ignore"),
                          dim="analog")


#: The share of the analog grid's cells a report draws itself while a forked child
#: draws the others (and it draws the other figures): about even work on two cores.
GRID_SHARE_DRAWN_HERE = 0.4


def _grid_cells(grid, heights, start, stop) -> tuple[list, list, list]:
    """(SVG parts, each map's (id, width, height), the synoptic mark kinds drawn) of
    the analog grid's cells ``start:stop`` (``grid``: an
    :class:`analogs.presentation.svg_maps.AnalogGrid`; ``heights``: the 500 hPa height
    of every day of the grid), each day's marks found on its own field (:func:`_marks`)."""
    from analogs.presentation.svg_maps import mark_kinds
    if start >= stop:
        return [], [], []
    marks = _marks(heights.isel(analog=slice(start, stop)))
    marks["panel"] += start
    views = []
    return grid.cells(range(start, stop), marks, views), views, mark_kinds(marks)


def _grid_cells_as_bytes(grid, heights, start) -> bytes:
    """The grid's cells from ``start`` on (:func:`_grid_cells`) drawn in a forked child,
    with its warnings, as JSON."""
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        cells, views, kinds = _grid_cells(grid, heights, start, len(grid.days))
    return json.dumps({"cells": cells, "views": views, "kinds": kinds,
                       "said": _forked.recorded_warnings(said)}).encode()


def _grid_cells_from_bytes(answer) -> tuple[list, list, list]:
    """:func:`_grid_cells_as_bytes`'s cells, their warnings issued again here."""
    drawn = json.loads(bytes(answer))
    _forked.warn_again(drawn["said"])
    return drawn["cells"], [tuple(view) for view in drawn["views"]], drawn["kinds"]


def _alt_grid(shown, days_source, marked) -> str:
    """Alt text of the analog grid (``marked``: some day has synoptic marks)."""
    return (f"Grid of {len(shown)} small maps of 500 hPa height ({days_source}), one per "
            "analog day in "
            "rank order, with that day's events marked by kind: "
            + "; ".join(f"#{a.rank} {a.date} {a.regime}, distance {a.distance:.2f}, "
                        f"{int(a.events_total)} events in region"
                        for a in shown.itertuples(index=False)) + "."
            + (" Each day's trough axes (red dashed), ridge axes (blue dotted) and closed "
               "lows (L) of the 500 hPa height are marked." if marked else ""))


def _alt_marks(marks) -> str:
    """Alt text of the synoptic marks of one map."""
    if marks is None or not len(marks):
        return " No trough or ridge axis and no closed low found."
    from analogs.presentation.map_layers import degrees_east_label, degrees_north_label
    parts = []
    for kind, words in (("trough", "trough axis"), ("ridge", "ridge axis")):
        lines = marks[marks["kind"] == kind].groupby("axis")
        for _, line in lines:
            south, north = line.iloc[0], line.iloc[-1]
            parts.append(f"{words} from {degrees_north_label(round(south.lat))} "
                         f"{degrees_east_label(round(south.lon))} to "
                         f"{degrees_north_label(round(north.lat))} "
                         f"{degrees_east_label(round(north.lon))}")
    for low in marks[marks["kind"] == "low"].itertuples(index=False):
        parts.append(f"closed low (L) at {degrees_north_label(round(low.lat))} "
                     f"{degrees_east_label(round(low.lon))}")
    return " Marked: " + "; ".join(parts) + "."


def _short(source) -> str:
    """A figure title's account of where fields came from, without the reason."""
    return source.split(", as ")[0]


def _alt_land(land, geography) -> str:
    """The alt text's account of the geography drawn: the archive's land-sea boundary,
    the Earth's lines (or why they are left off)."""
    from analogs.presentation.map_layers import earth_note
    note = earth_note(geography)
    return ((" The land-sea boundary from the archive's mask is drawn in brown." if land else "")
            + (f" {note[0].upper()}{note[1:]}." if note else ""))


def report_figures(store, result: FindResult, *, maps=None, n_panel=None,
                   views=None) -> list[tuple[str, str, str]]:
    """Figures of one query, as (caption, SVG text, alt text describing the content)
    for :func:`analogs.presentation.report.find_html`, drawn by
    :mod:`analogs.presentation.svg_maps` (no matplotlib).

    Everything is gathered once: the target's fields (``result.target_fields`` for a
    field target), the archive days' fields (a date target and the analog days): the
    archive's own fields when its files are still where the build read them
    (:func:`archive_day_fields`, only those days read), else the store's
    reconstruction (:func:`day_fields`: one climatology evaluation and one EOF
    reconstruction for all the days together), said in every title and alt text;
    their mean, their trough and ridge axes and closed lows (:func:`_marks`), the
    land-sea boundary of the store's mask (traced once), the events of the days drawn
    and the outcome maps (``maps`` when already computed, e.g. for ``--maps``).
    Every analog is drawn in the grid unless ``n_panel`` limits it. ``views``: a list
    to which each analog's map in the grid is appended as (SVG id, width, height) in
    rank order, for the browsing page to show it again
    (:func:`analogs.presentation.svg_maps.map_view`).
    """
    from analogs.presentation import svg_maps as draw
    from analogs.presentation.map_layers import land_lines
    from analogs.workflows.geography import map_lines
    region = result.region if result.region is not None else store.region
    when = result.target.get("date") or "the forecast field"
    analogs = result.analogs
    analog_rows = analogs["row"].to_numpy(dtype=int)
    target, source = None, None
    if result.target_fields is not None:
        target = result.target_fields.squeeze("time", drop=True) \
            if "time" in result.target_fields.dims else result.target_fields
        source = "the given field, on the store grid"
        if "member" in target.dims:
            source = (f"mean of the {target.sizes['member']} ensemble members, on the "
                      "store grid")
            target = target.mean("member", keep_attrs=True)
    elif result.target.get("date"):
        analog_rows = np.concatenate([[day_row(store, result.target["date"])], analog_rows])
    gathered, days_source = None, None
    if analog_rows.size:
        gathered, why_not = archive_day_fields(store, analog_rows)
        days_source = "the archive's fields"
        if gathered is None:
            gathered = day_fields(store, analog_rows)
            days_source = (f"EOF reconstruction: climatology + anomaly on "
                           f"{store.eof.n_modes_} kept EOFs, as {why_not}")
    if target is None and result.target.get("date"):
        source = days_source
        target, gathered = gathered.isel(analog=0), gathered.isel(analog=slice(1, None))
    land = land_lines(store.land)  # traced once for every map
    geography = map_lines(*store.grid, store.land)
    figures, grid = [], None
    if len(analogs):
        gathered = gathered.assign_coords(analog=analogs["rank"].to_numpy())
        shown = analogs if n_panel is None else analogs.head(n_panel)
        events = None
        if store.events is not None:
            events = store.events[store.events["day"].isin(pd.to_datetime(shown["date"]))]
        heights = gathered["z500"].isel(analog=slice(0, len(shown)))
        grid = draw.AnalogGrid(
            gathered.isel(analog=slice(0, len(shown))), shown, events, region=region,
            land=land, geography=geography,
            title=f"Closest past days to {when}: 500 hPa height ({_short(days_source)})")
    started = time.perf_counter()
    # The analog grid's later cells (each day's marks and map) drawn in a forked child
    # (analogs._forked) while the other figures and the first cells are drawn here.
    forking = grid is not None and _forked.can_fork()
    first = 0 if grid is None else (round(GRID_SHARE_DRAWN_HERE * len(shown)) if forking
                                    else len(shown))
    with (_forked.beside(_grid_cells_as_bytes, grid, heights, first) if forking
          else contextlib.nullcontext()) as child:
        if target is not None:
            target_marks = _marks(target["z500"].drop_vars("time", errors="ignore")
                                  .expand_dims("analog"))
            alt = (_alt_target(target, f"target {when}", source) + _alt_marks(target_marks)
                   + _alt_land(land, geography))
            figures.append((f"Target {when}: 500 hPa height and moisture ({source})",
                            draw.target_map(target, region=region, when=f"Target {when}",
                                            source=source, land=land, marks=target_marks,
                                            geography=geography, alt=alt), alt))
        if len(analogs) and target is not None:
            mean = gathered.mean("analog", keep_attrs=True).drop_vars("time", errors="ignore")
            mean.attrs["n_days"] = int(len(analogs))
            difference = mean["z500"].values - target["z500"].values
            lat, lon = mean["lat"].values, mean["lon"].values
            alt = (f"Two maps. Left: mean 500 hPa height and moisture of the "
                   f"{len(analogs)} analog days ({_short(days_source)}). Right: that mean minus the target's "
                   f"height, shaded blue to red from {np.nanmin(difference):.0f} to "
                   f"{np.nanmax(difference):+.0f} gpm (most above the target near "
                   f"{_place(difference, lat, lon)}, most below near "
                   f"{_place(-difference, lat, lon)}), target contours on top.")
            figures.append(("Mean of the analog days and its difference from the target",
                            draw.composite_difference(
                                mean, target, region=region, land=land, geography=geography,
                                title=f"Analog days and target {when} (analogs: "
                                      f"{_short(days_source)}; target: {_short(source)})",
                                alt=alt), alt))
        if len(analogs) and store.events is not None:
            maps = outcome_maps(store, result) if maps is None else maps
            p = 100.0 * maps["neighbourhood_probability"].values
            lat, lon = maps["lat"].values, maps["lon"].values
            nonzero = int(np.count_nonzero(p > 0))
            alt = (f"Two maps of the {len(analogs)} analog days' events. Left: share of analog "
                   f"days with an event nearby, non-zero in {nonzero} grid cells"
                   + (f", at most {np.nanmax(p):.0f} % near {_place(p, lat, lon)}"
                      if nonzero else "") + ". Right: smoothed event density"
                   + (f", largest near {_place(maps['report_density'].values, lat, lon)}"
                      if nonzero else "") + "; zero left blank on both.")
            figures.append(("Where the analog days had events nearby",
                            draw.probability_map(maps, region=region, when=when, land=land,
                                                 geography=geography, alt=alt), alt))
        if grid is not None:
            cells, drawn, kinds = _grid_cells(grid, heights, 0, first)
            answer = None if child is None else child.answer(
                timeout=max(10.0, 10 * (time.perf_counter() - started)))
    if grid is not None:
        if forking:
            more = (_grid_cells_from_bytes(answer) if answer is not None
                    else _grid_cells(grid, heights, first, len(shown)))
            cells, drawn, kinds = cells + more[0], drawn + more[1], sorted({*kinds, *more[2]})
        alt = _alt_grid(shown, days_source, bool(kinds)) + _alt_land(land, geography)
        if views is not None:
            views.extend(drawn)
        figures.insert(1 if target is not None else 0,
                       ("The closest past days and their events",
                        grid.svg(cells, kinds, alt), alt))
    return figures
