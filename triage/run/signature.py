"""The run signature: one line naming everything besides the model and the data that decides a run's verdicts.

``DecoderSettings.signature()`` describes the decoder's objective only (summary.json's ``objective``).
A run's verdicts, buckets and corpus score also depend on the tool's version, the tie margin, the
failure rule, the bucket rule and the metric, so the run signature (summary.json's ``signature``)
joins them, each part named, with ``; ``:

    triage=0.1.0; objective=beam=4|penalty=power|alpha=1|max_new=16; margin=0.0001;
    fail=differs; buckets=ref-words:1,11,21,31,41; metric=chrf:nrefs:1|case:mixed|...|version:2.6.0

``metric`` ends with sacrebleu's own signature of the corpus score (which names sacrebleu's version).
Two runs of the same model (``model.sha256``) on the same data (``data.sha256``) with the same run
signature are the same run. Step sizes (``--chunk-rows``, ``--token-budget``) are left out:
they change scores in float32's last bits only, no verdict.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

from triage import __version__
from triage.settings import DecoderSettings

SEPARATOR = "; "


class RunRules(Protocol):
    """The options a run signature reads (TriageOptions has them)."""

    metric: str
    below: float | None
    margin: float
    edges: Sequence[int]
    bucket_by: str


def run_signature(settings: DecoderSettings, rules: RunRules, metric_signature: str,
                  version: str = __version__) -> str:
    """The whole run's signature; ``metric_signature`` is sacrebleu's (empty when no row was scored)."""
    from triage.run.metrics import higher_is_better

    norm = getattr(rules, "normalize", "none")
    fail = "differs" if norm == "none" else f"differs({norm})"
    if rules.below is not None:  # the threshold a failed row's metric does not reach
        fail += f",{rules.metric}{'<' if higher_is_better(rules.metric) else '>'}{float(rules.below)!r}"
    metric = f"{rules.metric}:{metric_signature}" if metric_signature else rules.metric
    parts = [
        f"triage={version}",
        f"objective={settings.signature()}",
        f"margin={float(rules.margin)!r}",  # repr: the shortest text that reads back as the same float
        f"fail={fail}",
        f"buckets={rules.bucket_by}:{','.join(str(int(e)) for e in rules.edges)}",
        f"metric={metric}",
    ]
    return SEPARATOR.join(parts)
