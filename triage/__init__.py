"""triage: is a failed dev-set row the beam's fault or the model's?

The public API (imports are lazy so that ``triage --help`` starts fast):

    load_model(spec)                       -> a SequenceModel (a checkpoint directory, or python:module:factory)
    read_devset(path, ...)                 -> DevSet
    run_triage(model, devset, settings)    -> TriageResult (pandas DataFrames + summary dict)
    write_run(result, out_dir)             -> writes verdicts.csv, summary.json, tokens.jsonl, report.html
    DecoderSettings                        -> the decoder's objective
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
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(name)
