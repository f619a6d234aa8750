"""The decision must not outrun its evidence: coverage of the failed rows, whether the outputs come
from the stated settings, every rule breach counted, skip reasons as kinds.

The thresholds checked here are the README's table ("The recommendation rule"), written out as
numbers in this file, not read from triage.decision: fewer than 10 compared failed rows, or fewer
than half of the failed rows compared, is inconclusive; an outputs check reproducing under 50% of
its sample is inconclusive, under 90% gives a warning line.
"""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from triage.cli import main
from triage.decision import Evidence, weigh
from triage.run.summary import Action
from triage.studies.reproduce import ReproductionSection

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "sample_data" / "model"
DEVSET = ROOT / "sample_data" / "devset.tsv"


def _reproduction(checked: int, reproduced: int) -> ReproductionSection:
    return ReproductionSection(objective="beam=2", seed=0, failed=100, checked=checked, reproduced=reproduced,
                               reproduced_share=reproduced / checked)


# ----------------------------------------------------------------------------- planted cases of the rule
@pytest.mark.parametrize("counts, inconclusive", [
    ({"search": 40, "model": 9, "skipped": 51}, True),    # 49 of 100 failed rows compared: under half
    ({"search": 40, "model": 10, "skipped": 50}, False),  # exactly half compared: read
    ({"search": 7, "model": 2}, True),                    # 9 compared: under 10 rows
    ({"search": 8, "model": 2}, False),                   # 10 compared, all failed rows
    ({"search": 12, "model": 2, "blocked": 9, "skipped": 9}, True),  # 14 of 32: blocked rows are not compared
    ({"search": 3, "model": 30, "tie": 2, "blocked": 35}, False),    # 35 of 70 (ties are compared): read
])
def test_coverage_threshold(counts, inconclusive):
    r = weigh(Evidence(dict(counts)))
    assert (r.action is Action.INCONCLUSIVE) is inconclusive, r.because
    failed = sum(counts.values())
    compared = counts["search"] + counts["model"] + counts.get("tie", 0)
    if inconclusive:
        assert r.because.startswith(f"only {compared} of {failed} failed rows")
        assert r.missing
    if inconclusive and 2 * compared < failed:  # what would fix it
        assert "skipped_reasons" in r.because and "settings the outputs were decoded with" in r.because


@pytest.mark.parametrize("checked, reproduced, inconclusive", [(16, 7, True), (16, 8, False), (16, 16, False)])
def test_reproduced_share_threshold(checked, reproduced, inconclusive):
    counts = {"search": 5, "model": 45}  # model-side on its own
    r = weigh(Evidence(counts, reproduction=_reproduction(checked, reproduced)))
    if inconclusive:
        assert r.action is Action.INCONCLUSIVE
        assert "the outputs were not decoded with these settings" in r.because
        assert "give the beam width, penalty and alpha you decoded with" in r.because
    else:
        assert r.action is Action.FIX_MODEL


def test_reproduction_is_checked_before_coverage():
    r = weigh(Evidence({"search": 1, "skipped": 99}, reproduction=_reproduction(16, 0)))  # both fail
    assert "the outputs were not decoded with these settings" in r.because


# ----------------------------------------------------------------------------- the scenarios
def _cli(capsys, *args: str) -> tuple[int, str, str]:
    capsys.readouterr()
    rc = main(["run", *args, "--quiet", "--no-cache"])
    out = capsys.readouterr()
    return rc, out.out, out.err


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "run"
    assert main(["run", "--model", str(MODEL), "--data", str(DEVSET), "--out", str(out), "--quiet",
                 "--no-cache"]) == 0  # the outputs check at its default (16 rows)
    return out


def _devset() -> pd.DataFrame:
    return pd.read_csv(DEVSET, sep="\t", dtype=str, keep_default_na=False, quoting=csv.QUOTE_NONE)


def test_demo_unchanged(demo_run):
    s = json.loads((demo_run / "summary.json").read_text(encoding="utf-8"))
    v = pd.read_csv(demo_run / "verdicts.csv", dtype=str, keep_default_na=False)
    failed = int((v["verdict"] != "correct").sum())  # counted from verdicts.csv, not from the summary
    assert s["recommendation"]["action"] == "fix-model"
    assert s["coverage"] == {"failed": failed, "compared": failed, "skipped": 0, "blocked": 0, "share": 1.0}
    # the demo's outputs were decoded by the shipped decoder at its own settings: all reproduced
    assert s["reproduction"]["checked"] == 16 and s["reproduction"]["reproduced_share"] == 1.0
    html = (demo_run / "report.html").read_text(encoding="utf-8")
    lead = re.sub(r"<[^>]+>", "", html.split('<p class="lead">', 1)[1])
    assert lead.startswith(f"{failed} of {failed} failed rows (100.0%) were compared")  # its first sentence


def test_outputs_repeated_eight_times(capsys, tmp_path, demo_run):
    """Every failed output of the demo repeated 8 times: far beyond the length limit; many also
    beyond the model's positions. Every one is counted under the rule, whatever else is wrong."""
    from transformers import AutoConfig, AutoTokenizer

    v = pd.read_csv(demo_run / "verdicts.csv", dtype=str, keep_default_na=False)
    dev = _devset()
    failed = (v["verdict"] != "correct").to_numpy()
    dev.loc[failed, "output"] = [" ".join([o] * 8) for o in dev.loc[failed, "output"]]
    path = tmp_path / "rep8.tsv"
    dev.to_csv(path, sep="\t", index=False, quoting=csv.QUOTE_NONE)
    # outside count: transformers' own tokenizer (end token included); the decoder writes at most
    # max_new_tokens tokens, end token included (common practice: transformers' GenerationConfig)
    tok = AutoTokenizer.from_pretrained(str(MODEL))
    limit = json.loads((MODEL / "generation_config.json").read_text())["max_new_tokens"]
    positions = AutoConfig.from_pretrained(str(MODEL)).max_position_embeddings
    lengths = [len(tok(text_target=o)["input_ids"]) for o in dev.loc[failed, "output"]]
    over_limit = sum(n > limit for n in lengths)
    over_model = sum(n > positions for n in lengths)
    assert over_model > 0 and over_limit > over_model  # both kinds are planted

    out = tmp_path / "o"
    rc, _, err = _cli(capsys, "--model", str(MODEL), "--data", str(path), "--out", str(out), "--check-rows", "16")
    assert rc == 2 and "Traceback" not in err  # the settings mismatch: one error line, files written
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert s["recommendation"]["action"] == "inconclusive"
    assert s["outputs_not_from_these_settings"]["rows"] == over_limit  # every breach counted, model size or not
    assert s["skipped_reasons"]["rule:length-limit"]["count"] == over_limit
    assert s["skipped_reasons"]["rule:length-limit"]["sentence"]
    assert len(s["skipped_reasons"]) <= 5  # a handful of kinds, not one per length
    got = pd.read_csv(out / "verdicts.csv", dtype=str, keep_default_na=False)
    codes = got.loc[failed, "reason_code"].tolist()
    assert all(c == "rule:length-limit" for c, n in zip(codes, lengths, strict=True) if n > limit)
    both = got[got["reason"].str.contains(f"at most {positions}")]
    assert len(both) == over_model and (both["reason_code"] == "rule:length-limit").all()
    assert s["reproduction"]["reproduced_share"] < 0.5  # repeated outputs are not what the decoder writes


def test_most_rows_untokenizable(capsys, tmp_path, demo_run):
    """References of 80% of the failed rows hold a character the tokenizer does not know."""
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(str(MODEL))
    assert tok.unk_token_id in tok(text_target="\u2603")["input_ids"]  # outside check: transformers' tokenizer
    v = pd.read_csv(demo_run / "verdicts.csv", dtype=str, keep_default_na=False)
    dev = _devset()
    failed_idx = [i for i in range(len(v)) if v["verdict"].iat[i] != "correct"]
    spoiled = failed_idx[: int(0.8 * len(failed_idx))]
    dev.loc[spoiled, "reference"] = ["\u2603 " + r for r in dev.loc[spoiled, "reference"]]
    path = tmp_path / "unk.tsv"
    dev.to_csv(path, sep="\t", index=False, quoting=csv.QUOTE_NONE)
    out = tmp_path / "o"
    rc, _, err = _cli(capsys, "--model", str(MODEL), "--data", str(path), "--out", str(out))
    assert rc == 0, err
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert s["coverage"]["compared"] == len(failed_idx) - len(spoiled)
    assert s["coverage"]["skipped"] == len(spoiled)
    assert s["recommendation"]["action"] == "inconclusive"
    assert "skipped_reasons" in s["recommendation"]["because"]
    assert list(s["skipped_reasons"]) == ["reference:unknown-tokens"]
    assert s["skipped_reasons"]["reference:unknown-tokens"]["count"] == len(spoiled)


def test_outputs_check_skips_sources_longer_than_the_model():
    """A sampled row whose source is longer than the model's positions is not decoded (no error)."""
    from triage.models.describe import model_settings
    from triage.models.loading import load_model
    from triage.studies.reproduce import FailedRowSample, check_outputs

    tm = load_model(str(MODEL))
    settings = model_settings(tm)
    most = tm.max_source_tokens
    long_src = " ".join(["a"] * (4 * most))
    verdicts = pd.DataFrame({"verdict": ["model", "model"], "reason_code": ["", ""], "line": [2, 3], "id": ["1", "2"],
                             "source": [long_src, "a b"]})
    sample = FailedRowSample(4, seed=0)
    sample.add_step(SimpleNamespace(verdicts=verdicts, offset=0, outputs=["x", "y"]))
    rep = check_outputs(tm, settings, sample)
    assert len(tm.tokenize_sources([long_src])[0]) > most  # the plant is too long
    assert rep.too_long == 1 and rep.checked == 1


def _generate(sources: list[str], **kw) -> list[str]:
    """transformers' own generate on the shipped checkpoint (its generation config, `kw` on top), in batches."""
    import torch
    from transformers import AutoModelForSeq2SeqLM, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(str(MODEL))
    hf = AutoModelForSeq2SeqLM.from_pretrained(str(MODEL)).eval()
    texts: list[str] = []
    with torch.inference_mode():
        for lo in range(0, len(sources), 40):
            gen = hf.generate(**tok(sources[lo: lo + 40], return_tensors="pt", padding=True), **kw)
            texts += tok.batch_decode(gen, skip_special_tokens=True)
    return texts


@pytest.fixture(scope="module")
def beam8_run(tmp_path_factory) -> tuple[pd.DataFrame, Path, str]:
    """Outputs decoded by transformers' generate at num_beams=8, length_penalty=0.5, then triaged as if
    decoded at the checkpoint's beam 2."""
    tmp = tmp_path_factory.mktemp("beam8")
    dev = _devset().iloc[:160].copy()
    dev["output"] = _generate(dev["source"].tolist(), num_beams=8, length_penalty=0.5)
    path = tmp / "claimed.tsv"
    dev.to_csv(path, sep="\t", index=False, quoting=csv.QUOTE_NONE)
    out = tmp / "o"
    capture = __import__("io").StringIO()
    from contextlib import redirect_stderr

    with redirect_stderr(capture):
        rc = main(["run", "--model", str(MODEL), "--data", str(path), "--out", str(out), "--beam", "2", "--quiet",
                   "--no-cache"])
    assert rc == 0, capture.getvalue()
    return dev, out, capture.getvalue()


def test_beam_8_outputs_claimed_as_beam_2(beam8_run):
    """The outputs check (at its default of 16 rows) measures the share and warns below 90%; each
    differing row's decode at beam 2 is what transformers' own generate gives at beam 2, and a row
    not decoded to its end (its output left the search) is one whose generate output at beam 2
    differs from the given one."""
    dev, out, err = beam8_run
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    rep = s["reproduction"]
    assert rep["checked"] == 16
    share = rep["reproduced_share"]
    assert share < 0.9 and rep["differing_rows"] == 16 - rep["reproduced"]
    assert f"{share:.0%} of the sampled failed outputs" in err  # the warning line
    # outside check: transformers' own beam search at width 2 (the checkpoint's alpha 0.5)
    by_line = {int(r["line"]): r for r in rep["differing"]}
    texts = _generate([dev["source"].iat[line - 2] for line in by_line], num_beams=2)  # line 1 is the header
    stopped = 0
    for (line, r), text in zip(by_line.items(), texts, strict=True):
        assert r["given"] == dev["output"].iat[line - 2]
        assert " ".join(text.split()) != " ".join(r["given"].split()), line  # generate at beam 2 differs too
        if r["decoded"] is None:
            stopped += 1
            assert r["left_at"] >= 1
        else:
            assert " ".join(text.split()) == " ".join(r["decoded"].split()), line
    assert 0 < stopped  # some rows were not decoded to their end
