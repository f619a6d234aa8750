"""Writing a run directory: verdicts.csv, summary.json, tokens.jsonl, run.json, report.html.

Every file is written to a temporary name in the same folder and renamed into place, so an
interrupted run leaves the previous run's files intact. verdicts.csv, summary.json and
tokens.jsonl are deterministic (byte-identical for the same inputs); the date and the
timings live in run.json only.
"""

from __future__ import annotations

import csv
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any

FILES = ("verdicts.csv", "summary.json", "tokens.jsonl", "run.json", "report.html")


def _clean(obj: Any) -> Any:
    """JSON-safe: NaN and infinities become null, numpy/pandas scalars become Python ones."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        try:
            obj = obj.item()
        except (ValueError, AttributeError):
            pass
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def dumps(obj: Any) -> str:
    return json.dumps(_clean(obj), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def atomic_write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp creates 0600; give the file the usual permissions
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def verdicts_csv(frame) -> str:
    # with "\n" line ends the csv module quotes a cell holding "\n" but not one holding a bare "\r",
    # which every CSV reader takes for a line end; when a cell has one, every cell is quoted
    bare_cr = any(frame[c].map(lambda x: isinstance(x, str) and "\r" in x).any() for c in frame.columns)
    return frame.to_csv(index=False, lineterminator="\n", quoting=csv.QUOTE_ALL if bare_cr else csv.QUOTE_MINIMAL)


def tokens_jsonl(tokens: list[dict[str, Any]]) -> str:
    return "".join(json.dumps(_clean(t), ensure_ascii=False, allow_nan=False) + "\n" for t in tokens)


def write_run(result, out_dir: str | os.PathLike, run_info: dict[str, Any] | None = None) -> Path:
    """Write the run's files under out_dir (created if needed) and return the folder."""
    out = Path(out_dir)
    texts = {
        "verdicts.csv": verdicts_csv(result.verdicts),
        "summary.json": dumps(result.summary),
        "tokens.jsonl": tokens_jsonl(result.tokens),
        "run.json": dumps(run_info or {}),
    }
    from .report import render_report

    html = render_report(result.summary, result.verdicts, result.tokens, run_info or {})
    for name, text in texts.items():
        atomic_write(out / name, text)
    atomic_write(out / "report.html", html)
    return out
