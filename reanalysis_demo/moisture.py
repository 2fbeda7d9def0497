"""850 hPa moisture, one small function per process.

The processes are built as an 850 hPa dewpoint (deg C) and converted to
specific humidity at the end (:func:`specific_humidity_from_dewpoint`), which
keeps q positive and below saturation of a 22-23 deg C dewpoint (about
0.02 kg/kg). Shapes as in :mod:`reanalysis_demo.heights`.
"""

from __future__ import annotations

import numpy as np

from analogs.constants import BOLTON_A_HPA, BOLTON_B, BOLTON_C_DEGC, EPSILON
from analogs.geo import great_circle_km

from .geography import logistic, plateau_fraction
from .heights import pattern_shapes

#: Pressure of the moisture level, hPa.
MOISTURE_LEVEL_HPA = 850.0
#: Upper bound the dewpoint approaches smoothly, deg C.
DEWPOINT_CEILING_C = 22.5


def seasonal_moisture(lat, lon, s):
    """Background dewpoint: rich over the southern sea, decreasing poleward, with a seasonal cycle.

    About 17 C at 22 N in January falling 1.05 C per degree of latitude (the
    15.6 C line near 23 N), and 20.5 C in July falling 0.45 C per degree (the
    line near 33 N, farther north beneath north-west flow). The plume is
    richest over the sea's longitudes and the plains, 4 C drier toward the
    west coast.
    """
    s = np.asarray(s)[:, None, None]
    sea_value = 17.0 + 3.5 * s
    poleward_drop = (1.05 - 0.6 * s) * np.maximum(lat - 22.0, 0.0)
    zonal = 1.5 * np.exp(-((lon + 90.0) / 15.0) ** 2) - 4.0 * logistic((-108.0 - lon) / 5.0)
    return sea_value - poleward_drop + zonal


def plateau_dryness(lat, lon):
    """Dry plateau: -12 C times the plateau fraction (the 850 hPa surface lies in or under dry high terrain)."""
    return -12.0 * plateau_fraction(lat, lon)[None]


def moisture_return(lat, lon, northwest_amp, s):
    """Poleward moisture tongue beneath the western ridge during north-west-flow episodes.

    Up to +6 C (times the episode amplitude over 110 gpm and the summer
    weight) along 97 W from the sea to about 46 N.
    """
    scale = (np.asarray(northwest_amp) / 110.0 * (0.4 + 0.6 * np.asarray(s)))[:, None, None]
    tongue = np.exp(-((lon + 97.0) / 7.0) ** 2) * logistic((46.0 - lat) / 2.0) * logistic((lat - 26.0) / 2.0)
    return 6.0 * scale * tongue


def trough_moisture_surge(lat, lon, axis, depth):
    """South-westerly moisture surge ahead of a deep trough: up to +8 C, 5-20 degrees east of the axis, south of ~44 N."""
    axis = np.nan_to_num(np.asarray(axis))[:, None, None]
    scale = (np.asarray(depth) / 180.0)[:, None, None]
    ahead = np.exp(-((lon - axis - 12.0) / 8.0) ** 2) * logistic((44.0 - lat) / 2.0)
    return 8.0 * scale * ahead


def scouring_kick(lat, lon, axis, depth, s):
    """Drying (C) behind a trough axis on one day, reaching 27 N in the cool season, 35 N in summer.

    Strength 14 C in the cool season and 6 C in summer, times depth / 180 gpm.
    Feeds the recursion of :func:`advance_scouring`.
    """
    if not depth > 0.0:
        return np.zeros(lat.shape)
    behind = logistic((axis - 2.0 - lon) / 3.0)
    south_edge = 27.0 + 8.0 * s
    return (14.0 - 8.0 * s) * depth / 180.0 * behind * logistic((lat - south_edge) / 2.5)


def advance_scouring(previous, kick, s):
    """Scouring memory: :math:`D_t = \\max(r D_{t-1}, k_t)`, recovery time 4 days (cool) to 1.5 days (summer).

    Dry air behind a cold front stays until the return flow brings moisture
    back, which is slower in the cool season (common practice, no source).
    """
    recovery = np.exp(-1.0 / (4.0 - 2.5 * s))
    return np.maximum(recovery * previous, kick)


def cyclone_moisture(lat, lon, cyclones_by_day):
    """Moist envelope of each cyclone, very moist in its eastern semicircle, drier in its western one.

    :math:`\\Delta T_d = (D/80)\\,\\exp(-r^2/(2(1.8R)^2))\\,(3 + 6 e)`, where
    :math:`e = \\Delta x/(r + R/2)` is the eastward component of the unit
    vector from the centre (east +1, west -1): +9 C east, -3 C west.
    """
    out = np.zeros((len(cyclones_by_day),) + lat.shape)
    for i, cyclones in enumerate(cyclones_by_day):
        for _, c_lat, c_lon, depth, radius in cyclones:
            r = great_circle_km(lat, lon, c_lat, c_lon)
            east_km = great_circle_km(c_lat, c_lon, c_lat, lon) * np.sign(lon - c_lon)
            east = east_km / (r + 0.5 * radius)
            envelope = np.exp(-0.5 * (r / (1.8 * radius)) ** 2)
            out[i] += depth / 80.0 * envelope * (3.0 + 6.0 * east)
    return out


#: Large-scale moisture patterns (lat, lon, radius deg, sign).
MOISTURE_PATTERNS = (
    ((36.0, -95.0, 10.0, 1.0),),
    ((45.0, -85.0, 9.0, 1.0), (30.0, -110.0, 8.0, -1.0)),
)


def moisture_shapes(lat, lon):
    """The fixed smooth moisture patterns (npattern, nlat, nlon)."""
    return pattern_shapes(lat, lon, MOISTURE_PATTERNS)


def moisture_red_noise(shapes, coefficients):
    """Red-noise dewpoint anomalies: 2 C standard deviation per pattern."""
    return 2.0 * np.tensordot(coefficients, shapes, axes=(1, 0))


def bounded_dewpoint(dewpoint_c):
    """Smooth ceiling at 22.5 C: :math:`T_c - \\ln(1 + e^{T_c - T_d})`, floor -40 C."""
    return np.maximum(DEWPOINT_CEILING_C - np.logaddexp(0.0, DEWPOINT_CEILING_C - dewpoint_c), -40.0)


def specific_humidity_from_dewpoint(dewpoint_c, pressure_hpa=MOISTURE_LEVEL_HPA):
    """Specific humidity (kg/kg) from dewpoint (deg C) and pressure (hPa).

    :math:`e = 6.112\\exp(17.67 T_d/(T_d+243.5))` (Bolton 1980),
    :math:`q = \\epsilon e/(p - (1-\\epsilon) e)`.
    """
    e = BOLTON_A_HPA * np.exp(BOLTON_B * dewpoint_c / (dewpoint_c + BOLTON_C_DEGC))
    return EPSILON * e / (pressure_hpa - (1.0 - EPSILON) * e)


def dewpoint_from_specific_humidity(q, pressure_hpa=MOISTURE_LEVEL_HPA):
    """Dewpoint (deg C) from specific humidity (kg/kg) and pressure (hPa).

    :math:`e = q p/(\\epsilon + (1-\\epsilon) q)`, then Bolton (1980) inverted:
    :math:`T_d = 243.5\\,\\ln(e/6.112)/(17.67 - \\ln(e/6.112))`.
    """
    q = np.asarray(q, dtype=float)
    e = q * pressure_hpa / (EPSILON + (1.0 - EPSILON) * q)
    log_ratio = np.log(np.maximum(e, 1e-10) / BOLTON_A_HPA)
    return BOLTON_C_DEGC * log_ratio / (BOLTON_B - log_ratio)
