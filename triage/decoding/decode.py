"""Decoding sources with the decoder's settings (when the dev set has no outputs, and for sweeps).

A model with its own decoder (the OwnDecoder capability: a transformers checkpoint offers
transformers' ``generate``, the decoder the user ships) decodes with it whenever it can
express the objective; the ``gnmt`` penalty and models without one go through triage's own
beam search (beam.py), which matches ``generate`` where both apply.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from typing import Protocol

from triage.models.api import capabilities
from triage.settings import DecoderSettings


@dataclass
class Decoded:
    ids: list[int]          # generated target ids, without start and end token
    text: str
    score: float            # the objective the decoder maximized
    finished: bool          # ended with the end token (False: stopped at the length limit)


#: the pool a run lent to everything that decodes or scores inside it (triage.workflow sets it)
_RUN_POOL: ContextVar = ContextVar("triage_run_pool", default=None)


@contextmanager
def pool_for_run(pool) -> Iterator[None]:
    """Inside this block decode() and score_requests() without a pool of their own use `pool`
    (a triage.cluster WorkerPool; None: here). The studies decode through it without knowing."""
    token = _RUN_POOL.set(pool)
    try:
        yield
    finally:
        _RUN_POOL.reset(token)


def run_pool():
    """The pool set by pool_for_run, or None."""
    return _RUN_POOL.get()


def uses_own_decoder(model, settings: DecoderSettings) -> bool:
    """Whether `model` decodes these settings with its own decoder (the OwnDecoder capability)."""
    return capabilities(model).own_decoder and model.decodes(settings)


def plan_decode(model, settings: DecoderSettings, source_ids: Sequence[Sequence[int]], *,
                batch_size: int = 16) -> list[list[int]]:
    """The batches decode() hands a pool (source indices, in the order decoded): for the model's own
    decoder length-sorted batches, as the transformers and decoder-only backends' generate forms
    them; for triage's beam search, input order, as decode() does here. A batch decodes to the same
    outputs and scores wherever it runs (same thread count), so these are the shards a cluster
    hands out. (The speech backend's generate batches in input order: its cluster batches differ.)"""
    order = list(range(len(source_ids)))
    if uses_own_decoder(model, settings):
        order.sort(key=lambda i: len(source_ids[i]))
    return [order[k : k + batch_size] for k in range(0, len(order), batch_size)]


def decode_batch(model, settings: DecoderSettings, sources: Sequence[Sequence[int]]) -> list[Decoded]:
    """Decode one planned batch as one batch; results in its order."""
    if uses_own_decoder(model, settings):
        return [Decoded(g.ids, model.detokenize(g.ids), g.score, g.finished)
                for g in model.generate(settings, sources, batch_size=len(sources))]
    from triage.decoding.beam import beam_search

    return [Decoded(list(h.tokens), model.detokenize(h.tokens), float(h.score), bool(h.finished))
            for h in beam_search(model, settings, [list(s) for s in sources])]


def decode(model, settings: DecoderSettings, source_ids: Sequence[Sequence[int]], *, batch_size: int = 16,
           progress: Callable[[int], None] | None = None, pool: BatchDecoder | None = None) -> list[Decoded]:
    """Decode every source; results in input order. pool: decodes the planned batches elsewhere
    (triage.cluster's workers), with the same outputs."""
    if not source_ids:
        return []
    pool = pool if pool is not None else run_pool()
    if pool is None:
        return _decode_here(model, settings, source_ids, batch_size, progress)
    batches = plan_decode(model, settings, source_ids, batch_size=batch_size)
    done = pool.decode_batches(settings, [[source_ids[i] for i in batch] for batch in batches])
    out: list[Decoded | None] = [None] * len(source_ids)
    for batch, decoded in zip(batches, done, strict=True):
        for i, d in zip(batch, decoded, strict=True):
            out[i] = d
        if progress:
            progress(len(batch))
    return out  # type: ignore[return-value]


def _decode_here(model, settings, source_ids, batch_size, progress) -> list[Decoded]:
    """Decoding in this process: the model's own decoder batches as it likes; beam.py in input order."""
    if uses_own_decoder(model, settings):
        return [Decoded(g.ids, model.detokenize(g.ids), g.score, g.finished)
                for g in model.generate(settings, source_ids, batch_size=batch_size, progress=progress)]
    out: list[Decoded] = []
    for start in range(0, len(source_ids), batch_size):
        chunk = source_ids[start : start + batch_size]
        out.extend(decode_batch(model, settings, chunk))
        if progress:
            progress(len(chunk))
    return out


class BatchDecoder(Protocol):
    """Something that decodes planned batches elsewhere and hands the results back in order."""

    def decode_batches(self, settings: DecoderSettings,
                       batches: Sequence[Sequence[Sequence[int]]]) -> Iterable[list[Decoded]]: ...


def time_decode(model, settings, source_ids, **kw) -> tuple[list[Decoded], float]:
    t0 = time.perf_counter()
    out = decode(model, settings, source_ids, **kw)
    return out, time.perf_counter() - t0
