"""The report in a real browser (headless Chromium): it renders, no injected script runs, nothing is
fetched from anywhere, the console stays silent, and the row filter works (and the page reads without it).

Chromium is driven from the command line only (--dump-dom, --screenshot, console lines on stderr), so no
extra Python package is needed. Without a chromium binary the tests skip and say why.
"""

from __future__ import annotations

import http.server
import re
import shutil
import subprocess
import tempfile
import threading
from pathlib import Path

import pytest
from test_report import make_run, parse

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="no Chromium found (install the Debian package: apt-get install -y chromium); browser checks not run",
)


class _Recorder(http.server.BaseHTTPRequestHandler):
    hits: list[str] = []

    def do_GET(self):  # noqa: N802 (http.server's name)
        type(self).hits.append(self.path)
        self.send_response(200)
        self.send_header("Content-Type", "image/png")
        self.end_headers()

    def log_message(self, *args):
        pass


@pytest.fixture(scope="module")
def server():
    """A local web server the hostile texts point at: any request the page made would land here."""

    class Handler(_Recorder):
        hits: list[str] = []

    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    t = threading.Thread(target=httpd.serve_forever, daemon=True)
    t.start()
    yield f"http://127.0.0.1:{httpd.server_address[1]}", Handler.hits
    httpd.shutdown()


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory, server):
    url, _ = server
    return make_run(tmp_path_factory.mktemp("browser") / "run", n=40, url=url)


def browse(url: str, *args: str) -> tuple[str, list[str]]:
    """Load `url` in a fresh headless Chromium; return (stdout, console lines from stderr)."""
    profile = tempfile.mkdtemp(prefix="triage-chromium-")
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-default-apps", "--disable-extensions", f"--user-data-dir={profile}",
           "--enable-logging=stderr", "--v=0", "--hide-scrollbars", *args]
    try:
        proc = subprocess.run(cmd + [url], capture_output=True, text=True, timeout=120)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    console = [line for line in proc.stderr.splitlines() if ":CONSOLE" in line]
    return proc.stdout, console


def test_page_renders_without_running_injected_code_or_fetching(hostile_run, server):
    url, hits = server
    page_url = (hostile_run / "report.html").as_uri()
    dom, console = browse(page_url, "--dump-dom")
    assert "</html>" in dom
    page = parse(dom)
    # the one inline script ran (so its CSP hash is right) and nothing else did
    assert re.search(r'<html[^>]*data-script="ready"', dom)
    assert "pwned" not in page.title and page.title.startswith("Search or model?")
    assert not [t for t, _ in page.tags if t in ("img", "iframe", "link", "image")]
    assert sum(1 for t, _ in page.tags if t == "script") == 1
    assert hits == [], f"the page requested {hits}"
    assert console == [], console
    # screenshot for people to look at
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "report.png"
    if shot.exists():
        shot.unlink()
    browse(page_url, f"--screenshot={shot}", "--window-size=1280,2600")
    assert shot.exists() and shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000
    assert hits == []


def test_escaping_alone_stops_injection(hostile_run, server, tmp_path):
    """With the Content-Security-Policy removed, the escaped texts still load and run nothing."""
    url, hits = server
    html = (hostile_run / "report.html").read_text(encoding="utf-8")
    bare = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", html)
    assert bare != html
    path = tmp_path / "no-csp.html"
    path.write_text(bare, encoding="utf-8")
    dom, console = browse(path.as_uri(), "--dump-dom")
    page = parse(dom)
    assert "pwned" not in page.title
    assert not [t for t, _ in page.tags if t in ("img", "iframe", "link", "image")]
    assert hits == [], f"the page requested {hits}"
    assert console == [], console


def test_filter_and_sort_from_the_address(hostile_run):
    """#v=model&s=g%2B: only model-side rows shown, sorted by margin, lowest first."""
    dom, console = browse((hostile_run / "report.html").as_uri() + "#v=model&s=g%2B", "--dump-dom")
    assert console == []
    page = parse(dom)
    rows = page.rows
    shown = [r for r in rows if "hidden" not in r["attrs"]]
    assert shown and all(r["attrs"]["data-v"] == "model" for r in shown)
    assert {r["attrs"]["data-v"] for r in rows if "hidden" in r["attrs"]} == {v for v in
                                                                            (r["attrs"]["data-v"] for r in rows)} - {"model"}
    gaps = [float(r["attrs"]["data-g"]) for r in shown]
    assert gaps == sorted(gaps)
    controls = [a for t, a in page.tags if a.get("id") == "controls"]
    assert "hidden" not in controls[0]
    assert re.search(r"showing \d+ of \d+ rows", dom)


def test_page_reads_with_scripts_off(hostile_run, tmp_path):
    """The script blocked by CSP script-src 'none' (headless --dump-dom and --screenshot need scripting
    switched on in the browser, so the page's own script is what is turned off): all rows shown, no dead
    controls; a screenshot of that view."""
    html = (hostile_run / "report.html").read_text(encoding="utf-8")
    blocked = re.sub(r"script-src '[^']+'", "script-src 'none'", html)
    assert blocked != html
    path = tmp_path / "no-script.html"
    path.write_text(blocked, encoding="utf-8")
    dom, console = browse(path.as_uri(), "--dump-dom")
    page = parse(dom)
    assert not re.search(r'<html[^>]*data-script="ready"', dom)
    assert page.rows and all("hidden" not in r["attrs"] for r in page.rows)
    assert "hidden" in [a for t, a in page.tags if a.get("id") == "controls"][0]
    assert all(len(r["texts"]) == 3 for r in page.rows)
    assert len(console) == 1 and "Content Security Policy" in console[0]  # the blocked script, nothing else
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "report-scripts-off.png"
    if shot.exists():
        shot.unlink()
    browse(path.as_uri(), f"--screenshot={shot}", "--window-size=1280,1600")
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000


def test_page_prints(hostile_run):
    ARTIFACTS.mkdir(exist_ok=True)
    pdf = ARTIFACTS / "report.pdf"
    if pdf.exists():
        pdf.unlink()
    _, console = browse((hostile_run / "report.html").as_uri(), f"--print-to-pdf={pdf}", "--no-pdf-header-footer")
    assert pdf.read_bytes()[:5] == b"%PDF-" and pdf.stat().st_size > 10_000
    assert console == []
