"""The trainer's slide pack: one figure per topic of the seasonal briefing.

Presentation only: every function draws the tables and arrays it is handed (the
tables of :mod:`analogs.stages.seasonal`, fields on (lat, lon)) and returns a
:class:`matplotlib.figure.Figure` on its own Agg canvas, with ``figure.alt_text``
describing what it shows (for the page's ``alt``); nothing is read or written here.
:func:`analogs.workflows.briefing.build_briefing` gathers the inputs and writes each
figure as ``slides/NN-topic.png``.

Colours: the regimes have colours of their own, from Paul Tol's colour-blind-safe
qualitative scheme (Tol 2021, "Colour schemes", SRON technical note; from memory);
amounts and probabilities are drawn with perceptually uniform maps (``viridis``,
``cividis``) and departures with the diverging ``RdBu_r``. No category words are used:
numbers are shown as numbers.
"""

from __future__ import annotations

import calendar

import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.colors import BoundaryNorm, ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from analogs.errors import AnalogsInputError
from analogs.presentation.figures import (
    THUMBNAIL_DPI,
    _map_axes,
    _note_plain_axes,
    new_figure,
)
from analogs.presentation.map_layers import EVENT_MARKERS, HEIGHT_INTERVAL_GPM, height_levels
from analogs.stages.regimes import REGIME_LABELS

#: The regimes' own colours (Tol's qualitative scheme: indigo, teal, wine; grey for the
#: remainder), fixed so a regime keeps its colour on every slide.
REGIME_COLOURS = {"northwest_flow": "#332288", "tropical": "#44AA99",
                  "strong_trough": "#882255", "other": "#BBBBBB"}
#: Colours for labels beyond the named regimes (same scheme).
SPARE_COLOURS = ("#DDCC77", "#88CCEE", "#117733", "#CC6677", "#999933", "#AA4499")
#: Fills of report markers drawn over shaded maps (white, black, vermilion: each
#: stands out on every part of viridis), with the query maps' marker shapes.
MAP_KIND_FILLS = ("white", "black", "#D55E00", "#56B4E9")


def regime_colours(regimes) -> dict:
    """Regime -> colour: :data:`REGIME_COLOURS`, then :data:`SPARE_COLOURS` in turn."""
    extra = [r for r in regimes if r not in REGIME_COLOURS]
    spare = {r: SPARE_COLOURS[i % len(SPARE_COLOURS)] for i, r in enumerate(extra)}
    return {r: REGIME_COLOURS.get(r, spare.get(r)) for r in regimes}


def ordered_regimes(labels) -> list[str]:
    """The standard regimes in their usual order, then any other label, sorted."""
    labels = set(map(str, labels))
    return [r for r in REGIME_LABELS if r in labels] + sorted(labels - set(REGIME_LABELS))


def month_names(months) -> list[str]:
    """``[5, 6]`` -> ``["May", "Jun"]``."""
    return [calendar.month_abbr[int(m)] for m in months]


def season_order(months) -> list[int]:
    """The months of a season in reading order: a season over the year end starts at
    its first month (``11, 12, 1, 2``), others ascend."""
    months = sorted(int(m) for m in months)
    for start in range(len(months)):
        rotated = months[start:] + months[:start]
        if all((b - a) % 12 == 1 for a, b in zip(rotated, rotated[1:])):
            return rotated
    return months


def _title(text, season):
    return f"{text}, {season}" if season else text


def _need(frame, columns, owner, what):
    if not isinstance(frame, pd.DataFrame) or not set(columns) <= set(frame.columns):
        raise AnalogsInputError(f"{owner} needs {what} (columns {', '.join(columns)})")


def _panel_grid(figure, n, columns, *, left=0.07, right=0.98, bottom=0.1, top=0.86,
                wspace=0.25, hspace=0.55, sharex=False):
    columns = min(columns, n)
    rows = int(np.ceil(n / columns))
    axes = figure.subplots(rows, columns, squeeze=False, sharex=sharex)
    figure.subplots_adjust(left=left, right=right, bottom=bottom, top=top, wspace=wspace,
                           hspace=hspace)
    flat = axes.ravel()
    for ax in flat[n:]:
        ax.set_visible(False)
    return flat[:n]


# ------------------------------------------------------------------ 1. share by month

def regime_share_by_month(frequency: pd.DataFrame, *, season="") -> Figure:
    """Stacked bars: each month's tagged days split by regime (%), the season's months
    only (those in the table), named, in season order; days tagged above each bar.

    ``frequency`` is :func:`analogs.stages.seasonal.regime_frequency_by_month`.
    """
    unit = "samples" if "samples_tagged" in frequency.columns else "days"
    _need(frequency, ["month", "regime", "fraction", f"{unit}_tagged"],
          "regime_share_by_month", "the table of regime_frequency_by_month")
    months = season_order(frequency["month"].unique())
    shares = frequency.pivot(index="month", columns="regime", values="fraction")
    shares = shares.reindex(months).fillna(0.0)
    totals = frequency.groupby("month")[f"{unit}_tagged"].first().reindex(months)
    regimes = ordered_regimes(shares.columns)
    colours = regime_colours(regimes)
    figure = new_figure(9.0, 5.0)
    figure.subplots_adjust(left=0.08, right=0.78, bottom=0.12, top=0.88)
    ax = figure.add_subplot()
    x = np.arange(len(months))
    base = np.zeros(len(months))
    for regime in regimes:
        values = 100.0 * shares[regime].to_numpy()
        ax.bar(x, values, bottom=base, color=colours[regime], label=regime,
               edgecolor="white", linewidth=0.6, width=0.7)
        for xi, b, v in zip(x, base, values):
            if v >= 6.0:   # label segments tall enough to hold the text
                ax.text(xi, b + v / 2, f"{v:.0f}%", ha="center", va="center", fontsize=8,
                        color="white" if regime != "other" else "black")
        base += values
    for xi, total in zip(x, totals):
        ax.text(xi, 101.0, f"{int(total)} {unit}", ha="center", va="bottom", fontsize=8)
    ax.set_xticks(x, month_names(months))
    ax.set_ylim(0, 108)
    ax.set_ylabel(f"share of the month's tagged {unit} (%)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), title="regime", frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    ax.set_title(_title("Share of days in each regime, by month", season), fontsize=12)
    parts = "; ".join(
        f"{name}: " + ", ".join(f"{r} {100 * shares.loc[m, r]:.0f}%" for r in regimes)
        for m, name in zip(months, month_names(months)))
    figure.alt_text = (f"Stacked bars of the share of tagged {unit} in each regime for "
                       f"{len(months)} months. {parts}.")
    return figure


# ------------------------------------------------------------------ 2. calendar

def regime_calendar(tags: pd.DataFrame, months, *, season="") -> Figure:
    """Year by day, each tagged day coloured by its regime, over the season only (the
    whole year when ``months`` is None)."""
    if not isinstance(tags, pd.DataFrame) or not isinstance(tags.index, pd.DatetimeIndex) \
            or "regime" not in tags:
        raise AnalogsInputError("regime_calendar needs the tags table (indexed by date, "
                                "column 'regime')")
    order = season_order(months) if months is not None else list(range(1, 13))
    wraps = order != sorted(order)
    # Season year: a season over the year end belongs to the year it starts in.
    season_year = tags.index.year - (wraps & (tags.index.month < order[0])).astype(int)
    start_of = {y: pd.Timestamp(int(y), order[0], 1) for y in np.unique(season_year)}
    offset = np.array([(d - start_of[y]).days for d, y in zip(tags.index, season_year)])
    length = int(offset.max()) + 1 if offset.size else 1
    years = np.arange(season_year.min(), season_year.max() + 1)
    regimes = ordered_regimes(tags["regime"])
    codes = {r: i for i, r in enumerate(regimes)}
    grid = np.full((years.size, length), np.nan)
    grid[season_year - years[0], offset] = tags["regime"].astype(str).map(codes).to_numpy()
    colours = regime_colours(regimes)
    figure = new_figure(10.0, 1.7 + 0.3 * years.size)
    figure.subplots_adjust(left=0.08, right=0.8, bottom=0.6 / (1.7 + 0.3 * years.size) + 0.05,
                           top=1 - 0.55 / (1.7 + 0.3 * years.size))
    ax = figure.add_subplot()
    ax.imshow(grid, aspect="auto", interpolation="nearest",
              cmap=ListedColormap([colours[r] for r in regimes]),
              norm=BoundaryNorm(np.arange(len(regimes) + 1) - 0.5, len(regimes)),
              extent=(-0.5, length - 0.5, years[-1] + 0.5, years[0] - 0.5))
    starts = [(pd.Timestamp(2001 + (wraps and m < order[0]), m, 1)
               - pd.Timestamp(2001, order[0], 1)).days for m in order]
    ax.set_xticks(starts, month_names(order), ha="left")
    ax.set_yticks(years if years.size <= 20 else years[::max(1, years.size // 10)])
    ax.set_ylabel("season of")
    handles = [Patch(color=colours[r], label=r) for r in regimes]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), title="regime",
              frameon=False)
    ax.set_title(_title("Regime of every tagged day", season), fontsize=12)
    figure.alt_text = (f"Calendar of {len(tags)} tagged days in {years.size} seasons "
                       f"({years[0]} to {years[-1]}), {', '.join(month_names(order))}, each "
                       "day coloured by its regime.")
    return figure


# ------------------------------------------------------------------ 3. yearly series

def _p_text(p) -> str:
    if p is None or not np.isfinite(p):
        return "n/a"
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def yearly_series_with_trend(series: pd.DataFrame, trend: pd.DataFrame, *,
                             season="") -> Figure:
    """One panel per regime: its days per season year by year, the least-squares line,
    the slope per decade and the p-values of both trend tests in the panel's title.

    ``series`` is :func:`analogs.stages.seasonal.yearly_regime_series`; ``trend`` is
    :func:`analogs.stages.seasonal.regime_trend` (indexed by regime).
    """
    unit = "samples" if "samples_per_season" in series.columns else "days"
    value, fitted = f"{unit}_per_season", f"fitted_{unit}_per_season"
    _need(series, ["year", "regime", value, fitted], "yearly_series_with_trend",
          "the table of yearly_regime_series")
    regimes = ordered_regimes(series["regime"])
    colours = regime_colours(regimes)
    figure = new_figure(10.0, 2.6 * int(np.ceil(len(regimes) / 2)) + 1.0)
    axes = _panel_grid(figure, len(regimes), 2, bottom=0.09, top=0.86, hspace=0.75,
                       sharex=True)
    lines = []
    for ax, regime in zip(axes, regimes):
        part = series[series["regime"] == regime].sort_values("year")
        ax.plot(part["year"], part[value], marker="o", color=colours[regime], linewidth=1.2)
        row = trend.loc[regime] if regime in trend.index else None
        slope = np.nan if row is None else row.get(f"slope_{unit}_per_decade", np.nan)
        if part[fitted].notna().any():
            ax.plot(part["year"], part[fitted], color="black", linestyle="--", linewidth=1.0)
        p_ls = np.nan if row is None else row.get("p_value", np.nan)
        p_mk = np.nan if row is None else row.get("kendall_p_value", np.nan)
        slope_text = "n/a" if not np.isfinite(slope) else f"{slope:+.1f}"
        ax.set_title(f"{regime}: {slope_text} {unit}/decade\n"
                     f"p = {_p_text(p_ls)} (least squares), {_p_text(p_mk)} (Mann-Kendall)",
                     fontsize=9)
        ax.set_ylim(bottom=0)
        ax.set_ylabel(f"{unit} per season", fontsize=8)
        ax.tick_params(labelsize=8)
        ax.spines[["top", "right"]].set_visible(False)
        ax.xaxis.get_major_locator().set_params(integer=True)
        lines.append(f"{regime} {slope_text} {unit} per decade, p {_p_text(p_ls)}")
    figure.suptitle(_title(f"{unit.capitalize()} in each regime, year by year", season)
                    + "\ndashed: least-squares line; p: two-sided tests of no trend",
                    fontsize=11)
    years = series["year"]
    figure.alt_text = (f"Yearly {unit} per season of each regime from {years.min()} to "
                       f"{years.max()} with a fitted straight line: " + "; ".join(lines) + ".")
    return figure


# ------------------------------------------------------------------ 4. run lengths

def run_length_histograms(counts: pd.DataFrame, *, season="", note=None) -> Figure:
    """One panel per regime: how many spells lasted 1, 2, 3... consecutive days, with
    the median spell marked. ``counts`` is
    :func:`analogs.stages.seasonal.run_length_counts`; an empty table (no consecutive
    days in the archive) draws ``note`` instead of bars."""
    _need(counts, ["regime", "length_days", "n_runs"], "run_length_histograms",
          "the table of run_length_counts")
    regimes = ordered_regimes(counts["regime"])
    if not regimes:
        figure = new_figure(8.0, 2.0)
        figure.text(0.5, 0.5, note or "no spells of consecutive days in this archive",
                    ha="center", va="center", fontsize=11, wrap=True)
        figure.alt_text = note or "No spells of consecutive days in this archive."
        return figure
    colours = regime_colours(regimes)
    longest = int(counts["length_days"].max())
    figure = new_figure(10.0, 2.5 * int(np.ceil(len(regimes) / 2)) + 1.0)
    axes = _panel_grid(figure, len(regimes), 2, bottom=0.1, top=0.86, hspace=0.6)
    lines = []
    for ax, regime in zip(axes, regimes):
        part = counts[counts["regime"] == regime]
        ax.bar(part["length_days"], part["n_runs"], color=colours[regime], width=0.85)
        lengths = np.repeat(part["length_days"].to_numpy(), part["n_runs"].to_numpy())
        median = float(np.median(lengths))
        ax.axvline(median, color="black", linestyle=":", linewidth=1.0)
        ax.set_xlim(0.4, longest + 0.6)
        ax.set_title(f"{regime}: {lengths.size} spells, median {median:g} d, "
                     f"longest {lengths.max()} d", fontsize=9)
        ax.set_ylabel("spells", fontsize=8)
        ax.tick_params(labelsize=8)
        ax.spines[["top", "right"]].set_visible(False)
        ax.xaxis.get_major_locator().set_params(integer=True)
        lines.append(f"{regime} {lengths.size} spells, median {median:g} days, longest "
                     f"{lengths.max()} days")
    for ax in axes[-2:]:
        ax.set_xlabel("spell length (consecutive days)", fontsize=8)
    figure.suptitle(_title("How long each regime lasts", season)
                    + "\ndotted: median; a missing day or the season's end ends a spell",
                    fontsize=11)
    figure.alt_text = "Histograms of spell lengths: " + "; ".join(lines) + "."
    return figure


# ------------------------------------------------------------------ 5. outcomes

def outcomes_by_regime_month_kind(outcomes: pd.DataFrame, *, season="") -> Figure:
    """One panel per kind (and one for any report): the share of each regime's days in
    each month with at least one report of that kind in the region (%), the
    Clopper-Pearson interval drawn for any report. ``outcomes`` is
    :func:`analogs.stages.seasonal.outcomes_by_regime_and_month`."""
    _need(outcomes, ["regime", "month", "n_days", "p_any_event"],
          "outcomes_by_regime_month_kind", "the table of outcomes_by_regime_and_month")
    kinds = [c[len("p_any_"):] for c in outcomes.columns
             if c.startswith("p_any_") and c not in ("p_any_event", "p_any_event_low",
                                                     "p_any_event_high")]
    panels = [("event", "any report")] + [(k, k) for k in kinds]
    regimes = ordered_regimes(outcomes["regime"])
    colours = regime_colours(regimes)
    months = season_order(outcomes["month"].unique())
    position = {m: i for i, m in enumerate(months)}
    figure = new_figure(10.0, 2.9 * int(np.ceil(len(panels) / 2)) + 1.1)
    axes = _panel_grid(figure, len(panels), 2, bottom=0.08, top=0.86, hspace=0.45,
                       right=0.82)
    top = 100.0 * float(np.nanmax(outcomes["p_any_event_high"]
                                  if "p_any_event_high" in outcomes else outcomes["p_any_event"]))
    peaks = []
    for ax, (column, label) in zip(axes, panels):
        for shift, regime in zip(np.linspace(-0.15, 0.15, len(regimes)), regimes):
            part = outcomes[outcomes["regime"] == regime]
            x = part["month"].map(position).to_numpy() + shift
            p = 100.0 * part[f"p_any_{column}"].to_numpy()
            if column == "event" and "p_any_event_low" in part:
                error = 100.0 * np.vstack([part["p_any_event"] - part["p_any_event_low"],
                                           part["p_any_event_high"] - part["p_any_event"]])
                ax.errorbar(x, p, yerr=error, color=colours[regime], marker="o",
                            markersize=4, capsize=2, linewidth=1.2, label=regime)
            else:
                ax.plot(x, p, color=colours[regime], marker="o", markersize=4,
                        linewidth=1.2, label=regime)
        ax.set_xticks(range(len(months)), month_names(months))
        ax.set_ylim(0, min(100.0, max(5.0, top * 1.08)))
        ax.set_title(label, fontsize=10)
        ax.set_ylabel("days with one or more (%)", fontsize=8)
        ax.tick_params(labelsize=8)
        ax.spines[["top", "right"]].set_visible(False)
        best = outcomes.loc[outcomes[f"p_any_{column}"].idxmax()]
        peaks.append(f"{label}: highest {100 * best[f'p_any_{column}']:.0f}% for "
                     f"{best['regime']} in {calendar.month_abbr[int(best['month'])]}")
    axes[0].legend(loc="upper left", bbox_to_anchor=(1.02 + (len(axes) > 1) * 1.25, 1.0),
                   title="regime", frameon=False, fontsize=8)
    level = outcomes.attrs.get("confidence", 0.9)
    figure.suptitle(_title("Share of each regime's days with reports in the region, by "
                           "month and kind", season)
                    + f"\nbars on 'any report': {100 * level:.0f}% Clopper-Pearson interval",
                    fontsize=11)
    figure.alt_text = ("Share of days with at least one report in the region by regime, "
                       "month and kind. " + "; ".join(peaks) + ".")
    return figure


# ------------------------------------------------------------------ 6. composites

def _moisture_name(names):
    return next((n for n in ("q850", "td2m", "pwat") if n in names), None)


def _moisture_values(name, values):
    """Values to shade and their label: specific humidity in g/kg, dewpoint in deg C."""
    if name == "q850":
        return values * 1000.0, "850 hPa specific humidity (g/kg)"
    if name == "td2m":
        return values - 273.15, "2 m dewpoint (°C)"
    return values, "precipitable water (kg m-2)"


def _height_to_width(lat, lon) -> float:
    """Height over width of a latitude-longitude map drawn with equal distances along
    both axes at its middle latitude (a degree of longitude is cos(lat) of one of
    latitude)."""
    return float(np.ptp(lat) / (np.ptp(lon) * np.cos(np.radians(np.mean(lat)))))


def regime_composite_maps(composites: xr.Dataset, density: xr.DataArray | None = None, *,
                          region=None, season="", density_floor=0.05, land=None,
                          geography=None) -> Figure:
    """One row per regime with days: mean 500 hPa height anomaly (shaded, shared
    symmetric scale) under the mean height (contours); the mean moisture field
    (shaded); the smoothed report density (shaded, cells below ``density_floor`` of
    the largest left blank). ``composites`` is
    :func:`analogs.stages.seasonal.regime_composites`; ``density`` is
    :func:`analogs.stages.seasonal.regime_report_density` (column left out when None).
    ``land`` and ``geography``: the archive's land-sea boundary and the Earth's lines,
    as for :func:`analogs.presentation.svg_maps.target_map`.
    """
    if "z500_anomaly" not in composites:
        raise AnalogsInputError("regime_composite_maps needs the Dataset of "
                                "analogs.stages.seasonal.regime_composites")
    present = [str(r) for r, n in zip(composites["regime"].values,
                                      composites["n_days"].values) if n > 0]
    moisture = _moisture_name([n.removesuffix("_mean") for n in composites.data_vars])
    columns = [("z500", "500 hPa height: anomaly shaded, mean contoured")]
    if moisture:
        columns.append((moisture, None))
    if density is not None:
        columns.append(("density", "reports per grid cell per 1000 days"))
    lat, lon = composites["lat"].values, composites["lon"].values
    aspect = _height_to_width(lat, lon)
    panel_w = 3.6
    width = panel_w * len(columns) + 0.8
    height = len(present) * (panel_w * aspect + 0.45) + 1.6
    figure = new_figure(width, height)
    figure.png_dpi = THUMBNAIL_DPI + 8
    axes = figure.subplots(len(present), len(columns), squeeze=False)
    figure.subplots_adjust(left=0.06, right=0.98, top=1 - 1.0 / height, bottom=0.6 / height,
                           wspace=0.12, hspace=0.28)
    anomaly = composites["z500_anomaly"].sel(regime=present)
    limit = float(np.nanmax(np.abs(anomaly.values))) or 1.0
    if moisture:
        shaded, moisture_label = _moisture_values(
            moisture, composites[f"{moisture}_mean"].sel(regime=present).values)
        m_low, m_high = np.nanpercentile(shaded, [1, 99])
    if density is not None:
        dens = 1000.0 * density.sel(regime=present).values
        d_high = float(np.nanmax(dens)) or 1.0
    meshes = {}
    for r, regime in enumerate(present):
        for c, (name, _) in enumerate(columns):
            ax = axes[r, c]
            if name == "z500":
                meshes[c] = ax.pcolormesh(lon, lat, anomaly.sel(regime=regime).values,
                                          cmap="RdBu_r", vmin=-limit, vmax=limit,
                                          shading="nearest")
                z = composites["z500_mean"].sel(regime=regime).values
                levels = height_levels(z)
                contours = ax.contour(lon, lat, z, levels=levels, colors="0.15", linewidths=0.7)
                ax.clabel(contours, fontsize=6, fmt="%.0f")
            elif name == "density":
                values = np.where(dens[r] >= density_floor * d_high, dens[r], np.nan)
                meshes[c] = ax.pcolormesh(lon, lat, values, cmap="magma_r", vmin=0,
                                          vmax=d_high, shading="nearest")
            else:
                meshes[c] = ax.pcolormesh(lon, lat, shaded[r], cmap="viridis", vmin=m_low,
                                          vmax=m_high, shading="nearest")
            _map_axes(ax, lat, lon, region, geography=geography, small=True, land=land,
                      xticks=r == len(present) - 1, yticks=c == 0)
            if c == 0:
                n = int(composites["n_days"].sel(regime=regime))
                ax.set_ylabel(f"{regime}\n{n} days", fontsize=9)
    for c, (name, label) in enumerate(columns):
        label = moisture_label if name == moisture else label
        if name == "z500":
            label = "500 hPa height anomaly (gpm)"
        bar = figure.colorbar(meshes[c], ax=list(axes[:, c]), orientation="horizontal",
                              fraction=0.04, pad=0.04, aspect=30)
        bar.set_label(label, fontsize=8)
        bar.ax.tick_params(labelsize=7)
        axes[0, c].set_title({"z500": "height: anomaly shaded,\nmean every "
                                      f"{HEIGHT_INTERVAL_GPM:.0f} gpm contoured",
                              "density": "smoothed report density"}.get(name, "mean moisture"),
                             fontsize=9)
    method = composites.attrs.get("composite_method", "")
    figure.suptitle(_title("Mean pattern of each regime", season) + f"\n({method})",
                    fontsize=11)
    _note_plain_axes(figure, geography, land)
    extremes = []
    for regime in present:
        a = anomaly.sel(regime=regime)
        low = a.where(a == a.min(), drop=True)
        extremes.append(f"{regime} lowest anomaly {float(a.min()):.0f} gpm near "
                        f"{float(low['lat'][0]):.0f}N {abs(float(low['lon'][0])):.0f}"
                        f"{'W' if float(low['lon'][0]) < 0 else 'E'}")
    figure.alt_text = ("Maps for each regime of the mean 500 hPa height and its anomaly"
                       + (", the mean moisture" if moisture else "")
                       + (" and the smoothed report density" if density is not None else "")
                       + ". " + "; ".join(extremes) + ".")
    return figure


# ------------------------------------------------------------------ 7. cyclone-centred

def cyclone_centred_maps(in_place: xr.Dataset, centred: xr.Dataset, *, season="",
                         land=None, geography=None) -> Figure:
    """Tropical days averaged two ways: in place (each day's low where it was, so lows
    at different places smear out) and centred on each day's cyclone (fields shifted
    before averaging), and the reports of those days around the centre.

    ``in_place``: the mean anomalies of the days on (lat, lon) (``z500_anomaly``);
    ``centred``: :func:`analogs.stages.seasonal.cyclone_centred_composite` of the same
    days' anomalies (``z500``, a moisture anomaly, optionally ``report_density``).
    ``land`` and ``geography`` go on the in-place map, as for
    :func:`analogs.presentation.svg_maps.target_map`.
    """
    if "z500" not in centred or "dlat" not in centred.dims:
        raise AnalogsInputError("cyclone_centred_maps needs the Dataset of "
                                "cyclone_centred_composite with 'z500'")
    has_reports = "report_density" in centred
    figure = new_figure(14.0 if has_reports else 10.5, 5.0)
    figure.subplots_adjust(left=0.05, right=0.98, bottom=0.22, top=0.8, wspace=0.28)
    axes = figure.subplots(1, 3 if has_reports else 2, width_ratios=[1.6, 1, 1][:2 + has_reports])
    z_centre = centred["z500"].values
    z_place = in_place["z500_anomaly"].values
    limit = float(np.nanmax(np.abs(np.r_[z_centre.ravel(), z_place.ravel()]))) or 1.0
    lat, lon = in_place["lat"].values, in_place["lon"].values
    mesh = axes[0].pcolormesh(lon, lat, z_place, cmap="RdBu_r", vmin=-limit, vmax=limit,
                              shading="nearest")
    _map_axes(axes[0], lat, lon, geography=geography, land=land)
    axes[0].set_title(f"averaged in place: lowest {np.nanmin(z_place):.0f} gpm", fontsize=10)
    dlat, dlon = centred["dlat"].values, centred["dlon"].values
    squeeze = np.cos(np.radians(float(np.mean(lat))))
    axes[1].pcolormesh(dlon, dlat, z_centre, cmap="RdBu_r", vmin=-limit, vmax=limit,
                       shading="nearest")
    moisture = _moisture_name(centred.data_vars)
    moisture_units = ""
    if moisture:
        # An anomaly: g/kg for specific humidity, else the field's own units.
        values = centred[moisture].values * (1000.0 if moisture == "q850" else 1.0)
        moisture_units = {"q850": "g/kg", "td2m": "K", "pwat": "kg m-2"}[moisture]
        step = max(float(np.nanmax(np.abs(values))) / 4.0, 1e-9)
        levels = [v for v in np.arange(-4, 5) * step if abs(v) > 1e-12]
        contours = axes[1].contour(dlon, dlat, values, levels=levels, colors="0.1",
                                   linewidths=0.8)
        axes[1].clabel(contours, fontsize=6, fmt="%+.1f")
    axes[1].set_title(f"centred on each day's cyclone:\nlowest {np.nanmin(z_centre):.0f} gpm"
                      + (f"; contours {moisture} anomaly ({moisture_units})" if moisture else ""),
                      fontsize=10)
    text = ""
    if has_reports:
        density = centred["report_density"].values
        shown = np.where(density > 0, density, np.nan)
        reports = axes[2].pcolormesh(dlon, dlat, shown, cmap="magma_r", vmin=0,
                                     vmax=float(np.nanmax(density)) or 1.0, shading="nearest")
        bar = figure.colorbar(reports, ax=axes[2], orientation="horizontal", fraction=0.05,
                              pad=0.16, aspect=25)
        bar.set_label("reports per cell per cyclone day", fontsize=8)
        bar.ax.tick_params(labelsize=7)
        peak = np.unravel_index(np.nanargmax(density), density.shape)
        text = (f" Reports are densest {abs(dlat[peak[0]]):.0f} degrees "
                f"{'north' if dlat[peak[0]] >= 0 else 'south'} and {abs(dlon[peak[1]]):.0f} "
                f"degrees {'east' if dlon[peak[1]] >= 0 else 'west'} of the centre.")
        axes[2].set_title(f"reports around the centre\n"
                          f"({centred.attrs.get('n_days_with_reports', '')} days with reports "
                          "coverage)", fontsize=10)
    for ax in axes[1:]:
        ax.plot([0], [0], marker="+", color="black", markersize=14, mew=2)
        ax.set_aspect(1.0 / squeeze)
        ax.set_xlabel("degrees east of the centre", fontsize=8)
        ax.set_ylabel("degrees north of the centre", fontsize=8)
        ax.tick_params(labelsize=8)
        ax.set_xlim(dlon.min(), dlon.max())
        ax.set_ylim(dlat.min(), dlat.max())
    bar = figure.colorbar(mesh, ax=list(axes[:2]), orientation="horizontal", fraction=0.05,
                          pad=0.16, aspect=40)
    bar.set_label("mean 500 hPa height anomaly (gpm)", fontsize=8)
    n = centred.attrs.get("n_days", "")
    low = np.unravel_index(np.nanargmin(z_centre), z_centre.shape)
    low_at = (f"{abs(dlat[low[0]]):g} degrees {'north' if dlat[low[0]] >= 0 else 'south'} "
              f"and {abs(dlon[low[1]]):g} degrees {'east' if dlon[low[1]] >= 0 else 'west'} "
              "of the centre")
    figure.suptitle(_title(f"Tropical days with a cyclone centre ({n} days)", season)
                    + "\nthe same days averaged in place and centred on each day's cyclone "
                      "(+)", fontsize=11)
    _note_plain_axes(figure, geography, land)
    figure.alt_text = (f"Mean 500 hPa height anomaly of {n} tropical days: averaged in "
                       f"place the lowest value is {np.nanmin(z_place):.0f} gpm; centred on "
                       f"each day's cyclone it is {np.nanmin(z_centre):.0f} gpm, {low_at}." + text)
    return figure


# ------------------------------------------------------------------ 8. gallery

def example_day_gallery(fields: xr.Dataset, examples: pd.DataFrame, events=None, *,
                        region=None, season="", source="", land=None,
                        geography=None) -> Figure:
    """A grid of example days, one row per regime and one column per period of the
    record: 500 hPa height contours over moisture shading, and the day's reports.

    ``fields``: Dataset ``(day, lat, lon)`` with ``z500`` (gpm) and optionally a
    moisture field, in the order of ``examples``
    (:func:`analogs.stages.seasonal.example_days_across_record`: ``regime``,
    ``period``, ``date``); ``events``: the reports of those days (``lat``, ``lon``,
    ``kind``, ``day``); ``source`` says where the fields come from; ``land`` and
    ``geography`` as for :func:`analogs.presentation.svg_maps.target_map`.
    """
    _need(examples, ["regime", "period", "date"], "example_day_gallery",
          "the table of example_days_across_record")
    if "z500" not in fields or fields.sizes.get("day") != len(examples):
        raise AnalogsInputError("example_day_gallery needs fields (day, lat, lon) with "
                                "'z500', one day per example row")
    regimes = ordered_regimes(examples["regime"])
    periods = list(dict.fromkeys(examples.sort_values("date")["period"]))
    lat, lon = fields["lat"].values, fields["lon"].values
    aspect = _height_to_width(lat, lon)
    panel_w = 2.4
    width = panel_w * len(periods) + 1.0
    height = len(regimes) * (panel_w * aspect + 0.5) + 1.7
    figure = new_figure(width, height)
    figure.png_dpi = THUMBNAIL_DPI + 8
    axes = figure.subplots(len(regimes), len(periods), squeeze=False)
    figure.subplots_adjust(left=0.8 / width, right=0.99, top=1 - 0.95 / height,
                           bottom=0.75 / height, wspace=0.06, hspace=0.32)
    moisture = _moisture_name(fields.data_vars)
    if moisture:
        shaded, moisture_label = _moisture_values(moisture, fields[moisture].values)
        m_low, m_high = np.nanpercentile(shaded, [1, 99])
    kinds = sorted(events["kind"].astype(str).unique()) if events is not None and len(events) else []
    kind_colour = {k: MAP_KIND_FILLS[i % len(MAP_KIND_FILLS)] for i, k in enumerate(kinds)}
    event_days = (pd.to_datetime(events["day"]).dt.normalize() if kinds else None)
    z_all = fields["z500"].values
    levels = height_levels(z_all)
    mesh, described = None, []
    for ax in axes.ravel():
        ax.set_axis_off()
    for i, row in enumerate(examples.itertuples(index=False)):
        r, c = regimes.index(row.regime), periods.index(row.period)
        ax = axes[r, c]
        ax.set_axis_on()
        if moisture:
            mesh = ax.pcolormesh(lon, lat, shaded[i], cmap="viridis", vmin=m_low, vmax=m_high,
                                 shading="nearest", alpha=0.8)
        ax.contour(lon, lat, z_all[i], levels=levels, colors="white" if moisture else "0.2",
                   linewidths=0.7)
        n_reports = 0
        if kinds:
            on_day = events[(event_days == pd.Timestamp(row.date).normalize()).to_numpy()]
            n_reports = len(on_day)
            for k, kind in enumerate(kinds):
                part = on_day[on_day["kind"].astype(str) == kind]
                ax.scatter(part["lon"], part["lat"], s=14,
                           marker=EVENT_MARKERS[k % len(EVENT_MARKERS)],
                           color=kind_colour[kind], edgecolor="black", linewidths=0.3,
                           zorder=5)
        _map_axes(ax, lat, lon, region, geography=geography, small=True, land=land,
                  xticks=r == len(regimes) - 1, yticks=c == 0)
        date = pd.Timestamp(row.date)
        ax.set_title(f"{date:%Y-%m-%d}: {n_reports} report{'s' * (n_reports != 1)}",
                     fontsize=7.5, pad=2)
        described.append(f"{row.regime} {date:%Y-%m-%d} {n_reports} reports")
    for r, regime in enumerate(regimes):
        axes[r, 0].set_ylabel(regime, fontsize=9)
        axes[r, 0].set_axis_on()
    for c, period in enumerate(periods):
        axes[0, c].annotate(period, (0.5, 1.0), xytext=(0, 16), xycoords="axes fraction",
                            textcoords="offset points", ha="center", fontsize=9,
                            fontweight="bold")
    if mesh is not None:
        bar = figure.colorbar(mesh, ax=list(axes.ravel()), orientation="horizontal",
                              fraction=0.25 / height, pad=0.35 / height, aspect=50)
        bar.set_label(moisture_label, fontsize=8)
        bar.ax.tick_params(labelsize=7)
    if kinds:
        handles = [axes[0, 0].scatter([], [], marker=EVENT_MARKERS[k % len(EVENT_MARKERS)],
                                      color=kind_colour[kind], edgecolor="black", label=kind)
                   for k, kind in enumerate(kinds)]
        figure.legend(handles=handles, loc="lower left", ncols=len(kinds), fontsize=7,
                      frameon=False, title="reports of the day", title_fontsize=7,
                      bbox_to_anchor=(0.0, 0.0))
    figure.suptitle(_title("The most typical day of each regime in each period", season)
                    + f"\ncontours: 500 hPa height every {HEIGHT_INTERVAL_GPM:.0f} gpm"
                    + (f" [{source}]" if source else ""), fontsize=10, x=0.4)
    _note_plain_axes(figure, geography, land)
    figure.alt_text = ("Example days, one per regime and period, each a map of height and "
                       "moisture" + (f" ({source})" if source else "")
                       + " with the day's reports: " + "; ".join(described) + ".")
    return figure


__all__ = [
    "REGIME_COLOURS", "cyclone_centred_maps", "example_day_gallery", "month_names",
    "ordered_regimes", "outcomes_by_regime_month_kind", "regime_calendar",
    "regime_colours", "regime_composite_maps", "regime_share_by_month",
    "run_length_histograms", "season_order", "yearly_series_with_trend",
]
