"""Every file in tests/bad_inputs/ must be refused with one clear line naming the file and the problem.

tests/bad_inputs/EXPECTED.tsv lists, per file: a substring the message must contain, and the
line the error must point at (empty where no single line is to blame, e.g. an empty file).
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from triage.data.devset import read_devset
from triage.errors import InputError

HERE = Path(__file__).parent / "bad_inputs"
TABLE = HERE / "EXPECTED.tsv"


def _expected() -> list[dict[str, str]]:
    with open(TABLE, encoding="utf-8", newline="") as f:
        return list(csv.DictReader(f, delimiter="\t", quoting=csv.QUOTE_NONE))


CASES = _expected()


def test_table_lists_every_file_once():
    listed = [row["file"] for row in CASES]
    on_disk = sorted(p.name for p in HERE.iterdir() if p.name not in ("EXPECTED.tsv", ".gitattributes"))
    assert sorted(listed) == on_disk
    assert len(set(listed)) == len(listed)


@pytest.mark.parametrize("case", CASES, ids=[row["file"] for row in CASES])
def test_bad_input_is_refused_with_one_line(case):
    path = HERE / case["file"]
    with pytest.raises(InputError) as info:
        read_devset(str(path))
    err = info.value
    text = str(err)
    assert case["expect"] in text
    assert "\n" not in text
    assert str(path) in text  # names the file
    assert err.exit_code == 2
    if case["line"]:
        assert err.line == int(case["line"])
        assert f"{path}:{case['line']}:" in text
    else:
        assert err.line is None
