"""Compiled (numba) loops around the formula functions of :mod:`landcheck.terrain.slope`.

Imported only when the compiled backend is used.  Functions are defined at
module level so numba can cache the machine code on disk (``cache=True``):
the second run of the program starts without compiling.

The loops accept float64 or float32 elevations: each value is widened to
float64 (exactly) before the formula, so both give bit-identical slopes and a
float32 DEM need not be copied to float64 first.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from landcheck.terrain.slope import _horn_pq, _zt_pq

_horn = numba.njit(inline="always", cache=True)(_horn_pq)
_zt = numba.njit(inline="always", cache=True)(_zt_pq)
f8 = np.float64  # elevations may arrive as float32 (exact widening); the formulas always run in float64


@numba.njit(cache=True, nogil=True)
def horn_loop(e, hx, hy, out):
    rows, cols = out.shape
    for i in range(rows):
        bx = hx[i]
        by = hy[i]
        for j in range(cols):
            p, q = _horn(
                f8(e[i, j]),
                f8(e[i, j + 1]),
                f8(e[i, j + 2]),
                f8(e[i + 1, j]),
                f8(e[i + 1, j + 2]),
                f8(e[i + 2, j]),
                f8(e[i + 2, j + 1]),
                f8(e[i + 2, j + 2]),
                bx,
                by,
            )
            g = math.sqrt(p * p + q * q)
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
            p, q = _zt(
                f8(e[i, j]),
                f8(e[i, j + 1]),
                f8(e[i, j + 2]),
                f8(e[i + 1, j]),
                f8(e[i + 1, j + 2]),
                f8(e[i + 2, j]),
                f8(e[i + 2, j + 1]),
                f8(e[i + 2, j + 2]),
                bx,
                by,
            )
            g = math.sqrt(p * p + q * q)
            if np.isnan(e[i + 1, j + 1]):
                g = np.nan
            out[i, j] = g
