"""Sentence and corpus metrics from sacrebleu (chrF by default, BLEU on request)."""

from __future__ import annotations

from collections.abc import Sequence

METRICS = ("chrf", "bleu")


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
    m = _metric(name, sentence=False)
    depth = max((len(r) for r in references), default=1)
    streams = [[refs[k] if k < len(refs) else "" for refs in references] for k in range(depth)]
    if depth > 1:
        # sacrebleu treats an empty string as "no reference" only when it is None-like; keep the first stream full
        streams = [streams[0]] + [[r if r else None for r in s] for s in streams[1:]]
    score = float(m.corpus_score(list(outputs), streams).score)
    return score, str(m.get_signature())
