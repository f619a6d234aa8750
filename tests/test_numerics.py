"""Numerics of long targets: the tool's float32 log-probs against a float64 recomputation.

The reference values come from the model's own forward pass run in float64 (a double copy
of the same weights) with torch.log_softmax in float64: no triage code is involved.
"""

from __future__ import annotations

import copy
import math

import pytest
import torch
from tinymodels import WORDS, make_marian

from triage.models.describe import model_settings
from triage.models.transformers_backend import TransformersModel
from triage.scoring.scorer import ScoreRequest, score_requests

N_TOKENS = 500  # scored tokens: 499 words and the end token


@pytest.fixture(scope="module")
def long_case():
    torch.manual_seed(0)
    model, tok = make_marian(seed=3, d_model=16, layers=1, max_positions=N_TOKENS + 16, num_beams=2,
                             max_new_tokens=N_TOKENS + 8, length_penalty=1.0)
    tm = TransformersModel(model, tok)
    g = torch.Generator().manual_seed(1)
    words = [WORDS[i] for i in torch.randint(0, len(WORDS), (N_TOKENS - 1,), generator=g).tolist()]
    source = tm.tokenize_sources(["the train to platform one is late"])[0]
    target = tm.tokenize_targets([" ".join(words)])[0]
    assert len(target) == N_TOKENS - 1 and tm.unk_id not in target
    settings = model_settings(tm)
    [[score]] = score_requests(tm, settings, [ScoreRequest(source, [target])])
    return tm, model, source, target, score


def _float64_logprobs(model, source, target, start, end) -> torch.Tensor:
    double = copy.deepcopy(model).double().eval()
    dec_in = torch.tensor([[start] + target])
    labels = torch.tensor([target + [end]])
    with torch.no_grad():
        logits = double(input_ids=torch.tensor([source]), decoder_input_ids=dec_in).logits
    assert logits.dtype == torch.float64
    logp = torch.log_softmax(logits, dim=-1)
    return logp.gather(-1, labels.unsqueeze(-1)).squeeze(-1)[0]


def test_500_token_sum_matches_float64(long_case):
    tm, model, source, target, score = long_case
    ref = _float64_logprobs(model, source, target, tm.start_id, tm.end_id)
    assert score.length == N_TOKENS and len(score.logprobs) == N_TOKENS
    assert score.ids == target + [tm.end_id]  # end token scored last, start token not scored
    mine = torch.tensor(score.logprobs, dtype=torch.float64)
    # float32 rounding per token is around 1e-7 relative; 500 of them stay far inside 1e-3 on the sum
    assert abs(score.logprob_sum - float(ref.sum())) < 1e-3
    assert torch.max(torch.abs(mine - ref)).item() < 1e-4
    # penalty power with alpha 1: the objective is the sum over the length (transformers' beam scorer)
    assert score.score == pytest.approx(score.logprob_sum / N_TOKENS, rel=1e-12)


def test_sum_of_logs_not_product_of_probabilities(long_case):
    _, _, _, _, score = long_case
    # the sum is the sum of the per-token logs (math.fsum: correctly rounded summation)
    assert score.logprob_sum == pytest.approx(math.fsum(score.logprobs), abs=1e-6)
    # far below log(smallest positive float64) ~ -744.4 (IEEE 754 subnormal 4.9e-324): a product of
    # probabilities would have underflowed to 0 (log -inf) in float32 and even in float64
    assert math.isfinite(score.logprob_sum)
    assert score.logprob_sum < math.log(5e-324)
    prod32 = torch.prod(torch.exp(torch.tensor(score.logprobs, dtype=torch.float32)))
    assert prod32.item() == 0.0  # what multiplying would give: the check above is not vacuous
