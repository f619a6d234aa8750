"""Other length penalties: re-rank reference against output under other penalty forms (power and
gnmt) and alphas, from the recorded log-prob sums and lengths, with no decoding; a brevity check
of the model-side rows; and, when asked, decode again at some alphas and re-triage those rows.

Writes the summary's "length_penalty" section (LengthPenaltySection); the report shows the
re-ranking grid, output length by bucket and the re-decoded rows.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import pandas as pd

from triage.display import View, fmt_num, fmt_pct, fmt_value, table, tables
from triage.run.analysis import verdict_counts
from triage.run.metrics import corpus
from triage.settings import DecoderSettings
from triage.studies.common import COMPARED, Section, best_reference_score, rescore, sample, share

if TYPE_CHECKING:
    from triage.scoring.scorer import TargetScore

NAME = "length_penalty"
TITLE = "Other length penalties"
DEFAULT_ALPHAS = (0.0, 0.2, 0.4, 0.6, 0.8, 1.0, 1.2)
FORMS = ("power", "gnmt")


@dataclass
class CurrentPenalty(Section):
    penalty: str
    alpha: float
    beam: int


@dataclass
class PenaltyCell(Section):
    """One penalty form and alpha: the compared rows' labels under it and how many flip."""
    penalty: str
    alpha: float
    counts: dict[str, int]
    model_to_search: int
    search_to_model: int
    flip_share: float | None


@dataclass
class BestPenalty(Section):
    """The cell that turns most model-side rows search-side, less those turned back."""
    penalty: str
    alpha: float
    model_to_search: int
    search_to_model: int
    flip_share: float | None


@dataclass
class BrevityBucket(Section):
    range: str
    rows: int
    model_rows: int
    short_share: float | None
    length_ratio: float | None
    length_ratio_all: float | None


@dataclass
class Brevity(Section):
    """Are model-side outputs shorter than their reference? (tokens incl. end token)"""
    model_rows: int
    shorter: int
    short_share: float | None
    length_ratio: float | None
    length_ratio_all: float | None
    buckets: list[BrevityBucket] = field(default_factory=list)


@dataclass
class Redecode(Section):
    """The (sampled) rows decoded again at one alpha and triaged again."""
    penalty: str
    alpha: float
    objective: str
    rows: int
    sampled: bool
    seed: int
    counts: dict[str, int]
    counts_before: dict[str, int]
    corpus: float
    corpus_before: float
    corpus_delta: float


@dataclass
class LengthPenaltySection(Section):
    metric: str
    current: CurrentPenalty
    rescored_at_beam: int
    note: str | None
    rows: int
    margin: float
    grid: list[PenaltyCell] = field(default_factory=list)
    best: BestPenalty | None = None
    brevity: Brevity | None = None
    redecode: list[Redecode] = field(default_factory=list)
    interrupted: bool = False


def _label(ref: float, out: float, margin: float) -> str:
    diff = ref - out
    if diff > margin:
        return "search"
    if diff < -margin:
        return "model"
    return "tie"


# --------------------------------------------------------------------------- the re-ranking tally
class PenaltyTally:
    """Reference against output re-ranked under other length penalties, one compared row at a
    time: every number is a count or a running sum, so a streamed run can feed it step by step
    (`add_step`) and keep no row. `section()` gives the summary's "length_penalty" section."""

    def __init__(self, settings: DecoderSettings, margin: float, metric: str,
                 alphas: Sequence[float] | None = None):
        self.settings, self.margin, self.metric = settings, margin, metric
        self.alphas = list(DEFAULT_ALPHAS if alphas is None else alphas)
        self.base_beam = settings.beam if settings.beam > 1 else 2
        self.cells = [(form, float(a), settings.replace(beam=self.base_beam, penalty=form, alpha=float(a)))
                      for form in FORMS for a in self.alphas]
        self.grid = [{"counts": dict.fromkeys(map(str, COMPARED), 0), "model_to_search": 0, "search_to_model": 0}
                     for _ in self.cells]
        self.rows = 0
        self.brevity: dict[str | None, dict[str, float]] = {}  # None: all rows; else per bucket

    def add(self, verdict: str, bucket: str, best_ref: int, ref_scores: Sequence[TargetScore],
            out_score: TargetScore) -> None:
        """One compared row: its current verdict, bucket, best reference (0-based) and scores."""
        self.rows += 1
        for (_, _, s), cell in zip(self.cells, self.grid, strict=True):
            lab = _label(best_reference_score(s, ref_scores), rescore(s, out_score), self.margin)
            cell["counts"][lab] += 1
            cell["model_to_search"] += verdict == "model" and lab == "search"
            cell["search_to_model"] += verdict == "search" and lab == "model"
        out_len, ref_len = out_score.length, ref_scores[best_ref].length
        for key in (None, bucket):
            b = self.brevity.setdefault(key, {"rows": 0, "model_rows": 0, "shorter": 0, "ratio_model": 0.0,
                                              "ratio_all": 0.0})
            b["rows"] += 1
            b["ratio_all"] += out_len / ref_len
            if verdict == "model":
                b["model_rows"] += 1
                b["shorter"] += out_len < ref_len
                b["ratio_model"] += out_len / ref_len

    def add_step(self, part) -> None:
        """A pipeline step (pipeline.ChunkResult): its compared rows, in input order."""
        v = part.verdicts
        for j in range(len(v)):
            if v["verdict"].iat[j] in COMPARED and part.offset + j in part.scores:
                ref_s, out_s = part.scores[part.offset + j]
                self.add(v["verdict"].iat[j], v["bucket"].iat[j], int(v["best_ref"].iat[j]) - 1, ref_s, out_s)

    def section(self, bucket_order: Sequence[str]) -> LengthPenaltySection:
        settings = self.settings
        n_model = (self.brevity.get(None) or {}).get("model_rows", 0)
        section = LengthPenaltySection(
            metric=self.metric,
            current=CurrentPenalty(penalty=settings.penalty, alpha=settings.alpha, beam=settings.beam),
            rescored_at_beam=self.base_beam,
            note=None if self.base_beam == settings.beam else
            "greedy search (beam 1) applies no length penalty; ranks are for a beam of 2 or more",
            rows=self.rows, margin=self.margin)
        for (form, a, _), cell in zip(self.cells, self.grid, strict=True):
            section.grid.append(PenaltyCell(penalty=form, alpha=a, counts=dict(cell["counts"]),
                                            model_to_search=cell["model_to_search"],
                                            search_to_model=cell["search_to_model"],
                                            flip_share=share(cell["model_to_search"], n_model)))
        if section.grid:
            cur_alpha = settings.alpha
            best = max(section.grid, key=lambda g: (g.model_to_search - g.search_to_model,
                                                    -abs(g.alpha - cur_alpha), g.penalty == settings.penalty))
            section.best = BestPenalty(penalty=best.penalty, alpha=best.alpha, model_to_search=best.model_to_search,
                                       search_to_model=best.search_to_model, flip_share=best.flip_share)
        overall = self._brevity(None)
        section.brevity = Brevity(
            model_rows=overall["model_rows"], shorter=overall["shorter"], short_share=overall["short_share"],
            length_ratio=overall["length_ratio"], length_ratio_all=overall["length_ratio_all"],
            buckets=[BrevityBucket(range=label, **{k: x for k, x in self._brevity(label).items() if k != "shorter"})
                     for label in bucket_order if label in self.brevity])
        return section

    def _brevity(self, key: str | None) -> dict[str, Any]:
        b = self.brevity.get(key) or {"rows": 0, "model_rows": 0, "shorter": 0, "ratio_model": 0.0, "ratio_all": 0.0}
        m = int(b["model_rows"])
        return {"rows": int(b["rows"]), "model_rows": m, "shorter": int(b["shorter"]),
                "short_share": share(int(b["shorter"]), m),
                "length_ratio": b["ratio_model"] / m if m else None,
                "length_ratio_all": b["ratio_all"] / b["rows"] if b["rows"] else None}


# --------------------------------------------------------------------------- running it
def sweep_length_penalty(model, result, alphas: Sequence[float] | None, *, redecode_alpha=None,
                         references=None, devset=None, max_rows=None, seed=0, progress=True,
                         state: dict | None = None, tally: PenaltyTally | None = None) -> LengthPenaltySection:
    """Re-rank reference vs output over penalty forms x alphas; optionally decode at some alphas.

    tally: a PenaltyTally already fed with the rows (a streamed run); otherwise the rows of
    `result` are fed here. state: filled with "length_penalty" (the section) before decoding."""
    settings, opts, v = result.settings, result.options, result.verdicts
    if tally is None:
        tally = PenaltyTally(settings, opts.margin, opts.metric, alphas)
        for i in range(len(v)):
            if v["verdict"].iat[i] in COMPARED and i in result.scores:
                ref_s, out_s = result.scores[i]
                tally.add(v["verdict"].iat[i], v["bucket"].iat[i], int(v["best_ref"].iat[i]) - 1, ref_s, out_s)
    order = list(dict.fromkeys(result.buckets["range"].tolist())) if len(result.buckets) else []
    section = tally.section(order)
    if state is not None:
        state[NAME] = section
    if redecode_alpha:
        redecode(model, result, list(redecode_alpha), section, references, max_rows, seed, progress)
    return section


def redecode(model, result, alphas, section: LengthPenaltySection, references, max_rows, seed, progress) -> None:
    """Decode the (sampled) rows again at each alpha, triage them again; appends to section.redecode."""
    from triage.run.pipeline import run_triage

    settings, v = result.settings, result.verdicts
    form = settings.penalty if settings.penalty != "none" else "power"
    rows, sampled = sample(range(len(v)), max_rows, seed)
    if not rows:
        return
    refs = [references[i] for i in rows] if references is not None else [[r] for r in v["reference"].iloc[rows]]
    frame = pd.DataFrame({
        "id": v["id"].iloc[rows].tolist(), "line": v["line"].iloc[rows].tolist(),
        "source": v["source"].iloc[rows].tolist(), "references": refs, "output": [None] * len(rows),
    })
    counts_before = verdict_counts(v["verdict"].iloc[rows])
    corpus_before = corpus(result.options.metric, v["output"].iloc[rows].tolist(), refs, result.options.normalize)[0]
    opts = dataclasses.replace(result.options, progress=progress)
    for a in alphas:
        s = settings.replace(penalty=form, alpha=float(a), beam=max(settings.beam, 2))
        res = run_triage(model, frame, s, opts)
        score = res.summary.corpus_metric.score
        section.redecode.append(Redecode(
            penalty=form, alpha=float(a), objective=s.signature(), rows=len(rows), sampled=sampled, seed=seed,
            counts=dict(res.summary.counts), counts_before=counts_before, corpus=score, corpus_before=corpus_before,
            corpus_delta=score - corpus_before))


# --------------------------------------------------------------------------- how the report shows it
def view(lp: LengthPenaltySection) -> View:
    cur, best, br = lp.current, lp.best, lp.brevity
    lines = [f"Reference and output of the {fmt_value(lp.rows)} compared rows re-scored under other length "
             f"penalties (no decoding), at beam width {fmt_value(lp.rescored_at_beam)}. Current: "
             f"{fmt_value(cur.penalty)}, alpha {fmt_value(cur.alpha)}."]
    if lp.note:
        lines.append(str(lp.note))
    if best:
        lines.append(f"Most rows turn from model-side to search-side at {fmt_value(best.penalty)} alpha "
                     f"{fmt_value(best.alpha)}: {fmt_value(best.model_to_search)} model-side to search-side, "
                     f"{fmt_value(best.search_to_model)} back ({fmt_pct(best.flip_share)} of model-side rows).")
    if br:
        lines.append(f"Model-side outputs shorter than their reference: {fmt_value(br.shorter)} of "
                     f"{fmt_value(br.model_rows)} ({fmt_pct(br.short_share)}); mean length ratio output / "
                     f"reference {fmt_num(br.length_ratio, 2)} (tokens incl. end token).")
    grid = [("penalty", "penalty form", "text"), ("alpha", "alpha", "text"), ("counts.search", "search-side", "int"),
            ("counts.model", "model-side", "int"), ("counts.tie", "tie", "int"),
            ("model_to_search", "model-side to search-side", "int"), ("search_to_model", "search-side to model-side", "int"),
            ("flip_share", "share of model-side rows flipped", "pct")]
    bb = [("range", "length", "text"), ("rows", "rows", "int"), ("model_rows", "model-side rows", "int"),
          ("short_share", "shorter than reference", "pct"), ("length_ratio", "length ratio, model-side", "num"),
          ("length_ratio_all", "length ratio, all compared", "num")]
    rd = [("penalty", "penalty form", "text"), ("alpha", "alpha", "text"), ("rows", "rows", "int"),
          ("counts.search", "search-side", "int"), ("counts.model", "model-side", "int"),
          ("counts.correct", "correct", "int"), ("counts_before.correct", "correct before", "int"),
          ("corpus", "corpus metric", "num"), ("corpus_before", "before", "num"), ("corpus_delta", "change", "num")]
    return View(lines=lines, tables=tables(table("Re-ranking under each penalty", grid, lp.grid),
                                           table("Output length by bucket", bb, br.buckets if br else None),
                                           table("Re-decoded with another penalty", rd, lp.redecode)))
