"""A transformers speech-to-text encoder-decoder (AutoModelForSpeechSeq2Seq) behind triage's model interface.

Sources are audio files (triage.data.audio): ``tokenize_sources`` reads each one (mono, resampled
with soxr to the feature extractor's rate) and returns a stable key for it, eight integers taken
from the sha256 of its samples; the backend keeps key -> file and computes the features when
``encode`` needs them (reading the file again and checking that its samples still hash to the
key). So the score cache's key holds the audio's own hash, and a step holds no features for
rows it does not encode.

The decoder prompt. Whisper's generate starts the decoder with a prompt it builds from the
generation config (start-of-transcript, language, task, no-timestamps). Here the prompt is a
prefix the rest of triage never sees: ``start_id`` stands for the whole prompt, and every decoder
call replaces a prefix's first column by the prompt. A target is the transcript (plus the end
token), and its length is the number of those tokens, the length generate's length penalty
divides by (measured: tests/test_speech_backend.py, DEVELOPERS.md). Generation rules are
transformers' own processors, built as Whisper's generate builds them (suppress tokens, begin-
suppress tokens at the first transcript position, and the general ones of the generation
config); they see the prefix with the prompt in front, as inside generate.

A checkpoint without a Whisper prompt (Speech2Text) has the plain prompt [decoder start token].
"""

from __future__ import annotations

import hashlib
import math
import os
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import torch

from triage.errors import InputError, ModelError, OptionError
from triage.models.api import Generated
from triage.models.transformers_backend import FINGERPRINT_FILES, _check_weights, model_fingerprint
from triage.settings import DecoderSettings

#: files beside the weights that decide a speech checkpoint's scores (the feature extractor's settings too)
SPEECH_FINGERPRINT_FILES = (*FINGERPRINT_FILES, "preprocessor_config.json", "added_tokens.json", "normalizer.json")



class PromptedProcessor:
    """A transformers logits processor that sees the decoder prompt in front of triage's prefix
    (whose first column is the start token standing for the whole prompt)."""

    def __init__(self, inner: Any, prompt: torch.Tensor):
        self.wrapped = inner
        self.prompt = prompt

    def __call__(self, input_ids: torch.Tensor, scores: torch.Tensor) -> torch.Tensor:
        return self.wrapped(with_prompt(input_ids, self.prompt), scores)


def with_prompt(prefixes: torch.Tensor, prompt: torch.Tensor) -> torch.Tensor:
    """prefixes [B, t] whose column 0 is the start token -> [B, P + t - 1] with the whole prompt in front."""
    if prompt.numel() <= 1:
        return prefixes
    rest = prompt[1:].to(prefixes.device).unsqueeze(0).expand(prefixes.shape[0], -1)
    return torch.cat([prefixes[:, :1], rest, prefixes[:, 1:]], dim=1)


class SpeechModel:
    """SequenceModel over a transformers AutoModelForSpeechSeq2Seq, its tokenizer and feature extractor.

    Capabilities (triage.models.api): batched forced scoring, target scoring, the checkpoint's own
    generation rules and generate, its decoder settings, a description, and audio sources.
    """

    def __init__(self, model: Any, tokenizer: Any, feature_extractor: Any, model_dir: Path | None = None,
                 device: str = "cpu", language: str | None = None, task: str | None = None):
        self.model = model.eval()
        self.tokenizer = tokenizer
        self.features = feature_extractor
        self.model_dir = model_dir
        self.device = torch.device(device)
        self.language, self.task = language, task
        self._language_task: dict[str, Any] = {}
        cfg, gc = model.config, model.generation_config
        self.whisper = cfg.model_type == "whisper"
        self.prompt_ids = self._prompt(language, task)
        self.prompt = torch.tensor(self.prompt_ids, dtype=torch.long)
        eos = gc.eos_token_id if gc.eos_token_id is not None else cfg.eos_token_id
        if isinstance(eos, (list, tuple)):
            eos = eos[0]
        pad = gc.pad_token_id if gc.pad_token_id is not None else cfg.pad_token_id
        if eos is None:
            raise ModelError("the model config names no end-of-sequence token", path=str(model_dir or ""))
        self.start_id = int(self.prompt_ids[0])
        self.end_id = int(eos)
        self.pad_id = int(pad if pad is not None else eos)
        self.vocab_size = int(model.get_output_embeddings().weight.shape[0])
        unk = tokenizer.unk_token_id
        # a byte-level tokenizer whose unknown token is the end token never produces it from text
        self.unk_id = None if unk is None or unk == self.end_id else int(unk)
        self.max_source_tokens = None  # audio length is checked in seconds (max_audio_seconds)
        positions = getattr(cfg, "max_target_positions", None) or getattr(cfg, "max_position_embeddings", None)
        self.max_positions = int(positions) if positions else None
        # labels (transcript + end) a decoder of `positions` positions takes after the prompt
        self.max_target_tokens = self.max_positions - len(self.prompt_ids) + 1 if self.max_positions else None
        self.sampling_rate = int(feature_extractor.sampling_rate)
        self.max_audio_seconds = self._window_seconds()
        self.audio_folder: Path | None = None
        self._files: dict[tuple[int, ...], Path] = {}
        self._fingerprint: str | None = None

    # -------------------------------------------------------------- the decoder prompt
    def _prompt(self, language: str | None, task: str | None) -> list[int]:
        hf, gc = self.model, self.model.generation_config
        if not self.whisper:
            if language or task:
                raise OptionError(f"--language and --task apply to Whisper checkpoints, not {hf.config.model_type}")
            start = gc.decoder_start_token_id if gc.decoder_start_token_id is not None \
                else hf.config.decoder_start_token_id
            if start is None:
                raise ModelError("the model config names no decoder start token", path=str(self.model_dir or ""))
            return [int(start)]
        import copy

        g = copy.deepcopy(gc)
        g.return_timestamps = False
        multilingual = getattr(g, "is_multilingual", None)
        if (language or task) and multilingual is False:
            raise OptionError("--language and --task apply to multilingual models; this checkpoint is English-only "
                              "(its generation_config.json says is_multilingual: false)")
        try:
            hf._set_language_and_task(language=language, task=task, is_multilingual=None, generation_config=g)
        except ValueError as exc:
            raise OptionError(f"--language/--task: {str(exc).splitlines()[0]}") from None
        forced = getattr(g, "forced_decoder_ids", None) or getattr(hf.config, "forced_decoder_ids", None)
        language_given = getattr(g, "language", None) is not None or (
            forced is not None and getattr(g, "task", None) is None and forced[0][0] == 1 and forced[0][1] is not None)
        if hasattr(g, "lang_to_id") and multilingual is not False and not language_given:
            raise OptionError("a multilingual Whisper model: give --language (triage scores one fixed prompt; it does "
                              "not detect the language per clip)",
                              hint="e.g. --language en; the languages are the generation config's lang_to_id")
        frames = int(getattr(self.features, "nb_max_frames", 3000))
        try:
            init = hf._retrieve_init_tokens(None, batch_size=1, generation_config=g, config=hf.config,
                                            num_segment_frames=frames, kwargs={})
        except ValueError as exc:
            raise OptionError(f"--language/--task: {str(exc).splitlines()[0]}") from None
        prompt = [int(x) for x in init[0].tolist()]
        # generate is told the language and task the prompt holds (a prompt from the older forced_decoder_ids
        # included), so that it builds the same prompt and never detects a language of its own
        lang = {v: k for k, v in (getattr(g, "lang_to_id", None) or {}).items()}
        task = {v: k for k, v in (getattr(g, "task_to_id", None) or {}).items()}
        self._language_task = {"language": next((lang[t] for t in prompt[1:] if t in lang), None),
                               "task": next((task[t] for t in prompt[1:] if t in task), None)}
        return prompt

    def _window_seconds(self) -> float | None:
        """Longest clip the model reads: Whisper's feature window (30 s for released checkpoints), or the
        encoder's positions times its subsampling for Speech2Text."""
        fe = self.features
        if self.whisper:
            return float(fe.n_samples) / float(fe.sampling_rate)
        cfg = self.model.config
        positions = getattr(cfg, "max_source_positions", None)
        layers = getattr(cfg, "num_conv_layers", None)
        hop = getattr(fe, "hop_length", None) or 160  # Speech2Text: 10 ms frame shift at 16 kHz (from its extractor)
        win = getattr(fe, "win_length", None) or 400
        if positions and layers:
            frames = int(positions) * (2 ** int(layers))
            return ((frames - 1) * hop + win) / float(fe.sampling_rate)
        return None

    # -------------------------------------------------------------- audio sources
    def use_audio_folder(self, folder: str | Path | None) -> None:
        """Relative audio paths of the dev set start in this folder (the dev-set file's)."""
        self.audio_folder = Path(folder) if folder is not None else None

    def audio_problem(self, source: str) -> str | None:
        from triage.data.audio import audio_problem, resolve

        return audio_problem(resolve(source, self.audio_folder), self.max_audio_seconds)

    def audio_seconds(self, source: str) -> float | None:
        """The clip's duration in seconds (None when it cannot be read)."""
        from triage.data.audio import audio_info, resolve

        try:
            return audio_info(resolve(source, self.audio_folder)).seconds
        except InputError:
            return None

    def _samples(self, path: Path):
        from triage.data.audio import read_audio

        return read_audio(path, self.sampling_rate)

    def _key(self, samples) -> tuple[int, ...]:
        """The samples' sha256 written in base vocab_size (every digit a valid token id; no bit lost)."""
        from triage.data.audio import samples_digest

        number = int(samples_digest(samples), 16)
        digits = []
        for _ in range(math.ceil(256 / math.log2(self.vocab_size))):
            number, digit = divmod(number, self.vocab_size)
            digits.append(digit)
        return tuple(digits)

    # -------------------------------------------------------------- text <-> ids
    def tokenize_sources(self, texts: Sequence[str]) -> list[list[int]]:
        """One key per audio source (see the module docstring); raises InputError for unreadable audio."""
        from triage.data.audio import resolve

        out = []
        for text in texts:
            path = resolve(text, self.audio_folder)
            problem = self.audio_problem(text)
            if problem:
                raise InputError(f"audio {text.strip()!r}: {problem}", path=str(path))
            key = self._key(self._samples(path))
            self._files[key] = path
            out.append(list(key))
        return out

    def tokenize_targets(self, texts: Sequence[str]) -> list[list[int]]:
        """Target ids (no end token). Whisper writes a transcript with a leading space (its first token is
        a space-prefixed word: " Hello" is one token), while references are usually written without it:
        a Whisper target that does not start with whitespace is tokenized with that space in front, unless
        the space would come out as a token of its own (which generate never writes first: the
        begin-suppress rule). Decoded text keeps its space, so an output tokenizes back to its own ids."""
        texts = list(texts)
        ids = self._ids(texts)
        if self.whisper:
            lone = self._ids([" "])[0]
            spaced = [k for k, t in enumerate(texts) if t and not t[0].isspace()]
            if spaced:
                with_space = self._ids([" " + texts[k] for k in spaced])
                for k, row in zip(spaced, with_space, strict=True):
                    if row[: len(lone)] != lone:
                        ids[k] = row
        return ids

    def _ids(self, texts: list[str]) -> list[list[int]]:
        out = []
        for row in self.tokenizer(texts, add_special_tokens=False)["input_ids"] if texts else []:
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
            h = hashlib.sha256()
            if self.model_dir is not None:
                h.update(model_fingerprint(self.model_dir, SPEECH_FINGERPRINT_FILES).encode())
            else:
                for k, v in sorted(self.model.state_dict().items()):
                    h.update(k.encode())
                    h.update(v.detach().cpu().contiguous().numpy().tobytes())
                h.update(repr(sorted(self.features.to_dict().items())).encode())
            h.update(("prompt=" + ",".join(map(str, self.prompt_ids))).encode())
            self._fingerprint = h.hexdigest()
        return self._fingerprint

    # -------------------------------------------------------------- what the checkpoint says
    @property
    def default_settings(self) -> DecoderSettings:
        """The generation config's settings; Whisper's length limit as its generate computes it (the
        prompt counts towards max_length, capped at the decoder's positions)."""
        origin = f"generation_config.json of {self.model_dir}" if self.model_dir else "generation_config"
        gc = self.model.generation_config
        s = DecoderSettings.from_generation_config(gc, origin=origin)
        if self.whisper and gc.max_new_tokens is None and self.max_positions:
            p = len(self.prompt_ids)
            most = min((gc.max_length or self.max_positions) + p, self.max_positions)
            s = s.replace(max_new_tokens=most - p, max_length=None)
        return s

    def describe(self) -> dict[str, Any]:
        info: dict[str, Any] = {}
        if self.model_dir is not None:
            info["path"] = str(self.model_dir)
        info["architecture"] = type(self.model).__name__
        info["parameters"] = int(sum(p.numel() for p in self.model.parameters()))
        info["tokenizer"] = type(self.tokenizer).__name__
        info["vocab"] = len(self.tokenizer)
        info["feature_extractor"] = f"{type(self.features).__name__}, {self.sampling_rate} Hz"
        if self.max_audio_seconds is not None:
            info["longest_clip_s"] = self.max_audio_seconds
        info["decoder_prompt"] = " ".join(self.token_strings(self.prompt_ids))
        return info

    # -------------------------------------------------------------- the checkpoint's own decoder
    def _check_limit(self, settings: DecoderSettings) -> None:
        if self.max_positions is not None and settings.limit_new_tokens() + len(self.prompt_ids) > self.max_positions:
            raise OptionError(f"the length limit ({settings.limit_new_tokens()} new tokens) and the decoder prompt "
                              f"({len(self.prompt_ids)} tokens) exceed the decoder's {self.max_positions} positions",
                              hint=f"give --max-new-tokens {self.max_positions - len(self.prompt_ids)} or less")

    def _generation_config(self, settings: DecoderSettings):
        gc = settings.to_generation_config(self.model.generation_config)
        if self.whisper:
            gc.return_timestamps = False
            gc.forced_decoder_ids = None
            if self._language_task.get("language") is not None:
                gc.language = self._language_task["language"]
            if self._language_task.get("task") is not None:
                gc.task = self._language_task["task"]
        return gc

    def logits_processors(self, settings: DecoderSettings, source_ids: torch.Tensor | None = None) -> Any:
        """The processors generate applies for these settings, each seeing the prompt in front."""
        from transformers import LogitsProcessorList

        hf = self.model
        if settings.penalty == "gnmt":
            settings = settings.replace(penalty="none")
        gc = self._generation_config(settings)
        p = len(self.prompt_ids)
        gc.max_length = settings.limit_new_tokens() + p
        gc.max_new_tokens = None
        custom = LogitsProcessorList()
        if self.whisper:
            gc.no_speech_threshold = None
            custom = LogitsProcessorList(hf._retrieve_logit_processors(gc, None, begin_index=p,
                                                                       num_beams=settings.beam, device="cpu") or [])
        hf._prepare_special_tokens(gc, True, device="cpu")
        procs = hf._get_logits_processor(
            generation_config=gc, input_ids_seq_length=p, encoder_input_ids=None, prefix_allowed_tokens_fn=None,
            logits_processor=custom, device="cpu", model_kwargs={},
        )
        return LogitsProcessorList(PromptedProcessor(x, self.prompt) for x in procs)

    def decodes(self, settings: DecoderSettings) -> bool:
        return settings.penalty != "gnmt"

    @torch.inference_mode()
    def generate(self, settings: DecoderSettings, sources: Sequence[Sequence[int]], *, batch_size: int = 16,
                 progress: Callable[[int], None] | None = None) -> list[Generated]:
        """transformers' generate (Whisper's own) in batches; results in input order."""
        self._check_limit(settings)
        if not self.whisper:
            batch_size = 1  # unpadded clips, as encode sees them (see encode)
        results: list[Generated] = []
        for start in range(0, len(sources), batch_size):
            chunk = sources[start : start + batch_size]
            feats = self._features(chunk)
            gc = self._generation_config(settings)
            gc.return_dict_in_generate = True
            gc.output_scores = True
            gc.output_logits = settings.beam == 1
            kw: dict[str, Any] = {"generation_config": gc}
            if self.whisper:
                out = self.model.generate(input_features=feats["input_features"], **kw)
            else:
                out = self.model.generate(**feats, **kw)
            seqs = out.sequences
            p = len(self.prompt_ids)
            if seqs.shape[1] >= p and bool((seqs[:, :p] == self.prompt.to(seqs.device)).all()):
                seqs = seqs[:, p:]  # Whisper's generate returns the whole prompt in front
            else:
                seqs = seqs[:, 1:]  # the decoder start token only
            if settings.beam > 1:
                scores = out.sequences_scores.tolist()
            else:
                # greedy search applies the rules to the raw logits and picks the largest; its objective is the
                # sum of log_softmax of the raw logits at the picked tokens (the rules only ban tokens here)
                logp = torch.log_softmax(torch.stack(out.logits, dim=1).float(), dim=-1)
                trans = logp.gather(-1, seqs[:, : logp.shape[1]].unsqueeze(-1)).squeeze(-1)
                scores = None
            for k in range(len(chunk)):
                row = seqs[k].tolist()
                finished = self.end_id in row
                toks = row[: row.index(self.end_id)] if finished else row
                if scores is not None:
                    score = float(scores[k])
                else:
                    n = len(toks) + (1 if finished else 0)
                    score = float(trans[k, :n].sum())
                results.append(Generated(toks, score, finished))
            if progress:
                progress(len(chunk))
        return results

    # -------------------------------------------------------------- tensors
    def _features(self, sources: Sequence[Sequence[int]]) -> dict[str, torch.Tensor]:
        arrays = []
        for src in sources:
            key = tuple(int(x) for x in src)
            path = self._files.get(key)
            if path is None:
                raise InputError("an audio source this model did not read (tokenize_sources gives the keys)")
            samples = self._samples(path)
            if self._key(samples) != key:
                raise InputError("the audio file changed while triage was running", path=str(path))
            arrays.append(samples)
        kw: dict[str, Any] = {"sampling_rate": self.sampling_rate, "return_tensors": "pt"}
        if not self.whisper:
            kw.update(padding=True, return_attention_mask=True)
        feats = self.features(arrays, **kw)
        out = {"input_features": feats["input_features"].to(self.device, torch.float32)}
        if "attention_mask" in feats and not self.whisper:
            out["attention_mask"] = feats["attention_mask"].to(self.device)
        return out

    @torch.inference_mode()
    def encode(self, sources: Sequence[Sequence[int]]) -> dict[str, torch.Tensor]:
        feats = self._features(sources)
        enc = self.model.get_encoder()
        if self.whisper:
            hidden = enc(input_features=feats["input_features"]).last_hidden_state
            mask = torch.ones(hidden.shape[:2], dtype=torch.long, device=self.device)
            return {"hidden": hidden, "mask": mask}
        # one clip at a time: the encoder's convolutions would see a shorter clip's padding frames, so a batched
        # encoding depends on its neighbours; alone, each clip's states are its own (as the model's loss sees them)
        frame_mask = feats["attention_mask"].long()
        parts = []
        for k in range(frame_mask.shape[0]):
            n = int(frame_mask[k].sum())
            parts.append(enc(input_features=feats["input_features"][k : k + 1, :n],
                             attention_mask=frame_mask[k : k + 1, :n]).last_hidden_state[0])
        hidden = torch.nn.utils.rnn.pad_sequence(parts, batch_first=True)
        # the model's forward takes the feature frames' mask and subsamples it to the encoder's positions itself
        return {"hidden": hidden, "mask": frame_mask}

    def select(self, state: dict[str, torch.Tensor], cache: Any, index: torch.Tensor) -> tuple[Any, Any]:
        index = index.to(self.device)
        new_state = {k: v.index_select(0, index) for k, v in state.items()}
        if cache is not None:
            cache.reorder_cache(index)
        return new_state, cache

    def _forward(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor, cache: Any, use_cache: bool):
        from transformers.modeling_outputs import BaseModelOutput

        kw: dict[str, Any] = {}
        if not self.whisper:
            kw["attention_mask"] = state["mask"]
        return self.model(
            encoder_outputs=BaseModelOutput(last_hidden_state=state["hidden"]),
            decoder_input_ids=decoder_inputs.to(self.device),
            cache=cache,
            use_cache=use_cache,
            **kw,
        )

    def _full_logits(self, state, decoder_inputs: torch.Tensor) -> torch.Tensor:
        """Logits [B, T, V] at the positions of `decoder_inputs` (column 0: the start token), the
        prompt run in front of them."""
        full = with_prompt(decoder_inputs, self.prompt)
        out = self._forward(state, full, None, use_cache=False)
        return out.logits[:, len(self.prompt_ids) - 1 :].float()

    @torch.inference_mode()
    def next_logprobs(self, state: dict[str, torch.Tensor], prefixes: torch.Tensor, cache: Any = None):
        if cache is not None:
            inputs = prefixes[:, -1:]
        else:
            inputs = with_prompt(prefixes, self.prompt)
        out = self._forward(state, inputs, cache, use_cache=True)
        logits = out.logits[:, -1, :].float()
        return torch.log_softmax(logits, dim=-1), out.cache

    @torch.inference_mode()
    def forced_logprobs(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor) -> torch.Tensor:
        return torch.log_softmax(self._full_logits(state, decoder_inputs), dim=-1)

    @torch.inference_mode()
    def forced_target_logprobs(self, state: dict[str, torch.Tensor], decoder_inputs: torch.Tensor,
                               targets: torch.Tensor) -> torch.Tensor:
        logp = torch.log_softmax(self._full_logits(state, decoder_inputs), dim=-1)
        return logp.gather(-1, targets.to(self.device).unsqueeze(-1)).squeeze(-1)


def is_speech_config(config: Any) -> bool:
    """Whether a transformers config belongs to a speech-to-text encoder-decoder (AutoModelForSpeechSeq2Seq)."""
    from transformers.models.auto.modeling_auto import MODEL_FOR_SPEECH_SEQ_2_SEQ_MAPPING_NAMES

    return getattr(config, "model_type", None) in MODEL_FOR_SPEECH_SEQ_2_SEQ_MAPPING_NAMES


def load_speech_model(model_dir: Path, config: Any, *, device: str = "cpu", allow_pickle: bool = False,
                      trust_remote_code: bool = False, language: str | None = None,
                      task: str | None = None) -> SpeechModel:
    """Load a local speech-to-text checkpoint: model, tokenizer and feature extractor (never downloads)."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    from transformers import AutoFeatureExtractor, AutoModelForSpeechSeq2Seq, AutoTokenizer

    _check_weights(model_dir, allow_pickle)
    if not (model_dir / "preprocessor_config.json").is_file():
        raise ModelError("no preprocessor_config.json (the feature extractor's settings) in the model directory",
                         path=str(model_dir), hint="save it with feature_extractor.save_pretrained(model_dir)")
    try:
        fe = AutoFeatureExtractor.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:
        raise ModelError(f"feature extractor unreadable: {str(exc).splitlines()[0]}", path=str(model_dir)) from exc
    try:
        tok = AutoTokenizer.from_pretrained(model_dir, local_files_only=True, trust_remote_code=trust_remote_code)
    except Exception as exc:
        raise ModelError(f"tokenizer unreadable: {str(exc).splitlines()[0]}", path=str(model_dir),
                         hint="the model directory must hold the tokenizer files saved with save_pretrained") from exc
    try:
        model = AutoModelForSpeechSeq2Seq.from_pretrained(
            model_dir, local_files_only=True, trust_remote_code=trust_remote_code, dtype=torch.float32,
            use_safetensors=not allow_pickle or None,
        )
    except Exception as exc:
        raise ModelError(f"weights cannot be loaded: {str(exc).splitlines()[0]}", path=str(model_dir)) from exc
    model.to(device)
    return SpeechModel(model, tok, fe, model_dir=model_dir, device=device, language=language, task=task)
