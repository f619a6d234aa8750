"""Exact search for short outputs: is the beam's output really the decoder objective's best?

Depth-first search over target prefixes, bounded below by the beam's result, as in
Stahlberg and Byrne, 2019, "On NMT Search Errors and Model Errors: Cat Got Your Tongue?"
(exact decoding by depth-first search with the beam search result as the initial lower
bound). Here it runs with triage's objective (settings.objective) and generation rules.

Output space: the outputs the beam decoder can return, that is every target that ends with
an end token within ``max_new_tokens`` tokens, plus (``include_limit_hit=True``, the
default) every target of exactly ``max_new_tokens`` tokens without an end token, which
transformers' beam search also scores and may return (see triage.decoding.beam, point 5).

The bound. A prefix of t tokens with summed log-prob s can only grow into outputs of length
L in [t+1, max_new_tokens] whose sum S is at most s (every further log-prob is <= 0). Its
best possible score is therefore

    max over L of  S / penalty(L)  <=  s / max(penalty(t+1), penalty(max_new_tokens))

because s <= 0 makes s / P largest where P is largest, and both penalty forms are monotone
in L (power L**alpha and gnmt ((5+L)/6)**alpha grow with L for alpha > 0, shrink for
alpha < 0), so the largest P over the range sits at one of its ends. Without length
normalization (alpha 0, penalty "none", greedy) the bound is s itself, which is why plain
sums make exact search cheap and length normalization makes it expensive: under power with
alpha = 1 a prefix must be compared at its most flattering length. A minimum-length rule
only removes outputs, so the bound stays valid. A prefix whose bound is not above the best
score found so far is cut.

Children are visited best log-prob first, so good outputs are found early. When a prefix
is expanded, the next-token log-probs of all its children that pass the bound are computed
in one batched model call (the whole prefix is re-read: no cache, the search jumps between
branches); `nodes` counts the prefixes so scored. The search stops at a node budget or a
time budget per source; then the result is "budget reached" (the best found so far, not a
proof).
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass

import torch

from triage.decoding.beam import Hypothesis, beam_search
from triage.decoding.rules import apply_rules, build_processors
from triage.models.api import SequenceModel
from triage.settings import DecoderSettings

PROVEN = "proven"
BUDGET = "budget reached"


@dataclass
class ExactResult:
    status: str  # "proven" (no output scores higher) | "budget reached"
    best_tokens: list[int]  # without the end token
    best_score: float
    nodes: int  # prefixes whose next-token log-probs were computed
    best_finished: bool = True  # False: the best output stops at the length limit
    best_logprob_sum: float = float("-inf")
    best_length: int = 0
    seconds: float = 0.0
    #: the search found an output scoring higher than the beam's (a search error of the beam)
    beats_beam: bool = False


def _bound(settings: DecoderSettings, s: float, t: int, limit: int) -> float:
    """Highest score any completion of a t-token prefix with sum s can reach (see module docstring)."""
    if t + 1 > limit:
        return -math.inf
    return s / max(settings.length_penalty(t + 1), settings.length_penalty(limit))


@dataclass
class _Best:
    """The best output found so far: its score, tokens, whether it ended, summed log-prob, length."""

    score: float
    tokens: list[int]
    finished: bool
    logprob_sum: float
    length: int

    def offer(self, score: float, tokens: list[int], finished: bool, total: float, length: int) -> None:
        if score > self.score:
            self.score, self.tokens, self.finished, self.logprob_sum, self.length = \
                score, tokens, finished, total, length


def _start(lower_bound: Hypothesis, include_limit_hit: bool) -> _Best:
    """The beam's output is the first best unless it stopped at the limit and such outputs are excluded."""
    if lower_bound.finished or include_limit_hit:
        return _Best(lower_bound.score, list(lower_bound.tokens), lower_bound.finished, lower_bound.logprob_sum,
                     lower_bound.length)
    return _Best(-math.inf, [], True, -math.inf, 0)


def _expand(settings: DecoderSettings, prefix: tuple[int, ...], s: float, lp: torch.Tensor, eos: list[int],
            limit: int, include_limit_hit: bool, best: _Best) -> list[tuple[tuple[int, ...], float]]:
    """Offer the outputs that end after `prefix` (sum s, next-token log-probs lp) and return its
    children that pass the bound, best first."""
    t = len(prefix)
    for e in eos:  # end here
        total = s + float(lp[e])
        best.offer(settings.objective(total, t + 1), list(prefix), True, total, t + 1)
    # continue: children best first; the bound falls with the sum, so stop at the first cut
    values, order = torch.sort(lp, descending=True)
    eos_set = set(eos)
    children: list[tuple[tuple[int, ...], float]] = []
    for v, c in zip(values.tolist(), order.tolist(), strict=True):
        if c in eos_set:
            continue
        total = s + v
        if total == -math.inf:
            break
        if t + 1 == limit:  # a child here is an output stopped by the length limit
            if include_limit_hit:
                best.offer(settings.objective(total, limit), [*prefix, c], False, total, limit)
            break  # later children have lower sums
        if _bound(settings, total, t + 1, limit) <= best.score:
            break
        children.append(((*prefix, c), total))
    return children


@torch.inference_mode()
def exact_search(model: SequenceModel, settings: DecoderSettings, source: Sequence[int], *,
                 lower_bound: Hypothesis | None = None, max_nodes: int = 20000, max_seconds: float = 10.0,
                 include_limit_hit: bool = True, chunk: int = 64) -> ExactResult:
    """Best output of `source` under settings.objective, by bounded depth-first search.

    `lower_bound`: the beam's hypothesis for this source (decoded here when not given). Its
    score is where the search starts; an output must score strictly higher to replace it.
    """
    started = time.monotonic()
    source = [int(t) for t in source]
    if lower_bound is None:
        lower_bound = beam_search(model, settings, [source])[0]
    limit = settings.limit_new_tokens()
    eos = list(settings.eos_token_ids) or [int(model.end_id)]
    state = model.encode([source])
    procs = build_processors(model, settings, torch.tensor([source], dtype=torch.long))
    best = _start(lower_bound, include_limit_hit)

    def score_prefixes(prefixes: list[tuple[int, ...]]) -> list[torch.Tensor]:
        """Rule-processed next-token log-probs after each prefix (all of one length), one model call."""
        ids = torch.tensor([[int(model.start_id), *p] for p in prefixes], dtype=torch.long)
        rows, _ = model.select(state, None, torch.zeros(len(prefixes), dtype=torch.long))
        lp, _ = model.next_logprobs(rows, ids, None)
        lp = apply_rules(procs, ids, lp.float())
        if float(lp.max()) > 1e-4:
            raise ValueError("exact search needs log-probs <= 0; the model returned a positive value")
        return list(lp)

    stack: list[tuple[tuple[int, ...], float, torch.Tensor]] = [((), 0.0, score_prefixes([()])[0])]
    nodes = 1
    status = PROVEN
    while stack:
        if time.monotonic() - started > max_seconds:
            status = BUDGET
            break
        prefix, s, lp = stack.pop()
        if _bound(settings, s, len(prefix), limit) <= best.score:
            continue  # the best score rose since this prefix was queued
        children = _expand(settings, prefix, s, lp, eos, limit, include_limit_hit, best)
        if not children:
            continue
        if nodes + len(children) > max_nodes:
            status = BUDGET
            break
        # the children's own next-token log-probs, in one batched call per chunk
        vectors: list[torch.Tensor] = []
        for lo in range(0, len(children), chunk):
            vectors.extend(score_prefixes([p for p, _ in children[lo: lo + chunk]]))
        nodes += len(children)
        stack.extend((p, tot, vec) for (p, tot), vec in zip(reversed(children), reversed(vectors), strict=True))

    beats = best.score > lower_bound.score and (best.tokens != list(lower_bound.tokens)
                                                or best.finished != lower_bound.finished)
    return ExactResult(
        status=status, best_tokens=best.tokens, best_score=best.score, nodes=nodes, best_finished=best.finished,
        best_logprob_sum=best.logprob_sum, best_length=best.length, seconds=time.monotonic() - started,
        beats_beam=beats,
    )


def exact_search_many(model: SequenceModel, settings: DecoderSettings, sources: Sequence[Sequence[int]], *,
                      hypotheses: Sequence[Hypothesis] | None = None, **kw) -> list[ExactResult]:
    """`exact_search` for each source (the beam's hypotheses decoded in one batch when not given)."""
    sources = [list(s) for s in sources]
    if hypotheses is None:
        hypotheses = beam_search(model, settings, sources)
    if len(hypotheses) != len(sources):
        raise ValueError(f"{len(hypotheses)} hypotheses for {len(sources)} sources")
    return [exact_search(model, settings, s, lower_bound=h, **kw) for s, h in zip(sources, hypotheses, strict=True)]
