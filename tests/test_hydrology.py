"""Tests for landcheck.terrain.hydrology: sea mask, connected inundation, D8 routing, HAND, vector outputs.

Every check names where its expected value comes from (docs/references.md sections given).
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine
from matplotlib import cbook
from scipy import ndimage

from landcheck.errors import InputDataError, LandcheckError
from landcheck.geo import geodesy
from landcheck.terrain.hydrology import (
    flow_directions,
    hand_m,
    inundation_masks,
    mask_boundary_lines,
    mask_to_polygons,
    sea_mask,
    stream_mask,
    streams_to_lines,
    upstream_area_m2,
)

EIGHT = np.ones((3, 3), dtype=bool)
FOUR = ndimage.generate_binary_structure(2, 1)
CRS = "EPSG:32651"  # any projected CRS in metres; only attached to outputs


# --------------------------------------------------------------------------- synthetic surfaces


def v_valley(s=0.2, g=0.01, h=10.0, half_width=8, n_rows=15):
    """z = s*|x| + g*y: a V-shaped valley along a grid column, draining towards row 0.

    x is the distance from the channel column, y the distance up-valley (row * h).
    With g < (sqrt(2) - 1) * s the steepest D8 drop from a hillside cell is straight
    across to its neighbour nearer the channel (side drop s*h over h beats the corner
    drop (s + g)*h over h*sqrt(2) and the up-valley drop g*h over h) [derived here].
    """
    x = (np.arange(2 * half_width + 1) - half_width) * h
    y = np.arange(n_rows) * h
    z = s * np.abs(x)[None, :] + g * y[:, None] + 50.0
    return z, x, y


def funnel(radius):
    """Square funnel z = max(|dr|, |dc|) around a nodata centre cell (the outlet)."""
    i = np.arange(-radius, radius + 1)
    z = np.maximum(np.abs(i)[:, None], np.abs(i)[None, :]).astype(np.float64)
    z[radius, radius] = np.nan
    return z


def filled_by_fixed_point(z):
    """Depression-filled DEM by plain iteration, written independently of pyflwdir.

    Source (from memory): Planchon & Darboux 2001, Catena 46:159-176, without the
    epsilon slope; equivalently the morphological reconstruction by erosion (Soille
    2004).  The filled surface is the lowest surface >= z on which every cell has a
    non-ascending 8-connected path to the raster edge: start at +inf inside and z on
    the edge, then W <- max(z, min(W, min over neighbours of W)) until nothing changes.
    """
    w = np.full(z.shape, np.inf)
    w[0, :], w[-1, :], w[:, 0], w[:, -1] = z[0, :], z[-1, :], z[:, 0], z[:, -1]
    while True:
        lowest_neighbour = ndimage.minimum_filter(w, footprint=EIGHT, mode="constant", cval=np.inf)
        new = np.maximum(z, np.minimum(w, lowest_neighbour))
        if np.array_equal(new, w):
            return w
        w = new


def d8_targets(routing):
    """Linear index each valid cell drains to, decoded from the D8 codes (itself at a pit)."""
    # Source: pyflwdir D8 encoding, documented in pyflwdir.core_d8 (_ds table):
    # 1 E, 2 SE, 4 S, 8 SW, 16 W, 32 NW, 64 N, 128 NE, 0 pit
    offsets = {
        1: (0, 1),
        2: (1, 1),
        4: (1, 0),
        8: (1, -1),
        16: (0, -1),
        32: (-1, -1),
        64: (-1, 0),
        128: (-1, 1),
        0: (0, 0),
    }
    d8 = routing.flw.to_array()
    rows, cols = d8.shape
    target = np.full(d8.size, -1, dtype=np.int64)
    for r in range(rows):
        for c in range(cols):
            code = int(d8[r, c])
            if code in offsets:
                dr, dc = offsets[code]
                target[r * cols + c] = (r + dr) * cols + (c + dc)
    return target


# --------------------------------------------------------------------------- HAND


@pytest.mark.parametrize("orientation", ["as_built", "transposed", "flipped"])
def test_hand_v_valley_matches_closed_form(orientation):
    # Source: docs/references.md §9 (Renno et al. 2008 definition; test surface [D]):
    # on z = s*|x| + g*y every hillside cell drains straight across to the channel
    # cell of its own row, so HAND = z(cell) - z(channel, same row) = s*|x| exactly.
    s, g, h, w = 0.2, 0.01, 10.0, 8
    z, x, y = v_valley(s, g, h, w)
    valley_cells = z.shape[0]
    expected = np.broadcast_to(s * np.abs(x)[None, :], z.shape)
    if orientation == "transposed":  # channel along a row, draining west
        z, expected = z.T.copy(), expected.T.copy()
    elif orientation == "flipped":  # draining south
        z, expected = z[::-1].copy(), expected[::-1].copy()
    routing = flow_directions(z, Affine(h, 0, 0, 0, -h, 0))
    area = upstream_area_m2(routing, h * h)
    # a hillside cell collects at most `w` cells (its own row outwards); the channel
    # at least 2w + 1; so a threshold of w + 1 cells selects exactly the channel
    streams = stream_mask(area, (w + 1) * h * h)
    assert streams.sum() == valley_cells  # one channel line along the valley
    hand = hand_m(routing.conditioned_m, routing, streams)
    # float32 routing surface: values near 50 m round by < 4e-6 m
    np.testing.assert_allclose(hand[1:-1, 1:-1], expected[1:-1, 1:-1], rtol=0, atol=1e-4)
    np.testing.assert_allclose(hand, expected, rtol=0, atol=1e-4)  # edges too, on this surface
    assert np.all(hand[streams] == 0)  # Source: definition, a drainage cell is its own drain


def test_hand_plane_towards_edge_channel():
    # Source: docs/references.md §9 test surfaces [D]: a plane tilted toward a single edge
    # channel gives HAND = distance to the channel x gradient.
    h, grad, rows, cols = 5.0, 0.03, 12, 9
    z = 7.0 + grad * h * np.arange(rows)[:, None] * np.ones(cols)
    routing = flow_directions(z, Affine(h, 0, 0, 0, -h, 0))
    area = upstream_area_m2(routing, h * h)
    streams = stream_mask(area, rows * h * h)  # only row 0 collects all `rows` cells upslope
    assert streams[0].all() and not streams[1:].any()
    hand = hand_m(routing.conditioned_m, routing, streams)
    expected = grad * h * np.arange(rows)[:, None] * np.ones(cols)
    np.testing.assert_allclose(hand, expected, rtol=0, atol=1e-5)


def test_hand_without_drainage_is_nan_unless_outlets_drain():
    # Source: docs/references.md §9 step 3 (follow the LDD to the first drainage cell):
    # with no drainage cell there is nothing to measure against -> NaN; when outlets
    # count as drainage, every path on the V-valley ends at the outlet (row 0, channel
    # column), so HAND = z - z(outlet) = s*|x| + g*y [derived here].
    s, g, h, w = 0.2, 0.01, 10.0, 5
    z, x, y = v_valley(s, g, h, w, n_rows=10)
    routing = flow_directions(z, Affine(h, 0, 0, 0, -h, 0))
    none = np.zeros(z.shape, dtype=bool)
    assert np.isnan(hand_m(routing.conditioned_m, routing, none)).all()
    hand = hand_m(routing.conditioned_m, routing, none, outlets_drain=True)
    expected = s * np.abs(x)[None, :] + g * y[:, None]
    np.testing.assert_allclose(hand, expected, rtol=0, atol=1e-4)


# --------------------------------------------------------------------------- conditioning and D8


def test_single_pit_bowl_fills_to_spill_level_and_drains_through_it():
    # Source: docs/references.md §16 (Priority-Flood, Barnes et al. 2014; test [D]): a 5x5 bowl
    # with a single pit of depth d fills exactly to the lowest rim (spill) elevation.
    d, spill = 3.0, 11.0
    z = np.full((5, 5), 12.0)  # rim
    z[1:4, 1:4] = 10.0
    z[2, 2] = 10.0 - d
    z[0, 2] = spill  # lowest rim cell
    routing = flow_directions(z, Affine(1, 0, 0, 0, -1, 0))
    np.testing.assert_array_equal(routing.conditioned_m[1:4, 1:4], np.full((3, 3), spill))
    assert routing.fill_depth_m[2, 2] == pytest.approx(spill - (10.0 - d))
    # Source: D8 definition, docs/references.md §16 (worked by hand): every rim cell has a lower
    # neighbour (the filled inside at 11 m, or the spill cell), so all 25 cells leave
    # through the spill cell, the only outlet
    area = upstream_area_m2(routing, 1.0)
    assert area[0, 2] == 25.0
    target = d8_targets(routing)
    assert np.flatnonzero(target == np.arange(25)).tolist() == [2]


def test_tilted_plane_upstream_counts():
    # Source: docs/references.md §16 (D8, O'Callaghan & Mark 1984) [derived here]: on a plane
    # falling towards row 0 each cell's steepest drop is straight down-slope (drop/h
    # beats drop/(h*sqrt(2))), so upstream count = rows upslope + 1.
    rows, cols, h = 9, 7, 30.0
    z = 0.05 * h * np.arange(rows)[:, None] + np.zeros((rows, cols))
    routing = flow_directions(z, Affine(h, 0, 0, 0, -h, 0))
    counts = upstream_area_m2(routing, 1.0)
    expected = (rows - np.arange(rows))[:, None] * np.ones(cols)
    np.testing.assert_array_equal(counts, expected)
    # in m2 with one cell area per row (as on a geographic grid): sum of the areas upslope
    row_area = 900.0 + 10.0 * np.arange(rows)
    area = upstream_area_m2(routing, row_area)
    np.testing.assert_allclose(area[:, 3], np.cumsum(row_area[::-1])[::-1], rtol=1e-12)


def test_diagonal_plane_upstream_counts():
    # Source: D8 definition (docs/references.md §16) [derived here]: on z = r + c the
    # north-west neighbour drops 2 over h*sqrt(2) (1.41/h), steeper than the side
    # neighbours (1/h); each inner cell drains diagonally and collects the cells of its
    # diagonal further south-east: min(rows - r, cols - c).  Cells of row 0 and column 0
    # have only side neighbours below them and drain along the border to the one
    # outlet, cell (0, 0), which collects everything.
    rows, cols = 8, 11
    r, c = np.mgrid[0:rows, 0:cols]
    z = (r + c).astype(np.float64)
    routing = flow_directions(z, Affine(1, 0, 0, 0, -1, 0))
    counts = upstream_area_m2(routing, 1.0)
    np.testing.assert_array_equal(counts[1:, 1:], np.minimum(rows - r, cols - c)[1:, 1:])
    assert counts[0, 0] == rows * cols


def test_square_funnel_upstream_counts():
    # Source: D8 definition (docs/references.md §16) [derived here]: on z = max(|dr|, |dc|)
    # with the centre as outlet, a face cell at ring k drains straight inwards and
    # collects the R - k + 1 cells of its line out to the rim; a corner-diagonal cell at
    # ring k drains diagonally and collects the (R - k + 1)^2 square beyond it.
    radius = 6
    z = funnel(radius)
    counts = upstream_area_m2(flow_directions(z), 1.0)
    for k in range(1, radius + 1):
        assert counts[radius - k, radius + k] == (radius - k + 1) ** 2  # NE diagonal
        assert counts[radius + k, radius - k] == (radius - k + 1) ** 2  # SW diagonal
        assert counts[radius - k, radius] == radius - k + 1  # north face, centre line
        if k > 1:
            assert counts[radius + 1, radius + k] == radius - k + 1  # east face, off-centre line
    # every valid cell reaches the ring around the outlet: total = (2R+1)^2 - 1
    ring = np.zeros(z.shape, dtype=bool)
    ring[radius - 1 : radius + 2, radius - 1 : radius + 2] = True
    ring[radius, radius] = False
    assert counts[ring].sum() == (2 * radius + 1) ** 2 - 1


def test_real_dem_routing_invariants_and_hand_walk():
    # Data: matplotlib sample DEM jacksboro_fault_dem.npz (3 arc-second, geographic).
    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = dem["elevation"][:160, :200].astype(np.float64)
    step = float(dem["dx"])
    top = max(float(dem["ymin"]), float(dem["ymax"]))
    transform = Affine(step, 0, float(dem["xmin"]), 0, -step, top)
    routing = flow_directions(z, transform, latlon=True)

    # Source: Priority-Flood (Barnes et al. 2014, docs/references.md §16) gives the unique
    # lowest depression-free surface; compared with an independent fixed-point fill.
    np.testing.assert_array_equal(routing.conditioned_m, filled_by_fixed_point(z))
    assert (routing.fill_depth_m > 0).sum() > 0  # this window has closed depressions to fill

    # Source: D8 definition (docs/references.md §16): every cell drains to a neighbour that is
    # not higher on the conditioned surface, paths end at outlets on the edge, and the
    # network has no loops (every cell is in pyflwdir's down-to-upstream sequence).
    target = d8_targets(routing)
    zc = routing.conditioned_m.ravel()
    assert np.all(zc[target] <= zc)
    pits = np.flatnonzero(target == np.arange(target.size))
    pr, pc = np.divmod(pits, z.shape[1])
    assert np.all((pr == 0) | (pr == z.shape[0] - 1) | (pc == 0) | (pc == z.shape[1] - 1))
    assert routing.flw.idxs_seq.size == z.size

    # mass balance: the upstream areas at the outlets add up to the whole area
    # (cell areas from the ellipsoid band formula, docs/references.md §12)
    lat_top = top - step * np.arange(z.shape[0])
    row_area = geodesy.band_area_m2(lat_top, lat_top - step, step)
    area = upstream_area_m2(routing, row_area)
    # areas are summed in whole units of AREA_UNIT_M2: each cell's area is rounded by at most half a unit
    from landcheck.terrain.tiled_routing import AREA_UNIT_M2

    assert abs(area.ravel()[pits].sum() - row_area.sum() * z.shape[1]) <= z.size * AREA_UNIT_M2 / 2

    # Source: docs/references.md §9 steps 3-4: walk the D8 path cell by cell to the first
    # drainage cell (a plain loop, independent of the kernel's pointer jumping).
    streams = stream_mask(area, 0.5e6)
    hand = hand_m(routing.conditioned_m, routing, streams)
    rng = np.random.default_rng(7)
    for idx in rng.choice(z.size, 300, replace=False):
        cur = idx
        while not streams.ravel()[cur] and target[cur] != cur:
            cur = target[cur]
        if streams.ravel()[cur]:
            assert hand.ravel()[idx] == pytest.approx(zc[idx] - zc[cur], abs=1e-3)
        else:
            assert np.isnan(hand.ravel()[idx])
    finite = hand[np.isfinite(hand)]
    assert finite.min() >= 0  # never negative on the conditioned surface (docs/references.md §9)

    # vector network: each segment runs over stream cells and, unless it ends at an
    # outlet, ends on the first cell of the segment it joins (common practice for
    # confluence-split stream lines)
    lines = streams_to_lines(routing, streams, "EPSG:4326", upstream_area_m2=area)
    assert len(lines) > 3
    starts = {tuple(np.round(g.coords[0], 9)) for g in lines.geometry}
    for geom, at_outlet in zip(lines.geometry, lines["ends_at_outlet"]):
        if not at_outlet:
            assert tuple(np.round(geom.coords[-1], 9)) in starts
    assert lines["n_cells"].sum() <= streams.sum()
    assert (lines["upstream_area_m2"] >= 0.5e6).all()


# --------------------------------------------------------------------------- sea and inundation


def test_enclosed_depression_stays_dry_until_channel_is_cut():
    # Source: docs/references.md §10 (Poulter & Halpin 2008; test [D]): flooded = at or below
    # the water level AND connected to the sea; a closed low basin behind a dike above
    # the level floods in neither connectivity.
    z = np.full((9, 9), 5.0)
    z[:, 0] = -2.0  # sea along the west edge
    z[2:7, 3:8] = 3.0  # dike, above the +1 m level
    z[3:6, 4:7] = -1.0  # basin below sea level behind it
    sea = sea_mask(z)
    assert sea.sum() == 9 and sea[:, 0].all()
    for conn in (8, 4):
        (water,) = inundation_masks(z, sea, [1.0], connectivity=conn)
        assert not water[3:6, 4:7].any()
    # cut a channel at 0 m from the sea through the dike into the basin: now it floods
    cut = z.copy()
    cut[4, 1:5] = 0.0
    (water,) = inundation_masks(cut, sea_mask(cut), [1.0])
    assert water[3:6, 4:7].all()
    assert water[4, 1:4].all()
    assert not water[2, 3:8].any()  # the dike crest stays dry


def test_corner_contact_floods_only_with_8_connectivity():
    # Source: docs/references.md §10 test [D]: a low cell touching the sea only at a corner
    # floods under 8-connectivity but not under 4-connectivity.
    z = np.full((5, 5), 4.0)
    z[0:2, 0] = -1.0  # sea: two cells on the west edge
    z[2, 1] = 0.5  # low cell touching the sea cell (1, 0) only at a corner
    sea = sea_mask(z)
    (water8,) = inundation_masks(z, sea, [1.0], connectivity=8)
    (water4,) = inundation_masks(z, sea, [1.0], connectivity=4)
    assert sea.sum() == 2
    assert water8[2, 1] and not water4[2, 1]
    assert water8.sum() == 3 and water4.sum() == 2


def test_plain_threshold_floods_more_than_connected_bathtub():
    # Source: docs/references.md §10 (Poulter & Halpin 2008): thresholding without
    # connectivity floods the most; connectivity can only remove cells.
    z = np.full((6, 6), 3.0)
    z[:, 0] = -1.0
    z[3, 3] = 0.5  # isolated low cell
    sea = sea_mask(z)
    (water,) = inundation_masks(z, sea, [1.0])
    plain = z <= 1.0
    assert not water[3, 3] and plain[3, 3]
    assert np.all(water <= plain)


def _independent_sea(z, datum):
    lab, _ = ndimage.label(z <= datum, structure=EIGHT)
    edge = np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]])
    keep = np.setdiff1d(np.unique(edge), [0])
    return np.isin(lab, keep)


def _independent_flood(z, sea, level):
    lab, _ = ndimage.label((z <= level) | sea, structure=EIGHT)
    keep = np.setdiff1d(np.unique(lab[sea]), [0])
    return np.isin(lab, keep)


def test_topobathy_sea_and_inundation_match_labelling():
    # Data: matplotlib sample topo-bathymetric grid topobathy.npz (heights and depths
    # in metres).  Reference: connected-component labelling with scipy.ndimage.label
    # (8-connectivity), a different algorithm from the kernel's propagation.
    z = cbook.get_sample_data("topobathy.npz")["topo"].astype(np.float64)
    sea = sea_mask(z, 0.0)
    np.testing.assert_array_equal(sea, _independent_sea(z, 0.0))
    assert 4000 < sea.sum() < z.size  # real sea and real land in the grid

    rises = [1.0, 2.0, 5.0]
    masks = inundation_masks(z, sea, rises)
    previous = sea
    for rise, water in zip(rises, masks):
        np.testing.assert_array_equal(water, _independent_flood(z, sea, rise))
        # Source: docs/references.md §10: a higher level never floods less (nested masks)
        assert np.all(previous <= water)
        # every flooded part is connected to the sea
        lab, n = ndimage.label(water, structure=EIGHT)
        assert set(np.unique(lab[sea])) - {0} == set(range(1, n + 1))
        # and connectivity matters here: some land at or below the level is cut off
        assert water.sum() < ((z <= rise) | sea).sum()
        previous = water


def test_surge_adds_to_every_level():
    # Source: definition of the scenario level, datum + rise + surge [common practice]
    z = cbook.get_sample_data("topobathy.npz")["topo"].astype(np.float64)
    sea = sea_mask(z, 0.0)
    (with_surge,) = inundation_masks(z, sea, [1.0], surge_m=1.5)
    (same_level,) = inundation_masks(z, sea, [2.5])
    np.testing.assert_array_equal(with_surge, same_level)


def test_seed_cells_select_the_sea():
    # Source: docs/references.md §10 (connectivity to the sea) [worked by hand]: two basins
    # below the datum; seeding one selects it alone, whatever touches the edge.
    z = np.full((5, 7), 2.0)
    z[1:4, 1:3] = -1.0
    z[1:4, 4:6] = -2.0
    assert not sea_mask(z).any()  # neither reaches the raster edge
    sea = sea_mask(z, seed_cells=[(2, 5)])
    assert sea[1:4, 4:6].all() and sea.sum() == 6
    nan = np.where(np.arange(7)[None, :] == 0, np.nan, z)
    assert not sea_mask(nan).any()
    assert sea_mask(nan, nodata_is_sea=True)[:, 0].all()


# --------------------------------------------------------------------------- vector outputs


def test_mask_polygons_area_and_parts():
    # Source: hand-worked geometry [common practice]: a mask of n cells of 20 m x 25 m
    # covers n * 500 m2; two blocks touching only at a corner are two polygons.
    mask = np.zeros((6, 8), dtype=bool)
    mask[0:2, 0:3] = True  # 6 cells
    mask[2:5, 3:5] = True  # 6 cells, corner contact with the first block
    mask[3, 4] = False  # a notch
    t = Affine(20.0, 0, 1000.0, 0, -25.0, 5000.0)
    gdf = mask_to_polygons(mask, t, CRS)
    assert len(gdf) == 2
    assert sorted(gdf["n_cells"]) == [5, 6]
    assert gdf.geometry.area.sum() == pytest.approx(11 * 500.0, rel=1e-12)
    assert gdf.crs.to_epsg() == 32651
    union = shapely.union_all(gdf.geometry.values)
    assert union.bounds == (1000.0, 5000.0 - 5 * 25.0, 1000.0 + 5 * 20.0, 5000.0)
    assert len(mask_to_polygons(np.zeros((3, 3), dtype=bool), t, CRS)) == 0


def test_shoreline_leaves_out_raster_edge():
    # Source: hand-worked geometry [common practice]: sea in the 3 western columns of a
    # 5 x 6 raster with 10 m cells -> one straight shoreline at x0 + 30 m, 50 m long.
    mask = np.zeros((5, 6), dtype=bool)
    mask[:, :3] = True
    t = Affine(10.0, 0, 200.0, 0, -10.0, 800.0)
    lines = mask_boundary_lines(mask, t, CRS)
    assert len(lines) == 1
    line = lines.geometry.iloc[0]
    assert line.length == pytest.approx(50.0)
    xs = {round(x, 9) for x, _ in line.coords}
    assert xs == {230.0}
    # an island (one land cell inside the sea) adds a closed 40 m ring
    mask2 = np.ones((5, 6), dtype=bool)
    mask2[2, 2] = False
    lines2 = mask_boundary_lines(mask2, t, CRS)
    assert len(lines2) == 1 and lines2.geometry.iloc[0].length == pytest.approx(40.0)
    assert lines2.geometry.iloc[0].is_ring


def test_streams_to_lines_on_v_valley():
    # Source: V-valley of docs/references.md §9: the channel is one straight segment down
    # the valley axis, (rows - 1) * h long, whose outlet collects the whole raster.
    s, g, h, w, rows = 0.2, 0.01, 10.0, 4, 11
    z, x, _ = v_valley(s, g, h, w, rows)
    t = Affine(h, 0, 0, 0, -h, 0)
    routing = flow_directions(z, t)
    area = upstream_area_m2(routing, h * h)
    lines = streams_to_lines(routing, stream_mask(area, (w + 1) * h * h), CRS, upstream_area_m2=area)
    assert len(lines) == 1
    row = lines.iloc[0]
    assert row.geometry.length == pytest.approx((rows - 1) * h)
    assert bool(row["ends_at_outlet"]) and row["n_cells"] == rows
    assert row["upstream_area_m2"] == pytest.approx(z.size * h * h)
    assert row.geometry.coords[-1] == pytest.approx((w * h + h / 2, -h / 2))  # outlet cell centre
    assert row["strahler_order"] == 1


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    "rises, scenario",
    [
        ([1.0, 0.5], "scenario 2"),
        ([0.5, 1.0, 1.0], "scenario 3"),
        ([-0.2, 1.0], "scenario 1"),
        ([0.5, np.nan], "scenario 2"),
    ],
)
def test_bad_scenario_lists_are_refused(rises, scenario):
    z = np.array([[-1.0, 0.0, 2.0]])
    sea = np.array([[True, False, False]])
    with pytest.raises(InputDataError, match=scenario) as info:
        inundation_masks(z, sea, rises)
    assert isinstance(info.value, LandcheckError) and isinstance(info.value, ValueError)
    with pytest.raises(InputDataError, match="empty"):
        inundation_masks(z, sea, [])


def test_seed_outside_raster_names_the_point():
    z = np.zeros((4, 5)) - 1.0
    with pytest.raises(
        InputDataError, match=r"seed point 2 at \(row 4, col 1\) lies outside the DEM \(4 rows x 5 cols\)"
    ):
        sea_mask(z, seed_cells=[(0, 0), (4, 1)])
    with pytest.raises(InputDataError, match=r"seed point 1 at \(row -1, col 0\)"):
        sea_mask(z, seed_cells=[(-1, 0)])
    land = np.full((4, 5), 3.0)
    with pytest.raises(InputDataError, match="not at or below the datum"):
        sea_mask(land, seed_cells=[(1, 1)])


def test_all_nan_input_is_refused():
    z = np.full((4, 4), np.nan)
    with pytest.raises(InputDataError, match="every cell .* is nodata"):
        sea_mask(z)
    with pytest.raises(InputDataError, match="every cell .* is nodata"):
        inundation_masks(z, np.zeros((4, 4), dtype=bool), [1.0])
    with pytest.raises(InputDataError, match="every cell .* is nodata"):
        flow_directions(z)
    with pytest.raises(InputDataError, match="shape"):
        inundation_masks(np.zeros((4, 4)), np.zeros((3, 4), dtype=bool), [1.0])
    with pytest.raises(InputDataError, match="infinite"):
        sea_mask(np.array([[0.0, np.inf]]))


def test_kernels_do_not_modify_inputs():
    # common practice: kernels never mutate their inputs
    z, _, _ = v_valley(n_rows=6, half_width=3)
    z[0, 0] = np.nan
    before = z.copy()
    outlet = np.zeros(z.shape, dtype=bool)
    outlet[0, 1] = True
    routing = flow_directions(z, outlet_mask=outlet)
    sea = sea_mask(z, 55.0)
    sea_before = sea.copy()
    inundation_masks(z, sea, [0.5, 1.0])
    hand_m(z, routing, np.zeros(z.shape, dtype=bool))
    np.testing.assert_array_equal(z, before)
    np.testing.assert_array_equal(sea, sea_before)
    assert outlet.sum() == 1 and not routing.valid[0, 1]


def test_compiled_steepest_d8_equals_numpy_reference():
    # the compiled D8 step adds nothing to the method: where a lower neighbour exists, the same codes as the
    # NumPy formulation (O'Callaghan & Mark 1984 steepest descent, docs/references.md "Hydrology and hazards"),
    # ties and NaN neighbours included
    from landcheck.terrain import tiled_routing as tr
    from landcheck.terrain import tiled_routing_loops as loops
    from landcheck.terrain.hydrology import _steepest_d8_numpy

    rng = np.random.default_rng(11)
    z = np.round(rng.random((83, 61)) * 4, 1).astype(np.float32)  # rounded: many equal descents, ties matter
    z[rng.random(z.shape) < 0.05] = np.nan
    hx = rng.uniform(5, 10, 83)
    hy = rng.uniform(5, 10, 83)
    zh = np.pad(z, 1, constant_values=np.nan)
    dist, _ = loops.flat_distances(zh, np.full(zh.shape, loops.FAR, np.int32), tr.DRS, tr.DCS)
    pad = np.r_[hx[:1], hx, hx[-1:]], np.r_[hy[:1], hy, hy[-1:]]
    code, _ = loops.d8_codes(zh, dist, pad[0], pad[1], tr.DRS, tr.DCS, tr.CODES)
    code_ref, lower_ref = _steepest_d8_numpy(z.astype(np.float64), hx, hy)
    assert code[lower_ref].tolist() == code_ref[lower_ref].tolist()
    assert lower_ref.sum() > 0.5 * z.size and (~lower_ref).sum() > 50
