"""Figures for forecasters and trainers, drawn without a screen.

Presentation only: every function draws the arrays and tables it is handed (xarray
Datasets on (lat, lon), pandas tables); none takes a store or writes a file. The
workflows gather the arrays (:func:`analogs.workflows.find.report_figures`,
:func:`analogs.workflows.briefing.build_briefing`) and write the PNG bytes.

Every function returns a :class:`matplotlib.figure.Figure` attached to its own Agg
canvas (no pyplot, so no global state changes and no display is needed); turn it
into PNG bytes with :func:`figure_png`. Maps are latitude / longitude axes labelled in
degrees W/E and N/S; every query map takes ``land``, a land-sea mask or land fraction
on (lat, lon) (CF ``land_binary_mask`` / ``land_area_fraction``), and draws its 0.5
contour, and ``geography``, the Earth's coastlines, borders and state lines cut to the
map (:class:`analogs.geo.MapLines`, read by :mod:`analogs.workflows.geography` from
cartopy's offline data when it is on disk); plain axes when handed neither.

Colour maps: ``viridis`` / ``cividis`` (perceptually uniform) for amounts and
probabilities, ``RdBu_r`` only for departures (anomalies and differences).
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import xarray as xr
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
from matplotlib.collections import LineCollection
from matplotlib.colors import BoundaryNorm
from matplotlib.figure import Figure
from matplotlib.ft2font import FT2Font
from matplotlib.patches import Polygon, Rectangle
from matplotlib.ticker import FuncFormatter, MaxNLocator

from analogs.constants import ZERO_CELSIUS_K
from analogs.stages.diagnostics import RICH_MOISTURE, dewpoint_from_specific_humidity
from analogs.errors import AnalogsInputError

#: Pressure (hPa) of the ``q850`` field, for its dewpoint.
MOISTURE_LEVEL_HPA = 850.0
#: Contour interval of 500 hPa height maps, gpm (common practice, no source).
HEIGHT_INTERVAL_GPM = 60.0
#: Marker of each event kind on maps, in the order kinds sort (then reused).
EVENT_MARKERS = ("o", "^", "s", "D", "v", "P", "X")
PLAIN_AXES_NOTE = "plain latitude-longitude axes (no coastlines drawn)"
LAND_NOTE = "brown line: land-sea boundary from the archive's land-sea mask (0.5 contour)"
#: Notes under a map: font size (points); from this width (inches) two notes stand side by
#: side, on narrower figures one above the other.
NOTE_FONT_SIZE = 7
WIDE_FIGURE_INCHES = 10.0
#: Spacing (degrees along the line) of the Earth's lines' vertices on the small maps of
#: the grids: about a pixel there (2.3 inches at 72 dpi for 70 degrees: 0.4 degree).
SMALL_MAP_VERTEX_STEP_DEG = 0.25
#: How the Earth's lines are drawn: thin greys above the shading, below the contours.
EARTH_LINE_STYLES = {
    "coastline": {"name": "coastlines", "colors": "0.2", "linewidths": 0.8,
                  "linestyles": "solid"},
    "border": {"name": "borders (dashed)", "colors": "0.25", "linewidths": 0.7,
               "linestyles": (0, (4, 2))},
    "state": {"name": "state lines (dotted)", "colors": "0.4", "linewidths": 0.5,
              "linestyles": (0, (1, 1.5))},
}
#: Resolution of full-size figures and of the small maps of the analog grid, dots per inch.
FIGURE_DPI = 90
THUMBNAIL_DPI = 72
#: zlib level of the PNG files: 3 encodes the report's maps in about 60 % of the time of
#: the default 6, at sizes within 5 % (smaller for the analog grid; measured here on the
#: demo report's four maps).
PNG_COMPRESS_LEVEL = 3
#: Share of the largest smoothed density below which the density map is left blank.
DENSITY_FLOOR = 0.02
#: Columns of the analog grid.
GRID_COLUMNS = 5


# ---------------------------------------------------------------------- basics

def new_figure(width=8.0, height=6.0, *, layout=None) -> Figure:
    """A Figure on its own Agg canvas (off-screen, independent of pyplot).

    No layout engine by default: maps are placed by fixed margins, which is several
    times faster to draw than a constrained layout (measured in
    ``tests/benchmarks/bench_report.py``)."""
    figure = Figure(figsize=(width, height), layout=layout)
    _Canvas(figure)
    return figure


def figure_png(figure: Figure, *, dpi=None) -> bytes:
    """PNG bytes of ``figure`` (at ``figure.png_dpi`` when the figure sets one, else
    :data:`FIGURE_DPI`), compressed at :data:`PNG_COMPRESS_LEVEL`."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=dpi or getattr(figure, "png_dpi", FIGURE_DPI),
                   pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL})
    return buffer.getvalue()


class _LineTextRenderer(RendererAgg):
    """Agg renderer that draws each plain, unrotated line of text as one FreeType
    bitmap (``FT2Font.set_text`` and ``draw_glyphs_to_bitmap``, in C), as matplotlib
    did up to 3.9: 3.11 places and renders glyph by glyph in Python, which was most of
    the time of saving a map with labels (two thirds of the analog grid's). Mathtext,
    rotated text and a matplotlib without that call take matplotlib's own path."""

    def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
        if (ismath or angle % 360 or not hasattr(FT2Font, "set_text")
                or not hasattr(self, "_prepare_font")):  # private to matplotlib's Agg
            return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
        font = self._prepare_font(prop)
        font.set_text(s, 0, flags=get_hinting_flag())
        font.draw_glyphs_to_bitmap(antialiased=gc.get_antialiased())
        x_offset, y_offset = font.get_bitmap_offset()  # 26.6 fixed point, as the descent
        # draw_text_image takes the bitmap's left and its bottom, y downwards.
        self._renderer.draw_text_image(
            font.get_image(), round(x + x_offset / 64.0),
            round(y + (y_offset + font.get_descent()) / 64.0) + 1, 0, gc)


class _Canvas(FigureCanvasAgg):
    """The Agg canvas of every figure here, drawing with :class:`_LineTextRenderer`."""

    def get_renderer(self):
        width, height = self.get_width_height(physical=True)
        key = width, height, self.figure.dpi
        if self._lastKey != key:
            self.renderer = _LineTextRenderer(width, height, self.figure.dpi)
            self._lastKey = key
        return self.renderer


def degrees_east_label(value, _position=None) -> str:
    """``-100`` -> ``100°W``, ``20`` -> ``20°E`` (0 and 180 without a letter)."""
    value = (float(value) + 180.0) % 360.0 - 180.0
    if abs(value) < 1e-9 or abs(abs(value) - 180.0) < 1e-9:
        return f"{abs(value):g}°"
    return f"{abs(value):g}°{'W' if value < 0 else 'E'}"


def degrees_north_label(value, _position=None) -> str:
    """``35`` -> ``35°N``, ``-10`` -> ``10°S``, ``0`` -> ``0°``."""
    value = float(value)
    if abs(value) < 1e-9:
        return "0°"
    return f"{abs(value):g}°{'S' if value < 0 else 'N'}"


LAND_COLOUR = "#8c510a"


def land_lines(land) -> list[np.ndarray]:
    """The 0.5 contour of a land-sea mask or land fraction (lat, lon) as (n, 2) arrays
    of (lon, lat): where land meets sea on the archive's own grid. Traced once
    (contourpy, matplotlib's contour engine) and reused by every map of a figure."""
    if land is None:
        return []
    if isinstance(land, list):
        return land
    from contourpy import contour_generator
    land = _plane(land, "land outline")
    values = np.asarray(land.values, dtype=float)
    if not np.nanmin(values) < 0.5 < np.nanmax(values):
        return []
    generator = contour_generator(land["lon"].values, land["lat"].values,
                                  np.ma.masked_invalid(values))
    return [line for line in generator.lines(0.5) if len(line) > 1]


def _land_outline(ax, land, offsets=((0.0, 0.0),), *, linewidth=1.2):
    """The land-sea boundary (:func:`land_lines`) shifted by each (dx, dy) of
    ``offsets`` degrees, as ONE line collection (one artist for every panel)."""
    lines = land_lines(land)
    if lines:
        from matplotlib import patheffects
        collection = LineCollection([line + offset for offset in offsets for line in lines],
                                    colors=LAND_COLOUR, linewidths=linewidth, zorder=2)
        # A light edge keeps the boundary visible over dark shading.
        collection.set_path_effects([patheffects.withStroke(linewidth=linewidth + 1.2,
                                                            foreground="#f3e6c8")])
        ax.add_collection(collection)


def _earth_lines(ax, geography, offsets=((0.0, 0.0),), *, thin=1.0):
    """The Earth's lines of ``geography`` (:class:`analogs.geo.MapLines`, already cut
    to the map) shifted by each (dx, dy) of ``offsets``: one line collection per kind."""
    if not geography:
        return
    from matplotlib import patheffects
    for kind, style in EARTH_LINE_STYLES.items():
        lines = getattr(geography, kind)
        if thin < 1.0:
            lines = [_thinned(line, SMALL_MAP_VERTEX_STEP_DEG) for line in lines]
        if lines:
            collection = LineCollection(
                [line + offset for offset in offsets for line in lines],
                colors=style["colors"], linewidths=style["linewidths"] * thin,
                linestyles=[style["linestyles"]], zorder=1.8, gid=f"earth-{kind}")
            if thin == 1.0:
                # A light edge keeps the lines visible over dark shading (full-size maps;
                # the small maps of the grids have none).
                collection.set_path_effects([patheffects.withStroke(
                    linewidth=style["linewidths"] + 0.8, foreground="#f2f2f2", alpha=0.6)])
            ax.add_collection(collection)


def _thinned(line, step):
    """``line`` keeping its ends and one vertex per ``step`` degrees along it: on the
    small maps a vertex every few km draws nothing more and costs time."""
    along = np.r_[0.0, np.cumsum(np.hypot(*np.diff(line, axis=0).T))]
    keep = np.r_[True, np.diff(np.floor(along / step)) > 0]
    keep[-1] = True
    return line[keep]


def _map_axes(ax, lat, lon, region=None, *, geography=None, xticks=True, yticks=True,
              small=False, land=None):
    """Lat/lon axes with a latitude-true aspect, ticks labelled in degrees W/E and N/S,
    the region drawn on them; ``xticks`` / ``yticks`` False leaves the labels off (inner
    panels of a grid)."""
    ax.set_xlim(float(np.min(lon)), float(np.max(lon)))
    ax.set_ylim(float(np.min(lat)), float(np.max(lat)))
    ax.set_aspect(1.0 / np.cos(np.radians(float(np.mean(lat)))))
    if small:
        # Small maps: the degree lines as one collection (cheap), labels on the outer
        # edge of the grid only; no tick objects on inner edges (they dominate the time).
        xs = _degree_lines(lon, 4)
        ys = _degree_lines(lat, 3)
        ax.add_collection(LineCollection(
            [[(x, np.min(lat)), (x, np.max(lat))] for x in xs]
            + [[(np.min(lon), y), (np.max(lon), y)] for y in ys],
            colors="0.8", linewidths=0.4, zorder=0))
        ax.set_xticks(xs if xticks else [], [degrees_east_label(x) for x in xs] if xticks else [])
        ax.set_yticks(ys if yticks else [], [degrees_north_label(y) for y in ys] if yticks else [])
        ax.tick_params(labelsize=6, length=2, pad=1)
    else:
        ax.xaxis.set_major_locator(MaxNLocator(6, steps=[1, 2, 5, 10]))
        ax.yaxis.set_major_locator(MaxNLocator(5, steps=[1, 2, 5, 10]))
        ax.xaxis.set_major_formatter(FuncFormatter(degrees_east_label))
        ax.yaxis.set_major_formatter(FuncFormatter(degrees_north_label))
        ax.tick_params(labelsize=8)
    _earth_lines(ax, geography, thin=0.7 if small else 1.0)
    _land_outline(ax, land)
    if region is not None:
        _draw_region(ax, region)


def _degree_lines(values, n):
    """About ``n`` round degree values inside the span of ``values``."""
    low, high = float(np.min(values)), float(np.max(values))
    ticks = MaxNLocator(n, steps=[1, 2, 5, 10]).tick_values(low, high)
    return [float(t) for t in ticks if low <= t <= high]


def _region_outline(region):
    """The region's outline as an (n, 2) array of (lon, lat), or None."""
    if region.kind == "box":
        return np.array([(region.west, region.south), (region.east, region.south),
                         (region.east, region.north), (region.west, region.north),
                         (region.west, region.south)])
    if region.kind == "point":
        # A circle of the radius in km, in degrees (1 deg lat = 111.2 km, from memory).
        angle = np.linspace(0.0, 2.0 * np.pi, 73)
        dlat = region.radius_km / 111.2
        dlon = dlat / np.cos(np.radians(region.lat))
        return np.c_[region.lon + dlon * np.cos(angle), region.lat + dlat * np.sin(angle)]
    return None


def _draw_region(ax, region):
    if region.kind == "box":
        ax.add_patch(Rectangle((region.west, region.south), region.east - region.west,
                               region.north - region.south, fill=False, edgecolor="black",
                               linewidth=1.6, linestyle="--", label="region"))
    elif region.kind == "point":
        # A circle of the radius in km, in degrees (1 deg lat = 111.2 km, from memory).
        angle = np.linspace(0.0, 2.0 * np.pi, 73)
        dlat = region.radius_km / 111.2
        dlon = dlat / np.cos(np.radians(region.lat))
        ax.add_patch(Polygon(np.c_[region.lon + dlon * np.cos(angle),
                                   region.lat + dlat * np.sin(angle)], closed=True,
                             fill=False, edgecolor="black", linewidth=1.6, linestyle="--",
                             label="region"))


def earth_note(geography) -> str:
    """What the grey lines are and where they come from (or why none is drawn)."""
    if geography:
        kinds = [style["name"] for kind, style in EARTH_LINE_STYLES.items()
                 if getattr(geography, kind)]
        return f"grey: {', '.join(kinds)} ({geography.source})"
    return getattr(geography, "withheld", "")


def _note_plain_axes(figure, geography, land=None):
    """The map's notes at the bottom right: the land-sea boundary's, the Earth's lines'
    (on its left on a wide figure, above it on a narrow one), or that the axes are
    plain."""
    notes = ([LAND_NOTE] if land_lines(land) else []) + [earth_note(geography)] * bool(
        earth_note(geography))
    if not notes:
        notes = [PLAIN_AXES_NOTE]
    stacked = figure.get_figwidth() < WIDE_FIGURE_INCHES
    line_height = 1.4 * NOTE_FONT_SIZE / 72.0 / figure.get_figheight()
    for i, note in enumerate(notes):
        side_by_side = i and not stacked
        figure.text(0.005 if side_by_side else 0.995, 0.003 + (i * line_height) * stacked,
                    note, ha="left" if side_by_side else "right", va="bottom",
                    fontsize=NOTE_FONT_SIZE, color="0.35")


def _plane(field: xr.DataArray, owner: str) -> xr.DataArray:
    field = field.squeeze(drop=True)
    if set(field.dims) != {"lat", "lon"}:
        raise AnalogsInputError(f"{owner} needs a field on (lat, lon); got dims {field.dims}")
    return field.transpose("lat", "lon")


def _moisture(fields: xr.Dataset):
    """(shaded values, colour-bar label, values of the rich-moisture line, its
    :data:`~analogs.stages.diagnostics.RICH_MOISTURE` entry) of the moisture field: the
    line is drawn at the threshold of the field's own level (the 60 F line only for a
    2 m dewpoint)."""
    if "q850" in fields:
        q = _plane(fields["q850"], "moisture")
        dewpoint = dewpoint_from_specific_humidity(np.clip(q.values, 1e-6, None),
                                                   MOISTURE_LEVEL_HPA) - ZERO_CELSIUS_K
        return q.values * 1000.0, "850 hPa specific humidity (g/kg)", dewpoint, RICH_MOISTURE["q850"]
    if "td2m" in fields:
        td = _plane(fields["td2m"], "moisture").values - ZERO_CELSIUS_K
        return td, "2 m dewpoint (deg C)", td, RICH_MOISTURE["td2m"]
    if "pwat" in fields:
        pwat = _plane(fields["pwat"], "moisture").values
        return pwat, "precipitable water (kg m-2)", pwat, RICH_MOISTURE["pwat"]
    return None, None, None, None


def _rich_line_text(rich) -> str:
    """'white line: 850 hPa dewpoint 12 degC' for the title of a map."""
    return f"white line: {rich.measure} {rich.threshold:g} {rich.units}"


def _height_contours(ax, z500: xr.DataArray, *, colour="black", labels=True):
    z = _plane(z500, "height contours")
    low = HEIGHT_INTERVAL_GPM * np.floor(np.nanmin(z.values) / HEIGHT_INTERVAL_GPM)
    high = HEIGHT_INTERVAL_GPM * np.ceil(np.nanmax(z.values) / HEIGHT_INTERVAL_GPM)
    levels = np.arange(low, high + HEIGHT_INTERVAL_GPM, HEIGHT_INTERVAL_GPM)
    contours = ax.contour(z["lon"].values, z["lat"].values, z.values, levels=levels,
                          colors=colour, linewidths=0.9)
    if labels:
        ax.clabel(contours, fontsize=7, fmt="%.0f")
    return contours


def _moisture_layer(figure, ax, fields, *, colourbar=True):
    """Moisture shading with its colour bar and the rich-moisture line of the field's
    level; returns (label, RICH_MOISTURE entry)."""
    values, label, line_values, rich = _moisture(fields)
    if values is None:
        return None, None
    lat, lon = fields["lat"].values, fields["lon"].values
    mesh = ax.pcolormesh(lon, lat, values, cmap="viridis", shading="nearest")
    if colourbar:
        figure.colorbar(mesh, ax=ax, label=label, shrink=0.85)
    if np.nanmin(line_values) < rich.threshold < np.nanmax(line_values):
        ax.contour(lon, lat, line_values, levels=[rich.threshold], colors="white",
                   linewidths=2.0, linestyles="-")
    return label, rich


def _events_on_map(ax, events, day, kinds):
    """Plot the events of convective ``day`` by kind; returns how many."""
    if events is None or len(events) == 0:
        return 0
    on_day = events[pd.to_datetime(events["day"]).dt.normalize() == pd.Timestamp(day).normalize()]
    for i, kind in enumerate(kinds):
        part = on_day[on_day["kind"] == kind]
        ax.scatter(part["lon"], part["lat"], marker=EVENT_MARKERS[i % len(EVENT_MARKERS)],
                   s=22, facecolor=colormaps["plasma"](0.15 + 0.7 * i / max(len(kinds) - 1, 1)),
                   edgecolor="black", linewidths=0.4, label=kind, zorder=5)
    return len(on_day)


# ------------------------------------------------------------------ query maps

def target_map(fields: xr.Dataset, *, region=None, when="target", source=None,
               land=None, marks=None, geography=None) -> Figure:
    """500 hPa height contours over moisture shading, with the rich-moisture line of the
    field's level (850 hPa dewpoint 12 C, 2 m dewpoint 60 F, precipitable water 30 kg m-2).

    ``fields`` is one day on (lat, lon) with ``z500`` (gpm) and optionally a moisture
    field (``q850`` shaded in g/kg with its 850 hPa dewpoint from Bolton's formula,
    ``td2m`` or ``pwat``). ``when`` goes in the title; ``source`` says where the fields
    came from (e.g. "EOF reconstruction"). ``land``: land fraction on (lat, lon) or the
    lines of :func:`land_lines`. ``geography``: the Earth's lines cut to the map
    (:class:`analogs.geo.MapLines`). ``marks``: table of trough and ridge axes and closed
    lows (``kind`` "trough" / "ridge" / "low", ``axis``, ``lat``, ``lon``; from
    :func:`analogs.stages.features.trough_ridge_axes` and
    :func:`analogs.stages.diagnostics.find_closed_lows`), drawn with a legend.
    """
    if "z500" not in fields:
        raise AnalogsInputError("target_map needs a 'z500' field (500 hPa height, gpm)")
    figure = new_figure(8.0, 6.0)
    figure.subplots_adjust(left=0.08, right=0.97, bottom=0.06, top=0.86)
    ax = figure.add_subplot()
    label, rich = _moisture_layer(figure, ax, fields)
    _height_contours(ax, fields["z500"])
    _map_axes(ax, fields["lat"].values, fields["lon"].values, region, geography=geography,
              land=land)
    if marks is not None and len(marks):
        _draw_marks(ax, marks)
        ax.legend(handles=mark_handles(marks), loc="lower left", fontsize=7, framealpha=0.85)
    title = f"{when}: 500 hPa height (contours every {HEIGHT_INTERVAL_GPM:.0f} gpm)"
    if label:
        title += f"\nover {label.split(' (')[0]}; {_rich_line_text(rich)}"
    if source:
        title += f"\n[{source}]"
    ax.set_title(title, fontsize=10)
    _note_plain_axes(figure, geography, land)
    return figure


def analog_panel(analog_fields: xr.Dataset, analogs: pd.DataFrame, events=None, *,
                 region=None, title=None, columns=GRID_COLUMNS, land=None,
                 marks=None, geography=None) -> Figure:
    """Every analog day as a small map in a compact grid: height contours and that
    day's events by kind (distinct markers); rank, date, regime, distance and the
    table's event count (events in the outcome region) above each map.

    Parameters
    ----------
    analog_fields : Dataset ``(analog, lat, lon)`` with ``z500`` (gpm) of the analogs
        drawn, in the order of ``analogs``.
    analogs : the rows of the analogs table drawn (``rank``, ``date``, ``distance``,
        ``regime`` and ``events_total``, the events counted in the outcome region).
    events : DataFrame of the events of those days (``lat``, ``lon``, ``kind`` and
        ``day``, the convective day), or None for no markers.
    region : the outcome region, drawn on every map.
    title : the figure's title.
    columns : maps per row.
    land : land fraction on (lat, lon), or the lines of :func:`land_lines`: the land-sea
        boundary of every map, drawn as one collection.
    geography : the Earth's lines cut to the map (:class:`analogs.geo.MapLines`), on
        every map, one collection per kind.
    marks : trough and ridge axes and closed lows as for :func:`target_map`, with a
        ``panel`` column (position of the analog in ``analogs``).
    """
    if len(analogs) == 0:
        raise AnalogsInputError("analog_panel needs at least one analog row")
    if "z500" not in analog_fields or "analog" not in analog_fields["z500"].dims:
        raise AnalogsInputError("analog_panel needs a 'z500' field (500 hPa height, gpm) "
                                "on (analog, lat, lon)")
    if analog_fields.sizes["analog"] != len(analogs):
        raise AnalogsInputError(
            f"analog_panel got {analog_fields.sizes['analog']} analog fields for "
            f"{len(analogs)} analog rows; pass the fields of the rows drawn")
    kinds = sorted(events["kind"].astype(str).unique()) if events is not None else []
    columns = min(columns, len(analogs))
    rows = int(np.ceil(len(analogs) / columns))
    lat, lon = analog_fields["lat"].values, analog_fields["lon"].values
    lat0, lon0 = float(np.min(lat)), float(np.min(lon))
    span_x, span_y = float(np.ptp(lon)), float(np.ptp(lat))
    squeeze = np.cos(np.radians(float(np.mean(lat))))
    # All small maps on ONE axes (one axes is drawn far faster than twenty): panel
    # (row, column) is the map shifted by (column * step_x, -row * step_y) degrees.
    step_x, step_y = span_x * 1.08, span_y * 1.42
    panel_w = 2.3                                        # inches per panel
    scale = panel_w / step_x                             # inches per degree of longitude
    head, foot, side = 0.45, 0.7, 0.45
    # At least 7 inches wide so that the title and the legend fit a grid of one or two.
    width = max(panel_w * columns + side, 7.0)
    height = step_y * rows * scale / squeeze + head + foot
    figure = new_figure(width, height)
    figure.png_dpi = THUMBNAIL_DPI
    ax = figure.add_axes([max(side, (width - panel_w * columns) / 2) / width, foot / height,
                          panel_w * columns / width, (height - head - foot) / height])
    ax.set_axis_off()
    ax.set_xlim(-0.04 * span_x, columns * step_x - 0.04 * span_x)
    ax.set_ylim(-(rows - 1) * step_y - 0.02 * span_y, span_y + 0.40 * span_y)
    ax.set_aspect(1.0 / squeeze)
    z = analog_fields["z500"].transpose("analog", "lat", "lon").values
    low = HEIGHT_INTERVAL_GPM * np.floor(np.nanmin(z) / HEIGHT_INTERVAL_GPM)
    high = HEIGHT_INTERVAL_GPM * np.ceil(np.nanmax(z) / HEIGHT_INTERVAL_GPM)
    levels = np.arange(low, high + HEIGHT_INTERVAL_GPM, HEIGHT_INTERVAL_GPM)
    xs, ys = _degree_lines(lon, 4), _degree_lines(lat, 3)
    outline = _region_outline(region) if region is not None else None
    frames, graticule, regions, offsets = [], [], [], []
    for i, analog in enumerate(analogs.itertuples(index=False)):
        row, column = divmod(i, columns)
        dx, dy = column * step_x - lon0, -row * step_y - lat0
        offsets.append((dx, dy))
        left, bottom = lon0 + dx, lat0 + dy
        frames.append([(left, bottom), (left + span_x, bottom), (left + span_x, bottom + span_y),
                       (left, bottom + span_y), (left, bottom)])
        graticule += [[(x + dx, bottom), (x + dx, bottom + span_y)] for x in xs]
        graticule += [[(left, y + dy), (left + span_x, y + dy)] for y in ys]
        if outline is not None:
            regions.append(outline + (dx, dy))
        count = int(analog.events_total)
        ax.text(left, bottom + span_y * 1.02,
                f"#{analog.rank} {analog.date} {analog.regime}\n"
                f"d {analog.distance:.2f}, {count} event{'s' * (count != 1)} in region",
                fontsize=6.5, va="bottom", ha="left", gid=f"analog-{analog.rank}")
        if row == rows - 1 or i + columns >= len(analogs):
            for x in xs:
                ax.text(x + dx, bottom - 0.03 * span_y, degrees_east_label(x), fontsize=6,
                        ha="center", va="top", color="0.3")
        if column == 0:
            for y in ys:
                ax.text(left - 0.01 * span_x, y + dy, degrees_north_label(y), fontsize=6,
                        ha="right", va="center", color="0.3")
    _grid_contours(ax, lon, lat, z, offsets, levels)
    ax.add_collection(LineCollection(graticule, colors="0.82", linewidths=0.4, zorder=0))
    ax.add_collection(LineCollection(frames, colors="0.2", linewidths=0.7, zorder=1))
    _earth_lines(ax, geography, offsets, thin=0.6)
    _land_outline(ax, land, offsets, linewidth=0.7)
    if marks is not None and len(marks):
        panel = marks["panel"].to_numpy(dtype=int)
        shift = np.array(offsets)[panel]
        _draw_marks(ax, marks.assign(lon=marks["lon"] + shift[:, 0],
                                     lat=marks["lat"] + shift[:, 1],
                                     axis=marks["axis"] + 10000 * panel), small=True)
    if regions:
        ax.add_collection(LineCollection(regions, colors="black", linewidths=1.1,
                                         linestyles="--", zorder=4, label="region"))
    if events is not None and len(events):
        day = pd.to_datetime(events["day"]).dt.normalize()
        by_day = dict(zip(pd.to_datetime(analogs["date"]).dt.normalize(), offsets))
        shift = np.array([by_day.get(d, (np.nan, np.nan)) for d in day]).reshape(-1, 2)
        inside = (events["lon"].between(lon0, lon0 + span_x)
                  & events["lat"].between(lat0, lat0 + span_y)).to_numpy()
        for k, kind in enumerate(kinds):
            keep = ((events["kind"].astype(str) == kind).to_numpy() & inside
                    & np.isfinite(shift[:, 0]))
            ax.scatter(events["lon"].to_numpy()[keep] + shift[keep, 0],
                       events["lat"].to_numpy()[keep] + shift[keep, 1],
                       marker=EVENT_MARKERS[k % len(EVENT_MARKERS)], s=9,
                       facecolor=_kind_colour(k, len(kinds)), edgecolor="black",
                       linewidths=0.3, label=kind, zorder=5)
    handles = [ax.scatter([], [], marker=EVENT_MARKERS[k % len(EVENT_MARKERS)],
                          facecolor=_kind_colour(k, len(kinds)), edgecolor="black",
                          label=kind)
               for k, kind in enumerate(kinds)] + mark_handles(marks)
    if handles:
        # Lifted above the bottom line, where the note on the land-sea boundary goes.
        figure.legend(handles=handles, loc="lower center", ncols=len(handles), fontsize=7,
                      bbox_to_anchor=(0.5, 0.14 / height),
                      title_fontsize=7, frameon=False,
                      title="events of the day, anywhere on the map (convective day)"
                            + ("; axes and lows of the 500 hPa height drawn" if marks is not None
                               and len(marks) else "")
                            + f"; contours every {HEIGHT_INTERVAL_GPM:.0f} gpm")
    if title:
        figure.suptitle(title, fontsize=9, y=1.0 - 0.08 / height)
    figure.panel_offsets = offsets  # degrees (lon, lat) each analog's map is shifted by
    _note_plain_axes(figure, geography, land)
    return figure


def _grid_contours(ax, lon, lat, z, offsets, levels):
    """The height contours of every map of the grid as ONE contour set: the maps' fields
    side by side in one array, each on its shifted coordinates, a column of NaN after
    each map so that no line joins two maps (a quad with a masked corner is left out,
    as one with a NaN inside a map always was). The same lines as one contour per map,
    in a fiftieth of the calls."""
    n, ny, nx = z.shape
    dx = np.array([offset[0] for offset in offsets])
    dy = np.array([offset[1] for offset in offsets])
    x = np.concatenate([lon[None, :] + dx[:, None], (lon[-1] + dx)[:, None]], axis=1)
    x = np.broadcast_to(x.reshape(1, -1), (ny, n * (nx + 1)))
    y = np.broadcast_to(lat[:, None, None] + dy[None, :, None], (ny, n, nx + 1)).reshape(ny, -1)
    values = np.full((ny, n, nx + 1), np.nan)
    values[:, :, :nx] = z.transpose(1, 0, 2)
    ax.contour(x, y, values.reshape(ny, -1), levels=levels, colors="0.25", linewidths=0.6)


#: How the synoptic marks are drawn (a white halo keeps them readable over any shading).
MARK_STYLES = {
    "trough": {"color": "#b2182b", "linestyle": (0, (5, 2.5)), "label": "trough axis"},
    "ridge": {"color": "#2c5fa8", "linestyle": (0, (1.2, 1.8)), "label": "ridge axis"},
    "low": {"color": "#b2182b", "label": "closed 500 hPa low (L)"},
}


def _draw_marks(ax, marks, *, small=False):
    """Trough and ridge axes (lines of points with one ``axis`` number each) and the
    centres of closed lows (an L) from a table with ``kind``, ``axis``, ``lat``,
    ``lon``: one line collection per kind of axis."""
    from matplotlib import patheffects
    halo = [patheffects.withStroke(linewidth=(2.6 if small else 4.0), foreground="white")]
    for kind in ("trough", "ridge"):
        lines = _axis_lines(marks[marks["kind"] == kind])
        if lines:
            style = MARK_STYLES[kind]
            collection = LineCollection(lines, colors=style["color"],
                                        linestyles=[style["linestyle"]],
                                        linewidths=1.1 if small else 2.0, zorder=6,
                                        label=style["label"])
            collection.set_path_effects(halo)
            ax.add_collection(collection)
    lows = marks[marks["kind"] == "low"]
    for low in lows.itertuples(index=False):
        ax.text(low.lon, low.lat, "L", color=MARK_STYLES["low"]["color"],
                fontsize=7 if small else 13, fontweight="bold", ha="center", va="center",
                zorder=7, path_effects=halo)


def _axis_lines(part) -> list[np.ndarray]:
    """The (lon, lat) points of each ``axis`` of ``part``, in order of the axis number
    and, within one, of the table (as ``groupby("axis")`` gives them, without a pandas
    group per axis: the grid's fifty maps hold hundreds)."""
    axis = part["axis"].to_numpy()
    order = np.argsort(axis, kind="stable")
    points = part[["lon", "lat"]].to_numpy()[order]
    return [line for line in np.split(points, np.flatnonzero(np.diff(axis[order])) + 1)
            if len(line)]


def mark_handles(marks) -> list:
    """Legend entries for the kinds present in ``marks``."""
    from matplotlib.lines import Line2D
    handles = []
    present = set() if marks is None else set(marks["kind"])
    for kind in ("trough", "ridge"):
        if kind in present:
            style = MARK_STYLES[kind]
            handles.append(Line2D([], [], color=style["color"], linestyle=style["linestyle"],
                                  linewidth=2.0, label=style["label"]))
    if "low" in present:
        # The L as a path of the bold font, as the maps write it ("$L$" would import and
        # build matplotlib's mathtext parser for one letter).
        from matplotlib.font_manager import FontProperties
        from matplotlib.textpath import TextPath
        letter = TextPath((0, 0), "L", prop=FontProperties(weight="bold"))
        handles.append(Line2D([], [], color=MARK_STYLES["low"]["color"], marker=letter,
                              linestyle="none", markersize=9,
                              label=MARK_STYLES["low"]["label"]))
    return handles


def _kind_colour(index, n_kinds):
    return colormaps["plasma"](0.15 + 0.7 * index / max(n_kinds - 1, 1))


def composite_difference(mean_fields: xr.Dataset, target_fields: xr.Dataset, *,
                         region=None, title=None, land=None, geography=None) -> Figure:
    """Left: a mean of the analog days (height contours over moisture); right: that
    mean minus the target's 500 hPa height (shaded), target contours on top.

    ``mean_fields`` and ``target_fields`` are Datasets on one (lat, lon) grid with
    ``z500`` (gpm) and optionally a moisture field (as :func:`target_map`);
    ``mean_fields.attrs["n_days"]`` (number of days averaged) goes in the left title
    when present. ``title`` is the figure's title (e.g. the target and how the fields
    were made).
    """
    for name, fields in (("mean_fields", mean_fields), ("target_fields", target_fields)):
        if "z500" not in fields:
            raise AnalogsInputError(f"composite_difference needs a 'z500' field in {name} "
                                    "(500 hPa height, gpm)")
    mean_height = _plane(mean_fields["z500"], "composite_difference")
    target_height = _plane(target_fields["z500"], "composite_difference")
    lat, lon = mean_height["lat"].values, mean_height["lon"].values
    if (target_height.shape != mean_height.shape
            or not np.allclose(target_height["lat"].values, lat)
            or not np.allclose(target_height["lon"].values, lon)):
        raise AnalogsInputError("composite_difference needs the mean and the target on one "
                                "grid; regrid the target to the analogs' grid first")
    figure = new_figure(13.0, 5.4)
    figure.subplots_adjust(left=0.05, right=0.97, bottom=0.07, top=0.82, wspace=0.15)
    left, right = figure.add_subplot(1, 2, 1), figure.add_subplot(1, 2, 2)
    _moisture_layer(figure, left, mean_fields)
    _height_contours(left, mean_height)
    _map_axes(left, lat, lon, region, geography=geography, land=land)
    n_days = mean_fields.attrs.get("n_days")
    days = f"{int(n_days)} analog days" if n_days else "the analog days"
    left.set_title(f"mean of {days}:\n500 hPa height and moisture", fontsize=10)
    difference = mean_height - target_height.values
    limit = float(np.nanmax(np.abs(difference.values))) or 1.0
    mesh = right.pcolormesh(lon, lat, difference.values, cmap="RdBu_r", vmin=-limit,
                            vmax=limit, shading="nearest")
    figure.colorbar(mesh, ax=right, label="analog mean minus target, 500 hPa height (gpm)",
                    shrink=0.85)
    _height_contours(right, target_height, colour="0.2")
    _map_axes(right, lat, lon, region, geography=geography, land=land)
    right.set_title("analog mean minus target\ncontours: target 500 hPa height", fontsize=10)
    if title:
        figure.suptitle(title, fontsize=11)
    _note_plain_axes(figure, geography, land)
    return figure


def probability_map(maps: xr.Dataset, *, region=None, when="target", land=None,
                    geography=None) -> Figure:
    """Left: the neighbourhood probability of the analog days (from
    :func:`analogs.stages.outcomes.outcome_maps`) in percent on a fixed 0-100 scale, cells
    of zero left blank so that every non-zero cell shows; right: the smoothed report
    density (events per grid cell per analog day), zero left blank."""
    if "neighbourhood_probability" not in maps:
        raise AnalogsInputError("probability_map needs the Dataset of "
                                "analogs.stages.outcomes.outcome_maps")
    probability = _plane(maps["neighbourhood_probability"], "probability_map")
    lat, lon = probability["lat"].values, probability["lon"].values
    radius = probability.attrs.get("radius_km")
    density = (_plane(maps["report_density"], "probability_map")
               if "report_density" in maps else None)
    figure = new_figure(13.0 if density is not None else 8.0, 4.6)
    figure.subplots_adjust(left=0.05, right=0.97, bottom=0.07, top=0.88, wspace=0.15)
    ax = figure.add_subplot(1, 2 if density is not None else 1, 1)
    levels = np.arange(0.0, 101.0, 10.0)
    norm = BoundaryNorm(levels, colormaps["viridis"].N)
    percent = 100.0 * probability.values
    mesh = ax.pcolormesh(lon, lat, np.ma.masked_less_equal(percent, 0.0), cmap="viridis",
                         norm=norm, shading="nearest")
    near = f"within {radius:g} km" if radius else "nearby"
    figure.colorbar(mesh, ax=ax, label=f"share of analog days with an event {near} (%)",
                    shrink=0.85)
    _map_axes(ax, lat, lon, region, geography=geography, land=land)
    n = maps.attrs.get("n_analog_days")
    ax.set_title(f"Where the analog days of {when} had events nearby"
                 + (f" ({n} days)" if n else "") + "\nblank: no analog day had one",
                 fontsize=10)
    if density is not None:
        right = figure.add_subplot(1, 2, 2)
        top = float(np.nanmax(density.values)) if np.nanmax(density.values) > 0 else 1.0
        values = np.ma.masked_less(density.values, DENSITY_FLOOR * top)
        shaded = right.pcolormesh(lon, lat, values, cmap="cividis", vmin=0.0, vmax=top,
                                  shading="nearest")
        figure.colorbar(shaded, ax=right, shrink=0.85,
                        label="events per grid cell per analog day (smoothed)")
        _map_axes(right, lat, lon, region, geography=geography, land=land)
        right.set_title("Smoothed density of the analog days' events\n"
                        f"blank: below {100 * DENSITY_FLOOR:g} % of the largest value",
                        fontsize=10)
    _note_plain_axes(figure, geography, land)
    return figure


# ------------------------------------------------------------------ verification

def reliability_diagram(reliability, *, title_suffix="") -> Figure:
    """Observed frequency against forecast probability (bins of
    :func:`analogs.stages.scores.reliability_table`), with the number of forecasts per bin."""
    table = pd.DataFrame(list(reliability))
    if table.empty:
        raise AnalogsInputError("reliability_diagram needs at least one reliability bin")
    figure = new_figure(6.0, 7.0, layout="constrained")
    top = figure.add_subplot(4, 1, (1, 3))
    bottom = figure.add_subplot(4, 1, 4, sharex=top)
    top.plot([0, 1], [0, 1], color="0.5", linestyle="--", label="perfect reliability")
    top.plot(table["forecast_mean"], table["observed_frequency"], marker="o",
             color=colormaps["viridis"](0.3), label="hindcast")
    top.set_xlim(0, 1)
    top.set_ylim(0, 1)
    top.set_ylabel("observed frequency")
    top.legend(loc="upper left")
    top.set_title("Reliability of P(at least one event in region)"
                  + (f", {title_suffix}" if title_suffix else "")
                  + "\nleave-one-year-out hindcast", fontsize=10)
    bottom.bar(table["forecast_mean"], table["count"], width=0.06,
               color=colormaps["viridis"](0.6))
    bottom.set_xlabel("forecast probability (bin mean)")
    bottom.set_ylabel("forecasts")
    return figure


def roc_diagram(false_alarm_rate, hit_rate, *, title_suffix="") -> Figure:
    """ROC curve (points of :func:`analogs.stages.scores.roc_curve_points`) with its area."""
    false_alarm_rate = np.asarray(false_alarm_rate, dtype=float)
    hit_rate = np.asarray(hit_rate, dtype=float)
    area = float(np.trapezoid(hit_rate, false_alarm_rate))
    figure = new_figure(6.0, 6.0, layout="constrained")
    ax = figure.add_subplot()
    ax.plot([0, 1], [0, 1], color="0.5", linestyle="--", label="no skill")
    ax.plot(false_alarm_rate, hit_rate, marker=".", color=colormaps["viridis"](0.3),
            label=f"hindcast (area {area:.2f})")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_aspect("equal")
    ax.set_xlabel("false alarm rate")
    ax.set_ylabel("hit rate")
    ax.legend(loc="lower right")
    ax.set_title("ROC of P(at least one event in region)"
                 + (f", {title_suffix}" if title_suffix else "")
                 + "\nleave-one-year-out hindcast", fontsize=10)
    return figure
