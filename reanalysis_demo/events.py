"""Severe-weather events drawn from ingredients computed on the generated fields.

Per grid cell and convective day the expected number of storms is

.. math:: \\lambda\\,T = \\lambda_0\\,\\frac{A}{10^4\\,\\mathrm{km}^2}\\,M\\,S\\,F\\,B\\,\\mathrm{land}\\;T

with T the hidden trigger factor (:mod:`.trigger`, not in the archive),
moisture M (850 hPa dewpoint above about 60 F, 15.6 C), deep-layer
shear S (500 hPa geostrophic wind speed, the surface wind taken as weak),
forcing F (cyclonic vorticity advection by the geostrophic wind, with a
floor: weakly forced days still produce storms) and buoyancy B (moisture
under steep mid-level lapse rates, i.e. air aloft that left the plateau
about 18 h earlier along the 500 hPa flow). Storms occur over land only.
Near tropical cyclones a separate, uncapped tornado storm intensity is the per-point
overlap of low-level shear and buoyancy (:func:`cyclone_tornado_intensity`).

A storm starts at a uniformly random point of its cell and makes 1 + Poisson(2)
reports about 10 km around its start (sub-grid initiation); each is recorded with the reporting
efficiency of :mod:`.reporting` (towns, roads, growth by kind and year).

Kinds (one per storm): tornado, hail or wind with weights that follow the ingredients
(tornadoes with shear, moisture and forcing; hail with steep lapse rates and
shear; wind with buoyancy). Magnitudes: tornado EF rating 0-5, hail diameter
in cm (>= 2.5), wind gust in m/s (>= 26). Times fall in the convective day,
12 UTC on D to 12 UTC on D+1, peaking near 22 UTC (late afternoon).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from analogs.constants import CONVECTIVE_DAY_START_HOUR, EARTH_RADIUS, G0, OMEGA, SEVERE_DEWPOINT_C
from analogs.geo import great_circle_km, spherical_gradient

from . import reporting
from .geography import logistic, cell_area_km2, plateau_fraction
from .heights import geostrophic_wind, relative_vorticity
from .moisture import dewpoint_from_specific_humidity

#: Storms per 10^4 km2 per day when every ingredient is fully present and the cap breaks.
BASE_RATE = 5.0
#: Tropical-cyclone tornado storms per 10^4 km2 per day at full overlap of shear and buoyancy.
CYCLONE_TORNADO_RATE = 0.3
#: Back-trajectory time (s) for the plateau (steep lapse rate) air.
PLUME_TRAVEL_S = 18 * 3600.0
KINDS = ("tornado", "hail", "wind")


def moisture_factor(dewpoint_c):
    """0-1 ramp centred on the 60 F (15.6 C) dewpoint, 1.2 C wide (common practice, no source)."""
    return logistic((dewpoint_c - SEVERE_DEWPOINT_C) / 1.2)


def shear_factor(speed):
    """0-1 ramp of deep-layer shear centred on 14 m/s, 3 m/s wide (organised storms above ~15 m/s; common practice)."""
    return logistic((speed - 14.0) / 3.0)


def forcing_factor(vorticity_advection):
    """Forcing from cyclonic vorticity advection (s-2): 0.2 floor, ramp centred on 5e-10 s-2."""
    return 0.2 + 0.8 * logistic((vorticity_advection - 5e-10) / 3e-10)


def plateau_plume(lat, lon, u, v):
    """Fraction of plateau air aloft: the plateau fraction at the 18-h back-trajectory point.

    One semi-Lagrangian step along the 500 hPa geostrophic wind: departure
    point :math:`(\\phi - v\\Delta t/a, \\lambda - u\\Delta t/(a\\cos\\phi))`.
    Air that crossed the high plateau carries steep mid-level lapse rates
    (an elevated mixed layer; common practice, no source).
    """
    dlat = np.degrees(v * PLUME_TRAVEL_S / EARTH_RADIUS)
    dlon = np.degrees(u * PLUME_TRAVEL_S / (EARTH_RADIUS * np.cos(np.radians(lat))))
    return plateau_fraction(lat - dlat, lon - dlon)


def buoyancy_factor(dewpoint_c, plume, s):
    """Buoyancy: moisture amount under steep lapse rates, larger in the warm season.

    :math:`B = \\mathrm{clip}((T_d - 8)/10, 0, 1.4)\\,(0.3 + 0.7 P)\\,(0.4 + 0.6 s)`.
    """
    return np.clip((dewpoint_c - 8.0) / 10.0, 0.0, 1.4) * (0.3 + 0.7 * plume) * (0.4 + 0.6 * s)


def ingredients(height, q, lat, lon, s):
    """Ingredients on the fields: dict of arrays (ndays, nlat, nlon).

    ``dewpoint`` (C), ``speed`` (m/s), ``vort_adv`` (s-2, positive cyclonic),
    ``plume`` (0-1), ``moisture``, ``shear``, ``forcing``, ``buoyancy`` (factors).
    """
    lat1d, lon1d = lat[:, 0], lon[0]
    u, v = geostrophic_wind(height, lat1d, lon1d)
    zeta = relative_vorticity(u, v, lat1d, lon1d)
    dzeta_dx, dzeta_dy = spherical_gradient(zeta, lat1d, lon1d)
    vort_adv = -(u * dzeta_dx + v * dzeta_dy)
    dewpoint = dewpoint_from_specific_humidity(q)
    plume = plateau_plume(lat, lon, u, v)
    speed = np.hypot(u, v)
    s = np.asarray(s)[:, None, None]
    return {"dewpoint": dewpoint, "speed": speed, "vort_adv": vort_adv, "plume": plume,
            "moisture": moisture_factor(dewpoint), "shear": shear_factor(speed),
            "forcing": forcing_factor(vort_adv), "buoyancy": buoyancy_factor(dewpoint, plume, s)}


def cyclone_tornado_intensity(lat, lon, q, cyclone):
    """Tornado intensity factor (0-1) around one cyclone from its low-level environment.

    A low-level (850 hPa) height model: the cyclone, 1.3 times its 500 hPa
    depth, plus inland high pressure (+25 gpm) on its poleward side over the
    continent; its geostrophic wind gives the low-level shear (the surface
    wind taken as weak), strongest on the poleward side where the two
    gradients add. Buoyancy comes from the poleward moisture flux q v, which
    is largest on the eastward side. The intensity is the product of the two
    ramps, computed point by point; no quadrant is imposed (McCaul 1991,
    from memory).
    """
    _, c_lat, c_lon, depth, radius = cyclone
    r = great_circle_km(lat, lon, c_lat, c_lon)
    low = -1.3 * depth * np.exp(-0.5 * (r / (0.9 * radius)) ** 2)
    inland_high = 25.0 * logistic((lat - c_lat - 4.0) / 2.0) * np.exp(-0.5 * (r / 1200.0) ** 2)
    z850 = low + inland_high
    lat1d, lon1d = lat[:, 0], lon[0]
    dz_dx, dz_dy = spherical_gradient(z850, lat1d, lon1d)
    f = 2.0 * OMEGA * np.sin(np.radians(lat))
    u = -G0 / f * dz_dy
    v = G0 / f * dz_dx
    low_level_shear = logistic((np.hypot(u, v) - 15.0) / 4.0)
    poleward_flux = q * v
    low_level_buoyancy = logistic((poleward_flux - 0.12) / 0.04)
    return low_level_shear * low_level_buoyancy


def kind_weights(ing):
    """Unnormalised weights (3, ...) of tornado, hail and wind reports from the ingredients."""
    tornado = 0.08 * ing["shear"] * ing["moisture"] * (ing["forcing"] - 0.1)
    hail = 0.45 * (0.3 + ing["plume"]) * (0.3 + ing["shear"])
    wind = 0.5 * ing["buoyancy"] * (1.2 - 0.5 * ing["shear"]) + 0.1
    return np.stack([tornado, hail, wind])


def _format_times(day_starts, hours):
    stamps = day_starts + pd.to_timedelta(np.round(hours * 60.0), unit="min")
    return stamps.strftime("%Y-%m-%dT%H:%M:%SZ")


def storm_rates(height, q, lat, lon, s, land, grid, cyclones_by_day):
    """Storm intensities of a block of days before the hidden trigger.

    Returns a dict of arrays (ndays, nlat, nlon): ``general`` (storms per cell-day where
    the cap breaks everywhere), ``cyclone`` (tropical-cyclone tornado storms per cell-day,
    not capped), ``kind_probs`` (3, ndays, nlat, nlon: tornado, hail, wind shares of the
    general storms) and the ``ingredients``.
    """
    ing = ingredients(height, q, lat, lon, s)
    area = cell_area_km2(lat, grid) / 1e4
    general = BASE_RATE * area * ing["moisture"] * ing["shear"] * ing["forcing"] * ing["buoyancy"] * land
    cyclone = np.zeros_like(general)
    for i, cyclones in enumerate(cyclones_by_day):
        for one in cyclones:
            cyclone[i] += CYCLONE_TORNADO_RATE * area * land * cyclone_tornado_intensity(lat, lon, q[i], one)
    weights = kind_weights(ing)
    return {"general": general, "cyclone": cyclone, "kind_probs": weights / weights.sum(axis=0),
            "ingredients": ing}


def draw_events(rng, times, rates, trigger, lat, lon, grid, year):
    """Storms, their reports and which reports are recorded, for a block of days.

    Storms are Poisson in each cell with mean ``rates["general"] * trigger`` (plus the
    uncapped cyclone tornado storms) and start at a uniformly random point of their cell
    (sub-grid initiation). Each makes 1 + Poisson(1) reports scattered about 10 km around
    its start, each recorded with the reporting efficiency of its kind, year and place
    (:mod:`.reporting`). Returns the recorded reports with a ``day`` column (index of the
    day in the block).
    """
    ing = rates["ingredients"]
    frames = []
    for intensity, from_cyclone in ((rates["general"] * trigger, False), (rates["cyclone"], True)):
        counts = rng.poisson(intensity)
        idx = np.nonzero(counts)
        d, j, k = (np.repeat(a, counts[idx]) for a in idx)
        n_storms = d.size
        if n_storms == 0:
            continue
        if from_cyclone:
            kind = np.zeros(n_storms, dtype=int)
        else:
            cum = np.cumsum(rates["kind_probs"][:, d, j, k], axis=0)
            kind = (rng.uniform(size=n_storms)[None] > cum).sum(axis=0).clip(0, 2)
        start_lat = lat[j, k] + rng.uniform(-0.5, 0.5, n_storms) * grid
        start_lon = lon[j, k] + rng.uniform(-0.5, 0.5, n_storms) * grid
        start_hour = rng.normal(10.0, 3.5, n_storms)
        per_storm = 1 + rng.poisson(reporting.REPORTS_PER_STORM_EXTRA, n_storms)
        storm = np.repeat(np.arange(n_storms), per_storm)
        n = storm.size
        d, j, k, kind = d[storm], j[storm], k[storm], kind[storm]
        scatter_deg = reporting.REPORT_SCATTER_KM / 111.195
        rep_lat = start_lat[storm] + rng.normal(0.0, scatter_deg, n)
        rep_lon = start_lon[storm] + rng.normal(0.0, scatter_deg, n) / np.cos(np.radians(rep_lat))
        hours = np.clip(start_hour[storm] + rng.uniform(0.0, 1.5, n), 0.05, 23.95)
        shear = ing["shear"][d, j, k]
        plume = ing["plume"][d, j, k]
        magnitude = np.where(
            kind == 0, np.minimum(rng.geometric(0.65 - 0.25 * shear) - 1, 5),
            np.where(kind == 1, 2.5 + np.round(2.0 * rng.exponential(1.0 + plume)) / 2.0,
                     np.round(26.0 + rng.exponential(4.0))))
        point_access = reporting.access(rep_lat, rep_lon)
        chance = np.empty(n)
        for code, name in enumerate(KINDS):
            mine = kind == code
            chance[mine] = reporting.efficiency(name, year, point_access[mine])
        kept = rng.uniform(size=n) < chance
        day_starts = pd.DatetimeIndex(times[d[kept]]).normalize() + pd.Timedelta(hours=CONVECTIVE_DAY_START_HOUR)
        frames.append(pd.DataFrame({
            "time": _format_times(day_starts, hours[kept]),
            "lat": np.round(rep_lat[kept], 3),
            "lon": np.round(rep_lon[kept], 3),
            "kind": np.asarray(KINDS)[kind[kept]],
            "magnitude": magnitude[kept].astype(float),
            "day": d[kept],
        }))
    if not frames:
        return pd.DataFrame({"time": [], "lat": [], "lon": [], "kind": [], "magnitude": [],
                             "day": np.array([], dtype=int)})
    events = pd.concat(frames, ignore_index=True).sort_values(["time", "lat", "lon"], kind="stable")
    return events.reset_index(drop=True)
