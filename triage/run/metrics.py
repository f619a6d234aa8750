"""Sentence and corpus metrics: sacrebleu's chrF (the default) and BLEU, jiwer's WER and CER.

Sentence scores and signatures use sacrebleu's public API. A streamed corpus score needs the
per-segment statistics that sacrebleu's public ``corpus_score`` sums internally and does not
hand out, so ``CorpusStats`` calls three of its private methods (``_check_corpus_score_args``,
``_extract_corpus_statistics``, ``_compute_score_from_stats``), here and nowhere else. They are
tested on the versions pyproject.toml allows (``SACREBLEU_TESTED``): tests/test_metrics.py checks
the summed statistics against the public ``corpus_score`` and the installed version against the pin.

Word and character error rate come from jiwer (``process_words`` / ``process_characters``), in
percent (100 x jiwer's fraction), and are lower-is-better (``HIGHER_IS_BETTER``). A row's error
rate is that of its closest reference (fewest edits, the first on a tie); the corpus rate is the
sum of the rows' edits over the sum of their references' lengths (jiwer's corpus rate over the
same pairs), so it streams like sacrebleu's statistics.

``normalize_text`` is the text normalization applied to references and outputs before a row is
called correct and before its metric is computed (``--normalize``): ``none`` keeps the text,
``basic`` lower-cases it, removes punctuation (jiwer's RemovePunctuation: every Unicode
punctuation character) and collapses whitespace.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

METRICS = ("chrf", "bleu", "wer", "cer")
#: whether a larger value of the metric is better (chrF, BLEU) or worse (error rates)
HIGHER_IS_BETTER = {"chrf": True, "bleu": True, "wer": False, "cer": False}
NORMALIZATIONS = ("none", "basic")
ERROR_RATES = ("wer", "cer")


def higher_is_better(name: str) -> bool:
    return HIGHER_IS_BETTER.get(name, True)


def gain(name: str, delta: float) -> float:
    """A metric change as an improvement (positive = better), whichever way the metric points."""
    return delta if higher_is_better(name) else -delta


def reaches(name: str, value: float, threshold: float) -> bool:
    """Whether a sentence metric value is at least as good as the threshold (>= for chrF/BLEU, <= for WER/CER)."""
    return value >= threshold if higher_is_better(name) else value <= threshold


def normalize_text(text: str, how: str = "none") -> str:
    """The text as compared and scored by the metric (``none`` or ``basic``; see the module docstring)."""
    if how == "none":
        return text
    if how == "basic":
        return _basic()(text)
    raise ValueError(f"unknown normalization {how!r}; choose from {', '.join(NORMALIZATIONS)}")


_BASIC = None


def _basic():
    global _BASIC
    if _BASIC is None:
        import jiwer

        _BASIC = jiwer.Compose([jiwer.ToLowerCase(), jiwer.RemovePunctuation(), jiwer.RemoveMultipleSpaces(),
                                jiwer.Strip()])
    return _BASIC


def _edits(name: str, output: str, refs: Sequence[str]) -> tuple[int, int]:
    """(edits, reference length) against the closest reference, from jiwer's alignment."""
    import jiwer

    process = jiwer.process_words if name == "wer" else jiwer.process_characters
    best: tuple[int, int] | None = None
    for ref in refs:
        if ref is None:
            continue
        o = process(ref, output)
        cand = (o.substitutions + o.deletions + o.insertions, o.substitutions + o.deletions + o.hits)
        if best is None or cand[0] < best[0]:
            best = cand
    return best if best is not None else (0, 0)


def _rate(edits: int, length: int) -> float:
    """Percent; an empty reference counts its edits over a length of 1, as jiwer does."""
    return 100.0 * edits / max(length, 1)
# the sacrebleu versions CorpusStats is tested on (the pin in pyproject.toml; private methods may change after)
SACREBLEU_TESTED = ">=2.4,<2.7"


def _metric(name: str, sentence: bool):
    from sacrebleu.metrics import BLEU, CHRF

    if name in ERROR_RATES:
        return ErrorRate(name)
    if name == "chrf":
        return CHRF()
    if name == "bleu":
        # sentence BLEU needs smoothing to be useful; sacrebleu's own default for sentence_score is 'exp'
        return BLEU(effective_order=True) if sentence else BLEU()
    raise ValueError(f"unknown metric {name!r}; choose from {', '.join(METRICS)}")


def sentence_scores(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]],
                    normalize: str = "none") -> list[float]:
    """Each output's sentence score against its own references (sacrebleu; jiwer for WER / CER), after the
    text normalization `normalize`."""
    outputs, references = _normalized(outputs, references, normalize)
    if name in ERROR_RATES:
        return [_rate(*_edits(name, o, refs)) for o, refs in zip(outputs, references, strict=True)]
    m = _metric(name, sentence=True)
    return [float(m.sentence_score(o, list(refs)).score) for o, refs in zip(outputs, references, strict=True)]


def _normalized(outputs, references, how: str):
    if how == "none":
        return outputs, references
    return ([normalize_text(o, how) for o in outputs],
            [[normalize_text(r, how) if r is not None else None for r in refs] for refs in references])


def corpus_score(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]],
                 normalize: str = "none") -> float:
    """sacrebleu's corpus-level score; rows with fewer references are padded as sacrebleu expects."""
    return corpus(name, outputs, references, normalize)[0]


def corpus(name: str, outputs: Sequence[str], references: Sequence[Sequence[str]],
           normalize: str = "none") -> tuple[float, str]:
    """(corpus score, signature: sacrebleu's, or the error rate's)."""
    stats = CorpusStats(name, normalize)
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

    def __init__(self, name: str, normalize: str = "none"):
        self.name = name
        self.normalize = normalize
        if name in ERROR_RATES:
            self.errors = ErrorRate(name)
            return
        self.metric = _metric(name, sentence=False)
        self.total: list | None = None
        self.ref_counts: set[int] = set()  # references per segment seen (the signature's nrefs)

    def add(self, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> None:
        if not outputs:
            return
        outputs, references = _normalized(outputs, references, self.normalize)
        if self.name in ERROR_RATES:
            self.errors.add(outputs, references)
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
        if self.name in ERROR_RATES:
            return self.errors.score()
        if self.total is None:
            return math.nan, ""
        score = float(self.metric._compute_score_from_stats(list(self.total)).score)
        # nrefs as one call over the whole corpus sets it: the count when every part agrees, else -1 ("var")
        self.metric.num_refs = next(iter(self.ref_counts)) if len(self.ref_counts) == 1 else -1
        return score, str(self.metric.get_signature())


class ErrorRate:
    """jiwer's corpus word (character) error rate in percent, summed part by part: the rows'
    edits against their closest reference over those references' lengths."""

    def __init__(self, name: str):
        import jiwer

        self.name = name
        self.edits = 0
        self.length = 0
        self.rows = 0
        self.version = getattr(jiwer, "__version__", None) or _version("jiwer")

    def add(self, outputs: Sequence[str], references: Sequence[Sequence[str]]) -> None:
        for o, refs in zip(outputs, references, strict=True):
            e, n = _edits(self.name, o, refs)
            self.edits += e
            self.length += n
            self.rows += 1

    def score(self) -> tuple[float, str]:
        if not self.rows:
            return math.nan, ""
        unit = "words" if self.name == "wer" else "chars"
        return _rate(self.edits, self.length), f"{self.name}|jiwer:{self.version}|unit:{unit}|refs:closest|percent"


def _version(package: str) -> str:
    from importlib.metadata import version

    return version(package)
