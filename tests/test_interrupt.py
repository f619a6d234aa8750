"""Ctrl-C while scoring, as a user meets it: a real `python -m triage run` process gets SIGINT.

Expected: exit code 130, a message saying how far scoring got, the previous run's files
untouched (byte for byte), no temporary files; a rerun takes the scored rows from the cache
and writes the same files a clean run writes.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from tinymodels import sentences

from triage.cli import main

ROOT = Path(__file__).resolve().parent.parent
N_ROWS = 600
DETERMINISTIC = ("verdicts.csv", "summary.json", "tokens.jsonl")


def _write_devset(path: Path, n: int, seed: int) -> Path:
    src, ref, out = sentences(n, seed=seed), sentences(n, seed=seed + 1), sentences(n, seed=seed + 2)
    with open(path, "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\toutput\n")
        for i in range(n):
            f.write(f"r{i}\t{src[i]}\t{ref[i]}\t{out[i]}\n")
    return path


def _cached_rows(db: Path) -> int:
    if not db.is_file():
        return 0
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=0.1)
        try:
            return con.execute("SELECT COUNT(*) FROM scores").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:  # table not created yet, or the writer holds a lock
        return 0


def _signal_while_scoring(args: list[str], db: Path, cwd: Path, sig: int) -> tuple[int, str]:
    """Run `python -m triage *args`, send `sig` once the score cache holds a step; (exit code, stderr)."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "triage", *args], cwd=cwd, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while _cached_rows(db) == 0:  # wait until scoring has committed a step
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "scoring never started"
            time.sleep(0.05)
        proc.send_signal(sig)
        _, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    return proc.returncode, stderr


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}


def test_sigint_while_scoring_then_rerun_from_cache(tmp_path, capsys, tiny_model_dir):
    out = tmp_path / "out"
    # the previous run: a small dev set, written without a cache
    small = _write_devset(tmp_path / "small.tsv", 12, seed=40)
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(small), "--out", str(out), "--quiet",
                 "--no-cache"]) == 0
    before = _snapshot(out)
    assert set(before) == {"verdicts.csv", "summary.json", "tokens.jsonl", "run.json", "report.html"}

    big = _write_devset(tmp_path / "big.tsv", N_ROWS, seed=1)
    # the subprocess runs on one thread like the test process: float32 results depend in their last bits on
    # the thread count and on which rows share a batch
    batching = ["--token-budget", "32", "--chunk-rows", "10", "--threads", "1"]
    args = ["run", "--model", str(tiny_model_dir), "--data", str(big), "--out", str(out), "--quiet", *batching]
    db = out / ".cache" / "scores.sqlite"
    returncode, stderr = _signal_while_scoring(args, db, tmp_path, signal.SIGINT)
    assert returncode == 130, stderr
    assert "Traceback" not in stderr
    msg = [line for line in stderr.splitlines() if line.startswith("triage: interrupted")]
    assert len(msg) == 1, stderr
    # "interrupted after scoring N failed rows in the first M of 600 rows" (every row fails: outputs differ
    # from references, so N == M)
    words = msg[0].split()
    done = int(words[words.index("scoring") + 1])
    first = int(words[words.index("first") + 1])
    assert f"failed rows in the first {first} of {N_ROWS} rows" in msg[0] and 0 < done == first < N_ROWS
    assert "previous outputs are left as they were" in msg[0]
    assert _snapshot(out) == before  # previous run's files byte-identical, nothing added beside them
    assert sorted(p.name for p in out.iterdir()) == sorted([*before, ".cache"])
    assert sorted(p.name for p in (out / ".cache").iterdir()) == ["scores.sqlite"]  # no journal or temp file
    in_cache = _cached_rows(db)
    assert in_cache >= done > 0

    # rerun: the rows scored before the interrupt come from the cache
    capsys.readouterr()
    assert main(args) == 0
    printed = capsys.readouterr().out
    line = next(x for x in printed.splitlines() if "rows from the cache" in x)
    hits = int(line.split("scores:")[1].split()[0])
    scored = int(line.split(",")[1].split()[0])
    assert hits == in_cache and hits > 0 and hits + scored == N_ROWS

    # a clean run with the same batching (the cache commits whole chunks, so a resumed run batches as a clean one)
    clean = tmp_path / "clean"
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(big), "--out", str(clean), "--quiet",
                 *batching, "--no-cache"]) == 0
    for name in DETERMINISTIC:
        assert (out / name).read_bytes() == (clean / name).read_bytes(), name
    assert not [p for p in out.iterdir() if p.name.endswith(".tmp")]


def test_sigterm_while_scoring_stops_like_ctrl_c(tmp_path, tiny_model_dir):
    # a timeout, a closed terminal or a cancelled job sends SIGTERM or SIGHUP: the run must clean up as on
    # Ctrl-C (exit 128 + 15 by the shell's convention), not leave its half-written files in the folder
    out = tmp_path / "out"
    out.mkdir()
    (out / "verdicts.csv").write_text("the previous run's verdicts\n", encoding="utf-8")
    big = _write_devset(tmp_path / "big.tsv", N_ROWS, seed=3)
    args = ["run", "--model", str(tiny_model_dir), "--data", str(big), "--out", str(out), "--quiet",
            "--token-budget", "32", "--chunk-rows", "10", "--threads", "1"]
    # by the time a step is in the cache, the temporary output files hold its rows
    returncode, stderr = _signal_while_scoring(args, out / ".cache" / "scores.sqlite", tmp_path, signal.SIGTERM)
    assert returncode == 128 + signal.SIGTERM, stderr
    assert "Traceback" not in stderr and "triage: interrupted after scoring" in stderr
    assert sorted(p.name for p in out.iterdir()) == [".cache", "verdicts.csv"]  # no temporary file left
    assert (out / "verdicts.csv").read_text(encoding="utf-8") == "the previous run's verdicts\n"
