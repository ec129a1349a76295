"""Exact cell coverage of polygons on a north-up raster grid.

For every polygon and every raster cell this module computes the *coverage
fraction*: the share of the cell's planar area (in the raster CRS) that lies
inside the polygon, a number in (0, 1].  Weighting cell values by these
fractions gives exact per-parcel area shares for straight-edged polygons, up
to floating-point rounding; the cell-centre rule does not (docs/references.md
§15: a 1.5 x 1.5-cell square counts 1 to 4 cells under it).

Method (Green's theorem, derived here)
--------------------------------------
Work in *cell units*: for a window whose top-left cell corner is at
``(c, f)`` with cell sizes ``a`` (x) and ``e`` (y, negative when north-up) the
affine map

    u = (x - c) / a,        v = (y - f) / e

sends cell ``(i, j)`` (row ``i``, column ``j``) to the unit square
``[j, j+1] x [i, i+1]``.  Areas measured in ``(u, v)`` are directly cell
fractions.  The map has Jacobian ``1 / (a e)``, so it reverses ring
orientation when ``a e < 0`` (the usual north-up case); ring orientation is
therefore measured, not assumed (see below).

For a region ``R`` with positively oriented boundary, Green's theorem with
the field ``(0, F(u))`` gives ``oint_{dR} F(u) dv = iint_R F'(u) du dv``.
Choose, for column ``j``,

    F_j(u) = clip(u, j, j + 1) - j,    so  F_j'(u) = 1 on (j, j+1), 0 elsewhere.

Then ``oint F_j dv`` over the boundary of ``R ∩ S_i`` (``S_i`` the row strip
``i <= v <= i + 1``) is the area of ``R`` in cell ``(i, j)``.  The boundary of
``R ∩ S_i`` is the part of ``dR`` inside the strip plus pieces of the strip's
horizontal edges, on which ``dv = 0``; so only polygon edges clipped to the
strip contribute.  Each clipped edge is split further at the vertical grid
lines into sub-pieces lying in one column ``j``; along a straight sub-piece
``u`` is linear in ``v``, so with end points ``(u_a, v_a)``, ``(u_b, v_b)``:

* column ``j`` itself receives ``(v_b - v_a) * ((u_a + u_b) / 2 - j)``
  (the exact integral of a linear function);
* every column ``k < j`` receives the full ``(v_b - v_a)`` (there
  ``F_k = 1``);
* columns ``k > j`` receive nothing (``F_k = 0``).

The "every column to the left" part is kept as one number per sub-piece in a
difference array and turned into per-cell values by one suffix sum per row.
Within a row, cells left of the first and right of the last sub-piece get
the sum of all the row's ``dv``, which is 0 because the clipped boundary is
closed; so only the stretch between them is read (pieces left of the window,
see below, extend that stretch to the window's first column).  The cost per
polygon is proportional to its boundary/grid-line crossings plus its covered
cells, not to its bounding box.

Orientation and holes.  The signed area ``A`` of each ring is computed with
the shoelace formula in CRS units.  An exterior ring's contributions are
multiplied by ``sign(A) * sign(a e)`` and a hole's by the opposite sign, so
any input orientation gives exterior-positive, hole-negative integrals (no
re-orientation pass is needed).  Multipolygons contribute all parts.

Windows.  Only cells of the given window are evaluated: strips outside the
window are not visited, sub-pieces left of the window contribute nothing, and
sub-pieces right of it contribute the full ``dv`` to every column.  Parts of a
polygon outside the window are therefore simply not counted, so summing the
results of several windows that tile a raster reproduces the whole-raster
result up to rounding.

Rounding.  A cell that no boundary piece passes through (through its
interior) is entirely inside or outside; its value is rounded to exactly 0
or 1.  Cells the boundary cuts keep the computed value, clipped to [0, 1].
Values at or below :data:`MIN_FRACTION` (rounding noise; 1e-12 of a cell)
are not reported.

The results are exact for *valid* polygons (OGC simple-feature rules:
non-self-intersecting rings, non-overlapping multipolygon parts).  Validity is
checked where parcels are read, not here.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import shapely

from landcheck.errors import InputDataError

__all__ = [
    "MIN_FRACTION",
    "COVERAGE_BLOCK_CELLS",
    "coverage_triplets_aligned",
    "CoverageBuffers",
    "CoverageTriplets",
    "PreparedPolygons",
    "coverage_triplets",
    "prepare_polygons",
]

#: coverage fractions at or below this (in cells) are treated as rounding noise and not reported
MIN_FRACTION = 1e-12

#: largest number of triplets allocated up front per window (the kernel grows its buffers beyond)
_INITIAL_CAPACITY_MAX = 1 << 24

try:  # numba is an accelerator: without it the very same functions run as plain Python
    import numba as _numba

    _jit = _numba.njit(nogil=True, cache=True)
except ImportError:  # pragma: no cover - numba is a declared dependency

    def _jit(func):
        return func


# ---------------------------------------------------------------------------
# Prepared polygons (NumPy side)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class PreparedPolygons:
    """Polygon rings flattened into plain arrays, ready for the coverage kernel.

    Build it once with :func:`prepare_polygons` and reuse it for every window.

    Attributes
    ----------
    x, y : ndarray of float64, shape (n_vertices,)
        Vertex coordinates in CRS units; each ring is closed (last vertex = first).
    ring_offsets : ndarray of int64, shape (n_rings + 1,)
        Ring ``r`` holds vertices ``ring_offsets[r]:ring_offsets[r + 1]``.
    ring_is_hole : ndarray of bool, shape (n_rings,)
        True for interior rings (holes).
    feature_ring_start, feature_ring_stop : ndarray of int64, shape (n_features,)
        Feature ``k`` owns rings ``feature_ring_start[k]:feature_ring_stop[k]`` (an
        empty range for empty, missing or non-areal geometries).
    bounds : ndarray of float64, shape (n_features, 4)
        ``(xmin, ymin, xmax, ymax)`` per feature in CRS units; NaN when it has no rings.
    """

    x: np.ndarray
    y: np.ndarray
    ring_offsets: np.ndarray
    ring_is_hole: np.ndarray
    feature_ring_start: np.ndarray
    feature_ring_stop: np.ndarray
    bounds: np.ndarray

    @property
    def n_features(self) -> int:
        return int(self.feature_ring_start.shape[0])


class CoverageTriplets(NamedTuple):
    """Covered cells of one window, one entry per (feature, cell) with fraction > 0.

    Entries are grouped by feature (ascending ``feature_index``) and, within a
    feature, ordered row by row, west to east.

    Attributes
    ----------
    feature_index : ndarray of int64
        Position of the feature in the sequence given to :func:`prepare_polygons`.
    row, col : ndarray of int32
        Cell row and column relative to the window's top-left cell.
    fraction : ndarray of float64
        Share of the cell's area (in the raster CRS) inside the feature, in (0, 1].
    """

    feature_index: np.ndarray
    row: np.ndarray
    col: np.ndarray
    fraction: np.ndarray


_POLYGON_TYPES = (3, 6)  # shapely type ids: Polygon, MultiPolygon
_COLLECTION_TYPE = 7


def _areal_parts(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-empty Polygon parts of each geometry and the index of their geometry."""
    parts, index = shapely.get_parts(geoms, return_index=True)
    # a GeometryCollection may hold multipolygons or further collections: flatten fully
    while True:
        tid = shapely.get_type_id(parts)
        nested = np.isin(tid, (6, _COLLECTION_TYPE))
        if not nested.any():
            break
        sub, sub_idx = shapely.get_parts(parts[nested], return_index=True)
        keep_parts = np.concatenate([parts[~nested], sub])
        keep_index = np.concatenate([index[~nested], index[nested][sub_idx]])
        order = np.argsort(keep_index, kind="stable")
        parts, index = keep_parts[order], keep_index[order]
    keep = (shapely.get_type_id(parts) == 3) & ~shapely.is_empty(parts)
    return parts[keep], index[keep]


def _as_geometry_array(geoms) -> tuple[np.ndarray, np.ndarray]:
    """Geometries as a 1-D object array, and their shapely type ids (-1 for None)."""
    if hasattr(geoms, "geometry") and hasattr(geoms, "columns"):  # GeoDataFrame: its active geometry
        geoms = geoms.geometry
    values = getattr(geoms, "values", geoms)  # GeoSeries -> GeometryArray
    try:
        arr = np.asarray(values, dtype=object).reshape(-1)
        type_ids = shapely.get_type_id(arr)
    except TypeError as exc:
        raise InputDataError(
            f"coverage: expected a sequence of shapely Polygon/MultiPolygon geometries, got {type(geoms).__name__} "
            f"holding something else ({exc}); convert the features with shapely first."
        ) from None
    return arr, type_ids


def prepare_polygons(geoms: Sequence) -> PreparedPolygons:
    """Flatten polygons and multipolygons into ring arrays for :func:`coverage_triplets`.

    Parameters
    ----------
    geoms : sequence of shapely geometries (list, ndarray, GeoSeries, GeoDataFrame)
        Polygons or MultiPolygons in the raster CRS (no reprojection here).  ``None``, empty and
        non-areal geometries (points, lines) are kept as features with no
        rings, so they never produce a covered cell; a GeometryCollection
        contributes its polygon members.  Z values are ignored.

    Returns
    -------
    PreparedPolygons

    Raises
    ------
    InputDataError
        When an element is not a shapely geometry (or None).
    """
    arr, type_ids = _as_geometry_array(geoms)
    n = arr.shape[0]
    # fast path: a polygon without holes is one ring, read straight from its coordinates
    # (splitting every geometry into parts and rings would copy each of them)
    is_polygon = type_ids == 3
    simple = np.zeros(n, dtype=bool)
    simple[is_polygon] = (shapely.get_num_interior_rings(arr[is_polygon]) == 0) & ~shapely.is_empty(arr[is_polygon])
    simple_idx = np.flatnonzero(simple)
    xy_s, vertex_feature = shapely.get_coordinates(arr[simple_idx], return_index=True)
    counts_s = np.bincount(vertex_feature, minlength=simple_idx.size)

    # general path: multipolygons, polygons with holes, collections
    other = np.isin(type_ids, _POLYGON_TYPES + (_COLLECTION_TYPE,)) & ~simple
    parts, part_feature = _areal_parts(arr[other])
    part_feature = np.flatnonzero(other)[part_feature]
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    # get_rings lists each polygon's exterior first, then its holes
    hole_o = np.zeros(rings.shape[0], dtype=bool)
    hole_o[1:] = ring_part[1:] == ring_part[:-1]
    xy_o, vertex_ring = shapely.get_coordinates(rings, return_index=True)
    counts_o = np.bincount(vertex_ring, minlength=rings.shape[0])
    ring_feature_o = part_feature[ring_part]  # ascending

    n_simple = simple_idx.size
    ring_offsets = np.zeros(n_simple + rings.shape[0] + 1, dtype=np.int64)
    np.cumsum(np.concatenate([counts_s, counts_o]), out=ring_offsets[1:])
    ring_is_hole = np.concatenate([np.zeros(n_simple, dtype=bool), hole_o])
    start = np.zeros(n, dtype=np.int64)
    stop = np.zeros(n, dtype=np.int64)
    start[simple_idx] = np.arange(n_simple)
    stop[simple_idx] = start[simple_idx] + 1
    if rings.shape[0]:
        feats, first, count = np.unique(ring_feature_o, return_index=True, return_counts=True)
        start[feats] = n_simple + first
        stop[feats] = n_simple + first + count
    xy = np.concatenate([xy_s, xy_o]) if xy_o.shape[0] else xy_s

    bounds = np.full((n, 4), np.nan)
    has_rings = stop > start
    if has_rings.any():
        bounds[has_rings] = shapely.bounds(arr[has_rings])
    return PreparedPolygons(
        x=np.ascontiguousarray(xy[:, 0], dtype=np.float64),
        y=np.ascontiguousarray(xy[:, 1], dtype=np.float64),
        ring_offsets=ring_offsets,
        ring_is_hole=ring_is_hole,
        feature_ring_start=start,
        feature_ring_stop=stop,
        bounds=bounds,
    )


# ---------------------------------------------------------------------------
# Kernel (numba; the same function runs as plain Python without it)
# ---------------------------------------------------------------------------
#
# Scratch layout for one feature, its box being rows [r0, r1) x columns [c0, c1)
# of the window (nr x nc cells), row-major with stride nc + 1:
#   cov[i, j]      sum of dv * (mean of F_j) over the pieces lying in cell (i, j)
#   full[i, m]     sum of dv over the pieces in column m; every column < m receives it.
#                  m = nc collects the pieces right of the box.
#   touched[i, j]  1 when a boundary piece passes through the cell's interior
#   span_lo/hi[i]  first/last column of row i that received anything (pieces left of
#                  the box set span_lo = 0).  Outside the span a row's cells are 0.
# cov, full and touched are all-zero between features: each row's span is cleared
# after it is read, so a feature costs its boundary crossings plus its covered cells.
# The whole walk is one function on purpose: passing the scratch arrays to helper
# functions costs reference counting on every boundary piece.


@_jit
def _grow(feat, rows, cols, frac, need):
    """Output arrays with room for ``need`` entries (the same arrays when they already have it)."""
    cap = feat.shape[0]
    if need <= cap:
        return feat, rows, cols, frac
    new_cap = max(need, 2 * cap)
    f2 = np.empty(new_cap, dtype=np.int64)
    r2 = np.empty(new_cap, dtype=np.int32)
    c2 = np.empty(new_cap, dtype=np.int32)
    x2 = np.empty(new_cap, dtype=np.float64)
    f2[:cap] = feat
    r2[:cap] = rows
    c2[:cap] = cols
    x2[:cap] = frac
    return f2, r2, c2, x2


@_jit
def _coverage_kernel(
    x,
    y,
    ring_offsets,
    ring_is_hole,
    feature_ring_start,
    feature_ring_stop,
    selected,
    a,
    c,
    e,
    f,
    height,
    width,
    min_fraction,
    out_f,
    out_r,
    out_c,
    out_x,
):
    """Coverage triplets of the ``selected`` features on one window (see module docstring).

    ``a, c, e, f`` are the window transform's x cell size, x origin, y cell size
    (signed) and y origin.  ``out_*`` are output buffers (any size; grown when
    needed).  Returns ``(feature, row, col, fraction, count)``.
    """
    orient = 1.0 if a * e > 0.0 else -1.0
    n_out = 0
    cov = np.zeros(0, dtype=np.float64)
    full = np.zeros(0, dtype=np.float64)
    touched = np.zeros(0, dtype=np.uint8)
    span_lo = np.zeros(0, dtype=np.int64)
    span_hi = np.zeros(0, dtype=np.int64)
    for s in range(selected.shape[0]):
        feat = selected[s]
        rg0 = feature_ring_start[feat]
        rg1 = feature_ring_stop[feat]
        if rg1 <= rg0:
            continue
        # bounding box in cell units, clipped to the window (a feature's rings are contiguous)
        umin = np.inf
        umax = -np.inf
        vmin = np.inf
        vmax = -np.inf
        for p in range(ring_offsets[rg0], ring_offsets[rg1]):
            u = (x[p] - c) / a
            v = (y[p] - f) / e
            umin = min(umin, u)
            umax = max(umax, u)
            vmin = min(vmin, v)
            vmax = max(vmax, v)
        if not (umax > umin and vmax > vmin):  # zero width/height or NaN: no area
            continue
        c0 = max(math.floor(max(umin, -1.0)), 0)
        c1 = min(math.ceil(min(umax, width + 1.0)), width)
        r0 = max(math.floor(max(vmin, -1.0)), 0)
        r1 = min(math.ceil(min(vmax, height + 1.0)), height)
        if c0 >= c1 or r0 >= r1:
            continue
        nr = r1 - r0
        nc = c1 - c0
        stride = nc + 1
        size = nr * stride
        if cov.shape[0] < size:  # fresh zeroed scratch (kept all-zero between features)
            cov = np.zeros(size, dtype=np.float64)
            full = np.zeros(size, dtype=np.float64)
            touched = np.zeros(size, dtype=np.uint8)
        if span_lo.shape[0] < nr:
            span_lo = np.empty(nr, dtype=np.int64)
            span_hi = np.empty(nr, dtype=np.int64)
        for i in range(nr):
            span_lo[i] = stride
            span_hi[i] = -1
        # grid-line limits for clamping before float -> int (no overflow far outside)
        u_lo_lim = c0 - 1.0
        u_hi_lim = c1 + 1.0
        for rg in range(rg0, rg1):
            p0 = ring_offsets[rg]
            p1 = ring_offsets[rg + 1]
            if p1 - p0 < 4:
                continue
            # shoelace signed area (CRS units, relative to the first vertex)
            xr = x[p0]
            yr = y[p0]
            area2 = 0.0
            for p in range(p0, p1 - 1):
                area2 += (x[p] - xr) * (y[p + 1] - yr) - (x[p + 1] - xr) * (y[p] - yr)
            if area2 == 0.0:
                continue
            w_ring = orient if area2 > 0.0 else -orient
            if ring_is_hole[rg]:
                w_ring = -w_ring
            u_next = (x[p0] - c) / a
            v_next = (y[p0] - f) / e
            for p in range(p0 + 1, p1):
                u0 = u_next
                v0 = v_next
                u_next = (x[p] - c) / a
                v_next = (y[p] - f) / e
                u1 = u_next
                v1 = v_next
                w = w_ring
                # ---- one edge (u0, v0) -> (u1, v1) -------------------------------
                if v0 == v1:
                    # horizontal: no dv, but it cuts the cells it runs through (unless on a grid line)
                    if v0 < r0 or v0 >= r1 or v0 == math.floor(v0):
                        continue
                    il = math.floor(v0) - r0
                    ja = max(math.floor(min(max(min(u0, u1), u_lo_lim), u_hi_lim)), c0)
                    jb = min(math.ceil(min(max(max(u0, u1), u_lo_lim), u_hi_lim)) - 1, c1 - 1)
                    if jb >= ja:
                        base = il * stride
                        for j in range(ja, jb + 1):
                            touched[base + j - c0] = 1
                        span_lo[il] = min(span_lo[il], ja - c0)
                        span_hi[il] = max(span_hi[il], jb - c0)
                    continue
                if v0 > v1:  # walk downwards (increasing v); reversing the edge flips the sign
                    u0, u1 = u1, u0
                    v0, v1 = v1, v0
                    w = -w
                if v1 <= r0 or v0 >= r1:
                    continue
                i_first = max(math.floor(max(v0, r0 - 1.0)), r0)
                i_last = min(math.ceil(min(v1, r1 + 1.0)) - 1, r1 - 1)
                du_dv = (u1 - u0) / (v1 - v0)
                for i in range(i_first, i_last + 1):
                    # ---- the edge's piece in row strip i: (ua, va) -> (ub, vb) ----
                    if v0 >= i:
                        va = v0
                        ua = u0
                    else:
                        va = float(i)
                        ua = u0 + (va - v0) * du_dv
                    if v1 <= i + 1:
                        vb = v1
                        ub = u1
                    else:
                        vb = float(i + 1)
                        ub = u0 + (vb - v0) * du_dv
                    if not vb > va:
                        continue
                    il = i - r0
                    base = il * stride
                    # vertical grid lines strictly between ua and ub, within the box
                    n_cross = 0
                    k_first = 0
                    step = 1
                    dv_du = 0.0
                    if ub > ua:
                        k_first = max(math.floor(min(max(ua, u_lo_lim), u_hi_lim)) + 1, c0)
                        k_last = min(math.ceil(min(max(ub, u_lo_lim), u_hi_lim)) - 1, c1)
                        n_cross = max(k_last - k_first + 1, 0)
                        dv_du = (vb - va) / (ub - ua)
                    elif ub < ua:
                        step = -1
                        k_first = min(math.ceil(min(max(ua, u_lo_lim), u_hi_lim)) - 1, c1)
                        k_last = max(math.floor(min(max(ub, u_lo_lim), u_hi_lim)) + 1, c0)
                        n_cross = max(k_first - k_last + 1, 0)
                        dv_du = (vb - va) / (ub - ua)
                    pa = ua
                    qa = va
                    for t in range(n_cross + 1):
                        # ---- sub-piece (pa, qa) -> (pb, qb) inside one column ----
                        if t < n_cross:
                            pb = float(k_first + t * step)
                            qb = va + (pb - ua) * dv_du
                        else:
                            pb = ub
                            qb = vb
                        lo = min(pa, pb)
                        hi = max(pa, pb)
                        if hi <= c0:
                            # left of the box: F_j = 0 for all its columns, but cells
                            # between the window edge and the first piece may be inside
                            span_lo[il] = 0
                        elif lo >= c1:
                            # right of the box: F_j = 1 for all its columns
                            full[base + nc] += (qb - qa) * w
                            span_hi[il] = nc
                        else:
                            jl = min(max(int(lo) - c0, 0), nc - 1)  # lo >= c0 >= 0 here
                            span_lo[il] = min(span_lo[il], jl)
                            span_hi[il] = max(span_hi[il], jl)
                            k = base + jl
                            # the piece cuts the cell's interior unless it runs along a
                            # vertical grid line (u = j), a horizontal one, or is a point
                            if lo != hi:
                                if qa != qb or qa != math.floor(qa):
                                    touched[k] = 1
                            elif qa != qb and lo != jl + c0:
                                touched[k] = 1
                            dv = (qb - qa) * w
                            mean = 0.5 * (pa + pb) - (jl + c0)
                            if mean < 0.0:
                                mean = 0.0
                            elif mean > 1.0:
                                mean = 1.0
                            cov[k] += dv * mean
                            full[k] += dv
                        pa = pb
                        qa = qb
        # ---- read the rows out: suffix sums, rounding, emission, clearing -------
        for i in range(nr):
            lo_j = span_lo[i]
            hi_j = span_hi[i]
            if hi_j < 0:
                continue
            base = i * stride
            top = min(hi_j, nc - 1)
            if lo_j > top:  # only pieces right of the box: nothing inside it on this row
                full[base + nc] = 0.0
                continue
            # right to left: cell j receives every piece in a column right of j; the row's
            # cells are emitted east to west, then that stretch is reversed
            out_f, out_r, out_c, out_x = _grow(out_f, out_r, out_c, out_x, n_out + (top - lo_j + 1))
            row_start = n_out
            acc = 0.0
            for j in range(top, lo_j - 1, -1):
                acc += full[base + j + 1]
                full[base + j + 1] = 0.0
                val = cov[base + j] + acc
                cov[base + j] = 0.0
                if touched[base + j]:
                    touched[base + j] = 0
                    val = min(val, 1.0)
                elif val > 0.5:  # no boundary inside the cell: exactly in or out
                    val = 1.0
                else:
                    val = 0.0
                if val > min_fraction:
                    out_c[n_out] = c0 + j
                    out_x[n_out] = val
                    n_out += 1
            full[base + lo_j] = 0.0
            row = r0 + i
            lo_o = row_start
            hi_o = n_out - 1
            while lo_o < hi_o:
                tc = out_c[lo_o]
                out_c[lo_o] = out_c[hi_o]
                out_c[hi_o] = tc
                tx = out_x[lo_o]
                out_x[lo_o] = out_x[hi_o]
                out_x[hi_o] = tx
                lo_o += 1
                hi_o -= 1
            for o in range(row_start, n_out):
                out_f[o] = feat
                out_r[o] = row
    return out_f, out_r, out_c, out_x, n_out


# ---------------------------------------------------------------------------
# Public entry point
# ---------------------------------------------------------------------------


def _transform_terms(window_transform) -> tuple[float, float, float, float]:
    t = tuple(float(v) for v in tuple(window_transform)[:6])
    a, b, c, d, e, f = t
    if b != 0.0 or d != 0.0:
        raise InputDataError(
            f"coverage: the raster transform is rotated or sheared (b={b}, d={d}); only grids aligned with the "
            "CRS axes are supported. Warp the raster to a north-up grid first (e.g. gdalwarp)."
        )
    if not (math.isfinite(a) and math.isfinite(e) and a != 0.0 and e != 0.0 and math.isfinite(c) and math.isfinite(f)):
        raise InputDataError(f"coverage: the raster transform has an invalid cell size or origin ({t}).")
    return a, c, e, f


class CoverageBuffers:
    """Output buffers that :func:`coverage_triplets` reuses from call to call (one per thread).

    Triplets returned with ``buffers=`` are views into these arrays: they stay valid only
    until the next call with the same buffers.  Reuse saves the page faults of fresh
    multi-megabyte arrays for every window.
    """

    def __init__(self):
        self.arrays = (np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0, np.float64))

    def at_least(self, capacity: int):
        if self.arrays[0].shape[0] < capacity:
            self.arrays = (
                np.empty(capacity, np.int64),
                np.empty(capacity, np.int32),
                np.empty(capacity, np.int32),
                np.empty(capacity, np.float64),
            )
        return self.arrays


def coverage_triplets(
    polygons: PreparedPolygons | Sequence,
    window_transform,
    height: int,
    width: int,
    *,
    buffers: CoverageBuffers | None = None,
) -> CoverageTriplets:
    """Exact coverage fraction of every cell of one window by every polygon.

    Parameters
    ----------
    polygons : PreparedPolygons or sequence of shapely geometries
        Features in the raster CRS (Polygon / MultiPolygon; others are skipped).
        Pass a :class:`PreparedPolygons` to reuse the flattening across windows.
    window_transform : affine.Affine or 6-sequence (a, b, c, d, e, f)
        Transform of the window's top-left cell (``x = a col + c``,
        ``y = e row + f``), CRS units per cell; ``b`` and ``d`` must be 0.
    height, width : int
        Window size in cells.

    Returns
    -------
    CoverageTriplets
        ``(feature_index int64, row int32, col int32, fraction float64)``: each
        (feature, cell) pair of the window with fraction > :data:`MIN_FRACTION`.
        ``fraction`` is the dimensionless share of the cell's area (in the
        raster CRS) inside the feature; multiply by the cell area (m^2) for
        area.  Parts of a feature outside the window are not counted, so
        results of windows that tile a raster add up to the whole-raster result.

    buffers : CoverageBuffers, optional
        Reuse these output arrays (the result is then a view into them, valid until the
        next call with the same buffers).

    Raises
    ------
    InputDataError
        When the transform is rotated/sheared or degenerate, or ``polygons``
        is not a sequence of shapely geometries.

    Examples
    --------
    A 1.5 x 1.5-cell square on a 1 m grid covers 2.25 cells whatever its offset:

    >>> import shapely
    >>> from affine import Affine
    >>> sq = shapely.box(0.2, 2.3, 1.7, 3.8)
    >>> t = coverage_triplets([sq], Affine(1, 0, 0, 0, -1, 4), 4, 4)
    >>> round(float(t.fraction.sum()), 12)
    2.25
    """
    if not isinstance(polygons, PreparedPolygons):
        polygons = prepare_polygons(polygons)
    a, c, e, f = _transform_terms(window_transform)
    height = int(height)
    width = int(width)
    if height < 0 or width < 0:
        raise InputDataError(f"coverage: window size must not be negative (height={height}, width={width}).")
    # features whose bounding box meets the window (NaN bounds never do)
    wx0, wx1 = sorted((c, c + a * width))
    wy0, wy1 = sorted((f, f + e * height))
    b = polygons.bounds
    selected = np.flatnonzero((b[:, 0] <= wx1) & (b[:, 2] >= wx0) & (b[:, 1] <= wy1) & (b[:, 3] >= wy0))
    if selected.size == 0 or height == 0 or width == 0:
        return CoverageTriplets(np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0))
    # the clipped bounding boxes bound the output size; start there (capped) and let the kernel grow
    bs = b[selected]
    ux = np.sort((bs[:, [0, 2]] - c) / a, axis=1)
    vy = np.sort((bs[:, [1, 3]] - f) / e, axis=1)
    n_cols = np.clip(np.ceil(ux[:, 1]), 0, width) - np.clip(np.floor(ux[:, 0]), 0, width)
    n_rows = np.clip(np.ceil(vy[:, 1]), 0, height) - np.clip(np.floor(vy[:, 0]), 0, height)
    capacity = int(min(max(float(np.sum(n_cols * n_rows)), 1024.0), float(_INITIAL_CAPACITY_MAX)))
    # allocated by NumPy (large arrays get transparent huge pages on Linux: far fewer page faults);
    # pages never written stay virtual, so the over-allocation costs no memory
    if buffers is not None:
        out = buffers.at_least(capacity)
    else:
        out = (
            np.empty(capacity, np.int64),
            np.empty(capacity, np.int32),
            np.empty(capacity, np.int32),
            np.empty(capacity, np.float64),
        )
    fi, ro, co, fr, n = _coverage_kernel(
        polygons.x,
        polygons.y,
        polygons.ring_offsets,
        polygons.ring_is_hole,
        polygons.feature_ring_start,
        polygons.feature_ring_stop,
        selected.astype(np.int64),
        a,
        c,
        e,
        f,
        height,
        width,
        MIN_FRACTION,
        *out,
    )
    if buffers is not None and fi is not out[0]:  # the kernel grew them: keep the larger arrays
        buffers.arrays = (fi, ro, co, fr)
    return CoverageTriplets(fi[:n], ro[:n], co[:n], fr[:n])


#: coverage is computed in blocks of this many cells aligned to the raster's own origin (see below)
COVERAGE_BLOCK_CELLS = 256


def coverage_triplets_aligned(
    polygons: PreparedPolygons | Sequence,
    raster_transform,
    raster_height: int,
    raster_width: int,
    win,
    *,
    buffers: CoverageBuffers | None = None,
    block: int = COVERAGE_BLOCK_CELLS,
) -> CoverageTriplets:
    """Coverage triplets of window ``win`` that do not depend on how the raster is cut into windows.

    :func:`coverage_triplets` works in cell units measured from the window's corner, so the
    rounding of a cell's fraction (~1e-12) depends on where the window starts.  Here every
    fraction is computed inside the fixed ``block`` x ``block`` block of the raster holding the
    cell (blocks aligned to the raster's origin, clipped to its extent), whatever ``win`` is, so
    any tiling gives every (feature, cell) pair the same fraction bit for bit.  Rows and columns
    are returned relative to ``win``; entries are grouped by feature (ascending), rows and columns
    within a feature in block order.  Windows that are multiples of ``block`` cost nothing extra;
    other windows compute the whole of each block they touch.
    """
    if not isinstance(polygons, PreparedPolygons):
        polygons = prepare_polygons(polygons)
    a, c, e, f = _transform_terms(raster_transform)
    from affine import Affine

    from landcheck.geo.grid import _compose

    base = Affine(a, 0.0, c, 0.0, e, f)
    parts = []
    r_first = (win.row_off // block) * block
    c_first = (win.col_off // block) * block
    for br in range(r_first, win.row_off + win.height, block):
        for bc in range(c_first, win.col_off + win.width, block):
            bh = min(block, raster_height - br)
            bw = min(block, raster_width - bc)
            t = _compose(base, Affine.translation(bc, br))
            fi, ro, co, fr = coverage_triplets(polygons, t, bh, bw, buffers=buffers)
            rows = ro.astype(np.int64) + (br - win.row_off)
            cols = co.astype(np.int64) + (bc - win.col_off)
            keep = (rows >= 0) & (rows < win.height) & (cols >= 0) & (cols < win.width)
            parts.append((fi[keep], rows[keep].astype(np.int32), cols[keep].astype(np.int32), fr[keep]))
    if not parts:
        return CoverageTriplets(np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0))
    fi = np.concatenate([p[0] for p in parts])
    ro = np.concatenate([p[1] for p in parts])
    co = np.concatenate([p[2] for p in parts])
    fr = np.concatenate([p[3] for p in parts])
    if len(parts) > 1 and fi.size and np.any(fi[1:] < fi[:-1]):
        order = np.argsort(fi, kind="stable")
        fi, ro, co, fr = fi[order], ro[order], co[order], fr[order]
    return CoverageTriplets(fi, ro, co, fr)
