"""CF coordinate attributes and NetCDF tidying: the one place they are written down.

Pure: a Dataset in, a Dataset (or an encoding dict) out. The writers in
:mod:`analogs.workflows.files` apply :func:`cf_tidy` and :func:`netcdf_encoding` to every
NetCDF file the tool writes; stages that build Datasets label their coordinates with
:func:`coordinate_attrs` (or :func:`label_coordinates`).

Reference: NetCDF Climate and Forecast (CF) Metadata Conventions 1.8, sections 4.1
(latitude), 4.2 (longitude) and 4.4 (time).
"""

from __future__ import annotations

import datetime as _dt

import numpy as np
import xarray as xr

from analogs import __version__

#: The CF conventions the files declare.
CONVENTIONS = "CF-1.8"

#: CF attributes of the coordinates every analogs NetCDF file may carry.
COORDINATE_ATTRS = {
    "time": {"standard_name": "time", "long_name": "time", "axis": "T"},
    "lat": {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north",
            "axis": "Y"},
    "lon": {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east",
            "axis": "X"},
}

#: How datetimes are encoded: float64 days since 1900 (CF 4.4), no fill value.
TIME_ENCODING = {"units": "days since 1900-01-01 00:00:00", "calendar": "standard",
                 "dtype": "float64", "_FillValue": None}


def coordinate_attrs(name: str, *keys: str) -> dict:
    """A copy of the CF attributes of coordinate ``name`` ("time", "lat" or "lon"),
    restricted to ``keys`` when given."""
    attrs = COORDINATE_ATTRS[name]
    return {key: value for key, value in attrs.items() if not keys or key in keys}


def label_coordinates(ds, *, replace=False):
    """A copy of ``ds`` (Dataset or DataArray) with CF attributes on its lat / lon / time
    coordinates; existing attributes are kept unless ``replace``."""
    ds = ds.copy()
    for name in COORDINATE_ATTRS:
        if name not in ds.coords:
            continue
        attrs = ds[name].attrs
        for key, value in COORDINATE_ATTRS[name].items():
            if key == "units" and np.issubdtype(ds[name].dtype, np.datetime64):
                continue
            if replace:
                attrs[key] = value
            else:
                attrs.setdefault(key, value)
    return ds


def cf_tidy(ds: xr.Dataset) -> xr.Dataset:
    """A copy of ``ds`` ready for CF-1.8 NetCDF (what the IOOS compliance checker asks).

    64-bit integers become 32-bit (NetCDF classic types), coordinates get their standard
    names and axes, every variable a ``long_name``, "gpm" becomes the UDUNITS unit "m"
    (geopotential metres, implied by the standard name geopotential_height), and the
    file a ``history`` line.
    """
    ds = ds.copy()
    for name, variable in ds.variables.items():
        if variable.dtype == np.int64:
            ds[name] = variable.astype(np.int32)
        attrs = ds[name].attrs
        if name in COORDINATE_ATTRS:
            for key, value in COORDINATE_ATTRS[name].items():
                if key != "units" or not np.issubdtype(ds[name].dtype, np.datetime64):
                    attrs.setdefault(key, value)
        if attrs.get("units") == "gpm":
            attrs["units"] = "m"
            attrs.setdefault("comment", "geopotential metres")
        attrs.setdefault("long_name", str(name).replace("_", " "))
    ds.attrs.setdefault("Conventions", CONVENTIONS)
    ds.attrs.setdefault("history", f"{_dt.datetime.now(_dt.timezone.utc):%Y-%m-%dT%H:%M:%SZ} "
                                   f"written by analogs {__version__}")
    return ds


def netcdf_encoding(ds: xr.Dataset, overrides=None) -> dict:
    """The NetCDF encoding of ``ds``: no ``_FillValue`` on coordinates, datetimes as
    float64 days since 1900 (:data:`TIME_ENCODING`); ``overrides`` (name -> encoding)
    are merged over it."""
    encoding = {}
    for name in ds.variables:
        if name in ds.coords or name in ds.dims:
            encoding[name] = {"_FillValue": None}
    for name, variable in ds.variables.items():
        if np.issubdtype(variable.dtype, np.datetime64):
            encoding[name] = dict(TIME_ENCODING)
    for name, extra in (overrides or {}).items():
        encoding[name] = {**encoding.get(name, {}), **extra}
    return encoding
