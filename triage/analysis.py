"""From verdicts to evidence: counts, length buckets with intervals, and the recommendation."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import pandas as pd

from .verdicts import FAILED, VERDICTS

DEFAULT_EDGES = (1, 11, 21, 31, 41)  # buckets 1-10, 11-20, 21-30, 31-40, 41+
BUCKET_BY = ("ref-words", "source-words", "ref-tokens", "source-tokens")


def parse_edges(text: str) -> tuple[int, ...]:
    """'1,11,21,31,41' -> lower edges of the buckets (each bucket runs to the next edge minus one)."""
    try:
        edges = tuple(int(x) for x in text.split(",") if x.strip())
    except ValueError as exc:
        raise ValueError(f"bucket edges must be integers separated by commas, got {text!r}") from exc
    if not edges or list(edges) != sorted(set(edges)) or edges[0] < 0:
        raise ValueError(f"bucket edges must be increasing non-negative integers, got {text!r}")
    return edges


def bucket_labels(edges: Sequence[int]) -> list[str]:
    labels = []
    for k, lo in enumerate(edges):
        labels.append(f"{lo}-{edges[k + 1] - 1}" if k + 1 < len(edges) else f"{lo}+")
    return labels


def assign_bucket(length: int, edges: Sequence[int]) -> str:
    labels = bucket_labels(edges)
    if length < edges[0]:
        return f"<{edges[0]}"
    k = 0
    while k + 1 < len(edges) and length >= edges[k + 1]:
        k += 1
    return labels[k]


def wilson_interval(k: int, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson 1927; z for 95%)."""
    if n == 0:
        return (float("nan"), float("nan"))
    p = k / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


def verdict_counts(verdicts: pd.Series) -> dict[str, int]:
    vc = verdicts.value_counts()
    return {v: int(vc.get(v, 0)) for v in VERDICTS}


def search_share(counts: dict[str, int]) -> tuple[int, int]:
    """(search rows, decided rows): the share's numerator and denominator (search + model + tie)."""
    n = counts.get("search", 0) + counts.get("model", 0) + counts.get("tie", 0)
    return counts.get("search", 0), n


def bucket_table(frame: pd.DataFrame, edges: Sequence[int]) -> pd.DataFrame:
    """Counts and shares of each verdict per bucket, with a 95% Wilson interval on the search share."""
    order = ([f"<{edges[0]}"] if (frame["bucket_length"] < edges[0]).any() else []) + bucket_labels(edges)
    rows = []
    for label in order:
        part = frame[frame["bucket"] == label]
        counts = verdict_counts(part["verdict"])
        k, n = search_share(counts)
        lo, hi = wilson_interval(k, n)
        failed = sum(counts[v] for v in FAILED)
        row: dict[str, Any] = {"range": label, "rows": len(part), "failed": failed}
        row.update(counts)
        row["search_share"] = k / n if n else float("nan")
        row["search_low"], row["search_high"] = lo, hi
        rows.append(row)
    return pd.DataFrame(rows)


def recommend(counts: dict[str, int], evidence: dict[str, Any] | None = None, min_rows: int = 10) -> dict[str, Any]:
    """The recommended action and the numbers it rests on.

    Without sweep evidence the rule reads the verdict mix alone; with evidence from wider
    beams or other length penalties (see sweeps.py) it asks whether the change would pay.
    """
    evidence = evidence or {}
    k, n = search_share(counts)
    model = counts.get("model", 0)
    failed = sum(counts.get(v, 0) for v in FAILED)
    if n < min_rows:
        return {
            "action": "inconclusive",
            "because": f"only {n} failed rows could be compared (need at least {min_rows})",
            "missing": ["more failed rows"],
        }
    s_share, m_share = k / n, model / n
    lp = evidence.get("length_penalty")
    if lp and lp.get("flip_share", 0) >= 0.3 and lp.get("short_share", 0) >= 0.5 and m_share >= 0.5:
        return {
            "action": "tune-length-penalty",
            "because": (
                f"{m_share:.0%} of compared failures are model-side, {lp['short_share']:.0%} of them shorter "
                f"than the reference, and {lp['flip_share']:.0%} flip to search-side at "
                f"{lp['best_penalty']} alpha {lp['best_alpha']:g}"
            ),
        }
    widen = evidence.get("widen")
    if s_share >= 0.5:
        if widen:
            best = max(widen, key=lambda w: w["resolved_share"])
            if best["resolved_share"] >= 0.25:
                return {
                    "action": "widen-beam",
                    "because": (
                        f"widen to {best['beam']}: resolves {best['resolved_share']:.0%} of search-side rows, "
                        f"{best['corpus_delta']:+.1f} {best['metric']} on the dev set, "
                        f"{best['time_ratio']:.1f}x decode time"
                    ),
                }
            return {
                "action": "inconclusive",
                "because": (
                    f"{s_share:.0%} of compared failures are search-side, but widening to {best['beam']} "
                    f"resolves only {best['resolved_share']:.0%} of them"
                ),
                "missing": ["a wider beam or another length penalty that recovers the references"],
            }
        return {
            "action": "widen-beam",
            "because": f"{s_share:.0%} of compared failures are search-side ({k} of {n}); not yet confirmed "
            "by re-decoding (run with --widen)",
            "missing": ["re-decoding with a wider beam (--widen)"],
        }
    if m_share >= 0.5:
        because = f"{m_share:.0%} of compared failures are model-side ({model} of {n})"
        if widen:
            best = max(widen, key=lambda w: w["resolved_share"])
            because += f" and widening to {best['beam']} resolves {best['resolved_share']:.0%} of search-side rows"
        return {"action": "fix-model", "because": because}
    return {
        "action": "inconclusive",
        "because": f"failures split: {s_share:.0%} search-side, {m_share:.0%} model-side of {n} compared "
        f"({failed} failed rows in all)",
        "missing": ["re-decoding with a wider beam (--widen)", "a length-penalty sweep"],
    }
