"""Cell sizes and areas on the ellipsoid; window and halo arithmetic; tiled == untiled."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from landcheck.geo import geodesy
from landcheck.geo.grid import GridSpec, Window, grow_window, iter_windows

WGS84_WKT = "EPSG:4326"


@pytest.mark.parametrize(
    "lat, m_per_deg_lat, m_per_deg_lon",
    [
        # Source: docs/references.md §13 [C] (GeographicLib 2.1 closed form), asserted to 1e-3 m.
        (0.0, 110_574.276, 111_319.491),
        (15.0, 110_648.696, 107_550.489),
        (45.0, 111_131.777, 78_846.835),
        (60.0, 111_412.288, 55_800.002),
        (75.0, 111_618.384, 28_902.006),
    ],
)
def test_metres_per_degree(lat, m_per_deg_lat, m_per_deg_lon):
    assert geodesy.metres_per_degree_lat(lat) == pytest.approx(m_per_deg_lat, abs=1e-3)
    assert geodesy.metres_per_degree_lon(lat) == pytest.approx(m_per_deg_lon, abs=1e-3)


@pytest.mark.parametrize(
    "lat1, lat2, dlon, area",
    [
        # Source: docs/references.md §13 [C] parallel-bounded cell areas, relative 1e-9.
        (0.0, 1.0, 1.0, 12_308_463_893.975),
        (10.0, 11.0, 1.0, 12_108_188_648.308),
        (45.0, 46.0, 1.0, 8_686_494_956.670),
        (89.0, 90.0, 1.0, 108_866_681.636),
        (0.0, 0.5, 0.5, 3_077_230_007.913),
        (45.0, 45.0 + 1 / 3600, 1 / 3600, 676.10864),
    ],
)
def test_band_area(lat1, lat2, dlon, area):
    assert geodesy.band_area_m2(lat1, lat2, dlon) == pytest.approx(area, rel=1e-8)


def test_whole_ellipsoid_area():
    # Source: docs/references.md §12 [C]: 510,065,621,724,088 m^2.
    assert 2 * geodesy.band_area_m2(0.0, 90.0, 360.0) == pytest.approx(510_065_621_724_088, rel=1e-12)


def test_geographic_grid_cell_size_and_area_against_pyproj():
    # Reference: pyproj.Geod (Karney 2013 geodesics) for the 1 arc-second cell at 14 N.
    import pyproj

    geod = pyproj.Geod(ellps="WGS84")
    d = 1 / 3600
    g = GridSpec(Affine(d, 0, 120.0, 0, -d, 14.0 + 50 * d), WGS84_WKT, 100, 100, True)
    row = 50  # spans 14.0 - d .. 14.0
    hx, hy = g.cell_size_m(np.array([row]))
    lat_c = float(g.row_centre_lat(np.array([row]))[0])
    _, _, dist_x = geod.inv(120.0, lat_c, 120.0 + d, lat_c)
    _, _, dist_y = geod.inv(120.0, lat_c - d / 2, 120.0, lat_c + d / 2)
    assert hx[0] == pytest.approx(dist_x, rel=1e-6)
    assert hy[0] == pytest.approx(dist_y, rel=1e-6)
    # Source: docs/references.md §13 [C]: 1"x1" at 14 N (14 .. 14+1") = 922.28374 m^2; row 49 spans exactly that band
    area = g.cell_area_m2(np.array([row - 1]))[0]
    assert area == pytest.approx(922.28374, rel=1e-6)


def test_projected_grid_in_feet():
    # Common practice: the international foot is 0.3048 m exactly.
    g = GridSpec(Affine(30, 0, 0, 0, -30, 0), "EPSG:2227", 5, 5, False, unit_m=0.3048006096)
    hx, hy = g.cell_size_m(np.arange(3))
    np.testing.assert_allclose(hx, 30 * 0.3048006096)
    np.testing.assert_allclose(g.cell_area_m2(np.arange(2)), (30 * 0.3048006096) ** 2)


@settings(max_examples=200, deadline=None)
@given(h=st.integers(1, 60), w=st.integers(1, 60), tr=st.integers(1, 17), tc=st.integers(1, 17), halo=st.integers(0, 3))
def test_windows_tile_raster_exactly_once(h, w, tr, tc, halo):
    # Invariant (common practice): windows cover every cell exactly once; grown windows pad back to full size.
    count = np.zeros((h, w), int)
    for win in iter_windows(h, w, tr, tc):
        count[win.rows, win.cols] += 1
        inner, pad = grow_window(win, halo, h, w)
        assert inner.height + pad[0][0] + pad[0][1] == win.height + 2 * halo
        assert inner.width + pad[1][0] + pad[1][1] == win.width + 2 * halo
        assert 0 <= inner.row_off and inner.row_off + inner.height <= h
    assert (count == 1).all()


@pytest.mark.parametrize("method", ["horn", "zevenbergen-thorne"])
def test_tiled_slope_equals_untiled(tmp_path, raster_writer, method):
    # Invariant (common practice): tile sizes that do not divide the raster (7x5 tiles on 23x31) give
    # bit-identical results to one whole-array pass, nodata included.
    import rasterio

    from landcheck.core.slope_raster import derive_slope
    from landcheck.terrain.slope import slope_gradient

    rng = np.random.default_rng(11)
    z = (rng.normal(0, 2, (23, 31)).cumsum(0).cumsum(1) + 100).astype("float32")
    z[10, 12] = -9999.0
    z[0, 5] = np.nan
    dem = raster_writer(z)
    whole = np.pad(np.where(z == -9999.0, np.nan, z).astype(np.float64), 1, constant_values=np.nan)
    ref = slope_gradient(whole, np.full(23, 10.0), np.full(23, 10.0), method, backend="numpy") * np.float32(100)
    for tiles, workers in ((7, 1), (5, 2), (64, 2)):
        out = tmp_path / f"s_{tiles}_{workers}.tif"
        derive_slope(dem, out, method=method, tile_cells=tiles, workers=workers)
        with rasterio.open(out) as ds:
            got = ds.read(1)
        np.testing.assert_array_equal(got, ref.astype(np.float32))


def test_window_tiles_rectangular():
    wins = list(iter_windows(23, 31, 7, 5))
    assert wins[0] == Window(0, 0, 7, 5)
    assert wins[-1] == Window(21, 30, 2, 1)
    assert len(wins) == 4 * 7
