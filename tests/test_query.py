"""Query constraints: season window, exclusion window, de-clustering.

Restricting analogs to a window of one to two months around the calendar day and counting
analogs within a few days of each other as one episode is common practice (no source).
"""

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st
from sklearn.neighbors import NearestNeighbors

from analogs.errors import AnalogsInputError
from analogs.stages.index import AnalogIndex
from analogs.stages.selection import (DEFAULT_SEPARATION, DEFAULT_TOP, DEFAULT_WINDOW,
                                      calendar_distance_days, candidate_ids, decluster,
                                      exclusion_mask, find_analogs, find_analogs_many,
                                      rank_candidates, rank_many,
                                      season_mask)

DAYS = pd.date_range("1991-01-01", "2000-12-31", freq="D") + pd.Timedelta(hours=12)


def test_calendar_distance_wraps_the_year_end():
    times = pd.to_datetime(["2001-12-28", "2005-01-03", "2003-07-01"])
    np.testing.assert_allclose(calendar_distance_days(times, "1999-01-01"), [4.2425, 2, 181], atol=1e-6)


@settings(max_examples=60, deadline=None)
@given(target=st.dates(min_value=pd.Timestamp("1991-01-01").date(),
                       max_value=pd.Timestamp("2000-12-31").date()),
       window=st.integers(min_value=0, max_value=120))
def test_season_window_property(target, window):
    """Every allowed day lies within the window of the target's calendar day, and every day
    so close (counted by pandas day-of-year arithmetic on a 365.2425-day circle) is allowed."""
    mask = season_mask(DAYS, pd.Timestamp(target), window)
    doy = DAYS.day_of_year.to_numpy()
    t = pd.Timestamp(target).day_of_year
    d = np.abs(doy - t)
    circular = np.minimum(d, 365.2425 - d)
    np.testing.assert_array_equal(mask, circular <= window)
    # A window of at least half a year admits every day.
    assert season_mask(DAYS, pd.Timestamp(target), 183).all()


@settings(max_examples=40, deadline=None)
@given(target=st.dates(min_value=pd.Timestamp("1991-01-01").date(),
                       max_value=pd.Timestamp("2000-12-31").date()),
       exclude=st.integers(min_value=0, max_value=30))
def test_exclusion_property(target, exclude):
    excluded = exclusion_mask(DAYS, pd.Timestamp(target), exclude)
    gaps = np.abs((DAYS.normalize() - pd.Timestamp(target)).days)
    np.testing.assert_array_equal(excluded, gaps <= exclude)
    # Count the excluded days independently with a pandas date range clipped to the archive.
    span = pd.date_range(pd.Timestamp(target) - pd.Timedelta(days=exclude),
                         pd.Timestamp(target) + pd.Timedelta(days=exclude), freq="D")
    assert excluded.sum() == span.isin(DAYS.normalize()).sum()


@settings(max_examples=60, deadline=None)
@given(offsets=st.lists(st.integers(min_value=0, max_value=400), min_size=1, max_size=60),
       separation=st.integers(min_value=0, max_value=6))
def test_decluster_property(offsets, separation):
    """Kept days are pairwise more than `separation` days apart, and every dropped day is
    within `separation` of a better (earlier-ranked) kept day."""
    times = pd.Timestamp("1995-01-01") + pd.to_timedelta(offsets, unit="D")
    kept = decluster(times, separation)
    kept_days = np.asarray(offsets)[kept]
    if separation > 0:
        gaps = np.abs(kept_days[:, None] - kept_days[None, :])
        assert (gaps[~np.eye(len(kept), dtype=bool)] > separation).all()
    for position, day in enumerate(offsets):
        if position in kept:
            continue
        better = [offsets[k] for k in kept if k < position]
        assert better and min(abs(b - day) for b in better) <= separation


def test_candidate_ids_combine_window_exclusion_and_restriction():
    target = pd.Timestamp("1995-06-15T12")
    restrict = np.arange(len(DAYS)) % 2 == 0
    ids = candidate_ids(DAYS, target, window=10, exclude=3, restrict=restrict)
    chosen = DAYS[ids]
    assert (calendar_distance_days(chosen, target) <= 10).all()
    assert (np.abs((chosen.normalize() - target.normalize()).days) > 3).all()
    assert (ids % 2 == 0).all()
    # 10 years x 21 days, minus the 7 excluded around the target, half of them kept.
    assert abs(len(ids) - (10 * 21 - 7) / 2) <= 3


def test_find_analogs_matches_brute_force_over_candidates():
    """find_analogs with separation 0 equals exact brute-force ranking (scikit-learn) over the
    days the windows allow."""
    rng = np.random.default_rng(3)
    pcs = rng.normal(size=(len(DAYS), 6))
    index = AnalogIndex().fit(pcs)
    target_row = 1800
    found = find_analogs(index, DAYS, pcs[target_row], target_time=DAYS[target_row],
                         top=12, window=30, exclude=5, separation=0)
    allowed = candidate_ids(DAYS, DAYS[target_row], window=30, exclude=5)
    reference = NearestNeighbors(n_neighbors=12, algorithm="brute").fit(pcs[allowed])
    ref_d, ref_i = reference.kneighbors(pcs[target_row:target_row + 1])
    np.testing.assert_array_equal(found["row"].to_numpy(), allowed[ref_i[0]])
    np.testing.assert_allclose(found["distance"].to_numpy(), ref_d[0], rtol=1e-4)
    assert list(found["rank"]) == list(range(1, 13))


def test_find_analogs_declusters_and_returns_top():
    rng = np.random.default_rng(5)
    # A smooth random walk: neighbouring days are near each other, so de-clustering matters.
    pcs = np.cumsum(rng.normal(size=(len(DAYS), 4)), axis=0) * 0.1
    index = AnalogIndex().fit(pcs)
    found = find_analogs(index, DAYS, pcs[2000], target_time=DAYS[2000], top=15,
                         window=45, exclude=10, separation=3)
    assert len(found) == 15
    assert found["distance"].is_monotonic_increasing
    days = found["time"].dt.normalize().to_numpy().astype("datetime64[D]").astype(int)
    gaps = np.abs(days[:, None] - days[None, :])[~np.eye(15, dtype=bool)]
    assert (gaps > 3).all()


def test_find_analogs_rejects_bad_options():
    index = AnalogIndex().fit(np.zeros((len(DAYS), 2)))
    with pytest.raises(AnalogsInputError, match="'window' parameter of find_analogs must be an integer >= 0"):
        find_analogs(index, DAYS, np.zeros(2), target_time=DAYS[0], window=-5)
    with pytest.raises(AnalogsInputError, match="'top' parameter of find_analogs"):
        find_analogs(index, DAYS, np.zeros(2), target_time=DAYS[0], top=0)


@pytest.mark.parametrize("separation", [0, 3])
def test_rank_many_with_restrict_equals_ranking_each_target_alone(separation):
    """A batch of targets sharing one season window, each with its own restriction
    (applied after the search, with a larger fetch), ranks exactly as rank_candidates
    over ``allowed & restrict[j]`` for each target alone; the second target's
    restriction removes nearly every candidate (fewer analogs than ``top``)."""
    rng = np.random.default_rng(7)
    pcs = np.cumsum(rng.normal(size=(len(DAYS), 5)), axis=0) * 0.1
    index = AnalogIndex().fit(pcs)
    targets = np.array([200, 565, 931, 1296])  # 19 July of four years
    allowed = candidate_ids(DAYS, DAYS[targets[0]], window=20, exclude=None)
    restrict = DAYS.year.to_numpy()[None, :] != DAYS.year.to_numpy()[targets][:, None]
    restrict[1] &= np.isin(np.arange(len(DAYS)), allowed[:6])  # six days of 1991
    batch = rank_many(index, DAYS, pcs[targets], allowed, top=10, separation=separation,
                      restrict=restrict)
    assert len(batch) == len(targets)
    for j, (rows, distances) in enumerate(batch):
        alone = rank_candidates(index, DAYS, pcs[targets[j]], allowed[restrict[j][allowed]],
                                top=10, separation=separation)
        np.testing.assert_array_equal(rows, alone["row"].to_numpy())
        np.testing.assert_array_equal(distances, alone["distance"].to_numpy())
    assert len(batch[0][0]) == 10
    assert 0 < len(batch[1][0]) <= 6 and (separation or len(batch[1][0]) == 6)


@pytest.mark.parametrize(("kind", "settings"), [
    ("flat", dict(top=10, window=45, exclude=10, separation=3)),
    ("flat", dict(top=25, window=0, exclude=0, separation=0)),
    ("flat", dict(top=5, window=183, exclude=None, separation=5)),
    ("hnsw", dict(top=10, window=30, exclude=10, separation=3))])
def test_find_analogs_many_equals_find_analogs_target_by_target(kind, settings):
    """The batched searches of find_analogs_many (targets grouped by calendar day, the
    union of their windows searched once) give each target exactly the table
    find_analogs gives it alone: rows, ranks, times and bit-equal distances; with a
    restriction (every other day) and targets on the same and neighbouring calendar
    days, across the turn of the year and in any order."""
    rng = np.random.default_rng(18)
    pcs = np.cumsum(rng.normal(size=(len(DAYS), 6)), axis=0) * 0.1
    index = AnalogIndex(kind=kind, hnsw_threshold=1).fit(pcs)
    targets = np.concatenate([rng.choice(len(DAYS), 60, replace=False),
                              [200, 565, 931, 1296, 1, 363, 364, 730]])
    restrict = np.arange(len(DAYS)) % 2 == 0
    many = find_analogs_many(index, DAYS, pcs[targets], DAYS[targets], restrict=restrict,
                             **settings)
    assert len(many) == len(targets)
    for target, table in zip(targets, many):
        alone = find_analogs(index, DAYS, pcs[target], target_time=DAYS[target],
                             restrict=restrict, **settings)
        pd.testing.assert_frame_equal(table, alone, check_exact=True)
        # a window of 0 days leaves fewer allowed days than top: the short rankings too
        assert len(alone) == settings["top"] or (settings["window"] == 0 and len(alone))


def test_rank_many_rejects_a_restriction_of_the_wrong_shape():
    index = AnalogIndex().fit(np.zeros((len(DAYS), 2)))
    with pytest.raises(AnalogsInputError, match="'restrict' parameter of rank_many must be"):
        rank_many(index, DAYS, np.zeros((2, 2)), np.arange(10), top=3, separation=0,
                  restrict=np.ones(len(DAYS), dtype=bool))


def test_find_analogs_defaults_are_the_shared_constants():
    """find_analogs' signature takes its defaults from the module constants that the
    hindcast uses too (one definition of top, window and separation)."""
    import inspect

    from analogs.stages.hindcast import leave_one_year_out

    for function in (find_analogs, leave_one_year_out):
        parameters = inspect.signature(function).parameters
        assert parameters["top"].default == DEFAULT_TOP
        assert parameters["window"].default == DEFAULT_WINDOW
        assert parameters["separation"].default == DEFAULT_SEPARATION
