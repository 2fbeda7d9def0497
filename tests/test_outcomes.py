"""Outcome statistics checked against outside references (scipy, pyproj, netCDF4)."""

import json

import netCDF4
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pyproj import Geod
from scipy import ndimage, special, stats

from analogs.errors import AnalogsInputError
from analogs.geo import great_circle_km, initial_bearing_deg
from analogs.stages.outcomes import (
    Region,
    analog_weights,
    beta_quantile,
    binomial_interval,
    clean_events,
    convective_day,
    cyclone_relative_composite,
    daily_event_counts,
    effective_sample_size,
    gaussian_sigma_grid,
    gaussian_smooth,
    grid_event_counts,
    neighbourhood_probability,
    outcome_maps,
    read_events,
    regularized_beta,
    report_density,
    summarize_outcomes,
)
from analogs.results import OutcomeSummary
from analogs.workflows.files import write_maps

GEOD = Geod(ellps="WGS84")


def _write(tmp_path, text, name="events.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _events(rows):
    """Events table from (time, lat, lon, kind) tuples, through the public cleaner."""
    return clean_events(pd.DataFrame(rows, columns=["time", "lat", "lon", "kind"]))


# --------------------------------------------------------------------------- days

def test_convective_day_boundary_at_12_utc():
    """12 UTC to 12 UTC convective day (common practice): 11:59 belongs to the
    previous day, 12:00 to the same day."""
    days = convective_day(pd.to_datetime(["2021-06-02T11:59", "2021-06-02T12:00",
                                          "2021-06-02T23:00", "2021-06-03T00:30"]))
    assert list(days.strftime("%Y-%m-%d")) == [
        "2021-06-01", "2021-06-02", "2021-06-02", "2021-06-02"]


def test_convective_day_converts_offsets_to_utc():
    """An offset time is converted to UTC before the 12 UTC cut (ISO 8601)."""
    series = pd.Series(["2021-06-02T13:30+02:00"])  # 11:30 UTC
    assert convective_day(pd.to_datetime(series, utc=True)).iloc[0] == pd.Timestamp("2021-06-01")


# --------------------------------------------------------------------------- reading

def test_read_events_normalises(tmp_path):
    """ISO 8601 naive = UTC, offsets converted; lon 0-360 mapped to [-180, 180);
    kinds stripped and lower-cased (DESIGN.md events contract)."""
    path = _write(tmp_path, "Time,Lat,Lon,Kind,Magnitude\n"
                            "2020-05-01T12:00:00Z,35,260,Tornado ,1\n"
                            "2020-05-02T11:59,35.2,-100, HAIL,\n"
                            "2020-05-02T13:00+02:00,36,-99,wind,60\n")
    events = read_events(path)
    assert list(events.columns) == ["time", "lat", "lon", "kind", "magnitude", "day"]
    assert events["time"].dtype == np.dtype("datetime64[ns]")
    assert events["day"].dtype == np.dtype("datetime64[ns]")
    assert events["lon"].tolist() == [-100.0, -100.0, -99.0]
    assert events["kind"].tolist() == ["tornado", "hail", "wind"]
    assert events["time"].iloc[2] == pd.Timestamp("2020-05-02T11:00")
    assert np.isnan(events["magnitude"].iloc[1])
    assert (events["day"] == pd.Timestamp("2020-05-01")).all()


def test_read_events_parquet_and_no_magnitude(tmp_path):
    frame = pd.DataFrame({"time": pd.to_datetime(["2001-07-04T18:00"]), "lat": [40.0],
                          "lon": [-95.0], "kind": ["hail"]})
    path = tmp_path / "events.parquet"
    frame.to_parquet(path)
    events = read_events(path)
    assert events["day"].iloc[0] == pd.Timestamp("2001-07-04")
    assert np.isnan(events["magnitude"].iloc[0])


def test_read_events_header_only_is_empty(tmp_path):
    events = read_events(_write(tmp_path, "time,lat,lon,kind\n"))
    assert len(events) == 0 and "day" in events.columns


@pytest.mark.parametrize(
    ("text", "match"),
    [("time,lat,lon,kind\n2020-01-01T12:00,30,-90,hail\nyesterday,30,-90,hail\n",
      r"events\.csv'.*column 'time' .*in row 3 \(row 1 is the header\)"),
     ("time,lat,lon,kind\n2020-01-01T12:00,95,-90,hail\n2020-01-01T13:00,-91,-90,hail\n",
      r"column 'lat' needs degrees north in \[-90, 90\] in rows 2, 3"),
     ("time,lat,lon,kind\n2020-01-01T12:00,30,400,hail\n",
      r"column 'lon' needs degrees east in \[-180, 360\] in row 2"),
     ("time,lat,lon,kind\n2020-01-01T12:00,30,-90,\n",
      r"column 'kind' is empty in row 2"),
     ("time,lat,kind\n2020-01-01T12:00,30,hail\n",
      r"missing required column\(s\) lon"),
     ("", r"events\.csv' is empty"),
     ("time,lat,lon,kind,magnitude\n2020-01-01T12:00,30,-90,hail,big\n",
      r"column 'magnitude' is not a number in row 2")])
def test_read_events_bad_rows(tmp_path, text, match):
    with pytest.raises(AnalogsInputError, match=match):
        read_events(_write(tmp_path, text))


def test_read_events_lists_first_few_rows(tmp_path):
    rows = "".join(f"bad{i},30,-90,hail\n" for i in range(8))
    with pytest.raises(AnalogsInputError, match=r"rows 2, 3, 4, 5, 6 and 3 more"):
        read_events(_write(tmp_path, "time,lat,lon,kind\n" + rows))


def test_read_events_garbage(tmp_path):
    path = tmp_path / "events.csv"
    path.write_bytes(bytes(range(256)) * 4)
    with pytest.raises(AnalogsInputError, match=r"events file '.*events\.csv'"):
        read_events(path)
    with pytest.raises(AnalogsInputError, match=r"could not be read as Parquet"):
        read_events(_write(tmp_path, "not parquet", "events.parquet"))
    with pytest.raises(AnalogsInputError, match=r"does not exist"):
        read_events(tmp_path / "missing.csv")


# --------------------------------------------------------------------------- regions

def test_region_parse_and_round_trip():
    box = Region.parse("30,40,250,265")
    assert (box.west, box.east) == (-110.0, -95.0)
    assert Region.from_dict(box.to_dict()) == box
    point = Region.parse(" 35, -97, 40 ")
    assert point.to_dict() == {"kind": "point", "lat": 35.0, "lon": -97.0, "radius_km": 40.0}
    assert Region.parse("all") == Region.whole()
    assert "40 km" in point.label()


@pytest.mark.parametrize(
    ("text", "match"),
    [("40,30,-100,-90", r"The 'region' option must be a box S,N,W,E with -90 <= S < N"),
     ("35,-97,0", r"The 'region' option must be a point .* RADIUS_KM > 0"),
     ("35,-97,-5", r"RADIUS_KM > 0"),
     ("95,-97,40", r"LAT in \[-90, 90\]"),
     ("30,40,170,190", r"does not cross the 180th meridian"),
     ("north", r"'S,N,W,E' \(degrees\), 'LAT,LON,RADIUS_KM' or 'all'"),
     ("1,2", r"'S,N,W,E' \(degrees\)")])
def test_region_errors(text, match):
    with pytest.raises(AnalogsInputError, match=match):
        Region.parse(text)


def test_point_region_40km_against_pyproj():
    """Points 39.5 km and 40.5 km from the centre by the WGS84 geodesic
    (pyproj.Geod.fwd) fall inside and outside the 40 km disc; the haversine distance
    is within 0.5 % of pyproj's (common practice: 40 km neighbourhood)."""
    centre = Region.point(35.0, -97.0)
    azimuths = np.arange(0, 360, 30.0)
    for distance_km, inside in ((39.5, True), (40.5, False)):
        lon, lat, _ = GEOD.fwd(np.full(azimuths.size, -97.0), np.full(azimuths.size, 35.0),
                               azimuths, np.full(azimuths.size, distance_km * 1000))
        assert (centre.contains(lat, lon) == inside).all()
        np.testing.assert_allclose(great_circle_km(35.0, -97.0, lat, lon), distance_km,
                                   rtol=5e-3)


def test_grid_mask_and_empty_region():
    lat, lon = np.arange(25.0, 50.1, 1.0), np.arange(-110.0, -80.0, 1.0)
    mask = Region.box(30, 32, -100, -98).grid_mask(lat, lon)
    assert mask.shape == (lat.size, lon.size) and mask.sum() == 9
    small = Region.point(35.3, -97.4, 10).require_grid_points(lat, lon)
    assert small.sum() == 1 and small[10, 13]  # nearest grid point (35, -97)
    with pytest.raises(AnalogsInputError,
                       match=r"The 'region' option must be a region holding at least one grid point "
                             r"\(the grid covers lat .*\)\. Got 'box .*' instead"):
        Region.box(0, 10, 0, 10).require_grid_points(lat, lon)


# --------------------------------------------------------------------------- counts

@pytest.fixture
def small_events():
    return _events([
        ("2020-05-01T18:00", 35.0, -97.0, "tornado"),
        ("2020-05-02T06:00", 35.1, -97.2, "hail"),   # still convective day 05-01
        ("2020-05-02T06:00", 45.0, -97.2, "hail"),   # outside the box
        ("2020-05-03T15:00", 36.0, -96.0, "wind"),
        ("2020-05-03T16:00", 36.5, -96.5, "hail"),
    ])


def test_daily_event_counts_by_hand(small_events):
    """Counts worked by hand from the 12-12 UTC convective day (common practice)."""
    box = Region.box(30, 40, -100, -90)
    counts = daily_event_counts(small_events, ["2020-05-01", "2020-05-02", "2020-05-03"], box)
    assert list(counts.columns) == ["hail", "tornado", "wind", "total"]
    assert counts["total"].tolist() == [2, 0, 2]
    assert counts.loc["2020-05-01", "hail"] == 1
    only = daily_event_counts(small_events, ["2020-05-03"], box, kinds=["Hail"])
    assert list(only.columns) == ["hail", "total"] and only["total"].tolist() == [1]


def test_daily_event_counts_equal_pandas_crosstab():
    # Reference: pandas.crosstab of the events' convective days and kinds, reindexed on
    # the days asked for (the former implementation): repeated and unordered days, days
    # without events, events on days not asked for, every kind or one.
    rng = np.random.default_rng(5)
    n = 400
    times = pd.Timestamp("2020-04-01T12:30") + pd.to_timedelta(rng.integers(0, 40 * 24, n), "h")
    events = _events([(str(t), float(rng.uniform(28, 42)), float(rng.uniform(-102, -88)),
                       str(rng.choice(["hail", "tornado", "wind"])))
                      for t in times])
    box = Region.box(30, 40, -100, -90)
    days = pd.DatetimeIndex(rng.choice(pd.date_range("2020-03-25", "2020-05-20").to_numpy(), 90))
    days = days.append(days[:7])
    for kinds in (None, ["wind"]):
        counts = daily_event_counts(events, days, box, kinds=kinds)
        selected = counts.columns[:-1].tolist()
        inside = box.contains(events["lat"].to_numpy(), events["lon"].to_numpy())
        chosen = events[inside & events["kind"].isin(selected).to_numpy()]
        table = pd.crosstab(convective_day(chosen["time"]).to_numpy(), chosen["kind"].to_numpy())
        expected = table.reindex(index=days.normalize(), columns=selected,
                                 fill_value=0).to_numpy(dtype=np.int64)
        assert counts[selected].to_numpy().tolist() == expected.tolist()
        assert counts["total"].tolist() == expected.sum(axis=1).tolist()
        assert counts.index.equals(days.normalize().rename("day"))


def test_unknown_kind_lists_known(small_events):
    with pytest.raises(AnalogsInputError,
                       match=r"must be kinds of the events table \('hail', "
                             r"'tornado', 'wind'"):
        daily_event_counts(small_events, ["2020-05-01"], kinds=["snow"])


# --------------------------------------------------------------------------- intervals

@pytest.mark.parametrize(("k", "n"), [(0, 10), (1, 10), (7, 30), (30, 30), (3, 250)])
@pytest.mark.parametrize("confidence", [0.8, 0.9, 0.95])
def test_clopper_pearson_and_wilson_match_scipy(k, n, confidence):
    """Clopper & Pearson (1934) exact and Wilson (1927) score intervals against
    scipy.stats.binomtest(...).proportion_ci."""
    result = stats.binomtest(k, n)
    exact = result.proportion_ci(confidence_level=confidence, method="exact")
    wilson = result.proportion_ci(confidence_level=confidence, method="wilson")
    assert binomial_interval(k, n, confidence) == pytest.approx((exact.low, exact.high),
                                                                abs=1e-10)
    assert binomial_interval(k, n, confidence, "wilson") == pytest.approx(
        (wilson.low, wilson.high), abs=1e-10)


def test_jeffreys_interval_coverage_near_nominal():
    """Brown, Cai & DasGupta (2001): the Jeffreys interval's coverage, averaged over
    p, stays close to nominal (exact binomial coverage computed with scipy)."""
    n, confidence = 40, 0.9
    k = np.arange(n + 1)
    low, high = binomial_interval(k, np.full(k.size, n), confidence, "jeffreys")
    coverage = [stats.binom.pmf(k, n, p)[(low <= p) & (p <= high)].sum()
                for p in np.linspace(0.02, 0.98, 97)]
    assert np.mean(coverage) == pytest.approx(confidence, abs=0.015)
    exact_low, _ = binomial_interval(k, np.full(k.size, n), confidence)
    assert np.all(low[1:] >= exact_low[1:])  # shorter than the conservative exact one


def test_beta_quantile_and_regularized_beta_match_scipy():
    """beta_quantile (what the intervals use instead of scipy) against
    scipy.special.betaincinv, and regularized_beta against scipy.special.betainc, over
    the integer parameters of Clopper-Pearson bounds (k, n - k + 1) and random
    non-integer ones (weighted effective counts, Jeffreys' k + 1/2)."""
    rng = np.random.default_rng(18)
    points = [(k, n - k + 1, q) for n in (1, 2, 5, 20, 30, 100, 250, 1000)
              for k in range(1, n + 1, max(1, n // 25))
              for q in (0.0005, 0.025, 0.05, 0.1, 0.5, 0.9, 0.95, 0.975, 0.9995)]
    points += [tuple(row) for row in np.column_stack([rng.uniform(0.02, 300, 3000),
                                                      rng.uniform(0.02, 300, 3000),
                                                      rng.uniform(0.001, 0.999, 3000)])]
    a, b, q = (np.array(column, dtype=float) for column in zip(*points))
    expected = special.betaincinv(a, b, q)
    np.testing.assert_allclose(beta_quantile(q, a, b), expected, rtol=1e-10, atol=0)
    x = np.clip(expected, 1e-300, 1.0)
    np.testing.assert_allclose([regularized_beta(*point) for point in zip(x, a, b)],
                               special.betainc(a, b, x), rtol=1e-11, atol=1e-300)


def test_beta_quantile_worked_examples():
    """Closed forms (from memory): I_x(1, b) = 1 - (1 - x)^b, so the q quantile of
    Beta(1, b) is 1 - (1 - q)^(1/b), the Clopper-Pearson upper bound for k = 0
    (the "rule of three" 3/n at 95 % one-sided, approximately); Beta(1/2, 1/2) is the
    arcsine law, quantile sin^2(pi q / 2); a = 0 and b = 0 are the degenerate limits."""
    for b in (1, 3, 17.5, 400):
        for q in (0.05, 0.5, 0.95):
            assert beta_quantile(q, 1, b) == pytest.approx(-np.expm1(np.log1p(-q) / b),
                                                           rel=1e-12)
    for q in (0.01, 0.3, 0.9):
        assert beta_quantile(q, 0.5, 0.5) == pytest.approx(np.sin(np.pi * q / 2) ** 2,
                                                           rel=1e-12)
    assert binomial_interval(0, 30, 0.9)[1] == pytest.approx(1 - 0.05 ** (1 / 30), rel=1e-12)
    assert beta_quantile(0.05, 0, 5) == 0.0 and beta_quantile(0.95, 5, 0) == 1.0
    assert beta_quantile(np.array([0.05, 0.95]), 2, 3).shape == (2,)


def test_beta_quantile_with_a_parameter_within_rounding_of_zero():
    """Weighted counts leave n - k a rounding residue (4.4e-16) when every analog had an
    event: the Beta's mean rounds to 1 and its density cannot be taken there. The
    quantile is then 1 (or 0) to a float's resolution, as scipy.special.betaincinv
    gives; found by hypothesis (test_p_any_event_in_unit_interval_and_inside_ci)."""
    tiny = 4.440892098500626e-16
    for q, a, b in [(0.95, 4.8565068887439065, tiny), (0.999, 2.0, 1e-300),
                    (0.05, tiny, 5.0), (0.5, 3.0, tiny)]:
        assert beta_quantile(q, a, b) == pytest.approx(special.betaincinv(a, b, q),
                                                       rel=0, abs=1e-12)
    counts = _counts([1, 1, 1, 1])
    out = summarize_outcomes(counts, counts, weights=[1, 1.5, 1.453125, 1],
                             method="clopper-pearson")
    assert out.weighted.p_any_event_ci[1] == pytest.approx(1.0, abs=1e-12)


def test_binomial_interval_errors():
    with pytest.raises(AnalogsInputError, match=r"'trials' parameter of binomial_interval"):
        binomial_interval(0, 0)
    with pytest.raises(AnalogsInputError, match=r"'method' parameter of binomial_interval"):
        binomial_interval(1, 3, method="normal")


# --------------------------------------------------------------------------- weights

def test_analog_weights_schemes():
    """Documented weight formulas; Kish (1965) n_eff = (sum w)^2 / sum w^2."""
    d = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    np.testing.assert_allclose(analog_weights(d), 0.2)
    gauss = np.exp(-0.5 * (d / 3.0) ** 2)
    np.testing.assert_allclose(analog_weights(d, "gaussian"), gauss / gauss.sum())
    inverse = 1 / (d + 0.3)
    np.testing.assert_allclose(analog_weights(d, "inverse_distance"), inverse / inverse.sum())
    assert effective_sample_size(analog_weights(d)) == pytest.approx(5.0)
    kish = inverse.sum() ** 2 / (inverse ** 2).sum()
    assert effective_sample_size(analog_weights(d, "inverse_distance")) == pytest.approx(kish)
    with pytest.raises(AnalogsInputError, match=r"'scheme' parameter of analog_weights"):
        analog_weights(d, "rank")
    with pytest.raises(AnalogsInputError, match=r"'distances' parameter of analog_weights"):
        analog_weights([-1.0, 2.0])


# --------------------------------------------------------------------------- summaries

def _counts(totals, hail=None):
    days = pd.date_range("2000-06-01", periods=len(totals), freq="D", name="day")
    hail = totals if hail is None else hail
    return pd.DataFrame({"hail": hail, "total": totals}, index=days)


def test_summarize_outcomes_by_hand():
    """Frequencies worked by hand; intervals from scipy.stats.binomtest (exact)."""
    analogs = _counts([0, 1, 4, 0, 12, 2, 0, 0, 1, 3], hail=[0, 1, 0, 0, 5, 0, 0, 0, 0, 3])
    clim = _counts([0] * 15 + [1] * 5)
    out = summarize_outcomes(analogs, clim)
    assert isinstance(out, OutcomeSummary)
    assert out.n_analogs == 10 and out.p_any_event == 0.6
    ci = stats.binomtest(6, 10).proportion_ci(confidence_level=0.9, method="exact")
    assert out.p_any_event_ci == pytest.approx((ci.low, ci.high))
    assert out.climatology_p_any_event == 0.25
    assert out.ratio_to_climatology == pytest.approx(2.4)
    assert out.mean_events == pytest.approx(2.3)
    assert out.thresholds["p_at_least"].to_dict() == {1: 0.6, 3: 0.3, 10: 0.1}
    assert out.thresholds.index.name == "min_events"
    assert out.count_percentiles[50] == pytest.approx(np.percentile(analogs["total"], 50))
    assert out.by_kind.loc["hail", "p_any"] == 0.3
    assert out.by_kind.loc["hail", "climatology_p_any"] == 0.25
    assert out.by_kind.index.name == "kind"
    data = out.to_dict()  # the JSON block: string keys, [lo, hi] lists
    assert data["p_at_least"] == {"1": 0.6, "3": 0.3, "10": 0.1}
    assert data["count_percentiles"]["50"] == out.count_percentiles[50]
    assert data["p_any_event_ci"] == list(out.p_any_event_ci)
    assert data["by_kind"]["hail"]["p_any_ci"] == [out.by_kind.loc["hail", "p_any_low"],
                                                   out.by_kind.loc["hail", "p_any_high"]]
    json.dumps(data, allow_nan=False)


def test_summarize_outcomes_weighted_and_zero_climatology():
    analogs = _counts([0, 1, 0, 2])
    out = summarize_outcomes(analogs, _counts([0, 0, 0]), weights=[1, 3, 1, 3])
    assert np.isnan(out.ratio_to_climatology)  # undefined: NaN in the statistics
    assert out.to_dict()["ratio_to_climatology"] is None  # null only in the JSON
    weighted = out.weighted
    assert weighted.p_any_event == pytest.approx(0.75)
    assert weighted.mean_events == pytest.approx((3 + 6) / 8)
    assert weighted.n_effective == pytest.approx(64 / 20)  # Kish (1965)
    assert np.isnan(weighted.ratio_to_climatology)
    lo, hi = weighted.p_any_event_ci
    assert lo < 0.75 < hi
    json.dumps(out.to_dict(), allow_nan=False)
    with pytest.raises(AnalogsInputError, match=r"'weights' parameter of summarize_outcomes"):
        summarize_outcomes(analogs, analogs, weights=[1, 2])


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(0, 20), min_size=1, max_size=40),
       st.lists(st.floats(0.01, 10.0), min_size=40, max_size=40),
       st.sampled_from(["clopper-pearson", "jeffreys", "wilson"]))
def test_p_any_event_in_unit_interval_and_inside_ci(totals, raw_weights, method):
    """Property: p_any_event in [0, 1] and inside its interval, weighted too
    (binomial intervals contain the sample proportion; Brown et al. 2001)."""
    counts = _counts(totals)
    out = summarize_outcomes(counts, counts, weights=raw_weights[:len(totals)], method=method)
    for block in (out, out.weighted):
        lo, hi = block.p_any_event_ci
        assert 0.0 <= lo <= block.p_any_event <= hi <= 1.0


# --------------------------------------------------------------------------- maps

@pytest.fixture
def grid():
    return np.arange(30.0, 45.01, 0.25), np.arange(-105.0, -85.0, 0.25)


def test_neighbourhood_probability_against_pyproj(grid):
    """Grid points 39.7 km / 40.3 km (WGS84 geodesic, pyproj.Geod.fwd) from an event are
    inside / outside the 40 km neighbourhood (common practice)."""
    lat, lon = grid
    target_lat, target_lon = lat[20], lon[30]
    ev_lon, ev_lat, _ = GEOD.fwd(target_lon, target_lat, 90.0, 39_700)
    far_lon, far_lat, _ = GEOD.fwd(lon[50], lat[40], 0.0, 40_300)
    events = _events([("2020-05-01T18:00", ev_lat, ev_lon, "hail"),
                      ("2020-05-03T18:00", far_lat, far_lon, "hail")])
    field = neighbourhood_probability(events, ["2020-05-01", "2020-05-02", "2020-05-03"],
                                      lat, lon)
    assert field.sel(lat=target_lat, lon=target_lon).item() == pytest.approx(1 / 3)
    assert field.sel(lat=lat[40], lon=lon[50]).item() == 0.0
    # Every grid point is compared with pyproj's geodesic distance to the events.
    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    near = np.zeros(lat2d.shape)
    for e_lat, e_lon in ((ev_lat, ev_lon), (far_lat, far_lon)):
        _, _, metres = GEOD.inv(np.full(lat2d.size, e_lon), np.full(lat2d.size, e_lat),
                                lon2d.ravel(), lat2d.ravel())
        near += (metres.reshape(lat2d.shape) <= 40_000) / 3
    clear = np.abs(metres.reshape(lat2d.shape) - 40_000) > 250  # beyond the 0.5 % sphere error
    np.testing.assert_allclose(field.values[clear], near[clear])
    assert field.attrs["units"] == "1"


def test_neighbourhood_probability_matches_scipy_kdtree():
    """Same cells as a scipy cKDTree ball query over the grid's unit vectors (the
    search this function used before) with the chord of 40 km on the 6371.0088 km
    sphere, on a coarse grid crossing the date line and reaching the pole, with events
    near rows' edges, the pole and the grid's corners."""
    from scipy.spatial import cKDTree
    lat, lon = np.arange(50.0, 90.01, 0.3), np.arange(-180.0, 180.0, 0.4)
    rng = np.random.default_rng(8)
    n = 300
    ev_lat = np.concatenate([rng.uniform(49.5, 90.0, n - 3), [90.0, 50.0, 89.9]])
    ev_lon = np.concatenate([rng.uniform(-180.0, 180.0, n - 3), [0.0, -180.0, 179.9]])
    day = rng.integers(0, 5, n)
    times = pd.Timestamp("2020-05-01T18:00") + pd.to_timedelta(day, "D")
    events = _events(list(zip(times.astype(str), ev_lat, ev_lon, ["hail"] * n)))
    days = pd.date_range("2020-05-01", periods=5, freq="D")
    field = neighbourhood_probability(events, days, lat, lon, radius_km=40)

    def unit(la, lo):
        la, lo = np.radians(la), np.radians(lo)
        return np.column_stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)])

    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    tree = cKDTree(unit(lat2d.ravel(), lon2d.ravel()))
    chord = 2 * np.sin(40.0 / 6371.0088 / 2)
    hit = np.zeros((5, lat2d.size), dtype=bool)
    for k, cells in enumerate(tree.query_ball_point(unit(ev_lat, ev_lon), r=chord)):
        hit[day[k], cells] = True
    expected = hit.mean(axis=0).reshape(lat2d.shape)
    assert expected.max() > 0
    np.testing.assert_allclose(field.values, expected, atol=1e-12)


def test_neighbourhood_weights_and_repeated_days(grid):
    lat, lon = grid
    events = _events([("2020-05-01T18:00", 35.0, -95.0, "hail")])
    days = ["2020-05-01", "2020-05-02"]
    weighted = neighbourhood_probability(events, days, lat, lon, weights=[3, 1])
    assert weighted.sel(lat=35.0, lon=-95.0).item() == pytest.approx(0.75)
    with pytest.raises(AnalogsInputError, match=r"'radius_km' parameter"):
        neighbourhood_probability(events, days, lat, lon, radius_km=0)


def test_report_density_matches_scipy_gaussian_filter(grid):
    """Practically perfect hindcast (Brooks et al. 1998, sigma about 120 km, from
    memory): the field equals scipy.ndimage.gaussian_filter of the gridded counts per
    day, with sigma in grid units computed here from 111.2 km per degree."""
    lat, lon = grid
    rng = np.random.default_rng(5)
    n = 200
    times = pd.Timestamp("2020-05-01T18:00") + pd.to_timedelta(rng.integers(0, 4, n), "D")
    events = _events(list(zip(times.astype(str), rng.uniform(36, 40, n),
                              rng.uniform(-98, -92, n), ["hail"] * n)))
    days = pd.date_range("2020-05-01", periods=4, freq="D")
    field = report_density(events, days, lat, lon, sigma_km=120)
    # Nearest grid point computed independently by rounding to the 0.25 deg grid.
    counts = np.zeros((lat.size, lon.size))
    np.add.at(counts, (np.rint((events["lat"] - 30) / 0.25).astype(int),
                       np.rint((events["lon"] + 105) / 0.25).astype(int)), 1 / 4)
    np.testing.assert_allclose(grid_event_counts(events, days, lat, lon), counts)
    km_per_deg = np.pi * 6371.0088 / 180
    sigma = (120 / (0.25 * km_per_deg),
             120 / (0.25 * km_per_deg * np.cos(np.radians(lat.mean()))))
    assert gaussian_sigma_grid(lat, lon, 120) == pytest.approx(sigma)
    expected = ndimage.gaussian_filter(counts, sigma=sigma, mode="constant")
    np.testing.assert_allclose(field.values, expected, atol=1e-15)
    assert np.array_equal(field.values, ndimage.gaussian_filter(
        grid_event_counts(events, days, lat, lon), sigma=gaussian_sigma_grid(lat, lon, 120),
        mode="constant"))
    # Mass (events per analog day) conserved when the reports sit away from the edges.
    assert field.values.sum() == pytest.approx(n / 4, rel=1e-6)


@settings(max_examples=200, deadline=None)
@given(shape=st.tuples(st.integers(1, 40), st.integers(1, 40)),
       sigma=st.tuples(st.floats(0.0, 7.0), st.floats(0.0, 7.0)),
       truncate=st.sampled_from([4.0, 2.0, 0.6]), seed=st.integers(0, 2 ** 16))
def test_gaussian_smooth_is_scipy_gaussian_filter_to_the_last_bit(shape, sigma, truncate, seed):
    """The reference is scipy.ndimage.gaussian_filter (mode "constant"): the same values
    bit for bit, for sparse counts and dense fields, kernels wider than the array, an
    axis without smoothing (sigma 0) and short truncations."""
    rng = np.random.default_rng(seed)
    sparse = rng.random(shape) * (rng.random(shape) < 0.1) * 3
    for values in (sparse, rng.standard_normal(shape) * 100):
        expected = ndimage.gaussian_filter(values, sigma=sigma, mode="constant", cval=0.0,
                                           truncate=truncate)
        assert np.array_equal(gaussian_smooth(values, sigma, truncate=truncate), expected)


def test_outcome_maps_cf_netcdf_atomic(tmp_path, grid, small_events):
    """CF attributes (CF conventions 1.8: standard_name, units, axis) and no
    _FillValue on coordinates, checked by reading the file back with netCDF4."""
    lat, lon = grid
    ds = outcome_maps(small_events, ["2020-05-01", "2020-05-03"], lat, lon)
    path = tmp_path / "maps.nc"
    path.write_text("old")
    write_maps(ds, path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["maps.nc"]  # no temp left
    with netCDF4.Dataset(path) as nc:
        assert nc.Conventions == "CF-1.8"
        for name, standard, units, axis in (("lat", "latitude", "degrees_north", "Y"),
                                            ("lon", "longitude", "degrees_east", "X")):
            var = nc.variables[name]
            assert (var.standard_name, var.units, var.axis) == (standard, units, axis)
            assert "_FillValue" not in var.ncattrs()
        assert nc.variables["neighbourhood_probability"].units == "1"
        assert "long_name" in nc.variables["report_density"].ncattrs()
        assert nc.variables["neighbourhood_probability"][:].max() == pytest.approx(0.5)
    broken = ds.copy()
    broken.attrs["unwritable"] = {"nested": 1}  # NetCDF attributes cannot hold a dict
    with pytest.raises(TypeError, match="unwritable"):
        write_maps(broken, path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["maps.nc"]
    with netCDF4.Dataset(path) as nc:  # the previous file is intact
        assert "neighbourhood_probability" in nc.variables


# --------------------------------------------------------------------------- composites

def test_bearing_and_distance_against_pyproj():
    """Initial great-circle bearing and distance against the WGS84 geodesic of
    pyproj.Geod.inv: within 1 degree and 0.5 %."""
    rng = np.random.default_rng(9)
    lat1, lon1 = rng.uniform(15, 35, 200), rng.uniform(-100, -80, 200)
    lat2, lon2 = lat1 + rng.uniform(-8, 8, 200), lon1 + rng.uniform(-8, 8, 200)
    azimuth, _, metres = GEOD.inv(lon1, lat1, lon2, lat2)
    difference = (initial_bearing_deg(lat1, lon1, lat2, lon2) - azimuth + 180) % 360 - 180
    assert np.abs(difference).max() < 1.0
    np.testing.assert_allclose(great_circle_km(lat1, lon1, lat2, lon2), metres / 1000,
                               rtol=5e-3)


def test_cyclone_composite_quadrants_and_bins():
    """Events placed by pyproj.Geod.fwd at known azimuths and distances from the centre
    land in the expected earth-relative quadrant (NE = bearing 0-90) and distance bin;
    the motion frame rotates by the heading (front-right = 0-90 deg right of motion)."""
    centre_lat, centre_lon = 27.0, -92.0
    placed = [(45, 100, "tornado"), (60, 350, "tornado"), (30, 650, "tornado"),
              (135, 250, "wind"), (225, 450, "tornado"), (315, 150, "wind"),
              (10, 1500, "tornado")]  # last one beyond the 1000 km edge
    rows = []
    for azimuth, km, kind in placed:
        lon, lat, _ = GEOD.fwd(centre_lon, centre_lat, azimuth, km * 1000)
        rows.append(("2005-08-29T18:00", lat, lon, kind))
    rows.append(("2005-08-31T18:00", 27.5, -91.5, "tornado"))  # no centre that day
    events = _events(rows)
    centres = pd.DataFrame({"day": pd.to_datetime(["2005-08-29", "2005-08-29"]),
                            "lat": [centre_lat, 10.0], "lon": [centre_lon, -40.0],
                            "motion_dir_deg": [90.0, 0.0]})
    earth = cyclone_relative_composite(events, centres)
    assert earth.attrs == {"frame": "earth", "n_centres": 2, "n_events": 6}
    assert earth.loc[("all", "NE"), "total"] == 3
    assert earth.loc[("tornado", "NE"), "0-200 km"] == 1
    assert earth.loc[("tornado", "NE"), "200-400 km"] == 1
    assert earth.loc[("tornado", "NE"), "600-800 km"] == 1
    assert earth.loc[("wind", "SE"), "200-400 km"] == 1
    assert earth.loc[("tornado", "SW"), "400-600 km"] == 1
    assert earth.loc[("wind", "NW"), "0-200 km"] == 1
    assert earth.loc["tornado", "share"].idxmax() == "NE"
    assert earth.loc["tornado", "share"].sum() == pytest.approx(1.0)
    # Heading east (90 deg): NE (bearing 45) is front-left, SE (135) front-right.
    motion = cyclone_relative_composite(events, centres, frame="motion", kinds=["wind"])
    assert motion.loc[("wind", "front_right"), "total"] == 1
    assert motion.loc[("wind", "rear_left"), "total"] == 1
    assert motion.loc[("all", "front_left"), "total"] == 0  # kinds=['wind'] only


def test_cyclone_composite_errors(small_events):
    centres = pd.DataFrame({"day": ["2020-05-01"], "lat": [30.0], "lon": [-95.0]})
    with pytest.raises(AnalogsInputError, match=r"needs column\(s\) motion_dir_deg"):
        cyclone_relative_composite(small_events, centres, frame="motion")
    with pytest.raises(AnalogsInputError, match=r"'distance_bins_km' parameter"):
        cyclone_relative_composite(small_events, centres, distance_bins_km=(0, 500, 200))
    with pytest.raises(AnalogsInputError, match=r"'frame' parameter"):
        cyclone_relative_composite(small_events, centres, frame="storm")


def test_summarize_outcomes_without_climatology_days_is_nan_not_none():
    """No climatology days: the climatology statistics are undefined, NaN in the summary
    (labelled numbers stay floats) and null only in its JSON block."""
    analogs = _counts([0, 2, 1], hail=[0, 1, 1])
    out = summarize_outcomes(analogs, analogs.iloc[:0])
    assert out.n_climatology_days == 0
    for value in (out.climatology_p_any_event, out.climatology_mean_events,
                  out.ratio_to_climatology, *out.thresholds["climatology_p_at_least"],
                  *out.by_kind["climatology_p_any"]):
        assert isinstance(value, float) and np.isnan(value)
    data = out.to_dict()
    assert data["climatology_p_any_event"] is None and data["ratio_to_climatology"] is None
    assert set(data["climatology_p_at_least"].values()) == {None}
    assert data["by_kind"]["hail"]["climatology_p_any"] is None
    json.dumps(data, allow_nan=False)
