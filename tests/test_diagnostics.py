"""Tests of analogs.stages.diagnostics against MetPy, published formulas and hand-built fields.

MetPy (metpy.calc, version >= 1.5) is the outside reference for the geostrophic wind,
vorticity, advection, Coriolis parameter, wind direction and dewpoint. MetPy takes
second-order one-sided differences at the grid edges where numpy.gradient (our
shared analogs.geo.spherical_gradient) takes first-order ones, so gridded comparisons
use the interior points, where both are the same centred difference.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import metpy.calc as mpcalc
import metpy.xarray  # noqa: F401  (registers the .metpy accessor)
from metpy.units import units

from analogs.stages import diagnostics as dg
from analogs.constants import EARTH_RADIUS, SEVERE_DEWPOINT_C
from analogs.errors import AnalogsInputError

from _regime_helpers import REGION, tropical_case, vortex, wave, zonal_height

LAT = np.arange(20.0, 56.0, 1.0)
LON = np.arange(-140.0, -69.0, 1.0)
INNER = (slice(2, -2), slice(2, -2))


def _height_field(seed=0, n_time=None):
    """A smooth, wavy 500 hPa height field in gpm (seeded phases)."""
    rng = np.random.default_rng(seed)
    la, lo = np.meshgrid(LAT, LON, indexing="ij")
    n = 1 if n_time is None else n_time
    phase = rng.uniform(0, 2 * np.pi, (n, 1, 1))
    amp = rng.uniform(50, 150, (n, 1, 1))
    z = (5800.0 - 8.0 * (la - 20.0)
         + amp * np.sin(np.radians(lo) * 5 + phase) * np.cos(np.radians(la - 38) * 4)
         + 30.0 * np.cos(np.radians(lo) * 9 - phase) * np.sin(np.radians(la) * 6))
    coords = {"lat": LAT, "lon": LON}
    if n_time is None:
        return xr.DataArray(z[0], dims=("lat", "lon"), coords=coords,
                            attrs={"units": "gpm"}, name="z500")
    coords["time"] = pd.date_range("2000-01-01", periods=n, freq="D")
    return xr.DataArray(z, dims=("time", "lat", "lon"), coords=coords,
                        attrs={"units": "gpm"}, name="z500")


def _metpy_field(values, unit):
    """A MetPy-aware DataArray on a spherical lat/lon grid of our Earth radius."""
    da = xr.DataArray(np.asarray(values), dims=("lat", "lon"),
                      coords={"lat": LAT, "lon": LON}, attrs={"units": unit})
    return da.metpy.assign_crs(grid_mapping_name="latitude_longitude",
                               earth_radius=EARTH_RADIUS).metpy.quantify()


def _plain(quantity_da):
    return np.asarray(quantity_da.metpy.dequantify().values)


def test_coriolis_parameter_matches_metpy():
    # Reference: metpy.calc.coriolis_parameter (f = 2 Omega sin(lat)).
    lat = np.linspace(-80, 80, 33)
    expected = mpcalc.coriolis_parameter(lat * units.degree).to("1/s").magnitude
    np.testing.assert_allclose(dg.coriolis_parameter(lat), expected, rtol=1e-6)


def test_geostrophic_wind_matches_metpy():
    # Reference: metpy.calc.geostrophic_wind on a latitude_longitude grid
    # (Holton & Hakim, u_g = -(g0/f) dZ/dy, v_g = (g0/f) dZ/dx).
    z = _height_field()
    u_ref, v_ref = mpcalc.geostrophic_wind(_metpy_field(z.values, "m"))
    wind = dg.geostrophic_wind(z)
    assert wind["u_g"].attrs["units"] == "m s-1"
    np.testing.assert_allclose(wind["u_g"].values[INNER], _plain(u_ref)[INNER], rtol=1e-6)
    np.testing.assert_allclose(wind["v_g"].values[INNER], _plain(v_ref)[INNER], rtol=1e-6)
    assert np.abs(wind["u_g"].values).max() > 10.0  # a real signal, not zeros


def test_vorticity_matches_metpy_including_metric_term():
    # Reference: metpy.calc.vorticity on a latitude_longitude grid, which applies the
    # spherical map-factor correction (the u tan(phi) / a term). MetPy evaluates that
    # term by differencing 1/cos(phi) numerically, we analytically: agreement to 1e-3
    # of the field's magnitude.
    z = _height_field(seed=3)
    u_ref, v_ref = mpcalc.geostrophic_wind(_metpy_field(z.values, "m"))
    zeta_ref = _plain(mpcalc.vorticity(u_ref, v_ref))
    zeta = dg.geostrophic_vorticity(z).values
    scale = np.abs(zeta_ref[INNER]).max()
    np.testing.assert_allclose(zeta[INNER], zeta_ref[INNER], atol=1e-3 * scale)
    # Dropping the metric term would break the agreement (it is not negligible).
    wind = dg.geostrophic_wind(z)
    metric = wind["u_g"].values * np.tan(np.radians(LAT))[:, None] / EARTH_RADIUS
    assert np.abs((zeta - metric - zeta_ref)[INNER]).max() > 1e-2 * scale


def test_advection_matches_metpy():
    # Reference: metpy.calc.advection (returns -V . grad s) on a latitude_longitude grid.
    rng = np.random.default_rng(5)
    la, lo = np.meshgrid(LAT, LON, indexing="ij")
    scalar = 1e-5 * np.sin(np.radians(lo) * 6) * np.cos(np.radians(la) * 5)
    u = 15.0 + 5.0 * np.cos(np.radians(lo) * 3 + rng.uniform()) + 0 * la
    v = 8.0 * np.sin(np.radians(la) * 4) * np.cos(np.radians(lo) * 2)
    coords = {"lat": LAT, "lon": LON}
    ours = dg.advection(xr.DataArray(scalar, dims=("lat", "lon"), coords=coords,
                                     attrs={"units": "s-1"}, name="vorticity"),
                        xr.DataArray(u, dims=("lat", "lon"), coords=coords),
                        xr.DataArray(v, dims=("lat", "lon"), coords=coords))
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Vertical dimension", category=UserWarning)
        ref = mpcalc.advection(_metpy_field(scalar, "1/s"), _metpy_field(u, "m/s"),
                               _metpy_field(v, "m/s"))
    inner = (slice(1, -1), slice(1, -1))
    np.testing.assert_allclose(ours.values[inner], _plain(ref)[inner],
                               rtol=1e-6, atol=1e-9 * np.abs(_plain(ref)).max())


def test_wind_direction_matches_metpy():
    # Reference: metpy.calc.wind_direction(convention="from"); MetPy reports a north
    # wind as 360 where we report 0, so compare modulo 360.
    rng = np.random.default_rng(1)
    u = np.concatenate([rng.normal(0, 10, 200), [0.0, 5.0, 0.0, -5.0]])
    v = np.concatenate([rng.normal(0, 10, 200), [-5.0, 0.0, 5.0, 0.0]])
    ref = mpcalc.wind_direction(u * units("m/s"), v * units("m/s")).to("degree").magnitude
    ours = dg.wind_direction(u, v)
    diff = np.mod(ours - ref + 180.0, 360.0) - 180.0
    np.testing.assert_allclose(diff, 0.0, atol=1e-9)
    # The four cardinal cases by the definition (common practice, no source).
    np.testing.assert_allclose(ours[-4:], [0.0, 270.0, 180.0, 90.0])


def test_dewpoint_matches_metpy():
    # Reference: metpy.calc.dewpoint_from_specific_humidity (Bolton 1980 inverted).
    # MetPy's epsilon is the molecular-weight ratio 0.6219..., ours Rd/Rv = 0.622, which
    # moves Td by less than 0.01 K over this range.
    q = np.linspace(0.001, 0.022, 50)
    ref = mpcalc.dewpoint_from_specific_humidity(850 * units.hPa, q * units("kg/kg"))
    ours = dg.dewpoint_from_specific_humidity(q, 850.0)
    np.testing.assert_allclose(ours, ref.to("K").magnitude, atol=0.01)


def test_dewpoint_worked_value():
    # Bolton (1980) forward: es(15.6 C) = 6.112 exp(17.67*15.6/(15.6+243.5)) = 17.72 hPa
    # (arithmetic from the published formula); q for that e at 850 hPa inverts to 15.6 C.
    e = 6.112 * np.exp(17.67 * 15.6 / (15.6 + 243.5))
    assert e == pytest.approx(17.72, abs=0.01)
    q = 0.622 * e / (850.0 - 0.378 * e)
    assert dg.dewpoint_from_specific_humidity(q, 850.0) - 273.15 == pytest.approx(15.6, abs=1e-9)


def test_xarray_wrappers_stay_lazy_with_dask():
    # dask-backed input chunked along time: nothing computes until asked, same values.
    z = _height_field(n_time=6)
    lazy = dg.geostrophic_wind(z.chunk({"time": 2}))
    assert lazy["u_g"].chunks is not None
    zeta = dg.geostrophic_vorticity(z.chunk({"time": 2}))
    assert zeta.chunks is not None
    line = dg.moist_line_latitude(
        dg.dewpoint_from_specific_humidity(xr.full_like(z, 0.012).chunk({"time": 2})))
    assert line.chunks is not None
    np.testing.assert_allclose(lazy["u_g"].values, dg.geostrophic_wind(z)["u_g"].values)
    np.testing.assert_allclose(zeta.values, dg.geostrophic_vorticity(z).values)


def test_region_mean_flow_is_direction_of_mean_vector():
    # A uniform south-easterly wind (blowing toward the north-west) is "from 135 deg"
    # (meteorological convention, common practice, no source).
    coords = {"time": pd.date_range("2000-01-01", periods=2), "lat": LAT, "lon": LON}
    u = xr.DataArray(np.full((2, LAT.size, LON.size), -5.0), dims=("time", "lat", "lon"),
                     coords=coords)
    v = -u
    flow = dg.region_mean_flow(u, v, REGION)
    np.testing.assert_allclose(flow["direction"].values, 135.0)
    np.testing.assert_allclose(flow["speed"].values, np.hypot(5.0, 5.0))
    # Opposite winds in the two halves cancel in the mean vector: speed ~ 0.
    half = xr.where(u["lon"] < -95.0, 10.0, -10.0) * xr.ones_like(u)
    calm = dg.region_mean_flow(half, 0.0 * half, (30.0, 45.0, -105.0, -86.0))
    np.testing.assert_allclose(calm["speed"].values, 0.0, atol=1e-9)


def test_region_outside_grid_raises():
    z = _height_field()
    with pytest.raises(AnalogsInputError, match=r"lies outside the grid"):
        dg.region_mean_flow(z, z, (-40.0, -30.0, 10.0, 20.0))
    with pytest.raises(AnalogsInputError, match=r"'region' parameter of compute_diagnostics"):
        dg.compute_diagnostics(z.expand_dims(time=[np.datetime64("2000-01-01")]).to_dataset(),
                               (45.0, 30.0, -105.0, -85.0))


def test_wave_anomaly_and_ridge_trough_positions():
    # Wave anomaly has zero zonal mean (definition, Holton & Hakim section 10.1); the
    # ridge of a wave placed at -118 and its trough half a wavelength east at -88.
    z = xr.DataArray((zonal_height() + wave(90.0, -118.0, 60.0))[None],
                     dims=("time", "lat", "lon"),
                     coords={"time": [np.datetime64("2000-01-01")],
                             "lat": np.arange(15.0, 61.0), "lon": np.arange(-135.0, -54.0)},
                     attrs={"units": "gpm"})
    anomaly = dg.wave_anomaly(z)
    np.testing.assert_allclose(anomaly.mean("lon").values, 0.0, atol=1e-9)
    rt = dg.ridge_trough(z, REGION).isel(time=0)
    assert float(rt["ridge_lon"]) == -118.0
    assert float(rt["trough_lon"]) == -88.0
    assert 50.0 < float(rt["ridge_amplitude"]) < 90.0


def test_find_closed_lows_gaussian_vortex():
    # A Gaussian low Z = -D exp(-r^2 / 2 sigma^2): the azimuthal mean recovers half the
    # depth at r = sigma sqrt(2 ln 2) (arithmetic from the formula) = 294 km for 250 km;
    # the ring at 500-800 km sees almost the whole depth.
    lat, lon = np.arange(15.0, 61.0), np.arange(-135.0, -54.0)
    z = zonal_height(0.0) + vortex(27.0, -93.0, depth_gpm=60.0, sigma_km=250.0)
    da = xr.DataArray(z[None], dims=("time", "lat", "lon"),
                      coords={"time": [np.datetime64("2001-07-15")], "lat": lat, "lon": lon},
                      attrs={"units": "gpm"})
    lows = dg.find_closed_lows(da)
    assert list(lows.columns) == ["time", "lat", "lon", "depth_gpm", "radius_km",
                                  "moisture_mean"]
    assert len(lows) == 1
    low = lows.iloc[0]
    assert (low["lat"], low["lon"]) == (27.0, -93.0)
    assert 54.0 < low["depth_gpm"] <= 60.0
    assert low["radius_km"] == pytest.approx(250.0 * np.sqrt(2 * np.log(2)), rel=0.08)
    # A broad low (sigma 900 km) is not compact: rejected by max_radius_km.
    broad = da.copy(data=(zonal_height(0.0) + vortex(27.0, -93.0, 60.0, 900.0))[None])
    assert dg.find_closed_lows(broad).empty


def test_moist_line_latitude_hand_field():
    # Dewpoint falling 1 K per degree northward from 25 C at 20 N: the 15.6 C (60 F)
    # line sits at the last latitude with Td >= 15.6 C, i.e. 29 N (arithmetic).
    td = 273.15 + 25.0 - (LAT - 20.0)
    da = xr.DataArray(np.broadcast_to(td[:, None], (LAT.size, LON.size)),
                      dims=("lat", "lon"), coords={"lat": LAT, "lon": LON})
    assert float(dg.moist_line_latitude(da, SEVERE_DEWPOINT_C)) == 29.0
    dry = da - 30.0
    assert np.isnan(float(dg.moist_line_latitude(dry)))
    with pytest.raises(AnalogsInputError, match="lon_range"):
        dg.moist_line_latitude(da, lon_range=(10.0, 20.0))


def test_compute_diagnostics_columns_and_missing_moisture():
    ds = tropical_case()
    full = dg.compute_diagnostics(ds, REGION)
    assert full.attrs["missing"] == []
    for column in ("flow_direction_deg", "flow_speed_ms", "vorticity_advection",
                   "trough_amplitude", "ridge_amplitude", "height_gradient", "tc_present",
                   "tc_lat", "tc_lon", "tc_depth", "dewpoint_region_c", "moist_line_lat"):
        assert column in full
    assert bool(full["tc_present"].iloc[0])
    assert (full["tc_lat"].iloc[0], full["tc_lon"].iloc[0]) == (27.0, -93.0)
    heights_only = dg.compute_diagnostics(ds[["z500"]], REGION)
    assert heights_only.attrs["missing"] == ["moisture"]
    assert heights_only[["dewpoint_region_c", "moist_line_lat", "tc_dewpoint_c"]].isna().all().all()
    pd.testing.assert_series_equal(full["flow_speed_ms"], heights_only["flow_speed_ms"])


def test_compute_diagnostics_dask_matches_numpy():
    z = _height_field(n_time=30)
    ds = xr.Dataset({"z500": z, "q850": xr.full_like(z, 0.01).assign_attrs(units="kg kg-1")})
    eager = dg.compute_diagnostics(ds, REGION, block_days=7)
    lazy = dg.compute_diagnostics(ds.chunk({"time": 10}), REGION, block_days=7)
    pd.testing.assert_frame_equal(eager, lazy)
    # Block size must not change the answer.
    pd.testing.assert_frame_equal(eager, dg.compute_diagnostics(ds, REGION, block_days=30))


def test_geopotential_units_rejected():
    z = _height_field() * 9.80665
    z.attrs["units"] = "m2 s-2"
    with pytest.raises(AnalogsInputError, match="must be geopotential height in gpm"):
        dg.geostrophic_wind(z)


@pytest.mark.slow
def test_compute_diagnostics_forty_years_in_seconds():
    # Benchmark: 40 years x 1 degree (14,600 days x 36 x 71), heights and humidity.
    z = _height_field(seed=2, n_time=14600)
    ds = xr.Dataset({"z500": z, "q850": (0.012 + 0.0 * z).assign_attrs(units="kg kg-1")})
    start = time.perf_counter()
    frame = dg.compute_diagnostics(ds, REGION)
    elapsed = time.perf_counter() - start
    print(f"compute_diagnostics 14600 x 36 x 71: {elapsed:.1f} s")
    assert len(frame) == 14600
    assert elapsed < 60.0
