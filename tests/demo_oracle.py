"""Oracle for the demo area: planted-conflict counts computed without landcheck.

The demo generator (scripts/make_demo_area.py) makes the terrain, layers and parcels; this module only
counts, with its own Horn slope (scipy.ndimage.correlate with Horn's weights, docs/references.md §1),
its own sea connectivity (scipy.ndimage.label, 8-connected, docs/references.md §10), cell-centre
membership (rasterio.features.rasterize) and vector easement strips (shapely buffers of the generator's
centrelines).  It is approximate by design (cell centres instead of exact coverage), so tests compare with
a tolerance.

Run ``python tests/demo_oracle.py`` to print the counts for seed 7, size 1000.
"""

from __future__ import annotations

import importlib.util
import json
import sys
from functools import cache
from pathlib import Path

import numpy as np
import shapely
from affine import Affine
from rasterio import features
from scipy import ndimage

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_area"
GENERATOR = ROOT / "scripts" / "make_demo_area.py"


def load_generator():
    """Import scripts/make_demo_area.py as a module (it is a script, not part of the package)."""
    if "make_demo_area" in sys.modules:
        return sys.modules["make_demo_area"]
    spec = importlib.util.spec_from_file_location("make_demo_area", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look the module up while the class is built
    spec.loader.exec_module(module)
    return module


gen = load_generator()

#: Horn's weights for the east (p) and north (q) derivative times 8 h (docs/references.md §1)
_HORN_P = np.array([[-1.0, 0.0, 1.0], [-2.0, 0.0, 2.0], [-1.0, 0.0, 1.0]])
_HORN_Q = np.array([[1.0, 2.0, 1.0], [0.0, 0.0, 0.0], [-1.0, -2.0, -1.0]])


def horn_slope_pct(elev_m: np.ndarray, cell_m: float) -> np.ndarray:
    """Horn slope in percent; NaN on the outer ring and next to NaN cells."""
    z = elev_m.astype(np.float64)
    p = ndimage.correlate(z, _HORN_P, mode="constant", cval=np.nan) / (8.0 * cell_m)
    q = ndimage.correlate(z, _HORN_Q, mode="constant", cval=np.nan) / (8.0 * cell_m)
    return 100.0 * np.hypot(p, q)


def open_to_sea(mask: np.ndarray, sea: np.ndarray) -> np.ndarray:
    """Cells of ``mask`` in an 8-connected region of ``mask`` that holds sea cells."""
    labels, _ = ndimage.label(mask, structure=np.ones((3, 3), dtype=bool))
    touching = np.unique(labels[sea & mask])
    return np.isin(labels, touching[touching > 0]) & mask


@cache
def demo_counts(seed: int = 7, size: int = 1000) -> dict:
    """:func:`planted_conflicts` of the demo area the generator builds for ``seed`` and ``size``."""
    return planted_conflicts(*gen.build(seed, size))


def planted_conflicts(terrain, layers, parcels) -> dict:
    """Approximate per-kind conflict counts of the generated demo area, computed independently of landcheck.

    Slope and raster zones use cell-centre membership; easements use vector
    strips measured from the bank (centreline buffered by half the width).
    ``flood_hand`` is not estimated here.
    """
    rules = tomllib.loads((DEMO / "rulebook.toml").read_text(encoding="utf-8"))
    value_class = {v: name for name, c in rules["classes"].items() for v in c["values"]}
    cell = terrain.cell_m
    tr = Affine(cell, 0.0, 0.0, 0.0, -cell, gen.EXTENT_M)  # local (u, v) metres, row 0 at the north edge
    elev = np.where(terrain.void, np.nan, terrain.elev_m.astype(np.float64))
    slope = horn_slope_pct(elev, cell)
    geoms = [shapely.make_valid(p.geom) for p in parcels]
    ids = features.rasterize(
        [(g, k + 1) for k, g in enumerate(geoms)], out_shape=elev.shape, transform=tr, dtype=np.int32
    )
    sea = terrain.elev_m < 0
    with np.errstate(invalid="ignore"):
        low = (elev <= 1.0) & ~terrain.void
    connected = open_to_sea(low, sea) & ~sea
    enclosed_low = low & ~connected & ~sea
    flood3 = shapely.union_all([g for g, lvl in layers.flood if lvl >= 3])
    n = len(parcels) + 1
    flat_ids = ids.ravel()

    def per_parcel(mask):
        return np.bincount(flat_ids, weights=mask.ravel().astype(np.float64), minlength=n)

    frame = shapely.box(0.0, 0.0, gen.EXTENT_M, gen.EXTENT_M)
    valid = per_parcel(np.isfinite(slope))
    n_connected = per_parcel(connected)
    n_enclosed = per_parcel(enclosed_low)
    over_by_limit: dict = {}
    hits_by_parcel = []
    kinds = {"slope": 0, "shore_easement": 0, "river_easement": 0, "flood_high": 0, "sea_rise_1m": 0}
    kinds_large = dict.fromkeys(kinds, 0)  # zone breaches of at least min_breach_m2 only
    strips: dict = {}

    def strip_for(zname: str, width_m: float):
        if (zname, width_m) not in strips:
            if zname == "shore_easement":
                strips[zname, width_m] = layers.shoreline.buffer(width_m)
            else:
                strips[zname, width_m] = shapely.union_all(
                    [
                        layers.river_upper.buffer(gen.WIDTH_UPPER_M / 2 + width_m),
                        layers.river_lower.buffer(gen.WIDTH_LOWER_M / 2 + width_m),
                    ]
                )
        return strips[zname, width_m]

    per_class_conflict = {}
    enclosed_only = 0
    partly_outside = 0
    cell_area = cell * cell
    for k, (p, g) in enumerate(zip(parcels, geoms), start=1):
        cls = rules["classes"][value_class[p.zoning]]
        if not frame.contains(g):
            partly_outside += 1
        hit = set()
        breach_m2 = {}
        if cls.get("development") and "max_slope_pct" in cls:
            limit = cls["max_slope_pct"]
            if limit not in over_by_limit:
                with np.errstate(invalid="ignore"):
                    over_by_limit[limit] = per_parcel(slope >= limit)
            over = over_by_limit[limit][k]
            if valid[k] and over / valid[k] * 100 > cls["tolerance_pct"] and over * cell_area >= cls["min_breach_m2"]:
                hit.add("slope")
                breach_m2["slope"] = over * cell_area
        forb = set(cls.get("forbidden_zones", []))
        ctx = cls.get("context", "urban")
        for zname in ("shore_easement", "river_easement"):
            if zname not in forb:
                continue
            breach_m2[zname] = g.intersection(strip_for(zname, rules["zones"][zname]["width_m"][ctx])).area
            if breach_m2[zname] > 1.0:
                hit.add(zname)
        if "flood_high" in forb:
            breach_m2["flood_high"] = g.intersection(flood3).area
            if breach_m2["flood_high"] > 1.0:
                hit.add("flood_high")
        if "sea_rise_1m" in forb and n_connected[k] > 0:
            hit.add("sea_rise_1m")
            breach_m2["sea_rise_1m"] = n_connected[k] * cell_area
        for h in hit:
            if breach_m2[h] >= cls.get("min_breach_m2", 0.0):
                kinds_large[h] += 1
        if n_enclosed[k] > 0 and n_connected[k] == 0:
            enclosed_only += 1
        hits_by_parcel.append(sorted(hit))
        for h in hit:
            kinds[h] += 1
        if hit:
            per_class_conflict[value_class[p.zoning]] = per_class_conflict.get(value_class[p.zoning], 0) + 1
    zoning_counts = {}
    for p in parcels:
        zoning_counts[p.zoning] = zoning_counts.get(p.zoning, 0) + 1
    tag_counts = {}
    for p in parcels:
        for t in p.tags:
            tag_counts[t] = tag_counts.get(t, 0) + 1
    return {
        "parcels": len(parcels),
        "multipolygons": sum(isinstance(g, shapely.MultiPolygon) for g in (p.geom for p in parcels)),
        "invalid_rings": sum(not p.geom.is_valid for p in parcels),
        "small_lots_under_0_5_ha": sum(g.area < 5000.0 for g in geoms),
        "partly_outside_dem": partly_outside,
        "zoning": dict(sorted(zoning_counts.items())),
        "parcels_in_conflict_by_kind": kinds,
        "parcels_in_conflict_by_kind_min_breach": kinds_large,
        "parcels_in_conflict_by_class": dict(sorted(per_class_conflict.items())),
        "parcels_with_conflicts": int(sum(per_class_conflict.values())),
        "parcels_low_but_enclosed": enclosed_only,
        "design_tags": dict(sorted(tag_counts.items())),
        "elev_min_m": float(np.nanmin(elev)),
        "elev_max_m": float(np.nanmax(elev)),
        "connected_low_land_m2": float(np.count_nonzero(connected) * cell_area),
        "enclosed_low_land_m2": float(np.count_nonzero(enclosed_low) * cell_area),
        "land_share_slope_ge_18": float(np.nanmean(slope[~sea] >= 18.0)),
        "land_share_slope_ge_40": float(np.nanmean(slope[~sea] >= 40.0)),
        "_hits": hits_by_parcel,
    }


if __name__ == "__main__":
    counts = dict(demo_counts())
    counts.pop("_hits")
    print(json.dumps(counts, indent=2))
