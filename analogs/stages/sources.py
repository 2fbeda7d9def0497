"""Open gridded archives and forecast fields and normalise them to the canonical fields.

Canonical form (DEVELOPERS.md, "Canonical conventions"): an ``xarray.Dataset`` with
dims ``(time, lat, lon)``; ``lat`` ascending in degrees north; ``lon`` ascending in
[-180, 180) degrees east; ``time`` datetime64[ns] UTC, one value a day; variables
``z500`` (500 hPa geopotential height, gpm) and at most one moisture field ``q850``
(850 hPa specific humidity, kg kg-1), ``td2m`` (2 m dewpoint, K) or ``pwat``
(precipitable water, kg m-2), each with ``units`` and ``long_name``. A target on a
curvilinear grid keeps dims ``(time, y, x)`` with 2-D ``lat`` / ``lon`` until
:func:`regrid_to`.

Files are NetCDF, Zarr or GRIB (cfgrib over ecCodes, one Dataset per hypercube of the
messages read). Variables are recognised by CF ``standard_name`` first, then by common short names;
units are read from the ``units`` attribute by pint with cf-xarray's CF / UDUNITS registry
(units of another quantity are refused) and, only where the attribute is missing and the
magnitude leaves no doubt, inferred with a warning. Every field then passes a physical
plausibility gate (:data:`PLAUSIBLE_RANGE`); missing and infinite values follow
:func:`apply_missing_data_policy`. Everything stays lazy (dask) when ``chunks`` is given:
the readers look at coordinates and at most a few time steps for unit inference.
"""

from __future__ import annotations

import contextlib
import ctypes
import functools
import glob
import json
import os
import re
import stat
import time
import warnings
from dataclasses import dataclass, replace
from typing import NamedTuple

import numpy as np
import pandas as pd
import xarray as xr
from xarray.backends import BackendArray
from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK
from xarray.core import indexing

from analogs._validation import check_box, check_float, check_int, fail
from analogs.constants import G0, WATER_DENSITY
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
#: Units are read by pint with cf-xarray's CF / UDUNITS registry (``cf_xarray.units``).
#: Meteorological spellings that grammar does not know, or reads as something else, are
#: rewritten first (keys in lower case): "mb" would be a millibarn, "c" the speed of
#: light, "k" Boltzmann's constant, "pa" a picoyear, and "degrees Celsius" an angle
#: times a temperature difference.
_UNIT_SPELLINGS = {
    "gpm": "m", "m gpm": "m", "gpdam": "dam", "geopotential meters": "m",
    "geopotential metres": "m", "geopotential meter": "m", "geopotential metre": "m",
    "k": "K", "degk": "K", "deg k": "K", "degrees k": "K", "degrees_k": "K",
    "degrees kelvin": "K", "c": "degC", "degc": "degC", "deg c": "degC",
    "degrees c": "degC", "degrees_c": "degC", "degree c": "degC", "degree_c": "degC",
    "degreesc": "degC", "degrees celsius": "degC", "degree celsius": "degC",
    "f": "degF", "degf": "degF", "deg f": "degF", "degrees f": "degF",
    "degrees fahrenheit": "degF", "fahrenheit": "degF",
    "pa": "Pa", "pascal": "Pa", "pascals": "Pa", "hpa": "hPa", "kpa": "kPa",
    "mb": "mbar", "mbar": "mbar", "millibar": "mbar", "millibars": "mbar",
}

#: Units common in archives, read without building the registry (about 0.7 s, most of
#: the time a report takes to read its days from the archive): after the spellings
#: above, what each measures and its (factor, offset) to that quantity's unit here (hPa,
#: m, m2 s-2, 1 for a ratio of masses, K, kg m-2; none for an angle). Anything else
#: goes to the registry; tests/test_sources.py checks every entry against it.
_COMMON_UNITS = {
    "Pa": ("pressure", 0.01, 0.0), "hPa": ("pressure", 1.0, 0.0),
    "mbar": ("pressure", 1.0, 0.0), "kPa": ("pressure", 10.0, 0.0),
    "m": ("length", 1.0, 0.0), "dam": ("length", 10.0, 0.0), "mm": ("length", 0.001, 0.0),
    "m2 s-2": ("geopotential", 1.0, 0.0), "m**2 s**-2": ("geopotential", 1.0, 0.0),
    "m^2 s^-2": ("geopotential", 1.0, 0.0), "m2/s2": ("geopotential", 1.0, 0.0),
    "kg kg-1": ("ratio", 1.0, 0.0), "kg/kg": ("ratio", 1.0, 0.0), "kg kg**-1": ("ratio", 1.0, 0.0),
    "g kg-1": ("ratio", 0.001, 0.0), "g/kg": ("ratio", 0.001, 0.0), "1": ("ratio", 1.0, 0.0),
    "K": ("temperature", 1.0, 0.0), "degC": ("temperature", 1.0, 273.15),
    "kg m-2": ("mass per area", 1.0, 0.0), "kg m**-2": ("mass per area", 1.0, 0.0),
    # Coordinates' units, looked at when levels are sought: no field, no pressure.
    "degrees_north": ("angle", None, None), "degrees_east": ("angle", None, None),
    "degree_north": ("angle", None, None), "degree_east": ("angle", None, None),
}

#: What each field's units must measure, in words, with examples of accepted units.
_EXPECTED_QUANTITY = {
    "z500": "a height (gpm, m, dam) or a geopotential (m2 s-2)",
    "q850": "a mass ratio (kg kg-1, g kg-1)",
    "td2m": "a temperature (K, degC)",
    "pwat": "a mass per area (kg m-2) or a depth of liquid water (mm)",
}

#: Physical plausibility gate: the range (canonical units) every value of a field must
#: lie in after its units are converted, whether or not its file states a level. Wider
#: than any observed value, narrower than any scale error of the units (dam, m2 s-2 or
#: g kg-1 mislabelled):
#:
#: - z500, 4000-6500 gpm: observed 500 hPa heights lie within about 4600-6000 gpm
#:   (common practice, no source); the 1976 US Standard Atmosphere puts 500 hPa at
#:   5574 m (checked against MetPy in the tests).
#: - q850, -0.001 to 0.05 kg kg-1: 0.05 is above saturation at 850 hPa for any
#:   temperature up to 35 degC (Bolton 1980 saturation vapour pressure; checked against
#:   MetPy in the tests), while observed 850 hPa values stay below about 0.025 (common
#:   practice, no source); reanalyses carry tiny negative values from numerical
#:   transport (from memory).
#: - td2m, 173.15-313.15 K (-100 to +40 degC): the lowest air temperature measured at the
#:   surface is -89.2 degC (Vostok, 1983) and the highest dew point reported about 35 degC
#:   (Dhahran, 2003); a dew point never exceeds the air temperature (WMO archive of
#:   weather and climate extremes, from memory).
#: - pwat, -0.5 to 100 kg m-2: the moistest tropical columns hold about 70-80 kg m-2
#:   (common practice, no source).
PLAUSIBLE_RANGE = {
    "z500": (4000.0, 6500.0),
    "q850": (-1e-3, 0.05),
    "td2m": (173.15, 313.15),
    "pwat": (-0.5, 100.0),
}

#: Scale errors of the units that may be converted, with a warning saying so, when the
#: stated units give implausible values and one of these gives plausible ones (the
#: windows of :data:`_INFERENCE` decide which, without overlap): heights in decametres
#: or geopotential labelled "m", specific humidity in g kg-1 labelled kg kg-1.
_SCALE_ALTERNATIVES = {"z500": ("gpm", "dam", "m2 s-2"), "q850": ("kg kg-1", "g kg-1")}
_UNIT_WORDS = {"gpm": "metres (gpm)", "dam": "decametres (dam)",
               "m2 s-2": "geopotential in m2 s-2 (height times g0)",
               "kg kg-1": "kilograms per kilogram (kg kg-1)",
               "g kg-1": "grams per kilogram (g kg-1)"}

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
    curvilinear: bool = False  # 2-D latitude / longitude accepted (targets; 15a)
    computed_from: str | None = None  # how a moisture field is computed (15a)
    laid_out: _LaidOut | None = None  # read as an earlier file of its layout (no dataset)


# ---------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------

def open_archive(paths, *, fields=None, region=None, hour=P.hour.default,
                 daily=P.daily.default, chunks=None, progress=False, max_missing_fraction=0.1,
                 max_gap_days=2, scratch=None, same_header=None) -> xr.Dataset:
    """Open one or many NetCDF / Zarr / GRIB files as a canonical daily archive.

    Parameters
    ----------
    paths : str, os.PathLike or iterable of them
        NetCDF files, GRIB / GRIB2 files (:func:`_open_grib`), ``.zarr`` directories,
        glob patterns, or plain directories (every ``*.nc``, ``*.nc4``, ``*.zarr`` and
        ``*.grib`` / ``*.grib2`` / ``*.grb`` / ``*.grb2`` inside). Files may hold one
        variable each (per-variable, per-year files) or several. A moisture field a
        file lacks is computed from others where the conversion is exact
        (:func:`_converted_moisture`, with a warning).
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
    scratch : callable ``(shape, dtype) -> writeable array``, optional
        With ``chunks`` (a whole number of days in time): each field is decoded from
        the files once, in one pass, into an array from ``scratch`` (the out-of-core
        build's memory-mapped scratch file), and the archive returned reads its chunks
        from there (:func:`_decoded_once`).
    same_header : dict, optional
        Filled with ``{file: earlier file}`` for each NetCDF file found to have the
        header of an earlier one (:func:`_header`: every variable's name, dims, dtype
        and attributes; read by its layout), so a caller can skip a look at its header.

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
    guard = read_guard(files)  # a file damaged or changed under the reads: named
    requested = _check_fields(fields, "open_archive")
    south_north_west_east = _check_region(region)
    candidates, seen, layouts = [], {}, []
    with _small_chunk_cache():
        candidates = _recognised_files(files, chunks, seen, layouts, progress)
    chosen = _choose_fields(requested, candidates, files, seen)
    if same_header is not None:
        same_header.update({c.path: c.laid_out.header_of for c in candidates
                            if c.laid_out is not None})
    _say_computed(chosen, candidates, _describe(files))
    arrays, duplicates, origins = {}, 0, {}
    for field in chosen:
        joined, origins[field] = _read_field(
            field, [c for c in candidates if c.field == field], chunks)
        arrays[field], dropped = _drop_duplicate_times(joined, files)
        duplicates = max(duplicates, dropped)
    ds = _merge_fields(arrays, files)
    ds = _to_daily(ds, hour=hour, how=daily, files=files)
    if south_north_west_east is not None:
        ds = subset_region(ds, south_north_west_east, source=_describe(files))
    with guard:  # the first pass over every value
        census = None
        if scratch is not None and _whole_chunks(chunks):
            ds, census = _decoded_once(ds, scratch, chunks)
        ds, report = apply_missing_data_policy(ds, max_missing_fraction=max_missing_fraction,
                                               max_gap_days=max_gap_days,
                                               source=_describe(files), origins=origins,
                                               census=census)
    guard.check_unchanged()
    report["n_duplicate_times_dropped"] = int(duplicates)
    if not chunks:
        _release_freed_memory()
    else:
        ds = ds.chunk({k: v for k, v in chunks.items() if k in ds.dims})
    ds.attrs = {"source_files": "; ".join(files), "missing_data": json.dumps(report)}
    return ds


def _whole_chunks(chunks):
    """Whether ``chunks`` is a dask layout by whole numbers of days (and of grid points)."""
    return bool(chunks) and set(chunks) <= {"time", "lat", "lon"} and all(
        isinstance(size, int) and size > 0 for size in chunks.values())


def _decoded_once(ds, scratch, chunks):
    """(``ds`` (lazy) with each field decoded from its files once, a time chunk at a
    time, into an array from ``scratch``, and read back from there chunk by chunk
    (:func:`analogs.stages.scratch.chunked_copy`); its missing-data census).

    The census (:func:`_missing_stats`) is taken from each chunk while it is in hand;
    every later pass over the archive (the climatology, the EOF's anomalies, tagging)
    reads plain values instead of decompressing and converting the files again: out of
    core the archive was decoded four times. The values are the lazy archive's own,
    computed by the same tasks, so no answer changes."""
    import uuid

    import dask

    from analogs.stages.scratch import chunked_copy, release_rows
    names, n_days = list(ds.data_vars), ds.sizes["time"]
    step = chunks.get("time", n_days)
    copies = {name: scratch(ds[name].shape, ds[name].dtype) for name in names}
    counted = {name: [] for name in names}
    for start in range(0, n_days, step):
        stop = min(start + step, n_days)
        for name, values in zip(names, dask.compute(*[ds[name].data[start:stop]
                                                        for name in names])):
            copies[name][start:stop] = values
            release_rows(copies[name], start, stop)
            counted[name].append(_missing_stats_in_memory(values))
    token = uuid.uuid4().hex
    census = {name: {"point": sum(part["point"] for part in parts),
                     **{key: np.concatenate([part[key] for part in parts])
                        for key in ("day", "inf", "min", "max")}}
              for name, parts in counted.items()}
    return ds.assign({name: (ds[name].dims, chunked_copy(
        copies[name], tuple(chunks.get(dim, -1) for dim in ds[name].dims),
        f"archive-{name}-{token}"), ds[name].attrs) for name in names}), census


def open_target(path, *, time=None, fields=None, members=False) -> xr.Dataset:
    """Open one forecast or target field file, on any grid and convention.

    Parameters
    ----------
    path : str or os.PathLike
        One NetCDF or GRIB file or ``.zarr`` directory. A curvilinear grid (2-D
        latitude and longitude) is kept as it is, dims ``(time, y, x)``; :func:`regrid_to`
        brings it to a regular grid.
    time : str, optional
        ISO 8601 valid time to select. Required when the file holds several times;
        a date alone (``"2024-05-03"``) selects the only time of that day. ``"all"``
        keeps every time, ``"START/END"`` (ISO 8601 interval, either end may be left
        open) the times in that range (:func:`select_valid_times`).
    fields : sequence of str, optional
        As in :func:`open_archive`; ``None`` gives ``z500`` and every moisture field the
        file holds or gives by conversion (the preferred one first).
    members : bool
        Keep an ensemble-member dimension (:func:`member_dimension`) as ``member``;
        without it a member dimension is refused as an extra dimension.

    Returns
    -------
    xarray.Dataset
        Canonical, with a ``time`` dim of length one (NaT when the file has no time),
        or the times asked for; with ``members``, dims ``(member, time, lat, lon)``
        when the file holds more than one member.
    """
    files = _expand_paths(path, "open_target")
    if len(files) != 1:
        raise AnalogsInputError(f"open_target needs exactly one file; {path!s} gives "
                                f"{len(files)}: {_describe(files)}")
    (file,) = files
    requested = _check_fields(fields, "open_target")
    parts, names = _open_parts(file, None)  # GRIB: one Dataset per hypercube (15a)
    candidates = [replace(c, curvilinear=True) for c in _candidates_in(file, parts)]
    chosen = _choose_fields(requested, candidates, files, {file: names})
    _say_computed(chosen, candidates, file)
    member = next(filter(None, map(member_dimension, parts)), None) if members else None
    arrays = {field: _target_array(next(c for c in candidates if c.field == field), member)
              for field in chosen}
    if requested is None:  # every other moisture field the file gives (15a)
        arrays.update(_other_moisture(arrays, candidates, member))
    ds = _merge_fields(arrays, files)
    ds = select_valid_times(ds, time, file)  # one time, "all" or START/END (15b)
    ds = _checked_target_values(ds, file, {c.field: c.name for c in candidates})  # 13b
    ds.attrs = {"source_files": file}
    return ds


class DayLayouts:
    """What :func:`target_days` learns of an archive's files as it reads them, for the
    next files: the layouts each field was read by (``by_field``, lists by field) and
    the layout made of each first file of a kind (``of_file``, by path; None where the
    file has none)."""

    def __init__(self):
        self.by_field: dict[str, list] = {}
        self.of_file: dict[str, object] = {}


def target_days(path, days, field, layouts: DayLayouts) -> xr.DataArray:
    """``field`` of one archive file at ``days`` (increasing datetime64 values among
    the file's times), as ``open_target(path, time="FIRST/LAST", fields=[field])`` gives it at
    those days: each kind of file is recognised once, its layout (:func:`_file_layout`)
    made from one opening by xarray, and that file and every later file laid out as one
    ``field`` was read from (``layouts``, which this extends; :func:`_header`) are read
    at those days alone (:func:`_read_laid_out`) and pass open_target's gates: the
    plausibility of the first and last time steps, then of every value read, with
    infinite values made missing (:func:`_checked_target_values`). Anything else about
    a file (its recognition warns, it is not plain NetCDF, its layout lacks the field),
    or a gate it fails, sends it the full way (:func:`open_target`), which says what
    is wrong."""
    days = np.asarray(days, dtype="datetime64[ns]")
    fits, laid_out = _days_by_layout(path, days, field, layouts.by_field.get(field))
    if not fits:
        # The first file of its kind: its layout, from one opening by xarray, reads it
        # too when it gives the field, says nothing and passes the gates.
        if path not in layouts.of_file:
            layouts.of_file[path] = _first_layout(path)
        layout = layouts.of_file[path]
        if layout is not None:
            given = [candidate for candidate, _ in layout.variables]
            # Every field the file gives is a candidate of its layout: open_target's
            # refusal, without reading the file again.
            _choose_fields([field], given, [path], {path: list(layout.names)})
            _, laid_out = _days_by_layout(path, days, field, [layout])
            if laid_out is not None:
                layouts.by_field.setdefault(field, []).append(layout)
    return laid_out if laid_out is not None else _days_read_in_full(path, days, field)


def laid_out_days(path, days, fields, layouts: DayLayouts) -> dict | None:
    """Each of ``fields`` a file laid out as one :func:`target_days` read before holds
    (``layouts``; :func:`_laid_out_candidates`), at those of ``days`` (datetime64
    values) among its times, as target_days reads it at them; a field it holds at none
    of them is left out. None for a file laid out as none of them (read it by
    target_days, after a look at its times): a file that fits is looked at once for
    its times and read once, where the look at its times alone would open it too."""
    known = {id(layout): layout for field in fields
             for layout in layouts.by_field.get(field, ())}
    found = _laid_out_candidates(path, list(known.values()), {})
    if found is None:
        return None
    days = np.asarray(days, dtype="datetime64[ns]")
    parts = {}
    for candidate in found:
        if candidate.field in fields:
            inside = np.unique(days[np.isin(days, candidate.laid_out.times)])
            if inside.size:
                part = _laid_out_days(candidate, inside)
                parts[candidate.field] = (part if part is not None else
                                          _days_read_in_full(path, inside, candidate.field))
    return parts


def held_times(path) -> tuple[pd.DatetimeIndex | None, frozenset]:
    """(the times of a NetCDF file's time axis, decoded as the archive reader decodes
    them: xarray's CF coders, then :func:`_as_datetime64`; the file's variable names),
    read from its header with netCDF4 (a tenth of what opening it with xarray costs).
    No times when it has no time axis that decodes to dates or cannot be read (then it
    is not read for a report's maps). netCDF4's own date conversion refuses the
    mixed Julian-Gregorian calendar before 1582, as in the reference date of old
    reanalysis files ("hours since 1-1-1"), which xarray decodes."""
    import netCDF4
    try:
        with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
            handle.set_auto_maskandscale(False)
            for name in ("time", "valid_time", "t"):
                if name in handle.variables and handle.variables[name].ndim == 1:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")  # the full reading says it
                        decoded = _decoded_time(handle, name)
                    times = _as_datetime64(xr.DataArray(decoded, name=name),
                                           f"{path}: variable {name!r}")
                    return pd.DatetimeIndex(times), frozenset(handle.variables)
    except (AnalogsInputError, OSError, ValueError, AttributeError, TypeError,
            OverflowError):
        pass
    return None, frozenset()


def _days_read_in_full(path, days, field):
    """``field`` of a file at ``days`` read the full way (:func:`open_target` over their
    span), which converts, warns or refuses as for any file."""
    span = f"{pd.Timestamp(days.min()).isoformat()}/{pd.Timestamp(days.max()).isoformat()}"
    part = open_target(path, time=span, fields=[field])[field]
    return part.sel(time=part["time"].isin(days))


def _days_by_layout(path, days, field, layouts):
    """(whether the file is plainly laid out as one of ``layouts``
    (:func:`_laid_out_candidates`), ``field`` of it at ``days`` read by that layout and
    gated as a target (:func:`_laid_out_days`), or None when it does not fit, lacks
    the field or fails a gate)."""
    found = _laid_out_candidates(path, layouts, {})
    candidate = next((c for c in found or () if c.field == field), None)
    return found is not None, None if candidate is None else _laid_out_days(candidate, days)


def _first_layout(path):
    """The layout of a plain NetCDF file (:func:`_file_layout`) whose recognition warns
    of nothing (a conversion said, a variable skipped: the full way says it); else None."""
    if not _plain_netcdf(path):  # the layout's own candidates, not curvilinear
        return None
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        try:
            parts, names = _open_parts(path, None)
            layout = _file_layout(path, _candidates_in(path, parts), names)
        except Exception:  # read the full way, which says what is wrong
            return None
    return None if said else layout


def _laid_out_days(candidate, days):
    """A laid-out candidate's values at ``days``, gated as a target; None when a day is
    not among its times or a gate or the reading fails (see :func:`target_days`). The
    days and the first and last time steps are read in one opening of the file, each
    chunk of it decompressed once."""
    times = candidate.laid_out.times
    steps = np.minimum(np.searchsorted(times, days), times.size - 1)
    if not np.array_equal(times[steps], days):
        return None
    read = np.union1d(steps, [0, times.size - 1])
    layout = candidate.laid_out.layout
    low_ok, high_ok = PLAUSIBLE_RANGE[candidate.field]
    try:
        values = _read_laid_out(candidate.path, layout, (read, slice(None), slice(None)))
        low, high = _finite_range(values[[0, -1]])  # _sample_range's steps
        if np.isfinite(low) and not (low_ok <= low and high <= high_ok):
            return None  # open_target converts a scale error or refuses the file
        values = values[np.searchsorted(read, steps)]
        # The piece _laid_out_piece describes, at the days.
        piece = xr.DataArray(values, dims=("time", "lat", "lon"), coords={
            "time": xr.Variable("time", times[steps], dict(_TIME_ATTRS)),
            "lat": layout.lat, "lon": layout.lon}, name=candidate.field,
            attrs=dict(layout.attrs))
        low, high = _finite_range(values)
        if not np.isinf(values).any() and (np.isnan(low) or low_ok <= low and high <= high_ok):
            piece.attrs.pop("units_in_file", None)  # all _checked_target_values would do
            return piece
        return _checked_target_values(xr.Dataset({candidate.field: piece}), candidate.path,
                                      {candidate.field: candidate.name})[candidate.field]
    except (AnalogsInputError, OSError, RuntimeError, ValueError):
        return None


def regrid_to(ds: xr.Dataset, lat, lon, *, partial=False) -> xr.Dataset:
    """Bilinear interpolation of a canonical field to the grid ``(lat, lon)``.

    Linear in latitude and longitude (``xarray.Dataset.interp``, scipy ``interpn``).
    A global source grid is wrapped periodically in longitude. Target points may lie
    up to half a source grid step outside the source extent (extrapolated linearly);
    anything further raises :class:`AnalogsInputError` naming both extents, or with
    ``partial=True`` comes back as NaN (the caller measures the uncovered share; see
    :func:`analogs.workflows.find.on_store_grid`).

    Parameters
    ----------
    ds : xarray.Dataset
        Fields with ``lat`` and ``lon`` dims (any longitude convention or order);
        other dims (``member``, ``time``) are carried along.
    lat, lon : 1-D arrays of degrees
        Target grid, for example a store's grid.
    partial : bool
        Leave target points outside the source extent NaN instead of refusing.

    A field on a curvilinear grid (2-D ``lat`` and ``lon`` over dims ``(y, x)``, as
    :func:`open_target` gives a Lambert conformal or other projected grid) is
    interpolated linearly on a triangulation of its points instead
    (:func:`_regrid_curvilinear`).
    """
    if ds["lat"].ndim == 2:
        return _regrid_curvilinear(ds, lat, lon, partial=partial)
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
    if not (lat_ok and lon_ok) and not partial:
        raise AnalogsInputError(
            f"{source}: the field covers lat {src_lat[0]:g} to {src_lat[-1]:g}, lon "
            f"{src_lon[0]:g} to {src_lon[-1]:g}, but the target grid needs lat "
            f"{lat.min():g} to {lat.max():g}, lon {lon.min():g} to {lon.max():g}")
    if periodic:
        ds = xr.concat([ds.isel(lon=[-1]).assign_coords(lon=src_lon[-1:] - 360.0), ds,
                        ds.isel(lon=[0]).assign_coords(lon=src_lon[:1] + 360.0)], dim="lon",
                       data_vars="all", coords="minimal", join="override")
    # xarray interpolates one axis at a time (scipy interp1d): "extrapolate" makes the
    # half step beyond the edge linear, as promised above; None gave NaN there (15b).
    out = ds.interp(lat=lat, lon=lon, method="linear", kwargs={"fill_value": "extrapolate"})
    if not (lat_ok and lon_ok):  # partial: NaN beyond half a step outside (15b)
        inside_lat = ((lat >= src_lat[0] - half_lat - 1e-9)
                      & (lat <= src_lat[-1] + half_lat + 1e-9))
        inside_lon = periodic | ((lon >= src_lon[0] - half_lon - 1e-9)
                                 & (lon <= src_lon[-1] + half_lon + 1e-9))
        out = out.where(xr.DataArray(inside_lat[:, None] & inside_lon[None, :],
                                     dims=("lat", "lon")))
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
    if (obj["lat"].dtype == np.float64 and obj["lon"].dtype == np.float64
            and np.array_equal(obj["lon"].values, wrapped)):
        obj = obj.copy(deep=False)  # already so (every archive file): no index rebuilt
    else:
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
                             if p.lower().endswith((".nc", ".nc4", ".netcdf", ".zarr")
                                                   + GRIB_SUFFIXES))
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


def _recognised_in(path, chunks, seen, layouts):
    """The supported variables of one file (a warning when it has none). A file laid out
    as one read before (``layouts``, :func:`_laid_out_candidates`) is looked at by its
    header alone; a NetCDF file read in full adds its layout when its reading is plain."""
    found = _laid_out_candidates(path, layouts, seen)
    if found is not None:
        return found
    parts, seen[path] = _open_parts(path, chunks)
    found = _candidates_in(path, parts)
    if not found:
        warnings.warn(f"{path}: no supported variable found (variables: "
                      f"{', '.join(seen[path]) or 'none'}); file skipped",
                      UserWarning, stacklevel=3)
    else:
        layout = _file_layout(path, found, seen[path])
        if layout is not None:
            layouts.append(layout)
    return found


#: Files from which the later half of an archive's files is recognised in a forked child
#: (:func:`_looks_in_child`) while this process recognises the first half.
MIN_FILES_LOOKED_IN_CHILD = 8
#: NetCDF files the child leaves to the caller (read in full: each field's first file of
#: its half) after which it answers at once: an archive whose files are not laid out
#: alike would otherwise be read in full twice, the caller waiting for the child's pass.
MAX_LEFT_BY_CHILD = 4


def _recognised_files(files, chunks, seen, layouts, progress) -> list:
    """The candidates of every file, recognised in order (:func:`_recognised_in`): the
    same decisions as one pass over them, with ``seen`` and ``layouts`` filled as it
    fills them. With at least :data:`MIN_FILES_LOOKED_IN_CHILD` files (on Linux), a
    forked child looks at the later half meanwhile (:func:`_looks_in_child`, its own
    layouts); this process then recognises only the files it leaves (read in full,
    warning, not dates, after an error) and makes the others' candidates from its own
    layouts (:func:`_as_looked`). Recognition holds the GIL (0.45 s for 80 files):
    the child gives it a second core."""
    from analogs import _forked
    half = len(files) // 2 if len(files) >= MIN_FILES_LOOKED_IN_CHILD else len(files)
    candidates, looked, laid_out_as = [], {}, {}
    with (_forked.beside(_looks_in_child, files[half:], chunks)
          if half < len(files) and _forked.can_fork() else contextlib.nullcontext()) as child:
        for index, path in enumerate(_progress(files, progress)):
            if index == half and child is not None:
                looked = _looks_from(child.answer(timeout=10.0 + 0.5 * len(files)), half)
            found = None if index not in looked else _as_looked(
                looked[index], path, seen, layouts, laid_out_as)
            if found is None:
                found = _recognised_in(path, chunks, seen, layouts)
            candidates.extend(found)
            laid_out_as.update((c.path, c.laid_out.header_of) for c in found
                               if c.laid_out is not None)
    return candidates


def _looks_in_child(files, chunks) -> bytes:
    """Recognise ``files`` in order as the caller would (:func:`_recognised_in`, with its
    own layouts: the same decisions), in a forked child; for each file laid out as an
    earlier one, send back the earlier file's path, each candidate's times and time
    chunk (:func:`_looks_from` reads them). A file read in full, one that warns, one
    whose times are not dates, and every file from an error on, or from the
    :data:`MAX_LEFT_BY_CHILD` + 1st so left, are left to the caller, which then meets
    the warning or the error itself. Files other than NetCDF (GRIB, Zarr) are skipped:
    never laid out, they add no layout."""
    from analogs import _forked
    seen, layouts, notes, times, left = {}, [], {}, [], 0
    for index, path in enumerate(files):
        if not _plain_netcdf(path):
            continue
        with warnings.catch_warnings(record=True) as said:
            warnings.simplefilter("always")
            try:
                found = _recognised_in(path, chunks, seen, layouts)
            except Exception:
                break
        laid_out = [candidate.laid_out for candidate in found]
        if said or not found or any(part is None or part.times.dtype.kind != "M"
                                    for part in laid_out):
            left += 1
            if left > MAX_LEFT_BY_CHILD:
                break
            continue
        notes[str(index)] = {"header_of": laid_out[0].header_of,
                             "chunks": [part.time_chunk for part in laid_out]}
        times.extend(xr.DataArray(part.times, dims="time", name=f"{index}/{k}")
                     for k, part in enumerate(laid_out))
    return _forked.arrays_to_bytes(times, notes)


def _looks_from(payload, first) -> dict:
    """{file index: (the earlier file's path, [(times, time chunk) of each candidate])}
    from :func:`_looks_in_child`'s bytes about the files from index ``first`` on; empty
    without an answer."""
    if payload is None:
        return {}
    from analogs import _forked
    arrays, notes = _forked.arrays_from_bytes(payload)
    times = {array.name: array.values for array in arrays}
    return {first + int(index): (note["header_of"], [
        (times[f"{index}/{k}"], chunk) for k, chunk in enumerate(note["chunks"])])
            for index, note in notes.items()}


def _as_looked(looked, path, seen, layouts, laid_out_as):
    """The candidates of ``path`` that the child found laid out as an earlier file
    (``looked``, of :func:`_looks_from`), made with this process's layout of that
    header as :func:`_laid_out_candidates` makes them; None when it has none. The
    child's earlier file may be one of its own half that this process found laid out
    as another (``laid_out_as``: file -> the file whose layout it took): the same
    header, so that file's layout."""
    header_of, parts = looked
    if not any(layout.path == header_of for layout in layouts):
        header_of = laid_out_as.get(header_of)
    fits = next((layout for layout in layouts if layout.path == header_of), None)
    if fits is None or len(fits.variables) != len(parts):
        return None
    return _as_laid_out(fits, path, parts, seen)


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
    _refuse_special_file(path)  # a FIFO or device would block the reads below
    open_chunks = {} if chunks else None
    if path.endswith(".zarr"):
        _check_zarr(path)
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
    _check_not_truncated(path, ((v.shape, v.encoding.get("dtype", v.dtype))
                                for v in dataset.variables.values()))
    return dataset


def _refuse_special_file(path):
    """Refuse a path that is neither a regular file nor a directory (a named pipe, a
    device, a socket): reading one may block for ever. ``os.stat`` looks without opening."""
    mode = os.stat(path).st_mode
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
        return
    kind = ("a named pipe (FIFO)" if stat.S_ISFIFO(mode) else
            "a character device" if stat.S_ISCHR(mode) else
            "a block device" if stat.S_ISBLK(mode) else
            "a socket" if stat.S_ISSOCK(mode) else "a special file")
    raise AnalogsInputError(f"{path}: is {kind}, not a regular file; expected a NetCDF "
                            "file or a .zarr directory")


def _zarr_floor():
    """The lowest zarr version the installed xarray reads (its own requirement), or 3."""
    from importlib import metadata

    from packaging.requirements import Requirement
    try:
        for text in metadata.requires("xarray") or ():
            requirement = Requirement(text)
            if requirement.name == "zarr":
                floors = [s.version for s in requirement.specifier if s.operator in (">=", ">")]
                if floors:
                    return floors[0]
    except (metadata.PackageNotFoundError, ValueError):
        pass
    return "3"


def _check_zarr(path):
    """Refuse Zarr reading without zarr-python, or with a version xarray cannot use."""
    from packaging.version import InvalidVersion, Version
    floor = _zarr_floor()
    try:
        import zarr
    except ImportError:
        raise AnalogsInputError(f"{path}: reading Zarr needs the 'zarr' package "
                                f"(pip install 'zarr>={floor}')") from None
    installed = str(getattr(zarr, "__version__", "0"))
    try:
        too_old = Version(installed) < Version(floor)
    except InvalidVersion:
        too_old = False
    if too_old:
        raise AnalogsInputError(
            f"{path}: reading Zarr needs zarr {floor} or later, the version the installed "
            f"xarray {xr.__version__} reads; zarr {installed} is installed "
            f"(pip install 'zarr>={floor}')")


def read_guard(paths):
    """A context that turns an error raised while archive data are read into one
    :class:`AnalogsInputError` naming the file: a damaged chunk of a NetCDF-4 file
    (netCDF4's "NetCDF: HDF error"), or a file changed or cut while it was being read.

    The data of an archive are read where they are computed (the missing-data pass, the
    climatology, the EOF passes), long after the files were opened; such errors carry
    no file name. On one, the files are looked at: one whose size, modification time or
    inode changed since the guard was made is named as changed; otherwise each NetCDF
    file is read through, and the first that cannot be read is named as damaged. When
    no file is at fault the error passes unchanged (it is not an input problem). A file
    changed without any error (HDF5 reads zeros past the end of a file cut short) is
    caught by ``check_unchanged()``, to call when the reads are done and before their
    results are kept.
    """
    try:
        files = _expand_paths(paths, "read_guard")
    except AnalogsInputError:
        files = []
    return _ReadGuard(files)


class _ReadGuard:
    def __init__(self, files):
        self.files = list(files)
        self.before = {f: _signature(f) for f in self.files}

    def check_unchanged(self):
        """Refuse when a file changed since the guard was made: a file cut or rewritten
        under a lazy read may give other values (HDF5 reads zeros past the end of a
        truncated file) without any error."""
        for path in self.files:
            if self.before.get(path) is not None and _signature(path) != self.before[path]:
                raise AnalogsInputError(
                    f"{path}: the file changed while it was being read (its size or "
                    "modification time differ from when it was opened), so the values "
                    "read may mix two versions; run again once it is complete and no "
                    "longer being written")

    def __enter__(self):
        return self

    def __exit__(self, kind, error, traceback):
        if error is None or isinstance(error, AnalogsInputError) or not isinstance(
                error, (OSError, RuntimeError, ValueError, KeyError, IndexError, EOFError)):
            return False
        message = _unreadable_file(self.files, self.before, error)
        if message is None:
            return False
        raise AnalogsInputError(message) from None


def _signature(path):
    """(inode, size, modification time) of a regular file; None for anything else."""
    try:
        info = os.stat(path)
    except OSError:
        return None
    return (info.st_ino, info.st_size, info.st_mtime_ns) if stat.S_ISREG(info.st_mode) else None


def _unreadable_file(files, before, error):
    """The message naming the file behind a read ``error``, or None."""
    for path in files:
        if before.get(path) is not None and _signature(path) != before[path]:
            return (f"{path}: the file changed while it was being read ({_one_line(error)}); "
                    "run again once it is complete and no longer being written")
    for path in files:
        problem = _damaged_data(path)
        if problem is not None:
            return (f"{path}: its data cannot be read ({problem}); the file is damaged "
                    "(a corrupt or missing chunk) or was cut short")
    return None


def _damaged_data(path):
    """The error met reading every value of a NetCDF file, chunk row by chunk row; None
    when it reads (or is not a NetCDF file)."""
    if _signature(path) is None:
        return None
    import netCDF4
    try:
        with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
            for variable in handle.variables.values():
                if variable.ndim == 0:
                    variable[...]
                    continue
                chunking = variable.chunking()
                step = chunking[0] if isinstance(chunking, list) else 1
                for start in range(0, variable.shape[0], max(int(step), 1)):
                    variable[start:start + step]
    except (OSError, RuntimeError, ValueError, KeyError, IndexError, EOFError) as err:
        return _one_line(err)
    return None


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


def _check_not_truncated(path, variables):
    """A NetCDF-3 file cut short opens fine; its size gives it away. ``variables``:
    the (shape, dtype in the file) of each of its variables."""
    encoding_sizes = sum(int(np.prod(shape)) * np.dtype(dtype).itemsize
                         for shape, dtype in variables)
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
# files laid out as one read before: looked at and read by netCDF4 directly
# ---------------------------------------------------------------------------
# An archive is many files of one layout (a year a file and variable). The first file of
# each layout is opened by xarray and passes every check (:func:`_canonical_array`);
# the others, when their header is the first's but for the times, are read by netCDF4
# into the same canonical pieces: the raw values decoded by xarray's own CF coders
# (_FillValue / missing_value, scale_factor / add_offset, _Unsigned), then the first's
# level, dims order, units conversion and grid order. Anything else about a file (a
# warning, an error, another header, times out of order) sends it the full way, so no
# file is read differently or refused otherwise (measured: opening a year file with
# xarray and making its piece cost about 37 ms against 2 ms for the header look).

@dataclass(frozen=True)
class _VariableLayout:
    """How a variable reaches the canonical axes, taken from the first file of its
    layout: the index into the variable (the pressure level and dims of length one;
    the time axis at ``time_axis``), the dims left (``dims``) and their order to (time,
    lat, lon), the rows and columns :func:`normalise_grid` takes (None: as they are),
    the units' conversion and the canonical piece's grid, attributes and dtype.
    ``file_attrs`` are the variable's attributes as xarray's reader takes them;
    ``fills`` the values its decoding turns into NaN when that decoding is a plain mask
    (:func:`_plain_mask`; None: decoded by xarray's coders)."""

    name: str
    time_dim: str
    key: tuple
    time_axis: int
    dims: tuple
    order: tuple
    rows: np.ndarray | None
    columns: np.ndarray | None
    lat: xr.Variable
    lon: xr.Variable
    attrs: dict
    file_attrs: dict
    factor: float
    offset: float
    dtype: np.dtype
    fills: tuple | None


@dataclass(frozen=True)
class _FileLayout:
    """A NetCDF file read in full: its header (:func:`_header`), the dims its
    variables' times run along with the kind of their decoded values (dates or cftime
    objects: which the full reading prefers as time), its variable names (for messages),
    each candidate with its :class:`_VariableLayout` and the file's path."""

    header: tuple
    time_dims: frozenset
    time_kinds: dict
    names: tuple
    variables: tuple
    path: str


@dataclass(frozen=True)
class _LaidOut:
    """A file read by the layout of an earlier one: the variable's layout, the file's own
    times, its time chunk in the file (the dask chunk of a lazy read, as xarray's) and
    the earlier file, whose header this file's is."""

    layout: _VariableLayout
    times: np.ndarray
    time_chunk: int
    header_of: str


def _plain_netcdf(path):
    """True for a regular file that begins as NetCDF does and is not named as GRIB: one
    netCDF4 may open for a header look (a named pipe would block it)."""
    if _signature(path) is None or path.lower().endswith(GRIB_SUFFIXES):
        return False
    with open(path, "rb") as handle:
        magic = handle.read(8)
    return any(magic.startswith(m) for m in _NETCDF_MAGIC)


def _exact(value):
    """``value`` in a form equal only to the same bytes (numpy values) or the same
    value (text, numbers)."""
    if isinstance(value, (np.ndarray, np.generic)):
        value = np.asarray(value)
        held = tuple(value.ravel().tolist()) if value.dtype.hasobject else value.tobytes()
        return value.dtype.str, value.shape, held
    return value


def _header(handle, time_dims):
    """What two files must share to be read the same way: the data model, the global
    ``coordinates`` attribute and every variable's name, dims, dtype, sizes other than
    along ``time_dims``, attributes, and values when it does not run along them. The
    time coordinates' units and calendar may differ (xarray writes each file's own):
    each file's times are decoded with its own."""
    handle.set_auto_maskandscale(False)
    handle.set_auto_chartostring(False)
    variables = tuple(
        (name, variable.dimensions, str(variable.dtype),
         tuple(n for d, n in zip(variable.dimensions, variable.shape) if d not in time_dims),
         tuple((k, _exact(variable.getncattr(k))) for k in variable.ncattrs()
               if name not in time_dims or k not in ("units", "calendar")),
         None if not time_dims.isdisjoint(variable.dimensions) else _exact(variable[...]))
        for name, variable in handle.variables.items())
    coordinates = handle.getncattr("coordinates") if "coordinates" in handle.ncattrs() else None
    return handle.data_model, _exact(coordinates), variables


def _file_layout(path, found, names):
    """The :class:`_FileLayout` of a file just read in full, for later files laid out
    the same way; None unless it is a NetCDF file whose candidates are plain (neither
    computed nor curvilinear, with a time dim) and reach the canonical axes without any
    warning or error (an error comes again, naming the file, if the field is read)."""
    if not _plain_netcdf(path) or any(c.computed_from or c.curvilinear for c in found):
        return None
    import netCDF4
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        try:
            axes = [_canonical_axes(c) for c in found]
            if any(a.time_dim is None for a in axes):
                return None
            time_dims = frozenset(a.time_dim for a in axes)
            # The header under netCDF4's lock; the layouts, which read through xarray
            # (taking that lock itself), after it.
            with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
                stored = {c.name: _stored_as(handle.variables[c.name]) for c in found}
                header = _header(handle, time_dims)
            variables = tuple((c, _variable_layout(c, a, *stored[c.name]))
                              for c, a in zip(found, axes))
        except Exception:  # read the full way, which says what is wrong
            return None
    if said:
        return None
    time_kinds = {dim: found[0].dataset[dim].dtype.kind for dim in time_dims}
    return _FileLayout(header, time_dims, time_kinds, tuple(names), variables, path)


def _stored_as(variable):
    """(dtype, attributes) of a netCDF4 variable as its file stores it."""
    return variable.dtype, {k: variable.getncattr(k) for k in variable.ncattrs()}


def _variable_layout(candidate, axes, dtype, file_attrs):
    """The :class:`_VariableLayout` of a candidate read in full with a time dim
    (``axes``: its :func:`_canonical_axes`; ``dtype``, ``file_attrs``: its variable as
    the file stores it, :func:`_stored_as`). The grid's order is normalise_grid's own,
    read off a probe holding each point's index."""
    piece = _canonical_array(candidate)
    dims = tuple(candidate.dataset[candidate.name].dims)
    kept = tuple(d for d in dims if d not in axes.selection)
    n_lat, n_lon = axes.lat.size, axes.lon.size
    probe = normalise_grid(xr.DataArray(
        np.arange(n_lat * n_lon).reshape(n_lat, n_lon), dims=("lat", "lon"),
        coords={"lat": axes.lat, "lon": _wrap_lon(axes.lon)}))
    if not (np.array_equal(probe["lat"].values, piece["lat"].values)
            and np.array_equal(probe["lon"].values, piece["lon"].values)):
        return None
    rows, columns = probe.values[:, 0] // n_lon, probe.values[0] % n_lon
    factor, offset = _conversion_of(piece.attrs["units_in_file"], candidate.field)
    return _VariableLayout(
        name=candidate.name, time_dim=axes.time_dim,
        key=tuple(axes.selection.get(d, slice(None)) for d in dims),
        time_axis=dims.index(axes.time_dim), dims=kept,
        order=tuple(kept.index(d) for d in (axes.time_dim, axes.lat_dim, axes.lon_dim)),
        rows=None if np.array_equal(rows, np.arange(n_lat)) else rows,
        columns=None if np.array_equal(columns, np.arange(n_lon)) else columns,
        lat=piece["lat"].variable, lon=piece["lon"].variable, attrs=dict(piece.attrs),
        file_attrs=file_attrs, factor=factor, offset=offset, dtype=piece.dtype,
        fills=_plain_mask(candidate.name, dtype, file_attrs)
        if (factor, offset) == (1.0, 0.0) and piece.dtype == dtype else None)


def _plain_mask(name, dtype, attrs):
    """The values xarray's CF decoding of a variable (``dtype`` and ``attrs`` in its
    file) turns into NaN when that decoding does nothing else: a float variable in
    native byte order, without scale_factor, add_offset or _Unsigned, keeps its dtype
    in xarray's CFMaskCoder, which sets NaN where a value equals a non-NaN value of
    _FillValue or missing_value. None for any other decoding, or several fill values
    (xarray warns then, as each file's decoding by its coders does too), or when
    xarray's decoding of a probe holding the fill values is not this mask."""
    dtype = np.dtype(dtype)
    if dtype.kind != "f" or not dtype.isnative or not {
            "scale_factor", "add_offset", "_Unsigned"}.isdisjoint(attrs):
        return None
    fills = {value for key in ("missing_value", "_FillValue") if key in attrs
             for value in np.ravel(attrs[key]) if not pd.isnull(value)}
    if len(fills) > 1:
        return None
    fills = tuple(fills)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        probe = np.array([*fills, 0.0, -1.5, 1e30, np.inf, np.nan], dtype=dtype)
        by_xarray = xr.conventions.decode_cf_variable(
            name, xr.Variable(("probe",), probe.copy(), attrs), stack_char_dim=False).values
    ours = _masked(probe, fills)
    same = by_xarray.dtype == ours.dtype and np.array_equal(
        by_xarray.view(f"u{dtype.itemsize}"), ours.view(f"u{dtype.itemsize}"))
    return fills if same else None


def _masked(values, fills):
    """``values`` with NaN set in place where a value equals one of ``fills``, as
    xarray's CFMaskCoder sets it in its copy (nothing written where none does)."""
    for value in fills:
        masked = values == value
        if masked.any():
            np.copyto(values, np.nan, where=masked)
    return values


def _laid_out_candidates(path, layouts, seen):
    """The candidates of a NetCDF file whose header is that of a file read before
    (:func:`_header`), each with its own times (decoded by xarray's CF coders, in
    order) and nothing opened by xarray; None when no layout fits or anything about the
    file is not plain (a warning, an error): it is then read in full, as any file."""
    if not layouts or not _plain_netcdf(path):
        return None
    import netCDF4
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        try:
            with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
                fits = _fitting_layout(handle, layouts)
                if fits is None:
                    return None
                if handle.data_model.startswith("NETCDF3"):
                    _check_not_truncated(path, ((v.shape, v.dtype)
                                                for v in handle.variables.values()))
                decoded = {dim: _decoded_time(handle, dim) for dim in fits.time_dims}
                if any(decoded[d].dtype.kind != fits.time_kinds[d] for d in decoded):
                    return None
                times = {d: _as_datetime64(xr.DataArray(v, name=d), f"{path}: variable {d!r}")
                         for d, v in decoded.items()}
                if any(t.size > 1 and np.any(t[1:] < t[:-1]) for t in times.values()):
                    return None  # the full reading warns (and sorts) as for any file
                chunks = {v.name: _time_chunk(handle.variables[v.name], v.time_axis)
                          for _, v in fits.variables}
        except Exception:  # read the full way, which says what is wrong
            return None
    if said:
        return None  # the full reading warns as it does for any file
    return _as_laid_out(fits, path, [(times[v.time_dim], chunks[v.name])
                                     for _, v in fits.variables], seen)


def _as_laid_out(fits, path, parts, seen):
    """The candidates of ``path``, a file with the header of ``fits``' file: each of its
    variables with its own (times, time chunk) of ``parts``, in ``fits.variables``'
    order, and nothing opened by xarray."""
    seen[path] = list(fits.names)
    return [replace(candidate, path=path, dataset=None,
                    laid_out=_LaidOut(variable, times, chunk, fits.path))
            for (candidate, variable), (times, chunk) in zip(fits.variables, parts)]


def _fitting_layout(handle, layouts):
    """The first of ``layouts`` whose header is the open file's, or None."""
    headers = {}
    for layout in layouts:
        if layout.time_dims not in headers:
            headers[layout.time_dims] = _header(handle, layout.time_dims)
        if headers[layout.time_dims] == layout.header:
            return layout
    return None


def _decoded_time(handle, dim):
    """The coordinate variable ``dim`` of an open file, decoded by xarray's CF coders
    from its raw values and attributes, as xarray's reader decodes it."""
    variable = handle.variables[dim]
    raw = xr.Variable((dim,), variable[...], {k: variable.getncattr(k)
                                              for k in variable.ncattrs()})
    return xr.conventions.decode_cf_variable(dim, raw, stack_char_dim=False)


def _time_chunk(variable, time_axis):
    """The length of a variable's chunks along time in its file (its whole length when
    it is not chunked): the dask chunk xarray's reader would give."""
    chunking = variable.chunking()
    whole = variable.shape[time_axis]
    return max(int(chunking[time_axis]), 1) if isinstance(chunking, list) else max(whole, 1)


def _laid_out_piece(candidate, chunks):
    """The canonical piece of a file read by its layout: read when its values are asked
    for (a report's days, :func:`_laid_out_days`), or chunk by chunk with ``chunks``."""
    laid_out = candidate.laid_out
    layout = laid_out.layout
    data = indexing.LazilyIndexedArray(_LaidOutArray(candidate.path, layout,
                                                     laid_out.times.size))
    piece = xr.DataArray(
        xr.Variable(("time", "lat", "lon"), data),
        coords={"time": xr.Variable("time", laid_out.times, dict(_TIME_ATTRS)),
                "lat": layout.lat, "lon": layout.lon},
        name=candidate.field, attrs=dict(layout.attrs))
    if not chunks:
        return piece
    # Named by the file as it is now (not by pickling the reader, dask's fallback).
    return piece.chunk({"time": laid_out.time_chunk}, token="-".join(map(str, (
        candidate.path, _signature(candidate.path), layout.name, laid_out.time_chunk))))


def _read_laid_out(path, layout, key):
    """The values of ``key`` (ints and slices over time, lat, lon; over time also an
    array of increasing time steps, read in one opening of the file) of a file's variable
    on the canonical axes: read by netCDF4 under the lock xarray's netCDF4 reader holds
    (HDF5 is not thread-safe), then :func:`_decoded`."""
    import netCDF4
    one_step = isinstance(key[0], (int, np.integer))
    rows = slice(key[0], key[0] + 1) if one_step else key[0]
    with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
        raw = _raw_values(handle, layout, rows)
    return _decoded(raw, layout)[(0 if one_step else slice(None),) + tuple(key[1:])]


def _read_laid_out_into(path, layout, out):
    """Every time step of a file's variable, read and decoded as :func:`_read_laid_out`
    reads them, into ``out``: straight from the file when they are stored as ``out``
    holds them (:func:`_read_stored_into`; then masked in place), else through
    netCDF4's array of the raw values."""
    import netCDF4
    with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path) as handle:
        raw = None if _read_stored_into(handle, layout, out) else _raw_values(
            handle, layout, slice(None))
    if raw is None:
        _masked(out, layout.fills)
    else:
        _decoded(raw, layout, out=out)


def _read_stored_into(handle, layout, out):
    """Read a file's variable (``handle``: open in netCDF4), every time step, straight
    into ``out`` by netCDF-C's ``nc_get_vara``, the call netCDF4 makes into an array of
    its own, when the values are stored on the canonical axes in ``out``'s dtype and
    their decoding is a plain mask (:func:`_plain_mask`, which the caller sets); False
    (nothing read) otherwise, or where netCDF4's library is out of reach."""
    library = _netcdf_c()
    variable = handle.variables[layout.name]
    if (library is None or layout.fills is None or layout.order != (0, 1, 2)
            or layout.rows is not None or layout.columns is not None
            or variable.dtype != out.dtype or not out.flags.c_contiguous
            or not all(isinstance(index, (int, np.integer)) or index == slice(None)
                       for index in layout.key)):
        return False
    start = [int(index) if isinstance(index, (int, np.integer)) else 0
             for index in layout.key]
    count = [1 if isinstance(index, (int, np.integer)) else size
             for index, size in zip(layout.key, variable.shape)]
    if int(np.prod(count)) != out.size:
        return False
    get, message = library
    sizes = ctypes.c_size_t * len(count)
    status = get(handle._grpid, variable._varid, sizes(*start), sizes(*count),
                 out.ctypes.data)
    if status != 0:  # the error netCDF4 raises for a failed read
        raise RuntimeError(message(status).decode("ascii"))
    return True


@functools.cache
def _netcdf_c():
    """(nc_get_vara, nc_strerror) of the netCDF-C library netCDF4 itself calls (found
    through netCDF4's extension module, whose dependencies the dynamic loader
    searches), or None. Called without the GIL, as netCDF4 calls the library: another
    thread runs Python while HDF5 decompresses (dask's threaded scheduler reads an
    out-of-core archive's chunks so), and holding netCDF4's lock
    (:mod:`analogs._netcdf_lock`), as every netCDF4 call of the package does, keeps any
    other HDF5 call from running beside it."""
    import netCDF4
    try:
        library = ctypes.CDLL(netCDF4._netCDF4.__file__)
        get, message = library.nc_get_vara, library.nc_strerror
    except (OSError, AttributeError):
        return None
    sizes = ctypes.POINTER(ctypes.c_size_t)
    get.argtypes = [ctypes.c_int, ctypes.c_int, sizes, sizes, ctypes.c_void_p]
    get.restype = ctypes.c_int
    message.argtypes, message.restype = [ctypes.c_int], ctypes.c_char_p
    return get, message


def _raw_values(handle, layout, rows):
    """The values a file (``handle``, open in netCDF4) holds of ``layout``'s variable at
    the time steps ``rows``, as stored (no masking or scaling)."""
    in_file = list(layout.key)
    in_file[layout.time_axis] = rows
    variable = handle.variables[layout.name]
    variable.set_auto_maskandscale(False)
    return variable[tuple(in_file)]


def _decoded(raw, layout, out=None):
    """Raw values of a file's variable (:func:`_raw_values`) decoded as xarray's reader
    decodes them (by its CF coders; a plain mask, :func:`_plain_mask`, is set in
    ``raw`` itself), then converted and put in order on the canonical axes as the
    first file of the layout was; written into ``out`` when given (in its dtype)."""
    if layout.fills is not None and raw.dtype == layout.dtype:
        values = _masked(raw, layout.fills)
    else:
        values = xr.conventions.decode_cf_variable(
            layout.name, xr.Variable(layout.dims, raw, layout.file_attrs),
            stack_char_dim=False).values
        if not np.issubdtype(values.dtype, np.floating):
            values = values.astype("float32")
        if layout.factor != 1.0:
            values = values * layout.factor
        if layout.offset != 0.0:
            values = values + layout.offset
    values = values.transpose(layout.order)
    if layout.rows is not None and layout.columns is not None:
        values = values[:, layout.rows[:, None], layout.columns]
    elif layout.rows is not None or layout.columns is not None:
        # Taken straight into ``out`` when it has the dtype (mode "clip": unbuffered;
        # every index is in range).
        axis, index = (1, layout.rows) if layout.rows is not None else (2, layout.columns)
        into = out if out is not None and out.dtype == values.dtype else None
        values = np.take(values, index, axis=axis, out=into, mode="clip")
    if out is None:
        return values
    if values is not out:
        out[...] = values
    return out


class _LaidOutArray(BackendArray):
    """A file's variable on the canonical axes, read by its layout (xarray's backend
    array: lazily indexed, chunked by dask with ``chunks``; picklable for distributed
    workers, which read the file themselves)."""

    __slots__ = ("path", "layout", "shape", "dtype")

    def __init__(self, path, layout, n_times):
        self.path, self.layout = path, layout
        self.shape = (n_times, layout.lat.size, layout.lon.size)
        self.dtype = layout.dtype

    def __getitem__(self, key):
        return indexing.explicit_indexing_adapter(
            key, self.shape, indexing.IndexingSupport.BASIC, self._read)

    def _read(self, key):
        return _read_laid_out(self.path, self.layout, key)


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
            if _misplaced(_STANDARD_NAMES[standard], var):
                continue
            by_standard.append(_Candidate(path, dataset, str(name),
                                          _STANDARD_NAMES[standard], None))
            continue
        field, level = _field_from_name(str(name))
        if field is not None and not _misplaced(field, var):
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
        held = {c.field for c in candidates if c.computed_from is None}
        moisture = ([f for f in MOISTURE_PREFERENCE if f in held]
                    or [f for f in MOISTURE_PREFERENCE if f in found])[:1]
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


class _Axes(NamedTuple):
    """Where a file's variable keeps the canonical axes: the dims of time (None for a
    scalar time), latitude and longitude with their values, the index taken along every
    other dim (the pressure level, extra dims of length one) and whether a level was
    known."""

    time_dim: str | None
    times: np.ndarray
    lat_dim: object
    lat: np.ndarray
    lon_dim: object
    lon: np.ndarray
    selection: dict
    level_known: bool


def _canonical_axes(candidate, *, time_optional=False) -> _Axes:
    """The :class:`_Axes` of a candidate (coordinates only, no data read), refused with
    one line naming the file and variable when they are not a grid in time."""
    ds, name, path, field = candidate.dataset, candidate.name, candidate.path, candidate.field
    da = ds[name]
    where = f"{path}: variable {name!r}"
    two_d = candidate.curvilinear
    lat_dim, lat = _find_axis(da, _LAT_NAMES, "latitude", ("degrees_north", "degree_north",
                                                           "degrees_n", "degree_n"), where,
                              two_d=two_d)
    lon_dim, lon = _find_axis(da, _LON_NAMES, "longitude", ("degrees_east", "degree_east",
                                                            "degrees_e", "degree_e"), where,
                              two_d=two_d)
    if two_d:
        lat_dim, lon_dim = _horizontal_dims(lat_dim, lon_dim, where)
    time_dim, times = _find_time(da, where, optional=time_optional)
    selection, level_known = _level_selection(da, field, candidate.implied_level_hpa, where,
                                              keep=(lat_dim, lon_dim, time_dim))
    extra = [d for d in da.dims if d not in (lat_dim, lon_dim, time_dim) and d not in selection]
    too_big = [d for d in extra if da.sizes[d] != 1]
    if too_big:
        described = [f"{d} (units {da[d].attrs['units']!r}, not a pressure)"
                     if d in da.coords and da[d].attrs.get("units") else d for d in too_big]
        raise AnalogsInputError(
            f"{where} has extra dimension(s) {', '.join(described)}; expected only time, "
            "latitude, longitude and a pressure level (in units of pressure: hPa, Pa, kPa)")
    return _Axes(time_dim, times, lat_dim, lat, lon_dim, lon,
                 {**selection, **{d: 0 for d in extra}}, level_known)


def _canonical_array(candidate, *, time_optional=False, check_sample=None):
    ds, name, path, field = candidate.dataset, candidate.name, candidate.path, candidate.field
    where = f"{path}: variable {name!r}"
    time_dim, times, lat_dim, lat, lon_dim, lon, selection, level_known = _canonical_axes(
        candidate, time_optional=time_optional)
    da = ds[name].isel(selection) if selection else ds[name]
    da = da.drop_vars(list(da.coords))
    if time_dim is None:
        da = da.expand_dims(time=1)
        time_dim = "time"
    da = _on_canonical_axes(da, (time_dim, lat_dim, lon_dim), times, lat, lon)
    if not np.issubdtype(da.dtype, np.floating):
        da = da.astype("float32")
    # Targets (time optional) pass the plausibility gate here, archives every day in the
    # one pass of apply_missing_data_policy (no extra read per file) (13b).
    da, units_in_file = _convert_units(
        da, ds[name].attrs, field, where, level_known=level_known,
        check_sample=time_optional if check_sample is None else check_sample)
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
    if lat.ndim == 1:
        da = normalise_grid(da.assign_attrs(source_files=path))
    da.attrs = dict(FIELD_ATTRS[field])
    if candidate.computed_from:
        da.attrs["comment"] = candidate.computed_from
    da.attrs["units_in_file"] = units_in_file  # taken off by open_archive / open_target
    da["time"].attrs = dict(_TIME_ATTRS)
    return da


def _matches(coord, names, standard_name, units):
    return (str(coord.name).lower() in names
            or str(coord.attrs.get("standard_name", "")).lower() == standard_name
            or str(coord.attrs.get("units", "")).lower() in units)


def _find_axis(da, names, standard_name, units, where, *, two_d=False):
    """(dim name, 1-D float values) of the latitude or longitude axis of ``da``; with
    ``two_d``, a 2-D coordinate gives (its two dim names, 2-D values)."""
    keys = list(da.dims) + [c for c in da.coords if c not in da.dims]
    if two_d:  # a coordinate that says what it is before one that is only so named
        keys.sort(key=lambda k: k not in da.coords or not (
            str(da.coords[k].attrs.get("standard_name", "")).lower() == standard_name
            or str(da.coords[k].attrs.get("units", "")).lower() in units))
    for key in keys:
        if key not in da.coords:
            continue
        coord = da.coords[key]
        if not _matches(coord, names, standard_name, units):
            continue
        stated = str(coord.attrs.get("units", "")).strip().lower()
        if stated and not stated.startswith("deg"):
            continue  # projected x / y in metres, not a latitude-longitude axis
        if two_d and coord.ndim == 2:
            return _two_d_axis(coord, key, standard_name, where)
        if coord.ndim != 1:
            raise AnalogsInputError(
                f"{where}: {standard_name} {key!r} is {coord.ndim}-D; expected a regular "
                "latitude-longitude grid with 1-D coordinates (regrid it first)")
        return coord.dims[0], _coordinate_values(coord, key, standard_name, where)
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
    """Coordinates of ``da`` that are pressure levels (:func:`_is_pressure_level`: by CF
    ``axis`` / ``positive`` / ``standard_name`` and units, a level name alone only
    without units), dimension coordinates first."""
    keys = [str(k) for k, c in da.coords.items() if _is_pressure_level(k, c)]
    return sorted(keys, key=lambda k: k not in da.dims)


def _levels_in_hpa(coord, where):
    values = np.atleast_1d(np.asarray(coord.values, dtype=float))
    units = str(coord.attrs.get("units", "")).strip().lower()
    pressure, to_hpa = _pressure_unit(units)
    if pressure:
        return values * to_hpa
    guess = "Pa" if np.nanmax(values) > 1100.0 else "hPa"
    warnings.warn(f"{where}: level coordinate {coord.name!r} has "
                  f"{'no units' if not units else f'unknown units {units!r}'}; taken as "
                  f"{guess} from its values ({_list(values)})", UserWarning, stacklevel=4)
    return values / 100.0 if guess == "Pa" else values


def _select_level(da, field, implied_level, where, keep):
    """Select the field's pressure level; return (array, whether a level was known)."""
    selection, level_known = _level_selection(da, field, implied_level, where, keep)
    return (da.isel(selection) if selection else da), level_known


def _level_selection(da, field, implied_level, where, keep):
    """({level dim: index} of the field's pressure level, or {} when there is no level
    dim to select along; whether a level was known)."""
    wanted = FIELD_LEVEL_HPA[field]
    keys = [k for k in _level_coords(da) if k not in keep]
    if not keys:
        if wanted is None or implied_level is not None:
            return {}, True
        if field == "q850":
            warnings.warn(f"{where} has no pressure level; taken as {wanted:g} hPa",
                          UserWarning, stacklevel=5)
            return {}, True
        return {}, False
    key = next((k for k in keys if k in da.dims), keys[0])
    coord = da.coords[key]
    levels = _levels_in_hpa(coord, where)
    if wanted is None:
        if key in da.dims and da.sizes[key] > 1:
            raise AnalogsInputError(
                f"{where} is a single-level field but has {da.sizes[key]} levels in "
                f"{key}=[{_list(levels)}]; expected one level")
        return ({key: 0} if key in da.dims else {}), True
    hits = np.flatnonzero(np.abs(levels - wanted) < 0.5)
    if hits.size == 0:
        raise AnalogsInputError(f"{where}: no {wanted:g} hPa level in "
                                f"{key}=[{_list(levels)}]")
    return ({key: int(hits[0])} if key in da.dims else {}), True


def _list(values):
    return ", ".join(f"{v:g}" for v in np.atleast_1d(values))


def _unit_registry():
    """cf-xarray's pint registry of CF / UDUNITS units (imported on first use: building it
    takes about half a second, which a query on an archive date does not need).

    Importing ``cf_xarray.units`` makes its registry pint's application registry for the
    whole process; the previous one is put back, so reading a file changes no global
    setting (other libraries, MetPy among them, keep working with their own quantities).
    """
    import sys

    import pint
    if "cf_xarray.units" not in sys.modules:
        previous = pint.get_application_registry().get()
        try:
            import cf_xarray.units  # noqa: F401  (builds the registry)
        finally:
            pint.set_application_registry(previous)
    return sys.modules["cf_xarray.units"].units


def _spelled(text):
    """A units attribute with its whitespace collapsed and meteorological spellings
    rewritten (:data:`_UNIT_SPELLINGS`)."""
    cleaned = " ".join(str(text).split())
    return _UNIT_SPELLINGS.get(cleaned.lower(), cleaned)


def _parse_units(text):
    """The pint unit of a units attribute, or None when the registry cannot read it."""
    import tokenize

    import pint
    cleaned = _spelled(text)
    try:
        return _unit_registry().Unit(cleaned)
    except (pint.PintError, AssertionError, AttributeError, TypeError, ValueError,
            ZeroDivisionError, SyntaxError, tokenize.TokenError):
        return None


def _affine(unit, target):
    """(factor, offset) with ``value in target = value in unit * factor + offset``.

    Rounded to 12 significant digits: the registry's definitions are exact decimals,
    and the rounding removes the last-bit error of taking an offset unit's factor as
    a difference (274.15 K - 273.15 K)."""
    registry = _unit_registry()
    zero = float(registry.Quantity(0.0, unit).to(target).magnitude)
    one = float(registry.Quantity(1.0, unit).to(target).magnitude)
    return float(f"{one - zero:.12g}"), float(f"{zero:.12g}")


def _common_conversion(text, field):
    """(factor, offset) from the units ``text`` to the canonical unit of ``field`` when
    ``text`` is one of :data:`_COMMON_UNITS` accepted for ``field``, computed as
    :func:`_field_conversion` does; else None (then the registry decides)."""
    quantity, factor, offset = _COMMON_UNITS.get(_spelled(text), (None, None, None))
    if (field, quantity) in (("z500", "length"), ("q850", "ratio"),
                             ("td2m", "temperature"), ("pwat", "mass per area")):
        return factor, offset
    if (field, quantity) == ("z500", "geopotential"):
        return factor / G0, 0.0
    if (field, quantity) == ("pwat", "length"):
        return factor * WATER_DENSITY, 0.0
    return None


def _field_conversion(unit, field):
    """(factor, offset) from ``unit`` to the canonical unit of ``field``, or None when
    ``unit`` measures another quantity."""
    from pint.util import to_units_container
    registry = _unit_registry()
    dim = unit.dimensionality
    if field == "z500":
        if dim == {"[length]": 1}:
            return _affine(unit, "m")
        if dim == {"[length]": 2, "[time]": -2}:  # geopotential: divided by g0
            return _affine(unit, "m2 s-2")[0] / G0, 0.0
    elif field == "q850":
        # A ratio of masses only: "%" (relative humidity) or an angle are not.
        parts = to_units_container(unit)
        if not dim and all(registry.Unit(name).dimensionality == {"[mass]": 1}
                           for name in parts):
            return _affine(unit, "dimensionless")
    elif field == "td2m":
        if dim == {"[temperature]": 1}:
            return _affine(unit, "K")
    elif field == "pwat":
        if dim == {"[mass]": 1, "[length]": -2}:
            return _affine(unit, "kg m-2")
        if dim == {"[length]": 1}:  # depth of liquid water: 1 mm = 1 kg m-2
            return _affine(unit, "m")[0] * WATER_DENSITY, 0.0
    return None


def _quantity_words(unit):
    """What a unit measures, in words, for messages."""
    dim = unit.dimensionality
    for words, wanted in (("a length", {"[length]": 1}), ("a temperature", {"[temperature]": 1}),
                          ("a geopotential (energy per mass)", {"[length]": 2, "[time]": -2}),
                          ("a mass per area", {"[mass]": 1, "[length]": -2}),
                          ("a pressure", {"[mass]": 1, "[length]": -1, "[time]": -2}),
                          ("a speed", {"[length]": 1, "[time]": -1}),
                          ("a time", {"[time]": 1})):
        if dim == wanted:
            return words
    if not dim:
        return "a dimensionless number that is not a ratio of masses"
    return f"a quantity of dimension {dim}"


def _convert_units(da, attrs, field, where, *, level_known=True, check_sample=True):
    """Convert ``da`` to the canonical units of ``field`` (common units by
    :data:`_COMMON_UNITS`, any other through the unit registry); return it and the
    units it was read in (as stated, or inferred).

    Units naming another quantity, or that the registry cannot read, are refused.
    Missing units are inferred from the magnitude of the values, with a warning. With
    ``check_sample`` the result must pass the plausibility gate
    (:data:`PLAUSIBLE_RANGE`) on its first and last time steps: when it does not, an
    unambiguous scale error (:data:`_SCALE_ALTERNATIVES`) is converted with a warning
    saying so, anything else is refused naming the variable, its units and the range
    of values found. (Archives are gated on every day, the same way, by
    :func:`apply_missing_data_policy`.)
    """
    raw = attrs.get("units")
    stated = "" if raw is None else " ".join(str(raw).split())
    canonical = FIELD_ATTRS[field]["units"]
    long_name = FIELD_ATTRS[field]["long_name"]
    label = stated
    if not stated:
        low, high = _sample_range(da, where)
        inferred = _infer_units(low, high, field)
        if inferred is None:
            raise AnalogsInputError(
                f"{where} has no units and its values ({low:.4g} to {high:.4g}) do not "
                f"say which; set its units attribute (e.g. units='{canonical}'), units "
                f"of {_EXPECTED_QUANTITY[field]}")
        warnings.warn(f"{where} has no units; {inferred!r} inferred from the magnitude "
                      "of its values", UserWarning, stacklevel=4)
        label = inferred
    elif _common_conversion(stated, field) is None:
        unit = _parse_units(stated)
        if unit is None:
            raise AnalogsInputError(
                f"{where} has unrecognised units {raw!r} (not in the CF / UDUNITS unit "
                f"registry); set its units attribute to units of "
                f"{_EXPECTED_QUANTITY[field]}, e.g. units='{canonical}'")
        if _field_conversion(unit, field) is None:
            raise AnalogsInputError(
                f"{where} has units {raw!r}, {_quantity_words(unit)}; {long_name} needs "
                f"units of {_EXPECTED_QUANTITY[field]}")
    factor, offset = _conversion_of(label, field)
    if check_sample:
        low, high = _sample_range(da, where)
        lo_ok, hi_ok = PLAUSIBLE_RANGE[field]
        if np.isfinite(low) and not (lo_ok <= low * factor + offset
                                     and high * factor + offset <= hi_ok):
            alternative = _scale_error(low, high, field, (factor, offset))
            if alternative is None:
                found = f"{low * factor + offset:.4g} to {high * factor + offset:.4g}"
                if field == "z500" and not level_known:
                    lo_ok, hi_ok = _Z500_PLAUSIBLE_GPM
                    raise AnalogsInputError(
                        f"{where} has no pressure level and its values ({found} gpm, units "
                        f"{label!r}) do not look like 500 hPa heights ({lo_ok:.0f}-"
                        f"{hi_ok:.0f} gpm); select the 500 hPa level or add a level "
                        "coordinate")
                raise AnalogsInputError(_implausible(where, repr(label), field, found))
            warnings.warn(_scale_warning(where, label, alternative, field, low, high),
                          UserWarning, stacklevel=4)
            factor, offset = _conversion_of(alternative, field)
            label = alternative
    if factor != 1.0:
        da = da * factor
    if offset != 0.0:
        da = da + offset
    return da, label


def _conversion_of(label, field):
    """(factor, offset) of units already accepted for ``field`` (stated or inferred)."""
    return _common_conversion(label, field) or _field_conversion(_parse_units(label), field)


def _implausible(where, stated, field, found):
    """The refusal of values outside the plausible range, naming the units (``stated``,
    quoted) and the values they give."""
    low_ok, high_ok = PLAUSIBLE_RANGE[field]
    units, long_name = FIELD_ATTRS[field]["units"], FIELD_ATTRS[field]["long_name"]
    return (f"{where} has units {stated}, which give values of {found} {units}: outside "
            f"the plausible range of {long_name} ({low_ok:g} to {high_ok:g} {units}); check "
            "the units attribute, and any fill value not declared as _FillValue or "
            "missing_value")


def _scale_warning(where, label, alternative, field, low, high):
    """The warning of a scale error of the units converted as ``alternative``."""
    factor, offset = _conversion_of(label, field)
    low_ok, high_ok = PLAUSIBLE_RANGE[field]
    units, long_name = FIELD_ATTRS[field]["units"], FIELD_ATTRS[field]["long_name"]
    return (f"{where} has units {label!r}, which give values of {low * factor + offset:.4g} "
            f"to {high * factor + offset:.4g} {units}, outside the plausible range of "
            f"{long_name} ({low_ok:g} to {high_ok:g} {units}); its values ({low:.4g} to "
            f"{high:.4g}) look like {_UNIT_WORDS[alternative]}: converted as "
            f"{alternative!r} (set units='{alternative}' in the file if that is right)")


def _scale_error(low, high, field, stated):
    """The units among :data:`_SCALE_ALTERNATIVES` that the raw values ``low``-``high``
    unambiguously look like and that give plausible values, when they differ from the
    ``stated`` conversion; otherwise None."""
    family = _SCALE_ALTERNATIVES.get(field, ())
    if not any(np.isclose(_conversion_of(units, field)[0], stated[0]) for units in family):
        return None  # stated units outside the family (ft, furlongs): no guess (13b)
    alternative = _infer_units(low, high, field)
    if alternative is None or alternative not in family:
        return None
    factor, offset = _conversion_of(alternative, field)
    if np.isclose(factor, stated[0]) and np.isclose(offset, stated[1]):
        return None
    lo_ok, hi_ok = PLAUSIBLE_RANGE[field]
    if lo_ok <= low * factor + offset and high * factor + offset <= hi_ok:
        return alternative
    return None


def _infer_units(low, high, field):
    """The units whose magnitude window (:data:`_INFERENCE`) holds ``low``-``high``."""
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


def _sample_range(da, where=None):
    """Min and max of the finite values over the first and last time steps (cheap even
    for big archives). A read error (a damaged chunk) names ``where``, the file."""
    steps = sorted({0, da.sizes["time"] - 1}) if "time" in da.dims else None
    sample = da.isel(time=steps) if steps is not None else da
    try:
        values = np.asarray(sample.values, dtype=float)
    except (OSError, RuntimeError) as err:
        if where is None:
            raise
        raise AnalogsInputError(f"{where}: its data cannot be read ({_one_line(err)}); the "
                                "file is damaged (a corrupt or missing chunk) or was cut "
                                "short") from None
    return _finite_range(values)


def _finite_range(values):
    """(min, max) of the finite ``values`` as floats; NaN, NaN when there are none."""
    values = np.asarray(values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return np.nan, np.nan
    return float(finite.min()), float(finite.max())


# ---------------------------------------------------------------------------
# missing data
# ---------------------------------------------------------------------------

#: Dates listed in the ``days_dropped`` entry of the missing-data report.
_REPORTED_DAYS = 20
#: Days and grid points named one by one in a missing-data message (then counted).
_NAMED_IN_MESSAGES = 3


def apply_missing_data_policy(ds, *, max_missing_fraction=0.1, max_gap_days=2,
                              source="the archive", origins=None, census=None):
    """Handle missing values (NaN, and infinite values, which count as missing) of a
    canonical archive explicitly, in proportion to how much is missing.

    Grid points missing on every day (a land/sea mask) stay NaN: the EOF stage leaves
    them out. At the other points, per field:

    1. a day missing more than ``max_missing_fraction`` of them (a real share of the
       domain), or all of them, is dropped;
    2. runs of at most ``max_gap_days`` consecutive missing days at a point are filled
       by linear interpolation in time (gaps measured on the time coordinate, so a
       dropped day counts towards the run);
    3. what is still missing on the days that stay (a few points at the start or end of
       the record, or in a longer run) is filled from the neighbouring grid points of
       the same day: the discrete Laplace equation solved over the missing points with
       the valid points around them as boundary values (each filled value is the mean
       of its four neighbours; common practice for filling gaps in gridded fields, no
       source). A group of missing points with no valid neighbour at all (cut off by
       the mask) takes the day's mean.

    So a few missing points never cost a day. Every value of a field named in
    :data:`PLAUSIBLE_RANGE` must also lie in its plausible range (the gate applied to
    every day; :func:`_convert_units` checks the first and last days of each file).
    Calendar days absent from a daily time axis are counted, not invented. Dask arrays
    stay lazy; the counts and the daily extremes are computed in one pass.

    Parameters
    ----------
    ds : xarray.Dataset
        Canonical fields ``(time, lat, lon)``.
    max_missing_fraction : float
        Share of a field's grid points (mask left out) above which a day is dropped.
    max_gap_days : int
        Longest run of missing days at a point filled by interpolation in time.
    source : str
        The files, for messages.
    origins : dict, optional
        ``{field: [(path, variable, times), ...]}``: which file and variable each time
        of each field came from, so that messages name them.
    census : dict, optional
        The counts and daily extremes of :func:`_missing_stats` when they were taken
        already (while the archive was decoded once, :func:`_decoded_once`).

    Returns
    -------
    (xarray.Dataset, dict)
        The archive and a report: ``days_dropped`` (first 20 dates), ``n_days_dropped``,
        ``n_values_filled`` (``n_values_filled_in_time`` plus
        ``n_values_filled_in_space``), ``n_infinite_values``, ``n_missing_calendar_days``,
        ``all_nan_points`` and, per field with missing values, ``fields``.
    """
    times = pd.DatetimeIndex(ds["time"].values)
    names = list(ds.data_vars)
    lat, lon = ds["lat"].values, ds["lon"].values
    stats = _missing_stats(ds) if census is None else census
    ds = _plausibility_gate(ds, stats, times, source, origins)
    n_infinite = _report_infinite(stats, times, source, origins)
    if n_infinite:
        ds = ds.copy()
        for name in names:
            if stats[name]["inf"].any():
                ds[name] = ds[name].where(np.isfinite(ds[name]))
    masks = {n: stats[n]["point"] == ds.sizes["time"] for n in names}
    for name in names:
        if masks[name].all():
            files = _files_of(origins, name, times)
            raise AnalogsInputError(
                f"{f'{files} ({name})' if files else f'{name} in {source}'}: every value "
                "is missing (NaN or infinite); expected a field with valid values")
    valid_points = {n: int((~masks[n]).sum()) for n in names}
    missing = {n: stats[n]["day"] - int(masks[n].sum()) for n in names}
    heavy_by = {n: (missing[n] > max_missing_fraction * valid_points[n])
                | (missing[n] >= valid_points[n]) for n in names}
    heavy = np.logical_or.reduce([heavy_by[n] for n in names])
    if heavy.all():
        raise AnalogsInputError(_no_usable_day(names, heavy_by, missing, valid_points,
                                               max_missing_fraction, source))
    keep = np.flatnonzero(~heavy)
    partial = [n for n in names if missing[n][keep].sum() > 0]
    if heavy.any():
        ds = ds.isel(time=keep)
    details = {}
    if partial:
        ds, details = _fill_missing(ds, partial, masks, max_gap_days, missing, keep)
    for name in names:
        if heavy_by[name].any():
            details.setdefault(name, {})["days_dropped"] = _dropped_detail(
                times, heavy_by[name], missing[name], valid_points[name])
    dropped = times[heavy]
    in_time = sum(d.get("values_filled_in_time", 0) for d in details.values())
    in_space = sum(d.get("values_filled_in_space", 0) for d in details.values())
    report = {"days_dropped": [f"{t:%Y-%m-%d}" for t in dropped[:_REPORTED_DAYS]],
              "n_days_dropped": int(dropped.size),
              "n_values_filled": int(in_time + in_space),
              "n_values_filled_in_time": int(in_time),
              "n_values_filled_in_space": int(in_space),
              "n_infinite_values": int(n_infinite),
              "n_missing_calendar_days": _missing_calendar_days(times),
              "all_nan_points": int(np.logical_or.reduce([masks[n] for n in names]).sum())}
    if details:
        report["fields"] = {n: {k: v for k, v in d.items() if not k.startswith("_")}
                            for n, d in details.items()}
    if dropped.size or in_time or in_space:
        warnings.warn(_missing_message(source, dropped.size, in_time + in_space, details,
                                       lat, lon), UserWarning, stacklevel=3)
    return ds, report


def _checked_target_values(ds, file, variables):
    """The plausibility gate on every value of a target (small: computed here), and its
    infinite values turned into missing ones with a warning naming file, variable and
    valid times."""
    for name in list(ds.data_vars):
        label = ds[name].attrs.pop("units_in_file", None)
        values = np.asarray(ds[name].values, dtype=float)
        where = f"{file}: variable {variables.get(name, name)!r}"
        finite = values[np.isfinite(values)]
        if name in PLAUSIBLE_RANGE and finite.size:
            low_ok, high_ok = PLAUSIBLE_RANGE[name]
            if finite.min() < low_ok or finite.max() > high_ok:
                stated = repr(label) if label else repr(FIELD_ATTRS[name]["units"])
                raise AnalogsInputError(_implausible(
                    where, stated, name, f"{finite.min():.4g} to {finite.max():.4g}"))
        infinite = np.isinf(values)
        if infinite.any():
            other = tuple(a for a, d in enumerate(ds[name].dims) if d != "time")
            at = pd.DatetimeIndex(ds["time"].values)[infinite.any(axis=other)]
            shown = ", ".join("no valid time" if pd.isna(t) else f"{t:%Y-%m-%dT%H:%M}"
                              for t in at[:_NAMED_IN_MESSAGES])
            warnings.warn(f"{where} ({name}) has {int(infinite.sum())} infinite value(s) "
                          f"(+Inf or -Inf) at {shown}"
                          f"{' and more' if len(at) > _NAMED_IN_MESSAGES else ''}; "
                          "treated as missing values", UserWarning, stacklevel=3)
            ds[name] = ds[name].where(np.isfinite(ds[name]))
    return ds


def _missing_stats(ds):
    """One pass over the data. Per field: missing (NaN or infinite) values per day
    (``day``) and per grid point (``point``), infinite values per day (``inf``), and the
    smallest and largest finite value of each day (``min``, ``max``)."""
    if all(ds[name].chunks is None for name in ds.data_vars):
        return {name: _missing_stats_in_memory(ds[name].values) for name in ds.data_vars}
    stats = xr.Dataset()
    for name in ds.data_vars:
        da = ds[name]
        finite = np.isfinite(da)
        stats[f"{name}/day"] = (~finite).sum(("lat", "lon"))
        stats[f"{name}/point"] = (~finite).sum("time")
        stats[f"{name}/inf"] = np.isinf(da).sum(("lat", "lon"))
        stats[f"{name}/min"] = da.where(finite).min(("lat", "lon"))
        stats[f"{name}/max"] = da.where(finite).max(("lat", "lon"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN days: NaN extremes
        stats = stats.compute()
    out = {}
    for name in ds.data_vars:
        out[name] = {key: stats[f"{name}/{key}"].values for key in
                     ("day", "point", "inf", "min", "max")}
        for key in ("day", "point", "inf"):
            out[name][key] = out[name][key].astype(int)
    return out


def _missing_stats_in_memory(values):
    """:func:`_missing_stats` of one field held in memory, ``(time, lat, lon)``, with
    numpy: without a missing value (the usual archive) the plain daily extremes alone
    (a NaN or an infinite value would be one of them), no masked copy."""
    low, high = values.min(axis=(1, 2)), values.max(axis=(1, 2))
    if np.isfinite(low).all() and np.isfinite(high).all():
        n_days, n_lat, n_lon = values.shape
        return {"day": np.zeros(n_days, dtype=int), "point": np.zeros((n_lat, n_lon), dtype=int),
                "inf": np.zeros(n_days, dtype=int), "min": low, "max": high}
    missing = ~np.isfinite(values)
    finite_only = np.where(missing, np.nan, values).astype(values.dtype, copy=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN days: NaN extremes
        low, high = np.nanmin(finite_only, axis=(1, 2)), np.nanmax(finite_only, axis=(1, 2))
    return {"day": missing.sum(axis=(1, 2)).astype(int), "point": missing.sum(axis=0).astype(int),
            "inf": np.isinf(values).sum(axis=(1, 2)).astype(int), "min": low, "max": high}


def _plausibility_gate(ds, stats, times, source, origins):
    """The plausibility gate on every day of an archive (extremes from the one pass).

    A file whose stated units give values outside :data:`PLAUSIBLE_RANGE` is converted
    with a warning when the values show an unambiguous scale error of the units
    (:func:`_scale_error`, as for a target), and refused otherwise, naming the file,
    the variable, its units, the days and the range of values found."""
    for name, numbers in stats.items():
        if name not in PLAUSIBLE_RANGE:
            continue
        low_ok, high_ok = PLAUSIBLE_RANGE[name]

        def outside():
            with np.errstate(invalid="ignore"):
                return (numbers["min"] < low_ok) | (numbers["max"] > high_ok)

        bad = outside()
        if not bad.any():
            continue
        days = np.asarray(times.values).astype("datetime64[D]")
        for path, variable, held, label in (origins or {}).get(name, ()):
            rows = np.isin(days, np.asarray(held).astype("datetime64[D]"))
            if label is None or not bad[rows].any():
                continue
            factor, offset = _conversion_of(label, name)
            low = (np.nanmin(numbers["min"][rows]) - offset) / factor  # as in the file
            high = (np.nanmax(numbers["max"][rows]) - offset) / factor
            alternative = _scale_error(low, high, name, (factor, offset))
            if alternative is None:
                continue
            warnings.warn(_scale_warning(f"{path}: variable {variable!r}", label,
                                         alternative, name, low, high),
                          UserWarning, stacklevel=4)
            new_factor, new_offset = _conversion_of(alternative, name)
            scale = new_factor / factor
            shift = new_offset - offset * scale
            attrs = dict(ds[name].attrs)
            ds = ds.copy()
            ds[name] = xr.where(xr.DataArray(rows, dims="time"), ds[name] * scale + shift,
                                ds[name]).transpose(*ds[name].dims).astype(ds[name].dtype)
            ds[name].attrs = attrs
            for key in ("min", "max"):
                numbers[key][rows] = numbers[key][rows] * scale + shift
        bad = outside()
        if not bad.any():
            continue
        found = (f"{np.nanmin(numbers['min'][bad]):.4g} to "
                 f"{np.nanmax(numbers['max'][bad]):.4g}")
        labels = sorted({repr(o[3]) for o in (origins or {}).get(name, ())
                         if o[3] is not None and np.isin(
                             np.asarray(o[2]).astype("datetime64[D]"), days[bad]).any()})
        where = _files_of(origins, name, times[bad]) or f"{name} in {source}"
        stated = " or ".join(labels) or repr(FIELD_ATTRS[name]["units"])
        raise AnalogsInputError(f"{_implausible(where, stated, name, found)} (on "
                                f"{_which_days(times[bad])})")
    return ds


def _report_infinite(stats, times, source, origins):
    """Warn of infinite values (+Inf or -Inf), naming file, variable and days; they are
    treated as missing. Returns how many there are."""
    total = 0
    for name, numbers in stats.items():
        count = int(numbers["inf"].sum())
        if not count:
            continue
        total += count
        days = times[numbers["inf"] > 0]
        files = _files_of(origins, name, days)
        warnings.warn(
            f"{f'{files} ({name})' if files else f'{name} in {source}'}: {count} infinite "
            f"value(s) (+Inf or -Inf) on {_which_days(days)}; treated as missing values",
            UserWarning, stacklevel=4)
    return total


def _files_of(origins, name, days):
    """"FILE: variable 'v'" for each file of ``name`` holding one of ``days`` ("" when
    ``origins`` is not known)."""
    if not origins or name not in origins:
        return ""
    wanted = np.asarray(pd.DatetimeIndex(days).values).astype("datetime64[D]")
    parts = [f"{path}: variable {variable!r}" for path, variable, held, *_ in origins[name]
             if np.isin(np.asarray(held).astype("datetime64[D]"), wanted).any()]
    if len(parts) > _NAMED_IN_MESSAGES:
        parts = parts[:_NAMED_IN_MESSAGES] + [f"{len(parts) - _NAMED_IN_MESSAGES} more files"]
    return "; ".join(parts)


def _which_days(days):
    """"2001-01-03" or "2 day(s): 2001-01-03, 2001-01-04" or "12 days between
    2001-01-03 and 2001-02-20"."""
    days = pd.DatetimeIndex(days)
    if len(days) <= _NAMED_IN_MESSAGES:
        return (f"{len(days)} day(s): " if len(days) > 1 else "") + ", ".join(
            f"{t:%Y-%m-%d}" for t in days)
    return f"{len(days)} days between {days[0]:%Y-%m-%d} and {days[-1]:%Y-%m-%d}"


def _which_points(points, lat, lon):
    """"1 grid point (lat 32.5, lon -112.5)" or "57 grid points in lat 30 to 40, lon ..."."""
    rows, cols = np.nonzero(points)
    if rows.size <= _NAMED_IN_MESSAGES:
        return f"{rows.size} grid point(s) (" + "; ".join(
            f"lat {lat[r]:g}, lon {lon[c]:g}" for r, c in zip(rows, cols)) + ")"
    return (f"{rows.size} grid points in lat {lat[rows].min():g} to {lat[rows].max():g}, "
            f"lon {lon[cols].min():g} to {lon[cols].max():g}")


def _dropped_detail(times, heavy, missing, valid_points):
    days = np.flatnonzero(heavy)
    shown = ", ".join(f"{times[d]:%Y-%m-%d} ({missing[d] / valid_points:.0%})"
                      for d in days[:_NAMED_IN_MESSAGES])
    more = f" and {days.size - _NAMED_IN_MESSAGES} more" if days.size > _NAMED_IN_MESSAGES else ""
    return {"n_days": int(days.size), "points": int(valid_points),
            "text": f"{shown}{more} of its {valid_points} grid points missing"}


def _no_usable_day(names, heavy_by, missing, valid_points, fraction, source):
    parts = []
    for name in names:
        if not heavy_by[name].any():
            continue
        share = missing[name][heavy_by[name]] / valid_points[name]
        parts.append(f"{name} ({share.min():.0%} to {share.max():.0%} of its {valid_points[name]} "
                     f"grid points on {int(heavy_by[name].sum())} day(s))")
    return (f"{source}: every day has more than {fraction:g} of its grid points missing "
            f"(NaN or infinite): {'; '.join(parts)}; no day is usable "
            f"(max_missing_fraction={fraction:g})")


def _fill_missing(ds, partial, masks, max_gap_days, missing, keep):
    """Steps 2 and 3 of :func:`apply_missing_data_policy` on the days kept; returns the
    archive and, per field, what was filled (counts, grid points, days)."""
    ds = ds.copy()
    days = ((ds["time"].values - ds["time"].values[0]) / np.timedelta64(1, "D")).astype(float)
    before = {}
    for name in partial:
        da = ds[name]
        before[name] = da
        if da.chunks is not None:
            da = da.chunk({"time": -1, "lat": "auto"})
        ds[name] = xr.apply_ufunc(
            _fill_short_gaps, da, input_core_dims=[["time"]],
            output_core_dims=[["time"]], kwargs={"days": days,
                                                 "max_span": max_gap_days + 1.0},
            dask="parallelized", output_dtypes=[da.dtype], keep_attrs=True,
        ).transpose(*da.dims)
    counts = xr.Dataset()
    for name in partial:
        counts[f"{name}/gappy"] = before[name].isnull().sum("time")
        counts[f"{name}/left"] = ds[name].isnull().sum("time")
    counts = counts.compute()
    lon = ds["lon"].values
    step = _step(lon)
    periodic = lon.size > 2 and abs(lon[-1] - lon[0] + step - 360.0) < 1e-6
    details = {}
    for name in partial:
        mask = masks[name]
        gappy = (counts[f"{name}/gappy"].values > 0) & ~mask
        left = counts[f"{name}/left"].values.astype(int) * ~mask
        total = int(missing[name][keep].sum())
        in_space = int(left.sum())
        if in_space:
            da = ds[name]
            if da.chunks is not None:
                da = da.chunk({"time": "auto", "lat": -1, "lon": -1})
            ds[name] = xr.apply_ufunc(
                _fill_in_space, da, input_core_dims=[["lat", "lon"]],
                output_core_dims=[["lat", "lon"]],
                kwargs={"fillable": ~mask, "periodic": periodic},
                dask="parallelized", output_dtypes=[da.dtype], keep_attrs=True,
            ).transpose(*da.dims)
        details[name] = {
            "values_filled_in_time": total - in_space,
            "values_filled_in_space": in_space,
            "points_filled": int(gappy.sum()),
            "days_filled": int((missing[name][keep] > 0).sum()),
            "_points": gappy,
            "_days": pd.DatetimeIndex(ds["time"].values)[missing[name][keep] > 0],
        }
    return ds, details


def _missing_message(source, n_dropped, n_filled, details, lat, lon):
    """The one warning of :func:`apply_missing_data_policy`."""
    dropped = "; ".join(f"{name} on {d['days_dropped']['text']}" for name, d in details.items()
                        if "days_dropped" in d)
    filled = []
    for name, d in details.items():
        if "_points" not in d:
            continue
        count = d["values_filled_in_time"] + d["values_filled_in_space"]
        filled.append(f"{name}: {count} at {_which_points(d['_points'], lat, lon)} on "
                      f"{_which_days(d['_days'])}, {d['values_filled_in_time']} by linear "
                      f"interpolation in time and {d['values_filled_in_space']} from the "
                      "neighbouring grid points")
    return (f"{source}: missing values (NaN or infinite): {n_dropped} day(s) dropped"
            + (f" ({dropped})" if dropped else "")
            + f", {n_filled} value(s) filled" + (f" ({'; '.join(filled)})" if filled else ""))


def _fill_in_space(values, *, fillable, periodic):
    """Fill NaN at the ``fillable`` points (lat, lon) of each 2-D slice of ``values``
    (..., lat, lon) by the discrete Laplace equation: each filled value is the mean of
    its four neighbours (fewer at the edge of the grid or of a mask; longitude wraps when
    ``periodic``), the valid values being fixed. Its solution is exact for any field
    linear in the grid indices and never leaves the range of the valid values around it.
    Slices with the same missing points share one sparse LU factorisation."""
    out = np.array(values, dtype=float, copy=True)
    flat = out.reshape((-1,) + out.shape[-2:])
    systems = {}
    for k in range(flat.shape[0]):
        field = flat[k]
        hole = np.isnan(field) & fillable
        if not hole.any():
            continue
        known = np.isfinite(field)
        key = (hole.tobytes(), known.tobytes())
        if key not in systems:
            systems[key] = _laplace_system(hole, known, periodic)
        factor, boundary, orphan = systems[key]
        rhs = boundary @ field[known]
        rhs[orphan] = field[known].mean()
        field[hole] = factor.solve(rhs)
    return out.astype(np.asarray(values).dtype, copy=False)


def _laplace_system(hole, known, periodic):
    """(LU factorisation of A, matrix B, orphans): A x = B v gives the missing values x
    from the valid values v; orphans are missing points cut off from every valid one."""
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components
    from scipy.sparse.linalg import splu
    ny, nx = hole.shape
    hole_index = np.full(hole.shape, -1)
    hole_index[hole] = np.arange(int(hole.sum()))
    known_index = np.full(hole.shape, -1)
    known_index[known] = np.arange(int(known.sum()))
    rows, cols = np.nonzero(hole)
    n = rows.size
    degree = np.zeros(n)
    couple_r, couple_c, edge_r, edge_c = [], [], [], []
    for d_row, d_col in ((1, 0), (-1, 0), (0, 1), (0, -1)):
        r, c = rows + d_row, cols + d_col
        inside = (r >= 0) & (r < ny)
        if periodic:
            c = c % nx
        else:
            inside &= (c >= 0) & (c < nx)
        source = np.flatnonzero(inside)
        r, c = r[inside], c[inside]
        h, k = hole_index[r, c], known_index[r, c]
        degree[source[(h >= 0) | (k >= 0)]] += 1.0
        couple_r.append(source[h >= 0])
        couple_c.append(h[h >= 0])
        edge_r.append(source[k >= 0])
        edge_c.append(k[k >= 0])
    couple_r, couple_c = np.concatenate(couple_r), np.concatenate(couple_c)
    edge_r, edge_c = np.concatenate(edge_r), np.concatenate(edge_c)
    coupling = sparse.csr_matrix((np.ones(couple_r.size), (couple_r, couple_c)), shape=(n, n))
    boundary = sparse.csr_matrix((np.ones(edge_r.size), (edge_r, edge_c)),
                                 shape=(n, int(known.sum())))
    _, labels = connected_components(coupling, directed=False)
    reached = np.zeros(labels.max() + 1, dtype=bool)
    reached[labels[np.asarray(boundary.sum(axis=1)).ravel() > 0]] = True
    orphan = ~reached[labels]
    system = sparse.diags(degree) - coupling
    if orphan.any():
        system = (sparse.diags((~orphan).astype(float)) @ system
                  + sparse.diags(orphan.astype(float)))
    return splu(sparse.csc_matrix(system)), boundary, orphan


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

def _read_field(field, found, chunks=None):
    """(one field joined over its files, where each time came from: [(path, variable,
    times, units in the file)]). The files' canonical pieces (each holding its decoded
    values once read) are let go on return. A file laid out as an earlier one is read
    directly: in memory, its candidate stands for its piece and its values are read
    into their place in the joined array (:func:`_joined_in_memory`); with ``chunks``
    its piece reads it chunk by chunk (:func:`_laid_out_piece`)."""
    pieces = [_sorted_in_time(_canonical_array(c), c.path) if c.laid_out is None
              else _laid_out_piece(c, chunks) if chunks else c for c in found]
    origins = [(c.path, c.name, c.laid_out.times, c.laid_out.layout.attrs["units_in_file"])
               if p is c else (c.path, c.name, p["time"].values,
                               p.attrs.pop("units_in_file", None))
               for c, p in zip(found, pieces)]
    return _join_pieces(field, pieces), origins


def _piece_grid(piece):
    """The (lat, lon) coordinates of a piece, or of a laid-out candidate's layout."""
    if isinstance(piece, _Candidate):
        return piece.laid_out.layout.lat, piece.laid_out.layout.lon
    return piece["lat"].variable, piece["lon"].variable


def _join_pieces(field, pieces):
    """The files' pieces of one field joined along time, sorted by time.

    Pieces read in memory are copied one by one into a single preallocated array in
    their common dtype (float32 from float32 files): xarray's concat would hold every
    decoded piece and the joined copy at once. Lazy (dask) pieces are concatenated
    lazily. Laid-out candidates (in memory) are read into their place there."""
    first_lat, first_lon = _piece_grid(pieces[0])
    checked = set()
    for piece in pieces[1:]:
        lat, lon = _piece_grid(piece)
        if (id(lat), id(lon)) in checked:  # a layout's grid, checked once
            continue
        if (lat.size != first_lat.size or lon.size != first_lon.size
                or not np.allclose(lat.values, first_lat.values, atol=1e-4)
                or not np.allclose(lon.values, first_lon.values, atol=1e-4)):
            raise AnalogsInputError(
                f"{field}: files are on different grids ({first_lat.size}x"
                f"{first_lon.size} and {lat.size}x{lon.size}); "
                "expected every file of the archive on one grid")
        if isinstance(piece, _Candidate):
            checked.add((id(lat), id(lon)))
    if len(pieces) == 1 and not isinstance(pieces[0], _Candidate):
        return pieces[0]
    if any(not isinstance(p, _Candidate) and p.chunks is not None for p in pieces):
        pieces = [p.assign_coords(lat=first_lat, lon=first_lon) for p in pieces]
        joined = xr.concat(pieces, dim="time", join="override", coords="minimal",
                           compat="override")
    else:
        joined = _joined_in_memory(field, pieces)
    order = np.argsort(joined["time"].values, kind="stable")
    if np.any(np.diff(order) != 1):
        joined = joined.isel(time=order)
    joined.attrs = dict(FIELD_ATTRS[field])
    return joined


#: Pieces of a field from which the later half of its laid-out files is read in a
#: forked child (:mod:`analogs._forked`) straight into the joined array.
MIN_PIECES_FORKED = 4


def _joined_in_memory(field, pieces):
    """Pieces on one grid (checked before) copied into one array along time, labelled
    with the first piece's grid and every piece's times. A laid-out candidate's values
    are read into their place (:func:`_read_laid_out_into`): with at least
    :data:`MIN_PIECES_FORKED` pieces whose later half are all laid out, that half in a
    forked child, into the array in memory shared with it, while this process reads the
    first half; when the child fails, warns or gives no answer in ten times the first
    half's time (at least 10 s), its files are read here (values, errors and warnings
    are then one process's)."""
    from analogs import _forked
    parts = [(p.laid_out.times, p.laid_out.layout.dtype) if isinstance(p, _Candidate)
             else (p["time"].values, p.dtype) for p in pieces]
    lat, lon = _piece_grid(pieces[0])
    shape = (sum(times.size for times, _ in parts), lat.size, lon.size)
    dtype = np.result_type(*[dtype for _, dtype in parts])
    stops = np.cumsum([times.size for times, _ in parts])
    half = len(pieces) // 2
    forked = (len(pieces) >= MIN_PIECES_FORKED and _forked.can_fork()
              and all(isinstance(piece, _Candidate) for piece in pieces[half:]))
    values = _forked.shared_empty(shape, dtype) if forked else np.empty(shape, dtype)
    into = [values[stop - times.size:stop] for (times, _), stop in zip(parts, stops)]
    later = list(zip(pieces[half:], into[half:])) if forked else []
    started = time.perf_counter()
    with _forked.beside(_read_into_in_child, later) if later else contextlib.nullcontext() as child:
        for piece, place in zip(pieces[:half] if later else pieces, into):
            if isinstance(piece, _Candidate):
                _read_laid_out_into(piece.path, piece.laid_out.layout, place)
            else:
                place[...] = piece.values  # decoded here, one file at a time
        read = child is not None and child.answer(
            timeout=max(10.0, 10 * (time.perf_counter() - started))) is not None
    if later and not read:
        _read_into(later)
    times = xr.Variable("time", np.concatenate([times for times, _ in parts]),
                        dict(_TIME_ATTRS))
    return xr.DataArray(values, dims=("time", "lat", "lon"), name=field,
                        coords={"time": times, "lat": lat, "lon": lon})


def _read_into(pieces):
    """Read each laid-out (candidate, place) into its place (:func:`_read_laid_out_into`)."""
    for candidate, place in pieces:
        _read_laid_out_into(candidate.path, candidate.laid_out.layout, place)


def _read_into_in_child(pieces) -> bytes:
    """:func:`_read_into` in a forked child, where a warning is an error: the child then
    fails and leaves its files to the caller, which warns itself."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _read_into(pieces)
    return b""


def _release_freed_memory():
    """Give the heap memory freed while reading in memory back to the system (glibc's
    ``malloc_trim``; nothing elsewhere). The decoded pieces, freed one by one between
    other allocations, left about one field's size of heap held (measured: 150 MB
    resident more after reading 40 years at 1 degree, the build's peak 90 MB higher)."""
    try:  # the process's own symbols: the C library's (no search for its file)
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError, TypeError):
        pass


def _merge_fields(arrays, files):
    names = list(arrays)
    ref = arrays[names[0]]
    for name in names[1:]:
        other = arrays[name]
        if not _same_grid(ref, other):
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
    """One value a day at ``hour`` UTC; daily and coarser archives pass through (a
    coarser one with a warning: each of its values is then taken for one day)."""
    times = pd.DatetimeIndex(ds["time"].values)
    if len(times) < 2:
        return ds
    step = pd.Series(times).diff().dropna().median()
    if step >= pd.Timedelta(days=2):
        warnings.warn(f"the times in {_describe(files)} are {step.days} days apart (median "
                      "step), not daily: each value is taken for a single day (analog days, "
                      "season windows, episodes and report counts assume daily values); "
                      "give daily fields for a daily analog archive", UserWarning, stacklevel=3)
    elif step >= pd.Timedelta(days=1):
        hours = sorted(set(times.hour))
        if hours != [hour]:
            warnings.warn(f"daily values in {_describe(files)} are valid at "
                          f"{', '.join(f'{h:02d}' for h in hours)} UTC, not {hour:02d} "
                          "UTC; kept as they are", UserWarning, stacklevel=3)
    if step >= pd.Timedelta(days=1):
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
# targets: ensemble members and several valid times (helper 15b; used by open_target)
# ---------------------------------------------------------------------------

#: Names of an ensemble-member dimension (lower case): GRIB/cfgrib ``number``, CMIP
#: ``member_id``/``realization``, and common spellings. A dimension whose coordinate
#: has the CF standard_name ``realization`` is one too, whatever its name.
MEMBER_NAMES = ("number", "member", "members", "member_id", "realization", "realisation",
                "ensemble", "ensemble_member", "ens", "mem")


def member_dimension(dataset) -> str | None:
    """The ensemble-member dimension of ``dataset`` (a Dataset or DataArray), or None.

    A dimension named in :data:`MEMBER_NAMES` or whose coordinate has
    ``standard_name: realization`` (the CF standard name that labels the members of
    an ensemble; from memory), with more than one member.
    """
    for dim in dataset.dims:
        coord = dataset.coords.get(dim)
        standard = "" if coord is None else str(coord.attrs.get("standard_name", "")).lower()
        if (str(dim).lower() in MEMBER_NAMES or standard == "realization") \
                and dataset.sizes[dim] > 1:
            return str(dim)
    return None


def _member_labels(dataset, member):
    coord = dataset.coords.get(member)
    if coord is None:
        return np.arange(dataset.sizes[member])
    values = np.asarray(coord.values)
    if np.issubdtype(values.dtype, np.integer):
        return values.astype("int64")
    return np.array([str(v) for v in values], dtype=object)


def _target_array(candidate, member):
    """The canonical array of a target's variable; with ``member`` (a dimension name),
    each member made canonical by the same path as a single field and stacked along
    ``member`` (dims ``(member, time, lat, lon)``)."""
    from dataclasses import replace
    if member is None:
        return _canonical_array(candidate, time_optional=True)
    labels = _member_labels(candidate.dataset, member)
    pieces = [_canonical_array(replace(candidate, dataset=candidate.dataset.isel({member: i})),
                               time_optional=True) for i in range(labels.size)]
    stacked = xr.concat(pieces, dim="member", join="override", coords="minimal",
                        compat="override")
    stacked = stacked.assign_coords(member=("member", labels, {
        "standard_name": "realization", "long_name": f"ensemble member ({member} in the file)"}))
    stacked.attrs = dict(pieces[0].attrs)
    return stacked


def several_times(time) -> bool:
    """True when ``time`` asks for every valid time (``"all"``) or a range (``"A/B"``)."""
    return isinstance(time, str) and (time.strip().lower() == "all" or "/" in time)


def select_valid_times(ds, time, file):
    """The valid times of a target asked for by ``time``.

    ``None``: the file's only time (refused when it holds several); an ISO 8601 time
    or date: that one time; ``"all"``: every time; ``"START/END"``: the times from
    START to END inclusive (ISO 8601 interval notation; a date alone as END includes
    that whole day; either end may be empty, open).
    """
    times = pd.DatetimeIndex(ds["time"].values)
    if not several_times(time):
        if time is None and len(times) > 1:
            raise AnalogsInputError(
                f"{file} holds {len(times)} times from {times[0]:%Y-%m-%dT%H:%M} to "
                f"{times[-1]:%Y-%m-%dT%H:%M}; choose one with time='YYYY-MM-DDTHH:MM', "
                "or take them all with time='all' (or a range 'START/END')")
        return _select_time(ds, time, file)
    if times.isna().any():
        raise AnalogsInputError(f"{file} has no valid time; time={time!r} needs one")
    text = time.strip()
    if text.lower() == "all":
        return ds
    start_text, _, end_text = text.partition("/")

    def bound(value, end):
        value = value.strip()
        if not value:
            return None
        try:
            stamp = pd.Timestamp(value)
        except (ValueError, TypeError):
            fail("time", "open_target", "an ISO 8601 time, 'all' or a range START/END "
                 "of ISO 8601 times", time)
        if stamp.tzinfo is not None:
            stamp = stamp.tz_convert("UTC").tz_localize(None)
        if end and len(value) <= 10:  # a date alone ends with its day
            stamp = stamp + pd.Timedelta(days=1) - pd.Timedelta(nanoseconds=1)
        return stamp

    start, end = bound(start_text, False), bound(end_text, True)
    if start is not None and end is not None and end < start:
        fail("time", "open_target", "a range START/END with START before END", time)
    keep = np.ones(len(times), dtype=bool)
    if start is not None:
        keep &= times >= start
    if end is not None:
        keep &= times <= end
    if not keep.any():
        raise AnalogsInputError(
            f"{file}: no time in {time!r}; the file holds {len(times)} time(s), "
            f"{times[0]:%Y-%m-%dT%H:%M} to {times[-1]:%Y-%m-%dT%H:%M}")
    return ds.isel(time=np.flatnonzero(keep))


# ---------------------------------------------------------------------------
# readers (helper 15a): GRIB through cfgrib / ecCodes, pressure-level recognition,
# curvilinear grids, moisture fields computed from other variables
# ---------------------------------------------------------------------------

#: File name endings read as GRIB, besides any file whose first bytes are ``GRIB``.
GRIB_SUFFIXES = (".grib", ".grib1", ".grib2", ".grb", ".grb1", ".grb2")

#: The GRIB messages read, as cfgrib ``filter_by_keys``: (ecCodes shortName, typeOfLevel,
#: level or None for any). 500 hPa geopotential or geopotential height; the 850 hPa
#: moisture (specific humidity, or dewpoint, or relative humidity and temperature); the
#: 2 m dewpoint (or 2 m relative humidity and temperature, or 2 m specific humidity and
#: surface pressure); precipitable water. cfgrib names 2t, 2d, 2r and 2sh t2m, d2m, r2, sh2.
_GRIB_MESSAGES = (
    ("z", "isobaricInhPa", 500), ("gh", "isobaricInhPa", 500),
    ("q", "isobaricInhPa", 850), ("dpt", "isobaricInhPa", 850),
    ("r", "isobaricInhPa", 850), ("t", "isobaricInhPa", 850),
    ("2d", "heightAboveGround", 2), ("2r", "heightAboveGround", 2),
    ("2t", "heightAboveGround", 2), ("2sh", "heightAboveGround", 2),
    ("sp", "surface", None), ("tcwv", None, None), ("pwat", None, None),
)
#: Messages listed when a GRIB file lacks what is needed.
_GRIB_LISTED = 24


def _is_grib(path):
    """True for a GRIB file: first bytes ``GRIB`` or a GRIB file name ending."""
    if os.path.isdir(path) or not os.path.exists(path):
        return False
    if path.lower().endswith(GRIB_SUFFIXES):
        return True
    with open(path, "rb") as handle:
        return handle.read(4) == b"GRIB"


def _open_parts(path, chunks):
    """(Datasets, variable names) of one file: one Dataset for NetCDF or Zarr; one per
    hypercube of the messages read (:data:`_GRIB_MESSAGES`) for GRIB."""
    if os.path.exists(path):
        _refuse_special_file(path)  # before any read: a FIFO would block (13b)
    if _is_grib(path):
        return _open_grib(path, chunks)
    dataset = _open_file(path, chunks)
    return [dataset], sorted(str(v) for v in dataset.data_vars)


def _grib_inventory(path):
    """(shortName, typeOfLevel, level) of every message of a GRIB file, in file order.

    Read with ecCodes' own message iterator (headers only; the values are decoded later,
    lazily, by cfgrib)."""
    import eccodes
    found = []
    with open(path, "rb") as handle:
        while True:
            try:
                message = eccodes.codes_grib_new_from_file(handle)
            except eccodes.CodesInternalError as err:
                raise AnalogsInputError(f"{path}: cannot be read as GRIB, the file may be "
                                        f"truncated or damaged ({_one_line(err)})") from None
            if message is None:
                break
            try:
                found.append((str(eccodes.codes_get(message, "shortName")),
                              str(eccodes.codes_get(message, "typeOfLevel")),
                              float(eccodes.codes_get(message, "level", ktype=float))))
            except eccodes.CodesInternalError as err:
                raise AnalogsInputError(f"{path}: a GRIB message cannot be decoded "
                                        f"({_one_line(err)})") from None
            finally:
                eccodes.codes_release(message)
    if not found:
        raise AnalogsInputError(f"{path}: holds no GRIB message; expected GRIB edition 1 "
                                "or 2")
    return found


@contextlib.contextmanager
def _quiet_cfgrib():
    """cfgrib logs a traceback for each variable it skips; raise its logger's level for
    the duration of the read and restore it."""
    import logging
    logger = logging.getLogger("cfgrib")
    previous = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(previous)


def _open_grib(path, chunks):
    """One Dataset per hypercube of the GRIB messages analogs reads (see
    :data:`_GRIB_MESSAGES`), each opened by cfgrib with ``filter_by_keys`` on shortName,
    typeOfLevel and level, with ``valid_time`` as its time axis.

    cfgrib's index files are never used: ``indexpath=""`` keeps cfgrib from writing a
    ``.idx`` file beside the user's file (and from reading one, a pickle). The
    backend class is passed to xarray itself (not ``engine="cfgrib"``, nor
    ``cfgrib.open_datasets``, which names it): naming an engine makes xarray import
    every installed backend. Each hypercube is opened on its own (as
    ``cfgrib.open_datasets`` does per parameter), so one parameter at two kinds of
    level never clash.
    """
    inventory = _grib_inventory(path)
    filters = []
    for short_name, level_type, level in _GRIB_MESSAGES:
        found = sorted({(s, t) for s, t, v in inventory if s == short_name
                        and (level_type is None or t == level_type)
                        and (level is None or v == level)})
        for name, kind in found:
            keys = {"shortName": name, "typeOfLevel": kind}
            if level is not None:
                keys["level"] = level
            filters.append(keys)
    parts = []
    with _quiet_cfgrib():
        for keys in filters:
            parts.extend(_open_grib_hypercubes(path, keys, chunks))
    listed = list(dict.fromkeys(f"{s} ({t} {v:g})" for s, t, v in inventory))
    names = listed[:_GRIB_LISTED] + ([f"and {len(listed) - _GRIB_LISTED} more"]
                                     if len(listed) > _GRIB_LISTED else [])
    return [_grib_valid_time(part) for part in parts], names


def _open_grib_hypercubes(path, keys, chunks, depth=0):
    """The hypercubes of the messages selected by ``keys``: one, or several when cfgrib
    says the messages do not form one (it names the keys that split them)."""
    from cfgrib.dataset import DatasetBuildError
    from cfgrib.xarray_plugin import CfGribBackend
    try:
        dataset = xr.open_dataset(
            path, engine=CfGribBackend, chunks={} if chunks else None,
            backend_kwargs={"indexpath": "", "filter_by_keys": keys, "errors": "raise"})
    except DatasetBuildError as err:
        splits = [k for k in (err.args[2] if len(err.args) > 2 else []) if k != keys]
        if not splits or depth > 3:
            raise AnalogsInputError(f"{path}: the GRIB messages {keys} do not form one "
                                    f"grid ({_one_line(err)})") from None
        return [part for split in splits
                for part in _open_grib_hypercubes(path, split, chunks, depth + 1)]
    except (OSError, ValueError, RuntimeError, KeyError, EOFError) as err:
        raise AnalogsInputError(f"{path}: cannot be read as GRIB, the file may be "
                                f"truncated or damaged ({_one_line(err)})") from None
    return [dataset]


def _grib_valid_time(dataset):
    """``valid_time`` as the time axis of a cfgrib Dataset, which keeps the model run in
    ``time`` and the lead time in ``step``. Runs and leads both several: every (run,
    lead) pair along ``valid_time``; a valid time reached by several runs keeps the
    latest run (the shortest lead)."""
    if "valid_time" not in dataset.coords:
        return dataset
    valid = dataset["valid_time"]
    if valid.ndim == 1 and valid.dims[0] != "valid_time":
        return dataset.swap_dims({valid.dims[0]: "valid_time"})
    if valid.ndim != 2:
        return dataset
    run_dim = next((d for d in valid.dims if d in dataset.coords
                    and np.issubdtype(dataset[d].dtype, np.datetime64)), valid.dims[0])
    runs = np.asarray(dataset[run_dim].broadcast_like(valid).transpose(*valid.dims).values,
                      dtype="datetime64[ns]").ravel()
    stacked = dataset.stack(_run_lead=valid.dims)
    stacked = stacked.drop_vars(["_run_lead", *valid.dims]).swap_dims(
        {"_run_lead": "valid_time"})
    times = stacked["valid_time"].values
    order = np.lexsort((-runs.astype(np.int64), times))
    keep = order[~pd.Index(times[order]).duplicated(keep="first")]
    return stacked.isel(valid_time=keep)


#: Coordinate names that mark a pressure level (lower case), also with a trailing
#: number (``isobaric1``, ``lv_ISBL0``) or a CDO-style suffix (``lev_2``). A name alone
#: is not enough: units that are not a pressure, ``positive: up`` or a standard_name of
#: another vertical coordinate overrule it (see :func:`_is_pressure_level`).
_PRESSURE_LEVEL_NAME = re.compile(
    r"^(level|levels|lev|plev|plevel|plevs|pressure|pressure_level|pressure_levels|pres|"
    r"isobaric|isobaricinhpa|isobaricinpa|levelist|lv_isbl|air_pressure)\d*(_\d+)?$")
#: standard_names of vertical coordinates that are not pressure.
_OTHER_VERTICAL = ("height", "altitude", "depth", "model_level_number",
                   "atmosphere_sigma_coordinate", "atmosphere_hybrid_sigma_pressure_coordinate",
                   "atmosphere_hybrid_height_coordinate", "air_potential_temperature",
                   "atmosphere_ln_pressure_coordinate", "height_above_ground")
#: Units of level indices and other vertical coordinates that pint does not read.
_LEVEL_INDEX_UNITS = ("level", "levels", "layer", "layers", "sigma", "index", "hybrid",
                      "model_level_number", "eta")


def _pressure_unit(units):
    """(is a pressure, factor to hPa): (True, f), (False, None) for other units, or
    (None, None) when ``units`` is empty or unreadable."""
    if not str(units).strip():
        return None, None
    quantity, factor, _ = _COMMON_UNITS.get(_spelled(units), (None, None, None))
    if quantity is not None:
        return (True, factor) if quantity == "pressure" else (False, None)
    unit = _parse_units(units)
    if unit is None:
        return None, None
    if unit.dimensionality != {"[mass]": 1, "[length]": -1, "[time]": -2}:
        return False, None
    return True, _affine(unit, "hPa")[0]


def _is_pressure_level(name, coord):
    """True when a coordinate is a pressure level, by CF attributes and units first:
    pressure units (hPa, Pa, mbar, kPa, ...) on a coordinate with ``axis: Z``, a
    ``positive`` attribute, standard_name ``air_pressure`` or a level name; with no
    units, standard_name ``air_pressure`` or a level name (the units are then inferred
    from the values). Other units, ``positive: up`` or another vertical standard_name
    say it is not."""
    if coord.ndim > 1 or np.issubdtype(coord.dtype, np.datetime64) or np.issubdtype(
            coord.dtype, np.timedelta64):
        return False
    attrs = coord.attrs
    standard = str(attrs.get("standard_name", "")).strip().lower()
    axis = str(attrs.get("axis", "")).strip().upper()
    positive = str(attrs.get("positive", "")).strip().lower()
    named = bool(_PRESSURE_LEVEL_NAME.match(str(name).lower()))
    if standard in _OTHER_VERTICAL or positive == "up" or axis in ("X", "Y", "T"):
        return False
    units = str(attrs.get("units", "")).strip()
    pressure, _ = _pressure_unit(units)
    if pressure is not None:
        return pressure
    if units.lower() in _LEVEL_INDEX_UNITS:
        return False
    return standard == "air_pressure" or named or (axis == "Z" and positive == "down")


def _is_two_metre(da):
    """True when ``da`` carries a height coordinate of 2 m (cfgrib's heightAboveGround,
    CF ``height``)."""
    for key, coord in da.coords.items():
        standard = str(coord.attrs.get("standard_name", "")).lower()
        if str(key).lower() in ("height", "heightaboveground", "height_above_ground",
                                "height2m") or standard == "height":
            values = np.atleast_1d(np.asarray(coord.values, dtype=float))
            units = str(coord.attrs.get("units", "m")).strip().lower() or "m"
            if units in ("m", "meter", "meters", "metre", "metres") and values.size == 1 \
                    and abs(values[0] - 2.0) < 1e-6:
                return True
    return False


# --------------------------------------------------------------------- curvilinear grids

#: Source points kept around each target point before the triangulation (see
#: :func:`_regrid_curvilinear`).
_NEIGHBOURS = 24
#: A curvilinear grid must lie within this angle (degrees) of its centre.
_MAX_CURVILINEAR_RADIUS_DEG = 80.0


def _unit_vectors(lat, lon):
    """Points on the unit sphere, shape (n, 3), from latitude and longitude in degrees."""
    phi, lam = np.radians(np.ravel(lat)), np.radians(np.ravel(lon))
    return np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam),
                            np.sin(phi)])


def _gnomonic(points, centre):
    """Gnomonic (central) projection of unit vectors onto the plane tangent at ``centre``:
    great circles become straight lines. Shape (n, 2), in units of the sphere radius."""
    axis = np.array([0.0, 0.0, 1.0]) if abs(centre[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    east = np.cross(axis, centre)
    east /= np.linalg.norm(east)
    north = np.cross(centre, east)
    along = points @ centre
    return np.column_stack([(points @ east) / along, (points @ north) / along])


def _regrid_curvilinear(ds, lat, lon, *, partial):
    """Linear interpolation of fields on a curvilinear grid (2-D ``lat`` and ``lon`` over
    dims ``(y, x)``) to the regular grid ``(lat, lon)``.

    The source points and the target points are projected gnomonically onto the plane
    tangent to the sphere at the centre of the source grid, the source points are
    triangulated (Delaunay, scipy / Qhull) and each target point takes the linear
    (barycentric) interpolation in its triangle (``scipy.interpolate.LinearNDInterpolator``).
    Target points outside the triangulation's hull are NaN; without ``partial`` any
    such point is refused, as :func:`regrid_to` refuses a regular grid too small.

    Why scipy rather than pyresample: scipy is already a dependency, the interpolation
    is exactly linear on the triangulation (pyresample's bilinear and kd-tree resamplers
    weight neighbours found within a search radius instead), and nothing more has to be
    installed. Why a gnomonic plane rather than 3-D Cartesian coordinates on the unit
    sphere: points on a sphere are all vertices of their 3-D convex hull, so a 3-D
    Delaunay triangulation fills the inside of the ball and leaves target points on
    the sphere just outside its flat faces (NaN); the gnomonic projection keeps the
    problem 2-D and maps great circles, the sides of spherical triangles, to straight
    lines, with no seam at the date line. It needs the grid within 80 degrees of its
    centre, which any regional model grid is.

    Only the :data:`_NEIGHBOURS` source points nearest each target point (a kd-tree
    on the sphere) are triangulated: a triangle of the full Delaunay triangulation
    has no other source point inside its circumcircle, so the triangle holding a
    target point, whose vertices and circumcircle lie among that point's nearest
    neighbours on a grid of regular spacing, is also a triangle of the smaller one.
    A 3 km grid of 2 million points is thus triangulated on a few tens of thousands.
    """
    from scipy.interpolate import LinearNDInterpolator
    from scipy.spatial import Delaunay, QhullError, cKDTree
    source = ds.attrs.get("source_files", "the field")
    lat = np.asarray(lat, dtype=float)
    lon = _wrap_lon(np.asarray(lon, dtype=float))
    y_dim, x_dim = ds["lat"].dims
    src_lat = np.asarray(ds["lat"].values, dtype=float)
    src_lon = np.asarray(ds["lon"].values, dtype=float)
    extent = (f"a curvilinear grid over lat {np.nanmin(src_lat):g} to {np.nanmax(src_lat):g}, "
              f"lon {np.nanmin(src_lon):g} to {np.nanmax(src_lon):g}")
    points = _unit_vectors(src_lat, src_lon)
    centre = points.mean(axis=0)
    centre /= np.linalg.norm(centre)
    if (points @ centre).min() < np.cos(np.radians(_MAX_CURVILINEAR_RADIUS_DEG)):
        raise AnalogsInputError(
            f"{source}: {extent} reaches more than {_MAX_CURVILINEAR_RADIUS_DEG:g} degrees "
            "from its centre; expected a regional grid (regrid a global one to latitude-"
            "longitude first)")
    grid_lat, grid_lon = np.meshgrid(lat, lon, indexing="ij")
    targets = _unit_vectors(grid_lat, grid_lon)
    facing = targets @ centre > np.cos(np.radians(_MAX_CURVILINEAR_RADIUS_DEG + 5.0))
    names = list(ds.data_vars)
    outer = [d for d in ds[names[0]].dims if d not in (y_dim, x_dim)]
    n_out = targets.shape[0]
    columns, shapes = [], []
    if len(points) <= _NEIGHBOURS:
        nearest = np.arange(len(points))
    else:
        nearest = np.unique(cKDTree(points).query(targets[facing], k=_NEIGHBOURS)[1])
    for name in names:
        da = ds[name].transpose(*outer, y_dim, x_dim)
        values = np.asarray(da.values, dtype=float).reshape(-1, points.shape[0])
        columns.append(values[:, nearest].T)
        shapes.append(values.shape[0])
    covered = np.zeros(n_out, dtype=bool)
    result = np.full((n_out, sum(shapes)), np.nan)
    if nearest.size >= 3 and facing.any():
        try:
            triangles = Delaunay(_gnomonic(points[nearest], centre))
        except QhullError as err:
            raise AnalogsInputError(f"{source}: {extent} cannot be triangulated "
                                    f"({_one_line(err)})") from None
        planar = _gnomonic(targets[facing], centre)
        covered[facing] = triangles.find_simplex(planar) >= 0
        result[facing] = LinearNDInterpolator(triangles, np.hstack(columns))(planar)
    if not covered.all() and not partial:
        raise AnalogsInputError(
            f"{source}: {extent} leaves {int((~covered).sum())} of the {n_out} points of "
            f"the target grid (lat {lat.min():g} to {lat.max():g}, lon {lon.min():g} to "
            f"{lon.max():g}) uncovered")
    result[~covered] = np.nan
    out = xr.Dataset(coords={"lat": ("lat", lat, dict(_LAT_ATTRS)),
                             "lon": ("lon", lon, dict(_LON_ATTRS))})
    for dim in outer:
        if dim in ds.coords:
            out = out.assign_coords({dim: ds[dim]})
    start = 0
    for name, size in zip(names, shapes):
        block = result[:, start:start + size].T.reshape(
            tuple(ds.sizes[d] for d in outer) + (lat.size, lon.size))
        start += size
        out[name] = xr.DataArray(block.astype(ds[name].dtype, copy=False),
                                 dims=(*outer, "lat", "lon"), attrs=dict(ds[name].attrs))
    out.attrs = dict(ds.attrs)
    return out


# ---------------------------------------------- moisture fields computed from other variables

#: Variables a moisture field can be computed from (:mod:`analogs.stages.humidity`), by
#: standard_name, then by name: "td" dewpoint, "t" air temperature, "rh" relative
#: humidity, "q" specific humidity, "ps" surface pressure (cfgrib's names included).
_INGREDIENT_STANDARD_NAMES = {"dew_point_temperature": "td", "air_temperature": "t",
                              "relative_humidity": "rh", "specific_humidity": "q",
                              "surface_air_pressure": "ps"}
_INGREDIENT_NAMES = {
    "td": ("dpt", "td", "dewpoint", "dew_point", "dew_point_temperature", "d2m", "2d",
           "td2m", "td2", "dpt2m"),
    "t": ("t", "ta", "tmp", "air", "temp", "temperature", "air_temperature", "t2m", "2t",
          "t2", "tas", "tmp2m"),
    "rh": ("r", "rh", "hur", "rhum", "relhum", "relative_humidity", "r2", "2r", "rh2m",
           "rh2", "hurs"),
    "q": ("q", "shum", "hus", "sphum", "specific_humidity", "sh2", "2sh", "q2", "q2m",
          "huss", "spfh2m"),
    "ps": ("sp", "ps", "psfc", "surface_pressure", "surface_air_pressure", "pressfc"),
}
#: Names that say "at 2 m" by themselves (a height coordinate of 2 m says it too).
_TWO_METRE_NAMES = frozenset({"d2m", "2d", "td2m", "td2", "dpt2m", "t2m", "2t", "t2", "tas",
                              "tmp2m", "r2", "2r", "rh2m", "rh2", "hurs", "sh2", "2sh", "q2",
                              "q2m", "huss", "spfh2m"})
#: Ways to a moisture field, tried in order when a file lacks it: (field, ingredients,
#: where they must be). "p" is the field's pressure level, "2m" a 2 m height.
_MOISTURE_RECIPES = (
    ("q850", ("td",), {"td": "p"}),
    ("q850", ("rh", "t"), {"rh": "p", "t": "p"}),
    ("td2m", ("rh", "t"), {"rh": "2m", "t": "2m"}),
    ("td2m", ("q", "ps"), {"q": "2m", "ps": "surface"}),
)
#: Canonical units of each ingredient (pint), and the range its values must lie in.
_INGREDIENT_UNITS = {"td": ("K", "[temperature]", (150.0, 350.0)),
                     "t": ("K", "[temperature]", (150.0, 350.0)),
                     "rh": ("dimensionless", "", (-0.05, 1.5)),
                     "q": ("dimensionless", "", (-1e-3, 0.05)),
                     "ps": ("hPa", "pressure", (300.0, 1100.0))}
#: Missing units inferred from the magnitude, as in :data:`_INFERENCE`: (window, units).
_INGREDIENT_INFERENCE = {
    "td": (((150.0, 350.0), "K"), ((-100.0, 60.0), "degC")),
    "t": (((150.0, 350.0), "K"), ((-100.0, 60.0), "degC")),
    "rh": (((-0.05, 1.2), "1"), ((1.5, 110.0), "%")),
    "q": (((-1e-3, 0.05), "kg kg-1"), ((1.0, 30.0), "g kg-1")),
    "ps": (((30000.0, 110000.0), "Pa"), ((300.0, 1100.0), "hPa")),
}
_INGREDIENT_WORDS = {"td": "dewpoint", "t": "temperature", "rh": "relative humidity",
                     "q": "specific humidity", "ps": "surface pressure"}


def _ingredient_kind(name, var):
    """(kind, level in hPa implied by the name or None) of a variable a moisture field
    can be computed from, or (None, None)."""
    standard = str(var.attrs.get("standard_name", "")).strip().lower()
    if standard in _INGREDIENT_STANDARD_NAMES:
        return _INGREDIENT_STANDARD_NAMES[standard], None
    lowered = str(name).lower()
    for kind, names in _INGREDIENT_NAMES.items():
        if lowered in names:
            return kind, None
    match = _SUFFIXED_NAME.match(lowered)
    if match:
        for kind, names in _INGREDIENT_NAMES.items():
            if match.group(1) in names and kind != "ps":
                return kind, float(match.group(2))
    return None, None


def _ingredient_place(name, var, implied):
    """Where an ingredient variable is: ``("p", levels in hPa)`` on pressure levels,
    ``("2m", None)`` at 2 m, ``("surface", None)``, or ``(None, None)`` unknown."""
    if implied is not None:
        return "p", np.array([implied])
    keys = _level_coords(var)
    if keys:
        coord = var.coords[keys[0]]
        return "p", _levels_in_hpa(coord, f"variable {name!r}")
    if str(name).lower() in _TWO_METRE_NAMES or _is_two_metre(var):
        return "2m", None
    return None, None


def _converted_moisture(path, parts, present):
    """Candidates for the moisture fields a file lacks but can give by conversion
    (:data:`_MOISTURE_RECIPES`): 850 hPa specific humidity from the 850 hPa dewpoint
    or from 850 hPa relative humidity and temperature, the 2 m dewpoint from 2 m
    relative humidity and temperature or from 2 m specific humidity and surface
    pressure. ``present``: fields the file holds as such (never replaced)."""
    found = {}
    for part in parts:
        for name, var in part.data_vars.items():
            if var.ndim < 2:
                continue
            kind, implied = _ingredient_kind(name, var)
            if kind is None:
                continue
            if kind == "ps":
                found.setdefault((kind, "surface"), (part, str(name), None))
                continue
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # level units are checked when used
                place, levels = _ingredient_place(name, var, implied)
            if place == "p" and np.any(np.abs(levels - FIELD_LEVEL_HPA["q850"]) < 0.5):
                found.setdefault((kind, "p"), (part, str(name), implied))
            elif place == "2m":
                found.setdefault((kind, "2m"), (part, str(name), None))
    candidates = []
    for field, kinds, places in _MOISTURE_RECIPES:
        if field in present or any(c.field == field for c in candidates):
            continue
        inputs = [found.get((kind, places[kind])) for kind in kinds]
        if all(inputs):
            dataset, name = _moisture_dataset(path, field, kinds, inputs, places)
            candidates.append(_Candidate(path, dataset, name, field, FIELD_LEVEL_HPA[field],
                                         computed_from=dataset[name].attrs["comment"]))
    return candidates


def _ingredient_array(path, part, name, kind, place, implied, field):
    """One ingredient in its canonical units (:data:`_INGREDIENT_UNITS`), at the level
    the recipe needs (its other dims untouched)."""
    where = f"{path}: variable {name!r}"
    da = part[name]
    if place == "p":
        da, _ = _select_level(da, field, implied, where, keep=())
    elif place == "2m":
        heights = [k for k in da.dims if str(k).lower() in (
            "height", "heightaboveground", "height_above_ground")]
        for key in heights:
            values = np.asarray(da[key].values, dtype=float)
            hits = np.flatnonzero(np.abs(values - 2.0) < 1e-6)
            if hits.size == 0:
                raise AnalogsInputError(f"{where}: no 2 m height in {key}=[{_list(values)}]")
            da = da.isel({key: int(hits[0])})
    target, dimension, (low_ok, high_ok) = _INGREDIENT_UNITS[kind]
    raw = " ".join(str(da.attrs.get("units", "")).split())
    low, high = _sample_range(da)
    if raw:
        unit = _parse_units(raw)
        ok = unit is not None and (
            (dimension == "" and not unit.dimensionality)
            or (dimension == "pressure"
                and unit.dimensionality == {"[mass]": 1, "[length]": -1, "[time]": -2})
            or (dimension and dimension != "pressure"
                and unit.dimensionality == {dimension: 1}))
        if not ok:
            raise AnalogsInputError(
                f"{where} has units {raw!r}; a {_INGREDIENT_WORDS[kind]} needs units of "
                f"{'a ratio' if not dimension else dimension.strip('[]')} "
                f"(e.g. {_INGREDIENT_INFERENCE[kind][0][1]!r})")
        label = raw
    else:
        label = next((units for (lo, hi), units in _INGREDIENT_INFERENCE[kind]
                      if np.isfinite(low) and lo <= low and high <= hi), None)
        if label is None:
            raise AnalogsInputError(
                f"{where} has no units and its values ({low:.4g} to {high:.4g}) do not say "
                f"which; set its units attribute (e.g. units="
                f"'{_INGREDIENT_INFERENCE[kind][0][1]}')")
        warnings.warn(f"{where} has no units; {label!r} inferred from the magnitude of its "
                      "values", UserWarning, stacklevel=5)
        unit = _parse_units(label)
    factor, offset = _affine(unit, target)
    if np.isfinite(low) and not (low_ok <= low * factor + offset
                                 and high * factor + offset <= high_ok):
        raise AnalogsInputError(
            f"{where} has units {label!r}, which give values of {low * factor + offset:.4g} "
            f"to {high * factor + offset:.4g} {target}: not a plausible "
            f"{_INGREDIENT_WORDS[kind]} ({low_ok:g} to {high_ok:g} {target})")
    if not np.issubdtype(da.dtype, np.floating):
        da = da.astype("float32")
    return da * factor + offset if (factor, offset) != (1.0, 0.0) else da


def _moisture_dataset(path, field, kinds, inputs, places):
    """(Dataset, variable name) holding ``field`` computed from ``inputs`` (one
    (dataset, name, implied level) per kind), with the dims and coordinates of its
    ingredients, ready for :func:`_canonical_array` like any variable of a file."""
    from analogs.stages import humidity
    arrays = {kind: _ingredient_array(path, part, name, kind, places[kind], implied, field)
              for kind, (part, name, implied) in zip(kinds, inputs)}
    names = [name for _, name, _ in inputs]
    try:
        aligned = dict(zip(arrays, xr.align(*arrays.values(), join="exact")))
    except ValueError:
        raise AnalogsInputError(
            f"{path}: {' and '.join(repr(n) for n in names)} are on different grids or "
            f"times; {field} is computed from them point by point") from None
    if field == "q850":
        pressure = FIELD_LEVEL_HPA[field]
        if kinds == ("td",):
            value = humidity.specific_humidity_from_dewpoint(aligned["td"], pressure)
        else:
            value = humidity.specific_humidity_from_relative_humidity(
                aligned["t"], aligned["rh"], pressure)
    elif kinds == ("rh", "t"):
        value = humidity.dewpoint_from_relative_humidity(aligned["t"], aligned["rh"])
    else:
        value = humidity.dewpoint_from_specific_humidity(aligned["q"], aligned["ps"])
    words = " and ".join(f"{_INGREDIENT_WORDS[k]} {n!r}" for k, n in zip(kinds, names))
    value.attrs = {"units": FIELD_ATTRS[field]["units"],
                   "standard_name": FIELD_ATTRS[field]["standard_name"],
                   "comment": f"computed from {words} (Bolton 1980)"}
    name = f"{field}_from_{'_'.join(names)}"
    return value.to_dataset(name=name), name


# ------------------------------------------------ recognition and canonical axes (15a)

def _candidates_in(path, parts):
    """The canonical fields of one file's parts (the first of each field), then the
    moisture fields it can give by conversion (:func:`_converted_moisture`)."""
    found, taken = [], set()
    for part in parts:
        for candidate in _recognise(path, part):
            if candidate.field not in taken:
                taken.add(candidate.field)
                found.append(candidate)
    return found + _converted_moisture(path, parts, taken)


def _misplaced(field, var):
    """True when a variable named like ``field`` is at another level: a dewpoint or
    precipitable water on pressure levels (an 850 hPa dewpoint gives q850 by
    conversion), a specific humidity at 2 m."""
    if FIELD_LEVEL_HPA[field] is None:
        for key in _level_coords(var):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                levels = _levels_in_hpa(var.coords[key], "")
            if np.any((levels > 50.0) & (levels < 1100.0)):
                return True
        return False
    if field == "q850":
        return _is_two_metre(var) or str(var.name).lower() in _TWO_METRE_NAMES
    return False


def _say_computed(chosen, candidates, source):
    """A warning for each chosen field that is computed from other variables."""
    said = set()
    for candidate in candidates:
        if candidate.field in chosen and candidate.computed_from and (
                candidate.field, candidate.computed_from) not in said:
            said.add((candidate.field, candidate.computed_from))
            warnings.warn(f"{source}: {candidate.field} {candidate.computed_from}",
                          UserWarning, stacklevel=3)


def _other_moisture(arrays, candidates, member):
    """Canonical arrays of the moisture fields a target file gives besides those in
    ``arrays``, so that a store built from any of them finds its field; one on
    another grid or other times, or that cannot be read, is left out."""
    reference = next(iter(arrays.values()))
    extra = {}
    for field in MOISTURE_PREFERENCE:
        candidate = next((c for c in candidates if c.field == field), None)
        if field in arrays or candidate is None:
            continue
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                array = _target_array(candidate, member)
        except AnalogsInputError:
            continue
        if (_same_grid(reference, array) and array.sizes == reference.sizes
                and np.array_equal(array["time"].values, reference["time"].values)):
            extra[field] = array
    return extra


def _two_d_axis(coord, key, standard_name, where):
    """(dim names, 2-D values) of a curvilinear latitude or longitude coordinate."""
    return (tuple(str(d) for d in coord.dims),
            _coordinate_values(coord, key, standard_name, where))


def _coordinate_values(coord, key, standard_name, where) -> np.ndarray:
    """A latitude or longitude coordinate's values in degrees, refused when some are
    missing or a latitude leaves [-90, 90]."""
    values = np.asarray(coord.values, dtype=float)
    if not np.all(np.isfinite(values)):
        raise AnalogsInputError(f"{where}: {standard_name} {key!r} has missing values")
    if standard_name == "latitude" and np.abs(values).max() > 90.0 + 1e-6:
        raise AnalogsInputError(
            f"{where}: latitude {key!r} reaches {np.abs(values).max():g}; expected "
            "degrees north within [-90, 90]")
    return values


def _horizontal_dims(lat_dim, lon_dim, where):
    """(y dim, x dim) of a grid: the dims of 1-D latitude and longitude, or the two dims
    shared by 2-D latitude and longitude."""
    two_d = (isinstance(lat_dim, tuple), isinstance(lon_dim, tuple))
    if two_d == (False, False):
        return lat_dim, lon_dim
    if two_d != (True, True) or lat_dim != lon_dim:
        raise AnalogsInputError(
            f"{where}: latitude over {lat_dim} and longitude over {lon_dim} do not form "
            "one grid; expected both 1-D or both 2-D over the same two dims")
    return lat_dim


def _on_canonical_axes(da, dims, times, lat, lon):
    """``da`` with dims (time, lat, lon), or (time, y, x) with 2-D ``lat`` and ``lon``
    coordinates (wrapped to [-180, 180)) for a curvilinear grid."""
    time_dim, lat_dim, lon_dim = dims
    da = da.transpose(time_dim, lat_dim, lon_dim)
    if np.ndim(lat) == 1:
        da = da.rename({time_dim: "_t", lat_dim: "_y", lon_dim: "_x"}).rename(
            {"_t": "time", "_y": "lat", "_x": "lon"})
        # Wrapped here, so that normalise_grid finds nothing to relabel on a sorted grid.
        return da.assign_coords(time=times, lat=lat, lon=_wrap_lon(lon))
    da = da.rename({time_dim: "_t", lat_dim: "_y", lon_dim: "_x"}).rename(
        {"_t": "time", "_y": "y", "_x": "x"})
    return da.assign_coords(time=times, lat=(("y", "x"), lat, dict(_LAT_ATTRS)),
                            lon=(("y", "x"), _wrap_lon(lon), dict(_LON_ATTRS)))


def _same_grid(a, b):
    """True when two canonical arrays have the same grid (1-D or 2-D coordinates)."""
    if a["lat"].shape != b["lat"].shape or a["lon"].shape != b["lon"].shape:
        return False
    return bool(np.allclose(a["lat"], b["lat"], atol=1e-4)
                and np.allclose(_wrap_lon(a["lon"].values), _wrap_lon(b["lon"].values),
                                atol=1e-4))


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
