"""Workflow: build a store from archive files (read, climatology, EOFs, tags, skill, write)."""

from __future__ import annotations

import contextlib
import contextvars
import json
import re
import shutil
import sys
import tempfile
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs import __version__
from analogs._duck_arrays import duck_array_imports_deferred
from analogs.workflows import store as store_io
from analogs._validation import fail, renamed_errors
from analogs.stages.daily_climatology import HarmonicClimatology
from analogs.stages.eof import MultivariateEOF
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.stages.index import AnalogIndex, recall_at_k
from analogs.stages.outcomes import (
    Region,
    covered_days,
    parse_period,
)
from analogs.stages.selection import (DEFAULT_EXCLUDE, DEFAULT_WINDOW,
                    candidate_ids)
from analogs.workflows.paths import provenance
from analogs.workflows.reports import coverage_period, events_block, load_events
from analogs.workflows.skill import measured_skill  # the build records it in the manifest
from analogs.workflows.skill import skill_by_month  # noqa: F401 (re-exported by analogs.api)

# The readers (sources), the regime diagnostics (regimes) and the hindcast are imported
# inside the functions that use them: a query on an archive date needs none of them, and
# the start-up of `analogs find` is part of a forecaster's wait.


def grid_box(ds) -> tuple[float, float, float, float]:
    lat, lon = ds["lat"].values, ds["lon"].values
    return float(lat.min()), float(lat.max()), float(lon.min()), float(lon.max())


def diagnostic_region(region: Region, ds) -> tuple[float, float, float, float]:
    """The box (south, north, west, east), on the grid of ``ds``, over which regime
    diagnostics are computed for an outcome ``region``.

    - a box: the box itself, clipped to the domain;
    - a point: the synoptic-scale box of half-sizes
      :data:`analogs.stages.regimes.SYNOPTIC_HALF_BOX` around it, clipped: a regime is a
      pattern, not a point value;
    - the whole domain (no region given): the synoptic-scale box at the centre of the
      domain (:func:`analogs.stages.regimes.default_diagnostic_box`), so that the ridge
      is searched upstream (west) of it and the trough over and downstream (east) of
      it; over the whole domain neither could be found. Outcome statistics of a store
      built without a region still count the whole domain (README, "Regions").

    On a domain across the date line the box is continuous: ``east`` may exceed 180.
    """
    from analogs.stages.regimes import SYNOPTIC_HALF_BOX, clip_to_domain, default_diagnostic_box
    lat, lon = ds["lat"].values, ds["lon"].values
    if region.kind == "box":
        box = (region.south, region.north, region.west, region.east)
    elif region.kind == "point":
        half_lat, half_lon = SYNOPTIC_HALF_BOX
        box = (region.lat - half_lat, region.lat + half_lat,
               region.lon - half_lon, region.lon + half_lon)
    else:
        return tuple(float(v) for v in default_diagnostic_box(lat, lon))
    return tuple(float(v) for v in clip_to_domain(box, lat, lon))


def diagnostic_region_info(region: Region, ds) -> dict:
    """What the manifest, ``tag`` and ``find`` say of the diagnostic region: the box,
    whether it is the default (no region given) and a sentence."""
    from analogs.stages.regimes import describe_box
    box = diagnostic_region(region, ds)
    default = region.kind == "whole"
    return {"south": box[0], "north": box[1], "west": box[2], "east": box[3],
            "default": default, "description": describe_box(box, default=default)}


def build_store(paths, store, *, events=None, event_dates=P.event_dates.default,
                events_period=None, fields=None, n_modes=P.n_modes.api_default,
                variance=None, region=None, domain=None, hour=P.hour.default,
                daily=P.daily.default, n_harmonics=P.n_harmonics.default,
                solver=P.solver.default, field_weights=None, chunks=None,
                index=P.index.default, scheduler=None, scratch=None, land_mask=None,
                progress=True):
    """Build (or rebuild) the store at ``store`` from archive ``paths``.

    Parameters
    ----------
    paths : list of NetCDF / Zarr paths (see :func:`analogs.stages.sources.open_archive`).
    store : directory to write; an existing store is replaced only when the build
        succeeds.
    events : path of the events table (CSV or Parquet), optional; reports outside the
        archive's grid are counted, reported in a warning and left out.
    event_dates : how an events time without a time of day is read
        (:func:`analogs.stages.outcomes.read_events`): refused, or the convective day.
    events_period : ``"FIRST,LAST"``, the convective days the events table is the report
        record of (default every archive day); other days have no report coverage and
        are left out of outcome statistics (:mod:`analogs.workflows.reports`).
    fields : fields to use (default: every supported field found).
    n_modes, variance : EOF truncation, by count (default 20) or by explained-variance
        target (a fraction in (0, 1]); give at most one.
    region : :class:`~analogs.stages.outcomes.Region` or text ``"S,N,W,E"`` / ``"LAT,LON,KM"``;
        the default region for outcome statistics and regime diagnostics.
    domain : (south, north, west, east) subset of the archive grid, optional.
    hour, daily : how sub-daily data becomes one value a day.
    n_harmonics : annual harmonics of the climatology.
    solver : EOF solver, ``"auto" | "exact" | "randomized"``.
    field_weights : dict field -> weight in the combined EOF (default equal).
    chunks : dask chunks for out-of-core reading, e.g. ``{"time": 365}``.
    scheduler : address of a ``dask.distributed`` scheduler (``"tcp://host:8786"``), or
        ``"local"`` for a local cluster of processes; default: dask's threaded scheduler.
        Only chunked (out-of-core) work is distributed.
    scratch : folder for the out-of-core build's float32 anomaly matrix (a temporary
        folder made inside it, removed afterwards); default beside ``store``. Only with
        ``chunks``. Its size is said up front (with ``progress``) and a disk with less
        free space is refused before any is written.
    index : ``"auto" | "flat" | "hnsw"``, the faiss index rebuilt at every load
        (approximate HNSW above 500,000 days with ``"auto"``); for HNSW the recall@20
        against exact search, with the season window applied, is measured and stored.
    land_mask : path of a static land-sea mask file (CF ``land_binary_mask`` /
        ``land_area_fraction``, :mod:`analogs.stages.landmask`); default: a mask
        variable found in the archive files, if any. Regridded to the store grid and
        kept in ``basis.nc`` (group ``/land``) to draw the land-sea boundary on maps;
        never a predictor.

    Returns
    -------
    AnalogStore, loaded from what was written.
    """
    if not paths:
        raise AnalogsInputError("no archive files given: pass one or more NetCDF/Zarr files")
    owner = "build_store"
    n_modes, variance = P.n_modes.check(n_modes, owner), P.variance.check(variance, owner)
    if n_modes is not None and variance is not None:
        raise AnalogsInputError(
            f"The 'n_modes' and 'variance' parameters of {owner} exclude each other: give "
            f"one of them. Got n_modes={n_modes!r} and variance={variance!r} instead.")
    fields, domain = P.fields.check(fields, owner), P.domain.check(domain, owner)
    hour, n_harmonics = P.hour.check(hour, owner), P.n_harmonics.check(n_harmonics, owner)
    for option, value in ((P.daily, daily), (P.solver, solver), (P.index, index),
                          (P.event_dates, event_dates)):
        option.check(value, owner)
    if events_period is not None:
        parse_period(events_period, "events_period", owner)  # refused before any work
    store_io.check_new_store_path(store)  # a file, a folder of other files, inside a store
    if scratch is not None:
        if chunks is None:
            fail("scratch", owner, "None for an in-memory build: it holds the out-of-core "
                 "build's anomaly matrix (give chunks too)", scratch)
        from analogs.workflows.paths import check_output
        check_output(P.scratch.check(scratch, owner), "scratch", owner, kind="directory")
    mask = None
    if land_mask is not None:  # a bad mask file is refused before any work
        from analogs.stages.landmask import read_land_mask
        mask = read_land_mask(P.land_mask.check(land_mask, owner))
    # The region is parsed here and checked against the archive's grid in _build.
    with renamed_errors(owner, "region"):
        region = Region.parse(region) if isinstance(region, str) else (region or Region.whole())
        from analogs.stages.sources import read_guard
        # read_guard: a damaged chunk or a file changed under the build's reads (the
        # missing-data, climatology, EOF and tagging passes) is named, exit 2.
        guard = read_guard(paths)
        # xarray's checks for dask and pint arrays made without importing them (about
        # 0.7 s of CPU an in-memory build holding neither spent importing them).
        with _dask_scheduler(scheduler), guard, duck_array_imports_deferred():
            return _build(paths, store, events=events, event_dates=event_dates,
                          events_period=events_period, fields=fields, n_modes=n_modes,
                          variance=variance, region=region, domain=domain, hour=hour,
                          daily=daily, n_harmonics=n_harmonics, solver=solver,
                          field_weights=field_weights, chunks=chunks, index=index,
                          progress=progress, reads_done=guard.check_unchanged, mask=mask,
                          scratch=scratch, decode_to_scratch=scheduler is None)


#: A dask scheduler address: an optional scheme, a host name, IPv4 or [IPv6] address,
#: and an optional port ("tcp://10.0.0.5:8786", "scheduler.example:8786");
#: "inproc://..." names an in-process scheduler.
_SCHEDULER_ADDRESS = re.compile(
    r"^(?:(?:tcp|tls|ucx|ws|wss)://)?(?:\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9](?:[A-Za-z0-9.-]*"
    r"[A-Za-z0-9])?)(?::(?P<port>\d{1,5}))?$")


def _check_scheduler_address(address) -> None:
    """Refuse, before any connection, what is not ``"local"`` nor a scheduler address."""
    expected = ("'local' or the address of a dask scheduler such as tcp://HOST:8786 "
                "(a host name or IP address and a port from 1 to 65535)")
    if not isinstance(address, str):
        fail("scheduler", "build_store", expected, address)
    if address == "local" or (address.startswith("inproc://") and len(address) > 9):
        return
    match = _SCHEDULER_ADDRESS.match(address)
    if match is None or (match["port"] is not None and not 1 <= int(match["port"]) <= 65535):
        fail("scheduler", "build_store", expected, address)


@contextlib.contextmanager
def _dask_scheduler(address):
    """Run the enclosed dask work on a distributed scheduler when one is named.

    ``"local"`` starts a local cluster of two worker processes whose scheduler, workers
    and dashboard (the scheduler's HTTP server, on a free port) listen on the loopback
    interface only: a build opens no port to the network. Errors of the enclosed work pass unchanged; only
    failing to reach or start the scheduler is reported as a bad ``scheduler``.
    """
    if address is None:
        yield
        return
    _check_scheduler_address(address)
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        fail("scheduler", "build_store", "None without the 'distributed' package "
             "(pip install 'analogs[distributed]')", address)
    with contextlib.ExitStack() as stack:
        try:
            if address == "local":
                cluster = stack.enter_context(LocalCluster(
                    n_workers=2, threads_per_worker=1, host="127.0.0.1",
                    dashboard_address="127.0.0.1:0"))
                stack.enter_context(Client(cluster))
            else:
                stack.enter_context(Client(address, timeout=30))
        except (OSError, ValueError, TypeError) as error:
            fail("scheduler", "build_store", "the address of a reachable dask scheduler "
                 f"({' '.join(str(error).split()) or type(error).__name__})", address)
        yield


def _build(paths, store, *, events, event_dates, events_period, fields, n_modes, variance,
           region, domain, hour, daily,
           n_harmonics, solver, field_weights, chunks, index, progress,
           reads_done=lambda: None, mask=None, scratch=None, decode_to_scratch=True):
    from analogs.stages.sources import open_archive
    # Out of core, the scratch folder holds the archive decoded once (read back by every
    # pass: census, climatology, EOF, tagging; not with a distributed scheduler, whose
    # workers read the files themselves) and the EOF's anomaly matrix.
    with _scratch_files(store, chunked=chunks is not None, progress=progress,
                        folder=scratch) as make_scratch, contextlib.ExitStack() as later:
        same_header = {}  # files whose NetCDF header is an earlier one's: no second look
        archive = open_archive(paths, fields=fields, region=domain, hour=hour, daily=daily,
                               chunks=chunks, progress=progress,
                               scratch=make_scratch if decode_to_scratch else None,
                               same_header=same_header)
        if archive.sizes["time"] < 3:
            raise AnalogsInputError(f"the archive has {archive.sizes['time']} days; at "
                                    "least 3 are needed to build a store")
        region.require_grid_points(archive["lat"].values, archive["lon"].values)
        land, land_entry = _land_on_store_grid(mask, paths, archive, same_header)
        event_table, n_outside = (None, 0) if events is None else load_events(
            events, archive["lat"].values, archive["lon"].values, dates=event_dates)

        climatology = HarmonicClimatology(n_harmonics=n_harmonics).fit(archive)
        # Anomalies in the archive's float32, made block-wise; the EOF fit scales them in
        # place into its data matrix (one copy of the archive beside the archive itself).
        # Out of core, that copy is a scratch file written in one pass over the archive.
        eof = MultivariateEOF(n_modes, variance=variance, solver=solver,
                              field_weights=field_weights).fit(
            climatology.transform(archive), overwrite=True, scratch=make_scratch)
        pcs = eof.pcs_
        errors = eof.training_error_.values
        times = pd.DatetimeIndex(archive["time"].values)
        tables, events_entry = {}, None
        if event_table is not None:
            # Report coverage (analogs.workflows.reports): every archive day, or
            # --events-period.
            period = coverage_period(event_table, events_period,
                                     default=(times[0], times[-1]), owner="build_store")
            events_entry = events_block(events, event_table, [period], times.normalize(),
                                        n_outside=n_outside)
            # The store's daily counts give the days with an event.
            from analogs.workflows.find import stored_daily_counts
            counts = stored_daily_counts(event_table, times.normalize(), region)
            tables = {store_io.EVENTS: event_table, store_io.COUNTS: counts}
        # A whole new version, staged under the writer lock from here on and loaded back
        # under it; an error before the commit leaves the store as it was.
        txn = later.enter_context(store_io.transaction(store, new=True))
        # The tags need only the archive, the index check and the skill hindcast only the
        # PCs: the tags are computed in a thread beside them (numpy and faiss release the
        # GIL in their heavy loops), which then writes the files that need no skill (the
        # hindcast ends last). Started after the EOF fit, the build's memory peak, so
        # the diagnostics' working memory never adds to it; inside the scratch folder's
        # block, because out of core tagging reads the archive's decoded copy there. No
        # region: tag_days places the synoptic box at the domain's centre and says so.
        box = None if region.kind == "whole" else diagnostic_region(region, archive)
        # The hindcast's folds run on two threads, one of them only once the tags are
        # made: beside the tagging's own two threads they would slow its serial last
        # steps (Python that needs the GIL), after which one core would be left idle.
        from analogs.stages.hindcast import FOLD_THREADS
        fold_slots = threading.BoundedSemaphore(FOLD_THREADS)
        fold_slots.acquire()
        with _beside(_tagged_and_staged, txn.staging, archive, box, progress=progress,
                     fitted=(climatology, eof, land), pcs=pcs, tables=tables,
                     tagged=fold_slots.release) as tagging:
            index_info = _index_info(index, pcs.values, times)
            skill = None
            if event_table is not None:
                observed = counts["total"].to_numpy() > 0
                covered = covered_days(times, [period])
                skill = measured_skill(pcs.values, times, observed, covered, region=region,
                                       fold_slots=fold_slots)
                # The default query's event-weighted map (the store's region, every
                # kind), fitted as event_weighted_transform fits it on the stored PCs,
                # while the tagging may still run; kept in the first manifest below.
                from analogs.stages.predictor_weights import fit_predictor_weights
                default_map = fit_predictor_weights(pcs.values.astype("float64")[covered],
                                                    times[covered], observed[covered])
        tagging.result()
        manifest = {
            "config": {
                "fields": list(archive.data_vars),
                "n_modes_requested": n_modes,
                "variance_requested": variance,
                "n_modes": int(eof.n_modes_),
                "solver": eof.solver_,
                "n_harmonics": n_harmonics,
                "climatology_method": climatology.method_,
                "hour": hour,
                "daily": daily,
                "domain": list(domain) if domain is not None else list(grid_box(archive)),
                "region": region.to_dict(),
                "diagnostic_region": diagnostic_region_info(region, archive),
                "field_weights": field_weights,
            },
            "archive": {
                "n_days": int(len(times)),
                "time_start": times[0].isoformat(),
                "time_end": times[-1].isoformat(),
                "n_lat": int(archive.sizes["lat"]),
                "n_lon": int(archive.sizes["lon"]),
                "inputs": provenance(paths),
                "missing_data": json.loads(archive.attrs.get("missing_data", "{}")),
                "reconstruction_error": error_summary(errors),
            },
            "events": events_entry,
            "land_mask": land_entry,
            "skill": skill,
            "index": index_info,
        }
        if event_table is not None:
            from analogs.workflows.find import default_predictor_weights
            manifest["predictor_weights"] = default_predictor_weights(
                default_map, region, int(eof.n_modes_),
                {name: store_io.file_entry(txn.staging / name)
                 for name in (store_io.SCORES, store_io.EVENTS)})
        reads_done()  # an archive file changed during the reads: refused before the commit
        txn.commit(manifest)
        from analogs.workflows.analog_store import AnalogStore
        return AnalogStore._load_version(txn.path, manifest=txn.committed)


def _tagged_and_staged(staging, archive, box, *, progress, fitted, pcs, tables, tagged):
    """The tags of every archive day (:func:`~analogs.stages.regimes.tag_days` over
    ``box``; ``tagged()`` is called when they are made, or have failed), then the store
    files that need no skill written into ``staging``: ``basis.nc`` (the grid, then the
    groups of ``fitted``: the climatology, the EOFs and the land fraction when there is
    one), the ``pcs``, the ``tables`` (name -> frame) and the tags."""
    from analogs.stages.regimes import tag_days
    try:
        tags = tag_days(archive, box, progress=progress)
    finally:
        tagged()
    climatology, eof, land = fitted
    basis = staging / store_io.BASIS
    store_io.write_dataset(xr.Dataset(coords={"lat": archive["lat"], "lon": archive["lon"]},
                                      attrs={"title": "analogs store basis",
                                             "Conventions": "CF-1.8",
                                             "analogs_version": __version__}), basis)
    store_io.write_dataset(climatology.to_dataset(), basis, group="climatology", mode="a")
    store_io.write_dataset(eof.to_dataset(), basis, group="eof", mode="a")
    if land is not None:
        store_io.write_dataset(land.to_dataset(name="land"), basis,
                               group=store_io.LAND_GROUP, mode="a")
    store_io.write_dataset(xr.Dataset({"pcs": pcs.astype("float64")},
                                      attrs={"title": "analogs store principal components",
                                             "Conventions": "CF-1.8"}),
                           staging / store_io.SCORES)
    for name, table in tables.items():
        store_io.write_table(table, staging / name)
    store_io.write_table(tags.reset_index(drop=True), staging / store_io.TAGS)


@contextlib.contextmanager
def _beside(work, *args, **kwargs):
    """Run ``work(*args, **kwargs)`` in a thread while the enclosed block runs; yields
    its future (``result()`` gives its answer or raises its error).

    The thread has always ended when the block is left, also on error (no thread
    outlives the build). When both fail, ``work``'s error is raised: it is the one a
    sequential run, ``work`` first, would have met. The thread runs in a copy of the
    caller's context (context variables such as a dask client's).
    """
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="analogs-build") as pool:
        future = pool.submit(contextvars.copy_context().run, work, *args, **kwargs)
        try:
            yield future
        except BaseException:
            if future.exception() is not None:  # waits for the thread
                raise future.exception() from None
            raise


#: Free space kept beyond the scratch files' size (the store is written beside them).
_SCRATCH_MARGIN = 1.1


@contextlib.contextmanager
def _scratch_files(store, *, chunked: bool, progress: bool, folder=None):
    """For an out-of-core build, a maker of memory-mapped arrays in a temporary folder
    inside ``folder`` (default: beside ``store``), removed afterwards (also on error);
    ``None`` for an in-memory build.

    Each array's size is said when it is made, with ``progress``; one that the disk has
    no room for is refused before it is made.
    """
    if not chunked:
        yield None
        return
    given = folder is not None
    parent = Path(folder).resolve() if given else Path(store).resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    folder = Path(tempfile.mkdtemp(prefix=".analogs-scratch-", dir=parent))
    # Sizes only: the arrays are let go by the stages that use them, so that their
    # mapped pages (the EOF's anomaly matrix) are not resident while tagging runs.
    made = []

    def allocate(shape, dtype):
        n_bytes = np.dtype(dtype).itemsize * int(np.prod(shape))
        # Arrays made earlier are sparse files until written: the space they will still
        # take counts against what is free, or a later write could meet a full disk.
        free = shutil.disk_usage(parent).free - _unclaimed_bytes(folder.iterdir())
        if free < _SCRATCH_MARGIN * n_bytes:
            raise AnalogsInputError(
                f"the out-of-core build needs {n_bytes / 1e9:.2f} GB of scratch space for "
                f"its next array in {parent} "
                f"({'the scratch folder given' if given else 'beside the store'}), with "
                f"{sum(made) / 1e9:.2f} GB made there already, but only "
                f"{free / 1e9:.2f} GB are free there; free some space or give a "
                "scratch folder on a disk with room (--scratch DIR, or scratch= from Python)")
        if progress:
            print(f"analogs build: {n_bytes / 1e9:.2f} GB of scratch space in {folder} "
                  "(removed after the build)", file=sys.stderr)
        made.append(n_bytes)
        return np.memmap(folder / f"matrix_{len(made)}.bin", dtype=dtype, mode="w+",
                         shape=tuple(int(n) for n in shape))

    try:
        yield allocate
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _unclaimed_bytes(paths) -> int:
    """Bytes that the files ``paths`` may still take on disk: the part of each file's
    size that no disk block holds yet (a sparse file, such as a new memory-mapped array,
    claims its blocks as it is written; stat(2)'s st_blocks counts 512-byte units, from
    memory). Where st_blocks is not reported, files count as fully claimed."""
    unclaimed = 0
    for path in paths:
        status = path.stat()
        blocks = getattr(status, "st_blocks", None)
        if blocks is not None:
            unclaimed += max(0, status.st_size - 512 * blocks)
    return unclaimed


def _land_on_store_grid(mask, paths, archive, same_header):
    """(land fraction on the archive's grid, manifest entry) from the ``--land-mask``
    file read before (``mask``: (DataArray, source)), else from a mask variable in the
    archive files (``same_header``: the files ``open_archive`` found with an earlier
    file's header, whose screen is the earlier one's); (None, None) when there is none."""
    from analogs.stages.landmask import land_mask_in_archive, land_on_grid
    if mask is None:
        mask = land_mask_in_archive(paths, same_header)
        origin = "archive file"
    else:
        origin = "given file (land_mask)"
    values, source = mask
    if values is None:
        return None, None
    land = land_on_grid(values, archive["lat"].values, archive["lon"].values,
                        f"{source['path']}, variable {source['variable']!r}")
    entry = {**source, "path": str(Path(source["path"]).resolve()), "origin": origin,
             "regridding": "bilinear to the store grid (as fields)",
             "land_share": round(float(np.nanmean(land.values >= 0.5)), 4),
             "use": "drawing the land-sea boundary on maps only; never a predictor"}
    return land.astype("float32"), entry


def _index_info(kind, vectors, times) -> dict:
    """The index kind to rebuild at load; for HNSW, its measured recall@20."""
    built = AnalogIndex(kind=kind).fit(vectors)
    info = {"kind": built.kind_}
    if built.kind_ != "flat":
        info["recall_at_20"] = recall_at_k(
            built, vectors, k=20,
            allowed_for=lambda row: candidate_ids(times, times[row], window=DEFAULT_WINDOW,
                                                  exclude=DEFAULT_EXCLUDE))
        info["recall_method"] = ("mean recall@20 against exact search, 200 archive days, "
                                 f"season window +/-{DEFAULT_WINDOW} d")
    return info


def error_summary(errors) -> dict:
    """Median and upper percentiles of the archive's EOF reconstruction error, the
    yardstick against which appended days are judged (drift detection)."""
    errors = np.asarray(errors, dtype=float)
    return {"median": float(np.median(errors)), "p99": float(np.percentile(errors, 99)),
            "max": float(errors.max())}
