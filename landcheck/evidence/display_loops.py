"""Compiled (numba) block reductions for the maps: full-resolution rows in, display blocks out.

The maps show a raster reduced by an integer factor ``f`` (``f × f`` cells a display block).  These
loops add one chunk of full-resolution rows (starting on a block boundary) into per-block
accumulators: the sum and count of valid cells (slope means) or the bitwise OR of the cells inside
parcels (conflict and zone bits).  They read each cell once and release the GIL; the same loops run
whether the cells come from a COG or from the audit's scratch copy, in the same order, so the maps
are the same either way.  tests/test_maps.py checks them against GDAL's average resampling and
against the NumPy formulation.

Imported only when a map is drawn; functions are module-level so numba caches their machine code.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["add_block_means", "add_block_bits"]


@numba.njit(cache=True, nogil=True)
def add_block_means(chunk, nodata, has_nodata, f, r0, sums, counts):  # pragma: no cover - compiled
    """Add the valid cells of ``chunk`` (rows from display row ``r0``) to ``sums``/``counts`` per block.

    NaN is never valid; ``nodata`` is not valid when ``has_nodata``.  Sums are float64.
    """
    h, w = chunk.shape
    for i in range(h):
        bi = r0 + i // f
        for j in range(w):
            v = chunk[i, j]
            if v != v:
                continue
            if has_nodata and v == nodata:
                continue
            bj = j // f
            sums[bi, bj] += np.float64(v)
            counts[bi, bj] += 1


@numba.njit(cache=True, nogil=True)
def add_block_bits(chunk, outside, f, r0, bits, seen):  # pragma: no cover - compiled
    """OR the cells of ``chunk`` other than ``outside`` into ``bits`` per block; mark the block in ``seen``."""
    h, w = chunk.shape
    for i in range(h):
        bi = r0 + i // f
        for j in range(w):
            v = chunk[i, j]
            if v == outside:
                continue
            bj = j // f
            bits[bi, bj] |= v
            seen[bi, bj] = True
