"""Compiled (numba) loops around the formula functions of :mod:`landcheck.terrain`.

Imported only when the compiled backend is used.  Functions are defined at
module level so numba can cache the machine code on disk (``cache=True``):
the second run of the program starts without compiling.
"""

from __future__ import annotations

import numba
import numpy as np

from .terrain import _horn_pq, _zt_pq

_horn = numba.njit(inline="always", cache=True)(_horn_pq)
_zt = numba.njit(inline="always", cache=True)(_zt_pq)


@numba.njit(cache=True, nogil=True)
def horn_loop(e, hx, hy, out):
    rows, cols = out.shape
    for i in range(rows):
        bx = hx[i]
        by = hy[i]
        for j in range(cols):
            p, q = _horn(e[i, j], e[i, j + 1], e[i, j + 2], e[i + 1, j], e[i + 1, j + 2],
                         e[i + 2, j], e[i + 2, j + 1], e[i + 2, j + 2], bx, by)
            g = np.hypot(p, q)
            if np.isnan(e[i + 1, j + 1]):
                g = np.nan
            out[i, j] = g


@numba.njit(cache=True, nogil=True)
def zt_loop(e, hx, hy, out):
    rows, cols = out.shape
    for i in range(rows):
        bx = hx[i]
        by = hy[i]
        for j in range(cols):
            p, q = _zt(e[i, j], e[i, j + 1], e[i, j + 2], e[i + 1, j], e[i + 1, j + 2],
                       e[i + 2, j], e[i + 2, j + 1], e[i + 2, j + 2], bx, by)
            g = np.hypot(p, q)
            if np.isnan(e[i + 1, j + 1]):
                g = np.nan
            out[i, j] = g
