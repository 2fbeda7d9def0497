"""Workflow: a loaded store version and what it answers (queries, skill, updates, retagging)."""

from __future__ import annotations

import contextlib
import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs import CAUTION, __version__
from analogs.workflows import store as store_io
from analogs._validation import check_choice, check_float, check_int
from analogs.stages.daily_climatology import HarmonicClimatology
from analogs.stages.eof import MultivariateEOF
from analogs.errors import AnalogsInputError, StoreError
from analogs.stages.index import INDEX_KINDS, AnalogIndex, recall_at_k
from analogs.stages.outcomes import (
    Region,
    analog_weights,
    cyclone_relative_composite,
    daily_event_counts,
    outcome_maps,
    read_events,
    summarize_outcomes,
)
from analogs.stages.selection import (DEFAULT_EXCLUDE, DEFAULT_SEPARATION, DEFAULT_TOP, DEFAULT_WINDOW,
                    candidate_ids, find_analogs)

WEIGHT_SCHEMES = ("equal", "inverse_distance", "gaussian")
# The readers (sources), the regime diagnostics (regimes) and the hindcast are imported
# inside the functions that use them: a query on an archive date needs none of them, and
# the start-up of `analogs find` is part of a forecaster's wait.


from analogs.workflows.build import (_diagnostic_region, _provenance, _quadrant_summary,
                                     _region_from_config, skill_by_month)


@dataclass
class AnalogResult:
    """The answer to one query: the target, its analogs and their outcomes."""

    target: dict
    analogs: pd.DataFrame
    outcomes: dict
    settings: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """The JSON shape of ``analogs find --json`` (DESIGN.md)."""
        analog_list = []
        for row in self.analogs.itertuples(index=False):
            analog_list.append({
                "rank": int(row.rank),
                "date": row.date,
                "distance": float(row.distance),
                "regime": row.regime,
                "regime_confidence": float(row.regime_confidence),
                "events": {"total": int(row.events_total), "by_kind": dict(row.events_by_kind)},
            })
        return {"target": self.target, "analogs": analog_list, "outcomes": self.outcomes,
                "settings": self.settings, "caution": CAUTION}


class AnalogStore:
    """A loaded store: the fitted climatology and EOFs, every day's PCs, events, tags."""

    def __init__(self, path, manifest, climatology, eof, pcs, events=None, tags=None):
        self.path = Path(path)
        self.manifest = manifest
        self.climatology = climatology
        self.eof = eof
        self.pcs = pcs
        self.events = events
        self.tags = tags
        self.times = pd.DatetimeIndex(pcs["time"].values)
        self.tag_attrs: dict = {}
        self._index = None

    @classmethod
    def load(cls, path, *, check=True):
        """Load the store at ``path``, verifying its checksums unless ``check=False``.

        A writer may swap a new version in while this reads; the read is then retried,
        so a reader gets one whole version, never a mix of two.
        """
        path = Path(path)
        attempts = 5
        for attempt in range(attempts):
            version = store_io.version_token(path)
            try:
                store = cls._load_version(path, check)
            except StoreError:
                if attempt < attempts - 1 and store_io.version_token(path) != version:
                    continue
                raise
            if store_io.version_token(path) == version:
                return store
        raise StoreError(f"store {path} kept changing while it was read; try again")

    @classmethod
    def _load_version(cls, path, check):
        manifest = store_io.verify(path) if check else store_io.read_manifest(path)
        files = manifest["files"]
        for required in (store_io.BASIS, store_io.SCORES):
            if required not in files:
                raise StoreError(f"store {path} lists no {required} in its manifest; rebuild it")
        basis_path = path / store_io.BASIS
        climatology = HarmonicClimatology.from_dataset(
            store_io.read_dataset(basis_path, group="climatology"))
        eof = MultivariateEOF.from_dataset(store_io.read_dataset(basis_path, group="eof"))
        pcs = store_io.read_dataset(path / store_io.SCORES)["pcs"]
        events = store_io.read_table(path / store_io.EVENTS) if store_io.EVENTS in files else None
        tags = store_io.read_table(path / store_io.TAGS) if store_io.TAGS in files else None
        if tags is not None:
            tags = tags.assign(date=pd.to_datetime(tags["date"])).set_index("date")
        store = cls(path, manifest, climatology, eof, pcs, events=events, tags=tags)
        if tags is not None:
            # The diagnostics' units and region, kept apart because pandas deep-copies
            # attrs on every operation, which would dominate a query's time.
            store.tag_attrs, tags.attrs = dict(tags.attrs), {}
        return store

    # -- derived state -------------------------------------------------------------
    @property
    def n_query_modes(self) -> int:
        """EOF modes used in queries: the tuned count when one was saved, else all."""
        return int(self.query_defaults.get("n_modes") or self.eof.n_modes_)

    @property
    def index(self) -> AnalogIndex:
        if self._index is None:
            kind = (self.manifest.get("index") or {}).get("kind", "auto")
            self._index = AnalogIndex(kind=kind).fit(self.pcs.values[:, :self.n_query_modes])
        return self._index

    @property
    def region(self) -> Region:
        return _region_from_config(self.manifest["config"].get("region"))

    @property
    def fields(self) -> list[str]:
        return list(self.manifest["config"]["fields"])

    @property
    def grid(self) -> tuple[np.ndarray, np.ndarray]:
        """Latitudes and longitudes of the store grid (degrees)."""
        if "_grid" not in self.__dict__:
            basis = self.eof.eofs_
            self._grid = (basis["lat"].values, basis["lon"].values)
        return self._grid

    @property
    def days(self) -> pd.DatetimeIndex:
        """Calendar days of the archive (the convective days the fields describe)."""
        if "_days" not in self.__dict__:
            self._days = self.times.normalize()
        return self._days

    # -- targets -------------------------------------------------------------------
    def day_row(self, date) -> int:
        try:
            day = pd.Timestamp(date).normalize()
        except (TypeError, ValueError):
            raise AnalogsInputError(f"--date {date!r} is not a date; expected YYYY-MM-DD") from None
        rows = np.flatnonzero(self.days == day)
        if rows.size == 0:
            raise AnalogsInputError(
                f"--date {day.date()} is outside the archive of store {self.path} "
                f"({self.days[0].date()} to {self.days[-1].date()}) or missing from it")
        return int(rows[0])

    def project(self, target: xr.Dataset) -> np.ndarray:
        """PC vector of a canonical target Dataset (one time) on any grid."""
        from analogs.stages.sources import regrid_to
        missing = [name for name in self.fields if name not in target.data_vars]
        if missing:
            raise AnalogsInputError(
                f"the target field lacks {', '.join(missing)}: the store was built from "
                f"{', '.join(self.fields)}")
        lat, lon = self.grid
        target = regrid_to(target[self.fields], lat, lon)
        anomalies = self.climatology.transform(target)
        pcs = self.eof.transform(anomalies)
        return np.asarray(pcs.values, dtype=float).reshape(-1)

    def regime_of_field(self, target: xr.Dataset, region: Region) -> dict:
        from analogs.stages.regimes import tag_days
        from analogs.stages.sources import regrid_to
        lat, lon = self.grid
        fields = regrid_to(target[self.fields], lat, lon)
        if "time" not in fields.dims:
            fields = fields.expand_dims(time=[pd.Timestamp("2000-01-01")])
        tags = tag_days(fields, _diagnostic_region(region, fields), progress=False)
        row = tags.iloc[0]
        return {"regime": str(row["regime"]), "regime_confidence": float(row["confidence"]),
                "reason": str(row.get("reason", ""))}

    def regime_of_day(self, row: int) -> dict:
        if self.tags is None:
            return {"regime": "other", "regime_confidence": 0.0, "reason": "no tags in store"}
        if "_regime_arrays" not in self.__dict__:
            reasons = self.tags["reason"] if "reason" in self.tags else pd.Series("", index=self.tags.index)
            self._regime_arrays = (self.tags["regime"].astype(str).to_numpy(),
                                   self.tags["confidence"].to_numpy(dtype=float),
                                   reasons.astype(str).to_numpy())
        regimes, confidences, reasons = self._regime_arrays
        return {"regime": str(regimes[row]), "regime_confidence": float(confidences[row]),
                "reason": str(reasons[row])}

    # -- queries -------------------------------------------------------------------
    def find(self, *, date=None, field=None, time=None, top=None, window=DEFAULT_WINDOW,
             exclude=None, separation=DEFAULT_SEPARATION, region=None, regime=None,
             weights="equal", confidence=0.9, sequence=0, kinds=None):
        """Closest archive days to a target and what they produced.

        Give exactly one of ``date`` (an archive day, YYYY-MM-DD) or ``field`` (a path
        or a canonical Dataset of a forecast field on any grid, with ``time`` its valid
        time when the file holds several). ``exclude`` defaults to
        ``DEFAULT_EXCLUDE`` days for a date target and to nothing for a field target.
        ``top`` defaults to the store's saved query default, else ``DEFAULT_TOP``.
        ``sequence`` (0, 1 or 2) also matches the target's preceding days, so analogs
        share the pattern's evolution (see :meth:`sequence_vectors`); a field target
        then needs those days in its file.
        """
        owner = "find"
        top = self.query_defaults.get("top", DEFAULT_TOP) if top is None else top
        if (date is None) == (field is None):
            raise AnalogsInputError("give exactly one target: --date YYYY-MM-DD or --field FILE")
        check_choice(weights, "weights", owner, WEIGHT_SCHEMES)
        confidence = check_float(confidence, "confidence", owner, min_value=0.5,
                                 max_value=1.0, max_inclusive=False)
        region = self._resolve_region(region)
        if date is not None:
            row = self.day_row(date)
            vector = self.pcs.values[row, :self.n_query_modes]
            if sequence:
                vector = self.sequence_vectors(sequence)[0][row]
            target_time = self.times[row]
            exclude = DEFAULT_EXCLUDE if exclude is None else exclude
            target = {"date": str(self.days[row].date()), **self.regime_of_day(row)}
        else:
            dataset = self._open_field(field, time)
            target_time = pd.Timestamp(dataset["time"].values[0])
            vector = self.project(dataset)
            if sequence:
                vector = self._field_sequence_vector(field, target_time, vector, sequence)
            target = {"date": str(target_time.date()), **self.regime_of_field(dataset, region)}
        restrict = None
        if regime is not None:
            restrict = self._regime_mask(regime)
        index = self.index
        if sequence:
            complete = self.sequence_vectors(sequence)[1]
            restrict = complete if restrict is None else restrict & complete
            index = self._sequence_index(sequence)
        else:
            vector = vector[:self.n_query_modes]
        chosen = find_analogs(index, self.times, vector, target_time=target_time,
                              top=top, window=window, exclude=exclude,
                              separation=separation, restrict=restrict)
        if chosen.empty:
            raise AnalogsInputError(
                "no archive day is allowed as an analog of this target "
                f"(season window +/-{window} d, exclusion {exclude} d"
                + (f", regime {regime}" if regime else "")
                + (f", sequence of {sequence} preceding days" if sequence else "")
                + "); widen --window or drop --regime")
        analogs = self._describe_analogs(chosen, region, kinds)
        outcomes = self._outcomes(analogs, target_time, window, region, weights, confidence,
                                  kinds)
        outcomes["skill"] = self.skill_for(target_time)
        settings = {"top": top, "window_days": window, "exclude_days": exclude,
                    "sequence_days": sequence, "kinds": kinds,
                    "separation_days": separation, "regime": regime,
                    "region": {**region.to_dict(), "label": region.label()}, "weights": weights,
                    "n_modes": self.n_query_modes, "store": str(self.path)}
        return AnalogResult(target=target, analogs=analogs, outcomes=outcomes, settings=settings)

    def target_fields(self, field, time=None) -> xr.Dataset:
        """A field target's canonical fields regridded to the store grid (for figures)."""
        from analogs.stages.sources import regrid_to
        lat, lon = self.grid
        return regrid_to(self._open_field(field, time)[self.fields], lat, lon)

    def _open_field(self, field, time) -> xr.Dataset:
        from analogs.stages.sources import open_target
        if isinstance(field, xr.Dataset):
            dataset = field
        else:
            dataset = open_target(field, time=time)
        if "time" not in dataset.dims or pd.isna(dataset["time"].values[0]):
            raise AnalogsInputError(
                f"the target field {field if not isinstance(field, xr.Dataset) else ''} has no "
                "valid time; its calendar day is needed for the climatology and the season "
                "window: write the valid time into the file")
        return dataset

    #: Weight of the day ``lag`` days before the target in a sequence match: 0.5 ** lag.
    SEQUENCE_DECAY = 0.5

    def sequence_vectors(self, sequence) -> tuple[np.ndarray, np.ndarray]:
        """Vectors of each day followed by its ``sequence`` preceding days.

        Row t is ``[pcs(t), w1 pcs(t-1), ..., ws pcs(t-s)]`` with ``w_lag = 0.5 ** lag``,
        so the Euclidean distance between two rows is the weighted distance of the two
        short sequences. The boolean array marks rows whose preceding days are all in
        the archive (consecutive calendar days); only those can be analogs.
        """
        sequence = check_int(sequence, "sequence", "find", min_value=0, max_value=2)
        cache = getattr(self, "_sequence_cache", {})
        if sequence not in cache:
            pcs = self.pcs.values[:, :self.n_query_modes]
            day_numbers = (self.days - pd.Timestamp("1970-01-01")).days.to_numpy()
            parts, complete = [pcs], np.ones(len(pcs), dtype=bool)
            for lag in range(1, sequence + 1):
                shifted = np.roll(pcs, lag, axis=0)
                complete &= np.roll(day_numbers, lag) == day_numbers - lag
                parts.append(self.SEQUENCE_DECAY ** lag * shifted)
            complete[:sequence] = False
            cache[sequence] = (np.hstack(parts), complete)
            self._sequence_cache = cache
        return cache[sequence]

    def _sequence_index(self, sequence) -> AnalogIndex:
        indexes = getattr(self, "_sequence_indexes", {})
        if sequence not in indexes:
            indexes[sequence] = AnalogIndex(kind="auto").fit(self.sequence_vectors(sequence)[0])
            self._sequence_indexes = indexes
        return indexes[sequence]

    def _field_sequence_vector(self, field, target_time, vector, sequence) -> np.ndarray:
        from analogs.stages.sources import open_target
        if isinstance(field, xr.Dataset):
            raise AnalogsInputError("a sequence match of a field needs its file (with the "
                                    "preceding days), not a Dataset")
        parts = [vector[:self.n_query_modes]]
        for lag in range(1, sequence + 1):
            earlier = target_time - pd.Timedelta(days=lag)
            try:
                previous = open_target(field, time=earlier.isoformat())
            except AnalogsInputError as error:
                raise AnalogsInputError(
                    f"--sequence {sequence}: {field} must also hold the field of "
                    f"{earlier:%Y-%m-%dT%H:%M} ({error})") from None
            parts.append(self.SEQUENCE_DECAY ** lag * self.project(previous)[:self.n_query_modes])
        return np.concatenate(parts)

    def _resolve_region(self, region) -> Region:
        if region is None:
            region = self.region
        elif isinstance(region, str):
            region = Region.parse(region)
        lat, lon = self.grid
        region.require_grid_points(lat, lon)
        return region

    def _regime_mask(self, regime) -> np.ndarray:
        from analogs.stages.regimes import REGIME_LABELS
        if self.tags is None:
            raise AnalogsInputError(f"--regime {regime}: store {self.path} has no tags")
        known = sorted(self.tags["regime"].unique())
        labels = set(REGIME_LABELS) | set(known)
        if regime not in labels:
            raise AnalogsInputError(
                f"--regime {regime!r} is not a regime label; expected one of {', '.join(sorted(labels))}")
        return (self.tags["regime"] == regime).to_numpy()

    def daily_counts(self, region, kinds=None) -> pd.DataFrame:
        """Events in ``region`` on every archive day (rows aligned with ``times``),
        one column per kind plus ``total``; computed once per region and kept."""
        key = (region, None if kinds is None else tuple(sorted(kinds)))
        cache = self.__dict__.setdefault("_count_cache", {})
        if key not in cache:
            if self.events is None:
                cache[key] = pd.DataFrame({"total": np.zeros(len(self.days), dtype=int)},
                                          index=self.days)
            else:
                cache[key] = daily_event_counts(self.events, self.days, region, kinds=kinds)
        return cache[key]

    def _describe_analogs(self, chosen: pd.DataFrame, region, kinds=None) -> pd.DataFrame:
        days = pd.DatetimeIndex(chosen["time"]).normalize()
        counts = self.daily_counts(region, kinds).iloc[chosen["row"].to_numpy()]
        kind_columns = [c for c in counts.columns if c != "total"]
        regimes = [self.regime_of_day(int(r)) for r in chosen["row"]]
        by_kind = counts[kind_columns].to_numpy(dtype=int)
        return pd.DataFrame({
            "rank": chosen["rank"].to_numpy(),
            "date": [str(d.date()) for d in days],
            "distance": chosen["distance"].to_numpy(),
            "regime": [r["regime"] for r in regimes],
            "regime_confidence": [r["regime_confidence"] for r in regimes],
            "events_total": counts["total"].to_numpy(dtype=int),
            "events_by_kind": [dict(zip(kind_columns, row.tolist())) for row in by_kind],
            "row": chosen["row"].to_numpy(),
        })

    def _outcomes(self, analogs, target_time, window, region, weights, confidence,
                  kinds=None) -> dict:
        counts = self.daily_counts(region, kinds)
        analog_counts = counts.iloc[analogs["row"].to_numpy()]
        if target_time is not None and window is not None:
            season = candidate_ids(self.times, target_time, window=window, exclude=None)
        else:
            season = np.arange(len(self.times))
        climatology_counts = counts.iloc[season]
        weight_values = None
        if weights != "equal" and len(analogs):
            weight_values = analog_weights(analogs["distance"].to_numpy(), scheme=weights)
        summary = summarize_outcomes(analog_counts, climatology_counts, weights=weight_values,
                                     confidence=confidence)
        summary["has_events"] = self.events is not None
        # Reports around the cyclone of the analogs tagged tropical (the cyclone days
        # that matter for the region); skipped, at no cost, when there are none.
        tropical = analogs.loc[analogs["regime"] == "tropical", "row"].to_numpy()
        composite = self.cyclone_composite(tropical) if tropical.size else None
        if composite is not None:
            summary["cyclone_quadrants"] = _quadrant_summary(composite)
        return summary

    # -- cross-validated skill -------------------------------------------------------
    def skill_for(self, target_time=None) -> dict | None:
        """The stored cross-validated skill of the default settings, for the target's
        month when known (see :func:`skill_by_month`); None when not measured."""
        skill = self.manifest.get("skill")
        if not skill:
            return None
        answer = {"method": skill["method"], "region": skill["region"],
                  "brier_skill_score": skill["brier_skill_score"],
                  "brier_skill_score_ci": skill["brier_skill_score_ci"],
                  "roc_auc": skill["roc_auc"]}
        if target_time is not None:
            month = skill["by_month"].get(str(pd.Timestamp(target_time).month))
            if month:
                answer["month"] = int(pd.Timestamp(target_time).month)
                answer["month_brier_skill_score"] = month["brier_skill_score"]
                answer["month_base_rate"] = month["base_rate"]
        return answer

    def observed(self, region=None, kinds=None) -> np.ndarray:
        """Whether at least one event (of ``kinds``, default any) fell in the region on
        each archive day."""
        if self.events is None:
            raise AnalogsInputError(f"store {self.path} has no events table: verification needs "
                                    "one (rebuild with --events FILE)")
        region = self._resolve_region(region)
        return self.daily_counts(region, kinds)["total"].to_numpy() > 0

    def verify(self, *, top=None, window=DEFAULT_WINDOW, separation=DEFAULT_SEPARATION,
               n_modes=None, region=None, months=None, threshold=0.3, n_resamples=500,
               kinds=None, progress=False) -> dict:
        """Leave-one-year-out hindcast scores, with the random-analog baseline beside them."""
        from analogs.stages.hindcast import leave_one_year_out, score_hindcast
        threshold = check_float(threshold, "threshold", "verify", min_value=0.0, max_value=1.0)
        defaults = self.query_defaults
        top = defaults.get("top", DEFAULT_TOP) if top is None else top
        n_modes = defaults.get("n_modes") if n_modes is None else n_modes
        region = self._resolve_region(region)
        observed = self.observed(region, kinds)
        common = dict(top=top, window=window, separation=separation, n_modes=n_modes,
                      months=months)
        hindcast = leave_one_year_out(self.pcs.values, self.times, observed, progress=progress,
                                      **common)
        summary = score_hindcast(hindcast, threshold=threshold, n_resamples=n_resamples)
        baseline = score_hindcast(leave_one_year_out(self.pcs.values, self.times, observed,
                                                     method="random", **common),
                                  threshold=threshold, n_resamples=n_resamples)
        summary["random_analogs"] = {k: baseline[k] for k in
                                     ("brier_score", "brier_skill_score", "brier_skill_score_ci",
                                      "roc_auc")}
        summary["settings"] = {"top": top, "n_modes": int(n_modes or self.eof.n_modes_),
                               "window": window, "separation": separation,
                               "months": None if months is None else sorted(months),
                               "region": region.to_dict(), "threshold": threshold,
                               "kinds": kinds, "method": "leave-one-year-out"}
        return summary

    def tune(self, *, tops=(10, 20, 30, 50), modes=(5, 10, 15, 20), window=DEFAULT_WINDOW,
             separation=DEFAULT_SEPARATION, region=None, months=None, kinds=None, progress=False):
        """Brier skill score of each (number of analogs, number of modes), best first."""
        from analogs.stages.hindcast import tune
        modes = tuple(modes) + (int(self.eof.n_modes_),)
        return tune(self.pcs.values, self.times, self.observed(region, kinds), tops=tops, modes=modes,
                    window=window, separation=separation, months=months, progress=progress)

    @property
    def query_defaults(self) -> dict:
        """Query settings recorded in the store (by ``analogs verify --tune --save``)."""
        return dict(self.manifest.get("query_defaults") or {})

    def save_query_defaults(self, **settings) -> None:
        """Record query settings (``top``, ``n_modes``) in the store's manifest."""
        manifest = store_io.editable(self.manifest)
        manifest["query_defaults"] = {**self.query_defaults, **settings}
        with store_io.writing(self.path, manifest, keep=tuple(self.manifest["files"])):
            pass
        self.manifest = store_io.verify(self.path)

    # -- where the reports fell ------------------------------------------------------
    def outcome_maps(self, result: AnalogResult) -> xr.Dataset:
        """Neighbourhood probability (40 km) and practically-perfect report density of
        the analog days of ``result`` on the store grid (:func:`analogs.stages.outcomes.outcome_maps`)."""
        if self.events is None:
            raise AnalogsInputError(f"store {self.path} has no events table: maps need one")
        lat, lon = self.grid
        days = pd.DatetimeIndex(pd.to_datetime(result.analogs["date"]))
        maps = outcome_maps(self.events, days, lat, lon)
        maps.attrs.update({"target": str(result.target["date"]),
                           "n_analogs": int(len(days)), "source": f"analogs store {self.path}"})
        return maps

    def cyclone_centres(self, rows=None) -> pd.DataFrame:
        """Tropical-cyclone centres found by the regime diagnostics (day, lat, lon) on the
        archive days of ``rows`` (default all)."""
        if self.tags is None or "tc_lat" not in self.tags:
            return pd.DataFrame(columns=["day", "lat", "lon"])
        rows = np.arange(len(self.tags)) if rows is None else np.asarray(rows, dtype=int)
        lat = self.tags["tc_lat"].to_numpy()[rows]
        present = ~np.isnan(lat)
        return pd.DataFrame({"day": self.tags.index[rows][present], "lat": lat[present],
                             "lon": self.tags["tc_lon"].to_numpy()[rows][present]})

    def cyclone_composite(self, rows=None, *, frame="earth") -> pd.DataFrame | None:
        """Events around tropical-cyclone centres on the archive days of ``rows`` (default
        all) by quadrant and distance (:func:`analogs.stages.outcomes.cyclone_relative_composite`);
        None when no day has a cyclone or the store has no events."""
        centres = self.cyclone_centres(rows)
        if self.events is None or centres.empty:
            return None
        events = self.events[self.events["day"].isin(centres["day"])]
        return cyclone_relative_composite(events, centres, frame=frame)

    # -- appending days ----------------------------------------------------------------
    def update(self, paths, *, events=None, progress=True) -> dict:
        """Append new days from ``paths``, projected on the existing climatology and EOFs.

        Days already in the store are skipped, so appending the same files twice changes
        nothing. Files on another grid or with other fields are refused. When the new
        days' median reconstruction error exceeds the archive's 99th percentile, a warning
        suggests a rebuild: the EOFs no longer describe them well. ``events`` replaces the
        events table. Returns a summary (days added, skipped, drift figures).
        """
        from analogs.stages.regimes import tag_days
        from analogs.stages.sources import open_archive
        config = self.manifest["config"]
        domain = config.get("domain")
        archive = open_archive(paths, fields=self.fields, region=domain, hour=config["hour"],
                               daily=config["daily"], progress=progress)
        lat, lon = self.grid
        names = ", ".join(str(p) for p in paths)
        if (archive.sizes["lat"], archive.sizes["lon"]) != (lat.size, lon.size) or not (
                np.allclose(archive["lat"].values, lat) and np.allclose(archive["lon"].values, lon)):
            raise AnalogsInputError(
                f"{names}: grid {archive.sizes['lat']} x {archive.sizes['lon']} "
                f"(lat {float(archive.lat.min()):g} to {float(archive.lat.max()):g}, lon "
                f"{float(archive.lon.min()):g} to {float(archive.lon.max()):g}) differs from the "
                f"store's {lat.size} x {lon.size}; update needs the store's grid (or rebuild)")
        extra = sorted(set(archive.data_vars) - set(self.fields))
        if extra:
            raise AnalogsInputError(f"{names}: fields {', '.join(extra)} are not in the store "
                                    f"({', '.join(self.fields)}); rebuild to use them")
        new_times = pd.DatetimeIndex(archive["time"].values)
        fresh = ~new_times.normalize().isin(self.days)
        added = archive.isel(time=np.flatnonzero(fresh))
        summary = {"days_in_files": int(len(new_times)), "days_added": int(fresh.sum()),
                   "days_already_present": int((~fresh).sum())}
        event_table = read_events(events) if events is not None else None
        if not fresh.any() and event_table is None:
            return summary
        manifest = store_io.editable(self.manifest)
        pcs, tags, tag_attrs = self.pcs, self.tags, dict(self.tag_attrs)
        if fresh.any():
            anomalies = self.climatology.transform(added)
            new_pcs = self.eof.transform(anomalies).transpose("time", "mode")
            errors = self.eof.reconstruction_error(anomalies).values
            reference = manifest["archive"].get("reconstruction_error") or {}
            summary["new_days_median_reconstruction_error"] = float(np.median(errors))
            summary["archive_p99_reconstruction_error"] = reference.get("p99")
            if reference.get("p99") and np.median(errors) > reference["p99"]:
                warnings.warn(
                    f"the appended days are unlike the archive (median EOF reconstruction error "
                    f"{np.median(errors):.3g} above the archive's 99th percentile "
                    f"{reference['p99']:.3g}); consider rebuilding the store", stacklevel=2)
            pcs = xr.concat([self.pcs, new_pcs.assign_coords(mode=self.pcs["mode"])], dim="time")
            order = np.argsort(pcs["time"].values, kind="stable")
            pcs = pcs.isel(time=order)
            new_tags = tag_days(added, _diagnostic_region(self.region, added), progress=False)
            new_tags = new_tags.set_index("date")
            tag_attrs = tag_attrs or dict(new_tags.attrs)
            tags = new_tags if self.tags is None else pd.concat([self.tags, new_tags]).sort_index()
            times = pd.DatetimeIndex(pcs["time"].values)
            manifest["archive"] = {**manifest["archive"], "n_days": int(len(times)),
                                   "time_start": times[0].isoformat(),
                                   "time_end": times[-1].isoformat(),
                                   "inputs": manifest["archive"]["inputs"] + _provenance(paths)}
        if event_table is not None:
            manifest["events"] = {"source": str(Path(events).resolve()),
                                  "n_events": int(len(event_table)),
                                  "kinds": sorted(event_table["kind"].unique().tolist())}
        manifest.setdefault("updates", []).append({
            "written": pd.Timestamp.now(tz="UTC").isoformat(timespec="seconds"),
            "inputs": [str(Path(p).resolve()) for p in paths],
            "missing_data": json.loads(archive.attrs.get("missing_data", "{}")), **summary})
        keep = [store_io.BASIS] + ([store_io.EVENTS] if event_table is None and self.events is not None else [])
        with store_io.writing(self.path, manifest, keep=keep) as staged:
            store_io.write_dataset(xr.Dataset({"pcs": pcs.astype("float64")},
                                              attrs={"title": "analogs store principal components",
                                                     "Conventions": "CF-1.8"}),
                                   staged / store_io.SCORES)
            if event_table is not None:
                store_io.write_table(event_table, staged / store_io.EVENTS)
            if tags is not None:
                table = tags.reset_index()
                table.attrs = tag_attrs
                store_io.write_table(table, staged / store_io.TAGS)
        return summary

    # -- regimes ----------------------------------------------------------------------
    def retag(self, *, rules=None, kmeans=None, labelled_days=None, progress=False) -> pd.DataFrame:
        """Re-classify every day and keep the result (and any learned model) in the store.

        ``rules`` (a TOML path or :class:`~analogs.stages.regimes.RegimeRules`) re-applies the
        rule classifier to the diagnostics kept at build, so no archive is needed.
        ``kmeans`` (number of clusters) adds unsupervised regimes of the PCs in a
        ``kmeans_regime`` column; ``labelled_days`` (a CSV of ``date,regime``) trains the
        supervised classifier and adds ``learned_regime`` and ``learned_confidence``.
        Learned models are stored as arrays in ``models.nc`` (never pickled).
        """
        from analogs.stages.regimes import KMeansRegimes, RegimeRules, RuleClassifier, SupervisedRegimes
        if self.tags is None:
            raise AnalogsInputError(f"store {self.path} has no tags; rebuild it with analogs build")
        tags = self.tags.copy()
        if rules is not None:
            rules = rules if isinstance(rules, RegimeRules) else RegimeRules.load(rules)
            diagnostics = tags.copy()
            diagnostics.attrs = dict(self.tag_attrs)
            labels = RuleClassifier(rules).predict(diagnostics)
            tags[["regime", "confidence", "reason"]] = labels[["regime", "confidence", "reason"]].to_numpy()
        models = {}
        if kmeans is not None:
            model = KMeansRegimes(n_regimes=check_int(kmeans, "kmeans", "tag", min_value=2))
            model.fit(self.pcs)
            tags["kmeans_regime"] = model.labels_
            models["kmeans"] = model.to_dataset()
        if labelled_days is not None:
            model = SupervisedRegimes().fit(self.pcs, labelled_days)
            probabilities = model.predict_proba(self.pcs)
            tags["learned_regime"] = model.predict(self.pcs)
            tags["learned_confidence"] = np.max(np.asarray(probabilities), axis=1)
            models["supervised"] = model.to_dataset()
        manifest = store_io.editable(self.manifest)
        if rules is not None:
            manifest["regime_rules"] = rules.to_dict()
        if models:
            manifest["regime_models"] = sorted(models)
        keep = [name for name in self.manifest["files"]
                if name not in (store_io.TAGS, store_io.MODELS) or (name == store_io.MODELS and not models)]
        with store_io.writing(self.path, manifest, keep=keep) as staged:
            table = tags.reset_index()
            table.attrs = dict(self.tag_attrs)
            store_io.write_table(table, staged / store_io.TAGS)
            for mode, (name, dataset) in zip(("w", "a"), sorted(models.items())) if models else ():
                store_io.write_dataset(dataset, staged / store_io.MODELS, group=name, mode=mode)
        self.tags = tags
        self.__dict__.pop("_regime_arrays", None)
        self.manifest = store_io.verify(self.path)
        return tags
