"""What the studies are asked to run, and what they will cost: the width and alpha lists of the
options, and a measured estimate of the decoding time."""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from typing import Any

from triage.errors import OptionError
from triage.studies.common import compared_rows, sources
from triage.studies.common import sample as sample_of


def parse_widths(text: str, current_beam: int) -> list[int]:
    """Wider beam widths from a comma list: plain widths ("4,8,16") or multiples of the
    current width ("x2,x4": 2 and 4 times the current width); both may be mixed.

    Every width must be wider than the current one; the result is sorted, without repeats.
    """
    widths: set[int] = set()
    for item in (x.strip() for x in str(text).split(",")):
        if not item:
            continue
        try:
            w = current_beam * int(item[1:]) if item[:1] in ("x", "X") else int(item)
        except ValueError:
            raise OptionError(f"beam widths: {item!r} is neither a width (8) nor a multiple of the current "
                              f"width (x2)") from None
        if w <= current_beam:
            raise OptionError(f"beam widths: {item!r} gives width {w}, not wider than the current width "
                              f"{current_beam}")
        widths.add(w)
    if not widths:
        raise OptionError(f"beam widths: no width in {text!r} (write e.g. 8,16 or x2,x4)")
    return sorted(widths)


def parse_alphas(text: str) -> list[float]:
    """Length-penalty exponents: a comma list ("0,0.5,1") or a range "start:stop:step" (stop included)."""
    text = str(text).strip()
    try:
        if ":" in text:
            start, stop, step = (float(x) for x in text.split(":"))
            if step <= 0 or stop < start:
                raise ValueError
            n = int(math.floor((stop - start) / step + 1e-9)) + 1
            values = [round(start + k * step, 10) for k in range(n)]
        else:
            values = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise OptionError(f"alphas: {text!r} is not a comma list of numbers or start:stop:step") from None
    if not values or not all(math.isfinite(v) for v in values):
        raise OptionError(f"alphas: {text!r} gives no finite value")
    return sorted(set(values))


def estimate_seconds(model, result, *, widen: Sequence[int] | None = None, beam_curve_max: int | None = None,
                     alphas: Sequence[float] | None = None, redecode_alpha: Sequence[float] | None = None,
                     max_rows: int | None = None, seed: int = 0, sample: int = 4) -> dict[str, Any]:
    """Seconds the studies would take: decodes `sample` rows at the narrowest and widest width
    needed, interpolates the per-row time linearly in the width, and multiplies by the rows.

    Re-ranking (alphas) costs no decoding and is counted as 0. Returns {"seconds", "steps":
    {step: seconds}, "sample_rows", "per_row_seconds": {width: s}}.
    """
    from triage.decoding.decode import decode

    settings, v = result.settings, result.verdicts
    compared = compared_rows(result)
    n_widen = min(len(compared), max_rows) if max_rows else len(compared)
    n_all = min(len(v), max_rows) if max_rows else len(v)
    needed = set()
    if widen:
        needed |= {settings.beam, *map(int, widen)}
    if beam_curve_max:
        needed |= set(range(1, int(beam_curve_max) + 1))
    if redecode_alpha:
        needed.add(max(settings.beam, 2))
    if not needed or not len(v):
        return {"seconds": 0.0, "steps": {}, "sample_rows": 0, "per_row_seconds": {}}
    pool = compared if compared else list(range(len(v)))
    rows, _ = sample_of(pool, sample, seed)
    src = sources(model, result, rows)
    lo, hi = min(needed), max(needed)
    decode(model, settings.replace(beam=lo), src[:1])  # warm-up before timing
    measured = {}
    for w in sorted({lo, hi}):
        t0 = time.perf_counter()
        decode(model, settings.replace(beam=w), src)
        measured[w] = (time.perf_counter() - t0) / len(rows)

    def per_row(w: int) -> float:
        if hi == lo:
            return measured[lo]
        return measured[lo] + (measured[hi] - measured[lo]) * (w - lo) / (hi - lo)

    steps: dict[str, float] = {}
    if widen:
        steps["widen"] = n_widen * sum(per_row(w) for w in {settings.beam, *map(int, widen)})
    if beam_curve_max:
        steps["beam_curve"] = n_all * sum(per_row(w) for w in range(1, int(beam_curve_max) + 1))
    if redecode_alpha:
        steps["redecode"] = n_all * len(redecode_alpha) * per_row(max(settings.beam, 2))
    return {"seconds": sum(steps.values()), "steps": steps, "sample_rows": len(rows),
            "per_row_seconds": {w: per_row(w) for w in sorted(needed)}}
