"""Scores of probability forecasts checked against outside references."""

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, roc_auc_score, roc_curve

from analogs.errors import AnalogsInputError
from analogs.stages.scores import (
    roc_auc_within,
    bootstrap_interval,
    brier_score,
    brier_skill_score,
    brier_skill_score_interval,
    contingency_scores,
    contingency_table,
    murphy_decomposition,
    reliability_table,
    roc_auc,
    roc_auc_interval,
    roc_curve_points,
    verification_summary,
)


@pytest.fixture
def forecasts():
    """Seeded, moderately reliable probability forecasts with ties (rounded to 0.05)."""
    rng = np.random.default_rng(42)
    truth = rng.beta(0.8, 3.0, size=2000)
    outcome = (rng.random(truth.size) < truth).astype(int)
    noisy = np.clip(truth + rng.normal(0, 0.1, truth.size), 0, 1)
    return np.round(noisy * 20) / 20, outcome


def test_finley_table_scores():
    """Finley's (1884) tornado forecasts, Wilks, Statistical Methods in the Atmospheric
    Sciences (values from memory, to 3 decimals; REFERENCES.md)."""
    scores = contingency_scores(hits=28, false_alarms=72, misses=23, correct_negatives=2680)
    expected = {"proportion_correct": 0.966, "pod": 0.549, "far": 0.720, "csi": 0.228,
                "heidke": 0.355, "peirce": 0.523, "gilbert": 0.216, "ets": 0.216}
    for name, value in expected.items():
        assert round(scores[name], 3) == value, name
    assert round(scores["bias"], 2) == 1.96  # quoted to 2 decimals


def test_contingency_table_counts_threshold_inclusive():
    """A 'yes' forecast is p >= threshold (common practice, no source); counts by hand."""
    p = np.array([0.9, 0.6, 0.5, 0.4, 0.1, 0.5])
    o = np.array([1, 0, 1, 1, 0, 0])
    assert contingency_table(p, o, 0.5) == {
        "hits": 2, "false_alarms": 2, "misses": 1, "correct_negatives": 1}


@pytest.mark.parametrize("threshold", [-0.1, 1.5, float("nan")])
def test_threshold_outside_unit_interval(threshold):
    with pytest.raises(AnalogsInputError,
                       match=r"The 'threshold' parameter of contingency_table must be a "
                             r"number >= 0.0 and <= 1.0"):
        contingency_table([0.2, 0.8], [0, 1], threshold)


def test_undefined_scores_are_nan():
    """No 'yes' forecasts: FAR = b / (a + b) has a zero denominator (Wilks)."""
    scores = contingency_scores(0, 0, 5, 10)
    assert np.isnan(scores["far"]) and scores["pod"] == 0.0


def test_brier_score_matches_sklearn(forecasts):
    """Brier (1950) score against sklearn.metrics.brier_score_loss."""
    p, o = forecasts
    assert brier_score(p, o) == pytest.approx(brier_score_loss(o, p), rel=1e-12)


def test_brier_skill_score_against_climatology(forecasts):
    """BSS = 1 - BS / BS_ref (Wilks) with sklearn's Brier score for both terms."""
    p, o = forecasts
    base = o.mean()
    expected = 1 - brier_score_loss(o, p) / brier_score_loss(o, np.full(o.size, base))
    assert brier_skill_score(p, o, base) == pytest.approx(expected, rel=1e-12)
    assert brier_skill_score(p, o, p) == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(brier_skill_score(o.astype(float), o, o.astype(float)))


def test_roc_auc_matches_sklearn_with_ties(forecasts):
    """Trapezoid ROC area against sklearn.metrics.roc_auc_score (ties included)."""
    p, o = forecasts
    assert roc_auc(p, o) == pytest.approx(roc_auc_score(o, p), rel=1e-12)


def test_roc_points_match_sklearn_curve(forecasts):
    """ROC points against sklearn.metrics.roc_curve(drop_intermediate=False)."""
    p, o = forecasts
    far, hit, thresholds = roc_curve_points(p, o)
    ref_far, ref_hit, ref_thr = roc_curve(o, p, drop_intermediate=False)
    np.testing.assert_allclose(far, ref_far)
    np.testing.assert_allclose(hit, ref_hit)
    np.testing.assert_allclose(thresholds[1:], ref_thr[1:])


def test_roc_needs_both_classes():
    with pytest.raises(AnalogsInputError, match="both events .* and non-events"):
        roc_auc([0.1, 0.4], [0, 0])


def test_murphy_decomposition_adds_up_exactly(forecasts):
    """Murphy (1973): REL - RES + UNC equals the Brier score of the forecasts replaced
    by their bin means, exactly; UNC = obar(1 - obar)."""
    p, o = forecasts
    rng = np.random.default_rng(3)
    p = np.clip(p + rng.uniform(-0.02, 0.02, p.size), 0, 1)  # spread within bins
    parts = murphy_decomposition(p, o, n_bins=10)
    total = parts["reliability"] - parts["resolution"] + parts["uncertainty"]
    assert total == pytest.approx(parts["brier_score_binned"], abs=1e-14)
    assert parts["uncertainty"] == pytest.approx(o.mean() * (1 - o.mean()), rel=1e-12)
    # Binned forecasts computed independently here, scored by scikit-learn.
    bins = np.minimum((p * 10).astype(int), 9)
    means = np.array([p[bins == b].mean() if np.any(bins == b) else 0 for b in range(10)])
    assert parts["brier_score_binned"] == pytest.approx(
        brier_score_loss(o, means[bins]), rel=1e-12)
    assert parts["brier_score"] == pytest.approx(brier_score_loss(o, p), rel=1e-12)
    assert parts["brier_score"] != parts["brier_score_binned"]


def test_reliability_table_omits_empty_bins():
    """Reliability diagram bins (Wilks): counts and frequencies worked by hand."""
    p = np.array([0.05, 0.05, 0.15, 0.95, 1.0])
    o = np.array([0, 1, 0, 1, 1])
    table = reliability_table(p, o, n_bins=10)
    assert [row["count"] for row in table] == [2, 1, 2]
    assert table[0] == {"forecast_mean": 0.05, "observed_frequency": 0.5, "count": 2}
    assert table[2]["forecast_mean"] == pytest.approx(0.975)
    assert table[2]["observed_frequency"] == 1.0


@pytest.mark.parametrize(
    ("p", "o", "match"),
    [([0.2, 1.2], [0, 1], r"The 'p' parameter of brier_score must hold probabilities"),
     ([0.2, float("nan")], [0, 1], r"must hold probabilities in \[0, 1\]. Got [^ ]*nan[^ ]* instead"),
     ([-np.inf, 0.2], [0, 1], r"must hold probabilities in \[0, 1\]. Got [^ ]*-inf[^ ]* instead"),
     ([0.2, np.inf], [0, 1], r"must hold probabilities in \[0, 1\]. Got [^ ]*\(inf[^ ]* instead"),
     ([-0.1, 0.2], [0, 1], r"must hold probabilities in \[0, 1\]. Got [^ ]*-0.1[^ ]* instead"),
     ([0.2, 0.3], [0, 2], r"The 'o' parameter of brier_score must hold outcomes 0 or 1"),
     ([0.2, 0.3], [0.5, 1.0], r"must hold outcomes 0 or 1. Got [^ ]*0.5[^ ]* instead"),
     ([0.2], [0, 1], r"non-empty 1-D arrays of equal length")])
def test_bad_forecasts(p, o, match):
    with pytest.raises(AnalogsInputError, match=match):
        brier_score(p, o)


def test_bootstrap_mean_interval_matches_normal_theory():
    """Percentile bootstrap of a mean against the normal-theory interval
    mean +- z s / sqrt(n) (Efron & Tibshirani 1993), within 15 %."""
    from scipy import stats

    x = np.random.default_rng(7).normal(2.0, 1.0, 400)
    low, high = bootstrap_interval(np.mean, x, n_resamples=2000, confidence=0.9)
    half = stats.norm.ppf(0.95) * x.std(ddof=1) / np.sqrt(x.size)
    assert low < x.mean() < high
    assert (high - low) / 2 == pytest.approx(half, rel=0.15)
    vec = bootstrap_interval(lambda a: a.mean(axis=-1), x, n_resamples=2000,
                             confidence=0.9, vectorized=True)
    assert vec == pytest.approx((low, high))


def test_block_bootstrap_widens_for_correlated_blocks():
    """Resampling whole years (blocks) keeps within-year correlation, so the interval
    of a mean of strongly year-correlated data is wider than a row bootstrap
    (Wilks, block bootstrap; common practice)."""
    rng = np.random.default_rng(11)
    years = np.repeat(np.arange(30), 50)
    x = rng.normal(0, 1, 30)[years] + rng.normal(0, 0.2, years.size)
    row = bootstrap_interval(np.mean, x, n_resamples=500, seed=1)
    blocked = bootstrap_interval(np.mean, x, n_resamples=500, seed=1, block=years)
    assert (blocked[1] - blocked[0]) > 3 * (row[1] - row[0])
    assert bootstrap_interval(np.mean, x, n_resamples=500, seed=1, block=years) == blocked


def test_brier_skill_interval_is_the_bootstrap_of_the_skill_score(forecasts):
    """brier_skill_score_interval (squared errors computed once, resampled) equals
    bootstrap_interval over brier_skill_score itself to the last bit, rows or year blocks
    resampled, with an array or a scalar reference; and the skill score is scikit-learn's
    1 - brier_score_loss / brier_score_loss of the reference (Brier 1950)."""
    p, o = forecasts
    rng = np.random.default_rng(5)
    reference = np.round(rng.uniform(0.1, 0.4, p.size), 3)
    years = np.repeat(np.arange(40), 50)
    for ref, resampled in ((reference, reference), (0.2, np.full(p.size, 0.2))):
        for block in (None, years):
            settings = dict(n_resamples=200, seed=3, block=block)
            assert (brier_skill_score_interval(p, o, ref, **settings)
                    == bootstrap_interval(brier_skill_score, p, o, resampled, **settings))
    expected = 1 - brier_score_loss(o, p) / brier_score_loss(o, reference)
    assert brier_skill_score(p, o, reference) == pytest.approx(expected, rel=1e-12)
    with pytest.raises(AnalogsInputError, match="'p' parameter of brier_skill_score_interval"):
        brier_skill_score_interval(np.r_[p[:-1], np.nan], o, reference)


def test_roc_auc_interval_is_the_bootstrap_of_the_roc_area(forecasts):
    """roc_auc_interval (distinct forecasts ranked once, each resample counted by rank)
    equals bootstrap_interval over roc_auc itself to the last bit: rows or year blocks
    resampled, forecasts with many exact ties (rounded to 0.05) and all distinct, and
    with few events (resamples of one class skipped alike); each resample's area is
    scikit-learn's roc_auc_score of the same rows (its trapezoids over the distinct
    thresholds, ties counted half)."""
    p, o = forecasts
    years = np.repeat(np.arange(40), 50)
    distinct = np.random.default_rng(8).permutation(p.size) / p.size
    rare = (np.arange(p.size) % 400 == 0).astype(int)  # 5 events: some resamples hold none
    for p_case, o_case in ((p, o), (distinct, o), (p, rare)):
        for block in (None, years):
            settings = dict(n_resamples=200, seed=3, block=block)
            assert (roc_auc_interval(p_case, o_case, **settings)
                    == bootstrap_interval(roc_auc, p_case, o_case, **settings))
    rows = np.random.default_rng(2).integers(0, p.size, p.size)
    low, high = roc_auc_interval(p, o, n_resamples=200, seed=3)
    assert low <= roc_auc_score(o, p) <= high
    assert roc_auc(p[rows], o[rows]) == pytest.approx(roc_auc_score(o[rows], p[rows]),
                                                      rel=1e-12)
    with pytest.raises(AnalogsInputError, match="'p' parameter of roc_auc_interval"):
        roc_auc_interval(np.r_[p[:-1], np.nan], o)


def test_bootstrap_skips_undefined_resamples():
    """ROC area is undefined on one-class resamples; they are skipped."""
    p = np.linspace(0, 1, 40)
    o = (p > 0.9).astype(int)  # 4 events: some resamples hold none
    low, high = bootstrap_interval(roc_auc, p, o, n_resamples=200)
    assert 0.9 <= low <= high <= 1.0


def test_verification_summary_shape(forecasts):
    """The verify --json keys of DESIGN.md, each equal to its scorer."""
    p, o = forecasts
    summary = verification_summary(p, o, o.mean(), threshold=0.3)
    assert summary["brier_score"] == pytest.approx(brier_score_loss(o, p))
    assert summary["roc_auc"] == pytest.approx(roc_auc_score(o, p))
    assert sum(row["count"] for row in summary["reliability"]) == o.size
    assert summary["contingency"] == contingency_table(p, o, 0.3)
    with pytest.raises(AnalogsInputError, match="'threshold' parameter of verification_summary"):
        verification_summary(p, o, o.mean(), threshold=2)


def test_brier_formula_is_written_once():
    """The Brier score's formula mean((p - o) ** 2) appears in analogs/stages/scores.py
    only; every other module calls brier_score / brier_skill_score."""
    import re
    from pathlib import Path

    import analogs

    formula = re.compile(r"mean\(\s*\(\s*[\w\[\]\.]+\s*-\s*[\w\[\]\.]+\s*\)\s*\*\*\s*2\s*\)")
    package = Path(analogs.__file__).parent
    written = sorted(str(path.relative_to(package)) for path in package.rglob("*.py")
                     if formula.search(path.read_text()))
    assert written == ["stages/scores.py"]
    assert formula.search("float(np.mean((ref - o) ** 2))")  # the pattern finds the old copies


def test_roc_auc_within_groups_matches_sklearn_per_group():
    """The within-month ROC area is each month's scikit-learn roc_auc_score weighted by its
    number of (event, non-event) pairs (Mann-Whitney form of the ROC area, Wilks); a
    forecast that only follows the season scores 0.5 within the month."""
    rng = np.random.default_rng(3)
    groups = np.repeat(np.arange(1, 7), 120)
    season = np.linspace(0.1, 0.7, 6)[groups - 1]
    o = (rng.random(groups.size) < season).astype(int)
    p = np.clip(season + 0.3 * o * rng.random(groups.size), 0, 1)
    weights, areas = [], []
    for g in np.unique(groups):
        part = groups == g
        weights.append(o[part].sum() * (part.sum() - o[part].sum()))
        areas.append(roc_auc_score(o[part], p[part]))
    assert roc_auc_within(p, o, groups) == pytest.approx(np.average(areas, weights=weights))
    assert roc_auc_within(season, o, groups) == pytest.approx(0.5)
    assert roc_auc_score(o, season) > 0.6  # over the whole year the season alone looks skilful
    with pytest.raises(AnalogsInputError, match="'groups' parameter of roc_auc_within"):
        roc_auc_within(p, o, groups[:-1])
