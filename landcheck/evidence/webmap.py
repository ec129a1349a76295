"""The interactive map of ``report.html``: Leaflet, vendored and inlined, with no tile server.

Everything the map shows comes from the audit output folder and is written into
the page itself:

* relief and slope classes as one PNG image overlay (a data URI) on the display
  grid of the static overview map;
* conflict cells as a second, transparent PNG overlay (any conflict in a
  display block, as on the overview map), and one more per cell-based hazard
  zone (HAND, sea-level rise, derived strips; ``zones/cells.tif``);
* hazard zones and parcels as GeoJSON, one layer per zone and per verdict,
  drawn on a canvas renderer so 100 000 parcels stay usable.

The map works in the raster's own coordinates (Leaflet ``L.CRS.Simple``, no
reprojection): a display unit is one eighth of a cell height, counted from the
south-west corner of the raster, and x is scaled by cos(latitude) on a
geographic DEM so the ground keeps its shape.  Geometry is simplified for
display only (tolerance one cell, topology kept) and coordinates rounded to
whole display units; every number in the pop-ups is read from parcels.csv,
never from the simplified shapes.  The shapes are written from shapely's
coordinate arrays, 10 000 at a time on two threads beside the images; each
shape is done on its own, so the text does not depend on the chunks or threads.
"""

from __future__ import annotations

import base64
import io
import json
import logging
import math
import re
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from functools import lru_cache, partial
from pathlib import Path

import numpy as np

from landcheck.evidence.folder import AuditFolder
from landcheck.evidence.maps import _ZONE_STYLE, VERDICTS, _composite, _crs, _MapData
from landcheck.evidence.style import CONFIDENCE_TEXT, VERDICT_TEXT, count_text, slope_class_colours, slope_class_labels
from landcheck.verdicts.labels import VERDICT_COLOURS, VERDICT_LINES

__all__ = ["LEAFLET_VERSION", "leaflet_assets", "webmap_section", "WEBMAP_CSS"]

logger = logging.getLogger(__name__)

LEAFLET_VERSION = "1.9.4"
_VENDOR_DIR = Path(__file__).with_name("vendor") / f"leaflet-{LEAFLET_VERSION}"
#: display units per cell height: coordinates are rounded to 1/8 cell, far finer than the
#: display simplification (one cell), so rounding never shows
_UNITS_PER_CELL = 8
#: pixels a cell gets at the deepest zoom
_MAX_ZOOM_CELL_PX = 32
# conflict-cell overlay colours (RGBA): slope only, zone only, both
_CONFLICT_RGBA = {
    1: (196, 0, 98, 170),
    2: (232, 120, 0, 170),
    3: (92, 0, 150, 190),
}
#: opacity (0-255) of a cell-based hazard zone overlay
_CELL_ZONE_ALPHA = 120
_CONFLICT_KIND_TEXT = {
    1: "slope at or over the class limit",
    2: "inside a zone the class forbids",
    3: "both slope and a forbidden zone",
}
# parcel outline per verdict: colour, weight (px), dash pattern (SVG dasharray), from the one verdict
# vocabulary of maps, report and pre-screen (landcheck.verdicts.labels; matplotlib dashes are in
# multiples of the line width)


def _svg_dash(width: float, dash: object) -> str | None:
    """SVG dasharray (px) of a matplotlib line style: None for solid, else on/off lengths times the width."""
    if dash == "solid" or not isinstance(dash, tuple):
        return None
    return " ".join(f"{d * width:.1f}" for d in dash[1])


_WEB_VERDICT_STYLE = {v: (VERDICT_COLOURS[v], VERDICT_LINES[v][0], _svg_dash(*VERDICT_LINES[v])) for v in VERDICTS}
_JS_ESCAPES = {"<": "\\u003c", ">": "\\u003e", "&": "\\u0026"}


@lru_cache(maxsize=1)
def leaflet_assets() -> tuple[str, str, str]:
    """(css, js, licence) of the vendored Leaflet, ready to inline.

    The source-map comment and every CSS ``url(...)`` is blanked so the page
    never asks for another file (the report uses no marker images).
    """
    css = (_VENDOR_DIR / "leaflet.css").read_text(encoding="utf-8")
    js = (_VENDOR_DIR / "leaflet.js").read_text(encoding="utf-8")
    lic = (_VENDOR_DIR / "LICENSE").read_text(encoding="utf-8")
    css = re.sub(r"url\([^)]*\)", "none", css)
    js = re.sub(r"//# sourceMappingURL=\S+\s*$", "", js)
    return css, js, lic


def _png_data_uri(rgba: np.ndarray) -> str:
    from PIL import Image

    buf = io.BytesIO()
    # zlib level 6: within a few per cent of level 9 in size at a fifth of the time
    Image.fromarray(rgba, mode="RGBA").save(buf, format="PNG", compress_level=1)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


class _Frame:
    """Raster CRS -> display units (see the module docstring)."""

    def __init__(self, data: _MapData, cell_h: float):
        crs = _crs(data.slope.crs)
        left, right, bottom, top = data.slope.extent
        self.left, self.bottom = min(left, right), min(bottom, top)
        self.width, self.height = abs(right - left), abs(top - bottom)
        self.q = cell_h / _UNITS_PER_CELL
        lat = 0.5 * (bottom + top)
        self.kx = math.cos(math.radians(lat)) if crs.is_geographic else 1.0
        self.geographic = crs.is_geographic

    def transform(self, xy: np.ndarray) -> np.ndarray:
        out = np.empty_like(xy)
        out[:, 0] = np.round((xy[:, 0] - self.left) / self.q * self.kx)
        out[:, 1] = np.round((xy[:, 1] - self.bottom) / self.q)
        return out

    @property
    def bounds(self) -> list[list[float]]:
        # Leaflet order: [[south, west], [north, east]] = [[v0, u0], [v1, u1]]
        return [[0.0, 0.0], [round(self.height / self.q, 3), round(self.width / self.q * self.kx, 3)]]

    def to_json(self) -> dict:
        return {
            "left": self.left,
            "bottom": self.bottom,
            "q": self.q,
            "kx": self.kx,
            "bounds": self.bounds,
            "geographic": self.geographic,
        }


_DOT_ZERO = re.compile(r"\.0(?=[,\]])")


#: geometries simplified and written at once: each is done on its own, so the chunks change nothing but
#: the memory and the time (at 100 000 parcels the simplified copies are about 100 MB when made whole)
_GEOJSON_CHUNK = 10_000
#: display coordinates are written as whole numbers below this size (GEOS's GeoJSON writer turns to an
#: exponent from 1e15 on; such a geometry is written by that writer, as is one with a -0 or a NaN)
_PLAIN_LIMIT = 1e15
# GeoJSON text of a geometry, by shapely type id: what opens its coordinates and what closes them (with the
# feature).  Between them come its coordinate sequences (rings, lines, points); a multi-polygon's parts are
# set apart by "],[", any other two sequences by ",".  Other types (linear rings, collections) and
# geometries with an empty part are written by GEOS (:func:`_geos_geojson`).
_GEOJSON_SHAPES = {
    0: ("Point", "", "}"),
    1: ("LineString", "", "}"),
    3: ("Polygon", "[", "]}"),
    4: ("MultiPoint", "[", "]}"),
    5: ("MultiLineString", "[", "]}"),
    6: ("MultiPolygon", "[[", "]]}"),
}
_OPEN = np.array(
    [f',"geometry":{{"type":"{s[0]}","coordinates":{s[1]}' if s else "" for s in map(_GEOJSON_SHAPES.get, range(8))],
    dtype=object,
)
_CLOSE = np.array([s[2] + "}" if s else "" for s in map(_GEOJSON_SHAPES.get, range(8))], dtype=object)
#: a feature's text up to its properties; "%d" is its id (the text is a %-format template, see _features)
_FEATURE_OPEN = ',{"type":"Feature","id":%d,"properties":'
_SEPARATORS = ("", ",", "],[")


def _geos_geojson(geoms: np.ndarray, frame: _Frame) -> list[str]:
    """GeoJSON text of non-empty geometries by GEOS's writer, with ".0" dropped from the whole numbers."""
    import shapely

    return [_DOT_ZERO.sub("", t) for t in shapely.to_geojson(shapely.transform(geoms, frame.transform))]


def _sequences(geoms: np.ndarray, frame: _Frame):
    """The coordinate sequences of non-empty geometries of the types of ``_GEOJSON_SHAPES``, in order.

    Returns (geometry index, separator code (index into ``_SEPARATORS``), number of points, is a point)
    per sequence, the display coordinates as int64 (n, 2), and a mask of the geometries this layout
    cannot write (an empty part or a coordinate that is not a plain whole number).  Only multi-part
    geometries and polygons with holes are taken apart (GEOS copies every part it hands out).
    """
    import shapely

    gtype = shapely.get_type_id(geoms)
    bad = np.zeros(len(geoms), dtype=bool)
    single = gtype <= 1
    single[gtype == 3] = shapely.get_num_interior_rings(geoms[gtype == 3]) == 0
    others = np.flatnonzero(~single)
    parts, part_of = shapely.get_parts(geoms[others], return_index=True)
    bad[others[part_of[shapely.is_empty(parts)]]] = True
    ptype = shapely.get_type_id(parts)
    poly = ptype == 3
    n_seq_part = np.ones(len(parts), dtype=np.int64)
    n_seq_part[poly] = shapely.get_num_interior_rings(parts[poly]) + 1
    seq_part = np.repeat(np.arange(len(parts)), n_seq_part)
    if bad.any():
        return None, None, None, None, None, bad
    in_poly = poly[seq_part]
    n_pts_part = np.empty(len(seq_part), dtype=np.int64)
    n_pts_part[in_poly] = shapely.get_num_coordinates(shapely.get_rings(parts[poly]))
    n_pts_part[~in_poly] = shapely.get_num_coordinates(parts[~poly])
    bad[others[part_of[seq_part[n_pts_part == 0]]]] = True
    # the sequences of all geometries: one for each single one, those just found for the others
    n_seq = np.ones(len(geoms), dtype=np.int64)
    n_seq[others] = np.bincount(part_of[seq_part], minlength=len(others))
    seq_geom = np.repeat(np.arange(len(geoms)), n_seq)
    of_single = single[seq_geom]
    n_pts = np.empty(len(seq_geom), dtype=np.int64)
    n_pts[of_single] = shapely.get_num_coordinates(geoms[single])
    n_pts[~of_single] = n_pts_part
    is_point = np.empty(len(seq_geom), dtype=bool)
    is_point[of_single] = gtype[single] == 0
    is_point[~of_single] = ptype[seq_part] == 0
    # separators: none before a geometry's first sequence, "],[" between the parts of a multi-polygon
    first = np.ones(len(seq_geom), dtype=bool)
    first[1:] = seq_geom[1:] != seq_geom[:-1]
    new_part = np.ones(len(seq_part), dtype=bool)
    new_part[1:] = seq_part[1:] != seq_part[:-1]
    sep = np.zeros(len(seq_geom), dtype=np.int64)
    sep[~of_single] = np.where(new_part & (gtype[others[part_of[seq_part]]] == 6), 2, 1)
    sep[first] = 0
    xy = frame.transform(shapely.get_coordinates(geoms))
    odd = ~(np.abs(xy) < _PLAIN_LIMIT) | ((xy == 0) & np.signbit(xy))
    bad[np.repeat(seq_geom, n_pts)[odd.any(axis=1)]] = True
    return seq_geom, sep, n_pts, is_point, xy.astype(np.int64), bad


def _sequence_templates(sep: np.ndarray, n_pts: np.ndarray, is_point: np.ndarray) -> np.ndarray:
    """The %-format template of each coordinate sequence, with the separator before it (object array)."""
    key = (n_pts * 2 + is_point) * len(_SEPARATORS) + sep
    keys, inverse = np.unique(key, return_inverse=True)
    table = np.empty(len(keys), dtype=object)
    for j, k in enumerate(keys.tolist()):
        rest, s = divmod(k, len(_SEPARATORS))
        n, point = divmod(rest, 2)
        table[j] = _SEPARATORS[s] + ("[%d,%d]" if point else "[" + ",".join(["[%d,%d]"] * n) + "]")
    return table[inverse.ravel()]


def _features(arr: np.ndarray, ids: np.ndarray, props: np.ndarray, frame: _Frame, tolerance: float) -> tuple[str, int]:
    """The features of some geometries, each with a comma before it, and their number.

    ``props``: the JSON text of each one's properties, with "%" doubled.  Missing and empty geometries
    are left out.
    """
    import shapely

    missing = shapely.is_missing(arr)
    arr = np.where(missing, shapely.Polygon(), arr)
    simple = shapely.simplify(arr, tolerance, preserve_topology=True)
    # a part that simplification would collapse keeps its original shape
    collapsed = shapely.is_empty(simple) & ~shapely.is_empty(arr)
    simple = np.where(collapsed, arr, simple)
    keep = ~(missing | shapely.is_empty(simple))
    geoms, ids, props = simple[keep], ids[keep], props[keep]
    if not len(geoms):
        return "", 0
    gtype = shapely.get_type_id(geoms)
    plain = np.isin(gtype, list(_GEOJSON_SHAPES))
    while True:  # again without the geometries a pass could not write, until none is left
        seq_geom, sep, n_pts, is_point, xy, bad = _sequences(geoms[plain], frame)
        if not bad.any():
            break
        plain[np.flatnonzero(plain)[bad]] = False
    # the text as a %-format template and its numbers: per feature, its id, then (if plain) its coordinates
    where = np.flatnonzero(plain)
    n_seq = np.bincount(seq_geom, minlength=len(where))
    n_tok = np.full(len(geoms), 3, dtype=np.int64)
    n_tok[where] += 1 + n_seq
    start = np.cumsum(n_tok) - n_tok
    tokens = np.empty(int(n_tok.sum()), dtype=object)
    tokens[start] = _FEATURE_OPEN
    tokens[start + 1] = props
    tokens[start[where] + 2] = _OPEN[gtype[where]]
    tokens[start[where] + 3 + n_seq] = _CLOSE[gtype[where]]
    first_seq = np.cumsum(n_seq) - n_seq
    rank = np.arange(len(seq_geom)) - first_seq[seq_geom]
    tokens[start[where][seq_geom] + 3 + rank] = _sequence_templates(sep, n_pts, is_point)
    other = np.flatnonzero(~plain)
    if len(other):
        texts = _geos_geojson(geoms[other], frame)
        tokens[start[other] + 2] = np.array([',"geometry":' + t.replace("%", "%%") + "}" for t in texts], dtype=object)
    n_val = np.ones(len(geoms), dtype=np.int64)
    n_val[where] += 2 * np.bincount(seq_geom, weights=n_pts, minlength=len(where)).astype(np.int64)
    values = np.empty(int(n_val.sum()), dtype=np.int64)
    is_id = np.zeros(len(values), dtype=bool)
    is_id[np.cumsum(n_val) - n_val] = True
    values[is_id] = ids
    values[~is_id] = xy.ravel()
    return "".join(tokens.tolist()) % tuple(values.tolist()), len(geoms)


def _script_features(*args) -> tuple[str, int]:
    """:func:`_features` as page text: the content of its JSON string (:func:`_json_for_script`)."""
    text, n = _features(*args)
    return _json_for_script(text)[1:-1], n


def _feature_tasks(
    geoms,
    props: Sequence[str],
    codes: np.ndarray,
    frame: _Frame,
    tolerance: float,
    *,
    script: bool = False,
) -> list[Callable[[], tuple[str, int]]]:
    """Tasks that write geometries as GeoJSON features, a chunk each, to run on threads (see :func:`_collection`).

    Geometries are simplified for display and rounded to display units; a feature's ``id`` is its row
    number and its properties are ``props[codes[row]]`` (JSON text).  GEOS releases the GIL while it
    simplifies, so chunks on two threads overlap.  ``script``: the chunks come as page text, escaped
    as a JSON string is (escaping goes character by character, so chunk by chunk is the same).
    """
    arr = np.asarray(geoms, dtype=object)
    prop_text = np.array([p.replace("%", "%%") for p in props], dtype=object)[np.asarray(codes, dtype=np.intp)]
    ids = np.arange(len(arr), dtype=np.int64)
    return [
        partial(
            _script_features if script else _features,
            arr[k : k + _GEOJSON_CHUNK],
            ids[k : k + _GEOJSON_CHUNK],
            prop_text[k : k + _GEOJSON_CHUNK],
            frame,
            tolerance,
        )
        for k in range(0, len(arr), _GEOJSON_CHUNK)
    ]


def _collection(chunks: list[Future], *, script: bool = False) -> tuple[str, int]:
    """The GeoJSON FeatureCollection of the :func:`_feature_tasks` run as ``chunks``, and its number of
    features.

    Missing and empty geometries are left out.  ``script``: as page text, a JSON string
    (:func:`_json_for_script`), from chunks submitted so.
    """
    head, tail = '{"type":"FeatureCollection","features":[', "]}"
    if script:
        head, tail = _json_for_script(head)[:-1], _json_for_script(tail)[1:]
    texts, n = [head], 0
    for c in chunks:
        text, k = c.result()
        if text:
            texts.append(text[1:] if n == 0 else text)  # no comma before the first feature
            n += k
    texts.append(tail)
    return "".join(texts), n


def _dictionary(values) -> tuple[list[str], list[int]]:
    """Dictionary-encode a text column: (unique values in first-seen order, index per row)."""
    import pandas as pd

    s = pd.Series(values)
    if not (isinstance(s.dtype, pd.StringDtype) and not s.isna().any()):
        s = pd.Series(s.to_numpy(dtype=object), dtype=object).astype(str)
    codes, uniques = pd.factorize(s, sort=False)
    return [str(u) for u in np.asarray(uniques, dtype=object).tolist()], codes.tolist()


def _rounded(values, digits: int) -> list:
    """Numbers rounded for display; None (JSON null) for missing or infinite values."""
    import pandas as pd

    f = pd.to_numeric(pd.Series(values), errors="coerce").to_numpy(dtype=np.float64)
    ok = np.isfinite(f)
    r = np.round(np.where(ok, f, 0.0), digits)
    vals = r.astype(np.int64).tolist() if digits == 0 else r.tolist()
    for i in np.flatnonzero(~ok).tolist():
        vals[i] = None
    return vals


def _conflict_image(data: _MapData, n_zone_bits: int) -> np.ndarray | None:
    """RGBA of the conflict-cell overlay; None when no cell is in conflict."""
    if data.bits is None:
        return None
    b = data.bits.data
    inside = b != 255
    slope_hit = inside & ((b & 1) > 0)
    zone_mask = (((1 << (1 + n_zone_bits)) - 1) & ~1) if n_zone_bits else 0
    zone_hit = inside & ((b & zone_mask) > 0)
    kind = slope_hit.astype(np.uint8) + 2 * zone_hit.astype(np.uint8)
    if not kind.any():
        return None
    colours = np.zeros((4, 4), dtype=np.uint8)  # kind 0 stays transparent
    for k, colour in _CONFLICT_RGBA.items():
        colours[k] = colour
    return colours[kind]


def _cell_zone_images(data: _MapData) -> list[tuple[str, str, np.ndarray]]:
    """(label, colour, RGBA) of a transparent image per cell-based hazard zone, on the display grid of the
    overview map."""
    from matplotlib.colors import to_rgb

    out = []
    for cz in data.cell_zones:
        rgba = np.zeros((*cz.mask.shape, 4), dtype=np.uint8)
        rgba[cz.mask] = (*(round(255 * c) for c in to_rgb(cz.colour)), _CELL_ZONE_ALPHA)
        out.append((cz.label, cz.colour, rgba))
    return out


def _relief_image(data: _MapData, breaks: np.ndarray) -> np.ndarray:
    return _composite(data.slope.data, data.relief, breaks, slope_class_colours(len(breaks) - 1))


def _script_png(rgba: np.ndarray) -> str:
    """:func:`_png_data_uri` as page text (:func:`_json_for_script`)."""
    return _json_for_script(_png_data_uri(rgba))


#: threads that build the map data: GEOS (simplifying) and the PNG encoder release the GIL, so two
#: overlap well; more find little more to do side by side
_MAX_THREADS = 2


def webmap_data(folder: AuditFolder, data: _MapData, breaks: np.ndarray, class_labels: dict[str, str]) -> dict:
    """Everything the page script needs, as one JSON-ready dict."""
    return _webmap_data(folder, data, breaks, class_labels, None)


def _table(folder: AuditFolder, pids: list) -> tuple[dict, list[str], list[str], list[str]]:
    """The per-parcel figures of the pop-ups, in the order of ``pids``: (rows, classes, reasons, confidences)."""
    df = folder.parcels.drop_duplicates("parcel_id").set_index("parcel_id")
    rec = df.reindex(pids)
    classes, class_idx = _dictionary(rec["class_name"].fillna(""))
    reasons, reason_idx = _dictionary(rec["reasons"].fillna("") if "reasons" in rec else [""] * len(rec))
    rows: dict[str, list | None] = {"pid": pids, "cls": class_idx}
    for key, name, digits in (
        ("area_m2", "area_m2", 0),
        ("evaluated_share", "evaluated_share", 4),
        ("slope_mean_pct", "slope_mean_pct", 1),
        ("slope_max_pct", "slope_max_pct", 1),
        ("limit_pct", "max_slope_pct", 2),
        ("conflict_m2", "conflict_m2", 0),
        ("conflict_share", "conflict_share", 4),
    ):
        rows[key] = _rounded(rec[name], digits) if name in rec.columns else None
    rows["reason"] = reason_idx
    if "p_conflict" in rec.columns:
        rows["p_conflict"] = _rounded(rec["p_conflict"], 3)
    conf: list[str] = []
    if "confidence" in rec.columns:
        conf, rows["confidence"] = _dictionary(rec["confidence"].fillna(""))
    return rows, classes, reasons, conf


def _webmap_data(
    folder: AuditFolder, data: _MapData, breaks: np.ndarray, class_labels: dict[str, str], ready: dict | None
) -> dict:
    """:func:`webmap_data`.  With ``ready``, the largest entries (rows, reasons, relief, parcels) go there
    instead, as page text (:func:`_json_for_script`) made on the way, while the threads work; the dict
    holds None for them."""
    import pandas as pd

    from landcheck.engine.memory import release_heap
    from landcheck.engine.windows import default_workers

    cell_h = abs(data.slope.transform.e) / max(1, data.slope.factor)
    cell_w = abs(data.slope.transform.a) / max(1, data.slope.factor)
    frame = _Frame(data, cell_h)
    crs = _crs(data.slope.crs)
    tolerance = max(cell_w, cell_h)
    n_zone_bits = max(0, len(folder.section("conflict_raster_bits", default=["slope"]) or ["slope"]) - 1)
    script = ready is not None

    gdf = folder.parcels_gdf
    if gdf.crs is not None and _crs(gdf.crs) != crs:
        gdf = gdf.to_crs(crs.to_wkt())
    # text columns read once into Python strings (not element by element from their Arrow arrays)
    verdict_codes, verdict_values = pd.factorize(gdf["verdict"].to_numpy(dtype=object), sort=False)
    n_of = dict(zip(verdict_values.tolist(), np.bincount(verdict_codes[verdict_codes >= 0]).tolist()))
    verdict_keys = [v for v in VERDICTS if n_of.get(v, 0) > 0]
    verdict_keys += sorted(set(n_of) - set(VERDICTS) - {""})
    vindex = {v: i for i, v in enumerate(verdict_keys)}
    # a row's verdict code -> its index in verdict_keys (-1: none, also for a missing verdict)
    key_of = np.array([vindex.get(v, -1) for v in verdict_values.tolist()] + [-1], dtype=np.int64)
    parcel_tasks = _feature_tasks(
        gdf.geometry.values,
        [f'{{"v":{k}}}' for k in range(-1, len(verdict_keys))],
        key_of[verdict_codes] + 1,
        frame,
        tolerance,
        script=script,
    )
    zone_tasks = []
    for i, (name, zg) in enumerate(folder.zone_layers):
        if zg.crs is not None and _crs(zg.crs) != crs:
            zg = zg.to_crs(crs.to_wkt())
        lines = bool(zg.geom_type.str.contains("LineString").all())
        tasks = _feature_tasks(zg.geometry.values, ["{}"], np.zeros(len(zg), dtype=np.intp), frame, tolerance)
        zone_tasks.append((i, name, lines, tasks))
    with ThreadPoolExecutor(max_workers=max(1, min(_MAX_THREADS, default_workers()))) as pool:
        try:
            # the threads start on the shapes while this one first collects what the steps before left
            # (a drawn figure's reference cycles, about 150 MB at 100 000 parcels; a collection takes about
            # 0.1 s, worth it only when the shapes' text is large); the images are made here, where that
            # memory is free again, and encoded on the threads
            parcel_chunks = [pool.submit(t) for t in parcel_tasks[:2]]
            if len(parcel_tasks) > 2:
                release_heap(collect=True)
            relief = pool.submit(_script_png if script else _png_data_uri, _relief_image(data, breaks))
            conflict_rgba = _conflict_image(data, n_zone_bits)
            conflict = None if conflict_rgba is None else pool.submit(_png_data_uri, conflict_rgba)
            del conflict_rgba
            cell_zones = [
                (label, colour, pool.submit(_png_data_uri, rgba)) for label, colour, rgba in _cell_zone_images(data)
            ]
            parcel_chunks += [pool.submit(t) for t in parcel_tasks[2:]]
            zone_chunks = [(i, name, lines, [pool.submit(t) for t in tasks]) for i, name, lines, tasks in zone_tasks]
            del parcel_tasks, zone_tasks

            # meanwhile, on this thread: the table of the pop-ups
            rows: dict | None
            reasons: list[str] | None
            rows, classes, reasons, conf = _table(folder, gdf["parcel_id"].to_numpy(dtype=object).tolist())
            if ready is not None:
                ready["rows"], rows = _json_for_script(rows), None
                ready["reasons"], reasons = _json_for_script(reasons), None
            zones = []
            for i, name, lines, chunks in zone_chunks:
                text, n = _collection(chunks)
                if n:
                    zones.append(
                        {
                            "name": folder.zone_label(name),
                            "colour": _ZONE_STYLE[i % len(_ZONE_STYLE)][0],
                            "lines": lines,
                            "geojson": text,
                        }
                    )
            parcels: str | None = _collection(parcel_chunks, script=script)[0]
            relief_uri: str | None = relief.result()
            if ready is not None:
                ready["parcels"], parcels = parcels, None
                ready["relief"], relief_uri = relief_uri, None
            conflict_uri = None if conflict is None else conflict.result()
            cell_units = _UNITS_PER_CELL * data.slope.factor
            out = {
                "frame": frame.to_json(),
                "max_zoom": int(math.ceil(math.log2(_MAX_ZOOM_CELL_PX * data.slope.factor / cell_units))),
                "relief": relief_uri,
                "conflict": conflict_uri,
                "conflict_kinds": [
                    {"text": _CONFLICT_KIND_TEXT[k], "rgba": list(_CONFLICT_RGBA[k])}
                    for k in (1, 2, 3)
                    if conflict_uri is not None
                ],
                "verdicts": [
                    {
                        "key": v,
                        "text": VERDICT_TEXT.get(v, v.replace("_", " ")),
                        "count": n_of[v],
                        "colour": _WEB_VERDICT_STYLE.get(v, ("#444444", 1.2, None))[0],
                        "weight": _WEB_VERDICT_STYLE.get(v, ("#444444", 1.2, None))[1],
                        "dash": _WEB_VERDICT_STYLE.get(v, ("#444444", 1.2, None))[2],
                    }
                    for v in verdict_keys
                ],
                "classes": [class_labels.get(c, c.replace("_", " ")) for c in classes],
                "reasons": reasons,
                "confidence_text": [CONFIDENCE_TEXT.get(c, c.replace("_", " ")) for c in conf],
                "rows": rows,
                "parcels": parcels,
                "zones": zones,
                "cell_zones": [
                    {"name": label, "colour": colour, "png": png.result()} for label, colour, png in cell_zones
                ],
                "slope_classes": [
                    {"text": t, "colour": c}
                    for t, c in zip(slope_class_labels(breaks), slope_class_colours(len(breaks) - 1))
                ],
                "relief_note": data.relief_note,
                "simplify_m": tolerance * (1.0 if not frame.geographic else 111_320.0),
            }
        except BaseException:
            pool.shutdown(cancel_futures=True)  # an error or a Ctrl-C drops the queued chunks, not waits for them
            raise
    release_heap()  # the threads' glibc arenas keep their freed chunks otherwise
    return out


def _json_for_script(obj, ready: dict[str, str] | None = None) -> str:
    """``obj`` as JSON text safe inside a ``<script>`` element.

    ASCII only (other characters as ``\\u`` escapes, which JSON.parse decodes): Python keeps an
    ASCII string at one byte a character, where a single "m²" would make the whole text of tens of
    MB two bytes a character.  ``<``, ``>`` and ``&`` are escaped the same way.  ``ready``: the text of
    some entries of the dict ``obj``, made so before (the same text, spliced in; taken out of ``ready``).
    """
    if ready:
        parts = []
        for k, v in obj.items():
            parts += [",", _json_for_script(k), ":", ready.pop(k) if k in ready else _json_for_script(v)]
        parts[0] = "{"
        return "".join(parts) + "}"
    text = json.dumps(obj, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    for ch, esc in _JS_ESCAPES.items():
        text = text.replace(ch, esc)  # returns the same string when there is nothing to replace
    return text


WEBMAP_CSS = """
#webmap-wrap{border:1px solid var(--line);background:#fff;padding:8px}
#webmap{height:560px;background:#e9e6df;outline-offset:2px}
#webmap .leaflet-image-layer{image-rendering:pixelated}
#webmap-status{min-height:1.5em;font-size:.9em;margin:6px 0 0}
.wm-legend{display:flex;flex-wrap:wrap;gap:4px 22px;font-size:.85em;margin-top:6px}
.wm-legend h4{margin:0 0 2px;font-size:1em}
.wm-legend ul{list-style:none;margin:0;padding:0}
.wm-sw{display:inline-block;width:1.6em;height:.9em;vertical-align:middle;margin-right:6px;border:1px solid #666}
.wm-ln{display:inline-block;width:1.8em;vertical-align:middle;margin-right:6px;border-top-width:3px}
.wm-pop table{margin:0;font-size:12px}
.wm-pop th{font-weight:600;padding:1px 8px 1px 0;border:0;background:none}
.wm-pop td{padding:1px 0;border:0}
.wm-pop .wm-v{font-weight:700;font-size:13px}
.wm-pop button{font:inherit;margin-top:4px;cursor:pointer}
tr.picked td{background:#ffe9a8 !important}
#parcel-table tbody tr{cursor:pointer}
@media print{#webmap-wrap{display:none}#webmap-print-note{display:block !important}}
"""

# The page script: builds the map from the JSON block, links it with the per-parcel table.
_WEBMAP_JS = r"""
(function () {
  'use strict';
  if (document.readyState === 'loading') {
    document.addEventListener('DOMContentLoaded', start);
  } else { start(); }
  function start() {
  var el = document.getElementById('webmap');
  var src = document.getElementById('webmap-data');
  if (!el || !src || !window.L) { return; }
  var D = JSON.parse(src.textContent);
  var R = D.rows, F = D.frame;
  var status = document.getElementById('webmap-status');
  var renderer = L.canvas({padding: 0.4, tolerance: 3});
  var map = L.map(el, {crs: L.CRS.Simple, renderer: renderer, preferCanvas: true, minZoom: -12,
                       maxZoom: D.max_zoom, zoomSnap: 0.25, attributionControl: false, keyboard: true});
  window.landcheckMap = map;
  var bounds = L.latLngBounds(F.bounds);
  var relief = L.imageOverlay(D.relief, bounds, {interactive: false}).addTo(map);
  var overlays = {};
  overlays['Relief and slope classes'] = relief;
  D.zones.forEach(function (z) {
    var lyr = L.geoJSON(JSON.parse(z.geojson), {interactive: false, renderer: renderer, style: function () {
      return z.lines ? {color: z.colour, weight: 2.5, opacity: 0.9}
                     : {color: z.colour, weight: 1.5, fillColor: z.colour, fillOpacity: 0.18, dashArray: '4 3'};
    }});
    overlays[esc((z.lines ? 'Water: ' : 'Hazard zone: ') + z.name)] = lyr;
  });
  D.cell_zones.forEach(function (z) {
    var name = 'Hazard zone: ' + z.name + ' (cells)';
    overlays[esc(name)] = L.imageOverlay(z.png, bounds, {interactive: false, alt: name,
                                                         className: 'wm-cell-zone'});
  });
  if (D.conflict) {
    overlays['Conflict cells'] = L.imageOverlay(D.conflict, bounds, {interactive: false}).addTo(map);
  }
  var byId = {}, layers = {};
  var groups = D.verdicts.map(function (v) {
    return L.geoJSON(null, {renderer: renderer, style: {color: v.colour, weight: v.weight, dashArray: v.dash,
                                                        fillColor: v.colour, fillOpacity: 0.06}});
  });
  var fc = JSON.parse(D.parcels);
  fc.features.forEach(function (f) {
    var g = groups[f.properties.v];
    if (!g) { return; }
    g.addData(f);
  });
  groups.forEach(function (g, gi) {
    g.eachLayer(function (lyr) {
      var i = lyr.feature.id;
      layers[i] = lyr;
      lyr.on('click', function (e) { pick(i, e.latlng, false); });
    });
    g.addTo(map);
    var v = D.verdicts[gi];
    overlays[esc('Parcels: ' + v.text + ' (' + v.count.toLocaleString('en-US') + ')')] = g;
  });
  R.pid.forEach(function (p, i) { byId[p] = i; });
  L.control.layers(null, overlays, {collapsed: false, position: 'topright'}).addTo(map);
  L.control.scale({metric: true, imperial: false}).addTo(map);
  map.fitBounds(bounds);

  function esc(t) {
    return String(t).replace(/[&<>"']/g, function (c) {
      return {'&': '&amp;', '<': '&lt;', '>': '&gt;', '"': '&quot;', "'": '&#39;'}[c];
    });
  }
  function num(v, d) {
    return v === null || v === undefined ? '\u2013'
      : v.toLocaleString('en-US', {minimumFractionDigits: d, maximumFractionDigits: d});
  }
  function pct(v) { return v === null || v === undefined ? '\u2013' : num(100 * v, 1) + ' %'; }
  function area(m2) { return m2 === null ? '\u2013' : num(m2 / 10000, 2) + ' ha (' + num(m2, 0) + ' m\u00b2)'; }
  function popupHtml(i) {
    var lyr = layers[i];
    var v = D.verdicts[lyr.feature.properties.v];
    var rows = [
      ['Class', D.classes[R.cls[i]]],
      ['Area', area(R.area_m2[i])],
      ['Evaluated', pct(R.evaluated_share[i])],
      ['Mean slope', R.slope_mean_pct[i] === null ? '\u2013' : num(R.slope_mean_pct[i], 1) + ' %'],
      ['Steepest cell', R.slope_max_pct[i] === null ? '\u2013' : num(R.slope_max_pct[i], 1) + ' %'],
      ['Slope limit', R.limit_pct[i] === null ? 'none' : num(R.limit_pct[i], 1) + ' %'],
      ['Conflict area', area(R.conflict_m2[i])],
      ['Conflict share', pct(R.conflict_share[i])]
    ];
    if (R.p_conflict) { rows.push(['Chance of conflict under DEM error', pct(R.p_conflict[i])]); }
    if (R.confidence) { rows.push(['Confidence', D.confidence_text[R.confidence[i]]]); }
    var reason = D.reasons[R.reason[i]];
    var h = '<div class="wm-pop" data-parcel="' + esc(R.pid[i]) + '"><div class="wm-v">Parcel ' + esc(R.pid[i]) +
      ': <span class="wm-verdict">' + esc(v.text) + '</span></div><table><tbody>';
    rows.forEach(function (r) { h += '<tr><th scope="row">' + esc(r[0]) + '</th><td>' + esc(r[1]) + '</td></tr>'; });
    h += '</tbody></table>';
    if (reason) { h += '<p class="wm-reason"><b>Why:</b> ' + esc(reason) + '</p>'; }
    var tr = rowOf(R.pid[i]);
    h += tr ? '<button type="button" class="wm-goto">Show its row in the per-parcel table</button>'
            : '<p class="muted">Not in the per-parcel table (it lists the largest conflicts); see parcels.csv.</p>';
    return h + '</div>';
  }
  var table = document.getElementById('parcel-table');
  function rowOf(pid) {
    if (!table) { return null; }
    return table.querySelector('tbody tr[data-pid="' + (window.CSS && CSS.escape ? CSS.escape(pid) : pid) + '"]');
  }
  var picked = null;
  function highlight(pid, scroll) {
    if (picked) { picked.classList.remove('picked'); picked.removeAttribute('aria-selected'); }
    picked = rowOf(pid);
    if (!picked) { return; }
    picked.classList.add('picked');
    picked.setAttribute('aria-selected', 'true');
    if (scroll) {
      var wrap = picked.closest('.table-wrap');
      if (wrap) { wrap.scrollTop = Math.max(0, picked.offsetTop - wrap.clientHeight / 2); }
    }
  }
  var chosen = null;
  function pick(i, latlng, fly) {
    var lyr = layers[i];
    if (!lyr) { return; }
    // outline the chosen parcel in amber until another is chosen
    if (chosen) { groups[chosen.feature.properties.v].resetStyle(chosen); }
    chosen = lyr;
    lyr.setStyle({color: '#e09a00', weight: 4, dashArray: null, fillOpacity: 0.15});
    lyr.bringToFront();
    var at = latlng || lyr.getBounds().getCenter();
    var open = function () {
      L.popup({maxWidth: 360}).setLatLng(at).setContent(popupHtml(i)).openOn(map);
    };
    if (fly) {
      map.once('moveend', open);
      map.flyToBounds(lyr.getBounds(), {maxZoom: Math.min(D.max_zoom, map.getBoundsZoom(bounds) + 6),
                                        padding: [120, 120], duration: 0.6});
    } else { open(); }
    highlight(R.pid[i], true);
    status.textContent = 'Parcel ' + R.pid[i] + ': ' + D.verdicts[lyr.feature.properties.v].text + '.' +
      (picked ? ' Its row is highlighted in the per-parcel table.' : '');
  }
  map.on('popupopen', function (e) {
    var b = e.popup.getElement().querySelector('.wm-goto');
    if (b) {
      b.addEventListener('click', function () {
        var pid = e.popup.getElement().querySelector('.wm-pop').getAttribute('data-parcel');
        var tr = rowOf(pid);
        if (tr) { tr.scrollIntoView({block: 'center'}); tr.focus(); }
      });
    }
  });
  if (table) {
    var goRow = function (tr) {
      var pid = tr.getAttribute('data-pid');
      if (pid === null || !(pid in byId)) { return; }
      el.scrollIntoView({block: 'nearest'});
      pick(byId[pid], null, true);
    };
    table.tBodies[0].addEventListener('click', function (e) {
      var tr = e.target.closest('tr');
      if (tr) { goRow(tr); }
    });
    table.tBodies[0].addEventListener('keydown', function (e) {
      if (e.key === 'Enter') { var tr = e.target.closest('tr'); if (tr) { e.preventDefault(); goRow(tr); } }
    });
  }
  window.landcheckMapReady = true;
  }
})();
"""


def _legend_html(d: dict) -> str:
    from html import escape

    parts = ['<div class="wm-legend">', "<div><h4>Slope class</h4><ul>"]
    for s in d["slope_classes"]:
        parts.append(f'<li><span class="wm-sw" style="background:{s["colour"]}"></span>{escape(s["text"])}</li>')
    parts.append("</ul></div><div><h4>Parcel verdict</h4><ul>")
    for v in d["verdicts"]:
        style = "dashed" if v["dash"] else "solid"
        parts.append(
            f'<li><span class="wm-ln" style="border-top:{max(2, round(v["weight"] + 1))}px {style} '
            f'{v["colour"]}"></span>{escape(v["text"])} ({v["count"]:,d})</li>'
        )
    parts.append("</ul></div>")
    if d["zones"] or d["cell_zones"]:
        parts.append("<div><h4>Hazard zones and water (off at first)</h4><ul>")
        for z in d["cell_zones"]:
            sw = f'<span class="wm-sw" style="background:{z["colour"]}{_CELL_ZONE_ALPHA:02x}"></span>'
            parts.append(f"<li>{sw}{escape(z['name'])} (cells)</li>")
        for z in d["zones"]:
            if z["lines"]:
                sw = f'<span class="wm-ln" style="border-top:3px solid {z["colour"]}"></span>'
            else:
                sw = f'<span class="wm-sw" style="background:{z["colour"]}2e;border:1.5px dashed {z["colour"]}"></span>'
            parts.append(f"<li>{sw}{escape(z['name'])}</li>")
        parts.append("</ul></div>")
    if d["conflict_kinds"]:
        parts.append("<div><h4>Conflict cells</h4><ul>")
        for k in d["conflict_kinds"]:
            r, g, b, a = k["rgba"]
            parts.append(
                f'<li><span class="wm-sw" style="background:rgba({r},{g},{b},{a / 255:.2f})"></span>'
                f"{escape(k['text'])}</li>"
            )
        parts.append("</ul></div>")
    parts.append("</div>")
    return "".join(parts)


def webmap_section(folder: AuditFolder, data: _MapData, breaks: np.ndarray, class_labels: dict[str, str]) -> str:
    """The interactive-map block of the report: map box, legend, status line, data and scripts."""
    from html import escape

    ready: dict[str, str] = {}
    d = _webmap_data(folder, data, breaks, class_labels, ready)
    css, js, lic = leaflet_assets()
    n = sum(v["count"] for v in d["verdicts"])
    simplify = f"{d['simplify_m']:,.0f} m" if d["simplify_m"] >= 1 else f"{d['simplify_m']:.2f} m"
    legend, relief_note = _legend_html(d), d["relief_note"]
    # the data as page text, then the dict goes: at 100 000 parcels both are tens of MB
    data_json = _json_for_script(d, ready)
    del ready
    del d
    return (
        f"<style>{css}</style>"
        '<div id="webmap-wrap">'
        '<div id="webmap" role="application" aria-label="Interactive map of the audit area: drag to pan, '
        'scroll or use + and - to zoom, click a parcel for its figures"></div>'
        '<p id="webmap-status" role="status" aria-live="polite">Click a parcel for its figures and reasons, '
        "or click a row of the per-parcel table to find it here.</p>"
        + legend
        + f'<p class="muted">{count_text(n, "parcel")}. Outlines are simplified for display (tolerance about one cell, '
        f"{escape(simplify)}); every figure in the pop-ups and tables comes from the unsimplified parcels. "
        f"Relief: {escape(relief_note)}. Runs offline with Leaflet {LEAFLET_VERSION} "
        "(BSD 2-Clause licence, included in this page).</p></div>"
        '<p id="webmap-print-note" class="muted" style="display:none">The interactive map is shown on screen '
        "only; the printed overview map follows.</p>"
        f'<script type="application/json" id="webmap-data">{data_json}</script>'
        f"<script>/*! Leaflet {LEAFLET_VERSION}\n{lic.replace('*/', '* /')}*/\n{js}</script>"
        f"<script>{_WEBMAP_JS}</script>"
    )
