"""The land-sea mask: recognised in the archive or a given file, regridded as fields are,
kept in the store only to draw maps, and bad mask input refused with exit status 2.

References: scipy's RegularGridInterpolator for the bilinear regridding; the CF standard
name table (land_binary_mask, land_area_fraction); the masks themselves are made here
from a simple analytic coastline (no real geography is installed: cartopy and its
Natural Earth files are not available offline here)."""

import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from scipy.interpolate import RegularGridInterpolator

from analogs.errors import AnalogsInputError
from analogs.stages.landmask import canonical_land_mask, find_land_mask, land_on_grid
from tests._reliability_helpers import LAT, LON, archive_times, write_archive

ONE_YEAR = archive_times(years=(2001,))


def coastline_fraction(lat, lon):
    """Land fraction of an analytic coastline: land west of a coast that bends east
    going north (lon = -95 + 0.4 (lat - 35)), smooth over about 2 degrees."""
    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    coast = -95.0 + 0.4 * (lat2d - 35.0)
    return 1.0 / (1.0 + np.exp((lon2d - coast) / 1.0))


def test_mask_found_by_standard_name_or_short_name():
    data = np.zeros((2, 2))
    by_standard = xr.Dataset({"weird": (("lat", "lon"), data,
                                        {"standard_name": "land_area_fraction"})})
    by_name = xr.Dataset({"LANDMASK": (("lat", "lon"), data)})
    neither = xr.Dataset({"zg": (("lat", "lon"), data)})
    assert find_land_mask(by_standard) == "weird"
    assert find_land_mask(by_name) == "LANDMASK"
    assert find_land_mask(neither) is None


def test_fine_mask_in_percent_on_another_convention_is_regridded_like_scipy():
    """A 0.5-degree land fraction in percent, latitudes descending and longitudes in
    0..360 with a time step, is brought to the 2.5-degree store grid exactly as scipy's
    bilinear interpolation of the same values does."""
    fine_lat = np.arange(60.0, 14.9, -0.5)                       # descending
    fine_lon = np.arange(225.0, 305.01, 0.5)                     # 0..360 convention
    fraction = coastline_fraction(fine_lat, fine_lon - 360.0)
    da = xr.DataArray(100.0 * fraction[None], dims=("time", "latitude", "longitude"),
                      coords={"time": [np.datetime64("2001-01-01")],
                              "latitude": ("latitude", fine_lat, {"units": "degrees_north"}),
                              "longitude": ("longitude", fine_lon, {"units": "degrees_east"})},
                      attrs={"standard_name": "land_area_fraction", "units": "%"})
    mask = canonical_land_mask(da, "fine.nc")
    assert mask.dims == ("lat", "lon") and np.all(np.diff(mask["lat"].values) > 0)
    assert mask["lon"].values.min() == pytest.approx(-135.0)
    on_grid = land_on_grid(mask, LAT, LON, "fine.nc")
    reference = RegularGridInterpolator((fine_lat[::-1], fine_lon - 360.0), fraction[::-1])
    lat2d, lon2d = np.meshgrid(LAT, LON, indexing="ij")
    expected = reference(np.c_[lat2d.ravel(), lon2d.ravel()]).reshape(lat2d.shape)
    np.testing.assert_allclose(on_grid.values, expected, atol=1e-9)


@pytest.mark.parametrize("values, units, message", [
    (np.full((3, 3), 100.0), "1", "ranges from 100 to 100"),
    (np.full((3, 3), -0.5), "", "ranges from -0.5"),
    (np.full((3, 3), np.nan), "1", "no finite value"),
])
def test_bad_mask_values_are_refused(values, units, message):
    da = xr.DataArray(values, dims=("lat", "lon"),
                      coords={"lat": [30.0, 31.0, 32.0], "lon": [-100.0, -99.0, -98.0]},
                      attrs={"standard_name": "land_binary_mask", "units": units})
    with pytest.raises(AnalogsInputError, match=message):
        canonical_land_mask(da, "mask.nc")


def test_mask_that_does_not_cover_the_grid_is_refused():
    small = xr.DataArray(np.ones((3, 3)), dims=("lat", "lon"),
                         coords={"lat": [30.0, 31.0, 32.0], "lon": [-100.0, -99.0, -98.0]})
    with pytest.raises(AnalogsInputError, match="must cover the archive's grid"):
        land_on_grid(canonical_land_mask(small, "small.nc"), LAT, LON, "small.nc")


@pytest.fixture(scope="module")
def archives(tmp_path_factory):
    """One year of the small synthetic archive twice: plain, and with a land-sea mask
    (``lsm``, CF land_binary_mask, with the file's time dimension as merged reanalysis
    files carry it) inside the height file."""
    root = tmp_path_factory.mktemp("landmask")
    plain = write_archive(root / "plain", times=ONE_YEAR)
    with_mask = write_archive(root / "masked", times=ONE_YEAR)
    binary = (coastline_fraction(LAT, LON) >= 0.5).astype("float32")
    zg = xr.load_dataset(with_mask[0])
    zg["lsm"] = (("time", "lat", "lon"), np.broadcast_to(binary, (len(ONE_YEAR),) + binary.shape),
                 {"standard_name": "land_binary_mask", "units": "1"})
    zg.to_netcdf(with_mask[0])
    return root, plain, with_mask, binary


def test_mask_inside_the_archive_is_kept_and_never_a_predictor(archives):
    """The store keeps the mask on its grid (values unchanged on the same grid) and lists
    it in the manifest; the fields, EOFs and principal components are exactly those of
    the same archive without a mask."""
    from analogs.api import AnalogStore, build_store
    root, plain, with_mask, binary = archives
    masked = build_store(with_mask, root / "store_masked", progress=False)
    reference = build_store(plain, root / "store_plain", progress=False)
    assert masked.fields == reference.fields == ["z500", "q850"]
    np.testing.assert_array_equal(masked.pcs.values, reference.pcs.values)
    entry = masked.manifest["land_mask"]
    assert entry["variable"] == "lsm" and entry["origin"] == "archive file"
    assert entry["standard_name"] == "land_binary_mask"
    assert entry["land_share"] == pytest.approx(float(binary.mean()), abs=1e-4)
    reloaded = AnalogStore.load(root / "store_masked")
    np.testing.assert_array_equal(reloaded.land.values, binary)
    assert reference.land is None and reference.manifest["land_mask"] is None


def run_build(args):
    return subprocess.run([sys.executable, "-m", "analogs", "build", *map(str, args), "--quiet"],
                          capture_output=True, text=True)


def write_mask(path, values, lat=LAT, lon=LON, name="lsm", standard_name="land_binary_mask"):
    attrs = {"standard_name": standard_name} if standard_name else {}
    xr.Dataset({name: (("lat", "lon"), values, attrs)},
               coords={"lat": lat, "lon": lon}).to_netcdf(path)
    return path


@pytest.mark.parametrize("case", ["range", "no_variable", "grid"])
def test_bad_mask_file_exits_2_and_writes_no_store(archives, tmp_path, case):
    _, plain, _, binary = archives
    if case == "range":
        mask = write_mask(tmp_path / "mask.nc", 100.0 * binary)
        expected = "ranges from 0 to 100"
    elif case == "no_variable":
        mask = write_mask(tmp_path / "mask.nc", binary, name="orography", standard_name=None)
        expected = "no land-sea mask variable"
    else:
        mask = write_mask(tmp_path / "mask.nc", binary[:5, :5], lat=LAT[:5], lon=LON[:5])
        expected = "must cover the archive's grid"
    out = run_build([*plain, "--store", tmp_path / "store", "--land-mask", mask])
    assert out.returncode == 2, out.stderr
    assert expected in out.stderr and str(mask) in out.stderr
    assert "Traceback" not in out.stderr and len(out.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "store").exists()


def test_given_mask_file_is_kept_with_its_source(archives, tmp_path):
    from analogs.api import AnalogStore
    _, plain, _, binary = archives
    mask = write_mask(tmp_path / "lsm.nc", binary, name="LANDMASK", standard_name=None)
    out = run_build([*plain, "--store", tmp_path / "store", "--land-mask", mask])
    assert out.returncode == 0, out.stderr
    store = AnalogStore.load(tmp_path / "store")
    assert store.manifest["land_mask"]["path"] == str(mask.resolve())
    assert store.manifest["land_mask"]["variable"] == "LANDMASK"
    np.testing.assert_array_equal(store.land.values, binary)


def _header_by_xarray(path):
    """A file's variables as xarray reads them undecoded (names, dims, dtypes, attributes;
    the time coordinate's units and calendar left out, as each year's file has its own)."""
    with xr.open_dataset(path, decode_cf=False) as ds:
        return {name: (v.dims, str(v.dtype), {k: str(a) for k, a in v.attrs.items()
                                              if name != "time" or k not in ("units", "calendar")})
                for name, v in ds.variables.items()}


def test_archive_screen_reuses_an_identical_headers_look(tmp_path, monkeypatch):
    """Three years in yearly files, a mask in the last year's height file: open_archive
    names each later file whose header is an earlier one's (checked against xarray's
    undecoded reading of both), and the archive's mask search given that answers as
    without it while opening only the other files for its screen."""
    import analogs.stages.landmask as landmask
    from analogs.stages.sources import open_archive
    years = (2001, 2002, 2003)
    files = [p for year in years for p in write_archive(tmp_path / str(year),
                                                        times=archive_times(years=(year,)))]
    binary = (coastline_fraction(LAT, LON) >= 0.5).astype("float32")
    last_height = xr.load_dataset(files[-2])
    last_height["lsm"] = (("lat", "lon"), binary, {"standard_name": "land_binary_mask"})
    last_height.to_netcdf(files[-2])
    same_header = {}
    open_archive(files, same_header=same_header)
    assert set(same_header) == {str(p) for p in files[2:] if p != files[-2]}
    for later, earlier in same_header.items():
        assert _header_by_xarray(later) == _header_by_xarray(earlier)
    assert _header_by_xarray(files[-2]) != _header_by_xarray(files[0])

    screened = []
    screen = landmask._may_hold_mask
    monkeypatch.setattr(landmask, "_may_hold_mask",
                        lambda path: screened.append(path) or screen(path))
    plain_values, plain_source = landmask.land_mask_in_archive(files)
    assert screened == [str(p) for p in files[:-1]]
    screened.clear()
    values, source = landmask.land_mask_in_archive(files, same_header)
    assert screened == [str(files[0]), str(files[1]), str(files[-2])]
    assert source == plain_source and source["path"] == str(files[-2])
    np.testing.assert_array_equal(values.values, plain_values.values)
    np.testing.assert_array_equal(values.values, binary)
