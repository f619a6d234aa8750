"""Where a model comes from: a transformers checkpoint, or the user's own Python factory.

``load_model("python:package.module:factory")`` imports the module and calls ``factory()``,
which must return an object with triage's SequenceModel interface (triage/models/api.py).
The current directory is searched after the usual import path, so a module file beside the
data works. Anything else is a local transformers checkpoint: encoder-decoder ones go to
transformers_backend, decoder-only ones (AutoModelForCausalLM) to causal_backend.
"""

from __future__ import annotations

import importlib
import os
import sys
from typing import Any

from triage.errors import ModelError, OptionValueError
from triage.models.api import SequenceModel

PREFIX = "python:"
REQUIRED_INTS = ("start_id", "end_id", "pad_id", "vocab_size")
REQUIRED_ATTRS = ("unk_id", "max_source_tokens", "max_target_tokens")
REQUIRED_METHODS = (
    "tokenize_sources", "tokenize_targets", "detokenize", "token_strings", "fingerprint",
    "encode", "select", "next_logprobs",
)


def parse_python_spec(spec: str) -> tuple[str, str]:
    """'python:package.module:factory' -> ('package.module', 'factory')."""
    body = spec[len(PREFIX):]
    module, sep, factory = body.rpartition(":")
    if not sep or not module or not factory or not factory.isidentifier():
        raise ModelError("expected python:package.module:factory", path=spec)
    if not all(part.isidentifier() for part in module.split(".")):
        raise ModelError(f"{module!r} is not a Python module name", path=spec,
                         hint="expected python:package.module:factory")
    return module, factory


def check_model(obj: Any, where: str) -> SequenceModel:
    """The object itself if it offers the SequenceModel interface, else a one-line ModelError."""
    missing = [n for n in REQUIRED_INTS + REQUIRED_ATTRS if not hasattr(obj, n)]
    missing += [n for n in REQUIRED_METHODS if not callable(getattr(obj, n, None))]
    if missing:
        raise ModelError(f"the model object ({type(obj).__name__}) lacks {', '.join(missing)}", path=where,
                         hint="see triage/models/api.py: SequenceModel")
    for name in REQUIRED_INTS:
        value = getattr(obj, name)
        if isinstance(value, bool) or not isinstance(value, int):
            raise ModelError(f"model attribute {name} must be an int, got {type(value).__name__}", path=where)
    if obj.vocab_size < 1:
        raise ModelError(f"model vocab_size must be positive, got {obj.vocab_size}", path=where)
    for name in ("start_id", "end_id", "pad_id"):
        if not 0 <= getattr(obj, name) < obj.vocab_size:
            raise ModelError(f"model {name} {getattr(obj, name)} is outside the vocabulary (size {obj.vocab_size})",
                             path=where)
    return obj


def _import(module: str, spec: str):
    try:
        return importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name and module.split(".")[0] == exc.name.split(".")[0] and os.getcwd() not in sys.path:
            sys.path.append(os.getcwd())
            try:
                return importlib.import_module(module)
            except ModuleNotFoundError:
                pass
        raise ModelError(f"cannot import module {module}: {exc}", path=spec,
                         hint="put it on PYTHONPATH or in the current directory") from exc
    except Exception as exc:  # the user's module failed while importing
        raise ModelError(f"importing {module} failed: {type(exc).__name__}: {exc}", path=spec) from exc


def load_python_model(spec: str) -> SequenceModel:
    module, factory = parse_python_spec(spec)
    mod = _import(module, spec)
    fn = getattr(mod, factory, None)
    if fn is None or not callable(fn):
        raise ModelError(f"module {module} has no callable {factory}", path=spec)
    try:
        obj = fn()
    except Exception as exc:
        raise ModelError(f"{module}.{factory}() failed: {type(exc).__name__}: {exc}", path=spec) from exc
    return check_model(obj, spec)


#: loader keywords that describe a decoder-only model's prompt (causal_backend.prompt_format)
PROMPT_OPTIONS = ("prompt_template", "chat_template", "system")
#: loader keywords that choose a speech model's decoder prompt (speech_backend)
SPEECH_OPTIONS = ("language", "task")


def load_model(spec: str, **kw: Any) -> SequenceModel:
    """A SequenceModel from 'python:package.module:factory' or a local checkpoint directory.

    Keyword arguments (device, allow_pickle, trust_remote_code; for a decoder-only checkpoint the
    prompt: prompt_template, chat_template, system) go to the transformers loader, which reads an
    encoder-decoder checkpoint with transformers_backend and a decoder-only one with
    causal_backend; a speech-to-text checkpoint (AutoModelForSpeechSeq2Seq: Whisper, Speech2Text)
    goes to speech_backend, with language and task for a multilingual Whisper's prompt. A Python
    factory is called without arguments (its model renders its own sources, so a prompt option is
    an error).
    """
    if spec.startswith(PREFIX):
        given = [k for k in (*PROMPT_OPTIONS, *SPEECH_OPTIONS) if kw.get(k) not in (None, False)]
        if given:
            raise OptionValueError(given[0], f"applies to decoder-only transformers checkpoints only, not to {spec}")
        return load_python_model(spec)
    from triage.models.transformers_backend import load_transformers_model

    return load_transformers_model(spec, **kw)
