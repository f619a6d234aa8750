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
- ``state`` is whatever ``encode`` returns; it holds one entry per batch row. ``select``
  picks rows of it (and of the cache) by index: beam search uses it to repeat a source per
  beam and to reorder beams after each step.

Optional capabilities
---------------------
Everything beyond ``SequenceModel`` is an optional capability, each its own small protocol
below. A model offers one by having its members; triage asks which ones a model has in one
place only, ``capabilities(model)``, and falls back to the plain interface (same numbers,
slower or plainer) for every capability a model lacks. A new model family plugs in by
implementing the protocols that fit it; nothing else in triage looks at a model's type or
probes its attributes.

==========================  ===============================================================
``BatchedForcedScoring``    ``forced_logprobs``: teacher-forced log-probs at every position
                            in one pass (else: step through ``next_logprobs``)
``TargetLogprobScoring``    ``forced_target_logprobs``: only the target tokens' log-probs
                            (used when no generation rule applies)
``PositionScoring``         ``encode_grouped`` + ``score_positions``: log-probs at chosen
                            positions only (prefix-tree scoring, no generation rule)
``OwnGenerationRules``      ``logits_processors``: the rules as the model's own decoder
                            builds them (else: built from the settings with the same classes)
``OwnDecoder``              ``decodes`` + ``generate``: decode with the model's own decoder
                            where it expresses the objective (else: triage's beam search)
``DefaultSettings``         ``default_settings``: the DecoderSettings the outputs were decoded
                            with (else: greedy, length limit ``max_target_tokens`` or 19)
``Described``               ``describe()``: what the report says about the model (path,
                            architecture, parameters, tokenizer, vocabulary size)
``AudioSources``            sources are audio files (a speech model): ``sampling_rate``,
                            ``max_audio_seconds``, ``use_audio_folder``, ``audio_problem``,
                            ``audio_seconds`` (else: sources are text)
==========================  ===============================================================
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields
from typing import Any, Protocol, runtime_checkable

import torch

from triage.settings import DecoderSettings


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


# ---------------------------------------------------------------------------------- capabilities
@runtime_checkable
class BatchedForcedScoring(Protocol):
    def forced_logprobs(self, state: Any, decoder_inputs: torch.Tensor) -> torch.Tensor:
        """Teacher-forced log-probs [B, T, V] at every position of `decoder_inputs` [B, T], one pass."""
        ...


@runtime_checkable
class TargetLogprobScoring(Protocol):
    def forced_target_logprobs(self, state: Any, decoder_inputs: torch.Tensor,
                               targets: torch.Tensor) -> torch.Tensor:
        """Log-prob [B, T] of targets[:, t] after decoder_inputs[:, :t+1] (teacher forcing)."""
        ...


@runtime_checkable
class PositionScoring(Protocol):
    def encode_grouped(self, sources: Sequence[Sequence[int]]) -> Any:
        """``encode`` (same state layout), free to batch internally by length."""
        ...

    def score_positions(self, state: Any, rows: torch.Tensor, decoder_inputs: torch.Tensor,
                        picks: torch.Tensor, labels: torch.Tensor,
                        lengths: Sequence[int] | None = None) -> torch.Tensor:
        """Teacher-forced log-probs [M, K] of `labels` [M, K] at flat positions `picks` [M]
        (r * T + t) of `decoder_inputs` [R, T] run against encoder rows `rows` [R] of `state`;
        `lengths`: real tokens per run."""
        ...


@runtime_checkable
class OwnGenerationRules(Protocol):
    def logits_processors(self, settings: DecoderSettings, source_ids: torch.Tensor | None) -> Any:
        """The generation rules of `settings` for sources [B, S], as the model's own decoder builds
        them: a transformers LogitsProcessorList (empty when no rule applies)."""
        ...


@dataclass
class Generated:
    """One output of a model's own decoder."""

    ids: list[int]      # target ids, without start and end token
    score: float        # the objective the decoder maximized
    finished: bool      # ended with the end token (False: stopped at the length limit)


@runtime_checkable
class OwnDecoder(Protocol):
    def decodes(self, settings: DecoderSettings) -> bool:
        """Whether the model's own decoder can decode with exactly this objective."""
        ...

    def generate(self, settings: DecoderSettings, sources: Sequence[Sequence[int]], *, batch_size: int = 16,
                 progress: Callable[[int], None] | None = None) -> list[Generated]:
        """Decode every source with the model's own decoder; results in input order."""
        ...


@runtime_checkable
class DefaultSettings(Protocol):
    #: the decoder settings the outputs were decoded with (triage's flags override them)
    default_settings: DecoderSettings


@runtime_checkable
class Described(Protocol):
    def describe(self) -> dict[str, Any]:
        """What the report says about the model, in this order where known: path, architecture,
        parameters, tokenizer, vocab."""
        ...


@runtime_checkable
class AudioSources(Protocol):
    """A model whose sources are audio files (paths relative to the dev-set file, or absolute)."""

    #: samples per second the model's feature extractor takes (files are resampled to it)
    sampling_rate: int
    #: longest clip the model reads, in seconds (None: no limit)
    max_audio_seconds: float | None

    def use_audio_folder(self, folder: Any) -> None:
        """Relative audio paths start in this folder (the dev-set file's; None: the current directory)."""
        ...

    def audio_problem(self, source: str) -> str | None:
        """Why the model cannot read this source's audio (missing, unreadable, empty, too long), or None."""
        ...

    def audio_seconds(self, source: str) -> float | None:
        """The clip's duration in seconds (None when it cannot be read)."""
        ...


@dataclass(frozen=True)
class Capabilities:
    """Which optional capabilities a model offers (see the module docstring)."""

    batched_forced_scoring: bool = False
    target_logprob_scoring: bool = False
    position_scoring: bool = False
    own_generation_rules: bool = False
    own_decoder: bool = False
    default_settings: bool = False
    described: bool = False
    audio_sources: bool = False

    def names(self) -> list[str]:
        return [f.name for f in fields(self) if getattr(self, f.name)]


#: each capability's field in Capabilities and its protocol
PROTOCOLS: dict[str, type] = {
    "batched_forced_scoring": BatchedForcedScoring,
    "target_logprob_scoring": TargetLogprobScoring,
    "position_scoring": PositionScoring,
    "own_generation_rules": OwnGenerationRules,
    "own_decoder": OwnDecoder,
    "default_settings": DefaultSettings,
    "described": Described,
    "audio_sources": AudioSources,
}


def capabilities(model: Any) -> Capabilities:
    """The optional capabilities `model` offers: the one place triage asks.

    A member must be there and, for a method, callable; ``default_settings`` must be a
    DecoderSettings.
    """
    has = {}
    for name, proto in PROTOCOLS.items():
        ok = isinstance(model, proto)
        if ok and proto is DefaultSettings:
            ok = isinstance(model.default_settings, DecoderSettings)
        elif ok:
            ok = all(callable(getattr(model, m)) for m in _methods(proto))
        has[name] = ok
    return Capabilities(**has)


def _methods(proto: type) -> list[str]:
    return [m for m in vars(proto) if not m.startswith("_") and callable(vars(proto)[m])]


def forced_logprobs(model: SequenceModel, state: Any, decoder_inputs: torch.Tensor) -> torch.Tensor:
    """Teacher-forced log-probs [B, T, V] at every position of `decoder_inputs` [B, T].

    Uses the model's own batched method when it has one (``forced_logprobs``), else steps
    through ``next_logprobs`` with its cache: slower, same numbers.
    """
    if capabilities(model).batched_forced_scoring:
        return model.forced_logprobs(state, decoder_inputs)
    steps = []
    cache = None
    for t in range(decoder_inputs.shape[1]):
        lp, cache = model.next_logprobs(state, decoder_inputs[:, : t + 1], cache)
        steps.append(lp)
    return torch.stack(steps, dim=1)
