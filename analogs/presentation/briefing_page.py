"""The HTML page of the trainer's seasonal briefing (``analogs climatology``).

Presentation only: formats the tables of :mod:`analogs.stages.seasonal` and the
slides (PNG bytes) it is handed into one self-contained page (inline style, images
embedded, nothing fetched). The page answers first (what the season's regimes are,
what they bring, whether they changed, how long they last, what such guidance has
been worth), then shows the slides and the tables behind them.

Numbers keep one precision per kind: shares and probabilities in whole percent,
days per season and slopes to one decimal, p-values to three decimals (``<0.001``
below), PC distances to two; months by name; dates as YYYY-MM-DD that never wrap.
"""

from __future__ import annotations

import calendar
import html

import numpy as np
import pandas as pd

from analogs import CAUTION, __version__
from analogs.presentation.map_layers import degrees_east_label as east
from analogs.presentation.map_layers import degrees_north_label as north
from analogs.presentation.report import embed_png
from analogs.stages.outcomes import binomial_interval

_STYLE = """
body{font-family:system-ui,sans-serif;margin:2em auto;max-width:72em;padding:0 1em;color:#222;line-height:1.45}
h1{margin-bottom:.2em}h2{margin-top:1.8em;border-bottom:1px solid #ddd;padding-bottom:.2em}
table{border-collapse:collapse;margin:.8em 0}th,td{padding:.25em .65em;border-bottom:1px solid #e3e3e3;text-align:right;vertical-align:top}
th{background:#f2f2f2}td.l,th.l{text-align:left}td.d{white-space:nowrap;font-variant-numeric:tabular-nums}
td{font-variant-numeric:tabular-nums}
.caution{border-left:4px solid #555;padding:.5em 1em;background:#f7f7f7}
.answer{background:#f4f7fb;border:1px solid #d5dfea;padding:.6em 1.2em;border-radius:4px}
.answer li{margin:.3em 0}.answer h2{margin-top:.3em}
figure{margin:1.2em 0}figcaption{font-size:.9em;color:#444}
img{max-width:100%;height:auto;border:1px solid #eee}
.scroll{overflow-x:auto}
"""


# -------------------------------------------------------------------- formatting

def percent(value) -> str:
    """0.234 -> ``"23%"``; NaN -> ``"n/a"``."""
    return "n/a" if value is None or not np.isfinite(value) else f"{100.0 * value:.0f}%"


def p_value(value) -> str:
    """Three decimals, ``"<0.001"`` below, ``"n/a"`` for NaN."""
    if value is None or not np.isfinite(value):
        return "n/a"
    return "<0.001" if value < 0.001 else f"{value:.3f}"


def one_decimal(value, sign=False) -> str:
    if value is None or not np.isfinite(value):
        return "n/a"
    return f"{value:+.1f}" if sign else f"{value:.1f}"


def month_name(month) -> str:
    return calendar.month_abbr[int(month)]


def _cell(value, css=""):
    return f'<td class="{css}">{html.escape(str(value))}</td>'


def table(rows: list[list], header: list[str], *, kinds: str) -> str:
    """An HTML table; ``kinds`` has one letter per column: ``l`` text (left), ``d`` a
    date (never wraps), ``n`` a number (right)."""
    css = {"l": "l", "d": "l d", "n": ""}
    head = "".join(f'<th class="{"l" if k in "ld" else ""}">{html.escape(h)}</th>'
                   for h, k in zip(header, kinds))
    body = "".join("<tr>" + "".join(_cell(v, css[k]) for v, k in zip(row, kinds)) + "</tr>"
                   for row in rows)
    return (f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


def _date(value) -> str:
    return pd.Timestamp(value).strftime("%Y-%m-%d")


# -------------------------------------------------------------------- summary

def _regime_shares(frequency: pd.DataFrame, unit: str) -> pd.Series:
    days = frequency.groupby("regime", sort=False)[unit].sum()
    return (days / days.sum()).sort_values(ascending=False)


def _reports_by_regime(outcomes: pd.DataFrame, level: float) -> pd.DataFrame:
    """Per regime over the whole season: days, share with reports and its interval."""
    hits = (outcomes["p_any_event"] * outcomes["n_days"]).round().astype(int)
    grouped = pd.DataFrame({"regime": outcomes["regime"], "n": outcomes["n_days"],
                            "hits": hits}).groupby("regime", sort=False).sum()
    low, high = zip(*(binomial_interval(int(h), int(n), level)
                      for h, n in zip(grouped["hits"], grouped["n"])))
    return grouped.assign(p=grouped["hits"] / grouped["n"], low=low, high=high) \
        .sort_values("p", ascending=False)


def summary_items(tables: dict, trend: pd.DataFrame | None, settings: dict,
                  skill: dict | None) -> list[str]:
    """The answer-first lines (HTML) at the top of the page."""
    items = []
    frequency = tables.get("regime_frequency_by_month")
    unit = "samples" if frequency is not None and "samples" in frequency else "days"
    first, last = settings.get("first_day"), settings.get("last_day")
    span = (f", {pd.Timestamp(first).year} to {pd.Timestamp(last).year}"
            if first is not None and last is not None else "")
    if frequency is not None and len(frequency):
        shares = _regime_shares(frequency, unit)
        listed = ", ".join(f"<strong>{html.escape(r)}</strong> {percent(v)}"
                           for r, v in shares.items())
        items.append(f"{int(frequency[unit].sum()):,} tagged {unit} "
                     f"({html.escape(str(settings.get('season', '')))}{span}): {listed}.")
    outcomes = tables.get("outcomes_by_regime_and_month")
    if outcomes is not None and len(outcomes):
        level = outcomes.attrs.get("confidence", 0.9)
        per = _reports_by_regime(outcomes, level)
        top = per.index[0]
        overall = per["hits"].sum() / per["n"].sum()
        others = ", ".join(f"{html.escape(r)} {percent(p)}" for r, p in per["p"].iloc[1:].items())
        items.append(
            f"Reports in the region: <strong>{html.escape(top)}</strong> days most often had "
            f"one or more reports ({percent(per.loc[top, 'p'])}, {100 * level:.0f}% interval "
            f"{percent(per.loc[top, 'low'])} to {percent(per.loc[top, 'high'])}), against "
            f"{percent(overall)} of all days; {others}.")
    if trend is not None and len(trend):
        slope_col = f"slope_{unit}_per_decade"
        moved = trend[(trend["p_value"] < 0.05) | (trend["kendall_p_value"] < 0.05)]
        if len(moved):
            items.append("Change over the years: " + "; ".join(
                f"<strong>{html.escape(r)}</strong> {one_decimal(row[slope_col], True)} {unit} "
                f"per season per decade (p {p_value(row['p_value'])} least squares, "
                f"{p_value(row['kendall_p_value'])} Mann-Kendall)"
                for r, row in moved.iterrows()) + "; the other regimes show no trend with "
                "p below 0.05.")
        else:
            items.append(f"Change over the years: no regime's {unit} per season changed with "
                         "p below 0.05 by either test (with "
                         f"{int(trend['n_years'].max())} years, neither test has much power).")
    persistence = tables.get("regime_persistence")
    if persistence is not None and len(persistence) and persistence["n_runs"].sum() > 0:
        spells = persistence.set_index("regime") if "regime" in persistence else persistence
        spells = spells[spells["n_runs"] > 0]
        items.append("Spells: median " + ", ".join(
            f"{html.escape(r)} {row['median_days']:g} d (longest {row['max_days']:.0f} d)"
            for r, row in spells.iterrows()) + ".")
    if skill:
        items.append(f"What such guidance has been worth: Brier skill score "
                     f"{skill.get('brier_skill_score', float('nan')):.2f} against the "
                     "season's climatology in a leave-one-year-out hindcast (above 0: "
                     "better than climatology).")
    return items


# -------------------------------------------------------------------- tables

def settings_table(settings: dict) -> str:
    """What the briefing was made from, one row a setting, in words."""
    region = settings.get("region") or {}
    if region.get("kind") == "box":
        region_text = (f"box {north(region['south'])} to {north(region['north'])}, "
                       f"{east(region['west'])} to {east(region['east'])}")
    elif region.get("kind") == "point":
        region_text = (f"{region.get('radius_km'):g} km around {north(region['lat'])}, "
                       f"{east(region['lon'])}")
    else:
        region_text = "whole domain" if region.get("kind") == "whole" else str(region or "n/a")
    months = settings.get("months")
    rows = [
        ["store", settings.get("store", "")],
        ["season", settings.get("season", "") + (
            f" ({', '.join(month_name(m) for m in months)})" if months else "")],
        ["first and last tagged day", f"{_date(settings['first_day'])} to "
                                      f"{_date(settings['last_day'])}"
         if settings.get("first_day") is not None else "n/a"],
        ["tagged days", f"{settings.get('days_tagged', 0):,}"],
        ["days with report coverage", f"{settings.get('days_with_reports_coverage', 0):,}"],
        ["outcome region", region_text],
        ["sampling", settings.get("sampling", "")],
        ["composites", settings.get("composites", "")],
        ["trend tests", settings.get("trend_tests", "")],
        ["example days", settings.get("example_days", "")],
    ]
    return table(rows, ["setting", "value"], kinds="ll")


def _month_table(frequency: pd.DataFrame) -> str:
    unit = "samples" if "samples" in frequency else "days"
    from analogs.presentation.slides import ordered_regimes, season_order
    months = season_order(frequency["month"].unique())
    regimes = ordered_regimes(frequency["regime"])
    counts = frequency.pivot(index="month", columns="regime", values=unit)
    shares = frequency.pivot(index="month", columns="regime", values="fraction")
    rows = [[month_name(m), f"{int(counts.loc[m].sum()):,}"]
            + [f"{int(counts.loc[m, r])} ({percent(shares.loc[m, r])})" for r in regimes]
            for m in months]
    return table(rows, ["month", f"{unit} tagged", *regimes], kinds="ln" + "n" * len(regimes))


def _trend_table(trend: pd.DataFrame) -> str:
    unit = "samples" if "slope_samples_per_decade" in trend else "days"
    rows = [[r, int(row["n_years"]), one_decimal(row[f"mean_{unit}_per_season"]),
             f"{one_decimal(row[f'slope_{unit}_per_decade'], True)} ± "
             f"{one_decimal(row[f'slope_stderr_{unit}_per_decade'])}",
             p_value(row["p_value"]),
             "n/a" if not np.isfinite(row["kendall_tau"]) else f"{row['kendall_tau']:+.2f}",
             p_value(row["kendall_p_value"])]
            for r, row in trend.iterrows()]
    return table(rows, ["regime", "years", f"mean {unit} per season",
                        f"slope ({unit}/decade) ± s.e.", "p (least squares)", "Kendall tau",
                        "p (Mann-Kendall)"], kinds="lnnnnnn")


def _persistence_table(persistence: pd.DataFrame) -> str:
    frame = persistence.set_index("regime") if "regime" in persistence else persistence
    rows = [[r, int(row["n_runs"]), one_decimal(row["mean_days"]),
             one_decimal(row["median_days"]), one_decimal(row["p90_days"]),
             "n/a" if not np.isfinite(row["max_days"]) else f"{row['max_days']:.0f}"]
            for r, row in frame.iterrows()]
    return table(rows, ["regime", "spells", "mean (d)", "median (d)", "90th percentile (d)",
                        "longest (d)"], kinds="lnnnnn")


def _outcome_table(outcomes: pd.DataFrame) -> str:
    kinds = [c[len("p_any_"):] for c in outcomes.columns if c.startswith("p_any_")
             and c not in ("p_any_event", "p_any_event_low", "p_any_event_high")]
    rows = [[row["regime"], month_name(row["month"]), int(row["n_days"]),
             f"{percent(row['p_any_event'])} ({percent(row['p_any_event_low'])} to "
             f"{percent(row['p_any_event_high'])})", f"{row['mean_events']:.2f}"]
            + [percent(row[f"p_any_{k}"]) for k in kinds]
            for _, row in outcomes.iterrows()]
    level = outcomes.attrs.get("confidence", 0.9)
    return table(rows, ["regime", "month", "days",
                        f"one or more reports ({100 * level:.0f}% interval)",
                        "mean reports per day", *[f"one or more {k}" for k in kinds]],
                 kinds="lln" + "n" * (2 + len(kinds)))


def _examples_table(examples: pd.DataFrame) -> str:
    rows = [[row["regime"], row["period"], _date(row["date"]),
             f"{row['distance_to_centroid']:.2f}", percent(row["confidence"])]
            for _, row in examples.iterrows()]
    return table(rows, ["regime", "period", "date", "distance to the regime's mean (PC units)",
                        "tag confidence"], kinds="lldnn")


def _skill_section(skill, months=None) -> str:
    if not skill:
        return ("<p>No cross-validated skill in this store (it was built without reports "
                "or from fewer than two years).</p>")
    lo, hi = skill.get("brier_skill_score_ci") or (float("nan"), float("nan"))
    text = (f"<p>{html.escape(str(skill.get('method', 'hindcast')))}, {skill.get('top')} "
            f"analogs, season window ±{skill.get('window_days')} d: Brier skill score "
            f"<strong>{skill.get('brier_skill_score', float('nan')):.2f}</strong> "
            f"(year-bootstrap interval {lo:.2f} to {hi:.2f}), ROC area "
            f"{skill.get('roc_auc', float('nan')):.2f}. Above 0 means the analogs beat the "
            "season's climatology.</p>")
    by_month = sorted(((m, e) for m, e in (skill.get("by_month") or {}).items()
                       if not months or int(m) in months), key=lambda item: int(item[0]))
    rows = [[month_name(m), e["n_days"], percent(e["base_rate"]), f"{e['brier_score']:.3f}",
             "n/a" if e["brier_skill_score"] is None else f"{e['brier_skill_score']:.2f}"]
            for m, e in by_month]
    if rows:
        text += table(rows, ["month", "days", "base rate", "Brier score", "Brier skill score"],
                      kinds="lnnnn")
    return text


# -------------------------------------------------------------------- the page

def briefing_html(tables: dict, slides, manifest: dict, settings: dict, *,
                  trend: pd.DataFrame | None = None) -> str:
    """The briefing page's text.

    Parameters
    ----------
    tables : name -> DataFrame of :mod:`analogs.stages.seasonal`, as gathered by
        :func:`analogs.workflows.briefing.build_briefing` (``regime_frequency_by_month``,
        ``regime_persistence``, ``example_days``, optionally
        ``outcomes_by_regime_and_month``).
    slides : (caption, PNG bytes, alt text, file name relative to the page) per slide.
    manifest : the store's manifest (its skill and provenance).
    settings : what was asked for (season, months, region, days, first / last day...).
    trend : :func:`analogs.stages.seasonal.regime_trend` (indexed by regime).
    """
    title = "Seasonal regime briefing, " + str(settings.get("season", ""))
    skill = manifest.get("skill")
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
             f"<h1>{html.escape(title)}</h1>",
             f'<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>',
             '<section class="answer" id="in-short"><h2>In short</h2><ul>'
             + "".join(f"<li>{item}</li>" for item in summary_items(tables, trend, settings,
                                                                    skill))
             + "</ul></section>"]
    contents = "".join(f'<li><a href="#slide-{i}">{html.escape(caption)}</a></li>'
                       for i, (caption, *_rest) in enumerate(slides, start=1))
    parts.append(f"<h2>Slides</h2><ol>{contents}</ol>")
    for i, (caption, png, alt, name) in enumerate(slides, start=1):
        parts.append(f'<figure id="slide-{i}"><h3>{i}. {html.escape(caption)}</h3>'
                     f"{embed_png(png, alt)}<figcaption>Also saved as "
                     f'<a href="{html.escape(name, quote=True)}">{html.escape(name)}</a>.'
                     "</figcaption></figure>")
    sections = [("Season and settings", settings_table(settings))]
    if tables.get("regime_frequency_by_month") is not None:
        sections.append(("Days in each regime by month (share of the month's tagged days)",
                         _month_table(tables["regime_frequency_by_month"])))
    if trend is not None:
        sections.append(("Change over the years",
                         "<p>Least-squares slope of each regime's days per season with its "
                         "t-test p-value, and Kendall's tau with its Mann-Kendall p-value; "
                         "p below 0.05 is conventionally called significant, but with few "
                         "years neither test has much power.</p>" + _trend_table(trend)))
    persistence = tables.get("regime_persistence")
    if persistence is not None:
        note = persistence.attrs.get("note", "Spells of consecutive tagged days; a missing "
                                             "day or the season's end ends a spell.")
        sections.append(("How long each regime lasts",
                         f"<p>{html.escape(note)}</p>" + _persistence_table(persistence)))
    outcomes = tables.get("outcomes_by_regime_and_month")
    if outcomes is not None and len(outcomes):
        sections.append(("What each regime brings, by month",
                         "<p>Share of days with one or more reports in the region "
                         "(Clopper-Pearson interval), mean reports per day, and the share "
                         "with one or more of each kind.</p>" + _outcome_table(outcomes)))
    examples = tables.get("example_days")
    if examples is not None and len(examples):
        sections.append(("Example days",
                         "<p>In each period of the record, the day of each regime nearest "
                         "the regime's mean pattern (in the EOF space the analogs are "
                         "searched in), so the examples span the whole record.</p>"
                         + _examples_table(examples)))
    sections.append(("Cross-validated skill of this store",
                     _skill_section(skill, settings.get("months"))))
    for heading, body in sections:
        parts.append(f"<h2>{html.escape(heading)}</h2>\n{body}")
    archive = manifest.get("archive") or {}
    parts.append("<h2>Provenance</h2>" + table(
        [["archive days", f"{archive.get('n_days', 'n/a'):,}" if isinstance(
            archive.get("n_days"), int) else "n/a"],
         ["archive period", f"{archive.get('time_start', 'n/a')} to "
                            f"{archive.get('time_end', 'n/a')}"],
         ["grid", f"{archive.get('n_lat', 'n/a')} latitudes × {archive.get('n_lon', 'n/a')} "
                  "longitudes"],
         ["fields", ", ".join((manifest.get("config") or {}).get("fields") or []) or "n/a"],
         ["written by", f"analogs {__version__}"]],
        ["item", "value"], kinds="ll"))
    parts.append("</body></html>")
    return "\n".join(parts)


__all__ = ["briefing_html", "p_value", "percent", "settings_table", "summary_items"]
