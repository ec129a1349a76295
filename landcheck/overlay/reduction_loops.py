"""Compiled (numba) window reduction: the loop behind :func:`landcheck.overlay.sums.accumulate_window`.

One pass over the (geometry, cell, fraction) triplets of a window adds every
pair, rounded to a fixed quantum (so sums are exact and independent of their
order; :data:`landcheck.overlay.sums.AREA_QUANTUM_M2`), straight into per-parcel
accumulators, in the order of the triplets, with
the same arithmetic as the NumPy reference :func:`landcheck.overlay.sums.accumulate_window_reference`
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
# fixed-point quanta of the pair terms (see landcheck.overlay.sums.AREA_QUANTUM_M2); numba folds them in
_AREA_SCALE = 2.0**20
_AREA_QUANTUM = 2.0**-20
_SLOPE_AREA_SCALE = 2.0**20
_SLOPE_AREA_QUANTUM = 2.0**-20


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True)
def _hist_bin(edges, x, nb):
    """``clip(searchsorted(edges, x, "right") - 1, 0, nb - 1)``, starting from a guess for unit-wide bins."""
    b = min(max(int(x - edges[0]), 0), nb - 1) if x - edges[0] < nb else nb - 1
    while b > 0 and edges[b] > x:
        b -= 1
    while b + 1 < nb and edges[b + 1] <= x:
        b += 1
    return b


@numba.njit(cache=True, nogil=True)
def accumulate_pairs(
    slope_pct,
    zone_bits,
    has_zones,
    cell_area_m2,
    candidates,
    fi,
    rr,
    cc,
    frac,
    geom_parcel,
    geom_role,
    thresholds_pct,
    limit_index,
    near_index,
    raster_forbid_bits,
    zone_forbid_bits,
    area_factor,
    class_index,
    n_classes,
    col_channel,
    parcel_col_channel,
    col_zone,
    hist_edges_pct,
    conflict_tile,
    best_frac,
    best_parcel,
    vector_bits,
):
    """Per-parcel sums of one window; fills ``conflict_tile`` (h, w) in place (it must hold 255 on entry).

    ``best_frac`` (-inf), ``best_parcel`` (-1) and ``vector_bits`` (0) are flat scratch arrays of
    at least h * w cells holding those values on entry; they are left holding them again on
    return, so a worker thread keeps one set for all its windows (fresh allocations for every
    window page-fault 4 KiB at a time, which costs more than the reduction itself).

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
    run_start = np.empty(n_runs + 1, np.int64)
    run_parcel = np.empty(n_runs, np.int64)
    run_role = np.empty(n_runs, np.int64)
    r = -1
    for i in range(n):
        if i == 0 or fi[i] != fi[i - 1]:
            r += 1
            run_start[r] = i
            g = candidates[fi[i]]
            run_parcel[r] = geom_parcel[g]
            run_role[r] = geom_role[g]
    run_start[n_runs] = n
    # distinct parcels in ascending order, and each run's position among them (np.unique, np.sort
    # and np.searchsorted written out: the generic versions more than double this function's compile
    # time).  Insertion sort: runs arrive almost sorted (the parcels' own geometries come first, in
    # parcel order), so it costs about one pass.
    ordered = run_parcel.copy()
    for r in range(1, n_runs):
        v = ordered[r]
        j = r - 1
        while j >= 0 and ordered[j] > v:
            ordered[j + 1] = ordered[j]
            j -= 1
        ordered[j + 1] = v
    k = 0
    for r in range(n_runs):
        if r == 0 or ordered[r] != ordered[r - 1]:
            ordered[k] = ordered[r]
            k += 1
    parcels = ordered[:k].copy()
    run_local = np.empty(n_runs, np.int64)
    for r in range(n_runs):
        lo = 0
        hi = k
        while lo < hi:  # first position whose parcel is >= run_parcel[r] (it is equal: the parcel is there)
            mid = (lo + hi) >> 1
            if parcels[mid] < run_parcel[r]:
                lo = mid + 1
            else:
                hi = mid
        run_local[r] = lo

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

    # Every sum below adds its terms in triplet order, as the reference's np.bincount does; a parcel's
    # own geometry is one run, so its sums can live in local variables for the length of the run.
    for r in range(n_runs):
        gp = run_parcel[r]
        loc = run_local[r]
        role = run_role[r]
        af = area_factor[gp]
        li = limit_index[gp]
        ni = near_index[gp]
        # "reach > li" (li thresholds or more are <= s) is "s >= thresholds[li]"
        limit_s = thresholds_pct[li] if li >= 0 else np.inf
        near_s = thresholds_pct[ni] if ni >= 0 else np.inf
        rforbid = raster_forbid_bits[gp]
        i0 = run_start[r]
        i1 = run_start[r + 1]
        if role == _ROLE_PARCEL:
            ci = class_index[gp]
            cov_acc = covered[loc]
            eval_acc = evaluated[loc]
            sum_acc = slope_sum[loc]
            max_acc = slope_max[loc]
            sc_acc = slope_conflict[loc]
            cp_acc = conflict_p[loc]
            np_acc = near_p[loc]
            for i in range(i0, i1):
                row = rr[i]
                col = cc[i]
                cell = row * w + col
                f = frac[i]
                s = np.float64(slope_pct[row, col])
                a = np.rint(f * cell_area_m2[row] * af * _AREA_SCALE) * _AREA_QUANTUM
                valid = np.isfinite(s)
                zb = zone_bits[row, col] if has_zones else np.uint32(0)
                raster_breach = (zb & rforbid) != 0
                slope_breach = valid and s >= limit_s
                cov_acc += a
                if valid:
                    eval_acc += a
                    sum_acc += np.rint(a * s * _SLOPE_AREA_SCALE) * _SLOPE_AREA_QUANTUM
                    max_acc = max(max_acc, s)
                    over[loc, _count_le(thresholds_pct, s)] += a
                    if slope_breach:
                        sc_acc += a
                    if ci >= 0:
                        hist[ci, _hist_bin(hist_edges_pct, s, nb)] += a
                if slope_breach or raster_breach:
                    cp_acc += a
                if (valid and s >= near_s) or raster_breach:
                    np_acc += a
                if has_zones:
                    for c in range(n_cols):
                        ch = parcel_col_channel[gp, c]
                        if ch >= 0 and ((zb >> ch) & 1) == 1:
                            zone_m2[loc, c] += a
                if f > best_frac[cell] or (f == best_frac[cell] and gp < best_parcel[cell]):
                    best_frac[cell] = f
                    best_parcel[cell] = gp
            covered[loc] = cov_acc
            evaluated[loc] = eval_acc
            slope_sum[loc] = sum_acc
            slope_max[loc] = max_acc
            slope_conflict[loc] = sc_acc
            conflict_p[loc] = cp_acc
            near_p[loc] = np_acc
        elif role == _ROLE_FORBIDDEN_PIECE:
            for i in range(i0, i1):
                row = rr[i]
                col = cc[i]
                s = np.float64(slope_pct[row, col])
                a = np.rint(frac[i] * cell_area_m2[row] * af * _AREA_SCALE) * _AREA_QUANTUM
                valid = np.isfinite(s)
                zb = zone_bits[row, col] if has_zones else np.uint32(0)
                raster_breach = (zb & rforbid) != 0
                if not ((valid and s >= limit_s) or raster_breach):
                    conflict_f[loc] += a
                if not ((valid and s >= near_s) or raster_breach):
                    near_f[loc] += a
        elif role >= 0:
            vector_column = col_channel[role] < 0
            z = col_zone[role]
            bit = np.uint32(1 << (z + 1)) if z >= 0 and ((zone_forbid_bits[gp] >> z) & 1) == 1 else np.uint32(0)
            for i in range(i0, i1):
                row = rr[i]
                col = cc[i]
                cell = row * w + col
                if vector_column:
                    zone_m2[loc, role] += np.rint(frac[i] * cell_area_m2[row] * af * _AREA_SCALE) * _AREA_QUANTUM
                vector_bits[cell] |= bit

    # ---- conflict raster: the parcel covering most of each cell (ties: lower parcel index)
    for row in range(h):
        for col in range(w):
            cell = row * w + col
            p = best_parcel[cell]
            vbits = vector_bits[cell]
            if vbits != 0:
                vector_bits[cell] = 0
            if p < 0:
                continue
            best_parcel[cell] = -1
            best_frac[cell] = -np.inf
            s = np.float64(slope_pct[row, col])
            bits = np.uint32(0)
            li = limit_index[p]
            if np.isfinite(s) and li >= 0 and s >= thresholds_pct[li]:
                bits |= np.uint32(1)
            if has_zones:
                zb = zone_bits[row, col]
                for c in range(n_cols):
                    z = col_zone[c]
                    ch = parcel_col_channel[p, c]
                    if z >= 0 and ch >= 0 and ((zone_forbid_bits[p] >> z) & 1) == 1 and ((zb >> ch) & 1) == 1:
                        bits |= np.uint32(1 << (z + 1))
            bits |= vbits
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
    return (
        parcels,
        covered,
        evaluated,
        slope_sum,
        slope_max,
        over_m2,
        conflict,
        near_conflict,
        slope_conflict,
        zone_m2,
        hist,
    )


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
