"""Would a wider beam or another length penalty help? Measured, not guessed.

Three sweeps over a finished triage (a TriageResult), each optional:

- widen: re-decode the failed rows (search, model and tie verdicts) with each wider beam
  under the same objective, and count how many search-side rows the wider beam resolves,
  what it does to the sentence and corpus metric, to model-side rows, and to decode time.
- beam_curve: corpus metric and decode time over beam widths 1..max on the dev set (or a
  seeded sample of it).
- length_penalty: re-rank reference against output under other penalties (power and gnmt,
  an alpha grid) from the recorded log-prob sums and lengths; no decoding. Optionally decode
  again at some alphas and re-triage those rows. Also a brevity check of model-side rows.

    from triage.studies.sweeps import run_sweeps, merge_sweeps
    sweeps = run_sweeps(model, result, widen=[8, 16], beam_curve_max=8, alphas=None,
                        redecode_alpha=[0.6], max_rows=200, devset=devset)
    tables = merge_sweeps(result.summary, sweeps)   # summary keys + a new recommendation

The summary keys are described in SWEEPS-SCHEMA.md beside the run-directory notes. Ctrl-C
during a sweep keeps what finished; the cut section says "interrupted": true.
"""

from __future__ import annotations

import math
import random
import time
from collections.abc import Sequence
from typing import Any

import pandas as pd

from triage.decoding.decode import decode
from triage.errors import OptionError
from triage.run.analysis import recommend, verdict_counts
from triage.run.metrics import corpus, sentence_scores
from triage.run.verdicts import matches_any
from triage.scoring.scorer import ScoreRequest, TargetScore, score_requests
from triage.settings import DecoderSettings

COMPARED = ("search", "model", "tie")
DEFAULT_ALPHAS = (0.0, 0.2, 0.4, 0.6, 0.8, 1.0, 1.2)
FORMS = ("power", "gnmt")
SUMMARY_KEYS = ("widen", "beam_curve", "length_penalty")


# --------------------------------------------------------------------------- option parsing
def parse_widths(text: str, current_beam: int) -> list[int]:
    """Wider beam widths from a comma list: plain widths ("4,8,16") or multiples of the
    current width ("x2,x4": 2 and 4 times the current width); both may be mixed.

    Every width must be wider than the current one; the result is sorted, without repeats.
    """
    widths: set[int] = set()
    for item in (x.strip() for x in str(text).split(",")):
        if not item:
            continue
        try:
            w = current_beam * int(item[1:]) if item[:1] in ("x", "X") else int(item)
        except ValueError:
            raise OptionError(f"beam widths: {item!r} is neither a width (8) nor a multiple of the current "
                              f"width (x2)") from None
        if w <= current_beam:
            raise OptionError(f"beam widths: {item!r} gives width {w}, not wider than the current width "
                              f"{current_beam}")
        widths.add(w)
    if not widths:
        raise OptionError(f"beam widths: no width in {text!r} (write e.g. 8,16 or x2,x4)")
    return sorted(widths)


def parse_alphas(text: str) -> list[float]:
    """Length-penalty exponents: a comma list ("0,0.5,1") or a range "start:stop:step" (stop included)."""
    text = str(text).strip()
    try:
        if ":" in text:
            start, stop, step = (float(x) for x in text.split(":"))
            if step <= 0 or stop < start:
                raise ValueError
            n = int(math.floor((stop - start) / step + 1e-9)) + 1
            values = [round(start + k * step, 10) for k in range(n)]
        else:
            values = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise OptionError(f"alphas: {text!r} is not a comma list of numbers or start:stop:step") from None
    if not values or not all(math.isfinite(v) for v in values):
        raise OptionError(f"alphas: {text!r} gives no finite value")
    return sorted(set(values))


# --------------------------------------------------------------------------- helpers
def _bar(total: int, desc: str, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="row", disable=not enabled or total == 0, leave=False)


def _sample(indices: Sequence[int], max_rows: int | None, seed: int) -> tuple[list[int], bool]:
    indices = list(indices)
    if max_rows is None or len(indices) <= max_rows:
        return indices, False
    return sorted(random.Random(seed).sample(indices, max_rows)), True


def _references(result, devset) -> tuple[list[list[str]], str]:
    """Every row's references: all of them from the dev set, else the best one from the verdicts."""
    n = len(result.verdicts)
    if devset is not None:
        frame = devset.frame if hasattr(devset, "frame") else devset
        refs = [list(r) for r in frame.reset_index(drop=True)["references"].tolist()]
        if len(refs) != n:
            raise OptionError(f"sweeps: the dev set has {len(refs)} rows, the triage result {n}")
        return refs, "all"
    return [[r] for r in result.verdicts["reference"].tolist()], "best"


def _sources(model, result, rows: Sequence[int]) -> list[list[int]]:
    prefix = result.settings.source_prefix
    texts = [prefix + s for s in result.verdicts["source"].iloc[list(rows)].tolist()]
    return model.tokenize_sources(texts) if texts else []


def _timed_decode(model, settings, src, desc, progress):
    with _bar(len(src), desc, progress) as bar:
        t0 = time.perf_counter()
        out = decode(model, settings, src, progress=bar.update)
        return out, time.perf_counter() - t0


def rescore(settings: DecoderSettings, target: TargetScore) -> float:
    """A scored target's objective under other settings, from its recorded log-prob sum and length."""
    if not target.scored:
        return math.nan
    if target.blocked_rule is not None or math.isinf(target.logprob_sum):
        return float("-inf")
    return settings.objective(target.logprob_sum, target.length)


def best_reference_score(settings: DecoderSettings, refs: Sequence[TargetScore]) -> float:
    values = [rescore(settings, r) for r in refs if r.scored]
    return max(values) if values else math.nan


def _label(ref: float, out: float, margin: float) -> str:
    diff = ref - out
    if diff > margin:
        return "search"
    if diff < -margin:
        return "model"
    return "tie"


def _mean(values: Sequence[float]) -> float | None:
    values = [v for v in values if v is not None and math.isfinite(v)]
    return sum(values) / len(values) if values else None


def _share(k: int, n: int) -> float | None:
    return k / n if n else None


# --------------------------------------------------------------------------- widen
def sweep_widen(model, result, widths: Sequence[int], *, references, ref_kind, max_rows=None, seed=0,
                progress=True, state: dict | None = None) -> tuple[dict[str, Any], pd.DataFrame]:
    """Re-decode the compared failed rows at each width; see SWEEPS-SCHEMA.md "widen"."""
    settings, opts, v = result.settings, result.options, result.verdicts
    metric, margin = opts.metric, opts.margin
    compared = [i for i in range(len(v)) if v["verdict"].iat[i] in COMPARED and i in result.scores]
    rows, sampled = _sample(compared, max_rows, seed)
    verdict_of = {i: v["verdict"].iat[i] for i in rows}
    outputs = v["output"].tolist()
    corpus_before = corpus(metric, outputs, references)[0] if len(v) else math.nan
    section: dict[str, Any] = {
        "metric": metric, "current_beam": settings.beam, "objective": settings.signature(),
        "references": ref_kind,
        "rows": {"failed": int(v["verdict"].isin(["search", "model", "tie", "blocked", "skipped"]).sum()),
                 "compared": len(compared), "redecoded": len(rows), "sampled": sampled, "seed": seed,
                 **{k: sum(1 for i in rows if verdict_of[i] == k) for k in COMPARED}},
        "current": None, "corpus_before": corpus_before, "widths": [], "notes": [], "interrupted": False,
    }
    if state is not None:
        state["widen"] = section
    table: list[dict[str, Any]] = []
    if state is not None:
        state["widen_table"] = table
    if not rows:
        return section, pd.DataFrame(table)
    src = _sources(model, result, rows)
    refs_rows = [references[i] for i in rows]
    before = sentence_scores(metric, [outputs[i] for i in rows], refs_rows)
    decode(model, settings, src[:1])  # warm-up, so the first timed width pays no start-up cost
    cur, t_cur = _timed_decode(model, settings, src, f"beam {settings.beam} (timing)", progress)
    section["current"] = {
        "beam": settings.beam, "seconds_per_row": t_cur / len(rows),
        "reproduced_share": sum(matches_any(d.text, [outputs[i]]) for d, i in zip(cur, rows, strict=True))
        / len(rows),
    }
    n_search = section["rows"]["search"]
    n_model = section["rows"]["model"]
    for w in widths:
        sw = settings.replace(beam=int(w))
        dec, t_w = _timed_decode(model, sw, src, f"beam {w}", progress)
        requests = [ScoreRequest(s, [list(d.ids)], [not d.finished]) for s, d in zip(src, dec, strict=True)]
        scored = score_requests(model, sw, requests, token_budget=opts.token_budget)
        texts = [d.text for d in dec]
        after = sentence_scores(metric, texts, refs_rows)
        new_outputs = list(outputs)
        per = []
        for k, i in enumerate(rows):
            ref_s, out_s = result.scores[i]
            new = scored[k][0]
            new_score = new.score if new.scored else math.nan
            ref_score = best_reference_score(sw, ref_s)
            old_score = rescore(sw, out_s)
            equals = matches_any(texts[k], references[i])
            resolved = equals or (math.isfinite(new_score) and new_score >= ref_score - margin)
            new_outputs[i] = texts[k]
            rec = {
                "row": i, "id": v["id"].iat[i], "verdict": verdict_of[i], "beam": int(w), "output": texts[k],
                "decoder_score": dec[k].score, "score": new_score, "ref_score": ref_score,
                "old_output_score": old_score, "resolved": bool(resolved), "equals_reference": bool(equals),
                "changed": not matches_any(texts[k], [outputs[i]]),
                "metric_before": before[k], "metric_after": after[k],
            }
            per.append(rec)
        table.extend(per)
        search = [r for r in per if r["verdict"] == "search"]
        model_rows = [r for r in per if r["verdict"] == "model"]
        deltas = {name: _mean([r["metric_after"] - r["metric_before"] for r in part])
                  for name, part in (("failed", per), ("search", search), ("model", model_rows))}
        worse = sum(r["metric_after"] < r["metric_before"] for r in model_rows)
        corpus_after = corpus(metric, new_outputs, references)[0]
        entry = {
            "beam": int(w), "objective": sw.signature(),
            "resolved": sum(r["resolved"] for r in search),
            "resolved_share": _share(sum(r["resolved"] for r in search), n_search),
            "equals_reference": sum(r["equals_reference"] for r in search),
            "equals_reference_share": _share(sum(r["equals_reference"] for r in search), n_search),
            "equals_reference_failed": sum(r["equals_reference"] for r in per),
            "changed": sum(r["changed"] for r in per),
            "sentence_delta": deltas,
            "model_rows": {
                "rows": n_model, "worse": worse,
                "better": sum(r["metric_after"] > r["metric_before"] for r in model_rows),
                "mean_delta": deltas["model"],
                "higher_score": sum(r["score"] > r["old_output_score"] + margin for r in model_rows),
            },
            "corpus_after": corpus_after, "corpus_delta": corpus_after - corpus_before,
            "seconds_per_row": t_w / len(rows), "time_ratio": t_w / t_cur if t_cur > 0 else None,
        }
        section["widths"].append(entry)
        if worse:
            section["notes"].append(f"beam {w} lowers {metric} on {worse} of {n_model} model-side rows "
                                    f"(mean {deltas['model']:+.1f})")
    return section, pd.DataFrame(table)


# --------------------------------------------------------------------------- beam curve
def sweep_beam_curve(model, result, max_beam: int, *, references, ref_kind, max_rows=None, seed=0,
                     progress=True, state: dict | None = None) -> tuple[dict[str, Any], pd.DataFrame]:
    """Decode the dev set (or a seeded sample) at widths 1..max_beam; see SWEEPS-SCHEMA.md."""
    if max_beam < 1:
        raise OptionError(f"beam curve: the widest beam must be at least 1, got {max_beam}")
    settings, metric, v = result.settings, result.options.metric, result.verdicts
    rows, sampled = _sample(range(len(v)), max_rows, seed)
    section: dict[str, Any] = {
        "metric": metric, "current_beam": settings.beam, "references": ref_kind, "rows": len(rows),
        "of": len(v), "sampled": sampled, "seed": seed, "points": [], "interrupted": False,
    }
    if state is not None:
        state["beam_curve"] = section
    table: list[dict[str, Any]] = []
    if state is not None:
        state["beam_curve_table"] = table
    if not rows:
        return section, pd.DataFrame(table)
    src = _sources(model, result, rows)
    refs_rows = [references[i] for i in rows]
    t1 = None
    decode(model, settings.replace(beam=1), src[:1])  # warm-up before timing
    for w in range(1, max_beam + 1):
        sw = settings.replace(beam=w)
        dec, t = _timed_decode(model, sw, src, f"curve beam {w}", progress)
        texts = [d.text for d in dec]
        t1 = t if t1 is None else t1
        section["points"].append({
            "beam": w, "objective": sw.signature(), "corpus": corpus(metric, texts, refs_rows)[0],
            "exact_share": sum(matches_any(x, r) for x, r in zip(texts, refs_rows, strict=True)) / len(rows),
            "mean_output_tokens": sum(len(d.ids) for d in dec) / len(rows),
            "seconds_per_row": t / len(rows), "time_ratio": t / t1 if t1 > 0 else None,
        })
        table.extend({"row": i, "id": v["id"].iat[i], "beam": w, "output": x, "score": d.score}
                     for i, x, d in zip(rows, texts, dec, strict=True))
    return section, pd.DataFrame(table)


# --------------------------------------------------------------------------- length penalty
class PenaltyTally:
    """Reference against output re-ranked under other length penalties, one compared row at a
    time: every number is a count or a running sum, so a streamed run can feed it step by step
    (`add_step`) and keep no row. `section()` gives the summary's "length_penalty" section."""

    def __init__(self, settings: DecoderSettings, margin: float, metric: str,
                 alphas: Sequence[float] | None = None):
        self.settings, self.margin, self.metric = settings, margin, metric
        self.alphas = list(DEFAULT_ALPHAS if alphas is None else alphas)
        self.base_beam = settings.beam if settings.beam > 1 else 2
        self.cells = [(form, float(a), settings.replace(beam=self.base_beam, penalty=form, alpha=float(a)))
                      for form in FORMS for a in self.alphas]
        self.grid = [{"counts": dict.fromkeys(COMPARED, 0), "model_to_search": 0, "search_to_model": 0}
                     for _ in self.cells]
        self.rows = 0
        self.brevity: dict[str | None, dict[str, float]] = {}  # None: all rows; else per bucket

    def add(self, verdict: str, bucket: str, best_ref: int, ref_scores: Sequence[TargetScore],
            out_score: TargetScore) -> None:
        """One compared row: its current verdict, bucket, best reference (0-based) and scores."""
        self.rows += 1
        for (_, _, s), cell in zip(self.cells, self.grid, strict=True):
            lab = _label(best_reference_score(s, ref_scores), rescore(s, out_score), self.margin)
            cell["counts"][lab] += 1
            cell["model_to_search"] += verdict == "model" and lab == "search"
            cell["search_to_model"] += verdict == "search" and lab == "model"
        out_len, ref_len = out_score.length, ref_scores[best_ref].length
        for key in (None, bucket):
            b = self.brevity.setdefault(key, {"rows": 0, "model_rows": 0, "shorter": 0, "ratio_model": 0.0,
                                              "ratio_all": 0.0})
            b["rows"] += 1
            b["ratio_all"] += out_len / ref_len
            if verdict == "model":
                b["model_rows"] += 1
                b["shorter"] += out_len < ref_len
                b["ratio_model"] += out_len / ref_len

    def add_step(self, part) -> None:
        """A pipeline step (pipeline.ChunkResult): its compared rows, in input order."""
        v = part.verdicts
        for j in range(len(v)):
            if v["verdict"].iat[j] in COMPARED and part.offset + j in part.scores:
                ref_s, out_s = part.scores[part.offset + j]
                self.add(v["verdict"].iat[j], v["bucket"].iat[j], int(v["best_ref"].iat[j]) - 1, ref_s, out_s)

    def section(self, bucket_order: Sequence[str]) -> dict[str, Any]:
        settings = self.settings
        n_model = (self.brevity.get(None) or {}).get("model_rows", 0)
        section: dict[str, Any] = {
            "metric": self.metric,
            "current": {"penalty": settings.penalty, "alpha": settings.alpha, "beam": settings.beam},
            "rescored_at_beam": self.base_beam,
            "note": None if self.base_beam == settings.beam else
            "greedy search (beam 1) applies no length penalty; ranks are for a beam of 2 or more",
            "rows": self.rows, "margin": self.margin, "grid": [], "best": None, "brevity": None, "redecode": [],
            "interrupted": False,
        }
        for (form, a, _), cell in zip(self.cells, self.grid, strict=True):
            section["grid"].append({"penalty": form, "alpha": a, "counts": dict(cell["counts"]),
                                    "model_to_search": cell["model_to_search"],
                                    "search_to_model": cell["search_to_model"],
                                    "flip_share": _share(cell["model_to_search"], n_model)})
        if section["grid"]:
            cur_alpha = settings.alpha
            best = max(section["grid"], key=lambda g: (g["model_to_search"] - g["search_to_model"],
                                                       -abs(g["alpha"] - cur_alpha), g["penalty"] == settings.penalty))
            section["best"] = {k: best[k] for k in ("penalty", "alpha", "model_to_search", "search_to_model",
                                                    "flip_share")}
        section["brevity"] = self._brevity(None)
        section["brevity"].pop("rows")
        section["brevity"]["buckets"] = [{"range": label, **{k: x for k, x in self._brevity(label).items()
                                                             if k != "shorter"}}
                                         for label in bucket_order if label in self.brevity]
        return section

    def _brevity(self, key: str | None) -> dict[str, Any]:
        b = self.brevity.get(key) or {"rows": 0, "model_rows": 0, "shorter": 0, "ratio_model": 0.0, "ratio_all": 0.0}
        m = int(b["model_rows"])
        return {"rows": int(b["rows"]), "model_rows": m, "shorter": int(b["shorter"]),
                "short_share": _share(int(b["shorter"]), m),
                "length_ratio": b["ratio_model"] / m if m else None,
                "length_ratio_all": b["ratio_all"] / b["rows"] if b["rows"] else None}


def sweep_length_penalty(model, result, alphas: Sequence[float] | None, *, redecode_alpha=None,
                         references=None, devset=None, max_rows=None, seed=0, progress=True,
                         state: dict | None = None, tally: PenaltyTally | None = None) -> dict[str, Any]:
    """Re-rank reference vs output over penalty forms x alphas; optionally decode at some alphas.

    tally: a PenaltyTally already fed with the rows (a streamed run); otherwise the rows of
    `result` are fed here."""
    settings, opts, v = result.settings, result.options, result.verdicts
    if tally is None:
        tally = PenaltyTally(settings, opts.margin, opts.metric, alphas)
        for i in range(len(v)):
            if v["verdict"].iat[i] in COMPARED and i in result.scores:
                ref_s, out_s = result.scores[i]
                tally.add(v["verdict"].iat[i], v["bucket"].iat[i], int(v["best_ref"].iat[i]) - 1, ref_s, out_s)
    order = list(dict.fromkeys(result.buckets["range"].tolist())) if len(result.buckets) else []
    section = tally.section(order)
    if state is not None:
        state["length_penalty"] = section
    if redecode_alpha:
        _redecode(model, result, list(redecode_alpha), section, references, devset, max_rows, seed, progress)
    return section


def _redecode(model, result, alphas, section, references, devset, max_rows, seed, progress) -> None:
    from triage.run.pipeline import run_triage

    settings, v = result.settings, result.verdicts
    form = settings.penalty if settings.penalty != "none" else "power"
    rows, sampled = _sample(range(len(v)), max_rows, seed)
    if not rows:
        return
    refs = [references[i] for i in rows] if references is not None else [[r] for r in v["reference"].iloc[rows]]
    frame = pd.DataFrame({
        "id": v["id"].iloc[rows].tolist(), "line": v["line"].iloc[rows].tolist(),
        "source": v["source"].iloc[rows].tolist(), "references": refs, "output": [None] * len(rows),
    })
    counts_before = verdict_counts(v["verdict"].iloc[rows])
    metric = result.options.metric
    corpus_before = corpus(metric, v["output"].iloc[rows].tolist(), refs)[0]
    import dataclasses

    opts = dataclasses.replace(result.options, progress=progress)
    for a in alphas:
        s = settings.replace(penalty=form, alpha=float(a), beam=max(settings.beam, 2))
        res = run_triage(model, frame, s, opts)
        score = res.summary["corpus_metric"]["score"]
        section["redecode"].append({
            "penalty": form, "alpha": float(a), "objective": s.signature(), "rows": len(rows), "sampled": sampled,
            "seed": seed, "counts": res.summary["counts"], "counts_before": counts_before, "corpus": score,
            "corpus_before": corpus_before, "corpus_delta": score - corpus_before,
        })


# --------------------------------------------------------------------------- the whole thing
class Sweeps(dict):
    """The summary keys of the sweeps that ran (JSON-ready: `summary.update(sweeps)` is safe),
    plus `.tables`: per-row DataFrames {"widen": .., "beam_curve": ..} kept out of the dict."""

    def __init__(self, *args: Any, **kw: Any) -> None:
        super().__init__(*args, **kw)
        self.tables: dict[str, pd.DataFrame] = {}


def run_sweeps(model, result, *, widen: Sequence[int] | None = None, beam_curve_max: int | None = None,
               alphas: Sequence[float] | None = None, redecode_alpha: Sequence[float] | None = None,
               max_rows: int | None = None, seed: int = 0, progress: bool = True, devset: Any = None,
               length_penalty: bool | None = None, penalty_tally: PenaltyTally | None = None) -> dict[str, Any]:
    """Run the asked-for sweeps on a TriageResult; returns the keys to merge into the summary.

    widen: wider beam widths (see parse_widths); beam_curve_max: decode at widths 1..this;
    alphas: the length-penalty grid (None: DEFAULT_ALPHAS; the re-ranking sweep runs when
    alphas or redecode_alpha is given, or length_penalty=True); redecode_alpha: decode all
    (sampled) rows again at these alphas and re-triage them; max_rows: a seeded sample of at
    most this many rows per decoding sweep; devset: the dev set given to run_triage (for all
    references of multi-reference rows; without it each row keeps its best reference);
    penalty_tally: a PenaltyTally fed step by step during a streamed run (run_triage with
    keep=False), used instead of the result's rows for the length-penalty re-ranking.

    Returned: a Sweeps dict {"widen": .., "beam_curve": .., "length_penalty": .. (those run),
    "sweeps_interrupted": bool}; per-row tables are in its `.tables` ({"widen": DataFrame of the
    re-decoded rows per width, "beam_curve": DataFrame of each row's output per width}).
    """
    if max_rows is not None and max_rows < 1:
        raise OptionError(f"max rows must be at least 1, got {max_rows}")
    decodes = bool(widen or beam_curve_max or redecode_alpha)
    references, ref_kind = _references(result, devset) if decodes else (None, None)
    out = Sweeps(sweeps_interrupted=False)
    state: dict[str, Any] = {}
    if length_penalty is None:
        length_penalty = alphas is not None or bool(redecode_alpha)
    step = None
    try:
        if length_penalty:
            step = "length_penalty"
            out["length_penalty"] = sweep_length_penalty(
                model, result, alphas, redecode_alpha=redecode_alpha, references=references, devset=devset,
                max_rows=max_rows, seed=seed, progress=progress, state=state, tally=penalty_tally)
        if widen:
            step = "widen"
            out["widen"], out.tables["widen"] = sweep_widen(
                model, result, sorted(set(int(w) for w in widen)), references=references, ref_kind=ref_kind,
                max_rows=max_rows, seed=seed, progress=progress, state=state)
        if beam_curve_max:
            step = "beam_curve"
            out["beam_curve"], out.tables["beam_curve"] = sweep_beam_curve(
                model, result, int(beam_curve_max), references=references, ref_kind=ref_kind,
                max_rows=max_rows, seed=seed, progress=progress, state=state)
    except KeyboardInterrupt:
        out["sweeps_interrupted"] = True
        if step in state:
            state[step]["interrupted"] = True
            out[step] = state[step]
            if f"{step}_table" in state:
                out.tables[step] = pd.DataFrame(state[f"{step}_table"])
    return out


def merge_sweeps(summary: dict[str, Any], sweeps: dict[str, Any]) -> dict[str, pd.DataFrame]:
    """Put the sweep keys into a summary, recompute its recommendation; returns the per-row tables."""
    for key in SUMMARY_KEYS:
        if key in sweeps:
            summary[key] = sweeps[key]
    summary["sweeps_interrupted"] = bool(sweeps.get("sweeps_interrupted"))
    summary["recommendation"] = recommend(summary.get("counts", {}), {k: summary[k] for k in SUMMARY_KEYS
                                                                       if k in summary})
    return dict(getattr(sweeps, "tables", {}))


# --------------------------------------------------------------------------- cost estimate
def estimate_seconds(model, result, *, widen: Sequence[int] | None = None, beam_curve_max: int | None = None,
                     alphas: Sequence[float] | None = None, redecode_alpha: Sequence[float] | None = None,
                     max_rows: int | None = None, seed: int = 0, sample: int = 4) -> dict[str, Any]:
    """Seconds the sweeps would take: decodes `sample` rows at the narrowest and widest width
    needed, interpolates the per-row time linearly in the width, and multiplies by the rows.

    Re-ranking (alphas) costs no decoding and is counted as 0. Returns {"seconds", "steps":
    {step: seconds}, "sample_rows", "per_row_seconds": {width: s}}.
    """
    settings, v = result.settings, result.verdicts
    compared = [i for i in range(len(v)) if v["verdict"].iat[i] in COMPARED and i in result.scores]
    n_widen = min(len(compared), max_rows) if max_rows else len(compared)
    n_all = min(len(v), max_rows) if max_rows else len(v)
    needed = set()
    if widen:
        needed |= {settings.beam, *map(int, widen)}
    if beam_curve_max:
        needed |= set(range(1, int(beam_curve_max) + 1))
    if redecode_alpha:
        needed.add(max(settings.beam, 2))
    if not needed or not len(v):
        return {"seconds": 0.0, "steps": {}, "sample_rows": 0, "per_row_seconds": {}}
    pool = compared if compared else list(range(len(v)))
    rows, _ = _sample(pool, sample, seed)
    src = _sources(model, result, rows)
    lo, hi = min(needed), max(needed)
    decode(model, settings.replace(beam=lo), src[:1])  # warm-up before timing
    measured = {}
    for w in sorted({lo, hi}):
        t0 = time.perf_counter()
        decode(model, settings.replace(beam=w), src)
        measured[w] = (time.perf_counter() - t0) / len(rows)

    def per_row(w: int) -> float:
        if hi == lo:
            return measured[lo]
        return measured[lo] + (measured[hi] - measured[lo]) * (w - lo) / (hi - lo)

    steps: dict[str, float] = {}
    if widen:
        steps["widen"] = n_widen * sum(per_row(w) for w in {settings.beam, *map(int, widen)})
    if beam_curve_max:
        steps["beam_curve"] = n_all * sum(per_row(w) for w in range(1, int(beam_curve_max) + 1))
    if redecode_alpha:
        steps["redecode"] = n_all * len(redecode_alpha) * per_row(max(settings.beam, 2))
    return {"seconds": sum(steps.values()), "steps": steps, "sample_rows": len(rows),
            "per_row_seconds": {w: per_row(w) for w in sorted(needed)}}
