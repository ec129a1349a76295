"""Uploads: plain file names only, size-limited streaming into the workspace, then the CLI's own input checks.

A file arrives as one part of a ``multipart/form-data`` body (parsed by python-multipart as it streams),
is written to a hidden file in the project's ``inputs/.incoming/`` folder, checked with
:func:`landcheck.inputs.dem.open_dem` or :func:`landcheck.inputs.layers.read_layer`, and only then
renamed to its final, never-overwritten name in ``inputs/``.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import tempfile
import unicodedata
import xml.etree.ElementTree as ET
import zipfile
from dataclasses import dataclass
from pathlib import Path

from landcheck.errors import InputDataError

__all__ = ["UploadRefused", "safe_name", "receive_file", "store_input", "inspect_dem", "inspect_layer"]

DEM_SUFFIXES = (".tif", ".tiff", ".vrt", ".img", ".asc", ".nc", ".hgt", ".dem", ".bil", ".jp2", ".gpkg", ".dt2")
LAYER_SUFFIXES = (".gpkg", ".geojson", ".json", ".zip", ".parquet", ".geoparquet", ".fgb")
_NAME_RE = re.compile(r"^[\w][\w .()+,=-]{0,150}$")


class UploadRefused(ValueError):
    """An upload the app will not take; ``status`` is the HTTP status to answer with."""

    def __init__(self, message: str, status: int = 400):
        super().__init__(message)
        self.status = status


def safe_name(name: str) -> str:
    """The upload's file name when it is a plain name (no folder, no '..', no control characters)."""
    name = unicodedata.normalize("NFC", name or "")
    bad = (
        not name
        or name in (".", "..")
        or ".." in name
        or "/" in name
        or "\\" in name
        or "%" in name
        or ":" in name
        or name.startswith(".")
        or any(unicodedata.category(ch).startswith("C") for ch in name)
        or not _NAME_RE.match(name)
    )
    if bad:
        raise UploadRefused(
            f"{name!r}: not a plain file name (no folders, '..', '%', ':' or hidden names); "
            "rename the file to letters, digits, spaces, '.', '-', '_' and upload it again."
        )
    return name


@dataclass
class Received:
    name: str  # the user's file name (checked)
    tmp: Path  # where its bytes are, inside the workspace
    size: int
    sha256: str
    fields: dict  # the other (small) form fields


async def receive_file(request, incoming: Path, max_bytes: int) -> Received:
    """Stream one ``file`` part of a multipart request into ``incoming``; refuse names and sizes first-hand."""
    from python_multipart import MultipartParser
    from python_multipart.multipart import parse_options_header

    ctype, params = parse_options_header(request.headers.get("content-type", ""))
    if ctype != b"multipart/form-data" or b"boundary" not in params:
        raise UploadRefused("expected a multipart/form-data upload with one file.")
    try:
        declared = int(request.headers.get("content-length", "0"))
    except ValueError:
        declared = 0
    if declared > max_bytes + 64 * 1024:
        raise UploadRefused(_too_big(max_bytes), 413)
    incoming.mkdir(parents=True, exist_ok=True)
    state: dict = {"headers": {}, "field": b"", "value": b"", "part": None, "file": None, "name": None}
    fields: dict[str, str] = {}
    digest = hashlib.sha256()
    total = {"n": 0}
    tmp_holder: dict = {}

    def on_part_begin():
        state["headers"] = {}
        state["part"] = None

    def on_header_field(data, start, end):
        state["field"] += data[start:end]

    def on_header_value(data, start, end):
        state["value"] += data[start:end]

    def on_header_end():
        state["headers"][state["field"].decode("latin-1").lower()] = state["value"]
        state["field"] = b""
        state["value"] = b""

    def on_headers_finished():
        _, disp = parse_options_header(state["headers"].get("content-disposition", b""))
        fname = disp.get(b"filename")
        key = disp.get(b"name", b"").decode("utf-8", "replace")
        if fname is not None:
            if state["name"] is not None:
                raise UploadRefused("one file per upload, please.")
            name = safe_name(fname.decode("utf-8", "replace"))
            fd, tmp = tempfile.mkstemp(prefix=".up-", suffix="-" + name, dir=incoming)
            tmp_holder["path"] = Path(tmp)
            state["file"] = os.fdopen(fd, "wb")
            state["name"] = name
            state["part"] = ("file", key)
        else:
            state["part"] = ("field", key)
            fields[key] = ""

    def on_part_data(data, start, end):
        chunk = data[start:end]
        kind, key = state["part"]
        if kind == "file":
            total["n"] += len(chunk)
            if total["n"] > max_bytes:
                raise UploadRefused(_too_big(max_bytes), 413)
            state["file"].write(chunk)
            digest.update(chunk)
        else:
            if len(fields[key]) + len(chunk) > 4096:
                raise UploadRefused(f"form field {key!r} is too long.")
            fields[key] += chunk.decode("utf-8", "replace")

    def on_part_end():
        if state["part"] and state["part"][0] == "file":
            state["file"].close()

    parser = MultipartParser(
        params[b"boundary"],
        {
            "on_part_begin": on_part_begin,
            "on_header_field": on_header_field,
            "on_header_value": on_header_value,
            "on_header_end": on_header_end,
            "on_headers_finished": on_headers_finished,
            "on_part_data": on_part_data,
            "on_part_end": on_part_end,
        },
    )
    try:
        async for chunk in request.stream():
            parser.write(chunk)
        parser.finalize()
    except BaseException:
        if state["file"] is not None:
            state["file"].close()
        if "path" in tmp_holder:
            tmp_holder["path"].unlink(missing_ok=True)
        raise
    if state["name"] is None:
        raise UploadRefused("no file in the upload; choose a file first.")
    return Received(state["name"], tmp_holder["path"], total["n"], digest.hexdigest(), fields)


def _too_big(max_bytes: int) -> str:
    return (
        f"the file is larger than this app's upload limit ({max_bytes / 1e6:g} MB); start the app with a "
        "larger --max-upload-mb, or run `landcheck audit` on the file directly."
    )


def unique_target(folder: Path, name: str) -> Path:
    """``folder/name``, or ``stem-2.ext``, ``stem-3.ext`` ... when taken: stored inputs are never overwritten."""
    p = folder / name
    stem, suffix = Path(name).stem, Path(name).suffix
    n = 2
    while p.exists() or (p.with_suffix("").exists() and suffix.lower() == ".zip"):
        p = folder / f"{stem}-{n}{suffix}"
        n += 1
    return p


def _message(exc: Exception, tmp: Path, name: str) -> str:
    """The library's message, naming the user's file instead of the temporary one."""
    return str(exc).replace(str(tmp), name).replace(tmp.name, name)


def check_vrt_sources(path: Path, folder: Path, name: str) -> None:
    """A VRT may only point at rasters already uploaded beside it (relative names); nothing else is read."""
    try:
        root = ET.parse(path).getroot()
    except ET.ParseError as exc:
        raise UploadRefused(f"{name}: not a readable VRT ({exc}); give a GeoTIFF or a valid VRT.") from None
    for el in root.iter("SourceFilename"):
        src = (el.text or "").strip()
        ok = el.get("relativeToVRT") == "1" and not os.path.isabs(src) and ".." not in src and "/vsi" not in src
        if not ok or not (folder / src).resolve().is_file() or folder.resolve() not in (folder / src).resolve().parents:
            raise UploadRefused(
                f"{name}: the VRT reads {src!r}, which is not a raster uploaded to this project; upload the "
                'source rasters first and use names relative to the VRT (relativeToVRT="1").'
            )


def extract_shapefile_zip(zpath: Path, dest: Path, name: str, max_bytes: int) -> Path:
    """Unpack a zipped Shapefile into ``dest`` (member names checked); returns the one .shp."""
    try:
        zf = zipfile.ZipFile(zpath)
    except zipfile.BadZipFile:
        raise UploadRefused(f"{name}: not a readable .zip; zip the Shapefile's .shp, .shx, .dbf and .prj.") from None
    with zf:
        infos = [i for i in zf.infolist() if not i.is_dir()]
        if sum(i.file_size for i in infos) > 4 * max_bytes:
            raise UploadRefused(_too_big(max_bytes), 413)
        shps = [i for i in infos if i.filename.lower().endswith(".shp")]
        if len(shps) != 1:
            raise UploadRefused(
                f"{name}: holds {len(shps)} .shp files; zip exactly one Shapefile (with its .shx, .dbf, .prj)."
            )
        stem = shps[0].filename[:-4]
        dest.mkdir(parents=True)
        for i in infos:
            member = i.filename
            if not member.startswith(stem) or member[len(stem) :].count(".") != 1:
                continue  # not a sidecar of the one Shapefile
            base = safe_name(Path(member.replace("\\", "/")).name)
            with zf.open(i) as src, open(dest / base, "wb") as out:
                shutil.copyfileobj(src, out)
        return dest / Path(shps[0].filename.replace("\\", "/")).name


def inspect_dem(path: Path, name: str, *, band=None, crs=None, z_unit="m") -> dict:
    """What a person checks about a DEM: CRS, extent, linear unit, cell size, size, nodata (same checks as the CLI)."""
    import pyproj
    import rasterio

    from landcheck.inputs.dem import open_dem

    try:
        src = open_dem(path, band=band or None, crs=crs or None, z_unit=z_unit or "m")
    except InputDataError as exc:
        raise UploadRefused(_message(exc, path, name)) from None
    g = src.grid
    c = pyproj.CRS.from_user_input(g.crs_wkt)
    with rasterio.open(path) as ds:
        dtype, bands = ds.dtypes[src.band - 1], ds.count
    return {
        "kind": "raster",
        "crs": c.name,
        "epsg": c.to_epsg(),
        "geographic": g.geographic,
        "linear_unit": "degree" if g.geographic else ("metre" if g.unit_m == 1.0 else f"{g.unit_m:g} m"),
        "z_unit": src.z_unit.value,
        "cell_size": [abs(g.transform.a), abs(g.transform.e)],
        "width": g.width,
        "height": g.height,
        "bounds": [round(b, 6) for b in g.bounds],
        "band": src.band,
        "bands": bands,
        "dtype": dtype,
        "nodata": None if src.nodata is None else float(src.nodata),
    }


def inspect_layer(path: Path, name: str, *, role: str, layer=None, crs=None) -> dict:
    """CRS, extent, feature count, geometry types and fields of a vector layer (same checks as the CLI)."""
    import pyproj

    from landcheck.inputs.layers import read_layer

    try:
        gdf = read_layer(path, layer=layer or None, role=role, crs=crs or None)
    except InputDataError as exc:
        raise UploadRefused(_message(exc, path, name)) from None
    c = pyproj.CRS.from_user_input(gdf.crs)
    fields = []
    for col in gdf.columns:
        if col == gdf.geometry.name:
            continue
        s = gdf[col]
        distinct = s.dropna().astype(str).unique()
        fields.append(
            {
                "name": str(col),
                "dtype": str(s.dtype),
                "distinct": int(len(distinct)),
                "unique": bool(s.notna().all() and s.is_unique),
                "values": sorted(map(str, distinct))[:200] if len(distinct) <= 200 else [],
            }
        )
    return {
        "kind": "vector",
        "crs": c.name,
        "epsg": c.to_epsg(),
        "linear_unit": (c.axis_info[0].unit_name if c.axis_info else "?"),
        "features": int(len(gdf)),
        "geometry_types": sorted(set(map(str, gdf.geom_type.dropna()))),
        "bounds": [round(float(b), 6) for b in gdf.total_bounds],
        "fields": fields,
        "layer": layer or None,
        "where": gdf.attrs.get("where", name).replace(str(path), name),
    }


def store_input(rec: Received, inputs: Path, role: str, max_bytes: int) -> tuple[Path, dict]:
    """Check the received file as the CLI would, then publish it under its own name in ``inputs`` (one rename)."""
    opts = {k: v.strip() for k, v in rec.fields.items() if k in ("band", "crs", "layer", "z_unit") and v.strip()}
    suffix = Path(rec.name).suffix.lower()
    tmp = rec.tmp
    try:
        if role == "dem":
            if suffix not in DEM_SUFFIXES:
                raise UploadRefused(
                    f"{rec.name}: {suffix or 'no extension'} is not a raster format the app takes "
                    f"({', '.join(DEM_SUFFIXES)}); give a GeoTIFF or another GDAL raster."
                )
            if suffix == ".vrt":
                check_vrt_sources(tmp, inputs, rec.name)
                # a VRT's sources are relative to it: check it where it will live
                target = unique_target(inputs, rec.name)
                os.replace(tmp, target)
                tmp = target
            band = None
            if "band" in opts:
                try:
                    band = int(opts["band"])
                except ValueError:
                    raise UploadRefused(f"band {opts['band']!r}: give a whole number (1, 2, ...).") from None
            info = inspect_dem(tmp, rec.name, band=band, crs=opts.get("crs"), z_unit=opts.get("z_unit", "m"))
        else:
            if suffix not in LAYER_SUFFIXES:
                raise UploadRefused(
                    f"{rec.name}: {suffix or 'no extension'} is not a vector format the app takes; give a "
                    "GeoPackage, GeoJSON, a Shapefile zipped with its sidecars (.zip) or GeoParquet."
                )
            if suffix == ".zip":
                folder = unique_target(inputs, Path(rec.name).stem)
                shp = extract_shapefile_zip(tmp, folder, rec.name, max_bytes)
                tmp.unlink(missing_ok=True)
                try:
                    info = inspect_layer(shp, rec.name, role=_role_word(role), layer=None, crs=opts.get("crs"))
                except BaseException:
                    shutil.rmtree(folder, ignore_errors=True)
                    raise
                info["key"] = layer_key(rec.name)
                return shp, {"options": opts, "info": info}
            info = inspect_layer(tmp, rec.name, role=_role_word(role), layer=opts.get("layer"), crs=opts.get("crs"))
        info["key"] = layer_key(rec.name)
        if tmp != rec.tmp:
            return tmp, {"options": opts, "info": info}
        target = unique_target(inputs, rec.name)
        os.replace(tmp, target)
        return target, {"options": opts, "info": info}
    except BaseException:
        tmp.unlink(missing_ok=True) if tmp.exists() and tmp.is_file() else None
        rec.tmp.unlink(missing_ok=True)
        raise


def _role_word(role: str) -> str:
    return "parcels" if role == "parcels" else "hazard layer"


def layer_key(name: str) -> str:
    """A rulebook-friendly key for a hazard layer: lower-case letters, digits and _."""
    key = re.sub(r"[^a-z0-9_]+", "_", Path(name).stem.lower()).strip("_") or "layer"
    return key if key[0].isalpha() else "l_" + key
