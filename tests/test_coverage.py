"""Exact cell coverage (landcheck.overlay.coverage) against worked values, exactextract and shapely."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from shapely import affinity

from landcheck.errors import InputDataError
from landcheck.geo.grid import GridSpec, iter_windows
from landcheck.overlay.coverage import (
    MIN_FRACTION,
    _coverage_kernel,
    coverage_triplets,
    prepare_polygons,
)

CRS = "EPSG:32651"
X0_M, Y0_M = 400_000.0, 1_600_000.0  # fictional grid origin (top-left corner)


def _transform(dx=10.0, dy=10.0, x0=X0_M, y0=Y0_M) -> Affine:
    return Affine(dx, 0.0, x0, 0.0, -dy, y0)


def _xy(t: Affine, col, row):
    """CRS coordinates of grid position (col, row) in cell units (north-up or south-up grid)."""
    x = t.c + t.a * np.asarray(col, dtype=float)
    y = t.f + t.e * np.asarray(row, dtype=float)
    return (float(x), float(y)) if x.ndim == 0 else (x, y)


def _window_transform(t: Affine, height: int, width: int, win) -> Affine:
    return GridSpec(t, CRS, width, height, False).window_transform(win)


def _cell_dict(trip, feature=None) -> dict:
    """{(row, col): fraction} of one feature (or of all when there is a single one)."""
    m = slice(None) if feature is None else trip.feature_index == feature
    return dict(zip(zip(trip.row[m].tolist(), trip.col[m].tolist()), trip.fraction[m].tolist()))


def _window_box(t: Affine, height: int, width: int):
    x1, y1 = _xy(t, width, height)
    return shapely.box(min(t.c, x1), min(t.f, y1), max(t.c, x1), max(t.f, y1))


def _random_features(rng, t: Affine, height: int, width: int, n: int, snap=False):
    """Rotated rectangles, triangles, polygons with holes and multipolygons around a grid.

    Positions spill over the grid's edges so that clipping at the window is exercised.
    With ``snap`` every vertex lies on a grid line (and many edges run along one).
    """
    dx, dy = t.a, -t.e
    feats = []
    while len(feats) < n:
        cu = rng.uniform(-3, width + 3)
        cv = rng.uniform(-3, height + 3)
        cx, cy = _xy(t, cu, cv)
        kind = len(feats) % 4
        if kind == 0:
            g = affinity.rotate(
                shapely.box(cx, cy, cx + rng.uniform(0.05, 9) * dx, cy + rng.uniform(0.05, 6) * dy),
                rng.uniform(0, 180),
                origin="centroid",
            )
        elif kind == 1:
            g = shapely.Polygon(np.column_stack([cx + rng.uniform(-5, 5, 3) * dx, cy + rng.uniform(-5, 5, 3) * dy]))
        elif kind == 2:
            outer = shapely.Point(cx, cy).buffer(rng.uniform(2, 6) * dx, quad_segs=4)
            g = outer.difference(
                shapely.Point(cx + 0.3 * dx, cy - 0.2 * dy).buffer(rng.uniform(0.3, 1.5) * dx, quad_segs=3)
            )
        else:
            g = shapely.MultiPolygon(
                [
                    shapely.box(cx, cy, cx + 2.5 * dx, cy + 1.7 * dy),
                    affinity.rotate(shapely.box(cx + 3 * dx, cy, cx + 4.2 * dx, cy + 5 * dy), 20),
                ]
            )
        if snap:
            # vertices on grid lines: whole or half cells from the grid origin
            g = shapely.transform(
                g,
                lambda xy: np.column_stack(
                    [
                        t.c + np.round(2 * (xy[:, 0] - t.c) / dx) / 2 * dx,
                        t.f - np.round(2 * (t.f - xy[:, 1]) / dy) / 2 * dy,
                    ]
                ),
            )
        if g.is_empty or not g.is_valid or g.area == 0:
            continue
        feats.append(g)
    return feats


# ---------------------------------------------------------------------------
# Worked values
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("offset, centre_count", [((0.0, 0.0), 1), ((0.2, 0.2), 4), ((0.6, 0.6), 1), ((0.4, 0.6), 2)])
def test_square_at_subcell_offsets_is_exact(offset, centre_count):
    # Source: docs/references.md §15 [C]: a 1.5 x 1.5-cell square at sub-cell offsets (0,0), (0.2,0.2),
    # (0.6,0.6), (0.4,0.6) has area 2.25 cells; the cell-centre rule counts 1, 4, 1, 2 cells.
    t = _transform()
    ou, ov = offset
    # lower-left corner at (2 + ou, 6 - ov) in cell units: x grows east, rows grow south
    x_min, y_min = _xy(t, 2 + ou, 6 - ov)
    sq = shapely.box(x_min, y_min, x_min + 15.0, y_min + 15.0)
    trip = coverage_triplets([sq], t, 8, 8)
    assert trip.fraction.sum() == pytest.approx(2.25, abs=1e-12)
    # the centre rule, evaluated with shapely (points on the boundary are not inside)
    cols, rows = np.meshgrid(np.arange(8), np.arange(8))
    cx, cy = _xy(t, cols + 0.5, rows + 0.5)
    assert int(shapely.contains_xy(sq, cx, cy).sum()) == centre_count


def test_hand_worked_triangle_on_a_4x4_grid():
    # Hand-worked: triangle (0,0), (2,0), (0,2) on a 1 m grid whose top-left corner
    # is (0, 4).  Row 3 col 0 lies wholly under x + y = 2 (1.0); row 3 col 1 and row 2 col 0 are
    # cut along their diagonal (0.5 each); the total is the triangle's area, 2 cells.
    tri = shapely.Polygon([(0, 0), (2, 0), (0, 2)])
    trip = coverage_triplets([tri], Affine(1, 0, 0, 0, -1, 4), 4, 4)
    got = _cell_dict(trip)
    assert set(got) == {(3, 0), (3, 1), (2, 0)}
    assert got[(3, 0)] == 1.0
    assert got[(3, 1)] == pytest.approx(0.5, abs=1e-15)
    assert got[(2, 0)] == pytest.approx(0.5, abs=1e-15)


def test_grid_aligned_rectangle_gives_exact_ones():
    # Analytic: a rectangle along grid lines covers whole cells only; every fraction is exactly 1
    # and the cell count is its area in cells (3 x 4 = 12).
    t = _transform()
    x_a, y_a = _xy(t, 2, 7)
    x_b, y_b = _xy(t, 5, 3)
    trip = coverage_triplets([shapely.box(x_a, y_a, x_b, y_b)], t, 10, 10)
    assert trip.fraction.size == 12
    assert np.all(trip.fraction == 1.0)
    assert set(_cell_dict(trip)) == {(r, c) for r in range(3, 7) for c in range(2, 5)}


def test_tiny_polygon_inside_one_cell():
    # Analytic: a 0.1 m x 0.2 m box inside one 10 m cell covers 0.02 / 100 = 2e-4 of it.
    t = _transform()
    x, y = _xy(t, 3.41, 5.27)
    trip = coverage_triplets([shapely.box(x, y, x + 0.1, y + 0.2)], t, 10, 10)
    assert list(_cell_dict(trip)) == [(5, 3)]  # rows 5.25 .. 5.27, columns 3.41 .. 3.42
    assert trip.fraction[0] == pytest.approx(2e-4, rel=1e-9)


# ---------------------------------------------------------------------------
# Independent implementation: exactextract
# ---------------------------------------------------------------------------


def _exactextract_cells(feats, t: Affine, height: int, width: int, pad: int = 4) -> list[dict]:
    """exactextract's (row, col) -> coverage per feature, on the window grown by ``pad`` cells.

    The padding keeps polygon vertices off the raster's outer edge: exactextract 0.3.0 crashed
    (segmentation fault) on polygons with a vertex or edge exactly on that edge.  Cells of the
    padding are dropped before comparing.
    """
    import geopandas as gpd
    import pyproj
    from exactextract import exact_extract
    from exactextract.raster import NumPyRasterSource

    ph, pw = height + 2 * pad, width + 2 * pad
    xa, ya = _xy(t, -pad, -pad)
    xb, yb = _xy(t, width + pad, height + pad)
    src = NumPyRasterSource(
        np.zeros((ph, pw)), min(xa, xb), min(ya, yb), max(xa, xb), max(ya, yb), srs_wkt=pyproj.CRS(CRS).to_wkt()
    )
    # exactextract 0.3.0 stops with "Never get here." on rings with repeated consecutive vertices
    # (which snapping to grid lines creates); the same polygons without them have the same area
    clean = shapely.remove_repeated_points(np.array(feats, dtype=object))
    gdf = gpd.GeoDataFrame(geometry=list(clean), crs=CRS)
    df = exact_extract(src, gdf, ["cell_id", "coverage"], output="pandas")
    out = []
    for ids, cov in zip(df["cell_id"], df["coverage"]):
        ids = np.asarray(ids, dtype=np.int64)
        rows, cols = ids // pw - pad, ids % pw - pad
        keep = (rows >= 0) & (rows < height) & (cols >= 0) & (cols < width)
        out.append(dict(zip(zip(rows[keep].tolist(), cols[keep].tolist()), np.asarray(cov)[keep].tolist())))
    return out


@pytest.mark.parametrize("snap", [False, True], ids=["free", "vertices-on-grid-lines"])
def test_against_exactextract(snap):
    # Reference: exactextract 0.3.0 ('cell_id', 'coverage' on a NumPyRasterSource), an independent
    # C++ implementation of exact coverage fractions.  It stores fractions as 32-bit floats, so
    # values can agree only to float32 resolution: |difference| <= 2**-23 (one float32 step at 1),
    # not 1e-9.  The float64 accuracy itself is checked against shapely below.
    rng = np.random.default_rng(20 + snap)
    t = _transform(dx=10.0, dy=7.5)
    height, width = 23, 31
    feats = _random_features(rng, t, height, width, 80, snap=snap)
    trip = coverage_triplets(feats, t, height, width)
    ref = _exactextract_cells(feats, t, height, width)
    f32_step = 2.0**-23
    for k, theirs in enumerate(ref):
        ours = _cell_dict(trip, k)
        only = set(ours) ^ set(theirs)
        # a cell reported by one tool only must carry a float32-invisible fraction
        assert all(ours.get(c, 0.0) <= f32_step and theirs.get(c, 0.0) <= f32_step for c in only), (k, only)
        for cell in set(ours) & set(theirs):
            assert ours[cell] == pytest.approx(theirs[cell], abs=f32_step), (k, cell)


# ---------------------------------------------------------------------------
# Independent implementation: shapely (GEOS overlay)
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("snap", [False, True], ids=["free", "vertices-on-grid-lines"])
def test_totals_and_cells_against_shapely(snap):
    # Reference: shapely 2 / GEOS polygon intersection areas in float64.
    rng = np.random.default_rng(40 + snap)
    t = _transform(dx=10.0, dy=7.5)
    height, width = 23, 31
    cell_m2 = 10.0 * 7.5
    feats = _random_features(rng, t, height, width, 60, snap=snap)
    trip = coverage_triplets(feats, t, height, width)
    window = _window_box(t, height, width)
    clipped_m2 = shapely.area(shapely.intersection(np.array(feats, dtype=object), window))
    ours_m2 = np.bincount(trip.feature_index, weights=trip.fraction, minlength=len(feats)) * cell_m2
    np.testing.assert_allclose(ours_m2, clipped_m2, rtol=1e-9, atol=1e-9 * cell_m2)
    # per cell: fraction == area(feature ∩ cell) / cell area, on a sample of reported cells
    pick = rng.choice(trip.fraction.size, size=min(400, trip.fraction.size), replace=False)
    xa, ya = _xy(t, trip.col[pick], trip.row[pick])
    xb, yb = _xy(t, trip.col[pick] + 1, trip.row[pick] + 1)
    cells = shapely.box(np.minimum(xa, xb), np.minimum(ya, yb), np.maximum(xa, xb), np.maximum(ya, yb))
    geoms = np.array(feats, dtype=object)[trip.feature_index[pick]]
    ref = shapely.area(shapely.intersection(geoms, cells)) / cell_m2
    np.testing.assert_allclose(trip.fraction[pick], ref, rtol=0, atol=1e-9)


def _star_polygon(draw_values, t: Affine, width: int, height: int):
    centre_u, centre_v, angles, radii, snap = draw_values
    theta = np.sort(np.asarray(angles))
    r = np.asarray(radii)
    u = centre_u + r * np.cos(theta)
    v = centre_v + r * np.sin(theta)
    if snap:  # put vertices on grid lines (edges along them too)
        u, v = np.round(u * 2) / 2, np.round(v * 2) / 2
    x, y = _xy(t, u, v)
    return shapely.Polygon(np.column_stack([x, y]))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(
    st.tuples(
        st.floats(-4, 16),
        st.floats(-4, 12),
        st.lists(st.floats(0, 2 * np.pi, allow_nan=False), min_size=3, max_size=14, unique=True),
        st.lists(st.floats(0.05, 7.0), min_size=14, max_size=14),
        st.booleans(),
    )
)
def test_property_total_equals_shapely_clipped_area(values):
    # Reference: shapely intersection area with the window, for random simple (star-shaped) polygons.
    centre_u, centre_v, angles, radii, snap = values
    t = _transform(dx=5.0, dy=5.0)
    height, width = 9, 13
    poly = _star_polygon((centre_u, centre_v, angles, radii[: len(angles)], snap), t, width, height)
    assume(poly.is_valid and poly.area > 1e-6)
    trip = coverage_triplets([poly], t, height, width)
    expected = poly.intersection(_window_box(t, height, width)).area / 25.0
    assert trip.fraction.sum() == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert np.all((trip.fraction > MIN_FRACTION) & (trip.fraction <= 1.0))


# ---------------------------------------------------------------------------
# Additivity and windowing (docs/references.md §15)
# ---------------------------------------------------------------------------


def test_tiling_polygons_sum_to_one_per_cell():
    # Source: docs/references.md §15 [D]: coverage fractions of polygons that tile a region sum to 1
    # in every cell inside it.  The tiles are shapely's Voronoi cells of random points clipped to a
    # box that is not aligned with the grid; per cell the expected sum is area(cell ∩ box) / cell
    # area (shapely), i.e. exactly 1 inside the box.
    rng = np.random.default_rng(7)
    t = _transform()
    height, width = 20, 24
    region = shapely.box(*(_xy(t, 1.3, 18.6)), *(_xy(t, 22.45, 0.7)))
    pts = shapely.points(
        rng.uniform(region.bounds[0], region.bounds[2], 60), rng.uniform(region.bounds[1], region.bounds[3], 60)
    )
    tiles = shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(pts), extend_to=region))
    tiles = shapely.intersection(tiles, region)
    trip = coverage_triplets(tiles, t, height, width)
    per_cell = np.zeros((height, width))
    np.add.at(per_cell, (trip.row, trip.col), trip.fraction)
    cols, rows = np.meshgrid(np.arange(width), np.arange(height))
    xa, ya = _xy(t, cols, rows)
    xb, yb = _xy(t, cols + 1, rows + 1)
    cells = shapely.box(xa, yb, xb, ya)
    expected = shapely.area(shapely.intersection(cells, region)) / 100.0
    np.testing.assert_allclose(per_cell, expected, rtol=0, atol=1e-12)
    assert np.count_nonzero(expected == 1.0) > 300  # most cells lie wholly inside


def test_windows_that_do_not_divide_the_raster_merge_exactly():
    # Source: docs/references.md §15: 7 x 5 windows on a 23 x 31 raster merged give the
    # whole-raster result.  Features include one larger than the raster (with a hole) that spans
    # every window.
    rng = np.random.default_rng(11)
    t = _transform()
    height, width = 23, 31
    feats = _random_features(rng, t, height, width, 40)
    big = shapely.Polygon(
        [_xy(t, -5.3, -4.1), _xy(t, 40.2, -2.7), _xy(t, 36.9, 30.5), _xy(t, -3.8, 27.2)],
        holes=[[_xy(t, 10.2, 6.5), _xy(t, 18.7, 7.1), _xy(t, 14.4, 15.9)]],
    )
    feats.append(big)
    prepared = prepare_polygons(feats)
    whole = coverage_triplets(prepared, t, height, width)
    totals = np.zeros(len(feats))
    merged = {}
    for win in iter_windows(height, width, 7, 5):
        wt = _window_transform(t, height, width, win)
        part = coverage_triplets(prepared, wt, win.height, win.width)
        assert part.row.max(initial=0) < win.height and part.col.max(initial=0) < win.width
        totals += np.bincount(part.feature_index, weights=part.fraction, minlength=len(feats))
        for k, r, c, fr in zip(
            part.feature_index.tolist(),
            (part.row + win.row_off).tolist(),
            (part.col + win.col_off).tolist(),
            part.fraction.tolist(),
        ):
            merged[(k, r, c)] = fr
    whole_totals = np.bincount(whole.feature_index, weights=whole.fraction, minlength=len(feats))
    np.testing.assert_allclose(totals, whole_totals, rtol=1e-12, atol=1e-12)
    whole_cells = dict(
        zip(zip(whole.feature_index.tolist(), whole.row.tolist(), whole.col.tolist()), whole.fraction.tolist())
    )
    assert set(merged) == set(whole_cells)
    np.testing.assert_allclose([merged[k] for k in whole_cells], list(whole_cells.values()), rtol=0, atol=1e-12)
    # the big feature: the whole raster minus its hole (shapely)
    expected_big = big.intersection(_window_box(t, height, width)).area / 100.0
    assert whole_totals[-1] == pytest.approx(expected_big, rel=1e-12)


# ---------------------------------------------------------------------------
# Inputs, orientation, grids
# ---------------------------------------------------------------------------


def test_degenerate_and_empty_geometries_are_skipped():
    # Common practice: features without area produce no cells but keep their positions.
    t = _transform()
    x, y = _xy(t, 2.5, 3.5)
    good = shapely.box(x, y - 10.0, x + 10.0, y)
    feats = [
        None,
        shapely.Polygon(),
        shapely.Point(x, y),
        shapely.LineString([(x, y), (x + 30, y - 20)]),
        shapely.Polygon([(x, y), (x + 10, y - 10), (x + 20, y - 20)]),  # collinear: zero area
        shapely.GeometryCollection([shapely.Point(x, y), good]),
        shapely.MultiPolygon(),
        good,
    ]
    trip = coverage_triplets(feats, t, 8, 8)
    assert set(trip.feature_index.tolist()) == {5, 7}
    assert _cell_dict(trip, 5) == pytest.approx(_cell_dict(trip, 7))
    assert sum(_cell_dict(trip, 7).values()) == pytest.approx(1.0, abs=1e-12)


def test_features_outside_the_window_give_nothing():
    t = _transform()
    x, y = _xy(t, 12, 3)  # east of an 8 x 8 window
    trip = coverage_triplets([shapely.box(x, y - 20, x + 20, y)], t, 8, 8)
    assert trip.fraction.size == 0
    # touching the window along its east edge only: zero area inside
    x8, _ = _xy(t, 8, 0)
    trip = coverage_triplets([shapely.box(x8, y - 20, x8 + 20, y)], t, 8, 8)
    assert trip.fraction.size == 0


def test_ring_orientation_does_not_matter():
    # Invariant: reversing every ring (clockwise shells, counter-clockwise holes) changes nothing.
    rng = np.random.default_rng(5)
    t = _transform()
    feats = _random_features(rng, t, 12, 12, 16)
    a = coverage_triplets(feats, t, 12, 12)
    b = coverage_triplets(shapely.reverse(np.array(feats, dtype=object)), t, 12, 12)
    assert np.array_equal(a.feature_index, b.feature_index)
    assert np.array_equal(a.row, b.row) and np.array_equal(a.col, b.col)
    np.testing.assert_allclose(a.fraction, b.fraction, rtol=0, atol=1e-13)


def test_south_up_grid_mirrors_rows():
    # Analytic: on a grid with rows running north (e > 0) the same cells are covered, mirrored.
    rng = np.random.default_rng(6)
    height, width = 12, 14
    north_up = _transform()
    south_up = Affine(10.0, 0.0, X0_M, 0.0, 10.0, Y0_M - height * 10.0)
    feats = _random_features(rng, north_up, height, width, 12)
    a = coverage_triplets(feats, north_up, height, width)
    b = coverage_triplets(feats, south_up, height, width)
    ka = sorted(zip(a.feature_index.tolist(), (height - 1 - a.row).tolist(), a.col.tolist(), a.fraction.tolist()))
    kb = sorted(zip(b.feature_index.tolist(), b.row.tolist(), b.col.tolist(), b.fraction.tolist()))
    assert [k[:3] for k in ka] == [k[:3] for k in kb]
    np.testing.assert_allclose([k[3] for k in ka], [k[3] for k in kb], rtol=0, atol=1e-12)


def test_rotated_transform_is_rejected():
    with pytest.raises(InputDataError, match="rotated or sheared"):
        coverage_triplets([shapely.box(0, 0, 1, 1)], Affine(1, 0.1, 0, 0, -1, 4), 4, 4)


def test_non_geometry_input_is_rejected():
    with pytest.raises(InputDataError, match="shapely"):
        coverage_triplets(["not a polygon"], _transform(), 4, 4)


def test_geopandas_input_and_threads_match_serial():
    # Invariant: a GeoSeries or GeoDataFrame is read like a list; windows computed in threads (the
    # kernel releases the GIL) give the same triplets as a serial run.
    import geopandas as gpd

    rng = np.random.default_rng(8)
    t = _transform()
    feats = _random_features(rng, t, 30, 30, 40)
    prepared = prepare_polygons(gpd.GeoSeries(feats, crs=CRS))
    from_frame = prepare_polygons(gpd.GeoDataFrame({"parcel_id": np.arange(40)}, geometry=feats, crs=CRS))
    from_list = prepare_polygons(feats)
    for name in ("x", "y", "ring_offsets", "ring_is_hole", "feature_ring_start", "feature_ring_stop"):
        assert np.array_equal(getattr(prepared, name), getattr(from_list, name))
        assert np.array_equal(getattr(from_frame, name), getattr(from_list, name))
    wins = list(iter_windows(30, 30, 8))

    def run(win):
        return coverage_triplets(prepared, _window_transform(t, 30, 30, win), win.height, win.width)

    serial = [run(w) for w in wins]
    with ThreadPoolExecutor(2) as pool:
        threaded = list(pool.map(run, wins))
    for s, p in zip(serial, threaded):
        for a, b in zip(s, p):
            assert np.array_equal(a, b)


def test_plain_python_kernel_matches_compiled():
    # Invariant (common practice: one copy of each formula): the kernel's Python source, run without
    # numba, gives the compiled result.
    rng = np.random.default_rng(9)
    t = _transform()
    feats = _random_features(rng, t, 6, 7, 8)
    p = prepare_polygons(feats)
    sel = np.arange(len(feats), dtype=np.int64)
    args = (
        p.x,
        p.y,
        p.ring_offsets,
        p.ring_is_hole,
        p.feature_ring_start,
        p.feature_ring_stop,
        sel,
        t.a,
        t.c,
        t.e,
        t.f,
        6,
        7,
        MIN_FRACTION,
    )

    def bufs():
        return (np.empty(16, np.int64), np.empty(16, np.int32), np.empty(16, np.int32), np.empty(16))

    compiled = _coverage_kernel(*args, *bufs())
    python = getattr(_coverage_kernel, "py_func", _coverage_kernel)(*args, *bufs())
    n = compiled[4]
    assert python[4] == n and n > 0
    for a, b in zip(compiled[:4], python[:4]):
        np.testing.assert_allclose(a[:n], b[:n], rtol=0, atol=1e-15)
