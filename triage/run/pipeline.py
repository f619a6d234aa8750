"""The main job as one function call: dev set -> scores -> verdicts -> analysis.

    from triage import load_model, read_devset, run_triage
    model = load_model("sample_data/model")
    result = run_triage(model, read_devset("sample_data/devset.tsv"))
    result.verdicts        # one row per input row, in input order (pandas DataFrame)
    result.buckets         # counts per length bucket with the search share's 95% interval
    result.summary         # a Summary (triage.run.summary); summary.json is result.summary.to_json()

The dev set goes through in steps of ``options.chunk_rows`` rows: decode (when it has no
outputs), find the failed rows, score them (through the score cache), label every row. The
summary is built from running totals (a Tally), never from all rows at once. So a dev set of
any size can stream through: ``run_triage(model, stream_devset(path), keep=False,
on_step=writer.add_step)`` hands each step's rows on (triage.rundir.writer.RunWriter appends them to the
run's files) and keeps none of them; memory is then bounded by the step size, plus 8 bytes per
compared row here (the score gaps, for their median) and 8 in the page (for its histogram).

Writing files (verdicts.csv, summary.json, tokens.jsonl, report.html) is triage.rundir's job; the
recommendation is decided once per run by triage.decision (triage.workflow.triage_run does both).
"""

from __future__ import annotations

import math
from array import array
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import pandas as pd

from triage import __version__
from triage.errors import check_at_least_one
from triage.models.describe import model_settings
from triage.run.analysis import (
    DEFAULT_EDGES,
    assign_bucket,
    bucket_table_from_counts,
    search_share,
)
from triage.run.metrics import CorpusStats, higher_is_better, reaches, sentence_scores
from triage.run.progress import bar as _bar
from triage.run.signature import run_signature
from triage.run.summary import (
    Bucket,
    CorpusMetric,
    DataInfo,
    ForeignOutputs,
    OptionsInfo,
    ScoreGap,
    SearchShare,
    Summary,
    Tool,
)
from triage.run.verdicts import COMPARED, FAILED, VERDICTS, decide, matches_any
from triage.scoring.scorer import (
    ScoreRequest,
    TargetScore,
    plan_target,
    score_requests,
    source_problem,
    source_problem_kind,
    target_capacity_problem,
)
from triage.settings import DecoderSettings

DEFAULT_MARGIN = 1e-4


@dataclass
class TriageOptions:
    """How failures are found and grouped (the objective itself is in DecoderSettings)."""

    metric: str = "chrf"
    #: a row that differs from every reference still counts as correct when its sentence metric reaches this:
    #: at least accept_at for chrF / BLEU, at most accept_at for WER / CER (the CLI's --accept-at; --below)
    accept_at: float | None = None
    below: float | None = None          # the older name of accept_at (both hold the same value)
    #: text normalization of references and outputs before "correct" and the metric (triage.run.metrics)
    normalize: str = "none"
    margin: float = DEFAULT_MARGIN
    edges: tuple[int, ...] = DEFAULT_EDGES
    bucket_by: str = "ref-words"
    token_budget: int = 4096
    progress: bool = True
    cache_dir: str | None = None        # score cache folder (None: no cache)
    chunk_rows: int = 1000              # dev-set rows per step: decoded, scored, cached and written together

    def __post_init__(self) -> None:
        from triage.errors import OptionError
        from triage.run.metrics import NORMALIZATIONS

        if self.accept_at is not None and self.below is not None and self.accept_at != self.below:
            raise OptionError(f"accept_at ({self.accept_at:g}) and its older name below ({self.below:g}) disagree",
                              hint="give one of them")
        threshold = self.accept_at if self.accept_at is not None else self.below
        self.accept_at = self.below = threshold
        if self.normalize not in NORMALIZATIONS:
            raise OptionError(f"unknown normalization {self.normalize!r}", hint="use one of: " + ", ".join(NORMALIZATIONS))


@dataclass
class TriageResult:
    verdicts: pd.DataFrame | None       # None when run with keep=False (the rows went to on_step)
    buckets: pd.DataFrame
    summary: Summary                    # typed; summary.json is summary.to_json()
    tokens: list[dict[str, Any]]
    settings: DecoderSettings
    options: TriageOptions
    scores: dict[int, tuple[list[TargetScore], TargetScore]] = field(default_factory=dict, repr=False)
    cache: dict[str, int] | None = None  # rows from the score cache / scored now (not part of summary.json)


@dataclass
class ChunkResult:
    """One step of a run: its rows' verdicts (input order), token records and scores."""

    offset: int                         # dev-set index of the step's first row
    verdicts: pd.DataFrame
    tokens: list[dict[str, Any]]
    scores: dict[int, tuple[list[TargetScore], TargetScore]]  # dev-set row index -> scores (failed rows)
    outputs: list[str]
    references: list[list[str]]
    decoded: bool                       # some outputs were decoded here
    foreign: dict[str, list[int]] = field(default_factory=dict)  # rule -> lines of outputs it forbids


class Tally:
    """The running totals summary.json is built from, added to one step at a time."""

    def __init__(self, options: TriageOptions):
        self.rows = 0
        self.counts = dict.fromkeys(VERDICTS, 0)
        self.by_bucket: dict[str, dict[str, int]] = {}
        self.gaps = array("d")              # score gap of every compared row, in input order
        self.skipped: dict[str, int] = {}   # reason code -> rows, in order of first appearance
        self.at_limit = 0
        self.corpus = CorpusStats(options.metric, options.normalize)
        self.decoded = False
        self.foreign: dict[str, int] = {}   # rule -> failed rows whose output it forbids
        self.foreign_line: int | None = None  # the first such row's line

    def add(self, part: ChunkResult) -> None:
        v = part.verdicts
        self.rows += len(v)
        for verdict, bucket in zip(v["verdict"], v["bucket"], strict=True):
            self.counts[verdict] += 1
            self.by_bucket.setdefault(bucket, dict.fromkeys(VERDICTS, 0))[verdict] += 1
        self.gaps.extend(float(x) for x in v.loc[v["verdict"].isin(COMPARED), "score_gap"])
        for code in v.loc[v["verdict"] == "skipped", "reason_code"]:
            self.skipped[code] = self.skipped.get(code, 0) + 1
        self.at_limit += int(v["out_hit_limit"].sum())
        self.corpus.add(part.outputs, part.references)
        self.decoded = self.decoded or part.decoded
        for rule, lines in part.foreign.items():
            self.foreign[rule] = self.foreign.get(rule, 0) + len(lines)
        if part.foreign and self.foreign_line is None:  # steps come in input order: the first step's smallest
            self.foreign_line = min(min(lines) for lines in part.foreign.values())


class ScoringInterrupted(KeyboardInterrupt):
    """Ctrl-C during a run; the failed rows of the finished steps were scored (and cached) before it."""

    def __init__(self, scored: int, rows_done: int, rows_total: int | None):
        of = f" of {rows_total}" if rows_total is not None else ""
        super().__init__(f"interrupted after scoring {scored} failed rows in the first {rows_done}{of} rows")
        self.scored, self.rows_done, self.rows_total = scored, rows_done, rows_total


def _frames(devset: Any, chunk_rows: int) -> tuple[Iterator[pd.DataFrame], int | None]:
    """The dev set in steps of chunk_rows rows, and its row count when known beforehand."""
    from triage.data.devset import DevSet, DevSetStream

    if isinstance(devset, DevSetStream):  # read from disk step by step
        return devset.chunks(chunk_rows), devset.rows
    frame = (devset.frame if isinstance(devset, DevSet) else devset).reset_index(drop=True)
    steps = (frame.iloc[k : k + chunk_rows].reset_index(drop=True) for k in range(0, len(frame), chunk_rows))
    return steps, len(frame)


def run_triage(
    model: Any,
    devset: Any,
    settings: DecoderSettings | None = None,
    options: TriageOptions | None = None,
    *,
    model_info: dict[str, Any] | None = None,
    keep: bool = True,
    on_step: Callable[[ChunkResult], None] | Sequence[Callable[[ChunkResult], None]] = (),
    pool: Any = None,
) -> TriageResult:
    """Triage a dev set: a DevSet from read_devset, a DataFrame with id, source, references,
    output, or a DevSetStream from stream_devset.

    on_step: called with each step's ChunkResult, in input order (e.g. triage.rundir.writer.RunWriter.add_step,
    which appends the rows to the run's files). keep=False keeps no rows (result.verdicts is None,
    result.scores empty): memory then no longer grows with the dev set. pool: scores (and decodes)
    each step's planned batches on other processes (triage.cluster's WorkerPool); the steps, the
    batches and so every number stay as they are here.
    """
    options = options or TriageOptions()
    settings = settings or model_settings(model)
    check_at_least_one("chunk_rows", options.chunk_rows)
    steps, total = _frames(devset, options.chunk_rows)
    audio = _audio_sources(model, devset)
    if audio is not None and options.bucket_by.startswith("source"):
        from triage.errors import OptionValueError

        raise OptionValueError("bucket_by", f"{options.bucket_by} does not apply to audio sources; use ref-words or "
                               "ref-tokens")
    consumers = [on_step] if callable(on_step) else list(on_step)
    tally = Tally(options)
    parts: list[pd.DataFrame] = []
    tokens: list[dict[str, Any]] = []
    kept: dict[int, tuple[list[TargetScore], TargetScore]] = {}
    cache = _open_cache(model, settings, options)
    counts = {"rows": 0, "scored": 0}  # rows of the steps scored so far, and their failed rows
    done = 0
    try:
        with _bar(total, "triage", options.progress) as bar:
            for frame in steps:
                if audio is not None:
                    audio.check(frame)
                part = _triage_step(model, frame, settings, options, done, cache, counts, bar.update, pool)
                tally.add(part)
                for consume in consumers:
                    consume(part)
                if keep:
                    parts.append(part.verdicts)
                    tokens.extend(part.tokens)
                    kept.update(part.scores)
                done += len(frame)
    except KeyboardInterrupt:
        raise ScoringInterrupted(counts["scored"], counts["rows"], total) from None
    finally:
        if cache is not None:
            cache.close()
    buckets = bucket_table_from_counts(tally.by_bucket, options.edges) if tally.rows else pd.DataFrame()
    summary = _summary(tally, buckets, settings, options, devset, model, model_info)
    verdicts = None
    if keep:
        verdicts = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0] if parts else pd.DataFrame()
    stats = {"hits": cache.hits, "misses": cache.misses} if cache is not None else None
    return TriageResult(verdicts, buckets, summary, tokens, settings, options, kept, stats)


class _Audio:
    """The audio sources of a run (a model with the AudioSources capability): relative paths start at the
    dev-set file's folder; each step's files are checked before anything is done with them."""

    def __init__(self, model, devset):
        from triage.data.audio import devset_folder

        self.model = model
        path = getattr(devset, "path", None)
        self.name = path or "dev set"
        if path:  # a frame without a file (a study's re-run of some rows) keeps the folder the run set
            model.use_audio_folder(devset_folder(path))

    def check(self, frame: pd.DataFrame) -> None:
        """An InputError (dev-set file, line, the audio path, what is wrong) for the step's first bad clip."""
        from triage.data.audio import resolve
        from triage.errors import InputError

        lines = frame["line"].tolist() if "line" in frame else [None] * len(frame)
        for source, line in zip(frame["source"].tolist(), lines, strict=True):
            problem = self.model.audio_problem(source)
            if problem:
                path = resolve(source, self.model.audio_folder)
                raise InputError(f"audio {source.strip()!r} ({path}): {problem}", path=self.name,
                                 line=int(line) if line is not None else None,
                                 hint="every source must name a readable audio file, relative to the dev-set file")


def check_audio(model, devset, chunk_rows: int = 10000) -> None:
    """For a model whose sources are audio: read every row's clip information once, before anything is
    scored, and raise the first bad one (missing, unreadable, empty, longer than the model's window) as
    an InputError naming the dev-set file, the line and the audio path. Nothing to do for a text model."""
    audio = _audio_sources(model, devset)
    if audio is None:
        return
    steps, _ = _frames(devset, chunk_rows)
    for frame in steps:
        audio.check(frame)


def _audio_sources(model, devset) -> _Audio | None:
    from triage.models.api import capabilities

    return _Audio(model, devset) if capabilities(model).audio_sources else None


def _triage_step(model, frame: pd.DataFrame, settings: DecoderSettings, options: TriageOptions, offset: int,
                 cache, counts: dict[str, int], progress: Callable[[int], Any] = lambda k: None,
                 pool: Any = None) -> ChunkResult:
    """One step: rows offset .. offset + len(frame) - 1 of the dev set. `progress(k)` is told
    of each row finished (rows to decode as they are decoded, the others at the end); `counts`
    of the step's rows and failed rows the moment their scores are committed to the cache."""
    n = len(frame)
    audio = _is_audio(model)  # sources are audio files: verdicts.csv gets each clip's duration
    sources = [settings.source_prefix + s for s in frame["source"].tolist()]
    references = [list(r) for r in frame["references"].tolist()]
    src_ids = model.tokenize_sources(sources) if n else []

    outputs = frame["output"].tolist() if "output" in frame else [None] * n
    todo = [i for i, o in enumerate(outputs) if o is None]
    if todo:
        from triage.decoding.decode import decode

        dec = decode(model, settings, [src_ids[i] for i in todo], progress=progress, pool=pool)
        for i, d in zip(todo, dec, strict=True):
            outputs[i] = d.text

    # ---- which rows failed (after the text normalization; the scored texts stay as they are)
    how = options.normalize
    metric_values = sentence_scores(options.metric, outputs, references, normalize=how) if n else []
    failed = []
    for i in range(n):
        wrong = not matches_any(outputs[i], references[i], normalize=how)
        if wrong and options.accept_at is not None:
            wrong = not reaches(options.metric, metric_values[i], options.accept_at)
        failed.append(wrong)

    # ---- score the failed rows: every reference and the output, one encoder pass per row
    fail_idx = [i for i in range(n) if failed[i]]
    requests = []
    limit = settings.limit_new_tokens()
    unscorable: dict[int, tuple[Problem | None, list[Problem | None]]] = {}  # row -> (source, target problems)
    breaches: dict[int, tuple[str, str]] = {}  # row -> (the rule its output breaks, the facts for the reason)
    for i in fail_idx:
        refs = model.tokenize_targets(references[i])
        out = model.tokenize_targets([outputs[i]])[0]
        targets = refs + [out]
        # a target of exactly `limit` tokens can only come out of the decoder as a hypothesis stopped at
        # the length limit (no end token): score it that way, flagged
        no_end = [len(t) >= limit for t in targets]
        requests.append(ScoreRequest(src_ids[i], targets, no_end))
        src_problem = _source_problem(model, src_ids[i])
        problems = [src_problem or _target_problem(model, text, ids, no_end_k, limit)
                    for text, ids, no_end_k in zip(references[i] + [outputs[i]], targets, no_end, strict=True)]
        if any(problems):
            unscorable[i] = (src_problem, problems)
        # the decoder's rules come before the model's capacity and the tokenizer: an output longer than
        # the length limit is counted under the rule whatever else is wrong with it
        labels, _, rule = plan_target(out, model.end_id, limit, no_end[-1])
        if rule is not None:
            facts = f"{len(labels)} tokens with the end token, the limit is {limit}"
            also = src_problem[1] if src_problem else f"output: {problems[-1][1]}" if problems[-1] else None
            breaches[i] = (rule, facts + (f"; also {also}" if also else ""))

    def committed() -> None:
        counts["rows"] += n
        counts["scored"] += len(fail_idx)

    scored = _score_rows(model, settings, options, cache, requests, [unscorable.get(i) for i in fail_idx],
                         committed, pool)

    # ---- verdicts, one row per input row in input order
    rows: list[dict[str, Any]] = []
    tokens: list[dict[str, Any]] = []
    kept: dict[int, tuple[list[TargetScore], TargetScore]] = {}
    foreign: dict[str, list[int]] = {}
    by_row = dict(zip(fail_idx, scored, strict=True))
    ids, lines = frame["id"].tolist(), frame["line"].tolist() if "line" in frame else None
    for i in range(n):
        row: dict[str, Any] = {"id": ids[i], "line": int(lines[i]) if lines is not None else offset + i + 1}
        ref_texts = references[i]
        best = 0
        if not failed[i]:
            reach = ">=" if higher_is_better(options.metric) else "<="
            row.update(verdict="correct", reason="output matches a reference" if matches_any(outputs[i], ref_texts,
                                                                                           normalize=how)
                       else f"{options.metric} {metric_values[i]:.1f} {reach} {options.accept_at:g}", reason_code="")
            ref_s = out_s = None
        else:
            targets = by_row[i]
            ref_s, out_s = targets[:-1], targets[-1]
            if i in breaches:
                out_s = _breach(out_s, *breaches[i])
            v = decide(ref_s, out_s, options.margin)
            src_problem = unscorable[i][0] if i in unscorable else None
            if v.verdict == "skipped" and src_problem and not v.code.startswith("rule:"):
                v.code, v.reason = src_problem
            if out_s.scored and out_s.blocked_rule is not None:  # the decoder could not have written it
                foreign.setdefault(out_s.blocked_rule, []).append(row["line"])
            row.update(verdict=v.verdict.value, reason=v.reason, reason_code=v.code)
            best = v.best_ref if v.best_ref is not None else 0
            kept[offset + i] = (ref_s, out_s)
        r = ref_s[best] if ref_s else None
        row.update(
            ref_logprob=_num(r.logprob_sum) if r else math.nan,
            out_logprob=_num(out_s.logprob_sum) if out_s else math.nan,
            ref_len=r.length if r and r.scored else pd.NA,
            out_len=out_s.length if out_s and out_s.scored else pd.NA,
            ref_score=_num(r.score) if r else math.nan,
            out_score=_num(out_s.score) if out_s else math.nan,
        )
        row["score_gap"] = row["ref_score"] - row["out_score"] if out_s and r else math.nan
        row["out_hit_limit"] = bool(out_s.hit_limit) if out_s else False
        row["best_ref"] = best + 1
        row["n_refs"] = len(ref_texts)
        row["ref_words"] = len(ref_texts[best].split())
        row["out_words"] = len(outputs[i].split())
        row[options.metric] = round(metric_values[i], 6)
        row["source"] = frame["source"].iat[i]
        if audio:
            row["audio_seconds"] = _seconds(model.audio_seconds(row["source"]))
        row["reference"] = ref_texts[best]
        row["output"] = outputs[i]
        rows.append(row)
        if out_s is not None:
            tokens.append(_token_record(model, ids[i], r, out_s))

    verdicts = pd.DataFrame(rows)
    if n:
        verdicts.insert(verdicts.columns.get_loc("ref_words"), "bucket_length",
                        _bucket_lengths(model, options.bucket_by, frame, references, verdicts))
        verdicts.insert(verdicts.columns.get_loc("bucket_length"), "bucket",
                        [assign_bucket(int(x), options.edges) for x in verdicts["bucket_length"]])
    progress(n - len(todo))
    return ChunkResult(offset, verdicts, tokens, kept, outputs, references, bool(todo), foreign)


def _is_audio(model) -> bool:
    from triage.models.api import capabilities

    return capabilities(model).audio_sources


def _seconds(value: float | None) -> float:
    return round(float(value), 3) if value is not None else math.nan


def _special_ids(model) -> set[int]:
    return {x for x in (model.start_id, model.end_id, model.pad_id) if x is not None}


Problem = tuple[str, str]  # (reason code, the row's reason text)


def _breach(out: TargetScore, rule: str, detail: str) -> TargetScore:
    """The output's score marked as one the decoder's rule forbids, with the facts of the row."""
    if out.scored:
        return replace(out, blocked_rule=out.blocked_rule or rule, detail=detail)
    return TargetScore(list(out.ids), [], math.nan, out.length, float("-inf"), False, rule, detail=detail)


def _source_problem(model, ids: list[int]) -> Problem | None:
    """Why a source cannot be scored: it holds no token but special ones, or scoring's own source
    check (empty, too long) fails."""
    if ids and not set(ids) - _special_ids(model):
        return "source:special-only", "source: no tokens after tokenization apart from special ones " + _pieces(
            model, ids)
    problem = source_problem(model, ids)
    return (f"source:{source_problem_kind(model, ids)}", f"source: {problem}") if problem else None


def _target_problem(model, text: str, ids: list[int], no_end: bool, limit: int) -> Problem | None:
    """Why a reference or output cannot be scored fairly: the tokenizer lost part of its text, or
    it is longer than the model's positions.

    An unknown token stands for text the model cannot write, so its score says nothing about
    the text; a special token inside (an end token written as text) ends or breaks the
    sequence the decoder would emit. Either way the target is skipped, never scored as is.
    An empty output (the decoder ended at once) stays scorable: its score is the end token's.
    """
    unk = model.unk_id
    if unk is not None and unk in ids:
        return "unknown-tokens", "unknown to the tokenizer: " + _unknown_parts(model, text, unk)
    special = [t for t in ids if t in _special_ids(model)]
    if special and len(special) == len(ids):
        return "special-only", "no tokens after tokenization apart from special ones " + _pieces(model, special)
    if special:
        return "special-tokens", "holds special tokens the decoder never writes inside a sequence " + _pieces(
            model, special)
    labels, _, _ = plan_target(ids, model.end_id, limit, no_end)
    problem = target_capacity_problem(model, labels)
    return ("too-long-for-model", problem) if problem else None


def _pieces(model, ids: list[int]) -> str:
    return "(" + ", ".join(repr(p) for p in dict.fromkeys(model.token_strings(ids))) + ")"


def _unknown_parts(model, text: str, unk: int, most: int = 5) -> str:
    """The words of `text` the tokenizer maps to the unknown token; inside a word, the characters
    that are unknown on their own when only some are."""
    words = list(dict.fromkeys(text.split()))
    found: list[str] = []
    for word, ids in zip(words, model.tokenize_targets(words), strict=True):
        if unk not in ids:
            continue
        bad: list[str] = []
        if len(ids) > 1:  # the word splits into pieces: name the characters that have none
            chars = list(dict.fromkeys(word))
            bad = [c for c, c_ids in zip(chars, model.tokenize_targets(chars), strict=True) if unk in c_ids]
        found.extend(bad if bad and len(bad) < len(word) else [word])
    found = list(dict.fromkeys(found))
    if not found:
        return "unknown tokens (no single word shows them)"
    more = f" and {len(found) - most} more" if len(found) > most else ""
    return ", ".join(repr(w) for w in found[:most]) + more


def _score_rows(model, settings, options, cache, requests, problems, committed, pool=None):
    """Score the requests, leaving out targets with a known problem: they come back skipped."""
    kept_req = []
    for req, prob in zip(requests, problems, strict=True):
        if prob is None:
            kept_req.append(req)
            continue
        keep = [j for j, p in enumerate(prob[1]) if p is None]
        if keep:
            kept_req.append(ScoreRequest(req.source_ids, [req.targets[j] for j in keep],
                                         [req.allow_no_end[j] for j in keep]))
    scored = _score_with_cache(model, settings, options, cache, kept_req, pool)
    committed()
    it = iter(scored)
    results = []
    for req, prob in zip(requests, problems, strict=True):
        if prob is None:
            results.append(next(it))
            continue
        part = iter(next(it)) if any(p is None for p in prob[1]) else iter(())
        results.append([next(part) if p is None else
                        TargetScore(list(t), [], math.nan, len(t) + 1, math.nan, skipped=p[1], skip_code=p[0])
                        for t, p in zip(req.targets, prob[1], strict=True)])
    return results


def _open_cache(model, settings: DecoderSettings, options: TriageOptions):
    if options.cache_dir is None:
        return None
    from triage.scoring.cache import ScoreCache

    return ScoreCache(options.cache_dir, model.fingerprint(), settings.fingerprint())


def _score_with_cache(model, settings, options, cache, requests, pool=None):
    """Scores of one step's requests: from the cache where it has them, the rest scored together
    and committed to the cache as one batch (so a resumed run batches as a clean one)."""
    results: list = [None] * len(requests)
    todo = []
    for k, req in enumerate(requests):
        hit = cache.get(req) if cache is not None else None
        if hit is not None:
            results[k] = hit
        else:
            todo.append(k)
    if todo:
        out = score_requests(model, settings, [requests[k] for k in todo], token_budget=options.token_budget,
                             pool=pool)
        for k, r in zip(todo, out, strict=True):
            results[k] = r
        if cache is not None:
            cache.put_many([(requests[k], r) for k, r in zip(todo, out, strict=True)])
    return results


def _num(x: float) -> float:
    return float(x) if x is not None else math.nan


def _bucket_lengths(model, bucket_by, frame, references, verdicts) -> list[int]:
    if bucket_by == "ref-words":
        return verdicts["ref_words"].astype(int).tolist()
    if bucket_by == "source-words":
        return [len(s.split()) for s in frame["source"]]
    if bucket_by == "ref-tokens":
        best = verdicts["best_ref"].astype(int).tolist()
        return [len(t) for t in model.tokenize_targets([refs[b - 1] for refs, b in zip(references, best, strict=True)])]
    if bucket_by == "source-tokens":
        return [len(t) for t in model.tokenize_sources(frame["source"].tolist())]
    raise ValueError(f"unknown bucket basis {bucket_by!r}")


def _token_record(model, row_id, ref: TargetScore | None, out: TargetScore) -> dict[str, Any]:
    def side(s: TargetScore | None) -> dict[str, Any] | None:
        if s is None or not s.scored:
            return None
        return {
            "ids": s.ids,
            "pieces": model.token_strings(s.ids),
            "logprobs": [round(x, 6) if math.isfinite(x) else None for x in s.logprobs],
        }

    return {"id": row_id, "reference": side(ref), "output": side(out)}


def _summary(tally: Tally, buckets, settings, options, devset, model, model_info) -> Summary:
    """The run's Summary from its running totals; the recommendation is left to triage.decision."""
    counts = dict(tally.counts) if tally.rows else {}
    k, n = search_share(counts)
    failed = sum(counts.get(v, 0) for v in FAILED)
    score, sig = tally.corpus.score()
    return Summary(
        tool=Tool("triage", __version__),
        model=model_info or {"fingerprint": model.fingerprint()},
        data=DataInfo(path=getattr(devset, "path", None), sha256=getattr(devset, "sha256", None),
                      format=getattr(devset, "fmt", None), rows=tally.rows,
                      outputs="decoded by triage" if tally.decoded else "given"),
        settings=settings.to_dict(),
        objective=settings.signature(),
        signature=run_signature(settings, options, sig),  # the whole run: objective, version, rules, metric
        options=OptionsInfo(metric=options.metric, below=options.accept_at, margin=options.margin,
                            bucket_edges=list(options.edges), bucket_by=options.bucket_by,
                            normalize=options.normalize),
        counts=counts,
        failed=failed,
        search_share=SearchShare(k, n, k / n if n else None, list(_ci(k, n))),
        buckets=[
            Bucket(range=b["range"], rows=int(b["rows"]), failed=int(b["failed"]),
                   counts={v: int(b[v]) for v in counts},
                   search_share=None if math.isnan(b["search_share"]) else float(b["search_share"]),
                   interval95=[None if math.isnan(b["search_low"]) else float(b["search_low"]),
                               None if math.isnan(b["search_high"]) else float(b["search_high"])])
            for _, b in buckets.iterrows()
        ],
        score_gap=_describe(tally.gaps),
        corpus_metric=CorpusMetric(options.metric, score, sig),
        # most frequent first; equal counts in order of first appearance
        skipped_reasons=dict(sorted(tally.skipped.items(), key=lambda kv: -kv[1])),
        outputs_at_length_limit=tally.at_limit,
        # failed rows whose output a rule of these settings forbids: the decoder cannot have written them
        outputs_not_from_these_settings=ForeignOutputs(rows=sum(tally.foreign.values()), of_failed=failed,
                                                       rules=dict(sorted(tally.foreign.items())),
                                                       first_line=tally.foreign_line),
    )


def _ci(k: int, n: int) -> tuple[float | None, float | None]:
    from triage.run.analysis import wilson_interval

    lo, hi = wilson_interval(k, n)
    return (None if math.isnan(lo) else lo, None if math.isnan(hi) else hi)


def _describe(values: Sequence[float]) -> ScoreGap:
    s = pd.Series(list(values), dtype="float64")
    s = s[s.apply(math.isfinite)]
    if s.empty:
        return ScoreGap(0)
    return ScoreGap(int(s.size), float(s.mean()), float(s.median()), float(s.min()), float(s.max()))
