"""Read a dev set (source, one or more references, optionally the decoded output) from disk.

Formats
-------
tsv    tab-separated with a header row (.tsv, .tab)
csv    comma-separated with a header row (.csv), standard double-quote quoting
jsonl  one JSON object per line (.jsonl, .ndjson, .json)
text   plain-text files, one segment per line: source=, references=[...], output=

Columns (JSON keys) are ``source``, ``reference``, ``output`` (optional) and ``id``
(optional; the default id is the 1-based row number). Extra references go in
``reference_2``, ``reference_3``, ... (an empty cell there means "no extra reference"),
or, in JSONL, ``reference`` may be a list of strings. ``columns`` maps our names to the
file's names, e.g. ``{"source": "src", "reference": "ref"}``.

Quoting in TSV files
--------------------
Tab-separated files reach us in two dialects. Scripts usually write them raw (a cell is
everything between two tabs, quotes are ordinary text: ``"Stop!" he said``). Spreadsheets,
pandas' ``to_csv(sep="\\t")`` and Python's csv module quote a cell that holds a tab, a line
break or a double quote (``"He said ""hi"" twice"``). The reader decides per file:

* no cell starts with a double quote: raw (both dialects give the same cells);
* a quoted header, or a cell written the quoted way with a doubled quote inside, or a
  quoted cell holding a tab or line break, or rows that only have the right number of
  cells when quotes are honoured: quoted, and the file must be valid quoted TSV (an
  unbalanced quote is an error);
* otherwise (quotes at cell starts, but no sign of quoting): raw, quotes kept as text.
  If the file is not valid quoted TSV but is valid raw TSV, it is read raw.
* a file that is valid both ways but gives different rows (quoted cells spanning lines
  versus quotes as text) is refused as ambiguous; ``fmt="tsv-raw"`` or ``fmt="tsv-quoted"``
  names the dialect and skips the detection.

A raw file in which some cell is a whole text wrapped in quotes *and* another cell uses
doubled quotes is read as quoted; write such data as JSONL to be unambiguous.

CSV files are always read with quoting (strict: text after a closing quote is an error).

Text is never converted to "missing": the cells ``NaN``, ``null``, ``NA`` are text. An empty
source or reference is an error; an empty output is kept as "" (the model produced nothing).
In JSONL, ``"output": null`` counts as no output; an output must be given on every line or on none.
Every input record becomes exactly one row, in input order, with the 1-based line number
where the record starts. Files are read as UTF-8 (a byte-order mark is dropped, CRLF line
ends are accepted). Reading streams (see ``stream_devset``), so a dev set larger than
memory can be processed chunk by chunk.

Line splitting is done on ``\\n`` bytes only, so characters such as U+2028 or form feed
inside a segment do not split it (``str.splitlines`` would).
"""

from __future__ import annotations

import csv
import hashlib
import json
import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from triage.errors import InputError, OptionError

FORMATS = ("tsv", "csv", "jsonl", "text")
# accepted as ``fmt`` too: a TSV file read in a named dialect instead of the detected one
TSV_DIALECTS = {"tsv-raw": "raw", "tsv-quoted": "quoted"}
_EXTENSIONS = {".tsv": "tsv", ".tab": "tsv", ".csv": "csv", ".jsonl": "jsonl", ".ndjson": "jsonl", ".json": "jsonl"}
_ROLES = ("id", "source", "reference", "output")
_EXTRA_REF = re.compile(r"^reference_(\d+)$")
# longest cell accepted (characters); longer almost always means an unbalanced quote
MAX_CELL_CHARS = 1 << 24
FRAME_COLUMNS = ["id", "source", "references", "output", "line"]


@dataclass
class DevSet:
    frame: pd.DataFrame  # id, source, references (list[str]), output (str | None), line (int)
    path: str  # display path (comma-joined for plain-text files)
    sha256: str  # of the input bytes; several files: sha256 of their hex digests joined in order
    fmt: str  # "tsv" | "csv" | "jsonl" | "text"
    has_output: bool
    name: str  # dev-set name (file stem), used for the default output folder

    def __len__(self) -> int:
        return len(self.frame)


# ----------------------------------------------------------------------------- public API


def stream_devset(
    path: str | None = None,
    *,
    source: str | None = None,
    references: list[str] | None = None,
    output: str | None = None,
    columns: dict[str, str] | None = None,
    fmt: str | None = None,
) -> DevSetStream:
    """The dev set as a stream: read from disk step by step, never whole (see DevSetStream).

    This is the one reader: ``read_devset`` reads the same stream through to the end, and
    ``stream_devset(...).chunks(n)`` hands it out ``n`` rows at a time.
    """
    spec = _Spec.make(path, source, references, output, columns, fmt)
    return DevSetStream(spec, spec.display, spec.fmt, spec.name)


def read_devset(path: str | None = None, **where) -> DevSet:
    """The whole dev set in one DataFrame: ``stream_devset(path, **where).read()``.

    Takes stream_devset's arguments (``source``, ``references``, ``output``, ``columns``, ``fmt``).
    """
    return stream_devset(path, **where).read()


@dataclass
class DevSetStream:
    """A dev set read from disk in chunks each time it is iterated, so it never has to fit in memory.

    ``check()`` reads it through once: every error the file holds is raised before any work is
    done on it, and ``rows``, ``sha256`` and ``has_output`` are known afterwards (they are also
    filled in whenever ``chunks`` reaches the end). Memory while reading: one chunk, plus each
    row's id and line for the duplicate-id check (when the file has an id column).
    """

    spec: _Spec
    path: str
    fmt: str
    name: str
    rows: int | None = None
    sha256: str | None = None
    has_output: bool | None = None

    def chunks(self, chunk_rows: int = 10000) -> Iterator[pd.DataFrame]:
        """DataFrames of exactly ``chunk_rows`` rows (the last one may be shorter), columns as DevSet.frame."""
        if chunk_rows < 1:
            raise OptionError(f"chunk_rows must be at least 1, got {chunk_rows}")
        meta: dict = {}
        count = 0
        for frame in _chunks(self.spec, chunk_rows, meta):
            count += len(frame)
            yield frame
        if self.sha256 is not None and meta["sha256"] != self.sha256:
            raise InputError("the file changed while it was being read (its sha256 differs from the first reading)",
                             path=self.path, hint="run again once the file is no longer being written")
        self.rows, self.sha256, self.has_output = count, meta["sha256"], meta["has_output"]

    def check(self, chunk_rows: int = 10000) -> DevSetStream:
        for _ in self.chunks(chunk_rows):
            pass
        return self

    def read(self) -> DevSet:
        """Read the stream through once and hold every row (a DevSet)."""
        chunks = list(self.chunks(50_000))
        frame = pd.concat(chunks, ignore_index=True) if len(chunks) > 1 else chunks[0].reset_index(drop=True)
        return DevSet(frame=frame, path=self.path, sha256=str(self.sha256), fmt=self.fmt,
                      has_output=bool(self.has_output), name=self.name)


# ----------------------------------------------------------------------------- arguments


@dataclass
class _Spec:
    fmt: str
    files: list[Path]  # one file, or source, references..., [output]
    n_refs: int
    has_output_file: bool
    columns: dict[str, str]
    display: str
    name: str
    tsv_dialect: str | None = None  # "raw" | "quoted": named, or detected on the first reading

    @classmethod
    def make(cls, path, source, references, output, columns, fmt) -> _Spec:
        if fmt is not None and fmt not in FORMATS and fmt not in TSV_DIALECTS:
            raise OptionError(
                f"unknown dev-set format {fmt!r}", hint="use one of: " + ", ".join([*FORMATS, *TSV_DIALECTS])
            )
        columns = dict(columns or {})
        for key, value in columns.items():
            if key not in _ROLES and not _EXTRA_REF.match(key):
                raise OptionError(
                    f"unknown column role {key!r} in the column mapping",
                    hint="roles are id, source, reference, reference_2, ..., output",
                )
            if not isinstance(value, str) or not value.strip():
                raise OptionError(f"the column mapping gives no column name for {key!r}")
        mapped = [v.strip() for v in columns.values()]
        for value in set(mapped):
            if mapped.count(value) > 1:
                roles = [k for k, v in columns.items() if v.strip() == value]
                raise OptionError(f"the column mapping sends {' and '.join(roles)} to the same column {value!r}")

        if output is not None and source is None and path is not None:
            raise OptionError("a separate output file goes with plain-text source and reference files",
                              hint="put the outputs in an output column of the dev-set file")
        if source is not None or references is not None:
            if path is not None:
                raise OptionError(
                    "give either one dev-set file or plain-text source/reference files, not both"
                )
            if fmt not in (None, "text"):
                raise OptionError(f"plain-text source/reference files cannot be read as {fmt}")
            if source is None:
                raise OptionError("plain-text dev set: the source file is missing")
            if isinstance(references, str):
                references = [references]
            if not references:
                raise OptionError("plain-text dev set: give at least one reference file")
            if columns:
                raise OptionError("a column mapping applies to TSV, CSV and JSONL files, not plain text")
            files = [Path(source), *(Path(r) for r in references)] + ([Path(output)] if output else [])
            for f in files:
                _check_file(f)
            display = ",".join(str(f) for f in files)
            return cls("text", files, len(references), output is not None, {}, display, Path(source).stem)

        if path is None:
            raise OptionError("no dev set given", hint="give a .tsv, .csv or .jsonl file")
        p = Path(path)
        _check_file(p)
        if fmt is None:
            suffix = p.suffix.lower()
            if suffix == ".txt":
                raise InputError(
                    "a .txt file holds no columns, so it cannot be a whole dev set",
                    path=str(p),
                    hint="give plain-text files as source, reference(s) and output, one segment per line",
                )
            if suffix not in _EXTENSIONS:
                raise InputError(
                    f"cannot tell the dev-set format from the file name ending {suffix or '(none)'!r}",
                    path=str(p),
                    hint="save it as .tsv, .csv or .jsonl (UTF-8), or name the format explicitly",
                )
            fmt = _EXTENSIONS[suffix]
        if fmt == "text":
            raise OptionError("format 'text' needs source and reference files, not one dev-set file")
        dialect = TSV_DIALECTS.get(fmt)
        fmt = "tsv" if dialect else fmt
        return cls(fmt, [p], 0, False, {k: v.strip() for k, v in columns.items()}, str(path), p.stem, dialect)


def _check_file(p: Path) -> None:
    if not p.exists():
        raise InputError("file not found", path=str(p), hint="check the path")
    if p.is_dir():
        raise InputError("is a folder, not a dev-set file", path=str(p))


# ----------------------------------------------------------------------------- bytes -> lines


class _Lines:
    """Iterate a file's physical lines as text (line ending kept), with 1-based numbers.

    Bytes are hashed as they are read; a UTF-8 byte-order mark is dropped; bytes that are
    not UTF-8 or NUL bytes raise InputError with the line and byte offset.
    """

    def __init__(self, path: Path):
        self.path = path
        self.number = 0  # lines handed out so far
        self.hasher = hashlib.sha256()

    def __iter__(self) -> Iterator[str]:
        name = str(self.path)
        try:
            handle = open(self.path, "rb")
        except OSError as exc:
            raise InputError(f"cannot open the file: {exc.strerror or exc}", path=name) from None
        with handle:
            offset = 0
            for raw in handle:
                self.hasher.update(raw)
                self.number += 1
                if self.number == 1:
                    _sniff_binary(raw, name)
                    if raw.startswith(b"\xef\xbb\xbf"):
                        raw, offset = raw[3:], 3
                try:
                    text = raw.decode("utf-8")
                except UnicodeDecodeError as exc:
                    bad = raw[exc.start]
                    raise InputError(
                        f"bytes that are not valid UTF-8 (0x{bad:02x} at byte offset {offset + exc.start} of the "
                        f"file, byte {exc.start + 1} of the line)",
                        path=name,
                        line=self.number,
                        hint="save the file again with UTF-8 encoding",
                    ) from None
                if "\x00" in text:
                    raise InputError(
                        f"contains a NUL byte (byte offset {offset + raw.index(0)} of the file)",
                        path=name,
                        line=self.number,
                        hint="the file looks binary or UTF-16; save it as UTF-8 text",
                    )
                offset += len(raw)
                yield text

    @property
    def sha256(self) -> str:
        return self.hasher.hexdigest()


def _sniff_binary(head: bytes, name: str) -> None:
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError("the file is UTF-16 encoded", path=name, hint="save it again as UTF-8")
    if head.startswith(b"\x1f\x8b"):
        raise InputError("the file is gzip-compressed", path=name, hint="decompress it first")
    if head.startswith(b"PK\x03\x04"):
        raise InputError(
            "the file is a zip archive (a spreadsheet workbook?)",
            path=name,
            hint="export the sheet as UTF-8 .tsv or .csv",
        )


def _strip_eol(text: str) -> str:
    if text.endswith("\n"):
        text = text[:-1]
        if text.endswith("\r"):
            text = text[:-1]
    return text


def _is_blank(cells: list[str]) -> bool:
    return not cells or (len(cells) == 1 and not cells[0].strip())


# ----------------------------------------------------------------------------- tabular records


def _raw_records(lines: _Lines) -> Iterator[tuple[int, list[str]]]:
    """Raw TSV: one record per physical line, cells split on tabs, quotes are text."""
    for text in lines:
        yield lines.number, _strip_eol(text).split("\t")


def _quoted_records(lines: _Lines, delimiter: str) -> Iterator[tuple[int, list[str]]]:
    """Quoted TSV/CSV via the csv module (strict), each record with the line where it starts."""
    name = str(lines.path)
    reader = csv.reader(iter(lines), delimiter=delimiter, quotechar='"', doublequote=True, strict=True)
    shown = "tab" if delimiter == "\t" else repr(delimiter)
    while True:
        start = lines.number + 1
        try:
            with _cell_limit():
                cells = next(reader)
        except StopIteration:
            return
        except csv.Error as exc:
            text = str(exc)
            if "unexpected end of data" in text:
                raise InputError(
                    f"a quoted cell in the record starting on line {start} is never closed (unbalanced double quote)",
                    path=name,
                    line=start,
                    hint='close the quote; a quote that is part of the text is written as two quotes ("")',
                ) from None
            if "expected after" in text:
                err = InputError(
                    f"text follows the closing quote of a quoted cell (expected a {shown} or the line end)",
                    path=name,
                    line=lines.number,
                    hint='inside a quoted cell write each quote of the text as two quotes ("")',
                )
                err.kind = "after-quote"
                raise err from None
            if "field larger than field limit" in text:
                raise InputError(
                    f"a cell in the record starting on line {start} is longer than {MAX_CELL_CHARS} characters "
                    "(probably an unbalanced double quote)",
                    path=name,
                    line=start,
                    hint='check the quotes in that record; a quote in the text is written as ""',
                ) from None
            if "new-line character seen in unquoted field" in text:
                raise InputError(
                    "a carriage return (CR) inside a cell that is not quoted",
                    path=name,
                    line=lines.number,
                    hint="put that cell in double quotes, or remove the stray carriage return",
                ) from None
            raise InputError(f"cannot read the record: {text}", path=name, line=lines.number) from None
        yield start, cells


class _cell_limit:
    """Raise the csv module's per-cell limit (131072 by default) while we read, then restore it."""

    def __enter__(self):
        self.old = csv.field_size_limit(MAX_CELL_CHARS)

    def __exit__(self, *exc):
        csv.field_size_limit(self.old)


def _layout(records: Iterator[tuple[int, list[str]]], name: str, sep: str) -> Iterator[tuple[int, list[str]]]:
    """Check the layout: a header first, the same number of cells in every row, no blank rows
    between rows (blank lines at the end are ignored). Yields the header first, then rows."""
    header: list[str] | None = None
    blank_at: int | None = None
    for line, cells in records:
        if _is_blank(cells):
            if blank_at is None:
                blank_at = line
            continue
        if blank_at is not None:
            raise InputError(
                "blank line inside the dev set",
                path=name,
                line=blank_at,
                hint="remove it: after the header every line is one row" if header else "remove it: the header comes first",
            )
        if header is None:
            header = cells
            yield line, cells
            continue
        if len(cells) != len(header):
            raise InputError(
                f"row has {len(cells)} cells but the header has {len(header)}",
                path=name,
                line=line,
                hint=f"every row needs exactly one cell per column; look for a stray or missing {sep}",
            )
        yield line, cells
    if header is None:
        raise InputError("the file is empty", path=name, hint="a dev set needs a header row and at least one row")


def _tsv_dialect(spec: _Spec) -> str:
    """Decide 'raw' or 'quoted' for a TSV file (see the module docstring).

    The raw layout is checked in this pass; the quoted layout too when it is a candidate,
    so layout errors surface before any row is handed out."""
    path = spec.files[0]
    name = str(path)
    flags = {"quote": False, "evidence": False, "rows": 0}

    def scan() -> Iterator[tuple[int, list[str]]]:
        first = True
        for line, cells in _raw_records(_Lines(path)):
            for cell in cells:
                if cell.startswith('"'):
                    flags["quote"] = True
                    if first and len(cell) >= 2 and cell.endswith('"'):
                        flags["evidence"] = True  # quoted header: a quote-everything export
                    elif _QUOTED_WITH_DOUBLED.match(cell):
                        flags["evidence"] = True
            first = first and _is_blank(cells)
            flags["rows"] += not _is_blank(cells)
            yield line, cells

    records = scan()
    raw_error: InputError | None = None
    try:
        for _ in _layout(records, name, "tab"):
            pass
    except InputError as exc:
        raw_error = exc
        try:
            for _ in records:  # finish the scan for quotes
                pass
        except InputError:
            pass
    if not flags["quote"]:
        if raw_error is not None:
            raise raw_error
        return "raw"
    n_quoted = 0
    cr_inside = False  # a quoted cell holds a carriage return (raw reading keeps it, quotes and all)
    try:
        for _, cells in _layout(_quoted_records(_Lines(path), "\t"), name, "tab"):
            n_quoted += 1
            cr_inside = cr_inside or any("\r" in c for c in cells)
    except InputError as quoted_error:
        if raw_error is None:
            return "raw"  # quotes are ordinary text in this file
        # both readings fail: report the one that explains the file better
        if getattr(quoted_error, "kind", "") == "after-quote":
            raise raw_error from None
        if (raw_error.line or 0) < (quoted_error.line or 0):
            raise raw_error from None
        raise
    if raw_error is not None or flags["evidence"]:
        return "quoted"
    if n_quoted != flags["rows"]:
        raise InputError(
            f"the file reads two ways: as {flags['rows'] - 1} rows with quotes as text, or as "
            f"{n_quoted - 1} rows with quoted cells spanning lines",
            path=name,
            hint="name the TSV dialect (format tsv-raw or tsv-quoted), or save the data as JSONL",
        )
    return "quoted" if cr_inside else "raw"


_QUOTED_WITH_DOUBLED = re.compile(r'^"(?:[^"]|"")*""(?:[^"]|"")*"$', re.S)


# ----------------------------------------------------------------------------- rows


class _Rows:
    """Validate fields, fill defaults, catch duplicate ids, and cut the rows into DataFrames."""

    def __init__(self, name: str, chunk_rows: int, id_given: bool, has_output: bool):
        self.name = name
        self.chunk_rows = chunk_rows
        self.id_given = id_given
        self.has_output = has_output
        self.seen: dict[str, int] = {}
        self.count = 0
        self._reset()

    def _reset(self) -> None:
        self.cols: dict[str, list] = {c: [] for c in FRAME_COLUMNS}

    def add(self, line: int, id_: str | None, source: str, refs: list[str], output: str | None,
            where: dict[str, str]) -> pd.DataFrame | None:
        self.count += 1
        if self.id_given:
            if id_ is None or not id_.strip():
                raise InputError(f"the id is empty ({where['id']})", path=self.name, line=line,
                                 hint="give every row an id, or drop the id column to number rows")
        else:
            id_ = str(self.count)  # row numbers cannot repeat
        if self.id_given and id_ in self.seen:
            raise InputError(
                f"id {id_!r} appears twice: on line {self.seen[id_]} and line {line}",
                path=self.name,
                line=line,
                hint="ids must be unique",
            )
        if self.id_given:
            self.seen[id_] = line
        if not source.strip():
            raise InputError(f"the source is empty ({where['source']})", path=self.name, line=line,
                             hint="every row needs a source text; fill the cell or remove the row")
        if not refs or not refs[0].strip():
            raise InputError(f"the reference is empty ({where['reference']})", path=self.name, line=line,
                             hint="every row needs a reference; fill the cell or remove the row")
        c = self.cols
        c["id"].append(id_)
        c["source"].append(source)
        c["references"].append(refs)
        c["output"].append(output)
        c["line"].append(line)
        if len(c["line"]) >= self.chunk_rows:
            return self.flush()
        return None

    def flush(self) -> pd.DataFrame | None:
        if not self.cols["line"]:
            return None
        c = self.cols
        frame = pd.DataFrame(
            {
                "id": pd.Series(c["id"], dtype=object),
                "source": pd.Series(c["source"], dtype=object),
                "references": pd.Series(c["references"], dtype=object),
                "output": pd.Series(c["output"], dtype=object),
                "line": pd.Series(c["line"], dtype="int64"),
            }
        )
        self._reset()
        return frame


def _chunks(spec: _Spec, chunk_rows: int, meta: dict) -> Iterator[pd.DataFrame]:
    if spec.fmt == "text":
        rows = _text_rows(spec, chunk_rows, meta)
    elif spec.fmt == "jsonl":
        rows = _jsonl_rows(spec, chunk_rows, meta)
    else:
        rows = _table_rows(spec, chunk_rows, meta)
    return rows


def _finish(rows: _Rows, name: str, meta: dict, lines: Iterable[_Lines], empty_msg: str) -> Iterator[pd.DataFrame]:
    last = rows.flush()
    if last is not None:
        yield last
    if rows.count == 0:
        raise InputError(empty_msg, path=name, hint="a dev set needs at least one row")
    lines = list(lines)
    if len(lines) == 1:
        meta["sha256"] = lines[0].sha256
    else:
        meta["sha256"] = hashlib.sha256("".join(x.sha256 for x in lines).encode("ascii")).hexdigest()
    meta["has_output"] = rows.has_output


# ----------------------------------------------------------------------------- tsv / csv


def _table_rows(spec: _Spec, chunk_rows: int, meta: dict) -> Iterator[pd.DataFrame]:
    path = spec.files[0]
    name = str(path)
    sep = "tab" if spec.fmt == "tsv" else "comma"
    if spec.fmt == "tsv" and spec.tsv_dialect is None:
        spec.tsv_dialect = _tsv_dialect(spec)  # once per stream: a second pass reads the file as the first did
    dialect = spec.tsv_dialect if spec.fmt == "tsv" else "quoted"
    lines = _Lines(path)
    records = _raw_records(lines) if dialect == "raw" else _quoted_records(lines, "\t" if spec.fmt == "tsv" else ",")
    records = _layout(records, name, sep)
    _, header_cells = next(records)
    header = _header(header_cells, name)
    idx = _resolve(header, spec.columns, name)
    i_id, i_src, i_ref, i_out = idx["id"], idx["source"], idx["reference"], idx.get("output")
    extra = idx["extra"]
    rows = _Rows(name, chunk_rows, i_id is not None, i_out is not None)
    where = {role: f"column {header[i]!r}" for role in _ROLES if (i := idx.get(role)) is not None}

    for line, cells in records:
        refs = [cells[i_ref]] + [cells[i] for i in extra if cells[i].strip()]
        frame = rows.add(
            line,
            cells[i_id] if i_id is not None else None,
            cells[i_src],
            refs,
            cells[i_out] if i_out is not None else None,
            where,
        )
        if frame is not None:
            yield frame
    yield from _finish(rows, name, meta, [lines], "the file has a header but no rows")


def _header(cells: list[str], name: str) -> list[str]:
    header = [c.strip() for c in cells]
    seen: dict[str, int] = {}
    for i, h in enumerate(header, 1):
        if h in seen:
            raise InputError(
                f"column {h!r} appears twice in the header (columns {seen[h]} and {i})",
                path=name,
                line=1,
                hint="give every column a distinct name",
            )
        seen[h] = i
    return header


def _resolve(header: list[str], columns: dict[str, str], name: str) -> dict:
    """Find each role's column index; missing source/reference (or a mapped column) is an error."""
    index = {h: i for i, h in enumerate(header)}
    idx: dict = {}
    missing = []
    for role in _ROLES:
        want = columns.get(role, role)
        if want in index:
            idx[role] = index[want]
        elif role in ("source", "reference") or role in columns:
            missing.append(f"{want!r}" + (f" (for {role})" if want != role else ""))
        else:
            idx[role] = None
    if missing:
        found = ", ".join(repr(h) for h in header)
        hint = "rename the header cells to source, reference (and optionally output, id), or map your column names"
        if len(header) == 1:
            for sep, word in ((";", "semicolons"), ("\t", "tabs"), (",", "commas"), ("|", "bars")):
                if sep in header[0]:
                    hint = f"the header seems to be separated by {word}; save the file as TSV or CSV with the matching file name ending"
                    break
        label = "column" if len(missing) == 1 else "columns"
        raise InputError(f"missing {label} {', '.join(missing)}; columns found: {found}", path=name, line=1, hint=hint)
    base = columns.get("reference", "reference")
    extra_pat = re.compile(r"^" + re.escape(base) + r"_(\d+)$")
    extra: dict[int, int] = {}
    for h, i in index.items():
        m = extra_pat.match(h)
        if m and int(m.group(1)) >= 2:
            extra[int(m.group(1))] = i
    for role, want in columns.items():
        m = _EXTRA_REF.match(role)
        if m:
            if want not in index:
                found = ", ".join(repr(h) for h in header)
                raise InputError(f"missing column {want!r} (for {role}); columns found: {found}", path=name, line=1)
            extra[int(m.group(1))] = index[want]
    idx["extra"] = [extra[k] for k in sorted(extra) if extra[k] != idx["reference"]]
    return idx


# ----------------------------------------------------------------------------- jsonl


def _no_duplicate_keys(pairs: list[tuple[str, object]]) -> dict:
    out: dict = {}
    for k, v in pairs:
        if k in out:
            raise _DuplicateKey(k)
        out[k] = v
    return out


class _DuplicateKey(Exception):
    pass


_JSON_TYPES = {dict: "an object", list: "a list", str: "a string", int: "a number", float: "a number",
               bool: "true/false", type(None): "null"}


def _jsonl_rows(spec: _Spec, chunk_rows: int, meta: dict) -> Iterator[pd.DataFrame]:
    path = spec.files[0]
    name = str(path)
    cols = spec.columns
    k_id, k_src, k_ref, k_out = (cols.get(r, r) for r in _ROLES)
    extra_keys = [(int(m.group(1)), v) for k, v in cols.items() if (m := _EXTRA_REF.match(k))]
    extra_pat = re.compile(r"^" + re.escape(k_ref) + r"_(\d+)$")
    lines = _Lines(path)
    rows: _Rows | None = None
    output_line = 0  # the first line, which decides whether outputs are given
    blank_at: int | None = None
    where = {role: f"key {cols.get(role, role)!r}" for role in _ROLES}

    for text in lines:
        line = lines.number
        if not text.strip():
            if blank_at is None:
                blank_at = line
            continue
        if blank_at is not None:
            raise InputError("blank line inside the dev set", path=name, line=blank_at,
                             hint="remove it: a JSONL file holds one JSON object per line")
        try:
            obj = json.loads(text, object_pairs_hook=_no_duplicate_keys)
        except _DuplicateKey as exc:
            raise InputError(f"key {exc.args[0]!r} appears twice in the object", path=name, line=line,
                             hint="give each key once") from None
        except json.JSONDecodeError as exc:
            hint = "each line must be one complete JSON object"
            if text.strip() in ("[", "{"):
                hint = "the file looks like one multi-line JSON document; write one object per line (JSON Lines)"
            raise InputError(f"not valid JSON: {exc.msg} (column {exc.colno})", path=name, line=line,
                             hint=hint) from None
        if not isinstance(obj, dict):
            hint = 'each line must be one JSON object such as {"source": ..., "reference": ...}'
            if isinstance(obj, list):
                hint = "write one object per line (JSON Lines), not a JSON array"
            raise InputError(f"the line is {_JSON_TYPES.get(type(obj), 'a value')}, not a JSON object",
                             path=name, line=line, hint=hint)
        for key in (k_src, k_ref):
            if key not in obj:
                found = ", ".join(repr(k) for k in obj) or "none"
                raise InputError(f"no {key!r} key; keys found: {found}", path=name, line=line,
                                 hint="every object needs a source and a reference, or map your key names")
        source = _json_text(obj[k_src], k_src, name, line)
        ref_value = obj[k_ref]
        if isinstance(ref_value, list):
            if not ref_value:
                raise InputError(f"{k_ref!r} is an empty list", path=name, line=line,
                                 hint="give at least one reference")
            refs = [_json_text(r, f"{k_ref}[{i}]", name, line) for i, r in enumerate(ref_value)]
            for i, r in enumerate(refs):
                if not r.strip():
                    raise InputError(f"the reference {k_ref}[{i}] is empty", path=name, line=line,
                                     hint="remove empty references from the list")
        else:
            refs = [_json_text(ref_value, k_ref, name, line)]
        more = sorted((int(m.group(1)), k) for k in obj if (m := extra_pat.match(k)) and int(m.group(1)) >= 2)
        for _, k in sorted(set(more) | set(extra_keys)):
            if k in obj and obj[k] is not None:
                r = _json_text(obj[k], k, name, line)
                if r.strip():
                    refs.append(r)
        out_value = obj.get(k_out)
        has_out = out_value is not None
        if rows is None:
            id_given = k_id in obj
            rows = _Rows(name, chunk_rows, id_given, has_out)
            output_line = line
        elif has_out != rows.has_output:
            if has_out:
                msg = f"this line has an {k_out!r} but line {output_line} has none"
            else:
                msg = f"no {k_out!r} on this line, but line {output_line} has one"
            raise InputError(msg, path=name, line=line,
                             hint='give an output on every line or on none (an empty output is written "")')
        id_ = None
        if rows.id_given:
            if k_id not in obj or obj[k_id] is None:
                raise InputError(f"no {k_id!r} on this line, but line {output_line} has one", path=name,
                                 line=line, hint="give every row an id, or none")
            raw_id = obj[k_id]
            if isinstance(raw_id, bool) or not isinstance(raw_id, (str, int)):
                raise InputError(f"{k_id!r} must be a string or an integer, got {_JSON_TYPES.get(type(raw_id), 'a value')}",
                                 path=name, line=line)
            id_ = str(raw_id)
        elif k_id in obj:
            raise InputError(f"this line has an {k_id!r} but line {output_line} has none", path=name, line=line,
                             hint="give every row an id, or none")
        output = _json_text(out_value, k_out, name, line) if has_out else None
        frame = rows.add(line, id_, source, refs, output, where)
        if frame is not None:
            yield frame
    if rows is None:
        raise InputError("the file is empty", path=name, hint="a JSONL dev set holds one JSON object per line")
    yield from _finish(rows, name, meta, [lines], "the file has no rows")


def _json_text(value: object, key: str, name: str, line: int) -> str:
    if isinstance(value, str):
        return value
    raise InputError(f"{key!r} must be a string, got {_JSON_TYPES.get(type(value), 'a value')}", path=name,
                     line=line, hint="write texts as JSON strings")


# ----------------------------------------------------------------------------- plain text


def _text_rows(spec: _Spec, chunk_rows: int, meta: dict) -> Iterator[pd.DataFrame]:
    files = spec.files
    readers = [_Lines(f) for f in files]
    iters = [iter(r) for r in readers]
    n_ref = spec.n_refs
    rows = _Rows(spec.display, chunk_rows, False, spec.has_output_file)
    src_name = str(files[0])
    line = 0
    while True:
        texts = [next(it, None) for it in iters]
        if all(t is None for t in texts):
            break
        line += 1
        if any(t is None for t in texts):
            counts = [line - 1 if t is None else line + sum(1 for _ in it) for t, it in zip(texts, iters, strict=True)]
            listed = ", ".join(f"{f} has {n}" for f, n in zip(files, counts, strict=True))
            raise InputError(
                f"the plain-text files have different numbers of lines: {listed}",
                path=spec.display,
                hint="each file needs one line per segment, in the same order",
            )
        segs = [_strip_eol(t) for t in texts]
        source = segs[0]
        refs = [segs[1]] + [r for r in segs[2:1 + n_ref] if r.strip()]
        output = segs[1 + n_ref] if spec.has_output_file else None
        if not source.strip():
            raise InputError("the source line is empty", path=src_name, line=line,
                             hint="every line needs a source text; plain-text files hold one segment per line")
        if not refs[0].strip():
            raise InputError("the reference line is empty", path=str(files[1]), line=line,
                             hint="every line needs a reference; plain-text files hold one segment per line")
        frame = rows.add(line, None, source, refs, output, {})
        if frame is not None:
            yield frame
    if line == 0:
        raise InputError("the file is empty", path=src_name, hint="plain-text files hold one segment per line")
    yield from _finish(rows, spec.display, meta, readers, "no rows")
