"""Numbers as the report shows them, and the neutral display data a study's view returns.

A study's `view(section)` returns a View: lines of text, tables of formatted cells, notes and at
most one chart (named by the report's chart function and its arguments). The report renders
them; nothing here knows HTML. Bottom layer: imports nothing from the rest of triage.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

__all__ = ["Chart", "Table", "View", "finite", "fmt_interval", "fmt_num", "fmt_pct", "fmt_value", "get_path",
           "table"]


# ------------------------------------------------------------------------ formatting
def finite(x: Any) -> bool:
    try:
        return x is not None and not pd.isna(x) and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def fmt_num(x: Any, digits: int = 2) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "—"
    try:
        if pd.isna(x):
            return "—"
    except (TypeError, ValueError):
        pass
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isinf(v):
        return "-inf" if v < 0 else "+inf"
    if v == int(v) and abs(v) < 1e15 and digits == 0:
        return str(int(v))
    return f"{v:.{digits}f}"


def fmt_pct(x: Any, digits: int = 1) -> str:
    return f"{float(x) * 100:.{digits}f}%" if finite(x) else "—"


def fmt_interval(iv: Any) -> str:
    if not iv or len(iv) != 2 or not (finite(iv[0]) and finite(iv[1])):
        return "—"
    return f"{fmt_pct(iv[0])} – {fmt_pct(iv[1])}"


def fmt_value(x: Any) -> str:
    """Any summary value as short text (generic tables for keys the report does not know)."""
    if isinstance(x, bool) or x is None:
        return {True: "yes", False: "no", None: "—"}[x]
    if isinstance(x, int):
        return str(x)
    if isinstance(x, float):
        return f"{x:.6g}"
    if isinstance(x, (list, tuple)):
        return ", ".join(fmt_value(v) for v in x) if all(not isinstance(v, (dict, list)) for v in x) \
            else json.dumps(x, ensure_ascii=False)
    if isinstance(x, dict):
        return json.dumps(x, ensure_ascii=False, default=str)
    return str(x)


def get_path(d: Any, path: str) -> Any:
    """The value at a dotted path ("model_rows.worse", "points.0") in dicts, lists or typed sections."""
    for part in path.split("."):
        if isinstance(d, dict):
            d = d.get(part)
        elif isinstance(d, list) and part.isdigit() and int(part) < len(d):
            d = d[int(part)]
        elif dataclasses.is_dataclass(d) and not isinstance(d, type) and part in {f.name for f in dataclasses.fields(d)}:
            d = getattr(d, part)
        else:
            return None
    return d


# ------------------------------------------------------------------------ display data
@dataclass
class Table:
    caption: str
    cols: list[str]
    rows: list[list[str]]


@dataclass
class Chart:
    """A chart named by the report's chart function (e.g. "curve") and the arguments it takes."""
    kind: str
    args: dict[str, Any] = field(default_factory=dict)


@dataclass
class View:
    lines: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    chart: Chart | None = None


_KINDS = {"int": lambda x: fmt_num(x, 0), "pct": fmt_pct, "num": lambda x: fmt_num(x, 2),
          "sec": lambda x: fmt_num(x, 4), "text": fmt_value}


def table(caption: str, spec: list[tuple[str, str, str]], rows: Any) -> Table | None:
    """spec: (path in the row, column label, kind: int|pct|num|sec|text). Missing values show as a dash;
    no rows, no table."""
    if not isinstance(rows, list) or not rows:
        return None
    body = [[_KINDS[kind](get_path(r, path)) for path, _, kind in spec] for r in rows if r is not None]
    return Table(caption=caption, cols=[label for _, label, _ in spec], rows=body)


def tables(*items: Table | None) -> list[Table]:
    """The tables that have rows."""
    return [t for t in items if t is not None]
