"""Does the decoder give these outputs? Decoding while watching a given target per source.

`decode_watching` decodes each source at `settings`. Where a target is given (token ids without
the end token), that source's search stops as soon as the target has left it (beam.py's
tracking: pruned from the running beams, blocked by a rule, not among the candidates allowed to
finish, or the source's search ended while it was still running): the decoder can then no longer
return it, and the answer "does the decoder give this target?" is known to be no. A source whose
target stays in the search is decoded to its end, so its output is the decoder's own.

Triage's own beam search (beam.py) runs it wherever it returns what `decode` returns: for a model
without a decoder of its own (decode runs beam.py), and for a transformers checkpoint (whose
decoder is generate) at every width, penalty and early-stopping mode and under the rules that ban
or force tokens (tests/test_beam.py checks each against generate). Greedy search under a
repetition penalty is where the two can differ (beam.py's docstring), and another decoder of a
model's own is not assumed to match: there every source is decoded to its end by `decode`,
without watching.

The sources go in batches of similar length (the target's where one is given, else the
source's), so that a batch's rows end at about the same step.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from triage.decoding.decode import Decoded, decode, uses_own_decoder
from triage.settings import DecoderSettings


@dataclass
class Watched:
    decoded: Decoded | None  # the decoder's output; None: the search stopped once the target had left it
    left_at: int | None      # 1-based target position (end token counted) where the target left; None: it did not
    reason: str | None = None  # why it left (beam.py's LossPoint.reason), None when it did not


def own_search_matches(model, settings: DecoderSettings) -> bool:
    """Whether triage's own beam search returns what `decode` (the model's decoder) returns at `settings`:
    always where decode runs beam.py itself; for a transformers checkpoint, whose decoder is generate,
    everywhere but greedy search under a repetition penalty; for any other decoder of the model's own, never
    assumed."""
    if not uses_own_decoder(model, settings):
        return True
    from triage.models.transformers_backend import TransformersModel

    return isinstance(model, TransformersModel) and not (settings.beam == 1 and settings.repetition_penalty != 1.0)


def _watchable(settings: DecoderSettings, target: Sequence[int] | None) -> bool:
    """A target can be watched when it can end with an end token inside the length limit (one of
    `limit` tokens or more can only come out cut by the limit: decoded to the end instead)."""
    return target is not None and len(target) < settings.limit_new_tokens()


def decode_watching(model, settings: DecoderSettings, source_ids: Sequence[Sequence[int]],
                    targets: Sequence[Sequence[int] | None], *, batch_size: int = 16,
                    progress: Callable[[int], None] | None = None) -> list[Watched]:
    """Decode every source at `settings`, stopping early where its given target has left the
    search; results in input order."""
    if len(targets) != len(source_ids):
        raise ValueError(f"{len(targets)} targets for {len(source_ids)} sources")
    from triage.decoding.beam import beam_search

    out: list[Watched | None] = [None] * len(source_ids)
    own = own_search_matches(model, settings)
    watched = [i for i, t in enumerate(targets) if own and _watchable(settings, t)]
    rest = [i for i in range(len(source_ids)) if not (own and _watchable(settings, targets[i]))]
    watched.sort(key=lambda i: (len(targets[i]), len(source_ids[i])))  # type: ignore[arg-type]
    rest.sort(key=lambda i: len(source_ids[i]))
    for lo in range(0, len(watched), batch_size):
        rows = watched[lo: lo + batch_size]
        hyps = beam_search(model, settings, [source_ids[i] for i in rows], batch_size=batch_size,
                           track=[targets[i] for i in rows], stop_when_lost=True)  # type: ignore[misc]
        for i, h in zip(rows, hyps, strict=True):
            left = h.loss
            decoded = None if h.extra.get("stopped_early") else Decoded(
                list(h.tokens), model.detokenize(h.tokens), float(h.score), bool(h.finished))
            out[i] = Watched(decoded, left.step if left else None, left.reason if left else None)
        if progress:
            progress(len(rows))
    if rest:
        if own:
            for lo in range(0, len(rest), batch_size):
                rows = rest[lo: lo + batch_size]
                hyps = beam_search(model, settings, [source_ids[i] for i in rows], batch_size=batch_size)
                for i, h in zip(rows, hyps, strict=True):
                    out[i] = Watched(Decoded(list(h.tokens), model.detokenize(h.tokens), float(h.score),
                                             bool(h.finished)), None)
                if progress:
                    progress(len(rows))
        else:
            for i, d in zip(rest, decode(model, settings, [source_ids[i] for i in rest], batch_size=batch_size,
                                         progress=progress), strict=True):
                out[i] = Watched(d, None)
    return out  # type: ignore[return-value]
