"""Benchmark the exact cell-coverage kernel against exactextract on the same parcels.

Random parcels of 0.1-13 ha (rotated, slightly irregular quadrilaterals and
hexagons) are scattered over a 10 m grid sized so that they cover it about
once.  For each parcel count the script times

* ``prepare_polygons`` (NumPy flattening, once per parcel set),
* ``coverage_triplets`` window by window on one thread (the kernel),
* the same windows on a thread pool (the kernel releases the GIL),
* exactextract 'cell_id' + 'coverage' on the whole grid,

and prints features/s and covered cells/s, plus the largest difference in
per-parcel covered area between the two tools.

Usage: python scripts/bench_coverage.py [--counts 5000 50000] [--window 1024] [--threads 2] [--repeat 3]

Times are wall-clock; on a shared machine take the best of several repeats.
"""

from __future__ import annotations

import argparse
import math
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import shapely
from affine import Affine

from landcheck.geo.grid import Window, iter_windows
from landcheck.overlay.coverage import coverage_triplets, prepare_polygons

CELL_M = 10.0
ORIGIN_X_M = 500_000.0
ORIGIN_Y_M = 1_500_000.0
CRS = "EPSG:32651"


def random_parcels(n: int, seed: int) -> tuple[np.ndarray, int]:
    """``n`` parcels of 0.1-13 ha and the side (cells) of a square grid they cover about once."""
    rng = np.random.default_rng(seed)
    area_m2 = rng.uniform(0.1e4, 13e4, n)
    side = math.ceil(math.sqrt(area_m2.sum()) / CELL_M)
    n_vert = rng.choice([4, 6], n)
    aspect = rng.uniform(1.0, 3.0, n)
    angle = rng.uniform(0, np.pi, n)
    cx = ORIGIN_X_M + rng.uniform(0, side * CELL_M, n)
    cy = ORIGIN_Y_M - rng.uniform(0, side * CELL_M, n)
    geoms = np.empty(n, dtype=object)
    for k in range(n):
        t = np.linspace(0, 2 * np.pi, n_vert[k], endpoint=False) + rng.uniform(-0.15, 0.15, n_vert[k])
        px = np.cos(t) * aspect[k]
        py = np.sin(t)
        ca, sa = math.cos(angle[k]), math.sin(angle[k])
        ring = np.column_stack([ca * px - sa * py, sa * px + ca * py])
        poly = shapely.Polygon(ring)
        scale = math.sqrt(area_m2[k] / poly.area)
        geoms[k] = shapely.Polygon(ring * scale + [cx[k], cy[k]])
    return geoms, side


def run_landcheck(prepared, transform: Affine, side: int, window: int, threads: int):
    wins = list(iter_windows(side, side, window))

    n = prepared.n_features

    def task(win: Window):
        # what an audit does per window: triplets -> per-parcel sums, then drop the triplets
        t = transform * Affine.translation(win.col_off, win.row_off)
        trip = coverage_triplets(prepared, t, win.height, win.width)
        return trip.fraction.size, np.bincount(trip.feature_index, weights=trip.fraction, minlength=n)

    if threads == 1:
        return [task(w) for w in wins]
    with ThreadPoolExecutor(threads) as pool:
        return list(pool.map(task, wins))


def per_feature_cells(results, n: int) -> np.ndarray:
    total = np.zeros(n)
    for _, sums in results:
        total += sums
    return total


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--counts", type=int, nargs="+", default=[5000, 50000])
    ap.add_argument("--window", type=int, default=1024, help="window side in cells")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=3, help="time each landcheck run this many times, keep the best")
    ap.add_argument("--no-exactextract", action="store_true")
    args = ap.parse_args()

    # compile / load the cached kernel outside the timings
    coverage_triplets([shapely.box(0, 0, 1, 1)], Affine(1, 0, 0, 0, -1, 1), 1, 1)

    for n in args.counts:
        geoms, side = random_parcels(n, seed=n)
        transform = Affine(CELL_M, 0, ORIGIN_X_M, 0, -CELL_M, ORIGIN_Y_M)
        print(
            f"\n{n} parcels, 0.1-13 ha, on {side} x {side} cells of {CELL_M:g} m "
            f"({side * side / 1e6:.1f} M cells), windows {args.window} x {args.window}"
        )

        t0 = time.perf_counter()
        prepared = prepare_polygons(geoms)
        t_prep = time.perf_counter() - t0

        t_one = math.inf
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            res = run_landcheck(prepared, transform, side, args.window, 1)
            t_one = min(t_one, time.perf_counter() - t0)
        n_trip = sum(k for k, _ in res)

        t_pool = math.inf
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            run_landcheck(prepared, transform, side, args.window, args.threads)
            t_pool = min(t_pool, time.perf_counter() - t0)

        print(f"  prepare_polygons          {t_prep:8.3f} s  {n / t_prep:12,.0f} features/s")
        print(
            f"  coverage, 1 thread        {t_one:8.3f} s  {n / t_one:12,.0f} features/s "
            f"{n_trip / t_one:14,.0f} cells/s   ({n_trip:,} covered cells)"
        )
        print(
            f"  coverage, {args.threads} threads       {t_pool:8.3f} s  {n / t_pool:12,.0f} features/s "
            f"{n_trip / t_pool:14,.0f} cells/s"
        )
        t_total = t_prep + t_one
        print(f"  prepare + 1 thread        {t_total:8.3f} s  {n / t_total:12,.0f} features/s")

        if args.no_exactextract:
            continue
        import exactextract
        import geopandas as gpd
        import pyproj
        from exactextract.raster import NumPyRasterSource

        gdf = gpd.GeoDataFrame(geometry=geoms, crs=CRS)
        src = NumPyRasterSource(
            np.zeros((side, side), dtype=np.float32),
            ORIGIN_X_M,
            ORIGIN_Y_M - side * CELL_M,
            ORIGIN_X_M + side * CELL_M,
            ORIGIN_Y_M,
            srs_wkt=pyproj.CRS(CRS).to_wkt(),
        )
        t0 = time.perf_counter()
        ee = exactextract.exact_extract(src, gdf, ["cell_id", "coverage"], output="pandas")
        t_ee = time.perf_counter() - t0
        ee_cells = sum(len(c) for c in ee["coverage"])
        print(
            f"  exactextract              {t_ee:8.3f} s  {n / t_ee:12,.0f} features/s "
            f"{ee_cells / t_ee:14,.0f} cells/s   ({ee_cells:,} covered cells)"
        )
        ours = per_feature_cells(res, n)
        theirs = np.array([float(np.sum(c)) for c in ee["coverage"]])
        print(
            f"  max |per-parcel covered cells difference| = {np.max(np.abs(ours - theirs)):.2e} cells "
            f"(exactextract stores fractions as float32)"
        )
        print(f"  speed-up (1 thread vs exactextract): {t_ee / t_one:.1f}x")


if __name__ == "__main__":
    main()
