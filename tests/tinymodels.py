"""Small seeded models the tests build themselves (random weights, no download)."""

from __future__ import annotations

from pathlib import Path

import torch

WORDS = ("the a train bus to from platform one two three four five six seven eight nine ten "
         "late early at departs arrives is now calling stop station north south east west").split()


def make_tokenizer():
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import PreTrainedTokenizerFast

    vocab = {"<pad>": 0, "</s>": 1, "<unk>": 2}
    for w in WORDS:
        vocab.setdefault(w, len(vocab))
    tok = Tokenizer(models.WordLevel(vocab=vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    from tokenizers import processors

    tok.post_processor = processors.TemplateProcessing(single="$A </s>", special_tokens=[("</s>", 1)])
    from tokenizers import decoders

    tok.decoder = decoders.WordPiece(prefix="##")  # joins word pieces with spaces
    return PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>")


def make_marian(seed: int = 0, d_model: int = 32, layers: int = 1, vocab_size: int | None = None,
                max_positions: int = 64, init_std: float = 0.2, eos_bias: float = 2.0, **gen):
    """A random Marian-architecture model whose outputs end at varied lengths (so beams disagree)."""
    from transformers import MarianConfig, MarianMTModel

    tok = make_tokenizer()
    torch.manual_seed(seed)
    cfg = MarianConfig(
        vocab_size=vocab_size or len(tok), d_model=d_model, encoder_layers=layers, decoder_layers=layers,
        encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=2 * d_model,
        decoder_ffn_dim=2 * d_model, max_position_embeddings=max_positions, pad_token_id=0, eos_token_id=1,
        decoder_start_token_id=0, forced_eos_token_id=None, init_std=init_std,
    )
    model = MarianMTModel(cfg).eval()
    with torch.no_grad():
        model.final_logits_bias[0, 1] = eos_bias
        # never generate <pad> or <unk>: their text vanishes when detokenized (real checkpoints ban pad too)
        model.final_logits_bias[0, 0] = -1e4
        model.final_logits_bias[0, 2] = -1e4
    model.generation_config.forced_eos_token_id = None
    model.generation_config.bad_words_ids = None
    for k, v in gen.items():
        setattr(model.generation_config, k, v)
    return model, tok


def save_marian(path: Path, **kw) -> Path:
    model, tok = make_marian(**kw)
    path.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(path)
    tok.save_pretrained(path)
    return path


def sentences(n: int, seed: int = 0, lo: int = 2, hi: int = 12) -> list[str]:
    g = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(n):
        k = int(torch.randint(lo, hi + 1, (1,), generator=g))
        idx = torch.randint(0, len(WORDS), (k,), generator=g).tolist()
        out.append(" ".join(WORDS[i] for i in idx))
    return out
