"""Do the given outputs come from the stated settings? A seeded sample of failed rows is decoded
again at the run's settings and each new output compared with the given one (after whitespace
normalization, as a correct row is found).

The decode watches each given output (triage.decoding.watch): a row stops as soon as its output
has left the search, since the decoder can then no longer give it (such a row is not reproduced
and lists no decoded text, only the target position where the output left); a row whose output
stays in the search is decoded to its end. An output is watched as the model's tokenizer spells
it, and only where those tokens spell the output again: a decoder that wrote the same text with
other tokens would be counted as not reproduced (the run scores the tokenizer's tokens too).

The sample is drawn while the dev set streams through (FailedRowSample.add_step takes each
step's ChunkResult): every failed row whose source the model can read gets a key from a hash of
the seed and its dev-set index, and the rows of the `n` smallest keys are kept. So the sample is
the same whatever the step size, streamed or in memory, and memory holds at most `n` rows.

Writes the summary's "reproduction" section (ReproductionSection); triage.decision reads its
`reproduced_share` (below 50%: inconclusive) and the run warns below 90%.
"""

from __future__ import annotations

import hashlib
import heapq
from dataclasses import dataclass, field
from typing import Any

from triage.display import View, fmt_pct, fmt_value, table, tables
from triage.run.verdicts import FAILED, matches_any
from triage.studies.common import Section, omit_none

NAME = "reproduction"
TITLE = "Do the outputs come from these settings?"
DEFAULT_CHECK_ROWS = 16  # benchmarks/bench_check_rows.py measures what it adds to a demo run (README)
WARN_BELOW = 0.9  # a reproduced share below this gives a warning line (triage_run's reproduction_warning)
MOST_LISTED = 20  # differing rows listed in the summary (all of them with the default sample)


@dataclass
class SampledRow:
    index: int      # dev-set row index
    line: int
    id: str
    source: str     # as in the dev set (the settings' source prefix is added when decoding)
    output: str     # the given output


class FailedRowSample:
    """A seeded sample of at most `n` failed rows, kept while the rows stream through."""

    def __init__(self, n: int, seed: int = 0):
        self.n, self.seed = n, seed
        self.failed = 0                                   # failed rows seen whose source can be read
        self._heap: list[tuple[int, int, SampledRow]] = []  # (-key, index, row): the n smallest keys

    def _key(self, index: int) -> int:
        digest = hashlib.blake2b(f"{self.seed}:{index}".encode(), digest_size=8).digest()
        return int.from_bytes(digest, "big")

    def add_step(self, part: Any) -> None:
        """Take the failed rows of one step (a triage.run.pipeline.ChunkResult)."""
        if self.n <= 0:
            return
        v = part.verdicts
        if not len(v):
            return
        keep = v["verdict"].isin([str(x) for x in FAILED]) & ~v["reason_code"].astype(str).str.startswith("source:")
        for k in keep[keep].index:
            self.failed += 1
            index = part.offset + int(k)
            entry = (-self._key(index), index)
            if len(self._heap) >= self.n and entry <= self._heap[0][:2]:
                continue
            row = SampledRow(index, int(v["line"].iat[k]), str(v["id"].iat[k]), str(v["source"].iat[k]),
                             str(part.outputs[k]))
            if len(self._heap) < self.n:
                heapq.heappush(self._heap, (*entry, row))
            else:
                heapq.heapreplace(self._heap, (*entry, row))

    def rows(self) -> list[SampledRow]:
        """The sampled rows, in input order."""
        return sorted((r for *_, r in self._heap), key=lambda r: r.index)


@dataclass
class DifferingRow(Section):
    line: int
    id: str
    given: str
    decoded: str | None                         # None: not decoded to its end (the output had left the search)
    left_at: int | None = omit_none()           # 1-based target position (end token counted) where it left


@dataclass
class ReproductionSection(Section):
    objective: str
    seed: int
    failed: int                 # failed rows the sample was drawn from (their sources readable)
    checked: int
    reproduced: int
    reproduced_share: float | None  # reproduced / checked (None: no row checked)
    differing: list[DifferingRow] = field(default_factory=list)  # the first MOST_LISTED, in input order
    differing_rows: int = 0
    too_long: int = 0           # sampled rows not decoded: the source is longer than the model's positions
    # no wall-clock time here: summary.json is deterministic (timings belong in run.json)


def check_outputs(model, settings, sample: FailedRowSample, progress: bool = False) -> ReproductionSection:
    """Decode the sampled rows at `settings` and count the given outputs reproduced."""
    rows = sample.rows()
    section = ReproductionSection(objective=settings.signature(), seed=sample.seed, failed=sample.failed,
                                  checked=0, reproduced=0, reproduced_share=None)
    if not rows:
        return section
    src = model.tokenize_sources([settings.source_prefix + r.source for r in rows])
    most = model.max_source_tokens
    fits = [most is None or len(ids) <= most for ids in src]  # never decode past the model's positions
    rows = [r for r, ok in zip(rows, fits, strict=True) if ok]
    src = [ids for ids, ok in zip(src, fits, strict=True) if ok]
    section.too_long = fits.count(False)
    section.checked = len(rows)
    if not rows:
        return section
    watched = _decode(model, settings, src, [r.output for r in rows], progress)
    same = [w.decoded is not None and matches_any(w.decoded.text, [r.output]) for r, w in zip(rows, watched, strict=True)]
    differ = [DifferingRow(r.line, r.id, r.output, w.decoded.text if w.decoded is not None else None, w.left_at)
              for r, w, ok in zip(rows, watched, same, strict=True) if not ok]
    section.reproduced = sum(same)
    section.reproduced_share = section.reproduced / len(rows)
    section.differing, section.differing_rows = differ[:MOST_LISTED], len(differ)
    return section


def _decode(model, settings, src, given: list[str], progress: bool):
    """Decode the sources at `settings`, each watching its given output where the tokenizer's tokens
    spell that output again (triage.decoding.watch)."""
    from triage.decoding.watch import decode_watching
    from triage.run.progress import bar

    ids = model.tokenize_targets(given)
    targets = [t if matches_any(model.detokenize(t), [g]) else None for t, g in zip(ids, given, strict=True)]
    with bar(len(src), f"beam {settings.beam} (outputs check)", progress) as b:
        return decode_watching(model, settings, src, targets, progress=b.update)


# --------------------------------------------------------------------------- how the report shows it
def view(r: ReproductionSection) -> View:
    lines = [
        f"{fmt_value(r.checked)} failed rows (a seeded sample, seed {fmt_value(r.seed)}, of "
        f"{fmt_value(r.failed)}) decoded again at {fmt_value(r.objective)}: "
        f"{fmt_value(r.reproduced)} give the same output ({fmt_pct(r.reproduced_share)}).",
    ]
    if r.too_long:
        lines.append(f"{fmt_value(r.too_long)} sampled rows were not decoded: their source is longer than the "
                     "model's positions.")
    if r.differing_rows:
        lines.append("Below 90% the outputs were probably decoded with other settings; below 50% nothing is "
                     "recommended. Give the beam width, penalty and alpha you decoded with.")
    if any(d.decoded is None for d in r.differing):
        lines.append("A row whose output left the search was not decoded further (the decoder can no longer "
                     "give it): its table entry says at which token.")
    spec = [("line", "line", "int"), ("id", "id", "text"), ("given", "given output", "text"),
            ("decoded", "decoded at these settings", "text"), ("left_at", "output left the search at token", "int")]
    shown = tables(table("Rows whose output differs", spec, r.differing)) if r.differing else []
    return View(lines=lines, tables=shown)
