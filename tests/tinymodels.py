"""Small seeded models the tests build themselves (random weights, no download).

- `make_tokenizer`: a word-level tokenizer built in memory (<pad> 0, </s> 1, <unk> 2, then words).
- `make_marian` / `save_marian`: a random Marian-architecture transformers model over the
  railway words in WORDS, returned with its tokenizer (or saved as a checkpoint folder);
  texts for it come from `sentences`.
- `make_wrapped_marian`: another random Marian (vocabulary 48 numbered words, larger embedding
  weights) wrapped in triage's TransformersModel, for the search tests; id sources for it come
  from `random_sources`.
- `TableModel`: a model whose whole output space can be enumerated.
"""

from __future__ import annotations

import hashlib
import zlib
from collections.abc import Sequence
from pathlib import Path

import torch

PAD, END, UNK = 0, 1, 2
WORDS = ("the a train bus to from platform one two three four five six seven eight nine ten "
         "late early at departs arrives is now calling stop station north south east west").split()
WRAPPED_VOCAB = 48


def make_tokenizer(words: Sequence[str] = WORDS, *, add_end: bool = True):
    """A word-level PreTrainedTokenizerFast: <pad> 0, </s> 1, <unk> 2, then `words` in order.

    Texts split on whitespace. With add_end (the default) every encoded text ends with </s> and
    decoding joins words with spaces (WordPiece decoder); without it the tokenizer adds no token
    and has no decoder of its own.
    """
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors
    from transformers import PreTrainedTokenizerFast

    vocab = {"<pad>": PAD, "</s>": END, "<unk>": UNK}
    for w in words:
        vocab.setdefault(w, len(vocab))
    tok = Tokenizer(models.WordLevel(vocab=vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    if add_end:
        tok.post_processor = processors.TemplateProcessing(single="$A </s>", special_tokens=[("</s>", END)])
        tok.decoder = decoders.WordPiece(prefix="##")
    return PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>")


def _seeded_marian(seed: int, vocab_size: int, d_model: int, layers: int, max_positions: int, init_std: float,
                   **config):
    """A MarianMTModel in eval mode, 2 heads, ffn 2 * d_model, weights drawn after torch.manual_seed(seed)."""
    from transformers import MarianConfig, MarianMTModel

    torch.manual_seed(seed)
    cfg = MarianConfig(
        vocab_size=vocab_size, d_model=d_model, encoder_layers=layers, decoder_layers=layers,
        encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=2 * d_model,
        decoder_ffn_dim=2 * d_model, max_position_embeddings=max_positions, pad_token_id=PAD, eos_token_id=END,
        decoder_start_token_id=PAD, forced_eos_token_id=None, init_std=init_std, **config,
    )
    return MarianMTModel(cfg).eval()


def make_marian(seed: int = 0, d_model: int = 32, layers: int = 1, vocab_size: int | None = None,
                max_positions: int = 64, init_std: float = 0.2, eos_bias: float = 2.0, **gen):
    """(model, tokenizer): a random Marian over WORDS whose outputs end at varied lengths (so beams disagree).

    The end token's logit bias is eos_bias; <pad> and <unk> are never generated. Extra keywords
    are set on the model's generation_config.
    """
    tok = make_tokenizer()
    model = _seeded_marian(seed, vocab_size or len(tok), d_model, layers, max_positions, init_std)
    with torch.no_grad():
        model.final_logits_bias[0, END] = eos_bias
        # never generate <pad> or <unk>: their text vanishes when detokenized (real checkpoints ban pad too)
        model.final_logits_bias[0, PAD] = -1e4
        model.final_logits_bias[0, UNK] = -1e4
    model.generation_config.forced_eos_token_id = None
    model.generation_config.bad_words_ids = None
    for k, v in gen.items():
        setattr(model.generation_config, k, v)
    return model, tok


def save_marian(path: Path, **kw) -> Path:
    """make_marian(**kw) saved (model and tokenizer) as a checkpoint folder at path."""
    model, tok = make_marian(**kw)
    path.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(path)
    tok.save_pretrained(path)
    return path


def sentences(n: int, seed: int = 0, lo: int = 2, hi: int = 12) -> list[str]:
    """n seeded texts of lo to hi words from WORDS."""
    g = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(n):
        k = int(torch.randint(lo, hi + 1, (1,), generator=g))
        idx = torch.randint(0, len(WORDS), (k,), generator=g).tolist()
        out.append(" ".join(WORDS[i] for i in idx))
    return out


def make_wrapped_marian(seed: int = 0, *, d_model: int = 32, layers: int = 1, vocab: int = WRAPPED_VOCAB,
                        embed_std: float = 3.0, end_bias: float = 1.0, init_std: float = 0.1):
    """A random Marian wrapped in triage's TransformersModel, vocabulary <pad> </s> <unk> w3 ... w47.

    Unshared embeddings redrawn with std embed_std make the output depend on the source, and
    end_bias added to the end token's logit makes some outputs end early while others run to the
    length limit. The tokenizer adds no end token (make_tokenizer with add_end=False).
    """
    from triage.models.transformers_backend import TransformersModel

    model = _seeded_marian(seed, vocab, d_model, layers, 64, init_std,
                           share_encoder_decoder_embeddings=False, tie_word_embeddings=False)
    with torch.no_grad():
        model.model.encoder.embed_tokens.weight.normal_(0, embed_std)
        model.model.decoder.embed_tokens.weight.normal_(0, embed_std)
        model.final_logits_bias[0, END] += end_bias
    tok = make_tokenizer([f"w{i}" for i in range(3, vocab)], add_end=False)
    return TransformersModel(model, tok)


def random_sources(n: int, seed: int = 1, vocab: int = WRAPPED_VOCAB, min_len: int = 3, max_len: int = 8):
    """n seeded source id lists: min_len to max_len ids from 3 .. vocab-1, then the end token."""
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
