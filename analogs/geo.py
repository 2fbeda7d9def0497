"""Spherical geometry shared by every stage: great-circle distances and gradients.

All angles are in degrees at the interface, all lengths in metres or kilometres
as named. The Earth is a sphere of radius :data:`analogs.constants.EARTH_RADIUS`.

Longitudes are read by their circular spacing, not by array adjacency
(:func:`longitude_frame`): a grid that goes round the globe is periodic, and a
limited grid stored across the seam of [-180, 180) (a domain over the date line,
sorted by :func:`analogs.stages.sources.normalise_grid`) is differenced in a frame
where it is continuous. At a pole row the zonal derivative is undefined in
latitude/longitude components: on a periodic grid the pole row gets the gradient
of the plane through the adjacent latitude circle (its wavenumber-1 part); on a
limited grid the pole rows are left out (NaN) and the next row takes one-sided
differences.
"""

from __future__ import annotations

from dataclasses import dataclass
from dataclasses import field as dataclass_field

import numpy as np

from analogs.constants import EARTH_RADIUS

#: A latitude within this many degrees of +-90 is a pole row.
POLE_TOLERANCE_DEG = 1e-6
#: Longitude spacings (degrees) equal within this tolerance count as uniform.
_SPACING_TOLERANCE_DEG = 1e-4


def great_circle_km(lat1, lon1, lat2, lon2):
    """Great-circle distance in km between points given in degrees (broadcasting).

    Haversine formula on a sphere of radius ``EARTH_RADIUS`` (Sinnott 1984,
    Sky and Telescope 68, 159). Within 0.5 % of the WGS84 geodesic.
    """
    phi1, phi2 = np.radians(lat1), np.radians(lat2)
    dphi = phi2 - phi1
    dlam = np.radians(np.asarray(lon2) - np.asarray(lon1))
    h = np.sin(dphi / 2.0) ** 2 + np.cos(phi1) * np.cos(phi2) * np.sin(dlam / 2.0) ** 2
    return 2.0 * EARTH_RADIUS / 1000.0 * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def wrap_longitude(lon):
    """Longitudes in degrees east wrapped to [-180, 180)."""
    return (np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0


def pole_rows(lat) -> np.ndarray:
    """Boolean mask of the latitudes (degrees) that are a pole (+-90)."""
    return np.abs(np.abs(np.asarray(lat, dtype=float)) - 90.0) <= POLE_TOLERANCE_DEG


@dataclass(frozen=True, eq=False)
class LongitudeFrame:
    """A grid's longitudes put in an order where neighbours are neighbours on the globe.

    Attributes
    ----------
    order : indices of the grid's longitude columns in frame order
        (``field[..., order]`` is the field in the frame).
    lon : the frame's longitudes, degrees east, strictly ascending and continuous
        (they may pass 180: a domain from 150 E to 150 W is 150 .. 210).
    periodic : the grid goes round the globe with uniform spacing; differences
        then wrap from the last column to the first.
    """

    order: np.ndarray
    lon: np.ndarray
    periodic: bool

    @property
    def identity(self) -> bool:
        """True when the frame keeps the grid's own column order."""
        return bool(np.array_equal(self.order, np.arange(self.order.size)))

    @property
    def step(self) -> float:
        """Longitude spacing in degrees (periodic grids: 360 / n)."""
        if self.periodic:
            return 360.0 / self.lon.size
        return float(np.mean(np.diff(self.lon))) if self.lon.size > 1 else 1.0

    def to_frame(self, values, axis: int = -1):
        """``values`` with its longitude axis put in frame order."""
        values = np.asarray(values)
        return values if self.identity else np.take(values, self.order, axis=axis)

    def from_frame(self, values, axis: int = -1):
        """Inverse of :meth:`to_frame`: back to the grid's own column order."""
        values = np.asarray(values)
        if self.identity:
            return values
        inverse = np.empty_like(self.order)
        inverse[self.order] = np.arange(self.order.size)
        return np.take(values, inverse, axis=axis)

    def longitude(self, lon):
        """Longitudes (degrees) expressed in this frame: the value congruent modulo
        360 that lies nearest the frame's centre."""
        centre = 0.5 * (self.lon[0] + self.lon[-1])
        lon = np.asarray(lon, dtype=float)
        return lon + 360.0 * np.round((centre - lon) / 360.0)


def longitude_frame(lon, centre: float | None = None) -> LongitudeFrame:
    """The seam-continuous frame of a grid's longitudes (degrees east, any convention).

    - Uniformly spaced longitudes that go round the globe (``n * spacing = 360``) are
      periodic. The frame is the grid's own order unless ``centre`` is given; then it
      is rotated to run from the column nearest ``centre - 180`` eastward, so that a
      box around ``centre`` is contiguous in it.
    - Otherwise the frame starts after the widest gap between neighbouring longitudes
      on the circle (the domain's true western edge) and runs eastward, adding 360
      past the seam. A grid already continuous keeps its own order and values.
    """
    raw = np.asarray(lon, dtype=float)
    n = raw.size
    if n < 2:
        return LongitudeFrame(np.arange(n), raw.copy(), False)
    circ = raw % 360.0
    order = np.argsort(circ, kind="stable")
    ring = circ[order]
    gaps = np.diff(np.r_[ring, ring[0] + 360.0])   # gaps[k]: from ring[k] to the next
    periodic = n >= 3 and bool(np.all(np.abs(gaps - 360.0 / n) <= _SPACING_TOLERANCE_DEG))
    ascending = bool(np.all(np.diff(raw) > 0))
    if periodic:
        if centre is None and ascending:
            return LongitudeFrame(np.arange(n), raw.copy(), True)
        start_value = raw[0] if centre is None else float(centre) - 180.0
        first = int(np.argmin((ring - start_value) % 360.0))
    else:
        wrap_gap = (raw[0] - raw[-1]) % 360.0
        if ascending and raw[-1] - raw[0] < 360.0 and wrap_gap >= gaps.max() - 1e-9:
            return LongitudeFrame(np.arange(n), raw.copy(), False)
        first = int(np.argmax(gaps) + 1) % n
    order = np.roll(order, -first)
    ring = np.roll(ring, -first)
    frame_lon = ring[0] + np.r_[0.0, np.cumsum(np.diff(ring) % 360.0)]
    frame_lon = frame_lon - 360.0 * np.floor((frame_lon[0] + 180.0) / 360.0)
    return LongitudeFrame(order, frame_lon, periodic)


def spherical_gradient(field, lat, lon):
    """Gradient of ``field`` on a regular lat/lon grid, in field units per metre.

    Parameters
    ----------
    field : ndarray, shape (..., nlat, nlon)
    lat, lon : 1-D arrays of degrees; ``lat`` ascending, ``lon`` in any order (read
        by its circular spacing, :func:`longitude_frame`).

    Returns
    -------
    (d/dx, d/dy) : ndarrays of ``field``'s shape, where
    :math:`\\partial/\\partial x = \\frac{1}{a\\cos\\phi}\\partial/\\partial\\lambda` and
    :math:`\\partial/\\partial y = \\frac{1}{a}\\partial/\\partial\\phi`.
    Second-order centred differences inside, one-sided at the edges
    (``numpy.gradient``), as in MetPy's ``geospatial_gradient`` on a sphere; periodic
    in longitude on a grid that goes round the globe. Pole rows: see
    :func:`zonal_derivative`.
    """
    return zonal_derivative(field, lat, lon), meridional_derivative(field, lat, lon)


def zonal_derivative(field, lat, lon):
    """:math:`\\frac{1}{a\\cos\\phi}\\partial/\\partial\\lambda` of ``field`` (..., nlat, nlon),
    per metre: the x part of :func:`spherical_gradient` alone.

    Longitudes are differenced by their circular spacing (periodic round the globe,
    continuous across the seam of a date-line domain). On a pole row the derivative
    along a latitude circle is undefined: on a periodic grid it is the eastward
    component, along each meridian, of the gradient of the plane through the adjacent
    latitude circle (:func:`polar_cap_gradient`); on a limited grid it is NaN.
    """
    lat = np.asarray(lat, dtype=float)
    frame = longitude_frame(lon)
    values = frame.to_frame(np.asarray(field, dtype=float))
    if frame.periodic:
        step = np.radians(frame.step)
        d_dlam = (np.roll(values, -1, axis=-1) - np.roll(values, 1, axis=-1)) / (2.0 * step)
    else:
        d_dlam = _axis_derivative(values, frame.lon, -1)
    poles = pole_rows(lat)
    if not poles.any():
        return frame.from_frame(d_dlam / (EARTH_RADIUS * np.cos(np.radians(lat))[:, None]))
    cos_lat = np.where(poles, np.nan, np.cos(np.radians(lat)))
    out = d_dlam / (EARTH_RADIUS * cos_lat[:, None])
    for row, ring in pole_neighbour_rows(lat):
        out[..., row, :] = (polar_cap_gradient(values, lat, frame.lon, row, ring)[0]
                            if frame.periodic else np.nan)
    return frame.from_frame(out)


def meridional_derivative(field, lat, lon=None):
    """:math:`\\frac{1}{a}\\partial/\\partial\\phi` of ``field`` (..., nlat, nlon), per
    metre: the y part of :func:`spherical_gradient` alone.

    Pole rows: with ``lon`` of a periodic grid, the northward component along each
    meridian of the polar-cap gradient (:func:`polar_cap_gradient`); otherwise the
    pole rows are left out (NaN) and the adjacent row takes a one-sided difference.
    """
    lat = np.asarray(lat, dtype=float)
    values = np.asarray(field, dtype=float)
    poles = pole_rows(lat)
    if not poles.any():
        return _axis_derivative(values, lat, -2) / EARTH_RADIUS
    frame = None if lon is None else longitude_frame(lon)
    if frame is not None and frame.periodic:
        out = _axis_derivative(values, lat, -2) / EARTH_RADIUS
        framed = frame.to_frame(values)
        for row, ring in pole_neighbour_rows(lat):
            out[..., row, :] = frame.from_frame(
                polar_cap_gradient(framed, lat, frame.lon, row, ring)[1])
        return out
    out = np.full(values.shape, np.nan)
    keep = np.flatnonzero(~poles)
    if keep.size >= 2:
        out[..., keep, :] = _axis_derivative(values[..., keep, :], lat[keep],
                                             -2) / EARTH_RADIUS
    return out


def polar_cap_gradient(field, lat, lon, pole_row: int, ring_row: int):
    """Gradient at a pole from the latitude circle next to it, per metre.

    Near a pole a smooth field is a plane, :math:`F \\approx F_p + a\\,\\mathbf{G}
    \\cdot(\\mathbf{r} - \\mathbf{r}_p)`. On the circle at latitude :math:`\\phi_1`,
    :math:`F(\\lambda) - \\bar F = a\\cos\\phi_1 (G_x\\cos\\lambda + G_y\\sin\\lambda)`,
    so the wavenumber-1 Fourier coefficients of the circle give :math:`G_x, G_y`
    (exact for a field linear in the Cartesian coordinates). Along the meridian
    :math:`\\lambda` the pole's eastward and northward unit vectors are
    :math:`(-\\sin\\lambda, \\cos\\lambda)` and :math:`\\mp(\\cos\\lambda, \\sin\\lambda)`
    (north / south pole), hence

    .. math::

        \\partial_x F = -G_x\\sin\\lambda + G_y\\cos\\lambda, \\qquad
        \\partial_y F = \\mp(G_x\\cos\\lambda + G_y\\sin\\lambda).

    ``field`` (..., nlat, nlon) on uniformly spaced longitudes ``lon`` (degrees) that
    go round the globe. Returns (d/dx, d/dy) along the pole row, shape (..., nlon).

    Reference: the wavenumber-1 treatment of pole points in latitude/longitude models
    (from memory, e.g. the polar filtering and pole winds of finite-volume dynamical
    cores); the unit vectors from the spherical-coordinate basis (Holton & Hakim
    2013, appendix on spherical coordinates).
    """
    lam = np.radians(np.asarray(lon, dtype=float))
    ring = np.asarray(field, dtype=float)[..., ring_row, :]
    n = lam.size
    scale = EARTH_RADIUS * np.cos(np.radians(float(lat[ring_row])))
    gx = 2.0 / n * np.sum(ring * np.cos(lam), axis=-1) / scale
    gy = 2.0 / n * np.sum(ring * np.sin(lam), axis=-1) / scale
    gx, gy = gx[..., None], gy[..., None]
    sign = -1.0 if lat[pole_row] > 0 else 1.0
    return (-gx * np.sin(lam) + gy * np.cos(lam),
            sign * (gx * np.cos(lam) + gy * np.sin(lam)))


def pole_neighbour_rows(lat) -> list[tuple[int, int]]:
    """(pole row, adjacent row) index pairs of a grid's pole rows (``lat`` ascending)."""
    pairs = []
    for row in np.flatnonzero(pole_rows(lat)):
        ring = row + 1 if lat[row] < 0 else row - 1
        if 0 <= ring < lat.size and not pole_rows(lat[ring:ring + 1])[0]:
            pairs.append((int(row), int(ring)))
    return pairs


def _axis_derivative(field, degrees, axis):
    """``numpy.gradient`` along one axis of coordinate ``degrees``, per radian; with the
    scalar spacing of an evenly spaced axis (several times faster than numpy's
    uneven-spacing formula, same values). That spacing is the first step in degrees
    converted to radians: on a grid whose degrees and steps are exact (0.25, 1 degree)
    it is the same for any run of the axis, so a field cut to a window has, inside,
    the derivatives of the whole grid to the last bit."""
    field = np.asarray(field, dtype=float)
    step = np.diff(degrees)
    if step.size and np.allclose(step, step[0], rtol=1e-9, atol=0.0):
        return np.gradient(field, float(np.radians(step[0])), axis=axis)
    return np.gradient(field, np.radians(degrees), axis=axis)


def nearest_index(ascending, values) -> np.ndarray:
    """Index of the nearest point of the ascending coordinate ``ascending`` to each of
    ``values`` (a binary search: memory of the size of ``values``, not of both)."""
    ascending, values = np.asarray(ascending), np.asarray(values)
    at = np.clip(np.searchsorted(ascending, values), 0, ascending.size - 1)
    before = np.clip(at - 1, 0, ascending.size - 1)
    return np.where(np.abs(ascending[before] - values) < np.abs(ascending[at] - values),
                    before, at)


def initial_bearing_deg(lat1, lon1, lat2, lon2):
    """Initial great-circle bearing from point 1 to point 2, degrees in [0, 360).

    Clockwise from true north (forward azimuth on a sphere; Sinnott 1984):
    :math:`\\theta = \\operatorname{atan2}(\\sin\\Delta\\lambda\\cos\\phi_2,\\
    \\cos\\phi_1\\sin\\phi_2 - \\sin\\phi_1\\cos\\phi_2\\cos\\Delta\\lambda)`.
    Broadcasting; within about a degree of the WGS84 geodesic azimuth at
    distances up to ~1000 km in mid latitudes.
    """
    phi1, phi2 = np.radians(lat1), np.radians(lat2)
    dlam = np.radians(np.asarray(lon2) - np.asarray(lon1))
    y = np.sin(dlam) * np.cos(phi2)
    x = np.cos(phi1) * np.sin(phi2) - np.sin(phi1) * np.cos(phi2) * np.cos(dlam)
    return np.degrees(np.arctan2(y, x)) % 360.0


@dataclass(frozen=True, eq=False)
class MapLines:
    """The Earth's lines for the maps of one grid, cut to its extent: each a list of
    (n, 2) arrays of (lon, lat) in the grid's longitude frame.

    ``source`` names the data (e.g. "Natural Earth 50m"); ``withheld``, when not empty,
    says why no line is drawn although the data are there."""

    coastline: list = dataclass_field(default_factory=list)
    border: list = dataclass_field(default_factory=list)
    state: list = dataclass_field(default_factory=list)
    source: str = ""
    withheld: str = ""

    def __bool__(self) -> bool:
        return bool(self.coastline or self.border or self.state)


def clip_lines(lines, west, east, south, north) -> list[np.ndarray]:
    """The parts of polylines ((n, 2) arrays of lon, lat in degrees, longitudes in
    [-180, 180]) inside the box, cut exactly at its edges.

    The box's longitudes may lie in any frame (0 .. 360, or continuous across the date
    line as 150 .. 210): each line is also tried shifted by the multiples of 360 that
    bring it into the box, and the pieces come back in the box's frame. Each segment is
    clipped by the Liang-Barsky parametric test (Liang and Barsky 1984, ACM Transactions
    on Graphics 3, 1); consecutive clipped segments that meet at an original vertex are
    joined back into one polyline.
    """
    first = int(np.ceil((west - 180.0) / 360.0))
    last = int(np.floor((east + 180.0) / 360.0))
    pieces = []
    for line in lines:
        line = np.asarray(line, dtype=float)
        if len(line) < 2:
            continue
        low, high = line.min(axis=0), line.max(axis=0)
        if high[1] < south or low[1] > north:
            continue
        for shift in range(first, last + 1):
            dx = 360.0 * shift
            if high[0] + dx < west or low[0] + dx > east:
                continue
            pieces.extend(_clip_polyline(line + (dx, 0.0), west, east, south, north))
    return pieces


def _clip_polyline(points, west, east, south, north) -> list[np.ndarray]:
    start, step = points[:-1], np.diff(points, axis=0)
    # For each of the four edges: p * t <= q keeps the point start + t * step inside.
    p = np.stack([-step[:, 0], step[:, 0], -step[:, 1], step[:, 1]], axis=1)
    q = np.stack([start[:, 0] - west, east - start[:, 0],
                  start[:, 1] - south, north - start[:, 1]], axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = q / p
    enter = np.max(np.where(p < 0, ratio, 0.0), axis=1, initial=0.0)
    leave = np.min(np.where(p > 0, ratio, 1.0), axis=1, initial=1.0)
    kept = (enter <= leave) & ~np.any((p == 0) & (q < 0), axis=1)
    index = np.flatnonzero(kept)
    if index.size == 0:
        return []
    enter, leave = enter[index], leave[index]
    begin = start[index] + enter[:, None] * step[index]
    end = start[index] + leave[:, None] * step[index]
    # A new piece starts where the previous kept segment left the box, is not the
    # previous segment, or this one enters the box part-way.
    new_piece = np.r_[True, (leave[:-1] < 1.0) | (np.diff(index) != 1) | (enter[1:] > 0.0)]
    starts = np.flatnonzero(new_piece)
    stops = np.r_[starts[1:], index.size]
    return [np.vstack([begin[a], end[a:b]]) for a, b in zip(starts, stops)]
