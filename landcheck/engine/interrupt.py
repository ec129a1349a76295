"""Stopping promptly on Ctrl-C (or any error) while pools of threads or processes hold work.

A pool's normal exit waits for every queued task; after an interrupt that can take many
seconds.  :func:`abandon_pool` cancels what has not started and terminates worker processes at
once, so the command stops within about a window's time (docs/cli.md: exit 130).  Worker
processes ignore SIGINT themselves (:func:`ignore_sigint`): the terminal sends Ctrl-C to the
whole process group, and only the parent decides how to stop.

The command's Ctrl-C handler also records the interrupt (:func:`note_interrupt`): a
KeyboardInterrupt raised while a C extension is running can be swallowed by it, and the handler
ignores further Ctrl-Cs so they cannot cut the clean-up short.  Long steps and the final publish
call :func:`raise_if_interrupted`, so such a run still stops at the next step and never publishes.
"""

from __future__ import annotations

import contextlib
import signal
import threading

__all__ = [
    "abandon_pool",
    "ignore_sigint",
    "note_interrupt",
    "clear_interrupt",
    "raise_if_interrupted",
    "die_with_parent",
]

_requested = threading.Event()


def note_interrupt() -> None:
    """Record a Ctrl-C (called by the command's SIGINT handler before it raises KeyboardInterrupt)."""
    _requested.set()


def clear_interrupt() -> None:
    """Forget an earlier Ctrl-C (a new command starts)."""
    _requested.clear()


def raise_if_interrupted() -> None:
    """Raise KeyboardInterrupt when a Ctrl-C was recorded, even if its first KeyboardInterrupt was lost.

    >>> clear_interrupt(); raise_if_interrupted()  # nothing recorded: returns
    """
    if _requested.is_set():
        raise KeyboardInterrupt


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


def die_with_parent(sig: int = signal.SIGKILL) -> None:
    """Linux: this process gets ``sig`` when its parent ends (``PR_SET_PDEATHSIG``); elsewhere nothing.

    Called first thing in a child process, so no child outlives the run that started it (and writes
    behind its back).
    """
    with contextlib.suppress(Exception):
        import ctypes

        pr_set_pdeathsig = 1
        ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, int(sig), 0, 0, 0)
