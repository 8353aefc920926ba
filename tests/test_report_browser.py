"""report.html opened in a real browser (headless Chromium): every section and figure is there, nothing is
fetched from anywhere, nothing fails to render, and a screenshot of the page is not blank.

CI installs Debian's ``chromium`` (.ci/run); without it this test fails with a message rather than skipping.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from siteproof.blind.claims import Claims
from siteproof.reporting import report
from siteproof.unmask.scorecard import Scorecard
from test_report import SECTION_IDS, run_copy, small_run

pytestmark = pytest.mark.browser

TIMEOUT = 60  # seconds per Chromium call
FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--disable-quic",
]
WIDTH, HEIGHT = 1280, 4000

# Appended to a copy of the report only: reports what the page loaded and how each figure rendered.
PROBE = """
<script>
(function () {
  const figures = Array.from(document.querySelectorAll("figure")).map(function (f) {
    const svg = f.querySelector("svg");
    const box = svg ? svg.getBoundingClientRect() : {width: 0, height: 0};
    const texts = svg ? Array.from(svg.querySelectorAll("text")).filter(function (t) {
      const b = t.getBBox(); return b.width > 0 && b.height > 0; }).length : 0;
    return {id: f.id, svg: svg ? svg.id : null, width: box.width, height: box.height, texts: texts};
  });
  const out = {
    sections: Array.from(document.querySelectorAll("section.part")).map(function (s) { return s.id; }),
    figures: figures,
    resources: performance.getEntriesByType("resource").map(function (r) { return r.name; }),
    images: document.images.length,
    styleRules: Array.from(document.styleSheets).reduce(function (n, s) { return n + s.cssRules.length; }, 0),
    bodyFont: getComputedStyle(document.body).fontFamily,
    scrollHeight: document.documentElement.scrollHeight
  };
  const pre = document.createElement("pre");
  pre.id = "probe";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
"""


def _chromium() -> str:
    path = shutil.which("chromium")
    if path is None:
        pytest.fail("headless Chromium is not installed: install the Debian package `chromium` "
                    "(apt-get install chromium; .ci/run does this in CI)")
    return path


def _run_chromium(profile: Path, *args: str) -> subprocess.CompletedProcess:
    cmd = [_chromium(), *FLAGS, f"--user-data-dir={profile}", *args]
    try:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=TIMEOUT)
    except subprocess.TimeoutExpired:
        pytest.fail(f"Chromium did not finish within {TIMEOUT} s: {' '.join(cmd)}")
    assert done.returncode == 0, done.stderr[-2000:]
    return done


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    claims, card = run_copy()
    out = tmp_path_factory.mktemp("browser")
    report.write_report(out, Claims.from_dict(claims, small_run().units), Scorecard.from_dict(card))
    return out


class _Tags(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def test_browser_renders_every_section_and_figure_and_fetches_nothing(page, tmp_path):
    html_text = (page / "report.html").read_text(encoding="utf-8")
    probe_page = page / "probe.html"
    probe_page.write_text(html_text.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    dom = _run_chromium(tmp_path / "profile-probe", "--dump-dom", probe_page.as_uri()).stdout
    found = json.loads(html.unescape(re.search(r'<pre id="probe">(.*?)</pre>', dom, re.S).group(1)))

    assert found["sections"] == SECTION_IDS
    figure_files = sorted(p.stem for p in (page / "figures").glob("*.svg"))
    assert sorted(f["svg"][len("fig-"):] for f in found["figures"]) == figure_files
    for fig in found["figures"]:
        assert fig["width"] > 300 and fig["height"] > 100, fig  # laid out at a readable size
        assert fig["texts"] >= 3, fig  # axis labels and ticks rendered as text
    assert found["resources"] == []  # nothing was requested: no fonts, scripts, images or styles
    assert found["images"] == 0
    assert found["styleRules"] > 20  # the inline stylesheet was parsed
    assert found["scrollHeight"] > HEIGHT  # a long document, not an error page


def test_browser_dom_holds_every_part_without_external_references(page, tmp_path):
    dom = _run_chromium(tmp_path / "profile-dom", "--dump-dom", (page / "report.html").as_uri()).stdout
    parser = _Tags()
    parser.feed(dom)
    tags = parser.tags
    assert [a["id"] for t, a in tags if t == "section" and a.get("class") == "part"] == SECTION_IDS
    for t, a in tags:
        assert t not in ("img", "script", "link", "iframe", "object", "embed"), (t, a)
        for key in ("src", "href", "xlink:href"):
            if key in a:
                assert a[key].startswith("#"), (t, a)
    svgs = [a["id"] for t, a in tags if t == "svg"]
    assert sorted(svgs) == sorted(f"fig-{p.stem}" for p in (page / "figures").glob("*.svg"))
    assert sum(1 for t, a in tags if t == "p" and a.get("class") == "reading") == len(SECTION_IDS)


def test_browser_screenshot_is_a_drawn_page(page, tmp_path):
    from matplotlib import image

    shot = tmp_path / "report.png"
    _run_chromium(tmp_path / "profile-shot", f"--screenshot={shot}", f"--window-size={WIDTH},{HEIGHT}",
                  "--hide-scrollbars", (page / "report.html").as_uri())
    pixels = image.imread(shot)
    assert pixels.shape[:2] == (HEIGHT, WIDTH)
    gray = pixels[..., :3].mean(axis=2)
    rows_with_ink = np.mean((gray < 0.6).any(axis=1))
    assert rows_with_ink > 0.3  # text and figures all down the page, not a blank or error page
    assert len(np.unique(np.round(pixels[..., :3], 2).reshape(-1, 3), axis=0)) > 50  # colour figures drawn
