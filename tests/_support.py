"""Helpers shared by test modules (import as ``from _support import ...``).

Reference checks that need an outside tool (gdaldem, chromium) carry the
``reference_tool`` marker.  They skip locally when the tool is missing, but
when LANDCHECK_REQUIRE_REFERENCE_TOOLS=1 (set by .ci/run) a missing tool is a
failure, so CI can never go green on a skipped reference check.
"""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

REQUIRE_TOOLS = os.environ.get("LANDCHECK_REQUIRE_REFERENCE_TOOLS") == "1"


def require_tool(name: str) -> str:
    """Path of an outside tool, or skip (fail under CI) when it is missing."""
    path = shutil.which(name)
    if path is None:
        msg = f"reference tool {name!r} not found on PATH"
        if REQUIRE_TOOLS:
            pytest.fail(msg + " (LANDCHECK_REQUIRE_REFERENCE_TOOLS=1: CI must run every reference check)")
        pytest.skip(msg)
    return path


def write_raster(path, array, *, transform=None, crs="EPSG:32651", nodata=-9999.0, dtype=None):
    """Write a single-band GeoTIFF for a test and return its path."""
    array = np.asarray(array)
    transform = transform if transform is not None else from_origin(400000.0, 1600000.0, 10.0, 10.0)
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=array.shape[1],
        height=array.shape[0],
        count=1,
        dtype=dtype or array.dtype,
        crs=crs,
        transform=transform,
        nodata=nodata,
    ) as ds:
        ds.write(array, 1)
    return path


def write_parcels(path, geoms, *, crs="EPSG:32651", layer="parcels", **columns):
    """Write a parcel layer (GeoPackage unless the suffix says otherwise) and return its path."""
    import geopandas as gpd

    gdf = gpd.GeoDataFrame(columns, geometry=list(geoms), crs=crs)
    if str(path).endswith(".parquet"):
        gdf.to_parquet(path)
    elif str(path).endswith(".geojson"):
        gdf.to_file(path, driver="GeoJSON")
    elif str(path).endswith(".shp"):
        gdf.to_file(path)
    else:
        gdf.to_file(path, layer=layer, driver="GPKG")
    return path


RULES_SIMPLE = """
[rulebook]
title = "test rulebook"
class_field = "zoning"
id_field = "pid"
min_evaluated_share = 0.5

[classes.residential]
values = ["R"]
max_slope_pct = {limit}
tolerance_pct = {tol}
min_breach_m2 = {min_breach}
review_band_pct = {band}

[classes.forest]
values = ["F"]
development = false
"""


def write_rules(path, *, limit=18.0, tol=5.0, min_breach=0.0, band=0.0, text=None):
    path.write_text(
        text if text is not None else RULES_SIMPLE.format(limit=limit, tol=tol, min_breach=min_breach, band=band)
    )
    return path


def ramp_dem(path, *, n=120, h=10.0, gradient_per_m=0.0004, origin=(400000.0, 1600000.0), crs="EPSG:32651"):
    """DEM whose slope rises linearly eastwards: z = g/2 * x^2 gives slope 100*g*x percent at distance x.

    Every 3x3 kernel is exact on a quadratic at the centre cell (docs/references.md §1), so the slope of the
    cell whose centre is at x is exactly 100*g*x percent.
    """
    x = (np.arange(n) + 0.5) * h
    z = np.tile(0.5 * gradient_per_m * x**2, (n, 1))
    return write_raster(path, z.astype("float64"), transform=from_origin(origin[0], origin[1], h, h), crs=crs)
