"""The dev-set reader against files written by outside writers (Python's csv and json modules,
pandas' to_csv) and against hand-written bytes whose rows and line numbers are worked out by hand."""

from __future__ import annotations

import csv
import hashlib
import io
import json
import re
import tracemalloc
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.data.devset import FRAME_COLUMNS, read_devset, stream_devset
from triage.errors import InputError, OptionError


def write(tmp_path: Path, name: str, data: bytes | str) -> str:
    p = tmp_path / name
    p.write_bytes(data.encode("utf-8") if isinstance(data, str) else data)
    return str(p)


def records(devset) -> list[dict]:
    return devset.frame.to_dict("records")


# ----------------------------------------------------------------------------- TSV


def test_tsv_basic_rows_ids_lines_and_metadata(tmp_path):
    data = "id\tsource\treference\toutput\nx1\tHallo Welt\tHello world\tHello world\nx2\tJa\tYes\t\n"
    path = write(tmp_path, "news.tsv", data)
    ds = read_devset(path)
    assert list(ds.frame.columns) == FRAME_COLUMNS
    assert records(ds) == [
        {"id": "x1", "source": "Hallo Welt", "references": ["Hello world"], "output": "Hello world", "line": 2},
        # an empty output cell is a legitimate (empty) output, kept as ""
        {"id": "x2", "source": "Ja", "references": ["Yes"], "output": "", "line": 3},
    ]
    assert ds.fmt == "tsv" and ds.has_output and ds.name == "news" and ds.path == path
    assert ds.sha256 == hashlib.sha256(data.encode("utf-8")).hexdigest()
    assert len(ds) == 2


def test_tsv_without_output_or_id_numbers_rows_and_has_no_output(tmp_path):
    path = write(tmp_path, "d.tsv", "source\treference\na\tb\nc\td\ne\tf\n")
    ds = read_devset(path)
    assert list(ds.frame["id"]) == ["1", "2", "3"]
    assert list(ds.frame["output"]) == [None, None, None]
    assert not ds.has_output
    assert list(ds.frame["line"]) == [2, 3, 4]


def test_tsv_literal_nan_like_texts_stay_text(tmp_path):
    words = ["NaN", "nan", "null", "NULL", "NA", "N/A", "None", "#N/A", "-nan", "1.#IND", "<NA>", "0"]
    body = "".join(f"{w}\t{w}\t{w}\n" for w in words)
    ds = read_devset(write(tmp_path, "nan.tsv", "source\treference\toutput\n" + body))
    assert list(ds.frame["source"]) == words
    assert [r[0] for r in ds.frame["references"]] == words
    assert list(ds.frame["output"]) == words
    assert all(isinstance(v, str) for v in ds.frame["source"])


def test_tsv_raw_quotes_are_text(tmp_path):
    # Written like a script writes TSV: no quoting, quotes belong to the text.
    data = 'source\treference\n"Stop!"\t"Stop!"\n"Ja," sagte er\t"Yes," he said\nEr sagte "ja"\tHe said "yes"\n'
    ds = read_devset(write(tmp_path, "raw.tsv", data))
    assert list(ds.frame["source"]) == ['"Stop!"', '"Ja," sagte er', 'Er sagte "ja"']
    assert [r[0] for r in ds.frame["references"]] == ['"Stop!"', '"Yes," he said', 'He said "yes"']


def test_tsv_written_by_pandas_with_tabs_newlines_quotes(tmp_path):
    frame = pd.DataFrame(
        {
            "source": ['Er sagte "hallo"', "A\tB", "zwei\nZeilen", '"Stop!"'],
            "reference": ['He said "hello"', "a\tb", "two\nlines", '"Stop!"'],
            "output": ["", "x", "y", "z"],
        }
    )
    path = tmp_path / "pd.tsv"
    frame.to_csv(path, sep="\t", index=False)  # pandas quotes only where needed (QUOTE_MINIMAL)
    ds = read_devset(str(path))
    assert list(ds.frame["source"]) == list(frame["source"])
    assert [r[0] for r in ds.frame["references"]] == list(frame["reference"])
    assert list(ds.frame["output"]) == ["", "x", "y", "z"]
    # rows 1-2 are one line each, row 3 has a line break in two cells (lines 4-6), row 4 is on line 7
    assert list(ds.frame["line"]) == [2, 3, 4, 7]


def test_tsv_quote_everything_export(tmp_path):
    buf = io.StringIO()
    w = csv.writer(buf, delimiter="\t", quoting=csv.QUOTE_ALL, lineterminator="\r\n")
    w.writerow(["source", "reference"])
    w.writerow(["Stop!", "Stop!"])
    w.writerow(["a\tb", 'say "x"'])
    ds = read_devset(write(tmp_path, "all.tsv", buf.getvalue()))
    assert list(ds.frame["source"]) == ["Stop!", "a\tb"]
    assert [r[0] for r in ds.frame["references"]] == ["Stop!", 'say "x"']


def test_tsv_with_broken_quoting_but_valid_raw_layout_reads_raw(tmp_path):
    # "Ja, sagte er" with a stray quote is not valid quoted TSV, but every line has two cells.
    data = 'source\treference\n"Ja\t"Yes\nok\t"He said ""hi"""\n'
    ds = read_devset(write(tmp_path, "mixed.tsv", data))
    assert list(ds.frame["source"]) == ['"Ja', "ok"]
    assert [r[0] for r in ds.frame["references"]] == ['"Yes', '"He said ""hi"""']


def test_bom_and_crlf_are_accepted(tmp_path):
    data = "\ufeffsource\treference\toutput\r\nHallo\tHello\tHi\r\nWelt\tWorld\t\r\n"
    ds = read_devset(write(tmp_path, "bom.tsv", data))
    assert records(ds) == [
        {"id": "1", "source": "Hallo", "references": ["Hello"], "output": "Hi", "line": 2},
        {"id": "2", "source": "Welt", "references": ["World"], "output": "", "line": 3},
    ]
    # the hash is of the bytes as stored, BOM included
    assert ds.sha256 == hashlib.sha256(data.encode("utf-8")).hexdigest()
    csv_ds = read_devset(write(tmp_path, "bom.csv", "\ufeffsource,reference\r\n\"a,b\",c\r\n"))
    assert records(csv_ds)[0]["source"] == "a,b"
    js = read_devset(write(tmp_path, "bom.jsonl", '\ufeff{"source": "s", "reference": "r"}\r\n'))
    assert records(js)[0]["source"] == "s"


def test_trailing_blank_lines_and_missing_final_newline(tmp_path):
    ds = read_devset(write(tmp_path, "t.tsv", "source\treference\na\tb\n\n\n"))
    assert len(ds) == 1
    ds = read_devset(write(tmp_path, "u.tsv", "source\treference\na\tb"))
    assert records(ds)[0]["references"] == ["b"]


def test_line_separator_characters_do_not_split_a_row(tmp_path):
    # U+2028, U+0085, form feed and vertical tab are line breaks for str.splitlines, not for files
    text = "a\u2028b\x85c\x0cd\x0be"
    ds = read_devset(write(tmp_path, "ls.tsv", f"source\treference\n{text}\t{text}\nz\tz\n"))
    assert list(ds.frame["source"]) == [text, "z"]
    assert list(ds.frame["line"]) == [2, 3]


# ----------------------------------------------------------------------------- CSV


def test_csv_quoted_commas_newlines_tabs_and_line_numbers(tmp_path):
    data = (
        "id,source,reference,output\n"
        'a,"Hallo, Welt","Hello, world",\n'
        'b,"zwei\nZeilen\nhier","two\nlines\nhere","x"\n'
        'c,"Tab\tim Text","He said ""hi""","y"\n'
        "d,NaN,null,NA\n"
    )
    ds = read_devset(write(tmp_path, "q.csv", data))
    assert ds.fmt == "csv"
    assert records(ds) == [
        {"id": "a", "source": "Hallo, Welt", "references": ["Hello, world"], "output": "", "line": 2},
        {"id": "b", "source": "zwei\nZeilen\nhier", "references": ["two\nlines\nhere"], "output": "x", "line": 3},
        # record b spans lines 3-7 (two line breaks in each of two cells)
        {"id": "c", "source": "Tab\tim Text", "references": ['He said "hi"'], "output": "y", "line": 8},
        {"id": "d", "source": "NaN", "references": ["null"], "output": "NA", "line": 9},
    ]


def test_csv_crlf_with_embedded_newline(tmp_path):
    # spreadsheets end rows with CRLF and keep the line break inside a cell as it was typed
    data = b'source,reference\r\n"eins\nzwei",one\r\ndrei,three\r\n'
    ds = read_devset(write(tmp_path, "x.csv", data))
    assert records(ds) == [
        {"id": "1", "source": "eins\nzwei", "references": ["one"], "output": None, "line": 2},
        {"id": "2", "source": "drei", "references": ["three"], "output": None, "line": 4},
    ]


def test_csv_cell_longer_than_the_csv_module_default_limit(tmp_path):
    long = "x" * 300_000  # the csv module refuses cells over 131072 characters by default
    ds = read_devset(write(tmp_path, "long.csv", f'source,reference\n"{long}",{long}\n'))
    assert ds.frame["source"][0] == long
    assert csv.field_size_limit() == 131072  # restored afterwards


# ----------------------------------------------------------------------------- references, mapping


def test_multi_reference_columns_with_empty_extra_cells(tmp_path):
    data = (
        "source\treference\treference_2\treference_3\n"
        "a\tr1\tr2\tr3\n"
        "b\tr1\t\tr3\n"
        "c\tr1\t\t\n"
    )
    ds = read_devset(write(tmp_path, "m.tsv", data))
    assert list(ds.frame["references"]) == [["r1", "r2", "r3"], ["r1", "r3"], ["r1"]]


def test_reference_columns_are_ordered_by_number(tmp_path):
    data = "reference_10\treference_2\tsource\treference\nr10\tr2\ts\tr1\n"
    ds = read_devset(write(tmp_path, "o.tsv", data))
    assert list(ds.frame["references"]) == [["r1", "r2", "r10"]]


def test_column_mapping(tmp_path):
    data = "seg\tsrc\tref\tref_2\thyp\nk1\tHallo\tHello\tHi\tHey\n"
    path = write(tmp_path, "map.tsv", data)
    ds = read_devset(path, columns={"id": "seg", "source": "src", "reference": "ref", "output": "hyp"})
    assert records(ds) == [{"id": "k1", "source": "Hallo", "references": ["Hello", "Hi"], "output": "Hey", "line": 2}]
    ds = read_devset(path, columns={"source": "src", "reference": "hyp", "reference_2": "ref"})
    assert list(ds.frame["references"]) == [["Hey", "Hello"]]
    with pytest.raises(InputError, match=r"missing column 'target' \(for output\); columns found: 'seg'"):
        read_devset(path, columns={"source": "src", "reference": "ref", "output": "target"})
    with pytest.raises(OptionError, match="unknown column role 'hypothesis'"):
        read_devset(path, columns={"hypothesis": "hyp"})


def test_jsonl_list_references_extra_keys_ids_and_mapping(tmp_path):
    lines = [
        {"id": 3, "source": "Hallo", "reference": ["Hello", "Hi"], "output": "Hey"},
        {"id": "b", "source": "NaN", "reference": "null", "reference_2": "", "output": ""},
        {"id": "c", "source": "x", "reference": "y", "reference_2": "z", "output": "w", "extra": [1]},
    ]
    path = write(tmp_path, "d.jsonl", "".join(json.dumps(x) + "\n" for x in lines))
    ds = read_devset(path)
    assert ds.fmt == "jsonl" and ds.has_output and ds.name == "d"
    assert records(ds) == [
        {"id": "3", "source": "Hallo", "references": ["Hello", "Hi"], "output": "Hey", "line": 1},
        {"id": "b", "source": "NaN", "references": ["null"], "output": "", "line": 2},
        {"id": "c", "source": "x", "references": ["y", "z"], "output": "w", "line": 3},
    ]
    mapped = write(tmp_path, "m.jsonl", json.dumps({"src": "a", "tgt": "b"}) + "\n")
    ds = read_devset(mapped, columns={"source": "src", "reference": "tgt"})
    assert records(ds) == [{"id": "1", "source": "a", "references": ["b"], "output": None, "line": 1}]
    assert not ds.has_output


def test_fmt_overrides_the_file_name(tmp_path):
    path = write(tmp_path, "data.dat", "source,reference\na,b\n")
    assert read_devset(path, fmt="csv").frame["source"][0] == "a"
    with pytest.raises(InputError, match="cannot tell the dev-set format"):
        read_devset(path)


# ----------------------------------------------------------------------------- plain text


def test_plain_text_triple(tmp_path):
    src = write(tmp_path, "dev.de", "Hallo\nWelt\nNaN\n")
    ref = write(tmp_path, "dev.en", "Hello\nWorld\nnull\n")
    ref2 = write(tmp_path, "dev2.en", "Hi\n\nNA\n")
    out = write(tmp_path, "dev.hyp", "Hello\n\nnan\n")
    ds = read_devset(source=src, references=[ref, ref2], output=out)
    assert ds.fmt == "text" and ds.has_output and ds.name == "dev"
    assert ds.path == ",".join([src, ref, ref2, out])
    assert records(ds) == [
        {"id": "1", "source": "Hallo", "references": ["Hello", "Hi"], "output": "Hello", "line": 1},
        {"id": "2", "source": "Welt", "references": ["World"], "output": "", "line": 2},
        {"id": "3", "source": "NaN", "references": ["null", "NA"], "output": "nan", "line": 3},
    ]
    digests = "".join(hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in (src, ref, ref2, out))
    assert ds.sha256 == hashlib.sha256(digests.encode("ascii")).hexdigest()


def test_plain_text_without_output_with_bom_crlf_and_no_final_newline(tmp_path):
    src = write(tmp_path, "s.txt", "\ufeffeins\r\nzwei\u2028drei")
    ref = write(tmp_path, "r.txt", "one\r\ntwo three\r\n")
    ds = read_devset(source=src, references=[ref])
    assert not ds.has_output
    assert records(ds) == [
        {"id": "1", "source": "eins", "references": ["one"], "output": None, "line": 1},
        {"id": "2", "source": "zwei\u2028drei", "references": ["two three"], "output": None, "line": 2},
    ]


def test_plain_text_line_counts_differ(tmp_path):
    src = write(tmp_path, "s.txt", "a\nb\nc\n")
    ref = write(tmp_path, "r.txt", "a\nb\n")
    out = write(tmp_path, "o.txt", "a\nb\nc\nd\n")
    with pytest.raises(InputError) as info:
        read_devset(source=src, references=[ref], output=out)
    text = str(info.value)
    assert f"{src} has 3, {ref} has 2, {out} has 4" in text
    assert "different numbers of lines" in text


def test_plain_text_empty_source_line_and_empty_file(tmp_path):
    src = write(tmp_path, "s.txt", "a\n\nc\n")
    ref = write(tmp_path, "r.txt", "a\nb\nc\n")
    with pytest.raises(InputError, match=r"s\.txt:2: the source line is empty"):
        read_devset(source=src, references=[ref])
    with pytest.raises(InputError, match=r"s\.txt:2: the reference line is empty"):
        read_devset(source=ref, references=[src])
    empty = write(tmp_path, "e.txt", "")
    with pytest.raises(InputError, match=r"e\.txt: the file is empty"):
        read_devset(source=empty, references=[empty])


def test_plain_text_not_utf8_names_the_file(tmp_path):
    src = write(tmp_path, "s.txt", "a\nb\n")
    ref = write(tmp_path, "r.txt", "a\n\xff\n".encode("latin-1"))
    with pytest.raises(InputError, match=r"r\.txt:2: bytes that are not valid UTF-8 \(0xff at byte offset 2"):
        read_devset(source=src, references=[ref])


# ----------------------------------------------------------------------------- arguments


def test_argument_errors(tmp_path):
    path = write(tmp_path, "d.tsv", "source\treference\na\tb\n")
    with pytest.raises(OptionError):
        read_devset()
    with pytest.raises(OptionError):
        read_devset(path, source=path, references=[path])
    with pytest.raises(OptionError):
        read_devset(source=path)  # no reference file
    with pytest.raises(OptionError):
        read_devset(path, fmt="xml")
    with pytest.raises(OptionError):
        read_devset(path, columns={"source": "a", "reference": "a"})
    with pytest.raises(InputError, match="file not found"):
        read_devset(str(tmp_path / "nope.tsv"))
    with pytest.raises(InputError, match="is a folder"):
        read_devset(str(tmp_path))
    with pytest.raises(InputError, match="cannot be a whole dev set"):
        read_devset(write(tmp_path, "d.txt", "a\n"))


# ----------------------------------------------------------------------------- streaming


def _big_csv(tmp_path: Path, n: int) -> str:
    p = tmp_path / "big.csv"
    with open(p, "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f)
        w.writerow(["id", "source", "reference", "output"])
        for i in range(n):
            w.writerow([f"r{i}", f"Quelle {i}, mit Komma", f"reference {i}\nsecond line", f"out {i}" if i % 3 else ""])
    return str(p)


def test_chunks_concatenate_to_the_full_read(tmp_path):
    path = _big_csv(tmp_path, 25)
    chunks = list(stream_devset(path).chunks(10))
    assert [len(c) for c in chunks] == [10, 10, 5]
    whole = read_devset(path).frame
    pd.testing.assert_frame_equal(pd.concat(chunks, ignore_index=True), whole)
    # each record spans two lines (the reference holds a line break)
    assert list(whole["line"][:3]) == [2, 4, 6]


def test_streaming_is_lazy_and_duplicates_across_chunks_are_caught(tmp_path):
    data = "source\treference\n" + "".join(f"s{i}\tr{i}\n" for i in range(5)) + "bad\n"
    it = stream_devset(write(tmp_path, "late.csv", data.replace("\t", ","))).chunks(2)
    first = next(it)  # handed out before the broken last line is read
    assert list(first["source"]) == ["s0", "s1"]
    with pytest.raises(InputError, match=r"late\.csv:7: row has 1 cells but the header has 2"):
        list(it)
    dup = "id,source,reference\n" + "".join(f"k{i},s,r\n" for i in range(5)) + "k1,s,r\n"
    with pytest.raises(InputError, match=r"id 'k1' appears twice: on line 3 and line 7"):
        list(stream_devset(write(tmp_path, "dup.csv", dup)).chunks(2))


def test_streaming_memory_stays_bounded(tmp_path):
    path = _big_csv(tmp_path, 8_000)
    tracemalloc.start()
    try:
        rows = 0
        for chunk in stream_devset(path).chunks(500):
            rows += len(chunk)
        _, stream_peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        whole = read_devset(path)
        _, full_peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert rows == len(whole) == 8_000
    # the streamed read holds one chunk (plus the ids); the full read holds every row
    assert stream_peak * 3 < full_peak


# ----------------------------------------------------------------------------- round trips

# Texts a dev set may hold. NUL and lone surrogates are excluded: NUL is refused as a sign of a
# binary or UTF-16 file, and lone surrogates cannot be written as UTF-8 at all.
_chars = st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00")
_short = st.one_of(
    st.text(_chars, max_size=40),
    st.text(st.sampled_from(list('\t\n\r",; \'\\NaN\u2028\ufeff')), max_size=12),
)
# now and then a very long line: over the csv module's default 131072-character cell limit
_long = st.builds(lambda c, n: c * n, st.sampled_from(["x", "\u00e9", '"', "\t"]), st.integers(131_000, 133_000))
_text = st.integers(0, 7).flatmap(lambda k: _long if k == 0 else _short)
_content = _text.filter(lambda s: s.strip() != "")  # source and reference must hold some text
_row = st.tuples(_content, st.lists(_content, min_size=1, max_size=3), _text)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(rows=st.lists(_row, min_size=1, max_size=6), quote_all=st.booleans())
def test_csv_and_jsonl_round_trip(tmp_path_factory, rows, quote_all):
    tmp = tmp_path_factory.mktemp("rt")
    n_refs = max(len(refs) for _, refs, _ in rows)
    ref_cols = ["reference"] + [f"reference_{k}" for k in range(2, n_refs + 1)]
    # CSV written by Python's csv module, its default dialect (CRLF row ends). With a "\n"
    # terminator the module leaves a cell holding a lone "\r" unquoted, which no reader can undo.
    buf = io.StringIO()
    w = csv.writer(buf, quoting=csv.QUOTE_ALL if quote_all else csv.QUOTE_MINIMAL)
    w.writerow(["source", *ref_cols, "output"])
    for src, refs, out in rows:
        w.writerow([src, *refs, *[""] * (n_refs - len(refs)), out])
    csv_ds = read_devset(write(tmp, "rt.csv", buf.getvalue()))
    # JSONL written by the json module, references as a list
    jsonl = "".join(
        json.dumps({"source": s, "reference": refs, "output": o}, ensure_ascii=False) + "\n" for s, refs, o in rows
    )
    json_ds = read_devset(write(tmp, "rt.jsonl", jsonl))
    expected = [(s, refs, o) for s, refs, o in rows]
    for ds in (csv_ds, json_ds):
        got = [(r["source"], r["references"], r["output"]) for r in records(ds)]
        assert got == expected
        assert list(ds.frame["id"]) == [str(i) for i in range(1, len(rows) + 1)]
    assert list(json_ds.frame["line"]) == list(range(1, len(rows) + 1))
    # CSV start lines: header is line 1, each record takes 1 + (its line breaks) physical lines
    starts, line = [], 2
    for s, refs, o in rows:
        starts.append(line)
        cells = [s, *refs, o]
        line += 1 + sum(c.count("\n") for c in cells)
    # a lone "\r" inside a quoted cell is not a line break for the reader (lines split on "\n")
    assert list(csv_ds.frame["line"]) == starts


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(rows=st.lists(_row, min_size=1, max_size=6))
def test_tsv_written_by_the_csv_module_round_trips(tmp_path_factory, rows):
    tmp = tmp_path_factory.mktemp("rt")
    buf = io.StringIO()
    w = csv.writer(buf, delimiter="\t")  # quotes cells holding a tab, quote, CR or LF
    w.writerow(["source", "reference", "output"])
    for src, refs, out in rows:
        w.writerow([src, refs[0], out])
    path = write(tmp, "rt.tsv", buf.getvalue())
    try:
        ds = read_devset(path)
    except InputError as err:
        # the bytes are also valid raw TSV with other rows: the reader must say so, and the
        # named dialect must then read the rows exactly
        assert "reads two ways" in str(err)
        ds = read_devset(path, fmt="tsv-quoted")
    assert [(r["source"], r["references"], r["output"]) for r in records(ds)] == [
        (s, refs[:1], o) for s, refs, o in rows
    ]


# A raw cell that looks exactly like a quoted cell with a doubled quote inside ("a""b") is read
# as quoted (module docstring); such texts are left out of the raw round trip. Files that are
# valid both ways with different rows are refused (checked below) and read with the named dialect.
_looks_quoted = re.compile(r'^"(?:[^"]|"")*""(?:[^"]|"")*"$', re.S)
_raw_text = st.one_of(
    st.text(_chars.filter(lambda c: c not in "\t\n\r"), max_size=40),
    st.text(st.sampled_from(list('" ,;\'\\NaN\u2028\u0085')), max_size=12),
).filter(lambda s: not _looks_quoted.match(s))
_raw_content = _raw_text.filter(lambda s: s.strip() != "")


@settings(max_examples=80, deadline=None)
@given(rows=st.lists(st.tuples(_raw_content, _raw_content, _raw_text), min_size=1, max_size=6))
def test_raw_tsv_keeps_quotes_as_text(tmp_path_factory, rows):
    tmp = tmp_path_factory.mktemp("raw")
    data = "source\treference\toutput\n" + "".join(f"{s}\t{r}\t{o}\n" for s, r, o in rows)
    path = write(tmp, "raw.tsv", data)
    try:
        ds = read_devset(path)
    except InputError as err:
        assert "reads two ways" in str(err)
        # check the claim with Python's csv module: the same text is valid quoted TSV, 3 cells a row
        quoted = list(csv.reader(io.StringIO(data, newline=""), delimiter="\t", strict=True))
        assert all(len(r) == 3 for r in quoted) and len(quoted) != len(rows) + 1
        ds = read_devset(path, fmt="tsv-raw")
    assert [(r["source"], r["references"], r["output"]) for r in records(ds)] == [(s, [r], o) for s, r, o in rows]
    assert list(ds.frame["line"]) == list(range(2, len(rows) + 2))


def test_named_tsv_dialect_reads_an_ambiguous_file(tmp_path):
    # valid raw TSV (2 rows, the quotes are text) and valid quoted TSV (1 row, one cell spanning lines)
    path = write(tmp_path, "two.tsv", 'source\treference\toutput\n;\t"\t\nN\t"\t\n')
    with pytest.raises(InputError, match="reads two ways: as 2 rows with quotes as text, or as 1 rows"):
        read_devset(path)
    raw = read_devset(path, fmt="tsv-raw")
    assert raw.fmt == "tsv"
    assert records(raw) == [
        {"id": "1", "source": ";", "references": ['"'], "output": "", "line": 2},
        {"id": "2", "source": "N", "references": ['"'], "output": "", "line": 3},
    ]
    quoted = read_devset(path, fmt="tsv-quoted")
    assert records(quoted) == [{"id": "1", "source": ";", "references": ["\t\nN\t"], "output": "", "line": 2}]
