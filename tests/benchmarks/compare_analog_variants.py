"""Analog probability variants against logistic regression, on the same year folds.

Measures (issue 16), for a store's region (box) and a point region, the Brier skill score
against the season climatology, with its 90% year-bootstrap interval, of:

- the analog frequency for several numbers of analogs and of EOF modes (equal weights);
- distance weights over the analogs: Gaussian (bandwidth the median distance), Gaussian
  (half the k-th distance), inverse distance, tricube (Cleveland 1979, from memory);
- area-focused distances: the EOF-space metric weighted toward the region,
  d^2 = dPC^T (E diag(c) E^T) dPC with E the EOFs in the weighted, balanced space and c
  the grid-cell weights floor + exp(-r^2 / 2L^2), r the distance of the cell from the
  region (0 inside a box);
- the analog frequency combined with the seasonal cycle or the climatology, and alone
  recalibrated (Platt scaling), by a logistic regression fitted inside the folds: for a
  held-out year Y it is fitted on the forecasts of the other years made WITHOUT Y (no
  day of Y is a target or an analog of them: HeldOutNeighbours with Y dropped), then
  applied to Y's forecasts;
- predictor weighting of the EOF space (Delle Monache et al. 2013): each PC scaled by
  the |coefficient| (per standard deviation, to a power) of a logistic regression of the
  event on the standardised PCs plus two annual harmonics, fitted on the other years
  only (nested: no day of the held-out year), optionally with the regression's PC score
  as one more coordinate; equal or Gaussian weights over 20 to 100 analogs. The shipped
  form (``--metric event_weighted``, analogs.stages.predictor_weights) is measured
  through leave_one_year_out itself;
- the baselines: logistic regression on the same PCs plus two annual harmonics
  (scikit-learn, the same folds; verify's baseline), random analogs and the season
  climatology.

Beside each BSS: its paired differences from the regression and from the default
analogs, BSS(variant) - BSS(other) on the same days with both resampled by the same
years (the comparison that the two separate intervals cannot make).

Every variant uses the leave-one-year-out folds of `analogs verify` (one neighbour search:
stages.hindcast.HeldOutNeighbours, tested equal to leave_one_year_out).

Run:  python tests/benchmarks/compare_analog_variants.py STORE [--point LAT,LON,KM]
          [--resamples 300] [--json OUT.json] [--weighted-only]
Prints one table per region, best first.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import pandas as pd

WEIGHTED_ONLY = False
#: Predictor-weight fits measured: (power of |beta|, floor as a share of the largest,
#: regression C, weight of the regression's score as one more coordinate).
WEIGHT_FITS = ((0.5, 0.0, 1.0, 0.0), (1.0, 0.0, 1.0, 0.0), (1.0, 0.0, 0.1, 0.0),
               (1.0, 0.0, 1.0, 1.0), (1.0, 0.0, 1.0, 10.0), (0.5, 0.0, 1.0, 10.0),
               (0.0, 0.0, 1.0, 100.0))


def _logit(p, n):
    """Logit of an analog frequency shrunk by half an event (finite at 0 and 1)."""
    q = (np.asarray(p) * n + 0.5) / (n + 1)
    return np.log(q / (1 - q))


def weighted_frequencies(neighbours, n_modes, top, scheme, drop_year=None) -> pd.DataFrame:
    """A hindcast frame (as leave_one_year_out) whose forecast is the weighted share of
    the ``top`` analogs with the event."""
    targets, rows, distance = neighbours.analogs(n_modes, drop_year)
    rows, distance = rows[:, :top], distance[:, :top]
    found = rows >= 0
    hit = np.where(found, neighbours.observed[np.maximum(rows, 0)], 0).astype(float)
    d = np.where(found, distance, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        median = np.nanmedian(d, axis=1, keepdims=True)
        kth = np.nanmax(d, axis=1, keepdims=True)
        weights = {
            "equal": found.astype(float),
            "gaussian": np.exp(-0.5 * (d / median) ** 2),
            "gaussian_k": np.exp(-0.5 * (d / (0.5 * kth)) ** 2),
            "inverse": 1 / (d + 0.1 * median),
            "tricube": (1 - (d / (kth * 1.0001)) ** 3) ** 3,
        }[scheme]
        weights = np.where(found, weights, 0)
        forecast = (weights * hit).sum(1) / weights.sum(1)
    climatology = neighbours.climatology(drop_year)
    chosen = neighbours.targets[targets]
    ok = np.isfinite(forecast) & np.isfinite(climatology)
    return pd.DataFrame({"time": neighbours.times[chosen[ok]],
                         "year": neighbours.years[chosen[ok]], "forecast": forecast[ok],
                         "observed": neighbours.observed[chosen[ok]].astype(int),
                         "climatology": climatology[ok], "n_analogs": found.sum(1)[ok]})


def fitted_in_folds(neighbours, n_modes, top, scheme, inputs) -> pd.DataFrame:
    """Outer forecasts of each year from a logistic regression fitted on the forecasts of
    the other years made without that year."""
    from sklearn.linear_model import LogisticRegression
    outer = weighted_frequencies(neighbours, n_modes, top, scheme)
    result = outer.copy()
    for year in np.unique(outer["year"]):
        train = weighted_frequencies(neighbours, n_modes, top, scheme, drop_year=year)
        model = LogisticRegression(max_iter=2000).fit(inputs(train, top), train["observed"])
        test = (outer["year"] == year).to_numpy()
        result.loc[test, "forecast"] = model.predict_proba(inputs(outer[test], top))[:, 1]
    return result


def _platt(frame, top):
    return _logit(frame["forecast"], top)[:, None]


def _seasonal(frame, top):
    from analogs.stages.hindcast import seasonal_harmonics
    return np.column_stack([_logit(frame["forecast"], top),
                            seasonal_harmonics(pd.DatetimeIndex(frame["time"]))])


def _with_climatology(frame, top):
    return np.column_stack([_logit(frame["forecast"], top), _logit(frame["climatology"], 200)])


def area_focused_pcs(store, region, floor, length_km):
    """PCs whose Euclidean distances are those of the anomaly fields with each grid cell
    weighted by floor + exp(-r^2 / 2 L^2) (r: km from the region): PCs @ chol(E C E^T)."""
    from analogs.geo import great_circle_km
    eofs = store.eof.eofs_
    lat, lon = np.meshgrid(eofs["lat"].values, eofs["lon"].values, indexing="ij")
    spec = region.to_dict()
    if spec["kind"] == "box":
        inside = region.contains(lat.ravel(), lon.ravel()).reshape(lat.shape)
        centre = ((spec["south"] + spec["north"]) / 2, (spec["west"] + spec["east"]) / 2)
    else:
        inside, centre = np.zeros(lat.shape, dtype=bool), (spec["lat"], spec["lon"])
    distance = np.where(inside, 0.0, great_circle_km(centre[0], centre[1], lat, lon))
    cells = floor + np.exp(-0.5 * (distance / length_km) ** 2)
    patterns = np.concatenate([np.nan_to_num(eofs[v].values).reshape(eofs.sizes["mode"], -1)
                               for v in eofs.data_vars], axis=1)
    metric = (patterns * np.tile(cells.ravel(), len(eofs.data_vars))) @ patterns.T
    return store.pcs.values @ np.linalg.cholesky(metric)


def regression_weights(pcs, times, observed, power=1.0, floor=0.0, C=1.0, score=0.0):
    """Per-PC scale factors from a logistic regression of the event on the standardised
    PCs plus two annual harmonics (the analog ensemble's predictor weighting, Delle
    Monache et al. 2013): w_j = max(|beta_j|, floor * max|beta|) ** power / sd_j, so the
    Euclidean distance of the scaled PCs weights each standardised PC by its coefficient."""
    from sklearn.linear_model import LogisticRegression

    from analogs.stages.hindcast import seasonal_harmonics
    pcs = np.asarray(pcs, dtype=float)
    sd = pcs.std(axis=0)
    inputs = np.column_stack([pcs / sd, seasonal_harmonics(times)])
    model = LogisticRegression(C=C, max_iter=2000).fit(inputs, observed)
    signed = model.coef_[0, :pcs.shape[1]]
    beta = np.maximum(np.abs(signed), floor * np.abs(signed).max())
    scale = np.diag(beta ** power / sd)
    if score:  # one more coordinate: the regression's PC score, weighted by sqrt(score)
        scale = np.column_stack([scale, np.sqrt(score) * signed / sd])
    return scale


def weighted_space_frequencies(pcs, times, observed, default, top, scheme, fit, cache):
    """A hindcast frame (days and climatology of ``default``) whose forecast for each
    year Y is the ``scheme``-weighted share of the ``top`` analogs found in the PC space
    scaled by weights fitted (``fit``) on the other years only (nested: no day of Y)."""
    from analogs.stages.hindcast import held_out_analogs
    key = fit
    if key not in cache:
        power, floor, C, score = fit
        years = times.year.to_numpy()
        parts = []
        for year in np.unique(years):
            train = years != year
            scale = regression_weights(pcs[train], times[train], observed[train],
                                       power=power, floor=floor, C=C, score=score)
            parts.append(held_out_analogs(pcs @ scale, times, rows=np.flatnonzero(~train),
                                          top=100))
        cache[key] = pd.concat(parts, ignore_index=True)
    table = cache[key]
    table = table[table["rank"] <= top]
    distance = table["distance"].to_numpy()
    grouped = table.groupby("target")["distance"]
    median = grouped.transform("median").to_numpy()
    kth = grouped.transform("max").to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        weight = {"equal": np.ones_like(distance),
                  "gaussian": np.exp(-0.5 * (distance / median) ** 2),
                  "tricube": (1 - (distance / (kth * 1.0001)) ** 3) ** 3}[scheme]
    hit = observed[table["row"].to_numpy()].astype(float)
    frame = pd.DataFrame({"target": table["target"], "w": weight, "wh": weight * hit})
    sums = frame.groupby("target")[["w", "wh"]].sum()
    forecast = pd.Series((sums["wh"] / sums["w"]).to_numpy(), index=times[sums.index])
    result = default.copy()
    result["forecast"] = forecast.reindex(pd.DatetimeIndex(default["time"])).to_numpy()
    return result[np.isfinite(result["forecast"])]


def compare(store, region, name, n_resamples):
    from analogs.stages.hindcast import (HeldOutNeighbours, leave_one_year_out,
                                         logistic_hindcast, score_hindcast)
    from analogs.workflows.skill import hindcast_days
    all_modes = int(store.eof.n_modes_)

    frames = []

    def scored(frame):
        frames.append(frame)
        s = score_hindcast(frame, n_resamples=n_resamples)
        return [s["brier_skill_score"], *s["brier_skill_score_ci"], len(frames) - 1]

    pcs, times, observed = hindcast_days(store, store.observed(region), region=region)
    started = time.perf_counter()
    neighbours = HeldOutNeighbours(pcs, times, observed, modes=(5, 10, 15, all_modes), top=50,
                                   drop_years=True)
    default = weighted_frequencies(neighbours, all_modes, 20, "equal")
    table = {
        "analogs 20, all modes, equal (default)": scored(default),
        "logistic regression, PCs + 2 harmonics": scored(
            logistic_hindcast(pcs, times, observed, default, n_modes=all_modes)),
        "season climatology": scored(default.assign(forecast=default["climatology"])),
        "random analogs 20 (verify's baseline)": scored(_on_days(leave_one_year_out(
            pcs, times, observed, method="random"), default)),
    }
    # The shipped option (analogs --metric event_weighted), through the hindcast itself.
    for top in (20, 50):
        table[f"analogs {top}, --metric event_weighted (leave_one_year_out)"] = scored(
            _on_days(leave_one_year_out(pcs, times, observed, top=top,
                                        metric="event_weighted"), default))
    for modes in (() if WEIGHTED_ONLY else (5, 10, 15)) + (all_modes,):
        for top in (10, 20, 30, 50):
            table[f"analogs {top}, {modes} modes, equal"] = scored(
                weighted_frequencies(neighbours, modes, top, "equal"))
    for scheme in ("gaussian", "gaussian_k", "inverse", "tricube"):
        for top in (20, 50):
            if WEIGHTED_ONLY and scheme != "tricube":
                continue
            table[f"analogs {top}, all modes, {scheme} weights"] = scored(
                weighted_frequencies(neighbours, all_modes, top, scheme))
    for top in (() if WEIGHTED_ONLY else (20, 50)):
        table[f"analogs {top} + Platt calibration in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _platt))
        table[f"analogs {top} + seasonal harmonics in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _seasonal))
        table[f"analogs {top} + climatology blend in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _with_climatology))
        table[f"analogs {top} tricube + seasonal harmonics in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "tricube", _seasonal))
    cache = {}
    for fit in WEIGHT_FITS:
        for top in (20, 30, 50, 75, 100):
            for scheme in ("equal", "gaussian"):
                label = (f"analogs {top}, PCs weighted by in-fold regression |beta|^{fit[0]:g}"
                         f" (floor {fit[1]:g}, C {fit[2]:g}, score {fit[3]:g}), {scheme}")
                table[label] = scored(weighted_space_frequencies(
                    pcs, times, observed, default, top, scheme, fit, cache))
    if WEIGHTED_ONLY:
        return finished(name, observed, started, table, frames, n_resamples)
    for floor, length in ((0.05, 600), (0.1, 1000), (0.3, 1500)):
        focused = area_focused_pcs(store, region, floor, length)[store.covered]
        near = HeldOutNeighbours(focused, times, observed, modes=(all_modes,), top=50,
                                 drop_years=True)
        for top in (20, 50):
            label = f"area-focused (floor {floor}, {length} km), {top}"
            table[label] = scored(weighted_frequencies(near, all_modes, top, "equal"))
            table[label + " + seasonal harmonics in folds"] = scored(
                fitted_in_folds(near, all_modes, top, "equal", _seasonal))
    return finished(name, observed, started, table, frames, n_resamples)


def _on_days(frame, default):
    """``frame`` on the days of ``default`` (the same forecast days for every variant)."""
    return frame[frame["time"].isin(default["time"])].reset_index(drop=True)


def paired_difference(frame, other, n_resamples):
    """BSS(frame) - BSS(other) on their common days, with its 90% year-bootstrap interval
    (both forecasts resampled together: the paired comparison)."""
    from analogs.stages.scores import bootstrap_interval, brier_skill_score
    both = frame.merge(other[["time", "forecast"]], on="time", suffixes=("", "_other"))
    p, q, o, r = (both[c].to_numpy() for c in ("forecast", "forecast_other", "observed",
                                               "climatology"))

    def gain(p, q, o, r):
        return brier_skill_score(p, o, r) - brier_skill_score(q, o, r)

    return [gain(p, q, o, r), *bootstrap_interval(gain, p, q, o, r, n_resamples=n_resamples,
                                                  block=both["year"].to_numpy())]


def finished(name, observed, started, table, frames, n_resamples):
    """The result dict: every variant's BSS and interval, and its paired differences from
    the logistic regression and from the default analogs (same days, same resampled
    years)."""
    default = frames[table["analogs 20, all modes, equal (default)"][3]]
    regression = frames[table["logistic regression, PCs + 2 harmonics"][3]]
    paired = {label: {"minus_regression": paired_difference(frames[v[3]], regression,
                                                            n_resamples),
                      "minus_default": paired_difference(frames[v[3]], default, n_resamples)}
              for label, v in table.items()}
    return {"region": name, "base_rate": float(observed.mean()), "n_days": int(observed.size),
            "seconds": round(time.perf_counter() - started, 1),
            "bss_and_interval": {label: v[:3] for label, v in table.items()},
            "paired": paired}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("store")
    parser.add_argument("--point", default=None, help="LAT,LON,KM (default: the centre of "
                        "the store's region, 40 km)")
    parser.add_argument("--resamples", type=int, default=300)
    parser.add_argument("--json", default=None)
    parser.add_argument("--weighted-only", action="store_true",
                        help="only the predictor-weighted variants and the baselines")
    args = parser.parse_args(argv)
    global WEIGHTED_ONLY
    WEIGHTED_ONLY = args.weighted_only

    from analogs.api import AnalogStore
    from analogs.stages.outcomes import Region
    store = AnalogStore.load(args.store)
    box = store.region
    spec = box.to_dict()
    point = (Region.parse(args.point) if args.point else
             Region.point((spec["south"] + spec["north"]) / 2,
                          (spec["west"] + spec["east"]) / 2, 40))
    results = [compare(store, box, "box " + box.label(), args.resamples),
               compare(store, point, "point " + point.label(), args.resamples)]
    for result in results:
        print(f"\n{result['region']}: base rate {100 * result['base_rate']:.1f}% of "
              f"{result['n_days']} days ({result['seconds']} s)")
        print("      BSS  interval            minus regression        minus default")
        for label, (bss, low, high) in sorted(result["bss_and_interval"].items(),
                                              key=lambda item: -item[1][0]):
            versus = result["paired"][label]
            gaps = "  ".join("{:7.3f} [{:6.3f}, {:6.3f}]".format(*versus[k])
                             for k in ("minus_regression", "minus_default"))
            print(f"  {bss:7.3f}  [{low:6.3f}, {high:6.3f}]  {gaps}  {label}")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as handle:
            json.dump(results, handle, indent=1)
    return results


if __name__ == "__main__":
    main()
