"""Scores for probability forecasts of a binary event, and bootstrap intervals.

Pure functions: forecasts ``p`` are probabilities in [0, 1], outcomes ``o`` are
0 or 1, both 1-D of equal length. The leave-one-year-out hindcast that feeds
them lives with the query engine; this module only scores.

Undefined ratios (a zero denominator, e.g. FAR with no "yes" forecasts, or a
Brier skill score against a perfect reference) are returned as NaN; callers
that write JSON turn NaN into null.

References
----------
Brier, G. W., 1950: Verification of forecasts expressed in terms of
probability. Mon. Wea. Rev., 78, 1-3.

Murphy, A. H., 1973: A new vector partition of the probability score.
J. Appl. Meteor., 12, 595-600.

Wilks, D. S.: Statistical Methods in the Atmospheric Sciences, Academic Press
(2x2 contingency scores, ROC, reliability diagrams, bootstrap).

Efron, B. and R. J. Tibshirani, 1993: An Introduction to the Bootstrap.
Chapman & Hall (percentile intervals; block resampling for dependent data).
"""

from __future__ import annotations

import numpy as np

from analogs._validation import check_float, check_int
from analogs.errors import AnalogsInputError


def _forecasts(p, o, owner):
    """Validated float forecasts and 0/1 outcomes as 1-D arrays."""
    p = np.asarray(p, dtype=float)
    o_raw = np.asarray(o)
    if p.ndim != 1 or o_raw.shape != p.shape or p.size == 0:
        raise AnalogsInputError(
            f"The 'p' and 'o' parameters of {owner} must be non-empty 1-D arrays of equal "
            f"length. Got shapes {p.shape} and {o_raw.shape} instead.")
    probability = (p >= 0) & (p <= 1)  # false for NaN and infinities too
    if not probability.all():
        bad = p[~probability][0]
        raise AnalogsInputError(
            f"The 'p' parameter of {owner} must hold probabilities in [0, 1]. "
            f"Got {bad!r} instead.")
    o = o_raw.astype(float)
    if o_raw.dtype != bool and ((o != 0) & (o != 1)).any():
        bad = o_raw[(o != 0) & (o != 1)][0]
        raise AnalogsInputError(
            f"The 'o' parameter of {owner} must hold outcomes 0 or 1. Got {bad!r} instead.")
    return p, o


def _brier(p, o) -> float:
    """The Brier score of validated arrays (the one place its formula is written)."""
    return float(np.mean((p - o) ** 2))


def brier_score(p, o) -> float:
    """Brier (1950) score :math:`BS = \\frac1N\\sum_i (p_i - o_i)^2` (0 is perfect)."""
    p, o = _forecasts(p, o, "brier_score")
    return _brier(p, o)


def brier_skill_score(p, o, p_reference) -> float:
    """Brier skill score :math:`1 - BS / BS_{ref}` against reference forecasts.

    ``p_reference`` is a probability or an array of them (e.g. the
    season-window climatology of each day). NaN when the reference is perfect.
    """
    return _skill(*_squared_errors(p, o, p_reference, "brier_skill_score"))


def brier_skill_score_interval(p, o, p_reference, *, n_resamples=1000, confidence=0.9,
                               seed=0, block=None):
    """``bootstrap_interval(brier_skill_score, p, o, p_reference, ...)``, the same two
    numbers to the last bit for a fraction of the cost: the squared errors are computed
    (and the inputs checked) once, and each resample averages its rows of them, the
    values :func:`brier_skill_score` would compute and average in the same order.
    Parameters as :func:`bootstrap_interval`'s."""
    return bootstrap_interval(
        _skill, *_squared_errors(p, o, p_reference, "brier_skill_score_interval"),
        n_resamples=n_resamples, confidence=confidence, seed=seed, block=block)


def _squared_errors(p, o, p_reference, owner):
    """Squared errors of the forecasts and of the reference (checked inputs)."""
    p, o = _forecasts(p, o, owner)
    reference = np.broadcast_to(np.asarray(p_reference, dtype=float), p.shape)
    reference, _ = _forecasts(reference, o, owner)
    return (p - o) ** 2, (reference - o) ** 2


def _skill(squared_errors, reference_squared_errors) -> float:
    """Brier skill score from the squared errors (:func:`_brier`'s mean), NaN when the
    reference's are all zero."""
    bs_ref = float(np.mean(reference_squared_errors))
    if bs_ref == 0:
        return float("nan")
    return float(1.0 - float(np.mean(squared_errors)) / bs_ref)


def _bins(p, n_bins, owner):
    n_bins = check_int(n_bins, "n_bins", owner, min_value=1)
    # Equal-width bins on [0, 1]; p = 1 falls in the last bin.
    return np.minimum((p * n_bins).astype(int), n_bins - 1), n_bins


def murphy_decomposition(p, o, n_bins=10) -> dict:
    """Murphy (1973) partition of the Brier score: reliability, resolution, uncertainty.

    Forecasts are grouped into ``n_bins`` equal-width bins on [0, 1]; with
    :math:`n_k` forecasts, mean forecast :math:`\\bar p_k` and observed
    frequency :math:`\\bar o_k` in bin k, and :math:`\\bar o` overall,

    .. math::
        REL = \\frac1N\\sum_k n_k(\\bar p_k - \\bar o_k)^2,\\quad
        RES = \\frac1N\\sum_k n_k(\\bar o_k - \\bar o)^2,\\quad
        UNC = \\bar o(1 - \\bar o).

    With every forecast replaced by its bin mean, :math:`REL - RES + UNC`
    equals the Brier score of those binned forecasts exactly
    (``brier_score_binned``); the raw ``brier_score`` differs from it only by
    the within-bin spread of the forecasts.
    """
    owner = "murphy_decomposition"
    p, o = _forecasts(p, o, owner)
    k, n_bins = _bins(p, n_bins, owner)
    n = np.bincount(k, minlength=n_bins).astype(float)
    used = n > 0
    p_mean = np.bincount(k, weights=p, minlength=n_bins)[used] / n[used]
    o_mean = np.bincount(k, weights=o, minlength=n_bins)[used] / n[used]
    o_bar = o.mean()
    total = p.size
    reliability = float(np.sum(n[used] * (p_mean - o_mean) ** 2) / total)
    resolution = float(np.sum(n[used] * (o_mean - o_bar) ** 2) / total)
    bin_mean_of_each = np.zeros(n_bins)
    bin_mean_of_each[used] = p_mean
    return {
        "reliability": reliability,
        "resolution": resolution,
        "uncertainty": float(o_bar * (1.0 - o_bar)),
        "brier_score_binned": _brier(bin_mean_of_each[k], o),
        "brier_score": _brier(p, o),
        "n_bins": n_bins,
    }


def reliability_table(p, o, n_bins=10) -> list:
    """Reliability diagram data: one dict per non-empty equal-width bin.

    Each is ``{"forecast_mean", "observed_frequency", "count"}`` (Wilks,
    reliability diagram), in increasing forecast order.
    """
    owner = "reliability_table"
    p, o = _forecasts(p, o, owner)
    k, n_bins = _bins(p, n_bins, owner)
    n = np.bincount(k, minlength=n_bins)
    p_sum = np.bincount(k, weights=p, minlength=n_bins)
    o_sum = np.bincount(k, weights=o, minlength=n_bins)
    return [{"forecast_mean": float(p_sum[b] / n[b]),
             "observed_frequency": float(o_sum[b] / n[b]),
             "count": int(n[b])} for b in np.flatnonzero(n)]


def roc_curve_points(p, o):
    """ROC curve: (false alarm rate, hit rate, thresholds).

    A "yes" forecast is ``p >= threshold``; thresholds are the distinct
    forecast values in decreasing order, preceded by +inf so the curve starts
    at (0, 0) and ends at (1, 1) (Wilks, ROC diagram). Needs both events and
    non-events.
    """
    owner = "roc_curve_points"
    p, o = _forecasts(p, o, owner)
    order = np.argsort(-p, kind="stable")
    p_sorted, o_sorted = p[order], o[order]
    # Last position of each distinct forecast value: ties move together.
    last = np.flatnonzero(np.r_[np.diff(p_sorted) != 0, True])
    false_alarm_rate, hit_rate = _roc_rates(np.cumsum(o_sorted)[last], last + 1, o, owner)
    thresholds = np.r_[np.inf, p_sorted[last]]
    return false_alarm_rate, hit_rate, thresholds


def _roc_rates(hits, n_yes, o, owner):
    """(false alarm rate, hit rate) of the ROC curve from (0, 0), from the number of
    hits and of "yes" forecasts at each threshold (highest first) and the outcomes ``o``;
    an error without both events and non-events."""
    n_events = o.sum()
    n_non = o.size - n_events
    if n_events == 0 or n_non == 0:
        raise AnalogsInputError(
            f"The 'o' parameter of {owner} must contain both events (1) and non-events (0). "
            f"Got only {'non-events' if n_events == 0 else 'events'} instead.")
    false_alarms = n_yes - hits
    return np.r_[0.0, false_alarms / n_non], np.r_[0.0, hits / n_events]


def roc_auc(p, o) -> float:
    """Area under the ROC curve by the trapezoid rule (0.5 = no skill, 1 = perfect)."""
    false_alarm_rate, hit_rate, _ = roc_curve_points(p, o)
    return float(np.trapezoid(hit_rate, false_alarm_rate))


def roc_auc_interval(p, o, *, n_resamples=1000, confidence=0.9, seed=0, block=None):
    """``bootstrap_interval(roc_auc, p, o, ...)``, the same two numbers to the last bit
    for a fraction of the cost: the distinct forecast values are ranked once (highest
    first), and each resample's hits and "yes" forecasts per threshold are counted from
    its rows' ranks (:func:`numpy.bincount`) instead of sorting its forecasts: the same
    integer counts at the same thresholds as :func:`roc_curve_points`, so the same
    trapezoids. Parameters as :func:`bootstrap_interval`'s."""
    p, o = _forecasts(p, o, "roc_auc_interval")
    values, inverse = np.unique(p, return_inverse=True)
    rank = values.size - 1 - inverse.reshape(-1)

    def ranked_auc(rank, o):
        n_yes = np.bincount(rank, minlength=values.size)
        hits = np.bincount(rank, weights=o, minlength=values.size)
        present = n_yes > 0
        false_alarm_rate, hit_rate = _roc_rates(np.cumsum(hits[present]),
                                                np.cumsum(n_yes[present]), o, "roc_auc")
        return float(np.trapezoid(hit_rate, false_alarm_rate))

    return bootstrap_interval(ranked_auc, rank, o, n_resamples=n_resamples,
                              confidence=confidence, seed=seed, block=block)


def roc_auc_within(p, o, groups) -> float:
    """ROC area counting only pairs of one event and one non-event day of the same group.

    With the calendar month as the group, it is the probability that a day with the
    event gets a higher forecast than a day without it *in the same month*: the
    discrimination left once the seasonal cycle is taken out (a season climatology
    scores about 0.5, where over the whole year it scores well). Equal to the average
    of each group's :func:`roc_auc` weighted by its number of (event, non-event)
    pairs (Mann-Whitney form of the ROC area, Wilks); NaN when no group holds both
    classes.
    """
    p, o = _forecasts(p, o, "roc_auc_within")
    groups = np.asarray(groups)
    if groups.shape != p.shape:
        raise AnalogsInputError(
            "The 'groups' parameter of roc_auc_within must give one label per forecast "
            f"({p.size}). Got shape {groups.shape} instead.")
    total, weight = 0.0, 0.0
    for label in np.unique(groups):
        part = groups == label
        n_events = o[part].sum()
        pairs = n_events * (part.sum() - n_events)
        if pairs == 0:
            continue
        total += roc_auc(p[part], o[part]) * pairs
        weight += pairs
    return float(total / weight) if weight else float("nan")


def contingency_table(p, o, threshold) -> dict:
    """2x2 table of the forecasts ``p >= threshold`` against the outcomes.

    Returns ``{"hits", "false_alarms", "misses", "correct_negatives"}`` (ints).
    """
    owner = "contingency_table"
    threshold = check_float(threshold, "threshold", owner, min_value=0.0, max_value=1.0)
    p, o = _forecasts(p, o, owner)
    yes = p >= threshold
    event = o == 1
    return {"hits": int(np.sum(yes & event)),
            "false_alarms": int(np.sum(yes & ~event)),
            "misses": int(np.sum(~yes & event)),
            "correct_negatives": int(np.sum(~yes & ~event))}


def _ratio(numerator, denominator):
    return float(numerator / denominator) if denominator != 0 else float("nan")


def contingency_scores(hits, false_alarms, misses, correct_negatives) -> dict:
    """Scores of a 2x2 table (Wilks, Statistical Methods in the Atmospheric Sciences).

    With a = hits, b = false alarms, c = misses, d = correct negatives,
    n = a + b + c + d:

    * proportion correct :math:`PC = (a + d)/n`
    * probability of detection :math:`POD = a/(a + c)`
    * false alarm ratio :math:`FAR = b/(a + b)`
    * critical success index :math:`CSI = a/(a + b + c)`
    * bias :math:`B = (a + b)/(a + c)`
    * Heidke skill score :math:`HSS = 2(ad - bc)/[(a + c)(c + d) + (a + b)(b + d)]`
    * Peirce skill score :math:`PSS = (ad - bc)/[(a + c)(b + d)]`
    * Gilbert skill score (equitable threat score)
      :math:`GSS = (a - a_r)/(a + b + c - a_r)`, :math:`a_r = (a + b)(a + c)/n`

    ``gilbert`` and ``ets`` are the same number. NaN where undefined.
    """
    owner = "contingency_scores"
    a, b, c, d = (check_int(v, name, owner, min_value=0) for v, name in (
        (hits, "hits"), (false_alarms, "false_alarms"), (misses, "misses"),
        (correct_negatives, "correct_negatives")))
    n = a + b + c + d
    if n == 0:
        raise AnalogsInputError(
            f"The 2x2 table given to {owner} must hold at least one case. Got all zeros instead.")
    a_random = (a + b) * (a + c) / n
    gilbert = _ratio(a - a_random, a + b + c - a_random)
    return {
        "proportion_correct": (a + d) / n,
        "pod": _ratio(a, a + c),
        "far": _ratio(b, a + b),
        "csi": _ratio(a, a + b + c),
        "bias": _ratio(a + b, a + c),
        "heidke": _ratio(2.0 * (a * d - b * c), (a + c) * (c + d) + (a + b) * (b + d)),
        "peirce": _ratio(a * d - b * c, (a + c) * (b + d)),
        "gilbert": gilbert,
        "ets": gilbert,
    }


def bootstrap_interval(statistic, *arrays, n_resamples=1000, confidence=0.9, seed=0,
                       block=None, vectorized=False):
    """Percentile bootstrap interval of ``statistic(*arrays)``.

    The arrays (equal length along the first axis) are resampled together with
    replacement. With ``block`` (one label per row, e.g. the year of each
    day), whole blocks are drawn instead of rows, since days within a year are
    correlated (block bootstrap; Efron & Tibshirani 1993, Wilks). Resamples in
    which the statistic is undefined (NaN, or a score that refuses the sample,
    such as ROC area with one class only) are skipped; at least half must
    succeed.

    With ``vectorized=True`` (rows resampled, ``block=None`` only) the
    statistic is called once with arrays of shape ``(n_resamples, n, ...)``
    and must return ``n_resamples`` values, one per row.

    Returns
    -------
    (low, high) floats, the ``(1 - confidence)/2`` and ``(1 + confidence)/2``
    quantiles of the resampled statistic.
    """
    owner = "bootstrap_interval"
    n_resamples = check_int(n_resamples, "n_resamples", owner, min_value=10)
    confidence = check_float(confidence, "confidence", owner, min_value=0.0, max_value=1.0,
                             min_inclusive=False, max_inclusive=False)
    if not arrays:
        raise AnalogsInputError(f"{owner} needs at least one array to resample.")
    arrays = [np.asarray(a) for a in arrays]
    n = len(arrays[0])
    if n == 0 or any(len(a) != n for a in arrays):
        raise AnalogsInputError(
            f"The arrays given to {owner} must be non-empty and of equal length. "
            f"Got lengths {[len(a) for a in arrays]} instead.")
    if vectorized and block is not None:
        raise AnalogsInputError(
            f"The 'vectorized' parameter of {owner} needs block=None (blocks differ in size).")
    rng = np.random.default_rng(seed)
    if block is None:
        indices = rng.integers(0, n, size=(n_resamples, n))
    else:
        labels = np.asarray(block)
        if labels.shape != (n,):
            raise AnalogsInputError(
                f"The 'block' parameter of {owner} must give one label per row ({n}). "
                f"Got shape {labels.shape} instead.")
        _, block_id = np.unique(labels, return_inverse=True)
        order = np.argsort(block_id, kind="stable")
        starts = np.r_[0, np.cumsum(np.bincount(block_id))]
        members = [order[starts[i]:starts[i + 1]] for i in range(starts.size - 1)]
        drawn = rng.integers(0, len(members), size=(n_resamples, len(members)))
        indices = [np.concatenate([members[j] for j in row]) for row in drawn]
    values = np.full(n_resamples, np.nan)
    if vectorized:
        values = np.asarray(statistic(*(a[indices] for a in arrays)), dtype=float)
        if values.shape != (n_resamples,):
            raise AnalogsInputError(
                f"The vectorized statistic given to {owner} must return {n_resamples} "
                f"values. Got shape {values.shape} instead.")
        indices = []
    for r, index in enumerate(indices):
        try:
            values[r] = statistic(*(a[index] for a in arrays))
        except AnalogsInputError:
            continue  # statistic undefined on this resample (e.g. one class only)
    valid = values[np.isfinite(values)]
    if valid.size < n_resamples / 2:
        raise AnalogsInputError(
            f"The statistic given to {owner} was undefined on {n_resamples - valid.size} of "
            f"{n_resamples} resamples; too few events for a bootstrap interval.")
    alpha = 1.0 - confidence
    low, high = np.quantile(valid, [alpha / 2, 1 - alpha / 2])
    return float(low), float(high)


def verification_summary(p, o, p_reference, *, threshold=0.5, n_bins=10) -> dict:
    """All scores of a set of probability forecasts, in the ``verify --json`` shape.

    Returns ``brier_score``, ``brier_skill_score``, ``roc_auc`` (NaN with one
    class only), ``reliability`` (:func:`reliability_table`), ``murphy``
    (:func:`murphy_decomposition`), ``contingency`` (table at ``threshold``)
    and ``scores`` (:func:`contingency_scores`), ``n_forecasts`` and
    ``base_rate``.
    """
    owner = "verification_summary"
    threshold = check_float(threshold, "threshold", owner, min_value=0.0, max_value=1.0)
    p, o = _forecasts(p, o, owner)
    table = contingency_table(p, o, threshold)
    both_classes = 0 < o.sum() < o.size
    return {
        "n_forecasts": int(p.size),
        "base_rate": float(o.mean()),
        "brier_score": brier_score(p, o),
        "brier_skill_score": brier_skill_score(p, o, p_reference),
        "roc_auc": roc_auc(p, o) if both_classes else float("nan"),
        "reliability": reliability_table(p, o, n_bins),
        "murphy": murphy_decomposition(p, o, n_bins),
        "threshold": threshold,
        "contingency": table,
        "scores": contingency_scores(**table),
    }
