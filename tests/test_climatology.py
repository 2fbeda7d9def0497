"""Tests of analogs.stages.daily_climatology (harmonic day-of-year climatology and anomalies)."""

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.stages.daily_climatology import HarmonicClimatology, annual_angle, harmonic_design_matrix
from analogs.errors import AnalogsInputError, NotFittedError


def _daily_archive(n_years=4, seed=0, start="2003-01-01", hour=12, chunks=None):
    """Synthetic canonical archive: known 2-harmonic cycle + Gaussian noise (seeded)."""
    rng = np.random.default_rng(seed)
    times = pd.date_range(f"{start} {hour:02d}:00", periods=365 * n_years + 1, freq="D")
    lat = np.array([30.0, 35.0, 40.0])
    lon = np.array([-100.0, -95.0, -90.0, -85.0])
    theta = annual_angle(times)[:, None, None]
    lat_factor = (lat / 40.0)[None, :, None]
    z500 = (5600.0 + 80.0 * lat_factor * np.cos(theta) + 25.0 * np.sin(theta)
            + 10.0 * np.cos(2 * theta) + rng.normal(0.0, 30.0, (times.size, lat.size, lon.size)))
    q850 = (8e-3 + 3e-3 * np.cos(theta - 0.3) * np.ones((1, lat.size, lon.size))
            + rng.normal(0.0, 1e-3, (times.size, lat.size, lon.size)))
    ds = xr.Dataset(
        {"z500": (("time", "lat", "lon"), z500,
                  {"units": "gpm", "long_name": "500 hPa geopotential height"}),
         "q850": (("time", "lat", "lon"), q850,
                  {"units": "kg kg-1", "long_name": "850 hPa specific humidity"})},
        coords={"time": times, "lat": lat, "lon": lon},
    )
    return ds.chunk({"time": chunks}) if chunks else ds


def _hgt_djf():
    """eofs' shipped winter-mean 500 hPa height (65 winters), renamed to canonical names."""
    from eofs.examples import example_data_path

    with warnings.catch_warnings():
        # the file's reference date "1-1-1" is ambiguous to xarray; harmless here
        warnings.simplefilter("ignore", xr.SerializationWarning)
        with xr.open_dataset(example_data_path("hgt_djf.nc")) as raw:
            z = raw["z"].isel(pressure=0, drop=True).load()
    z = z.rename(latitude="lat", longitude="lon").sortby("lat")
    z.attrs["units"] = "gpm"
    return xr.Dataset({"z500": z})


def test_angle_formula_and_leap_years():
    """theta = 2 pi (doy - 1 + hour/24) / days_in_year, with 366 in leap years
    (the formula of the task; common practice, no source)."""
    times = pd.to_datetime(["2003-01-01 00:00", "2003-12-31 12:00", "2004-12-31 12:00",
                            "2004-02-29 06:00"])
    expected = 2 * np.pi * np.array([0.0, (364 + 0.5) / 365, (365 + 0.5) / 366,
                                     (59 + 0.25) / 366])
    np.testing.assert_allclose(annual_angle(times), expected, rtol=0, atol=1e-12)


def test_recovers_known_harmonics_like_lstsq():
    """Coefficients equal numpy.linalg.lstsq on the same design matrix (outside
    reference: LAPACK least squares), and are close to the planted signal."""
    ds = _daily_archive()
    clim = HarmonicClimatology(n_harmonics=3).fit(ds)
    assert clim.method_ == "harmonic"
    design = harmonic_design_matrix(ds.time.values, 3)
    y = ds["z500"].values.reshape(ds.time.size, -1)
    reference, *_ = np.linalg.lstsq(design, y, rcond=None)
    ours = clim.coefficients_["z500_coef"].transpose("harmonic_term", "lat", "lon").values
    np.testing.assert_allclose(ours.reshape(7, -1), reference, rtol=1e-9, atol=1e-8)
    # planted: mean 5600, cos1 80*lat/40, sin1 25, cos2 10; noise 30 over 1461 days
    coef = clim.coefficients_["z500_coef"]
    np.testing.assert_allclose(coef.sel(harmonic_term="mean"), 5600.0, atol=5.0)
    np.testing.assert_allclose(coef.sel(harmonic_term="cos1"),
                               80.0 * (ds.lat / 40.0).broadcast_like(coef.isel(harmonic_term=0)),
                               atol=5.0)
    np.testing.assert_allclose(coef.sel(harmonic_term="sin1"), 25.0, atol=5.0)
    np.testing.assert_allclose(coef.sel(harmonic_term="cos2"), 10.0, atol=5.0)


def test_training_anomalies_have_zero_mean_and_labels():
    """The constant column makes least-squares residuals sum to zero (normal
    equations; common practice, no source)."""
    ds = _daily_archive()
    anomalies = HarmonicClimatology().fit_transform(ds)
    for name in ("z500", "q850"):
        scale = float(ds[name].std())
        np.testing.assert_allclose(anomalies[name].mean("time"), 0.0, atol=1e-9 * scale * 1e3)
        assert anomalies[name].attrs["units"] == ds[name].attrs["units"]
        assert anomalies[name].attrs["long_name"] == ds[name].attrs["long_name"] + " anomaly"
        assert anomalies[name].dims == ("time", "lat", "lon")


def test_leap_day_sits_between_neighbours():
    """29 February gets a climatology between 28 February and 1 March, and the same
    angle on 31 December of a leap and a common year is just below 2 pi."""
    ds = _daily_archive()
    clim = HarmonicClimatology().fit(ds)
    times = pd.to_datetime(["2004-02-28 12:00", "2004-02-29 12:00", "2004-03-01 12:00"])
    values = clim.predict(times)["z500"].isel(lat=0, lon=0).values
    low, high = sorted([values[0], values[2]])
    assert low <= values[1] <= high
    dec31 = clim.predict(pd.to_datetime(["2004-12-31 12:00", "2005-01-01 12:00"]))["z500"]
    np.testing.assert_allclose(dec31.isel(time=0), dec31.isel(time=1), atol=1.0)


def test_one_sample_per_year_falls_back_to_time_mean_like_eofs():
    """On eofs' hgt_djf.nc (one winter mean per year) the fallback is the time
    mean: anomalies equal data minus time mean, as eofs' Eof(center=True) does."""
    ds = _hgt_djf()
    clim = HarmonicClimatology(n_harmonics=3).fit(ds)
    assert clim.method_ == "mean"
    anomalies = clim.transform(ds)
    expected = ds["z500"] - ds["z500"].mean("time")
    np.testing.assert_allclose(anomalies["z500"].values, expected.values, atol=1e-8)


def test_monthly_means_fall_back_to_monthly():
    """Monthly-mean archives get a per-calendar-month mean (DESIGN.md fallback)."""
    ds = _daily_archive(n_years=3).resample(time="MS").mean()
    clim = HarmonicClimatology().fit(ds)
    assert clim.method_ == "monthly"
    anomalies = clim.transform(ds)
    expected = ds.groupby("time.month") - ds.groupby("time.month").mean()
    np.testing.assert_allclose(anomalies["z500"].values, expected["z500"].values, atol=1e-8)


def test_dask_input_matches_numpy_and_stays_lazy():
    """Chunked input gives the same coefficients; transform stays lazy."""
    eager = HarmonicClimatology().fit(_daily_archive())
    lazy_ds = _daily_archive(chunks=200)
    lazy = HarmonicClimatology().fit(lazy_ds)
    xr.testing.assert_allclose(eager.coefficients_, lazy.coefficients_, rtol=1e-10)
    anomalies = lazy.transform(lazy_ds)
    assert anomalies["z500"].chunks is not None
    xr.testing.assert_allclose(anomalies.compute(), eager.transform(_daily_archive()))


def test_float32_archive_gives_float32_anomalies_within_round_off():
    """A float32 archive (the readers' precision) gets float32 anomalies, in memory and
    chunked alike, equal to y - X a computed in float64 from numpy.linalg.lstsq's
    coefficients (outside reference: LAPACK least squares) to float32 round-off."""
    ds = _daily_archive().astype("float32")
    design = harmonic_design_matrix(ds.time.values, 3)
    for data in (ds, ds.chunk({"time": 200})):
        anomalies = HarmonicClimatology(n_harmonics=3).fit(data).transform(data)
        for name in ("z500", "q850"):
            assert anomalies[name].dtype == np.float32
            y = ds[name].values.reshape(ds.time.size, -1).astype(np.float64)
            reference, *_ = np.linalg.lstsq(design, y, rcond=None)
            expected = (y - design @ reference).reshape(ds[name].shape)
            # float32 spacing of the raw values bounds the round-off of y itself
            tolerance = 4 * np.finfo(np.float32).eps * float(np.abs(y).max())
            np.testing.assert_allclose(anomalies[name].values, expected, rtol=0,
                                       atol=tolerance)


def test_gaps_in_time_are_skipped():
    """A grid point with missing days is fitted from its valid days (lstsq on the
    valid rows, numpy reference)."""
    ds = _daily_archive()
    ds["z500"][::3, 0, 0] = np.nan
    clim = HarmonicClimatology().fit(ds)
    valid = np.isfinite(ds["z500"][:, 0, 0].values)
    design = harmonic_design_matrix(ds.time.values[valid], 3)
    reference, *_ = np.linalg.lstsq(design, ds["z500"][:, 0, 0].values[valid], rcond=None)
    np.testing.assert_allclose(clim.coefficients_["z500_coef"][:, 0, 0], reference, rtol=1e-9)


def test_round_trip_through_netcdf(tmp_path):
    ds = _daily_archive()
    clim = HarmonicClimatology(n_harmonics=2).fit(ds)
    path = tmp_path / "clim.nc"
    clim.to_dataset().to_netcdf(path)
    with xr.open_dataset(path) as stored:
        rebuilt = HarmonicClimatology.from_dataset(stored)
    assert rebuilt.n_harmonics == 2 and rebuilt.method_ == "harmonic"
    # identical coefficients; the dot product may sum in another order (memory layout)
    xr.testing.assert_allclose(rebuilt.transform(ds), clim.transform(ds), rtol=1e-12)
    assert rebuilt.transform(ds)["z500"].attrs == clim.transform(ds)["z500"].attrs


def test_single_time_without_time_dim():
    ds = _daily_archive()
    clim = HarmonicClimatology().fit(ds)
    one = ds.isel(time=40)
    anomaly = clim.transform(one)
    assert anomaly["z500"].dims == ("lat", "lon")
    xr.testing.assert_allclose(anomaly["z500"], clim.transform(ds)["z500"].isel(time=40))


def test_bad_input_messages():
    ds = _daily_archive()
    with pytest.raises(AnalogsInputError, match=r"The 'n_harmonics' parameter of "
                       r"HarmonicClimatology must be an integer >= 0\. Got -1 instead\."):
        HarmonicClimatology(n_harmonics=-1).fit(ds)
    with pytest.raises(NotFittedError, match="not fitted yet"):
        HarmonicClimatology().transform(ds)
    clim = HarmonicClimatology().fit(ds)
    with pytest.raises(AnalogsInputError, match="Variable 'q850' is missing"):
        clim.transform(ds[["z500"]])
    shifted = ds.assign_coords(lat=ds.lat + 1.0)
    with pytest.raises(AnalogsInputError, match="lat coordinate of 'z500' does not match"):
        clim.transform(shifted)
