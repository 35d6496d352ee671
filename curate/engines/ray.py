"""Ray engine: the same per-shard tasks as the local engine, as Ray tasks. Same results.

Every task reads its inputs from and writes its output to the work dir, so on a
cluster the output directory must be on storage all nodes share.
"""
from __future__ import annotations

from typing import Any, Iterator

from ..errors import ConfigError
from ..execute import execute


def _run(task: Any) -> dict:
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

    def map_tasks(self, tasks: list[Any], sizes: list[int]) -> Iterator[tuple[int, dict]]:
        ray = self._ray
        refs = {self._remote.remote(t): n for t, n in zip(tasks, sizes)}
        pending = list(refs)
        while pending:
            done, pending = ray.wait(pending, num_returns=1)
            for r in done:
                yield refs[r], ray.get(r)  # re-raises the task's error

    def close(self) -> None:
        if self._started:
            self._ray.shutdown()
            self._started = False
