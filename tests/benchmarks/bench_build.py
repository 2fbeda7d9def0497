"""Build benchmark: the tool's build against its floor (read once + one randomized SVD).

Cases (synthetic archives from ``reanalysis_demo``, generated once into ``--out`` and
reused while their settings match):
- ``y40_g1``: 40 years at 1 degree on the default domain (36 x 71 points);
- ``y10_g025`` (with ``--quarter``): 10 years at 0.25 degree on
  (20, 54.75, -130, -60.25), 140 x 280 points (about 0.6 GB of NetCDF; generating it
  takes several minutes on 2 cores);
- ``large`` (with ``--large``): 40 years at 0.25 degree on the same domain (about 2.3 GB
  of NetCDF, the archive ``bench_scale.py --sizes large`` writes; generating it takes
  over an hour on 2 cores): the out-of-core build alone, ``--large-runs`` times (issue
  18's target: under 150 s at under 4 GB peak), no floor and no in-memory build.

Measured in one run, each task in its own child process (its peak resident memory is
that process's VmHWM; its time excludes the interpreter's start-up), the tasks in
rounds (each once per round), so that a drift of the machine's speed during the run
weighs on the floor and the tool alike:
- floor, read: every archive file read once into float32 (netCDF4, whole variables);
- floor, SVD: ``sklearn.utils.extmath.randomized_svd`` of the weighted anomaly matrix
  (float32; 20 modes, 20 oversamples, 2 power iterations, as the tool's solver), the
  matrix made beforehand and not timed;
- floor = median read + median SVD;
- the tool's build (``build_store`` with the demo's events and central region: reading,
  climatology, EOFs, tagging, skill hindcast, store write), in memory and out of core
  (``chunks={"time": CHUNK_DAYS}``, threaded scheduler), with its CPU time (user +
  system, all threads) beside the wall time. The children import ``analogs`` from
  ``PYTHONPATH``: point it at another checkout to time that one with the same script.

Prints, per case, each median, the ratios build / floor and out-of-core / in-memory,
and each task's peak memory; then a JSON object (also written to OUT/bench_build.json).

Run:  python tests/benchmarks/bench_build.py [--out DIR] [--runs 3] [--quarter] [--memory-only]
      python tests/benchmarks/bench_build.py --large [--large-runs 1]
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

import bench_scale as scale
from bench_scale import archive_files, load_average, peak_rss_mb

CASES = {
    "y40_g1": {"years": 40, "grid": 1.0, "domain": None},
    "y10_g025": {"years": 10, "grid": 0.25, "domain": [20.0, 54.75, -130.0, -60.25]},
    "large": {"years": 40, "grid": 0.25, "domain": [20.0, 54.75, -130.0, -60.25]},
}
CHUNK_DAYS = 365
N_MODES, N_OVERSAMPLES, N_POWER_ITER = 20, 20, 2


def run_child(task: str, spec: dict) -> dict:
    """Run ``task`` of this script in a fresh interpreter (bench_scale's runner)."""
    return scale.run_child(task, spec, script=__file__)


def generate(case: str, out: Path) -> dict:
    """Write the archive of ``case`` under ``out/case`` unless the same one is there."""
    return scale.generate_archive(CASES[case], out / case)


# ----------------------------------------------------------------------- child tasks

def _read_float32(files) -> dict:
    """Every gridded variable of every file, read whole into float32, by variable."""
    import netCDF4

    arrays = {}
    for path in files:
        with netCDF4.Dataset(path) as dataset:
            for name, variable in dataset.variables.items():
                if variable.ndim >= 3:
                    arrays.setdefault(name, []).append(
                        np.asarray(variable[:], dtype=np.float32).reshape(variable.shape[0], -1))
    return arrays


def child_read(spec: dict) -> dict:
    started = time.perf_counter()
    arrays = _read_float32(spec["files"])
    elapsed = time.perf_counter() - started
    n_bytes = sum(a.nbytes for parts in arrays.values() for a in parts)
    return {"seconds": elapsed, "peak_rss_mb": peak_rss_mb(), "gb": n_bytes / 1e9}


def child_svd(spec: dict) -> dict:
    """One randomized SVD of the area-weighted, per-field balanced anomalies (float32).

    The anomalies here are departures from each point's time mean: the floor times
    only the SVD call, whose cost does not depend on how the anomalies were made."""
    import netCDF4
    from sklearn.utils.extmath import randomized_svd

    arrays = _read_float32(spec["files"])
    with netCDF4.Dataset(spec["files"][0]) as dataset:
        lat = np.asarray(dataset.variables["lat"][:], dtype=float)
        n_lon = dataset.dimensions["lon"].size
    weights = np.repeat(np.sqrt(np.cos(np.radians(lat))), n_lon).astype(np.float32)
    blocks = []
    for name in sorted(arrays):
        block = np.concatenate(arrays.pop(name))
        block -= block.mean(axis=0)
        block *= weights
        block /= np.float32(np.sqrt((block.astype(np.float64) ** 2).sum() / (len(block) - 1)))
        blocks.append(block)
    matrix = np.concatenate(blocks, axis=1)
    del blocks
    started = time.perf_counter()
    randomized_svd(matrix, N_MODES, n_oversamples=N_OVERSAMPLES, n_iter=N_POWER_ITER,
                   power_iteration_normalizer="QR", random_state=0)
    elapsed = time.perf_counter() - started
    return {"seconds": elapsed, "peak_rss_mb": peak_rss_mb(), "shape": list(matrix.shape)}


def child_build(spec: dict) -> dict:
    import reanalysis_demo
    from analogs.api import build_store
    from analogs.stages.outcomes import Region

    chunks = {"time": spec["chunk_days"]} if spec.get("chunk_days") else None
    started, started_cpu = time.perf_counter(), time.process_time()
    store = build_store(spec["files"], spec["store"], events=spec["events"],
                        region=Region.box(*reanalysis_demo.CENTRAL_REGION), chunks=chunks,
                        progress=False)
    elapsed, cpu = time.perf_counter() - started, time.process_time() - started_cpu
    return {"seconds": elapsed, "cpu_seconds": cpu, "peak_rss_mb": peak_rss_mb(),
            "eigenvalues": store.eof.eigenvalues_.values[:10].tolist()}


CHILD_TASKS = {"read": child_read, "svd": child_svd, "build": child_build}


# ----------------------------------------------------------------------------- driver

def _summary(runs: list[dict], digits: int = 2) -> dict:
    """Median and every run's seconds, peak memory, median CPU seconds when reported;
    the first child's error instead when one failed."""
    errors = [r["error"] for r in runs if "error" in r]
    if errors:
        return {"error": errors[0]}
    summary = {"median_s": round(statistics.median(r["seconds"] for r in runs), digits),
               "runs_s": [round(r["seconds"], digits) for r in runs],
               "peak_rss_mb": round(max(r["peak_rss_mb"] for r in runs), 1)}
    if all("cpu_seconds" in r for r in runs):  # builds: CPU time, steadier under load
        summary["cpu_median_s"] = round(statistics.median(r["cpu_seconds"] for r in runs),
                                        digits)
    return summary


def bench_case(case: str, out: Path, args) -> dict:
    generation = generate(case, out)
    files = archive_files(out / case)
    events = str(out / case / "events.csv")
    runs = {"y40_g1": args.runs, "y10_g025": args.quarter_runs, "large": args.large_runs}[case]
    result = {"case": case, **CASES[case], "n_files": len(files), **generation}
    if case == "large":
        with tempfile.TemporaryDirectory(dir=out) as scratch:
            spec = {"files": files, "events": events, "chunk_days": args.chunk_days,
                    "store": str(Path(scratch) / "build_chunked")}
            result["build_chunked"] = _summary([run_child("build", spec) for _ in range(runs)])
        return result
    with tempfile.TemporaryDirectory(dir=out) as scratch:
        tasks = {"floor_read": ("read", {"files": files}),
                 "floor_svd": ("svd", {"files": files})}
        for label, chunk_days in (("build_memory", None),) + (
                () if args.memory_only else (("build_chunked", args.chunk_days),)):
            tasks[label] = ("build", {"files": files, "events": events,
                                      "chunk_days": chunk_days,
                                      "store": str(Path(scratch) / label)})
        # Round after round, each task once: a machine whose speed drifts during the run
        # (it does, by up to 30 % within an hour here) then slows the floor and the tool
        # alike, and their ratio stays comparable.
        measured = {label: [] for label in tasks}
        for _ in range(runs):
            for label, (task, spec) in tasks.items():
                measured[label].append(run_child(task, spec))
        result.update({label: _summary(found) for label, found in measured.items()})
    if all("median_s" in result[k] for k in ("floor_read", "floor_svd", "build_memory")):
        floor = result["floor_read"]["median_s"] + result["floor_svd"]["median_s"]
        result["floor_s"] = round(floor, 2)
        result["ratio_memory_to_floor"] = round(result["build_memory"]["median_s"] / floor, 2)
        if "median_s" in result.get("build_chunked", {}):
            result["ratio_chunked_to_floor"] = round(
                result["build_chunked"]["median_s"] / floor, 2)
            result["ratio_chunked_to_memory"] = round(
                result["build_chunked"]["median_s"] / result["build_memory"]["median_s"], 2)
    return result


def print_case(result: dict) -> None:
    print(f"\n== {result['case']}: {result['years']} years at {result['grid']} degree "
          f"(archive generated in {result['generate_s']} s{', reused' if result['reused'] else ''})")
    for key in ("floor_read", "floor_svd", "build_memory", "build_chunked"):
        if key not in result:
            continue
        entry = result[key]
        if "error" in entry:
            print(f"  {key:15} ERROR {entry['error']}")
        else:
            cpu = f"   CPU {entry['cpu_median_s']:.2f} s" if "cpu_median_s" in entry else ""
            print(f"  {key:15} median {entry['median_s']:8.2f} s   peak {entry['peak_rss_mb']:8.1f} MB"
                  f"   runs {entry['runs_s']}{cpu}")
    for key in ("floor_s", "ratio_memory_to_floor", "ratio_chunked_to_floor",
                "ratio_chunked_to_memory"):
        if key in result:
            print(f"  {key:24} {result[key]}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path,
                        default=Path(tempfile.gettempdir()) / "analogs-bench-build",
                        help="work directory (archives are generated once and reused)")
    parser.add_argument("--runs", type=int, default=3, help="runs of each task (1-degree case)")
    parser.add_argument("--quarter", action="store_true",
                        help="also the 10-year 0.25-degree case (large)")
    parser.add_argument("--quarter-runs", type=int, default=1)
    parser.add_argument("--only-quarter", action="store_true", help="skip the 1-degree case")
    parser.add_argument("--large", action="store_true",
                        help="only the 40-year 0.25-degree case, out of core")
    parser.add_argument("--large-runs", type=int, default=1)
    parser.add_argument("--chunk-days", type=int, default=CHUNK_DAYS)
    parser.add_argument("--memory-only", action="store_true",
                        help="skip the out-of-core builds (half the run time)")
    args = scale.parsed_or_child(parser, CHILD_TASKS, argv)
    if args is None:
        return None
    args.out.mkdir(parents=True, exist_ok=True)
    cases = ["large"] if args.large else ([] if args.only_quarter else ["y40_g1"]) + (
        ["y10_g025"] if args.quarter or args.only_quarter else [])
    results = {"load_average_start": load_average(), "cases": []}
    for case in cases:
        result = bench_case(case, args.out, args)
        print_case(result)
        results["cases"].append(result)
    results["load_average_end"] = load_average()
    print(f"\nload average: start {results['load_average_start']}, "
          f"end {results['load_average_end']}")
    text = json.dumps(results, indent=2)
    print(text)
    (args.out / "bench_build.json").write_text(text)
    return results


if __name__ == "__main__":
    main()
