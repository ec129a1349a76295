"""Hazard zones: easements, flood-prone ground and sea-level rise, prepared for the window pass.

Two families, both reported with exact area shares:

* **vector zones** (easement buffers, flood polygons) are polygons.  Their
  area inside a parcel is the exact area of ``parcel ∩ zone``: the
  intersection pieces are extra geometries in the coverage step, so a zone
  boundary that crosses a cell is not rounded to the cell.
* **raster zones** (HAND below a threshold, sea-level-rise inundation) are
  sets of DEM cells.  Their area inside a parcel is the exact coverage of the
  parcel over those cells.

Easement widths are metres on the ground: on a projected CRS the width is
scaled by the projection's point scale at the layer, on a geographic CRS the
lines are buffered in a local UTM projection and brought back densified.

Global steps: sea connectivity, depression filling, flow routing and HAND need
the whole DEM at once.  They run here, once, before the window pass; their
memory grows with the raster (about 150 bytes per cell), see docs/scale.md.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from landcheck.errors import InputDataError
from landcheck.geo.grid import GridSpec, Window, apply_transform
from landcheck.geo.shapes import polygonal_part
from landcheck.inputs.rulebook import Rulebook, ZoneKind, ZoneRule

__all__ = ["ZoneColumn", "ZoneSet", "prepare_zones", "buffer_ground", "pick_variant", "vector_pieces"]

logger = logging.getLogger(__name__)

#: densify buffer outlines on geographic grids to this many metres before projecting back
_DENSIFY_M = 5.0


@dataclass
class ZoneColumn:
    """One reported zone figure: a rulebook zone, or an extra sea-level-rise scenario."""

    name: str
    label: str
    zone_index: int | None  # index in rules.zones; None for report-only scenario columns
    raster_channel: int = -1  # bit in the raster-zone mask; -1 for vector zones
    variants: dict = field(default_factory=dict)  # vector: context (or None) -> shapely geometry in DEM CRS


@dataclass
class ZoneSet:
    """Zones ready for the window pass (see module docstring)."""

    grid: GridSpec
    columns: list[ZoneColumn]
    raster_bits: np.ndarray | None  # (H, W) uint32, bit = raster channel
    sea: np.ndarray | None  # (H, W) bool, cells of the sea (excluded from land figures)
    layers: dict  # name -> GeoDataFrame to write under zones/
    warnings: list[str]
    info: dict

    def bits(self, win: Window) -> np.ndarray | None:
        if self.raster_bits is None:
            return None
        return self.raster_bits[win.rows, win.cols]

    def land(self, win: Window) -> np.ndarray | None:
        if self.sea is None:
            return None
        return ~self.sea[win.rows, win.cols]

    def describe(self) -> dict:
        return {
            "columns": [
                {
                    "name": c.name,
                    "label": c.label,
                    "kind": "raster" if c.raster_channel >= 0 else "vector",
                    "rulebook_zone": c.zone_index is not None,
                }
                for c in self.columns
            ],
            **self.info,
        }

    def write_layers(self, folder: Path) -> None:
        from landcheck.outputs.writers import write_gpkg

        if not self.layers:
            return
        (folder / "zones").mkdir(exist_ok=True)
        for name, gdf in self.layers.items():
            write_gpkg(folder / "zones" / f"{name}.gpkg", gdf, layer=name)


def _local_metric_crs(geoms_ll):
    """A UTM CRS for geometries in lon/lat (pyproj's estimate from their bounds)."""
    import pyproj
    import shapely
    from pyproj.aoi import AreaOfInterest
    from pyproj.database import query_utm_crs_info

    xmin, ymin, xmax, ymax = shapely.total_bounds(geoms_ll)
    if xmax - xmin > 6.0:
        logger.warning("layer spans %.1f degrees of longitude; buffering in one UTM zone distorts widths", xmax - xmin)
    info = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(xmin, ymin, xmax, ymax))
    if not info:
        raise InputDataError("cannot find a UTM zone for buffering this layer (is it in degrees?).")
    return pyproj.CRS.from_epsg(info[0].code)


def buffer_ground(geoms: np.ndarray, width_m, grid: GridSpec) -> object:
    """Union of the geometries buffered by ``width_m`` metres on the ground, in the grid's CRS.

    Parameters
    ----------
    geoms : array of shapely geometries in the grid's CRS (lines or polygons)
    width_m : float or array of float (one per geometry)
        Buffer distance in metres, measured on the ground from the line or polygon edge.
    grid : GridSpec
    """
    import pyproj
    import shapely

    geoms = np.asarray(geoms, dtype=object)
    width_m = np.broadcast_to(np.asarray(width_m, dtype=np.float64), geoms.shape)
    keep = ~shapely.is_empty(geoms)
    geoms, width_m = geoms[keep], width_m[keep]
    if len(geoms) == 0:
        return shapely.Polygon()
    crs = pyproj.CRS.from_user_input(grid.crs_wkt)
    if grid.geographic:
        utm = _local_metric_crs(geoms)
        fwd = pyproj.Transformer.from_crs(crs, utm, always_xy=True)
        back = pyproj.Transformer.from_crs(utm, crs, always_xy=True)
        proj = shapely.transform(geoms, lambda xy: np.column_stack(fwd.transform(xy[:, 0], xy[:, 1])))
        # UTM point scale k: map distance = ground distance * k
        cent = shapely.centroid(shapely.union_all(geoms))
        k = pyproj.Proj(utm).get_factors(cent.x, cent.y).meridional_scale
        buf = shapely.union_all(shapely.buffer(proj, width_m * k, quad_segs=16))
        buf = shapely.segmentize(buf, _DENSIFY_M)
        return shapely.make_valid(
            shapely.transform(buf, lambda xy: np.column_stack(back.transform(xy[:, 0], xy[:, 1])))
        )
    k = 1.0
    cent = shapely.centroid(shapely.union_all(geoms))
    try:
        geodetic = crs.geodetic_crs
        lon, lat = pyproj.Transformer.from_crs(crs, geodetic, always_xy=True).transform(cent.x, cent.y)
        k = float(pyproj.Proj(crs).get_factors(lon, lat).meridional_scale)
    except Exception:  # a CRS without usable factors: plain map distance
        k = 1.0
    return shapely.union_all(shapely.buffer(geoms, width_m * k / grid.unit_m, quad_segs=16))


def _widths(zone: ZoneRule) -> dict:
    w = zone.params["width_m"]
    return dict(w) if isinstance(w, dict) else {None: float(w)}


def _layer_geoms(rules: Rulebook, name: str, grid: GridSpec, role: str):
    from landcheck.inputs.layers import read_layer, to_crs_checked

    gdf = read_layer(rules.layers[name], role=role)
    where = gdf.attrs["where"]
    return to_crs_checked(gdf, grid.crs_wkt, where, role), where


def prepare_zones(rules: Rulebook, dem, parcels_frame, pr, settings, *, step=None) -> ZoneSet:
    """Build every zone the rulebook defines (reads layers; runs the global hydrology steps)."""
    import geopandas as gpd
    import shapely

    from landcheck.terrain import hydrology

    step = step or (lambda s: logger.info(s))
    g: GridSpec = dem.grid
    warnings_out: list[str] = []
    info: dict = {}
    layers: dict = {}
    columns: list[ZoneColumn] = []
    needs_elev = any(z.kind in (ZoneKind.HAND, ZoneKind.SEA_RISE) or "derive" in z.params for z in rules.zones)
    elev = dem.read(Window(0, 0, g.height, g.width)) if needs_elev else None
    raster_masks: list[np.ndarray] = []
    sea = None
    routing = None

    def sea_for(params) -> np.ndarray:
        seeds = None
        if "sea_point" in params:
            x, y = params["sea_point"]
            col, row = apply_transform(~g.transform, x, y)
            r, c = int(np.floor(row)), int(np.floor(col))
            if not (0 <= r < g.height and 0 <= c < g.width):
                raise InputDataError(
                    f"{rules.path}: sea_point {params['sea_point']} lies outside the DEM "
                    f"(bounds {tuple(round(b, 3) for b in g.bounds)}); give a point on the sea inside the DEM."
                )
            seeds = [(r, c)]
        return hydrology.sea_mask(
            elev, params.get("datum_m", 0.0), seed_cells=seeds, nodata_is_sea=params.get("nodata_is_sea", False)
        )

    def routing_for() -> hydrology.FlowRouting:
        nonlocal routing
        if routing is None:
            step("flow routing (depression filling, D8) on the whole DEM")
            routing = hydrology.flow_directions(
                elev,
                g.transform,
                latlon=g.geographic,
                cell_size_m=g.cell_size_m(np.arange(g.height)) if g.geographic else None,  # the CRS's ellipsoid
                outlet_mask=sea if sea is not None and sea.any() else None,
            )
        return routing

    def upstream() -> np.ndarray:
        return hydrology.upstream_area_m2(routing_for(), g.cell_area_m2(np.arange(g.height)) * 1.0)

    # sea first: it shapes routing and the land figures
    for z in rules.zones:
        if z.kind is ZoneKind.SEA_RISE or z.params.get("derive") == "shoreline":
            s = sea_for(z.params)
            sea = s if sea is None else (sea | s)
    if sea is not None:
        info["sea_cells"] = int(sea.sum())
        if not sea.any():
            msg = "no sea found: no cell at or below the datum touches the DEM edge or the sea point"
            warnings_out.append(msg)

    for zi, z in enumerate(rules.zones):
        if z.kind is ZoneKind.EASEMENT:
            half_channel = 0.0
            if "layer" in z.params:
                gdf, where = _layer_geoms(rules, z.params["layer"], g, f"easement layer {z.params['layer']!r}")
                src_geoms = np.asarray(gdf.geometry.values)
                types = set(shapely.get_type_id(src_geoms[~shapely.is_empty(src_geoms)]).tolist())
                if not types <= {1, 2, 3, 5, 6}:
                    raise InputDataError(f"{where}: an easement layer must hold lines or polygons.")
                wf = z.params.get("channel_width_field")
                if wf is not None:
                    # centrelines with a channel width: the easement is measured from the bank
                    if wf not in gdf.columns:
                        raise InputDataError(
                            f"{where}: no attribute {wf!r} (the rulebook's [zones.{z.name}].channel_width_field); "
                            f"attributes here: {', '.join(c for c in gdf.columns if c != gdf.geometry.name)}."
                        )
                    import pandas as pd

                    cw = pd.to_numeric(gdf[wf], errors="coerce").to_numpy(float)
                    bad = ~np.isfinite(cw) | (cw < 0)
                    if bad.any():
                        rows = (np.flatnonzero(bad) + 1)[:10].tolist()
                        raise InputDataError(
                            f"{where}: attribute {wf!r} must be a width in metres >= 0; features (rows) {rows} hold "
                            f"{gdf[wf].iloc[rows[0] - 1]!r}."
                        )
                    half_channel = cw / 2.0
            elif z.params["derive"] == "shoreline":
                lines = hydrology.mask_boundary_lines(sea, g.transform, g.crs_wkt)
                layers["derived_shoreline"] = lines
                src_geoms = np.asarray(lines.geometry.values)
            else:
                r = routing_for()
                area = upstream()
                channel = z.params.get("channel_area_m2", 1_000_000.0)
                streams = hydrology.stream_mask(area, channel)
                lines = hydrology.streams_to_lines(r, streams, g.crs_wkt, upstream_area_m2=area)
                layers["derived_streams"] = lines
                src_geoms = np.asarray(lines.geometry.values)
            variants = {ctx: buffer_ground(src_geoms, half_channel + w, g) for ctx, w in _widths(z).items()}
            columns.append(ZoneColumn(z.name, z.label, zi, -1, variants))
            layers[f"zone_{z.name}"] = gpd.GeoDataFrame(
                {
                    "context": [c.value if c is not None else "all" for c in variants],
                    "width_m": [_widths(z)[c] for c in variants],
                },
                geometry=list(variants.values()),
                crs=g.crs_wkt,
            )
        elif z.kind is ZoneKind.FLOOD_POLYGONS:
            gdf, where = _layer_geoms(rules, z.params["layer"], g, f"flood layer {z.params['layer']!r}")
            field_name = z.params["level_field"]
            if field_name not in gdf.columns:
                raise InputDataError(
                    f"{where}: no attribute {field_name!r} (the rulebook's [zones.{z.name}].level_field); "
                    f"attributes here: {', '.join(c for c in gdf.columns if c != gdf.geometry.name)}."
                )
            import pandas as pd

            levels = pd.to_numeric(gdf[field_name], errors="coerce")
            bad = levels.isna() & gdf[field_name].notna()
            if bad.any() or levels.isna().all():
                rows = (np.flatnonzero(bad.to_numpy() | levels.isna().to_numpy()) + 1)[:10].tolist()
                raise InputDataError(
                    f"{where}: attribute {field_name!r} must be numeric; features (rows) {rows} hold "
                    f"{gdf[field_name].iloc[rows[0] - 1]!r}."
                )
            sel = (levels >= z.params["min_level"]).to_numpy()
            geom = (
                shapely.make_valid(shapely.union_all(np.asarray(gdf.geometry.values)[sel]))
                if sel.any()
                else shapely.Polygon()
            )
            geom = polygonal_part(geom)
            columns.append(ZoneColumn(z.name, z.label, zi, -1, {None: geom}))
            layers[f"zone_{z.name}"] = gpd.GeoDataFrame(
                {"min_level": [z.params["min_level"]]}, geometry=[geom], crs=g.crs_wkt
            )
        elif z.kind is ZoneKind.HAND:
            r = routing_for()
            area = upstream()
            streams = hydrology.stream_mask(area, z.params["channel_area_m2"])
            hand = hydrology.hand_m(r.conditioned_m, r, streams, outlets_drain=True)
            mask = np.isfinite(hand) & (hand <= z.params["max_hand_m"])
            if sea is not None:
                mask &= ~sea
            columns.append(ZoneColumn(z.name, z.label, zi, len(raster_masks)))
            raster_masks.append(mask)
            layers[f"zone_{z.name}"] = hydrology.mask_to_polygons(mask, g.transform, g.crs_wkt)
            if "derived_streams" not in layers:
                layers["derived_streams"] = hydrology.streams_to_lines(r, streams, g.crs_wkt, upstream_area_m2=area)
        elif z.kind is ZoneKind.SEA_RISE:
            s = sea_for(z.params)
            rises = [z.params["rise_m"]] + [x for x in z.params.get("scenarios_m", ()) if x != z.params["rise_m"]]
            order = sorted(set(rises))
            masks = hydrology.inundation_masks(
                elev, s, order, surge_m=z.params.get("surge_m", 0.0), datum_m=z.params.get("datum_m", 0.0)
            )
            by_rise = dict(zip(order, masks))
            columns.append(ZoneColumn(z.name, z.label, zi, len(raster_masks)))
            raster_masks.append(by_rise[z.params["rise_m"]])
            layers[f"zone_{z.name}"] = hydrology.mask_to_polygons(
                by_rise[z.params["rise_m"]] & ~s, g.transform, g.crs_wkt
            )
            for rise in z.params.get("scenarios_m", ()):
                columns.append(
                    ZoneColumn(f"{z.name}_rise_{_rise_tag(rise)}", f"{z.label}: +{rise:g} m", None, len(raster_masks))
                )
                raster_masks.append(by_rise[rise])
            info.setdefault("sea_rise", {})[z.name] = {
                "datum_m": z.params.get("datum_m", 0.0),
                "surge_m": z.params.get("surge_m", 0.0),
                "rises_m": order,
                "inundated_land_cells": [int((m & ~s).sum()) for m in masks],
            }
    if len(raster_masks) > 32:
        raise InputDataError(f"{rules.path}: more than 32 cell-based zone layers (zones plus sea-rise scenarios).")
    raster_bits = None
    if raster_masks:
        raster_bits = np.zeros((g.height, g.width), np.uint32)
        for ch, m in enumerate(raster_masks):
            raster_bits |= m.astype(np.uint32) << np.uint32(ch)
    return ZoneSet(g, columns, raster_bits, sea, layers, warnings_out, info)


def _rise_tag(rise: float) -> str:
    return f"{rise:g}m".replace(".", "p").replace("-", "m")


def pick_variant(variants: dict, ctx):
    """The zone geometry that applies to a class of land-use context ``ctx``.

    ``variants`` maps a context (or None for "all contexts") to a geometry: the
    all-contexts one wins, else the class's own context, else the widest strip
    (a class without a context is held to the most cautious width).
    """
    if None in variants:
        return variants[None]
    if ctx in variants:
        return variants[ctx]
    return max(variants.values(), key=lambda gg: gg.area)


def vector_pieces(zones: ZoneSet, rules: Rulebook, parcel_geoms: np.ndarray, class_names: np.ndarray):
    """Exact intersection pieces of parcels with vector zones.

    Returns ``(geoms, parcel_index, role)`` where role is the zone-column index
    for per-zone pieces, or -1 for the piece of a parcel inside the union of the
    vector zones its class forbids.  Pieces of one (parcel, role) never overlap,
    so their coverages add up exactly.
    """
    import shapely

    by = {c.name: c for c in rules.classes}
    contexts = np.array([by[n].context if n in by else None for n in class_names], dtype=object)
    out_g, out_p, out_r = [], [], []

    def variant(col: ZoneColumn, ctx):
        return pick_variant(col.variants, ctx)

    def add_pieces(target, sel_idx, role):
        parts = shapely.get_parts(target)
        parts = parts[~shapely.is_empty(parts)]
        if len(parts) == 0 or len(sel_idx) == 0:
            return
        tree = shapely.STRtree(parts)
        pi, zi = tree.query(parcel_geoms[sel_idx], predicate="intersects")
        if len(pi) == 0:
            return
        inter = shapely.intersection(parcel_geoms[sel_idx][pi], parts[zi])
        keep = ~shapely.is_empty(inter) & (shapely.area(inter) > 0)
        inter = np.array([polygonal_part(x) for x in inter[keep]], dtype=object)
        out_g.append(inter)
        out_p.append(sel_idx[pi[keep]])
        out_r.append(np.full(len(inter), role, np.int64))

    vector_cols = [(ci, c) for ci, c in enumerate(zones.columns) if c.raster_channel < 0]
    for ci, col in vector_cols:
        for ctx in set(contexts.tolist()):
            sel = np.array([i for i, x in enumerate(contexts) if x is ctx], dtype=np.int64)
            add_pieces(variant(col, ctx), sel, ci)
    # forbidden union per (set of forbidden vector zones, context)
    keys: dict = {}
    for i, n in enumerate(class_names):
        if n not in by:
            continue
        fz = tuple(ci for ci, col in vector_cols if rules.zones[col.zone_index].name in by[n].forbidden_zones)
        if fz:
            keys.setdefault((fz, contexts[i]), []).append(i)
    for (fz, ctx), idx in keys.items():
        target = shapely.union_all([variant(zones.columns[ci], ctx) for ci in fz])
        add_pieces(target, np.asarray(idx, np.int64), -1)
    if not out_g:
        return np.empty(0, object), np.empty(0, np.int64), np.empty(0, np.int64)
    return np.concatenate(out_g), np.concatenate(out_p), np.concatenate(out_r)
