"""The generator's own chances of a recorded report in a region, and its best attainable skill.

For a region R and a day, the expected number of storms that give at least one recorded
report in R is

.. math:: \\Lambda_R = \\sum_{cells} \\Big[\\lambda\\,T \\sum_k p_k\\,G_{k,R} + \\lambda_{tc}\\,G_{tornado,R}\\Big]

with :math:`\\lambda` the storm intensity before the trigger, ``T`` the hidden trigger
factor, :math:`p_k` the kind shares, :math:`\\lambda_{tc}` the cyclone tornado storms and
:math:`G_{k,R}` the cell mean, over a 6 x 6 grid of starting points, of
(start in R) x P(storm recorded at least once) (:func:`.reporting.storm_recorded_chance`
at the starting point). Storms are Poisson, so P(at least one recorded report in R) is
:math:`1 - e^{-\\Lambda_R}`. Two versions are written per day:

- ``*_chance``: given the generator's whole state, hidden trigger included -- the best
  any forecaster could do;
- ``*_chance_fields``: given only what the archive shows (the fields), the trigger
  averaged over its stationary law by Monte Carlo (64 draws of the hidden field).

Approximations: the region test and the recording chance are taken at the storm's start,
so the scatter of its reports (about 10 km) is neglected at the region's edge.

:func:`best_attainable_skill` scores these chances with the Brier skill score against the
same reference as ``analogs verify``: the frequency of report days in the other years
within 45 calendar days of the day.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from analogs.geo import great_circle_km
from analogs.stages.scores import brier_skill_score

from . import reporting
from .events import KINDS
from .geography import CENTRAL_REGION
from .trigger import trigger_factor

#: The demo's point region: the invented town of Harrow Ford with a 40 km radius (lat, lon, km).
POINT_TOWN = "Harrow Ford"
POINT_REGION = (*reporting.town(POINT_TOWN), 40.0)
#: Starting points per cell side for the region and recording means.
SUBCELL = 6
#: Draws of the hidden field for the fields-only chance.
FIELD_ONLY_DRAWS = 64
#: Season window (calendar days) of the climatology reference, as ``analogs verify``'s default.
REFERENCE_WINDOW_DAYS = 45
CHANCE_COLUMNS = ["date", "box_observed", "box_chance", "box_chance_fields",
                  "point_observed", "point_chance", "point_chance_fields"]


def in_box(lat, lon, box=CENTRAL_REGION):
    south, north, west, east = box
    return (lat >= south) & (lat <= north) & (lon >= west) & (lon <= east)


def in_point(lat, lon, point=POINT_REGION):
    p_lat, p_lon, radius_km = point
    return great_circle_km(lat, lon, p_lat, p_lon) <= radius_km


class RegionChances:
    """Static per-cell pieces of the chances for the box and the point region on one grid."""

    def __init__(self, lat, lon, grid, hidden, seed):
        offsets = ((np.arange(SUBCELL) + 0.5) / SUBCELL - 0.5) * grid
        sample_lat = (lat[..., None, None] + offsets[:, None]).reshape(lat.shape + (-1,))
        sample_lon = (lon[..., None, None] + offsets[None, :]).reshape(lon.shape + (-1,))
        sample_lat, sample_lon = np.broadcast_arrays(sample_lat, sample_lon)
        self.access = reporting.access(sample_lat, sample_lon)
        self.regions = {}
        draws = np.random.default_rng([seed, 7]).normal(size=(FIELD_ONLY_DRAWS,) + hidden.node_shape)
        for name, inside in (("box", in_box(sample_lat, sample_lon)),
                             ("point", in_point(sample_lat, sample_lon))):
            cells = np.nonzero(inside.any(axis=-1).ravel())[0]
            flat_inside = inside.reshape(-1, inside.shape[-1])[cells]
            triggers = trigger_factor(hidden.field(draws)).reshape(FIELD_ONLY_DRAWS, -1)[:, cells]
            self.regions[name] = {"cells": cells, "inside": flat_inside, "triggers": triggers}
        self.year = None

    def _set_year(self, year):
        if year == self.year:
            return
        flat_access = self.access.reshape(-1, self.access.shape[-1])
        for region in self.regions.values():
            access = flat_access[region["cells"]]
            region["recorded"] = np.stack([
                (reporting.storm_recorded_chance(reporting.efficiency(kind, year, access))
                 * region["inside"]).mean(axis=-1) for kind in KINDS])
        self.year = year

    def daily(self, rates, trigger, year):
        """Per-day chances of the block: dict name -> (chance, chance_fields)."""
        self._set_year(year)
        n_days = trigger.shape[0]
        general = rates["general"].reshape(n_days, -1)
        cyclone = rates["cyclone"].reshape(n_days, -1)
        probs = rates["kind_probs"].reshape(len(KINDS), n_days, -1)
        flat_trigger = trigger.reshape(n_days, -1)
        out = {}
        for name, region in self.regions.items():
            cells, recorded = region["cells"], region["recorded"]
            per_storm = (probs[:, :, cells] * recorded[:, None, :]).sum(axis=0)
            uncapped = general[:, cells] * per_storm
            tropical = (cyclone[:, cells] * recorded[0]).sum(axis=1)
            full = (uncapped * flat_trigger[:, cells]).sum(axis=1) + tropical
            fields_only = uncapped @ region["triggers"].T + tropical[:, None]
            out[name] = (-np.expm1(-full), (-np.expm1(-fields_only)).mean(axis=1))
        return out


def observed_days(events, n_days):
    """(box, point) 0/1 per day of the block from recorded reports with a ``day`` column."""
    box = np.zeros(n_days, dtype=int)
    point = np.zeros(n_days, dtype=int)
    lat, lon, day = (events[c].to_numpy() for c in ("lat", "lon", "day"))
    box[day[in_box(lat, lon)].astype(int)] = 1
    point[day[in_point(lat, lon)].astype(int)] = 1
    return box, point


def season_climatology(dates, observed, window=REFERENCE_WINDOW_DAYS):
    """Frequency of report days in the other years within ``window`` calendar days."""
    dates = pd.DatetimeIndex(dates)
    years = dates.year.to_numpy()
    doy = dates.day_of_year.to_numpy() - 1
    observed = np.asarray(observed, dtype=float)
    unique_years = np.unique(years)
    row = np.searchsorted(unique_years, years)
    events = np.zeros((unique_years.size, 366))
    totals = np.zeros((unique_years.size, 366))
    np.add.at(events, (row, doy), observed)
    np.add.at(totals, (row, doy), 1.0)
    gap = np.abs(np.arange(366)[:, None] - np.arange(366)[None])
    near = (np.minimum(gap, 366 - gap) <= window).astype(float)
    window_events = events @ near
    window_totals = totals @ near
    other_events = window_events.sum(axis=0)[doy] - window_events[row, doy]
    other_totals = window_totals.sum(axis=0)[doy] - window_totals[row, doy]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(other_totals > 0, other_events / other_totals, np.nan)


def best_attainable_skill(chances: pd.DataFrame) -> dict:
    """Base rates and Brier skill scores of the generator's own chances (box and point).

    The reference is :func:`season_climatology`; with one year only there is no other
    year, and with no report day at all nothing to score: the scores are then None.
    """
    summary = {}
    for name in ("box", "point"):
        observed = chances[f"{name}_observed"].to_numpy()
        reference = season_climatology(chances["date"], observed)
        ok = np.isfinite(reference)
        scorable = ok.any() and 0 < observed[ok].sum()
        summary[name] = {"base_rate": round(float(observed.mean()), 4)}
        for key, column in (("bss_full_state", "chance"), ("bss_fields_only", "chance_fields")):
            forecast = chances[f"{name}_{column}"].to_numpy()[ok]
            summary[name][key] = (round(float(brier_skill_score(forecast, observed[ok], reference[ok])), 3)
                                  if scorable else None)
    return summary
