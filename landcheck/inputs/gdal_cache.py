"""A cap on GDAL's block cache for streamed runs (reading the DEM, writing rasters window by window)."""

from __future__ import annotations

import os

__all__ = ["GDAL_CACHE_CAP_BYTES", "cap_gdal_cache"]

#: largest GDAL block cache landcheck lets its own runs use (bytes); GDAL's default is 5 % of RAM
GDAL_CACHE_CAP_BYTES = 64 * 2**20


def cap_gdal_cache(max_bytes: int = GDAL_CACHE_CAP_BYTES) -> None:
    """Lower GDAL's block cache to ``max_bytes`` unless the user set ``GDAL_CACHEMAX`` themselves.

    Streamed writers push every block through this cache; left at GDAL's default (5 % of RAM)
    it alone can hold more than a gigabyte of finished tiles.  Never raises the limit.
    """
    if "GDAL_CACHEMAX" in os.environ:
        return
    from rasterio._env import get_gdal_config, set_gdal_config

    try:
        current = int(get_gdal_config("GDAL_CACHEMAX") or 0)
    except (TypeError, ValueError):
        current = 0
    if current <= 0 or current > max_bytes:
        set_gdal_config("GDAL_CACHEMAX", int(max_bytes))
