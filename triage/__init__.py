"""triage: is a failed dev-set row the beam's fault or the model's?

The public API (imports are lazy so that ``triage --help`` starts fast):

    triage_run(model, data, settings, options, studies=StudyPlan(...), out=DIR)
                                           -> RunOutcome: what `triage run` does (studies, the one
                                              recommendation, the run folder), as one call
    load_model(spec)                       -> a SequenceModel (a checkpoint directory, or python:module:factory)
    read_devset(path, ...)                 -> DevSet;  stream_devset(path, ...) -> DevSetStream (never whole)
    run_triage(model, devset, settings)    -> TriageResult (pandas DataFrames + a typed Summary)
    write_run(result, out_dir)             -> writes verdicts.csv, summary.json, tokens.jsonl, report.html
    RunWriter(out_dir)                     -> writes a run folder as the rows stream in
    load_run(run_dir), rerender(run_dir)   -> a run folder read back; its page rendered again
    recommend(summary)                     -> the Recommendation (decided once per run)
    DecoderSettings                        -> the decoder's objective
    Summary, Recommendation, Action, Verdict -> the types of summary.json
"""

__version__ = "0.1.0"

_LAZY = {
    "DecoderSettings": ("triage.settings", "DecoderSettings"),
    "read_devset": ("triage.data.devset", "read_devset"),
    "run_triage": ("triage.run.pipeline", "run_triage"),
    "model_settings": ("triage.models.describe", "model_settings"),
    "model_info": ("triage.models.describe", "model_info"),
    "capabilities": ("triage.models.api", "capabilities"),
    "TriageOptions": ("triage.run.pipeline", "TriageOptions"),
    "write_run": ("triage.rundir.writer", "write_run"),
    "load_model": ("triage.models.loading", "load_model"),
    "triage_run": ("triage.workflow", "triage_run"),
    "StudyPlan": ("triage.workflow", "StudyPlan"),
    "RunOutcome": ("triage.workflow", "RunOutcome"),
    "stream_devset": ("triage.data.devset", "stream_devset"),
    "RunWriter": ("triage.rundir.writer", "RunWriter"),
    "load_run": ("triage.rundir.reader", "load_run"),
    "rerender": ("triage.rundir.reader", "rerender"),
    "recommend": ("triage.decision", "recommend"),
    "Summary": ("triage.run.summary", "Summary"),
    "Recommendation": ("triage.run.summary", "Recommendation"),
    "Action": ("triage.run.summary", "Action"),
    "Verdict": ("triage.run.verdicts", "Verdict"),
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(name)
