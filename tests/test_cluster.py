"""Scoring and decoding on a Ray cluster (triage.cluster) write the same files as one process.

One local Ray instance (2 CPUs, no dashboard; asked for 127.0.0.1, though Ray registers the node
under the host's own address) serves the whole module; each run's
workers are Ray actors of one CPU and one torch thread, like the test process (conftest sets
torch.set_num_threads(1)), so the single-process runs here are the reference bytes. Every wait
is bounded.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from tinymodels import save_marian, sentences

from triage.cli import main

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_data"
FILES = ("verdicts.csv", "summary.json", "tokens.jsonl")


def _same_files(a: Path, b: Path) -> None:
    for name in FILES:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name


def _env() -> dict[str, str]:
    return dict(os.environ, PYTHONPATH=str(ROOT))


def _cpus_freed(ray, cpus: float = 2, within: float = 60) -> bool:
    """Wait (bounded) until the cluster's CPUs are all free again: stopped workers give theirs back."""
    deadline = time.monotonic() + within
    while ray.available_resources().get("CPU", 0) < cpus:
        if time.monotonic() > deadline:
            return False
        time.sleep(0.1)
    return True


# --------------------------------------------------------------------------- without Ray
def test_a_plain_run_imports_no_ray(tmp_path, tiny_model_dir):
    # a fresh interpreter: the CLI imported and a plain run done, `ray` was never imported
    dev = tmp_path / "dev.tsv"
    src, ref, out = sentences(8, seed=1), sentences(8, seed=2), sentences(8, seed=3)
    dev.write_text("source\treference\toutput\n" + "".join(f"{s}\t{r}\t{o}\n" for s, r, o in zip(src, ref, out, strict=True)),
                   encoding="utf-8")
    code = ("import sys\nfrom triage.cli import main\nassert 'ray' not in sys.modules\n"
            f"rc = main(['run', '--model', {str(tiny_model_dir)!r}, '--data', {str(dev)!r}, '--out', "
            f"{str(tmp_path / 'out')!r}, '--quiet', '--no-cache'])\n"
            "print(rc, 'ray' in sys.modules, sorted(m for m in sys.modules if m.split('.')[0] == 'triage' "
            "and 'cluster' in m))\n")
    done = subprocess.run([sys.executable, "-c", code], env=_env(), capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split("\n")[-2] == "0 False []", done.stdout


def test_an_unreachable_cluster_is_one_line_and_exit_2(tmp_path, capsys, monkeypatch, tiny_model_dir):
    import socket

    import triage.cluster.connection as connection

    monkeypatch.setattr(connection, "PROBE_TIMEOUT_S", 1.0)
    with socket.socket() as s:  # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    dev = tmp_path / "dev.tsv"
    dev.write_text("source\treference\toutput\na b\tb c\tc d\n", encoding="utf-8")
    rc = main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(tmp_path / "o"), "--quiet",
               "--cluster", f"127.0.0.1:{port}"])
    err = capsys.readouterr().err
    assert rc == 2
    lines = [x for x in err.splitlines() if x.startswith("triage: error:")]
    assert len(lines) == 1 and f"cannot reach a Ray cluster at 127.0.0.1:{port}" in lines[0], err
    assert "Traceback" not in err and not (tmp_path / "o" / "verdicts.csv").exists()
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--workers", "2"]) == 2
    assert "--workers needs --cluster" in capsys.readouterr().err


# --------------------------------------------------------------------------- on a local Ray instance
@pytest.fixture(scope="module")
def ray_local():
    ray = pytest.importorskip("ray")
    ray.init(num_cpus=2, include_dashboard=False, _node_ip_address="127.0.0.1", log_to_driver=False,
             configure_logging=False)
    try:
        yield ray
    finally:
        ray.shutdown()


@pytest.fixture(scope="module")
def rules_model(tmp_path_factory):
    """A tiny checkpoint with a generation rule (no 2-gram twice): scoring takes the full-vector path."""
    return save_marian(tmp_path_factory.mktemp("rules") / "model", seed=5, num_beams=3, length_penalty=0.8,
                       max_new_tokens=14, no_repeat_ngram_size=2)


def _undecoded_devset(path: Path, n: int) -> Path:
    src, ref = sentences(n, seed=61), sentences(n, seed=62, lo=2, hi=7)
    rows = "".join(f"u{i}\t{s}\t{r}\n" for i, (s, r) in enumerate(zip(src, ref, strict=True)))
    path.write_text("id\tsource\treference\n" + rows, encoding="utf-8")
    return path


def test_the_demo_on_two_workers_writes_the_same_bytes(ray_local, tmp_path, capsys):
    base = ["run", "--model", str(DEMO / "model"), "--data", str(DEMO / "devset.tsv"), "--quiet", "--no-cache",
            "--threads", "1", "--chunk-rows", "150"]
    one, two = tmp_path / "one", tmp_path / "two"
    assert main([*base, "--out", str(one)]) == 0
    assert main([*base, "--out", str(two), "--cluster", "auto", "--workers", "2"]) == 0
    capsys.readouterr()
    _same_files(one, two)
    import json

    info = json.loads((two / "run.json").read_text())["cluster"]
    assert info["workers"] == 2 and info["threads_per_worker"] == 1 and info["batches_given_again"] == 0
    assert _cpus_freed(ray_local)  # the run's workers stopped


def test_one_pool_lent_to_several_runs(ray_local, tmp_path, rules_model):
    """Two workers holding the rules model, lent to the runs of the next two checks, then stopped
    (a pool holds its CPUs while it lives)."""
    from triage.cluster import connect

    cluster = connect("auto", workers=2)
    assert not cluster.started  # the module's Ray instance, left running
    with cluster.pool(str(rules_model)) as pool:
        _decoding_and_rules_on_the_workers_write_the_same_bytes(tmp_path / "decode", rules_model, pool)
        _sweeps_on_the_workers_write_the_same_files(tmp_path / "sweeps", rules_model, pool)
        assert len(pool.actors) == 2  # the pool outlives the runs it was lent to
    assert _cpus_freed(ray_local)


def _decoding_and_rules_on_the_workers_write_the_same_bytes(tmp_path, rules_model, rules_pool):
    # no outputs in the dev set: the workers decode them (transformers' generate for the power penalty,
    # triage's own beam search for gnmt), then score the failed rows with the generation rule applied
    from triage.run.pipeline import TriageOptions
    from triage.workflow import triage_run

    tmp_path.mkdir()
    dev = _undecoded_devset(tmp_path / "dev.tsv", 40)
    for penalty in ("power", "gnmt"):
        opts = TriageOptions(progress=False, chunk_rows=15, token_budget=256)
        a, b = tmp_path / f"a-{penalty}", tmp_path / f"b-{penalty}"
        here = triage_run(str(rules_model), dev, {"penalty": penalty}, opts, out=a)
        there = triage_run(str(rules_model), dev, {"penalty": penalty}, opts, out=b, cluster=rules_pool)
        _same_files(a, b)
        assert here.summary.data.outputs == "decoded by triage" and here.summary.failed > 10
        assert there.summary.counts == here.summary.counts


TIMED = ("seconds_per_row", "time_ratio")  # measured decode times: they differ between any two runs


def _untimed(value):
    if isinstance(value, dict):
        return {k: None if k in TIMED else _untimed(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_untimed(v) for v in value]
    return value


def _sweeps_on_the_workers_write_the_same_files(tmp_path, rules_model, rules_pool):
    # wider beams, the beam curve, re-decoding at other alphas and the outputs check: their decoding and
    # re-scoring go to the workers; the files equal one process's (summary.json once the measured
    # decode times are masked)
    import json

    from triage.run.pipeline import TriageOptions
    from triage.workflow import StudyPlan, triage_run

    tmp_path.mkdir()
    dev = _undecoded_devset(tmp_path / "dev.tsv", 30)
    plan = StudyPlan(widen=[4, 6], beam_curve=3, redecode_alpha=[0.2], where_lost=True)
    opts = TriageOptions(progress=False, chunk_rows=10, token_budget=256)
    a, b = tmp_path / "a", tmp_path / "b"
    batches = {"n": 0}
    real = rules_pool.decode_batches

    def counted(settings, shards):
        batches["n"] += len(shards)
        return real(settings, shards)

    rules_pool.decode_batches = counted
    try:
        here = triage_run(str(rules_model), dev, None, opts, studies=plan, out=a)
        triage_run(str(rules_model), dev, None, opts, studies=plan, out=b, cluster=rules_pool)
    finally:
        del rules_pool.decode_batches
    for name in ("verdicts.csv", "tokens.jsonl"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    sa, sb = (json.loads((p / "summary.json").read_text()) for p in (a, b))
    assert _untimed(sa) == _untimed(sb)
    assert sa["widen"]["widths"] and sa["beam_curve"]["points"] and here.summary.length_penalty is not None
    assert batches["n"] >= 8  # the dev set's, the widths', the curve's and the alphas' decoding went to the pool


def test_a_worker_killed_while_scoring_has_its_batch_given_to_another(ray_local, tmp_path, tiny_model_dir):
    from triage.cluster import connect
    from triage.models.loading import load_model
    from triage.scoring.scorer import ScoreRequest, plan_batches, score_batch

    model = load_model(str(tiny_model_dir))
    from triage.models.describe import model_settings

    settings = model_settings(model)
    src, ref, out = sentences(120, seed=21), sentences(120, seed=22), sentences(120, seed=23)
    requests = [ScoreRequest(s, [r, o], [False, False]) for s, r, o in
                zip(model.tokenize_sources(src), model.tokenize_targets(ref), model.tokenize_targets(out),
                    strict=True)]
    plan = plan_batches(model, settings, requests, token_budget=256)
    shards = [[requests[i] for i in b] for b in plan.batches]
    assert len(shards) >= 8
    expected = [score_batch(model, settings, s, plan.tree) for s in shards]

    with connect("auto", workers=2).pool(str(tiny_model_dir)) as pool:
        pids = pool.pids()
        results = pool.score_batches(settings, shards, plan.tree)
        got = [next(results)]
        busy = pool.busy_pids()  # the workers holding a batch right now
        assert busy, "no worker was scoring"
        os.kill(busy[0], signal.SIGKILL)
        got.extend(results)
        assert pool.lost_batches >= 1 and pool.replaced >= 1
        assert busy[0] in pids and busy[0] not in pool.pids()
    # every batch once, in order, with the numbers one process gives
    assert got == expected
    assert _cpus_freed(ray_local)  # the workers and the replacement stopped


def test_a_worker_that_cannot_load_the_model_names_node_and_path(ray_local, tmp_path):
    from triage.cluster import connect
    from triage.errors import ClusterError

    missing = tmp_path / "no-model-here"
    with pytest.raises(ClusterError) as err:
        connect("auto", workers=1).pool(str(missing))
    line = err.value.one_line()
    node = ray_local.util.get_node_ip_address()
    assert "\n" not in line and str(missing) in line and f"the worker on node {node} " in line, line
    assert _cpus_freed(ray_local)  # the failed pool's worker stopped


def test_ctrl_c_on_a_cluster_run_stops_the_workers_and_keeps_the_previous_files(ray_local, tmp_path):
    # a real `python -m triage run --cluster ADDRESS` joining this module's Ray instance gets SIGINT
    # while its workers score
    out = tmp_path / "out"
    out.mkdir()
    (out / "verdicts.csv").write_text("the previous run's verdicts\n", encoding="utf-8")
    dev = tmp_path / "dev.tsv"
    n = 1500
    src, ref, o = sentences(n, seed=31), sentences(n, seed=32), sentences(n, seed=33)
    dev.write_text("source\treference\toutput\n" + "".join(f"{a}\t{b}\t{c}\n" for a, b, c in zip(src, ref, o, strict=True)),
                   encoding="utf-8")
    address = ray_local.get_runtime_context().gcs_address
    args = [sys.executable, "-m", "triage", "run", "--model", str(DEMO / "model"), "--data", str(dev), "--out",
            str(out), "--quiet", "--threads", "1", "--chunk-rows", "20", "--cluster", address, "--workers", "2"]
    proc = subprocess.Popen(args, cwd=tmp_path, env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    db = out / ".cache" / "scores.sqlite"
    try:
        deadline = time.monotonic() + 180
        while not (db.is_file() and db.stat().st_size > 8192):  # a step scored on the workers and committed
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "scoring never started"
            time.sleep(0.1)
        assert ray_local.available_resources().get("CPU", 0) == 0  # its two workers hold both CPUs
        proc.send_signal(signal.SIGINT)
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 130, stderr
    assert "Traceback" not in stderr and "triage: interrupted after scoring" in stderr, stderr
    assert sorted(p.name for p in out.iterdir()) == [".cache", "verdicts.csv"]  # no temporary file left
    assert (out / "verdicts.csv").read_text(encoding="utf-8") == "the previous run's verdicts\n"
    assert _cpus_freed(ray_local), ray_local.available_resources()  # the workers stopped
