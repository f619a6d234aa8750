"""Audio sources: reading, mixing to mono, resampling, and what is wrong with a bad file.

Outside references: soundfile (the samples it reads), soxr.resample called directly, numpy's mean
over channels.
"""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
import soxr
from tinyspeech import tone, write_tone

from triage.data.audio import audio_info, audio_problem, check_audio_rows, read_audio, resolve
from triage.errors import InputError


@pytest.mark.parametrize("rate", [8000, 16000, 44100])
@pytest.mark.parametrize("channels", [1, 2])
@pytest.mark.parametrize("ext", ["wav", "flac", "ogg"])
def test_read_audio_is_soundfile_then_mean_then_soxr(tmp_path, rate, channels, ext):
    path = write_tone(tmp_path / f"t.{ext}", 0.75, rate, channels, seed=rate + channels)
    raw, file_rate = sf.read(str(path), dtype="float32", always_2d=True)  # soundfile itself
    assert file_rate == rate and raw.shape[1] == channels
    mono = raw.mean(axis=1, dtype=np.float32)
    expected = mono if rate == 16000 else soxr.resample(mono, rate, 16000)  # soxr called directly
    got = read_audio(path, 16000)
    assert got.dtype == np.float32
    np.testing.assert_array_equal(got, expected)
    assert len(got) == pytest.approx(0.75 * 16000, abs=2)
    assert audio_info(path).seconds == pytest.approx(0.75, abs=1e-3)


def test_relative_paths_start_at_the_dev_set_folder(tmp_path):
    assert resolve("clips/a.wav", tmp_path) == tmp_path / "clips" / "a.wav"
    assert resolve(str(tmp_path / "b.wav"), "/elsewhere") == tmp_path / "b.wav"
    assert resolve(" a.wav ", None).name == "a.wav"


def test_each_bad_audio_case_gets_its_line(tmp_path):
    write_tone(tmp_path / "ok.wav", 1.0)
    write_tone(tmp_path / "long.wav", 2.5, 8000, 2)
    sf.write(str(tmp_path / "empty.wav"), np.zeros((0, 1), np.float32), 16000)
    (tmp_path / "text.wav").write_text("not audio at all\n")
    (tmp_path / "folder.wav").mkdir()
    assert audio_problem(tmp_path / "ok.wav", 2.0) is None
    assert audio_problem(tmp_path / "missing.wav", 2.0) == "audio file not found"
    assert audio_problem(tmp_path / "empty.wav", 2.0) == "the audio file holds no samples"
    assert audio_problem(tmp_path / "text.wav", 2.0).startswith("not a readable audio file")
    assert audio_problem(tmp_path / "folder.wav", 2.0) == "is a folder, not an audio file"
    assert audio_problem(tmp_path / "long.wav", 2.0).startswith("the clip is 2.50 s long, the model reads at most 2 s")
    assert audio_problem(tmp_path / "long.wav", None) is None
    for name, what in [("missing.wav", "audio file not found"), ("empty.wav", "holds no samples"),
                       ("text.wav", "not a readable audio file"), ("long.wav", "2.50 s long")]:
        with pytest.raises(InputError) as err:
            check_audio_rows(["ok.wav", name], [2, 3], tmp_path, 2.0, "dev.tsv")
        line = err.value.one_line()
        assert line.startswith(f"dev.tsv:3: audio '{name}' ({tmp_path / name}): ")
        assert what in line and "\n" not in line
    with pytest.raises(InputError, match="holds no samples"):
        read_audio(tmp_path / "empty.wav", 16000)


def test_tone_has_the_asked_length():
    assert tone(0.5, 44100, 2).shape == (22050, 2)
