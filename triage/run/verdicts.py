"""The verdict rule: which failed rows are search-side and which are model-side.

A row is `correct` when its output equals one of its references after whitespace
normalization (and, with a metric threshold, when its sentence score reaches it). Every
other row is failed and gets one verdict, comparing the output with its best-scoring
reference under the decoder's objective:

    search   ref_score > out_score + margin   the model prefers the reference: the beam missed it
    model    out_score > ref_score + margin   the model prefers its wrong output
    tie      |ref_score - out_score| <= margin
    blocked  a decoding rule forbids every reference (score minus infinity); the rule is named
    skipped  the row cannot be scored (reason given)

A `model` verdict does not prove that no better output exists; a `search` verdict proves the
beam missed one (the reference).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum
from typing import TYPE_CHECKING

from triage.run.reasons import rule_code

if TYPE_CHECKING:  # the report imports this module and renders without torch
    from triage.scoring.scorer import TargetScore


class Verdict(StrEnum):
    """A row's verdict (the one definition; a member equals its text, so "search" == Verdict.SEARCH)."""

    CORRECT = "correct"
    SEARCH = "search"
    MODEL = "model"
    TIE = "tie"
    BLOCKED = "blocked"
    SKIPPED = "skipped"


VERDICTS = tuple(Verdict)                                            # every verdict, in report order
FAILED = tuple(v for v in Verdict if v is not Verdict.CORRECT)       # the verdicts of failed rows
COMPARED = (Verdict.SEARCH, Verdict.MODEL, Verdict.TIE)              # failed rows whose two scores were compared


def normalize_ws(text: str) -> str:
    return " ".join(text.split())


def matches_any(output: str, references: list[str], normalize: str = "none") -> bool:
    """Whether the output equals a reference after whitespace normalization (and the text normalization
    `normalize` of triage.run.metrics: "none" or "basic")."""
    if normalize != "none":
        from triage.run.metrics import normalize_text

        output, references = normalize_text(output, normalize), [normalize_text(r, normalize) for r in references]
    out = normalize_ws(output)
    return any(out == normalize_ws(r) for r in references)


@dataclass
class RowVerdict:
    verdict: Verdict
    reason: str
    best_ref: int | None = None   # index of the best-scoring reference
    code: str = ""                # the reason's kind for skipped and blocked rows (triage.run.reasons)


def _skip_code(side: str, kind: str | None) -> str:
    if kind and ":" in kind:  # already names its side (a source problem found while scoring)
        return kind
    return f"{side}:{kind or 'unscorable'}"


def decide(ref_scores: list[TargetScore], out_score: TargetScore, margin: float) -> RowVerdict:
    """The verdict of a failed row from its scored references and output.

    The decoder's rules come first: an output a rule forbids is skipped under that rule whatever
    else is wrong with the row (its other problems are in the reason, from `out_score.detail`)."""
    if out_score.blocked_rule is not None:
        detail = f": {out_score.detail}" if out_score.detail else ""
        return RowVerdict(
            Verdict.SKIPPED,
            f"the output breaks the decoder's rule ({out_score.blocked_rule}{detail}): it was not produced at "
            "these settings", code=rule_code(out_score.blocked_rule),
        )
    if not out_score.scored:
        return RowVerdict(Verdict.SKIPPED, f"output: {out_score.skipped}", code=_skip_code("output", out_score.skip_code))
    scored = [(k, s) for k, s in enumerate(ref_scores) if s.scored]
    if not scored:
        return RowVerdict(Verdict.SKIPPED, f"reference: {ref_scores[0].skipped}",
                          code=_skip_code("reference", ref_scores[0].skip_code))
    best_k, best = max(scored, key=lambda ks: (ks[1].score, -ks[0]))
    if math.isinf(best.score) and best.score < 0:
        rules = sorted({s.blocked_rule or "decoding rule" for _, s in scored})
        return RowVerdict(Verdict.BLOCKED, "the decoder's rules forbid the reference: " + ", ".join(rules), best_k,
                          code="blocked:" + rule_code(rules[0]).partition(":")[2])
    diff = best.score - out_score.score
    if diff > margin:
        return RowVerdict(Verdict.SEARCH, f"reference outscores output by {diff:.4f}", best_k)
    if diff < -margin:
        return RowVerdict(Verdict.MODEL, f"output outscores reference by {-diff:.4f}", best_k)
    return RowVerdict(Verdict.TIE, f"scores within the tie margin {margin:g}", best_k)
