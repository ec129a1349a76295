"""Run per-window tasks over a raster: bounded memory, all cores, ordered results.

A *window task* is a plain function ``task(win) -> result`` that reads what it
needs (with its halo) and runs pure kernels.  :func:`run_windows` maps it over
the windows with a thread pool (the compiled kernels and GDAL release the GIL),
keeps at most ``2 * workers`` windows in flight so memory does not grow with
the raster, and yields results in window order so that every reduction is
deterministic whatever the worker count.  The Dask engine (``landcheck.engine.backends``)
maps the same task functions.
"""

from __future__ import annotations

import os
import sys
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

import numpy as np

from landcheck.geo.grid import Window
from landcheck.inputs.dem import DemSource
from landcheck.terrain.slope import HALO_CELLS, SlopeMethod, slope_gradient

__all__ = ["default_workers", "run_windows", "slope_window", "progress_bar"]

R = TypeVar("R")


def default_workers() -> int:
    """All cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def progress_bar(total: int, desc: str, *, enabled: bool | None = None, unit: str = "window"):
    """A tqdm bar on stderr, off when stderr is not a terminal (or when ``enabled`` is False)."""
    from tqdm import tqdm

    if enabled is None:
        enabled = sys.stderr.isatty()
    return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, disable=not enabled, leave=False)


def run_windows(
    task: Callable[[Window], R],
    windows: Iterable[Window],
    *,
    workers: int | None = None,
    progress=None,
) -> Iterator[tuple[Window, R]]:
    """Yield ``(win, task(win))`` in the order of ``windows``, computing up to ``workers`` at once."""
    workers = default_workers() if workers is None else max(1, int(workers))
    wins = iter(windows)
    if workers == 1:
        for win in wins:
            res = task(win)
            if progress is not None:
                progress.update(1)
            yield win, res
        return
    pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="landcheck-window")
    try:
        yield from ordered_results(lambda w: pool.submit(task, w), wins, 2 * workers, progress)
    except BaseException:  # Ctrl-C, an error, or the consumer stopped: drop queued windows at once
        from landcheck.engine.interrupt import abandon_pool

        abandon_pool(pool)
        raise
    pool.shutdown(wait=True)


def ordered_results(submit, windows: Iterable[Window], in_flight: int, progress=None):
    """Submit windows with ``submit(win) -> future``, keep at most ``in_flight`` pending, yield results in order.

    Shared by the thread pool and the Dask engine: bounded look-ahead keeps memory flat, and the
    window order of the results keeps every reduction deterministic.
    """
    pending: deque = deque()
    for win in windows:
        pending.append((win, submit(win)))
        if len(pending) >= in_flight:
            w, fut = pending.popleft()
            yield w, fut.result()
            if progress is not None:
                progress.update(1)
    while pending:
        w, fut = pending.popleft()
        yield w, fut.result()
        if progress is not None:
            progress.update(1)


def slope_window(dem: DemSource, win: Window, method: SlopeMethod | str = SlopeMethod.HORN) -> np.ndarray:
    """Gradient (tan of slope angle, float32, NaN where undefined) of one window of ``dem``."""
    elev = dem.read_with_halo(win, HALO_CELLS, np.float32)  # widened exactly inside the compiled loop
    rows = np.arange(win.row_off, win.row_off + win.height)
    hx, hy = dem.grid.cell_size_m(rows)
    return slope_gradient(elev, hx, hy, method, backend="compiled")
