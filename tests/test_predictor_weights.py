"""The event-weighted metric of the analog search (predictor weighting of the EOF space,
Delle Monache et al. 2013): its fit, its use inside the hindcast's folds, and the
query's --metric option."""

import contextlib
import io
import json

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist

import _reliability_helpers as rh
from analogs.api import AnalogStore
from analogs.cli import main
from analogs.stages.hindcast import leave_one_year_out, seasonal_harmonics
from analogs.errors import AnalogsInputError
from analogs.stages.predictor_weights import (SCORE_WEIGHT, fit_predictor_weights,
                                              logistic_regression, one_blas_thread,
                                              pc_weights)
from analogs.workflows import store as store_io
from analogs.workflows.find import event_weighted_transform

DATE = "2003-07-02"


def _synthetic(n_years=10, n_modes=8, seed=0):
    """Daily PCs of unequal spread whose event depends on PCs 1 and 4 only (and the
    season): logit p = -1.5 + 1.6 z1 - 1.2 z4 + 0.8 cos(season), z the standardised PCs.
    The generating coefficients are the reference (the design of the test)."""
    rng = np.random.default_rng(seed)
    times = pd.date_range("2001-01-01T12:00", periods=365 * n_years, freq="D")
    spread = np.linspace(3.0, 0.5, n_modes)
    pcs = rng.standard_normal((times.size, n_modes)) * spread
    season = np.cos(2 * np.pi * (times.day_of_year.to_numpy() - 180) / 365.2425)
    logit = -1.5 + 1.6 * pcs[:, 1] / spread[1] - 1.2 * pcs[:, 4] / spread[4] + 0.8 * season
    observed = rng.random(times.size) < 1 / (1 + np.exp(-logit))
    return pcs, times, observed, spread


@pytest.mark.parametrize("C", [0.01, 1.0, 100.0])
def test_logistic_regression_is_scikit_learns_minimum(C):
    """The regression's coefficients and intercept are those of scikit-learn's
    LogisticRegression (L2 penalty, intercept not penalised) solved by its own Newton
    solver to a tight tolerance, on the Wisconsin breast-cancer data shipped with
    scikit-learn (569 cases, 30 standardised inputs; nearly separable at C = 100): the
    one minimum of the objective, to round-off."""
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression
    from sklearn.preprocessing import StandardScaler

    inputs, outcome = load_breast_cancer(return_X_y=True)
    inputs = StandardScaler().fit_transform(inputs)
    coefficients, intercept = logistic_regression(inputs, outcome.astype(bool), C=C)
    reference = LogisticRegression(C=C, solver="newton-cholesky", tol=1e-14,
                                   max_iter=1000).fit(inputs, outcome)
    scale = max(1.0, np.abs(reference.coef_).max())
    np.testing.assert_allclose(coefficients, reference.coef_[0], rtol=0, atol=1e-9 * scale)
    assert intercept == pytest.approx(reference.intercept_[0], abs=1e-9 * scale)


def test_logistic_regression_is_the_minimum_of_scikit_learns_default_fit():
    """On the days of a synthetic archive, scikit-learn's default fit (L-BFGS, tolerance
    1e-4) stops short of the minimum: its objective is no lower than the Newton fit's,
    whose gradient vanishes (C sum(p - y) x + w = 0, the intercept's row without w) to
    round-off."""
    from sklearn.linear_model import LogisticRegression

    pcs, times, observed, _ = _synthetic()
    inputs = np.column_stack([pcs / pcs.std(axis=0), seasonal_harmonics(times)])
    coefficients, intercept = logistic_regression(inputs, observed)

    def objective(w, b):
        eta = inputs @ w + b
        return np.sum(np.logaddexp(0.0, eta) - observed * eta) + 0.5 * w @ w

    default = LogisticRegression(max_iter=2000).fit(inputs, observed)
    assert objective(coefficients, intercept) <= objective(default.coef_[0],
                                                           default.intercept_[0])
    probability = 1.0 / (1.0 + np.exp(-(inputs @ coefficients + intercept)))
    gradient = np.append(inputs.T @ (probability - observed) + coefficients,
                         np.sum(probability - observed))
    assert np.abs(gradient).max() < 1e-8 * len(times)


def test_logistic_regression_needs_both_outcomes_and_finite_inputs():
    """Every day with the event (or none): no finite minimum (the intercept runs off),
    said with the counts; a missing input is said too (a NaN would spread through
    every step)."""
    inputs = np.random.default_rng(0).standard_normal((20, 3))
    with pytest.raises(AnalogsInputError, match="with and without the event; got 20 of 20"):
        logistic_regression(inputs, np.ones(20, dtype=bool))
    inputs[3, 1] = np.nan
    with pytest.raises(AnalogsInputError, match="finite inputs; got 1 missing or infinite"):
        logistic_regression(inputs, np.arange(20) % 2 == 0)


def test_fitted_weights_recover_the_informative_pcs():
    """On days whose event depends on PCs 1 and 4 only, the weights of PCs 1 and 4 (their
    coefficients per standard deviation, the scale of each standardised PC) are near the
    generating coefficients 1.6 and 1.2 and every other PC's is near zero (below an
    eighth of the smaller informative weight; their standard error is about 0.05 on
    3,650 days, from memory of the regression's sqrt(1 / (n p (1 - p)))); the appended
    coordinate is the PC score sqrt(SCORE_WEIGHT) * beta_j / sd_j with beta's signs."""
    pcs, times, observed, _ = _synthetic()
    transform = fit_predictor_weights(pcs, times, observed)
    assert transform.shape == (8, 9)
    per_standard_pc = pc_weights(transform) * pcs.std(axis=0)
    assert per_standard_pc[1] == pytest.approx(1.6, abs=0.2)
    assert per_standard_pc[4] == pytest.approx(1.2, abs=0.2)
    others = np.delete(per_standard_pc, [1, 4])
    assert others.max() < per_standard_pc[[1, 4]].min() / 8
    score = transform[:, -1] * pcs.std(axis=0) / np.sqrt(SCORE_WEIGHT)
    assert np.sign(score[[1, 4]]).tolist() == [1.0, -1.0]
    np.testing.assert_allclose(np.abs(score), per_standard_pc, rtol=1e-12)


def test_harmonics_given_fit_the_same_weights():
    """The hindcast's folds pass the harmonics computed once for every day, sliced to the
    fold's days: the same inputs as seasonal_harmonics of the fold's times (cos and sin
    of the day-of-year angle, checked against numpy.cos / numpy.sin of pandas' day of
    year), so the same logistic fit to the last bit, on a fold of the other years as the
    leave-one-year-out takes it."""
    pcs, times, observed, _ = _synthetic()
    harmonics = seasonal_harmonics(times)
    angle = 2 * np.pi * times.day_of_year.to_numpy() / 365.2425  # pandas' day of year
    np.testing.assert_allclose(harmonics[:, [0, 2]], np.column_stack(
        [np.cos(angle), np.sin(angle)]), atol=1e-12)
    train = times.year != 2004
    own = fit_predictor_weights(pcs[train], times[train], observed[train])
    given = fit_predictor_weights(pcs[train], times[train], observed[train],
                                  harmonics=harmonics[train])
    assert np.array_equal(own, given)
    assert np.array_equal(seasonal_harmonics(times[train]), harmonics[train])


def test_one_blas_thread_limits_and_restores_as_threadpoolctl():
    """one_blas_thread (a threadpoolctl controller made once) holds every BLAS library
    loaded when the controller is made on one thread inside and restores the counts
    after, as threadpoolctl's threadpool_limits(1, user_api="blas") does
    (threadpoolctl's own report as the reference), and the fit inside it gives the same
    coefficients as inside that."""
    from threadpoolctl import threadpool_info, threadpool_limits

    from analogs.stages import predictor_weights

    def blas_threads():
        return [(info["filepath"], info["num_threads"]) for info in threadpool_info()
                if info["user_api"] == "blas"]

    # The controller holds the libraries loaded when it is made: made anew here, after
    # this module's imports (scipy's BLAS among them), whatever ran before.
    predictor_weights._blas_controller.cache_clear()
    pcs, times, observed, _ = _synthetic(n_years=4)
    before = blas_threads()
    with one_blas_thread():
        inside = blas_threads()
        transform = fit_predictor_weights(pcs, times, observed)
    assert inside and all(n == 1 for _, n in inside)
    assert blas_threads() == before
    with threadpool_limits(1, user_api="blas"):
        assert blas_threads() == inside
        np.testing.assert_array_equal(transform, fit_predictor_weights(pcs, times, observed))


def test_no_event_gives_the_plain_distance():
    """Nothing to fit (no event day): the identity and a zero score column, so distances
    are those of the PCs themselves (scipy's Euclidean cdist)."""
    pcs, times, _, _ = _synthetic(n_years=2)
    transform = fit_predictor_weights(pcs, times, np.zeros(len(times), dtype=bool))
    np.testing.assert_allclose(cdist(pcs[:5] @ transform, pcs[5:9] @ transform),
                               cdist(pcs[:5], pcs[5:9]))


def test_hindcast_weights_never_see_the_held_out_year():
    """Changing every outcome of one year leaves that year's event-weighted forecasts as
    they were (its metric is fitted on the other years, its analogs and climatology come
    from them), while the other years' forecasts move (their metric and analogs do see
    it): the nested fit of the leave-one-year-out folds."""
    pcs, times, observed, _ = _synthetic(n_years=4)
    changed = observed.copy()
    held_out = times.year == 2002
    changed[held_out] = ~observed[held_out]
    before = leave_one_year_out(pcs, times, observed, metric="event_weighted")
    after = leave_one_year_out(pcs, times, changed, metric="event_weighted")
    mine = before["year"] == 2002
    np.testing.assert_array_equal(before.loc[mine, "forecast"], after.loc[mine, "forecast"])
    assert not np.array_equal(before.loc[~mine, "forecast"], after.loc[~mine, "forecast"])
    # The plain metric's forecasts are another thing: the option changes the hindcast.
    plain = leave_one_year_out(pcs, times, observed, metric="plain")
    assert not np.array_equal(plain["forecast"], before["forecast"])


@pytest.mark.parametrize("weights", ["equal", "inverse_distance"])
def test_weighted_hindcast_equals_the_live_query_target_by_target(weights):
    """The event-weighted hindcast ranks a year's targets in batches (the union of
    nearby calendar days' season windows searched once, every list de-clustered in one
    vectorised pass): its forecasts equal those made target by target with the live
    query's find_analogs in the fold's mapped space (its own year and episode left out
    by restrict and exclude), the forecast being the (weighted) share of those analogs
    with the event (the design of the test: two paths of the one selection rule). One
    year repeats another's PCs for a season, so distances tie exactly."""
    from analogs.stages.index import AnalogIndex
    from analogs.stages.outcomes import analog_weights
    from analogs.stages.selection import find_analogs

    pcs, times, observed, _ = _synthetic(n_years=3, n_modes=5, seed=4)
    years = times.year.to_numpy()
    pcs[(years == 2003) & (times.month < 7)] = pcs[(years == 2002) & (times.month < 7)]
    hindcast = leave_one_year_out(pcs, times, observed, metric="event_weighted", top=20,
                                  weights=weights)
    by_hand = []
    for year in np.unique(years):
        train = years != year
        mapped = pcs @ fit_predictor_weights(pcs[train], times[train], observed[train])
        index = AnalogIndex(kind="flat").fit(mapped)
        for row in np.flatnonzero(~train):
            live = find_analogs(index, times, mapped[row], target_time=times[row], top=20,
                                exclude=10, restrict=train)
            chosen = observed[live["row"].to_numpy()]
            by_hand.append(chosen.mean() if weights == "equal" else min(1.0, float(
                analog_weights(live["distance"].to_numpy(), scheme=weights) @ chosen)))
    np.testing.assert_array_equal(hindcast["forecast"].to_numpy(), np.array(by_hand))


@pytest.fixture
def store_copy(demo_store, tmp_path):
    """A copy of the session's store without what other tests kept in its manifest (the
    build's own map, of the store's region and every kind, stays)."""
    path = rh.copy_store(demo_store.path, tmp_path / "store")

    def built_only(manifest, files):
        kept = {k: v for k, v in (manifest.get("predictor_weights") or {}).items()
                if v["key"]["region"] == manifest["config"]["region"]
                and v["key"]["kinds"] is None}
        return {**{k: v for k, v in manifest.items()
                   if k not in ("skill_cache", "predictor_weights")},
                "predictor_weights": kept}

    store_io.edit_manifest(path, built_only)
    return path


def _cli_json(*argv):
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main([*argv, "--json"]) == 0
    return json.loads(out.getvalue())


def test_the_builds_kept_map_is_the_querys_own_fit(store_copy):
    """The build fits the default map before its store is written and keeps it in the
    first manifest: the same key, and the same map to the last bit, as a query's fit on
    the loaded store when nothing is kept (event_weighted_transform; its reference,
    scikit-learn's logistic regression, is checked above)."""
    from analogs.workflows.find import _predictor_weights_key
    store = AnalogStore.load(store_copy)
    (key, kept), = store.manifest["predictor_weights"].items()
    assert (key, kept["key"]) == _predictor_weights_key(
        store.region, None, store.n_query_modes, store.manifest["files"])
    store_io.edit_manifest(store_copy, lambda manifest, files: {
        k: v for k, v in manifest.items() if k != "predictor_weights"})
    bare = AnalogStore.load(store_copy)
    assert "predictor_weights" not in bare.manifest
    refitted = event_weighted_transform(bare, bare.region, keep=False)
    np.testing.assert_array_equal(np.asarray(kept["transform"]), refitted)


def test_find_searches_the_weighted_space_fitted_on_the_store(store_copy):
    """find (event_weighted, the default): the map of the store's region is fitted on
    the store's days at build (equal to fit_predictor_weights on them) and kept in the
    manifest, so the query finds it there, and the analogs' distances are the Euclidean
    distances of the mapped vectors (scipy cdist); --metric plain, the simple version,
    gives distances of the PCs."""
    store = AnalogStore.load(store_copy)
    assert len(store.manifest["predictor_weights"]) == 1  # kept by the build
    weighted = _cli_json("find", "--store", str(store_copy), "--date", DATE,
                         "--skip-skill-hindcast")
    assert weighted["settings"]["metric"] == "event_weighted"
    assert len(weighted["analogs"]) == 50
    reloaded = AnalogStore.load(store_copy)
    assert reloaded.manifest["predictor_weights"] == store.manifest["predictor_weights"]
    kept = np.asarray(next(iter(reloaded.manifest["predictor_weights"].values()))["transform"])
    covered = store.covered
    expected = fit_predictor_weights(store.pc_values[covered], store.times[covered],
                                     store.observed()[covered])
    np.testing.assert_allclose(kept, expected, rtol=1e-12)
    np.testing.assert_allclose(event_weighted_transform(reloaded, reloaded.region), kept)
    row = int(np.flatnonzero(store.days == pd.Timestamp(DATE))[0])
    rows = [int(np.flatnonzero(store.days == pd.Timestamp(a["date"]))[0])
            for a in weighted["analogs"]]
    distances = cdist(store.pc_values[[row]] @ kept, store.pc_values[rows] @ kept)[0]
    np.testing.assert_allclose([a["distance"] for a in weighted["analogs"]], distances,
                               rtol=1e-5)
    plain = _cli_json("find", "--store", str(store_copy), "--date", DATE,
                      "--metric", "plain", "--skip-skill-hindcast")
    assert plain["settings"]["metric"] == "plain"
    rows = [int(np.flatnonzero(store.days == pd.Timestamp(a["date"]))[0])
            for a in plain["analogs"]]
    np.testing.assert_allclose([a["distance"] for a in plain["analogs"]],
                               cdist(store.pc_values[[row]], store.pc_values[rows])[0],
                               rtol=1e-5)
    assert [a["date"] for a in plain["analogs"]] != [a["date"] for a in weighted["analogs"]]


def test_verify_and_skill_line_measure_the_metric_asked(store_copy):
    """verify --metric event_weighted scores the in-fold weighted hindcast (equal to
    leave_one_year_out with that metric scored by scikit-learn's brier_score_loss), and
    find's skill line with that metric is measured with it (the same score); unmeasured,
    it names the verify command with --metric."""
    from sklearn.metrics import brier_score_loss
    store = AnalogStore.load(store_copy)
    summary = _cli_json("verify", "--store", str(store_copy), "--quiet")  # the default
    assert summary["settings"]["metric"] == "event_weighted"
    assert "caution" in summary
    hindcast = leave_one_year_out(store.pcs.values, store.times, store.observed(),
                                  metric="event_weighted")
    expected = 1 - (brier_score_loss(hindcast["observed"], hindcast["forecast"])
                    / brier_score_loss(hindcast["observed"], hindcast["climatology"]))
    assert summary["brier_skill_score"] == pytest.approx(expected, rel=1e-9)
    plain = _cli_json("verify", "--store", str(store_copy), "--metric", "plain", "--quiet")
    assert plain["settings"]["metric"] == "plain"
    assert plain["brier_skill_score"] != pytest.approx(expected, rel=1e-6)
    from analogs.workflows.skill import skill_settings
    unmeasured = store.skill_for(DATE, settings=skill_settings(store, metric="plain"),
                                 measure=False)
    assert unmeasured["command"].endswith("--metric plain")
    skill = _cli_json("find", "--store", str(store_copy), "--date", DATE)["outcomes"]["skill"]
    assert skill["source"] == "build"  # the build measured the default metric
    assert skill["brier_skill_score"] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("argv, expected", [
    (["verify", "--metric", "event_weighted", "--tune"], "--tune scans"),
    (["verify", "--metric", "nearest"], "--metric must be one of"),
])
def test_metric_refusals(demo_store, capsys, argv, expected):
    """Refused with one line and exit status 2 (common practice, no source)."""
    assert main([argv[0], "--store", str(demo_store.path), *argv[1:]]) == 2
    assert expected in capsys.readouterr().err


def test_field_that_is_an_archive_day_is_flagged_in_the_weighted_space(store_copy,
                                                                       demo_files, tmp_path,
                                                                       capsys):
    """A field that is an archive day (written on another grid) is its own first analog
    in the event-weighted space too, and flagged: the near-copy limit is measured in the
    space searched (a day is not its own analog; common practice, no source)."""
    from analogs.stages.sources import open_archive
    from analogs.workflows.demo import write_forecast_like_field
    archive = open_archive(demo_files, progress=False)
    path = write_forecast_like_field(archive, DATE, tmp_path / "copy.nc")
    status = main(["find", "--store", str(store_copy), "--field", str(path), "--metric",
                   "event_weighted", "--skip-skill-hindcast", "--json"])
    captured = capsys.readouterr()
    assert status == 0
    assert json.loads(captured.out)["analogs"][0]["date"] == DATE
    assert "almost exactly" in captured.err


def _sequence_rows(pcs, lag_weights=(1.0, 0.5)):
    """[pc_t, 0.5 pc_{t-1}] for consecutive days (the first day wraps round; it is never
    compared as a target in the tests below), written out directly."""
    return np.hstack([w * np.roll(pcs, lag, axis=0) for lag, w in enumerate(lag_weights)])


def test_sequence_hindcast_maps_each_day_by_the_fold_map():
    """--sequence with event_weighted in the hindcast: each year's targets are ranked in
    the space of [pc_t, 0.5 pc_{t-1}] with each day's PCs mapped by that fold's map
    (fitted on the day's own PCs of the other years): equal to the plain hindcast of the
    vectors mapped by hand block by block, year by year (the design of the test)."""
    pcs, times, observed, _ = _synthetic(n_years=3, n_modes=5)
    sequences = _sequence_rows(pcs)
    weighted = leave_one_year_out(sequences, times, observed, metric="event_weighted",
                                  sequence=1, top=30)
    years = times.year.to_numpy()
    for year in np.unique(years):
        train = years != year
        transform = fit_predictor_weights(pcs[train], times[train], observed[train])
        by_hand = np.hstack([sequences[:, :5] @ transform, sequences[:, 5:] @ transform])
        plain = leave_one_year_out(by_hand, times, observed, metric="plain", top=30,
                                   months=None)
        mine, theirs = weighted["year"] == year, plain["year"] == year
        np.testing.assert_array_equal(weighted.loc[mine, "forecast"].to_numpy(),
                                      plain.loc[theirs, "forecast"].to_numpy())


def test_find_with_a_sequence_searches_the_mapped_sequence(store_copy):
    """find --sequence 1 with the default event_weighted metric: each analog's distance is
    the Euclidean distance (scipy cdist) of [pc_t, 0.5 pc_{t-1}] with both days' PCs
    mapped by the store's kept map, computed here block by block."""
    store = AnalogStore.load(store_copy)
    transform = np.asarray(next(iter(store.manifest["predictor_weights"].values()))
                           ["transform"])
    found = _cli_json("find", "--store", str(store_copy), "--date", DATE, "--sequence", "1",
                      "--skip-skill-hindcast")
    assert found["settings"]["metric"] == "event_weighted"

    def mapped(row):
        return np.hstack([store.pc_values[row] @ transform,
                          0.5 * store.pc_values[row - 1] @ transform])

    target = int(np.flatnonzero(store.days == pd.Timestamp(DATE))[0])
    rows = [int(np.flatnonzero(store.days == pd.Timestamp(a["date"]))[0])
            for a in found["analogs"]]
    expected = cdist(mapped(target)[None], np.array([mapped(r) for r in rows]))[0]
    np.testing.assert_allclose([a["distance"] for a in found["analogs"]], expected, rtol=1e-5)
    assert np.all(np.diff(expected) >= -1e-9)  # ranked by that distance


def test_weighted_hindcast_is_the_same_on_one_or_two_fold_threads(monkeypatch):
    """The event-weighted folds worked on two threads (hindcast.FOLD_THREADS), on one, and
    with a slot held by the caller (the build holds one while it tags) give the same
    hindcast to the last bit, in the same order (the design of the threading: folds
    independent, one BLAS thread; no outside source)."""
    import threading

    from analogs.stages import hindcast as hindcast_stage

    pcs, times, observed, _ = _synthetic(n_years=5, n_modes=5, seed=7)
    two = leave_one_year_out(pcs, times, observed, metric="event_weighted", top=15)
    slots = threading.BoundedSemaphore(hindcast_stage.FOLD_THREADS)
    slots.acquire()
    held = leave_one_year_out(pcs, times, observed, metric="event_weighted", top=15,
                              fold_slots=slots)
    slots.release()
    monkeypatch.setattr(hindcast_stage, "FOLD_THREADS", 1)
    one = leave_one_year_out(pcs, times, observed, metric="event_weighted", top=15)
    assert hindcast_stage.FOLD_THREADS == 1 and len(one) == len(times)
    pd.testing.assert_frame_equal(two, one, check_exact=True)
    pd.testing.assert_frame_equal(held, one, check_exact=True)
