"""Grid geometry (``GridSpec``) and the window/halo arithmetic for tiled processing.

A :class:`GridSpec` travels beside the arrays: kernels never see it, the
drivers use it to turn global row numbers into cell sizes and cell areas in
metres.  Everything here is pure (no file access) and picklable, so the same
objects go to worker threads and to Dask workers.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from affine import Affine

from landcheck.geo import geodesy

__all__ = ["GridSpec", "Window", "iter_windows", "grow_window"]


def apply_transform(t: Affine, x, y):
    """``t * (x, y)`` written out (affine 3 deprecates ``*`` on tuples; this works with every release)."""
    return t.a * x + t.b * y + t.c, t.d * x + t.e * y + t.f


def _compose(a: Affine, b: Affine) -> Affine:
    """a then b composed (``a @ b``; older affine releases only know ``*``)."""
    return a @ b if hasattr(Affine, "__matmul__") else a * b


@dataclass(frozen=True)
class GridSpec:
    """Georeferencing of a north-up raster.

    Attributes
    ----------
    transform : affine.Affine
        Pixel-to-CRS transform (no rotation or shear; checked in ``inputs``).
    crs_wkt : str
        CRS of the raster as WKT.
    width, height : int
        Raster size in cells.
    geographic : bool
        True when the CRS unit is degrees; cell sizes then vary per row.
    unit_m : float
        Metres per CRS linear unit (1 for metres, 0.3048 for feet); unused when geographic.
    ellipsoid_a_m, ellipsoid_e2 : float
        Semi-major axis and first eccentricity squared of the CRS's ellipsoid.
    """

    transform: Affine
    crs_wkt: str
    width: int
    height: int
    geographic: bool
    unit_m: float = 1.0
    ellipsoid_a_m: float = geodesy.WGS84_A_M
    ellipsoid_e2: float = 1.0 / geodesy.WGS84_INV_F * (2.0 - 1.0 / geodesy.WGS84_INV_F)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax) in CRS units."""
        t = self.transform
        x0, y0 = t.c, t.f
        x1, y1 = apply_transform(t, self.width, self.height)
        return (min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1))

    def row_centre_lat(self, rows: np.ndarray) -> np.ndarray:
        """Latitude (degrees) of the centre of each global row (geographic grids)."""
        t = self.transform
        return t.f + t.e * (np.asarray(rows, dtype=np.float64) + 0.5)

    def cell_size_m(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """East-west and north-south cell size in metres for each global row.

        On a geographic grid the east-west size is ``(pi/180) N(phi) cos(phi) dlon``
        and the north-south size ``(pi/180) M(phi) dlat`` at the row centre, on the
        CRS's own ellipsoid; on a projected grid both are constant.
        """
        rows = np.asarray(rows)
        t = self.transform
        if self.geographic:
            lat = self.row_centre_lat(rows)
            hx = geodesy.metres_per_degree_lon(lat, self.ellipsoid_a_m, self.ellipsoid_e2) * abs(t.a)
            hy = geodesy.metres_per_degree_lat(lat, self.ellipsoid_a_m, self.ellipsoid_e2) * abs(t.e)
            return hx, hy
        ones = np.ones(rows.shape, dtype=np.float64)
        return ones * abs(t.a) * self.unit_m, ones * abs(t.e) * self.unit_m

    def cell_area_m2(self, rows: np.ndarray) -> np.ndarray:
        """Area of one cell of each global row in m^2 (exact ellipsoid band area when geographic)."""
        rows = np.asarray(rows)
        t = self.transform
        if self.geographic:
            lat_top = t.f + t.e * rows.astype(np.float64)
            lat_bottom = lat_top + t.e
            return geodesy.band_area_m2(lat_top, lat_bottom, abs(t.a), self.ellipsoid_a_m, self.ellipsoid_e2)
        return np.ones(rows.shape, dtype=np.float64) * abs(t.a * t.e) * self.unit_m**2

    def window_transform(self, win: Window) -> Affine:
        return _compose(self.transform, Affine.translation(win.col_off, win.row_off))

    def window_bounds(self, win: Window) -> tuple[float, float, float, float]:
        t = self.window_transform(win)
        x0, y0 = t.c, t.f
        x1, y1 = apply_transform(t, win.width, win.height)
        return (min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1))


@dataclass(frozen=True, order=True)
class Window:
    """A rectangle of cells: rows ``row_off .. row_off+height``, cols likewise."""

    row_off: int
    col_off: int
    height: int
    width: int

    @property
    def rows(self) -> slice:
        return slice(self.row_off, self.row_off + self.height)

    @property
    def cols(self) -> slice:
        return slice(self.col_off, self.col_off + self.width)

    def to_rasterio(self):
        from rasterio.windows import Window as RioWindow

        return RioWindow(self.col_off, self.row_off, self.width, self.height)


def iter_windows(height: int, width: int, tile_rows: int, tile_cols: int | None = None) -> Iterator[Window]:
    """Yield windows that tile a ``height`` x ``width`` raster row-major; edge tiles are smaller."""
    if tile_rows < 1 or (tile_cols is not None and tile_cols < 1):
        raise ValueError("tile size must be at least 1 cell")
    tile_cols = tile_rows if tile_cols is None else tile_cols
    for r0 in range(0, height, tile_rows):
        for c0 in range(0, width, tile_cols):
            yield Window(r0, c0, min(tile_rows, height - r0), min(tile_cols, width - c0))


def grow_window(
    win: Window, halo: int, height: int, width: int
) -> tuple[Window, tuple[tuple[int, int], tuple[int, int]]]:
    """Grow ``win`` by ``halo`` cells, clipped to the raster.

    Returns the clipped read window and the padding ``((top, bottom), (left, right))``
    that must be added (filled with nodata) so the array is exactly
    ``(height + 2*halo, width + 2*halo)``.
    """
    r0, c0 = win.row_off - halo, win.col_off - halo
    r1, c1 = win.row_off + win.height + halo, win.col_off + win.width + halo
    rr0, cc0 = max(r0, 0), max(c0, 0)
    rr1, cc1 = min(r1, height), min(c1, width)
    pad = ((rr0 - r0, r1 - rr1), (cc0 - c0, c1 - cc1))
    return Window(rr0, cc0, rr1 - rr0, cc1 - cc0), pad
