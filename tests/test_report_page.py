"""The find report's page without a browser (the clicking is in test_report_browser.py):
each analog's map cut from the grid is that map (its frame on the tile's edges), each
day's report list is the events table's (filtered here with pandas), and the page is
self-contained, answer first, with alt text on every image and a link from every table
row to its day. An ensemble target's page renders the same way.
"""

import io
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from PIL import Image

import reanalysis_demo
from analogs import CAUTION
from analogs.presentation import figures as plots
from analogs.presentation.browse import panel_tiles
from analogs.presentation.report import find_html
from analogs.stages.sources import open_archive
from analogs.workflows.demo import write_forecast_like_field
from analogs.workflows.find import day_fields, report_figures
from analogs.workflows.page import analog_days, report_page


@pytest.fixture(scope="module")
def query(demo_store):
    tags = demo_store.tags
    summer = tags[tags.index.month.isin([6, 7, 8])]
    return demo_store.find(date=str(summer.index[len(summer) // 2].date()), top=12)


def _dark(pixels, threshold=160):
    """The frame (0.2 grey, 0.7 pt wide) antialiased at 72 dpi reads about 110 of 255."""
    return pixels[..., :3].mean(axis=-1) < threshold


def test_each_tile_is_one_map_of_the_grid(demo_store, query):
    """Cut from the grid's PNG, every tile holds one map: the map's frame (drawn 0.2 grey
    by analog_panel) runs along the tile's four edges, within the cutting margin."""
    analogs = query.analogs.head(7)
    fields = day_fields(demo_store, analogs["row"].to_numpy())
    fields = fields.assign_coords(analog=analogs["rank"].to_numpy())
    figure = plots.analog_panel(fields, analogs, None, region=demo_store.region)
    png = plots.figure_png(figure)
    lat, lon = demo_store.grid
    tiles = panel_tiles(figure, png, lat, lon)
    assert len(tiles) == len(analogs)
    sizes = set()
    for tile in tiles:
        pixels = np.asarray(Image.open(io.BytesIO(tile)).convert("RGB"), dtype=float)
        dark = _dark(pixels)
        height, width = dark.shape
        sizes.add((width, height))
        edge = 4  # the margin plus the frame's width, in pixels
        assert dark[:edge].any(axis=0).mean() > 0.8
        assert dark[-edge:].any(axis=0).mean() > 0.8
        assert dark[:, :edge].any(axis=1).mean() > 0.8
        assert dark[:, -edge:].any(axis=1).mean() > 0.8
        # Inside the frame: a light map with contours, not another panel's frame.
        inner = dark[edge:-edge, edge:-edge]
        assert 0.005 < inner.mean() < 0.2
    # The maps share one size (to a pixel of rounding); their shape is the grid's
    # (width / height close to the span in longitude over the span in latitude times
    # 1/cos of the mean latitude, the aspect analog_panel draws with).
    widths, heights = zip(*sizes)
    assert max(widths) - min(widths) <= 1 and max(heights) - min(heights) <= 1
    expected = np.ptp(lon) / np.ptp(lat) * np.cos(np.radians(np.mean(lat)))
    assert widths[0] / heights[0] == pytest.approx(expected, rel=0.08)


def test_each_days_reports_are_the_events_tables(demo_store, query):
    """The report list of each analog day: the events table's reports of that convective
    day on the store grid (pandas filter here), sorted by time; 'in region' is the
    region box test done with plain inequalities (the demo's CENTRAL_REGION)."""
    days = analog_days(demo_store, query)
    lat, lon = demo_store.grid
    south, north, west, east = reanalysis_demo.CENTRAL_REGION
    events = demo_store.events
    assert sorted(days) == list(query.analogs["rank"])
    for analog in query.analogs.itertuples(index=False):
        expected = events[(events["day"] == pd.Timestamp(analog.date))
                          & events["lat"].between(lat.min(), lat.max())
                          & events["lon"].between(lon.min(), lon.max())].sort_values("time")
        listed = days[analog.rank]["reports"]
        assert [r["kind"] for r in listed] == list(expected["kind"].astype(str))
        assert [float(r["lat"]) for r in listed] == pytest.approx(expected["lat"], abs=0.005)
        inside = (expected["lat"].between(south, north)
                  & expected["lon"].between(west, east)).tolist()
        assert [r["in_region"] for r in listed] == inside
        # The table's count (events in the region) is the list's count in the region.
        assert sum(inside) == analog.events_total
        assert days[analog.rank]["tile"] is None  # no tiles handed in


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.order, self.images, self.ids, self.links, self.scripts = [], [], set(), [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.add(attrs["id"])
            self.order.append(attrs["id"])
        if "class" in attrs and "caution" in attrs["class"].split():
            self.order.append("caution")
        if tag == "img":
            self.images.append(attrs)
        if "href" in attrs:
            self.links.append(attrs["href"])
        if tag == "script":
            self.scripts.append(attrs)


def test_page_is_self_contained_and_answer_first(demo_store, query):
    page_text = report_page(demo_store, query)
    page = _Page()
    page.feed(page_text)
    # Caution, then the answer, then the analogs.
    assert page.order.index("caution") < page.order.index("answer") < page.order.index("analogs")
    assert CAUTION in page_text.replace("&#x27;", "'")
    # Nothing fetched: every image a data URI, no script file, no link off the page.
    assert page.images and all(i["src"].startswith("data:image/png;base64,") for i in page.images)
    assert all(len(i.get("alt", "")) > 40 for i in page.images)
    assert page.scripts == [{}]
    assert all(link.startswith("#") for link in page.links)
    # Every table row links to its day, and every day is on the page.
    for rank in query.analogs["rank"]:
        assert f"#analog-{rank}" in page.links and f"analog-{rank}" in page.ids
    # One map per analog day, plus the figures.
    figures = report_figures(demo_store, query)
    assert len(page.images) == len(figures) + len(query.analogs)
    outcomes = query.outcomes
    assert f">{100 * outcomes.p_any_event:.0f}%<" in page_text
    assert f">{100 * outcomes.climatology_p_any_event:.0f}%<" in page_text


def test_an_ensemble_page_renders_every_member_and_the_pooled_days(demo_store, demo_files,
                                                                   tmp_path):
    """An ensemble target (three members along ``number``): its page carries the members'
    table, the regime share of the members and the pooled analog days to browse."""
    archive = open_archive(demo_files, progress=False)
    base = xr.open_dataset(write_forecast_like_field(archive, demo_store.times[560],
                                                     tmp_path / "base.nc")).load()
    rng = np.random.default_rng(3)
    members = xr.concat([base + 0 * base for _ in range(3)], dim="number")
    members["z"] = members["z"] + rng.normal(0.0, 200.0, members["z"].shape)
    members = members.assign_coords(number=np.arange(3))
    members.to_netcdf(tmp_path / "ensemble.nc")
    result = demo_store.find(field=tmp_path / "ensemble.nc", top=5)
    data = result.to_dict()
    assert "members" in data
    page_text = find_html(result, demo_store.manifest)
    page = _Page()
    page.feed(page_text)
    assert "<h2>Members</h2>" in page_text
    assert f"of the {len(data['members'])} members" in page_text
    for analog in data["analogs"]:
        assert f"analog-{analog['rank']}" in page.ids
