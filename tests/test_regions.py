"""Region runs (landcheck.core.regions): a 4-region run on a LocalCluster of 2 workers writes the same
parcels.csv, classes.csv, summary.json, slope_pct.tif, conflict.tif and zones/cells.tif bytes as the
single-process audit, also when a worker is killed mid-run; DEM tiles and partitioned GeoParquet give the
same bytes; the report of a region run is the single run's page; where parcels of two regions share a
cell, the conflict raster shows the one the single run shows; a failing region names itself and a rerun
resumes the others.

The reference for every comparison is the single-process audit of the same inputs (itself checked against
exactextract, gdaldem and scipy elsewhere in the suite); that a distributed run must reproduce the serial
one bit for bit, and survive the loss of a worker, is common practice for batch reductions.
"""

from __future__ import annotations

import filecmp
import json
import os
import re
import signal
import time
from pathlib import Path

import numpy as np
import pytest
import regions_data as rd

from landcheck.core import regions
from landcheck.core.audit import audit
from landcheck.core.regions import audit_regions, plan_regions
from landcheck.errors import RegionError

TABLES = ("parcels.csv", "classes.csv")
RASTERS = ("slope_pct.tif", "conflict.tif", "zones/cells.tif")
BUILT = re.compile(r'<time id="report-built">.*?</time>', re.S)

pytestmark = pytest.mark.slow


def _same_bytes(a: Path, b: Path, names=TABLES) -> None:
    for name in names:
        assert filecmp.cmp(a / name, b / name, shallow=False), f"{name} differs between {a} and {b}"


@pytest.fixture(scope="module")
def big(tmp_path_factory):
    """4000² coastal DEM, 20 000 lots, HAND + sea-level rise + derived shore easements; single-process audit."""
    d = tmp_path_factory.mktemp("regions_big")
    dem = rd.make_dem(d / "dem.tif", 4000)
    parcels = d / "parcels.gpkg"
    rd.make_parcels(4000, 20_000).to_file(parcels, layer="parcels")
    rules = d / "rules.toml"
    rules.write_text(rd.RULES, encoding="utf-8")
    ref = d / "single"
    audit(dem, parcels, rules, ref, rasters="gtiff", report=False)
    return d, dem, parcels, rules, ref


def test_four_regions_two_workers_same_bytes_even_when_a_worker_is_killed(big, monkeypatch):
    # common practice: the distributed run reproduces the serial run bit for bit (module docstring)
    d, dem, parcels, rules, ref = big
    out = d / "regions"
    monkeypatch.setattr(regions, "TABLE_ROWS", 6_000)  # the tables in 4 slices (6 000, 6 000, 6 000, 2 000)
    res = audit_regions(dem, parcels, rules, out, regions=4, workers=2, rasters="gtiff", report=False)
    _same_bytes(ref, out, (*TABLES, "summary.json", *RASTERS))
    assert res.summary["totals"]["parcels"] == 20_000
    assert res.n_conflicts == res.summary["totals"]["verdict_counts"]["conflict"] > 0
    runs = json.loads((out / "run_times.json").read_text())["execution"]
    assert runs["regions"]["n_regions"] == 4 and len(runs["region_runs"]) == 4
    # lots straddle the region edges: regions drew their blocks with other regions' lots in them
    assert sum(r["halo_parcels"] for r in runs["region_runs"]) > 100
    import rasterio

    with rasterio.open(out / "conflict.tif") as c, rasterio.open(out / "slope_pct.tif") as sl:
        w = rasterio.windows.Window(1900, 1900, 300, 300)  # rows/cols 1900..2199: a corner of all 4 regions
        bits, slope = c.read(1, window=w), sl.read(1, window=w)
    # cells outside every parcel keep their slope (the region blocks cover the DEM), and both kinds are here
    assert (bits == 255).any() and (bits != 255).any() and np.isfinite(slope[bits == 255]).all()
    assert (out / "parcels.gpkg").is_file() and (out / "parcels.parquet").is_file()
    assert not (d / ".regions.regions").exists()  # scratch removed after publishing

    # a worker process killed (SIGKILL) while it runs a region job: Dask reschedules it, same bytes
    killed: list[int] = []

    def kill_a_busy_worker(client) -> None:
        pids = client.run(os.getpid)
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            busy = [a for a, keys in client.processing().items() if keys]
            if busy:
                time.sleep(0.5)  # inside the job (the first job also loads the compiled kernels)
                os.kill(pids[busy[0]], signal.SIGKILL)
                killed.append(pids[busy[0]])
                return
            time.sleep(0.02)

    out2 = d / "regions_killed"
    audit_regions(
        dem, parcels, rules, out2, regions=4, workers=2, rasters="gtiff", report=False, on_cluster=kill_a_busy_worker
    )
    assert killed
    runs = json.loads((out2 / "run_times.json").read_text())["execution"]["region_runs"]
    assert killed[0] not in {r["pid"] for r in runs}  # every region's result came from a live worker
    _same_bytes(ref, out2, (*TABLES, "summary.json", *RASTERS))


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """1200² DEM as one file and as 4 x 4 tiles, 1 500 lots as GeoPackage and partitioned GeoParquet; the
    single-process audit with tables only (``single``) and with its defaults: COG rasters and the report
    (``single_cog``)."""
    d = tmp_path_factory.mktemp("regions_small")
    dem = rd.make_dem(d / "dem.tif", 1200, block=256)
    tiles = rd.make_dem(d / "tiles", 1200, tiles=4, block=256)
    gdf = rd.make_parcels(1200, 1500, seed=5)
    parcels = d / "parcels.gpkg"
    gdf.to_file(parcels, layer="parcels")
    parts = rd.write_partitioned(gdf, d / "parcels_parquet", 3)
    rules = d / "rules.toml"
    rules.write_text(rd.RULES, encoding="utf-8")
    ref = d / "single"
    audit(dem, parcels, rules, ref, rasters="none", report=False, tile_cells=200)
    audit(dem, parcels, rules, d / "single_cog", tile_cells=200)
    return d, dem, tiles, parcels, parts, rules, ref


def test_tiles_and_partitioned_geoparquet_give_the_same_bytes(small):
    # Reference: the single-process audit of the one-file DEM and the GeoPackage (module docstring)
    d, dem, tiles, parcels, parts, rules, ref = small
    out = d / "from_tiles"
    audit_regions(tiles, parts, rules, out, regions=4, workers=2, tile_cells=200, rasters="none", report=False)
    _same_bytes(ref, out)
    import geopandas as gpd

    back = gpd.read_parquet(out / "parcels.parquet")
    table = gpd.read_file(ref / "parcels.gpkg")
    assert list(back["parcel_id"]) == list(table["parcel_id"])
    assert np.allclose(back.geometry.area, table.geometry.area)
    # the tile list file names the same tiles
    names = sorted(p.name for p in tiles.iterdir() if p.suffix == ".tif")
    (tiles / "tiles.txt").write_text("# tiles\n" + "\n".join(names) + "\n")
    out2 = d / "from_list"
    audit_regions(
        d / "tiles" / "tiles.txt",
        parcels,
        rules,
        out2,
        regions=2,
        workers=2,
        tile_cells=200,
        rasters="none",
        report=False,
    )
    _same_bytes(ref, out2)


def test_tile_vrt_reads_as_the_one_file_dem(small, tmp_path):
    # Reference: rasterio reading the one-file GeoTIFF the tiles were cut from
    import rasterio

    from landcheck.inputs.tiles import resolve_dem

    d, dem, tiles, *_ = small
    vrt, files = resolve_dem(tiles, tmp_path)
    assert len(files) == 16
    with rasterio.open(vrt) as a, rasterio.open(dem) as b:
        assert a.transform == b.transform and a.crs == b.crs and a.nodata == b.nodata
        assert np.array_equal(a.read(1), b.read(1))


def test_failing_region_names_itself_and_a_rerun_resumes_the_others(small):
    # common practice: a batch run fails with the failing part's message and resumes finished parts
    d, dem, tiles, parcels, parts, rules, ref = small
    work = d / "fail_tiles"
    work.mkdir()
    for p in tiles.iterdir():
        if p.suffix == ".tif":
            (work / p.name).write_bytes(p.read_bytes())
    # the south-east tile (rows and cols 900..1199) is read by region 4 only: the others' parcels and
    # slope halos stay within 100 cells of their blocks (lots are at most ≈ 35 cells across)
    hidden = work / "dem_3_3.tif.away"
    steps: list[str] = []

    def on_step(msg: str) -> None:
        steps.append(msg)
        if msg.startswith("running"):  # the DEM was validated; the south-east tile now goes missing
            os.replace(work / "dem_3_3.tif", hidden)

    out = d / "failing"
    kw = dict(regions=4, workers=2, tile_cells=200, rasters="gtiff", report=False)
    with pytest.raises(RegionError, match=r"^region 4 of 4 \(DEM rows 600\.\.1199, cols 600\.\.1199"):
        audit_regions(work, parcels, rules, out, on_step=on_step, **kw)
    assert not out.exists()
    assert (d / ".failing.regions" / "results").is_dir()
    os.replace(hidden, work / "dem_3_3.tif")  # the same bytes again: same fingerprint
    steps.clear()
    audit_regions(work, parcels, rules, out, on_step=steps.append, **kw)
    assert "3 of 4 regions finished in an earlier run: resumed, not redone" in steps
    assert sum(s.startswith("region ") and " done: " in s for s in steps) == 1
    _same_bytes(ref, out)
    # the resumed regions' tiles (kept in the scratch folder) and the redone one's: the single run's cells
    import rasterio

    for name in RASTERS:
        with rasterio.open(out / name) as a, rasterio.open(d / "single_cog" / name) as b:
            assert np.array_equal(a.read(1), b.read(1), equal_nan=True), name
    assert not (d / ".failing.regions").exists()  # scratch removed once published


def test_layout_blocks_of_whole_windows():
    # common practice: a partition covers every window exactly once
    lay = plan_regions(4000, 3000, 1024, 4)
    assert lay.n_regions == 4
    seen = np.zeros((lay.n_win_rows, lay.n_win_cols), int)
    for k in range(lay.n_regions):
        a, b, c, e = lay.block(k)
        seen[a:b, c:e] += 1
    assert (seen == 1).all()
    assert plan_regions(30000, 30000, 1024, "auto").n_regions == 25
    with pytest.raises(Exception, match="do not fit"):
        plan_regions(1000, 1000, 1024, 4)


def _page(path: Path, upto_manifest: bool = False) -> str:
    """report.html without its build time (common practice, as tests/test_reproducible.py compares reports);
    optionally only the part before the run manifest (which names the input files)."""
    page = BUILT.sub("", path.read_text(encoding="utf-8"))
    return page[: page.index('id="manifest"')] if upto_manifest else page


def test_region_run_report_and_cog_rasters_are_the_single_runs(small):
    # common practice: the distributed run reproduces the serial run bit for bit (module docstring); the
    # reference is the single-process audit with its defaults (COG rasters and the report)
    d, dem, tiles, parcels, parts, rules, ref = small
    single = d / "single_cog"
    out = d / "regions_cog"
    audit_regions(dem, parcels, rules, out, regions=4, workers=2, tile_cells=200)  # defaults: COG + report
    _same_bytes(single, out, (*TABLES, "summary.json", *RASTERS, "parcels.gpkg"))
    runs = json.loads((out / "run_times.json").read_text())["execution"]
    assert sum(r["halo_parcels"] for r in runs["region_runs"]) > 0  # lots straddle the region edges
    # the report reads the same folder files, so it is the same page: every figure, map and per-parcel row
    assert _page(out / "report.html") == _page(single / "report.html")
    page = (out / "report.html").read_text(encoding="utf-8")
    ids = [line.split(",", 1)[0] for line in (out / "parcels.csv").read_text().splitlines()[1:]]
    assert len(ids) == 1500 and all(f">{i}</td>" in page for i in ids[:: len(ids) // 25])
    assert "not a survey or legal determination" in page  # the caution (landcheck.about.CAUTION)


def test_cli_regions(small):
    # common practice: the command line gives what the API gives (same bytes as the single run)
    import subprocess
    import sys

    d, dem, tiles, parcels, parts, rules, ref = small
    out = d / "cli"
    cmd = [sys.executable, "-m", "landcheck", "audit", "--dem", str(tiles), "--parcels", str(parts)]
    cmd += ["--rulebook", str(rules), "--out", str(out), "--regions", "2", "--workers", "2", "--tile-size", "200"]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    assert "region 2/2 done" in r.stderr and "regions merged" in r.stderr and "building the report" in r.stderr
    _same_bytes(ref, out)
    # rasters and the report by default, as the single run: the same rasters, and the same page up to its
    # manifest (which names the tiles and the GeoParquet parts); the relief is drawn from the tiles' mosaic
    _same_bytes(d / "single_cog", out, RASTERS)
    assert _page(out / "report.html", upto_manifest=True) == _page(d / "single_cog" / "report.html", True)
    assert "dem_1_2.tif" in _page(out / "report.html")
    bad = subprocess.run(
        [*cmd[:-8], "--out", str(d / "cli2"), "--regions", "2", "--capability-map", "planning-6"],
        capture_output=True,
        text=True,
    )
    assert bad.returncode == 3 and "the capability map (leave out --capability-map)" in bad.stderr
    assert not (d / "cli2").exists()


def test_tables_in_slices_of_parcels_give_the_whole_tables_bytes(tmp_path):
    # common practice: a row-wise table written in slices equals the table written whole; the class table
    # and the sensitivity curve from the kept columns equal those from the whole table (the single run's
    # computation), also for sums too large to be exact in float64, where the order of the terms matters
    from landcheck.core.run import open_rules
    from landcheck.core.window_pass import build_plan
    from landcheck.outputs.writers import csv_rows, write_csv
    from landcheck.overlay.sums import Totals
    from landcheck.verdicts.evaluate import (
        SENSITIVITY_LIMITS_PCT,
        evaluate_parcels,
        parcel_rules,
        sensitivity_table,
        summarise_classes,
    )

    rules = open_rules(
        {
            "rulebook": {"class_field": "zoning"},
            "classes": {
                "housing": {"values": ["H"], "max_slope_pct": 15.0, "review_band_pct": 3.0},
                "fields": {"values": ["F"], "max_slope_pct": 25.0},
                "woods": {"values": ["W"], "development": False},
            },
        }
    )
    rng = np.random.default_rng(3)
    n = 25_000
    values = rng.choice(np.array(["H", "F", "W", "X", None], dtype=object), n, p=[0.4, 0.3, 0.2, 0.05, 0.05])
    pr = parcel_rules(rules, values)
    plan = build_plan(rules, pr.class_name, np.ones(n), 1.0)
    totals = Totals(n, len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    big = 2**55 // n  # quanta per parcel: the column sums pass 2^53 quanta, beyond exact float64 sums
    q = totals._q
    q["covered_m2"][:] = rng.integers(big // 2, big, n)
    q["evaluated_m2"][:] = q["covered_m2"] - rng.integers(0, big // 4, n)
    over = np.sort(rng.integers(0, big // 2, (n, len(plan.thresholds_pct))), axis=1)[:, ::-1]
    q["over_m2"][:] = np.minimum(over, q["evaluated_m2"][:, None])
    q["conflict_m2"][:] = q["over_m2"][np.arange(n), np.maximum(plan.limit_index, 0)]
    q["near_conflict_m2"][:] = q["over_m2"][np.arange(n), np.maximum(plan.near_index, 0)]
    totals._q_slope[:] = rng.integers(0, big, n)
    totals.slope_max_pct[:] = rng.uniform(0, 80, n)
    area = q["covered_m2"] * 2.0**-20 + rng.uniform(0, 5, n)
    empty = rng.random(n) < 0.01

    whole = evaluate_parcels(totals, plan, rules, pr, area, empty, values)
    edges = [0, 7_000, 7_001, 19_000, n]
    kept = regions._SummedColumns(np.arange(1, n + 1), rules, [])
    with csv_rows(tmp_path / "slices.csv") as add:
        for a, b in zip(edges, edges[1:]):
            rows = evaluate_parcels(totals.rows(a, b), regions._subset_plan(plan, np.arange(a, b)), rules,
                                    pr.rows(a, b), area[a:b], empty[a:b], values[a:b])  # fmt: skip
            add(rows)
            kept.add(rows)
    write_csv(tmp_path / "whole.csv", whole)
    assert (tmp_path / "slices.csv").read_bytes() == (tmp_path / "whole.csv").read_bytes()

    slim = kept.frame()
    write_csv(tmp_path / "classes_whole.csv", summarise_classes(whole, rules))
    write_csv(tmp_path / "classes_kept.csv", summarise_classes(slim, rules))
    assert (tmp_path / "classes_whole.csv").read_bytes() == (tmp_path / "classes_kept.csv").read_bytes()
    for col in ("covered_m2", "evaluated_m2", "conflict_m2"):
        assert whole[col].sum() == slim[col].sum()
        assert whole[col].sum() != np.cumsum(whole[col].to_numpy())[-1]  # the order of the terms matters here

    counted = (whole["verdict"] != "no_data").to_numpy() & (whole["verdict"] != "no_rule").to_numpy()
    got = sensitivity_table(totals, plan, pr, rules, counted)
    idx = np.searchsorted(plan.thresholds_pct, SENSITIVITY_LIMITS_PCT)
    # the whole float view, as the sensitivity curve was computed before Totals.column_sums
    for name, sel in (
        ("housing", (pr.class_name == "housing") & counted),
        ("all", np.isin(pr.class_name, ["housing", "fields"]) & counted),
    ):
        expected = (totals.over_m2[sel][:, idx].sum(axis=0) / totals.evaluated_m2[sel].sum()).tolist()
        assert (got["all_development"] if name == "all" else got["classes"][name]) == expected


def test_cells_shared_by_parcels_of_two_regions_show_the_single_runs_parcel(tmp_path):
    # Source: the ramp's slope is exactly 0.04·x % at a cell centre x metres east (docs/references.md §1), so
    # 13 % at the cells of column 32 and 12.6 % at column 31, over the residential limit of 5 %; a boundary
    # through a cell's middle covers exactly half of it (docs/references.md §15). The conflict raster shows
    # the parcel covering most of a cell, ties to the earlier parcel (docs/outputs.md); the region run must
    # give the single run's bytes (common practice, module docstring).
    import rasterio
    import shapely
    from _support import ramp_dem, write_parcels, write_rules

    dem = ramp_dem(tmp_path / "dem.tif", n=64)  # 64 x 64 cells of 10 m; 4 regions of 32 x 32 cells
    rules = write_rules(tmp_path / "rules.toml", limit=5.0)
    x0, y0 = 400000.0, 1600000.0

    def lot(c0: float, c1: float, r0: int, r1: int):
        return shapely.box(x0 + 10 * c0, y0 - 10 * r1, x0 + 10 * c1, y0 - 10 * r0)

    # region edge between columns 31 and 32; each lot's own region is the one holding its middle
    geoms = [
        lot(20, 32.5, 8, 16),  # pid 1, R, west: ties with pid 2 on column 32 (east region), wins by order
        lot(32.5, 45, 8, 16),  # pid 2, F, east
        lot(32.5, 45, 40, 48),  # pid 3, F, east: ties with pid 4 on column 32, wins by order
        lot(20, 32.5, 40, 48),  # pid 4, R, west
        lot(20, 32.7, 20, 28),  # pid 5, R, west: 70 % of each column-32 cell
        lot(32.7, 45, 20, 28),  # pid 6, F, east: 30 %
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 7), zoning=["R", "F", "F", "R", "R", "F"])
    kw = dict(tile_cells=16, rasters="gtiff", report=False)
    audit(dem, parcels, rules, tmp_path / "single", **kw)
    audit_regions(dem, parcels, rules, tmp_path / "regions", regions=4, workers=1, **kw)
    _same_bytes(tmp_path / "single", tmp_path / "regions", ("conflict.tif", "slope_pct.tif", *TABLES))
    with rasterio.open(tmp_path / "regions" / "conflict.tif") as ds:
        bits = ds.read(1)
    assert (bits[8:16, 31:33] == 1).all() and (bits[8:16, 33] == 0).all()  # pid 1 on column 32
    assert (bits[40:48, 31] == 1).all() and (bits[40:48, 32:34] == 0).all()  # pid 3 on column 32
    assert (bits[20:28, 31:33] == 1).all() and (bits[20:28, 33] == 0).all()  # pid 5 on column 32
    assert (bits[:8] == 255).all() and (bits[8:16, 19] == 255).all()  # outside every lot


def test_a_region_finished_without_rasters_is_redone_when_rasters_are_asked_for(tmp_path):
    """Resume rule (docs/scale.md, common practice for resumable jobs): a finished region is reused only
    when its result matches the run's fingerprint and, when the run writes rasters, its tiles exist."""
    npz, marker = regions._result_paths(str(tmp_path), 3)
    npz.parent.mkdir(parents=True)
    np.savez(npz, gidx=np.arange(3))
    marker.write_text(json.dumps({"fingerprint": "abc", "region": 3}), encoding="utf-8")
    assert regions._finished(str(tmp_path), 3, "abc", rasters=False) == {"fingerprint": "abc", "region": 3}
    assert regions._finished(str(tmp_path), 3, "other", rasters=False) is None
    assert regions._finished(str(tmp_path), 3, "abc", rasters=True) is None  # a tables-only result
    slope, conflict = regions._raster_paths(str(tmp_path), 3)
    slope.write_bytes(b"tiles")
    assert regions._finished(str(tmp_path), 3, "abc", rasters=True) is None  # one of the two tiles only
    conflict.write_bytes(b"tiles")
    assert regions._finished(str(tmp_path), 3, "abc", rasters=True) == {"fingerprint": "abc", "region": 3}
