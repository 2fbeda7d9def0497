"""Benchmark of batch regime tagging (diagnostics + rule classifier) of a whole archive.

Measured in the same run: `regimes.tag_days` over every day of a 40-year, 1-degree
synthetic archive at once (vectorised), against the same function called one day at a
time on a sample of days (the obvious loop), extrapolated to the archive.

Run:  python tests/benchmarks/bench_tagging.py [--years 40] [--sample 200] [--repeat 3]
Prints a table and a JSON object.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--years", type=int, default=40)
    parser.add_argument("--sample", type=int, default=200)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)

    import numpy as np
    import reanalysis_demo
    from analogs.stages.regimes import tag_days

    started = time.perf_counter()
    demo = reanalysis_demo.generate(args.years)
    generate_s = time.perf_counter() - started
    fields = demo.fields.rename({"zg": "z500", "hus": "q850"}).load()
    region = reanalysis_demo.CENTRAL_REGION

    batch = []
    for _ in range(args.repeat):
        started = time.perf_counter()
        tags = tag_days(fields, region)
        batch.append(time.perf_counter() - started)
    rows = np.random.default_rng(0).choice(fields.sizes["time"], args.sample, replace=False)
    started = time.perf_counter()
    for row in rows:
        tag_days(fields.isel(time=[int(row)]), region)
    per_day = (time.perf_counter() - started) / args.sample
    loop_s = per_day * fields.sizes["time"]
    agreement = float((tags["regime"].to_numpy() == demo.truth["regime"].to_numpy()).mean())
    results = {
        "days": int(fields.sizes["time"]),
        "grid": [int(fields.sizes["lat"]), int(fields.sizes["lon"])],
        "generate_s": round(generate_s, 2),
        "batch_tagging_median_s": round(statistics.median(batch), 2),
        "day_by_day_extrapolated_s": round(loop_s, 1),
        "speedup_batch_vs_loop": round(loop_s / statistics.median(batch), 1),
        "agreement_with_truth": round(agreement, 3),
    }
    for key, value in results.items():
        print(f"{key:32} {value}")
    print(json.dumps(results, indent=2))
    return results


if __name__ == "__main__":
    main()
