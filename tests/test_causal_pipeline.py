"""Decoder-only checkpoints through the whole pipeline: verdicts, studies, the CLI and the report.

Outside references: transformers' `generate` (completions and `sequences_scores`, one prompt at
a time) for the planted rows and the decoded outputs; the tokenizer's own chat template for the
prompt the report shows; Python's html.escape for the page text.
"""

from __future__ import annotations

import html
import json

import pandas as pd
import pytest
import torch
from causal_models import save_causal
from tinymodels import sentences

from triage.cli import main
from triage.decoding.decode import decode
from triage.models.describe import model_settings
from triage.models.loading import load_model
from triage.run.pipeline import TriageOptions, run_triage

N = 48
SYSTEM = "Say it plainly:"


@pytest.fixture(scope="module")
def causal_dir(tmp_path_factory):
    return save_causal(tmp_path_factory.mktemp("causal") / "model", "gpt2", seed=2, num_beams=2, length_penalty=1.0,
                       max_new_tokens=8)


@pytest.fixture(scope="module")
def chat_model(causal_dir):
    return load_model(str(causal_dir), chat_template=True, system=SYSTEM)


def hf_beam(m, source_ids, beam, settings):
    """transformers' generate on one prompt (no padding): (completion ids without end, sequences_scores)."""
    gc = settings.replace(beam=beam).to_generation_config(m.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    ids = torch.tensor([source_ids])
    with torch.no_grad():
        out = m.model.generate(input_ids=ids, attention_mask=torch.ones_like(ids), generation_config=gc)
    row = out.sequences[0, ids.shape[1]:].tolist()
    row = row[: row.index(m.end_id)] if m.end_id in row else row
    return row, float(out.sequences_scores[0])


def test_planted_search_and_model_rows_are_labelled_right(chat_model):
    # search-side: the reference is the 8-beam output that outscores the 2-beam one; model-side: the
    # reference is a text the model scores below its output. Source of the scores: generate itself.
    m = chat_model
    settings = model_settings(m)
    assert settings.beam == 2 and settings.limit_new_tokens() == 8
    src = sentences(N, seed=5, lo=1, hi=8)
    ids = m.tokenize_sources(src)
    d2 = decode(m, settings, ids, batch_size=64)
    d8 = decode(m, settings.replace(beam=8), ids, batch_size=64)
    planted = [i for i in range(N) if d8[i].finished and d8[i].text != d2[i].text and d8[i].score > d2[i].score]
    others = [i for i in range(N) if i not in planted and d2[i].text][:10]
    assert len(planted) >= 3 and len(others) >= 3
    wrong = sentences(N, seed=6, lo=4, hi=6)  # random texts: far less likely than the model's own output
    refs = [d8[i].text if i in planted else wrong[i] if i in others else d2[i].text for i in range(N)]
    frame = pd.DataFrame({"id": [f"r{i}" for i in range(N)], "source": src, "references": [[r] for r in refs],
                          "output": [d.text for d in d2]})
    result = run_triage(m, frame, settings, TriageOptions(progress=False))
    verdicts = result.verdicts["verdict"].tolist()
    assert [i for i in range(N) if verdicts[i] == "search"] == planted
    assert all(verdicts[i] == "model" for i in others)
    assert all(verdicts[i] == "correct" for i in range(N) if i not in planted and i not in others)
    for i in planted:
        refs_scored, out_scored = result.scores[i]
        want8, score8 = hf_beam(m, ids[i], 8, settings)
        want2, score2 = hf_beam(m, ids[i], 2, settings)
        assert m.detokenize(want8) == refs[i] and m.detokenize(want2) == d2[i].text
        assert refs_scored[0].score == pytest.approx(score8, abs=1e-4)
        assert out_scored.score == pytest.approx(score2, abs=1e-4)


def _tsv(path, rows):
    pd.DataFrame(rows).to_csv(path, sep="\t", index=False)
    return path


def _run(capsys, *args):
    capsys.readouterr()
    rc = main(["run", *args, "--quiet"])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def test_cli_run_decodes_completions_and_shows_the_prompt(capsys, tmp_path, causal_dir, chat_model):
    # outputs decoded by triage are generate's completions (never the prompt); the report and summary.json
    # name the chat template and show the first row's prompt as the tokenizer's chat template renders it
    src = sentences(12, seed=7, lo=1, hi=6)
    refs = sentences(12, seed=8, lo=1, hi=6)
    data = _tsv(tmp_path / "dev.tsv", {"id": [f"r{i}" for i in range(12)], "source": src, "reference": refs})
    out = tmp_path / "run"
    rc, stdout, err = _run(capsys, "--model", str(causal_dir), "--chat-template", "--system", SYSTEM,
                           "--data", str(data), "--out", str(out), "--widen", "4", "--where-lost", "--no-cache")
    assert rc == 0, err
    summary = json.loads((out / "summary.json").read_text())
    messages = [{"role": "system", "content": SYSTEM}, {"role": "user", "content": src[0]}]
    rendered = chat_model.tokenizer.apply_chat_template(messages, add_generation_prompt=True, tokenize=False)
    assert summary["model"]["prompt"] == f"chat template (system message: {SYSTEM!r})"
    assert summary["model"]["prompt_example"] == rendered
    assert summary["model"]["architecture"] == "GPT2LMHeadModel"
    page = (out / "report.html").read_text()
    assert "prompt of the first row" in page and html.escape(rendered) in page
    verdicts = pd.read_csv(out / "verdicts.csv", keep_default_na=False)
    ids = chat_model.tokenize_sources(src)
    for i in range(4):
        want, _ = hf_beam(chat_model, ids[i], 2, model_settings(chat_model))
        assert verdicts["output"].iat[i] == chat_model.detokenize(want)
        assert "<|assistant|>" not in verdicts["output"].iat[i]
    assert summary["widen"] is not None


def test_cli_template_prompt_with_newline(capsys, tmp_path, causal_dir):
    src = sentences(4, seed=9, lo=1, hi=4)
    data = _tsv(tmp_path / "dev.tsv", {"source": src, "reference": src})
    out = tmp_path / "run"
    rc, _, err = _run(capsys, "--model", str(causal_dir), "--prompt-template", r"Say it plainly:\n{source} Answer:",
                      "--data", str(data), "--out", str(out), "--no-cache")
    assert rc == 0, err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["model"]["prompt"] == repr("Say it plainly:\n{source} Answer:")
    assert summary["model"]["prompt_example"] == f"Say it plainly:\n{src[0]} Answer:"


def _one_error_line(err: str) -> str:
    assert "Traceback" not in err
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1, err
    return lines[0]


@pytest.mark.parametrize("flags, words", [
    (["--prompt-template", "Translate: {text}"], "--prompt-template names an unknown field {text}"),
    (["--prompt-template", "Translate."], "--prompt-template has no {source} field"),
    (["--prompt-template", "{source", ], "--prompt-template is not a format string"),
    (["--system", "be brief"], "--system needs chat_template"),
    (["--chat-template", "--prompt-template", "{source}"], "--prompt-template and chat_template exclude"),
])
def test_bad_prompt_options_are_one_line(capsys, tmp_path, causal_dir, flags, words):
    data = _tsv(tmp_path / "dev.tsv", {"source": ["a"], "reference": ["b"]})
    rc, _, err = _run(capsys, "--model", str(causal_dir), *flags, "--data", str(data), "--out", str(tmp_path / "o"))
    assert rc == 2
    assert words in _one_error_line(err)


@pytest.mark.parametrize("flags, flag", [(["--prompt-template", "Q: {source}"], "--prompt-template"),
                                         (["--chat-template"], "--chat-template")])
def test_prompt_flags_refused_for_an_encoder_decoder_model(capsys, tmp_path, tiny_model_dir, flags, flag):
    data = _tsv(tmp_path / "dev.tsv", {"source": ["the train"], "reference": ["the bus"]})
    rc, _, err = _run(capsys, "--model", str(tiny_model_dir), *flags, "--data", str(data),
                      "--out", str(tmp_path / "o"))
    assert rc == 2
    line = _one_error_line(err)
    assert line.startswith(f"triage: error: {flag} applies to decoder-only models only") and "encoder-decoder" in line


def test_prompt_flags_refused_for_a_python_model(capsys, tmp_path):
    data = _tsv(tmp_path / "dev.tsv", {"source": ["a"], "reference": ["b"]})
    rc, _, err = _run(capsys, "--model", "python:toy_gru:make_model", "--chat-template", "--data", str(data),
                      "--out", str(tmp_path / "o"))
    assert rc == 2
    assert "--chat-template applies to decoder-only transformers checkpoints only" in _one_error_line(err)


def test_help_says_which_flags_apply_to_which_models(capsys):
    with pytest.raises(SystemExit):
        main(["run", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "prompt (decoder-only checkpoints only; an error for any other model)" in text
    assert "Every other flag means the same for every model family" in text
    assert "for a decoder-only model, completion tokens" in text


def test_without_capabilities_the_numbers_are_the_same(chat_model):
    # source: transformers' generate (through the backend's own decoder) and the backend's full scoring;
    # the same model behind the plain interface only (triage's beam search, step-by-step scoring, rules
    # built from the settings: none here) gives the same outputs, scores and verdicts
    from test_capabilities import Plain

    from triage.models.api import PROTOCOLS, Capabilities, capabilities

    m = chat_model
    assert capabilities(m) == Capabilities(**{**dict.fromkeys(PROTOCOLS, True), "audio_sources": False})
    settings = model_settings(m)
    plain = Plain(m, default_settings=settings)
    src = sentences(10, seed=21, lo=1, hi=6)
    ids = m.tokenize_sources(src)
    mine, theirs = decode(plain, settings, ids, batch_size=4), decode(m, settings, ids, batch_size=4)
    for a, b in zip(mine, theirs, strict=True):
        assert (a.ids, a.finished) == (b.ids, b.finished)
        assert a.score == pytest.approx(b.score, abs=1e-5)
    refs = sentences(10, seed=22, lo=1, hi=6)
    frame = pd.DataFrame({"id": [str(i) for i in range(10)], "source": src, "references": [[r] for r in refs],
                          "output": [d.text for d in theirs]})
    full = run_triage(m, frame, settings, TriageOptions(progress=False)).verdicts
    bare = run_triage(plain, frame, settings, TriageOptions(progress=False)).verdicts
    assert bare["verdict"].tolist() == full["verdict"].tolist()
    assert bare["ref_logprob"].tolist() == pytest.approx(full["ref_logprob"].tolist(), abs=1e-5)
