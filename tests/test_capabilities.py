"""Optional model capabilities: declared protocols, asked in one place, same numbers without them.

A model that offers only the required interface (a wrapper around a transformers checkpoint
that hides every optional capability) must give the numbers of transformers itself: its
outputs are those of transformers' ``generate`` (triage's own beam search runs, since the
wrapper has no decoder of its own), and its scores are transformers' forward pass log-probs.

Outside sources: transformers' ``generate`` (sequences and ``sequences_scores``) and its
forward pass (log_softmax of the logits).
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import pandas as pd
import pytest
import torch
from tinymodels import make_marian, sentences

from triage.decoding.decode import decode
from triage.models.api import PROTOCOLS, Capabilities, capabilities
from triage.models.describe import model_info, model_settings
from triage.models.loading import check_model, load_model
from triage.models.transformers_backend import TransformersModel
from triage.run.pipeline import TriageOptions, run_triage
from triage.settings import DecoderSettings

TESTS = Path(__file__).parent
REQUIRED = ("start_id", "end_id", "pad_id", "vocab_size", "unk_id", "max_source_tokens", "max_target_tokens",
            "tokenize_sources", "tokenize_targets", "detokenize", "token_strings", "fingerprint", "encode",
            "select", "next_logprobs")


class Plain:
    """Only the required SequenceModel members of another model, nothing optional."""

    def __init__(self, inner, **extra):
        for name in REQUIRED:
            setattr(self, name, getattr(inner, name))
        for name, value in extra.items():
            setattr(self, name, value)


@pytest.fixture(scope="module")
def tm():
    model, tok = make_marian(seed=23, max_new_tokens=20, num_beams=3, length_penalty=1.0)
    return TransformersModel(model, tok)


def test_the_backend_offers_every_capability(tm):
    # every capability but audio sources (a text model; the speech backend has them: test_speech_backend.py)
    assert capabilities(tm) == Capabilities(**{**dict.fromkeys(PROTOCOLS, True), "audio_sources": False})


def test_the_example_and_the_toy_model_offer_what_they_implement(monkeypatch):
    monkeypatch.syspath_prepend(str(TESTS.parent / "examples"))
    monkeypatch.syspath_prepend(str(TESTS))
    example = load_model("python:user_model:make_model")
    assert capabilities(example).names() == ["batched_forced_scoring", "default_settings"]
    toy = load_model("python:toy_gru:make_model")
    assert capabilities(toy).names() == []
    for name in ("user_model", "toy_gru"):
        sys.modules.pop(name, None)


def test_a_capability_needs_all_its_members_callable(tm):
    plain = Plain(tm)
    assert capabilities(plain) == Capabilities()
    # half of PositionScoring is not PositionScoring
    assert not capabilities(Plain(tm, score_positions=tm.score_positions)).position_scoring
    assert capabilities(Plain(tm, score_positions=tm.score_positions,
                              encode_grouped=tm.encode_grouped)).position_scoring
    # a member that is not callable is not a method
    assert not capabilities(Plain(tm, forced_logprobs=None)).batched_forced_scoring
    # default_settings must be a DecoderSettings
    assert not capabilities(Plain(tm, default_settings="beam 4")).default_settings
    assert capabilities(Plain(tm, default_settings=DecoderSettings())).default_settings


def test_settings_and_description_come_from_the_protocols(tm):
    plain = Plain(tm)
    check_model(plain, "plain")
    # no DefaultSettings: greedy, the model's length limit (README, "Your own model")
    s = model_settings(plain)
    assert (s.beam, s.max_new_tokens, s.eos_token_ids) == (1, tm.max_target_tokens, (tm.end_id,))
    # DefaultSettings: the checkpoint's generation config, flags on top
    s = model_settings(tm, beam=5)
    gc = tm.model.generation_config
    assert (s.beam, s.alpha, s.max_new_tokens) == (5, gc.length_penalty, gc.max_new_tokens)
    assert model_info(plain, "x") == {"spec": "x", "sha256": tm.fingerprint()}
    info = model_info(tm, "x")
    assert info["architecture"] == "MarianMTModel"
    assert info["parameters"] == sum(p.numel() for p in tm.model.parameters())
    assert info["vocab"] == len(tm.tokenizer)


def test_without_capabilities_the_numbers_are_transformers_own(tm):
    settings = model_settings(tm)
    plain = Plain(tm, default_settings=settings)
    src = sentences(10, seed=61)
    ids = tm.tokenize_sources(src)
    got = decode(plain, settings, ids, batch_size=4)
    gc = settings.to_generation_config(tm.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    for k, s in enumerate(src):
        with torch.no_grad():
            out = tm.model.generate(**tm.tokenizer([s], return_tensors="pt"), generation_config=gc)
        seq = out.sequences[0, 1:].tolist()
        toks = seq[: seq.index(tm.end_id)] if tm.end_id in seq else seq
        assert got[k].ids == toks
        assert got[k].score == pytest.approx(float(out.sequences_scores[0]), abs=1e-4)

    refs = sentences(10, seed=62)
    frame = pd.DataFrame({"id": [str(i) for i in range(10)], "source": src, "references": [[r] for r in refs],
                          "output": [d.text for d in got], "line": range(2, 12)})
    full = run_triage(tm, frame, settings, TriageOptions(progress=False)).verdicts
    bare = run_triage(plain, frame, settings, TriageOptions(progress=False)).verdicts
    assert bare["verdict"].tolist() == full["verdict"].tolist()
    for k in range(10):
        enc = tm.tokenizer([src[k]], text_target=[refs[k]], return_tensors="pt")
        labels = enc["labels"]
        dec = torch.cat([torch.tensor([[tm.start_id]]), labels[:, :-1]], dim=1)
        with torch.no_grad():
            logits = tm.model(input_ids=enc["input_ids"], decoder_input_ids=dec).logits
        want = math.fsum(torch.log_softmax(logits.float(), -1)[0].gather(-1, labels[0, :, None]).squeeze(-1).tolist())
        assert bare["ref_logprob"][k] == pytest.approx(want, abs=1e-4)
        assert full["ref_logprob"][k] == pytest.approx(want, abs=1e-4)
