"""The HTML report: one self-contained page rendered from a run's tables (no model needed)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pandas as pd


def _env():
    from jinja2 import Environment, PackageLoader, select_autoescape

    return Environment(loader=PackageLoader("triage", "templates"), autoescape=select_autoescape(default=True))


def render_report(summary: dict[str, Any], verdicts: pd.DataFrame, tokens: list[dict[str, Any]],
                  run_info: dict[str, Any]) -> str:
    failed = verdicts[verdicts["verdict"] != "correct"] if len(verdicts) else verdicts
    return _env().get_template("report.html.j2").render(
        summary=summary, run=run_info, failed=failed.to_dict("records"), n_rows=len(verdicts),
    )


def load_run(run_dir: str | Path) -> tuple[dict[str, Any], pd.DataFrame, list[dict[str, Any]], dict[str, Any]]:
    run_dir = Path(run_dir)
    summary = json.loads((run_dir / "summary.json").read_text(encoding="utf-8"))
    verdicts = pd.read_csv(run_dir / "verdicts.csv", dtype={"id": str, "source": str, "reference": str, "output": str},
                           keep_default_na=False, na_values={c: [""] for c in ("ref_score", "out_score")})
    tokens_path = run_dir / "tokens.jsonl"
    tokens = [json.loads(x) for x in tokens_path.read_text(encoding="utf-8").splitlines() if x.strip()] \
        if tokens_path.exists() else []
    run_path = run_dir / "run.json"
    run_info = json.loads(run_path.read_text(encoding="utf-8")) if run_path.exists() else {}
    return summary, verdicts, tokens, run_info


def rerender(run_dir: str | Path) -> Path:
    """Re-render report.html from the run directory alone."""
    from .outputs import atomic_write

    summary, verdicts, tokens, run_info = load_run(run_dir)
    out = Path(run_dir) / "report.html"
    atomic_write(out, render_report(summary, verdicts, tokens, run_info))
    return out
