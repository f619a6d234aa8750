"""A transformers encoder-decoder checkpoint behind triage's model interface.

Loading is local only (a directory, or a name already in the local Hugging Face cache),
float32 on the CPU by default, safetensors unless the user allows pickle-based weights,
and never with remote code unless the user passes ``trust_remote_code``.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import torch

from .errors import ModelError

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


def model_fingerprint(model_dir: Path) -> str:
    """sha256 over the files that decide the model's scores, in a fixed order."""
    h = hashlib.sha256()
    names = sorted(
        f.name for f in model_dir.iterdir()
        if f.is_file() and (f.name in FINGERPRINT_FILES or f.suffix in WEIGHT_SAFE + WEIGHT_PICKLE)
    )
    for name in names:
        h.update(name.encode() + b"\0")
        with open(model_dir / name, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
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
    """SequenceModel over a transformers AutoModelForSeq2SeqLM and its tokenizer."""

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
            if self.model_dir is not None:
                self._fingerprint = model_fingerprint(self.model_dir)
            else:
                h = hashlib.sha256()
                for k, v in sorted(self.model.state_dict().items()):
                    h.update(k.encode())
                    h.update(v.detach().cpu().contiguous().numpy().tobytes())
                self._fingerprint = h.hexdigest()
        return self._fingerprint

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
        logits = out.logits.float()
        picked = logits.gather(-1, targets.to(self.device).unsqueeze(-1)).squeeze(-1)
        return picked - torch.logsumexp(logits, dim=-1)


def load_transformers_model(name_or_path: str, *, device: str = "cpu", allow_pickle: bool = False,
                            trust_remote_code: bool = False) -> TransformersModel:
    """Load a local encoder-decoder checkpoint with transformers' Auto classes (never downloads)."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    model_dir = resolve_model_dir(name_or_path)
    if not (model_dir / "config.json").is_file():
        raise ModelError("no config.json in the model directory", path=str(model_dir))
    from transformers import AutoConfig, AutoModelForSeq2SeqLM, AutoTokenizer

    try:
        config = AutoConfig.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:  # transformers raises many kinds here
        raise ModelError(f"config.json cannot be read: {str(exc).splitlines()[0]}", path=str(model_dir)) from exc
    if not getattr(config, "is_encoder_decoder", False):
        raise ModelError(f"not an encoder-decoder model (model_type {config.model_type!r})", path=str(model_dir),
                         hint="triage scores sequence-to-sequence checkpoints loadable with AutoModelForSeq2SeqLM")
    _check_weights(model_dir, allow_pickle)
    try:
        tokenizer = AutoTokenizer.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:
        raise ModelError(f"tokenizer missing or unreadable: {str(exc).splitlines()[0]}", path=str(model_dir),
                         hint="the model directory must hold the tokenizer files saved with save_pretrained") from exc
    if tokenizer is None or isinstance(tokenizer, bool):
        raise ModelError("tokenizer missing", path=str(model_dir))
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
