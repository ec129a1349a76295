"""Drafted reclassification: split each conflicting parcel into the part that keeps its class and the part that breaks it.

For a parcel with verdict ``conflict`` the *non-compliant part* is the
parcel's area that breaks its class rule, exactly as the audit counts it:

* cells with slope at or over the class limit, and cells inside a raster zone
  the class forbids (HAND, sea-level rise), as polygons aligned to the DEM
  grid (``rasterio.features.shapes`` of the breach mask over the parcel's
  window, 4-connected), **intersected with the parcel polygon**;
* plus the parcel's exact piece inside the vector zones the class forbids
  (easements, flood polygons), the same piece the audit counts.

Before any minimum mapping unit is applied, the non-compliant area therefore
equals the audit's ``conflict_m2`` (the same exact-coverage union), and the
compliant part is the rest of the parcel.

Minimum mapping unit (``mmu_m2``, ground m²)
-------------------------------------------
Slivers are merged into the part around them, in two passes:

1. every polygon of the non-compliant part smaller than the unit becomes
   compliant (it joins the parcel's compliant part);
2. then every polygon of the compliant part smaller than the unit becomes
   non-compliant.

Non-compliant slivers go first, so an isolated steep patch below the unit
never changes a parcel's class.  A parcel whose whole breach is smaller
than the unit keeps one (compliant) part; one whose compliant remainder is
smaller than the unit is proposed whole.  Areas are ground areas
(:func:`landcheck.geo.ground_area.ground_areas`, geodesic).

The non-compliant part is proposed for the class's ``designated_class``
(rulebook); the compliant part keeps its class.
"""

from __future__ import annotations

import logging
import math

import numpy as np

from landcheck.errors import InputDataError, RuleFileError
from landcheck.geo.grid import GridSpec, Window
from landcheck.geo.shapes import mask_union, polygonal_part
from landcheck.inputs.rulebook import Rulebook
from landcheck.overlay.sums import ROLE_FORBIDDEN_PIECE, OverlayPlan

__all__ = ["PART_COMPLIANT", "PART_NON_COMPLIANT", "breach_mask", "draft_reclassification"]

logger = logging.getLogger(__name__)

PART_COMPLIANT = "compliant"
PART_NON_COMPLIANT = "non_compliant"


def breach_mask(
    slope_pct: np.ndarray, limit_pct: float | None, zone_bits: np.ndarray | None, forbid_bits: int
) -> np.ndarray:
    """Cells that break a class rule (pure kernel).

    Parameters
    ----------
    slope_pct : ndarray (h, w)
        Slope in percent, NaN where undefined (never a breach of the slope rule).
    limit_pct : float or None
        The class limit; a cell at or over it breaks the rule ("or over").
    zone_bits : ndarray (h, w) of uint32, or None
        Raster-zone mask (bit c = raster channel c).
    forbid_bits : int
        Raster channels the class forbids.

    Returns
    -------
    ndarray (h, w) of bool

    Examples
    --------
    >>> breach_mask(np.array([[17.9, 18.0, np.nan]]), 18.0, None, 0).tolist()
    [[False, True, False]]
    """
    s = np.asarray(slope_pct)
    out = np.zeros(s.shape, bool)
    if limit_pct is not None and math.isfinite(limit_pct):
        out |= np.isfinite(s) & (s.astype(np.float64) >= limit_pct)
    if zone_bits is not None and forbid_bits:
        out |= (zone_bits & np.uint32(forbid_bits)) != 0
    return out


def _cell_window(grid: GridSpec, bounds) -> Window | None:
    """The smallest window of whole cells covering ``bounds`` (clipped to the raster); None when outside."""
    t = grid.transform
    xmin, ymin, xmax, ymax = bounds
    c0 = math.floor((xmin - t.c) / t.a)
    c1 = math.ceil((xmax - t.c) / t.a)
    r0 = math.floor((ymax - t.f) / t.e)
    r1 = math.ceil((ymin - t.f) / t.e)
    c0, r0 = max(c0, 0), max(r0, 0)
    c1, r1 = min(c1, grid.width), min(r1, grid.height)
    if c1 <= c0 or r1 <= r0:
        return None
    return Window(r0, c0, r1 - r0, c1 - c0)


def _ground(geoms, crs_wkt: str) -> np.ndarray:
    import geopandas as gpd

    from landcheck.geo.ground_area import ground_areas

    if len(geoms) == 0:
        return np.empty(0)
    return ground_areas(gpd.GeoDataFrame(geometry=list(geoms), crs=crs_wkt), crs_wkt)[0]


def _move_slivers(src, dst, mmu_m2: float, crs_wkt: str, grid_size: float):
    """Move the parts of ``src`` smaller than ``mmu_m2`` (ground m²) into ``dst``."""
    import shapely

    parts = shapely.get_parts(src)
    if len(parts):
        small = _ground(parts, crs_wkt) < mmu_m2
        if small.any():
            dst = shapely.union_all([dst, *parts[small]], grid_size=grid_size)
            src = shapely.union_all(parts[~small], grid_size=grid_size) if (~small).any() else shapely.MultiPolygon()
    return src, dst


def _apply_mmu(compliant, non_compliant, mmu_m2: float, crs_wkt: str, grid_size: float):
    """Merge slivers below ``mmu_m2`` (ground m²) into the other part (see the module notes)."""
    if mmu_m2 <= 0:
        return compliant, non_compliant
    non_compliant, compliant = _move_slivers(non_compliant, compliant, mmu_m2, crs_wkt, grid_size)
    compliant, non_compliant = _move_slivers(compliant, non_compliant, mmu_m2, crs_wkt, grid_size)
    return polygonal_part(compliant), polygonal_part(non_compliant)


#: overlay precision as a share of the cell size: the set operations snap-round to this grid
#: (GEOS OverlayNG), so no part carries a zero-width spike where a cell edge meets a parcel edge
_PRECISION_OF_CELL = 1e-7


def _grid_size(grid: GridSpec) -> float:
    t = grid.transform
    return min(abs(t.a), abs(t.e)) * _PRECISION_OF_CELL


def _as_multi(g):
    import shapely

    if g.geom_type == "Polygon":
        return shapely.MultiPolygon([g])
    return g


class _SplitTask:
    """Split one conflicting parcel (by index) into its compliant and non-compliant parts (picklable)."""

    def __init__(self, dem, method, geoms, plan: OverlayPlan, zones, piece_of: dict, grid_size: float, mmu: float):
        self.dem = dem
        self.method = method
        self.geoms = geoms
        self.plan = plan
        self.zones = zones
        self.piece_of = piece_of
        self.grid_size = grid_size
        self.mmu = mmu

    def __call__(self, i: int):
        import shapely

        from landcheck.engine.windows import slope_window
        from landcheck.terrain.slope import gradient_to_unit

        g, plan, zones, gs = self.dem.grid, self.plan, self.zones, self.grid_size
        parcel = self.geoms[i]
        breach = shapely.MultiPolygon()
        win = _cell_window(g, parcel.bounds)
        if win is not None:
            slope_pct = gradient_to_unit(slope_window(self.dem, win, self.method), "percent")
            limit = plan.thresholds_pct[plan.limit_index[i]] if plan.limit_index[i] >= 0 else None
            zb = zones.bits(win) if zones is not None else None
            mask = breach_mask(slope_pct, limit, zb, int(plan.raster_forbid_bits[i]))
            breach = mask_union(mask, g.window_transform(win))
        if i in self.piece_of:
            breach = shapely.union_all([breach, *self.piece_of[i]])
        non_compliant = polygonal_part(shapely.intersection(parcel, breach, grid_size=gs))
        compliant = polygonal_part(shapely.difference(parcel, non_compliant, grid_size=gs))
        return _apply_mmu(compliant, non_compliant, self.mmu, g.crs_wkt, gs)


def draft_reclassification(
    dem,
    settings,
    parcels,
    geoms: np.ndarray,
    plan: OverlayPlan,
    rules: Rulebook,
    pr,
    *,
    zones=None,
    mmu_m2: float = 0.0,
    engine=None,
):
    """Split every conflicting parcel into a compliant and a non-compliant part (see the module notes).

    Parameters
    ----------
    dem : landcheck.inputs.dem.DemSource
    settings : AuditSettings, SlopeMethod or str
        The slope method (``settings.method`` when given an AuditSettings).
    parcels : pandas.DataFrame
        The audit's per-parcel table in parcel order (``parcel_id``, ``class_value``, ``verdict``).
    geoms : ndarray of shapely geometries
        The audit's geometries: parcels, then their zone pieces (``all_geoms``).
    plan : OverlayPlan
    rules : Rulebook
    pr : landcheck.verdicts.evaluate.ParcelRules
    zones : landcheck.zones.prepare.ZoneSet, optional
    mmu_m2 : float
        Minimum mapping unit in ground m² (>= 0; 0 keeps every polygon).
    engine : landcheck.engine.backends.Engine, optional
        Where the per-parcel splits run (default: this thread); parts come back in parcel order, so
        the result is the same on every engine.

    Returns
    -------
    parts : geopandas.GeoDataFrame
        One row per part: ``parcel_id, part, current_class, proposed_class, current_value, proposed_value,
        area_m2`` and the (Multi)Polygon in the DEM's CRS.
    moves : pandas.DataFrame
        ``from_class, to_class, parcels, area_m2``: area proposed to move between classes.

    Raises
    ------
    RuleFileError
        A class with conflicting parcels has no ``designated_class``.
    InputDataError
        ``mmu_m2`` negative or not a number, or a table that does not match the parcels.
    """
    import geopandas as gpd
    import pandas as pd

    from landcheck.terrain.slope import SlopeMethod
    from landcheck.verdicts.evaluate import Verdict

    try:
        mmu = float(mmu_m2)
    except (TypeError, ValueError):
        mmu = float("nan")
    if not math.isfinite(mmu) or mmu < 0:
        raise InputDataError(
            f"drafted reclassification: minimum mapping unit {mmu_m2!r}; expected an area in m² >= 0 (e.g. 500)."
        )
    method = SlopeMethod.from_user(getattr(settings, "method", settings))
    n = len(pr.class_name)
    if len(parcels) != n:
        raise InputDataError(
            f"drafted reclassification: the parcel table has {len(parcels)} rows for {n} parcels; "
            "pass the audit's per-parcel table in parcel order."
        )
    g = dem.grid
    crs_wkt = g.crs_wkt
    gs = _grid_size(g)
    verdict = parcels["verdict"].to_numpy().astype(str)
    todo = np.flatnonzero(verdict == Verdict.CONFLICT)
    by = {c.name: c for c in rules.classes}
    missing = sorted({pr.class_name[i] for i in todo if by[pr.class_name[i]].designated_class is None})
    if missing:
        counts = {m: int((pr.class_name[todo] == m).sum()) for m in missing}
        raise RuleFileError(
            f"{rules.path}: class {missing[0]!r} has {counts[missing[0]]} conflicting parcels but no designated_class; "
            f'add designated_class = "<class>" to [classes.{missing[0]}] (the class proposed for the part that '
            "breaks its rule)" + (f"; also missing for: {', '.join(missing[1:])}" if len(missing) > 1 else "") + "."
        )
    piece_of: dict[int, list] = {}
    for gi in np.flatnonzero(plan.geom_role == ROLE_FORBIDDEN_PIECE):
        piece_of.setdefault(int(plan.geom_parcel[gi]), []).append(geoms[gi])
    ids = parcels["parcel_id"].to_numpy() if "parcel_id" in parcels.columns else np.arange(1, n + 1)
    values = parcels["class_value"].astype(str).to_numpy() if "class_value" in parcels.columns else np.full(n, "")

    if engine is None:
        from landcheck.engine.backends import Engine

        engine = Engine.from_user("threads", 1)
    task = _SplitTask(dem, method, geoms, plan, zones, piece_of, gs, mmu)
    rows = []
    for i, (compliant, non_compliant) in engine.map(task, [int(i) for i in todo]):
        name = pr.class_name[i]
        cls = by[name]
        target = by[cls.designated_class]
        for part, geom, proposed in ((PART_COMPLIANT, compliant, cls), (PART_NON_COMPLIANT, non_compliant, target)):
            if geom.is_empty:
                continue
            rows.append(
                {
                    "parcel_id": ids[i],
                    "part": part,
                    "current_class": name,
                    "proposed_class": proposed.name,
                    "current_value": values[i],
                    "proposed_value": values[i] if proposed is cls else proposed.values[0],
                    "geometry": _as_multi(geom),
                }
            )
    cols = ["parcel_id", "part", "current_class", "proposed_class", "current_value", "proposed_value", "area_m2"]
    if not rows:
        empty = gpd.GeoDataFrame({c: [] for c in cols}, geometry=[], crs=crs_wkt)
        return empty, pd.DataFrame({"from_class": [], "to_class": [], "parcels": [], "area_m2": []})
    gdf = gpd.GeoDataFrame(rows, geometry="geometry", crs=crs_wkt)
    gdf["area_m2"] = _ground(gdf.geometry.values, crs_wkt)
    gdf = gdf[cols + ["geometry"]]
    nc = gdf[gdf["part"] == PART_NON_COMPLIANT]
    moves = (
        nc.groupby(["current_class", "proposed_class"], sort=True)
        .agg(parcels=("parcel_id", "nunique"), area_m2=("area_m2", "sum"))
        .reset_index()
        .rename(columns={"current_class": "from_class", "proposed_class": "to_class"})
    )
    logger.info(
        "drafted reclassification: %d conflicting parcels, %.0f m² proposed for other classes",
        len(todo),
        float(nc["area_m2"].sum()),
    )
    return gdf.reset_index(drop=True), moves
