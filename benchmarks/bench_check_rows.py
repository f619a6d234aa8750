"""What the outputs check (--check-rows) costs on the demo: `triage run` on sample_data/ with
--check-rows 0 and with --check-rows N, each run its own process (start-up, model load, scoring,
the check and the files, as a user pays them). With --find-settings, what `--find-settings` adds
to a run with the default check instead.

Each round runs the two back to back, in alternating order (so a change of load on a shared
machine hits both alike). Prints, side by side, the median wall time and the median CPU time
(user + system of the child process: less sensitive to other work on the machine) of each, and
for both the median of the rounds' own ratios.

    python -m benchmarks.bench_check_rows [--repeat K] [--rows N] [--threads T] [--find-settings]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _run(extra: list[str], out: Path, threads: int | None) -> tuple[float, float]:
    """One `triage run` on the demo: (wall seconds, CPU seconds of the child)."""
    cmd = [sys.executable, "-m", "triage", "run", "--model", str(ROOT / "sample_data/model"),
           "--data", str(ROOT / "sample_data/devset.tsv"), "--out", str(out), "--no-cache", "--quiet", *extra]
    if threads:
        cmd += ["--threads", str(threads)]
    before = os.times()
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    after = os.times()
    return wall, (after.children_user - before.children_user) + (after.children_system - before.children_system)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeat", type=int, default=7)
    p.add_argument("--rows", type=int, default=16, help="--check-rows of the run with the check (default 16)")
    p.add_argument("--threads", type=int, default=None)
    p.add_argument("--find-settings", action="store_true",
                   help="time --find-settings instead (both runs with --check-rows N)")
    a = p.parse_args(argv)
    if a.find_settings:
        base, name_a = ["--check-rows", str(a.rows)], "without --find-settings"
        more, name_b = ["--check-rows", str(a.rows), "--find-settings"], "with --find-settings"
    else:
        base, name_a = ["--check-rows", "0"], "--check-rows 0"
        more, name_b = ["--check-rows", str(a.rows)], f"--check-rows {a.rows}"
    runs: dict[str, list[tuple[float, float]]] = {"a": [], "b": []}
    with tempfile.TemporaryDirectory() as tmp:
        _run(base, Path(tmp) / "warm", a.threads)  # the first run reads the files from disk: not timed
        for k in range(a.repeat):
            order = ("a", "b") if k % 2 == 0 else ("b", "a")
            for which in order:
                runs[which].append(_run(base if which == "a" else more, Path(tmp) / f"{which}{k}", a.threads))
            (wa, ca), (wb, cb) = runs["a"][-1], runs["b"][-1]
            print(f"round {k + 1}: {name_a} {wa:.2f} s wall, {ca:.2f} s CPU | {name_b} {wb:.2f} s wall, "
                  f"{cb:.2f} s CPU", flush=True)
    for label, j in (("wall", 0), ("CPU", 1)):
        xa = [r[j] for r in runs["a"]]
        xb = [r[j] for r in runs["b"]]
        paired = statistics.median(b / a_ for a_, b in zip(xa, xb, strict=True))
        print(f"{label}: median {name_a} {statistics.median(xa):.2f} s | {name_b} {statistics.median(xb):.2f} s | "
              f"median of the rounds' ratios {paired:.3f} (cost {paired - 1:+.1%})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
