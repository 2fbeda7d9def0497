r"""Physical diagnostics of the 500 hPa flow and low-level moisture, for regimes.

Pure, vectorised functions on canonical fields (dims ``(..., lat, lon)``, ``lat``
ascending, ``lon`` ascending in [-180, 180), ``z500`` in gpm). The maths is plain
numpy on arrays whose last two axes are (lat, lon); thin xarray wrappers add
labels, units and ``long_name`` and go through ``xarray.apply_ufunc(...,
dask="parallelized")``, so a dask-backed archive chunked along ``time`` stays lazy
until asked. Fields must have a single chunk along ``lat`` and ``lon``.

:func:`compute_diagnostics` reduces a whole archive to one row a day over a region
(a tuple ``(south, north, west, east)`` in degrees), walking the archive in blocks
of days so that memory stays bounded and dask-backed inputs compute one block at a
time.

No I/O and no store: outcomes (tropical-cyclone centres) and reports reuse these.

References
----------
- Holton, J. R. and G. J. Hakim, 2013: *An Introduction to Dynamic Meteorology*,
  5th ed., Academic Press (geostrophic wind, vorticity on the sphere, advection).
- Bolton, D., 1980: The computation of equivalent potential temperature.
  *Mon. Wea. Rev.*, 108, 1046-1053 (saturation vapour pressure over water).
- MetPy (May et al., 2022, *Bull. Amer. Meteor. Soc.*), whose ``geostrophic_wind``,
  ``vorticity``, ``advection``, ``wind_direction`` and
  ``dewpoint_from_specific_humidity`` the tests use as the reference.
"""

from __future__ import annotations

import numbers
import os
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
import xarray as xr
from scipy import ndimage

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
from analogs.geo import great_circle_km, meridional_derivative, spherical_gradient, zonal_derivative

__all__ = [
    "coriolis_parameter",
    "geostrophic_wind",
    "relative_vorticity",
    "geostrophic_vorticity",
    "advection",
    "wind_direction",
    "wind_speed",
    "region_mean_flow",
    "wave_anomaly",
    "ridge_trough",
    "find_closed_lows",
    "dewpoint_from_specific_humidity",
    "moist_line_latitude",
    "moist_area_fraction",
    "compute_diagnostics",
    "DIAGNOSTIC_UNITS",
]

#: Geostrophic balance is meaningless near the equator, where f -> 0; the geostrophic
#: wind is NaN equatorward of this latitude (degrees, common practice, no source).
MIN_GEOSTROPHIC_LAT_DEG = 5.0
#: Length of one degree of latitude on the project's sphere, km.
_KM_PER_DEG = np.pi * EARTH_RADIUS / 180.0 / 1000.0
_HEIGHT_UNITS = {"gpm", "m", "meter", "meters", "metre", "metres", "geopotential_meter"}
_GRID = ["lat", "lon"]

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
    "tc_lat": "degree_north",
    "tc_lon": "degree_east",
    "tc_depth": "gpm",
    "tc_radius_km": "km",
    "tc_dewpoint_c": "degC",
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


def _check_region(region, lat, lon, owner: str):
    """Boolean masks (lat, lon) of the grid points inside ``region``."""
    if (not isinstance(region, (tuple, list)) or len(region) != 4
            or not all(isinstance(v, numbers.Real) and np.isfinite(v) for v in region)):
        raise AnalogsInputError(
            f"The 'region' parameter of {owner} must be (south, north, west, east) in "
            f"degrees. Got {region!r} instead.")
    south, north, west, east = (float(v) for v in region)
    if not (-90.0 <= south < north <= 90.0) or not (west < east):
        raise AnalogsInputError(
            f"The 'region' parameter of {owner} must have south < north within "
            f"[-90, 90] and west < east in degrees east. Got {region!r} instead.")
    lat, lon = np.asarray(lat, float), np.asarray(lon, float)
    lat_in = (lat >= south) & (lat <= north)
    lon_in = (lon >= west) & (lon <= east)
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
    dv_dx = zonal_derivative(v, lat, lon)
    du_dy = meridional_derivative(u, lat)
    metric = np.tan(np.radians(lat))[:, None] / EARTH_RADIUS
    return dv_dx - du_dy + u * metric


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


def _moist_line_np(dewpoint_k, lat, threshold_c, lon_cols):
    moist = dewpoint_k[..., lon_cols] >= threshold_c + ZERO_CELSIUS_K
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
    """Longitude masks of the ridge (upstream) and trough (over/downstream) windows."""
    _, _, west, east = region
    ridge_cols = (lon >= west - upstream_deg) & (lon <= west)
    trough_cols = (lon >= west - trough_west_deg) & (lon <= east + downstream_deg)
    if not ridge_cols.any():
        ridge_cols = lon <= lon.min()
    return ridge_cols, trough_cols


def _wave_band(lat, region, poleward_deg):
    """Latitudes of the wave profile: the region's, extended ``poleward_deg`` poleward."""
    south, north = region[0], region[1]
    if north >= 0:
        return (lat >= south) & (lat <= north + poleward_deg)
    return (lat >= south - poleward_deg) & (lat <= north)


def _ring_offsets(lat, i, dlat, dlon, max_km):
    """Grid offsets (di, dj) and their distances (km) within max_km of row i."""
    ni = int(np.ceil(max_km / (_KM_PER_DEG * dlat)))
    cos_lat = max(np.cos(np.radians(lat[i])), 0.05)
    nj = int(np.ceil(max_km / (_KM_PER_DEG * dlon * cos_lat)))
    di, dj = np.meshgrid(np.arange(-ni, ni + 1), np.arange(-nj, nj + 1), indexing="ij")
    di, dj = di.ravel(), dj.ravel()
    dist = great_circle_km(lat[i], 0.0, lat[i] + di * dlat, dj * dlon)
    keep = dist <= max_km
    return di[keep], dj[keep], dist[keep]


def _closed_lows_np(z, lat, lon, *, moisture=None, max_lat, min_depth, max_radius_km,
                    ring_km, neighbourhood_km, moisture_radius_km, min_ring_fraction=0.5):
    """Compact closed lows in z (nt, nlat, nlon); returns a dict of 1-D arrays."""
    nt, nlat, nlon = z.shape
    dlat = float(np.mean(np.diff(lat))) if nlat > 1 else 1.0
    dlon = float(np.mean(np.diff(lon))) if nlon > 1 else 1.0
    ring_inner, ring_outer = ring_km

    def half_widths(km, cos_lat):
        return (max(1, int(round(km / (_KM_PER_DEG * dlat)))),
                max(1, int(round(km / (_KM_PER_DEG * dlon * cos_lat)))))

    # Only rows within reach of |lat| <= max_lat can hold or shape a centre.
    reach_i = half_widths(ring_outer, 1.0)[0]
    rows = np.nonzero(np.abs(lat) <= max_lat + (reach_i + 1) * dlat)[0]
    # Heights relative to the zonal median of each latitude: the median ignores the
    # compact low itself, and removing it takes away the meridional slope of the
    # background, so that neither the screening below nor the ring depth is biased
    # where part of the ring falls outside the grid.
    z = z - np.median(z, axis=-1, keepdims=True)
    candidate = np.zeros(z.shape, dtype=bool)
    if rows.size:
        # Screening: an approximate depth field, the mean over a square annulus of
        # half-widths ring_km (box sums, counting only points inside the grid) minus
        # the height. Local maxima of it are compact lows, including those on a sloping
        # background or next to a broad trough where the total height has no closed
        # contour. Depth and radius are then measured exactly on the great-circle ring.
        band = z[:, rows[0]:rows[-1] + 1]
        cos_lat = np.cos(np.radians(np.clip(np.abs(lat[rows]).mean(), 0.0, 80.0)))
        ones = np.ones(band.shape[1:])
        sums = []
        for km in (ring_outer, ring_inner):
            hi, hj = half_widths(km, cos_lat)
            size = (2 * hi + 1, 2 * hj + 1)
            n = size[0] * size[1]
            sums.append((ndimage.uniform_filter(band, size=(1,) + size, mode="constant") * n,
                         ndimage.uniform_filter(ones, size=size, mode="constant") * n))
        (s_out, n_out), (s_in, n_in) = sums
        screen = (s_out - s_in) / np.maximum(n_out - n_in, 1.0) - band
        hi, hj = half_widths(neighbourhood_km, cos_lat)
        peak = ndimage.maximum_filter(screen, size=(1, 2 * hi + 1, 2 * hj + 1), mode="nearest")
        candidate[:, rows[0]:rows[-1] + 1] = (screen >= peak) & (screen >= 0.5 * min_depth)
    interior = np.zeros((nlat, nlon), dtype=bool)
    interior[1:-1, 1:-1] = True
    interior &= (np.abs(lat) <= max_lat)[:, None]
    t_idx, i_idx, j_idx = np.nonzero(candidate & interior)

    reach_km = max(ring_outer, moisture_radius_km)
    bin_km = _KM_PER_DEG * dlat
    n_bins = int(np.ceil(ring_outer / bin_km))
    out = {k: np.full(t_idx.size, np.nan) for k in ("depth", "radius", "moisture")}
    for i in np.unique(i_idx):
        sel = np.nonzero(i_idx == i)[0]
        di, dj, dist = _ring_offsets(lat, i, dlat, dlon, reach_km)
        rows = i + di
        cols = j_idx[sel, None] + dj[None, :]
        valid = (rows >= 0) & (rows < nlat)
        valid = valid[None, :] & (cols >= 0) & (cols < nlon)
        rows_c = np.clip(rows, 0, nlat - 1)[None, :]
        cols_c = np.clip(cols, 0, nlon - 1)
        values = np.where(valid, z[t_idx[sel, None], rows_c, cols_c], np.nan)
        centre = z[t_idx[sel], i, j_idx[sel]]

        ring = (dist >= ring_inner) & (dist <= ring_outer)
        ring_valid = valid[:, ring]
        ring_fraction = ring_valid.mean(axis=1)
        with np.errstate(invalid="ignore"):
            depth = np.nanmean(values[:, ring], axis=1) - centre
        depth = np.where(ring_fraction >= min_ring_fraction, depth, np.nan)

        # Azimuthal-mean profile in annuli one grid-length wide: the radius is where it
        # first climbs back half the depth above the centre (linear interpolation).
        bins = np.minimum((dist / bin_km).astype(int), n_bins)
        in_disc = dist <= ring_outer
        indicator = (bins[in_disc, None] == np.arange(n_bins)[None, :]).astype(float)
        vals = values[:, in_disc]
        ok = np.isfinite(vals)
        sums = np.where(ok, vals, 0.0) @ indicator
        counts = ok.astype(float) @ indicator
        with np.errstate(invalid="ignore", divide="ignore"):
            profile = sums / counts - centre[:, None]
        radii = (np.arange(n_bins) + 0.5) * bin_km
        radii[0] = 0.0
        rise = profile - 0.5 * depth[:, None]
        reached = rise >= 0
        first = np.argmax(reached, axis=1)
        has = reached.any(axis=1) & np.isfinite(depth)
        prev = np.maximum(first - 1, 0)
        r0, r1 = radii[prev], radii[first]
        p0 = np.take_along_axis(rise, prev[:, None], axis=1)[:, 0]
        p1 = np.take_along_axis(rise, first[:, None], axis=1)[:, 0]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(p1 > p0, -p0 / (p1 - p0), 0.0)
        radius = np.where(first > 0, r0 + np.clip(frac, 0, 1) * (r1 - r0), r1)
        out["depth"][sel] = depth
        out["radius"][sel] = np.where(has, radius, np.nan)

        if moisture is not None:
            near = dist <= moisture_radius_km
            m_vals = np.where(valid[:, near],
                              moisture[t_idx[sel, None], rows_c[:, near], cols_c[:, near]],
                              np.nan)
            with np.errstate(invalid="ignore"):
                out["moisture"][sel] = np.nanmean(m_vals, axis=1)

    keep = ((out["depth"] >= min_depth) & (out["radius"] <= max_radius_km))
    return {"t": t_idx[keep], "lat": lat[i_idx[keep]], "lon": lon[j_idx[keep]],
            "depth": out["depth"][keep], "radius": out["radius"][keep],
            "moisture": out["moisture"][keep]}


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
    :math:`a` the Earth radius; centred differences inside, one-sided at the edges
    (:func:`analogs.geo.spherical_gradient`). NaN equatorward of
    ``MIN_GEOSTROPHIC_LAT_DEG`` where :math:`f \to 0`.

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
    ``vector_derivative``), so the two agree to rounding away from the edges.

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
    longitudes of the extremes. Amplitudes in gpm (positive for a ridge above and a
    trough below the zonal mean).

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
        kwargs={"lon": lon, "ridge_cols": ridge_cols, "trough_cols": trough_cols})
    names = [("ridge_lon", "degree_east", "longitude of the strongest upstream ridge"),
             ("ridge_amplitude", "gpm", "amplitude of the strongest upstream ridge"),
             ("trough_lon", "degree_east", "longitude of the strongest trough"),
             ("trough_amplitude", "gpm", "depth of the strongest trough below the zonal mean")]
    return xr.Dataset({n: _labelled(o, u_, ln) for (n, u_, ln), o in zip(names, outs)})


def find_closed_lows(z500: xr.DataArray, moisture: xr.DataArray | None = None, *,
                     max_lat: float = 35.0, min_depth: float = 15.0,
                     max_radius_km: float = 600.0,
                     ring_km: tuple[float, float] = (500.0, 800.0),
                     neighbourhood_km: float = 400.0,
                     moisture_radius_km: float = 500.0,
                     block_days: int = 1000) -> pd.DataFrame:
    r"""Compact closed 500 hPa lows at low latitude (tropical cyclones or remnants).

    Heights are first taken relative to their zonal median at each latitude
    (:math:`Z' = Z - \operatorname{median}_\lambda Z`), which removes the meridional
    slope of the background and ignores the compact low itself. A centre is a grid
    point (not on the domain edge, :math:`|\phi| \le` ``max_lat``) where a screening
    depth field, the mean of :math:`Z'` over a square annulus of half-widths
    ``ring_km`` (box sums over the points inside the grid,
    ``scipy.ndimage.uniform_filter``) minus :math:`Z'`, is the maximum over a
    neighbourhood of about ``neighbourhood_km`` (``scipy.ndimage.maximum_filter``
    over (lat, lon) per day) and at least ``min_depth / 2``. This is the local
    minimum of a closed low in a flat background; unlike a plain minimum of
    :math:`Z` it also finds a compact low on a sloping background or beside a broad
    trough, where the total height has no closed contour. For each centre:

    .. math::

        D = \overline{Z'}_{ring} - Z'_c, \qquad
        r_{1/2} = \min\{ r : \langle Z' \rangle_\theta(r) - Z'_c \ge D / 2 \}

    where :math:`\overline{Z'}_{ring}` is the mean over grid points between
    ``ring_km[0]`` and ``ring_km[1]`` great-circle distance (at least half the ring
    inside the grid), and :math:`\langle Z'\rangle_\theta(r)` the azimuthal mean in
    annuli one grid length wide, interpolated linearly. For a Gaussian low
    :math:`-A\exp(-r^2/2\sigma^2)` on a flat background,
    :math:`r_{1/2} = \sigma\sqrt{2\ln 2}` and :math:`D` is a little less than
    :math:`A`. Lows with :math:`D \ge` ``min_depth`` (gpm) and
    :math:`r_{1/2} \le` ``max_radius_km`` are kept: deep and compact, unlike a broad
    mid-latitude trough.

    Parameters
    ----------
    z500 : DataArray (time, lat, lon) in gpm (dask-backed is fine: it is read in
        blocks of ``block_days``).
    moisture : optional DataArray on the same grid (any moisture variable, e.g. the
        850 hPa dewpoint in K); its mean within ``moisture_radius_km`` of the centre
        is returned as ``moisture_mean`` (NaN when absent).

    Returns
    -------
    DataFrame with columns ``time, lat, lon, depth_gpm, radius_km, moisture_mean``,
    one row per low, sorted by time then depth (deepest first).

    Reference: closed-low detection by local extrema and ring-mean depth, as in
    cut-off low and tropical-cyclone trackers (common practice, no source).
    """
    z500 = _check_height(z500, "find_closed_lows")
    if "time" not in z500.dims:
        z500 = z500.expand_dims("time")
        moisture = None if moisture is None else moisture.expand_dims("time")
    z500 = z500.transpose("time", "lat", "lon")
    lat, lon = _grid(z500)
    times = z500["time"].values
    frames = []
    for start in range(0, times.size, block_days):
        block = slice(start, start + block_days)
        z = np.asarray(z500.isel(time=block).values, dtype=float)
        m = None if moisture is None else np.asarray(
            moisture.transpose("time", "lat", "lon").isel(time=block).values, dtype=float)
        lows = _closed_lows_np(z, lat, lon, moisture=m, max_lat=max_lat,
                               min_depth=min_depth, max_radius_km=max_radius_km,
                               ring_km=ring_km, neighbourhood_km=neighbourhood_km,
                               moisture_radius_km=moisture_radius_km)
        frames.append(pd.DataFrame({
            "time": times[block][lows["t"]], "lat": lows["lat"], "lon": lows["lon"],
            "depth_gpm": lows["depth"], "radius_km": lows["radius"],
            "moisture_mean": lows["moisture"]}))
    table = pd.concat(frames, ignore_index=True)
    return table.sort_values(["time", "depth_gpm"], ascending=[True, False],
                             ignore_index=True)


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


def moist_line_latitude(dewpoint: xr.DataArray, threshold_c: float = SEVERE_DEWPOINT_C,
                        lon_range: tuple[float, float] | None = None) -> xr.DataArray:
    r"""Poleward reach of moist air: mean over longitudes of the northernmost latitude
    where the dewpoint reaches ``threshold_c``.

    .. math::

        \phi_{moist} = \frac{1}{N_\lambda}\sum_\lambda
        \max\{\phi : T_d(\phi, \lambda) \ge T_{thr}\}

    over the longitudes of ``lon_range`` (west, east; default all) where any grid point
    reaches the threshold; NaN when none does. Default threshold: the 60 deg F
    (15.6 deg C) dewpoint line (common practice, no source).

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
        lon_cols = (lon >= lon_range[0]) & (lon <= lon_range[1])
        if not lon_cols.any():
            raise AnalogsInputError(
                f"The 'lon_range' parameter of moist_line_latitude must overlap the grid "
                f"longitudes {lon.min():g}..{lon.max():g}. Got {lon_range!r} instead.")
    line = xr.apply_ufunc(
        _moist_line_np, dewpoint, input_core_dims=[_GRID], output_core_dims=[[]],
        dask="parallelized", output_dtypes=[float],
        kwargs={"lat": lat, "threshold_c": float(threshold_c), "lon_cols": lon_cols})
    return _labelled(line, "degree_north",
                     f"mean northernmost latitude of the {threshold_c:.1f} C dewpoint")


def moist_area_fraction(dewpoint: xr.DataArray, region,
                        threshold_c: float = SEVERE_DEWPOINT_C) -> xr.DataArray:
    r"""Moisture return under the flow: area fraction of the region with
    :math:`T_d \ge` ``threshold_c``.

    .. math:: F = \frac{\sum \cos\phi\,[T_d \ge T_{thr}]}{\sum \cos\phi}

    Dimensionless in [0, 1]; ``dewpoint`` in K. Reference: the 60 deg F dewpoint as the
    marker of severe-grade low-level moisture (common practice, no source).
    """
    dewpoint = _check_field(dewpoint, "dewpoint", "moist_area_fraction")
    lat, lon = _grid(dewpoint)
    lat_in, lon_in = _check_region(region, lat, lon, "moist_area_fraction")
    weights = xr.DataArray(np.cos(np.radians(lat[lat_in])), dims="lat")
    moist = (dewpoint >= threshold_c + ZERO_CELSIUS_K).astype(float)
    fraction = moist.isel(lat=lat_in, lon=lon_in).weighted(weights).mean(_GRID)
    return _labelled(fraction, "1", "area fraction of the region with severe-grade dewpoint")


# ------------------------------------------------------------------ archive table


def _moisture_block(block: xr.Dataset):
    """(dewpoint in K or None, precipitable water or None) of one block of days."""
    if "q850" in block:
        q = np.asarray(block["q850"].transpose("time", "lat", "lon").values, dtype=float)
        return _dewpoint_np(q, 850.0), None
    if "td2m" in block:
        return np.asarray(block["td2m"].transpose("time", "lat", "lon").values, float), None
    if "pwat" in block:
        return None, np.asarray(block["pwat"].transpose("time", "lat", "lon").values, float)
    return None, None


def _distance_to_box_km(lat, lon, region):
    south, north, west, east = region
    return great_circle_km(lat, lon, np.clip(lat, south, north), np.clip(lon, west, east))


def _block_columns(z, dewpoint, pwat, *, lat, lon, lat_in, lon_in, weights, band_in,
                   band_weights,
                   region, ridge_cols, trough_cols, tc_near_km, moist_threshold_c,
                   low_params) -> dict[str, np.ndarray]:
    """Every column of :func:`compute_diagnostics` for one block of days."""
    nt = z.shape[0]
    sub = (Ellipsis,) + np.ix_(lat_in, lon_in)
    columns = {}
    dz_dx, dz_dy = spherical_gradient(z, lat, lon)
    u, v = _geostrophic_np(z, lat, lon, gradient=(dz_dx, dz_dy))
    zeta = _vorticity_np(u, v, lat, lon)
    vort_adv = _advection_np(zeta, u, v, lat, lon)
    u_mean = _weighted_mean_np(u[sub], weights)
    v_mean = _weighted_mean_np(v[sub], weights)
    columns["flow_u_ms"] = u_mean
    columns["flow_v_ms"] = v_mean
    columns["flow_direction_deg"] = _direction_np(u_mean, v_mean)
    columns["flow_speed_ms"] = np.hypot(u_mean, v_mean)
    columns["height_gradient"] = _weighted_mean_np(np.hypot(dz_dx, dz_dy)[sub], weights) * 1.0e6
    columns["vorticity"] = _weighted_mean_np(zeta[sub], weights)
    columns["vorticity_advection"] = _weighted_mean_np(vort_adv[sub], weights)
    columns["cyclonic_advection"] = _weighted_mean_np(np.maximum(vort_adv[sub], 0.0), weights)

    wave = z - z.mean(axis=-1, keepdims=True)
    profile = np.tensordot(wave[:, band_in, :], band_weights, axes=([1], [0])) \
        / band_weights.sum()
    for name, values in zip(("ridge_lon", "ridge_amplitude", "trough_lon", "trough_amplitude"),
                            _ridge_trough_np(profile, lon, ridge_cols, trough_cols)):
        columns[name] = values

    lows = _closed_lows_np(z, lat, lon, moisture=dewpoint, **low_params)
    near = _distance_to_box_km(lows["lat"], lows["lon"], region) <= tc_near_km
    order = np.lexsort((-lows["depth"][near], lows["t"][near]))
    t_near = lows["t"][near][order]
    first = np.unique(t_near, return_index=True)[1]
    days = t_near[first]
    for name, key in (("tc_lat", "lat"), ("tc_lon", "lon"), ("tc_depth", "depth"),
                      ("tc_radius_km", "radius"), ("tc_dewpoint_c", "moisture")):
        values = np.full(nt, np.nan)
        values[days] = lows[key][near][order][first]
        columns[name] = values - ZERO_CELSIUS_K if key == "moisture" else values
    columns["tc_present"] = np.isin(np.arange(nt), days)

    nan = np.full(nt, np.nan)
    if dewpoint is not None:
        columns["dewpoint_region_c"] = _weighted_mean_np(dewpoint[sub], weights) - ZERO_CELSIUS_K
        columns["moist_line_lat"] = _moist_line_np(dewpoint, lat, moist_threshold_c, lon_in)
        moist = (dewpoint[sub] >= moist_threshold_c + ZERO_CELSIUS_K).astype(float)
        columns["moist_area_fraction"] = _weighted_mean_np(moist, weights)
    else:
        for name in ("dewpoint_region_c", "moist_line_lat", "moist_area_fraction"):
            columns[name] = nan
    columns["pwat_region"] = nan if pwat is None else _weighted_mean_np(pwat[sub], weights)
    return columns


#: Working memory of the diagnostics of a whole archive, bytes (all threads together).
DIAGNOSTICS_MEMORY_BYTES = 10**9
#: Working memory per grid point and day of a block, bytes (measured: 5.4 MB a day at
#: 140 x 280 points, the float64 fields, gradients and closed-low search together).
_BYTES_PER_POINT_DAY = 140


def compute_diagnostics(ds: xr.Dataset, region, *, upstream_deg: float = 25.0,
                        downstream_deg: float = 15.0, trough_west_deg: float = 15.0,
                        poleward_deg: float = 0.0,
                        tc_near_km: float = 600.0,
                        closed_lows: Mapping | None = None,
                        moist_threshold_c: float = SEVERE_DEWPOINT_C,
                        block_days: int | None = None, n_threads: int | None = None,
                        progress: bool = False) -> pd.DataFrame:
    r"""All regime diagnostics of an archive over a region, one row a day.

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
    - ``tc_present``, ``tc_lat``, ``tc_lon``, ``tc_depth``, ``tc_radius_km``,
      ``tc_dewpoint_c``: the deepest compact closed low (:func:`find_closed_lows`)
      whose centre lies within ``tc_near_km`` of the region box, and the mean 850 hPa
      dewpoint within 500 km of it. ``tc_present`` says only that such a low exists;
      whether it is wrapped in tropical moisture is for the regime rules.
    - ``dewpoint_region_c`` (region-mean dewpoint, deg C), ``moist_line_lat``
      (:func:`moist_line_latitude` over the region's longitudes) and
      ``moist_area_fraction`` (:func:`moist_area_fraction`): low-level moisture and its
      return beneath the flow. With ``pwat`` only, ``pwat_region`` replaces them.

    Dewpoint comes from ``q850`` (:func:`dewpoint_from_specific_humidity` at 850 hPa)
    or ``td2m``. Without a moisture field the moisture columns are NaN and
    ``frame.attrs["missing"] == ["moisture"]`` (``["dewpoint"]`` with ``pwat`` only).

    The archive is walked in blocks of ``block_days`` (dask-backed inputs compute one
    block at a time), ``n_threads`` blocks at once (default: the CPU count, at most
    4); all maths is vectorised over the days of a block. By default a block holds as
    many days as fit :data:`DIAGNOSTICS_MEMORY_BYTES` shared by the threads (at most
    1000): 1000 days at 1 degree, about 90 at 0.25 degree.
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
    region = tuple(float(v) for v in region)
    weights = _region_weights(lat, lat_in, lon_in)
    band_in = _wave_band(lat, region, poleward_deg)
    ridge_cols, trough_cols = _wave_windows(lon, region, upstream_deg, downstream_deg,
                                            trough_west_deg)
    low_params = {"max_lat": 35.0, "min_depth": 15.0, "max_radius_km": 600.0,
                  "ring_km": (500.0, 800.0), "neighbourhood_km": 400.0,
                  "moisture_radius_km": 500.0}
    unknown = set(closed_lows or {}) - set(low_params)
    if unknown:
        raise AnalogsInputError(
            f"The 'closed_lows' parameter of compute_diagnostics has unknown key(s) "
            f"{sorted(unknown)}; expected some of {sorted(low_params)}.")
    low_params.update(closed_lows or {})

    times = z500["time"].values
    setup = {"lat": lat, "lon": lon, "lat_in": lat_in, "lon_in": lon_in,
             "weights": weights, "band_in": band_in,
             "band_weights": np.cos(np.radians(lat[band_in])), "region": region,
             "ridge_cols": ridge_cols, "trough_cols": trough_cols,
             "tc_near_km": tc_near_km, "moist_threshold_c": moist_threshold_c,
             "low_params": low_params}

    def one_block(start):
        block = ds.isel(time=slice(start, start + block_days))
        z = np.asarray(block["z500"].transpose("time", "lat", "lon").values, dtype=float)
        return _block_columns(z, *_moisture_block(block), **setup)

    threads = n_threads or min(os.cpu_count() or 1, 4)
    if block_days is None:
        per_day = _BYTES_PER_POINT_DAY * lat.size * lon.size
        block_days = int(min(1000, max(1, DIAGNOSTICS_MEMORY_BYTES // (threads * per_day))))
    starts = range(0, times.size, block_days)
    # numpy and scipy.ndimage release the GIL in the heavy loops: threads overlap blocks.
    workers = min(len(starts), threads)
    with ThreadPoolExecutor(max_workers=max(workers, 1)) as pool:
        results = pool.map(one_block, starts)
        if progress:
            from tqdm.auto import tqdm
            results = tqdm(results, total=len(starts), desc="diagnostics", unit="block")
        blocks = list(results)
    if any(name in ds for name in ("q850", "td2m")):
        missing = []
    else:
        missing = ["dewpoint"] if "pwat" in ds else ["moisture"]
    columns = {name: np.concatenate([b[name] for b in blocks]) for name in DIAGNOSTIC_UNITS}
    frame = pd.DataFrame(columns, index=pd.DatetimeIndex(times, name="time"))
    if frame["pwat_region"].isna().all():
        frame = frame.drop(columns="pwat_region")
    frame.attrs["missing"] = missing
    frame.attrs["region"] = region
    frame.attrs["units"] = {k: v for k, v in DIAGNOSTIC_UNITS.items() if k in frame}
    return frame
