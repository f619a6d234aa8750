"""The command line: a thin shell over the library (triage.workflow.triage_run, triage.rundir.reader.rerender).

torch and transformers are imported only inside the commands that need them, so
``triage --help`` answers at once.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from pathlib import Path

from triage import __version__
from triage.errors import OptionError, OptionValueError, TriageError

EPILOG = """\
verdicts: search = the model prefers the reference (the beam missed it); model = the model prefers
its wrong output; tie = the score gap (reference score minus output score) is within --margin;
blocked = a decoding rule forbids every reference; skipped = the row cannot be scored, or its output
breaks a decoding rule (reason given). Exit codes: 0 done, 2 bad input or options (or an
output folder that cannot be written, or too little memory), 130 interrupted by Ctrl-C (143 SIGTERM, 129
SIGHUP; previous outputs left intact)."""


def _bool_or_never(text: str):
    low = text.lower()
    if low in ("true", "yes", "1", "on"):
        return True
    if low in ("false", "no", "0", "off"):
        return False
    if low == "never":
        return "never"
    raise argparse.ArgumentTypeError("expected true, false or never")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="triage",
        description="Search-versus-model error triage for beam-search decoded sequence-to-sequence models.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"triage {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    r = sub.add_parser("run", help="triage a dev set: force-score, label, group by length, write the outputs",
                       description="Force-score reference and output of every failed row under the decoder's "
                       "objective and label each row.", epilog=EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    g = r.add_argument_group("model")
    g.add_argument("--model", required=True, metavar="SPEC",
                   help="checkpoint directory, a name already in the local Hugging Face cache, or "
                   "python:package.module:factory for a model of your own (never downloads)")
    g.add_argument("--device", default="cpu", help="torch device (default: cpu)")
    g.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: torch's choice)")
    g.add_argument("--allow-pickle", action="store_true",
                   help="allow weights in a pickle-based format (.bin/.pt); pickles can run code")
    g.add_argument("--trust-remote-code", action="store_true",
                   help="allow the checkpoint's own Python code (off by default)")
    g.add_argument("--language", metavar="LANG",
                   help="speech models (multilingual Whisper): the language token of the decoder prompt, e.g. en "
                   "(default: the generation config's)")
    g.add_argument("--task", choices=("transcribe", "translate"),
                   help="speech models (multilingual Whisper): the task token of the decoder prompt")

    g = r.add_argument_group(
        "prompt (decoder-only checkpoints only; an error for any other model)",
        "A decoder-only model (AutoModelForCausalLM) reads a prompt made from the source; the reference\n"
        "and the output are completions of it, and only completion tokens are scored (end token included).\n"
        "Every other flag means the same for every model family: output and reference lengths,\n"
        "--max-new-tokens and the length penalty count completion tokens (source-tokens buckets count the\n"
        "prompt's), and --prefix goes before the source inside the prompt.")
    g.add_argument("--prompt-template", metavar="TEXT",
                   help="the prompt as a format string with {source}, e.g. 'Translate to German: {source}\\nGerman:' "
                   "(\\n is a newline, \\t a tab; default: the source itself)")
    g.add_argument("--chat-template", action="store_true",
                   help="render the source as one user message with the tokenizer's own chat template")
    g.add_argument("--system", metavar="TEXT", help="with --chat-template: a system message before the user message")

    g = r.add_argument_group("dev set")
    g.add_argument("--data", metavar="FILE", help="dev set as .tsv (with header), .csv or .jsonl")
    g.add_argument("--format", choices=("tsv", "tsv-raw", "tsv-quoted", "csv", "jsonl"),
                   help="format of --data (default: by extension; tsv detects whether cells are quoted)")
    g.add_argument("--column", action="append", default=[], metavar="OURS=THEIRS",
                   help="map a column: source=, reference=, output= or id= (repeatable), e.g. source=src")
    g.add_argument("--source", metavar="FILE", help="plain-text sources, one segment per line")
    g.add_argument("--reference", action="append", default=[], metavar="FILE",
                   help="plain-text references, one per line (repeat for several references)")
    g.add_argument("--output", metavar="FILE",
                   help="plain-text decoded outputs, one per line (omit to let triage decode)")

    g = r.add_argument_group("decoder objective (defaults: the checkpoint's generation_config.json)")
    g.add_argument("--beam", type=int, metavar="N", help="beam width the outputs were decoded with")
    g.add_argument("--alpha", type=float, metavar="A", help="length-penalty exponent")
    g.add_argument("--penalty", choices=("power", "gnmt", "none"),
                   help="length-penalty form: power = len**alpha (transformers), gnmt = ((5+len)/6)**alpha, "
                   "none = plain sum")
    g.add_argument("--max-new-tokens", type=int, metavar="N",
                   help="decoder's length limit (tokens it generates; for a decoder-only model, completion tokens)")
    g.add_argument("--early-stopping", type=_bool_or_never, metavar="true|false|never",
                   help="beam search stopping rule")
    g.add_argument("--prefix", default=None, metavar="TEXT", help="task prefix added to each source (T5 style)")

    g = r.add_argument_group("failures, verdicts and buckets")
    g.add_argument("--metric", choices=("chrf", "bleu", "wer", "cer"), default="chrf",
                   help="sentence and corpus metric: chrf, bleu (sacrebleu; higher is better), wer, cer (jiwer, "
                   "percent; lower is better)")
    g.add_argument("--accept-at", "--below", type=float, metavar="X", dest="accept_at",
                   help="a row that differs from every reference still counts as correct when its sentence metric "
                   "reaches X: at least X for chrf/bleu, at most X for wer/cer (--below is the older name)")
    g.add_argument("--normalize", choices=("none", "basic"), default="none",
                   help="text normalization of references and outputs before a row is called correct and before "
                   "the metric: basic = lower case, punctuation removed, whitespace collapsed (default none; the "
                   "scored texts are never changed)")
    g.add_argument("--margin", type=float, default=None, metavar="M",
                   help="tie margin: a score gap (reference score minus output score) within M of 0 is a tie (default 1e-4)")
    g.add_argument("--buckets", default=None, metavar="EDGES",
                   help="lower edges of the length buckets (default 1,11,21,31,41)")
    g.add_argument("--bucket-by", choices=("ref-words", "source-words", "ref-tokens", "source-tokens"),
                   default="ref-words", help="what the buckets measure (default ref-words)")

    g = r.add_argument_group("what a wider beam or another length penalty would change")
    g.add_argument("--widen", metavar="WIDTHS",
                   help="re-decode failed rows at these beam widths, e.g. 4,8,16 or x2,x4 (multiples)")
    g.add_argument("--beam-curve", type=int, metavar="MAX",
                   help="corpus metric and decode time at beam widths 1..MAX")
    g.add_argument("--alpha-grid", metavar="LIST", help="alphas to re-score with (default 0,0.2,...,1.2)")
    g.add_argument("--redecode-alpha", metavar="LIST", help="also re-decode the dev set at these alphas")
    g.add_argument("--max-rows", type=int, metavar="N", help="run sweeps on a seeded sample of N rows")
    g.add_argument("--seed", type=int, default=0, help="seed for samples (default 0)")
    g.add_argument("--where-lost", action="store_true",
                   help="for search rows, find the step where the reference left the beam and the "
                   "smallest width that keeps it")
    g.add_argument("--exact", action="store_true",
                   help="exact search (bounded depth-first) on short failed rows, with a budget per row")
    g.add_argument("--check-rows", type=int, default=16, metavar="N",  # triage.studies.reproduce.DEFAULT_CHECK_ROWS
                   help="decode a seeded sample of N failed rows again at the stated settings to check that the "
                   "given outputs come from them (default 16; 0: off)")

    g = r.add_argument_group("run")
    g.add_argument("--out", metavar="DIR", help="output folder (default reports/<dev-set name>)")
    g.add_argument("--cluster", metavar="auto|HOST:PORT",
                   help="score (and decode) on Ray workers: auto = a local Ray instance sized to this machine, "
                   "HOST:PORT = a running cluster's head (ray start --head); the same files as without it "
                   "(pip install 'triage[cluster]')")
    g.add_argument("--workers", type=int, metavar="N",
                   help="with --cluster: how many workers (default: the cluster's CPUs / --threads), each one "
                   "process holding the model with --threads torch threads (default 1)")
    g.add_argument("--token-budget", type=int, default=4096, help="tokens per scoring batch (default 4096)")
    g.add_argument("--chunk-rows", type=int, default=1000, metavar="N",
                   help="dev-set rows per step: decoded, scored, cached and written together (default 1000); "
                   "memory grows with this, not with the dev set")
    g.add_argument("--page-rows", type=int, default=None, metavar="N",
                   help="failed rows of each verdict listed in report.html (default 1000; every row is "
                   "in verdicts.csv)")
    g.add_argument("--no-cache", action="store_true", help="do not read or write the score cache")
    g.add_argument("--cache-dir", metavar="DIR", help="score cache folder (default <out>/.cache)")
    g.add_argument("--quiet", action="store_true", help="no progress bars")
    g.add_argument("--debug", action="store_true", help="show tracebacks")

    rep = sub.add_parser("report", help="re-render report.html from a run directory (no model needed)")
    rep.add_argument("run_dir", metavar="RUN_DIR")
    rep.add_argument("--page-rows", type=int, default=None, metavar="N",
                     help="failed rows of each verdict listed in the page (default: as the run did, in run.json)")
    rep.add_argument("--debug", action="store_true", help="show tracebacks")

    cmp = sub.add_parser("compare", help="compare two run folders of one dev set: before and after (no model needed)",
                         description="Compare two run folders (A before, B after): verdict transitions, buckets, "
                         "rows fixed and broken, the corpus metric's paired bootstrap, and whether A's "
                         "recommendation was followed. Writes compare.html and compare.json.")
    cmp.add_argument("run_a", metavar="RUN_A", help="the run folder before the change")
    cmp.add_argument("run_b", metavar="RUN_B", help="the run folder after the change")
    cmp.add_argument("--out", metavar="DIR", help="output folder (default reports/compare-<A>-<B>)")
    cmp.add_argument("--labels", metavar="A,B", help="names of the two runs on the page (default before,after)")
    cmp.add_argument("--allow-different-data", action="store_true",
                     help="compare runs of different dev sets, matching rows by id (the page says so)")
    cmp.add_argument("--debug", action="store_true", help="show tracebacks")

    b = sub.add_parser("bench", help="benchmark scoring against a naive baseline and generate", add_help=False)
    b.add_argument("bench_args", nargs=argparse.REMAINDER)
    return p


def _columns(pairs: list[str]) -> dict[str, str]:
    out = {}
    for pair in pairs:
        if "=" not in pair:
            raise OptionError(f"--column expects OURS=THEIRS, got {pair!r}")
        ours, theirs = pair.split("=", 1)
        ours = ours.strip()
        if ours not in ("source", "reference", "output", "id"):
            raise OptionError(f"--column: unknown column {ours!r} (source, reference, output or id)")
        out[ours] = theirs.strip()
    return out


def _check_out_dir(out_dir: Path) -> None:
    from triage.rundir.writer import check_out_dir

    check_out_dir(out_dir)


FLAGS = {"chunk_rows": "--chunk-rows", "page_rows": "--page-rows", "max_rows": "--max-rows", "beam": "--beam",
         "check_rows": "--check-rows", "prompt_template": "--prompt-template", "chat_template": "--chat-template",
         "system": "--system", "language": "--language", "task": "--task",
         "bucket_by": "--bucket-by", "workers": "--workers", "threads": "--threads"}


def _unescape(text: str | None) -> str | None:
    """A prompt flag's text with \\n, \\t and \\\\ read as a newline, a tab and a backslash."""
    if text is None:
        return None
    import re

    return re.sub(r"\\([nt\\])", lambda m: {"n": "\n", "t": "\t", "\\": "\\"}[m.group(1)], text)


def cmd_run(a: argparse.Namespace) -> int:
    """Parse, build the library's arguments, call triage_run, print, map its errors."""
    if not a.data and not a.source:
        raise OptionError("give the dev set: --data FILE, or --source F --reference F [--output F]")
    if a.data and (a.source or a.reference or a.output):
        raise OptionError("give either --data or --source/--reference/--output, not both")
    if a.source and not a.reference:
        raise OptionError("--source needs at least one --reference file")
    from triage.data.devset import stream_devset
    from triage.run.analysis import parse_edges
    from triage.run.pipeline import DEFAULT_MARGIN, TriageOptions
    from triage.workflow import StudyPlan, triage_run

    try:
        edges = parse_edges(a.buckets) if a.buckets else None
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    stream = stream_devset(a.data, source=a.source, references=a.reference or None, output=a.output,
                           columns=_columns(a.column) or None, fmt=a.format)
    out_dir = Path(a.out) if a.out else Path("reports") / stream.name
    options = TriageOptions(metric=a.metric, accept_at=a.accept_at, normalize=a.normalize, margin=DEFAULT_MARGIN if a.margin is None else a.margin,
                            bucket_by=a.bucket_by, token_budget=a.token_budget, progress=not a.quiet,
                            chunk_rows=a.chunk_rows)
    if edges:
        options.edges = edges
    if not a.no_cache:
        options.cache_dir = Path(a.cache_dir) if a.cache_dir else out_dir / ".cache"
    plan = StudyPlan(widen=a.widen, beam_curve=a.beam_curve, alpha_grid=a.alpha_grid, redecode_alpha=a.redecode_alpha,
                     max_rows=a.max_rows, seed=a.seed, where_lost=a.where_lost, exact=a.exact,
                     check_rows=a.check_rows)
    if a.workers is not None and not a.cluster:
        raise OptionError("--workers needs --cluster")
    cluster = None
    overrides = dict(beam=a.beam, alpha=a.alpha, penalty=a.penalty, max_new_tokens=a.max_new_tokens,
                     early_stopping=a.early_stopping, source_prefix=a.prefix)
    if a.threads:
        import torch

        torch.set_num_threads(a.threads)
    try:
        if a.cluster:  # only now is Ray imported
            from triage.cluster import connect

            cluster = connect(a.cluster, workers=a.workers, threads=a.threads or 1)
        outcome = triage_run(a.model, stream, overrides, options, studies=plan, out=out_dir, page_rows=a.page_rows,
                             command="triage " + " ".join(sys.argv[1:]),
                             load=dict(device=a.device, allow_pickle=a.allow_pickle,
                                       trust_remote_code=a.trust_remote_code,
                                       prompt_template=_unescape(a.prompt_template), chat_template=a.chat_template,
                                       system=_unescape(a.system), language=a.language, task=a.task),
                             on_note=lambda text: print(f"triage: {text}", file=sys.stderr), cluster=cluster)
    except OptionValueError as exc:  # the library names its parameter, the command line its flag
        raise OptionError(f"{FLAGS.get(exc.option, exc.option)} {exc.detail}") from None
    finally:
        if cluster is not None:
            cluster.close()
    _print_summary(outcome.result, out_dir, outcome.run_info)
    problem = outcome.settings_problem()
    if problem is not None:
        raise problem
    warning = outcome.reproduction_warning()
    if warning:
        print(f"triage: warning: {warning}", file=sys.stderr)
    foreign = outcome.summary.outputs_not_from_these_settings
    if foreign.rows:
        k = foreign.rows
        print(f"triage: warning: {k} failed output{'s' if k > 1 else ''} cannot come from the decoder at these "
              f"settings (first on line {foreign.first_line}); skipped, see skipped_reasons", file=sys.stderr)
    return 0


def _print_summary(result, out_dir: Path, run_info: dict) -> None:
    s = result.summary
    print(f"triage {__version__}: {s.data.rows} rows, objective {s.objective}")
    print("  " + ", ".join(f"{k} {v}" for k, v in s.counts.items()))
    ss = s.search_share
    if ss.compared:
        lo, hi = ss.interval95
        print(f"  search-side share of compared failures: {ss.share:.0%} (95% interval {lo:.0%}-{hi:.0%})")
    rep = s.reproduction
    if rep is not None and rep.reproduced_share is not None:
        print(f"  outputs check: {rep.reproduced} of {rep.checked} sampled failed outputs come out of the decoder "
              f"again at these settings ({rep.reproduced_share:.0%})")
    rec = s.recommendation
    print(f"  recommendation: {rec.action}: {rec.because}")
    cache = result.cache
    if cache:
        print(f"  scores: {cache.get('hits', 0)} rows from the cache, {cache.get('misses', 0)} scored")
    print(f"  wrote {out_dir}/report.html (and verdicts.csv, summary.json, tokens.jsonl) in {run_info['elapsed_s']:.1f} s")


def cmd_report(a: argparse.Namespace) -> int:
    from triage.rundir.reader import rerender

    try:
        out = rerender(a.run_dir, a.page_rows)
    except OptionValueError as exc:
        raise OptionError(f"{FLAGS.get(exc.option, exc.option)} {exc.detail}") from None
    print(f"wrote {out}")
    return 0


def cmd_compare(a: argparse.Namespace) -> int:
    from triage.compare import compare_runs, parse_labels, summary_paragraph, write_comparison

    labels = parse_labels(a.labels)
    out = Path(a.out) if a.out else Path("reports") / f"compare-{Path(a.run_a).name}-{Path(a.run_b).name}"
    _check_out_dir(out)
    comparison = compare_runs(a.run_a, a.run_b, labels=labels, allow_different_data=a.allow_different_data)
    json_path, html_path = write_comparison(comparison, out)
    print(summary_paragraph(comparison))
    print(f"wrote {html_path} and {json_path.name}")
    return 0


_STOP_SIGNAL = {"signum": signal.SIGINT}


def _stop(signum, frame) -> None:
    """SIGTERM and SIGHUP (a timeout, a closed terminal, a cancelled job) stop a run the way Ctrl-C
    does: the temporary files go, the previous outputs stay, the cache keeps what was scored."""
    _STOP_SIGNAL["signum"] = signum
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    _STOP_SIGNAL["signum"] = signal.SIGINT
    handlers = {}
    if threading.current_thread() is threading.main_thread():
        handlers = {sig: signal.signal(sig, _stop) for sig in (signal.SIGTERM, signal.SIGHUP)}
    try:
        return _main(argv)
    finally:
        for sig, old in handlers.items():
            signal.signal(sig, old)


def _main(argv: list[str] | None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv[:1] == ["bench"]:
        from benchmarks.bench import main as bench_main

        return int(bench_main(argv[1:]) or 0)
    parser = build_parser()
    a = parser.parse_args(argv)
    if a.command is None:
        parser.print_help()
        return 2
    debug = getattr(a, "debug", False)
    try:
        if a.command == "run":
            return cmd_run(a)
        if a.command == "report":
            return cmd_report(a)
        if a.command == "compare":
            return cmd_compare(a)
    except TriageError as exc:
        if debug:
            raise
        print(f"triage: error: {exc.one_line()}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt as exc:
        what = str(exc) if str(exc).startswith("interrupted") else "interrupted"
        print(f"triage: {what}; the previous outputs are left as they were; "
              "a rerun takes the scored rows from the cache", file=sys.stderr)
        return 128 + int(_STOP_SIGNAL["signum"])  # 130 for Ctrl-C, 143 for SIGTERM, 129 for SIGHUP
    except BrokenPipeError:
        os._exit(1)
    except OSError as exc:  # an output folder that cannot be written, a full disk
        if debug:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"triage: error: {where}{exc.strerror or exc} (check the --out folder and the free space)",
              file=sys.stderr)
        return 2
    except MemoryError:
        if debug:
            raise
        print("triage: error: out of memory; a run without --widen, --beam-curve, --redecode-alpha, --where-lost "
              "and --exact streams the dev set (memory follows --chunk-rows); those options need it whole",
              file=sys.stderr)
        return 2
    return 2


if __name__ == "__main__":
    raise SystemExit(main())
