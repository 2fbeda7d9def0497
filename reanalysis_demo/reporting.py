"""Who records a storm: invented towns and roads, and reporting that grows over the decades.

A storm is only a report once somebody records it. The chance that one report is recorded
(the reporting efficiency) is

.. math:: e_k(x, y) = t_k(y)\\,[f_k(y) + (1 - f_k(y))\\,(1 - \\exp(-D(x)))]

with ``D`` the people density of our own invented towns and roads at the point ``x``
(:func:`people_density`), ``f_k`` the recording floor of kind ``k`` far from anyone and
``t_k`` the growth of reporting of kind ``k`` with the year ``y`` (:func:`reporting_trend`,
a logistic curve per kind: tornado reporting was already mature when the demo starts and
grows slowly, hail and wind reporting grow fast through the 2000s).

The documented change part-way through (:data:`REPORTING_CHANGE_YEAR`): from 1 January
2006, hail and wind reports from trained spotters away from towns are accepted, so the
recording floor of hail and wind rises from 0.10 to 0.25; tornado reporting (damage
surveys) keeps its floor of 0.35. The towns, roads and these numbers are invented.
"""

from __future__ import annotations

import numpy as np

from analogs.geo import great_circle_km

from .geography import logistic

#: Invented towns: (name, lat, lon, population in thousands). None of them is a real place.
TOWNS = (
    ("Harrow Ford", 37.0, -97.5, 180), ("Wrenfield", 41.5, -95.0, 250),
    ("Osterby", 33.5, -99.0, 120), ("Quillon", 39.5, -101.5, 60),
    ("Tamsin Cross", 35.0, -92.0, 300), ("Velmar", 43.0, -89.5, 400),
    ("Perrow", 31.5, -94.0, 150), ("Linden Hollow", 38.5, -88.0, 90),
    ("Ashgrove", 44.0, -100.0, 40), ("Durrant", 36.0, -103.0, 50),
    ("Calder Bay", 40.0, -77.5, 900), ("Merriton", 35.5, -80.0, 500),
    ("Northam Vale", 46.0, -82.0, 350), ("Eastwick Harbour", 42.5, -76.0, 700),
    ("Portsea Landing", 30.5, -86.0, 200), ("Silverpine", 47.0, -121.0, 300),
    ("Cobalt Springs", 36.0, -119.5, 400), ("Highmesa", 39.0, -110.0, 30),
    ("Juniper Gap", 33.0, -115.0, 80), ("Frostmere", 51.0, -100.0, 60),
    ("Hollin", 50.0, -88.0, 80), ("Ridgewater", 49.0, -112.0, 70),
    ("Tessaly Flats", 25.0, -105.0, 150), ("Orrin Wells", 27.0, -110.0, 60),
    ("Cinder Key", 25.5, -77.5, 50),
)
#: Invented roads: pairs of town names joined by a straight (in lat/lon) highway.
ROADS = (
    ("Harrow Ford", "Wrenfield"), ("Harrow Ford", "Osterby"), ("Harrow Ford", "Tamsin Cross"),
    ("Harrow Ford", "Quillon"), ("Quillon", "Durrant"), ("Wrenfield", "Velmar"),
    ("Wrenfield", "Ashgrove"), ("Tamsin Cross", "Perrow"), ("Tamsin Cross", "Linden Hollow"),
    ("Linden Hollow", "Velmar"), ("Linden Hollow", "Calder Bay"), ("Tamsin Cross", "Merriton"),
    ("Perrow", "Portsea Landing"), ("Velmar", "Northam Vale"), ("Northam Vale", "Eastwick Harbour"),
    ("Calder Bay", "Eastwick Harbour"), ("Calder Bay", "Merriton"), ("Osterby", "Perrow"),
    ("Durrant", "Highmesa"), ("Highmesa", "Cobalt Springs"), ("Cobalt Springs", "Silverpine"),
    ("Juniper Gap", "Cobalt Springs"), ("Juniper Gap", "Durrant"), ("Ridgewater", "Silverpine"),
    ("Ridgewater", "Ashgrove"), ("Ashgrove", "Frostmere"), ("Hollin", "Velmar"),
    ("Tessaly Flats", "Osterby"), ("Tessaly Flats", "Orrin Wells"), ("Merriton", "Cinder Key"),
)
#: Radius (km) of a town of 100 thousand people; it grows as the square root of the population.
TOWN_RADIUS_KM = 15.0
#: Half-width (km) of a road's corridor of people, and its density on the road.
ROAD_HALF_WIDTH_KM = 6.0
ROAD_DENSITY = 0.8
#: Year from which hail and wind reports from spotters away from towns are accepted.
REPORTING_CHANGE_YEAR = 2006
#: Recording floor far from anyone, per kind: (before, from REPORTING_CHANGE_YEAR).
RECORDING_FLOOR = {"tornado": (0.25, 0.25), "hail": (0.15, 0.35), "wind": (0.15, 0.35)}
#: Growth of reporting per kind: (year of half maturity, e-folding width in years).
REPORTING_GROWTH = {"tornado": (1990.0, 10.0), "hail": (2005.0, 8.0), "wind": (2008.0, 6.0)}
#: Reports per storm: 1 + Poisson(REPORTS_PER_STORM_EXTRA); scatter (km) around the storm's start.
REPORTS_PER_STORM_EXTRA = 2.0
REPORT_SCATTER_KM = 10.0


def town(name):
    """(lat, lon) of an invented town by name."""
    for town_name, lat, lon, _ in TOWNS:
        if town_name == name:
            return lat, lon
    raise KeyError(name)


def _distance_to_segment_km(lat, lon, a, b):
    """Distance (km) from points to the segment a-b on a local equirectangular plane (fine at
    these road lengths for a density of people; not a geodesic)."""
    km_per_deg = 111.195
    ref = np.radians(0.5 * (a[0] + b[0]))
    ax, ay = a[1] * np.cos(ref) * km_per_deg, a[0] * km_per_deg
    bx, by = b[1] * np.cos(ref) * km_per_deg, b[0] * km_per_deg
    px, py = lon * np.cos(ref) * km_per_deg, lat * km_per_deg
    dx, dy = bx - ax, by - ay
    t = np.clip(((px - ax) * dx + (py - ay) * dy) / (dx * dx + dy * dy), 0.0, 1.0)
    return np.hypot(px - ax - t * dx, py - ay - t * dy)


def people_density(lat, lon):
    """Dimensionless density of people (towns plus road corridors) at points (degrees).

    A town adds ``P/100 exp(-d^2 / 2r^2)`` with P its population in thousands and
    r = 15 km sqrt(P/100); a road adds 0.8 exp(-d^2 / 2 (6 km)^2).
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    density = np.zeros(np.broadcast(lat, lon).shape)
    for _, t_lat, t_lon, population in TOWNS:
        radius = TOWN_RADIUS_KM * np.sqrt(population / 100.0)
        d = great_circle_km(lat, lon, t_lat, t_lon)
        density += population / 100.0 * np.exp(-0.5 * (d / radius) ** 2)
    for first, second in ROADS:
        d = _distance_to_segment_km(lat, lon, town(first), town(second))
        density += ROAD_DENSITY * np.exp(-0.5 * (d / ROAD_HALF_WIDTH_KM) ** 2)
    return density


def access(lat, lon):
    """Share of storms near the points that somebody sees: 1 - exp(-density), 0-1."""
    return 1.0 - np.exp(-people_density(lat, lon))


def reporting_trend(kind, year):
    """Growth of reporting of ``kind`` with the year: logistic((year - mid) / width), 0-1."""
    mid, width = REPORTING_GROWTH[kind]
    return float(logistic((year - mid) / width))


def recording_floor(kind, year):
    """Recording floor of ``kind`` far from towns and roads in ``year`` (the 2006 change)."""
    before, after = RECORDING_FLOOR[kind]
    return after if year >= REPORTING_CHANGE_YEAR else before


def efficiency(kind, year, point_access):
    """Chance that one report of ``kind`` in ``year`` is recorded, given the access there."""
    floor = recording_floor(kind, year)
    return reporting_trend(kind, year) * (floor + (1.0 - floor) * np.asarray(point_access))


def storm_recorded_chance(report_efficiency):
    """Chance that a storm gives at least one recorded report: 1 - (1 - e) exp(-m e).

    A storm makes 1 + Poisson(m) reports, each recorded independently with chance e, so
    none is recorded with chance (1 - e) E[(1 - e)^N] = (1 - e) exp(-m e) (probability
    generating function of the Poisson law).
    """
    e = np.asarray(report_efficiency)
    return 1.0 - (1.0 - e) * np.exp(-REPORTS_PER_STORM_EXTRA * e)
