"""Where the time of ``analogs climatology`` goes: the whole briefing against its slides.

Uses (or builds) a demo store, then runs :func:`analogs.workflows.briefing.build_briefing`
``--runs`` times in process (after one warm-up) and reports, as medians of CPU seconds
(``time.process_time``, steadier than wall time on a shared machine): the whole
briefing, the drawing of each slide (figure built and PNG written, by timing the
slide functions and ``figure_png``) and the slides' share of the whole. Also times the
command as a subprocess (wall, median) for the figure a user sees.

    python tests/benchmarks/bench_briefing.py --store /tmp/demo/store --season 5-9
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--store", required=True, help="a store with tags and events")
    parser.add_argument("--season", default="5-9")
    parser.add_argument("--runs", type=int, default=3)
    args = parser.parse_args(argv)

    from analogs.api import AnalogStore
    from analogs.presentation import figures, slides
    from analogs.workflows import briefing

    store = AnalogStore.load(args.store)
    spent: dict[str, float] = {}

    def timing(name, function):
        def wrapped(*a, **k):
            start = time.process_time()
            try:
                return function(*a, **k)
            finally:
                spent[name] = spent.get(name, 0.0) + time.process_time() - start
        return wrapped

    for name in slides.__all__:
        if callable(getattr(slides, name)) and name[0].islower() and name not in (
                "month_names", "ordered_regimes", "regime_colours", "season_order"):
            setattr(briefing.draw, name, timing(f"draw {name}", getattr(slides, name)))
    briefing.plots.figure_png = timing("PNG (savefig)", figures.figure_png)
    briefing.plots.reliability_diagram = timing("draw reliability_diagram",
                                                figures.reliability_diagram)
    briefing.plots.roc_diagram = timing("draw roc_diagram", figures.roc_diagram)

    runs = []
    with tempfile.TemporaryDirectory() as work:
        for i in range(args.runs + 1):
            spent.clear()
            start = time.process_time()
            briefing.build_briefing(store, Path(work) / f"b{i}", months=args.season,
                                    progress=False)
            whole = time.process_time() - start
            if i:                                   # the first run warms caches up
                runs.append({"whole": whole, **spent})
        env = dict(os.environ, PYTHONPATH=str(ROOT), MPLBACKEND="Agg")
        walls = []
        for i in range(args.runs):
            start = time.perf_counter()
            subprocess.run([sys.executable, "-m", "analogs", "climatology", "--store",
                            args.store, "--out", str(Path(work) / f"cli{i}"), "--season",
                            args.season, "--quiet"], check=True, env=env,
                           stdout=subprocess.DEVNULL)
            walls.append(time.perf_counter() - start)
    keys = sorted({k for run in runs for k in run if k != "whole"})
    medians = {k: statistics.median(run.get(k, 0.0) for run in runs) for k in keys}
    whole = statistics.median(run["whole"] for run in runs)
    drawing = sum(medians.values())
    print(f"load average {os.getloadavg()[0]:.1f}; {args.runs} runs, medians (CPU s)")
    print(f"{'briefing, in process':40} {whole:7.2f}")
    for key in keys:
        print(f"  {key:38} {medians[key]:7.2f}")
    print(f"{'slides (drawing + PNG) / whole':40} {drawing / whole:7.2f}")
    print(f"{'analogs climatology, subprocess (wall s)':40} {statistics.median(walls):7.2f}")
    print(json.dumps({"whole_cpu_s": whole, "slides_cpu_s": drawing,
                      "slides_share": drawing / whole, "parts_cpu_s": medians,
                      "command_wall_s": statistics.median(walls),
                      "load_average": os.getloadavg()[0]}, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
