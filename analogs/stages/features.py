r"""Trough and ridge axes of a 500 hPa height field (pure: xarray in, pandas out).

A trough axis in the westerlies is where the geostrophic meridional wind
:math:`v_g = \frac{g}{f}\frac{\partial Z}{\partial x}` turns from northerly to
southerly going east, i.e. where the height has a minimum along the latitude circle
(:math:`\partial Z/\partial x = 0`, :math:`\partial^2 Z/\partial x^2 > 0`): the contours
are most cyclonically curved there. A ridge axis is the maximum
(:math:`\partial^2 Z/\partial x^2 < 0`). Definitions: Holton and Hakim (2013), *An
Introduction to Dynamic Meteorology*, 5th ed., sections 3.2 and 6.1 (geostrophic wind
and the wave pattern of the westerlies; from memory); Bluestein (1993), *Synoptic-Dynamic
Meteorology in Midlatitudes*, vol. II (trough and ridge axes as lines of extreme
curvature of the height contours; from memory).

Points found on each latitude row are joined into lines from south to north, nearest
first, within :data:`AXIS_DEFAULTS` ``max_step_km``; short lines and weak bends
(``min_curvature``) are left out (our own linking rules: common practice, no source).
The maps draw these lines; nothing else uses them.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import xarray as xr

from analogs.constants import EARTH_RADIUS
from analogs.errors import AnalogsInputError
from analogs.geo import zonal_derivative

#: Defaults of :func:`trough_ridge_axes`. ``min_curvature`` 30 gpm per (1000 km)^2: a
#: wave of 12 gpm amplitude and 4000 km wavelength, :math:`A (2\pi/L)^2`, the weakest a
#: 60 gpm contour interval still shows bending; ``min_length_km`` 800: a synoptic-scale
#: axis, longer than a wiggle of the grid; ``max_step_km`` 400 between consecutive
#: latitude rows: an axis tilts, it does not jump; ``smoothing_passes`` 2 of a 1-2-1
#: filter along each latitude row (and one across rows), so that grid-scale noise does
#: not make axes (all common practice, no source).
AXIS_DEFAULTS = {"min_curvature": 30.0, "min_length_km": 800.0, "max_step_km": 400.0,
                 "smoothing_passes": 2}

_KM = 1000.0


def _smooth(z, passes):
    """1-2-1 smoothing along longitude ``passes`` times and once along latitude, of
    fields (..., lat, lon); the edge values are kept."""
    z = z.copy()
    for _ in range(passes):
        z[..., 1:-1] = 0.25 * z[..., :-2] + 0.5 * z[..., 1:-1] + 0.25 * z[..., 2:]
    if z.shape[-2] > 2:
        z[..., 1:-1, :] = 0.25 * z[..., :-2, :] + 0.5 * z[..., 1:-1, :] + 0.25 * z[..., 2:, :]
    return z


def _crossings(slope, curvature, lon, margin):
    """Each sign change of ``slope`` (..., lat, lon) along the rows, at least ``margin``
    columns from either edge (where the smoothing and the one-sided differences bend
    the field): (index tuple of the field and row, longitude, curvature, kind), kind +1
    for a minimum (trough), -1 for a maximum, in the order of the fields, rows and
    columns; placed by linear interpolation between the columns j and j+1."""
    a, b = slope[..., :-1], slope[..., 1:]
    change = np.isfinite(a) & np.isfinite(b) & (np.sign(a) != np.sign(b)) & (a != 0)
    change[..., :margin] = False
    change[..., max(change.shape[-1] - margin, 0):] = False
    *where, j = np.nonzero(change)
    a, b = a[(*where, j)], b[(*where, j)]
    share = a / (a - b)
    x = lon[j] + share * (lon[j + 1] - lon[j])
    c = curvature[(*where, j)] + share * (curvature[(*where, j + 1)] - curvature[(*where, j)])
    return where, x, c, np.where(b > a, 1, -1)


def _link(points, max_step_km):
    """Lines of points [(row, lat, lon, curvature)], joined row to row, nearest first.
    Distances in km on the sphere's local plane (the scalar maths of ``math``: numpy's
    degrees-to-radians and cosine give the same numbers, at a tenth of the cost per
    call; numpy's hypot kept, whose last bit ``math.hypot`` does not always share)."""
    radius_km = EARTH_RADIUS / _KM
    by_row = {}
    for p in points:
        by_row.setdefault(p[0], []).append(p)
    lines, open_lines = [], []
    for row in sorted(by_row):
        here = by_row[row]
        candidates = [line for line in open_lines if line[-1][0] == row - 1]
        pairs = []
        for i, p in enumerate(here):
            for k, line in enumerate(candidates):
                last = line[-1]
                dx = radius_km * math.radians(p[2] - last[2]) * math.cos(
                    math.radians(0.5 * (p[1] + last[1])))
                dy = radius_km * math.radians(p[1] - last[1])
                pairs.append((float(np.hypot(dx, dy)), i, k))
        taken_points, taken_lines = set(), set()
        for distance, i, k in sorted(pairs):
            if distance > max_step_km or i in taken_points or k in taken_lines:
                continue
            candidates[k].append(here[i])
            taken_points.add(i)
            taken_lines.add(k)
        for i, p in enumerate(here):
            if i not in taken_points:
                line = [p]
                lines.append(line)
                open_lines.append(line)
        open_lines = [line for line in open_lines if line[-1][0] == row]
    return lines


def _length_km(line):
    lat = np.radians([p[1] for p in line])
    lon = np.radians([p[2] for p in line])
    dx = np.diff(lon) * np.cos(0.5 * (lat[1:] + lat[:-1]))
    return float(np.sum(np.hypot(dx, np.diff(lat))) * EARTH_RADIUS / _KM)


def trough_ridge_axes(z500: xr.DataArray, *, min_curvature=AXIS_DEFAULTS["min_curvature"],
                      min_length_km=AXIS_DEFAULTS["min_length_km"],
                      max_step_km=AXIS_DEFAULTS["max_step_km"],
                      smoothing_passes=AXIS_DEFAULTS["smoothing_passes"]) -> pd.DataFrame:
    r"""Trough and ridge axes of 500 hPa height on (lat, lon), or (time, lat, lon).

    On each latitude row of the lightly smoothed height :math:`Z` (gpm), a trough
    point is where :math:`\partial Z/\partial x` (per metre along the latitude circle,
    :func:`analogs.geo.zonal_derivative`) changes sign from negative to positive, a
    ridge point from positive to negative, placed by linear interpolation between
    the grid columns; a point counts when :math:`|\partial^2 Z/\partial x^2|`
    there is at least ``min_curvature`` gpm per (1000 km)^2. Points are joined into
    lines across consecutive rows (:func:`_link`); lines shorter than
    ``min_length_km`` are dropped. Crossings within ``smoothing_passes + 2`` columns
    of the grid's west or east edge are not looked for: the smoothing keeps the edge
    values and the differences there are one-sided, which moves an axis by up to a
    grid length. See the module docstring for the references.

    Longitudes are taken in the grid's order (ascending, as on a store grid); a
    crossing of a global grid's seam is not looked for.

    Returns
    -------
    DataFrame with one row per point: ``time`` (when ``z500`` has one), ``kind``
    ("trough" or "ridge"), ``axis`` (an integer per line, unique within a time),
    ``lat``, ``lon`` (degrees) and ``curvature`` (:math:`\partial^2 Z/\partial x^2`,
    gpm per (1000 km)^2; positive at troughs), points of a line ordered south to north.
    """
    if not isinstance(z500, xr.DataArray) or not {"lat", "lon"} <= set(z500.dims):
        raise AnalogsInputError("trough_ridge_axes needs a DataArray of 500 hPa height "
                                "(gpm) on (lat, lon) or (time, lat, lon)")
    has_time = "time" in z500.dims
    z500 = z500 if has_time else z500.expand_dims("time")
    z500 = z500.transpose("time", "lat", "lon")
    lat = np.asarray(z500["lat"].values, dtype=float)
    lon = np.asarray(z500["lon"].values, dtype=float)
    if lon.size < 3 or lat.size < 2:
        raise AnalogsInputError("trough_ridge_axes needs at least 2 latitudes and 3 longitudes")
    # Every field at once (elementwise, the same numbers as one field at a time).
    z = _smooth(np.asarray(z500.values, dtype=float), smoothing_passes)
    slope = zonal_derivative(z, lat, lon)                          # gpm per metre
    curvature = zonal_derivative(slope, lat, lon) * (1000.0 * _KM) ** 2
    (field, row), x, bend, kinds = _crossings(slope, curvature, lon, smoothing_passes + 2)
    kept = np.isfinite(bend) & (np.abs(bend) >= min_curvature) & (np.sign(bend) == kinds)
    field, row, x, bend, kinds = field[kept], row[kept], x[kept], bend[kept], kinds[kept]
    rows = []
    for t in range(z.shape[0]):
        points = {1: [], -1: []}
        for k in np.flatnonzero(field == t):
            points[int(kinds[k])].append((int(row[k]), lat[row[k]], x[k], bend[k]))
        number = 0
        for kind, name in ((1, "trough"), (-1, "ridge")):
            for line in _link(points[kind], max_step_km):
                if len(line) < 2 or _length_km(line) < min_length_km:
                    continue
                for _, la, lo, c in line:
                    rows.append((t, name, number, la, lo, c))
                number += 1
    table = pd.DataFrame(rows, columns=["t", "kind", "axis", "lat", "lon", "curvature"])
    if has_time:
        table.insert(0, "time", z500["time"].values[table.pop("t").to_numpy(dtype=int)])
    else:
        table = table.drop(columns="t")
    return table


def synoptic_marks(z500: xr.DataArray, dim: str = "time") -> pd.DataFrame:
    """What a map marks on each 500 hPa height field of ``z500`` (``dim``, lat, lon):
    trough and ridge axes (:func:`trough_ridge_axes`) and the centres of closed lows
    (:func:`analogs.stages.diagnostics.find_closed_lows` with its defaults, closed
    circulations only: the sharp trough of an open wave is a compact low to that search
    but not closed). One table:
    ``panel`` (position along ``dim``), ``kind`` ("trough", "ridge" or "low"), ``axis``
    (line number; -1 for a low), ``lat``, ``lon``."""
    from analogs.stages.diagnostics import find_closed_lows
    z = z500.transpose(dim, "lat", "lon")
    z = z.drop_vars([c for c in z.coords if c not in ("lat", "lon")]).rename({dim: "time"})
    z = z.assign_coords(time=np.arange(z.sizes["time"]))
    axes = trough_ridge_axes(z).rename(columns={"time": "panel"})
    lows = find_closed_lows(z, closed_only=True)
    lows = pd.DataFrame({"panel": lows["time"].to_numpy(dtype=int), "kind": "low",
                         "axis": -1, "lat": lows["lat"].to_numpy(),
                         "lon": lows["lon"].to_numpy()})
    return pd.concat([axes.drop(columns="curvature"), lows], ignore_index=True)


__all__ = ["AXIS_DEFAULTS", "synoptic_marks", "trough_ridge_axes"]
