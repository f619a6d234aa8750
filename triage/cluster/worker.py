"""The worker side: one process that loads the model once and scores or decodes the batches it is given.

`Worker` is a plain class; triage.cluster.pool makes it a Ray actor (one CPU per torch thread),
so this module imports no Ray. A worker that cannot load the model does not fail its start: it
keeps the reason, and `ready()` reports it with the node, so the driver can refuse with one line.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Mapping, Sequence
from typing import Any

from triage.settings import DecoderSettings


class Worker:
    """Loads `spec` with `load`'s keywords on `threads` torch threads; then scores and decodes batches."""

    def __init__(self, spec: str, load: Mapping[str, Any] | None, threads: int):
        import torch

        torch.set_num_threads(threads)
        self.spec = spec
        self.error: str | None = None
        self.model = None
        try:
            from triage.models.loading import load_model

            self.model = load_model(spec, **dict(load or {}))
        except Exception as exc:  # reported by ready(): the driver refuses the run with one line
            from triage.errors import TriageError

            self.error = exc.one_line() if isinstance(exc, TriageError) else f"{type(exc).__name__}: {exc}"

    def ready(self) -> dict[str, Any]:
        """Where this worker runs and whether it holds the model (error: why not)."""
        import torch

        from triage import __version__
        from triage.scoring.scorer import SCORING_VERSION

        return {"host": socket.gethostname(), "node": _node_ip(), "pid": os.getpid(), "error": self.error,
                "version": __version__, "scoring_version": SCORING_VERSION, "threads": torch.get_num_threads(),
                "fingerprint": self.model.fingerprint() if self.model is not None else None}

    def score(self, settings: DecoderSettings, requests: Sequence, tree: bool) -> list:
        """One planned scoring batch (triage.scoring.scorer.score_batch)."""
        from triage.scoring.scorer import score_batch

        return score_batch(self.model, settings, requests, tree)

    def decode(self, settings: DecoderSettings, sources: Sequence[Sequence[int]]) -> list:
        """One planned decoding batch (triage.decoding.decode.decode_batch)."""
        from triage.decoding.decode import decode_batch

        return decode_batch(self.model, settings, sources)



def _node_ip() -> str:
    try:
        import ray

        return ray.util.get_node_ip_address()
    except Exception:  # outside Ray (a plain object in a test): the host name says where
        return socket.gethostname()
