"""Peak memory of a run as the dev set grows (``python -m benchmarks.bench_memory``).

Writes, under a temporary folder, dev sets of N and 10*N rows made from the rows of
sample_data/devset.tsv (same share of failed rows), and measures, side by side in one
invocation, the peak resident set of:

- streamed: ``python -m triage run --model sample_data/model --data X --out Y --quiet --threads 1
  --page-rows 20`` (no sweep and no --where-lost/--exact, so the CLI reads, scores and writes step
  by step);
- in memory: a child that calls triage.read_devset, triage.run_triage (keep=True, every row
  kept) and triage.write_run on the same file, the same step size and the same score cache.

Each run is its own child process. Its peak RSS is VmHWM, read from /proc/<pid>/status every
20 ms while it runs (the high-water mark of the child's own image); the ru_maxrss that
os.wait4 returns for that one child is shown beside it as a check. Every copy of a sample row
gets a unique id and its copy number at the end of its source, so no two rows are alike:
the score cache (on, as in a default run) never hits and every failed row is scored.

N = 2,000 with 1,000 rows per step (the CLI's default), about 2 minutes on 2 cores; --quick:
N = 400 with 200 rows per step, under a minute. --repeat K runs K rounds and reports medians.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from benchmarks.bench import SAMPLE_MODEL

SAMPLE_DEVSET = SAMPLE_MODEL.parent / "devset.tsv"
MODES = ("streamed", "in memory")


def vmhwm_mb(status_text: str) -> float | None:
    """The VmHWM line of a /proc/<pid>/status text in MB, or None when absent (a finished process)."""
    for line in status_text.splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return None


def write_devset(path: Path, rows: int, sample: Path = SAMPLE_DEVSET) -> None:
    """A TSV dev set of `rows` rows: the sample's rows over and over, row i of copy k with the id
    ``<id>-<k>`` and `` <k>`` after its source (references and outputs unchanged)."""
    header, *lines = sample.read_text(encoding="utf-8").splitlines()
    with path.open("w", encoding="utf-8", newline="\n") as fh:
        fh.write(header + "\n")
        for i in range(rows):
            copy = i // len(lines)
            row_id, source, *rest = lines[i % len(lines)].split("\t")
            fh.write("\t".join([f"{row_id}-{copy}", f"{source} {copy}", *rest]) + "\n")


def measure(cmd: list[str], log_path: Path, timeout: float = 900) -> dict[str, Any]:
    """Run cmd in a child (output to log_path); wall seconds, polled VmHWM and wait4's ru_maxrss in MB."""
    t0 = time.perf_counter()
    with log_path.open("w") as log:
        proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT)
    status = Path(f"/proc/{proc.pid}/status")
    peak = 0.0
    while True:
        try:
            peak = max(peak, vmhwm_mb(status.read_text()) or 0.0)
        except OSError:
            pass
        pid, wstatus, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            break
        if time.perf_counter() - t0 > timeout:
            proc.kill()
        time.sleep(0.02)
    proc.returncode = os.waitstatus_to_exitcode(wstatus)
    if proc.returncode != 0:
        tail = log_path.read_text(errors="replace").strip().splitlines()[-3:]
        raise RuntimeError(f"{' '.join(cmd[:4])} ... exited {proc.returncode}: {tail}")
    return {"seconds": time.perf_counter() - t0, "peak_mb": peak, "ru_maxrss_mb": usage.ru_maxrss / 1024}


PAGE_ROWS = 20  # failed rows per verdict in report.html: small, so the page is the same size at N and 10*N


def _in_memory_worker(model_dir: str, data: str, out: str, chunk_rows: int) -> None:
    import torch

    torch.set_num_threads(1)
    import triage
    from triage.models.describe import model_info
    from triage.run.pipeline import TriageOptions

    model = triage.load_model(model_dir)
    dev = triage.read_devset(data)
    options = TriageOptions(progress=False, chunk_rows=chunk_rows, cache_dir=str(Path(out) / ".cache"))
    result = triage.run_triage(model, dev, options=options, model_info=model_info(model, model_dir))
    triage.write_run(result, out, {"command": "bench_memory in-memory baseline"}, page_rows=PAGE_ROWS)


def _command(mode: str, data: Path, out: Path, chunk_rows: int) -> list[str]:
    if mode == "streamed":
        return [sys.executable, "-m", "triage", "run", "--model", str(SAMPLE_MODEL), "--data", str(data),
                "--out", str(out), "--quiet", "--threads", "1", "--chunk-rows", str(chunk_rows),
                "--page-rows", str(PAGE_ROWS)]
    return [sys.executable, "-m", "benchmarks.bench_memory", "--in-memory-worker", str(SAMPLE_MODEL), str(data),
            str(out), str(chunk_rows)]


def run(n: int = 2000, chunk_rows: int = 1000, repeat: int = 1, log=print) -> dict[str, Any]:
    sizes = (n, 10 * n)
    runs: list[dict[str, Any]] = []
    log(f"triage bench_memory: dev sets of {sizes[0]:,} and {sizes[1]:,} rows from {SAMPLE_DEVSET.name} "
        f"(rows repeated, ids and sources made unique: the score cache is on but never hits, "
        f"every failed row is scored); {chunk_rows} rows per step; 1 torch thread; {repeat} round(s)")
    with tempfile.TemporaryDirectory(prefix="triage-bench-memory-") as tmp:
        for rows in sizes:
            write_devset(Path(tmp) / f"dev{rows}.tsv", rows)
        for k in range(repeat):  # rounds: every size and mode once per round, side by side
            for rows in sizes:
                for mode in MODES:
                    out = Path(tmp) / f"out{rows}-{mode.replace(' ', '-')}-{k}"  # fresh folder: empty cache
                    m = measure(_command(mode, Path(tmp) / f"dev{rows}.tsv", out, chunk_rows),
                                Path(tmp) / f"{out.name}.log")
                    summary = json.loads((out / "summary.json").read_text())
                    if summary["data"]["rows"] != rows:
                        raise RuntimeError(f"{mode} run of {rows} rows reported {summary['data']['rows']} rows")
                    counts = summary["counts"]
                    runs.append({"rows": rows, "mode": mode, "round": k, "failed": rows - counts["correct"],
                                 "counts": counts, **m})
                    log(f"  {rows:>7,} rows  {mode:<9}  {runs[-1]['failed']:>6,} failed  {m['seconds']:6.1f} s  "
                        f"peak {m['peak_mb']:5.0f} MB  (wait4 {m['ru_maxrss_mb']:.0f} MB)")
    table = []
    for rows in sizes:
        for mode in MODES:
            mine = [r for r in runs if r["rows"] == rows and r["mode"] == mode]
            peaks = [r["peak_mb"] for r in mine]
            table.append({"rows": rows, "mode": mode, "failed": mine[0]["failed"],
                          "seconds": statistics.median(r["seconds"] for r in mine),
                          "peak_mb": statistics.median(peaks), "peak_mb_min": min(peaks), "peak_mb_max": max(peaks)})
    per_mode = {}
    for mode in MODES:
        small, big = (next(t for t in table if t["rows"] == s and t["mode"] == mode) for s in sizes)
        per_mode[mode] = {"peak_ratio": big["peak_mb"] / small["peak_mb"],
                          "mb_per_1000_rows": 1000 * (big["peak_mb"] - small["peak_mb"]) / (sizes[1] - sizes[0])}
    what = "median of the rounds, range in brackets" if repeat > 1 else "one run each"
    log(f"\n{'rows':>7}  {'mode':<9}  {'failed':>6}  {'wall s':>6}  peak RSS MB ({what})")
    for t in table:
        spread = f"  [{t['peak_mb_min']:.0f}-{t['peak_mb_max']:.0f}]" if repeat > 1 else ""
        log(f"{t['rows']:>7}  {t['mode']:<9}  {t['failed']:>6}  {t['seconds']:>6.1f}  {t['peak_mb']:>6.0f}{spread}")
    for mode, x in per_mode.items():
        log(f"{mode:<9}: peak({sizes[1]})/peak({sizes[0]}) = {x['peak_ratio']:.2f}x, "
            f"{x['mb_per_1000_rows']:+.1f} MB per 1,000 extra rows")
    log(f"note: report.html lists {PAGE_ROWS} failed rows per verdict in both modes (--page-rows), so the page "
        f"weighs the same at both sizes; at the default of 1,000 it grows until each verdict has 1,000 rows")
    return {"sizes": list(sizes), "chunk_rows": chunk_rows, "threads": 1, "rounds": repeat,
            "cache": "on, never hits (every row unique)", "page_rows_per_verdict": PAGE_ROWS,
            "table": table, "per_mode": per_mode, "runs": runs}


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.bench_memory",
                                 description="Peak RSS of a run at N and 10*N rows, streamed CLI beside an "
                                 "in-memory baseline, each in its own child process.")
    ap.add_argument("--quick", action="store_true", help="N = 400 and 200 rows per step")
    ap.add_argument("--rows", type=int, default=None, help="N (default 2,000; 400 with --quick)")
    ap.add_argument("--chunk-rows", type=int, default=None,
                    help="rows per step in both modes (default 1000, the CLI's default; 200 with --quick)")
    ap.add_argument("--repeat", type=int, default=1, help="rounds of the four runs; medians reported (default 1)")
    ap.add_argument("--json", metavar="FILE", help="also write the numbers to FILE as JSON")
    ap.add_argument("--in-memory-worker", nargs=4, metavar=("MODEL", "DATA", "OUT", "CHUNK"), help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if min(a.repeat, a.rows or 1, a.chunk_rows or 1) < 1:
        ap.error("--repeat, --rows and --chunk-rows must be at least 1")
    if a.in_memory_worker:
        model_dir, data, out, chunk = a.in_memory_worker
        _in_memory_worker(model_dir, data, out, int(chunk))
        return 0
    # --quick keeps N at two steps or more, so both sizes run full-size steps
    res = run(n=a.rows or (400 if a.quick else 2000), chunk_rows=a.chunk_rows or (200 if a.quick else 1000),
              repeat=a.repeat,
              log=lambda s: print(s, flush=True))
    if a.json:
        Path(a.json).write_text(json.dumps(res, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
