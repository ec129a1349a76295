"""Stopping promptly on Ctrl-C (or any error) while pools of threads or processes hold work.

A pool's normal exit waits for every queued task; after an interrupt that can take many
seconds.  :func:`abandon_pool` cancels what has not started and terminates worker processes at
once, so the command stops within about a window's time (docs/cli.md: exit 130).  Worker
processes ignore SIGINT themselves (:func:`ignore_sigint`): the terminal sends Ctrl-C to the
whole process group, and only the parent decides how to stop.
"""

from __future__ import annotations

import contextlib
import signal

__all__ = ["abandon_pool", "ignore_sigint"]


def ignore_sigint() -> None:
    """Initializer of worker processes: leave Ctrl-C to the parent."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def abandon_pool(pool) -> None:
    """Cancel queued tasks and stop worker processes now; never waits for running work to finish."""
    processes = dict(getattr(pool, "_processes", None) or {})  # ProcessPoolExecutor's live workers
    with contextlib.suppress(Exception):
        pool.shutdown(wait=False, cancel_futures=True)
    for p in processes.values():
        with contextlib.suppress(Exception):
            p.terminate()
    for p in processes.values():
        with contextlib.suppress(Exception):
            p.join(1.0)
