"""500 hPa geopotential height (gpm), one small function per process.

Every function takes 2-D ``lat``/``lon`` arrays (degrees, shape (nlat, nlon))
and per-day parameters (1-D arrays of length ndays) and returns an array of
shape (ndays, nlat, nlon) in gpm; the total height is their sum.
"""

from __future__ import annotations

import numpy as np

from analogs.constants import EARTH_RADIUS, G0, OMEGA
from analogs.geo import great_circle_km, spherical_gradient

from .schedule import WAVENUMBERS


def background_height(lat, s):
    """Zonal-mean height with a seasonal jet: :math:`Z_c - A\\tanh((\\phi-\\phi_j)/W) - B(\\phi-37.5)`.

    ``s`` is the summer weight (0 mid-January, 1 mid-July). Cool season:
    jet near 36 N, about 5820 gpm at 20 N and 5290 gpm at 55 N (gradient near
    23 gpm per degree at 40 N, a geostrophic wind of about 21 m/s); warm season:
    jet near 46 N, about 5900 gpm at 20 N and 5640 gpm at 55 N (about 7 m/s
    over the plains). Values are typical of mid-latitude 500 hPa analyses
    (common practice, no source).
    """
    s = np.asarray(s)[:, None, None]
    jet_lat = 36.0 + 10.0 * s
    amplitude = 230.0 - 110.0 * s
    width = 10.0 - 1.0 * s
    slope = 3.0 - 1.5 * s
    centre = 5560.0 + 200.0 * s
    return centre - amplitude * np.tanh((lat - jet_lat) / width) - slope * (lat - 37.5)


def plateau_ridge(lat, lon, s):
    """Stationary warm-season ridge over the plateau: (10 + 50 s) gpm, broad Gaussian at 40 N, 112 W."""
    s = np.asarray(s)[:, None, None]
    shape = np.exp(-((lat - 40.0) / 11.0) ** 2 - ((lon + 112.0) / 14.0) ** 2)
    return (10.0 + 50.0 * s) * shape


def travelling_waves(lat, lon, s, phase, amp_modulation):
    """Eastward-moving short waves: :math:`\\sum_k A_k(t)\\,E(\\phi)\\cos(k\\lambda - \\theta_k(t))`.

    Wavenumbers 5-8 (wavelengths 72-45 degrees of longitude), amplitude
    (30 - 17 s) gpm per wave times a red-noise modulation, in a Gaussian
    envelope 12 degrees wide centred on the seasonal jet latitude. The phases
    come from :mod:`reanalysis_demo.schedule` (phase speed 8-12 m/s).
    """
    s = np.asarray(s)[:, None, None]
    envelope = np.exp(-((lat - (36.0 + 10.0 * s)) / 12.0) ** 2)
    lam = np.radians(lon)
    total = np.zeros(np.broadcast_shapes(envelope.shape, lam.shape))
    for i, k in enumerate(WAVENUMBERS):
        amp = (30.0 - 17.0 * s) * amp_modulation[:, i, None, None]
        total += amp * np.cos(k * lam - phase[:, i, None, None])
    return envelope * total


#: Large-scale patterns: (lat, lon, radius deg, sign) pairs of Gaussian centres.
HEIGHT_PATTERNS = (
    ((42.0, -95.0, 14.0, 1.0),),
    ((50.0, -100.0, 10.0, 1.0), (30.0, -100.0, 10.0, -1.0)),
    ((52.0, -115.0, 10.0, 1.0), (52.0, -85.0, 10.0, -1.0)),
    ((48.0, -72.0, 10.0, 1.0), (30.0, -122.0, 10.0, 1.0), (30.0, -80.0, 10.0, -1.0)),
    ((52.0, -125.0, 9.0, 1.0), (38.0, -95.0, 7.0, -0.8)),
)


def pattern_shapes(lat, lon, patterns):
    """Smooth fixed patterns (npattern, nlat, nlon), each a sum of signed Gaussians."""
    shapes = []
    for centres in patterns:
        shape = sum(sign * np.exp(-((lat - c_lat) ** 2 + ((lon - c_lon) * np.cos(np.radians(c_lat))) ** 2)
                                  / radius ** 2)
                    for c_lat, c_lon, radius, sign in centres)
        shapes.append(shape)
    return np.stack(shapes)


def red_noise_anomalies(shapes, s, coefficients):
    """Large-scale red noise: AR(1) coefficients times fixed patterns, (40 - 20 s) gpm standard deviation."""
    s = np.asarray(s)[:, None, None]
    return (40.0 - 20.0 * s) * np.tensordot(coefficients, shapes, axes=(1, 0))


def deep_trough(lat, lon, axis, depth, centre_lat):
    """Amplified trough: :math:`-D\\exp(-((\\lambda-\\lambda_a)/9)^2 - ((\\phi-\\phi_c)/12)^2)`.

    A trough elongated north-south (9 degrees of longitude, 12 of latitude),
    with a downstream ridge of 0.3 D centred 22 degrees east. ``axis`` is NaN
    (and ``depth`` 0) on days without a trough.
    """
    axis = np.nan_to_num(np.asarray(axis))[:, None, None]
    depth = np.asarray(depth)[:, None, None]
    centre_lat = np.nan_to_num(np.asarray(centre_lat), nan=45.0)[:, None, None]
    meridional = np.exp(-((lat - centre_lat) / 12.0) ** 2)
    trough = -np.exp(-((lon - axis) / 9.0) ** 2)
    ridge = 0.3 * np.exp(-((lon - axis - 22.0) / 9.0) ** 2)
    return depth * meridional * (trough + ridge)


def northwest_flow_couplet(lat, lon, amplitude):
    """Ridge over the plateau and trough downstream, both scaled by the episode amplitude (gpm).

    Ridge centred 41 N, 112 W; trough centred 41 N, 80 W, each 10 degrees
    wide, so the region between them (about 95 W) lies in north-westerly
    flow aloft of roughly 300-340 degrees (the couplet's northerly flow on
    top of the background westerlies).
    """
    amplitude = np.asarray(amplitude)[:, None, None]
    ridge = np.exp(-((lat - 41.0) / 10.0) ** 2 - ((lon + 112.0) / 10.0) ** 2)
    trough = np.exp(-((lat - 41.0) / 10.0) ** 2 - ((lon + 80.0) / 10.0) ** 2)
    return amplitude * (ridge - trough)


def cyclone_lows(lat, lon, cyclones_by_day):
    """Compact closed lows: :math:`-D\\exp(-r^2/(2R^2))` per cyclone, R the radius of maximum wind.

    ``cyclones_by_day`` is a list (one per day) of tuples
    (id, lat, lon, depth gpm, radius km). r is the great-circle distance.
    """
    out = np.zeros((len(cyclones_by_day),) + lat.shape)
    for i, cyclones in enumerate(cyclones_by_day):
        for _, c_lat, c_lon, depth, radius in cyclones:
            r = great_circle_km(lat, lon, c_lat, c_lon)
            out[i] -= depth * np.exp(-0.5 * (r / radius) ** 2)
    return out


def total_height(lat, lon, days, shapes):
    """Sum of all height processes for a list of :class:`~reanalysis_demo.schedule.DayState`."""
    s = np.array([d.s for d in days])
    phase = np.stack([d.wave_phase for d in days])
    amp = np.stack([d.wave_amp for d in days])
    noise = np.stack([d.height_noise for d in days])
    return (background_height(lat, s)
            + plateau_ridge(lat, lon, s)
            + travelling_waves(lat, lon, s, phase, amp)
            + red_noise_anomalies(shapes, s, noise)
            + deep_trough(lat, lon, [d.trough_axis for d in days], [d.trough_depth for d in days],
                          [d.trough_lat for d in days])
            + northwest_flow_couplet(lat, lon, [d.northwest_amp for d in days])
            + cyclone_lows(lat, lon, [d.cyclones for d in days]))


def geostrophic_wind(height, lat, lon):
    """500 hPa geostrophic wind (m/s): :math:`u=-\\frac{g_0}{f}\\partial_y Z`, :math:`v=\\frac{g_0}{f}\\partial_x Z`.

    f = 2 Omega sin(lat); height in gpm, shape (..., nlat, nlon) (Holton,
    An Introduction to Dynamic Meteorology, eq. 3.2).
    """
    dz_dx, dz_dy = spherical_gradient(height, lat, lon)
    f = 2.0 * OMEGA * np.sin(np.radians(lat))[:, None]
    return -G0 / f * dz_dy, G0 / f * dz_dx


def relative_vorticity(u, v, lat, lon):
    """Relative vorticity on the sphere (s-1): :math:`\\partial_x v - \\partial_y u + u\\tan\\phi/a`."""
    dv_dx, _ = spherical_gradient(v, lat, lon)
    _, du_dy = spherical_gradient(u, lat, lon)
    return dv_dx - du_dy + u * np.tan(np.radians(lat))[:, None] / EARTH_RADIUS
