"""Where tasks run: in this process, or on a dask distributed cluster.

Both executors yield ``(task, result)`` pairs as tasks finish. Tasks report bad input in their
result (``convert_scan`` never raises for a bad file), so an exception is a fault of the run:
in this process it propagates with its traceback (a programming error must not pass for a bad
file); on a cluster a task whose worker died, or that raised, twice (dask retries once) yields
the exception as its result, so the coordinator can record it and carry on with the rest.
"""

from __future__ import annotations

import logging
from typing import Any, Callable, Iterable, Iterator

log = logging.getLogger(__name__)

DEFAULT_MEMORY_PER_WORKER = int(1.5 * 2**30)
# dask's nanny starts workers with MALLOC_TRIM_THRESHOLD_=65536, and any value of that variable
# turns off glibc's adaptive mmap threshold: every array over 128 KiB is then mapped afresh and
# its pages faulted in and zeroed by the kernel. The sort's many large temporaries made a 50M-point
# scan cost 1.64x the CPU in a worker (40.4 against 24.6 CPU-s; system time 20.3 against 8.8 s);
# None lets the workers keep glibc's default (a variable the user set still passes through).
NANNY_ENVIRON = {"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}


class SerialExecutor:
    """Runs tasks one after another in this process; an exception propagates."""

    workers = 1
    dashboard_link: str | None = None

    def run(self, fn: Callable, tasks: Iterable) -> Iterator[tuple[Any, Any]]:
        for task in tasks:
            yield task, fn(task)

    def close(self) -> None:
        pass


class DaskExecutor:
    """Runs one dask task per item on a LocalCluster (``workers=N``) or a running scheduler.

    Each task is retried once by dask (a worker that dies mid-task is replaced), so a task
    that fails twice comes back as its exception.
    """

    def __init__(self, workers: int | None = None, scheduler: str | None = None,
                 memory_per_worker: int = DEFAULT_MEMORY_PER_WORKER) -> None:
        import dask
        from dask.distributed import Client, LocalCluster

        self._cluster = None
        # not the default client: the coordinator's own small computations (cube indexes, catalog)
        # must run here, not queue on the cluster behind the conversions
        if scheduler:
            self.client = Client(scheduler, set_as_default=False)
        else:
            with dask.config.set(NANNY_ENVIRON):
                self._cluster = LocalCluster(
                    n_workers=workers or 2, threads_per_worker=1, processes=True,
                    memory_limit=memory_per_worker, dashboard_address="127.0.0.1:0",
                )
            self.client = Client(self._cluster, set_as_default=False)
        self.workers = len(self.client.scheduler_info().get("workers", {})) or (workers or 1)
        self.dashboard_link = self.client.dashboard_link
        self.memory_per_worker = memory_per_worker

    def run(self, fn: Callable, tasks: Iterable) -> Iterator[tuple[Any, Any]]:
        from dask.distributed import as_completed

        tasks = list(tasks)
        if not tasks:
            return
        futures = self.client.map(fn, tasks, retries=1, pure=False)
        index = {f.key: t for f, t in zip(futures, tasks)}
        for future in as_completed(futures, loop=self.client.loop):
            task = index[future.key]
            try:
                yield task, future.result()
            except Exception as exc:  # noqa: BLE001 - KilledWorker and task errors alike
                log.warning("task failed twice: %s", exc)
                yield task, exc
            future.release()

    def close(self) -> None:
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()
