"""Ray engine: the same per-shard tasks as the local engine, as Ray tasks. Same results.

Cheap per-shard passes run as Ray tasks. Passes of model stages (embed) run on a pool of
actors: each actor loads the model once and keeps it for every shard it is given, and takes a
GPU when the cluster has them (`run.ray_model_gpus`), or a fraction of a CPU on a CPU-only
cluster, so tasks that read shards are never starved. Every task reads its inputs from and
writes its output to the work dir, so on a cluster the output directory must be on storage
all nodes share.
"""
from __future__ import annotations

from typing import Any, Iterator

from ..errors import ConfigError
from ..execute import execute


def _run(task: Any) -> dict:
    return execute(task)


class _ModelActor:
    """Runs model-pass tasks in one long-lived process, so the model it loads (curate.models keeps
    the last loaded model per process) serves every shard sent to it."""

    def run(self, task: Any) -> dict:
        return execute(task)


class RayEngine:
    name = "ray"

    def __init__(self, cfg: Any):
        try:
            import ray
        except ImportError as e:
            raise ConfigError("run.engine = ray needs Ray: pip install 'curate[ray]'", key="run.engine") from e
        self._ray = ray
        self._started = False
        if not ray.is_initialized():
            kw: dict[str, Any] = {"include_dashboard": False, "log_to_driver": False,
                                  "configure_logging": False}
            if cfg.run.ray_address:
                ray.init(address=cfg.run.ray_address, **kw)
            else:
                ray.init(**kw)
            self._started = True
        self._remote = ray.remote(num_cpus=cfg.run.ray_task_cpus, max_retries=2)(_run)
        self._cfg = cfg
        self._pool: Any = None
        self._actor_handles: list = []

    def _actors(self) -> Any:
        """The model actors, started on first use: one model load per actor."""
        if self._pool is None:
            from ray.util import ActorPool

            ray, run = self._ray, self._cfg.run
            gpus = run.ray_model_gpus if run.ray_model_gpus >= 0 else (1 if ray.cluster_resources().get("GPU") else 0)
            n = run.ray_model_actors or max(1, int(ray.cluster_resources().get("GPU", 0)) if gpus else 1)
            actor = ray.remote(num_cpus=run.ray_model_cpus, num_gpus=gpus)(_ModelActor)
            self._actor_handles = [actor.remote() for _ in range(n)]
            self._pool = ActorPool(self._actor_handles)
        return self._pool

    def map_model_tasks(self, tasks: list[Any], sizes: list[int]) -> Iterator[tuple[int, dict]]:
        """Run a model pass's tasks on the actor pool; yields (size, result) as each finishes."""
        size_of = {t.shard: n for t, n in zip(tasks, sizes)}
        for stats in self._actors().map_unordered(lambda a, t: a.run.remote(t), tasks):
            yield size_of[stats["shard"]], stats

    def map_tasks(self, tasks: list[Any], sizes: list[int]) -> Iterator[tuple[int, dict]]:
        ray = self._ray
        refs = {self._remote.remote(t): n for t, n in zip(tasks, sizes)}
        pending = list(refs)
        while pending:
            done, pending = ray.wait(pending, num_returns=1)
            for r in done:
                yield refs[r], ray.get(r)  # re-raises the task's error

    def close(self) -> None:
        if self._pool is not None:
            for a in self._actor_handles:
                self._ray.kill(a)
            self._pool, self._actor_handles = None, []
        if self._started:
            self._ray.shutdown()
            self._started = False
