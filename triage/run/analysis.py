"""From verdicts to evidence: counts and length buckets with intervals (the recommendation is triage.decision's)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import pandas as pd

from triage.run.verdicts import FAILED, VERDICTS

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
    by_bucket = {label: verdict_counts(part["verdict"]) for label, part in frame.groupby("bucket", sort=False)}
    return bucket_table_from_counts(by_bucket, edges)


def bucket_table_from_counts(by_bucket: dict[str, dict[str, int]], edges: Sequence[int]) -> pd.DataFrame:
    """bucket_table from verdict counts per bucket label (running totals of a streamed run)."""
    below = f"<{edges[0]}"
    order = ([below] if by_bucket.get(below) else []) + bucket_labels(edges)
    rows = []
    for label in order:
        counts = {v: int((by_bucket.get(label) or {}).get(v, 0)) for v in VERDICTS}
        k, n = search_share(counts)
        lo, hi = wilson_interval(k, n)
        failed = sum(counts[v] for v in FAILED)
        row: dict[str, Any] = {"range": label, "rows": sum(counts.values()), "failed": failed}
        row.update(counts)
        row["search_share"] = k / n if n else float("nan")
        row["search_low"], row["search_high"] = lo, hi
        rows.append(row)
    return pd.DataFrame(rows)
