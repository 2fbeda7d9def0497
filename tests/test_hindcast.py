"""Leave-one-year-out hindcast: the analogs of each day come from the other years only."""

import functools

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss
from sklearn.neighbors import NearestNeighbors

from analogs.errors import AnalogsInputError
from analogs.stages import hindcast as hindcast_stage
from analogs.stages.hindcast import held_out_analogs, score_hindcast, tune
from analogs.stages.index import AnalogIndex, faiss_threads
from analogs.stages.selection import candidate_ids, find_analogs

#: These tests check the plain metric's selection (against brute force, the live query's
#: find_analogs, held_out_analogs and the tuning scan, which are of the Euclidean distance
#: of the PCs); the default event-weighted metric is tested in test_predictor_weights.py.
leave_one_year_out = functools.partial(hindcast_stage.leave_one_year_out, metric="plain")

TIMES = pd.date_range("1991-01-01T12", "1998-12-31T12", freq="D")


@pytest.fixture(scope="module")
def synthetic():
    """PCs with persistence; the event happens when the first PC is high (a known signal)."""
    rng = np.random.default_rng(8)
    n = len(TIMES)
    pcs = np.zeros((n, 6))
    for t in range(1, n):
        pcs[t] = 0.8 * pcs[t - 1] + rng.normal(size=6) * np.linspace(3, 1, 6)
    observed = (pcs[:, 0] + rng.normal(scale=1.0, size=n)) > 2.0
    return pcs, observed


def test_each_forecast_equals_brute_force_over_other_years(synthetic):
    """With separation 0 the analogs of a day are exactly its nearest other-year days in the
    season window outside its own episode (the query's exclusion window, 10 days by
    default), scikit-learn brute-force neighbours as the outside reference."""
    pcs, observed = synthetic
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=15, window=30, separation=0)
    assert len(hindcast) == len(TIMES)
    for row in (1, 10, 400, 1500, 2800):
        target = TIMES[row]
        allowed = candidate_ids(TIMES, target, window=30, exclude=10,
                                restrict=TIMES.year != target.year)
        nn = NearestNeighbors(n_neighbors=15, algorithm="brute").fit(pcs[allowed])
        neighbours = allowed[nn.kneighbors(pcs[row:row + 1])[1][0]]
        expected = observed[neighbours].mean()
        got = hindcast.loc[hindcast["time"] == target, "forecast"].item()
        assert got == pytest.approx(expected)
        clim = hindcast.loc[hindcast["time"] == target, "climatology"].item()
        assert clim == pytest.approx(observed[allowed].mean())


def test_analogs_beat_random_baseline_on_a_real_signal(synthetic):
    pcs, observed = synthetic
    analog = score_hindcast(leave_one_year_out(pcs, TIMES, observed, top=20), n_resamples=200)
    random = score_hindcast(leave_one_year_out(pcs, TIMES, observed, top=20, method="random"),
                            n_resamples=200)
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=20)
    # Brier score against scikit-learn's brier_score_loss on the same forecasts.
    assert analog["brier_score"] == pytest.approx(
        brier_score_loss(hindcast["observed"], hindcast["forecast"]))
    assert analog["brier_skill_score"] > 0.1
    assert analog["brier_skill_score_ci"][0] > 0
    assert random["brier_skill_score"] < analog["brier_skill_score"] - 0.1
    lo, hi = analog["brier_skill_score_ci"]
    assert lo <= analog["brier_skill_score"] <= hi


def test_months_and_tuning(synthetic):
    pcs, observed = synthetic
    summer = leave_one_year_out(pcs, TIMES, observed, months=[6, 7, 8])
    assert set(pd.DatetimeIndex(summer["time"]).month) == {6, 7, 8}
    table = tune(pcs, TIMES, observed, tops=(5, 20), modes=(1, 6, 50))
    assert set(table["n_modes"]) == {1, 6}  # 50 is more than the 6 modes held
    assert table["brier_skill_score"].is_monotonic_decreasing


def test_bad_hindcast_input(synthetic):
    pcs, observed = synthetic
    one_year = TIMES[TIMES.year == 1991]
    with pytest.raises(AnalogsInputError, match="at least two years"):
        leave_one_year_out(pcs[:len(one_year)], one_year, observed[:len(one_year)])
    with pytest.raises(AnalogsInputError, match="'method' parameter of leave_one_year_out"):
        leave_one_year_out(pcs, TIMES, observed, method="persistence")


#: Archive days at the year's turn (first and last day of the archive among them), a
#: leap day, and days through the seasons.
SAMPLE_ROWS = tuple(TIMES.normalize().get_indexer(pd.to_datetime([
    "1991-01-01", "1991-01-04", "1992-02-29", "1993-03-01", "1994-06-21", "1995-09-30",
    "1996-12-31", "1997-01-01", "1998-12-31"])))


@pytest.mark.parametrize("top, window, separation", [(20, 45, 3), (12, 30, 0), (7, 10, 5)])
def test_hindcast_analogs_are_the_live_query_selection(synthetic, top, window, separation):
    """The analogs the hindcast takes for a day are exactly what the live query's
    find_analogs returns for that day with the query's default exclusion window (10 days,
    across the turn of the year) and the day's own year removed by ``restrict``: one
    selection rule (season window, exclusion, de-clustering, fetch size) for both."""
    pcs, _ = synthetic
    chosen = held_out_analogs(pcs, TIMES, rows=SAMPLE_ROWS, top=top, window=window,
                              separation=separation)
    assert sorted(set(chosen["target"])) == sorted(SAMPLE_ROWS)
    index = AnalogIndex(kind="flat").fit(pcs)
    for row in SAMPLE_ROWS:
        target = TIMES[row]
        live = find_analogs(index, TIMES, pcs[row], target_time=target, top=top,
                            window=window, exclude=10, separation=separation,
                            restrict=TIMES.year != target.year)
        held_out = chosen[chosen["target"] == row]
        assert len(live) == top
        np.testing.assert_array_equal(held_out["row"].to_numpy(), live["row"].to_numpy())
        np.testing.assert_array_equal(held_out["rank"].to_numpy(), live["rank"].to_numpy())
        np.testing.assert_allclose(held_out["distance"].to_numpy(), live["distance"].to_numpy())
        assert (pd.DatetimeIndex(held_out["time"]).year != target.year).all()


def test_restricted_hindcast_analogs_are_the_live_query_selection(synthetic):
    """With a restriction (a --regime's days: here the days whose second PC is positive),
    the hindcast's analogs of a day are what find_analogs returns with that restriction
    and the day's own year removed, and none lies outside it."""
    pcs, _ = synthetic
    allowed = pcs[:, 1] > 0
    chosen = held_out_analogs(pcs, TIMES, rows=SAMPLE_ROWS, restrict=allowed)
    index = AnalogIndex(kind="flat").fit(pcs)
    assert allowed[chosen["row"]].all()
    for row in SAMPLE_ROWS:
        target = TIMES[row]
        live = find_analogs(index, TIMES, pcs[row], target_time=target, exclude=10,
                            restrict=allowed & (TIMES.year != target.year))
        held_out = chosen[chosen["target"] == row]
        np.testing.assert_array_equal(held_out["row"].to_numpy(), live["row"].to_numpy())
        np.testing.assert_allclose(held_out["distance"].to_numpy(), live["distance"].to_numpy())


def test_hindcast_forecast_is_the_share_of_its_analogs_with_the_event(synthetic):
    """leave_one_year_out's forecast of a day is the event frequency over exactly the
    analogs held_out_analogs lists for it."""
    pcs, observed = synthetic
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=10, n_modes=4).set_index("time")
    chosen = held_out_analogs(pcs, TIMES, rows=SAMPLE_ROWS, top=10, n_modes=4)
    for row in SAMPLE_ROWS:
        rows = chosen.loc[chosen["target"] == row, "row"].to_numpy()
        assert hindcast.loc[TIMES[row], "forecast"] == pytest.approx(observed[rows].mean())
        assert hindcast.loc[TIMES[row], "n_analogs"] == rows.size == 10


def test_hindcast_restores_faiss_threads(synthetic):
    """The hindcast searches on one thread inside a restoring context: the process-wide
    faiss thread count is the same afterwards (it used to be left at 1)."""
    import faiss

    pcs, observed = synthetic
    with faiss_threads(2):
        leave_one_year_out(pcs, TIMES, observed, top=5, months=[1])
        assert faiss.omp_get_max_threads() == 2
    before = faiss.omp_get_max_threads()
    leave_one_year_out(pcs, TIMES, observed, top=5, months=[2])
    assert faiss.omp_get_max_threads() == before


def test_own_episode_left_out_across_the_turn_of_the_year(synthetic):
    """A target on 2 January takes no day of 23 December .. 11 January of another year:
    days within the exclusion window (10 days) are its own episode, whatever their year.
    Calendar arithmetic checked by hand (Python's datetime, from memory: 2 January minus
    10 days is 23 December); common practice, no source, for leaving the episode out."""
    pcs, observed = synthetic
    target = pd.Timestamp("1994-01-02T12")
    row = TIMES.get_loc(target)
    # Make the previous year's last days the closest of all, so nothing else hides them.
    pcs = pcs.copy()
    episode = (TIMES >= "1993-12-23") & (TIMES <= "1994-01-12") & (TIMES.year == 1993)
    pcs[episode] = pcs[row] + 1e-3
    chosen = held_out_analogs(pcs, TIMES, rows=[row], top=10, window=30, separation=0)
    times = pd.DatetimeIndex(chosen["time"])
    gap = np.abs((times - target).days)
    assert (gap > 10).all() and (times.year != 1994).all()
    assert len(chosen) == 10
    # Without the exclusion the hindcast would have taken them (the old behaviour).
    old = held_out_analogs(pcs, TIMES, rows=[row], top=10, window=30, separation=0,
                           exclude=None)
    assert set(pd.DatetimeIndex(old["time"])) >= set(TIMES[episode])
    # The forecast, climatology and random draws use the same candidates.
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=10, window=30, separation=0)
    allowed = candidate_ids(TIMES, target, window=30, exclude=10, restrict=TIMES.year != 1994)
    line = hindcast.loc[hindcast["time"] == target]
    assert line["climatology"].item() == pytest.approx(observed[allowed].mean())
    assert line["forecast"].item() == pytest.approx(observed[chosen["row"]].mean())


def test_logistic_baseline_is_fitted_on_the_other_years(synthetic):
    """The logistic-regression baseline of a year equals scikit-learn's LogisticRegression
    (standardised inputs: the PCs plus two annual harmonics) fitted on the other years
    alone; it keeps the hindcast's days, observations and reference."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.preprocessing import StandardScaler

    from analogs.stages.hindcast import logistic_hindcast

    pcs, observed = synthetic
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=20)
    regression = logistic_hindcast(pcs, TIMES, observed, hindcast, n_modes=4)
    pd.testing.assert_frame_equal(regression.drop(columns="forecast"),
                                  hindcast.drop(columns="forecast"))
    angle = 2 * np.pi * TIMES.day_of_year.to_numpy() / 365.2425
    inputs = np.column_stack([pcs[:, :4], np.cos(angle), np.cos(2 * angle),
                              np.sin(angle), np.sin(2 * angle)])
    train = TIMES.year != 1995
    scaler = StandardScaler().fit(inputs[train])
    model = LogisticRegression(max_iter=2000).fit(scaler.transform(inputs[train]),
                                                  observed[train])
    expected = model.predict_proba(scaler.transform(inputs[~train]))[:, 1]
    got = regression.loc[regression["year"] == 1995, "forecast"].to_numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-6, atol=1e-8)
    # On a signal linear in the first PC, the regression is at least as skilful.
    scores = score_hindcast(regression, n_resamples=50)
    assert scores["brier_skill_score"] > 0.1


def test_nested_tuning_scores_each_year_with_a_setting_chosen_without_it(synthetic):
    """Nested cross-validation (Varma & Simon 2006, from memory; common practice in model
    selection): the setting that forecasts a held-out year is the best of an inner
    leave-one-year-out run on the other years alone, and the reported score is that of
    the pooled outer forecasts; the non-nested score is the scan's best."""
    from analogs.stages.hindcast import nested_tune
    from analogs.stages.scores import brier_skill_score

    pcs, observed = synthetic
    times = TIMES[TIMES.year <= 1994]
    pcs, observed = pcs[:len(times)], observed[:len(times)]
    pairs = [(5, 1), (20, 1), (5, 6), (20, 6)]
    result = nested_tune(pcs, times, observed, tops=(5, 20), modes=(1, 6), months=[1, 2],
                         reference=(20, 6), n_resamples=50)
    parts = []
    for year in range(1991, 1995):
        keep = times.year != year
        inner = {}
        for top, n_modes in pairs:
            h = leave_one_year_out(pcs[keep], times[keep], observed[keep], top=top,
                                   n_modes=n_modes, months=[1, 2])
            inner[(top, n_modes)] = brier_skill_score(h["forecast"], h["observed"],
                                                      h["climatology"])
        best = max(inner, key=inner.get)
        assert result["chosen_by_year"][year] == {"top": best[0], "n_modes": best[1]}
        outer = leave_one_year_out(pcs, times, observed, top=best[0], n_modes=best[1],
                                   months=[1, 2])
        parts.append(outer[outer["year"] == year])
    pooled = pd.concat(parts)
    assert result["nested"]["brier_skill_score"] == pytest.approx(brier_skill_score(
        pooled["forecast"], pooled["observed"], pooled["climatology"]))
    assert result["non_nested"]["brier_skill_score"] == pytest.approx(
        result["table"]["brier_skill_score"].max())
    assert result["best"] == {"top": int(result["table"].iloc[0]["top"]),
                              "n_modes": int(result["table"].iloc[0]["n_modes"])}
    with pytest.raises(AnalogsInputError, match="at least three years"):
        nested_tune(pcs[:730], times[:730], observed[:730])


@pytest.mark.parametrize("separation,exclude", [(3, 10), (0, None)])
def test_one_search_gives_every_hindcast_of_a_scan(synthetic, separation, exclude):
    """HeldOutNeighbours (one ranking per mode count, vectorised de-clustering) gives, for
    every setting and with any one year dropped, the very frame of leave_one_year_out
    run on its own (the faiss path of the live query's selection), day by day."""
    from analogs.stages.hindcast import HeldOutNeighbours

    pcs, observed = synthetic
    months = [12, 1, 6]
    neighbours = HeldOutNeighbours(pcs, TIMES, observed, modes=(2, 6), top=25,
                                   separation=separation, exclude=exclude, months=months,
                                   drop_years=True)
    for drop_year in (None, 1991, 1995):
        keep = TIMES.year != drop_year
        for n_modes in (2, 6):
            frames = neighbours.hindcasts((4, 25), n_modes, drop_year=drop_year)
            for top, frame in frames.items():
                expected = leave_one_year_out(pcs[keep], TIMES[keep], observed[keep],
                                              top=top, n_modes=n_modes, months=months,
                                              separation=separation, exclude=exclude)
                pd.testing.assert_frame_equal(frame, expected, check_dtype=False)


def test_vectorised_declustering_equals_the_greedy_rule():
    """decluster_many against decluster_days (the one greedy rule, kept list by list) on
    random ranked lists with gaps (common practice, no source: a greedy de-clustering)."""
    from analogs.stages.selection import decluster_days, decluster_many

    rng = np.random.default_rng(3)
    days = rng.integers(0, 60, size=(200, 40))
    valid = rng.random((200, 40)) > 0.2
    for separation, limit in ((0, 7), (2, 5), (5, 12)):
        kept = decluster_many(days, valid, separation, limit)
        for j in range(days.shape[0]):
            positions = np.flatnonzero(valid[j])
            expected = positions[decluster_days(days[j][positions], separation, limit)]
            got = kept[j][kept[j] >= 0]
            np.testing.assert_array_equal(got, expected)


def _own_windows(rows, window):
    """Each target's season window (candidate_ids, no exclusion), padded with -1."""
    own = [candidate_ids(TIMES, TIMES[row], window=window, exclude=None) for row in rows]
    windows = np.full((len(own), max(map(len, own))), -1, dtype=np.int64)
    for position, season in enumerate(own):
        windows[position, :season.size] = season
    return windows


def test_window_ranking_equals_the_flat_search_ties_included():
    """rank_windows (the event-weighted hindcast's path: faiss' pairwise kernel over each
    target's own window, one partial sort, one vectorised de-clustering) against
    rank_many (the flat index's search) target by target and against find_analogs (the
    live query), on PCs rounded to a coarse step so that many distances tie exactly: the
    same rows in the same order and the same distances (two paths of the one selection
    rule; the greedy de-clustering is common practice, no source)."""
    from analogs.stages.selection import held_out_mask, rank_many, rank_windows

    pcs = np.round(synthetic_pcs_for_ties(), 0)
    index = AnalogIndex(kind="flat").fit(pcs)
    rows = np.flatnonzero(TIMES.year == 1994)[::3]
    windows = _own_windows(rows, 30)
    columns = np.maximum(windows, 0)
    allowed = held_out_mask(TIMES, rows, 10, columns=columns) & (windows >= 0)
    restrict = pcs[:, 1] > -3  # a regime-like restriction as well
    n_ties = 0
    for narrowed in (allowed, allowed & restrict[columns]):
        ranked = rank_windows(pcs, TIMES, rows, windows, narrowed, top=15, separation=2)
        assert len(ranked) == rows.size
        for position, row in enumerate(rows):
            candidates = windows[position][narrowed[position]]
            (want_rows, want_distances), = rank_many(index, TIMES, pcs[row:row + 1],
                                                     candidates, top=15, separation=2)
            got_rows, got_distances = ranked[position]
            np.testing.assert_array_equal(got_rows, want_rows)
            np.testing.assert_array_equal(got_distances, want_distances)
            n_ties += int(np.sum(np.diff(got_distances) == 0))
    assert n_ties > 50  # the rounding made ties: their order (lower row first) was checked
    for position, row in enumerate(rows[:3]):
        live = find_analogs(index, TIMES, pcs[row], target_time=TIMES[row], top=15,
                            window=30, exclude=10, separation=2,
                            restrict=TIMES.year != TIMES[row].year)
        got_rows, got_distances = rank_windows(pcs, TIMES, rows, windows, allowed, top=15,
                                               separation=2)[position]
        np.testing.assert_array_equal(got_rows, live["row"].to_numpy())
        np.testing.assert_array_equal(got_distances, live["distance"].to_numpy())


def test_window_ranking_equals_brute_force_neighbours():
    """Without de-clustering, rank_windows' analogs of a target are its nearest allowed
    days by Euclidean distance: scipy's cdist and scikit-learn's brute-force
    NearestNeighbors over the same candidates as outside references (continuous PCs:
    no ties, so float32 and float64 agree on the order)."""
    from scipy.spatial.distance import cdist

    from analogs.stages.selection import held_out_mask, rank_windows

    pcs = synthetic_pcs_for_ties()
    rows = np.flatnonzero(TIMES.year == 1996)[::17]
    windows = _own_windows(rows, 45)
    allowed = held_out_mask(TIMES, rows, 10, columns=np.maximum(windows, 0)) & (windows >= 0)
    ranked = rank_windows(pcs, TIMES, rows, windows, allowed, top=20, separation=0)
    for position, row in enumerate(rows):
        candidates = windows[position][allowed[position]]
        distances = cdist(pcs[row:row + 1], pcs[candidates])[0]
        order = np.argsort(distances, kind="stable")[:20]
        got_rows, got_distances = ranked[position]
        np.testing.assert_array_equal(got_rows, candidates[order])
        np.testing.assert_allclose(got_distances, distances[order], rtol=1e-5)
        nn = NearestNeighbors(n_neighbors=20, algorithm="brute").fit(pcs[candidates])
        np.testing.assert_array_equal(got_rows, candidates[nn.kneighbors(pcs[row:row + 1])[1][0]])


def synthetic_pcs_for_ties():
    """PCs of every day in TIMES with persistence (integers after rounding: exact ties)."""
    rng = np.random.default_rng(21)
    pcs = np.zeros((len(TIMES), 4))
    for t in range(1, len(TIMES)):
        pcs[t] = 0.7 * pcs[t - 1] + rng.normal(size=4) * 2
    return pcs


def test_held_out_rule_on_gathered_calendar_days_equals_the_mask():
    """held_out_days on each window's calendar years and day numbers gathered in 32 bits
    (the event-weighted hindcast's inputs) equals held_out_mask over the same windows,
    and both equal pandas' calendar: another year and more than ``exclude`` whole days
    from the target (common practice, no source: leave-one-year-out with an exclusion
    window)."""
    from analogs.stages.selection import day_numbers, held_out_days, held_out_mask

    rows = np.r_[0, 1, 364, 365, 366, 730, np.flatnonzero(TIMES.year == 1996)[::29]]
    windows = _own_windows(rows, 20)
    columns = np.maximum(windows, 0)
    years, days = TIMES.year.to_numpy(), day_numbers(TIMES)
    for exclude in (None, 0, 10, 40):
        got = held_out_days(years.astype(np.int32)[columns], days.astype(np.int32)[columns],
                            years[rows], days[rows], exclude)
        np.testing.assert_array_equal(got, held_out_mask(TIMES, rows, exclude, columns=columns))
        for position, row in enumerate(rows):
            looked_at = TIMES[columns[position]]
            expected = looked_at.year != TIMES[row].year
            if exclude is not None:
                expected &= np.abs((looked_at - TIMES[row]).days) > exclude
            np.testing.assert_array_equal(got[position], expected)


def test_event_fractions_are_the_mean_of_each_list():
    """_event_fractions (one cumulative count per batch) equals numpy's mean of each
    list's events to the last bit, empty lists NaN (the fraction of analogs with the
    event: the forecast of equal weights)."""
    rng = np.random.default_rng(4)
    observed = rng.random(500) < 0.3
    picked = [rng.choice(500, size=size, replace=False) for size in
              rng.integers(0, 60, size=300)] + [np.zeros(0, dtype=np.int64)]
    sizes = np.array([rows.size for rows in picked])
    got = hindcast_stage._event_fractions(observed, picked, sizes)
    for rows, value in zip(picked, got):
        if rows.size:
            assert value == observed[rows].mean()
        else:
            assert np.isnan(value)
    assert hindcast_stage._event_fractions(observed, [], np.zeros(0, dtype=np.int64)).size == 0


def test_consecutive_positions_index_as_a_view_of_the_same_values():
    """_as_slice: consecutive ascending positions (a whole year's calendar days) become a
    slice, whose view holds exactly what numpy's fancy indexing copies; positions with a
    gap, out of order or repeated stay an index array (the same fancy indexing)."""
    table = np.arange(366 * 7).reshape(366, 7)
    for positions in (np.arange(365), np.arange(3, 4), np.arange(100, 366),
                      np.r_[0:10, 11:20], np.arange(10)[::-1], np.r_[4, 4, 5]):
        picked = hindcast_stage._as_slice(positions)
        assert isinstance(picked, slice) == (
            bool(np.all(np.diff(positions) == 1)))
        np.testing.assert_array_equal(table[picked], table[positions])
        if isinstance(picked, slice):
            assert np.shares_memory(table[picked], table)
