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
import signal
import tempfile
from pathlib import Path
from typing import Any

from triage.decision import recommend
from triage.errors import OptionError
from triage.run.summary import Summary

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


def check_out_dir(out_dir: Path) -> None:
    """Refuse an output folder that cannot be made or written, without making it yet."""
    there = out_dir
    while not there.exists() and there != there.parent:
        there = there.parent
    if not there.is_dir():
        raise OptionError(f"--out {out_dir}: cannot make the folder, {there} is a file")
    if not os.access(there, os.W_OK | os.X_OK):
        raise OptionError(f"--out {out_dir}: no permission to write in {there}")


def _open_temp(folder: Path, name: str) -> tuple[str, Any]:
    """A new temporary file beside `folder / name` (named .<name>.<random>.tmp) and its text handle."""
    folder.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{name}.", suffix=".tmp")
    return tmp, os.fdopen(fd, "w", encoding="utf-8", newline="")


def _publish(tmp: str, path: Path) -> None:
    """Rename a closed temporary file into place, with the usual permissions (mkstemp makes it 0600)."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    os.replace(tmp, path)


def atomic_write(path: Path, text: str) -> None:
    tmp, fh = _open_temp(path.parent, path.name)
    try:
        with fh:
            fh.write(text)
        _publish(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def verdicts_csv(frame, header: bool = True) -> str:
    """Rows of verdicts.csv. With "\n" line ends the csv module quotes a cell holding "\n" but
    not one holding a bare "\r", which every CSV reader takes for a line end: a row with one has
    every cell quoted (decided row by row, so the bytes do not depend on how rows were grouped)."""
    cr = frame.apply(lambda col: col.map(lambda x: isinstance(x, str) and "\r" in x)).any(axis=1).tolist() \
        if len(frame) and len(frame.columns) else []
    if not any(cr):
        return frame.to_csv(index=False, header=header, lineterminator="\n")
    parts = [frame.iloc[:0].to_csv(index=False, lineterminator="\n")] if header else []
    start = 0
    for k in range(1, len(cr) + 1):
        if k == len(cr) or cr[k] != cr[start]:
            parts.append(frame.iloc[start:k].to_csv(index=False, header=False, lineterminator="\n",
                                                    quoting=csv.QUOTE_ALL if cr[start] else csv.QUOTE_MINIMAL))
            start = k
    return "".join(parts)


def tokens_jsonl(tokens: list[dict[str, Any]]) -> str:
    return "".join(json.dumps(_clean(t), ensure_ascii=False, allow_nan=False) + "\n" for t in tokens)


class RunWriter:
    """Writes a run folder as the rows arrive (its add_step is an on_step hook of pipeline.run_triage).

    verdicts.csv and tokens.jsonl are appended part by part to temporary files beside their
    final names; the report keeps only what its page shows (report.PageRows). finish() writes
    summary.json, run.json and report.html, then renames every file into place. Until then the
    previous run's files stay as they were; leaving a with-block by an exception (Ctrl-C, a bad
    row far into the file) removes the temporary files.

        with RunWriter(out_dir) as writer:
            result = run_triage(model, stream, keep=False, on_step=writer.add_step)
            writer.finish(result.summary, run_info)
    """

    def __init__(self, out_dir: str | os.PathLike, page_rows: int | None = None):
        from triage.report.page import PageRows

        self.out = Path(out_dir)
        self.page = PageRows(page_rows)  # failed rows per verdict the page lists (None: the default)
        self._files: dict[str, tuple[str, Any]] = {}  # final name -> (temporary path, open handle)
        self._header = True
        self._sweep()  # temporary files of a run killed outright (SIGKILL, power loss) go now

    def _temp(self, name: str):
        if name not in self._files:
            self._files[name] = _open_temp(self.out, name)
        return self._files[name][1]

    def add(self, verdicts, tokens: list[dict[str, Any]]) -> None:
        self._temp("verdicts.csv").write(verdicts_csv(verdicts, header=self._header))
        self._header = False
        self._temp("tokens.jsonl").write(tokens_jsonl(tokens))
        self.page.add(verdicts, tokens)

    def add_step(self, part) -> None:
        """A pipeline step (pipeline.ChunkResult), as run_triage's on_step hands it over."""
        self.add(part.verdicts, part.tokens)

    def finish(self, summary: Summary, run_info: dict[str, Any] | None = None) -> Path:
        """Write summary.json, run.json and report.html and move every file into place. A summary
        whose recommendation is not decided yet (a run_triage result) gets it decided here."""
        from triage.report.page import render_page

        if summary.recommendation is None:
            summary.recommendation = recommend(summary)
        run_info = run_info or {}
        self._temp("verdicts.csv")
        self._temp("tokens.jsonl")
        for name, text in (("summary.json", dumps(summary.to_json())), ("run.json", dumps(run_info)),
                           ("report.html", render_page(summary, self.page, run_info))):
            self._temp(name).write(text)
        for _, fh in self._files.values():
            fh.close()
        # the renames go through together: a stop signal arriving meanwhile takes effect after them
        stops = {signal.SIGINT, signal.SIGTERM, signal.SIGHUP}
        before = signal.pthread_sigmask(signal.SIG_BLOCK, stops)
        try:
            for name in FILES:  # in this order: the report, which reads the others, lands last
                _publish(self._files[name][0], self.out / name)
            self._files.clear()
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, before)
        return self.out

    def abort(self) -> None:
        for _, fh in self._files.values():
            fh.close()
        self._files.clear()
        self._sweep()  # by name, so a file made just as a stop signal came (not yet in _files) goes too

    def _sweep(self) -> None:
        """Remove this folder's temporary run files (only the names RunWriter and atomic_write give them)."""
        if self.out.is_dir():
            for name in FILES:
                for stale in self.out.glob(f".{name}.*.tmp"):
                    stale.unlink(missing_ok=True)

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.abort()  # after finish() there is nothing left to remove


def write_run(result, out_dir: str | os.PathLike, run_info: dict[str, Any] | None = None,
              page_rows: int | None = None) -> Path:
    """Write the run's files under out_dir (created if needed) and return the folder."""
    with RunWriter(out_dir, page_rows) as writer:
        writer.add(result.verdicts, result.tokens)
        return writer.finish(result.summary, run_info)
