"""Decoder-only language models (triage/models/causal_backend.py) against transformers itself.

Outside references, named beside each check:
- transformers 5.24 `generate` on GPT-2 and Llama layouts (prompts padded on the left by the
  tokenizer itself, `padding_side="left"`): `sequences_scores` (beam search) and
  `compute_transition_scores` (greedy), and the completions it returns;
- transformers' own loss (`GPT2LMHeadModel` / `LlamaForCausalLM` forward with labels, -100 on the
  prompt: the mean cross-entropy over the completion tokens);
- a plain forward pass of prompt + completion and torch.log_softmax, one target at a time;
- the tokenizer's own `apply_chat_template` (tokenize=True) for the chat prompt.
"""

from __future__ import annotations

import math

import pytest
import torch
from causal_models import END, STOP, make_causal
from hypothesis import HealthCheck, given
from hypothesis import settings as hsettings
from hypothesis import strategies as st
from tinymodels import sentences

from triage.decoding.beam import beam_search
from triage.errors import OptionValueError
from triage.models.causal_backend import CausalModel, PromptFormat, prompt_format
from triage.models.describe import model_settings
from triage.scoring.scorer import ScoreRequest, score_requests

TEMPLATE = "Please rewrite this notice: {source} Answer:"
LAYOUTS = {"gpt2": 1.0, "llama": 3.0}  # layout -> end bias giving completions that end at varied lengths
LIMIT = 8


def build(layout: str, prompt: PromptFormat | None = None, **kw) -> CausalModel:
    hf, tok = make_causal(layout, seed=1, max_new_tokens=LIMIT, end_bias=LAYOUTS[layout], **kw)
    return CausalModel(hf, tok, prompt or PromptFormat(template=TEMPLATE))


@pytest.fixture(scope="module", params=sorted(LAYOUTS))
def cm(request):
    return build(request.param)


@pytest.fixture(scope="module")
def sources():
    return sentences(8, seed=3, lo=1, hi=9)


def left_padded(m: CausalModel, texts):
    """The prompts padded on the left by the tokenizer itself (what a user hands to generate); a
    rendered chat template carries its own special tokens (as apply_chat_template tokenizes it)."""
    m.tokenizer.padding_side = "left"
    enc = m.tokenizer([m.render(t) for t in texts], padding=True, return_tensors="pt",
                      add_special_tokens=not m.prompt.chat)
    return enc.input_ids, enc.attention_mask


def hf_generate(m: CausalModel, texts, settings, **extra):
    """transformers' generate on the left-padded batch: (completions, scores, finished)."""
    gc = settings.to_generation_config(m.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    for k, v in extra.items():
        setattr(gc, k, v)
    ids, mask = left_padded(m, texts)
    with torch.no_grad():
        out = m.model.generate(input_ids=ids, attention_mask=mask, generation_config=gc)
    comp = out.sequences[:, ids.shape[1]:]
    ends = set(settings.eos_token_ids)
    rows, finished = [], []
    for row in comp.tolist():
        stop = next((j for j, t in enumerate(row) if t in ends), None)
        rows.append(row if stop is None else row[: stop + 1])
        finished.append(stop is not None)
    if settings.beam > 1:
        scores = out.sequences_scores.tolist()
    else:
        trans = m.model.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
        scores = [float(trans[k, : len(r)].sum()) for k, r in enumerate(rows)]
    return rows, scores, finished


# ---------------------------------------------------------------------------------- the objective
@pytest.mark.parametrize("beam", [1, 2, 4])
@pytest.mark.parametrize("alpha", [0.0, 0.7, 1.0])
def test_output_score_equals_generate_score(cm, sources, beam, alpha):
    # source: transformers' generate, sequences_scores (beam) / summed transition scores (greedy), on one
    # left-padded batch of prompts of different lengths
    settings = model_settings(cm, beam=beam, alpha=alpha)
    src_ids = cm.tokenize_sources(sources)
    assert len({len(s) for s in src_ids}) > 3  # prompts of different lengths share the batch
    rows, scores, finished = hf_generate(cm, sources, settings)
    reqs = [ScoreRequest(s, [r[:-1] if f else r], [not f]) for s, r, f in zip(src_ids, rows, finished, strict=True)]
    got = score_requests(cm, settings, reqs)
    for r, f, want, res in zip(rows, finished, scores, got, strict=True):
        assert res[0].ids == r  # the completion only (end token included), never the prompt
        assert res[0].hit_limit == (not f)
        assert res[0].score == pytest.approx(want, abs=1e-4)
    assert any(finished) and any(len(r) > 1 for r in rows)


def test_prompt_counts_neither_in_sum_nor_in_length(cm, sources):
    # source: transformers' generate at alpha 1.0: sequences_scores * (completion + end) equals the summed
    # completion log-probs; dividing by the prompt + completion length instead misses it
    settings = model_settings(cm, beam=4, alpha=1.0)
    src_ids = cm.tokenize_sources(sources)
    rows, scores, finished = hf_generate(cm, sources, settings)
    reqs = [ScoreRequest(s, [r[:-1] if f else r], [not f]) for s, r, f in zip(src_ids, rows, finished, strict=True)]
    got = score_requests(cm, settings, reqs)
    checked = 0
    for s, r, want, res in zip(src_ids, rows, scores, got, strict=True):
        assert want * len(r) == pytest.approx(res[0].logprob_sum, abs=1e-4)
        if len(r) > 0:
            assert abs(res[0].logprob_sum / (len(s) + len(r)) - want) > 1e-3
            checked += 1
    assert checked


def test_reference_logprob_equals_loss_over_the_completion(cm, sources):
    # source: transformers' own loss with labels -100 on the prompt: mean cross-entropy over completion + end
    refs = sentences(len(sources), seed=4, lo=1, hi=7)
    src_ids, tgt_ids = cm.tokenize_sources(sources), cm.tokenize_targets(refs)
    got = score_requests(cm, model_settings(cm, beam=1), [ScoreRequest(s, [t]) for s, t in
                                                          zip(src_ids, tgt_ids, strict=True)])
    for s, t, res in zip(src_ids, tgt_ids, got, strict=True):
        ids = torch.tensor([s + t + [cm.end_id]])
        labels = ids.clone()
        labels[0, : len(s)] = -100
        with torch.no_grad():
            loss = cm.model(input_ids=ids, labels=labels).loss
        assert res[0].logprob_sum == pytest.approx(-float(loss) * (len(t) + 1), abs=1e-4)
        assert res[0].length == len(t) + 1


@pytest.mark.parametrize("beam", [1, 2, 4])
@pytest.mark.parametrize("early", [True, False, "never"])
def test_own_beam_search_equals_generate(cm, sources, beam, early):
    # source: transformers' generate on the same left-padded batch: the same completions and scores
    settings = model_settings(cm, beam=beam, alpha=0.7, early_stopping=early)
    rows, scores, finished = hf_generate(cm, sources, settings)
    own = beam_search(cm, settings, cm.tokenize_sources(sources))
    for h, r, want, f in zip(own, rows, scores, finished, strict=True):
        assert h.tokens + ([h.end_token] if h.finished else []) == r
        assert h.finished == f
        assert h.score == pytest.approx(want, abs=1e-5)


RULES = [dict(repetition_penalty=1.5), dict(no_repeat_ngram_size=2), dict(min_new_tokens=3),
         dict(min_length=16), dict(bad_words_ids=((10,), (12, 13)))]


@pytest.mark.parametrize("rules", RULES, ids=lambda r: next(iter(r)))
@pytest.mark.parametrize("layout", sorted(LAYOUTS))
def test_rules_see_the_prompt_as_in_generate(layout, sources, rules):
    # source: transformers' generate, one prompt at a time (no padding), beam 3, two end tokens in the
    # generation config: its processors read the prompt (n-grams, repetition, a minimum length counting it)
    m = build(layout, PromptFormat(chat=True, system="Say it plainly:"), two_ends=True)
    settings = model_settings(m, beam=3, alpha=0.7).replace(**rules)
    assert settings.eos_token_ids == (END, STOP)
    src_ids = m.tokenize_sources(sources)
    own = beam_search(m, settings, src_ids)
    got_gen = m.generate(settings, src_ids)
    ends_seen = set()
    for text, s, h, g in zip(sources, src_ids, own, got_gen, strict=True):
        rows, scores, finished = hf_generate(m, [text], settings)
        assert h.tokens + ([h.end_token] if h.finished else []) == rows[0]
        assert h.score == pytest.approx(scores[0], abs=1e-5)
        assert (g.ids, g.finished) == (h.tokens, h.finished)
        assert g.score == pytest.approx(scores[0], abs=1e-5)
        res = score_requests(m, settings, [ScoreRequest(s, [h.tokens], [not h.finished])])[0][0]
        assert res.ids == rows[0]  # the end token the decoder preferred (any of the two ends a completion)
        assert res.score == pytest.approx(scores[0], abs=1e-4)
        if h.finished:
            ends_seen.add(h.end_token)
    assert ends_seen


# ---------------------------------------------------------------------------------- shared-prefix scoring
def plain_logprobs(m: CausalModel, prompt, labels):
    """Log-probs of `labels` after `prompt`, from one unpadded forward pass of prompt + labels[:-1]."""
    ids = torch.tensor([list(prompt) + list(labels[:-1])])
    with torch.no_grad():
        logp = torch.log_softmax(m.model(input_ids=ids).logits[0].float(), dim=-1)
    return [float(logp[len(prompt) - 1 + t, tok]) for t, tok in enumerate(labels)]


@hsettings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_shared_prefix_scores_equal_plain_forward(cm, data):
    # source: a plain forward pass of prompt + completion with torch.log_softmax, one target at a time
    tok = st.integers(8, cm.vocab_size - 1)
    reqs = []
    for _ in range(data.draw(st.integers(1, 4))):
        prompt = data.draw(st.lists(tok, min_size=1, max_size=14))
        ref = data.draw(st.lists(tok, min_size=0, max_size=LIMIT - 1))
        targets = [ref]
        for _ in range(data.draw(st.integers(1, 3))):
            keep = data.draw(st.integers(0, len(ref)))
            targets.append((ref[:keep] + data.draw(st.lists(tok, max_size=5)))[: LIMIT - 1])
        reqs.append(ScoreRequest(prompt, targets))
    settings = model_settings(cm, beam=2, alpha=1.0)
    got = score_requests(cm, settings, reqs, token_budget=data.draw(st.sampled_from([8, 4096])))
    for req, row in zip(reqs, got, strict=True):
        for ids, res in zip(req.targets, row, strict=True):
            labels = list(ids) + [cm.end_id]
            assert res.ids == labels
            want = plain_logprobs(cm, req.source_ids, labels)
            assert res.logprobs == pytest.approx(want, abs=1e-5)
            assert res.score == pytest.approx(math.fsum(want) / len(labels), abs=1e-5 * len(labels))


def test_every_path_gives_the_same_numbers(cm, sources):
    # source: a plain forward pass per target; the tree (position scoring), the full forward and the
    # step-by-step path (next_logprobs with its cache) agree with it
    from triage.models.api import forced_logprobs

    src_ids = cm.tokenize_sources(sources[:4])
    targets = cm.tokenize_targets(sentences(4, seed=9, lo=1, hi=6))
    state = cm.encode(src_ids)
    width = max(len(t) for t in targets) + 1
    inputs = torch.full((4, width), cm.pad_id, dtype=torch.long)
    for k, t in enumerate(targets):
        inputs[k, 0] = cm.start_id
        inputs[k, 1 : len(t) + 1] = torch.tensor(t)
    full = cm.forced_logprobs(state, inputs)
    stepped = forced_logprobs(type("Plain", (), {"next_logprobs": cm.next_logprobs})(), state, inputs)
    for k, t in enumerate(targets):
        labels = t + [cm.end_id]
        want = plain_logprobs(cm, src_ids[k], labels)
        assert [float(full[k, i, x]) for i, x in enumerate(labels)] == pytest.approx(want, abs=1e-5)
        assert [float(stepped[k, i, x]) for i, x in enumerate(labels)] == pytest.approx(want, abs=1e-5)


def test_grouped_prompts_equal_one_padded_batch(cm):
    # source: a plain forward pass per prompt: the prompts run in length groups, joined into one state
    # padded on the left, give the same next-token log-probs and the same completion scores
    from triage.models.transformers_backend import length_groups

    g = torch.Generator().manual_seed(3)
    lengths = [2, 60, 3, 45, 9, 33, 70, 5] * 5
    prompts = [torch.randint(8, cm.vocab_size, (n,), generator=g).tolist() for n in lengths]
    assert len(length_groups(lengths)) > 1
    state = cm.encode_grouped(prompts)
    targets = [torch.randint(8, cm.vocab_size, (4,), generator=g).tolist() for _ in prompts]
    inputs = torch.tensor([[cm.start_id] + t[:-1] for t in targets])
    picks = torch.arange(len(prompts) * 4)
    labels = torch.tensor(targets).reshape(-1, 1)
    got = cm.score_positions(state, torch.arange(len(prompts)), inputs, picks, labels, lengths=[4] * len(prompts))
    for k, p in enumerate(prompts):
        with torch.no_grad():
            logp = torch.log_softmax(cm.model(input_ids=torch.tensor([p + targets[k][:-1]])).logits[0].float(), -1)
        assert torch.allclose(state.last[state.rows[k]], logp[len(p) - 1], atol=1e-5)
        want = [float(logp[len(p) - 1 + t, x]) for t, x in enumerate(targets[k])]
        assert got[k * 4 : k * 4 + 4, 0].tolist() == pytest.approx(want, abs=1e-5)


# ---------------------------------------------------------------------------------- prompts
def test_chat_prompt_is_the_tokenizers_own():
    # source: the tokenizer's apply_chat_template(tokenize=True) with a system and a user message
    m = build("llama", PromptFormat(chat=True, system="Say it plainly:"))
    messages = [{"role": "system", "content": "Say it plainly:"}, {"role": "user", "content": "the train is late"}]
    want = m.tokenizer.apply_chat_template(messages, add_generation_prompt=True, tokenize=True)
    want = want["input_ids"] if isinstance(want, dict) or hasattr(want, "keys") else want
    assert m.tokenize_sources(["the train is late"]) == [list(want)]
    assert m.describe()["prompt"] == "chat template (system message: 'Say it plainly:')"
    assert m.describe()["prompt_example"] == m.render("the train is late")


def test_template_prompt_goes_through_the_tokenizer():
    # source: the tokenizer called on the filled-in template (with its own special tokens: <s> for Llama)
    m = build("llama")
    text = TEMPLATE.format(source="the bus departs")
    assert m.tokenize_sources(["the bus departs"]) == [m.tokenizer(text)["input_ids"]]
    assert m.tokenize_sources(["x"])[0][0] == m.tokenizer.bos_token_id
    assert m.describe()["prompt"] == repr(TEMPLATE)


@pytest.mark.parametrize("template, words", [
    ("Translate: {text}", "unknown field {text}"),
    ("Translate this.", "no {source} field"),
    ("Translate {source", "not a format string"),
    ("Rewrite {source} as {0}", "unknown field {0}"),
])
def test_bad_templates_are_named(template, words):
    with pytest.raises(OptionValueError) as err:
        prompt_format(prompt_template=template)
    assert err.value.option == "prompt_template" and words in err.value.detail


def test_prompt_options_exclude_each_other():
    with pytest.raises(OptionValueError):
        prompt_format(prompt_template="{source}", chat_template=True)
    with pytest.raises(OptionValueError) as err:
        prompt_format(system="be brief")
    assert err.value.option == "system"
    assert prompt_format() is None
    assert prompt_format(prompt_template="Q: {source} {source}") == PromptFormat(template="Q: {source} {source}")


def test_default_length_limit_is_generates():
    # source: transformers' generate on a decoder-only model with no length given: 20 new tokens after a
    # prompt of any length (its max_length counts the prompt, so triage reads only max_new_tokens)
    hf, tok = make_causal("gpt2", seed=1, end_bias=-50.0)  # the end token never wins
    m = CausalModel(hf, tok, PromptFormat(template=TEMPLATE))
    assert hf.generation_config.max_new_tokens is None
    settings = model_settings(m)
    for n in (3, 12):
        ids = torch.full((1, n), 10, dtype=torch.long)
        with torch.no_grad():
            out = hf.generate(input_ids=ids, attention_mask=torch.ones_like(ids), do_sample=False)
        assert out.shape[1] - n == settings.limit_new_tokens() == 20


def test_exact_search_finds_the_brute_force_best(cm, sources):
    # source: every completion of at most 2 tokens scored by a plain forward pass + log_softmax (the
    # completions the decoder can return: ended by the end token, or cut by the limit of 2 tokens)
    from triage.decoding.exact import exact_search

    settings = model_settings(cm, beam=2, alpha=0.7, max_new_tokens=2)
    words = [t for t in range(cm.vocab_size) if t not in (0, 2, 3, 4, 5, 6, STOP, END)]
    for prompt in cm.tokenize_sources(sources[:2]):
        with torch.no_grad():
            first = torch.log_softmax(cm.model(input_ids=torch.tensor([prompt])).logits[0, -1].float(), -1)
            batch = torch.tensor([prompt + [w] for w in words])
            second = torch.log_softmax(cm.model(input_ids=batch).logits[:, -1].float(), -1)
        best = (float(first[END]), [])  # the empty completion: the end token alone, length 1
        for k, w in enumerate(words):
            best = max(best, ((float(first[w]) + float(second[k, END])) / 2 ** 0.7, [w]))  # ended
            top = int(second[k, words].argmax())
            best = max(best, ((float(first[w]) + float(second[k, words[top]])) / 2 ** 0.7, [w, words[top]]))
        got = exact_search(cm, settings, prompt)
        assert got.status == "proven"
        assert got.best_tokens == best[1]
        assert got.best_score == pytest.approx(best[0], abs=1e-5)


def test_head_fallback_gives_the_same_numbers(sources):
    # source: a plain forward pass per target; a model whose head the check refuses uses its full forward
    m = build("llama")
    assert m._head() is True  # a Llama head is the plain projection of the base model's hidden states
    m._head_ok = False
    src_ids = m.tokenize_sources(sources[:3])
    targets = m.tokenize_targets(sentences(3, seed=12, lo=1, hi=6))
    got = score_requests(m, model_settings(m, beam=2), [ScoreRequest(s, [t, t[:1]]) for s, t in
                                                        zip(src_ids, targets, strict=True)])
    for s, t, row in zip(src_ids, targets, got, strict=True):
        for ids, res in zip([t, t[:1]], row, strict=True):
            assert res.logprobs == pytest.approx(plain_logprobs(m, s, ids + [m.end_id]), abs=1e-5)


def test_prompt_and_completion_beyond_the_positions_is_one_line(cm):
    # a prompt longer than the model's positions (less one for the completion) is skipped as too long;
    # one that fits but leaves too little room for the completion stops with a one-line ModelError on
    # a model with learned positions (GPT-2), while a rotary one (Llama) reads on, as generate does
    from triage.errors import ModelError
    from triage.scoring.scorer import source_problem

    assert cm.max_source_tokens == 95
    assert "the model takes at most 95" in source_problem(cm, [8] * 96)
    req = ScoreRequest([8] * 94, [[9, 10, 11]])
    if type(cm.model).__name__.startswith("GPT2"):
        with pytest.raises(ModelError, match="do not fit the model's 96 positions"):
            score_requests(cm, model_settings(cm, beam=2), [req])
    else:
        assert score_requests(cm, model_settings(cm, beam=2), [req])[0][0].scored


def _byte_level_model(template: str) -> CausalModel:
    """A random GPT-2 over a byte-level BPE tokenizer trained here (tokenizers), 300 tokens."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers
    from transformers import GPT2Config, GPT2LMHeadModel, PreTrainedTokenizerFast

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=300, special_tokens=["<pad>", "</s>"],
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet())
    tok.train_from_iterator(sentences(300, seed=1) + ["Say it plainly: Answer:"] * 20, trainer)
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>")
    torch.manual_seed(4)
    hf = GPT2LMHeadModel(GPT2Config(vocab_size=len(fast), n_positions=96, n_embd=32, n_layer=2, n_head=2,
                                    bos_token_id=1, eos_token_id=1, pad_token_id=0)).eval()
    hf.generation_config.max_new_tokens = 6
    return CausalModel(hf, fast, PromptFormat(template=template))


def test_completions_carry_the_space_the_model_writes():
    # source: the tokenizer on the whole text prompt + ' ' + reference: the reference's tokens after the
    # prompt's are those of ' ' + reference (byte-level BPE merges the space into the first word); the
    # outputs transformers' generate writes come back to their ids through their text
    m = _byte_level_model("Say it plainly: {source} Answer:")
    assert m.lead_space
    prompt = m.render("the bus")
    for ref in ("the train is late", "platform two"):
        whole = m.tokenizer(prompt + " " + ref, add_special_tokens=False)["input_ids"]
        head = m.tokenizer(prompt, add_special_tokens=False)["input_ids"]
        assert whole[: len(head)] == head
        assert m.tokenize_targets([ref]) == [whole[len(head):]]
    # a completion that starts with a space-word, as a trained model writes after 'Answer:' (generate's own
    # begin_suppress_tokens rule bans every other first token)
    pieces = m.tokenizer.convert_ids_to_tokens(list(range(len(m.tokenizer))))
    m.model.generation_config.begin_suppress_tokens = [i for i, p in enumerate(pieces)
                                                       if not (p.startswith("Ġ") and len(p) > 1)]
    settings = model_settings(m, beam=2)
    src_ids = m.tokenize_sources(sentences(12, seed=5, lo=1, hi=5))
    spaced = 0
    for g in m.generate(settings, src_ids):
        text = m.detokenize(g.ids)
        raw = m.tokenizer.decode(g.ids)
        assert raw.startswith(" ")  # the first token is a space-word
        # outputs whose ids are the tokenizer's own split of their text (random byte tokens can form
        # invalid UTF-8, which no text gives back)
        if m.tokenizer(raw, add_special_tokens=False)["input_ids"] == g.ids:
            spaced += 1
            assert not text.startswith(" ")
            assert m.tokenize_targets([text]) == [g.ids]
    assert spaced
    # a prompt that ends in a newline: the completion is tokenized as written
    m2 = _byte_level_model("Say it plainly: {source} Answer:\n")
    assert not m2.lead_space
    assert m2.tokenize_targets(["the train"]) == [m2.tokenizer("the train", add_special_tokens=False)["input_ids"]]
