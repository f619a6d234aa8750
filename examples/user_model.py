"""A model of your own in triage: a character-level GRU encoder-decoder with attention.

triage talks to any model through one small interface, ``SequenceModel`` (triage/models/api.py).
This file shows the two parts you write to use a model that is not a transformers checkpoint:

1. the network itself, ``CharGRU``: plain torch, it knows nothing about triage;
2. an adapter, ``UserModel``, that wraps the network and its vocabulary and offers the
   interface: text <-> ids, ``encode``, ``select`` and ``next_logprobs``.

``make_model()`` is the factory triage calls, so from this folder:

    triage run --model python:user_model:make_model --data devset.tsv --out run

The weights are random (seeded) unless ``USER_MODEL_WEIGHTS`` names a safetensors file
holding a ``CharGRU`` state dict (``safetensors.torch.save_file(net.state_dict(), path)``):
random weights give nonsense outputs, but every number triage reports is still the model's own.
"""

from __future__ import annotations

import hashlib
import os
import string
from collections.abc import Sequence

import torch
from torch import nn

from triage.settings import DecoderSettings

PAD, START, END, UNK = 0, 1, 2, 3
SPECIALS = ["<pad>", "<s>", "</s>", "<unk>"]
CHARS = string.ascii_lowercase + string.digits + " .,:;'-?!"


# --------------------------------------------------------------------------- 1. the network
class CharGRU(nn.Module):
    """GRU encoder, GRU decoder with dot-product attention over the encoder states."""

    def __init__(self, vocab_size: int, hidden: int = 32):
        super().__init__()
        self.embed = nn.Embedding(vocab_size, hidden, padding_idx=PAD)
        self.encoder = nn.GRU(hidden, hidden, batch_first=True)
        self.decoder = nn.GRUCell(2 * hidden, hidden)
        self.project = nn.Linear(2 * hidden, vocab_size)

    def encode(self, src: torch.Tensor, mask: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Encoder states [B, S, H] and the first decoder state [B, H] (the last real source position)."""
        memory, _ = self.encoder(self.embed(src))
        last = mask.sum(1) - 1
        return memory, memory[torch.arange(src.shape[0]), last]

    def step(self, memory, mask, h, token) -> tuple[torch.Tensor, torch.Tensor]:
        """Logits [B, V] of the next token after `token` [B], and the new decoder state."""
        attn = torch.einsum("bsh,bh->bs", memory, h).masked_fill(~mask, float("-inf"))
        context = torch.einsum("bs,bsh->bh", torch.softmax(attn, dim=-1), memory)
        h = self.decoder(torch.cat([self.embed(token), context], dim=-1), h)
        return self.project(torch.cat([h, context], dim=-1)), h


# --------------------------------------------------------------------------- 2. the adapter
class UserModel:
    """triage's SequenceModel interface around a CharGRU and its character vocabulary."""

    # ids and limits triage reads (all required)
    start_id, end_id, pad_id, unk_id = START, END, PAD, UNK
    max_source_tokens = 512
    max_target_tokens = 512

    def __init__(self, net: CharGRU, itos: list[str]):
        self.net = net.eval()
        self.itos = itos
        self.stoi = {s: i for i, s in enumerate(itos)}
        self.vocab_size = len(itos)
        # optional (the DefaultSettings capability): the decoder settings the outputs were made with
        # (triage's flags override them); without it triage assumes greedy search and a length
        # limit of max_target_tokens
        self.default_settings = DecoderSettings(
            beam=4, penalty="power", alpha=1.0, max_new_tokens=64,
            eos_token_ids=(END,), decoder_start_token_id=START, pad_token_id=PAD,
            origin="examples/user_model.py")

    # -- text <-> ids. Sources carry the end token; targets do not (triage appends it).
    def _ids(self, text: str) -> list[int]:
        return [self.stoi.get(c, UNK) for c in text.lower()]

    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        return [self._ids(t) + [END] for t in texts]

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        return [self._ids(t) for t in texts]

    def detokenize(self, ids: Sequence[int]) -> str:
        return "".join(self.itos[i] for i in ids if i >= len(SPECIALS))

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        return [self.itos[int(i)] for i in ids]

    def fingerprint(self) -> str:
        """Changes whenever a weight or the vocabulary changes (triage keys its score cache on it)."""
        h = hashlib.sha256("\n".join(self.itos).encode())
        for name, value in sorted(self.net.state_dict().items()):
            h.update(name.encode())
            h.update(value.detach().contiguous().numpy().tobytes())
        return h.hexdigest()

    # -- tensors. The state is a dict of tensors with one row per source; the cache is the
    # decoder's hidden state after all but the last prefix token.
    @torch.inference_mode()
    def encode(self, sources: Sequence[Sequence[int]]) -> dict[str, torch.Tensor]:
        src = torch.full((len(sources), max(len(s) for s in sources)), PAD, dtype=torch.long)
        for i, s in enumerate(sources):
            src[i, : len(s)] = torch.tensor(list(s), dtype=torch.long)
        mask = src != PAD
        memory, h0 = self.net.encode(src, mask)
        return {"memory": memory, "mask": mask, "h0": h0}

    def select(self, state, cache, index: torch.Tensor):
        state = {k: v.index_select(0, index) for k, v in state.items()}
        return state, None if cache is None else cache.index_select(0, index)

    @torch.inference_mode()
    def next_logprobs(self, state, prefixes: torch.Tensor, cache=None):
        """Log-probs [B, V] after each prefix [B, t] (prefixes[:, 0] is the start token)."""
        if cache is None:  # run the decoder over the whole prefix
            h, todo = state["h0"], prefixes
        else:              # the cache already holds the state after prefixes[:, :-1]
            h, todo = cache, prefixes[:, -1:]
        for t in range(todo.shape[1]):
            logits, h = self.net.step(state["memory"], state["mask"], h, todo[:, t])
        return torch.log_softmax(logits.float(), dim=-1), h

    # -- optional (the BatchedForcedScoring capability): a faster teacher-forced pass. triage
    # uses it to score references and outputs when present; without it, it steps through
    # next_logprobs (same numbers). The other optional capabilities are in triage/models/api.py.
    @torch.inference_mode()
    def forced_logprobs(self, state, decoder_inputs: torch.Tensor) -> torch.Tensor:
        h, steps = state["h0"], []
        for t in range(decoder_inputs.shape[1]):
            logits, h = self.net.step(state["memory"], state["mask"], h, decoder_inputs[:, t])
            steps.append(torch.log_softmax(logits.float(), dim=-1))
        return torch.stack(steps, dim=1)


# --------------------------------------------------------------------------- the factory
def make_model(seed: int = 0, hidden: int = 32) -> UserModel:
    """What ``--model python:user_model:make_model`` calls (with no arguments)."""
    itos = SPECIALS + list(CHARS)
    torch.manual_seed(seed)
    net = CharGRU(len(itos), hidden)
    weights = os.environ.get("USER_MODEL_WEIGHTS")
    if weights:
        from safetensors.torch import load_file

        net.load_state_dict(load_file(weights))
    return UserModel(net, itos)
