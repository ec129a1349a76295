"""Tiled hazard steps against whole-raster references.

* Components: :func:`landcheck.terrain.tiled_components.seeded_components` against
  ``scipy.ndimage.label`` on the whole array (8-connectivity; Source: docs/references.md §17,
  labelling and union-find joins across tile edges), with tile sizes that do not divide the raster
  and components that wind through many tiles.
* Sea and sea-level rise of ``prepare_zones`` (tiles of 7 and 13 cells) against the whole-raster
  ``hydrology.sea_mask`` / ``inundation_masks`` (binary propagation).
* Derived easement strips against ``scipy.ndimage.distance_transform_edt`` on the whole array.
"""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from scipy import ndimage

from landcheck.geo.grid import GridSpec, Window
from landcheck.terrain import hydrology
from landcheck.terrain.tiled_components import seeded_components
from landcheck.zones.cells import MaskStore
from landcheck.zones.strips import write_strips

S8 = np.ones((3, 3), dtype=bool)


def _tiled(cand, seeds, tile):
    out = np.zeros_like(cand)
    for win, (m,) in seeded_components(cand.shape, tile, lambda w: [(cand[w.rows, w.cols], seeds[w.rows, w.cols])]):
        out[win.rows, win.cols] = m
    return out


def _label_reference(cand, seeds):
    """Independent reference: whole-array scipy.ndimage.label, keep the labels holding a seed."""
    lab, n = ndimage.label(cand, structure=S8)
    keep = np.zeros(n + 1, dtype=bool)
    keep[lab[seeds & cand]] = True
    keep[0] = False
    return keep[lab]


@pytest.mark.parametrize("tile", [1, 3, 7, 16, 64])
def test_components_equal_whole_raster_labelling(tile):
    # Source: docs/references.md §17 (8-connected components; tiles joined across edges and corners)
    rng = np.random.default_rng(tile)
    partial = 0
    for k in range(8):
        h, w = rng.integers(20, 70, 2)
        cand = rng.random((h, w)) < rng.uniform(0.35, 0.55)  # near the percolation threshold: long components
        seeds = np.zeros_like(cand)
        if k % 2:
            seeds[:, 0] = True  # seeds on the west edge
        else:
            seeds[rng.integers(h), rng.integers(w)] = True  # one seed cell anywhere
        ref = _label_reference(cand, seeds)
        got = _tiled(cand, seeds, tile)
        assert (got == ref).all()
        partial += 0 < ref.sum() < cand.sum()
    assert partial >= 4  # most cases have both seeded and unseeded components


def test_spiral_component_crosses_many_tiles():
    # a one-cell-wide spiral corridor joined only through diagonal steps at tile corners
    n = 61
    cand = np.zeros((n, n), dtype=bool)
    r0, r1, c0, c1 = 0, n - 1, 0, n - 1
    while r0 <= r1 and c0 <= c1:
        cand[r0, c0 : c1 + 1] = True
        cand[r0 : r1 + 1, c1] = True
        if r0 + 2 <= r1:
            cand[r1, c0 : c1 + 1] = True
        if c0 + 2 <= c1:
            cand[r0 + 2 : r1 + 1, c0] = True
        r0, r1, c0, c1 = r0 + 2, r1 - 2, c0 + 2, c1 - 2
    diag = np.zeros((n, n), dtype=bool)
    np.fill_diagonal(diag, True)  # a diagonal chain: every step is a corner contact
    cand2 = diag.copy()
    seeds = np.zeros_like(cand)
    seeds[n // 2, n // 2] = True
    seeds2 = np.zeros_like(cand2)
    seeds2[0, 0] = True
    for tile in (4, 5, 9):
        assert (_tiled(cand, seeds, tile) == _label_reference(cand, seeds)).all()
        got = _tiled(cand2, seeds2, tile)
        assert got.sum() == n  # the whole diagonal, reached through tile corners
        assert (got == diag).all()


def _grid(h, w, cell=10.0):
    return GridSpec(Affine(cell, 0, 500000.0, 0, -cell, 1700000.0), "EPSG:32651", w, h, False)


class _ArrayDem:
    """A DEM stand-in over an in-memory array (the DemSource read contract: NaN for nodata)."""

    def __init__(self, z, grid):
        self.z = z
        self.grid = grid

    def read(self, win: Window, dtype=np.float64):
        return self.z[win.rows, win.cols].astype(dtype)


def _coastal_dem(h, w, seed=0):
    rng = np.random.default_rng(seed)
    x = np.arange(w)[None, :]
    z = 0.05 * (x - 0.2 * w) + rng.normal(0, 0.8, (h, w))  # a speckled, sloping coast in the west
    z[h // 3 : h // 3 + 6, w // 2 : w // 2 + 6] = -3.0  # an inland hollow below sea level
    z[2, w - 5] = np.nan
    return z.astype(np.float32)


@pytest.mark.parametrize("tile", [7, 13])
def test_prepared_sea_and_rise_equal_whole_raster(tmp_path, tile):
    # Source: docs/references.md §17 (tiled labelling) against the whole-raster bathtub with connectivity
    # (binary propagation, hydrology.inundation_masks)
    from types import SimpleNamespace

    from landcheck.inputs.rulebook import load_rules
    from landcheck.zones.prepare import prepare_zones

    h, w = 53, 61
    z = _coastal_dem(h, w)
    g = _grid(h, w)
    (tmp_path / "r.toml").write_text(
        """
[rulebook]
class_field = "zoning"
[classes.res]
values = ["R"]
context = "urban"
forbidden_zones = ["slr", "shore"]
[zones.slr]
kind = "sea_rise"
rise_m = 1.0
scenarios_m = [0.5, 1.0, 2.0]
[zones.shore]
kind = "easement"
derive = "shoreline"
width_m = { urban = 3.0, agricultural = 20.0 }
"""
    )
    rules = load_rules(tmp_path / "r.toml")
    zs = prepare_zones(rules, _ArrayDem(z, g), None, None, SimpleNamespace(tile_cells=tile))
    whole = Window(0, 0, h, w)
    sea_ref = hydrology.sea_mask(z.astype(np.float64))
    assert zs.store.read("sea", whole).tolist() == sea_ref.tolist()
    assert 0 < sea_ref.sum() and not sea_ref[h // 3, w // 2]  # the hollow is not sea
    refs = hydrology.inundation_masks(z.astype(np.float64), sea_ref, [0.5, 1.0, 2.0])
    bits = zs.bits(whole)
    names = [c.name for c in zs.columns]
    for rise, ref in zip([0.5, 1.0, 2.0], refs):
        col = zs.columns[names.index(f"slr_rise_{rise:g}m".replace(".", "p"))]
        got = ((bits >> col.raster_channel) & 1).astype(bool)
        assert got.tolist() == ref.tolist()
    assert zs.info["sea_rise"]["slr"]["inundated_land_cells"] == [int((m & ~sea_ref).sum()) for m in refs]
    # land figures exclude the sea
    assert (zs.land(whole) == ~sea_ref).all()
    # the shore easement: one channel per context width, the wider strip contains the narrower
    shore = zs.columns[names.index("shore")]
    urban = ((bits >> shore.channel_for(rules.classes[0].context)) & 1).astype(bool)
    wide = ((bits >> shore.raster_channel) & 1).astype(bool)
    assert urban.sum() < wide.sum() and not (urban & ~wide).any()


def _strip_reference(source, dy, dx, width, shore):
    """Independent reference: whole-array distance transforms between cell centres."""
    d_src = ndimage.distance_transform_edt(~source, sampling=(dy, dx))
    if not shore:
        return d_src <= width
    d_other = ndimage.distance_transform_edt(source, sampling=(dy, dx))
    half = max(dy, dx) / 2
    return (~source & (d_src <= width + half)) | (source & (d_other <= width + half))


@pytest.mark.parametrize("shore", [True, False])
@pytest.mark.parametrize("tile", [5, 11, 64])
def test_strips_equal_whole_raster_distance_transform(tile, shore):
    # Source: scipy.ndimage.distance_transform_edt (exact Euclidean distance) on the whole array
    from landcheck.zones.strips import _projected_scale

    h, w = 47, 38
    rng = np.random.default_rng(7)
    source = rng.random((h, w)) < 0.02
    source[:, :4] |= shore  # a coast on the west for the shore case
    g = _grid(h, w)
    store = MaskStore(g)
    try:
        with store.writer("src") as wr:
            wr.write(Window(0, 0, h, w), source)
        widths = {"a": 3.0, "b": 20.0, "c": 40.0}
        write_strips(store, "src", widths, shore=shore, tile=tile)
        k = _projected_scale(g)
        assert 0.9996 <= k < 1.0  # UTM point scale near the central meridian (pyproj)
        for name, width in widths.items():
            ref = _strip_reference(source, 10.0 / k, 10.0 / k, width, shore)
            got = store.read(name, Window(0, 0, h, w))
            assert got.tolist() == ref.tolist(), (name, tile)
    finally:
        store.close()


def test_geographic_strip_is_conservative():
    # On a geographic grid each tile uses the smallest ground cell sides of its rows (halo included):
    # the strip contains the strip measured with each row's own sizes (docs/scale.md, "Hazard zones").
    h, w = 40, 30
    g = GridSpec(Affine(0.0001, 0, 20.0, 0, -0.0001, 60.0), "EPSG:4326", w, h, True)
    rng = np.random.default_rng(3)
    source = rng.random((h, w)) < 0.03
    store = MaskStore(g)
    try:
        with store.writer("src") as wr:
            wr.write(Window(0, 0, h, w), source)
        write_strips(store, "src", {"s": 12.0}, shore=False, tile=8)
        got = store.read("s", Window(0, 0, h, w))
        hx, hy = g.cell_size_m(np.arange(h))
        # exact per-row reference: cell (r, c) to source (r2, c2) with the mean of the two rows' sizes
        # (never smaller than the minimum the tiles use)
        rs, cs = np.nonzero(source)
        rr, cc = np.mgrid[0:h, 0:w]
        exact = np.zeros((h, w), dtype=bool)
        for r2, c2 in zip(rs, cs):
            dyy = (rr - r2) * (hy[rr] + hy[r2]) / 2
            dxx = (cc - c2) * np.minimum(hx[rr], hx[r2])
            exact |= np.hypot(dyy, dxx) <= 12.0
        assert not (exact & ~got).any()
        assert got.sum() <= exact.sum() * 1.1
    finally:
        store.close()


def _fill_tiled(z, tile):
    from landcheck.terrain.tiled_fill import tiled_fill

    zp = np.pad(z, 1, constant_values=np.nan)
    out = np.full(z.shape, np.nan, np.float32)
    for win, f in tiled_fill(
        z.shape, tile, lambda w: zp[w.row_off : w.row_off + w.height + 2, w.col_off : w.col_off + w.width + 2]
    ):
        out[win.rows, win.cols] = f
    return out


@pytest.mark.parametrize("tile", [1, 2, 5, 9, 32])
def test_tiled_fill_equals_whole_raster_and_pyflwdir(tile):
    # Source: docs/references.md §17 (Priority-Flood, Barnes et al. 2014; tiled spill graph,
    # Barnes 2016): any tiling gives the whole-raster filled DEM cell for cell.  Reference tool: pyflwdir's
    # fill_depressions.  Elevations are multiples of 1/16 m so that pyflwdir's raise (z + (level - z) in
    # float32) is exact and both must agree exactly.
    from pyflwdir import dem as pfdem

    from landcheck.terrain.tiled_fill import fill_whole

    rng = np.random.default_rng(tile + 100)
    for _ in range(5):
        h, w = rng.integers(12, 60, 2)
        z = np.round((rng.random((h, w)) * 10 + np.add.outer(np.arange(h), np.arange(w)) * 0.05) * 16) / 16
        z = z.astype(np.float32)
        z[rng.random(z.shape) < 0.03] = np.nan
        ref, _ = pfdem.fill_depressions(z.copy(), nodata=np.float32(np.nan))
        whole = fill_whole(z)
        got = _fill_tiled(z, tile)
        assert np.array_equal(whole, ref, equal_nan=True)
        assert np.array_equal(got, ref, equal_nan=True)
        assert np.nansum(ref - z) > 0  # depressions were really filled


def test_tiled_fill_basin_across_many_tiles():
    # one closed basin 50 cells across with a single spill point on its rim: every tile inside it must rise
    # to the spill level (the minimax path leaves through the rim gap, several tiles away)
    n = 64
    r, c = np.mgrid[0:n, 0:n]
    d = np.hypot(r - 32, c - 32)
    z = np.where(d < 25, 1.0 + d / 100, 2.0 + (d - 25) / 10).astype(np.float32)
    z[(np.abs(r - 32) <= 1) & (c > 50)] = np.float32(1.5)  # the rim is low (1.5 m) only in a channel to the east
    z[32, 32] = np.float32(0.25)  # a pit at the centre
    got = _fill_tiled(z, 7)
    from landcheck.terrain.tiled_fill import fill_whole

    assert np.array_equal(got, fill_whole(z), equal_nan=True)
    inside = d < 24
    assert np.all(got[inside] == np.maximum(z[inside], np.float32(1.5)))  # the basin fills to the gap level


def test_audit_shares_equal_for_tiles_that_do_not_divide_the_raster(tmp_path):
    # Per-parcel zone shares do not depend on the tiling: 7-cell tiles (many tiles, not dividing the 53 x 67
    # raster) against one tile covering the whole raster (the whole-raster labelling and distance transform).
    # Source: docs/references.md §17 (tiled labelling and distance transforms are exact).
    import shapely
    from _support import write_parcels, write_raster

    from landcheck.core.audit import audit

    h, w = 53, 67
    rng = np.random.default_rng(21)
    x = np.arange(w)[None, :] * 10.0
    y = np.arange(h)[:, None] * 10.0
    z = 0.012 * (x - 120) + 0.4 * np.abs(y - 260) / 10 + rng.normal(0, 0.3, (h, w))  # coast west, valley E-W
    z[:, :8] = np.minimum(z[:, :8], -0.5)
    dem = write_raster(tmp_path / "dem.tif", z.astype(np.float32))
    x0, y0 = 400000.0, 1600000.0
    polys, zoning = [], []
    for i in range(6):
        for j in range(8):
            polys.append(shapely.box(x0 + 20 + j * 80, y0 - 25 - i * 85, x0 + 85 + j * 80, y0 - 95 - i * 85))
            zoning.append(["R", "A", "F"][(i + j) % 3])
    parcels = write_parcels(tmp_path / "p.gpkg", polys, pid=list(range(1, 49)), zoning=zoning)
    (tmp_path / "r.toml").write_text(
        """
[rulebook]
class_field = "zoning"
id_field = "pid"
[classes.res]
values = ["R"]
context = "urban"
forbidden_zones = ["shore", "streams", "hand", "slr"]
[classes.agr]
values = ["A"]
context = "agricultural"
forbidden_zones = ["shore", "streams", "hand", "slr"]
[classes.forest]
values = ["F"]
context = "forest"
forbidden_zones = ["shore", "streams"]
[zones.shore]
kind = "easement"
derive = "shoreline"
width_m = { urban = 3.0, agricultural = 20.0, forest = 40.0 }
[zones.streams]
kind = "easement"
derive = "streams"
channel_area_m2 = 20000.0
width_m = { urban = 3.0, agricultural = 20.0, forest = 40.0 }
[zones.hand]
kind = "hand"
max_hand_m = 1.5
channel_area_m2 = 20000.0
[zones.slr]
kind = "sea_rise"
rise_m = 1.0
scenarios_m = [0.5, 1.0, 2.0]
"""
    )
    small = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "o7", make_report=False, tile_cells=7).parcels
    whole = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "o1", make_report=False, tile_cells=1024).parcels
    cols = [c for c in whole.columns if c.startswith("zone_") and c.endswith("_m2")] + ["conflict_m2"]
    assert len(cols) >= 7
    for c in cols:
        np.testing.assert_allclose(small[c].to_numpy(), whole[c].to_numpy(), rtol=1e-12, atol=1e-9, err_msg=c)
        assert whole[c].sum() > 0, c  # every zone really covers some parcel
    assert small["verdict"].tolist() == whole["verdict"].tolist()
    # the context decides the strip: 40 m strips for forest lots, 3 m for urban ones
    share = whole["zone_streams_m2"] / whole["covered_m2"]
    forest = share[whole["class_name"] == "forest"].mean()
    urban = share[whole["class_name"] == "res"].mean()
    assert forest > 3 * urban > 0


def test_vector_zones_clipped_to_tiles_give_the_shares_of_one_union(tmp_path):
    # Easement strips of a user river layer and flood polygons are unioned tile by tile (pieces clipped to
    # 7-cell tiles before any union); parcel shares equal those of one tile covering the raster up to
    # rounding (the same set of points, cut along tile edges).  Source: docs/references.md §17 (clipping
    # is exact: the union of the clipped pieces is the clipped union).
    import shapely
    from _support import write_parcels, write_raster

    from landcheck.core.audit import audit
    from landcheck.zones.prepare import union_by_tiles

    h, w = 41, 59
    x0, y0 = 400000.0, 1600000.0
    rng = np.random.default_rng(5)
    dem = write_raster(tmp_path / "dem.tif", (50 + rng.normal(0, 0.2, (h, w))).astype(np.float32))
    river = shapely.LineString([(x0 - 30, y0 - 75), (x0 + 300, y0 - 210), (x0 + 620, y0 - 130)])
    write_parcels(tmp_path / "rivers.gpkg", [river], layer="rivers", width_m=[6.0])
    blobs = [shapely.Point(x0 + 150, y0 - 300).buffer(90), shapely.Point(x0 + 260, y0 - 260).buffer(70)]
    write_parcels(tmp_path / "flood.gpkg", blobs, layer="flood", level=[3, 2])
    polys, zoning = [], []
    for i in range(5):
        for j in range(7):
            polys.append(shapely.box(x0 + 15 + j * 82, y0 - 15 - i * 80, x0 + 85 + j * 82, y0 - 88 - i * 80))
            zoning.append(["R", "A"][(i + j) % 2])
    parcels = write_parcels(tmp_path / "p.gpkg", polys, pid=list(range(1, 36)), zoning=zoning)
    (tmp_path / "r.toml").write_text(
        """
[rulebook]
class_field = "zoning"
id_field = "pid"
[layers]
rivers = "rivers.gpkg"
flood = "flood.gpkg"
[classes.res]
values = ["R"]
context = "urban"
forbidden_zones = ["river", "flood"]
[classes.agr]
values = ["A"]
context = "agricultural"
forbidden_zones = ["river", "flood"]
[zones.river]
kind = "easement"
layer = "rivers"
channel_width_field = "width_m"
width_m = { urban = 10.0, agricultural = 30.0 }
[zones.flood]
kind = "flood_polygons"
layer = "flood"
level_field = "level"
min_level = 2
"""
    )
    small = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "o7", make_report=False, tile_cells=7).parcels
    whole = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "o1", make_report=False, tile_cells=1024).parcels
    for c in ["zone_river_m2", "zone_flood_m2", "conflict_m2"]:
        np.testing.assert_allclose(small[c].to_numpy(), whole[c].to_numpy(), rtol=1e-9, atol=1e-6, err_msg=c)
        assert whole[c].sum() > 0, c
    assert small["verdict"].tolist() == whole["verdict"].tolist()
    # the tiled union covers exactly the plain union (shapely), pieces never overlap
    from landcheck.geo.grid import GridSpec

    g = GridSpec(Affine(10, 0, x0, 0, -10, y0), "EPSG:32651", w, h, False)
    tiled = union_by_tiles(blobs, g, 7)
    parts = shapely.get_parts(tiled)
    assert len(parts) > 10
    assert sum(p.area for p in parts) == pytest.approx(shapely.union_all(blobs).area, rel=1e-12)


def test_spill_levels_equal_path_maxima_in_a_minimum_spanning_tree():
    # Reference: scipy.sparse.csgraph.minimum_spanning_tree.  The lowest level at which a watershed drains
    # is its bottleneck (minimax) path value to the outlet node 0, which is the largest edge on its path in
    # a minimum spanning tree (docs/references.md §17; a property of minimum spanning trees, common
    # practice).  Random graphs with duplicate edges, ties and a node no edge reaches.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import breadth_first_order, minimum_spanning_tree

    from landcheck.terrain.tiled_fill import _bottleneck_levels

    rng = np.random.default_rng(8)
    for _ in range(20):
        n = int(rng.integers(3, 60))
        m = int(rng.integers(1, 4 * n))
        a = rng.integers(0, n - 1, m).astype(np.int32)  # node n - 1 is never an edge's end: unreached
        b = rng.integers(0, n - 1, m).astype(np.int32)
        w = np.round(rng.random(m) * 5, 1).astype(np.float32)
        got = _bottleneck_levels(n, a, b, w, np.argsort(w, kind="stable"))
        # scipy sums duplicate entries and drops zeros: keep the lowest weight per pair, shifted by 1
        best: dict = {}
        for x, y, v in zip(a.tolist(), b.tolist(), (w.astype(np.float64) + 1.0).tolist()):
            if x != y:
                key = (min(x, y), max(x, y))
                best[key] = min(best.get(key, np.inf), v)
        rows = [k[0] for k in best]
        cols = [k[1] for k in best]
        mst = minimum_spanning_tree(coo_matrix((list(best.values()), (rows, cols)), shape=(n, n))).tocsr()
        tree = mst + mst.T
        order, pred = breadth_first_order(tree, 0, directed=False)
        ref = np.full(n, np.inf)
        ref[0] = -np.inf
        for v in order[1:]:
            ref[v] = max(ref[pred[v]], tree[pred[v], v] - 1.0)
        assert np.allclose(got[np.isfinite(ref)], ref[np.isfinite(ref)], atol=1e-6)
        assert np.array_equal(np.isinf(got), np.isinf(ref)) and got[0] == -np.inf and np.isinf(got[n - 1])
