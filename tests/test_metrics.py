"""The corpus metric's reliance on sacrebleu's private methods, held to the range it is tested on.

tests/test_streaming.py checks that summed statistics over any split equal sacrebleu's
`Metric.corpus_score` for word-only texts. Here: the installed sacrebleu lies inside the range
pyproject.toml pins, and the texts a real run meets that the property test never draws (an empty
output, punctuation, non-Latin script, a row whose extra reference is missing) agree with
sacrebleu's public top-level `corpus_chrf` / `corpus_bleu` functions, split and whole.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest
import sacrebleu
from packaging.specifiers import SpecifierSet
from packaging.version import Version

from triage.run.metrics import SACREBLEU_TESTED, CorpusStats, corpus

PYPROJECT = Path(__file__).resolve().parents[1] / "pyproject.toml"


def test_installed_sacrebleu_is_inside_the_pinned_range():
    deps = tomllib.loads(PYPROJECT.read_text(encoding="utf-8"))["project"]["dependencies"]
    pin = next(d for d in deps if d.startswith("sacrebleu"))
    assert SpecifierSet(pin.removeprefix("sacrebleu")) == SpecifierSet(SACREBLEU_TESTED)
    assert Version(sacrebleu.__version__) in SpecifierSet(SACREBLEU_TESTED)


OUTPUTS = ["", "The cat sat, didn't it?", "Ein Haus am See.", "東京は大きい。", "word word word word", "x"]
REFS = [
    ["Nothing at all."],
    ["The cat sat, did it not?", "A cat was sitting."],
    ["A house by the lake."],
    ["東京は大きな都市です。", "東京は大きい。"],
    ["word word word"],
    ["y", "x z"],
]


@pytest.mark.parametrize("name", ["chrf", "bleu"])
def test_awkward_texts_match_sacrebleu_public_corpus_functions(name):
    # source: sacrebleu's public corpus_chrf / corpus_bleu; references are streams, None where a row has fewer
    streams = [[r[k] if k < len(r) else None for r in REFS] for k in range(2)]
    public = sacrebleu.corpus_chrf if name == "chrf" else sacrebleu.corpus_bleu
    want = public(OUTPUTS, streams).score
    assert corpus(name, OUTPUTS, REFS)[0] == pytest.approx(want, abs=1e-9)
    stats = CorpusStats(name)
    for a, b in ((0, 1), (1, 4), (4, 6)):  # the first part has one reference, the others two
        stats.add(OUTPUTS[a:b], REFS[a:b])
    score, signature = stats.score()
    assert score == pytest.approx(want, abs=1e-9)
    assert "nrefs:var" in signature  # rows with one and with two references, as sacrebleu writes it
