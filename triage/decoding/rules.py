"""The decoder's generation rules as transformers logits processors.

transformers' beam search takes log_softmax of the raw float32 logits and then applies the
processors built from the generation config (forced tokens, minimum length, banned words,
n-gram blocking, repetition penalty). Teacher-forced scoring applies the very same list to
the very same log-probs, so a rule counts exactly as it did in decoding.

A model with its own rules (the OwnGenerationRules capability: a transformers checkpoint
returns the list its ``_get_logits_processor`` builds) gives the list itself; for any other
model it is built here from the same classes.
"""

from __future__ import annotations

from typing import Any

import torch

from triage.models.api import capabilities
from triage.settings import DecoderSettings

# processor class name -> the rule's plain name (used in `blocked` reasons)
RULE_NAMES = {
    "MinLengthLogitsProcessor": "minimum length",
    "MinNewTokensLengthLogitsProcessor": "minimum length",
    "NoRepeatNGramLogitsProcessor": "repeated n-gram",
    "EncoderNoRepeatNGramLogitsProcessor": "n-gram copied from the source",
    "NoBadWordsLogitsProcessor": "banned word",
    "SequenceBiasLogitsProcessor": "banned word",
    "ForcedBOSTokenLogitsProcessor": "forced first token",
    "ForcedEOSTokenLogitsProcessor": "length limit",
    "SuppressTokensLogitsProcessor": "suppressed token",
    "SuppressTokensAtBeginLogitsProcessor": "suppressed first token",
    "RepetitionPenaltyLogitsProcessor": "repetition penalty",
}


def rule_name(processor: Any) -> str:
    """The rule's plain name; a processor a backend wraps (``wrapped``, e.g. to show it the prompt)
    is named by the processor inside."""
    processor = getattr(processor, "wrapped", processor)
    return RULE_NAMES.get(type(processor).__name__, type(processor).__name__)


def build_processors(model: Any, settings: DecoderSettings, source_ids: torch.Tensor | None = None):
    """The logits processors the decoder applies at each step, for a batch of sources [B, S]."""
    if capabilities(model).own_generation_rules:
        return model.logits_processors(settings, source_ids)
    return _build_generic(model, settings, source_ids)


def _build_generic(model: Any, settings: DecoderSettings, source_ids: torch.Tensor | None):
    from transformers import LogitsProcessorList
    from transformers.generation import logits_process as lp

    eos = torch.tensor(list(settings.eos_token_ids) or [model.end_id])
    out = LogitsProcessorList()
    if settings.repetition_penalty != 1.0:
        out.append(lp.RepetitionPenaltyLogitsProcessor(settings.repetition_penalty))
    if settings.no_repeat_ngram_size > 0:
        out.append(lp.NoRepeatNGramLogitsProcessor(settings.no_repeat_ngram_size))
    if settings.encoder_no_repeat_ngram_size > 0 and source_ids is not None:
        out.append(lp.EncoderNoRepeatNGramLogitsProcessor(settings.encoder_no_repeat_ngram_size, source_ids))
    if settings.bad_words_ids:
        out.append(lp.NoBadWordsLogitsProcessor([list(w) for w in settings.bad_words_ids], eos))
    if settings.min_length > 0:
        out.append(lp.MinLengthLogitsProcessor(settings.min_length, eos))
    if settings.min_new_tokens:
        out.append(lp.MinNewTokensLengthLogitsProcessor(1, settings.min_new_tokens, eos))
    if settings.forced_bos_token_id is not None:
        out.append(lp.ForcedBOSTokenLogitsProcessor(settings.forced_bos_token_id))
    if settings.forced_eos_token_id is not None:
        out.append(lp.ForcedEOSTokenLogitsProcessor(settings.limit_new_tokens() + 1, settings.forced_eos_token_id))
    return out


def apply_rules(processors: Any, prefixes: torch.Tensor, logprobs: torch.Tensor) -> torch.Tensor:
    """Processed log-probs [B, V] for the next token after `prefixes` [B, t]."""
    if not processors:
        return logprobs
    return processors(prefixes, logprobs.clone())


def first_blocking_rule(processors: Any, prefixes: torch.Tensor, logprobs: torch.Tensor, token: int, row: int) -> str:
    """Name of the first rule that sets `token` to minus infinity for `row`.

    The rules run one by one over the whole batch (each row's result depends on that row only),
    since some read per-row data of the batch they were built for (source n-grams, prompts)."""
    scores = logprobs.clone()
    for proc in processors:
        scores = proc(prefixes, scores)
        if torch.isneginf(scores[row, token]):
            return rule_name(proc)
    return "decoding rule"
