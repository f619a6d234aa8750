"""Verdicts on planted cases, the failure rule driven by sacrebleu, and the row accounting.

External references: transformers' generate (a wider beam's output and its sequences_scores),
sacrebleu's sentence chrF and BLEU, the Wilson score interval (Wilson 1927; worked example
computed by hand below).
"""

from __future__ import annotations

import pandas as pd
import pytest
import torch
from sacrebleu.metrics import BLEU, CHRF
from tinymodels import make_marian, sentences

from triage.models.describe import model_settings
from triage.models.transformers_backend import TransformersModel
from triage.run.analysis import assign_bucket, bucket_labels, wilson_interval
from triage.run.pipeline import TriageOptions, run_triage


@pytest.fixture(scope="module")
def tm():
    model, tok = make_marian(seed=7, max_new_tokens=14, num_beams=2, length_penalty=0.0, init_std=0.3, eos_bias=3.0)
    return TransformersModel(model, tok)


def _generate(tm, src: str, beam: int, alpha: float):
    s = model_settings(tm, beam=beam, alpha=alpha)
    gc = s.to_generation_config(tm.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    with torch.no_grad():
        out = tm.model.generate(input_ids=torch.tensor(tm.tokenize_sources([src])), generation_config=gc)
    seq = out.sequences[0, 1:].tolist()
    toks = seq[: seq.index(tm.end_id)] if tm.end_id in seq else seq
    return tm.detokenize(toks), float(out.sequences_scores[0])


def _frame(rows):
    return pd.DataFrame({
        "id": [str(i) for i in range(len(rows))],
        "source": [r[0] for r in rows],
        "references": [[r[1]] if isinstance(r[1], str) else r[1] for r in rows],
        "output": [r[2] for r in rows],
        "line": range(2, len(rows) + 2),
    })


def test_planted_search_and_model_cases(tm):
    # search: the reference is what a wider beam (transformers' generate, 8 beams) finds with a higher
    # score than the narrow beam's output under the same objective (alpha 0: plain sum)
    planted_search, planted_model = [], []
    for src in sentences(24, seed=31):
        narrow, s2 = _generate(tm, src, 2, 0.0)
        wide, s8 = _generate(tm, src, 8, 0.0)
        if wide != narrow and s8 > s2 + 1e-3:
            planted_search.append((src, wide, narrow))
        if len(planted_model) < 5:
            # model: a reference the model dislikes (a random sentence), output = the narrow beam's own
            planted_model.append((src, "station west stop late north", narrow))
    assert len(planted_search) >= 3, "test model should give some rows where 8 beams beat 2"
    res = run_triage(tm, _frame(planted_search + planted_model), options=TriageOptions(progress=False))
    v = res.verdicts["verdict"].tolist()
    assert v[: len(planted_search)] == ["search"] * len(planted_search)
    assert v[len(planted_search):] == ["model"] * len(planted_model)
    # the recorded scores are the ones that decided
    s = res.verdicts
    assert ((s["ref_score"] > s["out_score"]) == (s["verdict"] == "search")).all()


def test_multi_reference_uses_best_scoring_reference(tm):
    src = sentences(1, seed=41)[0]
    narrow, _ = _generate(tm, src, 2, 0.0)
    bad = "north south east west " * 3
    rows = [(src, [bad.strip(), narrow], "platform nine"), (src, [bad.strip(), "the train"], narrow)]
    res = run_triage(tm, _frame(rows), options=TriageOptions(progress=False))
    assert res.verdicts.loc[0, "verdict"] in ("search", "model", "tie")
    assert res.verdicts.loc[0, "best_ref"] == 2          # the model's own output scores best
    assert res.verdicts.loc[0, "reference"] == narrow
    # an output equal to any reference is correct
    rows = [(src, ["the train", narrow], "  " + narrow.replace(" ", "   ") + " ")]
    assert run_triage(tm, _frame(rows), options=TriageOptions(progress=False)).verdicts.loc[0, "verdict"] == "correct"


def test_failure_rule_uses_sacrebleu_sentence_scores(tm):
    # source: sacrebleu's sentence_score; with --below X a differing output fails only when its score < X
    rows = [("one two", "the train to north departs from platform four", "the train to north departs from platform five"),
            ("one two", "the train to north departs", "bus")]
    chrf = [CHRF().sentence_score(o, [r]).score for _, r, o in rows]
    assert chrf[0] > 60 > chrf[1]
    res = run_triage(tm, _frame(rows), options=TriageOptions(progress=False, below=60.0))
    assert res.verdicts["verdict"].tolist()[0] == "correct"
    assert res.verdicts["verdict"].tolist()[1] != "correct"
    assert res.verdicts["chrf"].tolist() == pytest.approx(chrf, abs=1e-4)
    bleu = [BLEU(effective_order=True).sentence_score(o, [r]).score for _, r, o in rows]
    res = run_triage(tm, _frame(rows), options=TriageOptions(progress=False, metric="bleu", below=bleu[0] + 1))
    assert res.verdicts["bleu"].tolist() == pytest.approx(bleu, abs=1e-4)
    assert (res.verdicts["verdict"] != "correct").all()


def test_every_row_once_in_input_order(tm):
    srcs = sentences(25, seed=51)
    refs = sentences(25, seed=52, lo=1, hi=50)
    rows = [(s, r, r if i % 3 == 0 else "bus") for i, (s, r) in enumerate(zip(srcs, refs, strict=True))]
    res = run_triage(tm, _frame(rows), options=TriageOptions(progress=False, token_budget=64))
    assert res.verdicts["id"].tolist() == [str(i) for i in range(25)]
    counts = res.summary.counts
    assert sum(counts.values()) == 25
    assert counts["correct"] == 9
    assert sum(b.rows for b in res.summary.buckets) == 25


def test_blocked_reference_names_the_rule(tm):
    # a reference longer than the decoder's length limit (max_new_tokens = 14) can never be produced
    long_ref = " ".join(["platform"] * 20)
    res = run_triage(tm, _frame([("one two", long_ref, "bus")]), options=TriageOptions(progress=False))
    assert res.verdicts.loc[0, "verdict"] == "blocked"
    assert "length limit" in res.verdicts.loc[0, "reason"]


def test_blocked_by_minimum_length_rule(tm):
    # transformers' MinLengthLogitsProcessor puts minus infinity on the end token before min_length
    settings = model_settings(tm, beam=2, alpha=0.0).replace(min_length=6)
    res = run_triage(tm, _frame([("one two", "the bus", "the train is now late")]), settings,
                     TriageOptions(progress=False))
    assert res.verdicts.loc[0, "verdict"] == "blocked"
    assert "minimum length" in res.verdicts.loc[0, "reason"]


def test_wilson_interval_worked_example():
    # Wilson 1927 score interval; by hand for k=8, n=10, z=1.96:
    # centre = (0.8 + 1.9208/10) / 1.38416 = 0.71674, half = 1.96*sqrt(0.016 + 0.0096040)/1.38416 = 0.22658
    lo, hi = wilson_interval(8, 10)
    assert lo == pytest.approx(0.4902, abs=2e-4)
    assert hi == pytest.approx(0.9433, abs=2e-4)
    assert wilson_interval(0, 5)[0] == pytest.approx(0.0, abs=1e-12)


def test_bucket_edges():
    edges = (1, 11, 21, 31, 41)
    assert bucket_labels(edges) == ["1-10", "11-20", "21-30", "31-40", "41+"]
    assert [assign_bucket(n, edges) for n in (1, 10, 11, 40, 41, 300)] == ["1-10", "1-10", "11-20", "31-40", "41+", "41+"]
    assert assign_bucket(0, edges) == "<1"
