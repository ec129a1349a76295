"""Invariants of the fast paths: compiled window reduction == NumPy reference, float32 reads == float64 reads.

Speed itself is measured by scripts/benchmark.py, never here.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import shapely
from affine import Affine
from shapely import affinity

from landcheck.overlay.coverage import coverage_triplets, prepare_polygons
from landcheck.overlay.sums import (
    CONFLICT_OUTSIDE,
    ROLE_FORBIDDEN_PIECE,
    ROLE_PARCEL,
    OverlayPlan,
    accumulate_window,
    accumulate_window_reference,
)

CELL_M = 10.0


def _lots(rng, n, size_cells, extent_cells):
    """``n`` rotated rectangles (they may overlap: the reduction must not care) in a grid of ``extent_cells``."""
    out = []
    for _ in range(n):
        x, y = rng.uniform(-2, extent_cells - 2, 2) * CELL_M
        w, h = rng.uniform(0.3, size_cells, 2) * CELL_M
        out.append(affinity.rotate(shapely.box(x, -y - h, x + w, -y), rng.uniform(0, 90), origin="centroid"))
    return out


def _plan_with_zones(rng, parcels, zone_polys):
    """Parcels + their pieces in two vector zone columns and one forbidden-piece role; two raster channels."""
    n = len(parcels)
    pieces, piece_parcel, piece_role = [], [], []
    for i, p in enumerate(parcels):
        for role, z in ((0, zone_polys[0]), (1, zone_polys[1]), (ROLE_FORBIDDEN_PIECE, zone_polys[0])):
            inter = p.intersection(z)
            if not inter.is_empty and inter.area > 0:
                pieces.append(inter)
                piece_parcel.append(i)
                piece_role.append(role)
    thresholds = np.array([5.0, 10.0, 15.0, 18.0, 25.0, 40.0])
    plan = OverlayPlan(
        thresholds_pct=thresholds,
        limit_index=rng.integers(-1, len(thresholds), n),
        near_index=rng.integers(-1, len(thresholds), n),
        raster_forbid_bits=rng.integers(0, 4, n).astype(np.uint32),
        zone_forbid_bits=rng.integers(0, 16, n).astype(np.uint32),
        area_factor=rng.uniform(0.999, 1.001, n),
        class_index=rng.integers(-1, 3, n),
        n_classes=3,
        geom_parcel=np.concatenate([np.arange(n), piece_parcel]).astype(np.int64),
        geom_role=np.concatenate([np.full(n, ROLE_PARCEL), piece_role]).astype(np.int64),
        # columns: two vector columns (zones 0 and 1), two raster channels (zones 2 and 3), one report-only raster
        col_channel=np.array([-1, -1, 0, 1, 1], np.int64),
        col_zone=np.array([0, 1, 2, 3, -1], np.int64),
        capability_limit_pct=10.2,  # float32(10.2) < 10.2: both paths must compare in float64
        ground_factor=1.0002,
    )
    return plan, list(parcels) + pieces


def _assert_same(a, b):
    for f in dataclasses.fields(a):
        np.testing.assert_array_equal(getattr(a, f.name), getattr(b, f.name), err_msg=f.name)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_compiled_reduction_equals_reference_bit_for_bit(seed):
    # Invariant: the compiled loop adds the same terms in the same order as np.bincount / np.add.at in the
    # NumPy reference, so every sum is bit-identical, with raster zones, vector pieces, NaN slopes and
    # overlapping parcels (the conflict-raster pick then decides by largest fraction, then lower index).
    rng = np.random.default_rng(seed)
    h, w = 37, 53
    parcels = _lots(rng, 40, 9, 50)
    zones = [shapely.box(0, -200, 300, 0), affinity.rotate(shapely.box(150, -370, 420, -120), 30)]
    plan, geoms = _plan_with_zones(rng, parcels, zones)
    prepared = prepare_polygons(np.array(geoms, dtype=object))
    slope = rng.gamma(2.0, 8.0, (h, w)).astype(np.float32)
    slope[rng.random((h, w)) < 0.08] = np.nan
    slope[:, 20] = 18.0  # exactly on a threshold: "at or over" must agree
    slope[:, 21] = np.float32(10.2)  # under the limit in float64, equal to it in float32
    bits = rng.integers(0, 4, (h, w)).astype(np.uint32)
    land = rng.random((h, w)) < 0.9
    cell_area = np.full(h, CELL_M * CELL_M) * rng.uniform(0.99, 1.01, h)
    for win_transform, hh, ww, sl in [
        (Affine(CELL_M, 0, 0, 0, -CELL_M, 0), h, w, np.s_[:, :]),
        (Affine(CELL_M, 0, 100, 0, -CELL_M, -50), 20, 30, np.s_[5:25, 10:40]),
    ]:
        trip = tuple(coverage_triplets(prepared, win_transform, hh, ww))
        cand = np.arange(len(geoms), dtype=np.int64)
        ref, ref_tile = accumulate_window_reference(slope[sl], bits[sl], cell_area[sl[0]], cand, trip, plan, land[sl])
        got, got_tile = accumulate_window(slope[sl], bits[sl], cell_area[sl[0]], cand, trip, plan, land[sl])
        assert len(ref.parcels) > 5
        _assert_same(ref, got)
        np.testing.assert_array_equal(ref_tile, got_tile)
        # and without raster zones / land mask
        ref, ref_tile = accumulate_window_reference(slope[sl], None, cell_area[sl[0]], cand, trip, plan)
        got, got_tile = accumulate_window(slope[sl], None, cell_area[sl[0]], cand, trip, plan)
        _assert_same(ref, got)
        np.testing.assert_array_equal(ref_tile, got_tile)


def test_compiled_reduction_closed_form_values():
    # Source: closed form. One 2 x 3-cell parcel on a 10 m grid; slope 10 % on the west column, 20 % in the
    # middle, NaN on the east: covered = 6 cells x 100 m2, evaluated = 4 cells, area >= 18 % = 2 cells,
    # area-weighted mean slope = 15 %, maximum 20 %; with an 18 % limit the conflict raster flags the middle
    # column (bit 1) and leaves cells outside the parcel at 255.
    parcel = shapely.box(0, -20, 30, 0)
    plan = OverlayPlan(
        np.array([18.0]),
        np.array([0]),
        np.array([-1]),
        np.zeros(1, np.uint32),
        np.zeros(1, np.uint32),
        np.ones(1),
        np.array([0]),
        1,
        np.array([0]),
        np.array([ROLE_PARCEL]),
        np.empty(0, np.int64),
        np.empty(0, np.int64),
        None,
    )
    slope = np.array([[10, 20, np.nan, 5], [10, 20, np.nan, 5], [1, 1, 1, 1]], np.float32)
    trip = tuple(coverage_triplets([parcel], Affine(CELL_M, 0, 0, 0, -CELL_M, 0), 3, 4))
    s, tile = accumulate_window(slope, None, np.full(3, 100.0), np.array([0]), trip, plan)
    assert s.covered_m2.tolist() == [600.0]
    assert s.evaluated_m2.tolist() == [400.0]
    assert s.over_m2.tolist() == [[200.0]]
    assert s.slope_area_sum[0] / s.evaluated_m2[0] == pytest.approx(15.0)
    assert s.slope_max_pct.tolist() == [20.0]
    assert s.conflict_m2.tolist() == [200.0]
    np.testing.assert_array_equal(
        tile, [[0, 1, 0, CONFLICT_OUTSIDE], [0, 1, 0, CONFLICT_OUTSIDE], [CONFLICT_OUTSIDE] * 4]
    )


def test_compiled_reduction_empty_window():
    # Common practice: a window no parcel touches gives no per-parcel sums and an all-"outside" tile.
    plan = OverlayPlan(
        np.array([18.0]),
        np.array([0]),
        np.array([-1]),
        np.zeros(1, np.uint32),
        np.zeros(1, np.uint32),
        np.ones(1),
        np.array([0]),
        1,
        np.array([0]),
        np.array([ROLE_PARCEL]),
        np.empty(0, np.int64),
        np.empty(0, np.int64),
        None,
    )
    empty = (np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0))
    s, tile = accumulate_window(np.ones((4, 5), np.float32), None, np.full(4, 100.0), np.array([0]), empty, plan)
    assert s.parcels.size == 0 and s.land_m2 == pytest.approx(2000.0)
    assert (tile == CONFLICT_OUTSIDE).all()


@pytest.mark.parametrize("dtype,nodata", [("float32", -9999.0), ("int16", -32768), ("float64", -9999.0)])
def test_float32_reads_hold_the_same_numbers(tmp_path, dtype, nodata):
    # Invariant: reading a window as float32 (when exact) gives the very numbers of the float64 read,
    # so slopes computed from either are bit-identical (the compiled loop widens each value to float64).
    from _support import write_raster

    from landcheck.geo.grid import Window
    from landcheck.inputs.dem import open_dem
    from landcheck.terrain.slope import slope_gradient

    rng = np.random.default_rng(5)
    z = (rng.normal(0, 30, (60, 70)).cumsum(axis=1) + 500).astype(dtype)
    z[10:13, 20:24] = nodata
    dem = open_dem(write_raster(tmp_path / "d.tif", z, nodata=nodata, dtype=dtype))
    win = Window(3, 4, 50, 60)
    a64 = dem.read_with_halo(win, 1)
    a32 = dem.read_with_halo(win, 1, np.float32)
    assert a32.dtype == (np.float64 if dtype == "float64" else np.float32)
    np.testing.assert_array_equal(a64, a32.astype(np.float64))
    assert np.isnan(a32[10 - 3 + 1, 20 - 4 + 1])  # the nodata block is NaN in both
    hx = hy = np.full(win.height, 10.0)
    for method in ("horn", "zevenbergen-thorne"):
        g64 = slope_gradient(a64, hx, hy, method, backend="compiled")
        g32 = slope_gradient(a32, hx, hy, method, backend="compiled")
        ref = slope_gradient(a64, hx, hy, method, backend="numpy")
        np.testing.assert_array_equal(g64, g32)
        np.testing.assert_array_equal(g64, ref)


def test_raster_formats_hold_the_same_cells(tmp_path):
    # Invariant: the audit's numbers and raster cells do not depend on the raster format; "none" writes
    # no raster.  Closed form too: on the ramp (slope 0.04 x %) the share over 18 % is the area share east
    # of x = 450 m (see tests/test_audit.py).
    import rasterio
    from _support import ramp_dem, write_parcels, write_rules

    from landcheck.core.audit import audit

    x0, y0 = 400000.0, 1600000.0
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    geoms = [
        affinity.rotate(shapely.box(x0 + 380, y0 - 500, x0 + 540, y0 - 430), 27, origin="centroid"),
        shapely.box(x0 + 420, y0 - 700, x0 + 520, y0 - 600),
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=[1, 2], zoning=["R", "R"])
    runs = {
        f: audit(dem, parcels, rules, tmp_path / f, make_report=False, rasters=f, tile_cells=50, workers=2)
        for f in ("cog", "gtiff", "none")
    }
    num = [c for c in runs["cog"].parcels.columns if runs["cog"].parcels[c].dtype.kind == "f"]
    for f in ("gtiff", "none"):
        np.testing.assert_array_equal(runs["cog"].parcels[num].to_numpy(), runs[f].parcels[num].to_numpy())
    truth = [g.intersection(shapely.box(x0 + 450, y0 - 1e4, x0 + 1e4, y0 + 1e4)).area / g.area for g in geoms]
    np.testing.assert_allclose(runs["gtiff"].parcels["over_limit_share"], truth, atol=1e-9)
    for name in ("slope_pct.tif", "conflict.tif"):
        with rasterio.open(tmp_path / "cog" / name) as a, rasterio.open(tmp_path / "gtiff" / name) as b:
            np.testing.assert_array_equal(a.read(1), b.read(1))
            # integer rasters ZSTD, float rasters uncompressed (docs/scale.md)
            assert b.profile["tiled"] and (b.compression is None) == (name == "slope_pct.tif")
            if name == "conflict.tif":
                assert b.compression.name.lower() == "zstd"
            assert a.overviews(1) or max(a.shape) <= 512  # COG: overviews once larger than a tile
        assert not (tmp_path / "none" / name).exists()
    assert not list((tmp_path / "gtiff").glob(".*"))  # no scratch left behind
    with pytest.raises(Exception, match="report"):
        audit(dem, parcels, rules, tmp_path / "r2", make_report=True, rasters="none")


def test_categorical_cog_overviews_keep_codes(tmp_path):
    # Common practice: overviews of a bit-flag raster are built by nearest neighbour, so every overview
    # cell holds a code that occurs in the full-resolution raster (averaging would invent codes).
    import rasterio
    from rasterio.transform import from_origin

    from landcheck.geo.grid import GridSpec, Window
    from landcheck.outputs.writers import RasterSink

    n = 1500
    rng = np.random.default_rng(2)
    codes = rng.choice(np.array([0, 1, 4, 255], np.uint8), (n, n))
    grid = GridSpec(from_origin(400000, 1600000, 10, 10), "EPSG:32651", n, n, False)
    with RasterSink(tmp_path / "c.tif", grid, dtype="uint8", nodata=255, categorical=True) as sink:
        sink.write(Window(0, 0, n, n), codes)
    with rasterio.open(tmp_path / "c.tif") as ds:
        assert ds.overviews(1)
        ov = ds.read(1, out_shape=(n // ds.overviews(1)[0], n // ds.overviews(1)[0]))
    assert set(np.unique(ov)) <= {0, 1, 4, 255}


def test_gdal_cache_is_capped_but_user_setting_wins(monkeypatch):
    # Common practice (GDAL docs, GDAL_CACHEMAX): the block cache defaults to 5 % of RAM; streamed runs cap it.
    from rasterio._env import get_gdal_config, set_gdal_config

    from landcheck.inputs.gdal_cache import GDAL_CACHE_CAP_BYTES, cap_gdal_cache

    monkeypatch.delenv("GDAL_CACHEMAX", raising=False)
    before = get_gdal_config("GDAL_CACHEMAX")
    try:
        set_gdal_config("GDAL_CACHEMAX", 2 * GDAL_CACHE_CAP_BYTES)
        cap_gdal_cache()
        assert int(get_gdal_config("GDAL_CACHEMAX")) == GDAL_CACHE_CAP_BYTES
        set_gdal_config("GDAL_CACHEMAX", GDAL_CACHE_CAP_BYTES // 4)
        cap_gdal_cache()  # never raises a smaller limit
        assert int(get_gdal_config("GDAL_CACHEMAX")) == GDAL_CACHE_CAP_BYTES // 4
    finally:
        set_gdal_config("GDAL_CACHEMAX", int(before))


def test_reused_coverage_buffers_give_fresh_results():
    # Invariant: triplets computed into reused (and grown) buffers equal those from fresh arrays.
    from landcheck.overlay.coverage import CoverageBuffers

    rng = np.random.default_rng(9)
    prepared = prepare_polygons(np.array(_lots(rng, 60, 12, 80), dtype=object))
    buffers = CoverageBuffers()
    for x0, hh, ww in [(0, 10, 10), (0, 80, 80), (200, 30, 50)]:  # small, then grown, then reused
        t = Affine(CELL_M, 0, x0, 0, -CELL_M, 0)
        fresh = coverage_triplets(prepared, t, hh, ww)
        reused = coverage_triplets(prepared, t, hh, ww, buffers=buffers)
        assert len(fresh.fraction) > 0
        for a, b in zip(fresh, reused):
            np.testing.assert_array_equal(a, b)


def test_audit_rasters_and_sums_do_not_depend_on_tiles_or_workers(tmp_path):
    # Invariant: tile size (one that divides nothing) and worker count change no per-parcel number and no
    # raster cell. Closed form too: the share over 18 % on the ramp is the area share east of x = 450 m.
    import rasterio
    from _support import ramp_dem, write_parcels, write_rules

    from landcheck.core.audit import audit

    x0, y0 = 400000.0, 1600000.0
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml", band=3.0)
    rng = np.random.default_rng(11)
    geoms = [
        affinity.rotate(shapely.box(x0 + x, y0 - y, x0 + x + w, y0 - y + 60), a, origin="centroid")
        for x, y, w, a in zip(
            rng.uniform(30, 900, 25), rng.uniform(80, 1150, 25), rng.uniform(20, 250, 25), rng.uniform(0, 90, 25)
        )
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 26), zoning=["R"] * 20 + ["F"] * 5)
    a = audit(dem, parcels, rules, tmp_path / "a", make_report=False, rasters="gtiff", tile_cells=37, workers=1)
    b = audit(dem, parcels, rules, tmp_path / "b", make_report=False, rasters="gtiff", tile_cells=37, workers=2)
    c = audit(dem, parcels, rules, tmp_path / "c", make_report=False, rasters="gtiff", tile_cells=1024, workers=2)
    num = [c for c in a.parcels.columns if a.parcels[c].dtype.kind == "f"]
    # same windows, other worker count: bit for bit (results are merged in window order)
    np.testing.assert_array_equal(a.parcels[num].to_numpy(), b.parcels[num].to_numpy())
    assert a.summary["capability"] == b.summary["capability"]
    # other windows: the same sums added in another order, equal to rounding
    np.testing.assert_allclose(c.parcels[num].to_numpy(), b.parcels[num].to_numpy(), rtol=1e-12, atol=1e-9)
    assert a.parcels["verdict"].tolist() == c.parcels["verdict"].tolist()
    for name in ("slope_pct.tif", "conflict.tif"):
        for other in ("b", "c"):
            with rasterio.open(tmp_path / "a" / name) as ra, rasterio.open(tmp_path / other / name) as rb:
                np.testing.assert_array_equal(ra.read(1), rb.read(1))
    truth = [g.intersection(shapely.box(x0 + 450, y0 - 1e4, x0 + 1e4, y0 + 1e4)).area / g.area for g in geoms[:20]]
    np.testing.assert_allclose(b.parcels["over_limit_share"][:20], truth, atol=1e-9)


def test_slope_formats_hold_the_same_cells(tmp_path):
    # Invariant: the slope command's raster format changes no cell (slope and class rasters).
    # Source for the value: on the ramp z = g/2 x^2 every 3x3 kernel is exact at the centre (docs/references.md §1),
    # so the slope of the cell centred at x is 100 g x percent.
    import rasterio
    from _support import ramp_dem

    from landcheck.core.slope_raster import derive_slope

    g = 0.0003  # keeps the ramp's top (7 350 m) inside the plausible elevation range (docs/cli.md)
    dem = ramp_dem(tmp_path / "dem.tif", n=700, gradient_per_m=g)
    for fmt in ("cog", "gtiff"):
        derive_slope(
            dem,
            tmp_path / f"{fmt}.tif",
            raster_format=fmt,
            class_out=tmp_path / f"{fmt}_cls.tif",
            tile_cells=300,
            workers=2,
            show_progress=False,
        )
    with rasterio.open(tmp_path / "cog.tif") as a, rasterio.open(tmp_path / "gtiff.tif") as b:
        sa, sb = a.read(1), b.read(1)
        assert a.overviews(1) and not b.overviews(1)
    np.testing.assert_array_equal(sa, sb)
    x = (np.arange(700) + 0.5) * 10.0
    np.testing.assert_allclose(sb[350, 1:-1], 100 * g * x[1:-1], rtol=1e-6)
    with rasterio.open(tmp_path / "cog_cls.tif") as a, rasterio.open(tmp_path / "gtiff_cls.tif") as b:
        np.testing.assert_array_equal(a.read(1), b.read(1))
    with pytest.raises(ValueError, match="cog"):
        derive_slope(dem, tmp_path / "n.tif", raster_format="none")
