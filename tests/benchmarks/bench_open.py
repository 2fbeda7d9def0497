"""Reading benchmark: ``open_archive`` alone against the floor read (every file read once
into float32 with netCDF4), on the archive of ``bench_build.py`` (40 years at 1 degree
by default; ``--case y10_g025`` for 10 years at 0.25 degree, once generated there).

Each run is a fresh interpreter (bench_scale's runner) that first opens two files of
the other case's archive when it is there (imports done; no file of the timed archive
opened before; otherwise two of the timed archive's own), then times one call: the floor read; ``open_archive`` in memory; and
``open_archive(chunks={"time": 365}, scratch=...)`` (the out-of-core build's decoding
once into a memory-mapped file per field). Medians of wall and CPU (user + system, all
threads: the steadier figure on a shared machine), their ratios to the floor's, peak
memory and the load average. The children import ``analogs`` from ``PYTHONPATH``: run it
once per checkout to compare them.

Run:  PYTHONPATH=.:tests/benchmarks python tests/benchmarks/bench_open.py [--runs 5]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

import bench_build
import bench_scale as scale
from bench_scale import archive_files, load_average, peak_rss_mb

WARM_UP_CASE = {"y40_g1": "y10_g025", "y10_g025": "y40_g1"}


def _warm_up(spec: dict, **options) -> None:
    from analogs.stages.sources import open_archive
    open_archive(spec["warm_up"], **options)


def child_floor(spec: dict) -> dict:
    import netCDF4  # noqa: F401  (imported before the clock, as the tool's child)
    started, started_cpu = time.perf_counter(), time.process_time()
    bench_build._read_float32(spec["files"])
    return {"seconds": time.perf_counter() - started,
            "cpu_seconds": time.process_time() - started_cpu, "peak_rss_mb": peak_rss_mb()}


def child_open(spec: dict) -> dict:
    from analogs.stages.sources import open_archive
    with tempfile.TemporaryDirectory(dir=spec["scratch_dir"]) as folder:
        made = []

        def scratch(shape, dtype):
            made.append(np.memmap(Path(folder) / f"field{len(made)}.bin", dtype=dtype,
                                  mode="w+", shape=tuple(shape)))
            return made[-1]

        options = {"chunks": {"time": 365}, "scratch": scratch} if spec["scratch"] else {}
        _warm_up(spec, **options)
        started, started_cpu = time.perf_counter(), time.process_time()
        open_archive(spec["files"], **options)
        seconds, cpu = time.perf_counter() - started, time.process_time() - started_cpu
        del made[:]
    return {"seconds": seconds, "cpu_seconds": cpu, "peak_rss_mb": peak_rss_mb()}


CHILD_TASKS = {"floor": child_floor, "open": child_open}


def _summary(runs: list[dict]) -> dict:
    errors = [r["error"] for r in runs if "error" in r]
    if errors:
        return {"error": errors[0]}
    return {"median_s": round(statistics.median(r["seconds"] for r in runs), 3),
            "cpu_median_s": round(statistics.median(r["cpu_seconds"] for r in runs), 3),
            "cpu_runs_s": [round(r["cpu_seconds"], 3) for r in runs],
            "peak_rss_mb": round(max(r["peak_rss_mb"] for r in runs), 1)}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path,
                        default=Path(tempfile.gettempdir()) / "analogs-bench-build")
    parser.add_argument("--case", choices=sorted(WARM_UP_CASE), default="y40_g1")
    parser.add_argument("--runs", type=int, default=5)
    args = scale.parsed_or_child(parser, CHILD_TASKS, argv)
    if args is None:
        return None
    bench_build.generate(args.case, args.out)
    files = archive_files(args.out / args.case)
    other = archive_files(args.out / WARM_UP_CASE[args.case]) or files
    warm_up = [other[0], other[len(other) // 2]]  # one file of each field
    spec = {"files": files, "warm_up": warm_up, "scratch_dir": str(args.out)}
    tasks = {"floor_read": ("floor", spec), "open_memory": ("open", {**spec, "scratch": False}),
             "open_scratch": ("open", {**spec, "scratch": True})}
    runs = {label: [] for label in tasks}
    result = {"case": args.case, "n_files": len(files), "load_average_start": load_average()}
    for _ in range(args.runs):  # interleaved, so a change of load meets every task
        for label, (task, task_spec) in tasks.items():
            runs[label].append(scale.run_child(task, task_spec, script=__file__))
    for label in tasks:
        result[label] = _summary(runs[label])
    floor = result["floor_read"]
    for label in ("open_memory", "open_scratch"):
        if "median_s" in result[label] and "median_s" in floor:
            result[f"{label}_to_floor_wall"] = round(result[label]["median_s"] / floor["median_s"], 2)
            result[f"{label}_to_floor_cpu"] = round(
                result[label]["cpu_median_s"] / floor["cpu_median_s"], 2)
    result["load_average_end"] = load_average()
    result["analogs"] = os.environ.get("PYTHONPATH", "")
    print(json.dumps(result, indent=2))
    return result


if __name__ == "__main__":
    main()
