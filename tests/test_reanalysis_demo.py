"""Physical consistency of the synthetic demo archive (reanalysis_demo).

Each check names its outside reference: MetPy for geostrophic wind, vorticity
advection, wind direction and dewpoint; published conventions for the files;
"common practice, no source" for facts of the trade.
"""

from __future__ import annotations

import warnings

import json
import shutil
import subprocess

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr
import metpy.calc as mpcalc
from scipy import stats
from metpy.units import units

import reanalysis_demo as rd
from analogs.constants import SEVERE_DEWPOINT_C
from analogs.errors import AnalogsInputError
from analogs.geo import great_circle_km
from analogs.stages.outcomes import Region
from reanalysis_demo.__main__ import main
from reanalysis_demo import reporting
from reanalysis_demo.chances import best_attainable_skill, in_box
from reanalysis_demo.generator import year_streams
from reanalysis_demo.geography import land_mask
from reanalysis_demo.moisture import dewpoint_from_specific_humidity

YEARS = 3
SEED = 11


@pytest.fixture(scope="module")
def archive():
    return rd.generate(YEARS, grid=1.0, seed=SEED)


@pytest.fixture(scope="module")
def metpy_fields(archive):
    """MetPy geostrophic wind, vorticity advection and 850 hPa dewpoint of the archive."""
    z = archive.fields["zg"].astype(float)
    z.attrs["units"] = "m"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # MetPy: no vertical dimension here
        u, v = mpcalc.geostrophic_wind(z)
        advection = mpcalc.advection(mpcalc.vorticity(u, v), u, v)
    q = archive.fields["hus"].astype(float).values * units("kg/kg")
    dewpoint = mpcalc.dewpoint_from_specific_humidity(850.0 * units.hPa, q).m_as("degC")
    return {"u": u.metpy.dequantify().values, "v": v.metpy.dequantify().values,
            "vort_adv": advection.metpy.dequantify().values, "dewpoint": dewpoint}


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    return rd.write_archive(out, 2, start_year=1999, grid=2.0, seed=4, progress=False)


def _region_mask(lat, lon, box=rd.CENTRAL_REGION):
    south, north, west, east = box
    lon2, lat2 = np.meshgrid(lon, lat)
    return (lat2 >= south) & (lat2 <= north) & (lon2 >= west) & (lon2 <= east)


def _months(archive):
    return pd.DatetimeIndex(archive.fields["time"].values).month


def test_geostrophic_wind_magnitudes_are_realistic(archive, metpy_fields):
    """MetPy geostrophic_wind of the 500 hPa heights: mid-latitude (30-55 N) mean speed 10-30 m/s,
    speeds above 80 m/s almost never (typical 500 hPa jets; common practice, no source)."""
    lat = archive.fields["lat"].values
    speed = np.hypot(metpy_fields["u"], metpy_fields["v"])
    mid = (lat >= 30.0) & (lat <= 55.0)
    assert 10.0 <= speed[:, mid].mean() <= 30.0
    assert (speed > 80.0).mean() < 1e-4


def test_wind_turns_around_a_generated_trough(archive, metpy_fields):
    """Around a trough axis the geostrophic wind is from the south ahead (east) of it and from the
    north behind (west) of it (Holton, An Introduction to Dynamic Meteorology, from memory)."""
    truth = archive.truth
    days = np.flatnonzero(truth["regime"].eq("strong_trough").to_numpy())
    assert days.size > 10
    lat = archive.fields["lat"].values
    lon = archive.fields["lon"].values
    j = int(np.argmin(np.abs(lat - 42.0)))
    ahead = behind = 0
    for d in days:
        axis = truth["trough_axis_lon"].iloc[d]
        east = int(np.argmin(np.abs(lon - (axis + 6.0))))
        west = int(np.argmin(np.abs(lon - (axis - 6.0))))
        ahead += metpy_fields["v"][d, j, east] > 0.0
        behind += metpy_fields["v"][d, j, west] < 0.0
    assert ahead / days.size > 0.9
    assert behind / days.size > 0.9


def test_regime_flow_directions_match_their_names(archive, metpy_fields):
    """MetPy wind_direction of the region-mean geostrophic wind: north-west-flow days from about
    280-350 deg, strong-trough days from the south-west (DESIGN regime definitions; common practice)."""
    mask = _region_mask(archive.fields["lat"].values, archive.fields["lon"].values)
    u = metpy_fields["u"][:, mask].mean(axis=1) * units("m/s")
    v = metpy_fields["v"][:, mask].mean(axis=1) * units("m/s")
    direction = mpcalc.wind_direction(u, v, convention="from").m_as("degree")
    regime = archive.truth["regime"].to_numpy()
    assert 290.0 <= np.median(direction[regime == "northwest_flow"]) <= 345.0
    assert np.mean((direction[regime == "northwest_flow"] >= 280.0)
                   & (direction[regime == "northwest_flow"] <= 350.0)) > 0.85
    assert 200.0 <= np.median(direction[regime == "strong_trough"]) <= 265.0
    adv = metpy_fields["vort_adv"][:, mask].mean(axis=1)
    assert np.median(adv[regime == "strong_trough"]) > np.quantile(adv[regime == "other"], 0.75)


def test_summer_heights_exceed_winter_heights(archive):
    """Domain-mean 500 hPa height is higher in JJA than in DJF of every year (warmer column;
    common practice, no source)."""
    z = archive.fields["zg"].mean(dim=("lat", "lon")).to_series()
    for year in range(2001, 2001 + YEARS):
        summer = z[f"{year}-06":f"{year}-08"].mean()
        winter = z[f"{year}-01":f"{year}-02"].mean()
        assert summer - winter > 100.0


def test_humidity_within_physical_bounds(archive, metpy_fields):
    """q in 0..0.022 kg/kg and its 850 hPa dewpoint from MetPy below 25 C (common practice, no
    source); the generator's own Bolton (1980) inversion agrees with MetPy within 0.1 C."""
    q = archive.fields["hus"].values
    assert q.min() > 0.0 and q.max() <= 0.022
    assert np.nanmax(metpy_fields["dewpoint"]) < 25.0
    ours = dewpoint_from_specific_humidity(q[::30].astype(float))
    np.testing.assert_allclose(ours, metpy_fields["dewpoint"][::30], atol=0.1)


def test_sixty_f_dewpoint_reaches_farther_north_in_july(archive, metpy_fields):
    """The 60 F (15.6 C) dewpoint line over the plains lies farther north in July than in January
    (moisture retreats south in winter; common practice, no source)."""
    lat = archive.fields["lat"].values
    lon = archive.fields["lon"].values
    plains = (lon >= -100.0) & (lon <= -88.0)
    months = _months(archive)

    def northern_extent(month):
        mean_td = metpy_fields["dewpoint"][months == month][:, :, plains].mean(axis=0)
        moist_lats = np.where(mean_td >= SEVERE_DEWPOINT_C, lat[:, None], np.nan)
        return np.nanmean(np.nan_to_num(np.nanmax(moist_lats, axis=0), nan=lat[0]))

    assert northern_extent(7) - northern_extent(1) > 5.0


def test_cyclones_only_in_warm_season_and_closed_lows(archive):
    """Tropical cyclones only from June to October (warm season, common practice, no source), each
    a closed 500 hPa low: the height at its centre lies below the mean on a 600 km ring."""
    truth = archive.truth
    with_tc = truth.dropna(subset=["tc_lat"])
    assert len(with_tc) > 20
    assert set(pd.to_datetime(with_tc["date"]).dt.month) <= {6, 7, 8, 9, 10}
    z = archive.fields["zg"]
    strong = with_tc[with_tc["tc_depth_gpm"] >= 40.0]
    closed = 0
    for _, row in strong.iterrows():
        day = z.sel(time=f"{row['date']}T12:00")
        centre = float(day.interp(lat=row["tc_lat"], lon=row["tc_lon"]))
        ring_lat = row["tc_lat"] + 5.4 * np.sin(np.linspace(0, 2 * np.pi, 16, endpoint=False))
        ring_lon = row["tc_lon"] + 5.4 / np.cos(np.radians(row["tc_lat"])) * np.cos(
            np.linspace(0, 2 * np.pi, 16, endpoint=False))
        ring = day.interp(lat=xr.DataArray(ring_lat), lon=xr.DataArray(ring_lon))
        closed += centre < float(ring.mean()) - 15.0
    assert closed / len(strong) > 0.9


def _events_on_grid(archive):
    """Events binned to (day index, lat index, lon index) of their convective day and nearest cell."""
    events = archive.events
    times = pd.to_datetime(events["time"].str.rstrip("Z"))
    day = (times - pd.Timedelta(hours=12)).dt.normalize() + pd.Timedelta(hours=12)
    day_index = pd.Index(pd.DatetimeIndex(archive.fields["time"].values)).get_indexer(day)
    lat = archive.fields["lat"].values
    lon = archive.fields["lon"].values
    j = np.clip(np.round((events["lat"].to_numpy() - lat[0]) / (lat[1] - lat[0])).astype(int), 0, lat.size - 1)
    k = np.clip(np.round((events["lon"].to_numpy() - lon[0]) / (lon[1] - lon[0])).astype(int), 0, lon.size - 1)
    return day_index, j, k


def test_event_times_fall_in_their_convective_day(archive):
    """Every event lies within 12 UTC on D to 12 UTC on D+1 of an archive day (convective day,
    common practice, no source), with kinds tornado / hail / wind."""
    day_index, _, _ = _events_on_grid(archive)
    assert (day_index >= 0).all()
    assert set(archive.events["kind"]) == {"tornado", "hail", "wind"}
    assert archive.events["time"].str.endswith("Z").all()


def test_event_rates_need_overlapping_ingredients(archive, metpy_fields):
    """Reports per land cell-day are more frequent where moisture (850 hPa dewpoint >= 60 F),
    deep-layer shear (500 hPa geostrophic wind >= 15 m/s) and forcing (cyclonic vorticity advection)
    overlap than where any one is missing; ingredients from MetPy (common practice, no source)."""
    lat = archive.fields["lat"].values
    lon = archive.fields["lon"].values
    lon2, lat2 = np.meshgrid(lon, lat)
    counts = np.zeros(metpy_fields["dewpoint"].shape)
    np.add.at(counts, _events_on_grid(archive), 1.0)
    land = np.broadcast_to(land_mask(lat2, lon2), counts.shape)
    moist = metpy_fields["dewpoint"] >= SEVERE_DEWPOINT_C
    sheared = np.hypot(metpy_fields["u"], metpy_fields["v"]) >= 15.0
    forced = metpy_fields["vort_adv"] > 2e-10
    all_three = counts[land & moist & sheared & forced].mean()
    for missing in (~moist & sheared & forced, moist & ~sheared & forced, moist & sheared & ~forced):
        assert all_three > 1.5 * counts[land & missing].mean()


def test_cyclone_tornadoes_favour_the_north_east_quadrant(archive):
    """Over tropical-cyclone days the earth-relative north-east quadrant (within 800 km of the
    centre) holds the largest share of tornadoes (McCaul 1991, from memory; common practice)."""
    truth = archive.truth.dropna(subset=["tc_lat"]).set_index("date")
    tornadoes = archive.events[archive.events["kind"] == "tornado"].copy()
    times = pd.to_datetime(tornadoes["time"].str.rstrip("Z"))
    tornadoes["date"] = (times - pd.Timedelta(hours=12)).dt.strftime("%Y-%m-%d")
    tornadoes = tornadoes[tornadoes["date"].isin(truth.index)]
    centre_lat = truth.loc[tornadoes["date"], "tc_lat"].to_numpy()
    centre_lon = truth.loc[tornadoes["date"], "tc_lon"].to_numpy()
    near = great_circle_km(tornadoes["lat"].to_numpy(), tornadoes["lon"].to_numpy(),
                           centre_lat, centre_lon) <= 800.0
    north = tornadoes["lat"].to_numpy()[near] >= centre_lat[near]
    east = tornadoes["lon"].to_numpy()[near] >= centre_lon[near]
    shares = {"NE": np.mean(north & east), "NW": np.mean(north & ~east),
              "SE": np.mean(~north & east), "SW": np.mean(~north & ~east)}
    assert near.sum() >= 20
    assert max(shares, key=shares.get) == "NE"


def test_files_are_cf_and_open_with_plain_xarray(written):
    """Files open with xarray.open_dataset and carry what a CF-1.8 checker looks for (CF
    conventions 1.8: standard_name, units, axis, calendar; no _FillValue on coordinates)."""
    assert len(written["zg"]) == 2 and len(written["hus"]) == 2
    for path, variable, standard_name, plev in ((written["zg"][0], "zg", "geopotential_height", 50000.0),
                                                (written["hus"][1], "hus", "specific_humidity", 85000.0)):
        ds = xr.open_dataset(path)
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert ds[variable].dims == ("time", "plev", "lat", "lon")
        assert ds[variable].attrs["standard_name"] == standard_name
        assert float(ds["plev"][0]) == plev
        for name, axis in (("time", "T"), ("plev", "Z"), ("lat", "Y"), ("lon", "X")):
            assert ds[name].attrs["axis"] == axis
            assert "standard_name" in ds[name].attrs
        assert ds["time"].encoding["calendar"] == "standard"
        assert (pd.DatetimeIndex(ds["time"].values).hour == 12).all()
        ds.close()
        with netCDF4.Dataset(path) as nc:
            for name in ("time", "plev", "lat", "lon"):
                assert "_FillValue" not in nc.variables[name].ncattrs()
            assert nc.variables["time"].dtype == np.float64
            assert nc.variables["time"].units == "hours since 1900-01-01 00:00:00"
            assert nc.variables["time"].calendar == "standard"
            assert nc.variables["lat"].dtype == np.float64 and nc.variables["lon"].dtype == np.float64
            assert nc.variables[variable].dtype == np.float32
    with open(written["events"]) as fh:
        assert fh.readline().strip() == "time,lat,lon,kind,magnitude"
    truth = pd.read_csv(written["truth"])
    assert {"date", "regime", "tc_lat", "tc_lon"} <= set(truth.columns)
    assert set(truth["regime"]) <= {"northwest_flow", "tropical", "strong_trough", "other"}
    assert len(truth) == 365 + 366  # 1999 and the leap year 2000


def test_same_seed_same_archive_and_other_seed_differs():
    """Determinism for a seed (common practice, no source)."""
    a = rd.generate(1, grid=2.5, seed=7)
    b = rd.generate(1, grid=2.5, seed=7)
    c = rd.generate(1, grid=2.5, seed=8)
    xr.testing.assert_identical(a.fields, b.fields)
    pd.testing.assert_frame_equal(a.events, b.events)
    pd.testing.assert_frame_equal(a.truth, b.truth)
    assert not np.array_equal(a.fields["zg"].values, c.fields["zg"].values)


def test_generate_equals_concatenated_iter_years():
    """generate() is the concatenation of iter_years(), state carried across the new year
    (invariant; common practice, no source); the truth table does not depend on the grid."""
    whole = rd.generate(2, grid=2.5, seed=3)
    parts = list(rd.iter_years(2, grid=2.5, seed=3))
    assert [p.year for p in parts] == [2001, 2002]
    xr.testing.assert_identical(whole.fields, xr.concat([p.fields for p in parts], dim="time"))
    pd.testing.assert_frame_equal(whole.truth, pd.concat([p.truth for p in parts], ignore_index=True))
    pd.testing.assert_frame_equal(whole.events, pd.concat([p.events for p in parts], ignore_index=True))
    fine = rd.generate(1, grid=1.25, seed=3)
    pd.testing.assert_frame_equal(fine.truth, parts[0].truth)


def test_default_ten_years_regime_mix(default_demo_years):
    """Ten default years: 'other' is the plurality, each named regime >= 8 % of days, tropical
    days only June-October (scenario specification; common practice, no source)."""
    truth = default_demo_years.truth
    share = truth["regime"].value_counts(normalize=True)
    assert share.idxmax() == "other"
    for regime in ("northwest_flow", "tropical", "strong_trough"):
        assert share[regime] >= 0.08
    months = pd.to_datetime(truth.loc[truth["regime"] == "tropical", "date"]).dt.month
    assert set(months) <= {6, 7, 8, 9, 10}


@pytest.mark.parametrize("kwargs, match", [
    ({"years": 0}, "'years' parameter of generate must be an integer >= 1"),
    ({"grid": -1.0}, "'grid' parameter of generate must be a number >= 0.05"),
    ({"domain": (50.0, 20.0, -130.0, -60.0)}, "'domain' parameter of generate"),
    ({"seed": -3}, "'seed' parameter of generate must be an integer >= 0"),
])
def test_bad_options_raise_one_line(kwargs, match):
    with pytest.raises(AnalogsInputError, match=match):
        rd.generate(**kwargs)


def test_cli_bad_option_exits_2_with_one_line(tmp_path, capsys):
    """Bad CLI options give exit status 2 and one line on stderr (project CLI contract)."""
    assert main(["--out", str(tmp_path), "--grid", "-1", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'grid' parameter" in err
    with pytest.raises(SystemExit, match="2"):
        main(["--out", str(tmp_path), "--years", "many"])
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--years" in err


def test_cli_writes_archive(tmp_path):
    """The command writes the archive, truth and events (project CLI contract)."""
    assert main(["--out", str(tmp_path), "--years", "1", "--grid", "2.5", "--quiet"]) == 0
    assert (tmp_path / "archive" / "zg500_2001.nc").exists()
    assert (tmp_path / "archive" / "hus850_2001.nc").exists()
    assert pd.read_csv(tmp_path / "truth.csv").shape[0] == 365


@pytest.mark.slow
def test_forty_years_quarter_degree_year_by_year(tmp_path):
    """40 years at 0.25 degree, written year by year with bounded memory (performance check)."""
    paths = rd.write_archive(tmp_path, 40, grid=0.25, progress=False)
    assert len(paths["zg"]) == 40


def test_each_year_draws_from_its_own_stream():
    """A year's random streams depend on (seed, year): the same pair gives the same draws,
    another year other draws; a demo starting in 2011 has no day equal to any day of a demo
    starting in 2001 with the same seed (numpy SeedSequence spawn keys; common practice)."""
    assert year_streams(0, 2011)["events"].random() == year_streams(0, 2011)["events"].random()
    assert year_streams(0, 2011)["events"].random() != year_streams(0, 2001)["events"].random()
    first = rd.generate(1, start_year=2001, grid=2.5, seed=0)
    later = rd.generate(1, start_year=2011, grid=2.5, seed=0)
    again = rd.generate(1, start_year=2011, grid=2.5, seed=0)
    xr.testing.assert_identical(later.fields, again.fields)
    pd.testing.assert_frame_equal(later.events, again.events)
    a = first.fields["zg"].values.reshape(365, -1)
    b = later.fields["zg"].values.reshape(365, -1)
    closest = np.min(np.abs(a[:, None, :] - b[None, :, :]).max(axis=2))
    assert closest > 1.0  # gpm: no twin day


def test_reports_start_anywhere_in_their_cell(archive):
    """Sub-grid initiation: the position of reports within their grid cell is uniform
    (scipy.stats.kstest against the uniform law), not at cell centres."""
    lat0, lat1 = archive.fields["lat"].values[[0, -1]]
    lon0, lon1 = archive.fields["lon"].values[[0, -1]]
    events = archive.events
    inner = events[events["lat"].between(lat0 + 1, lat1 - 1) & events["lon"].between(lon0 + 1, lon1 - 1)]
    for offset in (np.mod(inner["lat"] - lat0 + 0.5, 1.0), np.mod(inner["lon"] - lon0 + 0.5, 1.0)):
        assert stats.kstest(offset, "uniform").pvalue > 1e-3


def test_generator_chances_are_calibrated(default_demo_years):
    """The generator's own chance of a recorded report in the box matches what it recorded:
    in each tenth of the chances the observed frequency is within 4 binomial standard errors
    of the mean chance (reliability of a calibrated forecast, Murphy 1973, from memory)."""
    chances = default_demo_years.chances
    p = chances["box_chance"].to_numpy()
    o = chances["box_observed"].to_numpy()
    bins = np.minimum((p * 10).astype(int), 9)
    for b in np.unique(bins):
        mine = bins == b
        if mine.sum() < 30:
            continue
        expected = p[mine].mean()
        error = np.sqrt(max(expected * (1 - expected), 1e-4) / mine.sum())
        assert abs(o[mine].mean() - expected) < 4 * error + 0.01, b


def test_hidden_trigger_limits_skill_and_the_box_does_not_saturate(default_demo_years):
    """Outcomes are not a function of the archived fields alone: the chance computed from the
    fields only scores a lower Brier skill score than the one that knows the hidden trigger;
    reports fall in the box on 10-25 % of days (design target of the demo)."""
    best = best_attainable_skill(default_demo_years.chances)
    assert 0.10 <= best["box"]["base_rate"] <= 0.25
    assert 0.0 < best["box"]["bss_fields_only"] < best["box"]["bss_full_state"] - 0.05
    assert 0.0 < best["point"]["base_rate"] < best["box"]["base_rate"]
    assert best["point"]["bss_fields_only"] < best["point"]["bss_full_state"]


def test_reports_follow_towns_and_roads(default_demo_years):
    """Reports in the box fall where people are more often than the area there would give:
    the share of reports with access above one half is at least 1.5 times the share of the
    box's area (uniform points, numpy) with it (reporting efficiency; common practice)."""
    events = default_demo_years.events
    inside = events[in_box(events["lat"].to_numpy(), events["lon"].to_numpy())]
    report_share = np.mean(reporting.access(inside["lat"].to_numpy(), inside["lon"].to_numpy()) > 0.5)
    south, north, west, east = rd.CENTRAL_REGION
    rng = np.random.default_rng(1)
    lat = rng.uniform(south, north, 20000)
    lon = rng.uniform(west, east, 20000)
    area_share = np.mean(reporting.access(lat, lon) > 0.5)
    assert report_share > 1.5 * area_share


def test_reporting_grows_by_kind_and_changes_in_2006(default_demo_years):
    """Hail and wind reports grow faster than tornado reports over the decade, and the 2006
    change (spotter reports away from towns) raises the odds that a hail or wind report lies
    far from towns and roads (its recording floor there goes from 0.15 to 0.35, odds about
    2.3 times; scenario specification in reanalysis_demo.reporting)."""
    events = default_demo_years.events.copy()
    events["year"] = events["time"].str[:4].astype(int)
    events = events[events["year"] <= 2010]
    counts = events.groupby(["year", "kind"]).size().unstack()
    early, late = counts.loc[2001:2005].sum(), counts.loc[2006:2010].sum()
    growth = late / early
    assert growth["hail"] > 1.5 * growth["tornado"] and growth["wind"] > 1.5 * growth["tornado"]
    rural = reporting.access(events["lat"].to_numpy(), events["lon"].to_numpy()) < 0.05
    hail_wind = events["kind"].isin(["hail", "wind"]).to_numpy()
    after = events["year"].to_numpy() >= reporting.REPORTING_CHANGE_YEAR
    odds_before, odds_after = (rural[hail_wind & period].mean() / (1 - rural[hail_wind & period].mean())
                               for period in (~after, after))
    assert odds_after > 1.5 * odds_before


def test_land_sea_mask_and_metadata_are_written(written, tmp_path):
    """archive/static/land_sea_mask.nc: lsm float32 0/1 on the archive files' exact lat/lon
    (values and attributes), standard_name land_binary_mask, units 1 (CF standard-name table);
    no CF-1.8 errors from the IOOS compliance checker when it is installed. The metadata's
    point region is a region analogs parses (analogs.stages.outcomes.Region)."""
    mask_path = written["land_sea_mask"]
    assert mask_path.parent.name == "static" and mask_path.parent.parent == written["archive"]
    assert mask_path not in set(written["archive"].glob("*.nc"))
    with xr.open_dataset(mask_path) as mask, xr.open_dataset(written["zg"][0]) as fields:
        assert mask["lsm"].dims == ("lat", "lon") and mask["lsm"].dtype == np.float32
        assert mask["lsm"].attrs["standard_name"] == "land_binary_mask"
        assert mask["lsm"].attrs["units"] == "1" and mask["lsm"].attrs["long_name"]
        assert set(np.unique(mask["lsm"].values)) == {0.0, 1.0}
        for name in ("lat", "lon"):
            xr.testing.assert_identical(mask[name], fields[name])
        lon2, lat2 = np.meshgrid(mask["lon"].values, mask["lat"].values)
        np.testing.assert_array_equal(mask["lsm"].values == 1.0, land_mask(lat2, lon2))
    checker = shutil.which("cchecker.py") or shutil.which("compliance-checker")
    if checker:
        report = tmp_path / "lsm.json"
        subprocess.run([checker, "--test", "cf:1.8", "--format", "json", "-o", str(report),
                        str(mask_path)], capture_output=True, check=False)
        results = json.loads(report.read_text())["cf:1.8"]
        assert [item["name"] for item in results["high_priorities"]
                if item["value"][0] < item["value"][1]] == []
    metadata = json.loads(written["metadata"].read_text())
    point = Region.parse(metadata["point_region"]["option"])
    assert point.radius_km == 40.0
    assert metadata["reporting_change"]["year"] == reporting.REPORTING_CHANGE_YEAR
    assert 0 < metadata["best_attainable"]["box"]["base_rate"] < 1
    chances = pd.read_csv(written["chances"])
    assert len(chances) == 365 + 366


def test_demo_skill_notes_name_the_point_region_and_the_upper_bound(written):
    """What `analogs demo` prints from the archive's metadata: both regions in the option
    syntax of --region, their base rates, and that demo skill is an upper bound."""
    from analogs.workflows.demo import skill_notes
    metadata = json.loads(written["metadata"].read_text())
    text = "\n".join(skill_notes(metadata))
    assert "box 30,45,-105,-85" in text and "point 37,-97.5,40 (Harrow Ford, 40 km)" in text
    assert f"{100 * metadata['best_attainable']['box']['base_rate']:.1f} % of days" in text
    assert "upper bound by construction" in text and "from memory" in text
