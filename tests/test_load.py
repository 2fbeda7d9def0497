"""Load: the full leave-one-year-out hindcast and a burst of concurrent queries on one store.

Concurrent readers must see the same answers as one reader alone: queries are pure reads
of a verified store (common practice, no source).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
import pytest

import _reliability_helpers as rh
from analogs.api import AnalogStore
from analogs.parameters import P

#: Eight archive days across the seasons, queried in the burst.
BURST_DATES = ("2001-02-03", "2001-05-20", "2001-09-09", "2002-01-15", "2002-06-14",
               "2002-11-30", "2003-04-01", "2003-08-18")


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    return rh.shared_store(rh.session_root(tmp_path_factory))


def test_full_hindcast_completes_with_every_day_scored(demo_store):
    """``AnalogStore.verify`` on the session's demo store: every archive day forecast."""
    store = AnalogStore.load(demo_store.path)
    started = time.monotonic()
    summary = store.verify(n_resamples=100)
    elapsed = time.monotonic() - started
    print(f"\nleave-one-year-out hindcast of {len(store.times)} days: {elapsed:.2f} s")
    assert summary["n_forecasts"] == len(store.times)
    for key in ("brier_score", "brier_skill_score", "roc_auc"):
        assert np.isfinite(summary[key]), key
    assert 0.0 <= summary["brier_score"] <= 1.0
    assert summary["settings"]["method"] == "leave-one-year-out"


def test_hindcast_queries_every_archive_day(shared):
    """Every archive day gets a forecast built only from the other years."""
    from analogs.stages.hindcast import leave_one_year_out
    store = AnalogStore.load(shared["store"])
    observed = store.observed(rh.REGION)
    hindcast = leave_one_year_out(store.pcs.values, store.times, observed, top=20, window=45,
                                  separation=3)
    assert len(hindcast) == len(store.times)
    np.testing.assert_array_equal(pd.DatetimeIndex(hindcast["time"]).values, store.times.values)
    assert hindcast["forecast"].between(0, 1).all() and hindcast["forecast"].notna().all()


def _find(store, date):
    return store.find(date=date, region=rh.REGION).to_dict()


def test_concurrent_threads_answer_like_sequential_calls(shared):
    store = AnalogStore.load(shared["store"])
    sequential = [_find(store, d) for d in BURST_DATES]
    assert all(len(answer["analogs"]) == P.top.default for answer in sequential)
    fresh = AnalogStore.load(shared["store"])  # index built lazily, under contention
    with ThreadPoolExecutor(max_workers=8) as pool:
        concurrent = list(pool.map(lambda d: _find(fresh, d), BURST_DATES * 2))
    assert concurrent == sequential * 2


#: CLI processes started at once: each pays ~2 s of imports, so four keep the test quick
#: on two cores; the thread test above puts 16 queries on one store at once.
N_PROCESSES = 4


def test_burst_of_cli_processes_answers_like_sequential_calls(shared):
    """Several ``analogs find --json`` processes at once on one store: no error, and the
    answers of in-process sequential calls."""
    store = AnalogStore.load(shared["store"])
    dates = BURST_DATES[::2][:N_PROCESSES]
    expected = [json.loads(json.dumps(_find(store, d), default=str)) for d in dates]
    started = time.monotonic()
    processes = [subprocess.Popen([sys.executable, "-m", "analogs", "find", "--store",
                                   str(shared["store"]), "--date", d, "--region", rh.REGION,
                                   "--json"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True) for d in dates]
    outputs = [p.communicate(timeout=300) for p in processes]
    elapsed = time.monotonic() - started
    print(f"\n{len(processes)} concurrent find processes: {elapsed:.2f} s wall")
    for process, (out, err) in zip(processes, outputs):
        assert process.returncode == 0, err
        assert "Traceback" not in err
    answers = [json.loads(out) for out, _ in outputs]
    for answer, want in zip(answers, expected):
        assert answer["analogs"] == want["analogs"]
        assert answer["outcomes"]["p_any_event"] == pytest.approx(want["outcomes"]["p_any_event"])
        assert answer["target"] == want["target"]


def test_readers_never_see_a_mix_of_two_versions(demo_store, tmp_path):
    """Loads running while a writer keeps swapping new versions in each get one whole,
    checksum-valid version (the load retries when the store changed under it)."""
    import shutil
    import threading

    from analogs.api import AnalogStore

    path = tmp_path / "store"
    shutil.copytree(demo_store.path, path)
    writer_store = AnalogStore.load(path)
    stop = threading.Event()
    errors = []

    def write():
        top = 10
        while not stop.wait(0.2):  # a new version every 0.2 s: far more often than updates
            top = 30 - top  # alternate 10 and 20
            writer_store.save_query_defaults(top=top)

    thread = threading.Thread(target=write)
    thread.start()
    try:
        tops = []
        for _ in range(25):
            try:
                tops.append(AnalogStore.load(path).query_defaults.get("top"))
            except Exception as error:  # any failure is the defect under test
                errors.append(error)
    finally:
        stop.set()
        thread.join()
    assert errors == []
    assert set(tops) <= {None, 10, 20} and len(set(tops)) >= 2  # versions did change
