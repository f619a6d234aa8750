"""What a user meets at the command line when the dev set, the model or the options are wrong:
exit code 2 and one line on stderr naming the file and the problem, never a traceback.

The dev-set cases come from tests/bad_inputs/EXPECTED.tsv (file, expected substring, line);
the model cases are built here in temporary folders.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from triage.cli import main

HERE = Path(__file__).parent / "bad_inputs"
ROOT = Path(__file__).resolve().parent.parent


def _cases() -> list[dict[str, str]]:
    with open(HERE / "EXPECTED.tsv", encoding="utf-8", newline="") as f:
        return [r for r in csv.DictReader(f, delimiter="\t", quoting=csv.QUOTE_NONE)
                if r["file"] not in ("EXPECTED.tsv", ".gitattributes")]


CASES = _cases()
GOOD_TSV = "id\tsource\treference\toutput\n1\tthe train\tthe bus\tthe train\n2\tone two\tone two\tone\n"


def _run(capsys, *args: str) -> tuple[int, str, str]:
    capsys.readouterr()  # drop what building the test's model printed
    rc = main(["run", *args, "--quiet"])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def _one_error_line(err: str) -> str:
    assert "Traceback" not in err
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("triage: error: ")
    return lines[0]


@pytest.fixture
def good_tsv(tmp_path) -> Path:
    p = tmp_path / "dev.tsv"
    p.write_text(GOOD_TSV, encoding="utf-8")
    return p


# ----------------------------------------------------------------------------- dev sets
def test_every_bad_file_is_listed():
    on_disk = sorted(p.name for p in HERE.iterdir() if p.name not in ("EXPECTED.tsv", ".gitattributes"))
    assert sorted(c["file"] for c in CASES) == on_disk


@pytest.mark.parametrize("case", CASES, ids=[c["file"] for c in CASES])
def test_bad_dev_set_exit_2_one_line(case, capsys, tmp_path, tiny_model_dir):
    path = HERE / case["file"]
    out = tmp_path / "out"
    rc, stdout, err = _run(capsys, "--model", str(tiny_model_dir), "--data", str(path), "--out", str(out))
    assert rc == 2
    line = _one_error_line(err)
    assert case["expect"] in line
    assert str(path) in line  # names the file
    if case["line"]:
        assert f"{path}:{case['line']}:" in line
    assert stdout == ""
    assert not out.exists()  # nothing written for a refused dev set


def test_exit_code_2_from_the_shell(tmp_path, tiny_model_dir):
    path = HERE / "ragged_row.tsv"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-m", "triage", "run", "--model", str(tiny_model_dir), "--data",
                           str(path), "--out", str(tmp_path / "out"), "--quiet"],
                          capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and str(path) in lines[0] and "row has 3 cells but the header has 4" in lines[0]


# ----------------------------------------------------------------------------- models
def _copy_model(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def test_model_directory_missing(capsys, tmp_path, good_tsv):
    missing = tmp_path / "no-such-model"
    rc, _, err = _run(capsys, "--model", str(missing), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert str(missing) in line and "not found" in line


def test_decoder_only_model_without_tokenizer_refused(capsys, tmp_path, good_tsv):
    from transformers import GPT2Config, GPT2LMHeadModel

    torch.manual_seed(0)
    d = tmp_path / "gpt2"
    GPT2LMHeadModel(GPT2Config(n_embd=16, n_layer=1, n_head=2, vocab_size=40, n_positions=32,
                                bos_token_id=1, eos_token_id=1)).save_pretrained(d)
    rc, _, err = _run(capsys, "--model", str(d), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert "tokenizer" in line and "save_pretrained" in line and str(d) in line


def test_model_neither_encoder_decoder_nor_decoder_only_refused(capsys, tmp_path, good_tsv):
    from transformers import ViTConfig

    d = tmp_path / "vit"
    ViTConfig(hidden_size=16, num_hidden_layers=1, num_attention_heads=2, intermediate_size=32).save_pretrained(d)
    rc, _, err = _run(capsys, "--model", str(d), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert "neither an encoder-decoder nor a decoder-only" in line and "vit" in line and str(d) in line


def test_tokenizer_files_missing(capsys, tmp_path, good_tsv, tiny_model_dir):
    d = _copy_model(tiny_model_dir, tmp_path / "m")
    for f in d.iterdir():
        if f.name.startswith(("tokenizer", "special_tokens")):
            f.unlink()
    rc, _, err = _run(capsys, "--model", str(d), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert "no tokenizer files in the model directory" in line and str(d) in line


def test_vocabulary_mismatch(capsys, tmp_path, good_tsv):
    from tinymodels import make_tokenizer, save_marian

    d = save_marian(tmp_path / "small-vocab", seed=0, vocab_size=20)
    n_tok = len(make_tokenizer())
    assert n_tok > 20
    rc, _, err = _run(capsys, "--model", str(d), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert "vocabulary mismatch" in line and f"{n_tok} tokens" in line and "20" in line


@pytest.fixture
def pickle_model(tmp_path, tiny_model_dir) -> Path:
    """The tiny model with its weights as a torch pickle (pytorch_model.bin) instead of safetensors."""
    from safetensors.torch import load_file

    d = _copy_model(tiny_model_dir, tmp_path / "pickled")
    state = load_file(d / "model.safetensors")
    (d / "model.safetensors").unlink()
    torch.save(state, d / "pytorch_model.bin")
    return d


def test_pickle_weights_refused_by_default(capsys, tmp_path, good_tsv, pickle_model):
    rc, _, err = _run(capsys, "--model", str(pickle_model), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert "pickle" in line and "pytorch_model.bin" in line and "--allow-pickle" in line
    assert not (tmp_path / "o").exists()


def test_pickle_weights_load_with_allow_pickle(capsys, tmp_path, good_tsv, pickle_model, tiny_model_dir):
    rc, _, _ = _run(capsys, "--model", str(pickle_model), "--data", str(good_tsv), "--out", str(tmp_path / "p"),
                    "--allow-pickle", "--no-cache")
    assert rc == 0
    rc, _, _ = _run(capsys, "--model", str(tiny_model_dir), "--data", str(good_tsv), "--out", str(tmp_path / "s"),
                    "--no-cache")
    assert rc == 0
    # the same weights give the same verdicts and scores whichever file format holds them
    assert (tmp_path / "p" / "verdicts.csv").read_bytes() == (tmp_path / "s" / "verdicts.csv").read_bytes()


def _remote_code_model(tmp_path: Path, tiny_model_dir: Path) -> tuple[Path, Path]:
    """A checkpoint whose config asks for its own Python code; importing that code leaves a marker file."""
    d = _copy_model(tiny_model_dir, tmp_path / "remote")
    marker = tmp_path / "remote-code-ran"
    (d / "custom_code.py").write_text(
        "from pathlib import Path\n"
        f"Path({str(marker)!r}).write_text('ran')\n"
        "from transformers import MarianConfig\n"
        "class CustomConfig(MarianConfig):\n"
        "    model_type = 'custom-marian'\n", encoding="utf-8")
    cfg = json.loads((d / "config.json").read_text())
    cfg["auto_map"] = {"AutoConfig": "custom_code.CustomConfig"}
    cfg["model_type"] = "custom-marian"
    (d / "config.json").write_text(json.dumps(cfg), encoding="utf-8")
    return d, marker


def test_checkpoint_code_not_run_by_default(capsys, tmp_path, good_tsv, tiny_model_dir):
    d, marker = _remote_code_model(tmp_path, tiny_model_dir)
    rc, _, err = _run(capsys, "--model", str(d), "--data", str(good_tsv), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert str(d) in line
    assert not marker.exists()  # the checkpoint's own code never ran


def test_trust_remote_code_passed_only_with_the_flag(monkeypatch, tiny_model_dir):
    import transformers

    from triage.models.transformers_backend import load_transformers_model

    seen = []
    real = transformers.AutoConfig.from_pretrained.__func__

    def spy(cls, *args, **kw):
        seen.append(kw.get("trust_remote_code"))
        return real(cls, *args, **kw)

    monkeypatch.setattr(transformers.AutoConfig, "from_pretrained", classmethod(spy))
    load_transformers_model(str(tiny_model_dir))
    default = list(seen)
    seen.clear()
    load_transformers_model(str(tiny_model_dir), trust_remote_code=True)
    assert default and not any(default)  # every config read asked for no remote code
    assert seen[0] is True


# ----------------------------------------------------------------------------- options
@pytest.mark.parametrize("args, expect", [
    (["--beam", "0"], "--beam must be at least 1"),
    (["--buckets", "1,x,5"], "bucket edges must be integers"),
    (["--buckets", "10,5"], "bucket edges must be increasing"),
    (["--beam", "4", "--widen", "2,8"], "not wider than the current width 4"),
    (["--widen", "x1"], "not wider than the current width"),
    (["--column", "nonsense"], "--column expects OURS=THEIRS"),
])
def test_bad_options_exit_2(args, expect, capsys, tmp_path, good_tsv, tiny_model_dir):
    out = tmp_path / "o"
    rc, stdout, err = _run(capsys, "--model", str(tiny_model_dir), "--data", str(good_tsv), "--out", str(out), *args)
    assert rc == 2
    line = _one_error_line(err)
    assert expect in line
    assert not out.exists()  # refused before anything was scored or written


def test_plain_text_files_of_different_lengths(capsys, tmp_path, tiny_model_dir):
    src = tmp_path / "src.txt"
    ref = tmp_path / "ref.txt"
    hyp = tmp_path / "hyp.txt"
    src.write_text("the train\none two\nthree four\n", encoding="utf-8")
    ref.write_text("the bus\none two\nthree four\n", encoding="utf-8")
    hyp.write_text("the train\none\n", encoding="utf-8")
    rc, _, err = _run(capsys, "--model", str(tiny_model_dir), "--source", str(src), "--reference", str(ref),
                      "--output", str(hyp), "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert str(hyp) in line
    assert "2" in line and "3" in line  # says how many lines each has


# ----------------------------------------------------------------------------- rows that cannot be scored
@pytest.fixture(scope="module")
def short_model_dir(tmp_path_factory):
    """The tiny model with room for 16 positions only."""
    from tinymodels import save_marian

    return save_marian(tmp_path_factory.mktemp("short") / "model", seed=0, num_beams=2, max_new_tokens=40,
                       max_positions=16)


LONG = " ".join(["one two three four"] * 5)  # 20 words + end token = 21 tokens > 16 positions
SKIP_ROWS = [
    # id, source, reference, output, expected reason (substring)
    ("long-ref", "the train", LONG, "the bus", "reference: target has 21 tokens, the model takes at most 16"),
    ("long-src", LONG, "the bus", "the train", "source: 21 tokens, the model takes at most 16"),
    ("unk-ref", "the train", "the zebra", "the bus", "reference: unknown to the tokenizer: 'zebra'"),
    ("unk-out", "the train", "the bus", "the qüx train", "output: unknown to the tokenizer: 'qüx'"),
    ("special-src", "</s>", "the bus", "the train", "source: no tokens after tokenization apart from special"),
    ("special-ref", "the train", "</s>", "the bus", "reference: no tokens after tokenization apart from special"),
    ("eos-inside", "the train", "the </s> bus", "the train", "reference: holds special tokens"),
]


def test_unscorable_rows_are_skipped_with_their_reason(capsys, tmp_path, short_model_dir):
    import pandas as pd

    dev = tmp_path / "dev.tsv"
    rows = SKIP_ROWS + [("fine", "the train", "the bus", "the train", None), ("empty-out", "one", "two", "", None)]
    dev.write_text("id\tsource\treference\toutput\n" + "".join("\t".join(r[:4]) + "\n" for r in rows),
                   encoding="utf-8")
    out = tmp_path / "o"
    rc, stdout, _ = _run(capsys, "--model", str(short_model_dir), "--data", str(dev), "--out", str(out), "--no-cache")
    assert rc == 0
    v = pd.read_csv(out / "verdicts.csv", keep_default_na=False)
    assert v["id"].tolist() == [r[0] for r in rows]  # every row kept, in order
    for (rid, *_, expect), (_, got) in zip(rows, v.iterrows(), strict=True):
        if expect is None:
            assert got["verdict"] in ("search", "model", "tie"), rid
        else:
            assert got["verdict"] == "skipped", rid
            assert expect in got["reason"], (rid, got["reason"])
    summary = json.loads((out / "summary.json").read_text())
    assert summary["counts"]["skipped"] == len(SKIP_ROWS)
    assert sum(k["count"] for k in summary["skipped_reasons"].values()) == len(SKIP_ROWS)
    assert set(summary["skipped_reasons"]) == set(v.loc[v["verdict"] == "skipped", "reason_code"])
    # an empty output is what a decoder that ends at once writes: scored as the end token alone
    empty = v[v["id"] == "empty-out"].iloc[0]
    assert int(empty["out_len"]) == 1


# ----------------------------------------------------------------------------- settings the outputs cannot come from
def _long_outputs(tmp_path, n: int, long_rows: set[int]) -> Path:
    from tinymodels import sentences

    src, ref = sentences(n, seed=71), sentences(n, seed=72, lo=2, hi=5)
    p = tmp_path / "dev.tsv"
    with open(p, "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\toutput\n")
        for i in range(n):
            out = " ".join(["platform"] * 12) if i in long_rows else "the bus"
            f.write(f"r{i}\t{src[i]}\t{ref[i]}\t{out}\n")
    return p


def test_outputs_longer_than_the_length_limit_are_refused(capsys, tmp_path, tiny_model_dir):
    # 12 words + end token is more than --max-new-tokens 6 lets the decoder write (transformers' max_new_tokens
    # counts generated tokens, end token included): such outputs cannot come from the decoder at these settings
    dev = _long_outputs(tmp_path, 6, long_rows={1, 2, 3, 4})
    out = tmp_path / "o"
    rc, stdout, err = _run(capsys, "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(out),
                           "--max-new-tokens", "6", "--no-cache")
    assert rc == 2
    line = _one_error_line(err)
    assert f"{dev}:3:" in line  # the first such row is on line 3 (row r1)
    assert "4 of 6 failed outputs cannot come from the decoder at these settings" in line
    assert "length limit (4)" in line and "--max-new-tokens" in line
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["outputs_not_from_these_settings"] == {"rows": 4, "of_failed": 6, "rules": {"length limit": 4},
                                                          "first_line": 3}
    assert summary["recommendation"]["action"] == "inconclusive"
    assert summary["counts"]["skipped"] == 4


def test_a_few_outputs_the_decoder_cannot_write_give_a_warning(capsys, tmp_path, tiny_model_dir):
    dev = _long_outputs(tmp_path, 6, long_rows={4})
    rc, stdout, err = _run(capsys, "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(tmp_path / "o"),
                           "--max-new-tokens", "6", "--no-cache")
    assert rc == 0
    assert any(line.startswith("triage: warning: 1 failed output cannot come from the decoder at these settings "
                               "(first on line 6)") for line in err.splitlines())


def test_output_folder_that_cannot_be_made(capsys, tmp_path, good_tsv, tiny_model_dir):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n", encoding="utf-8")
    rc, _, err = _run(capsys, "--model", str(tiny_model_dir), "--data", str(good_tsv), "--out", str(blocker / "run"))
    assert rc == 2
    line = _one_error_line(err)
    assert str(blocker / "run") in line and f"cannot make the folder, {blocker} is a file" in line


def test_tokenizer_that_needs_no_files_still_loads(tmp_path):
    # transformers builds a byte-level tokenizer (ByT5Tokenizer) from config.json alone: no tokenizer file is
    # needed, so the "no tokenizer files" message must only explain a tokenizer that failed to load
    from transformers import T5Config, T5ForConditionalGeneration

    from triage.models.loading import load_model

    torch.manual_seed(0)
    cfg = T5Config(vocab_size=384, d_model=16, d_ff=32, num_layers=1, num_heads=2, d_kv=8, decoder_start_token_id=0,
                   pad_token_id=0, eos_token_id=1, tokenizer_class="ByT5Tokenizer")
    T5ForConditionalGeneration(cfg).save_pretrained(tmp_path / "byt5")
    model = load_model(str(tmp_path / "byt5"))
    # ByT5 maps each UTF-8 byte b to id b + 3 (3 special tokens first; from memory), the end token is appended by the scorer
    assert model.tokenize_targets(["abc"]) == [[ord("a") + 3, ord("b") + 3, ord("c") + 3]]
