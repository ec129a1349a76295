"""Vectorised ellipsoidal areas against pyproj.Geod (Karney 2013) and a closed-form spherical zone."""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
import shapely
from shapely import affinity

from landcheck.geo.ground_area import SMALL_EXTENT_M, ground_areas, polygon_areas_m2

X0, Y0 = 400000.0, 1600000.0


def _geod_area(geom, crs, step):
    """Reference: pyproj.Geod.geometry_area_perimeter on the polygon densified in its own CRS.

    pyproj adds the signed areas of the rings, so rings are oriented first (exterior counter-clockwise,
    holes clockwise) as its documentation asks.
    """
    geom = (
        shapely.geometry.polygon.orient(geom, 1.0)
        if geom.geom_type == "Polygon"
        else shapely.MultiPolygon([shapely.geometry.polygon.orient(p, 1.0) for p in geom.geoms])
    )
    crs = pyproj.CRS.from_user_input(crs)
    tr = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    ll = shapely.transform(shapely.segmentize(geom, step), lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
    e = crs.ellipsoid
    return abs(pyproj.Geod(a=e.semi_major_metre, rf=e.inverse_flattening).geometry_area_perimeter(ll)[0])


def _shapes(unit=1.0):
    rng = np.random.default_rng(4)
    out = []
    for _ in range(25):  # parcels of 0.1-13 ha, rotated
        w, h = rng.uniform(30, 400, 2)
        x, y = X0 + rng.uniform(0, 50000), Y0 + rng.uniform(0, 50000)
        out.append(affinity.rotate(shapely.box(x, y, x + w, y + h), rng.uniform(0, 90), origin="centroid"))
    # shell and hole wound the same way (no OGC winding): the hole must still be subtracted
    big = shapely.Polygon(
        shell=[(X0, Y0), (X0 + 9000, Y0 + 500), (X0 + 8000, Y0 + 7000), (X0 - 500, Y0 + 6000)],
        holes=[[(X0 + 2000, Y0 + 2000), (X0 + 3000, Y0 + 2000), (X0 + 3000, Y0 + 3000), (X0 + 2000, Y0 + 3000)]],
    )
    multi = shapely.MultiPolygon(
        [shapely.box(X0 + 100, Y0 + 100, X0 + 300, Y0 + 250), shapely.box(X0 + 5000, Y0 + 100, X0 + 7600, Y0 + 2600)]
    )  # one part > 2 km
    out += [big, multi, shapely.Polygon(), None]
    return [affinity.scale(g, 1 / unit, 1 / unit, origin=(0, 0)) if g is not None else None for g in out]


def test_projected_areas_match_pyproj_geod():
    # Reference: pyproj.Geod (Karney 2013), edges densified to 5 m in the layer's CRS (straight map edges).
    geoms = _shapes()
    area, factor = ground_areas(np.array(geoms, dtype=object), "EPSG:32651")
    for g, got in zip(geoms, area):
        if g is None or g.is_empty:
            assert got == 0.0
            continue
        assert got == pytest.approx(_geod_area(g, "EPSG:32651", 5.0), rel=2e-7)
    # the factor is 1 / areal scale of UTM (k0 = 0.9996 on the central meridian; common practice)
    assert np.all((factor[:27] > 1 / 1.0012) & (factor[:27] < 1 / 0.9992**1.0))
    assert max(g.bounds[2] - g.bounds[0] for g in geoms[:25]) < SMALL_EXTENT_M  # both routes are exercised
    assert geoms[25].bounds[2] - geoms[25].bounds[0] > SMALL_EXTENT_M


def test_foot_crs_areas_are_in_square_metres():
    # Reference: pyproj.Geod on the same ground polygons; a CRS in international feet (0.3048 m, exact by
    # definition; common practice) must give the same m2 as its metre twin.
    ft = "+proj=tmerc +lat_0=0 +lon_0=123 +k=0.9996 +x_0=500000 +y_0=0 +ellps=WGS84 +units=ft +no_defs"
    geoms = [g for g in _shapes(unit=0.3048) if g is not None and not g.is_empty]
    area, _ = ground_areas(np.array(geoms, dtype=object), pyproj.CRS(ft).to_wkt())
    for g, got in zip(geoms, area):
        assert got == pytest.approx(_geod_area(g, ft, 5.0 / 0.3048), rel=2e-7)


def test_geographic_areas_match_pyproj_geod():
    # Reference: pyproj.Geod on lon/lat polygons densified to 2e-5 degrees.
    rng = np.random.default_rng(8)
    geoms = [
        affinity.rotate(shapely.box(lon, lat, lon + d, lat + d * 0.7), rng.uniform(0, 90))
        for lon, lat, d in zip(rng.uniform(-179, 179, 12), rng.uniform(-70, 70, 12), rng.uniform(1e-3, 0.5, 12))
    ]
    area, factor = ground_areas(np.array(geoms, dtype=object), "EPSG:4326")
    geod = pyproj.Geod(ellps="WGS84")
    for g, got in zip(geoms, area):
        ref = abs(geod.geometry_area_perimeter(shapely.segmentize(g, 2e-5))[0])
        assert got == pytest.approx(ref, rel=1e-6)
    assert (factor == 1.0).all()


def test_spherical_zone_closed_form():
    # Source: closed form — on a sphere of radius R the band between latitudes p1 and p2 spanning dl radians
    # of longitude has area R^2 dl (sin p2 - sin p1) (Archimedes' hat-box theorem).
    r = 6_371_000.0
    lon = np.array([10.0, 12.0, 12.0, 10.0, 10.0])
    lat = np.array([40.0, 40.0, 41.0, 41.0, 40.0])
    got = polygon_areas_m2(lon, lat, np.zeros(5, np.int64), 1, r, 0.0)[0]
    want = r * r * np.radians(2.0) * (np.sin(np.radians(41.0)) - np.sin(np.radians(40.0)))
    assert got == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("lat0,want_m2", [(0.0, 12_308_463_893.975), (45.0, 8_686_494_956.670)])
def test_degree_box_is_the_parallel_bounded_band(lat0, want_m2):
    # Source: docs/references.md §13 (parallel-bounded cell areas on WGS 84, closed form of Snyder 1987):
    # a 1 x 1 degree lon/lat box whose edges run along parallels and meridians has exactly the band area.
    box = shapely.box(120.0, lat0, 121.0, lat0 + 1.0)
    area, _ = ground_areas(np.array([box], dtype=object), "EPSG:4326")
    assert area[0] == pytest.approx(want_m2, rel=1e-9)
