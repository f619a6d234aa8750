"""The report in a real browser (headless Chromium): it renders, no injected script runs, nothing is
fetched from anywhere, the console stays silent, and the row filter works (and the page reads without it).

Chromium is driven from the command line only (--dump-dom, --screenshot, console lines on stderr), so no
extra Python package is needed. Without a chromium binary the tests skip and say why, except in CI (the
environment variable CI set to true, as .ci/run and CI services set it): there a missing browser fails them.

The "nothing fetched" checks have a positive control: the same recorder, behind the same kind of server, sees
the requests of a page that does make them (the hostile texts written into a page unescaped).
"""

from __future__ import annotations

import contextlib
import http.server
import os
import re
import shutil
import subprocess
import sys
import tempfile
import threading
from pathlib import Path

import pytest
from test_report import hostile_texts, make_run, parse

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


CHROMIUM = _chromium()
NO_BROWSER = "no Chromium found (install the Debian package: apt-get install -y chromium)"


def in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


def require_browser() -> str:
    """The browser every check here drives: without one a skip, or in CI (CI=true) a failure."""
    if CHROMIUM is None:
        if in_ci():
            pytest.fail(f"{NO_BROWSER}; CI=true, so the browser checks must run")
        pytest.skip(f"{NO_BROWSER}; browser checks not run")
    return CHROMIUM


class _Recorder(http.server.BaseHTTPRequestHandler):
    hits: list[str] = []

    def do_GET(self):  # noqa: N802 (http.server's name)
        type(self).hits.append(self.path)
        self.send_response(200)
        self.send_header("Content-Type", "image/png")
        self.send_header("Content-Length", "0")
        self.end_headers()

    def log_message(self, *args):
        pass


@contextlib.contextmanager
def recording_server():
    """A web server on 127.0.0.1 (a free port) that records the path of every request; stopped on exit."""

    class Handler(_Recorder):
        hits: list[str] = []

    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    t = threading.Thread(target=httpd.serve_forever, daemon=True)
    t.start()
    try:
        yield f"http://127.0.0.1:{httpd.server_address[1]}", Handler.hits
    finally:
        httpd.shutdown()
        httpd.server_close()
        t.join(timeout=10)


@pytest.fixture(scope="module")
def server():
    """A local web server the hostile texts point at: any request the page made would land here."""
    with recording_server() as (url, hits):
        yield url, hits


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory, server):
    url, _ = server
    return make_run(tmp_path_factory.mktemp("browser") / "run", n=40, url=url)


def browse(url: str, *args: str) -> tuple[str, list[str]]:
    """Load `url` in a fresh headless Chromium; return (stdout, console lines from stderr)."""
    chromium = require_browser()
    profile = tempfile.mkdtemp(prefix="triage-chromium-")
    cmd = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-default-apps", "--disable-extensions", f"--user-data-dir={profile}",
           "--enable-logging=stderr", "--v=0", "--hide-scrollbars", *args]
    try:
        proc = subprocess.run(cmd + [url], capture_output=True, text=True, timeout=120)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    console = [line for line in proc.stderr.splitlines() if ":CONSOLE" in line]
    return proc.stdout, console


def test_the_recorder_sees_a_page_that_fetches(tmp_path):
    """Positive control for `hits == []` below: the same recorder and browser call, on a page holding the
    same hostile texts unescaped (no Content-Security-Policy), record the requests those texts make."""
    with recording_server() as (url, hits):
        page = tmp_path / "fetches.html"
        body = "\n".join(hostile_texts(url))
        page.write_text(f"<!doctype html><html><head><title>control</title></head><body>{body}"
                        f"<p><img src=\"{url}/plain.png\" alt=\"\"></p></body></html>", encoding="utf-8")
        dom, _ = browse(page.as_uri(), "--dump-dom")
        seen = list(hits)
    assert "</html>" in dom
    # the image, script, stylesheet and frame the texts point at, and the plain image
    assert {"/img.png", "/s.js", "/c.css", "/frame", "/plain.png"} <= set(seen), seen


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


@pytest.mark.parametrize("ci", ["true", "TRUE", "1", None, "", "false"])
def test_a_missing_browser_fails_in_ci_and_skips_elsewhere(monkeypatch, ci):
    """With no browser found: under CI=true the browser checks fail (pytest's Failed), otherwise they skip."""
    monkeypatch.setattr(sys.modules[__name__], "CHROMIUM", None)
    if ci is None:
        monkeypatch.delenv("CI", raising=False)
    else:
        monkeypatch.setenv("CI", ci)
    expected = pytest.fail.Exception if ci in ("true", "TRUE", "1") else pytest.skip.Exception
    with pytest.raises(expected) as caught:
        browse("about:blank", "--dump-dom")
    assert type(caught.value) is expected  # Failed and Skipped are not subclasses of each other
    assert NO_BROWSER in str(caught.value)
