"""A model of the user's own (tests/toy_gru.py) through `python:module:factory`, and load errors.

Outside sources: the toy model's own teacher-forced log-probs (a whole-prefix forward pass,
independent of the cache the decoder uses) and a plain argmax loop for greedy search.
"""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import pytest
import torch

TESTS = Path(__file__).parent
sys.path.insert(0, str(TESTS))

from triage.decoding.beam import beam_search  # noqa: E402
from triage.decoding.exact import PROVEN, exact_search  # noqa: E402
from triage.errors import ModelError, TriageError  # noqa: E402
from triage.models.loading import load_model  # noqa: E402
from triage.settings import DecoderSettings  # noqa: E402

torch.set_num_threads(1)

TEXTS = ["the 9.15 to leeds", "platform 4", "delayed by 10 minutes", "calling at york"]


@pytest.fixture(scope="module")
def toy():
    return load_model("python:toy_gru:make_model")


def toy_settings(model, beam: int, limit: int = 24) -> DecoderSettings:
    return DecoderSettings(beam=beam, alpha=1.0, max_new_tokens=limit, eos_token_ids=(model.end_id,),
                           pad_token_id=model.pad_id, decoder_start_token_id=model.start_id)


def uncached_logprob(model, source, target_with_end) -> list[float]:
    state = model.encode([source])
    out = []
    for i, tok in enumerate(target_with_end):
        lp, _ = model.next_logprobs(state, torch.tensor([[model.start_id, *target_with_end[:i]]]), None)
        out.append(float(lp[0, tok]))
    return out


def test_loads_and_beam_search_runs(toy):
    assert type(toy).__name__ == "ToyGRU"
    sources = toy.tokenize_sources(TEXTS)
    for beam in (1, 4):
        hyps = beam_search(toy, toy_settings(toy, beam), sources, batch_size=3)
        assert len(hyps) == len(TEXTS)
        for src, h in zip(sources, hyps, strict=True):
            full = h.tokens + ([h.end_token] if h.finished else [])
            # the per-token log-probs are the model's, recomputed without the decoder's cache
            assert h.token_logprobs == pytest.approx(uncached_logprob(toy, src, full), abs=1e-4)
            assert h.score == pytest.approx(toy_settings(toy, beam).objective(sum(h.token_logprobs), h.length),
                                            abs=1e-4)
    # the copy bias makes the outputs readable: short sources come back whole
    assert toy.detokenize(beam_search(toy, toy_settings(toy, 4), sources)[1].tokens) == "platform 4"


def test_width_one_is_a_plain_argmax_loop(toy):
    # common practice: greedy search = best token at each step until the end token
    sources = toy.tokenize_sources(TEXTS)
    s = toy_settings(toy, 1, limit=12)
    for src, h in zip(sources, beam_search(toy, s, sources), strict=True):
        prefix = [toy.start_id]
        state = toy.encode([src])
        for _ in range(12):
            lp, _ = toy.next_logprobs(state, torch.tensor([prefix]), None)
            prefix.append(int(lp[0].argmax()))
            if prefix[-1] == toy.end_id:
                break
        assert h.tokens + ([h.end_token] if h.finished else []) == prefix[1:]


def test_exact_search_runs_on_the_toy(toy):
    src = toy.tokenize_sources(["ab"])[0]
    s = toy_settings(toy, 2, limit=3)
    r = exact_search(toy, s, src)
    assert r.status == PROVEN
    assert r.best_score >= beam_search(toy, s, [src])[0].score - 1e-6


# ------------------------------------------------------------------------------ load errors
@pytest.fixture()
def user_dir(tmp_path, monkeypatch):
    (tmp_path / "user_models.py").write_text(textwrap.dedent('''
        class Half:
            start_id = 1
            end_id = 2
            def encode(self, sources):
                return sources

        def half():
            return Half()

        def broken():
            raise RuntimeError("weights file missing")

        def bad_ids():
            import toy_gru
            m = toy_gru.make_model()
            m.end_id = 999
            return m

        not_callable = 3
    '''))
    monkeypatch.syspath_prepend(str(tmp_path))
    return tmp_path


@pytest.mark.parametrize("spec,words", [
    ("python:user_models:half", ["lacks", "pad_id", "next_logprobs"]),
    ("python:user_models:broken", ["broken()", "weights file missing"]),
    ("python:user_models:bad_ids", ["end_id 999", "outside the vocabulary"]),
    ("python:user_models:not_callable", ["no callable not_callable"]),
    ("python:user_models:absent", ["no callable absent"]),
    ("python:no_such_module_here:make", ["cannot import module no_such_module_here"]),
    ("python:user_models", ["expected python:package.module:factory"]),
    ("python:bad name:make", ["not a Python module name"]),
])
def test_bad_python_specs_give_one_line(user_dir, spec, words):
    with pytest.raises(ModelError) as info:
        load_model(spec)
    line = info.value.one_line()
    assert "\n" not in line and line.startswith(spec)
    for w in words:
        assert w in line
    assert isinstance(info.value, TriageError) and info.value.exit_code == 2


def test_other_specs_go_to_the_transformers_loader(tmp_path):
    from tinymodels import make_wrapped_marian

    with pytest.raises(ModelError, match="not found"):
        load_model(str(tmp_path / "nowhere"))
    tm = make_wrapped_marian(0)
    tm.model.save_pretrained(tmp_path / "ckpt")
    tm.tokenizer.save_pretrained(tmp_path / "ckpt")
    loaded = load_model(str(tmp_path / "ckpt"))
    assert type(loaded).__name__ == "TransformersModel"
    src = [[5, 6, 7, 1]]
    s = DecoderSettings.from_generation_config(loaded.model.generation_config, beam=3, max_new_tokens=6)
    a, b = beam_search(loaded, s, src)[0], beam_search(tm, s, src)[0]
    assert a.tokens == b.tokens and a.score == pytest.approx(b.score, abs=1e-6)
