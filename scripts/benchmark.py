#!/usr/bin/env python3
"""Benchmark landcheck against reference tools measured in the same run.

Per DEM size it times landcheck's slope stage next to `gdaldem slope -p` on the
same file, and (with --parcels) the full audit next to the by-hand pipeline:
gdaldem slope -p, threshold to 0/1 block by block with rasterio, then
exactextract's coverage-weighted mean per parcel with its raster-sequential
strategy.  It prints wall time, CPU time (user + system), cells/s, parcels/s,
peak RSS and the ratios landcheck / reference.

What each side writes (stated in the output too):

* gdaldem slope: a GeoTIFF in its default layout (uncompressed, striped), float32.
* landcheck slope: the same raster as ``--rasters`` says (default ``gtiff``: 512-cell
  tiles, float32 uncompressed; ``cog``: Cloud-Optimized GeoTIFF, DEFLATE, overviews).
* by-hand audit: the slope GeoTIFF above, an uncompressed uint8 0/1 raster, a CSV of
  per-parcel means (one number per parcel: the share over 18 %).
* landcheck audit: the slope and conflict rasters (``--rasters``; with ``gtiff`` the
  conflict raster is ZSTD level 1), parcels.gpkg, parcels.csv, classes.csv and
  summary.json (with SHA-256 of every input); every share exact; no HTML report.

landcheck runs through its command line (``python -m landcheck -q slope
--raster-format ...`` / ``audit --rasters ... --no-report``).  Every measurement
runs in a fresh child process (the interpreter itself, not a shell shim); peak
RSS is that child's maximum resident set size (getrusage).
Data are generated into a cache folder (--cache) and reused.  ``--memory-run N``
also generates an N x N DEM (N = 30000 is 3.6 GB of float32: free disk space is
checked first), times the slope stage on it (against gdaldem unless
--no-reference) and runs the audit on it for the peak-memory figure, then
deletes it unless --keep-memory-dem.

    python scripts/benchmark.py --sizes 2000 5000 10000 --parcels 1000 10000 100000
    python scripts/benchmark.py --sizes --memory-run 30000                # 3.6 GB DEM, then deleted

Hazards (``--hazards N ...``): the full audit with every hazard kind derived from the DEM
(``../shared/bench/rules_hazards.toml``-style rulebook: slope limits, HAND, sea-level rise with
scenarios, derived shore and stream easements; ``--rasters gtiff --no-report``) next to the
by-hand hazard pipeline (pyflwdir fill + D8, upstream area, HAND; ``scipy.ndimage`` labelling for
the sea and the 1 m rise; a raster distance transform and dilation for the 20 m strip), on the same
DEM in the same run, each in a fresh child process.  Data come from the benchmark generator
(``--bench-dir``: ``make_data.py``, ``byhand_hazards.py``, ``rules_hazards.toml``; data in
``$BENCH_DATA``, default /tmp/bench-data, generated there first if missing): 5000 uses
``dem_5000.tif`` with ``parcels_100k.gpkg``, 10000 ``dem_10000.tif`` with
``parcels_100k_on10000.gpkg``, and 2500 a crop of the north-west corner of the 5000 DEM with
the parcels inside it (written to the cache folder).

    python scripts/benchmark.py --sizes --hazards 2500 5000 --bench-dir ../shared/bench
    python scripts/benchmark.py --report-run --bench-data /tmp/bench-data  # default run vs --no-report
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
#: the shared benchmark data generator and by-hand pipelines, beside the repository (../shared/bench)
_SHARED_BENCH = REPO.parent / "shared" / "bench"
CELL_M = 10.0
ORIGIN = (400000.0, 1700000.0)
CRS = "EPSG:32651"


#: run by :func:`measure` in a wrapper process: the command's wall and CPU time, its largest process's peak
#: RSS, and the peak of the summed proportional set size (PSS) over its process tree, sampled every 50 ms
#: (PSS splits pages shared after a fork between the processes, so the sum is the memory they hold together)
_MEASURE_WRAPPER = r"""
import json, os, resource, subprocess, sys, time

def tree(pid):
    out = [pid]
    try:
        for task in os.listdir(f"/proc/{pid}/task"):
            with open(f"/proc/{pid}/task/{task}/children") as fh:
                for c in fh.read().split():
                    out += tree(int(c))
    except OSError:
        pass
    return out

def pss_mib(pid):
    try:
        with open(f"/proc/{pid}/smaps_rollup") as fh:
            for line in fh:
                if line.startswith("Pss:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return 0.0

t = time.perf_counter()
p = subprocess.Popen(sys.argv[1:], stdout=subprocess.DEVNULL)
tree_peak = 0.0
while p.poll() is None:
    tree_peak = max(tree_peak, sum(pss_mib(q) for q in tree(p.pid)))
    time.sleep(0.05)
w = time.perf_counter() - t
u = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"wall_s": w, "rc": p.returncode, "cpu_s": u.ru_utime + u.ru_stime,
                  "peak_mib": u.ru_maxrss / 1024, "tree_pss_peak_mib": tree_peak}))
"""


def measure(cmd: list[str], env=None) -> dict:
    """Run ``cmd`` in a wrapper child: wall seconds, CPU seconds, the largest process's peak RSS in MiB
    (``peak_mib``) and the sampled peak of the process tree's summed PSS (``tree_pss_peak_mib``)."""
    out = subprocess.run([sys.executable, "-c", _MEASURE_WRAPPER, *cmd], capture_output=True, text=True, env=env)
    if out.returncode != 0 or not out.stdout.strip():
        raise RuntimeError(f"{cmd}: {out.stderr[-2000:]}")
    res = json.loads(out.stdout.strip().splitlines()[-1])
    if res["rc"] != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {res['rc']}: {out.stderr[-2000:]}")
    res["all_mib"] = max(res["peak_mib"], res["tree_pss_peak_mib"])
    return res


def make_dem(path: Path, n: int, seed: int = 1) -> Path:
    """A hilly float32 DEM in 512-cell tiles, written in strips so generating it needs little memory."""
    import rasterio
    from rasterio.transform import from_origin

    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    ph = rng.uniform(0, 2 * np.pi, 6)
    prof = dict(
        driver="GTiff",
        width=n,
        height=n,
        count=1,
        dtype="float32",
        crs=CRS,
        transform=from_origin(ORIGIN[0], ORIGIN[1], CELL_M, CELL_M),
        nodata=-9999.0,
        tiled=True,
        blockxsize=512,
        blockysize=512,
        BIGTIFF="IF_SAFER",
    )
    tmp = path.with_suffix(".part.tif")
    step = 512 if n <= 10000 else 128
    with rasterio.Env(GDAL_CACHEMAX=256 * 2**20), rasterio.open(tmp, "w", **prof) as ds:
        x = np.arange(n)[None, :] * CELL_M
        for r0 in range(0, n, step):
            y = np.arange(r0, min(n, r0 + step))[:, None] * CELL_M
            z = (
                250
                + 180 * np.sin(x / 2900 + ph[0]) * np.cos(y / 3700 + ph[1])
                + 40 * np.sin(x / 370 + y / 530 + ph[2])
                + 8 * np.sin(x / 61 + ph[3]) * np.cos(y / 47 + ph[4])
            )
            ds.write(z.astype("float32"), 1, window=rasterio.windows.Window(0, r0, n, z.shape[0]))
    os.replace(tmp, path)
    return path


def make_parcels(path: Path, n_dem: int, count: int, seed: int = 2) -> Path:
    """``count`` non-overlapping rotated lots of 0.1-13 ha spread over the DEM (GeoPackage)."""
    import geopandas as gpd
    import shapely

    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    extent = n_dem * CELL_M
    k = int(np.ceil(np.sqrt(count)))
    side = extent / k
    i = np.arange(count)
    r, c = np.divmod(i, k)
    area = rng.uniform(1_000, 130_000, count)
    w = np.minimum(np.sqrt(area) * rng.uniform(0.7, 1.4, count), side * 0.7)
    h = np.minimum(area / w, side * 0.7)
    cx = ORIGIN[0] + (c + 0.5) * side
    cy = ORIGIN[1] - (r + 0.5) * side
    ang = np.radians(rng.uniform(0, 90, count))
    # corners of each rotated rectangle, vectorised
    dx = np.array([-1, 1, 1, -1, -1])[None, :] * (w / 2)[:, None]
    dy = np.array([-1, -1, 1, 1, -1])[None, :] * (h / 2)[:, None]
    xs = cx[:, None] + dx * np.cos(ang)[:, None] - dy * np.sin(ang)[:, None]
    ys = cy[:, None] + dx * np.sin(ang)[:, None] + dy * np.cos(ang)[:, None]
    geoms = shapely.polygons(np.stack([xs, ys], axis=-1))
    zoning = rng.choice(["RES", "COM", "AGR"], size=count)
    gpd.GeoDataFrame({"pid": i + 1, "zoning": zoning}, geometry=geoms, crs=CRS).to_file(path, layer="parcels")
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


def _fmt_table(rows: list[dict]) -> str:
    hdr = (
        f"{'test':6} {'size':>6} {'parcels':>8} {'lc s':>7} {'lc cpu':>7} {'ref s':>7} {'ratio':>6} "
        f"{'lc Mcell/s':>10} {'ref Mcell/s':>11} {'lc parcel/s':>11} {'lc MiB':>7} {'ref MiB':>7} {'read s':>6}"
    )
    lines = [hdr]
    for r in rows:
        ref = r.get("ref_s")
        lines.append(
            f"{r['test']:6} {r['size']:>6} {r['parcels']:>8} {r['lc_s']:>7.2f} {r['lc_cpu_s']:>7.2f} "
            f"{(ref if ref else float('nan')):>7.2f} {(r['lc_s'] / ref if ref else float('nan')):>6.2f} "
            f"{r['lc_mcells_s']:>10.1f} {(r.get('ref_mcells_s') or float('nan')):>11.1f} "
            f"{(r.get('lc_parcels_s') or float('nan')):>11.0f} {r['lc_peak_mib']:>7.0f} "
            f"{(r.get('ref_peak_mib') or float('nan')):>7.0f} {(r.get('read_floor_s') or float('nan')):>6.2f}"
        )
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", type=int, nargs="*", default=[2000, 5000], help="DEM sizes (cells per side)")
    ap.add_argument("--parcels", type=int, nargs="*", default=[], help="parcel counts for the audit comparison")
    ap.add_argument("--cache", type=Path, default=Path(".bench_cache"), help="folder for generated inputs")
    ap.add_argument("--repeat", type=int, default=1, help="repeat each timing, keep the fastest")
    ap.add_argument(
        "--rasters",
        choices=["cog", "gtiff", "none"],
        default="gtiff",
        help="landcheck's raster output (slope: cog or gtiff)",
    )
    ap.add_argument("--no-reference", action="store_true", help="time landcheck only (no gdaldem / by-hand runs)")
    ap.add_argument(
        "--memory-run",
        type=int,
        default=None,
        metavar="N",
        help="also run the audit on a generated N x N DEM for its peak memory (e.g. 30000)",
    )
    ap.add_argument("--memory-parcels", type=int, default=100_000)
    ap.add_argument("--keep-memory-dem", action="store_true")
    ap.add_argument("--json", type=Path, default=None, help="also write the rows as JSON here")
    ap.add_argument(
        "--hazards", type=int, nargs="*", default=[], help="DEM sizes for the hazard audit (2500, 5000, 10000)"
    )
    ap.add_argument(
        "--bench-dir",
        type=Path,
        default=_SHARED_BENCH,
        help="folder with make_data.py, byhand_hazards.py and rules_hazards.toml",
    )
    ap.add_argument(
        "--report-run",
        action="store_true",
        help="time the default audit (COG rasters + report) beside --no-report on the shared bench data, "
        "and the report's size and opening time in headless Chromium (see report_benchmark)",
    )
    ap.add_argument(
        "--bench-data",
        type=Path,
        default=Path(os.environ.get("BENCH_DATA", "/tmp/bench-data")),
        help="folder written by ../shared/bench/make_data.py (dem_10000.tif, parcels_100k_on10000.gpkg)",
    )
    ap.add_argument(
        "--bench-rules",
        type=Path,
        default=Path(os.environ.get("BENCH_SHARED", _SHARED_BENCH)) / "rules_slope.toml",
    )
    ap.add_argument(
        "--regions-run",
        type=int,
        default=None,
        metavar="N",
        help="region run (audit --regions) on a generated N x N coastal DEM with --regions-parcels lots as "
        "partitioned GeoParquet: time and peak memory per region and overall (see _regions_run)",
    )
    ap.add_argument("--regions-parcels", type=int, default=1_000_000)
    ap.add_argument("--regions", default="auto", help="region count for --regions-run (auto or N)")
    ap.add_argument("--regions-workers", type=int, default=2)
    ap.add_argument(
        "--regions-rules",
        choices=["full", "no-routing"],
        default="full",
        help="full: HAND + sea-level rise + derived shore and stream easements; no-routing: without HAND and streams "
        "(no flow routing)",
    )
    ap.add_argument(
        "--regions-outputs",
        choices=["tables", "gtiff", "cog-report"],
        default="tables",
        help="what the region run writes: tables only (--rasters none --no-report, the figures of docs/scale.md), "
        "plus plain tiled GeoTIFF rasters, or the default folder (COG rasters and the report)",
    )
    args = ap.parse_args(argv)
    if args.regions_run:
        rows = _regions_run(args)
        if args.json:
            args.json.write_text(json.dumps(rows, indent=1))
        return 0
    if args.report_run:
        rows = report_benchmark(args.bench_data, args.bench_rules, args.cache)
        if args.json:
            args.json.write_text(json.dumps(rows, indent=1))
        return 0
    if not args.no_reference and shutil.which("gdaldem") is None:
        print(
            "gdaldem not found: install Debian's gdal-bin for the reference timings (or --no-reference)",
            file=sys.stderr,
        )
        return 2
    args.cache.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="lc-bench-", dir=args.cache))
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    rules = work / "rules.toml"
    rules.write_text(RULEBOOK)
    (work / "byhand.py").write_text(BY_HAND)
    slope_fmt = "gtiff" if args.rasters == "none" else args.rasters
    lc_cmd = [sys.executable, "-m", "landcheck", "-q"]
    rows = []

    def clean():
        for f in work.glob("out*"):
            shutil.rmtree(f) if f.is_dir() else f.unlink()

    def best(cmd):
        runs = []
        for _ in range(args.repeat):
            clean()
            runs.append(measure(cmd, env))
        clean()
        return min(runs, key=lambda r: r["wall_s"])

    try:
        for n in args.sizes:
            dem = make_dem(args.cache / f"dem_{n}.tif", n)
            cells = n * n
            read = gd = None
            if not args.no_reference:
                read = best([sys.executable, "-c", "import rasterio,sys; rasterio.open(sys.argv[1]).read(1)", str(dem)])
                gd = best(["gdaldem", "slope", "-p", "-q", str(dem), str(work / "out_gd.tif")])
            lc = best([*lc_cmd, "slope", "--raster-format", slope_fmt, str(dem), str(work / "out_lc.tif")])
            rows.append(
                dict(
                    test="slope",
                    size=n,
                    parcels=0,
                    lc_s=lc["wall_s"],
                    lc_cpu_s=lc["cpu_s"],
                    lc_mcells_s=cells / lc["wall_s"] / 1e6,
                    lc_peak_mib=lc["peak_mib"],
                    ref_s=gd and gd["wall_s"],
                    ref_cpu_s=gd and gd["cpu_s"],
                    ref_mcells_s=gd and cells / gd["wall_s"] / 1e6,
                    ref_peak_mib=gd and gd["peak_mib"],
                    read_floor_s=read and read["wall_s"],
                )
            )
            print(_fmt_table(rows[-1:]).splitlines()[-1], flush=True)
            for count in args.parcels:
                parcels = make_parcels(args.cache / f"parcels_{n}_{count}.gpkg", n, count)
                hand = None
                if not args.no_reference:
                    hand = best(
                        [
                            sys.executable,
                            str(work / "byhand.py"),
                            str(work / "out_s.tif"),
                            str(parcels),
                            str(work / "out_h.csv"),
                            str(work / "out_t.tif"),
                            str(dem),
                        ]
                    )
                lc = best(_audit_cmd(lc_cmd, dem, parcels, rules, work, args.rasters))
                rows.append(
                    dict(
                        test="audit",
                        size=n,
                        parcels=count,
                        lc_s=lc["wall_s"],
                        lc_cpu_s=lc["cpu_s"],
                        lc_mcells_s=cells / lc["wall_s"] / 1e6,
                        lc_parcels_s=count / lc["wall_s"],
                        lc_peak_mib=lc["peak_mib"],
                        ref_s=hand and hand["wall_s"],
                        ref_cpu_s=hand and hand["cpu_s"],
                        ref_mcells_s=hand and cells / hand["wall_s"] / 1e6,
                        ref_peak_mib=hand and hand["peak_mib"],
                        read_floor_s=read and read["wall_s"],
                    )
                )
                print(_fmt_table(rows[-1:]).splitlines()[-1], flush=True)
        if args.memory_run:
            rows += _memory_run(args, work, env, rules, lc_cmd)
        if args.hazards:
            _hazard_runs(args, work, env, lc_cmd)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print()
    print(_fmt_table(rows))
    print(
        f"ratio = landcheck wall time / reference wall time, both measured in this run. slope: reference "
        f"`gdaldem slope -p` writing its default GeoTIFF (uncompressed strips); landcheck writes {slope_fmt} "
        f"({'512-cell tiles, uncompressed' if slope_fmt == 'gtiff' else 'COG, DEFLATE level 1, overviews'}). audit: reference "
        f"gdaldem + 0/1 threshold raster + exactextract raster-sequential mean per parcel (CSV); landcheck "
        f"writes rasters={args.rasters}, parcels.gpkg/.csv, classes.csv, summary.json, exact shares, no report. "
        f"'lc cpu' = user + system CPU seconds; 'read s' = reading the whole DEM once with rasterio."
    )
    if args.json:
        args.json.write_text(json.dumps(rows, indent=1))
    return 0


def report_open_seconds(report: Path, timeout_s: float = 300.0) -> float:
    """Seconds from navigation to a usable interactive map in headless Chromium (offline, fresh profile).

    "Usable" is the page script's own flag ``window.landcheckMapReady``, set after every
    parcel layer is built and the map has fitted the audit area.
    """
    import time

    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    profile = tempfile.mkdtemp(prefix="lc-bench-chromium-")
    for arg in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--proxy-server=127.0.0.1:9",
        "--window-size=1300,1000",
        f"--user-data-dir={profile}",
    ):
        opts.add_argument(arg)
    driver = webdriver.Chrome(service=Service(executable_path="/usr/bin/chromedriver"), options=opts)
    try:
        driver.set_page_load_timeout(timeout_s)
        t = time.perf_counter()
        driver.get(report.as_uri())
        while not driver.execute_script("return window.landcheckMapReady === true"):
            if time.perf_counter() - t > timeout_s:
                raise RuntimeError(f"{report}: map not ready after {timeout_s:.0f} s")
            time.sleep(0.05)
        return time.perf_counter() - t
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def report_benchmark(data: Path, rules: Path, cache: Path) -> list[dict]:
    """Default run (COG rasters + report) beside the --no-report run, and the report in Chromium.

    Inputs come from ``../shared/bench/make_data.py`` (10000 x 10000 DEM, 100 000 parcels,
    slope rules only).  Prints wall time and peak RSS of both runs, the report's size and
    its opening time, and the load average, since the machine may be shared.
    """
    dem, parcels = data / "dem_10000.tif", data / "parcels_100k_on10000.gpkg"
    for p in (dem, parcels, rules):
        if not p.exists():
            raise SystemExit(f"{p}: not found; run `BENCH_DATA={data} python ../shared/bench/make_data.py` first")
    cache.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="lc-report-bench-", dir=cache))
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    lc_cmd = [sys.executable, "-m", "landcheck", "-q"]
    rows = []
    try:
        base = [*lc_cmd, "audit", "--dem", str(dem), "--parcels", str(parcels), "--rulebook", str(rules)]
        load0 = os.getloadavg()[0]
        quick = measure([*base, "--out", str(work / "out_quick"), "--rasters", "gtiff", "--no-report"], env)
        full = measure([*base, "--out", str(work / "out_full")], env)
        # the same default run drawing every figure in one process (landcheck.evidence.figure_worker)
        single = measure([*base, "--out", str(work / "out_one")], dict(env, LANDCHECK_REPORT_PROCESSES="1"))
        load1 = os.getloadavg()[0]
        report = work / "out_full" / "report.html"
        open_s = report_open_seconds(report)
        rows = [
            dict(run="--rasters gtiff --no-report", wall_s=quick["wall_s"], peak_mib=quick["all_mib"]),
            dict(
                run="default (COG rasters + report)",
                wall_s=full["wall_s"],
                peak_mib=full["all_mib"],
                report_mb=report.stat().st_size / 1e6,
                open_s=open_s,
            ),
            dict(run="default, figures in one process", wall_s=single["wall_s"], peak_mib=single["all_mib"]),
        ]
        print(f"report benchmark: {dem.name}, {parcels.name}, {rules.name}; load average {load0:.1f} -> {load1:.1f}")
        print(f"{'run':34s} {'wall s':>8s} {'peak MiB':>9s} {'report MB':>10s} {'open s':>7s}")
        for r in rows:
            print(
                f"{r['run']:34s} {r['wall_s']:8.1f} {r['peak_mib']:9.0f} "
                f"{r.get('report_mb', float('nan')):10.1f} {r.get('open_s', float('nan')):7.1f}"
            )
        extra = full["wall_s"] - quick["wall_s"]
        print(
            f"report and COG steps: {extra:.1f} s beyond the --no-report run "
            f"({full['wall_s'] / quick['wall_s']:.1f}x; target: no more than the --no-report run, "
            f"{'met' if extra <= quick['wall_s'] else 'NOT met'}); open s = navigation to a usable map in headless "
            "Chromium."
        )
        print(
            f"peak MiB = the larger of the largest process's peak RSS and the sampled peak of the process tree's "
            f"summed PSS (default run: {full['peak_mib']:.0f} and {full['tree_pss_peak_mib']:.0f} MiB; the report's "
            f"figure process shares its parent's pages); 1 GiB target: {'met' if full['all_mib'] <= 1024 else 'NOT met'}"
        )
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return rows


def _audit_cmd(lc_cmd, dem, parcels, rules, work: Path, rasters: str) -> list[str]:
    return [
        *lc_cmd,
        "audit",
        "--dem",
        str(dem),
        "--parcels",
        str(parcels),
        "--rulebook",
        str(rules),
        "--out",
        str(work / "out_audit"),
        "--rasters",
        rasters,
        "--no-report",
    ]


def _memory_run(args, work: Path, env, rules: Path, lc_cmd) -> list[dict]:
    n = args.memory_run
    need = 4 * n * n * 3.2 + 2**30  # the DEM, gdaldem's and landcheck's slope rasters, the conflict raster, spare
    free = shutil.disk_usage(args.cache).free
    if free < need:
        print(
            f"memory run skipped: {n}x{n} needs about {need / 2**30:.1f} GiB free in {args.cache}, "
            f"{free / 2**30:.1f} GiB available",
            file=sys.stderr,
        )
        return []
    dem_path = args.cache / f"dem_{n}.tif"
    rows = []
    try:
        dem = make_dem(dem_path, n)
        parcels = make_parcels(args.cache / f"parcels_{n}_{args.memory_parcels}.gpkg", n, args.memory_parcels)
        slope_fmt = "gtiff" if args.rasters == "none" else args.rasters
        gd = None
        if not args.no_reference:
            gd = measure(["gdaldem", "slope", "-p", "-q", str(dem), str(work / "out_gd.tif")], env)
            (work / "out_gd.tif").unlink(missing_ok=True)
        lc = measure([*lc_cmd, "slope", "--raster-format", slope_fmt, str(dem), str(work / "out_lc.tif")], env)
        (work / "out_lc.tif").unlink(missing_ok=True)
        rows.append(
            dict(
                test="slope",
                size=n,
                parcels=0,
                lc_s=lc["wall_s"],
                lc_cpu_s=lc["cpu_s"],
                lc_mcells_s=n * n / lc["wall_s"] / 1e6,
                lc_peak_mib=lc["peak_mib"],
                ref_s=gd and gd["wall_s"],
                ref_cpu_s=gd and gd["cpu_s"],
                ref_mcells_s=gd and n * n / gd["wall_s"] / 1e6,
                ref_peak_mib=gd and gd["peak_mib"],
            )
        )
        print(_fmt_table(rows[-1:]).splitlines()[-1], flush=True)
        lc = measure(_audit_cmd(lc_cmd, dem, parcels, rules, work, args.rasters), env)
        shutil.rmtree(work / "out_audit", ignore_errors=True)
        rows.append(
            dict(
                test="memory",
                size=n,
                parcels=args.memory_parcels,
                lc_s=lc["wall_s"],
                lc_cpu_s=lc["cpu_s"],
                lc_mcells_s=n * n / lc["wall_s"] / 1e6,
                lc_parcels_s=args.memory_parcels / lc["wall_s"],
                lc_peak_mib=lc["peak_mib"],
            )
        )
        print(_fmt_table(rows[-1:]).splitlines()[-1], flush=True)
    finally:
        if not args.keep_memory_dem:
            dem_path.unlink(missing_ok=True)
    return rows


HAZARD_PEAK_TARGET_MIB = 2048  # issue target: peak <= 2 GiB at 10000^2 with 100 000 parcels
HAZARD_RATIO_TARGET = 0.3
HAZARD_TIME_TARGET_S = 60.0  # issue target at 10000^2 with 100 000 parcels


def _hazard_inputs(args, n: int) -> tuple[Path, Path]:
    """(DEM, parcels) for size ``n`` from the benchmark generator's data (generated when missing)."""
    data = Path(os.environ.get("BENCH_DATA", "/tmp/bench-data"))
    base = 5000 if n <= 5000 else n
    dem = data / f"dem_{base}.tif"
    # above 10000^2 the generator writes the DEM only; the parcels are those of the 10000^2 extent,
    # which is the north-west corner of every larger DEM (same origin, same surface)
    parcels = data / ("parcels_100k.gpkg" if base == 5000 else f"parcels_100k_on{min(base, 10000)}.gpkg")
    env = dict(os.environ, BENCH_DATA=str(data))
    make = [sys.executable, str(args.bench_dir / "make_data.py")]
    if not parcels.exists():
        subprocess.run([*make, "--sizes", str(min(base, 10000))], check=True, env=env)
    if not dem.exists():
        subprocess.run([*make, "--sizes", str(base), "--skip-parcels"], check=True, env=env)
    if n == base:
        return dem, parcels
    # a crop of the north-west corner with the parcels inside it
    import geopandas as gpd
    import rasterio
    import shapely

    crop = args.cache / f"hazard_dem_{n}.tif"
    crop_parcels = args.cache / f"hazard_parcels_{n}.gpkg"
    if not crop.exists():
        tmp = crop.with_suffix(".part.tif")
        subprocess.run(
            ["gdal_translate", "-q", "-srcwin", "0", "0", str(n), str(n), "-co", "TILED=YES", str(dem), str(tmp)],
            check=True,
        )
        os.replace(tmp, crop)
    if not crop_parcels.exists():
        with rasterio.open(crop) as ds:
            box = shapely.box(*ds.bounds)
        gdf = gpd.read_file(parcels)
        gdf[gdf.within(box)].to_file(crop_parcels, layer="parcels")
    return crop, crop_parcels


def _hazard_runs(args, work: Path, env, lc_cmd) -> list[dict]:
    """The hazard audit next to the by-hand hazard pipeline, same DEM, same run (see module docstring)."""
    rules = args.bench_dir / "rules_hazards.toml"
    byhand = args.bench_dir / "byhand_hazards.py"
    rows = []
    for n in args.hazards:
        dem, parcels = _hazard_inputs(args, n)
        import pyogrio

        count = int(pyogrio.read_info(parcels)["features"])
        ref = None
        if not args.no_reference:
            ref = measure([sys.executable, str(byhand), str(n), str(dem)], env)
        out = work / "out_hazard"
        shutil.rmtree(out, ignore_errors=True)
        lc = measure(
            [
                *lc_cmd,
                "audit",
                "--dem",
                str(dem),
                "--parcels",
                str(parcels),
                "--rulebook",
                str(rules),
                "--out",
                str(out),
                "--rasters",
                "gtiff",
                "--no-report",
            ],
            env,
        )
        shutil.rmtree(out, ignore_errors=True)
        row = dict(
            size=n,
            parcels=count,
            lc_s=lc["wall_s"],
            lc_cpu_s=lc["cpu_s"],
            lc_peak_mib=lc["peak_mib"],
            ref_s=ref and ref["wall_s"],
            ref_cpu_s=ref and ref["cpu_s"],
            ref_peak_mib=ref and ref["peak_mib"],
            load=os.getloadavg()[0],
        )
        rows.append(row)
        ratio = row["lc_s"] / row["ref_s"] if row["ref_s"] else float("nan")
        cpu_ratio = row["lc_cpu_s"] / row["ref_cpu_s"] if row["ref_cpu_s"] else float("nan")
        print(
            f"hazards {n:>6}^2 {count:>7} parcels: landcheck {row['lc_s']:7.2f} s (cpu {row['lc_cpu_s']:6.2f}) "
            f"peak {row['lc_peak_mib']:6.0f} MiB | by-hand {row['ref_s'] or float('nan'):7.2f} s "
            f"(cpu {row['ref_cpu_s'] or float('nan'):6.2f}) "
            f"peak {row['ref_peak_mib'] or float('nan'):6.0f} MiB | ratio {ratio:5.2f} "
            f"(target <= {HAZARD_RATIO_TARGET}), cpu ratio {cpu_ratio:5.2f} | peak {'within' if row['lc_peak_mib'] <= HAZARD_PEAK_TARGET_MIB else 'OVER'} "
            f"{HAZARD_PEAK_TARGET_MIB} MiB"
            + (
                f" | time {'within' if row['lc_s'] <= HAZARD_TIME_TARGET_S else 'OVER'} {HAZARD_TIME_TARGET_S:.0f} s"
                if n == 10000
                else ""
            )
            + f" | load {row['load']:.2f}",
            flush=True,
        )
    print(
        "hazards: landcheck = full audit (slope limits, HAND, sea-level rise with scenarios, derived shore and "
        "stream easements; --rasters gtiff --no-report); by-hand = hazard stage only on the whole array "
        "(pyflwdir fill + D8, upstream area, HAND; ndimage labelling; distance transform and dilation strip)."
    )
    return rows


def _regions_run(args) -> list[dict]:
    """``audit --regions`` on a generated coastal DEM (tests/regions_data.py) with lots as partitioned GeoParquet.

    The DEM (N x N float32, 512-cell tiles) and the parcels (20 GeoParquet partitions in lattice order) are
    generated into ``--cache`` and kept.  The run is one ``landcheck audit --regions`` child process (a
    LocalCluster of ``--regions-workers`` worker processes); printed: wall and CPU time and the peak RSS
    of the whole process tree (the largest single process: getrusage of the waited children), and from
    ``run_times.json`` each region's job time and its worker's peak (VmHWM), the driver's time and peak.
    """
    sys.path.insert(0, str(REPO / "tests"))
    import regions_data as rd

    n, count = args.regions_run, args.regions_parcels
    args.cache.mkdir(parents=True, exist_ok=True)
    dem = args.cache / f"regions_dem_{n}.tif"
    if not dem.exists():
        need = n * n * 4 * 1.2
        free = shutil.disk_usage(args.cache).free
        if free < need:
            raise SystemExit(f"{args.cache}: {free / 1e9:.1f} GB free, the DEM needs ≈ {need / 1e9:.1f} GB")
        t = time_now()
        tmp = dem.with_suffix(".part.tif")
        rd.make_dem(tmp, n)
        os.replace(tmp, dem)
        print(f"generated {dem} in {time_now() - t:.0f} s", flush=True)
    parts = args.cache / f"regions_parcels_{n}_{count}"
    if not parts.exists():
        t = time_now()
        tmp = parts.with_name(parts.name + ".part")
        shutil.rmtree(tmp, ignore_errors=True)
        step = -(-count // 20)
        tmp.mkdir()
        gdf = rd.make_parcels(n, count)
        for p, a in enumerate(range(0, count, step)):
            gdf.iloc[a : a + step].to_parquet(tmp / f"part-{p:03d}.parquet", row_group_size=50_000)
        del gdf
        os.replace(tmp, parts)
        print(f"generated {parts} in {time_now() - t:.0f} s", flush=True)
    rules_text = rd.RULES
    if args.regions_rules == "no-routing":
        rules_text = rules_text.replace(', "hand"]', "]").split("[zones.hand]")[0]
    else:  # every derived hazard kind: a stream easement too
        rules_text += (
            '[zones.streams]\nkind = "easement"\nderive = "streams"\nchannel_area_m2 = 1000000.0\nwidth_m = 20.0\n'
        )

    work = Path(tempfile.mkdtemp(prefix="lc-regions-", dir=args.cache))
    rules = work / "rules.toml"
    rules.write_text(rules_text)
    out = work / "out"
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    cmd = [sys.executable, "-m", "landcheck", "audit", "--dem", str(dem), "--parcels", str(parts)]
    cmd += ["--rulebook", str(rules), "--out", str(out), "--regions", str(args.regions)]
    cmd += ["--workers", str(args.regions_workers)]
    cmd += {"tables": ["--rasters", "none", "--no-report"], "gtiff": ["--rasters", "gtiff", "--no-report"]}.get(
        args.regions_outputs, []
    )
    try:
        m = measure(cmd, env)
        if m["rc"] != 0:
            raise SystemExit(f"landcheck audit --regions failed with exit status {m['rc']}")
        ex = json.loads((out / "run_times.json").read_text())["execution"]
    finally:
        shutil.rmtree(work, ignore_errors=True)
    rows = []
    print(
        f"\nregion run: {n}² DEM ({n * n / 1e6:.0f} M cells), {count} parcels, rules {args.regions_rules}, "
        f"outputs {args.regions_outputs}"
    )
    print(f"{'region':>6} {'parcels':>9} {'windows':>8} {'job s':>8} {'worker peak MiB':>16}")
    for r in ex["region_runs"]:
        rows.append(dict(test="region", size=n, parcels=r["parcels"], windows=r["windows"], s=r["seconds"],
                         peak_mib=r["peak_mib"]))  # fmt: skip
        print(f"{r['region'] + 1:>6} {r['parcels']:>9} {r['windows']:>8} {r['seconds']:>8.1f} {r['peak_mib']:>16.0f}")
    worker_peak = max(r["peak_mib"] for r in ex["region_runs"])
    overall = dict(
        test="regions-overall", size=n, parcels=count, regions=len(ex["region_runs"]), wall_s=m["wall_s"],
        cpu_s=m["cpu_s"], driver_s=ex["driver_seconds"], driver_peak_mib=ex["driver_peak_mib"],
        worker_peak_mib=worker_peak, largest_process_mib=m["peak_mib"], outputs=args.regions_outputs,
        report_s=ex.get("report_seconds"),
    )  # fmt: skip
    rows.append(overall)
    print(
        f"overall: {m['wall_s']:.1f} s wall, {m['cpu_s']:.1f} s CPU (all processes); driver {ex['driver_seconds']:.1f} s"
        + (f" (+ report {ex['report_seconds']:.1f} s)" if ex.get("report_seconds") is not None else "")
        + ", "
        f"peak {ex['driver_peak_mib']:.0f} MiB; workers' peak {worker_peak:.0f} MiB; largest process of the tree "
        f"{m['peak_mib']:.0f} MiB (2 GiB target: {'met' if max(m['peak_mib'], worker_peak) <= 2048 else 'NOT met'})"
    )
    return rows


def time_now() -> float:
    import time

    return time.perf_counter()


if __name__ == "__main__":
    sys.exit(main())
