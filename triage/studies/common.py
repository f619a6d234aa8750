"""What the studies share: the typed-section base, the row sample, the references, timed decoding
and re-scoring from recorded log-prob sums.

A study's section is a dataclass whose fields are its keys in summary.json, in the order written.
`to_json()` gives that JSON object (nested sections too); `from_json()` reads it back. A field whose
key is not a name ("budget reached") says so in its metadata; a field that is left out of the
JSON when unset (None) is marked `omit_none`. Reading is lenient about absent keys (a section
of another writer may lack some: they read as the field's default, else None) and strict about
shapes (a list where an object belongs raises TypeError), so a reader can fall back to showing
the section as it is.
"""

from __future__ import annotations

import dataclasses
import math
import random
import time
import types
import typing
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from triage.errors import OptionError
from triage.run.progress import bar
from triage.run.verdicts import COMPARED, FAILED
from triage.settings import DecoderSettings

if TYPE_CHECKING:  # the report reads the sections and their views without torch: decoding is imported when run
    from triage.scoring.scorer import TargetScore

__all__ = ["COMPARED", "FAILED", "Section", "best_reference_score", "compared_rows", "key", "mean", "omit_none",
           "prepare", "references", "reproduce", "rescore", "sample", "share", "sources", "timed_decode"]


# --------------------------------------------------------------------------- typed sections
def key(name: str, **kw: Any) -> Any:
    """A field written under another JSON key than its name (e.g. "budget reached")."""
    return dataclasses.field(metadata={"key": name}, **kw)


def omit_none(**kw: Any) -> Any:
    """A field left out of the JSON object while it is None."""
    kw.setdefault("default", None)
    return dataclasses.field(metadata={"omit_none": True}, **kw)


def _json_key(f: dataclasses.Field) -> str:
    return f.metadata.get("key", f.name)


def _to_json(value: Any) -> Any:
    if isinstance(value, Section):
        return value.to_json()
    if isinstance(value, list):
        return [_to_json(v) for v in value]
    if isinstance(value, dict):
        return {k: _to_json(v) for k, v in value.items()}
    return value


def _from_json(tp: Any, value: Any) -> Any:
    if value is None:
        return None
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        inner = [a for a in typing.get_args(tp) if a is not type(None)]
        return _from_json(inner[0], value) if len(inner) == 1 else value
    if origin is list:
        if not isinstance(value, list):
            raise TypeError(f"expected a list, got {type(value).__name__}")
        (item,) = typing.get_args(tp) or (Any,)
        return [_from_json(item, v) for v in value]
    if origin is dict:
        if not isinstance(value, dict):
            raise TypeError(f"expected an object, got {type(value).__name__}")
        _, item = typing.get_args(tp) or (str, Any)
        return {k: _from_json(item, v) for k, v in value.items()}
    if isinstance(tp, type) and issubclass(tp, Section):
        return tp.from_json(value)
    return value


class Section:
    """Base of a study's typed section (and of its nested entries); subclasses are dataclasses."""

    def to_json(self) -> dict[str, Any]:
        """The section as written into summary.json: same keys, same order."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            if value is None and f.metadata.get("omit_none"):
                continue
            out[_json_key(f)] = _to_json(value)
        return out

    @classmethod
    def from_json(cls, d: dict[str, Any]):
        """The section read back from summary.json. An absent key takes the field's default (None
        when it has none); a value of the wrong shape raises TypeError."""
        if not isinstance(d, dict):
            raise TypeError(f"{cls.__name__}: expected an object, got {type(d).__name__}")
        hints = typing.get_type_hints(cls)
        kw = {}
        for f in dataclasses.fields(cls):  # type: ignore[arg-type]
            k = _json_key(f)
            if k in d:
                kw[f.name] = _from_json(hints[f.name], d[k])
            elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                kw[f.name] = None
        return cls(**kw)


# --------------------------------------------------------------------------- rows and references
def sample(indices: Sequence[int], max_rows: int | None, seed: int) -> tuple[list[int], bool]:
    """At most max_rows of the indices, a seeded sample in input order; and whether it is a sample."""
    indices = list(indices)
    if max_rows is None or len(indices) <= max_rows:
        return indices, False
    return sorted(random.Random(seed).sample(indices, max_rows)), True


def compared_rows(result) -> list[int]:
    """Rows of a TriageResult whose reference and output were both scored and compared."""
    v = result.verdicts
    return [i for i in range(len(v)) if v["verdict"].iat[i] in COMPARED and i in result.scores]


def references(result, devset) -> tuple[list[list[str]], str]:
    """Every row's references: all of them from the dev set, else the best one from the verdicts."""
    n = len(result.verdicts)
    if devset is not None:
        frame = devset.frame if hasattr(devset, "frame") else devset
        refs = [list(r) for r in frame.reset_index(drop=True)["references"].tolist()]
        if len(refs) != n:
            raise OptionError(f"sweeps: the dev set has {len(refs)} rows, the triage result {n}")
        return refs, "all"
    return [[r] for r in result.verdicts["reference"].tolist()], "best"


def sources(model, result, rows: Sequence[int]) -> list[list[int]]:
    prefix = result.settings.source_prefix
    texts = [prefix + s for s in result.verdicts["source"].iloc[list(rows)].tolist()]
    return model.tokenize_sources(texts) if texts else []


def prepare(model, result, rows: Sequence[int], refs: Sequence[list[str]],
            warm: DecoderSettings) -> tuple[list[list[int]], list[list[str]]]:
    """The rows' tokenized sources and references, after one warm-up decode at `warm`, so that
    the first timed width pays no start-up cost."""
    from triage.decoding.decode import decode

    src = sources(model, result, rows)
    decode(model, warm, src[:1])
    return src, [refs[i] for i in rows]


def timed_decode(model, settings, src, desc, progress):
    from triage.decoding.decode import decode

    with bar(len(src), desc, progress) as b:
        t0 = time.perf_counter()
        out = decode(model, settings, src, progress=b.update)
        return out, time.perf_counter() - t0


def reproduce(model, settings, src, given: Sequence[str], desc: str, progress) -> tuple[list, float, list[bool]]:
    """Decode `src` at `settings` (timed) and say which of the `given` outputs each decode
    reproduces (equal after whitespace normalization): (decoded, seconds, same)."""
    from triage.run.verdicts import matches_any

    decoded, seconds = timed_decode(model, settings, src, desc, progress)
    return decoded, seconds, [matches_any(d.text, [g]) for d, g in zip(decoded, given, strict=True)]


# --------------------------------------------------------------------------- scores and sums
def rescore(settings: DecoderSettings, target: TargetScore) -> float:
    """A scored target's objective under other settings, from its recorded log-prob sum and length."""
    if not target.scored:
        return math.nan
    if target.blocked_rule is not None or math.isinf(target.logprob_sum):
        return float("-inf")
    return settings.objective(target.logprob_sum, target.length)


def best_reference_score(settings: DecoderSettings, refs: Sequence[TargetScore]) -> float:
    values = [rescore(settings, r) for r in refs if r.scored]
    return max(values) if values else math.nan


def mean(values: Sequence[float]) -> float | None:
    values = [v for v in values if v is not None and math.isfinite(v)]
    return sum(values) / len(values) if values else None


def share(k: int, n: int) -> float | None:
    return k / n if n else None
