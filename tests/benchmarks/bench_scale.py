"""Scale benchmark: build time, peak memory, query latency and index recall at three sizes.

Sizes (synthetic archives from ``reanalysis_demo``, generated year by year):
- small:  10 years at 1 degree (default domain, 36 x 71 points);
- medium: 40 years at 1 degree;
- large:  40 years at 0.25 degree on (20, 54.75, -130, -60.25), 140 x 280 points.

Measured in the same run, for each size:
- generation time (or the time recorded when the archive was generated, if reused);
- build time and peak resident memory (VmHWM of a child process that runs only the
  build): the in-memory path for small / medium, the out-of-core path
  (``chunks={"time": 365}``, threaded scheduler) for medium and large;
- baselines on the same weighted, balanced anomaly matrix, each in its own child
  process: a full exact SVD (``numpy.linalg.svd``) and scikit-learn
  ``PCA(svd_solver="full")``; where the matrix is too large for them (the exact SVD of
  the large matrix needs tens of GB) they run on the largest leading subset of years
  that fits, and our build is timed on the same subset for the ratio;
- the leading 10 eigenvalues' max relative error of the store against the exact SVD;
- query latency of a loaded store (``AnalogStore.find``: one --date target, top 20,
  season window, de-clustering, outcome statistics), median over >= 200 queries,
  against brute-force numpy distances and ``NearestNeighbors(algorithm="brute")``
  over the same season-window candidates;
- ``analogs find --json`` as a whole command (console script, start-up included),
  median of 5 runs;
- at the largest size run: recall@20 of the HNSW index against exact search with the
  season-window filter (faiss ID selection), for a few efSearch values.

Run:  python tests/benchmarks/bench_scale.py [--sizes small,medium,large] [--out DIR]
Archives already in DIR with the same settings are reused (their recorded generation
time is reported). Prints a table and a JSON object (also written to DIR/bench_scale.json).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SIZES = {
    "small": {"years": 10, "grid": 1.0, "domain": None},
    "medium": {"years": 40, "grid": 1.0, "domain": None},
    "large": {"years": 40, "grid": 0.25, "domain": [20.0, 54.75, -130.0, -60.25]},
}
#: Build paths measured per size.
BUILD_PATHS = {"small": ["memory"], "medium": ["memory", "chunked"], "large": ["chunked"]}
CHUNK_DAYS = 365
START_YEAR = 1981
SEED = 0
#: Memory the exact baselines may use: matrix + U + V^T + LAPACK workspace ~ 4 x matrix.
BASELINE_MEMORY_BYTES = 12e9
BASELINE_MEMORY_FACTOR = 4.5


# ----------------------------------------------------------------------------- helpers

def peak_rss_mb() -> float:
    """Peak resident memory of this process (VmHWM), MB."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def load_average() -> list[float]:
    return [round(x, 2) for x in os.getloadavg()]


def run_child(task: str, spec: dict, script=__file__) -> dict:
    """Run ``task`` of benchmark ``script`` (its ``--child`` option) in a fresh
    interpreter; return the JSON of its last stdout line."""
    command = [sys.executable, str(Path(script).resolve()), "--child", task,
               "--spec", json.dumps(spec)]
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        return {"error": done.stderr.strip().splitlines()[-1] if done.stderr.strip() else
                f"exit status {done.returncode}"}
    return json.loads(done.stdout.strip().splitlines()[-1])


def parsed_or_child(parser, tasks: dict, argv=None):
    """The options parsed, or None once the ``--child`` task asked for (a fresh
    interpreter started by :func:`run_child`) has run and printed its JSON."""
    parser.add_argument("--child", choices=sorted(tasks), help=argparse.SUPPRESS)
    parser.add_argument("--spec", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(tasks[args.child](json.loads(args.spec))))
        return None
    return args


def archive_files(size_dir: Path, years=None) -> list[str]:
    files = sorted((size_dir / "archive").glob("*.nc"))
    if years is not None:
        keep = {str(START_YEAR + i) for i in range(years)}
        files = [f for f in files if f.stem.split("_")[-1] in keep]
    return [str(f) for f in files]


def generate(size: str, out: Path) -> dict:
    """Write the archive of ``size`` under ``out/size`` unless the same one is there."""
    return generate_archive(SIZES[size], out / size)


def generate_archive(settings: dict, case_dir: Path) -> dict:
    """Write a demo archive of ``settings`` (years, grid, domain) into ``case_dir``
    unless the same one is there (its ``generation.json`` records the settings)."""
    import reanalysis_demo

    record = case_dir / "generation.json"
    wanted = {"years": settings["years"], "grid": settings["grid"], "seed": SEED,
              "start_year": START_YEAR, "domain": settings["domain"]}
    if record.exists():
        recorded = json.loads(record.read_text())
        if {k: recorded.get(k) for k in wanted} == wanted and \
                len(archive_files(case_dir)) == 2 * settings["years"]:
            return {"generate_s": round(recorded["generate_s"], 1), "reused": True}
    if case_dir.exists():
        shutil.rmtree(case_dir)
    options = {"domain": tuple(settings["domain"])} if settings["domain"] else {}
    started = time.perf_counter()
    reanalysis_demo.write_archive(case_dir, settings["years"], start_year=START_YEAR,
                                  grid=settings["grid"], seed=SEED, progress=False, **options)
    elapsed = time.perf_counter() - started
    record.write_text(json.dumps({**wanted, "generate_s": elapsed}))
    return {"generate_s": round(elapsed, 1), "reused": False}


def _median_ms(values) -> float:
    return round(1e3 * statistics.median(values), 3)


# ----------------------------------------------------------------------- child tasks

def child_build(spec: dict) -> dict:
    """Build a store; report wall time, peak RSS, solver and eigenvalues."""
    import reanalysis_demo
    from analogs.api import build_store
    from analogs.stages.outcomes import Region

    chunks = {"time": spec["chunk_days"]} if spec.get("chunk_days") else None
    started = time.perf_counter()
    store = build_store(spec["files"], spec["store"], events=spec.get("events"),
                        region=Region.box(*reanalysis_demo.CENTRAL_REGION), chunks=chunks,
                        scheduler=spec.get("scheduler"), index=spec.get("index", "auto"),
                        progress=False)
    elapsed = time.perf_counter() - started
    return {"build_s": round(elapsed, 2), "peak_rss_mb": round(peak_rss_mb(), 1),
            "solver": store.eof.solver_, "n_modes": int(store.eof.n_modes_),
            "eigenvalues": store.eof.eigenvalues_.values.tolist(),
            "n_days": int(len(store.times))}


def archive_anomalies(files):
    """The archive's harmonic anomalies, in memory (the in-memory build's EOF input)."""
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.sources import open_archive

    archive = open_archive(files, chunks={"time": CHUNK_DAYS})
    return HarmonicClimatology().fit(archive).transform(archive).load()


def anomaly_matrix(anomalies):
    """The weighted, balanced anomaly matrix (time, space) of the archive, float64.

    Same recipe as the store (eof module docstring), written out here with numpy:
    anomalies centred, times sqrt(cos lat), each field divided by the root of its
    total weighted variance.
    """
    weights = np.sqrt(np.cos(np.radians(anomalies["lat"].values)))[:, None]
    n_time = anomalies.sizes["time"]
    blocks = []
    for name in anomalies.data_vars:
        block = np.asarray(anomalies[name].values, dtype=np.float64)
        block = (block * weights).reshape(n_time, -1)
        block -= block.mean(axis=0)
        blocks.append(block / np.sqrt((block ** 2).sum() / (n_time - 1)))
        del block
    return np.concatenate(blocks, axis=1)


def child_exact_svd(spec: dict) -> dict:
    """Full exact SVD (numpy.linalg.svd) of the matrix; eigenvalues S^2 / (N - 1).

    Beside it, our EOF stage on the same anomalies: ``MultivariateEOF().fit`` with
    its defaults (means, scales, the matrix, the randomized float32 solve, signs,
    residuals), timed whole, against the SVD call alone.
    """
    from analogs.stages.eof import MultivariateEOF

    anomalies = archive_anomalies(spec["files"])
    started = time.perf_counter()
    model = MultivariateEOF().fit(anomalies)
    ours_s = time.perf_counter() - started
    ours = model.eigenvalues_.values
    del model
    matrix = anomaly_matrix(anomalies)
    del anomalies
    started = time.perf_counter()
    _, singular, _ = np.linalg.svd(matrix, full_matrices=False)
    elapsed = time.perf_counter() - started
    eigenvalues = singular ** 2 / (matrix.shape[0] - 1)
    return {"svd_s": round(elapsed, 2), "peak_rss_mb": round(peak_rss_mb(), 1),
            "matrix_shape": list(matrix.shape), "eigenvalues": eigenvalues[:20].tolist(),
            "our_eof_stage_s": round(ours_s, 3),
            "eof_stage_speedup_vs_exact_svd": round(elapsed / ours_s, 1),
            "eof_stage_leading10_max_rel_error": eigen_error(ours.tolist(), eigenvalues.tolist())}


def child_sklearn_pca(spec: dict) -> dict:
    """scikit-learn PCA(svd_solver="full") of the matrix, 20 components."""
    from sklearn.decomposition import PCA

    matrix = anomaly_matrix(archive_anomalies(spec["files"]))
    started = time.perf_counter()
    PCA(n_components=20, svd_solver="full").fit(matrix)
    elapsed = time.perf_counter() - started
    return {"pca_s": round(elapsed, 2), "peak_rss_mb": round(peak_rss_mb(), 1)}


CHILD_TASKS = {"build": child_build, "exact_svd": child_exact_svd, "sklearn_pca": child_sklearn_pca}


# -------------------------------------------------------------------------- queries

def query_latency(store_path: Path, n_queries: int) -> dict:
    """Median in-process query time against numpy and scikit-learn brute force."""
    from sklearn.neighbors import NearestNeighbors

    from analogs.api import AnalogStore
    from analogs.stages.selection import DEFAULT_EXCLUDE, DEFAULT_WINDOW, candidate_ids, fetch_size

    loaded = AnalogStore.load(store_path)
    rng = np.random.default_rng(0)
    rows = rng.choice(len(loaded.times), size=min(n_queries, len(loaded.times)), replace=False)
    dates = [str(loaded.days[row].date()) for row in rows]
    loaded.find(date=dates[0], top=20)  # builds the index once, as a session would
    ours, numpy_brute, sklearn_brute = [], [], []
    pcs = loaded.pcs.values[:, :loaded.n_query_modes]
    fetch = fetch_size(20, 3, len(pcs))
    for row, date in zip(rows, dates):
        started = time.perf_counter()
        loaded.find(date=date, top=20)
        ours.append(time.perf_counter() - started)

        started = time.perf_counter()
        allowed = candidate_ids(loaded.times, loaded.times[row], window=DEFAULT_WINDOW,
                                exclude=DEFAULT_EXCLUDE)
        distances = np.sqrt(((pcs[allowed] - pcs[row]) ** 2).sum(axis=1))
        np.argsort(distances)[:fetch]
        numpy_brute.append(time.perf_counter() - started)

        started = time.perf_counter()
        allowed = candidate_ids(loaded.times, loaded.times[row], window=DEFAULT_WINDOW,
                                exclude=DEFAULT_EXCLUDE)
        NearestNeighbors(n_neighbors=min(fetch, len(allowed)), algorithm="brute").fit(
            pcs[allowed]).kneighbors(pcs[row:row + 1])
        sklearn_brute.append(time.perf_counter() - started)
    return {"n_queries": len(rows), "query_median_ms": _median_ms(ours),
            "numpy_bruteforce_ranking_median_ms": _median_ms(numpy_brute),
            "sklearn_nn_brute_ranking_median_ms": _median_ms(sklearn_brute),
            "query_over_numpy_ranking": round(statistics.median(ours) / statistics.median(numpy_brute), 2),
            "query_over_sklearn_ranking": round(statistics.median(ours) / statistics.median(sklearn_brute), 2),
            "sample_date": dates[1]}


def cli_latency(store_path: Path, date: str, runs: int) -> dict:
    """Median wall time of ``analogs find --json`` as a whole command."""
    script = shutil.which("analogs") or shutil.which("analogs", path=str(Path(sys.executable).parent))
    command = ([script] if script else [sys.executable, "-m", "analogs"]) + [
        "find", "--store", str(store_path), "--date", date, "--top", "20", "--json"]
    times = []
    for _ in range(runs):
        started = time.perf_counter()
        done = subprocess.run(command, capture_output=True, text=True)
        times.append(time.perf_counter() - started)
        if done.returncode != 0:
            return {"error": done.stderr.strip()[-300:]}
        json.loads(done.stdout)
    return {"cli_find_json_median_s": round(statistics.median(times), 3),
            "cli_find_json_runs_s": [round(t, 3) for t in times],
            "command": " ".join(Path(command[0]).name if i == 0 else c for i, c in enumerate(command[:2]))}


def index_recall(store_path: Path) -> dict:
    """Recall@20 of HNSW against exact search, season-window filtered, several efSearch."""
    from analogs.api import AnalogStore
    from analogs.stages.index import AnalogIndex, recall_at_k
    from analogs.stages.selection import DEFAULT_EXCLUDE, DEFAULT_WINDOW, candidate_ids

    loaded = AnalogStore.load(store_path)
    vectors = loaded.pcs.values[:, :loaded.n_query_modes]
    times = loaded.times

    def allowed_for(row):
        return candidate_ids(times, times[row], window=DEFAULT_WINDOW, exclude=DEFAULT_EXCLUDE)

    recalls = {}
    default = AnalogIndex(kind="hnsw").fit(vectors)
    for ef_search in (32, 64, 128, default.ef_search):
        index = AnalogIndex(kind="hnsw", ef_search=ef_search).fit(vectors)
        recalls[str(ef_search)] = round(recall_at_k(index, vectors, k=20, allowed_for=allowed_for), 4)
    return {"n_vectors": int(len(vectors)), "n_dims": int(vectors.shape[1]),
            "hnsw_M": default.hnsw_neighbours, "default_ef_search": default.ef_search,
            "recall_at_20_by_ef_search": recalls,
            "recall_at_20_default": recalls[str(default.ef_search)]}


# ---------------------------------------------------------------------------- driver

def baseline_years(size: str, n_time_per_year: float, n_space: int) -> int:
    """Largest leading number of years whose exact SVD fits the baseline memory."""
    years = SIZES[size]["years"]
    while years > 1 and BASELINE_MEMORY_FACTOR * 8 * years * n_time_per_year * n_space > BASELINE_MEMORY_BYTES:
        years -= 1
    return years


def eigen_error(ours, exact, k=10) -> float:
    k = min(k, len(ours), len(exact))
    return float(np.max(np.abs(np.asarray(ours[:k]) / np.asarray(exact[:k]) - 1.0)))


def bench_size(size: str, out: Path, args) -> dict:
    result = {"size": size, **SIZES[size], "load_average_start": load_average()}
    result.update(generate(size, out))
    size_dir = out / size
    files = archive_files(size_dir)
    events = str(size_dir / "events.csv")
    builds = {}
    for path in BUILD_PATHS[size]:
        spec = {"files": files, "store": str(size_dir / f"store_{path}"), "events": events,
                "chunk_days": CHUNK_DAYS if path == "chunked" else None}
        runs = [run_child("build", spec) for _ in range(1 if size == "large" else args.build_runs)]
        good = [r for r in runs if "error" not in r]
        builds[path] = dict(good[0] if good else runs[0])
        if len(good) > 1:
            builds[path]["build_s_runs"] = [r["build_s"] for r in good]
            builds[path]["build_s"] = round(statistics.median(builds[path]["build_s_runs"]), 2)
            builds[path]["peak_rss_mb"] = max(r["peak_rss_mb"] for r in good)
        builds[path]["load_average"] = load_average()
    result["builds"] = builds
    reference = next((b for b in builds.values() if "error" not in b), None)
    store_path = size_dir / f"store_{next(p for p, b in builds.items() if 'error' not in b)}"

    # Baselines on the same matrix, or the largest leading subset of years that fits.
    import xarray as xr

    with xr.open_dataset(files[0]) as first:
        n_space = 2 * first.sizes["lat"] * first.sizes["lon"]
    years = baseline_years(size, 365.25, n_space)
    base_files = archive_files(size_dir, years)
    baseline = {"years": years, "n_space": n_space}
    if years < SIZES[size]["years"]:
        baseline["note"] = (f"the exact SVD of all {SIZES[size]['years']} years needs about "
                            f"{BASELINE_MEMORY_FACTOR * 8 * SIZES[size]['years'] * 365.25 * n_space / 1e9:.0f} GB; "
                            f"baselines run on the first {years} years, with our build timed "
                            "on the same subset for the ratio")
        subset = {"files": base_files, "store": str(size_dir / "store_subset"), "events": events,
                  "chunk_days": CHUNK_DAYS}
        baseline["our_build_on_subset"] = run_child("build", subset)
        ours_for_ratio = baseline["our_build_on_subset"]
    else:
        ours_for_ratio = reference
    baseline["exact_svd"] = run_child("exact_svd", {"files": base_files})
    baseline["sklearn_pca"] = run_child("sklearn_pca", {"files": base_files})
    exact = baseline["exact_svd"]
    if "error" not in exact and ours_for_ratio and "error" not in ours_for_ratio:
        baseline["build_speedup_vs_exact_svd"] = round(exact["svd_s"] / ours_for_ratio["build_s"], 2)
        baseline["leading10_eigenvalue_max_rel_error"] = eigen_error(
            ours_for_ratio["eigenvalues"], exact["eigenvalues"])
        if "error" not in baseline["sklearn_pca"]:
            baseline["build_speedup_vs_sklearn_pca"] = round(
                baseline["sklearn_pca"]["pca_s"] / ours_for_ratio["build_s"], 2)
    result["baselines"] = baseline
    if reference:
        result["query"] = query_latency(store_path, args.queries)
        result["cli"] = cli_latency(store_path, result["query"]["sample_date"], args.cli_runs)
    result["load_average_end"] = load_average()
    return result


def print_table(results: dict) -> None:
    print(f"{'size':8} {'measure':46} value")
    for size, r in results["sizes"].items():
        rows = [("generate_s" + (" (recorded)" if r.get("reused") else ""), r.get("generate_s"))]
        for path, b in r["builds"].items():
            rows += [(f"build_{path}_s", b.get("build_s", b.get("error"))),
                     (f"build_{path}_peak_rss_mb", b.get("peak_rss_mb"))]
        base = r["baselines"]
        rows += [("baseline_years", base["years"]),
                 ("exact_svd_s", base["exact_svd"].get("svd_s", base["exact_svd"].get("error"))),
                 ("exact_svd_peak_rss_mb", base["exact_svd"].get("peak_rss_mb")),
                 ("sklearn_pca_full_s", base["sklearn_pca"].get("pca_s", base["sklearn_pca"].get("error"))),
                 ("build_speedup_vs_exact_svd", base.get("build_speedup_vs_exact_svd")),
                 ("eof_stage_s (same anomalies)", base["exact_svd"].get("our_eof_stage_s")),
                 ("eof_stage_speedup_vs_exact_svd", base["exact_svd"].get("eof_stage_speedup_vs_exact_svd")),
                 ("eof_stage_leading10_max_rel_error", base["exact_svd"].get("eof_stage_leading10_max_rel_error")),
                 ("build_speedup_vs_sklearn_pca", base.get("build_speedup_vs_sklearn_pca")),
                 ("leading10_eigenvalue_max_rel_error", base.get("leading10_eigenvalue_max_rel_error"))]
        if "our_build_on_subset" in base:
            rows.append(("our_build_on_subset_s", base["our_build_on_subset"].get("build_s")))
        for key in ("query_median_ms", "numpy_bruteforce_ranking_median_ms",
                    "sklearn_nn_brute_ranking_median_ms", "query_over_numpy_ranking"):
            rows.append((key, r.get("query", {}).get(key)))
        rows.append(("cli_find_json_median_s", r.get("cli", {}).get("cli_find_json_median_s",
                                                                    r.get("cli", {}).get("error"))))
        rows.append(("load_average_start/end", f"{r['load_average_start']} / {r['load_average_end']}"))
        for key, value in rows:
            print(f"{size:8} {key:46} {value}")
    if "recall" in results:
        for ef, recall in results["recall"]["recall_at_20_by_ef_search"].items():
            print(f"{results['recall']['size']:8} {'hnsw_recall_at_20_ef' + ef:46} {recall}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="small,medium,large",
                        help="comma-separated subset of small,medium,large")
    parser.add_argument("--out", type=Path, help="work directory (archives, stores, JSON)")
    parser.add_argument("--queries", type=int, default=200)
    parser.add_argument("--cli-runs", type=int, default=5)
    parser.add_argument("--build-runs", type=int, default=3,
                        help="builds per path and size, median reported (large: always 1)")
    args = parsed_or_child(parser, CHILD_TASKS, argv)
    if args is None:
        return None
    sizes = [s.strip() for s in args.sizes.split(",") if s.strip()]
    unknown = sorted(set(sizes) - set(SIZES))
    if unknown:
        parser.error(f"--sizes: unknown size(s) {', '.join(unknown)}; expected small, medium, large")
    out = args.out or Path(tempfile.mkdtemp(prefix="analogs-scale-"))
    out.mkdir(parents=True, exist_ok=True)
    results = {"cpu_count": os.cpu_count(), "sizes": {}}
    for size in sizes:
        results["sizes"][size] = bench_size(size, out, args)
    largest = sizes[-1]
    store = next((out / largest / f"store_{p}" for p in BUILD_PATHS[largest]
                  if "error" not in results["sizes"][largest]["builds"][p]), None)
    if store is not None:
        results["recall"] = {"size": largest, **index_recall(store)}
    print_table(results)
    print(json.dumps(results, indent=2))
    (out / "bench_scale.json").write_text(json.dumps(results, indent=2))
    return results


if __name__ == "__main__":
    main()
