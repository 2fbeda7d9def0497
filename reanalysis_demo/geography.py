"""Geography of the synthetic continent: grid, plateau, land and sea.

The scenario is our own: a mid-latitude continent with a high western plateau
(centred near 38 N, 112 W, about 30-48 N and 122-102 W), plains east of it, a
warm sea to the south (south of about 29 N between 100 W and 80 W) and open
ocean east of about 75 W and west of about 124 W. Longitudes are negative west.
"""

from __future__ import annotations

import numpy as np

from analogs.constants import EARTH_RADIUS
from analogs.geo import great_circle_km

#: (south, north, west, east) in degrees of the default grid.
DEFAULT_DOMAIN = (20.0, 55.0, -130.0, -60.0)
#: (south, north, west, east): the plains box east of the plateau where outlooks are issued.
CENTRAL_REGION = (30.0, 45.0, -105.0, -85.0)

#: Plateau centre (lat, lon) and semi-axes (deg lat, deg lon).
PLATEAU_CENTRE = (38.0, -112.0)
PLATEAU_SEMI_AXES = (9.0, 10.0)
#: Southern warm sea: north coast latitude and its west / east longitudes.
SOUTHERN_SEA_COAST_LAT = 29.0
SOUTHERN_SEA_LONS = (-100.0, -80.0)
#: Coast longitudes of the western and eastern oceans.
WEST_COAST_LON = -124.0
EAST_COAST_LON = -75.0


def logistic(x):
    """Logistic function 1 / (1 + exp(-x)), overflow-safe."""
    return 0.5 * (1.0 + np.tanh(0.5 * np.asarray(x, dtype=float)))


def make_grid(domain=DEFAULT_DOMAIN, grid=1.0):
    """Ascending latitude and longitude vectors (degrees) spaced ``grid`` degrees.

    The south-west corner is a grid point; the north and east edges are
    included when they fall on the grid (within a thousandth of a spacing).
    """
    south, north, west, east = domain
    n_lat = int(np.floor((north - south) / grid + 1e-3)) + 1
    n_lon = int(np.floor((east - west) / grid + 1e-3)) + 1
    lat = south + grid * np.arange(n_lat)
    lon = west + grid * np.arange(n_lon)
    return lat, lon


def plateau_fraction(lat, lon):
    """Plateau elevation fraction in [0, 1] (1 on the high plateau, 0.5 on its edge).

    A super-Gaussian ellipse :math:`\\exp(-\\ln 2\\, r^4)` with
    :math:`r^2 = ((\\phi-\\phi_0)/a)^2 + ((\\lambda-\\lambda_0)/b)^2`: a flat top
    and steep edges, like a real high plateau. Broadcasts over its arguments,
    so it can be evaluated at back-trajectory departure points.
    """
    lat0, lon0 = PLATEAU_CENTRE
    a, b = PLATEAU_SEMI_AXES
    r2 = ((np.asarray(lat) - lat0) / a) ** 2 + ((np.asarray(lon) - lon0) / b) ** 2
    return np.exp(-np.log(2.0) * r2 ** 2)


def sea_fraction(lat, lon):
    """Fraction of water in [0, 1]: western and eastern oceans and the southern sea.

    Coasts are logistic ramps about half a degree wide, so fields built from
    them are smooth on any grid.
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    west_ocean = logistic((WEST_COAST_LON - lon) / 0.5)
    east_ocean = logistic((lon - EAST_COAST_LON) / 0.5)
    sea_w, sea_e = SOUTHERN_SEA_LONS
    southern_sea = (logistic((SOUTHERN_SEA_COAST_LAT - lat) / 0.5)
                    * logistic((lon - sea_w) / 0.5) * logistic((sea_e - lon) / 0.5))
    return np.clip(west_ocean + east_ocean + southern_sea, 0.0, 1.0)


def land_mask(lat2d, lon2d):
    """Boolean land mask (sea fraction below one half): where reports can be made."""
    return sea_fraction(lat2d, lon2d) < 0.5


def distance_to_box_km(lat, lon, box):
    """Great-circle distance (km) from points to a lat/lon box, 0 inside it.

    The nearest point of the box is taken as the point with latitude and
    longitude clamped into the box (exact on the box's meridian edges and
    within a few per cent on its parallel edges at these latitudes).
    """
    south, north, west, east = box
    near_lat = np.clip(lat, south, north)
    near_lon = np.clip(lon, west, east)
    return great_circle_km(lat, lon, near_lat, near_lon)


def cell_area_km2(lat, grid):
    """Area (km2) of a ``grid`` x ``grid`` degree cell centred at ``lat`` on the sphere."""
    d = np.radians(grid)
    return (EARTH_RADIUS / 1000.0) ** 2 * d * d * np.cos(np.radians(lat))
