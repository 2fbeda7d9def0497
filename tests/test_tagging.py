"""`analogs tag`: batch regime tags, re-classification with other rules, learned regimes."""

import shutil

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
                 "--rules", str(empty)]) == 0
    same = AnalogStore.load(store_copy).tags
    assert (same["regime"] == before["regime"]).all()
    strict = tmp_path / "strict.toml"
    strict.write_text("nw_min_speed_ms = 25.0\n")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "b.csv"),
                 "--rules", str(strict)]) == 0
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
                 "--kmeans", "5", "--train", str(labelled)]) == 0
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
    assert "derecho" in capsys.readouterr().err
    bad.write_text("date,regime\n1850-06-01,tropical\n")
    assert main(["tag", "--store", str(store_copy), "--out", str(tmp_path / "x.csv"),
                 "--train", str(bad)]) == 2
    assert "1850-06-01" in capsys.readouterr().err
