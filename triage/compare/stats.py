"""The statistics of a comparison: Wilson intervals on shares, and the paired bootstrap of the
corpus metric done by sacrebleu's own significance test.

sacrebleu's ``PairedTest`` (test_type "bs") resamples the rows with replacement, scores both
systems on the same resamples, and gives the p-value of the observed difference and each system's
resampled mean and 95% half-width. It does not return the resampled differences themselves, so
the interval of B - A is taken from the same draws, rebuilt the way sacrebleu draws them (numpy's
default_rng(seed).choice over the row indices, one row of indices per resample) from the same
per-row statistics; the resampled means are checked against the ones sacrebleu reports, so the
interval is known to come from sacrebleu's resamples. The bounds are the ones sacrebleu's
``estimate_ci`` takes: the (n // 40)-th value from either end of the sorted resamples.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from contextlib import contextmanager
from dataclasses import dataclass

from triage.run.analysis import wilson_interval

RESAMPLES = 1000  # sacrebleu's default number of bootstrap resamples
SEED = 12345      # sacrebleu's default seed (its SACREBLEU_SEED)


@dataclass(frozen=True)
class Share:
    """k of n, the share and its 95% Wilson interval (None when n is 0)."""

    k: int
    n: int
    share: float | None
    interval95: tuple[float, float] | None


def share(k: int, n: int) -> Share:
    if n == 0:
        return Share(k, n, None, None)
    lo, hi = wilson_interval(k, n)
    return Share(k, n, k / n, (lo, hi))


@dataclass(frozen=True)
class PairedBootstrap:
    """The corpus metric of A and B on the same rows and references, and their difference."""

    metric: str
    score_a: float
    score_b: float
    difference: float                      # score_b - score_a
    interval95: tuple[float, float]        # of the difference, from the paired resamples
    p_value: float                         # sacrebleu's paired bootstrap p-value
    mean_a: float                          # sacrebleu's resampled mean of A, and its 95% half-width
    half_width_a: float
    mean_b: float
    half_width_b: float
    resamples: int
    seed: int
    signature: str                         # sacrebleu's signature of the test (metric, nrefs, bs, seed, ...)
    draws_agree: bool                      # the rebuilt resamples give sacrebleu's resampled means


def _metric(name: str):
    from sacrebleu.metrics import BLEU, CHRF

    if name == "chrf":
        return CHRF()
    if name == "bleu":
        return BLEU()
    raise ValueError(f"unknown metric {name!r} (chrf or bleu)")


def reference_streams(references: Sequence[Sequence[str]]) -> list[list[str | None]]:
    """Per-row reference lists as sacrebleu's reference streams (one list per reference position);
    a row with fewer references has None in the later streams, as sacrebleu expects."""
    depth = max((len(r) for r in references), default=1)
    streams: list[list[str | None]] = [[refs[0] if refs else "" for refs in references]]
    for k in range(1, depth):
        streams.append([refs[k] if k < len(refs) and refs[k] else None for refs in references])
    return streams


@contextmanager
def _sacrebleu_seed(seed: int):
    """sacrebleu's significance module takes its seed from the SACREBLEU_SEED environment variable."""
    old = os.environ.get("SACREBLEU_SEED")
    os.environ["SACREBLEU_SEED"] = str(seed)
    try:
        yield
    finally:
        if old is None:
            os.environ.pop("SACREBLEU_SEED", None)
        else:
            os.environ["SACREBLEU_SEED"] = old


def paired_bootstrap(metric: str, hyps_a: Sequence[str], hyps_b: Sequence[str],
                     references: Sequence[Sequence[str]], resamples: int = RESAMPLES,
                     seed: int = SEED, labels: tuple[str, str] = ("A", "B")) -> PairedBootstrap:
    """Paired bootstrap resampling of the corpus metric (sacrebleu.significance.PairedTest, "bs"),
    A as the baseline; the difference's 95% interval from the same resamples."""
    import numpy as np
    from sacrebleu.significance import PairedTest, estimate_ci

    if not (len(hyps_a) == len(hyps_b) == len(references)) or not hyps_a:
        raise ValueError("the paired test needs the same, non-zero number of outputs in A, B and references")
    streams = reference_streams(references)
    m = _metric(metric)
    with _sacrebleu_seed(seed):
        test = PairedTest([(labels[0], list(hyps_a)), (labels[1], list(hyps_b))], {metric: m}, streams,
                          test_type="bs", n_samples=resamples)
        signatures, scores = test()
    (name, sig), = signatures.items()
    res_a, res_b = scores[name]

    # the same resamples, rebuilt: sacrebleu draws the row indices once per test with default_rng(seed)
    # and scores each resample from the summed per-row statistics (the calls triage.run.metrics
    # makes too, on the sacrebleu range pinned in pyproject.toml)
    m_a, m_b = _metric(metric), _metric(metric)
    stats_a = np.array(m_a._extract_corpus_statistics(list(hyps_a), streams), dtype="float32")
    stats_b = np.array(m_b._extract_corpus_statistics(list(hyps_b), streams), dtype="float32")
    idxs = np.random.default_rng(seed).choice(len(hyps_a), size=(resamples, len(hyps_a)), replace=True)
    draws_a = np.array([m_a._compute_score_from_stats(s.sum(0)).score for s in stats_a[idxs]])
    draws_b = np.array([m_b._compute_score_from_stats(s.sum(0)).score for s in stats_b[idxs]])
    mean_a, _ = estimate_ci(draws_a)
    mean_b, _ = estimate_ci(draws_b)
    agree = bool(math.isclose(mean_a, res_a.mean, rel_tol=0, abs_tol=1e-9)
                 and math.isclose(mean_b, res_b.mean, rel_tol=0, abs_tol=1e-9))
    diffs = np.sort(draws_b - draws_a)
    cut = resamples // 40
    interval = (float(diffs[cut]), float(diffs[resamples - cut - 1]))
    return PairedBootstrap(
        metric=metric, score_a=float(res_a.score), score_b=float(res_b.score),
        difference=float(res_b.score) - float(res_a.score), interval95=interval,
        p_value=float(res_b.p_value), mean_a=float(res_a.mean), half_width_a=float(res_a.ci),
        mean_b=float(res_b.mean), half_width_b=float(res_b.ci), resamples=resamples, seed=seed,
        signature=str(sig), draws_agree=agree,
    )
