"""Score by beam width: corpus metric and decode time over beam widths 1..max on the dev set (or a
seeded sample of it).

Writes the summary's "beam_curve" section (BeamCurveSection) and a per-row table (each row's
output at each width); the report shows a curve of the corpus metric and a table by width.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from triage.display import Chart, View, fmt_value, table, tables
from triage.errors import OptionError
from triage.run.metrics import corpus
from triage.run.verdicts import matches_any
from triage.studies.common import Section, prepare, sample, timed_decode

NAME = "beam_curve"
TITLE = "Score by beam width"


@dataclass
class CurvePoint(Section):
    beam: int
    objective: str
    corpus: float
    exact_share: float
    mean_output_tokens: float
    seconds_per_row: float
    time_ratio: float | None


@dataclass
class BeamCurveSection(Section):
    metric: str
    current_beam: int
    references: str | None
    rows: int
    of: int
    sampled: bool
    seed: int
    points: list[CurvePoint] = field(default_factory=list)
    interrupted: bool = False


def sweep_beam_curve(model, result, max_beam: int, *, references, ref_kind, max_rows=None, seed=0,
                     progress=True, state: dict | None = None) -> tuple[BeamCurveSection, pd.DataFrame]:
    """Decode the dev set (or a seeded sample) at widths 1..max_beam; returns the section and the
    per-row table. state: as for widen.sweep_widen."""
    if max_beam < 1:
        raise OptionError(f"beam curve: the widest beam must be at least 1, got {max_beam}")
    settings, metric, v = result.settings, result.options.metric, result.verdicts
    rows, sampled = sample(range(len(v)), max_rows, seed)
    section = BeamCurveSection(metric=metric, current_beam=settings.beam, references=ref_kind, rows=len(rows),
                               of=len(v), sampled=sampled, seed=seed)
    table_rows: list[dict[str, Any]] = []
    if state is not None:
        state[NAME], state[f"{NAME}_table"] = section, table_rows
    if not rows:
        return section, pd.DataFrame(table_rows)
    src, refs_rows = prepare(model, result, rows, references, settings.replace(beam=1))
    t1 = None
    for w in range(1, max_beam + 1):
        sw = settings.replace(beam=w)
        dec, t = timed_decode(model, sw, src, f"curve beam {w}", progress)
        texts = [d.text for d in dec]
        t1 = t if t1 is None else t1
        section.points.append(CurvePoint(
            beam=w, objective=sw.signature(), corpus=corpus(metric, texts, refs_rows, result.options.normalize)[0],
            exact_share=sum(matches_any(x, r, result.options.normalize)
                            for x, r in zip(texts, refs_rows, strict=True)) / len(rows),
            mean_output_tokens=sum(len(d.ids) for d in dec) / len(rows),
            seconds_per_row=t / len(rows), time_ratio=t / t1 if t1 > 0 else None,
        ))
        table_rows.extend({"row": i, "id": v["id"].iat[i], "beam": w, "output": x, "score": d.score}
                          for i, x, d in zip(rows, texts, dec, strict=True))
    return section, pd.DataFrame(table_rows)


# --------------------------------------------------------------------------- how the report shows it
def view(c: BeamCurveSection) -> View:
    m = c.metric or "metric"
    lines = [f"Corpus {m} and decode time over beam widths, on {fmt_value(c.rows)} of "
             f"{fmt_value(c.of)} rows{' (a seeded sample)' if c.sampled else ''}; current beam width "
             f"{fmt_value(c.current_beam)}. Width 1 is greedy search (no length penalty)."]
    spec = [("beam", "beam width", "int"), ("corpus", f"corpus {m}", "num"),
            ("exact_share", "outputs equal to a reference", "pct"), ("mean_output_tokens", "mean output tokens", "num"),
            ("seconds_per_row", "s per row", "sec"), ("time_ratio", "decode time (x greedy)", "num")]
    chart = Chart("curve", {"points": [(p.beam, p.corpus) for p in c.points], "y_label": f"corpus {m}",
                            "mark": c.current_beam})
    return View(lines=lines, tables=tables(table("By beam width", spec, c.points)), chart=chart)
