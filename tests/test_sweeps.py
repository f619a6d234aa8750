"""Sweeps: wider beams, the beam curve, length-penalty re-ranking, and the recommendation they feed.

Dev sets are built from the tiny model's own decodes, so what a wider beam or another alpha
does to them is known in advance.
"""

from __future__ import annotations

import copy
import math

import pandas as pd
import pytest
import torch
from sacrebleu.metrics import CHRF
from tinymodels import make_marian, sentences

from triage.decision import Evidence, recommend, weigh
from triage.decoding.decode import decode
from triage.errors import OptionError
from triage.models.describe import model_settings
from triage.models.transformers_backend import TransformersModel
from triage.run.pipeline import TriageOptions, run_triage
from triage.studies import WidenSection
from triage.studies.plan import estimate_seconds, parse_alphas, parse_widths
from triage.studies.runner import run_studies

N = 32
MAX_NEW = 24
OPTS = TriageOptions(progress=False)


@pytest.fixture(scope="module")
def tiny():
    # one thread: tiny matrices gain nothing from more, and threads fight on the shared cores
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    torch.manual_seed(0)
    m, tok = make_marian(seed=0, d_model=16, num_beams=2, length_penalty=1.0, max_new_tokens=MAX_NEW,
                         eos_bias=2.0)
    tm = TransformersModel(m, tok)
    src = sentences(N, seed=1)
    yield tm, model_settings(tm), src, tm.tokenize_sources(src)
    torch.set_num_threads(threads)


def _decided(result, done):
    """The recommendation of the result's summary with the studies' sections in it (a copy)."""
    summary = copy.copy(result.summary)
    done.into(summary)
    return recommend(summary)


def _frame(src, refs, outs):
    return pd.DataFrame({"id": [f"r{i}" for i in range(len(src))], "source": src,
                         "references": [[r] for r in refs], "output": outs})


@pytest.fixture(scope="module")
def widen_plant(tiny):
    """reference := beam-8 output where it outscores the beam-2 output; output := beam-2 output."""
    tm, s, src, ids = tiny
    d2 = decode(tm, s, ids, batch_size=64)
    d8 = decode(tm, s.replace(beam=8), ids, batch_size=64)
    planted = [i for i in range(N) if d8[i].finished and d8[i].text != d2[i].text and d8[i].score > d2[i].score]
    refs = [d8[i].text if i in planted else d2[i].text for i in range(N)]
    result = run_triage(tm, _frame(src, refs, [d.text for d in d2]), s, OPTS)
    done = run_studies(tm, result, widen=[8], beam_curve_max=2, progress=False)
    return result, done, planted


def test_widen_records_what_generate_returns(tiny, widen_plant):
    tm, s, src, ids = tiny
    result, done, planted = widen_plant
    assert len(planted) >= 10
    table = done.tables["widen"]
    assert sorted(table["row"]) == planted  # only the failed rows are re-decoded
    for rec in table.head(12).itertuples():  # a dozen rows keep the test fast
        # transformers' own beam search, one row at a time, as the source of truth
        out = tm.model.generate(input_ids=torch.tensor([ids[rec.row]]), num_beams=8, length_penalty=1.0,
                                max_new_tokens=MAX_NEW, do_sample=False, early_stopping=False,
                                return_dict_in_generate=True, output_scores=True)
        seq = out.sequences[0, 1:].tolist()
        text = tm.detokenize(seq[: seq.index(tm.end_id)] if tm.end_id in seq else seq)
        assert rec.output == text
        assert rec.decoder_score == pytest.approx(float(out.sequences_scores[0]), abs=1e-4)
        # the sweep's own force-scored score matches generate's sequences_scores (sum / len**alpha)
        assert rec.score == pytest.approx(float(out.sequences_scores[0]), abs=1e-4)


def test_widen_shares_follow_from_recorded_scores(tiny, widen_plant):
    result, done, planted = widen_plant
    w = done.sections["widen"]
    entry = w.widths[0]
    table = done.tables["widen"]
    margin = result.options.margin
    assert result.summary.counts["search"] == len(planted)
    # reference score at width 8 recomputed from the recorded log-probs: sum / len**alpha, with len
    # counting the end token (transformers' BeamHypotheses.add, measured in test_scoring)
    for rec in table.itertuples():
        refs, _ = result.scores[rec.row]
        lp = refs[0].logprobs
        assert rec.ref_score == pytest.approx(math.fsum(lp) / len(lp) ** 1.0, abs=1e-6)
    search = table[table["verdict"] == "search"]
    resolved = ((search["score"] >= search["ref_score"] - margin) | search["equals_reference"]).sum()
    assert entry.resolved == resolved
    assert entry.resolved_share == pytest.approx(resolved / len(search))
    # every planted reference is the beam-8 output, so each one is found and counts as resolved
    assert search["equals_reference"].all() and search["resolved"].all()
    assert entry.resolved_share == 1.0
    # corpus metric recomputed with sacrebleu: failed rows take the widened output, the others keep theirs
    outputs = result.verdicts["output"].tolist()
    for rec in table.itertuples():
        outputs[rec.row] = rec.output
    refs = [result.verdicts["reference"].tolist()]
    assert entry.corpus_after == pytest.approx(CHRF().corpus_score(outputs, refs).score, abs=1e-9)
    before = CHRF().corpus_score(result.verdicts["output"].tolist(), refs).score
    assert entry.corpus_delta == pytest.approx(entry.corpus_after - before, abs=1e-9)
    assert entry.corpus_delta > 0
    assert entry.seconds_per_row > 0 and entry.time_ratio > 0
    assert w.current.reproduced_share == 1.0  # the given outputs are the model's beam-2 outputs
    assert set(done.tables) == {"widen", "beam_curve"}
    rec = _decided(result, done)
    assert rec.action == "widen-beam"
    assert "widen to 8: resolves 100% of search-side rows" in rec.because


def test_beam_width_one_is_greedy(tiny, widen_plant):
    """Beam width 1 is greedy search (common practice): the arg-max token at every step."""
    tm, s, src, ids = tiny
    result, done, _ = widen_plant
    curve = done.sections["beam_curve"]
    assert [p.beam for p in curve.points] == [1, 2]
    table = done.tables["beam_curve"]
    greedy_texts = []
    with torch.no_grad():
        for row in ids[:16]:
            enc = tm.model.get_encoder()(input_ids=torch.tensor([row]))
            dec = [tm.start_id]
            for _ in range(MAX_NEW):
                logits = tm.model(encoder_outputs=enc, decoder_input_ids=torch.tensor([dec])).logits[0, -1]
                nxt = int(logits.argmax())
                if nxt == tm.end_id:
                    break
                dec.append(nxt)
            greedy_texts.append(tm.detokenize(dec[1:]))
    at1 = table[table["beam"] == 1].sort_values("row")["output"].tolist()
    assert at1[:16] == greedy_texts
    refs = [result.verdicts["reference"].tolist()]
    assert curve.points[0].corpus == pytest.approx(CHRF().corpus_score(at1, refs).score, abs=1e-9)
    at2 = table[table["beam"] == 2].sort_values("row")["output"].tolist()
    assert at2 == result.verdicts["output"].tolist()  # width 2 is the current decoder


def test_mostly_model_failures_recommend_fixing_the_model(tiny):
    tm, s, src, ids = tiny
    outs = [d.text for d in decode(tm, s, ids, batch_size=64)]
    result = run_triage(tm, _frame(src, sentences(N, seed=7), outs), s, OPTS)  # random references
    assert result.summary.counts["model"] >= 0.8 * N
    done = run_studies(tm, result, widen=[4], length_penalty=True, progress=False)
    rec = _decided(result, done)
    assert rec.action == "fix-model", rec
    assert "model-side" in rec.because and "widening to 4" in rec.because
    # flips recomputed by hand for one grid point: gnmt ((5+len)/6)**alpha (formula from memory)
    g = next(x for x in done.sections["length_penalty"].grid if x.penalty == "gnmt" and x.alpha == 0.6)
    flips = 0
    for i, (refs, out) in result.scores.items():
        ref = max(r.logprob_sum / ((5 + r.length) / 6) ** 0.6 for r in refs)
        o = out.logprob_sum / ((5 + out.length) / 6) ** 0.6
        flips += result.verdicts["verdict"].iat[i] == "model" and ref - o > result.options.margin
    assert g.model_to_search == flips


def test_short_model_side_outputs_recommend_the_length_penalty(tiny):
    """Outputs decoded at alpha 0 (short), references decoded at alpha 1.2 (longer)."""
    tm, s, src, ids = tiny
    s0 = s.replace(beam=4, alpha=0.0)
    short = decode(tm, s0, ids, batch_size=64)
    long = decode(tm, s.replace(beam=4, alpha=1.2), ids, batch_size=64)
    planted = [i for i in range(N) if long[i].finished and len(long[i].ids) > len(short[i].ids)]
    assert len(planted) >= 10
    refs = [long[i].text if i in planted else short[i].text for i in range(N)]
    result = run_triage(tm, _frame(src, refs, [d.text for d in short]), s0, OPTS)
    done = run_studies(tm, result, length_penalty=True, redecode_alpha=[1.2], progress=False)
    lp = done.sections["length_penalty"]
    assert lp.brevity.short_share >= 0.5
    assert lp.best.flip_share >= 0.3
    # the redecoded verdicts come from a real second triage at alpha 1.2: the planted rows now match
    red = lp.redecode[0]
    assert red.counts["correct"] >= len(planted)
    assert red.corpus_delta > 0
    rec = _decided(result, done)
    assert rec.action == "tune-length-penalty", rec
    assert rec.missing is None and "missing" not in rec.to_json()


def test_interrupt_keeps_finished_widths_and_estimate(tiny, widen_plant, monkeypatch):
    tm, s, src, ids = tiny
    result, _, planted = widen_plant
    est = estimate_seconds(tm, result, widen=[4, 6], max_rows=5)
    assert est["seconds"] > 0 and set(est["steps"]) == {"widen"} and est["sample_rows"] == 4
    import importlib

    sw = importlib.import_module("triage.decoding.decode")  # the studies look decode up when they run

    real = sw.decode

    def stop_at_six(model, settings, src, **kw):
        if settings.beam == 6:
            raise KeyboardInterrupt
        return real(model, settings, src, **kw)

    monkeypatch.setattr(sw, "decode", stop_at_six)
    out = run_studies(tm, result, widen=[4, 6], max_rows=5, seed=3, progress=False)
    assert out.interrupted and out.sections["widen"].interrupted
    assert [w.beam for w in out.sections["widen"].widths] == [4]
    assert out.sections["widen"].rows.redecoded == 5 and out.sections["widen"].rows.sampled
    assert len(out.tables["widen"]) == 5


def test_parse_widths_and_alphas():
    assert parse_widths("16,4,8", 2) == [4, 8, 16]
    assert parse_widths("x2,x4", 4) == [8, 16]
    assert parse_widths("x2, 12", 5) == [10, 12]
    for bad in ("4", "x1", "eight", ""):
        with pytest.raises(OptionError):
            parse_widths(bad, 4)
    assert parse_alphas("0:1.2:0.2") == [0.0, 0.2, 0.4, 0.6, 0.8, 1.0, 1.2]
    assert parse_alphas("1,0.5") == [0.5, 1.0]
    with pytest.raises(OptionError):
        parse_alphas("0:1:-1")


def test_recommend_weighs_the_metric_and_names_missing_evidence():
    counts = {"search": 15, "model": 5, "tie": 0}
    hurt = {"metric": "chrf", "widths": [{"beam": 8, "resolved_share": 0.6, "corpus_delta": -1.5, "time_ratio": 3.0,
                                          "model_rows": {"rows": 5, "worse": 4}}]}
    r = weigh(Evidence(counts, widen=WidenSection.from_json(hurt)))  # a section of another writer, read leniently
    assert r.action == "inconclusive" and "-1.5 chrf" in r.because and "4 of 5 model-side" in r.because
    assert weigh(Evidence(counts)).missing == ["re-decoding with a wider beam (--widen)"]
    split = weigh(Evidence({"search": 9, "model": 9, "tie": 2}))
    assert split.action == "inconclusive" and len(split.missing) == 2


def test_study_sections_read_back_as_written_and_match_the_shipped_schema(tiny, widen_plant):
    """Each study's typed section writes summary.json's section and reads it back unchanged; every
    section validates against the schema shipped in the package (checked with jsonschema)."""
    import copy
    import dataclasses
    import json
    from pathlib import Path

    import jsonschema

    import triage
    from triage.report.page import sweep_blocks
    from triage.studies import SECTIONS, STUDIES
    from triage.studies.exact import exact_check
    from triage.studies.where_lost import where_lost

    tm, s, src, ids = tiny
    result, done_plant, planted = widen_plant
    part = dataclasses.replace(result, verdicts=result.verdicts.copy(), summary=copy.copy(result.summary))
    done = run_studies(tm, part, alphas=[0.0, 0.5, 1.0], progress=False)
    part.summary.where_lost = where_lost(tm, part, max_width=8)  # small budgets keep the test short
    part.summary.exact = exact_check(tm, part, max_tokens=8, max_nodes=200, max_seconds=0.2)
    from types import SimpleNamespace

    from triage.studies.reproduce import FailedRowSample, check_outputs

    sample = FailedRowSample(4, seed=0)  # the outputs check on the planted run's failed rows
    sample.add_step(SimpleNamespace(verdicts=result.verdicts, offset=0, outputs=result.verdicts["output"].tolist()))
    reproduction = check_outputs(tm, result.settings, sample)
    assert reproduction.checked == 4
    sections = {"reproduction": reproduction.to_json(),
                "widen": done_plant.sections["widen"].to_json(), "beam_curve": done_plant.sections["beam_curve"].to_json(),
                "length_penalty": done.sections["length_penalty"].to_json(),
                "where_lost": part.summary.where_lost.to_json(), "exact": part.summary.exact.to_json()}
    assert set(sections) == set(SECTIONS) == set(STUDIES)
    schema = json.loads((Path(triage.__file__).parent / "run" / "summary.schema.json").read_text(encoding="utf-8"))
    for key, written in sections.items():
        text = json.dumps(written)  # through the json module, as the run folder's writer does
        typed = SECTIONS[key].from_json(json.loads(text))
        assert json.dumps(typed.to_json()) == text, key  # same keys, same order, same values
        jsonschema.validate(written, schema["properties"][key])
        # the report shows a typed section and the same section read from JSON alike
        assert sweep_blocks({key: typed}) == sweep_blocks({key: json.loads(text)}), key
    widen = SECTIONS["widen"].from_json(sections["widen"])
    by_hand = max(sections["widen"]["widths"], key=lambda w: (w["resolved_share"], -w["beam"]))
    assert widen.best_width().beam == by_hand["beam"] == 8
    assert widen.best_width().model_rows.worse == by_hand["model_rows"]["worse"]
    assert widen.best_width().sentence_delta.search == by_hand["sentence_delta"]["search"]
    lp = done.sections["length_penalty"]
    assert lp.best.flip_share == sections["length_penalty"]["best"]["flip_share"]
    assert [c.alpha for c in lp.grid] == [0.0, 0.5, 1.0, 0.0, 0.5, 1.0]  # power, then gnmt
    assert sections["where_lost"]["rows"] == len(planted)  # every planted row is search-side
    assert part.summary.exact.budget_reached == sections["exact"]["budget reached"]


def test_a_section_of_another_shape_reads_leniently_or_raises():
    from triage.studies import SECTIONS

    partial = SECTIONS["widen"].from_json({"metric": "bleu", "rows": {"search": 3}})
    assert partial.rows.search == 3 and partial.rows.model is None and partial.widths == [] and partial.current is None
    for bad in ({"widths": "not a list"}, {"rows": 7}, {"widths": [1, 2]}):
        with pytest.raises(TypeError):
            SECTIONS["widen"].from_json(bad)
    # where_lost without search-side rows writes two keys only; they read back as two keys
    assert SECTIONS["where_lost"].from_json({"rows": 0, "max_width": 64}).to_json() == {"rows": 0, "max_width": 64}
