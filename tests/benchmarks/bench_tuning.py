"""Benchmark of nested tuning (`verify --tune`): one neighbour search against a hindcast
per setting.

Measured in the same run on synthetic PCs (persistent AR(1) series, 20 modes, an event
driven by the leading PCs): `stages.hindcast.nested_tune`, which ranks every target's
held-out candidates once (`HeldOutNeighbours`) and scores each setting and inner fold by
a vectorised de-clustering, against the previous algorithm, one `leave_one_year_out` per
setting and per inner fold ((years + 1) x settings hindcasts). The previous algorithm is
run in full up to `--full-up-to` years; above, it is timed on a sample of its hindcasts
and extrapolated (said in the output). Both must choose the same setting for every
year (checked where run in full).

Run:  python tests/benchmarks/bench_tuning.py [--years 4,10,40] [--repeat 3] [--full-up-to 4]
Prints a table and a JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import time


def synthetic(years, seed=0, n_modes=20):
    import numpy as np
    import pandas as pd
    times = pd.date_range(f"{1991}-01-01T12", f"{1990 + years}-12-31T12", freq="D")
    rng = np.random.default_rng(seed)
    pcs = np.zeros((len(times), n_modes))
    scale = np.linspace(3, 0.5, n_modes)
    for t in range(1, len(times)):
        pcs[t] = 0.8 * pcs[t - 1] + rng.normal(size=n_modes) * scale
    season = np.cos(2 * np.pi * (times.day_of_year.to_numpy() - 180) / 365.25)
    observed = pcs[:, 0] + 0.5 * pcs[:, 2] + 2 * season + rng.normal(size=len(times)) > 3
    return pcs, times, observed


def previous_nested(pcs, times, observed, tops, modes, sample=None):
    """The nested scan of the previous release: one leave_one_year_out per setting and
    per inner fold. With ``sample``, only that many of its hindcasts are run and the
    total is extrapolated. Returns (seconds, chosen by year or None)."""
    import numpy as np
    from analogs.stages.hindcast import leave_one_year_out
    from analogs.stages.scores import brier_skill_score
    pairs = [(t, m) for m in modes for t in tops]
    years = np.unique(times.year)
    jobs = [(None, pair) for pair in pairs] + [(y, pair) for y in years for pair in pairs]
    run = jobs if sample is None else jobs[:: max(1, len(jobs) // sample)][:sample]
    started = time.perf_counter()
    inner = {}
    for year, (top, n_modes) in run:
        keep = times.year != year
        h = leave_one_year_out(pcs[keep], times[keep], observed[keep], top=top,
                               n_modes=n_modes)
        inner[(year, top, n_modes)] = brier_skill_score(h["forecast"], h["observed"],
                                                        h["climatology"])
    seconds = (time.perf_counter() - started) * len(jobs) / len(run)
    if sample is not None:
        return seconds, None
    chosen = {int(y): max(pairs, key=lambda p: inner[(y, *p)]) for y in years}
    return seconds, chosen


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--years", default="4,10,40")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--full-up-to", type=int, default=4)
    parser.add_argument("--sample", type=int, default=6,
                        help="previous-algorithm hindcasts timed when extrapolating")
    args = parser.parse_args(argv)

    from analogs.parameters import P
    from analogs.stages.hindcast import nested_tune

    tops, modes = P.tops.default, P.scan_modes.default
    results = {"load_average": os.getloadavg()[0], "tops": list(tops), "modes": list(modes),
               "sizes": []}
    for years in (int(y) for y in args.years.split(",")):
        pcs, times, observed = synthetic(years)
        new = []
        for _ in range(args.repeat):
            started = time.perf_counter()
            answer = nested_tune(pcs, times, observed, tops=tops, modes=modes,
                                 reference=(20, 20), n_resamples=50)
            new.append(time.perf_counter() - started)
        full = years <= args.full_up_to
        old_s, old_chosen = previous_nested(pcs, times, observed, tops, modes,
                                            sample=None if full else args.sample)
        row = {"years": years, "days": len(times),
               "one_search_median_s": round(statistics.median(new), 2),
               "previous_s": round(old_s, 1),
               "previous_measured": "in full" if full else
               f"extrapolated from {args.sample} hindcasts",
               "speedup": round(old_s / statistics.median(new), 1),
               # What tuning is worth on these synthetic PCs: the chosen setting's gain
               # over the reference on the folds that chose it and on folds that did not.
               "non_nested_gain": round(answer["non_nested_gain"], 4),
               "nested_gain": round(answer["nested_gain"], 4)}
        if old_chosen is not None:
            row["same_choice_every_year"] = all(
                (answer["chosen_by_year"][y]["top"], answer["chosen_by_year"][y]["n_modes"])
                == pair for y, pair in old_chosen.items())
        results["sizes"].append(row)
        print("  ".join(f"{k} {v}" for k, v in row.items()), flush=True)
    print(json.dumps(results, indent=2))
    return results


if __name__ == "__main__":
    main()
