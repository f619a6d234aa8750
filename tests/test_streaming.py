"""A dev set streams through a run: steps of --chunk-rows rows, nothing kept, the same files.

What is checked:
- the corpus metric built from summed per-segment statistics equals sacrebleu's own
  `corpus_score` over the whole corpus (sacrebleu is the reference), for any split;
- a streamed CLI run writes byte for byte the files of the in-memory library run
  (read_devset + run_triage + run_studies + write_run) with the same step size;
- the step size changes no verdict, count or bucket (scores move in float32's last bits only);
- the page of a large run keeps the first rows of each verdict and says so; re-rendering
  from the run folder (read in parts) gives the same page;
- a run that fails part-way leaves the previous files as they were and no temporary file;
- a file that changes between the checking pass and the scoring pass is refused.
"""

from __future__ import annotations

import csv
import json

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tinymodels import WORDS, sentences

from triage.cli import main
from triage.data.devset import read_devset, stream_devset
from triage.errors import InputError
from triage.run.metrics import CorpusStats
from triage.rundir import reader as report
from triage.rundir.writer import RunWriter, write_run

DETERMINISTIC = ("verdicts.csv", "summary.json", "tokens.jsonl")


def _devset(path, n=90, seed=21):
    src, ref, out = sentences(n, seed=seed), sentences(n, seed=seed + 1), sentences(n, seed=seed + 2)
    out[::4] = ref[::4]  # correct rows
    ref[5] = ref[5] + " ü"  # an unknown character: a skipped row
    with open(path, "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f)
        w.writerow(["id", "source", "reference", "reference_2", "output"])
        for i in range(n):
            w.writerow([f"r{i}", src[i], ref[i], out[i] if i % 9 == 1 else "", out[i]])  # some rows: 2 refs
    return path


# ---------------------------------------------------------------------------------------- corpus metric
TEXT = st.lists(st.sampled_from(WORDS), min_size=1, max_size=9).map(" ".join)
ROW = st.tuples(TEXT, st.lists(TEXT, min_size=1, max_size=3))


@settings(max_examples=40, deadline=None, derandomize=True)
@given(rows=st.lists(ROW, min_size=1, max_size=30), cuts=st.lists(st.integers(1, 30), max_size=5),
       name=st.sampled_from(["chrf", "bleu"]))
def test_summed_statistics_equal_sacrebleu_corpus_score(rows, cuts, name):
    from sacrebleu.metrics import BLEU, CHRF

    outputs = [o for o, _ in rows]
    refs = [r for _, r in rows]
    # sacrebleu's own call over the whole corpus: reference streams, None where a row has fewer references
    depth = max(len(r) for r in refs)
    streams = [[r[k] if k < len(r) else None for r in refs] for k in range(depth)]
    whole = (CHRF() if name == "chrf" else BLEU()).corpus_score(outputs, streams)
    stats = CorpusStats(name)
    bounds = sorted({0, len(rows), *(c for c in cuts if c < len(rows))})
    for a, b in zip(bounds, bounds[1:], strict=False):
        stats.add(outputs[a:b], refs[a:b])
    score, signature = stats.score()
    assert score == pytest.approx(whole.score, abs=1e-9)
    metric = CHRF() if name == "chrf" else BLEU()
    metric.corpus_score(outputs, streams)
    assert signature == str(metric.get_signature())  # nrefs included ("var" for a mixed corpus)


# ---------------------------------------------------------------------------------------- same files
def test_streamed_cli_run_writes_the_files_of_the_in_memory_run(tmp_path, tiny_model_dir, capsys):
    from triage.decision import recommend
    from triage.models.describe import model_info
    from triage.models.loading import load_model
    from triage.run.pipeline import TriageOptions, run_triage
    from triage.studies.runner import run_studies

    dev = _devset(tmp_path / "dev.csv")
    streamed = tmp_path / "streamed"
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(streamed), "--quiet",
                 "--no-cache", "--chunk-rows", "7", "--check-rows", "0"]) == 0  # the library calls below run no outputs check
    capsys.readouterr()

    model = load_model(str(tiny_model_dir))
    devset = read_devset(str(dev))
    result = run_triage(model, devset, options=TriageOptions(progress=False, chunk_rows=7),
                        model_info=model_info(model, str(tiny_model_dir)))
    assert len(result.verdicts) == 90 and result.verdicts["verdict"].nunique() >= 3
    run_studies(model, result, progress=False, devset=devset, length_penalty=True).into(result.summary)
    result.summary.recommendation = recommend(result.summary)
    memory = write_run(result, tmp_path / "memory", {})
    for name in DETERMINISTIC:
        assert (streamed / name).read_bytes() == (memory / name).read_bytes(), name
    summary = json.loads((streamed / "summary.json").read_text(encoding="utf-8"))
    assert summary["data"]["rows"] == 90 and summary["data"]["sha256"] == devset.sha256
    assert summary["length_penalty"]["rows"] == sum(summary["counts"][v] for v in ("search", "model", "tie"))


def test_step_size_changes_no_verdict(tmp_path, tiny_model_dir, capsys):
    dev = _devset(tmp_path / "dev.csv", n=50, seed=5)
    frames = {}
    for rows in (1, 13, 1000):
        out = tmp_path / f"steps{rows}"
        assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(out), "--quiet",
                     "--no-cache", "--chunk-rows", str(rows)]) == 0
        frames[rows] = (pd.read_csv(out / "verdicts.csv", dtype=str, keep_default_na=False),
                        json.loads((out / "summary.json").read_text(encoding="utf-8")))
    capsys.readouterr()
    base, base_summary = frames[1000]
    for rows in (1, 13):
        frame, summary = frames[rows]
        assert frame["id"].tolist() == base["id"].tolist()
        for col in ("verdict", "reason", "bucket", "best_ref", "reference", "output"):
            if col == "reason":  # the margin in the reason text is printed to 4 decimals
                continue
            assert frame[col].tolist() == base[col].tolist(), col
        for col in ("ref_score", "out_score", "score_gap"):
            a = pd.to_numeric(frame[col].replace("", float("nan")))
            b = pd.to_numeric(base[col].replace("", float("nan")))
            assert ((a - b).abs().fillna(0) <= 1e-5).all(), col
        for key in ("counts", "failed", "buckets", "search_share", "skipped_reasons", "corpus_metric"):
            assert summary[key] == base_summary[key], key


# ---------------------------------------------------------------------------------------- the page
def test_large_run_page_keeps_first_rows_per_verdict(tmp_path, tiny_model_dir, capsys):
    dev = _devset(tmp_path / "dev.csv")
    out = tmp_path / "out"
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(out), "--quiet",
                 "--no-cache", "--chunk-rows", "10", "--page-rows", "3"]) == 0
    capsys.readouterr()
    verdicts = pd.read_csv(out / "verdicts.csv", dtype=str, keep_default_na=False)
    failed = verdicts[verdicts["verdict"] != "correct"]
    expected = failed.groupby("verdict", sort=False).head(3)  # first 3 of each verdict, input order
    html = (out / "report.html").read_text(encoding="utf-8")
    shown = [part.split(" · ")[0] for part in html.split('<details class="row"')[1:]
             for part in [part.split("<i>")[1]]]
    assert shown == expected["id"].tolist()
    assert f"{len(expected)} of {len(failed)}" in html and "hold every row" in html
    # the margin histogram still counts every compared row
    compared = failed["verdict"].isin(["search", "model", "tie"]).sum()
    assert f"for the {compared} failed rows that were compared" in html
    # re-rendering from the run folder (read in parts) gives the same page: run.json says how many rows it listed
    assert json.loads((out / "run.json").read_text(encoding="utf-8"))["page_rows"] == 3
    assert main(["report", str(out)]) == 0
    assert (out / "report.html").read_text(encoding="utf-8") == html
    # asked for more, it lists every failed row of a run this small
    report.rerender(out, page_rows=1000)
    assert "hold every row" not in (out / "report.html").read_text(encoding="utf-8")


def test_failed_run_leaves_previous_files_and_no_temporary_file(tmp_path):
    out = tmp_path / "run"
    out.mkdir()
    for name in ("verdicts.csv", "summary.json", "tokens.jsonl", "run.json", "report.html"):
        (out / name).write_text(f"the previous run's {name}\n", encoding="utf-8")
    frame = pd.DataFrame({"id": ["a"], "verdict": ["model"], "score_gap": [-1.0]})
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    with pytest.raises(InputError):
        with RunWriter(out) as writer:
            writer.add(frame, [])
            raise InputError("a bad row far into the file", path="dev.tsv", line=10_000)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_temporary_files_of_a_killed_run_are_removed_by_the_next(tmp_path, tiny_model_dir, capsys):
    dev = _devset(tmp_path / "dev.csv", n=8)
    out = tmp_path / "out"
    out.mkdir()
    stale = [out / ".verdicts.csv.k1ll3d.tmp", out / ".tokens.jsonl.k1ll3d.tmp"]
    for p in stale:
        p.write_text("half a run\n", encoding="utf-8")
    (out / ".notes.tmp").write_text("not ours\n", encoding="utf-8")
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(out), "--quiet",
                 "--no-cache"]) == 0
    capsys.readouterr()
    assert not any(p.exists() for p in stale)
    assert (out / ".notes.tmp").exists()  # only the run's own temporary names are swept


def test_a_frame_with_any_column_names_runs(tiny_model_dir):
    # a user's DataFrame may carry columns of its own (here one named like a method of the stream reader)
    from triage.models.loading import load_model
    from triage.run.pipeline import TriageOptions, run_triage

    frame = pd.DataFrame({"id": [7, 8], "source": ["one two", "the bus"], "references": [["one two"], ["the train"]],
                          "output": ["one two", "the bus"], "chunks": ["x", "y"]})
    result = run_triage(load_model(str(tiny_model_dir)), frame, options=TriageOptions(progress=False, chunk_rows=1))
    assert result.verdicts["id"].tolist() == [7, 8] and result.verdicts["line"].tolist() == [1, 2]
    assert result.verdicts["verdict"].iat[0] == "correct" and result.verdicts["verdict"].iat[1] != "correct"


def test_file_changed_between_passes_is_refused(tmp_path):
    dev = _devset(tmp_path / "dev.csv", n=12)
    stream = stream_devset(str(dev)).check()
    assert stream.rows == 12 and stream.has_output
    lines = dev.read_text(encoding="utf-8").splitlines(keepends=True)
    dev.write_text(lines[0] + "".join(reversed(lines[1:])), encoding="utf-8")  # same rows, other order
    with pytest.raises(InputError, match="changed while it was being read"):
        for _ in stream.chunks(5):
            pass
