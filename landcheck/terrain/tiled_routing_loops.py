"""Compiled loops of the tiled flow routing (:mod:`landcheck.terrain.tiled_routing`).

Every loop works on one tile given with a one-cell halo (the neighbouring tiles' edge cells, or
nodata off the raster).  Arrays with a halo have shape ``(h + 2, w + 2)``; results cover the
tile's own ``h x w`` cells.  Directions use pyflwdir's D8 codes (0 = pit, 247 = nodata) and
the neighbour order of :data:`landcheck.terrain.hydrology._D8_NEIGHBOURS`.
"""

from __future__ import annotations

import numba
import numpy as np

#: "not reached" in the flat distances
FAR = np.int32(2**31 - 1)
D8_PIT = np.uint8(0)
D8_NODATA = np.uint8(247)


@numba.njit(cache=True, nogil=True)
def flat_distances(zh, dh, drs, dcs):
    """Steps from each flat cell to the nearest exit of its flat, over cells of the same height.

    ``zh``: filled float32 elevations with halo (NaN = nodata or off the raster).  ``dh``: int32
    distances of the halo cells as their own tiles last found them (``FAR`` where unknown); its
    interior is ignored.  An *exit* is a valid cell with a strictly lower neighbour or a nodata
    neighbour (an edge cell); it has distance 0.  A *flat* cell is any other valid cell; its
    distance is the fewest 8-neighbour steps, through cells of exactly its height, to an exit.
    Returns the distances with halo (interior computed, halo as given) and the number of flat cells.
    """
    H, W = zh.shape
    d = dh.copy()
    flat = np.zeros((H, W), np.bool_)
    n_flat = 0
    for r in range(1, H - 1):
        for c in range(1, W - 1):
            z = zh[r, c]
            if np.isnan(z):
                d[r, c] = FAR
                continue
            ex = False
            for k in range(8):
                zn = zh[r + drs[k], c + dcs[k]]
                if np.isnan(zn) or zn < z:
                    ex = True
                    break
            if ex:
                d[r, c] = 0
            else:
                d[r, c] = FAR
                flat[r, c] = True
                n_flat += 1
    if n_flat == 0:
        return d, 0
    # seeds: cells next to a flat cell of the same height with a known distance (exits inside,
    # halo cells with a distance), taken in order of distance; then breadth-first growth,
    # merging the FIFO queue with the sorted seeds so cells leave in order of distance
    seed_idx = np.empty(H * W, np.int64)
    seed_d = np.empty(H * W, np.int64)
    ns = 0
    marked = np.zeros((H, W), np.bool_)
    for r in range(1, H - 1):
        for c in range(1, W - 1):
            if not flat[r, c]:
                continue
            z = zh[r, c]
            for k in range(8):
                rn = r + drs[k]
                cn = c + dcs[k]
                if marked[rn, cn] or flat[rn, cn] or zh[rn, cn] != z or d[rn, cn] == FAR:
                    continue
                marked[rn, cn] = True
                seed_idx[ns] = rn * W + cn
                seed_d[ns] = d[rn, cn]
                ns += 1
    _grow(zh, d, flat, seed_idx[:ns], seed_d[:ns], drs, dcs)
    return d, n_flat


@numba.njit(cache=True, nogil=True)
def _grow(zh, d, flat, seed_idx, seed_d, drs, dcs):
    """Breadth-first growth of the distances ``d`` over ``flat`` cells of equal height from the seeds.

    Cells leave in order of distance: the FIFO queue is merged with the seeds sorted by distance.
    Only distances that fall are written, so growing from more seeds later gives the same result as
    one search from all of them.
    """
    H, W = zh.shape
    ns = seed_idx.shape[0]
    order = np.argsort(seed_d, kind="mergesort")
    q = np.empty(H * W, np.int64)
    qh = 0
    qt = 0
    si = 0
    while si < ns or qh < qt:
        if qh < qt and (si >= ns or d.flat[q[qh]] <= seed_d[order[si]]):
            u = q[qh]
            qh += 1
        else:
            u = seed_idx[order[si]]
            si += 1
        ru = u // W
        cu = u % W
        du = d[ru, cu]
        z = zh[ru, cu]
        for k in range(8):
            rn = ru + drs[k]
            cn = cu + dcs[k]
            if rn < 1 or rn >= H - 1 or cn < 1 or cn >= W - 1:
                continue
            if flat[rn, cn] and zh[rn, cn] == z and d[rn, cn] > du + 1:
                d[rn, cn] = du + 1
                q[qt] = rn * W + cn
                qt += 1


@numba.njit(cache=True, nogil=True)
def regrow_flat_distances(zh, d, seed_idx, drs, dcs):
    """Lower the stored distances ``d`` (with halo, the halo updated) from the halo cells ``seed_idx``.

    Flat cells are the valid interior cells with a distance other than 0; the result equals a full
    :func:`flat_distances` with the new halo, since distances only ever fall.
    """
    H, W = zh.shape
    flat = np.zeros((H, W), np.bool_)
    for r in range(1, H - 1):
        for c in range(1, W - 1):
            flat[r, c] = d[r, c] != 0 and not np.isnan(zh[r, c])
    seed_d = np.empty(seed_idx.shape[0], np.int64)
    for i in range(seed_idx.shape[0]):
        seed_d[i] = d.flat[seed_idx[i]]
    _grow(zh, d, flat, seed_idx, seed_d, drs, dcs)
    return d


@numba.njit(cache=True, nogil=True)
def halo_relevance(zh, d, drs, dcs):
    """Halo cells next to a flat cell of the tile with the same height: the only halo distances a search uses."""
    H, W = zh.shape
    rel = np.zeros((H, W), np.bool_)
    for r in range(1, H - 1):
        for c in range(1, W - 1):
            if not (r == 1 or c == 1 or r == H - 2 or c == W - 2):
                continue
            z = zh[r, c]
            if np.isnan(z) or d[r, c] == 0:
                continue
            for k in range(8):
                rn = r + drs[k]
                cn = c + dcs[k]
                if (rn == 0 or cn == 0 or rn == H - 1 or cn == W - 1) and zh[rn, cn] == z:
                    rel[rn, cn] = True
    return rel


@numba.njit(cache=True, nogil=True)
def d8_codes(zh, d, hx, hy, drs, dcs, codes):
    """D8 code of each cell of the tile: steepest descent, else a pit on the edge, else along its flat.

    ``zh`` and ``d`` with halo (from :func:`flat_distances` with the final halo distances); ``hx``,
    ``hy`` ground cell sizes per row of ``zh``.  The descent is ``(z - zn) / dist`` in float64 and
    the first strictly steepest neighbour in neighbour order wins (the arithmetic of
    :func:`landcheck.terrain.routing_loops.steepest_d8`).  A cell with no lower neighbour drains
    to its first neighbour of the same height one step nearer its flat's exit; an exit with no
    lower neighbour (an edge cell) is a pit.  Returns the codes and the number of flat cells no
    exit was found for (0 on a depression-filled surface).
    """
    H, W = zh.shape
    h = H - 2
    w = W - 2
    out = np.empty((h, w), np.uint8)
    stranded = 0
    for r in range(1, H - 1):
        hxr = hx[r]
        hyr = hy[r]
        hdr = np.hypot(hxr, hyr)
        for c in range(1, W - 1):
            zc = zh[r, c]
            if np.isnan(zc):
                out[r - 1, c - 1] = D8_NODATA
                continue
            best = 0.0
            k_best = 0
            for k in range(8):
                dr = drs[k]
                dc = dcs[k]
                if dr != 0 and dc != 0:
                    dist = hdr
                elif dr != 0:
                    dist = hyr
                else:
                    dist = hxr
                descent = (np.float64(zc) - np.float64(zh[r + dr, c + dc])) / dist
                if descent > best:
                    best = descent
                    k_best = codes[k]
            if best > 0:
                out[r - 1, c - 1] = k_best
                continue
            dc0 = d[r, c]
            if dc0 == 0:
                out[r - 1, c - 1] = D8_PIT
                continue
            code = D8_PIT
            if dc0 != FAR:
                for k in range(8):
                    rn = r + drs[k]
                    cn = c + dcs[k]
                    if zh[rn, cn] == zc and d[rn, cn] == dc0 - 1:
                        code = codes[k]
                        break
            if code == D8_PIT:
                stranded += 1
            out[r - 1, c - 1] = code
    return out, stranded


@numba.njit(cache=True, nogil=True)
def drain_tile(d8h, dec_r, dec_c):
    """Receivers inside the tile and an upstream-to-downstream order of its valid cells.

    ``recv[i]`` (tile-local linear index): the receiving cell's index, -1 for a pit, -2 for
    nodata, -3 when the water leaves the tile.  ``order`` lists the valid cells with every cell
    before the cell it drains to.  ``n_valid - len(order)`` cells lie on a cycle (never on
    directions from :func:`d8_codes`).
    """
    H, W = d8h.shape
    h = H - 2
    w = W - 2
    n = h * w
    recv = np.empty(n, np.int64)
    indeg = np.zeros(n, np.int32)
    n_valid = 0
    for r in range(h):
        for c in range(w):
            i = r * w + c
            code = d8h[r + 1, c + 1]
            if code == D8_NODATA:
                recv[i] = -2
                continue
            n_valid += 1
            if code == D8_PIT:
                recv[i] = -1
                continue
            rr = r + dec_r[code]
            cc = c + dec_c[code]
            if rr < 0 or rr >= h or cc < 0 or cc >= w:
                recv[i] = -3
            else:
                j = rr * w + cc
                recv[i] = j
                indeg[j] += 1
    order = np.empty(n_valid, np.int64)
    tail = 0
    for i in range(n):
        if recv[i] != -2 and indeg[i] == 0:
            order[tail] = i
            tail += 1
    head = 0
    while head < tail:
        i = order[head]
        head += 1
        j = recv[i]
        if j >= 0:
            indeg[j] -= 1
            if indeg[j] == 0:
                order[tail] = j
                tail += 1
    return recv, order[:tail], n_valid


@numba.njit(cache=True, nogil=True)
def entries(d8h, dec_r, dec_c):
    """Tile-local indices of the cells that receive water from a halo cell (one per donor)."""
    H, W = d8h.shape
    h = H - 2
    w = W - 2
    out = np.empty(2 * (H + W) * 3, np.int64)
    m = 0
    for r in range(H):
        for c in range(W):
            if 0 < r < H - 1 and 0 < c < W - 1:
                continue
            code = d8h[r, c]
            if code == D8_NODATA or code == D8_PIT:
                continue
            rr = r + dec_r[code] - 1
            cc = c + dec_c[code] - 1
            if 0 <= rr < h and 0 <= cc < w:
                out[m] = rr * w + cc
                m += 1
    return out[:m]


@numba.njit(cache=True, nogil=True)
def accumulate(recv, order, own, extra):
    """Upstream totals (int64, cell itself included) along ``order``: ``own`` per cell plus ``extra``."""
    acc = own + extra
    for t in range(order.shape[0]):
        i = order[t]
        j = recv[i]
        if j >= 0:
            acc[j] += acc[i]
    return acc


@numba.njit(cache=True, nogil=True)
def exit_of(recv, order):
    """For each valid cell, the tile-local index of the cell where its path leaves the tile, or -1."""
    out = np.full(recv.shape[0], -1, np.int64)
    for t in range(order.shape[0] - 1, -1, -1):
        i = order[t]
        j = recv[i]
        if j == -3:
            out[i] = i
        elif j >= 0:
            out[i] = out[j]
    return out


@numba.njit(cache=True, nogil=True)
def drain_heights(recv, order, z, stream, exit_value):
    """Height of the drain each cell's path ends at: the first stream cell, else the pit.

    ``z`` filled heights (float32, tile-local flat), ``stream`` bool per cell, ``exit_value``
    per cell: for a cell where the path leaves the tile, the drain height found beyond (NaN when
    not yet known).  Returns the drain heights (float64, NaN where unknown or nodata) and, per
    cell, the exit cell its drain lies beyond (-1 when the drain is inside the tile).
    """
    n = recv.shape[0]
    dz = np.full(n, np.nan)
    link = np.full(n, -1, np.int64)
    for t in range(order.shape[0] - 1, -1, -1):
        i = order[t]
        j = recv[i]
        if stream[i] or j == -1:
            dz[i] = z[i]
        elif j >= 0:
            dz[i] = dz[j]
            link[i] = link[j]
        else:
            dz[i] = exit_value[i]
            link[i] = i
    return dz, link


@numba.njit(cache=True, nogil=True)
def solve_forest(target, own):
    """Sum ``own`` down a forest: ``total[x] = own[x] + sum(total[y] for y with target[y] == x)``.

    ``target[y]`` is the index of the node ``y`` passes its total to, or -1.  Raises on a cycle.
    """
    n = target.shape[0]
    indeg = np.zeros(n, np.int64)
    for y in range(n):
        if target[y] >= 0:
            indeg[target[y]] += 1
    total = own.copy()
    stack = np.empty(n, np.int64)
    top = 0
    for y in range(n):
        if indeg[y] == 0:
            stack[top] = y
            top += 1
    done = 0
    while top > 0:
        top -= 1
        y = stack[top]
        done += 1
        x = target[y]
        if x >= 0:
            total[x] += total[y]
            indeg[x] -= 1
            if indeg[x] == 0:
                stack[top] = x
                top += 1
    if done != n:
        raise ValueError("flow directions form a cycle across tiles")
    return total


@numba.njit(cache=True, nogil=True)
def resolve_chains(nxt, value):
    """``value[y]`` where ``nxt[y] == -1``; otherwise the value at the end of the chain ``y -> nxt[y] -> ...``."""
    n = nxt.shape[0]
    out = value.copy()
    state = np.zeros(n, np.int8)  # 0 new, 1 on the current path, 2 done
    path = np.empty(n, np.int64)
    for s in range(n):
        if state[s] == 2:
            continue
        m = 0
        y = s
        while y >= 0 and state[y] == 0:
            state[y] = 1
            path[m] = y
            m += 1
            y = nxt[y]
        if y >= 0 and state[y] == 1:
            raise ValueError("flow directions form a cycle across tiles")
        v = out[path[m - 1]] if y < 0 else out[y]
        for t in range(m - 1, -1, -1):
            out[path[t]] = v
            state[path[t]] = 2
    return out
