"""Trough and ridge axes of 500 hPa height (analogs.stages.features).

References: a travelling wave Z = Z0 - G y + A cos(k (x - x0(lat))) has its height
minima (trough axis) at x = x0 + pi / k and maxima (ridge axis) at x = x0, with
d2Z/dx2 = A k^2 there (calculus, worked by hand); MetPy's geostrophic wind gives the
northerly-to-southerly turn at each trough point (Holton and Hakim 2013, from memory,
for the definition)."""

import numpy as np
import pytest
import xarray as xr

from analogs.constants import EARTH_RADIUS
from analogs.errors import AnalogsInputError
from analogs.stages.features import synoptic_marks, trough_ridge_axes

LAT = np.arange(25.0, 55.1, 1.0)
LON = np.arange(-130.0, -60.1, 1.0)
WAVELENGTH_DEG = 40.0


def phase_lon(lat):
    """Ridge longitude of the test wave: tilting 0.5 degree east per degree north."""
    return -110.0 + 0.5 * (lat - 35.0)


def wave(amplitude, lat=LAT, lon=LON):
    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    k = 2 * np.pi / WAVELENGTH_DEG
    z = 5700.0 - 8.0 * (lat2d - 35.0) + amplitude * np.cos(k * (lon2d - phase_lon(lat2d)))
    return xr.DataArray(z, dims=("lat", "lon"), coords={"lat": lat, "lon": lon},
                        attrs={"units": "gpm"})


def curvature_by_hand(amplitude, lat):
    """A k^2 in gpm per (1000 km)^2, k = 2 pi / (wavelength in km at ``lat``)."""
    wavelength_km = np.radians(WAVELENGTH_DEG) * EARTH_RADIUS / 1000.0 * np.cos(np.radians(lat))
    return amplitude * (2 * np.pi / (wavelength_km / 1000.0)) ** 2


def test_axes_of_a_tilted_wave_lie_on_its_extrema():
    axes = trough_ridge_axes(wave(60.0))
    troughs, ridges = axes[axes["kind"] == "trough"], axes[axes["kind"] == "ridge"]
    # Inside the grid the wave has troughs at ridge + 20 deg (+ 40 k) and ridges at + 40 k.
    assert troughs["axis"].nunique() == 2 and ridges["axis"].nunique() >= 1
    for table, offset in ((troughs, WAVELENGTH_DEG / 2), (ridges, 0.0)):
        relative = (table["lon"] - phase_lon(table["lat"]) - offset) % WAVELENGTH_DEG
        distance = np.minimum(relative, WAVELENGTH_DEG - relative)
        assert distance.max() < 0.05
    # The trough from 95 W (25 N) to 80 W (55 N) is one axis over the whole grid; the
    # one reaching the west edge only where it is 5 columns inside; points run south to north.
    whole = [line for _, line in troughs.groupby("axis")
             if line["lat"].iloc[0] == LAT[0] and line["lat"].iloc[-1] == LAT[-1]]
    assert len(whole) == 1 and whole[0]["lon"].iloc[0] == pytest.approx(-95.0, abs=0.05)
    for _, line in axes.groupby("axis"):
        assert np.all(np.diff(line["lat"].to_numpy()) > 0)
        assert line["lon"].min() >= LON[0] + 4 and line["lon"].max() <= LON[-1] - 4
    # Curvature A k^2 by hand; the two 1-2-1 passes and the centred differences damp a
    # 40-point wave by about 2 % (cos^4(pi/40) sin^2(k)/k^2, worked by hand).
    expected = curvature_by_hand(60.0, troughs["lat"].to_numpy())
    np.testing.assert_allclose(troughs["curvature"], expected, rtol=0.03)
    np.testing.assert_allclose(ridges["curvature"],
                               -curvature_by_hand(60.0, ridges["lat"].to_numpy()), rtol=0.03)


def neighbours(lon):
    """Columns just west and just east of ``lon`` (not the column it lies on)."""
    position = lon - LON[0]
    return int(np.ceil(position - 1e-6)) - 1, int(np.floor(position + 1e-6)) + 1


def test_trough_points_are_where_metpy_geostrophic_wind_turns_southerly():
    metpy_calc = pytest.importorskip("metpy.calc")
    from metpy.units import units
    z = wave(60.0)
    axes = trough_ridge_axes(z)
    dx, dy = metpy_calc.lat_lon_grid_deltas(LON, LAT)
    _, v = metpy_calc.geostrophic_wind(z.values * units("m"), dx=dx, dy=dy,
                                       latitude=(LAT[:, None] * np.ones_like(LON)) * units.degree)
    v = v.to("m/s").magnitude
    for point in axes[axes["kind"] == "trough"].itertuples():
        i = int(np.flatnonzero(LAT == point.lat)[0])
        west, east = neighbours(point.lon)
        assert v[i, west] < 0 < v[i, east]           # northerly west, southerly east
    for point in axes[axes["kind"] == "ridge"].itertuples():
        i = int(np.flatnonzero(LAT == point.lat)[0])
        west, east = neighbours(point.lon)
        assert v[i, west] > 0 > v[i, east]


def test_weak_bends_are_not_axes():
    """A 5 gpm wave bends the flow by A k^2 of about 9 gpm per (1000 km)^2 at 45 N,
    under the 30 of the default threshold; 60 gpm gives about 110."""
    assert curvature_by_hand(5.0, 45.0) < 30.0 < curvature_by_hand(60.0, 45.0)
    assert trough_ridge_axes(wave(5.0)).empty
    assert not trough_ridge_axes(wave(60.0)).empty


def test_axes_per_time_and_marks_with_a_compact_low():
    """Several days at once keep each day's axes apart; synoptic_marks adds the centre of
    a closed Gaussian low found by the diagnostics' closed-low search (its ring of
    800 km must lie on the grid: centre at 35 N), and not the open wave's troughs."""
    flat = wave(0.0)
    lat2d, lon2d = np.meshgrid(LAT, LON, indexing="ij")
    low = flat - 80.0 * np.exp(-((lat2d - 35.0) ** 2 + (lon2d + 90.0) ** 2) / 8.0)
    days = xr.concat([wave(60.0), low], dim="time").assign_coords(
        time=np.array(["2001-07-01", "2001-07-02"], dtype="datetime64[ns]"))
    axes = trough_ridge_axes(days)
    first_day = axes[axes["time"] == days["time"].values[0]].drop(columns="time")
    alone = trough_ridge_axes(wave(60.0))
    np.testing.assert_array_equal(first_day[["lat", "lon"]].to_numpy(),
                                  alone[["lat", "lon"]].to_numpy())
    marks = synoptic_marks(days)
    lows = marks[marks["kind"] == "low"]
    assert list(lows["panel"]) == [1]
    assert (lows["lat"].iloc[0], lows["lon"].iloc[0]) == (35.0, -90.0)
    first = marks[marks["panel"] == 0]
    assert set(first["kind"]) == {"trough", "ridge"}


def test_needs_a_height_field_on_a_grid():
    with pytest.raises(AnalogsInputError, match="trough_ridge_axes"):
        trough_ridge_axes(xr.DataArray(np.zeros(3), dims=("x",)))
