"""The decoder's objective: one frozen object that travels with the data.

Everything that decides which output a beam decoder prefers lives here: the beam width,
the length-penalty form and its exponent, and the generation rules (length limits, forced
tokens, banned words, n-gram blocking, repetition penalty). Scoring, verdicts, sweeps and
the report read these values; nothing re-derives them.

Objective (the score a beam decoder maximizes):

    score = sum of natural-log token probabilities of the target
            (end-of-sequence token included, decoder start token excluded)
            / penalty(len)

    power: penalty = len ** alpha      (len = target tokens incl. end-of-sequence;
                                        transformers' beam search, measured in tests)
    gnmt:  penalty = ((5 + len) / 6) ** alpha   (Wu et al. 2016, formula from memory)
    none:  penalty = 1

Greedy search (beam width 1) applies no length penalty: its objective is the plain sum.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from dataclasses import dataclass, field
from typing import Any

PENALTY_FORMS = ("power", "gnmt", "none")


@dataclass(frozen=True)
class DecoderSettings:
    beam: int = 1
    penalty: str = "power"
    alpha: float = 1.0
    early_stopping: bool | str = False
    max_new_tokens: int | None = None
    max_length: int | None = None
    min_length: int = 0
    min_new_tokens: int | None = None
    no_repeat_ngram_size: int = 0
    encoder_no_repeat_ngram_size: int = 0
    repetition_penalty: float = 1.0
    bad_words_ids: tuple[tuple[int, ...], ...] = ()
    forced_bos_token_id: int | None = None
    forced_eos_token_id: int | None = None
    decoder_start_token_id: int | None = None
    eos_token_ids: tuple[int, ...] = ()
    pad_token_id: int | None = None
    source_prefix: str = ""
    # where the defaults came from: "generation_config.json of <dir>", "flags", ...
    origin: str = field(default="defaults", compare=False)

    def __post_init__(self) -> None:
        if self.beam < 1:
            raise ValueError(f"beam width must be at least 1, got {self.beam}")
        if self.penalty not in PENALTY_FORMS:
            raise ValueError(f"penalty must be one of {', '.join(PENALTY_FORMS)}, got {self.penalty!r}")
        if not math.isfinite(self.alpha):
            raise ValueError(f"alpha must be a finite number, got {self.alpha}")

    # ----------------------------------------------------------------- objective
    @property
    def normalizes(self) -> bool:
        """Whether the objective divides by a length penalty (greedy search never does)."""
        return self.beam > 1 and self.penalty != "none" and self.alpha != 0.0

    def length_penalty(self, length: int | float) -> float:
        """The divisor applied to a summed log-prob of a target of `length` tokens."""
        if not self.normalizes:
            return 1.0
        if self.penalty == "power":
            return float(length) ** self.alpha
        return ((5.0 + float(length)) / 6.0) ** self.alpha

    def objective(self, logprob_sum: float, length: int) -> float:
        """Score of a target: summed log-prob over the length penalty (minus infinity stays)."""
        return logprob_sum / self.length_penalty(max(int(length), 1))

    @property
    def transformers_alpha(self) -> float:
        """The `length_penalty` value transformers' beam search needs for this objective."""
        if self.penalty == "gnmt":
            raise ValueError("transformers' generate has no gnmt penalty; decode with triage's own beam search")
        return 0.0 if self.penalty == "none" else float(self.alpha)

    def limit_new_tokens(self) -> int:
        """Most tokens the decoder may generate after the start token (end token included)."""
        if self.max_new_tokens is not None:
            return int(self.max_new_tokens)
        if self.max_length is not None:
            return int(self.max_length) - 1
        return 20 - 1  # transformers' default max_length of 20 (from memory) includes the start token

    # ----------------------------------------------------------------- variants
    def replace(self, **changes: Any) -> DecoderSettings:
        return dataclasses.replace(self, **changes)

    # ----------------------------------------------------------------- (de)serialization
    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["bad_words_ids"] = [list(x) for x in self.bad_words_ids]
        d["eos_token_ids"] = list(self.eos_token_ids)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> DecoderSettings:
        names = {f.name for f in dataclasses.fields(cls)}
        kw = {k: v for k, v in d.items() if k in names}
        if "bad_words_ids" in kw:
            kw["bad_words_ids"] = tuple(tuple(int(t) for t in x) for x in kw["bad_words_ids"] or ())
        if "eos_token_ids" in kw:
            kw["eos_token_ids"] = tuple(int(t) for t in kw["eos_token_ids"] or ())
        return cls(**kw)

    def signature(self) -> str:
        """A short stable description of the objective, printed beside every result."""
        parts = [f"beam={self.beam}"]
        if self.normalizes:
            parts.append(f"penalty={self.penalty}")
            parts.append(f"alpha={self.alpha:g}")
        else:
            parts.append("penalty=none")
        parts.append(f"max_new={self.limit_new_tokens()}")
        for name in ("min_length", "min_new_tokens", "no_repeat_ngram_size", "encoder_no_repeat_ngram_size"):
            v = getattr(self, name)
            if v:
                parts.append(f"{name}={v}")
        if self.repetition_penalty != 1.0:
            parts.append(f"repetition_penalty={self.repetition_penalty:g}")
        if self.bad_words_ids:
            parts.append(f"bad_words={len(self.bad_words_ids)}")
        if self.forced_bos_token_id is not None:
            parts.append(f"forced_bos={self.forced_bos_token_id}")
        if self.forced_eos_token_id is not None:
            parts.append(f"forced_eos={self.forced_eos_token_id}")
        if self.early_stopping not in (False, None):
            parts.append(f"early_stopping={self.early_stopping}")
        if self.source_prefix:
            parts.append(f"prefix={self.source_prefix!r}")
        return "|".join(parts)

    def fingerprint(self) -> str:
        d = self.to_dict()
        d.pop("origin", None)
        return hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()[:16]

    # ----------------------------------------------------------------- transformers bridge
    @classmethod
    def from_generation_config(cls, gc: Any, origin: str = "generation_config", **overrides: Any) -> DecoderSettings:
        """Read the decoder's settings from a transformers GenerationConfig; flags override."""

        def get(name: str, default: Any = None) -> Any:
            v = getattr(gc, name, None)
            return default if v is None else v

        eos = get("eos_token_id")
        if eos is None:
            eos_ids: tuple[int, ...] = ()
        elif isinstance(eos, int):
            eos_ids = (eos,)
        else:
            eos_ids = tuple(int(x) for x in eos)
        beam = int(get("num_beams", 1))
        kw: dict[str, Any] = dict(
            beam=beam,
            penalty="power",
            alpha=float(get("length_penalty", 1.0)),
            early_stopping=get("early_stopping", False),
            max_new_tokens=get("max_new_tokens"),
            max_length=get("max_length"),
            min_length=int(get("min_length", 0)),
            min_new_tokens=get("min_new_tokens"),
            no_repeat_ngram_size=int(get("no_repeat_ngram_size", 0)),
            encoder_no_repeat_ngram_size=int(get("encoder_no_repeat_ngram_size", 0)),
            repetition_penalty=float(get("repetition_penalty", 1.0)),
            bad_words_ids=tuple(tuple(int(t) for t in w) for w in (get("bad_words_ids") or ())),
            forced_bos_token_id=get("forced_bos_token_id"),
            forced_eos_token_id=get("forced_eos_token_id"),
            decoder_start_token_id=get("decoder_start_token_id"),
            eos_token_ids=eos_ids,
            pad_token_id=get("pad_token_id"),
            origin=origin,
        )
        kw.update({k: v for k, v in overrides.items() if v is not None})
        return cls(**kw)

    def to_generation_config(self, base: Any = None) -> Any:
        """A transformers GenerationConfig that decodes with exactly this objective."""
        from transformers import GenerationConfig

        gc = GenerationConfig.from_dict(base.to_dict()) if base is not None else GenerationConfig()
        gc.num_beams = self.beam
        gc.do_sample = False
        gc.num_return_sequences = 1
        gc.length_penalty = self.transformers_alpha if self.beam > 1 else 1.0
        gc.early_stopping = self.early_stopping if self.beam > 1 else False
        gc.max_new_tokens = self.limit_new_tokens()
        gc.max_length = None
        gc.min_length = self.min_length
        gc.min_new_tokens = self.min_new_tokens
        gc.no_repeat_ngram_size = self.no_repeat_ngram_size
        gc.encoder_no_repeat_ngram_size = self.encoder_no_repeat_ngram_size
        gc.repetition_penalty = self.repetition_penalty
        gc.bad_words_ids = [list(w) for w in self.bad_words_ids] or None
        gc.forced_bos_token_id = self.forced_bos_token_id
        gc.forced_eos_token_id = self.forced_eos_token_id
        if self.decoder_start_token_id is not None:
            gc.decoder_start_token_id = self.decoder_start_token_id
        if self.eos_token_ids:
            gc.eos_token_id = list(self.eos_token_ids) if len(self.eos_token_ids) > 1 else self.eos_token_ids[0]
        if self.pad_token_id is not None:
            gc.pad_token_id = self.pad_token_id
        return gc
