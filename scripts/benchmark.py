#!/usr/bin/env python3
"""Benchmark landcheck against reference tools measured in the same run.

Prints, per DEM size: landcheck's slope throughput (cells/s) and peak RSS next
to `gdaldem slope` on the same file, and (with --parcels) the full audit next to
the by-hand pipeline (gdaldem slope -p, threshold to 0/1, exactextract
coverage-weighted mean with its raster-sequential strategy).

Every measurement runs in a fresh child process; peak RSS is that child's
maximum resident set size (getrusage).  Data are generated into a cache folder
(--cache, default .bench_cache/) and reused.

    python scripts/benchmark.py --sizes 2000 5000 --parcels 1000 10000
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
CELL_M = 10.0
ORIGIN = (400000.0, 1700000.0)
CRS = "EPSG:32651"


def measure(cmd: list[str], env=None) -> dict:
    """Run ``cmd`` in a wrapper child; return wall seconds and the command's peak RSS in MiB."""
    wrapper = (
        "import json,resource,subprocess,sys,time;t=time.perf_counter();"
        "r=subprocess.run(sys.argv[1:],stdout=subprocess.DEVNULL);"
        "print(json.dumps({'wall_s':time.perf_counter()-t,'rc':r.returncode,"
        "'peak_mib':resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss/1024}))"
    )
    out = subprocess.run([sys.executable, "-c", wrapper, *cmd], capture_output=True, text=True, env=env)
    if out.returncode != 0 or not out.stdout.strip():
        raise RuntimeError(f"{cmd}: {out.stderr[-2000:]}")
    res = json.loads(out.stdout.strip().splitlines()[-1])
    if res["rc"] != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {res['rc']}")
    return res


def make_dem(path: Path, n: int, seed: int = 1) -> Path:
    """A hilly float32 DEM, written in strips so generating it needs little memory."""
    import rasterio
    from rasterio.transform import from_origin

    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    ph = rng.uniform(0, 2 * np.pi, 6)
    prof = dict(driver="GTiff", width=n, height=n, count=1, dtype="float32", crs=CRS,
                transform=from_origin(ORIGIN[0], ORIGIN[1], CELL_M, CELL_M), nodata=-9999.0, tiled=True,
                blockxsize=512, blockysize=512, BIGTIFF="IF_SAFER")
    tmp = path.with_suffix(".part.tif")
    with rasterio.open(tmp, "w", **prof) as ds:
        step = 512
        x = np.arange(n)[None, :] * CELL_M
        for r0 in range(0, n, step):
            y = np.arange(r0, min(n, r0 + step))[:, None] * CELL_M
            z = (250 + 180 * np.sin(x / 2900 + ph[0]) * np.cos(y / 3700 + ph[1])
                 + 40 * np.sin(x / 370 + y / 530 + ph[2]) + 8 * np.sin(x / 61 + ph[3]) * np.cos(y / 47 + ph[4]))
            ds.write(z.astype("float32"), 1, window=rasterio.windows.Window(0, r0, n, z.shape[0]))
    os.replace(tmp, path)
    return path


def make_parcels(path: Path, n_dem: int, count: int, seed: int = 2) -> Path:
    """``count`` non-overlapping rotated lots of 0.1-13 ha spread over the DEM (GeoPackage)."""
    import geopandas as gpd
    import shapely
    from shapely import affinity

    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    extent = n_dem * CELL_M
    side = extent / np.ceil(np.sqrt(count))
    k = int(np.ceil(np.sqrt(count)))
    geoms, ids = [], []
    for i in range(count):
        r, c = divmod(i, k)
        area = rng.uniform(1_000, 130_000)
        w = min(np.sqrt(area) * rng.uniform(0.7, 1.4), side * 0.7)
        h = min(area / w, side * 0.7)
        cx = ORIGIN[0] + (c + 0.5) * side
        cy = ORIGIN[1] - (r + 0.5) * side
        g = shapely.box(cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2)
        geoms.append(affinity.rotate(g, rng.uniform(0, 90), origin="centroid"))
        ids.append(i + 1)
    zoning = rng.choice(["RES", "COM", "AGR"], size=count)
    gpd.GeoDataFrame({"pid": ids, "zoning": zoning}, geometry=geoms, crs=CRS).to_file(path, layer="parcels")
    return path


RULEBOOK = """[rulebook]
class_field = "zoning"
id_field = "pid"
[classes.residential]
values = ["RES", "COM"]
max_slope_pct = 18
tolerance_pct = 5
[classes.agricultural]
values = ["AGR"]
max_slope_pct = 30
"""

BY_HAND = r"""
import sys, numpy as np, rasterio, geopandas as gpd
from exactextract import exact_extract
slope_tif, parcels, out_csv, tmp = sys.argv[1:5]
import subprocess
subprocess.run(["gdaldem", "slope", "-p", "-q", sys.argv[5], slope_tif], check=True)
with rasterio.open(slope_tif) as src:
    prof = src.profile
    prof.update(dtype="uint8", nodata=255)
    with rasterio.open(tmp, "w", **prof) as dst:
        for _, w in src.block_windows(1):
            s = src.read(1, window=w, masked=True)
            dst.write(np.where(s.mask, 255, (s >= 18).astype("uint8")).astype("uint8"), 1, window=w)
with rasterio.open(tmp) as r:
    res = exact_extract(r, gpd.read_file(parcels), ["mean"], output="pandas", strategy="raster-sequential")
res.to_csv(out_csv)
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", type=int, nargs="+", default=[2000, 5000])
    ap.add_argument("--parcels", type=int, nargs="*", default=[], help="parcel counts for the audit comparison")
    ap.add_argument("--cache", type=Path, default=Path(".bench_cache"))
    ap.add_argument("--repeat", type=int, default=1, help="repeat each timing, keep the fastest")
    args = ap.parse_args(argv)
    if shutil.which("gdaldem") is None:
        print("gdaldem not found: install Debian's gdal-bin for the reference timings", file=sys.stderr)
        return 2
    args.cache.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="lc-bench-"))
    rows = []
    try:
        for n in args.sizes:
            dem = make_dem(args.cache / f"dem_{n}.tif", n)

            def best(cmd):
                runs = []
                for _ in range(args.repeat):
                    for f in work.glob("*"):
                        shutil.rmtree(f) if f.is_dir() else f.unlink()
                    runs.append(measure(cmd))
                return min(runs, key=lambda r: r["wall_s"])

            read = best([sys.executable, "-c", "import rasterio,sys; rasterio.open(sys.argv[1]).read(1)", str(dem)])
            gd = best(["gdaldem", "slope", "-p", "-q", str(dem), str(work / "gd.tif")])
            lc = best([sys.executable, "-m", "landcheck", "-q", "slope", str(dem), str(work / "lc.tif")])
            cells = n * n
            rows.append(dict(test="slope", size=n, parcels=0, lc_s=lc["wall_s"], ref_s=gd["wall_s"],
                             lc_mcells_s=cells / lc["wall_s"] / 1e6, ref_mcells_s=cells / gd["wall_s"] / 1e6,
                             lc_peak_mib=lc["peak_mib"], ref_peak_mib=gd["peak_mib"], read_floor_s=read["wall_s"]))
            for count in args.parcels:
                parcels = make_parcels(args.cache / f"parcels_{n}_{count}.gpkg", n, count)
                rules = work.parent / f"lc-bench-rules-{os.getpid()}.toml"
                rules.write_text(RULEBOOK)
                script = work.parent / f"lc-bench-byhand-{os.getpid()}.py"
                script.write_text(BY_HAND)
                hand = best([sys.executable, str(script), str(work / "s.tif"), str(parcels), str(work / "h.csv"),
                             str(work / "t.tif"), str(dem)])
                lc = best([sys.executable, "-m", "landcheck", "-q", "audit", "--dem", str(dem), "--parcels", str(parcels),
                           "--rulebook", str(rules), "--out", str(work / "audit"), "--no-report"])
                rows.append(dict(test="audit", size=n, parcels=count, lc_s=lc["wall_s"], ref_s=hand["wall_s"],
                                 lc_mcells_s=cells / lc["wall_s"] / 1e6, ref_mcells_s=cells / hand["wall_s"] / 1e6,
                                 lc_peak_mib=lc["peak_mib"], ref_peak_mib=hand["peak_mib"], read_floor_s=read["wall_s"],
                                 lc_parcels_s=count / lc["wall_s"]))
    finally:
        shutil.rmtree(work, ignore_errors=True)
        for p in work.parent.glob(f"lc-bench-*-{os.getpid()}.*"):
            p.unlink()
    hdr = f"{'test':6} {'size':>6} {'parcels':>8} {'landcheck s':>12} {'ref s':>8} {'ratio':>6} {'lc Mcell/s':>10} " \
          f"{'ref Mcell/s':>11} {'lc peak MiB':>11} {'ref peak MiB':>12} {'read s':>7}"
    print(hdr)
    for r in rows:
        print(f"{r['test']:6} {r['size']:>6} {r['parcels']:>8} {r['lc_s']:>12.2f} {r['ref_s']:>8.2f} "
              f"{r['lc_s'] / r['ref_s']:>6.2f} {r['lc_mcells_s']:>10.1f} {r['ref_mcells_s']:>11.1f} "
              f"{r['lc_peak_mib']:>11.0f} {r['ref_peak_mib']:>12.0f} {r['read_floor_s']:>7.2f}")
    print("ratio = landcheck wall time / reference wall time (slope: gdaldem slope -p; audit: gdaldem + threshold + "
          "exactextract raster-sequential). Reference and landcheck measured in this run.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
