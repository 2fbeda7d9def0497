r"""Physical diagnostics of the 500 hPa flow and low-level moisture, for regimes.

Pure, vectorised functions on canonical fields (dims ``(..., lat, lon)``, ``lat``
ascending, ``lon`` in degrees east, ``z500`` in gpm). The maths is plain numpy on
arrays whose last two axes are (lat, lon); thin xarray wrappers add labels, units and
``long_name`` and go through ``xarray.apply_ufunc(..., dask="parallelized")``, so a
dask-backed archive chunked along ``time`` stays lazy until asked. Fields must have a
single chunk along ``lat`` and ``lon``.

The sphere, whole: derivatives come from :mod:`analogs.geo`, which reads longitudes
by their circular spacing (periodic on a grid that goes round the globe; continuous
across the seam of a domain over the date line, which
:func:`analogs.stages.sources.normalise_grid` stores as two pieces of [-180, 180)),
and treats pole rows (the polar-cap gradient and circulation on a periodic grid; left
out, NaN, on a limited one). Regions, ridge and trough windows and the closed-low
search use the same circular reading, so every diagnostic is the same under a pure
longitude shift of the weather and the grid. Area means skip NaN.

:func:`compute_diagnostics` reduces a whole archive to one row a day over a region
(a tuple ``(south, north, west, east)`` in degrees; west > east crosses the date
line), walking the archive in blocks of days so that memory stays bounded and
dask-backed inputs compute one block at a time.

No I/O and no store: outcomes (tropical-cyclone centres) and reports reuse these.

References
----------
- Holton, J. R. and G. J. Hakim, 2013: *An Introduction to Dynamic Meteorology*,
  5th ed., Academic Press (geostrophic wind, vorticity on the sphere, advection,
  circulation theorem).
- Bolton, D., 1980: The computation of equivalent potential temperature.
  *Mon. Wea. Rev.*, 108, 1046-1053 (saturation vapour pressure over water).
- MetPy (May et al., 2022, *Bull. Amer. Meteor. Soc.*), whose ``geostrophic_wind``,
  ``vorticity``, ``advection``, ``wind_direction`` and
  ``dewpoint_from_specific_humidity`` the tests use as the reference.
- Nieto, R., and co-authors, 2005: Climatological features of cutoff low systems in
  the Northern Hemisphere. *J. Climate*, 18, 3085-3103 (a closed 500 hPa low: the
  height rises by at least 10 gpm in at least 6 of 8 directions; from memory).
- Hart, R. E. and J. L. Evans, 2001: A climatology of the extratropical transition of
  Atlantic tropical cyclones. *J. Climate*, 14, 546-564 (transition mostly between
  about 30 and 45 N, furthest north in August-September; from memory).
"""

from __future__ import annotations

import numbers
import os
import warnings
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from analogs.constants import (
    BOLTON_A_HPA,
    BOLTON_B,
    BOLTON_C_DEGC,
    EARTH_RADIUS,
    EPSILON,
    G0,
    OMEGA,
    SEVERE_DEWPOINT_C,
    ZERO_CELSIUS_K,
)
from analogs.errors import AnalogsInputError
from analogs.geo import (
    great_circle_km,
    longitude_frame,
    meridional_derivative,
    pole_neighbour_rows,
    pole_rows,
    spherical_gradient,
    wrap_longitude,
    zonal_derivative,
)

__all__ = [
    "coriolis_parameter",
    "geostrophic_wind",
    "relative_vorticity",
    "geostrophic_vorticity",
    "advection",
    "wind_direction",
    "wind_speed",
    "region_mask",
    "region_mean_flow",
    "wave_anomaly",
    "zonal_median",
    "ridge_trough",
    "find_closed_lows",
    "dewpoint_from_specific_humidity",
    "moisture_field",
    "moist_line_latitude",
    "moist_area_fraction",
    "compute_diagnostics",
    "RichMoisture",
    "RICH_MOISTURE",
    "CLOSED_LOW_DEFAULTS",
    "DIAGNOSTIC_UNITS",
]

#: Geostrophic balance is meaningless near the equator, where f -> 0; the geostrophic
#: wind is NaN equatorward of this latitude (degrees, common practice, no source).
MIN_GEOSTROPHIC_LAT_DEG = 5.0
#: Length of one degree of latitude on the project's sphere, km.
_KM_PER_DEG = np.pi * EARTH_RADIUS / 180.0 / 1000.0
_HEIGHT_UNITS = {"gpm", "m", "meter", "meters", "metre", "metres", "geopotential_meter"}
_GRID = ["lat", "lon"]


@dataclass(frozen=True)
class RichMoisture:
    """The threshold of "rich low-level moisture" at the level of one moisture field.

    ``threshold`` is in ``units`` (degC for a dewpoint, kg m-2 for precipitable
    water); ``measure`` names the quantity compared; ``source`` says where the number
    comes from.
    """

    field: str
    measure: str
    threshold: float
    units: str
    source: str

    def to_dict(self) -> dict:
        return {"field": self.field, "measure": self.measure,
                "threshold": float(self.threshold), "units": self.units,
                "source": self.source}


#: Rich low-level moisture, per canonical moisture field, at that field's own level.
#: The moisture line (:func:`moist_line_latitude`) and area fraction
#: (:func:`moist_area_fraction`) of :func:`compute_diagnostics` use these.
RICH_MOISTURE = {
    "td2m": RichMoisture(
        "td2m", "2 m dewpoint", SEVERE_DEWPOINT_C, "degC",
        "the 60 F (15.6 C) surface dewpoint line of severe-weather forecasting "
        "(common practice, no source)"),
    "q850": RichMoisture(
        "q850", "850 hPa dewpoint", 12.0, "degC",
        "rich low-level moisture at 850 hPa: 850 hPa dewpoints of 12 C or more mark a "
        "rich moist tongue, 8 C its edge (common practice, from memory); the 60 F "
        "surface dewpoint's mixing ratio (11.3 g/kg at 1000 hPa) carried up a well-mixed "
        "layer is a 13 C dewpoint at 850 hPa (Bolton 1980 arithmetic), rounded down "
        "because the moist layer is rarely mixed that deep"),
    "pwat": RichMoisture(
        "pwat", "precipitable water", 30.0, "kg m-2",
        "the precipitable water that goes with a 60 F surface dewpoint: 29 mm by "
        "Reitan's (1963, J. Appl. Meteor.) ln W - dewpoint relation (from memory) and "
        "28 mm by the pooled global radiosonde fit ln W = 0.058 Td + 2.42 (W in mm, Td "
        "in C; 'Comparison of two models relating precipitable water to surface "
        "humidity using globally distributed radiosonde data over land surfaces', "
        "Int. J. Climatol.), rounded to 30; a moist tropical air mass holds 40-50 mm "
        "or more (common practice)"),
}

#: Defaults of the closed-low search (:func:`find_closed_lows`), each with its basis.
#: ``max_lat`` 40: Atlantic tropical cyclones that undergo extratropical transition do
#: so mostly between about 30 and 45 N (Hart and Evans 2001, from memory), and the
#: remnants of landfalling storms keep a compact 500 hPa circulation while they move
#: inland to 35-40 N (common practice); whether a low is tropical is for the regime
#: rules. ``min_depth`` 15 gpm over a 500-800 km ring and ``max_radius_km`` 600 km
#: (half-depth radius): a compact low, unlike a broad mid-latitude trough (common
#: practice, no source). ``poleward_rise_gpm`` 0: the test of a closed circulation
#: (the ``closed`` flag of each low, ``tc_closed``): the total height rises somewhere
#: poleward of the centre, i.e. easterly geostrophic flow on the poleward side, the
#: "cut off from the westerlies" condition of cut-off low climatologies such as Nieto
#: et al. 2005 (from memory); an open trough fails it along its axis. ``min_ring_valid`` 0.75: at least three
#: quarters of the ring's grid points have a value (missing values are skipped).
CLOSED_LOW_DEFAULTS = {
    "max_lat": 40.0,
    "min_depth": 15.0,
    "max_radius_km": 600.0,
    "ring_km": (500.0, 800.0),
    "neighbourhood_km": 400.0,
    "moisture_radius_km": 500.0,
    "poleward_rise_gpm": 0.0,
    "min_ring_valid": 0.75,
}

#: Units of every column of :func:`compute_diagnostics`.
DIAGNOSTIC_UNITS = {
    "flow_u_ms": "m s-1",
    "flow_v_ms": "m s-1",
    "flow_direction_deg": "degree (from which, 0 = north, 90 = east)",
    "flow_speed_ms": "m s-1",
    "height_gradient": "gpm (1000 km)-1",
    "vorticity": "s-1",
    "vorticity_advection": "s-2",
    "cyclonic_advection": "s-2",
    "ridge_lon": "degree_east",
    "ridge_amplitude": "gpm",
    "trough_lon": "degree_east",
    "trough_amplitude": "gpm",
    "tc_present": "1",
    "tc_closed": "1",
    "tc_lat": "degree_north",
    "tc_lon": "degree_east",
    "tc_depth": "gpm",
    "tc_radius_km": "km",
    "tc_dewpoint_c": "degC",
    "moisture_available": "1",
    "dewpoint_region_c": "degC",
    "moist_line_lat": "degree_north",
    "moist_area_fraction": "1",
    "pwat_region": "kg m-2",
}


# --------------------------------------------------------------------------- checks


def _check_field(field, name: str, owner: str) -> xr.DataArray:
    if not isinstance(field, xr.DataArray):
        raise AnalogsInputError(
            f"The {name!r} argument of {owner} must be an xarray.DataArray with dims "
            f"(..., lat, lon). Got {type(field).__name__} instead.")
    missing = [d for d in _GRID if d not in field.dims]
    if missing:
        raise AnalogsInputError(
            f"The {name!r} argument of {owner} must have dims (..., lat, lon); "
            f"it has {tuple(field.dims)} (missing {', '.join(missing)}).")
    lat = np.asarray(field["lat"].values, dtype=float)
    if lat.size > 1 and not np.all(np.diff(lat) > 0):
        raise AnalogsInputError(
            f"The 'lat' coordinate of {name!r} in {owner} must be ascending; "
            "sort it with .sortby('lat') (analogs.stages.sources does this for files).")
    return field


def _check_height(z500, owner: str) -> xr.DataArray:
    z500 = _check_field(z500, "z500", owner)
    units = z500.attrs.get("units")
    if units is not None and str(units).strip() not in _HEIGHT_UNITS:
        raise AnalogsInputError(
            f"The 'z500' variable in {owner} must be geopotential height in gpm; "
            f"its units are {units!r} (divide geopotential in m2 s-2 by g0 = {G0}).")
    return z500


def _region_bounds(region, owner: str):
    """(south, north, west, east) as floats with east >= west continuous: a box given
    with west > east (or east past 180) crosses the date line."""
    if (not isinstance(region, (tuple, list)) or len(region) != 4
            or not all(isinstance(v, numbers.Real) and not isinstance(v, bool)
                       and np.isfinite(v) for v in region)):
        raise AnalogsInputError(
            f"The 'region' parameter of {owner} must be (south, north, west, east) in "
            f"degrees. Got {region!r} instead.")
    south, north, west, east = (float(v) for v in region)
    if not (-90.0 <= south < north <= 90.0) or west == east:
        raise AnalogsInputError(
            f"The 'region' parameter of {owner} must have south < north within "
            f"[-90, 90] and west != east in degrees east (west > east crosses the date "
            f"line). Got {region!r} instead.")
    span = 360.0 if east - west >= 360.0 else (east - west) % 360.0
    return south, north, west, west + span


def _lon_in_span(lon, west, east):
    """Longitudes (degrees) inside [west, east] on the circle (east >= west)."""
    if east - west >= 360.0:
        return np.ones(np.shape(lon), dtype=bool)
    return (np.asarray(lon, dtype=float) - west) % 360.0 <= (east - west) + 1e-9


def _check_region(region, lat, lon, owner: str):
    """Boolean masks (lat, lon) of the grid points inside ``region``."""
    south, north, west, east = _region_bounds(region, owner)
    lat, lon = np.asarray(lat, float), np.asarray(lon, float)
    lat_in = (lat >= south) & (lat <= north)
    lon_in = _lon_in_span(lon, west, east)
    if not lat_in.any() or not lon_in.any():
        raise AnalogsInputError(
            f"The region {tuple(region)!r} (south, north, west, east) in {owner} lies "
            f"outside the grid (lat {lat.min():g}..{lat.max():g}, lon {lon.min():g}.."
            f"{lon.max():g}); give a box that covers at least one grid point.")
    return lat_in, lon_in


def _grid(field: xr.DataArray):
    return (np.asarray(field["lat"].values, dtype=float),
            np.asarray(field["lon"].values, dtype=float))


def _over_grid(func, *fields, n_out=1, kwargs=None):
    """Apply a numpy function of (..., lat, lon) arrays lazily over DataArrays."""
    return xr.apply_ufunc(
        func, *fields,
        input_core_dims=[_GRID] * len(fields),
        output_core_dims=[_GRID] * n_out,
        dask="parallelized",
        output_dtypes=[float] * n_out,
        kwargs=kwargs or {},
    )


def _labelled(da: xr.DataArray, units: str, long_name: str) -> xr.DataArray:
    da.attrs = {"units": units, "long_name": long_name}
    return da


# ------------------------------------------------------------------- numpy cores


def _coriolis(lat):
    return 2.0 * OMEGA * np.sin(np.radians(lat))


def _geostrophic_np(z, lat, lon, gradient=None):
    dz_dx, dz_dy = spherical_gradient(z, lat, lon) if gradient is None else gradient
    f = _coriolis(lat)
    inv_f = np.where(np.abs(lat) >= MIN_GEOSTROPHIC_LAT_DEG,
                     1.0 / np.where(f == 0.0, np.nan, f), np.nan)[:, None]
    return -G0 * inv_f * dz_dy, G0 * inv_f * dz_dx


def _vorticity_np(u, v, lat, lon):
    r"""Relative vorticity on the sphere; pole rows by the circulation theorem.

    At a pole of a grid that goes round the globe the metric term
    :math:`u\tan\phi/a` is singular; there :math:`\zeta` is the circulation along
    the adjacent latitude circle :math:`\phi_1` over the area of the polar cap it
    bounds (Stokes; Holton & Hakim 2013, section 4.1):

    .. math::

        \zeta_{pole} = \pm\frac{\cos\phi_1\,\bar u(\phi_1)}{a\,(1 \mp \sin\phi_1)}

    (upper signs north). Exact for solid-body rotation as :math:`\phi_1 \to \pm 90`;
    second order in the grid length. On a limited grid the pole rows are NaN.
    """
    dv_dx = zonal_derivative(v, lat, lon)
    du_dy = meridional_derivative(u, lat, lon)
    poles = pole_rows(lat)
    if not poles.any():
        metric = np.tan(np.radians(lat))[:, None] / EARTH_RADIUS
        return dv_dx - du_dy + u * metric
    tan = np.where(poles, np.nan, np.tan(np.radians(lat)))
    zeta = dv_dx - du_dy + u * (tan[:, None] / EARTH_RADIUS)
    periodic = longitude_frame(lon).periodic
    for row, ring in pole_neighbour_rows(lat):
        if not periodic:
            zeta[..., row, :] = np.nan
            continue
        sign = 1.0 if lat[row] > 0 else -1.0
        phi1 = np.radians(lat[ring])
        mean_u = np.mean(np.asarray(u, dtype=float)[..., ring, :], axis=-1)
        zeta[..., row, :] = (sign * np.cos(phi1) * mean_u
                             / (EARTH_RADIUS * (1.0 - sign * np.sin(phi1))))[..., None]
    return zeta


def _advection_np(scalar, u, v, lat, lon):
    ds_dx, ds_dy = spherical_gradient(scalar, lat, lon)
    return -(u * ds_dx + v * ds_dy)


def _direction_np(u, v):
    return np.mod(270.0 - np.degrees(np.arctan2(v, u)), 360.0)


def _weighted_mean_np(x, weights):
    """Mean over the last two axes with weights (lat, lon), ignoring NaN."""
    valid = np.isfinite(x)
    w = np.broadcast_to(weights, x.shape) * valid
    total = np.sum(np.where(valid, x, 0.0) * w, axis=(-2, -1))
    norm = np.sum(w, axis=(-2, -1))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(norm > 0, total / np.where(norm > 0, norm, 1.0), np.nan)


def _region_weights(lat, lat_in, lon_in):
    return np.cos(np.radians(lat[lat_in]))[:, None] * np.ones(int(lon_in.sum()))


def _dewpoint_np(q, pressure_hpa):
    e = q * pressure_hpa / (EPSILON + (1.0 - EPSILON) * q)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio = np.log(e / BOLTON_A_HPA)
    return BOLTON_C_DEGC * log_ratio / (BOLTON_B - log_ratio) + ZERO_CELSIUS_K


def _moist_line_np(values, lat, threshold, lon_cols):
    """Mean over longitudes of the northernmost latitude where ``values`` reach
    ``threshold`` (same units); NaN values never count as moist."""
    with np.errstate(invalid="ignore"):
        moist = values[..., lon_cols] >= threshold
    any_moist = moist.any(axis=-2)
    northernmost = moist.shape[-2] - 1 - np.argmax(moist[..., ::-1, :], axis=-2)
    per_lon = np.where(any_moist, lat[northernmost], np.nan)
    with np.errstate(invalid="ignore"):
        count = any_moist.sum(axis=-1)
        return np.where(count > 0, np.nansum(per_lon, axis=-1) / np.maximum(count, 1),
                        np.nan)


def _ridge_trough_np(profile, lon, ridge_cols, trough_cols):
    """Strongest ridge (max) and trough (min) of a wave profile (..., lon)."""
    ridge_part = profile[..., ridge_cols]
    trough_part = profile[..., trough_cols]
    i_ridge = np.argmax(ridge_part, axis=-1)
    i_trough = np.argmin(trough_part, axis=-1)
    ridge_amp = np.take_along_axis(ridge_part, i_ridge[..., None], axis=-1)[..., 0]
    trough_amp = -np.take_along_axis(trough_part, i_trough[..., None], axis=-1)[..., 0]
    return lon[ridge_cols][i_ridge], ridge_amp, lon[trough_cols][i_trough], trough_amp


def _wave_windows(lon, region, upstream_deg, downstream_deg, trough_west_deg):
    """Longitude masks (grid order) of the ridge (upstream) and trough (over/downstream)
    windows, measured on the circle around the region."""
    _, _, west, east = _region_bounds(region, "ridge_trough")
    lon = np.asarray(lon, dtype=float)
    ridge_cols = _lon_in_span(lon, west - upstream_deg, west)
    trough_cols = _lon_in_span(lon, west - trough_west_deg, east + downstream_deg)
    if not ridge_cols.any():
        # No grid column upstream: the westernmost column of the domain as seen from
        # the region (the first of its seam-continuous frame).
        frame = longitude_frame(lon, centre=0.5 * (west + east))
        ridge_cols = np.zeros(lon.size, dtype=bool)
        ridge_cols[frame.order[0]] = True
    return ridge_cols, trough_cols


def _wave_band(lat, region, poleward_deg):
    """Latitudes of the wave profile: the region's, extended ``poleward_deg`` poleward."""
    south, north = region[0], region[1]
    if north >= 0:
        return (lat >= south) & (lat <= north + poleward_deg)
    return (lat >= south - poleward_deg) & (lat <= north)


def _ring_offsets(lat, i, dlat, dlon, max_km):
    """Grid offsets (di, dj), their distances (km) and azimuth octants (0 = north,
    2 = east, 4 = south, 6 = west, each 45 degrees wide) within max_km of row i."""
    ni = int(np.ceil(max_km / (_KM_PER_DEG * dlat)))
    cos_lat = max(np.cos(np.radians(lat[i])), 0.05)
    nj = int(np.ceil(max_km / (_KM_PER_DEG * dlon * cos_lat)))
    di, dj = np.meshgrid(np.arange(-ni, ni + 1), np.arange(-nj, nj + 1), indexing="ij")
    di, dj = di.ravel(), dj.ravel()
    dist = great_circle_km(lat[i], 0.0, lat[i] + di * dlat, dj * dlon)
    bearing = np.arctan2(dj * dlon * cos_lat, di * dlat)      # clockwise from north
    octant = np.round(bearing / (np.pi / 4.0)).astype(int) % 8  # 0 = north, 4 = south
    keep = dist <= max_km
    return di[keep], dj[keep], dist[keep], octant[keep]


def zonal_median(z):
    """Median over longitude (the last axis) of each latitude, keeping that axis, in
    float64; missing values skipped (NaN for an all-missing row).

    Without a missing value, numpy's median by a partial sort at the middle rank(s)
    alone: ``numpy.median`` also sorts at the last rank to look for NaN, three times the
    time over 71 longitudes. The same values: the middle order statistics, and for an
    even count numpy's mean of the two; they are taken in ``z``'s own dtype and
    converted before that mean, so float32 heights give the medians of their float64
    values."""
    n = z.shape[-1]
    if n == 0 or np.isnan(z).any():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)   # all-missing latitude rows
            return np.nanmedian(np.asarray(z, dtype=float), axis=-1, keepdims=True)
    middle = [n // 2] if n % 2 else [n // 2 - 1, n // 2]
    part = np.partition(z, middle, axis=-1)[..., middle[0]:middle[-1] + 1]
    return np.mean(np.asarray(part, dtype=float), axis=-1, keepdims=True)


def _closed_lows_np(z, lat, lon, *, moisture=None, moisture_kind=None, max_lat, min_depth,
                    max_radius_km, ring_km, neighbourhood_km, moisture_radius_km,
                    poleward_rise_gpm, min_ring_valid, near=None):
    """Compact closed lows in z (nt, nlat, nlon); returns a dict of 1-D arrays.

    Works in the seam-continuous longitude frame of ``lon`` (periodic round the
    globe); longitudes come back in [-180, 180). ``moisture``: values as stored, turned
    into the measure (:func:`_moisture_measure` of ``moisture_kind``) only at the
    points around each centre. ``near`` = (box, km): only centres within ``km`` of the
    box (:func:`_distance_to_box_km`) are measured and returned (each centre is
    measured on its own, so those kept are the same lows)."""
    from analogs.stages.box_filters import maximum_filter, uniform_filter

    frame = longitude_frame(lon)
    z = frame.to_frame(np.asarray(z, dtype=float))
    if moisture is not None:
        moisture = frame.to_frame(np.asarray(moisture))
    lon = frame.lon
    periodic = frame.periodic
    nt, nlat, nlon = z.shape
    dlat = float(np.mean(np.diff(lat))) if nlat > 1 else 1.0
    dlon = frame.step
    ring_inner, ring_outer = ring_km
    lon_mode = "wrap" if periodic else "constant"
    empty = {k: np.zeros(0, dtype=int if k == "t" else bool if k == "closed" else float)
             for k in ("t", "lat", "lon", "depth", "radius", "moisture", "closed")}

    def half_widths(km, cos_lat):
        return (max(1, int(round(km / (_KM_PER_DEG * dlat)))),
                max(1, int(round(km / (_KM_PER_DEG * dlon * cos_lat)))))

    # Only rows within reach of |lat| <= max_lat can hold or shape a centre: the search
    # works on that band of rows alone (every point within ring_km[1] of a centre lies
    # in it: the band reaches a grid length beyond that distance).
    reach_i = half_widths(ring_outer, 1.0)[0]
    rows = np.nonzero(np.abs(lat) <= max_lat + (reach_i + 1) * dlat)[0]
    if not rows.size:
        return empty
    first_row, end_row = rows[0], rows[-1] + 1
    band_lat = lat[first_row:end_row]
    # Heights relative to the zonal median of each latitude (missing values skipped):
    # the median ignores the compact low itself, and removing it takes away the
    # meridional slope of the background. The closure test uses the total height.
    total = z[:, first_row:end_row]
    band = total - zonal_median(total)
    # Screening: an approximate depth field, the mean over a square annulus of
    # half-widths ring_km (box sums over the points that have a value; none outside
    # the grid, wrapping round a periodic grid) minus the height. Local maxima of it
    # are compact lows, also on a sloping background or next to a broad trough where
    # the total height has no closed contour. Depth, closure and radius are then
    # measured exactly on the great-circle ring.
    valid = np.isfinite(band)
    complete = valid.all()
    filled = band if complete else np.where(valid, band, 0.0)
    # The filters act on each day alone: with no value missing, every day's point
    # counts are those of the first day.
    weight = np.ones((1,) + band.shape[1:]) if complete else valid.astype(float)
    cos_lat = np.cos(np.radians(np.clip(np.abs(lat[rows]).mean(), 0.0, 80.0)))
    modes = ("constant", "constant", lon_mode)
    sums = []
    for km in (ring_outer, ring_inner):
        hi, hj = half_widths(km, cos_lat)
        size = (1, 2 * hi + 1, 2 * hj + 1)
        n = size[1] * size[2]
        box_sum = uniform_filter(filled, size, modes)
        box_sum *= n
        box_count = uniform_filter(weight, size, modes)
        box_count *= n
        sums.append((box_sum, box_count))
    (s_out, n_out), (s_in, n_in) = sums
    # Centres are kept only at |lat| <= max_lat (and, with ``near``, within km of the
    # box): the screen, its neighbourhood maximum and the candidates are taken over the
    # rows and columns that can hold one, the maximum over a window reaching hi, hj
    # beyond them (where that window is cut short of the band, its edge never reaches
    # a point that can hold a centre).
    hi, hj = half_widths(neighbourhood_km, cos_lat)
    kept_rows = np.abs(band_lat) <= max_lat
    kept_cols = np.ones(nlon, dtype=bool)
    if near is not None:
        within = _distance_to_box_km(band_lat[:, None], wrap_longitude(lon)[None, :],
                                     near[0]) <= near[1]
        within &= kept_rows[:, None]
        kept_rows = within.any(axis=1)
        if not periodic:
            kept_cols = within.any(axis=0)
    if not kept_rows.any() or not kept_cols.any():
        return empty
    (r0, r1), (c0, c1) = ((int(np.flatnonzero(kept)[0]), int(np.flatnonzero(kept)[-1]) + 1)
                          for kept in (kept_rows, kept_cols))
    e0, e1 = max(r0 - hi, 0), min(r1 + hi, band.shape[1])
    f0, f1 = max(c0 - hj, 0), min(c1 + hj, nlon)
    reach = (slice(None), slice(e0, e1), slice(f0, f1))
    inner = (slice(None), slice(r0 - e0, r1 - e0), slice(c0 - f0, c1 - f0))
    # In place, the arithmetic of (s_out - s_in) / max(count, 0.5) (NaN where the
    # annulus has no value) - band, then -inf where that is not finite.
    screen = s_out[reach]
    count = (n_out - n_in)[reach]
    screen -= s_in[reach]
    with np.errstate(invalid="ignore", divide="ignore"):
        screen /= np.maximum(count, 0.5)
    no_value = count < 0.5
    if no_value.any():
        np.copyto(screen, np.nan, where=no_value)
    screen -= band[reach]
    finite = np.isfinite(screen)
    if not finite.all():
        screen[~finite] = -np.inf
    peak = maximum_filter(screen, (1, 2 * hi + 1, 2 * hj + 1),
                          ("nearest", "nearest", "wrap" if periodic else "nearest"))
    screen = screen[inner]
    candidate = finite[inner]
    candidate &= screen >= peak[inner]
    candidate &= screen >= 0.5 * min_depth
    candidate &= (np.abs(band_lat[r0:r1]) <= max_lat)[None, :, None]
    t_idx, i_idx, j_idx = np.nonzero(candidate)
    i_idx, j_idx = i_idx + r0, j_idx + c0
    if near is not None:
        box, km = near
        kept = _distance_to_box_km(band_lat[i_idx], wrap_longitude(lon[j_idx]), box) <= km
        t_idx, i_idx, j_idx = t_idx[kept], i_idx[kept], j_idx[kept]

    reach_km = max(ring_outer, moisture_radius_km)
    bin_km = _KM_PER_DEG * dlat
    n_bins = int(np.ceil(ring_outer / bin_km))
    out = {k: np.full(t_idx.size, np.nan) for k in ("depth", "radius", "moisture", "closed")}
    for i in np.unique(i_idx):
        sel = np.nonzero(i_idx == i)[0]
        row = first_row + i      # the grid's row
        di, dj, dist, octant = _ring_offsets(lat, row, dlat, dlon, reach_km)
        rows_i = row + di
        cols = j_idx[sel, None] + dj[None, :]
        inside = ((rows_i >= 0) & (rows_i < nlat))[None, :]
        if periodic:
            cols = cols % nlon
            inside = np.broadcast_to(inside, cols.shape)
        else:
            inside = inside & (cols >= 0) & (cols < nlon)
        rows_c = np.clip(rows_i, 0, nlat - 1)[None, :]
        cols_c = np.clip(cols, 0, nlon - 1)
        # The heights are read from the band: every point within ring_outer that is
        # inside the grid lies in it (points farther out, within a larger moisture
        # radius, are read but never used).
        band_rows = np.clip(rows_c, first_row, end_row - 1) - first_row
        values = np.where(inside, band[t_idx[sel, None], band_rows, cols_c], np.nan)
        centre = band[t_idx[sel], i, j_idx[sel]]
        ring = (dist >= ring_inner) & (dist <= ring_outer)
        disc = (dist > 0) & (dist <= ring_outer)
        total_centre = total[t_idx[sel], i, j_idx[sel]]

        # The whole ring on the grid (no detection whose ring leaves the domain), at
        # least min_ring_valid of its points with a value and every octant seen. Then
        # whether the circulation is closed: poleward of the centre (the octant
        # centred on the pole direction) the total height climbs more than
        # poleward_rise_gpm above the centre's somewhere within the ring's outer radius
        # (mean over one grid length of radius), so the geostrophic flow there is
        # easterly. An open trough, however sharp, has heights falling poleward along
        # its axis and is not closed.
        ring_values = values[:, ring]
        ok = np.isfinite(ring_values)
        onehot = (octant[ring, None] == np.arange(8)[None, :]).astype(float)
        n_ann = int(np.ceil(ring_outer / bin_km))
        poleward = disc & (octant == (0 if lat[row] >= 0 else 4))
        annulus = np.minimum((dist[poleward] / bin_km).astype(int), n_ann - 1)
        cells = (annulus[:, None] == np.arange(n_ann)[None, :]).astype(float)
        p_vals = np.where(inside[:, poleward], total[t_idx[sel, None], band_rows[:, poleward],
                                                     cols_c[:, poleward]], np.nan)
        p_ok = np.isfinite(p_vals)
        with np.errstate(invalid="ignore", divide="ignore"):
            octant_count = ok.astype(float) @ onehot
            cell_rise = ((np.where(p_ok, p_vals - total_centre[:, None], 0.0) @ cells)
                         / (p_ok.astype(float) @ cells))
            poleward_rise = np.max(np.where(np.isfinite(cell_rise), cell_rise, -np.inf),
                                   axis=1)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)   # an all-missing ring
                depth = np.nanmean(np.where(ok, ring_values, np.nan), axis=1) - centre
        out["closed"][sel] = (np.ones(sel.size) if poleward_rise_gpm is None
                              else (poleward_rise > poleward_rise_gpm).astype(float))
        accept = (inside[:, ring].all(axis=1) & (ok.mean(axis=1) >= min_ring_valid)
                  & (octant_count > 0).all(axis=1) & np.isfinite(centre))
        depth = np.where(accept, depth, np.nan)

        # Azimuthal-mean profile in annuli one grid-length wide: the radius is where it
        # first climbs back half the depth above the centre (linear interpolation).
        bins = np.minimum((dist / bin_km).astype(int), n_bins)
        in_disc = dist <= ring_outer
        indicator = (bins[in_disc, None] == np.arange(n_bins)[None, :]).astype(float)
        vals = values[:, in_disc]
        finite = np.isfinite(vals)
        sums = np.where(finite, vals, 0.0) @ indicator
        counts = finite.astype(float) @ indicator
        with np.errstate(invalid="ignore", divide="ignore"):
            profile = sums / counts - centre[:, None]
        radii = (np.arange(n_bins) + 0.5) * bin_km
        radii[0] = 0.0
        with np.errstate(invalid="ignore"):
            reached = (profile - 0.5 * depth[:, None]) >= 0
        rise_half = profile - 0.5 * depth[:, None]
        first = np.argmax(reached, axis=1)
        has = reached.any(axis=1) & np.isfinite(depth)
        prev = np.maximum(first - 1, 0)
        r0, r1 = radii[prev], radii[first]
        p0 = np.take_along_axis(rise_half, prev[:, None], axis=1)[:, 0]
        p1 = np.take_along_axis(rise_half, first[:, None], axis=1)[:, 0]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(p1 > p0, -p0 / (p1 - p0), 0.0)
        radius = np.where(first > 0, r0 + np.clip(frac, 0, 1) * (r1 - r0), r1)
        out["depth"][sel] = depth
        out["radius"][sel] = np.where(has, radius, np.nan)

        if moisture is not None:
            # The measure (a dewpoint from q850) of the points within its radius only.
            near = dist <= moisture_radius_km
            m_vals = np.where(inside[:, near], _moisture_measure(np.asarray(
                moisture[t_idx[sel, None], rows_c[:, near], cols_c[:, near]], dtype=float),
                moisture_kind), np.nan)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)   # all missing: NaN
                out["moisture"][sel] = np.nanmean(m_vals, axis=1)

    with np.errstate(invalid="ignore"):
        keep = (out["depth"] >= min_depth) & (out["radius"] <= max_radius_km)
    return {"t": t_idx[keep], "lat": band_lat[i_idx[keep]],
            "lon": wrap_longitude(lon[j_idx[keep]]),
            "depth": out["depth"][keep], "radius": out["radius"][keep],
            "moisture": out["moisture"][keep], "closed": out["closed"][keep] > 0.5}


# -------------------------------------------------------------- public functions


def coriolis_parameter(lat):
    r"""Coriolis parameter :math:`f = 2\Omega\sin\phi`, in s-1.

    Parameters
    ----------
    lat : array-like or xarray.DataArray of latitudes in degrees north.

    Reference: Holton & Hakim (2013), section 1.3 (:math:`\Omega` from WGS84).
    """
    f = _coriolis(lat)
    if isinstance(f, xr.DataArray):
        f = _labelled(f, "s-1", "Coriolis parameter")
    return f


def geostrophic_wind(z500: xr.DataArray) -> xr.Dataset:
    r"""Geostrophic wind of a geopotential-height field on the sphere.

    .. math::

        u_g = -\frac{g_0}{f}\frac{1}{a}\frac{\partial Z}{\partial\phi}, \qquad
        v_g = \frac{g_0}{f}\frac{1}{a\cos\phi}\frac{\partial Z}{\partial\lambda}

    with :math:`Z` in gpm, :math:`g_0 = 9.80665` m s-2, :math:`f = 2\Omega\sin\phi` and
    :math:`a` the Earth radius; centred differences inside, one-sided at the edges,
    periodic round the globe and continuous across the date line
    (:func:`analogs.geo.spherical_gradient`). NaN equatorward of
    ``MIN_GEOSTROPHIC_LAT_DEG`` where :math:`f \to 0`. On a pole row of a grid that
    goes round the globe the wind is that of the polar-cap gradient
    (:func:`analogs.geo.polar_cap_gradient`), in the east/north components of each
    meridian; on a limited grid the pole rows are NaN.

    Parameters
    ----------
    z500 : DataArray (..., lat, lon) of geopotential height in gpm.

    Returns
    -------
    Dataset with ``u_g`` and ``v_g`` in m s-1, same dims as ``z500`` (lazy with dask).

    Reference: Holton & Hakim (2013), eq. 3.12 (geostrophic wind in isobaric
    coordinates); matches MetPy ``geostrophic_wind`` away from the grid edges.
    """
    z500 = _check_height(z500, "geostrophic_wind")
    lat, lon = _grid(z500)
    u, v = _over_grid(_geostrophic_np, z500, n_out=2, kwargs={"lat": lat, "lon": lon})
    return xr.Dataset({
        "u_g": _labelled(u, "m s-1", "500 hPa geostrophic wind, eastward component"),
        "v_g": _labelled(v, "m s-1", "500 hPa geostrophic wind, northward component"),
    })


def relative_vorticity(u: xr.DataArray, v: xr.DataArray) -> xr.DataArray:
    r"""Vertical component of relative vorticity on the sphere, in s-1.

    .. math::

        \zeta = \frac{1}{a\cos\phi}\frac{\partial v}{\partial\lambda}
              - \frac{1}{a}\frac{\partial u}{\partial\phi}
              + \frac{u\tan\phi}{a}

    The last term is the spherical metric term; MetPy's ``vorticity`` on a
    latitude/longitude grid includes it too (through the map-factor correction of
    ``vector_derivative``), so the two agree to rounding away from the edges. At a
    pole, where the metric term is singular, a grid that goes round the globe takes
    the circulation round the adjacent latitude circle over the polar cap's area
    (Stokes' theorem); a limited grid leaves the pole rows NaN.

    Parameters
    ----------
    u, v : DataArrays (..., lat, lon) of eastward and northward wind in m s-1.

    Reference: Holton & Hakim (2013), section 4.2 and appendix on spherical
    coordinates.
    """
    u = _check_field(u, "u", "relative_vorticity")
    v = _check_field(v, "v", "relative_vorticity")
    lat, lon = _grid(u)
    zeta = _over_grid(_vorticity_np, u, v, kwargs={"lat": lat, "lon": lon})
    return _labelled(zeta, "s-1", "relative vorticity")


def geostrophic_vorticity(z500: xr.DataArray) -> xr.DataArray:
    r"""Relative vorticity of the geostrophic wind of ``z500`` (gpm), in s-1.

    :math:`\zeta_g` = :func:`relative_vorticity` of :func:`geostrophic_wind`
    (Holton & Hakim 2013, section 6.2). Positive is cyclonic in the northern
    hemisphere.
    """
    wind = geostrophic_wind(z500)
    zeta = relative_vorticity(wind["u_g"], wind["v_g"])
    return _labelled(zeta, "s-1", "500 hPa geostrophic relative vorticity")


def advection(scalar: xr.DataArray, u: xr.DataArray, v: xr.DataArray) -> xr.DataArray:
    r"""Horizontal advection of ``scalar`` by the wind (u, v) on the sphere.

    .. math::

        -\mathbf{V}\cdot\nabla s = -\left(\frac{u}{a\cos\phi}
        \frac{\partial s}{\partial\lambda} + \frac{v}{a}\frac{\partial s}{\partial\phi}
        \right)

    Units: those of ``scalar`` per second. Positive where the wind brings higher
    values (for vorticity in the northern hemisphere: cyclonic vorticity advection).

    Reference: Holton & Hakim (2013), section 2.1; the sign convention of MetPy
    ``advection``.
    """
    scalar = _check_field(scalar, "scalar", "advection")
    lat, lon = _grid(scalar)
    adv = _over_grid(_advection_np, scalar, u, v, kwargs={"lat": lat, "lon": lon})
    units = scalar.attrs.get("units", "1")
    return _labelled(adv, f"({units}) s-1", f"advection of {scalar.name or 'scalar'}")


def wind_direction(u, v):
    r"""Meteorological wind direction: where the wind blows FROM, degrees in [0, 360).

    .. math:: \theta = (270^\circ - \operatorname{atan2}(v, u)) \bmod 360^\circ

    0 = from the north, 90 = from the east, 270 = from the west. A calm wind (u = v = 0)
    gives 270 by this formula (MetPy returns 0 for calm and 360 for a north wind;
    compare modulo 360). Works on numpy arrays and (lazily) on DataArrays.

    Reference: WMO Guide to Meteorological Instruments (WMO-No. 8), wind direction
    convention; MetPy ``wind_direction`` (convention="from").
    """
    direction = _direction_np(u, v)
    if isinstance(direction, xr.DataArray):
        direction = _labelled(direction, "degree",
                              "wind direction (from which, clockwise from north)")
    return direction


def wind_speed(u, v):
    r"""Wind speed :math:`|\mathbf{V}| = \sqrt{u^2 + v^2}`, units of ``u``."""
    speed = np.hypot(u, v)
    if isinstance(speed, xr.DataArray):
        speed = _labelled(speed, "m s-1", "wind speed")
    return speed


def region_mask(lat, lon, region) -> tuple[np.ndarray, np.ndarray]:
    """Boolean masks ``(lat_in, lon_in)`` of the grid latitudes and longitudes inside
    ``region = (south, north, west, east)`` (degrees).

    Longitudes are compared on the circle: west > east (``(30, 50, 170, -170)``) or
    east past 180 (``(30, 50, 170, 190)``) is a box across the date line, and the grid
    may be stored in any longitude convention or order. Raises AnalogsInputError when
    the box covers no grid point.
    """
    return _check_region(region, lat, lon, "region_mask")


def region_mean_flow(u: xr.DataArray, v: xr.DataArray, region) -> xr.Dataset:
    r"""Area-weighted mean wind over a box, then its direction and speed.

    .. math::

        \bar u = \frac{\sum u\cos\phi}{\sum\cos\phi}, \quad
        \bar v = \frac{\sum v\cos\phi}{\sum\cos\phi}, \quad
        \text{direction} = \theta(\bar u, \bar v), \quad
        \text{speed} = |\bar{\mathbf{V}}|

    The direction and speed are those of the MEAN VECTOR (not means of point
    directions or speeds), so a box with opposing winds has a small speed.

    Parameters
    ----------
    u, v : DataArrays (..., lat, lon) in m s-1.
    region : (south, north, west, east) in degrees; raises AnalogsInputError when it
        covers no grid point.

    Returns
    -------
    Dataset with ``u_mean``, ``v_mean`` (m s-1), ``direction`` (degree, from which)
    and ``speed`` (m s-1), with the non-grid dims of ``u``.

    Reference: cos-latitude area weighting (common practice, no source);
    :func:`wind_direction`.
    """
    u = _check_field(u, "u", "region_mean_flow")
    lat, lon = _grid(u)
    lat_in, lon_in = _check_region(region, lat, lon, "region_mean_flow")
    weights = xr.DataArray(np.cos(np.radians(lat)), dims="lat", coords={"lat": u["lat"]})
    box = {"lat": lat_in, "lon": lon_in}
    u_mean = u.isel(box).weighted(weights.isel(lat=lat_in)).mean(_GRID)
    v_mean = v.isel(box).weighted(weights.isel(lat=lat_in)).mean(_GRID)
    return xr.Dataset({
        "u_mean": _labelled(u_mean, "m s-1", "area-mean eastward wind over the region"),
        "v_mean": _labelled(v_mean, "m s-1", "area-mean northward wind over the region"),
        "direction": wind_direction(u_mean, v_mean),
        "speed": _labelled(np.hypot(u_mean, v_mean), "m s-1",
                           "speed of the area-mean wind over the region"),
    })


def wave_anomaly(z500: xr.DataArray) -> xr.DataArray:
    r"""Departure of 500 hPa height from its zonal mean over the domain, in gpm.

    .. math:: Z^*(\phi, \lambda) = Z(\phi, \lambda) - [Z](\phi)

    where :math:`[Z]` is the mean over the longitudes of the grid at each latitude.
    Ridges are positive, troughs negative. On a limited-area grid the "zonal mean" is
    the mean over the domain's longitudes, not around the globe.

    Reference: Holton & Hakim (2013), section 10.1 (zonal-mean / eddy decomposition).
    """
    z500 = _check_height(z500, "wave_anomaly")
    anomaly = z500 - z500.mean("lon")
    return _labelled(anomaly.transpose(*z500.dims), "gpm",
                     "500 hPa height departure from the domain zonal mean")


def ridge_trough(z500: xr.DataArray, region, *, upstream_deg: float = 25.0,
                 downstream_deg: float = 15.0, trough_west_deg: float = 15.0,
                 poleward_deg: float = 0.0) -> xr.Dataset:
    r"""Strongest ridge upstream of a region and strongest trough over/downstream of it.

    The wave anomaly :math:`Z^*` (:func:`wave_anomaly`) is averaged with cos-latitude
    weights over the region's latitudes to a profile :math:`P(\lambda)`. Then

    .. math::

        A_{ridge} = \max_{\lambda \in [W - \Delta_u, W]} P, \qquad
        A_{trough} = -\min_{\lambda \in [W - \Delta_t, E + \Delta_d]} P

    with :math:`W, E` the region's west and east edges, :math:`\Delta_u` =
    ``upstream_deg``, :math:`\Delta_d` = ``downstream_deg`` and :math:`\Delta_t` =
    ``trough_west_deg`` (a trough axis just west of the region still puts the region
    in the strong south-westerly flow and cyclonic vorticity advection ahead of it, so
    the trough window starts a little upstream of the box); positions are the
    longitudes of the extremes (degrees east in [-180, 180)). Windows are measured on
    the circle, so a region near or across the date line, or on a grid that goes round
    the globe, has its upstream ridge window where the flow comes from. Amplitudes in
    gpm (positive for a ridge above and a trough below the zonal mean).

    Returns
    -------
    Dataset with ``ridge_lon``, ``ridge_amplitude``, ``trough_lon``, ``trough_amplitude``.

    Reference: ridge/trough from the eddy height field (Holton & Hakim 2013, section
    10.1); window choice common practice, no source.
    """
    z500 = _check_height(z500, "ridge_trough")
    lat, lon = _grid(z500)
    _check_region(region, lat, lon, "ridge_trough")
    ridge_cols, trough_cols = _wave_windows(lon, region, upstream_deg, downstream_deg,
                                            trough_west_deg)
    band_in = _wave_band(lat, region, poleward_deg)
    weights = xr.DataArray(np.cos(np.radians(lat[band_in])), dims="lat")
    profile = wave_anomaly(z500).isel(lat=band_in).weighted(weights).mean("lat")
    outs = xr.apply_ufunc(
        _ridge_trough_np, profile, input_core_dims=[["lon"]],
        output_core_dims=[[], [], [], []], dask="parallelized",
        output_dtypes=[float] * 4,
        kwargs={"lon": wrap_longitude(lon), "ridge_cols": ridge_cols,
                "trough_cols": trough_cols})
    names = [("ridge_lon", "degree_east", "longitude of the strongest upstream ridge"),
             ("ridge_amplitude", "gpm", "amplitude of the strongest upstream ridge"),
             ("trough_lon", "degree_east", "longitude of the strongest trough"),
             ("trough_amplitude", "gpm", "depth of the strongest trough below the zonal mean")]
    return xr.Dataset({n: _labelled(o, u_, ln) for (n, u_, ln), o in zip(names, outs)})


def find_closed_lows(z500: xr.DataArray, moisture: xr.DataArray | None = None, *,
                     max_lat: float = CLOSED_LOW_DEFAULTS["max_lat"],
                     min_depth: float = CLOSED_LOW_DEFAULTS["min_depth"],
                     max_radius_km: float = CLOSED_LOW_DEFAULTS["max_radius_km"],
                     ring_km: tuple[float, float] = CLOSED_LOW_DEFAULTS["ring_km"],
                     neighbourhood_km: float = CLOSED_LOW_DEFAULTS["neighbourhood_km"],
                     moisture_radius_km: float = CLOSED_LOW_DEFAULTS["moisture_radius_km"],
                     poleward_rise_gpm: float | None = CLOSED_LOW_DEFAULTS["poleward_rise_gpm"],
                     min_ring_valid: float = CLOSED_LOW_DEFAULTS["min_ring_valid"],
                     closed_only: bool = False,
                     block_days: int = 1000) -> pd.DataFrame:
    r"""Compact closed 500 hPa lows equatorward of ``max_lat`` (tropical cyclones, their
    remnants, and compact cut-off lows: which is which is for the regime rules).

    Heights are first taken relative to their zonal median at each latitude
    (:math:`Z' = Z - \operatorname{median}_\lambda Z`, missing values skipped), which
    removes the meridional slope of the background and ignores the compact low itself.
    A centre is a grid point with :math:`|\phi| \le` ``max_lat`` where a screening
    depth field, the mean of :math:`Z'` over a square annulus of half-widths
    ``ring_km`` (box sums over the points that have a value, the values of
    ``scipy.ndimage.uniform_filter``: :mod:`analogs.stages.box_filters`) minus
    :math:`Z'`, is the maximum over a neighbourhood of about ``neighbourhood_km``
    (``scipy.ndimage.maximum_filter`` over (lat, lon) per day) and at least ``min_depth / 2``. This is the local
    minimum of a closed low in a flat background; unlike a plain minimum of
    :math:`Z` it also finds a compact low on a sloping background or beside a broad
    trough, where the total height has no closed contour. For each centre:

    .. math::

        D = \overline{Z'}_{ring} - Z'_c, \qquad
        r_{1/2} = \min\{ r : \langle Z' \rangle_\theta(r) - Z'_c \ge D / 2 \}

    where :math:`\overline{Z'}_{ring}` is the mean over grid points between
    ``ring_km[0]`` and ``ring_km[1]`` great-circle distance and
    :math:`\langle Z'\rangle_\theta(r)` the azimuthal mean in annuli one grid length
    wide, interpolated linearly. A centre counts only when

    - the whole ring lies on the grid (no detection whose ring leaves the domain: a
      trough at the domain's edge is not a closed low);
    - at least ``min_ring_valid`` of the ring's points have a value and every octant
      of the ring has one (missing values are skipped where they are; they never
      void the day);
    - :math:`D \ge` ``min_depth`` (gpm) and :math:`r_{1/2} \le` ``max_radius_km``:
      deep and compact, unlike a broad mid-latitude trough.

    Each low says whether its circulation is ``closed``: in the octant centred on the
    pole direction the total height :math:`Z` climbs more than ``poleward_rise_gpm``
    above the centre's somewhere within ``ring_km[1]`` (easterly geostrophic flow
    poleward of the centre: cut off from the westerlies). An open short-wave trough,
    however sharp, has heights falling poleward along its axis and is not closed; a
    tropical cyclone caught in a strong westerly gradient may not be either.
    ``closed_only=True`` keeps the closed ones only; ``poleward_rise_gpm=None`` calls
    every low closed.

    For a Gaussian low :math:`-A\exp(-r^2/2\sigma^2)` on a flat background,
    :math:`r_{1/2} = \sigma\sqrt{2\ln 2}` and :math:`D` is a little less than
    :math:`A`. Longitudes are read on the circle (periodic round the globe, continuous
    across the date line); the defaults and their sources are in
    :data:`CLOSED_LOW_DEFAULTS`.

    Parameters
    ----------
    z500 : DataArray (time, lat, lon) in gpm (dask-backed is fine: it is read in
        blocks of ``block_days``).
    moisture : optional DataArray on the same grid (any moisture variable, e.g. the
        850 hPa dewpoint in K); its mean within ``moisture_radius_km`` of the centre
        (over the points that have a value) is returned as ``moisture_mean`` (NaN when
        absent).

    Returns
    -------
    DataFrame with columns ``time, lat, lon, depth_gpm, radius_km, moisture_mean,
    closed``, one row per low, sorted by time then depth (deepest first); ``lon`` in
    [-180, 180).

    Reference: closed-low detection by local extrema and ring-mean depth, as in
    cut-off low and tropical-cyclone trackers (common practice, no source); the
    closed-circulation test after the cut-off condition of Nieto et al. (2005, from
    memory).
    """
    z500 = _check_height(z500, "find_closed_lows")
    if "time" not in z500.dims:
        z500 = z500.expand_dims("time")
        moisture = None if moisture is None else moisture.expand_dims("time")
    z500 = z500.transpose("time", "lat", "lon")
    lat, lon = _grid(z500)
    times = z500["time"].values
    params = _closed_low_params({
        "max_lat": max_lat, "min_depth": min_depth, "max_radius_km": max_radius_km,
        "ring_km": ring_km, "neighbourhood_km": neighbourhood_km,
        "moisture_radius_km": moisture_radius_km, "poleward_rise_gpm": poleward_rise_gpm,
        "min_ring_valid": min_ring_valid},
        "find_closed_lows")
    frames = []
    for start in range(0, times.size, block_days):
        block = slice(start, start + block_days)
        z = np.asarray(z500.isel(time=block).values, dtype=float)
        m = None if moisture is None else np.asarray(
            moisture.transpose("time", "lat", "lon").isel(time=block).values, dtype=float)
        lows = _closed_lows_np(z, lat, lon, moisture=m, **params)
        frames.append(pd.DataFrame({
            "time": times[block][lows["t"]], "lat": lows["lat"], "lon": lows["lon"],
            "depth_gpm": lows["depth"], "radius_km": lows["radius"],
            "moisture_mean": lows["moisture"], "closed": lows["closed"]}))
    table = pd.concat(frames, ignore_index=True)
    if closed_only:
        table = table[table["closed"]]
    return table.sort_values(["time", "depth_gpm"], ascending=[True, False],
                             ignore_index=True)


def _closed_low_params(values: Mapping, owner: str) -> dict:
    """The closed-low parameters, checked: one message naming the bad one."""
    params = dict(CLOSED_LOW_DEFAULTS)
    unknown = set(values) - set(params)
    if unknown:
        raise AnalogsInputError(
            f"The 'closed_lows' parameter of {owner} has unknown key(s) "
            f"{sorted(unknown)}; expected some of {sorted(params)}.")
    params.update(values)
    ring = params["ring_km"]
    if (not isinstance(ring, (tuple, list)) or len(ring) != 2
            or not 0 <= float(ring[0]) < float(ring[1])):
        raise AnalogsInputError(
            f"The 'ring_km' closed-low parameter of {owner} must be (inner, outer) km "
            f"with 0 <= inner < outer. Got {ring!r} instead.")
    rise = params["poleward_rise_gpm"]
    if rise is not None and (isinstance(rise, bool) or not isinstance(rise, numbers.Real)
                             or not np.isfinite(rise)):
        raise AnalogsInputError(
            f"The 'poleward_rise_gpm' closed-low parameter of {owner} must be a finite "
            f"number of gpm or None. Got {rise!r} instead.")
    if not 0.0 < float(params["min_ring_valid"]) <= 1.0:
        raise AnalogsInputError(
            f"The 'min_ring_valid' closed-low parameter of {owner} must be in (0, 1]. "
            f"Got {params['min_ring_valid']!r} instead.")
    params["ring_km"] = (float(ring[0]), float(ring[1]))
    return params


def dewpoint_from_specific_humidity(q, pressure_hpa: float = 850.0):
    r"""Dewpoint (K) from specific humidity (kg kg-1) at a pressure level (hPa).

    .. math::

        e = \frac{q\,p}{\varepsilon + (1 - \varepsilon) q}, \qquad
        T_d = \frac{C \ln(e / A)}{B - \ln(e / A)} + 273.15

    the vapour pressure from the definition of specific humidity
    (:math:`\varepsilon = R_d/R_v = 0.622`) and Bolton's (1980) saturation vapour
    pressure :math:`e_s = A \exp(B T / (T + C))` inverted, with A = 6.112 hPa,
    B = 17.67, C = 243.5 deg C. Works on numpy arrays and (lazily) on DataArrays.

    Reference: Bolton (1980), eq. 10; MetPy ``dewpoint_from_specific_humidity``.
    """
    td = _dewpoint_np(q, float(pressure_hpa))
    if isinstance(td, xr.DataArray):
        td = _labelled(td, "K", f"{pressure_hpa:g} hPa dewpoint")
    return td


def moisture_field(ds) -> str | None:
    """The canonical moisture field of ``ds`` the diagnostics use: ``q850``, ``td2m``
    or ``pwat`` (first present, in that order), or None. Its rich-moisture threshold
    is ``RICH_MOISTURE[name]``."""
    return next((name for name in ("q850", "td2m", "pwat") if name in ds), None)


def moist_line_latitude(dewpoint: xr.DataArray, threshold_c: float = SEVERE_DEWPOINT_C,
                        lon_range: tuple[float, float] | None = None) -> xr.DataArray:
    r"""Poleward reach of moist air: mean over longitudes of the northernmost latitude
    where the dewpoint reaches ``threshold_c``.

    .. math::

        \phi_{moist} = \frac{1}{N_\lambda}\sum_\lambda
        \max\{\phi : T_d(\phi, \lambda) \ge T_{thr}\}

    over the longitudes of ``lon_range`` (west, east, on the circle: west > east
    crosses the date line; default all) where any grid point reaches the threshold;
    NaN when none does; missing values never count. Default threshold: the 60 deg F
    (15.6 deg C) dewpoint line, a SURFACE (2 m) dewpoint measure (common practice, no
    source); for an 850 hPa dewpoint give ``RICH_MOISTURE["q850"].threshold``.

    Parameters
    ----------
    dewpoint : DataArray (..., lat, lon) in K.

    Returns
    -------
    DataArray (...) in degrees north.
    """
    dewpoint = _check_field(dewpoint, "dewpoint", "moist_line_latitude")
    lat, lon = _grid(dewpoint)
    if lon_range is None:
        lon_cols = np.ones(lon.size, dtype=bool)
    else:
        lon_cols = None
        if isinstance(lon_range, (tuple, list)) and len(lon_range) == 2 \
                and all(isinstance(v, numbers.Real) for v in lon_range) \
                and lon_range[0] != lon_range[1]:
            west = float(lon_range[0])
            east = west + (360.0 if lon_range[1] - west >= 360.0
                           else (float(lon_range[1]) - west) % 360.0)
            lon_cols = _lon_in_span(lon, west, east)
        if lon_cols is None or not lon_cols.any():
            raise AnalogsInputError(
                f"The 'lon_range' parameter of moist_line_latitude must overlap the grid "
                f"longitudes {lon.min():g}..{lon.max():g}. Got {lon_range!r} instead.")
    line = xr.apply_ufunc(
        _moist_line_np, dewpoint, input_core_dims=[_GRID], output_core_dims=[[]],
        dask="parallelized", output_dtypes=[float],
        kwargs={"lat": lat, "threshold": float(threshold_c) + ZERO_CELSIUS_K,
                "lon_cols": lon_cols})
    return _labelled(line, "degree_north",
                     f"mean northernmost latitude of the {threshold_c:.1f} C dewpoint")


def moist_area_fraction(dewpoint: xr.DataArray, region,
                        threshold_c: float = SEVERE_DEWPOINT_C) -> xr.DataArray:
    r"""Moisture return under the flow: area fraction of the region with
    :math:`T_d \ge` ``threshold_c``.

    .. math:: F = \frac{\sum \cos\phi\,[T_d \ge T_{thr}]}{\sum \cos\phi}

    Dimensionless in [0, 1] over the points that have a value; ``dewpoint`` in K. The
    default threshold, the 60 deg F dewpoint, marks severe-grade moisture at the
    SURFACE (common practice, no source); for an 850 hPa dewpoint give
    ``RICH_MOISTURE["q850"].threshold``.
    """
    dewpoint = _check_field(dewpoint, "dewpoint", "moist_area_fraction")
    lat, lon = _grid(dewpoint)
    lat_in, lon_in = _check_region(region, lat, lon, "moist_area_fraction")
    weights = xr.DataArray(np.cos(np.radians(lat[lat_in])), dims="lat")
    moist = (dewpoint >= threshold_c + ZERO_CELSIUS_K).astype(float).where(
        np.isfinite(dewpoint))
    fraction = moist.isel(lat=lat_in, lon=lon_in).weighted(weights).mean(_GRID)
    return _labelled(fraction, "1", "area fraction of the region with severe-grade dewpoint")


# ------------------------------------------------------------------ archive table


def _moisture_block(block: xr.Dataset, kind: str | None):
    """The moisture field of one block of days as stored (its own dtype: converted to
    float64 where it is used); None without. :func:`_moisture_measure` turns values of
    it into the measure the rules read."""
    if kind is None:
        return None
    return np.asarray(block[kind].transpose("time", "lat", "lon").values)


def _moisture_measure(values, kind: str | None):
    """Moisture values at their own level as the rules read them: a dewpoint in K
    (from ``q850`` at 850 hPa, or ``td2m``), or precipitable water in kg m-2."""
    return _dewpoint_np(values, 850.0) if kind == "q850" else values


def _moisture_threshold(kind: str | None, override: float | None) -> float:
    """Rich-moisture threshold of a field in the units of :func:`_moisture_measure`."""
    if kind is None:
        return np.nan
    value = RICH_MOISTURE[kind].threshold if override is None else float(override)
    return value if kind == "pwat" else value + ZERO_CELSIUS_K


def _distance_to_box_km(lat, lon, region):
    """Great-circle distance (km) from points to the nearest point of a box, with
    longitudes read on the circle."""
    south, north, west, east = region
    centre = 0.5 * (west + east)
    lon = np.asarray(lon, dtype=float)
    near = lon + 360.0 * np.round((centre - lon) / 360.0)
    return great_circle_km(lat, near, np.clip(lat, south, north), np.clip(near, west, east))


#: Grid lengths around the region that its flow and vorticity diagnostics depend on:
#: the vorticity advection is a derivative of a derivative of the geostrophic wind,
#: itself a derivative of the height (three centred differences).
_STENCIL_REACH = 3


def _stencil_window(lat_in, lon_in, lon):
    """(rows, columns) of the grid within :data:`_STENCIL_REACH` grid lengths of the
    region (``lat_in``, ``lon_in``; columns counted along the circle, in grid order;
    every column of a grid that goes round the globe): the flow and vorticity
    diagnostics of the region, computed on that window, are those of the whole grid
    (the same differences of the same values: :func:`analogs.geo._axis_derivative`)."""
    rows = np.flatnonzero(lat_in)
    rows = slice(max(rows[0] - _STENCIL_REACH, 0), rows[-1] + _STENCIL_REACH + 1)
    frame = longitude_frame(lon)
    if frame.periodic:
        return rows, np.arange(lon.size)
    inside = np.flatnonzero(lon_in[frame.order])      # the region's places in the frame
    first = max(inside[0] - _STENCIL_REACH, 0)
    return rows, np.sort(frame.order[first:inside[-1] + _STENCIL_REACH + 1])


def _block_columns(z, moisture, *, lat, lon, lat_in, lon_in, weights, band_in,
                   band_weights, region, ridge_cols, trough_cols, tc_near_km,
                   moisture_kind, moist_threshold, low_params,
                   window) -> dict[str, np.ndarray]:
    """Every column of :func:`compute_diagnostics` for one block of days."""
    nt = z.shape[0]
    columns = {}
    # The region's flow and vorticity from the window around it (_stencil_window).
    rows, cols = window
    z_near, lat_near, lon_near = z[:, rows][..., cols], lat[rows], lon[cols]
    near = (Ellipsis,) + np.ix_(lat_in[rows], lon_in[cols])
    dz_dx, dz_dy = spherical_gradient(z_near, lat_near, lon_near)
    u, v = _geostrophic_np(z_near, lat_near, lon_near, gradient=(dz_dx, dz_dy))
    zeta = _vorticity_np(u, v, lat_near, lon_near)
    vort_adv = _advection_np(zeta, u, v, lat_near, lon_near)
    u_mean = _weighted_mean_np(u[near], weights)
    v_mean = _weighted_mean_np(v[near], weights)
    columns["flow_u_ms"] = u_mean
    columns["flow_v_ms"] = v_mean
    columns["flow_direction_deg"] = _direction_np(u_mean, v_mean)
    columns["flow_speed_ms"] = np.hypot(u_mean, v_mean)
    columns["height_gradient"] = _weighted_mean_np(np.hypot(dz_dx[near], dz_dy[near]),
                                                   weights) * 1.0e6
    columns["vorticity"] = _weighted_mean_np(zeta[near], weights)
    columns["vorticity_advection"] = _weighted_mean_np(vort_adv[near], weights)
    columns["cyclonic_advection"] = _weighted_mean_np(np.maximum(vort_adv[near], 0.0), weights)

    # The wave profile needs the band's rows only (each row's own zonal mean). Where no
    # value is missing, numpy's mean and sum: the values of nanmean and nansum (the same
    # sums of the same values), without their copies and masks.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # an all-missing latitude row
        band = z[:, band_in, :]
        band = band - (np.nanmean if np.isnan(band).any() else np.mean)(band, axis=-1,
                                                                       keepdims=True)
    finite = np.isfinite(band)
    complete = finite.all()
    if not complete:
        band = np.where(finite, band, np.nan)
    band_w = np.where(finite, band_weights[None, :, None], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        profile = (np.sum if complete else np.nansum)(band * band_w, axis=1) / band_w.sum(axis=1)
    profile = np.where(np.isfinite(profile), profile, np.nan)
    filled_max = np.where(np.isnan(profile), -np.inf, profile)
    filled_min = np.where(np.isnan(profile), np.inf, profile)
    wrapped = wrap_longitude(lon)
    r_lon, r_amp, _, _ = _ridge_trough_np(filled_max, wrapped, ridge_cols, trough_cols)
    _, _, t_lon, t_amp = _ridge_trough_np(filled_min, wrapped, ridge_cols, trough_cols)
    for name, values in (("ridge_lon", r_lon), ("ridge_amplitude", r_amp),
                         ("trough_lon", t_lon), ("trough_amplitude", t_amp)):
        columns[name] = np.where(np.isfinite(values), values, np.nan)
    for name, amp in (("ridge_lon", "ridge_amplitude"), ("trough_lon", "trough_amplitude")):
        columns[name] = np.where(np.isfinite(columns[amp]), columns[name], np.nan)

    # Only the lows near the box are measured: the search elsewhere is not needed.
    lows = _closed_lows_np(z, lat, lon, moisture=moisture, moisture_kind=moisture_kind,
                           near=(region, tc_near_km), **low_params)
    # The deepest closed low near the box, else the deepest low.
    order = np.lexsort((-lows["depth"], ~lows["closed"], lows["t"]))
    t_near = lows["t"][order]
    first = np.unique(t_near, return_index=True)[1]
    days = t_near[first]
    for name, key in (("tc_lat", "lat"), ("tc_lon", "lon"), ("tc_depth", "depth"),
                      ("tc_radius_km", "radius"), ("tc_dewpoint_c", "moisture")):
        values = np.full(nt, np.nan)
        values[days] = lows[key][order][first]
        columns[name] = values
    if moisture_kind in ("q850", "td2m"):
        columns["tc_dewpoint_c"] = columns["tc_dewpoint_c"] - ZERO_CELSIUS_K
    else:
        columns["tc_dewpoint_c"] = np.full(nt, np.nan)
    columns["tc_present"] = np.isin(np.arange(nt), days)
    closed = np.zeros(nt, dtype=bool)
    closed[days] = lows["closed"][order][first]
    columns["tc_closed"] = closed

    nan = np.full(nt, np.nan)
    for name in ("dewpoint_region_c", "moist_line_lat", "moist_area_fraction", "pwat_region"):
        columns[name] = nan
    columns["moisture_available"] = np.zeros(nt, dtype=bool)
    if moisture is not None:
        # The region's columns, every latitude (the moist line is searched along them).
        measure = _moisture_measure(np.asarray(moisture[..., lon_in], dtype=float),
                                    moisture_kind)
        part = measure[:, lat_in]
        region_mean = _weighted_mean_np(part, weights)
        columns["moisture_available"] = np.isfinite(region_mean)
        if moisture_kind == "pwat":
            columns["pwat_region"] = region_mean
        else:
            columns["dewpoint_region_c"] = region_mean - ZERO_CELSIUS_K
        columns["moist_line_lat"] = _moist_line_np(measure, lat, moist_threshold,
                                                   np.ones(measure.shape[-1], dtype=bool))
        with np.errstate(invalid="ignore"):
            moist = np.where(np.isfinite(part), (part >= moist_threshold).astype(float),
                             np.nan)
        columns["moist_area_fraction"] = _weighted_mean_np(moist, weights)
    columns["_missing_height_day"] = ~np.isfinite(z).all(axis=(1, 2))
    return columns


#: The diagnostics a ``block_measures`` callable of :func:`compute_diagnostics` is handed.
_MEASURES_READ = ("tc_present", "tc_closed", "tc_lat", "tc_lon", "tc_depth")
#: Working memory of the diagnostics of a whole archive, bytes (all threads together).
DIAGNOSTICS_MEMORY_BYTES = 10**9
#: Working memory per grid point and day of a block, bytes (measured: 5.4 MB a day at
#: 140 x 280 points, the float64 fields, gradients and closed-low search together).
_BYTES_PER_POINT_DAY = 140


def _read_days(z500: xr.DataArray, block_days: int) -> int:
    """Days read at once: ``block_days``, or for an archive chunked in time (dask) whole
    chunks, so that each chunk is read once (blocks smaller than a chunk each read the
    whole chunk: measured, 0.25 degree in 365-day chunks, six reads of the archive)."""
    sizes = (z500.chunksizes or {}).get("time")
    if not sizes or len(set(sizes[:-1])) > 1:
        return block_days
    return max(1, block_days // sizes[0]) * sizes[0]


def compute_diagnostics(ds: xr.Dataset, region, *, upstream_deg: float = 25.0,
                        downstream_deg: float = 15.0, trough_west_deg: float = 15.0,
                        poleward_deg: float = 0.0,
                        tc_near_km: float = 600.0,
                        closed_lows: Mapping | None = None,
                        moist_threshold: float | None = None,
                        block_days: int | None = None, n_threads: int | None = None,
                        block_measures=None, progress: bool = False) -> pd.DataFrame:
    r"""All regime diagnostics of an archive over a region, one row a day.

    ``region`` is (south, north, west, east) in degrees; west > east (or east past
    180) is a box across the date line. Longitudes are read on the circle throughout
    (:mod:`analogs.geo`), so the answer does not depend on where the grid's longitude
    seam falls, and pole rows never reach an area mean as a singular value (see
    :func:`geostrophic_wind`, :func:`relative_vorticity`).

    Columns (units in :data:`DIAGNOSTIC_UNITS`):

    - ``flow_u_ms``, ``flow_v_ms``, ``flow_direction_deg``, ``flow_speed_ms``: the
      area-mean 500 hPa geostrophic wind over the region and the direction / speed of
      that mean vector (:func:`region_mean_flow`).
    - ``height_gradient``: region mean of :math:`|\nabla Z|` in gpm per 1000 km.
    - ``vorticity``, ``vorticity_advection``: region means of the geostrophic relative
      vorticity (s-1) and of its advection by the geostrophic wind,
      :math:`-\mathbf{V}_g\cdot\nabla\zeta_g` (s-2; positive = cyclonic advection).
    - ``cyclonic_advection``: region mean of the cyclonic part only,
      :math:`\max(-\mathbf{V}_g\cdot\nabla\zeta_g, 0)` (s-2): with a trough axis
      inside the box the full mean cancels between anticyclonic advection behind the
      axis and cyclonic advection ahead of it; this keeps the forcing ahead of it.
    - ``ridge_lon``, ``ridge_amplitude``, ``trough_lon``, ``trough_amplitude``
      (:func:`ridge_trough`).
    - ``tc_present``, ``tc_closed``, ``tc_lat``, ``tc_lon``, ``tc_depth``,
      ``tc_radius_km``, ``tc_dewpoint_c``: the compact low (:func:`find_closed_lows`,
      settings ``closed_lows`` over :data:`CLOSED_LOW_DEFAULTS`) whose centre lies
      within ``tc_near_km`` of the region box (the deepest with a closed circulation,
      else the deepest; ``tc_closed`` says which), and the mean dewpoint (850 hPa from
      ``q850``, or 2 m from ``td2m``; NaN with ``pwat``) within 500 km of it.
      ``tc_present`` says only that such a low exists; whether it is tropical is for
      the regime rules.
    - ``moisture_available`` (bool): the region has moisture values that day (any of
      ``q850``, ``td2m``, ``pwat``: precipitable water counts as moisture).
    - ``dewpoint_region_c``: region-mean dewpoint at the field's level (deg C; NaN
      with ``pwat``), or ``pwat_region`` (kg m-2) with ``pwat`` only.
    - ``moist_line_lat`` (:func:`moist_line_latitude` over the region's longitudes)
      and ``moist_area_fraction`` (:func:`moist_area_fraction`): the reach and
      coverage of rich low-level moisture, each against the threshold of the
      field's OWN level (:data:`RICH_MOISTURE`: the 60 F line only for a 2 m
      dewpoint; 12 C for an 850 hPa dewpoint; 30 kg m-2 for precipitable water), or
      ``moist_threshold`` in the field's units (deg C, or kg m-2).

    ``frame.attrs``: ``region``; ``units``; ``missing`` (``["moisture"]`` without a
    moisture field, else empty); ``moisture`` (:meth:`RichMoisture.to_dict` of the
    field used, with the threshold applied, or None); ``missing_height_days`` (days
    with at least one missing 500 hPa height: their diagnostics skip the missing
    points).

    The archive is walked in blocks of ``block_days`` (dask-backed inputs are read whole
    time chunks at a time, each chunk once, and worked in such blocks), ``n_threads``
    reads at once (default: the CPU count, at most
    4); all maths is vectorised over the days of a block. By default a block holds as
    many days as fit :data:`DIAGNOSTICS_MEMORY_BYTES` shared by the threads (at most
    1000): 1000 days at 1 degree, about 90 at 0.25 degree.

    ``block_measures``, optional: a callable ``(block, diagnostics) -> DataFrame`` of
    more columns (one row a day), called with a Dataset of days and their diagnostics;
    its columns are appended. For a dask-backed archive it is called on each block of
    days while its fields are in memory: a measure that needs the fields again (the
    closed-low structure of :func:`analogs.stages.regimes.cyclone_structure`) so reads
    an archive chunked in time once, not twice. For an archive in memory it is called
    once, on every day (the closed-low structure measures the days that share a centre
    together: fewer, larger groups). Its values must not depend on how the days are
    blocked.
    """
    if not isinstance(ds, xr.Dataset) or "z500" not in ds:
        raise AnalogsInputError(
            "The dataset given to compute_diagnostics must have a 'z500' variable "
            "(500 hPa geopotential height in gpm) with dims (time, lat, lon).")
    z500 = _check_height(ds["z500"], "compute_diagnostics")
    if "time" not in z500.dims:
        ds = ds.expand_dims("time")
        z500 = ds["z500"]
    lat, lon = _grid(z500)
    lat_in, lon_in = _check_region(region, lat, lon, "compute_diagnostics")
    bounds = _region_bounds(region, "compute_diagnostics")
    weights = _region_weights(lat, lat_in, lon_in)
    band_in = _wave_band(lat, bounds, poleward_deg)
    ridge_cols, trough_cols = _wave_windows(lon, bounds, upstream_deg, downstream_deg,
                                            trough_west_deg)
    low_params = _closed_low_params(dict(closed_lows or {}), "compute_diagnostics")
    kind = moisture_field(ds)
    if moist_threshold is not None and (isinstance(moist_threshold, bool) or not (
            isinstance(moist_threshold, numbers.Real) and np.isfinite(moist_threshold))):
        raise AnalogsInputError(
            "The 'moist_threshold' parameter of compute_diagnostics must be a finite "
            f"number in the moisture field's units. Got {moist_threshold!r} instead.")
    threshold = _moisture_threshold(kind, moist_threshold)

    times = z500["time"].values
    setup = {"lat": lat, "lon": lon, "lat_in": lat_in, "lon_in": lon_in,
             "weights": weights, "band_in": band_in,
             "band_weights": np.cos(np.radians(lat[band_in])), "region": bounds,
             "ridge_cols": ridge_cols, "trough_cols": trough_cols,
             "tc_near_km": tc_near_km, "moisture_kind": kind,
             "moist_threshold": threshold, "low_params": low_params,
             "window": _stencil_window(lat_in, lon_in, lon)}

    threads = n_threads or min(os.cpu_count() or 1, 4)
    if block_days is None:
        per_day = _BYTES_PER_POINT_DAY * lat.size * lon.size
        block_days = int(min(1000, max(1, DIAGNOSTICS_MEMORY_BYTES // (threads * per_day))))
    read_days = _read_days(z500, block_days)
    measure_blocks = block_measures is not None and z500.chunks is not None

    def measured(columns, part):
        """``columns`` with those of ``block_measures`` on the days of ``part``."""
        found = pd.DataFrame({name: columns[name] for name in _MEASURES_READ},
                             index=pd.DatetimeIndex(part["time"].values))
        more = block_measures(part, found)
        return {**columns, **{name: more[name].to_numpy() for name in more.columns}}

    def one_block(start):
        block = ds.isel(time=slice(start, start + read_days))
        if read_days > block_days or measure_blocks:
            block = block.load()  # a whole time chunk read once, worked block by block
        parts = []
        for first in range(0, block.sizes["time"], block_days):
            part = block.isel(time=slice(first, first + block_days))
            z = np.asarray(part["z500"].transpose("time", "lat", "lon").values, dtype=float)
            columns = _block_columns(z, _moisture_block(part, kind), **setup)
            parts.append(measured(columns, part) if measure_blocks else columns)
        return {name: np.concatenate([p[name] for p in parts]) for name in parts[0]}

    starts = range(0, times.size, read_days)
    # numpy and scipy.ndimage release the GIL in the heavy loops: threads overlap blocks.
    workers = min(len(starts), threads)
    with ThreadPoolExecutor(max_workers=max(workers, 1)) as pool:
        results = pool.map(one_block, starts)
        if progress:
            from tqdm.auto import tqdm
            results = tqdm(results, total=len(starts), desc="diagnostics", unit="block")
        blocks = list(results)
    columns = {name: np.concatenate([b[name] for b in blocks]) for name in blocks[0]}
    if block_measures is not None and not measure_blocks:
        columns = measured(columns, ds)
    names = list(DIAGNOSTIC_UNITS) + [name for name in columns if name not in DIAGNOSTIC_UNITS
                                      and name != "_missing_height_day"]
    columns = {name: columns[name] for name in names}
    frame = pd.DataFrame(columns, index=pd.DatetimeIndex(times, name="time"))
    if kind != "pwat":
        frame = frame.drop(columns="pwat_region")
    frame.attrs["missing"] = [] if kind is not None else ["moisture"]
    frame.attrs["region"] = tuple(float(v) for v in region)
    frame.attrs["units"] = {k: v for k, v in DIAGNOSTIC_UNITS.items() if k in frame}
    if kind is None:
        frame.attrs["moisture"] = None
    else:
        used = RICH_MOISTURE[kind].to_dict()
        if moist_threshold is not None:
            used.update(threshold=float(moist_threshold), source="given by the caller")
        frame.attrs["moisture"] = used
    frame.attrs["missing_height_days"] = int(
        sum(b["_missing_height_day"].sum() for b in blocks))
    return frame
