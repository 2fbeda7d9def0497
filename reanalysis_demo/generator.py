"""Year-by-year generation: fields, truth table and events.

:func:`iter_years` yields one :class:`DemoYear` at a time, with the state
(red noise, wave phases, episodes, cyclones, scouring memory) carried across
the new year; :func:`generate` concatenates it. Each year's random streams are
spawned from (seed, year) (:func:`year_streams`): the schedule (grid independent,
so the truth table and every large-scale anomaly are the same on any grid), the
hidden trigger, the events, and the start state of a run's first year.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from analogs._validation import check_float, check_int
from analogs.errors import AnalogsInputError

from . import heights, moisture, schedule
from .chances import CHANCE_COLUMNS, RegionChances, observed_days
from .events import draw_events, storm_rates
from .geography import DEFAULT_DOMAIN, land_mask, make_grid
from .trigger import HiddenTrigger, trigger_factor

#: Days per block of field computation (bounds memory on fine grids).
BLOCK_DAYS = 32
#: Valid hour of the daily fields, UTC.
VALID_HOUR = 12
EVENT_COLUMNS = ["time", "lat", "lon", "kind", "magnitude"]


@dataclass
class DemoYear:
    """One year: ``fields`` (Dataset zg, hus on (time, lat, lon)), ``truth``, ``events`` and
    ``chances`` DataFrames (:mod:`.chances`: the generator's own chance of a recorded
    report in the box and the point region, and what happened)."""

    year: int
    fields: xr.Dataset
    truth: pd.DataFrame
    events: pd.DataFrame
    chances: pd.DataFrame


@dataclass
class DemoArchive:
    """A whole synthetic archive: ``fields``, ``truth``, ``events`` and ``chances`` as in
    :class:`DemoYear`."""

    fields: xr.Dataset
    truth: pd.DataFrame
    events: pd.DataFrame
    chances: pd.DataFrame


def _check_domain(domain, owner):
    try:
        south, north, west, east = (float(x) for x in domain)
    except (TypeError, ValueError):
        raise AnalogsInputError(
            f"The 'domain' parameter of {owner} must be (south, north, west, east) in degrees. "
            f"Got {domain!r} instead.") from None
    if not (-90.0 <= south < north <= 90.0 and -180.0 <= west < east <= 180.0):
        raise AnalogsInputError(
            f"The 'domain' parameter of {owner} must be (south, north, west, east) with "
            f"-90 <= south < north <= 90 and -180 <= west < east <= 180. Got {domain!r} instead.")
    return south, north, west, east


def check_options(years, start_year, grid, seed, domain, owner):
    """Validate the generator options with the project's message shape; return them cleaned."""
    years = check_int(years, "years", owner, min_value=1, max_value=500)
    start_year = check_int(start_year, "start_year", owner, min_value=1900, max_value=2500)
    grid = check_float(grid, "grid", owner, min_value=0.05, max_value=5.0)
    seed = check_int(seed, "seed", owner, min_value=0)
    domain = _check_domain(domain, owner)
    if (domain[1] - domain[0]) < 2 * grid or (domain[3] - domain[2]) < 2 * grid:
        raise AnalogsInputError(
            f"The 'grid' parameter of {owner} must leave at least 3 points per axis of the domain. "
            f"Got {grid!r} instead.")
    return years, start_year, grid, seed, domain


def _fields_dataset(times, lat, lon, z, q):
    coords = {"time": times, "lat": ("lat", lat, {"units": "degrees_north"}),
              "lon": ("lon", lon, {"units": "degrees_east"})}
    return xr.Dataset(
        {"zg": (("time", "lat", "lon"), z.astype(np.float32),
                {"units": "m", "long_name": "geopotential height at 500 hPa",
                 "standard_name": "geopotential_height"}),
         "hus": (("time", "lat", "lon"), q.astype(np.float32),
                 {"units": "kg kg-1", "long_name": "specific humidity at 850 hPa",
                  "standard_name": "specific_humidity"})},
        coords=coords)


def iter_years(years=10, *, start_year=2001, grid=1.0, seed=0, domain=DEFAULT_DOMAIN):
    """Yield one :class:`DemoYear` per calendar year with continuous state.

    Parameters
    ----------
    years : int, number of calendar years (>= 1).
    start_year : int, first year.
    grid : float, grid spacing in degrees.
    seed : int, seed of every random stream (same seed, same archive).
    domain : (south, north, west, east) degrees, longitudes negative west.
    """
    years, start_year, grid, seed, domain = check_options(
        years, start_year, grid, seed, domain, "iter_years")
    return _iter_years(years, start_year, grid, seed, domain)


def year_streams(seed, year):
    """The random streams of one calendar year: a dict of numpy Generators.

    Spawned from ``SeedSequence(seed, spawn_key=(year,))``, so a year's draws depend only
    on (seed, year), not on the start year of the run: a run of any years is reproducible,
    different years differ, and a demo that starts in 2011 is not 2001 again. ``start``
    draws the state of the first year of a run; later years carry the state of the year
    before (red noise, wave phases, episodes, the hidden trigger), so the same year
    reached from an earlier start has the same draws but not the same weather.
    """
    names = ("schedule", "trigger", "events", "start")
    children = np.random.SeedSequence(seed, spawn_key=(year,)).spawn(len(names))
    return {name: np.random.default_rng(child) for name, child in zip(names, children)}


def _iter_years(years, start_year, grid, seed, domain):
    lat1d, lon1d = make_grid(domain, grid)
    lon, lat = np.meshgrid(lon1d, lat1d)
    land = land_mask(lat, lon)
    height_shapes = heights.pattern_shapes(lat, lon, heights.HEIGHT_PATTERNS)
    moisture_shapes = moisture.moisture_shapes(lat, lon)
    static_dry = moisture.plateau_dryness(lat, lon)
    hidden = HiddenTrigger(lat1d, lon1d)
    region_chances = RegionChances(lat, lon, grid, hidden, seed)
    first = year_streams(seed, start_year)["start"]
    state = schedule.initial_state(first)
    trigger_nodes = hidden.start(first)
    scouring = np.zeros(lat.shape)
    for year in range(start_year, start_year + years):
        streams = year_streams(seed, year)
        times = pd.date_range(f"{year}-01-01 {VALID_HOUR:02d}:00", f"{year}-12-31 {VALID_HOUR:02d}:00", freq="D")
        days = [schedule.step_day(state, streams["schedule"], t.day_of_year) for t in times]
        z_year = np.empty((len(times),) + lat.shape, dtype=np.float32)
        q_year = np.empty_like(z_year)
        event_frames = []
        chance_frames = []
        for start in range(0, len(times), BLOCK_DAYS):
            block = days[start:start + BLOCK_DAYS]
            s = np.array([d.s for d in block])
            z = heights.total_height(lat, lon, block, height_shapes)
            scour_block = np.empty((len(block),) + lat.shape)
            for i, d in enumerate(block):
                kick = moisture.scouring_kick(lat, lon, d.trough_axis, d.trough_depth, d.s)
                scouring = moisture.advance_scouring(scouring, kick, d.s)
                scour_block[i] = scouring
            axis = [d.trough_axis for d in block]
            depth = [d.trough_depth for d in block]
            cyclones = [d.cyclones for d in block]
            dewpoint = (moisture.seasonal_moisture(lat, lon, s) + static_dry
                        + moisture.moisture_return(lat, lon, [d.northwest_amp for d in block], s)
                        + moisture.trough_moisture_surge(lat, lon, axis, depth)
                        - scour_block
                        + moisture.cyclone_moisture(lat, lon, cyclones)
                        + moisture.moisture_red_noise(moisture_shapes, np.stack([d.moisture_noise for d in block])))
            q = moisture.specific_humidity_from_dewpoint(moisture.bounded_dewpoint(dewpoint))
            z32, q32 = z.astype(np.float32), q.astype(np.float32)
            z_year[start:start + len(block)] = z32
            q_year[start:start + len(block)] = q32
            node_days = []
            for _ in block:
                trigger_nodes = hidden.step(trigger_nodes, streams["trigger"])
                node_days.append(trigger_nodes)
            trigger = trigger_factor(hidden.field(np.stack(node_days)))
            rates = storm_rates(z32.astype(float), q32.astype(float), lat, lon, s, land, grid, cyclones)
            block_times = times[start:start + len(block)].values
            events = draw_events(streams["events"], block_times, rates, trigger, lat, lon, grid, year)
            chances = region_chances.daily(rates, trigger, year)
            box_observed, point_observed = observed_days(events, len(block))
            chance_frames.append(pd.DataFrame({
                "box_observed": box_observed, "box_chance": chances["box"][0],
                "box_chance_fields": chances["box"][1], "point_observed": point_observed,
                "point_chance": chances["point"][0], "point_chance_fields": chances["point"][1]}))
            event_frames.append(events)
        south, north, west, east = domain
        events = pd.concat(event_frames, ignore_index=True)
        events["lat"] = events["lat"].clip(south, north)
        events["lon"] = events["lon"].clip(west, east)
        rows = [schedule.truth_row(d) for d in days]
        truth = pd.DataFrame(rows)
        truth.insert(0, "date", times.strftime("%Y-%m-%d"))
        truth["tc_id"] = truth["tc_id"].astype("Int64")
        year_chances = pd.concat(chance_frames, ignore_index=True)
        year_chances.insert(0, "date", times.strftime("%Y-%m-%d"))
        yield DemoYear(year=year, fields=_fields_dataset(times, lat1d, lon1d, z_year, q_year),
                       truth=truth, events=events[EVENT_COLUMNS],
                       chances=year_chances[CHANCE_COLUMNS].round(6))


def generate(years=10, *, start_year=2001, grid=1.0, seed=0, domain=DEFAULT_DOMAIN):
    """Generate the whole archive in memory as a :class:`DemoArchive` (same data as :func:`iter_years`)."""
    years, start_year, grid, seed, domain = check_options(
        years, start_year, grid, seed, domain, "generate")
    parts = list(_iter_years(years, start_year, grid, seed, domain))
    return DemoArchive(
        fields=xr.concat([p.fields for p in parts], dim="time"),
        truth=pd.concat([p.truth for p in parts], ignore_index=True),
        events=pd.concat([p.events for p in parts], ignore_index=True),
        chances=pd.concat([p.chances for p in parts], ignore_index=True))



