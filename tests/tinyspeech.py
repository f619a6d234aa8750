"""Tiny seeded speech models and synthesized audio, built by the tests (no download, no recording).

- `make_whisper_dir(path, ...)`: a random Whisper checkpoint folder (model.safetensors, config, generation
  config with suppress tokens, begin-suppress tokens, language and task tokens), a byte-level
  WhisperTokenizer built offline and a WhisperFeatureExtractor whose window is `chunk_seconds`
  (the encoder's positions match it: frames / 2).
- `make_s2t_dir(path, ...)`: a random Speech2Text checkpoint folder (numpy filter-bank features, no
  torchaudio) with a word-level tokenizer over the railway words of tinymodels.
- `write_tone(path, seconds, rate, channels)`: a seeded tone plus noise written with soundfile.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

SPECIALS = ["<|endoftext|>", "<|startoftranscript|>", "<|en|>", "<|de|>", "<|transcribe|>", "<|translate|>",
            "<|nocaptions|>", "<|notimestamps|>"]


def _byte_symbols() -> list[str]:
    """The byte-level BPE alphabet (every byte as a printable character; common practice for GPT-2 style
    tokenizers, the mapping written from memory)."""
    bs = list(range(ord("!"), ord("~") + 1)) + list(range(ord("¡"), ord("¬") + 1)) + list(range(ord("®"), ord("ÿ") + 1))
    cs = bs[:]
    n = 0
    for b in range(256):
        if b not in bs:
            bs.append(b)
            cs.append(256 + n)
            n += 1
    table = dict(zip(bs, cs, strict=True))
    return [chr(table[b]) for b in range(256)]


def make_whisper_tokenizer(merges: list[tuple[str, str]] = ()):
    """Byte-level: every byte one token (ids 0-255 in byte order), plus one token per merge, then the specials."""
    from transformers import WhisperTokenizer

    vocab = {s: i for i, s in enumerate(_byte_symbols())}
    for a, b in merges:
        vocab[a + b] = len(vocab)
    tok = WhisperTokenizer(vocab=vocab, merges=list(merges))
    tok.add_special_tokens({"additional_special_tokens": SPECIALS[1:]})
    return tok


def make_whisper_dir(path: Path, *, seed: int = 0, chunk_seconds: int = 2, multilingual: bool = True,
                     d_model: int = 16, layers: int = 1, max_target_positions: int = 64, eos_bias: float = 3.0,
                     merges: list[tuple[str, str]] = (),
                     **gen) -> Path:
    """A random Whisper checkpoint in `path` (returned). Extra keywords go to the generation config."""
    from transformers import WhisperConfig, WhisperFeatureExtractor, WhisperForConditionalGeneration

    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    tok = make_whisper_tokenizer(merges)
    ids = {s: tok.convert_tokens_to_ids(s) for s in SPECIALS}
    fe = WhisperFeatureExtractor(feature_size=80, sampling_rate=16000, hop_length=160, chunk_length=chunk_seconds,
                                 n_fft=400)
    frames = int(fe.nb_max_frames)
    torch.manual_seed(seed)
    cfg = WhisperConfig(
        vocab_size=len(tok), num_mel_bins=80, d_model=d_model, encoder_layers=layers, decoder_layers=layers,
        encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=2 * d_model,
        decoder_ffn_dim=2 * d_model, max_source_positions=frames // 2, max_target_positions=max_target_positions,
        pad_token_id=ids["<|endoftext|>"], bos_token_id=ids["<|endoftext|>"], eos_token_id=ids["<|endoftext|>"],
        decoder_start_token_id=ids["<|startoftranscript|>"], init_std=0.2,
    )
    model = WhisperForConditionalGeneration(cfg).eval()
    _raise_end(model, ids["<|endoftext|>"], ids["<|startoftranscript|>"], frames, eos_bias)
    gc = model.generation_config
    gc.decoder_start_token_id = ids["<|startoftranscript|>"]
    gc.eos_token_id = ids["<|endoftext|>"]
    gc.pad_token_id = ids["<|endoftext|>"]
    gc.no_timestamps_token_id = ids["<|notimestamps|>"]
    gc.is_multilingual = multilingual
    if multilingual:
        gc.lang_to_id = {"<|en|>": ids["<|en|>"], "<|de|>": ids["<|de|>"]}
        gc.task_to_id = {"transcribe": ids["<|transcribe|>"], "translate": ids["<|translate|>"]}
        gc.language = "en"
    # every special token but the end is suppressed, as in released checkpoints, and so are "#", "$", control
    # characters and the bytes above ASCII (so that outputs are valid text that tokenizes back to the same ids);
    # the first token cannot be a space or the end
    gc.suppress_tokens = ([ids[s] for s in SPECIALS[1:]] + [ord("#"), ord("$")] + list(range(32))
                          + list(range(127, 256)))
    gc.begin_suppress_tokens = [tok.convert_tokens_to_ids("Ġ"), ids["<|endoftext|>"]]
    gc.max_length = max_target_positions
    for k, v in gen.items():
        setattr(gc, k, v)
    gc._from_model_config = False  # else loading rebuilds the generation config from config.json, dropping these
    model.save_pretrained(path)
    tok.save_pretrained(path)
    fe.save_pretrained(path)
    return path


def _raise_end(model, end: int, start: int, frames: int, strength: float, shape: tuple[int, int] = (80, 0),
               low: int = 0, high: int = 256) -> None:
    """Point the end token's (tied) embedding along the decoder's mean output state, so that random
    outputs end at varied lengths and beams disagree."""
    g = torch.Generator().manual_seed(1)
    with torch.no_grad():
        dims = (shape[0], frames) if shape[1] == 0 else (frames, shape[1])
        feats = torch.randn(4, *dims, generator=g)
        dec = torch.randint(low, high, (4, 12), generator=g)
        dec[:, 0] = start
        hidden = model.model(input_features=feats, decoder_input_ids=dec).last_hidden_state
        mean = hidden.reshape(-1, hidden.shape[-1]).mean(0)
        w = model.get_output_embeddings().weight
        w[end] = w[end] + strength * mean / mean.norm() * w.norm(dim=1).mean()


def make_s2t_dir(path: Path, *, seed: int = 0, eos_bias: float = 0.0, d_model: int = 16, **gen) -> Path:
    """A random Speech2Text checkpoint in `path` (returned): 20 filter-bank bins, 2 convolutions (4x
    subsampling), 200 encoder positions (8 s of audio), a word-level tokenizer (<pad> 0, </s> 1, <unk> 2)."""
    from tinymodels import make_tokenizer
    from transformers import (
        Speech2TextConfig,
        Speech2TextFeatureExtractor,
        Speech2TextForConditionalGeneration,
    )

    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    tok = make_tokenizer(add_end=False)
    fe = Speech2TextFeatureExtractor(feature_size=20, num_mel_bins=20, sampling_rate=16000)
    torch.manual_seed(seed)
    cfg = Speech2TextConfig(
        vocab_size=len(tok), d_model=d_model, encoder_layers=1, decoder_layers=1, encoder_attention_heads=2,
        decoder_attention_heads=2, encoder_ffn_dim=2 * d_model, decoder_ffn_dim=2 * d_model, max_source_positions=200,
        max_target_positions=64, num_conv_layers=2, conv_channels=16, input_feat_per_channel=20, input_channels=1,
        pad_token_id=0, eos_token_id=1, bos_token_id=1, decoder_start_token_id=1, init_std=0.2,
    )
    model = Speech2TextForConditionalGeneration(cfg).eval()
    if eos_bias:
        _raise_end(model, 1, 1, 100, eos_bias, shape=(0, 20), low=3, high=len(tok))
    gc = model.generation_config
    gc.bad_words_ids = [[0], [2]]  # never <pad> or <unk> (their text vanishes when detokenized)
    for k, v in gen.items():
        setattr(gc, k, v)
    gc._from_model_config = False
    model.save_pretrained(path)
    tok.save_pretrained(path)
    fe.save_pretrained(path)
    return path


def tone(seconds: float, rate: int, channels: int = 1, *, freq: float = 440.0, seed: int = 0) -> np.ndarray:
    """A seeded tone plus noise, [frames, channels] float32 in [-1, 1]."""
    n = int(round(seconds * rate))
    t = np.arange(n) / rate
    rng = np.random.default_rng(seed)
    cols = [0.4 * np.sin(2 * np.pi * freq * (c + 1) * t) + 0.05 * rng.standard_normal(n) for c in range(channels)]
    return np.stack(cols, axis=1).astype(np.float32) if n else np.zeros((0, channels), np.float32)


def write_tone(path: Path, seconds: float, rate: int = 16000, channels: int = 1, *, freq: float = 440.0,
               seed: int = 0, subtype: str | None = None) -> Path:
    import soundfile as sf

    path = Path(path)
    sf.write(str(path), tone(seconds, rate, channels, freq=freq, seed=seed), rate, subtype=subtype)
    return path
