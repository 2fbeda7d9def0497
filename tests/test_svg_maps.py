"""The report's SVG maps (analogs.presentation.svg_maps) against outside references: the
colour tables and their mapping against matplotlib's colour maps and norms, the PNG
writer against PIL's decoder, the degree ticks against matplotlib's MaxNLocator, the
height contours against matplotlib's own ``contour`` of the same field, the analog grid's
counts and markers against the events table filtered with pandas, and each shaded field
decoded back against the arrays (numpy reference) it draws. Every map is parsed as XML
(the standard library's ElementTree)."""

import base64
import io
import re
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from PIL import Image

from analogs.errors import AnalogsInputError
from analogs.geo import MapLines
from analogs.presentation import svg_maps
from analogs.presentation.colours import colour_table, encode_png, kind_colour, mapped_rgba
from analogs.presentation.map_layers import (
    DENSITY_FLOOR,
    LAND_NOTE,
    PLAIN_AXES_NOTE,
    axis_lines,
    contour_lines,
    degrees_east_label,
    degrees_north_label,
    height_levels,
    land_lines,
    nice_ticks,
)
from analogs.stages.outcomes import outcome_maps

SVG = "{http://www.w3.org/2000/svg}"


def parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)


def points_of(d: str) -> list[np.ndarray]:
    """The polylines of an SVG path written as 'Mx,y x,y ...' (one M per line)."""
    return [np.array([[float(v) for v in pair.split(",")] for pair in part.split()])
            for part in d.split("M") if part.strip()]


def translate(element) -> tuple[float, float]:
    x, y = re.match(r"translate\(([-\d.]+) ([-\d.]+)\)", element.get("transform")).groups()
    return float(x), float(y)


def maps_of(root) -> list[tuple[ET.Element, tuple[float, float]]]:
    """Each map (nested <svg>, pixels from its frame's top left) with its offset."""
    return [(group[0], translate(group)) for group in root.iter(f"{SVG}g")
            if group.get("transform", "").startswith("translate") and len(group)
            and group[0].tag == f"{SVG}svg"]


def decoded_field(image) -> np.ndarray:
    """The RGBA pixels of a shaded field's embedded PNG (decoded by PIL)."""
    data = image.get("href").split(",", 1)[1]
    return np.asarray(Image.open(io.BytesIO(base64.b64decode(data))).convert("RGBA"))


def texts(root) -> list[str]:
    return [t.text for t in root.iter(f"{SVG}text")]


# ------------------------------------------------------------------ colours and PNG

@pytest.mark.parametrize("name", ["viridis", "cividis", "plasma", "RdBu_r"])
def test_colour_tables_are_matplotlibs(name):
    """Every entry of our tables is matplotlib's colour map sampled at it (to_hex)."""
    from matplotlib import colormaps
    from matplotlib.colors import to_hex
    ours = ["#" + bytes(row).hex() for row in colour_table(name)]
    assert ours == [to_hex(colormaps[name](i)) for i in range(256)]


def test_mapped_colours_follow_matplotlibs_norms():
    """Continuous values pick the entry matplotlib's Normalize + colour map picks (ends
    clipped); binned values the entry of BoundaryNorm with 10 bins over 256 colours;
    NaN and the cells asked for are transparent."""
    from matplotlib import colormaps
    from matplotlib.colors import BoundaryNorm, Normalize
    rng = np.random.default_rng(5)
    values = rng.uniform(-20.0, 120.0, (40, 30))
    values[3, 4] = np.nan
    reference = colormaps["viridis"](Normalize(0.0, 100.0)(np.ma.masked_invalid(values)))
    ours = mapped_rgba(values, "viridis", 0.0, 100.0)
    finite = np.isfinite(values)
    np.testing.assert_array_equal(ours[finite][:, :3],
                                  np.round(reference[finite][:, :3] * 255).astype(np.uint8))
    assert ours[3, 4, 3] == 0 and np.all(ours[finite][:, 3] == 255)
    bins = np.arange(0.0, 101.0, 10.0)
    binned = colormaps["viridis"](BoundaryNorm(bins, 256)(np.clip(values, 0, 100)))
    ours = mapped_rgba(np.clip(values, 0, 100), "viridis", 0.0, 100.0, bins=bins,
                       transparent=values <= 0.0)
    np.testing.assert_array_equal(ours[finite][:, :3],
                                  np.round(binned[finite][:, :3] * 255).astype(np.uint8))
    np.testing.assert_array_equal(ours[..., 3] == 0, ~(values > 0.0))
    from matplotlib.colors import to_hex
    assert kind_colour(1, 3) == to_hex(colormaps["plasma"](0.5))


def test_png_writer_decodes_with_pil():
    """Our PNG bytes decode (PIL) to the very RGBA array written."""
    rgba = np.random.default_rng(1).integers(0, 256, (17, 23, 4), dtype=np.uint8)
    png = encode_png(rgba)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    image = Image.open(io.BytesIO(png))
    assert image.mode == "RGBA" and image.size == (23, 17)
    np.testing.assert_array_equal(np.asarray(image), rgba)


# ------------------------------------------------------------------ shared layers

def test_degree_labels():
    """West of 0 is W, south of the equator S (from memory of the geographic convention)."""
    assert degrees_east_label(-100) == "100°W"
    assert degrees_east_label(200) == "160°W"
    assert degrees_east_label(20.5) == "20.5°E"
    assert degrees_east_label(0) == "0°" and degrees_east_label(180) == "180°"
    assert degrees_north_label(-10) == "10°S" and degrees_north_label(35) == "35°N"


def test_ticks_are_matplotlibs_max_n_locator():
    from matplotlib.ticker import MaxNLocator
    rng = np.random.default_rng(0)
    cases = [(-130.0, -60.0, 6), (20.0, 55.0, 5), (150.0, 210.0, 4), (0.0, 360.0, 6)]
    cases += [(a, a + span, n) for a, span, n in zip(rng.uniform(-200, 200, 300),
                                                      rng.uniform(0.5, 150, 300),
                                                      rng.integers(2, 8, 300))]
    for low, high, n in cases:
        expected = [t for t in MaxNLocator(n, steps=[1, 2, 5, 10]).tick_values(low, high)
                    if low <= t <= high]
        np.testing.assert_allclose(nice_ticks(low, high, n), expected, err_msg=str((low, high)))


def field(seed=3, nan=True):
    rng = np.random.default_rng(seed)
    lat, lon = np.linspace(20.0, 50.0, 16), np.linspace(-120.0, -70.0, 26)
    z = 5600.0 + np.cumsum(rng.normal(0.0, 25.0, (lat.size, lon.size)), axis=1)
    if nan:
        z[4, 7] = np.nan  # a missing value stays a gap
    return lat, lon, z


@pytest.mark.parametrize("nan", [False, True])
def test_contour_lines_are_matplotlibs_contour(nan):
    """contourpy with matplotlib's algorithm gives, level by level, the vertices of
    matplotlib's own contour of the same field (NaN cells left out alike)."""
    from matplotlib.figure import Figure
    lat, lon, z = field(nan=nan)
    levels = height_levels(z)
    reference = Figure().add_subplot().contour(lon, lat, z, levels=levels)
    for (level, lines), expected in zip(contour_lines(lon, lat, z, levels),
                                        reference.get_paths()):
        ours = np.concatenate(lines) if lines else np.empty((0, 2))
        np.testing.assert_allclose(ours, expected.vertices.reshape(-1, 2), err_msg=str(level))


def test_land_line_is_the_half_contour_of_the_mask():
    """For land west of 100.5 W on a 1-degree grid, linear interpolation between the last
    land column (101 W, 1) and the first sea column (100 W, 0) puts the line at 100.5 W
    (worked by hand)."""
    lat, lon = np.arange(20.0, 50.1, 1.0), np.arange(-120.0, -80.1, 1.0)
    land = xr.DataArray(np.broadcast_to((lon <= -101.0).astype(float), (lat.size, lon.size)),
                        dims=("lat", "lon"), coords={"lat": lat, "lon": lon})
    (line,) = land_lines(land)
    np.testing.assert_allclose(line[:, 0], -100.5)


def test_axis_lines_are_the_groups_of_each_axis():
    """The marks' lines are pandas' groups by axis number (reference: groupby), points
    in the table's order within a line."""
    marks = pd.DataFrame({"axis": [3, 1, 3, 1, 7, 3], "lat": [30.0, 31.0, 32.0, 33.0, 34.0, 35.0],
                          "lon": [-100.0, -99.0, -98.0, -97.0, -96.0, -95.0]})
    expected = [group[["lon", "lat"]].to_numpy() for _, group in marks.groupby("axis")]
    lines = axis_lines(marks["axis"], marks["lon"], marks["lat"])
    assert len(lines) == len(expected)
    for line, reference in zip(lines, expected):
        np.testing.assert_array_equal(line, reference)
    assert axis_lines([], [], []) == []


def test_maps_take_no_store():
    """Presentation only draws: no map function takes a store argument."""
    import inspect
    for name, function in inspect.getmembers(svg_maps, inspect.isfunction):
        if function.__module__ == svg_maps.__name__:
            assert "store" not in inspect.signature(function).parameters, name


# ------------------------------------------------------------------ the maps

def day_fields(store, rows) -> xr.Dataset:
    """Climatology + EOF reconstruction of archive rows (what the store can give)."""
    rows = np.atleast_1d(rows)
    climate = store.climatology.predict(store.times[rows])[store.fields]
    anomaly = store.eof.reconstruct(store.pcs.isel(time=rows))[store.fields]
    return xr.Dataset({name: (("time", "lat", "lon"), climate[name].values + anomaly[name].values)
                       for name in store.fields},
                      coords={"lat": anomaly["lat"].values, "lon": anomaly["lon"].values})


@pytest.fixture(scope="module")
def query(demo_store):
    tags = demo_store.tags
    summer = tags[(tags.index.year == tags.index.year.max()) & tags.index.month.isin([6, 7, 8])]
    return demo_store.find(date=str(summer["confidence"].idxmax().date()), top=12)


def back_to_degrees(frame, xy):
    """Pixels of a map back to (lon, lat)."""
    return np.c_[frame.lon0 + xy[:, 0] / frame.x_scale, frame.lat1 - xy[:, 1] / frame.y_scale]


def test_target_map(demo_store, query):
    target = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    marks = pd.DataFrame({"kind": ["trough", "trough", "low"], "axis": [0, 0, -1],
                          "lat": [30.0, 45.0, 33.0], "lon": [-95.0, -92.0, -90.0]})
    svg = svg_maps.target_map(target, region=demo_store.region, when="Target day",
                              source="EOF reconstruction", marks=marks, alt="the alt text")
    root = parse(svg)
    assert root.get("role") == "img" and root.get("aria-label") == "the alt text"
    assert root.find(f"{SVG}title").text == "the alt text"
    words = texts(root)
    # The rich-moisture line at the field's own level: 12 C at 850 hPa (common practice,
    # from memory; analogs.stages.diagnostics.RICH_MOISTURE), not the surface 60 F line.
    assert any("850 hPa dewpoint 12 degC" in t for t in words)
    assert "850 hPa specific humidity (g/kg)" in words and PLAIN_AXES_NOTE in words
    (the_map, (x0, y0)), = maps_of(root)
    lat, lon = target["lat"].values, target["lon"].values
    frame = svg_maps.Frame(lat, lon, svg_maps.MAP_WIDTH)
    # Aspect 1 / cos(mean latitude) (matplotlib's set_aspect of the former maps).
    assert float(the_map.get("height")) == pytest.approx(
        float(the_map.get("width")) * np.ptp(lat) / (np.ptp(lon) * np.cos(np.radians(lat.mean()))),
        abs=0.1)
    # Degree labels at their ticks (MaxNLocator's values), in W and N.
    for value in nice_ticks(lon.min(), lon.max(), 6):
        label = [t for t in root.iter(f"{SVG}text") if t.text == degrees_east_label(value)]
        assert label and float(label[0].get("x")) == pytest.approx(
            x0 + frame.px(value, 0)[0], abs=0.1)
    assert any(t.endswith("°N") for t in words)
    # Contours: every vertex drawn is a vertex of matplotlib's contour of the height.
    from matplotlib.figure import Figure
    z = target["z500"].values
    reference = Figure().add_subplot().contour(lon, lat, z, levels=height_levels(z))
    expected = np.concatenate([p.vertices for p in reference.get_paths() if len(p.vertices)])
    (path,) = [p for p in the_map.iter(f"{SVG}path") if p.get("class") == "height-contours"]
    drawn = back_to_degrees(frame, np.concatenate(points_of(path.get("d"))))
    assert len(drawn) == len(expected)
    np.testing.assert_allclose(drawn, expected, atol=0.1 / frame.x_scale + 0.1 / frame.y_scale)
    labels = [t.text for t in the_map.iter(f"{SVG}text") if t.get("class") == "contour-label"]
    assert labels and set(labels) <= {f"{v:.0f}" for v in height_levels(z)}
    # The shading decodes to the q850 field in g/kg through viridis (north row first).
    (image,) = [i for i in the_map.iter(f"{SVG}image") if i.get("class") == "field"]
    q = target["q850"].values * 1000.0
    from matplotlib import colormaps
    from matplotlib.colors import Normalize
    colours = colormaps["viridis"](Normalize(q.min(), q.max())(q))[::-1, :, :3]
    np.testing.assert_array_equal(decoded_field(image)[..., :3],
                                  np.round(colours * 255).astype(np.uint8))
    # The image's cells are centred on the grid points: it reaches half a cell beyond.
    assert float(image.get("x")) == pytest.approx(-0.5 * frame.width / (lon.size - 1), abs=0.01)
    # Marks: the trough through its points, the L at the low.
    (trough,) = [p for p in the_map.iter(f"{SVG}path") if p.get("class") == "trough"]
    np.testing.assert_allclose(back_to_degrees(frame, points_of(trough.get("d"))[0]),
                               [[-95.0, 30.0], [-92.0, 45.0]], atol=0.05)
    (low,) = [t for t in the_map.iter(f"{SVG}text") if t.get("class") == "low"]
    np.testing.assert_allclose(back_to_degrees(frame, np.array([[float(low.get("x")),
                                                                 float(low.get("y"))]])),
                               [[-90.0, 33.0]], atol=0.05)
    assert "trough axis" in words and "closed 500 hPa low (L)" in words
    with pytest.raises(AnalogsInputError, match="'z500'"):
        svg_maps.target_map(xr.Dataset())


def test_analog_grid_draws_every_analog_with_its_events(demo_store, query):
    drawn = query.analogs
    fields = day_fields(demo_store, drawn["row"].to_numpy()).rename(time="analog")
    events = demo_store.events[demo_store.events["day"].isin(pd.to_datetime(drawn["date"]))]
    views = []
    svg = svg_maps.analog_panel(fields, drawn, events, region=demo_store.region,
                                title="Closest past days", views=views)
    root = parse(svg)
    maps = {m.get("id"): (m, offset) for m, offset in maps_of(root)}
    assert len(maps) == len(views) == len(drawn) == 12
    titles = {int(t.get("data-rank")): t.text for t in root.iter(f"{SVG}text")
              if t.get("class") == "analog-title" and t.text.startswith("d ")}
    lat, lon = fields["lat"].values, fields["lon"].values
    frame = svg_maps.Frame(lat, lon, svg_maps.SMALL_MAP_WIDTH)
    z = fields["z500"].values
    levels = height_levels(z)
    on_map = events[events["lat"].between(lat.min(), lat.max())
                    & events["lon"].between(lon.min(), lon.max())]
    from matplotlib.figure import Figure
    for i, analog in enumerate(drawn.itertuples()):
        # The count above each map is the analogs table's (events in the region).
        count = int(analog.events_total)
        assert titles[analog.rank].endswith(f"{count} event{'s' * (count != 1)} in region")
        the_map, _ = maps[f"analog-map-{analog.rank}"]
        assert views[i] == (f"analog-map-{analog.rank}", frame.width, frame.height)
        # Its markers are its day's events on the map (pandas filter), where they lie.
        day = on_map[on_map["day"] == pd.Timestamp(analog.date)]
        markers = [u for u in the_map.iter(f"{SVG}use") if u.get("class") == "event"]
        assert sorted(u.get("data-kind") for u in markers) == sorted(day["kind"].astype(str))
        centres = np.array([[float(u.get("x")) + 3.0, float(u.get("y")) + 3.0]
                            for u in markers]).reshape(-1, 2)
        expected = np.c_[frame.px(day["lon"].to_numpy(), day["lat"].to_numpy())]
        np.testing.assert_allclose(np.sort(centres, axis=0), np.sort(expected, axis=0),
                                   atol=0.06)
        # Its contours are matplotlib's contour of its own field at the grid's levels.
        if i < 3:
            reference = Figure().add_subplot().contour(lon, lat, z[i], levels=levels)
            expected = np.concatenate([p.vertices for p in reference.get_paths()
                                       if len(p.vertices)])
            (path,) = [p for p in the_map.iter(f"{SVG}path")
                       if p.get("class") == "height-contours"]
            np.testing.assert_allclose(
                back_to_degrees(frame, np.concatenate(points_of(path.get("d")))), expected,
                atol=0.2 / frame.x_scale + 0.2 / frame.y_scale)
    words = texts(root)
    assert any(w.endswith("°W") for w in words) and any(w.endswith("°N") for w in words)
    assert set(events["kind"].astype(str)) <= set(words)  # the legend names each kind
    # The browsing panel shows a map again by reference, with its alt text.
    view = parse(svg_maps.map_view(views[0], "map of the day"))
    assert view.get("aria-label") == "map of the day"
    assert view.find("use").get("href") == f"#{views[0][0]}"
    with pytest.raises(AnalogsInputError, match="2 analog fields for 3 analog rows"):
        svg_maps.analog_panel(fields.isel(analog=slice(0, 2)), drawn.head(3), None)


def test_composite_difference_shades_the_mean_minus_the_target(demo_store, query):
    rows = query.analogs["row"].to_numpy()
    target = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    mean = day_fields(demo_store, rows).mean("time").assign_attrs(n_days=rows.size)
    root = parse(svg_maps.composite_difference(mean, target, region=demo_store.region,
                                               title="Analogs of the day"))
    words = texts(root)
    assert "mean of 12 analog days:" in words
    assert "analog mean minus target, 500 hPa height (gpm)" in words
    (_, left), (right_map, _) = maps_of(root)
    # Reference: numpy mean of climatology + reconstruction minus the target, coloured
    # through matplotlib's RdBu_r symmetric about zero.
    from matplotlib import colormaps
    from matplotlib.colors import Normalize
    daily = (demo_store.climatology.predict(demo_store.times[rows])["z500"].values
             + demo_store.eof.reconstruct(demo_store.pcs.isel(time=rows))["z500"].values)
    difference = daily.mean(axis=0) - target["z500"].values
    limit = np.abs(difference).max()
    colours = colormaps["RdBu_r"](Normalize(-limit, limit)(difference))[::-1, :, :3]
    (image,) = [i for i in right_map.iter(f"{SVG}image") if i.get("class") == "field"]
    np.testing.assert_array_equal(decoded_field(image)[..., :3],
                                  np.round(colours * 255).astype(np.uint8))
    # The white rich-moisture line is the mean's, on the left map only.
    assert not [p for p in right_map.iter(f"{SVG}path") if p.get("class") == "rich-moisture"]
    with pytest.raises(AnalogsInputError, match="one grid"):
        svg_maps.composite_difference(target, target.isel(lat=slice(None, None, 2)))


def test_probability_and_density_leave_zero_blank(demo_store, query):
    lat, lon = demo_store.grid
    maps = outcome_maps(demo_store.events, pd.to_datetime(query.analogs["date"]), lat, lon)
    root = parse(svg_maps.probability_map(maps, region=demo_store.region, when="the day"))
    words = texts(root)
    assert any("within 40 km" in w and "(%)" in w for w in words)
    assert any("(12 days)" in w for w in words)
    (probability, _), (density, _) = maps_of(root)
    p = 100.0 * maps["neighbourhood_probability"].values[::-1]
    (image,) = [i for i in probability.iter(f"{SVG}image") if i.get("class") == "field"]
    np.testing.assert_array_equal(decoded_field(image)[..., 3] == 0, p <= 0.0)
    values = maps["report_density"].values[::-1]
    (image,) = [i for i in density.iter(f"{SVG}image") if i.get("class") == "field"]
    np.testing.assert_array_equal(decoded_field(image)[..., 3] > 0,
                                  values >= DENSITY_FLOOR * values.max())


def test_a_map_across_the_date_line_draws_unbroken_with_degree_labels():
    """Longitudes 150..210 (continuous across the date line): ticks labelled 160°E, 180°,
    160°W in order from left to right, and a line crossing 180 drawn as one path."""
    lat, lon = np.arange(40.0, 70.1, 2.0), np.arange(150.0, 210.1, 2.0)
    z = 5500.0 + 10.0 * (lat[:, None] - 40.0) + 0.0 * lon[None, :]
    fields = xr.Dataset({"z500": (("lat", "lon"), z)}, coords={"lat": lat, "lon": lon})
    coast = MapLines(coastline=[np.array([[170.0, 55.0], [190.0, 60.0]])], source="test")
    root = parse(svg_maps.target_map(fields, geography=coast))
    labels = [t for t in root.iter(f"{SVG}text") if t.text in ("160°E", "180°", "160°W")]
    assert [t.text for t in sorted(labels, key=lambda t: float(t.get("x")))] == [
        "160°E", "180°", "160°W"]
    (the_map, _), = maps_of(root)
    (line,) = [p for p in the_map.iter(f"{SVG}path") if p.get("class") == "earth-coastline"]
    frame = svg_maps.Frame(lat, lon, svg_maps.MAP_WIDTH)
    np.testing.assert_allclose(back_to_degrees(frame, points_of(line.get("d"))[0]),
                               [[170.0, 55.0], [190.0, 60.0]], atol=0.05)
    assert "grey: coastlines (test)" in texts(root) and LAND_NOTE not in texts(root)


@settings(max_examples=150, deadline=None)
@given(arrays(np.float64, st.tuples(st.integers(0, 60), st.just(2)),
              elements=st.floats(-2e5, 2e5, allow_nan=False) | st.sampled_from(
                  [0.05, -0.05, 0.15, -0.04, 99999.95, 1e5 + 0.05])))
def test_path_points_are_printf_g_of_numpy_round(xy):
    """Path coordinates: each number as ``"%g" % round(v, 1)`` (Python's printf-style
    formatting of numpy's rounding to a tenth, minus zero written 0), pairs joined by
    a comma and a space, whichever way svg_maps writes them (a table of the tenths a
    path spans, or number by number when it spans too many)."""
    from analogs.presentation.svg_maps import _points
    expected = " ".join(f"{'%g' % (np.round(x, 1) + 0.0)},{'%g' % (np.round(y, 1) + 0.0)}"
                        for x, y in xy)
    assert _points(xy) == expected
