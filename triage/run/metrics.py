"""Sentence and corpus metrics from sacrebleu (chrF by default, BLEU on request).

Sentence scores and signatures use sacrebleu's public API. A streamed corpus score needs the
per-segment statistics that sacrebleu's public ``corpus_score`` sums internally and does not
hand out, so ``CorpusStats`` calls three of its private methods (``_check_corpus_score_args``,
``_extract_corpus_statistics``, ``_compute_score_from_stats``), here and nowhere else. They are
tested on the versions pyproject.toml allows (``SACREBLEU_TESTED``): tests/test_metrics.py checks
the summed statistics against the public ``corpus_score`` and the installed version against the pin.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

METRICS = ("chrf", "bleu")
# the sacrebleu versions CorpusStats is tested on (the pin in pyproject.toml; private methods may change after)
SACREBLEU_TESTED = ">=2.4,<2.7"


def _metric(name: str, sentence: bool):
    from sacrebleu.metrics import BLEU, CHRF

    if name == "chrf":
        return CHRF()
    if name == "bleu":
        # sentence BLEU needs smoothing to be useful; sacrebleu's own default for sentence_score is 'exp'
        return BLEU(effective_order=True) if sentence else BLEU()
    raise ValueError(f"unknown metric {name!r}; choose from {', '.join(METRICS)}")


def sentence_scores(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> list[float]:
    """sacrebleu's sentence-level score of each output against its own references."""
    m = _metric(name, sentence=True)
    return [float(m.sentence_score(o, list(refs)).score) for o, refs in zip(outputs, references, strict=True)]


def corpus_score(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> float:
    """sacrebleu's corpus-level score; rows with fewer references are padded as sacrebleu expects."""
    return corpus(name, outputs, references)[0]


def corpus(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> tuple[float, str]:
    """(corpus score, sacrebleu signature)."""
    stats = CorpusStats(name)
    stats.add(outputs, references)
    return stats.score()


class CorpusStats:
    """sacrebleu's corpus score, built up part by part.

    sacrebleu computes a corpus score from the sum of per-segment statistics (n-gram matches
    and lengths, integers), so summing those statistics over parts of the corpus and scoring
    the sum gives exactly the score of one call over the whole corpus, with memory that does
    not grow with it. Rows may have different numbers of references (missing ones count as
    none, as sacrebleu treats them).
    """

    def __init__(self, name: str):
        self.metric = _metric(name, sentence=False)
        self.total: list | None = None
        self.ref_counts: set[int] = set()  # references per segment seen (the signature's nrefs)

    def add(self, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> None:
        if not outputs:
            return
        depth = max(len(r) for r in references)
        streams = [[refs[k] if k < len(refs) else "" for refs in references] for k in range(depth)]
        if depth > 1:
            # sacrebleu treats an empty string as "no reference" only when it is None-like; keep the first stream full
            streams = [streams[0]] + [[r if r else None for r in s] for s in streams[1:]]
        self.metric._check_corpus_score_args(list(outputs), streams)
        part = [list(x) for x in self.metric._extract_corpus_statistics(list(outputs), streams)]
        self.total = [sum(col) for col in zip(*([self.total] if self.total else []), *part, strict=True)]
        self.ref_counts.add(self.metric.num_refs)

    def score(self) -> tuple[float, str]:
        """(corpus score, sacrebleu signature); NaN before any segment."""
        if self.total is None:
            return math.nan, ""
        score = float(self.metric._compute_score_from_stats(list(self.total)).score)
        # nrefs as one call over the whole corpus sets it: the count when every part agrees, else -1 ("var")
        self.metric.num_refs = next(iter(self.ref_counts)) if len(self.ref_counts) == 1 else -1
        return score, str(self.metric.get_signature())
