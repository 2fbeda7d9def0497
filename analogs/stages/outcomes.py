"""Outcomes: what the analog days produced.

Severe-weather events (reports) are read from a table, grouped into convective
days, counted over a region and summarised into probabilities with confidence
intervals, compared with the season-window climatology. Spatial fields
(neighbourhood probability, smoothed report density) and tropical-cyclone
relative composites complete the picture.

Conventions
-----------
* Times are UTC; an event belongs to the convective day that runs from 12 UTC
  on day D to 12 UTC on day D+1 (common practice in severe-report
  climatologies; :data:`analogs.constants.CONVECTIVE_DAY_START_HOUR`).
* Longitudes are normalised to [-180, 180).
* "Near a point" means within :data:`analogs.constants.NEIGHBOURHOOD_KM`
  (40 km, common practice).

References
----------
Brooks, H. E., M. Kay and J. A. Hart, 1998: Objective limits on forecasting
skill of rare events. 19th Conf. on Severe Local Storms (practically perfect
hindcasts; from memory).

Brown, L. D., T. T. Cai and A. DasGupta, 2001: Interval estimation for a
binomial proportion. Statistical Science, 16, 101-133.

Clopper, C. J. and E. S. Pearson, 1934: The use of confidence or fiducial
limits illustrated in the case of the binomial. Biometrika, 26, 404-413.

Kish, L., 1965: Survey Sampling. Wiley (effective sample size of a weighted
mean).

McCaul, E. W., 1991: Buoyancy and shear characteristics of hurricane-tornado
environments. Mon. Wea. Rev., 119, 1954-1978 (from memory).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import sys
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from analogs import __version__
from analogs._validation import ParameterError, check_choice, check_float
from analogs.constants import (
    CONVECTIVE_DAY_START_HOUR,
    EARTH_RADIUS,
    NEIGHBOURHOOD_KM,
    PRACTICALLY_PERFECT_SIGMA_KM,
)
from analogs.errors import AnalogsInputError
from analogs.geo import great_circle_km, initial_bearing_deg
from analogs.parameters import P
from analogs.results import OutcomeSummary, WeightedOutcomes

if TYPE_CHECKING:  # xarray is imported by the maps, which alone return labelled arrays
    import xarray as xr

#: Columns every events table must have.
REQUIRED_EVENT_COLUMNS = ("time", "lat", "lon", "kind")
#: Columns of a cleaned events table (:func:`read_events`), as a store keeps it.
EVENT_COLUMNS = ("time", "lat", "lon", "kind", "magnitude", "day")
#: How an events time that is a date without a time of day is read: refused
#: (``"time-required"``), or taken as the convective day itself (``"convective-day"``).
EVENT_DATE_CONVENTIONS = P.event_dates.choices
#: A date without a time of day (ISO 8601 extended or basic form).
_DATE_ONLY = r"^\d{4}-?\d{2}-?\d{2}$"
#: Characters refused in a kind: "$" starts matplotlib's math text in figure labels,
#: "," separates the kinds of --kind, control characters break tables and lines.
_KIND_FORBIDDEN = r"[$,\x00-\x1f\x7f]"
#: How many offending rows an error message lists.
_ROWS_SHOWN = 5
#: Kilometres per degree of latitude on the sphere of EARTH_RADIUS.
_KM_PER_DEGREE = math.pi * EARTH_RADIUS / 1000.0 / 180.0


# --------------------------------------------------------------------------
# Events
# --------------------------------------------------------------------------

def convective_day(times):
    """Convective day (midnight of day D) of each UTC time.

    An event at or after 12 UTC on day D and before 12 UTC on day D+1 belongs
    to day D (common practice). 11:59 UTC on D+1 is still day D; 12:00 UTC on
    D+1 is day D+1.

    Parameters
    ----------
    times : array-like of datetimes, DatetimeIndex or Series
        UTC times; time-zone aware values are converted to UTC first.

    Returns
    -------
    Same container kind (Series for a Series, else DatetimeIndex) of
    datetime64[ns] at midnight.
    """
    if isinstance(times, pd.Series):
        values = pd.to_datetime(times, utc=True).dt.tz_convert(None)
        shifted = values - pd.Timedelta(hours=CONVECTIVE_DAY_START_HOUR)
        return shifted.dt.floor("D").astype("datetime64[ns]")
    index = pd.DatetimeIndex(pd.to_datetime(np.asarray(times).ravel(), utc=True))
    index = index.tz_convert(None)
    shifted = index - pd.Timedelta(hours=CONVECTIVE_DAY_START_HOUR)
    return shifted.floor("D").astype("datetime64[ns]")


def _normalise_lon(lon):
    """Longitudes in degrees mapped to [-180, 180)."""
    return (np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0


def _bad_rows_error(source, column, what, bad_mask, row_offset):
    rows = np.flatnonzero(np.asarray(bad_mask)) + row_offset
    shown = ", ".join(str(r) for r in rows[:_ROWS_SHOWN])
    more = f" and {rows.size - _ROWS_SHOWN} more" if rows.size > _ROWS_SHOWN else ""
    word = "row" if rows.size == 1 else "rows"
    header_note = " (row 1 is the header)" if row_offset == 2 else ""
    return AnalogsInputError(
        f"events file {source}: column {column!r} {what} in {word} {shown}{more}{header_note}"
    )


def clean_events(frame: pd.DataFrame, *, source: str = "'<table>'", row_offset: int = 1,
                 dates: str = P.event_dates.default):
    """Validate and normalise an events table (see :func:`read_events`).

    ``source`` names the table in error messages; ``row_offset`` is the
    number of the first data row (2 for a CSV file whose header is row 1);
    ``dates`` how a date without a time of day is read (:data:`EVENT_DATE_CONVENTIONS`).
    """
    dates = P.event_dates.check(dates, "read_events")
    names = [str(c).strip().lower() for c in frame.columns]
    for name in dict.fromkeys(names):
        given = [str(c) for c, lower in zip(frame.columns, names) if lower == name]
        if len(given) > 1:
            raise AnalogsInputError(
                f"events file {source}: columns {' and '.join(repr(g) for g in given)} both "
                f"name {name!r} (column names are read without regard to case); keep one")
    frame = frame.set_axis(names, axis=1)
    missing = [c for c in REQUIRED_EVENT_COLUMNS if c not in frame.columns]
    if missing:
        raise AnalogsInputError(
            f"events file {source}: missing required column(s) {', '.join(missing)}; "
            f"expected a header time,lat,lon,kind[,magnitude]"
        )

    time = _event_times(frame["time"], source, row_offset, dates)

    lat = pd.to_numeric(frame["lat"], errors="coerce").astype(float)
    bad = ~lat.between(-90.0, 90.0).to_numpy()
    if bad.any():
        raise _bad_rows_error(source, "lat", "needs degrees north in [-90, 90]",
                              bad, row_offset)
    lon = pd.to_numeric(frame["lon"], errors="coerce").astype(float)
    bad = ~lon.between(-180.0, 360.0).to_numpy()
    if bad.any():
        raise _bad_rows_error(source, "lon", "needs degrees east in [-180, 360]",
                              bad, row_offset)

    kind = frame["kind"].astype("string").str.strip().str.lower()
    bad = (kind.isna() | (kind == "")).to_numpy()
    if bad.any():
        raise _bad_rows_error(source, "kind", "is empty", bad, row_offset)
    bad = kind.str.contains(_KIND_FORBIDDEN, regex=True).fillna(False).to_numpy(dtype=bool)
    if bad.any():
        error = _bad_rows_error(source, "kind", "holds '$', ',' or a control character",
                                bad, row_offset)
        raise AnalogsInputError(
            f"{error}: a kind is a name such as tornado or hail ('$' would start math text "
            "in figures, ',' separates the kinds of --kind)")

    if "magnitude" in frame.columns:
        raw_mag = frame["magnitude"]
        magnitude = pd.to_numeric(raw_mag, errors="coerce").astype(float)
        blank = raw_mag.isna() | (raw_mag.astype("string").str.strip() == "")
        bad = (magnitude.isna() & ~blank.fillna(True)).to_numpy()
        if bad.any():
            raise _bad_rows_error(source, "magnitude", "is not a number", bad, row_offset)
    else:
        magnitude = pd.Series(np.nan, index=frame.index)

    out = pd.DataFrame({
        "time": time.to_numpy(),
        "lat": lat.to_numpy(),
        "lon": _normalise_lon(lon.to_numpy()),
        "kind": kind.to_numpy(dtype=object).astype(str),
        "magnitude": magnitude.to_numpy(dtype=float),
    })
    out["day"] = convective_day(out["time"])
    return out


def _event_times(raw_time, source, row_offset, dates):
    """The events' times as naive UTC datetime64[ns] (see :func:`read_events`)."""
    date_only = np.zeros(len(raw_time), dtype=bool)
    if pd.api.types.is_datetime64_any_dtype(raw_time):
        parsed = pd.to_datetime(raw_time, utc=True)
    else:
        text = raw_time.astype("string").str.strip()
        date_only = text.str.fullmatch(_DATE_ONLY).fillna(False).to_numpy(dtype=bool)
        parsed = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
    bad = parsed.isna().to_numpy()
    if bad.any():
        raise _bad_rows_error(source, "time", "has missing or non-ISO 8601 times",
                              bad, row_offset)
    if date_only.any() and dates != "convective-day":
        error = _bad_rows_error(source, "time", "has a date without a time of day",
                                date_only, row_offset)
        raise AnalogsInputError(
            f"{error}: an event's convective day (12 UTC to 12 UTC) depends on its hour; "
            "give ISO 8601 times with the hour in UTC, e.g. 2002-06-14T21:30Z, or, if each "
            "date is the convective day itself, pass --event-dates convective-day "
            "(event_dates='convective-day')")
    time = parsed.dt.tz_convert(None).astype("datetime64[ns]")
    if date_only.any():
        # The date is the convective day: its start, 12 UTC, is that day's time.
        start = pd.Timedelta(hours=CONVECTIVE_DAY_START_HOUR)
        time = time.where(~date_only, time.dt.normalize() + start)
    return time


def read_events(path, *, dates=P.event_dates.default) -> pd.DataFrame:
    """Read an events (severe-report) table from CSV or Parquet.

    The header is ``time,lat,lon,kind[,magnitude]`` (names are case-insensitive;
    two columns whose names differ only by case are refused; extra columns are
    ignored). ``time`` is ISO 8601 with the time of day; naive times are UTC and
    other offsets are converted to UTC. A date without a time of day
    (``2002-06-14``) is refused, since the convective day (12 UTC to 12 UTC)
    depends on the hour, unless ``dates="convective-day"``: the date is then the
    convective day itself (its time is set to 12 UTC on that date). A kind may not
    hold ``$``, ``,`` or control characters. A file with a header and no rows is
    a valid, empty events table.

    Returns
    -------
    DataFrame with columns ``time`` (datetime64[ns], UTC, naive), ``lat``
    (degrees north), ``lon`` (degrees east in [-180, 180)), ``kind`` (str,
    stripped, lower case), ``magnitude`` (float, NaN when absent) and ``day``
    (datetime64[ns] midnight of the convective day, see :func:`convective_day`).

    Raises
    ------
    AnalogsInputError
        naming the file, the first few bad rows and the column, for an
        unparseable time, a latitude outside [-90, 90], a longitude outside
        [-180, 360], an empty kind, a missing column, an empty file or a file
        that is neither CSV nor Parquet.
    """
    path = Path(path)
    source = f"'{path}'"
    if not path.is_file():
        raise AnalogsInputError(f"events file {source} does not exist or is not a file")
    is_parquet = path.suffix.lower() in (".parquet", ".pq")
    try:
        if is_parquet:
            frame = pd.read_parquet(path)
        else:
            frame = pd.read_csv(path, dtype=str, keep_default_na=False,
                                na_values=[""], skipinitialspace=True)
    except pd.errors.EmptyDataError:
        raise AnalogsInputError(
            f"events file {source} is empty; expected a header time,lat,lon,kind[,magnitude]"
        ) from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError, OSError) as exc:
        kind = "Parquet" if is_parquet else "CSV"
        first_line = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise AnalogsInputError(
            f"events file {source} could not be read as {kind} ({first_line})"
        ) from None
    return clean_events(frame, source=source, row_offset=1 if is_parquet else 2, dates=dates)


# --------------------------------------------------------------------------
# Report coverage: which convective days the events table speaks for
# --------------------------------------------------------------------------
#
# An events table says what happened on the days it covers: a covered day without a
# report had none; a day outside it is not known yet ("no reports yet"), e.g. a day
# appended to a store before its reports are in. Coverage is kept as periods of
# convective days, [first, last] inclusive, as ISO dates.

def event_period(events: pd.DataFrame):
    """(first, last) convective day of the events (midnight Timestamps), or None for an
    empty table."""
    if len(events) == 0:
        return None
    days = _event_days(events)
    return pd.Timestamp(days.min()), pd.Timestamp(days.max())


def parse_period(text, name="events_period", owner=None):
    """``"FIRST,LAST"`` (YYYY-MM-DD, inclusive) or a pair, as (first, last) midnight
    Timestamps; refused in the one message shape naming ``name`` and ``owner``."""
    from analogs._validation import fail
    expected = "two dates FIRST,LAST (YYYY-MM-DD, FIRST <= LAST)"
    parts = str(text).split(",") if isinstance(text, str) else list(text)
    try:
        first, last = (pd.Timestamp(str(part).strip()) for part in parts)
    except (ValueError, TypeError):
        fail(name, owner, expected, text)
    first, last = (t.tz_convert(None) if t.tz is not None else t for t in (first, last))
    if pd.isna(first) or pd.isna(last) or first.normalize() > last.normalize():
        fail(name, owner, expected, text)
    return first.normalize(), last.normalize()


def merged_periods(periods) -> list[list[str]]:
    """Periods ``[(first, last), ...]`` sorted, with overlapping or touching ones joined;
    as ``[["YYYY-MM-DD", "YYYY-MM-DD"], ...]`` (the manifest's form)."""
    spans = sorted((pd.Timestamp(a).normalize(), pd.Timestamp(b).normalize())
                   for a, b in periods)
    joined: list[list] = []
    for first, last in spans:
        if joined and first <= joined[-1][1] + pd.Timedelta(days=1):
            joined[-1][1] = max(joined[-1][1], last)
        else:
            joined.append([first, last])
    return [[str(a.date()), str(b.date())] for a, b in joined]


def covered_days(days, periods) -> np.ndarray:
    """Whether each of ``days`` (any time of day: its calendar day) lies in one of the
    ``periods`` (inclusive): bool array."""
    index = _as_days(days)
    covered = np.zeros(len(index), dtype=bool)
    for first, last in periods:
        covered |= np.asarray((index >= pd.Timestamp(first)) & (index <= pd.Timestamp(last)))
    return covered


def merge_events(held: pd.DataFrame | None, new: pd.DataFrame, first, last) -> pd.DataFrame:
    """The events of ``held`` outside the convective days ``first`` to ``last``
    (inclusive), with every event of ``new`` (which reports for those days): a merge by
    date. Sorted by time (stable); columns of :data:`EVENT_COLUMNS`."""
    first, last = pd.Timestamp(first).normalize(), pd.Timestamp(last).normalize()
    parts = []
    if held is not None and len(held):
        days = _event_days(held)
        parts.append(held.loc[~((days >= first) & (days <= last)).to_numpy(), list(EVENT_COLUMNS)])
    parts.append(new[list(EVENT_COLUMNS)])
    merged = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0].copy()
    return merged.sort_values("time", kind="stable", ignore_index=True)


def outside_grid(events: pd.DataFrame, lat, lon) -> np.ndarray:
    """Which events lie outside the grid of latitudes ``lat`` and longitudes ``lon``
    (degrees, ascending) by more than half a grid spacing: bool array. Such reports
    are never near a grid point of the archive (:func:`grid_event_counts` drops them
    too)."""
    lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
    half_lat = float(np.mean(np.diff(lat))) / 2 if lat.size > 1 else 0.0
    half_lon = float(np.mean(np.diff(lon))) / 2 if lon.size > 1 else 0.0
    ev_lat = events["lat"].to_numpy(dtype=float)
    ev_lon = _normalise_lon(events["lon"].to_numpy(dtype=float))
    inside = ((ev_lat >= lat.min() - half_lat) & (ev_lat <= lat.max() + half_lat)
              & (ev_lon >= lon.min() - half_lon) & (ev_lon <= lon.max() + half_lon))
    return ~inside


# --------------------------------------------------------------------------
# Regions
# --------------------------------------------------------------------------

def _region_error(expected: str, value) -> ParameterError:
    """The region's complaint; the public function or option that passed it names itself."""
    return ParameterError("region", None, expected, value)


@dataclasses.dataclass(frozen=True)
class Region:
    """Where outcome statistics are counted: a box, a disc or the whole domain.

    Build with :meth:`box`, :meth:`point`, :meth:`whole` or :meth:`parse`.
    Box longitudes are degrees east, normalised to [-180, 180); a box that
    crosses the 180th meridian is not supported (split it or use a point and
    a radius). Bounds are inclusive.
    """

    kind: str
    south: float | None = None
    north: float | None = None
    west: float | None = None
    east: float | None = None
    lat: float | None = None
    lon: float | None = None
    radius_km: float | None = None

    @classmethod
    def box(cls, south, north, west, east) -> "Region":
        """A latitude-longitude box in degrees (inclusive bounds)."""
        south, north, west, east = (float(v) for v in (south, north, west, east))
        value = f"{south:g},{north:g},{west:g},{east:g}"
        if not (-90.0 <= south < north <= 90.0):
            raise _region_error("a box S,N,W,E with -90 <= S < N <= 90", value)
        if not (-180.0 <= west <= 360.0 and -180.0 <= east <= 360.0):
            raise _region_error("a box S,N,W,E with W and E in degrees east in [-180, 360]",
                                value)
        width = east - west
        if not (0.0 < width < 360.0):
            raise _region_error(
                "a box S,N,W,E with W < E (boxes across the 180th meridian are not "
                "supported; use a point and radius)", value)
        west_n = float(_normalise_lon(west))
        east_n = west_n + width
        if east_n > 180.0:
            raise _region_error(
                "a box that does not cross the 180th meridian (use a point and radius)",
                value)
        return cls("box", south=south, north=north, west=west_n, east=east_n)

    @classmethod
    def point(cls, lat, lon, radius_km=NEIGHBOURHOOD_KM) -> "Region":
        """A disc of ``radius_km`` (great-circle km) around (lat, lon) in degrees."""
        lat, lon, radius_km = float(lat), float(lon), float(radius_km)
        value = f"{lat:g},{lon:g},{radius_km:g}"
        if not -90.0 <= lat <= 90.0:
            raise _region_error("a point LAT,LON,RADIUS_KM with LAT in [-90, 90]", value)
        if not -180.0 <= lon <= 360.0:
            raise _region_error("a point LAT,LON,RADIUS_KM with LON in [-180, 360]", value)
        if not (radius_km > 0.0 and math.isfinite(radius_km)):
            raise _region_error("a point LAT,LON,RADIUS_KM with RADIUS_KM > 0", value)
        return cls("point", lat=lat, lon=float(_normalise_lon(lon)), radius_km=radius_km)

    @classmethod
    def whole(cls) -> "Region":
        """The whole domain: every event counts."""
        return cls("whole")

    @classmethod
    def parse(cls, text) -> "Region":
        """Parse ``"S,N,W,E"`` (box), ``"LAT,LON,RADIUS_KM"`` (point) or ``"all"``."""
        if isinstance(text, Region):
            return text
        expected = "'S,N,W,E' (degrees), 'LAT,LON,RADIUS_KM' or 'all'"
        if text is None:
            return cls.whole()
        stripped = str(text).strip()
        if stripped.lower() in ("all", "whole", ""):
            return cls.whole()
        try:
            numbers = [float(part) for part in stripped.split(",")]
        except ValueError:
            raise _region_error(expected, text) from None
        if not all(math.isfinite(v) for v in numbers):
            raise _region_error(expected, text)
        if len(numbers) == 4:
            return cls.box(*numbers)
        if len(numbers) == 3:
            return cls.point(*numbers)
        raise _region_error(expected, text)

    @classmethod
    def from_dict(cls, data) -> "Region":
        """Inverse of :meth:`to_dict`."""
        kind = (data or {}).get("kind", "whole")
        if kind == "box":
            return cls.box(data["south"], data["north"], data["west"], data["east"])
        if kind == "point":
            return cls.point(data["lat"], data["lon"], data["radius_km"])
        if kind == "whole":
            return cls.whole()
        raise _region_error("a dict with kind 'box', 'point' or 'whole'", data)

    def to_dict(self) -> dict:
        """Plain JSON-ready description: kind and its parameters."""
        if self.kind == "box":
            keys = ("south", "north", "west", "east")
        elif self.kind == "point":
            keys = ("lat", "lon", "radius_km")
        else:
            keys = ()
        return {"kind": self.kind, **{k: getattr(self, k) for k in keys}}

    def label(self) -> str:
        """Short human-readable description."""
        if self.kind == "box":
            return (f"box lat {self.south:g} to {self.north:g}, "
                    f"lon {self.west:g} to {self.east:g}")
        if self.kind == "point":
            return f"within {self.radius_km:g} km of ({self.lat:g}, {self.lon:g})"
        return "whole domain"

    def contains(self, lat, lon) -> np.ndarray:
        """Boolean array: which (lat, lon) points (degrees, broadcast) are inside."""
        lat = np.asarray(lat, dtype=float)
        lon = _normalise_lon(lon)
        lat, lon = np.broadcast_arrays(lat, lon)
        if self.kind == "box":
            return ((lat >= self.south) & (lat <= self.north)
                    & (lon >= self.west) & (lon <= self.east))
        if self.kind == "point":
            return great_circle_km(self.lat, self.lon, lat, lon) <= self.radius_km
        return np.ones(lat.shape, dtype=bool)

    def grid_mask(self, lat, lon) -> np.ndarray:
        """2-D boolean mask (lat, lon) of the grid points inside the region."""
        lat2d, lon2d = np.meshgrid(np.asarray(lat, float), np.asarray(lon, float),
                                   indexing="ij")
        return self.contains(lat2d, lon2d)

    def require_grid_points(self, lat, lon) -> np.ndarray:
        """:meth:`grid_mask`, raising if the region holds no grid point.

        A disc smaller than the grid spacing whose centre lies inside the
        grid's extent is represented by its nearest grid point.
        """
        mask = self.grid_mask(lat, lon)
        if mask.any():
            return mask
        lat = np.asarray(lat, float)
        lon = _normalise_lon(lon)
        if (self.kind == "point" and lat.min() <= self.lat <= lat.max()
                and lon.min() <= self.lon <= lon.max()):
            lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
            distance = great_circle_km(self.lat, self.lon, lat2d, lon2d)
            mask.flat[np.argmin(distance)] = True
            return mask
        raise _region_error(
            "a region holding at least one grid point (the grid covers lat "
            f"{lat.min():g} to {lat.max():g}, lon {lon.min():g} to {lon.max():g})", self.label())


# --------------------------------------------------------------------------
# Counts
# --------------------------------------------------------------------------

def _as_days(days) -> pd.DatetimeIndex:
    index = pd.DatetimeIndex(pd.to_datetime(np.asarray(days).ravel()))
    if index.tz is not None:
        index = index.tz_convert(None)
    return index.normalize().astype("datetime64[ns]").rename("day")


def _event_days(events: pd.DataFrame) -> pd.Series:
    if "day" in events.columns:
        return pd.to_datetime(events["day"]).astype("datetime64[ns]")
    return convective_day(events["time"])


def _select_kinds(events: pd.DataFrame, kinds, owner: str):
    known = sorted(set(events["kind"].drop_duplicates().astype(str)))
    if kinds is None:
        return known
    if isinstance(kinds, str):
        kinds = [kinds]
    wanted = [str(k).strip().lower() for k in kinds]
    unknown = [k for k in wanted if k not in known]
    if unknown:
        raise ParameterError("kinds", owner, "kinds of the events table ("
                             + (", ".join(repr(k) for k in known) or "it has none") + ")",
                             unknown[0] if len(unknown) == 1 else unknown)
    return sorted(set(wanted))


def daily_event_counts(events: pd.DataFrame, days, region: Region | None = None,
                       kinds=None) -> pd.DataFrame:
    """Number of events inside ``region`` on each convective day.

    Parameters
    ----------
    events : DataFrame from :func:`read_events`.
    days : dates (any time of day is dropped: the convective day D).
    region : :class:`Region` or None for the whole domain.
    kinds : kinds to count (default: every kind in ``events``).

    Returns
    -------
    DataFrame indexed by ``days`` (DatetimeIndex named ``day``, duplicates and
    order kept), one integer column per kind (sorted) and ``total`` (the sum
    of the kind columns).
    """
    index = _as_days(days)
    selected = _select_kinds(events, kinds, "daily_event_counts")
    region = Region.whole() if region is None else region
    inside = region.contains(events["lat"].to_numpy(), events["lon"].to_numpy())
    chosen = inside & events["kind"].isin(selected).to_numpy()
    event_days = _event_days(events)[chosen].to_numpy(dtype="datetime64[ns]")
    kind_codes = pd.Categorical(events["kind"].to_numpy()[chosen], categories=selected).codes
    # Each event's place among the distinct days asked for, counted by one bincount
    # (pandas' crosstab took a tenth of a 40-year build's skill step); an event on a day
    # not asked for, or without a day, is not counted.
    distinct, row_of = np.unique(index.to_numpy(), return_inverse=True)
    place = np.searchsorted(distinct, event_days)
    found = place < distinct.size
    found[found] = distinct[place[found]] == event_days[found]
    cells = np.bincount(place[found] * len(selected) + kind_codes[found],
                        minlength=distinct.size * len(selected))
    counts = pd.DataFrame(cells.reshape(distinct.size, len(selected))[row_of.ravel()],
                          index=index, columns=selected, dtype=np.int64)
    counts["total"] = counts[selected].sum(axis=1).astype(np.int64)
    counts.index = index
    return counts


# --------------------------------------------------------------------------
# Probabilities and intervals
# --------------------------------------------------------------------------

def binomial_interval(successes, trials, confidence=0.9, method="clopper-pearson"):
    """Two-sided confidence interval for a binomial proportion.

    Parameters
    ----------
    successes, trials : number(s); ``successes`` may be non-integer (an
        effective count ``p * n_eff`` for weighted samples, Kish 1965).
    confidence : two-sided level in (0, 1).
    method : ``"clopper-pearson"`` (exact, Clopper & Pearson 1934):
        :math:`[B(\\alpha/2; k, n-k+1),\\ B(1-\\alpha/2; k+1, n-k)]`;
        ``"jeffreys"`` (Brown et al. 2001): quantiles of
        Beta(k + 1/2, n - k + 1/2); ``"wilson"`` score interval (Wilson 1927),
        :math:`\\frac{\\hat p + z^2/2n \\pm z\\sqrt{\\hat p(1-\\hat p)/n + z^2/4n^2}}{1+z^2/n}`.
        For every method the lower bound is 0 when k = 0 and the upper
        bound 1 when k = n (Brown et al. 2001 for Jeffreys), and the interval
        is widened where needed to hold k / n (only a non-integer Jeffreys
        count within 1/2 of 0 or n needs it).

    The Beta quantiles are :func:`beta_quantile` and the normal quantile of
    Wilson's interval the standard library's ``NormalDist.inv_cdf``: scipy is
    not imported, so a query does not pay for scipy.special's import (measured:
    about 0.2 s of a 1.2 s ``find --json``).

    Returns
    -------
    (low, high) as floats for scalar input, else arrays.
    """
    owner = "binomial_interval"
    check_float(confidence, "confidence", owner, min_value=0.0, max_value=1.0,
                min_inclusive=False, max_inclusive=False)
    check_choice(method, "method", owner, ("clopper-pearson", "jeffreys", "wilson"))
    k = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    if np.any(~np.isfinite(n)) or np.any(n <= 0):
        raise AnalogsInputError(
            f"The 'trials' parameter of {owner} must be a number > 0. Got {trials!r} instead.")
    if np.any(~np.isfinite(k)) or np.any(k < 0) or np.any(k > n):
        raise AnalogsInputError(
            f"The 'successes' parameter of {owner} must be a number in [0, trials]. "
            f"Got {successes!r} instead.")
    alpha = 1.0 - confidence
    if method == "wilson":
        from statistics import NormalDist  # the standard normal quantile (Wichura 1988)
        z = NormalDist().inv_cdf(1.0 - alpha / 2.0)
        p = k / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
        low, high = centre - half, centre + half
    elif method == "jeffreys":
        low = beta_quantile(alpha / 2, k + 0.5, n - k + 0.5)
        high = beta_quantile(1 - alpha / 2, k + 0.5, n - k + 0.5)
    else:
        low = beta_quantile(alpha / 2, k, n - k + 1)
        high = beta_quantile(1 - alpha / 2, k + 1, n - k)
    low = np.where(k <= 0, 0.0, np.clip(np.minimum(low, k / n), 0.0, 1.0))
    high = np.where(k >= n, 1.0, np.clip(np.maximum(high, k / n), 0.0, 1.0))
    if np.ndim(low) == 0:
        return float(low), float(high)
    return low, high


#: Relative step at which :func:`beta_quantile`'s Newton iterations stop, and the
#: tolerance of the continued fraction of :func:`regularized_beta` (a few units in the
#: last place of a float64).
_BETA_TOLERANCE = 4 * sys.float_info.epsilon
#: Terms of the continued fraction before it is declared not converging (it needs
#: about sqrt(max(a, b)) terms: a few dozen for the counts of a query).
_BETA_MAX_TERMS = 10_000


def regularized_beta(x: float, a: float, b: float) -> float:
    """The regularized incomplete beta function I_x(a, b), the Beta(a, b) CDF at x
    (dimensionless; a, b > 0, 0 <= x <= 1).

    Evaluated by its continued fraction (DLMF 8.17.22; Press et al. 2007, Numerical
    Recipes 3rd ed., section 6.4) with the modified Lentz algorithm (Thompson &
    Barnett 1986), on the side of the symmetry I_x(a, b) = 1 - I_{1-x}(b, a)
    (DLMF 8.17.4) where it converges fast: x < (a + 1) / (a + b + 2).
    """
    if x <= 0.0:
        return 0.0
    if x >= 1.0:
        return 1.0
    if x > (a + 1.0) / (a + b + 2.0):
        return 1.0 - regularized_beta(1.0 - x, b, a)
    log_front = (a * math.log(x) + b * math.log1p(-x)
                 - (math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)))
    tiny = 1e-300
    numerator, denominator = 1.0, 1.0 - (a + b) * x / (a + 1.0)  # Lentz's C and D
    denominator = 1.0 / (denominator if abs(denominator) > tiny else tiny)
    fraction = denominator
    for m in range(1, _BETA_MAX_TERMS):
        # d_{2m} then d_{2m+1} of DLMF 8.17.22
        for term in (m * (b - m) * x / ((a + 2 * m - 1.0) * (a + 2 * m)),
                     -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1.0))):
            denominator = 1.0 + term * denominator
            denominator = 1.0 / (denominator if abs(denominator) > tiny else tiny)
            numerator = 1.0 + term / numerator
            numerator = numerator if abs(numerator) > tiny else tiny
            change = numerator * denominator
            fraction *= change
        if abs(change - 1.0) < _BETA_TOLERANCE:
            return math.exp(log_front) * fraction / a
    raise ArithmeticError(f"regularized_beta({x}, {a}, {b}): continued fraction did not converge")


@functools.lru_cache(maxsize=4096)  # a batch of queries asks for the same few counts
def _beta_quantile_scalar(q: float, a: float, b: float) -> float:
    if a <= 0.0:  # the degenerate limits of Beta(a, b): all mass at 0 or at 1
        return 0.0
    if b <= 0.0:
        return 1.0
    if q <= 0.0 or q >= 1.0:
        return 0.0 if q <= 0.0 else 1.0
    log_beta = math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)
    low, high = 0.0, 1.0
    x = a / (a + b)  # the mean: a start inside the bracket
    if not 0.0 < x < 1.0:  # a or b within rounding of 0 (weighted counts): the mean is a bound
        x = 0.5
    for _ in range(200):
        excess = regularized_beta(x, a, b) - q
        if excess == 0.0:
            return x
        if excess > 0.0:
            high = x
        else:
            low = x
        density = math.exp((a - 1.0) * math.log(x) + (b - 1.0) * math.log1p(-x) - log_beta)
        step = excess / density if density > 0.0 else math.inf
        if abs(step) <= _BETA_TOLERANCE * x:
            return x - step
        guess = x - step
        if not low < guess < high:  # Newton left the bracket: bisect instead
            guess = 0.5 * (low + high)
        if high - low <= _BETA_TOLERANCE * high or guess in (low, high):
            return guess  # the bracket is at the resolution of a float
        x = guess
    return x


def beta_quantile(q, a, b):
    """The ``q`` quantile of the Beta(a, b) distribution: x with I_x(a, b) = q
    (dimensionless; arrays broadcast). a = 0 gives 0 and b = 0 gives 1 (the limits of
    the distribution), as the Clopper-Pearson bounds at k = 0 and k = n are.

    Newton's method on :func:`regularized_beta` (its derivative is the Beta density),
    kept inside a bracket of the root that every step narrows, so it falls back to
    bisection where Newton would leave it (Press et al. 2007, Numerical Recipes 3rd ed.,
    sections 6.14 and 9.4). Accurate to a few units in the last place, as the inverse
    of scipy's ``betaincinv`` it replaces (tested against it).
    """
    q, a, b = np.broadcast_arrays(*(np.asarray(value, dtype=float) for value in (q, a, b)))
    values = np.array([_beta_quantile_scalar(*point) for point in zip(q.ravel().tolist(),
                                                                       a.ravel().tolist(),
                                                                       b.ravel().tolist())])
    return float(values[0]) if q.ndim == 0 else values.reshape(q.shape)


def analog_weights(distances, scheme="equal") -> np.ndarray:
    """Similarity weights for analogs from their distances, summing to 1.

    Parameters
    ----------
    distances : 1-D array of distances >= 0 (any units: only ratios matter).
    scheme :
        * ``"equal"``: :math:`w_i = 1/n`.
        * ``"inverse_distance"``: :math:`w_i \\propto 1/(d_i + 0.1\\,\\tilde d)`,
          where :math:`\\tilde d` is the median distance; the offset keeps a
          near-zero distance from taking all the weight.
        * ``"gaussian"``: :math:`w_i \\propto \\exp(-\\tfrac12 (d_i/\\tilde d)^2)`.

        When every distance is 0 the weights are equal.

    Notes
    -----
    Weighted probabilities carry less information than ``n`` equal draws; the
    intervals for them use Kish's (1965) effective sample size
    :math:`n_{eff} = (\\sum w)^2 / \\sum w^2` (see :func:`effective_sample_size`).
    """
    owner = "analog_weights"
    check_choice(scheme, "scheme", owner, P.weights.choices)
    d = np.asarray(distances, dtype=float).ravel()
    if d.size == 0 or np.any(~np.isfinite(d)) or np.any(d < 0):
        raise AnalogsInputError(
            f"The 'distances' parameter of {owner} must be a non-empty array of finite "
            f"numbers >= 0. Got {distances!r} instead.")
    median = float(np.median(d))
    if scheme == "equal" or median == 0.0:
        weights = np.ones_like(d)
    elif scheme == "inverse_distance":
        weights = 1.0 / (d + 0.1 * median)
    else:
        weights = np.exp(-0.5 * (d / median) ** 2)
    return weights / weights.sum()


def effective_sample_size(weights) -> float:
    """Kish (1965) effective sample size :math:`(\\sum w)^2 / \\sum w^2`."""
    w = np.asarray(weights, dtype=float)
    return float(w.sum() ** 2 / np.sum(w * w))


def _check_counts(frame, name):
    if not isinstance(frame, pd.DataFrame) or "total" not in frame.columns:
        raise AnalogsInputError(
            f"The {name!r} parameter of summarize_outcomes must be a DataFrame from "
            f"daily_event_counts with a 'total' column. Got {type(frame).__name__} instead.")


def _percentile_keys(percentiles):
    return {f"{p:g}": float(p) for p in percentiles}


def _weighted_share(weights, mask):
    """Weighted fraction of True in ``mask`` (weights sum to 1), kept inside [0, 1]."""
    return float(np.clip(np.dot(weights, mask), 0.0, 1.0))


def _ratio(p, reference) -> float:
    """``p / reference``; NaN when the reference is 0 or undefined (NaN)."""
    return float(p / reference) if reference == reference and reference != 0 else math.nan


def summarize_outcomes(analog_counts: pd.DataFrame, climatology_counts: pd.DataFrame, *,
                       weights=None, min_events=(1, 3, 10), confidence=0.9,
                       percentiles=(10, 50, 90), method="clopper-pearson",
                       n_without_reports=0) -> OutcomeSummary:
    """Outcome statistics of the analog days beside the climatology.

    Parameters
    ----------
    analog_counts : :func:`daily_event_counts` of the analog days.
    climatology_counts : the same for every archive day of the season window
        (the reference).
    weights : optional analog weights (see :func:`analog_weights`), one per row
        of ``analog_counts``; adds the ``weighted`` statistics.
    min_events : thresholds M for "at least M events".
    confidence : level of the binomial intervals (two-sided).
    percentiles : count percentiles to report (0-100).
    method : interval method of :func:`binomial_interval`.
    n_without_reports : analog days left out of ``analog_counts`` because the events
        table does not cover them yet (no reports yet); recorded in the summary. With
        none covered (``analog_counts`` empty) the analogs' statistics are NaN.

    Returns
    -------
    :class:`analogs.results.OutcomeSummary`: probabilities as fractions, NaN where a
    statistic is undefined (``climatology_*`` without climatology days,
    ``ratio_to_climatology`` when the climatology is 0); ``count_percentiles`` a Series
    by percentile, ``thresholds`` a DataFrame by ``min_events`` (``p_at_least`` with
    its interval and ``climatology_p_at_least``), ``by_kind`` a DataFrame by kind
    (``p_any``, ``mean``, ``p_any_low``, ``p_any_high``, ``climatology_p_any``) and,
    with weights, ``weighted`` (:class:`analogs.results.WeightedOutcomes`). Weighted
    intervals are binomial intervals with n = Kish's effective sample size and
    k = p * n (Kish 1965). Its ``to_dict()`` is the JSON block of ``analogs find --json``.
    """
    owner = "summarize_outcomes"
    _check_counts(analog_counts, "analog_counts")
    _check_counts(climatology_counts, "climatology_counts")
    n = len(analog_counts)
    if n == 0 and not n_without_reports:
        raise AnalogsInputError(
            f"The 'analog_counts' parameter of {owner} must hold at least one analog day. "
            f"Got 0 rows instead.")
    thresholds = [int(m) for m in min_events]
    if any(m < 1 for m in thresholds):
        raise AnalogsInputError(
            f"The 'min_events' parameter of {owner} must be integers >= 1. "
            f"Got {min_events!r} instead.")
    if any(not 0 <= p <= 100 for p in percentiles):
        raise AnalogsInputError(
            f"The 'percentiles' parameter of {owner} must be numbers in [0, 100]. "
            f"Got {percentiles!r} instead.")

    kinds = sorted((set(analog_counts.columns) | set(climatology_counts.columns)) - {"total"})
    total = analog_counts["total"].to_numpy(dtype=float)
    clim_total = climatology_counts["total"].to_numpy(dtype=float)
    n_clim = len(climatology_counts)

    def interval(k):
        return binomial_interval(k, n, confidence, method) if n else (math.nan, math.nan)

    def share(mask):
        return float(np.mean(mask)) if n else math.nan

    def clim_share(values):
        return float(np.mean(values)) if n_clim else math.nan

    def kind_values(frame, kind, size):
        return frame[kind].to_numpy(float) if kind in frame else np.zeros(size)

    hits = int(np.sum(total >= 1))
    p_any = hits / n if n else math.nan
    clim_p_any = clim_share(clim_total >= 1)
    threshold_rows = [(share(total >= m), *interval(int(np.sum(total >= m))),
                       clim_share(clim_total >= m)) for m in thresholds]
    threshold_table = pd.DataFrame(
        threshold_rows, columns=["p_at_least", "p_at_least_low", "p_at_least_high",
                                 "climatology_p_at_least"],
        index=pd.Index(thresholds, name="min_events"), dtype=float)
    kind_rows = []
    for kind in kinds:
        values = kind_values(analog_counts, kind, n)
        kind_rows.append((share(values >= 1), share(values),
                          *interval(int(np.sum(values >= 1))),
                          clim_share(kind_values(climatology_counts, kind, n_clim) >= 1)))
    by_kind = pd.DataFrame(kind_rows, columns=["p_any", "mean", "p_any_low", "p_any_high",
                                               "climatology_p_any"],
                           index=pd.Index(kinds, name="kind", dtype=object), dtype=float)
    levels = list(_percentile_keys(percentiles).values())
    count_percentiles = pd.Series([float(np.percentile(total, p)) if n else math.nan
                                   for p in levels],
                                  index=pd.Index(levels, name="percentile"), name="events",
                                  dtype=float)

    weighted = None
    if weights is not None:
        w = np.asarray(weights, dtype=float).ravel()
        if w.size != n or np.any(~np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise AnalogsInputError(
                f"The 'weights' parameter of {owner} must be {n} finite numbers >= 0 with a "
                f"positive sum. Got {w.size} values instead.")
        w = w / w.sum()
        n_eff = effective_sample_size(w)
        p_w = _weighted_share(w, total >= 1)
        low, high = binomial_interval(min(p_w * n_eff, n_eff), n_eff, confidence, method)
        kind_weighted = [(_weighted_share(w, kind_values(analog_counts, kind, n) >= 1),
                          float(np.sum(w * kind_values(analog_counts, kind, n))))
                         for kind in kinds]
        weighted = WeightedOutcomes(
            n_effective=n_eff,
            p_any_event=p_w,
            # p_w * n_eff / n_eff may round one ulp away from p_w.
            p_any_event_ci=(min(low, p_w), max(high, p_w)),
            ratio_to_climatology=_ratio(p_w, clim_p_any),
            mean_events=float(np.sum(w * total)),
            p_at_least=pd.Series([_weighted_share(w, total >= m) for m in thresholds],
                                 index=pd.Index(thresholds, name="min_events"),
                                 name="p_at_least", dtype=float),
            by_kind=pd.DataFrame(kind_weighted, columns=["p_any", "mean"],
                                 index=pd.Index(kinds, name="kind", dtype=object), dtype=float),
        )
    return OutcomeSummary(
        n_analogs=n,
        p_any_event=p_any,
        p_any_event_ci=interval(hits),
        climatology_p_any_event=clim_p_any,
        n_climatology_days=n_clim,
        ratio_to_climatology=_ratio(p_any, clim_p_any),
        mean_events=share(total),
        climatology_mean_events=clim_share(clim_total),
        count_percentiles=count_percentiles,
        thresholds=threshold_table,
        by_kind=by_kind,
        confidence=float(confidence),
        interval_method=method,
        weighted=weighted,
        n_analogs_without_reports=int(n_without_reports),
    )


# --------------------------------------------------------------------------
# Spatial fields
# --------------------------------------------------------------------------

def _check_grid(lat, lon, owner):
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    for name, axis in (("lat", lat), ("lon", lon)):
        if axis.ndim != 1 or axis.size < 2 or np.any(np.diff(axis) <= 0):
            raise AnalogsInputError(
                f"The {name!r} parameter of {owner} must be a 1-D ascending array of at "
                f"least 2 degrees. Got shape {axis.shape} instead.")
    return lat, lon


def _day_weights(analog_days, weights, owner):
    days = _as_days(analog_days)
    if days.size == 0:
        raise AnalogsInputError(
            f"The 'analog_days' parameter of {owner} must hold at least one day. Got none.")
    if weights is None:
        w = np.full(days.size, 1.0 / days.size)
    else:
        w = np.asarray(weights, dtype=float).ravel()
        if w.size != days.size or np.any(~np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise AnalogsInputError(
                f"The 'weights' parameter of {owner} must be {days.size} finite numbers >= 0 "
                f"with a positive sum. Got {w.size} values instead.")
        w = w / w.sum()
    return days, w


def _events_on_days(events, days):
    """Events whose convective day is one of ``days``: (lat, lon, position in days)."""
    event_days = _event_days(events).to_numpy()
    lat = events["lat"].to_numpy(float)
    lon = _normalise_lon(events["lon"].to_numpy(float))
    rows, positions = [], []
    for position, day in enumerate(days.to_numpy()):
        idx = np.flatnonzero(event_days == day)
        rows.append(idx)
        positions.append(np.full(idx.size, position))
    rows = np.concatenate(rows) if rows else np.empty(0, int)
    positions = np.concatenate(positions) if positions else np.empty(0, int)
    return lat[rows], lon[rows], positions


def _unit_vectors(lat, lon) -> np.ndarray:
    """(n, 3) unit vectors of points at ``lat``, ``lon`` (degrees)."""
    phi, lam = np.radians(np.asarray(lat, float)), np.radians(np.asarray(lon, float))
    return np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])


def neighbourhood_probability(events, analog_days, lat, lon, radius_km=NEIGHBOURHOOD_KM,
                              weights=None) -> xr.DataArray:
    """Fraction of analog days with at least one event within ``radius_km`` of each point.

    Distances are great-circle (haversine on the sphere of
    :data:`analogs.constants.EARTH_RADIUS`, as :func:`analogs.geo.great_circle_km`),
    compared as chords between unit vectors (the chord ``2 sin(d / 2a)`` stands for the
    great-circle distance ``d``): for each event, only the grid rows within ``d / a``
    radians of latitude of it are measured (no point of another row can be as close).
    With ``weights`` (one per analog day) the fraction is the weighted share.
    A day listed twice counts twice.

    Returns
    -------
    DataArray (lat, lon), dimensionless, in [0, 1].
    """
    owner = "neighbourhood_probability"
    radius_km = check_float(radius_km, "radius_km", owner, min_value=0.0, min_inclusive=False)
    lat, lon = _check_grid(lat, lon, owner)
    days, w = _day_weights(analog_days, weights, owner)
    ev_lat, ev_lon, positions = _events_on_days(events, days)
    hit = np.zeros((days.size, lat.size, lon.size), dtype=bool)
    if ev_lat.size:
        # Plain numpy rather than a k-d tree: a report's few hundred events each meet a
        # band of a few grid rows, and importing scipy.spatial would cost more than
        # the search (measured in tests/benchmarks/bench_report.py).
        angle = min(radius_km * 1000.0 / EARTH_RADIUS, np.pi)
        limit = (2.0 * np.sin(angle / 2.0)) ** 2
        band = np.degrees(angle) + 1e-9
        phi, lam = np.radians(lat), np.radians(lon)
        row_xyz = np.stack([np.cos(phi)[:, None] * np.cos(lam)[None, :],
                            np.cos(phi)[:, None] * np.sin(lam)[None, :],
                            np.broadcast_to(np.sin(phi)[:, None], (lat.size, lon.size))])
        first = np.searchsorted(lat, ev_lat - band, side="left")
        last = np.searchsorted(lat, ev_lat + band, side="right")
        for vector, position, start, stop in zip(_unit_vectors(ev_lat, ev_lon), positions,
                                                 first, last):
            if start < stop:
                part = row_xyz[:, start:stop]
                chord2 = ((part[0] - vector[0]) ** 2 + (part[1] - vector[1]) ** 2
                          + (part[2] - vector[2]) ** 2)
                hit[position, start:stop] |= chord2 <= limit
    probability = np.tensordot(w, hit.astype(float), axes=1)
    import xarray as xr
    return xr.DataArray(
        np.clip(probability, 0.0, 1.0), dims=("lat", "lon"),
        coords={"lat": lat, "lon": lon}, name="neighbourhood_probability",
        attrs={"units": "1",
               "long_name": f"fraction of analog days with at least one event within "
                            f"{radius_km:g} km",
               "radius_km": radius_km})


def grid_event_counts(events, analog_days, lat, lon, weights=None) -> np.ndarray:
    """Events of the analog days on their nearest grid point, per analog day.

    Returns a (lat, lon) float array: the (weighted) mean over analog days of
    the number of events whose nearest grid point is each cell. Events more
    than half a grid spacing outside the grid are dropped.
    """
    owner = "grid_event_counts"
    lat, lon = _check_grid(lat, lon, owner)
    days, w = _day_weights(analog_days, weights, owner)
    ev_lat, ev_lon, positions = _events_on_days(events, days)
    dlat, dlon = np.mean(np.diff(lat)), np.mean(np.diff(lon))
    inside = ((ev_lat >= lat[0] - dlat / 2) & (ev_lat <= lat[-1] + dlat / 2)
              & (ev_lon >= lon[0] - dlon / 2) & (ev_lon <= lon[-1] + dlon / 2))
    i = np.abs(ev_lat[inside, None] - lat[None, :]).argmin(axis=1)
    j = np.abs(ev_lon[inside, None] - lon[None, :]).argmin(axis=1)
    counts = np.zeros((lat.size, lon.size))
    np.add.at(counts, (i, j), w[positions[inside]])
    return counts


def gaussian_sigma_grid(lat, lon, sigma_km):
    """Gaussian sigma in grid units (lat, lon) for a sigma of ``sigma_km``.

    The grid spacing in km is taken at the mean latitude of the grid:
    :math:`\\Delta y = \\Delta\\phi\\,\\pi a/180` and
    :math:`\\Delta x = \\Delta\\lambda\\,\\pi a/180\\,\\cos\\bar\\phi`,
    so the smoothing is isotropic in km near the middle of the domain and
    slightly anisotropic towards its poleward and equatorward edges.
    """
    dlat = float(np.mean(np.diff(lat)))
    dlon = float(np.mean(np.diff(lon)))
    cos_mean = max(math.cos(math.radians(float(np.mean(lat)))), 1e-6)
    return sigma_km / (dlat * _KM_PER_DEGREE), sigma_km / (dlon * _KM_PER_DEGREE * cos_mean)


def gaussian_smooth(values, sigma, truncate: float = 4.0) -> np.ndarray:
    """``values`` (2-D) smoothed by a separable Gaussian of ``sigma`` (grid units, one
    per axis), outside the array counting as zero; float64.

    The kernel and the arithmetic of ``scipy.ndimage.gaussian_filter(values, sigma,
    mode="constant", cval=0.0, truncate=truncate)`` (scipy 1.x, ``_gaussian_kernel1d``
    and ``NI_Correlate1D``'s symmetric branch: radius ``int(truncate * sigma + 0.5)``,
    weights ``exp(-x^2 / 2 sigma^2)`` normalised to sum 1, each output the centre term
    plus the pairs of taps from the outermost in), so the values are the same to the
    last bit (tests/test_outcomes.py); numpy alone, because importing scipy.ndimage
    cost a report more than its smoothing (0.3 s).
    """
    out = np.array(values, dtype=np.float64)
    for axis, axis_sigma in enumerate(sigma):
        axis_sigma = float(axis_sigma)
        if axis_sigma <= 1e-15:  # scipy leaves such an axis alone
            continue
        radius = int(truncate * axis_sigma + 0.5)
        taps = np.arange(-radius, radius + 1)
        weights = np.exp(-0.5 / (axis_sigma * axis_sigma) * taps ** 2)
        weights = weights / weights.sum()
        line = np.moveaxis(out, axis, -1)
        n = line.shape[-1]
        padded = np.zeros(line.shape[:-1] + (n + 2 * radius,))
        padded[..., radius:radius + n] = line
        smoothed = padded[..., radius:radius + n] * weights[radius]
        for k in range(radius, 0, -1):
            smoothed += (padded[..., radius - k:radius - k + n]
                         + padded[..., radius + k:radius + k + n]) * weights[radius - k]
        out = np.moveaxis(smoothed, -1, axis)
    return np.ascontiguousarray(out)


def report_density(events, analog_days, lat, lon, sigma_km=PRACTICALLY_PERFECT_SIGMA_KM,
                   weights=None) -> xr.DataArray:
    """Smoothed density of events per analog day, as a practically perfect hindcast.

    Events of the analog days are counted on their nearest grid point
    (:func:`grid_event_counts`), averaged over the analog days, and smoothed
    by a 2-D Gaussian of ``sigma_km`` (Brooks et al. 1998, sigma about 120 km;
    from memory) as ``scipy.ndimage.gaussian_filter`` smooths (:func:`gaussian_smooth`),
    with sigma in grid units from :func:`gaussian_sigma_grid` (the longitude sigma is scaled by
    1/cos of the grid's mean latitude). Outside the grid counts as zero
    (``mode="constant"``), so mass that spreads past the edges is lost; away
    from the edges the total is conserved.

    Units: events per grid cell per analog day (dimensionless, "1").
    """
    owner = "report_density"
    sigma_km = check_float(sigma_km, "sigma_km", owner, min_value=0.0, min_inclusive=False)
    lat, lon = _check_grid(lat, lon, owner)
    counts = grid_event_counts(events, analog_days, lat, lon, weights=weights)
    sigma = gaussian_sigma_grid(lat, lon, sigma_km)
    density = gaussian_smooth(counts, sigma)
    import xarray as xr
    return xr.DataArray(
        density, dims=("lat", "lon"), coords={"lat": lat, "lon": lon},
        name="report_density",
        attrs={"units": "1",
               "long_name": f"events per grid cell per analog day, Gaussian-smoothed "
                            f"(sigma {sigma_km:g} km)",
               "sigma_km": sigma_km})


def outcome_maps(events, analog_days, lat, lon, *, radius_km=NEIGHBOURHOOD_KM,
                 sigma_km=PRACTICALLY_PERFECT_SIGMA_KM, weights=None) -> xr.Dataset:
    """Neighbourhood probability and report density of the analog days, CF-labelled.

    Returns a Dataset on (lat, lon) with ``neighbourhood_probability`` and
    ``report_density`` (see those functions), CF coordinate attributes and
    global attributes (``Conventions``, ``title``, ``source``, the analog days).
    """
    days = _as_days(analog_days)
    probability = neighbourhood_probability(events, days, lat, lon, radius_km, weights)
    density = report_density(events, days, lat, lon, sigma_km, weights)
    import xarray as xr

    from analogs.stages.cf import label_coordinates
    ds = xr.Dataset({"neighbourhood_probability": probability, "report_density": density})
    ds = label_coordinates(ds, replace=True)
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": "Outcome maps of analog days",
        "source": f"analogs {__version__}",
        "n_analog_days": int(days.size),
        "analog_days": " ".join(days.strftime("%Y-%m-%d")),
        "comment": "Guidance only: statistics of past analog days, not a forecast.",
    }
    return ds


# --------------------------------------------------------------------------
# Tropical-cyclone-relative composites
# --------------------------------------------------------------------------

#: Earth-relative quadrants by initial bearing from the centre (deg clockwise from north).
EARTH_QUADRANTS = ("NE", "SE", "SW", "NW")
#: Motion-relative quadrants by bearing relative to the heading of the centre.
MOTION_QUADRANTS = ("front_right", "rear_right", "rear_left", "front_left")


def cyclone_relative_composite(events: pd.DataFrame, centres: pd.DataFrame, *,
                               distance_bins_km=(0, 200, 400, 600, 800, 1000), kinds=None,
                               frame="earth") -> pd.DataFrame:
    """Events binned by quadrant and distance around tropical-cyclone centres.

    Each event is attached to the nearest centre on its convective day (no
    event is counted twice); events on days without a centre or beyond the
    last distance edge are left out. The quadrant comes from the initial
    great-circle bearing from the centre to the event
    (:func:`analogs.geo.initial_bearing_deg`), in [0, 360) clockwise from north:

    * ``frame="earth"``: NE = [0, 90), SE = [90, 180), SW = [180, 270),
      NW = [270, 360). Tropical-cyclone tornadoes favour the NE quadrant in
      this frame (McCaul 1991, from memory).
    * ``frame="motion"``: the bearing is taken relative to the heading
      ``motion_dir_deg`` (the direction the centre moves *towards*, deg
      clockwise from north; not the meteorological "from" convention):
      front_right = [0, 90), rear_right = [90, 180), rear_left = [180, 270),
      front_left = [270, 360).

    Parameters
    ----------
    events : DataFrame from :func:`read_events`.
    centres : DataFrame with ``day``, ``lat``, ``lon`` (degrees) and, for the
        motion frame, ``motion_dir_deg``; several centres a day are allowed.
    distance_bins_km : increasing bin edges in km (left-closed bins).
    kinds : kinds to composite separately (default every kind present).
    frame : ``"earth"`` or ``"motion"``.

    Returns
    -------
    DataFrame indexed by (kind, quadrant), kind ``"all"`` first then each
    kind; one integer column per distance bin (``"0-200 km"``...), ``total``
    and ``share`` (the quadrant's fraction of that kind's events, 0 when it
    has none). ``attrs`` hold ``frame``, ``n_centres`` and ``n_events``.
    """
    owner = "cyclone_relative_composite"
    check_choice(frame, "frame", owner, ("earth", "motion"))
    edges = np.asarray(distance_bins_km, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or edges[0] < 0 or np.any(np.diff(edges) <= 0):
        raise AnalogsInputError(
            f"The 'distance_bins_km' parameter of {owner} must be at least two increasing "
            f"edges >= 0. Got {distance_bins_km!r} instead.")
    needed = ["day", "lat", "lon"] + (["motion_dir_deg"] if frame == "motion" else [])
    missing = [c for c in needed if c not in centres.columns]
    if missing:
        raise AnalogsInputError(
            f"The 'centres' parameter of {owner} needs column(s) {', '.join(missing)}"
            f"{' for frame=motion' if 'motion_dir_deg' in missing else ''}.")
    selected = _select_kinds(events, kinds, owner)
    quadrants = EARTH_QUADRANTS if frame == "earth" else MOTION_QUADRANTS
    labels = [f"{lo:g}-{hi:g} km" for lo, hi in zip(edges[:-1], edges[1:])]

    centre_days = _as_days(centres["day"]).to_numpy()
    c_lat = centres["lat"].to_numpy(float)
    c_lon = _normalise_lon(centres["lon"].to_numpy(float))
    c_dir = (centres["motion_dir_deg"].to_numpy(float) if frame == "motion"
             else np.zeros(len(centres)))
    event_days = _event_days(events).to_numpy()
    e_lat = events["lat"].to_numpy(float)
    e_lon = _normalise_lon(events["lon"].to_numpy(float))
    e_kind = events["kind"].to_numpy().astype(str)

    n_events = len(events)
    if len(centres):
        # Distance from every event to every centre; centres of other days are out of reach.
        distance = great_circle_km(e_lat[:, None], e_lon[:, None],
                                   c_lat[None, :], c_lon[None, :])
        distance = np.where(event_days[:, None] == centre_days[None, :], distance, np.inf)
        nearest = distance.argmin(axis=1)
        dist = distance[np.arange(n_events), nearest]
        bearing = initial_bearing_deg(c_lat[nearest], c_lon[nearest], e_lat, e_lon)
        relative = (bearing - c_dir[nearest]) % 360.0
    else:
        dist = np.full(n_events, np.inf)
        relative = np.zeros(n_events)
    quadrant = np.minimum((relative // 90.0).astype(int), 3)
    dist_bin = np.searchsorted(edges, dist, side="right") - 1
    usable = (np.isfinite(dist) & (dist_bin >= 0) & (dist_bin < len(labels))
              & np.isin(e_kind, selected))

    rows = []
    for kind in ["all", *selected]:
        chosen = usable if kind == "all" else usable & (e_kind == kind)
        table = np.zeros((4, len(labels)), dtype=np.int64)
        np.add.at(table, (quadrant[chosen], dist_bin[chosen]), 1)
        totals = table.sum(axis=1)
        shares = totals / totals.sum() if totals.sum() else np.zeros(4)
        for q, name in enumerate(quadrants):
            rows.append({"kind": kind, "quadrant": name,
                         **dict(zip(labels, table[q].tolist())),
                         "total": int(totals[q]), "share": float(shares[q])})
    result = pd.DataFrame(rows).set_index(["kind", "quadrant"])
    result.attrs = {"frame": frame, "n_centres": int(len(centres)),
                    "n_events": int(usable.sum())}
    return result
