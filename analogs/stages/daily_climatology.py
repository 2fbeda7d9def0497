"""Smooth day-of-year climatology from annual harmonics, and anomalies.

The climatology of each variable at each grid point is the time mean plus the
first ``n_harmonics`` annual harmonics, fitted by least squares in time:

.. math::

    c(t) = a_0 + \\sum_{k=1}^{K} \\left[a_k \\cos(k\\theta_t) + b_k \\sin(k\\theta_t)\\right],
    \\qquad \\theta_t = 2\\pi \\frac{\\mathrm{doy}_t - 1 + h_t / 24}{D_t}

with ``doy`` the day of the year (1 on 1 January), ``h`` the hour of the day (UTC)
and ``D`` the length of that year in days (366 in leap years, so 31 December
12 UTC of a leap year sits just before 1 January 00 UTC of the next year). This is
the usual smooth annual-cycle climatology of the trade (common practice, e.g.
Wilks, *Statistical Methods in the Atmospheric Sciences*, section on harmonic
analysis). The least-squares solution goes through the normal equations
``(X^T X) a = X^T y``; ``X^T y`` is a sum over time, which xarray/dask reduce
chunk by chunk, so the memory needed is bounded by one chunk plus the
coefficients.

Archives that cannot carry a harmonic fit (monthly or seasonal means, one sample
per year) fall back to a per-calendar-month mean when they cover several months
and to the plain time mean otherwise; ``method_`` records which was used.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from analogs.errors import AnalogsInputError, NotFittedError
from analogs.parameters import P
from analogs.stages.blockwise import (block_length, cache_rows, cache_steps,
                                      empty_without_hugepage_advice, even_ranges, in_threads)

__all__ = ["HarmonicClimatology", "annual_angle", "harmonic_design_matrix"]

#: Archives whose median spacing between samples is at least this many days are
#: treated as monthly-or-coarser means and get a per-calendar-period mean instead of
#: harmonics (common practice, no source: a harmonic fit to monthly means aliases
#: the month boundaries).
COARSE_SAMPLING_DAYS = 27.0

_OWNER = "HarmonicClimatology"
_METHODS = ("harmonic", "monthly", "mean")


def annual_angle(times) -> np.ndarray:
    """Fractional-year angle of each time, in radians, in [0, 2 pi).

    ``theta = 2 pi (dayofyear - 1 + hour / 24) / days_in_year``, with minutes and
    seconds counted as fractions of an hour and ``days_in_year`` 366 in leap years.
    """
    index = pd.DatetimeIndex(np.atleast_1d(np.asarray(times, dtype="datetime64[ns]")))
    hours = (np.asarray(index.hour) + np.asarray(index.minute) / 60.0
             + np.asarray(index.second) / 3600.0)
    days_in_year = np.where(np.asarray(index.is_leap_year), 366.0, 365.0)
    day_of_year = np.asarray(index.day_of_year, dtype=float)
    return 2.0 * np.pi * (day_of_year - 1.0 + hours / 24.0) / days_in_year


def harmonic_term_names(n_harmonics: int) -> list[str]:
    """Labels of the design-matrix columns: ``mean, cos1, sin1, cos2, sin2, ...``."""
    names = ["mean"]
    for k in range(1, n_harmonics + 1):
        names += [f"cos{k}", f"sin{k}"]
    return names


def harmonic_design_matrix(times, n_harmonics: int) -> np.ndarray:
    """Design matrix ``X (time, 1 + 2 n_harmonics)`` of the harmonic climatology.

    Columns: ``1, cos(theta), sin(theta), ..., cos(K theta), sin(K theta)`` with
    ``theta`` from :func:`annual_angle` (dimensionless).
    """
    theta = annual_angle(times)
    columns = [np.ones_like(theta)]
    for k in range(1, n_harmonics + 1):
        columns += [np.cos(k * theta), np.sin(k * theta)]
    return np.stack(columns, axis=1)


def _design_array(time: xr.DataArray, n_harmonics: int, terms, time_chunks=None) -> xr.DataArray:
    """:func:`harmonic_design_matrix` as a DataArray ``(time, harmonic_term)``.

    With ``time_chunks`` it is a dask array computed chunk by chunk from the times
    alone, so a chunked (out-of-core) graph carries the times, not the matrix.
    """
    coords = {"time": time.values, "harmonic_term": list(terms)}
    if time_chunks is None:
        return xr.DataArray(harmonic_design_matrix(time.values, n_harmonics),
                            dims=("time", "harmonic_term"), coords=coords)
    import dask.array as da

    stamps = da.from_array(np.asarray(time.values, dtype="datetime64[ns]"), chunks=(time_chunks,))
    design = stamps.map_blocks(harmonic_design_matrix, n_harmonics, new_axis=1,
                               chunks=(stamps.chunks[0], (len(terms),)), dtype=float,
                               meta=np.empty((0, 0)))
    return xr.DataArray(design, dims=("time", "harmonic_term"), coords=coords)


def _contract(left: xr.DataArray, right: xr.DataArray, dim: str) -> xr.DataArray:
    """``xr.dot(left, right, dim=dim)`` as a tensordot, i.e. a BLAS matrix product
    (numpy's einsum, behind ``xr.dot``, is not: measured 2.3x slower on 40 years at
    1 degree). Dask inputs stay lazy and are reduced chunk by chunk."""
    left_dims = [d for d in left.dims if d != dim]
    right_dims = [d for d in right.dims if d != dim]
    a = left.transpose(*left_dims, dim).data
    b = right.transpose(dim, *right_dims).data
    if hasattr(a, "dask") or hasattr(b, "dask"):
        import dask.array as da

        product = da.tensordot(da.asarray(a), da.asarray(b), axes=1)
    else:
        product = np.tensordot(a, b, axes=1)
    coords = {d: source[d] for source, dims in ((left, left_dims), (right, right_dims))
              for d in dims if d in source.coords}
    return xr.DataArray(product, dims=(*left_dims, *right_dims), coords=coords)


def _fitted_variables(ds: xr.Dataset) -> list[str]:
    names = [name for name, var in ds.data_vars.items() if "time" in var.dims]
    if not names:
        raise AnalogsInputError(
            "The dataset given to HarmonicClimatology has no variable with a 'time' "
            f"dimension (variables: {list(ds.data_vars)}); expected e.g. z500 (time, lat, lon)."
        )
    return names


def _choose_method(times: np.ndarray, n_harmonics: int) -> str:
    index = pd.DatetimeIndex(np.asarray(times, dtype="datetime64[ns]"))
    n_terms = 1 + 2 * n_harmonics
    distinct_days = np.unique(np.round(annual_angle(index), 6)).size
    spacing_days = (np.median(np.diff(np.sort(index.asi8))) / 86400e9  # asi8 is in ns
                    if index.size > 1 else np.inf)
    if n_harmonics == 0 or (distinct_days >= n_terms and spacing_days < COARSE_SAMPLING_DAYS):
        return "harmonic"
    return "monthly" if np.unique(index.month).size > 1 else "mean"


def _as_time_series(ds: xr.Dataset) -> tuple[xr.Dataset, bool]:
    """Give a single-time Dataset (scalar ``time`` coordinate) a length-1 time dim."""
    if "time" in ds.dims:
        return ds, False
    if "time" in ds.coords:
        return ds.expand_dims("time"), True
    raise AnalogsInputError(
        "The dataset given to HarmonicClimatology has no 'time' coordinate; "
        "expected canonical fields with dims (time, lat, lon)."
    )


def _flat_time_first(var: xr.DataArray):
    """The in-memory ``(time, points)`` view of ``var``, or ``None`` (dask data)."""
    if var.chunks is not None:
        return None
    values = np.asarray(var.transpose("time", ...).values)
    return values.reshape(values.shape[0], -1)


def _any_missing(flat: np.ndarray) -> bool:
    step = block_length(flat.shape[1])
    return any(np.isnan(flat[start:start + step]).any() for start in range(0, flat.shape[0], step))


def _fit_complete(var: xr.DataArray, flat: np.ndarray, times, n_harmonics: int,
                  terms) -> xr.DataArray | None:
    """Harmonic coefficients of a gap-free in-memory field: one normal matrix
    ``X^T X`` for every point and ``X^T y`` summed over blocks of times in float64
    (no float64 copy of the field is made: each block goes through one buffer).
    ``None`` if the field has gaps (NaN), found from a NaN in ``X^T y`` (BLAS carries
    NaN through) rather than by a pass of its own."""
    design = harmonic_design_matrix(times, n_harmonics)
    step = block_length(flat.shape[1])
    rhs = np.zeros((design.shape[1], flat.shape[1]))
    buffer = np.empty((min(step, flat.shape[0]), flat.shape[1]))
    for start in range(0, flat.shape[0], step):
        rows = slice(start, start + step)
        block = buffer[:flat[rows].shape[0]]
        np.copyto(block, flat[rows])
        rhs += design[rows].T @ block
    if np.isnan(rhs).any() and _any_missing(flat):
        return None
    normal_matrix = design.T @ design
    if np.linalg.cond(normal_matrix) < 1e10:
        solution = np.linalg.solve(normal_matrix, rhs)
    else:
        solution = np.full(rhs.shape, np.nan)
    spatial_dims = [d for d in var.transpose("time", ...).dims if d != "time"]
    shape = tuple(var.sizes[d] for d in spatial_dims)
    return xr.DataArray(
        solution.reshape(len(terms), *shape), dims=("harmonic_term", *spatial_dims),
        coords={**{d: var[d] for d in spatial_dims if d in var.coords}, "harmonic_term": terms})


def _anomaly_block(values, times, coef_flat, n_harmonics: int, dtype):
    """One block of times of ``values (time, lat, lon)`` minus its harmonic
    climatology, computed in float64 and returned in ``dtype``."""
    times = np.asarray(times).reshape(-1)
    climatology = harmonic_design_matrix(times, n_harmonics) @ coef_flat
    out = values.reshape(values.shape[0], -1) - climatology
    return out.astype(dtype, copy=False).reshape(values.shape)


#: Values of the climatology table of one column range (8 MB in float64). Tables of
#: 32 MB, made in the worker threads, stayed in their malloc arenas after use: 60 MB
#: more resident memory for the rest of the 0.25-degree build; tables of 2 MB made
#: ranges so narrow that the 1-degree anomalies took 1.5x the CPU time.
TABLE_VALUES = 2 ** 20


def _anomalies_in_memory(field: np.ndarray, times, coef_flat: np.ndarray, n_harmonics: int,
                         dtype) -> np.ndarray:
    """:func:`_anomaly_block` of a whole in-memory ``field (time, lat, lon)``, with the
    same values, made in one pass: the climatology is evaluated once per distinct row
    of the design matrix (a day of the year, 731 of them over leap and common years)
    rather than once per time, each cache-sized step of times takes its rows of that
    table, and the grid is split into column ranges worked in threads (ranges narrow
    enough that their table stays within :data:`TABLE_VALUES` values)."""
    n_times = field.shape[0]
    values = empty_without_hugepage_advice((n_times, field[0].size), dtype)
    # Times at one angle have one design row (np.unique of the rows themselves sorts
    # 7-value records: 0.1 s for 40 years).
    _, first_time, day_of_time = np.unique(annual_angle(times), return_index=True,
                                           return_inverse=True)
    days = harmonic_design_matrix(times, n_harmonics)[first_time]

    def anomalies_of(columns: slice) -> None:
        table = days @ coef_flat[:, columns]
        width = table.shape[1]
        buffer = np.empty((cache_rows(width), width))
        for start, stop, _, _ in cache_steps(n_times, width):
            climatology = buffer[:stop - start]
            np.take(table, day_of_time[start:stop], axis=0, out=climatology, mode="clip")
            # A view of a C-ordered field; a strided one is copied a step at a time.
            rows = field[start:stop].reshape(stop - start, -1)[:, columns]
            np.subtract(rows, climatology, out=climatology)
            values[start:stop, columns] = climatology

    in_threads(anomalies_of, even_ranges(values.shape[1], TABLE_VALUES // len(days)))
    return values.reshape(field.shape)


class HarmonicClimatology:
    """Smooth annual-cycle climatology (mean + annual harmonics) per grid point.

    Parameters
    ----------
    n_harmonics : int, default 3
        Number of annual harmonics beyond the mean (0 gives the plain time mean).

    Attributes
    ----------
    method_ : {"harmonic", "monthly", "mean"}
        How the climatology was estimated (see the module docstring for the fallback).
    variables_ : list of str
        Variables fitted, in dataset order.
    coefficients_ : xarray.Dataset
        ``<var>_coef`` with dims ``(harmonic_term, lat, lon)`` (``harmonic_term`` =
        ``mean, cos1, sin1, ...``) for the harmonic and mean methods, or
        ``(month, lat, lon)`` (months 1-12 present in the data) for the monthly method;
        same units as the variable.
    """

    def __init__(self, n_harmonics: int = P.n_harmonics.default):
        self.n_harmonics = n_harmonics

    # -- fitting ---------------------------------------------------------------
    def fit(self, ds: xr.Dataset) -> "HarmonicClimatology":
        """Fit the climatology of every variable of ``ds`` that has a ``time`` dim.

        Grid points with missing values at some times are fitted from their valid
        times only; a point with too few valid times gets NaN coefficients.
        """
        n_harmonics = P.n_harmonics.check(self.n_harmonics, _OWNER)
        ds, _ = _as_time_series(ds)
        names = _fitted_variables(ds)
        times = ds["time"].values
        method = _choose_method(times, n_harmonics)
        coefficients = {}
        for name in names:
            var = ds[name]
            if method == "harmonic":
                coef = self._fit_harmonics(var, times, n_harmonics)
            elif method == "monthly":
                coef = var.groupby("time.month").mean("time", skipna=True)
            else:
                coef = var.mean("time", skipna=True).expand_dims(harmonic_term=["mean"])
            coef = coef.compute()
            coef.attrs = dict(var.attrs)
            coefficients[f"{name}_coef"] = coef
        self.coefficients_ = xr.Dataset(coefficients)
        self.variables_ = names
        self.method_ = method
        self.n_harmonics_ = n_harmonics if method == "harmonic" else 0
        return self

    @staticmethod
    def _fit_harmonics(var: xr.DataArray, times, n_harmonics: int) -> xr.DataArray:
        terms = harmonic_term_names(n_harmonics)
        flat = _flat_time_first(var)
        complete = None if flat is None else _fit_complete(var, flat, times, n_harmonics, terms)
        if complete is not None:
            return complete
        time_chunks = var.chunksizes["time"] if var.chunks is not None else None
        design = _design_array(var["time"], n_harmonics, terms, time_chunks)
        spatial_dims = [d for d in var.dims if d != "time"]
        outer = design * design.rename(harmonic_term="harmonic_term_2")
        if var.chunks is None and not var.isnull().any():
            # No gaps: one normal matrix X^T X for every point.
            normal_matrix = outer.sum("time").expand_dims({d: var[d] for d in spatial_dims})
            rhs = _contract(design, var, "time")
        else:
            # Per-point normal equations so that gaps in time only drop those samples;
            # for dask input both sums come from one pass over the data (dask imported
            # here: evaluating a stored climatology for the maps needs none of it).
            import dask
            valid = var.notnull().astype(design.dtype)
            normal_matrix, rhs = dask.compute(_contract(outer, valid, "time"),
                                              _contract(design, var.fillna(0.0), "time"))
        lhs = normal_matrix.transpose(*spatial_dims, "harmonic_term", "harmonic_term_2").values
        right = rhs.transpose(*spatial_dims, "harmonic_term").values
        condition = np.linalg.cond(lhs.reshape(-1, len(terms), len(terms)))
        solvable = (condition < 1e10).reshape(lhs.shape[:-2])
        safe_lhs = np.where(solvable[..., None, None], lhs, np.eye(len(terms)))
        solution = np.linalg.solve(safe_lhs, right[..., None])[..., 0]
        solution[~solvable] = np.nan
        coef = xr.DataArray(
            solution, dims=(*spatial_dims, "harmonic_term"),
            coords={**{d: var[d] for d in spatial_dims if d in var.coords},
                    "harmonic_term": terms},
        )
        return coef.transpose("harmonic_term", *spatial_dims)

    def _check_fitted(self) -> None:
        if not hasattr(self, "coefficients_"):
            raise NotFittedError(
                "This HarmonicClimatology is not fitted yet; call fit(ds) first."
            )

    # -- using the fit ---------------------------------------------------------
    def predict(self, times, *, time_chunks=None) -> xr.Dataset:
        """Climatology of every fitted variable at ``times`` (datetime-like, 1-D).

        Returns a Dataset with dims ``(time, lat, lon)``. With ``time_chunks`` (a
        tuple of chunk lengths along time, or an int), or if ``times`` is an
        ``xarray.DataArray`` with dask chunks along ``time``, the result is lazy and
        chunked alike: the design matrix is then built chunk by chunk, so neither it
        nor the climatology is ever held whole. With the monthly method a month
        absent from the archive gives NaN.
        """
        self._check_fitted()
        if isinstance(times, xr.DataArray):
            time_coord = times
        else:
            time_coord = xr.DataArray(
                np.atleast_1d(np.asarray(times, dtype="datetime64[ns]")), dims="time")
            time_coord = time_coord.assign_coords(time=time_coord)
        time_values = time_coord.values
        if time_chunks is None and time_coord.chunks is not None:
            time_chunks = time_coord.chunks[0]
        out = {}
        for name in self.variables_:
            coef = self.coefficients_[f"{name}_coef"]
            if self.method_ == "monthly":
                months = xr.DataArray(pd.DatetimeIndex(time_values).month, dims="time",
                                      coords={"time": time_coord["time"]})
                clim = coef.reindex(month=np.arange(1, 13)).sel(month=months).drop_vars("month")
            else:
                design = _design_array(time_coord["time"], self.n_harmonics_,
                                       coef["harmonic_term"].values, time_chunks)
                clim = _contract(design, coef, "harmonic_term")
            clim = clim.transpose("time", ...)
            clim.attrs = dict(coef.attrs)
            if "long_name" in coef.attrs:
                clim.attrs["long_name"] = f"{coef.attrs['long_name']} climatology"
            out[name] = clim
        return xr.Dataset(out)

    def transform(self, ds: xr.Dataset) -> xr.Dataset:
        """Anomalies ``ds[var] - climatology(time)`` of every fitted variable.

        Attributes are kept; ``long_name`` becomes ``"<long_name> anomaly"``. Dask
        inputs stay lazy. A single-time Dataset without a ``time`` dimension (scalar
        ``time`` coordinate) comes back the same shape.
        """
        self._check_fitted()
        ds, squeeze = _as_time_series(ds)
        missing = [name for name in self.variables_ if name not in ds.data_vars]
        if missing:
            raise AnalogsInputError(
                f"Variable {missing[0]!r} is missing from the dataset given to "
                f"HarmonicClimatology.transform; the climatology was fitted on {self.variables_}."
            )
        first = ds[self.variables_[0]]
        time_chunks = first.chunksizes["time"] if first.chunks is not None else None
        clim = None
        out = {}
        for name in self.variables_:
            var = ds[name]
            coef = self.coefficients_[f"{name}_coef"]
            spatial = {d: coef[d] for d in coef.dims if d in ("lat", "lon")}
            for dim, coord in spatial.items():
                if dim not in var.dims or var.sizes[dim] != coord.size or not np.allclose(
                        var[dim].values, coord.values):
                    raise AnalogsInputError(
                        f"The {dim} coordinate of {name!r} does not match the grid of the "
                        "fitted climatology; regrid the field to the archive grid first."
                    )
            anomaly = self._blockwise_anomaly(var, coef)
            if anomaly is None:
                if clim is None:
                    clim = self.predict(ds["time"], time_chunks=time_chunks)
                aligned = clim[name].assign_coords({dim: var[dim] for dim in spatial})
                anomaly = var - aligned.drop_vars(
                    [c for c in aligned.coords if c not in ("time", *spatial)])
                anomaly = anomaly.transpose(*var.dims)
            anomaly.attrs = dict(var.attrs)
            anomaly.attrs["long_name"] = f"{var.attrs.get('long_name', name)} anomaly"
            out[name] = anomaly
        result = xr.Dataset(out, attrs=dict(ds.attrs))
        return result.squeeze("time") if squeeze else result

    def _blockwise_anomaly(self, var: xr.DataArray, coef: xr.DataArray):
        """``var - climatology`` in ``var``'s float precision, a block of times at a
        time, so that neither the climatology nor a float64 copy of the field is ever
        held whole (in memory: one output array; with dask: one task per chunk).

        ``None`` where this does not apply (monthly method, fields other than
        ``(time, lat, lon)``, dask chunks across the grid): the general path is used.
        """
        if (self.method_ == "monthly" or var.dims != ("time", "lat", "lon")
                or coef.dims != ("harmonic_term", "lat", "lon")):
            return None
        data = var.data
        coef_flat = np.asarray(coef.values, dtype=np.float64).reshape(coef.shape[0], -1)
        dtype = np.result_type(var.dtype, np.float32)
        times = np.asarray(var["time"].values, dtype="datetime64[ns]")
        n_harmonics = self.n_harmonics_
        if hasattr(data, "dask"):
            if len(data.chunks[1]) != 1 or len(data.chunks[2]) != 1:
                return None
            import dask.array as da

            stamps = da.from_array(times, chunks=(data.chunks[0],))[:, None, None]
            values = da.map_blocks(_anomaly_block, data, stamps, coef_flat, n_harmonics,
                                   dtype, dtype=dtype, meta=np.empty((0, 0, 0), dtype))
        else:
            values = _anomalies_in_memory(np.asarray(data), times, coef_flat, n_harmonics, dtype)
        return xr.DataArray(values, dims=var.dims, coords=var.coords)

    def fit_transform(self, ds: xr.Dataset) -> xr.Dataset:
        """``fit(ds)`` then ``transform(ds)``."""
        return self.fit(ds).transform(ds)

    # -- persistence -----------------------------------------------------------
    def to_dataset(self) -> xr.Dataset:
        """Coefficients as a Dataset (``<var>_coef``), attrs ``n_harmonics``, ``method``.

        NetCDF-ready; :meth:`from_dataset` rebuilds the fitted object.
        """
        self._check_fitted()
        ds = self.coefficients_.copy(deep=True)
        ds.attrs = {"n_harmonics": int(self.n_harmonics), "method": self.method_,
                    "fitted_n_harmonics": int(self.n_harmonics_)}
        return ds

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "HarmonicClimatology":
        """Rebuild a fitted climatology from :meth:`to_dataset` output."""
        try:
            model = cls(n_harmonics=int(ds.attrs["n_harmonics"]))
            method = str(ds.attrs["method"])
            fitted_n = int(ds.attrs.get("fitted_n_harmonics", model.n_harmonics))
        except KeyError as exc:
            raise AnalogsInputError(
                f"The climatology dataset lacks the {exc.args[0]!r} attribute; "
                "expected the output of HarmonicClimatology.to_dataset()."
            ) from None
        if method not in _METHODS:
            raise AnalogsInputError(
                f"The climatology dataset has method={method!r}; expected one of {_METHODS}."
            )
        names = [str(n)[: -len("_coef")] for n in ds.data_vars if str(n).endswith("_coef")]
        if not names:
            raise AnalogsInputError(
                "The climatology dataset has no '<var>_coef' variable; "
                "expected the output of HarmonicClimatology.to_dataset()."
            )
        model.coefficients_ = xr.Dataset(
            {f"{n}_coef": ds[f"{n}_coef"].load().copy(deep=True) for n in names})
        model.variables_ = names
        model.method_ = method
        model.n_harmonics_ = fitted_n
        return model
