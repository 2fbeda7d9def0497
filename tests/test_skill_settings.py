"""The skill line of find measures what the query forecasts with all its settings:
--regime, --sequence, --weights and --exclude (issue 16), on copies of the session store.

For each setting: the skill line's Brier skill score equals that of the ``analogs verify``
command the line names (run here), it differs from the plain query's, the store keeps it
under its own key, and the hindcast behind it is scored as the plain one is
(scikit-learn's brier_score_loss on the same forecasts).
"""

import contextlib
import io
import json
import shlex

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss

import _reliability_helpers as rh
from analogs.api import AnalogStore
from analogs.cli import main
from analogs.stages.hindcast import held_out_analogs, leave_one_year_out
from analogs.workflows import store as store_io

DATE = "2003-07-02"

#: The query settings whose skill is measured apart, as find options.
SETTINGS = {
    "sequence": ["--sequence", "2"],
    "weights": ["--weights", "inverse_distance"],
    "exclude": ["--exclude", "40"],
}


@pytest.fixture(scope="module")
def store_path(demo_store, tmp_path_factory):
    """A copy of the session's store without the measurements other tests kept in it."""
    path = rh.copy_store(demo_store.path, tmp_path_factory.mktemp("settings") / "store")
    store_io.edit_manifest(path, lambda manifest, files: {
        k: v for k, v in manifest.items() if k != "skill_cache"})
    return path


@pytest.fixture(scope="module")
def regime(store_path):
    """The regime of the query date, read from the stored tags (a label the store holds
    on enough days for a hindcast)."""
    tags = pd.read_parquet(store_path / "tags.parquet")
    return str(tags.loc[pd.to_datetime(tags["date"]) == pd.Timestamp(DATE), "regime"].iloc[0])


def _run(argv) -> str:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main([str(a) for a in argv]) == 0
    return out.getvalue()


def _skill(path, *extra):
    return json.loads(_run(["find", "--store", path, "--date", DATE, *extra, "--json"])
                      )["outcomes"]["skill"]


def _options(name, regime):
    return ["--regime", regime] if name == "regime" else SETTINGS[name]


@pytest.mark.parametrize("name", ["regime", *SETTINGS])
def test_skill_line_equals_verify_with_the_same_setting(store_path, regime, name):
    """The skill line's BSS equals ``analogs verify`` run as the line's own command (given
    by --skip-skill-hindcast before measuring), and differs from the plain query's BSS:
    the setting is measured, not ignored. The JSON carries the settings it was measured
    with."""
    options = _options(name, regime)
    not_yet = _skill(store_path, *options, "--skip-skill-hindcast")
    assert not_yet["measured"] is False
    command = shlex.split(not_yet["command"])
    assert command[:2] == ["analogs", "verify"] and " ".join(options) in not_yet["command"]
    verified = json.loads(_run([*command[1:], "--json", "--quiet"]))
    measured = _skill(store_path, *options)
    plain = _skill(store_path)
    assert measured["measured"] is True and measured["source"].startswith("measured now")
    assert measured["brier_skill_score"] == pytest.approx(verified["brier_skill_score"],
                                                          rel=1e-12)
    # --exclude changes only the targets near the turn of the year: a small difference.
    assert abs(measured["brier_skill_score"] - plain["brier_skill_score"]) > 1e-6
    settings = measured["settings"]
    assert {"regime": settings["regime"], "sequence": str(settings["sequence_days"]),
            "weights": settings["weights"], "exclude": str(settings["exclude_days"])
            }[name] == options[1]
    for key in ("regime", "sequence_days", "weights", "exclude_days"):
        assert verified["settings"][key] == settings[key]


def test_the_cache_key_separates_the_settings(store_path, regime):
    """Each setting is a measurement of its own in the store's manifest, and asking again
    quotes the kept one."""
    for name in ["regime", *SETTINGS]:
        _skill(store_path, *_options(name, regime))
    cache = AnalogStore.load(store_path).manifest["skill_cache"]
    keys = {(e["key"]["regime"], e["key"]["sequence_days"], e["key"]["weights"],
             e["key"]["exclude_days"]) for e in cache.values()}
    assert {(regime, 0, "equal", 10), (None, 2, "equal", 10),
            (None, 0, "inverse_distance", 10), (None, 0, "equal", 40)} <= keys
    assert len(cache) == len(keys)
    assert _skill(store_path, "--sequence", "2")["source"] == "kept in the store"


def test_regime_hindcast_takes_only_that_regimes_days(store_path, regime):
    """With --regime, every analog of the hindcast is a day the stored tags (read here
    with pandas, not through the package) give that regime, and so is every day it
    forecasts; its BSS is the hindcast's scored with scikit-learn's brier_score_loss
    (BSS = 1 - BS / BS(climatology), Wilks, from memory)."""
    store = AnalogStore.load(store_path)
    tags = pd.read_parquet(store_path / "tags.parquet")
    tagged = (tags.set_index(pd.to_datetime(tags["date"]))["regime"]
              .reindex(store.days).to_numpy() == regime)
    covered = store.covered
    pcs, times = store.pc_values[covered], store.times[covered]
    analogs = held_out_analogs(pcs, times, restrict=tagged[covered],
                               rows=np.flatnonzero(tagged[covered])[:200])
    assert len(analogs) > 0 and tagged[covered][analogs["row"]].all()
    events = store.observed()[covered]
    hindcast = leave_one_year_out(pcs, times, events, restrict=tagged[covered],
                                  targets=tagged[covered])
    assert set(hindcast["time"]) <= set(times[tagged[covered]])
    bss = 1 - (brier_score_loss(hindcast["observed"], hindcast["forecast"])
               / brier_score_loss(hindcast["observed"], hindcast["climatology"]))
    assert _skill(store_path, "--regime", regime)["brier_skill_score"] == pytest.approx(bss)


def test_sequence_hindcast_searches_the_querys_sequence_vectors(store_path):
    """With --sequence 2 the hindcast searches [pcs(t), 0.5 pcs(t-1), 0.25 pcs(t-2)]
    (built here with pandas' shift: the weights of the --sequence help) and forecasts
    only the days whose two preceding days are in the archive; its BSS is scored with
    scikit-learn's brier_score_loss."""
    store = AnalogStore.load(store_path)
    frame = pd.DataFrame(store.pc_values[:, :store.n_query_modes], index=store.days)
    shifted = [frame, 0.5 * frame.shift(1, freq="D").reindex(store.days),
               0.25 * frame.shift(2, freq="D").reindex(store.days)]
    vectors = np.hstack([part.to_numpy() for part in shifted])
    complete = ~np.isnan(vectors).any(axis=1)
    covered = store.covered
    hindcast = leave_one_year_out(np.nan_to_num(vectors)[covered], store.times[covered],
                                  store.observed()[covered], restrict=complete[covered],
                                  targets=complete[covered], sequence=2)
    assert not set(hindcast["time"]) & set(store.times[~complete])
    bss = 1 - (brier_score_loss(hindcast["observed"], hindcast["forecast"])
               / brier_score_loss(hindcast["observed"], hindcast["climatology"]))
    assert _skill(store_path, "--sequence", "2")["brier_skill_score"] == pytest.approx(bss)


def test_weighted_hindcast_forecast_is_the_weighted_share(store_path):
    """With --weights inverse_distance each hindcast forecast is sum(w_i o_i) / sum(w_i)
    with w_i = 1 / (d_i + 0.1 median d) over the day's held-out analogs (the formula of
    the outcome statistics' weights, recomputed here with numpy), so the skill line
    measures the weighted probability the query prints."""
    store = AnalogStore.load(store_path)
    covered = store.covered
    pcs, times = store.pc_values[covered], store.times[covered]
    events = store.observed()[covered]
    rows = np.flatnonzero(times.month == 7)[:40]
    targets = np.zeros(len(times), dtype=bool)
    targets[rows] = True
    # The plain metric: held_out_analogs gives the plain distances.
    hindcast = leave_one_year_out(pcs, times, events, targets=targets,
                                  weights="inverse_distance", metric="plain")
    analogs = held_out_analogs(pcs, times, rows=rows)
    for target, part in analogs.groupby("target"):
        d = part["distance"].to_numpy()
        w = 1 / (d + 0.1 * np.median(d))
        expected = np.sum(w * events[part["row"]]) / np.sum(w)
        got = hindcast.loc[hindcast["time"] == times[target], "forecast"]
        assert got.item() == pytest.approx(expected, rel=1e-12)


def test_text_and_json_lines_say_what_was_measured(store_path, regime, tmp_path):
    """The terminal line names the regime, sequence and weights it was measured with and
    the days it forecast, and so does verify's text; --json-lines carries the same
    settings."""
    text = _run(["find", "--store", store_path, "--date", DATE, "--regime", regime,
                 "--sequence", "1", "--weights", "gaussian"])
    assert (f"with analogs of regime {regime} only, sequences with the 1 preceding day, "
            "analogs weighted (gaussian)") in text
    assert (f"of the days forecast (every archive day with report coverage tagged {regime} "
            "whose 1 preceding day is in the archive, all year)") in text
    verified = _run(["verify", "--store", store_path, "--regime", regime, "--sequence", "1",
                     "--quiet"])
    assert f"with analogs of regime {regime} only, sequences with the 1 preceding day" in verified
    assert (f"days forecast: every archive day with report coverage tagged {regime} whose 1 "
            "preceding day is in the archive") in verified
    dates = tmp_path / "dates.txt"
    dates.write_text(f"{DATE}\n2003-07-20\n")
    lines = _run(["find", "--store", store_path, "--dates", dates, "--weights", "gaussian",
                  "--json-lines"]).splitlines()
    for line in lines:
        assert json.loads(line)["outcomes"]["skill"]["settings"]["weights"] == "gaussian"


def test_verify_tune_refuses_the_query_only_settings(store_path, capsys):
    """--tune scans the plain analogs: with --regime it is refused (exit 2, one line)."""
    assert main(["verify", "--store", str(store_path), "--tune", "--regime", "other"]) == 2
    assert "--tune scans the plain analogs" in capsys.readouterr().err


def test_sequence_query_without_its_preceding_days_is_refused(store_path, capsys):
    """The archive's second day has one preceding day: --sequence 2 cannot be matched
    there (the hindcast does not forecast it either) and is refused with exit 2 and one
    line, instead of matching a vector whose earlier days wrap round the archive."""
    second = AnalogStore.load(store_path).days[1].date()
    assert main(["find", "--store", str(store_path), "--date", str(second),
                 "--sequence", "2"]) == 2
    err = capsys.readouterr().err
    assert f"--sequence must be at most the number of days before {second}" in err
    assert main(["find", "--store", str(store_path), "--date", str(second),
                 "--sequence", "1", "--json", "--skip-skill-hindcast"]) == 0


def test_field_sequence_says_what_was_not_measured(store_path, demo_files, tmp_path):
    """A --field query with --sequence takes its preceding days from its file; the
    hindcast can only match the archive's own sequences, so the line says plainly that
    the field's sequence is not measured (the BSS quoted is the archive days' one, equal
    to the --date query's with the same setting)."""
    from analogs.stages.sources import open_archive
    field = tmp_path / "three_days.nc"
    (open_archive(demo_files, progress=False).sel(time=slice("2003-06-30", DATE)).load()
     .to_netcdf(field))
    answer = json.loads(_run(["find", "--store", store_path, "--field", field, "--time",
                              f"{DATE}T12:00", "--sequence", "2", "--json"]))
    skill = answer["outcomes"]["skill"]
    assert "preceding days come from its file" in skill["not_measured"]
    assert skill["brier_skill_score"] == _skill(store_path, "--sequence", "2")[
        "brier_skill_score"]
    assert "not_measured" not in _skill(store_path, "--sequence", "2")
    text = _run(["find", "--store", store_path, "--field", field, "--time",
                 f"{DATE}T12:00", "--sequence", "2"])
    assert "; not measured: the field's 2 preceding days come from its file" in text
