"""Seasonal climatology of regimes and what they bring, for training and briefings.

Pure functions on the tags table (one row a day: ``regime``, ``confidence``, the
diagnostics; indexed by date, as :attr:`analogs.api.AnalogStore.tags`) and the daily
event counts of :func:`analogs.stages.outcomes.daily_event_counts`; pandas / xarray out.
:func:`build_climatology` writes all of it (tables, composites, figures and one HTML
page) for ``analogs climatology``.

>>> from analogs.api import AnalogStore                          # doctest: +SKIP
>>> from analogs.stages.seasonal import build_climatology, parse_months # doctest: +SKIP
>>> build_climatology(AnalogStore.load("store"), "clim", months=parse_months("5-9"))
"""

from __future__ import annotations

import calendar
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

from analogs import __version__
from analogs.errors import AnalogsInputError
from analogs.stages.outcomes import binomial_interval, daily_event_counts
from analogs.stages.regimes import REGIME_LABELS

#: Least spacing, in days, between two typical days of one regime (distinct cases).
TYPICAL_DAY_SEPARATION = 7
#: Days of climatology predicted at once when averaging it over many days (memory bound).
_CLIMATOLOGY_CHUNK_DAYS = 1000


# --------------------------------------------------------------------------- inputs

def parse_months(text) -> tuple[int, ...]:
    """Months of a season from text: ``"5-9"`` (May to September), ``"11-3"`` (wraps
    the year end), ``"6,7,8"`` or a mix ``"4,6-8"``. Returns sorted unique months.

    Raises AnalogsInputError naming the ``--season`` option when the text is not that.
    """
    expected = "months 1-12 as M-N or M,N,... (e.g. 5-9)"
    months = set()
    try:
        for part in str(text).split(","):
            part = part.strip()
            if "-" in part:
                first, last = (int(v) for v in part.split("-"))
                if not (1 <= first <= 12 and 1 <= last <= 12):
                    raise ValueError(part)
                span = (last - first) % 12
                months.update((first - 1 + step) % 12 + 1 for step in range(span + 1))
            else:
                month = int(part)
                if not 1 <= month <= 12:
                    raise ValueError(part)
                months.add(month)
    except ValueError:
        raise AnalogsInputError(f"--season {text!r}: expected {expected}") from None
    return tuple(sorted(months))


def _check_months(months, owner: str) -> tuple[int, ...] | None:
    if months is None:
        return None
    if isinstance(months, str):
        return parse_months(months)
    values = tuple(sorted({int(m) for m in np.atleast_1d(months)}))
    if not values or values[0] < 1 or values[-1] > 12:
        raise AnalogsInputError(
            f"The 'months' parameter of {owner} must be months in 1-12. Got {months!r} instead.")
    return values


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


# --------------------------------------------------------------------- frequencies

def _frequency(tags: pd.DataFrame, key: pd.Index, name: str) -> pd.DataFrame:
    regimes = _regimes_of(tags)
    counts = pd.crosstab(key.rename(name), tags["regime"].astype(str).to_numpy())
    counts = counts.reindex(columns=regimes, fill_value=0)
    totals = counts.sum(axis=1)
    table = counts.stack().rename("days").reset_index()
    table.columns = [name, "regime", "days"]
    table["days_tagged"] = table[name].map(totals).astype(np.int64)
    table["fraction"] = table["days"] / table["days_tagged"]
    table["days"] = table["days"].astype(np.int64)
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
    ``days`` of a month add up to it) and ``fraction`` = days / days_tagged.
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

    The yearly series is the fraction of tagged days of the season in the regime
    (:func:`regime_frequency_by_year`), so a partly covered year counts like a
    full one. Two tests of "no trend" are reported side by side:

    - ordinary least squares of the fraction on the year, its slope given as days per
      decade (slope x days in the season x 10) with the two-sided p-value of the
      t-test of zero slope (the test of ``scipy.stats.linregress``);
    - Kendall's tau between year and fraction with its two-sided p-value
      (``scipy.stats.kendalltau``, tau-b with ties; the Mann-Kendall trend test, which
      needs no normality and is robust to an outlying year).

    Returns
    -------
    DataFrame indexed by regime: ``n_years``, ``mean_days_per_season``,
    ``slope_days_per_decade``, ``slope_stderr_days_per_decade``, ``p_value``
    (least squares), ``kendall_tau``, ``kendall_p_value``. Fewer than 3 years give NaN.

    References: Wilks, *Statistical Methods in the Atmospheric Sciences* (regression
    slope t-test); Mann (1945) and Kendall (1975) for the rank trend test.
    """
    by_year = regime_frequency_by_year(tags, months)
    days = season_days(months)
    rows = {}
    for regime, part in by_year.groupby("regime", sort=False):
        years = part["year"].to_numpy(dtype=float)
        fraction = part["fraction"].to_numpy(dtype=float)
        row = {"n_years": int(years.size), "mean_days_per_season": float(fraction.mean() * days)}
        if years.size >= 3 and np.ptp(fraction) > 0:
            fit = stats.linregress(years, fraction)
            tau = stats.kendalltau(years, fraction)
            row.update(slope_days_per_decade=float(fit.slope * days * 10.0),
                       slope_stderr_days_per_decade=float(fit.stderr * days * 10.0),
                       p_value=float(fit.pvalue), kendall_tau=float(tau.statistic),
                       kendall_p_value=float(tau.pvalue))
        elif years.size >= 3:
            # A constant series: no trend and nothing to test.
            row.update(slope_days_per_decade=0.0, slope_stderr_days_per_decade=0.0,
                       p_value=1.0, kendall_tau=np.nan, kendall_p_value=1.0)
        else:
            row.update(slope_days_per_decade=np.nan, slope_stderr_days_per_decade=np.nan,
                       p_value=np.nan, kendall_tau=np.nan, kendall_p_value=np.nan)
        rows[regime] = row
    return pd.DataFrame.from_dict(rows, orient="index").rename_axis("regime")


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


def regime_composites(store, months=None, *, files=None) -> xr.Dataset:
    """Mean fields of the days of each regime: anomalies and the full field.

    Without ``files`` the anomalies are those the store keeps: each day's anomaly
    projected on the kept EOFs, ``store.eof.reconstruct(pcs)``. Since the
    reconstruction is affine in the PCs, the mean of the days' reconstructions equals
    the reconstruction of their mean PCs, which is what is computed (no day-by-day
    fields in memory). With ``files`` (the archive, as for ``build``) the anomalies are
    the archive's own (climatology removed, nothing truncated).

    Returns
    -------
    Dataset with dims ``(regime, lat, lon)``: ``<field>_anomaly`` and ``<field>_mean``
    (climatology of the regime's days plus the mean anomaly) for each field of the
    store, in the field's units, and ``n_days (regime)``; CF attributes; a regime
    with no day is NaN.
    """
    owner = "regime_composites"
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags: composites need them "
                                "(rebuild the store)")
    months = _check_months(months, owner)
    tags = _check_tags(store.tags, owner, months)
    regimes = _regimes_of(tags)
    row_of_day = pd.Series(np.arange(len(store.days)), index=store.days)
    archive = None
    if files is not None:
        from analogs.stages.sources import open_archive, regrid_to
        lat, lon = store.grid
        archive = regrid_to(open_archive(files, fields=store.fields, progress=False)[store.fields],
                            lat, lon)
        archive_days = pd.DatetimeIndex(archive["time"].values).normalize()
    anomalies, means, n_days = [], [], []
    for regime in regimes:
        days = tags.index[tags["regime"].astype(str).to_numpy() == regime]
        days = days[days.isin(row_of_day.index)]
        n_days.append(len(days))
        if len(days) == 0:
            anomalies.append(None)
            means.append(None)
            continue
        rows = row_of_day.loc[days].to_numpy()
        climate = _mean_climatology(store.climatology, store.times[rows])[store.fields]
        if archive is None:
            anomaly = store.eof.reconstruct(store.pcs.isel(time=rows).mean("time"))
        else:
            # Select by calendar day but keep the valid time: the climatology is a
            # smooth function of the time of year, hour included.
            chosen = archive.isel(time=np.flatnonzero(archive_days.isin(days)))
            anomaly = store.climatology.transform(chosen).mean("time")
        anomaly = anomaly[store.fields].drop_vars([c for c in anomaly.coords
                                                  if c not in ("lat", "lon")])
        anomalies.append(anomaly)
        means.append(climate.drop_vars([c for c in climate.coords if c not in ("lat", "lon")])
                     + anomaly)
    template = next((a for a in anomalies if a is not None), None)
    if template is None:
        raise AnalogsInputError(f"The 'months' parameter of {owner} keeps no tagged day "
                                f"of store {store.path}. Got {months!r} instead.")
    blank = xr.full_like(template, np.nan)
    anomaly_ds = xr.concat([a if a is not None else blank for a in anomalies], dim="regime")
    mean_ds = xr.concat([m if m is not None else blank for m in means], dim="regime")
    method = ("archive anomalies (climatology removed)" if archive is not None else
              f"anomalies projected on the {store.eof.n_modes_} kept EOFs")
    out = xr.Dataset(coords={"regime": ("regime", regimes, {"long_name": "weather regime"}),
                             "lat": template["lat"], "lon": template["lon"]})
    season = season_label(months)
    for field in store.fields:
        units = template[field].attrs.get("units", "")
        name = template[field].attrs.get("long_name", field).removesuffix(" anomaly")
        out[f"{field}_anomaly"] = anomaly_ds[field].assign_attrs(
            units=units, long_name=f"mean {name} anomaly of the regime's days ({method})")
        out[f"{field}_mean"] = mean_ds[field].assign_attrs(
            units=units, long_name=f"mean {name} of the regime's days (climatology plus mean "
                                   "anomaly)")
    out["n_days"] = ("regime", np.asarray(n_days, dtype=np.int64),
                     {"long_name": "number of tagged days of the regime", "units": "1"})
    out["lat"].attrs = {"standard_name": "latitude", "long_name": "latitude",
                        "units": "degrees_north", "axis": "Y"}
    out["lon"].attrs = {"standard_name": "longitude", "long_name": "longitude",
                        "units": "degrees_east", "axis": "X"}
    out.attrs = {"Conventions": "CF-1.8", "title": "Regime composites",
                 "source": f"analogs {__version__}", "composite_method": method,
                 "season": season, "store": str(store.path),
                 "comment": "Means over tagged archive days; guidance, not a forecast."}
    return out


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
    end of a season when ``tags`` is restricted to some months) ends a run.

    Returns
    -------
    DataFrame indexed by regime: ``n_runs``, ``mean_days``, ``median_days``,
    ``p90_days`` (90th percentile, linear interpolation as ``numpy.percentile``),
    ``max_days``; NaN for a regime that never occurs.
    """
    tags = _check_tags(tags, "regime_persistence")
    runs = regime_runs(tags)
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
    return pd.DataFrame.from_dict(rows, orient="index").rename_axis("regime")


def typical_days(tags, n=5, *, separation=TYPICAL_DAY_SEPARATION) -> pd.DataFrame:
    """A few example days of each regime for case studies: its most confident days,
    each at least ``separation`` days from the others chosen (distinct cases).

    Returns one row per chosen day: ``regime``, ``rank``, ``date``, ``confidence`` and
    ``reason`` (when the tags have it), best first within each regime.
    """
    owner = "typical_days"
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise AnalogsInputError(f"The 'n' parameter of {owner} must be an integer >= 1. "
                                f"Got {n!r} instead.")
    tags = _check_tags(tags, owner)
    if "confidence" not in tags.columns:
        raise AnalogsInputError(f"The 'tags' parameter of {owner} needs a 'confidence' column.")
    rows = []
    for regime in _regimes_of(tags):
        part = tags[tags["regime"].astype(str) == regime]
        part = part.sort_values("confidence", ascending=False, kind="stable")
        chosen = []
        for day, row in part.iterrows():
            if all(abs((day - other).days) >= separation for other in chosen):
                chosen.append(day)
                rows.append({"regime": regime, "rank": len(chosen), "date": day,
                             "confidence": float(row["confidence"]),
                             "reason": str(row.get("reason", ""))})
            if len(chosen) == n:
                break
    return pd.DataFrame(rows, columns=["regime", "rank", "date", "confidence", "reason"])


# ------------------------------------------------------------------------- writing

@contextmanager
def _atomic_path(path: Path):
    """A temporary sibling of ``path`` to write; renamed over ``path`` on success."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, temporary = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    os.close(fd)
    temporary = Path(temporary)
    try:
        yield temporary
        with open(temporary, "rb") as handle:
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)


def write_table(frame: pd.DataFrame, out_dir, name: str) -> dict:
    """Write ``frame`` as ``name.csv`` and ``name.parquet`` atomically; return the paths."""
    out_dir = Path(out_dir)
    paths = {}
    for suffix in ("csv", "parquet"):
        path = out_dir / f"{name}.{suffix}"
        with _atomic_path(path) as temporary:
            if suffix == "csv":
                frame.to_csv(temporary, index=False, float_format="%.6g",
                             date_format="%Y-%m-%d")
            else:
                frame.to_parquet(temporary, index=False)
        paths[f"{name}.{suffix}"] = path
    return paths


def write_composites(ds: xr.Dataset, path) -> Path:
    """Write regime composites as CF NetCDF, atomically."""
    from analogs.workflows.store import write_dataset
    path = Path(path)
    with _atomic_path(path) as temporary:
        write_dataset(ds, temporary)
    return path


def _write_png(png: bytes, path: Path) -> Path:
    with _atomic_path(path) as temporary:
        temporary.write_bytes(png)
    return path


def build_climatology(store, out_dir, *, months=None, files=None, n_typical=5,
                      hindcast=True, progress=True) -> dict:
    """Everything a seasonal briefing needs, written to ``out_dir``.

    Parameters
    ----------
    store : :class:`analogs.api.AnalogStore` with tags (and events for the outcome
        tables).
    out_dir : directory to write (created).
    months : months of the season (1-12, or text such as ``"5-9"``), default all.
    files : archive files for composites of the archive's own anomalies (default: the
        store's EOF reconstruction).
    n_typical : example days per regime.
    hindcast : also run the leave-one-year-out hindcast of the store's default
        settings (restricted to ``months``) for the reliability and ROC figures.
    progress : show a progress bar over the steps.

    Returns
    -------
    dict of name -> Path of every file written; ``"index.html"`` is the report.
    """
    from tqdm.auto import tqdm

    from analogs.presentation import figures as plots
    from analogs.presentation.report import climatology_html, write_text_atomic

    owner = "build_climatology"
    months = _check_months(months, owner)
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags: the climatology needs them "
                                "(rebuild the store)")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    tags = _check_tags(store.tags, owner, months)
    if len(tags) == 0:
        raise AnalogsInputError(f"--season {months}: store {store.path} has no tagged day "
                                "in those months")
    has_events = store.events is not None
    steps = ["tables", "composites", "figures", "hindcast", "report"]
    bar = tqdm(total=len(steps), desc="climatology", disable=not progress, unit="step")
    written: dict = {}
    tables = {
        "regime_frequency_by_month": regime_frequency_by_month(tags),
        "regime_frequency_by_year": regime_frequency_by_year(tags),
        "regime_trend": regime_trend(tags, months).reset_index(),
        "regime_persistence": regime_persistence(tags).reset_index(),
        "typical_days": typical_days(tags, n_typical),
    }
    if has_events:
        counts = daily_event_counts(store.events, tags.index, store.region)
        tables["outcomes_by_regime_and_month"] = outcomes_by_regime_and_month(tags, counts)
    for name, frame in tables.items():
        written.update(write_table(frame, out_dir, name))
    bar.update()

    composites = regime_composites(store, months, files=files)
    written["regime_composites.nc"] = write_composites(composites, out_dir / "regime_composites.nc")
    bar.update()

    season = season_label(months)
    figures = [
        ("Regime of every tagged day", plots.regime_calendar(tags, title_suffix=season),
         "regime_calendar.png"),
        ("Share of days in each regime by month",
         plots.monthly_frequency_chart(tables["regime_frequency_by_month"], title_suffix=season),
         "regime_frequency_by_month.png"),
        ("Mean pattern of each regime", plots.composite_maps(composites, region=store.region),
         "regime_composites.png"),
    ]
    if has_events:
        figures.append(("Chance of at least one event by regime and month",
                        plots.outcome_chart(tables["outcomes_by_regime_and_month"],
                                            title_suffix=season),
                        "outcomes_by_regime_and_month.png"))
    bar.update()

    if hindcast and has_events and len(np.unique(store.times.year)) >= 2:
        from analogs.stages.hindcast import leave_one_year_out
        from analogs.stages.scores import roc_curve_points, reliability_table
        defaults = store.query_defaults
        forecasts = leave_one_year_out(store.pcs.values, store.times, store.observed(),
                                       top=defaults.get("top", 20),
                                       n_modes=defaults.get("n_modes"), months=months)
        p, o = forecasts["forecast"].to_numpy(), forecasts["observed"].to_numpy()
        if 0 < o.sum() < o.size:
            figures.append(("How reliable the analog probabilities have been",
                            plots.reliability_diagram(reliability_table(p, o),
                                                      title_suffix=season),
                            "reliability.png"))
            figures.append(("How well the analog probabilities separate event days",
                            plots.roc_diagram(*roc_curve_points(p, o)[:2], title_suffix=season),
                            "roc.png"))
    bar.update()

    rendered = []
    for caption, figure, filename in figures:
        png = plots.figure_png(figure)
        written[filename] = _write_png(png, out_dir / filename)
        rendered.append((caption, png))
    settings = {"store": str(store.path), "season": season,
                "months": None if months is None else list(months),
                "region": store.region.to_dict(), "days_tagged": int(len(tags)),
                "composites": composites.attrs["composite_method"],
                "trend_tests": "least-squares slope (t-test p-value) and Kendall tau "
                               "(Mann-Kendall p-value)",
                "typical_day_separation_days": TYPICAL_DAY_SEPARATION}
    page = climatology_html(tables, rendered, store.manifest, settings)
    write_text_atomic(out_dir / "index.html", page)
    written["index.html"] = out_dir / "index.html"
    bar.update()
    bar.close()
    return written


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
    "build_climatology", "outcomes_by_regime_and_month", "parse_months",
    "regime_composites", "regime_frequency_by_month", "regime_frequency_by_year",
    "regime_persistence", "regime_runs", "regime_trend", "season_days", "season_label",
    "typical_days", "write_composites", "write_table",
]
