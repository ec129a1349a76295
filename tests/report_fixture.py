"""Build a small synthetic ``landcheck audit`` output folder for the map and report tests.

The folder follows docs/outputs.md field by field, but it is made here from a
synthetic DEM, without the audit pipeline, so the map and report tests do not
depend on it.  The numbers are self-consistent (computed from the same arrays
with cell-centre counting), not a check of the audit itself.

The demo setting is fictional: the town of Alderwane on Corrin Bay, on the
Tamsel River.
"""

from __future__ import annotations

import csv
import hashlib
import json
import shutil
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import rasterio
import rasterio.features
import rasterio.shutil
from affine import Affine
from shapely.geometry import LineString, Polygon, box

from landcheck.about import __version__

#: projected CRS of the fixture (UTM zone 51 north, metres)
FIXTURE_EPSG = 32651
CELL_M = 10.0
ROWS, COLS = 90, 110
X0_M, Y0_M = 500_000.0, 1_600_900.0  # north-west corner
REVIEW_BAND_PCT = 5.0
REFERENCE_LIMIT_PCT = 18.0
STARTED_UTC = "2024-03-05T09:30:00Z"

RULEBOOK_TEXT = """\
# Alderwane screening rulebook (fictional demo)
[meta]
title = "Alderwane land-use screening"
parcel_id = "lot_no"
class_attribute = "zone_code"

[class.residential]
label = "Residential"
values = ["R1"]
development = true
max_slope = "18 %"
forbid_zones = ["flood_prone"]

[class.agricultural]
label = "Agricultural"
values = ["AG"]
development = true
max_slope = "30 %"

[class.conservation]
label = "Conservation"
values = ["CN"]
development = false
"""

#: class name -> (label, development, limit_pct or None, forbidden zones)
CLASSES = {
    "residential": ("Residential", True, 18.0, ("flood_prone",)),
    "agricultural": ("Agricultural", True, 30.0, ()),
    "conservation": ("Conservation", False, None, ()),
}
CLASS_OF_VALUE = {"R1": "residential", "AG": "agricultural", "CN": "conservation"}


@dataclass
class AuditFixture:
    """Paths of a synthetic audit output folder and of the inputs it records."""

    out_dir: Path
    dem_path: Path
    parcels_input_path: Path
    rulebook_path: Path
    zone_input_path: Path


def _transform() -> Affine:
    return Affine(CELL_M, 0.0, X0_M, 0.0, -CELL_M, Y0_M)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _dem() -> np.ndarray:
    rows, cols = np.mgrid[0:ROWS, 0:COLS].astype(np.float64)
    x_m, y_m = cols * CELL_M, (ROWS - rows) * CELL_M
    hill = 70.0 * np.exp(-((x_m - 800.0) ** 2 + (y_m - 550.0) ** 2) / (2 * 150.0**2))
    ridge = 40.0 * np.exp(-((x_m - 330.0) ** 2) / (2 * 40.0**2)) / (1.0 + np.exp(-(y_m - 450.0) / 40.0))
    return (20.0 + 0.01 * x_m + hill + ridge).astype(np.float32)


def _slope_pct(dem: np.ndarray) -> np.ndarray:
    d_row, d_col = np.gradient(dem.astype(np.float64), CELL_M)
    s = 100.0 * np.hypot(d_row, d_col)
    s[0, :] = s[-1, :] = s[:, 0] = s[:, -1] = np.nan  # edge ring without a slope
    return s.astype(np.float32)


def _write_tif(path: Path, arr: np.ndarray, nodata, cog: bool) -> None:
    profile = dict(
        driver="GTiff",
        height=arr.shape[0],
        width=arr.shape[1],
        count=1,
        dtype=arr.dtype.name,
        crs=f"EPSG:{FIXTURE_EPSG}",
        transform=_transform(),
        nodata=nodata,
    )
    if not cog:
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(arr, 1)
        return
    tmp = path.with_suffix(".plain.tif")
    with rasterio.open(tmp, "w", **profile) as ds:
        ds.write(arr, 1)
    rasterio.shutil.copy(tmp, path, driver="COG")
    tmp.unlink()


def _parcels() -> list[tuple[str, str, Polygon]]:
    def cells(c0, r0, c1, r1):
        return box(X0_M + c0 * CELL_M, Y0_M - r1 * CELL_M, X0_M + c1 * CELL_M, Y0_M - r0 * CELL_M)

    return [
        ("101", "R1", cells(66, 22, 84, 40)),  # on the hill flank: steep
        ("102", "R1", cells(4, 60, 24, 82)),  # low ground inside the flood-prone zone
        ("103", "AG", cells(70, 4, 96, 20)),  # upper hill: near the 30 % limit
        ("104", "R1", cells(40, 62, 58, 84)),  # flat and dry
        ("105", "CN", cells(26, 10, 42, 34)),  # on the ridge, no slope limit
        ("106", "X9", cells(90, 60, 106, 80)),  # class value with no rule
        (
            "107",
            "AG",
            Polygon(
                [(X0_M + 640, Y0_M - 640), (X0_M + 800, Y0_M - 600), (X0_M + 780, Y0_M - 830), (X0_M + 650, Y0_M - 820)]
            ),
        ),
    ]


def build_audit_folder(root: Path, *, with_zones: bool = True) -> AuditFixture:
    """Write inputs under ``root/inputs`` and an audit output folder at ``root/out``.

    Parameters
    ----------
    root : Path
        Empty or new folder.
    with_zones : bool
        Write ``zones/flood_prone.gpkg`` and ``zones/tamsel_river.gpkg``.

    Returns
    -------
    AuditFixture
    """
    root = Path(root)
    inputs, out = root / "inputs", root / "out"
    inputs.mkdir(parents=True, exist_ok=True)
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    crs = f"EPSG:{FIXTURE_EPSG}"
    transform = _transform()
    cell_area_m2 = CELL_M * CELL_M

    dem = _dem()
    dem_path = inputs / "alderwane_dem.tif"
    _write_tif(dem_path, dem, -9999.0, cog=False)
    slope = _slope_pct(dem)
    _write_tif(out / "slope_pct.tif", slope, float("nan"), cog=True)

    rulebook_path = inputs / "rules.toml"
    rulebook_path.write_text(RULEBOOK_TEXT, encoding="utf-8")

    flood = Polygon(
        [(X0_M, Y0_M - 560), (X0_M + 200, Y0_M - 560), (X0_M + 260, Y0_M - ROWS * CELL_M), (X0_M, Y0_M - ROWS * CELL_M)]
    )
    river = LineString([(X0_M + 5, Y0_M - 420), (X0_M + 120, Y0_M - 610), (X0_M + 150, Y0_M - ROWS * CELL_M + 5)])
    zone_input_path = inputs / "corrin_bay_flood_prone.gpkg"
    gpd.GeoDataFrame({"name": ["flood_prone"]}, geometry=[flood], crs=crs).to_file(zone_input_path, layer="zones")
    flood_mask = rasterio.features.rasterize([flood], out_shape=(ROWS, COLS), transform=transform).astype(bool)

    parcels = _parcels()
    parcels_input_path = inputs / "alderwane_parcels.gpkg"
    gpd.GeoDataFrame(
        {"lot_no": [p[0] for p in parcels], "zone_code": [p[1] for p in parcels]},
        geometry=[p[2] for p in parcels],
        crs=crs,
    ).to_file(parcels_input_path, layer="parcels")

    conflict = np.full((ROWS, COLS), 255, dtype=np.uint8)
    rows_out = []
    hist_edges = [float(v) for v in range(0, 101)] + [float("inf")]
    limits = list(range(10, 31))
    per_class_cells: dict[str, list[np.ndarray]] = {}
    for pid, value, geom in parcels:
        cname = CLASS_OF_VALUE.get(value, "no_rule")
        label, dev, limit, forbid = CLASSES.get(cname, ("", False, None, ()))
        mask = rasterio.features.rasterize([geom], out_shape=(ROWS, COLS), transform=transform).astype(bool)
        s = slope[mask]
        valid = ~np.isnan(s)
        evaluated_m2 = float(valid.sum() * cell_area_m2)
        over = (slope >= limit) & mask if limit is not None else np.zeros_like(mask)
        zone_hit = flood_mask & mask if "flood_prone" in forbid else np.zeros_like(mask)
        if cname != "no_rule":
            bits = over.astype(np.uint8) | (zone_hit.astype(np.uint8) << 1)
            conflict[mask] = bits[mask]
            per_class_cells.setdefault(cname, []).append(s[valid])
        over_m2 = float(over.sum() * cell_area_m2)
        near_m2 = float(((slope >= limit - REVIEW_BAND_PCT) & mask).sum() * cell_area_m2) if limit is not None else 0.0
        conflict_m2 = float(((over | zone_hit) & mask).sum() * cell_area_m2)
        zone_m2 = float((flood_mask & mask).sum() * cell_area_m2)
        share = conflict_m2 / evaluated_m2 if evaluated_m2 else float("nan")
        reasons = []
        if cname == "no_rule":
            verdict = "no_rule"
            reasons.append(f"class value {value!r} has no rule")
        elif share >= 0.05:
            verdict = "conflict"
            if over_m2:
                reasons.append(f"{over_m2 / evaluated_m2:.1%} of the area is at or over {limit:g} %")
            if zone_hit.any():
                reasons.append("inside flood_prone, which the class forbids")
        elif near_m2 > 0 or conflict_m2 > 0:
            verdict = "review"
            reasons.append(f"slope within {REVIEW_BAND_PCT:g} % of the {limit:g} % limit")
        else:
            verdict = "consistent"
        area_m2 = float(geom.area)
        rows_out.append(
            {
                "parcel_id": pid,
                "class_value": value,
                "class_name": cname,
                "area_m2": area_m2,
                "covered_m2": area_m2,
                "evaluated_m2": evaluated_m2,
                "evaluated_share": evaluated_m2 / area_m2,
                "slope_mean_pct": float(np.mean(s[valid])),
                "slope_max_pct": float(np.max(s[valid])),
                "max_slope_pct": limit if limit is not None else "",
                "over_limit_m2": over_m2,
                "over_limit_share": over_m2 / evaluated_m2,
                "near_limit_m2": near_m2,
                "conflict_m2": conflict_m2,
                "conflict_share": share,
                "zone_flood_prone_m2": zone_m2,
                "zone_flood_prone_share": zone_m2 / area_m2,
                "verdict": verdict,
                "reasons": " | ".join(reasons),
                "geometry_note": "",
            }
        )
    _write_tif(out / "conflict.tif", conflict, 255, cog=True)

    columns = list(rows_out[0])
    with open(out / "parcels.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=columns)
        w.writeheader()
        w.writerows(rows_out)
    gdf = gpd.GeoDataFrame([{k: v for k, v in r.items()} for r in rows_out], geometry=[p[2] for p in parcels], crs=crs)
    gdf["max_slope_pct"] = [r["max_slope_pct"] if r["max_slope_pct"] != "" else np.nan for r in rows_out]
    gdf.to_file(out / "parcels.gpkg", layer="parcels")

    class_rows = []
    for cname in list(CLASSES) + ["no_rule"]:
        rs = [r for r in rows_out if r["class_name"] == cname]
        label, dev, limit, _ = CLASSES.get(cname, ("No rule", False, None, ()))
        ev = sum(r["evaluated_m2"] for r in rs)
        cf = sum(r["conflict_m2"] for r in rs)
        class_rows.append(
            {
                "class_name": cname,
                "label": label,
                "development": str(dev).lower(),
                "parcels": len(rs),
                "area_m2": sum(r["area_m2"] for r in rs),
                "evaluated_m2": ev,
                "compliant_m2": ev - cf,
                "conflict_m2": cf,
                "conflict_share": cf / ev if ev else "",
                "over_limit_m2": sum(r["over_limit_m2"] for r in rs),
                "n_consistent": sum(r["verdict"] == "consistent" for r in rs),
                "n_conflict": sum(r["verdict"] == "conflict" for r in rs),
                "n_review": sum(r["verdict"] == "review" for r in rs),
                "n_no_data": sum(r["verdict"] == "no_data" for r in rs),
            }
        )
    with open(out / "classes.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(class_rows[0]))
        w.writeheader()
        w.writerows(class_rows)

    valid_all = ~np.isnan(slope)
    dem_land_m2 = float(valid_all.sum() * cell_area_m2)
    within_m2 = float((slope[valid_all] < REFERENCE_LIMIT_PCT).sum() * cell_area_m2)
    dev_m2 = sum(r["area_m2"] for r in rows_out if CLASSES.get(r["class_name"], (0, False))[1])
    sens_classes, hist_classes = {}, {}
    all_dev = []
    for cname, chunks in per_class_cells.items():
        vals = np.concatenate(chunks)
        sens_classes[cname] = [float((vals >= lim).mean()) for lim in limits]
        counts, _ = np.histogram(np.minimum(vals, 100.0 + 0.5), bins=[*range(0, 101), 1e9])
        hist_classes[cname] = [float(c * cell_area_m2) for c in counts]
        if CLASSES[cname][1]:
            all_dev.append(vals)
    dev_vals = np.concatenate(all_dev)
    verdicts = [r["verdict"] for r in rows_out]
    total_ev = sum(r["evaluated_m2"] for r in rows_out if r["class_name"] != "no_rule")
    total_cf = sum(r["conflict_m2"] for r in rows_out)
    summary = {
        "tool": "landcheck",
        "version": __version__,
        "caution": "Screening aid only - not a survey or legal determination.",
        "totals": {
            "parcels": len(rows_out),
            "area_m2": sum(r["area_m2"] for r in rows_out),
            "evaluated_m2": total_ev,
            "conflict_m2": total_cf,
            "conflict_share": total_cf / total_ev,
            "verdict_counts": {
                v: verdicts.count(v) for v in ("consistent", "conflict", "review", "no_data", "no_rule")
            },
        },
        "capability": {
            "dem_land_m2": dem_land_m2,
            "land_within_limit_m2": within_m2,
            "land_within_limit_share": within_m2 / dem_land_m2,
            "reference_limit_pct": REFERENCE_LIMIT_PCT,
            "classified_development_m2": dev_m2,
            "classified_development_share": dev_m2 / dem_land_m2,
        },
        "classes": class_rows,
        "sensitivity": {
            "limits_pct": limits,
            "classes": sens_classes,
            "all_development": [float((dev_vals >= lim).mean()) for lim in limits],
        },
        "slope_histogram": {"bin_edges_pct": hist_edges, "classes": hist_classes},
        "conflict_raster_bits": ["slope", "flood_prone"],
        "warnings": ["parcel 106: class value 'X9' has no rule in rules.toml; it was not evaluated."],
        "manifest": {
            "started_utc": STARTED_UTC,
            "inputs": [
                {"role": "dem", "path": str(dem_path), "sha256": _sha256(dem_path)},
                {"role": "parcels", "path": str(parcels_input_path), "sha256": _sha256(parcels_input_path)},
                {"role": "zone", "path": str(zone_input_path), "sha256": _sha256(zone_input_path)},
            ],
            "rulebook": {"path": str(rulebook_path), "sha256": _sha256(rulebook_path), "text": RULEBOOK_TEXT},
            "parameters": {
                "slope_method": "horn",
                "review_band_pct": REVIEW_BAND_PCT,
                "reference_limit_pct": REFERENCE_LIMIT_PCT,
                "tile_size": 512,
                "z_unit": "m",
            },
            "crs_wkt": rasterio.crs.CRS.from_epsg(FIXTURE_EPSG).to_wkt(),
            "software": {
                "landcheck": __version__,
                "numpy": np.__version__,
                "rasterio": rasterio.__version__,
                "geopandas": gpd.__version__,
            },
        },
    }
    (out / "summary.json").write_text(json.dumps(summary, indent=2), encoding="utf-8")

    if with_zones:
        (out / "zones").mkdir()
        gpd.GeoDataFrame({"name": ["flood_prone"]}, geometry=[flood], crs=crs).to_file(
            out / "zones" / "flood_prone.gpkg", layer="flood_prone"
        )
        gpd.GeoDataFrame({"name": ["Tamsel River"]}, geometry=[river], crs=crs).to_file(
            out / "zones" / "tamsel_river.gpkg", layer="tamsel_river"
        )
    return AuditFixture(out, dem_path, parcels_input_path, rulebook_path, zone_input_path)


if __name__ == "__main__":  # pragma: no cover - manual inspection helper
    import sys

    fx = build_audit_folder(Path(sys.argv[1] if len(sys.argv) > 1 else "/tmp/landcheck-fixture"))
    print(fx.out_dir)
