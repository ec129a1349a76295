"""Compiled (numba) loops for the maps: block reductions of full-resolution rows, and burnt outlines.

The maps show a raster reduced by an integer factor ``f`` (``f × f`` cells a display block).  These
loops add one chunk of full-resolution rows (starting on a block boundary) into per-block
accumulators: the sum and count of valid cells (slope means) or the bitwise OR of the cells inside
parcels (conflict and zone bits).  They read each cell once and release the GIL; the same loops run
whether the cells come from a COG or from the audit's scratch copy, in the same order, so the maps
are the same either way.  tests/test_maps.py checks them against GDAL's average resampling and
against the NumPy formulation.

:func:`burn_segments` marks the pixels of a map image crossed by outline segments (many parcels are
drawn as one image, see ``maps._burn_outlines``); tests/test_maps.py checks it against a plain Python
formulation of the same rule.

Imported only when a map is drawn; functions are module-level so numba caches their machine code.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["add_block_means", "add_block_bits", "burn_segments"]


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


@numba.njit(cache=True, nogil=True)
def burn_segments(xy, ring, x0, y1, sx, sy, code, codes):  # pragma: no cover - compiled
    """Set ``codes`` to ``code`` in every pixel crossed by a segment between consecutive vertices of one ring.

    ``xy`` holds map coordinates (float64, one vertex a row) and ``ring`` the ring of each vertex: vertex
    ``k`` and ``k + 1`` make a segment when ``ring[k] == ring[k + 1]``.  A vertex is at pixel column
    ``(x - x0) * sx`` and row ``(y1 - y) * sy``.  A segment from a to b is sampled at ``n + 1`` evenly
    spaced points ``a + (b - a) * (i / n)``, ``i = 0..n``, with ``n = max(1, ceil(2 * max(|bx - ax|,
    |by - ay|)))`` (half-pixel steps), and the pixel ``(floor(row), floor(col))`` of each sample inside
    the image is set.  A segment with a NaN or infinite coordinate difference is sampled at its two ends
    only, as the NumPy formulation of the same rule does.
    """
    h, w = codes.shape
    for k in range(xy.shape[0] - 1):
        if ring[k] != ring[k + 1]:
            continue
        ax = (xy[k, 0] - x0) * sx
        ay = (y1 - xy[k, 1]) * sy
        dx = (xy[k + 1, 0] - x0) * sx - ax
        dy = (y1 - xy[k + 1, 1]) * sy - ay
        span = np.ceil(2.0 * max(abs(dx), abs(dy))) if dx == dx and dy == dy else math.nan
        # NumPy's int64 of NaN, of infinity and of 2**63 or more is the least int64, so there n is 1
        n = int(span) if 1.0 <= span < 9223372036854775808.0 else 1
        for i in range(n + 1):
            t = i / n
            c = ax + dx * t
            r = ay + dy * t
            if 0.0 <= c < w and 0.0 <= r < h:
                codes[int(r), int(c)] = code
