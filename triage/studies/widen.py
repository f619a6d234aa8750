"""Wider beams: re-decode the compared failed rows (search, model and tie verdicts) at each wider
width under the same objective, and count how many search-side rows the wider beam resolves, what
it does to the sentence and corpus metric, to model-side rows, and to decode time.

Writes the summary's "widen" section (WidenSection) and a per-row table (one row per re-decoded
row and width); the report shows it as a table by beam width.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from triage.display import View, fmt_num, fmt_pct, fmt_value, table, tables
from triage.run.metrics import corpus, gain, sentence_scores
from triage.run.verdicts import matches_any
from triage.studies.common import (
    COMPARED,
    FAILED,
    Section,
    best_reference_score,
    compared_rows,
    mean,
    prepare,
    reproduce,
    rescore,
    sample,
    share,
    timed_decode,
)

NAME = "widen"
TITLE = "Wider beams"


@dataclass
class WidenRows(Section):
    failed: int
    compared: int
    redecoded: int
    sampled: bool
    seed: int
    search: int
    model: int
    tie: int


@dataclass
class CurrentWidth(Section):
    """The current width, decoded again for timing: how long per row, and how many given outputs it reproduces."""
    beam: int
    seconds_per_row: float
    reproduced_share: float


@dataclass
class SentenceDelta(Section):
    """Mean change of the sentence metric over the failed, search-side and model-side rows (None: no row)."""
    failed: float | None
    search: float | None
    model: float | None


@dataclass
class ModelRows(Section):
    """What a wider beam does to the model-side rows."""
    rows: int
    worse: int
    better: int
    mean_delta: float | None
    higher_score: int


@dataclass
class WidthEntry(Section):
    beam: int
    objective: str
    resolved: int
    resolved_share: float | None
    equals_reference: int
    equals_reference_share: float | None
    equals_reference_failed: int
    changed: int
    sentence_delta: SentenceDelta
    model_rows: ModelRows
    corpus_after: float
    corpus_delta: float
    seconds_per_row: float
    time_ratio: float | None


@dataclass
class WidenSection(Section):
    metric: str
    current_beam: int
    objective: str
    references: str | None
    rows: WidenRows
    current: CurrentWidth | None = None
    corpus_before: float = math.nan
    widths: list[WidthEntry] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    interrupted: bool = False

    def best_width(self) -> WidthEntry | None:
        """The measured width resolving most search-side rows (the narrower one on ties)."""
        entries = [w for w in self.widths if w.resolved_share is not None]
        return max(entries, key=lambda w: (w.resolved_share, -w.beam)) if entries else None


# --------------------------------------------------------------------------- running it
def sweep_widen(model, result, widths: Sequence[int], *, references, ref_kind, max_rows=None, seed=0,
                progress=True, state: dict | None = None) -> tuple[WidenSection, pd.DataFrame]:
    """Re-decode the compared failed rows at each width; returns the section and the per-row table.

    state: filled with "widen" (the section) and "widen_table" (the rows so far) as they grow,
    so that an interrupted sweep keeps what finished."""
    settings, v = result.settings, result.verdicts
    metric, how = result.options.metric, result.options.normalize
    compared = compared_rows(result)
    rows, sampled = sample(compared, max_rows, seed)
    outputs = v["output"].tolist()
    section = WidenSection(
        metric=metric, current_beam=settings.beam, objective=settings.signature(), references=ref_kind,
        rows=WidenRows(failed=int(v["verdict"].isin(list(FAILED)).sum()), compared=len(compared),
                       redecoded=len(rows), sampled=sampled, seed=seed,
                       **{str(k): sum(1 for i in rows if v["verdict"].iat[i] == k) for k in COMPARED}),
        corpus_before=corpus(metric, outputs, references, how)[0] if len(v) else math.nan,
    )
    table_rows: list[dict[str, Any]] = []
    if state is not None:
        state[NAME], state[f"{NAME}_table"] = section, table_rows
    if not rows:
        return section, pd.DataFrame(table_rows)
    src, refs_rows = prepare(model, result, rows, references, settings)
    before = sentence_scores(metric, [outputs[i] for i in rows], refs_rows, how)
    _, t_cur, same = reproduce(model, settings, src, [outputs[i] for i in rows], f"beam {settings.beam} (timing)",
                               progress)
    section.current = CurrentWidth(beam=settings.beam, seconds_per_row=t_cur / len(rows),
                                   reproduced_share=sum(same) / len(rows))
    for w in widths:
        sw = settings.replace(beam=int(w))
        dec, t_w = timed_decode(model, sw, src, f"beam {w}", progress)
        per = _redecoded_rows(model, result, sw, rows, src, dec, references, refs_rows, before)
        table_rows.extend(per)
        new_outputs = list(outputs)
        for i, r in zip(rows, per, strict=True):
            new_outputs[i] = r["output"]
        entry = _width_entry(section, sw, per, corpus(metric, new_outputs, references, how)[0], t_w, t_cur,
                             result.options.margin)
        section.widths.append(entry)
        mr = entry.model_rows
        if mr.worse:
            section.notes.append(f"beam {w} worsens {metric} on {mr.worse} of {mr.rows} model-side rows "
                                 f"(mean {mr.mean_delta:+.1f})")
    return section, pd.DataFrame(table_rows)


def _redecoded_rows(model, result, sw, rows, src, dec, references, refs_rows, before) -> list[dict[str, Any]]:
    """One record per re-decoded row at width sw.beam: its new output, scores and metric."""
    from triage.scoring.scorer import ScoreRequest, score_requests

    v, margin, metric = result.verdicts, result.options.margin, result.options.metric
    requests = [ScoreRequest(s, [list(d.ids)], [not d.finished]) for s, d in zip(src, dec, strict=True)]
    scored = score_requests(model, sw, requests, token_budget=result.options.token_budget)
    texts = [d.text for d in dec]
    after = sentence_scores(metric, texts, refs_rows, result.options.normalize)
    per = []
    for k, i in enumerate(rows):
        ref_s, out_s = result.scores[i]
        new = scored[k][0]
        new_score = new.score if new.scored else math.nan
        ref_score = best_reference_score(sw, ref_s)
        equals = matches_any(texts[k], references[i], result.options.normalize)
        resolved = equals or (math.isfinite(new_score) and new_score >= ref_score - margin)
        per.append({
            "row": i, "id": v["id"].iat[i], "verdict": v["verdict"].iat[i], "beam": int(sw.beam), "output": texts[k],
            "decoder_score": dec[k].score, "score": new_score, "ref_score": ref_score,
            "old_output_score": rescore(sw, out_s), "resolved": bool(resolved), "equals_reference": bool(equals),
            "changed": not matches_any(texts[k], [v["output"].iat[i]]),
            "metric_before": before[k], "metric_after": after[k],
        })
    return per


def _width_entry(section: WidenSection, sw, per, corpus_after: float, t_w: float, t_cur: float,
                 margin: float) -> WidthEntry:
    """The summary's entry for one width, from its re-decoded rows."""
    counts = section.rows
    search = [r for r in per if r["verdict"] == "search"]
    model_rows = [r for r in per if r["verdict"] == "model"]
    deltas = SentenceDelta(*(mean([r["metric_after"] - r["metric_before"] for r in part])
                             for part in (per, search, model_rows)))
    return WidthEntry(
        beam=int(sw.beam), objective=sw.signature(),
        resolved=sum(r["resolved"] for r in search),
        resolved_share=share(sum(r["resolved"] for r in search), counts.search),
        equals_reference=sum(r["equals_reference"] for r in search),
        equals_reference_share=share(sum(r["equals_reference"] for r in search), counts.search),
        equals_reference_failed=sum(r["equals_reference"] for r in per),
        changed=sum(r["changed"] for r in per),
        sentence_delta=deltas,
        model_rows=ModelRows(
            rows=counts.model, worse=sum(gain(section.metric, r["metric_after"] - r["metric_before"]) < 0 for r in model_rows),
            better=sum(gain(section.metric, r["metric_after"] - r["metric_before"]) > 0 for r in model_rows), mean_delta=deltas.model,
            higher_score=sum(r["score"] > r["old_output_score"] + margin for r in model_rows)),
        corpus_after=corpus_after, corpus_delta=corpus_after - section.corpus_before,
        seconds_per_row=t_w / len(per), time_ratio=t_w / t_cur if t_cur > 0 else None,
    )


# --------------------------------------------------------------------------- how the report shows it
def view(w: WidenSection) -> View:
    m = w.metric or "metric"
    rows, cur = w.rows, w.current
    lines = [
        f"Failed rows re-decoded with wider beams: {fmt_value(rows.redecoded)} of "
        f"{fmt_value(rows.compared)} compared rows ({fmt_value(rows.search)} search-side, "
        f"{fmt_value(rows.model)} model-side){', a seeded sample' if rows.sampled else ''}.",
        f"Current beam width {fmt_value(w.current_beam)}: {fmt_num(cur and cur.seconds_per_row, 4)} s per row; "
        f"it reproduces {fmt_pct(cur and cur.reproduced_share)} of the given outputs. Corpus {m} before: "
        f"{fmt_num(w.corpus_before, 2)}. References used: {fmt_value(w.references)}.",
    ]
    spec = [("beam", "beam width", "int"), ("resolved", "search-side rows resolved", "int"),
            ("resolved_share", "share resolved", "pct"), ("equals_reference_share", "output equals reference", "pct"),
            ("changed", "outputs changed", "int"), ("sentence_delta.search", f"{m} change, search-side rows", "num"),
            ("model_rows.worse", "model-side rows worse", "int"), ("model_rows.better", "model-side rows better", "int"),
            ("corpus_after", f"corpus {m} after", "num"), ("corpus_delta", f"corpus {m} change", "num"),
            ("seconds_per_row", "s per row", "sec"), ("time_ratio", "decode time (x current)", "num")]
    return View(lines=lines, tables=tables(table("By beam width", spec, w.widths)), notes=[str(n) for n in w.notes])
