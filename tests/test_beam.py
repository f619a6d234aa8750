"""triage.decoding.beam against transformers' own generate, and reference tracking.

Outside sources:
- transformers 5.24 `generate` on a Marian-architecture model: its `sequences` and
  `sequences_scores` (beam search) and `compute_transition_scores` (greedy);
- a LogitsProcessor handed to generate that records the running beams transformers itself
  keeps at each step (the tracking tests check our loss points against that record);
- teacher-forced log-probs from the transformers model's forward pass;
- the tokenizer's own padding (transformers' `tokenizer(..., padding=True, return_tensors="pt")`)
  for every batch handed to the transformers model directly.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import torch
from transformers import LogitsProcessor, LogitsProcessorList

sys.path.insert(0, str(Path(__file__).parent))
from tinymodels import END, WRAPPED_VOCAB, make_tokenizer, make_wrapped_marian, random_sources  # noqa: E402

from triage.decoding.beam import beam_search, smallest_width_keeping  # noqa: E402
from triage.settings import DecoderSettings  # noqa: E402

torch.set_num_threads(1)  # tiny tensors: one thread is far faster on a shared 2-core machine

LIMIT = 7
ALPHAS = (0.0, 0.7, 1.0)
EARLY = (True, False, "never")


@pytest.fixture(scope="module", params=[0, 3], ids=["marian-seed0", "marian-seed3"])
def marian(request):
    model = make_wrapped_marian(request.param)
    return model, random_sources(12, seed=request.param + 10)


_TOKENIZER = make_tokenizer([f"w{i}" for i in range(3, WRAPPED_VOCAB)], add_end=False)  # make_wrapped_marian's


def padded(sources) -> tuple[torch.Tensor, torch.Tensor]:
    """(input_ids, attention_mask) for id sources, padded by the tokenizer itself (transformers' padding)."""
    texts = [" ".join(_TOKENIZER.convert_ids_to_tokens(src)) for src in sources]
    enc = _TOKENIZER(texts, padding=True, return_tensors="pt")
    for row, mask, src in zip(enc.input_ids, enc.attention_mask, sources, strict=True):
        assert row[mask.bool()].tolist() == list(src)  # the texts stand for exactly these ids
    return enc.input_ids, enc.attention_mask


def power_objective(logprob_sum: float, n: int, alpha: float) -> float:
    """transformers' beam score (its docs: sum of log-probs divided by length ** length_penalty), here
    checked against generate's sequences_scores in test_matches_generate_over_widths_penalties_and_early_stopping."""
    return logprob_sum / n ** alpha


def base_settings(model) -> DecoderSettings:
    return DecoderSettings.from_generation_config(model.model.generation_config, max_new_tokens=LIMIT)


def generate(model, settings: DecoderSettings, sources, processor=None, logits=False):
    """transformers' generate at exactly these settings: [(target ids incl. end token, score)]."""
    hf = model.model
    gc = settings.to_generation_config(hf.generation_config)
    gc.return_dict_in_generate = True
    gc.output_scores = True
    gc.output_logits = logits
    ids, mask = padded(sources)
    extra = {"logits_processor": LogitsProcessorList([processor])} if processor is not None else {}
    with torch.no_grad():
        out = hf.generate(input_ids=ids, attention_mask=mask, generation_config=gc, **extra)
    res = []
    if settings.beam > 1:
        for i in range(len(sources)):
            # generated length from beam_indices: the fill value after the end is not reliable
            # (transformers fills with the end token when pad_token_id is 0)
            n = int((out.beam_indices[i] >= 0).sum())
            res.append((out.sequences[i, 1: 1 + n].tolist(), float(out.sequences_scores[i])))
        return res
    # greedy: per-token log-probs of the chosen tokens, cut after the first end token
    if logits:
        steps = torch.stack([torch.log_softmax(x, dim=-1) for x in out.logits], dim=1)
        trans = steps.gather(-1, out.sequences[:, 1:, None]).squeeze(-1)
    else:
        trans = hf.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
    for i in range(len(sources)):
        seq = out.sequences[i, 1:].tolist()
        n = seq.index(END) + 1 if END in seq else len(seq)
        res.append((seq[:n], float(trans[i, :n].sum())))
    return res


def emitted(h) -> list[int]:
    return h.tokens + ([h.end_token] if h.finished else [])


def test_matches_generate_over_widths_penalties_and_early_stopping(marian):
    model, sources = marian
    base = base_settings(model)
    by_mode: dict[tuple, list] = {}
    lengths = set()
    checked = 0
    for beam in range(1, 9):
        for alpha in ALPHAS if beam > 1 else (1.0,):
            for early in EARLY if beam > 1 else (False,):
                s = base.replace(beam=beam, alpha=alpha, early_stopping=early)
                want = generate(model, s, sources)
                got = beam_search(model, s, sources, batch_size=5)  # batches of 5, 5, 2
                for (w_ids, w_score), h in zip(want, got, strict=True):
                    assert emitted(h) == w_ids, (beam, alpha, early)
                    assert h.score == pytest.approx(w_score, abs=1e-4), (beam, alpha, early)
                    assert h.length == len(h.token_logprobs) == len(w_ids)
                    assert h.logprob_sum == pytest.approx(sum(h.token_logprobs), abs=1e-4)
                    lengths.add((h.finished, h.length))
                    checked += 1
                by_mode[(beam, alpha, early)] = [tuple(emitted(h)) for h in got]
    assert checked == 12 * (1 + 7 * 9)
    # the grid is not trivial: outputs end early and at the limit, and the modes matter
    assert any(f for f, _ in lengths) and (False, LIMIT) in lengths
    assert len({n for _, n in lengths}) >= 3
    assert any(by_mode[(b, a, True)] != by_mode[(b, a, "never")] or by_mode[(b, a, True)] != by_mode[(b, a, False)]
               for b in range(2, 9) for a in ALPHAS)
    assert any(by_mode[(b, 1.0, False)] != by_mode[(b, 0.0, False)] for b in range(2, 9))
    assert len({tuple(by_mode[(b, 1.0, False)]) for b in range(2, 9)}) > 1


@pytest.mark.parametrize("rule", [
    dict(no_repeat_ngram_size=2),
    dict(encoder_no_repeat_ngram_size=2),
    dict(min_new_tokens=4),
    dict(bad_words_ids=((5,), (7, 8))),
    dict(repetition_penalty=1.5),
    dict(forced_bos_token_id=9, min_length=3),
])
def test_matches_generate_with_rules(rule):
    model = make_wrapped_marian(0)
    sources = random_sources(6, seed=10)
    s = base_settings(model).replace(beam=4, alpha=1.0, **rule)
    for (w_ids, w_score), h in zip(generate(model, s, sources), beam_search(model, s, sources), strict=True):
        assert emitted(h) == w_ids
        assert h.score == pytest.approx(w_score, abs=1e-4)


@pytest.mark.parametrize("rule", [dict(no_repeat_ngram_size=2), dict(min_new_tokens=4), dict(bad_words_ids=((5,),))])
def test_greedy_with_banning_rules_picks_generates_tokens(rule):
    # rules that only ban tokens pick the same argmax on logits (generate) and on log-probs
    # (triage); the scores differ by design: triage sums the rule-processed log-probs, which
    # for a token that is not banned equal log_softmax of the raw logits (output_logits).
    model = make_wrapped_marian(0)
    sources = random_sources(6, seed=10)
    s = base_settings(model).replace(beam=1, **rule)
    for (w_ids, w_score), h in zip(generate(model, s, sources, logits=True), beam_search(model, s, sources),
                                   strict=True):
        assert emitted(h) == w_ids
        assert h.score == pytest.approx(w_score, abs=1e-4)


def test_several_end_tokens_match_generate():
    model = make_wrapped_marian(0)
    sources = random_sources(8, seed=10)
    s = base_settings(model).replace(beam=3, alpha=0.7, eos_token_ids=(END, 7, 11))
    for (w_ids, w_score), h in zip(generate(model, s, sources), beam_search(model, s, sources), strict=True):
        assert emitted(h) == w_ids
        assert h.score == pytest.approx(w_score, abs=1e-4)


def test_width_one_is_greedy_decoding():
    # common practice: beam width 1 is greedy search, the best token at every step, plain sum
    model = make_wrapped_marian(3)
    sources = random_sources(6, seed=13)
    s = base_settings(model).replace(beam=1)
    got = beam_search(model, s, sources)
    ids, mask = padded(sources)
    for i, h in enumerate(got):
        prefix = [model.start_id]
        total = 0.0
        with torch.no_grad():
            for _ in range(LIMIT):
                logits = model.model(input_ids=ids[i: i + 1], attention_mask=mask[i: i + 1],
                                     decoder_input_ids=torch.tensor([prefix])).logits[0, -1]
                lp = torch.log_softmax(logits, dim=-1)
                tok = int(lp.argmax())
                prefix.append(tok)
                total += float(lp[tok])
                if tok == END:
                    break
        assert emitted(h) == prefix[1:]
        assert h.score == pytest.approx(total, abs=1e-4)


def test_objective_gnmt_uses_its_divisor():
    # gnmt (Wu et al. 2016, eq. 14, from memory: ((5 + len) / 6) ** alpha) has no counterpart in generate;
    # the score must be that objective of the emitted tokens' summed log-probs, and at alpha 0 gnmt, power
    # and none decode the same
    model = make_wrapped_marian(0)
    sources = random_sources(6, seed=10)
    base = base_settings(model).replace(beam=4)
    g = beam_search(model, base.replace(penalty="gnmt", alpha=1.0), sources)
    for h in g:
        assert h.score == pytest.approx(h.logprob_sum / ((5 + h.length) / 6) ** 1.0, abs=1e-5)
    zero = [[emitted(h) for h in beam_search(model, base.replace(penalty=p, alpha=a), sources)]
            for p, a in (("gnmt", 0.0), ("power", 0.0), ("none", 1.0))]
    assert zero[0] == zero[1] == zero[2]


# ------------------------------------------------------------------------------ tracking
class RunningBeams(LogitsProcessor):
    """Records the decoder inputs (the running beams) transformers scores at each step."""

    def __init__(self):
        self.steps: list[torch.Tensor] = []

    def __call__(self, input_ids, scores):
        self.steps.append(input_ids.clone())
        return scores


def dropped_after(rec: RunningBeams, i: int, K: int, full: list[int]) -> int | None:
    """The first step t after which transformers' running beams of source i lack full[:t] (None: never)."""
    return next((t for t in range(1, len(full)) if t < len(rec.steps)
                 and full[:t] not in [r[1:].tolist() for r in rec.steps[t][i * K: (i + 1) * K]]), None)


def test_tracking_agrees_with_the_beams_transformers_keeps():
    model = make_wrapped_marian(4)
    sources = random_sources(12, seed=14)
    K = 2
    s = base_settings(model).replace(beam=K, alpha=1.0, early_stopping=False)
    wide = beam_search(model, s.replace(beam=8), sources)
    sources = [src for src, h in zip(sources, wide, strict=True) if h.finished]
    refs = [h.tokens for h in wide if h.finished]  # reachable targets another width prefers
    got = beam_search(model, s, sources, track=refs)
    rec = RunningBeams()
    generate(model, s, sources, processor=rec)
    n_lost = n_kept = n_dropped_seen = 0
    steps = set()
    for i, (h, ref) in enumerate(zip(got, refs, strict=True)):
        def rows(step: int, i: int = i) -> list[list[int]]:
            return [r[1:].tolist() for r in rec.steps[step - 1][i * K: (i + 1) * K]]

        full = ref + [END]
        # counted apart from triage: the first step after which transformers' running beams lack the prefix
        gone = dropped_after(rec, i, K, full)
        if h.tokens == ref and h.finished:
            assert h.reference_kept and h.loss is None
        if h.reference_kept:
            n_kept += 1
            assert gone is None  # transformers kept every proper prefix of the reference
            continue
        n_lost += 1
        lp = h.loss
        steps.add(lp.step)
        assert lp.reason == "pruned" and lp.step == gone
        assert lp.rank > K  # among the best K candidates it would have been kept
        assert full[: lp.step - 1] in rows(lp.step)  # transformers had the prefix before the step
        if lp.step <= len(ref) and lp.step < len(rec.steps):
            assert full[: lp.step] not in rows(lp.step + 1)  # and dropped it after
            n_dropped_seen += 1
    # the rows skipped above as kept are exactly those transformers' beams never dropped
    assert n_kept == sum(dropped_after(rec, i, K, r + [END]) is None for i, r in enumerate(refs))
    # every lost row was dropped before its end token and before the last step, so "dropped it after" ran
    assert n_dropped_seen == n_lost
    assert n_lost >= 1 and n_kept >= 1 and len(steps) >= 2


def test_kept_reference_never_beats_the_output():
    """References = width-2 outputs, tracked at width 4. A kept reference scores no higher than the width-4
    output; every reference that was not kept is accounted for, against counts computed apart from triage:
    a reference that (with its end token) is longer than the limit, one transformers' own running beams
    dropped (RunningBeams), and one still in those beams when the search stopped."""
    model = make_wrapped_marian(4)
    sources = random_sources(24, seed=14)
    K, alpha = 4, 0.7
    s = base_settings(model).replace(beam=K, alpha=alpha)
    narrow = generate(model, s.replace(beam=2), sources)  # transformers' own width-2 outputs
    refs = [ids[:-1] if ids[-1] == END else ids for ids, _ in narrow]
    got = beam_search(model, s, sources, track=refs)
    rec = RunningBeams()
    tx_out = generate(model, s, sources, processor=rec)
    ids, mask = padded(sources)
    too_long, dropped, stopped, kept = [], [], [], []
    for i, (h, ref) in enumerate(zip(got, refs, strict=True)):
        full = ref + [END]
        gone = dropped_after(rec, i, K, full)
        if tx_out[i][0] == full:
            assert h.reference_kept  # transformers' own width-4 output is the reference
        if not h.reference_kept:
            if len(full) > LIMIT:  # the width-2 output stopped at the limit: ref + end cannot be generated
                too_long.append(i)
                assert (h.loss.reason, h.loss.step, h.loss.rank) == ("length limit", LIMIT + 1, None)
            elif gone is not None:
                dropped.append(i)
                assert (h.loss.reason, h.loss.step) == ("pruned", gone) and h.loss.rank > K
            else:
                stopped.append(i)
                assert h.loss.reason == "search stopped" and h.loss.step == len(full)
            continue
        kept.append(i)
        assert gone is None
        dec = torch.tensor([[model.start_id, *ref]])
        with torch.no_grad():
            logits = model.model(input_ids=ids[i: i + 1], attention_mask=mask[i: i + 1], decoder_input_ids=dec).logits
        lp = torch.log_softmax(logits[0], dim=-1).gather(-1, torch.tensor([*ref, END])[:, None]).sum()
        assert h.score >= power_objective(float(lp), len(ref) + 1, alpha) - 1e-4
    # the skipped rows, counted apart from triage: transformers' width-2 outputs that did not end (too long
    # to end within the limit), and references transformers' width-4 beams dropped; the rest kept or stopped
    assert too_long == [i for i, (ids, _) in enumerate(narrow) if ids[-1] != END]
    assert dropped == [i for i, r in enumerate(refs) if len(r) + 1 <= LIMIT and dropped_after(rec, i, K, r + [END])]
    assert len(kept) + len(stopped) == sum(len(r) + 1 <= LIMIT and dropped_after(rec, i, K, r + [END]) is None
                                           for i, r in enumerate(refs))
    # this seeded run holds every kind (counted once from its printout): the checks above are not empty
    assert (len(kept), len(too_long), len(dropped), len(stopped)) == (17, 5, 1, 1)


def test_reference_longer_than_the_limit():
    model = make_wrapped_marian(0)
    s = base_settings(model).replace(beam=2)
    got = beam_search(model, s, random_sources(1), track=[[5] * LIMIT])
    assert got[0].loss.reason == "length limit" and got[0].loss.step == LIMIT + 1
    assert smallest_width_keeping(model, s, random_sources(1), [[5] * LIMIT])[0].smallest_width is None


def test_greedy_tracking_loses_at_first_difference():
    model = make_wrapped_marian(0)
    sources = random_sources(6, seed=10)
    s = base_settings(model).replace(beam=1)
    out = beam_search(model, s, sources)
    refs = [h.tokens[:1] + [4 if (h.tokens[1:2] or [0])[0] != 4 else 5] for h in out]
    got = beam_search(model, s, sources, track=refs)
    for h, ref in zip(got, refs, strict=True):
        step = next(k for k, (a, b) in enumerate(zip(emitted(h) + [-1] * 9, ref + [END], strict=False), 1) if a != b)
        assert not h.reference_kept and h.loss.step == step and h.loss.rank > 1


def test_smallest_width_keeping():
    model = make_wrapped_marian(4)
    sources = random_sources(12, seed=14)
    s = base_settings(model).replace(beam=2, alpha=1.0)
    wide = beam_search(model, s.replace(beam=8), sources)
    sources = [src for src, h in zip(sources, wide, strict=True) if h.finished]
    refs = [h.tokens for h in wide if h.finished]
    res = smallest_width_keeping(model, s, sources, refs, max_width=16)
    lost = [i for i, r in enumerate(res) if r is not None]
    assert lost, "the test needs a reference the width-2 decoder loses"
    for i in lost:
        w = res[i].smallest_width
        assert w is not None and w <= 8  # width 8 outputs the reference itself
        def at(width: int, i: int = i):
            return beam_search(model, s.replace(beam=width), [sources[i]], track=[refs[i]])[0]

        assert at(w).reference_kept
        if w > 1:
            assert not at(w - 1).reference_kept
    for i, r in enumerate(res):
        if r is None:
            assert beam_search(model, s, [sources[i]], track=[refs[i]])[0].reference_kept
