"""The HTML report: one self-contained page rendered from a run's tables (no model needed).

The page loads nothing from anywhere: styles and charts are inline, a Content-Security-Policy
forbids every other source, and the one inline script (filtering and sorting the row table) is
allowed by its sha256 hash, computed here at render time. Every text is escaped by jinja2's
autoescape. Without scripts the page reads the same, only the filter controls stay hidden.
"""

from __future__ import annotations

import base64
import dataclasses
import hashlib
import json
import math
from array import array
from pathlib import PurePath
from typing import Any

import pandas as pd
from markupsafe import Markup

from triage.display import finite as _finite
from triage.display import fmt_interval, fmt_num, fmt_pct, fmt_value, get_path
from triage.report import charts
from triage.run.metrics import higher_is_better
from triage.run.summary import Action, Summary
from triage.run.verdicts import COMPARED
from triage.settings import DecoderSettings
from triage.studies import SECTIONS, STUDIES
from triage.studies.common import Section

VERDICT_ORDER = ("search", "model", "tie", "blocked", "skipped", "correct")

ACTIONS = {
    "widen-beam": "Widen the beam",
    "fix-model": "Work on the model, not the decoder",
    "tune-length-penalty": "Tune the length penalty",
    "inconclusive": "No clear action yet",
}
ACTION_MEANING = {
    "widen-beam": "in most failed rows the model scores the reference above the output the beam returned, so the "
                  "search lost it, not the model",
    "fix-model": "in most failed rows the model itself scores its wrong output above the reference, so a wider "
                 "beam would recover few of them",
    "tune-length-penalty": "the failures come from the length penalty pushing outputs too short or too long",
    "inconclusive": "the evidence does not point one way",
}
PENALTY_TEXT = {
    "power": "score = sum of log-probs / len^alpha (len: target tokens incl. end token)",
    "gnmt": "score = sum of log-probs / ((5 + len) / 6)^alpha",
    "none": "score = sum of log-probs (no length penalty)",
}
SETTINGS_LABELS = [
    ("beam", "beam width"),
    ("penalty", "length penalty form"),
    ("alpha", "length penalty alpha"),
    ("early_stopping", "early stopping"),
    ("max_new_tokens", "length limit (new tokens)"),
    ("max_length", "length limit (tokens, start included)"),
    ("min_length", "minimum length (tokens)"),
    ("min_new_tokens", "minimum length (new tokens)"),
    ("no_repeat_ngram_size", "no repeated n-grams of size"),
    ("encoder_no_repeat_ngram_size", "no n-grams repeated from the source, size"),
    ("repetition_penalty", "repetition penalty"),
    ("bad_words_ids", "banned token sequences"),
    ("forced_bos_token_id", "forced first token id"),
    ("forced_eos_token_id", "forced end token id"),
    ("decoder_start_token_id", "decoder start token id"),
    ("eos_token_ids", "end token ids"),
    ("pad_token_id", "padding token id"),
    ("source_prefix", "source prefix"),
    ("origin", "settings taken from"),
]
MODEL_LABELS = [("path", "model directory"), ("sha256", "sha256 of the model files"),
                ("fingerprint", "fingerprint (sha256 of the weights)"), ("tokenizer", "tokenizer"),
                ("prompt", "prompt (decoder-only model)"), ("prompt_example", "prompt of the first row"),
                ("decoder_prompt", "decoder prompt (speech model; not scored)"),
                ("feature_extractor", "feature extractor"), ("longest_clip_s", "longest clip (s)")]
DATA_LABELS = [("path", "data file"), ("sha256", "sha256 of the data file"), ("format", "format"),
               ("rows", "rows read"), ("outputs", "outputs")]
COLUMN_LABELS = {
    "beam": "beam width", "resolved_share": "search-side rows resolved", "resolved": "resolved rows",
    "corpus_delta": "change in corpus metric", "time_ratio": "decode time (x)", "metric": "metric",
    "flip_share": "model-side rows that flip", "short_share": "model-side outputs shorter than reference",
    "best_penalty": "best penalty form", "best_alpha": "best alpha", "alpha": "alpha", "penalty": "penalty form",
}


# ------------------------------------------------------------------------ formatting (triage.display)
def _num_markup(summary: Summary):
    """num(path, kind): the value at `path` in summary.json, shown formatted, tagged with its path."""

    def num(path: str, kind: str = "int") -> Markup:
        v = get_path(summary, path)
        text = {"int": lambda x: fmt_num(x, 0), "pct": fmt_pct, "float": lambda x: fmt_num(x, 3)}[kind](v)
        raw = "" if v is None else json.dumps(v)
        return Markup('<span class="n" data-key="{}" data-value="{}">{}</span>').format(path, raw, text)

    return num


# ------------------------------------------------------------------------ generic tables
def generic_table(obj: Any) -> dict[str, Any]:
    """A summary value of unknown shape as {kind: kv|table|text, ...} for the template."""
    if isinstance(obj, list) and obj and all(isinstance(r, dict) for r in obj):
        cols: list[str] = []
        for r in obj:
            cols += [k for k in r if k not in cols]
        return {"kind": "table", "cols": [(c, COLUMN_LABELS.get(c, c.replace("_", " "))) for c in cols],
                "rows": [[_cell(c, r.get(c)) for c in cols] for r in obj]}
    if isinstance(obj, dict):
        return {"kind": "kv", "pairs": [(COLUMN_LABELS.get(k, str(k).replace("_", " ")), _cell(k, v))
                                        for k, v in obj.items()]}
    return {"kind": "text", "text": fmt_value(obj)}


def _cell(key: str, v: Any) -> str:
    if isinstance(v, float) and (key.endswith("_share") or key.endswith("share")):
        return fmt_pct(v)
    return fmt_value(v)


# ------------------------------------------------------------------------ studies
def _study_block(key: str, val: Any) -> dict[str, Any]:
    """A study's block from its view (triage.studies, one module per study); a section of a shape
    the view cannot read is shown as a plain table."""
    try:
        section = SECTIONS[key].from_json(val) if isinstance(val, dict) else val
        view = STUDIES[key].view(section)
        block: dict[str, Any] = {"lines": view.lines, "tables": view.tables, "notes": view.notes}
        if view.chart is not None:
            block["chart"] = getattr(charts, view.chart.kind)(**view.chart.args)
        interrupted = bool(getattr(section, "interrupted", False))
    except (TypeError, ValueError, AttributeError, KeyError):
        raw = val.to_json() if isinstance(val, Section) else val
        block = {"lines": [], "tables": [], "notes": [], "generic": generic_table(raw)}
        interrupted = isinstance(raw, dict) and bool(raw.get("interrupted"))
    block.update(key=key, title=STUDIES[key].TITLE, interrupted=interrupted)
    return block


def sweep_blocks(studies: dict[str, Any]) -> list[dict[str, Any]]:
    """One block per study present (summary key -> its section, typed or as read from summary.json),
    in the registry's order."""
    return [_study_block(key, studies[key]) for key in STUDIES if studies.get(key)]


# ------------------------------------------------------------------------ rows
def _side(rec: dict[str, Any] | None) -> dict[str, Any] | None:
    if not rec:
        return None
    pieces = list(rec.get("pieces") or [])
    lps = list(rec.get("logprobs") or [])
    ids = list(rec.get("ids") or [])
    return {"pieces": pieces, "logprobs": lps, "ids": ids}


def _lp(x: Any) -> float:
    return float(x) if x is not None else -math.inf


def token_view(tok: dict[str, Any] | None) -> dict[str, Any] | None:
    """Side-by-side positions, the first position where reference and output differ, the weakest
    reference token (lowest log-prob; a forbidden token, minus infinity, counts as lowest)."""
    if not tok:
        return None
    ref, out = _side(tok.get("reference")), _side(tok.get("output"))
    if ref is None and out is None:
        return None
    rl = len(ref["pieces"]) if ref else 0
    ol = len(out["pieces"]) if out else 0
    diverge = None
    if ref and out:
        ra, oa = ref["ids"] or ref["pieces"], out["ids"] or out["pieces"]
        for i in range(min(rl, ol)):
            if ra[i] != oa[i]:
                diverge = i
                break
        if diverge is None and rl != ol:
            diverge = min(rl, ol)
    worst = None
    if ref and ref["logprobs"]:
        worst = min(range(len(ref["logprobs"])), key=lambda i: _lp(ref["logprobs"][i]))
    rows = []
    for i in range(max(rl, ol)):
        rows.append((
            i + 1,
            ref["pieces"][i] if i < rl else None, _lpt(ref["logprobs"], i) if ref and i < rl else "",
            out["pieces"][i] if i < ol else None, _lpt(out["logprobs"], i) if out and i < ol else "",
            ("d" if i == diverge else "") + (" w" if i == worst else ""),
        ))
    return {"rows": rows, "diverge": diverge, "worst": worst, "has_ref": ref is not None, "has_out": out is not None}


def _lpt(lps: list[Any], i: int) -> str:
    if i >= len(lps):
        return ""
    return "-inf" if lps[i] is None else f"{float(lps[i]):.2f}"


def _row_extras(r: dict[str, Any], tok: dict[str, Any] | None) -> list[tuple[str, str]]:
    """Optional per-row results from other stages: lost_at* (where the beam dropped the reference), exact*."""
    extras = []
    for k, v in r.items():
        if (k.startswith(("lost_", "exact", "keeps_at_beam"))) and not (v is None or (isinstance(v, float) and math.isnan(v))) \
                and v != "":
            extras.append((k.replace("_", " "), fmt_value(v)))
    for k in ("lost_at", "exact"):
        if tok and isinstance(tok.get(k), dict):
            for kk, vv in tok[k].items():
                extras.append((f"{k.replace('_', ' ')} {kk}", fmt_value(vv)))
        elif tok and tok.get(k) is not None:
            extras.append((k.replace("_", " "), fmt_value(tok[k])))
    return extras


def _rows(failed: pd.DataFrame, by_id: dict[str, dict[str, Any]], metric: str,
          settings: DecoderSettings | None) -> list[dict[str, Any]]:
    out = []
    for r in failed.to_dict("records"):
        tok = by_id.get(str(r.get("id")))
        gap = r.get("score_gap")
        row = dict(r)
        row.update(
            id=str(r.get("id")),
            gap=gap if _finite(gap) else None,
            gap_text=fmt_num(gap, 3),
            gap_attr=f"{float(gap):.6g}" if _finite(gap) else "",
            metric_value=r.get(metric),
            metric_text=fmt_num(r.get(metric), 1),
            tokens=token_view(tok),
            extras=_row_extras(r, tok),
            ref_pen=_penalty(settings, r.get("ref_len")),
            out_pen=_penalty(settings, r.get("out_len")),
        )
        if "audio_seconds" in r:  # an audio source: its file name and duration (no audio, no link on the page)
            secs = r.get("audio_seconds")
            name = PurePath(str(r.get("source") or "").strip()).name
            row["source"] = f"{name} · audio, {fmt_num(secs, 2)} s" if _finite(secs) else f"{name} · audio"
        out.append(row)
    return out


PAGE_ROWS_PER_VERDICT = 1000


class PageRows:
    """What the page shows of a run's rows, gathered part by part, so that a run of any size
    makes a page of bounded size: the score gap and verdict of every compared row, for the
    histogram, and the first `per_verdict` failed rows of each verdict, in input order, with
    their token records. verdicts.csv keeps every row."""

    def __init__(self, per_verdict: int | None = None):
        self.per_verdict = per_verdict or PAGE_ROWS_PER_VERDICT
        self.rows = 0                       # rows seen
        self.failed = 0                     # failed rows seen
        self.taken: dict[str, int] = {}     # verdict -> rows kept
        self.parts: list[pd.DataFrame] = []
        self.tokens: dict[str, dict[str, Any]] = {}
        self.wanted: set[str] = set()       # ids of the kept rows
        self.gaps = array("d")
        self.gap_verdicts = array("b")      # each gap's verdict, as its index in COMPARED
        self.nonfinite = 0                  # compared rows with an infinite score gap
        self.columns: list[str] = []

    def add(self, verdicts: pd.DataFrame, tokens: list[dict[str, Any]]) -> None:
        self.add_rows(verdicts)
        self.add_tokens(tokens)

    def add_rows(self, verdicts: pd.DataFrame) -> None:
        self.rows += len(verdicts)
        if not len(verdicts):
            return
        self.columns = self.columns or list(verdicts.columns)
        failed = verdicts[verdicts["verdict"] != "correct"]
        self.failed += len(failed)
        compared = failed[failed["verdict"].isin(COMPARED)]
        for gap, verdict in zip(compared["score_gap"], compared["verdict"], strict=True):
            if _finite(gap):
                self.gaps.append(float(gap))
                self.gap_verdicts.append(COMPARED.index(verdict))
            else:
                self.nonfinite += 1
        rank = failed.groupby("verdict", sort=False).cumcount() + failed["verdict"].map(
            lambda v: self.taken.get(v, 0))
        keep = failed[rank < self.per_verdict]
        for v, k in keep["verdict"].value_counts().items():
            self.taken[v] = self.taken.get(v, 0) + int(k)
        if len(keep):
            self.parts.append(keep)
            self.wanted.update(str(x) for x in keep["id"])

    def add_tokens(self, tokens: list[dict[str, Any]]) -> None:
        for t in tokens:
            key = str(t.get("id"))
            if key in self.wanted:
                self.tokens[key] = t

    def frame(self) -> pd.DataFrame:
        if not self.parts:
            return pd.DataFrame(columns=self.columns)
        return pd.concat(self.parts, ignore_index=True) if len(self.parts) > 1 else self.parts[0]

    @property
    def shown(self) -> int:
        return sum(len(p) for p in self.parts)


def _penalty(settings: DecoderSettings | None, length: Any) -> str:
    if settings is None or not _finite(length):
        return ""
    return f"{settings.length_penalty(max(int(length), 1)):.4g}"


# ------------------------------------------------------------------------ the page
def _env():
    from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape  # noqa: F401

    env = Environment(loader=PackageLoader("triage.report", "templates"), autoescape=select_autoescape(default=True),
                      trim_blocks=True, lstrip_blocks=True)
    env.filters.update(num=fmt_num, pct=fmt_pct, interval=fmt_interval, value=fmt_value)
    return env


def _script(env) -> tuple[Markup, str]:
    src = env.loader.get_source(env, "report.js")[0].strip()
    if "</" in src:
        raise ValueError("report.js must not contain '</'")
    digest = base64.b64encode(hashlib.sha256(src.encode("utf-8")).digest()).decode("ascii")
    return Markup(src), f"sha256-{digest}"


def _settings(summary: Summary) -> DecoderSettings | None:
    try:
        return DecoderSettings.from_dict(summary.settings or {})
    except (TypeError, ValueError):
        return None


def _unset(v: Any) -> bool:
    return v is None or v == "" or v == [] or v == ()


def _labelled(d: Any, labels: list[tuple[str, str]], always: tuple[str, ...] = (),
              skip_unset: bool = False) -> tuple[list[tuple[str, str, str]], list[str]]:
    """(key, label, text) for known keys in order, then the unknown ones; and the labels left unset."""
    d = d if isinstance(d, dict) else {}
    known = {k for k, _ in labels}
    pairs = [(k, lab) for k, lab in labels if k in d or k in always]
    pairs += [(k, str(k).replace("_", " ")) for k in d if k not in known]
    items, unset = [], []
    for k, lab in pairs:
        if skip_unset and _unset(d.get(k)) and k not in always:
            unset.append(lab)
        else:
            items.append((k, lab, fmt_value(d.get(k))))
    return items, unset


def render_report(summary: Summary, verdicts: pd.DataFrame, tokens: list[dict[str, Any]],
                  run_info: dict[str, Any]) -> str:
    """The page for a run held in memory (its verdicts frame and token records)."""
    page = PageRows()
    page.add(verdicts, tokens)
    return render_page(summary, page, run_info)


def render_page(summary: Summary, page: PageRows, run_info: dict[str, Any]) -> str:
    """The page of a run: its typed Summary (with its recommendation decided), the rows the page
    lists (PageRows) and run.json's content."""
    env = _env()
    script, script_hash = _script(env)
    run_info = run_info or {}
    metric = summary.options.metric or ("chrf" if "chrf" in page.columns else "bleu")
    settings = _settings(summary)
    rows = _rows(page.frame(), page.tokens, metric, settings)
    counts = summary.counts or {}
    buckets = summary.buckets or []
    gaps = list(page.gaps)
    nonfinite = page.nonfinite
    rec = summary.recommendation
    action = rec.action.value if rec is not None else Action.INCONCLUSIVE.value
    sweeps = sweep_blocks(summary.studies())
    s = summary.settings or {}
    settings_items, settings_unset = _labelled(s, SETTINGS_LABELS, ("beam", "penalty", "alpha"), skip_unset=True)
    return env.get_template("report.html.j2").render(
        s=summary, run=run_info, rows=rows, n_rows=page.rows, n_failed=page.failed, per_verdict=page.per_verdict,
        metric=metric, metric_reach="at least" if higher_is_better(metric) else "at most",
        counts=counts, buckets=buckets, verdict_order=[v for v in VERDICT_ORDER if v in counts] or list(VERDICT_ORDER),
        labels=charts.LABELS, colours=charts.COLOURS, ink=charts.INK,
        action=action, action_text=ACTIONS.get(action, action), action_meaning=ACTION_MEANING.get(action, ""),
        because=rec.because if rec is not None else "", missing=(rec.missing if rec is not None else None) or [],
        bars=charts.length_bars(buckets),
        histogram=charts.gap_histogram(gaps, [COMPARED[i] for i in page.gap_verdicts], summary.options.margin),
        n_gaps=len(gaps),
        nonfinite_gaps=nonfinite,
        model_items=_labelled(summary.model, MODEL_LABELS, ("path", "sha256"))[0],
        data_items=_labelled(dataclasses.asdict(summary.data), DATA_LABELS, ("path", "sha256"))[0],
        settings_items=settings_items, settings_unset=settings_unset,
        bucket_verdicts=[v for v in VERDICT_ORDER if any(b.counts.get(v) for b in buckets)
                         or v in ("search", "model")],
        penalty_text=PENALTY_TEXT.get(s.get("penalty"), "") if (settings is None or settings.normalizes)
        else "score = sum of log-probs (no length penalty at these settings)",
        sweeps=sweeps, bucket_values=sorted({r.get("bucket") for r in rows if r.get("bucket")},
                                            key=lambda b: [x.range for x in buckets].index(b)
                                            if b in [x.range for x in buckets] else 1 << 30),
        script=script, script_hash=script_hash, num=_num_markup(summary),
    )
