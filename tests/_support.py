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
    with rasterio.open(path, "w", driver="GTiff", width=array.shape[1], height=array.shape[0], count=1,
                       dtype=dtype or array.dtype, crs=crs, transform=transform, nodata=nodata) as ds:
        ds.write(array, 1)
    return path
