"""Cross-validated skill and outcome analytics on the synthetic demo archive."""

import json

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss, roc_auc_score

from analogs.cli import main
from analogs.stages.hindcast import leave_one_year_out


def test_verify_json_contract_and_skill(demo_store, capsys):
    """`analogs verify --json` has the DESIGN.md keys; the cross-validated Brier skill score
    of analog probabilities for the central region is positive with its interval, and beats
    random analogs drawn from the same candidates (same N, same window)."""
    assert main(["verify", "--store", str(demo_store.path), "--json", "--quiet"]) == 0
    data = json.loads(capsys.readouterr().out)
    for key in ("brier_score", "brier_skill_score", "roc_auc", "reliability", "settings"):
        assert key in data
    for bin_ in data["reliability"]:
        assert set(bin_) >= {"forecast_mean", "observed_frequency", "count"}
    assert sum(b["count"] for b in data["reliability"]) == data["n_forecasts"]
    assert {"top", "n_modes", "window"} <= set(data["settings"])
    lo, hi = data["brier_skill_score_ci"]
    assert 0 < lo <= data["brier_skill_score"] <= hi
    assert data["brier_skill_score"] > data["random_analogs"]["brier_skill_score"] + 0.1
    assert data["roc_auc"] > data["random_analogs"]["roc_auc"]
    # Same-fold baselines (issue 16): season climatology is the reference itself (BSS 0 by
    # definition of the Brier skill score, Wilks), random analogs as above, and a logistic
    # regression on the same PCs (scikit-learn); each with its interval.
    baselines = data["baselines"]
    assert set(baselines) == {"season_climatology", "random_analogs", "logistic_regression"}
    assert baselines["season_climatology"]["brier_skill_score"] == pytest.approx(0, abs=1e-12)
    assert baselines["random_analogs"]["brier_skill_score"] == pytest.approx(
        data["random_analogs"]["brier_skill_score"])
    for scores in baselines.values():
        low, high = scores["brier_skill_score_ci"]
        assert low <= scores["brier_skill_score"] + 1e-12 and scores["brier_skill_score"] <= high + 1e-12
    # The season alone discriminates over the year but not within the month (common
    # practice, no source: a climatology ranks days only by their date).
    assert abs(baselines["season_climatology"]["roc_auc_within_month"] - 0.5) < 0.05
    assert data["roc_auc_within_month"] < data["roc_auc"]
    murphy = data["murphy"]
    assert data["reliability_share"] == pytest.approx(murphy["reliability"] / data["brier_score"])
    assert "not a forecast" in data["caution"]


def test_hindcast_scores_match_scikit_learn(demo_store):
    """Brier score and ROC area of the demo hindcast equal scikit-learn's on the same
    forecasts (sklearn.metrics.brier_score_loss, roc_auc_score)."""
    observed = demo_store.observed()
    hindcast = leave_one_year_out(demo_store.pcs.values, demo_store.times, observed)
    summary = demo_store.verify(n_resamples=50)
    assert summary["brier_score"] == pytest.approx(
        brier_score_loss(hindcast["observed"], hindcast["forecast"]))
    assert summary["roc_auc"] == pytest.approx(
        roc_auc_score(hindcast["observed"], hindcast["forecast"]))
    murphy = summary["murphy"]
    # Murphy (1973): REL - RES + UNC equals the Brier score of the binned forecasts.
    assert murphy["reliability"] - murphy["resolution"] + murphy["uncertainty"] == pytest.approx(
        murphy["brier_score_binned"], abs=1e-12)


def test_cyclone_composite_puts_most_tornadoes_north_east(demo_store):
    """On the demo's tropical-cyclone days the earth-relative NE quadrant holds the largest
    share of tornado reports (McCaul 1991, from memory; common practice)."""
    composite = demo_store.cyclone_composite()
    assert composite is not None
    tornado = composite.loc["tornado"]
    assert tornado["share"].idxmax() == "NE"
    assert tornado["share"].sum() == pytest.approx(1.0)


def test_find_maps_netcdf(demo_store, tmp_path, capsys):
    """--maps writes CF NetCDF whose neighbourhood probability equals, at sampled grid
    points, the share of analog days with a report within 40 km measured with pyproj's
    geodesic on the sphere the tool documents (radius EARTH_RADIUS; on WGS84 a report at
    39.98 km on the sphere lies at 40.08 km, a difference the tool states, so the ellipsoid
    cannot be the reference at a sharp 40 km edge) (40 km neighbourhood: common practice)."""
    import xarray as xr
    from pyproj import Geod
    from analogs.constants import EARTH_RADIUS
    day = str(demo_store.days[560].date())
    path = tmp_path / "maps.nc"
    assert main(["find", "--store", str(demo_store.path), "--date", day, "--maps", str(path),
                 "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    analog_days = pd.to_datetime([a["date"] for a in data["analogs"]])
    events = demo_store.events[demo_store.events["day"].isin(analog_days)]
    geod = Geod(a=EARTH_RADIUS, b=EARTH_RADIUS)
    with xr.open_dataset(path) as maps:
        probability = maps["neighbourhood_probability"]
        assert probability.attrs["units"] == "1"
        assert maps["lat"].attrs["standard_name"] == "latitude"
        # Grid points near reports (where the answer is not trivially zero) and a few others.
        lat, lon = probability["lat"].values, probability["lon"].values
        near = [(float(lat[np.abs(lat - e.lat).argmin()]), float(lon[np.abs(lon - e.lon).argmin()]))
                for e in events.head(25).itertuples()]
        points = near + [(35.0, -100.0), (50.0, -70.0)]
        for plat, plon in points:
            hit_days = set()
            for event in events.itertuples():
                _, _, metres = geod.inv(plon, plat, event.lon, event.lat)
                if metres <= 40_000.0:
                    hit_days.add(event.day)
            expected = len(hit_days) / len(analog_days)
            got = float(probability.sel(lat=plat, lon=plon))
            assert got == pytest.approx(expected, abs=1e-6), (plat, plon)


def test_tune_and_save_sets_query_defaults(demo_store, tmp_path, capsys):
    """--tune reports the best (analogs, modes) by Brier skill score and --save makes them
    the store's query defaults. The scan measures the plain metric (the default is
    event_weighted): it says so, verify scores the plain metric with the chosen setting,
    and --save records metric plain with it, so the store's queries search what was
    tuned."""
    import shutil
    store = tmp_path / "store"
    shutil.copytree(demo_store.path, store)
    assert main(["verify", "--store", str(store), "--tune", "--save", "--json", "--quiet"]) == 0
    data = json.loads(capsys.readouterr().out)
    table = pd.DataFrame(data["tuning"]["table"])
    best = table.loc[table["brier_skill_score"].idxmax()]
    assert data["tuning"]["best"] == {"top": int(best["top"]), "n_modes": int(best["n_modes"]),
                                      "metric": "plain"}
    assert data["tuning"]["metric"] == "plain" and data["settings"]["metric"] == "plain"
    # Nested cross-validation (issue 16): the chosen setting's score measured on folds
    # that did not choose it, and the gains against the current setting on the same days.
    tuning = data["tuning"]
    assert set(tuning["chosen_by_year"]) == {str(y) for y in demo_store.times.year.unique()}
    assert tuning["non_nested"]["brier_skill_score"] == pytest.approx(best["brier_skill_score"])
    assert tuning["nested_gain"] == pytest.approx(
        tuning["nested"]["brier_skill_score"] - tuning["reference"]["brier_skill_score"])
    assert data["settings"]["top"] == int(best["top"])
    assert main(["find", "--store", str(store), "--date", str(demo_store.days[300].date()),
                 "--json"]) == 0
    found = json.loads(capsys.readouterr().out)
    assert len(found["analogs"]) == int(best["top"])
    assert found["settings"]["n_modes"] == int(best["n_modes"])
    assert found["settings"]["metric"] == "plain"


def test_stored_skill_by_month_matches_scikit_learn(demo_store):
    """The per-month skill recorded at build (workflows.skill.skill_by_month) has Brier
    scores equal to scikit-learn's brier_score_loss on that month's hindcast forecasts,
    and skill scores 1 - BS / BS(climatology) from the same; queries quote it."""
    from analogs.workflows import skill

    stored = demo_store.manifest["skill"]
    assert stored["region"] == demo_store.region.to_dict()
    hindcast = leave_one_year_out(demo_store.pcs.values, demo_store.times, demo_store.observed())
    months = pd.DatetimeIndex(hindcast["time"]).month
    assert stored["by_month"], "the demo build records skill by month"
    for month, entry in stored["by_month"].items():
        part = hindcast[months == int(month)]
        assert entry["n_days"] == len(part)
        bs = brier_score_loss(part["observed"], part["forecast"])
        bs_ref = brier_score_loss(part["observed"], part["climatology"])
        assert entry["brier_score"] == pytest.approx(bs, rel=1e-12)
        if bs_ref == 0:
            assert entry["brier_skill_score"] is None
        else:
            assert entry["brier_skill_score"] == pytest.approx(1 - bs / bs_ref, rel=1e-12)
    july = skill.skill_for(demo_store, pd.Timestamp("2003-07-02"))
    assert july == demo_store.skill_for(pd.Timestamp("2003-07-02"))
    assert july["month"] == 7
    assert july["month_brier_skill_score"] == stored["by_month"]["7"]["brier_skill_score"]


def test_store_methods_delegate_to_the_skill_workflow(demo_store):
    """AnalogStore.verify / tune / observed are thin: they give what the functions of
    analogs.workflows.skill give for the loaded store."""
    from analogs.workflows import skill

    settings = dict(top=10, n_modes=8, months=[6, 7], n_resamples=30)
    assert demo_store.verify(**settings) == skill.verify(demo_store, **settings)
    np.testing.assert_array_equal(demo_store.observed(kinds=["hail"]),
                                  skill.observed(demo_store, kinds=["hail"]))
    scan = dict(tops=(5, 10), modes=(3,), months=[7])
    pd.testing.assert_frame_equal(demo_store.tune(**scan), skill.tune(demo_store, **scan))


def test_skill_line_is_the_skill_of_what_the_query_forecasts(demo_store, capsys):
    """A query for the store's region quotes the skill measured for it with the base rate
    beside it (the month's base rate equals the share of that month's days with an event,
    counted here with numpy: common practice, no source); a 40 km point query, or one
    asking about some kinds only, told not to measure (measuring, on copies of the store,
    is in test_skill_cache.py) says "not measured" with the command that measures it
    (issue 16)."""
    date = "2003-07-02"
    assert main(["find", "--store", str(demo_store.path), "--date", date, "--json"]) == 0
    skill = json.loads(capsys.readouterr().out)["outcomes"]["skill"]
    assert skill["measured"] is True and skill["source"] == "build"
    july = demo_store.times.month == 7
    assert skill["month_base_rate"] == pytest.approx(demo_store.observed()[july].mean())
    assert 0 < skill["base_rate"] < 1
    assert main(["find", "--store", str(demo_store.path), "--date", date]) == 0
    text = capsys.readouterr().out
    assert f"base rate {100 * skill['base_rate']:.0f}% of days (all year)" in text
    assert "90% range over resampled years" in text
    assert main(["find", "--store", str(demo_store.path), "--date", date, "--region",
                 "38,-95,40", "--skip-skill-hindcast"]) == 0
    text = capsys.readouterr().out
    assert "not measured for this region" in text
    assert f"analogs verify --store {demo_store.path} --region 38,-95,40" in text
    assert "not the range of today's probability" in text
    assert main(["find", "--store", str(demo_store.path), "--date", date, "--kind",
                 "tornado", "--json", "--skip-skill-hindcast"]) == 0
    skill = json.loads(capsys.readouterr().out)["outcomes"]["skill"]
    assert skill["measured"] is False and skill["command"].endswith("--kind tornado")
