"""Seasonal tables of regimes and what they bring: the content of the trainer's briefing.

Pure functions on the tags table (one row a day: ``regime``, ``confidence``, the
diagnostics; indexed by date, as :attr:`analogs.api.AnalogStore.tags`), the daily
event counts of :func:`analogs.stages.outcomes.daily_event_counts` and, for the regime
composites, the fitted daily climatology, EOFs and PCs; pandas / xarray out, nothing
read or written. :func:`analogs.workflows.briefing.build_briefing` gathers the inputs
from a store and writes the briefing (tables, composites, figures and one HTML page)
for ``analogs climatology``.

Statistics are in the archive's own sampling unit (:func:`archive_sampling`): days for
a daily archive; for an archive of seasonal or monthly means (eofs' ``hgt_djf.nc`` holds
one winter mean a year) counts are of *samples*, yearly means are samples per season and
trends samples per season per decade, and run lengths (persistence) are not defined
because no two samples are consecutive days.

>>> from analogs.stages.seasonal import parse_months
>>> parse_months("11-2")
(1, 2, 11, 12)
"""

from __future__ import annotations

import calendar
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

from analogs import __version__
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.stages.cf import CONVENTIONS, coordinate_attrs
from analogs.stages.outcomes import (PRACTICALLY_PERFECT_SIGMA_KM, binomial_interval,
                                     report_density)
from analogs.stages.regimes import REGIME_LABELS

#: Days of climatology predicted at once when averaging it over many days (memory bound).
_CLIMATOLOGY_CHUNK_DAYS = 1000


# --------------------------------------------------------------------------- inputs

def parse_months(text) -> tuple[int, ...]:
    """Months of a season from text: ``"5-9"`` (May to September), ``"11-3"`` (wraps
    the year end), ``"6,7,8"`` or a mix ``"4,6-8"``. Returns sorted unique months.

    Raises AnalogsInputError naming the ``--season`` option when the text is not that
    (the --season entry of :mod:`analogs.parameters`).
    """
    return P.months.check(str(text))


def _check_months(months, owner: str) -> tuple[int, ...] | None:
    return P.months.check(months, owner)


def _check_tags(tags, owner: str, months=None) -> pd.DataFrame:
    """The tags table indexed by calendar day, restricted to ``months``."""
    if not isinstance(tags, pd.DataFrame) or "regime" not in tags.columns:
        raise AnalogsInputError(
            f"The 'tags' parameter of {owner} must be a DataFrame with a 'regime' column "
            "(the store's tags). Got " + type(tags).__name__ + " instead.")
    if not isinstance(tags.index, pd.DatetimeIndex):
        if "date" not in tags.columns:
            raise AnalogsInputError(
                f"The 'tags' parameter of {owner} must be indexed by date or have a 'date' column.")
        tags = tags.set_index(pd.DatetimeIndex(pd.to_datetime(tags["date"])))
    tags = tags.set_axis(pd.DatetimeIndex(tags.index).normalize().rename("date"), axis=0)
    if tags.index.has_duplicates:
        first = tags.index[tags.index.duplicated()][0]
        raise AnalogsInputError(
            f"The 'tags' parameter of {owner} has more than one row for {first.date()}; "
            "expected one row a day.")
    tags = tags.sort_index()
    months = _check_months(months, owner)
    if months is not None:
        tags = tags[tags.index.month.isin(months)]
    return tags


def season_months(months, *, owner="season_months") -> tuple[int, ...] | None:
    """``months`` checked and sorted (text such as ``"5-9"`` is parsed); None stays None
    (all months). ``owner`` is the public function named in the error."""
    return _check_months(months, owner)


def season_tags(tags, months=None, *, owner="season_tags") -> pd.DataFrame:
    """The tags table checked, indexed by calendar day, sorted and restricted to
    ``months``. ``owner`` is the public function named in the error."""
    return _check_tags(tags, owner, months)


def _regimes_of(tags: pd.DataFrame) -> list[str]:
    """The standard labels in their usual order, then any other label found."""
    extra = sorted(set(tags["regime"].astype(str)) - set(REGIME_LABELS))
    return [*REGIME_LABELS, *extra]


def season_days(months=None) -> float:
    """Mean number of calendar days a year in ``months`` (365.25 for the whole year)."""
    months = _check_months(months, "season_days")
    if months is None:
        return 365.25
    # Mean over a leap cycle so that February counts 28.25 days.
    return float(np.mean([sum(calendar.monthrange(year, m)[1] for m in months)
                          for year in (2001, 2002, 2003, 2004)]))


# ------------------------------------------------------------------- sampling unit

#: Largest median spacing (days) between consecutive tagged dates of a daily archive.
_DAILY_SPACING_DAYS = 1.5


@dataclass(frozen=True)
class Sampling:
    """How often an archive holds a sample, for statistics in its own unit.

    Attributes
    ----------
    unit : ``"day"`` (one value a day) or ``"sample"`` (seasonal, monthly or other
        means: one sample stands for many days).
    spacing_days : median spacing between consecutive samples, days.
    per_season : days in the season (daily archives, :func:`season_days`) or the median
        number of samples a year in the season (other archives).
    consecutive_days : whether any two samples are consecutive calendar days (run
        lengths need them).
    """

    unit: str
    spacing_days: float
    per_season: float
    consecutive_days: bool

    @property
    def plural(self) -> str:
        """``"days"`` or ``"samples"``: the word of column names and headings."""
        return f"{self.unit}s"

    def describe(self) -> str:
        if self.unit == "day":
            return "daily archive: statistics in days"
        return (f"one sample every {self.spacing_days:.0f} days ({self.per_season:g} a "
                "season): statistics in samples, not days; no run lengths (no consecutive days)")

    def to_dict(self) -> dict:
        return {"unit": self.unit, "spacing_days": float(self.spacing_days),
                "per_season": float(self.per_season),
                "consecutive_days": bool(self.consecutive_days),
                "description": self.describe()}


def archive_sampling(tags, months=None) -> Sampling:
    """The sampling unit of an archive from the dates of its tags.

    Daily when the median spacing between consecutive tagged dates is at most 1.5 days
    (missing days do not change it); then ``per_season`` is the calendar days of the
    season (:func:`season_days`). Otherwise each sample is a mean over a period (one
    winter mean a year, monthly means...): ``per_season`` is the median number of
    samples a calendar year within ``months``, and statistics are counted in samples.
    """
    tags = _check_tags(tags, "archive_sampling")
    days = tags.index.unique().sort_values()
    steps = np.diff(days.values).astype("timedelta64[D]").astype(float)
    spacing = float(np.median(steps)) if steps.size else 1.0
    consecutive = bool(np.any(steps == 1.0))
    if spacing <= _DAILY_SPACING_DAYS:
        return Sampling("day", spacing, season_days(months), consecutive)
    in_season = days if months is None else days[days.month.isin(_check_months(
        months, "archive_sampling"))]
    per_year = pd.Series(1, index=in_season).groupby(in_season.year).sum()
    per_season = float(np.median(per_year)) if len(per_year) else np.nan
    return Sampling("sample", spacing, per_season, consecutive)


# --------------------------------------------------------------------- frequencies

def _frequency(tags: pd.DataFrame, key: pd.Index, name: str) -> pd.DataFrame:
    regimes = _regimes_of(tags)
    sampling = archive_sampling(tags)
    count, tagged = sampling.plural, f"{sampling.plural}_tagged"
    counts = pd.crosstab(key.rename(name), tags["regime"].astype(str).to_numpy())
    counts = counts.reindex(columns=regimes, fill_value=0)
    totals = counts.sum(axis=1)
    table = counts.stack().rename(count).reset_index()
    table.columns = [name, "regime", count]
    table[tagged] = table[name].map(totals).astype(np.int64)
    table["fraction"] = table[count] / table[tagged]
    table[count] = table[count].astype(np.int64)
    table.attrs["sampling"] = sampling.to_dict()
    return table


def regime_frequency_by_month(tags, months=None) -> pd.DataFrame:
    """How often each regime occurs in each calendar month.

    Parameters
    ----------
    tags : the tags table (indexed by date, column ``regime``).
    months : months (1-12) to keep, default all.

    Returns
    -------
    Long table, one row per (month, regime), every regime listed in every month:
    ``month``, ``regime``, ``days`` (number of tagged days of that regime in that
    calendar month, all years), ``days_tagged`` (tagged days of the month, so the
    ``days`` of a month add up to it) and ``fraction`` = days / days_tagged. On an
    archive of means (:func:`archive_sampling` unit ``"sample"``) the counts are
    ``samples`` and ``samples_tagged``; ``attrs["sampling"]`` says which.
    """
    tags = _check_tags(tags, "regime_frequency_by_month", months)
    return _frequency(tags, pd.Index(tags.index.month), "month")


def regime_frequency_by_year(tags, months=None) -> pd.DataFrame:
    """How often each regime occurs in each year (within ``months`` when given).

    Same columns as :func:`regime_frequency_by_month` with ``year`` for ``month``.
    """
    tags = _check_tags(tags, "regime_frequency_by_year", months)
    return _frequency(tags, pd.Index(tags.index.year), "year")


def regime_trend(tags, months=None) -> pd.DataFrame:
    r"""Trend of each regime's yearly frequency, with two significance tests.

    The yearly series is the fraction of tagged days (samples) of the season in the
    regime (:func:`regime_frequency_by_year`), so a partly covered year counts like a
    full one. Two tests of "no trend" are reported side by side:

    - ordinary least squares of the fraction on the year, its slope given per decade in
      the archive's sampling unit (slope x days in the season x 10 for a daily archive;
      slope x samples a season x 10 for an archive of means, :func:`archive_sampling`)
      with the two-sided p-value of the t-test of zero slope (the test of
      ``scipy.stats.linregress``);
    - Kendall's tau between year and fraction with its two-sided p-value
      (``scipy.stats.kendalltau``, tau-b with ties; the Mann-Kendall trend test, which
      needs no normality and is robust to an outlying year).

    Returns
    -------
    DataFrame indexed by regime: ``n_years``, ``mean_days_per_season``,
    ``slope_days_per_decade``, ``slope_stderr_days_per_decade``, ``p_value``
    (least squares), ``kendall_tau``, ``kendall_p_value``. Fewer than 3 years give NaN.
    On an archive of means ``days`` reads ``samples`` in the column names (one winter
    mean a year: ``mean_samples_per_season`` is at most 1). ``attrs["sampling"]``
    describes the unit.

    References: Wilks, *Statistical Methods in the Atmospheric Sciences* (regression
    slope t-test); Mann (1945) and Kendall (1975) for the rank trend test.
    """
    by_year = regime_frequency_by_year(tags, months)
    sampling = archive_sampling(tags, months)
    per_season = sampling.per_season
    unit = sampling.plural
    mean_name, slope_name = f"mean_{unit}_per_season", f"slope_{unit}_per_decade"
    stderr_name = f"slope_stderr_{unit}_per_decade"
    rows = {}
    for regime, part in by_year.groupby("regime", sort=False):
        years = part["year"].to_numpy(dtype=float)
        fraction = part["fraction"].to_numpy(dtype=float)
        row = {"n_years": int(years.size), mean_name: float(fraction.mean() * per_season)}
        if years.size >= 3 and np.ptp(fraction) > 0:
            fit = stats.linregress(years, fraction)
            tau = stats.kendalltau(years, fraction)
            row.update({slope_name: float(fit.slope * per_season * 10.0),
                        stderr_name: float(fit.stderr * per_season * 10.0),
                        "p_value": float(fit.pvalue), "kendall_tau": float(tau.statistic),
                        "kendall_p_value": float(tau.pvalue)})
        elif years.size >= 3:
            # A constant series: no trend and nothing to test.
            row.update({slope_name: 0.0, stderr_name: 0.0, "p_value": 1.0,
                        "kendall_tau": np.nan, "kendall_p_value": 1.0})
        else:
            row.update({slope_name: np.nan, stderr_name: np.nan, "p_value": np.nan,
                        "kendall_tau": np.nan, "kendall_p_value": np.nan})
        rows[regime] = row
    table = pd.DataFrame.from_dict(rows, orient="index").rename_axis("regime")
    table.attrs["sampling"] = sampling.to_dict()
    return table


# ------------------------------------------------------------------------ outcomes

def outcomes_by_regime_and_month(tags, daily_counts, *, confidence=0.9) -> pd.DataFrame:
    """What each regime brings in each month: mean event counts and P(at least one).

    Parameters
    ----------
    tags : the tags table.
    daily_counts : :func:`analogs.stages.outcomes.daily_event_counts` of the tagged days
        (indexed by day, one column per kind and ``total``).
    confidence : level of the Clopper-Pearson interval of ``p_any_event``.

    Returns
    -------
    Long table, one row per (regime, month) with at least one day: ``regime``,
    ``month``, ``n_days``, ``mean_events`` and ``p_any_event`` (share of days with at
    least one event) with ``p_any_event_low`` / ``p_any_event_high``, then
    ``mean_<kind>`` and ``p_any_<kind>`` for each kind.
    """
    owner = "outcomes_by_regime_and_month"
    tags = _check_tags(tags, owner)
    if not isinstance(daily_counts, pd.DataFrame) or "total" not in daily_counts.columns:
        raise AnalogsInputError(
            f"The 'daily_counts' parameter of {owner} must be the DataFrame of "
            "analogs.stages.outcomes.daily_event_counts (a 'total' column).")
    counts = daily_counts.set_axis(pd.DatetimeIndex(daily_counts.index).normalize(), axis=0)
    counts = counts[~counts.index.duplicated()]
    missing = tags.index.difference(counts.index)
    if len(missing):
        raise AnalogsInputError(
            f"The 'daily_counts' parameter of {owner} lacks {len(missing)} tagged day(s), "
            f"first {missing[0].date()}; count events on every tagged day.")
    counts = counts.reindex(tags.index)
    kinds = [c for c in counts.columns if c != "total"]
    frame = counts.assign(regime=tags["regime"].astype(str).to_numpy(),
                          month=tags.index.month)
    rows = []
    for (regime, month), part in frame.groupby(["regime", "month"], sort=True):
        n = len(part)
        hits = int((part["total"] > 0).sum())
        low, high = binomial_interval(hits, n, confidence)
        row = {"regime": regime, "month": int(month), "n_days": n,
               "mean_events": float(part["total"].mean()), "p_any_event": hits / n,
               "p_any_event_low": low, "p_any_event_high": high}
        for kind in kinds:
            row[f"mean_{kind}"] = float(part[kind].mean())
            row[f"p_any_{kind}"] = float((part[kind] > 0).mean())
        rows.append(row)
    order = {r: i for i, r in enumerate(_regimes_of(tags))}
    table = pd.DataFrame(rows)
    if len(table):
        table = table.sort_values(["regime", "month"], key=lambda s: s.map(order)
                                  if s.name == "regime" else s, ignore_index=True)
    table.attrs["confidence"] = confidence
    return table


# ---------------------------------------------------------------------- composites

def _mean_climatology(climatology, times) -> xr.Dataset:
    """Mean of the fitted climatology over ``times``, a few hundred days at a time."""
    total, count = None, 0
    for start in range(0, len(times), _CLIMATOLOGY_CHUNK_DAYS):
        part = climatology.predict(times[start:start + _CLIMATOLOGY_CHUNK_DAYS])
        part_sum = part.sum("time")
        total = part_sum if total is None else total + part_sum
        count += part.sizes["time"]
    return total / count


def regime_composites(tags, climatology, eof, pcs, *, months=None, anomalies=None,
                      fields=None) -> xr.Dataset:
    """Mean fields of the days of each regime: anomalies and the full field.

    Parameters
    ----------
    tags : the tags table (indexed by date, column ``regime``).
    climatology : the fitted daily climatology
        (:class:`analogs.stages.daily_climatology.HarmonicClimatology`).
    eof : the fitted :class:`analogs.stages.eof.MultivariateEOF`.
    pcs : PCs ``(time, mode)`` of the archive days (the store's scores); their ``time``
        is each day's valid time.
    months : months (1-12, or text such as ``"5-9"``) to keep, default all.
    anomalies : optional Dataset ``(time, lat, lon)`` of the archive's own anomalies
        (climatology removed, on the EOF grid). Without it the anomalies are each
        day's anomaly projected on the kept EOFs, ``eof.reconstruct(pcs)``; since the
        reconstruction is affine in the PCs, the mean of the days' reconstructions
        equals the reconstruction of their mean PCs, which is what is computed (no
        day-by-day fields in memory). With it, nothing is truncated.
    fields : fields to composite, default every field of the EOFs.

    Returns
    -------
    Dataset with dims ``(regime, lat, lon)``: ``<field>_anomaly`` and ``<field>_mean``
    (daily climatology of the regime's days plus the mean anomaly) for each field, in
    the field's units, and ``n_days (regime)``; CF attributes; a regime with no day is
    NaN.
    """
    owner = "regime_composites"
    months = _check_months(months, owner)
    tags = _check_tags(tags, owner, months)
    if not isinstance(pcs, xr.DataArray) or "time" not in pcs.dims or "mode" not in pcs.dims:
        raise AnalogsInputError(
            f"The 'pcs' parameter of {owner} must be a DataArray (time, mode) of PCs. "
            f"Got {type(pcs).__name__} instead.")
    regimes = _regimes_of(tags)
    times = pd.DatetimeIndex(pcs["time"].values)
    row_of_day = pd.Series(np.arange(len(times)), index=times.normalize())
    if anomalies is not None:
        anomaly_days = pd.DatetimeIndex(anomalies["time"].values).normalize()
    per_regime, n_days = [], []
    for regime in regimes:
        days = tags.index[tags["regime"].astype(str).to_numpy() == regime]
        days = days[days.isin(row_of_day.index)]
        n_days.append(len(days))
        if len(days) == 0:
            per_regime.append(None)
            continue
        rows = row_of_day.loc[days].to_numpy()
        climate = _mean_climatology(climatology, times[rows])
        if anomalies is None:
            anomaly = eof.reconstruct(pcs.isel(time=rows).mean("time"))
        else:
            # Select by calendar day; the anomalies keep their valid time (the daily
            # climatology is a smooth function of the time of year, hour included).
            anomaly = anomalies.isel(time=np.flatnonzero(anomaly_days.isin(days))).mean("time")
        names = list(fields) if fields is not None else list(anomaly.data_vars)
        anomaly = _plain_grid(anomaly[names])
        per_regime.append((anomaly, _plain_grid(climate[names]) + anomaly))
    template = next((pair[0] for pair in per_regime if pair is not None), None)
    if template is None:
        raise AnalogsInputError(f"The 'months' parameter of {owner} keeps no tagged day "
                                f"of the archive. Got {months!r} instead.")
    blank = xr.full_like(template, np.nan)
    anomaly_ds = xr.concat([p[0] if p is not None else blank for p in per_regime], dim="regime")
    mean_ds = xr.concat([p[1] if p is not None else blank for p in per_regime], dim="regime")
    method = ("archive anomalies (daily climatology removed)" if anomalies is not None else
              f"anomalies projected on the {eof.n_modes_} kept EOFs")
    out = xr.Dataset(coords={"regime": ("regime", regimes, {"long_name": "weather regime"}),
                             "lat": template["lat"], "lon": template["lon"]})
    for field in template.data_vars:
        units = template[field].attrs.get("units", "")
        name = template[field].attrs.get("long_name", field).removesuffix(" anomaly")
        out[f"{field}_anomaly"] = anomaly_ds[field].assign_attrs(
            units=units, long_name=f"mean {name} anomaly of the regime's days ({method})")
        out[f"{field}_mean"] = mean_ds[field].assign_attrs(
            units=units, long_name=f"mean {name} of the regime's days (daily climatology "
                                   "plus mean anomaly)")
    out["n_days"] = ("regime", np.asarray(n_days, dtype=np.int64),
                     {"long_name": "number of tagged days of the regime", "units": "1"})
    out["lat"].attrs = coordinate_attrs("lat")
    out["lon"].attrs = coordinate_attrs("lon")
    out.attrs = {"Conventions": CONVENTIONS, "title": "Regime composites",
                 "source": f"analogs {__version__}", "composite_method": method,
                 "season": season_label(months),
                 "comment": "Means over tagged archive days; guidance, not a forecast."}
    return out


def _plain_grid(ds: xr.Dataset) -> xr.Dataset:
    """``ds`` with only its lat / lon coordinates (scalar time and the like dropped)."""
    return ds.drop_vars([c for c in ds.coords if c not in ("lat", "lon")])


# --------------------------------------------------------------------- persistence

def regime_runs(tags) -> pd.DataFrame:
    """Spells of one regime on consecutive days, broken where a day is missing.

    Returns one row per run: ``regime``, ``start``, ``end``, ``length_days``.
    """
    tags = _check_tags(tags, "regime_runs")
    if len(tags) == 0:
        return pd.DataFrame({"regime": [], "start": pd.DatetimeIndex([]),
                             "end": pd.DatetimeIndex([]), "length_days": np.array([], int)})
    regime = tags["regime"].astype(str).to_numpy()
    gap = np.r_[True, np.diff(tags.index.values).astype("timedelta64[D]").astype(int) != 1]
    new_run = gap | np.r_[True, regime[1:] != regime[:-1]]
    run_id = np.cumsum(new_run) - 1
    starts = np.flatnonzero(new_run)
    lengths = np.bincount(run_id)
    return pd.DataFrame({"regime": regime[starts], "start": tags.index[starts],
                         "end": tags.index[starts + lengths - 1], "length_days": lengths})


def regime_persistence(tags) -> pd.DataFrame:
    """How long each regime lasts: statistics of its run lengths (days).

    Runs are spells on consecutive days (:func:`regime_runs`); a missing day (or the
    end of a season when ``tags`` is restricted to some months) ends a run. An archive
    without consecutive days (seasonal or monthly means) has no runs: every regime
    gets ``n_runs`` 0 and NaN, and ``attrs["note"]`` says why.

    Returns
    -------
    DataFrame indexed by regime: ``n_runs``, ``mean_days``, ``median_days``,
    ``p90_days`` (90th percentile, linear interpolation as ``numpy.percentile``),
    ``max_days``; NaN for a regime that never occurs.
    """
    tags = _check_tags(tags, "regime_persistence")
    sampling = archive_sampling(tags)
    # Run lengths need consecutive days: on an archive of means (one winter mean a
    # year) every "run" would be one sample long, which says nothing about persistence.
    daily = sampling.unit == "day" and sampling.consecutive_days
    runs = regime_runs(tags) if daily else regime_runs(tags.iloc[:0])
    rows = {}
    for regime in _regimes_of(tags):
        lengths = runs.loc[runs["regime"] == regime, "length_days"].to_numpy(dtype=float)
        if lengths.size == 0:
            rows[regime] = {"n_runs": 0, "mean_days": np.nan, "median_days": np.nan,
                            "p90_days": np.nan, "max_days": np.nan}
            continue
        rows[regime] = {"n_runs": int(lengths.size), "mean_days": float(lengths.mean()),
                        "median_days": float(np.median(lengths)),
                        "p90_days": float(np.percentile(lengths, 90)),
                        "max_days": float(lengths.max())}
    table = pd.DataFrame.from_dict(rows, orient="index").rename_axis("regime")
    table.attrs["sampling"] = sampling.to_dict()
    if not daily:
        table.attrs["note"] = ("no run lengths: the archive has no consecutive days ("
                               + sampling.describe() + ")")
    return table


# ------------------------------------------------------------------ slide tables

def yearly_regime_series(tags, months=None) -> pd.DataFrame:
    """Each regime's days per season, year by year, with its least-squares line.

    The yearly value is the regime's share of the year's tagged days in the season
    times the season's length (:func:`archive_sampling` ``per_season``): the day count
    itself for a fully tagged season, and a partly covered year is not read as a drop.
    The line is the ordinary least-squares fit of that value on the year
    (``scipy.stats.linregress``; Wilks, *Statistical Methods in the Atmospheric
    Sciences*, ch. 7), the same fit whose t-test p-value :func:`regime_trend` reports
    (scaling the series by a constant changes neither the p-value nor Kendall's tau).

    Returns
    -------
    Long table, one row per (year, regime): ``year``, ``regime``, ``days`` (tagged days
    of the regime), ``days_tagged``, ``days_per_season`` and ``fitted_days_per_season``
    (the line's value that year; NaN with fewer than 3 years or a constant series). On
    an archive of means, ``samples`` replaces ``days`` in the names.
    """
    by_year = regime_frequency_by_year(tags, months)
    sampling = archive_sampling(tags, months)
    unit = sampling.plural
    value, fitted = f"{unit}_per_season", f"fitted_{unit}_per_season"
    by_year[value] = by_year["fraction"] * sampling.per_season
    by_year[fitted] = np.nan
    for regime, part in by_year.groupby("regime", sort=False):
        years = part["year"].to_numpy(dtype=float)
        series = part[value].to_numpy(dtype=float)
        if years.size >= 3 and np.ptp(series) > 0:
            fit = stats.linregress(years, series)
            by_year.loc[part.index, fitted] = fit.intercept + fit.slope * years
    table = by_year.drop(columns="fraction")
    table.attrs["sampling"] = sampling.to_dict()
    return table


def run_length_counts(tags) -> pd.DataFrame:
    """How many spells of each length each regime had (the duration histogram).

    Spells are runs of one regime on consecutive days (:func:`regime_runs`). An
    archive without consecutive days (seasonal or monthly means) has none: the table
    is empty and ``attrs["note"]`` says why.

    Returns
    -------
    Long table: ``regime``, ``length_days`` (1 to the regime's longest spell, every
    length listed) and ``n_runs``.
    """
    tags = _check_tags(tags, "run_length_counts")
    sampling = archive_sampling(tags)
    columns = ["regime", "length_days", "n_runs"]
    if not (sampling.unit == "day" and sampling.consecutive_days):
        table = pd.DataFrame({c: pd.Series(dtype=object if c == "regime" else np.int64)
                              for c in columns})
        table.attrs["note"] = ("no run lengths: the archive has no consecutive days ("
                               + sampling.describe() + ")")
        return table
    runs = regime_runs(tags)
    parts = []
    for regime in _regimes_of(tags):
        lengths = runs.loc[runs["regime"] == regime, "length_days"].to_numpy(dtype=np.int64)
        if lengths.size == 0:
            continue
        counts = np.bincount(lengths)[1:]
        parts.append(pd.DataFrame({"regime": regime,
                                   "length_days": np.arange(1, counts.size + 1),
                                   "n_runs": counts.astype(np.int64)}))
    return (pd.concat(parts, ignore_index=True) if parts
            else pd.DataFrame({c: [] for c in columns}))


def regime_report_density(tags, events, lat, lon, *, months=None,
                          sigma_km=None) -> xr.DataArray:
    """Smoothed report density of each regime's days: events per grid cell per day.

    :func:`analogs.stages.outcomes.report_density` (events on their nearest grid point,
    averaged over the regime's days, Gaussian-smoothed; Brooks et al. 1998) of the days
    of each regime in ``tags``; pass only days with report coverage. A regime without
    days is NaN.

    Returns a DataArray ``(regime, lat, lon)``, units "1" (events per cell per day),
    with ``n_days (regime)`` as a coordinate.
    """
    tags = _check_tags(tags, "regime_report_density", months)
    sigma_km = PRACTICALLY_PERFECT_SIGMA_KM if sigma_km is None else sigma_km
    lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
    regimes = _regimes_of(tags)
    planes, n_days = [], []
    for regime in regimes:
        days = tags.index[tags["regime"].astype(str).to_numpy() == regime]
        n_days.append(len(days))
        planes.append(report_density(events, days, lat, lon, sigma_km).values if len(days)
                      else np.full((lat.size, lon.size), np.nan))
    return xr.DataArray(
        np.stack(planes), dims=("regime", "lat", "lon"),
        coords={"regime": regimes, "lat": lat, "lon": lon,
                "n_days": ("regime", np.asarray(n_days, dtype=np.int64))},
        name="report_density",
        attrs={"units": "1", "sigma_km": float(sigma_km),
               "long_name": f"events per grid cell per regime day, Gaussian-smoothed "
                            f"(sigma {sigma_km:g} km)"})


def cyclone_centred_composite(fields: xr.Dataset, centres: pd.DataFrame, *,
                              half_width_cells=10, events=None, event_days=None) -> xr.Dataset:
    """Fields averaged in a frame that moves with each day's cyclone centre.

    Each day's fields are shifted so that the grid point nearest that day's centre
    sits at offset (0, 0), then averaged offset by offset over the days whose shifted
    grid reaches it (cells beyond the archive's edge are left out, not counted as
    zero). A plain mean of lows at different places smears them into a shallow trough;
    this storm-relative compositing (as in the tropical-cyclone composites of Frank
    1977, from memory) keeps the low's depth.

    Parameters
    ----------
    fields : Dataset ``(time, lat, lon)`` on a regular grid; ``time`` is the day
        (its time of day is ignored).
    centres : DataFrame with ``day``, ``lat``, ``lon`` (degrees), one row a day; days
        without fields are ignored.
    half_width_cells : offsets from -this to +this grid cells in each direction.
    events : optional reports (``lat``, ``lon``, ``day``): each report of a centre's
        day is counted in the frame cell nearest its offset from that day's centre
        grid point, giving ``report_density``.
    event_days : days whose reports count (those with report coverage); default
        every centre day. The density is per day of these.

    Returns
    -------
    Dataset ``(dlat, dlon)``: each variable's mean (units kept), ``n_days`` (days
    reaching each offset), with ``events`` also ``report_density`` (reports per frame
    cell per cyclone day with coverage), and coordinates ``dlat`` / ``dlon`` in
    degrees from the centre; ``attrs["n_days"]`` days used.
    """
    owner = "cyclone_centred_composite"
    if isinstance(half_width_cells, bool) or not isinstance(half_width_cells, (int, np.integer)) \
            or half_width_cells < 1:
        raise AnalogsInputError(f"The 'half_width_cells' parameter of {owner} must be an "
                                f"integer >= 1. Got {half_width_cells!r} instead.")
    missing = [c for c in ("day", "lat", "lon") if c not in centres.columns]
    if missing:
        raise AnalogsInputError(f"The 'centres' parameter of {owner} needs column(s) "
                                + ", ".join(missing) + ".")
    lat, lon = fields["lat"].values.astype(float), fields["lon"].values.astype(float)
    dlat, dlon = float(np.mean(np.diff(lat))), float(np.mean(np.diff(lon)))
    k = int(half_width_cells)
    field_days = pd.DatetimeIndex(fields["time"].values).normalize()
    position = pd.Series(np.arange(len(field_days)), index=field_days)
    position = position[~position.index.duplicated()]
    centres = centres.assign(day=pd.to_datetime(centres["day"]).dt.normalize())
    centres = centres[centres["day"].isin(position.index)].drop_duplicates("day")
    names = list(fields.data_vars)
    totals = {name: np.zeros((2 * k + 1, 2 * k + 1)) for name in names}
    counts = np.zeros((2 * k + 1, 2 * k + 1))
    planes = {name: fields[name].transpose("time", "lat", "lon").values for name in names}
    for day, c_lat, c_lon in centres[["day", "lat", "lon"]].itertuples(index=False):
        t = position[day]
        i, j = int(np.abs(lat - c_lat).argmin()), int(np.abs(lon - c_lon).argmin())
        # Window rows i-k..i+k clipped to the grid, and where they land in the frame.
        i0, i1 = max(i - k, 0), min(i + k + 1, lat.size)
        j0, j1 = max(j - k, 0), min(j + k + 1, lon.size)
        frame = (slice(i0 - (i - k), i1 - (i - k)), slice(j0 - (j - k), j1 - (j - k)))
        valid = np.ones((i1 - i0, j1 - j0), dtype=bool)
        for name in names:
            window = planes[name][t, i0:i1, j0:j1]
            valid &= np.isfinite(window)
        for name in names:
            totals[name][frame] += np.where(valid, planes[name][t, i0:i1, j0:j1], 0.0)
        counts[frame] += valid
    offsets = np.arange(-k, k + 1)
    out = xr.Dataset(coords={
        "dlat": ("dlat", offsets * dlat, {"long_name": "latitude offset from the cyclone "
                                          "centre", "units": "degrees"}),
        "dlon": ("dlon", offsets * dlon, {"long_name": "longitude offset from the cyclone "
                                          "centre", "units": "degrees"})})
    with np.errstate(invalid="ignore", divide="ignore"):
        for name in names:
            out[name] = (("dlat", "dlon"), np.where(counts > 0, totals[name] / counts, np.nan),
                         dict(fields[name].attrs))
    out["n_days"] = (("dlat", "dlon"), counts.astype(np.int64),
                     {"long_name": "days reaching this offset", "units": "1"})
    if events is not None:
        covered = centres if event_days is None else centres[centres["day"].isin(
            pd.DatetimeIndex(event_days).normalize())]
        origin = covered.assign(
            lat0=lat[np.abs(lat[None, :] - covered["lat"].to_numpy(float)[:, None]).argmin(1)],
            lon0=lon[np.abs(lon[None, :] - covered["lon"].to_numpy(float)[:, None]).argmin(1)])
        origin = origin.set_index("day")
        days = pd.to_datetime(events["day"]).dt.normalize()
        on = days.isin(origin.index).to_numpy()
        base = origin.loc[days[on]]
        di = np.rint((events["lat"].to_numpy(float)[on] - base["lat0"].to_numpy()) / dlat)
        dj = np.rint((events["lon"].to_numpy(float)[on] - base["lon0"].to_numpy()) / dlon)
        keep = (np.abs(di) <= k) & (np.abs(dj) <= k)
        density = np.zeros((2 * k + 1, 2 * k + 1))
        np.add.at(density, ((di[keep] + k).astype(int), (dj[keep] + k).astype(int)), 1.0)
        out["report_density"] = (("dlat", "dlon"), density / max(len(covered), 1),
                                 {"long_name": "reports per frame cell per cyclone day",
                                  "units": "1"})
        out.attrs["n_days_with_reports"] = int(len(covered))
    out.attrs = {**out.attrs, "n_days": int(len(centres)), "method": "fields shifted to each day's "
                 "cyclone centre (nearest grid point) before averaging"}
    return out


def example_days_across_record(tags, pcs, *, n_periods=5) -> pd.DataFrame:
    """The most typical day of each regime in each period of the record.

    The record's years are split into ``n_periods`` consecutive blocks of (nearly)
    equal numbers of years; in each block, each regime's example is its day whose PC
    vector lies nearest (Euclidean distance, the analog distance) to the mean PC
    vector of all the regime's days: the regime's centroid, as in k-means (Lloyd
    1982). Chosen so, the examples spread over the whole record instead of gathering
    where the classifier happened to be most confident.

    Parameters
    ----------
    tags : the tags table (already restricted to the season when wanted).
    pcs : DataArray ``(time, mode)`` of the archive days' PCs (the store's scores).
    n_periods : blocks of years (fewer when the record has fewer years).

    Returns
    -------
    One row per (regime, period) with days: ``regime``, ``period`` (``"2001-2002"``),
    ``date``, ``distance_to_centroid`` (PC units) and ``confidence`` when tagged.
    """
    owner = "example_days_across_record"
    if isinstance(n_periods, bool) or not isinstance(n_periods, (int, np.integer)) \
            or n_periods < 1:
        raise AnalogsInputError(f"The 'n_periods' parameter of {owner} must be an integer "
                                f">= 1. Got {n_periods!r} instead.")
    tags = _check_tags(tags, owner)
    times = pd.DatetimeIndex(pcs["time"].values).normalize()
    row_of_day = pd.Series(np.arange(len(times)), index=times)
    row_of_day = row_of_day[~row_of_day.index.duplicated()]
    tags = tags[tags.index.isin(row_of_day.index)]
    vectors = np.asarray(pcs.transpose("time", "mode").values, dtype=float)
    years = np.unique(tags.index.year)
    blocks = [b for b in np.array_split(years, min(n_periods, years.size)) if b.size]
    rows = []
    for regime in _regimes_of(tags):
        part = tags[tags["regime"].astype(str).to_numpy() == regime]
        if len(part) == 0:
            continue
        own = vectors[row_of_day.loc[part.index].to_numpy()]
        distance = np.linalg.norm(own - own.mean(axis=0), axis=1)
        for block in blocks:
            inside = np.flatnonzero(np.isin(part.index.year, block))
            if inside.size == 0:
                continue
            best = inside[np.argmin(distance[inside])]
            label = f"{block[0]}" if block.size == 1 else f"{block[0]}-{block[-1]}"
            rows.append({"regime": regime, "period": label, "date": part.index[best],
                         "distance_to_centroid": float(distance[best]),
                         "confidence": float(part["confidence"].iloc[best])
                         if "confidence" in part else np.nan})
    return pd.DataFrame(rows, columns=["regime", "period", "date", "distance_to_centroid",
                                       "confidence"])


def season_label(months) -> str:
    """Short text for a season: ``"May-Sep"``, ``"Jun, Aug"`` or ``"all months"``."""
    months = _check_months(months, "season_label")
    if months is None or len(months) == 12:
        return "all months"
    names = [calendar.month_abbr[m] for m in months]
    ordered = list(months)
    # A run that wraps the year end (e.g. 11,12,1,2) reads from its first month.
    for start in range(len(ordered)):
        rotated = ordered[start:] + ordered[:start]
        if all((b - a) % 12 == 1 for a, b in zip(rotated, rotated[1:])):
            return f"{calendar.month_abbr[rotated[0]]}-{calendar.month_abbr[rotated[-1]]}"
    return ", ".join(names)


__all__ = [
    "Sampling", "archive_sampling", "outcomes_by_regime_and_month", "parse_months", "regime_composites",
    "regime_frequency_by_month", "regime_frequency_by_year", "regime_persistence",
    "regime_runs", "regime_trend", "season_days", "season_label", "season_months",
    "season_tags", "yearly_regime_series", "run_length_counts",
    "regime_report_density", "cyclone_centred_composite",
    "example_days_across_record",
]
