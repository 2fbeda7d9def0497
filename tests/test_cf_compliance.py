"""Every NetCDF file the tool writes passes the IOOS compliance checker's CF-1.8 test with
no errors (warnings may remain), as REFERENCES.md asks. The checker is an outside
reference: it ships the CF standard-name table and checks offline. It needs Debian's
libudunits2-0; .ci/run installs both, and elsewhere these tests skip with the reason."""

import json
import shutil
import subprocess

import pandas as pd
import pytest

from analogs.cli import main

CHECKER = shutil.which("cchecker.py") or shutil.which("compliance-checker")
pytestmark = pytest.mark.skipif(
    CHECKER is None, reason="IOOS compliance-checker not installed "
                            "(pip install compliance-checker; needs libudunits2-0)")


def cf_errors(path, tmp_path):
    """High-priority (error) failures of the CF-1.8 check of one file."""
    report = tmp_path / f"{path.name}.json"
    subprocess.run([CHECKER, "--test", "cf:1.8", "--format", "json", "-o", str(report),
                    str(path)], capture_output=True, text=True, check=False)
    results = json.loads(report.read_text())["cf:1.8"]
    return [(item["name"], item["msgs"]) for item in results["high_priorities"]
            if item["value"][0] < item["value"][1]]


def test_demo_archive_files(demo_files, tmp_path):
    for path in (demo_files[0], demo_files[-1]):
        assert cf_errors(path, tmp_path) == [], path.name


def test_store_files(demo_store, tmp_path):
    for name in ("basis.nc", "scores.nc"):
        assert cf_errors(demo_store.path / name, tmp_path) == [], name


def test_maps_composites_and_forecast_file(demo_store, demo_files, tmp_path, capsys):
    from analogs.workflows.demo import write_forecast_like_field
    from analogs.workflows.briefing import store_regime_composites
    from analogs.workflows.files import write_netcdf
    from analogs.stages.sources import open_archive
    maps = tmp_path / "maps.nc"
    assert main(["find", "--store", str(demo_store.path), "--date",
                 str(demo_store.days[180].date()), "--maps", str(maps), "--json"]) == 0
    composites = tmp_path / "composites.nc"
    write_netcdf(store_regime_composites(demo_store), composites)
    forecast = write_forecast_like_field(open_archive(demo_files, progress=False),
                                         pd.Timestamp(demo_store.times[100]), tmp_path / "fc.nc")
    for path in (maps, composites, forecast):
        assert cf_errors(path, tmp_path) == [], path.name
