"""The trainer's seasonal briefing (``analogs climatology``): gather, compute, draw, write.

A workflow: it reads the store (and, when asked, the archive files), hands arrays and
tables to the pure stages of :mod:`analogs.stages.seasonal` and the figure functions of
:mod:`analogs.presentation.figures`, and writes every file through
:mod:`analogs.workflows.files`.

>>> from analogs.api import AnalogStore                                # doctest: +SKIP
>>> from analogs.workflows.briefing import build_briefing              # doctest: +SKIP
>>> build_briefing(AnalogStore.load("store"), "briefing", months="5-9")  # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs._validation import fail
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.presentation import figures as plots
from analogs.presentation import slides as draw
from analogs.presentation.briefing_page import briefing_html
from analogs.presentation.map_layers import land_lines
from analogs.stages.outcomes import daily_event_counts
from analogs.stages.seasonal import (
    archive_sampling,
    cyclone_centred_composite,
    example_days_across_record,
    outcomes_by_regime_and_month,
    regime_composites,
    regime_frequency_by_month,
    regime_frequency_by_year,
    regime_persistence,
    regime_report_density,
    regime_trend,
    run_length_counts,
    season_label,
    season_months,
    season_tags,
    yearly_regime_series,
)
from analogs.workflows import files as output
from analogs.workflows.geography import map_lines
from analogs.workflows.paths import check_output

#: The public function named in this workflow's input errors.
OWNER = "build_briefing"


def write_table(frame, out_dir, name: str) -> dict:
    """Write ``frame`` as ``name.csv`` (6 significant digits, dates as YYYY-MM-DD) and
    ``name.parquet``; return file name -> path."""
    out_dir = Path(out_dir)
    csv, parquet = out_dir / f"{name}.csv", out_dir / f"{name}.parquet"
    output.write_table(frame, csv, float_format="%.6g", date_format="%Y-%m-%d")
    output.write_table(frame, parquet)
    return {csv.name: csv, parquet.name: parquet}


def _archive_on_store_grid(store, files):
    """The archive's fields regridded to the store grid (time, lat, lon)."""
    from analogs.stages.sources import open_archive, regrid_to
    lat, lon = store.grid
    archive = open_archive(files, fields=store.fields, progress=False)[store.fields]
    return regrid_to(archive, lat, lon)


def store_regime_composites(store, months=None, *, files=None, anomalies=None):
    """:func:`analogs.stages.seasonal.regime_composites` of a store's tagged days.

    Without ``files`` the anomalies are the store's EOF reconstruction; with ``files``
    (the archive, as for ``build``) the archive is opened, regridded to the store grid
    and its own anomalies (daily climatology removed) are composited. ``anomalies``
    hands in those archive anomalies when already computed.
    """
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags: composites need them "
                                "(rebuild the store)")
    if anomalies is None and files is not None:
        anomalies = store.climatology.transform(_archive_on_store_grid(store, files))
    composites = regime_composites(store.tags, store.climatology, store.eof, store.pcs,
                                   months=months, anomalies=anomalies, fields=store.fields)
    composites.attrs["store"] = str(store.path)
    return composites


def _rows_of(store, days) -> np.ndarray:
    """Archive rows of calendar ``days`` (each must be an archive day)."""
    position = pd.Series(np.arange(len(store.times)), index=store.times.normalize())
    return position.loc[pd.DatetimeIndex(days).normalize()].to_numpy(dtype=int)


def _day_anomalies(store, days, archive_anomalies=None) -> xr.Dataset:
    """Anomalies (time, lat, lon) of archive ``days``: the archive's own when at hand,
    else the store's EOF reconstruction (one batch)."""
    if archive_anomalies is not None:
        wanted = pd.DatetimeIndex(archive_anomalies["time"].values).normalize().isin(
            pd.DatetimeIndex(days).normalize())
        return archive_anomalies.isel(time=np.flatnonzero(wanted))[store.fields]
    rows = _rows_of(store, days)
    return store.eof.reconstruct(store.pcs.isel(time=rows))[store.fields]


def _gallery_fields(store, days, archive=None) -> tuple[xr.Dataset, str]:
    """Full fields (day, lat, lon) of ``days`` in their order, and where they come from:
    the archive regridded to the store grid when at hand, else climatology plus the
    anomaly on the kept EOFs (:func:`analogs.workflows.find.day_fields`)."""
    days = pd.DatetimeIndex(days).normalize()
    if archive is not None:
        position = pd.Series(np.arange(archive.sizes["time"]),
                             index=pd.DatetimeIndex(archive["time"].values).normalize())
        picked = archive.isel(time=position.loc[days].to_numpy()).load()
        return (picked.rename({"time": "day"}).drop_vars("day"),
                "the archive's fields on the store grid")
    from analogs.workflows.find import day_fields
    fields = day_fields(store, _rows_of(store, days))
    return (fields.rename({"analog": "day"}).drop_vars("time"),
            f"climatology + anomaly on the {store.eof.n_modes_} kept EOFs")


#: Half width of the cyclone-centred frame, degrees (a tropical cyclone's circulation
#: and its rain bands reach some 500-1000 km; common practice, no source).
CYCLONE_FRAME_DEG = 12.0
#: Periods of the record the example days are drawn from (one day per regime each).
EXAMPLE_PERIODS = 5


def _hindcast(store, months):
    """Leave-one-year-out forecasts of the store's query defaults in ``months``, over the
    days with report coverage (:func:`analogs.workflows.skill.hindcast_days`)."""
    from analogs.stages.hindcast import leave_one_year_out
    from analogs.workflows.skill import hindcast_days
    defaults = store.query_defaults
    pcs, times, observed = hindcast_days(store, store.observed())
    return leave_one_year_out(pcs, times, observed,
                              top=defaults.get("top") or P.top.default,
                              n_modes=defaults.get("n_modes"), months=months)


def build_briefing(store, out_dir, *, months=None, files=None, n_periods=EXAMPLE_PERIODS,
                   hindcast=True, progress=True) -> dict:
    """Everything a seasonal briefing needs, written to ``out_dir``.

    Parameters
    ----------
    store : :class:`analogs.api.AnalogStore` with tags (and events for the outcome
        tables).
    out_dir : directory to write (created).
    months : months of the season (1-12, or text such as ``"5-9"``), default all.
    files : archive files for composites and example days of the archive's own fields
        (default: the store's EOF reconstruction).
    n_periods : periods of the record to draw one example day per regime from.
    hindcast : also run the leave-one-year-out hindcast of the store's default
        settings (restricted to ``months``) for the reliability and ROC figures.
    progress : show a progress bar over the steps.

    Returns
    -------
    dict of file name -> Path of every file written; ``"index.html"`` is the page and
    ``"slides/NN-topic.png"`` each slide.
    """
    from tqdm.auto import tqdm

    from analogs.stages.scores import reliability_table, roc_curve_points

    months = season_months(months, owner=OWNER)
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags: the briefing needs them "
                                "(rebuild the store)")
    check_output(out_dir, "out_dir", OWNER, kind="directory")  # never inside a store
    out_dir = Path(out_dir)
    tags = season_tags(store.tags, months, owner=OWNER)
    if len(tags) == 0:
        fail("months", OWNER, f"months holding at least one tagged day of store {store.path}",
             months)
    has_events = store.events is not None
    steps = ["tables", "composites", "slides", "hindcast", "report"]
    bar = tqdm(total=len(steps), desc="briefing", disable=not progress, unit="step")
    written: dict = {}
    season = season_label(months)
    tables = {
        "regime_frequency_by_month": regime_frequency_by_month(tags),
        "regime_frequency_by_year": regime_frequency_by_year(tags),
        "regime_yearly_series": yearly_regime_series(tags, months),
        "regime_trend": regime_trend(tags, months).reset_index(),
        "regime_persistence": regime_persistence(tags).reset_index(),
        "regime_run_lengths": run_length_counts(tags),
        "example_days": example_days_across_record(tags, store.pcs, n_periods=n_periods),
    }
    reported = tags.iloc[:0]
    if has_events:
        # Only days with report coverage: a day without reports yet is not a day without
        # events (analogs.workflows.reports).
        covered = pd.Series(store.covered, index=store.days)
        reported = tags[covered.reindex(tags.index.normalize(), fill_value=False).to_numpy()]
        counts = daily_event_counts(store.events, reported.index, store.region)
        tables["outcomes_by_regime_and_month"] = outcomes_by_regime_and_month(reported, counts)
    for name, frame in tables.items():
        written.update(write_table(frame, out_dir, name))
    bar.update()

    archive = archive_anomalies = None
    if files is not None:
        archive = _archive_on_store_grid(store, files)
        archive_anomalies = store.climatology.transform(archive)
    composites = store_regime_composites(store, months, anomalies=archive_anomalies)
    path = out_dir / "regime_composites.nc"
    output.write_netcdf(composites, path)
    written[path.name] = path
    lat, lon = store.grid
    density = (regime_report_density(reported, store.events, lat, lon)
               if has_events and len(reported) else None)
    bar.update()

    land = land_lines(store.land)  # traced once for every map
    geography = map_lines(lat, lon, store.land)
    trend = regime_trend(tags, months)
    slides = [
        ("regime-share-by-month", "Share of days in each regime by month",
         draw.regime_share_by_month(tables["regime_frequency_by_month"], season=season)),
        ("regime-calendar", "Regime of every tagged day",
         draw.regime_calendar(tags, months, season=season)),
        ("regime-days-by-year", "Days in each regime, year by year, with the trend",
         draw.yearly_series_with_trend(tables["regime_yearly_series"], trend, season=season)),
        ("regime-spell-lengths", "How long each regime lasts",
         draw.run_length_histograms(tables["regime_run_lengths"], season=season,
                                    note=tables["regime_run_lengths"].attrs.get("note"))),
    ]
    if has_events:
        slides.append(("reports-by-regime-month-kind",
                       "Reports by regime, month and kind",
                       draw.outcomes_by_regime_month_kind(
                           tables["outcomes_by_regime_and_month"], season=season)))
    slides.append(("regime-composites", "Mean height, moisture and reports of each regime",
                   draw.regime_composite_maps(composites, density, region=store.region,
                                              season=season, land=land,
                                              geography=geography)))
    tropical = tags[(tags["regime"].astype(str) == "tropical").to_numpy()]
    if "tc_lat" in tropical:
        tropical = tropical[tropical["tc_lat"].notna().to_numpy()]
        centres = pd.DataFrame({"day": tropical.index, "lat": tropical["tc_lat"].to_numpy(),
                                "lon": tropical["tc_lon"].to_numpy()})
        if len(centres):
            anomalies = _day_anomalies(store, centres["day"], archive_anomalies)
            spacing = float(np.mean(np.diff(lat)))
            centred = cyclone_centred_composite(
                anomalies, centres, half_width_cells=max(1, round(CYCLONE_FRAME_DEG / spacing)),
                events=store.events if has_events else None, event_days=reported.index)
            in_place = anomalies.mean("time").rename(
                {name: f"{name}_anomaly" for name in store.fields})
            slides.append(("tropical-cyclone-centred",
                           "Tropical days centred on each day's cyclone",
                           draw.cyclone_centred_maps(in_place, centred, season=season,
                                                     land=land, geography=geography)))
    examples = tables["example_days"]
    if len(examples):
        gallery, source = _gallery_fields(store, examples["date"], archive)
        day_events = (store.events[store.events["day"].isin(examples["date"])]
                      if has_events else None)
        slides.append(("example-days", "Example days across the record",
                       draw.example_day_gallery(gallery, examples, day_events,
                                                region=store.region, season=season,
                                                source=source, land=land,
                                                geography=geography)))
    bar.update()

    covered_years = np.unique(store.times[store.covered].year)
    if (hindcast and has_events and len(covered_years) >= 2
            and store.observed()[store.covered].any()):
        forecasts = _hindcast(store, months)
        p, o = forecasts["forecast"].to_numpy(), forecasts["observed"].to_numpy()
        if 0 < o.sum() < o.size:
            slides.append(("reliability", "How reliable the analog probabilities have been",
                           plots.reliability_diagram(reliability_table(p, o),
                                                     title_suffix=season)))
            slides.append(("roc", "How well the analog probabilities separate event days",
                           plots.roc_diagram(*roc_curve_points(p, o)[:2], title_suffix=season)))
    bar.update()

    rendered = []
    for number, (topic, caption, figure) in enumerate(slides, start=1):
        png = plots.figure_png(figure)
        name = f"slides/{number:02d}-{topic}.png"
        output.write_bytes(out_dir / name, png)
        written[name] = out_dir / name
        rendered.append((caption, png, getattr(figure, "alt_text", caption), name))
    settings = {"store": str(store.path), "season": season,
                "months": None if months is None else list(months),
                "region": store.region.to_dict(), "days_tagged": int(len(tags)),
                "days_with_reports_coverage": int(len(reported)),
                "first_day": tags.index.min(), "last_day": tags.index.max(),
                "sampling": archive_sampling(tags, months).describe(),
                "composites": composites.attrs["composite_method"],
                "trend_tests": "least-squares slope (t-test p-value) and Kendall tau "
                               "(Mann-Kendall p-value)",
                "example_days": f"the day nearest each regime's mean PC vector in each of "
                                f"{examples['period'].nunique()} periods"}
    output.write_text(out_dir / "index.html",
                      briefing_html(tables, rendered, store.manifest, settings, trend=trend))
    written["index.html"] = out_dir / "index.html"
    bar.update()
    bar.close()
    return written


__all__ = ["build_briefing", "store_regime_composites", "write_table"]
