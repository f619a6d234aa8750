"""Decoding sources with the decoder's settings (when the dev set has no outputs, and for sweeps).

A transformers checkpoint decodes with transformers' own ``generate`` (the decoder the user
ships) whenever that can express the objective; the ``gnmt`` penalty and models that are not
transformers checkpoints go through triage's own beam search (beam.py), which matches
``generate`` where both apply.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import torch

from triage.settings import DecoderSettings


@dataclass
class Decoded:
    ids: list[int]          # generated target ids, without start and end token
    text: str
    score: float            # the objective the decoder maximized
    finished: bool          # ended with the end token (False: stopped at the length limit)


def uses_generate(model, settings: DecoderSettings) -> bool:
    return hasattr(model, "model") and hasattr(model.model, "generate") and settings.penalty != "gnmt"


def decode(model, settings: DecoderSettings, source_ids: Sequence[Sequence[int]], *, batch_size: int = 16,
           progress: Callable[[int], None] | None = None) -> list[Decoded]:
    """Decode every source; results in input order."""
    if not source_ids:
        return []
    if not uses_generate(model, settings):
        from triage.decoding.beam import beam_search

        out: list[Decoded] = []
        for start in range(0, len(source_ids), batch_size):
            chunk = [list(s) for s in source_ids[start : start + batch_size]]
            for h in beam_search(model, settings, chunk):
                out.append(Decoded(list(h.tokens), model.detokenize(h.tokens), float(h.score), bool(h.finished)))
            if progress:
                progress(len(chunk))
        return out
    return _decode_generate(model, settings, source_ids, batch_size, progress)


@torch.inference_mode()
def _decode_generate(model, settings, source_ids, batch_size, progress) -> list[Decoded]:
    gc = settings.to_generation_config(model.model.generation_config)
    gc.return_dict_in_generate = True
    gc.output_scores = True
    order = sorted(range(len(source_ids)), key=lambda i: len(source_ids[i]))
    results: list[Decoded | None] = [None] * len(source_ids)
    for start in range(0, len(order), batch_size):
        idx = order[start : start + batch_size]
        ids, mask = model._pad([source_ids[i] for i in idx])
        out = model.model.generate(input_ids=ids, attention_mask=mask, generation_config=gc)
        seqs = out.sequences[:, 1:]  # drop the decoder start token
        if settings.beam > 1:
            scores = out.sequences_scores.tolist()
        else:
            trans = model.model.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
            trans = torch.where(torch.isfinite(trans), trans, torch.zeros_like(trans))
            scores = None
        for k, i in enumerate(idx):
            row = seqs[k].tolist()
            finished = model.end_id in row
            toks = row[: row.index(model.end_id)] if finished else row
            if scores is not None:
                score = float(scores[k])
            else:
                n = len(toks) + (1 if finished else 0)
                score = float(trans[k, :n].sum())
            results[i] = Decoded(toks, model.detokenize(toks), score, finished)
        if progress:
            progress(len(idx))
    return results  # type: ignore[return-value]


def time_decode(model, settings, source_ids, **kw) -> tuple[list[Decoded], float]:
    t0 = time.perf_counter()
    out = decode(model, settings, source_ids, **kw)
    return out, time.perf_counter() - t0
