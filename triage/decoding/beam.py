"""Batched beam search over the SequenceModel interface, step for step like transformers' generate.

`beam_search` decodes with the objective in `DecoderSettings` and returns one `Hypothesis`
per source. For a transformers checkpoint it returns the same output and the same score
as ``model.generate`` (transformers 5.x ``_beam_search`` and greedy ``_sample``) at the same
settings; tests/test_beam.py measures this over beam widths, length penalties and
early-stopping modes. For any other model it runs the same procedure.

How transformers' beam search works, and where its rules are odd
----------------------------------------------------------------
Every rule below is copied on purpose, so that the decoder triage replays is the decoder
the user ran.

1. Log-probs, then rules. Each step takes log_softmax of the float32 logits and only then
   applies the generation rules (rules.build_processors): a banned token gets minus
   infinity *without* renormalizing the rest.
2. One live beam at the start. All K beams begin as copies of the start token, but beams
   1..K-1 start with score -1e9 so that the first step only expands beam 0. When the
   vocabulary has fewer than 2K usable tokens, those placeholder copies are kept as
   running beams (in float32, -1e9 plus a log-prob is still -1e9) and can even end as
   "finished" hypotheses with a score near -1e9 / len**alpha. They never beat a real
   hypothesis, but they fill finished slots, which matters for early stopping (point 6).
3. 2K candidates, K of them eligible to finish. Each step ranks all K*V extensions by their
   summed log-prob (no length penalty) and keeps the top (1 + number of end tokens) * K,
   at least 2K. An extension that ends with an end token becomes a finished hypothesis only
   if it is among the top K of those candidates; one ranked K+1..2K is thrown away even if
   its length-normalized score would have been the best. The next running beams are the
   best K candidates that did not end.
4. Finished score. A hypothesis that ends at decoding step n (n tokens generated, the end
   token included) is scored ``sum / n**alpha``. The finished set keeps the K best by this
   score.
5. The length limit. At the last allowed step (``max_new_tokens``) every candidate "hits a
   stopping criterion", with or without an end token. So sequences cut by the limit join
   the finished set exactly like ended ones (top K candidates only), scored
   ``sum / max_new_tokens**alpha``, and can be the returned output. Such a hypothesis has
   ``finished=False`` here.
6. When a source stops. After each step, with ``running_best`` the summed log-prob of the
   best running beam and ``worst_finished`` the lowest score in the finished set (-1e9
   while any of the K slots is empty):
     - early_stopping=True: stop as soon as all K finished slots are filled.
     - all modes: stop once ``running_best / L**alpha <= worst_finished``, where
       L = tokens generated so far (early_stopping True/False) or, for "never" with
       alpha > 0, L = max_new_tokens. With alpha > 0 and mode False this is a heuristic:
       a running beam whose normalized score would still improve by growing can be cut.
       Once a source has stopped, nothing enters its finished set any more.
   The loop ends when every source has stopped or the limit is reached. Stopped sources
   do not influence the others, so triage drops them from the batch (same results, less
   work).
7. The returned output is the best of the finished set; its score is
   ``sequences_scores`` of generate.

Penalty "gnmt" (transformers has none): the divisor ((5 + n) / 6)**alpha replaces n**alpha
everywhere transformers uses n**alpha: in the finished score (point 4) and in the stopping
test (point 6, with the same L; for "never" with alpha > 0, L = max_new_tokens). Penalty
"none" behaves like transformers with length_penalty 0.

Beam width 1 is greedy search (common practice; transformers' ``num_beams=1`` runs greedy
``_sample``, not beam search): take the best token until an end token or the limit, score
= plain sum of log-probs. One difference: transformers' greedy applies the rules to the
raw logits and takes the argmax there, triage applies them to the log-probs (the only
thing the model interface offers). Both differ by a per-row constant, so they pick the
same token for every rule that only bans tokens (the usual ones); they can differ under a
repetition penalty, which scales values and so depends on that constant. With no active
rule they coincide. The reported token log-probs are always the rule-processed
log-probs, the numbers triage's forced scoring uses.

Numbers are float32 as in transformers; sums kept by the search (``logprob_sum``) are the
running float32 sums, like generate's.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import torch

from triage.decoding.rules import apply_rules, build_processors
from triage.models.api import SequenceModel
from triage.settings import DecoderSettings

PLACEHOLDER = -1.0e9  # transformers' "impossible" score (beams 1..K-1 at the start, masked entries)


@dataclass
class LossPoint:
    """Where the reference left the search.

    step: 1-based target position (end token included) of the reference token whose
          extension was dropped: the reference prefix of ``step - 1`` tokens was in the
          beam, the one of ``step`` tokens was not kept.
    rank: 1-based rank of that extension among all K*V candidates of the source at that
          step (1 + number of candidates with a strictly higher summed log-prob); None when
          the search stopped or the reference cannot fit.
    reason: "pruned" (not among the kept beams), "blocked by rule" (a generation rule gave
          the token minus infinity), "search stopped" (the source's search ended while the
          reference was still running; step = the next position), "length limit" (the
          reference with its end token is longer than the decoder may generate).
    smallest_width: filled by `smallest_width_keeping`: the smallest beam width found that
          keeps the reference to the end, None if none up to its max_width.
    """

    step: int
    rank: int | None
    reason: str = "pruned"
    smallest_width: int | None = None


@dataclass
class Hypothesis:
    """The decoder's output for one source."""

    tokens: list[int]  # target ids, without the end token
    token_logprobs: list[float]  # one per scored token, the end token included when present
    logprob_sum: float
    length: int  # scored tokens (end token included when present)
    score: float  # settings.objective(logprob_sum, length)
    finished: bool  # True: ended with an end token; False: stopped by the length limit
    end_token: int | None = None
    #: with track=...: whether the search completed the reference (it reached its end token
    #: among the top-K candidates while the source's search was still open); None untracked
    reference_kept: bool | None = None
    loss: LossPoint | None = None
    extra: dict[str, Any] = field(default_factory=dict, repr=False)


# ---------------------------------------------------------------------------------- helpers
def _eos_ids(model: SequenceModel, settings: DecoderSettings) -> list[int]:
    return list(settings.eos_token_ids) or [int(model.end_id)]


def _pad_sources(model: SequenceModel, sources: Sequence[Sequence[int]]) -> torch.Tensor:
    width = max(1, max(len(s) for s in sources))
    out = torch.full((len(sources), width), int(model.pad_id), dtype=torch.long)
    for i, s in enumerate(sources):
        if len(s):
            out[i, : len(s)] = torch.tensor(list(s), dtype=torch.long)
    return out


def _reference_with_end(ref: Sequence[int], eos: list[int], end_id: int) -> list[int]:
    """The reference as the decoder would emit it: cut at an end token if it holds one, end appended."""
    ref = [int(t) for t in ref]
    for i, t in enumerate(ref):
        if t in eos:
            return ref[: i + 1]
    return ref + [int(end_id)]


def _check_sources(model: SequenceModel, source_ids: Sequence[Sequence[int]]) -> None:
    for i, s in enumerate(source_ids):
        if len(s) == 0:
            raise ValueError(f"source {i} is empty: the encoder needs at least one token")
        bad = [t for t in s if not 0 <= int(t) < model.vocab_size]
        if bad:
            raise ValueError(f"source {i} holds ids outside the vocabulary: {bad[:5]}")


def _hypothesis(settings: DecoderSettings, tokens: list[int], lps: list[float], lp_sum: float,
                eos: list[int]) -> Hypothesis:
    ended = bool(tokens) and tokens[-1] in eos
    return Hypothesis(
        tokens=tokens[:-1] if ended else tokens,
        token_logprobs=lps,
        logprob_sum=float(lp_sum),
        length=len(lps),
        score=settings.objective(float(lp_sum), len(lps)),
        finished=ended,
        end_token=tokens[-1] if ended else None,
    )


# ---------------------------------------------------------------------------------- entry points
def beam_search(model: SequenceModel, settings: DecoderSettings, source_ids: Sequence[Sequence[int]], *,
                batch_size: int = 16, track: Sequence[Sequence[int]] | None = None,
                stop_when_lost: bool = False) -> list[Hypothesis]:
    """Decode every source with the decoder described by `settings`; one Hypothesis per source.

    `track`: reference target ids (without end token) per source. Each hypothesis then says
    whether the reference was kept to the end (`reference_kept`) and, if not, where it fell
    out (`loss`).

    `stop_when_lost` (with `track`): a source stops as soon as its tracked target has left the
    search (pruned, blocked, not eligible to finish, or the source's search ended without it):
    the decoder can then no longer return it, which is all a caller asking "does the decoder
    give this target?" needs. Such a hypothesis is not the decoder's output: it holds the best
    finished so far and says ``extra["stopped_early"] = True``. A source whose target was
    completed (it entered the finished set) decodes to its end as usual.
    """
    if stop_when_lost and track is None:
        raise ValueError("stop_when_lost needs track (the targets to watch)")
    source_ids = [list(map(int, s)) for s in source_ids]
    if track is not None and len(track) != len(source_ids):
        raise ValueError(f"track holds {len(track)} references for {len(source_ids)} sources")
    _check_sources(model, source_ids)
    if batch_size < 1:
        raise ValueError("batch_size must be at least 1")
    if settings.limit_new_tokens() < 1:
        raise ValueError(f"the decoder may generate {settings.limit_new_tokens()} tokens; it needs at least 1")
    out: list[Hypothesis] = []
    for lo in range(0, len(source_ids), batch_size):
        chunk = source_ids[lo: lo + batch_size]
        refs = None if track is None else [list(track[i]) for i in range(lo, lo + len(chunk))]
        if settings.beam == 1:
            out.extend(_greedy_chunk(model, settings, chunk, refs, stop_when_lost))
        else:
            out.extend(_beam_chunk(model, settings, chunk, refs, stop_when_lost))
    return out


# ---------------------------------------------------------------------------------- reference tracking
class _Tracking:
    """Where each source's reference leaves the search (one per chunk, greedy and beam alike).

    ``refs[i]`` is the reference as the decoder would emit it (end token included); a source is
    tracked until its reference is lost, completed or cut by the search stopping. A reference
    longer than the length limit is lost before the search starts.
    """

    def __init__(self, refs: list[list[int]], eos: list[int], end_id: int, limit: int):
        self.refs = [_reference_with_end(r, eos, end_id) for r in refs]
        self.losses: list[LossPoint | None] = [None] * len(refs)
        self.live = [True] * len(refs)
        self._tensors: tuple[torch.Tensor, torch.Tensor] | None = None
        for i, fr in enumerate(self.refs):
            if len(fr) > limit:
                self.lose(i, limit + 1, None, "length limit")

    def tensors(self) -> tuple[torch.Tensor, torch.Tensor]:
        """The references as a padded tensor [n, longest] (end token included) and their lengths [n]."""
        if self._tensors is None:
            width = max([len(r) for r in self.refs] + [1])
            tok = torch.zeros((len(self.refs), width), dtype=torch.long)
            for i, r in enumerate(self.refs):
                tok[i, : len(r)] = torch.tensor(r, dtype=torch.long)
            self._tensors = tok, torch.tensor([len(r) for r in self.refs], dtype=torch.long)
        return self._tensors

    def lose(self, i: int, step: int, rank: int | None, reason: str) -> None:
        self.losses[i] = LossPoint(step=step, rank=rank, reason=reason)
        self.live[i] = False

    def complete(self, i: int) -> None:
        self.live[i] = False

    def lose_at(self, i: int, step: int, values: torch.Tensor, index: int) -> None:
        """Lost at `step`: ranked among `values` by its candidate `index` (1 + those strictly higher)."""
        val = values[index]
        rank = 1 + int((values > val).sum())
        self.lose(i, step, rank, "blocked by rule" if torch.isneginf(val) else "pruned")

    def attach(self, hyps: list[Hypothesis], stopped: set[int] = frozenset()) -> list[Hypothesis]:
        for i, (h, loss) in enumerate(zip(hyps, self.losses, strict=True)):
            h.loss = loss
            h.reference_kept = loss is None
            if i in stopped:
                h.extra["stopped_early"] = True
        return hyps


def _tracking(refs: list[list[int]] | None, model: SequenceModel, eos: list[int], limit: int) -> _Tracking | None:
    return None if refs is None else _Tracking(refs, eos, int(model.end_id), limit)


# ---------------------------------------------------------------------------------- greedy
@torch.inference_mode()
def _greedy_chunk(model: SequenceModel, settings: DecoderSettings, sources: list[list[int]],
                  refs: list[list[int]] | None, stop_when_lost: bool = False) -> list[Hypothesis]:
    n = len(sources)
    limit = settings.limit_new_tokens()
    eos = _eos_ids(model, settings)
    eos_t = torch.tensor(eos)
    src = _pad_sources(model, sources)
    state = model.encode(sources)
    cache = None
    tokens: list[list[int]] = [[] for _ in range(n)]
    lps: list[list[float]] = [[] for _ in range(n)]
    sums = torch.zeros(n, dtype=torch.float32)
    active = torch.arange(n)
    procs = build_processors(model, settings, src)
    track = _tracking(refs, model, eos, limit)
    stopped: set[int] = set()  # sources dropped once their tracked target left (stop_when_lost)

    for t in range(limit):
        if len(active) == 0:
            break
        if stop_when_lost:
            gone = {row for row, i in enumerate(active.tolist()) if track.losses[i] is not None}
            if gone:  # the greedy output already differs from the target: nothing more to learn
                stopped.update(int(active[row]) for row in gone)
                rows = torch.tensor([row for row in range(len(active)) if row not in gone], dtype=torch.long)
                active = active[rows]
                if len(active) == 0:
                    break
                state, cache = model.select(state, cache, rows)
                procs = build_processors(model, settings, src[active])
        prefixes = torch.full((len(active), t + 1), int(model.start_id), dtype=torch.long)
        if t:
            prefixes[:, 1:] = torch.tensor([tokens[i][:t] for i in active.tolist()], dtype=torch.long)
        lp, cache = model.next_logprobs(state, prefixes, cache)
        lp = apply_rules(procs, prefixes, lp.float())
        best = lp.argmax(dim=-1)
        picked = lp.gather(1, best[:, None]).squeeze(1)
        sums[active] = sums[active] + picked
        best_l, picked_l = best.tolist(), picked.tolist()
        for row, i in enumerate(active.tolist()):
            tokens[i].append(best_l[row])
            lps[i].append(picked_l[row])
            if track is not None and track.live[i]:
                want = track.refs[i][t]
                if best_l[row] != want:
                    track.lose_at(i, t + 1, lp[row], want)
                elif t == len(track.refs[i]) - 1:
                    track.complete(i)  # the reference is the output
        keep = ~torch.isin(best, eos_t)
        if not bool(keep.all()):
            rows = torch.nonzero(keep).squeeze(1)
            active = active[rows]
            if len(active):
                state, cache = model.select(state, cache, rows)
                procs = build_processors(model, settings, src[active])
    out = [_hypothesis(settings, tokens[i], lps[i], float(sums[i]), eos) for i in range(n)]
    return out if track is None else track.attach(out, stopped)


# ---------------------------------------------------------------------------------- beam
@dataclass
class _Beams:
    """The K running beams and the finished set of every source of a chunk (tensors [n, K, ...])."""

    run_tok: torch.Tensor    # [n, K, limit] tokens of each running beam
    run_lp: torch.Tensor     # [n, K, limit] their log-probs
    run_score: torch.Tensor  # [n, K] summed log-prob (no penalty)
    fin_tok: torch.Tensor    # finished set: tokens, log-probs, sum, length, penalized score, filled
    fin_lp: torch.Tensor
    fin_sum: torch.Tensor
    fin_len: torch.Tensor
    fin_score: torch.Tensor
    fin_flag: torch.Tensor
    open_: torch.Tensor      # [n] transformers' is_early_stop_heuristic_unsatisfied

    @classmethod
    def start(cls, n: int, K: int, limit: int) -> _Beams:
        run_score = torch.zeros((n, K), dtype=torch.float32)
        run_score[:, 1:] = PLACEHOLDER  # one live beam at the start (point 2)
        return cls(
            run_tok=torch.zeros((n, K, limit), dtype=torch.long),
            run_lp=torch.zeros((n, K, limit), dtype=torch.float32),
            run_score=run_score,
            fin_tok=torch.zeros((n, K, limit), dtype=torch.long),
            fin_lp=torch.zeros((n, K, limit), dtype=torch.float32),
            fin_sum=torch.zeros((n, K), dtype=torch.float32),
            fin_len=torch.zeros((n, K), dtype=torch.long),
            fin_score=torch.full((n, K), PLACEHOLDER, dtype=torch.float32),
            fin_flag=torch.zeros((n, K), dtype=torch.bool),
            open_=torch.ones(n, dtype=torch.bool),
        )


@dataclass
class _Step:
    """One step's candidates for the active sources (point 3) and what became of them."""

    acc: torch.Tensor        # [A, K*V] summed log-prob of every extension
    top_val: torch.Tensor    # [A, keep] the best `keep` of them
    top_idx: torch.Tensor    # [A, keep] their flat index (beam * V + token)
    top_beam: torch.Tensor   # [A, keep] the beam each extends
    hits: torch.Tensor       # [A, keep] it stops (an end token, or the length limit)
    cand_tok: torch.Tensor   # [A, keep, limit] tokens of each candidate
    cand_lp: torch.Tensor    # [A, keep, limit] log-probs of each candidate
    nxt: torch.Tensor = None       # [A, K] candidates that run on
    sel: torch.Tensor = None       # [A, K] entries of (finished set + candidates) kept as finished
    did: torch.Tensor = None       # [A, keep] candidates eligible to finish (top K, stopping)
    full: torch.Tensor = None      # [A, 1] finished set already full under early stopping


@torch.inference_mode()
def _beam_chunk(model: SequenceModel, settings: DecoderSettings, sources: list[list[int]],
                refs: list[list[int]] | None, stop_when_lost: bool = False) -> list[Hypothesis]:
    n = len(sources)
    K = settings.beam
    V = int(model.vocab_size)
    limit = settings.limit_new_tokens()
    eos = _eos_ids(model, settings)
    eos_t = torch.tensor(eos)
    keep = max(2, 1 + len(eos)) * K

    src = _pad_sources(model, sources)
    state = model.encode(sources)
    state, cache = model.select(state, None, torch.arange(n).repeat_interleave(K))
    procs = build_processors(model, settings, src)
    beams = _Beams.start(n, K, limit)
    track = _tracking(refs, model, eos, limit)
    # beam index holding each source's reference prefix, -1 when not (or no longer) tracked
    ref_beam = torch.tensor([0 if track is not None and track.live[i] else -1 for i in range(n)], dtype=torch.long)
    stopped: set[int] = set()  # sources dropped once their tracked target left (stop_when_lost)

    active = torch.arange(n)
    for t in range(limit):  # t tokens generated so far; this step picks token t+1
        A = len(active)
        prefixes = torch.cat(
            [torch.full((A * K, 1), int(model.start_id), dtype=torch.long),
             beams.run_tok[active, :, :t].reshape(A * K, t)],
            dim=1,
        )
        lp, cache = model.next_logprobs(state, prefixes, cache)
        lp = apply_rules(procs, prefixes, lp.float()).view(A, K, V)
        step = _candidates(beams, active, lp, t, keep, limit, eos_t)
        new_run_tok, new_run_lp, new_run_score, beam_src = _next_running(step, K, limit)
        _update_finished(beams, active, step, settings, t, K, keep, limit)
        if track is not None:
            _track_step(t, active, step, beams.open_, ref_beam, track, V)

        beams.run_tok[active] = new_run_tok
        beams.run_lp[active] = new_run_lp
        beams.run_score[active] = new_run_score
        if t + 1 >= limit:
            break

        done = _stopped(beams, active, settings, t, limit)
        if track is not None:
            for row in torch.nonzero(done).squeeze(1).tolist():
                i = int(active[row])
                if ref_beam[i] >= 0:
                    track.lose(i, t + 2, None, "search stopped")
                    ref_beam[i] = -1
        if stop_when_lost:
            gone = torch.tensor([track.losses[i] is not None for i in active.tolist()], dtype=torch.bool)
            stopped.update(int(i) for i in active[gone & ~done].tolist())
            done = done | gone
        flat = (torch.arange(A)[:, None] * K + beam_src).reshape(-1)
        if bool(done.any()):
            rows = torch.nonzero(~done).squeeze(1)
            if len(rows) == 0:
                break
            flat = flat.view(A, K)[rows].reshape(-1)
            active = active[rows]
            procs = build_processors(model, settings, src[active])
        state, cache = model.select(state, cache, flat)

    out = [_best_finished(beams, settings, i, eos) for i in range(n)]
    return out if track is None else track.attach(out, stopped)


def _candidates(beams: _Beams, active: torch.Tensor, lp: torch.Tensor, t: int, keep: int, limit: int,
                eos_t: torch.Tensor) -> _Step:
    """The best `keep` extensions of the active sources' beams by summed log-prob (point 3)."""
    A, K, V = lp.shape
    acc = (lp + beams.run_score[active][:, :, None]).reshape(A, K * V)
    top_val, top_idx = torch.topk(acc, keep, dim=1)
    top_beam = top_idx // V
    top_tokv = top_idx % V
    hits = torch.isin(top_tokv, eos_t)
    if t + 1 >= limit:
        hits = torch.ones_like(hits)  # the length limit stops every candidate (point 5)
    cand_tok = torch.gather(beams.run_tok[active], 1, top_beam[:, :, None].expand(A, keep, limit)).clone()
    cand_tok[:, :, t] = top_tokv
    cand_lp = torch.gather(beams.run_lp[active], 1, top_beam[:, :, None].expand(A, keep, limit)).clone()
    cand_lp[:, :, t] = torch.gather(lp.reshape(A, K * V), 1, top_idx)
    return _Step(acc, top_val, top_idx, top_beam, hits, cand_tok, cand_lp)


def _next_running(step: _Step, K: int, limit: int):
    """The next running beams: the best K candidates that did not stop."""
    A = step.top_val.shape[0]
    run_val = step.top_val + step.hits.to(torch.float32) * PLACEHOLDER
    step.nxt = nxt = torch.topk(run_val, K, dim=1).indices
    new_run_tok = torch.gather(step.cand_tok, 1, nxt[:, :, None].expand(A, K, limit))
    new_run_lp = torch.gather(step.cand_lp, 1, nxt[:, :, None].expand(A, K, limit))
    new_run_score = torch.gather(run_val, 1, nxt)
    beam_src = torch.gather(step.top_beam, 1, nxt)
    return new_run_tok, new_run_lp, new_run_score, beam_src


def _update_finished(beams: _Beams, active: torch.Tensor, step: _Step, settings: DecoderSettings, t: int,
                     K: int, keep: int, limit: int) -> None:
    """Only the top K candidates may enter the finished set, scored with the length penalty (point 4)."""
    A = len(active)
    step.did = did = step.hits & (torch.arange(keep) < K)[None, :]
    f_val = step.top_val / settings.length_penalty(t + 1)
    step.full = full = beams.fin_flag[active].all(dim=1, keepdim=True) & (settings.early_stopping is True)
    f_val = f_val + full.to(torch.float32) * PLACEHOLDER
    f_val = f_val + (~beams.open_[active])[:, None].to(torch.float32) * PLACEHOLDER
    f_val = f_val + (~did).to(torch.float32) * PLACEHOLDER
    m_score = torch.cat([beams.fin_score[active], f_val], dim=1)
    step.sel = sel = torch.topk(m_score, K, dim=1).indices
    m_tok = torch.cat([beams.fin_tok[active], step.cand_tok], dim=1)
    m_lp = torch.cat([beams.fin_lp[active], step.cand_lp], dim=1)
    m_sum = torch.cat([beams.fin_sum[active], step.top_val], dim=1)
    m_len = torch.cat([beams.fin_len[active], torch.full((A, keep), t + 1, dtype=torch.long)], dim=1)
    m_flag = torch.cat([beams.fin_flag[active], did], dim=1)
    beams.fin_score[active] = torch.gather(m_score, 1, sel)
    beams.fin_tok[active] = torch.gather(m_tok, 1, sel[:, :, None].expand(A, K, limit))
    beams.fin_lp[active] = torch.gather(m_lp, 1, sel[:, :, None].expand(A, K, limit))
    beams.fin_sum[active] = torch.gather(m_sum, 1, sel)
    beams.fin_len[active] = torch.gather(m_len, 1, sel)
    beams.fin_flag[active] = torch.gather(m_flag, 1, sel)


def _stopped(beams: _Beams, active: torch.Tensor, settings: DecoderSettings, t: int, limit: int) -> torch.Tensor:
    """Which active sources stop after this step (point 6; transformers' _check_early_stop_heuristic)."""
    early = settings.early_stopping
    hyp_len_is_limit = early == "never" and settings.normalizes and settings.alpha > 0.0
    denom = settings.length_penalty(limit if hyp_len_is_limit else t + 1)
    best_possible = beams.run_score[active][:, :1] / denom
    worst = torch.where(beams.fin_flag[active], beams.fin_score[active].min(dim=1, keepdim=True).values,
                        torch.tensor(PLACEHOLDER))
    beams.open_[active] = beams.open_[active] & (best_possible > worst).any(dim=1)
    done = ~beams.open_[active]
    if early is True:
        done = done | beams.fin_flag[active].all(dim=1)
    return done


def _best_finished(beams: _Beams, settings: DecoderSettings, i: int, eos: list[int]) -> Hypothesis:
    """The returned output of source i: the best of its finished set (point 7)."""
    L = int(beams.fin_len[i, 0])
    toks = beams.fin_tok[i, 0, :L].tolist()
    h = _hypothesis(settings, toks, beams.fin_lp[i, 0, :L].tolist(), float(beams.fin_sum[i, 0]), eos)
    h.extra["search_score"] = float(beams.fin_score[i, 0])
    return h


def _track_step(t: int, active: torch.Tensor, step: _Step, open_: torch.Tensor, ref_beam: torch.Tensor,
                track: _Tracking, V: int) -> None:
    """Follow the reference prefix through one beam step (see LossPoint for the definitions).

    Vectorized over the tracked sources; only the sources whose reference completes or is lost
    at this step are visited one by one."""
    rb = ref_beam[active]
    rows = torch.nonzero(rb >= 0).squeeze(1)
    if not len(rows):
        return
    idx = active[rows]
    ref_tok, ref_len = track.tensors()
    flat = rb[rows] * V + ref_tok[idx, t]
    match = step.top_idx[rows] == flat[:, None]                     # [R, keep]: where the extension ranks
    has = match.any(dim=1)
    pos = match.to(torch.int8).argmax(dim=1)                        # its candidate index (valid where `has`)
    ref_beam[idx] = -1
    is_end = ref_len[idx] - 1 == t                                   # this step's token is the reference's end token
    finishes = has & step.did[rows, pos] & ~step.full[rows, 0] & open_[idx]
    in_next = step.nxt[rows] == pos[:, None]                        # [R, K]: the running beam it became
    runs = has & in_next.any(dim=1)
    go_on = ~is_end & runs
    ref_beam[idx[go_on]] = in_next[go_on].to(torch.int8).argmax(dim=1)
    completes = is_end & finishes
    for r in torch.nonzero(~go_on).squeeze(1).tolist():
        i = int(idx[r])
        if bool(completes[r]):
            track.complete(i)
        else:
            track.lose_at(i, t + 1, step.acc[int(rows[r])], int(flat[r]))


# ---------------------------------------------------------------------------------- widths
def smallest_width_keeping(model: SequenceModel, settings: DecoderSettings, source_ids: Sequence[Sequence[int]],
                           ref_ids: Sequence[Sequence[int]], max_width: int = 64, *,
                           batch_size: int = 16) -> list[LossPoint | None]:
    """Per source: None if the decoder at `settings.beam` keeps the reference to the end, else its
    LossPoint at that width with `smallest_width` = the smallest width found that keeps it.

    Widths are tried by re-running beam search with the reference tracked: every width from 1
    to 8 in turn (beam search is not monotone in the width, so small widths are checked one by
    one), then 16, 32, ... up to `max_width` (always tried last), and between the last width
    that lost the reference and the first that kept it, bisection. Above 8 the answer assumes
    the widths in that interval behave monotonically; it is the smallest width seen to keep
    the reference. Width 1 is greedy search, as in the decoder. Sources are batched per width.
    """
    if len(ref_ids) != len(source_ids):
        raise ValueError(f"{len(ref_ids)} references for {len(source_ids)} sources")
    base = beam_search(model, settings, source_ids, batch_size=batch_size, track=ref_ids)
    result: list[LossPoint | None] = [h.loss for h in base]
    todo = [i for i, lp in enumerate(result) if lp is not None and lp.reason != "length limit"]
    if not todo or max_width < 1:
        return result
    kept_at: dict[int, int] = {}
    lost_at: dict[int, int] = {i: 0 for i in todo}

    def run(width: int, rows: list[int]) -> None:
        if not rows:
            return
        hs = beam_search(model, settings.replace(beam=width), [source_ids[i] for i in rows],
                         batch_size=batch_size, track=[ref_ids[i] for i in rows])
        for i, h in zip(rows, hs, strict=True):
            if h.reference_kept:
                kept_at[i] = width
            else:
                lost_at[i] = max(lost_at[i], width)

    ladder = list(range(1, min(8, max_width) + 1))
    w = 16
    while w < max_width:
        ladder.append(w)
        w *= 2
    if max_width > 8 and max_width not in ladder:
        ladder.append(max_width)
    for width in ladder:
        run(width, [i for i in todo if i not in kept_at and width != settings.beam])
        if width == settings.beam:
            for i in todo:
                if i not in kept_at:
                    lost_at[i] = max(lost_at[i], width)
    # bisection between the last losing and the first keeping width (only above 8)
    while True:
        groups: dict[int, list[int]] = {}
        for i in todo:
            if i in kept_at and kept_at[i] - lost_at[i] > 1 and kept_at[i] > 8:
                groups.setdefault((kept_at[i] + lost_at[i]) // 2, []).append(i)
        if not groups:
            break
        for width, rows in sorted(groups.items()):
            run(width, rows)  # width lies above lost_at[i], so run's max() records it as the new lower end
    for i in todo:
        lp = result[i]
        assert lp is not None
        lp.smallest_width = kept_at.get(i)
    return result
