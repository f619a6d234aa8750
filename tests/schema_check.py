"""summary.json against the shipped JSON Schema (triage/run/summary.schema.json), with the
jsonschema library's own Draft 2020-12 validator."""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path
from typing import Any

SCHEMA = json.loads(resources.files("triage.run").joinpath("summary.schema.json").read_text(encoding="utf-8"))
checked = {"files": 0}


def validator():
    import jsonschema

    jsonschema.Draft202012Validator.check_schema(SCHEMA)
    return jsonschema.Draft202012Validator(SCHEMA)


def errors(summary: dict[str, Any]) -> list[str]:
    return [f"{'/'.join(map(str, e.absolute_path)) or '(top)'}: {e.message}" for e in validator().iter_errors(summary)]


def validate_summary_file(path: Path) -> None:
    found = errors(json.loads(Path(path).read_text(encoding="utf-8")))
    assert not found, f"{path} does not follow summary.schema.json: {found[:5]}"
    checked["files"] += 1
