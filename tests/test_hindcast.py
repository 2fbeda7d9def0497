"""Leave-one-year-out hindcast: the analogs of each day come from the other years only."""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss
from sklearn.neighbors import NearestNeighbors

from analogs.errors import AnalogsInputError
from analogs.stages.hindcast import held_out_analogs, leave_one_year_out, score_hindcast, tune
from analogs.stages.index import AnalogIndex, faiss_threads
from analogs.stages.selection import candidate_ids, find_analogs

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
