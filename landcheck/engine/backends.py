"""One engine for every window pass: local threads, local processes, or a Dask cluster.

Every pass of landcheck (the audit's window pass, the confidence realizations,
the land-capability pass, the drafted reclassification and the slope command)
maps a *picklable* task ``task(item) -> result`` over a sequence of items
(windows, or prepared window chunks) with :meth:`Engine.map`, which hands the
results back **in item order**.  Every reduction is done by the caller in
that order, so every number landcheck reports is identical whatever the engine
and worker count (tests check threads == processes == Dask).

* ``threads`` (default): a thread pool in this process
  (:func:`landcheck.engine.windows.run_windows`).  The compiled kernels, GDAL
  reads and exact-coverage loops release the GIL.
* ``processes``: a pool of ``spawn``-started worker processes on this machine;
  the task is sent once to each worker when it starts.
* ``dask``: ``dask.distributed``.  With no address a ``LocalCluster`` of worker
  processes is started on this machine; with ``scheduler_address`` the tasks go
  to an existing cluster.  Workers must reach the input files by the same
  paths (shared file system or object store paths GDAL can read).  The task
  object is scattered once to every worker.

All three keep at most ``2 x workers`` items in flight, so memory on the
driver stays bounded whatever the raster size.
"""

from __future__ import annotations

import logging
import multiprocessing
import numbers
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import TypeVar

from landcheck.choices import UserChoice
from landcheck.engine.windows import default_workers, ordered_results, run_windows
from landcheck.errors import InputDataError

__all__ = ["Engine", "EngineKind", "map_windows"]

logger = logging.getLogger(__name__)

T = TypeVar("T")
R = TypeVar("R")


class EngineKind(UserChoice):
    """Where window tasks run."""

    THREADS = "threads"
    PROCESSES = "processes"
    DASK = "dask"

    @classmethod
    def _noun(cls) -> str:
        return "engine"


@dataclass(frozen=True)
class Engine:
    """A validated engine choice: kind, worker count (None: all cores) and, for Dask, a scheduler.

    >>> Engine.from_user("threads", workers=2)
    Engine(kind=<EngineKind.THREADS: 'threads'>, workers=2, scheduler_address=None)
    >>> Engine.from_user("gpu")
    Traceback (most recent call last):
    ...
    landcheck.errors.InputDataError: engine: unknown engine 'gpu'; choose one of: threads, processes, dask
    """

    kind: EngineKind = EngineKind.THREADS
    workers: int | None = None
    scheduler_address: str | None = None

    @classmethod
    def from_user(
        cls, kind: EngineKind | str = EngineKind.THREADS, workers: int | None = None, scheduler_address=None
    ) -> Engine:
        """Validate ``kind``, ``workers`` (a whole number >= 1 or None) and ``scheduler_address`` (Dask only)."""
        try:
            k = EngineKind.from_user(kind)
        except ValueError as exc:
            raise InputDataError(f"engine: {exc}") from None
        if workers is not None and (
            isinstance(workers, bool) or not isinstance(workers, numbers.Integral) or int(workers) < 1
        ):
            raise InputDataError(f"workers: got {workers!r}; give a whole number >= 1 (or None for all cores).")
        if scheduler_address is not None:
            if k is EngineKind.THREADS:
                k = EngineKind.DASK  # an address implies Dask (as --scheduler does)
            elif k is not EngineKind.DASK:
                raise InputDataError(
                    f"scheduler address {scheduler_address!r} given with engine {k.value!r}; "
                    "a scheduler address goes with engine 'dask'."
                )
        return cls(k, None if workers is None else int(workers), scheduler_address)

    @property
    def n_workers(self) -> int:
        return default_workers() if self.workers is None else self.workers

    def map(self, task: Callable[[T], R], items: Iterable[T], *, progress=None) -> Iterator[tuple[T, R]]:
        """Yield ``(item, task(item))`` in the order of ``items``, at most ``2 x workers`` in flight."""
        if self.kind is EngineKind.THREADS:
            yield from run_windows(task, items, workers=self.workers, progress=progress)
        elif self.kind is EngineKind.PROCESSES:
            yield from _process_map(task, items, self.n_workers, progress)
        else:
            yield from _dask_map(
                task, items, workers=self.workers, scheduler_address=self.scheduler_address, progress=progress
            )

    def describe(self) -> dict:
        return {"engine": self.kind.value, "workers": self.workers, "scheduler": self.scheduler_address}


def map_windows(
    task: Callable[[T], R],
    windows: Iterable[T],
    *,
    engine: Engine | EngineKind | str = EngineKind.THREADS,
    workers: int | None = None,
    scheduler_address: str | None = None,
    progress=None,
) -> Iterator[tuple[T, R]]:
    """Yield ``(win, task(win))`` in window order on the chosen engine (see :class:`Engine`)."""
    if not isinstance(engine, Engine):
        engine = Engine.from_user(engine, workers, scheduler_address)
    yield from engine.map(task, windows, progress=progress)


# --------------------------------------------------------------------------- processes

_WORKER_TASK = None


def _init_process(task) -> None:
    global _WORKER_TASK
    from landcheck.engine.interrupt import ignore_sigint

    ignore_sigint()  # Ctrl-C reaches the whole process group; the parent stops the pool (docs/cli.md)
    _WORKER_TASK = task


def _process_call(item):
    return _WORKER_TASK(item)


def _process_map(task, items, n_workers: int, progress):
    if n_workers == 1:
        yield from run_windows(task, items, workers=1, progress=progress)
        return
    # spawn, not fork: the parent may hold GDAL or numba threads, which do not survive a fork
    mp = multiprocessing.get_context("spawn")
    pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=mp, initializer=_init_process, initargs=(task,))
    try:
        yield from ordered_results(lambda it: pool.submit(_process_call, it), items, 2 * n_workers, progress)
    except BaseException:  # Ctrl-C, an error, or the consumer stopped: stop the workers now, not after their queue
        from landcheck.engine.interrupt import abandon_pool

        abandon_pool(pool)
        raise
    pool.shutdown(wait=True)


# --------------------------------------------------------------------------- dask


def _call(task, item):
    return task(item)


def _dask_map(task, items, *, workers, scheduler_address, progress):
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
            lambda it: client.submit(_call, task_ref, it, pure=False), items, 2 * n_workers, progress
        )
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
