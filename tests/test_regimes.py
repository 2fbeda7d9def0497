"""Tests of analogs.stages.regimes: rules on hand-built fields, configuration, learned paths.

The four hand-built single fields are textbook sketches of each regime (common
practice, no source); the learned models are checked against scikit-learn.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from sklearn.cluster import KMeans
from sklearn.linear_model import LogisticRegression

from analogs.errors import AnalogsInputError, NotFittedError
from analogs.stages.regimes import (
    KMeansRegimes,
    RegimeRules,
    RuleClassifier,
    SupervisedRegimes,
    persistence_filter,
    tag_days,
)

from _regime_helpers import (
    REGION,
    as_dataset,
    humidity,
    northwest_flow_case,
    strong_trough_case,
    tropical_case,
    vortex,
    zonal_case,
    zonal_height,
)


@pytest.mark.parametrize("case, expected", [
    (northwest_flow_case, "northwest_flow"),  # western ridge, eastern trough
    (tropical_case, "tropical"),              # compact closed low ~27 N, very moist
    (strong_trough_case, "strong_trough"),    # deep amplified trough over the region
    (zonal_case, "other"),                    # flat zonal flow
])
def test_hand_built_fields_get_their_regime(case, expected):
    # Common practice, no source: the textbook pattern of each regime.
    tags = tag_days(case(), REGION)
    row = tags.iloc[0]
    assert row["regime"] == expected, row["reason"]
    assert 0.5 <= row["confidence"] <= 1.0
    assert list(tags.columns[:3]) == ["date", "regime", "confidence"]
    assert tags.columns[-1] == "reason"


def test_reason_quotes_the_deciding_values():
    row = tag_days(northwest_flow_case(), REGION).iloc[0]
    assert f"flow {row['flow_direction_deg']:.0f} deg at {row['flow_speed_ms']:.0f} m/s" \
        in row["reason"]
    assert f"ridge {row['ridge_amplitude']:.0f} gpm upstream" in row["reason"]
    assert f"Td850 {row['dewpoint_region_c']:.1f} C" in row["reason"]


def test_height_only_tropical_needs_moisture_or_an_explicit_opt_in():
    # Precision first (common practice, no source: a forecaster acts on "tropical"): at
    # 500 hPa alone a summer cold-core upper low looks like a tropical cyclone, so a
    # height-only archive gets no tropical label by default, and the reason says why.
    ds = tropical_case()[["z500"]]
    row = tag_days(ds, REGION).iloc[0]
    assert row["regime"] != "tropical"
    assert "moisture missing around the centre" in row["reason"]
    deep = as_dataset(zonal_height(3.0) + vortex(27.0, -93.0, 110.0, 250.0))
    row = tag_days(deep, REGION).iloc[0]
    assert row["regime"] != "tropical"
    assert "height-only archive: not called tropical" in row["reason"]
    # Opted in: a deep, compact, round warm-season low at low latitude is tropical, and the
    # reason says the moisture was missing; the shallower low still is not (60 gpm needed).
    allowed = RegimeRules.load(tropical_without_moisture=1)
    row = tag_days(deep, REGION, rules=allowed).iloc[0]
    assert row["regime"] == "tropical"
    assert "moisture missing" in row["reason"]
    assert tag_days(ds, REGION, rules=allowed).iloc[0]["regime"] != "tropical"
    # The same deep low in dry air is not tropical (moisture decides when known).
    dry = as_dataset(zonal_height(3.0) + vortex(27.0, -93.0, 110.0, 250.0), humidity() * 0.3)
    assert tag_days(dry, REGION).iloc[0]["regime"] != "tropical"
    # Nor in winter, however moist (the warm season of the northern hemisphere).
    winter = tropical_case().assign_coords(time=pd.DatetimeIndex(["2001-01-15"]))
    row = tag_days(winter, REGION).iloc[0]
    assert row["regime"] != "tropical"
    assert "Jan: outside the warm season" in row["reason"]


def test_precedence_and_confidence_bounds():
    diagnostics = pd.concat([
        tag_days(case(), REGION).drop(columns=["regime", "confidence", "reason"])
        for case in (northwest_flow_case, tropical_case, strong_trough_case, zonal_case)])
    diagnostics.attrs["region"] = REGION
    labels = RuleClassifier().predict(diagnostics.set_index("date"))
    assert labels["confidence"].between(0.0, 1.0).all()
    assert labels["regime"].tolist() == ["northwest_flow", "tropical", "strong_trough", "other"]
    # Loosen the trough and north-west rules so that several regimes hold at once:
    # precedence tropical > strong_trough > northwest_flow decides (the zonal day,
    # with no trough at all, stays "other").
    loose = RegimeRules.load(trough_min_amplitude_gpm=1.0, trough_min_height_gradient=1.0,
                             trough_min_vorticity_advection=-1.0,
                             trough_min_direction_deg=0.0, trough_max_direction_deg=360.0,
                             nw_min_direction_deg=0.0,
                             nw_max_direction_deg=360.0, nw_min_speed_ms=0.1,
                             nw_min_ridge_gpm=-500.0)
    loose_labels = RuleClassifier(loose).predict(diagnostics.set_index("date"))
    assert loose_labels["regime"].tolist() == ["strong_trough", "tropical", "strong_trough",
                                               "other"]


def test_rules_from_toml_and_overrides(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("[regimes]\nnw_min_speed_ms = 16.5\ntropical_max_lat = 30.0\n")
    rules = RegimeRules.load(path, tropical_max_lat=32.0)
    assert rules.nw_min_speed_ms == 16.5
    assert rules.tropical_max_lat == 32.0          # keyword overrides the file
    assert rules.trough_min_amplitude_gpm == RegimeRules().trough_min_amplitude_gpm
    assert "units" in RegimeRules.describe().columns
    # Raising the speed threshold above the case's 14 m/s turns north-west flow off.
    row = tag_days(northwest_flow_case(), REGION, rules=rules).iloc[0]
    assert row["regime"] != "northwest_flow"


def test_rules_bad_input(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("nw_min_sped_ms = 12.5\n")
    with pytest.raises(AnalogsInputError, match=r"rules.toml: unknown key\(s\) nw_min_sped_ms"):
        RegimeRules.load(path)
    with pytest.raises(AnalogsInputError, match=r"unknown regime rule\(s\) bogus"):
        RegimeRules.load(bogus=1.0)
    with pytest.raises(AnalogsInputError, match="'nw_min_speed_ms' regime rule must be"):
        RegimeRules.load(nw_min_speed_ms="fast")
    path.write_text("nw_min_speed_ms = \n")
    with pytest.raises(AnalogsInputError, match="is not valid TOML"):
        RegimeRules.load(path)


def test_region_outside_grid_raises():
    with pytest.raises(AnalogsInputError, match="lies outside the grid"):
        tag_days(zonal_case(), (-60.0, -50.0, 100.0, 120.0))


# ------------------------------------------------------------------- learned paths


def _pcs(n_days=400, n_modes=5, seed=0):
    """Seeded PCs with three well-separated clusters and persistent episodes."""
    rng = np.random.default_rng(seed)
    centres = rng.normal(0, 6, (3, n_modes))
    episode = np.repeat(rng.integers(0, 3, n_days // 8 + 1), 8)[:n_days]
    values = centres[episode] + rng.normal(0, 1.0, (n_days, n_modes))
    times = pd.date_range("1990-01-01", periods=n_days, freq="D")
    return xr.DataArray(values, dims=("time", "mode"),
                        coords={"time": times, "mode": np.arange(n_modes)}), episode


def test_kmeans_from_arrays_matches_sklearn(tmp_path):
    # Reference: sklearn.cluster.KMeans.predict with the same seed and n_init.
    pcs, _ = _pcs()
    model = KMeansRegimes(4, min_persistence=1, random_state=0).fit(pcs)
    reference = KMeans(4, n_init=10, random_state=0).fit(pcs.values)
    new, _ = _pcs(seed=1)
    path = tmp_path / "kmeans.nc"
    model.to_dataset().to_netcdf(path)
    with xr.open_dataset(path) as saved:
        restored = KMeansRegimes.from_dataset(saved.load())
    np.testing.assert_array_equal(restored.predict(new), reference.predict(new.values))
    np.testing.assert_array_equal(model.labels_, reference.labels_)


def test_kmeans_persistence_filter():
    pcs, _ = _pcs()
    model = KMeansRegimes(3, min_persistence=3).fit(pcs)
    labels = model.predict(pcs)
    runs = np.diff(np.flatnonzero(np.diff(np.r_[-1, labels, -1]) != 0))
    assert runs.min() >= 3
    restored = KMeansRegimes.from_dataset(model.to_dataset())
    np.testing.assert_array_equal(restored.predict(pcs), labels)
    # Hand example: the one-day blip joins the run before it; the short first run
    # joins the run after it; a gap in the dates restarts the sequence.
    np.testing.assert_array_equal(
        persistence_filter(np.array([5, 1, 1, 1, 2, 1, 1, 1, 3, 3, 3]), 2),
        [1, 1, 1, 1, 1, 1, 1, 1, 3, 3, 3])
    times = pd.to_datetime(["2000-01-01", "2000-01-02", "2000-01-10", "2000-01-11"])
    np.testing.assert_array_equal(persistence_filter(np.array([1, 1, 2, 2]), 2, times),
                                  [1, 1, 2, 2])
    with pytest.raises(NotFittedError, match="not fitted"):
        KMeansRegimes().predict(pcs)


def test_supervised_from_arrays_matches_sklearn(tmp_path):
    # Reference: sklearn LogisticRegression on the same standardised PCs.
    pcs, episode = _pcs()
    names = np.array(["northwest_flow", "tropical", "strong_trough"])
    table = pd.DataFrame({"date": pcs["time"].values[::3].astype("datetime64[D]").astype(str),
                          "regime": names[episode[::3]]})
    model = SupervisedRegimes(C=0.5).fit(pcs, table)
    x = pcs.values[::3]
    mean, scale = x.mean(0), x.std(0)
    reference = LogisticRegression(C=0.5, max_iter=1000).fit((x - mean) / scale,
                                                             table["regime"])
    path = tmp_path / "logistic.nc"
    model.to_dataset().to_netcdf(path)
    with xr.open_dataset(path) as saved:
        restored = SupervisedRegimes.from_dataset(saved.load())
    new, _ = _pcs(seed=0)
    x_new = (new.values - mean) / scale
    np.testing.assert_array_equal(restored.predict(new), reference.predict(x_new))
    np.testing.assert_allclose(restored.predict_proba(new), reference.predict_proba(x_new),
                               rtol=1e-6, atol=1e-9)
    assert (restored.predict(new) == names[episode]).mean() > 0.95


def test_supervised_bad_labelled_table(tmp_path):
    pcs, _ = _pcs(n_days=30)
    unknown = pd.DataFrame({"date": ["1990-01-02", "1990-01-03"],
                            "regime": ["tropical", "derecho"]})
    with pytest.raises(AnalogsInputError, match=r"unknown regime label\(s\) derecho"):
        SupervisedRegimes().fit(pcs, unknown)
    absent = pd.DataFrame({"date": ["1990-01-02", "2024-05-01"],
                           "regime": ["tropical", "other"]})
    path = tmp_path / "cases.csv"
    absent.to_csv(path, index=False)
    with pytest.raises(AnalogsInputError, match=r"cases.csv: date\(s\) not in the archive: "
                                                r"2024-05-01"):
        SupervisedRegimes().fit(pcs, path)
    with pytest.raises(AnalogsInputError, match="must have columns date,regime"):
        SupervisedRegimes().fit(pcs, pd.DataFrame({"day": ["1990-01-02"]}))


# ------------------------------------------------------------ demo archive agreement


def test_agreement_with_demo_truth_table(capsys, default_demo_years):
    # Outside reference: the demo generator's own truth table (reanalysis_demo.truth),
    # written from its schedule, not from the fields the rules see; the rules were not
    # tuned on it. Measured on the default demo's ten years (268 days tagged
    # tropical): on the 4-year test archive the tropical precision's standard error is
    # about 0.04 (about 120 tagged days), too coarse for a threshold of 0.80. Needs >= 85 %
    # agreement and >= 80 % recall of north-west flow and strong trough. Tropical (issue
    # 14, precision before recall: a forecaster acts on it) is held to >= 80 % precision
    # and >= 60 % recall: since issue 14 a closed low must also be round, warm-season, very
    # moist at the archive's own level and moister at its core than on its ring (a
    # warm-core proxy), and the closed-low search demands a low closed in most directions;
    # the demo's cyclones, drawn under amplified waves with a dry western half, fail these
    # more often than the generator's truth rule (depth >= 30 gpm within 500 km, nothing
    # else) expects. Before issue 14: agreement 0.921, tropical recall 0.897, precision
    # 0.854 (4 years); with issue 16's demo on the 4-year test archive: agreement 0.881,
    # tropical precision 0.786, recall 0.639.
    reanalysis_demo = pytest.importorskip("reanalysis_demo")
    demo = default_demo_years
    fields = demo.fields.rename({"zg": "z500", "hus": "q850"})
    tags = tag_days(fields, reanalysis_demo.CENTRAL_REGION)
    truth = demo.truth["regime"].to_numpy()
    rules = tags["regime"].to_numpy()
    table = pd.crosstab(pd.Series(truth, name="truth"), pd.Series(rules, name="rules"),
                        margins=True)
    names = ("northwest_flow", "tropical", "strong_trough")
    recall = {name: float(np.mean(rules[truth == name] == name)) for name in names}
    precision = {name: float(np.mean(truth[rules == name] == name)) for name in names}
    agreement = float(np.mean(rules == truth))
    with capsys.disabled():
        print(f"\nregime rules vs demo truth (default demo, 10 years, seed 0):\n{table}\n"
              f"agreement {agreement:.3f}; recall " +
              ", ".join(f"{k} {v:.3f}" for k, v in recall.items()) + "; precision " +
              ", ".join(f"{k} {v:.3f}" for k, v in precision.items()))
    assert agreement >= 0.85
    assert recall["northwest_flow"] >= 0.80 and recall["strong_trough"] >= 0.80, recall
    assert precision["tropical"] >= 0.80 and recall["tropical"] >= 0.60, (precision, recall)


def test_closed_low_asymmetry_against_pyproj_on_the_whole_grid(default_demo_years,
                                                               monkeypatch):
    """``tc_asymmetry`` (the wavenumber-2 amplitude of the height departure from its
    zonal median on the 500-800 km ring, from eight octant means, over the depth) of
    the demo's closed-low days, recomputed here over the whole grid with distances and
    azimuths from pyproj's great-circle inverse on the same sphere (outside reference),
    equals the function's box-limited one; and emptying the centre-geometry cache at
    every new centre changes no value."""
    pyproj = pytest.importorskip("pyproj")
    import analogs.stages.regimes as regimes
    from analogs.constants import EARTH_RADIUS
    from analogs.stages.diagnostics import compute_diagnostics
    import reanalysis_demo

    fields = default_demo_years.fields.rename({"zg": "z500", "hus": "q850"}).isel(
        time=slice(0, 400)).load()
    diagnostics = compute_diagnostics(fields, reanalysis_demo.CENTRAL_REGION)
    structure = regimes.cyclone_structure(fields, diagnostics)
    days = np.flatnonzero(np.isfinite(structure["tc_asymmetry"].to_numpy()))
    assert days.size >= 20
    lat, lon = fields["lat"].values, fields["lon"].values
    lat2, lon2 = np.meshgrid(lat, lon, indexing="ij")
    geod = pyproj.Geod(a=EARTH_RADIUS, b=EARTH_RADIUS)
    weights = np.cos(np.radians(lat2))
    for day in days[::max(1, days.size // 20)]:
        c_lat, c_lon = diagnostics["tc_lat"].iloc[day], diagnostics["tc_lon"].iloc[day]
        azimuth, _, metres = geod.inv(np.full(lat2.size, c_lon), np.full(lat2.size, c_lat),
                                      lon2.ravel(), lat2.ravel())
        km, octant = metres / 1000.0, (np.floor(np.mod(azimuth, 360.0) / 45.0)).astype(int) % 8
        z = fields["z500"].values[day]
        anomaly = (z - np.median(z, axis=1, keepdims=True)).ravel()
        ring = (km >= 500.0) & (km <= 800.0)
        means = np.array([np.average(anomaly[ring & (octant == k)],
                                     weights=weights.ravel()[ring & (octant == k)])
                          for k in range(8)])
        angles = np.radians(22.5 + 45.0 * np.arange(8))
        expected = 2.0 / 8.0 * abs(np.sum(means * np.exp(2j * angles))) \
            / diagnostics["tc_depth"].iloc[day]
        assert structure["tc_asymmetry"].iloc[day] == pytest.approx(expected, rel=1e-9)
    monkeypatch.setattr(regimes, "_CENTRE_CACHE_BYTES", -1)
    pd.testing.assert_frame_equal(regimes.cyclone_structure(fields, diagnostics), structure,
                                  check_exact=True)


def _structure_day_by_day(ds, diagnostics):
    """The closed-low structure one day at a time over the whole grid: the path the
    grouped, box-limited measures of cyclone_structure replace. Each octant, core or
    ring mean is the sum of the products over the sum of the weights of its points that
    have a value, in grid order (numpy.average's arithmetic); the wavenumber-2 amplitude
    is Python's abs() of the complex sum of the octant means; Hart's (2003, from memory)
    height difference is Zmax - Zmin of the points that have a value."""
    from analogs.constants import ZERO_CELSIUS_K
    from analogs.geo import great_circle_km, initial_bearing_deg
    from analogs.stages import regimes
    from analogs.stages.diagnostics import dewpoint_from_specific_humidity

    lat2, lon2 = np.meshgrid(ds["lat"].values, ds["lon"].values, indexing="ij")
    weights = np.cos(np.radians(lat2)).ravel()
    heights = ds["z500"].values
    median = np.nanmedian if np.isnan(heights).any() else np.median
    wave2 = np.exp(2j * np.radians(22.5 + 45.0 * np.arange(8)))
    out = {name: np.full(len(diagnostics), np.nan) for name in regimes.STRUCTURE_UNITS}

    def mean(values, points):
        points = points & np.isfinite(values)
        if not points.any():
            return np.nan
        return np.multiply(values[points], weights[points]).sum() / weights[points].sum()

    def spread(values, points):
        values = values[points & np.isfinite(values)]
        return float(values.max() - values.min()) if values.size else np.nan

    for day in np.flatnonzero(diagnostics["tc_present"].to_numpy()):
        c_lat, c_lon, depth = (diagnostics[name].iloc[day] for name in ("tc_lat", "tc_lon",
                                                                         "tc_depth"))
        distance = great_circle_km(c_lat, c_lon, lat2, lon2).ravel()
        octant = np.floor(initial_bearing_deg(c_lat, c_lon, lat2, lon2).ravel()
                          / 45.0).astype(int) % 8
        ring = (distance >= 500.0) & (distance <= 800.0)
        z = heights[day]
        anomaly = (z - median(z, axis=-1, keepdims=True)).ravel()
        means = np.array([mean(anomaly, ring & (octant == k)) for k in range(8)])
        if np.all(np.isfinite(means)) and depth > 0:
            out["tc_asymmetry"][day] = float(2.0 / 8.0 * abs(np.sum(means * wave2)) / depth)
        for name, level, excess, offset in (
                ("q850", "tc_td850_c", "tc_core_td_excess_k", ZERO_CELSIUS_K),
                ("td2m", "tc_td2m_c", "tc_core_td_excess_k", ZERO_CELSIUS_K),
                ("pwat", "tc_pwat", "tc_core_pwat_excess", 0.0)):
            if name in ds:
                values = ds[name].values[day]
                if name == "q850":
                    values = dewpoint_from_specific_humidity(values, 850.0)
                values = (values - offset).ravel()
                core, around = mean(values, distance <= 400.0), mean(values, ring)
                out[level][day], out[excess][day] = core, core - around
                break
        if "z850" in ds:
            hart = distance <= 500.0
            out["tc_thermal_wind_gpm"][day] = (spread(ds["z850"].values[day].ravel(), hart)
                                               - spread(z.ravel(), hart)) / np.log(850.0 / 500.0)
    return pd.DataFrame(out, index=diagnostics.index)


def _closed_low_days(grid, moisture):
    """Ten days of noisy heights with compact lows on: the helpers' limited domain;
    that domain moved across the date line (stored in two pieces, as normalise_grid
    stores it); a global grid with its pole rows (a centre whose ring crosses the north
    pole, one on the 0 E seam, one in the southern hemisphere). Days share centres, one
    day has none; missing heights and moisture lie on some rings and cores. Returns the
    Dataset (``moisture``: q850, td2m, pwat or None; with a z850 height) and the
    diagnostics cyclone_structure reads."""
    import _regime_helpers
    from analogs.geo import great_circle_km, wrap_longitude

    rng = np.random.default_rng(7)
    if grid == "global":
        lat, lon = np.arange(-90.0, 90.1, 2.0), np.arange(0.0, 360.0, 2.0)
        centres = [(84.0, 40.0), (26.0, 0.0), (-30.0, 200.0)]
    else:
        lat, lon = _regime_helpers.LAT, _regime_helpers.LON
        centres = [(27.0, -93.0), (33.0, -100.0), (21.0, -120.0)]
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    which = [0, 1, 0, 2, None, 1, 0, 2, 2, 0]
    z = 5900.0 - 8.0 * np.abs(la) + rng.normal(0.0, 3.0, (len(which),) + la.shape)
    for day, centre in enumerate(which):
        if centre is not None:
            c_lat, c_lon = centres[centre]
            z[day] -= 60.0 * np.exp(-0.5 * (great_circle_km(c_lat, c_lon, la, lo) / 300.0) ** 2)
    fields = {"z500": z, "z850": 1500.0 - 0.5 * (z - 5900.0)
              + rng.normal(0.0, 2.0, z.shape)}
    if moisture is not None:
        scale = {"q850": 0.012, "td2m": 290.0, "pwat": 40.0}[moisture]
        fields[moisture] = scale * (1.0 + 0.1 * rng.random(z.shape))
    i, j = (np.argmin(np.abs(lat - centres[0][0])),
            np.argmin(np.abs(wrap_longitude(lon - centres[0][1]))))
    for name in fields:
        fields[name][2, i + 3, j] = fields[name][6, i, (j + 6) % lon.size] = np.nan
    fields[next(iter(fields))][9, i - 1, j] = np.nan
    if grid == "date_line":
        lon = wrap_longitude(lon + 260.0)
        order = np.argsort(lon)
        lon, fields = lon[order], {name: f[..., order] for name, f in fields.items()}
        centres = [(c_lat, float(wrap_longitude(c_lon + 260.0))) for c_lat, c_lon in centres]
    times = pd.date_range("2001-07-01", periods=len(which))
    ds = xr.Dataset({name: (("time", "lat", "lon"), f) for name, f in fields.items()},
                    coords={"time": times, "lat": lat, "lon": lon})
    position = np.array([centres[c] if c is not None else (np.nan, np.nan) for c in which])
    diagnostics = pd.DataFrame({"tc_present": [c is not None for c in which],
                                "tc_lat": position[:, 0], "tc_lon": position[:, 1],
                                "tc_depth": np.where(np.arange(len(which)) == 5, -1.0, 40.0)},
                               index=times)
    return ds, diagnostics


@pytest.mark.parametrize("moisture", ["q850", "td2m", "pwat", None])
@pytest.mark.parametrize("grid", ["limited", "date_line", "global"])
def test_cyclone_structure_by_centre_equals_day_by_day(grid, moisture, monkeypatch):
    """The days that share a closed-low centre are measured together, on the points of
    the box around it: every measure equals, to the last bit, the day-by-day measure
    over the whole grid (the path it replaces), on a limited grid, one across the date
    line and a global grid with a pole inside a ring; with missing values on rings and
    cores, a day without a low and a low of no depth; in blocks of one day (a dask
    archive chunked by two days, or a tiny block budget) as in one block."""
    from analogs.stages import regimes

    ds, diagnostics = _closed_low_days(grid, moisture)
    expected = _structure_day_by_day(ds, diagnostics)
    assert np.isfinite(expected["tc_asymmetry"]).sum() >= 5
    assert np.isfinite(expected["tc_thermal_wind_gpm"]).sum() >= 8
    found = regimes.cyclone_structure(ds, diagnostics)
    pd.testing.assert_frame_equal(found, expected, check_exact=True)
    pd.testing.assert_frame_equal(regimes.cyclone_structure(ds.chunk({"time": 2}), diagnostics),
                                  expected, check_exact=True)
    monkeypatch.setattr(regimes, "_STRUCTURE_BLOCK_BYTES", 1)
    pd.testing.assert_frame_equal(regimes.cyclone_structure(ds, diagnostics), expected,
                                  check_exact=True)
