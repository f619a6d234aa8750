"""triage compare: two run folders of the demo, before (beam 2, as shipped) and after (beam 8), both decoded
by the tool; the comparison's numbers against outside references, its refusals, and its page in a browser.

The dev set is the demo's rows with short references (10 words or fewer) from row 151 on, without the
output column, so triage decodes them: 44 rows, enough to hold search-side rows, quick to decode twice.
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from triage.cli import main

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "sample_data" / "model"
DEVSET = ROOT / "sample_data" / "devset.tsv"
VERDICTS = ["search", "model", "tie", "blocked", "skipped", "correct"]


def _subset(path: Path, lo: int, hi: int) -> Path:
    """The demo's rows lo..hi-1 (0-based) whose reference has 10 words or fewer, without the output column."""
    d = pd.read_csv(DEVSET, sep="\t", dtype=str, keep_default_na=False, quoting=csv.QUOTE_NONE)
    short = d[(d["reference"].str.split().str.len() <= 10) & (d.index >= lo) & (d.index < hi)]
    short.drop(columns=["output"]).to_csv(path, sep="\t", index=False, quoting=csv.QUOTE_NONE)
    return path


def _triage(data: Path, beam: int, out: Path) -> Path:
    rc = main(["run", "--model", str(MODEL), "--data", str(data), "--beam", str(beam), "--out", str(out),
               "--no-cache", "--quiet"])
    assert rc == 0
    return out


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """Before (beam 2) and after (beam 8) on one dev set, and a run of another dev set."""
    tmp = tmp_path_factory.mktemp("compare")
    data = _subset(tmp / "short.tsv", 150, 400)   # 44 rows
    assert len(pd.read_csv(data, sep="\t", dtype=str)) == 44
    other = _subset(tmp / "other.tsv", 100, 200)  # another dev set, some of its ids in the first
    a = _triage(data, 2, tmp / "beam2")
    b = _triage(data, 8, tmp / "beam8")
    o = _triage(other, 2, tmp / "other")
    return {"tmp": tmp, "data": data, "a": a, "b": b, "other": o}


def _compare(capsys, *args: str) -> tuple[int, str, str]:
    capsys.readouterr()
    rc = main(["compare", *args])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


@pytest.fixture(scope="module")
def compared(demo):
    """compare.json and compare.html of before against after, through the CLI."""
    out = demo["tmp"] / "cmp"
    rc = main(["compare", str(demo["a"]), str(demo["b"]), "--out", str(out), "--labels", "beam 2,beam 8"])
    assert rc == 0
    return out, json.loads((out / "compare.json").read_text(encoding="utf-8"))


def _verdicts(run: Path) -> pd.DataFrame:
    return pd.read_csv(run / "verdicts.csv", dtype=str, keep_default_na=False)


# ----------------------------------------------------------------------------- outside references
def test_transitions_equal_pandas_crosstab(demo, compared):
    _, c = compared
    va, vb = _verdicts(demo["a"]), _verdicts(demo["b"])
    both = va[["id", "verdict"]].merge(vb[["id", "verdict"]], on="id", suffixes=("_a", "_b"))
    # reference: pandas.crosstab over the two verdicts.csv files, read here on their own
    ct = pd.crosstab(both["verdict_a"], both["verdict_b"]).reindex(index=VERDICTS, columns=VERDICTS, fill_value=0)
    table = c["transitions"]["table"]
    for x in VERDICTS:
        for y in VERDICTS:
            assert table[x][y] == int(ct.loc[x, y]), (x, y)
    # every row counted once, correct rows included
    assert sum(sum(r.values()) for r in table.values()) == len(va) == len(vb) == c["rows"]["matched"] == 44
    assert c["transitions"]["counts_a"]["correct"] == int((va["verdict"] == "correct").sum())


def test_paired_bootstrap_equals_sacrebleu_paired_test(demo, compared, monkeypatch):
    from sacrebleu.metrics import CHRF
    from sacrebleu.significance import PairedTest

    from triage.compare import compare_runs

    _, c = compared
    va, vb = _verdicts(demo["a"]), _verdicts(demo["b"])
    assert (va["id"] == vb["id"]).all()
    refs = [va["reference"].tolist()]  # the demo has one reference per row
    hyps_a, hyps_b = va["output"].tolist(), vb["output"].tolist()
    # reference: sacrebleu's own paired bootstrap test, called directly (seed through its SACREBLEU_SEED)
    monkeypatch.setenv("SACREBLEU_SEED", "12345")
    sigs, scores = PairedTest([("a", hyps_a), ("b", hyps_b)], {"chrF": CHRF()}, refs, test_type="bs",
                              n_samples=1000)()
    (name,) = [k for k in scores if k != "System"]  # sacrebleu names the column by the score's name
    ra, rb = scores[name]
    t = c["corpus_metric"]["test"]
    assert t["score_a"] == pytest.approx(ra.score, abs=1e-9) and t["score_b"] == pytest.approx(rb.score, abs=1e-9)
    assert t["p_value"] == pytest.approx(rb.p_value, abs=1e-12)
    assert t["mean_b"] == pytest.approx(rb.mean, abs=1e-9) and t["half_width_b"] == pytest.approx(rb.ci, abs=1e-9)
    assert t["mean_a"] == pytest.approx(ra.mean, abs=1e-9) and t["half_width_a"] == pytest.approx(ra.ci, abs=1e-9)
    assert t["signature"] == str(sigs[name]) and "bs:1000" in t["signature"] and "seed:12345" in t["signature"]
    assert t["draws_agree"] is True
    # reference: sacrebleu's corpus chrF agrees with the runs' own summary.json
    assert t["score_a"] == pytest.approx(json.loads((demo["a"] / "summary.json").read_text())["corpus_metric"]["score"],
                                         abs=1e-9)

    # the difference's interval: resample the rows as sacrebleu draws them (numpy default_rng(seed).choice, one
    # row of indices per resample) and score each resample with sacrebleu's public corpus_score
    n_res = 200
    mine = compare_runs(demo["a"], demo["b"], resamples=n_res).corpus_metric.test
    idxs = np.random.default_rng(12345).choice(len(hyps_a), size=(n_res, len(hyps_a)), replace=True)
    metric = CHRF()
    da = np.array([metric.corpus_score([hyps_a[i] for i in ix], [[refs[0][i] for i in ix]]).score for ix in idxs])
    db = np.array([metric.corpus_score([hyps_b[i] for i in ix], [[refs[0][i] for i in ix]]).score for ix in idxs])
    _, scores200 = PairedTest([("a", hyps_a), ("b", hyps_b)], {"chrF": CHRF()}, refs, test_type="bs",
                              n_samples=n_res)()
    assert db.mean() == pytest.approx(scores200[name][1].mean, abs=1e-4)  # the draws are sacrebleu's
    diffs = np.sort(db - da)
    cut = n_res // 40  # sacrebleu's estimate_ci bounds: n // 40 from either end
    assert mine.interval95[0] == pytest.approx(diffs[cut], abs=1e-4)
    assert mine.interval95[1] == pytest.approx(diffs[n_res - cut - 1], abs=1e-4)
    assert mine.p_value == pytest.approx(scores200[name][1].p_value, abs=1e-12)


def test_bucket_shares_and_wilson_intervals_equal_statsmodels(demo, compared):
    from statsmodels.stats.proportion import proportion_confint

    _, c = compared
    va, vb = _verdicts(demo["a"]), _verdicts(demo["b"])
    assert c["buckets"]
    for bk in c["buckets"]:
        for side, frame in (("a", va), ("b", vb)):
            part = frame[frame["bucket"] == bk["range"]]
            got = bk[side]
            # reference: counts from pandas over verdicts.csv
            assert got["rows"] == len(part)
            assert got["failed"]["k"] == int((part["verdict"] != "correct").sum())
            assert got["search"]["n"] == int(part["verdict"].isin(["search", "model", "tie"]).sum())
            assert got["search"]["k"] == int((part["verdict"] == "search").sum())
            for sh in (got["failed"], got["search"]):
                if sh["n"] == 0:
                    assert sh["interval95"] is None
                    continue
                # reference: statsmodels' Wilson score interval
                lo, hi = proportion_confint(sh["k"], sh["n"], alpha=0.05, method="wilson")
                assert sh["interval95"][0] == pytest.approx(lo, abs=1e-9)
                assert sh["interval95"][1] == pytest.approx(hi, abs=1e-9)


def test_compare_json_validates_against_the_shipped_schema(compared):
    import jsonschema

    from triage.compare import schema

    _, c = compared
    s = schema()
    jsonschema.Draft202012Validator.check_schema(s)
    jsonschema.validate(c, s, cls=jsonschema.Draft202012Validator)
    # the schema bites: a count of the wrong type is refused
    bad = json.loads(json.dumps(c))
    bad["transitions"]["table"]["search"]["correct"] = "4"
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, s, cls=jsonschema.Draft202012Validator)


# ----------------------------------------------------------------------------- the demo, before and after
def test_widening_recovers_search_side_rows_and_they_show_as_fixed(demo, compared, capsys):
    import torch
    from transformers import AutoModelForSeq2SeqLM, AutoTokenizer

    out, c = compared
    va, vb = _verdicts(demo["a"]), _verdicts(demo["b"])
    search = va[va["verdict"] == "search"]
    assert len(search) >= 3  # the dev set holds search-side rows at beam 2
    # reference: transformers' own beam search at width 8 (the checkpoint's other generation settings)
    tok = AutoTokenizer.from_pretrained(MODEL)
    model = AutoModelForSeq2SeqLM.from_pretrained(MODEL).eval()
    enc = tok(search["source"].tolist(), return_tensors="pt", padding=True)
    with torch.no_grad():
        gen = model.generate(**enc, num_beams=8, length_penalty=0.5, max_new_tokens=141, early_stopping=False)
    decoded = [" ".join(t.split()) for t in tok.batch_decode(gen, skip_special_tokens=True)]
    recovered = {i for i, d, r in zip(search["id"], decoded, search["reference"], strict=True) if d == " ".join(r.split())}
    assert recovered, "widening to 8 recovers none of the search-side rows"
    fixed = {r["id"]: r for r in c["fixed"]}
    assert recovered <= set(fixed)
    for i in recovered:
        assert fixed[i]["verdict_a"] == "search" and fixed[i]["verdict_b"] == "correct"
        assert fixed[i]["output_b"] == vb.set_index("id").loc[i, "output"]
        assert fixed[i]["output_a"] == va.set_index("id").loc[i, "output"]
    fu = c["follow_up"]
    assert [(x["what"], x["a"], x["b"]) for x in fu["changes"]] == [("beam", "2", "8")]
    assert fu["target"] == "search-side" and fu["target_rows"] == len(search)
    assert fu["now_correct"] == int(vb.set_index("id").loc[search["id"], "verdict"].eq("correct").sum())
    assert fu["followed"] is (json.loads((demo["a"] / "summary.json").read_text())["recommendation"]["action"]
                              == "widen-beam")
    assert f"widened the beam 2 -> 8: {fu['now_correct']} of {len(search)} search-side rows now correct" in \
        fu["achieved"].lower()
    # the page says the same, escaped text
    html = (out / "compare.html").read_text(encoding="utf-8")
    assert f"{fu['now_correct']} of {len(search)} search-side rows now correct" in html
    for x in VERDICTS:
        for y in VERDICTS:
            assert f'data-a="{x}" data-b="{y}">{c["transitions"]["table"][x][y]}<' in html
    # the one paragraph on stdout
    rc, stdout, stderr = _compare(capsys, str(demo["a"]), str(demo["b"]), "--out", str(demo["tmp"] / "cmp2"))
    assert rc == 0 and stderr == ""
    para = stdout.splitlines()[0]
    assert "44 rows, the same dev set" in para and f"{len(c['fixed'])} fixed" in para
    assert "wrote" in stdout.splitlines()[1]


def test_different_dev_sets_refused_with_both_hashes(demo, capsys):
    sha_a = json.loads((demo["a"] / "summary.json").read_text())["data"]["sha256"]
    sha_o = json.loads((demo["other"] / "summary.json").read_text())["data"]["sha256"]
    assert sha_a != sha_o
    out = demo["tmp"] / "refused"
    rc, stdout, stderr = _compare(capsys, str(demo["a"]), str(demo["other"]), "--out", str(out))
    assert rc == 2 and stdout == ""
    assert len(stderr.splitlines()) == 1 and stderr.startswith("triage: error:")
    assert sha_a in stderr and sha_o in stderr and "--allow-different-data" in stderr
    assert not out.exists()


def test_different_dev_sets_matched_by_id_when_allowed(demo, capsys):
    out = demo["tmp"] / "allowed"
    rc, stdout, _ = _compare(capsys, str(demo["a"]), str(demo["other"]), "--out", str(out),
                             "--allow-different-data")
    assert rc == 0 and "different dev sets, matched by id" in stdout
    c = json.loads((out / "compare.json").read_text(encoding="utf-8"))
    ids_a, ids_o = set(_verdicts(demo["a"])["id"]), set(_verdicts(demo["other"])["id"])
    # reference: set arithmetic on the two files' ids
    assert c["rows"]["matched"] == len(ids_a & ids_o) > 0
    assert c["rows"]["only_in_a"] == len(ids_a - ids_o) and c["rows"]["only_in_b"] == len(ids_o - ids_a)
    assert c["rows"]["same_data"] is False
    html = (out / "compare.html").read_text(encoding="utf-8")
    assert "two different dev sets" in html and "matched by id" in html


def _broken_copy(demo, name: str, how) -> Path:
    run = demo["tmp"] / "broken" / name
    if run.exists():
        shutil.rmtree(run)
    shutil.copytree(demo["b"], run)
    how(run)
    return run


def _edit_csv(run: Path, fn) -> None:
    frame = _verdicts(run)
    fn(frame).to_csv(run / "verdicts.csv", index=False, lineterminator="\n")


BROKEN = {
    "no-folder": (lambda r: shutil.rmtree(r), "no such run folder"),
    "no-summary": (lambda r: (r / "summary.json").unlink(), "summary.json: missing"),
    "no-verdicts": (lambda r: (r / "verdicts.csv").unlink(), "verdicts.csv: missing"),
    "summary-cut-off": (lambda r: (r / "summary.json").write_text((r / "summary.json").read_text()[:300]),
                        "summary.json:"),
    "summary-not-object": (lambda r: (r / "summary.json").write_text("[1, 2]\n"), "not a run summary"),
    "summary-no-sha": (lambda r: (r / "summary.json").write_text(json.dumps(
        {k: v for k, v in json.loads((r / "summary.json").read_text()).items() if k != "data"})), "no 'data'"),
    "summary-null-sha": (lambda r: (r / "summary.json").write_text(json.dumps(
        {**json.loads((r / "summary.json").read_text()), "data": {**json.loads((r / "summary.json").read_text())["data"],
                                                                   "sha256": None}})), "no data sha256"),
    "verdicts-cut-off": (lambda r: _edit_csv(r, lambda f: f.iloc[:30]), "30 rows, but summary.json says"),
    "verdicts-no-column": (lambda r: _edit_csv(r, lambda f: f.drop(columns=["output"])), "no column 'output'"),
    "verdicts-bad-verdict": (lambda r: _edit_csv(r, lambda f: f.assign(verdict=f["verdict"].where(
        f.index != 5, "maybe"))), "unknown verdict 'maybe'"),
    "verdicts-duplicate-id": (lambda r: _edit_csv(r, lambda f: f.assign(id=f["id"].where(
        f.index != 7, f["id"].iloc[3]))), "appears twice"),
    "verdicts-counts-differ": (lambda r: _edit_csv(r, lambda f: f.assign(verdict=f["verdict"].where(
        f.index != 0, "skipped" if f["verdict"].iloc[0] != "skipped" else "correct"))), "but summary.json counts"),
    "verdicts-empty": (lambda r: (r / "verdicts.csv").write_text(""), "empty file"),
    "run-json-corrupt": (lambda r: (r / "run.json").write_text("{\"created\": "), "run.json:1: not valid JSON"),
}


@pytest.mark.parametrize("name", sorted(BROKEN))
def test_missing_or_corrupt_run_files_one_line_exit_2(demo, capsys, name):
    how, what = BROKEN[name]
    run = _broken_copy(demo, name, how)
    rc, stdout, stderr = _compare(capsys, str(demo["a"]), str(run), "--out", str(demo["tmp"] / "broken-out"))
    assert rc == 2 and stdout == ""
    assert len(stderr.splitlines()) == 1 and stderr.startswith("triage: error:"), stderr
    assert what in stderr and str(run) in stderr, stderr
    assert "Traceback" not in stderr


@pytest.mark.parametrize("labels", ["one", "a,b,c", "same,same", ",after"])
def test_bad_labels_refused(demo, capsys, labels):
    rc, _, stderr = _compare(capsys, str(demo["a"]), str(demo["b"]), "--labels", labels)
    assert rc == 2 and len(stderr.splitlines()) == 1 and "--labels" in stderr


# ----------------------------------------------------------------------------- the page in a browser
def test_compare_page_in_chromium_runs_no_injected_code_and_fetches_nothing(demo, tmp_path, capsys):
    from test_browser import browse, recording_server
    from test_report import hostile_texts, parse

    with recording_server() as (url, hits):
        bad = hostile_texts(url)
        runs = {}
        for side in ("a", "b"):
            run = tmp_path / side
            shutil.copytree(demo[side], run)
            frame = _verdicts(run)
            fixed = frame.index[frame["id"] == "lvr-0283"]  # a search-side row widening fixes
            assert len(fixed) == 1
            k = fixed[0]
            frame.loc[k, "id"] = "lvr-0283\"><script>document.title='pwned'</script>"
            frame.loc[k, "source"] = bad[0] + " " + frame.loc[k, "source"]
            frame.loc[k, "reference"] = bad[1] + " " + frame.loc[k, "reference"]
            frame.loc[k, "output"] = " ".join(bad[5:]) + " " + frame.loc[k, "output"]
            frame.to_csv(run / "verdicts.csv", index=False, lineterminator="\n")
            s = json.loads((run / "summary.json").read_text())
            s["data"]["path"] = f"dev <img src={url}/data.png onerror=document.title='pwned'>.tsv"
            (run / "summary.json").write_text(json.dumps(s))
            runs[side] = run
        out = tmp_path / "page"
        labels = ("<script>document.title='pwned'</script>", f"\"><img src={url}/l.png>")
        rc, _, stderr = _compare(capsys, str(runs["a"]), str(runs["b"]), "--out", str(out),
                                 "--labels", ",".join(labels))
        assert rc == 0, stderr
        c = json.loads((out / "compare.json").read_text(encoding="utf-8"))
        assert any("<script>" in r["id"] for r in c["fixed"])  # the hostile row is listed
        page_url = (out / "compare.html").as_uri()
        dom, console = browse(page_url, "--dump-dom")
        seen = list(hits)
    assert "</html>" in dom
    page = parse(dom)
    # the labels are in the title as text; a script that ran would have made it 'pwned'
    assert page.title == f"Before and after: {labels[0]} against {labels[1]}"
    assert not [t for t, _ in page.tags if t in ("img", "iframe", "link", "image", "script")]
    assert seen == [], f"the page requested {seen}"
    assert console == [], console
    # the hostile texts are on the page as text
    assert "&lt;script&gt;document.title='pwned'&lt;/script&gt;" in dom
    html = (out / "compare.html").read_text(encoding="utf-8")
    assert re.search(r'<meta http-equiv="Content-Security-Policy" content="default-src \'none\';[^"]*'
                     r"script-src 'none'", html)
    assert not math.isnan(c["corpus_metric"]["test"]["difference"])
    assert os.path.getsize(out / "compare.html") < 200_000


def _copy_with_summary(src: Path, dst: Path, edit) -> Path:
    if dst.exists():
        shutil.rmtree(dst)
    shutil.copytree(src, dst)
    s = json.loads((dst / "summary.json").read_text())
    edit(s)
    (dst / "summary.json").write_text(json.dumps(s))
    return dst


def test_a_new_model_is_what_fix_model_asked_for(demo):
    """B's summary names other model weights (as a retrained model's would): the follow-up aims at A's
    model-side rows and calls fix-model followed."""
    from triage.compare import compare_runs

    a = _copy_with_summary(demo["a"], demo["tmp"] / "fm-a",
                           lambda s: s["recommendation"].update(action="fix-model"))
    b = _copy_with_summary(demo["b"], demo["tmp"] / "fm-b", lambda s: s["model"].update(sha256="0" * 64))
    c = compare_runs(a, b)
    fu = c.follow_up
    assert fu.followed is True and fu.target == "model-side"
    assert [x.what for x in fu.changes] == ["beam", "model"]
    va, vb = _verdicts(a).set_index("id"), _verdicts(b).set_index("id")
    model_ids = va.index[va["verdict"] == "model"]
    # reference: pandas over the two verdicts.csv
    assert fu.target_rows == len(model_ids)
    assert fu.now_correct == int((vb.loc[model_ids, "verdict"] == "correct").sum())
    worse = (pd.to_numeric(vb.loc[model_ids, "chrf"]) < pd.to_numeric(va.loc[model_ids, "chrf"])).sum()
    assert fu.model_rows_worse == int(worse)
    assert fu.achieved.startswith(f"Changed the model (caad30736c6d… -> 000000000000…): {fu.now_correct} of "
                                  f"{len(model_ids)} model-side rows now correct")


def test_references_from_verdicts_csv_when_the_data_file_is_gone(demo, compared):
    from triage.compare import compare_runs

    _, c = compared
    a = _copy_with_summary(demo["a"], demo["tmp"] / "gone-a", lambda s: s["data"].update(path="/nonexistent.tsv"))
    got = compare_runs(a, demo["b"]).corpus_metric
    assert "verdicts.csv" in got.references and "every reference" in c["corpus_metric"]["references"]
    # one reference per row in the demo: the best reference is every reference, the scores are the same
    assert got.complete is True and got.note is None
    assert got.test.score_a == pytest.approx(c["corpus_metric"]["test"]["score_a"], abs=1e-9)
    assert got.test.p_value == pytest.approx(c["corpus_metric"]["test"]["p_value"], abs=1e-12)
