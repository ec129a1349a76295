"""Depression filling tile by tile: Priority-Flood per tile and a spill graph between tiles.

The tiled Priority-Flood of Barnes (2016, "Parallel priority-flood depression
filling for trillion cell digital elevation models"; docs/references.md §17, "Tiled
hazard steps"), without the epsilon variant:

1. **Per tile**: Priority-Flood (Barnes, Lehman & Mulla 2014) seeded with every
   valid cell on the tile's perimeter and every *outlet* (a valid cell on the
   raster border or next to a nodata cell: where water leaves the area, as in
   pyflwdir's ``fill_depressions``).  Outlets carry the label 0 ("leaves the
   area"), every other perimeter cell a label of its own; flooding spreads the
   labels, so each label is the tile-local watershed of one perimeter cell.
   Where two labels meet, the lower of ``max(f(c), f(n))`` over the meeting
   cells is the spill height between them.
2. **Spill graph**: the labels are joined by those spill heights and, across
   tile edges, by ``max(z(a), z(b))`` between touching perimeter cells of
   neighbouring tiles.  A minimax Dijkstra from label 0 gives each label the
   lowest level at which its water can leave the area.
3. **Per tile again**: the filled elevation is ``max(f_tile(c), level(label(c)))``.

The filled surface is unique — every cell rises to the lowest, over all its
paths to an outlet, of the highest cell on the path — so the result is the same
cell for cell as one whole-raster fill, for any tiling (tests: against a
whole-raster Priority-Flood and against pyflwdir).  Memory: one tile, plus
the tile perimeters and the spill graph.

Not yet wired into :func:`landcheck.terrain.hydrology.flow_directions`: D8
directions across the flats that filling leaves, upstream area and HAND still
need the whole raster (docs/scale.md).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numba
import numpy as np

from landcheck.engine.memory import trim_every
from landcheck.geo.grid import Window, iter_windows

__all__ = ["tiled_fill", "fill_whole", "spill_levels", "raise_to_levels", "perimeter"]

_DR = np.array([-1, -1, -1, 0, 0, 1, 1, 1], np.int64)
_DC = np.array([-1, 0, 1, -1, 1, -1, 0, 1], np.int64)


@numba.njit(cache=True, nogil=True)
def _uheap_push(heap, size, key):
    j = size
    heap[j] = key
    while j > 0:
        p = (j - 1) // 2
        if heap[p] <= heap[j]:
            break
        heap[p], heap[j] = heap[j], heap[p]
        j = p
    return size + 1


@numba.njit(cache=True, nogil=True)
def _uheap_pop(heap, size):
    top = heap[0]
    size -= 1
    heap[0] = heap[size]
    j = 0
    while True:
        a = 2 * j + 1
        b = a + 1
        m = j
        if a < size and heap[a] < heap[m]:
            m = a
        if b < size and heap[b] < heap[m]:
            m = b
        if m == j:
            break
        heap[m], heap[j] = heap[j], heap[m]
        j = m
    return top, size


def _order_bits(z: np.ndarray) -> np.ndarray:
    """float32 -> uint64 whose order is the order of the values (NaN cells are never used)."""
    u = np.ascontiguousarray(z, dtype=np.float32).view(np.uint32).astype(np.uint64)
    neg = (u & np.uint64(0x80000000)) != 0
    return np.where(neg, np.uint64(0xFFFFFFFF) - u, u | np.uint64(0x80000000))


@numba.njit(cache=True, nogil=True)
def _tile_flood_bits(zh, bits, drs, dcs):
    """Priority-Flood of one tile given with a 1-cell halo ``zh`` (NaN off the raster and on nodata).

    ``bits``: :func:`_order_bits` of ``zh``.  Returns ``(filled, label, n_labels, edge_a, edge_b,
    edge_w)``: labels 0 (outlet) and 1..n_labels-1 (perimeter cells, row-major along the perimeter),
    spill edges between labels.  The heap holds one uint64 per cell, the level's order bits above
    the cell index; cells reached below the current level go to a plain FIFO queue instead (the
    improved Priority-Flood of Barnes et al. 2014), which fills them to that level.
    """
    H, W = zh.shape
    h, w = H - 2, W - 2
    n = h * w
    filled = np.empty((h, w), np.float32)
    level_bits = np.empty(n, np.uint64)
    label = np.full((h, w), -1, np.int64)
    heap = np.empty(n, np.uint64)
    pit = np.empty(n, np.int64)
    ph = 0
    pt = 0
    size = 0
    n_labels = 1
    for r in range(h):
        for c in range(w):
            z = zh[r + 1, c + 1]
            if np.isnan(z):
                continue
            outlet = False
            for k in range(8):
                if np.isnan(zh[r + 1 + drs[k], c + 1 + dcs[k]]):
                    outlet = True
                    break
            perim = r == 0 or c == 0 or r == h - 1 or c == w - 1
            if outlet or perim:
                if outlet:
                    label[r, c] = 0
                else:
                    label[r, c] = n_labels
                    n_labels += 1
                filled[r, c] = z
                i = r * w + c
                level_bits[i] = bits[r + 1, c + 1]
                size = _uheap_push(heap, size, (bits[r + 1, c + 1] << np.uint64(32)) | np.uint64(i))
    edges = dict()
    edges[np.int64(-1)] = np.float32(0.0)  # typed by first insertion
    while size > 0 or ph < pt:
        if ph < pt:
            i = pit[ph]
            ph += 1
        else:
            key, size = _uheap_pop(heap, size)
            i = np.int64(key & np.uint64(0xFFFFFFFF))
        r0 = i // w
        c0 = i % w
        f0 = filled[r0, c0]
        b0 = level_bits[i]
        l0 = label[r0, c0]
        for k in range(8):
            r = r0 + drs[k]
            c = c0 + dcs[k]
            if r < 0 or r >= h or c < 0 or c >= w:
                continue
            z = zh[r + 1, c + 1]
            if np.isnan(z):
                continue
            ln = label[r, c]
            if ln >= 0:
                if ln != l0:
                    a = min(l0, ln)
                    b = max(l0, ln)
                    ekey = a * (n + 1) + b
                    s = max(f0, filled[r, c])
                    old = edges.get(ekey, np.float32(np.inf))
                    if s < old:
                        edges[ekey] = s
                continue
            j = r * w + c
            label[r, c] = l0
            if z <= f0:
                filled[r, c] = f0
                level_bits[j] = b0
                pit[pt] = j
                pt += 1
            else:
                filled[r, c] = z
                level_bits[j] = bits[r + 1, c + 1]
                size = _uheap_push(heap, size, (bits[r + 1, c + 1] << np.uint64(32)) | np.uint64(j))
    del edges[np.int64(-1)]
    m = len(edges)
    ea = np.empty(m, np.int64)
    eb = np.empty(m, np.int64)
    ew = np.empty(m, np.float32)
    j = 0
    for key, val in edges.items():
        ea[j] = key // (n + 1)
        eb[j] = key % (n + 1)
        ew[j] = val
        j += 1
    return filled, label, n_labels, ea, eb, ew


def _tile_flood(zh: np.ndarray, drs, dcs):
    """:func:`_tile_flood_bits` of ``zh`` (float32 with halo); refuses tiles of 2**32 cells or more."""
    if (zh.shape[0] - 2) * (zh.shape[1] - 2) >= 2**32:
        raise ValueError("a tile must hold fewer than 2**32 cells")
    return _tile_flood_bits(zh, _order_bits(zh), drs, dcs)


@numba.njit(cache=True, nogil=True)
def _bottleneck_levels(n_nodes, a, b, w, order):
    """Lowest level at which each node drains to node 0, by Kruskal's order (edges by rising spill height).

    The bottleneck (minimax) path value is unique, so any method gives the same levels (tested against
    the path maxima in scipy's minimum spanning tree); this one needs the edge list once (no adjacency
    arrays), 12 B per edge.  Each component keeps a linked list
    of its nodes; when an edge joins a component to node 0's, its nodes take that edge's height.
    """
    parent = np.arange(n_nodes)
    size = np.ones(n_nodes, np.int64)
    head = np.arange(n_nodes)
    tail = np.arange(n_nodes)
    nxt = np.full(n_nodes, -1, np.int64)
    level = np.full(n_nodes, np.inf, np.float32)
    level[0] = -np.inf
    for t in range(order.shape[0]):
        e = order[t]
        x = np.int64(a[e])
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        y = np.int64(b[e])
        while parent[y] != y:
            parent[y] = parent[parent[y]]
            y = parent[y]
        if x == y:
            continue
        r0 = np.int64(0)
        while parent[r0] != r0:
            r0 = parent[r0]
        if x == r0 or y == r0:
            m = head[y] if x == r0 else head[x]
            while m != -1:
                level[m] = w[e]
                m = nxt[m]
        if size[x] < size[y]:
            x, y = y, x
        parent[y] = x
        size[x] += size[y]
        nxt[tail[x]] = head[y]
        tail[x] = tail[y]
    return level


def perimeter(a: np.ndarray) -> dict:
    return {"top": a[0, :].copy(), "bottom": a[-1, :].copy(), "left": a[:, 0].copy(), "right": a[:, -1].copy()}


def _cross_edges(la, za, lb, zb):
    """Edges between facing perimeter lines (8-connectivity: offsets -1, 0, +1 along the line)."""
    out = []
    for off in (-1, 0, 1):
        if off < 0:
            x, y, zx, zy = la[1:], lb[:-1], za[1:], zb[:-1]
        elif off > 0:
            x, y, zx, zy = la[:-1], lb[1:], za[:-1], zb[1:]
        else:
            x, y, zx, zy = la, lb, za, zb
        sel = (x >= 0) & (y >= 0)
        out.append((x[sel], y[sel], np.maximum(zx[sel], zy[sel])))
    return out


def spill_levels(n_tc: int, tiles: list) -> tuple[np.ndarray, list[int]]:
    """Solve the spill graph: the level of every global label and each tile's label offset.

    ``tiles`` holds, row-major with ``n_tc`` tiles per row, ``(n_labels, ea, eb, ew, label_perimeter,
    z_perimeter)`` for every tile: :func:`_tile_flood`'s counts and spill edges, and the
    :func:`perimeter` of its labels and elevations (no halo).  A tile's local label ``k >= 1`` is
    global label ``k + offset``.
    """
    offsets: list[int] = []
    perims: list = []
    ea_all: list = []
    eb_all: list = []
    ew_all: list = []
    next_id = 1  # global node 0 = "leaves the area"
    for n_labels, ea, eb, ew, label, z in tiles:
        off = next_id - 1
        g = {side: np.where(v > 0, v + off, v) for side, v in label.items()}  # -1 stays: nodata
        perims.append((g, z))
        offsets.append(off)
        ea_all.append(np.where(ea > 0, ea + off, 0).astype(np.int32))
        eb_all.append(np.where(eb > 0, eb + off, 0).astype(np.int32))
        ew_all.append(ew)
        next_id += n_labels - 1
    n_tiles = len(tiles)
    for k in range(n_tiles):
        tj = k % n_tc
        (gk, zk) = perims[k]
        pairs = []
        if tj + 1 < n_tc:
            g2, z2 = perims[k + 1]
            pairs += _cross_edges(gk["right"], zk["right"], g2["left"], z2["left"])
        if k + n_tc < n_tiles:
            g2, z2 = perims[k + n_tc]
            pairs += _cross_edges(gk["bottom"], zk["bottom"], g2["top"], z2["top"])
            if tj + 1 < n_tc:
                g3, z3 = perims[k + n_tc + 1]
                pairs += _cross_edges(gk["bottom"][-1:], zk["bottom"][-1:], g3["top"][:1], z3["top"][:1])[1:2]
            if tj > 0:
                g3, z3 = perims[k + n_tc - 1]
                pairs += _cross_edges(gk["bottom"][:1], zk["bottom"][:1], g3["top"][-1:], z3["top"][-1:])[1:2]
        for pa, pb, pw in pairs:
            ea_all.append(pa.astype(np.int32))
            eb_all.append(pb.astype(np.int32))
            ew_all.append(pw.astype(np.float32))
    a = np.concatenate(ea_all).astype(np.int32)
    del ea_all
    b = np.concatenate(eb_all).astype(np.int32)
    del eb_all
    wgt = np.concatenate(ew_all).astype(np.float32)
    del ew_all
    level = _bottleneck_levels(next_id, a, b, wgt, np.argsort(wgt, kind="stable"))
    return level, offsets


def raise_to_levels(filled: np.ndarray, label: np.ndarray, level: np.ndarray, offset: int) -> np.ndarray:
    """A tile's filled elevations: its own Priority-Flood raised to its labels' spill levels (NaN on nodata)."""
    g = np.where(label > 0, label + offset, 0)
    out = np.maximum(filled, level[g])
    out[label < 0] = np.nan
    return out


def tiled_fill(
    shape: tuple[int, int], tile: int, read_with_halo: Callable[[Window], np.ndarray]
) -> Iterator[tuple[Window, np.ndarray]]:
    """Yield ``(win, filled)`` row-major: the depression-filled float32 elevations of each tile.

    ``read_with_halo(win)`` returns the tile's float32 elevations grown by one cell on every side,
    NaN for nodata and off the raster; it is called twice per tile.  (The routing of
    :mod:`landcheck.terrain.tiled_routing` keeps each tile's first flood on disk instead.)
    """
    rows, cols = shape
    wins = list(iter_windows(rows, cols, tile))
    n_tc = -(-cols // tile)
    tiles = []
    for win in trim_every(wins):
        zh = np.ascontiguousarray(read_with_halo(win), dtype=np.float32)
        _, label, n_labels, ea, eb, ew = _tile_flood(zh, _DR, _DC)
        tiles.append((n_labels, ea, eb, ew, perimeter(label), perimeter(zh[1:-1, 1:-1])))
    level, offsets = spill_levels(n_tc, tiles)
    tiles = []
    for k, win in enumerate(trim_every(wins)):
        zh = np.ascontiguousarray(read_with_halo(win), dtype=np.float32)
        filled, label, _, _, _, _ = _tile_flood(zh, _DR, _DC)
        yield win, raise_to_levels(filled, label, level, offsets[k])


def fill_whole(z: np.ndarray) -> np.ndarray:
    """Whole-raster Priority-Flood with the same outlets (one tile covering the raster)."""
    z = np.asarray(z, dtype=np.float32)
    zh = np.pad(z, 1, constant_values=np.nan)
    filled, label, *_ = _tile_flood(zh, _DR, _DC)
    filled[label < 0] = np.nan
    return filled
