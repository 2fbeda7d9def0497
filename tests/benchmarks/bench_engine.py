"""Benchmark of the core engine on a 20-year, 1-degree synthetic archive.

Measured in the same run:
- build (read, climatology, EOFs, PCs, tags, store write) against a full exact SVD
  (numpy.linalg.svd) of the same weighted anomaly matrix;
- query latency (one --date target, top 20, season window, de-clustering, outcome
  statistics) against brute-force numpy distances over the same candidate days.

Run:  python tests/benchmarks/bench_engine.py [--years 20] [--repeat 3] [--out DIR]
Prints a table and a JSON object.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np


def _median_time(function, repeat):
    times = []
    result = None
    for _ in range(repeat):
        started = time.perf_counter()
        result = function()
        times.append(time.perf_counter() - started)
    return statistics.median(times), result


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--queries", type=int, default=200)
    parser.add_argument("--out", type=Path)
    args = parser.parse_args(argv)

    import reanalysis_demo
    from analogs.api import AnalogStore, build_store
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.outcomes import Region
    from analogs.stages.selection import candidate_ids
    from analogs.stages.sources import open_archive

    out = args.out or Path(tempfile.mkdtemp(prefix="analogs-bench-"))
    started = time.perf_counter()
    reanalysis_demo.write_archive(out, years=args.years, progress=False)
    generate_s = time.perf_counter() - started
    files = sorted((out / "archive").glob("*.nc"))
    region = Region.box(*reanalysis_demo.CENTRAL_REGION)

    build_s, store = _median_time(
        lambda: build_store(files, out / "store", events=out / "events.csv", region=region,
                            progress=False), args.repeat)

    # Baseline: full exact SVD of the same weighted, balanced anomaly matrix.
    archive = open_archive(files, progress=False).load()
    anomalies = HarmonicClimatology().fit(archive).transform(archive)
    weights = np.sqrt(np.cos(np.radians(archive["lat"].values)))[:, None]
    blocks = []
    for name in anomalies.data_vars:
        block = (anomalies[name].values * weights).reshape(len(archive["time"]), -1)
        blocks.append(block / np.sqrt((block ** 2).sum() / (block.shape[0] - 1)))
    matrix = np.concatenate(blocks, axis=1)
    svd_s, (_, singular, _) = _median_time(lambda: np.linalg.svd(matrix, full_matrices=False), 1)
    exact_eigen = singular ** 2 / (matrix.shape[0] - 1)
    ours = store.eof.eigenvalues_.values
    k = min(10, len(ours))
    eigen_error = float(np.max(np.abs(ours[:k] / exact_eigen[:k] - 1.0)))

    loaded = AnalogStore.load(out / "store")
    rng = np.random.default_rng(0)
    rows = rng.choice(len(loaded.times), size=args.queries, replace=False)
    loaded.find(date=str(loaded.days[rows[0]].date()))  # build the index once
    query_times = []
    for row in rows:
        started = time.perf_counter()
        loaded.find(date=str(loaded.days[row].date()), top=20)
        query_times.append(time.perf_counter() - started)
    pcs = loaded.pcs.values
    brute_times = []
    for row in rows:
        started = time.perf_counter()
        allowed = candidate_ids(loaded.times, loaded.times[row], window=45, exclude=10)
        distances = np.sqrt(((pcs[allowed] - pcs[row]) ** 2).sum(axis=1))
        np.argsort(distances)[:60]
        brute_times.append(time.perf_counter() - started)

    results = {
        "archive": {"years": args.years, "days": int(len(loaded.times)),
                    "grid_points": int(archive.sizes["lat"] * archive.sizes["lon"]),
                    "fields": list(archive.data_vars), "matrix_shape": list(matrix.shape)},
        "generate_s": round(generate_s, 2),
        "build_median_s": round(build_s, 2),
        "exact_svd_s": round(svd_s, 2),
        "build_speedup_vs_exact_svd": round(svd_s / build_s, 2),
        "eof_solver": store.eof.solver_,
        "n_modes": int(store.eof.n_modes_),
        "leading10_eigenvalue_max_rel_error": eigen_error,
        "query_median_ms": round(1e3 * statistics.median(query_times), 3),
        "bruteforce_ranking_median_ms": round(1e3 * statistics.median(brute_times), 3),
        "query_over_bruteforce_ranking": round(statistics.median(query_times) / statistics.median(brute_times), 2),
    }
    print(f"{'measure':40} value")
    for key, value in results.items():
        if key != "archive":
            print(f"{key:40} {value}")
    print(json.dumps(results, indent=2))
    return results


if __name__ == "__main__":
    main()
