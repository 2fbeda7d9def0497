"""The out-of-core (chunked dask) build against the in-memory build, and a distributed
(LocalCluster) build against the threaded scheduler, on one small synthetic archive.

External reference: the eigenvalues of both paths are checked against a full LAPACK
SVD (``numpy.linalg.svd``) of the same weighted, balanced anomaly matrix, built here
with numpy from the published recipe (area weights sqrt(cos lat), Hannachi, Jolliffe &
Stephenson 2007; eigenvalues S^2 / (N - 1) of the covariance matrix). The analogs are
checked against brute-force Euclidean nearest neighbours from scikit-learn
(``NearestNeighbors(algorithm="brute")``) over the same season-window candidates.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

YEARS = 2
GRID_DEG = 3.0
SEED = 5
CHUNK_DAYS = 150
DATES = ("2001-02-10", "2001-07-04", "2002-05-20", "2002-11-30")


@pytest.fixture(scope="module")
def small_archive(tmp_path_factory):
    import reanalysis_demo

    out = tmp_path_factory.mktemp("out_of_core")
    paths = reanalysis_demo.write_archive(out, YEARS, grid=GRID_DEG, seed=SEED, progress=False)
    return out, sorted(str(p) for p in paths["zg"] + paths["hus"])


def _build(small_archive, name, **options):
    from analogs.api import build_store

    out, files = small_archive
    return build_store(files, out / name, progress=False, **options)


@pytest.fixture(scope="module")
def in_memory(small_archive):
    return _build(small_archive, "store_memory")


@pytest.fixture(scope="module")
def chunked(small_archive):
    return _build(small_archive, "store_chunked", chunks={"time": CHUNK_DAYS})


def _matched_signs(reference, other):
    """Flip each mode (row) of ``other`` to the sign of ``reference``."""
    signs = np.sign(np.sum(reference * other, axis=1))
    return other * signs[:, None]


def _assert_same_eofs(a, b):
    # Both paths solve in float32 (the precision of the faiss index): agreement to
    # a few units of float32 round-off.
    np.testing.assert_allclose(b.eof.eigenvalues_.values, a.eof.eigenvalues_.values, rtol=1e-5)
    for field in a.eof.fields_:
        pa = np.nan_to_num(a.eof.eofs_[field].values.reshape(a.eof.n_modes_, -1))
        pb = np.nan_to_num(b.eof.eofs_[field].values.reshape(b.eof.n_modes_, -1))
        np.testing.assert_allclose(_matched_signs(pa, pb), pa, atol=1e-5)
    pcs_a, pcs_b = a.pcs.values.T, b.pcs.values.T
    scale = np.abs(pcs_a).max()
    np.testing.assert_allclose(_matched_signs(pcs_a, pcs_b) / scale, pcs_a / scale, atol=1e-5)


def _assert_same_analogs(a, b):
    for date in DATES:
        ranked_a = a.find(date=date, top=10).analogs
        ranked_b = b.find(date=date, top=10).analogs
        assert ranked_a["date"].tolist() == ranked_b["date"].tolist(), date
        np.testing.assert_allclose(ranked_b["distance"], ranked_a["distance"], rtol=1e-5)


def _exact_eigenvalues(files):
    """Eigenvalues of the weighted, balanced anomaly covariance by a full numpy SVD."""
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.sources import open_archive

    archive = open_archive(files).load()
    anomalies = HarmonicClimatology().fit(archive).transform(archive)
    weights = np.sqrt(np.cos(np.radians(archive["lat"].values)))[:, None]
    n_time = archive.sizes["time"]
    blocks = []
    for name in anomalies.data_vars:
        block = (anomalies[name].values * weights).reshape(n_time, -1)
        block = block - block.mean(axis=0)
        blocks.append(block / np.sqrt((block ** 2).sum() / (n_time - 1)))
    singular = np.linalg.svd(np.concatenate(blocks, axis=1), compute_uv=False)
    return singular ** 2 / (n_time - 1)


def test_chunked_path_is_lazy_and_randomized(small_archive):
    """The chunked archive stays dask-backed through anomalies and the EOF matrix, and
    the graph carries no array the size of the archive (the climatology design
    matrix used to be computed eagerly and embedded)."""
    import pickle

    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.eof import MultivariateEOF
    from analogs.stages.sources import open_archive

    _, files = small_archive
    archive = open_archive(files, chunks={"time": CHUNK_DAYS})
    anomalies = HarmonicClimatology().fit(archive).transform(archive)
    model = MultivariateEOF(solver="randomized")
    model._preprocess(anomalies)
    matrix = model._matrix(anomalies)
    assert hasattr(matrix, "dask")
    archive_bytes = sum(archive[name].nbytes for name in archive.data_vars)
    largest_layer = max(len(pickle.dumps(dict(layer))) for layer in matrix.dask.layers.values())
    # before the fix one layer held the whole float64 climatology of a field (= archive_bytes)
    assert largest_layer < archive_bytes / 8, (largest_layer, archive_bytes)


def test_out_of_core_matches_in_memory(small_archive, in_memory, chunked):
    assert in_memory.eof.solver_ == chunked.eof.solver_ == "randomized"
    _assert_same_eofs(in_memory, chunked)
    _assert_same_analogs(in_memory, chunked)
    # Against numpy's full SVD (outside reference): leading eigenvalues of both paths.
    exact = _exact_eigenvalues(small_archive[1])
    k = 10
    np.testing.assert_allclose(chunked.eof.eigenvalues_.values[:k], exact[:k], rtol=1e-5)


def test_out_of_core_tags_match_in_memory(in_memory, chunked):
    """Out of core, tagging reads each time chunk once and works it in the in-memory
    build's blocks of days: the tags are the in-memory build's, value for value, with
    closed lows among them (the structure columns are read chunk by chunk too)."""
    import pandas as pd

    assert chunked.tags["tc_present"].sum() > 10
    pd.testing.assert_frame_equal(chunked.tags, in_memory.tags, check_exact=True)


def test_analogs_match_sklearn_brute_force(chunked):
    """Ranking of the chunked store against scikit-learn's exact brute-force neighbours
    over the same season-window candidates (no de-clustering: separation 0)."""
    from sklearn.neighbors import NearestNeighbors

    from analogs.stages.selection import candidate_ids

    pcs = chunked.pcs.values[:, :chunked.n_query_modes]
    for date in DATES:
        row = chunked.day_row(date)
        result = chunked.find(date=date, top=10, separation=0).analogs
        allowed = candidate_ids(chunked.times, chunked.times[row], window=45, exclude=10)
        neighbours = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(pcs[allowed])
        distances, positions = neighbours.kneighbors(pcs[row:row + 1])
        expected = [str(d.date()) for d in chunked.days[allowed[positions[0]]]]
        assert result["date"].tolist() == expected, date
        np.testing.assert_allclose(result["distance"], distances[0], rtol=1e-5)


def test_distributed_eof_solve_matches_threaded(small_archive):
    """The streamed randomized SVD (the heavy dask work of an out-of-core build) run on a
    dask.distributed cluster gives the threaded scheduler's eigenvalues and PCs, and
    both match numpy's full SVD (default suite; the whole build through a cluster is
    checked by the slow tests below)."""
    distributed = pytest.importorskip("distributed")
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.eof import MultivariateEOF
    from analogs.stages.sources import open_archive

    _, files = small_archive
    archive = open_archive(files, chunks={"time": CHUNK_DAYS})
    anomalies = HarmonicClimatology().fit(archive).transform(archive)
    threaded = MultivariateEOF(8, solver="randomized").fit(anomalies)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster):
        clustered = MultivariateEOF(8, solver="randomized").fit(anomalies)
    np.testing.assert_allclose(clustered.eigenvalues_.values, threaded.eigenvalues_.values,
                               rtol=1e-8)
    pcs_t, pcs_c = threaded.pcs_.values.T, clustered.pcs_.values.T
    np.testing.assert_allclose(_matched_signs(pcs_t, pcs_c), pcs_t,
                               atol=1e-8 * np.abs(pcs_t).max())
    np.testing.assert_allclose(threaded.eigenvalues_.values,
                               _exact_eigenvalues(files)[:8], rtol=1e-6)


@pytest.mark.slow
def test_distributed_scheduler_matches_threaded(small_archive, chunked):
    """A build through a dask.distributed scheduler address (an in-process cluster, the
    ``--scheduler ADDRESS`` path) gives the threaded build's EOFs and analogs. Slow: about
    100 s at load 7 on 2 cores (per-compute scheduler overhead, see the report)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=":0") as cluster:
        result = _build(small_archive, "store_address", chunks={"time": CHUNK_DAYS},
                        scheduler=cluster.scheduler_address)
    _assert_same_eofs(chunked, result)
    _assert_same_analogs(chunked, result)


@pytest.mark.slow
def test_local_cluster_matches_threaded(small_archive, chunked):
    """A ``scheduler="local"`` build (LocalCluster of worker processes) gives the threaded
    build's EOFs and analogs. Slow: two worker processes start and open the files
    (about 70 s on the loaded 2-core test machine, 245 s at load 7)."""
    pytest.importorskip("distributed")
    distributed = _build(small_archive, "store_local", chunks={"time": CHUNK_DAYS},
                         scheduler="local")
    _assert_same_eofs(chunked, distributed)
    _assert_same_analogs(chunked, distributed)


def test_scratch_copies_give_the_streamed_fit(small_archive, tmp_path):
    """``fit(scratch=...)`` on dask anomalies (each field written once into a
    memory-mapped float32 copy, then scaled and solved there) gives the streamed
    fit's eigenvalues and PCs to float32 round-off, through a dask.distributed client
    too, and numpy's full SVD's eigenvalues (outside reference)."""
    distributed = pytest.importorskip("distributed")
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.eof import MultivariateEOF
    from analogs.stages.sources import open_archive

    _, files = small_archive
    archive = open_archive(files, chunks={"time": CHUNK_DAYS})
    anomalies = HarmonicClimatology().fit(archive).transform(archive)
    made = []

    def scratch(shape, dtype):
        made.append(np.memmap(tmp_path / f"copy{len(made)}.bin", dtype=dtype, mode="w+",
                              shape=shape))
        return made[-1]

    streamed = MultivariateEOF(8, solver="randomized").fit(anomalies)
    copied = MultivariateEOF(8, solver="randomized").fit(anomalies, scratch=scratch)
    assert len(made) == 2 and hasattr(anomalies["z500"].data, "dask")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster):
        clustered = MultivariateEOF(8, solver="randomized").fit(anomalies, scratch=scratch)
    pcs = streamed.pcs_.values.T
    for other in (copied, clustered):
        np.testing.assert_allclose(other.eigenvalues_.values, streamed.eigenvalues_.values,
                                   rtol=1e-5)
        np.testing.assert_allclose(_matched_signs(pcs, other.pcs_.values.T), pcs,
                                   atol=1e-5 * np.abs(pcs).max())
    np.testing.assert_allclose(copied.eigenvalues_.values, _exact_eigenvalues(files)[:8],
                               rtol=1e-5)


def test_scratch_folder_is_removed_and_a_full_disk_refused(small_archive, chunked,
                                                          monkeypatch, capsys):
    """The out-of-core build's scratch folder (beside the store) is gone after a build
    and after a failed one; a disk with too little free space is refused up front,
    exit status 2 from the command line, with the sizes and the folder named."""
    import shutil
    from collections import namedtuple

    from analogs.cli import main
    from analogs.errors import AnalogsInputError
    from analogs.stages import eof as eof_module

    out, files = small_archive
    assert not list(out.glob(".analogs-scratch-*"))

    def broken(*args, **kwargs):
        raise RuntimeError("solver failed")

    with monkeypatch.context() as patch:
        patch.setattr(eof_module, "_randomized_svd", broken)
        with pytest.raises(RuntimeError, match="solver failed"):
            _build(small_archive, "store_failed", chunks={"time": CHUNK_DAYS})
    assert not list(out.glob(".analogs-scratch-*"))

    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(shutil, "disk_usage", lambda path: usage(10 ** 6, 10 ** 6 - 1000, 1000))
    with pytest.raises(AnalogsInputError, match="GB of scratch space"):
        _build(small_archive, "store_full", chunks={"time": CHUNK_DAYS})
    status = main(["build", *files, "--store", str(out / "store_full_cli"),
                   "--chunk-days", str(CHUNK_DAYS), "--quiet"])
    message = capsys.readouterr().err
    assert status == 2 and "scratch space" in message and str(out) in message
    assert "Traceback" not in message and not (out / "store_full_cli").exists()


def test_scratch_space_counts_arrays_not_yet_written(tmp_path, monkeypatch):
    """Each scratch array is a sparse file until written (a fresh numpy.memmap: stat(2)
    reports its size but few blocks, from memory), so the room checked for the next
    array takes off what the earlier ones will still claim: two arrays that each fit in
    the free space but not together are refused before the second is made, not left to
    meet a full disk while written."""
    import os
    import shutil
    from collections import namedtuple

    from analogs.errors import AnalogsInputError
    from analogs.workflows.build import _scratch_files

    probe = np.memmap(tmp_path / "probe.bin", dtype="float32", mode="w+", shape=(2 ** 20,))
    if os.stat(tmp_path / "probe.bin").st_blocks * 512 >= probe.nbytes:
        pytest.skip("this file system allocates new files whole: no sparse scratch arrays")
    del probe
    n_bytes = 4 * 2 ** 20
    usage = namedtuple("usage", "total used free")
    free = int(1.5 * n_bytes)  # room for one array and its margin, not for two
    monkeypatch.setattr(shutil, "disk_usage", lambda path: usage(10 ** 12, 10 ** 12 - free, free))
    with _scratch_files(tmp_path / "store", chunked=True, progress=False) as make:
        first = make((2 ** 20,), "float32")
        with pytest.raises(AnalogsInputError, match="GB made there already"):
            make((2 ** 20,), "float32")
        # Once the first is written, its blocks are on disk: the free space reported by
        # the file system is then what counts (here, unchanged by the stand-in).
        first[:] = 1.0
        first.flush()
        make((2 ** 20,), "float32")


def test_scratch_folder_given(small_archive, chunked, tmp_path, monkeypatch, capsys):
    """``--scratch DIR`` puts the scratch files in DIR (said up front, removed after),
    gives the same store as the default folder beside the store (the same anomaly
    matrix, only elsewhere); a DIR on a full disk is refused naming DIR, and --scratch
    without --chunk-days, or inside a store, is refused, exit status 2."""
    import shutil
    from collections import namedtuple

    from analogs.cli import main
    from analogs.stages import eof as eof_module

    out, files = small_archive
    scratch = tmp_path / "scratch"
    seen = []
    real_fit = eof_module.MultivariateEOF.fit

    def spying_fit(self, *args, **kwargs):  # where the scratch arrays are made
        seen.extend(scratch.glob(".analogs-scratch-*"))
        return real_fit(self, *args, **kwargs)

    with monkeypatch.context() as patch:
        patch.setattr(eof_module.MultivariateEOF, "fit", spying_fit)
        status = main(["build", *files, "--store", str(out / "store_scratch"),
                       "--chunk-days", str(CHUNK_DAYS), "--scratch", str(scratch)])
    message = capsys.readouterr().err
    assert status == 0 and len(seen) == 1 and f"scratch space in {seen[0]}" in message
    assert not list(scratch.iterdir()) and not list(out.glob(".analogs-scratch-*"))
    from analogs.api import AnalogStore
    _assert_same_eofs(chunked, AnalogStore.load(out / "store_scratch"))

    usage = namedtuple("usage", "total used free")
    real_usage = shutil.disk_usage
    monkeypatch.setattr(shutil, "disk_usage", lambda path: usage(10 ** 6, 10 ** 6 - 1000, 1000)
                        if str(path) == str(scratch.resolve()) else real_usage(path))
    status = main(["build", *files, "--store", str(out / "store_scratch_full"),
                   "--chunk-days", str(CHUNK_DAYS), "--scratch", str(scratch), "--quiet"])
    message = capsys.readouterr().err
    assert status == 2 and f"{scratch.resolve()} (the scratch folder given)" in message
    assert not (out / "store_scratch_full").exists()
    for arguments, expected in ((["--scratch", str(scratch)], "pass --chunk-days too"),
                                (["--chunk-days", str(CHUNK_DAYS), "--scratch",
                                  str(out / "store_scratch" / "tmp")], "outside any analogs store")):
        status = main(["build", *files, "--store", str(out / "store_refused"), "--quiet",
                       *arguments])
        message = capsys.readouterr().err
        assert status == 2 and expected in message and "Traceback" not in message


def _memmap_maker(folder, made):
    def scratch(shape, dtype):
        made.append(np.memmap(folder / f"copy{len(made)}.bin", dtype=dtype, mode="w+",
                              shape=tuple(shape)))
        return made[-1]
    return scratch


def _write_gappy_360_files(folder):
    """Per-variable, per-year files on a global 5-degree grid in 0-360 longitudes with
    latitude descending (as NCEP's), z500 holding a one-day gap at one point (filled in
    time), a point missing on every day (kept missing, a mask), and q850 an infinite
    value (counted, then filled as a missing one)."""
    import pandas as pd
    import xarray as xr
    from _sources_helpers import (
        LAT,
        LON,
        daily_times,
        smooth_height,
        smooth_humidity,
        to_360,
    )

    times = pd.DatetimeIndex(daily_times("2001-12-15", periods=30))
    lon360, order = to_360(LON)
    z = smooth_height(times)[:, ::-1][:, :, order]
    q = smooth_humidity(times)[:, ::-1][:, :, order].astype(np.float32)
    z[6, 12, 40] = np.nan
    z[:, 20, 32] = np.nan
    q[3, 10, 38] = np.inf
    paths = []
    for year in (2001, 2002):
        sel = np.flatnonzero(times.year == year)
        coords = {"time": times[sel], "lat": ("lat", LAT[::-1], {"units": "degrees_north"}),
                  "lon": ("lon", lon360, {"units": "degrees_east"})}
        for name, values, units in (("hgt", z, "gpm"), ("shum", q, "kg/kg")):
            path = folder / f"{name}_{year}.nc"
            xr.Dataset({name: (("time", "lat", "lon"), values[sel], {"units": units})},
                       coords=coords).to_netcdf(path)
            paths.append(str(path))
    return paths


def test_archive_decoded_once_is_the_archive_read_lazily_or_in_memory(tmp_path):
    """``open_archive(chunks=..., scratch=...)`` (each field decoded from the files once
    into a memory-mapped copy, every later pass reading its chunks from there) gives
    exactly the in-memory read's and the lazy read's values and missing-data report: on
    files given in any order, in 0-360 longitudes with latitude descending, over a region
    across the date line, with a one-day gap filled, an infinite value counted and
    filled, and a masked point kept missing (the census, taken while decoding, gives the
    same report); its chunks come from the copy, not the files. External reference: the values read from
    the files with netCDF4 directly, placed on the canonical grid by hand."""
    import netCDF4

    from analogs.stages.sources import open_archive

    files = _write_gappy_360_files(tmp_path)
    region = (-30.0, 60.0, 150.0, -150.0)  # across the date line
    made = []
    options = {"fields": ["z500", "q850"], "region": region}
    with pytest.warns(UserWarning, match="filled"):
        in_memory = open_archive(files, **options)
    with pytest.warns(UserWarning, match="filled"):
        lazy = open_archive(files, chunks={"time": 7}, **options)
    with pytest.warns(UserWarning, match="filled"):
        once = open_archive(files[::-1], chunks={"time": 7},
                            scratch=_memmap_maker(tmp_path, made), **options)
    assert len(made) == 2
    for name in ("z500", "q850"):
        data = once[name].data
        assert data.chunks[0][:4] == (7, 7, 7, 7)
        layers = data.__dask_graph__().layers
        assert any(k.startswith(f"archive-{name}") for k in layers)
        assert not any(k.startswith("open_dataset") for k in layers)  # no file read
        assert once[name].dtype == in_memory[name].dtype
        np.testing.assert_array_equal(once[name].values, in_memory[name].values)
        np.testing.assert_array_equal(lazy[name].values, in_memory[name].values)
    assert once.attrs["missing_data"] == in_memory.attrs["missing_data"]
    report = json.loads(once.attrs["missing_data"])  # the census taken while decoding
    assert report["n_values_filled"] == 2 and report["n_infinite_values"] == 1
    assert np.isnan(once["z500"].values).sum() > 0  # the masked point, kept missing

    lon = once["lon"].values
    assert lon.min() <= -150.0 and lon.max() >= 150.0  # both sides of 180
    z = np.concatenate([netCDF4.Dataset(p)["hgt"][:].filled(np.nan) for p in sorted(files)
                        if "hgt" in p])
    with netCDF4.Dataset(files[0]) as first:
        file_lat, file_lon = first["lat"][:], first["lon"][:]
    rows = [int(np.flatnonzero(np.isclose(file_lat, v))[0]) for v in once["lat"].values]
    cols = [int(np.flatnonzero(np.isclose(file_lon, v % 360.0))[0]) for v in lon]
    expected = z[:, rows][:, :, cols]
    unfilled = ~np.isnan(expected)  # the gap's value is the filled one, checked above
    np.testing.assert_array_equal(once["z500"].values[unfilled], expected[unfilled])


def test_scratch_rows_released_and_read_back(tmp_path):
    """Rows written through a memory-mapped scratch array (at a file offset that is not
    a page boundary) and dropped from resident memory (``release_rows``) read back,
    through ``chunked_copy``, as the file holds them (external reference:
    ``numpy.fromfile`` of the file), and the dropped pages leave the process's resident
    file-backed memory (``RssFile`` of /proc/self/status, Linux)."""
    import mmap
    import os

    from analogs.stages.scratch import chunked_copy, release_rows

    if not hasattr(mmap.mmap, "madvise") or not os.path.exists("/proc/self/status"):
        pytest.skip("needs madvise and /proc (Linux)")

    def rss_file_kb():
        with open("/proc/self/status") as status:
            return int(status.read().split("RssFile:")[1].split()[0])

    path, offset, shape = tmp_path / "rows.bin", 100, (64, 256, 1024)  # 64 MiB of float32
    path.write_bytes(b"\0" * offset)
    rows = np.memmap(path, dtype=np.float32, mode="r+", offset=offset, shape=shape)
    values = np.random.default_rng(3).standard_normal(shape).astype(np.float32)
    rows[:] = values
    before = rss_file_kb()
    for start in range(0, shape[0], 10):
        release_rows(rows, start, min(start + 10, shape[0]))
    assert before - rss_file_kb() > 0.9 * values.nbytes / 1024
    copy = chunked_copy(rows, (10, -1, -1), "rows-test")
    assert copy.chunks[0] == (10,) * 6 + (4,)
    from_file = np.fromfile(path, dtype=np.float32, offset=offset).reshape(shape)
    np.testing.assert_array_equal(copy.compute(), from_file)
    np.testing.assert_array_equal(copy[13:29, 5:9, ::7].compute(), values[13:29, 5:9, ::7])
    plain = chunked_copy(values, (10, -1, -1), "plain-test")  # not a file: as it is
    np.testing.assert_array_equal(plain.compute(), values)
