"""Seasonal regime tables and the briefing checked against outside references: the demo generator's
truth table (pandas.crosstab), scipy.stats (linregress, kendalltau, binomtest), numpy
means of the EOF reconstructions, netCDF4 for the CF file, hand-built run sequences."""

import netCDF4
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from analogs.errors import AnalogsInputError
from analogs.stages.outcomes import daily_event_counts
from analogs.stages.seasonal import (
    example_days_across_record,
    outcomes_by_regime_and_month,
    parse_months,
    regime_composites,
    regime_frequency_by_month,
    regime_frequency_by_year,
    regime_persistence,
    regime_runs,
    regime_trend,
    season_days,
)
from analogs.workflows.briefing import build_briefing, store_regime_composites
from analogs.workflows.files import write_netcdf

#: Rule classifier agreement with the demo truth, measured on the 4-year seed-11 demo:
#: 0.912 of 1461 days (generator of commit 67b24ad); the floor guards against a
#: regression of the rules or the generator.
MIN_AGREEMENT = 0.85


def _tags(dates, regimes, confidence=None) -> pd.DataFrame:
    dates = pd.DatetimeIndex(pd.to_datetime(dates)).rename("date")
    confidence = np.full(len(dates), 0.8) if confidence is None else confidence
    return pd.DataFrame({"regime": list(regimes), "confidence": confidence}, index=dates)


# ------------------------------------------------------------------ parsing

@pytest.mark.parametrize("text, months", [
    ("5-9", (5, 6, 7, 8, 9)), ("11-2", (1, 2, 11, 12)), ("6,8", (6, 8)),
    ("4,6-7", (4, 6, 7)), ("7", (7,)),
])
def test_parse_months(text, months):
    assert parse_months(text) == months


@pytest.mark.parametrize("text", ["13", "0-4", "May", "5-", ""])
def test_parse_months_rejects_bad_text(text):
    with pytest.raises(AnalogsInputError, match="--season"):
        parse_months(text)


def test_season_days_counts_the_calendar():
    # May-Sep has 31+30+31+31+30 = 153 days; Feb averages 28.25 over a leap cycle
    # (Gregorian calendar, common knowledge).
    assert season_days("5-9") == 153
    assert season_days([2]) == pytest.approx(28.25)
    assert season_days() == 365.25


# ------------------------------------------------------------- frequencies

def test_monthly_frequencies_match_the_generator_truth(demo_dir, demo_store):
    """The demo truth table counted by pandas.crosstab is the reference: each
    (month, regime) share of our table differs from the truth share by at most that
    month's share of misclassified days (the classifier's measured error), since a
    count can only move by the days tagged differently from the truth."""
    truth = pd.read_csv(demo_dir / "truth.csv", parse_dates=["date"]).set_index("date")
    tags = demo_store.tags
    frequency = regime_frequency_by_month(tags)
    ours = frequency.pivot(index="month", columns="regime", values="fraction")
    reference = pd.crosstab(truth.index.month, truth["regime"], normalize="index")
    reference = reference.reindex(columns=ours.columns, fill_value=0.0)

    joined = tags[["regime"]].join(truth[["regime"]].rename(columns={"regime": "truth"}))
    agree = joined["regime"] == joined["truth"]
    assert agree.mean() >= MIN_AGREEMENT
    error_by_month = 1.0 - agree.groupby(joined.index.month).mean()
    difference = (ours - reference.to_numpy()).abs().max(axis=1)
    assert (difference <= error_by_month + 1e-12).all(), (difference, error_by_month)
    # Where the classifier is right every day the shares are identical.
    assert (difference[error_by_month == 0] == 0).all()


def test_monthly_totals_add_up_to_days_tagged(demo_store):
    tags = demo_store.tags
    frequency = regime_frequency_by_month(tags, months="5-9")
    totals = frequency.groupby("month")["days"].sum()
    expected = tags.index[tags.index.month.isin([5, 6, 7, 8, 9])].month.value_counts().sort_index()
    pd.testing.assert_series_equal(totals, expected, check_names=False)
    assert totals.sum() == int(tags.index.month.isin([5, 6, 7, 8, 9]).sum())
    assert (frequency.groupby("month")["days_tagged"].first() == totals).all()
    np.testing.assert_allclose(frequency.groupby("month")["fraction"].sum(), 1.0)
    # Every regime listed in every month, zeros included.
    assert frequency.groupby("month").size().nunique() == 1


def test_trend_equals_scipy_on_the_same_yearly_series(demo_store):
    """p-values and slopes from scipy.stats.linregress and kendalltau on the yearly
    shares of regime_frequency_by_year (scipy is the reference)."""
    months = (5, 6, 7, 8, 9)
    trend = regime_trend(demo_store.tags, months)
    by_year = regime_frequency_by_year(demo_store.tags, months)
    checked = 0
    for regime, part in by_year.groupby("regime"):
        if np.ptp(part["fraction"]) == 0:
            continue
        fit = stats.linregress(part["year"], part["fraction"])
        tau = stats.kendalltau(part["year"], part["fraction"])
        row = trend.loc[regime]
        assert row["p_value"] == pytest.approx(fit.pvalue, rel=1e-12)
        assert row["slope_days_per_decade"] == pytest.approx(fit.slope * 153 * 10, rel=1e-12)
        assert row["kendall_p_value"] == pytest.approx(tau.pvalue, rel=1e-12)
        assert row["kendall_tau"] == pytest.approx(tau.statistic, rel=1e-12)
        checked += 1
    assert checked >= 2


def test_planted_trend_is_found_with_its_slope():
    """Twelve Julys; the number of 'tropical' days grows by exactly one a year, so the
    slope is 10 days per decade with no residual (worked example, planted)."""
    dates, regimes = [], []
    for i, year in enumerate(range(2001, 2013)):
        days = pd.date_range(f"{year}-07-01", f"{year}-07-31")
        dates.extend(days)
        regimes.extend(["tropical"] * (5 + i) + ["other"] * (len(days) - 5 - i))
    trend = regime_trend(_tags(dates, regimes), months=[7])
    assert trend.loc["tropical", "slope_days_per_decade"] == pytest.approx(10.0)
    assert trend.loc["other", "slope_days_per_decade"] == pytest.approx(-10.0)
    assert trend.loc["tropical", "p_value"] < 1e-10
    assert trend.loc["tropical", "kendall_tau"] == pytest.approx(1.0)
    assert trend.loc["tropical", "mean_days_per_season"] == pytest.approx(10.5)
    # A regime that never occurs has a constant (zero) series: no trend.
    assert trend.loc["strong_trough", "slope_days_per_decade"] == 0.0
    assert trend.loc["strong_trough", "p_value"] == 1.0


def test_trend_needs_three_years():
    tags = _tags(pd.date_range("2001-06-01", "2002-06-30"), ["other"] * 395)
    assert regime_trend(tags)["p_value"].isna().all()


# ---------------------------------------------------------------- outcomes

def test_outcomes_by_regime_and_month_against_scipy(demo_store):
    tags = demo_store.tags
    counts = daily_event_counts(demo_store.events, tags.index, demo_store.region)
    table = outcomes_by_regime_and_month(tags, counts)
    assert table["n_days"].sum() == len(tags)
    kinds = [c for c in counts.columns if c != "total"]
    busiest = table.sort_values("n_days").iloc[-1]
    days = tags.index[(tags["regime"] == busiest["regime"]) & (tags.index.month == busiest["month"])]
    chosen = counts.loc[days]
    hits = int((chosen["total"] > 0).sum())
    assert busiest["n_days"] == len(days)
    assert busiest["p_any_event"] == pytest.approx(hits / len(days))
    assert busiest["mean_events"] == pytest.approx(chosen["total"].mean())
    for kind in kinds:
        assert busiest[f"mean_{kind}"] == pytest.approx(chosen[kind].mean())
    # Clopper-Pearson interval: scipy.stats.binomtest(...).proportion_ci(method="exact").
    interval = stats.binomtest(hits, len(days)).proportion_ci(confidence_level=0.9, method="exact")
    assert busiest["p_any_event_low"] == pytest.approx(interval.low, abs=1e-9)
    assert busiest["p_any_event_high"] == pytest.approx(interval.high, abs=1e-9)
    assert table["p_any_event"].between(0, 1).all()


def test_outcomes_need_every_tagged_day():
    tags = _tags(pd.date_range("2001-06-01", periods=3), ["other"] * 3)
    counts = pd.DataFrame({"hail": [0, 1], "total": [0, 1]},
                          index=pd.date_range("2001-06-01", periods=2))
    with pytest.raises(AnalogsInputError, match="lacks 1 tagged day"):
        outcomes_by_regime_and_month(tags, counts)


# -------------------------------------------------------------- composites

def test_composites_equal_the_mean_of_reconstructed_days(demo_store, tmp_path):
    """Reference: numpy mean over the regime's days of eof.reconstruct(pcs) per day,
    and of climatology.predict for the mean field."""
    store = demo_store
    months = (6, 7, 8)
    composites = regime_composites(store.tags, store.climatology, store.eof, store.pcs,
                                   months=months)
    tags = store.tags[store.tags.index.month.isin(months)]
    for regime in ("northwest_flow", "tropical"):
        rows = np.flatnonzero(store.days.isin(tags.index[tags["regime"] == regime]))
        assert rows.size > 0
        daily = store.eof.reconstruct(store.pcs.isel(time=rows))
        climate = store.climatology.predict(store.times[rows])
        for field in store.fields:
            expected = np.mean(daily[field].values, axis=0)
            np.testing.assert_allclose(composites[f"{field}_anomaly"].sel(regime=regime).values,
                                       expected, rtol=1e-9, atol=1e-9 * np.nanmax(abs(expected)))
            np.testing.assert_allclose(composites[f"{field}_mean"].sel(regime=regime).values,
                                       expected + np.mean(climate[field].values, axis=0),
                                       rtol=1e-9)
        assert int(composites["n_days"].sel(regime=regime)) == rows.size
    assert composites["z500_anomaly"].dims == ("regime", "lat", "lon")
    assert "kept EOFs" in composites.attrs["composite_method"]

    path = write_netcdf(composites, tmp_path / "composites.nc")
    with netCDF4.Dataset(path) as nc:
        assert nc.Conventions == "CF-1.8"
        # CF files carry UDUNITS units: geopotential metres are written as "m".
        assert nc["z500_anomaly"].units == "m"
        assert nc["lat"].standard_name == "latitude"
        assert "kept EOFs" in nc["z500_anomaly"].long_name
        assert list(nc["regime"][:]) == list(composites["regime"].values)


def test_composites_from_archive_files_are_the_archive_anomalies(demo_store, demo_files):
    """With files=, the composite is the mean of the archive's own anomalies (no EOF
    truncation): reference computed here with xarray from the same files."""
    from analogs.stages.sources import open_archive
    composites = store_regime_composites(demo_store, [7], files=demo_files)
    archive = open_archive(demo_files, progress=False)
    days = demo_store.tags.index[(demo_store.tags.index.month == 7)
                                 & (demo_store.tags["regime"] == "tropical")]
    chosen = archive.sel(time=archive["time"].dt.floor("D").isin(days))
    # in float64, as the composites (float32 anomalies differ by their round-off, 3e-6 gpm)
    anomaly = demo_store.climatology.transform(chosen.astype("float64"))["z500"].mean("time")
    np.testing.assert_allclose(composites["z500_anomaly"].sel(regime="tropical").values,
                               anomaly.values, rtol=1e-6, atol=1e-6)
    assert "archive anomalies" in composites.attrs["composite_method"]
    assert composites.attrs["store"] == str(demo_store.path)


def test_composites_are_a_pure_stage(demo_store):
    """The stage takes arrays (here one planted anomaly field), not a store: every
    regime's anomaly composite is the mean of the anomalies handed in on its days."""
    import xarray as xr
    tags = demo_store.tags
    lat, lon = demo_store.grid
    values = np.arange(len(demo_store.times), dtype=float)[:, None, None] * np.ones((lat.size, lon.size))
    anomalies = xr.Dataset({"z500": (("time", "lat", "lon"), values, {"units": "gpm"})},
                           coords={"time": demo_store.times, "lat": lat, "lon": lon})
    composites = regime_composites(tags, demo_store.climatology, demo_store.eof, demo_store.pcs,
                                   months=[7], anomalies=anomalies, fields=["z500"])
    july = tags.index.month == 7
    for regime in ("tropical", "northwest_flow"):
        rows = np.flatnonzero(july & (tags["regime"] == regime).to_numpy())
        assert composites["z500_anomaly"].sel(regime=regime).values[0, 0] == pytest.approx(rows.mean())
    assert list(composites.data_vars) == ["z500_anomaly", "z500_mean", "n_days"]
    with pytest.raises(AnalogsInputError, match="'pcs' parameter of regime_composites"):
        regime_composites(tags, demo_store.climatology, demo_store.eof, demo_store.pcs.values)


# ------------------------------------------------------------- persistence

def test_runs_break_at_gaps_and_changes():
    # Hand-built: A A A B B | gap | A A C (day 6 missing), then C C on 2001-06-10..11.
    dates = ["2001-06-01", "2001-06-02", "2001-06-03", "2001-06-04", "2001-06-05",
             "2001-06-07", "2001-06-08", "2001-06-09", "2001-06-10", "2001-06-11"]
    regimes = ["tropical"] * 3 + ["other"] * 2 + ["tropical"] * 2 + ["strong_trough"] * 3
    runs = regime_runs(_tags(dates, regimes))
    assert runs["length_days"].tolist() == [3, 2, 2, 3]
    assert runs["regime"].tolist() == ["tropical", "other", "tropical", "strong_trough"]
    assert runs["start"].iloc[2] == pd.Timestamp("2001-06-07")
    assert runs["length_days"].sum() == len(dates)


def test_persistence_statistics_against_numpy():
    rng = np.random.default_rng(3)
    lengths = rng.integers(1, 9, size=40)
    labels = ["northwest_flow", "other"] * 20
    regimes = np.repeat(labels, lengths)
    dates = pd.date_range("2001-01-01", periods=regimes.size)
    table = regime_persistence(_tags(dates, regimes))
    for label in ("northwest_flow", "other"):
        expected = lengths[[i for i, r in enumerate(labels) if r == label]].astype(float)
        row = table.loc[label]
        assert row["n_runs"] == expected.size
        assert row["mean_days"] == pytest.approx(expected.mean())
        assert row["median_days"] == pytest.approx(np.median(expected))
        assert row["p90_days"] == pytest.approx(np.percentile(expected, 90))
        assert row["max_days"] == expected.max()
    assert table.loc["tropical", "n_runs"] == 0
    assert np.isnan(table.loc["tropical", "mean_days"])


def test_bad_tags_and_months_are_refused():
    with pytest.raises(AnalogsInputError, match="'regime' column"):
        regime_frequency_by_month(pd.DataFrame({"label": ["other"]}))
    tags = _tags(pd.date_range("2001-06-01", periods=3), ["other"] * 3)
    with pytest.raises(AnalogsInputError, match="'months' parameter.*1-12"):
        regime_frequency_by_month(tags, months=[13])
    with pytest.raises(AnalogsInputError, match="'n_periods' parameter of "
                                                "example_days_across_record"):
        example_days_across_record(tags, None, n_periods=0)


# ---------------------------------------------------------------- briefing

def test_build_briefing_writes_everything(demo_store, tmp_path):
    out = tmp_path / "briefing"
    written = build_briefing(demo_store, out, months="5-9", progress=False)
    for name in ("regime_frequency_by_month.csv", "regime_frequency_by_month.parquet",
                 "regime_trend.csv", "regime_persistence.parquet", "example_days.csv",
                 "regime_run_lengths.csv", "regime_yearly_series.parquet",
                 "outcomes_by_regime_and_month.csv", "regime_composites.nc",
                 "slides/02-regime-calendar.png", "slides/01-regime-share-by-month.png",
                 "slides/06-regime-composites.png", "slides/09-reliability.png",
                 "slides/10-roc.png", "index.html"):
        assert written[name].is_file(), name
        assert written[name].stat().st_size > 0
    csv = pd.read_csv(written["regime_frequency_by_month.csv"])
    parquet = pd.read_parquet(written["regime_frequency_by_month.parquet"])
    assert sorted(csv["month"].unique()) == [5, 6, 7, 8, 9]
    pd.testing.assert_frame_equal(csv[["month", "regime", "days"]],
                                  parquet[["month", "regime", "days"]], check_dtype=False)
    page = written["index.html"].read_text()
    assert "May-Sep" in page and "Guidance only" in page
    assert "<title>Seasonal regime briefing, May-Sep</title>" in page
    assert page.count("data:image/png;base64,") >= 6
    assert "Cross-validated skill" in page and "Brier skill score" in page
    assert "http://" not in page and "https://" not in page
    assert not list(out.glob(".*"))   # no temporary file left behind


# -------------------------------------------------- archive of seasonal means

def test_seasonal_means_are_counted_in_samples_not_days():
    """eofs' hgt_djf.nc (real reanalysis data in a registry package: 65 winter-mean 500 hPa
    height fields, one a year) tagged by the rules: the briefing statistics are in the
    archive's own unit, samples (one a season), never fractions times 365 days; trends
    equal scipy.stats.linregress of the yearly shares times one sample a season times 10;
    no run lengths, since no two samples are consecutive days."""
    import warnings

    from analogs.stages.regimes import tag_days
    from analogs.stages.seasonal import archive_sampling
    from analogs.stages.sources import open_archive
    eofs_examples = pytest.importorskip("eofs.examples")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # its reference date; units inferred as gpm
        archive = open_archive(eofs_examples.example_data_path("hgt_djf.nc"))
    tags = tag_days(archive).set_index("date")
    sampling = archive_sampling(tags)
    assert (sampling.unit, sampling.per_season, sampling.consecutive_days) == ("sample", 1.0,
                                                                                False)
    frequency = regime_frequency_by_month(tags)
    assert {"samples", "samples_tagged"} <= set(frequency.columns)
    assert frequency["samples"].sum() == 65
    trend = regime_trend(tags)
    assert "mean_days_per_season" not in trend and "slope_days_per_decade" not in trend
    np.testing.assert_allclose(trend["mean_samples_per_season"].sum(), 1.0)
    assert (trend["mean_samples_per_season"] <= 1.0).all()
    by_year = regime_frequency_by_year(tags)
    for regime, part in by_year.groupby("regime"):
        if np.ptp(part["fraction"]) > 0:
            fit = stats.linregress(part["year"], part["fraction"])
            assert trend.loc[regime, "slope_samples_per_decade"] == pytest.approx(
                fit.slope * 1.0 * 10.0, rel=1e-12)
    persistence = regime_persistence(tags)
    assert (persistence["n_runs"] == 0).all() and persistence["mean_days"].isna().all()
    assert "no consecutive days" in persistence.attrs["note"]
    # A daily archive keeps days (the planted-trend test above checks its numbers).
    daily = _tags(pd.date_range("2001-06-01", periods=40), ["other"] * 40)
    assert archive_sampling(daily, [6, 7]).unit == "day"
    assert archive_sampling(daily, [6, 7]).per_season == 61.0
    assert "slope_days_per_decade" in regime_trend(daily)
