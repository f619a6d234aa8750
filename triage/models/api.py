"""The small interface every sequence model offers to triage.

Scoring, decoding, sweeps and the report talk to a model only through this protocol, so a
transformers checkpoint and a user's own model (``--model python:package.module:factory``)
go through the same pipeline.

Conventions
-----------
- Token ids are plain ints. A *source* is the list of ids the encoder reads (special tokens
  included, as the model expects them). A *target* is the list of ids the decoder emits
  after the start token, WITHOUT the end token: triage appends ``end_id`` itself.
- ``next_logprobs`` returns natural-log probabilities over the whole vocabulary, float32,
  already log-softmax normalized (rules such as banned words are applied by triage on top).
- Optional ``default_settings``: the DecoderSettings your outputs were decoded with (beam,
  penalty, alpha, length limit). Without it triage assumes greedy search with a length limit of
  ``max_target_tokens`` (or transformers' default of 19 new tokens when that is None).
- ``state`` is whatever ``encode`` returns; it holds one entry per batch row. ``select``
  picks rows of it (and of the cache) by index: beam search uses it to repeat a source per
  beam and to reorder beams after each step.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Protocol, runtime_checkable

import torch


@runtime_checkable
class SequenceModel(Protocol):
    #: id the decoder starts from (not scored)
    start_id: int
    #: id that ends a target (scored: it is part of the objective)
    end_id: int
    #: id used to pad batches
    pad_id: int
    #: size of the log-prob vectors
    vocab_size: int
    #: id of the unknown token, or None if the tokenizer cannot produce one
    unk_id: int | None
    #: longest source / target (in tokens, end token included) the model can take; None = unbounded
    max_source_tokens: int | None
    max_target_tokens: int | None

    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]: ...

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]: ...

    def detokenize(self, ids: Sequence[int]) -> str: ...

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        """Readable pieces, one per id (for the per-token view)."""
        ...

    def fingerprint(self) -> str:
        """sha256 of what decides the model's scores (weights, tokenizer, config)."""
        ...

    def encode(self, sources: Sequence[Sequence[int]]) -> Any:
        """Encode a batch of sources; returns an opaque state with one row per source."""
        ...

    def select(self, state: Any, cache: Any, index: torch.Tensor) -> tuple[Any, Any]:
        """Rows `index` of state and cache (repeat for beams, reorder after a step)."""
        ...

    def next_logprobs(self, state: Any, prefixes: torch.Tensor, cache: Any = None) -> tuple[torch.Tensor, Any]:
        """Log-probs [B, V] of the next token after each prefix [B, t] (prefix[:, 0] = start_id).

        With a cache from the previous call, the model may read only prefixes[:, -1].
        """
        ...


def forced_logprobs(model: SequenceModel, state: Any, decoder_inputs: torch.Tensor) -> torch.Tensor:
    """Teacher-forced log-probs [B, T, V] at every position of `decoder_inputs` [B, T].

    Uses the model's own batched method when it has one (``forced_logprobs``), else steps
    through ``next_logprobs`` with its cache: slower, same numbers.
    """
    own = getattr(model, "forced_logprobs", None)
    if own is not None:
        return own(state, decoder_inputs)
    steps = []
    cache = None
    for t in range(decoder_inputs.shape[1]):
        lp, cache = model.next_logprobs(state, decoder_inputs[:, : t + 1], cache)
        steps.append(lp)
    return torch.stack(steps, dim=1)
