"""`triage run` is a thin shell over triage.workflow.triage_run: the same inputs through the
command line and through the library call write the same files, byte for byte (run.json,
which holds the date and timings, aside; the page's copy of those two fields is masked)."""

from __future__ import annotations

import json
import types
from pathlib import Path

import pytest

from triage.cli import main

FILES = ("verdicts.csv", "summary.json", "tokens.jsonl")


@pytest.fixture(scope="module")
def devset(tmp_path_factory) -> Path:
    """30 rows without outputs: the tiny model decodes them, and most differ from their references."""
    from tinymodels import sentences

    src, ref = sentences(30, seed=91), sentences(30, seed=92, lo=2, hi=6)
    p = tmp_path_factory.mktemp("wf") / "dev.tsv"
    rows = "".join(f"w{i}\t{s}\t{r}\n" for i, (s, r) in enumerate(zip(src, ref, strict=True)))
    p.write_text("id\tsource\treference\n" + rows, encoding="utf-8")
    return p


@pytest.fixture
def step_clock(monkeypatch):
    """The studies' decode timings read a clock that advances one second per reading, so the
    timing fields of two runs that do the same work are the same numbers."""
    import triage.studies.common as common

    def install():
        ticks = iter(range(10**9))
        monkeypatch.setattr(common, "time", types.SimpleNamespace(perf_counter=lambda: float(next(ticks))))

    return install


def _page_without_run_info(folder: Path) -> str:
    """report.html with the date and the elapsed time (from run.json) masked."""
    html = (folder / "report.html").read_text(encoding="utf-8")
    info = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    assert info["created"] in html
    html = html.replace(info["created"], "DATE")
    return html.replace(f"{info['elapsed_s']:.1f} s", "ELAPSED s")


def _same_files(a: Path, b: Path) -> None:
    for name in FILES:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    assert _page_without_run_info(a) == _page_without_run_info(b)
    info_a, info_b = (json.loads((d / "run.json").read_text(encoding="utf-8")) for d in (a, b))
    assert info_a["command"] == info_b["command"] and info_a["page_rows"] == info_b["page_rows"]


@pytest.mark.parametrize("extra, plan", [
    (["--widen", "8"], {"widen": [8]}),              # rows in memory, a decoding study
    (["--chunk-rows", "7"], {}),                      # streamed in steps of 7 rows
], ids=["widen", "streamed"])
def test_cli_and_library_write_the_same_files(extra, plan, capsys, tmp_path, tiny_model_dir, devset, step_clock):
    from triage import StudyPlan, TriageOptions, triage_run

    cli_out, lib_out = tmp_path / "cli", tmp_path / "lib"
    args = ["run", "--model", str(tiny_model_dir), "--data", str(devset), "--out", str(cli_out), "--no-cache",
            "--quiet", *extra]
    command = "triage " + " ".join(args)
    step_clock()
    import sys

    argv = sys.argv
    sys.argv = ["triage", *args]  # run.json records the command line the CLI was given
    try:
        assert main(args) == 0
    finally:
        sys.argv = argv
    capsys.readouterr()

    step_clock()
    chunk = int(extra[1]) if extra[:1] == ["--chunk-rows"] else 1000
    outcome = triage_run(str(tiny_model_dir), devset, options=TriageOptions(progress=False, chunk_rows=chunk),
                         studies=StudyPlan(**plan), out=lib_out, command=command)
    assert outcome.out == lib_out
    _same_files(cli_out, lib_out)
    summary = json.loads((lib_out / "summary.json").read_text(encoding="utf-8"))
    assert summary["recommendation"] == outcome.summary.recommendation.to_json()
    assert ("widen" in summary) == bool(plan)
    if not plan:  # a streamed run keeps no rows when it writes them
        assert outcome.result.verdicts is None


def test_library_checks_the_options_before_any_work(tiny_model_dir, devset, tmp_path):
    """The checks live in the library (the CLI names its flags in the same messages)."""
    from triage import StudyPlan, TriageOptions, triage_run
    from triage.errors import OptionError

    cases = [
        (dict(options=TriageOptions(chunk_rows=0)), "chunk_rows must be at least 1, got 0"),
        (dict(page_rows=0), "page_rows must be at least 1, got 0"),
        (dict(studies=StudyPlan(max_rows=0)), "max_rows must be at least 1, got 0"),
        (dict(settings={"beam": 0}), "beam must be at least 1, got 0"),
        (dict(studies=StudyPlan(widen="x1")), "not wider than the current width 4"),
    ]
    for kw, message in cases:
        with pytest.raises(OptionError, match=message):
            triage_run(str(tiny_model_dir), devset, out=tmp_path / "o", **kw)
        assert not (tmp_path / "o").exists()


def test_cli_names_its_flags(capsys, tmp_path, tiny_model_dir, devset):
    for flag in ("--chunk-rows", "--page-rows", "--max-rows"):
        rc = main(["run", "--model", str(tiny_model_dir), "--data", str(devset), "--out", str(tmp_path / "o"),
                   flag, "0", "--quiet"])
        err = capsys.readouterr().err
        assert rc == 2 and err == f"triage: error: {flag} must be at least 1, got 0\n"
