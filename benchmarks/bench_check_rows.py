"""What the outputs check (--check-rows) costs on the demo: `triage run` on sample_data/ with
--check-rows 0 and with --check-rows N, interleaved, each run its own process (start-up, model
load, scoring, the check and the files, as a user pays them). Prints the median wall time of
each, side by side, and their ratio.

    python -m benchmarks.bench_check_rows [--repeat K] [--rows N] [--threads T]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _run(rows: int, out: Path, threads: int | None) -> float:
    cmd = [sys.executable, "-m", "triage", "run", "--model", str(ROOT / "sample_data/model"),
           "--data", str(ROOT / "sample_data/devset.tsv"), "--out", str(out), "--no-cache", "--quiet",
           "--check-rows", str(rows)]
    if threads:
        cmd += ["--threads", str(threads)]
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeat", type=int, default=5)
    p.add_argument("--rows", type=int, default=16)
    p.add_argument("--threads", type=int, default=None)
    a = p.parse_args(argv)
    off, on = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(a.repeat):
            off.append(_run(0, Path(tmp) / f"off{k}", a.threads))
            on.append(_run(a.rows, Path(tmp) / f"on{k}", a.threads))
            print(f"round {k + 1}: off {off[-1]:.2f} s, on {on[-1]:.2f} s", flush=True)
    m_off, m_on = statistics.median(off), statistics.median(on)
    print(f"median: --check-rows 0 {m_off:.2f} s | --check-rows {a.rows} {m_on:.2f} s | "
          f"ratio {m_on / m_off:.3f} (cost {m_on / m_off - 1:+.1%})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
