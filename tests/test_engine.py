"""The analog engine end to end on the synthetic archive: planted analogs, other grids,
the JSON contract of DESIGN.md, and clear refusals of bad input."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.api import AnalogStore, build_store
from analogs.cli import main
from analogs.constants import G0
from analogs.workflows.demo import write_forecast_like_field
from analogs.stages.sources import open_archive


def _write_demo_convention(archive: xr.Dataset, directory):
    """Write a canonical archive back to per-field files in the demo's CF convention."""
    directory.mkdir(parents=True, exist_ok=True)
    specs = {"z500": ("zg", 50000.0, "geopotential_height", "m"),
             "q850": ("hus", 85000.0, "specific_humidity", "kg kg-1")}
    paths = []
    for field, (name, plev, standard_name, units) in specs.items():
        values = archive[field].values[:, None].astype("float32")
        ds = xr.Dataset({name: (("time", "plev", "lat", "lon"), values,
                                {"standard_name": standard_name, "units": units})},
                        coords={"time": archive["time"].values,
                                "plev": ("plev", [plev], {"units": "Pa", "standard_name": "air_pressure"}),
                                "lat": ("lat", archive["lat"].values, {"units": "degrees_north"}),
                                "lon": ("lon", archive["lon"].values, {"units": "degrees_east"})})
        path = directory / f"{name}.nc"
        ds.to_netcdf(path)
        paths.append(path)
    return paths


def test_planted_near_copy_is_the_first_analog(demo_files, tmp_path):
    """A day replaced by a near copy (0.5 % noise) of a day from another year in the same
    season must come back as that day's first analog (the defining property of an analog
    search; common practice, no source)."""
    archive = open_archive(demo_files, progress=False).load()
    times = pd.DatetimeIndex(archive["time"].values)
    source = int(np.flatnonzero(times.normalize() == pd.Timestamp(f"{times[0].year}-07-10"))[0])
    planted = int(np.flatnonzero(times.normalize() == pd.Timestamp(f"{times[0].year + 2}-07-16"))[0])
    rng = np.random.default_rng(0)
    for field in archive.data_vars:
        original = archive[field].values[source]
        noise = rng.normal(scale=0.005 * original.std(), size=original.shape)
        archive[field].values[planted] = original + noise
    store = build_store(_write_demo_convention(archive, tmp_path / "files"), tmp_path / "store",
                        progress=False)
    result = store.find(date=str(times[planted].date()), top=5)
    assert result.analogs["date"].iloc[0] == str(times[source].date())
    assert result.analogs["distance"].iloc[0] < 0.2 * result.analogs["distance"].iloc[1]


def test_field_on_another_grid_gives_the_same_analogs(demo_store, demo_files, tmp_path):
    """An archive day written at 0.5 degree, longitude 0-360, latitude descending, as
    geopotential in m2 s-2 (g0 = 9.80665, CGPM 1901) finds the same top analogs as the same
    day's stored projection on the store grid."""
    archive = open_archive(demo_files, progress=False)
    day = pd.Timestamp(demo_store.times[400])
    path = write_forecast_like_field(archive, day, tmp_path / "forecast.nc")
    with xr.open_dataset(path) as raw:
        assert raw["latitude"].values[0] > raw["latitude"].values[-1]
        assert raw["longitude"].values.min() >= 0
        z_gpm = float(raw["z"].sel(pressure_level=500).isel(valid_time=0).mean()) / G0
    assert abs(z_gpm - float(archive["z500"].sel(time=day).mean())) < 5.0
    from_field = demo_store.find(field=path, time=day.isoformat(), top=10, exclude=10)
    from_date = demo_store.find(date=str(day.date()), top=10, exclude=10)
    assert from_field.analogs["date"].tolist()[:5] == from_date.analogs["date"].tolist()[:5]
    overlap = set(from_field.analogs["date"]) & set(from_date.analogs["date"])
    assert len(overlap) >= 8


def test_find_json_contract(demo_store, capsys):
    """`analogs find --json` prints the object of DESIGN.md's CLI contract."""
    day = str(demo_store.days[500].date())
    assert main(["find", "--store", str(demo_store.path), "--date", day, "--top", "7", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["target"]["date"] == day
    assert isinstance(data["target"]["regime"], str)
    assert 0.0 <= data["target"]["regime_confidence"] <= 1.0
    assert [a["rank"] for a in data["analogs"]] == list(range(1, 8))
    distances = [a["distance"] for a in data["analogs"]]
    assert distances == sorted(distances)
    for analog in data["analogs"]:
        assert set(analog["events"]) >= {"total", "by_kind"}
        assert analog["events"]["total"] == sum(analog["events"]["by_kind"].values())
        gap = abs((pd.Timestamp(analog["date"]) - pd.Timestamp(day)).days)
        assert gap > 10  # the default exclusion window of a --date target
    outcomes = data["outcomes"]
    assert outcomes["n_analogs"] == 7
    lo, hi = outcomes["p_any_event_ci"]
    assert lo <= outcomes["p_any_event"] <= hi
    p_any = np.mean([a["events"]["total"] > 0 for a in data["analogs"]])
    assert outcomes["p_any_event"] == pytest.approx(p_any)
    assert 0.0 <= outcomes["climatology_p_any_event"] <= 1.0
    assert set(outcomes["by_kind"]) <= {"tornado", "hail", "wind"}


def test_store_reloads_identically(demo_store):
    again = AnalogStore.load(demo_store.path)
    day = str(demo_store.days[300].date())
    a = demo_store.find(date=day).to_dict()
    b = again.find(date=day).to_dict()
    assert a["analogs"] == b["analogs"] and a["outcomes"] == b["outcomes"]


def _run(argv, capsys):
    status = main(argv)
    captured = capsys.readouterr()
    return status, captured.err


def test_bad_inputs_exit_2_with_one_line(demo_store, demo_files, demo_dir, tmp_path, capsys):
    store = str(demo_store.path)
    # A file without the needed variable.
    other = tmp_path / "temperature.nc"
    xr.Dataset({"ta": (("time", "lat", "lon"), np.zeros((3, 4, 5)), {"units": "K"})},
               coords={"time": pd.date_range("2001-01-01", periods=3), "lat": np.arange(4.0),
                       "lon": np.arange(5.0)}).to_netcdf(other)
    status, err = _run(["build", "--store", str(tmp_path / "s1"), str(other)], capsys)
    assert status == 2 and "temperature.nc" in err and len(err.strip().splitlines()) == 1
    # Unknown units on the height field.
    weird = tmp_path / "weird_units.nc"
    height_file = next(f for f in demo_files if f.name.startswith("zg"))
    with xr.open_dataset(height_file) as ds:
        ds = ds.load()
    name = next(iter(ds.data_vars))
    # Unknown units with a magnitude that fits no known unit (neither gpm, dam nor
    # m2 s-2): DESIGN.md says stop with an error naming the variable.
    ds[name] = ds[name] * 3.0
    ds[name].attrs.update(units="furlongs", standard_name="geopotential_height")
    ds.to_netcdf(weird)
    status, err = _run(["build", "--store", str(tmp_path / "s2"), str(weird)], capsys)
    assert status == 2 and "furlongs" in err
    # A field that does not cover the domain.
    small = tmp_path / "small.nc"
    archive = open_archive(demo_files, progress=False)
    day = archive.isel(time=10, lat=slice(0, 10), lon=slice(0, 10))
    write_forecast_like_field(day.expand_dims("time") if "time" not in day.dims else day,
                              pd.Timestamp(day["time"].values), small)
    status, err = _run(["find", "--store", store, "--field", str(small)], capsys)
    assert status == 2 and "small.nc" in err and "cover" in err
    # A date outside the archive.
    status, err = _run(["find", "--store", store, "--date", "1850-01-01"], capsys)
    assert status == 2 and "outside the archive" in err
    # An events file with bad rows.
    bad_events = tmp_path / "bad_events.csv"
    bad_events.write_text("time,lat,lon,kind\n2001-05-01T18:00Z,35,-95,hail\nnot-a-time,35,-95,hail\n")
    status, err = _run(["build", "--store", str(tmp_path / "s3"), "--events", str(bad_events),
                        *map(str, demo_files)], capsys)
    assert status == 2 and "bad_events.csv" in err
    assert not (tmp_path / "s3").exists()


def test_console_script_exit_status_without_traceback(tmp_path):
    """The installed command itself: exit 2, one line, no traceback."""
    completed = subprocess.run([sys.executable, "-m", "analogs.cli", "find", "--store",
                                str(tmp_path / "missing"), "--date", "2001-01-01"],
                               capture_output=True, text=True)
    assert completed.returncode == 2
    assert "Traceback" not in completed.stderr
    assert "does not exist" in completed.stderr


def test_find_result_is_labelled(demo_store):
    """`find` returns labelled objects (the README's `result.analogs` and `result.outcomes`):
    a DataFrame of analogs, outcome statistics as floats (NaN, never None) and tables, and
    `to_dict()` equal to what `analogs find --json` prints."""
    from analogs.results import FindResult, OutcomeSummary
    day = str(demo_store.days[520].date())
    result = demo_store.find(date=day, top=9, weights="gaussian")
    assert isinstance(result, FindResult) and isinstance(result.outcomes, OutcomeSummary)
    analogs = result.analogs
    assert list(analogs.columns[:6]) == ["rank", "date", "distance", "regime",
                                         "regime_confidence", "events_total"]
    kind_columns = [f"events_{kind}" for kind in result.kinds]
    assert result.kinds == ["hail", "tornado", "wind"]
    assert (analogs[kind_columns].sum(axis=1) == analogs["events_total"]).all()
    outcomes = result.outcomes
    assert outcomes.p_any_event == pytest.approx(np.mean(analogs["events_total"] > 0))
    assert outcomes["p_any_event"] == outcomes.p_any_event  # item access, as the earlier dict
    assert list(outcomes.by_kind.index) == result.kinds
    assert outcomes.weighted is not None and outcomes.weighted.n_effective <= 9
    assert result.region is not None and result.target_fields is None
    data = result.to_dict()
    assert data["analogs"][0]["events"]["by_kind"] == {
        kind: int(analogs[f"events_{kind}"].iloc[0]) for kind in result.kinds}
    assert json.dumps(data, allow_nan=False)


def assert_archive_opens(opened, by_xarray, archive_files):
    """Archive files a report read: none the full way (``opened``, by open_target: the
    guess of a field a file does not hold is refused by its layout), and only the first
    file of each kind of the demo archive (zg500_*, hus850_*) opened by xarray
    (``by_xarray``), once, for its layout."""
    assert not set(opened) & archive_files
    first = [path for path, n in by_xarray.items() if path in archive_files]
    assert sorted(Path(path).name.split("_")[0] for path in first) == ["hus850", "zg500"]
    assert all(by_xarray[path] == 1 for path in first)


def test_field_report_opens_and_regrids_its_target_once(demo_store, demo_files, tmp_path,
                                                        monkeypatch, capsys):
    """One `find --field F --report D` opens F once, regrids it once, evaluates the daily
    climatology once (the target's anomaly) and, the archive being at hand, draws the
    analog days from the archive files: none read the full way, only the first file of
    each kind opened by xarray (once, for its layout, which also refuses the guess of
    a field the file does not hold), the days taken at
    the store's grid points (the demo store's points are archive points: no
    regridding), no EOF reconstruction (it was 2 opens, 3 regrids, 8 climatology
    evaluations and 7 reconstructions before the find workflow kept its arrays). A date
    target needs no field file: its day and the analog days come from the archive in
    one batch."""
    from collections import Counter

    import analogs.stages.sources as sources
    from analogs.stages.daily_climatology import HarmonicClimatology
    from analogs.stages.eof import MultivariateEOF
    from analogs import _forked as forked

    archive = open_archive(demo_files, progress=False)
    field = write_forecast_like_field(archive, demo_store.times[540], tmp_path / "field.nc")
    calls = Counter()

    def counting(owner, name):
        original = getattr(owner, name)

        def counted(*args, **kwargs):
            calls[name] += 1
            return original(*args, **kwargs)
        monkeypatch.setattr(owner, name, counted)

    def counting_paths(name):
        """The paths each call of sources' ``name`` is handed, counted."""
        paths, original = Counter(), getattr(sources, name)

        def counted(path, *args, **kwargs):
            paths[str(path)] += 1
            return original(path, *args, **kwargs)
        monkeypatch.setattr(sources, name, counted)
        return paths

    opened = counting_paths("open_target")
    by_xarray = counting_paths("_open_file")
    # Every archive file read in this process, where the openings are counted (a report
    # reads half of them in a forked child otherwise).
    monkeypatch.setattr(forked, "can_fork", lambda: False)
    counting(sources, "regrid_to")
    # climatology evaluations: predict, and transform (its block-wise subtraction of
    # every field; it calls predict only for the monthly method, not on the demo)
    counting(HarmonicClimatology, "predict")
    counting(HarmonicClimatology, "transform")
    counting(MultivariateEOF, "reconstruct")
    store = str(demo_store.path)
    assert main(["find", "--store", store, "--field", str(field),
                 "--report", str(tmp_path / "field_report")]) == 0
    assert (tmp_path / "field_report" / "index.html").is_file()
    archive_files = {str(path.resolve()) for path in demo_files}
    assert opened[str(field)] == 1
    assert set(opened) == {str(field)}
    assert_archive_opens(opened, by_xarray, archive_files)
    assert calls["regrid_to"] == 1   # the target only: the analog days are archive points
    assert calls["predict"] + calls["transform"] == 1 and calls["reconstruct"] == 0
    calls.clear()
    opened.clear()
    by_xarray.clear()
    day = str(demo_store.days[540].date())
    assert main(["find", "--store", store, "--date", day,
                 "--report", str(tmp_path / "date_report")]) == 0
    assert calls == Counter()
    assert_archive_opens(opened, by_xarray, archive_files)
    capsys.readouterr()


def test_report_figures_take_the_querys_arrays(demo_store, demo_files, tmp_path):
    """The report draws the target's regridded fields kept in the result, and the mean of
    the analog days equals the climatology of those days plus the reconstruction of
    their mean PCs (the EOF reconstruction is affine in the PCs)."""
    from analogs.stages.sources import open_target, regrid_to
    from analogs.workflows.find import day_fields, report_figures
    archive = open_archive(demo_files, progress=False)
    field = write_forecast_like_field(archive, demo_store.times[200], tmp_path / "field.nc")
    result = demo_store.find(field=field, top=5)
    lat, lon = demo_store.grid
    expected = regrid_to(open_target(field)[demo_store.fields], lat, lon)
    xr.testing.assert_allclose(result.target_fields, expected)
    rows = result.analogs["row"].to_numpy()
    fields = day_fields(demo_store, rows)
    assert fields["z500"].dims == ("analog", "lat", "lon") and fields["z500"].attrs["units"]
    climate = demo_store.climatology.predict(demo_store.times[rows])["z500"].mean("time")
    anomaly = demo_store.eof.reconstruct(demo_store.pcs.isel(time=rows).mean("time"))["z500"]
    np.testing.assert_allclose(fields["z500"].mean("analog").values,
                               climate.values + anomaly.values, rtol=1e-12)
    figures = report_figures(demo_store, result)
    assert len(figures) == 4 and figures[0][0].startswith("Target")
    assert all(svg.startswith("<svg") and 'role="img"' in svg for _, svg, _ in figures)
    # Alt text describes the content: the analog grid names every analog drawn.
    grid_alt = figures[1][2]
    assert all(date in grid_alt for date in result.analogs["date"])
