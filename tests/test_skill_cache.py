"""The skill line of a query: measured for its own region, kinds and settings, on demand,
and kept in the store (issue 16)."""

import json
import os
import shutil
import subprocess

import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss

import _reliability_helpers as rh
from analogs.api import AnalogStore
from analogs.cli import main
from analogs.parameters import P
from analogs.stages.hindcast import leave_one_year_out
from analogs.stages.outcomes import Region
from analogs.workflows import store as store_io

DATE = "2003-07-02"
POINT = "38,-95,100"


@pytest.fixture
def store_copy(demo_store, tmp_path):
    """A copy of the session's store without the measurements other tests kept in it."""
    path = rh.copy_store(demo_store.path, tmp_path / "store")
    store_io.edit_manifest(path, lambda manifest, files: {
        k: v for k, v in manifest.items() if k != "skill_cache"})
    return path


def _find_skill(path, *extra):
    import contextlib
    import io
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["find", "--store", str(path), "--date", DATE, *extra, "--json"]) == 0
    return json.loads(out.getvalue())["outcomes"]["skill"]


def _reference(store, region, kinds=None, top=P.top.default):
    """The point region's hindcast scored with scikit-learn's brier_score_loss: BSS =
    1 - BS / BS(climatology) (Wilks, Statistical Methods in the Atmospheric Sciences,
    from memory), and the base rate as the share of days with such a report (numpy)."""
    events = store.observed(region, kinds)
    hindcast = leave_one_year_out(store.pcs.values, store.times, events, top=top)
    bs = brier_score_loss(hindcast["observed"], hindcast["forecast"])
    reference = brier_score_loss(hindcast["observed"], hindcast["climatology"])
    july = pd.DatetimeIndex(hindcast["time"]).month == 7
    return 1 - bs / reference, events.mean(), events[store.times.month == 7].mean(), july


def test_point_query_skill_is_measured_once_and_kept(store_copy):
    """A 100 km point query: its skill is measured on demand (equal to the hindcast scored
    with scikit-learn), kept in the store's manifest under a key of region, kinds and
    settings, and the next query quotes the kept entry without measuring again (the
    store is not written again: same version token, same entry time)."""
    first = _find_skill(store_copy, "--region", POINT)
    store = AnalogStore.load(store_copy)
    bss, base_rate, july_rate, _ = _reference(store, Region.parse(POINT))
    assert first["measured"] is True and first["source"] == "measured now, kept in the store"
    assert first["brier_skill_score"] == pytest.approx(bss, rel=1e-9)
    assert first["base_rate"] == pytest.approx(base_rate)
    assert first["month_base_rate"] == pytest.approx(july_rate)
    lo, hi = first["brier_skill_score_ci"]
    assert lo <= first["brier_skill_score"] <= hi
    cache = store.manifest["skill_cache"]
    (key, entry), = cache.items()
    assert entry["key"]["region"] == Region.parse(POINT).to_dict()
    assert entry["key"]["kinds"] is None and entry["key"]["top"] == P.top.default
    assert entry["key"]["data"] == {n: store.manifest["files"][n]
                                    for n in ("scores.nc", "events.parquet")}
    token = store_io.version_token(store_copy)
    second = _find_skill(store_copy, "--region", POINT)
    assert second["source"] == "kept in the store"
    assert store_io.version_token(store_copy) == token
    assert AnalogStore.load(store_copy).manifest["skill_cache"][key]["measured"] == \
        entry["measured"]
    assert {k: v for k, v in second.items() if k != "source"} == \
        {k: v for k, v in first.items() if k != "source"}


def test_kinds_and_settings_are_measured_apart(store_copy):
    """Asking about tornadoes only, or with 10 analogs, is another measurement (another
    key); the tornado base rate is the share of days with a tornado report in the region
    (numpy over the events table: common practice, no source)."""
    store = AnalogStore.load(store_copy)
    tornado = _find_skill(store_copy, "--kind", "tornado")
    bss, base_rate, _, _ = _reference(store, store.region, ["tornado"])
    assert tornado["kinds"] == ["tornado"]
    assert tornado["brier_skill_score"] == pytest.approx(bss, rel=1e-9)
    assert tornado["base_rate"] == pytest.approx(base_rate)
    ten = _find_skill(store_copy, "--top", "10")
    bss10, _, _, _ = _reference(store, store.region, top=10)
    assert ten["top"] == 10 and ten["brier_skill_score"] == pytest.approx(bss10, rel=1e-9)
    assert len(AnalogStore.load(store_copy).manifest["skill_cache"]) == 2
    # The store's own region, kinds and settings quote the build's measurement.
    assert _find_skill(store_copy)["source"] == "build"


def test_an_update_of_the_reports_measures_again(store_copy, demo_dir, tmp_path):
    """The key holds the checksums of the PCs and reports: after update --events changes
    the reports, the kept entry no longer answers, the skill is measured again on the new
    reports, and the stale entry is dropped from the store."""
    first = _find_skill(store_copy, "--region", POINT)
    assert first["measured"] and first["source"] != "build"
    from analogs.stages.outcomes import convective_day
    events = pd.read_csv(demo_dir / "events.csv")
    year = convective_day(pd.to_datetime(events["time"], utc=True)).dt.year
    # 2002's reports again, less its tornadoes: the reports of 2002 change.
    fewer = events[(year == 2002) & (events["kind"] != "tornado")]
    fewer.to_csv(tmp_path / "fewer.csv", index=False)
    AnalogStore.load(store_copy).update(sorted((demo_dir / "archive").glob("*.nc")),
                                        events=tmp_path / "fewer.csv",
                                        events_period="2002-01-01,2002-12-31",
                                        progress=False)
    again = _find_skill(store_copy, "--region", POINT)
    assert again["source"] == "measured now, kept in the store"
    store = AnalogStore.load(store_copy)
    bss, _, _, _ = _reference(store, Region.parse(POINT))
    assert again["brier_skill_score"] == pytest.approx(bss, rel=1e-9)
    assert again["base_rate"] == pytest.approx(store.observed(Region.parse(POINT)).mean())
    (entry,) = store.manifest["skill_cache"].values()
    assert entry["key"]["data"]["events.parquet"] == store.manifest["files"]["events.parquet"]


def test_skip_option_and_read_only_store_give_the_command(store_copy, tmp_path, capsys):
    """--skip-skill-hindcast, or a store that cannot be written (chmod a-w; for root, a
    read-only tmpfs), gives "not measured" with the verify command that measures it, and
    no skill is kept. With --skip-skill-hindcast the store's files, manifest included, are
    unchanged byte for byte although the default event-weighted metric was fitted for the
    query's new region (the option's help promises no write)."""
    before = rh.file_digests(store_copy)
    skipped = _find_skill(store_copy, "--region", POINT, "--skip-skill-hindcast")
    assert skipped["measured"] is False and "not asked" in skipped["reason"]
    assert skipped["command"].endswith(f"--region {POINT}")
    assert skipped["settings"]["metric"] == "event_weighted"
    assert rh.file_digests(store_copy) == before
    assert main(["find", "--store", str(store_copy), "--date", DATE, "--region", POINT,
                 "--skip-skill-hindcast"]) == 0
    assert "not measured for this region" in capsys.readouterr().out
    if os.geteuid() != 0:
        os.chmod(store_copy, 0o555)
        try:
            read_only = _find_skill(store_copy, "--region", POINT)
        finally:
            os.chmod(store_copy, 0o755)
        where = store_copy
    else:
        if shutil.which("mount") is None:
            pytest.skip("a read-only file system for root needs mount")
        mount = tmp_path / "mnt"
        mount.mkdir()
        done = subprocess.run(["mount", "-t", "tmpfs", "tmpfs", str(mount)],
                              capture_output=True, text=True)
        if done.returncode != 0:
            pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip()}")
        try:
            where = rh.copy_store(store_copy, mount / "store")
            subprocess.run(["mount", "-o", "remount,ro", str(mount)], check=True)
            read_only = _find_skill(where, "--region", POINT)
            assert rh.file_digests(where) == before  # the copy is left as it was
        finally:
            subprocess.run(["umount", "-l", str(mount)], capture_output=True)
    assert read_only["measured"] is False and "read-only" in read_only["reason"]
    assert f"analogs verify --store {where} --region {POINT}" == read_only["command"]


def test_two_queries_measuring_at_once_keep_both_entries(store_copy):
    """Two processes measuring two regions at the same time: each keeps its entry through
    the store's transaction (the second writer reads the first's version under the lock),
    so both are there afterwards and every checksum holds."""
    import sys
    commands = [[sys.executable, "-m", "analogs", "find", "--store", str(store_copy),
                 "--date", DATE, "--region", region, "--json"]
                for region in (POINT, "36,-97,150")]
    running = [subprocess.Popen(c, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
               for c in commands]
    for process in running:
        out, err = process.communicate(timeout=600)
        assert process.returncode == 0, err.decode()
        assert json.loads(out)["outcomes"]["skill"]["measured"] is True
    manifest = store_io.check_checksums(store_copy)
    regions = sorted(entry["key"]["region"]["radius_km"]
                     for entry in manifest["skill_cache"].values())
    assert regions == [100.0, 150.0]
