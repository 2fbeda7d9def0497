"""Multivariate EOF analysis of weighted, balanced anomaly fields.

Stages: preprocess (centre, area weights, per-field balancing, NaN mask, stacking)
-> solve (exact or randomized SVD) -> results (EOFs, eigenvalues, PCs).

The data matrix
---------------
For anomaly fields ``x_f(t, lat, lon)`` (one per field ``f``, same grid) the matrix
``M (time, space)`` fitted here has elements

.. math::

    M_{t,j} = \\left(x_f(t, j) - \\bar{x}_f(j)\\right)
              \\frac{\\sqrt{\\cos\\varphi_j}\\,\\sqrt{u_f}}{s_f},
    \\qquad s_f^2 = \\frac{1}{N-1} \\sum_t \\sum_{j \\in f}
              \\cos\\varphi_j \\left(x_f(t, j) - \\bar{x}_f(j)\\right)^2

where ``phi`` is latitude, ``sqrt(cos phi)`` the area weight that makes the
covariance matrix area weighted (Hannachi, Jolliffe & Stephenson 2007, Int. J.
Climatol. 27, 1119-1152), ``s_f`` the square root of the total weighted variance of
field ``f`` (so that every field has total variance ``u_f`` and height and
moisture contribute comparably), ``u_f`` the user weight from ``field_weights``
(default 1) and ``x̄_f`` the time mean of the training anomalies (zero up to
rounding for anomalies from :class:`analogs.stages.daily_climatology.HarmonicClimatology`; it is
removed so that eigenvalues are those of the covariance matrix). Grid points that
are missing (NaN) at any training time are left out of ``M`` and come back as NaN
in the patterns.

With the economy SVD ``M = U S V^T``:

* ``eofs_[f]`` (mode, lat, lon) are the rows of ``V^T`` (unit norm over all fields
  together), reshaped onto the grid: patterns in the weighted, scaled space, like
  ``eofs.standard.Eof.eofs(eofscaling=0)`` for one field;
* ``eigenvalues_ = S^2 / (N - 1)`` (eigenvalues of the covariance of ``M``);
* ``variance_fraction_`` = ``S_k^2 / ||M||_F^2``, the share of the total weighted,
  scaled variance with all modes counted in the total (computed from the data, so
  it is right for the randomized solver too);
* ``north_errors_ = eigenvalues_ * sqrt(2 / N)`` (North, Bell, Cahalan & Moeng 1982,
  Mon. Wea. Rev. 110, 699-706);
* ``pcs_ = U S`` (time, mode): unnormalised, so the Euclidean distance between two
  days' PC vectors is the distance between their anomalies in the weighted scaled
  space, projected on the kept modes.

Signs are fixed: in each mode the element of ``V^T`` with the largest absolute
value (over all fields) is positive; the PC gets the same flip.
"""

from __future__ import annotations

import datetime as _dt
import json
import mmap
import numbers
import os

import numpy as np
import xarray as xr

from analogs import __version__
from analogs._validation import check_int
from analogs.parameters import P
from analogs.errors import AnalogsInputError, NotFittedError
from analogs.stages.blockwise import (ColumnMoments, block_length, cache_steps, even_ranges,
                                      in_threads, numpy_blas_on_one_thread)
from analogs.stages.cf import coordinate_attrs

__all__ = ["MultivariateEOF", "area_weights"]

#: "auto" uses the exact SVD when min(n_time, n_space) is at most this. Measured here
#: (2 cores): a full LAPACK SVD of a 1461 x 5112 matrix took 28 s, the randomized one
#: of its 20 leading modes about 1 s with eigenvalues equal to 1e-14.
AUTO_EXACT_MAX_DIM = 500
#: Modes kept when neither n_modes nor variance is given (capped by the rank).
DEFAULT_N_MODES = P.n_modes.default

#: Smallest singular value of the kept EOFs restricted to a gappy row's available
#: points (1 with no gap, since the EOFs are orthonormal) below which
#: :meth:`MultivariateEOF.project_gappy` refuses the row: its PCs would be determined
#: mostly by noise amplified 1 / sigma times.
GAPPY_MIN_SINGULAR = 0.1

_OWNER = "MultivariateEOF"
_PARAMS = ("n_modes", "variance", "solver", "field_weights", "random_state",
           "n_oversamples", "n_power_iter")


def area_weights(lat) -> np.ndarray:
    """Square-root-cosine-latitude area weights, dimensionless.

    ``w = sqrt(cos(lat))`` with ``lat`` in degrees north, so that the weighted
    covariance is weighted by ``cos(lat)`` (Hannachi, Jolliffe & Stephenson 2007).
    Round-off below zero at the poles is clipped to 0.
    """
    return np.sqrt(np.clip(np.cos(np.deg2rad(np.asarray(lat, dtype=float))), 0.0, None))


def _is_dask(array) -> bool:
    return hasattr(array, "dask")


def _describe_axis(values: np.ndarray) -> str:
    return f"{values.size} points from {values.min():g} to {values.max():g}" if values.size else "0 points"


class MultivariateEOF:
    """Multivariate EOFs of one or more anomaly fields on one grid.

    Parameters
    ----------
    n_modes : int, optional
        Number of modes to keep (capped by the rank of the data matrix).
    variance : float in (0, 1], optional
        Keep the smallest number of modes whose cumulative ``variance_fraction_``
        reaches this target. Give at most one of ``n_modes`` and ``variance``;
        neither keeps 20 modes (capped by the rank).
    solver : {"auto", "exact", "randomized"}
        "exact": LAPACK economy SVD (the matrix is loaded into memory).
        "randomized": Halko et al. (2011) randomized SVD in float32, one
        algorithm for in-memory and dask-backed data (for dask, one pass over the
        chunks per product; the matrix is never materialised). "auto": exact when
        ``min(n_time, n_space) <= 500``, randomized otherwise. The choice made is
        in ``solver_``; a randomized request that would need nearly every mode uses
        the exact SVD.
    field_weights : dict of str to float, optional
        User weight ``u_f > 0`` per field after balancing (default 1 for each).
    random_state : int
        Seed of the randomized solver.
    n_oversamples, n_power_iter : int
        Oversampling and power iterations of the randomized solver. Two iterations
        are enough for the quickly decaying spectra of height and moisture anomalies
        (Halko et al. 2011, section 4.5): measured on 40 years at 1 degree, the
        leading 10 eigenvalues within 1e-7 of the full LAPACK SVD, the 20th within
        1e-6, every pattern correlated above 0.99999 with an 8-iteration solve.

    Attributes
    ----------
    fields_ : list of str
    n_modes_ : int
    solver_ : {"exact", "randomized"}
    eofs_ : xarray.Dataset, one ``(mode, lat, lon)`` variable per field
    eigenvalues_, variance_fraction_, north_errors_ : xarray.DataArray (mode)
    pcs_ : xarray.DataArray (time, mode)
    field_scales_ : xarray.DataArray (field), the divisor ``s_f`` in field units
    weights_ : xarray.DataArray (lat), ``sqrt(cos lat)``
    """

    def __init__(self, n_modes=None, *, variance=None, solver=P.solver.default, field_weights=None,
                 random_state=0, n_oversamples=20, n_power_iter=2):
        self.n_modes = n_modes
        self.variance = variance
        self.solver = solver
        self.field_weights = field_weights
        self.random_state = random_state
        self.n_oversamples = n_oversamples
        self.n_power_iter = n_power_iter

    def get_params(self) -> dict:
        """Constructor parameters (a copy)."""
        params = {name: getattr(self, name) for name in _PARAMS}
        params["field_weights"] = (None if self.field_weights is None
                                   else dict(self.field_weights))
        return params

    # -- validation ------------------------------------------------------------
    def _validate_params(self) -> None:
        if self.n_modes is not None and self.variance is not None:
            raise AnalogsInputError(
                "The 'n_modes' and 'variance' parameters of MultivariateEOF exclude each "
                f"other: give one of them. Got n_modes={self.n_modes!r} and "
                f"variance={self.variance!r} instead."
            )
        P.n_modes.check(self.n_modes, _OWNER)
        P.variance.check(self.variance, _OWNER)
        P.solver.check(self.solver, _OWNER)
        check_int(self.random_state, "random_state", _OWNER, min_value=0)
        check_int(self.n_oversamples, "n_oversamples", _OWNER, min_value=0)
        check_int(self.n_power_iter, "n_power_iter", _OWNER, min_value=0)
        if self.field_weights is not None and not isinstance(self.field_weights, dict):
            raise AnalogsInputError(
                "The 'field_weights' parameter of MultivariateEOF must be a dict of "
                f"field name to weight > 0. Got {self.field_weights!r} instead."
            )
        for name, weight in (self.field_weights or {}).items():
            if (isinstance(weight, bool) or not isinstance(weight, numbers.Real)
                    or not weight > 0 or not np.isfinite(weight)):
                raise AnalogsInputError(
                    "The 'field_weights' parameter of MultivariateEOF must map each field "
                    f"to a number > 0. Got {name!r}: {weight!r} instead."
                )

    @staticmethod
    def _fields_of(ds: xr.Dataset) -> list[str]:
        if not isinstance(ds, xr.Dataset):
            raise AnalogsInputError(
                "MultivariateEOF expects an xarray.Dataset of anomaly fields with dims "
                f"(time, lat, lon). Got {type(ds).__name__} instead."
            )
        fields = [str(n) for n, v in ds.data_vars.items() if {"lat", "lon"} <= set(v.dims)]
        if not fields:
            raise AnalogsInputError(
                "The anomalies given to MultivariateEOF have no variable with dims "
                f"(time, lat, lon) (variables: {list(ds.data_vars)})."
            )
        return fields

    # -- preprocessing -----------------------------------------------------------
    @staticmethod
    def _flat(var: xr.DataArray):
        """(time, lat*lon) raw array, numpy or dask (dask chunked along time only)."""
        var = var.transpose("time", "lat", "lon")
        data = var.data
        n_time = data.shape[0]
        if _is_dask(data):
            data = data.rechunk({1: -1, 2: -1})
        return data.reshape(n_time, -1)

    def _scaled_blocks(self, ds: xr.Dataset, dtype=np.float64):
        """Per field, the (time, valid space) block of M in ``dtype``, numpy or dask."""
        blocks = []
        for field in self.fields_:
            raw = self._flat(ds[field])
            valid = self._valid[field]
            if not valid.all():
                raw = raw[:, valid]
            mean = self._means[field][valid].astype(dtype)
            factor = self._point_factor[field][valid].astype(dtype)
            blocks.append((raw.astype(dtype, copy=False) - mean) * factor)
        return blocks

    def _column_blocks(self, ds: xr.Dataset, dtype, *, overwrite: bool, copies=None,
                       scratch=None) -> tuple[list, np.ndarray]:
        """Per field, the in-memory (time, valid space) block of M in ``dtype``, made a
        cache-sized step of rows at a time (no full-size temporaries), the rows split
        over threads; with ``overwrite``, a field that is a writeable C-ordered array of
        ``dtype`` with no missing point is scaled in place and its block is a view of
        the caller's data. ``copies`` (field -> array) replace the fields of ``ds``; new
        blocks come from ``scratch`` when given. Also returns the squared norm of each
        row of M, taken from each step while it is in cache (:func:`_row_energy`)."""
        blocks, row_energy = [], 0
        for field in self.fields_:
            raw = (copies or {}).get(field)
            raw = self._flat(ds[field]) if raw is None else raw
            valid = self._valid[field]
            mean = self._means[field][valid].astype(dtype)
            factor = self._point_factor[field][valid].astype(dtype)
            in_place = (overwrite and valid.all() and raw.dtype == dtype
                        and raw.flags.writeable and raw.flags.c_contiguous)
            shape = (raw.shape[0], int(valid.sum()))
            block = raw if in_place else (np.empty(shape, dtype) if scratch is None
                                          else scratch(shape, dtype))
            energy = np.empty(shape[0])

            def scale(rows: slice) -> None:
                for start, stop, _, _ in cache_steps(rows.stop - rows.start, raw.shape[1]):
                    steps = slice(rows.start + start, rows.start + stop)
                    part = raw[steps] if valid.all() else raw[steps][:, valid]
                    if in_place:
                        part -= mean
                        part *= factor
                    else:
                        np.multiply(part.astype(dtype, copy=False) - mean, factor,
                                    out=block[steps])
                    energy[steps] = _row_energy(block[steps])

            in_threads(scale, even_ranges(shape[0]))
            _release_pages(block)
            blocks.append(block)
            row_energy = row_energy + energy
        return blocks, row_energy

    def _matrix(self, ds: xr.Dataset, dtype=np.float64):
        blocks = self._scaled_blocks(ds, dtype)
        if any(_is_dask(b) for b in blocks):
            import dask.array as da

            return da.concatenate([da.asarray(b) for b in blocks], axis=1).rechunk({1: -1})
        return np.concatenate(blocks, axis=1)

    def _preprocess(self, ds: xr.Dataset, scratch=None) -> dict:
        """Learn means, NaN masks, area weights and field scales (one data pass).

        With ``scratch`` (see :meth:`fit`), each dask field is written once into a
        float32 array from ``scratch`` in that pass, and its moments are taken from
        that copy; returns the copies by field (empty without ``scratch``)."""
        self.fields_ = self._fields_of(ds)
        for field in self.fields_:
            if "time" not in ds[field].dims:
                raise AnalogsInputError(
                    f"Field {field!r} given to MultivariateEOF.fit has no 'time' dimension; "
                    "expected (time, lat, lon) anomalies."
                )
        unknown = sorted(set(self.field_weights or {}) - set(self.fields_))
        if unknown:
            raise AnalogsInputError(
                f"The 'field_weights' parameter of MultivariateEOF names {unknown[0]!r}, "
                f"which is not among the fields {self.fields_}."
            )
        self.lat_ = np.asarray(ds["lat"].values, dtype=float)
        self.lon_ = np.asarray(ds["lon"].values, dtype=float)
        self.time_ = ds["time"].values.copy()
        self.n_time_ = int(ds.sizes["time"])
        if self.n_time_ < 2:
            raise AnalogsInputError(
                f"MultivariateEOF.fit needs at least 2 times; got {self.n_time_}."
            )
        lat_weight = area_weights(self.lat_)
        point_weight = np.repeat(lat_weight, self.lon_.size)
        self._field_attrs = {f: dict(ds[f].attrs) for f in self.fields_}

        # One pass over the data: per point the NaN count, and the sum and sum of
        # squares of the values shifted by the first time's (shifted data keep
        # sum (x - mean)^2 = sum (x - x0)^2 - N (mean - x0)^2 free of cancellation).
        # Each chunk goes through one task that returns its three small sums, so a
        # chunk is read, reduced and freed before the next; one field at a time
        # (measured: computed together, the two fields' anomaly chunks were all held
        # at once, 4.6 GB at 40 years x 0.25 degree).
        moments, origins, copies = {}, {}, {}
        for field in self.fields_:
            raw = self._flat(ds[field])
            if scratch is not None and _is_dask(raw):
                copies[field] = scratch(raw.shape, np.float32)
                _store_by_chunks(raw.astype(np.float32), copies[field])
                raw = copies[field]
            origins[field] = _computed(raw[0]).astype(np.float64)
            moments[field] = _computed(_column_moments(raw, origins[field]))
            _release_pages(raw)
        self._valid = {f: moments[f][0] == 0 for f in self.fields_}
        shifted_means = {f: moments[f][1] / self.n_time_ for f in self.fields_}
        squares = {f: moments[f][2] for f in self.fields_}
        self._means = {f: np.where(self._valid[f], origins[f] + shifted_means[f], np.nan)
                       for f in self.fields_}

        sums = {}
        for field in self.fields_:
            valid = self._valid[field]
            if not valid.any():
                raise AnalogsInputError(
                    f"Field {field!r} given to MultivariateEOF.fit is missing (NaN) at every grid point."
                )
            centred_squares = np.maximum(
                squares[field][valid] - self.n_time_ * shifted_means[field][valid] ** 2, 0.0)
            sums[field] = float(np.sum(point_weight[valid] ** 2 * centred_squares))
        user = {f: float((self.field_weights or {}).get(f, 1.0)) for f in self.fields_}
        scales = {}
        for field in self.fields_:
            scale = float(np.sqrt(sums[field] / (self.n_time_ - 1)))
            if not scale > 0:
                raise AnalogsInputError(
                    f"Field {field!r} given to MultivariateEOF.fit has zero weighted variance; "
                    "it cannot be balanced against the other fields."
                )
            scales[field] = scale
        self._scales = scales
        self._user_weights = user
        self._lat_weight = lat_weight
        self._point_factor = {f: point_weight * np.sqrt(user[f]) / scales[f] for f in self.fields_}
        # Frobenius norm^2 of M: each field contributes (N - 1) * u_f by construction.
        self.total_variance_ = float(sum(user.values()))
        return copies

    # -- solving ---------------------------------------------------------------
    def fit(self, anomalies: xr.Dataset, *, overwrite: bool = False,
            scratch=None) -> "MultivariateEOF":
        """Fit the EOFs of ``anomalies`` (Dataset of fields with dims (time, lat, lon)).

        ``overwrite=True`` lets the randomized solver scale in-memory float32 fields in
        place (like scikit-learn's ``copy=False``): ``anomalies`` hold the weighted,
        scaled matrix afterwards and must not be used again. It saves one copy of the
        data matrix; the results are the same.

        ``scratch``, a callable ``(shape, dtype) -> writeable array`` (the caller's
        memory-mapped scratch file, say), is for dask (out-of-core) anomalies: each
        field is computed once, chunk by chunk, into such an array, and the moments,
        the scaling (in place) and the randomized solver work on those copies instead
        of recomputing the anomalies from the archive for each of the solver's
        passes. The results are those of the in-memory fit.
        """
        self._validate_params()
        copies = self._preprocess(anomalies, scratch)
        n_time = self.n_time_
        n_space = int(sum(self._valid[f].sum() for f in self.fields_))
        rank = min(n_time, n_space)
        wanted = (self.n_modes if self.n_modes is not None
                  else None if self.variance is not None else DEFAULT_N_MODES)
        solver = self.solver
        if solver == "auto":
            solver = "exact" if rank <= AUTO_EXACT_MAX_DIM else "randomized"
        if solver == "randomized" and min(wanted or DEFAULT_N_MODES, rank) + self.n_oversamples >= rank:
            solver = "exact"
        total_ss = self.total_variance_ * (n_time - 1)
        # The randomized solver works in float32, the precision of the faiss index the
        # PCs feed: half the memory and twice the BLAS speed of float64, with
        # eigenvalues equal to the float64 ones to about 1e-6.
        if solver == "randomized" and (copies or not any(_is_dask(anomalies[f].data)
                                                        for f in self.fields_)):
            # In memory or in scratch copies: per-field column blocks, made without
            # temporaries (or in place).
            matrix, row_energy = self._column_blocks(
                anomalies, np.float32, overwrite=overwrite or bool(copies), copies=copies,
                scratch=scratch)
        else:
            matrix = self._matrix(anomalies, np.float32 if solver == "randomized" else np.float64)
            row_energy = None

        if solver == "randomized":
            k = min(wanted if wanted is not None else DEFAULT_N_MODES, rank)
            while True:
                if k + self.n_oversamples >= rank:
                    solver = "exact"
                    # Overwritten anomalies already hold M (in float32).
                    matrix = (np.concatenate(matrix, axis=1).astype(np.float64)
                              if (overwrite or copies) and isinstance(matrix, list)
                              else self._matrix(anomalies))
                    break
                u, s, vt, row_energy = self._randomized_svd(matrix, k, row_energy)
                fractions = s ** 2 / total_ss
                if wanted is not None or np.cumsum(fractions)[-1] >= self.variance:
                    break
                k = min(2 * k, rank)
        if solver == "exact":
            import scipy.linalg  # imported here: loading a store for queries never solves

            dense = np.asarray(matrix.compute() if _is_dask(matrix) else matrix)
            row_energy = _row_energy(dense)
            try:
                u, s, vt = scipy.linalg.svd(dense, full_matrices=False)
            except np.linalg.LinAlgError:
                u, s, vt = scipy.linalg.svd(dense, full_matrices=False, lapack_driver="gesvd")
            fractions = s ** 2 / total_ss
        if wanted is None:
            # tolerance: a target of exactly 1.0 is met by all modes despite round-off
            reached = np.cumsum(fractions) >= self.variance - 1e-12
            k = int(np.argmax(reached)) + 1 if reached.any() else s.size
        else:
            k = min(wanted, s.size)
        u, s, vt = u[:, :k].astype(np.float64), s[:k].astype(np.float64), vt[:k].astype(np.float64)
        # Deterministic signs: largest-|loading| element of each pattern positive.
        flip = np.sign(vt[np.arange(k), np.argmax(np.abs(vt), axis=1)])
        flip[flip == 0] = 1.0
        self._components = vt * flip[:, None]
        self._singular_values = s.copy()
        self._pcs = u * (s * flip)[None, :]
        # ||r||^2 = ||m||^2 - ||m V||^2 for orthonormal V: the training residuals
        # without a second pass over the data.
        self._training_residual = np.maximum(row_energy - (self._pcs ** 2).sum(axis=1), 0.0)
        self.n_modes_ = int(k)
        self.solver_ = solver
        return self

    def _randomized_svd(self, matrix, k: int, row_energy=None):
        """(U, S, V^T, squared norm of each row of ``matrix``)."""
        return _randomized_svd(matrix, k, n_oversamples=self.n_oversamples,
                               n_power_iter=self.n_power_iter, seed=self.random_state,
                               row_energy=row_energy)

    def _check_fitted(self) -> None:
        if not hasattr(self, "_components"):
            raise NotFittedError("This MultivariateEOF is not fitted yet; call fit(anomalies) first.")

    # -- learned results (copies) ---------------------------------------------------
    def _mode_coord(self, n: int | None = None) -> np.ndarray:
        return np.arange(1, (self.n_modes_ if n is None else n) + 1)

    def _spatial(self, field: str, values: np.ndarray) -> np.ndarray:
        """(m, valid points) -> (m, lat, lon) with NaN where the field is missing."""
        full = np.full((values.shape[0], self.lat_.size * self.lon_.size), np.nan)
        full[:, self._valid[field]] = values
        return full.reshape(values.shape[0], self.lat_.size, self.lon_.size)

    def _split(self, matrix: np.ndarray) -> dict:
        out, start = {}, 0
        for field in self.fields_:
            stop = start + int(self._valid[field].sum())
            out[field] = matrix[..., start:stop]
            start = stop
        return out

    @property
    def eofs_(self) -> xr.Dataset:
        self._check_fitted()
        coords = {"mode": self._mode_coord(), "lat": self.lat_.copy(), "lon": self.lon_.copy()}
        data = {}
        for field, block in self._split(self._components).items():
            data[field] = xr.DataArray(
                self._spatial(field, block), dims=("mode", "lat", "lon"), coords=coords,
                attrs={"units": "1", "long_name": f"EOF pattern of {field} (weighted, scaled space)"})
        return xr.Dataset(data)

    @property
    def eigenvalues_(self) -> xr.DataArray:
        self._check_fitted()
        return xr.DataArray(self._singular_values ** 2 / (self.n_time_ - 1), dims="mode",
                            coords={"mode": self._mode_coord()},
                            attrs={"units": "1", "long_name": "eigenvalue of the weighted scaled covariance"})

    @property
    def variance_fraction_(self) -> xr.DataArray:
        self._check_fitted()
        fraction = self._singular_values ** 2 / (self.total_variance_ * (self.n_time_ - 1))
        return xr.DataArray(fraction, dims="mode", coords={"mode": self._mode_coord()},
                            attrs={"units": "1", "long_name": "fraction of total weighted variance"})

    @property
    def north_errors_(self) -> xr.DataArray:
        self._check_fitted()
        errors = self.eigenvalues_ * np.sqrt(2.0 / self.n_time_)
        errors.attrs = {"units": "1", "long_name": "North et al. (1982) eigenvalue sampling error"}
        return errors

    @property
    def pcs_(self) -> xr.DataArray:
        self._check_fitted()
        if getattr(self, "_pcs", None) is None:
            raise NotFittedError(
                "This MultivariateEOF was loaded from a dataset without the training PCs; "
                "use transform(anomalies) to compute them."
            )
        return self._pcs_array(self._pcs.copy(), self.time_.copy())

    def _pcs_array(self, values, time) -> xr.DataArray:
        return xr.DataArray(values, dims=("time", "mode"),
                            coords={"time": time, "mode": self._mode_coord()},
                            attrs={"units": "1", "long_name": "principal component (unnormalised)"})

    @property
    def field_scales_(self) -> xr.DataArray:
        self._check_fitted()
        return xr.DataArray([self._scales[f] for f in self.fields_], dims="field",
                            coords={"field": list(self.fields_)},
                            attrs={"long_name": "sqrt of total weighted variance per field "
                                                "(in each field's own units)"})

    @property
    def weights_(self) -> xr.DataArray:
        self._check_fitted()
        return xr.DataArray(self._lat_weight.copy(), dims="lat", coords={"lat": self.lat_.copy()},
                            attrs={"units": "1", "long_name": "area weight sqrt(cos(lat))"})

    # -- using the fit -----------------------------------------------------------
    def _checked(self, anomalies: xr.Dataset, owner: str) -> tuple[xr.Dataset, bool]:
        """Check fields and grid; give a single time a length-1 time dim."""
        self._check_fitted()
        if not isinstance(anomalies, xr.Dataset):
            raise AnalogsInputError(
                f"MultivariateEOF.{owner} expects an xarray.Dataset of anomaly fields. "
                f"Got {type(anomalies).__name__} instead."
            )
        for field in self.fields_:
            if field not in anomalies.data_vars:
                raise AnalogsInputError(
                    f"Field {field!r} is missing from the anomalies given to "
                    f"MultivariateEOF.{owner}; the EOFs were fitted on {self.fields_}."
                )
            var = anomalies[field]
            for dim, expected in (("lat", self.lat_), ("lon", self.lon_)):
                got = np.asarray(var[dim].values, dtype=float) if dim in var.dims else np.array([])
                if got.shape != expected.shape or not np.allclose(got, expected, atol=1e-6):
                    raise AnalogsInputError(
                        f"The {dim} grid of field {field!r} ({_describe_axis(got)}) does not match "
                        f"the EOF grid ({_describe_axis(expected)}); regrid it to the store grid first."
                    )
        squeeze = "time" not in anomalies[self.fields_[0]].dims
        if squeeze:
            anomalies = anomalies[self.fields_].expand_dims("time")
            if "time" not in anomalies.coords:
                anomalies = anomalies.assign_coords(time=[np.datetime64("NaT", "ns")])
        return anomalies, squeeze

    def _check_coverage(self, matrix) -> None:
        if _is_dask(matrix):
            return
        for field, block in self._split(matrix).items():
            missing = int(np.isnan(block).sum())
            if missing:
                raise AnalogsInputError(
                    f"Field {field!r} has {missing} missing values at grid points the EOFs use; "
                    "the field must cover the whole domain of the store."
                )

    def transform(self, anomalies: xr.Dataset, *, gappy: bool = False) -> xr.DataArray:
        """Project anomalies on the EOFs: PCs ``(time, mode)`` (``(mode,)`` for one time).

        The fields must be on the fitted grid (regrid first). Dask inputs give a
        lazy result. With ``gappy=True`` a time may miss (NaN) some of the grid points
        the EOFs use: its PCs are then the least-squares fit of the kept EOFs to the
        points it has (:meth:`project_gappy`); complete times give the same PCs as the
        plain projection.
        """
        anomalies, squeeze = self._checked(anomalies, "transform")
        matrix = self._matrix(anomalies)
        if gappy:
            values = self.project_gappy(_computed(matrix))
        else:
            self._check_coverage(matrix)
            values = matrix @ self._components.T
        pcs = self._pcs_array(values, anomalies["time"].values)
        return pcs.isel(time=0, drop=True) if squeeze else pcs

    def project_gappy(self, matrix: np.ndarray) -> np.ndarray:
        """PCs ``(time, mode)`` of rows of the weighted, scaled matrix ``M`` (the columns
        the EOFs use, NaN where a row misses a point), by least squares over each row's
        available points (Everson & Sirovich 1995, J. Opt. Soc. Am. A 12, 1657-1664).

        For a row ``m`` with available points ``A`` the PCs ``c`` minimise

        .. math:: \\sum_{j \\in A} \\left(m_j - \\sum_k c_k v_{kj}\\right)^2,

        i.e. ``c = argmin ||V_A^T c - m_A||`` with ``V`` the kept EOFs (rows of ``V^T``):
        the area-weighted least-squares fit of the patterns to the covered points. With
        every point available ``V_A V_A^T = I`` and ``c = V m``, the plain projection.
        Rows sharing one pattern of gaps are solved together. A row with fewer available
        points than kept modes, or whose available points leave the modes nearly
        degenerate (smallest singular value of ``V_A`` below ``GAPPY_MIN_SINGULAR``),
        is refused: the fit would not determine its PCs.
        """
        self._check_fitted()
        matrix = np.atleast_2d(np.asarray(matrix, dtype=float))
        components = self._components
        if matrix.shape[1] != components.shape[1]:
            raise AnalogsInputError(
                f"MultivariateEOF.project_gappy expects rows of {components.shape[1]} values "
                f"(the points the EOFs use). Got {matrix.shape[1]} instead.")
        missing = np.isnan(matrix)
        out = np.empty((matrix.shape[0], components.shape[0]))
        patterns, inverse = np.unique(missing, axis=0, return_inverse=True)
        for number, pattern in enumerate(patterns):
            rows = np.flatnonzero(np.ravel(inverse) == number)
            kept = ~pattern
            if kept.all():
                out[rows] = matrix[rows] @ components.T
                continue
            basis = components[:, kept].T  # (available points, modes)
            if basis.shape[0] < basis.shape[1]:
                raise AnalogsInputError(
                    f"MultivariateEOF.project_gappy: only {basis.shape[0]} of "
                    f"{kept.size} points available, fewer than the {basis.shape[1]} modes.")
            smallest = np.linalg.svd(basis, compute_uv=False)[-1]
            if smallest < GAPPY_MIN_SINGULAR:
                raise AnalogsInputError(
                    f"MultivariateEOF.project_gappy: the {int(kept.sum())} available of "
                    f"{kept.size} points do not determine the {basis.shape[1]} modes "
                    f"(smallest singular value {smallest:.2g}); the gaps are too large.")
            coefficients, *_ = np.linalg.lstsq(basis, matrix[rows][:, kept].T, rcond=None)
            out[rows] = coefficients.T
        return out

    def fit_transform(self, anomalies: xr.Dataset) -> xr.DataArray:
        """``fit(anomalies)`` and the training PCs ``pcs_``."""
        return self.fit(anomalies).pcs_

    def reconstruct(self, pcs: xr.DataArray) -> xr.Dataset:
        """Anomaly fields from PCs ``(time, mode)`` or ``(mode,)``, in field units.

        Undoes the scaling, weights and centring. Grid points left out of the fit and
        points of zero area weight (the poles) come back as NaN. Modes are matched
        by the ``mode`` coordinate when present.
        """
        self._check_fitted()
        pcs = xr.DataArray(pcs) if not isinstance(pcs, xr.DataArray) else pcs
        if "mode" not in pcs.dims:
            raise AnalogsInputError(
                "MultivariateEOF.reconstruct expects PCs with a 'mode' dimension; "
                f"got dims {pcs.dims}."
            )
        squeeze = pcs.ndim == 1
        if squeeze:
            pcs = pcs.expand_dims("time")
        pcs = pcs.transpose("time", "mode")
        modes = pcs["mode"].values if "mode" in pcs.coords else self._mode_coord(pcs.sizes["mode"])
        if modes.min() < 1 or modes.max() > self.n_modes_:
            raise AnalogsInputError(
                f"MultivariateEOF.reconstruct got modes {modes.min()}..{modes.max()}; the fit "
                f"kept modes 1..{self.n_modes_}."
            )
        scaled = np.asarray(pcs.values) @ self._components[np.asarray(modes) - 1]
        time = pcs["time"].values if "time" in pcs.coords else np.arange(pcs.sizes["time"])
        out = {}
        for field, block in self._split(scaled).items():
            factor = self._point_factor[field][self._valid[field]]
            with np.errstate(divide="ignore", invalid="ignore"):
                values = np.where(factor > 0, block / factor, np.nan)
            values = values + self._means[field][self._valid[field]]
            attrs = dict(self._field_attrs.get(field, {}))
            out[field] = xr.DataArray(self._spatial(field, values), dims=("time", "lat", "lon"),
                                      coords={"time": time, "lat": self.lat_, "lon": self.lon_},
                                      attrs=attrs)
        result = xr.Dataset(out)
        return result.isel(time=0, drop=True) if squeeze else result

    def reconstruction_error(self, anomalies: xr.Dataset) -> xr.DataArray:
        """Weighted RMS of the part of ``anomalies`` the kept modes miss, per time.

        With ``r = m - m V V^T`` the residual of the scaled row ``m`` of each time,

        .. math:: e = \\sqrt{\\sum_j r_j^2 \\,/\\, \\sum_j w_j^2 u_{f(j)}}

        i.e. the area-weighted RMS of the residual with each field in units of its
        scale ``s_f`` (dimensionless). Useful to spot fields unlike the archive.
        """
        anomalies, squeeze = self._checked(anomalies, "reconstruction_error")
        matrix = self._matrix(anomalies)
        self._check_coverage(matrix)
        residual = matrix - (matrix @ self._components.T) @ self._components
        error = self._error_array((residual ** 2).sum(axis=1), anomalies["time"].values)
        return error.isel(time=0, drop=True) if squeeze else error

    @property
    def training_error_(self) -> xr.DataArray:
        """:meth:`reconstruction_error` of every training time, kept from the fit (the
        data are not read again)."""
        self._check_fitted()
        if getattr(self, "_training_residual", None) is None:
            raise NotFittedError(
                "This MultivariateEOF was loaded from a dataset without the training "
                "residuals; use reconstruction_error(anomalies) to compute them."
            )
        return self._error_array(self._training_residual, self.time_.copy())

    def _error_array(self, residual_energy, time) -> xr.DataArray:
        norm = sum(float(np.sum((self._lat_weight.repeat(self.lon_.size)[self._valid[f]] ** 2)
                                * self._user_weights[f])) for f in self.fields_)
        return xr.DataArray(np.sqrt(residual_energy / norm), dims="time", coords={"time": time},
                            attrs={"units": "1", "long_name": "weighted RMS reconstruction error "
                                                              "(in units of the field scales)"})

    # -- persistence -----------------------------------------------------------
    def to_dataset(self) -> xr.Dataset:
        """Parameters (attrs) and learned arrays as a NetCDF-ready Dataset.

        Variables: ``eof_<field> (mode, lat, lon)``, ``mean_<field> (lat, lon)``,
        ``eigenvalues``, ``variance_fraction``, ``north_errors`` (mode),
        ``field_scales``, ``field_weights`` (field), ``weights`` (lat). Attrs:
        ``params`` (JSON of the constructor parameters), ``n_modes_fitted``,
        ``solver_used``, ``n_time``, ``analogs_version``, ``created``. The training PCs
        are not included (the store keeps them in scores.nc).
        """
        self._check_fitted()
        eofs = self.eofs_
        data = {f"eof_{f}": eofs[f] for f in self.fields_}
        for field in self.fields_:
            mean = self._means[field].reshape(self.lat_.size, self.lon_.size)
            data[f"mean_{field}"] = xr.DataArray(
                mean, dims=("lat", "lon"),
                attrs={**{k: v for k, v in self._field_attrs[field].items()
                          if k in ("units", "long_name")}})
            data[f"eof_{field}"].attrs.update(
                {f"field_{k}": str(v) for k, v in self._field_attrs[field].items()
                 if k in ("units", "long_name", "standard_name")})
        data["eigenvalues"] = self.eigenvalues_
        data["variance_fraction"] = self.variance_fraction_
        data["north_errors"] = self.north_errors_
        data["field_scales"] = self.field_scales_
        data["field_weights"] = xr.DataArray([self._user_weights[f] for f in self.fields_],
                                             dims="field", coords={"field": list(self.fields_)},
                                             attrs={"units": "1", "long_name": "user field weight"})
        data["weights"] = self.weights_
        ds = xr.Dataset(data, coords={"lat": self.lat_, "lon": self.lon_})
        ds["lat"].attrs = coordinate_attrs("lat", "units", "standard_name")
        ds["lon"].attrs = coordinate_attrs("lon", "units", "standard_name")
        ds.attrs = {
            "params": json.dumps(self.get_params(), sort_keys=True),
            "n_modes_fitted": int(self.n_modes_),
            "solver_used": self.solver_,
            "n_time": int(self.n_time_),
            "analogs_version": __version__,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        }
        return ds

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "MultivariateEOF":
        """Rebuild a fitted model (without training PCs) from :meth:`to_dataset` output."""
        try:
            params = json.loads(ds.attrs["params"])
            model = cls(**params)
            fields = [str(f) for f in ds["field"].values]
            model.n_modes_ = int(ds.attrs["n_modes_fitted"])
            model.solver_ = str(ds.attrs["solver_used"])
            model.n_time_ = int(ds.attrs["n_time"])
            eofs = {f: ds[f"eof_{f}"].transpose("mode", "lat", "lon").values for f in fields}
            means = {f: ds[f"mean_{f}"].transpose("lat", "lon").values.ravel() for f in fields}
            scales = ds["field_scales"].values
            user = ds["field_weights"].values
            eigenvalues = ds["eigenvalues"].values
        except (KeyError, TypeError, ValueError) as exc:
            raise AnalogsInputError(
                f"The EOF dataset is incomplete or malformed ({exc}); expected the output of "
                "MultivariateEOF.to_dataset()."
            ) from None
        model.fields_ = fields
        model.lat_ = np.asarray(ds["lat"].values, dtype=float)
        model.lon_ = np.asarray(ds["lon"].values, dtype=float)
        model.time_ = None
        model._pcs = None
        model._training_residual = None
        model._field_attrs = {
            f: {k[len("field_"):]: v for k, v in ds[f"eof_{f}"].attrs.items() if k.startswith("field_")}
            for f in fields}
        model._lat_weight = area_weights(model.lat_)
        point_weight = np.repeat(model._lat_weight, model.lon_.size)
        model._scales = {f: float(s) for f, s in zip(fields, scales)}
        model._user_weights = {f: float(u) for f, u in zip(fields, user)}
        model._valid = {f: np.isfinite(means[f]) for f in fields}
        model._means = means
        model._point_factor = {f: point_weight * np.sqrt(model._user_weights[f]) / model._scales[f]
                               for f in fields}
        model.total_variance_ = float(sum(model._user_weights.values()))
        model._components = np.concatenate(
            [eofs[f].reshape(model.n_modes_, -1)[:, model._valid[f]] for f in fields], axis=1)
        model._singular_values = np.sqrt(eigenvalues * (model.n_time_ - 1))
        return model


def _randomized_svd(matrix, k: int, *, n_oversamples: int, n_power_iter: int, seed: int,
                    row_energy=None):
    """Randomized SVD of a numpy or dask matrix, or of a list of in-memory column
    blocks ``[M_1 | M_2 | ...]`` (products taken block by block, never concatenated);
    with dask, one pass over the data per product.

    Halko, Martinsson & Tropp (2011, SIAM Review 53, 217-288), algorithms 4.4 (range
    finder with ``n_power_iter`` power iterations, re-orthonormalised by QR at each
    step) and 5.1 (SVD of the small projected matrix). The same algorithm and random
    draws for both backends, so in-memory and out-of-core fits agree to round-off.
    With dask, each product with the data matrix is its own ``dask.compute``, so its
    chunks are read, used and freed: peak memory is a few chunks plus the thin
    (n, k + p) factors, whatever the archive size. (``dask.array.linalg.svd_compressed``
    builds every pass into one graph, in which the scheduler keeps the data chunks
    alive for the later passes: the whole matrix ends up in memory.) Also returns the
    squared norm of every row, taken in the first pass unless given as ``row_energy``.

    The thin QR factorisations run on one BLAS thread (:func:`numpy_blas_on_one_thread`:
    the same bits, and no waits between threads when the machine is busy); the
    products with the data matrix keep every thread.
    """
    if isinstance(matrix, list):  # in-memory column blocks [M_1 | M_2 | ...]
        n_time, n_space = matrix[0].shape[0], sum(block.shape[1] for block in matrix)
        dtype = matrix[0].dtype
    else:
        n_time, n_space = matrix.shape
        dtype = matrix.dtype
    width = min(k + n_oversamples, n_time, n_space)
    omega = np.random.default_rng(seed).standard_normal((n_space, width)).astype(dtype)
    if isinstance(matrix, list):
        edges = np.cumsum([0] + [block.shape[1] for block in matrix])

        def times_matrix(right):
            right = right.astype(dtype)
            return sum(_released(block, block @ right[lo:hi])
                       for block, lo, hi in zip(matrix, edges[:-1], edges[1:]))

        def matrix_transposed_times(left):
            left = left.astype(dtype)
            return np.concatenate([_released(block, block.T @ left) for block in matrix])

        sample = times_matrix(omega)
        if row_energy is None:
            row_energy = sum(_released(block, _row_energy(block)) for block in matrix)
    elif _is_dask(matrix):
        import dask
        import dask.array as da

        row_chunks, column_chunks = matrix.chunks

        def times_matrix(right):
            right = da.from_array(right.astype(dtype), chunks=(column_chunks, width))
            return np.asarray(dask.compute(matrix @ right)[0])

        def matrix_transposed_times(left):
            product = matrix.T @ da.from_array(left.astype(dtype), chunks=(row_chunks, width))
            return np.asarray(dask.compute(product)[0])

        sample, row_energy = dask.compute(
            matrix @ da.from_array(omega, chunks=(column_chunks, width)),
            (matrix.astype(np.float64) ** 2).sum(axis=1))
        sample, row_energy = np.asarray(sample), np.asarray(row_energy)
    else:
        def times_matrix(right):
            return matrix @ right.astype(dtype)

        def matrix_transposed_times(left):
            return matrix.T @ left.astype(dtype)

        sample, row_energy = matrix @ omega, _row_energy(matrix)
    basis = _orthonormal(sample)
    for _ in range(n_power_iter):
        basis_space = _orthonormal(matrix_transposed_times(basis))
        basis = _orthonormal(times_matrix(basis_space))
    projected = matrix_transposed_times(basis).T  # (width, n_space) = Q^T M
    u_small, s, vt = np.linalg.svd(projected, full_matrices=False)
    return (basis @ u_small)[:, :k], s[:k], vt[:k], row_energy


def _orthonormal(columns: np.ndarray) -> np.ndarray:
    """Q of the thin QR factorisation of ``columns``, on one BLAS thread."""
    with numpy_blas_on_one_thread():
        return np.linalg.qr(columns)[0]


def _block_moments(block, origin):
    """(3, n) sums of one block of rows: NaN count, sum and sum of squares of
    ``block - origin`` (float64)."""
    shifted = np.asarray(block, dtype=np.float64) - origin
    return np.stack([np.isnan(shifted).sum(axis=0), shifted.sum(axis=0),
                     np.einsum("ij,ij->j", shifted, shifted)])


def _column_moments(raw, origin):
    """:func:`_block_moments` of a whole (time, space) array, numpy or dask: summed
    over blocks of rows, each block reduced by one task (dask), or (numpy) in
    cache-sized steps with the same rounding (:class:`ColumnMoments`), the columns
    split over threads, so no full-size temporary is made."""
    if _is_dask(raw):
        n_blocks = len(raw.chunks[0])
        per_block = raw.map_blocks(_block_moments, origin, chunks=((3,) * n_blocks, raw.chunks[1]),
                                   dtype=np.float64, meta=np.empty((0, 0)))
        return per_block.reshape(n_blocks, 3, raw.shape[1]).sum(axis=0)
    block_rows = block_length(raw.shape[1])

    def moments_of(columns: slice) -> np.ndarray:
        moments = ColumnMoments(origin[columns])
        for start, stop, starts_block, ends_block in cache_steps(
                raw.shape[0], columns.stop - columns.start, block_rows):
            moments.add(raw[start:stop, columns], starts_block, ends_block)
        return moments.totals

    return np.concatenate(in_threads(moments_of, even_ranges(raw.shape[1])), axis=1)


def _store_by_chunks(array, out: np.ndarray) -> None:
    """Write the dask ``array`` (chunked along its first axis) into ``out``, a few
    chunks computed at a time and copied in here: any scheduler (a distributed one
    too) hands the values back to this process, and memory holds a few chunks."""
    import dask

    edges = np.cumsum((0,) + array.chunks[0])
    at_once = max(2, os.cpu_count() or 2)
    for first in range(0, len(array.chunks[0]), at_once):
        numbers = range(first, min(first + at_once, len(array.chunks[0])))
        for number, values in zip(numbers, dask.compute(*[array.blocks[i] for i in numbers])):
            out[edges[number]:edges[number + 1]] = values


#: Memory-mapped scratch blocks at least this large are dropped from resident memory
#: after each pass (:func:`_release_pages`); smaller ones stay mapped.
_RELEASE_BYTES = 2**30


def _release_pages(array) -> None:
    """Drop the pages of a large memory-mapped ``array`` (the out-of-core build's
    scratch copies, :class:`numpy.memmap`, of at least :data:`_RELEASE_BYTES`) from
    this process's resident memory; the values stay in the file (and the page cache)
    and are read back on the next access. Without it every pass over the scratch
    matrix left all of it resident: 40 years at 0.25 degree, 4.6 GB. Smaller blocks
    are kept: mapping a dropped page back costs a page fault per 4 kB on every pass
    (5.1 million minor faults in the 40-year build). Other arrays are left alone."""
    mapped = getattr(array, "_mmap", None)
    if (isinstance(mapped, mmap.mmap) and hasattr(mapped, "madvise")
            and len(mapped) >= _RELEASE_BYTES):
        mapped.madvise(mmap.MADV_DONTNEED)


def _released(block, result):
    """``result`` (a product or sum over ``block`` just taken), after dropping the
    block's pages (:func:`_release_pages`)."""
    _release_pages(block)
    return result


def _row_energy(matrix: np.ndarray) -> np.ndarray:
    """Sum of squares of each row, accumulated in float64, a block of rows at a time."""
    energy = np.empty(matrix.shape[0])
    step = block_length(matrix.shape[1])
    for start in range(0, matrix.shape[0], step):
        block = matrix[start:start + step].astype(np.float64)
        energy[start:start + step] = np.einsum("ij,ij->i", block, block)
    return energy


def _computed(array) -> np.ndarray:
    """``array`` as numpy, computing it first if it is a dask array."""
    return np.asarray(array.compute() if _is_dask(array) else array)
