"""Speech-to-text checkpoints (Whisper) behind the model interface, checked against transformers itself.

Outside references: transformers' WhisperForConditionalGeneration.generate (its sequences_scores at
beam widths 2 and 4; at width 1, which has none, the sum of log_softmax of the raw logits it returns
for the picked tokens) and the model's own cross-entropy loss. Audio: tones and noise synthesized
here, written with soundfile at 8, 16 and 44.1 kHz, mono and stereo.
"""

from __future__ import annotations

import pytest
import torch
from tinyspeech import make_whisper_dir, write_tone

from triage.decoding.beam import beam_search
from triage.errors import OptionError
from triage.models.api import capabilities
from triage.models.loading import load_model
from triage.scoring.scorer import ScoreRequest, score_requests

RATES = (8000, 16000, 44100)


@pytest.fixture(scope="module")
def whisper_dir(tmp_path_factory):
    return make_whisper_dir(tmp_path_factory.mktemp("whisper") / "model", seed=0, eos_bias=0.9)


@pytest.fixture(scope="module")
def clips(tmp_path_factory):
    folder = tmp_path_factory.mktemp("clips")
    return [str(write_tone(folder / f"c{k}.wav", 0.3 + 0.2 * k, RATES[k % 3], 1 + k % 2, freq=200 + 50 * k, seed=k))
            for k in range(8)]


@pytest.fixture(scope="module")
def whisper(whisper_dir):
    return load_model(str(whisper_dir))


def test_whisper_loads_as_a_speech_model_with_the_forced_prompt(whisper):
    caps = capabilities(whisper)
    assert caps.audio_sources and caps.own_decoder and caps.own_generation_rules
    assert not caps.position_scoring  # Whisper always has suppress rules: scoring takes the rules path
    # start-of-transcript, the language, the task, no-timestamps: the prompt generate starts from
    assert whisper.token_strings(whisper.prompt_ids) == ["<|startoftranscript|>", "<|en|>", "<|transcribe|>",
                                                         "<|notimestamps|>"]
    assert whisper.start_id == whisper.prompt_ids[0]
    assert whisper.max_audio_seconds == 2.0  # the feature extractor's window (chunk_length)
    assert whisper.max_target_tokens == 64 - 4 + 1


lengths: set[tuple[int, float, int]] = set()  # (beam, alpha, output length) seen by the test below


@pytest.mark.parametrize("beam", [1, 2, 4])
@pytest.mark.parametrize("alpha", [0.0, 0.7, 1.0])
def test_output_scores_equal_generate(whisper, clips, beam, alpha):
    s = whisper.default_settings.replace(beam=beam, alpha=alpha, max_new_tokens=12)
    src = whisper.tokenize_sources(clips)
    gen = whisper.generate(s, src)  # transformers' Whisper generate (sequences_scores for beam > 1)
    lengths.update((beam, alpha, len(g.ids)) for g in gen)
    scored = score_requests(whisper, s, [ScoreRequest(i, [g.ids], [not g.finished]) for i, g in zip(src, gen, strict=True)])
    for g, (t,) in zip(gen, scored, strict=True):
        assert t.blocked_rule is None
        assert t.score == pytest.approx(g.score, abs=1e-4)
        if beam > 1 and alpha:
            # generate divides by the transcript's tokens plus the end token; the prompt is not counted
            n = len(g.ids) + (1 if g.finished else 0)
            assert t.length == n
            assert g.score == pytest.approx(t.logprob_sum / n ** alpha, abs=1e-5)
            assert abs(g.score - t.logprob_sum / (n + len(whisper.prompt_ids)) ** alpha) > 1e-3


def test_the_outputs_compared_have_several_lengths():
    """The random model's outputs differ in length, so the length penalty is exercised (counted over the
    parametrized runs above, which pytest runs first in this file)."""
    assert len({n for _, _, n in lengths}) >= 3


@pytest.mark.parametrize("beam", [1, 2, 4])
def test_triage_beam_search_equals_generate(whisper, clips, beam):
    s = whisper.default_settings.replace(beam=beam, alpha=0.7, max_new_tokens=12)
    src = whisper.tokenize_sources(clips)
    gen = whisper.generate(s, src)
    own = beam_search(whisper, s, src)
    for h, g in zip(own, gen, strict=True):
        assert list(h.tokens) == g.ids
        assert bool(h.finished) == g.finished
        assert float(h.score) == pytest.approx(g.score, abs=1e-4)


def test_reference_logprob_equals_the_models_loss(whisper, clips):
    """Mean cross-entropy of transformers' own forward with labels, times the label count, is minus the summed
    log-prob triage gives the reference (transcript + end, prompt not scored)."""
    refs = ["abc de", "the tone", "ok"]
    src = whisper.tokenize_sources(clips[:3])
    s = whisper.default_settings.replace(beam=2, alpha=0.0, max_new_tokens=20)
    targets = whisper.tokenize_targets(refs)
    scored = score_requests(whisper, s, [ScoreRequest(i, [t]) for i, t in zip(src, targets, strict=True)])
    hf = whisper.model
    for clip_ids, t, (sc,) in zip(src, targets, scored, strict=True):
        feats = whisper._features([clip_ids])["input_features"]
        prompt = whisper.prompt_ids
        dec = torch.tensor([prompt + t])
        labels = torch.tensor([[-100] * (len(prompt) - 1) + t + [whisper.end_id]])
        with torch.no_grad():
            loss = hf(input_features=feats, decoder_input_ids=dec, labels=labels).loss
        assert sc.logprob_sum == pytest.approx(-float(loss) * (len(t) + 1), abs=1e-4)


def test_suppressed_tokens_block_a_target_as_generate_forbids_them(whisper, clips):
    """generate never writes a suppressed token, nor a space or the end token first (begin-suppress)."""
    src = whisper.tokenize_sources(clips[:1])
    s = whisper.default_settings.replace(beam=2, max_new_tokens=20)
    cases = {"a#b": "suppressed token", " ab": "suppressed first token", "ab": None, "a b": None}
    targets = whisper.tokenize_targets(list(cases))
    scored = score_requests(whisper, s, [ScoreRequest(src[0], targets)])[0]
    for (text, rule), t in zip(cases.items(), scored, strict=True):
        assert t.blocked_rule == rule, text
    empty = score_requests(whisper, s, [ScoreRequest(src[0], [[]])])[0][0]  # the end token first
    assert empty.blocked_rule == "suppressed first token"


def test_language_and_task_choose_the_prompt(whisper_dir, clips):
    de = load_model(str(whisper_dir), language="de", task="translate")
    assert de.token_strings(de.prompt_ids) == ["<|startoftranscript|>", "<|de|>", "<|translate|>", "<|notimestamps|>"]
    assert de.fingerprint() != load_model(str(whisper_dir)).fingerprint()
    s = de.default_settings.replace(beam=2, alpha=1.0, max_new_tokens=10)
    src = de.tokenize_sources(clips[:4])
    gen = de.generate(s, src)
    scored = score_requests(de, s, [ScoreRequest(i, [g.ids], [not g.finished]) for i, g in zip(src, gen, strict=True)])
    assert [t[0].score for t in scored] == pytest.approx([g.score for g in gen], abs=1e-4)
    with pytest.raises(OptionError, match="Unsupported language|not supported"):
        load_model(str(whisper_dir), language="xx")


def test_multilingual_model_needs_a_language_and_english_only_refuses_one(tmp_path):
    multi = make_whisper_dir(tmp_path / "multi", language=None)
    with pytest.raises(OptionError, match="give --language"):
        load_model(str(multi))
    assert load_model(str(multi), language="en").prompt_ids[1] == load_model(str(multi), language="en").tokenizer \
        .convert_tokens_to_ids("<|en|>")
    english = make_whisper_dir(tmp_path / "english", multilingual=False)
    m = load_model(str(english))
    assert m.token_strings(m.prompt_ids) == ["<|startoftranscript|>", "<|notimestamps|>"]
    with pytest.raises(OptionError, match="English-only"):
        load_model(str(english), language="en")


def test_a_full_whisper_window_is_30_seconds(tmp_path):
    """The released layout: 30 s of audio, 3000 feature frames, 1500 encoder positions."""
    folder = make_whisper_dir(tmp_path / "w30", chunk_seconds=30)
    m = load_model(str(folder))
    assert m.max_audio_seconds == 30.0
    ok = write_tone(tmp_path / "ok.flac", 29.5, 16000)
    long = write_tone(tmp_path / "long.wav", 30.5, 8000)
    assert m.audio_problem(str(ok)) is None
    assert "30.50 s long, the model reads at most 30 s" in m.audio_problem(str(long))
    s = m.default_settings.replace(beam=2, max_new_tokens=6)
    src = m.tokenize_sources([str(ok)])
    g = m.generate(s, src)[0]
    t = score_requests(m, s, [ScoreRequest(src[0], [g.ids], [not g.finished])])[0][0]
    assert t.score == pytest.approx(g.score, abs=1e-4)


def test_a_length_limit_beyond_the_decoders_positions_is_refused(whisper, clips):
    s = whisper.default_settings.replace(beam=2, max_new_tokens=61)
    with pytest.raises(OptionError, match="exceed the decoder's 64 positions"):
        whisper.generate(s, whisper.tokenize_sources(clips[:1]))
    # the checkpoint's own limit: max_length (64) with the prompt in front, capped at the positions
    assert whisper.default_settings.limit_new_tokens() == 64 - 4


def test_the_source_key_is_the_audio_samples_hash(whisper, clips, tmp_path):
    import shutil

    copy = shutil.copy(clips[2], tmp_path / "copy.wav")
    a, b, c = whisper.tokenize_sources([clips[2], str(copy), clips[3]])
    assert a == b != c
    assert all(0 <= x < whisper.vocab_size for x in a)


# ------------------------------------------------------------------ a second family: Speech2Text
@pytest.fixture(scope="module")
def s2t(tmp_path_factory):
    from tinyspeech import make_s2t_dir

    return load_model(str(make_s2t_dir(tmp_path_factory.mktemp("s2t") / "model", seed=0)))


@pytest.fixture(scope="module")
def long_clips(tmp_path_factory):
    folder = tmp_path_factory.mktemp("long")
    return [str(write_tone(folder / f"s{k}.wav", 0.3 + 0.3 * k, RATES[k % 3], 1 + k % 2, freq=200 + 50 * k, seed=k))
            for k in range(8)]


def test_speech2text_needs_no_torchaudio_and_has_the_plain_prompt(s2t, whisper_dir):
    import importlib.util

    assert importlib.util.find_spec("torchaudio") is None  # the numpy filter bank of its feature extractor
    assert type(s2t.model).__name__ == "Speech2TextForConditionalGeneration"
    assert s2t.prompt_ids == [1] and capabilities(s2t).audio_sources
    # 200 encoder positions x 4 (two stride-2 convolutions) frames of 10 ms, plus the 25 ms window
    assert s2t.max_audio_seconds == pytest.approx((800 - 1) * 0.01 + 0.025)
    with pytest.raises(OptionError, match="apply to Whisper"):
        load_model(str(s2t.model_dir), language="en")


@pytest.mark.parametrize("beam", [1, 2, 4])
@pytest.mark.parametrize("alpha", [0.0, 0.7, 1.0])
def test_speech2text_scores_and_beam_search_equal_generate(s2t, long_clips, beam, alpha):
    s = s2t.default_settings.replace(beam=beam, alpha=alpha, max_new_tokens=12)
    src = s2t.tokenize_sources(long_clips)  # clips of different lengths share a padded batch
    gen = s2t.generate(s, src)  # transformers' generate with the feature frames' attention mask
    # this random model ends at once unless the length penalty favours long outputs
    assert len({len(g.ids) for g in gen}) > 1 or not (beam == 4 and alpha == 1.0)
    scored = score_requests(s2t, s, [ScoreRequest(i, [g.ids], [not g.finished]) for i, g in zip(src, gen, strict=True)])
    assert [t[0].score for t in scored] == pytest.approx([g.score for g in gen], abs=1e-4)
    own = beam_search(s2t, s, src)
    assert [list(h.tokens) for h in own] == [g.ids for g in gen]
    assert [float(h.score) for h in own] == pytest.approx([g.score for g in gen], abs=1e-4)


def test_speech2text_reference_logprob_equals_the_models_loss(s2t, long_clips):
    refs = ["the train is late", "platform four", "north"]
    src = s2t.tokenize_sources(long_clips[:3])
    s = s2t.default_settings.replace(beam=2, alpha=0.0, max_new_tokens=20)
    targets = s2t.tokenize_targets(refs)
    scored = score_requests(s2t, s, [ScoreRequest(i, [t]) for i, t in zip(src, targets, strict=True)])
    for clip_ids, t, (sc,) in zip(src, targets, scored, strict=True):
        feats = s2t._features([clip_ids])
        labels = torch.tensor([t + [s2t.end_id]])
        with torch.no_grad():  # the model shifts the labels right behind its decoder start token itself
            loss = s2t.model(**feats, labels=labels).loss
        assert sc.logprob_sum == pytest.approx(-float(loss) * (len(t) + 1), abs=1e-4)


def test_whisper_targets_get_the_leading_space_the_model_writes(tmp_path, clips):
    """A tokenizer with space-prefixed words (a merge of the space symbol with "a"): the reference "ab" is
    scored as " ab" (the space-prefixed token first, as generate writes it), "xb" stays as written (a
    lone space first is what begin-suppress forbids), text that starts with a space keeps it."""
    from tinyspeech import make_whisper_dir

    folder = make_whisper_dir(tmp_path / "merges", merges=[("Ġ", "a")])
    m = load_model(str(folder))
    ga = m.tokenizer.convert_tokens_to_ids("Ġa")
    ab, xb, spaced = m.tokenize_targets(["ab", "xb", " ab"])
    assert ab == [ga, ord("b")] and spaced == ab
    assert xb == [ord("x"), ord("b")]
    assert m.tokenize_targets([m.detokenize(ab)]) == [ab]  # decoded text round-trips to the same ids
    s = m.default_settings.replace(beam=2, max_new_tokens=8)
    src = m.tokenize_sources(clips[:1])
    first = score_requests(m, s, [ScoreRequest(src[0], [ab, [ord(" "), ord("a"), ord("b")]])])[0]
    assert first[0].blocked_rule is None and first[1].blocked_rule == "suppressed first token"


def test_a_prompt_from_forced_decoder_ids_is_the_one_generate_uses(tmp_path, clips):
    """Older checkpoints give language and task as forced_decoder_ids ([[1, <|de|>], [2, <|translate|>]]): the
    prompt follows them, and generate (told that language and task) decodes from the same prompt."""
    from tinyspeech import make_whisper_dir

    base = load_model(str(make_whisper_dir(tmp_path / "probe")))
    de, tr = (base.tokenizer.convert_tokens_to_ids(t) for t in ("<|de|>", "<|translate|>"))
    m = load_model(str(make_whisper_dir(tmp_path / "forced", language=None, forced_decoder_ids=[[1, de], [2, tr]])))
    assert m.token_strings(m.prompt_ids) == ["<|startoftranscript|>", "<|de|>", "<|translate|>", "<|notimestamps|>"]
    s = m.default_settings.replace(beam=2, alpha=1.0, max_new_tokens=8)
    src = m.tokenize_sources(clips[:3])
    gen = m.generate(s, src)
    scored = score_requests(m, s, [ScoreRequest(i, [g.ids], [not g.finished]) for i, g in zip(src, gen, strict=True)])
    assert [t[0].score for t in scored] == pytest.approx([g.score for g in gen], abs=1e-4)
