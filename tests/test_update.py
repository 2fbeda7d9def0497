"""`analogs update`: new days on the existing EOFs, idempotent, refusing other grids."""

import hashlib
import json
import os
import shutil

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.api import AnalogStore, build_store
from analogs.cli import main
from analogs.stages.outcomes import convective_day


def _digests(path):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(path.iterdir())}


@pytest.fixture(scope="module")
def split_files(demo_files, tmp_path_factory):
    """The demo archive without its last year, and that last year alone."""
    years = sorted({int(f.stem.split("_")[1]) for f in demo_files})
    early = [f for f in demo_files if int(f.stem.split("_")[1]) < years[-1]]
    late = [f for f in demo_files if int(f.stem.split("_")[1]) == years[-1]]
    return early, late


def test_update_appends_projected_days_and_is_idempotent(split_files, demo_dir, tmp_path, capsys):
    early, late = split_files
    store = build_store(early, tmp_path / "store", events=demo_dir / "events.csv", progress=False)
    n_before = len(store.times)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, late)]) == 0
    updated = AnalogStore.load(store.path)
    from analogs.stages.sources import open_archive
    new_days = open_archive(late, progress=False)
    assert len(updated.times) == n_before + new_days.sizes["time"]
    assert updated.times.is_monotonic_increasing
    # The appended PCs are the projection of the new days on the unchanged EOFs.
    expected = store.eof.transform(store.climatology.transform(new_days)).values
    np.testing.assert_allclose(updated.pcs.values[n_before:], expected, rtol=1e-10, atol=1e-10)
    np.testing.assert_array_equal(updated.pcs.values[:n_before], store.pcs.values)
    assert len(updated.tags) == len(updated.times)
    day = str(updated.days[-100].date())
    assert updated.find(date=day).analogs["date"].iloc[0] != day
    # Appending the same days again changes nothing, byte for byte.
    before = _digests(store.path)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, late)]) == 0
    assert _digests(store.path) == before
    assert "0 days added" in capsys.readouterr().out


def test_update_refuses_another_grid(split_files, tmp_path, capsys):
    """Another grid is regridded now (issue 15, tests/test_update_regrid.py), but one that
    leaves more than 10 % of the store grid uncovered is refused (15b changed this)."""
    early, late = split_files
    store = build_store(early, tmp_path / "store", progress=False)
    before = _digests(store.path)
    coarse = []
    for path in late:
        with xr.open_dataset(path) as ds:
            out = tmp_path / f"coarse_{path.name}"
            ds.isel(lat=slice(None, 18, 2), lon=slice(None, None, 2)).load().to_netcdf(out)
            coarse.append(out)
    assert main(["update", "--store", str(store.path), "--quiet", *map(str, coarse)]) == 2
    err = capsys.readouterr().err
    assert "of the store grid uncovered" in err and len(err.strip().splitlines()) == 1
    assert _digests(store.path) == before


def test_update_from_python_returns_the_new_store(split_files, demo_dir, tmp_path):
    """``store.update`` returns the new version (the README's Python update); an
    events-only update carries the scores and tags over unchanged."""
    early, late = split_files
    store = build_store(early, tmp_path / "store", progress=False)
    assert store.events is None
    new = store.update(late, progress=False)
    summary = new.last_update
    assert summary["days_added"] == len(new.times) - len(store.times) > 0
    assert new.manifest["updates"][-1]["days_added"] == summary["days_added"]
    day = str(new.days[-10].date())
    assert new.find(date=day).target["date"] == day
    assert len(store.times) < len(new.times)  # the old object keeps its version
    files_before = new.manifest["files"]
    with_events = new.update(late, events=demo_dir / "events.csv", progress=False)
    assert with_events.last_update["days_added"] == 0
    assert with_events.events is not None and len(with_events.manifest["updates"]) == 2
    for name in ("scores.nc", "tags.parquet", "basis.nc"):
        assert with_events.manifest["files"][name] == files_before[name]
    assert with_events.find(date=day).outcomes["has_events"]


# --------------------------------------------------------------------------------------
# Report history as data (issue 13): merged by date, coverage kept, days without reports
# left out of every outcome statistic.


#: Target of the climatology checks: a summer day of the first three years.
OLD_DAY = "2002-07-15"
#: Half-width of the default season window (calendar days).
WINDOW = 45


def _events_by_year(demo_dir, tmp_path_factory):
    """The demo's events split by the year of their convective day: all years but the
    last, and the last alone (what a forecaster gets a year later)."""
    events = pd.read_csv(demo_dir / "events.csv")
    year = convective_day(pd.to_datetime(events["time"], utc=True)).dt.year
    work = tmp_path_factory.mktemp("events_split")
    old, new = work / "old.csv", work / "new.csv"
    events[year < year.max()].to_csv(old, index=False)
    events[year == year.max()].to_csv(new, index=False)
    return old, new, int((year < year.max()).sum()), int((year == year.max()).sum())


@pytest.fixture(scope="module")
def history(split_files, demo_dir, tmp_path_factory):
    """A store of the early years built with their reports (built once; tests copy it)."""
    import reanalysis_demo
    from analogs.stages.outcomes import Region
    early, late = split_files
    old, new, n_old, n_new = _events_by_year(demo_dir, tmp_path_factory)
    path = tmp_path_factory.mktemp("history") / "store"
    build_store(early, path, events=old, region=Region.box(*reanalysis_demo.CENTRAL_REGION),
                progress=False)
    return {"store": path, "late": late, "old": old, "new": new, "n_old": n_old,
            "n_new": n_new, "region": reanalysis_demo.CENTRAL_REGION}


def _copy(history, tmp_path):
    return shutil.copytree(history["store"], tmp_path / "store")


def _reference_climatology(events_csv_paths, days, covered, target, region):
    """P(at least one report in the region) over the season-window days with report
    coverage, from the raw CSV files with pandas only. Definitions: an event belongs to
    the convective day from 12 UTC on D to 12 UTC on D+1 (common practice in
    severe-report climatologies, no source); the season window holds the days whose
    calendar day is within 45 days of the target's, circularly over a 365.2425-day year
    (from memory)."""
    events = pd.concat([pd.read_csv(p) for p in events_csv_paths])
    south, north, west, east = region
    inside = events["lat"].between(south, north) & events["lon"].between(west, east)
    times = pd.to_datetime(events.loc[inside, "time"], utc=True).dt.tz_convert(None)
    event_days = set((times - pd.Timedelta(hours=12)).dt.floor("D"))
    gap = np.abs(days.day_of_year - pd.Timestamp(target).day_of_year).astype(float)
    in_window = np.minimum(gap, 365.2425 - gap) <= WINDOW
    chosen = days[in_window & covered]
    return float(np.mean([day in event_days for day in chosen])), int(len(chosen))


def test_update_events_merges_by_date_and_keeps_old_days_climatology(history, tmp_path, capsys):
    """The issue's forecaster: days of a new year appended, then only that year's reports
    passed to update --events. The events are merged by date (counts printed before and
    after), the appended days count as "no reports yet" until their reports are in, and
    an old day's season climatology stays what it was apart from the added year. The
    climatologies are checked against pandas on the raw CSV files
    (:func:`_reference_climatology`)."""
    store_path = _copy(history, tmp_path)
    before = AnalogStore.load(store_path)
    clim_before = before.find(date=OLD_DAY).outcomes
    reference = _reference_climatology([history["old"]], before.days, before.covered,
                                       OLD_DAY, history["region"])
    assert (clim_before.climatology_p_any_event, clim_before.n_climatology_days) == \
        pytest.approx(reference)

    # 1. The new year's days, without their reports: nothing changes for the old day.
    assert main(["update", "--store", str(store_path), "--quiet",
                 *map(str, history["late"])]) == 0
    out = capsys.readouterr().out
    appended = AnalogStore.load(store_path)
    n_new_days = len(appended.times) - len(before.times)
    assert f"{n_new_days} days have no reports yet" in out
    assert appended.covered.sum() == len(before.times) and not appended.covered[-n_new_days:].any()
    after_append = appended.find(date=OLD_DAY)
    assert after_append.outcomes.climatology_p_any_event == clim_before.climatology_p_any_event
    assert after_append.outcomes.n_climatology_days == clim_before.n_climatology_days
    # An analog in the new year is shown as "no reports yet" and left out of the counts.
    unknown = ~after_append.analogs["reports_known"].to_numpy()
    assert unknown.any(), "no appended day among the analogs: the check below is vacuous"
    assert after_append.outcomes.n_analogs == (~unknown).sum()
    assert after_append.outcomes.n_analogs_without_reports == unknown.sum()
    listed = after_append.to_dict()
    shown = [a["reports"] for a in listed["analogs"] if "reports" in a]
    assert shown == ["none yet"] * unknown.sum()
    assert listed["outcomes"]["n_analogs_without_reports"] == unknown.sum()

    # 2. Only the new year's reports: merged, not replacing the history.
    assert main(["update", "--store", str(store_path), "--quiet", "--events",
                 str(history["new"]), *map(str, history["late"])]) == 0
    out = capsys.readouterr().out
    merged = AnalogStore.load(store_path)
    assert len(merged.events) == history["n_old"] + history["n_new"]
    assert (f"{history['n_old']} before" in out and f"0 replaced by {history['n_new']}" in out
            and f"{history['n_old'] + history['n_new']} after" in out), out
    clim_after = merged.find(date=OLD_DAY).outcomes
    reference = _reference_climatology([history["old"], history["new"]], merged.days,
                                       merged.covered, OLD_DAY, history["region"])
    assert (clim_after.climatology_p_any_event, clim_after.n_climatology_days) == \
        pytest.approx(reference)
    # Unchanged apart from the added year: the old years' window days give the old value.
    old_years = merged.days.year < merged.days.year.max()
    assert _reference_climatology([history["old"], history["new"]], merged.days,
                                  merged.covered & old_years, OLD_DAY, history["region"]) == \
        pytest.approx((clim_before.climatology_p_any_event, clim_before.n_climatology_days))
    assert clim_after.n_climatology_days > clim_before.n_climatology_days
    coverage = merged.manifest["events"]["coverage"]
    assert coverage["periods"][0][0] == str(before.days[0].date())
    assert merged.manifest["events"]["history"][-1]["added"] == history["n_new"]


def test_update_events_replaces_only_the_days_it_covers(history, tmp_path):
    """A corrected table for one week replaces that week's reports and keeps the others;
    passing it again writes nothing (the same reports, in any order)."""
    store_path = _copy(history, tmp_path)
    store = AnalogStore.load(store_path)
    held = store.events
    first, last = pd.Timestamp("2002-06-10"), pd.Timestamp("2002-06-16")
    week = held[(held["day"] >= first) & (held["day"] <= last)]
    assert len(week) > 3
    corrected = week.iloc[:2][["time", "lat", "lon", "kind", "magnitude"]].copy()
    corrected["time"] = corrected["time"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    path = tmp_path / "week.csv"
    corrected.to_csv(path, index=False)
    new = store.update(history["late"], events=path, events_period="2002-06-10,2002-06-16",
                       progress=False)
    merge = new.last_update["events"]
    assert (merge["before"], merge["replaced"], merge["added"]) == (len(held), len(week), 2)
    assert len(new.events) == len(held) - len(week) + 2
    outside = ~((held["day"] >= first) & (held["day"] <= last))
    kept = new.events[~((new.events["day"] >= first) & (new.events["day"] <= last))]
    assert len(kept) == int(outside.sum())
    digests = _digests(store_path)
    again = AnalogStore.load(store_path).update(history["late"], events=path,
                                                events_period="2002-06-10,2002-06-16",
                                                progress=False)
    assert again.last_update["events"]["replaced"] == 2 and _digests(store_path) == digests


def test_verify_leaves_out_days_without_reports(history, tmp_path, capsys):
    """verify forecasts only days with report coverage and says how many it left out;
    its JSON of a fully covered store keeps its earlier shape."""
    store_path = _copy(history, tmp_path)
    full = AnalogStore.load(store_path).verify(n_resamples=20)
    assert "n_days_without_reports" not in full["settings"]
    appended = AnalogStore.load(store_path).update(history["late"], progress=False)
    summary = appended.verify(n_resamples=20)
    assert summary["n_forecasts"] == full["n_forecasts"]
    n_built = len(AnalogStore.load(history["store"]).times)
    assert summary["settings"]["n_days_without_reports"] == len(appended.times) - n_built
    assert summary["brier_score"] == pytest.approx(full["brier_score"])


def test_store_path_that_is_a_symbolic_link_keeps_the_link(history, tmp_path, split_files):
    """A write through a link goes to the store it points at: the link stays a link and
    the real store holds the new version (os.path.realpath semantics, Python docs)."""
    real = _copy(history, tmp_path)
    link = tmp_path / "link"
    os.symlink(real, link)
    updated = AnalogStore.load(link).update(history["late"], progress=False)
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert AnalogStore.load(real).manifest["files"] == updated.manifest["files"]
    assert len(AnalogStore.load(real).times) == len(updated.times)


def test_files_the_store_did_not_write_are_kept(history, tmp_path, capsys):
    """A note a user left in the store folder survives an update (the swap keeps it; it
    is still reported as not listed in the manifest)."""
    store_path = _copy(history, tmp_path)
    (store_path / "notes.txt").write_text("my notes")
    (store_path / "plots").mkdir()
    (store_path / "plots" / "a.png").write_bytes(b"png")
    assert main(["update", "--store", str(store_path), "--quiet",
                 *map(str, history["late"])]) == 0
    assert (store_path / "notes.txt").read_text() == "my notes"
    assert (store_path / "plots" / "a.png").read_bytes() == b"png"
    assert "notes.txt" in capsys.readouterr().err  # still named as not the store's


@pytest.mark.parametrize("where", ["parent_from_inside", "dot_dot_from_a_subfolder"])
def test_store_dot_dot_from_inside_the_store(history, tmp_path, monkeypatch, capsys, where):
    """--store .. names the folder above: from inside the store that is no store (a clear
    refusal, exit 2, the store unchanged); from a folder inside it, it is the store."""
    store_path = _copy(history, tmp_path)
    before = _digests(store_path)
    if where == "parent_from_inside":
        monkeypatch.chdir(store_path)
        code = main(["update", "--store", "..", "--quiet", *map(str, history["late"])])
        err = capsys.readouterr().err
        assert code == 2 and "is not an analogs store" in err and len(err.splitlines()) == 1
        code = main(["build", "--store", "..", "--quiet", *map(str, history["late"])])
        err = capsys.readouterr().err
        assert code == 2 and "not an analogs store" in err and "new or empty folder" in err
        assert _digests(store_path) == before
    else:  # a folder of the user's inside the store: ".." is the store itself
        (store_path / "plots").mkdir()
        monkeypatch.chdir(store_path / "plots")
        assert main(["find", "--store", "..", "--date", OLD_DAY, "--json"]) == 0
        assert main(["update", "--store", "..", "--quiet", *map(str, history["late"])]) == 0
        capsys.readouterr()
        assert (store_path / "plots").is_dir()
        n_built = len(AnalogStore.load(history["store"]).times)
        assert len(AnalogStore.load(store_path).times) > n_built


def test_date_with_a_time_of_day_is_that_day(history):
    """--date 2002-06-14T12:00Z names the archive day 2002-06-14 (ISO 8601 with a UTC
    offset, as pandas.Timestamp reads it), not a day outside the archive."""
    store = AnalogStore.load(history["store"])
    assert store.day_row("2002-06-14T12:00Z") == store.day_row("2002-06-14")
    assert store.day_row("2002-06-14T23:30+00:00") == store.day_row("2002-06-14")


def test_store_without_coverage_records_keeps_its_days_covered(history, tmp_path):
    """A store written before coverage was recorded counts every day it holds as covered;
    its first update freezes that as a period, so the appended days have no reports yet."""
    store_path = _copy(history, tmp_path)
    manifest_path = store_path / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    for key in ("coverage", "history", "n_outside_grid"):
        manifest["events"].pop(key)
    manifest_path.write_text(json.dumps(manifest))
    legacy = AnalogStore.load(store_path)
    assert legacy.covered.all()
    updated = legacy.update(history["late"], progress=False)
    n_old = len(legacy.times)
    assert updated.covered[:n_old].all() and not updated.covered[n_old:].any()
    assert updated.manifest["events"]["coverage"]["periods"] == [
        [str(legacy.days[0].date()), str(legacy.days[-1].date())]]


def test_build_skill_counts_only_days_with_reports(split_files, history, tmp_path):
    """With --events-period naming two of the three years, the build's skill is measured
    over those years' days only (its monthly day counts add up to them), the manifest
    says which days are covered, and the third year's days have no reports yet."""
    early, _ = split_files
    events = pd.read_csv(history["old"])
    day = convective_day(pd.to_datetime(events["time"], utc=True))
    events[day.dt.year <= 2002].to_csv(tmp_path / "two_years.csv", index=False)
    store = build_store(early, tmp_path / "store", events=tmp_path / "two_years.csv",
                        events_period="2001-01-01,2002-12-31", region="30,45,-105,-85",
                        progress=False)
    covered = store.covered
    assert covered.sum() == 730 and not covered[store.days.year == 2003].any()
    by_month = store.manifest["skill"]["by_month"]
    assert sum(month["n_days"] for month in by_month.values()) == 730
    assert store.manifest["events"]["coverage"]["periods"] == [["2001-01-01", "2002-12-31"]]
