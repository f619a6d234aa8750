"""Same inputs, same files: verdicts.csv, summary.json and tokens.jsonl are byte-identical across
runs and when the scores come from the cache; run.json (date, timings) is the only file that may differ."""

from __future__ import annotations

import json

from tinymodels import sentences

from triage.cli import main

DETERMINISTIC = ("verdicts.csv", "summary.json", "tokens.jsonl")


def _devset(path, n=60):
    src, ref, out = sentences(n, seed=11), sentences(n, seed=12), sentences(n, seed=13)
    out[::5] = ref[::5]  # some correct rows
    ref[3] = ref[3] + ' "quoted", tab-free, ü'  # unknown words: a skipped row
    with open(path, "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\toutput\n")
        for i in range(n):
            f.write(f"r{i}\t{src[i]}\t{ref[i]}\t{out[i]}\n")
    return path


def test_two_runs_and_a_cached_rerun_are_byte_identical(tmp_path, capsys, tiny_model_dir):
    dev = _devset(tmp_path / "dev.tsv")
    base = ["run", "--model", str(tiny_model_dir), "--data", str(dev), "--quiet"]
    a, b = tmp_path / "a", tmp_path / "b"
    assert main([*base, "--out", str(a)]) == 0
    assert main([*base, "--out", str(b)]) == 0
    capsys.readouterr()
    for name in DETERMINISTIC:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name

    # a rerun into a: every scored row now comes from a's cache
    first = {name: (a / name).read_bytes() for name in DETERMINISTIC}
    assert main([*base, "--out", str(a)]) == 0
    printed = capsys.readouterr().out
    summary = json.loads(first["summary.json"])
    failed = summary["failed"]
    skipped = summary["counts"]["skipped"]
    assert skipped >= 1 and failed > skipped
    assert f"scores: {failed} rows from the cache, 0 scored" in printed
    for name in DETERMINISTIC:
        assert (a / name).read_bytes() == first[name], name
    # run.json is where the date lives
    assert "created" in json.loads((a / "run.json").read_text())
