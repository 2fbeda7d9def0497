"""Predictor weighting of the EOF space for one event: the analog search's metric.

The plain analog distance treats every principal component alike, whatever it says about
the event forecast (reports in a region). The analog ensemble's habit is to weight each
predictor by how much it matters for the quantity forecast (Delle Monache, Eckel, Rife,
Nagarajan & Searight 2013, Mon. Wea. Rev. 141, 3498-3516, "Probabilistic weather
prediction with an analog ensemble", where the weights are found by a search). Here the
weights come from one fit: a logistic regression (scikit-learn) of "at least one event"
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

import numpy as np
import pandas as pd

#: Weight of the regression's PC score as one more coordinate of the analog space
#: (measured: 1 and 10 score alike on the demo's box, 0 less well).
SCORE_WEIGHT = 10.0
#: Inverse regularisation strength of the regression (scikit-learn's C; its default).
REGRESSION_C = 1.0


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
    from sklearn.linear_model import LogisticRegression

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
    # work to a second thread costs more than it saves (measured, the 41 fits of a
    # 40-year build: 6.8 s wall, 4.6 s CPU on two threads, 1.9 s and 1.9 s on one, load
    # 3.8; the coefficients identical to the last bit).
    with one_blas_thread():
        model = LogisticRegression(C=C, max_iter=2000).fit(inputs, observed)
    beta = model.coef_[0, :n_modes]
    transform[:, :n_modes] = np.diag(np.abs(beta) / sd)
    transform[:, n_modes] = np.sqrt(score_weight) * beta / sd
    return transform


@functools.cache
def _blas_controller():
    """threadpoolctl's view of the loaded BLAS libraries, made once: building it
    inspects every loaded library (about 15 ms, a quarter of a fold's fit in a 40-year
    hindcast). Made after scikit-learn's regression is imported, so it holds the BLAS of
    numpy and scipy that the fit uses."""
    import sklearn.linear_model  # noqa: F401 (loads the libraries the limit must hold)
    from threadpoolctl import ThreadpoolController
    return ThreadpoolController()


@contextlib.contextmanager
def one_blas_thread():
    """Run the enclosed block with every BLAS library on one thread (threadpoolctl's
    ``threadpool_limits(1, user_api="blas")`` from a controller made once), then
    restore the previous counts."""
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
