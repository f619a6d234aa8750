"""What `triage run` does, as one library call: triage_run.

    from triage import StudyPlan, TriageOptions, triage_run
    outcome = triage_run("sample_data/model", "sample_data/devset.tsv", {"beam": 4},
                         studies=StudyPlan(widen=[8], where_lost=True), out="reports/mine")
    outcome.summary.recommendation    # decided once, from the whole summary
    outcome.summary.counts            # the typed Summary (summary.json is outcome.summary.to_json())

It reads the dev set, loads the model (when given a spec), takes the decoder settings (the
checkpoint's, with overrides), checks every option before anything is scored, triages the rows,
runs the asked-for studies, decides the recommendation and, given `out`, writes the run folder.
With no decoding study and no search check the dev set streams through in steps of
`options.chunk_rows` rows (memory follows the step, not the dev set); otherwise its rows are
held in memory for the studies.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from triage.decision import recommend, settings_mismatch
from triage.errors import InputError, OptionError, OptionValueError, check_at_least_one
from triage.models.describe import model_info, model_settings
from triage.run.pipeline import TriageOptions, TriageResult, check_audio, run_triage
from triage.run.summary import Summary
from triage.rundir.writer import RunWriter, check_out_dir
from triage.settings import DecoderSettings
from triage.studies.reproduce import DEFAULT_CHECK_ROWS


@dataclass
class StudyPlan:
    """The studies a run adds to the triage (all off by default).

    widen: wider beam widths to re-decode the failed rows at, as numbers or as text ("8,16", or
    "x2,x4" for multiples of the current width); beam_curve: corpus metric and decode time at
    widths 1..this; alpha_grid: the alphas of the length-penalty re-ranking (numbers, "0,0.5,1" or
    "start:stop:step"; None: the default grid); redecode_alpha: also decode again at these alphas;
    max_rows: a seeded sample of at most this many rows per decoding study; seed: the sample's
    seed; where_lost: where the beam lost the reference of each search-side row; exact: exact
    search on short failed rows; check_rows: decode a seeded sample of this many failed rows again
    at the run's settings to see whether the given outputs come from them (0: off; the check is
    skipped when triage decoded the outputs itself).
    """

    widen: Sequence[int] | str | None = None
    beam_curve: int | None = None
    alpha_grid: Sequence[float] | str | None = None
    redecode_alpha: Sequence[float] | str | None = None
    max_rows: int | None = None
    seed: int = 0
    where_lost: bool = False
    exact: bool = False
    check_rows: int = DEFAULT_CHECK_ROWS  # 16 (benchmarks/bench_check_rows.py measures its cost, README)

    @property
    def decodes(self) -> bool:
        """Some study decodes the dev set again."""
        return bool(self.widen or self.beam_curve or self.redecode_alpha)

    @property
    def needs_rows(self) -> bool:
        """Some study needs the dev set's rows in memory (so the run cannot stream)."""
        return self.decodes or self.where_lost or self.exact


@dataclass
class RunOutcome:
    """What triage_run did: the triage result (with its typed summary), the studies' per-row
    tables, and where the files went (out None: nothing written)."""

    result: TriageResult
    tables: dict[str, Any] = field(default_factory=dict)
    out: Path | None = None
    run_info: dict[str, Any] = field(default_factory=dict)

    @property
    def summary(self) -> Summary:
        return self.result.summary

    def settings_problem(self) -> InputError | None:
        """The error to report when most failed outputs cannot come from the decoder at the run's
        settings (the recommendation is then inconclusive); None otherwise."""
        mismatch = settings_mismatch(self.summary)
        if not mismatch:
            return None
        return InputError(mismatch, path=self.summary.data.path,
                          line=self.summary.outputs_not_from_these_settings.first_line,
                          hint="pass the settings the outputs were decoded with (--beam, --alpha, --penalty, "
                          "--max-new-tokens, ...) or leave them to generation_config.json; the files were "
                          "written with those rows skipped")


    def reproduction_warning(self) -> str | None:
        """A line for the person running it when fewer than 90% of the sampled failed outputs come
        out of the decoder again at the run's settings (None otherwise, or when nothing was checked)."""
        from triage.studies.reproduce import WARN_BELOW

        rep = getattr(self.summary, "reproduction", None)
        share = rep.reproduced_share if rep is not None else None
        if share is None or share >= WARN_BELOW:
            return None
        return (f"only {share:.0%} of the sampled failed outputs ({rep.reproduced} of {rep.checked}) come out of the "
                f"decoder again at {rep.objective}: the outputs were probably decoded with other settings (give "
                "--beam, --penalty and --alpha as you decoded; the rows that differ are in summary.json's "
                "reproduction)")


def _no_note(text: str) -> None:
    pass


def _widths(widen: Sequence[int] | str, beam: int) -> list[int]:
    from triage.studies.plan import parse_widths

    return parse_widths(widen if isinstance(widen, str) else ",".join(str(int(w)) for w in widen), beam)


def _alphas(alphas: Sequence[float] | str) -> list[float]:
    from triage.studies.plan import parse_alphas

    return parse_alphas(alphas if isinstance(alphas, str) else ",".join(repr(float(a)) for a in alphas))


def _open_data(data: Any, whole: bool) -> Any:
    """The dev set as run_triage takes it: read whole when the studies need its rows, else a
    stream checked through once (every error raised before any scoring)."""
    from triage.data.devset import DevSetStream, stream_devset

    if isinstance(data, (str, Path)):
        data = stream_devset(str(data))
    if isinstance(data, DevSetStream):
        return data.read() if whole else data.check()
    return data  # a DevSet or a DataFrame, already in memory


def _settings(model: Any, settings: DecoderSettings | Mapping[str, Any] | None) -> DecoderSettings:
    if isinstance(settings, DecoderSettings):
        return settings
    try:
        return model_settings(model, **dict(settings or {}))
    except ValueError as exc:
        raise OptionError(str(exc)) from None


def triage_run(
    model: Any,
    data: Any,
    settings: DecoderSettings | Mapping[str, Any] | None = None,
    options: TriageOptions | None = None,
    *,
    studies: StudyPlan | None = None,
    out: str | Path | None = None,
    page_rows: int | None = None,
    command: str | None = None,
    load: Mapping[str, Any] | None = None,
    on_note: Callable[[str], None] = _no_note,
    cluster: Any = None,
) -> RunOutcome:
    """Triage a dev set, run the studies, decide the recommendation, write the run folder.

    model: a SequenceModel, or a spec for load_model (a checkpoint directory, a name in the local
    Hugging Face cache, python:module:factory), loaded with the keywords in `load` (device,
    allow_pickle, trust_remote_code; for a decoder-only checkpoint prompt_template, chat_template,
    system). data: a dev-set file, a stream_devset stream, a DevSet or a
    DataFrame. settings: DecoderSettings, or overrides of the checkpoint's own settings (beam,
    alpha, penalty, max_new_tokens, early_stopping, source_prefix); None: the checkpoint's.
    out: the run folder to write (verdicts.csv, summary.json, tokens.jsonl, run.json,
    report.html); None writes nothing and keeps the rows in the result. page_rows: failed rows
    per verdict the page lists. command: what run.json records as the command. on_note: told
    the things a person running it should hear (the studies' estimated time). cluster: a
    triage.cluster.Cluster (from triage.cluster.connect), or "auto" / "HOST:PORT" to connect for
    this run only, or a triage.cluster.WorkerPool already holding this model (left running): the
    failed rows' scoring (and the decoding) of each step runs on the workers, which load the model
    spec themselves; the files are the same bytes as without a cluster (same torch threads per process).

    Raises OptionError (bad options, before anything is scored), InputError, ModelError.
    """
    t0 = time.perf_counter()
    options = options or TriageOptions()
    plan = studies or StudyPlan()
    check_at_least_one("chunk_rows", options.chunk_rows)
    check_at_least_one("page_rows", page_rows)
    check_at_least_one("max_rows", plan.max_rows)
    if plan.check_rows is None or plan.check_rows < 0:
        raise OptionValueError("check_rows", f"must be 0 (off) or more, got {plan.check_rows}")
    if isinstance(settings, Mapping):
        check_at_least_one("beam", settings.get("beam"))
    dev = _open_data(data, whole=plan.needs_rows)
    out_dir = Path(out) if out is not None else None
    if out_dir is not None:
        check_out_dir(out_dir)  # a folder that cannot be made fails now, not after scoring

    spec = model if isinstance(model, str) else None
    if cluster is not None and spec is None:
        raise OptionError("a cluster run takes the model as a path or name (each worker loads it), not a "
                          "loaded model object")
    if spec is not None:
        from triage.models.loading import load_model

        model = load_model(spec, **dict(load or {}))
    settings = _settings(model, settings)
    check_audio(model, dev)  # a speech model's clips, all checked before any scoring
    # the studies' options are checked before anything is scored, so a typo costs no scoring time
    widths = _widths(plan.widen, settings.beam) if plan.widen else None
    alphas = _alphas(plan.alpha_grid) if plan.alpha_grid else None
    redecode = _alphas(plan.redecode_alpha) if plan.redecode_alpha else None
    info = model_info(model, spec) if spec is not None else None
    plan = replace(plan, widen=widths, alpha_grid=alphas, redecode_alpha=redecode)

    opened, started, pool = None, None, None
    try:
        if cluster is not None:
            opened, started, pool = _start_workers(cluster, spec, load)
        return _run(model, spec, dev, settings, options, plan, info, out_dir, page_rows, command, on_note, pool, t0)
    finally:
        if started is not None:
            started.close()  # the workers stop, also on Ctrl-C
        if opened is not None:
            opened.close()


def _start_workers(cluster: Any, spec: str, load: Mapping[str, Any] | None):
    """(what this run opened and closes at its end: a Cluster or None, a WorkerPool or None; the pool to use)."""
    import os

    from triage.cluster import connect
    from triage.cluster.pool import WorkerPool

    where = os.path.abspath(spec) if not spec.startswith("python:") and os.path.exists(spec) else spec
    if isinstance(cluster, WorkerPool):  # started by the caller, for several runs of one model
        if cluster.spec != where:
            raise OptionError(f"the worker pool holds the model {cluster.spec}, the run asks for {where}")
        return None, None, cluster
    opened = connect(cluster) if isinstance(cluster, str) else None
    try:
        pool = (opened or cluster).pool(where, load)
    except BaseException:
        if opened is not None:
            opened.close()
        raise
    return opened, pool, pool


def _run(model, spec, dev, settings, options, plan, info, out_dir, page_rows, command, on_note, pool, t0) -> RunOutcome:
    """The triage, the studies, the recommendation and the run folder (pool: the cluster's workers, or None:
    every decode and scoring batch inside, the studies' too, goes to it)."""
    from triage.decoding.decode import pool_for_run

    with pool_for_run(pool):
        return _run_here(model, spec, dev, settings, options, plan, info, out_dir, page_rows, command, on_note, pool, t0)


def _run_here(model, spec, dev, settings, options, plan, info, out_dir, page_rows, command, on_note, pool,
              t0) -> RunOutcome:
    writer = RunWriter(out_dir, page_rows) if out_dir is not None else None
    from triage.studies.reproduce import FailedRowSample

    sample = FailedRowSample(plan.check_rows, plan.seed)
    try:
        if plan.needs_rows:
            result, tables = _in_memory(model, dev, settings, options, plan, info, on_note, sample, pool)
            if writer is not None:
                writer.add(result.verdicts, result.tokens)
        else:
            result, tables = _streamed(model, dev, settings, options, plan, info, writer, sample, pool)
        if spec is not None:  # described again after the run: a decoder-only model names its first row's prompt
            result.summary.model = model_info(model, spec)
        _check_outputs(model, result, sample, options)
        result.summary.recommendation = recommend(result.summary)  # once, from the whole summary
        run_info: dict[str, Any] = {}
        if writer is not None:
            run_info = {
                "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "elapsed_s": round(time.perf_counter() - t0, 2),
                "command": command,
                "cache": result.cache,
                "page_rows": writer.page.per_verdict,  # triage report lists as many unless told otherwise
            }
            if pool is not None:
                run_info["cluster"] = pool.describe()
            writer.finish(result.summary, run_info)
    finally:
        if writer is not None:
            writer.abort()  # after finish() there is nothing left to remove
    return RunOutcome(result, tables, out_dir, run_info)


def _check_outputs(model, result: TriageResult, sample, options: TriageOptions) -> None:
    """Decode the sampled failed rows again at the run's settings: do the given outputs come from them?
    (Nothing to check when the rows were not sampled or triage decoded the outputs itself.)"""
    if sample.n <= 0 or result.summary.data.outputs != "given":
        return
    from triage.studies.reproduce import check_outputs

    result.summary.reproduction = check_outputs(model, result.settings, sample, options.progress)


def _in_memory(model, dev, settings, options, plan: StudyPlan, info, on_note, sample,
               pool=None) -> tuple[TriageResult, dict]:
    """The rows held in memory: triage, then the sweeps and the search checks on them."""
    from triage.studies.plan import estimate_seconds
    from triage.studies.runner import run_search_checks, run_studies

    result = run_triage(model, dev, settings, options, model_info=info, on_step=sample.add_step, pool=pool)
    sweep_plan = dict(widen=plan.widen, beam_curve_max=plan.beam_curve, alphas=plan.alpha_grid,
                      redecode_alpha=plan.redecode_alpha, max_rows=plan.max_rows, seed=plan.seed)
    if plan.decodes:
        est = estimate_seconds(model, result, **sweep_plan)
        on_note(f"sweeps estimated at {est['seconds']:.0f} s (measured on {est['sample_rows']} rows)")
    done = run_studies(model, result, **sweep_plan, progress=options.progress, devset=dev, length_penalty=True)
    _merge(result.summary, done)
    if plan.where_lost or plan.exact:
        run_search_checks(model, result, where_lost_rows=plan.where_lost, exact=plan.exact)
    return result, done.tables


def _streamed(model, dev, settings, options, plan: StudyPlan, info, writer, sample,
              pool=None) -> tuple[TriageResult, dict]:
    """The dev set streamed through: each step's rows go to the writer (and are kept only when
    nothing is written); the length-penalty re-ranking is tallied step by step."""
    from triage.studies.length_penalty import PenaltyTally
    from triage.studies.runner import run_studies

    penalty = PenaltyTally(settings, options.margin, options.metric, plan.alpha_grid)
    steps = [penalty.add_step, sample.add_step] if writer is None else [writer.add_step, penalty.add_step,
                                                                          sample.add_step]
    result = run_triage(model, dev, settings, options, model_info=info, keep=writer is None, on_step=steps,
                        pool=pool)
    done = run_studies(model, result, alphas=plan.alpha_grid, progress=options.progress, length_penalty=True,
                       penalty_tally=penalty)
    _merge(result.summary, done)
    return result, done.tables


def _merge(summary: Summary, done) -> None:
    """The studies' typed sections into the summary (the recommendation comes after, once)."""
    for key, section in done.sections.items():
        setattr(summary, key, section)
    summary.sweeps_interrupted = done.interrupted
