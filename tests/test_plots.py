"""Figures rendered off-screen from arrays and tables of the demo store: not blank, with
the expected axes, titles and colour bars, and drawing the numbers they claim
(references: numpy on the store's own reconstructions, scikit-learn's ROC area,
outcome_maps). The figure functions take no store: the fields are made here."""

import io
import subprocess
import sys

import matplotlib.colors
import matplotlib.image
from matplotlib.collections import LineCollection
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from sklearn.metrics import roc_auc_score

from analogs.presentation import figures as plots
from analogs.errors import AnalogsInputError
from analogs.stages.hindcast import leave_one_year_out
from analogs.stages.outcomes import outcome_maps
from analogs.stages.scores import reliability_table, roc_curve_points

#: Least variance of the RGBA pixel values (0-255) of a figure with content; a blank
#: white canvas has 0, a figure with only a title about 10 (measured here).
MIN_PIXEL_VARIANCE = 200.0


def pixels(figure) -> np.ndarray:
    figure.canvas.draw()
    return np.asarray(figure.canvas.buffer_rgba(), dtype=float)


def assert_not_blank(figure):
    assert pixels(figure).var() > MIN_PIXEL_VARIANCE
    png = plots.figure_png(figure)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    image = matplotlib.image.imread(io.BytesIO(png), format="png")
    assert image.var() * 255.0 ** 2 > MIN_PIXEL_VARIANCE


def assert_degree_labels(figure, ax):
    """Tick labels in degrees W/E and N/S, matching the tick positions (west of 0 is W,
    from memory of the usual geographic convention)."""
    figure.canvas.draw()
    for tick, label in zip(ax.get_xticks(), ax.get_xticklabels()):
        if label.get_text():
            assert label.get_text() == f"{abs(tick):g}°{'W' if tick < 0 else 'E'}"
    for tick, label in zip(ax.get_yticks(), ax.get_yticklabels()):
        if label.get_text():
            assert label.get_text() == f"{abs(tick):g}°{'S' if tick < 0 else 'N'}"
    assert any(label.get_text().endswith("W") for label in ax.get_xticklabels())


def test_degree_labels():
    assert plots.degrees_east_label(-100) == "100°W"
    assert plots.degrees_east_label(200) == "160°W"
    assert plots.degrees_east_label(20.5) == "20.5°E"
    assert plots.degrees_east_label(0) == "0°" and plots.degrees_east_label(180) == "180°"
    assert plots.degrees_north_label(-10) == "10°S" and plots.degrees_north_label(35) == "35°N"


def colourbar_labels(figure) -> list[str]:
    return [ax.get_ylabel() for ax in figure.axes if ax.get_label() == "<colorbar>"]


def map_axes(figure):
    return [ax for ax in figure.axes if ax.get_label() != "<colorbar>"]


def day_fields(store, rows) -> xr.Dataset:
    """Full fields of archive rows, ``(time, lat, lon)``: the daily climatology of each
    day plus its anomaly reconstructed from the kept EOFs (what the store can give)."""
    rows = np.atleast_1d(rows)
    climate = store.climatology.predict(store.times[rows])[store.fields]
    anomaly = store.eof.reconstruct(store.pcs.isel(time=rows))[store.fields]
    return xr.Dataset({name: (("time", "lat", "lon"), climate[name].values + anomaly[name].values,
                              {"units": anomaly[name].attrs.get("units", "")})
                       for name in store.fields},
                      coords={"lat": anomaly["lat"].values, "lon": anomaly["lon"].values})


@pytest.fixture(scope="module")
def query(demo_store):
    tags = demo_store.tags
    summer = tags[(tags.index.year == tags.index.year.max()) & tags.index.month.isin([6, 7, 8])]
    date = summer["confidence"].idxmax()
    return demo_store.find(date=str(date.date()), top=12)


def test_blank_figure_fails_the_check():
    """The blankness threshold separates an empty canvas from a drawn one."""
    empty = plots.new_figure(4, 3)
    assert pixels(empty).var() < MIN_PIXEL_VARIANCE


def test_target_map(demo_store, query):
    fields = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    figure = plots.target_map(fields, region=demo_store.region,
                              when=f"Target {query.target['date']}", source="EOF reconstruction")
    assert_not_blank(figure)
    assert len(figure.axes) == 2
    assert colourbar_labels(figure) == ["850 hPa specific humidity (g/kg)"]
    (ax,) = map_axes(figure)
    assert query.target["date"] in ax.get_title() and "500 hPa height" in ax.get_title()
    # The line of rich moisture at the field's own level: 12 C at 850 hPa (common practice,
    # from memory; see analogs.stages.diagnostics.RICH_MOISTURE), not the surface 60 F line.
    assert "850 hPa dewpoint 12 degC" in ax.get_title() and "60 F" not in ax.get_title()
    dewpoint_lines = [c for c in ax.collections if hasattr(c, "levels")
                      and list(getattr(c, "levels", [])) == [12.0]]
    assert dewpoint_lines, "no 12 C line drawn"
    assert_degree_labels(figure, ax)
    # The shaded moisture is the field in g/kg.
    mesh = ax.collections[0]
    np.testing.assert_allclose(np.asarray(mesh.get_array()).ravel(),
                               fields["q850"].values.ravel() * 1000.0)
    assert plots.PLAIN_AXES_NOTE in [t.get_text() for t in figure.texts]


def test_target_map_needs_height():
    import xarray as xr
    with pytest.raises(AnalogsInputError, match="'z500'"):
        plots.target_map(xr.Dataset())


def test_analog_panel(demo_store, query):
    drawn = query.analogs
    fields = day_fields(demo_store, drawn["row"].to_numpy()).rename(time="analog")
    events = demo_store.events[demo_store.events["day"].isin(pd.to_datetime(drawn["date"]))]
    figure = plots.analog_panel(fields, drawn, events, region=demo_store.region,
                                title=f"Closest past days to {query.target['date']}")
    assert_not_blank(figure)
    (ax,) = map_axes(figure)                  # every small map on one axes (fast)
    titles = {t.get_gid(): t.get_text() for t in ax.texts if t.get_gid()}
    assert len(titles) == len(drawn) == 12    # every analog, in a grid
    for analog in drawn.itertuples():
        title = titles[f"analog-{analog.rank}"]
        assert analog.date in title and analog.regime in title
        # The count in the title is the analogs table's (events in the region).
        assert f"{analog.events_total} event" in title and "in region" in title
    labels = [t.get_text() for t in ax.texts if not t.get_gid()]
    assert any(label.endswith("°W") for label in labels)
    assert any(label.endswith("°N") for label in labels)
    assert query.target["date"] in figure.get_suptitle()
    # Events plotted: the markers inside the first analog's map are its events on the
    # map's grid, by kind (reference: the events table filtered here).
    lat, lon = fields["lat"].values, fields["lon"].values
    first = drawn.iloc[0]
    day_events = demo_store.events[(demo_store.events["day"] == pd.Timestamp(first["date"]))
                                   & demo_store.events["lat"].between(lat.min(), lat.max())
                                   & demo_store.events["lon"].between(lon.min(), lon.max())]
    dx, dy = figure.panel_offsets[0]
    plotted = 0
    for c in ax.collections:
        if c.get_label() in set(demo_store.events["kind"]):
            xy = np.asarray(c.get_offsets())
            if xy.size:
                plotted += int(np.sum((xy[:, 0] - dx >= lon.min()) & (xy[:, 0] - dx <= lon.max())
                                      & (xy[:, 1] - dy >= lat.min())
                                      & (xy[:, 1] - dy <= lat.max())))
    assert plotted == len(day_events)


def test_analog_panel_refuses_mismatched_fields(demo_store, query):
    fields = day_fields(demo_store, query.analogs["row"].to_numpy()[:2]).rename(time="analog")
    with pytest.raises(AnalogsInputError, match="2 analog fields for 3 analog rows"):
        plots.analog_panel(fields, query.analogs.head(3), None)


def test_composite_difference(demo_store, query):
    rows = query.analogs["row"].to_numpy()
    target = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    mean = day_fields(demo_store, rows).mean("time").assign_attrs(n_days=rows.size)
    figure = plots.composite_difference(mean, target, region=demo_store.region,
                                        title=f"Analogs of {query.target['date']}")
    assert_not_blank(figure)
    assert len(figure.axes) == 4
    labels = colourbar_labels(figure)
    assert any("g/kg" in label for label in labels)
    assert any("minus target" in label and "(gpm)" in label for label in labels)
    left, right = map_axes(figure)
    assert "12 analog days" in left.get_title() and "minus target" in right.get_title()
    assert query.target["date"] in figure.get_suptitle()
    # Reference: numpy mean over the analog days of climatology + reconstruction.
    daily = (demo_store.climatology.predict(demo_store.times[rows])["z500"].values
             + demo_store.eof.reconstruct(demo_store.pcs.isel(time=rows))["z500"].values)
    expected = daily.mean(axis=0) - target["z500"].values
    shaded = np.asarray(right.collections[0].get_array()).reshape(expected.shape)
    np.testing.assert_allclose(shaded, expected, rtol=1e-9, atol=1e-6)


def test_composite_difference_needs_one_grid(demo_store, query):
    target = day_fields(demo_store, 0).isel(time=0)
    coarse = target.isel(lat=slice(None, None, 2))
    with pytest.raises(AnalogsInputError, match="one grid"):
        plots.composite_difference(target, coarse)


def test_probability_map(demo_store, query):
    lat, lon = demo_store.grid
    maps = outcome_maps(demo_store.events, pd.to_datetime(query.analogs["date"]), lat, lon)
    figure = plots.probability_map(maps, region=demo_store.region, when=query.target["date"])
    assert_not_blank(figure)
    assert len(figure.axes) == 4
    fraction_label, density_label = colourbar_labels(figure)
    assert "within 40 km" in fraction_label and "(%)" in fraction_label
    assert "smoothed" in density_label
    ax, right = map_axes(figure)
    assert "12 days" in ax.get_title() and "density" in right.get_title()
    assert_degree_labels(figure, ax)
    # Reference: outcome_maps' arrays; zero is masked (drawn blank), every other cell shown.
    shaded = ax.collections[0].get_array()
    expected = 100.0 * maps["neighbourhood_probability"].values.ravel()
    np.testing.assert_array_equal(np.ma.getmaskarray(shaded).ravel(), expected <= 0.0)
    np.testing.assert_allclose(np.ma.filled(shaded, 0.0).ravel(), expected)
    density = right.collections[0].get_array()
    values = maps["report_density"].values.ravel()
    shown = ~np.ma.getmaskarray(density).ravel()
    np.testing.assert_array_equal(shown, values >= plots.DENSITY_FLOOR * values.max())
    np.testing.assert_allclose(np.ma.compressed(density), values[shown])


@pytest.fixture(scope="module")
def hindcast(demo_store):
    return leave_one_year_out(demo_store.pcs.values, demo_store.times, demo_store.observed(),
                              months=[5, 6, 7, 8, 9])


def test_reliability_diagram(hindcast):
    table = reliability_table(hindcast["forecast"], hindcast["observed"])
    figure = plots.reliability_diagram(table, title_suffix="May-Sep")
    assert_not_blank(figure)
    assert len(figure.axes) == 2
    top, bottom = figure.axes
    assert "Reliability" in top.get_title() and "May-Sep" in top.get_title()
    line = [drawn for drawn in top.get_lines() if drawn.get_label() == "hindcast"][0]
    np.testing.assert_allclose(line.get_ydata(), [b["observed_frequency"] for b in table])
    assert [p.get_height() for p in bottom.patches] == [b["count"] for b in table]


def test_roc_diagram_area_matches_scikit_learn(hindcast):
    p, o = hindcast["forecast"].to_numpy(), hindcast["observed"].to_numpy()
    false_alarm_rate, hit_rate, _ = roc_curve_points(p, o)
    figure = plots.roc_diagram(false_alarm_rate, hit_rate)
    assert_not_blank(figure)
    (ax,) = figure.axes
    assert ax.get_xlabel() == "false alarm rate" and ax.get_ylabel() == "hit rate"
    label = [drawn for drawn in ax.get_lines() if drawn.get_label().startswith("hindcast")][0].get_label()
    assert f"area {roc_auc_score(o, p):.2f}" in label


def test_plots_leave_pyplot_alone():
    """Importing and drawing never loads pyplot (no global figure state, no display)."""
    code = ("import sys, analogs.presentation.figures as p; f = p.new_figure(); f.add_subplot().plot([1, 2]); "
            "p.figure_png(f); print('matplotlib.pyplot' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_figures_take_no_store():
    """Presentation only draws: no figure function takes a store argument."""
    import inspect
    for name, function in inspect.getmembers(plots, inspect.isfunction):
        if function.__module__ == plots.__name__:
            assert "store" not in inspect.signature(function).parameters, name


def land_collections(ax):
    return [c for c in ax.collections
            if isinstance(c, LineCollection) and np.allclose(
                c.get_colors()[0], matplotlib.colors.to_rgba(plots.LAND_COLOUR))]


def test_land_outline_is_the_half_contour_of_the_mask(demo_store, query):
    """The land-sea line is the 0.5 contour of the mask: for land west of 100.5 W on a
    1-degree grid, linear interpolation between the last land column (101 W, 1) and the
    first sea column (100 W, 0) puts it at 100.5 W (worked by hand)."""
    fields = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    lat, lon = fields["lat"].values, fields["lon"].values
    land = xr.DataArray(np.broadcast_to((lon <= -101.0).astype(float), (lat.size, lon.size)),
                        dims=("lat", "lon"), coords={"lat": lat, "lon": lon},
                        attrs={"standard_name": "land_binary_mask"})
    figure = plots.target_map(fields, region=demo_store.region, land=land)
    (ax,) = map_axes(figure)
    (outline,) = land_collections(ax)
    vertices = np.concatenate([p.vertices for p in outline.get_paths()])
    np.testing.assert_allclose(vertices[:, 0], -100.5)
    assert plots.LAND_NOTE in [t.get_text() for t in figure.texts]
    assert_not_blank(figure)


def test_land_lines_match_matplotlib_contour():
    """The boundary traced once (contourpy) is the path matplotlib's own contour of the
    0.5 level draws, for an analytic round island."""
    from matplotlib.figure import Figure
    lat, lon = np.arange(20.0, 50.1, 1.0), np.arange(-120.0, -80.1, 1.0)
    lat2d, lon2d = np.meshgrid(lat, lon, indexing="ij")
    island = ((lat2d - 35.0) ** 2 + (lon2d + 100.0) ** 2 < 60.0).astype(float)
    land = xr.DataArray(island, dims=("lat", "lon"), coords={"lat": lat, "lon": lon})
    (line,) = plots.land_lines(land)
    reference = Figure().add_subplot().contour(lon, lat, island, levels=[0.5])
    expected = np.concatenate([p.vertices for p in reference.get_paths() if len(p.vertices)])
    as_set = lambda points: np.unique(np.round(points, 9), axis=0)  # noqa: E731
    np.testing.assert_allclose(as_set(line), as_set(expected))


def test_marks_are_drawn_with_their_legend(demo_store, query):
    """The target map draws each trough and ridge axis handed to it (one line per axis,
    through its points) and each closed low as an L, and its legend names them; the analog
    grid draws each panel's marks shifted by that panel's offset."""
    fields = day_fields(demo_store, demo_store.day_row(query.target["date"])).isel(time=0)
    marks = pd.DataFrame({"kind": ["trough", "trough", "ridge", "ridge", "low"],
                          "axis": [0, 0, 1, 1, -1], "lat": [30.0, 45.0, 30.0, 50.0, 33.0],
                          "lon": [-95.0, -92.0, -110.0, -111.0, -90.0]})
    figure = plots.target_map(fields, region=demo_store.region, marks=marks)
    (ax,) = map_axes(figure)
    by_label = {c.get_label(): c for c in ax.collections if isinstance(c, LineCollection)}
    np.testing.assert_allclose(by_label["trough axis"].get_segments()[0],
                               [[-95.0, 30.0], [-92.0, 45.0]])
    np.testing.assert_allclose(by_label["ridge axis"].get_segments()[0],
                               [[-110.0, 30.0], [-111.0, 50.0]])
    assert [(t.get_text(), t.get_position()) for t in ax.texts if t.get_text() == "L"] == [
        ("L", (-90.0, 33.0))]
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend == ["trough axis", "ridge axis", "closed 500 hPa low (L)"]
    assert_not_blank(figure)

    drawn = query.analogs.head(3)
    grid_fields = day_fields(demo_store, drawn["row"].to_numpy()).rename(time="analog")
    panel_marks = pd.concat([marks.assign(panel=1)], ignore_index=True)
    grid = plots.analog_panel(grid_fields, drawn, None, marks=panel_marks)
    (grid_ax,) = grid.axes
    dx, dy = grid.panel_offsets[1]
    trough = [c for c in grid_ax.collections if c.get_label() == "trough axis"][0]
    np.testing.assert_allclose(trough.get_segments()[0],
                               [[-95.0 + dx, 30.0 + dy], [-92.0 + dx, 45.0 + dy]])
    assert "trough axis" in [t.get_text() for t in grid.legends[0].get_texts()]


def _ink(figure):
    """Ink of a figure drawn at 90 dpi on white: (sum of darkness, bounding box rows and
    columns of the inked pixels)."""
    figure.set_dpi(90)
    grey = pixels(figure)[..., :3].mean(axis=-1)
    rows, columns = np.nonzero(grey < 250)
    return (255.0 - grey).sum(), (rows.min(), rows.max(), columns.min(), columns.max())


def test_text_drawn_as_matplotlib_draws_it():
    """The maps' canvas writes each line of text as one FreeType bitmap: the text covers
    the place matplotlib's own Agg renderer gives it (reference: a stock
    FigureCanvasAgg) to a pixel, with the same amount of ink to 1 %, for each alignment
    and size of a two-line label as the analog grid's titles are."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    cases = [{"ha": "left", "va": "bottom"}, {"ha": "center", "va": "top"},
             {"ha": "right", "va": "center"}, {"ha": "left", "va": "baseline"}]
    for case, size in [(case, size) for case in cases for size in (6.5, 10.0)]:
        drawn = []
        for make in (lambda: plots.new_figure(3.0, 1.0),
                     lambda: FigureCanvasAgg(Figure(figsize=(3.0, 1.0))).figure):
            figure = make()
            figure.text(0.5, 0.5, "#12 2003-07-02 northwest_flow\nd 0.83, 4 events in region",
                        fontsize=size, **case)
            drawn.append(_ink(figure))
        (ours, box), (theirs, reference) = drawn
        assert np.all(np.abs(np.subtract(box, reference)) <= 1), (case, size)
        assert abs(ours - theirs) <= 0.01 * theirs, (case, size)
    # Rotated text keeps matplotlib's own path (it is not written as one bitmap).
    figure = plots.new_figure(1.0, 3.0)
    figure.text(0.5, 0.5, "rotated", rotation=90)
    assert _ink(figure)[0] > 0


def test_grid_contours_are_each_maps_contours():
    """The analog grid's one contour set draws, at every level, the lines that a contour
    of each map on its own shifted coordinates draws (reference: matplotlib's contour
    of each map), none joining two maps."""
    from matplotlib.figure import Figure
    rng = np.random.default_rng(3)
    lat, lon = np.linspace(20.0, 50.0, 16), np.linspace(-120.0, -70.0, 26)
    z = 5600.0 + np.cumsum(rng.normal(0.0, 25.0, (3, lat.size, lon.size)), axis=2)
    z[1, 4, 7] = np.nan  # a missing value inside a map stays a gap
    offsets = [(0.0, 0.0), (60.0, 0.0), (0.0, -40.0)]
    levels = np.arange(5400.0, 6000.0, 60.0)
    ax = Figure().add_subplot()
    plots._grid_contours(ax, lon, lat, z, offsets, levels)
    (contours,) = [c for c in ax.collections if hasattr(c, "levels")]
    def as_set(paths):
        points = np.concatenate([p.vertices for p in paths if len(p.vertices)])
        return np.unique(np.round(points, 6), axis=0)

    reference_ax = Figure().add_subplot()
    for level, path in zip(contours.levels, contours.get_paths()):
        expected = [reference_ax.contour(lon + dx, lat + dy, z[i], levels=[level]).get_paths()
                    for i, (dx, dy) in enumerate(offsets)]
        expected = [p for paths in expected for p in paths]
        if not any(len(p.vertices) for p in expected):
            assert not len(path.vertices)
            continue
        np.testing.assert_allclose(as_set([path]), as_set(expected))
        # No segment spans two maps: every step stays inside one map's box.
        steps = np.abs(np.diff(path.vertices, axis=0))
        codes = path.codes[1:] if path.codes is not None else np.full(len(steps), 2)
        assert np.all(steps[codes == 2].max(axis=0) < (np.ptp(lon), np.ptp(lat)))


def test_axis_lines_are_the_groups_of_each_axis():
    """The marks' lines are pandas' groups by axis number (reference: groupby), points
    in the table's order within a line."""
    marks = pd.DataFrame({"axis": [3, 1, 3, 1, 7, 3], "lat": [30.0, 31.0, 32.0, 33.0, 34.0, 35.0],
                          "lon": [-100.0, -99.0, -98.0, -97.0, -96.0, -95.0]})
    expected = [group[["lon", "lat"]].to_numpy() for _, group in marks.groupby("axis")]
    lines = plots._axis_lines(marks)
    assert len(lines) == len(expected)
    for line, reference in zip(lines, expected):
        np.testing.assert_array_equal(line, reference)
    assert plots._axis_lines(marks.iloc[:0]) == []
