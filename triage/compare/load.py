"""Reading one run folder for a comparison: summary.json (through triage.rundir.reader, into a typed
Summary), verdicts.csv and run.json, checked.

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
from triage.run.summary import DataInfo, Summary
from triage.run.verdicts import VERDICTS
from triage.rundir.reader import read_run_info, read_summary

# the verdicts.csv columns a comparison reads (the metric's own column is checked by name below)
NEEDED_COLUMNS = ("id", "line", "verdict", "bucket", "source", "reference", "output")


class RunFolderError(TriageError):
    """A run folder, or one of its files, cannot be read as a run."""


@dataclass
class RunFolder:
    """One run's files as the comparison reads them."""

    path: Path
    summary: Summary
    verdicts: pd.DataFrame  # every cell text, as written ("" for an empty cell)
    run_info: dict[str, Any] = field(default_factory=dict)

    @property
    def metric(self) -> str:
        return str(self.summary.options.metric or self.summary.corpus_metric.name or "chrf")

    @property
    def settings(self) -> dict[str, Any]:
        return self.summary.settings

    @property
    def model(self) -> dict[str, Any]:
        return self.summary.model

    @property
    def data(self) -> DataInfo:
        return self.summary.data


def _read_json(path: Path, read):
    """read(folder) through the run-folder reader, its failures turned into one line about `path`."""
    try:
        return read(path.parent)
    except UnicodeDecodeError as exc:
        raise RunFolderError(f"not UTF-8 text (byte {exc.start})", path=str(path)) from None
    except json.JSONDecodeError as exc:
        raise RunFolderError(f"not valid JSON: {exc.msg} at column {exc.colno}", path=str(path),
                             line=exc.lineno) from None
    except KeyError as exc:
        raise RunFolderError(f"no {exc.args[0]!r} (a cut-off or edited file?)", path=str(path)) from None
    except (TypeError, ValueError, AttributeError) as exc:
        raise RunFolderError(f"not a run summary this version can read ({' '.join(str(exc).split())})",
                             path=str(path)) from None


def _summary(path: Path) -> Summary:
    if not path.is_file():
        raise RunFolderError("missing (not a run folder, or the run did not finish)", path=str(path))
    s = _read_json(path, read_summary)
    if not isinstance(s.data.sha256, str) or not s.data.sha256:
        raise RunFolderError("no data sha256 (the dev set it was run on is unknown)", path=str(path))
    if not isinstance(s.data.rows, int) or isinstance(s.data.rows, bool) or s.data.rows < 0:
        raise RunFolderError(f"data.rows should be a row count, found {s.data.rows!r}", path=str(path))
    if not isinstance(s.settings, dict):
        raise RunFolderError("settings should be an object", path=str(path))
    for verdict, n in s.counts.items():
        if verdict not in VERDICTS or not isinstance(n, int) or isinstance(n, bool) or n < 0:
            raise RunFolderError(f"counts.{verdict} = {n!r} is not a verdict count", path=str(path))
    return s


def _run_info(path: Path) -> dict[str, Any]:
    info = _read_json(path, read_run_info)
    if not isinstance(info, dict):
        raise RunFolderError(f"expected a JSON object, found {type(info).__name__}", path=str(path))
    return info


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
    summary = _summary(folder / "summary.json")
    run_info = _run_info(folder / "run.json")
    rf = RunFolder(folder, summary, pd.DataFrame(), run_info)
    verdicts_path = folder / "verdicts.csv"
    frame = _read_verdicts(verdicts_path, rf.metric)
    rows = summary.data.rows
    if len(frame) != rows:
        raise RunFolderError(f"{len(frame)} rows, but summary.json says the dev set has {rows} "
                             "(a cut-off or mixed-up file?)", path=str(verdicts_path))
    seen = frame["verdict"].value_counts()
    for verdict in VERDICTS:
        said = int(summary.counts.get(verdict, 0))
        if int(seen.get(verdict, 0)) != said:
            raise RunFolderError(f"{int(seen.get(verdict, 0))} rows are {verdict!r}, but summary.json counts "
                                 f"{said} (the two files come from different runs?)", path=str(verdicts_path))
    rf.verdicts = frame
    return rf
