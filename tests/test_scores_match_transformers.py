"""The recomputed scores agree with what transformers computes and what its decoder maximized.

External references: transformers' own loss (MarianMTModel.forward with labels, mean cross-entropy
over label tokens), transformers' `generate` (sequences_scores for beam search; per-step scores via
compute_transition_scores for greedy search), the gnmt length penalty formula (Wu et al. 2016,
eq. 14, from memory), and common practice about alpha.
"""

from __future__ import annotations

import math

import pytest
import torch
from tinymodels import make_marian, sentences

from triage.decoding.decode import decode
from triage.models.describe import model_settings
from triage.models.transformers_backend import TransformersModel
from triage.scoring.scorer import ScoreRequest, score_requests
from triage.settings import DecoderSettings


@pytest.fixture(scope="module")
def tm():
    model, tok = make_marian(seed=3, max_new_tokens=14)
    return TransformersModel(model, tok)


def test_reference_logprob_equals_minus_loss_times_tokens(tm):
    # source: transformers' forward with labels returns the mean token cross-entropy (no label smoothing)
    srcs, refs = sentences(6, seed=11), sentences(6, seed=12, lo=1, hi=10)
    settings = model_settings(tm, beam=1)
    src_ids = tm.tokenize_sources(srcs)
    tgt_ids = tm.tokenize_targets(refs)
    got = score_requests(tm, settings, [ScoreRequest(s, [t]) for s, t in zip(src_ids, tgt_ids, strict=True)])
    for s, t, res in zip(src_ids, tgt_ids, got, strict=True):
        labels = torch.tensor([t + [tm.end_id]])
        with torch.no_grad():
            loss = tm.model(input_ids=torch.tensor([s]), labels=labels).loss
        expected = -float(loss) * labels.shape[1]
        assert res[0].logprob_sum == pytest.approx(expected, abs=1e-4)
        assert res[0].length == labels.shape[1]


@pytest.mark.parametrize("beam", [1, 2, 4])
@pytest.mark.parametrize("alpha", [0.0, 0.7, 1.0])
def test_output_score_equals_generate_score(tm, beam, alpha):
    # source: transformers' generate, sequences_scores (beam) / summed transition scores (greedy)
    srcs = sentences(10, seed=21)
    settings = model_settings(tm, beam=beam, alpha=alpha)
    src_ids = tm.tokenize_sources(srcs)
    gc = settings.to_generation_config(tm.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    limit = settings.limit_new_tokens()
    finished_somewhere = hit_limit_somewhere = False
    for s in src_ids:  # one at a time: no padding effects in the reference decode
        with torch.no_grad():
            out = tm.model.generate(input_ids=torch.tensor([s]), generation_config=gc)
        seq = out.sequences[0, 1:].tolist()
        if beam > 1:
            expected = float(out.sequences_scores[0])
        else:
            trans = tm.model.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
            expected = float(trans[0].sum())
        finished = tm.end_id in seq
        toks = seq[: seq.index(tm.end_id)] if finished else seq
        finished_somewhere |= finished
        hit_limit_somewhere |= not finished
        # the output as text, re-tokenized: what the tool sees in a dev set
        text = tm.detokenize(toks)
        ids = tm.tokenize_targets([text])[0]
        assert ids == toks
        res = score_requests(tm, settings, [ScoreRequest(s, [ids], [len(ids) >= limit])])[0][0]
        assert res.hit_limit == (not finished)
        assert res.score == pytest.approx(expected, abs=1e-4)
    assert finished_somewhere, "test model should end some outputs before the limit"


def test_batched_decode_scores_match_rescoring(tm):
    # the tool's own decode (generate in batches) reports scores that its scorer reproduces
    settings = model_settings(tm, beam=4, alpha=0.7)
    src_ids = tm.tokenize_sources(sentences(12, seed=5))
    dec = decode(tm, settings, src_ids, batch_size=5)
    limit = settings.limit_new_tokens()
    res = score_requests(tm, settings, [ScoreRequest(s, [d.ids], [len(d.ids) >= limit])
                                        for s, d in zip(src_ids, dec, strict=True)])
    for d, r in zip(dec, res, strict=True):
        assert r[0].score == pytest.approx(d.score, abs=1e-4)


def test_gnmt_penalty_by_hand():
    # Wu et al. 2016, eq. 14: length penalty lp(Y) = (5 + |Y|)^alpha / (5 + 1)^alpha (formula from memory)
    s = DecoderSettings(beam=4, penalty="gnmt", alpha=0.6)
    assert s.length_penalty(10) == pytest.approx((15 / 6) ** 0.6)
    # by hand: (15/6)^0.6 = 2.5^0.6 = exp(0.6 * ln 2.5) = exp(0.549774) = 1.73286
    assert s.objective(-12.0, 10) == pytest.approx(-12.0 / 1.73286, rel=1e-4)


def test_alpha_conventions():
    # common practice: alpha 0 = no normalization, alpha 1 = average per-token log-prob, beam 1 = greedy (plain sum)
    assert DecoderSettings(beam=4, alpha=0.0).objective(-9.0, 3) == -9.0
    assert DecoderSettings(beam=4, alpha=1.0).objective(-9.0, 3) == pytest.approx(-3.0)
    assert DecoderSettings(beam=4, alpha=0.7).objective(-9.0, 3) == pytest.approx(-9.0 / 3 ** 0.7)
    assert DecoderSettings(beam=1, alpha=1.0).objective(-9.0, 3) == -9.0
    assert DecoderSettings(beam=4, penalty="none", alpha=1.0).objective(-9.0, 3) == -9.0
    assert math.isinf(DecoderSettings(beam=4).objective(float("-inf"), 3))
