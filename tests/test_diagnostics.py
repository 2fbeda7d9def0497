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
from analogs.constants import EARTH_RADIUS, G0, SEVERE_DEWPOINT_C
from analogs.errors import AnalogsInputError
from analogs.geo import great_circle_km, wrap_longitude

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


@pytest.mark.parametrize("n_lon", [1, 2, 70, 71])
def test_zonal_median_equals_numpy_median_bit_for_bit(n_lon):
    # Reference: numpy.median / numpy.nanmedian of the float64 values (the closed-low
    # search's former arithmetic), odd and even counts, float32 and float64 input.
    rng = np.random.default_rng(3)
    z = rng.normal(5600.0, 120.0, size=(40, 6, n_lon)).astype(np.float32)
    z[3, 2, :] = z[3, 2, 0]  # ties
    for values in (z, z.astype(float)):
        found = dg.zonal_median(values)
        assert found.dtype == np.float64 and found.shape == (40, 6, 1)
        expected = np.median(z.astype(float), axis=-1, keepdims=True)
        assert np.array_equal(found.view(np.int64), expected.view(np.int64))
    gappy = z.astype(float)
    gappy[5, 1, 0] = np.nan
    gappy[7, 4, :] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        expected = np.nanmedian(gappy, axis=-1, keepdims=True)
    assert np.array_equal(dg.zonal_median(gappy), expected, equal_nan=True)


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
                                  "moisture_mean", "closed"]
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


# ------------------------------------------------ the whole sphere: poles and seams
#
# Fields on a global grid are built from polynomials in the Cartesian coordinates of the
# unit sphere (x, y, z) = (cos lat cos lon, cos lat sin lon, sin lat): smooth through the
# poles, so the exact surface gradient is the 3-D gradient projected on the local east
# and north unit vectors, e = (-sin lon, cos lon, 0), n = (-sin lat cos lon,
# -sin lat sin lon, cos lat) (vector calculus on the sphere, Holton & Hakim 2013,
# appendix on spherical coordinates). A rigid rotation V = w x (a r) has relative
# vorticity 2 w . r (twice the rotation's component along the local vertical; the
# vorticity of solid-body rotation, Holton & Hakim 2013, section 4.2).

GLAT = np.arange(-90.0, 90.1, 2.5)
GLON = np.arange(-180.0, 180.0, 2.5)


def _sphere(lat=GLAT, lon=GLON):
    la, lo = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    r = np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], -1)
    east = np.stack([-np.sin(lo), np.cos(lo), 0.0 * lo], -1)
    north = np.stack([-np.sin(la) * np.cos(lo), -np.sin(la) * np.sin(lo), np.cos(la)], -1)
    return r, east, north


def _global_height(r):
    """A wavy 500 hPa height (gpm), a polynomial in x, y, z, and its 3-D gradient."""
    x, y, z = r[..., 0], r[..., 1], r[..., 2]
    height = (5600.0 - 400.0 * z**2 + 120.0 * x * y + 80.0 * x * z
              + 60.0 * (x**2 - y**2) * z + 50.0 * y)
    grad = np.stack([120.0 * y + 80.0 * z + 120.0 * x * z,
                     120.0 * x - 120.0 * y * z + 50.0,
                     -800.0 * z + 80.0 * x + 60.0 * (x**2 - y**2)], -1)
    return height, grad


def _rigid_rotation(r, east, north, w=(2e-6, -1.5e-6, 3e-6)):
    """(u, v, exact vorticity) of V = w x (a r), w in s-1."""
    wind = EARTH_RADIUS * np.cross(np.asarray(w), r)
    return (wind * east).sum(-1), (wind * north).sum(-1), 2.0 * (r @ np.asarray(w))


def _da(values, lat=GLAT, lon=GLON, units=None):
    return xr.DataArray(np.asarray(values, dtype=float), dims=("lat", "lon"),
                        coords={"lat": lat, "lon": lon},
                        attrs={} if units is None else {"units": units})


def _metpy_on(values, unit, lat, lon):
    da = xr.DataArray(np.asarray(values), dims=("lat", "lon"),
                      coords={"lat": lat, "lon": lon}, attrs={"units": unit})
    return da.metpy.assign_crs(grid_mapping_name="latitude_longitude",
                               earth_radius=EARTH_RADIUS).metpy.quantify()


_PAD = 3


def _metpy_periodic(values, unit):
    """A global field for MetPy with 3 columns of the other side added at each end, so
    MetPy's centred differences see the true neighbours across the seam."""
    lon = np.r_[GLON[-_PAD:] - 360.0, GLON, GLON[:_PAD] + 360.0]
    padded = np.concatenate([values[:, -_PAD:], values, values[:, :_PAD]], axis=1)
    return _metpy_on(padded, unit, GLAT, lon)


def _unpad(quantity_da):
    return _plain(quantity_da)[:, _PAD:-_PAD]


# MetPy's latitude/longitude map-factor correction differences 1/cos(lat) numerically,
# which loses accuracy toward the poles (against the rigid rotation's exact vorticity:
# 0.6 % of the field's range at 60 deg, 15 % at 80 deg, and it is singular on the pole
# rows, where its dx is 0), while ours is analytic. So MetPy is the reference between
# 10 and 60 degrees (geostrophy is undefined near the equator) and the exact fields
# are the reference everywhere, pole rows included.
MID = (np.abs(GLAT) >= 10.0) & (np.abs(GLAT) <= 60.0)


def test_global_grid_with_poles_matches_metpy_and_exact_fields():
    r, east, north = _sphere()
    height, grad = _global_height(r)
    z = _da(height, units="gpm")
    wind = dg.geostrophic_wind(z)
    zeta = dg.geostrophic_vorticity(z)
    adv = dg.advection(zeta.rename("vorticity"), wind["u_g"], wind["v_g"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # MetPy at its pole rows
        warnings.filterwarnings("ignore", message="Vertical dimension", category=UserWarning)
        u_ref, v_ref = mpcalc.geostrophic_wind(_metpy_periodic(height, "m"))
        zeta_ref = mpcalc.vorticity(u_ref, v_ref)
        adv_ref = mpcalc.advection(zeta_ref, u_ref, v_ref)
    # Reference: MetPy (geostrophic_wind, vorticity, advection on a latitude_longitude
    # grid, periodic padding) between 10 and 60 degrees, every longitude incl. the seam.
    for ours, ref, rel in ((wind["u_g"], u_ref, 1e-9), (wind["v_g"], v_ref, 1e-9),
                           (zeta, zeta_ref, 1e-2), (adv, adv_ref, 1e-3)):
        ref = _unpad(ref)
        scale = np.abs(ref[MID]).max()
        np.testing.assert_allclose(ours.values[MID], ref[MID], rtol=0, atol=rel * scale)
    # Reference: the exact geostrophic wind of the polynomial field (3-D gradient
    # projected on e and n) at EVERY row, the poles included: finite, and within 0.1 %
    # of the field's range (the polar-cap gradient is exact for the linear part).
    f = dg.coriolis_parameter(GLAT)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):       # f = 0 on the equator
        exact_u = -G0 / f * (grad * north).sum(-1) / EARTH_RADIUS
        exact_v = G0 / f * (grad * east).sum(-1) / EARTH_RADIUS
    high = np.abs(GLAT) >= 10.0
    for ours, exact in ((wind["u_g"].values, exact_u), (wind["v_g"].values, exact_v)):
        assert np.isfinite(ours[high]).all()
        scale = np.abs(exact[high]).max()
        np.testing.assert_allclose(ours[high], exact[high], rtol=0, atol=2e-3 * scale)
    # Vorticity and its advection finite and bounded on the pole rows (no 1/cos blow-up):
    # no larger there than the largest value anywhere else north of 10 degrees.
    poles = np.abs(GLAT) == 90.0
    for field in (zeta.values, adv.values):
        assert np.isfinite(field[poles]).all()
        assert np.abs(field[poles]).max() <= np.abs(field[high & ~poles]).max()


def test_vorticity_and_advection_exact_through_the_poles():
    # Reference: rigid rotation V = w x (a r): vorticity 2 w . r exactly (Holton & Hakim
    # 2013, section 4.2); advection of a polynomial scalar s by it, -V . grad s, from the
    # 3-D gradient projected on e and n. Every row, poles included, and checked against
    # MetPy between 10 and 60 degrees.
    r, east, north = _sphere()
    u, v, exact_zeta = _rigid_rotation(r, east, north)
    zeta = dg.relative_vorticity(_da(u), _da(v)).values
    scale = np.abs(exact_zeta).max()
    np.testing.assert_allclose(zeta, exact_zeta, rtol=0, atol=3e-3 * scale)
    # The pole value comes from the circulation round the next latitude circle; it is
    # that of the exact field, not of the singular metric term.
    np.testing.assert_allclose(zeta[[0, -1]], exact_zeta[[0, -1]], rtol=0, atol=1e-3 * scale)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = _unpad(mpcalc.vorticity(_metpy_periodic(u, "m/s"), _metpy_periodic(v, "m/s")))
    np.testing.assert_allclose(zeta[MID], ref[MID], rtol=0, atol=1e-2 * scale)

    x, y, zc = r[..., 0], r[..., 1], r[..., 2]
    s = 1e-5 * (x * y + 0.5 * zc**2 - 0.3 * x * zc)
    grad_s = 1e-5 * np.stack([y - 0.3 * zc, x + 0.0 * y, zc - 0.3 * x], -1)
    exact_adv = -(u * (grad_s * east).sum(-1) + v * (grad_s * north).sum(-1)) / EARTH_RADIUS
    ours = dg.advection(_da(s, units="s-1").rename("s"), _da(u), _da(v)).values
    assert np.isfinite(ours).all()
    scale = np.abs(exact_adv).max()
    np.testing.assert_allclose(ours, exact_adv, rtol=0, atol=5e-3 * scale)


def test_polar_cap_gradient_exact_for_a_plane_through_the_pole():
    # Reference: F = A x = A cos(lat) cos(lon) has the surface gradient
    # (-A sin lon, -A sin lat cos lon) / a (east, north; differentiation of the formula),
    # which at the north pole is (-A sin lon, -A cos lon) / a along each meridian.
    from analogs.geo import spherical_gradient
    r, _, _ = _sphere()
    field = 100.0 * r[..., 0]
    d_dx, d_dy = spherical_gradient(field, GLAT, GLON)
    la, lo = np.meshgrid(np.radians(GLAT), np.radians(GLON), indexing="ij")
    np.testing.assert_allclose(d_dx, -100.0 * np.sin(lo) / EARTH_RADIUS, rtol=0,
                               atol=1e-3 * 100.0 / EARTH_RADIUS)
    np.testing.assert_allclose(d_dy, -100.0 * np.sin(la) * np.cos(lo) / EARTH_RADIUS,
                               rtol=0, atol=1e-3 * 100.0 / EARTH_RADIUS)


def test_limited_grid_with_a_pole_row_leaves_it_out():
    # A hemispheric sector that includes the north pole row (as eofs' hgt_djf.nc): the
    # zonal derivative is undefined there, so the pole row is NaN and the next row takes
    # a one-sided difference: the same numbers as the grid with the pole row cut off
    # (numpy.gradient's first-order edge), and area means stay finite.
    lat, lon = np.arange(20.0, 90.1, 2.5), np.arange(-80.0, 40.1, 2.5)
    r, _, _ = _sphere(lat, lon)
    height, _ = _global_height(r)
    z = _da(height, lat, lon, "gpm")
    zeta = dg.geostrophic_vorticity(z).values
    assert np.isnan(zeta[-1]).all() and np.isfinite(zeta[:-1][lat[:-1] >= 10.0]).all()
    cut = dg.geostrophic_vorticity(z.isel(lat=slice(None, -1))).values
    np.testing.assert_array_equal(zeta[:-1], cut)
    ds = xr.Dataset({"z500": z.expand_dims(time=pd.date_range("2000-01-15", periods=1))})
    full = dg.compute_diagnostics(ds, (20.0, 90.0, -80.0, 40.0))
    without = dg.compute_diagnostics(ds.isel(lat=slice(None, -1)), (20.0, 87.5, -80.0, 40.0))
    for column in ("vorticity", "vorticity_advection", "cyclonic_advection",
                   "height_gradient", "flow_speed_ms"):
        assert np.isfinite(full[column]).all(), column
        np.testing.assert_allclose(full[column], without[column], rtol=1e-9)


def test_real_hemispheric_archive_with_pole_row_has_physical_vorticity_advection():
    # Open data in a registry package: eofs' hgt_djf.nc, 65 real winter-mean 500 hPa
    # height fields, 20-90 N x 80 W-40 E at 2.5 degrees, pole row included. A
    # winter-mean field's area-mean vorticity advection is of order 1e-11 s-2 or less
    # (instantaneous synoptic values are 1e-10 to 1e-9 s-2, Holton & Hakim 2013,
    # chapter 6 scale analysis, from memory); the 1/cos(lat) factor at the pole row used
    # to make it 47 s-2. Every day must be below 1e-10 s-2, and the pole row must not
    # change the answer (it is left out: same as cutting it off).
    eofs_examples = pytest.importorskip("eofs.examples")
    from analogs.stages.sources import open_archive
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = open_archive(eofs_examples.example_data_path("hgt_djf.nc")).load()
    assert ds["lat"].values.max() == 90.0
    full = dg.compute_diagnostics(ds, (20.0, 90.0, -80.0, 40.0))
    assert np.abs(full["vorticity_advection"]).max() < 1e-10
    assert np.abs(full["cyclonic_advection"]).max() < 1e-10
    without = dg.compute_diagnostics(ds.sel(lat=slice(None, 87.5)), (20.0, 87.5, -80.0, 40.0))
    np.testing.assert_allclose(full["vorticity_advection"], without["vorticity_advection"],
                               rtol=1e-9, atol=0)


def test_date_line_domain_matches_metpy():
    # A limited domain from 150 E to 150 W, stored the canonical way ([-180, 180),
    # ascending, so the date line splits it into two pieces; analogs.stages.sources.
    # normalise_grid). Reference: MetPy on the same weather in one continuous frame
    # (150 to 210 E), away from the domain's edges (MetPy's second-order one-sided edge
    # differences differ from ours, and advection is a third derivative of the height:
    # three rows and columns in). The seam itself lies in the middle.
    from analogs.stages.sources import normalise_grid
    lat = np.arange(20.0, 60.1, 1.0)
    cont = np.arange(150.0, 210.1, 1.0)
    r, _, _ = _sphere(lat, cont)
    height, _ = _global_height(r)
    height = height + 80.0 * np.sin(np.radians(cont) * 6.0)[None, :] * np.cos(
        np.radians(lat) * 3.0)[:, None]
    stored = normalise_grid(xr.Dataset({"z500": _da(height, lat, cont, "gpm")}))["z500"]
    assert stored["lon"].values.min() == -180.0 and np.all(np.diff(stored["lon"]) > 0)
    back = (stored["lon"].values % 360.0).argsort()            # to the continuous frame
    wind = dg.geostrophic_wind(stored)
    zeta = dg.geostrophic_vorticity(stored)
    adv = dg.advection(zeta.rename("vorticity"), wind["u_g"], wind["v_g"])
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Vertical dimension", category=UserWarning)
        u_ref, v_ref = mpcalc.geostrophic_wind(_metpy_on(height, "m", lat, cont))
        zeta_ref = mpcalc.vorticity(u_ref, v_ref)
        adv_ref = mpcalc.advection(zeta_ref, u_ref, v_ref)
    inner = (slice(3, -3), slice(3, -3))
    for ours, ref, rel in ((wind["u_g"], u_ref, 1e-9), (wind["v_g"], v_ref, 1e-9),
                           (zeta, zeta_ref, 1e-3), (adv, adv_ref, 1e-3)):
        ours = ours.values[:, back]
        ref = _plain(ref)
        scale = np.abs(ref[inner]).max()
        np.testing.assert_allclose(ours[inner], ref[inner], rtol=0, atol=rel * scale)


def test_region_mask_reads_longitudes_on_the_circle():
    # A box across the date line, given west > east or with east past 180
    # (the convention of analogs.stages.sources.subset_region).
    lon = np.array([-180.0, -175.0, -170.0, 0.0, 170.0, 175.0])
    lat = np.array([30.0, 40.0])
    for region in ((30.0, 40.0, 170.0, -175.0), (30.0, 40.0, 170.0, 185.0)):
        _, lon_in = dg.region_mask(lat, lon, region)
        np.testing.assert_array_equal(lon_in, [True, True, False, False, True, True])
    with pytest.raises(AnalogsInputError, match="west != east"):
        dg.region_mask(lat, lon, (30.0, 40.0, 10.0, 10.0))


def _shifted(ds, shift):
    """The same weather moved ``shift`` degrees east, stored the canonical way."""
    from analogs.stages.sources import normalise_grid
    moved = ds.assign_coords(lon=ds["lon"].values + shift)
    return normalise_grid(moved)


def _compare_diagnostics(a, b, shift):
    assert list(a.columns) == list(b.columns)
    for column in a.columns:
        x, y = a[column].to_numpy(), b[column].to_numpy()
        if column.endswith("_lon"):
            x = np.where(np.isnan(x), np.nan, (x + shift + 180.0) % 360.0 - 180.0)
            amplitude = column.replace("_lon", "_amplitude")
            if amplitude in a:   # a flat profile (|amplitude| ~ 1e-13 gpm) has no position
                flat = np.abs(a[amplitude].to_numpy()) < 1e-6
                x, y = np.where(flat, np.nan, x), np.where(flat, np.nan, y)
        if x.dtype == bool:
            np.testing.assert_array_equal(x, y, err_msg=column)
        else:
            np.testing.assert_allclose(x, y, rtol=1e-9, atol=1e-12 * np.nanmax(
                np.abs(x), initial=1.0), err_msg=column)


def test_diagnostics_identical_under_a_longitude_shift_across_the_date_line():
    # The same weather and the same box moved 280 degrees east (weather from 135 W-55 W
    # to 145 E-135 W, box 105-85 W to 175 E-165 W): grid and box now cross the date line,
    # and the grid is stored in two pieces. Every diagnostic must be the same (longitudes
    # shifted): the physics does not know where the seam is (definition, no source).
    from _regime_helpers import (
        northwest_flow_case,
        strong_trough_case,
        tropical_case,
        zonal_case,
    )
    days = [case() for case in (northwest_flow_case, tropical_case, strong_trough_case,
                                zonal_case)]
    ds = xr.concat([d.assign_coords(time=[np.datetime64("2001-07-15") + np.timedelta64(k, "D")])
                    for k, d in enumerate(days)], dim="time")
    shift = 280.0
    moved = _shifted(ds, shift)
    assert np.diff(moved["lon"].values).max() > 1.5      # really split at the seam
    a = dg.compute_diagnostics(ds, REGION)
    b = dg.compute_diagnostics(moved, (30.0, 45.0, 175.0, -165.0))
    assert a["tc_present"].sum() >= 1 and a["ridge_amplitude"].max() > 50.0
    _compare_diagnostics(a, b, shift)
    # The closed-low search and the ridge/trough on their own, too.
    lows_a = dg.find_closed_lows(ds["z500"])
    lows_b = dg.find_closed_lows(moved["z500"])
    np.testing.assert_allclose(lows_b["lon"], (lows_a["lon"] + shift + 180.0) % 360.0 - 180.0)
    np.testing.assert_allclose(lows_b["depth_gpm"], lows_a["depth_gpm"], rtol=1e-12)


def test_diagnostics_identical_under_a_rotation_of_a_global_grid():
    # A global (periodic) grid: the weather rotated by 100 degrees with its box; every
    # diagnostic the same, including a closed low right on the seam of [-180, 180).
    from _regime_helpers import great_circle_km
    lat, lon = np.arange(-90.0, 90.1, 2.0), np.arange(-180.0, 180.0, 2.0)
    r, _, _ = _sphere(lat, lon)
    height, _ = _global_height(r)
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    height = height - 40.0 * np.exp(-0.5 * (great_circle_km(28.0, 179.0, la, lo) / 250.0) ** 2)
    ds = xr.Dataset({"z500": (("time", "lat", "lon"), height[None], {"units": "gpm"})},
                    coords={"time": [np.datetime64("2001-08-20")], "lat": lat, "lon": lon})
    region = (20.0, 40.0, 170.0, -170.0)
    a = dg.compute_diagnostics(ds, region)
    assert bool(a["tc_present"].iloc[0]) and a["tc_lon"].iloc[0] in (178.0, 180.0, -180.0)
    shift = 100.0
    b = dg.compute_diagnostics(_shifted(ds, shift), (20.0, 40.0, 270.0, 290.0))
    _compare_diagnostics(a, b, shift)


# ---------------------------------------------------------- closed lows: robustness


def _one_day(z, lat, lon, day="2001-09-15"):
    return xr.DataArray(np.asarray(z, dtype=float)[None], dims=("time", "lat", "lon"),
                        coords={"time": [np.datetime64(day)], "lat": lat, "lon": lon},
                        attrs={"units": "gpm"})


def test_closed_low_search_skips_missing_values_locally():
    # One missing height far from the low used to void the whole day, silently. Now:
    # a missing value far away changes nothing; a few inside the ring change the depth by
    # a little; a permanent masked block (like a land mask) elsewhere changes nothing.
    from _regime_helpers import LAT, LON, tropical_case
    z = tropical_case()["z500"]
    clean = dg.find_closed_lows(z)
    assert len(clean) == 1
    far = z.copy()
    far[0, 5, 70] = np.nan
    pd.testing.assert_frame_equal(dg.find_closed_lows(far), clean)
    ring = z.copy()
    ring[0, 18:20, 41:44] = np.nan     # 33-34 N, 94-92 W: on the ring, 600-750 km north
    lows = dg.find_closed_lows(ring)
    assert len(lows) == 1 and (lows["lat"].iloc[0], lows["lon"].iloc[0]) == (27.0, -93.0)
    assert abs(lows["depth_gpm"].iloc[0] - clean["depth_gpm"].iloc[0]) < 2.0
    masked = z.copy()
    masked[0, 30:40, 60:75] = np.nan
    lows = dg.find_closed_lows(masked)
    assert len(lows) == 1 and lows["depth_gpm"].iloc[0] == pytest.approx(
        clean["depth_gpm"].iloc[0], abs=0.5)
    # compute_diagnostics counts the days with missing heights.
    ds = xr.Dataset({"z500": far})
    frame = dg.compute_diagnostics(ds, REGION)
    assert frame.attrs["missing_height_days"] == 1 and bool(frame["tc_present"].iloc[0])
    assert (LAT.size, LON.size) == z.shape[1:]


def test_broad_trough_at_the_domain_edge_is_not_a_closed_low():
    # A broad trough (Gaussian in longitude, e-folding half-width 12 deg, 80-200 gpm deep,
    # confined to 25-40 N) whose axis lies at or just inside the domain's eastern edge,
    # on days of every depth: no ring around a point near it stays on the grid, so
    # nothing is found (it used to be found on most days, measured against a half ring
    # and the partial domain's zonal median).
    from _regime_helpers import LAT, LON, vortex, zonal_height
    la, lo = np.meshgrid(LAT, LON, indexing="ij")
    days = []
    for amp, axis in [(80.0, -55.0), (120.0, -56.0), (160.0, -57.0), (200.0, -55.0),
                      (200.0, -58.0), (140.0, -59.0)]:
        trough = -amp * np.exp(-0.5 * ((lo - axis) / 12.0) ** 2) \
            * np.exp(-0.5 * ((la - 32.0) / 6.0) ** 2)
        days.append(zonal_height(4.0) + trough)
    z = xr.DataArray(np.stack(days), dims=("time", "lat", "lon"),
                     coords={"time": pd.date_range("2001-09-01", periods=len(days)),
                             "lat": LAT, "lon": LON}, attrs={"units": "gpm"})
    assert dg.find_closed_lows(z).empty
    # The same troughs moved well inside the domain are found: the test can fail.
    inner = z.copy(data=np.stack([zonal_height(4.0) + (d - zonal_height(4.0))[:, list(range(
        25, LON.size)) + list(range(25))] for d in days]))
    assert len(dg.find_closed_lows(inner)) >= 3
    # A compact low 5 degrees from that edge is not found either (its ring would leave
    # the grid); 12 degrees in, with its whole ring on the grid, it is.
    near = dg.find_closed_lows(_one_day(zonal_height(3.0) + vortex(30.0, -60.0, 50.0, 250.0),
                                        LAT, LON))
    inside = dg.find_closed_lows(_one_day(zonal_height(3.0) + vortex(30.0, -67.0, 50.0, 250.0),
                                          LAT, LON))
    assert near.empty
    assert len(inside) == 1 and inside["lon"].iloc[0] == -67.0


def test_closed_low_latitude_limit_and_closed_circulation():
    # Latitude limit 40 N (Hart and Evans 2001, from memory: Atlantic tropical cyclones
    # complete extratropical transition mostly between about 30 and 45 N; inland remnants
    # reach 35-40 N): a compact remnant-like low (50 gpm, sigma 250 km) at 36 N in
    # mid-September is found; the same low at 43 N is not.
    from _regime_helpers import LAT, LON, vortex, wave, zonal_height
    at_36 = dg.find_closed_lows(_one_day(zonal_height(3.0) + vortex(36.0, -90.0, 50.0, 250.0),
                                         LAT, LON))
    assert len(at_36) == 1 and at_36["lat"].iloc[0] == 36.0 and at_36["closed"].iloc[0]
    at_43 = dg.find_closed_lows(_one_day(zonal_height(3.0) + vortex(43.0, -90.0, 50.0, 250.0),
                                         LAT, LON))
    assert at_43.empty
    # Closed circulation (easterly geostrophic flow poleward of the centre, the cut-off
    # condition of cut-off low climatologies, Nieto et al. 2005, from memory): a sharp
    # open short-wave trough on a strong poleward height gradient is compact in the
    # eddy field (so it is found) but heights fall poleward along its axis: not closed.
    # The same trough with a cut-off centre is closed, and compute_diagnostics prefers
    # it for its tc_* columns.
    open_trough = zonal_height(12.0) + wave(150.0, ridge_lon=-110.0, wavelength_deg=24.0,
                                            centre_lat=36.0, width_deg=10.0)
    lows = dg.find_closed_lows(_one_day(open_trough, LAT, LON))
    assert len(lows) >= 1 and not lows["closed"].any()
    assert dg.find_closed_lows(_one_day(open_trough, LAT, LON), closed_only=True).empty
    cut_off = open_trough + vortex(36.0, -98.0, 120.0, 300.0)
    lows = dg.find_closed_lows(_one_day(cut_off, LAT, LON), closed_only=True)
    assert len(lows) == 1 and (lows["lat"].iloc[0], lows["lon"].iloc[0]) == (36.0, -98.0)
    from _regime_helpers import as_dataset
    frame = dg.compute_diagnostics(as_dataset(cut_off), REGION)
    assert bool(frame["tc_closed"].iloc[0]) and frame["tc_lon"].iloc[0] == -98.0
    frame = dg.compute_diagnostics(as_dataset(open_trough), REGION)
    assert bool(frame["tc_present"].iloc[0]) and not bool(frame["tc_closed"].iloc[0])


def test_closed_low_parameters_are_checked():
    from _regime_helpers import tropical_case
    z = tropical_case()["z500"]
    with pytest.raises(AnalogsInputError, match="poleward_rise_gpm"):
        dg.find_closed_lows(z, poleward_rise_gpm="high")
    with pytest.raises(AnalogsInputError, match="ring_km"):
        dg.find_closed_lows(z, ring_km=(800.0, 500.0))
    with pytest.raises(AnalogsInputError, match=r"unknown key\(s\) \['depth'\]"):
        dg.compute_diagnostics(tropical_case(), REGION, closed_lows={"depth": 10})


# ------------------------------------------------------------- moisture by its level


def test_rich_moisture_thresholds_match_their_derivations():
    # Reference for the 850 hPa threshold: MetPy. The mixing ratio of a 60 F (15.6 C)
    # dewpoint at 1000 hPa, carried unchanged up a well-mixed layer, is a dewpoint of
    # about 13 C at 850 hPa; the threshold, 12 C, sits just below it.
    w = mpcalc.saturation_mixing_ratio(1000 * units.hPa, SEVERE_DEWPOINT_C * units.degC)
    e850 = mpcalc.vapor_pressure(850 * units.hPa, w)
    td850 = mpcalc.dewpoint(e850).to("degC").magnitude
    assert 12.5 < td850 < 13.5
    assert td850 - 1.5 < dg.RICH_MOISTURE["q850"].threshold <= td850
    # Reference for precipitable water: the pooled global radiosonde fit ln W = 0.058 Td
    # + 2.42 (W mm, Td C; Int. J. Climatol., 'Comparison of two models relating
    # precipitable water to surface humidity ...') gives 27.8 mm at 60 F.
    w_60f = np.exp(0.058 * SEVERE_DEWPOINT_C + 2.42)
    assert w_60f == pytest.approx(27.8, abs=0.1)
    assert abs(dg.RICH_MOISTURE["pwat"].threshold - w_60f) <= 3.0
    assert dg.RICH_MOISTURE["td2m"].threshold == SEVERE_DEWPOINT_C


def _moisture_case(kind):
    """Zonal flow with a moisture field falling poleward at a fixed rate."""
    from _regime_helpers import LAT, LON, as_dataset, zonal_height
    ds = as_dataset(zonal_height())
    shape = (1, LAT.size, LON.size)
    if kind == "q850":
        # q of an 850 hPa dewpoint falling 1 K a degree from 25 C at 15 N (Bolton 1980)
        td = 25.0 - (LAT - LAT[0])
        e = 6.112 * np.exp(17.67 * td / (td + 243.5))
        values, unit = 0.622 * e / (850.0 - 0.378 * e), "kg kg-1"
    elif kind == "td2m":
        values, unit = 273.15 + 25.0 - (LAT - LAT[0]), "K"
    else:
        values, unit = 50.0 - 2.0 * (LAT - LAT[0]), "kg m-2"
    ds[kind] = (("time", "lat", "lon"), np.broadcast_to(values[None, :, None], shape),
                {"units": unit})
    return ds


def test_moisture_measures_use_the_threshold_of_their_level():
    # Arithmetic on hand fields: the moisture line is the northernmost latitude where
    # the field reaches its level's threshold. 850 hPa dewpoint 25 C at 15 N falling
    # 1 K/deg: 12 C line at 28 N (the 60 F line, 15.6 C, would give 24 N). 2 m dewpoint,
    # same numbers: the 60 F line at 24 N. Precipitable water 50 kg m-2 at 15 N falling
    # 2 per degree: 30 kg m-2 at 25 N. Precipitable water counts as moisture.
    region = (20.0, 45.0, -105.0, -85.0)
    q = dg.compute_diagnostics(_moisture_case("q850"), region)
    assert q.attrs["moisture"]["measure"] == "850 hPa dewpoint"
    assert q["moist_line_lat"].iloc[0] == pytest.approx(28.0)
    assert q["moist_area_fraction"].iloc[0] == pytest.approx(
        np.average(np.arange(20, 46) <= 28, weights=np.cos(np.radians(np.arange(20, 46)))))
    td = dg.compute_diagnostics(_moisture_case("td2m"), region)
    assert td.attrs["moisture"]["measure"] == "2 m dewpoint"
    assert td["moist_line_lat"].iloc[0] == pytest.approx(24.0)
    pw = dg.compute_diagnostics(_moisture_case("pwat"), region)
    assert pw.attrs["missing"] == [] and bool(pw["moisture_available"].iloc[0])
    assert pw["moist_line_lat"].iloc[0] == pytest.approx(25.0)
    assert pw["pwat_region"].iloc[0] == pytest.approx(
        np.average(50.0 - 2.0 * (np.arange(20, 46) - 15.0),
                   weights=np.cos(np.radians(np.arange(20, 46)))))
    assert np.isnan(pw["dewpoint_region_c"].iloc[0])
    none = dg.compute_diagnostics(_moisture_case("q850")[["z500"]], region)
    assert none.attrs["missing"] == ["moisture"] and none.attrs["moisture"] is None
    assert not none["moisture_available"].any()
    # A threshold given by the caller, in the field's units.
    custom = dg.compute_diagnostics(_moisture_case("q850"), region, moist_threshold=8.0)
    assert custom["moist_line_lat"].iloc[0] == pytest.approx(32.0)
    assert custom.attrs["moisture"]["threshold"] == 8.0


def _whole_grid_window(lat_in, lon_in, lon):
    return slice(None), np.arange(lon.size)


@pytest.mark.parametrize("shift", [0.0, 280.0])
@pytest.mark.parametrize("region", [REGION, (20.0, 30.0, -140.0, -120.0)])
def test_region_diagnostics_from_the_window_equal_the_whole_grid(monkeypatch, region, shift):
    # The flow and vorticity diagnostics are taken on the window of grid lengths around
    # the region that their centred differences reach (_stencil_window): the same
    # numbers, to the last bit, as on the whole grid (the earlier computation, itself
    # checked against MetPy above). Also for a region at the domain's corner and for
    # grid and box moved across the date line (the grid stored in two pieces).
    z = _height_field(seed=3, n_time=6)
    q = xr.DataArray(0.004 + 0.008 * np.random.default_rng(3).random(z.shape), dims=z.dims,
                     coords=z.coords, attrs={"units": "kg kg-1"})
    ds = xr.Dataset({"z500": z, "q850": q})
    if shift:
        ds = _shifted(ds, shift)
        region = (region[0], region[1], region[2] + shift, region[3] + shift)
    windowed = dg.compute_diagnostics(ds, region)
    _, columns = dg._stencil_window(*dg.region_mask(ds["lat"].values, ds["lon"].values,
                                                       region), ds["lon"].values)
    assert columns.size < ds.sizes["lon"]
    monkeypatch.setattr(dg, "_stencil_window", _whole_grid_window)
    pd.testing.assert_frame_equal(windowed, dg.compute_diagnostics(ds, region),
                                  check_exact=True)


def _lows_on_three_grids(grid):
    """Two days of compact lows (the second without the first's first low) on: the
    helpers' limited domain, with missing heights and humidities on the ring of a low
    near the box and far away; that domain moved across the date line (stored in two
    pieces, as normalise_grid stores it); a global grid with its pole rows (periodic,
    a low across the 0 E seam and one in the southern hemisphere). Returns lat, lon, z,
    q (kg/kg) and a box near some of the lows."""
    import _regime_helpers

    if grid == "global":
        lat, lon = np.arange(-90.0, 90.1, 2.0), np.arange(0.0, 360.0, 2.0)
        la, lo = np.meshgrid(lat, lon, indexing="ij")
        centres = [(26.0, 10.0), (34.0, 356.0), (-28.0, 200.0), (22.0, 120.0)]
        z = np.stack([5900.0 - 8.0 * np.abs(la) + sum(
            -60.0 * np.exp(-0.5 * (great_circle_km(c_lat, c_lon, la, lo) / 300.0) ** 2)
            for c_lat, c_lon in centres[day:]) for day in range(2)])
        q = 0.004 + 0.01 * np.random.default_rng(5).random(z.shape)
        z[1, 58, 3] = q[1, 58, 2] = np.nan
        return lat, lon, z, q, (28.0, 40.0, -15.0, 15.0)
    lat, lon = _regime_helpers.LAT, _regime_helpers.LON
    centres = [(18.0, -100.0), (25.0, -75.0), (33.0, -95.0), (22.0, -120.0), (31.0, -81.0),
               (40.0, -109.0)]
    z = np.stack([zonal_height() + sum(vortex(la, lo, 60.0, 250.0) for la, lo in centres[day:])
                  for day in range(2)])
    q = 0.004 + 0.01 * np.random.default_rng(5).random(z.shape)
    z[1, 24:26, 38:40] = z[0, 20, 5] = q[1, 17, 33] = q[0, 25:27, 40] = np.nan
    box = (28.0, 36.0, -100.0, -90.0)
    if grid == "date_line":
        order = np.argsort(wrap_longitude(lon + 260.0))
        lon, z, q = wrap_longitude(lon + 260.0)[order], z[..., order], q[..., order]
        box = (box[0], box[1], box[2] + 260.0, box[3] + 260.0)
    return lat, lon, z, q, box


@pytest.mark.parametrize("grid", ["limited", "date_line", "global"])
def test_closed_lows_near_the_box_are_the_lows_of_the_whole_search(grid):
    # _closed_lows_np(near=(box, km)) screens and measures only where a centre within
    # km of the box can be: the same lows, with the same measures to the last bit, as
    # the whole search filtered afterwards (the earlier computation). The moisture is
    # turned into a dewpoint only at the points around each centre (moisture_kind): the
    # same values as the dewpoint of the whole grid read there (the earlier path).
    # Rows beyond the search's band of latitudes change nothing either.
    lat, lon, z, q, box = _lows_on_three_grids(grid)
    params, km = dict(dg.CLOSED_LOW_DEFAULTS), 600.0
    whole = dg._closed_lows_np(z, lat, lon, moisture=dg._dewpoint_np(q, 850.0), **params)
    near = dg._distance_to_box_km(whole["lat"], whole["lon"], box) <= km
    assert 0 < near.sum() < near.size and np.isfinite(whole["moisture"]).all()
    found = dg._closed_lows_np(z, lat, lon, moisture=q, moisture_kind="q850",
                               near=(box, km), **params)
    for key in found:
        np.testing.assert_array_equal(found[key], whole[key][near], err_msg=key)
    rows = np.abs(lat) <= 60.0
    cut = dg._closed_lows_np(z[:, rows], lat[rows], lon, moisture=q[:, rows],
                             moisture_kind="q850", **params)
    for key in cut:
        np.testing.assert_array_equal(cut[key], whole[key], err_msg=key)