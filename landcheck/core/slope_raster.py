"""The slope command's pass: a DEM in, a slope raster (and optionally slope classes) out, window by window."""

from __future__ import annotations

import contextlib
import logging
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from landcheck.engine.backends import Engine
from landcheck.engine.windows import progress_bar, slope_window
from landcheck.geo.grid import iter_windows
from landcheck.inputs.dem import ZUnit, open_dem
from landcheck.outputs.writers import RasterFormat, RasterSink
from landcheck.terrain.slope import SlopeMethod, SlopeUnit, gradient_to_unit
from landcheck.terrain.slope_classes import NO_CLASS, SlopeClassScheme, classify_slope, get_scheme

__all__ = ["derive_slope", "SlopeRunInfo"]

logger = logging.getLogger(__name__)

DEFAULT_TILE_CELLS = 1024


@dataclass(frozen=True)
class SlopeRunInfo:
    path: Path
    width: int
    height: int
    valid_cells: int
    min_value: float
    max_value: float
    unit: str
    method: str


class _SlopeTask:
    """One window of the slope command: slope in the asked unit, classes, count and range (picklable)."""

    def __init__(self, dem, method: SlopeMethod, unit: SlopeUnit, scheme: SlopeClassScheme | None):
        self.dem = dem
        self.method = method
        self.unit = unit
        self.scheme = scheme

    def __call__(self, w):  # runs on a worker: everything but the writes
        grad = slope_window(self.dem, w, self.method)
        out = gradient_to_unit(grad, self.unit)
        classes = (
            classify_slope(gradient_to_unit(grad, SlopeUnit.PERCENT), self.scheme) if self.scheme is not None else None
        )
        n = int(np.count_nonzero(~np.isnan(out)))
        lo, hi = (float(np.nanmin(out)), float(np.nanmax(out))) if n else (np.inf, -np.inf)
        return out, classes, n, lo, hi


def derive_slope(
    dem_path: str | os.PathLike,
    out_path: str | os.PathLike,
    *,
    method: SlopeMethod | str = SlopeMethod.HORN,
    unit: SlopeUnit | str = SlopeUnit.PERCENT,
    band: int | None = None,
    dem_crs: str | None = None,
    z_unit: ZUnit | str | None = None,
    tile_cells: int = DEFAULT_TILE_CELLS,
    workers: int | None = None,
    overwrite: bool = False,
    show_progress: bool | None = None,
    class_out: str | os.PathLike | None = None,
    class_scheme: SlopeClassScheme | None = None,
    raster_format: RasterFormat | str = RasterFormat.COG,
    engine: Engine | str = "threads",
    scheduler_address: str | None = None,
) -> SlopeRunInfo:
    """Compute a slope raster from a DEM, window by window, and write it as a COG.

    Memory use is bounded by ``tile_cells``² per worker; the result is identical
    for every tile size and worker count (tests check this).  With ``class_out``
    a uint8 slope-class raster (``class_scheme``, default the planning scheme) is
    written beside it, with the class labels in the band description.

    ``raster_format`` is ``cog`` (default: Cloud-Optimized GeoTIFF with overviews, ZSTD),
    ``cog-deflate`` (the same with DEFLATE) or ``gtiff``
    (tiled GeoTIFF written straight from the windows, no overviews, the float slope uncompressed and
    the class raster ZSTD; faster, for batch runs);
    see :class:`landcheck.outputs.writers.RasterFormat` and docs/scale.md.

    ``engine`` (``threads``, ``processes``, ``dask`` or an :class:`~landcheck.engine.backends.Engine`)
    says where the windows run; the raster is the same on every engine.
    """
    if not isinstance(engine, Engine):
        engine = Engine.from_user(engine, workers, scheduler_address)
    raster_format = RasterFormat.from_user(raster_format)
    if raster_format is RasterFormat.NONE:
        raise ValueError("the slope command writes a raster: choose raster_format 'cog', 'cog-deflate' or 'gtiff'")
    method = SlopeMethod.from_user(method)
    unit = SlopeUnit.from_user(unit)
    dem = open_dem(dem_path, band=band, crs=dem_crs, z_unit=z_unit)
    g = dem.grid
    windows = list(iter_windows(g.height, g.width, tile_cells))
    valid = 0
    vmin, vmax = np.inf, -np.inf
    scheme = class_scheme or get_scheme("planning-6")
    with contextlib.ExitStack() as stack:
        sink = stack.enter_context(
            RasterSink(
                out_path,
                g,
                dtype="float32",
                nodata=np.nan,
                overwrite=overwrite,
                band_names=[f"slope_{unit.value}"],
                fmt=raster_format,
            )
        )
        class_sink = None
        if class_out is not None:
            class_sink = stack.enter_context(
                RasterSink(
                    class_out,
                    g,
                    dtype="uint8",
                    nodata=NO_CLASS,
                    overwrite=overwrite,
                    fmt=raster_format,
                    categorical=True,
                    band_names=["slope class: " + "; ".join(f"{i}={lab}" for i, lab in enumerate(scheme.labels))],
                )
            )
        bar = stack.enter_context(progress_bar(len(windows), "slope", enabled=show_progress))
        task = _SlopeTask(dem, method, unit, scheme if class_sink is not None else None)
        for win, (out, classes, n, lo, hi) in engine.map(task, windows, progress=bar):
            sink.write(win, out)
            if class_sink is not None:
                class_sink.write(win, classes)
            valid += n
            vmin = min(vmin, lo)
            vmax = max(vmax, hi)
    logger.info("slope written to %s: %d valid cells, %.3f..%.3f %s", out_path, valid, vmin, vmax, unit.value)
    return SlopeRunInfo(Path(out_path), g.width, g.height, valid, vmin, vmax, unit.value, method.value)
