"""A transformers decoder-only checkpoint (AutoModelForCausalLM) behind triage's model interface.

The backend hides the prompt, so scoring, decoding, the studies and the report treat a
decoder-only model like an encoder-decoder one:

- a *source* is the rendered prompt's token ids (``tokenize_sources`` renders the source text
  through the prompt format: a template with ``{source}``, or the tokenizer's own chat template
  with the source as one user message);
- ``encode`` runs the prompts once (padded on the left, position ids from the attention mask,
  as ``generate`` does) and keeps their key/value cache, attention mask and the log-probs after
  the last prompt token as the state;
- a *target* is a completion: ``prefix[:, 0]`` (``start_id``) stands for "the prompt ends here"
  and is never fed to the model; the completion tokens after it run on top of the prompt's
  cache, so every target of a row shares one prompt pass.

The objective is generate's for decoder-only models (measured, tests/test_causal.py): the sum
of the completion's log-probs (end token included) over (completion tokens incl. end) ** alpha;
the prompt counts neither in the sum nor in the length. The generation rules are
transformers' own processors, and they see what they see inside generate: the prompt followed
by the completion (so n-gram blocking, the repetition penalty and the minimum length count the
prompt), built for each prompt length as generate builds them for an unpadded batch.
"""

from __future__ import annotations

import copy
import string
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch

from triage.errors import ModelError, OptionValueError
from triage.models.api import Generated
from triage.settings import DecoderSettings

#: what the prompt is when no format is given: the source text itself
PLAIN_TEMPLATE = "{source}"


# ---------------------------------------------------------------------------------- the prompt
@dataclass(frozen=True)
class PromptFormat:
    """How a source becomes a prompt: a template with one ``{source}`` field, or the tokenizer's
    chat template (one user message, after an optional system message)."""

    template: str | None = None
    chat: bool = False
    system: str | None = None

    def describe(self) -> str:
        if self.chat:
            return "chat template" + (f" (system message: {self.system!r})" if self.system else "")
        return repr(self.template)


def check_prompt_template(template: str) -> str:
    """The template itself if it is a format string whose only field is ``{source}`` (at least once)."""
    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise OptionValueError("prompt_template", f"is not a format string: {exc}") from None
    unknown = sorted({f for f in fields if f != "source"})
    if unknown:
        raise OptionValueError("prompt_template", f"names an unknown field {{{unknown[0]}}}: the only field is "
                                                  "{source}")
    if "source" not in fields:
        raise OptionValueError("prompt_template", "has no {source} field: where does the source go?")
    try:
        template.format(source="")
    except (ValueError, IndexError, KeyError) as exc:
        raise OptionValueError("prompt_template", f"cannot be filled in: {exc}") from None
    return template


def prompt_format(prompt_template: str | None = None, chat_template: bool = False,
                  system: str | None = None) -> PromptFormat | None:
    """The prompt format the options describe (None: none given), checked."""
    if prompt_template is not None and chat_template:
        raise OptionValueError("prompt_template", "and chat_template exclude each other: give one")
    if system is not None and not chat_template:
        raise OptionValueError("system", "needs chat_template (the system message is part of the chat)")
    if chat_template:
        return PromptFormat(chat=True, system=system)
    if prompt_template is not None:
        return PromptFormat(template=check_prompt_template(prompt_template))
    return None


# ---------------------------------------------------------------------------------- state
@dataclass
class PromptState:
    """The prompts of a batch, run once. ``rows`` maps each state row to a prompt (select only
    changes it, so beams and targets share one copy of the prompt cache)."""

    cache: Any                  # the prompts' key/value cache (a transformers Cache), one row per prompt
    mask: torch.Tensor          # [P, W] attention mask, padded on the left
    last: torch.Tensor          # [P, V] log-probs of the token after each prompt
    rows: torch.Tensor          # [N] prompt of each state row


class _PromptOnly:
    """A generation cache that holds nothing beyond the prompt yet (the state's rows say which)."""


def cache_rows(cache: Any, rows: torch.Tensor) -> Any:
    """A new cache holding rows `rows` of `cache` (the original is left as it is)."""
    new = copy.copy(cache)
    new.layers = []
    for layer in cache.layers:
        part = copy.copy(layer)
        if getattr(layer, "is_initialized", False) and layer.keys is not None and layer.keys.numel():
            part.keys = layer.keys.index_select(0, rows)
            part.values = layer.values.index_select(0, rows)
        new.layers.append(part)
    return new


def positions(mask: torch.Tensor) -> torch.Tensor:
    """Position ids from an attention mask, as generate computes them (padding gets 1)."""
    pos = mask.long().cumsum(-1) - 1
    return pos.masked_fill(mask == 0, 1)


# ---------------------------------------------------------------------------------- rules
class PromptRule:
    """One generation rule applied as generate applies it to a decoder-only model: the rule sees
    the row's prompt followed by the completion so far (triage's prefixes carry only the
    completion, after the start marker). Rows are grouped by prompt length, each group with
    the processor generate builds for an unpadded batch of that length."""

    def __init__(self, groups: list[tuple[torch.Tensor, torch.Tensor, Any]], n_sources: int):
        self.groups = groups          # (source rows, their prompts [g, L], the processor) per prompt length
        self.n_sources = n_sources
        self.wrapped = groups[0][2]   # the rule's processor (its name names the rule)

    def __call__(self, input_ids: torch.Tensor, scores: torch.Tensor) -> torch.Tensor:
        n = input_ids.shape[0]
        if n % self.n_sources:
            raise ValueError(f"{n} prefixes for {self.n_sources} prompts")
        per = n // self.n_sources  # beams per source, consecutive as in generate
        out = scores.clone()
        for src_rows, prompts, proc in self.groups:
            rows = (src_rows[:, None] * per + torch.arange(per)[None, :]).reshape(-1)
            full = torch.cat([prompts.repeat_interleave(per, dim=0), input_ids[rows, 1:]], dim=1)
            out[rows] = proc(full, scores[rows])
        return out


# ---------------------------------------------------------------------------------- the model
class CausalModel:
    """SequenceModel over a transformers AutoModelForCausalLM, its tokenizer and a prompt format.

    Offers every optional capability of triage.models.api: batched forced scoring, target and
    position scoring (the prompt cache shared by every target of a row), the checkpoint's own
    generation rules and ``generate``, its decoder settings and a description for the report.
    """

    def __init__(self, model: Any, tokenizer: Any, prompt: PromptFormat | None = None,
                 model_dir: Path | None = None, device: str = "cpu"):
        self.model = model.eval()
        self.tokenizer = tokenizer
        self.prompt = prompt or PromptFormat(template=PLAIN_TEMPLATE)
        self.model_dir = model_dir
        self.device = torch.device(device)
        where = str(model_dir) if model_dir else None
        if self.prompt.chat and not getattr(tokenizer, "chat_template", None):
            raise ModelError("the tokenizer has no chat template", path=where,
                             hint="use --prompt-template instead, or a tokenizer whose tokenizer_config.json has one")
        gc, cfg = model.generation_config, model.config

        def first(*values):
            return next((v for v in values if v is not None), None)

        eos = first(gc.eos_token_id, cfg.eos_token_id, tokenizer.eos_token_id)
        if eos is None:
            raise ModelError("the model config names no end-of-sequence token", path=where)
        self.end_ids = tuple(int(e) for e in (eos if isinstance(eos, (list, tuple)) else [eos]))
        self.end_id = self.end_ids[0]
        self.pad_id = int(first(gc.pad_token_id, cfg.pad_token_id, tokenizer.pad_token_id, self.end_id))
        # a marker for "the prompt ends here": never fed to the model
        self.start_id = int(first(gc.bos_token_id, cfg.bos_token_id, tokenizer.bos_token_id, self.end_id))
        self.vocab_size = int(model.get_output_embeddings().weight.shape[0])
        self.unk_id = tokenizer.unk_token_id
        maxpos = getattr(cfg, "max_position_embeddings", None)
        self.positions = int(maxpos) if maxpos else None
        # prompt and completion share the positions: a prompt leaves room for at least one token
        self.max_source_tokens = self.positions - 1 if self.positions else None
        self.max_target_tokens = self.positions - 1 if self.positions else None
        self._fingerprint: str | None = None
        self._example: tuple[str, str] | None = None  # the first source rendered, and its prompt
        self._head_ok: bool | None = None
        # a prompt that ends in text (not a space or a newline) is followed by a completion that starts
        # with a space on a tokenizer that merges the space into the next word (byte-level BPE)
        sample = self.render("x")
        self.lead_space = bool(sample) and not sample[-1].isspace()

    # -------------------------------------------------------------- text <-> ids
    def render(self, text: str) -> str:
        """The prompt for one source text."""
        if not self.prompt.chat:
            return self.prompt.template.format(source=text)
        messages = [{"role": "system", "content": self.prompt.system}] if self.prompt.system else []
        messages.append({"role": "user", "content": text})
        return self.tokenizer.apply_chat_template(messages, add_generation_prompt=True, tokenize=False)

    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        prompts = [self.render(t) for t in texts]
        if prompts and self._example is None:
            self._example = (texts[0], prompts[0])
        # a rendered chat template holds its own special tokens; a plain template gets the tokenizer's
        ids = self.tokenizer(prompts, add_special_tokens=not self.prompt.chat)["input_ids"] if prompts else []
        return [list(x) for x in ids]

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        """Completion ids as the model writes them after the prompt: where the prompt ends in text and
        the tokenizer merges a leading space into the first word (' the' one token, as byte-level BPE
        does), the text is tokenized with that space; a space that would be a token of its own, or a
        tokenizer that ignores it, leaves the text as written."""
        if not texts:
            return []
        plain = [list(x) for x in self.tokenizer(list(texts), add_special_tokens=False)["input_ids"]]
        if not self.lead_space:
            return plain
        want = [i for i, t in enumerate(texts) if t and not t[0].isspace()]
        if not want:
            return plain
        spaced = self.tokenizer([" " + texts[i] for i in want], add_special_tokens=False)["input_ids"]
        for i, ids in zip(want, spaced, strict=True):
            if ids and list(ids) != plain[i] and self.tokenizer.decode(list(ids[:1])) != " ":
                plain[i] = list(ids)
        return plain

    def detokenize(self, ids: Sequence[int]) -> str:
        """The completion's text; the leading space the model writes after a prompt that ends in text
        is dropped (tokenize_targets puts it back)."""
        text = self.tokenizer.decode(list(ids), skip_special_tokens=True)
        return text[1:] if self.lead_space and text.startswith(" ") else text

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        return [str(t) for t in self.tokenizer.convert_ids_to_tokens(list(ids))]

    def fingerprint(self) -> str:
        if self._fingerprint is None:
            from triage.models.transformers_backend import model_fingerprint, weights_fingerprint

            self._fingerprint = (model_fingerprint(self.model_dir) if self.model_dir is not None
                                 else weights_fingerprint(self.model))
        return self._fingerprint

    # -------------------------------------------------------------- what the checkpoint says
    @property
    def default_settings(self) -> DecoderSettings:
        """The checkpoint's generation config, its length limit counted in completion tokens:
        max_new_tokens, else generate's default for decoder-only models (20 new tokens); a
        max_length there counts the prompt as well, so it is not a completion limit and is not read."""
        gc = self.model.generation_config
        origin = f"generation_config.json of {self.model_dir}" if self.model_dir else "generation_config"
        s = DecoderSettings.from_generation_config(gc, origin=origin)
        return s.replace(max_length=None, max_new_tokens=gc.max_new_tokens or 20, decoder_start_token_id=None,
                         eos_token_ids=self.end_ids, pad_token_id=self.pad_id)

    def describe(self) -> dict[str, Any]:
        info: dict[str, Any] = {}
        if self.model_dir is not None:
            info["path"] = str(self.model_dir)
        info["architecture"] = type(self.model).__name__
        info["parameters"] = int(sum(p.numel() for p in self.model.parameters()))
        info["tokenizer"] = type(self.tokenizer).__name__
        info["vocab"] = len(self.tokenizer)
        info["prompt"] = self.prompt.describe()
        if self._example is not None:
            info["prompt_example"] = self._example[1]
        return info

    # -------------------------------------------------------------- tensors
    def _left_pad(self, rows: Sequence[Sequence[int]]) -> tuple[torch.Tensor, torch.Tensor]:
        width = max(len(r) for r in rows)
        ids = torch.full((len(rows), width), self.pad_id, dtype=torch.long)
        mask = torch.zeros((len(rows), width), dtype=torch.long)
        for i, r in enumerate(rows):
            if len(r):
                ids[i, width - len(r):] = torch.tensor(list(r), dtype=torch.long)
                mask[i, width - len(r):] = 1
        return ids.to(self.device), mask.to(self.device)

    @torch.inference_mode()
    def encode(self, sources: Sequence[Sequence[int]]) -> PromptState:
        ids, mask = self._left_pad(sources)
        out = self._call(self.model, input_ids=ids, attention_mask=mask, position_ids=positions(mask),
                         use_cache=True, logits_to_keep=1)
        last = torch.log_softmax(out.logits[:, -1, :].float(), dim=-1)
        return PromptState(out.cache, mask, last, torch.arange(len(sources), device=self.device))

    @torch.inference_mode()
    def encode_grouped(self, sources: Sequence[Sequence[int]]) -> PromptState:
        """``encode`` in length-sorted groups (less padding), joined into one state padded on the left."""
        from triage.models.transformers_backend import length_groups

        groups = length_groups([len(s) for s in sources])
        if len(groups) == 1:
            return self.encode(sources)
        parts = [(idx, self.encode([sources[i] for i in idx])) for idx in groups]
        width = max(p.mask.shape[1] for _, p in parts)
        order = torch.tensor([i for idx, _ in parts for i in idx], dtype=torch.long)
        inverse = torch.empty_like(order)
        inverse[order] = torch.arange(len(order))
        mask = torch.cat([torch.nn.functional.pad(p.mask, (width - p.mask.shape[1], 0)) for _, p in parts])
        last = torch.cat([p.last for _, p in parts])
        cache = copy.copy(parts[0][1].cache)
        cache.layers = []
        for k, layer in enumerate(parts[0][1].cache.layers):
            joined = copy.copy(layer)
            pad = [(0, 0, width - p.mask.shape[1], 0) for _, p in parts]
            joined.keys = torch.cat([torch.nn.functional.pad(p.cache.layers[k].keys, pw)
                                     for (_, p), pw in zip(parts, pad, strict=True)])
            joined.values = torch.cat([torch.nn.functional.pad(p.cache.layers[k].values, pw)
                                       for (_, p), pw in zip(parts, pad, strict=True)])
            cache.layers.append(joined)
        # row i of the input is row inverse[i] of the joined state
        return PromptState(cache, mask, last, inverse.to(self.device))

    def select(self, state: PromptState, cache: Any, index: torch.Tensor) -> tuple[PromptState, Any]:
        index = index.to(self.device)
        state = PromptState(state.cache, state.mask, state.last, state.rows.index_select(0, index))
        if cache is not None and not isinstance(cache, _PromptOnly):
            cache.reorder_cache(index)
        return state, cache

    def _run(self, state: PromptState, rows: torch.Tensor, tokens: torch.Tensor, past: Any, done: int,
             *, hidden: bool = False, keep: int = 0):
        """Completion tokens [R, n] after `done` completion tokens already in `past` (None: only the
        prompt), for prompt rows `rows`; returns the model output (hidden states with hidden=True)."""
        if past is None:
            past = cache_rows(state.cache, rows)
        mask = state.mask.index_select(0, rows)
        mask = torch.cat([mask, mask.new_ones((len(rows), done + tokens.shape[1]))], dim=1)
        pos = positions(mask)[:, -tokens.shape[1]:]
        net = self.model.base_model if hidden else self.model
        kw = {} if hidden else {"logits_to_keep": keep}
        return self._call(net, input_ids=tokens.to(self.device), attention_mask=mask, position_ids=pos, cache=past,
                          use_cache=True, **kw)

    def _call(self, net: Any, **kw: Any) -> Any:
        """A forward pass; a prompt and completion beyond the model's positions is a one-line error
        (models with learned position embeddings fail on an index there)."""
        try:
            return net(**kw)
        except IndexError as exc:
            width = kw["attention_mask"].shape[1]
            if self.positions is not None and width > self.positions:
                raise ModelError(f"a prompt and its completion of {width} tokens do not fit the model's "
                                 f"{self.positions} positions", path=str(self.model_dir) if self.model_dir else None,
                                 hint="lower --max-new-tokens, or shorten the prompt template") from exc
            raise

    @torch.inference_mode()
    def next_logprobs(self, state: PromptState, prefixes: torch.Tensor, cache: Any = None):
        t = prefixes.shape[1]
        if cache is None or isinstance(cache, _PromptOnly):
            if t == 1:
                return state.last.index_select(0, state.rows), _PromptOnly()
            out = self._run(state, state.rows, prefixes[:, 1:], None, 0, keep=1)
        else:
            out = self._run(state, state.rows, prefixes[:, -1:], cache, t - 2, keep=1)
        return torch.log_softmax(out.logits[:, -1, :].float(), dim=-1), out.cache

    @torch.inference_mode()
    def forced_logprobs(self, state: PromptState, decoder_inputs: torch.Tensor) -> torch.Tensor:
        first = state.last.index_select(0, state.rows)[:, None, :]
        if decoder_inputs.shape[1] == 1:
            return first
        out = self._run(state, state.rows, decoder_inputs[:, 1:], None, 0)
        return torch.cat([first, torch.log_softmax(out.logits.float(), dim=-1)], dim=1)

    @torch.inference_mode()
    def forced_target_logprobs(self, state: PromptState, decoder_inputs: torch.Tensor,
                               targets: torch.Tensor) -> torch.Tensor:
        return self.forced_logprobs(state, decoder_inputs).gather(-1, targets.to(self.device)[..., None])[..., 0]

    # -------------------------------------------------------------- scoring only where needed
    #: most logits held at once by score_positions (floats)
    logits_budget: int = 1 << 25
    #: most cached prompt values (floats) copied at once for score_positions' runs
    cache_budget: int = 1 << 26

    def _head(self) -> bool:
        """Whether the output head applied to the base model's hidden states gives the model's own
        logits (within 1e-5); checked once. If not (a soft cap, a scale), the full forward is used."""
        if self._head_ok is None:
            g = torch.Generator().manual_seed(0)
            ids = torch.randint(0, self.vocab_size, (1, 6), generator=g).to(self.device)
            with torch.inference_mode():
                full = self.model(input_ids=ids, use_cache=False).logits.float()
                hid = self.model.base_model(input_ids=ids, use_cache=False).last_hidden_state
                mine = self.model.get_output_embeddings()(hid).float()
            self._head_ok = mine.shape == full.shape and bool(torch.allclose(mine, full, rtol=0, atol=1e-5))
        return self._head_ok

    @torch.inference_mode()
    def score_positions(self, state: PromptState, rows: torch.Tensor, decoder_inputs: torch.Tensor,
                        picks: torch.Tensor, labels: torch.Tensor,
                        lengths: Sequence[int] | None = None) -> torch.Tensor:
        """Teacher-forced log-probs [M, K] of `labels` at flat positions `picks` (r * T + t) of the
        completions `decoder_inputs` [R, T] run on prompts `rows` [R] of `state`.

        Position 0 of a run (after the prompt) is read from the state; the other positions run
        on top of the prompt's cache in length-sorted groups of runs, the prompt's padding cut
        to the group's longest prompt, and only the picked positions go through the output
        projection and the softmax.
        """
        R, T = decoder_inputs.shape
        prompt_rows = state.rows.index_select(0, rows.to(self.device))
        picks = picks.to(self.device)
        labels = labels.to(self.device)
        out = torch.empty(labels.shape, dtype=torch.float32)
        t_of, r_of = picks % T, picks // T
        at_start = (t_of == 0).nonzero().flatten()
        if len(at_start):
            lp = state.last.index_select(0, prompt_rows.index_select(0, r_of[at_start]))
            out[at_start.cpu()] = lp.gather(-1, labels[at_start]).cpu()
        later = (t_of > 0).nonzero().flatten()
        if not len(later) or T < 2:
            return out
        lengths = list(lengths) if lengths is not None else [T] * R
        from triage.models.transformers_backend import length_groups

        real = state.mask.sum(1)
        per_row = max(1, sum(int(x.numel()) for layer in state.cache.layers for x in (layer.keys, layer.values))
                      // max(1, state.mask.shape[0]))
        head = self.model.get_output_embeddings() if self._head() else None
        step = max(1, self.logits_budget // self.vocab_size)
        for group in length_groups(lengths):
            for a in range(0, len(group), max(1, self.cache_budget // per_row)):
                idx = torch.tensor(group[a : a + max(1, self.cache_budget // per_row)], dtype=torch.long,
                                   device=self.device)
                width = max(lengths[i] for i in idx.tolist())
                if width < 2:
                    continue
                sel = later[torch.isin(r_of[later], idx)]
                if not len(sel):
                    continue
                prow = prompt_rows.index_select(0, idx)
                keep_w = int(real.index_select(0, prow).max())
                sub = _cut_left(state, prow, keep_w)
                res = self._run(sub, torch.arange(len(idx), device=self.device), decoder_inputs[idx, 1:width],
                                None, 0, hidden=head is not None)
                local = torch.empty(R, dtype=torch.long, device=self.device)
                local[idx] = torch.arange(len(idx), device=self.device)
                flat = local[r_of[sel]] * (width - 1) + (t_of[sel] - 1)
                if head is not None:
                    h = res.last_hidden_state.reshape(-1, res.last_hidden_state.shape[-1]).index_select(0, flat)
                    for b in range(0, len(sel), step):
                        logp = torch.log_softmax(head(h[b : b + step]).float(), dim=-1)
                        out[sel[b : b + step].cpu()] = logp.gather(-1, labels[sel[b : b + step]]).cpu()
                else:
                    logits = res.logits.float()
                    logits = logits.reshape(-1, logits.shape[-1]).index_select(0, flat)
                    out[sel.cpu()] = torch.log_softmax(logits, dim=-1).gather(-1, labels[sel]).cpu()
        return out

    # -------------------------------------------------------------- the checkpoint's own decoder
    def _generation_config(self, settings: DecoderSettings) -> Any:
        if settings.penalty == "gnmt":
            settings = settings.replace(penalty="none")  # the rules do not depend on the length penalty
        gc = settings.to_generation_config(self.model.generation_config)
        return gc

    def _rules_for(self, settings: DecoderSettings, prompts: torch.Tensor) -> Any:
        """The processors generate builds for an unpadded batch of `prompts` [g, L]."""
        from transformers import LogitsProcessorList

        hf = self.model
        gc = self._generation_config(settings)
        L = prompts.shape[1]
        gc.max_length = L + settings.limit_new_tokens()  # as generate's _prepare_generated_length
        gc.max_new_tokens = None
        if gc.min_new_tokens is not None:
            gc.min_length = gc.min_new_tokens + L
        hf._prepare_special_tokens(gc, True, device="cpu")
        return hf._get_logits_processor(generation_config=gc, input_ids_seq_length=L, encoder_input_ids=prompts,
                                        prefix_allowed_tokens_fn=None, logits_processor=LogitsProcessorList(),
                                        device="cpu", model_kwargs={})

    def logits_processors(self, settings: DecoderSettings, source_ids: torch.Tensor | None = None) -> Any:
        """The rules of `settings` for prompts [B, S] (padded on the right with pad_id, as triage pads
        sources), each applied to the prompt followed by the completion (PromptRule)."""
        from transformers import LogitsProcessorList

        if source_ids is None:
            source_ids = torch.tensor([[self.start_id]])
        prompts = [_unpad(row, self.pad_id) for row in source_ids.tolist()]
        by_len: dict[int, list[int]] = {}
        for i, p in enumerate(prompts):
            by_len.setdefault(len(p), []).append(i)
        built = []
        for L, idx in sorted(by_len.items()):
            ids = torch.tensor([prompts[i] for i in idx], dtype=torch.long).reshape(len(idx), L)
            built.append((torch.tensor(idx, dtype=torch.long), ids, self._rules_for(settings, ids)))
        n_rules = len(built[0][2]) if built else 0
        out = LogitsProcessorList()
        for k in range(n_rules):
            out.append(PromptRule([(idx, ids, procs[k]) for idx, ids, procs in built], len(prompts)))
        return out

    def decodes(self, settings: DecoderSettings) -> bool:
        """generate expresses every objective but the gnmt penalty."""
        return settings.penalty != "gnmt"

    @torch.inference_mode()
    def generate(self, settings: DecoderSettings, sources: Sequence[Sequence[int]], *, batch_size: int = 16,
                 progress: Callable[[int], None] | None = None) -> list[Generated]:
        """transformers' generate over prompts padded on the left; results in input order, completions only.

        With a generation rule active, a batch holds prompts of one length only: inside generate
        the rules read the padded prompt (n-grams over padding, a minimum length counting it), so
        a padded batch would decode a row differently from the same row alone.
        """
        gc = self._generation_config(settings)
        gc.return_dict_in_generate = True
        gc.output_scores = True
        ends = set(settings.eos_token_ids or self.end_ids)
        order = sorted(range(len(sources)), key=lambda i: len(sources[i]))
        same_length = bool(self.logits_processors(settings, torch.tensor([list(sources[order[0]])]))) \
            if sources else False
        batches: list[list[int]] = []
        for i in order:
            if batches and len(batches[-1]) < batch_size and (
                    not same_length or len(sources[batches[-1][0]]) == len(sources[i])):
                batches[-1].append(i)
            else:
                batches.append([i])
        results: list[Generated | None] = [None] * len(sources)
        for idx in batches:
            ids, mask = self._left_pad([sources[i] for i in idx])
            out = self.model.generate(input_ids=ids, attention_mask=mask, generation_config=gc)
            seqs = out.sequences[:, ids.shape[1]:]  # the completions, never the prompt
            if settings.beam > 1:
                scores = out.sequences_scores.tolist()
            else:
                trans = self.model.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
                trans = torch.where(torch.isfinite(trans), trans, torch.zeros_like(trans))
                scores = None
            for k, i in enumerate(idx):
                row = seqs[k].tolist()
                end = next((j for j, tok in enumerate(row) if tok in ends), None)
                toks = row if end is None else row[:end]
                if scores is not None:
                    score = float(scores[k])
                else:
                    score = float(trans[k, : len(toks) + (end is not None)].sum())
                results[i] = Generated(toks, score, end is not None)
            if progress:
                progress(len(idx))
        return results  # type: ignore[return-value]


def _unpad(row: list[int], pad_id: int) -> list[int]:
    """A prompt padded on the right by triage (trailing pad ids dropped)."""
    end = len(row)
    while end > 1 and row[end - 1] == pad_id:
        end -= 1
    return row[:end]


def _cut_left(state: PromptState, prompt_rows: torch.Tensor, width: int) -> PromptState:
    """Prompt rows `prompt_rows` of `state` with their left padding cut to `width` columns."""
    cache = cache_rows(state.cache, prompt_rows)
    for layer in cache.layers:
        if getattr(layer, "is_initialized", False) and layer.keys is not None and layer.keys.numel():
            layer.keys = layer.keys[:, :, -width:]
            layer.values = layer.values[:, :, -width:]
    mask = state.mask.index_select(0, prompt_rows)[:, -width:]
    return PromptState(cache, mask, state.last.index_select(0, prompt_rows),
                       torch.arange(len(prompt_rows), device=mask.device))


def load_causal_model(model_dir: Path, prompt: PromptFormat | None, *, tokenizer: Any, device: str = "cpu",
                      allow_pickle: bool = False, trust_remote_code: bool = False) -> CausalModel:
    """The decoder-only checkpoint in `model_dir` (config, weights and tokenizer already checked)."""
    from transformers import AutoModelForCausalLM

    try:
        model = AutoModelForCausalLM.from_pretrained(
            model_dir, local_files_only=True, trust_remote_code=trust_remote_code,
            dtype=torch.float32, use_safetensors=not allow_pickle or None,
        )
    except Exception as exc:
        raise ModelError(f"weights cannot be loaded as a decoder-only model: {str(exc).splitlines()[0]}",
                         path=str(model_dir)) from exc
    model.to(device)
    vocab_model = int(model.get_output_embeddings().weight.shape[0])
    if len(tokenizer) > vocab_model:
        raise ModelError(
            f"vocabulary mismatch: the tokenizer has {len(tokenizer)} tokens, the model only {vocab_model}",
            path=str(model_dir), hint="the tokenizer files belong to another model",
        )
    return CausalModel(model, tokenizer, prompt, model_dir=model_dir, device=device)
