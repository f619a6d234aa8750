"""A user's own model (not transformers) through the whole pipeline: CLI in, run folder out.

The toy GRU (tests/toy_gru.py) and the documented example (examples/user_model.py) are loaded
with ``--model python:module:factory``. Outside sources: each model's own log-probs recomputed
here without the decoder's cache (a whole-prefix pass, or the network's step function called
directly), a plain argmax loop for greedy search (common practice), the gnmt length penalty
((5 + len) / 6) ** alpha (Wu et al. 2016, formula from memory), and Python's html.parser.
"""

from __future__ import annotations

import csv
import json
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest
import torch

from triage.cli import main
from triage.models.loading import load_model
from triage.scoring.scorer import ScoreRequest, score_requests

TESTS = Path(__file__).resolve().parent
EXAMPLES = TESTS.parent / "examples"

torch.set_num_threads(1)

# id, source, reference, output (hand-written outputs: a copy, dropped or doubled letters, and
# references that are not copies of the source, which the copying toy gets wrong)
ROWS = [
    ("r1", "platform 4", "platform 4", "platform 4"),
    ("r2", "the 9.15 to leeds", "the 9.15 to leeds", "the 9.15 to leds"),
    ("r3", "ab", "ab", "b"),
    ("r4", "platform 4", "platform four", "platform 4"),
    ("r5", "calling at york", "calling at york", "calling at yorkk"),
    ("r6", "gate 7", "gate seven", "gate 7"),
]
GREEDY_LIMIT = 19  # no generation config: transformers' default max_length 20 (from memory), start token included


def write_devset(path: Path, with_output: bool) -> Path:
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write("id\tsource\treference" + ("\toutput" if with_output else "") + "\n")
        for r in ROWS:
            fh.write("\t".join(r if with_output else r[:3]) + "\n")
    return path


def read_verdicts(run: Path) -> list[dict[str, str]]:
    with open(run / "verdicts.csv", encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.seen: set[str] = set()
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.seen.add(tag)

    def handle_data(self, data):
        self.text.append(data)


def check_report(run: Path, ids: list[str]) -> None:
    page = (run / "report.html").read_text(encoding="utf-8")
    parser = _Tags()
    parser.feed(page)
    parser.close()
    assert {"html", "head", "body", "table"} <= parser.seen
    text = "".join(parser.text)
    for i in ids:
        assert i in text


def run_cli(argv: list[str], capsys) -> tuple[int, str]:
    rc = main(argv)
    out = capsys.readouterr()
    assert "Traceback" not in out.err
    return rc, out.out


@pytest.fixture()
def toy_path(monkeypatch):
    monkeypatch.syspath_prepend(str(TESTS))


@pytest.fixture(scope="module")
def toy():
    return load_model("python:toy_gru:make_model")


def uncached_logprobs(model, source: list[int], target: list[int]) -> list[float]:
    """Per-token log-probs of target + end, each from a fresh whole-prefix pass (no cache)."""
    state = model.encode([source])
    full = list(target) + [model.end_id]
    out = []
    for i, tok in enumerate(full):
        lp, _ = model.next_logprobs(state, torch.tensor([[model.start_id, *full[:i]]]), None)
        out.append(float(lp[0, tok]))
    return out


def greedy(model, source: list[int], limit: int) -> str:
    # common practice: greedy search = best next token until the end token or the length limit
    state = model.encode([source])
    prefix = [model.start_id]
    for _ in range(limit):
        lp, _ = model.next_logprobs(state, torch.tensor([prefix]), None)
        prefix.append(int(lp[0].argmax()))
        if prefix[-1] == model.end_id:
            break
    return model.detokenize([t for t in prefix[1:] if t != model.end_id])


# ------------------------------------------------------------------------------ the toy GRU, CLI
def test_toy_gru_whole_pipeline_with_given_outputs(tmp_path, toy_path, toy, capsys):
    data = write_devset(tmp_path / "dev.tsv", with_output=True)
    run = tmp_path / "run"
    rc, out = run_cli(["run", "--model", "python:toy_gru:make_model", "--data", str(data), "--out", str(run),
                       "--widen", "4", "--where-lost", "--exact", "--quiet"], capsys)
    assert rc == 0
    assert "wrote" in out
    rows = read_verdicts(run)
    assert [r["id"] for r in rows] == [r[0] for r in ROWS]
    summary = json.loads((run / "summary.json").read_text())
    assert {"widen", "length_penalty", "where_lost", "exact"} <= set(summary)
    assert summary["data"]["outputs"] == "given"
    assert summary["widen"]["widths"][0]["beam"] == 4
    # greedy (beam 1, no settings of its own): score = plain sum of log-probs
    assert summary["settings"]["beam"] == 1
    failed = [r for r in rows if r["verdict"] != "correct"]
    assert [r["id"] for r in failed] == [r[0] for r in ROWS if r[2] != r[3]]
    for r in failed:
        src = toy.tokenize_sources([r["source"]])[0]
        ref = sum(uncached_logprobs(toy, src, toy.tokenize_targets([r["reference"]])[0]))
        hyp = sum(uncached_logprobs(toy, src, toy.tokenize_targets([r["output"]])[0]))
        assert float(r["ref_logprob"]) == pytest.approx(ref, abs=1e-4)
        assert float(r["out_logprob"]) == pytest.approx(hyp, abs=1e-4)
        assert float(r["ref_score"]) == pytest.approx(ref, abs=1e-4)
        assert r["verdict"] == ("search" if ref > hyp else "model")
    n_search = sum(r["verdict"] == "search" for r in failed)
    assert summary["where_lost"]["rows"] == n_search > 0
    assert summary["exact"]["rows"] >= 1
    check_report(run, [r["id"] for r in failed])


def test_toy_gru_decoded_by_triage(tmp_path, toy_path, toy, capsys):
    data = write_devset(tmp_path / "dev.tsv", with_output=False)
    run = tmp_path / "run"
    rc, _ = run_cli(["run", "--model", "python:toy_gru:make_model", "--data", str(data), "--out", str(run),
                     "--widen", "4", "--where-lost", "--exact", "--quiet"], capsys)
    assert rc == 0
    rows = read_verdicts(run)
    assert [r["id"] for r in rows] == [r[0] for r in ROWS]
    summary = json.loads((run / "summary.json").read_text())
    assert summary["data"]["outputs"] == "decoded by triage"
    assert {"widen", "length_penalty"} <= set(summary)
    for r, (_, source, _, _) in zip(rows, ROWS, strict=True):
        assert r["output"] == greedy(toy, toy.tokenize_sources([source])[0], GREEDY_LIMIT)
    assert any(r["verdict"] != "correct" for r in rows)  # the non-copy references fail
    check_report(run, [r["id"] for r in rows if r["verdict"] != "correct"])


def test_toy_gru_gnmt_penalty(tmp_path, toy_path, toy, capsys):
    data = write_devset(tmp_path / "dev.tsv", with_output=False)
    run = tmp_path / "run"
    rc, _ = run_cli(["run", "--model", "python:toy_gru:make_model", "--data", str(data), "--out", str(run),
                     "--beam", "2", "--penalty", "gnmt", "--alpha", "0.8", "--widen", "4", "--quiet"], capsys)
    assert rc == 0
    rows = read_verdicts(run)
    assert [r["id"] for r in rows] == [r[0] for r in ROWS]
    summary = json.loads((run / "summary.json").read_text())
    assert (summary["settings"]["penalty"], summary["settings"]["alpha"], summary["settings"]["beam"]) == \
        ("gnmt", 0.8, 2)
    assert summary["length_penalty"]["current"]["penalty"] == "gnmt"
    assert "widen" in summary
    failed = [r for r in rows if r["verdict"] != "correct"]
    assert failed
    for r in failed:
        for side in ("ref", "out"):
            n = int(r[f"{side}_len"])
            assert float(r[f"{side}_score"]) == pytest.approx(float(r[f"{side}_logprob"]) / ((5 + n) / 6) ** 0.8,
                                                              abs=1e-5)
        src = toy.tokenize_sources([r["source"]])[0]
        ref = uncached_logprobs(toy, src, toy.tokenize_targets([r["reference"]])[0])
        assert float(r["ref_logprob"]) == pytest.approx(sum(ref), abs=1e-4)
        assert int(r["ref_len"]) == len(ref)
    check_report(run, [r["id"] for r in failed])


# ------------------------------------------------------------------------------ examples/user_model.py
@pytest.fixture()
def example(monkeypatch):
    monkeypatch.syspath_prepend(str(EXAMPLES))
    return load_model("python:user_model:make_model")


def test_example_loads_and_scores_rows(example):
    assert type(example).__name__ == "UserModel"
    texts = [("Platform 4 is now closed.", "platform four is now closed", "platform 4 is now closed"),
             ("Keep off the tracks.", "keep off the tracks", "keep off the"),
             ("The 08:40 is late.", "the oh eight forty is late", "the zero eight forty is late")]
    settings = example.default_settings
    reqs = [ScoreRequest(example.tokenize_sources([s])[0], example.tokenize_targets([r, o]))
            for s, r, o in texts]
    results = score_requests(example, settings, reqs)
    net = example.net
    for req, res in zip(reqs, results, strict=True):
        src = torch.tensor([req.source_ids])
        mask = src != example.pad_id
        memory, h = net.encode(src, mask)
        for target, scored in zip(req.targets, res, strict=True):
            # the network's own step function, called here directly token by token
            want, prev, hh = [], example.start_id, h
            with torch.no_grad():
                for tok in [*target, example.end_id]:
                    logits, hh = net.step(memory, mask, hh, torch.tensor([prev]))
                    want.append(float(torch.log_softmax(logits, -1)[0, tok]))
                    prev = tok
            assert scored.ids == [*target, example.end_id]
            assert scored.logprobs == pytest.approx(want, abs=1e-5)
            # power penalty len**alpha, len = tokens incl. the end token (transformers' convention)
            assert scored.score == pytest.approx(sum(want) / len(want) ** settings.alpha, abs=1e-5)


def test_example_forced_pass_equals_stepping(example):
    src = example.tokenize_sources(["Keep off the tracks.", "Platform 4."])
    state = example.encode(src)
    inputs = torch.tensor([[example.start_id, *example.tokenize_targets(["keep off"])[0]],
                           [example.start_id, *example.tokenize_targets(["platform"])[0]]])
    forced = example.forced_logprobs(state, inputs)
    cache = None
    for t in range(inputs.shape[1]):
        cached, cache = example.next_logprobs(state, inputs[:, : t + 1], cache)
        fresh, _ = example.next_logprobs(state, inputs[:, : t + 1], None)
        assert torch.allclose(forced[:, t], cached, atol=1e-5)
        assert torch.allclose(forced[:, t], fresh, atol=1e-5)


def test_example_documented_command_from_its_folder(tmp_path, monkeypatch, capsys):
    # the command of the README section, run where it says: the loader finds user_model.py in
    # the current directory (syspath_prepend only makes the loader's sys.path change undoable)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.chdir(EXAMPLES)
    monkeypatch.delitem(sys.modules, "user_model", raising=False)
    run = tmp_path / "run"
    rc, out = run_cli(["run", "--model", "python:user_model:make_model", "--data", "devset.tsv",
                       "--out", str(run), "--quiet"], capsys)
    assert rc == 0
    with open(EXAMPLES / "devset.tsv", encoding="utf-8", newline="") as fh:
        ids = [r["id"] for r in csv.DictReader(fh, delimiter="\t")]
    rows = read_verdicts(run)
    assert [r["id"] for r in rows] == ids
    summary = json.loads((run / "summary.json").read_text())
    assert summary["objective"] == "beam=4|penalty=power|alpha=1|max_new=64"  # the example's default_settings
    check_report(run, ids)
