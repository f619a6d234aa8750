"""Search diagnostics that need triage's own beam search: where the beam lost the reference,
and an exact check of short outputs.

Both add columns to the verdict table and a section to the summary:

    where_lost (search rows): lost_step, lost_rank, lost_reason, keeps_at_beam
    exact (short failed rows): exact_status, exact_score, exact_output, exact_beats_output
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from triage.decoding.beam import Hypothesis, smallest_width_keeping
from triage.decoding.exact import PROVEN, exact_search


def _hypothesis(settings, out) -> Hypothesis:
    tokens = out.ids if out.hit_limit else out.ids[:-1]
    return Hypothesis(list(tokens), list(out.logprobs), out.logprob_sum, out.length, out.score, not out.hit_limit)


def where_lost(model, result, *, max_width: int = 64) -> dict[str, Any]:
    v = result.verdicts
    rows = [i for i in range(len(v)) if v["verdict"].iat[i] == "search" and i in result.scores]
    for col in ("lost_step", "lost_rank", "keeps_at_beam"):
        v[col] = pd.array([pd.NA] * len(v), dtype="Int64")
    v["lost_reason"] = ""
    if not rows:
        return {"rows": 0, "max_width": max_width}
    settings = result.settings
    src = model.tokenize_sources([settings.source_prefix + v["source"].iat[i] for i in rows])
    refs = []
    for i in rows:
        ref_scores, _ = result.scores[i]
        best = ref_scores[int(v["best_ref"].iat[i]) - 1]
        refs.append(best.ids if best.hit_limit else best.ids[:-1])
    points = smallest_width_keeping(model, settings, src, refs, max_width=max_width)
    kept = 0
    for i, p in zip(rows, points, strict=True):
        if p is None:
            kept += 1
            v.at[i, "lost_reason"] = "kept to the end, outscored at the finish"
            continue
        v.at[i, "lost_step"] = p.step
        v.at[i, "lost_rank"] = p.rank if p.rank is not None else pd.NA
        v.at[i, "lost_reason"] = p.reason
        v.at[i, "keeps_at_beam"] = p.smallest_width if p.smallest_width is not None else pd.NA
    part = v.loc[rows]
    by_bucket = []
    for label, grp in part.groupby("bucket", sort=False):
        steps = grp["lost_step"].dropna().astype(int).tolist()
        by_bucket.append({"range": label, "rows": int(len(grp)), "steps": sorted(steps)})
    widths = part["keeps_at_beam"].dropna().astype(int)
    return {
        "rows": len(rows),
        "max_width": max_width,
        "kept_to_end": kept,
        "by_bucket": by_bucket,
        "keeps_at_beam": {str(k): int(n) for k, n in widths.value_counts().sort_index().items()},
        "not_kept_up_to_max": int(part["keeps_at_beam"].isna().sum() - kept),
    }


def exact_check(model, result, *, max_tokens: int = 12, max_nodes: int = 5000,
                max_seconds: float = 5.0) -> dict[str, Any]:
    v = result.verdicts
    rows = [i for i in range(len(v)) if v["verdict"].iat[i] in ("search", "model", "tie")
            and i in result.scores and int(v["out_len"].iat[i]) <= max_tokens]
    v["exact_status"] = ""
    v["exact_score"] = float("nan")
    v["exact_output"] = ""
    v["exact_beats_output"] = pd.array([pd.NA] * len(v), dtype="boolean")
    settings = result.settings
    counts = {"proven": 0, "budget reached": 0, "beats_output": 0, "empty_best": 0}
    for i in rows:
        _, out = result.scores[i]
        src = model.tokenize_sources([settings.source_prefix + v["source"].iat[i]])[0]
        res = exact_search(model, settings, src, lower_bound=_hypothesis(settings, out),
                           max_nodes=max_nodes, max_seconds=max_seconds)
        v.at[i, "exact_status"] = res.status
        v.at[i, "exact_score"] = res.best_score
        v.at[i, "exact_output"] = model.detokenize(res.best_tokens)
        v.at[i, "exact_beats_output"] = bool(res.beats_beam)
        counts["proven" if res.status == PROVEN else "budget reached"] += 1
        counts["beats_output"] += int(res.beats_beam)
        counts["empty_best"] += int(res.status == PROVEN and not res.best_tokens)
    return {"rows": len(rows), "max_output_tokens": max_tokens, "max_nodes": max_nodes,
            "max_seconds": max_seconds, **counts}


def run_search_checks(model, result, *, where_lost_rows: bool = False, exact: bool = False,
                      progress: bool = True) -> None:
    """Add the requested diagnostics to result.verdicts and result.summary (in place)."""
    if where_lost_rows:
        result.summary["where_lost"] = where_lost(model, result)
    if exact:
        result.summary["exact"] = exact_check(model, result)
