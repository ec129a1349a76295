"""Parcels read in parts: partitioned GeoParquet partition by partition, other files in chunks of features.

A country's parcels do not fit one process comfortably (docs/scale.md: ≈ 3.5 KiB per
parcel all told).  :func:`iter_parcel_parts` yields the parcel layer as GeoDataFrames
of bounded size, in the layer's order, so the region driver
(:mod:`landcheck.core.regions`) validates and distributes them part by part:

* a folder: a partitioned GeoParquet dataset, every ``*.parquet`` / ``*.geoparquet`` file
  under it (Hive-style ``key=value`` sub-folders allowed), in sorted path order, each file
  read row group by row group (a partition's columns must be in the file: values encoded only
  in folder names are not read);
* one GeoParquet file: row group by row group;
* any other vector file GDAL reads (GeoPackage, GeoJSON, Shapefile): ``chunk`` features at a
  time, in the file's feature order.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

from landcheck.errors import InputDataError

__all__ = ["ParcelPart", "iter_parcel_parts", "parcel_files"]

_PARQUET = (".parquet", ".geoparquet")
#: features per part when reading a vector file that is not GeoParquet
DEFAULT_CHUNK = 250_000


class ParcelPart:
    """One part: ``frame`` (GeoDataFrame), ``where`` (file and rows for messages), ``first_row`` (0-based)."""

    __slots__ = ("frame", "where", "first_row")

    def __init__(self, frame, where: str, first_row: int):
        self.frame = frame
        self.where = where
        self.first_row = first_row


def parcel_files(path: str | os.PathLike) -> list[str]:
    """The files that make up the parcel layer (a partitioned dataset is several; a Shapefile has sidecars)."""
    p = Path(path)
    if p.is_dir():
        files = sorted(str(q) for q in p.rglob("*") if q.is_file() and q.suffix.lower() in _PARQUET)
        if not files:
            raise InputDataError(f"{p}: a parcels folder with no .parquet files in it (a partitioned GeoParquet).")
        return files
    if p.suffix.lower() == ".shp":
        return sorted(str(q) for q in p.parent.glob(p.stem + ".*"))
    return [str(p)] if p.is_file() else []


def _parquet_parts(path: str, first_row: int) -> Iterator[ParcelPart]:
    import geopandas as gpd
    import pyarrow.parquet as pq

    try:
        pf = pq.ParquetFile(path)
        n_groups = pf.num_row_groups
    except Exception as exc:
        raise InputDataError(f"{path}: cannot read the parcels as GeoParquet ({type(exc).__name__}: {exc}).") from None
    if n_groups <= 1:
        groups: list[list[int] | None] = [None]
    else:
        groups = [[i] for i in range(n_groups)]
    for g in groups:
        try:
            if g is None:
                gdf = gpd.read_parquet(path)
            else:
                table = pf.read_row_groups(g)
                gdf = _from_arrow(table, pf.schema_arrow.metadata, path)
        except InputDataError:
            raise
        except Exception as exc:
            raise InputDataError(f"{path}: cannot read the parcels ({type(exc).__name__}: {exc}).") from None
        where = path if g is None else f"{path} (row group {g[0]})"
        yield ParcelPart(gdf, where, first_row)
        first_row += len(gdf)


def _from_arrow(table, metadata, path: str):
    """A GeoDataFrame from an Arrow table of one row group, decoded as geopandas decodes the file."""
    import json

    import geopandas as gpd
    import shapely

    geo = json.loads((metadata or {}).get(b"geo", b"{}") or b"{}")
    col = geo.get("primary_column")
    if not col or col not in table.column_names:
        raise InputDataError(f"{path}: not a GeoParquet file (no 'geo' metadata naming the geometry column).")
    meta = geo["columns"][col]
    enc = meta.get("encoding", "WKB").upper()
    if enc != "WKB":
        raise InputDataError(f"{path}: geometry encoding {enc} is not supported here; write WKB GeoParquet.")
    df = table.drop([col]).to_pandas()
    geoms = shapely.from_wkb(table.column(col).to_numpy(zero_copy_only=False))
    crs = meta.get("crs", "OGC:CRS84")  # GeoParquet: a missing crs means OGC:CRS84
    return gpd.GeoDataFrame(df, geometry=gpd.GeoSeries(geoms, crs=crs).values, crs=crs)


def iter_parcel_parts(
    path: str | os.PathLike, *, layer: str | None = None, crs: str | None = None, chunk: int = DEFAULT_CHUNK
) -> Iterator[ParcelPart]:
    """Yield the parcel layer in parts (see module docstring); the CRS is set to ``crs`` where a part has none."""
    import geopandas as gpd
    import pyogrio

    from landcheck.inputs.layers import choose_layer

    p = os.fspath(path)
    if not os.path.exists(p):
        raise InputDataError(f"{p}: parcels file not found.")
    n = 0
    if os.path.isdir(p) or p.lower().endswith(_PARQUET):
        files = parcel_files(p) if os.path.isdir(p) else [p]
        for f in files:
            for part in _parquet_parts(f, n):
                n += len(part.frame)
                if len(part.frame):
                    yield _with_crs(part, crs)
    else:
        layer = choose_layer(p, layer, "--parcels-layer")
        total = int(pyogrio.read_info(p, layer=layer)["features"])
        base = f"{p} (layer {layer})" if layer else p
        for start in range(0, total, chunk):
            try:
                gdf = gpd.read_file(p, layer=layer, engine="pyogrio", skip_features=start, max_features=chunk)
            except Exception as exc:
                raise InputDataError(f"{p}: cannot read the parcels ({type(exc).__name__}: {exc}).") from None
            where = base if total <= chunk else f"{base}, features {start + 1}..{start + len(gdf)}"
            n += len(gdf)
            yield _with_crs(ParcelPart(gdf, where, start), crs)
    if n == 0:
        raise InputDataError(f"{p}: the parcels layer has no features.")


def _with_crs(part: ParcelPart, crs: str | None) -> ParcelPart:
    if part.frame.crs is None:
        if crs is None:
            raise InputDataError(
                f"{part.where}: the parcels layer has no CRS; give one (e.g. --parcels-crs EPSG:32651) or fix the file."
            )
        part.frame = part.frame.set_crs(crs)
    return part
