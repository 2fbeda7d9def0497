"""Result objects of a query: labelled tables and datasets, JSON only at the edge.

A query (:func:`analogs.workflows.find.find`) returns a :class:`FindResult`: the analogs
as a pandas DataFrame, their outcome statistics as an :class:`OutcomeSummary` (floats,
NaN where a statistic is undefined, tables as DataFrames / Series), the target block,
the settings and region used and, for a ``field`` target, the target's fields on the
store grid (xarray Dataset). ``to_dict()`` gives the JSON shape of ``analogs find --json``
(DESIGN.md), where an undefined statistic is ``None`` (``null``); nothing else does.

This module is in the base layer: it imports pandas, numpy and the package's base
modules only (a field target's result holds xarray objects, made elsewhere).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs import CAUTION

if TYPE_CHECKING:  # only a field target's result holds xarray objects
    import xarray as xr

#: Prefix of the per-kind event-count columns of :attr:`FindResult.analogs`.
EVENTS_PREFIX = "events_"
#: The column of :attr:`FindResult.analogs` with every kind's events.
EVENTS_TOTAL = "events_total"


def _json_float(value):
    """A float for JSON: NaN (undefined) becomes None."""
    value = float(value)
    return None if math.isnan(value) else value


def _json_interval(low, high) -> list:
    return [_json_float(low), _json_float(high)]


def _json_value(value):
    """JSON value of a scalar or nested dict/list (NaN -> None, numpy -> Python)."""
    if isinstance(value, dict):
        return {k: _json_value(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_value(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return _json_float(value)
    return value


def _threshold_key(value) -> str:
    """JSON key of an event-count threshold M (JSON keys are strings): 3 -> "3"."""
    return str(int(value))


def _percentile_key(value) -> str:
    """JSON key of a percentile: 10.0 -> "10", 2.5 -> "2.5"."""
    return f"{float(value):g}"


@dataclass(frozen=True, eq=False)
class WeightedOutcomes:
    """Outcome statistics with the analogs weighted by similarity.

    Attributes
    ----------
    n_effective : Kish's effective number of analogs, ``(sum w)^2 / sum w^2``.
    p_any_event : weighted share of analog days with at least one event in the region.
    p_any_event_ci : its interval (binomial, n = ``n_effective``), (low, high).
    ratio_to_climatology : ``p_any_event`` over the season climatology (NaN when that is 0).
    mean_events : weighted mean number of events per analog day.
    p_at_least : Series indexed by ``min_events`` M: weighted P(at least M events).
    by_kind : DataFrame indexed by ``kind``, columns ``p_any`` and ``mean``.
    """

    n_effective: float
    p_any_event: float
    p_any_event_ci: tuple[float, float]
    ratio_to_climatology: float
    mean_events: float
    p_at_least: pd.Series
    by_kind: pd.DataFrame

    def to_dict(self) -> dict:
        """The ``"weighted"`` block of ``analogs find --json``."""
        return {
            "n_effective": _json_float(self.n_effective),
            "p_any_event": _json_float(self.p_any_event),
            "p_any_event_ci": _json_interval(*self.p_any_event_ci),
            "ratio_to_climatology": _json_float(self.ratio_to_climatology),
            "mean_events": _json_float(self.mean_events),
            "p_at_least": {_threshold_key(m): _json_float(p) for m, p in self.p_at_least.items()},
            "by_kind": {str(kind): {"p_any": _json_float(row.p_any), "mean": _json_float(row.mean)}
                        for kind, row in zip(self.by_kind.index, self.by_kind.itertuples())},
        }


@dataclass(frozen=True, eq=False, repr=False)
class OutcomeSummary:
    """What the analog days produced, beside the season climatology.

    Made by :func:`analogs.stages.outcomes.summarize_outcomes`; the find workflow adds
    ``has_events``, ``cyclone_quadrants`` and ``skill``. Scalars are floats, NaN where
    undefined (no climatology days, a climatology of 0); never None. Probabilities are
    fractions in [0, 1]; event counts are per convective day inside the outcome region.

    Attributes
    ----------
    n_analogs : number of analog days counted (those with report coverage).
    p_any_event : share of analog days with at least one event.
    p_any_event_ci : its binomial interval at ``confidence``, (low, high).
    climatology_p_any_event : the same share over the season window's days (NaN without days).
    n_climatology_days : days of the season window (the reference).
    ratio_to_climatology : ``p_any_event / climatology_p_any_event`` (NaN when undefined).
    mean_events, climatology_mean_events : mean events per day, analogs and climatology.
    count_percentiles : Series indexed by ``percentile`` (0-100): percentiles of the
        analogs' event counts.
    thresholds : DataFrame indexed by ``min_events`` M, columns ``p_at_least``,
        ``p_at_least_low``, ``p_at_least_high`` (its interval) and ``climatology_p_at_least``.
    by_kind : DataFrame indexed by ``kind``, columns ``p_any``, ``mean``, ``p_any_low``,
        ``p_any_high`` and ``climatology_p_any``.
    confidence : level of the intervals (two-sided).
    interval_method : binomial interval method (e.g. ``"clopper-pearson"``).
    weighted : :class:`WeightedOutcomes` when the analogs were weighted, else None.
    has_events : False when the store has no events table (the statistics are then zeros).
    cyclone_quadrants : events around the tropical-cyclone centres of the analogs tagged
        tropical, the DataFrame of :func:`analogs.stages.outcomes.cyclone_relative_composite`
        (indexed by kind, quadrant; ``total`` and ``share`` columns), or None.
    skill : the stored cross-validated skill of such guidance (a dict of the store's
        manifest), or None when it was not measured.
    member_spread : for the outcomes pooled over the members of an ensemble target, how
        the members differ (a dict: ``n_members``, ``n_distinct_days``, ``n_effective``,
        ``p_any_event_ci_effective`` and the ``min``, ``median`` and ``max`` over members
        of ``p_any_event`` and ``mean_events``); None otherwise.

    Item access (``summary["p_any_event"]``) returns the attribute of that name, for
    scripts written against the earlier dict; :meth:`to_dict` gives the JSON block.
    """

    n_analogs: int
    p_any_event: float
    p_any_event_ci: tuple[float, float]
    climatology_p_any_event: float
    n_climatology_days: int
    ratio_to_climatology: float
    mean_events: float
    climatology_mean_events: float
    count_percentiles: pd.Series
    thresholds: pd.DataFrame
    by_kind: pd.DataFrame
    confidence: float
    interval_method: str
    weighted: WeightedOutcomes | None = None
    has_events: bool = True
    cyclone_quadrants: pd.DataFrame | None = None
    skill: dict | None = None
    member_spread: dict | None = None
    #: Analog days left out of the statistics: the events table does not cover them yet
    #: ("no reports yet"; issue 13). ``n_analogs`` counts the analog days with reports.
    n_analogs_without_reports: int = 0

    def __getitem__(self, name):
        if not isinstance(name, str) or name not in self.__dataclass_fields__:
            raise KeyError(name)
        return getattr(self, name)

    def __repr__(self) -> str:
        lo, hi = self.p_any_event_ci
        lines = [
            f"<OutcomeSummary of {self.n_analogs} analog days"
            + ("" if self.has_events else ", store without events") + ">",
            f"p_any_event {self.p_any_event:.3f} [{lo:.3f}, {hi:.3f}] "
            f"({100 * self.confidence:g}% {self.interval_method}); season climatology "
            f"{self.climatology_p_any_event:.3f} over {self.n_climatology_days} days "
            f"(ratio {self.ratio_to_climatology:.2f})",
            f"mean_events {self.mean_events:.2f} (climatology {self.climatology_mean_events:.2f})",
        ]
        if len(self.by_kind):
            lines += ["by_kind:", self.by_kind.to_string(float_format="{:.3f}".format)]
        if self.weighted is not None:
            lines.append(f"weighted: p_any_event {self.weighted.p_any_event:.3f} with "
                         f"{self.weighted.n_effective:.1f} effective analogs")
        if self.cyclone_quadrants is not None:
            lines.append("cyclone_quadrants: events around the tropical analogs' cyclones "
                         f"({len(self.cyclone_quadrants)} rows)")
        measured = bool(self.skill) and self.skill.get("measured") is not False
        lines.append("skill: " + (f"Brier skill score {self.skill.get('brier_skill_score')}"
                                  if measured else "not measured"))
        return "\n".join(lines)

    def replace(self, **changes) -> "OutcomeSummary":
        """A copy with some attributes changed (the summary itself is immutable)."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        """The ``"outcomes"`` block of ``analogs find --json`` (NaN -> None)."""
        thresholds = self.thresholds
        out = {
            "n_analogs": int(self.n_analogs),
            "p_any_event": _json_float(self.p_any_event),
            "p_any_event_ci": _json_interval(*self.p_any_event_ci),
            "climatology_p_any_event": _json_float(self.climatology_p_any_event),
            "n_climatology_days": int(self.n_climatology_days),
            "ratio_to_climatology": _json_float(self.ratio_to_climatology),
            "mean_events": _json_float(self.mean_events),
            "climatology_mean_events": _json_float(self.climatology_mean_events),
            "count_percentiles": {_percentile_key(p): _json_float(v)
                                  for p, v in self.count_percentiles.items()},
            "p_at_least": {_threshold_key(m): _json_float(p)
                           for m, p in thresholds["p_at_least"].items()},
            "p_at_least_ci": {_threshold_key(m): _json_interval(lo, hi) for m, lo, hi in
                              zip(thresholds.index, thresholds["p_at_least_low"],
                                  thresholds["p_at_least_high"])},
            "climatology_p_at_least": {_threshold_key(m): _json_float(p) for m, p in
                                       thresholds["climatology_p_at_least"].items()},
            "by_kind": {str(kind): {"p_any": _json_float(row.p_any),
                                    "mean": _json_float(row.mean),
                                    "p_any_ci": _json_interval(row.p_any_low, row.p_any_high),
                                    "climatology_p_any": _json_float(row.climatology_p_any)}
                        for kind, row in zip(self.by_kind.index, self.by_kind.itertuples())},
            "confidence": _json_float(self.confidence),
            "interval_method": self.interval_method,
        }
        if self.weighted is not None:
            out["weighted"] = self.weighted.to_dict()
        out["has_events"] = bool(self.has_events)
        if self.cyclone_quadrants is not None:
            quadrants = {}
            for (kind, quadrant), row in self.cyclone_quadrants.iterrows():
                quadrants.setdefault(str(kind), {})[str(quadrant)] = {
                    "events": int(row["total"]), "share": _json_float(row["share"])}
            out["cyclone_quadrants"] = quadrants
        out["skill"] = _json_value(self.skill) if self.skill is not None else None
        if self.member_spread is not None:
            out["member_spread"] = _json_value(self.member_spread)
        if self.n_analogs_without_reports:  # only then, so earlier answers keep their shape
            out["n_analogs_without_reports"] = int(self.n_analogs_without_reports)
        return out


def analog_kinds(analogs: pd.DataFrame) -> list[str]:
    """Event kinds with a count column (``events_<kind>``) in an analogs table."""
    return [c[len(EVENTS_PREFIX):] for c in analogs.columns
            if c.startswith(EVENTS_PREFIX) and c != EVENTS_TOTAL]


def analog_list(analogs: pd.DataFrame) -> list[dict]:
    """The ``"analogs"`` list of ``analogs find --json`` from an analogs table: rank,
    date, distance, regime, regime_confidence, events (total and by kind), and
    ``n_members`` where the table has that column (the pooled analogs of an ensemble)."""
    kinds = analog_kinds(analogs)
    columns = [EVENTS_PREFIX + kind for kind in kinds]
    members = analogs["n_members"].to_numpy(dtype=int) if "n_members" in analogs else None
    out = []
    for i, (row, counts) in enumerate(zip(analogs.itertuples(index=False),
                                          analogs[columns].to_numpy(dtype=int).tolist())):
        entry = {
            "rank": int(row.rank),
            "date": row.date,
            "distance": float(row.distance),
            "regime": row.regime,
            "regime_confidence": float(row.regime_confidence),
            "events": {"total": int(row.events_total), "by_kind": dict(zip(kinds, counts))},
        }
        if members is not None:
            entry["n_members"] = int(members[i])
        if "reports_known" in analogs and not bool(analogs["reports_known"].iat[i]):
            # A day the events table does not cover yet: its count is not known (issue 13).
            entry["events"] = {"total": None, "by_kind": {}}
            entry["reports"] = "none yet"
        out.append(entry)
    return out


@dataclass(frozen=True, eq=False, repr=False)
class FindResult:
    """The answer to one query: the target, its analogs and what they produced.

    Attributes
    ----------
    target : the target block: ``date`` (YYYY-MM-DD, the target's calendar day),
        ``regime``, ``regime_confidence`` and ``reason``; a field target partly outside
        its file adds ``uncovered_fraction``; an ensemble adds ``regime_probabilities``
        (label -> fraction of members) and ``n_members``; a member's block has
        ``member`` (its label in the file).
    analogs : DataFrame, one row per analog, best first: ``rank`` (1, 2, ...), ``date``
        (YYYY-MM-DD), ``distance`` (Euclidean distance between the two days' vectors of
        leading EOF scores, scaled PCs: dimensionless, 0 for identical patterns),
        ``regime``, ``regime_confidence``, ``events_total`` (events in the outcome region
        on that convective day), one ``events_<kind>`` column per event kind, and ``row``
        (the day's row in the store). For an ensemble, the distinct days chosen by any
        member, most chosen first: ``n_members`` (how many members chose the day) and
        ``distance`` the mean over those members.
    outcomes : :class:`OutcomeSummary` of the analog days; for an ensemble, pooled over
        every member's analogs (``n_analogs`` = members x top), with ``member_spread``.
    settings : what was asked for, resolved (top, window, exclusion, region, ...).
    region : the outcome region (:class:`analogs.stages.outcomes.Region`).
    target_fields : a ``field`` target's fields regridded to the store grid (Dataset,
        ``time`` of length one; with a ``member`` dim for an ensemble), as used for the
        query; None for a ``date`` target.
    members : for an ensemble target, one :class:`FindResult` per member (its own
        target block, analogs and outcomes); None otherwise.
    """

    target: dict
    analogs: pd.DataFrame
    outcomes: OutcomeSummary
    settings: dict = field(default_factory=dict)
    region: object = None
    target_fields: xr.Dataset | None = None
    members: tuple | None = None

    def __repr__(self) -> str:
        target = self.target
        ensemble = f", {len(self.members)} members" if self.members is not None else ""
        return (f"<FindResult: target {target.get('date')} ({target.get('regime')}{ensemble}), "
                f"{len(self.analogs)} analogs, p_any_event {self.outcomes.p_any_event:.3f}; "
                "see .analogs, .outcomes, .to_dict()>")

    @property
    def kinds(self) -> list[str]:
        """Event kinds counted in :attr:`analogs` (their ``events_<kind>`` columns)."""
        return analog_kinds(self.analogs)

    def member_dict(self) -> dict:
        """One entry of the ``"members"`` list: the member's target block (``member``,
        ``regime``, ``regime_confidence``, ...), its ``analogs`` and its ``outcomes``."""
        block = {key: value for key, value in self.target.items() if key != "date"}
        return {**block, "analogs": analog_list(self.analogs),
                "outcomes": self.outcomes.to_dict()}

    def to_dict(self) -> dict:
        """The JSON shape of ``analogs find --json`` (DESIGN.md): undefined numbers are
        None; an ensemble target adds ``"members"`` (:meth:`member_dict` of each)."""
        out = {"target": self.target, "analogs": analog_list(self.analogs),
               "outcomes": self.outcomes.to_dict(), "settings": self.settings,
               "caution": CAUTION}
        if self.members is not None:
            out["members"] = [member.member_dict() for member in self.members]
        return out


@dataclass(frozen=True, eq=False, repr=False)
class ValidTimesResult:
    """The answers for several valid times of one target file, in time order.

    Attributes
    ----------
    results : one :class:`FindResult` per valid time (each an ensemble result when the
        file has members).
    settings : what was asked for (the file, the times asked for, the query settings).
    """

    results: tuple
    settings: dict = field(default_factory=dict)

    def __repr__(self) -> str:
        return (f"<ValidTimesResult: {len(self.results)} valid times "
                f"{self.results[0].target.get('valid_time')} to "
                f"{self.results[-1].target.get('valid_time')}; see .results, .to_dict()>")

    def __len__(self) -> int:
        return len(self.results)

    def __iter__(self):
        return iter(self.results)

    def __getitem__(self, index) -> FindResult:
        return self.results[index]

    def to_dict(self) -> dict:
        """``{"valid_times": [<one find result per time>], "settings": ..., "caution":
        ...}`` (DESIGN.md)."""
        return {"valid_times": [result.to_dict() for result in self.results],
                "settings": self.settings, "caution": CAUTION}


#: The earlier name of :class:`FindResult`, kept so that existing imports keep working.
AnalogResult = FindResult
