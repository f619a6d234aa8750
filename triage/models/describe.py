"""What triage reads about a model beyond scoring: its decoder settings and its description.

Both go through the optional capabilities of triage.models.api (DefaultSettings, Described),
so a model family says these things by implementing the protocols, never by having
attributes triage happens to look for.
"""

from __future__ import annotations

from typing import Any

from triage.models.api import SequenceModel, capabilities
from triage.settings import DecoderSettings


def model_settings(model: SequenceModel, **overrides: Any) -> DecoderSettings:
    """The decoder's settings: the model's own (DefaultSettings), then the overrides (None: keep).

    A model without default settings is taken to decode greedily with a length limit of
    ``max_target_tokens`` new tokens (transformers' default of 19 when that is None).
    """
    changes = {k: v for k, v in overrides.items() if v is not None}
    if capabilities(model).default_settings:
        return model.default_settings.replace(**changes)
    kw: dict[str, Any] = {"eos_token_ids": (model.end_id,), "decoder_start_token_id": model.start_id,
                          "pad_token_id": model.pad_id}
    if model.max_target_tokens:
        kw["max_new_tokens"] = int(model.max_target_tokens)
    kw.update(changes)
    return DecoderSettings(origin="defaults", **kw)


def model_info(model: SequenceModel, spec: str) -> dict[str, Any]:
    """What the report says about the model: where it came from, its fingerprint, and what the
    model tells about itself (Described: path, architecture, parameters, tokenizer, vocab)."""
    info: dict[str, Any] = {"spec": spec, "sha256": model.fingerprint()}
    if capabilities(model).described:
        info.update(model.describe())
    return info
