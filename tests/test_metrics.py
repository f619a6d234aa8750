"""The corpus metric's reliance on sacrebleu's private methods, held to the range it is tested on.

tests/test_streaming.py checks that summed statistics over any split equal sacrebleu's
`Metric.corpus_score` for word-only texts. Here: the installed sacrebleu lies inside the range
pyproject.toml pins, and the texts a real run meets that the property test never draws (an empty
output, punctuation, non-Latin script, a row whose extra reference is missing) agree with
sacrebleu's public top-level `corpus_chrf` / `corpus_bleu` functions, split and whole.
Word and character error rates are checked against jiwer's `wer` / `cer` on the same strings.
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


# ------------------------------------------------------------------ word and character error rate (jiwer)
WER_CASES = [
    ("the train to north is late", "the train to north is late"),
    ("the train to north is late", "a train north is now late"),
    ("platform four", "platform for four"),
    ("Stop, please!", "stop please"),
    ("", "an insertion"),
    ("only the reference", ""),
]


def test_wer_and_cer_equal_jiwer_on_the_same_strings():
    import jiwer

    from triage.run.metrics import corpus, sentence_scores

    refs = [r for r, _ in WER_CASES]
    outs = [o for _, o in WER_CASES]
    for name, ref_fn in (("wer", jiwer.wer), ("cer", jiwer.cer)):
        got = sentence_scores(name, outs, [[r] for r in refs])
        assert got == [pytest.approx(100 * ref_fn(r, o)) for r, o in WER_CASES]  # jiwer, one pair at a time
        score, sig = corpus(name, outs, [[r] for r in refs])
        full = [(r, o) for r, o in WER_CASES if r]  # jiwer's corpus rate over lists (it needs non-empty references)
        part, _ = corpus(name, [o for _, o in full], [[r] for r, _ in full])
        assert part == pytest.approx(100 * ref_fn([r for r, _ in full], [o for _, o in full]))
        assert sig.startswith(f"{name}|jiwer:")


def test_error_rates_stream_and_take_the_closest_reference():
    import jiwer

    from triage.run.metrics import CorpusStats, corpus, sentence_scores

    outs = ["a b c", "x y", "one two three four"]
    refs = [["a b d", "a b c"], ["x z"], ["one two three", "one"]]
    assert sentence_scores("wer", outs, refs) == pytest.approx([0.0, 50.0, 100 * 1 / 3])
    whole = corpus("wer", outs, refs)[0]
    closest = [r[0] if jiwer.wer(r[0], o) <= jiwer.wer(r[-1], o) else r[-1] for o, r in zip(outs, refs, strict=True)]
    assert whole == pytest.approx(100 * jiwer.wer(closest, outs))
    parts = CorpusStats("wer")
    for k in range(3):
        parts.add(outs[k : k + 1], refs[k : k + 1])
    assert parts.score()[0] == whole


def test_basic_normalization_is_lower_case_without_punctuation_or_extra_space():
    from triage.run.metrics import gain, higher_is_better, normalize_text, reaches

    assert normalize_text("  Platform 4,  NORTH!  ", "basic") == "platform 4 north"
    assert normalize_text("  Platform 4,  NORTH!  ", "none") == "  Platform 4,  NORTH!  "
    assert not higher_is_better("wer") and higher_is_better("chrf")
    assert reaches("wer", 10.0, 10.0) and not reaches("wer", 10.5, 10.0)
    assert reaches("chrf", 60.0, 50.0) and not reaches("chrf", 40.0, 50.0)
    assert gain("wer", -2.0) == 2.0 and gain("bleu", -2.0) == -2.0
