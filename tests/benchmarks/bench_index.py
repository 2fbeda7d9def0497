"""Index benchmark at millions of days: exact and HNSW search under a season window.

A forecaster's archive of daily analyses holds tens of thousands of days; an index of
millions arises from reforecast ensembles (every member of every day) or sub-daily
fields. This script builds such an index from a real store's principal components:
each archive day appears ``members`` times, perturbed like ensemble members (Gaussian
noise of ``--spread`` times each mode's standard deviation), so neighbours keep the
archive's structure (decaying spectrum, seasonal cycle). For each size it measures

- index build time (flat, HNSW) and the index's memory;
- one-query latency, top 20, season window of +-45 days around the query's calendar
  day through faiss ID selection (``AnalogIndex.search`` with the allowed ids: a
  bitmap selector at these sizes), median over ``--queries`` queries, for flat and
  HNSW search, against a numpy brute-force baseline (distances to the allowed rows,
  ``argpartition``) in the same run;
- recall@20 of HNSW against exact flat search under the same season window;
- the same with a narrow filter, the season window and one archive day in ten (as a
  regime filter would allow; about 2.5 % of the vectors), which ``AnalogIndex``
  answers by an exact search of the allowed vectors alone.

    python tests/benchmarks/bench_index.py --store STORE [--sizes 100000,1000000,3000000]

``STORE`` is any built store (e.g. ``analogs demo --out DIR`` writes ``DIR/store``;
the 40-year store of bench_scale.py is the one quoted in the notes). Prints a table and
a JSON object; peak resident memory of the whole run is printed at the end.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
from bench_scale import _median_ms as median_ms, load_average, peak_rss_mb

from analogs.stages.selection import DEFAULT_TOP as TOP, DEFAULT_WINDOW as WINDOW, circular_day_gap


def ensemble_vectors(pcs: np.ndarray, day_of_year: np.ndarray, n_vectors: int, spread: float,
                     seed: int = 0):
    """``n_vectors`` rows: archive days repeated as perturbed members (float32); also
    each row's calendar day and archive day."""
    rng = np.random.default_rng(seed)
    source = np.arange(n_vectors) % len(pcs)
    scale = (spread * pcs.std(axis=0)).astype(np.float32)
    vectors = pcs.astype(np.float32)[source]
    vectors += rng.standard_normal(vectors.shape, dtype=np.float32) * scale
    return vectors, day_of_year[source], source


def season_ids(day_of_year: np.ndarray, day: int) -> np.ndarray:
    return np.flatnonzero(circular_day_gap(day_of_year, day) <= WINDOW)


def numpy_top(vectors, squared_norms, query, allowed, k):
    distances = squared_norms[allowed] - 2.0 * (vectors[allowed] @ query)
    part = np.argpartition(distances, k)[:k]
    return allowed[part[np.argsort(distances[part])]]


def bench_size(n_vectors, pcs, day_of_year, args) -> dict:
    from analogs.stages.index import AnalogIndex

    vectors, doy, source = ensemble_vectors(pcs, day_of_year, n_vectors, args.spread)
    one_day_in_ten = source % 10 == 0
    result = {"n_vectors": n_vectors, "n_dims": int(vectors.shape[1])}
    indexes = {}
    for kind in ("flat", "hnsw"):
        started = time.perf_counter()
        indexes[kind] = AnalogIndex(kind=kind).fit(vectors)
        result[f"{kind}_build_s"] = round(time.perf_counter() - started, 2)
    result["flat_index_mb"] = round(vectors.nbytes / 2**20, 1)
    hnsw = indexes["hnsw"]
    result["hnsw_index_mb"] = round(
        (vectors.nbytes + 4 * n_vectors * 2 * hnsw.hnsw_neighbours) / 2**20, 1)

    rng = np.random.default_rng(1)
    rows = rng.choice(n_vectors, size=args.queries, replace=False)
    squared_norms = np.einsum("ij,ij->i", vectors, vectors)
    timings = {"selection": [], "flat": [], "hnsw": [], "numpy": [], "narrow_flat": [],
               "narrow_hnsw": []}
    recalls, narrow_recalls = [], []
    for row in rows:
        query = vectors[row]
        started = time.perf_counter()
        allowed = season_ids(doy, int(doy[row]))
        timings["selection"].append(time.perf_counter() - started)
        found = {}
        for kind, index in indexes.items():
            started = time.perf_counter()
            found[kind] = index.search(query, TOP, allowed=allowed)[1][0]
            timings[kind].append(time.perf_counter() - started)
        started = time.perf_counter()
        baseline = numpy_top(vectors, squared_norms, query, allowed, TOP)
        timings["numpy"].append(time.perf_counter() - started)
        exact = set(found["flat"].tolist())
        recalls.append(len(exact & set(found["hnsw"].tolist())) / TOP)
        narrow = allowed[one_day_in_ten[allowed]]
        for kind, index in indexes.items():
            started = time.perf_counter()
            found[kind] = index.search(query, TOP, allowed=narrow)[1][0]
            timings[f"narrow_{kind}"].append(time.perf_counter() - started)
        narrow_recalls.append(
            len(set(found["flat"].tolist()) & set(found["hnsw"].tolist())) / TOP)
        if row == rows[0]:
            result["flat_equals_numpy_first_query"] = bool(
                set(baseline.tolist()) == exact)
    result["allowed_share"] = round(len(allowed) / n_vectors, 3)
    result["narrow_allowed_share"] = round(len(narrow) / n_vectors, 4)
    for key, values in timings.items():
        result[f"{key}_median_ms"] = median_ms(values)
    result["hnsw_recall_at_20"] = round(float(np.mean(recalls)), 4)
    result["narrow_hnsw_recall_at_20"] = round(float(np.mean(narrow_recalls)), 4)
    result["numpy_over_flat"] = round(result["numpy_median_ms"] / result["flat_median_ms"], 2)
    result["numpy_over_hnsw"] = round(result["numpy_median_ms"] / result["hnsw_median_ms"], 2)
    return result


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--store", required=True, help="a built analogs store")
    parser.add_argument("--sizes", default="100000,1000000,3000000",
                        help="comma-separated numbers of indexed vectors")
    parser.add_argument("--queries", type=int, default=100)
    parser.add_argument("--spread", type=float, default=0.1,
                        help="member perturbation, in units of each mode's std")
    args = parser.parse_args(argv)

    from analogs.api import AnalogStore

    store = AnalogStore.load(args.store)
    pcs = store.pcs.values
    day_of_year = store.days.day_of_year.to_numpy()
    results = {"store": str(args.store), "archive_days": int(len(pcs)),
               "load_average_start": load_average(), "sizes": []}
    for size in (int(s) for s in args.sizes.split(",")):
        results["sizes"].append(bench_size(size, pcs, day_of_year, args))
        print(json.dumps(results["sizes"][-1]), flush=True)
    results["load_average_end"] = load_average()
    results["peak_rss_mb"] = round(peak_rss_mb(), 1)
    keys = [k for k in results["sizes"][0] if k != "n_vectors"]
    print(f"{'measure':34}" + "".join(f"{r['n_vectors']:>14,}" for r in results["sizes"]))
    for key in keys:
        print(f"{key:34}" + "".join(f"{str(r[key]):>14}" for r in results["sizes"]))
    print(json.dumps(results))


if __name__ == "__main__":
    main()
