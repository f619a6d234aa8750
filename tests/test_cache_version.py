"""The score cache is keyed on the scoring code's version: a rerun reuses its scores, a bumped
version (a fix to scoring) rescores instead of reading what the old code stored.

Outside source: transformers' own forward pass (log_softmax of the model's logits, summed over
the reference and its end token) for the scores a rescoring run must give.
"""

from __future__ import annotations

import math

import pandas as pd
import pytest
import torch
from tinymodels import make_marian, sentences

from triage.models.describe import model_settings
from triage.models.transformers_backend import TransformersModel
from triage.run.pipeline import TriageOptions, run_triage
from triage.scoring import scorer
from triage.scoring.cache import ScoreCache, decode_scores, encode_scores
from triage.scoring.scorer import ScoreRequest

N = 8


@pytest.fixture(scope="module")
def tm():
    model, tok = make_marian(seed=11, max_new_tokens=14, num_beams=2, length_penalty=1.0)
    return TransformersModel(model, tok)


def _frame() -> pd.DataFrame:
    src, ref, out = sentences(N, seed=81), sentences(N, seed=82), sentences(N, seed=83)
    return pd.DataFrame({"id": [f"r{i}" for i in range(N)], "source": src, "references": [[r] for r in ref],
                         "output": out, "line": range(2, N + 2)})


def _run(tm, cache_dir):
    return run_triage(tm, _frame(), model_settings(tm), TriageOptions(progress=False, cache_dir=str(cache_dir)))


def _hf_sum(tm, source: str, target: str) -> float:
    """Summed log-prob of target + end token under transformers' own forward pass."""
    src = torch.tensor(tm.tokenize_sources([source]))
    labels = tm.tokenize_targets([target])[0] + [tm.end_id]
    dec = torch.tensor([[tm.start_id] + labels[:-1]])
    with torch.no_grad():
        logits = tm.model(input_ids=src, decoder_input_ids=dec).logits
    logp = torch.log_softmax(logits.float(), dim=-1)[0]
    return math.fsum(float(logp[t, tok]) for t, tok in enumerate(labels))


def test_rerun_hits_and_a_bumped_version_misses(tm, tmp_path, monkeypatch):
    first = _run(tm, tmp_path)
    failed = int((first.verdicts["verdict"] != "correct").sum())
    assert failed == N  # random outputs: every row failed and was scored
    assert first.cache == {"hits": 0, "misses": N}

    again = _run(tm, tmp_path)
    assert again.cache == {"hits": N, "misses": 0}
    pd.testing.assert_frame_equal(again.verdicts, first.verdicts)

    monkeypatch.setattr(scorer, "SCORING_VERSION", scorer.SCORING_VERSION + 1)
    bumped = _run(tm, tmp_path)
    assert bumped.cache == {"hits": 0, "misses": N}  # nothing the old version stored is read
    pd.testing.assert_frame_equal(bumped.verdicts, first.verdicts)
    # and the bumped version's own scores are cached for its next run
    assert _run(tm, tmp_path).cache == {"hits": N, "misses": 0}


def test_stale_scores_stay_with_their_version(tm, tmp_path, monkeypatch):
    frame = _frame()
    settings = model_settings(tm)
    # what an older scoring code left in the cache: every log-prob wrong
    fresh = _run(tm, tmp_path / "fresh")
    version = scorer.SCORING_VERSION
    old = ScoreCache(tmp_path / "c", tm.fingerprint(), settings.fingerprint())
    assert old.scoring_version == version
    for k in range(N):
        src = tm.tokenize_sources([frame["source"][k]])[0]
        targets = tm.tokenize_targets([frame["references"][k][0], frame["output"][k]])
        req = ScoreRequest(src, targets, [len(t) >= settings.limit_new_tokens() for t in targets])
        stale = decode_scores(encode_scores(fresh.scores[k][0] + [fresh.scores[k][1]]))
        for s in stale:
            s.logprobs = [-0.5] * len(s.logprobs)
            s.logprob_sum = s.score = -0.5 * len(s.logprobs)
        old.put_many([(req, stale)])
    old.close()

    reused = _run(tm, tmp_path / "c")
    assert reused.cache == {"hits": N, "misses": 0}
    assert reused.verdicts["ref_logprob"].tolist() == [-0.5 * n for n in reused.verdicts["ref_len"]]

    monkeypatch.setattr(scorer, "SCORING_VERSION", version + 1)
    rescored = _run(tm, tmp_path / "c")
    assert rescored.cache == {"hits": 0, "misses": N}
    for k in range(N):
        want = _hf_sum(tm, frame["source"][k], frame["references"][k][0])
        assert rescored.verdicts["ref_logprob"][k] == pytest.approx(want, abs=1e-4)
