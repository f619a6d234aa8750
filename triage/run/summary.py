"""summary.json as types: one Summary of dataclasses, turned into JSON only when a run folder is
written (``Summary.to_json``) and read back only by the run-folder reader (``Summary.from_json``).

The JSON keys and their order are fixed here and nowhere else; triage/run/summary.schema.json
describes the same shape for other programs. Study sections (widen, beam_curve, length_penalty,
where_lost, exact) are the studies' own typed sections (triage.studies.SECTIONS: WidenSection,
BeamCurveSection, LengthPenaltySection, WhereLostSection, ExactSection); this layer knows them
only as StudySection (the studies sit above it).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any, Protocol

from triage.run.reasons import sentence
from triage.run.verdicts import COMPARED, Verdict


class Action(StrEnum):
    """What the run recommends doing next."""

    WIDEN_BEAM = "widen-beam"
    FIX_MODEL = "fix-model"
    TUNE_LENGTH_PENALTY = "tune-length-penalty"
    INCONCLUSIVE = "inconclusive"


@dataclass
class Recommendation:
    action: Action
    because: str
    missing: list[str] | None = None  # the evidence that would settle it (absent when none is missing)

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"action": self.action.value, "because": self.because}
        if self.missing is not None:
            out["missing"] = list(self.missing)
        return out

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> Recommendation:
        return cls(Action(d["action"]), d["because"], d.get("missing"))


@dataclass
class Tool:
    name: str
    version: str

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "version": self.version}


@dataclass
class DataInfo:
    path: str | None
    sha256: str | None
    format: str | None
    rows: int
    outputs: str  # "decoded by triage" or "given"

    def to_json(self) -> dict[str, Any]:
        return {"path": self.path, "sha256": self.sha256, "format": self.format, "rows": self.rows,
                "outputs": self.outputs}


@dataclass
class OptionsInfo:
    """How failures were found and grouped (summary.json's "options")."""

    metric: str
    below: float | None                 # the threshold a row's metric must reach to count as correct (--accept-at)
    margin: float
    bucket_edges: list[int]
    bucket_by: str
    normalize: str = "none"             # text normalization before "correct" and the metric

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"metric": self.metric}
        if self.normalize != "none":
            out["normalize"] = self.normalize
        out.update({"below": self.below, "margin": self.margin, "bucket_edges": list(self.bucket_edges),
                    "bucket_by": self.bucket_by})
        return out


@dataclass
class SearchShare:
    """Search-side rows among the compared failed rows, with a 95% Wilson interval."""

    search: int
    compared: int
    share: float | None
    interval95: list[float | None]

    def to_json(self) -> dict[str, Any]:
        return {"search": self.search, "compared": self.compared, "share": self.share,
                "interval95": list(self.interval95)}


@dataclass
class Bucket:
    range: str
    rows: int
    failed: int
    counts: dict[str, int]
    search_share: float | None
    interval95: list[float | None]

    def to_json(self) -> dict[str, Any]:
        return {"range": self.range, "rows": self.rows, "failed": self.failed, "counts": dict(self.counts),
                "search_share": self.search_share, "interval95": list(self.interval95)}


@dataclass
class ScoreGap:
    """The score gap (reference score minus output score) of the compared rows; n 0: no other field."""

    n: int
    mean: float | None = None
    median: float | None = None
    min: float | None = None
    max: float | None = None

    def to_json(self) -> dict[str, Any]:
        if not self.n:
            return {"n": 0}
        return {"n": self.n, "mean": self.mean, "median": self.median, "min": self.min, "max": self.max}


@dataclass
class CorpusMetric:
    name: str
    score: float | None
    signature: str

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "score": self.score, "signature": self.signature}


@dataclass
class ForeignOutputs:
    """Failed rows whose output a rule of the run's settings forbids (the decoder cannot have written it)."""

    rows: int
    of_failed: int
    rules: dict[str, int]
    first_line: int | None

    def to_json(self) -> dict[str, Any]:
        return {"rows": self.rows, "of_failed": self.of_failed, "rules": dict(self.rules),
                "first_line": self.first_line}


@dataclass
class SkipKind:
    """One kind of skip reason (summary.json's skipped_reasons[code]): its rows and one sentence
    (triage.run.reasons.sentence); each row's own detail is in verdicts.csv's reason."""

    count: int
    sentence: str

    def to_json(self) -> dict[str, Any]:
        return {"count": self.count, "sentence": self.sentence}

    @classmethod
    def of(cls, code: str, value: Any) -> SkipKind:
        """From a count (as the run tallies it, or as an older summary.json wrote it) or {count, sentence}."""
        if isinstance(value, SkipKind):
            return value
        if isinstance(value, dict):
            return cls(int(value["count"]), str(value.get("sentence") or sentence(code)))
        return cls(int(value), sentence(code))


@dataclass
class Coverage:
    """How many failed rows the verdict mix rests on: the compared ones (search, model, tie) of all
    failed rows; skipped and blocked rows are failed but not compared. Derived from the counts."""

    failed: int
    compared: int
    skipped: int
    blocked: int
    share: float | None  # compared / failed (None: no failed row)

    @classmethod
    def of(cls, counts: dict[str, int]) -> Coverage:
        compared = sum(counts.get(v, 0) for v in COMPARED)
        skipped, blocked = counts.get(Verdict.SKIPPED, 0), counts.get(Verdict.BLOCKED, 0)
        failed = compared + skipped + blocked
        return cls(failed, compared, skipped, blocked, compared / failed if failed else None)

    def to_json(self) -> dict[str, Any]:
        return {"failed": self.failed, "compared": self.compared, "skipped": self.skipped, "blocked": self.blocked,
                "share": self.share}


STUDY_KEYS = ("length_penalty", "widen", "beam_curve", "where_lost", "exact", "reproduction")  # in order


class StudySection(Protocol):
    """A study's section of the summary (triage.studies.common.Section)."""

    def to_json(self) -> dict[str, Any]: ...


@dataclass
class Summary:
    """Everything summary.json holds, in its order. `recommendation` is None until decided
    (triage.decision.recommend, once per run); the study fields are None for studies not run."""

    tool: Tool
    model: dict[str, Any]          # what the model says of itself (spec, sha256, path, architecture, ...)
    data: DataInfo
    settings: dict[str, Any]       # DecoderSettings.to_dict()
    objective: str
    options: OptionsInfo
    counts: dict[str, int]         # verdict -> rows, in Verdict order (empty when no row was read)
    failed: int
    search_share: SearchShare
    buckets: list[Bucket]
    score_gap: ScoreGap
    corpus_metric: CorpusMetric
    skipped_reasons: dict[str, SkipKind]  # reason code (triage.run.reasons) -> rows and sentence, most first
    outputs_at_length_limit: int
    outputs_not_from_these_settings: ForeignOutputs
    signature: str | None = None   # the whole run's signature, when the run has one
    coverage: Coverage | None = None  # failed rows compared; always derived from `counts` (set on creation)
    recommendation: Recommendation | None = None
    sweeps_interrupted: bool | None = None  # set when the sweeps ran
    length_penalty: StudySection | None = None  # LengthPenaltySection
    widen: StudySection | None = None           # WidenSection
    beam_curve: StudySection | None = None      # BeamCurveSection
    where_lost: StudySection | None = None      # WhereLostSection
    exact: StudySection | None = None           # ExactSection
    reproduction: StudySection | None = None    # ReproductionSection (the outputs check, --check-rows)
    extra: dict[str, Any] = field(default_factory=dict)  # keys of a newer or other writer, kept as read

    def __post_init__(self) -> None:
        self.coverage = Coverage.of(self.counts)
        self.skipped_reasons = {k: SkipKind.of(k, v) for k, v in self.skipped_reasons.items()}  # counts -> kinds

    def studies(self) -> dict[str, StudySection]:
        """The study sections that ran, by summary key, in summary.json's order."""
        return {k: getattr(self, k) for k in STUDY_KEYS if getattr(self, k) is not None}

    def to_json(self) -> dict[str, Any]:
        """summary.json's content (JSON-ready apart from NaN, which the writer turns into null)."""
        out: dict[str, Any] = {
            "tool": self.tool.to_json(), "model": dict(self.model), "data": self.data.to_json(),
            "settings": dict(self.settings), "objective": self.objective,
        }
        if self.signature is not None:
            out["signature"] = self.signature
        out.update({
            "options": self.options.to_json(),
            "counts": dict(self.counts),
            "failed": self.failed,
            "search_share": self.search_share.to_json(),
            "buckets": [b.to_json() for b in self.buckets],
            "score_gap": self.score_gap.to_json(),
            "corpus_metric": self.corpus_metric.to_json(),
            "skipped_reasons": {k: SkipKind.of(k, v).to_json() for k, v in self.skipped_reasons.items()},
            "outputs_at_length_limit": self.outputs_at_length_limit,
            "outputs_not_from_these_settings": self.outputs_not_from_these_settings.to_json(),
        })
        self.coverage = Coverage.of(self.counts)  # the counts may have changed since the Summary was made
        out["coverage"] = self.coverage.to_json()
        if self.recommendation is not None:
            out["recommendation"] = self.recommendation.to_json()
        if self.sweeps_interrupted is not None:
            out["sweeps_interrupted"] = self.sweeps_interrupted
        for key, section in self.studies().items():
            out[key] = section if isinstance(section, dict) else section.to_json()  # a dict: kept as read
        out.update(self.extra)
        return out

    @classmethod
    def from_json(cls, d: dict[str, Any], sections: dict[str, Any] | None = None) -> Summary:
        """A Summary from summary.json's content. sections: summary key -> the study's section
        class (triage.studies.SECTIONS); a section without a class, or one whose shape its class
        cannot read, stays as read (a dict)."""
        sections = sections or {}
        known = {"tool", "model", "data", "settings", "objective", "signature", "options", "counts", "failed",
                 "search_share", "buckets", "score_gap", "corpus_metric", "skipped_reasons",
                 "outputs_at_length_limit", "outputs_not_from_these_settings", "coverage", "recommendation",
                 "sweeps_interrupted", *STUDY_KEYS}
        rec = d.get("recommendation")
        studies = {k: _read_section(sections.get(k), d[k]) for k in STUDY_KEYS if d.get(k) is not None}
        return cls(
            tool=Tool(**d["tool"]), model=dict(d.get("model") or {}), data=DataInfo(**d["data"]),
            settings=dict(d.get("settings") or {}), objective=d["objective"], options=OptionsInfo(**d["options"]),
            counts=dict(d["counts"]), failed=d["failed"], search_share=SearchShare(**d["search_share"]),
            buckets=[Bucket(**b) for b in d["buckets"]], score_gap=ScoreGap(**d["score_gap"]),
            corpus_metric=CorpusMetric(**d["corpus_metric"]), skipped_reasons=dict(d["skipped_reasons"]),
            outputs_at_length_limit=d["outputs_at_length_limit"],
            outputs_not_from_these_settings=ForeignOutputs(**d["outputs_not_from_these_settings"]),
            signature=d.get("signature"), recommendation=Recommendation.from_json(rec) if rec else None,
            sweeps_interrupted=d.get("sweeps_interrupted"), **studies,
            extra={k: v for k, v in d.items() if k not in known},
        )


def _read_section(cls: Any, value: Any) -> Any:
    if cls is None or not isinstance(value, dict):
        return value
    try:
        return cls.from_json(value)
    except (TypeError, ValueError, KeyError):
        return value  # a shape this version cannot read: kept as read, shown as a plain table
