"""Connected components of a cell mask, found tile by tile and joined exactly across tile edges.

Sea connectivity and sea-level-rise inundation ask one question of a boolean
raster: which cells are connected (8-neighbour) to a seed cell through
candidate cells?  :func:`seeded_components` answers it with memory set by one
tile, not by the raster:

1. **Label each tile** on its own (``scipy.ndimage.label``, 8-connectivity).
   Only labels that touch the tile's border or hold a seed are kept, as
   compact global numbers, with the labels of the four border lines.
2. **Join across tile edges.**  Two border cells of neighbouring tiles are
   connected when both are candidates and they touch (side or corner).  The
   joins form a graph over the kept labels; its connected components
   (``scipy.sparse.csgraph.connected_components``) are the global components
   that cross tiles.  A global component is *seeded* when any of its tile
   labels holds a seed.
3. **Relabel each tile** (the labelling is deterministic) and emit the cells of
   the seeded components, tile by tile.

A component that lies inside one tile never reaches another tile, so it is
seeded exactly when it holds a seed itself; a component that crosses tiles is
the union of tile labels joined through border cells, so it is the same set of
cells as whole-raster labelling finds (tests compare against
``scipy.ndimage.label`` on the whole array, with tile sizes that do not divide
the raster).  Memory: one tile of labels, plus four border lines per tile
(``O(perimeter)``, 8 bytes per border cell) and the join graph.

Several masks can be resolved in one sweep (``n_masks``): the tile reader is
called once per tile and returns a candidate and a seed array per mask.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from landcheck.engine.memory import trim_every
from landcheck.geo.grid import Window, iter_windows

__all__ = ["seeded_components", "TileReader"]

_S8 = np.ones((3, 3), dtype=bool)

#: ``reader(win) -> [(candidate, seeds), ...]``, one pair of (h, w) bool arrays per mask
TileReader = Callable[[Window], list[tuple[np.ndarray, np.ndarray]]]


@dataclass
class _TileBorder:
    """Compact global ids (0 = not a candidate) along the four border lines of one tile."""

    top: np.ndarray
    bottom: np.ndarray
    left: np.ndarray
    right: np.ndarray


def _keep_map(lab: np.ndarray, n: int, seeds: np.ndarray, next_id: int) -> tuple[np.ndarray, int, np.ndarray]:
    """Local label -> compact global id (0 = dropped) for labels on the border or holding a seed."""
    keep = np.zeros(n + 1, dtype=bool)
    keep[lab[0, :]] = True
    keep[lab[-1, :]] = True
    keep[lab[:, 0]] = True
    keep[lab[:, -1]] = True
    seeded_local = np.zeros(n + 1, dtype=bool)
    seeded_local[lab[seeds]] = True
    keep |= seeded_local
    keep[0] = False
    seeded_local[0] = False
    ids = np.zeros(n + 1, dtype=np.int64)
    k = int(keep.sum())
    ids[keep] = np.arange(next_id, next_id + k, dtype=np.int64)
    return ids, next_id + k, ids[seeded_local]


def _pairs_1d(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Joins between two facing border lines (8-connectivity: offsets -1, 0, +1 along the line)."""
    out_a, out_b = [], []
    n = min(len(a), len(b))
    a, b = a[:n], b[:n]
    for off in (-1, 0, 1):
        if off < 0:
            x, y = a[1:], b[:-1]
        elif off > 0:
            x, y = a[:-1], b[1:]
        else:
            x, y = a, b
        sel = (x > 0) & (y > 0)
        out_a.append(x[sel])
        out_b.append(y[sel])
    return np.concatenate(out_a), np.concatenate(out_b)


def seeded_components(
    shape: tuple[int, int],
    tile: int,
    reader: TileReader,
    n_masks: int = 1,
) -> Iterator[tuple[Window, list[np.ndarray]]]:
    """Yield ``(win, masks)`` tile by tile: the cells connected to a seed through candidates.

    Parameters
    ----------
    shape : (rows, cols)
        Raster size.
    tile : int
        Tile side in cells (need not divide the raster).
    reader : callable
        ``reader(win)`` returns ``n_masks`` pairs ``(candidate, seeds)`` of bool arrays of the
        tile's shape.  Seeds outside the candidates are ignored.  It is called twice per tile
        (once per sweep) and must return the same arrays both times.
    n_masks : int
        Number of masks resolved together.

    Yields
    ------
    (Window, list of ndarray of bool)
        Row-major tiles and, per mask, the cells of the tile that belong to a seeded component.
    """
    rows, cols = shape
    wins = list(iter_windows(rows, cols, tile))
    n_tr = -(-rows // tile)
    n_tc = -(-cols // tile)
    borders: list[list[_TileBorder]] = [[] for _ in range(n_masks)]
    seeded_ids: list[list[np.ndarray]] = [[] for _ in range(n_masks)]
    next_id = [1] * n_masks
    # ---- sweep 1: label tiles, keep border and seeded labels
    for win in trim_every(wins):
        pairs = reader(win)
        for m, (cand, seeds) in enumerate(pairs):
            lab, n = ndimage.label(cand, structure=_S8)
            ids, next_id[m], sid = _keep_map(lab, n, seeds & cand, next_id[m])
            g = ids[lab[[0, -1], :]]
            gl = ids[lab[:, [0, -1]]]
            borders[m].append(_TileBorder(g[0].copy(), g[1].copy(), gl[:, 0].copy(), gl[:, 1].copy()))
            seeded_ids[m].append(sid)
    # ---- join across tile edges, then components of the join graph
    resolved = []
    for m in range(n_masks):
        nid = next_id[m]
        ea, eb = [], []
        b = borders[m]
        for ti in range(n_tr):
            for tj in range(n_tc):
                k = ti * n_tc + tj
                if tj + 1 < n_tc:  # right neighbour
                    a_, b_ = _pairs_1d(b[k].right, b[k + 1].left)
                    ea.append(a_)
                    eb.append(b_)
                if ti + 1 < n_tr:  # neighbour below
                    a_, b_ = _pairs_1d(b[k].bottom, b[k + n_tc].top)
                    ea.append(a_)
                    eb.append(b_)
                    if tj + 1 < n_tc:  # corner below right
                        x, y = b[k].bottom[-1], b[k + n_tc + 1].top[0]
                        if x > 0 and y > 0:
                            ea.append(np.array([x]))
                            eb.append(np.array([y]))
                    if tj > 0:  # corner below left
                        x, y = b[k].bottom[0], b[k + n_tc - 1].top[-1]
                        if x > 0 and y > 0:
                            ea.append(np.array([x]))
                            eb.append(np.array([y]))
        ea_ = np.concatenate(ea) if ea else np.empty(0, np.int64)
        eb_ = np.concatenate(eb) if eb else np.empty(0, np.int64)
        graph = coo_matrix((np.ones(len(ea_), dtype=np.int8), (ea_, eb_)), shape=(nid, nid))
        _, comp = connected_components(graph, directed=False)
        comp_seeded = np.zeros(comp.max() + 1 if nid else 1, dtype=bool)
        sids = np.concatenate(seeded_ids[m]) if seeded_ids[m] else np.empty(0, np.int64)
        comp_seeded[comp[sids]] = True
        wet = comp_seeded[comp]
        wet[0] = False
        resolved.append(wet)
        borders[m] = []
    # ---- sweep 2: relabel, emit the cells of seeded components
    next2 = [1] * n_masks
    for win in trim_every(wins):
        pairs = reader(win)
        out = []
        for m, (cand, seeds) in enumerate(pairs):
            lab, n = ndimage.label(cand, structure=_S8)
            ids, next2[m], _ = _keep_map(lab, n, seeds & cand, next2[m])
            local_wet = resolved[m][ids]
            local_wet[0] = False
            out.append(local_wet[lab])
        yield win, out
