"""A user's own model, outside transformers: a small GRU encoder-decoder with dot attention.

On top of the network's logits sits a copy bias: at target position t the source token t
(the end token past the source's end) gets `copy_bias` extra, so the random network
produces noisy copies of its input rather than nothing at all.

It implements triage's SequenceModel interface directly (triage/models/api.py) and is loaded
with ``--model python:toy_gru:make_model`` (tests/ on the Python path). Characters are the
tokens; weights are random and seeded, so outputs are nonsense but deterministic.
"""

from __future__ import annotations

import hashlib
import string
from collections.abc import Sequence

import torch
from torch import nn

SPECIALS = ["<pad>", "<s>", "</s>", "<unk>"]
CHARS = list(string.ascii_lowercase + string.digits + " .,:'-")


class ToyGRU(nn.Module):
    def __init__(self, seed: int = 0, hidden: int = 32, copy_bias: float = 3.0):
        super().__init__()
        self.itos = SPECIALS + CHARS
        self.stoi = {s: i for i, s in enumerate(self.itos)}
        self.pad_id, self.start_id, self.end_id, self.unk_id = 0, 1, 2, 3
        self.vocab_size = len(self.itos)
        self.max_source_tokens = 256
        self.max_target_tokens = 256
        self.seed = seed
        torch.manual_seed(seed)
        self.embed_src = nn.Embedding(self.vocab_size, hidden, padding_idx=0)
        self.embed_tgt = nn.Embedding(self.vocab_size, hidden)
        self.encoder = nn.GRU(hidden, hidden, batch_first=True)
        self.decoder = nn.GRUCell(2 * hidden, hidden)
        self.out = nn.Linear(2 * hidden, self.vocab_size)
        self.copy_bias = copy_bias
        self.eval()

    # ------------------------------------------------------------ text <-> ids
    def _ids(self, text: str) -> list[int]:
        return [self.stoi.get(c, self.unk_id) for c in text.lower()]

    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        return [self._ids(t) + [self.end_id] for t in texts]

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        return [self._ids(t) for t in texts]

    def detokenize(self, ids: Sequence[int]) -> str:
        return "".join(self.itos[i] for i in ids if i >= len(SPECIALS))

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        return [self.itos[int(i)] for i in ids]

    def fingerprint(self) -> str:
        h = hashlib.sha256(b"toy_gru")
        for k, v in sorted(self.state_dict().items()):
            h.update(k.encode())
            h.update(v.detach().contiguous().numpy().tobytes())
        return h.hexdigest()

    # ------------------------------------------------------------ tensors
    @torch.inference_mode()
    def encode(self, sources: Sequence[Sequence[int]]):
        width = max(len(s) for s in sources)
        ids = torch.zeros((len(sources), width), dtype=torch.long)
        for i, s in enumerate(sources):
            ids[i, : len(s)] = torch.tensor(list(s), dtype=torch.long)
        mask = ids != self.pad_id
        memory, _ = self.encoder(self.embed_src(ids))
        lengths = mask.sum(1)
        first = memory[torch.arange(len(sources)), lengths - 1]  # state after the last real token
        return {"memory": memory, "mask": mask, "first": first, "ids": ids, "lengths": lengths}

    def select(self, state, cache, index: torch.Tensor):
        state = {k: v.index_select(0, index) for k, v in state.items()}
        if cache is not None:
            cache = cache.index_select(0, index)
        return state, cache

    def _step(self, state, h: torch.Tensor, token: torch.Tensor, pos: torch.Tensor):
        """Log-probs of target position `pos` [B] after `token` [B]; returns them and the new hidden state."""
        scores = torch.einsum("bsh,bh->bs", state["memory"], h).masked_fill(~state["mask"], float("-inf"))
        context = torch.einsum("bs,bsh->bh", torch.softmax(scores, dim=-1), state["memory"])
        h = self.decoder(torch.cat([self.embed_tgt(token), context], dim=-1), h)
        logits = self.out(torch.cat([h, context], dim=-1))
        rows = torch.arange(len(pos))
        inside = pos < state["lengths"] - 1  # the source's own end token is not copied
        copied = torch.where(inside, state["ids"][rows, pos.clamp(max=state["ids"].shape[1] - 1)],
                             torch.full_like(pos, self.end_id))
        logits[rows, copied] += self.copy_bias
        return torch.log_softmax(logits.float(), dim=-1), h

    @torch.inference_mode()
    def next_logprobs(self, state, prefixes: torch.Tensor, cache=None):
        rows = prefixes.shape[0]
        if cache is None:
            h = state["first"]
            for t in range(prefixes.shape[1]):
                lp, h = self._step(state, h, prefixes[:, t], torch.full((rows,), t, dtype=torch.long))
        else:  # the cache is the hidden state after prefixes[:, :-1]
            lp, h = self._step(state, cache, prefixes[:, -1], torch.full((rows,), prefixes.shape[1] - 1, dtype=torch.long))
        return lp, h


def make_model() -> ToyGRU:
    return ToyGRU(seed=0)
