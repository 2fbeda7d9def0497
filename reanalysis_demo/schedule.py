"""Day-by-day state of the synthetic weather: episodes, cyclones, waves, red noise.

Everything here is a handful of numbers per day (no grid), so the schedule and
the truth labels do not depend on the grid spacing. The state is carried from
one year to the next (red noise, wave phases, an episode or a cyclone that
straddles the new year), so a year-by-year run equals a whole run.

Processes (each a small function below):

- :func:`summerness` -- the seasonal cycle, 0 in mid-January, 1 in mid-July.
- travelling short waves: four zonal wavenumbers (5-8) moving east at
  8-12 m/s, with red-noise amplitude modulation (:func:`_step_waves`).
- red-noise large-scale anomalies: AR(1) coefficients of a few fixed smooth
  patterns (:func:`_step_red_noise`).
- deep-trough episodes entering at the west edge and moving east at 4.5-7.5
  degrees of longitude a day (about 4-7 m/s), at full depth while their axis
  crosses 113-97 W, filling east of 97 W (:func:`_step_trough`).
- north-west-flow episodes: an amplified plateau ridge with a trough
  downstream, 4-8 days, in the warm season only (:func:`_step_northwest`).
- tropical cyclones born over the southern sea from June to mid-October,
  drifting poleward, some landfalling (they fill over land) and some
  recurving east over the ocean (:func:`_step_cyclones`).

Truth rule (:func:`truth_regime`), with precedence
tropical > strong_trough > northwest_flow > other:

- ``tropical``: a cyclone whose 500 hPa depth is at least 30 gpm has its
  centre within 500 km of the CENTRAL_REGION box (distance 0 inside the box;
  this includes the part of the southern sea north of about 25.5 N).
- ``strong_trough``: a deep trough of at least 100 gpm has its axis between
  113 W and 97 W, i.e. over the western part of the region or just west of
  it, so the region lies in the strong south-westerly flow ahead of the axis.
- ``northwest_flow``: a north-west-flow episode is at full amplitude (not
  on its build-up or break-down day) (ridge over the plateau, trough downstream, flow aloft from
  about 300-340 deg over the region, moisture returning beneath it).
- ``other``: everything else.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from analogs.constants import EARTH_RADIUS

from .geography import CENTRAL_REGION, distance_to_box_km, sea_fraction

#: Zonal wavenumbers of the travelling short waves.
WAVENUMBERS = (5, 6, 7, 8)
#: AR(1) lag-one coefficients (per day) of the large-scale height patterns.
HEIGHT_PATTERN_AR = (0.92, 0.88, 0.84, 0.80, 0.75)
#: AR(1) lag-one coefficients (per day) of the large-scale moisture patterns.
MOISTURE_PATTERN_AR = (0.80, 0.75)

TROPICAL_RADIUS_KM = 500.0
TROPICAL_MIN_DEPTH_GPM = 30.0
TROUGH_AXIS_WINDOW = (-113.0, -97.0)
TROUGH_MIN_DEPTH_GPM = 100.0
NORTHWEST_MIN_FRACTION = 0.5

REGIMES = ("northwest_flow", "tropical", "strong_trough", "other")


def summerness(day_of_year):
    """Seasonal weight: 0 on 15 January, 1 on mid-July, a cosine in between."""
    return 0.5 * (1.0 - np.cos(2.0 * np.pi * (np.asarray(day_of_year) - 15.0) / 365.25))


@dataclass
class Cyclone:
    """One tropical cyclone: centre (deg), 500 hPa depth (gpm), radius of maximum wind (km)."""

    ident: int
    lat: float
    lon: float
    depth: float
    peak_depth: float
    radius_km: float
    recurves: bool
    turn_lat: float
    age: int = 0


@dataclass
class DayState:
    """The scalar description of one day, from which the fields are built."""

    day_of_year: int
    s: float
    wave_phase: np.ndarray
    wave_amp: np.ndarray
    height_noise: np.ndarray
    moisture_noise: np.ndarray
    trough_axis: float
    trough_depth: float
    trough_lat: float
    northwest_amp: float
    northwest_fraction: float
    cyclones: list


@dataclass
class ScheduleState:
    """Everything carried from one day to the next."""

    wave_phase: np.ndarray
    wave_log_amp: np.ndarray
    wave_speed_anom: np.ndarray
    height_noise: np.ndarray
    moisture_noise: np.ndarray
    trough: dict | None = None
    northwest: dict | None = None
    cyclones: list = field(default_factory=list)
    next_cyclone_id: int = 1


def initial_state(rng):
    """A random starting state (random wave phases, stationary red noise)."""
    k = len(WAVENUMBERS)
    return ScheduleState(
        wave_phase=rng.uniform(0.0, 2.0 * np.pi, k),
        wave_log_amp=rng.normal(0.0, 0.3, k),
        wave_speed_anom=rng.normal(0.0, 1.0, k),
        height_noise=rng.normal(0.0, 1.0, len(HEIGHT_PATTERN_AR)),
        moisture_noise=rng.normal(0.0, 1.0, len(MOISTURE_PATTERN_AR)),
    )


def _ar1(value, coeff, rng):
    """One AR(1) step with unit stationary variance: x' = r x + sqrt(1 - r^2) e."""
    coeff = np.asarray(coeff)
    return coeff * value + np.sqrt(1.0 - coeff ** 2) * rng.normal(0.0, 1.0, np.shape(value))


def _step_waves(state, rng, reference_lat=40.0):
    """Advance the short waves one day: phase speed c = 10 +- 1.3 m/s (red noise), kept in 8-12 m/s.

    A wave cos(k lambda - theta) moves east at c when
    :math:`d\\theta/dt = k c / (a \\cos\\phi_0)`.
    """
    state.wave_speed_anom = _ar1(state.wave_speed_anom, 0.95, rng)
    speed = np.clip(10.0 + 1.3 * state.wave_speed_anom, 8.0, 12.0)
    k = np.asarray(WAVENUMBERS, dtype=float)
    state.wave_phase = np.mod(
        state.wave_phase + k * speed * 86400.0 / (EARTH_RADIUS * math.cos(math.radians(reference_lat))),
        2.0 * np.pi)
    state.wave_log_amp = 0.9 * state.wave_log_amp + math.sqrt(1 - 0.81) * rng.normal(0.0, 0.35, k.size)


def _step_red_noise(state, rng):
    """Advance the AR(1) coefficients of the large-scale height and moisture patterns."""
    state.height_noise = _ar1(state.height_noise, HEIGHT_PATTERN_AR, rng)
    state.moisture_noise = _ar1(state.moisture_noise, MOISTURE_PATTERN_AR, rng)


def _trough_start_probability(s):
    """Daily chance that a deep trough enters when none is active: more in the cool season."""
    return 0.095 - 0.03 * s


def _northwest_start_probability(s):
    """Daily chance that a north-west-flow episode starts: warm season only (s >= 0.55, late April to early October)."""
    return 0.3 * s ** 2 if s >= 0.55 else 0.0


def _step_trough(state, rng, s):
    """Advance or start a deep trough; return (axis lon, depth gpm, centre lat).

    A trough enters at 128 W with 40 % of its peak depth (130-240 gpm,
    deeper in the cool season), moves east at 4.5-7.5 degrees a day,
    deepens to its peak as its axis crosses 110-100 W, and fills once the
    axis is east of 95 W; it is dropped east of 68 W.
    """
    trough = state.trough
    if trough is None:
        busy = state.northwest is not None
        if not busy and rng.uniform() < _trough_start_probability(s):
            state.trough = trough = {
                "axis": -128.0,
                "speed": rng.uniform(4.5, 7.5),
                "peak": rng.uniform(170.0, 250.0) - 20.0 * s,
                "lat": 42.0 + rng.uniform(-3.0, 3.0),
            }
        else:
            return math.nan, 0.0, math.nan
    else:
        trough["axis"] += trough["speed"]
        if trough["axis"] > -80.0:
            state.trough = None
            return math.nan, 0.0, math.nan
    axis = trough["axis"]
    if axis < -113.0:
        growth = 0.3 + 0.7 * (axis + 128.0) / 15.0
    elif axis <= -97.0:
        growth = 1.0
    else:
        growth = max(0.1, 1.0 - (axis + 97.0) / 10.0)
    return axis, trough["peak"] * growth, trough["lat"]


def _step_northwest(state, rng, s):
    """Advance or start a north-west-flow episode; return (amplitude gpm, fraction of peak).

    The episode lasts 4-8 days: 30 % of its peak amplitude (130-170 gpm, up to 45 gpm more in
    spring and autumn against stronger westerlies) on
    the first and last day (build-up and break-down), full amplitude in
    between; the amplitude scales the plateau ridge and the downstream trough.
    """
    episode = state.northwest
    if episode is None:
        trough_near = state.trough is not None and state.trough["axis"] < -88.0
        if not trough_near and rng.uniform() < _northwest_start_probability(s):
            state.northwest = episode = {"day": 0, "length": int(rng.integers(4, 9)),
                                         "peak": rng.uniform(130.0, 170.0) + 100.0 * (1.0 - s)}
        else:
            return 0.0, 0.0
    else:
        episode["day"] += 1
        if episode["day"] >= episode["length"]:
            state.northwest = None
            return 0.0, 0.0
    edge = episode["day"] in (0, episode["length"] - 1)
    fraction = 0.3 if edge else 1.0
    return episode["peak"] * fraction, fraction


def _cyclone_genesis_rate(day_of_year):
    """Expected cyclone births per day: 1 June to 15 October, peaking in late August.

    About fourteen a season: a sin^1.5 window from day 152 to day 288.
    """
    if not 152 <= day_of_year <= 288:
        return 0.0
    return 0.165 * math.sin(math.pi * (day_of_year - 152) / 136.0) ** 1.5


def _step_cyclones(state, rng, day_of_year):
    """Move, deepen or fill every cyclone one day and give birth to new ones.

    Births over the southern sea (21-25 N, 97-84 W), radius of maximum wind
    300-500 km, peak depth 40-120 gpm at 500 hPa. Motion per day: north-west
    drift at 2-3 degrees of latitude until the turning latitude; then a
    landfalling cyclone keeps going north (filling by 30 % a day over land)
    while a recurving one turns north-east and accelerates out over the
    eastern ocean. Deepening of 15 gpm a day over water; cyclones older
    than 14 days, weaker than 12 gpm or outside 18-58 N, 135-55 W end.
    """
    survivors = []
    for c in state.cyclones:
        c.age += 1
        if c.lat < c.turn_lat:
            c.lat += rng.uniform(1.8, 2.8)
            c.lon += rng.uniform(-1.5, 0.2)
        elif c.recurves:
            c.lat += rng.uniform(1.5, 2.5)
            c.lon += rng.uniform(3.5, 6.0)
        else:
            c.lat += rng.uniform(2.0, 3.0)
            c.lon += rng.uniform(-0.5, 1.5)
        over_water = float(sea_fraction(c.lat, c.lon)) > 0.5 and c.lat < 34.0
        if over_water:
            c.depth = min(c.peak_depth, c.depth + 15.0)
        else:
            c.depth *= 0.7 if not (c.recurves and c.lat > 33.0) else 0.8
        if c.age <= 14 and c.depth >= 12.0 and 18.0 <= c.lat <= 58.0 and -135.0 <= c.lon <= -55.0:
            survivors.append(c)
    state.cyclones = survivors
    for _ in range(rng.poisson(_cyclone_genesis_rate(day_of_year))):
        recurves = bool(rng.uniform() < 0.4)
        state.cyclones.append(Cyclone(
            ident=state.next_cyclone_id, lat=rng.uniform(21.0, 25.0), lon=rng.uniform(-97.0, -84.0),
            depth=35.0, peak_depth=rng.uniform(40.0, 120.0), radius_km=rng.uniform(300.0, 500.0),
            recurves=recurves, turn_lat=rng.uniform(26.5, 28.5) if recurves else 29.0))
        state.next_cyclone_id += 1


def step_day(state, rng, day_of_year):
    """Advance the schedule by one day and return that day's :class:`DayState`."""
    s = float(summerness(day_of_year))
    _step_waves(state, rng)
    _step_red_noise(state, rng)
    axis, depth, trough_lat = _step_trough(state, rng, s)
    nw_amp, nw_fraction = _step_northwest(state, rng, s)
    _step_cyclones(state, rng, day_of_year)
    cyclones = [(c.ident, c.lat, c.lon, c.depth, c.radius_km) for c in state.cyclones]
    return DayState(
        day_of_year=int(day_of_year), s=s, wave_phase=state.wave_phase.copy(), wave_amp=np.exp(state.wave_log_amp),
        height_noise=state.height_noise.copy(), moisture_noise=state.moisture_noise.copy(),
        trough_axis=axis, trough_depth=depth, trough_lat=trough_lat,
        northwest_amp=nw_amp, northwest_fraction=nw_fraction, cyclones=cyclones)


def truth_row(day, region=CENTRAL_REGION):
    """Truth-table fields of one day: the regime and the cyclone it refers to.

    Applies the rules in the module docstring. The cyclone reported is the
    one nearest the region (the one that made the day tropical, if any).
    """
    regime = "other"
    tc = None
    if day.cyclones:
        dists = [float(distance_to_box_km(c[1], c[2], region)) for c in day.cyclones]
        nearest = int(np.argmin(dists))
        tc = day.cyclones[nearest] + (dists[nearest],)
        near = [(d, c) for d, c in zip(dists, day.cyclones)
                if d <= TROPICAL_RADIUS_KM and c[3] >= TROPICAL_MIN_DEPTH_GPM]
        if near:
            d, c = min(near, key=lambda item: item[0])
            tc = c + (d,)
            regime = "tropical"
    if regime == "other" and day.trough_depth >= TROUGH_MIN_DEPTH_GPM and (
            TROUGH_AXIS_WINDOW[0] <= day.trough_axis <= TROUGH_AXIS_WINDOW[1]):
        regime = "strong_trough"
    if regime == "other" and day.northwest_fraction >= NORTHWEST_MIN_FRACTION:
        regime = "northwest_flow"
    row = {"regime": regime,
           "tc_id": tc[0] if tc else None,
           "tc_lat": round(tc[1], 3) if tc else None,
           "tc_lon": round(tc[2], 3) if tc else None,
           "tc_depth_gpm": round(tc[3], 1) if tc else None,
           "tc_radius_km": round(tc[4], 1) if tc else None,
           "tc_distance_km": round(tc[5], 1) if tc else None,
           "trough_axis_lon": round(day.trough_axis, 3) if day.trough_depth > 0 else None,
           "trough_depth_gpm": round(day.trough_depth, 1) if day.trough_depth > 0 else None,
           "northwest_amplitude_gpm": round(day.northwest_amp, 1)}
    return row
