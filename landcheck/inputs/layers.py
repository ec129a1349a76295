"""Read and validate vector layers: parcels and hazard/water layers.

Formats: GeoPackage (with a layer choice), GeoJSON, Shapefile, GeoParquet.
Layers are reprojected to the DEM's CRS here, once.  Every refusal raises
:class:`~landcheck.errors.InputDataError` naming the file, layer and feature.
"""

from __future__ import annotations

import logging
import os
import warnings
from dataclasses import dataclass

import numpy as np

from landcheck.errors import InputDataError, LandcheckWarning
from landcheck.geo.shapes import polygonal_part
from landcheck.wording import count_text

__all__ = ["read_parcels", "read_layer", "validate_parcels", "ParcelSet"]

logger = logging.getLogger(__name__)

_PARQUET_SUFFIXES = (".parquet", ".geoparquet")


def _have(n: int) -> str:
    """``1 parcel has`` / ``3 parcels have``."""
    return f"{count_text(n, 'parcel')} {'has' if n == 1 else 'have'}"


def choose_layer(path: str, layer: str | None, how: str) -> str | None:
    """The layer to read from ``path``: ``layer`` if the file has it, else its only layer; ``how`` says how to choose."""
    names = _layer_names(path)
    if layer is None:
        if len(names) > 1:
            raise InputDataError(f"{path}: holds {len(names)} layers ({', '.join(names)}); choose one with {how}.")
        return names[0] if names else None
    if layer not in names:
        raise InputDataError(f"{path}: no layer {layer!r}; layers here: {', '.join(names) or 'none'}.")
    return layer


def _layer_names(path: str) -> list[str]:
    import pyogrio

    try:
        return [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        raise InputDataError(
            f"{path}: not a vector file GDAL can open ({exc}). Give a GeoPackage, GeoJSON, Shapefile or GeoParquet."
        ) from None


def read_layer(path: str | os.PathLike, *, layer: str | None = None, role: str = "layer", crs: str | None = None):
    """Read a vector layer into a GeoDataFrame (no reprojection); checks existence, layer, CRS, emptiness."""
    import geopandas as gpd

    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputDataError(f"{path}: {role} file not found.")
    try:
        if path.lower().endswith(_PARQUET_SUFFIXES):
            gdf = gpd.read_parquet(path)
            where = path
        else:
            layer = choose_layer(path, layer, "--parcels-layer (or the layer key)")
            gdf = gpd.read_file(path, layer=layer, engine="pyogrio")
            where = f"{path} (layer {layer})" if layer else path
    except InputDataError:
        raise
    except Exception as exc:
        raise InputDataError(f"{path}: cannot read the {role} ({type(exc).__name__}: {exc}).") from None
    if len(gdf) == 0:
        raise InputDataError(f"{where}: the {role} layer has no features.")
    if gdf.crs is None:
        if crs is None:
            how = (
                "give one (e.g. --parcels-crs EPSG:32651) or fix the file"
                if role in ("parcels", "parcel")
                else "give the file a CRS, e.g. `ogr2ogr -a_srs EPSG:32651 fixed.gpkg in.gpkg`, and point the "
                "rulebook at the fixed file"
            )
            raise InputDataError(f"{where}: the {role} layer has no CRS; {how}.")
        gdf = gdf.set_crs(crs)
    gdf.attrs["where"] = where
    return gdf


def to_crs_checked(gdf, target_wkt: str, where: str, role: str):
    """Reproject to the DEM's CRS; fail clearly if the transformation is impossible or produces non-finite coordinates."""
    import pyproj
    import shapely

    target = pyproj.CRS.from_user_input(target_wkt)
    if gdf.crs is not None and pyproj.CRS.from_user_input(gdf.crs).equals(target):
        return gdf
    try:
        out = gdf.to_crs(target)
    except Exception as exc:
        raise InputDataError(
            f"{where}: cannot transform the {role} from {gdf.crs.name!r} to the DEM's CRS {target.name!r} ({exc})."
        ) from None
    coords = shapely.get_coordinates(out.geometry.values)
    if coords.size and not np.isfinite(coords).all():
        raise InputDataError(
            f"{where}: transforming the {role} from {gdf.crs.name!r} to {target.name!r} gave invalid "
            "coordinates (outside the target CRS's area of use?); reproject the layer yourself first."
        )
    logger.info("%s: reprojected %s from %s to %s", where, role, gdf.crs.name, target.name)
    return out


@dataclass
class ParcelSet:
    """Validated parcels in the DEM's CRS.

    ``frame`` has columns ``parcel_id``, ``class_value``, ``geometry_note``, ``row``
    (1-based row in the input) and the geometry; the input's other attributes are kept.
    """

    frame: object  # geopandas.GeoDataFrame
    where: str
    warnings: list[str]


def read_parcels(
    path: str | os.PathLike,
    *,
    class_field: str,
    id_field: str | None,
    target_crs_wkt: str,
    layer: str | None = None,
    crs: str | None = None,
) -> ParcelSet:
    """Read the parcel layer, validate it and reproject it to the DEM's CRS.

    Invalid geometries are repaired (``shapely.make_valid``, polygonal parts kept)
    and flagged; empty geometries are kept and reported (their verdict is
    ``no_data``).  Parcel ids must be unique.
    """
    gdf = read_layer(path, layer=layer, role="parcels", crs=crs)
    return validate_parcels(
        gdf, class_field=class_field, id_field=id_field, target_crs_wkt=target_crs_wkt, where=gdf.attrs["where"]
    )


def validate_parcels(
    gdf,
    *,
    class_field: str,
    id_field: str | None,
    target_crs_wkt: str,
    where: str = "parcels (GeoDataFrame)",
    crs: str | None = None,
) -> ParcelSet:
    """Validate parcels already in memory (a GeoDataFrame) as :func:`read_parcels` does; the input is not modified.

    A CRS is required (``crs`` is assumed when the frame has none); the result is reprojected to
    ``target_crs_wkt``.
    """
    import geopandas as gpd
    import shapely

    if not isinstance(gdf, gpd.GeoDataFrame):
        raise InputDataError(f"{where}: expected a GeoDataFrame or a path to a vector file, got {type(gdf).__name__}.")
    if len(gdf) == 0:
        raise InputDataError(f"{where}: the parcels layer has no features.")
    if gdf.crs is None:
        if crs is None:
            raise InputDataError(f"{where}: the parcels have no CRS; set one (gdf.set_crs(...)) or pass parcels_crs.")
        gdf = gdf.set_crs(crs)
    gdf = gdf.copy()
    notes = []
    if class_field not in gdf.columns:
        fields = [c for c in gdf.columns if c != gdf.geometry.name]
        raise InputDataError(
            f"{where}: no attribute {class_field!r} (the rulebook's class_field); attributes here: {', '.join(fields)}."
        )
    gdf = gdf.reset_index(drop=True)
    gdf["row"] = np.arange(1, len(gdf) + 1)
    if id_field is not None:
        if id_field not in gdf.columns:
            raise InputDataError(
                f"{where}: no attribute {id_field!r} (the rulebook's id_field); attributes here: "
                f"{', '.join(c for c in gdf.columns if c not in (gdf.geometry.name, 'row'))}."
            )
        ids = gdf[id_field]
        if ids.isna().any():
            rows = (np.flatnonzero(ids.isna().to_numpy()) + 1)[:5].tolist()
            raise InputDataError(
                f"{where}: {_have(int(ids.isna().sum()))} no {id_field} (rows {rows}); every parcel needs an id."
            )
        dup = ids[ids.duplicated(keep=False)]
        if len(dup):
            groups = []
            for value in dict.fromkeys(dup.tolist()):  # every duplicated id, in order of first appearance
                rows = (np.flatnonzero((ids == value).to_numpy()) + 1).tolist()
                groups.append(f"{value!r} (rows {', '.join(map(str, rows))})")
            raise InputDataError(
                f"{where}: {len(groups)} {id_field} values are used by more than one parcel: "
                f"{'; '.join(groups)}; ids must be unique."
            )
        gdf["parcel_id"] = ids.to_numpy()
    else:
        gdf["parcel_id"] = gdf["row"]
    # NULL stays NULL (pandas <NA>): never the empty string, so it never matches a class value ""
    gdf["class_value"] = gdf[class_field].astype("string")
    null_class = gdf["class_value"].isna().to_numpy()
    if null_class.any():
        ids_null = gdf.loc[null_class, "parcel_id"].tolist()
        shown = ", ".join(map(str, ids_null[:50])) + (f" and {len(ids_null) - 50} more" if len(ids_null) > 50 else "")
        msg = (
            f"{where}: {_have(len(ids_null))} no {class_field} value (NULL): "
            f"{id_field or 'row'} {shown}; they are listed as no rule (verdict no_rule in parcels.csv)."
        )
        notes.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=2)

    geom = gdf.geometry.values
    gdf["geometry_note"] = ""
    empty = shapely.is_empty(geom) | shapely.is_missing(geom)
    types = shapely.get_type_id(geom)
    polygonal = np.isin(types, (3, 6)) | empty  # Polygon, MultiPolygon
    if not polygonal.all():
        bad = np.flatnonzero(~polygonal)
        raise InputDataError(
            f"{where}: {count_text(len(bad), 'feature')} {'is' if len(bad) == 1 else 'are'} not a polygon (rows {', '.join(str(i + 1) for i in bad[:10])}, "
            f"the first is a {geom[bad[0]].geom_type}); parcels must be Polygon or MultiPolygon."
        )
    invalid = ~empty & ~shapely.is_valid(geom)
    if invalid.any():
        repaired = shapely.make_valid(geom[invalid])
        repaired = np.array([polygonal_part(g) for g in repaired], dtype=object)
        geom = geom.copy()
        geom[invalid] = repaired
        gdf = gdf.set_geometry(geom, crs=gdf.crs)
        gdf.loc[invalid, "geometry_note"] = "repaired"
        msg = (
            f"{where}: {count_text(int(invalid.sum()), 'invalid parcel geometry', 'invalid parcel geometries')} "
            f"{'was' if int(invalid.sum()) == 1 else 'were'} repaired (rows "
            f"{', '.join(str(i + 1) for i in np.flatnonzero(invalid)[:10])}); check them."
        )
        notes.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=2)
        empty = shapely.is_empty(gdf.geometry.values)
    if empty.any():
        gdf.loc[empty, "geometry_note"] = "empty geometry"
        msg = (
            f"{where}: {_have(int(empty.sum()))} an empty geometry (rows "
            f"{', '.join(str(i + 1) for i in np.flatnonzero(empty)[:10])}); they are reported as no data "
            "(verdict no_data in parcels.csv)."
        )
        notes.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=2)
    gdf = to_crs_checked(gdf, target_crs_wkt, where, "parcels")
    return ParcelSet(gdf, where, notes)


def _inverse_areal_scale(crs, lon, lat) -> np.ndarray:
    import pyproj

    return 1.0 / np.asarray(pyproj.Proj(crs).get_factors(lon, lat).areal_scale, dtype=float)


def areal_factor_at(crs_wkt: str, x: float, y: float) -> float:
    """Map-plane to ground area factor (1 / areal scale) of a projected CRS at the point (x, y) in that CRS."""
    import pyproj

    crs = pyproj.CRS.from_user_input(crs_wkt)
    lon, lat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True).transform(x, y)
    return float(_inverse_areal_scale(crs, lon, lat))
