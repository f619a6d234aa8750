"""The one recommendation of a run, decided once from its complete Summary.

    from triage.decision import recommend
    summary.recommendation = recommend(summary)   # after every study of the run has finished

The rule, in the order it is checked: when the given outputs cannot come from the decoder at the
run's settings (settings_mismatch: half of the failed outputs break its rules), or the outputs
check reproduces under half of its sample, nothing is recommended, whatever the studies found:
their numbers rest on scores of outputs the decoder did not maximize. Then the coverage: the
verdict mix is read only when at least MIN_ROWS failed rows and MIN_COVERAGE of them were
compared. Then the verdict mix and, where they ran, the studies' evidence (wider beams, other
length penalties).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from triage.run.analysis import search_share
from triage.run.metrics import gain
from triage.run.summary import Action, Recommendation, Summary
from triage.run.verdicts import FAILED, Verdict
from triage.studies.length_penalty import LengthPenaltySection
from triage.studies.reproduce import ReproductionSection
from triage.studies.widen import WidenSection

# The rule's thresholds, in the order they are checked (README: The recommendation rule).
MIN_REPRODUCED = 0.5  # outputs check: below this share of sampled failed rows reproduced, nothing is recommended
MIN_ROWS = 10         # compared failed rows the verdict mix needs before it is read ...
MIN_COVERAGE = 0.5    # ... and the share of all failed rows they must be (skipped, blocked: not compared)


def settings_mismatch(summary: Summary) -> str | None:
    """Why the given outputs cannot come from the decoder at the run's settings, when at least
    half of the failed rows' outputs break one of its rules (longer than its length limit,
    shorter than its minimum, a banned or repeated n-gram); None otherwise. Scores of such
    outputs are not what the decoder maximized, so no verdict or advice rests on them."""
    foreign = summary.outputs_not_from_these_settings
    rows, failed = foreign.rows or 0, foreign.of_failed or 0
    if not rows or 2 * rows < failed:
        return None
    rules = ", ".join(f"{rule} ({k})" for rule, k in (foreign.rules or {}).items())
    return (f"{rows} of {failed} failed outputs cannot come from the decoder at these settings "
            f"({summary.objective or 'the given objective'}): its rules forbid them: {rules}")


def metric_name(*sections: Any) -> str:
    """The metric the first of these study sections names ("metric" when none does)."""
    for s in sections:
        if s is not None and s.metric:
            return str(s.metric)
    return "metric"


@dataclass
class Evidence:
    """What the recommendation rests on: the verdict counts and the studies' typed sections."""

    counts: dict[str, int]
    widen: WidenSection | None = None
    length_penalty: LengthPenaltySection | None = None
    reproduction: ReproductionSection | None = None

    @classmethod
    def of(cls, summary: Summary) -> Evidence:
        rep = summary.reproduction if isinstance(summary.reproduction, ReproductionSection) else None
        return cls(dict(summary.counts), summary.widen, summary.length_penalty, rep)

    def __post_init__(self) -> None:
        self.search, self.compared = search_share(self.counts)
        self.model = self.counts.get(Verdict.MODEL, 0)
        self.failed = sum(self.counts.get(v, 0) for v in FAILED)
        n = self.compared
        self.s_share = self.search / n if n else 0.0
        self.m_share = self.model / n if n else 0.0
        self.best = self.widen.best_width() if self.widen is not None else None
        self.metric = metric_name(self.widen)

    def coverage(self) -> str:
        """How many failed rows were compared, and what kept the others out."""
        out = [f"{self.counts.get(v, 0)} {v}" for v in (Verdict.SKIPPED, Verdict.BLOCKED) if self.counts.get(v)]
        share = f" ({self.compared / self.failed:.0%})" if self.failed else ""
        return f"{self.compared} of {self.failed} failed rows{share} were compared" + (
            f" ({', '.join(out)})" if out else "")

    def widen_numbers(self) -> str:
        """What the best measured width does (when one was measured)."""
        b = self.best
        return (f"widen to {b.beam}: resolves {b.resolved_share:.0%} of search-side rows, "
                f"{b.corpus_delta:+.1f} {self.metric} on the dev set, {b.time_ratio or 0:.1f}x decode time")

    def widen_worse(self) -> str:
        """How many model-side rows the best width makes worse ("" when none)."""
        mr = self.best.model_rows if self.best is not None else None
        if mr is None or not mr.worse:
            return ""
        return f"; it worsens {self.metric} on {mr.worse} of {mr.rows} model-side rows"


def recommend(summary: Summary, min_rows: int = MIN_ROWS) -> Recommendation:
    """The recommended action and the numbers it rests on, from a run's complete Summary."""
    mismatch = settings_mismatch(summary)
    if mismatch:
        return Recommendation(Action.INCONCLUSIVE, mismatch, ["the decoder settings the outputs were decoded with"])
    return weigh(Evidence.of(summary), min_rows)


def weigh(ev: Evidence, min_rows: int = MIN_ROWS) -> Recommendation:
    """The rule itself, on the verdict counts and study evidence alone (after settings_mismatch)."""
    rep = ev.reproduction
    if rep is not None and rep.reproduced_share is not None and rep.reproduced_share < MIN_REPRODUCED:
        return Recommendation(Action.INCONCLUSIVE,
                              "the outputs were not decoded with these settings: give the beam width, penalty and "
                              f"alpha you decoded with (decoding {rep.checked} sampled failed rows again at "
                              f"{rep.objective} gives {rep.reproduced} of their outputs, {rep.reproduced_share:.0%}; "
                              f"at least {MIN_REPRODUCED:.0%} are needed)",
                              ["the beam width, penalty and alpha the outputs were decoded with"])
    few, thin = ev.compared < min_rows, ev.compared < MIN_COVERAGE * ev.failed
    if few or thin:
        fix = []
        if thin:
            fix.append("failed rows that can be scored: pass the settings the outputs were decoded with, or fix "
                       "the tokenizer problems listed in skipped_reasons")
        if few:
            fix.append("more failed rows")
        return Recommendation(Action.INCONCLUSIVE,
                              f"only {ev.coverage()}: the verdict mix is read when at least {min_rows} failed rows "
                              f"and at least {MIN_COVERAGE:.0%} of them are compared; "
                              + "; or ".join(fix), fix)
    decided, lp_text = _length_penalty_case(ev)
    if decided is not None:
        return decided
    if ev.s_share >= 0.5:
        return _search_side_case(ev)
    if ev.m_share >= 0.5:
        return _model_side_case(ev, lp_text)
    return _split_case(ev, lp_text)


def _length_penalty_case(ev: Evidence) -> tuple[Recommendation | None, str]:
    """Model-side failures that are short and flip at another alpha: tune the length penalty.
    Returns the recommendation when it is that, and the penalty's finding for the other cases."""
    lp = ev.length_penalty
    b, brev = (lp.best, lp.brevity) if lp is not None else (None, None)
    if not (b and brev):
        return None, ""
    flip, short = b.flip_share, brev.short_share
    penalty, alpha = b.penalty, b.alpha
    lp_text = f"the best penalty ({penalty} alpha {alpha:g}) flips {flip or 0:.0%} of model-side rows to search-side"
    if not (ev.m_share >= 0.5 and (flip or 0) >= 0.3 and (short or 0) >= 0.5):
        return None, lp_text
    because = (f"{ev.m_share:.0%} of compared failures are model-side ({ev.model} of {ev.compared}), {short:.0%} "
               f"of them shorter than the reference (mean length ratio {brev.length_ratio or 0:.2f}), and "
               f"{flip:.0%} flip to search-side at {penalty} alpha {alpha:g}")
    done = [r for r in lp.redecode or [] if r.penalty == penalty]
    if not done:
        return Recommendation(Action.TUNE_LENGTH_PENALTY, because,
                              [f"decoding at {penalty} alpha {alpha:g} to confirm (--redecode-alpha)"]), lp_text
    name = metric_name(lp, ev.widen)
    r = max(done, key=lambda r: (gain(name, r.corpus_delta), -abs(r.alpha - alpha)))
    delta, r_alpha = r.corpus_delta, r.alpha
    because += f"; decoding at alpha {r_alpha:g} changes {name} by {delta:+.1f} on {r.rows} rows"
    if gain(name, delta) > 0:  # an improvement: up for chrF / BLEU, down for WER / CER
        return Recommendation(Action.TUNE_LENGTH_PENALTY, because), lp_text
    return None, lp_text + f", but decoding at alpha {r_alpha:g} changes the metric by {delta:+.1f}"


def _search_side_case(ev: Evidence) -> Recommendation:
    """Most compared failures are search-side: does a wider beam recover them, and does it pay?"""
    share = f"{ev.s_share:.0%} of compared failures are search-side"
    wider = ["re-decoding with a wider beam (--widen)"]
    if ev.widen is None:
        return Recommendation(Action.WIDEN_BEAM, f"{share} ({ev.search} of {ev.compared}); not yet confirmed by "
                              "re-decoding (run with --widen)", wider)
    if ev.best is None:
        return Recommendation(Action.INCONCLUSIVE, f"{share}, but no wider beam was measured", wider)
    resolved = ev.best.resolved_share
    if resolved >= 0.25 and gain(ev.metric, ev.best.corpus_delta) >= 0:
        return Recommendation(Action.WIDEN_BEAM, ev.widen_numbers() + ev.widen_worse())
    if resolved >= 0.25:
        return Recommendation(Action.INCONCLUSIVE, f"{share} and {ev.widen_numbers()}{ev.widen_worse()}",
                              ["a width or length penalty that resolves them without lowering the metric"])
    return Recommendation(Action.INCONCLUSIVE,
                          f"{share}, but widening to {ev.best.beam} resolves only {resolved:.0%} of them",
                          ["a wider beam or another length penalty that recovers the references"])


def _model_side_case(ev: Evidence, lp_text: str) -> Recommendation:
    """Most compared failures are model-side: work on the model, with what the studies saw."""
    because = f"fix the model: {ev.m_share:.0%} of compared failures are model-side ({ev.model} of {ev.compared})"
    widths = ev.widen.widths if ev.widen is not None else None
    if ev.best:
        because += (f" and widening to {ev.best.beam} resolves {ev.best.resolved_share:.0%} of "
                    f"search-side rows ({ev.best.corpus_delta:+.1f} {ev.metric})")
    elif widths:
        w = max(widths, key=lambda w: w.beam)
        because += (f"; widening to {w.beam} has no search-side row to resolve and changes {ev.metric} by "
                    f"{w.corpus_delta:+.1f} on the dev set")
    if lp_text:
        because += "; " + lp_text
    return Recommendation(Action.FIX_MODEL, because)


def _split_case(ev: Evidence, lp_text: str) -> Recommendation:
    """Neither side has half of the compared failures."""
    if ev.best and ev.best.resolved_share >= 0.5 and gain(ev.metric, ev.best.corpus_delta) > 0:
        return Recommendation(Action.WIDEN_BEAM, f"failures split ({ev.s_share:.0%} search-side, {ev.m_share:.0%} "
                              f"model-side of {ev.compared}); " + ev.widen_numbers() + ev.widen_worse())
    missing = []
    if ev.widen is None:
        missing.append("re-decoding with a wider beam (--widen)")
    if ev.length_penalty is None:
        missing.append("a length-penalty sweep")
    because = (f"failures split: {ev.s_share:.0%} search-side, {ev.m_share:.0%} model-side of {ev.compared} "
               f"compared ({ev.failed} failed rows in all)")
    if ev.best:
        because += "; " + ev.widen_numbers()
    if lp_text:
        because += "; " + lp_text
    return Recommendation(Action.INCONCLUSIVE, because,
                          missing or ["a clearer split of failures (more rows, or a --below threshold)"])
