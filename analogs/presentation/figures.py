"""Figures for trainers, drawn with matplotlib without a screen: the briefing's slides
(:mod:`analogs.presentation.slides`) and its verification charts.

Presentation only: every function draws the arrays and tables it is handed; none takes
a store or writes a file. The workflow (:func:`analogs.workflows.briefing.build_briefing`)
gathers the arrays and writes the PNG bytes. The find report's maps are SVG drawn
without matplotlib (:mod:`analogs.presentation.svg_maps`); what both draw (levels,
lines, styles, notes) is computed once in :mod:`analogs.presentation.map_layers`.

Every function returns a :class:`matplotlib.figure.Figure` attached to its own Agg
canvas (no pyplot, so no global state changes and no display is needed); turn it
into PNG bytes with :func:`figure_png`. Maps are latitude / longitude axes labelled in
degrees W/E and N/S; they take ``land``, a land-sea mask or land fraction on (lat, lon)
(or its lines), and draw its 0.5 contour, and ``geography``, the Earth's lines cut to
the map (:class:`analogs.geo.MapLines`); plain axes when handed neither.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.ft2font import FT2Font
from matplotlib.patches import Polygon
from matplotlib.ticker import FixedLocator, FuncFormatter

from analogs.errors import AnalogsInputError
from analogs.presentation.map_layers import (
    EARTH_LINE_STYLES,
    LAND_COLOUR,
    LAND_EDGE_COLOUR,
    SMALL_MAP_VERTEX_STEP_DEG,
    degrees_east_label,
    degrees_north_label,
    land_lines,
    map_notes,
    nice_ticks,
    region_outline,
    thinned,
)

#: Notes under a map: font size (points); from this width (inches) two notes stand side by
#: side, on narrower figures one above the other.
NOTE_FONT_SIZE = 7
WIDE_FIGURE_INCHES = 10.0
#: Resolution of full-size figures and of small maps, dots per inch.
FIGURE_DPI = 90
THUMBNAIL_DPI = 72
#: zlib level of the PNG files: 3 encodes maps in about 60 % of the time of the default
#: 6, at sizes within 5 %.
PNG_COMPRESS_LEVEL = 3


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


def _dashes(style):
    """matplotlib's line style of a style entry of map_layers (dashes in line widths)."""
    return (0, style["dashes"]) if style.get("dashes") else "solid"


def _land_outline(ax, land, *, linewidth=1.2):
    """The land-sea boundary (:func:`~analogs.presentation.map_layers.land_lines`) as
    ONE line collection."""
    lines = land_lines(land)
    if lines:
        from matplotlib import patheffects
        collection = LineCollection(lines, colors=LAND_COLOUR, linewidths=linewidth, zorder=2)
        # A light edge keeps the boundary visible over dark shading.
        collection.set_path_effects([patheffects.withStroke(linewidth=linewidth + 1.2,
                                                            foreground=LAND_EDGE_COLOUR)])
        ax.add_collection(collection)


def _earth_lines(ax, geography, *, thin=1.0):
    """The Earth's lines of ``geography`` (:class:`analogs.geo.MapLines`, already cut
    to the map): one line collection per kind."""
    if not geography:
        return
    from matplotlib import patheffects
    for kind, style in EARTH_LINE_STYLES.items():
        lines = getattr(geography, kind)
        if thin < 1.0:
            lines = [thinned(line, SMALL_MAP_VERTEX_STEP_DEG) for line in lines]
        if lines:
            collection = LineCollection(
                lines, colors=style["colour"], linewidths=style["width"] * thin,
                linestyles=[_dashes(style)], zorder=1.8, gid=f"earth-{kind}")
            if thin == 1.0:
                # A light edge keeps the lines visible over dark shading (full-size maps;
                # the small maps have none).
                collection.set_path_effects([patheffects.withStroke(
                    linewidth=style["width"] + 0.8, foreground="#f2f2f2", alpha=0.6)])
            ax.add_collection(collection)


def _map_axes(ax, lat, lon, region=None, *, geography=None, xticks=True, yticks=True,
              small=False, land=None):
    """Lat/lon axes with a latitude-true aspect, ticks labelled in degrees W/E and N/S,
    the region drawn on them; ``xticks`` / ``yticks`` False leaves the labels off (inner
    panels of a grid)."""
    low_x, high_x = float(np.min(lon)), float(np.max(lon))
    low_y, high_y = float(np.min(lat)), float(np.max(lat))
    ax.set_xlim(low_x, high_x)
    ax.set_ylim(low_y, high_y)
    ax.set_aspect(1.0 / np.cos(np.radians(float(np.mean(lat)))))
    if small:
        # Small maps: the degree lines as one collection (cheap), labels on the outer
        # edge of the grid only; no tick objects on inner edges (they dominate the time).
        xs = nice_ticks(low_x, high_x, 4)
        ys = nice_ticks(low_y, high_y, 3)
        ax.add_collection(LineCollection(
            [[(x, low_y), (x, high_y)] for x in xs] + [[(low_x, y), (high_x, y)] for y in ys],
            colors="0.8", linewidths=0.4, zorder=0))
        ax.set_xticks(xs if xticks else [], [degrees_east_label(x) for x in xs] if xticks else [])
        ax.set_yticks(ys if yticks else [], [degrees_north_label(y) for y in ys] if yticks else [])
        ax.tick_params(labelsize=6, length=2, pad=1)
    else:
        ax.xaxis.set_major_locator(FixedLocator(nice_ticks(low_x, high_x, 6)))
        ax.yaxis.set_major_locator(FixedLocator(nice_ticks(low_y, high_y, 5)))
        ax.xaxis.set_major_formatter(FuncFormatter(degrees_east_label))
        ax.yaxis.set_major_formatter(FuncFormatter(degrees_north_label))
        ax.tick_params(labelsize=8)
    _earth_lines(ax, geography, thin=0.7 if small else 1.0)
    _land_outline(ax, land)
    outline = region_outline(region)
    if outline is not None:
        ax.add_patch(Polygon(outline, closed=True, fill=False, edgecolor="black",
                             linewidth=1.6, linestyle="--", label="region"))


def _note_plain_axes(figure, geography, land=None):
    """The map's notes (:func:`~analogs.presentation.map_layers.map_notes`) at the
    bottom right: on a wide figure side by side, on a narrow one above each other."""
    notes = map_notes(geography, land)
    stacked = figure.get_figwidth() < WIDE_FIGURE_INCHES
    line_height = 1.4 * NOTE_FONT_SIZE / 72.0 / figure.get_figheight()
    for i, note in enumerate(notes):
        side_by_side = i and not stacked
        figure.text(0.005 if side_by_side else 0.995, 0.003 + (i * line_height) * stacked,
                    note, ha="left" if side_by_side else "right", va="bottom",
                    fontsize=NOTE_FONT_SIZE, color="0.35")


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
