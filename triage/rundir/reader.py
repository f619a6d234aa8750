"""Reading a run folder back: summary.json into a typed Summary, verdicts.csv and tokens.jsonl
(in parts or whole), run.json; and re-rendering report.html from the folder alone (no model).

This is the one place that reads summary.json: everything else holds the typed Summary.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pandas as pd

from triage.errors import TriageError, check_at_least_one
from triage.report.page import PageRows, render_page
from triage.run.summary import Summary
from triage.rundir.writer import atomic_write
from triage.studies import SECTIONS

TEXT_COLUMNS = ("id", "verdict", "reason", "reason_code", "bucket", "source", "reference", "output")


def read_summary(run_dir: str | Path) -> Summary:
    """summary.json of a run folder as a Summary."""
    d = json.loads((Path(run_dir) / "summary.json").read_text(encoding="utf-8"))
    return Summary.from_json(d, SECTIONS)


def read_run_info(run_dir: str | Path) -> dict[str, Any]:
    """run.json's content ({} for a folder without one)."""
    path = Path(run_dir) / "run.json"
    return json.loads(path.read_text(encoding="utf-8")) if path.exists() else {}


def _typed(verdicts: pd.DataFrame) -> pd.DataFrame:
    for col in verdicts.columns:
        if col in TEXT_COLUMNS:
            continue
        cells = verdicts[col]
        if len(cells) and cells.isin(["True", "False"]).all():
            verdicts[col] = cells == "True"
            continue
        try:
            verdicts[col] = pd.to_numeric(cells.replace("", math.nan))
        except (ValueError, TypeError):
            pass
    return verdicts


def _verdict_parts(run_dir: Path, rows: int = 20_000):
    """verdicts.csv in parts of `rows` rows. Text cells stay text ("NaN" is a word); the other
    columns become numbers (empty cell: missing) or booleans where they can."""
    with pd.read_csv(run_dir / "verdicts.csv", dtype=str, keep_default_na=False, chunksize=rows) as reader:
        for part in reader:
            yield _typed(part)


def _token_records(run_dir: Path):
    path = run_dir / "tokens.jsonl"
    if path.exists():
        with open(path, encoding="utf-8", newline="") as fh:
            for line in fh:  # lines end in "\n" only; U+2028 and the like stay inside a record
                if line.strip():
                    yield json.loads(line)


def load_run(run_dir: str | Path) -> tuple[Summary, pd.DataFrame, list[dict[str, Any]], dict[str, Any]]:
    """The run's files, whole, as render_report takes them (for a notebook; rerender reads them in parts)."""
    run_dir = Path(run_dir)
    summary, run_info = read_summary(run_dir), read_run_info(run_dir)
    verdicts = _typed(pd.read_csv(run_dir / "verdicts.csv", dtype=str, keep_default_na=False))
    return summary, verdicts, list(_token_records(run_dir)), run_info


def rerender(run_dir: str | Path, page_rows: int | None = None) -> Path:
    """Re-render report.html from the run directory alone, reading its rows in parts; the page
    lists page_rows failed rows per verdict (default: as many as the run's page, from run.json)."""
    run_dir = Path(run_dir)
    if not (run_dir / "summary.json").is_file() or not (run_dir / "verdicts.csv").is_file():
        raise TriageError("not a run directory (needs summary.json and verdicts.csv)", path=str(run_dir))
    check_at_least_one("page_rows", page_rows)
    summary, run_info = read_summary(run_dir), read_run_info(run_dir)
    page = PageRows(page_rows or run_info.get("page_rows"))
    for part in _verdict_parts(run_dir):
        page.add_rows(part)
    for rec in _token_records(run_dir):
        page.add_tokens([rec])
    out = run_dir / "report.html"
    atomic_write(out, render_page(summary, page, run_info))
    return out
