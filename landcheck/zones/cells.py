"""Cell masks of the raster zones kept on disk, one tiled raster per mask, read window by window.

The hazard zones that come from the DEM (sea, sea-level-rise inundation, HAND,
derived easement strips) are sets of cells.  Each is written once, tile by
tile, to a tiled uint8 GeoTIFF (ZSTD level 1, 512-cell blocks) in a scratch
folder; the window pass reads only the window it needs and packs the masks into
the zone bits (:meth:`MaskStore.bits`).  Nothing of the size of the raster
stays in memory.  The scratch folder is removed when the store is closed or
garbage-collected.

The store pickles to its folder and mask names (Dask workers reopen the files);
each thread keeps its own open datasets.
"""

from __future__ import annotations

import shutil
import tempfile
import threading
import uuid
import weakref
from pathlib import Path

import numpy as np

from landcheck.engine.handles import ThreadLocalHandles
from landcheck.geo.grid import GridSpec, Window, grow_window

__all__ = ["MaskStore", "MaskWriter"]

_BLOCK = 512


class MaskWriter:
    """Streams one mask into its scratch raster; use as a context manager."""

    def __init__(self, path: str | Path, grid: GridSpec):
        import rasterio

        from landcheck.inputs.gdal_cache import cap_gdal_cache

        cap_gdal_cache()
        self._ds = rasterio.open(
            path,
            "w",
            driver="GTiff",
            width=grid.width,
            height=grid.height,
            count=1,
            dtype="uint8",
            crs=grid.crs_wkt,
            transform=grid.transform,
            tiled=True,
            blockxsize=_BLOCK,
            blockysize=_BLOCK,
            compress="ZSTD",
            ZSTD_LEVEL=1,
            BIGTIFF="IF_SAFER",
        )

    def write(self, win: Window, mask: np.ndarray) -> None:
        self._ds.write(np.asarray(mask, dtype=np.uint8), 1, window=win.to_rasterio())

    def close(self) -> None:
        self._ds.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def _delete_vsimem(folder: str, names: list[str]) -> None:
    import rasterio.shutil

    for name in names:
        try:
            rasterio.shutil.delete(f"{folder}/{name}.tif")
        except Exception:  # already gone
            pass


class MaskStore(ThreadLocalHandles):
    """Named cell masks of one grid in a scratch folder (see module docstring)."""

    def __init__(self, grid: GridSpec, folder: str | None = None, *, in_memory: bool = False):
        self.grid = grid
        self.names: list[str] = []
        self._local = threading.local()
        self.in_memory = in_memory
        if in_memory:
            # small grids on one process (a pre-screen, a small audit on threads): GDAL's in-memory
            # file system, so no scratch file is written at all
            folder = f"/vsimem/landcheck-zones-{uuid.uuid4().hex}"
            self._finalizer: weakref.finalize = weakref.finalize(self, _delete_vsimem, folder, self.names)
        elif folder is None:
            folder = tempfile.mkdtemp(prefix="landcheck-zones-")
            self._finalizer = weakref.finalize(self, shutil.rmtree, folder, True)
        self.folder = folder

    def __getstate__(self):
        if self.in_memory:
            raise TypeError("an in-memory mask store lives in one process; use a folder for process or Dask engines")
        state = super().__getstate__()
        state.pop("_finalizer", None)  # only the creating process removes the folder
        return state

    def path(self, name: str) -> str:
        return f"{self.folder}/{name}.tif"

    def writer(self, name: str) -> MaskWriter:
        if name in self.names:
            raise ValueError(f"mask {name!r} written twice")
        self.names.append(name)
        return MaskWriter(self.path(name), self.grid)

    def _dataset(self, name: str):
        cache = getattr(self._local, "ds", None)
        if cache is None:
            cache = self._local.ds = {}
        ds = cache.get(name)
        if ds is None or ds.closed:
            import rasterio

            ds = cache[name] = rasterio.open(self.path(name))
        return ds

    def read(self, name: str, win: Window) -> np.ndarray:
        """The mask over ``win`` as bool."""
        return self._dataset(name).read(1, window=win.to_rasterio()).astype(bool)

    def read_with_halo(self, name: str, win: Window, halo: int) -> tuple[np.ndarray, np.ndarray]:
        """``(mask, inside)`` over ``win`` grown by ``halo`` cells; ``inside`` is False off the raster."""
        inner, pad = grow_window(win, halo, self.grid.height, self.grid.width)
        m = np.pad(self.read(name, inner), pad, constant_values=False)
        inside = np.pad(np.ones((inner.height, inner.width), dtype=bool), pad, constant_values=False)
        return m, inside

    def bits(self, names: list[str], win: Window) -> np.ndarray:
        """Masks ``names`` packed into uint32 bits (bit k = ``names[k]``) over ``win``."""
        out = np.zeros((win.height, win.width), dtype=np.uint32)
        for k, name in enumerate(names):
            out |= self._dataset(name).read(1, window=win.to_rasterio()).astype(np.uint32) << np.uint32(k)
        return out

    def close(self) -> None:
        for ds in (getattr(self._local, "ds", None) or {}).values():
            ds.close()
        self._local = threading.local()
        fin = getattr(self, "_finalizer", None)
        if fin is not None:
            fin()
