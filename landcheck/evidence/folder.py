"""Reading an audit output folder (docs/outputs.md): summary.json, the CSV tables, parcels and zones.

Maps, charts, the interactive map and the report read the folder only through
:class:`AuditFolder`, which validates each file on first use and raises
:class:`~landcheck.errors.InputDataError` naming the file and what to do.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from functools import cached_property
from pathlib import Path

from landcheck.errors import InputDataError

__all__ = ["AuditFolder", "load_audit_folder"]


def _read_json(path: Path) -> dict:
    try:
        with open(path, encoding="utf-8") as f:
            return json.load(f)
    except json.JSONDecodeError as exc:
        raise InputDataError(
            f"{path}: not valid JSON at line {exc.lineno}, column {exc.colno} ({exc.msg}); "
            "rerun `landcheck audit` to write it again."
        ) from exc


_PARCEL_TEXT_COLUMNS = ("parcel_id", "class_value", "class_name", "verdict", "reasons", "geometry_note")


_PARCEL_REQUIRED = ("parcel_id", "class_name", "area_m2", "evaluated_m2", "conflict_m2", "conflict_share", "verdict")


_CLASS_REQUIRED = ("class_name", "evaluated_m2", "conflict_m2", "conflict_share", "over_limit_m2")


def _read_csv(path: Path, required: Sequence[str], text_columns: Sequence[str]):
    import pandas as pd

    try:
        df = pd.read_csv(path, dtype={c: str for c in text_columns}, keep_default_na=False, na_values=[""])
    except (OSError, ValueError) as exc:
        raise InputDataError(f"{path}: cannot be read as CSV ({exc}); rerun `landcheck audit`.") from exc
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise InputDataError(
            f"{path}: missing column(s) {', '.join(missing)}; expected the columns listed in "
            "docs/outputs.md. Was it written by an older or newer landcheck?"
        )
    for c in text_columns:
        if c in df.columns:
            df[c] = df[c].fillna("").astype(str)
    return df


def _parse_float(v) -> float:
    if v is None:
        return math.inf
    if isinstance(v, str):
        t = v.strip().lower()
        return math.inf if t in ("inf", "+inf", "infinity", "") else float(t)
    return float(v)


@dataclass
class AuditFolder:
    """A validated audit output folder (docs/outputs.md); loads layers on first use."""

    out_dir: Path
    summary: dict
    #: folder-relative raster name -> the file to read it from instead (:meth:`use_raster_files`)
    raster_files: dict[str, Path] = field(default_factory=dict)

    def path(self, name: str) -> Path:
        return self.raster_files.get(name, self.out_dir / name)

    def use_raster_files(self, files: Mapping[str, Path]) -> None:
        """Read these rasters from other files with the same values (the audit's finished scratch files,
        while the Cloud-Optimized copies are laid out on another thread)."""
        self.raster_files.update({str(k): Path(v) for k, v in files.items()})

    def require(self, name: str) -> Path:
        p = self.path(name)
        if not p.exists():
            raise InputDataError(
                f"{p}: not found; expected the output folder of `landcheck audit` "
                "(docs/outputs.md). Rerun the audit or point to the right folder."
            )
        return p

    def section(self, *keys: str, default=None):
        """``summary[k1][k2]...``, or ``default`` when any key is missing."""
        node = self.summary
        for k in keys:
            if not isinstance(node, dict) or k not in node:
                return default
            node = node[k]
        return node

    @cached_property
    def parcels(self):
        """parcels.csv as a DataFrame (text columns as str, empty numbers as NaN)."""
        return _read_csv(self.require("parcels.csv"), _PARCEL_REQUIRED, _PARCEL_TEXT_COLUMNS)

    @cached_property
    def classes(self):
        """classes.csv as a DataFrame."""
        return _read_csv(self.require("classes.csv"), _CLASS_REQUIRED, ("class_name", "label", "development"))

    def use_parcel_shapes(self, gdf) -> bool:
        """Take ``parcels.gpkg``'s rows from memory (the audit's own frame, just written) instead of the file.

        Only the id, the verdict and the shape are kept, as :attr:`parcels_gdf` reads them.  Used only
        when every shape is present and not empty (the GeoPackage round trip keeps those bit for
        bit); otherwise the file is read as usual.  Returns whether the frame was taken.
        """
        import shapely

        geoms = gdf.geometry.values
        if len(gdf) == 0 or shapely.is_missing(geoms).any() or shapely.is_empty(geoms).any():
            return False
        keep = gdf[["parcel_id", "verdict", gdf.geometry.name]].reset_index(drop=True)
        if keep.geometry.name != "geometry":
            keep = keep.rename_geometry("geometry")
        keep["parcel_id"] = keep["parcel_id"].astype(str)
        keep["verdict"] = keep["verdict"].fillna("").astype(str)
        self.__dict__["parcels_gdf"] = keep
        return True

    def use_parcel_subset(self, rows, shapes) -> None:
        """Hold only these rows of :attr:`parcels` and :attr:`parcels_gdf` (as read here, in file order).

        For a drawing that needs a few parcels and their neighbours (the report's figure process, see
        :func:`landcheck.evidence.figure_worker.closeup_subset`): neither file is read again.
        """
        self.__dict__["parcels"] = rows
        self.__dict__["parcels_gdf"] = shapes

    @cached_property
    def parcels_gdf(self):
        import geopandas as gpd

        p = self.require("parcels.gpkg")
        try:
            # the maps need only the id, the verdict and the shape; figures come from parcels.csv
            gdf = gpd.read_file(p, layer="parcels", columns=["parcel_id", "verdict"])
        except Exception as exc:  # pyogrio raises several unrelated classes; re-raise as ours
            raise InputDataError(f"{p}, layer 'parcels': cannot be read ({exc}); rerun `landcheck audit`.") from exc
        if "verdict" not in gdf.columns or "parcel_id" not in gdf.columns:
            raise InputDataError(f"{p}, layer 'parcels': needs columns parcel_id and verdict (docs/outputs.md).")
        gdf["parcel_id"] = gdf["parcel_id"].astype(str)
        gdf["verdict"] = gdf["verdict"].fillna("").astype(str)
        return gdf

    @cached_property
    def zone_layers(self) -> list[tuple[str, object]]:
        """(name, GeoDataFrame) for every ``zones/*.gpkg``, sorted by name."""
        import geopandas as gpd

        zdir = self.out_dir / "zones"
        out = []
        if zdir.is_dir():
            for p in sorted(zdir.glob("*.gpkg")):
                try:
                    out.append((p.stem, gpd.read_file(p)))
                except Exception as exc:  # pyogrio raises several unrelated classes; re-raise as ours
                    raise InputDataError(f"{p}: cannot be read ({exc}); rerun `landcheck audit`.") from exc
        return out

    @cached_property
    def zone_labels(self) -> dict[str, str]:
        """Reader's name per zone layer file stem (``zones/<stem>.gpkg``) and per zone key."""
        out: dict[str, str] = {"derived_streams": "streams derived from the DEM"}
        for col in self.section("zone_columns", default=[]) or []:
            if isinstance(col, dict) and col.get("name"):
                label = str(col.get("label") or col["name"]).replace("_", " ")
                out[str(col["name"])] = label
                out["zone_" + str(col["name"])] = label
        return out

    def zone_label(self, stem: str) -> str:
        """Reader's name of a zone layer: its rulebook label, else the key in plain words."""
        if stem in self.zone_labels:
            return self.zone_labels[stem]
        return (stem[5:] if stem.startswith("zone_") else stem).replace("_", " ")

    @property
    def run_started(self) -> datetime | None:
        text = self.section("manifest", "started_utc")
        if not text:
            return None
        try:
            dt = datetime.fromisoformat(str(text).replace("Z", "+00:00"))
        except ValueError:
            return None
        return dt.astimezone(timezone.utc) if dt.tzinfo else dt.replace(tzinfo=timezone.utc)

    @property
    def run_date_text(self) -> str:
        dt = self.run_started
        return dt.strftime("%Y-%m-%d %H:%M UTC") if dt else "(date and time in run_times.json)"

    @property
    def dem_paths(self) -> list[Path]:
        """The DEM files named in the manifest (role "dem"), in its order: one file, or the tiles a region run
        joined (``landcheck.inputs.tiles``); empty when none is recorded.  They may not exist on this machine."""
        out = []
        for item in self.section("manifest", "inputs", default=[]) or []:
            if isinstance(item, dict) and item.get("role") == "dem" and item.get("path"):
                out.append(Path(item["path"]))
        return out

    @property
    def dem_path(self) -> Path | None:
        """The first DEM file named in the manifest (role "dem"), if recorded; may not exist on this machine."""
        paths = self.dem_paths
        return paths[0] if paths else None

    @cached_property
    def class_limits_pct(self) -> dict[str, float]:
        """Slope limit (%) per class, from parcels.csv ``max_slope_pct``; NaN when the class has none."""
        import pandas as pd

        df = self.parcels
        if "max_slope_pct" not in df.columns:
            return {}
        # per class the first value that is a number, in the order the classes first appear (whole
        # columns at once: 100 000 parcels in milliseconds)
        values = pd.to_numeric(df["max_slope_pct"], errors="coerce").astype(float)
        names = df["class_name"]
        given = pd.DataFrame({"name": names, "value": values})[values.notna()].drop_duplicates("name")
        first = dict(zip(given["name"], given["value"]))
        return {name: float(first.get(name, math.nan)) for name in names.drop_duplicates()}


def load_audit_folder(out_dir) -> AuditFolder:
    """Open an audit output folder and read ``summary.json``.

    Raises
    ------
    InputDataError
        The folder or summary.json is missing or unreadable.
    """
    if isinstance(out_dir, AuditFolder):
        return out_dir
    out_dir = Path(out_dir)
    if not out_dir.is_dir():
        raise InputDataError(f"{out_dir}: not a folder; expected the output folder of `landcheck audit`.")
    p = out_dir / "summary.json"
    if not p.exists():
        raise InputDataError(
            f"{p}: not found; expected the output folder of `landcheck audit` "
            "(docs/outputs.md). Rerun the audit or point to the right folder."
        )
    summary = _read_json(p)
    if not isinstance(summary, dict):
        raise InputDataError(f"{p}: expected a JSON object at the top level (docs/outputs.md).")
    return AuditFolder(out_dir, summary)


def _isnan(v) -> bool:
    try:
        return math.isnan(float(v))
    except (TypeError, ValueError):
        return True
