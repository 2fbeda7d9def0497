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
- the baselines: logistic regression on the same PCs plus two annual harmonics
  (scikit-learn, the same folds; verify's baseline) and the season climatology.

Every variant uses the leave-one-year-out folds of `analogs verify` (one neighbour search:
stages.hindcast.HeldOutNeighbours, tested equal to leave_one_year_out).

Run:  python tests/benchmarks/compare_analog_variants.py STORE [--point LAT,LON,KM]
          [--resamples 300] [--json OUT.json]
Prints one table per region, best first.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import pandas as pd


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


def compare(store, region, name, n_resamples):
    from analogs.stages.hindcast import HeldOutNeighbours, logistic_hindcast, score_hindcast
    from analogs.workflows.skill import hindcast_days
    all_modes = int(store.eof.n_modes_)

    def scored(frame):
        s = score_hindcast(frame, n_resamples=n_resamples)
        return [s["brier_skill_score"], *s["brier_skill_score_ci"]]

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
    }
    for modes in (5, 10, 15, all_modes):
        for top in (10, 20, 30, 50):
            table[f"analogs {top}, {modes} modes, equal"] = scored(
                weighted_frequencies(neighbours, modes, top, "equal"))
    for scheme in ("gaussian", "gaussian_k", "inverse", "tricube"):
        for top in (20, 50):
            table[f"analogs {top}, all modes, {scheme} weights"] = scored(
                weighted_frequencies(neighbours, all_modes, top, scheme))
    for top in (20, 50):
        table[f"analogs {top} + Platt calibration in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _platt))
        table[f"analogs {top} + seasonal harmonics in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _seasonal))
        table[f"analogs {top} + climatology blend in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "equal", _with_climatology))
        table[f"analogs {top} tricube + seasonal harmonics in folds"] = scored(
            fitted_in_folds(neighbours, all_modes, top, "tricube", _seasonal))
    for floor, length in ((0.05, 600), (0.1, 1000), (0.3, 1500)):
        focused = area_focused_pcs(store, region, floor, length)[store.covered]
        near = HeldOutNeighbours(focused, times, observed, modes=(all_modes,), top=50,
                                 drop_years=True)
        for top in (20, 50):
            label = f"area-focused (floor {floor}, {length} km), {top}"
            table[label] = scored(weighted_frequencies(near, all_modes, top, "equal"))
            table[label + " + seasonal harmonics in folds"] = scored(
                fitted_in_folds(near, all_modes, top, "equal", _seasonal))
    return {"region": name, "base_rate": float(observed.mean()), "n_days": int(observed.size),
            "seconds": round(time.perf_counter() - started, 1), "bss_and_interval": table}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("store")
    parser.add_argument("--point", default=None, help="LAT,LON,KM (default: the centre of "
                        "the store's region, 40 km)")
    parser.add_argument("--resamples", type=int, default=300)
    parser.add_argument("--json", default=None)
    args = parser.parse_args(argv)

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
        for label, (bss, low, high) in sorted(result["bss_and_interval"].items(),
                                              key=lambda item: -item[1][0]):
            print(f"  {bss:7.3f}  [{low:6.3f}, {high:6.3f}]  {label}")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as handle:
            json.dump(results, handle, indent=1)
    return results


if __name__ == "__main__":
    main()
