"""Geometry helpers every stage shares: the polygonal part of a geometry and the outline of a cell mask.

>>> import shapely
>>> polygonal_part(shapely.GeometryCollection([shapely.box(0, 0, 1, 1), shapely.LineString([(0, 0), (2, 2)])])).area
1.0
>>> polygonal_part(shapely.LineString([(0, 0), (1, 1)])).is_empty
True
>>> import numpy as np
>>> [p.area for p in mask_parts(np.array([[True, True], [False, True]]))]
[3.0]
"""

from __future__ import annotations

import numpy as np

__all__ = ["polygonal_part", "mask_parts", "mask_union"]


def polygonal_part(geom):
    """The polygonal part of ``geom`` (``make_valid``, intersections and differences may add lines or points).

    A Polygon or MultiPolygon comes back unchanged; a collection gives the union of its polygonal parts;
    None, an empty geometry or one with no polygonal part gives an empty Polygon.
    """
    import shapely

    if geom is None or geom.is_empty:
        return shapely.Polygon()
    if geom.geom_type in ("Polygon", "MultiPolygon"):
        return geom
    parts = [p for p in shapely.get_parts(geom) if p.geom_type in ("Polygon", "MultiPolygon") and not p.is_empty]
    return shapely.union_all(parts) if parts else shapely.Polygon()


def mask_parts(mask: np.ndarray, transform=None) -> list:
    """Polygons of the side-connected (4-connected) parts of the True cells of ``mask``.

    Vertices lie on cell corners: exact integers in pixel coordinates when ``transform`` is None, else
    mapped by the pixel-to-CRS ``transform`` (affine.Affine).  Holes are kept; parts touching only at a
    corner are separate polygons.
    """
    import rasterio.features
    import shapely
    from affine import Affine

    m = np.asarray(mask, dtype=bool)
    if not m.any():
        return []
    shapes = rasterio.features.shapes(
        m.astype(np.uint8), mask=m, connectivity=4, transform=Affine.identity() if transform is None else transform
    )
    return [shapely.geometry.shape(g) for g, _ in shapes]


def mask_union(mask: np.ndarray, transform) -> object:
    """The True cells of ``mask`` as one (Multi)Polygon in the CRS of ``transform``; empty Polygon when none."""
    import shapely

    parts = mask_parts(mask, transform)
    return shapely.union_all(parts) if parts else shapely.Polygon()
