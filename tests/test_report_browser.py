"""The demo report in a real browser: headless Chromium, the system's own (its command
line; no browser download).  Skipped, with the reason, where none is installed.

Screen: a copy of the report with a checking script appended (the report itself has
no script) is loaded with ``--dump-dom``; the script writes what it found into the
page, which the browser prints.  Print: the report printed to PDF by pkcalc's own
``--pdf`` route, read back with pypdf (a general-purpose PDF library).
"""

from __future__ import annotations

import json
import re
import subprocess
import tempfile
from pathlib import Path

import pytest

from pkcalc.report.pdf import FLAGS, find_browser

BROWSER = find_browser()
pytestmark = pytest.mark.skipif(BROWSER is None, reason="no Chromium-based browser installed "
                                "(Debian: apt install chromium); the report needs none")

#: The demo report prints to at most this many A4 pages (39 when measured with Debian's
#: Chromium 156; was 40+ before the print styles, with the inputs and data expanded).
DEMO_PAGES = 42

CHECK = """
<script>
(function () {
  var out = {};
  var imgs = Array.from(document.images);
  out.images = imgs.length;
  out.broken = imgs.filter(function (i) { return !i.complete || i.naturalWidth === 0; })
                   .map(function (i) { return i.alt; });
  var width = document.documentElement.clientWidth;
  out.width = width;
  out.wider = Array.from(document.body.querySelectorAll("*")).filter(function (e) {
      var r = e.getBoundingClientRect();
      return r.width > 0 && (r.right > width + 1 || r.left < -1);
    }).map(function (e) { return e.tagName + "." + e.className; }).slice(0, 10);
  var caution = document.querySelector(".caution").getBoundingClientRect();
  out.caution_top = caution.top;
  out.caution_bottom = caution.bottom;
  out.viewport = window.innerHeight;
  out.links = Array.from(document.querySelectorAll('a[href^="#"]')).map(function (a) {
      var t = document.getElementById(a.getAttribute("href").slice(1));
      return t === null ? a.getAttribute("href") : null; }).filter(Boolean);
  out.n_links = document.querySelectorAll('a[href^="#"]').length;
  var pre = document.createElement("pre");
  pre.id = "pkcalc-check";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
"""


@pytest.fixture(scope="module")
def report(demo_run):
    assert demo_run.code == 0
    return demo_run.folder / "report.html"


def test_the_report_on_a_screen(report, tmp_path):
    page = tmp_path / "checked.html"
    page.write_text(report.read_text(encoding="utf-8").replace("</body>", CHECK + "</body>"),
                    encoding="utf-8")
    with tempfile.TemporaryDirectory() as profile:
        done = subprocess.run([BROWSER, *FLAGS, f"--user-data-dir={profile}",
                               "--window-size=1280,900", "--virtual-time-budget=10000",
                               "--enable-logging=stderr", "--v=0", "--dump-dom",
                               page.as_uri()], capture_output=True, text=True, timeout=180)
    found = re.search(r'<pre id="pkcalc-check">(.*?)</pre>', done.stdout, re.S)
    assert found, done.stderr[-2000:]
    out = json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert out["images"] >= 20 and out["broken"] == []
    assert out["wider"] == [], out["wider"]               # nothing wider than the page
    assert out["caution_top"] >= 0 and out["caution_bottom"] <= out["viewport"]
    assert out["links"] == [] and out["n_links"] >= 20     # every contents link lands
    console = [line for line in done.stderr.splitlines() if "CONSOLE" in line]
    assert console == [], console[:5]                     # no console message at all


def test_the_report_printed(report, tmp_path):
    from pypdf import PdfReader

    from pkcalc.report.pdf import print_pdf

    pdf = print_pdf(report, tmp_path / "report.pdf")
    pages = PdfReader(str(pdf)).pages
    assert 5 <= len(pages) <= DEMO_PAGES, len(pages)
    first = pages[0].extract_text()
    # the caution block comes before anything of the report (the footer's margin box may
    # be extracted first)
    assert "CAUTION" in first and first.index("CAUTION") < first.index("Overview")
    assert "They are not dosing orders" in first
    footer = "Model estimates for research and review only"
    assert all(footer in p.extract_text() for p in pages)   # on every page
    assert Path(pdf).read_bytes().startswith(b"%PDF")
