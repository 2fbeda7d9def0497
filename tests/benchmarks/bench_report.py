"""How much the HTML report adds to a query: ``find --report`` against ``find --json``.

Builds a demo store (reanalysis_demo, ``--years`` years) under ``--out`` (reused when
present), then times both commands as separate processes on the same query (a date
target and a field target written from the archive), ``--runs`` times each, and prints
the medians and their ratio. Also times ``report_figures`` in process (median of the same
number of runs, after one warm-up: gathering the drawn days' fields, the marks and the
outcome maps, and drawing the SVG maps), and ``report_page`` (the whole page: the
figures, each analog's map shown again by reference, each day's reports, the HTML)
alternating with it, for what the browsing page adds. The report's maps are SVG of
the package's own (no matplotlib import); with ``--tree`` an older checkout is timed
as it draws.

The store is built with the demo continent's land-sea mask (``archive/static/
land_sea_mask.nc``, written here from ``reanalysis_demo.geography`` when the demo did
not write it), so every map draws the land-sea boundary. ``find --report`` is timed
twice: with the archive at hand (the maps draw the archive's own fields, read for the
drawn days only) and with the archive folder moved aside (the EOF reconstruction).
Each command's CPU seconds (user + system of the child) are printed beside the wall
times: on a shared machine they move less with the load than the wall time does. The
children keep their bytecode in ``OUT/bytecode`` whatever PYTHONDONTWRITEBYTECODE says,
as an installed package has its modules compiled (``--no-bytecode-cache``: not; the
report imports more of the package than ``--json``, so compiling it at each run, about
0.6 s, weighed on the ratio). ``--tree DIR`` times another checkout's package (e.g. the
main branch) with this script, for a comparison in the same session.

    python tests/benchmarks/bench_report.py --out /tmp/analogs-bench-report [--top default]

The issue's goal: ``find --report`` at most about twice ``find --json``.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
#: The package tree timed (``--tree``, default this one) and where the children keep
#: their bytecode (None: as PYTHONDONTWRITEBYTECODE says).
TIMED = {"tree": ROOT, "bytecode": None}


def make_store(out: Path, years: int) -> Path:
    import reanalysis_demo
    from analogs.api import build_store
    from analogs.stages.outcomes import Region
    store = out / "store"
    if (store / "manifest.json").exists():
        return store
    reanalysis_demo.write_archive(out, years=years, seed=11, progress=False)
    mask = out / "archive" / "static" / "land_sea_mask.nc"
    if not mask.exists():
        write_demo_mask(mask)
    build_store(sorted((out / "archive").glob("*.nc")), store, events=out / "events.csv",
                region=Region.box(*reanalysis_demo.CENTRAL_REGION), land_mask=mask,
                progress=False)
    return store


def write_demo_mask(path: Path) -> None:
    """The demo continent's land-sea mask (CF land_binary_mask) on the demo grid."""
    import numpy as np
    import xarray as xr
    from reanalysis_demo import geography
    lat, lon = geography.make_grid()
    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    path.parent.mkdir(parents=True, exist_ok=True)
    xr.Dataset({"lsm": (("lat", "lon"), geography.land_mask(lat2d, lon2d).astype("float32"),
                        {"standard_name": "land_binary_mask", "units": "1"})},
               coords={"lat": lat, "lon": lon}).to_netcdf(path)


#: CPU seconds (user + system) of each timed command, in the order run: on a shared
#: machine the wall time also counts the time spent waiting for a core.
CPU_SECONDS: list[float] = []


def timed(command) -> float:
    env = dict(os.environ, PYTHONPATH=str(TIMED["tree"]), MPLBACKEND="Agg")
    if TIMED["bytecode"] is not None:
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        env["PYTHONPYCACHEPREFIX"] = str(TIMED["bytecode"])
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    # Run from the timed tree: `python -m` puts the working directory first on sys.path,
    # ahead of PYTHONPATH, so from another checkout that checkout's package would run.
    subprocess.run(command, check=True, env=env, cwd=TIMED["tree"], stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL)
    elapsed = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    CPU_SECONDS.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return elapsed


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path,
                        default=Path(tempfile.gettempdir()) / "analogs-bench-report")
    parser.add_argument("--years", type=int, default=6)
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--date", default=None, help="target day (default: a July day)")
    parser.add_argument("--top", default="20", help="number of analogs, or 'default' for "
                        "the query's default (50 with the event-weighted metric)")
    parser.add_argument("--tree", type=Path, default=ROOT,
                        help="checkout whose package is timed (default: this one)")
    parser.add_argument("--no-bytecode-cache", action="store_true",
                        help="let the children follow PYTHONDONTWRITEBYTECODE (compile every "
                             "module they import at each run)")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    TIMED["tree"] = args.tree.resolve()
    TIMED["bytecode"] = None if args.no_bytecode_cache else args.out / "bytecode"
    sys.path.insert(0, str(TIMED["tree"]))  # that tree's package in process too
    store = make_store(args.out, args.years)

    from analogs.api import AnalogStore
    from analogs.workflows.find import find, outcome_maps, report_figures
    from analogs.workflows.page import report_page
    loaded = AnalogStore.load(store)
    date = args.date or str(loaded.days[len(loaded.days) // 2 + 180].date())
    top = None if args.top == "default" else int(args.top)
    base = [sys.executable, "-m", "analogs", "find", "--store", str(store), "--date", date,
            *(["--top", str(top)] if top else [])]
    report_dir = args.out / "report"
    json_times, report_times, reconstruction_times = [], [], []
    json_cpu, report_cpu, reconstruction_cpu = [], [], []
    timed(base + ["--json"])  # warm the file cache
    timed(base + ["--report", str(report_dir)])
    for _ in range(args.runs):
        json_times.append(timed(base + ["--json"]))
        json_cpu.append(CPU_SECONDS[-1])
        report_times.append(timed(base + ["--report", str(report_dir)]))
        report_cpu.append(CPU_SECONDS[-1])
    archive, aside = args.out / "archive", args.out / "archive-aside"
    archive.rename(aside)  # the archive no longer at hand: maps of the reconstruction
    try:
        for _ in range(args.runs):
            reconstruction_times.append(timed(base + ["--report", str(report_dir)]))
            reconstruction_cpu.append(CPU_SECONDS[-1])
    finally:
        aside.rename(archive)

    result = find(loaded, date=date, top=top)
    maps = outcome_maps(loaded, result)
    report_figures(loaded, result, maps=maps)
    report_page(loaded, result, maps=maps)
    figure_times, page_times = [], []
    for _ in range(args.runs):
        start = time.perf_counter()
        report_figures(loaded, result, maps=maps)
        figure_times.append(time.perf_counter() - start)
        start = time.perf_counter()
        report_page(loaded, result, maps=maps)
        page_times.append(time.perf_counter() - start)

    summary = {
        "tree": str(TIMED["tree"]), "bytecode_cache": TIMED["bytecode"] is not None,
        "date": date, "top": args.top, "runs": args.runs, "load_average": os.getloadavg()[0],
        "find_json_median_s": statistics.median(json_times),
        "find_report_median_s": statistics.median(report_times),
        "report_figures_median_s": statistics.median(figure_times),
        "report_page_median_s": statistics.median(page_times),
        "find_report_reconstruction_median_s": statistics.median(reconstruction_times),
        "find_json_s": json_times, "find_report_s": report_times,
        "find_report_reconstruction_s": reconstruction_times,
        "report_figures_s": figure_times, "report_page_s": page_times,
    }
    for name, values in (("find_json", json_cpu), ("find_report", report_cpu),
                         ("find_report_reconstruction", reconstruction_cpu)):
        summary[f"{name}_cpu_median_s"] = statistics.median(values)
    summary["ratio_page_over_figures"] = (summary["report_page_median_s"]
                                          / summary["report_figures_median_s"])
    summary["ratio_report_over_json"] = (summary["find_report_median_s"]
                                         / summary["find_json_median_s"])
    summary["ratio_reconstruction_report_over_json"] = (
        summary["find_report_reconstruction_median_s"] / summary["find_json_median_s"])
    print(f"{'command':<28}{'median s':>10}")
    print(f"{'find --json':<28}{summary['find_json_median_s']:>10.2f}")
    print(f"{'find --report (archive)':<28}{summary['find_report_median_s']:>10.2f}")
    print(f"{'find --report (no archive)':<28}"
          f"{summary['find_report_reconstruction_median_s']:>10.2f}")
    print(f"{'report_figures (in process)':<28}{summary['report_figures_median_s']:>10.2f}")
    print(f"{'report_page (in process)':<28}{summary['report_page_median_s']:>10.2f}")
    print(f"ratio page/figures: {summary['ratio_page_over_figures']:.2f}")
    print("ratio report/json in CPU seconds (user + system, less sensitive to load): "
          f"{summary['find_report_cpu_median_s'] / summary['find_json_cpu_median_s']:.2f} "
          "with the archive, "
          f"{summary['find_report_reconstruction_cpu_median_s'] / summary['find_json_cpu_median_s']:.2f}"
          " without")
    print(f"ratio report/json: {summary['ratio_report_over_json']:.2f} with the archive, "
          f"{summary['ratio_reconstruction_report_over_json']:.2f} without "
          f"(load average {summary['load_average']:.2f})")
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
