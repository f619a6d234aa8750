"""An audio dev set through the whole run: verdicts, WER/CER, the page, the command line's errors.

Outside references: jiwer's wer/cer (the corpus error rate in summary.json), transformers' generate (the
outputs triage decodes), soundfile (the clips' durations). Audio: tones synthesized here.
"""

from __future__ import annotations

import csv
import json
import re
import tempfile
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tinyspeech import make_whisper_dir, write_tone

from triage.cli import main

RATES = (8000, 16000, 44100)
REFS = ["the train is late", "Platform four, please.", "north", "one two three", "stop", "a bus"]


@pytest.fixture(scope="module")
def whisper_dir(tmp_path_factory):
    return make_whisper_dir(tmp_path_factory.mktemp("whisper") / "model", seed=0, eos_bias=0.9, num_beams=2,
                            max_new_tokens=30)


def _devset(folder: Path, n: int, outputs: list[str] | None = None, *, sub: str = "clips") -> Path:
    (folder / sub).mkdir(parents=True, exist_ok=True)
    rows = []
    for k in range(n):
        clip = write_tone(folder / sub / f"row{k}.wav", 0.25 + 0.15 * k, RATES[k % 3], 1 + k % 2, freq=180 + 40 * k,
                          seed=k)
        rows.append({"id": f"r{k}", "source": f"{sub}/{clip.name}", "reference": REFS[k % len(REFS)]})
        if outputs is not None:
            rows[-1]["output"] = outputs[k]
    path = folder / "dev.tsv"
    with open(path, "w", encoding="utf-8", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]), delimiter="\t")
        w.writeheader()
        w.writerows(rows)
    return path


def _verdicts(out: Path) -> list[dict[str, str]]:
    with open(out / "verdicts.csv", encoding="utf-8", newline="") as f:
        return list(csv.DictReader(f))


def _run(capsys, *args) -> tuple[int, str, str]:
    capsys.readouterr()
    rc = main(["run", *map(str, args), "--quiet"])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def test_an_audio_dev_set_decoded_and_triaged_with_wer(whisper_dir, tmp_path, capsys):
    import jiwer

    dev = _devset(tmp_path / "data", 6)
    out = tmp_path / "run"
    rc, stdout, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out, "--metric", "wer",
                           "--normalize", "basic")
    assert rc == 0, err
    rows = _verdicts(out)
    assert [r["id"] for r in rows] == [f"r{k}" for k in range(6)]
    assert [r["source"] for r in rows] == [f"clips/row{k}.wav" for k in range(6)]
    for k, r in enumerate(rows):  # soundfile's duration of the file itself
        info = sf.info(str(tmp_path / "data" / "clips" / f"row{k}.wav"))
        assert float(r["audio_seconds"]) == pytest.approx(info.frames / info.samplerate, abs=1e-3)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["options"]["metric"] == "wer" and summary["options"]["normalize"] == "basic"
    norm = jiwer.Compose([jiwer.ToLowerCase(), jiwer.RemovePunctuation(), jiwer.RemoveMultipleSpaces(),
                          jiwer.Strip()])
    refs = [norm(r["reference"]) for r in rows]
    outs = [norm(r["output"]) for r in rows]
    assert summary["corpus_metric"]["score"] == pytest.approx(100 * jiwer.wer(refs, outs))  # jiwer's corpus WER
    assert [float(r["wer"]) for r in rows] == [pytest.approx(100 * jiwer.wer(a, b)) for a, b in zip(refs, outs,
                                                                                                    strict=True)]
    assert "fail=differs(basic)" in summary["signature"]
    assert summary["model"]["decoder_prompt"] == "<|startoftranscript|> <|en|> <|transcribe|> <|notimestamps|>"
    assert summary["counts"]["correct"] + summary["failed"] == 6
    html = (out / "report.html").read_text()
    for r in rows:
        if r["verdict"] != "correct":
            name = r["source"].split("/")[-1]
            assert f"{name} · audio, {float(r['audio_seconds']):.2f} s" in html
    # self-contained: no audio embedded, nothing that leaves the page
    assert "<audio" not in html and "clips/" not in html
    assert not re.search(r"""(?:href|src)\s*=\s*["'](?!#|data:)""", html)


def test_accept_at_reads_both_ways_and_below_stays_its_alias(whisper_dir, tmp_path, capsys):
    outputs = ["the train is lat", "platform four please", "south", "one two three four five", "stop", "a bus"]
    dev = _devset(tmp_path / "data", 6, outputs)
    got = {}
    for flag in ("--accept-at", "--below"):
        out = tmp_path / flag.strip("-")
        rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out, "--metric", "wer",
                          flag, "30", "--no-cache")
        assert rc == 0, err
        got[flag] = [(r["verdict"], r["wer"]) for r in _verdicts(out)]
        summary = json.loads((out / "summary.json").read_text())
        assert "fail=differs,wer>30.0" in summary["signature"]
    assert got["--accept-at"] == got["--below"]
    correct = [float(w) <= 30 for v, w in got["--accept-at"] if v == "correct"]
    assert all(correct) and len(correct) >= 2  # "stop", "a bus" (equal) and "the train is lat" (25% WER)
    failed = [float(w) for v, w in got["--accept-at"] if v != "correct"]
    assert failed and all(w > 30 for w in failed)
    # with chrF, higher is better: a row counts as correct at chrF >= X
    out = tmp_path / "chrf"
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out, "--accept-at", "60", "--no-cache")
    assert rc == 0, err
    for r in _verdicts(out):
        if r["verdict"] == "correct" and r["output"] != r["reference"]:
            assert float(r["chrf"]) >= 60
        elif r["verdict"] != "correct":
            assert float(r["chrf"]) < 60


BAD = {
    "missing": (lambda p: None, "audio file not found"),
    "empty": (lambda p: sf.write(str(p), np.zeros((0, 1), np.float32), 16000), "the audio file holds no samples"),
    "unreadable": (lambda p: p.write_bytes(b"RIFF....WAVEfmt not really"), "not a readable audio file"),
    "too long": (lambda p: write_tone(p, 2.5, 8000), "the clip is 2.50 s long, the model reads at most 2 s"),
}


@pytest.mark.parametrize("case", list(BAD))
def test_each_bad_clip_is_one_line_and_exit_2(whisper_dir, tmp_path, capsys, case):
    dev = _devset(tmp_path / "data", 3, ["a", "b", "c"])
    make, what = BAD[case]
    bad = tmp_path / "data" / "clips" / "row1.wav"
    bad.unlink()
    make(bad)
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", tmp_path / "run")
    assert rc == 2
    assert "Traceback" not in err
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"triage: error: {dev}:3: audio 'clips/row1.wav' ({bad}): {what}")
    assert not (tmp_path / "run" / "verdicts.csv").exists()  # checked up front: nothing scored, nothing written


def test_source_buckets_do_not_apply_to_audio(whisper_dir, tmp_path, capsys):
    dev = _devset(tmp_path / "data", 2, ["x", "y"])
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", tmp_path / "r", "--bucket-by",
                      "source-words")
    assert rc == 2 and err.startswith("triage: error: --bucket-by source-words does not apply to audio sources")


def test_language_and_task_flags(whisper_dir, tmp_path, capsys):
    dev = _devset(tmp_path / "data", 2, ["x", "y"])
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", tmp_path / "de", "--language", "de",
                      "--task", "translate")
    assert rc == 0, err
    summary = json.loads((tmp_path / "de" / "summary.json").read_text())
    assert summary["model"]["decoder_prompt"] == "<|startoftranscript|> <|de|> <|translate|> <|notimestamps|>"
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", tmp_path / "xx", "--language", "xx")
    assert rc == 2 and "--language/--task" in err and len(err.splitlines()) == 1


CLIP = st.tuples(st.sampled_from(RATES), st.integers(1, 2), st.floats(0.05, 1.9))
TEXT = st.text(st.sampled_from("abc de"), min_size=1, max_size=8).filter(lambda s: s.strip())


@settings(max_examples=6, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(clips=st.lists(st.tuples(CLIP, TEXT, st.one_of(st.just(""), TEXT)), min_size=1, max_size=6),
       step=st.integers(1, 3))
def test_no_audio_row_is_lost(whisper_dir, capsys, clips, step):
    """Property: whatever the clips (rate, channels, length within the window) and texts, every row comes out
    once, in order, with its clip's duration."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rows = []
        for k, ((rate, ch, secs), ref, out) in enumerate(clips):
            write_tone(folder / f"{k}.flac", secs, rate, ch, seed=k)
            rows.append((f"id{k}", f"{k}.flac", ref, out))
        dev = folder / "dev.tsv"
        with open(dev, "w", encoding="utf-8", newline="") as f:
            w = csv.writer(f, delimiter="\t")
            w.writerow(["id", "source", "reference", "output"])
            w.writerows(rows)
        rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", folder / "run", "--chunk-rows", step,
                          "--metric", "cer")
        # an empty output or one starting with a space breaks the begin-suppress rule: when most failed outputs
        # do, the run says so and exits 2, with every file written
        assert rc == 0 or (rc == 2 and "cannot come from the decoder at these settings" in err), err
        got = _verdicts(folder / "run")
        assert [(r["id"], r["source"], r["reference"], r["output"]) for r in got] == rows
        assert [float(r["audio_seconds"]) for r in got] == [pytest.approx(round(s * r) / r, abs=2e-3)
                                                            for ((r, _, s), _, _) in clips]
        assert all(r["verdict"] in ("correct", "search", "model", "tie", "blocked", "skipped") for r in got)


def test_compare_refuses_error_rate_runs_in_one_line(whisper_dir, tmp_path, capsys):
    dev = _devset(tmp_path / "data", 2, ["x", "y"])
    for name in ("a", "b"):
        rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", tmp_path / name, "--metric", "wer")
        assert rc == 0, err
    capsys.readouterr()
    rc = main(["compare", str(tmp_path / "a"), str(tmp_path / "b"), "--out", str(tmp_path / "c")])
    err = capsys.readouterr().err
    assert rc == 2 and len(err.splitlines()) == 1 and "measured with wer" in err and "Traceback" not in err


def test_sweeps_on_audio_and_an_error_rate_read_as_lower_is_better(whisper_dir, tmp_path, capsys):
    """--widen, --redecode-alpha, --where-lost and --exact re-decode audio rows (relative paths kept), the
    sweeps report corpus WER, and the decision counts a fall in WER as a gain."""
    import jiwer

    from triage.decision import Evidence, weigh
    from triage.run.summary import Action
    from triage.studies import WidenSection

    dev = _devset(tmp_path / "data", 6, ["th", "platform", "nort", "one two", "stop it", "a"])
    out = tmp_path / "run"
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out, "--beam", "1", "--metric", "wer",
                      "--widen", "2", "--redecode-alpha", "0.5", "--where-lost", "--exact", "--no-cache")
    assert rc == 0, err
    summary = json.loads((out / "summary.json").read_text())
    rows = _verdicts(out)
    assert summary["widen"]["metric"] == "wer"
    assert summary["widen"]["corpus_before"] == pytest.approx(
        100 * jiwer.wer([r["reference"] for r in rows], [r["output"] for r in rows]))
    assert summary["length_penalty"]["redecode"]
    widen = dict(summary["widen"])
    for delta, action in ((-3.0, Action.WIDEN_BEAM), (3.0, Action.INCONCLUSIVE)):
        widen["widths"] = [dict(w, corpus_delta=delta, resolved_share=1.0) for w in summary["widen"]["widths"]]
        rec = weigh(Evidence({"search": 20, "model": 5}, widen=WidenSection.from_json(widen)))
        assert rec.action == action, (delta, rec)


def test_the_score_cache_is_keyed_on_the_audio_samples(whisper_dir, tmp_path, capsys):
    """A rerun finds every failed row in the cache; a clip whose samples change is scored again (the key is
    the samples' hash, not the path)."""
    dev = _devset(tmp_path / "data", 4, ["x", "y", "z", "w"])
    out = tmp_path / "run"
    for expect_hits in (0, 4):
        rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out)
        assert rc == 0, err
        assert json.loads((out / "run.json").read_text())["cache"] == {"hits": expect_hits, "misses": 4 - expect_hits}
    write_tone(tmp_path / "data" / "clips" / "row2.wav", 0.55, 8000, 1, freq=999, seed=5)  # same path, new samples
    rc, _, err = _run(capsys, "--model", whisper_dir, "--data", dev, "--out", out)
    assert rc == 0, err
    assert json.loads((out / "run.json").read_text())["cache"] == {"hits": 3, "misses": 1}
