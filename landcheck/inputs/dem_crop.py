"""A window of an opened DEM seen as a DEM of its own (no file written: reads go to the parent raster)."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from landcheck.errors import InputDataError
from landcheck.geo.grid import Window
from landcheck.inputs.dem import DemSource

__all__ = ["CroppedDem", "crop_dem"]


@dataclass
class CroppedDem(DemSource):
    """``DemSource`` on the cells of ``offset`` of its parent raster: same file, same values, smaller grid.

    Window ``(r, c, h, w)`` of the crop reads window ``(r + row_off, c + col_off, h, w)`` of the file.
    Cells beyond the crop are outside this DEM (a halo there is NaN), exactly as if the crop had been
    written to a file of its own.  Pickles like its parent (Dask workers reopen the file).
    """

    row_off: int = 0
    col_off: int = 0

    def read(self, win: Window, dtype=np.float64) -> np.ndarray:
        return super().read(
            Window(win.row_off + self.row_off, win.col_off + self.col_off, win.height, win.width), dtype
        )


def crop_dem(dem: DemSource, win: Window) -> CroppedDem:
    """The cells of ``win`` (in ``dem``'s grid) as a DEM whose grid starts at the window's corner."""
    g = dem.grid
    if win.row_off < 0 or win.col_off < 0 or win.row_off + win.height > g.height or win.col_off + win.width > g.width:
        raise InputDataError(f"{dem.path}: crop window {win} is not inside the {g.width}x{g.height} DEM.")
    row0 = getattr(dem, "row_off", 0)
    col0 = getattr(dem, "col_off", 0)
    grid = dataclasses.replace(g, transform=g.window_transform(win), width=win.width, height=win.height)
    return CroppedDem(
        dem.path,
        dem.band,
        grid,
        dem.nodata,
        dem.z_unit,
        dem.crs_override,
        row_off=row0 + win.row_off,
        col_off=col0 + win.col_off,
    )
