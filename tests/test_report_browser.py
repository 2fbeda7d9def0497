"""The HTML report opens in a real browser (headless Chromium, from a local file):
the screenshot is not blank, the page shows the analog table and its images, and the
browser logs no console message; driven by selenium through Debian's chromedriver, the
page sorts, filters and shows the analog day clicked (or chosen from the keyboard), and
reads as a plain page without its script. Run with ``python -m pytest -m browser``
(.ci/run installs Debian's chromium and chromium-driver); skipped with the reason when
no chromium (or no chromedriver / selenium) is found.

Control pages (a planted console error, an empty page) show that each check can fail.
"""

import io
import os
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pandas as pd
import pytest

from analogs.presentation.report import find_html
from analogs.workflows.files import write_text
from analogs.workflows.find import report_figures
from analogs.workflows.page import analog_days

pytestmark = pytest.mark.browser

WINDOW = (1200, 2000)
#: Least variance of the screenshot's pixel values (0-255) of a page with content; an
#: empty white page has 0 (checked by a control test below).
MIN_PIXEL_VARIANCE = 100.0


def _chromium() -> str | None:
    for candidate in ("/usr/bin/chromium", shutil.which("chromium"),
                      shutil.which("chromium-browser")):
        if candidate and os.access(candidate, os.X_OK):
            return candidate
    return None


CHROMIUM = _chromium()
needs_chromium = pytest.mark.skipif(
    CHROMIUM is None,
    reason="no chromium at /usr/bin/chromium or on PATH (apt-get install chromium; .ci/run does)")


def run_chromium(page: Path, profile: Path, *extra) -> subprocess.CompletedProcess:
    """Headless Chromium on a local file, offline, logging console messages to stderr."""
    command = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
               "--enable-logging=stderr", "--v=0", f"--window-size={WINDOW[0]},{WINDOW[1]}",
               *extra, page.resolve().as_uri()]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=True)


def console_lines(stderr: str) -> list[str]:
    """Chromium writes every page console message (log, warning, error, uncaught
    exception, failed resource load) to stderr as ``...:CONSOLE...] "text", source: ...``."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def screenshot(page: Path, tmp_path: Path, name: str):
    target = tmp_path / f"{name}.png"
    done = run_chromium(page, tmp_path / f"profile-{name}", f"--screenshot={target}")
    return matplotlib.image.imread(io.BytesIO(target.read_bytes()), format="png"), done


class PageContent(HTMLParser):
    """Tables (as lists of rows of cell text), the maps' alt text (``aria-label`` of each
    ``<svg role="img">`` but the small bars) and the sources of their images."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self.links, self.alts = [], [], [], []
        self._cell = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self.tables.append([])
        elif tag == "tr" and self.tables:
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "svg" and attrs.get("role") == "img" and attrs.get("class") != "bar":
            self.alts.append(attrs.get("aria-label", ""))
        elif tag in ("img", "image"):
            self.images.append(attrs.get("src") or attrs.get("href", ""))
        for key in ("src", "href"):
            if key in attrs and tag not in ("img", "image"):
                self.links.append(attrs[key])

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self.tables:
            self.tables[-1][-1].append("".join(self._cell).strip())
            self._cell = None


@pytest.fixture(scope="module")
def report(demo_store, tmp_path_factory):
    tags = demo_store.tags
    summer = tags[(tags.index.year == tags.index.year.max()) & tags.index.month.isin([6, 7, 8])]
    result = demo_store.find(date=str(summer["confidence"].idxmax().date()), top=15)
    views = []
    figures = report_figures(demo_store, result, views=views)
    page = tmp_path_factory.mktemp("report") / "index.html"
    days = analog_days(demo_store, result, views)
    write_text(page, find_html(result, demo_store.manifest, figures=figures, days=days))
    # Every map: the figures and one map per analog day.
    return page, result, len(figures) + len(views), days


@needs_chromium
def test_report_renders_with_table_images_and_no_console_message(report, tmp_path):
    page, result, n_figures, _ = report
    image, shot = screenshot(page, tmp_path, "report")
    assert image.shape[:2] == (WINDOW[1], WINDOW[0])
    assert image[..., :3].var() * 255.0 ** 2 > MIN_PIXEL_VARIANCE

    dom = run_chromium(page, tmp_path / "profile-dom", "--dump-dom")
    assert console_lines(shot.stderr) == [] and console_lines(dom.stderr) == [], (
        console_lines(shot.stderr) + console_lines(dom.stderr))
    content = PageContent()
    content.feed(dom.stdout)
    analog_table = [t for t in content.tables if t and t[0][:4] == ["rank", "date", "distance", "regime"]]
    assert len(analog_table) == 1
    rows = analog_table[0][1:]
    assert [row[1] for row in rows] == list(result.analogs["date"])
    assert len(content.alts) == n_figures >= 1
    assert content.images and all(src.startswith("data:image/png;base64,")
                                  for src in content.images)
    # Alt text describes each image's content (not just its caption): the grid names
    # every analog day; the maps say where in degrees.
    assert all(len(alt) > 80 for alt in content.alts), content.alts
    assert any(all(date in alt for date in result.analogs["date"]) for alt in content.alts)
    assert any("°N" in alt and "°W" in alt for alt in content.alts)
    assert not [link for link in content.links if link.startswith(("http:", "https:"))]


@needs_chromium
def test_report_images_decode_in_the_browser(report, demo_store, tmp_path):
    """An instrumented copy decodes each image of the maps (the shaded fields and the
    colour bars) and logs its size: the fields are the store's grid (one pixel per grid
    point), the colour bars one pixel wide."""
    page, _, _, _ = report
    probe = ("<script>window.addEventListener('load', () => { for (const e of "
             "document.querySelectorAll('svg image')) { const i = new Image(); "
             "i.onload = () => console.log('decoded ' + i.naturalWidth + 'x' + i.naturalHeight);"
             " i.src = e.getAttribute('href'); } });</script>")
    copy = tmp_path / "probe.html"
    copy.write_text(page.read_text().replace("</body>", probe + "</body>"))
    done = run_chromium(copy, tmp_path / "profile-probe", "--dump-dom")
    sizes = [line.split('"decoded ')[1].split('"')[0] for line in console_lines(done.stderr)
             if '"decoded ' in line]
    lat, lon = demo_store.grid
    n_images = page.read_text().count("<image ")
    assert len(sizes) == n_images > 4
    assert f"{lon.size}x{lat.size}" in sizes
    assert set(sizes) <= {f"{lon.size}x{lat.size}", "1x256", "1x10"}


@needs_chromium
def test_controls_show_the_checks_can_fail(tmp_path):
    broken = tmp_path / "broken.html"
    broken.write_text("<!DOCTYPE html><html><body><p>x</p><script>console.error('planted');"
                      "notDefined();</script></body></html>")
    done = run_chromium(broken, tmp_path / "profile-broken", "--dump-dom")
    lines = console_lines(done.stderr)
    assert any("planted" in line for line in lines)
    assert any("notDefined" in line for line in lines)

    empty = tmp_path / "empty.html"
    empty.write_text("<!DOCTYPE html><html><body></body></html>")
    image, _ = screenshot(empty, tmp_path, "empty")
    assert image[..., :3].var() * 255.0 ** 2 < MIN_PIXEL_VARIANCE
    assert np.isfinite(image).all()


# ---------------------------------------------------------------- clicking the page

def _driver_or_reason():
    """A headless Chromium driven through Debian's chromedriver, or why there is none."""
    if CHROMIUM is None:
        return None, "no chromium at /usr/bin/chromium or on PATH (apt-get install chromium)"
    driver_path = next((c for c in ("/usr/bin/chromedriver", shutil.which("chromedriver"))
                        if c and os.access(c, os.X_OK)), None)
    if driver_path is None:
        return None, "no chromedriver (apt-get install chromium-driver; .ci/run does)"
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        return None, "selenium is not installed (pip install -e '.[test]')"
    return (webdriver, Service, driver_path), None


def _start(tmp_path, *, javascript=True):
    found, reason = _driver_or_reason()
    if found is None:
        pytest.skip(reason)
    webdriver, service, driver_path = found
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for argument in ("--headless=new", "--no-sandbox", "--disable-gpu",
                     "--disable-background-networking", "--disable-component-update",
                     "--no-first-run", f"--user-data-dir={tmp_path / 'selenium-profile'}",
                     f"--window-size={WINDOW[0]},1400"):
        options.add_argument(argument)
    if not javascript:
        options.add_experimental_option(
            "prefs", {"profile.managed_default_content_settings.javascript": 2})
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(service=service(driver_path), options=options)


@pytest.fixture
def browser(tmp_path):
    driver = _start(tmp_path)
    yield driver
    driver.quit()


def _rows(driver):
    from selenium.webdriver.common.by import By
    return driver.find_elements(By.CSS_SELECTOR, "#analogs tbody tr")


def _visible_ranks(driver) -> list[int]:
    return [int(row.get_attribute("data-rank")) for row in _rows(driver) if row.is_displayed()]


def _shown_days(driver) -> list[str]:
    from selenium.webdriver.common.by import By
    return [day.get_attribute("id") for day in driver.find_elements(By.CSS_SELECTOR, "article.day")
            if day.is_displayed()]


def _png_pixels(png: bytes) -> np.ndarray:
    """RGB values 0-255 of a screenshot."""
    return matplotlib.image.imread(io.BytesIO(png), format="png")[..., :3] * 255.0


def _severe_logs(driver) -> list[dict]:
    return [entry for entry in driver.get_log("browser") if entry["level"] == "SEVERE"]


def test_page_sorts_filters_and_shows_the_clicked_day(report, demo_store, browser, tmp_path):
    """Click a sort header, a regime filter, a reports filter and an analog row; each
    changes the DOM as the analogs table (pandas, the reference) says it should, and the
    clicked day's map and report list appear, seen in the screenshots."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select
    page, result, _, days = report
    analogs = result.analogs
    browser.get(page.resolve().as_uri())
    assert _severe_logs(browser) == []
    # At first: rank order, the closest day shown beside the table, the others hidden.
    assert _visible_ranks(browser) == list(analogs["rank"])
    assert _shown_days(browser) == ["analog-1"]
    assert browser.find_element(By.ID, "shown").text == \
        f"showing {len(analogs)} of {len(analogs)} analog days"

    # Sort by distance, twice: descending the second time (reference: pandas sort).
    header = browser.find_element(By.CSS_SELECTOR, 'th[data-key="distance"]')
    header.find_element(By.TAG_NAME, "button").click()
    assert header.get_attribute("aria-sort") == "ascending"
    header.find_element(By.TAG_NAME, "button").click()
    assert header.get_attribute("aria-sort") == "descending"
    expected = analogs.sort_values(["distance", "rank"], ascending=[False, True])["rank"]
    assert _visible_ranks(browser) == list(expected)
    # By events in the region, ascending (ties in rank order).
    browser.find_element(By.CSS_SELECTOR, 'th[data-key="events"] button').click()
    expected = analogs.sort_values(["events_total", "rank"])["rank"]
    assert _visible_ranks(browser) == list(expected)
    assert header.get_attribute("aria-sort") == "none"

    # Filter by the regime of fewest analog days, then back to all.
    counts = analogs["regime"].value_counts()
    regime = counts.index[-1]
    Select(browser.find_element(By.ID, "filter-regime")).select_by_value(regime)
    wanted = analogs[analogs["regime"] == regime]
    assert sorted(_visible_ranks(browser)) == sorted(wanted["rank"])
    assert browser.find_element(By.ID, "shown").text == \
        f"showing {len(wanted)} of {len(analogs)} analog days"
    # The day shown follows the filter: a day of that regime.
    assert _shown_days(browser) and int(_shown_days(browser)[0].split("-")[1]) in set(wanted["rank"])
    Select(browser.find_element(By.ID, "filter-regime")).select_by_value("")
    assert len(_visible_ranks(browser)) == len(analogs)

    # Filter by a kind of report: the days with at least one of that kind in the region.
    kinds = [c.removeprefix("events_") for c in analogs.columns
             if c.startswith("events_") and c != "events_total"]
    kind = max(kinds, key=lambda k: int((analogs[f"events_{k}"] > 0).sum()))
    Select(browser.find_element(By.ID, "filter-kind")).select_by_value(f"kind-{kind}")
    assert sorted(_visible_ranks(browser)) == sorted(analogs[analogs[f"events_{kind}"] > 0]["rank"])
    Select(browser.find_element(By.ID, "filter-kind")).select_by_value("")

    # Largest distance: only the days at most that far.
    limit = float(analogs["distance"].median())
    browser.execute_script("const box = document.getElementById('filter-distance');"
                           "box.value = arguments[0]; box.dispatchEvent(new Event('input'));",
                           f"{limit:.4f}")
    assert sorted(_visible_ranks(browser)) == sorted(analogs[analogs["distance"] <= limit]["rank"])
    browser.execute_script("const box = document.getElementById('filter-distance');"
                           "box.value = '99'; box.dispatchEvent(new Event('input'));")

    # Click the row of the analog day with the most reports on the map.
    rank = max(days, key=lambda r: len(days[r]["reports"] or []))
    row = browser.find_element(By.ID, f"row-{rank}")
    browser.execute_script("arguments[0].scrollIntoView({block: 'center'})", row)
    row.click()
    assert row.get_attribute("aria-selected") == "true"
    assert _shown_days(browser) == [f"analog-{rank}"]
    day = browser.find_element(By.ID, f"analog-{rank}")
    date = analogs.loc[analogs["rank"] == rank, "date"].iloc[0]
    assert date in day.find_element(By.TAG_NAME, "h3").text
    tile = day.find_element(By.CSS_SELECTOR, "svg.tile")
    assert date in tile.get_attribute("aria-label")
    assert tile.size["width"] > 200 and tile.size["height"] > 100
    # Its report list: the events table's reports of that convective day on the map
    # (reference: the events table filtered here with pandas).
    lat, lon = demo_store.grid
    events = demo_store.events
    on_day = events[(events["day"] == pd.Timestamp(date))
                    & events["lat"].between(lat.min(), lat.max())
                    & events["lon"].between(lon.min(), lon.max())]
    listed = day.find_elements(By.CSS_SELECTOR, "table.reports tbody tr")
    assert len(listed) == len(on_day) > 0
    assert sorted(r.find_elements(By.TAG_NAME, "td")[1].text for r in listed) == \
        sorted(on_day["kind"].astype(str))

    # The screenshots: the page is not blank; the map region of the clicked day has
    # contours (dark pixels) on a light ground, and differs from another day's map.
    shot = _png_pixels(browser.get_screenshot_as_png())
    (tmp_path / "page.png").write_bytes(browser.get_screenshot_as_png())
    assert shot.var() > MIN_PIXEL_VARIANCE
    map_pixels = _png_pixels(tile.screenshot_as_png)
    (tmp_path / "map.png").write_bytes(tile.screenshot_as_png)
    grey = map_pixels.mean(axis=-1)
    assert map_pixels.shape[0] > 100 and map_pixels.shape[1] > 200
    assert np.median(grey) > 200            # a light ground
    assert 0.005 < np.mean(grey < 120) < 0.3  # contours, frame and markers, not a dark block
    other = next(r for r in days if r != rank)
    browser.find_element(By.ID, f"row-{other}").click()
    other_pixels = _png_pixels(browser.find_element(
        By.CSS_SELECTOR, f"#analog-{other} svg.tile").screenshot_as_png)
    assert other_pixels.shape == map_pixels.shape
    assert np.abs(other_pixels - map_pixels).mean() > 1.0
    assert _severe_logs(browser) == []


def test_page_is_keyboard_operable(report, browser):
    """Tab reaches the sort buttons; Enter on a header sorts; Enter on a row shows its day."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    page, result, _, _ = report
    browser.get(page.resolve().as_uri())
    button = browser.find_element(By.CSS_SELECTOR, 'th[data-key="date"] button')
    button.send_keys(Keys.ENTER)
    assert _visible_ranks(browser) == list(result.analogs.sort_values("date")["rank"])
    last = result.analogs.sort_values("date")["rank"].iloc[-1]
    row = browser.find_element(By.ID, f"row-{last}")
    assert row.get_attribute("tabindex") == "0"
    row.send_keys(Keys.ENTER)
    assert _shown_days(browser) == [f"analog-{last}"]
    # Arrow down moves the focus to the next visible row.
    first = browser.find_element(By.ID, f"row-{_visible_ranks(browser)[0]}")
    first.send_keys(Keys.ARROW_DOWN)
    focused = browser.switch_to.active_element
    assert focused.get_attribute("id") == f"row-{_visible_ranks(browser)[1]}"


def test_page_reads_without_its_script(report, tmp_path):
    """With JavaScript off: the table in rank order, every day's map and reports one
    below the other, the (script-only) controls hidden."""
    from selenium.webdriver.common.by import By
    page, result, _, _ = report
    driver = _start(tmp_path, javascript=False)
    try:
        driver.get(page.resolve().as_uri())
        assert _visible_ranks(driver) == list(result.analogs["rank"])
        assert _shown_days(driver) == [f"analog-{r}" for r in result.analogs["rank"]]
        assert not driver.find_element(By.ID, "controls").is_displayed()
        link = driver.find_element(By.CSS_SELECTOR, "#row-2 a")
        assert link.get_attribute("href").endswith("#analog-2")
    finally:
        driver.quit()


def test_the_answer_comes_first(report, browser):
    """The caution, then the probability beside the base rate and the regime, above the
    analog table (the page's order, in pixels)."""
    from selenium.webdriver.common.by import By
    page, result, _, _ = report
    browser.get(page.resolve().as_uri())
    outcomes = result.outcomes
    y = {name: browser.find_element(By.CSS_SELECTOR, selector).location["y"]
         for name, selector in [("caution", ".caution"), ("answer", "#p-any"),
                                ("regime", "#target-regime"), ("table", "#analogs")]}
    assert y["caution"] < y["answer"] < y["regime"] < y["table"]
    assert browser.find_element(By.ID, "p-any").text == f"{100 * outcomes.p_any_event:.0f}%"
    assert browser.find_element(By.ID, "base-rate").text == \
        f"{100 * outcomes.climatology_p_any_event:.0f}%"
    assert browser.find_element(By.ID, "target-regime").text == result.target["regime"]


def test_selenium_controls_show_the_checks_can_fail(browser, tmp_path):
    """A planted script error is logged as SEVERE; a blank element's screenshot has no
    variance."""
    from selenium.webdriver.common.by import By
    broken = tmp_path / "broken.html"
    broken.write_text('<!DOCTYPE html><html><body><div id="blank" style="width:300px;'
                      'height:200px;background:#fff"></div><script>notDefined();</script>'
                      "</body></html>")
    browser.get(broken.resolve().as_uri())
    assert any("notDefined" in entry["message"] for entry in _severe_logs(browser))
    blank = _png_pixels(browser.find_element(By.ID, "blank").screenshot_as_png)
    assert blank.var() < MIN_PIXEL_VARIANCE
