"""The HTML report: numbers equal summary.json, hostile text stays text, size, re-rendering offline."""

from __future__ import annotations

import base64
import csv
import dataclasses
import hashlib
import json
import math
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from tinymodels import make_marian, sentences

from triage.rundir.reader import load_run

HOSTILE_SCRIPT = "<script>document.title='pwned'</script>"
HOSTILE_IMG = "\"><img src=x onerror=document.title='pwned'>"
ARABIC = "القطار المتجه إلى الرصيف الثاني"
HEBREW = "הרכבת לרציף שתיים"
COMBINING = "Ze\u0301bra n\u0303 a\u0308\u0332 Z\u0324\u0354\u0367\u0311"


def hostile_texts(url: str | None = None) -> list[str]:
    """Texts that would run script or load something if the page did not escape them."""
    texts = [HOSTILE_SCRIPT, HOSTILE_IMG, ARABIC, HEBREW, COMBINING]
    if url:
        texts += [f"\"><img src={url}/img.png onerror=document.title='pwned'>",
                  f"<script src={url}/s.js></script>", f"<link rel=stylesheet href={url}/c.css>",
                  f"<iframe src={url}/frame></iframe>", f"<svg><image href={url}/svg.png /></svg>"]
    return texts


def make_run(out_dir: Path, n: int = 40, url: str | None = None, seed: int = 0) -> Path:
    """A real run (tiny random model, given outputs, no decoding) whose texts include hostile ones."""
    from triage.data.devset import read_devset
    from triage.models.transformers_backend import TransformersModel
    from triage.run.pipeline import TriageOptions, run_triage
    from triage.rundir.writer import write_run

    model, tok = make_marian(seed=seed, num_beams=4, length_penalty=1.0, max_new_tokens=40)
    tm = TransformersModel(model, tok)
    src = sentences(n, seed=seed + 1)
    ref = sentences(n, seed=seed + 2, lo=1, hi=45)
    out = sentences(n, seed=seed + 3, lo=1, hi=14)
    bad = hostile_texts(url)
    records = []
    for i in range(n):
        r, o, s = ref[i], out[i], src[i]
        if i % 9 == 4:
            o = r  # a correct row
        elif i % 5 == 0:
            h = bad[(i // 5) % len(bad)]
            r, o, s = f"{r} {h}", f"{h} {o}", f"{bad[(i // 5 + 2) % len(bad)]} {s}"
        rid = f"row-{i}" if i % 11 else f"r{i}<b onmouseover=document.title='pwned'>"
        records.append({"id": rid, "source": s, "reference": r, "output": o})
    out_dir.mkdir(parents=True, exist_ok=True)
    data = out_dir.parent / f"dev {out_dir.name} <img src=x onerror=alert(1)>.jsonl"
    data.write_text("".join(json.dumps(x, ensure_ascii=False) + "\n" for x in records), encoding="utf-8")
    devset = read_devset(str(data))
    info = {"path": f"/models/{HOSTILE_SCRIPT}", "sha256": tm.fingerprint(), "tokenizer": f"word level {HOSTILE_IMG}"}
    res = run_triage(tm, devset, options=TriageOptions(progress=False), model_info=info)
    write_run(res, out_dir, {"created": "2026-01-02T03:04:05Z", "elapsed_s": 1.5,
                             "command": f"triage run {HOSTILE_IMG}"})
    return out_dir


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    return make_run(tmp_path_factory.mktemp("report") / "run")


class Page(HTMLParser):
    """Collects what the tests look at: tags, attributes, data-key numbers, script bodies, row details."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.numbers: list[tuple[str, str, str]] = []  # (data-key, data-value, shown text)
        self.scripts: list[str] = []
        self.csp = ""
        self.title = ""
        self.text: list[str] = []
        self._stack: list[list] = []  # open data-key elements: [key, value, text]
        self._in: str | None = None
        self.rows: list[dict] = []  # one per <details class="row">: attrs, summary cells, token rows
        self._row: dict | None = None
        self._cell: list | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "meta" and (a.get("http-equiv") or "").lower() == "content-security-policy":
            self.csp = a.get("content") or ""
        if tag in ("script", "title"):
            self._in = tag
            if tag == "script":
                self.scripts.append("")
        if "data-key" in a and tag == "span":
            self._stack.append([a["data-key"], a.get("data-value"), ""])
        if tag == "details" and "row" in (a.get("class") or ""):
            self._row = {"attrs": a, "summary": [], "tokens": [], "texts": []}
            self.rows.append(self._row)
        if self._row is not None:
            if tag in ("b", "i") and self._cell is None:
                self._cell = ["summary", ""]
            elif tag == "dd":
                self._cell = ["texts", ""]
            elif tag == "tr":
                self._flush_td()
                self._row["tokens"].append({"class": a.get("class") or "", "cells": []})
            elif tag == "td":
                self._flush_td()
                self._cell = ["td", ""]

    def handle_endtag(self, tag):
        if tag in ("script", "title"):
            self._in = None
        if self._stack and tag == "span":
            k, v, t = self._stack.pop()
            self.numbers.append((k, v, t))
        if self._row is not None:
            if tag in ("b", "i", "dd") and self._cell:
                self._row[self._cell[0]].append(self._cell[1])
                self._cell = None
            if tag in ("tbody", "table"):
                self._flush_td()
            if tag == "details":
                self._row = None

    def _flush_td(self):
        if self._cell and self._cell[0] == "td" and self._row and self._row["tokens"]:
            self._row["tokens"][-1]["cells"].append(self._cell[1])
        self._cell = None

    def handle_data(self, data):
        if self._in == "script":
            self.scripts[-1] += data
        elif self._in == "title":
            self.title += data
        else:
            self.text.append(data)
        for item in self._stack:
            item[2] += data
        if self._cell is not None:
            self._cell[1] += data


def parse(html: str) -> Page:
    """The token tables leave out </td> and </tr> (HTML allows it); the parser closes cells itself."""
    p = Page()
    p.feed(html)
    p.close()
    return p


def lookup(summary, key):
    d = summary
    for part in key.split("."):
        d = d[int(part)] if isinstance(d, list) else d[part]
    return d


# ----------------------------------------------------------------------------- numbers
def test_numbers_in_page_equal_summary_json(run_dir):
    summary = json.loads((run_dir / "summary.json").read_text(encoding="utf-8"))
    page = parse((run_dir / "report.html").read_text(encoding="utf-8"))
    seen = {}
    for key, value, text in page.numbers:
        if key.startswith(("model.", "data.", "settings.", "run.")):
            continue
        expected = lookup(summary, key)
        if value is None:  # a text shown as is
            assert text == expected, key
            continue
        got = json.loads(value) if value else None
        assert got == expected, key
        if isinstance(expected, int):
            assert text == str(expected), key
        elif isinstance(expected, float) and not key.startswith("score_gap") and "share" in key:
            assert float(text.rstrip("%")) == pytest.approx(expected * 100, abs=0.051), key
        elif isinstance(expected, float):
            assert float(text) == pytest.approx(expected, abs=0.0006), key
        seen[key] = got
    for v in ("correct", "search", "model", "tie", "blocked", "skipped"):
        assert f"counts.{v}" in seen
        for i in range(len(summary["buckets"])):
            if v in ("search", "model") or any(b["counts"][v] for b in summary["buckets"]):
                assert f"buckets.{i}.counts.{v}" in seen
    for key in ("failed", "search_share.compared", "search_share.share", "score_gap.mean", "score_gap.median"):
        assert key in seen
    assert summary["recommendation"]["action"] in {a.get("data-value") for t, a in page.tags if a.get("data-key") ==
                                                   "recommendation.action"}


def test_page_counts_agree_with_verdicts_csv(run_dir):
    """Recount verdicts.csv with the csv module (not the pipeline's pandas code) and compare with the page."""
    with open(run_dir / "verdicts.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    page = parse((run_dir / "report.html").read_text(encoding="utf-8"))
    nums = {k: json.loads(v) for k, v, _ in page.numbers if v}
    for v in ("correct", "search", "model", "tie", "blocked", "skipped"):
        assert nums[f"counts.{v}"] == sum(r["verdict"] == v for r in rows)
    failed = [r for r in rows if r["verdict"] != "correct"]
    assert len(page.rows) == len(failed) == nums["failed"]
    # every failed row appears once, in input order, with its verdict and bucket
    assert [r["attrs"]["data-v"] for r in page.rows] == [r["verdict"] for r in failed]
    assert [r["attrs"]["data-b"] for r in page.rows] == [r["bucket"] for r in failed]
    # the mix is not one-sided, so both kinds of row are exercised
    assert nums["counts.search"] > 0 and nums["counts.model"] > 0 and nums["counts.correct"] > 0


def test_row_details_match_tokens_jsonl(run_dir):
    tokens = {t["id"]: t for t in map(json.loads, (run_dir / "tokens.jsonl").read_text(encoding="utf-8").splitlines())}
    with open(run_dir / "verdicts.csv", newline="", encoding="utf-8") as fh:
        failed = [r for r in csv.DictReader(fh) if r["verdict"] != "correct"]
    summary = json.loads((run_dir / "summary.json").read_text(encoding="utf-8"))
    alpha = summary["settings"]["alpha"]
    page = parse((run_dir / "report.html").read_text(encoding="utf-8"))
    checked = 0
    for row, rec in zip(page.rows, failed, strict=True):
        assert row["summary"][1] == f"{rec['id']} · {rec['line']}"
        assert row["texts"] == [rec["source"], rec["reference"], rec["output"]]
        t = tokens.get(rec["id"])
        if not t or not t["reference"] or not t["output"]:
            continue
        ref, out = t["reference"], t["output"]
        body = [r for r in row["tokens"] if r["cells"]]  # the header row has th cells only
        assert len(body) == max(len(ref["pieces"]), len(out["pieces"]))
        for i, r in enumerate(body):
            if i < len(ref["pieces"]):
                assert r["cells"][0].replace(" ▼", "") == ref["pieces"][i]
                lp = ref["logprobs"][i]
                assert r["cells"][1] == ("-inf" if lp is None else f"{lp:.2f}")
            if i < len(out["pieces"]):
                assert r["cells"][2] == out["pieces"][i]
                assert float(r["cells"][3]) == pytest.approx(out["logprobs"][i], abs=0.005)
        # first difference: first position whose token ids differ (or where the shorter one ends)
        k = next((i for i, (a, b) in enumerate(zip(ref["ids"], out["ids"], strict=False)) if a != b),
                 min(len(ref["ids"]), len(out["ids"])))
        marked = [i for i, r in enumerate(body) if "d" in r["class"].split()]
        assert marked == [k]
        worst = min(range(len(ref["logprobs"])), key=lambda i: -math.inf if ref["logprobs"][i] is None
                    else ref["logprobs"][i])
        assert [i for i, r in enumerate(body) if "w" in r["class"].split()] == [worst]
        assert body[worst]["cells"][0].endswith("▼")
        # the score shown is the power-law objective of transformers' beam search: sum / len**alpha
        if rec["verdict"] in ("search", "model", "tie"):
            assert float(rec["ref_score"]) == pytest.approx(sum(ref["logprobs"]) / len(ref["ids"]) ** alpha, rel=1e-4)
        checked += 1
    assert checked >= 10


# ----------------------------------------------------------------------------- safety
def test_hostile_text_is_escaped_and_nothing_is_loaded(run_dir):
    html = (run_dir / "report.html").read_text(encoding="utf-8")
    page = parse(html)
    assert len(page.scripts) == 1
    assert sum(1 for t, _ in page.tags if t == "script") == 1
    allowed = {"html", "head", "meta", "title", "style", "body", "header", "nav", "a", "main", "section", "h1", "h2",
               "h3", "p", "span", "strong", "code", "div", "dl", "dt", "dd", "table", "thead", "tbody", "tfoot", "tr",
               "th", "td", "svg", "rect", "text", "line", "details", "summary", "b", "i", "br", "label",
               "select", "option", "footer", "script", "ul", "li", "caption", "polyline", "circle"}
    assert {t for t, _ in page.tags} <= allowed
    for tag, attrs in page.tags:
        assert not any(k.startswith("on") for k in attrs), (tag, attrs)
        assert "src" not in attrs and "srcset" not in attrs
        if tag == "a":
            assert attrs["href"].startswith("#")
    text = "".join(page.text)
    for h in (HOSTILE_SCRIPT, HOSTILE_IMG, ARABIC, HEBREW, COMBINING):
        assert h in text, h  # shown as text, unchanged (combining marks and right-to-left kept)
    assert "/models/" + HOSTILE_SCRIPT in text and "<img src=x onerror=alert(1)>" in page.title
    # CSP: nothing from anywhere, the one script allowed by its hash
    csp = dict(p.strip().split(" ", 1) for p in page.csp.split(";") if p.strip())
    assert csp["default-src"] == "'none'" and csp["img-src"] == "data:"
    digest = base64.b64encode(hashlib.sha256(page.scripts[0].encode("utf-8")).digest()).decode()
    assert csp["script-src"] == f"'sha256-{digest}'"


def test_script_hash_follows_the_script(run_dir, monkeypatch):
    """The hash is computed from the script actually embedded, so editing the script keeps the page working."""
    from triage.report import page as report

    summary, verdicts, tokens, info = load_run(run_dir)
    real = report._script

    def edited(env):
        script, _ = real(env)
        changed = script + "\n/* edited */"
        return changed, "sha256-" + base64.b64encode(hashlib.sha256(str(changed).encode()).digest()).decode()

    monkeypatch.setattr(report, "_script", edited)
    page = parse(report.render_report(summary, verdicts, tokens, info))
    digest = base64.b64encode(hashlib.sha256(page.scripts[0].encode("utf-8")).digest()).decode()
    assert page.scripts[0].endswith("/* edited */") and f"'sha256-{digest}'" in page.csp


def test_readable_without_script(run_dir):
    """Controls that need the script start hidden; every row and its details are in the markup."""
    html = (run_dir / "report.html").read_text(encoding="utf-8")
    page = parse(html)
    controls = [a for t, a in page.tags if a.get("id") == "controls"]
    assert controls and "hidden" in controls[0]
    assert all("hidden" not in r["attrs"] for r in page.rows)
    assert "@media print" in html
    for section in ("decision", "run", "counts", "length", "gap", "rows"):
        assert f'<section id="{section}"' in html
    order = [html.index(f'<section id="{s}"') for s in ("decision", "run", "counts", "length", "gap", "rows")]
    assert order == sorted(order)


# ----------------------------------------------------------------------------- size, re-render
def test_report_for_1000_rows_is_under_2_mb(tmp_path):
    run = make_run(tmp_path / "big", n=1000, seed=3)
    html = (run / "report.html").read_bytes()
    assert len(html) < 2_000_000, len(html)
    with open(run / "verdicts.csv", newline="", encoding="utf-8") as fh:
        failed = sum(r["verdict"] != "correct" for r in csv.DictReader(fh))
    assert html.count(b'<details class="row"') == failed > 700


def test_rerender_from_run_dir_without_model(run_dir, tmp_path):
    """rerender needs only the run's files: torch and transformers cannot even be imported."""
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(run_dir, copy)
    before = (copy / "report.html").read_bytes()
    (copy / "report.html").unlink()
    code = ("import sys; sys.modules['torch'] = None; sys.modules['transformers'] = None; "
            "from triage.rundir.reader import rerender; rerender(sys.argv[1])")
    subprocess.run([sys.executable, "-c", code, str(copy)], check=True, cwd=Path(__file__).parent.parent)
    assert (copy / "report.html").read_bytes() == before


# ----------------------------------------------------------------------------- optional sections
def test_sweep_sections_render_only_when_present(run_dir):
    from triage.report import page as report

    summary, verdicts, tokens, info = load_run(run_dir)
    plain = report.render_report(summary, verdicts, tokens, info)
    assert 'id="sweeps"' not in plain and "data-sweep" not in plain
    # sections as read from summary.json (dicts), of the shapes the studies write
    summary = dataclasses.replace(summary)
    summary.widen = {"metric": "chrf", "current_beam": 4, "references": "all",
                        "rows": {"failed": 40, "compared": 38, "redecoded": 38, "search": 25, "model": 12, "tie": 1},
                        "current": {"beam": 4, "seconds_per_row": 0.012, "reproduced_share": 1.0},
                        "corpus_before": 51.2,
                        "widths": [{"beam": 8, "resolved": 16, "resolved_share": 0.64, "changed": 20,
                                    "sentence_delta": {"search": 5.0}, "model_rows": {"worse": 3, "better": 1},
                                    "corpus_after": 53.3, "corpus_delta": 2.1, "seconds_per_row": 0.037,
                                    "time_ratio": 3.1}],
                        "notes": [f"note {HOSTILE_SCRIPT}"], "interrupted": False}
    summary.beam_curve = {"metric": "chrf", "current_beam": 4, "rows": 20, "of": 40,
                             "points": [{"beam": b, "corpus": 40 + b, "time_ratio": b / 2} for b in (1, 2, 4, 8)]}
    summary.length_penalty = {"current": {"penalty": "power", "alpha": 1.0}, "rescored_at_beam": 4, "rows": 38,
                                 "grid": [{"penalty": "gnmt", "alpha": 0.6, "counts": {"search": 9, "model": 28},
                                           "model_to_search": 4, "search_to_model": 0, "flip_share": 0.125}],
                                 "best": {"penalty": "gnmt", "alpha": 0.6, "model_to_search": 4}}
    summary.exact = [{"id": "row-3", "best": -1.25}]  # a key of a shape this page does not know
    page = parse(report.render_report(summary, verdicts, tokens, info))
    html = report.render_report(summary, verdicts, tokens, info)
    assert 'id="sweeps"' in html
    for key in ("widen", "beam_curve", "length_penalty", "exact"):
        assert f'data-sweep="{key}"' in html
    text = "".join(page.text)
    assert "64.0%" in text and "53.30" in text and "12.5%" in text and "gnmt" in text and "row-3" in text
    assert f"note {HOSTILE_SCRIPT}" in text and HOSTILE_SCRIPT not in html
    # a malformed section is shown as a plain table, never breaks the page
    summary.widen = {"widths": "not a list", "rows": 7}
    assert 'data-sweep="widen"' in report.render_report(summary, verdicts, tokens, info)


def test_lost_at_columns_show_in_row_details(run_dir):
    from triage.report import page as report

    summary, verdicts, tokens, info = load_run(run_dir)
    verdicts = verdicts.copy()
    verdicts["lost_at_step"] = [3 if v == "search" else math.nan for v in verdicts["verdict"]]
    verdicts["lost_at_width"] = [16 if v == "search" else math.nan for v in verdicts["verdict"]]
    html = report.render_report(summary, verdicts, tokens, info)
    n_search = int((verdicts["verdict"] == "search").sum())
    assert html.count("<dt>lost at step</dt><dd>3</dd>") == n_search
    assert html.count("<dt>lost at width</dt><dd>16</dd>") == n_search


# ----------------------------------------------------------------------------- charts
def test_histogram_bins_match_numpy():
    from triage.report.charts import gap_bins

    rng = np.random.default_rng(0)
    vals = list(rng.normal(-1.0, 2.0, 300))
    bins = gap_bins(vals)
    edges = [b[0] for b in bins] + [bins[-1][1]]
    assert any(abs(e) < 1e-9 for e in edges) or edges[0] > 0 or edges[-1] < 0  # 0 is an edge when in range
    expected, _ = np.histogram(vals, bins=edges)  # numpy: [lo, hi) and the last bin closed, as here
    assert [b[2] for b in bins] == expected.tolist()
    assert sum(b[2] for b in bins) == 300


def test_far_out_margins_are_named_not_drawn():
    from triage.report.charts import gap_histogram, split_outliers

    rng = np.random.default_rng(1)
    vals = list(rng.normal(-2.0, 0.5, 200)) + [4234.2, 190.0, -9999.0]
    below, inside, above = split_outliers(vals)
    q1, q3 = np.percentile(vals, [25, 75])  # numpy's default (linear) quantiles
    # Tukey's far-out fences: Q1 - 3 IQR and Q3 + 3 IQR (Tukey 1977, Exploratory Data Analysis; from memory)
    assert below == [-9999.0] and above == [190.0, 4234.2]
    assert all(q1 - 3 * (q3 - q1) <= v <= q3 + 3 * (q3 - q1) for v in inside) and len(inside) == 200
    svg = str(gap_histogram(vals, ["model"] * len(vals)))
    assert "1 more below -9999" in svg and "2 more above, up to 4234" in svg


def test_length_bars_are_proportional_and_labelled():
    from triage.report.charts import LABELS, length_bars
    from triage.run.summary import Bucket

    svg = str(length_bars([Bucket("1-10", rows=8, failed=8, counts={"search": 2, "model": 6}, search_share=0.25,
                                  interval95=[None, None]),
                           Bucket("<x>", rows=4, failed=4, counts={"search": 4, "model": 0}, search_share=1.0,
                                  interval95=[None, None])]))
    widths = [float(w) for w in re.findall(r'<rect x="[\d.]+" y="\d+" width="([\d.]+)" height="20"', svg)]
    assert widths == pytest.approx([640 * 2 / 8, 640 * 6 / 8, 640.0], abs=0.05)
    assert LABELS["search"] in svg and LABELS["model"] in svg and "&lt;x&gt;" in svg and "<x>" not in svg
