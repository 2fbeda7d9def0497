"""The HTML report opens in a real browser (headless Chromium, from a local file):
the screenshot is not blank, the page shows the analog table and its images, and the
browser logs no console message. Run with ``python -m pytest -m browser`` (.ci/run
installs Debian's chromium); skipped with the reason when no chromium is found.

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
import pytest

from analogs.presentation.report import find_html
from analogs.workflows.files import write_text
from analogs.workflows.find import report_figures

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
    """Tables (as lists of rows of cell text) and <img> sources of a DOM."""

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
        elif tag == "img":
            self.images.append(attrs.get("src", ""))
            self.alts.append(attrs.get("alt", ""))
        for key in ("src", "href"):
            if key in attrs and tag != "img":
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
    figures = report_figures(demo_store, result)
    page = tmp_path_factory.mktemp("report") / "index.html"
    write_text(page, find_html(result, demo_store.manifest, figures=figures))
    return page, result, len(figures)


@needs_chromium
def test_report_renders_with_table_images_and_no_console_message(report, tmp_path):
    page, result, n_figures = report
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
    assert len(content.images) == n_figures >= 1
    assert all(src.startswith("data:image/png;base64,") for src in content.images)
    # Alt text describes each image's content (not just its caption): the grid names
    # every analog day; the maps say where in degrees.
    assert all(len(alt) > 80 for alt in content.alts), content.alts
    assert any(all(date in alt for date in result.analogs["date"]) for alt in content.alts)
    assert any("°N" in alt and "°W" in alt for alt in content.alts)
    assert not [link for link in content.links if link.startswith(("http:", "https:"))]


@needs_chromium
def test_report_images_decode_in_the_browser(report, tmp_path):
    """An instrumented copy logs each image's decoded width: every figure decodes."""
    page, _, n_figures = report
    probe = ("<script>window.addEventListener('load', () => { for (const i of document.images)"
             " console.log('decoded ' + i.naturalWidth + 'x' + i.naturalHeight); });</script>")
    copy = tmp_path / "probe.html"
    copy.write_text(page.read_text().replace("</body>", probe + "</body>"))
    done = run_chromium(copy, tmp_path / "profile-probe", "--dump-dom")
    sizes = [line.split('"decoded ')[1].split('"')[0] for line in console_lines(done.stderr)
             if '"decoded ' in line]
    assert len(sizes) == n_figures
    assert all(int(size.split("x")[0]) > 100 for size in sizes)


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
