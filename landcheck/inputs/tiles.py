"""A DEM given as tiles: a folder of rasters or a list of paths, joined into one VRT.

A country's DEM usually comes as tiles.  :func:`resolve_dem` turns what the user
gave into one path GDAL reads as a single raster:

* a folder: every ``*.tif`` / ``*.tiff`` / ``*.vrt`` in it (not recursive), sorted by name;
* a list of paths (or a ``.txt`` file with one path per line, ``#`` comments allowed);
* anything else (a GeoTIFF, a COG, a VRT, a GDAL virtual file system URL such as
  ``/vsicurl/https://...`` or ``/vsis3/bucket/dem.tif``) is passed through unchanged.

Tiles are joined without resampling: they must share the CRS, the cell size, the
data type and the band count, and lie on one grid (offsets whole cells apart).
The VRT is written by this module (no ``gdalbuildvrt`` needed), byte-for-byte the
same for the same tiles, so a rerun recognises it.  Overlapping tiles are read
in list order, the later one winning (GDAL's VRT rule).
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from pathlib import Path
from xml.sax.saxutils import escape

from landcheck.errors import InputDataError

__all__ = ["resolve_dem", "tile_paths", "write_tile_vrt"]

_RASTER_SUFFIXES = (".tif", ".tiff", ".vrt")


def _is_remote(p: str) -> bool:
    return p.startswith("/vsi") or "://" in p


def tile_paths(dem: str | os.PathLike | Sequence[str | os.PathLike]) -> list[str] | None:
    """The tiles ``dem`` names (folder, list, or ``.txt`` list), or None when it is one raster."""
    if isinstance(dem, (list, tuple)):
        paths = [os.fspath(p) for p in dem]
        if not paths:
            raise InputDataError("dem: an empty list of tiles.")
        return paths
    p = os.fspath(dem)  # type: ignore[arg-type]  # a str or PathLike once the list case is gone
    if _is_remote(p):
        return None
    if os.path.isdir(p):
        paths = sorted(str(q) for q in Path(p).iterdir() if q.suffix.lower() in _RASTER_SUFFIXES and q.is_file())
        if not paths:
            raise InputDataError(f"{p}: a DEM folder with no .tif, .tiff or .vrt tiles in it.")
        return paths
    if p.lower().endswith(".txt") and os.path.isfile(p):
        base = Path(p).parent
        paths = []
        for line in Path(p).read_text(encoding="utf-8").splitlines():
            line = line.strip()
            if not line or line.startswith("#"):
                continue
            paths.append(line if _is_remote(line) or os.path.isabs(line) else str(base / line))
        if not paths:
            raise InputDataError(f"{p}: a DEM tile list with no paths in it.")
        return paths
    return None


def resolve_dem(dem, scratch: str | os.PathLike) -> tuple[str, list[str]]:
    """``(path GDAL opens as one raster, the source files)``; a VRT is written to ``scratch`` for tiles."""
    tiles = tile_paths(dem)
    if tiles is None:
        return os.fspath(dem), [os.fspath(dem)]
    if len(tiles) == 1:
        return tiles[0], tiles
    vrt = Path(scratch) / "dem_tiles.vrt"
    write_tile_vrt(tiles, vrt)
    return str(vrt), tiles


def _describe(path: str) -> dict:
    import rasterio
    from rasterio.errors import RasterioIOError

    if not _is_remote(path) and not os.path.exists(path):
        raise InputDataError(f"{path}: DEM tile not found.")
    try:
        with rasterio.open(path) as ds:
            t = ds.transform
            return {
                "path": path,
                "width": ds.width,
                "height": ds.height,
                "count": ds.count,
                "dtypes": tuple(ds.dtypes),
                "nodata": ds.nodatavals,
                "crs": ds.crs.to_wkt() if ds.crs else None,
                "transform": (t.a, t.b, t.c, t.d, t.e, t.f),
                "block": ds.block_shapes[0],
                "units": tuple(ds.units),
                "scales": tuple(ds.scales),
                "offsets": tuple(ds.offsets),
            }
    except RasterioIOError as exc:
        raise InputDataError(f"{path}: DEM tile is not a raster GDAL can open ({exc}).") from exc


_GDAL_TYPES = {
    "uint8": "Byte",
    "int8": "Int8",
    "uint16": "UInt16",
    "int16": "Int16",
    "uint32": "UInt32",
    "int32": "Int32",
    "float32": "Float32",
    "float64": "Float64",
}


def write_tile_vrt(tiles: Sequence[str], out: str | os.PathLike) -> Path:
    """Write a VRT mosaic of ``tiles`` (same CRS, cell size, type and bands, on one grid) to ``out``."""
    infos = [_describe(os.fspath(p)) for p in tiles]
    first = infos[0]
    a, b, _c, d, e, _f = first["transform"]
    if b != 0 or d != 0:
        raise InputDataError(f"{first['path']}: a rotated tile; DEM tiles must be north-up.")
    for info in infos[1:]:
        for key, what in (("crs", "CRS"), ("count", "band count"), ("dtypes", "data type"), ("nodata", "nodata")):
            if info[key] != first[key]:
                raise InputDataError(
                    f"{info['path']}: DEM tile differs from {first['path']} in its {what} "
                    f"({info[key]!r} against {first[key]!r}); tiles must share CRS, cell size, type and bands."
                )
        ia, ib, ic, id_, ie, if_ = info["transform"]
        if ib != 0 or id_ != 0 or not math.isclose(ia, a, rel_tol=1e-9) or not math.isclose(ie, e, rel_tol=1e-9):
            raise InputDataError(
                f"{info['path']}: DEM tile has cell size ({ia:g}, {ie:g}), {first['path']} has ({a:g}, {e:g}); "
                "tiles must share the cell size (resample them first)."
            )
    x0 = min(i["transform"][2] for i in infos)
    y0 = max(i["transform"][5] for i in infos)  # north edge (e < 0)
    offs = []
    for info in infos:
        col = (info["transform"][2] - x0) / a
        row = (info["transform"][5] - y0) / e
        if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
            raise InputDataError(
                f"{info['path']}: DEM tile is offset by a fraction of a cell ({col:.4f}, {row:.4f} cells) from "
                f"{first['path']}; tiles must lie on one grid."
            )
        offs.append((int(round(row)), int(round(col))))
    width = max(c + i["width"] for (r, c), i in zip(offs, infos))
    height = max(r + i["height"] for (r, c), i in zip(offs, infos))
    dtype = first["dtypes"][0]
    gdal_type = _GDAL_TYPES.get(dtype)
    if gdal_type is None:
        raise InputDataError(f"{first['path']}: DEM tiles of type {dtype} are not supported in a tile mosaic.")
    lines = [f'<VRTDataset rasterXSize="{width}" rasterYSize="{height}">']
    if first["crs"]:
        lines.append(f"  <SRS>{escape(first['crs'])}</SRS>")
    lines.append(f"  <GeoTransform>{float(x0)!r}, {float(a)!r}, 0.0, {float(y0)!r}, 0.0, {float(e)!r}</GeoTransform>")
    bx, by = first["block"][1], first["block"][0]
    for band in range(1, first["count"] + 1):
        lines.append(
            f'  <VRTRasterBand dataType="{gdal_type}" band="{band}" blockXSize="{min(bx, 512)}" blockYSize="{min(by, 512)}">'
        )
        nd = first["nodata"][band - 1]
        if nd is not None:
            lines.append(f"    <NoDataValue>{float(nd)!r}</NoDataValue>")
        unit = first["units"][band - 1]
        if unit:
            lines.append(f"    <UnitType>{escape(unit)}</UnitType>")
        if first["scales"][band - 1] not in (None, 1.0):
            lines.append(f"    <Scale>{first['scales'][band - 1]!r}</Scale>")
        if first["offsets"][band - 1] not in (None, 0.0):
            lines.append(f"    <Offset>{first['offsets'][band - 1]!r}</Offset>")
        for (r, c), info in zip(offs, infos):
            src = info["path"]
            rel = "0"
            if not _is_remote(src):
                src = str(Path(src).resolve())
            w, h = info["width"], info["height"]
            tag = "ComplexSource" if nd is not None else "SimpleSource"
            lines.append(f"    <{tag}>")
            lines.append(f'      <SourceFilename relativeToVRT="{rel}">{escape(src)}</SourceFilename>')
            lines.append(f"      <SourceBand>{band}</SourceBand>")
            lines.append(f'      <SrcRect xOff="0" yOff="0" xSize="{w}" ySize="{h}" />')
            lines.append(f'      <DstRect xOff="{c}" yOff="{r}" xSize="{w}" ySize="{h}" />')
            if nd is not None:
                lines.append(f"      <NODATA>{float(nd)!r}</NODATA>")
            lines.append(f"    </{tag}>")
        lines.append("  </VRTRasterBand>")
    lines.append("</VRTDataset>")
    out = Path(out)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text("\n".join(lines) + "\n", encoding="utf-8")
    os.replace(tmp, out)
    return out
