"""The fast scoring paths give the numbers of a plain per-target forward pass.

Reference for every check: transformers' own forward pass of the model, one target at a
time, followed by torch.log_softmax and the label's entry (the textbook teacher-forced
log-likelihood). Generation rules in the reference are transformers' own logits processor
classes applied position by position, as its generate applies them. FLOP counts are checked
against torch.utils.flop_counter.FlopCounterMode.
"""

from __future__ import annotations

import math

import pytest
import torch
from hypothesis import HealthCheck, given
from hypothesis import settings as hsettings
from hypothesis import strategies as st
from tinymodels import make_marian

from triage.models.transformers_backend import TransformersModel
from triage.scoring import scorer as scoring
from triage.scoring.scorer import ScoreRequest, score_requests
from triage.settings import DecoderSettings

TOL = 1e-5
LIMIT = 30


@pytest.fixture(scope="module")
def tm():
    model, tok = make_marian(seed=3, d_model=32, layers=2)
    return TransformersModel(model, tok)


def plain_logprobs(tm, source, labels, processors=None):
    """transformers forward for one target, log_softmax, the label's entry (rules applied per position)."""
    with torch.inference_mode():
        dec = torch.tensor([[tm.start_id] + labels[:-1]])
        logits = tm.model(input_ids=torch.tensor([source]), decoder_input_ids=dec).logits[0]
        logp = torch.log_softmax(logits.float(), dim=-1)
        out = []
        for t, tok in enumerate(labels):
            scores = logp[t : t + 1].clone()
            for proc in processors or ():
                scores = proc(dec[:, : t + 1], scores)
            out.append(float(scores[0, tok]))
    return out


def fast_settings(tm):
    return DecoderSettings(beam=4, alpha=1.0, max_new_tokens=LIMIT, eos_token_ids=(tm.end_id,))


def check_against_plain(tm, settings, requests, got, processors=None):
    for req, res in zip(requests, got, strict=True):
        assert len(res) == len(req.targets)
        for j, (ids, r) in enumerate(zip(req.targets, res, strict=True)):
            no_end = req.allow_no_end[j] if j < len(req.allow_no_end) else False
            labels = list(ids) if (no_end and len(ids) == settings.limit_new_tokens()) else list(ids) + [tm.end_id]
            assert r.ids == labels
            want = plain_logprobs(tm, req.source_ids, labels, processors)
            assert len(r.logprobs) == len(want)
            for a, b in zip(r.logprobs, want, strict=True):
                if math.isinf(b):
                    assert a == b
                else:
                    assert a == pytest.approx(b, abs=TOL)
            if all(math.isfinite(x) for x in want):
                assert r.logprob_sum == pytest.approx(math.fsum(want), abs=TOL * len(want))
                # power length penalty, len = scored tokens (settings.py objective)
                assert r.score == pytest.approx(math.fsum(want) / len(labels) ** settings.alpha, abs=TOL * len(want))


class Spy:
    """Wraps score_positions to record how much work the tree layout asked for."""

    def __init__(self, tm):
        self.tm, self.calls = tm, []

    def __enter__(self):
        real = self.tm.score_positions

        def spy(state, rows, inputs, picks, labels, **kw):
            self.calls.append((inputs.shape[0], int(picks.shape[0])))
            return real(state, rows, inputs, picks, labels, **kw)

        self.tm.score_positions = spy
        return self

    def __exit__(self, *exc):
        del self.tm.score_positions


def mixed_requests(tm):
    g = torch.Generator().manual_seed(5)

    def rand(n):
        return torch.randint(3, tm.vocab_size, (n,), generator=g).tolist()

    ref = rand(9)
    ref2 = ref[:4] + rand(5)
    return [
        ScoreRequest(rand(6), [ref, ref[:5] + rand(4)]),                  # output shares a 5-token prefix
        ScoreRequest(rand(4), [ref, ref2, ref[:3]]),                      # two references, output a prefix
        ScoreRequest(rand(7), [ref, []]),                                 # empty output
        ScoreRequest(rand(3), [ref, list(ref)]),                          # output equal to the reference
        ScoreRequest(rand(5), [ref[:4], ref[:4] + rand(6)]),              # output extends the reference
        ScoreRequest(rand(8), [rand(12), rand(LIMIT)], [False, True]),    # output stopped at the length limit
        ScoreRequest(rand(2), [rand(1), rand(2)]),                        # nothing shared
    ]


def test_tree_scores_equal_plain_forward(tm):
    reqs = mixed_requests(tm)
    settings = fast_settings(tm)
    with Spy(tm) as spy:
        got = score_requests(tm, settings, reqs)
    check_against_plain(tm, settings, reqs, got)
    assert spy.calls, "the prefix-tree path was not used"
    runs = sum(c[0] for c in spy.calls)
    positions = sum(c[1] for c in spy.calls)
    targets = sum(len(r.targets) for r in reqs)
    tokens = sum(len(x.ids) for res in got for x in res)
    # targets whose every prefix another target already holds need no decoder pass of their own:
    # the output equal to a prefix of the reference (row 1), the empty output (row 2), the output
    # equal to the reference (row 3) and the reference the output extends (row 4)
    assert runs == targets - 4
    # each distinct (row, tokens before the position) is projected once
    distinct = {(k, tuple(x.ids[:t])) for k, res in enumerate(got) for x in res for t in range(len(x.ids))}
    assert positions == len(distinct) < tokens


@pytest.mark.parametrize("budget", [1, 64, 100_000])
def test_token_budget_does_not_change_scores(tm, budget):
    reqs = mixed_requests(tm)
    settings = fast_settings(tm)
    base = score_requests(tm, settings, reqs)
    got = score_requests(tm, settings, reqs, token_budget=budget)
    for a_row, b_row in zip(base, got, strict=True):
        for a, b in zip(a_row, b_row, strict=True):
            assert a.ids == b.ids
            assert a.logprobs == pytest.approx(b.logprobs, abs=TOL)


@hsettings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_random_shared_prefixes(tm, data):
    tok = st.integers(3, tm.vocab_size - 1)
    reqs = []
    for _ in range(data.draw(st.integers(1, 4))):
        src = data.draw(st.lists(tok, min_size=1, max_size=8))
        ref = data.draw(st.lists(tok, min_size=0, max_size=10))
        targets = [ref]
        for _ in range(data.draw(st.integers(1, 3))):
            keep = data.draw(st.integers(0, len(ref)))
            targets.append(ref[:keep] + data.draw(st.lists(tok, max_size=6)))
        reqs.append(ScoreRequest(src, targets))
    settings = fast_settings(tm)
    got = score_requests(tm, settings, reqs, token_budget=data.draw(st.sampled_from([8, 4096])))
    check_against_plain(tm, settings, reqs, got)


def test_head_fallback_uses_full_forward(tm):
    # a model whose output head is not the plain formula: score_positions falls back, same numbers
    model, tok = make_marian(seed=4, d_model=32, layers=1)
    other = TransformersModel(model, tok)
    other._head_parts = None
    reqs = mixed_requests(other)
    settings = fast_settings(other)
    check_against_plain(other, settings, reqs, score_requests(other, settings, reqs))


def test_length_groups_and_grouped_encoder(tm, monkeypatch):
    from triage.models import transformers_backend as hf_backend

    lengths = [3, 40, 4, 41, 5, 39]
    groups = hf_backend.length_groups(lengths, min_tokens=10)
    assert sorted(i for g in groups for i in g) == list(range(6))
    assert [sorted(lengths[i] for i in g) for g in groups] == [[3, 4, 5], [39, 40, 41]]
    # grouped runs (groups of one row here) give the scores of the plain forward
    monkeypatch.setattr(hf_backend, "length_groups",
                        lambda lens, slack=1.1, min_tokens=512: [[i] for i in range(len(lens))])
    reqs = mixed_requests(tm)
    settings = fast_settings(tm)
    check_against_plain(tm, settings, reqs, score_requests(tm, settings, reqs))


def test_head_check_accepts_marian(tm):
    assert tm._head() is not None


def test_forced_target_logprobs_matches_log_softmax(tm):
    src = [[5, 6, 7, 8], [9, 10]]
    state = tm.encode(src)
    inputs = torch.tensor([[tm.start_id, 4, 5, 6], [tm.start_id, 7, 8, tm.pad_id]])
    labels = torch.tensor([[4, 5, 6, 1], [7, 8, 1, 0]])
    got = tm.forced_target_logprobs(state, inputs, labels)
    for b in range(2):
        want = plain_logprobs(tm, src[b], labels[b, : 4 - b].tolist())
        assert got[b, : 4 - b].tolist() == pytest.approx(want, abs=TOL)


@pytest.mark.parametrize("budget", [None, 1])
def test_rules_path_equals_plain_forward_with_processors(tm, monkeypatch, budget):
    from transformers.generation.logits_process import (
        NoRepeatNGramLogitsProcessor,
        RepetitionPenaltyLogitsProcessor,
    )

    if budget is not None:
        monkeypatch.setattr(scoring, "RULES_LOGITS_BUDGET", budget)  # forces the batch to split
    settings = fast_settings(tm).replace(no_repeat_ngram_size=2, repetition_penalty=1.3)
    procs = [RepetitionPenaltyLogitsProcessor(1.3), NoRepeatNGramLogitsProcessor(2)]
    reqs = mixed_requests(tm)
    a, b = reqs[0].targets[0][:2]
    reqs.append(ScoreRequest([4, 5], [[a, b, 7, a, b]]))   # repeats a bigram: blocked
    with Spy(tm) as spy:
        got = score_requests(tm, settings, reqs)
    assert not spy.calls, "generation rules must use the per-position path"
    check_against_plain(tm, settings, reqs, got, procs)
    blocked = got[-1][0]
    assert blocked.score == float("-inf") and blocked.blocked_rule == "repeated n-gram"


def test_bench_flop_count_matches_torch_counter():
    from torch.utils.flop_counter import FlopCounterMode

    from benchmarks.bench import row_flops

    model, tok = make_marian(seed=1, d_model=32, layers=2)
    # eager attention runs as matmuls the counter sees (it has no rule for the CPU sdpa kernel)
    model.set_attn_implementation("eager")
    src, tgt = [5, 6, 7, 8, 9], [4, 5, 6]
    with torch.inference_mode(), FlopCounterMode(display=False) as counter:
        model(input_ids=torch.tensor([src]), decoder_input_ids=torch.tensor([[0] + tgt]))
    assert row_flops(model.config, len(src), [len(tgt) + 1]) == counter.get_total_flops()
