"""The driver side: a pool of Ray actors (triage.cluster.worker.Worker) that score and decode planned batches.

    pool = WorkerPool(cluster, "/shared/models/ckpt", workers=4, threads=1)
    score_requests(model, settings, requests, pool=pool)   # the plan's batches, scored on the workers
    decode(model, settings, sources, pool=pool)            # the plan's batches, decoded on the workers
    pool.close()                                           # the workers stop

Each worker takes one batch at a time; results come back in the plan's order whatever order
the workers finish in. A worker whose process dies (or whose node goes) has the batches it held
handed to the others, and a replacement is started in its place; each batch's result is kept
once, so nothing is lost and nothing counted twice. Every wait is bounded: Ctrl-C reaches the
driver within a second, and `close()` stops the workers.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

from triage.errors import ClusterError

#: seconds between checks while waiting on the workers (Ctrl-C is seen at the next check)
POLL_S = 0.5
#: seconds a worker may take to start and load the model before the run gives up on it
START_TIMEOUT_S = 600.0


class WorkerPool:
    """`workers` Ray actors, each with `threads` torch threads on as many CPUs, holding the model `spec`."""

    def __init__(self, cluster: Any, spec: str, load: Mapping[str, Any] | None = None, *, workers: int,
                 threads: int = 1, start_timeout: float = START_TIMEOUT_S):
        import ray

        from triage.cluster.worker import Worker

        self.spec, self.load, self.threads = spec, dict(load or {}), threads
        self.start_timeout = start_timeout
        self._actor_class = ray.remote(num_cpus=threads, max_restarts=0, max_task_retries=0)(Worker)
        self.replaced = 0        # workers lost during the run and started again
        self.lost_batches = 0    # batches given to another worker after their worker died
        self.info: list[dict[str, Any]] = []
        self._starting: dict[Any, Any] = {}  # replacements still loading the model (they join when ready)
        self._running: dict[Any, tuple[int, Any]] = {}  # result ref -> (item, actor) of the work in flight
        self._pid: dict[str, int] = {}  # actor id -> its process id
        free = cluster.cpus()
        if workers * threads > free:
            raise ClusterError(f"{workers} workers of {threads} thread{'s' if threads > 1 else ''} need "
                               f"{workers * threads} CPUs, the Ray cluster has {free:g}",
                               hint="fewer --workers, or more nodes (ray start --address=...)")
        self.actors = [self._start() for _ in range(workers)]
        try:
            self.info = self._ready(self.actors)
            for actor, info in zip(self.actors, self.info, strict=True):
                self._pid[actor._actor_id.hex()] = info["pid"]
        except BaseException:
            self.close()
            raise

    # -------------------------------------------------------------- starting
    def _start(self):
        return self._actor_class.remote(self.spec, self.load, self.threads)

    def _ready(self, actors: list) -> list[dict[str, Any]]:
        """Wait (bounded) until every worker holds the model; one line naming the node if one cannot."""
        import ray

        refs = [a.ready.remote() for a in actors]
        deadline = time.monotonic() + self.start_timeout
        pending = list(refs)
        while pending:
            if time.monotonic() > deadline:
                raise ClusterError(f"{len(pending)} of {len(refs)} workers did not start within "
                                   f"{self.start_timeout:.0f} s", path=self.spec,
                                   hint="check `ray status`: the cluster may lack free CPUs")
            _, pending = ray.wait(pending, num_returns=len(pending), timeout=POLL_S)
        infos = []
        for ref in refs:
            try:
                info = ray.get(ref)
            except ray.exceptions.RayError as exc:
                raise ClusterError(f"a worker died while loading the model: {_first_line(exc)}",
                                   path=self.spec) from None
            if info["error"]:
                raise ClusterError(f"the worker on node {info['node']} ({info['host']}) cannot load the model: "
                                   f"{info['error']}", path=self.spec,
                                   hint="every node must read the model at this path: a shared filesystem, "
                                   "or the same copy at the same path on each node")
            infos.append(info)
        from triage import __version__
        from triage.scoring.scorer import SCORING_VERSION

        for info in infos:
            if (info["version"], info["scoring_version"]) != (__version__, SCORING_VERSION):
                raise ClusterError(f"the worker on node {info['node']} ({info['host']}) runs triage "
                                   f"{info['version']} (scoring version {info['scoring_version']}), the driver "
                                   f"{__version__} (scoring version {SCORING_VERSION})",
                                   hint="install the same triage on every node")
        prints = {info["fingerprint"] for info in infos}
        if len(prints) > 1:
            raise ClusterError("the workers loaded different models from this path (their fingerprints differ)",
                               path=self.spec, hint="every node must hold the same checkpoint at this path")
        return infos

    # -------------------------------------------------------------- the work
    def score_batches(self, settings, batches: Sequence[Sequence[Any]], tree: bool) -> Iterator[list]:
        """Each planned scoring batch's results (triage.scoring.scorer.score_batch), in the batches' order."""
        return self._map("score", [(settings, list(b), tree) for b in batches])

    def decode_batches(self, settings, batches: Sequence[Sequence[Sequence[int]]]) -> Iterator[list]:
        """Each planned decoding batch's results (triage.decoding.decode.decode_batch), in the batches' order."""
        return self._map("decode", [(settings, [list(s) for s in b]) for b in batches])

    def _map(self, method: str, items: list[tuple]) -> Iterator[list]:
        """Run `method` on every item, one item per idle worker; yield the results in item order."""
        import ray

        todo = deque(range(len(items)))
        running = self._running = {}
        starting = self._starting                  # ready ref of a replacement -> its actor
        done: dict[int, Any] = {}
        idle = list(self.actors)
        next_out = 0
        while next_out < len(items):
            while todo and idle:
                actor = idle.pop(0)
                k = todo.popleft()
                running[getattr(actor, method).remote(*items[k])] = (k, actor)
            if not running and not starting:
                raise ClusterError("every worker of the run was lost", path=self.spec,
                                   hint="check the nodes (`ray status`) and run again: the cache keeps the "
                                   "finished steps")
            ready, _ = ray.wait([*running, *starting], num_returns=1, timeout=POLL_S)
            for ref in ready:
                if ref in starting:
                    actor = starting.pop(ref)
                    if self._joined(actor, ref):
                        self.actors.append(actor)
                        idle.append(actor)
                    continue
                k, actor = running.pop(ref)
                try:
                    done[k] = ray.get(ref)
                except (ray.exceptions.RayActorError, ray.exceptions.WorkerCrashedError,
                        ray.exceptions.NodeDiedError, ray.exceptions.ObjectLostError):
                    todo.appendleft(k)   # its batch goes to another worker
                    self.lost_batches += 1
                    self._drop(actor)
                    new = self._start()
                    self.replaced += 1
                    starting[new.ready.remote()] = new
                    continue
                except ray.exceptions.RayTaskError as exc:  # the work itself failed: the same error here
                    cause = exc.cause if isinstance(getattr(exc, "cause", None), BaseException) else None
                    raise (cause or exc) from None
                idle.append(actor)
            while next_out in done:
                yield done.pop(next_out)
                next_out += 1

    def _joined(self, actor, ready_ref) -> bool:
        """Whether a replacement started and holds the model (else it is let go)."""
        import ray

        try:
            info = ray.get(ready_ref)
        except ray.exceptions.RayError:
            return False
        if info["error"]:
            self._drop(actor)
            return False
        self._pid[actor._actor_id.hex()] = info["pid"]
        return True

    def _drop(self, actor) -> None:
        import ray

        if actor in self.actors:
            self.actors.remove(actor)
        try:
            ray.kill(actor)
        except Exception:  # already gone
            pass

    def describe(self) -> dict[str, Any]:
        """What run.json records of the pool: workers, threads each, the nodes they ran on, workers lost."""
        return {"workers": len(self.info), "threads_per_worker": self.threads,
                "nodes": sorted({i["node"] for i in self.info}), "workers_replaced": self.replaced,
                "batches_given_again": self.lost_batches}

    def pids(self) -> list[int]:
        """The process ids of the workers in the pool now."""
        return [self._pid[a._actor_id.hex()] for a in self.actors]

    def busy_pids(self) -> list[int]:
        """The process ids of the workers holding a batch now."""
        return [self._pid[a._actor_id.hex()] for _, a in self._running.values()]

    def close(self) -> None:
        """Stop every worker (their CPUs go back to the cluster)."""
        import ray

        for actor in [*self.actors, *self._starting.values()]:
            try:
                ray.kill(actor)
            except Exception:  # already gone
                pass
        self.actors, self._starting = [], {}

    def __enter__(self) -> WorkerPool:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
