"""The Earth's coastlines, borders and state lines for the maps, read from shapefiles
already on disk; nothing is ever downloaded.

The files are looked for where cartopy keeps its offline data, in cartopy's own layout
(``shapefiles/natural_earth/{physical,cultural}/ne_50m_*.shp``,
``shapefiles/gshhs/{c,l}/GSHHS_*_L1.shp``): ``$CARTOPY_DATA_DIR`` (cartopy's
pre-existing data folder), ``$XDG_DATA_HOME/cartopy`` (its download folder), Debian's
``/usr/share/cartopy/data`` (package python-cartopy-data: GSHHS coastlines only) and the
``data`` folder of an installed cartopy. They are read here (:func:`shapefile_lines`,
the ESRI shapefile layout), without importing cartopy: that import (pyproj, shapely)
would cost more than the reading, and its downloader is never reached. Each file is
read once per process (cached) and only when a map is drawn, never by a query's JSON
answer.
"""

from __future__ import annotations

import importlib.util
import os
import struct
from functools import lru_cache
from itertools import pairwise
from pathlib import Path

import numpy as np

from analogs.errors import AnalogsInputError
from analogs.geo import MapLines, clip_lines

#: Natural Earth scales tried in turn: 50m suits a synoptic map; 110m and 10m when that
#: is all there is.
NATURAL_EARTH_SCALES = ("50m", "110m", "10m")
#: The file of each kind of line, inside a data folder ({scale}: a Natural Earth scale).
NATURAL_EARTH_FILES = {
    "coastline": "shapefiles/natural_earth/physical/ne_{scale}_coastline.shp",
    "lake": "shapefiles/natural_earth/physical/ne_{scale}_lakes.shp",
    "border": "shapefiles/natural_earth/cultural/ne_{scale}_admin_0_boundary_lines_land.shp",
    "state": "shapefiles/natural_earth/cultural/ne_{scale}_admin_1_states_provinces_lines.shp",
}
#: GSHHS shorelines, low then crude resolution, when no Natural Earth file is on disk:
#: level 1 (land against ocean) for the coastline, level 2 (lakes) for the lakes.
GSHHS_FILES = {
    "coastline": ("shapefiles/gshhs/l/GSHHS_l_L1.shp", "shapefiles/gshhs/c/GSHHS_c_L1.shp"),
    "lake": ("shapefiles/gshhs/l/GSHHS_l_L2.shp", "shapefiles/gshhs/c/GSHHS_c_L2.shp"),
}
#: Debian's folder of cartopy's data (package python-cartopy-data).
DEBIAN_CARTOPY_DATA = Path("/usr/share/cartopy/data")
#: Lakes smaller than this (square degrees, about 1000 km2 at 35 N) are left off: dots at
#: the scale of a synoptic map (GSHHS's low-resolution lakes covered Canada in specks).
MIN_LAKE_AREA_DEG2 = 0.1
#: Below this share of its coastline near the archive's own land-sea boundary
#: (:func:`analogs.stages.landmask.coast_agreement`) the Earth's lines are not drawn:
#: they would contradict the archive's geography. Measured with the Natural Earth 50m
#: coastline: a mask of the real land (points inside Natural Earth land polygons) agrees
#: at 0.90 on a 1 degree grid over North America (0.97 at 2.5 degrees), 0.96 over Europe,
#: 0.80 across the date line (Bering Sea); the same mask moved 5 degrees east at 0.25,
#: the demo's invented continent on its North American grid at 0.25.
MIN_COAST_AGREEMENT = 0.6


def data_folders() -> list[Path]:
    """Where cartopy's offline data may be, in the order they are searched."""
    folders = []
    if os.environ.get("CARTOPY_DATA_DIR"):
        folders.append(Path(os.environ["CARTOPY_DATA_DIR"]))
    share = os.environ.get("XDG_DATA_HOME") or Path.home() / ".local" / "share"
    folders += [Path(share) / "cartopy", DEBIAN_CARTOPY_DATA]
    spec = importlib.util.find_spec("cartopy")
    if spec is not None and spec.submodule_search_locations:
        folders += [Path(location) / "data" for location in spec.submodule_search_locations]
    return folders


def line_files(folders) -> dict[str, Path]:
    """The shapefile of each kind of line found in ``folders`` (first folder first;
    Natural Earth at the first scale found, GSHHS for a coastline or lakes otherwise)."""
    found = {}
    for kind, pattern in NATURAL_EARTH_FILES.items():
        candidates = [folder / pattern.format(scale=scale)
                      for scale in NATURAL_EARTH_SCALES for folder in folders]
        candidates += [folder / name for name in GSHHS_FILES.get(kind, ()) for folder in folders]
        first = next((path for path in candidates if path.is_file()), None)
        if first is not None:
            found[kind] = first
    return found


#: Shape types of the ESRI shapefile specification (ESRI Shapefile Technical
#: Description, July 1998) whose records begin with a box, part and point counts, the
#: parts' starts and the points' (x, y): PolyLine, Polygon and their Z and M variants.
LINE_SHAPE_TYPES = frozenset({3, 5, 13, 15, 23, 25})
#: The file code that opens every shapefile (big-endian, bytes 0-3), per the same.
SHAPEFILE_CODE = 9994


@lru_cache(maxsize=8)
def shapefile_lines(path: str, min_area: float = 0.0) -> tuple[np.ndarray, ...]:
    """Every part of every line or polygon shape of the shapefile ``path`` as an (n, 2)
    array of (lon, lat); polygons give their rings, only those enclosing at least
    ``min_area`` square degrees (shoelace formula) when it is positive.

    The main file (``.shp``) is read as the ESRI Shapefile Technical Description (July
    1998) lays it out: a 100-byte header, then records of an 8-byte big-endian header
    (number, content length in 16-bit words) and a little-endian content whose line
    and polygon shapes hold a box, the number of parts and of points, each part's
    first point and the points as (x, y) doubles (Z and M values follow and are not
    read); other shapes (null, points) are skipped. The points are taken straight from
    the bytes (pyshp, the reference of tests/test_geography.py, builds a Python list
    per point; its import alone cost more than this reading)."""
    data = Path(path).read_bytes()
    if len(data) < 100 or int.from_bytes(data[:4], "big") != SHAPEFILE_CODE:
        raise AnalogsInputError(f"{path} is not an ESRI shapefile (its first 4 bytes are "
                                f"not the file code {SHAPEFILE_CODE}); remove or replace it")
    lines = []
    offset = 100
    try:
        while offset + 12 <= len(data):
            length = 2 * int.from_bytes(data[offset + 4:offset + 8], "big")
            content = offset + 8
            if int.from_bytes(data[content:content + 4], "little") in LINE_SHAPE_TYPES:
                n_parts, n_points = struct.unpack_from("<2i", data, content + 36)
                starts = np.frombuffer(data, "<i4", n_parts, content + 44)
                points = np.frombuffer(data, "<f8", 2 * n_points,
                                       content + 44 + 4 * n_parts).reshape(n_points, 2)
                points = points.astype(float)  # native order, writeable
                bounds = [*starts.tolist(), n_points]
                lines.extend(points[a:b] for a, b in pairwise(bounds) if b - a > 1)
            offset = content + length
    except (ValueError, struct.error) as error:  # a record reaching past the end
        raise AnalogsInputError(f"{path}: shapefile record at byte {offset} is cut short "
                                f"({error}); remove or replace the file") from None
    if min_area > 0.0:
        lines = [ring for ring, area in zip(lines, ring_areas(lines)) if area >= min_area]
    return tuple(lines)


def ring_areas(rings) -> np.ndarray:
    """Area enclosed by each ring ((n, 2) arrays of x, y; closed or not), by the
    shoelace formula, every ring in one array pass (a numpy call per ring took most of
    the time of reading GSHHS's lakes)."""
    if not rings:
        return np.zeros(0)
    points = np.concatenate(rings)
    lengths = np.array([len(ring) for ring in rings])
    starts = np.cumsum(lengths) - lengths
    previous = np.roll(points, 1, axis=0)
    previous[starts] = points[starts + lengths - 1]  # each ring's first vertex follows its last
    terms = points[:, 0] * previous[:, 1] - points[:, 1] * previous[:, 0]
    return 0.5 * np.abs(np.add.reduceat(terms, starts))


def map_lines(lat, lon, land=None) -> MapLines | None:
    """The coastlines (with lake shores), borders and state lines inside the extent of
    the grid ``lat``, ``lon`` (degrees; longitudes in any frame), or None when the files
    are missing. With ``land``, the archive's land fraction on that grid, the lines are
    withheld (``MapLines.withheld`` says why) when the archive's coast does not follow
    the Earth's (:data:`MIN_COAST_AGREEMENT`): a synthetic archive's continent."""
    files = line_files(data_folders())
    if not files:
        return None
    box = (float(np.min(lon)), float(np.max(lon)), float(np.min(lat)), float(np.max(lat)))

    def clipped(kind):
        minimum = MIN_LAKE_AREA_DEG2 if kind == "lake" else 0.0
        return clip_lines(shapefile_lines(str(files[kind]), minimum), *box)

    source = _source_name(files)
    lines = {"coastline": clipped("coastline")} if "coastline" in files else {}
    if land is not None:
        # Judged on the sea coast alone (a coarse mask may count a lake as land), before
        # the other files are read: withheld lines are not read at all.
        from analogs.stages.landmask import coast_agreement
        agreement = coast_agreement(land, lines.get("coastline", []))
        if agreement is not None and agreement < MIN_COAST_AGREEMENT:
            drawn = "coastlines and borders" if "border" in files else "coastlines"
            return MapLines(source=source, withheld=(
                f"{source} {drawn} left off: only {100 * agreement:.0f} % "
                "of that coastline lies near the archive's own coast (another geography)"))
    lines.update({kind: clipped(kind) for kind in files if kind not in lines})
    # Lake shores are drawn as coastlines (where land meets water).
    lines["coastline"] = lines.get("coastline", []) + lines.pop("lake", [])
    return MapLines(**lines, source=source)


def _source_name(files) -> str:
    names = sorted({path.name.split("_")[0] if path.name.startswith("GSHHS")
                    else "Natural Earth " + path.name.split("_")[1] for path in files.values()})
    return " and ".join(names)
