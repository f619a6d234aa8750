"""On-disk cache of teacher-forced scores, keyed by model, objective and texts.

A rerun after an interruption, or with another threshold, bucket layout or metric, finds the
rows it already scored. The key of a row is the sha256 of the scoring code's version
(scorer.SCORING_VERSION, read when the cache is opened), the model fingerprint, the settings
fingerprint, and the token ids of its source and targets; the value is the row's TargetScores.
A fix to scoring bumps the version, so no run reuses scores the old code computed.
SQLite (Python's standard library) keeps each committed batch, so Ctrl-C loses at most the
batch in flight.
"""

from __future__ import annotations

import hashlib
import json
import math
import sqlite3
from pathlib import Path

from triage.scoring import scorer
from triage.scoring.scorer import ScoreRequest, TargetScore

SCHEMA = "CREATE TABLE IF NOT EXISTS scores (key TEXT PRIMARY KEY, value TEXT NOT NULL)"


def _f(x: float):
    return x if math.isfinite(x) else repr(x)


def _uf(x) -> float:
    return float(x)


def encode_scores(scores: list[TargetScore]) -> str:
    return json.dumps([
        {"ids": s.ids, "lp": [_f(x) for x in s.logprobs], "sum": _f(s.logprob_sum), "len": s.length,
         "score": _f(s.score), "hit": s.hit_limit, "blocked": s.blocked_rule, "skipped": s.skipped,
         "code": s.skip_code}
        for s in scores
    ])


def decode_scores(text: str) -> list[TargetScore]:
    return [
        TargetScore(d["ids"], [_uf(x) for x in d["lp"]], _uf(d["sum"]), d["len"], _uf(d["score"]), d["hit"],
                    d["blocked"], d["skipped"], d.get("code"))
        for d in json.loads(text)
    ]


class ScoreCache:
    def __init__(self, folder: str | Path, model_fingerprint: str, settings_fingerprint: str):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.db = sqlite3.connect(self.folder / "scores.sqlite")
        self.db.execute(SCHEMA)
        self.scoring_version = scorer.SCORING_VERSION
        self.prefix = f"scoring={self.scoring_version}|{model_fingerprint}|{settings_fingerprint}|".encode()
        self.hits = 0
        self.misses = 0

    def key(self, req: ScoreRequest) -> str:
        h = hashlib.sha256(self.prefix)
        h.update(json.dumps([req.source_ids, req.targets, req.allow_no_end]).encode())
        return h.hexdigest()

    def get(self, req: ScoreRequest) -> list[TargetScore] | None:
        row = self.db.execute("SELECT value FROM scores WHERE key = ?", (self.key(req),)).fetchone()
        if row is None:
            self.misses += 1
            return None
        self.hits += 1
        return decode_scores(row[0])

    def put_many(self, items: list[tuple[ScoreRequest, list[TargetScore]]]) -> None:
        with self.db:
            self.db.executemany(
                "INSERT OR REPLACE INTO scores (key, value) VALUES (?, ?)",
                [(self.key(r), encode_scores(s)) for r, s in items],
            )

    def close(self) -> None:
        self.db.close()
