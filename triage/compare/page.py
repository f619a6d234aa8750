"""compare.html and compare.json: the comparison written into a folder.

The page follows report.html's rules: one file, nothing loaded from anywhere (a
Content-Security-Policy forbids every source but inline styles and data: images, and there is no
script at all), every text escaped by jinja2's autoescape.
"""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path
from typing import Any

from markupsafe import Markup

from triage.compare.core import ACTION_WORDS, METRIC_NAMES, Comparison
from triage.report.page import fmt_interval, fmt_num, fmt_pct
from triage.rundir.writer import atomic_write

PAGE_ROWS = 1000  # fixed and broken rows listed on the page, each (compare.json has them all)
CSP = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; script-src 'none'; "
       "base-uri 'none'; form-action 'none'")


def schema() -> dict[str, Any]:
    """The JSON Schema of compare.json, shipped in the package."""
    return json.loads(resources.files("triage.compare").joinpath("compare.schema.json").read_text(encoding="utf-8"))


def _env():
    from jinja2 import ChoiceLoader, Environment, PackageLoader, StrictUndefined, select_autoescape

    env = Environment(loader=ChoiceLoader([PackageLoader("triage.compare", "templates"),
                                           PackageLoader("triage.report", "templates")]),
                      autoescape=select_autoescape(default=True), trim_blocks=True, lstrip_blocks=True,
                      undefined=StrictUndefined)
    env.filters.update(num=fmt_num, pct=fmt_pct, interval=fmt_interval, signed=lambda x, d=2: (
        "—" if x is None else f"{x:+.{d}f}"))
    return env


def render_compare(c: Comparison) -> str:
    t = c.corpus_metric.test
    tr = c.transitions
    return _env().get_template("compare.html.j2").render(
        c=c, t=t, csp=Markup(CSP), column_totals=tr.counts_b, page_rows=PAGE_ROWS, action_words=ACTION_WORDS, metric_name=METRIC_NAMES.get(t.metric, t.metric) if t else METRIC_NAMES.get(c.a.metric, c.a.metric),
        fixed=c.fixed[:PAGE_ROWS], broken=c.broken[:PAGE_ROWS],
    )


def compare_json(c: Comparison) -> str:
    return json.dumps(c.to_dict(), ensure_ascii=False, indent=2, allow_nan=False) + "\n"


def write_comparison(c: Comparison, out: str | Path) -> tuple[Path, Path]:
    """Write compare.json and compare.html into `out` (made if needed), each file atomically."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    j, h = out / "compare.json", out / "compare.html"
    atomic_write(j, compare_json(c))
    atomic_write(h, render_compare(c))
    return j, h
