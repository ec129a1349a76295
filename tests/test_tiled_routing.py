"""Flow routing by tiles against the whole-raster routing and outside references.

* Tiles of 1 to 32 cells that do not divide the raster give the stream and HAND masks of the
  whole-raster functions of :mod:`landcheck.terrain.hydrology` (pyflwdir's flow network and
  accumulation, pointer-jumping HAND) cell for cell.  Source: docs/references.md §17 (tiled
  Priority-Flood, Barnes 2016; tiled accumulation, Barnes 2017): the filled surface, the flat
  distances and the path of every cell do not depend on the tiling.
* A flat lake spanning many tiles drains through its one exit (docs/references.md §16, §17).
"""

from __future__ import annotations

import numpy as np
import pytest

from landcheck.terrain import hydrology
from landcheck.terrain.tiled_routing import HandSpec, TiledRouting, route_tiles


def _tiled(z, tile, areas, hands, hx=None, hy=None, cell_area=None, workers=1):
    rows, cols = z.shape
    zp = np.pad(z.astype(np.float32), 1, constant_values=np.nan)
    ones = np.ones(rows)
    spec = TiledRouting(
        z.shape,
        tile,
        lambda w: zp[w.row_off : w.row_off + w.height + 2, w.col_off : w.col_off + w.width + 2],
        ones if hx is None else hx,
        ones if hy is None else hy,
        ones if cell_area is None else cell_area,
    )
    streams = [np.zeros(z.shape, bool) for _ in areas]
    masks = [np.zeros(z.shape, bool) for _ in hands]
    for win, st, hm, _ in route_tiles(spec, areas, hands, workers=workers, step=lambda s: None):
        for a, b in zip(streams, st):
            a[win.rows, win.cols] = b
        for a, b in zip(masks, hm):
            a[win.rows, win.cols] = b
    return streams, masks


def _whole(z, areas, hands, hx=None, hy=None, cell_area=None):
    rows = z.shape[0]
    sizes = None if hx is None else (hx, hy)
    routing = hydrology.flow_directions(z.astype(np.float64), cell_size_m=sizes)
    up = hydrology.upstream_area_m2(routing, np.ones(rows) if cell_area is None else cell_area)
    streams = [hydrology.stream_mask(up, a) for a in areas]
    masks = []
    for h in hands:
        s = streams[list(areas).index(h.channel_area_m2)]
        hand = hydrology.hand_m(routing.conditioned_m, routing, s, outlets_drain=True)
        masks.append(np.isfinite(hand) & (hand <= h.max_hand_m))
    return streams, masks


def _surface(rng, h, w, step=0.25):
    # rounded heights: many equal cells, so filled depressions leave wide flats and ties matter
    z = np.round((rng.random((h, w)) * 3 + np.add.outer(np.arange(h), np.arange(w)) * 0.05) / step) * step
    z = z.astype(np.float32)
    z[rng.random(z.shape) < 0.02] = np.nan
    return z


@pytest.mark.parametrize("tile", [1, 2, 5, 9, 32])
def test_tiled_routing_equals_whole_raster(tile):
    rng = np.random.default_rng(40 + tile)
    areas = (15.0, 40.0)
    hands = (HandSpec(15.0, 0.5), HandSpec(40.0, 1.0), HandSpec(15.0, 2.0))
    for _ in range(3 if tile > 1 else 1):
        h, w = rng.integers(25, 61, 2)
        z = _surface(rng, h, w)
        ref_s, ref_h = _whole(z, areas, hands)
        got_s, got_h = _tiled(z, tile, areas, hands)
        for a, b in zip(ref_s + ref_h, got_s + got_h):
            assert np.array_equal(a, b)
        assert all(m.any() and not m.all() for m in ref_s + ref_h)  # every mask has cells in and out


def test_tiled_routing_geographic_rows_and_two_workers():
    # per-row cell sizes and areas (a geographic grid) and two worker threads change nothing
    rng = np.random.default_rng(7)
    z = _surface(rng, 47, 39, step=0.1)
    hx = np.linspace(22.0, 18.0, 47)
    hy = np.full(47, 30.8)
    area = hx * hy
    areas = (3000.0, 20000.0)
    hands = (HandSpec(3000.0, 1.0), HandSpec(20000.0, 1.5))
    ref_s, ref_h = _whole(z, areas, hands, hx, hy, area)
    got_s, got_h = _tiled(z, 6, areas, hands, hx, hy, area, workers=2)
    for a, b in zip(ref_s + ref_h, got_s + got_h):
        assert np.array_equal(a, b)
    assert ref_s[0].sum() > ref_s[1].sum() > 0


def test_flat_lake_across_many_tiles_drains_through_its_exit():
    # Source: docs/references.md §16 (Priority-Flood fills the closed basin to its spill level) and §17 (flat
    # cells drain towards the flat's exit): a basin 40 cells across, open only through a notch in the east
    # rim, fills to the notch level; every lake cell then drains out through the notch, so the stream of
    # the notch collects the whole lake, on 4-cell tiles as on one tile.
    n = 48
    r, c = np.mgrid[0:n, 0:n]
    d = np.hypot(r - 24, c - 24)
    z = np.where(d < 20, 1.0 + (d % 3) / 10, 3.0 + (d - 20) / 10).astype(np.float32)
    z[(r == 24) & (c >= 20)] = np.float32(1.5)  # the notch: a 1-cell channel through the rim to the east edge
    lake = d < 19.5
    area_lake = float(lake.sum())
    for tile in (4, 48):
        (s,), (m,) = _tiled(z, tile, (area_lake,), (HandSpec(area_lake, 0.0),))
        # only the channel below the lake collects the lake; the lake stands 0 m above it at its spill
        assert s[24, 46:].all() and not s[lake].any()
        assert m[lake].all()
