"""Pre-screen of one parcel: a one-page report before buying or designing.

:func:`prescreen` takes a DEM, a rulebook and ONE parcel (a one-feature
vector file, a parcel id in a layer, or polygon coordinates), runs the in-memory
audit (:func:`landcheck.core.run.run_audit`, no temporary files) on that parcel
alone, on a view of the DEM around it, and adds what a
developer asks about a single lot:

* the slope histogram of the parcel (area per slope bin, exact coverage
  weights) with the class's slope limit;
* the **buildable area**: the exact area of the parcel on cells that meet
  every rule of its class (slope below the limit, slope defined, no forbidden
  cell-based zone) and outside every forbidden vector zone;
* the **largest contiguous buildable patch** (:func:`largest_patch`), its area
  and shape;
* the hazard zones touching the parcel, with areas; the verdict and reasons of
  the audit.

Verdicts, reasons, slope breaches and zone areas are the audit's own: this
module takes them from the audit's result and never re-decides a rule.
Everything is written into one output folder, staged and renamed into place
(:func:`landcheck.outputs.writers.staged_folder`): ``prescreen.html`` (one A4 page,
self-contained), ``map.png``, ``histogram.png``, ``prescreen.json`` and
``largest_patch.gpkg`` (see docs/prescreen.md).
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import logging
import math
import os
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from landcheck.about import CAUTION, __version__
from landcheck.errors import InputDataError, LandcheckWarning
from landcheck.evidence.style import VERDICT_TEXT, area_ha_text
from landcheck.geo.grid import GridSpec, Window
from landcheck.geo.shapes import mask_union, polygonal_part
from landcheck.inputs.dem import ZUnit, open_dem
from landcheck.inputs.rulebook import ClassRule, LandContext, Rulebook, ZoneKind, load_rules
from landcheck.verdicts.labels import VERDICTS, verdict_badge_css
from landcheck.zones.prepare import pick_variant

__all__ = ["CONNECTIVITIES", "PrescreenResult", "largest_patch", "parse_polygon", "prescreen"]

logger = logging.getLogger(__name__)

#: neighbourhoods :func:`largest_patch` accepts: 4 (edge neighbours) or 8 (edge and corner neighbours)
CONNECTIVITIES = (4, 8)
#: default for the pre-screen: cells touching only at a corner are not one patch (a corner has no width to build across)
DEFAULT_CONNECTIVITY = 4
#: map figure size (inches) and resolution; the PNG is exactly size x dpi pixels
MAP_SIZE_IN = (7.5, 4.4)
HISTOGRAM_SIZE_IN = (3.7, 2.5)
DEFAULT_DPI = 200
#: zone kinds whose zones are sets of DEM cells (the conflict raster marks them cell by cell)
_RASTER_ZONE_KINDS = (ZoneKind.HAND, ZoneKind.SEA_RISE)
#: slope-histogram bins: 1-point bins to 100 %, then one open bin (the audit's bins)
_HIST_STEP_PCT = 1.0
_HIST_TOP_PCT = 100.0
_SLOPE_BIT = 1
_SHA_SHORT = 12


# --------------------------------------------------------------------------- kernel


def largest_patch(mask: np.ndarray, cell_area_m2, connectivity: int = 8) -> tuple[float, np.ndarray]:
    """The connected group of ``mask`` cells with the largest total area.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        Cells that may belong to a patch.
    cell_area_m2 : float, ndarray (h,) or ndarray (h, w)
        Area of each cell in m²: one value for all cells, one per row (geographic
        grids), or one per cell (e.g. cell area times a coverage fraction, so a
        cell cut by the parcel edge counts with its covered part only).
    connectivity : {4, 8}
        4: cells are neighbours when they share an edge; 8: also when they share
        only a corner.

    Returns
    -------
    area_m2 : float
        Sum of ``cell_area_m2`` over the patch (0.0 when ``mask`` has no cell).
    patch : ndarray of bool, shape (h, w)
        The cells of the patch.  Ties go to the patch whose first cell in
        row-major order comes first.

    Notes
    -----
    Components are found as the connected components of the graph whose
    nodes are the mask cells and whose edges join neighbouring mask cells
    (``scipy.sparse.csgraph.connected_components``).  Inputs are not modified.

    Examples
    --------
    >>> m = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 0]], bool)
    >>> largest_patch(m, 1.0, 8)[0], largest_patch(m, 1.0, 4)[0]
    (2.0, 1.0)
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    m = np.asarray(mask)
    if m.ndim != 2:
        raise ValueError(f"mask: got {m.ndim} dimensions; expected a 2-D array of cells")
    m = m.astype(bool, copy=False)
    if connectivity not in CONNECTIVITIES:
        raise ValueError(f"connectivity: got {connectivity!r}; expected 4 or 8")
    h, w = m.shape
    area = np.asarray(cell_area_m2, dtype=np.float64)
    if area.ndim == 0:
        area2 = np.full((h, w), float(area))
    elif area.ndim == 1 and area.shape[0] == h:
        area2 = np.repeat(area[:, None], w, axis=1)
    elif area.shape == (h, w):
        area2 = area
    else:
        raise ValueError(f"cell_area_m2: got shape {area.shape}; expected a scalar, ({h},) or ({h}, {w})")
    patch = np.zeros((h, w), dtype=bool)
    n = int(m.sum())
    if n == 0:
        return 0.0, patch
    node = np.full((h, w), -1, dtype=np.int64)
    node[m] = np.arange(n)  # row-major numbering
    offsets = [(0, 1), (1, 0)] + ([(1, 1), (1, -1)] if connectivity == 8 else [])
    src, dst = [], []
    for dr, dc in offsets:
        r0, r1 = 0, h - dr
        c0, c1 = max(0, -dc), w - max(0, dc)
        a = node[r0:r1, c0:c1]
        b = node[r0 + dr : r1 + dr, c0 + dc : c1 + dc]
        both = (a >= 0) & (b >= 0)
        src.append(a[both])
        dst.append(b[both])
    s, d = np.concatenate(src), np.concatenate(dst)
    graph = coo_matrix((np.ones(s.size, dtype=np.int8), (s, d)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    # relabel by first cell in row-major order so ties are deterministic whatever the library's numbering
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(first.size, dtype=np.int64)
    rank[np.argsort(first)] = np.arange(first.size)
    labels = rank[labels]
    sums = np.bincount(labels, weights=area2[m], minlength=first.size)
    best = int(np.argmax(sums))  # first maximum = earliest patch
    patch[m] = labels == best
    return float(sums[best]), patch


# --------------------------------------------------------------------------- input parsing


def parse_polygon(text: str) -> tuple[np.ndarray, list[str]]:
    """Vertices of a ``--polygon`` text ``"x1,y1 x2,y2 ..."``.

    Parameters
    ----------
    text : str
        Vertices separated by white space, each ``x,y`` (two numbers, a comma,
        no space), in the CRS's units.

    Returns
    -------
    coords : ndarray (n, 2), float64
        The closed ring: the first vertex is repeated at the end when the text
        did not do so.
    notes : list of str
        What was repaired (an open ring closed).

    Raises
    ------
    InputDataError
        A vertex that is not two finite numbers (the message names it), or fewer
        than 3 distinct vertices.
    """
    tokens = str(text).split()
    pts = []
    for i, tok in enumerate(tokens, start=1):
        parts = tok.split(",")
        if len(parts) != 2 or not parts[0] or not parts[1]:
            raise InputDataError(
                f"--polygon, vertex {i} ({tok!r}): expected x,y - two numbers joined by a comma, "
                'with spaces only between vertices, e.g. --polygon "100,200 150,200 150,260".'
            )
        try:
            x, y = float(parts[0]), float(parts[1])
        except ValueError:
            raise InputDataError(
                f"--polygon, vertex {i} ({tok!r}): {tok!r} is not two numbers; "
                "write each vertex as x,y, e.g. 401250.5,1599320.0."
            ) from None
        if not (math.isfinite(x) and math.isfinite(y)):
            raise InputDataError(f"--polygon, vertex {i} ({tok!r}): coordinates must be finite numbers.")
        pts.append((x, y))
    distinct = {p for p in pts}
    if len(distinct) < 3:
        raise InputDataError(
            f"--polygon: got {len(distinct)} distinct vertices ({len(tokens)} given); a parcel needs "
            'at least 3, e.g. --polygon "100,200 150,200 150,260".'
        )
    notes = []
    if pts[0] != pts[-1]:
        pts.append(pts[0])
        notes.append("--polygon: the ring was not closed; vertex 1 was repeated at the end to close it.")
    return np.asarray(pts, dtype=np.float64), notes


def _checked_geometry(geom, where: str) -> tuple[object, list[str]]:
    """A non-empty valid polygon; invalid rings are repaired (``shapely.make_valid``) with a note."""
    import shapely

    if geom is None or geom.is_empty:
        raise InputDataError(f"{where}: the parcel has no geometry; give a polygon.")
    if geom.geom_type not in ("Polygon", "MultiPolygon"):
        raise InputDataError(f"{where}: the parcel is a {geom.geom_type}; a parcel must be a Polygon or MultiPolygon.")
    notes = []
    if not geom.is_valid:
        reason = shapely.is_valid_reason(geom)
        geom = polygonal_part(shapely.make_valid(geom))
        if geom.is_empty or geom.area <= 0:
            raise InputDataError(
                f"{where}: the polygon is invalid ({reason}) and has no area once repaired; check the vertex order."
            )
        notes.append(
            f"{where}: the polygon was invalid ({reason}); it was repaired (shapely.make_valid) to a "
            f"{geom.geom_type}, whose area on the ground the sheet gives; check the vertex order."
        )
    if geom.area <= 0:
        raise InputDataError(f"{where}: the polygon has zero area; check the coordinates.")
    return geom, notes


def _same_id(value, wanted: str) -> bool:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return False
    if str(value) == wanted:
        return True
    try:
        return float(value) == float(wanted)
    except (TypeError, ValueError):
        return False


def _some_ids(values, k: int = 8) -> str:
    vals = [str(v) for v in list(values)[:k]]
    more = len(values) - len(vals)
    return ", ".join(vals) + (f" (and {more} more)" if more > 0 else "")


@dataclass
class _Parcel:
    geom: object  # shapely polygon in the DEM's CRS
    parcel_id: str
    class_value: str | None
    source: str
    where: str
    notes: list[str]


def _to_dem_crs(geom, crs, target_wkt: str, where: str):
    import geopandas as gpd

    from landcheck.inputs.layers import to_crs_checked

    gdf = gpd.GeoDataFrame(geometry=[geom], crs=crs)
    return to_crs_checked(gdf, target_wkt, where, "parcel").geometry.iloc[0]


def _parcel_from_file(path, *, layer, crs, parcel_id, id_field, rules: Rulebook, target_wkt: str) -> _Parcel:
    import pandas as pd

    from landcheck.inputs.layers import read_layer

    gdf = read_layer(path, layer=layer, role="parcel", crs=crs).reset_index(drop=True)
    where = gdf.attrs["where"]
    columns = [c for c in gdf.columns if c != gdf.geometry.name]
    if id_field is not None and id_field not in columns:
        raise InputDataError(
            f"{where}: no attribute {id_field!r} (--id-field); attributes here: {', '.join(columns) or 'none'}."
        )
    key = id_field or (rules.id_field if rules.id_field in columns else None)
    n = len(gdf)
    ids = gdf[key].tolist() if key else list(range(1, n + 1))
    key_text = f"attribute {key!r}" if key else "the 1-based row number"
    if parcel_id is None:
        if n > 1:
            raise InputDataError(
                f"{where}: holds {n} features; choose one with --parcel-id (matched against "
                f"{key_text}); ids here: {_some_ids(ids)}."
            )
        idx = 0
    else:
        hits = [i for i, v in enumerate(ids) if _same_id(v, str(parcel_id))]
        if not hits:
            raise InputDataError(f"{where}: no parcel with id {parcel_id!r} ({key_text}); ids here: {_some_ids(ids)}.")
        if len(hits) > 1:
            raise InputDataError(
                f"{where}: {len(hits)} features have id {parcel_id!r} ({key_text}; rows "
                f"{', '.join(str(i + 1) for i in hits[:10])}); ids must be unique."
            )
        idx = hits[0]
    feature = f"{where}, feature {idx + 1}"
    geom, notes = _checked_geometry(gdf.geometry.iloc[idx], feature)
    geom = _to_dem_crs(geom, gdf.crs, target_wkt, feature)
    class_value = None
    if rules.class_field in columns:
        v = gdf[rules.class_field].iloc[idx]
        if v is not None and not (isinstance(v, float) and math.isnan(v)) and not pd.isna(v) and str(v).strip():
            class_value = str(v)
    pid = str(ids[idx])
    return _Parcel(
        geom, pid, class_value, f"{where}, {key_text} = {pid}" if parcel_id is not None else feature, feature, notes
    )


def _parcel_from_polygon(text: str, polygon_crs: str | None, target_wkt: str) -> _Parcel:
    import shapely

    coords, notes = parse_polygon(text)
    where = "--polygon"
    geom, more = _checked_geometry(shapely.Polygon(coords), where)
    if polygon_crs is not None:
        import pyproj

        try:
            crs = pyproj.CRS.from_user_input(polygon_crs)
        except pyproj.exceptions.CRSError as exc:
            raise InputDataError(
                f"--polygon-crs {polygon_crs!r}: not a CRS pyproj knows ({exc}); give e.g. EPSG:32651."
            ) from None
        geom = _to_dem_crs(geom, crs, target_wkt, where)
    return _Parcel(geom, "polygon", None, f"--polygon ({len(coords) - 1} vertices)", where, notes + more)


def _resolve_class(rules: Rulebook, parcel: _Parcel, class_name: str | None) -> tuple[ClassRule, str, list[str]]:
    by = {c.name: c for c in rules.classes}
    listing = "; ".join(f"{c.name} (values {', '.join(c.values)})" for c in rules.classes)
    mapped = rules.class_of_value().get(parcel.class_value) if parcel.class_value is not None else None
    if class_name is not None:
        if class_name not in by:
            raise InputDataError(f"--class {class_name!r}: no such class in {rules.path}; classes there: {listing}.")
        notes = []
        if parcel.class_value is not None and mapped != class_name:
            notes.append(
                f"{parcel.where}: its {rules.class_field} is {parcel.class_value!r} "
                f"({'class ' + mapped if mapped else 'no class in the rulebook'}); it was tested against "
                f"--class {class_name} as asked."
            )
        return by[class_name], "--class", notes
    if parcel.class_value is None:
        raise InputDataError(
            f"{parcel.where}: the parcel has no {rules.class_field!r} value (the rulebook's class_field); "
            f"say which class to test with --class NAME; classes in {rules.path}: {listing}."
        )
    if mapped is None:
        raise InputDataError(
            f"{parcel.where}: class value {parcel.class_value!r} ({rules.class_field}) has no rule in "
            f"{rules.path}; choose a class with --class NAME; classes there: {listing}."
        )
    return by[mapped], f"attribute {rules.class_field}", []


# --------------------------------------------------------------------------- grid helpers


def _cells_of_bounds(grid: GridSpec, bounds, margin: int = 0) -> Window | None:
    """Window of the cells meeting ``bounds`` (xmin, ymin, xmax, ymax), grown by ``margin``, clipped to the grid."""
    t = grid.transform
    cols = sorted(((bounds[0] - t.c) / t.a, (bounds[2] - t.c) / t.a))
    rows = sorted(((bounds[3] - t.f) / t.e, (bounds[1] - t.f) / t.e))
    c0 = max(0, math.floor(cols[0]) - margin)
    c1 = min(grid.width, math.ceil(cols[1]) + margin)
    r0 = max(0, math.floor(rows[0]) - margin)
    r1 = min(grid.height, math.ceil(rows[1]) + margin)
    if c1 <= c0 or r1 <= r0:
        return None
    return Window(r0, c0, r1 - r0, c1 - c0)


def _needs_whole_dem(rules: Rulebook) -> bool:
    """True when a zone needs the whole DEM (sea connectivity, flow routing), so the DEM must not be cropped."""
    return any(z.kind in _RASTER_ZONE_KINDS or "derive" in z.params for z in rules.zones)


# --------------------------------------------------------------------------- result


@dataclass
class PrescreenResult:
    """What :func:`prescreen` computed and wrote.

    Attributes
    ----------
    out_dir : Path
        The output folder.
    figures : dict
        The content of ``prescreen.json`` (areas in m², shares 0-1, slopes in %).
    warnings : list of str
        Repairs and other notes the caller should read (also in the JSON and the page).
    """

    out_dir: Path
    figures: dict
    warnings: list[str] = field(default_factory=list)

    @property
    def verdict(self) -> str:
        return self.figures["verdict"]


# --------------------------------------------------------------------------- driver


def prescreen(
    dem_path: str | os.PathLike,
    rulebook_path: str | os.PathLike,
    out_dir: str | os.PathLike,
    *,
    parcels_path: str | os.PathLike | None = None,
    parcel_id: str | None = None,
    parcels_layer: str | None = None,
    parcels_crs: str | None = None,
    id_field: str | None = None,
    polygon: str | None = None,
    polygon_crs: str | None = None,
    class_name: str | None = None,
    connectivity: int = DEFAULT_CONNECTIVITY,
    dem_band: int | None = None,
    dem_crs: str | None = None,
    z_unit: ZUnit | str | None = None,
    method: str | None = None,
    overwrite: bool = False,
    dpi: int = DEFAULT_DPI,
    on_step: Callable[[str], None] | None = None,
) -> PrescreenResult:
    """Pre-screen one parcel and write the one-page report folder (docs/prescreen.md).

    Give the parcel either as ``parcels_path`` (one feature, or the one whose
    id is ``parcel_id``) or as ``polygon`` text ``"x1,y1 x2,y2 ..."`` (in the
    DEM's CRS, or in ``polygon_crs``).

    Parameters
    ----------
    dem_path, rulebook_path : path
        Elevation raster and rulebook (TOML, docs/rules-file.md).
    out_dir : path
        Output folder; refused when it exists unless ``overwrite``.
    parcels_path : path, optional
        Vector file holding the parcel.
    parcel_id : str, optional
        Id of the parcel in ``parcels_path``, matched against ``id_field``, else
        the rulebook's ``id_field`` when the layer has it, else the 1-based row.
    parcels_layer, parcels_crs : str, optional
        Layer of a multi-layer file; CRS to assume when the file has none.
    id_field : str, optional
        Attribute holding parcel ids.
    polygon : str, optional
        Vertices ``"x1,y1 x2,y2 ..."``; an open ring is closed and a
        self-intersecting one repaired, both with a warning.
    polygon_crs : str, optional
        CRS of ``polygon`` (default: the DEM's).
    class_name : str, optional
        Rulebook class to test against.  Needed when the parcel has no class
        value; when it has one, ``class_name`` overrides it (with a warning).
    connectivity : {4, 8}
        Neighbourhood of the largest buildable patch (default 4: cells meeting
        only at a corner are separate patches).
    dem_band, dem_crs, z_unit, method
        As for :func:`landcheck.core.audit.audit`.
    overwrite : bool
        Replace an existing output folder.
    dpi : int
        Resolution of the PNG figures.
    on_step : callable, optional
        Called with a progress message at each step.

    Returns
    -------
    PrescreenResult

    Raises
    ------
    InputDataError
        Parcel id not found, several features without an id, malformed polygon,
        class not in the rulebook, parcel outside the DEM, unreadable inputs.
    RuleFileError, OutputExistsError, OutputWriteError
        As for the audit.  Nothing is written when any error is raised.
    """
    import shapely

    from landcheck.core.run import run_audit
    from landcheck.core.settings import AuditSettings
    from landcheck.hashing import sha256_file
    from landcheck.inputs.dem_crop import crop_dem
    from landcheck.outputs.writers import check_output_path, staged_folder, write_gpkg, write_json

    started = _dt.datetime.now(_dt.timezone.utc)
    step = on_step or (lambda s: logger.info(s))
    if connectivity not in CONNECTIVITIES:
        raise InputDataError(f"connectivity: got {connectivity!r}; choose 4 or 8.")
    if (parcels_path is None) == (polygon is None):
        raise InputDataError(
            "give the parcel either as a vector file (--parcels) or as --polygon coordinates, not both and not neither."
        )
    if polygon is None and polygon_crs is not None:
        raise InputDataError("--polygon-crs applies to --polygon only; for a file use --parcels-crs.")
    rules = load_rules(rulebook_path)
    out = check_output_path(
        out_dir, [dem_path, parcels_path, rulebook_path, *rules.layers.values()], overwrite=overwrite
    )
    dem = open_dem(dem_path, band=dem_band, crs=dem_crs, z_unit=z_unit)
    z_unit = dem.z_unit  # read from the data when not given
    g = dem.grid
    notes: list[str] = []
    if polygon is not None:
        parcel = _parcel_from_polygon(polygon, polygon_crs, g.crs_wkt)
    else:
        parcel = _parcel_from_file(
            parcels_path,
            layer=parcels_layer,
            crs=parcels_crs,
            parcel_id=parcel_id,
            id_field=id_field,
            rules=rules,
            target_wkt=g.crs_wkt,
        )
    notes += parcel.notes
    cls, class_source, more = _resolve_class(rules, parcel, class_name)
    notes += more
    geom = parcel.geom
    dem_box = shapely.box(*g.bounds)
    overlap = geom.intersection(dem_box).area
    if overlap <= 0:
        raise InputDataError(
            f"{parcel.where}: the parcel lies outside the DEM (parcel bounds "
            f"{tuple(round(b, 3) for b in geom.bounds)}, DEM bounds {tuple(round(b, 3) for b in g.bounds)}, "
            "in the DEM's CRS); check the coordinates and their CRS (--polygon-crs / --parcels-crs)."
        )
    if overlap < geom.area * (1 - 1e-9):
        notes.append(
            f"{parcel.where}: {100 * (1 - overlap / geom.area):.1f} % of the parcel lies outside the DEM; "
            "only the part inside is evaluated."
        )
    from landcheck.geo.ground_area import ground_areas

    ground_m2 = float(ground_areas(np.array([geom], dtype=object), g.crs_wkt)[0][0])
    step(f"parcel {parcel.parcel_id}: class {cls.label} ({class_source}), {area_ha_text(ground_m2)} on the ground")

    from landcheck.evidence.maps import _closeup_bounds

    cell = abs(g.transform.a)
    view = _closeup_bounds(geom, cell)
    if _needs_whole_dem(rules):
        adem = dem
        step("the rulebook has zones that need the whole DEM; the audit runs on all of it")
    else:
        crop = _cells_of_bounds(g, view, margin=2)
        adem = crop_dem(dem, crop)  # a view on the same file: no scratch raster
        step(f"DEM cropped to {crop.width}x{crop.height} cells around the parcel")
    ag = adem.grid
    import geopandas as gpd

    cols = {rules.class_field: [cls.values[0]]}
    if rules.id_field is not None:
        cols[rules.id_field] = [parcel.parcel_id]
    parcel_frame = gpd.GeoDataFrame(cols, geometry=[geom], crs=ag.crs_wkt)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LandcheckWarning)
        res = run_audit(
            adem,
            parcel_frame,
            rules,
            AuditSettings(method=method, workers=1, show_progress=False),
            on_step=lambda s: step(f"audit: {s}"),
        )
    notes += res.warnings
    row = res.table.iloc[0].to_dict()
    figures, arrays = _figures(res, row, rules, cls, geom, ag, connectivity)
    step(
        f"buildable {figures['buildable']['area_m2']:,.0f} m², largest patch {figures['largest_patch']['area_m2']:,.0f} m²"
    )
    view_win = _cells_of_bounds(ag, view)
    slope_view = res.slope_pct(view_win).astype(np.float64)
    elev_view = adem.read(view_win)
    zone_layers = _zone_layers(res)

    figures.update(
        {
            "tool": "landcheck",
            "version": __version__,
            "caution": CAUTION,
            "inputs": [
                {"role": "dem", "path": str(Path(dem_path).resolve()), "sha256": sha256_file(dem_path)},
                {"role": "rulebook", "path": str(Path(rulebook_path).resolve()), "sha256": rules.sha256},
            ]
            + (
                [
                    {
                        "role": "parcels",
                        "path": str(Path(parcels_path).resolve()),
                        "sha256": sha256_file(parcels_path),
                    }
                ]
                if parcels_path is not None
                else []
            ),
            "parameters": {
                "slope_method": res.summary["manifest"]["parameters"]["slope_method"],
                "connectivity": connectivity,
                "z_unit": z_unit.value,
                "dem_band": dem.band,
                "dem_crs_override": dem_crs,
                "parcels_layer": parcels_layer,
                "parcels_crs": parcels_crs,
                "polygon_crs": polygon_crs,
                "dem_cropped": not _needs_whole_dem(rules),
            },
            "started_utc": started.isoformat(timespec="seconds"),
            "crs_wkt": g.crs_wkt,
            "warnings": notes,
        }
    )
    figures["parcel"].update(
        {
            "id": parcel.parcel_id,
            "source": parcel.source,
            "class_source": class_source,
            "class_value_in_file": parcel.class_value,
        }
    )
    for n in notes:
        warnings.warn(n, LandcheckWarning, stacklevel=2)

    with staged_folder(out, overwrite=overwrite) as stage:
        patch_gdf = gpd.GeoDataFrame(
            {
                "parcel_id": [parcel.parcel_id],
                "area_m2": [figures["largest_patch"]["area_m2"]],
                "cells": [figures["largest_patch"]["cells"]],
                "connectivity": [connectivity],
            },
            geometry=[arrays["patch_geom"]],
            crs=g.crs_wkt,
        )
        write_gpkg(stage / "largest_patch.gpkg", patch_gdf, layer="largest_patch")
        map_png = _draw_map(stage, dpi, figures, geom, arrays, ag, view_win, slope_view, elev_view, zone_layers, None)
        hist_png = _draw_histogram(stage, dpi, figures)
        write_json(stage / "prescreen.json", figures)
        _write_html(stage / "prescreen.html", figures, map_png, hist_png)
    step(f"outputs in {out}")
    return PrescreenResult(out, figures, notes)


# --------------------------------------------------------------------------- figures


def _forbidden_vector_union(zone_layers: dict, rules: Rulebook, cls: ClassRule):
    """Union of the vector zones (easement strips, flood polygons) the class forbids, as the audit built them.

    Taken from the audit's zone layers (what ``zones/zone_<name>.gpkg`` holds); for per-context easement
    widths the strip is chosen by :func:`landcheck.zones.prepare.pick_variant`, as in the audit.
    """
    import shapely

    parts = []
    for zname in cls.forbidden_zones:
        z = rules.zone_by_name(zname)
        if z.kind in _RASTER_ZONE_KINDS:
            continue
        gdf = zone_layers[f"zone_{zname}"]
        if "context" in gdf.columns:
            # one row per piece (zones.prepare.zone_pieces_frame): the pieces of each context together
            variants = {
                None if c == "all" else LandContext(c): shapely.GeometryCollection(list(grp.geometry.values))
                for c, grp in gdf.groupby("context", sort=False)
            }
            geoms = [pick_variant(variants, cls.context)]
        else:
            geoms = list(gdf.geometry.values)
        parts += [gg for gg in geoms if gg is not None and not gg.is_empty]
    return polygonal_part(shapely.union_all(parts)) if parts else shapely.Polygon()


def _raster_forbidden_bits(rules: Rulebook, cls: ClassRule) -> int:
    """Conflict-raster bits (docs/outputs.md: bit k+1 = rulebook zone k) of forbidden cell-based zones."""
    bits = 0
    for zi, z in enumerate(rules.zones):
        if z.name in cls.forbidden_zones and z.kind in _RASTER_ZONE_KINDS:
            bits |= 1 << (zi + 1)
    return bits


def _coverage_grid(geom, grid: GridSpec, win: Window) -> np.ndarray:
    from landcheck.overlay.coverage import coverage_triplets

    frac = np.zeros((win.height, win.width))
    if geom is None or geom.is_empty:
        return frac
    _, rr, cc, f = coverage_triplets(np.array([geom], dtype=object), grid.window_transform(win), win.height, win.width)
    np.add.at(frac, (rr, cc), f)
    return frac


def _histogram_edges(limit_pct: float | None) -> np.ndarray:
    edges = np.arange(0.0, _HIST_TOP_PCT + _HIST_STEP_PCT, _HIST_STEP_PCT)
    if limit_pct is not None and not np.any(np.isclose(edges, limit_pct, rtol=0, atol=1e-12)):
        edges = np.sort(np.append(edges, limit_pct))
    return np.append(edges, np.inf)


def _figures(res, row: dict, rules: Rulebook, cls: ClassRule, geom, grid: GridSpec, connectivity: int):
    """Per-parcel figures from the audit outputs (pure apart from reading the audit's rasters and zone layers)."""
    import geopandas as gpd

    from landcheck.geo.ground_area import ground_areas

    win = _cells_of_bounds(grid, geom.bounds)
    slope = res.slope_pct(win).astype(np.float64)
    bits = res.conflict_bits(win)
    _, factor = ground_areas(gpd.GeoDataFrame(geometry=[geom], crs=grid.crs_wkt), grid.crs_wkt)
    rows = np.arange(win.row_off, win.row_off + win.height)
    cell_m2 = (grid.cell_area_m2(rows) * float(factor[0]))[:, None] * np.ones((1, win.width))
    frac = _coverage_grid(geom, grid, win)
    forbidden_vec = _forbidden_vector_union(dict(_zone_layers(res)), rules, cls)
    free_geom = polygonal_part(geom.difference(forbidden_vec)) if not forbidden_vec.is_empty else geom
    free = _coverage_grid(free_geom, grid, win) if not forbidden_vec.is_empty else frac
    valid = np.isfinite(slope)
    inside = frac > 0
    rbits = _raster_forbidden_bits(rules, cls)
    slope_breach = inside & ((bits & _SLOPE_BIT) != 0)
    zone_cells = inside & ((bits.astype(np.int64) & rbits) != 0)
    meets = inside & valid & ~slope_breach & ~zone_cells  # every cell-level rule of the class
    buildable_w = np.where(meets, free, 0.0) * cell_m2
    buildable_m2 = float(buildable_w.sum())
    patch_m2, patch = largest_patch(meets & (free > 0), buildable_w, connectivity)

    limit = cls.max_slope_pct
    edges = _histogram_edges(limit)
    a = frac * cell_m2
    sv = slope[valid & inside]
    idx = np.clip(np.searchsorted(edges, sv, side="right") - 1, 0, len(edges) - 2)
    hist = np.bincount(idx, weights=a[valid & inside], minlength=len(edges) - 1)
    at_over = float(hist[edges[:-1] >= limit].sum()) if limit is not None else None

    covered = float(row["covered_m2"])
    free_geom_buildable = polygonal_part(
        mask_union(meets & (free > 0), grid.window_transform(win)).intersection(free_geom)
    )
    patch_geom = polygonal_part(mask_union(patch, grid.window_transform(win)).intersection(free_geom))
    zone_cols = {c["name"]: c for c in res.summary.get("zone_columns", [])}
    kinds = {c["name"]: c.get("kind") for c in (res.summary.get("zones") or {}).get("columns", [])}
    zones = []
    for name, c in zone_cols.items():
        m2 = float(row.get(f"zone_{name}_m2", 0.0) or 0.0)
        zones.append(
            {
                "name": name,
                "label": c["label"],
                "kind": kinds.get(name),
                "rulebook_zone": bool(c["rulebook_zone"]),
                "forbidden": name in cls.forbidden_zones,
                "area_m2": m2,
                "share": (m2 / covered) if covered > 0 else None,
                "touches": m2 > 0,
            }
        )

    def f(k):
        v = row.get(k)
        try:
            v = float(v)
        except (TypeError, ValueError):
            return None
        return v if math.isfinite(v) else None

    figures = {
        "parcel": {
            "class_name": cls.name,
            "class_label": cls.label,
            "class_value_tested": cls.values[0],
            "development_class": cls.development,
            "area_m2": f("area_m2"),
            "covered_m2": covered,
            "evaluated_m2": f("evaluated_m2"),
            "evaluated_share": f("evaluated_share"),
            "slope_mean_pct": f("slope_mean_pct"),
            "slope_max_pct": f("slope_max_pct"),
            "bounds": list(geom.bounds),
        },
        "rule": {
            "max_slope_pct": limit,
            "tolerance_share": cls.tolerance_share,
            "min_breach_m2": cls.min_breach_m2,
            "review_band_pct": cls.review_band_pct,
            "forbidden_zones": list(cls.forbidden_zones),
        },
        "verdict": str(row["verdict"]),
        "reasons": [r for r in str(row["reasons"]).split(" | ") if r],
        "conflict_m2": f("conflict_m2"),
        "conflict_share": f("conflict_share"),
        "over_limit_m2": f("over_limit_m2"),
        "slope_histogram": {
            "bin_edges_pct": edges.tolist(),
            "area_m2": hist.tolist(),
            "limit_pct": limit,
            "at_or_over_limit_m2": at_over,
        },
        "buildable": {
            "area_m2": buildable_m2,
            "share_of_parcel": buildable_m2 / covered if covered > 0 else None,
            "rule": "slope defined and below the class limit, outside every zone the class forbids; "
            "exact coverage of the parcel (minus forbidden vector zones) on those cells",
        },
        "largest_patch": {
            "area_m2": patch_m2,
            "share_of_parcel": patch_m2 / covered if covered > 0 else None,
            "share_of_buildable": patch_m2 / buildable_m2 if buildable_m2 > 0 else None,
            "cells": int(patch.sum()),
            "connectivity": connectivity,
            "bounds": list(patch_geom.bounds) if not patch_geom.is_empty else None,
        },
        "zones": zones,
    }
    arrays = {
        "patch_geom": patch_geom,
        "buildable_geom": free_geom_buildable,
        "forbidden_vec": forbidden_vec,
        "slope_breach_geom": polygonal_part(mask_union(slope_breach, grid.window_transform(win)).intersection(geom)),
        "zone_cells_geom": polygonal_part(mask_union(zone_cells, grid.window_transform(win)).intersection(geom)),
        "window": win,
    }
    return figures, arrays


def _zone_layers(res) -> list[tuple[str, object]]:
    """The audit's zone layers (name, GeoDataFrame), sorted by name as ``zones/*.gpkg`` are listed."""
    zones = res.zones
    return sorted(zones.layers.items()) if zones is not None and zones.layers else []


# --------------------------------------------------------------------------- drawing


def _draw_map(
    stage: Path,
    dpi: int,
    figures: dict,
    geom,
    arrays: dict,
    grid: GridSpec,
    view_win: Window,
    slope_view: np.ndarray,
    elev_view: np.ndarray,
    zone_layers,
    audit_dir: Path | None = None,
) -> Path:
    """``map.png``: slope classes over relief, parcel, non-buildable parts, forbidden zones, largest patch."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    from landcheck.evidence import maps as M

    crs = M._crs(grid.crs_wkt)
    breaks = np.asarray(M.DEFAULT_SLOPE_BREAKS_PCT)
    colours = M.slope_class_colours(len(breaks) - 1)
    rows = np.arange(view_win.row_off, view_win.row_off + view_win.height)
    hx, hy = grid.cell_size_m(rows)
    finite = np.isfinite(elev_view)
    filled = np.where(finite, elev_view, np.nanmean(elev_view) if finite.any() else 0.0)
    shade = np.where(finite, M.hillshade(filled, float(np.mean(hx)), float(np.mean(hy))), np.nan)
    t = grid.window_transform(view_win)
    extent = (t.c, t.c + t.a * view_win.width, t.f + t.e * view_win.height, t.f)
    x0, y0, x1, y1 = M._closeup_bounds(geom, abs(grid.transform.a))

    fig = M._new_figure(MAP_SIZE_IN, dpi)
    ax = fig.add_axes([0.085, 0.18, 0.55, 0.69])
    ax.imshow(
        M._composite(slope_view, shade, breaks, colours),
        extent=extent,
        origin="upper",
        interpolation="nearest",
        zorder=1,
    )
    groups = [
        (
            "Slope class",
            [Patch(facecolor=c, edgecolor="#555555", lw=0.5) for c in colours],
            M.slope_class_labels(breaks),
        )
    ]
    # zones (outlines, as on the audit maps)
    zh, zl = [], []
    for i, (name, gdf) in enumerate(zone_layers):
        if not name.startswith("zone_"):
            continue
        sub = gdf.cx[x0:x1, y0:y1]
        sub = sub[sub.geom_type.isin(["Polygon", "MultiPolygon"])]
        if sub.empty:
            continue
        colour, hatch = M._ZONE_STYLE[i % len(M._ZONE_STYLE)]
        M._add_polygons(ax, sub.geometry, facecolors="none", edgecolors=colour, hatch=hatch, linewidths=1.0, zorder=3)
        zh.append(Patch(facecolor="none", edgecolor=colour, hatch=hatch, lw=1.0))
        zl.append(f"hazard zone: {name[5:].replace('_', ' ')}")
    # parts of the parcel that are not buildable, hatched like the audit's conflict cells
    slope_g = arrays["slope_breach_geom"]
    zone_g = polygonal_part(arrays["zone_cells_geom"].union(arrays["forbidden_vec"].intersection(geom)))
    kinds = {
        1: polygonal_part(slope_g.difference(zone_g)),
        2: polygonal_part(zone_g.difference(slope_g)),
        3: polygonal_part(slope_g.intersection(zone_g)),
    }
    ch, cl = [], []
    for k, gk in kinds.items():
        if gk.is_empty:
            continue
        M._add_polygons(
            ax,
            [gk],
            facecolors=[(1, 1, 1, 0.28)],
            edgecolors="#161616",
            hatch=M._CONFLICT_HATCH[k],
            linewidths=0.4,
            zorder=4,
        )
        ch.append(Patch(facecolor=(1, 1, 1, 0.28), edgecolor="#161616", hatch=M._CONFLICT_HATCH[k], lw=0.4))
        cl.append(M._CONFLICT_TEXT[k])
    if np.isnan(slope_view).any():
        ch.append(Patch(facecolor=M._NODATA_GREY, edgecolor="#555555", lw=0.5))
        cl.append("no slope value (not buildable)")
    # largest buildable patch
    patch_geom = arrays["patch_geom"]
    lp = figures["largest_patch"]
    ph, pl = [], []
    if not patch_geom.is_empty:
        M._add_polygons(
            ax,
            [patch_geom],
            facecolors=[_PATCH_FILL],
            edgecolors=_PATCH_COLOUR,
            linewidths=2.2,
            zorder=5,
            path_effects=M._halo(4.0),
        )
        ph.append(Patch(facecolor=_PATCH_FILL, edgecolor=_PATCH_COLOUR, lw=2.2))
        pl.append(f"largest buildable patch, {lp['area_m2']:,.0f} m\u00b2 ({lp['connectivity']}-connected cells)")
    verdict = figures["verdict"]
    colour, lw, ls = M._VERDICT_STYLE.get(verdict, ("#444444", 1.2, "solid"))
    M._add_lines(ax, [geom], colors=colour, linewidths=lw, linestyles=[ls], zorder=6, path_effects=M._halo(lw + 2.2))
    ph.insert(0, Line2D([0], [0], color=colour, lw=lw, linestyle=ls, path_effects=M._halo(lw + 2.2)))
    pl.insert(0, f"parcel ({VERDICT_TEXT.get(verdict, verdict)})")
    groups.insert(0, ("Parcel", ph, pl))
    groups.append(("Not buildable (the rest of the parcel is)", ch, cl))
    groups.append(("Zones", zh, zl))
    M._format_axes(ax, crs, (x0, x1, y0, y1))
    M._draw_scale_and_north(ax, crs, (x0, x1, y0, y1))
    lax = fig.add_axes([0.67, 0.18, 0.32, 0.69])
    lax.axis("off")
    M._legend_column(fig, lax, groups)
    p = figures["parcel"]
    b = figures["buildable"]
    M._figure_frame(
        fig,
        f"Parcel {p['id']}: buildable area and slope",
        f"class {p.get('class_label') or p['class_name']} \u00b7 buildable {b['area_m2']:,.0f} m\u00b2 of "
        f"{p['covered_m2']:,.0f} m\u00b2 \u00b7 verdict {verdict}",
        [M._crs_note(crs) + "."],
    )
    M._save(fig, stage, "map", dpi, ("png",))
    return stage / "map.png"


_PATCH_COLOUR = "#0b6e4f"
_PATCH_FILL = (0.04, 0.43, 0.31, 0.22)


def _draw_histogram(stage: Path, dpi: int, figures: dict) -> Path:
    """``histogram.png``: parcel area per slope bin; bins at or over the limit dark and hatched (audit chart style)."""
    from landcheck.evidence import maps as M

    h = figures["slope_histogram"]
    edges = np.array([np.inf if e is None else e for e in h["bin_edges_pct"]], dtype=np.float64)
    area = np.asarray(h["area_m2"], dtype=np.float64)
    limit = h["limit_pct"]
    lo = edges[:-1]
    hi = np.where(np.isinf(edges[1:]), lo + _HIST_STEP_PCT, edges[1:])
    over = lo >= limit if limit is not None else np.zeros(lo.shape, bool)
    fig = M._new_figure(HISTOGRAM_SIZE_IN, dpi)
    ax = fig.add_axes([0.17, 0.2, 0.78, 0.6])
    step_edges = np.append(lo, hi[-1])
    ax.stairs(np.where(over, 0.0, area), step_edges, fill=True, facecolor="#a9c4e0", edgecolor="#24509a", lw=0.6)
    ax.stairs(
        np.where(over, area, 0.0), step_edges, fill=True, facecolor="#3b3b3b", edgecolor="#161616", hatch="////", lw=0.6
    )
    nz = np.nonzero(area > 0)[0]
    xmin = float(lo[nz[0]]) if nz.size else 0.0
    xmax = float(hi[nz[-1]]) if nz.size else 30.0
    title = "no slope limit"
    if limit is not None:
        xmin, xmax = min(xmin, limit), max(xmax, limit)
        ax.axvline(limit, color="#161616", lw=1.2, ls=(0, (4, 2)))
        tot = area.sum()
        share = area[over].sum() / tot if tot > 0 else 0.0
        title = f"limit {limit:g} % (dashed): {share:.1%} of the area at or over"
    pad = max(1.0, 0.08 * (xmax - xmin))
    ax.set_xlim(max(0.0, math.floor(xmin - pad)), min(math.ceil(xmax + pad), float(hi[-1])))
    ax.set_title(title, fontsize=7.5, loc="left")
    ax.set_xlabel("slope (%), 1 % bins", fontsize=7.5)
    ax.set_ylabel("area (m\u00b2)", fontsize=7.5)
    ax.tick_params(labelsize=7)
    ax.grid(True, axis="y", color="#cccccc", lw=0.4)
    ax.set_axisbelow(True)
    fig.text(0.02, 0.97, "Slope of the parcel", ha="left", va="top", fontsize=9, fontweight="bold")
    fig.text(0.02, 0.015, "exact cell-coverage weights", ha="left", va="bottom", fontsize=6.5, color="#555555")
    M._save(fig, stage, "histogram", dpi, ("png",))
    return stage / "histogram.png"


# --------------------------------------------------------------------------- page


_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; form-action 'none'"

_CSS = """
@page{size:A4 portrait;margin:11mm}
*{box-sizing:border-box}
body{margin:0 auto;max-width:188mm;font:9.5pt/1.35 system-ui,"DejaVu Sans",sans-serif;color:#1b1b1b;background:#fff}
h1{font-size:15pt;margin:0 0 1mm}
h2{font-size:10.5pt;margin:2.5mm 0 1mm;border-bottom:1.5px solid #1b1b1b}
.sub,.muted{color:#5b5b5b}
.sub{margin:0 0 1.5mm;font-size:8.5pt}
.caution{border:2.5px solid #7a2a00;background:#fff1dc;color:#7a2a00;padding:2mm 3mm;margin:1.5mm 0;font-weight:700;
font-size:10pt}
.verdict{margin:1.5mm 0}
.badge{display:inline-block;padding:0 5px;border-radius:3px;border:1.5px solid;font-weight:700}
ul{margin:.5mm 0 0;padding-left:5mm}
.cards{display:flex;gap:2mm;margin:1.5mm 0}
.card{flex:1;border:1px solid #c9c9c9;border-radius:4px;padding:1.2mm 2mm;background:#f3f1ec}
.card-h{font-size:7.5pt;color:#5b5b5b}
.card-v{font-size:11pt;font-weight:700}
img{display:block;width:100%;height:auto}
figure{margin:1mm 0}
.cols{display:flex;gap:3mm;align-items:flex-start}
.cols>div{flex:1}
table{border-collapse:collapse;width:100%;font-size:8pt}
th,td{border-bottom:1px solid #c9c9c9;padding:.6mm 1.2mm;text-align:left;vertical-align:top}
td.n{text-align:right;white-space:nowrap;font-variant-numeric:tabular-nums}
.small{font-size:7.5pt}
footer{margin-top:2mm;border-top:1px solid #c9c9c9;padding-top:1mm}
@media print{
body{max-width:none}
.sheet{max-height:274mm;overflow:hidden}
#map img{max-height:92mm;width:auto;max-width:100%;margin:0 auto}
#histogram img{max-height:52mm;width:auto;max-width:100%}
}
""" + verdict_badge_css()
#: warnings listed on the sheet; the rest are in prescreen.json (the page stays one A4 sheet)
_MAX_PAGE_WARNINGS = 3


def _e(text) -> str:
    return html.escape("" if text is None else str(text), quote=True)


def _m2(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "\u2013"
    return f"{v:,.0f} m\u00b2" if abs(v) >= 10 else f"{v:.1f} m\u00b2"


def _share(v) -> str:
    return "\u2013" if v is None else f"{100 * v:.1f} %"


def _img(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{_e(alt)}">'


def _write_html(path: Path, figures: dict, map_png: Path, hist_png: Path) -> None:
    from landcheck.evidence.report import html_head
    from landcheck.outputs.writers import atomic_file

    p, b, lp, rule = figures["parcel"], figures["buildable"], figures["largest_patch"], figures["rule"]
    verdict = figures["verdict"]
    limit = rule["max_slope_pct"]
    cards = [
        ("Parcel area", _m2(p["area_m2"])),
        ("Buildable area", f'{_m2(b["area_m2"])} <span class="muted">({_share(b["share_of_parcel"])})</span>'),
        (
            "Largest buildable patch",
            f'{_m2(lp["area_m2"])} <span class="muted">({_share(lp["share_of_parcel"])})</span>',
        ),
        (
            "Slope mean / max",
            "\u2013" if p["slope_mean_pct"] is None else f"{p['slope_mean_pct']:.1f} / {p['slope_max_pct']:.1f} %",
        ),
        ("Slope limit", "none" if limit is None else f"{limit:g} %"),
    ]
    zone_rows = [z for z in figures["zones"] if z["touches"]]
    if zone_rows:
        ztable = (
            '<table id="zones"><thead><tr><th>Zone</th><th>Rule</th><th>Area</th><th>Share</th></tr></thead>'
            "<tbody>"
            + "".join(
                f"<tr><td>{_e(z['label'])}</td><td>{'forbidden' if z['forbidden'] else 'reported'}</td>"
                f'<td class="n">{_e(_m2(z["area_m2"]))}</td><td class="n">{_e(_share(z["share"]))}</td></tr>'
                for z in zone_rows
            )
            + "</tbody></table>"
        )
    elif figures["zones"]:
        ztable = '<p id="zones">No hazard zone of the rulebook touches the parcel.</p>'
    else:
        ztable = '<p id="zones">The rulebook defines no hazard zones.</p>'
    zone_names = {z.get("name"): z.get("label") for z in figures["zones"] if z.get("name")}
    forbidden = ", ".join(zone_names.get(z) or z.replace("_", " ") for z in rule["forbidden_zones"]) or "none"
    rule_text = (
        f"Class <b>{_e(p['class_label'])}</b> (from {_e(p['class_source'])}): "
        f"slope limit {'none' if limit is None else f'{limit:g} % (or over breaches)'}; forbidden zones: "
        f"{_e(forbidden)}; tolerance {100 * rule['tolerance_share']:g} %, minimum breach "
        f"{rule['min_breach_m2']:g} m\u00b2."
    )
    shown = figures["warnings"][:_MAX_PAGE_WARNINGS]
    more = len(figures["warnings"]) - len(shown)
    warn_html = (
        '<ul class="small">'
        + "".join(f"<li>{_e(w)}</li>" for w in shown)
        + (f'<li class="muted">{more} more in prescreen.json</li>' if more > 0 else "")
        + "</ul>"
        if figures["warnings"]
        else '<p class="small muted">None.</p>'
    )
    ins = " \u00b7 ".join(
        f"{_e(i['role'])} <code>{_e(Path(i['path']).name)}</code> sha256 {_e(i['sha256'][:_SHA_SHORT])}\u2026"
        for i in figures["inputs"]
    )
    badge_cls = verdict if verdict in VERDICTS else "no_data"
    parts = [
        html_head(f"landcheck pre-screen - parcel {p['id']}", _CSS, _CSP),
        # one sheet: in print the page is clipped to one A4 content box (the figures are sized to fit)
        f'<div class="sheet"><header><h1>Pre-screen of parcel {_e(p["id"])}</h1>',
        (
            f'<p class="sub">{_e(p["source"])} \u00b7 run {_e(figures["started_utc"])} \u00b7 landcheck '
            f"{_e(figures['version'])}</p>"
        ),
        f'<div class="caution" role="note" id="caution">\u26a0 {_e(CAUTION)}</div></header><main>',
        (
            f'<div class="verdict" id="verdict">Verdict: <span class="badge v-{badge_cls}">'
            f'{_e(VERDICT_TEXT.get(verdict, verdict.replace("_", " ")))}</span> <span class="small">{rule_text}</span>'
        ),
        '<ul class="small" id="reasons">' + "".join(f"<li>{_e(r)}</li>" for r in figures["reasons"]) + "</ul></div>",
        '<div class="cards" id="figures">'
        + "".join(
            f'<div class="card"><div class="card-h">{_e(h)}</div><div class="card-v">{v}</div></div>' for h, v in cards
        )
        + "</div>",
        f'<figure id="map">{_img(map_png, "Map of the parcel: slope classes, non-buildable parts hatched, largest buildable patch outlined")}</figure>',
        '<div class="cols"><div>',
        f'<figure id="histogram">{_img(hist_png, "Parcel area per 1 % slope bin with the slope limit marked")}</figure>',
        "</div><div><h2>Hazard zones touching the parcel</h2>",
        ztable,
        (
            '<h2>How the figures are made</h2><p class="small">Areas are exact: each DEM cell counts with the share of '
            "it the parcel covers. <b>Buildable</b> = cells whose slope is defined and below the limit, outside every "
            "cell-based zone the class forbids, counted with the part of the cell inside the parcel and outside every "
            "forbidden zone polygon. The <b>largest buildable patch</b> joins buildable cells sharing "
            f"{'an edge' if lp['connectivity'] == 4 else 'an edge or a corner'} ({lp['connectivity']}-connectivity). "
            "Shares are of the parcel's area inside the DEM.</p>"
        ),
        "<h2>Warnings</h2>",
        warn_html,
        "</div></div></main>",
        (
            f'<footer class="small"><p><strong>{_e(CAUTION)}</strong></p><p class="muted">Inputs: {ins}. Figures in '
            "prescreen.json; patch polygon in largest_patch.gpkg.</p></footer>"
        ),
        "</div></body></html>\n",
    ]
    with atomic_file(path, overwrite=True) as tmp:
        tmp.write_text("\n".join(parts), encoding="utf-8")
