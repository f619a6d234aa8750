"""Numbers in real run folders checked against sources outside triage, each named beside its check.

Runs go through the command line (triage.cli.main) and the checks read what it writes (summary.json,
verdicts.csv), so they hold whatever the library's insides look like. Sources:
- statsmodels' proportion_confint(method="wilson") for every Wilson interval of a summary;
- the gnmt length penalty lp(Y) = ((5 + |Y|)^a) / ((5 + 1)^a), Wu et al. 2016, "Google's Neural Machine
  Translation System", eq. 14 (cited from memory), and transformers' power form |Y|^a (its documented beam
  score: summed log-probs / length ** length_penalty);
- brute-force enumeration of every output of a Marian model (transformers' forward pass) at a length limit of 2;
- arithmetic on a model whose next-token distribution is uniform (every token -ln V, by construction);
- sacrebleu's corpus_score (chrF and BLEU) called directly, and transformers' own generate for the outputs a
  wider beam re-decodes.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import pytest
import sacrebleu
import torch
from statsmodels.stats.proportion import proportion_confint
from tinymodels import END, make_marian, make_wrapped_marian, random_sources, save_marian, sentences

from triage.cli import main
from triage.decoding.exact import PROVEN, exact_search
from triage.settings import DecoderSettings

ROOT = Path(__file__).resolve().parent.parent
SAMPLE_MODEL = ROOT / "sample_data" / "model"
SAMPLE_DATA = ROOT / "sample_data" / "devset.tsv"
COMPARED = ("search", "model", "tie")  # README: the search-side share is over search + model + tie rows


def run_cli(*args: str) -> tuple[dict, list[dict[str, str]]]:
    """`triage run ARGS --quiet --no-cache`; (summary.json, verdicts.csv rows) of the folder it wrote."""
    out = Path(args[args.index("--out") + 1])
    assert main(["run", *args, "--quiet", "--no-cache"]) == 0
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    with open(out / "verdicts.csv", encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    return summary, rows


def gnmt(n: int, a: float) -> float:
    """Wu et al. 2016, eq. 14 (from memory): lp(Y) = ((5 + |Y|)^a) / ((5 + 1)^a)."""
    return (5 + n) ** a / (5 + 1) ** a


def power(n: int, a: float) -> float:
    """transformers' beam-search score divisor (documented: length ** length_penalty)."""
    return n ** a


@pytest.fixture(scope="module")
def sample_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("sample") / "run"
    return run_cli("--model", str(SAMPLE_MODEL), "--data", str(SAMPLE_DATA), "--out", str(out))


# ------------------------------------------------------------------ Wilson intervals (statsmodels)
def test_every_wilson_interval_matches_statsmodels(sample_run):
    summary, rows = sample_run
    # counts taken from verdicts.csv, not from the summary
    k = sum(r["verdict"] == "search" for r in rows)
    n = sum(r["verdict"] in COMPARED for r in rows)
    assert n > 0
    share = summary["search_share"]
    assert (share["search"], share["compared"]) == (k, n)
    # source: statsmodels.stats.proportion.proportion_confint(count, nobs, alpha=0.05, method="wilson")
    assert share["interval95"] == pytest.approx(list(proportion_confint(k, n, alpha=0.05, method="wilson")),
                                                abs=1e-12)
    checked = 0
    for b in summary["buckets"]:
        part = [r for r in rows if r["bucket"] == b["range"]]
        kb = sum(r["verdict"] == "search" for r in part)
        nb = sum(r["verdict"] in COMPARED for r in part)
        assert b["rows"] == len(part)
        if nb == 0:
            assert b["interval95"] is None or all(math.isnan(x) for x in b["interval95"])
            continue
        want = proportion_confint(kb, nb, alpha=0.05, method="wilson")  # statsmodels
        assert b["interval95"] == pytest.approx(list(want), abs=1e-12), b["range"]
        checked += 1
    assert checked == len(summary["buckets"]) >= 4


# ------------------------------------------------------------------ length penalties (Wu et al. 2016)
@pytest.mark.parametrize("alpha", [0.0, 0.2, 0.6, 1.0, 1.3])
def test_gnmt_penalty_is_the_published_formula(alpha):
    # Wu et al. 2016, eq. 14 (from memory), computed here at several lengths
    s = DecoderSettings(beam=4, penalty="gnmt", alpha=alpha)
    for n in (1, 2, 3, 7, 10, 25, 141):
        want = ((5 + n) ** alpha) / ((5 + 1) ** alpha)
        assert s.length_penalty(n) == pytest.approx(want, rel=1e-12)
        assert s.objective(-7.5, n) == pytest.approx(-7.5 / want, rel=1e-12)
    if alpha > 0:  # lp(1) = 1 and it grows with length (eq. 14: 6/6 at |Y| = 1)
        assert s.length_penalty(1) == pytest.approx(1.0) and s.length_penalty(10) > s.length_penalty(9)


def test_length_penalty_grid_of_a_run_recounted_by_hand(sample_run):
    """Every cell of the run's length-penalty grid, recounted from verdicts.csv's log-prob sums and lengths
    with the penalties written out here (gnmt: Wu et al. 2016 eq. 14, from memory; power: transformers)."""
    summary, rows = sample_run
    lp = summary["length_penalty"]
    margin = summary["options"]["margin"]
    compared = [r for r in rows if r["verdict"] in COMPARED]
    assert lp["rows"] == len(compared) and lp["grid"]
    forms = {"gnmt": gnmt, "power": power}

    def recount(f, a: float) -> tuple[dict[str, int], int, int]:
        counts = dict.fromkeys(COMPARED, 0)
        m2s = s2m = 0
        for r in compared:
            gap = (float(r["ref_logprob"]) / f(int(r["ref_len"]), a)
                   - float(r["out_logprob"]) / f(int(r["out_len"]), a))
            lab = "search" if gap > margin else "model" if gap < -margin else "tie"  # README: tie = within margin
            counts[lab] += 1
            m2s += r["verdict"] == "model" and lab == "search"
            s2m += r["verdict"] == "search" and lab == "model"
        return counts, m2s, s2m

    seen = set()
    for cell in lp["grid"]:
        counts, m2s, s2m = recount(forms[cell["penalty"]], cell["alpha"])
        assert cell["counts"] == counts, (cell["penalty"], cell["alpha"])
        assert (cell["model_to_search"], cell["search_to_model"]) == (m2s, s2m), (cell["penalty"], cell["alpha"])
        seen.add(cell["penalty"])
    assert seen == {"gnmt", "power"}
    # the run's own objective (power, the checkpoint's alpha) recounted the same way gives its verdicts
    assert summary["settings"]["penalty"] == "power"
    counts, m2s, s2m = recount(power, summary["settings"]["alpha"])
    assert counts == {k: summary["counts"][k] for k in COMPARED} and m2s == s2m == 0
    # gnmt and power disagree somewhere, so the gnmt cells test the gnmt formula, not the power one
    assert any(recount(gnmt, a)[0] != recount(power, a)[0] for a in (0.4, 0.6, 1.0))


# ------------------------------------------------------------------ exact search (brute force)
@pytest.mark.parametrize("penalty,alpha", [("power", 0.0), ("power", 1.0), ("gnmt", 0.7), ("power", 0.7)])
def test_exact_search_on_marian_equals_brute_force_at_limit_two(penalty, alpha):
    """Every output of a Marian model at a length limit of 2 ([end], [a, end], [a, b] for tokens a, b other
    than the end token), scored from transformers' forward pass (log_softmax, summed) over the length
    penalty written out here: exact search returns the best one."""
    model = make_wrapped_marian(4)
    hf = model.model
    settings = DecoderSettings.from_generation_config(hf.generation_config, max_new_tokens=2, beam=2,
                                                      penalty=penalty, alpha=alpha)
    divisor = {"power": power, "gnmt": gnmt}[penalty]
    V = hf.config.vocab_size
    others = [t for t in range(V) if t != END]
    start = hf.generation_config.decoder_start_token_id
    for src in random_sources(3, seed=21):
        ids = torch.tensor([src])
        with torch.no_grad():
            enc = hf.get_encoder()(input_ids=ids)
            first = hf(encoder_outputs=enc, decoder_input_ids=torch.tensor([[start]])).logits[0, -1]
            lp1 = torch.log_softmax(first.double(), dim=-1)
            dec = torch.tensor([[start, a] for a in others])
            enc_rep = type(enc)(last_hidden_state=enc.last_hidden_state.expand(len(others), -1, -1))
            second = hf(encoder_outputs=enc_rep, decoder_input_ids=dec).logits[:, -1]
            lp2 = torch.log_softmax(second.double(), dim=-1)
        outputs = [((END,), float(lp1[END]))]
        for j, a in enumerate(others):
            outputs += [((a, b), float(lp1[a] + lp2[j, b])) for b in range(V)]
        assert len(outputs) == 1 + len(others) * V
        scored = sorted(((total / divisor(len(seq), alpha), seq) for seq, total in outputs), reverse=True)
        assert scored[0][0] > scored[1][0] + 1e-6  # a unique best, so "the best output" is well defined
        r = exact_search(model, settings, src)
        assert r.status == PROVEN
        got = tuple(r.best_tokens) + ((END,) if r.best_finished else ())
        assert got == scored[0][1]
        assert r.best_score == pytest.approx(scored[0][0], abs=1e-4)


# ------------------------------------------------------------------ a planted tie and --margin
def save_uniform_marian(path: Path, alpha: float) -> tuple[Path, int]:
    """A Marian checkpoint whose every next-token distribution is uniform (output weights and bias zero): a
    target of n scored tokens has log-prob -n ln V whatever its words. Returns (folder, V)."""
    model, tok = make_marian(seed=0, num_beams=4, length_penalty=alpha, max_new_tokens=30)
    with torch.no_grad():
        model.lm_head.weight.zero_()
        model.final_logits_bias.zero_()
        logits = model(**tok(["the train"], return_tensors="pt"), labels=tok(text_target=["a bus"],
                                                                              return_tensors="pt").input_ids).logits
    assert torch.all(logits == 0)  # the construction holds
    path.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(path)
    tok.save_pretrained(path)
    return path, model.config.vocab_size


def test_planted_tie_and_margin_flip_as_the_gap_says(tmp_path):
    alpha = 0.5
    model_dir, V = save_uniform_marian(tmp_path / "uniform", alpha)
    # (id, reference, output); lengths in tokens = words + the end token the tokenizer appends
    rows = [
        ("tie", "the train departs", "a bus arrives"),                       # 4 vs 4 tokens: equal scores
        ("short-ref", "the train departs", "a bus now arrives"),             # 4 vs 5
        ("long-ref", "the train from platform two", "bus late"),             # 6 vs 3
        ("close", "the train from platform two now is late", "a bus from platform two now is late late"),
    ]
    data = tmp_path / "dev.tsv"
    data.write_text("id\tsource\treference\toutput\n" + "".join(f"{i}\tcalling at north\t{r}\t{o}\n"
                                                                 for i, r, o in rows), encoding="utf-8")

    def gap(ref: str, out: str) -> float:
        # score of n tokens = -n ln V / n^alpha (uniform model; transformers' power penalty)
        n_r, n_o = len(ref.split()) + 1, len(out.split()) + 1
        return -n_r * math.log(V) / n_r ** alpha + n_o * math.log(V) / n_o ** alpha

    gaps = {i: gap(r, o) for i, r, o in rows}
    assert gaps["tie"] == 0.0 and 0.3 < gaps["close"] < 0.7 < gaps["short-ref"] and gaps["long-ref"] < -2

    def expected(margin: float) -> dict[str, str]:
        return {i: "tie" if abs(g) <= margin else "search" if g > 0 else "model" for i, g in gaps.items()}

    seen = {}
    for margin in (None, 0.7, 3.0):
        extra = [] if margin is None else ["--margin", str(margin)]
        summary, out = run_cli("--model", str(model_dir), "--data", str(data), "--out",
                               str(tmp_path / f"run-{margin}"), *extra)
        got = {r["id"]: r["verdict"] for r in out}
        assert got == expected(summary["options"]["margin"]), margin
        for r in out:  # the written gap is the arithmetic one
            assert float(r["score_gap"]) == pytest.approx(gaps[r["id"]], abs=1e-4)
        assert summary["counts"]["tie"] == sum(v == "tie" for v in got.values())
        planted = next(r for r in out if r["id"] == "tie")
        assert planted["ref_score"] == planted["out_score"]  # equal scores, not merely close ones
        seen[margin] = got
    # the default margin (1e-4): only the planted tie; a margin of 0.7 turns the 0.58 gap into a tie and
    # keeps the 0.85 one search-side; a margin of 3 makes every row a tie
    assert seen[None] == {"tie": "tie", "short-ref": "search", "long-ref": "model", "close": "search"}
    assert seen[0.7] == {"tie": "tie", "short-ref": "search", "long-ref": "model", "close": "tie"}
    assert set(seen[3.0].values()) == {"tie"}


# ------------------------------------------------------------------ corpus metrics (sacrebleu)
def test_corpus_chrf_of_a_real_run_is_sacrebleus(sample_run):
    summary, rows = sample_run
    metric = summary["corpus_metric"]
    assert metric["name"] == "chrf"
    chrf = sacrebleu.metrics.CHRF()  # sacrebleu's public API, its default chrF (char order 6, word order 0)
    want = chrf.corpus_score([r["output"] for r in rows], [[r["reference"] for r in rows]])
    assert metric["score"] == pytest.approx(want.score, abs=1e-9)
    assert metric["signature"] == str(chrf.get_signature())


@pytest.fixture(scope="module")
def widen_case(tmp_path_factory):
    """A tiny Marian (seed 5) whose width-8 outputs differ from its width-2 outputs on many rows; outputs
    given as transformers' own width-2 decode; half the references are transformers' width-8 outputs."""
    base = tmp_path_factory.mktemp("widen")
    kw = dict(seed=5, init_std=0.5, num_beams=2, length_penalty=1.0, max_new_tokens=16)
    model_dir = save_marian(base / "model", **kw)
    model, tok = make_marian(**kw)
    sources = sentences(30, seed=1)

    def generate(beam: int) -> list[str]:
        # transformers' generate, inputs padded by the tokenizer
        enc = tok(sources, padding=True, return_tensors="pt")
        with torch.no_grad():
            ids = model.generate(**enc, num_beams=beam, length_penalty=1.0, max_new_tokens=16, early_stopping=False)
        return [" ".join(t.split()) for t in tok.batch_decode(ids, skip_special_tokens=True)]

    narrow, wide = generate(2), generate(8)
    others = sentences(30, seed=2, lo=2, hi=10)
    refs = [wide[i] if i % 2 == 0 else others[i] for i in range(30)]
    assert all(narrow) and all(refs)
    data = base / "dev.tsv"
    data.write_text("id\tsource\treference\toutput\n" + "".join(
        f"r{i}\t{s}\t{r}\t{o}\n" for i, (s, r, o) in enumerate(zip(sources, refs, narrow, strict=True))),
        encoding="utf-8")
    summary, rows = run_cli("--model", str(model_dir), "--data", str(data), "--out", str(base / "run"),
                            "--metric", "bleu", "--widen", "8")
    return summary, rows, narrow, wide, refs


def test_corpus_bleu_of_a_real_run_is_sacrebleus(widen_case):
    summary, rows, narrow, _, refs = widen_case
    bleu = sacrebleu.metrics.BLEU()  # sacrebleu's public API, default BLEU (13a, exp smoothing)
    assert [r["output"] for r in rows] == narrow and [r["reference"] for r in rows] == refs
    want = bleu.corpus_score([r["output"] for r in rows], [[r["reference"] for r in rows]])
    assert summary["corpus_metric"]["name"] == "bleu"
    assert summary["corpus_metric"]["score"] == pytest.approx(want.score, abs=1e-9)
    assert summary["corpus_metric"]["signature"] == str(bleu.get_signature())


def test_widen_corpus_bleu_delta_is_sacrebleu_on_the_wider_outputs(widen_case):
    """The corpus BLEU after widening to 8, from sacrebleu on the outputs with every re-decoded (compared)
    row replaced by transformers' own width-8 output."""
    summary, rows, narrow, wide, refs = widen_case
    w = summary["widen"]
    assert w["metric"] == "bleu"
    compared = [i for i, r in enumerate(rows) if r["verdict"] in COMPARED]
    assert w["rows"]["redecoded"] == len(compared) and not w["rows"]["sampled"]
    after = [wide[i] if i in compared else narrow[i] for i in range(len(rows))]
    changed = sum(after[i] != narrow[i] for i in compared)
    assert changed >= 5  # widening changes outputs, so the delta below is not 0 by accident
    before = sacrebleu.corpus_bleu(narrow, [refs]).score  # sacrebleu's public functions
    want_after = sacrebleu.corpus_bleu(after, [refs]).score
    (entry,) = w["widths"]
    assert entry["beam"] == 8 and entry["changed"] == changed
    assert w["corpus_before"] == pytest.approx(before, abs=1e-9)
    assert entry["corpus_after"] == pytest.approx(want_after, abs=1e-9)
    assert entry["corpus_delta"] == pytest.approx(want_after - before, abs=1e-9)
    assert abs(entry["corpus_delta"]) > 1.0
    # the rows whose reference is the width-8 output and that failed at width 2 now equal the reference
    assert entry["equals_reference"] == sum(after[i] == refs[i] for i in compared)

