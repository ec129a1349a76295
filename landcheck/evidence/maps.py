"""Maps of an audit output folder: the overview map and parcel close-ups (matplotlib figures only).

Everything here reads the folder written by ``landcheck audit`` (see
docs/outputs.md) and nothing else, except the DEM named in the run manifest
(role ``"dem"``), which is used only for relief shading.  When that DEM is
missing or on another grid, the slope raster itself is shaded instead and the
figure says so.

Figures are deterministic: the date shown is the audit's start time from the
manifest, not the time of drawing, and PNG/SVG metadata carry no timestamp, so
redrawing from the same folder gives byte-identical files.

Colour and symbols are chosen to survive colour-blind viewing and greyscale
printing: slope classes get strictly decreasing CIE L* lightness (steeper is
darker), parcel verdicts differ in line style and width as well as colour,
and conflict cells are hatched rather than coloured.
"""

from __future__ import annotations

import contextlib
import io
import logging
import math
import os
import re
import tempfile
import textwrap
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from landcheck.about import CAUTION
from landcheck.engine.memory import release_heap
from landcheck.errors import InputDataError
from landcheck.evidence.folder import (
    AuditFolder,
    _isnan,
    load_audit_folder,
)
from landcheck.evidence.hillshade import SUN_ALTITUDE_DEG, hillshade
from landcheck.evidence.style import (
    DEFAULT_SLOPE_BREAKS_PCT,
    VERDICT_TEXT,
    _check_breaks,
    _fmt_num,
    classify_slope,
    count_text,
    slope_class_colours,
    slope_class_labels,
)
from landcheck.outputs.writers import write_bytes
from landcheck.verdicts.labels import VERDICT_COLOURS, VERDICT_LABELS, VERDICT_LINES, VERDICTS

__all__ = [
    "DEFAULT_SLOPE_BREAKS_PCT",
    "VERDICTS",
    "AuditFolder",
    "FigureFiles",
    "FigureItem",
    "LegendEntry",
    "ScaleBar",
    "load_audit_folder",
    "hillshade",
    "classify_slope",
    "slope_class_labels",
    "slope_class_colours",
    "choose_scale_bar",
    "true_north_angle_deg",
    "overview_map",
    "parcel_closeup_maps",
]

logger = logging.getLogger(__name__)


# verdict vocabulary: landcheck.verdicts.labels
_VERDICT_TEXT = VERDICT_LABELS
_VERDICT_STYLE = {v: (VERDICT_COLOURS[v], *VERDICT_LINES[v]) for v in VERDICTS}
_CONFLICT_HATCH = {1: "////", 2: "\\\\\\\\", 3: "xxxx"}
_CONFLICT_TEXT = {
    1: "slope at or over the class limit",
    2: "inside a zone the class forbids",
    3: "both slope and forbidden zone",
}
_ZONE_STYLE = [("#0b5f8a", ".."), ("#2f7d4f", "oo"), ("#6a4c93", "++"), ("#8a5a0b", "--")]
#: cell-based hazard zones (zones/cells.tif, one bit each): fill colour per bit, drawn as a light tint
#: with a darker edge tone in the legend; apart from the slope ramp, the conflict tints and the water blue
CELL_ZONE_COLOURS = ["#1d7a8c", "#9a6b00", "#5a3e9b", "#3f7f1f", "#a33c6b", "#2b4f9e", "#7a4a2a"]
_CELL_ZONE_ALPHA = 0.42
_NODATA_GREY = np.array([0.86, 0.86, 0.86])
_PNG_METADATA = {"Software": None}
#: zlib level of the PNG figures: level 1 encodes several times faster than the default 6 for
#: files about a quarter larger (measured in docs/scale.md)
_PNG_ZLIB_LEVEL = 1
#: permission bits of written figures (mkstemp creates 0600; common practice for shared outputs is 0644)
_WATER_COLOUR = "#1f5fa0"
#: above this many parcels in view, outlines are burnt into one image at the map's pixel size
#: (a 100 000-parcel SVG of paths would be ~50 MB and take tens of seconds to draw)
_MANY_PARCELS = 3000
#: above this many conflict display cells, conflict cells are tinted, not hatched polygons
_MANY_CONFLICT_CELLS = 40_000
_CONFLICT_TINT = {1: (0.09, 0.09, 0.09, 0.5), 2: (0.42, 0.0, 0.36, 0.5), 3: (0.0, 0.0, 0.0, 0.78)}
_LEGEND_WRAP_CHARS = 34
_SVG_METADATA = {"Date": None}
_RC = {"svg.hashsalt": "landcheck", "font.size": 9.0, "hatch.linewidth": 0.8, "axes.titlesize": 10.0}


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class LegendEntry:
    """One legend row: ``group`` (slope_class, relief, verdict, conflict, zone), a stable ``key`` and the text shown."""

    group: str
    key: str
    label: str


@dataclass
class FigureItem:
    """One drawn figure: file stem, caption, written paths and legend rows."""

    stem: str
    caption: str
    paths: list[Path]
    legend_entries: list[LegendEntry] = field(default_factory=list)
    parcel_id: str | None = None

    @property
    def png(self) -> Path | None:
        return next((p for p in self.paths if p.suffix == ".png"), None)


class FigureFiles(list):
    """List of written paths (PNG and SVG of every figure), plus what was drawn.

    Attributes
    ----------
    items : list of FigureItem
        One per figure, in drawing order (closeups: largest conflict first).
    legend_entries : list of LegendEntry
        Legend rows of all figures, without duplicates, in order.
    """

    def __init__(self, items: Iterable[FigureItem] = ()):
        items = list(items)
        super().__init__(p for it in items for p in it.paths)
        self.items = items
        seen: dict[LegendEntry, None] = {}
        for it in items:
            for e in it.legend_entries:
                seen.setdefault(e, None)
        self.legend_entries = list(seen)


@dataclass(frozen=True)
class ScaleBar:
    """A scale bar: its ground length, its length in map units, and its label."""

    length_m: float
    length_map: float
    label: str


# --------------------------------------------------------------------------- pure helpers


def _nice_length(max_len: float) -> float:
    """Largest 1, 2 or 5 x 10^k not above ``max_len`` (common practice for scale bars)."""
    if not max_len > 0:
        raise ValueError(f"scale bar: got span {max_len}; expected a positive length")
    k = math.floor(math.log10(max_len))
    for m in (5.0, 2.0, 1.0):
        if m * 10**k <= max_len * (1 + 1e-12):
            return m * 10**k
    return 10 ** (k - 1) * 5.0


def _crs(crs_like):
    from pyproj import CRS

    if isinstance(crs_like, CRS):
        return crs_like
    if hasattr(crs_like, "to_wkt"):
        return CRS.from_wkt(crs_like.to_wkt())
    return CRS.from_user_input(crs_like)


def _metres_per_map_unit_x(crs, lat_deg: float) -> float:
    crs = _crs(crs)
    if crs.is_geographic:
        from landcheck.geo.geodesy import metres_per_degree_lon

        return float(metres_per_degree_lon(lat_deg))
    return float(crs.axis_info[0].unit_conversion_factor)


def choose_scale_bar(
    x_min: float, x_max: float, y_min: float, y_max: float, crs, *, fraction: float = 0.25
) -> ScaleBar:
    """Pick a round scale-bar length near ``fraction`` of the map width.

    Parameters
    ----------
    x_min, x_max, y_min, y_max : float
        Map extent in the CRS's units (degrees on geographic data).
    crs : pyproj.CRS, rasterio CRS or user input
        On geographic data the bar is measured along the central parallel
        (ellipsoidal metres per degree of longitude); on projected data in the
        CRS's linear unit converted to metres (grid distance).
    fraction : float
        Upper bound of the bar as a share of the map width.

    Returns
    -------
    ScaleBar
    """
    lat_c = 0.5 * (y_min + y_max)
    m_per_unit = _metres_per_map_unit_x(crs, lat_c)
    length_m = _nice_length(abs(x_max - x_min) * m_per_unit * fraction)
    label = f"{_fmt_num(length_m / 1000.0)} km" if length_m >= 1000.0 else f"{_fmt_num(length_m)} m"
    return ScaleBar(length_m=length_m, length_map=length_m / m_per_unit, label=label)


def true_north_angle_deg(x: float, y: float, crs) -> float:
    """Angle of true north from the map's +y axis at (x, y), degrees, positive clockwise (towards +x)."""
    crs = _crs(crs)
    if crs.is_geographic:
        return 0.0
    from pyproj import Transformer

    geo = crs.geodetic_crs
    fwd = Transformer.from_crs(crs, geo, always_xy=True)
    inv = Transformer.from_crs(geo, crs, always_xy=True)
    lon, lat = fwd.transform(x, y)
    step = 1e-3 if lat < 89.99 else -1e-3
    x2, y2 = inv.transform(lon, lat + step)
    ang = math.degrees(math.atan2(x2 - x, y2 - y))
    return ang if step > 0 else ang - math.copysign(180.0, ang)


# --------------------------------------------------------------------------- reading the folder


# --------------------------------------------------------------------------- raster reading


@dataclass
class _Grid:
    data: np.ndarray
    extent: tuple[float, float, float, float]  # left, right, y of last row edge, y of first row edge
    transform: object
    factor: int
    crs: object


def _window_for(ds, bounds):
    from rasterio.windows import Window

    if bounds is None:
        return Window(0, 0, ds.width, ds.height)
    t = ds.transform  # north-up (checked by the caller): col = (x - c) / a, row = (y - f) / e
    cols = [(x - t.c) / t.a for x in (bounds[0], bounds[2])]
    rows = [(y - t.f) / t.e for y in (bounds[1], bounds[3])]
    c0, c1 = max(0, math.floor(min(cols))), min(ds.width, math.ceil(max(cols)))
    r0, r1 = max(0, math.floor(min(rows))), min(ds.height, math.ceil(max(rows)))
    if c1 <= c0 or r1 <= r0:
        return None
    return Window(c0, r0, c1 - c0, r1 - r0)


def _read_reduced(path: Path, bounds, max_px: int, kind: str) -> _Grid | None:
    """Read a window of band 1 reduced by an integer factor so neither side exceeds ``max_px``.

    ``kind="mean"``: mean of the valid cells per block (NaN when none).
    ``kind="bits"``: bitwise OR of the cells inside parcels (value != 255); 255 when none.
    Every full-resolution cell is read once, in rows, and reduced by compiled loops
    (:mod:`landcheck.evidence.display_loops`); a COG's overviews are not used, so the maps are the
    same whether they are drawn from the COG or from the audit's scratch copy of it.
    """
    import rasterio
    from affine import Affine

    with rasterio.open(path) as ds:
        t = ds.transform
        if t.b != 0 or t.d != 0:
            raise InputDataError(f"{path}: rotated or sheared grids cannot be mapped; expected a north-up GeoTIFF.")
        win = _window_for(ds, bounds)
        if win is None:
            return None
        h, w = int(win.height), int(win.width)
        f = max(1, math.ceil(max(h, w) / max_px))
        out_h, out_w = math.ceil(h / f), math.ceil(w / f)
        tr = Affine(t.a * f, 0.0, t.c + t.a * win.col_off, 0.0, t.e * f, t.f + t.e * win.row_off)
        left, top = tr.c, tr.f
        right, bottom = left + out_w * tr.a, top + out_h * tr.e
        out = _reduce_window(ds, win, f, kind)
        return _Grid(out, (left, right, bottom, top), tr, f, ds.crs)


#: cells read at a time by a reduced read (about 16 MB of float32)
_CHUNK_CELLS = 4_000_000
#: chunks of rows from which a reduced read runs on several threads (a whole 10000² raster has 25)
_PARALLEL_CHUNKS = 8


def _reduce_window(ds, win, f: int, kind: str) -> np.ndarray:
    """Band 1 of the whole-cell window ``win`` of the open raster ``ds``, reduced by ``f`` (see :func:`_read_reduced`)."""
    from rasterio.windows import Window

    from landcheck.evidence.display_loops import add_block_bits, add_block_means

    h, w = int(win.height), int(win.width)
    out_h, out_w = math.ceil(h / f), math.ceil(w / f)
    if kind == "bits":
        bits = np.zeros((out_h, out_w), dtype=np.uint8)
        seen = np.zeros((out_h, out_w), dtype=np.bool_)
    else:
        sums = np.zeros((out_h, out_w), dtype=np.float64)
        counts = np.zeros((out_h, out_w), dtype=np.int64)
        nodata = ds.nodata
        has_nodata = nodata is not None and not math.isnan(nodata)
    chunk = f * max(1, _CHUNK_CELLS // max(1, w * f))  # whole blocks of rows
    starts = list(range(0, h, chunk))

    def reduce_rows(src, r: int) -> None:
        a = src.read(1, window=Window(int(win.col_off), int(win.row_off) + r, w, min(chunk, h - r)))
        if kind == "bits":
            add_block_bits(a, a.dtype.type(255), f, r // f, bits, seen)
        else:
            add_block_means(a, a.dtype.type(nodata if has_nodata else 0), has_nodata, f, r // f, sums, counts)

    if len(starts) < _PARALLEL_CHUNKS:
        for r in starts:
            reduce_rows(ds, r)
    else:
        # whole rasters: chunks side by side (decoding in GDAL and the loops release the GIL). Each chunk
        # holds whole display rows, so no two threads add to the same block and the result does not
        # depend on their order; each thread reads through its own dataset handle
        import threading
        from concurrent.futures import ThreadPoolExecutor

        import rasterio

        local = threading.local()
        opened: list = []

        def run(r: int) -> None:
            src = getattr(local, "ds", None)
            if src is None:
                src = local.ds = rasterio.open(ds.name)
                opened.append(src)
            reduce_rows(src, r)

        try:
            with ThreadPoolExecutor(max_workers=min(4, os.cpu_count() or 1)) as pool:
                list(pool.map(run, starts))
        finally:
            for src in opened:
                src.close()
            release_heap()  # the worker threads' glibc arenas keep their freed chunks otherwise
    if kind == "bits":
        return np.where(seen, bits, np.uint8(255))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / counts, np.nan).astype(np.float32)


@contextlib.contextmanager
def _dem_mosaic(paths: list[Path]) -> Iterator[Path]:
    """The one DEM file, or for the tiles of a region run their mosaic as the audit read it (a VRT in a
    temporary folder, removed afterwards)."""
    if len(paths) == 1:
        yield paths[0]
        return
    from landcheck.inputs.tiles import write_tile_vrt

    with tempfile.TemporaryDirectory(prefix="landcheck-relief-") as tmp:
        yield write_tile_vrt([str(p) for p in paths], Path(tmp) / "dem_tiles.vrt")


def _read_relief(folder: AuditFolder, slope: _Grid) -> tuple[np.ndarray, str]:
    """Relief intensity 0-1 on the slope display grid: DEM hillshade, else shaded slope."""
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.windows import Window

    crs = _crs(slope.crs)
    lat_c = 0.5 * (slope.extent[2] + slope.extent[3])
    dx_m = abs(slope.transform.a) * _metres_per_map_unit_x(crs, lat_c)
    if crs.is_geographic:
        from landcheck.geo.geodesy import metres_per_degree_lat

        dy_m = abs(slope.transform.e) * float(metres_per_degree_lat(lat_c))
    else:
        dy_m = abs(slope.transform.e) * float(crs.axis_info[1].unit_conversion_factor)
    dems = folder.dem_paths
    reason = ""
    if not dems:
        reason = "no DEM recorded in the manifest"
    elif not all(p.exists() for p in dems):
        reason = "DEM not found"
    else:
        try:
            with _dem_mosaic(dems) as dem, rasterio.open(dem) as ds:
                t = ds.transform
                if ds.crs is None or _crs(ds.crs) != crs:
                    reason = "DEM on another CRS"
                elif t.b != 0 or t.d != 0:
                    reason = "DEM grid rotated"
                else:
                    left, right, y_last, y_first = slope.extent
                    c0, c1 = sorted(((left - t.c) / t.a, (right - t.c) / t.a))
                    r0, r1 = sorted(((y_first - t.f) / t.e, (y_last - t.f) / t.e))
                    win = Window(c0, r0, c1 - c0, r1 - r0)
                    eps = 1e-6
                    inside = c0 >= -eps and r0 >= -eps and c1 <= ds.width + eps and r1 <= ds.height + eps
                    f = slope.factor
                    aligned = (
                        abs(t.a * f - slope.transform.a) <= 1e-9 * abs(t.a * f)
                        and abs(t.e * f - slope.transform.e) <= 1e-9 * abs(t.e * f)
                        and min(c0, r0) >= -eps
                        and all(abs(v - round(v)) <= 1e-6 for v in (c0, r0))
                    )
                    if aligned:  # on the DEM's own grid (the audit's case): block means as for the slope
                        c0i, r0i = round(c0), round(r0)
                        whole = Window(c0i, r0i, min(ds.width, round(c1)) - c0i, min(ds.height, round(r1)) - r0i)
                        part = _reduce_window(ds, whole, f, "mean")
                        sh, sw = slope.data.shape[0], slope.data.shape[1]
                        z = np.full((sh, sw), np.nan)
                        zh, zw = min(part.shape[0], sh), min(part.shape[1], sw)
                        z[:zh, :zw] = part[:zh, :zw]
                    else:
                        z = ds.read(
                            1,
                            window=win,
                            out_shape=slope.data.shape,
                            resampling=Resampling.average,
                            boundless=not inside,
                            masked=True,
                            fill_value=ds.nodata if ds.nodata is not None else 0,
                        )
                        z = np.ma.filled(z.astype(np.float64), np.nan)
                    zunit = str(folder.section("manifest", "parameters", "z_unit", default="m")).lower()
                    z = z * {"ft": 0.3048, "us-ft": 1200.0 / 3937.0}.get(zunit, 1.0)
                    if np.isnan(z).all():
                        reason = "DEM has no data here"
                    else:
                        filled = np.where(np.isnan(z), np.nanmean(z), z)
                        shade = hillshade(filled, dx_m, dy_m, north_up=slope.transform.e < 0)
                        shade = np.where(np.isnan(z), np.nan, shade)
                        return shade, "hillshade of the DEM (sun from the north-west, 45\u00b0 up)"
        except (rasterio.errors.RasterioIOError, InputDataError):
            reason = "DEM unreadable"
    logger.info("relief from slope shading: %s", reason)
    s = slope.data.astype(np.float64)
    shade = math.sin(math.radians(SUN_ALTITUDE_DEG)) * (1.0 - 0.55 * np.clip(s / 60.0, 0.0, 1.0))
    return shade, f"slope shading ({reason}; darker is steeper)"


def _composite(slope_pct: np.ndarray, shade: np.ndarray, breaks: np.ndarray, colours: list[str]) -> np.ndarray:
    """Slope-class colours modulated by relief, as 8-bit RGBA; flat ground shows the exact legend colour.

    8-bit (not float) so matplotlib and the PNG encoder work on a quarter of the memory.
    """
    from matplotlib.colors import to_rgb

    idx = classify_slope(slope_pct, breaks)
    pal = np.array([to_rgb(c) for c in colours] + [tuple(_NODATA_GREY)], dtype=np.float32)
    rgb = pal[np.where(idx >= 0, idx, len(colours))]
    flat = math.sin(math.radians(SUN_ALTITUDE_DEG))
    shade = np.asarray(shade, dtype=np.float32)
    k = np.where(np.isnan(shade), np.float32(1.0), np.clip(0.62 + 0.38 * shade / flat, 0.0, 1.3)).astype(np.float32)
    rgb *= k[..., None]
    out = np.empty((*idx.shape, 4), dtype=np.uint8)
    out[..., :3] = np.round(np.clip(rgb, 0.0, 1.0) * 255.0)
    out[..., 3] = np.where(np.isnan(slope_pct) & np.isnan(shade), 0, 255)
    return out


def _conflict_kinds(bits: _Grid, n_zone_bits: int) -> np.ndarray:
    """Conflict kind per display cell: 0 none, 1 slope, 2 zone, 3 both."""
    b = bits.data
    inside = b != 255
    slope_hit = inside & ((b & 1) > 0)
    zone_mask = (((1 << (1 + n_zone_bits)) - 1) & ~1) if n_zone_bits else 0
    zone_hit = inside & ((b & zone_mask) > 0)
    return (slope_hit.astype(np.uint8) + 2 * zone_hit.astype(np.uint8)).astype(np.uint8)


def _conflict_shapes(bits: _Grid, n_zone_bits: int) -> list[tuple[object, int]]:
    """Polygons of display cells by conflict kind (1 slope, 2 zone, 3 both)."""
    import rasterio.features
    from shapely.geometry import shape

    kind = _conflict_kinds(bits, n_zone_bits)
    if not kind.any():
        return []
    return [(shape(g), int(v)) for g, v in rasterio.features.shapes(kind, mask=kind > 0, transform=bits.transform)]


def _simple_parts(geoms) -> list:
    """Flatten multi-part geometries and collections into single parts, dropping empties."""
    import shapely

    out, todo = [], [g for g in geoms if g is not None]
    while todo:
        g = todo.pop(0)
        if g.is_empty:
            continue
        if g.geom_type.startswith("Multi") or g.geom_type == "GeometryCollection":
            todo[:0] = list(shapely.get_parts(g))
        else:
            out.append(g)
    return out


def _polygon_paths(geoms) -> list:
    """matplotlib Paths (exterior and holes) of the polygon parts of ``geoms``."""
    from matplotlib.path import Path as MPath

    paths = []
    for g in _simple_parts(geoms):
        if g.geom_type != "Polygon":
            continue
        verts, codes = [], []
        for ring in (g.exterior, *g.interiors):
            xy = np.asarray(ring.coords, dtype=np.float64)[:, :2]
            c = np.full(len(xy), MPath.LINETO, dtype=MPath.code_type)
            c[0], c[-1] = MPath.MOVETO, MPath.CLOSEPOLY
            verts.append(xy)
            codes.append(c)
        paths.append(MPath(np.concatenate(verts), np.concatenate(codes)))
    return paths


def _line_segments(geoms) -> list[np.ndarray]:
    """Vertex arrays of line parts and of polygon rings (for outlines)."""
    import shapely

    arr = np.asarray([g for g in geoms if g is not None], dtype=object)
    if arr.size == 0:
        return []
    arr = arr[~shapely.is_empty(arr)]
    kind = shapely.get_type_id(arr)
    # polygons -> their rings, lines as they are: vectorized in GEOS (1 LineString, 2 LinearRing,
    # 3 Polygon, 5 MultiLineString, 6 MultiPolygon); collections go the slow way below
    lines = np.concatenate(
        [
            shapely.get_parts(shapely.boundary(arr[np.isin(kind, (3, 6))])),
            shapely.get_parts(arr[np.isin(kind, (1, 2, 5))]),
        ]
    )
    segs = []
    if lines.size:
        xy, idx = shapely.get_coordinates(lines, return_index=True)
        segs = np.split(xy, np.flatnonzero(np.diff(idx)) + 1)
    for g in _simple_parts(arr[kind == 7]):
        if g.geom_type == "Polygon":
            segs += [np.asarray(r.coords, dtype=np.float64)[:, :2] for r in (g.exterior, *g.interiors)]
        elif g.geom_type in ("LineString", "LinearRing"):
            segs.append(np.asarray(g.coords, dtype=np.float64)[:, :2])
    return segs


def _outline_vertices(geoms) -> tuple[np.ndarray, np.ndarray]:
    """The outlines of :func:`_line_segments` as one vertex array and the ring of each vertex.

    Returns ``(xy, ring)``: (n, 2) float64 coordinates, ring by ring, and (n,) int64 ring numbers, so
    that vertices ``k`` and ``k + 1`` are joined when ``ring[k] == ring[k + 1]``.  Polygons without
    holes (the usual parcel) go through GEOS in one call, without a Python object per ring.
    """
    import shapely

    arr = np.asarray(geoms, dtype=object)
    arr = arr[~(shapely.is_missing(arr) | shapely.is_empty(arr))]
    kind = shapely.get_type_id(arr)
    simple = kind == 3
    simple[simple] = shapely.get_num_interior_rings(arr[simple]) == 0
    parts = [shapely.get_coordinates(arr[simple], return_index=True)]
    rings = [
        shapely.get_rings(shapely.get_parts(arr[~simple & np.isin(kind, (3, 6))])),
        shapely.get_parts(arr[np.isin(kind, (1, 2, 5))]),
    ]
    other = []
    for g in _simple_parts(arr[kind == 7]):  # collections: part by part, as _line_segments
        if g.geom_type == "Polygon":
            other += [g.exterior, *g.interiors]
        elif g.geom_type in ("LineString", "LinearRing"):
            other.append(g)
    rings.append(np.asarray(other, dtype=object))
    parts += [shapely.get_coordinates(r, return_index=True) for r in rings if r.size]
    ring, base = [], 0
    for _, idx in parts:  # ring numbers of each part after those of the parts before it
        ring.append(idx.astype(np.int64) + base)
        base += int(idx.max()) + 1 if idx.size else 0
    xy = np.concatenate([p[0] for p in parts])
    return np.ascontiguousarray(xy, dtype=np.float64), np.concatenate(ring)


def _add_polygons(ax, geoms, **kw) -> None:
    from matplotlib.collections import PathCollection

    paths = _polygon_paths(geoms)
    if paths:
        ax.add_collection(PathCollection(paths, transform=ax.transData, **kw), autolim=False)


def _add_lines(ax, geoms, **kw) -> None:
    from matplotlib.collections import LineCollection

    segs = _line_segments(geoms)
    if segs:
        ax.add_collection(LineCollection(segs, **kw), autolim=False)


# --------------------------------------------------------------------------- drawing


def _new_figure(figsize_in, dpi):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize_in, dpi=dpi)
    FigureCanvasAgg(fig)
    return fig


def _emptied(fig):
    """``fig`` with everything drawn on it removed, ready for the next figure of the same size.

    Unlike ``fig.clear()`` the axes are not cleared one by one before they go, and the canvas and its
    renderer stay, with matplotlib's cache of text sizes measured on it (legends, ticks and titles
    repeat from one close-up to the next).
    """
    for artist in [*fig.axes, *fig.texts, *fig.legends, *fig.artists, *fig.patches, *fig.lines, *fig.images]:
        artist.remove()
    return fig


def _halo(width: float):
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=width, foreground="white")]


def _save(fig, dest: Path, stem: str, dpi: int, formats: Sequence[str]) -> list[Path]:
    import matplotlib

    paths = []
    with matplotlib.rc_context(_RC):
        for fmt in formats:
            if fmt not in ("png", "svg"):
                raise ValueError(f"formats: got {fmt!r}; expected 'png' and/or 'svg'")
            buf = io.BytesIO()
            meta = _PNG_METADATA if fmt == "png" else _SVG_METADATA
            extra = {"pil_kwargs": {"compress_level": _PNG_ZLIB_LEVEL}} if fmt == "png" else {}
            fig.savefig(buf, format=fmt, dpi=dpi, metadata=meta, **extra)
            p = dest / f"{stem}.{fmt}"
            write_bytes(p, buf.getvalue())
            paths.append(p)
    return paths


def _legend_column(fig, lax, groups) -> None:
    """Stack one titled legend per group, top to bottom, in the axes ``lax``."""
    from matplotlib.legend import Legend

    renderer = fig.canvas.get_renderer()
    y = 1.0
    # wrap to the legend column's width: 7.5 pt text averages about 0.55 em a character,
    # less the handle (2.6 em) and padding
    width_pt = lax.get_position().width * fig.get_figwidth() * 72.0
    wrap = max(12, min(_LEGEND_WRAP_CHARS, int(width_pt / (7.5 * 0.55)) - 8))
    for title, handles, labels in groups:
        if not handles:
            continue
        labels = [textwrap.fill(lab, wrap, subsequent_indent="  ") for lab in labels]
        title = textwrap.fill(title, wrap + 4)
        # a Legend artist added once (``lax.legend`` would also keep the last group as the axes' own
        # legend, drawing it twice)
        leg = Legend(
            lax,
            handles,
            labels,
            title=title,
            loc="upper left",
            bbox_to_anchor=(0.0, y),
            frameon=False,
            fontsize=7.5,
            title_fontsize=8.5,
            alignment="left",
            handlelength=2.6,
            borderaxespad=0.0,
            labelspacing=0.45,
        )
        lax.add_artist(leg)
        bb = leg.get_window_extent(renderer).transformed(lax.transAxes.inverted())
        y = bb.y0 - 0.035


def _draw_scale_and_north(ax, crs, extent) -> None:
    from matplotlib.patches import FancyArrow, Rectangle

    x0, x1 = sorted(extent[:2])
    y0, y1 = sorted(extent[2:])
    bar = choose_scale_bar(x0, x1, y0, y1, crs, fraction=0.25)
    w, h = x1 - x0, y1 - y0
    bx, by = x0 + 0.04 * w, y0 + 0.05 * h
    bh = 0.012 * h
    ax.add_patch(
        Rectangle(
            (bx - 0.015 * w, by - 0.025 * h),
            bar.length_map + 0.09 * w,
            0.075 * h,
            facecolor="white",
            edgecolor="none",
            alpha=0.8,
            zorder=8,
        )
    )
    half = bar.length_map / 2
    for i, fc in enumerate(("#111111", "white")):
        ax.add_patch(Rectangle((bx + i * half, by), half, bh, facecolor=fc, edgecolor="#111111", lw=0.7, zorder=9))
    ax.text(bx, by + 1.8 * bh, "0", ha="center", va="bottom", fontsize=7, zorder=9)
    ax.text(bx + bar.length_map, by + 1.8 * bh, bar.label, ha="center", va="bottom", fontsize=7, zorder=9)
    # north arrow, rotated to true north at the map centre
    ang = math.radians(true_north_angle_deg(0.5 * (x0 + x1), 0.5 * (y0 + y1), crs))
    ax_pos = (0.93, 0.84)
    length = 0.09
    dx, dy = length * math.sin(ang), length * math.cos(ang)
    ax.add_patch(
        FancyArrow(
            ax_pos[0] - dx / 2,
            ax_pos[1] - dy / 2,
            dx,
            dy,
            width=0.012,
            head_width=0.04,
            head_length=0.035,
            length_includes_head=True,
            transform=ax.transAxes,
            facecolor="#111111",
            edgecolor="white",
            lw=0.8,
            zorder=9,
        )
    )
    ax.text(
        ax_pos[0] + 0.6 * dx,
        ax_pos[1] + 0.6 * dy + 0.02,
        "N",
        transform=ax.transAxes,
        ha="center",
        va="bottom",
        fontsize=10,
        fontweight="bold",
        zorder=9,
        path_effects=_halo(2.5),
    )


def _crs_note(crs) -> str:
    crs = _crs(crs)
    epsg = crs.to_epsg()
    unit = "degrees" if crs.is_geographic else (crs.axis_info[0].unit_name if crs.axis_info else "unknown unit")
    return f"Coordinates: {crs.name}" + (f" (EPSG:{epsg})" if epsg else "") + f", in {unit}"


def _format_axes(ax, crs, extent) -> None:
    from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator

    crs = _crs(crs)
    x0, x1 = sorted(extent[:2])
    y0, y1 = sorted(extent[2:])
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    if crs.is_geographic:
        ax.set_aspect(1.0 / max(0.01, math.cos(math.radians(0.5 * (y0 + y1)))), adjustable="box")
        fmt = FuncFormatter(lambda v, _: f"{v:.4f}\u00b0")
        ax.set_xlabel("Longitude")
        ax.set_ylabel("Latitude")
    else:
        ax.set_aspect("equal", adjustable="box")
        fmt = FuncFormatter(lambda v, _: f"{v:,.0f}")
        names = [a.name for a in crs.axis_info] or ["x", "y"]
        unit = crs.axis_info[0].unit_name if crs.axis_info else ""
        ax.set_xlabel(f"{names[0]} ({unit})")
        ax.set_ylabel(f"{names[1] if len(names) > 1 else 'y'} ({unit})")
    # ticks only away from the corners (8 % of the span), so the lowest x and y labels never
    # meet; on geographic maps as few decimals as the tick step needs
    for axis, lo, hi, n in ((ax.xaxis, x0, x1, 4 if crs.is_geographic else 5), (ax.yaxis, y0, y1, 5)):
        ticks = MaxNLocator(n).tick_values(lo, hi)
        margin = 0.08 * (hi - lo)
        ticks = [t for t in ticks if lo + margin <= t <= hi - margin]
        axis.set_major_locator(FixedLocator(ticks))
        if crs.is_geographic and len(ticks) > 1:
            step = min(b - a for a, b in zip(ticks[:-1], ticks[1:]))
            dec = max(
                0,
                min(
                    6, -math.floor(math.log10(step)) + (0 if step / 10 ** math.floor(math.log10(step)) % 1 == 0 else 1)
                ),
            )
            axis.set_major_formatter(FuncFormatter(lambda v, _, d=dec: f"{v:.{d}f}\u00b0"))
        else:
            axis.set_major_formatter(fmt)
    ax.tick_params(labelsize=7)
    for lab in ax.get_yticklabels():
        lab.set_rotation(90)
        lab.set_va("center")
    ax.grid(True, color="#202020", alpha=0.35, lw=0.4, ls=(0, (4, 3)), zorder=7)


@dataclass
class CellZone:
    """One cell-based hazard zone read for a map: any of its cells in each display block."""

    name: str
    label: str
    colour: str
    mask: np.ndarray  # bool, on the display grid of the slope


@dataclass
class _MapData:
    folder: AuditFolder
    slope: _Grid
    bits: _Grid | None
    relief: np.ndarray
    relief_note: str
    cell_zones: list[CellZone] = field(default_factory=list)


def _read_cell_zones(folder: AuditFolder, slope: _Grid, max_px: int) -> list[CellZone]:
    """The cell-based zones of ``zones/cells.tif`` on the slope's display grid (any cell per block).

    A zone whose polygons were also written (``zones/zone_<name>.gpkg``, ``--zone-polygons``) is
    drawn from those polygons instead, so it is not listed twice.
    """
    names = folder.section("cell_zone_bits", default=[]) or []
    path = folder.path("zones/cells.tif")
    if not names or not path.exists():
        return []
    grid = _read_reduced(path, _grid_bounds(slope), max_px, "bits")
    if grid is None or grid.data.shape != slope.data.shape:
        return []
    vector = {stem for stem, _ in folder.zone_layers}
    out = []
    for k, name in enumerate(names):
        if f"zone_{name}" in vector:
            continue
        mask = (grid.data != 255) & ((grid.data & (1 << k)) > 0)
        if mask.any():
            colour = CELL_ZONE_COLOURS[k % len(CELL_ZONE_COLOURS)]
            out.append(CellZone(str(name), folder.zone_label(str(name)), colour, mask))
    return out


def load_map_data(folder: AuditFolder, bounds=None, max_px: int = 1600) -> _MapData:
    """Slope, conflict bits and relief of ``bounds`` (default the whole raster), reduced to ``max_px``."""
    return _load_map_data(folder, bounds, max_px)


def _load_map_data(folder: AuditFolder, bounds, max_px: int) -> _MapData:
    slope = _read_reduced(folder.require("slope_pct.tif"), bounds, max_px, "mean")
    if slope is None:
        raise InputDataError(f"{folder.path('slope_pct.tif')}: the requested map area lies outside the raster.")
    bits = _read_reduced(folder.require("conflict.tif"), _grid_bounds(slope), max_px, "bits")
    if bits is not None and bits.data.shape != slope.data.shape:
        bits = None if bits.factor != slope.factor else bits
    shade, note = _read_relief(folder, slope)
    return _MapData(folder, slope, bits, shade, note, _read_cell_zones(folder, slope, max_px))


def _grid_bounds(g: _Grid) -> tuple[float, float, float, float]:
    left, right, bottom, top = g.extent
    return min(left, right), min(bottom, top), max(left, right), max(bottom, top)


def _tint_rgba8(colour) -> np.ndarray:
    """The 8-bit RGBA that matplotlib draws for a float RGBA ``colour`` filling an image.

    matplotlib turns a float RGBA image into bytes in float32: premultiplied by alpha, divided back,
    times 255 and truncated; the same here keeps a tint's colour byte for byte what it was when the
    tints were float images of their own.
    """
    c = np.asarray(colour, dtype=np.float32)
    rgb = (c[:3] * c[3]) / c[3] if c[3] > 0 else c[:3]
    return (np.append(rgb, c[3]) * np.float32(255)).astype(np.uint8)


def _paint_tint(tint: np.ndarray | None, mask: np.ndarray, colour) -> np.ndarray:
    """Paint the float RGBA ``colour`` over the 8-bit RGBA image ``tint`` where ``mask`` (a new image when None).

    Porter-Duff "over" with straight alpha, as matplotlib composites one image over another, rounded
    to 8 bits: where nothing is painted yet the cell takes the colour's bytes exactly.
    """
    if tint is None:
        tint = np.zeros((*mask.shape, 4), dtype=np.uint8)
    src = _tint_rgba8(colour).astype(np.float64) / 255.0
    below = tint[mask].astype(np.float64) / 255.0
    a_src, a_below = src[3], below[:, 3]
    a = a_src + a_below * (1.0 - a_src)
    rgb = src[:3] * a_src + below[:, :3] * (a_below * (1.0 - a_src))[:, None]
    rgb /= np.where(a > 0, a, 1.0)[:, None]
    tint[mask] = np.round(np.column_stack([rgb, a]) * 255.0).astype(np.uint8)
    return tint


def _draw_tint(ax, tint: np.ndarray, extent, zorder: float) -> None:
    from landcheck.evidence.map_images import imshow_rgba8

    imshow_rgba8(ax, tint, extent, zorder=zorder)


def _parcels_in_crs(folder: AuditFolder, crs):
    """``folder.parcels_gdf`` in ``crs`` (the frame itself when it is in it already)."""
    gdf = folder.parcels_gdf
    if gdf.crs is not None and _crs(gdf.crs) != crs:
        gdf = gdf.to_crs(crs.to_wkt())
    return gdf


def _in_view(gdf, view):
    """The rows of ``gdf`` whose shape intersects the rectangle ``view``, in their order (as ``gdf.cx``).

    Through the frame's spatial index (built once per frame), so a close-up does not test every parcel.
    """
    from shapely.geometry import box

    hits = gdf.sindex.query(box(*view), predicate="intersects")
    return gdf.iloc[np.sort(hits)]


def _draw_map(fig, rect, data: _MapData, breaks: np.ndarray, view, focus_id: str | None = None, parcels=None):  # noqa: C901
    """Draw the map layers into a new axes; return (axes, legend groups, legend entries).

    ``parcels``: the folder's parcels already in the map's CRS; close-ups pass it, so the parcels are
    projected once and those in view are found through the frame's spatial index.
    """
    from matplotlib.colors import to_rgb
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    from landcheck.evidence.map_images import imshow_rgba8

    folder = data.folder
    crs = _crs(data.slope.crs)
    ax = fig.add_axes(rect)
    colours = slope_class_colours(len(breaks) - 1)
    imshow_rgba8(ax, _composite(data.slope.data, data.relief, breaks, colours), data.slope.extent, zorder=1)
    groups, entries = [], []
    labels = slope_class_labels(breaks)
    idx = classify_slope(data.slope.data, breaks)
    h = [Patch(facecolor=c, edgecolor="#555555", lw=0.5) for c in colours]
    groups.append(("Slope class", h, labels))
    entries += [
        LegendEntry("slope_class", f"{_fmt_num(lo)}-{_fmt_num(hi)}", lab)
        for lo, hi, lab in zip(breaks[:-1], breaks[1:], labels)
    ]
    relief_h = [Patch(facecolor="#9a9a9a", edgecolor="#555555", lw=0.5)]
    relief_l = [f"relief: {data.relief_note}"]
    if (idx < 0).any() and (~np.isnan(data.relief)).any():
        relief_h.append(Patch(facecolor=_NODATA_GREY, edgecolor="#555555", lw=0.5))
        relief_l.append("no slope (raster edge or nodata)")
    groups.append(("Background", relief_h, relief_l))
    entries += [LegendEntry("relief", "relief", relief_l[0])]
    if len(relief_l) > 1:
        entries.append(LegendEntry("relief", "no_slope", relief_l[1]))

    # hazard zones and water features: cell-based zones tinted first, vector zones outlined over them.
    # Raster layers are 8-bit images, each drawn once; the tints of all cell zones are painted into
    # one. The relief (zorder 1), the zone tints (2), the conflict tint (4) and the burnt outlines (5)
    # stay separate images: matplotlib draws the axis with its grid lines (zorder 1.5) and the frame
    # (2.5) between them.
    x0, y0, x1, y1 = view
    zh, zl = [], []
    tint = None
    for cz in data.cell_zones:
        tint = _paint_tint(tint, cz.mask, (*to_rgb(cz.colour), _CELL_ZONE_ALPHA))
        zh.append(Patch(facecolor=(*to_rgb(cz.colour), _CELL_ZONE_ALPHA), edgecolor=cz.colour, lw=1.0))
        zl.append(f"{cz.label} (cells)")
        entries.append(LegendEntry("zone", cz.name, zl[-1]))
    if tint is not None:
        _draw_tint(ax, tint, data.slope.extent, zorder=2)
    for i, (name, gdf) in enumerate(folder.zone_layers):
        if gdf.crs is not None and _crs(gdf.crs) != crs:
            gdf = gdf.to_crs(crs.to_wkt())
        gdf = gdf.cx[x0:x1, y0:y1]
        if gdf.empty:
            continue
        colour, hatch = _ZONE_STYLE[i % len(_ZONE_STYLE)]
        kinds = set(gdf.geom_type.str.replace("Multi", ""))
        pretty = folder.zone_label(name)
        poly = gdf[gdf.geom_type.isin(["Polygon", "MultiPolygon"])]
        if not poly.empty:
            _add_polygons(
                ax, poly.geometry, facecolors="none", edgecolors=colour, hatch=hatch, linewidths=1.0, zorder=3
            )
            zh.append(Patch(facecolor="none", edgecolor=colour, hatch=hatch, lw=1.0))
            zl.append(pretty)
            entries.append(LegendEntry("zone", name, zl[-1]))
        lines = gdf[gdf.geom_type.isin(["LineString", "MultiLineString"])]
        if not lines.empty:
            _add_lines(ax, lines.geometry, colors=_WATER_COLOUR, linewidths=1.8, zorder=3)
            zh.append(Line2D([0], [0], color=_WATER_COLOUR, lw=1.8))
            zl.append(f"water: {pretty}")
            entries.append(LegendEntry("zone", name, zl[-1]))
        if "Point" in kinds:
            pts = [g for g in _simple_parts(gdf.geometry) if g.geom_type == "Point"]
            ax.plot([g.x for g in pts], [g.y for g in pts], "o", color=colour, ms=3, zorder=3)
    groups.append(("Hazard zones and water", zh, zl))

    # conflict cells, hatched
    ch, cl = [], []
    if data.bits is not None:
        n_zone_bits = max(0, len(folder.section("conflict_raster_bits", default=["slope"]) or ["slope"]) - 1)
        kinds = _conflict_kinds(data.bits, n_zone_bits)
        many_cells = int((kinds > 0).sum()) > _MANY_CONFLICT_CELLS
        shapes = [] if many_cells else _conflict_shapes(data.bits, n_zone_bits)
        if many_cells:
            # tens of thousands of hatched polygons take matplotlib minutes: tint the cells instead
            tint = np.zeros((*kinds.shape, 4), dtype=np.uint8)
            for kind, colour in _CONFLICT_TINT.items():
                hit = kinds == kind
                if hit.any():
                    tint = _paint_tint(tint, hit, colour)
                    ch.append(Patch(facecolor=colour, edgecolor="#161616", lw=0.4))
                    cl.append(_CONFLICT_TEXT[kind])
                    entries.append(LegendEntry("conflict", {1: "slope", 2: "zone", 3: "slope+zone"}[kind], cl[-1]))
            _draw_tint(ax, tint, data.bits.extent, zorder=4)
        for kind in (1, 2, 3):
            sub = [g for g, k in shapes if k == kind]
            if not sub:
                continue
            _add_polygons(
                ax,
                sub,
                facecolors=[(1, 1, 1, 0.28)],
                edgecolors="#161616",
                hatch=_CONFLICT_HATCH[kind],
                linewidths=0.4,
                zorder=4,
                rasterized=len(sub) > _MANY_PARCELS,
            )
            ch.append(Patch(facecolor=(1, 1, 1, 0.28), edgecolor="#161616", hatch=_CONFLICT_HATCH[kind], lw=0.4))
            cl.append(_CONFLICT_TEXT[kind])
            entries.append(LegendEntry("conflict", {1: "slope", 2: "zone", 3: "slope+zone"}[kind], cl[-1]))
    title = "Conflict cells" + (
        f" (any conflict in {data.slope.factor}\u00d7{data.slope.factor} cells)" if data.slope.factor > 1 else ""
    )
    groups.append((title, ch, cl))

    # parcels by verdict
    if parcels is None:  # the whole area: one test of every parcel, no index needed
        gdf = _parcels_in_crs(folder, crs).cx[x0:x1, y0:y1]
    else:
        gdf = _in_view(parcels, view)
    vh, vl = [], []
    n_of = gdf["verdict"].value_counts(dropna=False).to_dict()
    present = [v for v in VERDICTS if n_of.get(v, 0) > 0]
    present += sorted(set(n_of) - set(VERDICTS) - {""})
    many = len(gdf) > _MANY_PARCELS
    geoms = gdf.geometry.values
    verdicts = gdf["verdict"].to_numpy()
    if many:
        _burn_outlines(fig, ax, rect, geoms, verdicts, present, view)
    else:
        for v in reversed(present):  # conflict drawn last, on top
            colour, lw, ls = _VERDICT_STYLE.get(v, ("#444444", 1.2, "solid"))
            _add_lines(
                ax,
                geoms[verdicts == v],
                colors=colour,
                linewidths=lw,
                linestyles=[ls],
                zorder=5,
                path_effects=_halo(lw + 2.2),
            )
    for v in present:
        colour, lw, ls = _VERDICT_STYLE.get(v, ("#444444", 1.2, "solid"))
        n = int(n_of[v])
        vh.append(Line2D([0], [0], color=colour, lw=lw, linestyle=ls, path_effects=_halo(lw + 2.2)))
        vl.append(f"{VERDICT_TEXT.get(v, v)} ({n:,d})")
        entries.append(LegendEntry("verdict", v, vl[-1]))
    groups.insert(0, ("Parcel verdict (parcels shown)", vh, vl))

    in_view = gdf
    if 0 < len(in_view) <= 60 or focus_id is not None:
        # labels only for points well inside the frame, clipped to it: a neighbour's id never
        # lands on the subtitle, legend or caution
        mx, my = 0.04 * (x1 - x0), 0.04 * (y1 - y0)
        for pid, geom in zip(in_view["parcel_id"], in_view.geometry):
            if geom is None or geom.is_empty:
                continue
            pt = geom.representative_point()
            if not (x0 + mx <= pt.x <= x1 - mx and y0 + my <= pt.y <= y1 - my):
                continue
            bold = focus_id is not None and pid == focus_id
            ax.text(
                pt.x,
                pt.y,
                pid,
                ha="center",
                va="center",
                fontsize=9 if bold else 6.5,
                fontweight="bold" if bold else "normal",
                zorder=6,
                path_effects=_halo(2.2),
                clip_on=True,
            )
    extent = (x0, x1, y0, y1)
    _format_axes(ax, crs, extent)
    _draw_scale_and_north(ax, crs, extent)
    return ax, groups, entries


def _burn_outlines(fig, ax, rect, geoms, verdicts, present, view) -> None:
    """Many parcels: burn their outlines into one image at the axes' pixel size.

    Drawing 100 000 outlines as vector paths takes matplotlib tens of seconds and makes a
    50 MB SVG; at overview scale an outline is about one pixel wide anyway, so one image
    (conflict burnt last, on top) shows the same and keeps the SVG small.  Every ring
    segment is sampled at half-pixel steps, which marks each pixel it crosses (compiled loop:
    :func:`landcheck.evidence.display_loops.burn_segments`).
    """
    from matplotlib.colors import to_rgba

    from landcheck.evidence.display_loops import burn_segments
    from landcheck.evidence.map_images import imshow_rgba8

    x0, y0, x1, y1 = view
    w_px = max(1, int(round(fig.get_figwidth() * fig.dpi * rect[2])))
    h_px = max(1, int(round(w_px * (y1 - y0) / max(x1 - x0, 1e-12))))
    sx, sy = w_px / max(x1 - x0, 1e-12), h_px / max(y1 - y0, 1e-12)
    codes = np.zeros((h_px, w_px), dtype=np.uint8)
    palette = np.zeros((len(present) + 1, 4))
    for code, v in enumerate(reversed(present), start=1):
        palette[code] = to_rgba(_VERDICT_STYLE.get(v, ("#444444", 1.2, "solid"))[0])
        xy, ring = _outline_vertices(geoms[verdicts == v])
        if len(xy) > 1:
            burn_segments(xy, ring, float(x0), float(y1), float(sx), float(sy), np.uint8(code), codes)
    rgba8 = np.round(palette * 255.0).astype(np.uint8)[codes]
    imshow_rgba8(ax, rgba8, (x0, x1, y0, y1), zorder=5)


def _figure_frame(fig, title: str, subtitle: str, notes: Sequence[str]) -> None:
    fig.text(0.03, 0.975, title, ha="left", va="top", fontsize=13, fontweight="bold")
    fig.text(0.03, 0.938, subtitle, ha="left", va="top", fontsize=8.5, color="#333333")
    y = 0.012
    fig.text(0.03, y, CAUTION, ha="left", va="bottom", fontsize=6.8, color="#5a1a00", fontweight="bold")
    for note in notes:
        y += 0.024
        fig.text(0.03, y, note, ha="left", va="bottom", fontsize=6.8, color="#333333")


def _dest(folder: AuditFolder, dest_dir) -> Path:
    return Path(dest_dir) if dest_dir is not None else folder.out_dir / "figures"


def _breaks_note(breaks: np.ndarray) -> str:
    return (
        "Slope classes at "
        + ", ".join(_fmt_num(b) for b in breaks if not math.isinf(b))
        + " % (land-use planning breaks); a cell at a break belongs to the steeper class."
    )


def overview_map(
    out_dir,
    *,
    dest_dir=None,
    slope_breaks_pct: Sequence[float] = DEFAULT_SLOPE_BREAKS_PCT,
    dpi: int = 200,
    figsize_in: tuple[float, float] = (10.0, 8.0),
    max_px: int = 1600,
    formats: Sequence[str] = ("png", "svg"),
    title: str | None = None,
    map_data: _MapData | None = None,
) -> FigureFiles:
    """Draw the whole audit area: slope classes over relief, parcels by verdict, conflict cells, zones.

    Parameters
    ----------
    out_dir : path or AuditFolder
        Output folder of ``landcheck audit``.
    dest_dir : path, optional
        Where to write ``overview.png``/``overview.svg``; default ``out_dir/figures``.
    slope_breaks_pct : sequence of float
        Slope-class breaks in percent (default 0, 3, 8, 18, 30, 50, inf).
    dpi : int
        PNG resolution; the PNG is ``figsize_in * dpi`` pixels exactly.
    figsize_in : (float, float)
        Figure width and height in inches.
    max_px : int
        Longest side of the displayed raster; larger rasters are reduced by an
        integer factor (slope: block mean; conflict: any conflict in the block).
    formats : sequence of {"png", "svg"}
    title : str, optional
    map_data : _MapData, optional
        Rasters already read by :func:`load_map_data` (the report reads them once for
        this map and the interactive map).

    Returns
    -------
    FigureFiles
        The written paths; ``.legend_entries`` lists the legend rows drawn.
    """
    folder = load_audit_folder(out_dir)
    breaks = _check_breaks(slope_breaks_pct)
    data = map_data if map_data is not None else _load_map_data(folder, None, max_px)
    fig = _new_figure(figsize_in, dpi)
    view = _grid_bounds(data.slope)
    ax, groups, entries = _draw_map(fig, [0.085, 0.115, 0.62, 0.79], data, breaks, view)
    lax = fig.add_axes([0.74, 0.115, 0.25, 0.79])
    lax.axis("off")
    _legend_column(fig, lax, groups)
    n = len(folder.parcels_gdf)
    _figure_frame(
        fig,
        title or "Slope classes and parcel verdicts",
        f"landcheck screening map \u00b7 audit run {folder.run_date_text} \u00b7 {count_text(n, 'parcel')}",
        [_crs_note(data.slope.crs) + "; grid lines dashed.", _breaks_note(breaks)],
    )
    paths = _save(fig, _dest(folder, dest_dir), "overview", dpi, formats)
    caption = (
        f"Whole audit area. Slope classes over {data.relief_note}; parcel outlines by verdict; "
        "hatched cells breach a rule of their class."
    )
    return FigureFiles([FigureItem("overview", caption, paths, entries)])


def closeup_order(parcels, max_maps: int) -> list[str]:
    """Ids of the parcels that get a close-up: conflict area > 0, largest first, ties by ``parcel_id``."""
    cand = parcels[parcels["conflict_m2"].fillna(0) > 0]
    n_maps = max(0, int(max_maps))
    if n_maps < len(cand):
        # only parcels at or above the n-th largest conflict area can be drawn: sort those few, not all
        area = cand["conflict_m2"].to_numpy(dtype=np.float64)
        nth = np.partition(area, len(area) - max(1, n_maps))[len(area) - max(1, n_maps)]
        cand = cand[area >= nth]
    order = sorted(zip(cand["conflict_m2"], cand["parcel_id"]), key=lambda t: (-float(t[0]), t[1]))
    return [pid for _, pid in order[:n_maps]]


def closeup_frame(folder: AuditFolder, geom, cell: float | None = None) -> tuple[float, float, float, float]:
    """The area a close-up of ``geom`` shows (the parcel, a margin, at least four cells each side)."""
    return _closeup_bounds(geom, _cell_width(folder) if cell is None else cell)


def _closeup_bounds(geom, cell: float) -> tuple[float, float, float, float]:
    x0, y0, x1, y1 = geom.bounds
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    half = 0.5 * max(x1 - x0, y1 - y0)
    half += max(0.3 * half, 4 * cell)
    return cx - half, cy - half, cx + half, cy + half


def _safe_stem(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text)[:40].strip("._") or "parcel"


def parcel_closeup_maps(
    out_dir,
    max_maps: int = 12,
    *,
    dest_dir=None,
    slope_breaks_pct: Sequence[float] = DEFAULT_SLOPE_BREAKS_PCT,
    dpi: int = 200,
    figsize_in: tuple[float, float] = (8.0, 6.5),
    max_px: int = 1200,
    formats: Sequence[str] = ("png", "svg"),
    on_drawn=None,
    ranks: Iterable[int] | None = None,
) -> FigureFiles:
    """One close-up map per parcel with conflict area, largest ``conflict_m2`` first.

    Ties are ordered by ``parcel_id``.  Files are ``closeup_NN_<parcel_id>.{png,svg}``;
    earlier close-ups in ``dest_dir`` are removed first so the set always
    matches the folder (not with ``ranks``: the caller does that, see below).

    Parameters
    ----------
    out_dir : path or AuditFolder
    max_maps : int
        Most close-ups to draw (0 draws none).
    dest_dir, slope_breaks_pct, dpi, figsize_in, max_px, formats
        As for :func:`overview_map`.
    on_drawn : callable, optional
        Called with no argument after each close-up (a progress bar's step).
    ranks : iterable of int, optional
        Draw only these places of the order (0 = largest conflict area), as the iterable yields them;
        it may be lazy, so two processes can take turns (:mod:`landcheck.evidence.figure_worker`).
        Default: all of them.

    Returns
    -------
    FigureFiles
        ``.items[i].parcel_id`` gives the parcel of each figure.
    """
    folder = load_audit_folder(out_dir)
    breaks = _check_breaks(slope_breaks_pct)
    dest = _dest(folder, dest_dir)
    if ranks is None:
        remove_closeups(dest)
    df = folder.parcels
    pids = closeup_order(df, max_maps)
    # the rows of the parcels drawn, found once (not a pass over every parcel per close-up)
    wanted = set(pids)
    gdf = folder.parcels_gdf
    gdf = gdf[gdf["parcel_id"].isin(wanted)]
    df = df[df["parcel_id"].isin(wanted)]
    parcels = None  # all parcels in the maps' CRS, projected once
    fig = None  # one figure for all close-ups: its renderer keeps the text sizes measured for the last one
    items = []
    cell = _cell_width(folder)
    for k in range(len(pids)) if ranks is None else ranks:
        if not 0 <= k < len(pids):
            break
        rank, pid = k + 1, pids[k]
        rows = gdf[gdf["parcel_id"] == pid]
        if rows.empty or rows.geometry.iloc[0] is None or rows.geometry.iloc[0].is_empty:
            logger.warning("parcel %s has no geometry in parcels.gpkg; no close-up drawn", pid)
            continue
        view = _closeup_bounds(rows.geometry.iloc[0], cell)
        data = _load_map_data(folder, view, max_px)
        if parcels is None:
            parcels = _parcels_in_crs(folder, _crs(data.slope.crs))
        fig = _new_figure(figsize_in, dpi) if fig is None else _emptied(fig)
        _, groups, entries = _draw_map(fig, [0.1, 0.12, 0.56, 0.77], data, breaks, view, focus_id=pid, parcels=parcels)
        lax = fig.add_axes([0.7, 0.12, 0.29, 0.77])
        lax.axis("off")
        _legend_column(fig, lax, groups)
        rec = df[df["parcel_id"] == pid].iloc[0]
        limit = folder.class_limits_pct.get(rec["class_name"], math.nan)
        lim_txt = f"slope limit {_fmt_num(limit)} %" if not math.isnan(limit) else "no slope limit"
        share = float(rec["conflict_share"]) if not _isnan(rec["conflict_share"]) else math.nan
        sub = (
            f"class {_class_label(folder, rec['class_name'])} \u00b7 {lim_txt} \u00b7 conflict {float(rec['conflict_m2']):,.0f} m\u00b2"
            + (f" ({share:.1%} of evaluated area)" if not math.isnan(share) else "")
            + f" \u00b7 audit run {folder.run_date_text}"
        )
        _figure_frame(
            fig,
            f"Parcel {pid}: {VERDICT_TEXT.get(rec['verdict'], rec['verdict'])}",
            sub,
            [_crs_note(data.slope.crs) + "."],
        )
        stem = f"closeup_{rank:02d}_{_safe_stem(pid)}"
        paths = _save(fig, dest, stem, dpi, formats)
        detail = sub.split(" \u00b7 audit")[0]
        caption = (
            f"Parcel {pid} ({_class_label(folder, rec['class_name'])}, "
            f"{VERDICT_TEXT.get(rec['verdict'], rec['verdict'])}): {detail}."
        )
        items.append(FigureItem(stem, caption, paths, entries, parcel_id=pid))
        if on_drawn is not None:
            on_drawn()
    return FigureFiles(items)


def remove_closeups(dest: Path) -> None:
    """Remove earlier close-up figures from ``dest`` (the set written next always matches the folder)."""
    if dest.is_dir():
        for old in dest.glob("closeup_*"):
            if old.suffix in (".png", ".svg"):
                old.unlink()


def closeup_rank(item: FigureItem) -> int:
    """Place of a close-up in the order (0 = largest conflict area), from its file stem."""
    return int(item.stem.split("_")[1]) - 1


def _class_label(folder: AuditFolder, name: str) -> str:
    df = folder.classes
    if "label" in df.columns:
        hit = df[df["class_name"] == name]
        label = str(hit["label"].iloc[0]) if not hit.empty else ""
        if label and label.strip().lower() == name.replace("_", " ").lower():
            return label
        if label:
            return f"{label} ({name})"
    return name


def _cell_width(folder: AuditFolder) -> float:
    """Cell width of slope_pct.tif in map units."""
    import rasterio

    with rasterio.open(folder.require("slope_pct.tif")) as ds:
        return abs(ds.transform.a)
