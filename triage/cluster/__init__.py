"""Scoring and decoding on a Ray cluster (the `cluster` extra: pip install 'triage[cluster]').

    from triage.cluster import connect
    with connect("auto", workers=2) as cluster:     # or connect("HEAD:6379") for a running cluster
        outcome = triage_run("sample_data/model", "sample_data/devset.tsv", cluster=cluster, out="reports/x")

connection.py reaches Ray (a bounded probe of an address first); pool.py is the driver's pool of
workers, each a Ray actor (worker.py) that loads the model once and scores or decodes the batches
the driver plans (triage.scoring.scorer.plan_batches, triage.decoding.decode.plan_decode), so a
cluster run writes the same bytes as one process with the same torch threads per process. Nothing
here is imported unless a run asks for a cluster: `ray` stays out of a plain run.
"""

from __future__ import annotations

__all__ = ["Cluster", "WorkerPool", "connect"]


def __getattr__(name):
    if name in ("Cluster", "connect"):
        from triage.cluster import connection as module

        return getattr(module, name)
    if name == "WorkerPool":
        from triage.cluster.pool import WorkerPool

        return WorkerPool
    raise AttributeError(name)
