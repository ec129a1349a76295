"""Ellipsoidal parcel areas for many polygons at once (vectorised; no per-polygon Python loop).

:func:`ground_areas` gives each parcel's area on the CRS's ellipsoid and the map-plane-to-ground
area factor at its centroid, computed in a handful of NumPy passes over all vertices (about twenty
times faster for 100 000 parcels than a per-polygon ``pyproj.Geod`` loop, docs/scale.md).

Method (derived here from the authalic-latitude area formula)
-------------------------------------------------------------
On an ellipsoid with semi-major axis ``a`` and eccentricity ``e`` the area
between the equator and the parallel of latitude ``phi``, per radian of
longitude, is

    F(phi) = a^2 (1 - e^2) / 2 * ( sin(phi) / (1 - e^2 sin^2(phi)) + atanh(e sin(phi)) / e )

(on a sphere, ``e -> 0``, this is ``a^2 sin(phi)``).  ``(lambda, F)`` are the
coordinates of an equal-area cylindrical map (the cylindrical equal-area
projection on the authalic latitude), so the ellipsoidal area of a ring whose
edges are straight in that map is the shoelace sum

    A = | sum_i (lambda_{i+1} - lambda_i) (F_i + F_{i+1}) / 2 |.

Edges are first densified (``DENSIFY_M`` / ``DENSIFY_DEG``), so each piece is at most 20 m long; over such a piece
a straight line of the layer's CRS, a geodesic and a straight line of the
equal-area map part by micrometres, and the areas agree with
``pyproj.Geod.geometry_area_perimeter`` (Karney 2013) to about 1e-9 relative
(tests check against it).  Holes are subtracted; multipolygons add their parts.

Small polygons of a projected layer (at most ``SMALL_EXTENT_M`` = 2 km across)
skip the densification: their area is the map-plane area times the inverse
areal scale factor at the centroid, i.e. the integral of ``1 / m(x, y)`` over the
polygon with ``1 / m`` taken at the centroid.  The first-order term of ``1 / m``
integrates to zero about the centroid, so the relative error is second order,
about ``(L / R)^2`` with ``L`` the polygon's size and ``R`` the Earth's radius:
below 1e-7 at 2 km, far below the 1e-6 the audit promises, and the very
factor that turns covered cells into ground area, so a parcel fully on the DEM
gets ``covered_m2 == area_m2`` to rounding.  Geographic layers and larger
polygons take the densified route.
"""

from __future__ import annotations

import numpy as np

from landcheck.geo.geodesy import authalic_area_per_radian_m2

__all__ = ["ground_areas", "polygon_areas_m2"]

#: longest edge piece when densifying parcel edges before the area (metres / degrees)
DENSIFY_M = 20.0
DENSIFY_DEG = 2e-4
#: polygons of a projected layer at most this wide (m) take map-plane area x centroid factor
SMALL_EXTENT_M = 2000.0


def polygon_areas_m2(
    lon_deg: np.ndarray, lat_deg: np.ndarray, ring_of_vertex: np.ndarray, n_rings: int, a_m: float, e2: float
) -> np.ndarray:
    """Absolute ellipsoidal area (m^2) of each closed ring given by its vertices in degrees.

    Parameters
    ----------
    lon_deg, lat_deg : ndarray
        Vertices of all rings, ring after ring; each ring closed (last vertex = first).
    ring_of_vertex : ndarray of int
        Ring number of each vertex (non-decreasing).
    n_rings : int
    a_m, e2 : float
        Semi-major axis (m) and first eccentricity squared of the ellipsoid.

    Returns
    -------
    ndarray (n_rings,)
        Area of each ring in m^2, edges taken as straight lines of the equal-area cylindrical map.
    """
    lam = np.radians(lon_deg)
    f = authalic_area_per_radian_m2(np.radians(lat_deg), a_m, e2)
    same = ring_of_vertex[1:] == ring_of_vertex[:-1]
    dlam = lam[1:] - lam[:-1]
    dlam = (dlam + np.pi) % (2.0 * np.pi) - np.pi  # shortest way round: rings may cross the antimeridian
    # F relative to each ring's first vertex: the closed sum is unchanged and far less cancellation
    first = np.searchsorted(ring_of_vertex, np.arange(n_rings))
    f0 = f[np.minimum(first, len(f) - 1)][ring_of_vertex] if len(f) else f
    fr = f - f0
    terms = np.where(same, dlam * (fr[1:] + fr[:-1]) * 0.5, 0.0)
    ring_sum = np.bincount(ring_of_vertex[1:], weights=terms, minlength=n_rings)
    return np.abs(ring_sum)


def ground_areas(geoms, crs_wkt: str) -> tuple[np.ndarray, np.ndarray]:
    """Ellipsoidal area of each geometry and the map-plane to ground area factor at its centroid.

    Parameters
    ----------
    geoms : GeoDataFrame, GeoSeries or array of shapely geometries
        Polygons / MultiPolygons in ``crs_wkt``; None, empty and non-areal geometries get area 0.
    crs_wkt : str
        Their CRS (projected in metres or feet, or geographic in degrees).

    Returns
    -------
    area_m2 : ndarray
        Area on the CRS's ellipsoid (m^2).
    area_factor : ndarray
        1 / areal scale factor of the projection at each geometry's centroid (1 on geographic
        CRSs): map-plane areas times the factor are ground areas.
    """
    import pyproj
    import shapely

    if hasattr(geoms, "geometry"):
        geoms = geoms.geometry
    vals = np.asarray(getattr(geoms, "values", geoms), dtype=object).reshape(-1)
    n = len(vals)
    crs = pyproj.CRS.from_user_input(crs_wkt)
    geodetic = crs.geodetic_crs or pyproj.CRS("EPSG:4326")
    ell = crs.ellipsoid
    if ell is not None and ell.inverse_flattening:
        a_m, inv_f = ell.semi_major_metre, ell.inverse_flattening
    else:
        a_m, inv_f = 6_378_137.0, 298.257223563  # WGS 84 (from memory; the value pyproj uses for "WGS84")
    f_flat = 1.0 / inv_f if inv_f else 0.0
    e2 = f_flat * (2.0 - f_flat)

    unit_m = 1.0
    if not crs.is_geographic:
        unit_m = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
    factor = np.ones(n)
    if not crs.is_geographic:
        cent = shapely.centroid(vals)
        ok = ~shapely.is_empty(cent) & ~shapely.is_missing(cent)
        if ok.any():
            tr = pyproj.Transformer.from_crs(crs, geodetic, always_xy=True)
            lon_c, lat_c = tr.transform(shapely.get_x(cent[ok]), shapely.get_y(cent[ok]))
            scale = pyproj.Proj(crs).get_factors(lon_c, lat_c).areal_scale
            factor[ok] = 1.0 / np.asarray(scale, dtype=float)

    area = np.zeros(n)
    polygonal = np.isin(shapely.get_type_id(vals), (3, 6)) & ~shapely.is_empty(vals)
    if crs.is_geographic:
        exact = polygonal
    else:
        # small polygons: map-plane area x the factor at the centroid (second-order accurate, see below)
        b = shapely.bounds(vals)
        extent_m = np.fmax(b[:, 2] - b[:, 0], b[:, 3] - b[:, 1]) * unit_m
        small = polygonal & (extent_m <= SMALL_EXTENT_M)
        area[small] = shapely.area(vals[small]) * unit_m * unit_m * factor[small]
        exact = polygonal & ~small
    if exact.any():
        area[exact] = _densified_areas(vals[exact], crs, geodetic, unit_m, a_m, e2)
    return area, factor


def _densified_areas(vals, crs, geodetic, unit_m, a_m, e2):
    """Areas from densified rings in the equal-area cylindrical map (module docstring)."""
    import pyproj
    import shapely

    n = len(vals)
    parts, part_geom = shapely.get_parts(vals, return_index=True)
    is_poly = (shapely.get_type_id(parts) == 3) & ~shapely.is_empty(parts)
    parts, part_geom = parts[is_poly], part_geom[is_poly]
    parts = shapely.segmentize(parts, DENSIFY_DEG if crs.is_geographic else DENSIFY_M / unit_m)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    is_hole = np.zeros(len(rings), bool)
    is_hole[1:] = ring_part[1:] == ring_part[:-1]  # get_rings lists the exterior first, then the holes
    xy, ring_of_vertex = shapely.get_coordinates(rings, return_index=True)
    if crs.is_geographic:
        lon, lat = xy[:, 0], xy[:, 1]
    else:
        lon, lat = pyproj.Transformer.from_crs(crs, geodetic, always_xy=True).transform(xy[:, 0], xy[:, 1])
    ring_area = polygon_areas_m2(np.asarray(lon), np.asarray(lat), ring_of_vertex, len(rings), a_m, e2)
    signed = np.where(is_hole, -ring_area, ring_area)
    return np.bincount(part_geom[ring_part], weights=signed, minlength=n) if len(rings) else np.zeros(n)
