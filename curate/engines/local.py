"""Local engine: per-shard tasks in worker processes (forkserver, so a parent that has
loaded torch or other threaded libraries never forks them)."""
from __future__ import annotations

import multiprocessing as mp
import os
from concurrent.futures import FIRST_EXCEPTION, ProcessPoolExecutor, wait
from typing import Any, Iterator

from ..execute import execute


def _run(task: Any) -> dict:
    return execute(task)


class LocalEngine:
    name = "local"

    def __init__(self, cfg: Any):
        w = cfg.run.workers
        self.workers = w if w > 0 else (os.cpu_count() or 1)
        self._pool: ProcessPoolExecutor | None = None

    def _get_pool(self) -> ProcessPoolExecutor:
        if self._pool is None:
            from ._lifeline import die_with_parent

            ctx = mp.get_context("forkserver")
            ctx.set_forkserver_preload(["curate.engines._forkserver_init", "curate.stages", "curate.execute"])
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=ctx,
                                             initializer=die_with_parent)
        return self._pool

    def map_tasks(self, tasks: list[Any], sizes: list[int]) -> Iterator[tuple[int, dict]]:
        """Run tasks; yield (size, what execute returned) as each finishes. Raises the first failure."""
        if self.workers <= 1:
            for t, n in zip(tasks, sizes):
                yield n, _run(t)
            return
        pool = self._get_pool()
        futs = {pool.submit(_run, t): n for t, n in zip(tasks, sizes)}
        pending = set(futs)
        while pending:
            done, pending = wait(pending, return_when=FIRST_EXCEPTION)
            for f in done:
                exc = f.exception()
                if exc is not None:
                    for p in pending:
                        p.cancel()
                    raise exc
                yield futs[f], f.result()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
