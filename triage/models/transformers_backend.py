"""A transformers encoder-decoder checkpoint behind triage's model interface.

Loading is local only (a directory, or a name already in the local Hugging Face cache),
float32 on the CPU by default, safetensors unless the user allows pickle-based weights,
and never with remote code unless the user passes ``trust_remote_code``.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import torch

from triage.errors import ModelError, OptionValueError
from triage.models.api import Generated
from triage.settings import DecoderSettings

WEIGHT_SAFE = (".safetensors",)
WEIGHT_PICKLE = (".bin", ".pt", ".pth", ".ckpt", ".pkl")
FINGERPRINT_FILES = (
    "config.json",
    "generation_config.json",
    "tokenizer.json",
    "tokenizer_config.json",
    "special_tokens_map.json",
    "vocab.json",
    "merges.txt",
    "source.spm",
    "target.spm",
    "spiece.model",
    "sentencepiece.bpe.model",
)


_UNCHECKED = object()  # the output head not yet checked (TransformersModel._head)

# a tokenizer saved with save_pretrained leaves at least one of these (fast, BPE, SentencePiece, WordPiece);
# a few (byte-level ones) need none, so their absence only explains a tokenizer that failed to load
TOKENIZER_FILES = ("tokenizer.json", "tokenizer_config.json", "vocab.json", "source.spm", "spiece.model",
                   "sentencepiece.bpe.model", "vocab.txt")


def resolve_model_dir(name_or_path: str) -> Path:
    """A local directory for the model: the path itself, or the local cache's snapshot (no download)."""
    p = Path(name_or_path)
    if p.is_dir():
        return p
    if p.exists():
        raise ModelError("is a file, not a model directory", path=name_or_path,
                         hint="pass the folder that holds config.json and the weights")
    if "/" in name_or_path and not name_or_path.startswith((".", "/")) and name_or_path.count("/") == 1:
        try:
            from huggingface_hub import snapshot_download

            return Path(snapshot_download(name_or_path, local_files_only=True))
        except Exception:
            pass
    raise ModelError("model directory not found (triage never downloads models)", path=name_or_path,
                     hint="pass a local checkpoint folder, or a name already in the local Hugging Face cache")


def model_fingerprint(model_dir: Path, files: Sequence[str] = FINGERPRINT_FILES) -> str:
    """sha256 over the files that decide the model's scores (`files` and the weights), in a fixed order."""
    h = hashlib.sha256()
    names = sorted(
        f.name for f in model_dir.iterdir()
        if f.is_file() and (f.name in files or f.suffix in WEIGHT_SAFE + WEIGHT_PICKLE)
    )
    for name in names:
        h.update(name.encode() + b"\0")
        with open(model_dir / name, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
    return h.hexdigest()


def weights_fingerprint(model: Any) -> str:
    """sha256 over a model's weights held in memory (names and bytes, in name order)."""
    h = hashlib.sha256()
    for k, v in sorted(model.state_dict().items()):
        h.update(k.encode())
        h.update(v.detach().cpu().contiguous().numpy().tobytes())
    return h.hexdigest()


def _check_weights(model_dir: Path, allow_pickle: bool) -> None:
    files = [f.name for f in model_dir.iterdir() if f.is_file()]
    safe = [f for f in files if f.endswith(WEIGHT_SAFE)]
    pickled = [f for f in files if f.endswith(WEIGHT_PICKLE)]
    if not safe and not pickled:
        raise ModelError("no weights found (expected model.safetensors)", path=str(model_dir))
    if not safe and not allow_pickle:
        raise ModelError(
            f"weights only in a pickle-based format ({pickled[0]}); loading a pickle can run arbitrary code",
            path=str(model_dir),
            hint="convert to safetensors, or pass --allow-pickle if you trust the folder",
        )


class TransformersModel:
    """SequenceModel over a transformers AutoModelForSeq2SeqLM and its tokenizer.

    Beyond the interface it offers every optional capability of triage.models.api: batched
    forced scoring, target and position scoring, the checkpoint's own generation rules and
    ``generate``, the checkpoint's decoder settings and a description for the report.
    """

    def __init__(self, model: Any, tokenizer: Any, model_dir: Path | None = None, device: str = "cpu"):
        self.model = model.eval()
        self.tokenizer = tokenizer
        self.model_dir = model_dir
        self.device = torch.device(device)
        gc = model.generation_config
        cfg = model.config
        start = gc.decoder_start_token_id if gc.decoder_start_token_id is not None else cfg.decoder_start_token_id
        eos = gc.eos_token_id if gc.eos_token_id is not None else cfg.eos_token_id
        if isinstance(eos, (list, tuple)):
            eos = eos[0]
        pad = gc.pad_token_id if gc.pad_token_id is not None else cfg.pad_token_id
        if start is None or eos is None:
            raise ModelError("the model config names no decoder start or end-of-sequence token",
                             path=str(model_dir) if model_dir else None)
        self.start_id = int(start)
        self.end_id = int(eos)
        self.pad_id = int(pad if pad is not None else eos)
        self.vocab_size = int(model.get_output_embeddings().weight.shape[0])
        self.unk_id = tokenizer.unk_token_id
        maxpos = getattr(cfg, "max_position_embeddings", None)
        self.max_source_tokens = int(maxpos) if maxpos else None
        self.max_target_tokens = int(maxpos) if maxpos else None
        self._fingerprint: str | None = None

    # -------------------------------------------------------------- text <-> ids
    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        return [list(x) for x in self.tokenizer(list(texts), add_special_tokens=True)["input_ids"]]

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        ids = self.tokenizer(text_target=list(texts), add_special_tokens=True)["input_ids"]
        out = []
        for row in ids:
            row = list(row)
            if row and row[-1] == self.end_id:
                row = row[:-1]
            out.append(row)
        return out

    def detokenize(self, ids: Sequence[int]) -> str:
        return self.tokenizer.decode(list(ids), skip_special_tokens=True)

    def token_strings(self, ids: Sequence[int]) -> list[str]:
        return [str(t) for t in self.tokenizer.convert_ids_to_tokens(list(ids))]

    def fingerprint(self) -> str:
        if self._fingerprint is None:
            self._fingerprint = (model_fingerprint(self.model_dir) if self.model_dir is not None
                                 else weights_fingerprint(self.model))
        return self._fingerprint

    # -------------------------------------------------------------- what the checkpoint says
    @property
    def default_settings(self) -> DecoderSettings:
        """The decoder settings of the checkpoint's generation config."""
        origin = f"generation_config.json of {self.model_dir}" if self.model_dir else "generation_config"
        return DecoderSettings.from_generation_config(self.model.generation_config, origin=origin)

    def describe(self) -> dict[str, Any]:
        info: dict[str, Any] = {}
        if self.model_dir is not None:
            info["path"] = str(self.model_dir)
        info["architecture"] = type(self.model).__name__
        info["parameters"] = int(sum(p.numel() for p in self.model.parameters()))
        info["tokenizer"] = type(self.tokenizer).__name__
        info["vocab"] = len(self.tokenizer)
        return info

    # -------------------------------------------------------------- the checkpoint's own decoder
    def logits_processors(self, settings: DecoderSettings, source_ids: torch.Tensor | None = None) -> Any:
        """The processors transformers' generate builds for these settings, for sources [B, S]."""
        from transformers import LogitsProcessorList

        hf = self.model
        if settings.penalty == "gnmt":
            # the rules do not depend on the length penalty, and transformers has no gnmt form
            settings = settings.replace(penalty="none")
        gc = settings.to_generation_config(hf.generation_config)
        # processors see max_length = start token + allowed new tokens, as inside generate
        gc.max_length = settings.limit_new_tokens() + 1
        gc.max_new_tokens = None
        hf._prepare_special_tokens(gc, True, device=source_ids.device if source_ids is not None else "cpu")
        return hf._get_logits_processor(
            generation_config=gc,
            input_ids_seq_length=1,
            encoder_input_ids=source_ids,
            prefix_allowed_tokens_fn=None,
            logits_processor=LogitsProcessorList(),
            device="cpu",
            model_kwargs={},
        )

    def decodes(self, settings: DecoderSettings) -> bool:
        """generate expresses every objective but the gnmt penalty."""
        return settings.penalty != "gnmt"

    @torch.inference_mode()
    def generate(self, settings: DecoderSettings, sources: Sequence[Sequence[int]], *, batch_size: int = 16,
                 progress: Callable[[int], None] | None = None) -> list[Generated]:
        """transformers' generate over length-sorted batches; results in input order."""
        gc = settings.to_generation_config(self.model.generation_config)
        gc.return_dict_in_generate = True
        gc.output_scores = True
        order = sorted(range(len(sources)), key=lambda i: len(sources[i]))
        results: list[Generated | None] = [None] * len(sources)
        for start in range(0, len(order), batch_size):
            idx = order[start : start + batch_size]
            ids, mask = self._pad([sources[i] for i in idx])
            out = self.model.generate(input_ids=ids, attention_mask=mask, generation_config=gc)
            seqs = out.sequences[:, 1:]  # drop the decoder start token
            if settings.beam > 1:
                scores = out.sequences_scores.tolist()
            else:
                trans = self.model.compute_transition_scores(out.sequences, out.scores, normalize_logits=True)
                trans = torch.where(torch.isfinite(trans), trans, torch.zeros_like(trans))
                scores = None
            for k, i in enumerate(idx):
                row = seqs[k].tolist()
                finished = self.end_id in row
                toks = row[: row.index(self.end_id)] if finished else row
                if scores is not None:
                    score = float(scores[k])
                else:
                    n = len(toks) + (1 if finished else 0)
                    score = float(trans[k, :n].sum())
                results[i] = Generated(toks, score, finished)
            if progress:
                progress(len(idx))
        return results  # type: ignore[return-value]

    # -------------------------------------------------------------- tensors
    def _pad(self, rows: Sequence[Sequence[int]]) -> tuple[torch.Tensor, torch.Tensor]:
        width = max(len(r) for r in rows)
        ids = torch.full((len(rows), width), self.pad_id, dtype=torch.long)
        mask = torch.zeros((len(rows), width), dtype=torch.long)
        for i, r in enumerate(rows):
            ids[i, : len(r)] = torch.tensor(list(r), dtype=torch.long)
            mask[i, : len(r)] = 1
        return ids.to(self.device), mask.to(self.device)

    @torch.inference_mode()
    def encode(self, sources: Sequence[Sequence[int]]) -> dict[str, torch.Tensor]:
        ids, mask = self._pad(sources)
        hidden = self.model.get_encoder()(input_ids=ids, attention_mask=mask).last_hidden_state
        return {"hidden": hidden, "mask": mask, "input_ids": ids}

    def select(self, state: dict[str, torch.Tensor], cache: Any, index: torch.Tensor) -> tuple[Any, Any]:
        index = index.to(self.device)
        new_state = {k: v.index_select(0, index) for k, v in state.items()}
        if cache is not None:
            cache.reorder_cache(index)
        return new_state, cache

    def _forward(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor, cache: Any, use_cache: bool):
        from transformers.modeling_outputs import BaseModelOutput

        return self.model(
            encoder_outputs=BaseModelOutput(last_hidden_state=state["hidden"]),
            attention_mask=state["mask"],
            decoder_input_ids=decoder_inputs.to(self.device),
            cache=cache,
            use_cache=use_cache,
        )

    @torch.inference_mode()
    def next_logprobs(self, state: dict[str, torch.Tensor], prefixes: torch.Tensor, cache: Any = None):
        inputs = prefixes[:, -1:] if cache is not None else prefixes
        out = self._forward(state, inputs, cache, use_cache=True)
        logits = out.logits[:, -1, :].float()
        return torch.log_softmax(logits, dim=-1), out.cache

    @torch.inference_mode()
    def forced_logprobs(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor) -> torch.Tensor:
        out = self._forward(state, decoder_inputs, None, use_cache=False)
        return torch.log_softmax(out.logits.float(), dim=-1)

    @torch.inference_mode()
    def forced_target_logprobs(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor,
                               targets: torch.Tensor) -> torch.Tensor:
        """Log-prob [B, T] of targets[:, t] after decoder_inputs[:, :t+1]: gather minus logsumexp."""
        out = self._forward(state, decoder_inputs, None, use_cache=False)
        # log_softmax is one fused pass; torch.logsumexp is several times slower on the CPU
        logp = torch.log_softmax(out.logits.float(), dim=-1)
        return logp.gather(-1, targets.to(self.device).unsqueeze(-1)).squeeze(-1)

    # -------------------------------------------------------------- scoring only where needed
    #: most logits held at once by score_positions (floats); bounds memory, keeps matmuls large
    logits_budget: int = 1 << 25
    #: the output head's parts once checked (see _head); None: the formula does not reproduce it
    _head_parts: Any = _UNCHECKED

    def _head(self) -> tuple[torch.Tensor, torch.Tensor | None, float] | None:
        """(weight, bias, scale) with logits = (decoder_hidden * scale) @ weight.T + bias, or None.

        Checked once against the model's own full forward; a head this formula does not
        reproduce (within 1e-5) makes score_positions use the full forward instead.
        """
        if self._head_parts is not _UNCHECKED:
            return self._head_parts
        self._head_parts = None
        hf = self.model
        head = hf.get_output_embeddings()
        if isinstance(head, torch.nn.Linear) and hasattr(hf, "get_decoder"):
            bias = getattr(hf, "final_logits_bias", None)
            if isinstance(bias, torch.Tensor):
                bias = bias.reshape(-1)
                if head.bias is not None:
                    bias = bias + head.bias
            else:
                bias = head.bias
            scale = 1.0
            if getattr(hf.config, "scale_decoder_outputs", False) or (
                    getattr(hf.config, "model_type", "") in ("t5", "mt5") and hf.config.tie_word_embeddings):
                scale = float(hf.config.d_model) ** -0.5
            parts = (head.weight, bias, scale)
            g = torch.Generator().manual_seed(0)
            low = min(3, self.vocab_size - 1)
            src = torch.randint(low, self.vocab_size, (1, 5), generator=g).tolist()
            dec = torch.tensor([[self.start_id] + torch.randint(low, self.vocab_size, (3,), generator=g).tolist()])
            with torch.inference_mode():
                state = self.encode(src)
                full = self._forward(state, dec, None, use_cache=False).logits.float()
                hidden = self._decoder_hidden(state, dec)
                mine = self._logits(hidden, parts)
            if mine.shape == full.shape and torch.allclose(mine, full, rtol=0, atol=1e-5):
                self._head_parts = parts
        return self._head_parts

    def _grouped_decoder_hidden(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor,
                                lengths: Sequence[int] | None) -> torch.Tensor:
        if lengths is None or len(lengths) < 2:
            return self._decoder_hidden(state, decoder_inputs)
        groups = length_groups(lengths)
        if len(groups) == 1:
            return self._decoder_hidden(state, decoder_inputs)
        src_len = state["mask"].sum(1).tolist()
        hidden = None
        for idx in groups:
            width = max(lengths[i] for i in idx)
            swidth = max(int(src_len[i]) for i in idx)
            index = torch.tensor(idx, dtype=torch.long, device=self.device)
            sub = {"hidden": state["hidden"].index_select(0, index)[:, :swidth],
                   "mask": state["mask"].index_select(0, index)[:, :swidth]}
            h = self._decoder_hidden(sub, decoder_inputs.index_select(0, index)[:, :width])
            if hidden is None:
                hidden = h.new_zeros((decoder_inputs.shape[0], decoder_inputs.shape[1], h.shape[-1]))
            hidden[index, :width] = h
        return hidden

    @torch.inference_mode()
    def encode_grouped(self, sources: Sequence[Sequence[int]]) -> dict[str, torch.Tensor]:
        """``encode`` in length-sorted groups (less padding); same state layout, padded to the longest."""
        lengths = [len(x) for x in sources]
        groups = length_groups(lengths)
        if len(groups) == 1:
            return self.encode(sources)
        ids, mask = self._pad(sources)
        hidden = None
        for idx in groups:
            part = self.encode([sources[i] for i in idx])["hidden"]
            if hidden is None:
                hidden = part.new_zeros((len(sources), ids.shape[1], part.shape[-1]))
            hidden[torch.tensor(idx, dtype=torch.long, device=self.device), : part.shape[1]] = part
        return {"hidden": hidden, "mask": mask, "input_ids": ids}

    def _decoder_hidden(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor) -> torch.Tensor:
        out = self.model.get_decoder()(
            input_ids=decoder_inputs.to(self.device),
            encoder_hidden_states=state["hidden"],
            encoder_attention_mask=state["mask"],
            use_cache=False,
        )
        return out.last_hidden_state

    @staticmethod
    def _logits(hidden: torch.Tensor, parts: tuple[torch.Tensor, torch.Tensor | None, float]) -> torch.Tensor:
        weight, bias, scale = parts
        if scale != 1.0:
            hidden = hidden * scale
        return torch.nn.functional.linear(hidden, weight, bias).float()

    @torch.inference_mode()
    def score_positions(self, state: dict[str, torch.Tensor], rows: torch.Tensor, decoder_inputs: torch.Tensor,
                        picks: torch.Tensor, labels: torch.Tensor,
                        lengths: Sequence[int] | None = None) -> torch.Tensor:
        """Teacher-forced log-probs at chosen positions only.

        decoder_inputs [R, T] are run against encoder rows `rows` [R] of `state`; `picks` [M]
        are flat positions (r * T + t) into them; `labels` [M, K] the tokens whose log-probs
        are wanted after each picked position. Returns [M, K]. The output projection and the
        softmax run only for the picked positions, in chunks of at most `logits_budget` logits.
        With `lengths` (real tokens per run) the decoder runs in length-sorted groups cut to
        their own width, so little work goes to padding.
        """
        rows = rows.to(self.device)
        state = {k: v.index_select(0, rows) for k, v in state.items()}
        decoder_inputs = decoder_inputs.to(self.device)
        picks = picks.to(self.device)
        labels = labels.to(self.device)
        parts = self._head()
        out = torch.empty(labels.shape, dtype=torch.float32)
        if parts is not None:
            hidden = self._grouped_decoder_hidden(state, decoder_inputs, lengths)
            hidden = hidden.reshape(-1, hidden.shape[-1]).index_select(0, picks)
            step = max(1, self.logits_budget // self.vocab_size)
            for a in range(0, hidden.shape[0], step):
                logp = torch.log_softmax(self._logits(hidden[a : a + step], parts), dim=-1)
                out[a : a + step] = logp.gather(-1, labels[a : a + step]).cpu()
            return out
        width = decoder_inputs.shape[1]
        per = max(1, self.logits_budget // max(1, width * self.vocab_size))
        for a in range(0, decoder_inputs.shape[0], per):
            sub = {k: v[a : a + per] for k, v in state.items()}
            logits = self._forward(sub, decoder_inputs[a : a + per], None, use_cache=False).logits.float()
            lo, hi = a * width, (a + per) * width
            sel = ((picks >= lo) & (picks < hi)).nonzero().flatten()
            if len(sel):
                logp = torch.log_softmax(logits.reshape(-1, logits.shape[-1]).index_select(0, picks[sel] - lo), -1)
                out[sel.cpu()] = logp.gather(-1, labels[sel]).cpu()
        return out


def length_groups(lengths: Sequence[int], slack: float = 1.1, min_tokens: int = 512) -> list[list[int]]:
    """Indices cut into length-sorted groups: padded tokens stay within `slack` of the real ones,
    and a group holds at least `min_tokens` real tokens (large matmuls) before it may end."""
    order = sorted(range(len(lengths)), key=lambda i: lengths[i])
    groups: list[list[int]] = []
    cur: list[int] = []
    real = 0
    for i in order:
        n = lengths[i]
        if cur and real >= min_tokens and n * (len(cur) + 1) > slack * (real + n):
            groups.append(cur)
            cur, real = [], 0
        cur.append(i)
        real += n
    if cur:
        groups.append(cur)
    return groups


def load_tokenizer(model_dir: Path, trust_remote_code: bool = False) -> Any:
    """The checkpoint's tokenizer (AutoTokenizer, local files only), or a one-line ModelError."""
    from transformers import AutoTokenizer

    try:
        tokenizer = AutoTokenizer.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:
        if not any((model_dir / f).is_file() for f in TOKENIZER_FILES):
            raise ModelError("no tokenizer files in the model directory (none of " + ", ".join(TOKENIZER_FILES)
                             + ")", path=str(model_dir),
                             hint="save the tokenizer beside the weights with tokenizer.save_pretrained(model_dir)"
                             ) from exc
        raise ModelError(f"tokenizer unreadable: {str(exc).splitlines()[0]}", path=str(model_dir),
                         hint="the model directory must hold the tokenizer files saved with save_pretrained") from exc
    if tokenizer is None or isinstance(tokenizer, bool):
        raise ModelError("tokenizer missing", path=str(model_dir))
    if len(tokenizer) < 2:  # transformers makes an empty tokenizer of the config's kind when no file is there
        raise ModelError(f"the tokenizer holds {len(tokenizer)} token(s): no tokenizer files in the model directory",
                         path=str(model_dir),
                         hint="save the tokenizer beside the weights with tokenizer.save_pretrained(model_dir)")
    return tokenizer


def load_transformers_model(name_or_path: str, *, device: str = "cpu", allow_pickle: bool = False,
                            trust_remote_code: bool = False, prompt_template: str | None = None,
                            chat_template: bool = False, system: str | None = None, language: str | None = None,
                            task: str | None = None) -> Any:
    """Load a local checkpoint with transformers' Auto classes (never downloads): an encoder-decoder
    model as TransformersModel, a decoder-only one as CausalModel (causal_backend.py) with the
    prompt format the options give (a template with {source}, or the tokenizer's chat template), a
    speech-to-text one (AutoModelForSpeechSeq2Seq) as SpeechModel (speech_backend.py; language and
    task choose a multilingual Whisper's decoder prompt)."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    model_dir = resolve_model_dir(name_or_path)
    if not (model_dir / "config.json").is_file():
        raise ModelError("no config.json in the model directory", path=str(model_dir))
    from transformers import AutoConfig, AutoModelForCausalLM, AutoModelForSeq2SeqLM
    from transformers.utils import logging as hf_logging

    hf_logging.disable_progress_bar()
    hf_logging.set_verbosity_error()

    try:
        config = AutoConfig.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:  # transformers raises many kinds here
        raise ModelError(f"config.json cannot be read: {str(exc).splitlines()[0]}", path=str(model_dir)) from exc
    from triage.models.speech_backend import is_speech_config, load_speech_model

    if is_speech_config(config):
        if prompt_template or chat_template or system:
            raise OptionValueError("prompt_template" if prompt_template else "chat_template" if chat_template
                                   else "system", f"applies to decoder-only models only; {model_dir} is a speech model")
        return load_speech_model(model_dir, config, device=device, allow_pickle=allow_pickle,
                                 trust_remote_code=trust_remote_code, language=language, task=task)
    if language or task:
        raise OptionValueError("language" if language else "task",
                               f"applies to speech models only; {model_dir} is a {config.model_type} model")
    from triage.models.causal_backend import load_causal_model, prompt_format

    prompt = prompt_format(prompt_template, chat_template, system)
    decoder_only = not getattr(config, "is_encoder_decoder", False)
    if decoder_only and type(config) not in AutoModelForCausalLM._model_mapping:
        raise ModelError(f"neither an encoder-decoder nor a decoder-only language model (model_type "
                         f"{config.model_type!r})", path=str(model_dir),
                         hint="triage scores checkpoints loadable with AutoModelForSeq2SeqLM or AutoModelForCausalLM")
    if prompt is not None and not decoder_only:
        raise OptionValueError("prompt_template" if prompt.template else "chat_template",
                               f"applies to decoder-only models only; {model_dir} is an encoder-decoder model")
    _check_weights(model_dir, allow_pickle)
    tokenizer = load_tokenizer(model_dir, trust_remote_code)
    if decoder_only:
        return load_causal_model(model_dir, prompt, tokenizer=tokenizer, device=device, allow_pickle=allow_pickle,
                                 trust_remote_code=trust_remote_code)
    try:
        model = AutoModelForSeq2SeqLM.from_pretrained(
            model_dir, local_files_only=True, trust_remote_code=trust_remote_code,
            dtype=torch.float32, use_safetensors=not allow_pickle or None,
        )
    except Exception as exc:
        raise ModelError(f"weights cannot be loaded: {str(exc).splitlines()[0]}", path=str(model_dir)) from exc
    model.to(device)
    vocab_model = int(model.get_output_embeddings().weight.shape[0])
    if len(tokenizer) > vocab_model:
        raise ModelError(
            f"vocabulary mismatch: the tokenizer has {len(tokenizer)} tokens, the model only {vocab_model}",
            path=str(model_dir), hint="the tokenizer files belong to another model",
        )
    return TransformersModel(model, tokenizer, model_dir=model_dir, device=device)
