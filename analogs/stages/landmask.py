"""Land-sea mask of an archive: recognise it, put it on the store grid (pure).

Reanalyses ship a static land-sea mask beside (or inside) their fields: CF
``land_binary_mask`` (1 land, 0 sea) or ``land_area_fraction`` (0 to 1), often with a
time dimension of one step. The store keeps it, regridded to the store grid, only to
draw the land-sea boundary on maps; it is never a predictor.

Xarray in and out; the two readers open files as the archive reader does
(:mod:`analogs.stages.sources`) and write nothing.
"""

from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from analogs.errors import AnalogsInputError
from analogs.geo import nearest_index

#: CF standard names of a land-sea mask (CF standard name table, version 84).
MASK_STANDARD_NAMES = ("land_binary_mask", "land_area_fraction")
#: Short names reanalyses and models give it (common practice, no source); a variable so
#: named is taken only when its values lie in 0..1.
MASK_SHORT_NAMES = ("lsm", "landmask", "land_mask", "lsmask", "land_sea_mask", "landsea",
                    "land")
#: Slack on the 0..1 range (packed or float32 values), dimensionless.
RANGE_TOLERANCE = 1e-3


def find_land_mask(dataset: xr.Dataset) -> str | None:
    """Name of the land-sea mask variable of ``dataset``: one whose ``standard_name``
    is a CF mask name, else one with a common short name (any case); None when none."""
    for name, var in dataset.data_vars.items():
        if str(var.attrs.get("standard_name", "")).strip().lower() in MASK_STANDARD_NAMES:
            return str(name)
    for name in dataset.data_vars:
        if str(name).lower() in MASK_SHORT_NAMES:
            return str(name)
    return None


def canonical_land_mask(da: xr.DataArray, where: str) -> xr.DataArray:
    """The mask ``da`` as a land fraction on ``(lat, lon)`` (degrees north ascending,
    east in [-180, 180)), values 0 (sea) to 1 (land).

    A time (or other length-one) dimension keeps its first step: the mask is static.
    Values in percent (``units`` "%") are divided by 100. Raises
    :class:`~analogs.errors.AnalogsInputError` naming ``where`` when the variable has no
    latitude-longitude grid, no finite value, or values outside 0..1.
    """
    # Private helpers of the archive reader: one way of recognising coordinates.
    from analogs.stages.sources import _LAT_NAMES, _LON_NAMES, _find_axis, normalise_grid
    lat_dim, lat = _find_axis(da, _LAT_NAMES, "latitude",
                              ("degrees_north", "degree_north", "degrees_n"), where)
    lon_dim, lon = _find_axis(da, _LON_NAMES, "longitude",
                              ("degrees_east", "degree_east", "degrees_e"), where)
    extra = [d for d in da.dims if d not in (lat_dim, lon_dim)]
    da = da.isel({d: 0 for d in extra}, drop=True).transpose(lat_dim, lon_dim)
    values = np.asarray(da.values, dtype=float)
    if str(da.attrs.get("units", "")).strip().lower() in ("%", "percent"):
        values = values / 100.0
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise AnalogsInputError(f"{where}: the land-sea mask has no finite value")
    low, high = float(finite.min()), float(finite.max())
    if low < -RANGE_TOLERANCE or high > 1.0 + RANGE_TOLERANCE:
        raise AnalogsInputError(
            f"{where}: the land-sea mask ranges from {low:g} to {high:g}; expected a land "
            "fraction or binary mask from 0 (sea) to 1 (land)")
    mask = xr.DataArray(np.clip(values, 0.0, 1.0), dims=("lat", "lon"),
                        coords={"lat": lat, "lon": lon},
                        attrs={"standard_name": "land_area_fraction", "units": "1",
                               "long_name": "land fraction (1 land, 0 sea)"})
    mask = normalise_grid(xr.Dataset({"land": mask}, attrs={"source_files": where}))
    return mask["land"]


def coast_agreement(land: xr.DataArray, coastlines) -> float | None:
    """Share of the vertices of ``coastlines`` ((n, 2) arrays of lon, lat in the grid's
    longitude frame) that lie within one grid cell of a land-sea change of ``land``
    (land fraction on (lat, lon), land where >= 0.5): near 1 when the mask is the real
    Earth's on a real grid, small when it draws another geography (a synthetic
    continent) or is shifted. None when no vertex lies on the grid."""
    if not coastlines:
        return None
    points = np.concatenate(coastlines)
    lat, lon = land["lat"].values, land["lon"].values
    inside = ((points[:, 1] >= lat.min()) & (points[:, 1] <= lat.max())
              & (points[:, 0] >= lon.min()) & (points[:, 0] <= lon.max()))
    if not inside.any():
        return None
    points = points[inside]
    # Canonical coordinates ascend: a binary search, not a (points x grid) matrix (a
    # global 0.25 degree grid and 200,000 coastline vertices: 3.4 GB).
    row, column = nearest_index(lat, points[:, 1]), nearest_index(lon, points[:, 0])
    is_land = np.pad(np.asarray(land.transpose("lat", "lon").values) >= 0.5, 1, mode="edge")
    any_land = np.zeros(is_land.shape, bool)
    any_sea = np.zeros(is_land.shape, bool)
    for dy in (-1, 0, 1):       # the 3 x 3 cells around each cell
        for dx in (-1, 0, 1):
            shifted = np.roll(np.roll(is_land, dy, axis=0), dx, axis=1)
            any_land |= shifted
            any_sea |= ~shifted
    changes = (any_land & any_sea)[1:-1, 1:-1]
    return float(changes[row, column].mean())


def land_on_grid(mask: xr.DataArray, lat, lon, where: str) -> xr.DataArray:
    """The land fraction ``mask`` (from :func:`canonical_land_mask`) on the grid
    ``(lat, lon)``, bilinear as the archive's fields are regridded
    (:func:`analogs.stages.sources.regrid_to`); refused, naming ``where``, when the mask
    does not cover that grid."""
    from analogs.stages.sources import regrid_to
    source = xr.Dataset({"land": mask}, attrs={"source_files": where})
    try:
        out = regrid_to(source, lat, lon)["land"]
    except AnalogsInputError as error:
        raise AnalogsInputError(f"land-sea mask: {error} (the mask must cover the archive's "
                                "grid)") from None
    if not np.isfinite(out.values).any():
        raise AnalogsInputError(f"{where}: the land-sea mask has no value on the archive's grid")
    out = out.clip(0.0, 1.0)
    out.attrs = dict(mask.attrs)
    return out


def read_land_mask(path) -> tuple[xr.DataArray, dict]:
    """The land-sea mask of the file ``path`` (NetCDF or Zarr) as a land fraction on
    (lat, lon), and where it came from (``path``, ``variable``, ``standard_name``).
    Refused, naming the file, when it holds no mask variable or a bad one."""
    from analogs.stages.sources import _open_file
    where = str(path)
    with _open_file(where, None) as dataset:
        name = find_land_mask(dataset)
        if name is None:
            raise AnalogsInputError(
                f"{where}: no land-sea mask variable (variables: "
                f"{', '.join(map(str, dataset.data_vars)) or 'none'}); expected one with "
                f"standard_name {' or '.join(MASK_STANDARD_NAMES)}, or named "
                f"{', '.join(MASK_SHORT_NAMES[:3])}")
        # Lazy: only the first time step of a mask with a time axis is read.
        mask = canonical_land_mask(dataset[name], f"{where}, variable {name!r}")
        standard_name = str(dataset[name].attrs.get("standard_name", ""))
    return mask, {"path": where, "variable": name, "standard_name": standard_name or None}


def _may_hold_mask(path) -> bool:
    """Whether the header of the NetCDF file ``path`` names a variable
    :func:`find_land_mask` could take, read with netCDF4 without decoding (a screen: an
    xarray open of each yearly file of a 40-year archive cost a second, measured). True
    when the header cannot be read this way (a Zarr store, a damaged file): the full
    open decides, and names the file when it fails."""
    import types

    import netCDF4

    from analogs._netcdf_lock import netcdf_lock
    try:
        with netcdf_lock(), netCDF4.Dataset(path) as dataset:
            header = types.SimpleNamespace(data_vars={
                name: types.SimpleNamespace(
                    attrs={"standard_name": getattr(variable, "standard_name", "")})
                for name, variable in dataset.variables.items()})
    except (OSError, RuntimeError, ValueError):
        return True
    return find_land_mask(header) is not None


def land_mask_in_archive(paths, same_header=None) -> tuple[xr.DataArray | None, dict | None]:
    """The first land-sea mask found in the archive files ``paths`` (as
    :func:`read_land_mask`), or (None, None). A variable named like a mask whose values
    are not a land fraction is passed over with a warning: in an archive it may be
    something else. ``same_header``: ``{file: earlier file}`` whose NetCDF headers are
    the same (what ``open_archive(same_header=)`` found): the earlier file's screen
    (:func:`_may_hold_mask`, which reads names and standard names alone) stands for
    the later file's, which is not opened for it."""
    from analogs.stages.sources import _expand_paths, _is_grib
    same_header = same_header or {}
    screened = {}
    for path in _expand_paths(paths, "build_store"):
        if _is_grib(path):
            continue
        like = same_header.get(path)
        screened[path] = screened[like] if like in screened else _may_hold_mask(path)
        if not screened[path]:
            continue
        try:
            return read_land_mask(path)
        except AnalogsInputError as error:
            if "no land-sea mask variable" not in str(error):
                warnings.warn(f"{error}; not used as the land-sea mask", UserWarning,
                              stacklevel=2)
    return None, None


__all__ = ["MASK_SHORT_NAMES", "MASK_STANDARD_NAMES", "canonical_land_mask", "coast_agreement",
           "find_land_mask", "land_mask_in_archive", "land_on_grid", "read_land_mask"]
