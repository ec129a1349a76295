"""Flow routing tile by tile: depression filling, D8, upstream area, streams and HAND.

Every step holds one tile per worker plus values on the tile edges, so memory does not grow
with the raster; tiles are kept on disk (``.npy`` files in a scratch folder) between steps.
The results are the same, cell for cell, as one tile covering the whole raster (tests with
tiles of 1 to 64 cells that do not divide the raster; docs/references.md §17):

1. **Filling** (:mod:`landcheck.terrain.tiled_fill`): Priority-Flood per tile, the spill
   graph between tiles solved once, each tile raised to its spill levels.
2. **Flats**: a cell with no lower neighbour that is not on the edge of the data lies on a
   flat left by filling.  Its distance to the flat's nearest *exit* (a cell of the same
   height with a lower neighbour, or on the edge) is found per tile by breadth-first search
   seeded with the distances on the neighbouring tiles' edges; tiles whose edge distances
   change are searched again until none changes (the distances only fall, so this ends with
   the whole-raster distances).
3. **D8**: steepest descent on the filled surface (O'Callaghan & Mark 1984); a flat cell
   drains to its first neighbour of the same height one step nearer the exit; an edge cell
   with no lower neighbour is an outlet (pit).
4. **Upstream area** in exact integer units of 1e-4 m^2 (the whole Earth is 5.1e18 units,
   within int64), so sums do not depend on the order they are added in: accumulated per tile
   with no inflow; the flow leaving each tile is passed between tiles through a forest of
   tile-edge cells, solved once; each tile is then accumulated again with its inflow.
5. **Streams** where the upstream area reaches a channel-initiation area; **HAND** (Renno et
   al. 2008) as the filled height minus the filled height of the first stream cell (or the
   outlet) down the path: resolved inside each tile, paths that leave a tile take the drain
   found beyond its edge through a chain of tile-edge cells, solved once.
"""

from __future__ import annotations

import logging
import shutil
import tempfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from landcheck.engine.memory import trim_every
from landcheck.engine.windows import progress_bar, run_windows
from landcheck.geo.grid import Window, iter_windows
from landcheck.terrain import tiled_fill as tf
from landcheck.terrain import tiled_routing_loops as loops

__all__ = ["HandSpec", "TiledRouting", "route_tiles", "AREA_UNIT_M2", "area_units", "threshold_units"]

logger = logging.getLogger(__name__)

#: upstream areas are sums of cell areas counted in this unit (exact integer arithmetic)
AREA_UNIT_M2 = 1e-4

# neighbour order and codes of landcheck.terrain.hydrology._D8_NEIGHBOURS (kept equal by a test)
_NB = ((-1, 0, 64), (0, 1, 1), (1, 0, 4), (0, -1, 16), (-1, 1, 128), (1, 1, 2), (1, -1, 8), (-1, -1, 32))
DRS = np.array([n[0] for n in _NB], np.int64)
DCS = np.array([n[1] for n in _NB], np.int64)
CODES = np.array([n[2] for n in _NB], np.uint8)
DEC_R = np.zeros(256, np.int64)
DEC_C = np.zeros(256, np.int64)
for _dr, _dc, _code in _NB:
    DEC_R[_code] = _dr
    DEC_C[_code] = _dc


def area_units(area_m2) -> np.ndarray:
    """Cell areas in m^2 as integer counts of :data:`AREA_UNIT_M2` (rounded to nearest)."""
    return np.rint(np.asarray(area_m2, dtype=np.float64) / AREA_UNIT_M2).astype(np.int64)


def threshold_units(area_m2: float) -> int:
    """The smallest count of :data:`AREA_UNIT_M2` that reaches ``area_m2`` (a channel-initiation area)."""
    return int(np.ceil(float(area_m2) / AREA_UNIT_M2 - 1e-9))


@dataclass(frozen=True)
class HandSpec:
    """One HAND mask: cells whose HAND is at most ``max_hand_m`` above streams of ``channel_area_m2``."""

    channel_area_m2: float
    max_hand_m: float


def _halo_vec(a: np.ndarray) -> np.ndarray:
    """The halo cells of an ``(h + 2, w + 2)`` array in a fixed order (top, bottom, left, right)."""
    return np.concatenate([a[0], a[-1], a[1:-1, 0], a[1:-1, -1]])


def _halo_index(H: int, W: int) -> np.ndarray:
    """Flat indices into an ``(H, W)`` array of the cells :func:`_halo_vec` lists, in its order."""
    r = np.arange(1, H - 1)
    return np.concatenate([np.arange(W), (H - 1) * W + np.arange(W), r * W, r * W + W - 1])


def _ring(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    return a[0].copy(), a[-1].copy(), a[:, 0].copy(), a[:, -1].copy()


class _Tiles:
    """The tiling of a raster and the halo of a tile assembled from its neighbours' edge rings."""

    def __init__(self, shape: tuple[int, int], tile: int):
        self.rows, self.cols = shape
        self.wins = list(iter_windows(self.rows, self.cols, tile))
        self.n_tc = -(-self.cols // tile)
        self.n_tr = -(-self.rows // tile)
        self.index = {(w.row_off, w.col_off): k for k, w in enumerate(self.wins)}

    def k(self, win: Window) -> int:
        return self.index[(win.row_off, win.col_off)]

    def neighbours(self, k: int) -> list[int]:
        tr, tc = divmod(k, self.n_tc)
        out = []
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                r, c = tr + dr, tc + dc
                if (dr or dc) and 0 <= r < self.n_tr and 0 <= c < self.n_tc:
                    out.append(r * self.n_tc + c)
        return out

    def with_halo(self, k: int, centre: np.ndarray, rings: Sequence, fill) -> np.ndarray:
        """``centre`` grown by one cell taken from the neighbours' rings (``fill`` off the raster or unknown)."""
        h, w = centre.shape
        out = np.full((h + 2, w + 2), fill, dtype=centre.dtype)
        out[1:-1, 1:-1] = centre
        tr, tc = divmod(k, self.n_tc)
        up, down, left, right = tr > 0, tr < self.n_tr - 1, tc > 0, tc < self.n_tc - 1
        n = self.n_tc

        def ring(j):
            return rings[j] if rings is not None else None

        if up and ring(k - n) is not None:
            out[0, 1:-1] = rings[k - n][1]
        if down and ring(k + n) is not None:
            out[-1, 1:-1] = rings[k + n][0]
        if left and ring(k - 1) is not None:
            out[1:-1, 0] = rings[k - 1][3]
        if right and ring(k + 1) is not None:
            out[1:-1, -1] = rings[k + 1][2]
        if up and left and ring(k - n - 1) is not None:
            out[0, 0] = rings[k - n - 1][1][-1]
        if up and right and ring(k - n + 1) is not None:
            out[0, -1] = rings[k - n + 1][1][0]
        if down and left and ring(k + n - 1) is not None:
            out[-1, 0] = rings[k + n - 1][0][-1]
        if down and right and ring(k + n + 1) is not None:
            out[-1, -1] = rings[k + n + 1][0][0]
        return out


class _Scratch:
    """Tiles of intermediate rasters as ``.npy`` files in a folder this run made (removed by :meth:`close`)."""

    def __init__(self, parent: str | None = None):
        self.folder = Path(tempfile.mkdtemp(prefix="landcheck-routing-", dir=parent))

    def save(self, name: str, k: int, a: np.ndarray) -> None:
        np.save(self.folder / f"{name}_{k}.npy", a, allow_pickle=False)

    def load(self, name: str, k: int) -> np.ndarray:
        return np.load(self.folder / f"{name}_{k}.npy", allow_pickle=False)

    def close(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)


@dataclass
class TiledRouting:
    """Inputs of :func:`route_tiles` that describe the grid."""

    shape: tuple[int, int]
    tile: int
    #: ``read(win)``: float32 elevations of ``win`` grown by one cell, NaN on nodata, outlets and off the raster
    read_with_halo: Callable[[Window], np.ndarray]
    #: ground cell sizes (east-west, north-south) in metres, one value per raster row
    hx_m: np.ndarray
    hy_m: np.ndarray
    #: ground cell area in m^2, one value per raster row
    cell_area_m2: np.ndarray


def _rows_with_halo(values: np.ndarray, win: Window) -> np.ndarray:
    idx = np.clip(np.arange(win.row_off - 1, win.row_off + win.height + 1), 0, len(values) - 1)
    return np.ascontiguousarray(values[idx], dtype=np.float64)


def route_tiles(
    spec: TiledRouting,
    channel_areas_m2: Sequence[float],
    hands: Sequence[HandSpec],
    *,
    workers: int | None = None,
    scratch_parent: str | None = None,
    step: Callable[[str], None] | None = None,
    show_progress: bool | None = None,
) -> Iterator[tuple[Window, list[np.ndarray], list[np.ndarray], np.ndarray]]:
    """Yield ``(win, streams, hand_masks, d8)`` row-major for every tile of the raster.

    ``streams[j]`` is the stream mask of ``channel_areas_m2[j]``; ``hand_masks[i]`` the cells whose
    HAND is at most ``hands[i].max_hand_m`` above the streams of ``hands[i].channel_area_m2`` (which
    must be one of ``channel_areas_m2``); ``d8`` the tile's flow directions (pyflwdir's D8 codes:
    0 outlet, 247 nodata).  Outlets (raster border, cells next to nodata or to the
    cells ``read_with_halo`` marks NaN, e.g. the sea) count as drains.  Each sweep over the tiles
    shows a progress bar (``show_progress``; None: when stderr is a terminal).
    """
    step = step or (lambda s: logger.info(s))
    thresholds = [float(a) for a in channel_areas_m2]
    if len(set(thresholds)) != len(thresholds):
        raise ValueError("channel areas must be distinct")
    if len(thresholds) > 32:
        raise ValueError("at most 32 channel areas")
    thr_units = [threshold_units(a) for a in thresholds]
    hand_thr = [thresholds.index(float(h.channel_area_m2)) for h in hands]
    tiles = _Tiles(spec.shape, spec.tile)
    wins = tiles.wins
    cols = spec.shape[1]
    own_units = area_units(spec.cell_area_m2)
    scratch = _Scratch(scratch_parent)

    def sweep(task, items, desc):
        with progress_bar(len(items), f"flow routing: {desc}", enabled=show_progress, unit="tile") as bar:
            # the driver's heap is trimmed as tiles come back (landcheck.engine.memory)
            yield from trim_every(run_windows(task, items, workers=workers, progress=bar))

    try:
        yield from _route(spec, tiles, wins, cols, own_units, thr_units, hand_thr, hands, scratch, sweep, step)
    finally:
        scratch.close()


def _route(spec, tiles, wins, cols, own_units, thr_units, hand_thr, hands, scratch, sweep, step):
    # ---- 1. depression filling: Priority-Flood per tile (kept on disk), spill graph, raise
    step(f"flow routing by tiles: depression filling ({len(wins)} tiles)")

    def flood(win):
        k = tiles.k(win)
        zh = np.ascontiguousarray(spec.read_with_halo(win), dtype=np.float32)
        filled, label, n_labels, ea, eb, ew = tf._tile_flood(zh, tf._DR, tf._DC)
        scratch.save("flood", k, filled)
        scratch.save("label", k, label.astype(np.int32))
        # int32 labels: the spill graph of every tile is held until it is solved
        return n_labels, ea.astype(np.int32), eb.astype(np.int32), ew, tf.perimeter(label), tf.perimeter(zh[1:-1, 1:-1])

    floods = [res for _, res in sweep(flood, wins, "filling")]
    level, offsets = tf.spill_levels(tiles.n_tc, floods)
    del floods

    def raise_tile(win):
        k = tiles.k(win)
        z = tf.raise_to_levels(scratch.load("flood", k), scratch.load("label", k), level, offsets[k])
        scratch.save("z", k, z)
        (scratch.folder / f"flood_{k}.npy").unlink()
        (scratch.folder / f"label_{k}.npy").unlink()
        return _ring(z)

    z_rings = [res for _, res in sweep(raise_tile, wins, "raising to spill levels")]

    # ---- 2. flats: distances to their exits, searched again where a neighbour's edge changed
    def z_halo(k):
        return np.ascontiguousarray(tiles.with_halo(k, scratch.load("z", k), z_rings, np.float32(np.nan)))

    n = len(wins)
    d_rings: list = [None] * n  # each tile's edge distances as it last found them
    used: list = [None] * n  # the halo distances each tile was last searched with
    relevant: list = [None] * n  # halo cells next to a flat cell of their own height (fixed by the surface)

    def flats(win):
        k = tiles.k(win)
        zh = z_halo(k)
        dh = tiles.with_halo(k, np.zeros((win.height, win.width), np.int32), d_rings, loops.FAR)
        halo = _halo_vec(dh)
        if used[k] is None:
            d, _ = loops.flat_distances(zh, dh, DRS, DCS)
            rel = _halo_vec(loops.halo_relevance(zh, d, DRS, DCS))
        else:
            # grow on from the stored distances, seeded by the halo cells that got nearer an exit
            dh[1:-1, 1:-1] = scratch.load("dist", k)
            rel = relevant[k]
            seeds = _halo_index(*dh.shape)[rel & (halo < used[k])]
            d = loops.regrow_flat_distances(zh, dh, seeds, DRS, DCS)
        scratch.save("dist", k, d[1:-1, 1:-1])
        return _ring(d[1:-1, 1:-1]), halo, rel

    step("flow routing by tiles: flats")
    work = list(range(n))
    rounds = searched = 0
    while work:
        rounds += 1
        searched += len(work)
        changed = []
        for win, (ring, halo, rel) in sweep(flats, [wins[k] for k in work], f"flats, round {rounds}"):
            k = tiles.k(win)
            relevant[k] = rel
            used[k] = halo
            if d_rings[k] is None or any(not np.array_equal(a, b) for a, b in zip(d_rings[k], ring)):
                changed.append(k)
            d_rings[k] = ring
        # search again only the tiles where a halo cell that touches one of their flats got nearer an exit
        work = []
        for j in sorted({j for k in changed for j in tiles.neighbours(k)}):
            if relevant[j].any():
                w = wins[j]
                halo = _halo_vec(tiles.with_halo(j, np.zeros((w.height, w.width), np.int32), d_rings, loops.FAR))
                if np.any(halo[relevant[j]] < used[j][relevant[j]]):
                    work.append(j)
    logger.debug("flats settled after %d rounds, %d tile searches", rounds, searched)
    used = relevant = []

    # ---- 3. D8 codes
    step("flow routing by tiles: D8 directions")

    def directions(win):
        k = tiles.k(win)
        zh = z_halo(k)
        d = tiles.with_halo(k, scratch.load("dist", k), d_rings, loops.FAR)
        code, stranded = loops.d8_codes(
            zh, d, _rows_with_halo(spec.hx_m, win), _rows_with_halo(spec.hy_m, win), DRS, DCS, CODES
        )
        if stranded:
            raise RuntimeError(f"{stranded} flat cells found no exit in tile {k}: the surface is not filled")
        scratch.save("d8", k, code)
        (scratch.folder / f"dist_{k}.npy").unlink()
        return _ring(code)

    d8_rings = [res for _, res in sweep(directions, wins, "D8")]
    d_rings = []

    def d8_halo(k):
        return np.ascontiguousarray(tiles.with_halo(k, scratch.load("d8", k), d8_rings, loops.D8_NODATA))

    def own_of(win, recv):
        own = np.repeat(own_units[win.rows], win.width)
        own[recv == -2] = 0
        return own

    def gid(win, local):
        r, c = np.divmod(local, win.width)
        return (win.row_off + r) * cols + (win.col_off + c)

    def receiver_gid(win, d8h, local):
        r, c = np.divmod(local, win.width)
        code = d8h[r + 1, c + 1]
        return (win.row_off + r + DEC_R[code]) * cols + (win.col_off + c + DEC_C[code])

    def drained(win, d8h):
        recv, order, n_valid = loops.drain_tile(d8h, DEC_R, DEC_C)
        if len(order) != n_valid:
            raise RuntimeError(f"flow directions form a cycle in the tile at row {win.row_off}, col {win.col_off}")
        return recv, order

    # ---- 4. upstream area: local sums, the forest of tile-edge cells, then sums with inflow
    step("flow routing by tiles: upstream area")

    def local_area(win):
        k = tiles.k(win)
        d8h = d8_halo(k)
        recv, order = drained(win, d8h)
        acc = loops.accumulate(recv, order, own_of(win, recv), np.zeros(len(recv), np.int64))
        ex_local = np.flatnonzero(recv == -3)
        ent = np.unique(loops.entries(d8h, DEC_R, DEC_C))
        ent_exit = loops.exit_of(recv, order)[ent]
        return (
            gid(win, ex_local),
            acc[ex_local],
            receiver_gid(win, d8h, ex_local),
            gid(win, ent),
            np.where(ent_exit >= 0, gid(win, np.maximum(ent_exit, 0)), -1),
        )

    parts = [res for _, res in sweep(local_area, wins, "upstream area")]
    ex_gid = np.concatenate([p[0] for p in parts])
    ex_acc = np.concatenate([p[1] for p in parts])
    ex_recv = np.concatenate([p[2] for p in parts])
    en_gid = np.concatenate([p[3] for p in parts])
    en_exit = np.concatenate([p[4] for p in parts])
    del parts
    ex_order = np.argsort(ex_gid)
    ex_gid, ex_acc, ex_recv = ex_gid[ex_order], ex_acc[ex_order], ex_recv[ex_order]
    en_order = np.argsort(en_gid)
    en_gid, en_exit = en_gid[en_order], en_exit[en_order]

    def lookup(sorted_keys, keys):
        pos = np.searchsorted(sorted_keys, keys)
        pos = np.minimum(pos, max(len(sorted_keys) - 1, 0))
        if len(keys) and (len(sorted_keys) == 0 or not np.array_equal(sorted_keys[pos], keys)):
            raise RuntimeError("a tile-edge cell has no partner across the edge")
        return pos

    # every exit's receiver is an entry of another tile; that entry's own exit (or -1) is the next node
    ent_of_exit = lookup(en_gid, ex_recv)
    nxt_gid = en_exit[ent_of_exit]
    has_next = nxt_gid >= 0
    target = np.full(len(ex_gid), -1, np.int64)
    target[has_next] = lookup(ex_gid, nxt_gid[has_next])
    total = loops.solve_forest(target, ex_acc)
    inflow = np.zeros(len(en_gid), np.int64)
    np.add.at(inflow, ent_of_exit, total)
    del total, target, ex_acc

    def entries_of(win):
        lo = np.searchsorted(en_gid, win.row_off * cols)
        hi = np.searchsorted(en_gid, (win.row_off + win.height) * cols)
        g = en_gid[lo:hi]
        r, c = np.divmod(g, cols)
        sel = (c >= win.col_off) & (c < win.col_off + win.width)
        local = (r[sel] - win.row_off) * win.width + (c[sel] - win.col_off)
        return local, np.arange(lo, hi)[sel]

    hand_sets = sorted(set(hand_thr))

    def stream_tile(win):
        k = tiles.k(win)
        d8h = d8_halo(k)
        recv, order = drained(win, d8h)
        local, pos = entries_of(win)
        extra = np.zeros(len(recv), np.int64)
        extra[local] = inflow[pos]
        acc = loops.accumulate(recv, order, own_of(win, recv), extra)
        valid = recv != -2
        bits = np.zeros(len(recv), np.uint32)
        for j, t in enumerate(thr_units):
            bits |= ((acc >= t) & valid).astype(np.uint32) << np.uint32(j)
        scratch.save("streams", k, bits)
        z = scratch.load("z", k).ravel()
        nan = np.full(len(recv), np.nan)
        res = []
        for j in hand_sets:
            dz, link = loops.drain_heights(recv, order, z, (bits >> np.uint32(j)) & 1 == 1, nan)
            lk = link[local]
            res.append((dz[local], np.where(lk >= 0, gid(win, np.maximum(lk, 0)), -1)))
        return pos, res

    step("flow routing by tiles: streams and HAND")
    en_val = {j: np.full(len(en_gid), np.nan) for j in hand_sets}
    en_link = {j: np.full(len(en_gid), -1, np.int64) for j in hand_sets}
    for _, (pos, res) in sweep(stream_tile, wins, "streams"):
        for j, (val, link) in zip(hand_sets, res):
            en_val[j][pos] = val
            en_link[j][pos] = link
    # per stream set: the drain height each exit's path finds beyond the tile edge
    ex_drain = {}
    for j in hand_sets:
        lk = en_link[j][ent_of_exit]
        nxt = np.full(len(ex_gid), -1, np.int64)
        nxt[lk >= 0] = lookup(ex_gid, lk[lk >= 0])
        ex_drain[j] = loops.resolve_chains(nxt, en_val[j][ent_of_exit])
    del en_val, en_link

    def final_tile(win):
        k = tiles.k(win)
        d8h = d8_halo(k)
        recv, order = drained(win, d8h)
        bits = scratch.load("streams", k)
        streams = [((bits >> np.uint32(j)) & 1 == 1).reshape(win.height, win.width) for j in range(len(thr_units))]
        z = scratch.load("z", k)
        masks = []
        if hands:
            ex_local = np.flatnonzero(recv == -3)
            pos = lookup(ex_gid, gid(win, ex_local)) if len(ex_local) else np.zeros(0, np.int64)
            drains = {}
            for j in hand_sets:
                exit_value = np.full(len(recv), np.nan)
                exit_value[ex_local] = ex_drain[j][pos]
                dz, _ = loops.drain_heights(recv, order, z.ravel(), streams[j].ravel(), exit_value)
                drains[j] = dz.reshape(win.height, win.width)
            zz = z.astype(np.float64)
            for h, j in zip(hands, hand_thr):
                with np.errstate(invalid="ignore"):
                    hand = (zz - drains[j]).astype(np.float32)
                    masks.append(np.isfinite(hand) & (hand <= h.max_hand_m))
        return streams, masks, d8h[1:-1, 1:-1]

    for win, (streams, masks, d8) in sweep(final_tile, wins, "HAND"):
        yield win, streams, masks, d8
