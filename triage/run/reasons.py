"""Why a row was skipped (or blocked), as a stable code and one sentence per kind.

summary.json's `skipped_reasons` counts rows by these codes (``{code: {count, sentence}}``);
verdicts.csv keeps the row's own detail (lengths, pieces, the rule) in `reason` and the code in
`reason_code`. A code names the side and the kind: ``source:too-long``, ``reference:unknown-tokens``,
``output:too-long-for-model``, ``rule:length-limit``. ``rule:*`` codes are outputs a rule of the
decoder forbids at the run's settings; they win over every other problem of the row (a rule
breach is checked first, so it is always counted under outputs_not_from_these_settings).
"""

from __future__ import annotations

import re

#: what is wrong with a source, a reference or the output (the part after "side:")
KINDS = {
    "empty": "is empty after tokenization",
    "too-long": "is longer than the model takes",
    "too-long-for-model": "is longer than the model's positions",
    "unknown-tokens": "holds text the tokenizer does not know",
    "special-only": "holds no tokens apart from special ones",
    "special-tokens": "holds special tokens the decoder never writes inside a sequence",
    "unscorable": "could not be scored",
}

SIDES = {"source": "the source", "reference": "every reference", "output": "the output"}

#: the decoder's rules (triage.decoding.rules.RULE_NAMES' plain names) -> their code
RULE_CODES = {
    "length limit": "length-limit",
    "minimum length": "min-length",
    "repeated n-gram": "repeated-ngram",
    "n-gram copied from the source": "source-ngram",
    "banned word": "banned-word",
    "forced first token": "forced-first-token",
    "suppressed token": "suppressed-token",
    "suppressed first token": "suppressed-first-token",
    "repetition penalty": "repetition-penalty",
    "decoding rule": "decoding-rule",
}


def rule_code(rule: str) -> str:
    """``rule:<slug>`` for a rule's plain name (an unknown name is slugged)."""
    slug = RULE_CODES.get(rule) or re.sub(r"[^a-z0-9]+", "-", rule.lower()).strip("-") or "decoding-rule"
    return f"rule:{slug}"


def code(side: str, kind: str) -> str:
    return f"{side}:{kind}"


def sentence(reason_code: str) -> str:
    """The one sentence summary.json and the report give for a kind of reason."""
    side, _, kind = reason_code.partition(":")
    if side == "rule":
        rule = next((name for name, slug in RULE_CODES.items() if slug == kind), kind.replace("-", " "))
        return f"the output breaks the decoder's rule ({rule}): it was not produced at these settings"
    if side == "blocked":
        rule = next((name for name, slug in RULE_CODES.items() if slug == kind), kind.replace("-", " "))
        return f"the decoder's rule ({rule}) forbids every reference"
    what = KINDS.get(kind, kind.replace("-", " "))
    if side == "reference":
        return f"no reference can be scored: the first {what}"
    return f"{SIDES.get(side, side)} {what}"
