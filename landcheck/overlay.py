"""Overlay: exact cell-coverage fractions of parcels, reduced to mergeable per-parcel sums.

For each window the driver gives the slope (percent, NaN where undefined),
optional hazard-zone bits per cell, the cell areas of its rows and the
parcels that touch it.  :func:`accumulate_window` turns the exact coverage
fraction of every (parcel, cell) pair into sums — covered area, evaluated
area, area over each threshold, zone areas, conflict area — that merge across
windows by plain addition (maximum for the slope maximum).  A parcel spanning
many windows therefore gets the same numbers as in one whole-raster pass.

Coverage fractions come from :func:`coverage_triplets` (exact polygon/cell
intersection areas, never cell centres).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["OverlayPlan", "WindowSums", "Totals", "coverage_triplets", "accumulate_window", "CONFLICT_OUTSIDE"]

#: conflict-raster value for cells outside every parcel
CONFLICT_OUTSIDE = 255
#: slope-histogram bin edges (percent) used for charts: 1-point bins to 100 %, then one open bin
HIST_EDGES_PCT = np.concatenate([np.arange(0.0, 101.0, 1.0), [np.inf]])


def coverage_triplets(geoms, window_transform, height: int, width: int):
    """Exact coverage of each polygon over the cells of one window.

    Returns ``(feature_index, row, col, fraction)`` for every pair with a
    fraction > 0; rows and cols are relative to the window.
    """
    try:
        from .coverage import coverage_triplets as _fast
    except ImportError:
        _fast = None
    if _fast is not None:
        return _fast(geoms, window_transform, height, width)
    return _coverage_exactextract(geoms, window_transform, height, width)


_DUMMY_CRS = "EPSG:3857"
_DUMMY_WKT = None


def _coverage_exactextract(geoms, window_transform, height, width):
    global _DUMMY_WKT
    if _DUMMY_WKT is None:
        import pyproj

        _DUMMY_WKT = pyproj.CRS(_DUMMY_CRS).to_wkt()
    import geopandas as gpd
    from exactextract import exact_extract
    from exactextract.raster import NumPyRasterSource

    empty = (np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0, np.float64))
    if len(geoms) == 0:
        return empty
    t = window_transform
    xmin, ymax = t.c, t.f
    xmax, ymin = t.c + t.a * width, t.f + t.e * height
    # coverage is pure geometry: any CRS will do as long as raster and vector carry the same one
    src = NumPyRasterSource(np.zeros((height, width), np.uint8), xmin, ymin, xmax, ymax, srs_wkt=_DUMMY_WKT)
    gdf = gpd.GeoDataFrame({"fi": np.arange(len(geoms))}, geometry=list(geoms), crs=_DUMMY_CRS)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = exact_extract(src, gdf, ["cell_id", "coverage"], output="pandas", include_cols=["fi"])
    if len(res) == 0:
        return empty
    counts = np.array([len(c) for c in res["coverage"]], dtype=np.int64)
    if counts.sum() == 0:
        return empty
    fi = np.repeat(res["fi"].to_numpy(np.int64), counts)
    cell = np.concatenate([np.asarray(c, np.int64) for c in res["cell_id"]])
    frac = np.concatenate([np.asarray(c, np.float64) for c in res["coverage"]])
    keep = frac > 0
    return fi[keep], (cell[keep] // width).astype(np.int32), (cell[keep] % width).astype(np.int32), frac[keep]


@dataclass(frozen=True)
class OverlayPlan:
    """Per-parcel rule parameters the window pass needs (picklable, sent to workers).

    Attributes
    ----------
    thresholds_pct : ndarray
        Sorted slope thresholds whose over-area is accumulated (class limits,
        limits minus review bands, and the sensitivity range).
    limit_index, near_index : ndarray of int
        Per parcel, index into ``thresholds_pct`` of its class limit and of
        limit - review band; -1 when the class has no slope limit.
    forbid_bits : ndarray of uint32
        Per parcel, bit k set when its class forbids zone k.
    area_factor : ndarray of float
        Per parcel, factor turning map-plane cell area into ground area
        (1 / areal scale of the projection at the parcel; 1 on geographic grids).
    class_index : ndarray of int
        Per parcel, index of its class (-1 for no rule).
    n_classes, n_zones : int
    capability_limit_pct : float or None
    """

    thresholds_pct: np.ndarray
    limit_index: np.ndarray
    near_index: np.ndarray
    forbid_bits: np.ndarray
    area_factor: np.ndarray
    class_index: np.ndarray
    n_classes: int
    n_zones: int
    capability_limit_pct: float | None
    ground_factor: float = 1.0


@dataclass
class WindowSums:
    """Sums for the parcels one window touches (``parcels`` holds their global indices)."""

    parcels: np.ndarray
    covered_m2: np.ndarray
    evaluated_m2: np.ndarray
    slope_area_sum: np.ndarray
    slope_max_pct: np.ndarray
    over_m2: np.ndarray  # (k, n_thresholds)
    conflict_m2: np.ndarray
    near_conflict_m2: np.ndarray
    slope_conflict_m2: np.ndarray
    zone_m2: np.ndarray  # (k, n_zones)
    class_hist_m2: np.ndarray  # (n_classes, n_bins)
    land_m2: float
    land_within_m2: float


@dataclass
class Totals:
    """Whole-run accumulators; :meth:`add` merges one window."""

    n_parcels: int
    n_thresholds: int
    n_zones: int
    n_classes: int
    covered_m2: np.ndarray = field(init=False)
    evaluated_m2: np.ndarray = field(init=False)
    slope_area_sum: np.ndarray = field(init=False)
    slope_max_pct: np.ndarray = field(init=False)
    over_m2: np.ndarray = field(init=False)
    conflict_m2: np.ndarray = field(init=False)
    near_conflict_m2: np.ndarray = field(init=False)
    slope_conflict_m2: np.ndarray = field(init=False)
    zone_m2: np.ndarray = field(init=False)
    class_hist_m2: np.ndarray = field(init=False)
    land_m2: float = 0.0
    land_within_m2: float = 0.0

    def __post_init__(self):
        n = self.n_parcels
        self.covered_m2 = np.zeros(n)
        self.evaluated_m2 = np.zeros(n)
        self.slope_area_sum = np.zeros(n)
        self.slope_max_pct = np.full(n, np.nan)
        self.over_m2 = np.zeros((n, self.n_thresholds))
        self.conflict_m2 = np.zeros(n)
        self.near_conflict_m2 = np.zeros(n)
        self.slope_conflict_m2 = np.zeros(n)
        self.zone_m2 = np.zeros((n, self.n_zones))
        self.class_hist_m2 = np.zeros((self.n_classes, len(HIST_EDGES_PCT) - 1))

    def add(self, s: WindowSums) -> None:
        p = s.parcels
        self.covered_m2[p] += s.covered_m2
        self.evaluated_m2[p] += s.evaluated_m2
        self.slope_area_sum[p] += s.slope_area_sum
        self.slope_max_pct[p] = np.fmax(self.slope_max_pct[p], s.slope_max_pct)
        self.over_m2[p] += s.over_m2
        self.conflict_m2[p] += s.conflict_m2
        self.near_conflict_m2[p] += s.near_conflict_m2
        self.slope_conflict_m2[p] += s.slope_conflict_m2
        self.zone_m2[p] += s.zone_m2
        self.class_hist_m2 += s.class_hist_m2
        self.land_m2 += s.land_m2
        self.land_within_m2 += s.land_within_m2


def accumulate_window(
    slope_pct: np.ndarray,
    zone_bits: np.ndarray | None,
    cell_area_m2: np.ndarray,
    candidates: np.ndarray,
    triplets: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    plan: OverlayPlan,
    land_mask: np.ndarray | None = None,
) -> tuple[WindowSums, np.ndarray]:
    """Reduce one window to per-parcel sums and its conflict-raster tile.

    Parameters
    ----------
    slope_pct : ndarray (h, w)
        Slope in percent, NaN where undefined.
    zone_bits : ndarray (h, w) of uint32, or None
        Bit k set where the cell lies in hazard zone k.
    cell_area_m2 : ndarray (h,)
        Map-plane area of one cell of each window row (exact band area on geographic grids).
    candidates : ndarray of int
        Global parcel indices passed to the coverage step, in the order of ``triplets[0]``.
    triplets : tuple
        ``(feature_index, row, col, fraction)`` from :func:`coverage_triplets`, feature_index
        indexing ``candidates``.
    plan : OverlayPlan
    land_mask : ndarray (h, w) of bool, optional
        Cells that count as land for the capability figure (default: every cell with a slope).

    Returns
    -------
    WindowSums, ndarray (h, w) of uint8
        The sums, and the conflict bits of the cells (255 outside every parcel).
    """
    h, w = slope_pct.shape
    fi, rr, cc, frac = triplets
    valid_cells = np.isfinite(slope_pct)
    # whole-area capability (independent of parcels)
    land = valid_cells if land_mask is None else (valid_cells & land_mask)
    row_area = cell_area_m2[:, None] * plan.ground_factor
    land_m2 = float((row_area * land).sum())
    if plan.capability_limit_pct is not None:
        within = land & (np.nan_to_num(slope_pct, nan=np.inf) < plan.capability_limit_pct)
        land_within_m2 = float((row_area * within).sum())
    else:
        land_within_m2 = 0.0
    conflict_tile = np.full((h, w), CONFLICT_OUTSIDE, np.uint8)
    n_t = len(plan.thresholds_pct)
    if fi.size == 0:
        empty = np.empty(0)
        return WindowSums(np.empty(0, np.int64), empty, empty, empty, empty, np.empty((0, n_t)), empty, empty, empty,
                          np.empty((0, plan.n_zones)), np.zeros((plan.n_classes, len(HIST_EDGES_PCT) - 1)),
                          land_m2, land_within_m2), conflict_tile

    gp = candidates[fi]  # global parcel index per pair
    local_ids, local = np.unique(gp, return_inverse=True)
    k = len(local_ids)
    s = slope_pct[rr, cc].astype(np.float64)
    valid = np.isfinite(s)
    a = frac * cell_area_m2[rr] * plan.area_factor[gp]
    av = np.where(valid, a, 0.0)
    s0 = np.where(valid, s, 0.0)

    covered = np.bincount(local, weights=a, minlength=k)
    evaluated = np.bincount(local, weights=av, minlength=k)
    slope_sum = np.bincount(local, weights=av * s0, minlength=k)
    smax = np.full(k, -np.inf)
    np.maximum.at(smax, local[valid], s[valid])
    smax[np.isneginf(smax)] = np.nan

    # area over each threshold: sort thresholds once, count per pair how many it reaches
    t = plan.thresholds_pct
    reach = np.searchsorted(t, np.where(valid, s, -np.inf), side="right")  # thresholds <= s
    over = np.zeros((k, n_t + 1))
    np.add.at(over, (local, reach), av)
    # over[:, j] = area with exactly j thresholds reached -> cumulative from the top
    over_m2 = np.cumsum(over[:, ::-1], axis=1)[:, ::-1][:, 1:]

    # per-pair breach of the parcel's own rule (slope over its limit, or inside a forbidden zone)
    li = plan.limit_index[gp]
    ni = plan.near_index[gp]
    slope_breach = valid & (li >= 0) & (reach > li)
    slope_near = valid & (ni >= 0) & (reach > ni)
    if zone_bits is not None and plan.n_zones:
        zb = zone_bits[rr, cc]
        zone_breach = (zb & plan.forbid_bits[gp]) != 0
        zone_m2 = np.zeros((k, plan.n_zones))
        for z in range(plan.n_zones):
            inz = (zb >> np.uint32(z)) & np.uint32(1)
            zone_m2[:, z] = np.bincount(local, weights=a * inz, minlength=k)
    else:
        zone_breach = np.zeros(fi.shape, bool)
        zone_m2 = np.zeros((k, plan.n_zones))
    # zone breaches count on covered area (zones do not need a slope); slope breaches on evaluated area
    breach = slope_breach | zone_breach
    near = slope_near | zone_breach
    conflict = np.bincount(local, weights=a * breach, minlength=k)
    near_conflict = np.bincount(local, weights=a * near, minlength=k)
    slope_conflict = np.bincount(local, weights=av * slope_breach, minlength=k)

    # per-class slope histogram of classified land
    ci = plan.class_index[gp]
    has_class = valid & (ci >= 0)
    nb = len(HIST_EDGES_PCT) - 1
    bins = np.clip(np.searchsorted(HIST_EDGES_PCT, s[has_class], side="right") - 1, 0, nb - 1)
    hist = np.bincount(ci[has_class] * nb + bins, weights=a[has_class], minlength=plan.n_classes * nb)
    hist = hist.reshape(plan.n_classes, nb)

    # conflict raster: each cell shows the parcel covering most of it (ties: lower parcel index)
    order = np.lexsort((gp, -frac))
    cell = rr.astype(np.int64) * w + cc
    _, first = np.unique(cell[order], return_index=True)
    pick = order[first]
    bits = slope_breach[pick].astype(np.uint8)
    if zone_bits is not None and plan.n_zones:
        zb_pick = (zone_bits[rr[pick], cc[pick]] & plan.forbid_bits[gp[pick]]).astype(np.uint32)
        bits = bits | ((zb_pick << np.uint32(1)) & np.uint32(0xFE)).astype(np.uint8)
    conflict_tile[rr[pick], cc[pick]] = bits

    sums = WindowSums(local_ids, covered, evaluated, slope_sum, smax, over_m2, conflict, near_conflict, slope_conflict,
                      zone_m2, hist, land_m2, land_within_m2)
    return sums, conflict_tile
