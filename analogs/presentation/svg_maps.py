"""The find report's maps as SVG, drawn by our own code and rendered by the browser.

Presentation only: every function draws the arrays and tables it is handed and returns
SVG text (no matplotlib: the report's command never imports it). What the maps draw
(contour levels and lines, the land-sea boundary, marks, styles, notes) comes from
:mod:`analogs.presentation.map_layers`, shared with the briefing's matplotlib slides.

- Colour-filled fields (moisture, the difference map, probability, density) are small
  PNG images at the grid's resolution (:mod:`analogs.presentation.colours`), placed
  with half a grid cell beyond the outer points as matplotlib's ``shading="nearest"``
  placed them, smoothed by the browser (continuous fields) or kept as cells
  (probability and density, whose blank cells are meaningful), cut to the map's frame.
- Lines are paths in pixels, text is text (selectable, crisp at any zoom).
- Maps keep a latitude-true aspect (1 / cos of the mean latitude); longitudes are drawn
  as the grid holds them, so grids across the date line or on 0..360 draw unbroken, and
  the labels say degrees W/E and N/S.

Every figure is an ``<svg role="img">`` with its alt text as ``aria-label`` and
``<title>``. Each small map of the analog grid is its own ``<svg id="analog-map-RANK">``,
which the browsing panel shows again, larger, with ``<use>`` (:func:`map_view`).
"""

from __future__ import annotations

import base64
import html
import math

import numpy as np
import pandas as pd

from analogs.errors import AnalogsInputError
from analogs.presentation.colours import encode_png, kind_colour, mapped_rgba
from analogs.presentation.map_layers import (
    DENSITY_FLOOR,
    EARTH_LINE_STYLES,
    EVENT_MARKERS,
    HEIGHT_INTERVAL_GPM,
    LAND_COLOUR,
    LAND_EDGE_COLOUR,
    MARK_STYLES,
    SMALL_MAP_VERTEX_STEP_DEG,
    axis_lines,
    contour_lines,
    degrees_east_label,
    degrees_north_label,
    height_levels,
    land_lines,
    map_notes,
    moisture,
    nice_ticks,
    plane,
    region_outline,
    rich_line_text,
    thinned,
)

FONT = "DejaVu Sans, Verdana, Arial, sans-serif"
#: Pixels of a point of line width (the matplotlib maps were drawn at 90 dpi).
PX_PER_PT = 1.25
#: Widths (px) of the maps: the target map, each of two maps side by side, and each
#: small map of the analog grid.
MAP_WIDTH, PAIR_MAP_WIDTH, SMALL_MAP_WIDTH = 560.0, 420.0, 150.0
#: Columns of the analog grid.
GRID_COLUMNS = 5
#: The small maps' event markers: matplotlib's marker shapes in a 10 x 10 box.
MARKER_SHAPES = {
    "o": '<circle cx="5" cy="5" r="4"/>', "^": '<path d="M5 1 9 9 1 9z"/>',
    "s": '<path d="M1.5 1.5h7v7h-7z"/>', "D": '<path d="M5 .5 9.5 5 5 9.5 .5 5z"/>',
    "v": '<path d="M1 1h8L5 9z"/>',
    "P": '<path d="M3.5 1h3v2.5H9v3H6.5V9h-3V6.5H1v-3h2.5z"/>',
    "X": '<path d="M1 3 3 1 5 3 7 1 9 3 7 5 9 7 7 9 5 7 3 9 1 7 3 5z"/>'}


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _points(xy) -> str:
    """'x,y x,y ...' of an (n, 2) array of pixels, to a tenth of a pixel: each number
    ``"%g" % round(v, 1)``. A path of more numbers than the tenths it spans (the
    analog grid's contours: thousands of points on a few thousand tenths) looks them up
    in a table of those tenths, each formatted once (formatting every number was a
    third of drawing the grid); a shorter one formats each number."""
    tenths = np.rint(np.asarray(xy, dtype=float) * 10.0).ravel()  # numpy's round(v, 1)
    if not tenths.size:
        return ""
    low, high = tenths.min(), tenths.max()
    if not (np.isfinite(low) and np.isfinite(high)) or high - low >= tenths.size:
        return ("%g,%g " * (tenths.size // 2) % tuple(tenths / 10.0 + 0.0)).rstrip()
    first = int(low)
    table = ["%g" % (k / 10) for k in range(first, int(high) + 1)]
    words = [table[k] for k in (tenths.astype(np.int64) - first).tolist()]
    return " ".join(map(",".join, zip(words[::2], words[1::2])))


class Frame:
    """A map's box in pixels: (lon, lat) -> (x, y) from its top left corner, the
    height set by a latitude-true aspect (1 / cos of the mean latitude)."""

    def __init__(self, lat, lon, width):
        self.lat0, self.lat1 = float(np.min(lat)), float(np.max(lat))
        self.lon0, self.lon1 = float(np.min(lon)), float(np.max(lon))
        self.width = float(width)
        squeeze = math.cos(math.radians(float(np.mean(lat))))
        self.height = (self.width * (self.lat1 - self.lat0)
                       / ((self.lon1 - self.lon0) * squeeze))
        self.x_scale = self.width / (self.lon1 - self.lon0)
        self.y_scale = self.height / (self.lat1 - self.lat0)

    def px(self, lon, lat):
        """Pixel (x, y) of longitudes and latitudes (arrays or numbers)."""
        return ((np.asarray(lon, dtype=float) - self.lon0) * self.x_scale,
                (self.lat1 - np.asarray(lat, dtype=float)) * self.y_scale)

    def path(self, lines) -> str:
        """The SVG path data of (n, 2) arrays of (lon, lat): every point placed and
        written at once, then cut back into its line."""
        lines = list(lines)
        if not lines:
            return ""
        joined = np.concatenate(lines).reshape(-1, 2)
        pairs = _points(np.column_stack(self.px(joined[:, 0], joined[:, 1]))).split(" ")
        ends = np.cumsum([len(line) for line in lines])
        return "".join("M" + " ".join(pairs[start:end])
                       for start, end in zip(np.r_[0, ends[:-1]], ends))


def _stroke(d, colour, width, dashes=None, extra="") -> str:
    if not d:
        return ""
    dash = (f' stroke-dasharray="{",".join(f"{v * width:.2f}" for v in dashes)}"'
            if dashes else "")
    return (f'<path d="{d}" fill="none" stroke="{colour}" stroke-width="{width:.2f}" '
            f'stroke-linejoin="round"{dash}{extra}/>')


def _text(x, y, text, size, *, anchor="start", baseline="auto", colour="#000", weight="",
          halo=None, extra="") -> str:
    halo_attrs = (f' stroke="{halo[0]}" stroke-width="{halo[1]}" paint-order="stroke" '
                  'stroke-linejoin="round"' if halo else "")
    return (f'<text x="{x:.1f}" y="{y:.1f}" font-size="{size}" text-anchor="{anchor}" '
            f'dominant-baseline="{baseline}" fill="{colour}"'
            + (f' font-weight="{weight}"' if weight else "") + halo_attrs + extra
            + f">{_e(text)}</text>")


def _lines_of_text(x, y, lines, size, **kwargs) -> str:
    """Several lines of text, the first at ``y``, each 1.25 sizes below the last."""
    return "".join(_text(x, y + i * 1.25 * size, line, size, **kwargs)
                   for i, line in enumerate(lines))


def _png_uri(rgba) -> str:
    return "data:image/png;base64," + base64.b64encode(encode_png(rgba)).decode()


def _raster(frame: Frame, lat, lon, rgba, *, smooth=True) -> str:
    """A colour-mapped field as an image on the map: cell centres at the grid points,
    half a cell beyond the outer points (matplotlib's ``shading="nearest"``)."""
    lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
    if lat[0] < lat[-1]:
        rgba = rgba[::-1]  # the image's first row is the northernmost
    if lon[0] > lon[-1]:
        rgba = rgba[:, ::-1]
    dlon = (frame.lon1 - frame.lon0) / max(len(lon) - 1, 1)
    dlat = (frame.lat1 - frame.lat0) / max(len(lat) - 1, 1)
    x, y = frame.px(frame.lon0 - dlon / 2, frame.lat1 + dlat / 2)
    width, height = len(lon) * dlon * frame.x_scale, len(lat) * dlat * frame.y_scale
    style = "" if smooth else ' style="image-rendering:pixelated"'
    return (f'<image class="field" x="{float(x):.2f}" y="{float(y):.2f}" width="{width:.2f}" '
            f'height="{height:.2f}" preserveAspectRatio="none"{style} '
            f'href="{_png_uri(rgba)}"/>')


def _contours(frame, lon, lat, values, levels, *, colour, width, labelled=False,
              css="height-contours") -> str:
    """Contour lines of ``values`` at ``levels`` as one path; with ``labelled``, each
    line long enough carries its level at its middle (white halo), labels kept apart."""
    traced = contour_lines(lon, lat, values, levels)
    d = frame.path([line for _, lines in traced for line in lines])
    parts = [_stroke(d, colour, width, extra=f' class="{css}"')]
    if labelled:
        placed = []
        for level, lines in traced:
            for line in lines:
                label = _label_place(frame, line, placed)
                if label is None:
                    continue
                cx, cy, angle = label
                placed.append((cx, cy))
                parts.append(_text(cx, cy, f"{level:.0f}", 9, anchor="middle",
                                   baseline="central", halo=("#fff", 3),
                                   extra=f' transform="rotate({angle:.0f} {cx:.1f} {cy:.1f})"'
                                         ' class="contour-label"'))
    return "".join(parts)


def _label_place(frame, line, placed):
    """(x, y, angle) of a contour label on ``line``: the first of a few points along it
    (its middle first) inside the map and 45 px from every label ``placed``; None for a
    line under 60 px or without such a point. The angle keeps the text upright."""
    x, y = frame.px(line[:, 0], line[:, 1])
    along = np.r_[0.0, np.cumsum(np.hypot(np.diff(x), np.diff(y)))]
    if along[-1] < 60.0 or len(x) < 3:
        return None
    for share in (0.5, 0.3, 0.7, 0.15, 0.85):
        i = min(max(int(np.searchsorted(along, along[-1] * share)), 1), len(x) - 2)
        cx, cy = float(x[i]), float(y[i])
        if (15 < cx < frame.width - 15 and 8 < cy < frame.height - 8
                and all(math.hypot(cx - px, cy - py) >= 45 for px, py in placed)):
            angle = math.degrees(math.atan2(y[i + 1] - y[i - 1], x[i + 1] - x[i - 1]))
            return cx, cy, (angle + 90.0) % 180.0 - 90.0
    return None


def _earth(frame, geography, *, small=False) -> str:
    """The Earth's lines (:class:`analogs.geo.MapLines`, cut to the map), one path per
    kind, greys with a light edge on full-size maps."""
    if not geography:
        return ""
    parts = []
    scale = PX_PER_PT * (0.6 if small else 1.0)
    for kind, style in EARTH_LINE_STYLES.items():
        lines = getattr(geography, kind)
        if small:
            lines = [thinned(line, SMALL_MAP_VERTEX_STEP_DEG) for line in lines]
        d = frame.path(lines)
        if not small:
            parts.append(_stroke(d, "#f2f2f2", (style["width"] + 0.8) * PX_PER_PT,
                                 extra=' stroke-opacity="0.6"'))
        parts.append(_stroke(d, style["colour"], style["width"] * scale, style["dashes"],
                             extra=f' class="earth-{kind}"'))
    return "".join(parts)


def _land(frame, lines, *, small=False) -> str:
    d = frame.path(lines)
    width = (0.7 if small else 1.2) * PX_PER_PT
    return (_stroke(d, LAND_EDGE_COLOUR, width + 1.2 * PX_PER_PT)
            + _stroke(d, LAND_COLOUR, width, extra=' class="land"'))


def _region(frame, region, *, small=False) -> str:
    outline = region_outline(region)
    if outline is None:
        return ""
    width = (1.1 if small else 1.6) * PX_PER_PT
    return _stroke(frame.path([outline]), "#000", width, (3.7, 1.6),
                   extra=' class="region"')


def _mark_arrays(marks) -> dict | None:
    """The marks' columns as arrays (kind, axis, lon, lat), or None for no marks."""
    if marks is None or not len(marks):
        return None
    return {name: marks[name].to_numpy() for name in ("kind", "axis", "lon", "lat")}


def _marks(frame, marks, *, small=False) -> str:
    """Trough and ridge axes (lines with a white halo) and closed lows (an L) of
    ``marks`` (:func:`_mark_arrays`)."""
    if marks is None:
        return ""
    parts = []
    width = (1.1 if small else 2.0) * PX_PER_PT
    halo = (2.6 if small else 4.0) * PX_PER_PT
    for kind in ("trough", "ridge"):
        keep = marks["kind"] == kind
        d = frame.path(axis_lines(marks["axis"][keep], marks["lon"][keep], marks["lat"][keep]))
        style = MARK_STYLES[kind]
        parts.append(_stroke(d, "#fff", halo) + _stroke(d, style["colour"], width,
                                                         style["dashes"],
                                                         extra=f' class="{kind}"'))
    lows = marks["kind"] == "low"
    x, y = frame.px(marks["lon"][lows], marks["lat"][lows])
    for cx, cy in zip(x, y):
        parts.append(_text(cx, cy, "L", 9 if small else 17, anchor="middle",
                           baseline="central", colour=MARK_STYLES["low"]["colour"],
                           weight="bold", halo=("#fff", 2.5 if small else 3.5),
                           extra=' class="low"'))
    return "".join(parts)


def _marker(x, y, marker, colour, size, kind) -> str:
    # Symbols of _MARKER_DEFS, named in words (a marker letter such as ^ is no id).
    return (f'<use href="#marker-{_MARKER_IDS[marker]}" x="{x - size / 2:.1f}" '
            f'y="{y - size / 2:.1f}" width="{size}" height="{size}" fill="{colour}" '
            f'class="event" data-kind="{_e(kind)}"/>')


_MARKER_IDS = {"o": "circle", "^": "up", "s": "square", "D": "diamond", "v": "down",
               "P": "plus", "X": "cross"}
_MARKER_DEFS = "".join(
    f'<symbol id="marker-{_MARKER_IDS[name]}" viewBox="0 0 10 10">'
    f'<g stroke="#000" stroke-width=".8">{shape}</g></symbol>'
    for name, shape in MARKER_SHAPES.items())


def marker_styles(kinds) -> dict:
    """kind -> (marker letter, colour as #rrggbb) as the maps draw the events of
    ``kinds`` (sorted, as the maps sort them)."""
    return {kind: (EVENT_MARKERS[i % len(EVENT_MARKERS)], kind_colour(i, len(kinds)))
            for i, kind in enumerate(kinds)}


def _frame_box(frame) -> str:
    return (f'<rect x="0" y="0" width="{frame.width:.1f}" height="{frame.height:.1f}" '
            'fill="none" stroke="#333" stroke-width="1"/>')


def _axes_ticks(frame, x0, y0, *, size=10, nx=6, ny=5, bottom=True, left=True) -> str:
    """Degree ticks and labels outside the frame whose top left is (x0, y0)."""
    parts = []
    if bottom:
        for value in nice_ticks(frame.lon0, frame.lon1, nx):
            x = x0 + float(frame.px(value, frame.lat0)[0])
            y = y0 + frame.height
            parts.append(f'<path d="M{x:.1f},{y:.1f}v4" stroke="#333"/>'
                         + _text(x, y + 5 + size, degrees_east_label(value), size,
                                 anchor="middle"))
    if left:
        for value in nice_ticks(frame.lat0, frame.lat1, ny):
            y = y0 + float(frame.px(frame.lon0, value)[1])
            parts.append(f'<path d="M{x0:.1f},{y:.1f}h-4" stroke="#333"/>'
                         + _text(x0 - 6, y, degrees_north_label(value), size, anchor="end",
                                 baseline="central"))
    return "".join(parts)


def _colour_bar(x, y, height, name, vmin, vmax, label, *, bins=None) -> str:
    """A vertical colour bar 14 px wide, its ticks and label on its right."""
    width = 14.0
    if bins is None:
        ramp = np.linspace(vmax, vmin, 256)[:, None]
        rgba = mapped_rgba(ramp, name, vmin, vmax)
    else:
        centres = (np.asarray(bins[:-1]) + np.asarray(bins[1:])) / 2
        rgba = mapped_rgba(centres[::-1, None], name, vmin, vmax, bins=bins)
    parts = [f'<image x="{x:.1f}" y="{y:.1f}" width="{width}" height="{height:.1f}" '
             f'preserveAspectRatio="none" style="image-rendering:pixelated" '
             f'href="{_png_uri(rgba)}"/>',
             f'<rect x="{x:.1f}" y="{y:.1f}" width="{width}" height="{height:.1f}" '
             'fill="none" stroke="#333" stroke-width=".8"/>']
    ticks = list(bins) if bins is not None else nice_ticks(vmin, vmax, 6)
    for value in ticks:
        ty = y + height * (vmax - value) / ((vmax - vmin) or 1.0)
        parts.append(f'<path d="M{x + width:.1f},{ty:.1f}h4" stroke="#333"/>'
                     + _text(x + width + 6, ty, f"{value:g}", 10, baseline="central"))
    lx, ly = x + width + 48, y + height / 2
    parts.append(_text(lx, ly, label, 11, anchor="middle", baseline="central",
                       extra=f' transform="rotate(-90 {lx:.1f} {ly:.1f})"'))
    return "".join(parts)


def _svg(width, height, alt, body) -> str:
    """A whole figure: its size in pixels, its alt text as aria-label and title."""
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="map" role="img" '
            f'aria-label="{_e(alt)}" viewBox="0 0 {width:.0f} {height:.0f}" '
            f'width="{width:.0f}" height="{height:.0f}" font-family="{FONT}">'
            f"<title>{_e(alt)}</title>"
            f'<rect width="100%" height="100%" fill="#fff"/>{body}</svg>')


def _notes(width, height, geography, land) -> str:
    """The map's notes at the bottom right, one line each."""
    notes = map_notes(geography, land)
    return "".join(_text(width - 4, height - 5 - 12 * i, note, 9, anchor="end",
                         colour="#595959")
                   for i, note in enumerate(reversed(notes)))


def _map(frame, x, y, content, *, map_id=None) -> str:
    """The map's content (pixels from its top left) cut to its frame at (x, y)."""
    identity = f' id="{map_id}"' if map_id else ""
    return (f'<g transform="translate({x:.1f} {y:.1f})"><svg{identity} width="{frame.width:.1f}" '
            f'height="{frame.height:.1f}" viewBox="0 0 {frame.width:.1f} {frame.height:.1f}" '
            f'overflow="hidden">{content}{_frame_box(frame)}</svg></g>')


def _full_map(frame, fields, *, shading, contours_of, contour_colour, region, land,
              geography, marks=None, rich_line=False) -> str:
    """A full-size map's content: shading, the Earth's lines, the land-sea boundary,
    the rich-moisture line (``rich_line``: of the moisture field of ``fields``),
    labelled height contours, the region and the marks."""
    lat, lon = fields["lat"].values, fields["lon"].values
    parts = [shading, _earth(frame, geography), _land(frame, land_lines(land))]
    _, _, line_values, rich = moisture(fields) if rich_line else (None,) * 4
    if rich is not None and np.nanmin(line_values) < rich.threshold < np.nanmax(line_values):
        parts.append(_contours(frame, lon, lat, line_values, [rich.threshold],
                               colour="#fff", width=2.0 * PX_PER_PT, css="rich-moisture"))
    if contours_of is not None:
        z = plane(contours_of, "height contours").values
        parts.append(_contours(frame, lon, lat, z, height_levels(z), colour=contour_colour,
                               width=0.9 * PX_PER_PT, labelled=True))
    parts.append(_region(frame, region))
    parts.append(_marks(frame, _mark_arrays(marks)))
    return "".join(parts)


def _moisture_shading(frame, fields):
    """(image, colour-bar arguments) of the moisture field, or ("", None)."""
    values, label, _, _ = moisture(fields)
    if values is None:
        return "", None
    vmin, vmax = float(np.nanmin(values)), float(np.nanmax(values))
    rgba = mapped_rgba(values, "viridis", vmin, vmax)
    return (_raster(frame, fields["lat"].values, fields["lon"].values, rgba),
            ("viridis", vmin, vmax, label))


def _legend_of_marks(x, y, marks) -> str:
    """The kinds of marks present, in a light box at (x, y) (its bottom left)."""
    present = set(marks["kind"]) if marks is not None and len(marks) else set()
    entries = [kind for kind in ("trough", "ridge", "low") if kind in present]
    if not entries:
        return ""
    height = 8 + 15 * len(entries)
    parts = [f'<rect x="{x:.1f}" y="{y - height:.1f}" width="150" height="{height}" '
             'fill="#fff" fill-opacity="0.85" stroke="#ccc" rx="3"/>']
    for i, kind in enumerate(entries):
        style = MARK_STYLES[kind]
        ly = y - height + 11 + 15 * i
        if kind == "low":
            parts.append(_text(x + 18, ly, "L", 12, anchor="middle", baseline="central",
                               colour=style["colour"], weight="bold"))
        else:
            parts.append(_stroke(f"M{x + 6:.1f},{ly:.1f}h24", style["colour"],
                                 2.0 * PX_PER_PT, style["dashes"]))
        parts.append(_text(x + 36, ly, style["label"], 10, baseline="central"))
    return "".join(parts)


# ------------------------------------------------------------------ the report's maps

def target_map(fields, *, region=None, when="target", source=None, land=None, marks=None,
               geography=None, alt="") -> str:
    """500 hPa height contours (labelled) over moisture shading, with the rich-moisture
    line of the field's level, the land-sea boundary, the Earth's lines, the region
    and the trough / ridge axes and closed lows of ``marks`` with their legend.

    ``fields``: one day on (lat, lon) with ``z500`` (gpm) and optionally ``q850``,
    ``td2m`` or ``pwat``; ``land``: land fraction on (lat, lon) or the lines of
    :func:`~analogs.presentation.map_layers.land_lines`; ``geography``: the Earth's
    lines cut to the map (:class:`analogs.geo.MapLines`); ``marks``: a table with
    ``kind`` ("trough" / "ridge" / "low"), ``axis``, ``lat``, ``lon``."""
    if "z500" not in fields:
        raise AnalogsInputError("target_map needs a 'z500' field (500 hPa height, gpm)")
    lat, lon = fields["lat"].values, fields["lon"].values
    frame = Frame(lat, lon, MAP_WIDTH)
    shading, bar = _moisture_shading(frame, fields)
    left, top = 58.0, 70.0
    title = [f"{when}: 500 hPa height (contours every {HEIGHT_INTERVAL_GPM:.0f} gpm)"]
    if bar:
        _, _, _, rich = moisture(fields)
        title.append(f"over {bar[3].split(' (')[0]}; {rich_line_text(rich)}")
    if source:
        title.append(f"[{source}]")
    width = left + frame.width + (110 if bar else 20)
    height = top + frame.height + 66
    body = [_lines_of_text(left + frame.width / 2, 20, title, 13, anchor="middle"),
            _map(frame, left, top, _full_map(
                frame, fields, shading=shading, contours_of=fields["z500"],
                contour_colour="#000", region=region, land=land, geography=geography,
                marks=marks, rich_line=True)),
            _axes_ticks(frame, left, top),
            _legend_of_marks(left + 6, top + frame.height - 6, marks)]
    if bar:
        body.append(_colour_bar(left + frame.width + 16, top, frame.height, *bar))
    body.append(_notes(width, height, geography, land))
    return _svg(width, height, alt or title[0], "".join(body))


def analog_panel(analog_fields, analogs: pd.DataFrame, events=None, *, region=None,
                 title=None, columns=GRID_COLUMNS, land=None, marks=None, geography=None,
                 alt="", views=None) -> str:
    """Every analog day as a small map in a grid: thin height contours (every
    :data:`HEIGHT_INTERVAL_GPM` gpm, one set of levels for all), that day's events on
    the map by kind, its trough / ridge axes and closed lows; rank, date, regime,
    distance and the table's count of events in the outcome region above each map.

    ``analog_fields``: Dataset ``(analog, lat, lon)`` with ``z500`` of the rows of
    ``analogs`` (``rank``, ``date``, ``distance``, ``regime``, ``events_total``), in
    their order; ``events``: the events of those days (``lat``, ``lon``, ``kind``,
    ``day``) or None; ``marks``: as for :func:`target_map` with a ``panel`` column
    (position in ``analogs``). Each map is ``<svg id="analog-map-RANK">``; ``views``, a
    list, receives (map id, width, height) of each in rank order for :func:`map_view`.
    Drawn by :class:`AnalogGrid`, whose cells may also be drawn a few at a time.
    """
    grid = AnalogGrid(analog_fields, analogs, events, region=region, title=title,
                      columns=columns, land=land, geography=geography)
    return grid.svg(grid.cells(range(len(analogs)), marks, views), mark_kinds(marks), alt)


def mark_kinds(marks) -> list[str]:
    """The kinds of synoptic marks in ``marks`` (None or a table with ``kind``), sorted."""
    return sorted(set(marks["kind"])) if marks is not None and len(marks) else []


class AnalogGrid:
    """The analog grid of :func:`analog_panel`: its layout and what every cell shares
    (frame, contour levels of all the days, marker styles of all their events, the
    graticule and the fixed layers), made once; then the cells of any analogs
    (:meth:`cells`, in any number of calls: the report draws some in a forked child)
    and the whole figure around them (:meth:`svg`)."""

    def __init__(self, analog_fields, analogs: pd.DataFrame, events=None, *, region=None,
                 title=None, columns=GRID_COLUMNS, land=None, geography=None):
        if len(analogs) == 0:
            raise AnalogsInputError("analog_panel needs at least one analog row")
        if "z500" not in analog_fields or "analog" not in analog_fields["z500"].dims:
            raise AnalogsInputError("analog_panel needs a 'z500' field (500 hPa height, "
                                    "gpm) on (analog, lat, lon)")
        if analog_fields.sizes["analog"] != len(analogs):
            raise AnalogsInputError(
                f"analog_panel got {analog_fields.sizes['analog']} analog fields for "
                f"{len(analogs)} analog rows; pass the fields of the rows drawn")
        self.days = list(analogs.itertuples(index=False))
        self.title, self.land, self.geography = title, land, geography
        kinds = sorted(events["kind"].astype(str).unique()) if events is not None else []
        self.styles = marker_styles(kinds)
        self.columns = min(columns, len(analogs))
        self.rows = int(np.ceil(len(analogs) / self.columns))
        self.lat, self.lon = analog_fields["lat"].values, analog_fields["lon"].values
        frame = self.frame = Frame(self.lat, self.lon, SMALL_MAP_WIDTH)
        self.z = analog_fields["z500"].transpose("analog", "lat", "lon").values
        self.levels = height_levels(self.z)
        xs, ys = nice_ticks(frame.lon0, frame.lon1, 4), nice_ticks(frame.lat0, frame.lat1, 3)
        gx = frame.px(np.asarray(xs), frame.lat0)[0]
        gy = frame.px(frame.lon0, np.asarray(ys))[1]
        self.graticule = _stroke(
            "".join(f"M{x:.1f},0V{frame.height:.1f}" for x in np.atleast_1d(gx))
            + "".join(f"M0,{y:.1f}H{frame.width:.1f}" for y in np.atleast_1d(gy)),
            "#d1d1d1", 0.5)
        # Shared by every map: the land-sea boundary, the Earth's lines and the region.
        self.fixed = (_earth(frame, geography, small=True)
                      + _land(frame, land_lines(land), small=True)
                      + _region(frame, region, small=True))
        self.by_day = {}
        if events is not None and len(events):
            inside = (events["lon"].between(frame.lon0, frame.lon1)
                      & events["lat"].between(frame.lat0, frame.lat1))
            on_map = events[inside]
            self.by_day = dict(tuple(on_map.groupby(
                pd.to_datetime(on_map["day"]).dt.normalize())))
        self.cell_w, self.head = frame.width + 22.0, 30.0
        self.cell_h = self.head + frame.height + 14.0
        self.left, self.top = 44.0, 34.0
        self.width = max(self.left + self.cell_w * self.columns + 10, 640.0)
        self.foot = 84.0
        self.height = self.top + self.cell_h * self.rows + self.foot

    def cells(self, positions, marks=None, views=None) -> list[str]:
        """The SVG of the cells of the analogs at ``positions`` (increasing), in order:
        title lines, map (``<svg id="analog-map-RANK">``) and the axis labels of the
        grid's edge cells; ``marks`` (``panel``: position among all the analogs) those
        of these days; ``views`` receives each map's (id, width, height)."""
        frame, lat, lon = self.frame, self.lat, self.lon
        panel_marks = {}
        if marks is not None and len(marks):
            panel = marks["panel"].to_numpy()
            order = np.argsort(panel, kind="stable")
            cuts = np.flatnonzero(np.diff(panel[order])) + 1
            columns_of = _mark_arrays(marks)
            for rows_of in np.split(order, cuts):
                panel_marks[int(panel[rows_of[0]])] = {
                    name: values[rows_of] for name, values in columns_of.items()}
        body = []
        for i in positions:
            analog = self.days[i]
            row, column = divmod(i, self.columns)
            x0 = self.left + column * self.cell_w
            y0 = self.top + row * self.cell_h + self.head
            count = int(analog.events_total)
            body.append(_lines_of_text(x0, y0 - 18, [
                f"#{analog.rank} {analog.date} {analog.regime}",
                f"d {analog.distance:.2f}, {count} event{'s' * (count != 1)} in region"],
                9, extra=f' class="analog-title" data-rank="{analog.rank}"'))
            content = [self.graticule, self.fixed,
                       _contours(frame, lon, lat, self.z[i], self.levels, colour="#404040",
                                 width=0.6 * PX_PER_PT),
                       _marks(frame, panel_marks.get(i), small=True)]
            day = self.by_day.get(pd.Timestamp(analog.date).normalize())
            if day is not None:
                x, y = frame.px(day["lon"].to_numpy(), day["lat"].to_numpy())
                content += [_marker(float(px), float(py), *self.styles[str(kind)], 6, kind)
                            for px, py, kind in zip(x, y, day["kind"].astype(str))]
            map_id = f"analog-map-{analog.rank}"
            body.append(_map(frame, x0, y0, "".join(content), map_id=map_id))
            if views is not None:
                views.append((map_id, frame.width, frame.height))
            if row == self.rows - 1 or i + self.columns >= len(self.days):
                body.append(_axes_ticks(frame, x0, y0, size=8, nx=4, left=False))
            if column == 0:
                body.append(_axes_ticks(frame, x0, y0, size=8, ny=3, bottom=False))
        return body

    def svg(self, cells, kinds, alt="") -> str:
        """The grid figure around ``cells`` (every cell's :meth:`cells` parts, in order):
        title, legend (event kinds, then the synoptic mark ``kinds`` drawn) and notes."""
        body = [f"<defs>{_MARKER_DEFS}</defs>"]
        if self.title:
            body.append(_text(self.width / 2, 20, self.title, 13, anchor="middle"))
        body += cells
        body.append(_grid_legend(self.width, self.height - self.foot + 22, self.styles,
                                 kinds))
        body.append(_notes(self.width, self.height, self.geography, self.land))
        return _svg(self.width, self.height, alt or self.title or "analog days",
                    "".join(body))


def _grid_legend(width, y, styles, kinds) -> str:
    """One line of keys (event kinds, then the mark ``kinds`` drawn) centred at ``y``,
    its title above."""
    present = set(kinds)
    title = ("events of the day, anywhere on the map (convective day)"
             + ("; axes and lows of the 500 hPa height drawn" if present else "")
             + f"; contours every {HEIGHT_INTERVAL_GPM:.0f} gpm")
    keys = [(kind, "marker", style) for kind, style in styles.items()]
    keys += [(MARK_STYLES[k]["label"], k, None) for k in ("trough", "ridge", "low")
             if k in present]
    widths = [34 + 6.2 * len(label) for label, _, _ in keys]
    x = width / 2 - sum(widths) / 2
    parts = [_text(width / 2, y, title, 10, anchor="middle")]
    for (label, kind, style), step in zip(keys, widths):
        ky = y + 18
        if kind == "marker":
            parts.append(_marker(x + 12, ky, *style, 9, label))
        elif kind == "low":
            parts.append(_text(x + 12, ky, "L", 12, anchor="middle", baseline="central",
                               colour=MARK_STYLES["low"]["colour"], weight="bold"))
        else:
            parts.append(_stroke(f"M{x:.1f},{ky:.1f}h24", MARK_STYLES[kind]["colour"],
                                 2.0 * PX_PER_PT, MARK_STYLES[kind]["dashes"]))
        parts.append(_text(x + 28, ky, label, 10, baseline="central"))
        x += step
    return "".join(parts)


def map_view(view, alt) -> str:
    """One small map of the analog grid shown again at any size (``<use>`` of its
    ``<svg>``; ``view`` is (map id, width, height) from :func:`analog_panel`)."""
    map_id, width, height = view
    return (f'<svg class="tile" role="img" aria-label="{_e(alt)}" '
            f'viewBox="0 0 {width:.1f} {height:.1f}"><title>{_e(alt)}</title>'
            f'<use href="#{_e(map_id)}"/></svg>')


def composite_difference(mean_fields, target_fields, *, region=None, title=None, land=None,
                         geography=None, alt="") -> str:
    """Left: a mean of the analog days (height contours over moisture); right: that
    mean minus the target's 500 hPa height (shaded blue to red, symmetric about zero),
    the target's contours on top. ``mean_fields.attrs["n_days"]`` goes in the left
    title when present."""
    for name, fields in (("mean_fields", mean_fields), ("target_fields", target_fields)):
        if "z500" not in fields:
            raise AnalogsInputError(f"composite_difference needs a 'z500' field in {name} "
                                    "(500 hPa height, gpm)")
    mean_height = plane(mean_fields["z500"], "composite_difference")
    target_height = plane(target_fields["z500"], "composite_difference")
    lat, lon = mean_height["lat"].values, mean_height["lon"].values
    if (target_height.shape != mean_height.shape
            or not np.allclose(target_height["lat"].values, lat)
            or not np.allclose(target_height["lon"].values, lon)):
        raise AnalogsInputError("composite_difference needs the mean and the target on one "
                                "grid; regrid the target to the analogs' grid first")
    frame = Frame(lat, lon, PAIR_MAP_WIDTH)
    left, top, gap = 58.0, 90.0, 180.0
    shading, bar = _moisture_shading(frame, mean_fields)
    n_days = mean_fields.attrs.get("n_days")
    days = f"{int(n_days)} analog days" if n_days else "the analog days"
    difference = mean_height.values - target_height.values
    limit = float(np.nanmax(np.abs(difference))) or 1.0
    right = left + frame.width + gap
    width = right + frame.width + 110
    height = top + frame.height + 66
    body = []
    if title:
        body.append(_text(width / 2, 20, title, 13, anchor="middle"))
    body.append(_lines_of_text(left + frame.width / 2, top - 30,
                               [f"mean of {days}:", "500 hPa height and moisture"], 12,
                               anchor="middle"))
    body.append(_map(frame, left, top, _full_map(
        frame, mean_fields, shading=shading, contours_of=mean_height, contour_colour="#000",
        region=region, land=land, geography=geography, rich_line=True)))
    body.append(_axes_ticks(frame, left, top))
    if bar:
        body.append(_colour_bar(left + frame.width + 16, top, frame.height, *bar))
    body.append(_lines_of_text(right + frame.width / 2, top - 30,
                               ["analog mean minus target",
                                "contours: target 500 hPa height"], 12, anchor="middle"))
    shaded = _raster(frame, lat, lon, mapped_rgba(difference, "RdBu_r", -limit, limit))
    body.append(_map(frame, right, top, _full_map(
        frame, target_fields, shading=shaded, contours_of=target_height,
        contour_colour="#333", region=region, land=land, geography=geography)))
    body.append(_axes_ticks(frame, right, top))
    body.append(_colour_bar(right + frame.width + 16, top, frame.height, "RdBu_r", -limit,
                            limit, "analog mean minus target, 500 hPa height (gpm)"))
    body.append(_notes(width, height, geography, land))
    return _svg(width, height, alt or title or "composite", "".join(body))


def probability_map(maps, *, region=None, when="target", land=None, geography=None,
                    alt="") -> str:
    """Left: the neighbourhood probability of the analog days (from
    :func:`analogs.stages.outcomes.outcome_maps`) in percent on a fixed 0-100 scale in
    bins of 10, cells of zero left blank so that every non-zero cell shows; right: the
    smoothed report density (events per grid cell per analog day), blank below
    :data:`~analogs.presentation.map_layers.DENSITY_FLOOR` of its largest value."""
    if "neighbourhood_probability" not in maps:
        raise AnalogsInputError("probability_map needs the Dataset of "
                                "analogs.stages.outcomes.outcome_maps")
    probability = plane(maps["neighbourhood_probability"], "probability_map")
    lat, lon = probability["lat"].values, probability["lon"].values
    radius = probability.attrs.get("radius_km")
    density = (plane(maps["report_density"], "probability_map")
               if "report_density" in maps else None)
    frame = Frame(lat, lon, PAIR_MAP_WIDTH)
    left, top, gap = 58.0, 70.0, 180.0
    right = left + frame.width + gap
    width = (right if density is not None else left) + frame.width + 110
    height = top + frame.height + 66
    percent = 100.0 * probability.values
    bins = np.arange(0.0, 101.0, 10.0)
    shaded = _raster(frame, lat, lon, mapped_rgba(percent, "viridis", 0.0, 100.0, bins=bins,
                                                  transparent=percent <= 0.0), smooth=False)
    n = maps.attrs.get("n_analog_days")
    near = f"within {radius:g} km" if radius else "nearby"
    body = [_lines_of_text(left + frame.width / 2, 26,
                           [f"Where the analog days of {when} had events nearby"
                            + (f" ({n} days)" if n else ""), "blank: no analog day had one"],
                           12, anchor="middle"),
            _map(frame, left, top, shaded + _full_map(
                frame, maps, shading="", contours_of=None, contour_colour="",
                region=region, land=land, geography=geography)),
            _axes_ticks(frame, left, top),
            _colour_bar(left + frame.width + 16, top, frame.height, "viridis", 0.0, 100.0,
                        f"share of analog days with an event {near} (%)", bins=bins)]
    if density is not None:
        values = density.values
        peak = float(np.nanmax(values)) if np.nanmax(values) > 0 else 1.0
        shaded = _raster(frame, lat, lon, mapped_rgba(
            values, "cividis", 0.0, peak, transparent=~(values >= DENSITY_FLOOR * peak)),
            smooth=False)
        body += [_lines_of_text(right + frame.width / 2, 26,
                                ["Smoothed density of the analog days' events",
                                 f"blank: below {100 * DENSITY_FLOOR:g} % of the largest value"],
                                12, anchor="middle"),
                 _map(frame, right, top, shaded + _full_map(
                     frame, maps, shading="", contours_of=None, contour_colour="",
                     region=region, land=land, geography=geography)),
                 _axes_ticks(frame, right, top),
                 _colour_bar(right + frame.width + 16, top, frame.height, "cividis", 0.0,
                             peak, "events per grid cell per analog day (smoothed)")]
    body.append(_notes(width, height, geography, land))
    return _svg(width, height, alt or "where the analog days had events", "".join(body))

