#!/usr/bin/env python3
"""Time the Monte Carlo verdict confidence (landcheck.verdicts.confidence) and check it scales linearly in N.

Builds a synthetic hilly DEM (default 1000 x 1000 cells of 10 m) around the fictional town of
Alderwane and a grid of zoned parcels (default 400), runs the audit's own preparation and window
pass once for the baseline verdicts, then times ``run_confidence`` for each N given (default 25,
50, 100) and prints wall seconds, seconds per realization and the CPU seconds used (this process
plus its worker processes).  Data go to a temporary folder.

    python scripts/bench_confidence.py --workers 2
    python scripts/bench_confidence.py --size 2000 --parcels 1600 --realizations 10 20
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

CELL_M = 10.0
ORIGIN = (612000.0, 1874000.0)  # an arbitrary point in a UTM zone; the place is fictional
CRS = "EPSG:32651"
RULES = """
[rulebook]
title = "Alderwane benchmark rulebook"
class_field = "zoning"
id_field = "pid"

[classes.residential]
values = ["RES"]
max_slope_pct = 18
tolerance_pct = 10
designated_class = "forest"

[classes.farmland]
values = ["AGR"]
max_slope_pct = 30
tolerance_pct = 10
designated_class = "forest"

[classes.forest]
values = ["FOR"]
development = false
"""


def make_inputs(folder: Path, size: int, n_parcels: int, seed: int = 7) -> tuple[Path, Path, Path]:
    """A hilly DEM (sum of Gaussian hills), a square grid of parcels and the rulebook."""
    import geopandas as gpd
    import rasterio
    import shapely
    from rasterio.transform import from_origin

    rng = np.random.default_rng(seed)
    x = (np.arange(size) + 0.5) * CELL_M
    z = np.zeros((size, size))
    span = size * CELL_M
    for _ in range(max(8, size // 30)):
        cx, cy = rng.uniform(0, span, 2)
        s = rng.uniform(0.03, 0.15) * span
        amp = rng.uniform(0.15, 0.6) * s  # peak gradients of roughly 9-36 %
        z += amp * np.exp(-((x[None, :] - cx) ** 2 + (x[:, None] - cy) ** 2) / (2 * s * s))
    dem = folder / "alderwane_dem.tif"
    with rasterio.open(
        dem,
        "w",
        driver="GTiff",
        width=size,
        height=size,
        count=1,
        dtype="float32",
        crs=CRS,
        transform=from_origin(*ORIGIN, CELL_M, CELL_M),
        nodata=-9999.0,
    ) as ds:
        ds.write(z.astype("float32"), 1)
    per_side = round(float(np.sqrt(n_parcels)))
    block = span / per_side
    geoms, zoning = [], []
    for i in range(per_side):
        for j in range(per_side):
            x0, y0 = ORIGIN[0] + j * block, ORIGIN[1] - i * block
            box = shapely.box(x0 + 0.06 * block, y0 - 0.94 * block, x0 + 0.94 * block, y0 - 0.06 * block)
            geoms.append(shapely.affinity.rotate(box, float(rng.uniform(-20, 20))))
            zoning.append(("RES", "AGR", "FOR")[(i + j) % 3])
    parcels = folder / "alderwane_parcels.gpkg"
    gpd.GeoDataFrame({"pid": np.arange(1, len(geoms) + 1), "zoning": zoning}, geometry=geoms, crs=CRS).to_file(
        parcels, layer="parcels"
    )
    rules = folder / "alderwane_rules.toml"
    rules.write_text(RULES)
    return dem, parcels, rules


def prepare(dem_path, parcels_path, rules_path, tile_cells: int):
    """The audit's own preparation and window pass (baseline verdicts), without writing outputs."""
    import shapely

    from landcheck.core.window_pass import WindowJob as _WindowJob
    from landcheck.core.window_pass import build_plan as _build_plan
    from landcheck.geo.grid import iter_windows
    from landcheck.geo.ground_area import ground_areas
    from landcheck.inputs.dem import open_dem
    from landcheck.inputs.layers import read_parcels
    from landcheck.inputs.rulebook import load_rules
    from landcheck.overlay.sums import Totals
    from landcheck.verdicts.evaluate import evaluate_parcels, parcel_rules

    dem = open_dem(dem_path)
    g = dem.grid
    rules = load_rules(rules_path)
    frame = read_parcels(
        parcels_path, class_field=rules.class_field, id_field=rules.id_field, target_crs_wkt=g.crs_wkt
    ).frame
    geoms = np.asarray(frame.geometry.values)
    area_m2, factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    plan = _build_plan(rules, pr.class_name, factor, 1.0)
    windows = list(iter_windows(g.height, g.width, tile_cells))
    job = _WindowJob(dem, rules.slope_method, geoms, plan)
    totals = Totals(len(frame), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    for win in windows:
        totals.add(job(win)[0])
    base = evaluate_parcels(totals, plan, rules, pr, area_m2, shapely.is_empty(geoms), frame["class_value"].to_numpy())
    base.insert(0, "parcel_id", frame["parcel_id"].to_numpy())
    return dem, windows, geoms, plan, rules, pr, base


def cpu_seconds() -> float:
    """User + system CPU time of this process and its finished children (worker processes)."""
    tot = 0.0
    for who in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN):
        r = resource.getrusage(who)
        tot += r.ru_utime + r.ru_stime
    return tot


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=1000, help="DEM side in cells (10 m cells)")
    ap.add_argument("--parcels", type=int, default=400, help="number of parcels (rounded to a square grid)")
    ap.add_argument("--realizations", type=int, nargs="+", default=[25, 50, 100])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--tile-cells", type=int, default=1024)
    ap.add_argument("--rmse", type=float, default=5.0, help="DEM vertical RMSE, m")
    ap.add_argument("--corr-length", type=float, default=30.0, help="error correlation length, m")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()

    from landcheck.verdicts.confidence import confidence_settings, run_confidence

    with tempfile.TemporaryDirectory(prefix="bench_confidence_") as tmp:
        t0 = time.perf_counter()
        paths = make_inputs(Path(tmp), args.size, args.parcels)
        dem, windows, geoms, plan, rules, pr, base = prepare(*paths, args.tile_cells)
        print(
            f"DEM {args.size}x{args.size} cells, {len(base)} parcels, {len(windows)} windows, "
            f"{args.workers} workers, {os.cpu_count()} CPUs; RMSE {args.rmse} m, L {args.corr_length} m"
        )
        print(
            f"inputs + baseline audit pass: {time.perf_counter() - t0:.1f} s; "
            f"baseline conflicts {int((base['verdict'] == 'conflict').sum())}"
        )
        print(
            f"{'N':>6} {'seconds':>9} {'s/realization':>14} {'cpu_s':>8} {'cpu_s/real.':>12} {'robust_conflict':>16} "
            f"{'uncertain':>10} {'robust_clear':>13}"
        )
        for n in args.realizations:
            conf = confidence_settings(
                rules, dem.grid, rmse_m=args.rmse, corr_length_m=args.corr_length, realizations=n, seed=args.seed
            )
            t, c0 = time.perf_counter(), cpu_seconds()
            _parcels, _, summary = run_confidence(
                dem, windows, geoms, plan, rules, pr, rules.slope_method, base, conf, workers=args.workers
            )
            dt, cpu = time.perf_counter() - t, cpu_seconds() - c0
            c = summary["label_counts"]
            print(
                f"{n:>6} {dt:>9.1f} {dt / n:>14.3f} {cpu:>8.1f} {cpu / n:>12.3f} {c['robust_conflict']:>16} "
                f"{c['uncertain']:>10} {c['robust_clear']:>13}",
                flush=True,
            )
        print(
            f"load average after the runs: {', '.join(f'{x:.1f}' for x in os.getloadavg())} "
            "(wall times on a shared machine grow with other processes' load; CPU seconds do not)"
        )


if __name__ == "__main__":
    main()
