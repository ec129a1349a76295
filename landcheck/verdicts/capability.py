"""Land-capability map: every cell classed by slope (a published class scheme) and hazard zones.

Scheme
------
Each cell with a slope gets the number of its slope class, 1..n, from a
slope-class scheme (:mod:`landcheck.terrain.slope_classes`).  The default is
``planning-6``, the land-use planning classes 0-3-8-18-30-50 %
(docs/references.md §7): 1 level to nearly level (0-3 %),
2 gently sloping to undulating (3-8 %), 3 undulating to rolling (8-18 %),
4 rolling to moderately steep (18-30 %), 5 steep (30-50 %), 6 very steep
(>= 50 %).  Breaks are "or over" at the lower edge, as slope limits are
written.  Any built-in scheme or user breaks can be given instead.

A cell inside a hazard zone keeps its slope class and gets the **hazard flag**
``+128`` (so 131 = slope class 3 in a hazard zone): the map is downgraded
without losing the slope information, and ``code & 127`` is always the slope
class.  Hazard zones are the rulebook's zones (all of them unless a subset is
named; report-only sea-rise scenarios never count):

* raster zones (HAND, sea-level rise) by their cells;
* vector zones (easements, flood polygons) where the zone covers **at least
  half of the cell's area** (exact coverage fraction >= 0.5).  Easements with
  widths per land-use context use the union of their strips (the widest).

Other codes: ``0`` no slope value (outside the DEM, nodata, the outer ring:
the GeoTIFF's nodata) and ``254`` sea (cells of the sea mask the rulebook's
sea-level or shoreline zones define: not land).

Per zoning class, :func:`accumulate_capability` sums the exact area of every
code inside the parcels of each class (exact cell-coverage fractions times
cell areas times the parcel's ground-area factor: the same weights as the
audit's ``covered_m2``), so the areas of one class add up to its parcels'
covered area.  The sums merge across windows by addition.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from landcheck.errors import RuleFileError
from landcheck.geo.grid import GridSpec, Window
from landcheck.inputs.rulebook import NO_RULE, Rulebook
from landcheck.overlay.coverage import coverage_triplets, coverage_triplets_aligned
from landcheck.overlay.sums import ROLE_PARCEL, OverlayPlan, quantize_area
from landcheck.terrain.slope_classes import (
    NO_CLASS,
    SlopeClassScheme,
    classify_slope,
    get_scheme,
    scheme_from_breaks,
)

__all__ = [
    "HAZARD_FLAG",
    "NO_VALUE",
    "N_CODES",
    "SEA",
    "CapabilitySpec",
    "CapabilityTotals",
    "accumulate_capability",
    "capability_sink",
    "capability_spec",
    "capability_table",
    "classify_capability",
    "run_capability",
    "write_capability_legend",
]

#: code of cells without a slope (the raster's nodata)
NO_VALUE = 0
#: added to the slope class of a cell inside a hazard zone
HAZARD_FLAG = 128
#: code of sea cells (not land)
SEA = 254
#: size of the code space (uint8)
N_CODES = 256
#: a vector hazard zone flags a cell when it covers at least this share of the cell's area
MIN_HAZARD_COVER = 0.5


@dataclass(frozen=True)
class CapabilitySpec:
    """How cells are classed (picklable; built by :func:`capability_spec`).

    Attributes
    ----------
    scheme : SlopeClassScheme
        Slope classes (at most 127).
    hazard_channels : int
        Bit mask of the raster-zone channels (``ZoneSet.raster_bits``) that count as hazard.
    hazard_geom : shapely geometry or None
        Union of the vector hazard zones in the DEM's CRS.
    hazard_zones : tuple of str
        Names of the rulebook zones that count as hazard.
    """

    scheme: SlopeClassScheme
    hazard_channels: int = 0
    hazard_geom: object | None = None
    hazard_zones: tuple[str, ...] = ()

    def window_codes(
        self,
        grid: GridSpec,
        win: Window,
        slope_pct: np.ndarray,
        zone_bits: np.ndarray | None,
        land_mask: np.ndarray | None = None,
    ) -> np.ndarray:
        """Capability codes of one window (see the module notes); reads no file."""
        hazard = np.zeros(slope_pct.shape, bool)
        if zone_bits is not None and self.hazard_channels:
            hazard |= (zone_bits & np.uint32(self.hazard_channels)) != 0
        if self.hazard_geom is not None:
            hazard |= self.vector_cover(grid, win) >= MIN_HAZARD_COVER
        return classify_capability(slope_pct, hazard, self.scheme, land_mask)

    def vector_cover(self, grid: GridSpec, win: Window) -> np.ndarray:
        """Exact share (0-1) of each cell of ``win`` covered by the vector hazard zones."""
        import shapely

        cover = np.zeros((win.height, win.width))
        if self.hazard_geom is None:
            return cover
        piece = shapely.clip_by_rect(self.hazard_geom, *grid.window_bounds(win))
        if piece.is_empty or piece.area == 0:
            return cover
        _, rr, cc, frac = coverage_triplets(
            np.array([piece], dtype=object), grid.window_transform(win), win.height, win.width
        )
        cover[rr, cc] = frac
        return cover

    def legend(self) -> list[dict]:
        """One record per code: code, label, slope class, lower/upper slope (%), hazard, sea."""
        s = self.scheme
        rows = [
            {
                "code": NO_VALUE,
                "label": "no slope value",
                "slope_class": None,
                "lower_pct": None,
                "upper_pct": None,
                "hazard": False,
                "sea": False,
            }
        ]
        uppers = list(s.lower_pct[1:]) + [None]
        for flag in (0, HAZARD_FLAG):
            for i, (lo, hi, lab) in enumerate(zip(s.lower_pct, uppers, s.labels)):
                rng = f"{lo:g}-{hi:g} %" if hi is not None else f">= {lo:g} %"
                rows.append(
                    {
                        "code": i + 1 + flag,
                        "label": f"{lab} ({rng})" + (", hazard zone" if flag else ""),
                        "slope_class": i + 1,
                        "lower_pct": lo,
                        "upper_pct": hi,
                        "hazard": bool(flag),
                        "sea": False,
                    }
                )
        rows.append(
            {
                "code": SEA,
                "label": "sea (not land)",
                "slope_class": None,
                "lower_pct": None,
                "upper_pct": None,
                "hazard": False,
                "sea": True,
            }
        )
        return rows

    def band_description(self) -> str:
        n = len(self.scheme.labels)
        return (
            f"capability: 1-{n} slope class of scheme {self.scheme.key} "
            f"(lower edges {', '.join(f'{b:g}' for b in self.scheme.lower_pct)} %), +{HAZARD_FLAG} in a hazard "
            f"zone, {SEA} sea, {NO_VALUE} no slope value"
        )


def resolve_capability_scheme(scheme: str | SlopeClassScheme | Sequence[float]) -> SlopeClassScheme:
    """The slope-class scheme of a capability map: a built-in key, a scheme, or inner breaks in percent.

    Raises
    ------
    RuleFileError
        Unknown scheme, bad breaks, or more classes than fit beside the hazard flag.
    """
    try:
        if isinstance(scheme, SlopeClassScheme):
            sch = scheme
        elif isinstance(scheme, str):
            sch = get_scheme(scheme)
        else:
            sch = scheme_from_breaks(list(scheme))
    except (ValueError, TypeError) as exc:
        raise RuleFileError(f"capability map: {exc}.") from None
    if len(sch.labels) >= HAZARD_FLAG:
        raise RuleFileError(
            f"capability map: scheme {sch.key!r} has {len(sch.labels)} classes; at most "
            f"{HAZARD_FLAG - 1} fit beside the hazard flag."
        )
    return sch


def capability_spec(
    rules: Rulebook, zones=None, *, scheme: str | SlopeClassScheme | list = "planning-6", hazard_zones=None
) -> CapabilitySpec:
    """Build the capability classing from the rulebook, its prepared zones and a slope-class scheme.

    Parameters
    ----------
    rules : Rulebook
    zones : landcheck.zones.prepare.ZoneSet, optional
        The audit's prepared zones (None when the rulebook has none).
    scheme : str, SlopeClassScheme or list of float
        A built-in scheme key (``planning-6``, ``fao-2006``), a scheme, or inner breaks in percent
        (e.g. ``[8, 18, 30]``).
    hazard_zones : list of str, optional
        Rulebook zones that count as hazard; default all of them.

    Raises
    ------
    RuleFileError
        Unknown scheme, bad breaks, more than 127 classes, or a hazard zone the rulebook does not define.
    """

    sch = resolve_capability_scheme(scheme)
    names = [z.name for z in rules.zones]
    if hazard_zones is None:
        chosen = tuple(names)
    else:
        chosen = tuple(hazard_zones)
        unknown = [z for z in chosen if z not in names]
        if unknown:
            raise RuleFileError(
                f"{rules.path}: capability hazard zone {unknown[0]!r} is not defined; defined zones: "
                f"{', '.join(names) or 'none'}."
            )
    bits = 0
    geoms = []
    if zones is not None:
        for col in zones.columns:
            if col.zone_index is None or rules.zones[col.zone_index].name not in chosen:
                continue
            if col.raster_channel >= 0:
                bits |= 1 << col.raster_channel
            else:
                geoms.extend(col.variants.values())
    geom = None
    if geoms:
        from landcheck.zones.prepare import union_by_tiles

        geom = union_by_tiles(geoms, zones.grid, zones.tile)  # zones is set: geoms come from its columns
        if geom.is_empty:
            geom = None
    return CapabilitySpec(sch, bits, geom, chosen)


def classify_capability(
    slope_pct: np.ndarray, hazard: np.ndarray, scheme: SlopeClassScheme, land_mask: np.ndarray | None = None
) -> np.ndarray:
    """Capability code of each cell (pure kernel).

    Parameters
    ----------
    slope_pct : ndarray (h, w)
        Slope in percent, NaN where undefined.
    hazard : ndarray (h, w) of bool
        Cells inside a hazard zone.
    scheme : SlopeClassScheme
    land_mask : ndarray (h, w) of bool, optional
        False on sea cells.

    Returns
    -------
    ndarray (h, w) of uint8
        Slope class 1..n, plus 128 in a hazard zone; 0 without a slope; 254 on the sea.

    Examples
    --------
    >>> s = np.array([[1.0, 10.0, 18.0, np.nan]])
    >>> classify_capability(s, np.array([[False, True, False, True]]), get_scheme("planning-6")).tolist()
    [[1, 131, 4, 0]]
    """
    cls = classify_slope(slope_pct, scheme)
    valid = cls != NO_CLASS
    code = np.where(valid, cls.astype(np.uint16) + 1, NO_VALUE)
    code = np.where(valid & np.asarray(hazard, bool), code + HAZARD_FLAG, code)
    if land_mask is not None:
        code = np.where(valid & ~np.asarray(land_mask, bool), SEA, code)
    return code.astype(np.uint8)


def accumulate_capability(
    codes: np.ndarray, cell_area_m2: np.ndarray, candidates: np.ndarray, triplets, plan: OverlayPlan
) -> np.ndarray:
    """Area (m²) of each capability code inside the parcels of each zoning class, for one window.

    Parameters
    ----------
    codes : ndarray (h, w) of uint8
        From :meth:`CapabilitySpec.window_codes`.
    cell_area_m2 : ndarray (h,)
        Map-plane area of one cell of each window row.
    candidates, triplets
        As for :func:`landcheck.overlay.sums.accumulate_window_reference` (pieces are ignored; parcels count).
    plan : OverlayPlan

    Returns
    -------
    ndarray (plan.n_classes + 1, N_CODES)
        Row ``i`` is rulebook class ``i``; the last row is parcels without a rule.  Merge windows by adding.
    """
    fi, rr, cc, frac = triplets
    out = np.zeros((plan.n_classes + 1, N_CODES))
    if len(fi) == 0:
        return out
    gi = candidates[fi]
    is_p = plan.geom_role[gi] == ROLE_PARCEL
    gp = plan.geom_parcel[gi[is_p]]
    rr, cc = rr[is_p], cc[is_p]
    a = quantize_area(frac[is_p] * cell_area_m2[rr] * plan.area_factor[gp])  # the audit's exact terms
    row = plan.class_index[gp]
    row = np.where(row < 0, plan.n_classes, row)
    flat = np.bincount(
        row * N_CODES + codes[rr, cc].astype(np.int64), weights=a, minlength=(plan.n_classes + 1) * N_CODES
    )
    return flat.reshape(plan.n_classes + 1, N_CODES)


@dataclass
class CapabilityTotals:
    """Whole-run accumulator of :func:`accumulate_capability` results."""

    n_classes: int
    area_m2: np.ndarray = field(init=False)

    def __post_init__(self):
        self.area_m2 = np.zeros((self.n_classes + 1, N_CODES))

    def add(self, sums: np.ndarray) -> None:
        self.area_m2 += sums


def capability_table(totals: CapabilityTotals, rules: Rulebook, spec: CapabilitySpec):
    """Long table: one row per zoning class and capability code (docs/confidence.md, capability)."""
    import pandas as pd

    names = [c.name for c in rules.classes] + [NO_RULE]
    legend = spec.legend()
    rows = []
    for i, name in enumerate(names):
        total = float(totals.area_m2[i].sum())
        if name == NO_RULE and total == 0:
            continue
        for leg in legend:
            a = float(totals.area_m2[i, leg["code"]])
            rows.append(
                {
                    "class_name": name,
                    "code": leg["code"],
                    "capability": leg["label"],
                    "slope_class": leg["slope_class"],
                    "hazard": leg["hazard"],
                    "area_m2": a,
                    "share": a / total if total > 0 else np.nan,
                }
            )
    return pd.DataFrame(rows)


def capability_sink(path: str | os.PathLike, grid: GridSpec, spec: CapabilitySpec, *, overwrite: bool = False):
    """A streamed COG writer for the capability codes (uint8, nodata 0, band description set)."""
    from landcheck.outputs.writers import RasterSink

    return RasterSink(
        path, grid, dtype="uint8", nodata=NO_VALUE, overwrite=overwrite, band_names=[spec.band_description()]
    )


def write_capability_legend(folder: str | os.PathLike, spec: CapabilitySpec) -> tuple[Path, Path]:
    """Write ``capability_legend.csv`` and ``capability_legend.json`` (codes, labels, slope ranges, source)."""
    import pandas as pd

    from landcheck.outputs.writers import write_csv, write_json

    folder = Path(folder)
    legend = spec.legend()
    csv = write_csv(folder / "capability_legend.csv", pd.DataFrame(legend))
    js = write_json(
        folder / "capability_legend.json",
        {
            "scheme": spec.scheme.key,
            "title": spec.scheme.title,
            "source": spec.scheme.source,
            "hazard_flag": HAZARD_FLAG,
            "hazard_zones": list(spec.hazard_zones),
            "hazard_vector_min_cover": MIN_HAZARD_COVER,
            "codes": legend,
        },
    )
    return csv, js


class _CapabilityTask:
    """One window of the stand-alone capability pass (picklable for worker processes and Dask)."""

    def __init__(self, dem, geoms, plan: OverlayPlan, spec: CapabilitySpec, method, zones):
        self.dem = dem
        self.geoms = np.asarray(geoms, dtype=object)
        self.plan = plan
        self.spec = spec
        self.method = method
        self.zones = zones
        self.parcel_idx = np.flatnonzero(plan.geom_role == ROLE_PARCEL)
        self._tree = None

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_tree"] = None  # rebuilt where the task runs
        return state

    def __call__(self, win: Window):
        import shapely

        from landcheck.engine.windows import slope_window
        from landcheck.terrain.slope import gradient_to_unit

        if self._tree is None:
            self._tree = shapely.STRtree(self.geoms[self.parcel_idx])
        g = self.dem.grid
        zones = self.zones
        slope_pct = gradient_to_unit(slope_window(self.dem, win, self.method), "percent")
        zb = zones.bits(win) if zones is not None else None
        land = zones.land(win) if zones is not None else None
        codes = self.spec.window_codes(g, win, slope_pct, zb, land)
        cand = self.parcel_idx[self._tree.query(shapely.box(*g.window_bounds(win)), predicate="intersects")]
        cand.sort()
        rows = np.arange(win.row_off, win.row_off + win.height)
        trip = coverage_triplets_aligned(self.geoms[cand], g.transform, g.height, g.width, win)
        return codes, accumulate_capability(codes, g.cell_area_m2(rows), cand, trip, self.plan)


def run_capability(
    dem,
    windows,
    geoms: np.ndarray,
    plan: OverlayPlan,
    rules: Rulebook,
    spec: CapabilitySpec,
    out_tif: str | os.PathLike | None,
    *,
    method,
    zones=None,
    workers: int | None = None,
    engine=None,
    progress=None,
    overwrite: bool = False,
):
    """A stand-alone window pass: slope, capability codes, per-class areas and (optionally) the COG.

    The audit folds the same classing into its own window pass instead
    (:class:`landcheck.core.window_pass.WindowJob` with a capability spec: same numbers, no second
    slope pass).  ``engine`` (:class:`landcheck.engine.backends.Engine`; default local threads with
    ``workers``) says where the windows run; the result is the same on every engine.

    Returns
    -------
    table : pandas.DataFrame
        From :func:`capability_table`.
    totals : CapabilityTotals
    """
    from landcheck.engine.backends import Engine

    if engine is None:
        engine = Engine.from_user("threads", workers)
    task = _CapabilityTask(dem, geoms, plan, spec, method, zones)
    totals = CapabilityTotals(plan.n_classes)
    sink = capability_sink(out_tif, dem.grid, spec, overwrite=overwrite) if out_tif is not None else None
    try:
        for win, (codes, sums) in engine.map(task, list(windows), progress=progress):
            totals.add(sums)
            if sink is not None:
                sink.write(win, codes)
    except BaseException:
        if sink is not None:
            sink.abort()
        raise
    if sink is not None:
        sink.close()
    return capability_table(totals, rules, spec), totals
