"""Leave-one-year-out hindcast: the analogs of each day come from the other years only."""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import brier_score_loss
from sklearn.neighbors import NearestNeighbors

from analogs.errors import AnalogsInputError
from analogs.stages.hindcast import leave_one_year_out, score_hindcast, tune
from analogs.stages.selection import candidate_ids

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
    season window (scikit-learn brute-force neighbours as the outside reference)."""
    pcs, observed = synthetic
    hindcast = leave_one_year_out(pcs, TIMES, observed, top=15, window=30, separation=0)
    assert len(hindcast) == len(TIMES)
    for row in (10, 400, 1500, 2800):
        target = TIMES[row]
        allowed = candidate_ids(TIMES, target, window=30, exclude=None,
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
