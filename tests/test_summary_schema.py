"""summary.json follows the schema shipped in the package (triage/run/summary.schema.json),
checked with the jsonschema library; the typed Summary reads a written summary.json back and
writes exactly the same bytes."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
from schema_check import SCHEMA, errors

from triage.cli import main

ROOT = Path(__file__).parent.parent


@pytest.fixture(scope="module")
def demo_runs(tmp_path_factory, tiny_model_dir) -> dict[str, Path]:
    """The demo run as the README gives it, and a tiny-model run with every study."""
    from tinymodels import sentences

    base = tmp_path_factory.mktemp("schema")
    runs = {"demo": base / "demo", "studies": base / "studies"}
    assert main(["run", "--model", str(ROOT / "sample_data" / "model"), "--data", str(ROOT / "sample_data" /
                 "devset.tsv"), "--out", str(runs["demo"]), "--no-cache", "--quiet"]) == 0
    src, ref = sentences(10, seed=31), sentences(10, seed=32, lo=2, hi=6)
    dev = base / "dev.tsv"
    dev.write_text("id\tsource\treference\n" + "".join(f"s{i}\t{s}\t{r}\n" for i, (s, r) in
                                                       enumerate(zip(src, ref, strict=True))), encoding="utf-8")
    assert main(["run", "--model", str(tiny_model_dir), "--data", str(dev), "--out", str(runs["studies"]),
                 "--no-cache", "--quiet", "--widen", "8", "--beam-curve", "2", "--redecode-alpha", "0.5",
                 "--alpha-grid", "0,1", "--where-lost", "--exact", "--max-rows", "6"]) == 0
    return runs


def _summary(folder: Path) -> dict:
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))


def test_the_schema_is_a_valid_draft_2020_12_schema():
    import jsonschema

    jsonschema.Draft202012Validator.check_schema(SCHEMA)  # raises when the schema itself is malformed
    assert SCHEMA["$schema"] == "https://json-schema.org/draft/2020-12/schema"


@pytest.mark.parametrize("name", ["demo", "studies"])
def test_demo_runs_follow_the_schema(demo_runs, name):
    summary = _summary(demo_runs[name])
    assert errors(summary) == []
    studies = {"length_penalty", "widen", "beam_curve", "where_lost", "exact"} & set(summary)
    assert studies == ({"length_penalty"} if name == "demo" else
                       {"length_penalty", "widen", "beam_curve", "where_lost", "exact"})


def test_the_schema_refuses_what_is_wrong(demo_runs):
    good = _summary(demo_runs["studies"])
    broken = []
    for change in (
        lambda s: s["recommendation"].update(action="widen"),               # not an action
        lambda s: s["counts"].update(searched=1),                           # not a verdict
        lambda s: s.pop("recommendation"),                                  # a required section
        lambda s: s["search_share"].update(share=1.5),                      # a share above 1
        lambda s: s["widen"]["widths"][0].pop("resolved_share"),            # a study's required key
        lambda s: s["exact"].update({"budget reached": "7"}),               # a count as text
        lambda s: s.update(sweeps="done"),                                  # an unknown top-level key
    ):
        s = copy.deepcopy(good)
        change(s)
        broken.append(bool(errors(s)))
    assert broken == [True] * 7


@pytest.mark.parametrize("name", ["demo", "studies"])
def test_summary_reads_back_and_writes_the_same_bytes(demo_runs, name):
    from triage.rundir.reader import read_summary
    from triage.rundir.writer import dumps
    from triage.studies import SECTIONS

    raw = (demo_runs[name] / "summary.json").read_text(encoding="utf-8")
    summary = read_summary(demo_runs[name])
    for key, section in summary.studies().items():
        assert isinstance(section, SECTIONS[key]), key  # typed, not the dict as read
    assert dumps(summary.to_json()) == raw
