"""Hazard zones: easements, flood-prone ground and sea-level rise, prepared for the window pass.

Two families, both reported with exact area shares:

* **vector zones** (easement buffers of user layers, flood polygons) are polygons.  Their
  area inside a parcel is the exact area of ``parcel ∩ zone``: the
  intersection pieces are extra geometries in the coverage step, so a zone
  boundary that crosses a cell is not rounded to the cell.
* **raster zones** (HAND below a threshold, sea-level-rise inundation, easement
  strips along the *derived* shoreline and streams) are sets of DEM cells, kept as
  tiled mask rasters on disk (:mod:`landcheck.zones.cells`) and read window by
  window.  Their area inside a parcel is the exact coverage of the parcel over
  those cells.  Polygons of them are written to ``zones/*.gpkg`` only on request
  (``zone_polygons``), tile by tile.

Easement widths are metres on the ground: on a projected CRS the width is
scaled by the projection's point scale at the layer, on a geographic CRS the
lines are buffered in a local UTM projection and brought back densified.  Derived
strips are measured between cell centres (:mod:`landcheck.zones.strips`); an
easement with one width per land-use context gets one mask per distinct width,
and each parcel is checked against the mask of its class's context.

Bounded steps: the sea and sea-level-rise inundation are found by tiled
labelling joined across tile edges (:mod:`landcheck.terrain.tiled_components`),
strips by tiles with a halo, and flow routing (depression filling, D8, upstream
area, streams, HAND) by tiles joined across tile edges
(:mod:`landcheck.terrain.tiled_routing`), once, when a HAND zone or a derived
stream easement needs it.
"""

from __future__ import annotations

import logging
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from landcheck.engine.memory import trim_every
from landcheck.errors import InputDataError
from landcheck.geo.grid import GridSpec, Window, apply_transform, iter_windows
from landcheck.geo.shapes import polygonal_part
from landcheck.inputs.rulebook import Rulebook, ZoneKind, ZoneRule
from landcheck.terrain.tiled_routing import HandSpec, TiledRouting, route_tiles
from landcheck.zones.cells import MaskStore
from landcheck.zones.strips import write_strips

#: grids up to this many cells keep their zone masks in memory (GDAL /vsimem) when run on threads
IN_MEMORY_MASK_CELLS = 4096 * 4096

__all__ = [
    "ZoneColumn",
    "ZoneSet",
    "prepare_zones",
    "buffer_ground",
    "union_by_tiles",
    "zone_pieces_frame",
    "pick_variant",
    "vector_pieces",
]

logger = logging.getLogger(__name__)

#: densify buffer outlines on geographic grids to this many metres before projecting back
_DENSIFY_M = 5.0


@dataclass
class ZoneColumn:
    """One reported zone figure: a rulebook zone, or an extra sea-level-rise scenario."""

    name: str
    label: str
    zone_index: int | None  # index in rules.zones; None for report-only scenario columns
    raster_channel: int = -1  # bit in the raster-zone mask; -1 for vector zones (widest strip if per context)
    variants: dict = field(default_factory=dict)  # vector: context (or None) -> shapely geometry in DEM CRS
    context_channels: dict = field(default_factory=dict)  # raster strips: context (or None) -> channel

    def channel_for(self, ctx) -> int:
        """Raster channel that applies to a class of context ``ctx`` (rule of :func:`pick_variant`)."""
        if not self.context_channels:
            return self.raster_channel
        if None in self.context_channels:
            return self.context_channels[None]
        return self.context_channels.get(ctx, self.raster_channel)


@dataclass
class ZoneSet:
    """Zones ready for the window pass (see module docstring)."""

    grid: GridSpec
    columns: list[ZoneColumn]
    raster_bits: np.ndarray | None  # (H, W) uint32, bit = raster channel (in-memory form, small rasters)
    sea: np.ndarray | None  # (H, W) bool, cells of the sea (in-memory form)
    layers: dict  # name -> GeoDataFrame to write under zones/
    warnings: list[str]
    info: dict
    store: MaskStore | None = None  # on-disk form: masks read window by window
    channel_names: list = field(default_factory=list)  # mask name of each raster channel in ``store``
    sea_name: str | None = None  # mask of the sea in ``store``
    tile: int = 1024  # vector zones are pieces clipped to tiles of this many cells (union_by_tiles)

    def bits(self, win: Window) -> np.ndarray | None:
        if self.store is not None:
            return self.store.bits(self.channel_names, win) if self.channel_names else None
        if self.raster_bits is None:
            return None
        return self.raster_bits[win.rows, win.cols]

    @property
    def cell_columns(self) -> list[ZoneColumn]:
        """The rulebook zones made of cells (HAND, sea-level rise, derived strips), in column order."""
        return [c for c in self.columns if c.zone_index is not None and c.raster_channel >= 0]

    def cell_zone_bits(self, win: Window) -> np.ndarray:
        """uint8 over ``win``: bit k set where a land cell lies in ``cell_columns[k]`` (any of its strip
        widths); cells of the sea carry no bit."""
        out = np.zeros((win.height, win.width), dtype=np.uint8)
        bits = self.bits(win)
        if bits is None:
            return out
        for k, col in enumerate(self.cell_columns):
            channels = {col.raster_channel, *col.context_channels.values()}
            want = np.uint32(sum(1 << ch for ch in channels if ch >= 0))
            out |= ((bits & want) != 0).astype(np.uint8) << np.uint8(k)
        land = self.land(win)
        if land is not None:
            out[~land] = 0
        return out

    def land(self, win: Window) -> np.ndarray | None:
        if self.store is not None:
            return None if self.sea_name is None else ~self.store.read(self.sea_name, win)
        if self.sea is None:
            return None
        return ~self.sea[win.rows, win.cols]

    def parcel_channels(self, rules: Rulebook, class_names: np.ndarray) -> np.ndarray:
        """Per parcel and zone column, the raster channel that applies (its class's context); -1 for vector columns."""
        by = {c.name: c for c in rules.classes}
        n = len(class_names)
        out = np.empty((n, len(self.columns)), dtype=np.int64)
        for ci, col in enumerate(self.columns):
            out[:, ci] = col.raster_channel
        per_ctx = [ci for ci, col in enumerate(self.columns) if col.context_channels]
        if per_ctx:
            ctx = np.array([by[nm].context if nm in by else None for nm in class_names], dtype=object)
            for value in set(ctx.tolist()):
                sel = np.array([x is value for x in ctx])
                for ci in per_ctx:
                    out[sel, ci] = self.columns[ci].channel_for(value)
        return out

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


def buffer_ground(geoms: np.ndarray, width_m, grid: GridSpec, tile: int = 1024) -> object:
    """Union of the geometries buffered by ``width_m`` metres on the ground, in the grid's CRS.

    The union is built tile by tile (:func:`union_by_tiles`): a GeometryCollection of polygons, each
    inside one tile of ``tile`` cells of the grid, so a network of any size is never unioned whole.

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
        buf = shapely.segmentize(shapely.buffer(proj, width_m * k, quad_segs=16), _DENSIFY_M)
        back_geoms = shapely.transform(buf, lambda xy: np.column_stack(back.transform(xy[:, 0], xy[:, 1])))
        return union_by_tiles(shapely.make_valid(back_geoms), grid, tile)
    k = 1.0
    cent = shapely.centroid(shapely.union_all(geoms))
    try:
        geodetic = crs.geodetic_crs
        lon, lat = pyproj.Transformer.from_crs(crs, geodetic, always_xy=True).transform(cent.x, cent.y)
        k = float(pyproj.Proj(crs).get_factors(lon, lat).meridional_scale)
    except Exception:  # a CRS without usable factors: plain map distance
        k = 1.0
    return union_by_tiles(shapely.buffer(geoms, width_m * k / grid.unit_m, quad_segs=16), grid, tile)


def union_by_tiles(geoms, grid: GridSpec, tile: int):
    """The union of polygonal ``geoms`` as pieces clipped to the grid's tiles, each tile on its own.

    Every geometry is clipped to a tile before any union, so the work and memory of one union are
    bounded by what one tile holds (the tiles on the grid's border reach out to take what lies
    beyond it).  Returns a GeometryCollection of polygons; pieces of different
    tiles touch along tile edges but never overlap, so areas (and exact parcel shares) add up.
    """
    import shapely

    g = np.asarray([x for x in np.asarray(geoms, dtype=object).ravel() if x is not None], dtype=object)
    if len(g):
        g = shapely.get_parts(g)
        g = g[~shapely.is_empty(g) & np.isin(shapely.get_type_id(g), (3, 6))]
    if len(g) == 0:
        return shapely.GeometryCollection()
    tree = shapely.STRtree(g)
    pieces: list = []
    gx0, gy0, gx1, gy1 = shapely.total_bounds(g)
    north_up = grid.transform.e < 0
    for win in trim_every(iter_windows(grid.height, grid.width, tile)):
        x0, y0, x1, y1 = grid.window_bounds(win)
        # tiles on the grid's border reach out to the geometries' bounds: nothing is dropped
        top, bottom = win.row_off == 0, win.row_off + win.height == grid.height
        if win.col_off == 0:
            x0 = min(x0, gx0)
        if win.col_off + win.width == grid.width:
            x1 = max(x1, gx1)
        if top if north_up else bottom:
            y1 = max(y1, gy1)
        if bottom if north_up else top:
            y0 = min(y0, gy0)
        box = shapely.box(x0, y0, x1, y1)
        idx = tree.query(box, predicate="intersects")
        if len(idx) == 0:
            continue
        piece = polygonal_part(shapely.union_all(shapely.intersection(g[idx], box)))
        pieces.extend(p for p in shapely.get_parts(piece) if not p.is_empty)
    return shapely.GeometryCollection(pieces)


def zone_pieces_frame(variants: dict, columns: dict, crs) -> object:
    """A zone layer with one row per piece (``columns`` maps a column name to one value per variant)."""
    import geopandas as gpd
    import shapely

    rows: dict = {name: [] for name in columns}
    geoms: list = []
    for k, geom in enumerate(variants.values()):
        parts = [p for p in shapely.get_parts(geom) if not p.is_empty] if geom is not None else []
        geoms.extend(parts)
        for name, values in columns.items():
            rows[name].extend([values[k]] * len(parts))
    return gpd.GeoDataFrame(rows, geometry=geoms, crs=crs)


def _widths(zone: ZoneRule) -> dict:
    w = zone.params["width_m"]
    return dict(w) if isinstance(w, dict) else {None: float(w)}


def _layer_geoms(rules: Rulebook, name: str, grid: GridSpec, role: str):
    from landcheck.inputs.layers import read_layer, to_crs_checked

    gdf = read_layer(rules.layers[name], role=role)
    where = gdf.attrs["where"]
    return to_crs_checked(gdf, grid.crs_wkt, where, role), where


def prepare_zones(
    rules: Rulebook, dem, parcels_frame, pr, settings, *, step=None, zone_polygons=None, mask_folder=None
) -> ZoneSet:
    """Build every zone the rulebook defines (reads layers; runs the hydrology steps).

    Raster zones become cell masks on disk (:class:`landcheck.zones.cells.MaskStore`), written
    tile by tile; polygons of them (``zones/*.gpkg``) are built only when ``zone_polygons`` (or
    ``settings.zone_polygons``) is true, tile by tile.  ``mask_folder`` puts the masks (and the routing's
    scratch tiles) in that folder, e.g. on storage every machine of a cluster reads; the caller owns it.
    ``parcels_frame`` is not used (the zones depend on the DEM and the rulebook only) and may be None.
    """
    import geopandas as gpd
    import shapely

    from landcheck.terrain import hydrology

    step = step or (lambda s: logger.info(s))
    if zone_polygons is None:
        zone_polygons = bool(getattr(settings, "zone_polygons", False))
    tile = int(getattr(settings, "tile_cells", 1024) or 1024)
    g: GridSpec = dem.grid
    warnings_out: list[str] = []
    info: dict = {}
    layers: dict = {}
    columns: list[ZoneColumn] = []
    channels: list[str] = []  # mask name of each raster channel
    # masks in memory only for small grids run on threads in this process; otherwise tiled scratch rasters
    engine = getattr(settings, "engine", None)
    on_threads = engine is None or getattr(getattr(engine, "kind", None), "value", "threads") == "threads"
    if mask_folder is not None:
        Path(mask_folder).mkdir(parents=True, exist_ok=True)
        store = MaskStore(g, str(mask_folder))
    else:
        store = MaskStore(g, in_memory=on_threads and g.width * g.height <= IN_MEMORY_MASK_CELLS)

    # ---- sea: one mask per distinct definition, by tiled labelling, and their union
    sea_zones = [z for z in rules.zones if z.kind is ZoneKind.SEA_RISE or z.params.get("derive") == "shoreline"]
    sea_specs: dict = {}
    for z in sea_zones:
        sea_specs.setdefault(_sea_key(z.params), len(sea_specs))
    sea_name = None
    if sea_specs:
        step("sea connectivity by tiles")
        keys = list(sea_specs)
        seeds = [_sea_seed(rules, g, dem, k) for k in keys]
        names = ["sea"] if len(keys) == 1 else [f"sea_{i}" for i in range(len(keys))]
        _write_components(store, g, tile, names, _sea_reader(dem, g, keys, seeds))
        if len(keys) > 1:
            with store.writer("sea") as w:
                for win in iter_windows(g.height, g.width, tile):
                    m = np.zeros((win.height, win.width), dtype=bool)
                    for nm in names:
                        m |= store.read(nm, win)
                    w.write(win, m)
        sea_name = "sea"
        sea_of = {k: nm for k, nm in zip(keys, names)}
        n_sea = _count(store, "sea", g, tile)
        info["sea_cells"] = n_sea
        if n_sea == 0:
            warnings_out.append("no sea found: no cell at or below the datum touches the DEM edge or the sea point")

    # ---- flow routing by tiles (fill, D8, upstream area, streams, HAND), only when HAND or derived streams need it
    stream_masks: dict = {}  # channel area -> mask name
    hand_masks: dict = {}  # zone index -> mask name
    routed = [z for z in rules.zones if z.kind is ZoneKind.HAND or z.params.get("derive") == "streams"]
    if routed:
        ch_areas: list[float] = []
        for z in routed:
            a = float(z.params.get("channel_area_m2", 1_000_000.0))
            if a not in ch_areas:
                ch_areas.append(a)
        hand_zones = [zi for zi, z in enumerate(rules.zones) if z.kind is ZoneKind.HAND]
        hands = [
            HandSpec(
                float(rules.zones[zi].params.get("channel_area_m2", 1_000_000.0)), rules.zones[zi].params["max_hand_m"]
            )
            for zi in hand_zones
        ]
        stream_masks = {a: f"streams_{i}" for i, a in enumerate(ch_areas)}
        hand_masks = {zi: f"hand_{zi}" for zi in hand_zones}
        lines: list = []
        with ExitStack() as stack:
            s_writers = [stack.enter_context(store.writer(stream_masks[a])) for a in ch_areas]
            h_writers = [stack.enter_context(store.writer(hand_masks[zi])) for zi in hand_zones]
            for win, streams, masks, d8 in route_tiles(
                _routing_spec(dem, g, tile, store, sea_name),
                ch_areas,
                hands,
                workers=getattr(engine, "workers", None),
                scratch_parent=None if store.in_memory else store.folder,
                step=step,
                show_progress=getattr(settings, "show_progress", None),
            ):
                for w, m in zip(s_writers, streams):
                    w.write(win, m)
                for w, m in zip(h_writers, masks):
                    w.write(win, m)
                if zone_polygons:
                    lines.extend(_stream_lines(streams[0], d8, g.window_transform(win)))
        if zone_polygons:
            layers["derived_streams"] = gpd.GeoDataFrame(
                {"channel_area_m2": np.full(len(lines), ch_areas[0])}, geometry=lines, crs=g.crs_wkt
            )

    for zi, z in enumerate(rules.zones):
        if z.kind is ZoneKind.EASEMENT and "layer" not in z.params:
            # derived easement: a strip of cells per distinct width (docs/scale.md, "Hazard zones", zones.strips)
            widths = _widths(z)
            distinct = sorted(set(widths.values()))
            names = {w: f"ease_{zi}_{k}" for k, w in enumerate(distinct)}
            shore = z.params["derive"] == "shoreline"
            src = "sea" if shore else stream_masks[float(z.params.get("channel_area_m2", 1_000_000.0))]
            step(f"easement strips of {z.name} by tiles")
            write_strips(store, src, {names[w]: w for w in distinct}, shore=shore, tile=tile)
            ctx_channel = {}
            for ctx, w in widths.items():
                if names[w] not in channels:
                    channels.append(names[w])
                ctx_channel[ctx] = channels.index(names[w])
            widest = channels.index(names[distinct[-1]])
            columns.append(ZoneColumn(z.name, z.label, zi, widest, context_channels=ctx_channel))
            if zone_polygons:
                layers[f"zone_{z.name}"] = _tiled_polygons(
                    store,
                    [names[widths[c]] for c in widths],
                    g,
                    tile,
                    {
                        "context": [c.value if c is not None else "all" for c in widths],
                        "width_m": list(widths.values()),
                    },
                )
        elif z.kind is ZoneKind.EASEMENT:
            half_channel = 0.0
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
            variants = {ctx: buffer_ground(src_geoms, half_channel + w, g, tile) for ctx, w in _widths(z).items()}
            columns.append(ZoneColumn(z.name, z.label, zi, -1, variants))
            layers[f"zone_{z.name}"] = zone_pieces_frame(
                variants,
                {
                    "context": [c.value if c is not None else "all" for c in variants],
                    "width_m": [_widths(z)[c] for c in variants],
                },
                g.crs_wkt,
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
            geom = union_by_tiles(shapely.make_valid(np.asarray(gdf.geometry.values)[sel]), g, tile)
            columns.append(ZoneColumn(z.name, z.label, zi, -1, {None: geom}))
            layers[f"zone_{z.name}"] = zone_pieces_frame(
                {None: geom}, {"min_level": [z.params["min_level"]]}, g.crs_wkt
            )
        elif z.kind is ZoneKind.HAND:
            nm = hand_masks[zi]
            channels.append(nm)
            columns.append(ZoneColumn(z.name, z.label, zi, len(channels) - 1))
            if zone_polygons:
                layers[f"zone_{z.name}"] = _tiled_polygons(store, [nm], g, tile)
        elif z.kind is ZoneKind.SEA_RISE:
            s_name = sea_of[_sea_key(z.params)]
            rises = [z.params["rise_m"]] + [x for x in z.params.get("scenarios_m", ()) if x != z.params["rise_m"]]
            order = [float(r) for r in hydrology._scenario_rises(sorted(set(rises)))]
            surge = hydrology._finite_number(z.params.get("surge_m", 0.0), "surge_m")
            if surge < 0:
                raise InputDataError(f"surge_m: got {surge:g} m; a surge height must be zero or positive.")
            datum = hydrology._finite_number(z.params.get("datum_m", 0.0), "datum_m")
            step(f"sea-level rise {z.name}: {len(order)} levels by tiles")
            names = [f"slr_{zi}_{k}" for k in range(len(order))]
            counts = _write_components(
                store,
                g,
                tile,
                names,
                _level_reader(dem, store, s_name, [datum + r + surge for r in order]),
                count_outside=s_name,
            )
            by_rise = dict(zip(order, names))
            channels.append(by_rise[float(z.params["rise_m"])])
            columns.append(ZoneColumn(z.name, z.label, zi, len(channels) - 1))
            if zone_polygons:
                layers[f"zone_{z.name}"] = _tiled_polygons(
                    store, [by_rise[float(z.params["rise_m"])]], g, tile, exclude=s_name
                )
            for rise in z.params.get("scenarios_m", ()):
                channels.append(by_rise[float(rise)])
                columns.append(
                    ZoneColumn(f"{z.name}_rise_{_rise_tag(rise)}", f"{z.label}: +{rise:g} m", None, len(channels) - 1)
                )
            info.setdefault("sea_rise", {})[z.name] = {
                "datum_m": z.params.get("datum_m", 0.0),
                "surge_m": z.params.get("surge_m", 0.0),
                "rises_m": order,
                "inundated_land_cells": counts,
            }
    if len(channels) > 32:
        raise InputDataError(f"{rules.path}: more than 32 cell-based zone layers (zones plus sea-rise scenarios).")
    return ZoneSet(
        g,
        columns,
        None,
        None,
        layers,
        warnings_out,
        info,
        store=store,
        channel_names=channels,
        sea_name=sea_name,
        tile=tile,
    )


def _routing_spec(dem, g: GridSpec, tile: int, store: MaskStore, sea_name: str | None) -> TiledRouting:
    """The DEM as the tiled routing reads it: float32, the sea as nodata (it is where water leaves)."""

    def read(win: Window) -> np.ndarray:
        z = dem.read_with_halo(win, 1, np.float32).astype(np.float32, copy=False)
        if sea_name:
            sea, _ = store.read_with_halo(sea_name, win, 1)
            z = np.where(sea, np.float32(np.nan), z)
        return z

    rows = np.arange(g.height)
    if g.geographic:
        hx, hy = g.cell_size_m(rows)  # on the CRS's own ellipsoid
    else:
        # projected: only the ratio matters for choosing a direction, so the CRS unit cancels
        hx, hy = np.full(g.height, abs(g.transform.a)), np.full(g.height, abs(g.transform.e))
    area = np.broadcast_to(np.asarray(g.cell_area_m2(rows), dtype=np.float64), (g.height,))
    return TiledRouting((g.height, g.width), tile, read, np.asarray(hx, float), np.asarray(hy, float), area)


def _stream_lines(streams: np.ndarray, d8: np.ndarray, transform) -> list:
    """Stream cells of one tile as lines through cell centres to their receivers, merged where they join."""
    import shapely

    from landcheck.terrain.tiled_routing import DEC_C, DEC_R

    r, c = np.nonzero(streams & (d8 != 0) & (d8 != 247))
    if r.size == 0:
        return []
    code = d8[r, c]
    x0, y0 = apply_transform(transform, c + 0.5, r + 0.5)
    x1, y1 = apply_transform(transform, c + DEC_C[code] + 0.5, r + DEC_R[code] + 0.5)
    segs = shapely.linestrings(np.stack([np.c_[x0, y0], np.c_[x1, y1]], axis=1))
    merged = shapely.line_merge(shapely.multilinestrings(segs))
    return list(shapely.get_parts(merged))


def _sea_key(params) -> tuple:
    sp = params.get("sea_point")
    return (
        float(params.get("datum_m", 0.0)),
        None if sp is None else (float(sp[0]), float(sp[1])),
        bool(params.get("nodata_is_sea", False)),
    )


def _sea_seed(rules: Rulebook, g: GridSpec, dem, key) -> tuple[int, int] | None:
    """The seed cell of a sea point (checked), or None for "the raster edge"."""
    from landcheck.terrain import hydrology

    datum, point, nodata_is_sea = key
    hydrology._finite_number(datum, "datum_m")
    if point is None:
        return None
    col, row = apply_transform(~g.transform, *point)
    r, c = int(np.floor(row)), int(np.floor(col))
    if not (0 <= r < g.height and 0 <= c < g.width):
        raise InputDataError(
            f"{rules.path}: sea_point {list(point)} lies outside the DEM "
            f"(bounds {tuple(round(b, 3) for b in g.bounds)}); give a point on the sea inside the DEM."
        )
    z = float(dem.read(Window(r, c, 1, 1), np.float32)[0, 0])
    if not (z <= datum or (np.isnan(z) and nodata_is_sea)):
        what = "nodata" if np.isnan(z) else f"at {z:g} m"
        raise InputDataError(
            f"{rules.path}: sea point {list(point)} (row {r}, col {c}) is {what}, not at or below the "
            f"datum {datum:g} m; move it onto open water" + (" or set nodata_is_sea" if np.isnan(z) else "") + "."
        )
    return (r, c)


def _sea_reader(dem, g: GridSpec, keys, seeds):
    def reader(win: Window):
        z = dem.read(win, np.float32)
        out = []
        for (datum, _point, nodata_is_sea), seed in zip(keys, seeds):
            with np.errstate(invalid="ignore"):
                cand = z <= np.float64(datum)
            if nodata_is_sea:
                cand |= np.isnan(z)
            s = np.zeros_like(cand)
            if seed is None:
                if win.row_off == 0:
                    s[0, :] = True
                if win.row_off + win.height == g.height:
                    s[-1, :] = True
                if win.col_off == 0:
                    s[:, 0] = True
                if win.col_off + win.width == g.width:
                    s[:, -1] = True
            else:
                r, c = seed[0] - win.row_off, seed[1] - win.col_off
                if 0 <= r < win.height and 0 <= c < win.width:
                    s[r, c] = True
            out.append((cand, s & cand))
        return out

    return reader


def _level_reader(dem, store: MaskStore, sea_name: str, levels_m):
    def reader(win: Window):
        z = dem.read(win, np.float32)
        sea = store.read(sea_name, win)
        out = []
        for level in levels_m:
            with np.errstate(invalid="ignore"):
                out.append(((z <= np.float64(level)) | sea, sea))
        return out

    return reader


def _write_components(store, g, tile, names, reader, count_outside=None) -> list[int]:
    """Resolve seeded components by tiles and write one mask per name; cells counted outside a mask."""
    from landcheck.terrain.tiled_components import seeded_components

    writers = [store.writer(n) for n in names]
    counts = [0] * len(names)
    try:
        for win, masks in seeded_components(g.shape, tile, reader, n_masks=len(names)):
            excl = store.read(count_outside, win) if count_outside else None
            for k, (w, m) in enumerate(zip(writers, masks)):
                w.write(win, m)
                counts[k] += int((m & ~excl).sum()) if excl is not None else int(m.sum())
    finally:
        for w in writers:
            w.close()
    return counts


def _count(store: MaskStore, name: str, g: GridSpec, tile: int) -> int:
    return sum(int(store.read(name, win).sum()) for win in iter_windows(g.height, g.width, tile))


def _tiled_polygons(store: MaskStore, names, g: GridSpec, tile: int, attrs=None, exclude=None):
    """Polygons of masks, built tile by tile (pieces are cut at tile edges; areas add up exactly).

    One row per mask in ``names`` (a MultiPolygon of its tile pieces) with ``attrs``, or, for a
    single mask without ``attrs``, one row per piece with ``part_id`` and ``n_cells``.
    """
    import geopandas as gpd
    import shapely

    from landcheck.terrain import hydrology

    per_mask = {n: [] for n in names}
    for win in trim_every(iter_windows(g.height, g.width, tile)):
        ex = store.read(exclude, win) if exclude else None
        for n in dict.fromkeys(names):
            m = store.read(n, win)
            if ex is not None:
                m &= ~ex
            if m.any():
                gdf = hydrology.mask_to_polygons(m, g.window_transform(win), g.crs_wkt)
                per_mask[n].append(gdf)
    if attrs is None and len(names) == 1:
        parts = per_mask[names[0]]
        if not parts:
            return hydrology.mask_to_polygons(np.zeros((1, 1), bool), g.transform, g.crs_wkt)
        import pandas as pd

        out = pd.concat(parts, ignore_index=True)
        out["part_id"] = np.arange(len(out), dtype=np.int64)
        return gpd.GeoDataFrame(out, geometry="geometry", crs=g.crs_wkt)
    geoms = [
        shapely.MultiPolygon([p for gdf in per_mask[n] for p in gdf.geometry.values]) if per_mask[n] else None
        for n in names
    ]
    geoms = [gg if gg is not None else shapely.MultiPolygon() for gg in geoms]
    return gpd.GeoDataFrame(dict(attrs or {}), geometry=geoms, crs=g.crs_wkt)


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
        target = union_by_tiles([variant(zones.columns[ci], ctx) for ci in fz], zones.grid, zones.tile)
        add_pieces(target, np.asarray(idx, np.int64), -1)
    if not out_g:
        return np.empty(0, object), np.empty(0, np.int64), np.empty(0, np.int64)
    return np.concatenate(out_g), np.concatenate(out_p), np.concatenate(out_r)
