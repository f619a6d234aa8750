"""One process against Ray workers on the same run (``triage bench --cluster``, ``--json``).

The run: sample_data's model and dev set (400 rows, given outputs, about a quarter failed) with a
sweep (``--widen`` to the given widths: every compared failed row decoded again at the current
width and each wider one, and re-scored), through triage.workflow.triage_run, writing a run folder
and no score cache. Four ways, interleaved round by round:

- single-process, 1 torch thread;  single-process, 2 torch threads;
- cluster, 1 worker;  cluster, 2 workers (each worker a Ray actor with num_cpus=1 and 1 torch thread;
  the driver on 1 thread).

Ray is started once before the rounds (its start is printed as ray_start_s), and each cluster
run's workers are started and load the model before its clock starts (printed as worker_start_s):
the times compare the same work, not start-up. Keys: cluster_overhead_1 = 1-worker time /
single-process 1-thread time; cluster_speedup_2 = 1-worker time / 2-worker time;
cluster_vs_threads = single-process 2-thread time / 2-worker time (above 1: the processes beat
the threads); cluster_identical = the 2-worker run's verdicts.csv and tokens.jsonl equal the
1-thread single-process run's byte for byte, and its summary.json too once the measured decode
times (seconds_per_row, time_ratio) are masked. Medians over the rounds.

    python -m benchmarks.bench_cluster [--json] [--rounds K] [--widen 4,8] [--rows N]
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from benchmarks.bench import SAMPLE_MODEL

SAMPLE_DEVSET = SAMPLE_MODEL.parent / "devset.tsv"
WAYS = ("single_1_thread", "single_2_threads", "cluster_1_worker", "cluster_2_workers")
TIMED_KEYS = ("seconds_per_row", "time_ratio")


def _mask(value: Any) -> Any:
    """summary.json with its measured decode times blanked (they differ between any two runs)."""
    if isinstance(value, dict):
        return {k: None if k in TIMED_KEYS else _mask(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_mask(v) for v in value]
    return value


def same_files(a: Path, b: Path) -> bool:
    for name in ("verdicts.csv", "tokens.jsonl"):
        if (a / name).read_bytes() != (b / name).read_bytes():
            return False
    load = lambda p: _mask(json.loads((p / "summary.json").read_text(encoding="utf-8")))  # noqa: E731
    return load(a) == load(b)


def _devset(path: Path, rows: int | None) -> Path:
    if rows is None:
        return SAMPLE_DEVSET
    header, *lines = SAMPLE_DEVSET.read_text(encoding="utf-8").splitlines()
    path.write_text("\n".join([header, *lines[:rows]]) + "\n", encoding="utf-8")
    return path


def run(rounds: int = 2, widen: str = "4,8", rows: int | None = None, log=print) -> dict[str, Any]:
    import ray
    import torch

    from triage.cluster import connect
    from triage.run.pipeline import TriageOptions
    from triage.workflow import StudyPlan, triage_run

    spec = str(SAMPLE_MODEL)
    times: dict[str, list[float]] = {w: [] for w in WAYS}
    starts: dict[str, list[float]] = {"cluster_1_worker": [], "cluster_2_workers": []}
    t0 = time.perf_counter()
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False, configure_logging=False)
    ray_start = time.perf_counter() - t0
    identical = True
    try:
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp)
            data = _devset(folder / "dev.tsv", rows)
            options = TriageOptions(progress=False)
            plan = StudyPlan(widen=widen)
            for r in range(rounds):
                outs: dict[str, Path] = {}
                for way in WAYS:
                    out = outs[way] = folder / f"{way}-{r}"
                    torch.set_num_threads(2 if way == "single_2_threads" else 1)
                    pool = None
                    if way.startswith("cluster"):
                        t = time.perf_counter()
                        pool = connect("auto", workers=1 if way == "cluster_1_worker" else 2).pool(spec)
                        starts[way].append(time.perf_counter() - t)
                    try:
                        t = time.perf_counter()
                        outcome = triage_run(spec, data, None, options, studies=plan, out=out, cluster=pool)
                        times[way].append(time.perf_counter() - t)
                    finally:
                        if pool is not None:
                            pool.close()
                            _wait_free(ray, 2)
                    log(f"round {r + 1} {way}: {times[way][-1]:.2f} s"
                        + (f" (workers started in {starts[way][-1]:.1f} s)" if way in starts else ""))
                identical = identical and same_files(outs["single_1_thread"], outs["cluster_2_workers"])
            rows_n = outcome.summary.data.rows
            compared = outcome.summary.widen.rows.redecoded if outcome.summary.widen else 0
    finally:
        ray.shutdown()
    med = {w: statistics.median(v) for w, v in times.items()}
    return {
        "rows": rows_n, "redecoded_rows": compared, "widen": widen, "rounds": rounds,
        "seconds": {w: round(med[w], 3) for w in WAYS},
        "seconds_all": {w: [round(x, 3) for x in v] for w, v in times.items()},
        "ray_start_s": round(ray_start, 2),
        "worker_start_s": {w: round(statistics.median(v), 2) for w, v in starts.items()},
        "cluster_overhead_1": round(med["cluster_1_worker"] / med["single_1_thread"], 3),
        "cluster_speedup_2": round(med["cluster_1_worker"] / med["cluster_2_workers"], 3),
        "cluster_vs_threads": round(med["single_2_threads"] / med["cluster_2_workers"], 3),
        "cluster_identical": identical,
    }


def _wait_free(ray, cpus: float, within: float = 60.0) -> None:
    """Until the stopped workers' CPUs are back (bounded), so the next run's workers can start."""
    deadline = time.monotonic() + within
    while ray.available_resources().get("CPU", 0) < cpus and time.monotonic() < deadline:
        time.sleep(0.1)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="triage bench --cluster", description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of lines")
    ap.add_argument("--rounds", type=int, default=2, help="interleaved rounds of the four ways (default 2)")
    ap.add_argument("--widen", default="4,8", help="the sweep's widths (default 4,8)")
    ap.add_argument("--rows", type=int, default=None, help="first N rows of the dev set (default all 400)")
    a = ap.parse_args(argv)
    log = (lambda *_: None) if a.json else (lambda s: print(s, flush=True))
    res = run(a.rounds, a.widen, a.rows, log)
    if a.json:
        print(json.dumps(res))
    else:
        for k in ("cluster_overhead_1", "cluster_speedup_2", "cluster_vs_threads", "cluster_identical"):
            print(f"{k}: {res[k]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
