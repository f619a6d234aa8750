"""Run the asked-for studies on a finished triage (a TriageResult).

    from triage.studies.runner import run_studies, run_search_checks
    done = run_studies(model, result, widen=[8, 16], beam_curve_max=8, alphas=None,
                       redecode_alpha=[0.6], max_rows=200, devset=devset)
    done.sections     # {"length_penalty": LengthPenaltySection, "widen": WidenSection, ...}
    done.tables       # per-row DataFrames {"widen": .., "beam_curve": ..}
    done.interrupted  # Ctrl-C cut a study: what finished is kept, the cut section says interrupted
    done.into(result.summary)                                           # the sections into the Summary
    run_search_checks(model, result, where_lost_rows=True, exact=True)  # into result.summary

The sections are typed (one module per study, see triage.studies.STUDIES); the recommendation
is decided afterwards, once, from the whole summary.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from triage.errors import OptionError
from triage.studies.beam_curve import sweep_beam_curve
from triage.studies.common import Section, references
from triage.studies.exact import exact_check
from triage.studies.length_penalty import PenaltyTally, sweep_length_penalty
from triage.studies.where_lost import where_lost
from triage.studies.widen import sweep_widen


@dataclass
class StudyResults:
    sections: dict[str, Section] = field(default_factory=dict)  # summary key -> section, in the order run
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    interrupted: bool = False

    def into(self, summary) -> None:
        """Put the sections into a Summary (and whether a study was cut short); the recommendation
        is decided afterwards, once, from the whole summary (triage.decision.recommend)."""
        for key, section in self.sections.items():
            setattr(summary, key, section)
        summary.sweeps_interrupted = self.interrupted


def run_studies(model, result, *, widen: Sequence[int] | None = None, beam_curve_max: int | None = None,
                alphas: Sequence[float] | None = None, redecode_alpha: Sequence[float] | None = None,
                max_rows: int | None = None, seed: int = 0, progress: bool = True, devset: Any = None,
                length_penalty: bool | None = None, penalty_tally: PenaltyTally | None = None) -> StudyResults:
    """Run the asked-for sweeps on a TriageResult.

    widen: wider beam widths (see plan.parse_widths); beam_curve_max: decode at widths 1..this;
    alphas: the length-penalty grid (None: DEFAULT_ALPHAS; the re-ranking runs when alphas or
    redecode_alpha is given, or length_penalty=True); redecode_alpha: decode all (sampled) rows
    again at these alphas and re-triage them; max_rows: a seeded sample of at most this many rows
    per decoding sweep; devset: the dev set given to run_triage (for all references of
    multi-reference rows; without it each row keeps its best reference); penalty_tally: a
    PenaltyTally fed step by step during a streamed run (run_triage with keep=False), used
    instead of the result's rows for the length-penalty re-ranking.
    """
    if max_rows is not None and max_rows < 1:
        raise OptionError(f"max rows must be at least 1, got {max_rows}")
    decodes = bool(widen or beam_curve_max or redecode_alpha)
    refs, ref_kind = references(result, devset) if decodes else (None, None)
    out = StudyResults()
    state: dict[str, Any] = {}
    if length_penalty is None:
        length_penalty = alphas is not None or bool(redecode_alpha)
    common = dict(max_rows=max_rows, seed=seed, progress=progress, state=state)
    step = None
    try:
        if length_penalty:
            step = "length_penalty"
            out.sections[step] = sweep_length_penalty(model, result, alphas, redecode_alpha=redecode_alpha,
                                                      references=refs, tally=penalty_tally, **common)
        if widen:
            step = "widen"
            out.sections[step], out.tables[step] = sweep_widen(
                model, result, sorted(set(int(w) for w in widen)), references=refs, ref_kind=ref_kind, **common)
        if beam_curve_max:
            step = "beam_curve"
            out.sections[step], out.tables[step] = sweep_beam_curve(
                model, result, int(beam_curve_max), references=refs, ref_kind=ref_kind, **common)
    except KeyboardInterrupt:
        out.interrupted = True
        if step in state:
            state[step].interrupted = True
            out.sections[step] = state[step]
            if f"{step}_table" in state:
                out.tables[step] = pd.DataFrame(state[f"{step}_table"])
    return out


def run_search_checks(model, result, *, where_lost_rows: bool = False, exact: bool = False) -> None:
    """Add the requested diagnostics to result.verdicts (row columns) and result.summary (sections), in place."""
    if where_lost_rows:
        result.summary.where_lost = where_lost(model, result)
    if exact:
        result.summary.exact = exact_check(model, result)
