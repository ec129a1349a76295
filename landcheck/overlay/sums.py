"""Overlay: exact cell-coverage fractions of parcels, reduced to mergeable per-parcel sums.

For each window the driver gives the slope (percent, NaN where undefined),
optional hazard-zone bits per cell, the cell areas of its rows and the
parcels that touch it.  :func:`accumulate_window` turns the exact coverage
fraction of every (parcel, cell) pair into sums — covered area, evaluated
area, area over each threshold, zone areas, conflict area — that merge across
windows by plain addition (maximum for the slope maximum).  A parcel spanning
many windows therefore gets the same numbers as in one whole-raster pass.

Coverage fractions come from :func:`landcheck.overlay.coverage.coverage_triplets`
(exact polygon/cell intersection areas, never cell centres).

Order-independent sums.  Every pair's area ``fraction x cell area x factor`` is
rounded to a multiple of :data:`AREA_QUANTUM_M2` (2^-20 m², about 1 mm²) and every
pair's slope-area product to :data:`SLOPE_AREA_QUANTUM` (2^-20 m²·%) before it is
added.  Sums of such multiples are exact in float64 while they stay below
2^53 quanta (2^33 m² ≈ 8 590 km² per parcel and window, likewise 2^33 m²·% for
the slope-area sum, e.g. 100 km² at a mean slope of 86 %), and :class:`Totals`
adds the window sums as 64-bit integers of quanta (exact up to 2^63 quanta,
8.8e12 m²).  Exact sums do not depend on the order of their terms, so tile size,
worker count and engine cannot change a bit of any per-parcel, per-class or
whole-area figure.  The rounding moves each pair term by at most half a quantum
(4.8e-7 m²): for 10 m cells at most 4.8e-9 of a whole cell's area, a bias that
can add up over a parcel's cells to the same relative amount of its area.

Two implementations give the same numbers bit for bit (tests check it):
:func:`accumulate_window_reference` in NumPy is the readable reference;
:func:`accumulate_window` runs one compiled loop over the pairs
(:mod:`landcheck.overlay.reduction_loops`), about ten times faster and without the
GIL, and is what the audit uses.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

__all__ = [
    "OverlayPlan",
    "WindowSums",
    "Totals",
    "accumulate_window_reference",
    "accumulate_window",
    "CONFLICT_OUTSIDE",
]

#: conflict-raster value for cells outside every parcel
CONFLICT_OUTSIDE = 255
#: slope-histogram bin edges (percent) used for charts: 1-point bins to 100 %, then one open bin
HIST_EDGES_PCT = np.concatenate([np.arange(0.0, 101.0, 1.0), [np.inf]])


#: every pair's area is rounded to a multiple of this before it is added (exact, order-free sums)
AREA_QUANTUM_M2 = 2.0**-20
#: likewise every pair's slope x area product (m² x percent)
SLOPE_AREA_QUANTUM = 2.0**-20


def quantize_area(a):
    """Round areas (m²) to multiples of :data:`AREA_QUANTUM_M2` (round half to even)."""
    return np.rint(np.asarray(a, dtype=np.float64) * (1.0 / AREA_QUANTUM_M2)) * AREA_QUANTUM_M2


def _to_quanta(x, quantum: float) -> np.ndarray:
    """Exact integer count of quanta in sums that are multiples of ``quantum`` (see module doc)."""
    return np.rint(np.asarray(x, dtype=np.float64) * (1.0 / quantum)).astype(np.int64)


#: role of a geometry in the coverage step: the parcel itself
ROLE_PARCEL = -2
#: role of the piece of a parcel inside the union of the vector zones its class forbids
ROLE_FORBIDDEN_PIECE = -1


@dataclass(frozen=True)
class OverlayPlan:
    """Everything the window pass needs besides the rasters (picklable, sent to workers).

    Geometries are the parcels followed by their vector-zone pieces
    (:func:`landcheck.zones.prepare.vector_pieces`); ``geom_parcel`` and ``geom_role``
    say whose piece each geometry is.

    Attributes
    ----------
    thresholds_pct : ndarray
        Sorted slope thresholds whose over-area is accumulated (class limits,
        limits minus review bands, and the sensitivity range).
    limit_index, near_index : ndarray of int, per parcel
        Index into ``thresholds_pct`` of the class limit and of limit - review band; -1 without a limit.
    raster_forbid_bits : ndarray of uint32, per parcel
        Raster-zone channels (bits of the zone mask) the parcel's class forbids.
    zone_forbid_bits : ndarray of uint32, per parcel
        Rulebook zones (bit k = zone k) the class forbids; for the conflict raster.
    area_factor : ndarray of float, per parcel
        Map-plane to ground area factor (1 / areal scale; 1 on geographic grids).
    class_index : ndarray of int, per parcel
        Index of its class (-1 for no rule).
    geom_parcel, geom_role : ndarray of int, per geometry
        Parcel index and role (ROLE_PARCEL, ROLE_FORBIDDEN_PIECE or a zone-column index).
    col_channel, col_zone : ndarray of int, per zone column
        Raster channel (-1 for vector columns) and rulebook zone index (-1 for report-only columns).
    parcel_col_channel : ndarray of int (n_parcels, n_cols), optional
        Raster channel of each zone column for each parcel, where it depends on the parcel's class
        (derived easement strips with one width per land-use context); ``col_channel`` for every
        parcel when absent.
    """

    thresholds_pct: np.ndarray
    limit_index: np.ndarray
    near_index: np.ndarray
    raster_forbid_bits: np.ndarray
    zone_forbid_bits: np.ndarray
    area_factor: np.ndarray
    class_index: np.ndarray
    n_classes: int
    geom_parcel: np.ndarray
    geom_role: np.ndarray
    col_channel: np.ndarray
    col_zone: np.ndarray
    capability_limit_pct: float | None
    ground_factor: float = 1.0
    parcel_col_channel: np.ndarray | None = None

    @property
    def n_cols(self) -> int:
        return len(self.col_channel)

    def channel_table(self) -> np.ndarray:
        """(n_parcels, n_cols) int64 raster channel per parcel and column (built once, then cached)."""
        t = self.__dict__.get("_channel_table")
        if t is None:
            if self.parcel_col_channel is not None:
                t = np.ascontiguousarray(self.parcel_col_channel, dtype=np.int64)
            else:
                n = len(self.limit_index)
                t = np.ascontiguousarray(np.broadcast_to(self.col_channel.astype(np.int64), (n, self.n_cols)))
            object.__setattr__(self, "_channel_table", t)
        return t


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
    zone_m2: np.ndarray  # (k, n_cols)
    class_hist_m2: np.ndarray  # (n_classes, n_bins)
    land_m2: float
    land_within_m2: float


class Totals:
    """Whole-run accumulators; :meth:`add` merges one window.

    Sums are kept as 64-bit integer counts of :data:`AREA_QUANTUM_M2` (slope-area sums of
    :data:`SLOPE_AREA_QUANTUM`), so merging is exact and the order windows arrive in does not
    matter; the attributes read as float arrays in m² (m² x % for ``slope_area_sum``).
    """

    _AREA_FIELDS = (
        "covered_m2",
        "evaluated_m2",
        "over_m2",
        "conflict_m2",
        "near_conflict_m2",
        "slope_conflict_m2",
        "zone_m2",
        "class_hist_m2",
    )

    def __init__(self, n_parcels: int, n_thresholds: int, n_cols: int, n_classes: int):
        n = self.n_parcels = n_parcels
        self.n_thresholds = n_thresholds
        self.n_cols = n_cols
        self.n_classes = n_classes
        shapes = {
            "over_m2": (n, n_thresholds),
            "zone_m2": (n, n_cols),
            "class_hist_m2": (n_classes, len(HIST_EDGES_PCT) - 1),
        }
        self._q = {f: np.zeros(shapes.get(f, (n,)), np.int64) for f in self._AREA_FIELDS}
        self._q_slope = np.zeros(n, np.int64)
        self._q_land = 0
        self._q_land_within = 0
        self.slope_max_pct = np.full(n, np.nan)

    def __getattr__(self, name):
        q = self.__dict__.get("_q")
        if q is not None and name in q:
            # the float view is made once and kept until the next merge: callers index it per parcel
            # (verdicts.evaluate's reasons loop), and remaking the whole array per access was quadratic
            cache = self.__dict__.setdefault("_float_cache", {})
            if name not in cache:
                cache[name] = q[name] * AREA_QUANTUM_M2
            return cache[name]
        raise AttributeError(name)

    @property
    def slope_area_sum(self) -> np.ndarray:
        return self._q_slope * SLOPE_AREA_QUANTUM

    @property
    def land_m2(self) -> float:
        return float(self._q_land * AREA_QUANTUM_M2)

    @property
    def land_within_m2(self) -> float:
        return float(self._q_land_within * AREA_QUANTUM_M2)

    def rows(self, start: int, stop: int) -> Totals:
        """The sums of parcels ``start .. stop - 1`` as a Totals over the same integer arrays (views, no copy;
        the class histogram and land figures are the whole run's): float views of a slice of parcels only.
        Read it, do not merge into it."""
        t = Totals.__new__(Totals)
        t.n_parcels = stop - start
        t.n_thresholds, t.n_cols, t.n_classes = self.n_thresholds, self.n_cols, self.n_classes
        t._q = {f: q if f == "class_hist_m2" else q[start:stop] for f, q in self._q.items()}
        t._q_slope = self._q_slope[start:stop]
        t._q_land, t._q_land_within = self._q_land, self._q_land_within
        t.slope_max_pct = self.slope_max_pct[start:stop]
        return t

    def column_sums(self, field: str, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Sums over the parcels ``rows`` of the columns ``cols`` of a 2-D field, in m², one column at a time:
        the bits of ``view[rows][:, cols].sum(axis=0)`` (whose columns are contiguous runs, each summed on
        its own), without the whole float view or the selection of every column at once."""
        q = self._q[field]
        return np.array([(q[rows, c] * AREA_QUANTUM_M2).sum() for c in cols], dtype=np.float64)

    def add(self, s: WindowSums) -> None:
        self.__dict__.pop("_float_cache", None)
        p = s.parcels
        for f in self._AREA_FIELDS:
            if f == "class_hist_m2":
                self._q[f] += _to_quanta(s.class_hist_m2, AREA_QUANTUM_M2)
            else:
                self._q[f][p] += _to_quanta(getattr(s, f), AREA_QUANTUM_M2)
        self._q_slope[p] += _to_quanta(s.slope_area_sum, SLOPE_AREA_QUANTUM)
        self.slope_max_pct[p] = np.fmax(self.slope_max_pct[p], s.slope_max_pct)
        self._q_land += int(_to_quanta(s.land_m2, AREA_QUANTUM_M2))
        self._q_land_within += int(_to_quanta(s.land_within_m2, AREA_QUANTUM_M2))

    def to_arrays(self) -> dict:
        """The exact state (integer quanta) as arrays, e.g. for ``numpy.savez`` (see :meth:`add_part`)."""
        out = {f"q_{f}": v for f, v in self._q.items()}
        out["q_slope"] = self._q_slope
        out["slope_max_pct"] = self.slope_max_pct
        out["q_land"] = np.array([self._q_land, self._q_land_within], dtype=np.int64)
        return out

    def add_part(self, arrays, index: np.ndarray) -> None:
        """Merge the state of a run over a subset of the parcels (``to_arrays`` of a Totals whose parcel
        ``i`` is this run's parcel ``index[i]``): exact integer additions, so the order of parts is free."""
        self.__dict__.pop("_float_cache", None)
        index = np.asarray(index, dtype=np.int64)
        for f in self._AREA_FIELDS:
            q = np.asarray(arrays[f"q_{f}"], dtype=np.int64)
            if f == "class_hist_m2":
                self._q[f] += q
            else:
                self._q[f][index] += q
        self._q_slope[index] += np.asarray(arrays["q_slope"], dtype=np.int64)
        self.slope_max_pct[index] = np.fmax(self.slope_max_pct[index], arrays["slope_max_pct"])
        land = np.asarray(arrays["q_land"], dtype=np.int64)
        self._q_land += int(land[0])
        self._q_land_within += int(land[1])


def _no_pairs(plan: OverlayPlan, land_m2, land_within_m2) -> WindowSums:
    """The sums of a window that no parcel meets: only its whole-area land figures."""
    e = np.empty(0)
    return WindowSums(
        np.empty(0, np.int64),
        e,
        e,
        e,
        e,
        np.empty((0, len(plan.thresholds_pct))),
        e,
        e,
        e,
        np.empty((0, plan.n_cols)),
        np.zeros((plan.n_classes, len(HIST_EDGES_PCT) - 1)),
        land_m2,
        land_within_m2,
    )


def accumulate_window_reference(
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
        Raster-zone mask: bit c set where the cell lies in raster channel c.
    cell_area_m2 : ndarray (h,)
        Map-plane area of one cell of each window row (exact band area on geographic grids).
    candidates : ndarray of int
        Global geometry indices passed to the coverage step, in the order of ``triplets[0]``.
    triplets : tuple
        ``(feature_index, row, col, fraction)`` from :func:`landcheck.overlay.coverage.coverage_triplets`;
        feature_index indexes ``candidates``.
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
    land_m2, land_within_m2 = _land_sums(slope_pct, cell_area_m2, plan, land_mask)
    conflict_tile = np.full((h, w), CONFLICT_OUTSIDE, np.uint8)
    n_t = len(plan.thresholds_pct)
    nb = len(HIST_EDGES_PCT) - 1
    if fi.size == 0:
        return _no_pairs(plan, land_m2, land_within_m2), conflict_tile

    gi = candidates[fi]
    gp = plan.geom_parcel[gi]  # parcel of each pair
    role = plan.geom_role[gi]
    local_ids, local = np.unique(gp, return_inverse=True)
    k = len(local_ids)
    s = slope_pct[rr, cc].astype(np.float64)
    valid = np.isfinite(s)
    a = quantize_area(frac * cell_area_m2[rr] * plan.area_factor[gp])
    reach = np.searchsorted(plan.thresholds_pct, np.where(valid, s, -np.inf), side="right")  # thresholds <= s
    li = plan.limit_index[gp]
    ni = plan.near_index[gp]
    slope_breach = valid & (li >= 0) & (reach > li)
    slope_near = valid & (ni >= 0) & (reach > ni)
    zb = zone_bits[rr, cc] if zone_bits is not None else np.zeros(fi.shape, np.uint32)
    raster_breach = (zb & plan.raster_forbid_bits[gp]) != 0
    cell_breach = slope_breach | raster_breach
    cell_near = slope_near | raster_breach

    is_p = role == ROLE_PARCEL
    lp, ap, vp = local[is_p], a[is_p], valid[is_p]
    avp = np.where(vp, ap, 0.0)
    sp = np.where(vp, s[is_p], 0.0)
    covered = np.bincount(lp, weights=ap, minlength=k)
    evaluated = np.bincount(lp, weights=avp, minlength=k)
    slope_sum = np.bincount(
        lp, weights=np.rint(avp * sp * (1.0 / SLOPE_AREA_QUANTUM)) * SLOPE_AREA_QUANTUM, minlength=k
    )
    smax = np.full(k, -np.inf)
    np.maximum.at(smax, lp[vp], s[is_p][vp])
    smax[np.isneginf(smax)] = np.nan
    over = np.zeros((k, n_t + 1))
    np.add.at(over, (lp, reach[is_p]), avp)
    # over[:, j] = area reaching exactly j thresholds -> cumulative from the top
    over_m2 = np.cumsum(over[:, ::-1], axis=1)[:, ::-1][:, 1:]

    # breach of the parcel's own rule: cells over its slope limit or in a forbidden raster zone (exact
    # coverage), plus the part of its forbidden vector-zone piece lying on cells not already counted
    is_f = role == ROLE_FORBIDDEN_PIECE
    conflict = np.bincount(lp, weights=ap * cell_breach[is_p], minlength=k)
    conflict += np.bincount(local[is_f], weights=a[is_f] * ~cell_breach[is_f], minlength=k)
    near_conflict = np.bincount(lp, weights=ap * cell_near[is_p], minlength=k)
    near_conflict += np.bincount(local[is_f], weights=a[is_f] * ~cell_near[is_f], minlength=k)
    slope_conflict = np.bincount(lp, weights=avp * slope_breach[is_p], minlength=k)

    zone_m2 = np.zeros((k, plan.n_cols))
    table = plan.channel_table()
    for c in range(plan.n_cols):
        ch = plan.col_channel[c]
        if ch >= 0:
            chp = table[gp[is_p], c].astype(np.uint32)
            inz = ((zb[is_p] >> chp) & np.uint32(1)).astype(bool)
            zone_m2[:, c] = np.bincount(lp, weights=ap * inz, minlength=k)
        else:
            sel = role == c
            zone_m2[:, c] = np.bincount(local[sel], weights=a[sel], minlength=k)

    # per-class slope histogram of classified land
    ci = plan.class_index[gp[is_p]]
    has_class = vp & (ci >= 0)
    sv = s[is_p][has_class]
    bins = np.clip(np.searchsorted(HIST_EDGES_PCT, sv, side="right") - 1, 0, nb - 1)
    hist = np.bincount(ci[has_class] * nb + bins, weights=ap[has_class], minlength=plan.n_classes * nb)
    hist = hist.reshape(plan.n_classes, nb)

    # conflict raster: each cell shows the parcel covering most of it (ties: lower parcel index)
    pidx = np.flatnonzero(is_p)
    order = pidx[np.lexsort((gp[pidx], -frac[pidx]))]
    cell = rr.astype(np.int64) * w + cc
    _, first = np.unique(cell[order], return_index=True)
    pick = order[first]
    bits = slope_breach[pick].astype(np.uint32)
    for c in range(plan.n_cols):
        z = plan.col_zone[c]
        if z < 0:
            continue
        forb = ((plan.zone_forbid_bits[gp] >> np.uint32(z)) & np.uint32(1)).astype(bool)
        ch = plan.col_channel[c]
        if ch >= 0:
            chp = table[gp[pick], c].astype(np.uint32)
            hit = forb[pick] & (((zb[pick] >> chp) & np.uint32(1)) == 1)
            bits[hit] |= np.uint32(1 << (z + 1))
        else:
            sel = (role == c) & forb
            pc = cell[sel]
            hit = np.isin(cell[pick], pc)
            bits[hit] |= np.uint32(1 << (z + 1))
    conflict_tile[rr[pick], cc[pick]] = bits.astype(np.uint8)

    sums = WindowSums(
        local_ids,
        covered,
        evaluated,
        slope_sum,
        smax,
        over_m2,
        conflict,
        near_conflict,
        slope_conflict,
        zone_m2,
        hist,
        land_m2,
        land_within_m2,
    )
    return sums, conflict_tile


def _land_sums(slope_pct, cell_area_m2, plan: OverlayPlan, land_mask, counts=None):
    """Land area of the window (cells with a slope, inside ``land_mask``) and the part under the
    capability limit, in m2: exact per-row cell counts times the row's ground cell area."""
    if counts is None:
        counts = _land_counts(slope_pct, land_mask, plan.capability_limit_pct)
    # each row's cell area rounded to the quantum first: times an integer count it stays an exact
    # multiple, so the window's sum is exact whatever columns and rows the window holds
    row_q = _to_quanta(quantize_area(cell_area_m2 * plan.ground_factor), AREA_QUANTUM_M2)
    land_m2 = float(int((row_q * counts[0].astype(np.int64)).sum()) * AREA_QUANTUM_M2)
    land_within_m2 = (
        float(int((row_q * counts[1].astype(np.int64)).sum()) * AREA_QUANTUM_M2)
        if plan.capability_limit_pct is not None
        else 0.0
    )
    return land_m2, land_within_m2


def _land_counts(slope_pct, land_mask, limit_pct):
    land = np.isfinite(slope_pct) if land_mask is None else (np.isfinite(slope_pct) & land_mask)
    # compared in float64, as the compiled loop does (a float32 comparison would round the limit first)
    within = land & (slope_pct < np.float64(limit_pct)) if limit_pct is not None else np.zeros_like(land)
    return np.stack([np.count_nonzero(land, axis=1), np.count_nonzero(within, axis=1)]).astype(np.float64)


_scratch = threading.local()


def _thread_scratch(n_cells: int):
    """This thread's per-cell scratch for the compiled reduction (the kernel leaves it reset)."""
    have = getattr(_scratch, "arrays", None)
    if have is None or have[0].shape[0] < n_cells:
        have = (np.full(n_cells, -np.inf), np.full(n_cells, -1, np.int64), np.zeros(n_cells, np.uint32))
        _scratch.arrays = have
    return have


def accumulate_window(
    slope_pct: np.ndarray,
    zone_bits: np.ndarray | None,
    cell_area_m2: np.ndarray,
    candidates: np.ndarray,
    triplets: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    plan: OverlayPlan,
    land_mask: np.ndarray | None = None,
) -> tuple[WindowSums, np.ndarray]:
    """:func:`accumulate_window_reference` as one compiled pass over the pairs; identical results.

    Same parameters and returns as :func:`accumulate_window_reference`.  The triplets must be
    grouped by feature (runs of equal feature index), as
    :func:`landcheck.overlay.coverage.coverage_triplets` returns them.
    """
    from landcheck.overlay import reduction_loops as _overlay_compiled

    h, w = slope_pct.shape
    fi, rr, cc, frac = triplets
    slope_pct = np.ascontiguousarray(slope_pct, dtype=np.float32)
    has_land_mask = land_mask is not None
    lm = np.ascontiguousarray(land_mask, dtype=np.bool_) if has_land_mask else np.zeros((1, 1), np.bool_)
    limit = plan.capability_limit_pct
    counts = _overlay_compiled.land_counts(slope_pct, lm, has_land_mask, np.inf if limit is None else float(limit))
    land_m2, land_within_m2 = _land_sums(slope_pct, cell_area_m2, plan, land_mask, counts)
    conflict_tile = np.full((h, w), CONFLICT_OUTSIDE, np.uint8)
    if len(fi) == 0:
        return _no_pairs(plan, land_m2, land_within_m2), conflict_tile
    has_zones = zone_bits is not None
    zb = np.ascontiguousarray(zone_bits, dtype=np.uint32) if has_zones else np.zeros((1, 1), np.uint32)
    try:
        out = _accumulate(
            slope_pct, zb, has_zones, cell_area_m2, candidates, fi, rr, cc, frac, plan, conflict_tile, h * w
        )
    except BaseException:
        _scratch.arrays = None  # the kernel may have stopped before resetting it
        raise
    sums = WindowSums(*out, land_m2, land_within_m2)
    return sums, conflict_tile


def _accumulate(slope_pct, zb, has_zones, cell_area_m2, candidates, fi, rr, cc, frac, plan, conflict_tile, n_cells):
    from landcheck.overlay import reduction_loops as _overlay_compiled

    return _overlay_compiled.accumulate_pairs(
        slope_pct,
        zb,
        has_zones,
        np.ascontiguousarray(cell_area_m2, dtype=np.float64),
        np.asarray(candidates, dtype=np.int64),
        np.asarray(fi, dtype=np.int64),
        np.asarray(rr, dtype=np.int32),
        np.asarray(cc, dtype=np.int32),
        np.asarray(frac, dtype=np.float64),
        plan.geom_parcel.astype(np.int64, copy=False),
        plan.geom_role.astype(np.int64, copy=False),
        np.asarray(plan.thresholds_pct, dtype=np.float64),
        plan.limit_index.astype(np.int64, copy=False),
        plan.near_index.astype(np.int64, copy=False),
        plan.raster_forbid_bits.astype(np.uint32, copy=False),
        plan.zone_forbid_bits.astype(np.uint32, copy=False),
        np.asarray(plan.area_factor, dtype=np.float64),
        plan.class_index.astype(np.int64, copy=False),
        int(plan.n_classes),
        plan.col_channel.astype(np.int64, copy=False),
        plan.channel_table(),
        plan.col_zone.astype(np.int64, copy=False),
        HIST_EDGES_PCT,
        conflict_tile,
        *_thread_scratch(n_cells),
    )
