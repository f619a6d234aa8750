"""A speech-model run end to end, with nothing downloaded and nobody recorded.

    python examples/speech_demo.py            # or: make demo-speech

It builds, under build/speech_demo/:

- model/     a tiny Whisper checkpoint with seeded RANDOM weights (untrained: its transcripts are
             noise), a byte-level tokenizer built offline and a feature extractor with a 2-second window;
- clips/     synthesized tones and noise (8, 16 and 44.1 kHz, mono and stereo), one per row;
- dev.tsv    source = the clip's path (relative to dev.tsv), the decoded output, and a reference: for
             even rows the model's own 4-beam decode (which the model prefers: the greedy output misses
             it, a search-side row), for odd rows an invented announcement of the demo's fictional
             operator "Lakeside Valley Lines" (which the model does not prefer: a model-side row);

then runs ``triage run`` on it with greedy settings, WER and basic normalization, writing
reports/demo-speech/. The verdicts show the mechanics (audio in, prompt hidden, WER, both kinds of
rows), not a finding about any real model.
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path

import numpy as np
import torch

ROOT = Path(__file__).resolve().parent.parent
BUILD = ROOT / "build" / "speech_demo"
SPECIALS = ["<|endoftext|>", "<|startoftranscript|>", "<|en|>", "<|transcribe|>", "<|notimestamps|>"]
NOTICES = ["platform two for the harbour line", "the eight ten to north quay is delayed",
           "please mind the gap", "next stop lakeside", "change here for the valley line",
           "this train terminates at elm park"]
RATES = (8000, 16000, 44100)


def byte_symbols() -> list[str]:
    """The byte-level alphabet (each byte as a printable character; the GPT-2 convention, from memory)."""
    bs = list(range(ord("!"), ord("~") + 1)) + list(range(ord("¡"), ord("¬") + 1)) + list(range(ord("®"), ord("ÿ") + 1))
    cs, n = bs[:], 0
    for b in range(256):
        if b not in bs:
            bs.append(b)
            cs.append(256 + n)
            n += 1
    table = dict(zip(bs, cs, strict=True))
    return [chr(table[b]) for b in range(256)]


def build_model(folder: Path) -> None:
    from transformers import (
        WhisperConfig,
        WhisperFeatureExtractor,
        WhisperForConditionalGeneration,
        WhisperTokenizer,
    )

    tok = WhisperTokenizer(vocab={s: i for i, s in enumerate(byte_symbols())}, merges=[])
    tok.add_special_tokens({"additional_special_tokens": SPECIALS[1:]})
    ids = {s: tok.convert_tokens_to_ids(s) for s in SPECIALS}
    fe = WhisperFeatureExtractor(feature_size=80, sampling_rate=16000, hop_length=160, chunk_length=2, n_fft=400)
    torch.manual_seed(7)
    eot = ids["<|endoftext|>"]
    cfg = WhisperConfig(vocab_size=len(tok), num_mel_bins=80, d_model=32, encoder_layers=1, decoder_layers=1,
                        encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=64, decoder_ffn_dim=64,
                        max_source_positions=fe.nb_max_frames // 2, max_target_positions=64, pad_token_id=eot,
                        bos_token_id=eot, eos_token_id=eot, decoder_start_token_id=ids["<|startoftranscript|>"],
                        init_std=0.2)
    model = WhisperForConditionalGeneration(cfg).eval()
    gc = model.generation_config
    gc.decoder_start_token_id, gc.eos_token_id, gc.pad_token_id = ids["<|startoftranscript|>"], eot, eot
    gc.no_timestamps_token_id = ids["<|notimestamps|>"]
    gc.is_multilingual = True
    gc.lang_to_id = {"<|en|>": ids["<|en|>"]}
    gc.task_to_id = {"transcribe": ids["<|transcribe|>"]}
    gc.language = "en"
    # special tokens, control characters and non-ASCII bytes suppressed: outputs are plain ASCII text
    gc.suppress_tokens = [ids[s] for s in SPECIALS[1:]] + list(range(32)) + list(range(127, 256))
    gc.begin_suppress_tokens = [ord(" "), eot]
    gc.max_length = 64
    gc.max_new_tokens = 48  # the invented notices are up to 38 characters (one token each)
    gc._from_model_config = False
    model.save_pretrained(folder)
    tok.save_pretrained(folder)
    fe.save_pretrained(folder)


def write_clips(folder: Path, n: int) -> list[str]:
    import soundfile as sf

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(11)
    names = []
    for k in range(n):
        rate, channels, secs = RATES[k % 3], 1 + k % 2, 0.4 + 0.1 * (k % 12)
        t = np.arange(int(secs * rate)) / rate
        cols = [0.3 * np.sin(2 * np.pi * (150 + 37 * k) * (c + 1) * t) + 0.05 * rng.standard_normal(len(t))
                for c in range(channels)]
        name = f"notice{k:02d}.{'flac' if k % 4 == 0 else 'wav'}"
        sf.write(str(folder / name), np.stack(cols, axis=1).astype(np.float32), rate)
        names.append(name)
    return names


def main(rows: int = 24) -> int:
    sys.path.insert(0, str(ROOT))
    from triage.models.loading import load_model

    model_dir = BUILD / "model"
    model_dir.mkdir(parents=True, exist_ok=True)
    build_model(model_dir)
    names = write_clips(BUILD / "clips", rows)
    model = load_model(str(model_dir))
    model.use_audio_folder(BUILD)
    src = model.tokenize_sources([f"clips/{n}" for n in names])
    greedy = model.generate(model.default_settings.replace(beam=1), src)
    wide = model.generate(model.default_settings.replace(beam=4, alpha=1.0), src)
    with open(BUILD / "dev.tsv", "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f, delimiter="\t", lineterminator="\n")
        w.writerow(["id", "source", "reference", "output"])
        for k, name in enumerate(names):
            out = model.detokenize(greedy[k].ids)
            ref = model.detokenize(wide[k].ids) if k % 2 == 0 else NOTICES[k % len(NOTICES)]
            w.writerow([f"n{k:02d}", f"clips/{name}", ref if ref.strip() else NOTICES[0], out])
    from triage.cli import main as cli

    return cli(["run", "--model", str(model_dir), "--data", str(BUILD / "dev.tsv"), "--out",
                str(ROOT / "reports" / "demo-speech"), "--beam", "1", "--metric", "wer", "--normalize", "basic",
                "--no-cache"])


if __name__ == "__main__":
    sys.exit(main())
