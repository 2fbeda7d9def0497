r"""Weather regimes of archive days: explainable rules, plus learned complements.

- :class:`RegimeRules` holds every threshold of the rules, with units; defaults,
  keyword overrides or a TOML file.
- :class:`RuleClassifier` maps the diagnostics of
  :func:`analogs.stages.diagnostics.compute_diagnostics` to ``northwest_flow``,
  ``tropical``, ``strong_trough`` or ``other``, with a confidence and a reason that
  quotes the deciding values.
- :class:`KMeansRegimes` (unsupervised, on the PCs, with a minimum-persistence
  filter) and :class:`SupervisedRegimes` (logistic regression on the PCs trained
  from a table of labelled days) learn with scikit-learn, and save and predict from
  plain arrays (``to_dataset`` / ``from_dataset``), never from pickles.
- :func:`tag_days` tags every day of an archive: the table ``analogs tag`` writes;
  :func:`cyclone_structure` adds the shape, moisture and warm-core measures of the
  closed low the tropical rule needs; :func:`tag_metadata` is what a tag file says of
  itself (units, diagnostic region).
- :func:`default_diagnostic_box`: with no region given, regimes are diagnosed over a
  synoptic-scale box at the centre of the domain (ridge upstream, trough downstream of
  it); :func:`domain_extent` reads a domain's longitudes across the date line.

Physical basis of the rules: north-west flow has a ridge upstream over the western high
terrain and flow aloft from the west-north-west to north-west over the region, with
low-level moisture returning beneath it (Johns 1982, Mon. Wea. Rev., from memory); a
tropical regime has a compact, deep, nearly round closed 500 hPa low at low latitude in
the warm season, wrapped in very moist air, warm-core-like (Hart 2003, Mon. Wea. Rev.,
from memory, for the warm core; cold-core cut-off lows of the subtropical cold season,
Nieto et al. 2005, J. Climate, from memory, must not pass); a strong trough is an
amplified trough with a strong height gradient and cyclonic vorticity advection over
the region (common practice, no source).
"""

from __future__ import annotations

import calendar
import dataclasses
import functools
import math
import numbers
import warnings
from dataclasses import dataclass, field, fields
from os import PathLike
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs import __version__
from analogs._validation import check_int
# Machine labels of the regimes (DESIGN.md), in order of precedence: the --regime table entry.
from analogs.parameters import REGIME_LABELS
from analogs.constants import EARTH_RADIUS, ZERO_CELSIUS_K
from analogs.geo import great_circle_km, initial_bearing_deg, wrap_longitude
from analogs.errors import AnalogsInputError, NotFittedError

# xarray and the diagnostics (scipy) are imported by the functions that compute: a query
# of a store reads only the labels and the units of its stored tags.
if TYPE_CHECKING:
    import xarray as xr

__all__ = [
    "REGIME_LABELS",
    "RegimeRules",
    "RuleClassifier",
    "KMeansRegimes",
    "SupervisedRegimes",
    "STRUCTURE_UNITS",
    "clip_to_domain",
    "cyclone_structure",
    "default_diagnostic_box",
    "describe_box",
    "domain_extent",
    "persistence_filter",
    "read_labelled_days",
    "tag_days",
    "tag_metadata",
]


def _rule(default, units: str, doc: str):
    return field(default=default, metadata={"units": units, "doc": doc})


@dataclass(frozen=True)
class RegimeRules:
    """Thresholds of the regime rules, each with its units.

    Build with defaults (``RegimeRules()``), keyword overrides
    (``RegimeRules.load(nw_min_speed_ms=10)``) or a TOML file
    (``RegimeRules.load("rules.toml")``, keys at the top level or under a
    ``[regimes]`` table). Unknown keys raise :class:`AnalogsInputError` naming them.
    ``RegimeRules.describe()`` lists every field with units and meaning.

    Confidence (see :meth:`RuleClassifier.predict`) measures how far each deciding
    diagnostic is past its threshold in units of its *span*: ``direction_span_deg``
    for the flow direction, ``confidence_span`` times the threshold for the others.
    """

    # tropical: a warm-season, compact, deep, nearly symmetric closed low at low
    # latitude, wrapped in very moist air that is moistest at its core (warm-core-like)
    tropical_max_lat: float = _rule(
        40.0, "degree_north", "closed-low centre at most this far from the equator "
        "(|latitude|); remnants reach 35-40 N over land in late summer")
    tropical_min_depth_gpm: float = _rule(
        18.0, "gpm", "ring-mean height minus centre height of the closed low, at least")
    tropical_max_radius_km: float = _rule(
        600.0, "km", "radius where the height recovers half the depth, at most")
    tropical_max_asymmetry: float = _rule(
        0.5, "1", "wavenumber-2 (elongation) amplitude of the height on the 500-800 km "
        "ring divided by the depth, at most (nearly symmetric)")
    tropical_season_start_month: float = _rule(
        5.0, "month", "first month of the warm season in the northern hemisphere "
        "(shifted by six months in the southern)")
    tropical_season_end_month: float = _rule(
        11.0, "month", "last month of the warm season in the northern hemisphere "
        "(shifted by six months in the southern)")
    tropical_min_td850_c: float = _rule(
        14.0, "degC", "850 hPa dewpoint (from q850) within 400 km of the centre, at least")
    tropical_min_td2m_c: float = _rule(
        21.0, "degC", "2 m dewpoint within 400 km of the centre, at least (70 F)")
    tropical_min_pwat: float = _rule(
        45.0, "kg m-2", "precipitable water within 400 km of the centre, at least")
    tropical_min_core_td_excess_k: float = _rule(
        0.0, "K", "one level: dewpoint within 400 km minus on the 500-800 km ring, at "
        "least (a moist core, not the cold, drier core of a cut-off low)")
    tropical_min_core_pwat_excess: float = _rule(
        0.0, "kg m-2", "one level: precipitable water within 400 km minus on the "
        "500-800 km ring, at least")
    tropical_min_thermal_wind_gpm: float = _rule(
        0.0, "gpm", "two levels: Hart's (2003) -V_T between the lower level and 500 hPa, "
        "at least (> 0: warm core)")
    tropical_without_moisture: float = _rule(
        0.0, "1", "height-only archives (no moisture around the centre): 0 never calls a "
        "closed low tropical (a cold-core upper low looks the same at 500 hPa); 1 allows "
        "it under the stricter *_without_moisture rules below")
    tropical_depth_without_moisture_gpm: float = _rule(
        60.0, "gpm", "height-only archives: depth needed to call a closed low tropical")
    tropical_max_radius_without_moisture_km: float = _rule(
        400.0, "km", "height-only archives: radius of half-depth, at most")
    tropical_max_asymmetry_without_moisture: float = _rule(
        0.35, "1", "height-only archives: ring elongation over depth, at most")
    tropical_max_lat_without_moisture: float = _rule(
        30.0, "degree_north", "height-only archives: |latitude| of the centre, at most")
    # strong trough: amplified trough, strong gradient, cyclonic vorticity advection
    trough_min_amplitude_gpm: float = _rule(
        50.0, "gpm", "trough depth below the zonal mean over/downstream, at least")
    trough_min_height_gradient: float = _rule(
        100.0, "gpm (1000 km)-1", "region-mean height gradient, at least")
    trough_min_vorticity_advection: float = _rule(
        3.0e-10, "s-2", "region mean of the cyclonic part of the geostrophic vorticity "
        "advection (cyclonic_advection), at least")
    trough_min_direction_deg: float = _rule(
        180.0, "degree", "area-mean 500 hPa flow (ahead of the trough) from this direction or more")
    trough_max_direction_deg: float = _rule(
        275.0, "degree", "area-mean 500 hPa flow (ahead of the trough) from this direction or less")
    # north-west flow: ridge upstream, flow from the north-west, moisture beneath
    nw_min_direction_deg: float = _rule(
        295.0, "degree", "area-mean 500 hPa flow from this direction or more")
    nw_max_direction_deg: float = _rule(
        350.0, "degree", "area-mean 500 hPa flow from this direction or less")
    nw_min_speed_ms: float = _rule(
        8.0, "m s-1", "area-mean 500 hPa geostrophic wind speed, at least")
    nw_min_ridge_gpm: float = _rule(
        100.0, "gpm", "ridge amplitude upstream (west) of the region, at least")
    nw_min_trough_gpm: float = _rule(
        80.0, "gpm", "trough amplitude over/downstream (east) of the region, at least")
    nw_min_moist_line_offset_deg: float = _rule(
        -3.0, "degree",
        "moist line (rich moisture at the field's own level: the 60 F line for a 2 m "
        "dewpoint) at least this far north of the region's south edge (ignored, and "
        "said so, when moisture is missing)")
    # confidence
    direction_span_deg: float = _rule(
        20.0, "degree", "direction margin giving full confidence")
    confidence_span: float = _rule(
        0.5, "1", "relative margin past a threshold giving full confidence")

    def __post_init__(self):
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, numbers.Real) \
                    or not np.isfinite(value):
                raise AnalogsInputError(
                    f"The {f.name!r} regime rule must be a finite number in "
                    f"{f.metadata['units']}. Got {value!r} instead.")
        for prefix in ("nw", "trough"):
            low = getattr(self, f"{prefix}_min_direction_deg")
            high = getattr(self, f"{prefix}_max_direction_deg")
            if not low < high:
                raise AnalogsInputError(
                    f"The regime rules need {prefix}_min_direction_deg < "
                    f"{prefix}_max_direction_deg. Got {low} and {high}.")
        if self.tropical_without_moisture not in (0.0, 1.0):
            raise AnalogsInputError(
                "The 'tropical_without_moisture' regime rule must be 0 (off) or 1 (on). "
                f"Got {self.tropical_without_moisture!r} instead.")
        for name in ("tropical_season_start_month", "tropical_season_end_month"):
            month = getattr(self, name)
            if month != int(month) or not 1 <= month <= 12:
                raise AnalogsInputError(
                    f"The {name!r} regime rule must be a month number 1-12. Got {month!r} "
                    "instead.")
        if self.direction_span_deg <= 0 or self.confidence_span <= 0:
            raise AnalogsInputError(
                "The regime rules need direction_span_deg > 0 and confidence_span > 0.")

    @classmethod
    def load(cls, path: str | PathLike | None = None, **overrides) -> "RegimeRules":
        """Defaults, updated from a TOML file, then from keyword overrides."""
        values: dict = {}
        source = "keyword arguments"
        if path is not None:
            import tomllib  # imported here: a query reads the tags' units, never a rules file
            path = Path(path)
            try:
                with open(path, "rb") as handle:
                    data = tomllib.load(handle)
            except FileNotFoundError:
                raise AnalogsInputError(f"regime rules file {path} does not exist") from None
            except tomllib.TOMLDecodeError as exc:
                raise AnalogsInputError(f"regime rules file {path} is not valid TOML: {exc}") \
                    from None
            values.update(data.get("regimes", data))
            source = f"regime rules file {path}"
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise AnalogsInputError(
                f"{source}: unknown key(s) {', '.join(unknown)}; the known keys are "
                f"{', '.join(sorted(known))}")
        unknown = sorted(set(overrides) - known)
        if unknown:
            raise AnalogsInputError(
                f"unknown regime rule(s) {', '.join(unknown)}; "
                "see RegimeRules.describe() for the known ones")
        values.update(overrides)
        return cls(**values)

    @classmethod
    def describe(cls) -> pd.DataFrame:
        """Every rule with its default, units and meaning."""
        return pd.DataFrame(
            [(f.name, f.default, f.metadata["units"], f.metadata["doc"]) for f in fields(cls)],
            columns=["rule", "default", "units", "meaning"]).set_index("rule")

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


def _margin(value, threshold, span):
    """(value - threshold) / span clipped to [-1, 1]; NaN values count as -1."""
    span = np.maximum(np.asarray(span, float), 1e-30)
    with np.errstate(invalid="ignore"):
        m = (np.asarray(value, float) - threshold) / span
    return np.clip(np.nan_to_num(m, nan=-1.0), -1.0, 1.0)


def _column(frame: pd.DataFrame, name: str) -> np.ndarray:
    if name not in frame:
        return np.full(len(frame), np.nan)
    return np.asarray(frame[name], dtype=float)


# ------------------------------------------------------------ cyclone structure

#: Units of the columns of :func:`cyclone_structure`.
STRUCTURE_UNITS = {
    "tc_asymmetry": "1",
    "tc_td850_c": "degC",
    "tc_td2m_c": "degC",
    "tc_pwat": "kg m-2",
    "tc_core_td_excess_k": "K",
    "tc_core_pwat_excess": "kg m-2",
    "tc_thermal_wind_gpm": "gpm",
}
#: Radii (km) of the core disc and of the ring around a closed-low centre.
CORE_RADIUS_KM = 400.0
RING_KM = (500.0, 800.0)
#: Radius (km) within which Hart (2003) takes the height difference Zmax - Zmin.
HART_RADIUS_KM = 500.0
#: Lower-level heights used for the warm-core test, with their pressure (hPa).
LOWER_LEVELS = {"z850": 850.0, "z1000": 1000.0}
#: Bytes of centre geometries (:class:`_AroundCentre`) :func:`cyclone_structure` keeps
#: at once; emptied when full. 40 years at 1 degree have 411 centres of a few kB each; at
#: 0.25 degree a centre's measures read some 6,000 points (about 140 kB).
_CENTRE_CACHE_BYTES = 64 * 2**20
#: Bytes of one field's values as stored that :func:`cyclone_structure` reads at once
#: from an in-memory archive (days of a block are measured together, centre by centre:
#: the larger the block, the fewer the groups; 64 MB of float32: 6,500 days of 36 x 71
#: points, 400 at 0.25 degree over 140 x 280).
_STRUCTURE_BLOCK_BYTES = 64 * 2**20


#: exp(2i theta) at the centre bearings of the eight octants (22.5, 67.5, ... degrees).
_OCTANT_WAVE2 = np.exp(2j * np.radians(22.5 + 45.0 * np.arange(8)))


def _weighted_mean(values, weights):
    """Weighted mean of 1-D ``values``, the same arithmetic as ``numpy.average`` (sum of
    the products over the sum of the weights); NaN when there is no value."""
    if values.size == 0:
        return np.nan
    return np.multiply(values, weights).sum() / weights.sum()


def _finite_mean(values, weights, points):
    """Weighted mean of ``values`` at the flat indices ``points``, skipping NaN."""
    part = values[points]
    finite = np.isfinite(part)
    if not finite.all():
        part, points = part[finite], points[finite]
    return _weighted_mean(part, weights[points])


def _slice_means(part, weights, bounds, totals):
    """Weighted means of each row of ``part`` (days, points) over each column slice
    ``bounds`` (start, stop) of it, skipping NaN: (days, slices), each to the last bit
    :func:`_finite_mean` of one day over those points (the products of a C-ordered
    array, each row of a slice summed by one reduction: numpy's pairwise sum of a
    contiguous row, the same as of a 1-D array). ``totals``: each slice's sum of
    ``weights``, NaN for an empty slice. Days with a missing value are taken one by one."""
    products = np.multiply(part, weights)
    means = np.stack([np.add.reduce(products[:, start:stop], axis=1)
                      for start, stop in bounds], axis=1) / totals
    for row in np.flatnonzero(~np.isfinite(part).all(axis=1)):
        means[row] = [_finite_mean(part[row], weights, np.arange(start, stop))
                      for start, stop in bounds]
    return means


class _AroundCentre:
    """The grid around one closed-low centre, shared by every day centred there: the
    points of the box that can lie within RING_KM[1] (:func:`_box_around`), with their
    cos-latitude weights, and, as flat indices into a (lat, lon) field and with the
    row of each, the points each measure reads: the ring's eight octants one after the
    other (by initial bearing, 45 degrees each from north; each in grid order), the
    core disc then the ring (grid order), and Hart's disc."""

    def __init__(self, c_lat, c_lon, lat, lon, lat2, lon2, weights):
        near = _box_around(c_lat, c_lon, lat, lon, RING_KM[1])
        points_lat, points_lon = lat2[near], lon2[near]
        distance = great_circle_km(c_lat, c_lon, points_lat, points_lon).ravel()
        bearing = initial_bearing_deg(c_lat, c_lon, points_lat, points_lon).ravel()
        box_weights = weights[near].ravel()
        rows = np.broadcast_to(near[0], points_lat.shape).ravel()
        flat = np.ravel_multi_index((rows, np.broadcast_to(near[1], points_lat.shape).ravel()),
                                    lat2.shape)
        ring = (distance >= RING_KM[0]) & (distance <= RING_KM[1])
        octant = (np.floor(bearing / 45.0).astype(int)) % 8
        octants = [np.flatnonzero(ring & (octant == k)) for k in range(8)]
        moist = [np.flatnonzero(distance <= CORE_RADIUS_KM), np.flatnonzero(ring)]
        self.octant, self.moisture = (
            _Points(parts, flat, rows, box_weights) for parts in (octants, moist))
        self.hart = flat[distance <= HART_RADIUS_KM]
        self.nbytes = self.octant.nbytes + self.moisture.nbytes + self.hart.nbytes


class _Points:
    """Groups of a centre's box points (``parts``: indices into the box), one after the
    other: their flat grid indices (``flat``), rows (``rows``) and weights, each group's
    column slice (``bounds``) and sum of weights (``totals``, NaN when empty)."""

    def __init__(self, parts, flat, rows, weights):
        order = np.concatenate(parts)
        ends = np.cumsum([part.size for part in parts]).tolist()
        self.bounds = list(zip([0] + ends[:-1], ends))
        self.flat, self.rows, self.weights = flat[order], rows[order], weights[order]
        self.totals = np.array([weights[part].sum() if part.size else np.nan
                                for part in parts])
        self.nbytes = self.flat.nbytes + self.rows.nbytes + self.weights.nbytes

    def means(self, values):
        """Weighted means (days, groups) of ``values`` (days, these points)."""
        return _slice_means(values, self.weights, self.bounds, self.totals)


class _CentreGeometries:
    """The geometry around each closed-low centre of one grid (:class:`_AroundCentre`),
    computed once and shared by every block of days (and thread) of an archive; emptied
    when it holds more than :data:`_CENTRE_CACHE_BYTES`."""

    def __init__(self, lat, lon):
        self.lat, self.lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
        self.lat2, self.lon2 = np.meshgrid(self.lat, self.lon, indexing="ij")
        self.weights = np.cos(np.radians(self.lat2))
        self.centres: dict = {}
        self.nbytes = 0

    def on_grid(self, lat, lon) -> bool:
        return np.array_equal(self.lat, lat) and np.array_equal(self.lon, lon)

    def around(self, c_lat, c_lon) -> _AroundCentre:
        key = (c_lat, c_lon)
        found = self.centres.get(key)
        if found is None:
            if self.nbytes > _CENTRE_CACHE_BYTES:
                self.centres.clear()
                self.nbytes = 0
            found = _AroundCentre(c_lat, c_lon, self.lat, self.lon, self.lat2, self.lon2,
                                  self.weights)
            self.centres[key] = found
            self.nbytes += found.nbytes
        return found


def _ring_asymmetry(anomaly, around: _AroundCentre, depth):
    """Wavenumber-2 amplitude of ``anomaly`` (days, ``around.octant``'s points) on the
    ring, over ``depth`` (days): octant means (each octant needs a grid point with a
    value; NaN otherwise: the ring leaves the grid)."""
    means = around.octant.means(anomaly)
    wave = np.add.reduce(means * _OCTANT_WAVE2, axis=1)
    # The modulus as Python's abs() of a complex takes it (hypot): numpy's complex
    # absolute value of an array differs from it in the last bit.
    amplitude = 2.0 / 8.0 * np.hypot(wave.real, wave.imag)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(np.isfinite(means).all(axis=1) & (depth > 0), amplitude / depth,
                        np.nan)


def _hart_height_difference(z):
    """Zmax - Zmin within HART_RADIUS_KM of the centre (Hart 2003), gpm, of each day
    (``z``: days, the disc's points); missing values skipped."""
    if z.shape[1] == 0:
        return np.full(z.shape[0], np.nan)
    near = np.where(np.isfinite(z), z, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # a day without a value: NaN
        return np.nanmax(near, axis=1) - np.nanmin(near, axis=1)


def _box_around(centre_lat, centre_lon, lat, lon, radius_km):
    """``numpy.ix_`` indices of the grid rows and columns that can lie within
    ``radius_km`` of the centre: the latitude band of the spherical cap and, away from
    the poles, its longitude half-width ``arcsin(sin r / cos phi)`` (the bounding box
    of a spherical cap; common practice, no source), each widened by half a degree
    against round-off. Longitude differences are taken modulo 360."""
    reach = np.degrees(radius_km / (EARTH_RADIUS / 1000.0))
    rows = np.flatnonzero(np.abs(lat - centre_lat) <= reach + 0.5)
    columns = np.arange(lon.size)
    if abs(centre_lat) + reach + 0.5 < 90.0:
        half_width = np.degrees(np.arcsin(min(1.0, np.sin(np.radians(reach))
                                              / np.cos(np.radians(centre_lat)))))
        columns = np.flatnonzero(np.abs(wrap_longitude(lon - centre_lon)) <= half_width + 0.5)
    return np.ix_(rows, columns)


def _structure_blocks(rows: np.ndarray, z500) -> list[np.ndarray]:
    """The closed-low days ``rows`` in blocks read at once: of an in-memory archive, as
    many days as :data:`_STRUCTURE_BLOCK_BYTES` hold in the stored dtype (blocks are
    read as stored; 40 years at 1 degree in float32: one block, each centre's days
    measured together once); of a chunked (dask) one, the days
    of one time chunk, so that each chunk is read once (64-day blocks of scattered days
    read each chunk about five times: measured, 40 years at 1 degree in 365-day chunks,
    14 s of 16 s)."""
    sizes = (z500.chunksizes or {}).get("time")
    if not sizes:
        days = max(1, _STRUCTURE_BLOCK_BYTES // (z500.dtype.itemsize * z500.sizes["lat"]
                                                 * z500.sizes["lon"]))
        return [rows[start:start + days] for start in range(0, rows.size, days)]
    chunk = np.searchsorted(np.cumsum(sizes), rows, side="right")
    return np.split(rows, np.flatnonzero(np.diff(chunk)) + 1)


def cyclone_structure(ds: xr.Dataset, diagnostics: pd.DataFrame, *,
                      centres: _CentreGeometries | None = None) -> pd.DataFrame:
    r"""Structure of the closed low of each day, for the tropical rule.

    For every day whose diagnostics have a closed low (``tc_present``, ``tc_lat``,
    ``tc_lon`` of :func:`~analogs.stages.diagnostics.compute_diagnostics`), around
    its centre (great-circle distance and bearing, so a domain across the date line
    is measured as one piece):

    - ``tc_asymmetry`` (1): elongation, the wavenumber-2 amplitude :math:`A_2` of the
      500 hPa height departure from its zonal median (the meridional profile of the
      background removed) on the 500-800 km ring, from eight octant means, divided by
      ``tc_depth``. 0 for a circular vortex; about 0.5 when the ring along the long
      axis is half the depth higher than across it (an elongated low, a trough); NaN
      when an octant has no grid point (the ring leaves the grid). Wavenumber 1 is
      not used: a uniform environmental gradient (the steering flow) projects wholly
      onto it, so it measures the flow around the vortex, not the vortex's shape.
    - ``tc_td850_c`` / ``tc_td2m_c`` (degC) or ``tc_pwat`` (kg m-2): the moisture of
      the archive within 400 km of the centre, at its own level (850 hPa dewpoint
      from ``q850``, Bolton 1980; the 2 m dewpoint ``td2m``; precipitable water).
    - ``tc_core_td_excess_k`` (K) or ``tc_core_pwat_excess`` (kg m-2): the same
      within 400 km minus on the 500-800 km ring. The one-level warm-core proxy: a
      tropical cyclone is a warm, saturated column whose moistest air is at its core;
      a cold-core cut-off low has its coldest, hence absolutely driest, air beneath
      the centre and its moisture on the periphery. Since :math:`T \ge T_d`, a very
      moist core also bounds the lower-tropospheric temperature there from below.
    - ``tc_thermal_wind_gpm`` (gpm), when a lower-level height ``z850`` or ``z1000``
      is given: Hart's (2003, Mon. Wea. Rev.; from memory) lower-troposphere thermal
      wind parameter between that level and 500 hPa,

      .. math:: -V_T = rac{\Delta Z_{low} - \Delta Z_{500}}{\ln(p_{low}/500)}, \qquad
                \Delta Z = Z_{max} - Z_{min} 	ext{ within 500 km}

      positive for a warm core (the height perturbation weakens upward), negative
      for a cold core.

    Everything is NaN on days without a closed low and for a measure the archive
    lacks. Area means use cos-latitude weights; missing values are skipped. The days of
    a block that share a centre are measured together, each with the arithmetic of a
    day alone. ``centres``: the geometry around each centre, kept from earlier calls on
    the same grid (:func:`tag_days` passes one to every block of days).
    """
    from analogs.stages.diagnostics import dewpoint_from_specific_humidity, zonal_median
    names = list(STRUCTURE_UNITS)
    n = len(diagnostics)
    out = {name: np.full(n, np.nan) for name in names}
    present = (np.asarray(diagnostics["tc_present"], dtype=bool) if "tc_present" in diagnostics
               else np.zeros(n, dtype=bool))
    c_lat, c_lon = _column(diagnostics, "tc_lat"), _column(diagnostics, "tc_lon")
    c_depth = _column(diagnostics, "tc_depth")
    rows = np.flatnonzero(present & np.isfinite(c_lat) & np.isfinite(c_lon))
    frame = pd.DataFrame(out, index=diagnostics.index)
    if rows.size == 0 or "z500" not in ds:
        return frame
    if "time" not in ds.dims:
        ds = ds.expand_dims("time")
    lat = np.asarray(ds["lat"].values, dtype=float)
    lon = np.asarray(ds["lon"].values, dtype=float)
    if centres is None or not centres.on_grid(lat, lon):
        centres = _CentreGeometries(lat, lon)
    moisture = next((name for name in ("q850", "td2m", "pwat") if name in ds), None)
    lower = next((name for name in LOWER_LEVELS if name in ds), None)
    level = {"q850": "tc_td850_c", "td2m": "tc_td2m_c", "pwat": "tc_pwat"}.get(moisture)
    excess = "tc_core_pwat_excess" if moisture == "pwat" else "tc_core_td_excess_k"

    def block_values(name, block):
        """The fields of the block's days in their stored dtype: only the points read
        are converted to float64 (the same values as converting the whole field)."""
        return np.asarray(ds[name].transpose("time", "lat", "lon").isel(time=block).values)

    for block in _structure_blocks(rows, ds["z500"]):
        z = block_values("z500", block)
        # the zonal median of each row, for the whole block at once
        zonal = zonal_median(z)[..., 0]
        m = None if moisture is None else block_values(moisture, block)
        low = None if lower is None else block_values(lower, block)
        z, m, low = (None if f is None else f.reshape(block.size, -1) for f in (z, m, low))
        # Every measure is taken within RING_KM[1] of the centre: only the grid points
        # around it are read (same values, in the same order, as over the whole grid);
        # the days of the block that share a centre are measured together.
        keys, which = np.unique(np.stack([c_lat[block], c_lon[block]], axis=1), axis=0,
                                return_inverse=True)
        by_centre = np.argsort(which.ravel(), kind="stable")
        starts = np.searchsorted(which.ravel()[by_centre], np.arange(len(keys) + 1))
        for key, start, stop in zip(keys, starts[:-1], starts[1:]):
            days = by_centre[start:stop, None]           # the days' places in the block
            archive_rows = block[days[:, 0]]
            around = centres.around(*key)
            octant = around.octant
            anomaly = z[days, octant.flat].astype(float) - zonal[days, octant.rows]
            out["tc_asymmetry"][archive_rows] = _ring_asymmetry(anomaly, around,
                                                                c_depth[archive_rows])
            if m is not None:
                values = m[days, around.moisture.flat].astype(float)
                if moisture == "q850":
                    values = dewpoint_from_specific_humidity(values, 850.0) - ZERO_CELSIUS_K
                elif moisture == "td2m":
                    values = values - ZERO_CELSIUS_K
                core, ring = around.moisture.means(values).T
                out[level][archive_rows] = core
                out[excess][archive_rows] = core - ring
            if low is not None:
                dz_low = _hart_height_difference(low[days, around.hart].astype(float))
                dz_500 = _hart_height_difference(z[days, around.hart].astype(float))
                out["tc_thermal_wind_gpm"][archive_rows] = (dz_low - dz_500) / np.log(
                    LOWER_LEVELS[lower] / 500.0)
    return pd.DataFrame(out, index=diagnostics.index)


#: Spans (full-confidence margins) of the tropical criteria that are not relative.
_SPANS = {"dewpoint": 5.0, "pwat": 10.0, "td_excess": 2.0, "pwat_excess": 5.0,
          "thermal_wind": 20.0, "asymmetry": 0.25, "latitude": 5.0}
#: The tropical moisture measures: column, rule, label in reasons, units in reasons.
_TC_MOISTURE = (("tc_td850_c", "tropical_min_td850_c", "Td850", "C"),
                ("tc_td2m_c", "tropical_min_td2m_c", "Td2m", "C"),
                ("tc_pwat", "tropical_min_pwat", "PW", "kg/m2"))


def _moisture_known(d: pd.DataFrame) -> np.ndarray:
    """Days whose region has moisture values (any field: precipitable water counts)."""
    if "moisture_available" in d:
        return np.asarray(d["moisture_available"], dtype=bool)
    return np.isfinite(_column(d, "dewpoint_region_c")) | np.isfinite(_column(d, "pwat_region"))


def _moist_line_name(moisture) -> str:
    """How a reason names the moist line: "60F line", "Td850 12 C line", "PW 30 line"."""
    if not moisture:
        return "60F line"
    field = moisture.get("field")
    threshold = moisture.get("threshold", np.nan)
    if field == "td2m" and abs(threshold - (60.0 - 32.0) * 5.0 / 9.0) < 0.05:
        return "60F line"
    label = {"td2m": "Td2m", "q850": "Td850", "pwat": "PW"}.get(field, str(field))
    units = "C" if moisture.get("units") == "degC" else str(moisture.get("units", ""))
    return f"{label} {threshold:g} {units} line"


def _in_season(month, start, end):
    """Whether ``month`` (1-12, array, NaN allowed) lies in [start, end], wrapping."""
    month = np.asarray(month, dtype=float)
    if start <= end:
        return (month >= start) & (month <= end)
    return (month >= start) | (month <= end)


def _months(index) -> np.ndarray:
    try:
        return np.asarray(pd.DatetimeIndex(index).month, dtype=float)
    except (TypeError, ValueError):
        return np.full(len(index), np.nan)


class RuleClassifier:
    """Explainable regime rules on the daily diagnostics.

    Parameters
    ----------
    rules : :class:`RegimeRules`, optional (defaults when None).

    Criteria (thresholds in :class:`RegimeRules`; columns of
    :func:`~analogs.stages.diagnostics.compute_diagnostics` and
    :func:`cyclone_structure`):

    - ``tropical`` (precision first: a forecaster acts on it): a closed low near the
      region (``tc_present``) that is deep (``tc_depth``), compact
      (``tc_radius_km``), nearly symmetric (``tc_asymmetry``), at low latitude
      (``|tc_lat|``), in the warm season of its hemisphere (months
      tropical_season_start_month to _end_month in the north, six months later in the
      south), wrapped in very moist air at the archive's own level (``tc_td850_c``,
      ``tc_td2m_c`` or ``tc_pwat`` at least its threshold) and warm-core-like: with a
      lower-level height, Hart's (2003) thermal wind ``tc_thermal_wind_gpm`` > 0;
      with one level, a core at least as moist as its ring (``tc_core_td_excess_k``
      or ``tc_core_pwat_excess`` >= 0; see :func:`cyclone_structure` for why).
      A cold-core cut-off low in the subtropics in the cold season (Nieto et al.
      2005, J. Climate; from memory: common there in that season, cold-core) fails
      the season and, in its dry cold core, the moisture tests. Height-only archives
      (no moisture around the centre): never tropical by default
      (``tropical_without_moisture = 0``), since at 500 hPa alone a summer cold-core
      upper low is as deep, compact and round as a tropical cyclone; the reason says
      the moisture was missing. With ``tropical_without_moisture = 1`` a deeper, more
      compact, more symmetric, lower-latitude warm-season low is called tropical (the
      ``*_without_moisture`` rules) and the reason says the warm core was untested.
    - ``strong_trough``: ``trough_amplitude``, ``height_gradient`` and
      ``cyclonic_advection`` at least their thresholds, with the mean flow from the
      south-west (``flow_direction_deg`` in [trough_min_direction_deg,
      trough_max_direction_deg]): the region lies ahead of an amplified trough axis,
      in a strong gradient, under cyclonic vorticity advection (common practice, no
      source).
    - ``northwest_flow``: ``flow_direction_deg`` in [nw_min_direction_deg,
      nw_max_direction_deg], ``flow_speed_ms``, ``ridge_amplitude`` (upstream) and
      ``trough_amplitude`` (downstream) at least their thresholds, and the moist line
      (``moist_line_lat``) at least nw_min_moist_line_offset_deg north of the region's
      south edge: a ridge upstream over the high terrain, flow aloft from the
      west-north-west to north-west, moisture beneath (Johns 1982, Mon. Wea. Rev.;
      from memory).

    The margin of a criterion is ``m_i = (x_i - t_i) / s_i`` clipped to [-1, 1], with
    ``s_i`` its span: ``direction_span_deg`` for a direction (measured inside the
    window from its nearer edge), 5 degrees for the cyclone latitude and the moisture
    line, 5 K for a dewpoint, 10 kg m-2 for precipitable water, 2 K / 5 kg m-2 for the
    core excess, 20 gpm for the thermal wind, 0.25 for the asymmetry, +-1 for the
    season, ``confidence_span`` times ``|t_i|`` otherwise. A regime holds when every
    margin is >= 0. Precedence: tropical > strong_trough > northwest_flow > other.
    Confidence:

    - a named regime: ``0.5 + 0.5 * min_i m_i`` (0.5 just at a threshold, 1 when
      every criterion is past its threshold by a full span);
    - ``other``: ``0.5 + 0.5 * min_r d_r``, where ``d_r = -min_i m_{r,i}`` is how far
      the most failing criterion of regime ``r`` falls short (1 when every named
      regime misses by a full span).

    North-west flow skips its moisture criterion when the dewpoint is missing and
    says so.
    """

    def __init__(self, rules: RegimeRules | None = None):
        self.rules = rules

    def _rules(self) -> RegimeRules:
        if self.rules is None:
            return RegimeRules()
        if not isinstance(self.rules, RegimeRules):
            raise AnalogsInputError(
                "The 'rules' parameter of RuleClassifier must be a RegimeRules. "
                f"Got {type(self.rules).__name__} instead.")
        return self.rules

    def _tropical(self, d: pd.DataFrame) -> tuple[dict, dict]:
        """Margins of the tropical criteria, and what the reasons quote."""
        r = self._rules()
        rel = r.confidence_span
        n = len(d)
        present = np.asarray(d["tc_present"], dtype=bool) if "tc_present" in d \
            else np.zeros(n, dtype=bool)
        depth = np.where(present, _column(d, "tc_depth"), np.nan)
        abs_lat = np.abs(_column(d, "tc_lat"))
        # The archive's moisture measure around the centre, at its own level.
        moisture_margin = np.full(n, np.nan)
        measure = np.full(n, "", dtype=object)
        # A store tagged before the level-specific columns existed has tc_dewpoint_c.
        legacy = not any(m[0] in d for m in _TC_MOISTURE) and "tc_dewpoint_c" in d
        for column, rule, label, _ in _TC_MOISTURE:
            values = _column(d, "tc_dewpoint_c" if legacy and column == "tc_td850_c"
                             else column)
            span = _SPANS["pwat"] if column == "tc_pwat" else _SPANS["dewpoint"]
            use = np.isfinite(values) & ~np.isfinite(moisture_margin)
            moisture_margin[use] = _margin(values[use], getattr(r, rule), span)
            measure[use] = column
        known = np.isfinite(moisture_margin)
        thermal = _column(d, "tc_thermal_wind_gpm")
        td_excess, pw_excess = _column(d, "tc_core_td_excess_k"), _column(d, "tc_core_pwat_excess")
        core = np.where(np.isfinite(td_excess),
                        _margin(td_excess, r.tropical_min_core_td_excess_k, _SPANS["td_excess"]),
                        _margin(pw_excess, r.tropical_min_core_pwat_excess,
                                _SPANS["pwat_excess"]))
        warm_core = np.where(np.isfinite(thermal),
                             _margin(thermal, r.tropical_min_thermal_wind_gpm,
                                     _SPANS["thermal_wind"]),
                             np.where(known, core, 1.0))  # untested without moisture
        north = np.nan_to_num(_column(d, "tc_lat"), nan=1.0) >= 0
        month = _months(d.index)
        start, end = r.tropical_season_start_month, r.tropical_season_end_month
        in_season = np.where(north, _in_season(month, start, end),
                             _in_season(month, (start + 5) % 12 + 1, (end + 5) % 12 + 1))
        depth_needed = np.where(known, r.tropical_min_depth_gpm,
                                r.tropical_depth_without_moisture_gpm)
        max_lat = np.where(known, r.tropical_max_lat, r.tropical_max_lat_without_moisture)
        max_radius = np.where(known, r.tropical_max_radius_km,
                              r.tropical_max_radius_without_moisture_km)
        max_asym = np.where(known, r.tropical_max_asymmetry,
                            r.tropical_max_asymmetry_without_moisture)
        margins = {
            "depth": _margin(depth, depth_needed, rel * depth_needed),
            "latitude": _margin(-abs_lat, -max_lat, _SPANS["latitude"]),
            "radius": _margin(-_column(d, "tc_radius_km"), -max_radius, rel * max_radius),
            # Untested (1) only for tables older than the column.
            "symmetry": (_margin(-_column(d, "tc_asymmetry"), -max_asym, _SPANS["asymmetry"])
                         if "tc_asymmetry" in d else np.ones(n)),
            "season": np.where(in_season, 1.0, -1.0),
            # Height only: off by default (precision first), the reason says why.
            "moisture": np.where(known, moisture_margin,
                                 1.0 if r.tropical_without_moisture else -1.0),
            "warm_core": warm_core,
        }
        facts = {"known": known, "measure": measure, "depth_needed": depth_needed,
                 "max_lat": max_lat, "max_radius": max_radius, "max_asym": max_asym,
                 "in_season": in_season, "month": month, "present": present}
        return margins, facts

    def margins(self, diagnostics: pd.DataFrame) -> dict[str, dict[str, np.ndarray]]:
        """Per regime, the margin of each criterion (arrays of length n_days)."""
        r = self._rules()
        rel = r.confidence_span
        d = diagnostics
        tropical, _ = self._tropical(d)
        moisture_known = _moisture_known(d)
        direction = _column(d, "flow_direction_deg")
        trough = {
            "direction": _margin(np.minimum(direction - r.trough_min_direction_deg,
                                            r.trough_max_direction_deg - direction),
                                 0.0, r.direction_span_deg),
            "amplitude": _margin(_column(d, "trough_amplitude"), r.trough_min_amplitude_gpm,
                                 rel * r.trough_min_amplitude_gpm),
            "gradient": _margin(_column(d, "height_gradient"), r.trough_min_height_gradient,
                                rel * r.trough_min_height_gradient),
            "vorticity_advection": _margin(_column(d, "cyclonic_advection"),
                                           r.trough_min_vorticity_advection,
                                           rel * abs(r.trough_min_vorticity_advection)),
        }
        inside = np.minimum(direction - r.nw_min_direction_deg,
                            r.nw_max_direction_deg - direction)
        south = diagnostics.attrs.get("region", (np.nan,))[0]
        offset = _column(d, "moist_line_lat") - south
        nw = {
            "direction": _margin(inside, 0.0, r.direction_span_deg),
            "speed": _margin(_column(d, "flow_speed_ms"), r.nw_min_speed_ms,
                             rel * r.nw_min_speed_ms),
            "ridge": _margin(_column(d, "ridge_amplitude"), r.nw_min_ridge_gpm,
                             rel * r.nw_min_ridge_gpm),
            "trough": _margin(_column(d, "trough_amplitude"), r.nw_min_trough_gpm,
                              rel * abs(r.nw_min_trough_gpm) or 1.0),
            # No moist air at all in the region's longitudes: the line is far south.
            "moisture": np.where(
                moisture_known,
                _margin(np.where(np.isnan(offset) & moisture_known, -90.0, offset),
                        r.nw_min_moist_line_offset_deg, 5.0),
                1.0),
        }
        return {"tropical": tropical, "strong_trough": trough, "northwest_flow": nw}

    def predict(self, diagnostics: pd.DataFrame) -> pd.DataFrame:
        """Regime, confidence and reason for each row of ``diagnostics``.

        Parameters
        ----------
        diagnostics : DataFrame from :func:`analogs.stages.diagnostics.compute_diagnostics`
            (with the columns of :func:`cyclone_structure` when available), indexed by
            date (the month decides the season); its ``attrs["region"]`` is used when
            present.

        Returns
        -------
        DataFrame with the same index and columns ``regime`` (str), ``confidence``
        (float in [0, 1]) and ``reason`` (str).
        """
        if not isinstance(diagnostics, pd.DataFrame):
            raise AnalogsInputError(
                "RuleClassifier.predict needs the DataFrame of compute_diagnostics. "
                f"Got {type(diagnostics).__name__} instead.")
        needed = {"flow_direction_deg", "flow_speed_ms", "ridge_amplitude",
                  "trough_amplitude", "height_gradient", "cyclonic_advection"}
        absent = sorted(needed - set(diagnostics.columns))
        if absent:
            raise AnalogsInputError(
                f"RuleClassifier.predict: diagnostics table lacks column(s) "
                f"{', '.join(absent)}; build it with compute_diagnostics")
        margins = self.margins(diagnostics)
        worst = {name: np.min(np.vstack(list(m.values())), axis=0)
                 for name, m in margins.items()}
        n = len(diagnostics)
        regime = np.full(n, "other", dtype=object)
        confidence = 0.5 + 0.5 * np.min(np.vstack([-w for w in worst.values()]), axis=0)
        decided = np.zeros(n, dtype=bool)
        for name in REGIME_LABELS[:-1]:
            hit = (worst[name] >= 0) & ~decided
            regime[hit] = name
            confidence[hit] = 0.5 + 0.5 * worst[name][hit]
            decided |= hit
        reasons = self._reasons(diagnostics, regime, margins["tropical"])
        return pd.DataFrame({"regime": regime.astype(str), "confidence": confidence,
                             "reason": reasons}, index=diagnostics.index)

    def _tropical_text(self, k, v, facts, failing, label, r: RegimeRules) -> str:
        """The cyclone part of a reason under rules ``r``: what made it tropical, or
        why it is not (``failing``: the names of the criteria it fails). ``facts``:
        those of :meth:`_tropical` as lists, with ``month_names``."""
        known = facts["known"][k]

        def part(name):
            if name == "depth":
                return f"depth {v['tc_depth']:.0f} gpm (needs {facts['depth_needed'][k]:.0f})"
            if name == "latitude":
                return (f"centre at {abs(v['tc_lat']):.1f} deg latitude (at most "
                        f"{facts['max_lat'][k]:.0f})")
            if name == "radius":
                return (f"radius {v['tc_radius_km']:.0f} km (at most "
                        f"{facts['max_radius'][k]:.0f})")
            if name == "symmetry":
                asym = (f"asymmetry {v['tc_asymmetry']:.2f}" if math.isfinite(v["tc_asymmetry"])
                        else "ring off the grid")
                return f"{asym} (at most {facts['max_asym'][k]:.2f})"
            if name == "season":
                month = facts["month"][k]
                month_name = (facts["month_names"][int(month)] if math.isfinite(month)
                              else "unknown month")
                return f"{month_name}: " + ("warm season" if facts["in_season"][k]
                                            else "outside the warm season")
            if name == "moisture":
                if known:
                    column, rule, label_, units = next(m for m in _TC_MOISTURE
                                                       if m[0] == facts["measure"][k])
                    return (f"{label_} {v[column]:.1f} {units} within "
                            f"{CORE_RADIUS_KM:.0f} km (needs {getattr(r, rule):g})")
                if r.tropical_without_moisture:
                    return "moisture missing around the centre"
                return ("moisture missing around the centre (height-only archive: not "
                        "called tropical, a cold-core upper low looks the same at 500 hPa)")
            # the warm core
            if math.isfinite(v["tc_thermal_wind_gpm"]):
                return (f"Hart thermal wind {v['tc_thermal_wind_gpm']:+.0f} gpm ("
                        + ("warm" if v["tc_thermal_wind_gpm"] > 0 else "cold") + " core)")
            if known and math.isfinite(v["tc_core_td_excess_k"]):
                return (f"core {v['tc_core_td_excess_k']:+.1f} K dewpoint vs its ring "
                        "(one-level warm-core proxy)")
            if known and math.isfinite(v["tc_core_pwat_excess"]):
                return (f"core {v['tc_core_pwat_excess']:+.1f} kg/m2 PW vs its ring "
                        "(one-level warm-core proxy)")
            return "core moisture unknown" if known else "warm core untested (height only)"

        lat_text = f"{abs(v['tc_lat']):.1f} {'N' if v['tc_lat'] >= 0 else 'S'}"
        lon = (v["tc_lon"] + 180.0) % 360.0 - 180.0
        lon_text = f"{abs(lon):.1f} {'E' if lon >= 0 else 'W'}"
        low = (f"closed low {v['tc_depth']:.0f} gpm deep, r {v['tc_radius_km']:.0f} km at "
               f"{lat_text} {lon_text}")
        if label == "tropical":
            text = f"{low}; {part('moisture')}; {part('warm_core')}; {part('season')}"
            if not known:
                text += ("; moisture missing: tropical from the height field alone (deep, "
                         "compact, symmetric, warm season)")
            return text
        why = "; ".join(part(name) for name in failing)
        return f"{low}, not tropical: {why}" if why else low

    def _reasons(self, d: pd.DataFrame, regime: np.ndarray, tropical_margins=None) -> list[str]:
        moisture_known = _moisture_known(d).tolist()
        cols = {name: _column(d, name) for name in (
            "flow_direction_deg", "flow_speed_ms", "ridge_amplitude", "trough_amplitude",
            "height_gradient", "cyclonic_advection", "tc_lat", "tc_lon", "tc_depth",
            "tc_radius_km", "dewpoint_region_c", "pwat_region", "moist_line_lat",
            *STRUCTURE_UNITS)}
        if not any(m[0] in d for m in _TC_MOISTURE) and "tc_dewpoint_c" in d:
            cols["tc_td850_c"] = _column(d, "tc_dewpoint_c")  # a table of an older store
        # Each day's values as Python floats (numpy scalars cost a per-value overhead that
        # made the reasons a tenth of tagging, measured); + 0.0 turns a negative zero
        # into zero, so "-0 gpm" never shows.
        names = list(cols)
        days = zip(*((values + 0.0).tolist() for values in cols.values()))
        rules = self._rules()
        line_name = _moist_line_name(d.attrs.get("moisture"))
        td_name = {"q850": "Td850", "td2m": "Td2m"}.get(
            (d.attrs.get("moisture") or {}).get("field"), "Td")
        margins, facts = self._tropical(d)
        facts = {name: np.asarray(values).tolist() for name, values in facts.items()}
        facts["month_names"] = list(calendar.month_abbr)
        fails = {name: (values < 0).tolist() for name, values in margins.items()}
        out = []
        for k, (label, day) in enumerate(zip(regime, days)):
            v = dict(zip(names, day))
            flow = f"flow {v['flow_direction_deg']:.0f} deg at {v['flow_speed_ms']:.0f} m/s"
            if moisture_known[k]:
                moist = (f"{td_name} {v['dewpoint_region_c']:.1f} C" if math.isfinite(
                    v["dewpoint_region_c"]) else f"PW {v['pwat_region']:.0f} kg/m2")
                if math.isfinite(v["moist_line_lat"]):
                    moist += f", {line_name} {v['moist_line_lat']:.1f} N"
            else:
                moist = "moisture missing"
            low = (self._tropical_text(k, v, facts, [name for name in fails if fails[name][k]],
                                       label, rules) if facts["present"][k] else "")
            if label == "tropical":
                text = low
            elif label == "strong_trough":
                text = (f"trough {v['trough_amplitude']:.0f} gpm; gradient "
                        f"{v['height_gradient']:.0f} gpm/1000 km; vorticity advection "
                        f"{v['cyclonic_advection']:.1e} s-2; {flow}")
            elif label == "northwest_flow":
                text = (f"{flow}; ridge {v['ridge_amplitude']:.0f} gpm upstream, trough "
                        f"{v['trough_amplitude']:.0f} gpm downstream; {moist}")
            else:
                text = (f"{flow}; ridge {v['ridge_amplitude']:.0f} gpm, trough "
                        f"{v['trough_amplitude']:.0f} gpm; {moist}")
                if low:
                    text += f"; {low}"
            out.append(text)
        return out


# ------------------------------------------------------------ diagnostic region

#: Half-sizes (degrees of latitude, longitude) of the synoptic-scale box over which
#: regimes are diagnosed when no region is given, or around a point region: a regime is
#: a pattern some 1500 x 2000 km across, not a point value (common practice, no source).
SYNOPTIC_HALF_BOX = (7.5, 10.0)
#: Latitude at which the default box is centred on a domain whose middle lies within
#: 20 degrees of the equator but that reaches the mid-latitudes (a global or
#: hemispheric-band grid): geostrophic diagnostics mean nothing near the equator.
MIDLATITUDE_CENTRE_DEG = 45.0


def domain_extent(lat, lon) -> tuple[float, float, float, float]:
    """(south, north, west, east) of a grid, in degrees, seam-aware in longitude.

    ``lon`` is ascending in [-180, 180) (the canonical grid). The domain's west edge is
    the longitude after the largest gap between neighbouring grid longitudes (the gap
    across the 180th meridian included): on a domain that crosses the date line
    (e.g. 150 E to 150 W, stored as -180..-150 and 150..179) ``west`` is 150 and
    ``east`` 210, i.e. ``east`` may exceed 180. A grid that wraps the globe (no gap
    wider than 1.5 grid lengths) gives ``east = west + 360``.
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.sort(np.mod(np.asarray(lon, dtype=float) + 180.0, 360.0) - 180.0)
    south, north = float(lat.min()), float(lat.max())
    if lon.size < 2:
        return south, north, float(lon[0]), float(lon[0])
    gaps = np.append(np.diff(lon), lon[0] + 360.0 - lon[-1])
    step = float(np.median(np.diff(lon)))
    k = int(np.argmax(gaps))
    if gaps[k] <= 1.5 * step:                       # wraps the globe
        return south, north, float(lon[0]), float(lon[0]) + 360.0
    if k == lon.size - 1:                           # the gap is the 180th meridian
        return south, north, float(lon[0]), float(lon[-1])
    return south, north, float(lon[k + 1]), float(lon[k]) + 360.0


def default_diagnostic_box(lat, lon) -> tuple[float, float, float, float]:
    """The synoptic-scale box at the centre of a domain, where regimes are diagnosed
    when no region is given: (south, north, west, east) in degrees.

    Half-sizes :data:`SYNOPTIC_HALF_BOX` (7.5 degrees of latitude, 10 of longitude),
    at most a sixth of the domain's width in longitude, so that a third of the domain
    lies upstream (west: the ridge window) and a third downstream (east: the trough
    window), and a quarter of its height in latitude. The centre is the middle of the
    domain (:func:`domain_extent`, seam-aware: on a domain across the date line
    ``east`` may exceed 180); a domain whose middle lies within 20 degrees of the
    equator but that reaches 30 degrees of latitude is centred at
    :data:`MIDLATITUDE_CENTRE_DEG` in the hemisphere it reaches further into (north on
    a tie). Over the whole domain, "ridge upstream" and "trough downstream" of the box
    would fall off the grid (common practice, no source).
    """
    south, north, west, east = domain_extent(lat, lon)
    half_lat = min(SYNOPTIC_HALF_BOX[0], (north - south) / 4.0)
    half_lon = min(SYNOPTIC_HALF_BOX[1], (east - west) / 6.0)
    centre_lat = 0.5 * (south + north)
    reach = max(north, -south)
    if abs(centre_lat) < 20.0 and reach >= 30.0:
        sign = 1.0 if north >= -south else -1.0
        edge = north if sign > 0 else -south
        centre_lat = sign * min(MIDLATITUDE_CENTRE_DEG, edge - half_lat)
    box_west = 0.5 * (west + east) - half_lon
    # West in [-180, 180); a box across the date line keeps east = west + width > 180.
    box_west = (box_west + 180.0) % 360.0 - 180.0
    return (centre_lat - half_lat, centre_lat + half_lat, box_west, box_west + 2 * half_lon)


def clip_to_domain(box, lat, lon) -> tuple[float, float, float, float]:
    """``box`` (south, north, west, east) moved by whole turns of 360 degrees of longitude
    onto the domain of the grid (:func:`domain_extent`) and clipped to it."""
    south, north, west, east = (float(v) for v in box)
    d_south, d_north, d_west, d_east = domain_extent(lat, lon)
    south, north = max(south, d_south), min(north, d_north)
    if d_east - d_west >= 360.0:             # a global grid: west in [-180, 180)
        shift = (west + 180.0) % 360.0 - 180.0 - west
        return south, north, west + shift, east + shift
    centre = 0.5 * (west + east)
    shift = 360.0 * np.round((0.5 * (d_west + d_east) - centre) / 360.0)
    west, east = west + shift, east + shift
    return south, north, max(west, d_west), min(east, d_east)


def describe_box(box, *, default: bool = False) -> str:
    """Plain text of a diagnostic box: "box 30-45 N, 105-85 W" (+ why, when default)."""
    south, north, west, east = box

    def lat_text(v):
        return f"{abs(v):g} {'N' if v >= 0 else 'S'}"

    def lon_text(v):
        v = (v + 180.0) % 360.0 - 180.0
        return f"{abs(v):g} {'E' if v >= 0 else 'W'}" if v not in (0.0, -180.0) else f"{abs(v):g}"

    text = (f"box {lat_text(round(south, 2))} to {lat_text(round(north, 2))}, "
            f"{lon_text(round(west, 2))} to {lon_text(round(east, 2))}")
    if default:
        text += (" (default: the synoptic-scale box at the centre of the domain, no region "
                 "given; ridge searched upstream (west) of it, trough over and downstream "
                 "(east) of it)")
    return text


#: Units (or form) of the tag table's columns that are not diagnostics.
_TAG_COLUMN_UNITS = {"date": "YYYY-MM-DD (convective day of the 12 UTC fields)",
                     "regime": "label", "confidence": "1", "reason": "text",
                     "kmeans_regime": "cluster number", "learned_regime": "label",
                     "learned_confidence": "1"}


def tag_metadata(attrs: dict, columns) -> dict:
    """What a tag file says of itself (Parquet key-value metadata, or the CSV's
    sidecar): the units of every column, the diagnostic region (box, whether it was the
    default, in words), the missing inputs and the caution.

    ``attrs``: the tags' attributes (:func:`tag_days` ``attrs``, kept in the store);
    ``columns``: the columns written.
    """
    known = {**_TAG_COLUMN_UNITS, **STRUCTURE_UNITS, **(attrs.get("units") or {})}
    if any(str(c) not in known for c in columns):  # tags written without their units
        from analogs.stages.diagnostics import DIAGNOSTIC_UNITS
        known = {**_TAG_COLUMN_UNITS, **DIAGNOSTIC_UNITS, **STRUCTURE_UNITS,
                 **(attrs.get("units") or {})}
    region = attrs.get("region")
    region = None if region is None else [float(v) for v in region]
    default = bool(attrs.get("region_default", False))
    description = attrs.get("region_description") or (
        describe_box(region, default=default) if region is not None else "unknown")
    return {
        "title": "analogs regime tags: one row a day",
        "units": {str(c): known.get(str(c), "") for c in columns},
        "diagnostic_region": {"south_north_west_east": region, "default": default,
                              "description": description},
        "missing": list(attrs.get("missing") or []),
        "caution": "Guidance, not a forecast or a warning.",
    }


def tag_days(ds: xr.Dataset, region=None, *, rules: RegimeRules | None = None,
             progress: bool = False, **diagnostic_options) -> pd.DataFrame:
    """Regime of every day of an archive, with its diagnostics.

    Parameters
    ----------
    ds : canonical Dataset with ``z500`` (gpm) and optionally a moisture field
        (``q850``, ``td2m`` or ``pwat``) and a lower-level height (``z850`` or ``z1000``,
        gpm) for the warm-core test of :class:`RuleClassifier`.
    region : (south, north, west, east) in degrees; None: the synoptic-scale box at the
        centre of the domain (:func:`default_diagnostic_box`).
    rules : :class:`RegimeRules` (defaults when None).
    progress : show a progress bar over blocks of days.
    diagnostic_options : passed to :func:`analogs.stages.diagnostics.compute_diagnostics`.

    Returns
    -------
    DataFrame, one row a day: ``date`` (datetime64), ``regime``, ``confidence``, the
    diagnostics of :func:`~analogs.stages.diagnostics.compute_diagnostics` and the
    cyclone-structure columns of :func:`cyclone_structure` (units of every column in
    ``attrs["units"]``), then ``reason``. ``attrs["missing"]`` lists the missing
    inputs (e.g. ``["moisture"]``); ``attrs["region"]`` is the box,
    ``attrs["region_default"]`` whether it was the default and
    ``attrs["region_description"]`` says so in words.
    """
    import xarray as xr

    from analogs.stages.diagnostics import compute_diagnostics
    default = region is None
    if default:
        if not isinstance(ds, xr.Dataset) or "lat" not in ds.coords or "lon" not in ds.coords:
            raise AnalogsInputError(
                "tag_days needs a Dataset with lat and lon coordinates to place its default "
                "diagnostic region; give region=(south, north, west, east) otherwise")
        region = default_diagnostic_box(ds["lat"].values, ds["lon"].values)
    # The closed-low structure is measured block by block as the diagnostics read the
    # fields (one read of an archive chunked in time; its values are per day), with the
    # geometry around each centre computed once for all blocks.
    centres = (_CentreGeometries(ds["lat"].values, ds["lon"].values)
               if isinstance(ds, xr.Dataset) and {"lat", "lon"} <= set(ds.coords) else None)
    diagnostics = compute_diagnostics(
        ds, region, progress=progress,
        block_measures=functools.partial(cyclone_structure, centres=centres),
        **diagnostic_options)
    diagnostics.attrs["units"] = {**diagnostics.attrs.get("units", {}), **STRUCTURE_UNITS}
    diagnostics.attrs["region_default"] = bool(default)
    diagnostics.attrs["region_description"] = describe_box(
        diagnostics.attrs.get("region", region), default=default)
    labels = RuleClassifier(rules).predict(diagnostics)
    table = pd.concat([labels[["regime", "confidence"]], diagnostics,
                       labels[["reason"]]], axis=1)
    table.index = pd.DatetimeIndex(table.index).normalize()
    table = table.rename_axis("date").reset_index()
    table.attrs = dict(diagnostics.attrs)
    return table


# ------------------------------------------------------------------ learned paths


def _pcs_array(pcs, owner: str) -> tuple[np.ndarray, pd.DatetimeIndex | None]:
    import xarray as xr
    times = None
    if isinstance(pcs, xr.DataArray):
        if pcs.ndim != 2 or "time" not in pcs.dims:
            raise AnalogsInputError(
                f"{owner} needs PCs as a DataArray (time, mode). Got dims {pcs.dims}.")
        times = pd.DatetimeIndex(pcs["time"].values)
        pcs = pcs.transpose("time", ...).values
    values = np.asarray(pcs, dtype=float)
    if values.ndim != 2 or not np.all(np.isfinite(values)):
        raise AnalogsInputError(
            f"{owner} needs a finite 2-D array of PCs (time, mode). Got shape "
            f"{values.shape}.")
    return values, times


def persistence_filter(labels, min_persistence: int, times=None) -> np.ndarray:
    """Relabel runs shorter than ``min_persistence`` days to a neighbouring regime.

    Runs are read left to right; a short run takes the label of the run before it
    (the first run, of the run after it), so that every regime episode lasts at
    least ``min_persistence`` consecutive days. When ``times`` are given, a gap of
    more than one day starts a new sequence. Common practice for regime persistence
    (e.g. minimum-duration filters of weather-regime studies), no single source.
    """
    labels = np.asarray(labels).copy()
    if min_persistence <= 1 or labels.size == 0:
        return labels
    if times is None:
        breaks = np.array([0, labels.size])
    else:
        gap = np.diff(pd.DatetimeIndex(times).values).astype("timedelta64[h]") \
            > np.timedelta64(24, "h")
        breaks = np.concatenate([[0], np.nonzero(gap)[0] + 1, [labels.size]])
    for a, b in zip(breaks[:-1], breaks[1:]):
        segment = labels[a:b]
        change = np.nonzero(segment[1:] != segment[:-1])[0] + 1
        starts = np.concatenate([[0], change])
        ends = np.concatenate([change, [segment.size]])
        merged: list[list] = []
        for s, e in zip(starts, ends):
            if merged and (merged[-1][0] == segment[s] or e - s < min_persistence):
                merged[-1][2] = e
            else:
                merged.append([segment[s], s, e])
        if len(merged) > 1 and merged[0][2] - merged[0][1] < min_persistence:
            first = merged.pop(0)
            merged[0][1] = first[1]
        for label, s, e in merged:
            segment[s:e] = label
    return labels


class KMeansRegimes:
    """Unsupervised regimes: k-means on the PCs, then a minimum-persistence filter.

    Parameters
    ----------
    n_regimes : number of clusters.
    min_persistence : shortest regime episode in days (1 disables the filter).
    random_state : seed of the k-means initialisation.

    Learned: ``cluster_centers_`` (n_regimes, n_modes), ``labels_`` (filtered labels of
    the training days). ``predict`` needs only the centroids: the nearest centroid in
    Euclidean distance (as ``sklearn.cluster.KMeans.predict``), then the filter.
    Reference: Michelangeli, Vautard & Legras (1995, J. Atmos. Sci.), weather regimes
    by k-means in EOF space (from memory).
    """

    def __init__(self, n_regimes: int = 6, *, min_persistence: int = 2, random_state=0):
        self.n_regimes = n_regimes
        self.min_persistence = min_persistence
        self.random_state = random_state

    def fit(self, pcs) -> "KMeansRegimes":
        from sklearn.cluster import KMeans

        check_int(self.n_regimes, "n_regimes", "KMeansRegimes", min_value=2)
        check_int(self.min_persistence, "min_persistence", "KMeansRegimes", min_value=1)
        values, times = _pcs_array(pcs, "KMeansRegimes.fit")
        if values.shape[0] < self.n_regimes:
            raise AnalogsInputError(
                f"KMeansRegimes.fit needs at least n_regimes={self.n_regimes} days; "
                f"got {values.shape[0]}")
        model = KMeans(self.n_regimes, n_init=10, random_state=self.random_state).fit(values)
        self.cluster_centers_ = model.cluster_centers_.copy()
        self.labels_ = persistence_filter(model.labels_, self.min_persistence, times)
        return self

    def _check_fitted(self):
        if not hasattr(self, "cluster_centers_"):
            raise NotFittedError("KMeansRegimes is not fitted; call fit(pcs) first")

    def assign(self, pcs) -> np.ndarray:
        """Nearest centroid of each day, without the persistence filter."""
        self._check_fitted()
        values, _ = _pcs_array(pcs, "KMeansRegimes.assign")
        if values.shape[1] != self.cluster_centers_.shape[1]:
            raise AnalogsInputError(
                f"KMeansRegimes: PCs have {values.shape[1]} modes, the model "
                f"{self.cluster_centers_.shape[1]}")
        distance = ((values[:, None, :] - self.cluster_centers_[None, :, :]) ** 2).sum(-1)
        return np.argmin(distance, axis=1)

    def predict(self, pcs) -> np.ndarray:
        """Regime index of each day (consecutive days), persistence-filtered."""
        import xarray as xr
        times = pd.DatetimeIndex(pcs["time"].values) if isinstance(pcs, xr.DataArray) \
            else None
        return persistence_filter(self.assign(pcs), self.min_persistence, times)

    def to_dataset(self) -> xr.Dataset:
        import xarray as xr
        self._check_fitted()
        return xr.Dataset(
            {"cluster_centers": (("regime", "mode"), self.cluster_centers_,
                                 {"long_name": "k-means centroids in PC space"})},
            coords={"regime": np.arange(self.n_regimes), "mode": np.arange(
                self.cluster_centers_.shape[1])},
            attrs={"model": "KMeansRegimes", "n_regimes": self.n_regimes,
                   "min_persistence": self.min_persistence,
                   "random_state": -1 if self.random_state is None else self.random_state,
                   "analogs_version": __version__,
                   "created": pd.Timestamp.now("UTC").isoformat()})

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "KMeansRegimes":
        if ds.attrs.get("model") != "KMeansRegimes" or "cluster_centers" not in ds:
            raise AnalogsInputError("dataset is not a saved KMeansRegimes (no cluster_centers)")
        seed = int(ds.attrs["random_state"])
        model = cls(int(ds.attrs["n_regimes"]), min_persistence=int(ds.attrs["min_persistence"]),
                    random_state=None if seed < 0 else seed)
        model.cluster_centers_ = np.asarray(ds["cluster_centers"].values, dtype=float).copy()
        return model


def read_labelled_days(table, times, allowed=REGIME_LABELS) -> pd.Series:
    """A labelled-days table (``date,regime``; CSV/Parquet path or DataFrame) as a
    Series indexed by date, checked against the archive days and allowed labels."""
    source = "labelled-days table"
    if isinstance(table, (str, PathLike)):
        path = Path(table)
        source = f"labelled-days file {path}"
        if not path.exists():
            raise AnalogsInputError(f"{source} does not exist")
        # Labels are text: "null" or "NA" is a label, not a missing value (issue 13).
        table = (pd.read_parquet(path) if path.suffix == ".parquet"
                 else pd.read_csv(path, dtype=str, keep_default_na=False))
    if not isinstance(table, pd.DataFrame) or not {"date", "regime"} <= set(table.columns):
        raise AnalogsInputError(f"{source} must have columns date,regime")
    try:
        dates = pd.DatetimeIndex(pd.to_datetime(table["date"])).normalize()
    except (ValueError, TypeError) as exc:
        raise AnalogsInputError(f"{source}: column 'date' is not dates ({exc})") from None
    labels = table["regime"].astype(str).str.strip().to_numpy()
    if (labels == "").any():  # allowed None: any label the researcher chose (issue 13)
        raise AnalogsInputError(f"{source}: empty regime label in {int((labels == '').sum())} row(s)")
    unknown = [] if allowed is None else sorted(set(labels) - set(allowed))
    if unknown:
        raise AnalogsInputError(
            f"{source}: unknown regime label(s) {', '.join(unknown)}; expected one of "
            f"{', '.join(allowed)}")
    archive_days = pd.DatetimeIndex(times).normalize()
    absent = dates[~dates.isin(archive_days)]
    if len(absent):
        shown = ", ".join(str(d.date()) for d in absent[:5])
        more = f" and {len(absent) - 5} more" if len(absent) > 5 else ""
        raise AnalogsInputError(f"{source}: date(s) not in the archive: {shown}{more}")
    return pd.Series(labels, index=dates, name="regime")


class SupervisedRegimes:
    """Supervised regimes: logistic regression on standardised PCs.

    Parameters
    ----------
    C : inverse regularisation strength of ``sklearn.linear_model.LogisticRegression``.
    max_iter : iterations of its lbfgs solver.
    labels : allowed labels of the training table (default :data:`REGIME_LABELS`); None
        accepts the labels of the researcher's own case list, whatever they are (read as
        text: "null" and "NA" are labels). The model predicts the labels it was trained
        on (``classes_``).

    Learned: ``classes_``, ``coef_`` (n_classes or 1, n_modes), ``intercept_``,
    ``mean_`` and ``scale_`` (standardisation of the PCs). ``predict`` and
    ``predict_proba`` use only these arrays: the decision is
    :math:`X_s W^T + b` with :math:`X_s = (X - \\mu)/\\sigma`; softmax over classes
    (multinomial) or the logistic function with two classes, as scikit-learn does.
    """

    def __init__(self, C: float = 1.0, *, max_iter: int = 1000, labels=REGIME_LABELS):
        self.C = C
        self.max_iter = max_iter
        self.labels = labels

    def fit(self, pcs: xr.DataArray, labelled_days) -> "SupervisedRegimes":
        """Fit on the archive PCs (time, mode) and a labelled-days table."""
        from sklearn.linear_model import LogisticRegression

        x, target = self._training_set(pcs, labelled_days, "SupervisedRegimes.fit")
        self.mean_ = x.mean(axis=0)
        self.scale_ = np.where(x.std(axis=0) > 0, x.std(axis=0), 1.0)
        model = LogisticRegression(C=self.C, max_iter=self.max_iter)
        model.fit((x - self.mean_) / self.scale_, target.to_numpy())
        self.classes_ = model.classes_.astype(str)
        self.coef_ = model.coef_.copy()
        self.intercept_ = model.intercept_.copy()
        return self

    def _training_set(self, pcs, labelled_days, owner):
        """(PCs of the labelled days, their labels as a Series indexed by date)."""
        import xarray as xr
        if not isinstance(pcs, xr.DataArray):
            raise AnalogsInputError(
                f"{owner} needs the PCs as a DataArray (time, mode), to match labelled dates")
        values, times = _pcs_array(pcs, owner)
        allowed = None if self.labels is None else tuple(self.labels)
        target = read_labelled_days(labelled_days, times, allowed)
        if target.index.duplicated().any():
            twice = target.index[target.index.duplicated()]
            raise AnalogsInputError(
                f"labelled-days table: date(s) labelled more than once: "
                f"{', '.join(str(d.date()) for d in twice[:5])}")
        rows = pd.DatetimeIndex(times).normalize().get_indexer(target.index)
        if np.unique(target.to_numpy()).size < 2:
            raise AnalogsInputError(
                "labelled-days table: at least two different regimes are needed to train")
        return values[rows], target

    def cross_validate(self, pcs, labelled_days, *, n_splits: int = 5) -> dict:
        """Accuracy of this model on labelled days it was not trained on.

        The labelled days are split into ``n_splits`` folds by calendar year
        (``sklearn.model_selection.GroupKFold`` over years: neighbouring days share a
        weather episode, so a day and its neighbours never sit on both sides), or,
        with labels from a single year, stratified folds
        (``StratifiedKFold``); each fold is predicted by the model (standardised PCs,
        logistic regression with this ``C``) fitted on the others, as
        ``sklearn.model_selection.cross_val_score`` does.

        Returns a dict: ``accuracy`` (mean over folds, NaN when no split is possible),
        ``fold_accuracy`` (list), ``n_labelled``, ``n_splits`` and ``method``.
        """
        from sklearn.linear_model import LogisticRegression
        from sklearn.model_selection import GroupKFold, StratifiedKFold, cross_val_score
        from sklearn.pipeline import make_pipeline
        from sklearn.preprocessing import StandardScaler
        import warnings

        x, target = self._training_set(pcs, labelled_days, "SupervisedRegimes.cross_validate")
        y = target.to_numpy()
        years = target.index.year.to_numpy()
        smallest = int(pd.Series(y).value_counts().min())
        if np.unique(years).size >= 2:
            splits = min(int(n_splits), int(np.unique(years).size))
            splitter, groups = GroupKFold(n_splits=splits), years
            method = f"{splits}-fold cross-validation by calendar year (GroupKFold)"
        elif smallest >= 2:
            splits = min(int(n_splits), smallest)
            splitter, groups = StratifiedKFold(n_splits=splits), None
            method = f"{splits}-fold stratified cross-validation (one year of labels)"
        else:
            return {"accuracy": float("nan"), "fold_accuracy": [], "n_labelled": int(len(y)),
                    "n_splits": 0, "method": "not possible: one year of labels and a label "
                                             "used once"}
        model = make_pipeline(StandardScaler(),
                              LogisticRegression(C=self.C, max_iter=self.max_iter))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a fold whose training days hold one label
            scores = cross_val_score(model, x, y, groups=groups, cv=splitter,
                                     scoring="accuracy", error_score=np.nan)
        finite = scores[np.isfinite(scores)]
        return {"accuracy": float(finite.mean()) if finite.size else float("nan"),
                "fold_accuracy": [float(v) for v in scores], "n_labelled": int(len(y)),
                "n_splits": int(splits), "method": method}

    def _check_fitted(self):
        if not hasattr(self, "coef_"):
            raise NotFittedError("SupervisedRegimes is not fitted; call fit(pcs, table) first")

    def decision_function(self, pcs) -> np.ndarray:
        self._check_fitted()
        values, _ = _pcs_array(pcs, "SupervisedRegimes")
        if values.shape[1] != self.coef_.shape[1]:
            raise AnalogsInputError(
                f"SupervisedRegimes: PCs have {values.shape[1]} modes, the model "
                f"{self.coef_.shape[1]}")
        scores = ((values - self.mean_) / self.scale_) @ self.coef_.T + self.intercept_
        return scores[:, 0] if scores.shape[1] == 1 else scores

    def predict_proba(self, pcs) -> np.ndarray:
        scores = self.decision_function(pcs)
        if scores.ndim == 1:
            p = 1.0 / (1.0 + np.exp(-scores))
            return np.column_stack([1.0 - p, p])
        scores = scores - scores.max(axis=1, keepdims=True)
        expo = np.exp(scores)
        return expo / expo.sum(axis=1, keepdims=True)

    def predict(self, pcs) -> np.ndarray:
        return self.classes_[np.argmax(self.predict_proba(pcs), axis=1)]

    def to_dataset(self) -> xr.Dataset:
        import xarray as xr
        self._check_fitted()
        n_rows = self.coef_.shape[0]
        return xr.Dataset(
            {"coef": (("row", "mode"), self.coef_),
             "intercept": (("row",), self.intercept_),
             "classes": (("class",), self.classes_.astype(str)),
             "mean": (("mode",), self.mean_),
             "scale": (("mode",), self.scale_)},
            coords={"row": np.arange(n_rows), "mode": np.arange(self.coef_.shape[1])},
            attrs={"model": "SupervisedRegimes", "C": float(self.C),
                   "max_iter": int(self.max_iter),
                   "labels": "" if self.labels is None else ",".join(self.labels),
                   "analogs_version": __version__,
                   "created": pd.Timestamp.now("UTC").isoformat()})

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "SupervisedRegimes":
        if ds.attrs.get("model") != "SupervisedRegimes" or "coef" not in ds:
            raise AnalogsInputError("dataset is not a saved SupervisedRegimes (no coef)")
        labels = str(ds.attrs.get("labels", ""))
        model = cls(float(ds.attrs["C"]), max_iter=int(ds.attrs["max_iter"]),
                    labels=tuple(labels.split(",")) if labels else None)
        model.coef_ = np.asarray(ds["coef"].values, float).copy()
        model.intercept_ = np.asarray(ds["intercept"].values, float).copy()
        model.classes_ = np.asarray(ds["classes"].values).astype(str)
        model.mean_ = np.asarray(ds["mean"].values, float).copy()
        model.scale_ = np.asarray(ds["scale"].values, float).copy()
        return model
