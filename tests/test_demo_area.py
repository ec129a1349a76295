"""Checks on the committed demo area (demo_area/) and its generator.

The demo is invented (the town of Alderwane on Corrin Bay, the Tamsel River),
so most checks test that the files have the properties the demo promises,
using outside tools where one exists: GDAL (through rasterio and gdaldem),
scipy.ndimage for connectivity and interpolation, shapely for geometry.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from rasterio import features
from scipy import ndimage

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from demo_oracle import load_generator

from landcheck.terrain.slope import slope_gradient

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_area"
SCRIPT = ROOT / "scripts" / "make_demo_area.py"
LIMIT_PCT = 18.0
RESIDENTIAL = ("RES-1", "RES-2")


# --------------------------------------------------------------------------
# fixtures (read once per module)
# --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def dem():
    with rasterio.open(DEMO / "dem.tif") as src:
        elev = src.read(1).astype(np.float64)
        info = {
            "crs": src.crs,
            "transform": src.transform,
            "nodata": src.nodata,
            "dtype": src.dtypes[0],
            "shape": (src.height, src.width),
            "res": src.res,
            "block_shapes": src.block_shapes,
            "structure": src.tags(ns="IMAGE_STRUCTURE"),
            "tags": src.tags(),
            "bounds": src.bounds,
        }
    elev[elev == info["nodata"]] = np.nan
    return elev, info


@pytest.fixture(scope="module")
def parcels():
    return gpd.read_file(DEMO / "parcels.gpkg", layer="parcels")


@pytest.fixture(scope="module")
def rulebook():
    with open(DEMO / "rulebook.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="module")
def slope_pct(dem):
    """Horn slope in percent from the package kernel; NaN on the outer ring and next to the void."""
    elev, info = dem
    rows, _ = elev.shape
    haloed = np.pad(elev, 1, constant_values=np.nan)
    cell_x, cell_y = info["res"]
    g = slope_gradient(haloed, np.full(rows, cell_x), np.full(rows, cell_y), "horn", backend="numpy")
    return 100.0 * g.astype(np.float64)


def _fractional_rowcol(transform, x, y):
    """Fractional (row, col) of map coordinates on a north-up grid; cell centres sit at .5."""
    return (np.asarray(y) - transform.f) / transform.e, (np.asarray(x) - transform.c) / transform.a


def _parcel_id_raster(parcels, info):
    """Parcel index (1-based row number) of each cell whose centre falls in a parcel; 0 elsewhere."""
    shapes = [(shapely.make_valid(g), k) for k, g in enumerate(parcels.geometry, start=1)]
    return features.rasterize(shapes, out_shape=info["shape"], transform=info["transform"], dtype=np.int32)


# --------------------------------------------------------------------------
# files and formats
# --------------------------------------------------------------------------


def test_committed_files_open_with_expected_layers():
    # Source: the demo's file list in demo_area/README.md; layers read back through GDAL (pyogrio).
    expected = {
        "parcels.gpkg": "parcels",
        "shoreline.gpkg": "shoreline",
        "rivers.gpkg": "rivers",
        "flood_hazard.gpkg": "flood_hazard",
    }
    for name, layer in expected.items():
        gdf = gpd.read_file(DEMO / name, layer=layer)
        assert len(gdf) > 0, name
        assert gdf.crs.to_epsg() == 32651, name
    assert (DEMO / "README.md").is_file()
    total_bytes = sum(p.stat().st_size for p in DEMO.iterdir() if p.is_file())
    assert total_bytes < 6_000_000  # the demo must stay small enough to commit


def test_dem_georeferencing_and_encoding(dem):
    # Source: GeoTIFF metadata as reported by GDAL through rasterio; the values are the demo's specification.
    elev, info = dem
    assert info["crs"].to_epsg() == 32651
    assert info["dtype"] == "float32"
    assert info["nodata"] == -9999.0
    assert info["res"] == (10.0, 10.0)
    assert 900 <= info["shape"][0] <= 1100 and 900 <= info["shape"][1] <= 1100
    assert (info["transform"].c, info["transform"].f) == (400000.0, 1600000.0)
    assert info["block_shapes"][0] == (256, 256)  # tiled, not stripped
    assert info["structure"]["COMPRESSION"] == "DEFLATE"
    assert info["structure"]["PREDICTOR"] == "3"  # floating-point predictor
    # values are rounded to 0.01 m (common practice for compressible demo rasters)
    finite = elev[np.isfinite(elev)]
    assert np.allclose(finite * 100.0, np.round(finite * 100.0), atol=1e-3)


def test_dem_matches_regeneration_with_recorded_seed(dem, parcels, tmp_path):
    # Our own generator: this checks reproducibility of the committed files, not
    # their correctness.  Tolerance 0.011 m = one rounding step (FFT results may
    # differ in the last bits between platforms).
    elev, info = dem
    match = re.search(r"--seed (\d+) --size (\d+)", info["tags"]["generator"])
    assert match, "dem.tif should record the generator's seed and size"
    seed, size = match.groups()
    # run the script's command-line entry point in this process (saves re-importing geopandas)
    assert load_generator().main(["--seed", seed, "--size", size, "--out", str(tmp_path)]) == 0
    with rasterio.open(tmp_path / "dem.tif") as src:
        again = src.read(1).astype(np.float64)
        again[again == src.nodata] = np.nan
    np.testing.assert_array_equal(np.isnan(again), np.isnan(elev))
    np.testing.assert_allclose(again, elev, rtol=0.0, atol=0.011, equal_nan=True)
    regenerated = gpd.read_file(tmp_path / "parcels.gpkg", layer="parcels")
    cols = ["parcel_id", "zoning", "owner_ref"]
    assert regenerated[cols].equals(parcels[cols])
    assert (tmp_path / "rulebook.toml").read_bytes() == (DEMO / "rulebook.toml").read_bytes()


# --------------------------------------------------------------------------
# terrain
# --------------------------------------------------------------------------


def test_relief_sea_and_hills(dem, slope_pct):
    # Source: the demo's specification (sea below 0 m, hills of 300-450 m, slopes past 40 %).
    elev, _ = dem
    assert np.nanmin(elev) < -5.0
    assert 300.0 <= np.nanmax(elev) <= 450.0
    land = np.isfinite(slope_pct) & (elev > 0)
    assert np.mean(slope_pct[land] >= 40.0) > 0.01
    assert np.mean(slope_pct[land] < 5.0) > 0.2  # a real coastal plain, not just hills


def test_sea_is_one_body_on_the_south_edge(dem):
    # Source: scipy.ndimage.label with 8-connectivity as the reference for connected regions.
    elev, _ = dem
    sea = np.nan_to_num(elev, nan=1.0) < 0
    labels, n = ndimage.label(sea, structure=np.ones((3, 3)))
    assert n == 1
    assert sea[-1, :].all()  # the whole southern edge is sea
    assert not sea[0, :].any()  # the northern edge is land


def test_low_ground_needs_connectivity(dem):
    # Source: Poulter & Halpin 2008 (IJGIS 22(2)) bathtub with hydrological connectivity:
    # flooded = below the water level AND connected to the sea.  The demo must hold
    # land below +1 m on both sides of that rule, so connectivity changes the answer.
    elev, _ = dem
    filled = np.nan_to_num(elev, nan=9999.0)
    low = filled <= 1.0
    labels, _ = ndimage.label(low, structure=np.ones((3, 3)))
    sea_labels = np.unique(labels[filled < 0])
    connected = np.isin(labels, sea_labels[sea_labels > 0])
    land = filled >= 0
    cell_m2 = 100.0
    connected_land_m2 = np.count_nonzero(connected & land) * cell_m2
    enclosed_m2 = np.count_nonzero(low & ~connected) * cell_m2
    assert connected_land_m2 > 100_000.0
    assert enclosed_m2 > 100_000.0
    # the enclosed low ground is mostly one basin (behind the dune ridge), not scattered cells
    enclosed_labels, n_enclosed = ndimage.label(low & ~connected, structure=np.ones((3, 3)))
    sizes = np.bincount(enclosed_labels.ravel())[1:]
    assert n_enclosed >= 1 and sizes.max() * cell_m2 > 100_000.0


def test_shoreline_follows_the_zero_contour(dem):
    # Source: bilinear interpolation (scipy.ndimage.map_coordinates, order 1) of the
    # DEM at the shoreline's vertices; a 0 m contour must interpolate to about 0 m.
    elev, info = dem
    line = gpd.read_file(DEMO / "shoreline.gpkg").geometry.iloc[0]
    xy = np.asarray(line.coords)[1:-1]
    rows, cols = _fractional_rowcol(info["transform"], xy[:, 0], xy[:, 1])
    z0 = ndimage.map_coordinates(np.nan_to_num(elev), [rows - 0.5, cols - 0.5], order=1)
    assert np.max(np.abs(z0)) < 0.25
    # 20 m to the north is land, 20 m to the south is sea
    for dy, sign in ((20.0, 1.0), (-20.0, -1.0)):
        r, c = _fractional_rowcol(info["transform"], xy[:, 0], xy[:, 1] + dy)
        z = elev[np.floor(r).astype(int).clip(0, elev.shape[0] - 1), np.floor(c).astype(int)]
        assert np.all(sign * z > 0)


def test_river_centreline_runs_along_the_channel(dem):
    # Common practice: a river centreline follows the lowest line of its channel, so the
    # DEM under it is lower than the ground 50 m beyond either bank.
    elev, info = dem
    rivers = gpd.read_file(DEMO / "rivers.gpkg")
    assert set(rivers["name"]) == {"Tamsel River"}
    assert (rivers["width_m"] > 0).all()

    def sample(x, y):
        r, c = _fractional_rowcol(info["transform"], x, y)
        return elev[
            np.floor(r).astype(int).clip(0, elev.shape[0] - 1), np.floor(c).astype(int).clip(0, elev.shape[1] - 1)
        ]

    for geom, width_m in zip(rivers.geometry, rivers["width_m"]):
        p = np.asarray(geom.coords)
        t = np.gradient(p, axis=0)
        n = np.column_stack([-t[:, 1], t[:, 0]]) / np.hypot(t[:, 0], t[:, 1])[:, None]
        off = width_m / 2 + 50.0
        zc = sample(p[:, 0], p[:, 1])
        lower = (zc < sample(*(p + n * off).T)) & (zc < sample(*(p - n * off).T))
        assert np.mean(lower) > 0.95
    # the river ends on the shoreline
    shore = gpd.read_file(DEMO / "shoreline.gpkg").geometry.iloc[0]
    ends = [shapely.Point(g.coords[-1]) for g in rivers.geometry]
    assert min(e.distance(shore) for e in ends) < 1.0


def test_flood_polygons(dem):
    # Source: the demo's specification (integer hazard_level 1..3 along the river and low plain).
    flood = gpd.read_file(DEMO / "flood_hazard.gpkg")
    assert flood["hazard_level"].dtype.kind == "i"
    assert set(flood["hazard_level"]) == {1, 2, 3}
    rivers = gpd.read_file(DEMO / "rivers.gpkg")
    high = flood[flood["hazard_level"] == 3].union_all()
    assert high.intersects(rivers.union_all())
    assert flood.geometry.is_valid.all()


# --------------------------------------------------------------------------
# parcels
# --------------------------------------------------------------------------


def test_parcel_attributes(parcels):
    # Source: the demo's specification (300-500 parcels, unique integer ids, invented owner refs).
    assert 300 <= len(parcels) <= 500
    assert parcels["parcel_id"].dtype.kind == "i"
    assert parcels["parcel_id"].is_unique
    assert parcels["owner_ref"].str.fullmatch(r"AW-\d{4}").all()
    assert parcels["zoning"].notna().all()


def test_every_zoning_value_maps_to_one_class(parcels, rulebook):
    # Source: the rulebook schema (each raw code belongs to exactly one class).
    owner = {}
    for name, cls in rulebook["classes"].items():
        for value in cls["values"]:
            assert value not in owner, f"{value} is listed in {owner.get(value)} and {name}"
            owner[value] = name
    missing = sorted(set(parcels["zoning"]) - set(owner))
    assert not missing, f"zoning values without a class: {missing}"


def test_rulebook_is_consistent(rulebook):
    # Source: the rulebook schema agreed for landcheck (keys, and references between sections).
    assert rulebook["rulebook"]["class_field"] == "zoning"
    assert rulebook["rulebook"]["id_field"] == "parcel_id"
    for key, path in rulebook["layers"].items():
        assert (DEMO / path).is_file(), key
    for name, cls in rulebook["classes"].items():
        assert cls["context"] in ("urban", "agricultural", "forest"), name
        for zone in cls.get("forbidden_zones", []):
            assert zone in rulebook["zones"], f"{name} forbids unknown zone {zone}"
        if cls["development"]:
            assert cls["max_slope_pct"] == LIMIT_PCT, name
        else:
            assert "max_slope_pct" not in cls, name
    for name, zone in rulebook["zones"].items():
        if "layer" in zone:
            assert zone["layer"] in rulebook["layers"], name
        if zone["kind"] == "easement":
            assert set(zone["width_m"]) == {"urban", "agricultural", "forest"}


def test_parcels_do_not_overlap(parcels):
    # Common practice: cadastral parcels partition the land, so no two may overlap.
    # Tolerance 0.01 m2 per pair for floating-point noise along shared edges.
    geoms = np.array([shapely.make_valid(g) for g in parcels.geometry])
    tree = shapely.STRtree(geoms)
    left, right = tree.query(geoms, predicate="intersects")
    pairs = left < right
    overlap = shapely.area(shapely.intersection(geoms[left[pairs]], geoms[right[pairs]]))
    assert overlap.max(initial=0.0) < 0.01


def test_parcels_inside_the_dem_but_one(parcels, dem):
    # Source: the demo's specification (exactly one parcel hangs over the DEM edge).
    _, info = dem
    b = info["bounds"]
    frame = shapely.box(b.left, b.bottom, b.right, b.top)
    geoms = [shapely.make_valid(g) for g in parcels.geometry]
    outside = [g for g in geoms if not frame.contains(g)]
    assert len(outside) == 1
    inside_share = outside[0].intersection(frame).area / outside[0].area
    assert 0.2 < inside_share < 0.8  # below the rulebook's 0.8 evaluated share


def test_geometry_quirks_for_repair(parcels):
    # Source: shapely/GEOS validity rules (is_valid_reason) and part counts.
    reasons = [shapely.is_valid_reason(g) for g in parcels.geometry]
    bowties = [r for r in reasons if r.startswith("Self-intersection")]
    assert 1 <= len(bowties) <= 2
    assert sum(r != "Valid Geometry" for r in reasons) == len(bowties)
    parts = shapely.get_num_geometries(parcels.geometry.values)
    assert np.count_nonzero(parts > 1) >= 3


def test_residential_parcels_on_steep_ground(parcels, dem, slope_pct):
    # Common practice check: the demo must contain residential land above an 18 %
    # slope limit, or the slope rule would have nothing to find.  Slope from
    # landcheck.terrain.slope.slope_gradient (Horn 1981), cell-centre membership.
    _, info = dem
    ids = _parcel_id_raster(parcels, info)
    valid = np.isfinite(slope_pct)
    steep = valid & (slope_pct >= LIMIT_PCT)
    n = len(parcels) + 1
    n_valid = np.bincount(ids[valid], minlength=n)
    n_steep = np.bincount(ids[steep], minlength=n)
    residential = np.flatnonzero(parcels["zoning"].isin(RESIDENTIAL).to_numpy()) + 1
    share = n_steep[residential] / np.maximum(n_valid[residential], 1)
    # several residential parcels have more than 5 % of their cells at or above 18 %
    assert np.count_nonzero(share > 0.05) >= 5
    # ... but most residential land is on gentle ground (the town on the plain)
    assert np.count_nonzero(share == 0.0) > 0.6 * len(residential)
    # a few small (< 0.5 ha) lots stand on mostly steep ground
    small = parcels.geometry.area.to_numpy() < 5000.0
    small_steep = small & (n_steep[1:] > 0.5 * np.maximum(n_valid[1:], 1))
    assert np.count_nonzero(small_steep) >= 3


@pytest.mark.reference_tool
def test_steep_residential_parcels_agree_with_gdaldem(parcels, dem, slope_pct, tmp_path):
    # Source: gdaldem slope -p (GDAL's Horn slope in percent) as an outside reference.
    gdaldem = shutil.which("gdaldem")
    if gdaldem is None:
        pytest.skip("gdaldem not installed")
    out = tmp_path / "slope.tif"
    subprocess.run([gdaldem, "slope", "-p", "-q", str(DEMO / "dem.tif"), str(out)], check=True, timeout=60)
    with rasterio.open(out) as src:
        ref = src.read(1, masked=True).filled(np.nan).astype(np.float64)
    both = np.isfinite(ref) & np.isfinite(slope_pct)
    np.testing.assert_allclose(slope_pct[both], ref[both], rtol=1e-4, atol=1e-3)
    _, info = dem
    ids = _parcel_id_raster(parcels, info)
    residential = set(np.flatnonzero(parcels["zoning"].isin(RESIDENTIAL).to_numpy()) + 1)
    steep_ref = set(np.unique(ids[both & (ref >= LIMIT_PCT)])) & residential
    steep_ours = set(np.unique(ids[both & (slope_pct >= LIMIT_PCT)])) & residential
    assert len(steep_ref) >= 5
    assert steep_ref == steep_ours
