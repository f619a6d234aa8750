"""Reading one run folder for a comparison: summary.json, verdicts.csv and run.json, checked.

No model is needed. Every problem with a file ends in one line naming the file and what is
wrong (a RunFolderError, exit code 2), never a traceback and never a silently dropped row.
"""

from __future__ import annotations

import csv
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from triage.errors import TriageError
from triage.run.verdicts import VERDICTS

# the verdicts.csv columns a comparison reads (the metric's own column is checked by name below)
NEEDED_COLUMNS = ("id", "line", "verdict", "bucket", "source", "reference", "output")


class RunFolderError(TriageError):
    """A run folder, or one of its files, cannot be read as a run."""


@dataclass
class RunFolder:
    """One run's files as the comparison reads them."""

    path: Path
    summary: dict[str, Any]
    verdicts: pd.DataFrame  # every cell text, as written ("" for an empty cell)
    run_info: dict[str, Any] = field(default_factory=dict)

    @property
    def metric(self) -> str:
        opts = self.summary.get("options") or {}
        cm = self.summary.get("corpus_metric") or {}
        return str(opts.get("metric") or cm.get("name") or "chrf")

    @property
    def settings(self) -> dict[str, Any]:
        return self.summary.get("settings") or {}

    @property
    def model(self) -> dict[str, Any]:
        return self.summary.get("model") or {}

    @property
    def data(self) -> dict[str, Any]:
        return self.summary.get("data") or {}


def _json(path: Path, required: bool) -> dict[str, Any]:
    if not path.is_file():
        if required:
            raise RunFolderError("missing (not a run folder, or the run did not finish)", path=str(path))
        return {}
    try:
        obj = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        raise RunFolderError(f"not UTF-8 text (byte {exc.start})", path=str(path)) from None
    except json.JSONDecodeError as exc:
        raise RunFolderError(f"not valid JSON: {exc.msg} at column {exc.colno}", path=str(path),
                             line=exc.lineno) from None
    if not isinstance(obj, dict):
        raise RunFolderError(f"expected a JSON object, found {type(obj).__name__}", path=str(path))
    return obj


def _check_summary(path: Path, s: dict[str, Any]) -> None:
    def need(dotted: str, kind: type | tuple[type, ...]) -> Any:
        d: Any = s
        for part in dotted.split("."):
            if not isinstance(d, dict) or part not in d:
                raise RunFolderError(f"no {dotted!r} (a cut-off or edited summary?)", path=str(path))
            d = d[part]
        if not isinstance(d, kind) or isinstance(d, bool) and kind is int:
            raise RunFolderError(f"{dotted!r} should be {getattr(kind, '__name__', kind)}, found {d!r}",
                                 path=str(path))
        return d

    need("data.sha256", str)
    need("data.rows", int)
    need("settings", dict)
    counts = need("counts", dict)
    for verdict, n in counts.items():
        if verdict not in VERDICTS or not isinstance(n, int) or isinstance(n, bool) or n < 0:
            raise RunFolderError(f"counts.{verdict} = {n!r} is not a verdict count", path=str(path))
    need("recommendation.action", str)


def _read_verdicts(path: Path, metric: str) -> pd.DataFrame:
    if not path.is_file():
        raise RunFolderError("missing (not a run folder, or the run did not finish)", path=str(path))
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, quoting=csv.QUOTE_MINIMAL)
    except UnicodeDecodeError as exc:
        raise RunFolderError(f"not UTF-8 text (byte {exc.start})", path=str(path)) from None
    except pd.errors.EmptyDataError:
        raise RunFolderError("empty file (no header)", path=str(path)) from None
    except pd.errors.ParserError as exc:
        text = " ".join(str(exc).split())
        raise RunFolderError(f"not a readable CSV table: {text}", path=str(path)) from None
    missing = [c for c in (*NEEDED_COLUMNS, metric) if c not in frame.columns]
    if missing:
        raise RunFolderError(f"no column {', '.join(repr(c) for c in missing)} in the header", path=str(path))
    bad = ~frame["verdict"].isin(VERDICTS)
    if bad.any():
        k = int(bad.to_numpy().nonzero()[0][0])
        raise RunFolderError(f"row {k + 1} (id {frame['id'].iloc[k]!r}): unknown verdict "
                             f"{frame['verdict'].iloc[k]!r}", path=str(path))
    dup = frame["id"].duplicated(keep="first")
    if dup.any():
        k = int(dup.to_numpy().nonzero()[0][0])
        first = int((frame["id"] == frame["id"].iloc[k]).to_numpy().nonzero()[0][0])
        raise RunFolderError(f"row {k + 1}: id {frame['id'].iloc[k]!r} appears twice (first in row {first + 1})",
                             path=str(path))
    return frame


def load_run_folder(path: str | Path) -> RunFolder:
    """Read and check one run folder: summary.json and verdicts.csv must be there and agree
    (rows and counts per verdict); run.json is optional (date and command)."""
    folder = Path(path)
    if not folder.exists():
        raise RunFolderError("no such run folder", path=str(folder))
    if not folder.is_dir():
        raise RunFolderError("not a folder (give the run's output folder)", path=str(folder))
    summary_path = folder / "summary.json"
    summary = _json(summary_path, required=True)
    _check_summary(summary_path, summary)
    run_info = _json(folder / "run.json", required=False)
    rf = RunFolder(folder, summary, pd.DataFrame(), run_info)
    verdicts_path = folder / "verdicts.csv"
    frame = _read_verdicts(verdicts_path, rf.metric)
    rows = summary["data"]["rows"]
    if len(frame) != rows:
        raise RunFolderError(f"{len(frame)} rows, but summary.json says the dev set has {rows} "
                             "(a cut-off or mixed-up file?)", path=str(verdicts_path))
    seen = frame["verdict"].value_counts()
    for verdict in VERDICTS:
        said = int(summary["counts"].get(verdict, 0))
        if int(seen.get(verdict, 0)) != said:
            raise RunFolderError(f"{int(seen.get(verdict, 0))} rows are {verdict!r}, but summary.json counts "
                                 f"{said} (the two files come from different runs?)", path=str(verdicts_path))
    rf.verdicts = frame
    return rf
