"""A cap on GDAL's block cache for streamed runs (reading the DEM, writing rasters window by window)."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator

__all__ = ["GDAL_CACHE_CAP_BYTES", "cap_gdal_cache", "lowered_gdal_cache"]

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


@contextlib.contextmanager
def lowered_gdal_cache(max_bytes: int) -> Iterator[None]:
    """:func:`cap_gdal_cache` to ``max_bytes`` inside the block, and GDAL's earlier setting back after it
    (a process that runs several audits keeps its own cache size for the next one)."""
    from rasterio._env import get_gdal_config, set_gdal_config

    before = get_gdal_config("GDAL_CACHEMAX")
    cap_gdal_cache(max_bytes)
    try:
        yield
    finally:
        if before is not None and "GDAL_CACHEMAX" not in os.environ:
            set_gdal_config("GDAL_CACHEMAX", before)
