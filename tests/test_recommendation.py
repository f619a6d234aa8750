"""One recommendation per run, decided once from the whole summary (triage.decision.recommend).

The regression: the recommendation used to be computed in three places that disagreed; the
sweeps' merge recomputed it from the sweep sections alone, so a dev set whose outputs mostly
cannot come from the decoder got "inconclusive" from `triage run --widen` and another answer
from the library's sweeps. Now the command line, triage_run and the lower-level calls all end
in the same recommendation.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from triage.cli import main
from triage.decision import Evidence, recommend, settings_mismatch, weigh
from triage.run.summary import Action
from triage.studies import LengthPenaltySection, WidenSection

N_FOREIGN, N_FAILED = 30, 35
LIMIT = 6


@pytest.fixture(scope="module")
def foreign_devset(tmp_path_factory) -> Path:
    """35 failed rows; 30 of their outputs are 12 words long, longer than a length limit of 6
    new tokens lets the decoder write (transformers counts max_new_tokens as generated tokens,
    end token included: common practice, transformers' GenerationConfig docs), 5 are short."""
    from tinymodels import sentences

    src, ref = sentences(N_FAILED, seed=81), sentences(N_FAILED, seed=82, lo=2, hi=5)
    p = tmp_path_factory.mktemp("foreign") / "dev.tsv"
    with open(p, "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\toutput\n")
        for i in range(N_FAILED):
            out = " ".join(["platform"] * 12) if i < N_FOREIGN else "the bus"
            assert out != ref[i]  # every row fails: no output equals its reference
            f.write(f"r{i}\t{src[i]}\t{ref[i]}\t{out}\n")
    return p


def _cli(capsys, *args: str) -> tuple[int, str]:
    capsys.readouterr()
    rc = main(["run", *args, "--quiet"])
    return rc, capsys.readouterr().err


def test_cli_and_library_agree_on_inconclusive_when_outputs_break_the_rules(capsys, tmp_path, tiny_model_dir,
                                                                             foreign_devset):
    from triage import StudyPlan, TriageOptions, triage_run
    from triage.run.pipeline import run_triage
    from triage.studies.runner import run_studies

    out = tmp_path / "cli"
    rc, err = _cli(capsys, "--model", str(tiny_model_dir), "--data", str(foreign_devset), "--out", str(out),
                   "--max-new-tokens", str(LIMIT), "--widen", "8", "--no-cache")
    assert rc == 2 and "Traceback" not in err
    cli_rec = json.loads((out / "summary.json").read_text(encoding="utf-8"))["recommendation"]
    assert cli_rec["action"] == "inconclusive"
    # the rows were planted: 30 of the 35 failed outputs break the length limit (counted by hand above)
    assert cli_rec["because"].startswith(f"{N_FOREIGN} of {N_FAILED} failed outputs cannot come from the decoder")
    assert cli_rec["because"].endswith(f"its rules forbid them: length limit ({N_FOREIGN})")
    assert cli_rec["missing"] == ["the decoder settings the outputs were decoded with"]

    # the library's one call
    outcome = triage_run(str(tiny_model_dir), foreign_devset, {"max_new_tokens": LIMIT},
                         TriageOptions(progress=False), studies=StudyPlan(widen=[8]))
    assert outcome.summary.widen is not None  # the wider beam did run
    assert outcome.summary.recommendation.to_json() == cli_rec
    assert outcome.settings_problem() is not None

    # the lower-level calls: run_triage and the studies decide nothing; recommend() on the
    # completed summary gives the same answer
    from triage import load_model, model_settings, read_devset

    model = load_model(str(tiny_model_dir))
    dev = read_devset(str(foreign_devset))
    result = run_triage(model, dev, model_settings(model, max_new_tokens=LIMIT), TriageOptions(progress=False))
    assert result.summary.recommendation is None
    result.summary.widen = run_studies(model, result, widen=[8], progress=False, devset=dev).sections["widen"]
    assert result.summary.recommendation is None
    assert result.summary.widen.widths  # the evidence a sweep-only rule would have read
    assert recommend(result.summary).to_json() == cli_rec


def test_settings_mismatch_needs_half_of_the_failed_rows():
    from triage.run.summary import ForeignOutputs

    class S:  # only the two fields the guard reads
        objective = "beam=4"
        outputs_not_from_these_settings = ForeignOutputs(rows=17, of_failed=35, rules={"length limit": 17},
                                                         first_line=2)

    assert settings_mismatch(S()) is None  # 17 of 35 is under half
    S.outputs_not_from_these_settings = ForeignOutputs(rows=18, of_failed=36, rules={"length limit": 18},
                                                       first_line=2)
    assert "18 of 36 failed outputs" in settings_mismatch(S())  # exactly half refuses


def test_the_rule_weighs_the_metric_and_names_missing_evidence():
    counts = {"search": 15, "model": 5, "tie": 0}
    hurt = {"metric": "chrf", "widths": [{"beam": 8, "resolved_share": 0.6, "corpus_delta": -1.5, "time_ratio": 3.0,
                                          "model_rows": {"rows": 5, "worse": 4}}]}
    r = weigh(Evidence(counts, widen=WidenSection.from_json(hurt)))
    assert r.action is Action.INCONCLUSIVE and "-1.5 chrf" in r.because and "4 of 5 model-side" in r.because
    unconfirmed = weigh(Evidence(counts))
    assert unconfirmed.action is Action.WIDEN_BEAM
    assert unconfirmed.missing == ["re-decoding with a wider beam (--widen)"]
    split = weigh(Evidence({"search": 9, "model": 9, "tie": 2}))
    assert split.action is Action.INCONCLUSIVE and len(split.missing) == 2
    few = weigh(Evidence({"search": 5, "model": 4, "tie": 0}))
    assert few.because.startswith("only 9 of 9 failed rows (100%) were compared: the verdict mix is read when at least 10")
    model_side = weigh(Evidence({"search": 2, "model": 18, "tie": 0}))
    assert model_side.action is Action.FIX_MODEL and "90% of compared failures are model-side (18 of 20)" in \
        model_side.because


def test_short_model_side_rows_that_flip_tune_the_length_penalty():
    counts = {"search": 4, "model": 16, "tie": 0}
    lp = {"metric": "chrf", "best": {"penalty": "power", "alpha": 1.2, "flip_share": 0.5},
          "brevity": {"short_share": 0.75, "length_ratio": 0.6}, "redecode": []}
    r = weigh(Evidence(counts, length_penalty=LengthPenaltySection.from_json(lp)))
    assert r.action is Action.TUNE_LENGTH_PENALTY
    assert r.missing == ["decoding at power alpha 1.2 to confirm (--redecode-alpha)"]
    lp["redecode"] = [{"penalty": "power", "alpha": 1.2, "corpus_delta": -0.4, "rows": 20}]
    worse = weigh(Evidence(counts, length_penalty=LengthPenaltySection.from_json(lp)))  # decoding at it lowers the metric: not recommended
    assert worse.action is Action.FIX_MODEL and "but decoding at alpha 1.2 changes the metric by -0.4" in worse.because
    lp["redecode"] = [{"penalty": "power", "alpha": 1.2, "corpus_delta": 0.8, "rows": 20}]
    better = weigh(Evidence(counts, length_penalty=LengthPenaltySection.from_json(lp)))
    assert better.action is Action.TUNE_LENGTH_PENALTY and "changes chrf by +0.8 on 20 rows" in better.because
