"""Small seeded models for the decoding tests.

- `make_marian`: a random Marian-architecture transformers model (d_model 32, one layer,
  vocabulary 48) wrapped in triage's TransformersModel, with a word-level tokenizer built
  in memory. Larger-than-default embedding weights make the output depend on the source,
  and an end-token bias makes some outputs end early while others run to the length limit.
- `TableModel`: a model whose whole output space can be enumerated: 5 ids (pad, end, start,
  "a", "b"), next-token log-probs from a fixed seeded table keyed by (source, prefix).
"""

from __future__ import annotations

import hashlib
import zlib
from collections.abc import Sequence

import torch

MARIAN_VOCAB = 48
PAD, END = 0, 1


def make_marian(seed: int = 0, *, d_model: int = 32, layers: int = 1, vocab: int = MARIAN_VOCAB,
                embed_std: float = 3.0, end_bias: float = 1.0, init_std: float = 0.1):
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import MarianConfig, MarianMTModel, PreTrainedTokenizerFast

    from triage.hf_backend import TransformersModel

    torch.manual_seed(seed)
    cfg = MarianConfig(
        vocab_size=vocab, d_model=d_model, encoder_layers=layers, decoder_layers=layers,
        encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=2 * d_model,
        decoder_ffn_dim=2 * d_model, max_position_embeddings=64, pad_token_id=PAD, eos_token_id=END,
        decoder_start_token_id=PAD, forced_eos_token_id=None, init_std=init_std,
        share_encoder_decoder_embeddings=False, tie_word_embeddings=False,
    )
    model = MarianMTModel(cfg).eval()
    with torch.no_grad():
        model.model.encoder.embed_tokens.weight.normal_(0, embed_std)
        model.model.decoder.embed_tokens.weight.normal_(0, embed_std)
        model.final_logits_bias[0, END] += end_bias
    words = {"<pad>": PAD, "</s>": END, "<unk>": 2, **{f"w{i}": i for i in range(3, vocab)}}
    tok = Tokenizer(models.WordLevel(words, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    hf_tok = PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="<unk>", pad_token="<pad>", eos_token="</s>")
    return TransformersModel(model, hf_tok)


def random_sources(n: int, seed: int = 1, vocab: int = MARIAN_VOCAB, min_len: int = 3, max_len: int = 8):
    g = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(n):
        k = int(torch.randint(min_len, max_len + 1, (1,), generator=g))
        out.append(torch.randint(3, vocab, (k,), generator=g).tolist() + [END])
    return out


class TableModel:
    """SequenceModel with 5 ids: 0 pad, 1 end, 2 start, 3 "a", 4 "b".

    Next-token log-probs depend on (source, prefix) through a seeded generator; pad and start
    are never produced (log-prob minus infinity), so the outputs are strings over a, b (and
    the end token), few enough to enumerate.
    """

    start_id = 2
    end_id = 1
    pad_id = 0
    vocab_size = 5
    unk_id = None
    max_source_tokens = None
    max_target_tokens = None
    WORDS = {"a": 3, "b": 4}

    def __init__(self, seed: int = 0, scale: float = 1.5):
        self.seed = seed
        self.scale = scale
        self._rows: dict[tuple, torch.Tensor] = {}

    # text <-> ids
    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        return [[self.WORDS[w] for w in t.split()] + [self.end_id] for t in texts]

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        return [[self.WORDS[w] for w in t.split()] for t in texts]

    def detokenize(self, ids: Sequence[int]) -> str:
        names = {v: k for k, v in self.WORDS.items()}
        return " ".join(names[i] for i in ids if i in names)

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        names = {0: "<pad>", 1: "</s>", 2: "<s>", 3: "a", 4: "b"}
        return [names[int(i)] for i in ids]

    def fingerprint(self) -> str:
        return hashlib.sha256(f"table:{self.seed}:{self.scale}".encode()).hexdigest()

    # tensors
    def encode(self, sources: Sequence[Sequence[int]]):
        return [tuple(int(t) for t in s) for s in sources]

    def select(self, state, cache, index: torch.Tensor):
        return [state[int(i)] for i in index], cache

    def row(self, source: tuple[int, ...], prefix: tuple[int, ...]) -> torch.Tensor:
        if (source, prefix) not in self._rows:
            g = torch.Generator().manual_seed(zlib.crc32(repr((self.seed, source, prefix)).encode()))
            logits = torch.randn(self.vocab_size, generator=g) * self.scale
            logits[self.pad_id] = float("-inf")
            logits[self.start_id] = float("-inf")
            self._rows[(source, prefix)] = torch.log_softmax(logits, dim=-1)
        return self._rows[(source, prefix)]

    def next_logprobs(self, state, prefixes: torch.Tensor, cache=None):
        rows = [self.row(state[i], tuple(prefixes[i].tolist())) for i in range(prefixes.shape[0])]
        return torch.stack(rows), None
