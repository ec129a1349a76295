"""Execution engines for window tasks: local threads, or a Dask cluster.

Both run the *same* picklable task ``task(win) -> result`` over the same
windows and hand results back in window order, so every reduction — and so
every number landcheck reports — is identical whatever the engine and worker
count (tests check local threads == Dask).

* ``threads`` (default): a thread pool in this process (:func:`landcheck.engine.windows.run_windows`).
  The compiled kernels, GDAL reads and exact-coverage loops release the GIL.
* ``dask``: ``dask.distributed``.  With no address a ``LocalCluster`` of worker
  processes is started on this machine; with ``scheduler_address`` the tasks go
  to an existing cluster.  Workers must reach the input files by the same
  paths (shared file system or object store paths GDAL can read).  The task
  object is scattered once to every worker; at most ``2 x workers`` windows are
  in flight, so memory on the client stays bounded.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Iterator

from landcheck.choices import UserChoice
from landcheck.engine.windows import default_workers, ordered_results, run_windows
from landcheck.geo.grid import Window

__all__ = ["EngineKind", "map_windows"]

logger = logging.getLogger(__name__)


class EngineKind(UserChoice):
    THREADS = "threads"
    DASK = "dask"

    @classmethod
    def _noun(cls) -> str:
        return "engine"


def _call(task, win):
    return task(win)


def map_windows(
    task: Callable[[Window], object],
    windows: Iterable[Window],
    *,
    engine: EngineKind | str = EngineKind.THREADS,
    workers: int | None = None,
    scheduler_address: str | None = None,
    progress=None,
) -> Iterator[tuple[Window, object]]:
    """Yield ``(win, task(win))`` in window order on the chosen engine."""
    engine = EngineKind.from_user(engine)
    if engine is EngineKind.THREADS:
        yield from run_windows(task, windows, workers=workers, progress=progress)
        return
    yield from _dask_map(task, list(windows), workers=workers, scheduler_address=scheduler_address, progress=progress)


def _dask_map(task, windows, *, workers, scheduler_address, progress):
    from distributed import Client, LocalCluster

    cluster = None
    if scheduler_address:
        client = Client(scheduler_address)
    else:
        n = workers or default_workers()
        cluster = LocalCluster(
            n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=logging.ERROR
        )
        client = Client(cluster)
    try:
        n_workers = max(1, len(client.scheduler_info().get("workers", {})) or (workers or 1))
        logger.info("dask: %d workers at %s", n_workers, client.scheduler.address)
        task_ref = client.scatter(task, broadcast=True)
        yield from ordered_results(
            lambda w: client.submit(_call, task_ref, w, pure=False), windows, 2 * n_workers, progress
        )
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
