"""From verdicts to evidence: counts, length buckets with intervals, and the recommendation."""

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


def settings_mismatch(summary: dict[str, Any]) -> str | None:
    """Why the given outputs cannot come from the decoder at the run's settings, when at least
    half of the failed rows' outputs break one of its rules (longer than its length limit,
    shorter than its minimum, a banned or repeated n-gram); None otherwise. Scores of such
    outputs are not what the decoder maximized, so no verdict or advice rests on them."""
    foreign = summary.get("outputs_not_from_these_settings") or {}
    rows, failed = foreign.get("rows") or 0, foreign.get("of_failed") or 0
    if not rows or 2 * rows < failed:
        return None
    rules = ", ".join(f"{rule} ({k})" for rule, k in (foreign.get("rules") or {}).items())
    return (f"{rows} of {failed} failed outputs cannot come from the decoder at these settings "
            f"({summary.get('objective', 'the given objective')}): its rules forbid them: {rules}")


def recommend(counts: dict[str, int], evidence: dict[str, Any] | None = None, min_rows: int = 10) -> dict[str, Any]:
    """The recommended action and the numbers it rests on.

    When the outputs cannot come from the decoder at the run's settings (settings_mismatch),
    nothing is recommended. Without sweep evidence the rule reads the verdict mix alone; with
    evidence from wider beams or other length penalties (the "widen", "length_penalty" and "beam_curve" sections
    that sweeps.py writes, see SWEEPS-SCHEMA.md) it asks whether the change would pay.
    """
    evidence = evidence or {}
    k, n = search_share(counts)
    model = counts.get("model", 0)
    failed = sum(counts.get(v, 0) for v in FAILED)
    mismatch = settings_mismatch(evidence)
    if mismatch:
        return {"action": "inconclusive", "because": mismatch,
                "missing": ["the decoder settings the outputs were decoded with"]}
    if n < min_rows:
        return {
            "action": "inconclusive",
            "because": f"only {n} failed rows could be compared (need at least {min_rows})",
            "missing": ["more failed rows"],
        }
    s_share, m_share = k / n, model / n
    widen = evidence.get("widen")
    lp = evidence.get("length_penalty")
    best = _best_width(widen)
    metric = (widen or {}).get("metric", "metric")

    # ---- length penalty: model-side failures that are short and flip at another alpha
    lp_text = ""
    if lp and lp.get("best") and lp.get("brevity"):
        b, brev = lp["best"], lp["brevity"]
        flip, short = b.get("flip_share"), brev.get("short_share")
        lp_text = (f"the best penalty ({b['penalty']} alpha {b['alpha']:g}) flips {flip or 0:.0%} of "
                   f"model-side rows to search-side")
        if m_share >= 0.5 and (flip or 0) >= 0.3 and (short or 0) >= 0.5:
            because = (f"{m_share:.0%} of compared failures are model-side ({model} of {n}), {short:.0%} of them "
                       f"shorter than the reference (mean length ratio {brev.get('length_ratio') or 0:.2f}), and "
                       f"{flip:.0%} flip to search-side at {b['penalty']} alpha {b['alpha']:g}")
            done = [r for r in lp.get("redecode") or [] if r.get("penalty") == b["penalty"]]
            if done:
                r = max(done, key=lambda r: (r["corpus_delta"], -abs(r["alpha"] - b["alpha"])))
                because += (f"; decoding at alpha {r['alpha']:g} changes {metric_name(lp, widen)} by "
                            f"{r['corpus_delta']:+.1f} on {r['rows']} rows")
                if r["corpus_delta"] > 0:
                    return {"action": "tune-length-penalty", "because": because}
                lp_text += f", but decoding at alpha {r['alpha']:g} changes the metric by {r['corpus_delta']:+.1f}"
            else:
                return {"action": "tune-length-penalty", "because": because,
                        "missing": [f"decoding at {b['penalty']} alpha {b['alpha']:g} to confirm (--redecode-alpha)"]}

    # ---- search-side failures: does a wider beam recover them, and does it pay?
    worse = ""
    if best and best["model_rows"]["worse"]:
        mr = best["model_rows"]
        worse = f"; it lowers {metric} on {mr['worse']} of {mr['rows']} model-side rows"
    if best:
        numbers = (f"widen to {best['beam']}: resolves {best['resolved_share']:.0%} of search-side rows, "
                   f"{best['corpus_delta']:+.1f} {metric} on the dev set, {best['time_ratio'] or 0:.1f}x decode time")
    if s_share >= 0.5:
        if widen is None:
            return {
                "action": "widen-beam",
                "because": f"{s_share:.0%} of compared failures are search-side ({k} of {n}); not yet confirmed "
                "by re-decoding (run with --widen)",
                "missing": ["re-decoding with a wider beam (--widen)"],
            }
        if best is None:
            return {"action": "inconclusive",
                    "because": f"{s_share:.0%} of compared failures are search-side, but no wider beam was measured",
                    "missing": ["re-decoding with a wider beam (--widen)"]}
        if best["resolved_share"] >= 0.25 and best["corpus_delta"] >= 0:
            return {"action": "widen-beam", "because": numbers + worse}
        if best["resolved_share"] >= 0.25:
            return {"action": "inconclusive",
                    "because": f"{s_share:.0%} of compared failures are search-side and {numbers}{worse}",
                    "missing": ["a width or length penalty that resolves them without lowering the metric"]}
        return {
            "action": "inconclusive",
            "because": (f"{s_share:.0%} of compared failures are search-side, but widening to {best['beam']} "
                        f"resolves only {best['resolved_share']:.0%} of them"),
            "missing": ["a wider beam or another length penalty that recovers the references"],
        }
    if m_share >= 0.5:
        because = f"fix the model: {m_share:.0%} of compared failures are model-side ({model} of {n})"
        if best:
            because += (f" and widening to {best['beam']} resolves {best['resolved_share']:.0%} of search-side rows "
                        f"({best['corpus_delta']:+.1f} {metric})")
        elif widen and widen.get("widths"):
            w = max(widen["widths"], key=lambda w: w["beam"])
            because += (f"; widening to {w['beam']} has no search-side row to resolve and changes {metric} by "
                        f"{w['corpus_delta']:+.1f} on the dev set")
        if lp_text:
            because += "; " + lp_text
        return {"action": "fix-model", "because": because}
    if best and best["resolved_share"] >= 0.5 and best["corpus_delta"] > 0:
        return {"action": "widen-beam",
                "because": f"failures split ({s_share:.0%} search-side, {m_share:.0%} model-side of {n}); "
                + numbers + worse}
    missing = []
    if widen is None:
        missing.append("re-decoding with a wider beam (--widen)")
    if lp is None:
        missing.append("a length-penalty sweep")
    because = (f"failures split: {s_share:.0%} search-side, {m_share:.0%} model-side of {n} compared "
               f"({failed} failed rows in all)")
    if best:
        because += "; " + numbers
    if lp_text:
        because += "; " + lp_text
    return {"action": "inconclusive", "because": because,
            "missing": missing or ["a clearer split of failures (more rows, or a --below threshold)"]}


def metric_name(*sections: dict[str, Any] | None) -> str:
    for s in sections:
        if s and s.get("metric"):
            return str(s["metric"])
    return "metric"


def _best_width(widen: dict[str, Any] | None) -> dict[str, Any] | None:
    """The measured width resolving most search-side rows (the narrower one on ties)."""
    entries = [w for w in (widen or {}).get("widths", []) if w.get("resolved_share") is not None]
    if not entries:
        return None
    return max(entries, key=lambda w: (w["resolved_share"], -w["beam"]))
