"""Reaching a Ray cluster: a local instance sized to this machine, or a running cluster by its address.

    from triage.cluster import connect
    with connect("auto") as cluster:                 # this process's Ray if it has one, else a local one
        triage_run(spec, data, cluster=cluster, ...)
    connect("10.0.0.5:6379", workers=16)             # join a cluster started with `ray start --head`

An address is checked with a bounded TCP probe first (Ray's own connect waits minutes on an
address where nothing listens), so a cluster that cannot be reached is one ClusterError line.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from triage.errors import ClusterError, OptionValueError

#: seconds the address probe waits for the cluster's head to answer
PROBE_TIMEOUT_S = 5.0


@dataclass
class Cluster:
    """A connection to Ray: where it is, how many workers a run starts and how many torch threads each
    (one CPU per thread). started: this handle started the Ray instance (close() stops it)."""

    address: str
    workers: int
    threads: int = 1
    started: bool = False

    def cpus(self) -> float:
        """CPUs the cluster has (busy or not)."""
        import ray

        return float(ray.cluster_resources().get("CPU", 0.0))

    def nodes(self) -> int:
        import ray

        return sum(1 for n in ray.nodes() if n.get("Alive"))

    def pool(self, spec: str, load=None):
        """Start this cluster's workers holding the model `spec` (a triage.cluster.pool.WorkerPool)."""
        from triage.cluster.pool import WorkerPool

        return WorkerPool(self, spec, load, workers=self.workers, threads=self.threads)

    def close(self) -> None:
        if self.started:
            import ray

            ray.shutdown()
            self.started = False

    def __enter__(self) -> Cluster:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def connect(address: str = "auto", *, workers: int | None = None, threads: int = 1) -> Cluster:
    """Reach Ray. address "auto": this process's Ray instance when one is running (ray.init was called),
    else a local one with this machine's CPUs; otherwise host:port of a running cluster's head (what
    `ray start --head` prints). workers: how many a run starts (default: the cluster's CPUs / threads)."""
    if workers is not None and workers < 1:
        raise OptionValueError("workers", f"must be at least 1, got {workers}")
    if threads < 1:
        raise OptionValueError("threads", f"must be at least 1, got {threads}")
    import ray

    started = False
    if address == "auto":
        if not ray.is_initialized():
            ray.init(num_cpus=os.cpu_count() or 1, include_dashboard=False, log_to_driver=False,
                     configure_logging=False)
            started = True
    elif not ray.is_initialized() or _gcs_address() != address:
        if ray.is_initialized():
            raise ClusterError(f"this process is already connected to the Ray cluster at {_gcs_address()}",
                               hint="call ray.shutdown() first, or pass that address")
        _probe(address)
        try:
            ray.init(address=address, log_to_driver=False, configure_logging=False)
        except Exception as exc:  # ConnectionError and the like: one line
            raise ClusterError(f"cannot join the Ray cluster at {address}: {_first_line(exc)}") from None
        started = True
    total = float(ray.cluster_resources().get("CPU", 0.0))
    if workers is None:
        workers = max(1, int(total // threads))
    return Cluster(_gcs_address() or address, workers, threads, started)


def _gcs_address() -> str | None:
    import ray

    try:
        return ray.get_runtime_context().gcs_address
    except Exception:  # not connected
        return None


def _probe(address: str) -> None:
    """Raise a ClusterError unless something accepts a connection at host:port in time (a port that
    answers but is no Ray head is left to Ray's own, slower, timeout)."""
    host, sep, port = address.rpartition(":")
    if not sep or not host or not port.isdigit():
        raise ClusterError(f"--cluster expects auto or HOST:PORT of a Ray head, got {address!r}",
                           hint="`ray start --head` prints the address to give")
    import socket

    try:
        with socket.create_connection((host.strip("[]"), int(port)), timeout=PROBE_TIMEOUT_S):
            pass
    except OSError as exc:
        reason = "no answer" if isinstance(exc, TimeoutError) else exc.strerror or type(exc).__name__
        raise ClusterError(f"cannot reach a Ray cluster at {address} ({reason} within {PROBE_TIMEOUT_S:g} s)",
                           hint="start one with `ray start --head` on the head node and give the address it "
                           "prints; check the port is open from here") from None


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
