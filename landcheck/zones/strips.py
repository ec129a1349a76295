"""Easement strips along derived shorelines and streams, on the raster, tile by tile.

A derived easement is a strip ``width_m`` metres wide on the ground along the
derived shoreline (the edge between sea and non-sea cells) or along the derived
stream cells.  Here it is a set of cells:

* **stream strip**: a cell is in the strip when the ground distance between its
  centre and the centre of the nearest stream cell is at most ``width_m``
  (stream cells themselves included) — the cell centres within ``width_m`` of
  the drainage line drawn through stream-cell centres, up to the line's corners;
* **shore strip**: a non-sea cell is in it when the distance from its centre to
  the nearest sea-cell centre is at most ``width_m + c / 2``, and a sea cell when
  the distance to the nearest non-sea cell is; ``c`` is the larger cell side.
  For a shoreline along cell sides this is "the cell centre lies within
  ``width_m`` of the shoreline" (the shoreline is half a cell from either centre).

Distances are exact Euclidean distances between cell centres
(``scipy.ndimage.distance_transform_edt`` with ``sampling=(dy, dx)``) on the
tile grown by a halo of ``ceil(reach / smallest cell side) + 1`` cells, which
holds every source cell within reach, so tiles agree with the whole raster.

Ground sizes: on a projected grid the cell sides are map units × metres per unit
divided by the projection's point scale at the DEM centre (pyproj), as the vector
easement buffers use the scale at the layer.  On a geographic grid the cell sides
vary per row; each tile uses the **smallest** east-west and north-south sides of
its rows (halo included), so distances are never overestimated: the strip is
exact or slightly wider (conservative), never narrower.

The parcel's share of a strip is then the exact coverage of the parcel over the
strip cells (like every raster zone), so the strip edge follows cell edges: a
strip of width ``w`` differs from the vector buffer by up to half a cell along
each of its edges.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from landcheck.engine.memory import trim_every
from landcheck.geo.grid import GridSpec, iter_windows
from landcheck.zones.cells import MaskStore

__all__ = ["ground_cell_sides", "write_strips"]


def _projected_scale(grid: GridSpec) -> float:
    """Point scale of the projection at the DEM centre (1 when pyproj cannot tell)."""
    import pyproj

    try:
        crs = pyproj.CRS.from_user_input(grid.crs_wkt)
        x0, y0, x1, y1 = grid.bounds
        lon, lat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True).transform(
            (x0 + x1) / 2, (y0 + y1) / 2
        )
        k = float(pyproj.Proj(crs).get_factors(lon, lat).meridional_scale)
        return k if np.isfinite(k) and k > 0 else 1.0
    except Exception:  # a CRS without usable factors: plain map distance
        return 1.0


def ground_cell_sides(grid: GridSpec, row0: int, row1: int, scale: float = 1.0) -> tuple[float, float]:
    """(dy, dx) in ground metres for rows ``row0 .. row1`` (clipped): the smallest over those rows."""
    rows = np.arange(max(row0, 0), min(row1, grid.height))
    hx, hy = grid.cell_size_m(rows)
    return float(np.min(hy)) / scale, float(np.min(hx)) / scale


def write_strips(
    store: MaskStore,
    source: str,
    outputs: dict[str, float],
    *,
    shore: bool,
    tile: int = 1024,
) -> None:
    """Write one strip mask per entry of ``outputs`` (mask name -> width in metres) from mask ``source``."""
    g = store.grid
    scale = 1.0 if g.geographic else _projected_scale(g)
    widest = max(outputs.values())
    # smallest ground cell side anywhere bounds the halo (rows far from the equator have the smallest)
    dy_all, dx_all = ground_cell_sides(g, 0, g.height, scale)
    cmax_all = max(ground_cell_sides(g, 0, g.height, scale))
    if g.geographic:
        rows = np.arange(g.height)
        hx, hy = g.cell_size_m(rows)
        cmax_all = float(max(np.max(hx), np.max(hy)))
    reach = widest + (cmax_all / 2 if shore else 0.0)
    halo = int(math.ceil(reach / min(dy_all, dx_all))) + 1
    writers = {name: store.writer(name) for name in outputs}
    try:
        for win in trim_every(iter_windows(g.height, g.width, tile)):
            m, inside = store.read_with_halo(source, win, halo)
            core = (slice(halo, halo + win.height), slice(halo, halo + win.width))
            results = {name: np.zeros((win.height, win.width), dtype=bool) for name in outputs}
            dy, dx = ground_cell_sides(g, win.row_off - halo, win.row_off + win.height + halo, scale)
            half = max(dy, dx) / 2 if shore else 0.0
            if m[core].any() or m.any():
                # distance to the nearest source cell; cells off the raster are never sources
                d_src = ndimage.distance_transform_edt(~m, sampling=(dy, dx))[core]
                if shore:
                    other = inside & ~m
                    d_other = ndimage.distance_transform_edt(~other, sampling=(dy, dx))[core] if other.any() else None
                    land = ~m[core]
                for name, w in outputs.items():
                    if shore:
                        r = land & (d_src <= w + half)
                        if d_other is not None:
                            r |= ~land & (d_other <= w + half)
                    else:
                        r = d_src <= w
                    results[name] = r
            for name in outputs:
                writers[name].write(win, results[name])
    finally:
        for wr in writers.values():
            wr.close()
