"""Exact search: a bounded depth-first search for the output the model scores highest, on the
compared failed rows whose output is short, to tell a search error of the beam (the search finds
a better-scored output) from a model error, whatever the reference.

Adds the columns exact_status, exact_score, exact_output, exact_beats_output to the verdict table
and writes the summary's "exact" section (ExactSection); the report shows the counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from triage.display import View, fmt_value
from triage.studies.common import COMPARED, Section, key

NAME = "exact"
TITLE = "Exact search"


@dataclass
class ExactSection(Section):
    rows: int
    max_output_tokens: int
    max_nodes: int
    max_seconds: float
    proven: int = 0
    budget_reached: int = key("budget reached", default=0)
    beats_output: int = 0
    empty_best: int = 0


def _hypothesis(out):
    """The decoder's output as a finished (or length-limited) hypothesis: the search's lower bound."""
    from triage.decoding.beam import Hypothesis

    tokens = out.ids if out.hit_limit else out.ids[:-1]
    return Hypothesis(list(tokens), list(out.logprobs), out.logprob_sum, out.length, out.score, not out.hit_limit)


def exact_check(model, result, *, max_tokens: int = 12, max_nodes: int = 5000,
                max_seconds: float = 5.0) -> ExactSection:
    """Exact search on each compared failed row with an output of at most max_tokens tokens (in
    place: adds the row columns to result.verdicts)."""
    from triage.decoding.exact import PROVEN, exact_search

    v = result.verdicts
    rows = [i for i in range(len(v)) if v["verdict"].iat[i] in COMPARED
            and i in result.scores and int(v["out_len"].iat[i]) <= max_tokens]
    v["exact_status"] = ""
    v["exact_score"] = float("nan")
    v["exact_output"] = ""
    v["exact_beats_output"] = pd.array([pd.NA] * len(v), dtype="boolean")
    settings = result.settings
    section = ExactSection(rows=len(rows), max_output_tokens=max_tokens, max_nodes=max_nodes, max_seconds=max_seconds)
    for i in rows:
        _, out = result.scores[i]
        src = model.tokenize_sources([settings.source_prefix + v["source"].iat[i]])[0]
        res = exact_search(model, settings, src, lower_bound=_hypothesis(out), max_nodes=max_nodes,
                           max_seconds=max_seconds)
        v.at[i, "exact_status"] = res.status
        v.at[i, "exact_score"] = res.best_score
        v.at[i, "exact_output"] = model.detokenize(res.best_tokens)
        v.at[i, "exact_beats_output"] = bool(res.beats_beam)
        if res.status == PROVEN:
            section.proven += 1
        else:
            section.budget_reached += 1
        section.beats_output += int(res.beats_beam)
        section.empty_best += int(res.status == PROVEN and not res.best_tokens)
    return section


# --------------------------------------------------------------------------- how the report shows it
def view(e: ExactSection) -> View:
    return View(lines=[
        f"Bounded depth-first exact search on {fmt_value(e.rows)} compared failed rows whose output has at most "
        f"{fmt_value(e.max_output_tokens)} tokens (budget {fmt_value(e.max_nodes)} nodes and "
        f"{fmt_value(e.max_seconds)} s per row): {fmt_value(e.proven)} proven, "
        f"{fmt_value(e.budget_reached)} reached the budget.",
        f"On {fmt_value(e.beats_output)} rows the search found an output the model scores above the decoder's "
        f"output (a search error of the beam, whatever the reference); on {fmt_value(e.empty_best)} rows the "
        f"proven best output is empty.",
    ])
