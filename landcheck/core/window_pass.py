"""The audit's one window pass: the overlay plan and the per-window task (slope, zone bits, coverage, sums).

:func:`build_plan` turns the rulebook and the per-parcel rules into the arrays
the compiled reduction reads; :class:`WindowJob` is the picklable task the
engine (:mod:`landcheck.engine.backends`) maps over the DEM windows.  With a
capability spec the same task also classes every cell for the land-capability
map and sums those areas per zoning class, so the capability map needs no
second slope pass.
"""

from __future__ import annotations

import threading
from typing import NamedTuple

import numpy as np

from landcheck.engine.handles import ThreadLocalHandles
from landcheck.engine.windows import slope_window
from landcheck.errors import InputDataError
from landcheck.geo.grid import Window
from landcheck.inputs.dem import DemSource
from landcheck.inputs.rulebook import Rulebook
from landcheck.overlay.coverage import CoverageBuffers, coverage_triplets_aligned, prepare_polygons
from landcheck.overlay.sums import ROLE_PARCEL, OverlayPlan, accumulate_window
from landcheck.terrain.slope import SlopeMethod, gradient_to_unit
from landcheck.verdicts.evaluate import SENSITIVITY_LIMITS_PCT

__all__ = ["WindowJob", "WindowOutput", "build_plan"]


def build_plan(
    rules: Rulebook,
    class_names: np.ndarray,
    area_factor: np.ndarray,
    ground_factor: float,
    zones=None,
    piece_parcel=None,
    piece_role=None,
) -> OverlayPlan:
    by = {c.name: c for c in rules.classes}
    class_idx = {c.name: i for i, c in enumerate(rules.classes)}
    zone_idx = {z.name: i for i, z in enumerate(rules.zones)}
    if len(rules.zones) > 7:
        raise InputDataError(
            f"{rules.path}: {len(rules.zones)} zones defined; at most 7 fit the conflict raster's bits."
        )
    columns = zones.columns if zones is not None else []
    limits = set(float(x) for x in SENSITIVITY_LIMITS_PCT)
    for c in rules.classes:
        if c.max_slope_pct is not None:
            limits.add(c.max_slope_pct)
            limits.add(c.max_slope_pct - c.review_band_pct)
    thresholds = np.array(sorted(limits))
    n = len(class_names)
    limit_index = np.full(n, -1, np.int64)
    near_index = np.full(n, -1, np.int64)
    raster_forbid = np.zeros(n, np.uint32)
    zone_forbid = np.zeros(n, np.uint32)
    cidx = np.full(n, -1, np.int64)
    for name in set(class_names):
        if name not in by:
            continue
        sel = class_names == name
        c = by[name]
        cidx[sel] = class_idx[name]
        if c.max_slope_pct is not None:
            limit_index[sel] = int(np.searchsorted(thresholds, c.max_slope_pct))
            near_index[sel] = int(np.searchsorted(thresholds, c.max_slope_pct - c.review_band_pct))
        rbits = zbits = 0
        for zn in c.forbidden_zones:
            zbits |= 1 << zone_idx[zn]
            for col in columns:
                if col.zone_index == zone_idx[zn] and col.raster_channel >= 0:
                    rbits |= 1 << col.channel_for(c.context)
        raster_forbid[sel] = rbits
        zone_forbid[sel] = zbits
    piece_parcel = np.empty(0, np.int64) if piece_parcel is None else piece_parcel
    piece_role = np.empty(0, np.int64) if piece_role is None else piece_role
    geom_parcel = np.concatenate([np.arange(n, dtype=np.int64), piece_parcel])
    geom_role = np.concatenate([np.full(n, ROLE_PARCEL, np.int64), piece_role])
    col_channel = np.array([c.raster_channel for c in columns], np.int64)
    col_zone = np.array([c.zone_index if c.zone_index is not None else -1 for c in columns], np.int64)
    return OverlayPlan(
        thresholds,
        limit_index,
        near_index,
        raster_forbid,
        zone_forbid,
        area_factor,
        cidx,
        len(rules.classes),
        geom_parcel,
        geom_role,
        col_channel,
        col_zone,
        rules.capability_limit_pct,
        ground_factor,
        zones.parcel_channels(rules, class_names) if zones is not None else None,
    )


class WindowOutput(NamedTuple):
    """What one window hands back: the sums always; rasters and capability codes only when asked for."""

    sums: object  # landcheck.overlay.sums.WindowSums
    slope_pct: np.ndarray | None
    conflict: np.ndarray | None
    capability_codes: np.ndarray | None = None
    capability_m2: np.ndarray | None = None  # (n_classes + 1, N_CODES)


class WindowJob(ThreadLocalHandles):
    """The per-window task: slope, zone bits, exact coverage, sums (and capability codes).  Picklable.

    Parameters
    ----------
    dem : DemSource
    method : SlopeMethod
    geoms : ndarray of shapely geometries
        Parcels, then their zone pieces (the plan's geometry order).
    plan : OverlayPlan
    zones : landcheck.zones.prepare.ZoneSet, optional
    capability : landcheck.verdicts.capability.CapabilitySpec, optional
        Also class every cell and sum the capability areas per zoning class.
    keep_rasters : bool
        Hand back the slope and conflict tiles (False: nothing to write, less to ship from workers).
    """

    def __init__(
        self,
        dem: DemSource,
        method: SlopeMethod,
        geoms: np.ndarray,
        plan: OverlayPlan,
        zones=None,
        capability=None,
        keep_rasters: bool = True,
    ):
        self.dem = dem
        self.method = method
        self.polygons = prepare_polygons(geoms)  # flattened once; each window picks what meets it
        self.all_index = np.arange(len(geoms), dtype=np.int64)
        self.plan = plan
        self.zones = zones
        self.capability = capability
        self.keep_rasters = keep_rasters
        self._local = threading.local()  # per-thread reusable coverage buffers

    def __call__(self, win: Window) -> WindowOutput:
        g = self.dem.grid
        grad = slope_window(self.dem, win, self.method)
        slope_pct = gradient_to_unit(grad, "percent")
        zone_bits = self.zones.bits(win) if self.zones is not None else None
        land_mask = self.zones.land(win) if self.zones is not None else None
        buffers = getattr(self._local, "buffers", None)
        if buffers is None:
            buffers = self._local.buffers = CoverageBuffers()
        trip = coverage_triplets_aligned(self.polygons, g.transform, g.height, g.width, win, buffers=buffers)
        rows = np.arange(win.row_off, win.row_off + win.height)
        cell_area = g.cell_area_m2(rows)
        sums, conflict = accumulate_window(
            slope_pct, zone_bits, cell_area, self.all_index, tuple(trip), self.plan, land_mask
        )
        codes = cap_m2 = None
        if self.capability is not None:
            from landcheck.verdicts.capability import accumulate_capability

            codes = self.capability.window_codes(g, win, slope_pct, zone_bits, land_mask)
            cap_m2 = accumulate_capability(codes, cell_area, self.all_index, tuple(trip), self.plan)
        if not self.keep_rasters:
            return WindowOutput(sums, None, None, None, cap_m2)
        return WindowOutput(sums, slope_pct, conflict, codes, cap_m2)
