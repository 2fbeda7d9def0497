"""The Earth's lines on the maps: polylines cut to a map's extent (checked against
shapely's clip and hand-worked intersections), the archive's coast against the Earth's,
and coastlines and borders read from cartopy's offline data (known places, from memory).

The tests that read installed data skip, saying why, when the shapefiles are missing
(Debian's python-cartopy-data gives GSHHS coastlines; Natural Earth files in
``$CARTOPY_DATA_DIR`` give borders too). The shapefile reader is checked against pyshp,
cartopy's own reader (the test extra), on files pyshp writes and on the installed ones."""

import numpy as np
import pytest
import xarray as xr
from matplotlib.path import Path as MatplotlibPath

from analogs.errors import AnalogsInputError
from analogs.geo import MapLines, clip_lines, nearest_index
from analogs.presentation import svg_maps
from analogs.presentation.map_layers import LAND_NOTE, PLAIN_AXES_NOTE
from analogs.stages.landmask import coast_agreement, read_land_mask
from analogs.workflows import geography

#: Largest distance (degrees of latitude) of a known coastal point from the drawn
#: coastline: GSHHS at crude resolution keeps shapes to about 25 km (from memory of the
#: GSHHG documentation), Natural Earth 50m to a few km.
COAST_TOLERANCE_DEG = 0.25


def _files():
    files = geography.line_files(geography.data_folders())
    if "coastline" not in files:
        pytest.skip("no coastline shapefile in cartopy's data folders (apt-get install "
                    "python-cartopy-data, or Natural Earth files in $CARTOPY_DATA_DIR)")
    return files


def _distance_deg(lines, lon, lat) -> float:
    """Least distance from (lon, lat) to the polylines, in degrees of latitude (east-west
    distances shrunk by cos(lat))."""
    best = np.inf
    squeeze = np.cos(np.radians(lat))
    for line in lines:
        start = (line[:-1] - (lon, lat)) * (squeeze, 1.0)
        step = (line[1:] - (lon, lat)) * (squeeze, 1.0) - start
        t = np.clip(-(start * step).sum(1) / np.maximum((step * step).sum(1), 1e-18), 0, 1)
        best = min(best, float(np.min(np.hypot(*(start + t[:, None] * step).T))))
    return best


# ------------------------------------------------------------------ clipping (no data)

def test_clip_cuts_at_the_edges_where_the_line_crosses_them():
    """A line from (-10, 0) to (10, 10) crosses x = -5 at y = 2.5 and x = 5 at y = 7.5
    (worked by hand); a second line leaving and re-entering the box gives two pieces."""
    (piece,) = clip_lines([np.array([[-10.0, 0.0], [10.0, 10.0]])], -5, 5, -20, 20)
    np.testing.assert_allclose(piece, [[-5.0, 2.5], [5.0, 7.5]])
    pieces = clip_lines([np.array([[0.0, 0.0], [0.0, 30.0], [2.0, 30.0], [2.0, 0.0]])],
                        -5, 5, -1, 10)
    np.testing.assert_allclose(pieces[0], [[0.0, 0.0], [0.0, 10.0]])
    np.testing.assert_allclose(pieces[1], [[2.0, 10.0], [2.0, 0.0]])
    assert clip_lines([np.array([[20.0, 0.0], [30.0, 5.0]])], -5, 5, -1, 10) == []


def test_clip_matches_shapely():
    """Random polylines cut to a box: the same pieces as shapely's clip_by_rect
    (GEOS), compared by length and by every piece lying inside the box."""
    shapely = pytest.importorskip("shapely", reason="shapely (the test extra) is not installed")
    rng = np.random.default_rng(3)
    for _ in range(20):
        line = np.cumsum(rng.normal(0.0, 4.0, size=(40, 2)), axis=0)
        ours = clip_lines([line], -8.0, 6.0, -5.0, 9.0)
        theirs = shapely.clip_by_rect(shapely.LineString(line), -8.0, -5.0, 6.0, 9.0)
        length = sum(float(np.hypot(*np.diff(p, axis=0).T).sum()) for p in ours)
        assert length == pytest.approx(theirs.length, rel=1e-9, abs=1e-9)
        for piece in ours:
            assert piece[:, 0].min() >= -8.0 - 1e-9 and piece[:, 0].max() <= 6.0 + 1e-9
            assert piece[:, 1].min() >= -5.0 - 1e-9 and piece[:, 1].max() <= 9.0 + 1e-9


def test_clip_across_the_date_line():
    """Lines stored in [-180, 180] come back in the map's frame: 170 E and 170 W are 170
    and 190 on a map from 150 to 210 east."""
    pieces = clip_lines([np.array([[165.0, 50.0], [179.9, 50.0]]),
                         np.array([[-179.9, 55.0], [-170.0, 55.0], [-100.0, 55.0]])],
                        150.0, 210.0, 40.0, 60.0)
    np.testing.assert_allclose(pieces[0], [[165.0, 50.0], [179.9, 50.0]])
    np.testing.assert_allclose(pieces[1], [[180.1, 55.0], [190.0, 55.0], [210.0, 55.0]])


# ------------------------------------------------------------------ the archive's coast

def _half_plane_land(lat, lon, west_of):
    return xr.DataArray(np.broadcast_to((lon < west_of).astype(float), (lat.size, lon.size)),
                        dims=("lat", "lon"), coords={"lat": lat, "lon": lon})


def test_coast_agreement_of_a_mask_and_its_coast():
    """A coast along 100 W agrees with a mask whose land ends there, and not with one
    whose land ends 10 degrees farther east."""
    lat, lon = np.arange(20.0, 50.1), np.arange(-120.0, -70.1)
    coast = [np.array([[-100.0, 25.0], [-100.0, 45.0]])]
    assert coast_agreement(_half_plane_land(lat, lon, -99.5), coast) == 1.0
    assert coast_agreement(_half_plane_land(lat, lon, -89.5), coast) == 0.0
    assert coast_agreement(_half_plane_land(lat, lon, -99.5), []) is None


# ------------------------------------------------------------------ offline data

def test_known_coastal_points_lie_on_the_coastline():
    """Cape Hatteras (35.22 N, 75.53 W), Cape Cod (42.05 N, 70.19 W) and Galveston
    (29.3 N, 94.8 W) lie on the coastline drawn for a North American map (coordinates
    from memory); Dodge City, Kansas (37.75 N, 100.0 W), far inland, does not."""
    files = _files()
    lines = geography.map_lines(np.arange(20.0, 55.1), np.arange(-130.0, -60.1))
    assert lines.source and lines.coastline
    for lon, lat in ((-75.53, 35.22), (-70.19, 42.05), (-94.8, 29.3)):
        assert _distance_deg(lines.coastline, lon, lat) < COAST_TOLERANCE_DEG, (lon, lat)
    assert _distance_deg(lines.coastline, -100.0, 37.75) > 1.0
    if "border" in files:
        # The United States - Canada border runs along 49 N west of the Lake of the Woods
        # (from memory).
        for lon in (-120.0, -110.0, -100.0):
            assert _distance_deg(lines.border, lon, 49.0) < 0.05


def test_lines_are_cut_to_the_map_and_reach_its_edges():
    _files()
    west, east, south, north = -100.0, -60.0, 25.0, 50.0
    lines = geography.map_lines(np.arange(south, north + 0.1), np.arange(west, east + 0.1))
    points = np.concatenate(lines.coastline + lines.border + lines.state)
    assert points[:, 0].min() >= west - 1e-9 and points[:, 0].max() <= east + 1e-9
    assert points[:, 1].min() >= south - 1e-9 and points[:, 1].max() <= north + 1e-9
    # The Atlantic coast leaves the map through its southern and northern edges.
    ends = np.concatenate([line[[0, -1]] for line in lines.coastline])
    assert np.isclose(ends[:, 1], south).any() and np.isclose(ends[:, 1], north).any()


def test_a_map_across_the_date_line_has_both_shores_of_the_bering_strait():
    """On a map from 150 E to 130 W (150 .. 230 east), Cape Dezhnev (66.08 N, 169.65 W)
    and Cape Prince of Wales (65.64 N, 168.09 W), from memory, lie on the coastline, at
    190.35 and 191.91 east."""
    _files()
    lines = geography.map_lines(np.arange(50.0, 72.1), np.arange(150.0, 230.1))
    assert min(line[:, 0].min() for line in lines.coastline) >= 150.0
    for lon, lat in ((190.35, 66.08), (191.91, 65.64)):
        assert _distance_deg(lines.coastline, lon, lat) < COAST_TOLERANCE_DEG


def _real_land(lat, lon, rings):
    """A land mask of the real Earth on a grid: grid points inside the land rings
    (even-odd rule, so lakes in land fall back to water), by matplotlib's
    point-in-polygon test."""
    lon2, lat2 = np.meshgrid(lon, lat)
    points = np.c_[(lon2.ravel() + 180.0) % 360.0 - 180.0, lat2.ravel()]
    inside = np.zeros(len(points), bool)
    for ring in rings:
        inside ^= MatplotlibPath(ring).contains_points(points)
    return xr.DataArray(inside.reshape(lat2.shape).astype(float), dims=("lat", "lon"),
                        coords={"lat": lat, "lon": lon})


def test_the_earth_lines_are_withheld_on_another_geography(demo_dir):
    """A land mask of the real Earth on a 1 degree grid (points inside GSHHS or Natural
    Earth land polygons) keeps the lines; the same mask moved 5 degrees east, and the
    demo's invented continent on its North American grid, withhold them and say why."""
    _files()
    land_files = [folder / name for folder in geography.data_folders()
                  for name in ("shapefiles/natural_earth/physical/ne_50m_land.shp",
                               *geography.GSHHS_FILES["coastline"])]
    land_file = next((path for path in land_files if path.is_file()), None)
    if land_file is None:
        pytest.skip("no land polygons (Natural Earth land or GSHHS) to make a real mask")
    lat, lon = np.arange(20.0, 55.1), np.arange(-130.0, -60.1)
    rings = geography.shapefile_lines(str(land_file))
    real = _real_land(lat, lon, rings)
    assert geography.map_lines(lat, lon, real).coastline
    moved = _real_land(lat, lon - 5.0, rings).assign_coords(lon=lon)
    withheld = geography.map_lines(lat, lon, moved).withheld
    assert "left off" in withheld
    # Borders are named only when a border file is there to be left off.
    has_borders = "border" in geography.line_files(geography.data_folders())
    assert ("borders" in withheld) == has_borders
    mask, _ = read_land_mask(demo_dir / "archive" / "static" / "land_sea_mask.nc")
    demo = geography.map_lines(mask["lat"].values, mask["lon"].values, mask)
    assert not demo and "near the archive's own coast" in demo.withheld


def test_missing_data_gives_no_lines(monkeypatch, tmp_path):
    monkeypatch.setattr(geography, "data_folders", lambda: [tmp_path])
    assert geography.map_lines(np.arange(20.0, 50.1), np.arange(-120.0, -70.1)) is None


# ------------------------------------------------------------------ drawn on the maps

def _fields():
    lat, lon = np.arange(20.0, 50.1, 2.0), np.arange(-120.0, -69.9, 2.0)
    z = 5800.0 - 6.0 * (lat[:, None] - 35.0) + 0.0 * lon[None, :]
    return xr.Dataset({"z500": (("lat", "lon"), z)}, coords={"lat": lat, "lon": lon})


SVG = "{http://www.w3.org/2000/svg}"


def _svg(svg):
    import xml.etree.ElementTree as ET
    return ET.fromstring(svg)


def _earth_paths(root, kind):
    """The drawn lines of one kind of Earth line, in their own style, as (lon, lat)
    arrays per map (pixels of each map taken back to degrees)."""
    from analogs.presentation.map_layers import EARTH_LINE_STYLES
    style = EARTH_LINE_STYLES[kind]
    found = []
    for the_map in root.iter(f"{SVG}svg"):
        for path in the_map.findall(f"{SVG}path"):
            if path.get("class") == f"earth-{kind}":
                assert path.get("stroke") == style["colour"]
                found.append((the_map, [np.array([[float(v) for v in pair.split(",")]
                                                  for pair in part.split()])
                                        for part in path.get("d").split("M") if part.strip()]))
    return found


def _texts(root):
    return [t.text for t in root.iter(f"{SVG}text")]


def _in_degrees(fields, width, lines):
    frame = svg_maps.Frame(fields["lat"].values, fields["lon"].values, width)
    return [np.c_[frame.lon0 + line[:, 0] / frame.x_scale, frame.lat1 - line[:, 1] / frame.y_scale]
            for line in lines]


def test_maps_draw_the_earth_lines_they_are_handed():
    """Each kind of line is one path in its own style, with the note naming the source;
    the analog grid draws them on every small map."""
    import pandas as pd
    coast = [np.array([[-110.0, 25.0], [-100.0, 30.0]])]
    border = [np.array([[-115.0, 45.0], [-90.0, 45.0]])]
    lines = MapLines(coastline=coast, border=border, source="test data")
    fields = _fields()
    root = _svg(svg_maps.target_map(fields, geography=lines))
    ((_, drawn),) = _earth_paths(root, "coastline")
    np.testing.assert_allclose(_in_degrees(fields, svg_maps.MAP_WIDTH, drawn)[0], coast[0],
                               atol=0.02)
    ((_, drawn),) = _earth_paths(root, "border")
    np.testing.assert_allclose(_in_degrees(fields, svg_maps.MAP_WIDTH, drawn)[0], border[0],
                               atol=0.02)
    notes = _texts(root)
    assert "grey: coastlines, borders (dashed) (test data)" in notes
    assert PLAIN_AXES_NOTE not in notes
    analogs = pd.DataFrame({"rank": [1, 2, 3], "date": ["2001-06-01", "2001-06-02",
                                                         "2001-06-03"],
                            "distance": [1.0, 2.0, 3.0], "regime": ["a", "b", "c"],
                            "events_total": [0, 0, 0]})
    grid = xr.concat([fields] * 3, dim="analog")
    found = _earth_paths(_svg(svg_maps.analog_panel(grid, analogs, geography=lines)),
                         "coastline")
    assert len(found) == 3
    for _, drawn in found:
        np.testing.assert_allclose(_in_degrees(fields, svg_maps.SMALL_MAP_WIDTH, drawn)[0],
                                   coast[0], atol=0.1)


def test_withheld_lines_are_named_in_the_note():
    root = _svg(svg_maps.target_map(_fields(), geography=MapLines(source="x", withheld="why not")))
    assert "why not" in _texts(root)
    assert not _earth_paths(root, "coastline")


def test_report_maps_carry_the_offline_coastlines():
    """With the offline data present, a map of a real-Earth grid draws the coastline read
    from it (the whole path: files -> map_lines -> target_map)."""
    _files()
    fields = _fields()
    lines = geography.map_lines(fields["lat"].values, fields["lon"].values)
    root = _svg(svg_maps.target_map(fields, geography=lines))
    ((_, drawn),) = _earth_paths(root, "coastline")
    assert len(drawn) == len(lines.coastline)
    assert lines.source in " ".join(_texts(root))


def test_a_store_without_a_mask_is_not_said_to_draw_one():
    """No land-sea lines (a store without a mask hands an empty list): the map says its
    axes are plain, not that a boundary from a mask is drawn."""
    notes = _texts(_svg(svg_maps.target_map(_fields(), land=[])))
    assert PLAIN_AXES_NOTE in notes and LAND_NOTE not in notes


def _write_shapefile(path, kind, parts):
    shapefile = pytest.importorskip("shapefile", reason="pyshp (the test extra) is not installed")
    path.parent.mkdir(parents=True, exist_ok=True)
    with shapefile.Writer(str(path), shapeType=kind) as writer:
        writer.field("name", "C")
        for part in parts:
            (writer.poly if kind == shapefile.POLYGON else writer.line)([part])
            writer.record("x")


def test_files_in_cartopy_layout_give_each_kind_and_drop_small_lakes(monkeypatch, tmp_path):
    """Natural Earth files written in cartopy's layout under $CARTOPY_DATA_DIR are found
    and read: the border, and of two lakes the 2 x 1 degree one (2 square degrees, by
    hand) but not the 0.2 x 0.2 one (0.04, below MIN_LAKE_AREA_DEG2)."""
    shapefile = pytest.importorskip("shapefile", reason="pyshp (the test extra) is not installed")
    root = tmp_path / "shapefiles" / "natural_earth"
    _write_shapefile(root / "physical" / "ne_50m_coastline.shp", shapefile.POLYLINE,
                     [[[-100.0, 30.0], [-90.0, 30.0]]])
    _write_shapefile(root / "cultural" / "ne_50m_admin_0_boundary_lines_land.shp",
                     shapefile.POLYLINE, [[[-110.0, 40.0], [-80.0, 40.0]]])
    big = [[-95.0, 35.0], [-95.0, 36.0], [-93.0, 36.0], [-93.0, 35.0], [-95.0, 35.0]]
    small = [[-85.0, 35.0], [-85.0, 35.2], [-84.8, 35.2], [-84.8, 35.0], [-85.0, 35.0]]
    _write_shapefile(root / "physical" / "ne_50m_lakes.shp", shapefile.POLYGON, [big, small])
    monkeypatch.setenv("CARTOPY_DATA_DIR", str(tmp_path))
    lines = geography.map_lines(np.arange(25.0, 45.1), np.arange(-105.0, -75.1))
    assert lines.source == "Natural Earth 50m"
    np.testing.assert_allclose(lines.border[0], [[-105.0, 40.0], [-80.0, 40.0]])
    assert len(lines.coastline) == 2          # the coast and the big lake's shore
    np.testing.assert_allclose(lines.coastline[1], big)


def _pyshp_lines(path):
    """Every part of every shape with two points or more, as pyshp reads them."""
    import shapefile
    lines = []
    with shapefile.Reader(str(path)) as reader:
        for shape in reader.iterShapes():
            points = np.asarray(shape.points, dtype=float).reshape(-1, 2)
            bounds = [*shape.parts, len(points)]
            lines += [points[a:b] for a, b in zip(bounds[:-1], bounds[1:]) if b - a > 1]
    return lines


def test_shapefile_lines_are_pyshps(tmp_path):
    """pyshp (cartopy's shapefile reader) writes polylines, polygons of several rings,
    polylines with Z and M values, points and null shapes; every line and ring read
    equals pyshp's own reading, point for point, as do those of the installed GSHHS
    files; a file that is not a shapefile, or is cut short, is refused by name."""
    shapefile = pytest.importorskip("shapefile", reason="pyshp (the test extra) is not installed")
    rng = np.random.default_rng(8)
    path = tmp_path / "mixed.shp"
    with shapefile.Writer(str(path), shapeType=shapefile.POLYLINE) as writer:
        writer.field("name", "C")
        for n in (2, 7, 1, 30):
            writer.line([rng.uniform(-180, 180, (n, 2)).tolist(),
                         rng.uniform(-90, 90, (3, 2)).tolist()])
            writer.record("line")
        writer.null()
        writer.record("nothing")
    rings = tmp_path / "rings.shp"
    with shapefile.Writer(str(rings), shapeType=shapefile.POLYGON) as writer:
        writer.field("name", "C")
        square = [[0.0, 0.0], [0.0, 1.0], [1.0, 1.0], [1.0, 0.0], [0.0, 0.0]]
        hole = [[0.2, 0.2], [0.4, 0.2], [0.4, 0.4], [0.2, 0.4], [0.2, 0.2]]
        writer.poly([square, hole])
        writer.record("lake with an island")
    with_z = tmp_path / "with_z.shp"
    with shapefile.Writer(str(with_z), shapeType=shapefile.POLYLINEZ) as writer:
        writer.field("name", "C")
        writer.linez([[[-100.0, 30.0, 5.0, 1.0], [-90.0, 35.0, 6.0, 2.0],
                       [-80.0, 31.0, 7.0, 3.0]]])
        writer.record("z")
    points = tmp_path / "points.shp"
    with shapefile.Writer(str(points), shapeType=shapefile.POINT) as writer:
        writer.field("name", "C")
        writer.point(1.0, 2.0)
        writer.record("a point")
    installed = [folder / name for folder in geography.data_folders()
                 for names in geography.GSHHS_FILES.values() for name in names]
    for file in [path, rings, with_z, points] + [p for p in installed if p.is_file()]:
        expected = _pyshp_lines(file)
        found = geography.shapefile_lines.__wrapped__(str(file))
        assert len(found) == len(expected), file
        for ours, theirs in zip(found, expected):
            assert ours.dtype == np.float64 and np.array_equal(ours, theirs)
    assert len(geography.shapefile_lines.__wrapped__(str(path))) == 7  # 8 parts, one a point
    assert geography.shapefile_lines.__wrapped__(str(points)) == ()
    (tmp_path / "text.shp").write_text("not a shapefile, longer than its header would be " * 3)
    with pytest.raises(AnalogsInputError, match="text.shp is not an ESRI shapefile"):
        geography.shapefile_lines.__wrapped__(str(tmp_path / "text.shp"))
    (tmp_path / "cut.shp").write_bytes(path.read_bytes()[:180])
    with pytest.raises(AnalogsInputError, match="cut.shp: shapefile record at byte 100"):
        geography.shapefile_lines.__wrapped__(str(tmp_path / "cut.shp"))


def test_ring_areas_match_shapely():
    """Areas of random rings (open or closed, either orientation) and of the installed
    GSHHS lakes (when installed), all in one pass: shapely's Polygon.area (GEOS) is the
    reference."""
    shapely = pytest.importorskip("shapely", reason="shapely (the test extra) is not installed")
    rng = np.random.default_rng(3)
    rings = []
    for n in rng.integers(3, 40, size=60):
        angles = np.sort(rng.uniform(0.0, 2 * np.pi, n)) * rng.choice([-1, 1])
        radius = rng.uniform(0.1, 5.0, n)
        ring = np.c_[radius * np.cos(angles) + rng.uniform(-170, 170),
                     radius * np.sin(angles) + rng.uniform(-80, 80)]
        rings.append(np.vstack([ring, ring[:1]]) if rng.random() < 0.5 else ring)
    lakes = [folder / geography.GSHHS_FILES["lake"][0] for folder in geography.data_folders()]
    lake_file = next((path for path in lakes if path.is_file()), None)
    if lake_file is not None:
        rings += [ring for ring in geography.shapefile_lines(str(lake_file)) if len(ring) > 3]
    expected = [shapely.Polygon(ring).area for ring in rings]
    # atol: rounding of the products of coordinates up to 180 x 90 (tiny lakes far from
    # the origin), far below the 0.1 square degree cut.
    np.testing.assert_allclose(geography.ring_areas(rings), expected, rtol=1e-9, atol=1e-9)
    assert geography.ring_areas([]).size == 0


def test_withheld_lines_read_the_coastline_file_alone(monkeypatch, demo_dir):
    """On another geography only the coastline is read to judge the agreement: the
    lakes, borders and state lines that would be left off are never read."""
    _files()
    read = []
    original = geography.shapefile_lines
    monkeypatch.setattr(geography, "shapefile_lines",
                        lambda path, min_area=0.0: read.append(path) or original(path, min_area))
    mask, _ = read_land_mask(demo_dir / "archive" / "static" / "land_sea_mask.nc")
    assert geography.map_lines(mask["lat"].values, mask["lon"].values, mask).withheld
    assert read == [str(geography.line_files(geography.data_folders())["coastline"])]


def test_nearest_index_equals_the_brute_force_nearest_point():
    """The binary search of nearest_index gives numpy's argmin of |coordinate - value|
    (the plain definition) on an uneven ascending axis, at values outside it too;
    coast_agreement and the report's grid-point match use it."""
    rng = np.random.default_rng(4)
    axis = np.sort(rng.uniform(-80.0, 80.0, 300))
    values = rng.uniform(-100.0, 100.0, 5000)
    brute = np.abs(values[:, None] - axis[None, :]).argmin(axis=1)
    np.testing.assert_array_equal(nearest_index(axis, values), brute)

