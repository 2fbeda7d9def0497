"""Input hygiene (issue 13, helper 13b): units through pint's CF / UDUNITS registry
(cf-xarray), the physical plausibility gate, non-finite values, the missing-data policy
at the edges of a record, files that are no regular files, damaged or changing files,
the local dask cluster's sockets, a malformed --scheduler, a full or read-only disk, and
the zarr requirement.

Each case either gives the right answer (checked against a reference outside the
project, named beside it) or is refused with exit status 2 / ``AnalogsInputError`` and
one line naming the file, variable or option. Run with ``-s`` to see the table of
case -> outcome that the closing note of issue 13 quotes (``test_hygiene_table``).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import sys
import threading
import types
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import _reliability_helpers as rh
from _sources_helpers import LAT, LON, daily_times, smooth_height, smooth_humidity
from analogs.cli import main
from analogs.errors import AnalogsInputError
from analogs.stages import sources
from analogs.stages.sources import PLAUSIBLE_RANGE, apply_missing_data_policy, open_archive, open_target

#: case id -> (outcome: "refused" / "right answer" / "right answer, warned", what was seen)
OUTCOMES: dict[str, tuple[str, str]] = {}

G0 = 9.80665  # standard gravity, m s-2 (3rd CGPM 1901; WMO)


def _record(case, outcome, seen):
    OUTCOMES[case] = (outcome, " ".join(str(seen).split())[:160])


def _file(path, name, values, attrs, *, times=None, level=None, level_units="hPa",
          level_name="level"):
    """One variable ``name`` (time, lat, lon) on the 5-degree test grid, with a scalar
    pressure level when given."""
    times = daily_times(periods=values.shape[0]) if times is None else times
    coords = {"time": times, "lat": LAT, "lon": LON}
    if level is not None:
        coords[level_name] = ((), level, {"units": level_units} if level_units else {})
    xr.Dataset({name: (("time", "lat", "lon"), values, attrs)}, coords=coords).to_netcdf(path)
    return path


def _refused(case, call, *words):
    with pytest.raises(AnalogsInputError) as caught:
        call()
    message = str(caught.value)
    assert "\n" not in message
    for word in words:
        assert word in message, (word, message)
    _record(case, "refused", message.split("/")[-1] if "/" in message else message)
    return message


# =========================================================================== units

def test_heights_in_decametres_labelled_m_are_converted_with_a_warning(tmp_path):
    """An archive of 500 hPa heights in dam labelled "m" (values 550-600) is converted x10
    with a warning that says the values look like decametres; the result equals the
    heights in gpm (1 dam = 10 m, SI prefix)."""
    times = daily_times(periods=6)
    z = smooth_height(times)
    path = _file(tmp_path / "dam_as_m.nc", "z", z / 10.0, {"units": "m"}, level=500.0)
    with pytest.warns(UserWarning, match=r"dam_as_m\.nc: variable 'z' has units 'm', which give "
                      r"values of 5\d\d to 5\d\d gpm, outside the plausible range .* look like "
                      r"decametres \(dam\): converted as 'dam'") as caught:
        ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, z, rtol=1e-6)
    _record("archive-heights-dam-labelled-m", "right answer, warned",
            [str(w.message) for w in caught if "decametres" in str(w.message)][0].split("/")[-1])
    # The same as a target (checked on its values when opened).
    target = _file(tmp_path / "dam_target.nc", "z", z[:1] / 10.0, {"units": "m"}, level=500.0,
                   times=times[:1])
    with pytest.warns(UserWarning, match="look like decametres"):
        ds = open_target(target, fields=["z500"])
    np.testing.assert_allclose(ds["z500"].values, z[:1], rtol=1e-6)
    _record("target-heights-dam-labelled-m", "right answer, warned", "look like decametres (dam)")


def test_geopotential_labelled_m_on_a_level_axis_is_divided_by_g0(tmp_path):
    """Geopotential (m2 s-2, values ~55,000) labelled "m" on a 500 hPa level axis: the
    values look like geopotential and are divided by g0 = 9.80665 m s-2 (3rd CGPM 1901;
    WMO), with a warning."""
    times = daily_times(periods=4)
    z = smooth_height(times)
    path = tmp_path / "phi_as_m.nc"
    xr.Dataset({"z": (("time", "pressure_level", "lat", "lon"), (z * G0)[:, None],
                      {"units": "m", "standard_name": "geopotential"})},
               coords={"time": times, "pressure_level": ("pressure_level", [500.0],
                                                         {"units": "hPa"}),
                       "lat": LAT, "lon": LON}).to_netcdf(path)
    with pytest.warns(UserWarning, match=r"look like geopotential in m2 s-2"):
        ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, z, rtol=1e-6)
    _record("archive-geopotential-labelled-m-on-level-axis", "right answer, warned",
            "look like geopotential in m2 s-2 (height times g0): converted as 'm2 s-2'")


def test_specific_humidity_in_g_per_kg_labelled_kg_per_kg(tmp_path):
    """q in g/kg labelled kg/kg (values up to ~20): converted x1e-3 with a warning; the
    result equals q in kg/kg (1 g = 1e-3 kg)."""
    times = daily_times(periods=4)
    q = smooth_humidity(times)
    path = _file(tmp_path / "q_gkg.nc", "q", q * 1000.0, {"units": "kg kg-1"}, level=850.0)
    with pytest.warns(UserWarning, match=r"q_gkg\.nc: variable 'q' has units 'kg kg-1', .* look "
                                         r"like grams per kilogram \(g kg-1\)"):
        ds = open_archive(path, fields=["q850"])
    np.testing.assert_allclose(ds["q850"].values, q, rtol=1e-6)
    _record("archive-q-in-g-per-kg-labelled-kg-per-kg", "right answer, warned",
            "look like grams per kilogram (g kg-1): converted as 'g kg-1'")


@pytest.mark.parametrize("case,field,name,units,values,words", [
    ("archive-humidity-units-K", "q850", "q", "K", 0.01, ("'q'", "units 'K'", "a temperature",
                                                           "mass ratio")),
    ("archive-humidity-units-furlongs", "q850", "q", "furlongs", 0.01,
     ("units 'furlongs'", "a length", "mass ratio")),
    ("archive-humidity-units-percent", "q850", "q", "%", 0.01,
     ("units '%'", "not a ratio of masses")),
    ("archive-height-units-K", "z500", "z", "K", 5500.0, ("units 'K'", "a temperature",
                                                          "a height")),
    ("archive-height-units-hPa", "z500", "z", "hPa", 5500.0, ("units 'hPa'", "a pressure")),
    ("archive-dewpoint-units-m", "td2m", "d2m", "m", 280.0, ("units 'm'", "a length",
                                                             "a temperature")),
    ("archive-pwat-units-K", "pwat", "tcwv", "K", 30.0, ("units 'K'", "a temperature",
                                                         "mass per area")),
    ("archive-height-units-gibberish", "z500", "z", "metres-ish", 5500.0,
     ("unrecognised units 'metres-ish'", "CF / UDUNITS")),
])
def test_units_of_another_quantity_are_refused(tmp_path, case, field, name, units, values,
                                               words):
    """Units naming another quantity (pint's dimensionality in cf-xarray's registry) are
    refused naming file, variable and units, never accepted from the magnitude: the
    values here are of the right magnitude for the field."""
    level = sources.FIELD_LEVEL_HPA[field]
    path = _file(tmp_path / f"{case}.nc", name, np.full((3, LAT.size, LON.size), values),
                 {"units": units}, level=level)
    _refused(case, lambda: open_archive(path, fields=[field]), f"{case}.nc", *words)


@pytest.mark.parametrize("case,units,scale,offset", [
    # 1 ft = 0.3048 m exactly (international yard and pound agreement, 1959).
    ("archive-height-in-feet", "ft", 1 / 0.3048, 0.0),
    # 1 km = 1000 m (SI prefix); "gpdam" is the geopotential decametre.
    ("archive-height-in-km", "km", 1e-3, 0.0),
    ("archive-height-in-gpdam", "gpdam", 0.1, 0.0),
    # Geopotential as energy per mass: 1 J kg-1 = 1 m2 s-2, divided by g0.
    ("archive-geopotential-in-J-per-kg", "J kg-1", G0, 0.0),
])
def test_heights_in_any_length_unit_give_the_right_answer(tmp_path, case, units, scale, offset):
    times = daily_times(periods=3)
    z = smooth_height(times)
    path = _file(tmp_path / "h.nc", "z", z * scale + offset, {"units": units}, level=500.0)
    ds = open_archive(path)
    np.testing.assert_allclose(ds["z500"].values, z, rtol=1e-9)
    _record(case, "right answer", f"units {units!r} converted by pint to gpm")


def test_dewpoint_in_fahrenheit_and_pwat_in_inches(tmp_path):
    """degF -> K: (F - 32) * 5/9 + 273.15 (definition of the Fahrenheit scale); precipitable
    water in inches -> kg m-2: 25.4 mm per inch, 1 mm of water = 1 kg m-2 (water density
    1000 kg m-3)."""
    times = daily_times(periods=3)
    td_k = 270.0 + 20.0 * np.cos(np.radians(LAT))[None, :, None] + np.zeros((3, 1, LON.size))
    td_f = (td_k - 273.15) * 9.0 / 5.0 + 32.0
    pw = 5.0 + 40.0 * np.cos(np.radians(LAT))[None, :, None] ** 2 + np.zeros((3, 1, LON.size))
    path = tmp_path / "f.nc"
    xr.Dataset({"d2m": (("time", "lat", "lon"), td_f, {"units": "degF"}),
                "tcwv": (("time", "lat", "lon"), pw / 25.4, {"units": "inches"})},
               coords={"time": times, "lat": LAT, "lon": LON}).to_netcdf(path)
    ds = open_archive(path, fields=["td2m"])
    np.testing.assert_allclose(ds["td2m"].values, td_k, rtol=1e-9)
    ds = open_archive(path, fields=["pwat"])
    np.testing.assert_allclose(ds["pwat"].values, pw, rtol=1e-9)
    _record("archive-dewpoint-degF", "right answer", "degF converted by pint to K")
    _record("archive-pwat-inches", "right answer", "inches of water -> kg m-2")


def test_metres_labelled_feet_and_furlongs_are_refused_with_the_range(tmp_path):
    """Heights in metres labelled "ft" give 1676-1862 gpm, and labelled "furlongs" over a
    thousand km: outside the plausible range, no scale error recognised -> refused,
    naming variable, units and the values they give."""
    z = smooth_height(daily_times(periods=3))
    path = _file(tmp_path / "m_as_ft.nc", "z", z, {"units": "ft"}, level=500.0)
    _refused("archive-metres-labelled-ft", lambda: open_archive(path), "m_as_ft.nc",
             "variable 'z' has units 'ft', which give values of 1", "plausible range",
             "4000 to 6500 gpm")
    path = _file(tmp_path / "m_as_furlong.nc", "z", z, {"units": "furlongs"}, level=500.0)
    _refused("archive-metres-labelled-furlongs", lambda: open_archive(path),
             "m_as_furlong.nc", "units 'furlongs'", "e+06", "plausible range")


def test_celsius_dewpoint_labelled_kelvin_is_refused(tmp_path):
    """An offset error is not a scale error: dewpoints in degC labelled K (values -20 to
    25) are refused, naming the units and the range found."""
    td_c = 25.0 * np.cos(np.radians(LAT))[None, :, None] + np.zeros((3, 1, LON.size)) - 20 * (
        np.abs(LAT) > 60)[None, :, None]
    path = _file(tmp_path / "c_as_k.nc", "d2m", td_c, {"units": "K"})
    _refused("archive-dewpoint-celsius-labelled-K", lambda: open_archive(path, fields=["td2m"]),
             "c_as_k.nc", "units 'K'", "-20 to 25 K", "173.15 to 313.15 K")


def test_plausible_ranges_against_outside_references():
    """The gate's ranges hold what the atmosphere can do and exclude the scale errors:
    the 1976 US Standard Atmosphere 500 hPa height (MetPy pressure_to_height_std) lies
    inside, the standard 850 and 300 hPa heights outside; saturation specific humidity
    at 850 hPa and 35 degC (MetPy, Bolton 1980) lies inside, the same in g/kg outside;
    the lowest surface temperature measured (-89.2 degC, Vostok 1983) and the highest
    dewpoint reported (35 degC, Dhahran 2003) lie inside the dewpoint range (WMO
    extremes archive, from memory)."""
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units
    low, high = PLAUSIBLE_RANGE["z500"]
    z500 = mpcalc.pressure_to_height_std(500 * units.hPa).to("m").magnitude
    assert low < z500 < high and abs(z500 - 5574) < 5  # MetPy's closed form: 5571 m
    for level in (850, 300):
        z = mpcalc.pressure_to_height_std(level * units.hPa).to("m").magnitude
        assert not low <= z <= high
        assert not low <= z / 10.0 <= high and not low <= z * G0 <= high
    assert not low <= z500 / 10.0 <= high and not low <= z500 * G0 <= high  # dam, m2 s-2
    q_sat = mpcalc.specific_humidity_from_dewpoint(850 * units.hPa, 35 * units.degC)
    q_sat = q_sat.to("kg/kg").magnitude
    low, high = PLAUSIBLE_RANGE["q850"]
    assert low < q_sat < high and not low <= q_sat * 1000.0 <= high
    low, high = PLAUSIBLE_RANGE["td2m"]
    assert low < 273.15 - 89.2 and 273.15 + 35.0 < high
    assert not low <= 35.0 <= high  # degC values read as K


def test_a_kpa_level_is_recognised_through_its_units(tmp_path):
    """A pressure axis in kPa (50 kPa = 500 hPa, SI prefixes) selects the 500 hPa level;
    "mb" is a millibar there, not a millibarn; a level axis whose units are no pressure
    is refused with a message about its units."""
    times = daily_times(periods=2)
    z = smooth_height(times)

    def levels(name, values, units):
        path = tmp_path / name
        attrs = {"units": units} if units is not None else {}
        xr.Dataset({"z": (("time", "plev", "lat", "lon"),
                          np.stack([z - 1000.0, z], 1), {"units": "m"})},
                   coords={"time": times, "plev": ("plev", values, attrs), "lat": LAT,
                           "lon": LON}).to_netcdf(path)
        return path

    ds = open_archive(levels("kpa.nc", [70.0, 50.0], "kPa"))
    np.testing.assert_allclose(ds["z500"].values, z)
    _record("archive-level-in-kPa", "right answer", "50 kPa taken as 500 hPa through pint")
    ds = open_archive(levels("mb.nc", [700.0, 500.0], "mb"))
    np.testing.assert_allclose(ds["z500"].values, z)
    _refused("archive-level-units-not-pressure",
             lambda: open_archive(levels("sigma.nc", [0.7, 0.5], "sigma")),
             "sigma.nc", "plev (units 'sigma', not a pressure)", "units of pressure")


def test_undeclared_fill_value_on_some_days_is_refused_naming_the_days(tmp_path):
    """A fill value not declared as _FillValue (9.96921e36, netCDF's default fill) on two
    days of an archive: the plausibility gate on every day refuses it, naming the file,
    the variable, its units, the days and the values found."""
    times = daily_times(periods=8)
    z = smooth_height(times)
    z[[2, 5], 3:5, 3:5] = 9.96921e36
    path = _file(tmp_path / "fill.nc", "z", z, {"units": "m"}, level=500.0)
    _refused("archive-undeclared-fill-value", lambda: open_archive(path), "fill.nc",
             "variable 'z' has units 'm'", "9.969e+36", "plausible range",
             f"{times[2]:%Y-%m-%d}, {times[5]:%Y-%m-%d}")


# =========================================================================== non-finite

def test_infinite_values_are_missing_and_reported_by_file_variable_and_day(tmp_path):
    """A day of +Inf and a few -Inf points: treated as missing (the day dropped, the
    points filled), with a warning naming the file, the variable, the count and the day;
    the report counts them."""
    times = daily_times(periods=10)
    z = smooth_height(times)
    z[4] = np.inf
    z[7, 10, 20:22] = -np.inf
    path = _file(tmp_path / "inf.nc", "z", z, {"units": "m"}, level=500.0)
    with pytest.warns(UserWarning) as caught:
        ds = open_archive(path)
    messages = [str(w.message) for w in caught]
    inf_message = next(m for m in messages if "infinite value" in m)
    assert "inf.nc: variable 'z' (z500): 2666 infinite value(s) (+Inf or -Inf) on 2 day(s): " \
           f"{times[4]:%Y-%m-%d}, {times[7]:%Y-%m-%d}; treated as missing values" in inf_message
    summary = next(m for m in messages if "missing values (NaN or infinite)" in m)
    assert "1 day(s) dropped (z500 on " + f"{times[4]:%Y-%m-%d} (100%)" in summary
    assert "2 value(s) filled" in summary
    assert "missing (NaN)" not in " ".join(messages)
    report = json.loads(ds.attrs["missing_data"])
    assert report["n_infinite_values"] == 2666 and report["days_dropped"] == [f"{times[4]:%Y-%m-%d}"]
    assert np.isfinite(ds["z500"].values).all()
    _record("archive-day-of-plus-inf", "right answer, warned", inf_message.split("/")[-1])
    # A target with an infinite value: missing, with a warning naming file and variable.
    target = _file(tmp_path / "inf_target.nc", "z", z[7:8], {"units": "m"}, level=500.0,
                   times=times[7:8])
    with pytest.warns(UserWarning, match=r"inf_target\.nc: variable 'z' \(z500\) has 2 "
                                         r"infinite value\(s\)"):
        target_ds = open_target(target, fields=["z500"])
    assert np.isnan(target_ds["z500"].values).sum() == 2
    _record("target-minus-inf-points", "right answer, warned", "2 infinite values -> missing")


# =========================================================================== missing data

def test_two_missing_points_at_the_start_of_a_record_cost_no_day(tmp_path):
    """Issue 13's case: two missing points on the first days of an archive dropped four of
    five days and blamed "more than 0.1 of its grid points". Now no day is dropped: the
    points are filled from their neighbours, and the message names the field, the two
    points and the days."""
    times = daily_times(periods=5)
    z = smooth_height(times)
    z[:4, 8, 30] = np.nan
    z[:4, 20, 50] = np.nan
    path = _file(tmp_path / "edge.nc", "z", z, {"units": "m"}, level=500.0)
    with pytest.warns(UserWarning) as caught:
        ds = open_archive(path)
    message = next(str(w.message) for w in caught if "missing values" in str(w.message))
    assert ("0 day(s) dropped, 8 value(s) filled (z500: 8 at 2 grid point(s) (lat -50, lon "
            "-30; lat 10, lon 70) on 4 days between") in message
    assert "0.1" not in message
    assert ds.sizes["time"] == 5 and not np.isnan(ds["z500"].values).any()
    # The filled values: the smooth field is recovered to within 0.1 % (its own values).
    np.testing.assert_allclose(ds["z500"].values, smooth_height(times), rtol=1e-3)
    _record("archive-two-points-missing-first-days", "right answer, warned",
            message.split("/")[-1])


def test_fill_in_space_reproduces_a_plane_and_matches_with_dask(tmp_path):
    """The Laplace fill is exact for a field linear in the grid indices (linear functions
    satisfy the five-point discrete Laplace equation: common practice, no source), also
    for a hole of several points, and a chunked archive gives the same values."""
    rows, cols = np.meshgrid(np.arange(LAT.size), np.arange(LON.size), indexing="ij")
    plane = 5000.0 + 7.0 * rows - 3.0 * cols + 10.0 * np.arange(6)[:, None, None]
    gappy = plane.copy()
    gappy[0, 10:14, 20:25] = np.nan      # first day: no time interpolation possible
    gappy[2:6, 30, 40] = np.nan          # four days in a row, up to the end of the record
    path = _file(tmp_path / "plane.nc", "z", gappy, {"units": "m"}, level=500.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        eager = open_archive(path)
        lazy = open_archive(path, chunks={"time": 2})
    np.testing.assert_allclose(eager["z500"].values, plane, rtol=1e-12)
    np.testing.assert_allclose(lazy["z500"].values, eager["z500"].values, rtol=1e-12)
    report = json.loads(eager.attrs["missing_data"])
    assert report["n_values_filled_in_space"] == 24 and report["n_days_dropped"] == 0


def test_a_real_share_of_the_domain_missing_still_drops_the_day():
    """Proportionate: a day missing 30 % of its points is dropped, naming the field, the
    day and the share; one missing 2 % is filled."""
    times = daily_times(periods=6)
    z = smooth_height(times)
    z[2, : int(0.3 * LAT.size)] = np.nan
    z[4, :1] = np.nan  # 1 of 37 rows: 2.7 %
    ds = xr.Dataset({"z500": (("time", "lat", "lon"), z)},
                    coords={"time": times, "lat": LAT, "lon": LON})
    with pytest.warns(UserWarning, match=rf"1 day\(s\) dropped \(z500 on {times[2]:%Y-%m-%d} "
                                         r"\(30%\) of its 2664 grid points missing\), 72 "
                                         r"value\(s\) filled"):
        out, report = apply_missing_data_policy(ds)
    assert report["days_dropped"] == [f"{times[2]:%Y-%m-%d}"]
    assert report["fields"]["z500"]["days_dropped"]["n_days"] == 1
    _record("archive-day-30-percent-missing", "right answer, warned",
            "day dropped, named with its share")


# =========================================================================== files

def _never_blocks(call, seconds=60):
    """Run ``call`` in a daemon thread; it must finish (here: refuse) within ``seconds``."""
    outcome = {}

    def run():
        try:
            call()
        except BaseException as error:  # noqa: BLE001 - handed back to the test
            outcome["error"] = error
    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    thread.join(seconds)
    assert not thread.is_alive(), "the reader blocked"
    return outcome.get("error")


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no named pipes on this system")
def test_a_fifo_or_a_device_is_refused_without_blocking(tmp_path):
    """A named pipe given as an archive or a target would block a reader for ever: it is
    refused from os.stat, before any open, naming the file."""
    fifo = tmp_path / "pipe.nc"
    os.mkfifo(fifo)
    for case, call in (("archive-fifo", lambda: open_archive(fifo)),
                       ("target-fifo", lambda: open_target(fifo))):
        error = _never_blocks(call)
        assert isinstance(error, AnalogsInputError), error
        assert "pipe.nc: is a named pipe (FIFO), not a regular file" in str(error)
        _record(case, "refused", str(error).split("/")[-1])
    if os.path.exists("/dev/null"):
        error = _never_blocks(lambda: open_archive("/dev/null"))
        assert isinstance(error, AnalogsInputError) and "a character device" in str(error)
        _record("archive-character-device", "refused", str(error))


def test_zarr_needs_the_version_xarray_reads(tmp_path, monkeypatch):
    """The 'zarr' extra asks for what the installed xarray's own requirement asks for
    (its package metadata), and a zarr 2 in the environment is refused clearly."""
    from importlib import metadata

    from packaging.requirements import Requirement
    wanted = [Requirement(r) for r in metadata.requires("xarray") or ()
              if Requirement(r).name == "zarr"]
    if not wanted:
        pytest.skip("the installed xarray states no zarr requirement")
    text = (Path(__file__).parent.parent / "pyproject.toml").read_text()
    extra = next(line for line in text.splitlines() if line.startswith("zarr = "))
    ours = Requirement(json.loads(extra.split("=", 1)[1].strip())[0])
    floor = min(s.version for s in wanted[0].specifier if s.operator == ">=")
    assert ours.specifier.contains("2.18.7") is False and ours.specifier.contains(floor)
    monkeypatch.setitem(sys.modules, "zarr", types.SimpleNamespace(__version__="2.18.7"))
    (tmp_path / "old.zarr").mkdir()
    _refused("archive-zarr-2-installed", lambda: open_archive(tmp_path / "old.zarr"), "old.zarr",
             "needs zarr 3", "zarr 2.18.7 is installed")


# =========================================================================== CLI cases

@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    return rh.shared_store(rh.session_root(tmp_path_factory))


def _run(argv, capsys):
    try:
        code = main(list(map(str, argv)))
    except SystemExit as stop:
        code = stop.code
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines()
             if line.strip() and not line.startswith("analogs: warning:")]
    return code, lines, captured.err


def _one_error_line(case, argv, capsys, *words):
    code, lines, stderr = _run(argv, capsys)
    assert "Traceback" not in stderr
    assert code == 2 and len(lines) == 1, stderr
    for word in words:
        assert word in lines[0], (word, lines[0])
    _record(case, "refused", lines[0].split(": error: ", 1)[-1].split("/")[-1])
    return lines[0]


def _digests(folder):
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def _damaged_copy(source, target):
    """A NetCDF-4 copy of ``source`` with its data in zlib chunks, then bytes of one chunk
    in the middle of the file inverted: the header opens, reading that chunk fails."""
    with xr.open_dataset(source) as ds:
        name = next(iter(ds.data_vars))
        ds.load().to_netcdf(target, encoding={name: {"zlib": True, "chunksizes": (
            64,) + ds[name].shape[1:]}})
    data = bytearray(Path(target).read_bytes())
    middle = len(data) // 2
    data[middle:middle + 256] = bytes(b ^ 0xFF for b in data[middle:middle + 256])
    Path(target).write_bytes(bytes(data))
    return target


def test_damaged_chunk_in_a_netcdf4_file_exits_2_naming_it(shared, tmp_path, capsys):
    """A NetCDF-4 file whose header reads but one compressed chunk is corrupt: netCDF4
    raises "NetCDF: HDF error" only when the data are computed; the build names the
    file, exit 2, with or without chunks."""
    damaged = _damaged_copy(shared["files"][0], tmp_path / "damaged_zg.nc")
    with xr.open_dataset(damaged) as ds:  # the premise: it opens
        assert "zg" in ds
    for case, extra in (("archive-damaged-chunk", ()),
                        ("archive-damaged-chunk-chunked", ("--chunk-days", "100"))):
        _one_error_line(case, ["build", "--store", tmp_path / f"s{len(extra)}", "--quiet",
                               *extra, damaged, shared["files"][1]], capsys,
                        "damaged_zg.nc", "cannot be read", "damaged")


def test_file_changing_during_a_chunked_read_exits_2_naming_it(shared, tmp_path, capsys,
                                                                monkeypatch):
    """A file rewritten (cut to half) after it was opened, while the build reads it in
    chunks (here: just before the climatology pass), ends in exit 2 naming the file as
    changed during the read, not in a traceback."""
    from analogs.stages import daily_climatology
    moving = tmp_path / "moving_zg.nc"
    shutil.copy(shared["files"][0], moving)
    original_fit = daily_climatology.HarmonicClimatology.fit

    def fit_after_a_change(self, archive, *args, **kwargs):
        data = moving.read_bytes()
        with open(moving, "r+b") as handle:  # cut in place, as a writer still at work
            handle.truncate(len(data) // 2)
        return original_fit(self, archive, *args, **kwargs)

    monkeypatch.setattr(daily_climatology.HarmonicClimatology, "fit", fit_after_a_change)
    _one_error_line("archive-file-changed-during-chunked-read",
                    ["build", "--store", tmp_path / "s", "--quiet", "--chunk-days", "100",
                     moving, shared["files"][1]], capsys,
                    "moving_zg.nc", "changed while it was being read")


@pytest.mark.parametrize("address", ["tcp://host:notaport", "tcp://host:70000", "local:",
                                     "http://scheduler:8786/path", "two words", ""])
def test_malformed_scheduler_is_refused(shared, tmp_path, capsys, address):
    line = _one_error_line(f"build-scheduler-{address or 'empty'}",
                           ["build", "--store", tmp_path / "s", "--quiet", "--chunk-days", "100",
                            "--scheduler", address, *shared["files"]], capsys,
                           "--scheduler must be 'local' or the address of a dask scheduler")
    assert repr(address) in line


def test_local_cluster_listens_on_loopback_only():
    """``--scheduler local``: the scheduler, its dashboard (HTTP server) and the workers
    listen on 127.0.0.1 only (the listening sockets of this process and its worker
    processes, as the operating system lists them through psutil); before, the dashboard
    listened on every interface."""
    pytest.importorskip("distributed")
    psutil = pytest.importorskip("psutil")
    from distributed import get_client

    from analogs.workflows.build import _dask_scheduler
    with _dask_scheduler("local"):
        client = get_client()
        cluster = client.cluster
        assert cluster.scheduler.services["dashboard"].address == "127.0.0.1"
        assert cluster.scheduler.address.startswith("tcp://127.0.0.1:")
        workers = client.scheduler_info()["workers"]
        assert workers and all(a.startswith("tcp://127.0.0.1:") for a in workers)
        me = psutil.Process()
        listening = [c.laddr for p in [me, *me.children(recursive=True)]
                     for c in p.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
    assert listening and all(address.ip == "127.0.0.1" for address in listening), listening
    _record("build-scheduler-local-sockets", "right answer",
            f"{len(listening)} listening sockets (dashboard included), all on 127.0.0.1")


@pytest.mark.parametrize("case,error,words", [
    ("build-disk-full", OSError(errno.ENOSPC, "No space left on device"), ("no space left",)),
    ("build-read-only-file-system", OSError(errno.EROFS, "Read-only file system"),
     ("read-only",)),
    ("build-permission-denied", PermissionError(errno.EACCES, "Permission denied"),
     ("permission denied",)),
])
def test_full_or_read_only_disk_leaves_the_old_store(shared, tmp_path, capsys, monkeypatch,
                                                     case, error, words):
    """A rebuild over an existing store that cannot write (the write of its basis file
    raises, as on a full disk or a read-only folder; simulated, since tests run as root)
    ends in exit 2 with one line, and the old store is exactly as it was, with no
    staging folder left beside it."""
    from analogs.workflows import files as files_module
    store = rh.copy_store(shared["store"], tmp_path / "store")
    before = _digests(store)

    def failing(ds, path, *args, **kwargs):
        error.filename = str(path)
        raise error

    monkeypatch.setattr(files_module, "write_netcdf", failing)
    _one_error_line(case, ["build", "--store", store, "--quiet", *shared["files"]], capsys,
                    "store", *words, "left as it was")
    assert _digests(store) == before
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".lock")) == [
        "store"]


# =========================================================================== the table

def test_hygiene_table():
    """Print case -> outcome for the closing note (run the module with -s)."""
    if not OUTCOMES:
        pytest.skip("no case ran in this session (run the whole module)")
    width = max(len(k) for k in OUTCOMES)
    counts = pd.Series([v[0] for v in OUTCOMES.values()]).value_counts().to_dict()
    print(f"\n{len(OUTCOMES)} input-hygiene cases tried: {counts}")
    for name, (outcome, seen) in OUTCOMES.items():
        print(f"{name:<{width}}  {outcome:<22}  {seen}")


def test_reading_units_leaves_pints_application_registry_alone():
    """cf_xarray.units sets its registry as pint's application registry when imported; the
    readers put the previous one back, so MetPy (reference library) keeps working after a
    file is opened. Reference: MetPy's dewpoint_from_specific_humidity on plain quantities."""
    import pint
    from metpy.calc import dewpoint_from_specific_humidity
    from metpy.units import units

    from analogs.stages.sources import _unit_registry
    before = pint.get_application_registry().get()
    assert _unit_registry()("gpm") == _unit_registry()("m")
    assert pint.get_application_registry().get() is before
    dewpoint = dewpoint_from_specific_humidity(850 * units.hPa, 0.01 * units("kg/kg"))
    assert 11.0 < dewpoint.to("degC").magnitude < 12.0
