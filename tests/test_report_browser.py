"""The report as a browser renders it: figures decode and read, nothing overflows, it prints, no network.

Headless Chromium loads a harness page (test code, not part of the report)
from a local HTTP server; the harness shows report.html in a same-origin
iframe 1,280 px wide and, once it has loaded, writes what it finds (each
<img>'s natural and displayed width, the page's scroll width, whether the
findings come before the first table, the number of scripts and stylesheets)
into its own DOM, which ``--dump-dom`` prints. Every request the browser makes is recorded: those for
the local server by the server, and any other (the browser's proxy is set
to a second local server that records and refuses everything). Chromium's
own service calls (updater, sign-in, network time; :data:`BROWSER_HOSTS`)
happen whatever the page, and are not the page's. Run locally
with ``python -m pytest -q tests/test_report_browser.py`` once Chromium is
installed (Debian: ``apt-get install chromium``).
"""

from __future__ import annotations

import base64
import http.server
import io
import json
import re
import shutil
import subprocess
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from foretell.report.build import build_report

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian: apt-get install "
                                                          "chromium); the browser check of the report is skipped")

BROWSER_HOSTS = frozenset({"update.googleapis.com", "accounts.google.com", "clients2.google.com"})
"""Hosts Chromium calls on its own even on an empty page with background networking disabled (seen in a run)."""

HARNESS = """<!DOCTYPE html>
<html><head><meta charset="utf-8"><link rel="icon" href="data:,"></head>
<body><pre id="result">pending</pre>
<iframe id="page" src="report.html" width="1280" height="900" style="border: 0; display: block"></iframe>
<script>
document.getElementById("page").addEventListener("load", function () {
  var doc = this.contentDocument;
  var images = Array.prototype.map.call(doc.images, function (img) {
    return {complete: img.complete, width: img.naturalWidth, height: img.naturalHeight,
            shown: img.getBoundingClientRect().width,
            data: img.getAttribute("src").indexOf("data:image/png;base64,") === 0};
  });
  var findings = doc.getElementById("findings"), firstTable = doc.querySelector("table");
  document.getElementById("result").textContent = JSON.stringify({
    title: doc.title, images: images, scripts: doc.scripts.length,
    stylesheets: doc.querySelectorAll("link[rel=stylesheet]").length,
    resources: this.contentWindow.performance.getEntriesByType("resource").map(function (r) { return r.name; }),
    sections: Array.prototype.map.call(doc.querySelectorAll("section"), function (s) { return s.id; }),
    viewport: this.contentWindow.innerWidth, scrollWidth: doc.documentElement.scrollWidth,
    findingsFirst: !!findings && !!firstTable
      && (findings.compareDocumentPosition(firstTable) & Node.DOCUMENT_POSITION_FOLLOWING) !== 0
      && findings.getBoundingClientRect().bottom <= firstTable.getBoundingClientRect().top});
});
</script></body></html>
"""


class _Recorder(http.server.SimpleHTTPRequestHandler):
    """Serves the test folder and records every request path."""

    requests: list[str]

    def do_GET(self) -> None:  # noqa: N802 (the standard library's name)
        self.requests.append(self.path if self.path.startswith("/") else urlsplit(self.path).hostname or "")
        super().do_GET()

    def do_CONNECT(self) -> None:  # noqa: N802
        self.requests.append(self.path.rsplit(":", 1)[0])
        self.send_error(403)

    def log_message(self, *args: object) -> None:
        return


@contextmanager
def _server(folder: Path) -> Iterator[tuple[int, list[str]]]:
    """Yield (port, recorded request paths, or hosts of proxied requests) of an HTTP server on 127.0.0.1 serving ``folder``."""
    requests: list[str] = []
    handler = type("Handler", (_Recorder,), {"requests": requests})
    server = http.server.ThreadingHTTPServer(
        ("127.0.0.1", 0), lambda *a: handler(*a, directory=str(folder)))
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield server.server_address[1], requests
    finally:
        server.shutdown()
        server.server_close()


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    from test_report import make_study

    root = tmp_path_factory.mktemp("browser")
    study = make_study(root / "analysis", rt=False)
    report = build_report(study, provisional=True)
    site = root / "site"
    site.mkdir()
    (site / "report.html").write_text(report.html, encoding="utf-8")
    (site / "harness.html").write_text(HARNESS, encoding="utf-8")
    with _server(site) as (port, served), _server(root / "site") as (proxy_port, proxied):
        run = subprocess.run(
            [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
             "--disable-default-apps", "--no-default-browser-check", f"--user-data-dir={root / 'profile'}",
             f"--proxy-server=http://127.0.0.1:{proxy_port}", "--virtual-time-budget=10000",
             "--dump-dom", f"http://127.0.0.1:{port}/harness.html"],
            capture_output=True, text=True, timeout=120)
    match = re.search(r'<pre id="result">(.*?)</pre>', run.stdout, re.S)
    assert match, f"Chromium printed no harness result (exit {run.returncode}): {run.stderr[-2000:]}"
    text = match.group(1).replace("&quot;", '"').replace("&amp;", "&").replace("&lt;", "<").replace("&gt;", ">")
    assert text != "pending", "the report did not finish loading in the browser"
    return json.loads(text), report.html, list(served), list(proxied)


def test_every_figure_decodes_in_the_browser(rendered):
    result, page, _, _ = rendered
    assert result["title"] == "foretell analysis report"
    assert len(result["images"]) == page.count("<img ") > 0
    for image in result["images"]:
        assert image["data"] and image["complete"] and image["width"] > 0 and image["height"] > 0, image


def test_the_page_requests_nothing_and_runs_nothing(rendered):
    result, _, served, proxied = rendered
    assert sorted(served) == ["/harness.html", "/report.html"]
    assert set(proxied) <= BROWSER_HOSTS, proxied
    assert result["resources"] == []
    assert result["scripts"] == 0 and result["stylesheets"] == 0
    assert {"data", "models", "trees", "curves", "design", "methods"} <= set(result["sections"])


def test_nothing_overflows_a_1280_pixel_window_and_the_findings_come_first(rendered):
    result, _, _, _ = rendered
    assert result["viewport"] == 1280
    assert result["scrollWidth"] <= result["viewport"]
    assert result["findingsFirst"]


def test_figure_text_is_at_least_nine_pixels_as_displayed(rendered):
    # pixels of a glyph = points x dpi / 72 (a point is 1/72 inch, common practice), scaled by shown / natural width
    from PIL import Image

    from foretell.plots.common import SMALLEST_FONT

    result, page, _, _ = rendered
    sources = re.findall(r'<img src="data:image/png;base64,([^"]+)"', page)
    assert len(sources) == len(result["images"])
    for data, image in zip(sources, result["images"]):
        png = Image.open(io.BytesIO(base64.b64decode(data)))
        points, dpi = float(png.text[SMALLEST_FONT]), float(png.info["dpi"][0])
        assert image["shown"] > 0 and image["width"] == png.width
        shown = points * dpi / 72 * image["shown"] / image["width"]
        assert shown >= 9, (png.width, points, image["shown"], shown)


def test_the_page_prints_to_pdf(rendered, tmp_path):
    _, page, _, _ = rendered
    (tmp_path / "report.html").write_text(page, encoding="utf-8")
    pdf = tmp_path / "report.pdf"
    run = subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--no-first-run", "--disable-extensions", f"--user-data-dir={tmp_path / 'profile'}",
         "--no-pdf-header-footer", f"--print-to-pdf={pdf}", (tmp_path / "report.html").as_uri()],
        capture_output=True, text=True, timeout=120)
    assert pdf.is_file(), f"Chromium wrote no PDF (exit {run.returncode}): {run.stderr[-2000:]}"
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF-") and data.rstrip().endswith(b"%%EOF")  # PDF file structure (ISO 32000)
    assert len(data) > len(page) // 4  # the figures are in it, not just an empty page
