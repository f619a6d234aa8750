"""Exact search and wide beams against brute force over a model whose outputs can be listed.

Outside sources: enumeration of every output of TableModel (tests/tinymodels.py), each scored
here, not with triage's objective: the sum of log_softmax of the model's own next-token scores,
divided by the published length penalties (power: len**alpha, as transformers documents
length_penalty for beam search; gnmt: ((5 + len) / 6)**alpha, Wu et al. 2016 eq. 14, formula
from memory; width 1, greedy: the plain sum, common practice), and teacher-forced log-probs
from the transformers model's own forward pass.
"""

from __future__ import annotations

import itertools
import math
import sys
from pathlib import Path

import pytest
import torch
from hypothesis import given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))
from test_beam import padded  # noqa: E402  (the tokenizer's own padding)
from tinymodels import END, TableModel, make_wrapped_marian, random_sources  # noqa: E402

from triage.decoding.beam import Hypothesis, beam_search  # noqa: E402
from triage.decoding.exact import BUDGET, PROVEN, _bound, exact_search  # noqa: E402
from triage.settings import DecoderSettings  # noqa: E402

torch.set_num_threads(1)

LIMIT = 4
SOURCES = [[3, 4, 1], [4, 1], [3, 3, 4, 1], [4, 3, 1], [3, 1], [4, 4, 3, 1]]
OBJECTIVES = [(p, a) for p in ("power", "gnmt") for a in (0.0, 0.7, 1.0)]


def table_settings(beam: int, penalty: str, alpha: float, early=False) -> DecoderSettings:
    return DecoderSettings(beam=beam, penalty=penalty, alpha=alpha, early_stopping=early,
                           max_new_tokens=LIMIT, eos_token_ids=(1,))


def objective(total: float, n: int, beam: int, penalty: str, alpha: float) -> float:
    """The decoder's objective written out from its published forms, apart from triage's code: the
    summed log-prob `total` of `n` scored tokens over the length penalty."""
    if beam == 1 or penalty == "none":
        return total  # greedy search and no normalization: the plain sum (common practice)
    if penalty == "power":
        return total / n ** alpha  # transformers' docs: beam score = sum / length ** length_penalty
    if penalty == "gnmt":
        return total / ((5 + n) / (5 + 1)) ** alpha  # Wu et al. 2016, eq. 14 (from memory)
    raise ValueError(penalty)


def brute_force(model: TableModel, settings: DecoderSettings, source: list[int]):
    """Every output the decoder can return (ended within LIMIT tokens, or LIMIT tokens without end) as
    (objective, output, summed log-prob), best first."""
    state = model.encode([source])
    others = [t for t in range(model.vocab_size) if t != model.end_id]
    outputs = [p + (model.end_id,) for k in range(LIMIT) for p in itertools.product(others, repeat=k)]
    outputs += list(itertools.product(others, repeat=LIMIT))
    scored = []
    for seq in outputs:
        total = 0.0
        for i, tok in enumerate(seq):
            scores, _ = model.next_logprobs(state, torch.tensor([[model.start_id, *seq[:i]]]))
            total += float(torch.log_softmax(scores[0].double(), dim=-1)[tok])
        if total > -math.inf:
            scored.append((objective(total, len(seq), settings.beam, settings.penalty, settings.alpha), seq, total))
    scored.sort(reverse=True)
    return scored


@pytest.fixture(scope="module")
def table():
    model = TableModel(seed=1, scale=0.5)
    cache = {}

    def best(settings, source):
        key = (settings.penalty, settings.alpha, settings.beam > 1, tuple(source))
        if key not in cache:
            cache[key] = brute_force(model, settings, source)
        return cache[key]

    return model, best


def emitted(tokens, finished):
    return tuple(tokens) + ((END,) if finished else ())


@pytest.mark.parametrize("penalty,alpha", OBJECTIVES)
def test_exact_equals_brute_force(table, penalty, alpha):
    model, best = table
    s = table_settings(2, penalty, alpha)
    for src in SOURCES:
        scored = best(s, src)
        for lower in (None, "worthless"):
            # a worthless lower bound (the worst output) makes the search do all the work
            lb = None
            if lower:
                worst_score, worst, total = scored[-1]
                ended = worst[-1] == END
                lb = Hypothesis(tokens=list(worst[:-1] if ended else worst), token_logprobs=[0.0] * len(worst),
                                logprob_sum=total, length=len(worst), score=worst_score, finished=ended)
            r = exact_search(model, s, src, lower_bound=lb)
            assert r.status == PROVEN
            assert r.best_score == pytest.approx(scored[0][0], abs=1e-5)
            assert emitted(r.best_tokens, r.best_finished) == scored[0][1]


@pytest.mark.parametrize("penalty,alpha", OBJECTIVES)
@pytest.mark.parametrize("early", [False, "never", True])
def test_beam_wider_than_the_output_space_equals_brute_force(table, penalty, alpha, early):
    model, best = table
    s = table_settings(32, penalty, alpha, early)
    for src, h in zip(SOURCES, beam_search(model, s, SOURCES), strict=True):
        scored = best(s, src)
        assert len(scored) <= 32  # the width holds every output
        assert h.score == pytest.approx(scored[0][0], abs=1e-5)
        assert emitted(h.tokens, h.finished) == scored[0][1]


def test_narrow_beams_make_search_errors_that_exact_search_finds(table):
    # the brute-force comparisons above would be empty if narrow beams were always optimal
    model, best = table
    found = 0
    for penalty, alpha in OBJECTIVES:
        for beam in (1, 2):
            s = table_settings(beam, penalty, alpha)
            for src, h in zip(SOURCES, beam_search(model, s, SOURCES), strict=True):
                top = best(s, src)[0][0]
                r = exact_search(model, s, src, lower_bound=h)
                assert r.best_score >= h.score - 1e-6
                assert r.beats_beam == (top > h.score + 1e-6)
                found += r.beats_beam
    assert found >= 3


def test_greedy_objective_is_the_plain_sum(table):
    model, best = table
    s = table_settings(1, "power", 1.0)
    for src in SOURCES:
        r = exact_search(model, s, src)
        assert r.best_score == pytest.approx(best(s, src)[0][0], abs=1e-5)


def test_budget_is_reported():
    model = make_wrapped_marian(4)
    s = DecoderSettings.from_generation_config(model.model.generation_config, max_new_tokens=4,
                                               beam=2, alpha=1.0)
    src = random_sources(1, seed=14)[0]
    h = beam_search(model, s, [src])[0]
    r = exact_search(model, s, src, lower_bound=h, max_nodes=50)
    assert r.status == BUDGET and r.nodes <= 50
    assert r.best_score >= h.score  # the beam's result stays the floor
    r = exact_search(model, s, src, lower_bound=h, max_seconds=0.0)
    assert r.status == BUDGET


@pytest.mark.parametrize("alpha", [0.0, 0.7])
def test_exact_on_a_transformers_model(alpha):
    model = make_wrapped_marian(4)
    sources = random_sources(4, seed=14)
    s = DecoderSettings.from_generation_config(model.model.generation_config, max_new_tokens=3, beam=2, alpha=alpha)
    ids, mask = padded(sources)
    for i, src in enumerate(sources):
        r = exact_search(model, s, src)
        assert r.status == PROVEN
        # no beam width beats the proven optimum
        for beam in (2, 4, 8):
            assert beam_search(model, s.replace(beam=beam), [src])[0].score <= r.best_score + 1e-5
        # its score is the objective of transformers' teacher-forced log-probs of the output
        out = emitted(r.best_tokens, r.best_finished)
        dec = torch.tensor([[model.start_id, *out[:-1]]])
        with torch.no_grad():
            logits = model.model(input_ids=ids[i: i + 1], attention_mask=mask[i: i + 1], decoder_input_ids=dec).logits
        total = torch.log_softmax(logits[0], dim=-1).gather(-1, torch.tensor(out)[:, None]).sum()
        assert r.best_score == pytest.approx(objective(float(total), len(out), 2, "power", alpha), abs=1e-4)


@hyp_settings(max_examples=300, deadline=None)
@given(
    s=st.floats(-50, 0), t=st.integers(0, 10), extra=st.integers(1, 10),
    alpha=st.floats(-1.0, 2.0), penalty=st.sampled_from(["power", "gnmt"]),
    data=st.data(),
)
def test_bound_covers_every_completion(s, t, extra, alpha, penalty, data):
    # any completion: length L in [t+1, limit], sum S <= s; its score never exceeds the bound
    limit = t + extra
    settings = DecoderSettings(beam=2, penalty=penalty, alpha=alpha, max_new_tokens=limit)
    L = data.draw(st.integers(t + 1, limit))
    S = s - data.draw(st.floats(0, 50))
    assert objective(S, L, 2, penalty, alpha) <= _bound(settings, s, t, limit) + 1e-9
