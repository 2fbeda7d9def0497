"""`analogs tag`: batch regime tags, re-classification with other rules, learned regimes."""

import shutil

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from sklearn.cluster import KMeans

from analogs.api import AnalogStore
from analogs.cli import main
from analogs.stages.regimes import KMeansRegimes


@pytest.fixture()
def store_copy(demo_store, tmp_path):
    path = tmp_path / "store"
    shutil.copytree(demo_store.path, path)
    return path


def test_tag_writes_one_row_per_day(demo_store, tmp_path, capsys):
    out = tmp_path / "tags.csv"
    assert main(["tag", "--store", str(demo_store.path), "--out", str(out), "--quiet"]) == 0
    table = pd.read_csv(out)
    assert list(table.columns[:3]) == ["date", "regime", "confidence"]
    assert len(table) == len(demo_store.times)
    assert table["date"].tolist() == [str(d.date()) for d in demo_store.days]
    assert set(table["regime"]) <= {"northwest_flow", "tropical", "strong_trough", "other"}
    assert table["confidence"].between(0, 1).all()
    for column in ("flow_direction_deg", "flow_speed_ms", "vorticity_advection", "reason"):
        assert column in table


def test_rules_file_reclassifies_from_stored_diagnostics(store_copy, tmp_path):
    """A stricter north-west-flow speed threshold can only remove north-west-flow days; an
    empty rules file reproduces the tags of the build exactly."""
    before = AnalogStore.load(store_copy).tags
    empty = tmp_path / "default.toml"
    empty.write_text("")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "a.csv"),
                 "--rules", str(empty), "--save"]) == 0
    same = AnalogStore.load(store_copy).tags
    assert (same["regime"] == before["regime"]).all()
    strict = tmp_path / "strict.toml"
    strict.write_text("nw_min_speed_ms = 25.0\n")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "b.csv"),
                 "--rules", str(strict), "--save"]) == 0
    after = AnalogStore.load(store_copy).tags
    was_nw, is_nw = before["regime"] == "northwest_flow", after["regime"] == "northwest_flow"
    assert (is_nw <= was_nw).all() and is_nw.sum() < was_nw.sum()
    slow = after.loc[was_nw & ~is_nw, "flow_speed_ms"]
    assert (slow < 25.0).all()


def test_learned_regimes_are_stored_as_arrays(store_copy, tmp_path):
    """k-means regimes rebuilt from the store's models.nc arrays equal scikit-learn's KMeans
    labels (before the persistence filter) on the same PCs; a trained classifier agrees with
    the rule labels it was trained on for most days."""
    truth = AnalogStore.load(store_copy).tags["regime"]
    labelled = tmp_path / "labels.csv"
    sample = truth.iloc[::3]
    pd.DataFrame({"date": sample.index.strftime("%Y-%m-%d"), "regime": sample.values}).to_csv(
        labelled, index=False)
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "t.parquet"),
                 "--kmeans", "5", "--train", str(labelled), "--save"]) == 0
    store = AnalogStore.load(store_copy)
    assert "models.nc" in store.manifest["files"]
    with xr.open_dataset(store_copy / "models.nc", group="kmeans") as ds:
        model = KMeansRegimes.from_dataset(ds.load())
    reference = KMeans(n_clusters=5, random_state=0, n_init=10).fit(store.pcs.values)
    assigned = model.assign(store.pcs)
    # Same partition up to label permutation (adjusted Rand index 1).
    from sklearn.metrics import adjusted_rand_score
    assert adjusted_rand_score(reference.labels_, assigned) == pytest.approx(1.0)
    table = pd.read_parquet(tmp_path / "t.parquet")
    assert {"kmeans_regime", "learned_regime", "learned_confidence"} <= set(table.columns)
    assert (table["learned_regime"].to_numpy() == truth.to_numpy()).mean() > 0.75


def test_bad_labelled_days_exit_2(store_copy, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("date,regime\n2001-06-01,derecho\n")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "x.csv"),
                 "--train", str(bad)]) == 2
    assert "at least two different regimes" in capsys.readouterr().err
    bad.write_text("date,regime\n1850-06-01,tropical\n")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "x.csv"),
                 "--train", str(bad)]) == 2
    assert "1850-06-01" in capsys.readouterr().err


def test_tag_file_states_units_and_the_diagnostic_region(demo_store, tmp_path, capsys):
    """The units of every column and the region of the diagnostics travel with the tag
    file: a CSVW sidecar (W3C Metadata Vocabulary for Tabular Data, from memory: the
    default NAME.csv-metadata.json) beside a CSV, key-value metadata in a Parquet file.
    Units checked against the diagnostics' own table and the SI / UDUNITS spellings."""
    import json

    from analogs.stages.diagnostics import DIAGNOSTIC_UNITS
    csv = tmp_path / "tags.csv"
    assert main(["tag", "--store", str(demo_store.path), "--out", str(csv), "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert "regimes diagnosed over the box 30 N to 45 N, 105 W to 85 W" in printed
    sidecar = json.loads((tmp_path / "tags.csv-metadata.json").read_text())
    columns = {c["name"]: c for c in sidecar["tableSchema"]["columns"]}
    assert list(columns) == list(pd.read_csv(csv).columns)
    assert columns["flow_speed_ms"]["schema:unitText"] == "m s-1"
    assert columns["vorticity_advection"]["schema:unitText"] == "s-2"
    assert columns["tc_lat"]["schema:unitText"] == "degree_north"
    for name, units in DIAGNOSTIC_UNITS.items():
        if name in columns:
            assert columns[name]["schema:unitText"] == units
    region = sidecar["analogs"]["diagnostic_region"]
    assert region["south_north_west_east"] == [30.0, 45.0, -105.0, -85.0]
    assert region["default"] is False        # the demo store was built with its box
    parquet = tmp_path / "tags.parquet"
    assert main(["tag", "--store", str(demo_store.path), "--out", str(parquet), "--quiet"]) == 0
    attrs = pd.read_parquet(parquet).attrs
    assert attrs["units"]["flow_direction_deg"].startswith("degree")
    assert attrs["units"]["tc_depth"] == "gpm"
    assert attrs["diagnostic_region"] == region


def test_find_json_carries_the_target_diagnostics_with_units(demo_store, demo_files, tmp_path,
                                                             capsys):
    """`find --json` gives the target's diagnostics under the tag file's keys, each with
    its value and units; for an archive date they are the tag row itself, for a field
    copy of the same day (regridded) they come from the field and are close to it."""
    import json

    from analogs.stages.sources import open_archive
    from analogs.workflows.demo import write_forecast_like_field
    assert main(["find", "--store", str(demo_store.path), "--date", "2003-07-02",
                 "--json"]) == 0
    target = json.loads(capsys.readouterr().out)["target"]
    assert {"date", "regime", "regime_confidence", "reason"} <= set(target)
    diagnostics = target["diagnostics"]
    row = demo_store.tags.loc["2003-07-02"]
    for name in ("flow_direction_deg", "flow_speed_ms", "ridge_amplitude", "ridge_lon",
                 "trough_amplitude", "trough_lon", "vorticity_advection", "tc_lat", "tc_lon",
                 "tc_depth", "tc_radius_km", "dewpoint_region_c", "moist_line_lat"):
        entry = diagnostics[name]
        assert set(entry) == {"value", "units"} and entry["units"]
        if entry["value"] is None:
            assert np.isnan(row[name])
        else:
            assert entry["value"] == pytest.approx(float(row[name]))
    assert diagnostics["flow_speed_ms"]["units"] == "m s-1"
    assert target["diagnostic_region"]["default"] is False
    field = write_forecast_like_field(open_archive(demo_files, progress=False), "2003-07-02",
                                      tmp_path / "field.nc")
    assert main(["find", "--store", str(demo_store.path), "--field", str(field),
                 "--json"]) == 0
    from_field = json.loads(capsys.readouterr().out)["target"]["diagnostics"]
    assert set(from_field) == set(diagnostics)
    assert from_field["flow_direction_deg"]["value"] == pytest.approx(
        diagnostics["flow_direction_deg"]["value"], abs=5.0)


# --------------------------------------------------------------------------------------
# Issue 13: the store's tags change only on request; the researcher's own labels.

def _digests(path):
    import hashlib
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(path.iterdir())}


def test_rules_without_save_leave_the_store_as_it_was(store_copy, tmp_path, capsys):
    """tag --rules (or --kmeans, --train) writes the new tags to --out and says the store
    was left as it was; the store's files are byte for byte the same."""
    before = _digests(store_copy)
    strict = tmp_path / "strict.toml"
    strict.write_text("nw_min_speed_ms = 25.0\n")
    out = tmp_path / "strict.csv"
    assert main(["tag", "--store", str(store_copy), "--out", str(out), "--rules", str(strict),
                 "--kmeans", "3", "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert "left as it was" in printed and "--save" in printed
    assert _digests(store_copy) == before
    written = pd.read_csv(out)
    stored = AnalogStore.load(store_copy).tags
    assert "kmeans_regime" in written and "kmeans_regime" not in stored
    nw = "northwest_flow"
    assert (written["regime"] == nw).sum() < (stored["regime"] == nw).sum()
    assert main(["tag", "--store", str(store_copy), "--out", str(out), "--save"]) == 2
    assert "--save keeps the tags of --rules" in capsys.readouterr().err


def _own_labels(store, path):
    """A case list in the researcher's own words: the rule regimes renamed, with "null"
    and "NA" among the labels (text, not missing values)."""
    names = {"northwest_flow": "NA", "tropical": "null", "strong_trough": "trough_deep",
             "other": "quiet"}
    sample = store.tags["regime"].iloc[::3]
    pd.DataFrame({"date": sample.index.strftime("%Y-%m-%d"),
                  "regime": sample.map(names).to_numpy()}).to_csv(path, index=False)
    return names


def test_train_accepts_labels_of_the_researchers_choosing(store_copy, tmp_path, capsys):
    """Labels such as "null" and "NA" are read as text, the learned model predicts them in
    its own column, and tag prints its cross-validated accuracy and a table against the
    rule labels (pandas.crosstab of the two columns)."""
    store = AnalogStore.load(store_copy)
    names = _own_labels(store, tmp_path / "cases.csv")
    out = tmp_path / "learned.csv"
    assert main(["tag", "--store", str(store_copy), "--out", str(out), "--train",
                 str(tmp_path / "cases.csv"), "--quiet"]) == 0
    printed = capsys.readouterr().out
    table = pd.read_csv(out, keep_default_na=False)
    assert set(table["learned_regime"]) <= set(names.values())
    assert {"NA", "null"} <= set(table["learned_regime"])
    assert (table["regime"] == store.tags["regime"].to_numpy()).all()  # the rules' column
    assert "accuracy" in printed and "cross-validation by calendar year" in printed
    crosstab = pd.crosstab(table["learned_regime"], table["regime"])
    assert crosstab.loc["NA", "northwest_flow"] == crosstab["northwest_flow"].max()
    for label in names.values():
        assert label in printed


def test_cross_validated_accuracy_equals_scikit_learn(store_copy, tmp_path):
    """SupervisedRegimes.cross_validate gives scikit-learn's cross_val_score of a
    StandardScaler + LogisticRegression pipeline with GroupKFold over years (the
    reference), and is near 1 for labels that follow the first PC and near chance for
    labels drawn at random (common practice, no source)."""
    import numpy as np
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import GroupKFold, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    from analogs.stages.regimes import SupervisedRegimes
    store = AnalogStore.load(store_copy)
    pcs = store.pcs
    days = store.days[::2]
    x = pcs.values[::2]
    follows = np.where(x[:, 0] > np.median(x[:, 0]), "high", "low")
    frame = pd.DataFrame({"date": days.strftime("%Y-%m-%d"), "regime": follows})
    figures = SupervisedRegimes(labels=None).cross_validate(pcs, frame)
    groups = days.year.to_numpy()
    reference = cross_val_score(make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000)),
                                x, follows, groups=groups,
                                cv=GroupKFold(n_splits=min(5, np.unique(groups).size)))
    assert figures["fold_accuracy"] == pytest.approx(list(reference))
    assert figures["accuracy"] > 0.9
    rng = np.random.default_rng(0)
    frame["regime"] = rng.choice(["a", "b"], size=len(frame))
    assert abs(SupervisedRegimes(labels=None).cross_validate(pcs, frame)["accuracy"] - 0.5) < 0.1
