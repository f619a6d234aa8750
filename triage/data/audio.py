"""Audio sources: a dev set's ``source`` cell names an audio file instead of holding text.

The path is relative to the dev-set file's folder (or absolute). Files are read with
soundfile (WAV, FLAC, OGG and whatever else libsndfile reads), mixed to mono by averaging
the channels, and resampled with soxr to the rate the model's feature extractor expects.

What can be wrong with an audio source, each one line (``audio_problem``): the file is
missing, it is not a readable audio file, it holds no samples, or it is longer than the
model's input window (a Whisper model reads at most 30 s; long-form transcription is out of
scope). ``check_audio_rows`` raises the first problem of a dev-set chunk as an InputError
naming the dev-set file, the row's line and the audio path.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from triage.errors import InputError


@dataclass(frozen=True)
class AudioInfo:
    """What soundfile says about a file, without reading its samples."""

    frames: int          # samples per channel
    rate: int            # samples per second
    channels: int

    @property
    def seconds(self) -> float:
        return self.frames / self.rate if self.rate else 0.0


def resolve(source: str, base: str | Path | None) -> Path:
    """The audio file a source cell names: absolute as written, else relative to `base` (the
    dev-set file's folder; None: the current directory)."""
    p = Path(source.strip())
    if p.is_absolute() or base is None:
        return p
    return Path(base) / p


def devset_folder(devset_path: str | None) -> Path | None:
    """The folder relative audio paths start from: the dev-set file's (the first file of a
    plain-text dev set, its sources)."""
    if not devset_path:
        return None
    return Path(devset_path.split(",")[0]).parent


def audio_info(path: Path) -> AudioInfo:
    """Frames, rate and channels of an audio file (raises InputError when it cannot be read)."""
    import soundfile as sf

    try:
        info = sf.info(str(path))
    except Exception as exc:  # soundfile raises LibsndfileError / RuntimeError / TypeError
        raise InputError(_unreadable(exc), path=str(path)) from None
    return AudioInfo(int(info.frames), int(info.samplerate), int(info.channels))


def _unreadable(exc: Exception) -> str:
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return f"not a readable audio file ({text})"


def audio_problem(path: Path, max_seconds: float | None) -> str | None:
    """Why the model cannot read this audio file (None: it can)."""
    if not path.exists():
        return "audio file not found"
    if path.is_dir():
        return "is a folder, not an audio file"
    try:
        info = audio_info(path)
    except InputError as exc:
        return exc.message
    if info.frames <= 0:
        return "the audio file holds no samples"
    if max_seconds is not None and info.seconds > max_seconds + 1e-9:
        return (f"the clip is {info.seconds:.2f} s long, the model reads at most {max_seconds:g} s "
                "(long-form transcription is not supported: cut the clip)")
    return None


def read_audio(path: Path, rate: int) -> np.ndarray:
    """The file's samples as float32 mono at `rate` samples per second.

    Channels are averaged; soxr resamples (its default quality, "HQ") when the file's rate
    differs. Raises InputError when the file cannot be read or holds no samples.
    """
    import soundfile as sf
    import soxr

    try:
        data, file_rate = sf.read(str(path), dtype="float32", always_2d=True)
    except Exception as exc:
        raise InputError(_unreadable(exc), path=str(path)) from None
    if data.shape[0] == 0:
        raise InputError("the audio file holds no samples", path=str(path))
    mono = data.mean(axis=1, dtype=np.float32) if data.shape[1] > 1 else data[:, 0]
    if int(file_rate) != int(rate):
        mono = soxr.resample(mono, int(file_rate), int(rate))
    return np.ascontiguousarray(mono, dtype=np.float32)


def samples_digest(samples: np.ndarray) -> str:
    """sha256 of float32 samples (what a score-cache key of an audio source is made from)."""
    return hashlib.sha256(np.ascontiguousarray(samples, dtype=np.float32).tobytes()).hexdigest()


def check_audio_rows(sources: Sequence[str], lines: Sequence[int], base: Path | None, max_seconds: float | None,
                     devset_name: str) -> None:
    """Raise an InputError (dev-set file, line, the audio path, what is wrong) for the first
    source of a chunk whose audio the model cannot read."""
    for source, line in zip(sources, lines, strict=True):
        path = resolve(source, base)
        problem = audio_problem(path, max_seconds)
        if problem:
            raise InputError(f"audio {source.strip()!r} ({path}): {problem}", path=devset_name, line=int(line),
                             hint="every source must name a readable audio file, relative to the dev-set file")
