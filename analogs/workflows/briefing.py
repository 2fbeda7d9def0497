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

from analogs._validation import fail
from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.presentation import figures as plots
from analogs.presentation.report import briefing_html
from analogs.stages.outcomes import daily_event_counts
from analogs.stages.seasonal import (
    TYPICAL_DAY_SEPARATION,
    archive_sampling,
    outcomes_by_regime_and_month,
    regime_composites,
    regime_frequency_by_month,
    regime_frequency_by_year,
    regime_persistence,
    regime_trend,
    season_label,
    season_months,
    season_tags,
    typical_days,
)
from analogs.workflows import files as output
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


def store_regime_composites(store, months=None, *, files=None):
    """:func:`analogs.stages.seasonal.regime_composites` of a store's tagged days.

    Without ``files`` the anomalies are the store's EOF reconstruction; with ``files``
    (the archive, as for ``build``) the archive is opened, regridded to the store grid
    and its own anomalies (daily climatology removed) are composited.
    """
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags: composites need them "
                                "(rebuild the store)")
    anomalies = None
    if files is not None:
        from analogs.stages.sources import open_archive, regrid_to
        lat, lon = store.grid
        archive = open_archive(files, fields=store.fields, progress=False)[store.fields]
        anomalies = store.climatology.transform(regrid_to(archive, lat, lon))
    composites = regime_composites(store.tags, store.climatology, store.eof, store.pcs,
                                   months=months, anomalies=anomalies, fields=store.fields)
    composites.attrs["store"] = str(store.path)
    return composites


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


def build_briefing(store, out_dir, *, months=None, files=None, n_typical=5, hindcast=True,
                   progress=True) -> dict:
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
    dict of file name -> Path of every file written; ``"index.html"`` is the page.
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
    steps = ["tables", "composites", "figures", "hindcast", "report"]
    bar = tqdm(total=len(steps), desc="briefing", disable=not progress, unit="step")
    written: dict = {}
    tables = {
        "regime_frequency_by_month": regime_frequency_by_month(tags),
        "regime_frequency_by_year": regime_frequency_by_year(tags),
        "regime_trend": regime_trend(tags, months).reset_index(),
        "regime_persistence": regime_persistence(tags).reset_index(),
        "typical_days": typical_days(tags, n_typical),
    }
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

    composites = store_regime_composites(store, months, files=files)
    path = out_dir / "regime_composites.nc"
    output.write_netcdf(composites, path)
    written[path.name] = path
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

    covered_years = np.unique(store.times[store.covered].year)
    if (hindcast and has_events and len(covered_years) >= 2
            and store.observed()[store.covered].any()):
        forecasts = _hindcast(store, months)
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
        output.write_bytes(out_dir / filename, png)
        written[filename] = out_dir / filename
        rendered.append((caption, png))
    settings = {"store": str(store.path), "season": season,
                "months": None if months is None else list(months),
                "region": store.region.to_dict(), "days_tagged": int(len(tags)),
                "sampling": archive_sampling(tags, months).describe(),
                "composites": composites.attrs["composite_method"],
                "trend_tests": "least-squares slope (t-test p-value) and Kendall tau "
                               "(Mann-Kendall p-value)",
                "typical_day_separation_days": TYPICAL_DAY_SEPARATION}
    output.write_text(out_dir / "index.html",
                      briefing_html(tables, rendered, store.manifest, settings))
    written["index.html"] = out_dir / "index.html"
    bar.update()
    bar.close()
    return written


__all__ = ["build_briefing", "store_regime_composites", "write_table"]
