"""The find report's page without a browser (the clicking is in test_report_browser.py):
each analog's map in the browsing panel is its map in the grid shown again (same size,
latitude-true shape), each day's report list is the events table's (filtered here with
pandas), the page is self-contained, answer first, with alt text on every map and a link
from every table row to its day, and making it never imports matplotlib. An ensemble
target's page renders the same way.
"""

import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import reanalysis_demo
from analogs import CAUTION
from analogs.presentation.report import find_html
from analogs.stages.sources import open_archive
from analogs.workflows.demo import write_forecast_like_field
from analogs.workflows.find import report_figures
from analogs.workflows.page import analog_days, report_page


@pytest.fixture(scope="module")
def query(demo_store):
    tags = demo_store.tags
    summer = tags[tags.index.month.isin([6, 7, 8])]
    return demo_store.find(date=str(summer.index[len(summer) // 2].date()), top=12)


def test_each_days_map_is_its_map_in_the_grid(demo_store, query):
    """The browsing panel shows each analog day's map of the grid again (an SVG <use> of
    the grid's <svg id="analog-map-RANK">, the same size and shape), with alt text
    naming the day; none is drawn twice."""
    page = _Page()
    page.feed(report_page(demo_store, query))
    maps = {attrs["id"]: attrs for tag, attrs in page.svgs if attrs.get("id", "").startswith(
        "analog-map-")}
    tiles = [attrs for tag, attrs in page.svgs if attrs.get("class") == "tile"]
    assert len(maps) == len(tiles) == len(query.analogs)
    for analog, tile, use in zip(query.analogs.itertuples(), tiles, page.uses):
        assert use == f"#analog-map-{analog.rank}"
        the_map = maps[f"analog-map-{analog.rank}"]
        assert tile["viewbox"] == the_map["viewbox"]
        assert analog.date in tile["aria-label"] and tile["role"] == "img"
    # Their shape is the grid's: width / height is the span in longitude over the span
    # in latitude times cos of the mean latitude (a latitude-true aspect).
    lat, lon = demo_store.grid
    _, _, width, height = map(float, tiles[0]["viewbox"].split())
    assert width / height == pytest.approx(
        np.ptp(lon) / np.ptp(lat) * np.cos(np.radians(np.mean(lat))), rel=1e-3)


def test_a_report_imports_no_matplotlib(demo_store, tmp_path):
    """`find --report` draws its maps as SVG: matplotlib is never imported (nor pyplot)."""
    code = ("import sys; from analogs.cli import main; "
            f"main(['find', '--store', {str(demo_store.path)!r}, '--date', "
            f"{str(demo_store.times[400].date())!r}, '--report', {str(tmp_path / 'r')!r}]); "
            "print('MODULES', sorted(m for m in sys.modules if m.split('.')[0] == 'matplotlib'))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip().splitlines()[-1] == "MODULES []"
    assert "<svg" in (tmp_path / "r" / "index.html").read_text()


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
        self.svgs, self.uses = [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.add(attrs["id"])
            self.order.append(attrs["id"])
        if "class" in attrs and "caution" in attrs["class"].split():
            self.order.append("caution")
        if tag in ("img", "image"):
            self.images.append(attrs)
        if tag == "svg":
            self.svgs.append((tag, attrs))
        if tag == "use" and attrs["href"].startswith("#analog-map-"):
            self.uses.append(attrs["href"])
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
    # Nothing fetched: every image (the maps' shaded fields) a data URI, no script file,
    # no link off the page.
    assert page.images and all(i["href"].startswith("data:image/png;base64,")
                               for i in page.images)
    assert page.scripts == [{}]
    assert all(link.startswith(("#", "data:image/png;base64,")) for link in page.links)
    # Every table row links to its day, and every day is on the page.
    for rank in query.analogs["rank"]:
        assert f"#analog-{rank}" in page.links and f"analog-{rank}" in page.ids
    # The figures, each an SVG image with its alt text, and one map per analog day.
    figures = report_figures(demo_store, query)
    drawn = [attrs for _, attrs in page.svgs if attrs.get("class") == "map"]
    assert len(drawn) == len(figures) == 4
    assert [attrs["aria-label"] for attrs in drawn] == [alt for _, _, alt in figures]
    assert all(len(alt) > 40 for _, _, alt in figures)
    assert len([a for _, a in page.svgs if a.get("class") == "tile"]) == len(query.analogs)
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
