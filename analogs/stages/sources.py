"""Open gridded archives and forecast fields and normalise them to the canonical fields.

Canonical form (DEVELOPERS.md, "Canonical conventions"): an ``xarray.Dataset`` with
dims ``(time, lat, lon)``; ``lat`` ascending in degrees north; ``lon`` ascending in
[-180, 180) degrees east; ``time`` datetime64[ns] UTC, one value a day; variables
``z500`` (500 hPa geopotential height, gpm) and at most one moisture field ``q850``
(850 hPa specific humidity, kg kg-1), ``td2m`` (2 m dewpoint, K) or ``pwat``
(precipitable water, kg m-2), each with ``units`` and ``long_name``.

Variables are recognised by CF ``standard_name`` first, then by common short names;
units are read from the ``units`` attribute and, only where the magnitude leaves no
doubt, inferred with a warning. Everything stays lazy (dask) when ``chunks`` is given:
the readers look at coordinates and at most a few time steps for unit inference.
"""

from __future__ import annotations

import contextlib
import glob
import json
import os
import re
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from analogs._validation import check_box, check_float, check_int, fail
from analogs.constants import G0, ZERO_CELSIUS_K
from analogs.errors import AnalogsInputError
from analogs.stages.cf import coordinate_attrs
# Canonical field names, in the order they appear in a canonical Dataset (the --fields entry).
from analogs.parameters import SUPPORTED_FIELDS, P

#: Moisture fields, most preferred first: ``fields=None`` takes the first one found.
MOISTURE_PREFERENCE = ("q850", "td2m", "pwat")

FIELD_ATTRS = {
    "z500": {"units": "gpm", "long_name": "geopotential height at 500 hPa",
             "standard_name": "geopotential_height"},
    "q850": {"units": "kg kg-1", "long_name": "specific humidity at 850 hPa",
             "standard_name": "specific_humidity"},
    "td2m": {"units": "K", "long_name": "2 m dewpoint temperature",
             "standard_name": "dew_point_temperature"},
    "pwat": {"units": "kg m-2", "long_name": "precipitable water",
             "standard_name": "atmosphere_mass_content_of_water_vapor"},
}

#: Pressure level (hPa) each field is taken at; None for single-level fields.
FIELD_LEVEL_HPA = {"z500": 500.0, "q850": 850.0, "td2m": None, "pwat": None}

_STANDARD_NAMES = {
    "geopotential_height": "z500",
    "geopotential": "z500",
    "specific_humidity": "q850",
    "dew_point_temperature": "td2m",
    "atmosphere_mass_content_of_water_vapor": "pwat",
    "lwe_thickness_of_atmosphere_mass_content_of_water_vapor": "pwat",
    "atmosphere_water_vapor_content": "pwat",
}
_SHORT_NAMES = {
    "z500": ("z", "hgt", "zg", "gh", "geopotential", "height", "geopotential_height"),
    "q850": ("q", "shum", "hus", "sphum", "specific_humidity"),
    "td2m": ("d2m", "dpt", "2d", "td", "td2m", "dewpoint", "dew_point_temperature"),
    "pwat": ("tcwv", "pwat", "pw", "prw"),
}
#: A short name followed by the level, such as ``zg500`` or ``hus850``.
_SUFFIXED_NAME = re.compile(r"^([a-z_]+?)_?(\d{3,4})$")

_LAT_NAMES = ("lat", "latitude", "nav_lat", "y", "lats", "xlat")
_LON_NAMES = ("lon", "longitude", "nav_lon", "x", "lons", "xlong")
_TIME_NAMES = ("time", "valid_time", "date", "t", "times", "datetime")
_LEVEL_NAMES = ("level", "plev", "pressure_level", "isobaricinhpa", "lev", "pressure",
                "lv_isbl0", "levelist")

_HPA_UNITS = {"hpa", "mbar", "millibar", "millibars", "mb", "hectopascal", "hectopascals"}
_PA_UNITS = {"pa", "pascal", "pascals"}

#: Accepted spellings of each unit (after :func:`_normal_units`), mapped to
#: (factor, offset): canonical value = value * factor + offset.
_UNIT_TABLE = {
    "z500": {
        "gpm": (1.0, 0.0), "m": (1.0, 0.0),
        "meter": (1.0, 0.0), "meters": (1.0, 0.0),
        "metre": (1.0, 0.0), "metres": (1.0, 0.0),
        "geopotential meters": (1.0, 0.0),
        "geopotential metres": (1.0, 0.0), "m gpm": (1.0, 0.0),
        "dam": (10.0, 0.0), "gpdam": (10.0, 0.0),
        "decameters": (10.0, 0.0), "decametres": (10.0, 0.0),
        "m2 s-2": (1.0 / G0, 0.0),
    },
    "q850": {
        "kg kg-1": (1.0, 0.0), "1": (1.0, 0.0),
        "g kg-1": (1e-3, 0.0),
    },
    "td2m": {
        "k": (1.0, 0.0), "kelvin": (1.0, 0.0),
        "degk": (1.0, 0.0),
        "degc": (1.0, ZERO_CELSIUS_K),
        "c": (1.0, ZERO_CELSIUS_K),
        "celsius": (1.0, ZERO_CELSIUS_K),
        "degrees celsius": (1.0, ZERO_CELSIUS_K),
        "degrees c": (1.0, ZERO_CELSIUS_K),
    },
    "pwat": {
        "kg m-2": (1.0, 0.0), "mm": (1.0, 0.0),
        "cm": (10.0, 0.0), "m": (1000.0, 0.0),
    },
}

#: Magnitude windows (min, max of a sample) that identify missing units without doubt.
#: 500 hPa heights lie in about 4600-6000 gpm (common practice, no source); the
#: windows are wider and do not overlap each other.
_INFERENCE = {
    "z500": (((3500.0, 7000.0), "gpm"), ((3500.0 * G0, 7000.0 * G0), "m2 s-2"),
             ((350.0, 700.0), "dam")),
    "q850": (((-1e-3, 0.05), "kg kg-1"), ((1.0, 30.0), "g kg-1")),
    "td2m": (((150.0, 350.0), "K"), ((-100.0, 60.0), "degC")),
    "pwat": (((0.0, 120.0), "kg m-2"),),
}
#: q in g kg-1 must also reach at least this maximum (a dry day could otherwise pass).
_G_PER_KG_MIN_MAX = 1.0

#: 500 hPa heights without any level information are accepted only in this range (gpm).
_Z500_PLAUSIBLE_GPM = (4500.0, 6200.0)


@dataclass(frozen=True)
class _Candidate:
    """A variable of an opened file recognised as one canonical field."""

    path: str
    dataset: xr.Dataset
    name: str
    field: str
    implied_level_hpa: float | None  # from a name such as ``zg500``


# ---------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------

def open_archive(paths, *, fields=None, region=None, hour=P.hour.default,
                 daily=P.daily.default, chunks=None, progress=False, max_missing_fraction=0.1,
                 max_gap_days=2) -> xr.Dataset:
    """Open one or many NetCDF / Zarr files as a canonical daily archive.

    Parameters
    ----------
    paths : str, os.PathLike or iterable of them
        NetCDF files, ``.zarr`` directories, glob patterns, or plain directories
        (every ``*.nc``, ``*.nc4`` and ``*.zarr`` inside). Files may hold one variable
        each (per-variable, per-year files) or several.
    fields : sequence of str, optional
        Canonical fields to read (from :data:`SUPPORTED_FIELDS`). ``None``: ``z500``
        plus the first moisture field found in the order of
        :data:`MOISTURE_PREFERENCE`.
    region : (south, north, west, east), optional
        Degrees; west and east in [-180, 180]. West > east crosses the date line.
    hour : int
        Valid hour (UTC) of the daily values, 0-23.
    daily : {"instant", "mean"}
        How sub-daily data become one value a day: the value at ``hour`` UTC, or the
        calendar-day (00-24 UTC) mean stamped at ``hour`` UTC.
    chunks : dict, optional
        Dask chunks on canonical dims, e.g. ``{"time": 365}``; the result stays lazy.
    progress : bool
        Show a progress bar while opening files.
    max_missing_fraction : float
        A day on which any field is missing (NaN) at more than this fraction of its grid
        points (points missing on every day, a land/sea mask, not counted) is dropped.
    max_gap_days : int
        Runs of at most this many consecutive missing days at a grid point are filled
        by linear interpolation in time; a point missing for longer drops those days.

    Returns
    -------
    xarray.Dataset
        Canonical dims ``(time, lat, lon)``; attribute ``source_files`` lists the
        files read (``"; "``-separated) and ``missing_data`` (JSON) what the
        missing-data policy did (see :func:`apply_missing_data_policy`).
    """
    hour = P.hour.check(hour, "open_archive")
    max_missing_fraction = check_float(max_missing_fraction, "max_missing_fraction",
                                       "open_archive", min_value=0.0, max_value=1.0)
    max_gap_days = check_int(max_gap_days, "max_gap_days", "open_archive", min_value=0)
    P.daily.check(daily, "open_archive")
    files = _expand_paths(paths, "open_archive")
    requested = _check_fields(fields, "open_archive")
    south_north_west_east = _check_region(region)
    candidates, seen = [], {}
    with _small_chunk_cache():
        for path in _progress(files, progress):
            candidates.extend(_recognised_in(path, chunks, seen))
    chosen = _choose_fields(requested, candidates, files, seen)
    arrays, duplicates = {}, 0
    for field in chosen:
        pieces = [_sorted_in_time(_canonical_array(c), c.path)
                  for c in candidates if c.field == field]
        arrays[field], dropped = _drop_duplicate_times(_join_pieces(field, pieces), files)
        duplicates = max(duplicates, dropped)
    ds = _merge_fields(arrays, files)
    ds = _to_daily(ds, hour=hour, how=daily, files=files)
    if south_north_west_east is not None:
        ds = subset_region(ds, south_north_west_east, source=_describe(files))
    ds, report = apply_missing_data_policy(ds, max_missing_fraction=max_missing_fraction,
                                           max_gap_days=max_gap_days,
                                           source=_describe(files))
    report["n_duplicate_times_dropped"] = int(duplicates)
    if chunks:
        ds = ds.chunk({k: v for k, v in chunks.items() if k in ds.dims})
    ds.attrs = {"source_files": "; ".join(files), "missing_data": json.dumps(report)}
    return ds


def open_target(path, *, time=None, fields=None) -> xr.Dataset:
    """Open one forecast or target field file, on any grid and convention.

    Parameters
    ----------
    path : str or os.PathLike
        One NetCDF file or ``.zarr`` directory.
    time : str, optional
        ISO 8601 valid time to select. Required when the file holds several times;
        a date alone (``"2024-05-03"``) selects the only time of that day.
    fields : sequence of str, optional
        As in :func:`open_archive`.

    Returns
    -------
    xarray.Dataset
        Canonical, with a ``time`` dim of length one (NaT when the file has no time).
    """
    files = _expand_paths(path, "open_target")
    if len(files) != 1:
        raise AnalogsInputError(f"open_target needs exactly one file; {path!s} gives "
                                f"{len(files)}: {_describe(files)}")
    (file,) = files
    requested = _check_fields(fields, "open_target")
    dataset = _open_file(file, None)
    candidates = _recognise(file, dataset)
    chosen = _choose_fields(requested, candidates, files,
                            {file: sorted(str(v) for v in dataset.data_vars)})
    arrays = {field: _canonical_array(next(c for c in candidates if c.field == field),
                                      time_optional=True) for field in chosen}
    ds = _merge_fields(arrays, files)
    ds = _select_time(ds, time, file)
    ds.attrs = {"source_files": file}
    return ds


def regrid_to(ds: xr.Dataset, lat, lon) -> xr.Dataset:
    """Bilinear interpolation of a canonical field to the grid ``(lat, lon)``.

    Linear in latitude and longitude (``xarray.Dataset.interp``, scipy ``interpn``).
    A global source grid is wrapped periodically in longitude. Target points may lie
    up to half a source grid step outside the source extent (extrapolated linearly);
    anything further raises :class:`AnalogsInputError` naming both extents.

    Parameters
    ----------
    ds : xarray.Dataset
        Fields with ``lat`` and ``lon`` dims (any longitude convention or order).
    lat, lon : 1-D arrays of degrees
        Target grid, for example a store's grid.
    """
    ds = normalise_grid(ds)
    lat = np.asarray(lat, dtype=float)
    lon = _wrap_lon(np.asarray(lon, dtype=float))
    source = ds.attrs.get("source_files", "the field")
    src_lat, src_lon = ds["lat"].values, ds["lon"].values
    half_lat = 0.5 * _step(src_lat)
    half_lon = 0.5 * _step(src_lon)
    periodic = src_lon.size > 1 and abs(src_lon[-1] - src_lon[0] + 2 * half_lon - 360.0) < 1e-6
    lat_ok = (lat.min() >= src_lat[0] - half_lat - 1e-9
              and lat.max() <= src_lat[-1] + half_lat + 1e-9)
    lon_ok = periodic or (lon.min() >= src_lon[0] - half_lon - 1e-9
                          and lon.max() <= src_lon[-1] + half_lon + 1e-9)
    if not (lat_ok and lon_ok):
        raise AnalogsInputError(
            f"{source}: the field covers lat {src_lat[0]:g} to {src_lat[-1]:g}, lon "
            f"{src_lon[0]:g} to {src_lon[-1]:g}, but the target grid needs lat "
            f"{lat.min():g} to {lat.max():g}, lon {lon.min():g} to {lon.max():g}")
    if periodic:
        ds = xr.concat([ds.isel(lon=[-1]).assign_coords(lon=src_lon[-1:] - 360.0), ds,
                        ds.isel(lon=[0]).assign_coords(lon=src_lon[:1] + 360.0)], dim="lon",
                       data_vars="all", coords="minimal", join="override")
    out = ds.interp(lat=lat, lon=lon, method="linear", kwargs={"fill_value": None})
    out["lat"].attrs.update(_LAT_ATTRS)
    out["lon"].attrs.update(_LON_ATTRS)
    for name in out.data_vars:
        out[name].attrs = dict(ds[name].attrs)
    out.attrs = dict(ds.attrs)
    return out


def normalise_grid(obj):
    """Sort ``lat`` ascending and put ``lon`` in [-180, 180) ascending.

    Works on a Dataset or DataArray with ``lat`` / ``lon`` dims. A descending
    coordinate is reversed silently; a non-monotonic one is sorted with a warning;
    longitudes that repeat after wrapping (0 and 360) keep their first occurrence,
    with a warning. Values move with their coordinates, so nothing is interpolated.
    """
    source = obj.attrs.get("source_files", "the field")
    lat = obj["lat"].values.astype(float)
    if lat.size > 1 and not np.all(np.diff(lat) > 0):
        if np.all(np.diff(lat) < 0):
            obj = obj.isel(lat=slice(None, None, -1))
        else:
            warnings.warn(f"{source}: latitude is not monotonic; it is sorted for you",
                          UserWarning, stacklevel=2)
            obj = obj.sortby("lat")
        if np.any(np.diff(obj["lat"].values) == 0):
            raise AnalogsInputError(f"{source}: latitude has repeated values; expected "
                                    "each grid latitude once")
    wrapped = _wrap_lon(obj["lon"].values)
    # A grid rolled across the wrap point (0-360 cut at 180, or a regional 0-360 grid
    # crossing 0) has at most one step against its direction: a convention, not disorder.
    steps = np.diff(wrapped)
    monotonic = (steps < 0).sum() <= 1 or (steps > 0).sum() <= 1
    obj = obj.assign_coords(lat=obj["lat"].values.astype(float), lon=wrapped)
    if not monotonic:
        warnings.warn(f"{source}: longitude is not monotonic; it is sorted for you",
                      UserWarning, stacklevel=2)
    _, first = np.unique(wrapped, return_index=True)
    if first.size < wrapped.size:
        warnings.warn(f"{source}: {wrapped.size - first.size} longitude(s) repeat after "
                      "wrapping to [-180, 180); the first of each is kept",
                      UserWarning, stacklevel=2)
    if first.size < wrapped.size or np.any(np.diff(wrapped) <= 0):
        order = first[np.argsort(wrapped[first], kind="stable")]
        obj = obj.isel(lon=order)
    obj["lat"].attrs = dict(_LAT_ATTRS)
    obj["lon"].attrs = dict(_LON_ATTRS)
    return obj


def subset_region(ds, region, *, source="the archive"):
    """Cut ``ds`` to ``region = (south, north, west, east)`` in degrees.

    West > east selects a box crossing the date line. Raises
    :class:`AnalogsInputError` when the box holds no grid point.
    """
    south, north, west, east = _check_region(region)
    lat, lon = ds["lat"].values, ds["lon"].values
    lat_mask = (lat >= south) & (lat <= north)
    west_w, east_w = _wrap_lon(np.array([west]))[0], _wrap_lon(np.array([east]))[0]
    if east == 180.0:
        east_w = 180.0
    if west <= east:
        lon_mask = (lon >= west_w) & (lon <= east_w) if west_w <= east_w else (
            (lon >= west_w) | (lon <= east_w))
    else:
        lon_mask = (lon >= west_w) | (lon <= east_w)
    if not lat_mask.any() or not lon_mask.any():
        raise AnalogsInputError(
            f"region (south, north, west, east) = ({south:g}, {north:g}, {west:g}, "
            f"{east:g}) selects no grid point of {source}, which covers lat "
            f"{lat.min():g} to {lat.max():g}, lon {lon.min():g} to {lon.max():g}")
    return ds.isel(lat=np.flatnonzero(lat_mask), lon=np.flatnonzero(lon_mask))


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------

_NETCDF_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n")


def _expand_paths(paths, owner):
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    try:
        items = [os.fspath(p) for p in paths]
    except TypeError:
        raise AnalogsInputError(f"{owner} needs a file path or a list of paths; got "
                                f"{paths!r}") from None
    files = []
    for item in items:
        if item.rstrip("/").endswith(".zarr"):
            matches = [item.rstrip("/")]
        elif os.path.isdir(item):
            matches = sorted(p for p in glob.glob(os.path.join(item, "*"))
                             if p.endswith((".nc", ".nc4", ".netcdf", ".zarr")))
            if not matches:
                raise AnalogsInputError(f"{item}: directory holds no *.nc or *.zarr file")
        elif glob.has_magic(item):
            matches = sorted(glob.glob(item))
            if not matches:
                raise AnalogsInputError(f"{item}: pattern matches no file")
        else:
            matches = [item]
        files.extend(matches)
    if not files:
        raise AnalogsInputError(f"{owner} needs at least one file; got none")
    return files


def _recognised_in(path, chunks, seen):
    """The supported variables of one file (a warning when it has none)."""
    dataset = _open_file(path, chunks)
    found = _recognise(path, dataset)
    seen[path] = sorted(str(v) for v in dataset.data_vars)
    if not found:
        warnings.warn(f"{path}: no supported variable found (variables: "
                      f"{', '.join(seen[path]) or 'none'}); file skipped",
                      UserWarning, stacklevel=3)
    return found


#: HDF5 chunk cache per open file while an archive is opened, bytes. The default (64 MB)
#: holds a whole year of a 0.25-degree field per file: 4.6 GB for 80 files (measured);
#: 8 MB still kept one 7 MB chunk per file (0.6 GB). Every pass of the build reads each
#: chunk once, so a cache smaller than a chunk costs no time (measured).
ARCHIVE_CHUNK_CACHE = 1 * 2**20


@contextlib.contextmanager
def _small_chunk_cache():
    import netCDF4
    previous = netCDF4.get_chunk_cache()
    netCDF4.set_chunk_cache(ARCHIVE_CHUNK_CACHE, previous[1], previous[2])
    try:
        yield
    finally:
        netCDF4.set_chunk_cache(*previous)


def _open_file(path, chunks):
    """Open one file with xarray (lazily); raise a one-line error when it cannot."""
    if not os.path.exists(path):
        raise AnalogsInputError(f"{path}: no such file")
    open_chunks = {} if chunks else None
    if path.endswith(".zarr"):
        try:
            return xr.open_zarr(path, chunks=open_chunks)
        except ImportError:
            raise AnalogsInputError(f"{path}: reading Zarr needs the 'zarr' package "
                                    "(pip install zarr)") from None
        except (OSError, ValueError, KeyError) as err:
            raise AnalogsInputError(f"{path}: cannot be read as Zarr ({_one_line(err)})"
                                    ) from None
    if os.path.isdir(path):
        raise AnalogsInputError(f"{path}: is a directory; expected a NetCDF file or a "
                                "directory ending in .zarr")
    with open(path, "rb") as handle:
        magic = handle.read(8)
    if not any(magic.startswith(m) for m in _NETCDF_MAGIC):
        hint = " (GRIB: convert it to NetCDF first)" if magic.startswith(b"GRIB") else ""
        raise AnalogsInputError(f"{path}: not a NetCDF file{hint}; expected NetCDF-3, "
                                "NetCDF-4 or a .zarr directory")
    try:
        # The engine is named: letting xarray guess imports every installed backend
        # (MetPy's among them), measured 5.6 s against 0.9 s per process.
        dataset = xr.open_dataset(path, chunks=open_chunks, engine="netcdf4")
    except ValueError as err:
        if "decode time" not in str(err):
            raise AnalogsInputError(f"{path}: cannot be read as NetCDF, the file may be "
                                    f"truncated or damaged ({_one_line(err)})") from None
        raise AnalogsInputError(_undecodable_times(path)) from None
    except (OSError, RuntimeError, KeyError, IndexError) as err:
        raise AnalogsInputError(f"{path}: cannot be read as NetCDF, the file may be "
                                f"truncated or damaged ({_one_line(err)})") from None
    try:
        # Reading the coordinates here catches truncated files early and cheaply.
        for name in dataset.coords:
            if dataset[name].ndim <= 1:
                dataset[name].values
    except (OSError, ValueError, RuntimeError, KeyError, IndexError) as err:
        raise AnalogsInputError(f"{path}: cannot be read as NetCDF, the file may be "
                                f"truncated or damaged ({_one_line(err)})") from None
    _check_not_truncated(path, dataset)
    return dataset


def _undecodable_times(path):
    """The message for a time axis xarray cannot decode (out of range, bad units)."""
    with xr.open_dataset(path, decode_times=False, engine="netcdf4") as raw:
        coords = [(str(k), c) for k, c in raw.variables.items()
                  if "since" in str(c.attrs.get("units", "")) and c.ndim <= 1]
        if not coords:
            return f"{path}: time values cannot be decoded as dates"
        name, coord = coords[0]
        values = np.atleast_1d(np.asarray(coord.values, dtype=float))
        return (f"{path}: time {name!r} cannot be decoded as dates (units "
                f"{coord.attrs.get('units')!r}, calendar "
                f"{coord.attrs.get('calendar', 'standard')!r}, values {np.nanmin(values):g} "
                f"to {np.nanmax(values):g}); expected dates between 1678 and 2262 in CF "
                "units such as 'hours since 1900-01-01'")


def _check_not_truncated(path, dataset):
    """A NetCDF-3 file cut short opens fine; its size gives it away."""
    encoding_sizes = 0
    for var in dataset.variables.values():
        encoding_sizes += int(np.prod(var.shape)) * np.dtype(
            var.encoding.get("dtype", var.dtype)).itemsize
    with open(path, "rb") as handle:
        classic = handle.read(4) in (b"CDF\x01", b"CDF\x02", b"CDF\x05")
    if classic and os.path.getsize(path) < encoding_sizes:
        raise AnalogsInputError(f"{path}: file is shorter than its header promises "
                                f"({os.path.getsize(path)} < {encoding_sizes} bytes); "
                                "it is probably truncated")


def _one_line(err):
    return " ".join(str(err).split()) or type(err).__name__


def _describe(files):
    return ", ".join(files) if len(files) <= 4 else (
        f"{', '.join(files[:3])} and {len(files) - 3} more")


def _progress(files, progress):
    if not progress or len(files) < 2:
        return files
    from tqdm.auto import tqdm
    return tqdm(files, desc="opening files", unit="file")


# ---------------------------------------------------------------------------
# recognising variables and choosing fields
# ---------------------------------------------------------------------------

def _check_fields(fields, owner):
    if fields is None:
        return None
    if isinstance(fields, str):
        fields = [fields]
    fields = list(dict.fromkeys(fields))
    for field in fields:
        if field not in SUPPORTED_FIELDS:
            raise AnalogsInputError(
                f"The 'fields' parameter of {owner} must list names among "
                f"{', '.join(SUPPORTED_FIELDS)}. Got {field!r} instead.")
    if not fields:
        raise AnalogsInputError(f"The 'fields' parameter of {owner} must name at least "
                                "one field. Got an empty list instead.")
    return fields


def _recognise(path, dataset):
    """Candidates for each canonical field among the data variables of one file."""
    by_standard, by_name = [], []
    for name, var in dataset.data_vars.items():
        if var.ndim < 2:
            continue
        standard = str(var.attrs.get("standard_name", "")).strip().lower()
        if standard in _STANDARD_NAMES:
            by_standard.append(_Candidate(path, dataset, str(name),
                                          _STANDARD_NAMES[standard], None))
            continue
        field, level = _field_from_name(str(name))
        if field is not None:
            by_name.append(_Candidate(path, dataset, str(name), field, level))
    found, taken = [], set()
    for candidate in by_standard + by_name:
        if candidate.field not in taken:
            taken.add(candidate.field)
            found.append(candidate)
    return found


def _field_from_name(name):
    lowered = name.lower()
    for field, names in _SHORT_NAMES.items():
        if lowered in names:
            return field, None
    match = _SUFFIXED_NAME.match(lowered)
    if match:
        stem, level = match.group(1), float(match.group(2))
        for field, names in _SHORT_NAMES.items():
            wanted = FIELD_LEVEL_HPA[field]
            if stem in names and wanted is not None and level == wanted:
                return field, level
    return None, None


def _choose_fields(requested, candidates, files, seen):
    found = {c.field for c in candidates}
    variables = "; ".join(f"{os.path.basename(p)}: {', '.join(v) or 'none'}"
                          for p, v in seen.items())
    if requested is None:
        if "z500" not in found:
            raise AnalogsInputError(
                f"no 500 hPa height variable (standard_name geopotential_height or "
                f"geopotential, or a name like z, hgt, zg) in {_describe(files)} "
                f"(variables: {variables})")
        moisture = [f for f in MOISTURE_PREFERENCE if f in found][:1]
        return ["z500"] + moisture
    missing = [f for f in requested if f not in found]
    if missing:
        raise AnalogsInputError(
            f"field {missing[0]!r} not found in {_describe(files)} (variables: "
            f"{variables}); expected {_expected_names(missing[0])}")
    return [f for f in SUPPORTED_FIELDS if f in requested]


def _expected_names(field):
    standards = [s for s, f in _STANDARD_NAMES.items() if f == field]
    return (f"standard_name {' or '.join(standards)}, or a variable named "
            f"{', '.join(_SHORT_NAMES[field])}")


# ---------------------------------------------------------------------------
# one variable of one file -> canonical DataArray
# ---------------------------------------------------------------------------

_LAT_ATTRS = coordinate_attrs("lat", "units", "standard_name", "long_name")
_LON_ATTRS = coordinate_attrs("lon", "units", "standard_name", "long_name")
_TIME_ATTRS = {"standard_name": "time", "long_name": "valid time (UTC)"}


def _canonical_array(candidate, *, time_optional=False):
    ds, name, path, field = candidate.dataset, candidate.name, candidate.path, candidate.field
    da = ds[name]
    where = f"{path}: variable {name!r}"
    lat_dim, lat = _find_axis(da, _LAT_NAMES, "latitude", ("degrees_north", "degree_north",
                                                           "degrees_n", "degree_n"), where)
    lon_dim, lon = _find_axis(da, _LON_NAMES, "longitude", ("degrees_east", "degree_east",
                                                            "degrees_e", "degree_e"), where)
    time_dim, times = _find_time(da, where, optional=time_optional)
    da, level_known = _select_level(da, field, candidate.implied_level_hpa, where,
                                    keep=(lat_dim, lon_dim, time_dim))
    extra = [d for d in da.dims if d not in (lat_dim, lon_dim, time_dim)]
    too_big = [d for d in extra if da.sizes[d] != 1]
    if too_big:
        raise AnalogsInputError(
            f"{where} has extra dimension(s) {', '.join(too_big)}; expected only time, "
            "latitude, longitude and a pressure level")
    if extra:
        da = da.isel({d: 0 for d in extra})
    da = da.drop_vars(list(da.coords))
    if time_dim is None:
        da = da.expand_dims(time=1)
        time_dim = "time"
    da = da.transpose(time_dim, lat_dim, lon_dim)
    da = da.rename({time_dim: "_t", lat_dim: "_y", lon_dim: "_x"}).rename(
        {"_t": "time", "_y": "lat", "_x": "lon"})
    da = da.assign_coords(time=times, lat=lat, lon=lon)
    if not np.issubdtype(da.dtype, np.floating):
        da = da.astype("float32")
    da = _convert_units(da, ds[name].attrs, field, where)
    if field == "z500" and not level_known:
        low, high = _sample_range(da)
        lo_ok, hi_ok = _Z500_PLAUSIBLE_GPM
        if not (lo_ok <= low and high <= hi_ok):
            raise AnalogsInputError(
                f"{where} has no pressure level and its values ({low:.0f} to {high:.0f} "
                f"gpm) do not look like 500 hPa heights ({lo_ok:.0f}-{hi_ok:.0f} gpm); "
                "select the 500 hPa level or add a level coordinate")
        warnings.warn(f"{where} has no pressure level; taken as 500 hPa height since its "
                      f"values ({low:.0f} to {high:.0f} gpm) fit", UserWarning, stacklevel=3)
    da.attrs = dict(FIELD_ATTRS[field])
    da.name = field
    da = normalise_grid(da.assign_attrs(source_files=path))
    da.attrs = dict(FIELD_ATTRS[field])
    da["time"].attrs = dict(_TIME_ATTRS)
    return da


def _matches(coord, names, standard_name, units):
    return (str(coord.name).lower() in names
            or str(coord.attrs.get("standard_name", "")).lower() == standard_name
            or str(coord.attrs.get("units", "")).lower() in units)


def _find_axis(da, names, standard_name, units, where):
    """(dim name, 1-D float values) of the latitude or longitude axis of ``da``."""
    for key in list(da.dims) + [c for c in da.coords if c not in da.dims]:
        if key not in da.coords:
            continue
        coord = da.coords[key]
        if not _matches(coord, names, standard_name, units):
            continue
        stated = str(coord.attrs.get("units", "")).strip().lower()
        if stated and not stated.startswith("deg"):
            continue  # projected x / y in metres, not a latitude-longitude axis
        if coord.ndim != 1:
            raise AnalogsInputError(
                f"{where}: {standard_name} {key!r} is {coord.ndim}-D; expected a regular "
                "latitude-longitude grid with 1-D coordinates (regrid it first)")
        values = np.asarray(coord.values, dtype=float)
        if not np.all(np.isfinite(values)):
            raise AnalogsInputError(f"{where}: {standard_name} {key!r} has missing values")
        if standard_name == "latitude" and np.abs(values).max() > 90.0 + 1e-6:
            raise AnalogsInputError(
                f"{where}: latitude {key!r} reaches {np.abs(values).max():g}; expected "
                "degrees north within [-90, 90]")
        return coord.dims[0], values
    raise AnalogsInputError(
        f"{where} has no {standard_name} coordinate; expected one named "
        f"{' or '.join(names[:3])} or with standard_name {standard_name}")


def _is_time_coord(name, coord):
    return (str(name).lower() in _TIME_NAMES
            or str(coord.attrs.get("standard_name", "")).lower() == "time"
            or str(coord.attrs.get("axis", "")).upper() == "T"
            or np.issubdtype(coord.dtype, np.datetime64))


def _find_time(da, where, *, optional):
    """(dim name or None, datetime64[ns] values) of the time axis of ``da``.

    A time dimension is preferred; otherwise a scalar time coordinate (``valid_time``
    before ``time``, since GRIB-derived files keep the reference time in ``time``)
    gives the one valid time. With neither, ``optional`` gives NaT.
    """
    dims = [(not np.issubdtype(da.coords[d].dtype, np.datetime64), str(d)) for d in da.dims
            if d in da.coords and _is_time_coord(d, da.coords[d])]
    if dims:
        dim = sorted(dims)[0][1]
        return dim, _as_datetime64(da.coords[dim], where)
    scalars = [(str(k) != "valid_time", str(k)) for k, c in da.coords.items()
               if c.ndim == 0 and _is_time_coord(k, c)]
    if scalars:
        name = sorted(scalars)[0][1]
        return None, _as_datetime64(da.coords[name], where)
    if optional:
        return None, np.array(["NaT"], dtype="datetime64[ns]")
    raise AnalogsInputError(
        f"{where} has no time dimension; expected one named time or valid_time, or "
        "with standard_name time")


def _as_datetime64(coord, where):
    values = np.atleast_1d(coord.values)
    if np.issubdtype(values.dtype, np.datetime64):
        return values.astype("datetime64[ns]")
    try:
        index = xr.CFTimeIndex(values)
    except (TypeError, ValueError):
        raise AnalogsInputError(
            f"{where}: time coordinate {coord.name!r} is not decodable as dates "
            f"(units {coord.attrs.get('units', 'missing')!r}); expected CF units such as "
            "'hours since 1900-01-01'") from None
    try:
        return index.to_datetimeindex(unsafe=True).values.astype("datetime64[ns]")
    except (ValueError, TypeError, OverflowError) as err:
        if "overflow" in str(err).lower():
            raise AnalogsInputError(
                f"{where}: times run from {index.min()} to {index.max()}, out of the range "
                "of dates this tool handles (1678 to 2262); check the time units") from None
        raise AnalogsInputError(f"{where}: time calendar {index.calendar!r} cannot be "
                                f"mapped to the standard calendar ({_one_line(err)})"
                                ) from None


def _level_coords(da):
    """Coordinates of ``da`` that look like pressure levels."""
    found = []
    for key, coord in da.coords.items():
        if coord.ndim > 1:
            continue
        units = str(coord.attrs.get("units", "")).strip().lower()
        named = str(key).lower() in _LEVEL_NAMES
        standard = str(coord.attrs.get("standard_name", "")).lower() == "air_pressure"
        z_axis = (str(coord.attrs.get("axis", "")).upper() == "Z"
                  and units in _HPA_UNITS | _PA_UNITS)
        if named or standard or z_axis:
            found.append(str(key))
    return found


def _levels_in_hpa(coord, where):
    values = np.atleast_1d(np.asarray(coord.values, dtype=float))
    units = str(coord.attrs.get("units", "")).strip().lower()
    if units in _HPA_UNITS:
        return values
    if units in _PA_UNITS:
        return values / 100.0
    guess = "Pa" if np.nanmax(values) > 1100.0 else "hPa"
    warnings.warn(f"{where}: level coordinate {coord.name!r} has "
                  f"{'no units' if not units else f'unknown units {units!r}'}; taken as "
                  f"{guess} from its values ({_list(values)})", UserWarning, stacklevel=4)
    return values / 100.0 if guess == "Pa" else values


def _select_level(da, field, implied_level, where, keep):
    """Select the field's pressure level; return (array, whether a level was known)."""
    wanted = FIELD_LEVEL_HPA[field]
    keys = [k for k in _level_coords(da) if k not in keep]
    if not keys:
        if wanted is None or implied_level is not None:
            return da, True
        if field == "q850":
            warnings.warn(f"{where} has no pressure level; taken as {wanted:g} hPa",
                          UserWarning, stacklevel=4)
            return da, True
        return da, False
    key = next((k for k in keys if k in da.dims), keys[0])
    coord = da.coords[key]
    levels = _levels_in_hpa(coord, where)
    if wanted is None:
        if key in da.dims and da.sizes[key] > 1:
            raise AnalogsInputError(
                f"{where} is a single-level field but has {da.sizes[key]} levels in "
                f"{key}=[{_list(levels)}]; expected one level")
        return (da.isel({key: 0}) if key in da.dims else da), True
    hits = np.flatnonzero(np.abs(levels - wanted) < 0.5)
    if hits.size == 0:
        raise AnalogsInputError(f"{where}: no {wanted:g} hPa level in "
                                f"{key}=[{_list(levels)}]")
    if key in da.dims:
        da = da.isel({key: int(hits[0])})
    return da, True


def _list(values):
    return ", ".join(f"{v:g}" for v in np.atleast_1d(values))


def _normal_units(units):
    """Lower-case, single-spaced units with ``**``/``^`` powers and ``/`` rewritten."""
    text = str(units).strip().lower().replace("**", "").replace("^", "")
    text = text.replace("°", "deg").replace("degrees_", "degrees ").replace("deg_", "deg")
    text = re.sub(r"\s+", " ", text)
    replacements = {"kg/kg": "kg kg-1", "g/kg": "g kg-1", "m2/s2": "m2 s-2",
                    "kg/m2": "kg m-2", "kg.m-2": "kg m-2", "m2.s-2": "m2 s-2",
                    "kg.kg-1": "kg kg-1", "g.kg-1": "g kg-1"}
    return replacements.get(text, text)


def _convert_units(da, attrs, field, where):
    raw = attrs.get("units")
    units = _normal_units(raw) if raw is not None else ""
    table = _UNIT_TABLE[field]
    if units in table:
        factor, offset = table[units]
    else:
        inferred = _infer_units(da, field)
        stated = "no units" if not units else f"unrecognised units {raw!r}"
        canonical = FIELD_ATTRS[field]["units"]
        if inferred is None:
            low, high = _sample_range(da)
            raise AnalogsInputError(
                f"{where} has {stated} and its values ({low:.4g} to {high:.4g}) do not "
                f"say which; set its units attribute (e.g. units='{canonical}'); accepted: "
                f"{', '.join(sorted(table))}")
        warnings.warn(f"{where} has {stated}; {inferred!r} inferred from the magnitude "
                      "of its values", UserWarning, stacklevel=4)
        factor, offset = table[_normal_units(inferred)]
    if factor != 1.0:
        da = da * factor
    if offset != 0.0:
        da = da + offset
    return da


def _infer_units(da, field):
    low, high = _sample_range(da)
    if not np.isfinite(low):
        return None
    for (lo, hi), units in _INFERENCE[field]:
        if lo <= low and high <= hi:
            if units == "g kg-1" and high < _G_PER_KG_MIN_MAX:
                continue
            if field == "pwat" and high < 1.0:
                continue
            return units
    return None


def _sample_range(da):
    """Min and max over the first and last time steps (cheap even for big archives)."""
    steps = sorted({0, da.sizes["time"] - 1}) if "time" in da.dims else None
    sample = da.isel(time=steps) if steps is not None else da
    values = np.asarray(sample.values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return np.nan, np.nan
    return float(finite.min()), float(finite.max())


# ---------------------------------------------------------------------------
# missing data
# ---------------------------------------------------------------------------

#: Dates listed in the ``days_dropped`` entry of the missing-data report.
_REPORTED_DAYS = 20


def apply_missing_data_policy(ds, *, max_missing_fraction=0.1, max_gap_days=2,
                              source="the archive"):
    """Handle missing (NaN) values of a canonical archive explicitly.

    Grid points missing on every day (a land/sea mask) stay NaN: the EOF stage leaves
    them out. At the other points, per field: a day missing more than
    ``max_missing_fraction`` of them, or all of them, is dropped; runs of at most
    ``max_gap_days`` consecutive missing days at a point are filled by linear
    interpolation in time (gaps measured on the time coordinate, so a dropped day counts
    towards the run); days still missing after that
    are dropped. Calendar days absent from a daily time axis are counted, not invented.
    Dask arrays stay lazy; the NaN counts (one value per day and per point) are computed.

    Returns
    -------
    (xarray.Dataset, dict)
        The archive and a report: ``days_dropped`` (first 20 dates), ``n_days_dropped``,
        ``n_values_filled``, ``n_missing_calendar_days``, ``all_nan_points``.
    """
    times = pd.DatetimeIndex(ds["time"].values)
    names = list(ds.data_vars)
    n_points = ds.sizes["lat"] * ds.sizes["lon"]
    per_day, per_point = _nan_counts(ds)
    masks = {n: per_point[n] == ds.sizes["time"] for n in names}
    for name in names:
        if masks[name].all():
            raise AnalogsInputError(f"{name} in {source}: every value is missing (NaN); "
                                    "expected a field with valid values")
    missing = {n: per_day[n] - int(masks[n].sum()) for n in names}
    heavy = np.zeros(times.size, dtype=bool)
    for name in names:
        valid_points = n_points - int(masks[name].sum())
        heavy |= (missing[name] > max_missing_fraction * valid_points) | (
            missing[name] >= valid_points)
    keep = np.flatnonzero(~heavy)
    partial = [n for n in names if missing[n][keep].sum() > 0]
    filled_count = 0
    if partial and keep.size:
        ds = ds.isel(time=keep)
        days = ((ds["time"].values - ds["time"].values[0]) / np.timedelta64(1, "D")
                ).astype(float)
        for name in partial:
            da = ds[name]
            if da.chunks is not None:
                da = da.chunk({"time": -1})
            ds[name] = xr.apply_ufunc(
                _fill_short_gaps, da, input_core_dims=[["time"]],
                output_core_dims=[["time"]], kwargs={"days": days,
                                                     "max_span": max_gap_days + 1.0},
                dask="parallelized", output_dtypes=[da.dtype], keep_attrs=True,
            ).transpose(*da.dims)
        after, _ = _nan_counts(ds[partial])
        left = np.zeros(keep.size, dtype=bool)
        residuals = {}
        for name in partial:
            residuals[name] = after[name] - int(masks[name].sum())
            left |= residuals[name] > 0
        for name in partial:  # values filled on the days that stay
            filled = missing[name][keep] - residuals[name]
            filled_count += int(filled[~left].sum())
        dropped_days = np.sort(np.concatenate([np.flatnonzero(heavy), keep[left]]))
        ds = ds.isel(time=np.flatnonzero(~left))
    else:
        dropped_days = np.flatnonzero(heavy)
        if dropped_days.size:
            ds = ds.isel(time=keep)
    if ds.sizes["time"] == 0:
        raise AnalogsInputError(
            f"{source}: every day has more than {max_missing_fraction:g} of its grid "
            "points missing (NaN) or gaps longer than max_gap_days; no day is usable")
    dropped = times[dropped_days]
    report = {"days_dropped": [f"{t:%Y-%m-%d}" for t in dropped[:_REPORTED_DAYS]],
              "n_days_dropped": int(dropped.size),
              "n_values_filled": int(filled_count),
              "n_missing_calendar_days": _missing_calendar_days(times),
              "all_nan_points": int(np.logical_or.reduce([masks[n] for n in names]).sum())}
    if dropped.size or filled_count:
        warnings.warn(
            f"{source}: missing values: {dropped.size} day(s) dropped"
            f"{' (' + ', '.join(report['days_dropped'][:3]) + (', ...' if dropped.size > 3 else '') + ')' if dropped.size else ''}"
            f", {filled_count} value(s) filled by linear interpolation in time",
            UserWarning, stacklevel=3)
    return ds, report


def _fill_short_gaps(values, *, days, max_span):
    """Linear interpolation in time of NaN runs whose valid neighbours are at most
    ``max_span`` days apart; time is the last axis, ``days`` its coordinate in days.

    Runs at the start or end (one neighbour missing) stay NaN.
    """
    values = np.array(values, copy=True)
    moved = np.moveaxis(values, -1, 0)
    valid = ~np.isnan(moved)
    n = moved.shape[0]
    index = np.arange(n).reshape((n,) + (1,) * (moved.ndim - 1))
    before = np.maximum.accumulate(np.where(valid, index, -1), axis=0)
    after = np.flip(np.minimum.accumulate(np.flip(np.where(valid, index, n), 0), axis=0), 0)
    inside = ~valid & (before >= 0) & (after < n)
    low, high = np.clip(before, 0, n - 1), np.clip(after, 0, n - 1)
    span = days[high] - days[low]
    fill = inside & (span <= max_span + 1e-9)
    if fill.any():
        weight = np.where(fill, (days[index] - days[low]) / np.where(span > 0, span, 1.0), 0.0)
        start = np.take_along_axis(moved, low, axis=0)
        end = np.take_along_axis(moved, high, axis=0)
        moved[fill] = (start + weight * (end - start))[fill]
    return values


def _nan_counts(ds):
    """({field: NaN count per day}, {field: NaN count per grid point}), computed in one pass."""
    counts = xr.Dataset()
    for name in ds.data_vars:
        isnan = ds[name].isnull()
        counts[f"{name}/day"] = isnan.sum(("lat", "lon"))
        counts[f"{name}/point"] = isnan.sum("time")
    counts = counts.compute()
    per_day = {n: counts[f"{n}/day"].values.astype(int) for n in ds.data_vars}
    per_point = {n: counts[f"{n}/point"].values.astype(int) for n in ds.data_vars}
    return per_day, per_point


def _missing_calendar_days(times):
    """Calendar days absent between the first and last day of a daily time axis."""
    if times.size < 2:
        return 0
    days = times.normalize()
    step = pd.Series(days).diff().dropna().median()
    if step != pd.Timedelta(days=1):
        return 0
    span = (days[-1] - days[0]) // pd.Timedelta(days=1) + 1
    return int(span - days.unique().size)


# ---------------------------------------------------------------------------
# joining files and fields, time handling
# ---------------------------------------------------------------------------

def _join_pieces(field, pieces):
    if len(pieces) == 1:
        return pieces[0]
    first = pieces[0]
    for piece in pieces[1:]:
        if (piece.sizes["lat"] != first.sizes["lat"] or piece.sizes["lon"] != first.sizes["lon"]
                or not np.allclose(piece["lat"], first["lat"], atol=1e-4)
                or not np.allclose(piece["lon"], first["lon"], atol=1e-4)):
            raise AnalogsInputError(
                f"{field}: files are on different grids ({first.sizes['lat']}x"
                f"{first.sizes['lon']} and {piece.sizes['lat']}x{piece.sizes['lon']}); "
                "expected every file of the archive on one grid")
    pieces = [p.assign_coords(lat=first["lat"], lon=first["lon"]) for p in pieces]
    joined = xr.concat(pieces, dim="time", join="override", coords="minimal",
                       compat="override")
    order = np.argsort(joined["time"].values, kind="stable")
    if np.any(np.diff(order) != 1):
        joined = joined.isel(time=order)
    joined.attrs = dict(FIELD_ATTRS[field])
    return joined


def _merge_fields(arrays, files):
    names = list(arrays)
    ref = arrays[names[0]]
    for name in names[1:]:
        other = arrays[name]
        if (other.sizes["lat"] != ref.sizes["lat"] or other.sizes["lon"] != ref.sizes["lon"]
                or not np.allclose(other["lat"], ref["lat"], atol=1e-4)
                or not np.allclose(other["lon"], ref["lon"], atol=1e-4)):
            raise AnalogsInputError(
                f"{names[0]} and {name} in {_describe(files)} are on different grids; "
                "expected both fields on one grid")
        arrays[name] = other.assign_coords(lat=ref["lat"], lon=ref["lon"])
    times = [pd.DatetimeIndex(arrays[n]["time"].values) for n in names]
    common = times[0]
    for index in times[1:]:
        common = common.intersection(index)
    if any(len(index) != len(common) for index in times):
        warnings.warn(f"{', '.join(names)} in {_describe(files)} cover different times; "
                      f"only the {len(common)} common times are kept",
                      UserWarning, stacklevel=3)
        for name in names:
            keep = np.flatnonzero(pd.DatetimeIndex(arrays[name]["time"].values).isin(common))
            arrays[name] = arrays[name].isel(time=keep)
    ds = xr.Dataset({n: arrays[n] for n in names})
    ds["time"].attrs = dict(_TIME_ATTRS)
    return ds


def _sorted_in_time(da, path):
    """Sort the time axis of one file's variable, with a warning when it was disordered."""
    times = da["time"].values
    if times.size > 1 and np.any(times[1:] < times[:-1]):
        warnings.warn(f"{path}: time of {da.name} is not monotonic; it is sorted for you",
                      UserWarning, stacklevel=3)
        da = da.isel(time=np.argsort(times, kind="stable"))
    return da


def _drop_duplicate_times(da, files):
    """(array without repeated times, how many were dropped); the first of each is kept."""
    duplicated = pd.DatetimeIndex(da["time"].values).duplicated(keep="first")
    if duplicated.any():
        warnings.warn(f"{duplicated.sum()} repeated time(s) of {da.name} in "
                      f"{_describe(files)}; the "
                      "first occurrence of each is kept", UserWarning, stacklevel=3)
        da = da.isel(time=np.flatnonzero(~duplicated))
    return da, int(duplicated.sum())


def _to_daily(ds, *, hour, how, files):
    """One value a day at ``hour`` UTC; daily and coarser archives pass through."""
    times = pd.DatetimeIndex(ds["time"].values)
    if len(times) < 2:
        return ds
    step = pd.Series(times).diff().dropna().median()
    if step >= pd.Timedelta(days=1):
        if step < pd.Timedelta(days=2):
            hours = sorted(set(times.hour))
            if hours != [hour]:
                warnings.warn(f"daily values in {_describe(files)} are valid at "
                              f"{', '.join(f'{h:02d}' for h in hours)} UTC, not {hour:02d} "
                              "UTC; kept as they are", UserWarning, stacklevel=3)
        return ds
    if how == "instant":
        at_hour = (times.hour == hour) & (times.minute == 0) & (times.second == 0)
        if not at_hour.any():
            raise AnalogsInputError(
                f"none of the times in {_describe(files)} fall on {hour:02d} UTC (hours "
                f"found: {', '.join(f'{h:02d}' for h in sorted(set(times.hour)))}); "
                "choose another hour or daily='mean'")
        return ds.isel(time=np.flatnonzero(at_hour))
    day = xr.DataArray(times.floor("D").values, dims="time", name="day")
    daily = ds.groupby(day).mean("time", keep_attrs=True)
    daily = daily.rename({"day": "time"})
    daily = daily.assign_coords(time=daily["time"].values + np.timedelta64(hour, "h"))
    daily["time"].attrs = dict(_TIME_ATTRS)
    for name in ds.data_vars:
        daily[name].attrs = dict(ds[name].attrs)
    return daily.transpose("time", "lat", "lon")


def _select_time(ds, time, file):
    times = pd.DatetimeIndex(ds["time"].values)
    if time is None:
        if len(times) > 1:
            raise AnalogsInputError(
                f"{file} holds {len(times)} times from {times[0]:%Y-%m-%dT%H:%M} to "
                f"{times[-1]:%Y-%m-%dT%H:%M}; choose one with time='YYYY-MM-DDTHH:MM'")
        return ds
    try:
        wanted = pd.Timestamp(time)
    except (ValueError, TypeError):
        fail("time", "open_target", "an ISO 8601 date or time", time)
    if wanted.tzinfo is not None:
        wanted = wanted.tz_convert("UTC").tz_localize(None)
    hits = np.flatnonzero(times == wanted)
    if hits.size == 0 and isinstance(time, str) and len(time.strip()) <= 10:
        hits = np.flatnonzero(times.normalize() == wanted.normalize())
    if hits.size != 1:
        span = (f"{times[0]:%Y-%m-%dT%H:%M} to {times[-1]:%Y-%m-%dT%H:%M}"
                if times.notna().any() else "no valid time")
        raise AnalogsInputError(
            f"{file}: {'no' if hits.size == 0 else 'more than one'} time matches "
            f"{time!r}; the file holds {len(times)} time(s), {span}")
    return ds.isel(time=hits)


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------

def _wrap_lon(lon):
    """Longitudes in degrees wrapped to [-180, 180)."""
    return (np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0


def _step(values):
    return float(np.median(np.abs(np.diff(values)))) if np.size(values) > 1 else 0.0


def _check_region(region):
    if region is None:
        return None
    return check_box(region, "region", "open_archive")
