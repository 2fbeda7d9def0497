"""How close one query is to the machine's floor, and what a batch of dates costs.

Single query: ``analogs find --store STORE --date DAY --json`` as a whole command against
a minimal program that imports numpy, netCDF4 and faiss, reads the stored PCs and runs
one season-filtered faiss search (the floor of any tool that answers from those PCs).
Both run as separate processes, interleaved, ``--runs`` times each; the medians and their
ratio are printed for wall time and for CPU time (user + system of the child: on a shared
machine the steadier figure) (issue 18: within 4x, moonshot 2.5x).

Batch: ``analogs find --dates FILE --json`` over ``--batch`` archive dates, per date,
against one single command (the median above), and a date's own cost (what the batch
command takes beyond one single command, over the other dates).

The children keep their bytecode in ``OUT/bytecode`` whatever PYTHONDONTWRITEBYTECODE
says, as an installed package has its modules compiled (``--no-bytecode-cache``: not).

    python tests/benchmarks/bench_query.py --out /tmp/analogs-bench-query [--store STORE]

Without ``--store`` a 10-year demo store is built under ``--out`` (reused when present).
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

#: The floor: what any program answering from the stored PCs must do. The season window
#: (+/-45 days of the day of year, the day itself excluded) is applied as a faiss bitmap
#: selector, as the tool does for a window of that share of the days.
MINIMAL_PROGRAM = r"""
import sys
import numpy, netCDF4, faiss
path, row = sys.argv[1], int(sys.argv[2])
with netCDF4.Dataset(path) as scores:
    pcs = numpy.ascontiguousarray(scores["pcs"][:], dtype="float32")
    days = scores["time"][:]
index = faiss.IndexFlatL2(pcs.shape[1])
index.add(pcs)
day_of_year = (numpy.asarray(days) // 1) % 365.25
gap = numpy.abs(day_of_year - day_of_year[row])
allowed = (numpy.minimum(gap, 365.25 - gap) <= 45) & (numpy.abs(days - days[row]) > 5)
bitmap = numpy.packbits(allowed, bitorder="little")
params = faiss.SearchParameters(sel=faiss.IDSelectorBitmap(len(allowed), faiss.swig_ptr(bitmap)))
distances, ids = index.search(pcs[row:row + 1], 20, params=params)
print(ids[0].tolist())
"""


def make_store(out: Path, years: int) -> Path:
    import reanalysis_demo
    from analogs.api import build_store
    from analogs.stages.outcomes import Region
    store = out / "store"
    if (store / "manifest.json").exists():
        return store
    reanalysis_demo.write_archive(out, years=years, seed=0, progress=False)
    build_store(sorted((out / "archive").glob("*.nc")), store, events=out / "events.csv",
                region=Region.box(*reanalysis_demo.CENTRAL_REGION), progress=False)
    return store


#: Where the children keep their bytecode (set by main): an installed package has its
#: modules compiled (pip compiles them), so a child run with PYTHONDONTWRITEBYTECODE
#: would time the compiler instead (about 0.1 s of find --json). The folder is outside
#: the trees timed, which are left as they are.
BYTECODE = {"prefix": None}


def timed(command, tree=ROOT) -> tuple[float, float]:
    """Wall time and CPU time (user + system of the child) of one run, in seconds. On a
    shared machine the CPU time is the steadier figure: waiting for a core is not in it."""
    env = dict(os.environ, PYTHONPATH=str(tree))
    if BYTECODE["prefix"] is not None:
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        env["PYTHONPYCACHEPREFIX"] = str(BYTECODE["prefix"])
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    # From a neutral folder: `python -m` puts the working folder first on sys.path, which
    # would import the package of a checkout run from over the one PYTHONPATH names.
    subprocess.run(command, check=True, env=env, stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL, cwd=tempfile.gettempdir())
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def archive_dates(store: Path, count: int) -> list[str]:
    """``count`` archive days spread over the store (every season)."""
    import netCDF4
    import numpy as np
    with netCDF4.Dataset(store / "scores.nc") as scores:
        times = netCDF4.num2date(scores["time"][:], scores["time"].units,
                                 only_use_cftime_datetimes=False)
    rows = np.linspace(10, len(times) - 10, count).astype(int)
    return [times[row].strftime("%Y-%m-%d") for row in rows]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path,
                        default=Path(tempfile.gettempdir()) / "analogs-bench-query")
    parser.add_argument("--store", type=Path, default=None,
                        help="an existing store (default: a demo store built under --out)")
    parser.add_argument("--years", type=int, default=10)
    parser.add_argument("--runs", type=int, default=9)
    parser.add_argument("--baseline-tree", type=Path, default=None,
                        help="also time find --json of another checkout of analogs (e.g. "
                             "the main branch before this change), interleaved")
    parser.add_argument("--batch", type=int, default=200,
                        help="dates of the batch command (default 200; 0: no batch)")
    parser.add_argument("--no-bytecode-cache", action="store_true",
                        help="let the children follow PYTHONDONTWRITEBYTECODE (compile every "
                             "module of a tree without bytecode at each run)")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    if not args.no_bytecode_cache:
        BYTECODE["prefix"] = args.out / "bytecode"
    store = args.store or make_store(args.out, args.years)
    dates = archive_dates(store, max(args.batch, 1))
    date = archive_dates(store, 5)[2]
    row = _row_of(store, date)
    minimal_script = args.out / "minimal_query.py"
    minimal_script.write_text(MINIMAL_PROGRAM)
    dates_file = args.out / "dates.txt"
    dates_file.write_text("\n".join(dates) + "\n")

    tool = [sys.executable, "-m", "analogs", "find", "--store", str(store), "--date", date,
            "--json"]
    floor = [sys.executable, str(minimal_script), str(store / "scores.nc"), str(row)]
    batch = [sys.executable, "-m", "analogs", "find", "--store", str(store), "--dates",
             str(dates_file), "--json"]
    # Warm the file cache and write the bytecode of every tree timed.
    timed(tool), timed(floor)
    if args.baseline_tree:
        timed(tool, args.baseline_tree)
    if args.batch:
        timed(batch)
        if args.baseline_tree:
            timed(batch, args.baseline_tree)
    tool_times, floor_times, batch_times, baseline_times = [], [], [], []
    baseline_batch_times = []
    for _ in range(args.runs):  # interleaved, so load changes hit both alike
        tool_times.append(timed(tool))
        floor_times.append(timed(floor))
        if args.baseline_tree:
            baseline_times.append(timed(tool, args.baseline_tree))
    for _ in range(max(3, args.runs // 3) if args.batch else 0):
        batch_times.append(timed(batch))
        if args.baseline_tree:
            baseline_batch_times.append(timed(batch, args.baseline_tree))

    def median(runs, which):  # which: 0 wall, 1 CPU
        return statistics.median(run[which] for run in runs) if runs else float("nan")

    figures = {"store": str(store), "n_days": _n_days(store), "date": date,
               "runs": args.runs, "load_average": os.getloadavg(), "batch_dates": len(dates),
               "baseline_tree": str(args.baseline_tree) if args.baseline_tree else None}
    print(f"load average {figures['load_average'][0]:.2f}; store {store} "
          f"({figures['n_days']} days), date {date}, medians of {args.runs} runs")
    for which, label in ((0, "wall"), (1, "cpu")):
        tool_median, floor_median = median(tool_times, which), median(floor_times, which)
        batch_per_date = median(batch_times, which) / len(dates)
        # A date's own cost: what the batch command takes beyond one single command
        # (start-up, imports, load), shared out over the other dates.
        marginal = (median(batch_times, which) - tool_median) / max(1, len(dates) - 1)
        baseline_marginal = ((median(baseline_batch_times, which)
                              - median(baseline_times, which)) / max(1, len(dates) - 1))
        figures[label] = {
            "find_json_s": tool_median, "minimal_program_s": floor_median,
            "ratio": tool_median / floor_median,
            "baseline_find_json_s": median(baseline_times, which),
            "baseline_ratio": median(baseline_times, which) / floor_median,
            "batch_command_s": median(batch_times, which), "batch_per_date_s": batch_per_date,
            "batch_marginal_per_date_s": marginal,
            "baseline_batch_command_s": median(baseline_batch_times, which),
            "baseline_batch_marginal_per_date_s": baseline_marginal,
            "single_over_batch_per_date": tool_median / batch_per_date}
        line = figures[label]
        print(f"{label} time (median s)")
        print(f"  find --json (whole command)     {tool_median:8.3f} s")
        print(f"  minimal program (floor)         {floor_median:8.3f} s")
        print(f"  ratio                           {line['ratio']:8.2f}x  (target 4x, moonshot 2.5x)")
        if baseline_times:
            print(f"  baseline tree: find --json      {line['baseline_find_json_s']:8.3f} s "
                  f"= {line['baseline_ratio']:.2f}x the floor")
        if batch_times:
            print(f"  find --dates, {len(dates)} dates: {line['batch_command_s']:.3f} s, "
                  f"{1000 * batch_per_date:.1f} ms a date, "
                  f"{line['single_over_batch_per_date']:.0f}x less than one command a date; "
                  f"{1000 * marginal:.1f} ms a date beyond one command")
        if baseline_batch_times:
            print(f"  baseline tree: find --dates     {line['baseline_batch_command_s']:8.3f} s, "
                  f"{1000 * baseline_marginal:.1f} ms a date beyond one command")
    figures.update(tool_runs=tool_times, floor_runs=floor_times, baseline_runs=baseline_times,
                   batch_runs=batch_times, baseline_batch_runs=baseline_batch_times)
    print(json.dumps(figures))
    return 0


def _row_of(store: Path, date: str) -> int:
    import netCDF4
    with netCDF4.Dataset(store / "scores.nc") as scores:
        times = netCDF4.num2date(scores["time"][:], scores["time"].units,
                                 only_use_cftime_datetimes=False)
    return [t.strftime("%Y-%m-%d") for t in times].index(date)


def _n_days(store: Path) -> int:
    import netCDF4
    with netCDF4.Dataset(store / "scores.nc") as scores:
        return len(scores.dimensions["time"])


if __name__ == "__main__":
    sys.exit(main())
