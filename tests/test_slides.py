"""The trainer's slide pack: its statistics against outside references and its files.

References: scipy.stats (linregress for the least-squares line and its t-test p-value,
kendalltau for the Mann-Kendall test); pandas (run lengths by the shift-compare-cumsum
idiom, common practice, no source); a composite shift checked by hand (three lows of
known depth at known places); numpy brute force for the example days' centroid rule.
"""

import io

import matplotlib.image
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from analogs import CAUTION
from analogs.presentation import slides
from analogs.presentation.figures import figure_png
from analogs.stages.seasonal import (
    cyclone_centred_composite,
    example_days_across_record,
    regime_frequency_by_month,
    regime_trend,
    run_length_counts,
    season_tags,
    yearly_regime_series,
)
from analogs.workflows.briefing import build_briefing

MAY_TO_SEPTEMBER = (5, 6, 7, 8, 9)


def _tags(dates, regimes):
    dates = pd.DatetimeIndex(pd.to_datetime(dates)).rename("date")
    return pd.DataFrame({"regime": list(regimes), "confidence": 0.8}, index=dates)


# ------------------------------------------------------------------ statistics

def test_yearly_series_line_and_p_values_match_scipy():
    """Whole Julys, 2001-2012: tropical days rise by a planted amount plus noise. The
    fitted line equals scipy.stats.linregress of the day counts on the year; the
    p-values equal linregress's t-test and scipy.stats.kendalltau (Mann 1945, Kendall
    1975) of the same counts."""
    rng = np.random.default_rng(3)
    dates, regimes, planted = [], [], {}
    for year in range(2001, 2013):
        n = int(np.clip(5 + (year - 2001) + rng.integers(-3, 4), 0, 31))
        planted[year] = n
        days = pd.date_range(f"{year}-07-01", f"{year}-07-31")
        dates += list(days)
        regimes += ["tropical"] * n + ["other"] * (31 - n)
    tags = _tags(dates, regimes)
    series = yearly_regime_series(tags, [7])
    tropical = series[series["regime"] == "tropical"]
    years = np.arange(2001, 2013)
    counts = np.array([planted[y] for y in years], dtype=float)
    np.testing.assert_array_equal(tropical["days"], counts)
    np.testing.assert_allclose(tropical["days_per_season"], counts)
    fit = stats.linregress(years, counts)
    np.testing.assert_allclose(tropical["fitted_days_per_season"],
                               fit.intercept + fit.slope * years, rtol=1e-10)
    trend = regime_trend(tags, [7])
    assert trend.loc["tropical", "p_value"] == pytest.approx(fit.pvalue, rel=1e-9)
    assert trend.loc["tropical", "slope_days_per_decade"] == pytest.approx(10 * fit.slope)
    assert trend.loc["tropical", "kendall_p_value"] == pytest.approx(
        stats.kendalltau(years, counts).pvalue, rel=1e-9)
    assert fit.pvalue < 0.01   # the planted rise is found


def test_run_length_counts_match_pandas():
    """Random regimes over two summers with a missing day: the histogram of spells
    equals pandas' shift-compare-cumsum grouping (a gap also starts a spell)."""
    rng = np.random.default_rng(5)
    days = pd.date_range("2003-06-01", "2003-08-31").append(
        pd.date_range("2004-06-01", "2004-08-31")).delete(40)
    regimes = rng.choice(["tropical", "other", "northwest_flow"], size=len(days),
                         p=[0.3, 0.5, 0.2])
    # Repeat some days' regime to make long spells.
    regimes = np.repeat(regimes[::3], 3)[:len(days)]
    tags = _tags(days, regimes)
    frame = pd.DataFrame({"regime": regimes}, index=days)
    new = (frame["regime"] != frame["regime"].shift()) | (
        frame.index.to_series().diff() != pd.Timedelta(days=1))
    spells = frame.groupby(new.cumsum()).agg(regime=("regime", "first"),
                                             length=("regime", "size"))
    expected = spells.groupby(["regime", "length"]).size()
    counts = run_length_counts(tags)
    got = counts[counts["n_runs"] > 0].set_index(["regime", "length_days"])["n_runs"]
    pd.testing.assert_series_equal(got.sort_index(), expected.sort_index(),
                                   check_names=False)
    # Every length from 1 to the longest is listed.
    for regime, part in counts.groupby("regime"):
        assert list(part["length_days"]) == list(range(1, part["length_days"].max() + 1))


def test_no_run_lengths_without_consecutive_days():
    tags = _tags(pd.date_range("2001-01-15", periods=20, freq="365D"), ["other"] * 20)
    counts = run_length_counts(tags)
    assert len(counts) == 0 and "no consecutive days" in counts.attrs["note"]


def test_cyclone_centred_composite_checked_by_hand():
    """Three days, each a low of -100 gpm in one grid cell at a different place (1 degree
    grid). Centred, the three lows coincide: -100 at (0, 0); averaged in place each
    cell holds one low among three days: -33.3. The day whose centre is on the
    southern edge reaches no southern offset, so those offsets count two days. One
    report 1 cell north and 2 east of day 1's centre gives 1/3 report per cell per day
    there."""
    lat = np.arange(20.0, 41.0)
    lon = np.arange(-110.0, -79.0)
    centres = pd.DataFrame({"day": pd.to_datetime(["2005-07-01", "2005-07-02", "2005-07-03"]),
                            "lat": [30.2, 20.0, 35.0], "lon": [-100.0, -90.0, -85.1]})
    z = np.zeros((3, lat.size, lon.size))
    for t, (c_lat, c_lon) in enumerate(zip(centres["lat"], centres["lon"])):
        z[t, np.abs(lat - c_lat).argmin(), np.abs(lon - c_lon).argmin()] = -100.0
    fields = xr.Dataset({"z500": (("time", "lat", "lon"), z, {"units": "gpm"})},
                        coords={"time": centres["day"].to_numpy() + np.timedelta64(12, "h"),
                                "lat": lat, "lon": lon})
    events = pd.DataFrame({"day": [pd.Timestamp("2005-07-01"), pd.Timestamp("2005-07-09")],
                           "lat": [31.0, 31.0], "lon": [-98.0, -98.0], "kind": ["hail"] * 2})
    out = cyclone_centred_composite(fields, centres, half_width_cells=3, events=events)
    assert out["z500"].sel(dlat=0.0, dlon=0.0).item() == pytest.approx(-100.0)
    assert float(out["z500"].min()) == pytest.approx(-100.0)
    assert np.nanmin(z.mean(axis=0)) == pytest.approx(-100.0 / 3.0)   # the smeared mean
    assert out["z500"].attrs["units"] == "gpm"
    assert out["n_days"].sel(dlat=-1.0, dlon=0.0).item() == 2   # day 2 is on the edge
    assert out["n_days"].sel(dlat=1.0, dlon=0.0).item() == 3
    assert out["report_density"].sel(dlat=1.0, dlon=2.0).item() == pytest.approx(1.0 / 3.0)
    assert float(out["report_density"].sum()) == pytest.approx(1.0 / 3.0)  # 07-09: no centre
    assert out.attrs["n_days"] == 3


def test_example_days_spread_over_the_record(demo_store):
    """One example per regime per period, every period represented, each the regime's
    day nearest its mean PC vector within the period (numpy brute force)."""
    tags = season_tags(demo_store.tags, MAY_TO_SEPTEMBER)
    examples = example_days_across_record(tags, demo_store.pcs, n_periods=2)
    years = np.unique(tags.index.year)
    first_half = years[: int(np.ceil(years.size / 2))]
    pcs = demo_store.pcs.to_pandas()
    pcs.index = pd.DatetimeIndex(pcs.index).normalize()
    for regime, part in examples.groupby("regime"):
        assert len(part) == 2
        days = tags.index[tags["regime"] == regime]
        vectors = pcs.loc[days].to_numpy()
        distance = np.linalg.norm(vectors - vectors.mean(axis=0), axis=1)
        for period_years, row in zip((first_half, years[first_half.size:]),
                                     part.sort_values("date").itertuples()):
            inside = np.isin(days.year, period_years)
            assert row.date == days[inside][np.argmin(distance[inside])]
            assert row.distance_to_centroid == pytest.approx(distance[inside].min())


# ------------------------------------------------------------------ drawing

def test_share_by_month_shows_the_season_months_by_name(demo_store):
    tags = season_tags(demo_store.tags, MAY_TO_SEPTEMBER)
    frequency = regime_frequency_by_month(tags)
    figure = slides.regime_share_by_month(frequency, season="May-Sep")
    (ax,) = [a for a in figure.axes if a.get_legend() is not None]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["May", "Jun", "Jul", "Aug", "Sep"]
    july = frequency[frequency["month"] == 7].set_index("regime")["fraction"]
    for container, regime in zip(ax.containers, ax.get_legend_handles_labels()[1]):
        assert container[2].get_height() == pytest.approx(100.0 * july[regime])
    assert "Jul" in figure.alt_text


def test_calendar_spans_the_season_only(demo_store):
    tags = season_tags(demo_store.tags, MAY_TO_SEPTEMBER)
    figure = slides.regime_calendar(tags, MAY_TO_SEPTEMBER, season="May-Sep")
    ax = figure.axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["May", "Jun", "Jul", "Aug", "Sep"]
    image = ax.get_images()[0].get_array()
    assert image.shape == (len(np.unique(tags.index.year)), 153)  # 1 May to 30 Sep
    regimes = slides.ordered_regimes(tags["regime"])
    day = tags.index[100]
    code = image[day.year - tags.index.year.min(), (day - pd.Timestamp(day.year, 5, 1)).days]
    assert regimes[int(code)] == tags["regime"].iloc[100]


def test_season_order_reads_over_the_year_end():
    assert slides.season_order([1, 2, 11, 12]) == [11, 12, 1, 2]
    assert slides.season_order([5, 6, 7]) == [5, 6, 7]


# ------------------------------------------------------------------ the command's files

SLIDE_NAMES = ["01-regime-share-by-month", "02-regime-calendar", "03-regime-days-by-year",
               "04-regime-spell-lengths", "05-reports-by-regime-month-kind",
               "06-regime-composites", "07-tropical-cyclone-centred", "08-example-days",
               "09-reliability", "10-roc"]


@pytest.fixture(scope="module")
def briefing(demo_store, tmp_path_factory):
    out = tmp_path_factory.mktemp("briefing") / "brief"
    return out, build_briefing(demo_store, out, months="5-9", progress=False)


def test_slides_written_with_findable_names_and_content(briefing):
    out, written = briefing
    names = sorted(p.name for p in (out / "slides").iterdir())
    assert names == [f"{n}.png" for n in SLIDE_NAMES]
    for name in SLIDE_NAMES:
        path = written[f"slides/{name}.png"]
        image = matplotlib.image.imread(io.BytesIO(path.read_bytes()), format="png")
        assert image.shape[0] > 250 and image.shape[1] > 500, name
        rgb = image[..., :3]
        # Not blank: many distinct colours and real spread of pixel values.
        assert rgb.var() > 0.005, name
        assert len(np.unique((rgb * 255).astype(np.uint8).reshape(-1, 3), axis=0)) > 20, name
    assert not list(out.rglob(".*"))   # no temporary file left behind


def test_briefing_page_answers_first_in_plain_tables(briefing):
    out, written = briefing
    page = written["index.html"].read_text()
    assert CAUTION in page
    assert page.index("In short") < page.index("<img") < page.index("Season and settings")
    assert "<pre>" not in page and '"store":' not in page   # no raw JSON dump
    assert "white-space:nowrap" in page and 'class="l d"' in page
    assert page.count("data:image/png;base64,") == len(SLIDE_NAMES)
    for name in SLIDE_NAMES:
        assert f'href="slides/{name}.png"' in page
    for month in ("May", "Jun", "Jul", "Aug", "Sep"):
        assert f"<td class=\"l\">{month}</td>" in page
    assert "http://" not in page and "https://" not in page
    trend = pd.read_csv(written["regime_trend.csv"])
    # The summary names a regime whose trend has p below 0.05, or says none has.
    moved = trend[(trend["p_value"] < 0.05) | (trend["kendall_p_value"] < 0.05)]
    assert all(f"<strong>{r}</strong>" in page for r in moved["regime"]) or \
        "no regime's days per season changed" in page


def test_figure_png_of_a_slide_is_reused_verbatim(briefing, demo_store):
    """The PNG file and the page's embedded image are the same bytes."""
    import base64
    out, written = briefing
    page = written["index.html"].read_text()
    png = written["slides/01-regime-share-by-month.png"].read_bytes()
    assert base64.b64encode(png).decode() in page
    assert figure_png(slides.regime_share_by_month(
        regime_frequency_by_month(season_tags(demo_store.tags, MAY_TO_SEPTEMBER)),
        season="May-Sep")) == png


def test_composites_from_the_archive_are_the_archive_days_means(demo_store, demo_files,
                                                               tmp_path):
    """With the archive at hand (`climatology --archive`), a regime's mean 500 hPa height
    is the plain mean of the archive's own heights on its season days (climatology +
    mean anomaly = mean of the fields: the identity mean(c) + mean(x - c) = mean(x)).
    Reference: the archive files read here with xarray, not through the tool's reader."""
    out = tmp_path / "brief"
    build_briefing(demo_store, out, months="5-9", files=demo_files, progress=False)
    composites = xr.open_dataset(out / "regime_composites.nc").load()
    heights = xr.open_mfdataset([f for f in demo_files if "zg" in f.name],
                                combine="by_coords")["zg"].squeeze("plev", drop=True)
    tags = demo_store.tags
    season = tags[tags.index.month.isin(range(5, 10))]
    lat, lon = demo_store.grid
    for regime in ("northwest_flow", "other"):
        days = season.index[season["regime"].astype(str) == regime].normalize()
        expected = heights.sel(time=heights["time"].dt.floor("D").isin(days.values)).mean(
            "time").sel(lat=lat, lon=lon)
        np.testing.assert_allclose(composites["z500_mean"].sel(regime=regime).values,
                                   expected.values, rtol=0, atol=0.05)  # gpm, float32
        assert int(composites["n_days"].sel(regime=regime)) == len(days)
    # the composites and the example days are the archive's, and the page says so (the
    # settings table, and the example days' alt text; html-escaped apostrophe)
    page = (out / "index.html").read_text()
    assert "archive anomalies (daily climatology removed)" in page
    assert "moisture (the archive&#x27;s fields on the store grid)" in page
