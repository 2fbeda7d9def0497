"""Workflow: a loaded store version and what it answers (queries, skill, updates, retagging)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs.errors import StoreError
from analogs.results import FindResult
from analogs.stages.index import AnalogIndex
from analogs.stages.outcomes import EVENT_COLUMNS, Region
from analogs.workflows import find as find_workflow
from analogs.workflows import store as store_io

if TYPE_CHECKING:
    import xarray as xr

# The climatology and EOFs (xarray, dask) are read from basis.nc when first used: a query
# of an archive date reads only the PCs, tags, events and the stored daily counts.

#: Columns every store's tags table holds (the diagnostics follow them).
TAG_COLUMNS = ("date", "regime", "confidence")


def _require_columns(path, name, table, columns) -> None:
    """Refuse a store table (checksums valid) that lacks columns every reader needs."""
    if table is None:
        return
    missing = [column for column in columns if column not in table.columns]
    if missing:
        raise StoreError(f"store {path}: {name} lacks the column(s) {', '.join(missing)} "
                         f"(it holds {', '.join(map(str, table.columns[:8])) or 'none'}); "
                         "it was not written by analogs: rebuild the store")


def region_from_config(config) -> Region:
    """The store's outcome region from its manifest's ``config["region"]``."""
    return Region.whole() if config is None else Region.from_dict(config)


def counts_region_attrs(region: Region) -> dict:
    """How ``counts.parquet`` names the region it counts (JSON-normalised, so it compares
    equal after the Parquet metadata round trip)."""
    return {"region": json.loads(json.dumps(region.to_dict()))}


class AnalogStore:
    """A loaded store: the fitted climatology and EOFs, every day's PCs, events, tags.

    One immutable version of the store as it was loaded: its caches never go stale,
    because the object never changes. Writes (:meth:`update`, :meth:`retag`,
    :meth:`save_query_defaults`) apply to the store's current version under the writer
    lock and return a new object; use that one (``store = store.update(files)``).

    Loading reads the PCs (``pc_values``, ``times``), the tags, the events and the stored
    daily counts of the store's region; ``climatology``, ``eof`` and the labelled
    ``pcs`` are made when first used (``basis.nc`` is then checked against the checksum
    of the version loaded, so an object never mixes two versions).
    """

    def __init__(self, path, manifest, scores, events=None, tags=None, counts=None):
        self.path = Path(path)
        self.manifest = manifest
        self.pc_values = scores["values"]
        self.times = scores["times"]
        self._scores = scores
        self.events = events
        self.tags = tags
        self.stored_counts = counts
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
    def _load_version(cls, path, check=True, *, manifest=None):
        """Read one version of the store at ``path``. ``manifest``: its manifest, already
        read and checked (inside :func:`~analogs.workflows.store.transaction`, where no
        writer can swap a version in); else it is read here, its checksums checked
        unless ``check=False``."""
        path = Path(path)
        if manifest is None:
            manifest = store_io.check_checksums(path) if check else store_io.read_manifest(path)
        files = manifest["files"]
        for required in (store_io.BASIS, store_io.SCORES):
            if required not in files:
                raise StoreError(f"store {path} lists no {required} in its manifest; rebuild it")
        scores = store_io.read_scores(path / store_io.SCORES)
        n_days = len(scores["times"])
        events = store_io.read_table(path / store_io.EVENTS) if store_io.EVENTS in files else None
        tags = store_io.read_table(path / store_io.TAGS) if store_io.TAGS in files else None
        _require_columns(path, store_io.EVENTS, events, EVENT_COLUMNS)
        _require_columns(path, store_io.TAGS, tags, TAG_COLUMNS)
        if tags is not None and len(tags) != n_days:
            raise StoreError(f"store {path}: {store_io.TAGS} has {len(tags)} rows for the "
                             f"{n_days} days of {store_io.SCORES}; rebuild the store")
        if tags is not None:
            tags = tags.assign(date=pd.to_datetime(tags["date"])).set_index("date")
        counts = None
        if events is not None and store_io.COUNTS in files:
            counts = store_io.read_table(path / store_io.COUNTS)
        store = cls(path, manifest, scores, events=events, tags=tags)
        # The grid (two short vectors of basis.nc) is read with the version it belongs to.
        store._grid = store_io.read_grid(path / store_io.BASIS)
        store.stored_counts = store._checked_counts(counts)
        if tags is not None:
            # The diagnostics' units and region, kept apart because pandas deep-copies
            # attrs on every operation, which would dominate a query's time.
            store.tag_attrs, tags.attrs = dict(tags.attrs), {}
        return store

    def _checked_counts(self, counts) -> pd.DataFrame | None:
        """The stored daily counts (:data:`~analogs.workflows.store.COUNTS`) indexed by the
        archive days, when they count this store's region over its days; else None (they
        are then counted from the events when a query asks)."""
        if counts is None:
            return None
        day = counts.columns[0] if len(counts.columns) else None
        if (day is None or "total" not in counts.columns
                or counts.attrs != counts_region_attrs(self.region)
                or not pd.DatetimeIndex(counts[day]).equals(self.days)):
            raise StoreError(f"store {self.path}: {store_io.COUNTS} does not hold the daily "
                             f"counts of its {len(self.times)} days in its region; rebuild "
                             "the store")
        counts = counts.set_index(day)
        counts.attrs = {}
        return counts

    # -- read when first used ---------------------------------------------------------
    def _basis(self, group):
        """A group of this version's ``basis.nc``, checked against its loaded checksum."""
        basis_path = self.path / store_io.BASIS
        expected = (self.manifest["files"].get(store_io.BASIS) or {}).get("sha256")
        if expected is not None and store_io.sha256_file(basis_path) != expected:
            raise StoreError(f"store {self.path} was replaced by a new version since this "
                             "object was loaded; load it again")
        return store_io.read_dataset(basis_path, group=group)

    @property
    def climatology(self):
        """The fitted daily climatology (:class:`~analogs.stages.daily_climatology.HarmonicClimatology`)."""
        if "_climatology" not in self.__dict__:
            from analogs.stages.daily_climatology import HarmonicClimatology
            self._climatology = HarmonicClimatology.from_dataset(self._basis("climatology"))
        return self._climatology

    @property
    def eof(self):
        """The fitted EOFs (:class:`~analogs.stages.eof.MultivariateEOF`)."""
        if "_eof" not in self.__dict__:
            from analogs.stages.eof import MultivariateEOF
            self._eof = MultivariateEOF.from_dataset(self._basis("eof"))
        return self._eof

    @property
    def pcs(self):
        """Every day's PCs as a labelled ``(time, mode)`` DataArray (``pc_values`` is the
        same array, unlabelled)."""
        if "_pcs" not in self.__dict__:
            import xarray as xr
            scores = self._scores
            self._pcs = xr.DataArray(
                self.pc_values, dims=("time", scores["mode_name"]), name="pcs",
                coords={"time": self.times.values, scores["mode_name"]: scores["modes"]},
                attrs=scores["attrs"])
        return self._pcs

    # -- derived state -------------------------------------------------------------
    @property
    def n_modes(self) -> int:
        """EOF modes kept by the build (the stored PCs' columns; the EOFs are not read)."""
        return int(self.pc_values.shape[1])

    @property
    def n_query_modes(self) -> int:
        """EOF modes used in queries: the tuned count when one was saved, else all."""
        return int(self.query_defaults.get("n_modes") or self.n_modes)

    @property
    def index(self) -> AnalogIndex:
        if self._index is None:
            kind = (self.manifest.get("index") or {}).get("kind", "auto")
            self._index = AnalogIndex(kind=kind).fit(self.pc_values[:, :self.n_query_modes])
        return self._index

    @property
    def region(self) -> Region:
        return region_from_config(self.manifest["config"].get("region"))

    @property
    def covered(self) -> np.ndarray:
        """Whether each archive day has report coverage (bool, aligned with ``times``):
        the events table is its report record (:mod:`analogs.workflows.reports`). Days
        without coverage are left out of outcome statistics, climatology and skill."""
        if "_covered" not in self.__dict__:
            from analogs.workflows.reports import covered_mask
            self._covered = covered_mask(self.manifest, self.days,
                                         has_events=self.events is not None)
        return self._covered

    @property
    def fields(self) -> list[str]:
        return list(self.manifest["config"]["fields"])

    @property
    def grid(self) -> tuple[np.ndarray, np.ndarray]:
        """Latitudes and longitudes of the store grid (degrees)."""
        return self._grid

    @property
    def land(self) -> xr.DataArray | None:
        """Land fraction (0 sea to 1 land) on the store grid, from the land-sea mask the
        build was given or found (``manifest["land_mask"]`` says which); None without
        one. Read on first use: only maps draw it."""
        if "_land" not in self.__dict__:
            self._land = None
            if self.manifest.get("land_mask"):
                self._land = store_io.read_dataset(self.path / store_io.BASIS,
                                                   group=store_io.LAND_GROUP)["land"]
        return self._land

    @property
    def days(self) -> pd.DatetimeIndex:
        """Calendar days of the archive (the convective days the fields describe)."""
        if "_days" not in self.__dict__:
            self._days = self.times.normalize()
        return self._days

    # -- queries (analogs.workflows.find) -------------------------------------------
    def day_row(self, date) -> int:
        """Row of the archive day ``date`` (YYYY-MM-DD) (:func:`analogs.workflows.find.day_row`)."""
        return find_workflow.day_row(self, date)

    def find(self, **options) -> FindResult:
        """Closest archive days to a target and what they produced: a
        :class:`~analogs.results.FindResult` (see :func:`analogs.workflows.find.find` for
        the options: ``date`` or ``field`` [``time``], ``top``, ``window``, ``exclude``,
        ``separation``, ``region``, ``regime``, ``weights``, ``confidence``, ``sequence``,
        ``kinds``); for ``time="all"`` or ``"START/END"`` a
        :class:`~analogs.results.ValidTimesResult`, one result per valid time."""
        return find_workflow.find(self, **options)

    def find_many(self, dates, **options) -> list[FindResult]:
        """:meth:`find` for many archive ``dates`` (a list, or the path of a text file
        with one YYYY-MM-DD a line) in one process, each answer the one ``find(date=...)``
        gives (:func:`analogs.workflows.find.find_many`)."""
        return find_workflow.find_many(self, dates, **options)

    def daily_counts(self, region, kinds=None) -> pd.DataFrame:
        """Events in ``region`` on every archive day, one column per kind plus ``total``
        (:func:`analogs.workflows.find.daily_counts`; computed once and kept)."""
        return find_workflow.daily_counts(self, region, kinds)

    # -- cross-validated skill -------------------------------------------------------
    def skill_for(self, target_time=None, *, region=None, kinds=None, **options) -> dict | None:
        """The cross-validated skill of a query for ``region`` and ``kinds``, for the
        target's month when known (:func:`analogs.workflows.skill.skill_for`)."""
        from analogs.workflows import skill
        return skill.skill_for(self, target_time, region=region, kinds=kinds, **options)

    def observed(self, region=None, kinds=None) -> np.ndarray:
        """Whether at least one event (of ``kinds``, default any) fell in the region on
        each archive day (:func:`analogs.workflows.skill.observed`)."""
        from analogs.workflows import skill
        return skill.observed(self, region, kinds)

    def verify(self, **settings) -> dict:
        """Leave-one-year-out hindcast scores, with the random-analog baseline beside them
        (:func:`analogs.workflows.skill.verify`, which lists the settings)."""
        from analogs.workflows import skill
        return skill.verify(self, **settings)

    def tune(self, **settings) -> pd.DataFrame:
        """Brier skill score of each (number of analogs, number of modes), best first
        (:func:`analogs.workflows.skill.tune`, which lists the settings)."""
        from analogs.workflows import skill
        return skill.tune(self, **settings)

    @property
    def query_defaults(self) -> dict:
        """Query settings recorded in the store (by ``analogs verify --tune --save``)."""
        return dict(self.manifest.get("query_defaults") or {})

    def save_query_defaults(self, **settings) -> "AnalogStore":
        """Record query settings (``top``, ``n_modes``) in the store's manifest and return
        the new store, whose queries use them (this object keeps its version).
        See :func:`analogs.workflows.tagging.save_query_defaults`."""
        from analogs.workflows.tagging import save_query_defaults
        return save_query_defaults(self.path, **settings)

    # -- where the reports fell ------------------------------------------------------
    def cyclone_composite(self, rows=None, *, frame="earth") -> pd.DataFrame | None:
        """Events around tropical-cyclone centres on the archive days of ``rows`` (default
        all) by quadrant and distance (:func:`analogs.workflows.find.cyclone_composite`)."""
        return find_workflow.cyclone_composite(self, rows, frame=frame)

    # -- writing new versions -----------------------------------------------------------
    #: Summary of the update that returned this store (days added, skipped, drift
    #: figures; see :meth:`update`); None for a store not returned by an update.
    last_update: dict | None = None
    #: Training figures of the retag that returned this store (the learned model's
    #: cross-validated accuracy and its table against the rule regimes); None otherwise.
    last_retag: dict | None = None

    def update(self, paths, *, events=None, event_dates="time-required", events_period=None,
               progress=True) -> "AnalogStore":
        """Append new days from ``paths`` to the store, projected on its climatology and
        EOFs, and merge the reports of ``events`` by date; return the new store (its
        ``last_update`` is the summary).

        The update applies to the store's current version on disk (loaded under the
        writer lock), not to this object, which keeps the version it was loaded as.
        Days already in the store are skipped, so appending the same files twice changes
        nothing. See :func:`analogs.workflows.update.update_store`.
        """
        from analogs.workflows.update import update_store
        return update_store(self.path, paths, events=events, event_dates=event_dates,
                            events_period=events_period, progress=progress)

    def retag(self, *, rules=None, kmeans=None, labelled_days=None,
              progress=False) -> "AnalogStore":
        """Re-classify every day and keep the result (and any learned model) in the
        store; return the new store (its ``tags`` hold the new columns).
        See :func:`analogs.workflows.tagging.retag_store`."""
        from analogs.workflows.tagging import retag_store
        return retag_store(self.path, rules=rules, kmeans=kmeans,
                           labelled_days=labelled_days, progress=progress)
