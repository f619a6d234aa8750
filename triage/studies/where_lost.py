"""Where the beam lost the reference: for each search-side row, triage's own beam search runs again
with the reference tracked, and finds the step (target position) where the reference prefix fell
out of the beam, its rank among the candidates there, and the smallest width that keeps it.

Adds the columns lost_step, lost_rank, lost_reason, keeps_at_beam to the verdict table and writes
the summary's "where_lost" section (WhereLostSection); the report shows the loss steps by length
and the widths needed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from triage.display import Chart, View, fmt_value, table, tables
from triage.studies.common import Section, omit_none, sources

NAME = "where_lost"
TITLE = "Where the beam lost the reference"


@dataclass
class LostBucket(Section):
    """The search-side rows of one length bucket and the steps where their references were lost."""
    range: str
    rows: int
    steps: list[int] = field(default_factory=list)


@dataclass
class WhereLostSection(Section):
    """With no search-side row only rows and max_width are written."""
    rows: int
    max_width: int
    kept_to_end: int | None = omit_none()
    by_bucket: list[LostBucket] | None = omit_none()
    keeps_at_beam: dict[str, int] | None = omit_none()  # smallest width keeping the reference -> rows
    not_kept_up_to_max: int | None = omit_none()


def where_lost(model, result, *, max_width: int = 64) -> WhereLostSection:
    """Track the best reference of each search-side row through triage's beam search (in place:
    adds the row columns to result.verdicts)."""
    from triage.decoding.beam import smallest_width_keeping

    v = result.verdicts
    rows = [i for i in range(len(v)) if v["verdict"].iat[i] == "search" and i in result.scores]
    for col in ("lost_step", "lost_rank", "keeps_at_beam"):
        v[col] = pd.array([pd.NA] * len(v), dtype="Int64")
    v["lost_reason"] = ""
    if not rows:
        return WhereLostSection(rows=0, max_width=max_width)
    refs = []
    for i in rows:
        ref_scores, _ = result.scores[i]
        best = ref_scores[int(v["best_ref"].iat[i]) - 1]
        refs.append(best.ids if best.hit_limit else best.ids[:-1])
    points = smallest_width_keeping(model, result.settings, sources(model, result, rows), refs, max_width=max_width)
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
    by_bucket = [LostBucket(range=label, rows=int(len(grp)), steps=sorted(grp["lost_step"].dropna().astype(int).tolist()))
                 for label, grp in part.groupby("bucket", sort=False)]
    widths = part["keeps_at_beam"].dropna().astype(int)
    return WhereLostSection(
        rows=len(rows), max_width=max_width, kept_to_end=kept, by_bucket=by_bucket,
        keeps_at_beam={str(k): int(n) for k, n in widths.value_counts().sort_index().items()},
        not_kept_up_to_max=int(part["keeps_at_beam"].isna().sum() - kept),
    )


# --------------------------------------------------------------------------- how the report shows it
def view(w: WhereLostSection) -> View:
    lines = [
        f"For each of the {fmt_value(w.rows)} search-side rows, triage's own beam search re-ran the decoder "
        f"with the reference tracked: the step (target position) where the reference prefix fell out of the beam, "
        f"its rank among the candidates there, and the smallest beam width (up to {fmt_value(w.max_width)}) "
        f"that keeps it to the end.",
    ]
    if w.kept_to_end:
        lines.append(f"{fmt_value(w.kept_to_end)} rows kept the reference to the end but finished it "
                     "below the output.")
    widths = [{"beam": k, "rows": n} for k, n in sorted((w.keeps_at_beam or {}).items(), key=lambda kv: int(kv[0]))]
    spec = [("beam", "smallest beam width that keeps the reference", "int"), ("rows", "rows", "int")]
    notes = []
    if w.not_kept_up_to_max:
        notes.append(f"{fmt_value(w.not_kept_up_to_max)} rows lose the reference even at width "
                     f"{fmt_value(w.max_width)}.")
    return View(lines=lines, tables=tables(table("Width needed", spec, widths)), notes=notes,
                chart=Chart("loss_steps", {"by_bucket": [b.to_json() for b in w.by_bucket or []]}))
