"""What every map draws, computed once for any drawing backend.

Presentation only, and free of matplotlib: the contour levels and lines of 500 hPa
height (contourpy, matplotlib's own contouring library), the land-sea boundary, the
moisture field and its rich-moisture line, the outcome region's outline, the synoptic
marks' lines, degree ticks and labels, the styles of the Earth's lines, the marks and
the events, and the notes under a map. The report's SVG maps
(:mod:`analogs.presentation.svg_maps`) and the briefing's matplotlib slides
(:mod:`analogs.presentation.figures`, :mod:`analogs.presentation.slides`) both draw
from here.
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from analogs.constants import ZERO_CELSIUS_K
from analogs.errors import AnalogsInputError
from analogs.stages.diagnostics import RICH_MOISTURE, dewpoint_from_specific_humidity

#: Pressure (hPa) of the ``q850`` field, for its dewpoint.
MOISTURE_LEVEL_HPA = 850.0
#: Contour interval of 500 hPa height maps, gpm (common practice, no source).
HEIGHT_INTERVAL_GPM = 60.0
#: Marker of each event kind on maps (matplotlib's marker letters), in the order kinds
#: sort (then reused).
EVENT_MARKERS = ("o", "^", "s", "D", "v", "P", "X")
PLAIN_AXES_NOTE = "plain latitude-longitude axes (no coastlines drawn)"
LAND_NOTE = "brown line: land-sea boundary from the archive's land-sea mask (0.5 contour)"
LAND_COLOUR = "#8c510a"
#: The light edge under the land-sea boundary (visible over dark shading).
LAND_EDGE_COLOUR = "#f3e6c8"
#: Spacing (degrees along the line) of the Earth's lines' vertices on the small maps of
#: the grids: about a pixel there.
SMALL_MAP_VERTEX_STEP_DEG = 0.25
#: How the Earth's lines are drawn: thin greys above the shading, below the contours;
#: widths in points, dashes in units of the line's width (matplotlib's convention).
EARTH_LINE_STYLES = {
    "coastline": {"name": "coastlines", "colour": "#333333", "width": 0.8, "dashes": None},
    "border": {"name": "borders (dashed)", "colour": "#404040", "width": 0.7,
               "dashes": (4, 2)},
    "state": {"name": "state lines (dotted)", "colour": "#666666", "width": 0.5,
              "dashes": (1, 1.5)},
}
#: How the synoptic marks are drawn (a white halo keeps them readable over any
#: shading); dashes in units of the line's width.
MARK_STYLES = {
    "trough": {"colour": "#b2182b", "dashes": (5, 2.5), "label": "trough axis"},
    "ridge": {"colour": "#2c5fa8", "dashes": (1.2, 1.8), "label": "ridge axis"},
    "low": {"colour": "#b2182b", "label": "closed 500 hPa low (L)"},
}
#: Share of the largest smoothed density below which the density map is left blank.
DENSITY_FLOOR = 0.02


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


def nice_ticks(low: float, high: float, n: int) -> list[float]:
    """Round values inside [low, high], about ``n`` intervals apart, as matplotlib's
    ``MaxNLocator(n, steps=[1, 2, 5, 10])`` places them (tested against it): the step
    is the smallest of 1, 2, 5, 10 or 20 times a power of ten that is at least
    (high - low) / n, or a smaller one when that leaves fewer than two values inside."""
    if not high > low:
        return [float(low)]
    raw = (high - low) / n
    scale = 10.0 ** math.floor(math.log10(raw))
    steps = [factor * scale for factor in (0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0)]
    largest = next((i for i, step in enumerate(steps) if step >= raw), len(steps) - 1)
    for size in steps[largest::-1]:
        first, last = math.ceil(low / size - 1e-9), math.floor(high / size + 1e-9)
        if last - first + 1 >= 2:
            break
    return [round(k * size, 10) + 0.0 for k in range(first, last + 1)]


def plane(field: xr.DataArray, owner: str) -> xr.DataArray:
    """``field`` as one (lat, lon) plane, or a clear error naming ``owner``."""
    field = field.squeeze(drop=True)
    if set(field.dims) != {"lat", "lon"}:
        raise AnalogsInputError(f"{owner} needs a field on (lat, lon); got dims {field.dims}")
    return field.transpose("lat", "lon")


def height_levels(z) -> np.ndarray:
    """Every :data:`HEIGHT_INTERVAL_GPM` level (gpm) from below the lowest to above the
    highest of ``z``."""
    low = HEIGHT_INTERVAL_GPM * np.floor(np.nanmin(z) / HEIGHT_INTERVAL_GPM)
    high = HEIGHT_INTERVAL_GPM * np.ceil(np.nanmax(z) / HEIGHT_INTERVAL_GPM)
    return np.arange(low, high + HEIGHT_INTERVAL_GPM, HEIGHT_INTERVAL_GPM)


def contour_lines(lon, lat, values, levels) -> list[tuple[float, list[np.ndarray]]]:
    """(level, lines) for each of ``levels``: the contour lines of ``values`` (lat, lon)
    as (n, 2) arrays of (lon, lat), traced by contourpy with matplotlib's default
    algorithm and corner masking (so the vertices are those of matplotlib's ``contour``
    on the same arrays), cells with NaN left out (contourpy masks the values that are
    not finite itself)."""
    from contourpy import contour_generator
    generator = contour_generator(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float),
                                  np.asarray(values, dtype=float), name="mpl2014",
                                  corner_mask=True)
    # mpl2014 gives (points, codes) per line, as matplotlib takes them; the points alone.
    return [(float(level), [line for line in generator.lines(level)[0] if len(line) > 1])
            for level in levels]


def land_lines(land) -> list[np.ndarray]:
    """The 0.5 contour of a land-sea mask or land fraction (lat, lon) as (n, 2) arrays
    of (lon, lat): where land meets sea on the archive's own grid. Traced once and
    reused by every map of a figure (a list is returned as it is)."""
    if land is None:
        return []
    if isinstance(land, list):
        return land
    land = plane(land, "land outline")
    values = np.asarray(land.values, dtype=float)
    if not np.nanmin(values) < 0.5 < np.nanmax(values):
        return []
    return contour_lines(land["lon"].values, land["lat"].values, values, [0.5])[0][1]


def moisture(fields: xr.Dataset):
    """(shaded values, colour-bar label, values of the rich-moisture line, its
    :data:`~analogs.stages.diagnostics.RICH_MOISTURE` entry) of the moisture field: the
    line is drawn at the threshold of the field's own level (the 60 F line only for a
    2 m dewpoint). All None without a moisture field."""
    if "q850" in fields:
        q = plane(fields["q850"], "moisture")
        dewpoint = dewpoint_from_specific_humidity(np.clip(q.values, 1e-6, None),
                                                   MOISTURE_LEVEL_HPA) - ZERO_CELSIUS_K
        return q.values * 1000.0, "850 hPa specific humidity (g/kg)", dewpoint, RICH_MOISTURE["q850"]
    if "td2m" in fields:
        td = plane(fields["td2m"], "moisture").values - ZERO_CELSIUS_K
        return td, "2 m dewpoint (deg C)", td, RICH_MOISTURE["td2m"]
    if "pwat" in fields:
        pwat = plane(fields["pwat"], "moisture").values
        return pwat, "precipitable water (kg m-2)", pwat, RICH_MOISTURE["pwat"]
    return None, None, None, None


def rich_line_text(rich) -> str:
    """'white line: 850 hPa dewpoint 12 degC' for the title of a map."""
    return f"white line: {rich.measure} {rich.threshold:g} {rich.units}"


def region_outline(region):
    """The region's outline as an (n, 2) array of (lon, lat), or None."""
    if region is None:
        return None
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


def thinned(line, step):
    """``line`` keeping its ends and one vertex per ``step`` degrees along it: on the
    small maps a vertex every few km draws nothing more and costs time."""
    along = np.r_[0.0, np.cumsum(np.hypot(*np.diff(line, axis=0).T))]
    keep = np.r_[True, np.diff(np.floor(along / step)) > 0]
    keep[-1] = True
    return line[keep]


def axis_lines(axis, lon, lat) -> list[np.ndarray]:
    """The (lon, lat) points of each axis number of ``axis`` (arrays of the marks'
    ``axis``, ``lon`` and ``lat``), in order of the axis number and, within one, of the
    arrays (as a table's ``groupby("axis")`` gives them, without a pandas group per
    axis: a grid's fifty maps hold hundreds)."""
    axis = np.asarray(axis)
    order = np.argsort(axis, kind="stable")
    points = np.c_[np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)][order]
    return [line for line in np.split(points, np.flatnonzero(np.diff(axis[order])) + 1)
            if len(line)]


def earth_note(geography) -> str:
    """What the grey lines are and where they come from (or why none is drawn)."""
    if geography:
        kinds = [style["name"] for kind, style in EARTH_LINE_STYLES.items()
                 if getattr(geography, kind)]
        return f"grey: {', '.join(kinds)} ({geography.source})"
    return getattr(geography, "withheld", "")


def map_notes(geography, land) -> list[str]:
    """The notes under a map: the land-sea boundary's, the Earth's lines', or that the
    axes are plain."""
    notes = ([LAND_NOTE] if land_lines(land) else []) + [earth_note(geography)] * bool(
        earth_note(geography))
    return notes or [PLAIN_AXES_NOTE]
