"""Predictor weighting of the EOF space for one event: the analog search's metric.

The plain analog distance treats every principal component alike, whatever it says about
the event forecast (reports in a region). The analog ensemble's habit is to weight each
predictor by how much it matters for the quantity forecast (Delle Monache, Eckel, Rife,
Nagarajan & Searight 2013, Mon. Wea. Rev. 141, 3498-3516, "Probabilistic weather
prediction with an analog ensemble", where the weights are found by a search). Here the
weights come from one fit: a logistic regression (:func:`logistic_regression`, solved to
round-off by Newton's method) of "at least one event"
on the standardised PCs plus annual harmonics (the season is there so that the PC
coefficients are those within the season; the harmonics themselves are not part of the
distance, the season window already keeps analogs in season). PC j is scaled by
``|beta_j| / sd_j`` (the coefficient of the standardised PC), and one coordinate is
appended: the regression's PC score ``sum_j beta_j pc_j / sd_j`` times
``sqrt(SCORE_WEIGHT)``, so analogs agree first on what the PCs say about the event and
then on the pattern itself. The squared distance of two days ``x``, ``y`` is

    d^2 = sum_j (beta_j (x_j - y_j) / sd_j)^2 + SCORE_WEIGHT (sum_j beta_j (x_j - y_j) / sd_j)^2

a fixed quadratic metric, so the search is the plain Euclidean one on the transformed
vectors ``pcs @ transform`` (one faiss index over them).

Measured on the default ten-year demo (``tests/benchmarks/compare_analog_variants.py``,
leave-one-year-out folds, the weights fitted without the held-out year): see the
benchmark's output and DEVELOPERS.md.
"""

from __future__ import annotations

import contextlib
import functools
import warnings

import numpy as np
import pandas as pd

from analogs.errors import AnalogsInputError

#: Weight of the regression's PC score as one more coordinate of the analog space
#: (measured: 1 and 10 score alike on the demo's box, 0 less well).
SCORE_WEIGHT = 10.0
#: Inverse regularisation strength of the regression (scikit-learn's C; its default).
REGRESSION_C = 1.0


#: Newton steps of :func:`logistic_regression` at most (it takes about 8 from its start).
MAX_NEWTON_STEPS = 100
#: The last Newton step of :func:`logistic_regression`: one no larger than this (relative
#: to the largest coefficient, at least 1) is taken and ends the fit; Newton's quadratic
#: convergence leaves an error of about its square.
NEWTON_LAST_STEP = 1e-6
#: Armijo's fraction: a step is taken once it lowers the objective by at least this
#: share of the decrease its slope promises (Boyd & Vandenberghe's alpha; common
#: practice, no source for the value).
ARMIJO_FRACTION = 1e-4


def logistic_regression(inputs, observed, *, C=REGRESSION_C) -> tuple[np.ndarray, float]:
    r"""L2-penalised logistic regression of ``observed`` on ``inputs``, solved to
    round-off by Newton's method.

    Minimises scikit-learn's objective for ``LogisticRegression(penalty="l2", C=C)``
    (its user guide, "Logistic regression", mathematical formulation), the intercept
    :math:`b` not penalised:

    .. math:: C \sum_i \left[\log\left(1 + e^{\eta_i}\right) - y_i \eta_i\right]
              + \tfrac{1}{2} \lVert w \rVert^2, \qquad \eta_i = x_i \cdot w + b

    by Newton's method (iteratively reweighted least squares: Hastie, Tibshirani &
    Friedman 2009, The Elements of Statistical Learning, 2nd ed., section 4.4.1) with a
    backtracking line search on the objective (Armijo's rule; Boyd & Vandenberghe 2004,
    Convex Optimization, section 9.5; both from memory), from every coefficient zero and
    the intercept at the log-odds of the event's frequency. The objective is strictly
    convex, so the answer is its one minimum whatever the path: a property of the data
    and ``C``, not of a solver's tolerance or version. The gradient is taken in float64;
    the Hessian, which only steers the steps, in float32 (half the cost; the same
    minimum, tests/test_predictor_weights.py against scikit-learn's own Newton solver).

    Parameters
    ----------
    inputs : array (n, p) of predictors.
    observed : bool array (n,), the event; both outcomes must occur.
    C : inverse regularisation strength (> 0).

    Returns
    -------
    (coefficients (p,), intercept).
    """
    inputs = np.asarray(inputs, dtype=float)
    outcome = np.asarray(observed, dtype=float)
    n_days, n_inputs = inputs.shape
    if not np.isfinite(inputs).all():
        raise AnalogsInputError("logistic_regression needs finite inputs; got "
                                f"{int((~np.isfinite(inputs)).sum())} missing or infinite")
    frequency = outcome.mean() if n_days else 0.0
    if not 0.0 < frequency < 1.0:
        raise AnalogsInputError(
            "logistic_regression needs days with and without the event; got "
            f"{int(outcome.sum())} of {n_days} days with it")
    # The inputs and a column of ones (the intercept), one row per coefficient.
    design = np.empty((n_inputs + 1, n_days))
    design[:n_inputs] = inputs.T
    design[n_inputs] = 1.0
    design32 = design.astype(np.float32)
    penalised = np.ones(n_inputs + 1)
    penalised[n_inputs] = 0.0
    theta = np.zeros(n_inputs + 1)
    theta[n_inputs] = np.log(frequency / (1.0 - frequency))

    def objective(theta):
        """The objective at ``theta`` and each day's event probability there."""
        eta = theta @ design
        # log(1 + e^eta) = log1p(e^-|eta|) + max(eta, 0), without overflow
        small = np.exp(-np.abs(eta))
        loss = np.log1p(small)
        loss += np.maximum(eta, 0.0)
        loss -= outcome * eta
        probability = 1.0 / (1.0 + small)
        np.copyto(probability, small * probability, where=eta < 0)
        return C * loss.sum() + 0.5 * np.sum(penalised * theta * theta), probability

    value, probability = objective(theta)
    for _ in range(MAX_NEWTON_STEPS):
        gradient = C * (design @ (probability - outcome)) + penalised * theta
        scaled = design32 * np.sqrt(C * probability * (1.0 - probability)).astype(np.float32)
        hessian = (scaled @ scaled.T).astype(float)
        hessian[np.diag_indices(n_inputs + 1)] += penalised
        step = np.linalg.solve(hessian, gradient)
        if np.max(np.abs(step)) <= NEWTON_LAST_STEP * max(1.0, np.max(np.abs(theta))):
            theta = theta - step
            break
        decrease = gradient @ step  # the Newton decrement squared: > 0 (convex)
        length = 1.0
        while True:
            trial = theta - length * step
            trial_value, trial_probability = objective(trial)
            if trial_value <= value - ARMIJO_FRACTION * length * decrease or length < 1e-10:
                break
            length *= 0.5
        theta, value, probability = trial, trial_value, trial_probability
    else:
        warnings.warn(f"logistic_regression took {MAX_NEWTON_STEPS} Newton steps without "
                      "settling; its coefficients may be off the minimum", RuntimeWarning,
                      stacklevel=2)
    return theta[:n_inputs], float(theta[n_inputs])


def fit_predictor_weights(pcs, times, observed, *, score_weight=SCORE_WEIGHT,
                          C=REGRESSION_C, harmonics=None) -> np.ndarray:
    """The linear map of the PCs whose Euclidean distance is the event-weighted one.

    Parameters
    ----------
    pcs : array (n_days, n_modes) of principal components (the store's units).
    times : times of the days (for the annual harmonics of the regression).
    observed : bool array (n_days,), whether the event happened on each day.
    score_weight : weight of the regression's PC score as the extra coordinate.
    C : inverse regularisation strength of the logistic regression.
    harmonics : ``seasonal_harmonics(times)`` when the caller holds them already (the
        hindcast computes them once for every fold); computed from ``times`` otherwise.

    Returns
    -------
    array (n_modes, n_modes + 1): ``pcs @ transform`` are the vectors to search. The
    first ``n_modes`` columns are ``diag(|beta_j| / sd_j)``, the last is
    ``sqrt(score_weight) * beta_j / sd_j``. With no event, or an event every day (nothing
    to fit), the identity with a zero last column: the plain distance.
    """
    from analogs.stages.hindcast import seasonal_harmonics
    pcs = np.asarray(pcs, dtype=float)
    observed = np.asarray(observed, dtype=bool)
    n_modes = pcs.shape[1]
    transform = np.zeros((n_modes, n_modes + 1))
    if observed.all() or not observed.any():
        transform[:, :n_modes] = np.eye(n_modes)
        return transform
    sd = pcs.std(axis=0)
    sd = np.where(sd > 0, sd, 1.0)
    if harmonics is None:
        harmonics = seasonal_harmonics(pd.DatetimeIndex(times))
    inputs = np.column_stack([pcs / sd, harmonics])
    # One BLAS thread: the solver's products are of a (days x ~25) matrix, where handing
    # work to a second thread costs more than it saves (measured with the 41 fits of a
    # 40-year build, whose folds already run on two threads).
    with one_blas_thread():
        coefficients, _ = logistic_regression(inputs, observed, C=C)
    beta = coefficients[:n_modes]
    transform[:, :n_modes] = np.diag(np.abs(beta) / sd)
    transform[:, n_modes] = np.sqrt(score_weight) * beta / sd
    return transform


@functools.cache
def _blas_controller():
    """threadpoolctl's view of the BLAS libraries loaded when it is first asked for,
    made once: building it inspects every loaded library (about 15 ms, more than a
    fold's fit in a 40-year hindcast). numpy's BLAS, the only one the fits and the
    folds' products use, is always among them (scipy's, loaded later by another stage,
    may not be: nothing here calls it)."""
    from threadpoolctl import ThreadpoolController
    return ThreadpoolController()


@contextlib.contextmanager
def one_blas_thread():
    """Run the enclosed block with the BLAS libraries of :func:`_blas_controller` (numpy's
    always) on one thread, as threadpoolctl's ``threadpool_limits(1, user_api="blas")``
    does, then restore the previous counts."""
    with _blas_controller().limit(limits=1, user_api="blas"):
        yield


def pc_weights(transform) -> np.ndarray:
    """The weight of each PC in a transform of :func:`fit_predictor_weights`: the
    scale factor of its diagonal (``|beta_j| / sd_j``)."""
    transform = np.asarray(transform, dtype=float)
    return np.diag(transform[:, :transform.shape[0]]).copy()


def block_transform(transform, n_blocks) -> np.ndarray:
    """The map of vectors that hold ``n_blocks`` days' PCs side by side (a sequence
    match's ``[pc_t, 0.5 pc_{t-1}, 0.25 pc_{t-2}]``): the block-diagonal matrix with
    ``transform`` on its diagonal, so each day's PCs are mapped by the same
    ``transform`` and the squared distance is the sum of the days' weighted squared
    distances (each with its decay weight squared, as in the plain sequence match).

    Parameters
    ----------
    transform : array (n_modes, n_modes + 1) of :func:`fit_predictor_weights`.
    n_blocks : the number of days in each vector (1 + the sequence's preceding days).

    Returns
    -------
    array (n_blocks * n_modes, n_blocks * (n_modes + 1)).
    """
    return np.kron(np.eye(int(n_blocks)), np.asarray(transform, dtype=float))
