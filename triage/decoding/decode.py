"""Decoding sources with the decoder's settings (when the dev set has no outputs, and for sweeps).

A model with its own decoder (the OwnDecoder capability: a transformers checkpoint offers
transformers' ``generate``, the decoder the user ships) decodes with it whenever it can
express the objective; the ``gnmt`` penalty and models without one go through triage's own
beam search (beam.py), which matches ``generate`` where both apply.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from triage.models.api import capabilities
from triage.settings import DecoderSettings


@dataclass
class Decoded:
    ids: list[int]          # generated target ids, without start and end token
    text: str
    score: float            # the objective the decoder maximized
    finished: bool          # ended with the end token (False: stopped at the length limit)


def uses_own_decoder(model, settings: DecoderSettings) -> bool:
    """Whether `model` decodes these settings with its own decoder (the OwnDecoder capability)."""
    return capabilities(model).own_decoder and model.decodes(settings)


def decode(model, settings: DecoderSettings, source_ids: Sequence[Sequence[int]], *, batch_size: int = 16,
           progress: Callable[[int], None] | None = None) -> list[Decoded]:
    """Decode every source; results in input order."""
    if not source_ids:
        return []
    if uses_own_decoder(model, settings):
        return [Decoded(g.ids, model.detokenize(g.ids), g.score, g.finished)
                for g in model.generate(settings, source_ids, batch_size=batch_size, progress=progress)]
    from triage.decoding.beam import beam_search

    out: list[Decoded] = []
    for start in range(0, len(source_ids), batch_size):
        chunk = [list(s) for s in source_ids[start : start + batch_size]]
        for h in beam_search(model, settings, chunk):
            out.append(Decoded(list(h.tokens), model.detokenize(h.tokens), float(h.score), bool(h.finished)))
        if progress:
            progress(len(chunk))
    return out


def time_decode(model, settings, source_ids, **kw) -> tuple[list[Decoded], float]:
    t0 = time.perf_counter()
    out = decode(model, settings, source_ids, **kw)
    return out, time.perf_counter() - t0
