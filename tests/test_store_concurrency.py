"""The store's writers under concurrency: every write is load-modify-write under the
writer lock, so concurrent writers never lose each other's changes, and each write
returns a fresh store object that answers for what was written.

Two writers race as two processes of ``python -m analogs`` started together on one
store (a small three-year demo archive on a 2-degree grid); what must hold afterwards
is the store's own consistency: checksums pass, every year written is there, and the
tags are aligned with the scores day for day (the lost-update anomaly, Berenson et al.
1995, "A critique of ANSI SQL isolation levels", SIGMOD, is what the lock prevents).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from analogs.api import AnalogStore, build_store
from analogs.errors import AnalogsInputError
from analogs.workflows import store as store_io

YEARS = (2001, 2002, 2003)


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """A three-year demo archive and a store built from its first year."""
    import reanalysis_demo
    out = tmp_path_factory.mktemp("concurrency")
    written = reanalysis_demo.write_archive(out, years=len(YEARS), seed=3, grid=2.0,
                                            progress=False)
    by_year = {year: [zg, hus] for year, zg, hus in zip(YEARS, written["zg"], written["hus"])}
    store = build_store(by_year[YEARS[0]], out / "store", events=written["events"],
                        progress=False)
    return {"store": store.path, "files": by_year, "out": out}


@pytest.fixture
def store_path(archive, tmp_path):
    """A private copy of the one-year store."""
    return shutil.copytree(archive["store"], tmp_path / "store")


def _cli(*arguments):
    env = {**os.environ, "PYTHONHASHSEED": "0", store_io.LOCK_TIMEOUT_ENV: "120"}
    return subprocess.Popen([sys.executable, "-m", "analogs", *map(str, arguments)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def _run_together(*commands):
    """Start the commands at once, wait for all; their (returncode, stdout, stderr)."""
    processes = [_cli(*command) for command in commands]
    results = []
    for process in processes:
        out, err = process.communicate(timeout=300)
        results.append((process.returncode, out, err))
    return results


def _assert_consistent(store_path):
    """Checksums pass, the store loads, tags align with the scores and a query works."""
    store_io.check_checksums(store_path)
    store = AnalogStore.load(store_path)
    assert store.times.is_unique and store.times.is_monotonic_increasing
    np.testing.assert_array_equal(store.tags.index.normalize(), store.days)
    assert store.manifest["archive"]["n_days"] == len(store.times)
    result = store.find(date=str(store.days[len(store.days) // 2].date()))
    assert len(result.analogs) > 0
    return store


def _years(store):
    return sorted(set(store.days.year))


def test_two_concurrent_updates_of_different_years_both_land(archive, store_path):
    files = archive["files"]
    results = _run_together(["update", "--store", store_path, "--quiet", *files[2002]],
                            ["update", "--store", store_path, "--quiet", *files[2003]])
    for code, out, err in results:
        assert code == 0, err
        assert "365 days added" in out
    store = _assert_consistent(store_path)
    assert _years(store) == list(YEARS)
    assert len(store.times) == 3 * 365
    assert len(store.manifest["updates"]) == 2


def test_retag_racing_an_update_leaves_a_consistent_store(archive, store_path, tmp_path):
    results = _run_together(
        ["tag", "--store", store_path, "--out", tmp_path / "tags.csv", "--kmeans", "3", "--save",
         "--quiet"],
        ["update", "--store", store_path, "--quiet", *archive["files"][2002]])
    for code, _, err in results:
        assert code == 0, err
    store = _assert_consistent(store_path)
    assert _years(store) == [2001, 2002]
    # Whichever came first, the retag's column survives the update (and the model file).
    assert "kmeans_regime" in store.tags.columns
    assert store_io.MODELS in store.manifest["files"]
    written = pd.read_csv(tmp_path / "tags.csv")
    assert len(written) in (365, 730)


def test_updated_store_object_answers_for_the_new_days(archive, store_path):
    store = AnalogStore.load(store_path)
    new = store.update(archive["files"][2002], progress=False)
    assert new is not store
    assert new.last_update["days_added"] == 365 and new.last_update["days_already_present"] == 0
    day = "2002-07-01"
    result = new.find(date=day)
    assert result.target["date"] == day and len(result.analogs) > 0
    # The old object is the version it was loaded as: it never changes.
    assert len(store.times) == 365
    with pytest.raises(AnalogsInputError, match="outside the archive"):
        store.find(date=day)
    # Appending the same days again writes nothing and says so. (The find above may
    # have kept its measured skill in the manifest: compare with the store as it is now.)
    written = AnalogStore.load(store_path).manifest["written"]
    again = new.update(archive["files"][2002], progress=False)
    assert again.last_update == {"days_in_files": 365, "days_added": 0,
                                 "days_already_present": 365,
                                 # the appended year came without reports (issue 13)
                                 "days_covered": 365, "days_without_reports": 365}
    assert again.manifest["written"] == written


def test_save_query_defaults_then_find(store_path):
    store = AnalogStore.load(store_path)
    day = str(store.days[200].date())
    new = store.save_query_defaults(n_modes=5, top=7)
    assert new.query_defaults == {"n_modes": 5, "top": 7}
    result = new.find(date=day)
    assert result.settings["n_modes"] == 5 and len(result.analogs) == 7
    # The old object keeps its version (all modes), and still answers.
    assert store.find(date=day).settings["n_modes"] == store.eof.n_modes_
    assert AnalogStore.load(store_path).query_defaults == {"n_modes": 5, "top": 7}
    with pytest.raises(AnalogsInputError, match="'n_modes' parameter of save_query_defaults"):
        new.save_query_defaults(n_modes=store.eof.n_modes_ + 1)


def test_a_write_from_a_stale_object_keeps_what_others_wrote(archive, store_path):
    """A write applies to the current version, not to the version an old object holds."""
    stale = AnalogStore.load(store_path)
    AnalogStore.load(store_path).update(archive["files"][2002], progress=False)
    retagged = stale.retag(kmeans=3)
    assert _years(retagged) == [2001, 2002]
    assert len(retagged.tags) == len(retagged.times) == 730
    saved = stale.save_query_defaults(top=9)
    assert len(saved.times) == 730 and "kmeans_regime" in saved.tags.columns
    _assert_consistent(store_path)


def test_transaction_without_commit_writes_nothing(store_path):
    before = {p.name: p.read_bytes() for p in store_path.iterdir()}
    with store_io.transaction(store_path) as txn:
        assert txn.manifest["files"].keys() == {p for p in before if p != store_io.MANIFEST}
        txn.carry(store_io.BASIS)
    assert {p.name: p.read_bytes() for p in store_path.iterdir()} == before
    assert list(store_path.parent.glob(f".{store_path.name}.tmp-*")) == []


def test_update_keeps_the_default_event_weighted_map_of_the_new_version(archive, store_path):
    """An update refits the map of the default query (the store's region, every kind) on
    the new version's covered days and keeps it under the new checksums, so a default
    query after it finds it in the manifest (as after a build)."""
    import numpy as np
    from analogs.stages.predictor_weights import fit_predictor_weights
    new = AnalogStore.load(store_path).update(archive["files"][2002], progress=False)
    (entry,) = new.manifest["predictor_weights"].values()
    assert entry["key"]["data"]["scores.nc"] == new.manifest["files"]["scores.nc"]
    covered = new.covered
    expected = fit_predictor_weights(new.pc_values[covered], new.times[covered],
                                     new.observed()[covered])
    np.testing.assert_allclose(np.asarray(entry["transform"]), expected, rtol=1e-10)
