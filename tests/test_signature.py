"""The run signature: every part that decides a run changes it, and a real run writes it.

The metric part is sacrebleu's own signature (sacrebleu's `Metric.get_signature`); the objective
part is DecoderSettings.signature(); the rest are the run's options.
"""

from __future__ import annotations

import dataclasses

import pandas as pd
import pytest
from sacrebleu.metrics import BLEU, CHRF
from tinymodels import make_marian, sentences

from triage.models.transformers_backend import TransformersModel
from triage.run.pipeline import TriageOptions, run_triage
from triage.run.signature import SEPARATOR, run_signature
from triage.settings import DecoderSettings


def _sacrebleu_signature(metric) -> str:
    metric.corpus_score(["a cat sat"], [["the cat sat"]])  # sacrebleu signs a metric once it has scored
    return str(metric.get_signature())


CHRF_SIG = _sacrebleu_signature(CHRF())
BASE = (DecoderSettings(beam=4), TriageOptions(), CHRF_SIG, "1.0.0")


def _sig(settings=BASE[0], options=BASE[1], metric_sig=BASE[2], version=BASE[3]) -> str:
    return run_signature(settings, options, metric_sig, version=version)


CHANGES = {
    "tool version": dict(version="1.0.1"),
    "objective: beam": dict(settings=DecoderSettings(beam=5)),
    "objective: length penalty": dict(settings=DecoderSettings(beam=4, alpha=0.6)),
    "objective: generation rule": dict(settings=DecoderSettings(beam=4, no_repeat_ngram_size=3)),
    "tie margin": dict(options=TriageOptions(margin=1e-3)),
    "tie margin, last digit": dict(options=TriageOptions(margin=1.0000001e-4)),
    "failure rule": dict(options=TriageOptions(below=40.0)),
    "bucket edges": dict(options=TriageOptions(edges=(1, 6, 11))),
    "bucket basis": dict(options=TriageOptions(bucket_by="source-tokens")),
    "metric": dict(options=TriageOptions(metric="bleu"), metric_sig=_sacrebleu_signature(BLEU())),
    "metric signature (nrefs)": dict(metric_sig=CHRF_SIG.replace("nrefs:1", "nrefs:2")),
    "metric signature (sacrebleu version)": dict(metric_sig=CHRF_SIG.rsplit("version:", 1)[0] + "version:9.9.9"),
}


@pytest.mark.parametrize("part", list(CHANGES))
def test_each_part_changes_the_signature(part):
    changed = _sig(**CHANGES[part])
    assert changed != _sig()
    # only the one named part differs: the other parts read the same
    diff = [(a, b) for a, b in zip(_sig().split(SEPARATOR), changed.split(SEPARATOR), strict=True) if a != b]
    assert len(diff) == 1


def test_step_sizes_leave_the_signature_alone():
    # chunk rows and the token budget move scores in float32's last bits only (tests/test_streaming.py)
    opts = dataclasses.replace(BASE[1], chunk_rows=7, token_budget=64, progress=False)
    assert _sig(options=opts) == _sig()


def test_a_run_writes_its_signature_with_sacrebleus_and_the_objective():
    model, tok = make_marian(seed=7, max_new_tokens=10, num_beams=2, length_penalty=0.0)
    src, ref = sentences(6, seed=3), sentences(6, seed=4)
    frame = pd.DataFrame({"id": [str(i) for i in range(6)], "source": src, "references": [[r] for r in ref],
                          "output": [None] * 6, "line": range(2, 8)})
    result = run_triage(TransformersModel(model, tok), frame, options=TriageOptions(progress=False, margin=0.25))
    s = result.summary
    parts = dict(p.split("=", 1) for p in s.signature.split(SEPARATOR))
    assert parts["objective"] == s.objective
    assert parts["margin"] == "0.25"
    assert parts["buckets"] == "ref-words:1,11,21,31,41"
    # sacrebleu's signature of the same corpus score, as sacrebleu writes it
    assert parts["metric"] == "chrf:" + s.corpus_metric.signature
    assert s.corpus_metric.signature == CHRF_SIG  # one reference per row: nrefs:1, sacrebleu's default
