"""A corpus of malformed inputs, built here by the tests (no shipped binaries), run through
the command line in process (``analogs.cli.main``).

Each bad input must end with exit status 2 and ONE line on stderr that names the problem
(DESIGN.md, "CLI contract": "2 bad input or usage (one clear message on stderr naming the
file, variable or option, no traceback)"); warnings may precede it, each on its own
``analogs: warning:`` line. Inputs that can be repaired (reversed grid, longitudes 0-360,
an isolated NaN gap, repeated and disordered times, an all-NaN day, a stray file in the
store) must give the clean input's answer. Run with ``-s`` to see the table of case ->
outcome that the closing note of issue 8 quotes.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import _reliability_helpers as rh
from analogs.cli import main
from analogs.parameters import P

#: case id -> (exit status, the stderr error line or "same answer as the clean input")
OUTCOMES: dict[str, tuple[str, str]] = {}


@dataclass
class Context:
    """What a case needs: a scratch directory and the shared clean inputs."""

    tmp: object
    store: str
    files: list
    events: str
    fields: dict = field(default_factory=dict)
    times: pd.DatetimeIndex = None

    def path(self, name):
        return str(self.tmp / name)

    def field_file(self, name, field, values, times, **kwargs):
        rh.field_dataset(field, values, times, **kwargs).to_netcdf(self.path(name))
        return self.path(name)

    def target(self, name, *, day=rh.QUERY_DATE, transform=None, **kwargs):
        """A target file holding both fields of one archive day (optionally altered)."""
        row = int(np.flatnonzero(self.times.normalize() == pd.Timestamp(day))[0])
        parts = []
        for fld in ("z500", "q850"):
            values = self.fields[fld][row:row + 1].copy()
            parts.append(rh.field_dataset(fld, values, self.times[row:row + 1], **kwargs))
        ds = _one_file(parts)
        if transform is not None:
            ds = transform(ds)
        ds.to_netcdf(self.path(name))
        return self.path(name)

    def events_with(self, name, edit):
        frame = pd.read_csv(self.events)
        edit(frame)
        frame.to_csv(self.path(name), index=False)
        return self.path(name)

    def store_copy(self, name, edit):
        target = self.path(name)
        shutil.copytree(self.store, target)
        edit(target)
        return target

    def build(self, *files, extra=()):
        return ["build", "--store", self.path("out_store"), "--quiet", *extra, *map(str, files)]

    def find(self, *extra, store=None):
        return ["find", "--store", store or self.store, *extra]

    def find_date(self, *extra, store=None):
        """A date query in the plain metric: the repaired inputs' answers are compared
        with the clean one's, a check of the repair, not of the event-weighted map (which
        each build refits, and which turns a filled value's small change of the PCs into
        a different ranking)."""
        return self.find("--date", rh.QUERY_DATE, "--json", "--metric", "plain", *extra,
                         store=store)


@dataclass(frozen=True)
class Bad:
    """A malformed input: how to make the argv, and the key words the message must hold."""

    id: str
    area: str
    make: object
    words: tuple
    xfail: str | None = None


def _one_file(parts):
    """Both fields in one Dataset, each with its own level coordinate (as CMOR-style
    files do), so neither is padded with NaN at the other's level."""
    renamed = [part.rename(plev=f"plev_{name}") for part, name in zip(parts, ("z", "q"))]
    return xr.merge(renamed, join="outer", compat="no_conflicts")


def _short(ctx, n=40):
    return ctx.times[:n], {k: v[:n] for k, v in ctx.fields.items()}


def _manifest_edit(key_path, value):
    def edit(store):
        path = os.path.join(store, "manifest.json")
        manifest = json.load(open(path))
        node = manifest
        for key in key_path[:-1]:
            node = node[key]
        node[key_path[-1]] = value
        json.dump(manifest, open(path, "w"))
    return edit


def _flip_byte(name):
    def edit(store):
        path = os.path.join(store, name)
        data = bytearray(open(path, "rb").read())
        data[len(data) // 2] ^= 0xFF
        open(path, "wb").write(bytes(data))
    return edit


def _truncated(ctx, name, fmt):
    times, fields = _short(ctx)
    ctx.field_file("whole.nc", "z500", fields["z500"], times)
    rh.field_dataset("z500", fields["z500"], times).to_netcdf(ctx.path("whole.nc"), format=fmt)
    data = open(ctx.path("whole.nc"), "rb").read()
    open(ctx.path(name), "wb").write(data[: len(data) // 2])
    return ctx.build(ctx.path(name))


def _time_values(ctx, name, values, units):
    times, fields = _short(ctx)
    ds = rh.field_dataset("z500", fields["z500"], times)
    ds["time"] = ("time", values, {"units": units})
    ds.to_netcdf(ctx.path(name))
    return ctx.build(ctx.path(name))


def _curvilinear(ctx):
    times, fields = _short(ctx)
    lat2d, lon2d = np.meshgrid(rh.LAT, rh.LON, indexing="ij")
    xr.Dataset({"zg": (("time", "y", "x"), fields["z500"].astype("float32"),
                       {"standard_name": "geopotential_height", "units": "m"})},
               coords={"time": times, "lat": (("y", "x"), lat2d, {"units": "degrees_north"}),
                       "lon": (("y", "x"), lon2d, {"units": "degrees_east"}),
                       "plev": ((), 50000.0, {"units": "Pa"})}).to_netcdf(ctx.path("curv.nc"))
    return ctx.build(ctx.path("curv.nc"))


def _height_in_feet(ctx):
    """Heights in metres labelled "ft" (13b: feet themselves are converted by pint, right
    answer in tests/test_input_hygiene.py; metres called feet give 1700 gpm: refused)."""
    times, fields = _short(ctx)
    return ctx.build(ctx.field_file("feet.nc", "z500", fields["z500"], times, units="ft"))


def _no_units(ctx):
    times, fields = _short(ctx)
    return ctx.build(ctx.field_file("nounits.nc", "z500", fields["z500"] / 0.3048, times, units=""))


def _no_latitude(ctx):
    times, fields = _short(ctx)
    ds = rh.field_dataset("z500", fields["z500"], times).drop_vars("lat").rename({"lat": "row"})
    ds.to_netcdf(ctx.path("nolat.nc"))
    return ctx.build(ctx.path("nolat.nc"))


def _no_time(ctx):
    times, fields = _short(ctx)
    rh.field_dataset("z500", fields["z500"], times).isel(time=0).drop_vars("time").to_netcdf(
        ctx.path("notime.nc"))
    return ctx.build(ctx.path("notime.nc"))


def _level_700(ctx):
    times, fields = _short(ctx)
    ds = rh.field_dataset("z500", fields["z500"], times).assign_coords(
        plev=("plev", [70000.0], {"units": "Pa"}))
    ds.to_netcdf(ctx.path("p700.nc"))
    return ctx.build(ctx.path("p700.nc"))


def _latitude_edit(name, value):
    def make(ctx):
        times, fields = _short(ctx)
        lat = rh.LAT.copy()
        lat[3] = value
        ds = rh.field_dataset("z500", fields["z500"], times).assign_coords(
            lat=("lat", lat, {"units": "degrees_north"}))
        ds.to_netcdf(ctx.path(name))
        return ctx.build(ctx.path(name))
    return make


def _no_height_variable(ctx):
    times, fields = _short(ctx)
    xr.Dataset({"t": (("time", "lat", "lon"), np.full(fields["z500"].shape, 280.0))},
               coords={"time": times, "lat": rh.LAT, "lon": rh.LON}).to_netcdf(ctx.path("t.nc"))
    return ctx.build(ctx.path("t.nc"))


def _two_grids(ctx):
    times, fields = _short(ctx)
    z = ctx.field_file("z.nc", "z500", fields["z500"], times)
    q = ctx.field_file("qcoarse.nc", "q850", fields["q850"][:, ::2, ::2], times,
                       lat=rh.LAT[::2], lon=rh.LON[::2])
    return ctx.build(z, q)


def _no_12_utc(ctx):
    times = pd.date_range("2001-01-01T03", periods=40, freq="6h")
    return ctx.build(ctx.field_file("six.nc", "z500", rh.synthetic_fields(times)["z500"], times))


def _every_value_nan(ctx):
    times, fields = _short(ctx)
    return ctx.build(ctx.field_file("allnan.nc", "z500", np.full_like(fields["z500"], np.nan), times))


def _every_day_gappy(ctx):
    times, fields = _short(ctx)
    z = fields["z500"].copy()
    for day in range(z.shape[0]):  # a different 2-row band (13 % of points) each day
        z[day, (2 * day) % 14: (2 * day) % 14 + 2] = np.nan
    return ctx.build(ctx.field_file("gappy.nc", "z500", z, times))


def _empty_directory(ctx):
    os.mkdir(ctx.path("empty_dir"))
    return ctx.build(ctx.path("empty_dir"))


def _text_file(ctx, name):
    open(ctx.path(name), "w").write("date,value\n2001-01-01,5600\n")
    return ctx.path(name)


def _two_days(ctx):
    times, fields = _short(ctx, 2)
    return ctx.build(ctx.field_file("two.nc", "z500", fields["z500"], times))


def _target_small(ctx):
    return ctx.find("--field", ctx.target("small.nc", transform=lambda ds: ds.isel(
        lat=slice(2, 6), lon=slice(2, 6))), "--json")


def _target_all_nan(ctx):
    def blank(ds):
        ds["zg"][:] = np.nan
        return ds
    return ctx.find("--field", ctx.target("nan_target.nc", transform=blank), "--json")


def _target_three_times(ctx):
    times, fields = _short(ctx, 3)
    ds = _one_file([rh.field_dataset(f, fields[f], times) for f in ("z500", "q850")])
    ds.to_netcdf(ctx.path("three.nc"))
    return ctx.path("three.nc")


BAD = [
    # --- archive files (build) ---------------------------------------------------------
    Bad("archive-not-netcdf", "NetCDF", lambda c: c.build(_text_file(c, "text.nc")),
        ("text.nc", "not a NetCDF file")),
    Bad("archive-empty-file", "NetCDF", lambda c: (open(c.path("empty.nc"), "wb").close(),
                                                  c.build(c.path("empty.nc")))[1],
        ("empty.nc", "not a NetCDF file")),
    Bad("archive-truncated-netcdf4", "NetCDF", lambda c: _truncated(c, "cut4.nc", "NETCDF4"),
        ("cut4.nc", "truncated or damaged")),
    Bad("archive-truncated-netcdf3", "NetCDF",
        lambda c: _truncated(c, "cut3.nc", "NETCDF3_64BIT"), ("cut3.nc", "truncated")),
    Bad("archive-missing-file", "NetCDF", lambda c: c.build(c.path("nothere.nc")),
        ("nothere.nc", "no such file")),
    Bad("archive-empty-directory", "NetCDF", _empty_directory,
        ("empty_dir", "holds no *.nc")),
    Bad("archive-height-in-feet", "NetCDF", _height_in_feet,
        ("feet.nc", "'zg'", "units 'ft'", "outside the plausible range")),
    Bad("archive-no-units-odd-magnitude", "NetCDF", _no_units,
        ("nounits.nc", "'zg'", "no units")),
    Bad("archive-no-latitude", "NetCDF", _no_latitude, ("nolat.nc", "no latitude coordinate")),
    Bad("archive-no-time", "NetCDF", _no_time, ("notime.nc", "no time dimension")),
    Bad("archive-no-500hpa-level", "NetCDF", _level_700, ("p700.nc", "no 500 hPa level")),
    Bad("archive-curvilinear-grid", "NetCDF", _curvilinear, ("curv.nc", "2-D", "regular")),
    Bad("archive-latitude-95", "NetCDF", _latitude_edit("lat95.nc", 95.0),
        ("lat95.nc", "latitude", "95", "[-90, 90]")),
    Bad("archive-latitude-nan", "NetCDF", _latitude_edit("latnan.nc", np.nan),
        ("latnan.nc", "latitude", "missing values")),
    Bad("archive-no-height-variable", "NetCDF", _no_height_variable,
        ("no 500 hPa height variable", "t.nc")),
    Bad("archive-fields-on-two-grids", "NetCDF", _two_grids, ("different grids",)),
    Bad("archive-no-12utc-time", "NetCDF", _no_12_utc, ("six.nc", "12 UTC")),
    Bad("archive-time-year-2500", "NetCDF",
        lambda c: _time_values(c, "y2500.nc", np.arange(40) + 220000.0, "days since 1900-01-01"),
        ("y2500.nc", "2502", "out of the range")),
    Bad("archive-time-beyond-calendar", "NetCDF",
        lambda c: _time_values(c, "y1e5.nc", np.arange(40) * 1e6 + 1e8, "days since 1900-01-01"),
        ("y1e5.nc", "cannot be decoded as dates")),
    Bad("archive-time-units-not-cf", "NetCDF",
        lambda c: _time_values(c, "furlong.nc", np.arange(40.0), "furlongs"),
        ("furlong.nc", "not decodable as dates", "furlongs")),
    Bad("archive-every-value-nan", "NetCDF", _every_value_nan,
        ("allnan.nc", "every value is missing")),
    Bad("archive-every-day-too-gappy", "NetCDF", _every_day_gappy,
        ("gappy.nc", "every day has more than 0.1")),
    Bad("archive-two-days-only", "NetCDF", _two_days, ("2 days", "at least 3")),
    # --- target fields (find --field) --------------------------------------------------
    Bad("target-not-covering-domain", "target", _target_small,
        ("small.nc", "covers lat", "needs lat")),
    Bad("target-all-nan", "target", _target_all_nan, ("z500 100.0 %", "missing", "uncovered")),
    Bad("target-several-times-no-time", "target",
        lambda c: c.find("--field", _target_three_times(c), "--json"),
        ("three.nc", "3 times", "time=")),
    Bad("target-time-not-in-file", "target",
        lambda c: c.find("--field", _target_three_times(c), "--time", "1999-01-01", "--json"),
        ("three.nc", "no time matches", "1999-01-01")),
    Bad("target-height-only", "target",
        lambda c: c.find("--field", c.target("zonly.nc", transform=lambda ds: ds[["zg"]]), "--json"),
        ("lacks q850",)),
    Bad("target-not-netcdf", "target", lambda c: c.find("--field", _text_file(c, "t.txt")),
        ("t.txt", "not a NetCDF file")),
    Bad("target-time-with-date", "target", lambda c: c.find_date("--time", "2002-06-14"),
        ("--time", "--field only")),
    # --- events tables (build --events) ------------------------------------------------
    Bad("events-latitude-95", "events",
        lambda c: c.build(*c.files, extra=("--events", c.events_with(
            "ev_lat.csv", lambda f: f.__setitem__("lat", f["lat"].where(f.index != 3, 95.0))))),
        ("ev_lat.csv", "'lat'", "[-90, 90]", "row 5")),
    Bad("events-time-not-iso", "events",
        lambda c: c.build(*c.files, extra=("--events", c.events_with(
            "ev_time.csv", lambda f: f.__setitem__("time", f["time"].where(f.index != 3, "yesterday"))))),
        ("ev_time.csv", "'time'", "ISO 8601", "row 5")),
    Bad("events-time-impossible-date", "events",
        lambda c: c.build(*c.files, extra=("--events", c.events_with(
            "ev_feb30.csv", lambda f: f.__setitem__("time", f["time"].where(
                f.index != 0, "2002-02-30T18:00Z"))))),
        ("ev_feb30.csv", "'time'", "row 2")),
    Bad("events-no-kind-column", "events",
        lambda c: c.build(*c.files, extra=("--events", c.events_with(
            "ev_kind.csv", lambda f: f.pop("kind")))),
        ("ev_kind.csv", "missing required column", "kind")),
    Bad("events-missing-file", "events",
        lambda c: c.build(*c.files, extra=("--events", c.path("none.csv"))),
        ("none.csv", "does not exist")),
    # --- options ------------------------------------------------------------------------
    # Option values are refused in one shape that names the option, never an internal
    # function: "--window must be an integer >= 0 and <= 183. Got -5 instead."
    Bad("find-top-0", "options", lambda c: c.find_date("--top", "0"),
        ("--top must be an integer >= 1", "Got 0 instead")),
    Bad("find-window-negative", "options", lambda c: c.find_date("--window", "-5"),
        ("--window must be an integer >= 0 and <= 183", "Got -5 instead")),
    Bad("find-exclude-negative", "options", lambda c: c.find_date("--exclude", "-3"),
        ("--exclude must be an integer >= 0", "Got -3 instead")),
    Bad("find-separation-negative", "options", lambda c: c.find_date("--separation", "-1"),
        ("--separation must be an integer >= 0", "Got -1 instead")),
    Bad("find-region-south-above-north", "options",
        lambda c: c.find_date("--region", "50,40,0,10"), ("--region must be", "S < N", "50,40,0,10")),
    Bad("find-region-radius-0", "options", lambda c: c.find_date("--region", "35,-95,0"),
        ("--region must be", "RADIUS_KM > 0")),
    Bad("find-region-outside-grid", "options", lambda c: c.find_date("--region", "0,10,0,10"),
        ("--region must be", "at least one grid point", "box lat 0 to 10")),
    Bad("find-unknown-regime", "options", lambda c: c.find_date("--regime", "blizzard"),
        ("--regime must be one of", "northwest_flow", "Got 'blizzard' instead")),
    Bad("find-date-not-in-archive", "options",
        lambda c: c.find("--date", "1990-01-01", "--json"),
        ("--date must be a day of the archive", "outside the archive", "Got '1990-01-01' instead")),
    Bad("find-date-not-a-date", "options", lambda c: c.find("--date", "2002-13-45"),
        ("--date must be a date YYYY-MM-DD", "Got '2002-13-45' instead")),
    Bad("find-maps-directory-missing", "options",
        lambda c: c.find_date("--maps", c.path("no_dir/maps.nc")),
        ("--maps must be a file in an existing directory", "no_dir/maps.nc")),
    Bad("verify-threshold-1.5", "options",
        lambda c: ["verify", "--store", c.store, "--json", "--quiet", "--threshold", "1.5"],
        ("--threshold must be a number >= 0.0 and <= 1.0", "Got 1.5 instead")),
    Bad("verify-modes-0", "options",
        lambda c: ["verify", "--store", c.store, "--json", "--quiet", "--modes", "0"],
        ("--modes must be an integer >= 1", "Got 0 instead")),
    # A bound known only from the store: the API's check, named for the option.
    Bad("verify-modes-above-the-store", "options",
        lambda c: ["verify", "--store", c.store, "--json", "--quiet", "--modes", "999"],
        ("--modes must be an integer >= 1 and <= ", "Got 999 instead")),
    Bad("build-modes-0", "options", lambda c: c.build(*c.files, extra=("--modes", "0")),
        ("--modes must be an integer >= 1", "Got 0 instead")),
    Bad("build-variance-1.5", "options", lambda c: c.build(*c.files, extra=("--variance", "1.5")),
        ("--variance must be a number > 0.0 and <= 1.0", "Got 1.5 instead")),
    Bad("build-hour-25", "options", lambda c: c.build(*c.files, extra=("--hour", "25")),
        ("--hour must be an integer >= 0 and <= 23", "Got 25 instead")),
    Bad("build-unknown-field", "options", lambda c: c.build(*c.files, extra=("--fields", "z500,t850")),
        ("--fields must be names among z500, q850", "Got 't850' instead")),
    Bad("build-domain-south-above-north", "options",
        lambda c: c.build(*c.files, extra=("--domain", "50,40,0,10")),
        ("--domain must be four numbers S,N,W,E", "S < N", "Got '50,40,0,10' instead")),
    Bad("tag-out-unknown-suffix", "options",
        lambda c: ["tag", "--store", c.store, "--out", c.path("tags.txt")],
        ("--out must be a file name ending in .csv or .parquet", "tags.txt")),
    Bad("verify-season-month-13", "options",
        lambda c: ["verify", "--store", c.store, "--json", "--quiet", "--season", "13-2"],
        ("--season must be months 1-12", "Got '13-2' instead")),
    Bad("find-top-not-an-integer", "options", lambda c: c.find_date("--top", "abc"),
        ("--top", "invalid int value", "abc")),
    # --- store directories --------------------------------------------------------------
    Bad("store-does-not-exist", "store", lambda c: c.find("--date", rh.QUERY_DATE, store=c.path("nowhere")),
        ("nowhere", "does not exist")),
    Bad("store-is-a-file", "store",
        lambda c: c.find("--date", rh.QUERY_DATE, store=_text_file(c, "store.txt")),
        ("store.txt", "not a directory")),
    Bad("store-no-manifest", "store", lambda c: c.find_date(store=c.store_copy(
        "s_noman", lambda s: os.remove(os.path.join(s, "manifest.json")))),
        ("s_noman", "no manifest.json")),
    Bad("store-manifest-not-json", "store", lambda c: c.find_date(store=c.store_copy(
        "s_json", lambda s: open(os.path.join(s, "manifest.json"), "w").write("{oops"))),
        ("manifest.json", "not valid JSON")),
    Bad("store-format-version-99", "store", lambda c: c.find_date(store=c.store_copy(
        "s_v99", _manifest_edit(("format_version",), 99))), ("s_v99", "format version 99", "rebuild")),
    Bad("store-missing-scores", "store", lambda c: c.find_date(store=c.store_copy(
        "s_noscores", lambda s: os.remove(os.path.join(s, "scores.nc")))),
        ("s_noscores", "missing scores.nc")),
    Bad("store-missing-tags", "store", lambda c: c.find_date(store=c.store_copy(
        "s_notags", lambda s: os.remove(os.path.join(s, "tags.parquet")))),
        ("s_notags", "missing tags.parquet")),
    Bad("store-altered-basis", "store", lambda c: c.find_date(store=c.store_copy(
        "s_basis", _flip_byte("basis.nc"))), ("basis.nc", "does not match its checksum")),
    Bad("store-altered-events", "store", lambda c: c.find_date(store=c.store_copy(
        "s_events", _flip_byte("events.parquet"))), ("events.parquet", "checksum")),
    Bad("store-checksum-edited", "store", lambda c: c.find_date(store=c.store_copy(
        "s_sha", _manifest_edit(("files", "scores.nc", "sha256"), "0" * 64))),
        ("scores.nc", "checksum")),
    Bad("store-manifest-points-outside", "store", lambda c: c.find_date(store=c.store_copy(
        "s_out", _manifest_edit(("files", "../secret"), {"sha256": "0"}))), ("outside the store",)),
]


def _tamper_consistently(store):
    """Truncate scores.nc and update its checksum: the checksums pass, the read must not."""
    path = os.path.join(store, "scores.nc")
    data = open(path, "rb").read()[:200]
    open(path, "wb").write(data)
    _manifest_edit(("files", "scores.nc", "sha256"), hashlib.sha256(data).hexdigest())(store)


BAD.append(Bad("store-truncated-scores-consistent-manifest", "store",
               lambda c: c.find_date(store=c.store_copy("s_trunc", _tamper_consistently)),
               ("scores.nc", "cannot read store file")))


# --- issue 13: outputs never inside a store, store paths, store tables, events --------

def _store_table_edit(name, edit):
    """Rewrite a store table with ``edit`` and record its new checksum: the checksums
    pass, the columns do not."""
    def change(store):
        path = os.path.join(store, name)
        table = edit(pd.read_parquet(path))
        table.to_parquet(path, index=False)
        _manifest_edit(("files", name, "sha256"),
                       hashlib.sha256(open(path, "rb").read()).hexdigest())(store)
    return change


def _scores_without_pcs(store):
    path = os.path.join(store, "scores.nc")
    with xr.open_dataset(path) as ds:
        renamed = ds.rename({"pcs": "scores"}).load()
    renamed.to_netcdf(path)
    _manifest_edit(("files", "scores.nc", "sha256"),
                   hashlib.sha256(open(path, "rb").read()).hexdigest())(store)


def _events_edit(ctx, name, edit):
    """The clean events CSV passed through ``edit`` (a function of the DataFrame)."""
    frame = edit(pd.read_csv(ctx.events))
    frame.to_csv(ctx.path(name), index=False)
    return ctx.path(name)


def _folder_with(ctx, name, *entries):
    os.mkdir(ctx.path(name))
    for entry in entries:
        open(os.path.join(ctx.path(name), entry), "w").write("mine")
    return ctx.path(name)


def _link_to_store(ctx):
    os.symlink(ctx.store, ctx.path("store_link"))
    return os.path.join(ctx.path("store_link"), "tags.csv")


def _update(ctx, *extra, store=None):
    """update with the clean archive (every day already held) and ``extra`` options."""
    return ["update", "--store", store or ctx.store_copy("s_upd", lambda s: None), "--quiet",
            *extra, *ctx.files]


def _header_only(ctx):
    open(ctx.path("header.csv"), "w").write("time,lat,lon,kind\n")
    return ctx.path("header.csv")


def _header_only_store(ctx):
    code = main(ctx.build(*ctx.files, extra=("--events", _header_only(ctx), "--region",
                                             rh.REGION)))
    assert code == 0
    return ctx.path("out_store")


BAD += [
    # Outputs never inside a store: named for the option, before any work.
    Bad("tag-out-inside-store", "outputs",
        lambda c: ["tag", "--store", c.store, "--out", os.path.join(c.store, "tags.parquet")],
        ("--out must be a file outside any analogs store", "tags.parquet")),
    Bad("tag-out-through-link-into-store", "outputs",
        lambda c: ["tag", "--store", c.store, "--out", _link_to_store(c)],
        ("--out must be a file outside any analogs store", "store_link")),
    Bad("find-maps-over-store-file", "outputs",
        lambda c: c.find_date("--maps", os.path.join(c.store, "basis.nc")),
        ("--maps must be a file outside any analogs store", "basis.nc")),
    Bad("find-maps-existing-directory", "outputs",
        lambda c: c.find_date("--maps", _folder_with(c, "maps_dir")),
        ("--maps must be a file name", "existing directory")),
    Bad("find-report-is-store", "outputs", lambda c: c.find_date("--report", c.store),
        ("--report must be a directory outside any analogs store", "is the store")),
    Bad("find-report-inside-store", "outputs",
        lambda c: c.find_date("--report", os.path.join(c.store, "report")),
        ("--report must be a directory outside any analogs store", "lies inside")),
    Bad("find-report-existing-file", "outputs",
        lambda c: c.find_date("--report", _text_file(c, "report.txt")),
        ("--report must be a directory", "report.txt is an existing file")),
    Bad("climatology-out-is-store", "outputs",
        lambda c: ["climatology", "--store", c.store, "--out", c.store, "--quiet"],
        ("--out must be a directory outside any analogs store",)),
    Bad("climatology-out-existing-file", "outputs",
        lambda c: ["climatology", "--store", c.store, "--out", _text_file(c, "b.csv"), "--quiet"],
        ("--out must be a directory", "b.csv is an existing file")),
    Bad("demo-out-is-store", "outputs", lambda c: ["demo", "--out", c.store, "--quiet"],
        ("--out must be a directory outside any analogs store",)),
    Bad("demo-out-holds-earlier-demo", "outputs",
        lambda c: ["demo", "--out", _folder_with(c, "old_demo", "events.csv"), "--quiet"],
        ("--out must be a folder without an earlier demo's outputs", "events.csv",
         "--replace")),
    # Store paths.
    Bad("build-store-into-folder-of-other-files", "store",
        lambda c: ["build", "--store", _folder_with(c, "papers", "thesis.tex"), "--quiet",
                   *c.files],
        ("papers", "not an analogs store", "thesis.tex", "new or empty folder")),
    Bad("build-store-inside-a-store", "store",
        lambda c: ["build", "--store", os.path.join(c.store_copy("s_outer", lambda s: None),
                                                    "inner"), "--quiet", *c.files],
        ("inner", "lies inside the analogs store")),
    Bad("store-path-dot-dot", "store",
        lambda c: _update(c, store=os.path.join(c.store_copy("s_dd", lambda s: None), "..")),
        ("is not an analogs store",)),
    # Store tables whose checksums are valid but whose columns are not.
    Bad("store-tags-without-regime-column", "store", lambda c: c.find_date(store=c.store_copy(
        "s_tagcol", _store_table_edit("tags.parquet", lambda t: t.drop(columns="regime")))),
        ("tags.parquet lacks the column(s) regime", "rebuild")),
    Bad("store-events-without-lat-column", "store", lambda c: c.find_date(store=c.store_copy(
        "s_evcol", _store_table_edit("events.parquet", lambda t: t.drop(columns="lat")))),
        ("events.parquet lacks the column(s) lat",)),
    Bad("store-scores-without-pcs", "store", lambda c: c.find_date(store=c.store_copy(
        "s_nopcs", _scores_without_pcs)), ("scores.nc holds no variable 'pcs'",)),
    # Events tables.
    Bad("events-dates-without-time", "events",
        lambda c: c.build(*c.files, extra=("--events", _events_edit(
            c, "ev_dates.csv", lambda f: f.assign(time=f["time"].str[:10])))),
        ("ev_dates.csv", "'time'", "date without a time of day", "2002-06-14T21:30Z",
         "--event-dates convective-day", "rows 2, 3")),
    Bad("update-events-dates-without-time", "events",
        lambda c: _update(c, "--events", _events_edit(
            c, "ev_dates2.csv", lambda f: f.assign(time=f["time"].str[:10]))),
        ("ev_dates2.csv", "date without a time of day")),
    Bad("events-lat-and-LAT", "events",
        lambda c: c.build(*c.files, extra=("--events", _events_edit(
            c, "ev_LAT.csv", lambda f: f.assign(LAT=f["lat"])))),
        ("ev_LAT.csv", "'lat' and 'LAT'", "keep one")),
    Bad("events-kind-with-dollar", "events",
        lambda c: c.build(*c.files, extra=("--events", _events_edit(
            c, "ev_dollar.csv", lambda f: f.assign(kind=f["kind"].where(f.index != 4, "$hail$"))))),
        ("ev_dollar.csv", "'kind'", "'$'", "row 6")),
    Bad("events-kind-with-comma", "events",
        lambda c: c.build(*c.files, extra=("--events", _events_edit(
            c, "ev_comma.csv",
            lambda f: f.assign(kind=f["kind"].where(f.index != 0, "hail,wind"))))),
        ("ev_comma.csv", "'kind'", "','", "row 2")),
    Bad("update-events-period-reversed", "options",
        lambda c: _update(c, "--events", c.events, "--events-period", "2003-01-01,2002-01-01"),
        ("--events-period must be two dates FIRST,LAST", "Got '2003-01-01,2002-01-01'")),
    Bad("update-events-period-misses-reports", "options",
        lambda c: _update(c, "--events", c.events, "--events-period", "2002-01-01,2002-01-31"),
        ("--events-period must be a period holding every report", "fall outside it")),
    Bad("tag-save-without-reclassifying", "options",
        lambda c: ["tag", "--store", c.store, "--out", c.path("t.csv"), "--save"],
        ("--save keeps the tags of --rules, --kmeans or --train",)),
    Bad("verify-region-without-reports", "options",
        lambda c: ["verify", "--store", c.store, "--quiet", "--json", "--region",
                   "50,55,-130,-125"],
        ("holds no report in box lat 50 to 55", "nothing to verify")),
    Bad("verify-header-only-events", "events",
        lambda c: ["verify", "--store", _header_only_store(c), "--quiet", "--json"],
        ("holds no report", "nothing to verify")),
]


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    built = rh.shared_store(rh.session_root(tmp_path_factory))
    times = rh.archive_times()
    return built, times, rh.synthetic_fields(times)


@pytest.fixture
def ctx(shared, tmp_path):
    built, times, fields = shared
    return Context(tmp=tmp_path, store=str(built["store"]), files=[str(p) for p in built["files"]],
                   events=str(built["events"]), fields=fields, times=times)


def _run(argv, capsys):
    """(exit status, stdout, stderr) of the CLI in process; argparse's SystemExit counts."""
    try:
        code = main(list(map(str, argv)))
    except SystemExit as stop:
        code = stop.code
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _error_lines(stderr):
    return [line for line in stderr.splitlines()
            if line.strip() and not line.startswith("analogs: warning:")]


@pytest.mark.parametrize("case", [pytest.param(c, id=c.id, marks=[pytest.mark.xfail(
    strict=True, reason=c.xfail)] if c.xfail else []) for c in BAD])
def test_bad_input_exits_2_with_one_line(case, ctx, capsys):
    argv = case.make(ctx)
    code, _, stderr = _run(argv, capsys)
    lines = _error_lines(stderr)
    shown = " / ".join(lines).replace(f"{ctx.tmp}/", "") if lines else "(no error line)"
    OUTCOMES[case.id] = (str(code), shown)
    assert "Traceback" not in stderr
    assert code == 2, stderr
    assert len(lines) == 1, stderr
    command = argv[0]
    assert lines[0].startswith(f"analogs {command}: error: ")
    for word in case.words:
        assert word.lower() in lines[0].lower(), (word, lines[0])
    if case.area == "options":  # named for the option the user gave, not a function
        assert "parameter of" not in lines[0], lines[0]


# --------------------------------------------------------------------------- recoverable

def _answer(stdout):
    """(analog dates, distances, P(any event)) of a ``find --json`` answer."""
    answer = json.loads(stdout)
    return ([a["date"] for a in answer["analogs"]], np.array([a["distance"] for a in answer["analogs"]]),
            answer["outcomes"]["p_any_event"])


@pytest.fixture(scope="module")
def clean_answer(shared):
    built, _, _ = shared
    import io
    import contextlib
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["find", "--store", str(built["store"]), "--date", rh.QUERY_DATE, "--json",
                     "--region", rh.REGION, "--metric", "plain"]) == 0
    answer = _answer(out.getvalue())
    assert len(answer[0]) == P.top.default  # the comparisons below are not vacuous
    return answer


def _write_archive_variant(ctx, name, edit):
    """Both fields of the clean archive, as Datasets passed through ``edit``, written to
    ``name``-z.nc / ``name``-q.nc."""
    paths = []
    for fld in ("z500", "q850"):
        ds = edit(rh.field_dataset(fld, ctx.fields[fld], ctx.times), fld)
        path = ctx.path(f"{name}-{fld}.nc")
        ds.to_netcdf(path)
        paths.append(path)
    return paths


def _reverse_latitude(ds, _):
    return ds.isel(lat=slice(None, None, -1))


def _longitude_0_360(ds, _):
    return ds.assign_coords(lon=("lon", np.mod(ds["lon"].values, 360.0), {"units": "degrees_east"}))


def _repeat_and_disorder(ds, fld):
    """Append a repeat of an early day with other values at the end of the file: the
    time axis is then disordered and holds a duplicate; the first occurrence must win."""
    repeat = ds.isel(time=[30]).copy(deep=True)
    repeat[list(repeat.data_vars)[0]] += 5.0 if fld == "z500" else 1e-4
    return xr.concat([ds, repeat], dim="time")


def _isolated_gap(ds, _):
    name = list(ds.data_vars)[0]
    values = ds[name].values.copy()
    values[400, 0, 5, 7] = np.nan
    values[401, 0, 5, 7] = np.nan
    ds[name].values = values
    return ds


def _all_nan_day(ds, _):
    name = list(ds.data_vars)[0]
    values = ds[name].values.copy()
    values[200] = np.nan
    ds[name].values = values
    return ds


RECOVERABLE_ARCHIVES = [
    ("archive-latitude-descending", _reverse_latitude, None, 1e-6),
    ("archive-longitude-0-360", _longitude_0_360, None, 1e-6),
    ("archive-repeated-and-disordered-time", _repeat_and_disorder,
     ("not monotonic", "1 repeated time"), 1e-6),
    ("archive-isolated-two-day-nan-gap", _isolated_gap, ("4 value(s) filled",), 1e-3),
]


@pytest.mark.parametrize("name,edit,warned,rtol", RECOVERABLE_ARCHIVES,
                         ids=[c[0] for c in RECOVERABLE_ARCHIVES])
def test_recoverable_archive_gives_the_clean_answer(name, edit, warned, rtol, ctx, clean_answer,
                                                    capsys):
    """Repaired input, same answer as the clean archive (dates, distances, probability)."""
    code, _, stderr = _run(ctx.build(*_write_archive_variant(ctx, name, edit),
                                     extra=("--events", ctx.events, "--region", rh.REGION)), capsys)
    assert code == 0, stderr
    for word in warned or ():
        assert word in stderr
    code, stdout, stderr = _run(ctx.find_date("--region", rh.REGION, store=ctx.path("out_store")),
                                capsys)
    assert code == 0, stderr
    dates, distances, probability = _answer(stdout)
    OUTCOMES[name] = ("0", "same answer as the clean input"
                      + (f" (warned: {'; '.join(warned)})" if warned else ""))
    assert dates == clean_answer[0]
    np.testing.assert_allclose(distances, clean_answer[1], rtol=rtol)
    assert probability == pytest.approx(clean_answer[2])


def test_all_nan_day_is_dropped_and_reported(ctx, clean_answer, capsys):
    """An all-NaN day never reaches the EOFs: the build drops it, says so, records it in
    the archive's missing-data report, and the day is then refused as a target."""
    code, _, stderr = _run(ctx.build(*_write_archive_variant(ctx, "nanday", _all_nan_day),
                                     extra=("--events", ctx.events, "--region", rh.REGION)), capsys)
    assert code == 0, stderr
    dropped = f"{ctx.times[200]:%Y-%m-%d}"
    assert "1 day(s) dropped" in stderr and dropped in stderr
    code, stdout, stderr = _run(ctx.find_date("--region", rh.REGION, store=ctx.path("out_store")),
                                capsys)
    assert code == 0, stderr
    dates, _, _ = _answer(stdout)
    # One day fewer changes the EOFs a little; the nearest analogs stay (common practice,
    # no source: analog sets are stable to small changes of the training sample).
    assert len(set(dates[:10]) & set(clean_answer[0][:10])) >= 8
    code, _, stderr = _run(ctx.find("--date", dropped, store=ctx.path("out_store")), capsys)
    assert code == 2 and "missing from it" in stderr
    OUTCOMES["archive-one-all-nan-day"] = ("0", f"day {dropped} dropped with a warning; "
                                           "that date then refused (exit 2)")


def test_recoverable_target_and_store(ctx, clean_answer, capsys):
    """A target on a reversed, 0-360 grid gives the clean target's answer; a stray file in
    the store gives a warning and the clean answer; events outside the archive change nothing."""
    def flip(ds):
        ds = ds.isel(lat=slice(None, None, -1))
        return ds.assign_coords(lon=("lon", np.mod(ds["lon"].values, 360.0), {"units": "degrees_east"}))

    base = ctx.find("--field", ctx.target("clean.nc"), "--time", rh.QUERY_DATE, "--json",
                    "--region", rh.REGION)
    code, stdout, stderr = _run(base, capsys)
    assert code == 0, stderr
    reference = _answer(stdout)
    code, stdout, stderr = _run(ctx.find("--field", ctx.target("flipped.nc", transform=flip),
                                         "--time", rh.QUERY_DATE, "--json", "--region", rh.REGION),
                                capsys)
    assert code == 0, stderr
    flipped = _answer(stdout)
    assert flipped[0] == reference[0]
    np.testing.assert_allclose(flipped[1], reference[1], rtol=1e-6)
    OUTCOMES["target-latitude-descending-longitude-0-360"] = ("0", "same answer as the clean target")

    stray = ctx.store_copy("s_stray", lambda s: open(os.path.join(s, "notes.txt"), "w").write("x"))
    code, stdout, stderr = _run(ctx.find_date("--region", rh.REGION, store=stray), capsys)
    assert code == 0 and "notes.txt" in stderr and "not listed in its manifest" in stderr
    assert _answer(stdout)[0] == clean_answer[0]
    OUTCOMES["store-stray-extra-file"] = ("0", "same answer; warning names notes.txt")


# ------------------------------------------------------------- issue 13: right answers

def _convective_dates(ctx):
    """The clean events with each time replaced by the date of its convective day
    (12 UTC to 12 UTC, common practice): what --event-dates convective-day reads back."""
    def edit(frame):
        times = pd.to_datetime(frame["time"], utc=True).dt.tz_convert(None)
        return frame.assign(time=(times - pd.Timedelta(hours=12)).dt.strftime("%Y-%m-%d"))
    return _events_edit(ctx, "ev_days.csv", edit)


def _far_reports(ctx):
    """The clean events plus reports far outside the grid (lat -60 and lon 100)."""
    def edit(frame):
        far = frame.iloc[:7].copy()
        far["lat"] = [-60.0, -60.0, -60.0, 10.0, 10.0, 40.0, 40.0]
        far["lon"] = [-100.0, 0.0, 50.0, -100.0, -120.0, 100.0, 170.0]
        return pd.concat([frame, far], ignore_index=True)
    return _events_edit(ctx, "ev_far.csv", edit)


RIGHT_ANSWERS = [
    # (case, events file maker, extra build options, stderr words, find options)
    ("events-dates-as-convective-days", _convective_dates,
     ("--event-dates", "convective-day"), (), ()),
    ("events-outside-the-grid", _far_reports, (),
     ("7 of", "reports lie outside the archive's grid", "left out"), ()),
    ("find-date-with-utc-time", None, (), (), ("--date", rh.QUERY_DATE + "T12:00Z",
                                               "--metric", "plain")),
]


@pytest.mark.parametrize("name,events,extra,warned,query", RIGHT_ANSWERS,
                         ids=[c[0] for c in RIGHT_ANSWERS])
def test_issue13_inputs_give_the_clean_answer(name, events, extra, warned, query, ctx,
                                              clean_answer, capsys):
    """Dates stated as convective days (with the option that says so), reports far outside
    the grid (counted, reported, left out) and a --date with a UTC time of day give the
    clean input's answer: analog dates, distances and P(any event)."""
    store = ctx.store
    if events is not None:
        code, _, stderr = _run(ctx.build(*ctx.files, extra=("--events", events(ctx), "--region",
                                                            rh.REGION, *extra)), capsys)
        assert code == 0, stderr
        for word in warned:
            assert word in stderr, stderr
        store = ctx.path("out_store")
    argv = (ctx.find(*query, "--json", "--region", rh.REGION, store=store) if query
            else ctx.find_date("--region", rh.REGION, store=store))
    code, stdout, stderr = _run(argv, capsys)
    assert code == 0, stderr
    dates, distances, probability = _answer(stdout)
    assert dates == clean_answer[0]
    np.testing.assert_allclose(distances, clean_answer[1], rtol=1e-6)
    assert probability == pytest.approx(clean_answer[2])
    OUTCOMES[name] = ("0", "same answer as the clean input"
                      + (f" (warned: {'; '.join(warned)})" if warned else ""))


def test_header_only_events_build_and_query(ctx, capsys):
    """A header-only events table is a valid empty table: the build succeeds (no skill to
    measure, no internal message), a query answers 0 % with its climatology 0 %, and
    verify says there is nothing to verify (in the corpus above)."""
    store = _header_only_store(ctx)
    stderr = capsys.readouterr().err
    assert "bootstrap" not in stderr
    code, stdout, stderr = _run(ctx.find_date("--region", rh.REGION, store=store), capsys)
    assert code == 0, stderr
    outcomes = json.loads(stdout)["outcomes"]
    assert outcomes["p_any_event"] == 0.0 and outcomes["climatology_p_any_event"] == 0.0
    assert outcomes["has_events"] is True and outcomes["skill"] is None
    OUTCOMES["events-header-only-build"] = ("0", "store built, find gives 0 % (no skill measured)")


def test_demo_replace_replaces_an_earlier_demo(ctx, capsys):
    """demo --out over an earlier demo is refused (in the corpus above); with --replace it
    runs, replaces the store and events, and builds from the archive files it wrote, not
    from a stale file an earlier, longer demo left in archive/."""
    folder = _folder_with(ctx, "again", "events.csv")
    os.mkdir(os.path.join(folder, "archive"))
    open(os.path.join(folder, "archive", "zg500_2009.nc"), "w").write("not NetCDF")
    code, stdout, stderr = _run(["demo", "--out", folder, "--years", "2", "--quiet",
                                 "--replace"], capsys)
    assert code == 0, stderr
    events = pd.read_csv(os.path.join(folder, "events.csv"))
    assert list(events.columns[:4]) == ["time", "lat", "lon", "kind"] and len(events) > 100
    assert "730 days" in stdout
    OUTCOMES["demo-out-replace"] = ("0", "earlier demo replaced; stale archive file not used")


# --------------------------------------------------------------------------- the table

def test_corpus_table():
    """At least 25 malformed inputs (issue 8); print case -> outcome for the closing note."""
    assert len(BAD) + len(RECOVERABLE_ARCHIVES) + len(RIGHT_ANSWERS) + 5 >= 25 + 30
    if not OUTCOMES:
        pytest.skip("no corpus case ran in this session (run the whole module)")
    width = max(len(k) for k in OUTCOMES)
    print(f"\n{len(OUTCOMES)} bad inputs tried:")
    print(f"{'case':<{width}}  exit  outcome")
    for name, (code, outcome) in OUTCOMES.items():
        print(f"{name:<{width}}  {code:>4}  {outcome}")
