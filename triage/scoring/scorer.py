"""Teacher-forced scoring of targets under the decoder's objective.

For each row, the source is encoded once and every target of that row (its references and
its output) is scored against the same encoder state. Per target it records the log-prob of
each scored token (end token included unless the target stopped at the length limit), their
sum, and the objective's score. Batches are length-sorted under a token budget; results come
back in input order.

When the settings carry generation rules, the rules (transformers' logits processors) are
applied to each position's log-probs exactly as the decoder applied them; a target token the
rules set to minus infinity makes the target `blocked`, and the rule is named.

Without generation rules (and with a model offering PositionScoring) the targets of a
row are laid out as a prefix tree: a decoder position is fixed by the tokens before it, so
a position that several targets share (an output that starts like its reference) is
projected onto the vocabulary once, and a target whose every position is already in the
tree (an output that is a prefix of a reference) needs no decoder pass of its own. The
output projection and softmax run only at the tree's positions; the values are those of
a plain per-target forward pass and log_softmax.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import torch

from triage.decoding.rules import apply_rules, build_processors, first_blocking_rule
from triage.models.api import SequenceModel, capabilities, forced_logprobs
from triage.settings import DecoderSettings

#: most log-probs the rules path holds at once (it keeps whole vocabulary vectors per position)
RULES_LOGITS_BUDGET = 1 << 26

#: Version of the scoring code's numbers. The score cache is keyed on it, so cached scores are
#: reused only by the code that computed them. Bump it in the same change whenever scoring can
#: give different numbers or verdict inputs for the same model, settings and texts: how targets
#: are planned (end token, length limit), how log-probs are computed or summed, the objective,
#: how rules block a target, what is skipped and why. Pure speed-ups that keep every number
#: (tests/test_scoring_speedups.py) need no bump.
SCORING_VERSION = 3


@dataclass
class TargetScore:
    """One target's teacher-forced log-probs under the objective."""

    ids: list[int]                      # scored token ids (end token last unless hit_limit)
    logprobs: list[float]               # one per scored token, after the decoder's rules
    logprob_sum: float
    length: int                         # scored tokens (the length the penalty sees)
    score: float                        # objective: logprob_sum / penalty(length)
    hit_limit: bool = False             # stopped at the decoder's length limit: scored without end token
    blocked_rule: str | None = None     # a decoding rule forbids this target
    skipped: str | None = None          # why it could not be scored
    skip_code: str | None = None        # the kind of that reason ("too-long-for-model", "source:too-long", ...)
    detail: str | None = None           # a blocked target's other facts (its length, what else is wrong with it)

    @property
    def scored(self) -> bool:
        return self.skipped is None


@dataclass
class ScoreRequest:
    """Targets of one row, all scored against the same source."""

    source_ids: list[int]
    targets: list[list[int]]            # target ids without the end token
    allow_no_end: list[bool] = field(default_factory=list)  # may this target be scored without end token?


def plan_target(ids: list[int], end_id: int, limit: int, allow_no_end: bool) -> tuple[list[int], bool, str | None]:
    """The scored sequence for target `ids`: (labels, hit_limit, blocked_rule)."""
    if allow_no_end and len(ids) == limit:
        return list(ids), True, None
    labels = list(ids) + [end_id]
    if len(labels) > limit:
        return labels, False, "length limit"
    return labels, False, None


@dataclass
class ScoringPlan:
    """How score_requests cuts its requests into batches: the scoring batches (request indices, in
    the order scored), whether the prefix-tree path is used, and the targets that need no batch
    (skipped: they cannot be scored). A batch's numbers depend only on its requests, their order
    and the torch thread count, so scoring the same batches anywhere (another process, another
    machine) gives the same bytes."""

    batches: list[list[int]]
    tree: bool
    skipped: dict[tuple[int, int], TargetScore] = field(default_factory=dict)  # (request, target) -> score


def plan_batches(model: SequenceModel, settings: DecoderSettings, requests: Sequence[ScoreRequest], *,
                 token_budget: int = 4096) -> ScoringPlan:
    """Length-sorted batches of the requests under the token budget (see score_requests)."""
    limit = settings.limit_new_tokens()
    skipped: dict[tuple[int, int], TargetScore] = {}
    by_row: dict[int, list] = {}  # request index -> its scorable jobs, so a source is encoded once
    for i, req in enumerate(requests):
        jobs, skips = _plan_row(model, limit, req)
        for j, score in skips.items():
            skipped[(i, j)] = score
        if jobs:
            by_row[i] = jobs
    tree = _fast_path_usable(model, settings, requests, by_row)
    # order rows by their longest target
    order = sorted(by_row, key=lambda i: (max(len(j[2]) for j in by_row[i]), len(requests[i].source_ids)))
    batches: list[list[int]] = []
    batch: list[int] = []
    width = 0
    n_targets = 0
    for i in order:
        w = max(max(len(j[2]) for j in by_row[i]), len(requests[i].source_ids))
        if batch and max(width, w) * (n_targets + len(by_row[i])) > token_budget:
            batches.append(batch)
            batch, width, n_targets = [], 0, 0
        batch.append(i)
        width = max(width, w)
        n_targets += len(by_row[i])
    if batch:
        batches.append(batch)
    return ScoringPlan(batches, tree, skipped)


def score_batch(model: SequenceModel, settings: DecoderSettings, requests: Sequence[ScoreRequest],
                tree: bool) -> list[list[TargetScore]]:
    """Score one planned batch (its requests in the plan's order); results[k][j] is target j of
    request k. The same batch gives the same numbers in any process with the same thread count."""
    limit = settings.limit_new_tokens()
    results: list[list[TargetScore | None]] = [[None] * len(r.targets) for r in requests]
    by_row: dict[int, list] = {}
    for i, req in enumerate(requests):
        jobs, skips = _plan_row(model, limit, req)
        for j, score in skips.items():
            results[i][j] = score
        by_row[i] = [(i, *job[1:]) for job in jobs]
    (_score_batch_tree if tree else _score_batch)(model, settings, requests, list(range(len(requests))), by_row,
                                                  results)
    return results  # type: ignore[return-value]


def score_requests(
    model: SequenceModel,
    settings: DecoderSettings,
    requests: Sequence[ScoreRequest],
    *,
    token_budget: int = 4096,
    progress: Callable[[int], None] | None = None,
    pool: BatchScorer | None = None,
) -> list[list[TargetScore]]:
    """Score every target of every request; results[i][j] is target j of request i.

    pool: scores the planned batches elsewhere (triage.cluster's workers); None: the pool the run
    set (triage.decoding.decode.pool_for_run), else here. Either way the batches are the plan's, so the numbers are the same."""
    plan = plan_batches(model, settings, requests, token_budget=token_budget)
    if pool is None:
        from triage.decoding.decode import run_pool

        pool = run_pool()
    results: list[list[TargetScore | None]] = [[None] * len(r.targets) for r in requests]
    for (i, j), score in plan.skipped.items():
        results[i][j] = score
    shards = [[requests[i] for i in batch] for batch in plan.batches]
    if pool is None:
        done: Iterable[list[list[TargetScore]]] = (score_batch(model, settings, s, plan.tree) for s in shards)
    else:
        done = pool.score_batches(settings, shards, plan.tree)
    for batch, scored in zip(plan.batches, done, strict=True):
        for i, row in zip(batch, scored, strict=True):
            results[i] = list(row)  # its skipped targets as the plan has them
        if progress:
            progress(len(batch))
    return results  # type: ignore[return-value]


class BatchScorer(Protocol):
    """Something that scores planned batches elsewhere and hands the results back in order."""

    def score_batches(self, settings: DecoderSettings, batches: Sequence[Sequence[ScoreRequest]],
                      tree: bool) -> Iterable[list[list[TargetScore]]]: ...


def _plan_row(model: SequenceModel, limit: int, req: ScoreRequest) -> tuple[list, dict[int, TargetScore]]:
    """One request's scorable jobs (request index 0, target index, labels, hit_limit, blocked) and the
    scores of the targets that cannot be scored at all."""
    jobs = []
    skipped: dict[int, TargetScore] = {}
    for j, ids in enumerate(req.targets):
        no_end = req.allow_no_end[j] if j < len(req.allow_no_end) else False
        labels, hit, blocked = plan_target(ids, model.end_id, limit, no_end)
        unscorable = _unscorable(model, req.source_ids, labels)
        if unscorable:
            kind, reason = unscorable
            skipped[j] = TargetScore(labels, [], float("nan"), len(labels), float("nan"), hit, None, reason, kind)
            continue
        jobs.append((0, j, labels, hit, blocked))
    return jobs, skipped


def _fast_path_usable(model, settings, requests, by_row) -> bool:
    """Prefix-tree scoring needs the PositionScoring capability and no active generation rule."""
    if not by_row or not capabilities(model).position_scoring:
        return False
    first = next(iter(by_row))
    return not build_processors(model, settings, _source_tensor(model, [requests[first].source_ids]))


def source_problem(model: SequenceModel, source_ids: Sequence[int]) -> str | None:
    """Why the model cannot read a source at all: empty, or longer than it takes.

    The one source check of scoring; the run reports it as ``source: <this>``.
    """
    if not source_ids:
        return "empty after tokenization"
    most = model.max_source_tokens
    if most is not None and len(source_ids) > most:
        return f"{len(source_ids)} tokens, the model takes at most {most} (nothing is cut off)"
    return None


def source_problem_kind(model: SequenceModel, source_ids: Sequence[int]) -> str | None:
    """The kind of source_problem's answer: "empty" or "too-long" (None: no problem)."""
    if not source_ids:
        return "empty"
    most = model.max_source_tokens
    return "too-long" if most is not None and len(source_ids) > most else None


def target_capacity_problem(model: SequenceModel, labels: Sequence[int]) -> str | None:
    """Why the model cannot take a scored target (its labels, end token included): too many positions."""
    if model.max_target_tokens is not None and len(labels) > model.max_target_tokens:
        return f"target has {len(labels)} tokens, the model takes at most {model.max_target_tokens}"
    return None


def _unscorable(model: SequenceModel, source_ids: list[int], labels: list[int]) -> tuple[str, str] | None:
    """(kind, reason) when the target cannot be scored at all; None when it can."""
    problem = source_problem(model, source_ids)
    if problem:
        return f"source:{source_problem_kind(model, source_ids)}", f"source: {problem}"
    problem = target_capacity_problem(model, labels)
    if problem:
        return "too-long-for-model", problem
    return None


@torch.inference_mode()
def _score_batch(model, settings, requests, batch, by_row, results) -> None:
    """Full log-prob vectors at every position, the generation rules applied step by step."""
    n_targets = sum(len(by_row[i]) for i in batch)
    width = max(len(j[2]) for i in batch for j in by_row[i])
    if len(batch) > 1 and n_targets * width * model.vocab_size > RULES_LOGITS_BUDGET:
        half = len(batch) // 2
        _score_batch(model, settings, requests, batch[:half], by_row, results)
        _score_batch(model, settings, requests, batch[half:], by_row, results)
        return
    state = model.encode([requests[i].source_ids for i in batch])
    index, labels_list, meta = [], [], []
    for b, i in enumerate(batch):
        for job in by_row[i]:
            index.append(b)
            labels_list.append(job[2])
            meta.append(job)
    state, _ = model.select(state, None, torch.tensor(index, dtype=torch.long))
    n, width = len(labels_list), max(len(x) for x in labels_list)
    labels = torch.full((n, width), model.pad_id, dtype=torch.long)
    inputs = torch.full((n, width), model.pad_id, dtype=torch.long)
    for k, lab in enumerate(labels_list):
        labels[k, : len(lab)] = torch.tensor(lab)
        inputs[k, 0] = model.start_id
        inputs[k, 1 : len(lab)] = torch.tensor(lab[:-1])

    src = _source_tensor(model, [requests[batch[b]].source_ids for b in index])
    processors = build_processors(model, settings, src)
    ends = end_ids(model, settings)
    # with several end tokens a target ends with whichever the decoder prefers there (any ends it)
    ending = {k: len(job[2]) - 1 for k, job in enumerate(meta) if len(ends) > 1 and not job[3]}
    if not processors and not ending and capabilities(model).target_logprob_scoring:
        token_lp = model.forced_target_logprobs(state, inputs, labels).float()
        for k, job in enumerate(meta):
            _store(settings, results, job, token_lp[k, : len(job[2])].tolist(), None)
        return

    full = forced_logprobs(model, state, inputs).float()
    token_lp = torch.empty((n, width), dtype=torch.float32)
    blocked_by: dict[int, str] = {}
    for t in range(width):
        prefixes = inputs[:, : t + 1]
        step = apply_rules(processors, prefixes, full[:, t, :])
        for k, last in ending.items():
            if last == t:
                labels[k, t] = ends[int(step[k, list(ends)].argmax())]
        token_lp[:, t] = step.gather(-1, labels[:, t : t + 1]).squeeze(-1)
        for k in torch.nonzero(torch.isneginf(token_lp[:, t])).flatten().tolist():
            if k not in blocked_by and t < len(labels_list[k]):
                blocked_by[k] = first_blocking_rule(processors, prefixes, full[:, t, :], int(labels[k, t]), k)
    for k, job in enumerate(meta):
        if k in ending:
            job = (*job[:2], labels[k, : len(job[2])].tolist(), *job[3:])
        _store(settings, results, job, token_lp[k, : len(job[2])].tolist(), blocked_by.get(k))


@torch.inference_mode()
def _score_batch_tree(model, settings, requests, batch, by_row, results) -> None:
    """Score a batch with each row's targets merged into a prefix tree (no generation rules).

    A tree node is a decoder position, named by the tokens before it; node 0 of a row is the
    position after the start token. Every node is run through the decoder by one target and
    projected once; each target reads its token's log-prob at each of its nodes.
    """
    state = model.encode_grouped([requests[i].source_ids for i in batch])
    run_rows: list[int] = []          # encoder row of each decoder run
    run_labels: list[list[int]] = []  # labels of each decoder run
    node_at: list[tuple[int, int]] = []  # node -> (decoder run, position)
    node_tokens: list[list[int]] = []    # node -> tokens whose log-probs are wanted there
    slots: list[dict[int, int]] = []     # node -> {token: column in node_tokens}
    reads: list[list[tuple[int, int]]] = []  # job -> (node, column) per scored token
    metas = []
    alts: dict[int, list[int]] = {}      # job -> columns of every end token at its last node
    ends = end_ids(model, settings)
    for b, i in enumerate(batch):
        children: dict[tuple[int, int], int] = {}
        root = -1
        for job in sorted(by_row[i], key=lambda j: -len(j[2])):
            labels = job[2]
            path = []
            node = -1
            fresh = False
            for t, tok in enumerate(labels):
                if t == 0:
                    if root < 0:
                        root = _new_node(node_at, node_tokens, slots)
                        fresh = True
                    node = root
                else:
                    key = (node, labels[t - 1])
                    nxt = children.get(key)
                    if nxt is None:
                        nxt = children[key] = _new_node(node_at, node_tokens, slots)
                        fresh = True
                    node = nxt
                path.append(node)
                col = slots[node].get(tok)
                if col is None:
                    col = slots[node][tok] = len(node_tokens[node])
                    node_tokens[node].append(tok)
            if fresh:
                r = len(run_labels)
                run_rows.append(b)
                run_labels.append(labels)
                for t, n in enumerate(path):
                    if node_at[n][0] < 0:
                        node_at[n] = (r, t)
            if len(ends) > 1 and not job[3]:  # several end tokens: any ends the target (the best is read)
                last = path[-1]
                for e in ends:
                    if e not in slots[last]:
                        slots[last][e] = len(node_tokens[last])
                        node_tokens[last].append(e)
                alts[len(metas)] = [slots[last][e] for e in ends]
            reads.append([(n, slots[n][tok]) for n, tok in zip(path, labels, strict=True)])
            metas.append(job)
    if run_labels:
        width = max(len(x) for x in run_labels)
        inputs = torch.full((len(run_labels), width), model.pad_id, dtype=torch.long)
        for r, lab in enumerate(run_labels):
            inputs[r, 0] = model.start_id
            inputs[r, 1 : len(lab)] = torch.tensor(lab[:-1], dtype=torch.long)
        cols = max(len(x) for x in node_tokens)
        picks = torch.tensor([r * width + t for r, t in node_at], dtype=torch.long)
        wanted = torch.tensor([x + [x[0]] * (cols - len(x)) for x in node_tokens], dtype=torch.long)
        lp = model.score_positions(state, torch.tensor(run_rows, dtype=torch.long), inputs, picks, wanted,
                                   lengths=[len(x) for x in run_labels])
        flat = lp.reshape(-1)
        index = torch.tensor([n * cols + c for rd in reads for n, c in rd], dtype=torch.long)
        values = flat.index_select(0, index).tolist() if len(index) else []
    else:
        values = []
    pos = 0
    for k, (job, rd) in enumerate(zip(metas, reads, strict=True)):
        lps = values[pos : pos + len(rd)]
        if k in alts:
            node = rd[-1][0]
            options = [float(lp[node, c]) for c in alts[k]]
            best = max(range(len(ends)), key=lambda e: options[e])
            lps[-1] = options[best]
            job = (*job[:2], list(job[2][:-1]) + [ends[best]], *job[3:])
        _store(settings, results, job, lps, None)
        pos += len(rd)


def end_ids(model: SequenceModel, settings: DecoderSettings) -> tuple[int, ...]:
    """The tokens that end a target: the decoder's end tokens (model.end_id first), any of them."""
    ends = [int(model.end_id)] + [int(e) for e in settings.eos_token_ids if int(e) != int(model.end_id)]
    return tuple(ends)


def _new_node(node_at, node_tokens, slots) -> int:
    node_at.append((-1, -1))
    node_tokens.append([])
    slots.append({})
    return len(node_at) - 1


def _source_tensor(model, rows: list[list[int]]) -> torch.Tensor:
    width = max(len(r) for r in rows)
    t = torch.full((len(rows), width), model.pad_id, dtype=torch.long)
    for k, r in enumerate(rows):
        t[k, : len(r)] = torch.tensor(r)
    return t


def _store(settings: DecoderSettings, results, job, lps: list[float], rule: str | None) -> None:
    i, j, labels, hit, blocked = job
    total = math.fsum(lps)
    if rule is None and blocked is not None:
        rule = blocked
    if rule is not None or math.isinf(total):
        score = float("-inf")
        rule = rule or "decoding rule"
    else:
        score = settings.objective(total, len(labels))
    results[i][j] = TargetScore(list(labels), lps, total, len(labels), score, hit, rule)
