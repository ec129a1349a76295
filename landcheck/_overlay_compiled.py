"""Compiled (numba) window reduction: the loop behind :func:`landcheck.overlay.accumulate_window_compiled`.

One pass over the (geometry, cell, fraction) triplets of a window adds every
pair straight into per-parcel accumulators, in the order of the triplets, with
the same arithmetic as the NumPy reference :func:`landcheck.overlay.accumulate_window`
(``np.bincount`` and ``np.add.at`` also add in input order), so the two give
bit-identical sums (tests check this).  The loop releases the GIL, so worker
threads run windows side by side.

Imported only when the compiled path is used; functions are module-level so
numba caches their machine code on disk.
"""

from __future__ import annotations

import numba
import numpy as np

_ROLE_PARCEL = -2
_ROLE_FORBIDDEN_PIECE = -1


@numba.njit(cache=True, nogil=True, inline="always")
def _count_le(sorted_values, x):
    """Number of entries of ``sorted_values`` that are <= x (``np.searchsorted(..., side="right")``)."""
    lo = 0
    hi = sorted_values.shape[0]
    while lo < hi:
        mid = (lo + hi) >> 1
        if sorted_values[mid] <= x:
            lo = mid + 1
        else:
            hi = mid
    return lo


@numba.njit(cache=True, nogil=True, inline="always")
def _hist_bin(edges, x, nb):
    """``clip(searchsorted(edges, x, "right") - 1, 0, nb - 1)``, starting from a guess for unit-wide bins."""
    b = min(max(int(x - edges[0]), 0), nb - 1) if x - edges[0] < nb else nb - 1
    while b > 0 and edges[b] > x:
        b -= 1
    while b + 1 < nb and edges[b + 1] <= x:
        b += 1
    return b


@numba.njit(cache=True, nogil=True)
def accumulate_pairs(slope_pct, zone_bits, has_zones, cell_area_m2, candidates, fi, rr, cc, frac,
                     geom_parcel, geom_role, thresholds_pct, limit_index, near_index, raster_forbid_bits,
                     zone_forbid_bits, area_factor, class_index, n_classes, col_channel, col_zone, hist_edges_pct,
                     conflict_tile, best_frac, best_parcel, vector_bits):
    """Per-parcel sums of one window; fills ``conflict_tile`` (h, w) in place (it must hold 255 on entry).

    ``best_frac`` (-inf), ``best_parcel`` (-1) and ``vector_bits`` (0) are (h, w) scratch arrays
    with those values on entry; the caller allocates them with NumPy, whose large allocations
    get transparent huge pages (an allocation inside the compiled code page-faults 4 KiB at a
    time, which costs more than the whole reduction of a window).

    Triplets ``fi, rr, cc, frac`` are grouped by feature (runs of equal ``fi``), as the coverage
    kernel emits them.  Returns ``(parcels, covered, evaluated, slope_sum, slope_max, over_m2,
    conflict, near_conflict, slope_conflict, zone_m2, class_hist)``; see ``overlay.WindowSums``.
    """
    n = fi.shape[0]
    h, w = slope_pct.shape
    n_t = thresholds_pct.shape[0]
    n_cols = col_channel.shape[0]
    nb = hist_edges_pct.shape[0] - 1

    # ---- runs of one feature -> their parcel; local parcel numbers in ascending parcel order
    n_runs = 0
    for i in range(n):
        if i == 0 or fi[i] != fi[i - 1]:
            n_runs += 1
    run_parcel = np.empty(n_runs, np.int64)
    run_role = np.empty(n_runs, np.int64)
    r = -1
    for i in range(n):
        if i == 0 or fi[i] != fi[i - 1]:
            r += 1
            g = candidates[fi[i]]
            run_parcel[r] = geom_parcel[g]
            run_role[r] = geom_role[g]
    parcels = np.unique(run_parcel)
    run_local = np.searchsorted(parcels, run_parcel)
    k = parcels.shape[0]

    covered = np.zeros(k)
    evaluated = np.zeros(k)
    slope_sum = np.zeros(k)
    slope_max = np.full(k, -np.inf)
    over = np.zeros((k, n_t + 1))
    conflict_p = np.zeros(k)
    conflict_f = np.zeros(k)
    near_p = np.zeros(k)
    near_f = np.zeros(k)
    slope_conflict = np.zeros(k)
    zone_m2 = np.zeros((k, n_cols))
    hist = np.zeros((n_classes, nb))

    r = -1
    for i in range(n):
        if i == 0 or fi[i] != fi[i - 1]:
            r += 1
        gp = run_parcel[r]
        loc = run_local[r]
        role = run_role[r]
        row = rr[i]
        col = cc[i]
        s = np.float64(slope_pct[row, col])
        valid = np.isfinite(s)
        a = frac[i] * cell_area_m2[row] * area_factor[gp]
        reach = _count_le(thresholds_pct, s) if valid else 0
        li = limit_index[gp]
        ni = near_index[gp]
        slope_breach = valid and li >= 0 and reach > li
        slope_near = valid and ni >= 0 and reach > ni
        zb = zone_bits[row, col] if has_zones else np.uint32(0)
        raster_breach = (zb & raster_forbid_bits[gp]) != 0
        cell_breach = slope_breach or raster_breach
        cell_near = slope_near or raster_breach
        if role == _ROLE_PARCEL:
            covered[loc] += a
            if valid:
                evaluated[loc] += a
                slope_sum[loc] += a * s
                if s > slope_max[loc]:
                    slope_max[loc] = s
                over[loc, reach] += a
                if slope_breach:
                    slope_conflict[loc] += a
                ci = class_index[gp]
                if ci >= 0:
                    hist[ci, _hist_bin(hist_edges_pct, s, nb)] += a
            if cell_breach:
                conflict_p[loc] += a
            if cell_near:
                near_p[loc] += a
            for c in range(n_cols):
                ch = col_channel[c]
                if ch >= 0 and ((zb >> ch) & 1) == 1:
                    zone_m2[loc, c] += a
            f = frac[i]
            if f > best_frac[row, col] or (f == best_frac[row, col] and gp < best_parcel[row, col]):
                best_frac[row, col] = f
                best_parcel[row, col] = gp
        elif role == _ROLE_FORBIDDEN_PIECE:
            if not cell_breach:
                conflict_f[loc] += a
            if not cell_near:
                near_f[loc] += a
        elif role >= 0:
            if col_channel[role] < 0:
                zone_m2[loc, role] += a
            z = col_zone[role]
            if z >= 0 and ((zone_forbid_bits[gp] >> z) & 1) == 1:
                vector_bits[row, col] |= np.uint32(1 << (z + 1))

    # ---- conflict raster: the parcel covering most of each cell (ties: lower parcel index)
    for row in range(h):
        for col in range(w):
            p = best_parcel[row, col]
            if p < 0:
                continue
            s = np.float64(slope_pct[row, col])
            bits = np.uint32(0)
            li = limit_index[p]
            if np.isfinite(s) and li >= 0 and _count_le(thresholds_pct, s) > li:
                bits |= np.uint32(1)
            if has_zones:
                zb = zone_bits[row, col]
                for c in range(n_cols):
                    z = col_zone[c]
                    ch = col_channel[c]
                    if z >= 0 and ch >= 0 and ((zone_forbid_bits[p] >> z) & 1) == 1 and ((zb >> ch) & 1) == 1:
                        bits |= np.uint32(1 << (z + 1))
            bits |= vector_bits[row, col]
            conflict_tile[row, col] = np.uint8(bits)

    # ---- cumulative over-areas from the top threshold down (the reference's reversed cumsum)
    over_m2 = np.zeros((k, n_t))
    for loc in range(k):
        acc = 0.0
        for m in range(n_t, 0, -1):
            acc += over[loc, m]
            over_m2[loc, m - 1] = acc
        if slope_max[loc] == -np.inf:
            slope_max[loc] = np.nan
    conflict = conflict_p + conflict_f
    near_conflict = near_p + near_f
    return (parcels, covered, evaluated, slope_sum, slope_max, over_m2, conflict, near_conflict, slope_conflict,
            zone_m2, hist)


@numba.njit(cache=True, nogil=True)
def land_counts(slope_pct, land_mask, has_land_mask, limit_pct):
    """Per row: cells with a slope (inside ``land_mask`` when given) and those of them under ``limit_pct``.

    Returns a (2, h) float64 array of exact counts (see ``overlay._land_counts``).
    """
    h, w = slope_pct.shape
    out = np.zeros((2, h))
    for row in range(h):
        n_land = 0
        n_within = 0
        for col in range(w):
            s = slope_pct[row, col]
            if np.isfinite(s) and (not has_land_mask or land_mask[row, col]):
                n_land += 1
                if s < limit_pct:
                    n_within += 1
        out[0, row] = n_land
        out[1, row] = n_within
    return out
