"""The briefing page in a real browser (headless Chromium driven by selenium through
Debian's chromedriver): the answer-first summary is on screen without scrolling, every
slide decodes, dates never wrap, no console message, and the screenshot has content.
Run with ``python -m pytest -m browser``; skipped with the reason when selenium or the
driver is missing.

A control page (an empty page, a planted console error) shows the checks can fail.
"""

import io
import os
import shutil

import matplotlib.image
import numpy as np
import pytest

from analogs import CAUTION
from analogs.workflows.briefing import build_briefing

pytestmark = pytest.mark.browser

WINDOW = (1280, 1000)
#: Least variance of a screenshot's pixel values (0-255) for a page with content; an
#: empty page has 0 (control below).
MIN_PIXEL_VARIANCE = 100.0


def _driver_path() -> str | None:
    for candidate in ("/usr/bin/chromedriver", shutil.which("chromedriver")):
        if candidate and os.access(candidate, os.X_OK):
            return candidate
    return None


DRIVER = _driver_path()
try:
    import selenium  # noqa: F401
    HAVE_SELENIUM = True
except ImportError:
    HAVE_SELENIUM = False
needs_browser = pytest.mark.skipif(
    DRIVER is None or not HAVE_SELENIUM,
    reason="needs selenium and chromedriver (/usr/bin/chromedriver or on PATH; "
           "apt-get install chromium-driver)")


@pytest.fixture(scope="module")
def browser():
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    options = webdriver.ChromeOptions()
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync",
                 f"--window-size={WINDOW[0]},{WINDOW[1]}"):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(DRIVER), options=options)
    yield driver
    driver.quit()


@pytest.fixture(scope="module")
def page(demo_store, tmp_path_factory):
    out = tmp_path_factory.mktemp("briefing-browser") / "brief"
    written = build_briefing(demo_store, out, months="5-9", progress=False)
    return written["index.html"], sum(1 for name in written if name.startswith("slides/"))


#: Script: the number of laid-out lines of the text of each element matching a selector.
LINES_OF = """return Array.from(document.querySelectorAll(arguments[0])).map(cell => {
  const range = document.createRange(); range.selectNodeContents(cell);
  return new Set(Array.from(range.getClientRects()).map(r => Math.round(r.top))).size; });"""


def _screenshot(driver) -> np.ndarray:
    return matplotlib.image.imread(io.BytesIO(driver.get_screenshot_as_png()), format="png")


@needs_browser
def test_briefing_answers_first_on_screen(browser, page, tmp_path):
    from selenium.webdriver.common.by import By
    path, n_slides = page
    browser.get(path.resolve().as_uri())
    shot = _screenshot(browser)
    (tmp_path / "briefing.png").write_bytes(browser.get_screenshot_as_png())
    assert shot[..., :3].var() * 255.0 ** 2 > MIN_PIXEL_VARIANCE
    # The caution and the answer are within the first screen, before any figure.
    caution = browser.find_element(By.CSS_SELECTOR, "p.caution")
    answer = browser.find_element(By.ID, "in-short")
    assert CAUTION in caution.text
    bottom = answer.location["y"] + answer.size["height"]
    assert bottom <= WINDOW[1], "the summary does not fit the first screen"
    first_image = browser.find_element(By.TAG_NAME, "img")
    assert first_image.location["y"] > bottom
    items = answer.find_elements(By.TAG_NAME, "li")
    assert len(items) >= 4 and "tagged days" in items[0].text
    # Every slide decoded at its full width.
    widths = browser.execute_script(
        "return Array.from(document.images).map(i => i.complete ? i.naturalWidth : 0)")
    assert len(widths) == n_slides and min(widths) > 400
    # Dates never wrap, even in a narrow window: each date's text lays out on one line.
    dates = browser.find_elements(By.CSS_SELECTOR, "td.d")
    assert len(dates) >= 10
    browser.set_window_size(600, WINDOW[1])
    lines = browser.execute_script(LINES_OF, "td.d")
    styles = {cell.value_of_css_property("white-space") for cell in dates}
    browser.set_window_size(*WINDOW)
    assert styles == {"nowrap"} and set(lines) == {1}, lines
    # Settings as a table, months by name, no console message.
    headers = [th.text for th in browser.find_elements(By.TAG_NAME, "th")]
    assert "setting" in headers and "month" in headers
    month_cells = {td.text for td in browser.find_elements(By.CSS_SELECTOR, "td.l")}
    assert {"May", "Jun", "Jul", "Aug", "Sep"} <= month_cells
    assert browser.find_elements(By.TAG_NAME, "pre") == []
    assert [entry for entry in browser.get_log("browser")] == []


@needs_browser
def test_controls_show_the_checks_can_fail(browser, tmp_path):
    empty = tmp_path / "empty.html"
    empty.write_text("<!DOCTYPE html><html><body></body></html>")
    browser.get(empty.as_uri())
    assert _screenshot(browser)[..., :3].var() * 255.0 ** 2 < MIN_PIXEL_VARIANCE
    wrapping = tmp_path / "wrapping.html"
    wrapping.write_text("<!DOCTYPE html><html><body><table><tr><td class='d' "
                        "style='width:2em;max-width:2em'>2001-06-19 to 2001-06-20</td>"
                        "</tr></table></body></html>")
    browser.get(wrapping.as_uri())
    assert browser.execute_script(LINES_OF, "td.d")[0] > 1
    broken = tmp_path / "broken.html"
    broken.write_text("<!DOCTYPE html><html><body><p>x</p><script>console.error('planted');"
                      "</script></body></html>")
    browser.get(broken.as_uri())
    assert any("planted" in entry["message"] for entry in browser.get_log("browser"))
