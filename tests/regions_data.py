"""Synthetic inputs for the region-run tests: a coastal DEM with hills and valleys, lots on a lattice.

Deterministic (fixed seeds); used by tests/test_regions.py and scripts/benchmark.py --regions-run.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

CELL_M = 10.0
ORIGIN = (500000.0, 4200000.0)
CRS = "EPSG:32633"

RULES = """[rulebook]
class_field = "zoning"
id_field = "pid"
[classes.residential]
values = ["RES"]
context = "urban"
max_slope_pct = 18.0
tolerance_pct = 2
forbidden_zones = ["shore", "slr", "hand"]
[classes.agricultural]
values = ["AGR"]
context = "agricultural"
max_slope_pct = 30.0
forbidden_zones = ["shore", "slr"]
[classes.forest]
values = ["FOR"]
development = false
context = "forest"
[zones.shore]
kind = "easement"
derive = "shoreline"
width_m = { urban = 20.0, agricultural = 40.0, forest = 60.0 }
[zones.slr]
kind = "sea_rise"
rise_m = 1.0
scenarios_m = [0.5, 2.0]
[zones.hand]
kind = "hand"
max_hand_m = 3.0
channel_area_m2 = 250000.0
"""


def elevation(rows: np.ndarray, cols: np.ndarray, n: int, seed: int = 7) -> np.ndarray:
    """Elevation (m) of cells: a coast along the west edge, rising inland, with hills and valleys."""
    rng = np.random.default_rng(seed)
    ph = rng.uniform(0, 2 * np.pi, 6)
    x = cols[None, :] * CELL_M
    y = rows[:, None] * CELL_M
    extent = n * CELL_M
    base = 60.0 * (x / extent) - 8.0 + 6.0 * np.sin(y / 1900.0 + ph[0])  # the sea in the west
    hills = 25.0 * np.sin(x / 2300.0 + ph[1]) * np.cos(y / 2900.0 + ph[2]) + 6.0 * np.sin(x / 310.0 + y / 470.0 + ph[3])
    rough = 1.5 * np.sin(x / 53.0 + ph[4]) * np.cos(y / 41.0 + ph[5])
    return (base + np.clip(x / 1500.0, 0, 1) * (hills + rough)).astype(np.float32)


def make_dem(path: Path, n: int, *, tiles: int | None = None, block: int = 512) -> Path:
    """An ``n`` x ``n`` float32 DEM (one GeoTIFF, or ``tiles`` x ``tiles`` tiles in the folder ``path``)."""
    import rasterio
    from rasterio.transform import from_origin

    def write(p: Path, r0: int, c0: int, h: int, w: int) -> None:
        prof = dict(
            driver="GTiff", width=w, height=h, count=1, dtype="float32", crs=CRS, nodata=-9999.0,
            transform=from_origin(ORIGIN[0] + c0 * CELL_M, ORIGIN[1] - r0 * CELL_M, CELL_M, CELL_M),
            tiled=True, blockxsize=block, blockysize=block, BIGTIFF="IF_SAFER",
        )  # fmt: skip
        with rasterio.open(p, "w", **prof) as ds:
            step = 512
            for a in range(0, h, step):
                hh = min(step, h - a)
                z = elevation(np.arange(r0 + a, r0 + a + hh), np.arange(c0, c0 + w), n)
                ds.write(z, 1, window=rasterio.windows.Window(0, a, w, hh))

    if tiles is None:
        write(path, 0, 0, n, n)
        return path
    path.mkdir(parents=True, exist_ok=True)
    edges = [i * n // tiles for i in range(tiles + 1)]
    for i in range(tiles):
        for j in range(tiles):
            write(path / f"dem_{i}_{j}.tif", edges[i], edges[j], edges[i + 1] - edges[i], edges[j + 1] - edges[j])
    return path


def make_parcels(n_dem: int, count: int, seed: int = 11):
    """``count`` rotated lots (0.1-6 ha) on a lattice over the DEM, some crossing the coast; a GeoDataFrame."""
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(seed)
    extent = n_dem * CELL_M
    k = int(np.ceil(np.sqrt(count)))
    side = extent / k
    i = np.arange(count)
    r, c = np.divmod(i, k)
    area = rng.uniform(1_000, 60_000, count)
    w = np.minimum(np.sqrt(area) * rng.uniform(0.7, 1.4, count), side * 0.95)
    h = np.minimum(area / w, side * 0.95)
    cx = ORIGIN[0] + (c + 0.5 + rng.uniform(-0.2, 0.2, count)) * side
    cy = ORIGIN[1] - (r + 0.5 + rng.uniform(-0.2, 0.2, count)) * side
    ang = np.radians(rng.uniform(0, 90, count))
    dx = np.array([-1, 1, 1, -1, -1])[None, :] * (w / 2)[:, None]
    dy = np.array([-1, -1, 1, 1, -1])[None, :] * (h / 2)[:, None]
    xs = cx[:, None] + dx * np.cos(ang)[:, None] - dy * np.sin(ang)[:, None]
    ys = cy[:, None] + dx * np.sin(ang)[:, None] + dy * np.cos(ang)[:, None]
    geoms = shapely.polygons(np.stack([xs, ys], axis=-1))
    zoning = rng.choice(["RES", "AGR", "FOR"], size=count, p=[0.5, 0.35, 0.15])
    return gpd.GeoDataFrame({"pid": i + 1, "zoning": zoning}, geometry=geoms, crs=CRS)


def write_partitioned(gdf, folder: Path, parts: int) -> Path:
    """The parcels as a partitioned GeoParquet folder: ``parts`` files in row order, two row groups each."""
    folder.mkdir(parents=True, exist_ok=True)
    edges = [i * len(gdf) // parts for i in range(parts + 1)]
    for p in range(parts):
        sub = gdf.iloc[edges[p] : edges[p + 1]]
        sub.to_parquet(folder / f"part-{p:03d}.parquet", row_group_size=max(1, -(-len(sub) // 2)))
    return folder
