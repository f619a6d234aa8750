"""Two runs of the same dev set, side by side: what changed between them and what it bought.

``compare_runs(run_a, run_b)`` reads both folders (no model), matches rows by id and returns a
typed ``Comparison``; ``write_comparison`` writes compare.json and compare.html from it.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from triage import __version__
from triage.compare.load import RunFolder, load_run_folder
from triage.compare.stats import RESAMPLES, SEED, PairedBootstrap, Share, paired_bootstrap, share
from triage.errors import OptionError, TriageError
from triage.report.page import VERDICT_ORDER
from triage.run.verdicts import COMPARED

FORMAT = "triage-compare"
FORMAT_VERSION = 1
DEFAULT_LABELS = ("before", "after")
METRIC_NAMES = {"chrf": "chrF", "bleu": "BLEU"}
SIDE_NAMES = {"search": "search-side", "model": "model-side", "failed": "failed"}


class DataMismatchError(TriageError):
    """The two runs were made on different dev sets (and that was not allowed)."""


# ------------------------------------------------------------------------ the typed result
@dataclass(frozen=True)
class RunSide:
    """One run, as the comparison shows it."""

    label: str
    folder: str
    created: str | None
    command: str | None
    data_path: str | None
    data_sha256: str
    rows: int
    outputs: str | None            # "given" in the dev set, or decoded by triage
    model_path: str | None
    model_sha256: str | None
    model_fingerprint: str | None
    objective: str | None
    beam: int | None
    penalty: str | None
    alpha: float | None
    metric: str
    corpus_metric: float | None    # as the run itself reported it
    action: str                    # the run's recommendation
    because: str
    counts: dict[str, int]
    failed: int


@dataclass(frozen=True)
class Rows:
    """How the two runs' rows were matched (by id)."""

    same_data: bool
    matched: int
    only_in_a: int
    only_in_b: int
    only_in_a_ids: tuple[str, ...]     # the first 20 of each
    only_in_b_ids: tuple[str, ...]
    sources_differ: int                # matched rows whose source text differs
    references_differ: int             # matched rows whose (best) reference differs
    outputs_differ: int                # matched rows whose output differs


@dataclass(frozen=True)
class Transitions:
    """A's verdict (rows of the table) by B's verdict (columns), over the matched rows."""

    verdicts: tuple[str, ...]
    table: dict[str, dict[str, int]]
    rows: int
    unchanged: int
    counts_a: dict[str, int]   # the matched rows per verdict in A (the table's row totals)
    counts_b: dict[str, int]   # and in B (its column totals)

    @property
    def failed_a(self) -> int:
        return self.rows - self.counts_a["correct"]

    @property
    def failed_b(self) -> int:
        return self.rows - self.counts_b["correct"]


@dataclass(frozen=True)
class BucketSide:
    rows: int
    failed: Share      # failed rows of the bucket's rows
    search: Share      # search-side rows of the compared failed rows (search, model, tie)


@dataclass(frozen=True)
class BucketRow:
    range: str
    a: BucketSide
    b: BucketSide


@dataclass(frozen=True)
class ChangedRow:
    """A row fixed (failed in A, correct in B) or broken (correct in A, failed in B)."""

    id: str
    line_a: int | None
    line_b: int | None
    verdict_a: str
    verdict_b: str
    metric_a: float | None
    metric_b: float | None
    source: str
    reference: str
    output_a: str
    output_b: str


@dataclass(frozen=True)
class CorpusMetric:
    test: PairedBootstrap | None
    references: str          # where the references came from
    complete: bool           # every reference of every row was used
    note: str | None         # why there is no test, or what to bear in mind


@dataclass(frozen=True)
class Change:
    what: str        # beam, length-penalty, model, setting
    setting: str
    a: str
    b: str


@dataclass(frozen=True)
class FollowUp:
    """Whether B did what A's recommendation said, and what B's change achieved."""

    action: str                 # A's recommendation
    followed: bool | None       # None when A recommended no action
    verdict: str                # one sentence: followed or not, and how
    changes: tuple[Change, ...]
    target: str                 # the rows the change aims at: search-side, model-side or failed (in A)
    target_rows: int
    now_correct: int
    model_rows: int             # A's model-side rows (matched)
    model_rows_worse: int       # of them, lower sentence metric in B
    broken: int
    achieved: str               # one sentence with the numbers


@dataclass(frozen=True)
class Comparison:
    format: str
    format_version: int
    tool: dict[str, str]
    labels: tuple[str, str]
    a: RunSide
    b: RunSide
    rows: Rows
    transitions: Transitions
    buckets: tuple[BucketRow, ...]
    fixed: tuple[ChangedRow, ...]
    broken: tuple[ChangedRow, ...]
    corpus_metric: CorpusMetric
    follow_up: FollowUp
    notes: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """The comparison as JSON values (compare.json; described by compare.schema.json)."""
        return _plain(dataclasses.asdict(self))


def _plain(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


# ------------------------------------------------------------------------ reading the sides
def parse_labels(text: str | None) -> tuple[str, str]:
    if text is None:
        return DEFAULT_LABELS
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 2 or not all(parts):
        raise OptionError(f"--labels expects two names separated by a comma, e.g. before,after; got {text!r}")
    if parts[0] == parts[1]:
        raise OptionError(f"--labels: the two names must differ, got {text!r}")
    return parts[0], parts[1]


def _num(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _int(x: Any) -> int | None:
    v = _num(x)
    return int(v) if v is not None and v == int(v) else None


def _side(rf: RunFolder, label: str) -> RunSide:
    s, st, md, data = rf.summary, rf.settings, rf.model, rf.data
    rec = s.recommendation
    counts = {v: int(s.counts.get(v, 0)) for v in VERDICT_ORDER}
    return RunSide(
        label=label, folder=str(rf.path), created=rf.run_info.get("created"), command=rf.run_info.get("command"),
        data_path=data.path, data_sha256=str(data.sha256), rows=int(data.rows), outputs=data.outputs,
        model_path=md.get("path") or md.get("spec"), model_sha256=md.get("sha256"),
        model_fingerprint=md.get("fingerprint"), objective=s.objective, beam=_int(st.get("beam")),
        penalty=st.get("penalty"), alpha=_num(st.get("alpha")), metric=rf.metric,
        corpus_metric=_num(s.corpus_metric.score), action=str(rec.action) if rec else "none",
        because=rec.because if rec else "", counts=counts,
        failed=sum(n for v, n in counts.items() if v != "correct"),
    )


def _match(a: RunFolder, b: RunFolder, allow_different_data: bool) -> tuple[pd.DataFrame, Rows]:
    sha_a, sha_b = a.data.sha256, b.data.sha256
    same = sha_a == sha_b
    if not same and not allow_different_data:
        raise DataMismatchError(
            f"the runs come from different dev sets: {a.path} has data sha256 {sha_a}, {b.path} has {sha_b}",
            hint="pass --allow-different-data to match rows by id anyway")
    va, vb = a.verdicts, b.verdicts
    m = va.merge(vb, on="id", how="inner", suffixes=("_a", "_b"), sort=False)
    ids_a, ids_b = set(va["id"]), set(vb["id"])
    only_a = [i for i in va["id"] if i not in ids_b]
    only_b = [i for i in vb["id"] if i not in ids_a]
    if m.empty:
        raise DataMismatchError(f"no row id is in both runs ({a.path}: {len(va)} rows, {b.path}: {len(vb)} rows)")
    rows = Rows(
        same_data=same, matched=len(m), only_in_a=len(only_a), only_in_b=len(only_b),
        only_in_a_ids=tuple(only_a[:20]), only_in_b_ids=tuple(only_b[:20]),
        sources_differ=int((m["source_a"] != m["source_b"]).sum()),
        references_differ=int((m["reference_a"] != m["reference_b"]).sum()),
        outputs_differ=int((m["output_a"] != m["output_b"]).sum()),
    )
    return m, rows


# ------------------------------------------------------------------------ the parts
def transitions(m: pd.DataFrame) -> Transitions:
    order = tuple(VERDICT_ORDER)
    counts = m.groupby(["verdict_a", "verdict_b"]).size()
    table = {va: {vb: int(counts.get((va, vb), 0)) for vb in order} for va in order}
    counts_a = {va: sum(table[va].values()) for va in order}
    counts_b = {vb: sum(table[va][vb] for va in order) for vb in order}
    return Transitions(order, table, len(m), int((m["verdict_a"] == m["verdict_b"]).sum()), counts_a, counts_b)


def _bucket_side(part: pd.DataFrame, col: str) -> BucketSide:
    v = part[col]
    failed = int((v != "correct").sum())
    compared = int(v.isin(COMPARED).sum())
    return BucketSide(len(part), share(failed, len(part)), share(int((v == "search").sum()), compared))


def buckets(m: pd.DataFrame, a: RunFolder, b: RunFolder) -> tuple[BucketRow, ...]:
    """Per length bucket (each run's own bucket of the row), over the matched rows."""
    order = [bk.range for bk in a.summary.buckets]
    order += [r for r in (*m["bucket_a"].unique(), *m["bucket_b"].unique()) if r not in order]
    out = []
    for r in order:
        pa, pb = m[m["bucket_a"] == r], m[m["bucket_b"] == r]
        if len(pa) or len(pb):
            out.append(BucketRow(str(r), _bucket_side(pa, "verdict_a"), _bucket_side(pb, "verdict_b")))
    return tuple(out)


def _sentence(m: pd.DataFrame, a: RunFolder, b: RunFolder) -> tuple[pd.Series, pd.Series]:
    """Each matched row's sentence metric in A and in B, in A's metric (B's column when B used it too,
    else recomputed with sacrebleu against A's reference)."""
    from triage.run.metrics import sentence_scores

    name = a.metric
    col_a = name + "_a" if name + "_a" in m.columns else name
    sa = m[col_a].map(_num)
    if b.metric == name:
        col_b = name + "_b" if name + "_b" in m.columns else name
        sb = m[col_b].map(_num)
    else:
        sb = pd.Series(sentence_scores(name, m["output_b"].tolist(), [[r] for r in m["reference_a"]]),
                       index=m.index)
    return sa, sb


def _changed(m: pd.DataFrame, mask: pd.Series, sa: pd.Series, sb: pd.Series) -> tuple[ChangedRow, ...]:
    out = []
    for k in m.index[mask]:
        r = m.loc[k]
        out.append(ChangedRow(
            id=str(r["id"]), line_a=_int(r["line_a"]), line_b=_int(r["line_b"]), verdict_a=r["verdict_a"],
            verdict_b=r["verdict_b"], metric_a=sa[k], metric_b=sb[k], source=r["source_a"],
            reference=r["reference_a"], output_a=r["output_a"], output_b=r["output_b"]))
    return tuple(out)


def _data_references(rf: RunFolder, ids: list[str]) -> list[list[str]] | None:
    """Every reference of each row, from the run's data file when it is still there unchanged."""
    from triage.data.devset import read_devset

    path = rf.data.path
    if not path or not Path(path).is_file():
        return None
    try:
        dev = read_devset(path, fmt=rf.data.format)
    except (TriageError, OSError, ValueError):
        return None
    if dev.sha256 != rf.data.sha256:
        return None
    refs = {str(i): list(r) for i, r in zip(dev.frame["id"], dev.frame["references"], strict=True)}
    if not all(i in refs for i in ids):
        return None
    return [refs[i] for i in ids]


def corpus_metric(m: pd.DataFrame, a: RunFolder, labels: tuple[str, str], resamples: int = RESAMPLES,
                  seed: int = SEED) -> CorpusMetric:
    ids = m["id"].tolist()
    refs = _data_references(a, ids)
    if refs is not None:
        where = f"every reference of each row, read from {a.data.path} (sha256 as in {labels[0]}'s run)"
        complete, note = True, None
    else:
        refs = [[r] for r in m["reference_a"]]
        several = int((m["n_refs_a"].map(_int).fillna(1) > 1).sum()) if "n_refs_a" in m.columns else 0
        where = f"the reference column of {labels[0]}'s verdicts.csv"
        complete = several == 0
        note = None if complete else (
            f"verdicts.csv keeps only the best reference of each row; {several} rows have several, and are "
            "scored here against that one only, so the scores can differ from the runs' own corpus metric "
            "(the data file was not found unchanged at its path)")
    test = paired_bootstrap(a.metric, m["output_a"].tolist(), m["output_b"].tolist(), refs, resamples, seed, labels)
    return CorpusMetric(test, where, complete, note)


def _setting_text(st: dict[str, Any], key: str) -> str:
    v = st.get(key)
    return "—" if v is None else str(v)


def changes(a: RunFolder, b: RunFolder) -> tuple[Change, ...]:
    out = []
    sa, sb = a.settings, b.settings
    if sa.get("beam") != sb.get("beam"):
        out.append(Change("beam", "beam width", _setting_text(sa, "beam"), _setting_text(sb, "beam")))
    pa = f"{sa.get('penalty')} {sa.get('alpha')}"
    pb = f"{sb.get('penalty')} {sb.get('alpha')}"
    if pa != pb:
        out.append(Change("length-penalty", "length penalty (form, alpha)", pa, pb))
    for key in ("fingerprint", "sha256"):
        ka, kb = a.model.get(key), b.model.get(key)
        if ka and kb and ka != kb:
            out.append(Change("model", f"model {key}", str(ka), str(kb)))
            break
    for key in sorted(set(sa) | set(sb)):
        if key not in ("beam", "penalty", "alpha", "origin") and sa.get(key) != sb.get(key):
            out.append(Change("setting", key, _setting_text(sa, key), _setting_text(sb, key)))
    return tuple(out)


ACTION_WORDS = {
    "widen-beam": "widen the beam",
    "fix-model": "work on the model",
    "tune-length-penalty": "tune the length penalty",
    "inconclusive": "no clear action",
    "none": "nothing (the run holds no recommendation)",
}


def _short(h: str) -> str:
    return h[:12] + "…" if len(h) > 13 else h


def _fmt_signed(x: float) -> str:
    return f"{x:+.2f}"


def follow_up(m: pd.DataFrame, a_side: RunSide, ch: tuple[Change, ...], sa: pd.Series, sb: pd.Series,
              metric: CorpusMetric, labels: tuple[str, str]) -> FollowUp:
    kinds = {c.what: c for c in ch}
    action = a_side.action
    beam = kinds.get("beam")
    wider = beam is not None and _int(beam.b) is not None and _int(beam.a) is not None and _int(beam.b) > _int(beam.a)
    followed = {"widen-beam": wider, "tune-length-penalty": "length-penalty" in kinds,
                "fix-model": "model" in kinds}.get(action)
    # what B's change aims at: the model's rows for a new model, the search-side rows for a wider beam
    if "model" in kinds:
        c = kinds["model"]
        what, target = f"changed the model ({_short(c.a)} -> {_short(c.b)})", "model"
    elif wider:
        what, target = f"widened the beam {beam.a} -> {beam.b}", "search"
    elif beam is not None:
        what, target = f"narrowed the beam {beam.a} -> {beam.b}", "failed"
    elif "length-penalty" in kinds:
        c = kinds["length-penalty"]
        what, target = f"changed the length penalty {c.a} -> {c.b}", "failed"
    elif ch:
        what, target = "changed other settings (" + ", ".join(c.setting for c in ch) + ")", "failed"
    else:
        what, target = "kept the model and settings", "failed"
    va, vb = m["verdict_a"], m["verdict_b"]
    in_target = (va != "correct") if target == "failed" else (va == target)
    now_correct = int((in_target & (vb == "correct")).sum())
    model_rows = va == "model"
    worse = int((model_rows & (sb < sa - 1e-9)).sum())
    broken = int(((va == "correct") & (vb != "correct")).sum())
    parts = [f"{what[0].upper()}{what[1:]}: {now_correct} of {int(in_target.sum())} {SIDE_NAMES[target]} rows now correct"]
    t = metric.test
    if t is not None:
        lo, hi = t.interval95
        parts.append(f"{METRIC_NAMES.get(t.metric, t.metric)} {_fmt_signed(t.difference)} (95% interval {_fmt_signed(lo)} to "
                     f"{_fmt_signed(hi)}, p = {t.p_value:.3f})")
    parts.append(f"{worse} model-side row{'s' if worse != 1 else ''} worse")
    if broken:
        parts.append(f"{broken} correct row{'s' if broken != 1 else ''} broken")
    achieved = ", ".join(parts)
    said = ACTION_WORDS.get(action, action)
    if followed is None:
        verdict = f"{labels[0]} recommended {said}; {labels[1]} {what}."
    elif followed:
        verdict = f"The recommendation of {labels[0]} ({said}) was followed: {labels[1]} {what}."
    else:
        verdict = f"The recommendation of {labels[0]} ({said}) was not followed: {labels[1]} {what} instead."
    return FollowUp(action, followed, verdict, ch, SIDE_NAMES[target], int(in_target.sum()), now_correct,
                    int(model_rows.sum()), worse, broken, achieved)


# ------------------------------------------------------------------------ the entry point
def compare_runs(run_a: str | Path, run_b: str | Path, labels: tuple[str, str] = DEFAULT_LABELS,
                 allow_different_data: bool = False, resamples: int = RESAMPLES, seed: int = SEED) -> Comparison:
    """Compare two run folders (A before, B after): rows matched by id, same dev set required
    unless allow_different_data. Raises RunFolderError / DataMismatchError (one line each)."""
    a, b = load_run_folder(run_a), load_run_folder(run_b)
    for run, folder in ((a, run_a), (b, run_b)):
        if run.metric in ("wer", "cer"):  # the paired test below is sacrebleu's (chrF, BLEU)
            raise OptionError(f"the run was measured with {run.metric}; triage compare takes chrf or bleu runs only "
                              "(its paired bootstrap is sacrebleu's)", path=str(folder),
                              hint="compare the two runs' summary.json corpus_metric by hand for now")
    m, rows = _match(a, b, allow_different_data)
    side_a, side_b = _side(a, labels[0]), _side(b, labels[1])
    sa, sb = _sentence(m, a, b)
    metric = corpus_metric(m, a, labels, resamples, seed)
    ch = changes(a, b)
    fixed = _changed(m, (m["verdict_a"] != "correct") & (m["verdict_b"] == "correct"), sa, sb)
    broken = _changed(m, (m["verdict_a"] == "correct") & (m["verdict_b"] != "correct"), sa, sb)
    notes = []
    if not rows.same_data:
        notes.append(f"The runs come from different dev sets (data sha256 {side_a.data_sha256} and "
                     f"{side_b.data_sha256}); rows are matched by id: {rows.matched} matched, {rows.only_in_a} only "
                     f"in {labels[0]}, {rows.only_in_b} only in {labels[1]} (those are left out of every table), "
                     f"{rows.sources_differ} matched rows with a different source.")
    elif rows.outputs_differ == 0:
        notes.append("Both runs triaged the same outputs (no output differs): any change is in how they "
                     "were scored, not in what was decoded.")
    if a.metric != b.metric:
        notes.append(f"The runs used different metrics ({a.metric}, {b.metric}); both are measured here "
                     f"with {a.metric}.")
    oa, ob = a.summary.options, b.summary.options
    for key, what in (("below", "failure threshold"), ("margin", "tie margin"), ("bucket_edges", "length buckets"),
                      ("bucket_by", "length measure")):
        xa, xb = getattr(oa, key, None), getattr(ob, key, None)
        if xa != xb:
            notes.append(f"The {what} differs ({xa} in {labels[0]}, {xb} in {labels[1]}).")
    t = metric.test
    if t is not None and side_a.corpus_metric is not None and metric.complete and rows.same_data \
            and abs(t.score_a - side_a.corpus_metric) > 1e-6:
        notes.append(f"{labels[0]}'s corpus {t.metric} recomputed here ({t.score_a:.4f}) differs from the run's "
                     f"own ({side_a.corpus_metric:.4f}).")
    if t is not None and not t.draws_agree:
        notes.append("The rebuilt resamples do not give sacrebleu's resampled means (another sacrebleu "
                     "version?): the interval of the difference is from a paired bootstrap of its own.")
    return Comparison(
        format=FORMAT, format_version=FORMAT_VERSION, tool={"name": "triage", "version": __version__},
        labels=labels, a=side_a, b=side_b, rows=rows, transitions=transitions(m), buckets=buckets(m, a, b),
        fixed=fixed, broken=broken, corpus_metric=metric,
        follow_up=follow_up(m, side_a, ch, sa, sb, metric, labels), notes=tuple(notes),
    )


def summary_paragraph(c: Comparison) -> str:
    """One paragraph for the terminal."""
    la, lb = c.labels
    r, f, tr = c.rows, c.follow_up, c.transitions
    data = "the same dev set" if r.same_data else "different dev sets, matched by id"
    text = (f"{la} ({c.a.folder}) against {lb} ({c.b.folder}): {r.matched} rows, {data}. "
            f"Failed rows {tr.failed_a} -> {tr.failed_b}: {len(c.fixed)} fixed, {len(c.broken)} broken; "
            f"search-side {tr.counts_a['search']} -> {tr.counts_b['search']}, model-side {tr.counts_a['model']} -> "
            f"{tr.counts_b['model']}. ")
    t = c.corpus_metric.test
    if t is not None:
        lo, hi = t.interval95
        text += (f"Corpus {METRIC_NAMES.get(t.metric, t.metric)} {t.score_a:.2f} -> {t.score_b:.2f} ({_fmt_signed(t.difference)}, 95% interval "
                 f"{_fmt_signed(lo)} to {_fmt_signed(hi)}, paired bootstrap p = {t.p_value:.3f}). ")
    text += f"{f.verdict} {f.achieved}."
    return text
