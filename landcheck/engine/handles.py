"""Objects that keep per-thread handles (open datasets, scratch buffers) and still pickle for Dask."""

from __future__ import annotations

import threading

__all__ = ["ThreadLocalHandles"]


class ThreadLocalHandles:
    """Mixin: ``self._local`` is a ``threading.local`` dropped when pickling and rebuilt after."""

    def __getstate__(self):
        state = self.__dict__.copy()
        state.pop("_local", None)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._local = threading.local()
