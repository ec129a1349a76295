"""A country in one run: the audit split into regions, run as tasks on a Dask cluster, merged exactly.

:func:`audit_regions` writes the same output folder as :func:`landcheck.core.audit.audit`
(``parcels.csv``, ``classes.csv``, ``parcels.gpkg``, ``summary.json``, ``slope_pct.tif``,
``conflict.tif``, ``zones/cells.tif`` and ``report.html``, byte for byte), plus ``parcels.parquet``
(the per-parcel table as GeoParquet), without one process holding the parcels' geometries, the
per-parcel work or a whole raster:

1. **Layout.** The DEM grid's windows (``tile_cells``) are grouped into blocks of whole
   windows, the regions (:func:`plan_regions`).  A parcel belongs to the region holding the
   cell of its representative point (``shapely.point_on_surface``: inside the parcel, unlike a
   centroid); parcels with an empty geometry go to region 0 and touch no window.
2. **Driver** (this process).  The parcels are read part by part
   (:mod:`landcheck.inputs.partitions`: GeoParquet partitions, row groups, or chunks of
   features), each part validated as the single run validates the whole layer, and its
   geometries written to a per-region GeoParquet in the scratch folder; the driver keeps only
   per-parcel scalars (id, class value, ground area, region, the windows it touches).  The
   global hazard zones are prepared **once** for the whole DEM by
   :func:`landcheck.zones.prepare.prepare_zones` (their cell masks live on disk in a
   :class:`~landcheck.zones.cells.MaskStore` and are read per window by the regions).
3. **Region jobs** (:func:`run_region`, one Dask task each; each job is written to the scratch
   folder as the driver makes it and the task carries its path, :func:`run_region_saved`).  The window pass of
   :class:`landcheck.core.window_pass.WindowJob` over exactly the windows the region's
   parcels touch (the DEM is read only there, with the slope's halo), for the region's
   parcels and their vector-zone pieces.  Whole-area land figures are kept only for the
   windows of the region's own block, so every cell is counted once.  The per-parcel
   accumulators (integer quanta, :class:`landcheck.overlay.sums.Totals`) are saved to the
   scratch folder, atomically, with a marker naming the run's fingerprint.
   With rasters, the job also writes the slope and conflict tiles of its own block's windows
   to two GeoTIFFs in the scratch folder.  A cell of the conflict raster shows the parcel
   covering most of it (ties: the lower parcel index), and parcels of neighbouring regions
   reach into the block: the driver gives each job those too (its *halo*, from
   ``halo-K.parquet``), merged into its parcels in parcel order, so the job's coverage of
   every window of its block is the single run's; the halo's sums are dropped (and it has no
   class, so it adds nothing to the class histogram).
4. **Merge.** The regions' accumulators are added into one :class:`Totals` (exact integer
   additions: region order and layout change no bit), then verdicts, class table and summary
   are computed exactly as :func:`landcheck.core.run.run_audit` computes them.  The per-parcel
   table (verdicts and reasons) is evaluated and written slice by slice, :data:`TABLE_ROWS`
   parcels at a time (a parcel's row depends only on its own sums); the driver keeps only the
   numeric and categorical columns the class table and summary sum (same arrays, same pandas
   sums, same bits).
5. **Rasters and report.**  Every window lies in exactly one region's block, so the driver
   streams the final ``slope_pct.tif`` and ``conflict.tif`` window by window from the regions'
   tiles, in the single run's window order and through its writers
   (:func:`landcheck.core.audit.audit_raster_sinks`): the same bytes, one window in memory.
   ``zones/cells.tif`` comes from the zone masks as in the single run, and
   :func:`landcheck.evidence.report.build_report` reads the finished folder (``parcels.gpkg``
   back from disk: the driver holds no geometry).

Faults.  A worker lost mid-run: Dask reschedules its task on another worker (the job is
idempotent; its result file is replaced atomically).  A region that raises (bad input met only
there, e.g. an unreadable DEM tile): the run stops with that region's message; finished
regions stay in the scratch folder ``.NAME.regions`` beside the output and a rerun with the
same inputs and settings (same fingerprint: SHA-256 of every input file, the rulebook, the
settings and the layout) resumes them instead of redoing them.  The scratch folder is
removed once the output folder is published.

Not yet in a region run: confidence, the capability map and the drafted reclassification; they are
refused with a message.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import logging
import os
import shutil
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from landcheck.core.settings import AuditSettings
from landcheck.engine.memory import release_heap
from landcheck.errors import InputDataError, LandcheckWarning, RegionError
from landcheck.geo.grid import Window
from landcheck.inputs.rulebook import Rulebook
from landcheck.wording import count_text

__all__ = ["RegionLayout", "RegionError", "audit_regions", "plan_regions", "run_region", "DEFAULT_REGION_CELLS"]

logger = logging.getLogger(__name__)

#: ``regions="auto"``: regions of about this many cells per side (docs/scale.md, national-scale plan)
DEFAULT_REGION_CELLS = 6144
#: Dask event topic of per-region window progress
PROGRESS_TOPIC = "landcheck-region-progress"
#: the per-parcel tables are evaluated and written in slices of at most this many parcels (the row groups of
#: the scratch ``ordered.parquet``), so the driver never holds the whole table with its reasons
TABLE_ROWS = 50_000


# --------------------------------------------------------------------------- layout


@dataclass(frozen=True)
class RegionLayout:
    """Regions as blocks of whole windows: window rows ``row_edges[i] .. row_edges[i+1]``, likewise columns.

    >>> lay = plan_regions(4000, 4000, 1024, 4)
    >>> lay.n_regions, lay.row_edges, lay.col_edges
    (4, (0, 2, 4), (0, 2, 4))
    >>> lay.cells(3)
    (2048, 4000, 2048, 4000)
    """

    height: int
    width: int
    tile: int
    row_edges: tuple[int, ...]
    col_edges: tuple[int, ...]

    @property
    def n_rows(self) -> int:
        return len(self.row_edges) - 1

    @property
    def n_cols(self) -> int:
        return len(self.col_edges) - 1

    @property
    def n_regions(self) -> int:
        return self.n_rows * self.n_cols

    @property
    def n_win_rows(self) -> int:
        return -(-self.height // self.tile)

    @property
    def n_win_cols(self) -> int:
        return -(-self.width // self.tile)

    def region_of_windows(self, wr: np.ndarray, wc: np.ndarray) -> np.ndarray:
        i = np.searchsorted(np.asarray(self.row_edges), wr, side="right") - 1
        j = np.searchsorted(np.asarray(self.col_edges), wc, side="right") - 1
        return (i * self.n_cols + j).astype(np.int64)

    def block(self, k: int) -> tuple[int, int, int, int]:
        """Window rows and columns ``(wr0, wr1, wc0, wc1)`` of region ``k``."""
        i, j = divmod(k, self.n_cols)
        return self.row_edges[i], self.row_edges[i + 1], self.col_edges[j], self.col_edges[j + 1]

    def cells(self, k: int) -> tuple[int, int, int, int]:
        """Cell rows and columns ``(r0, r1, c0, c1)`` of region ``k`` (end exclusive)."""
        wr0, wr1, wc0, wc1 = self.block(k)
        t = self.tile
        return wr0 * t, min(wr1 * t, self.height), wc0 * t, min(wc1 * t, self.width)

    def window(self, wr: int, wc: int) -> Window:
        t = self.tile
        r0, c0 = wr * t, wc * t
        return Window(r0, c0, min(t, self.height - r0), min(t, self.width - c0))

    def describe(self) -> dict:
        return {"tile_cells": self.tile, "row_edges": list(self.row_edges), "col_edges": list(self.col_edges)}


def _edges(n_windows: int, parts: int) -> tuple[int, ...]:
    return tuple(int(i * n_windows // parts) for i in range(parts + 1))


def plan_regions(height: int, width: int, tile: int, regions: int | str = "auto") -> RegionLayout:
    """Regions of whole windows: ``"auto"`` (about :data:`DEFAULT_REGION_CELLS` cells a side) or a count N,
    laid out as the rows x columns factorisation of N whose regions are closest to square."""
    nwr, nwc = -(-height // tile), -(-width // tile)
    if regions == "auto":
        a = min(nwr, max(1, round(height / DEFAULT_REGION_CELLS)))
        b = min(nwc, max(1, round(width / DEFAULT_REGION_CELLS)))
    else:
        if isinstance(regions, bool) or not isinstance(regions, (int, np.integer)) or int(regions) < 1:
            raise InputDataError(f"regions: got {regions!r}; give 'auto' or a whole number >= 1.")
        n = int(regions)
        best = None
        for a_ in range(1, n + 1):
            if n % a_:
                continue
            b_ = n // a_
            if a_ > nwr or b_ > nwc:
                continue
            score = abs(np.log((height / a_) / (width / b_)))
            if best is None or score < best[0]:
                best = (score, a_, b_)
        if best is None:
            raise InputDataError(
                f"regions: {n} regions do not fit the DEM's {nwr} x {nwc} windows of {tile} cells as a grid of "
                "whole windows; give fewer regions (or a smaller --tile)."
            )
        a, b = best[1], best[2]
    return RegionLayout(height, width, tile, _edges(nwr, a), _edges(nwc, b))


# --------------------------------------------------------------------------- the region job


@dataclass
class RegionTask:
    """Everything one region job needs (picklable; the DEM and zones pickle to their paths)."""

    index: int
    n_regions: int
    fingerprint: str
    scratch: str
    dem: Any  # DemSource
    method: Any  # SlopeMethod
    windows: list  # [(wr, wc)] the region's parcels touch, plus its own block (land figures)
    own: tuple[int, int, int, int]  # its block (wr0, wr1, wc0, wc1)
    layout: RegionLayout
    plan: Any  # OverlayPlan of the region's parcels (local indices; vector pieces added in the job)
    class_names: np.ndarray
    rules: Rulebook
    zones: Any = None
    n_parcels: int = 0
    where: str = ""
    #: the slope and conflict tiles of the region's own block go to per-region rasters in the scratch folder
    rasters: bool = False
    #: parcels of other regions whose windows meet this region's block (``halo-K.parquet``): in the job's
    #: coverage for the conflict raster only (which parcel covers most of a cell), never in its sums
    n_halo: int = 0


def _result_paths(scratch: str, k: int) -> tuple[Path, Path]:
    d = Path(scratch) / "results"
    return d / f"region-{k:05d}.npz", d / f"region-{k:05d}.json"


def _raster_paths(scratch: str, k: int) -> tuple[Path, Path]:
    """The region's slope and conflict tiles (its own block), beside its accumulators."""
    d = Path(scratch) / "results"
    return d / f"region-{k:05d}-slope.tif", d / f"region-{k:05d}-conflict.tif"


def _finished(scratch: str, k: int, fingerprint: str, rasters: bool = False) -> dict | None:
    """The marker of region ``k`` when it finished with this fingerprint (and wrote its rasters when
    ``rasters``: a region finished by a tables-only run is redone for them), else None."""
    npz, marker = _result_paths(scratch, k)
    try:
        info = json.loads(marker.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if info.get("fingerprint") != fingerprint or not npz.is_file():
        return None
    if rasters and not all(p.is_file() for p in _raster_paths(scratch, k)):
        return None
    return info


def _peak_mib() -> float:
    """Peak resident memory of this process (VmHWM: its own address space, not inherited through fork/exec
    as ``getrusage``'s ``ru_maxrss`` is, which would give a spawned worker its parent's peak)."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _emit(task: RegionTask, done: int, total: int) -> None:
    try:
        from distributed import get_worker

        get_worker().log_event(PROGRESS_TOPIC, {"region": task.index, "done": done, "total": total})
    except Exception:  # not on a Dask worker (run in-process, or events unsupported)
        pass


def _task_path(scratch: str, k: int) -> Path:
    return Path(scratch) / "tasks" / f"region-{k:05d}.pkl"


@dataclass(frozen=True)
class _TaskRef:
    """What the driver keeps of a region job written to the scratch folder (:func:`_save_task`)."""

    index: int
    where: str
    path: str
    scratch: str
    fingerprint: str
    rasters: bool


def _save_task(task: RegionTask) -> _TaskRef:
    """Write the region's job (its parcels' overlay plan is tens of MB at 400 000 parcels) to the scratch
    folder, atomically, and return a reference to it: Dask's task graph then carries a path, not the data
    (no large-graph warning), and the driver does not keep every region's plan while the jobs run.  A job
    rescheduled after a lost worker reads the same file."""
    import pickle

    path = _task_path(task.scratch, task.index)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".{os.getpid()}.part")
    tmp.write_bytes(pickle.dumps(task, protocol=pickle.HIGHEST_PROTOCOL))
    os.replace(tmp, path)
    return _TaskRef(task.index, task.where, str(path), task.scratch, task.fingerprint, task.rasters)


def run_region_saved(path: str) -> dict:
    """:func:`run_region` of the job written by :func:`_save_task` (what the Dask workers run)."""
    import pickle

    with open(path, "rb") as f:
        task = pickle.load(f)
    return run_region(task)


def run_region(task: RegionTask) -> dict:
    """Run one region's window pass and save its accumulators in the scratch folder; return its figures."""

    from landcheck.core.window_pass import WindowJob
    from landcheck.overlay.sums import Totals

    done = _finished(task.scratch, task.index, task.fingerprint, task.rasters)
    if done is not None:  # a rescheduled task whose first attempt finished writing
        return done
    started = time.perf_counter()
    sinks: list = []
    try:
        gidx, geoms = _read_partition(task.scratch, f"region-{task.index:05d}", task.n_parcels)
        own = None  # all the job's parcels are the region's own
        if task.rasters:
            # the halo: other regions' parcels in this block's windows, merged in parcel order, so the
            # conflict raster's "parcel covering most of the cell (ties: lower parcel index)" sees every
            # parcel the single run sees there
            hidx, hgeoms = _read_partition(task.scratch, f"halo-{task.index:05d}", task.n_halo)
            if len(hidx):
                both = np.concatenate([gidx, hidx])
                order = np.argsort(both, kind="stable")
                own = np.concatenate([np.ones(len(gidx), bool), np.zeros(len(hidx), bool)])[order]
                gidx, geoms = both[order], np.concatenate([geoms, hgeoms])[order]
        plan = task.plan
        all_geoms = geoms
        if task.zones is not None:
            from landcheck.zones.prepare import vector_pieces

            pieces, piece_parcel, piece_role = vector_pieces(task.zones, task.rules, geoms, task.class_names)
            if len(pieces):
                all_geoms = np.concatenate([geoms, pieces])
                plan = dataclasses.replace(
                    plan,
                    geom_parcel=np.concatenate([plan.geom_parcel, piece_parcel]),
                    geom_role=np.concatenate([plan.geom_role, piece_role]),
                )
        job = WindowJob(task.dem, task.method, all_geoms, plan, task.zones, capability=None, keep_rasters=task.rasters)
        totals = Totals(len(gidx), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
        wr0, wr1, wc0, wc1 = task.own
        r0, r1, c0, c1 = task.layout.cells(task.index)
        if task.rasters:
            sinks = _region_sinks(
                task.scratch,
                task.index,
                task.dem.grid,
                Window(r0, c0, r1 - r0, c1 - c0),
                [z.name for z in task.rules.zones],
            )
        n = len(task.windows)
        step = max(1, n // 10)
        for i, (wr, wc) in enumerate(task.windows):
            win = task.layout.window(wr, wc)
            out = job(win)
            sums: Any = out.sums
            if not (wr0 <= wr < wr1 and wc0 <= wc < wc1):  # another region's cells: its land is counted there
                sums = dataclasses.replace(sums, land_m2=0.0, land_within_m2=0.0)
            elif sinks:  # a window of its own block: its tiles are the whole run's
                local = Window(win.row_off - r0, win.col_off - c0, win.height, win.width)
                sinks[0].write(local, out.slope_pct)
                sinks[1].write(local, out.conflict)
            totals.add(sums)
            if (i + 1) % step == 0 or i + 1 == n:
                _emit(task, i + 1, n)
        for sink in sinks:
            sink.close()
        sinks = []
    except Exception as exc:
        for sink in sinks:
            sink.abort()
        raise RegionError(
            f"region {task.index + 1} of {task.n_regions} ({task.where}): {type(exc).__name__}: {exc}"
        ) from None
    arrays = totals.to_arrays()
    if own is not None:  # the halo parcels' sums belong to their own regions
        gidx, arrays = gidx[own], _rows_of(arrays, own)
    npz, marker = _result_paths(task.scratch, task.index)
    npz.parent.mkdir(parents=True, exist_ok=True)
    tmp = npz.with_name(f".{npz.name}.{os.getpid()}.tmp.npz")
    np.savez(tmp, gidx=gidx, **arrays)
    os.replace(tmp, npz)
    import socket

    info = {
        "fingerprint": task.fingerprint,
        "region": task.index,
        "parcels": int(len(gidx)),
        "halo_parcels": task.n_halo,
        "windows": n,
        "seconds": round(time.perf_counter() - started, 3),
        "peak_mib": round(_peak_mib(), 1),
        "pid": os.getpid(),
        "host": socket.gethostname(),
    }
    tmpj = marker.with_name(f".{marker.name}.{os.getpid()}.tmp")
    tmpj.write_text(json.dumps(info, indent=1), encoding="utf-8")
    os.replace(tmpj, marker)
    return info


def _read_partition(scratch: str, name: str, expected: int) -> tuple[np.ndarray, np.ndarray]:
    """Parcel indices and geometries of one scratch partition (``parcels/NAME.parquet``)."""
    import pyarrow.parquet as pq
    import shapely

    table = pq.read_table(Path(scratch) / "parcels" / f"{name}.parquet")
    gidx = table.column("gidx").to_numpy()
    if len(gidx) != expected:
        raise InputDataError(f"parcel partition {name} holds {len(gidx)} parcels, the driver wrote {expected}")
    return gidx, shapely.from_wkb(table.column("wkb").to_numpy(zero_copy_only=False))


def _rows_of(arrays: dict, keep: np.ndarray) -> dict:
    """:meth:`Totals.to_arrays` restricted to the parcels ``keep`` (the per-class histogram and the land
    figures are not per parcel: kept whole)."""
    return {k: v if k in ("q_class_hist_m2", "q_land") else v[keep] for k, v in arrays.items()}


def _region_sinks(scratch: str, k: int, g, block: Window, zone_names: list[str]) -> list:
    """Writers of region ``k``'s slope and conflict tiles: plain tiled GeoTIFFs of its block with the final
    rasters' types and nodata (the same writers), renamed into place when the region's windows are written."""
    from landcheck.core.audit import audit_raster_sinks
    from landcheck.outputs.writers import RasterFormat

    sub = dataclasses.replace(g, transform=g.window_transform(block), width=block.width, height=block.height)
    paths = _raster_paths(scratch, k)
    paths[0].parent.mkdir(parents=True, exist_ok=True)
    return list(audit_raster_sinks(paths[0].parent, sub, RasterFormat.GTIFF, zone_names, paths=paths, overwrite=True))


# --------------------------------------------------------------------------- the driver


def _sha256_or_name(path: str, cache: dict) -> str:
    from landcheck.hashing import sha256_file

    if path in cache:
        return cache[path]
    if path.startswith("/vsi") or "://" in path or not os.path.isfile(path):
        cache[path] = f"not hashed: {path}"
    else:
        cache[path] = sha256_file(path)
    return cache[path]


def _scratch_for(out: Path) -> Path:
    return out.parent / f".{out.name}.regions"


def _refuse_unsupported(s: AuditSettings) -> None:
    what = []
    if s.capability is not None:
        what.append("the capability map (leave out --capability-map)")
    if s.draft_mmu_m2 is not None:
        what.append("the drafted reclassification (leave out --draft-reclassification)")
    if what:
        raise InputDataError(
            "regions: a region run writes the tables, summary, rasters and report (docs/scale.md); not yet: "
            + "; ".join(what)
            + "."
        )


class _Parcels:
    """Per-parcel scalars the driver keeps (no geometry), gathered part by part."""

    def __init__(self):
        self.ids: list = []
        self.class_value: list = []
        self.note: list = []
        self.area: list = []
        self.factor: list = []
        self.empty: list = []
        self.inside: list = []
        self.region: list = []
        self.rects: list = []  # (wr0, wr1, wc0, wc1) per parcel, -1 when it touches no window
        self.wheres: list[str] = []
        self.halo_parcel: list = []  # (parcel, region) pairs of the halos (rasters only)
        self.halo_region: list = []


def _windows_of(geoms, g, layout: RegionLayout) -> tuple[np.ndarray, np.ndarray]:
    """Region of each parcel and the rectangle of windows its bounds touch (``-1`` rows when none)."""
    import shapely

    from landcheck.geo.grid import apply_transform

    n = len(geoms)
    inv = ~g.transform
    empty = shapely.is_empty(geoms) | shapely.is_missing(geoms)
    rp = shapely.point_on_surface(np.where(empty, None, geoms))
    x = shapely.get_x(rp)
    y = shapely.get_y(rp)
    col, row = apply_transform(inv, np.nan_to_num(x), np.nan_to_num(y))
    t = layout.tile
    r = np.clip(np.floor(row), 0, g.height - 1).astype(np.int64)
    c = np.clip(np.floor(col), 0, g.width - 1).astype(np.int64)
    region = layout.region_of_windows(r // t, c // t)
    region[empty] = 0
    b = shapely.bounds(np.where(empty, None, geoms))
    # cell rows/cols the bounds cover: every cell a parcel can have coverage in
    cx0, ry0 = apply_transform(inv, b[:, 0], b[:, 3])
    cx1, ry1 = apply_transform(inv, b[:, 2], b[:, 1])
    rlo = np.floor(np.minimum(ry0, ry1))
    rhi = np.ceil(np.maximum(ry0, ry1)) - 1
    clo = np.floor(np.minimum(cx0, cx1))
    chi = np.ceil(np.maximum(cx0, cx1)) - 1
    with np.errstate(invalid="ignore"):
        off = empty | (rhi < 0) | (chi < 0) | (rlo > g.height - 1) | (clo > g.width - 1) | ~np.isfinite(rlo)
    rects = np.full((n, 4), -1, np.int64)
    ok = ~off
    rects[ok, 0] = np.clip(rlo[ok], 0, g.height - 1).astype(np.int64) // t
    rects[ok, 1] = np.clip(rhi[ok], 0, g.height - 1).astype(np.int64) // t + 1
    rects[ok, 2] = np.clip(clo[ok], 0, g.width - 1).astype(np.int64) // t
    rects[ok, 3] = np.clip(chi[ok], 0, g.width - 1).astype(np.int64) // t + 1
    return region, rects


def _halo_pairs(rects: np.ndarray, region: np.ndarray, layout: RegionLayout) -> tuple[np.ndarray, np.ndarray]:
    """``(parcel, region)`` for every region other than a parcel's own whose block meets the windows of
    the parcel's bounds: that region's job must see the parcel to draw its block's conflict raster."""
    re_, ce = np.asarray(layout.row_edges), np.asarray(layout.col_edges)
    ok = rects[:, 0] >= 0
    i0 = np.searchsorted(re_, rects[:, 0], side="right") - 1
    i1 = np.searchsorted(re_, rects[:, 1] - 1, side="right") - 1
    j0 = np.searchsorted(ce, rects[:, 2], side="right") - 1
    j1 = np.searchsorted(ce, rects[:, 3] - 1, side="right") - 1
    cand = np.flatnonzero(ok & ((i0 != i1) | (j0 != j1) | (i0 * layout.n_cols + j0 != region)))
    pairs = [
        (p, k)
        for p in cand.tolist()
        for i in range(int(i0[p]), int(i1[p]) + 1)
        for j in range(int(j0[p]), int(j1[p]) + 1)
        if (k := i * layout.n_cols + j) != region[p]
    ]
    if not pairs:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    a = np.array(pairs, dtype=np.int64)
    return a[:, 0], a[:, 1]


class _PartWriters:
    """Per-region GeoParquet of the parcels' geometries (``gidx``, ``wkb``), plus one in parcel order and,
    for the rasters, one per region of the other regions' parcels reaching into its block (``halo-K``)."""

    def __init__(self, folder: Path, n_regions: int, halo: bool = False):
        self.folder = folder
        self.n = n_regions
        self.halo = halo
        self.writers: dict = {}
        self.counts = np.zeros(n_regions, np.int64)
        shutil.rmtree(folder, ignore_errors=True)  # partitions of an earlier run (other inputs) are not reused
        folder.mkdir(parents=True, exist_ok=True)

    def _writer(self, name: str):
        import pyarrow as pa
        import pyarrow.parquet as pq

        w = self.writers.get(name)
        if w is None:
            schema = pa.schema([("gidx", pa.int64()), ("wkb", pa.binary())])
            w = self.writers[name] = pq.ParquetWriter(self.folder / f"{name}.parquet", schema)
        return w

    def add(self, gidx: np.ndarray, geoms, region: np.ndarray, halo: tuple[np.ndarray, np.ndarray] | None = None):
        import pyarrow as pa
        import shapely

        wkb = shapely.to_wkb(geoms)
        self._writer("ordered").write_table(
            pa.table({"gidx": gidx, "wkb": pa.array(wkb, pa.binary())}), row_group_size=TABLE_ROWS
        )
        self._split(gidx, wkb, np.arange(len(gidx)), region, "region")
        if halo is not None:
            self._split(gidx, wkb, *halo, "halo")

    def _split(self, gidx: np.ndarray, wkb: np.ndarray, rows: np.ndarray, region: np.ndarray, name: str) -> None:
        """Append ``rows`` to the partition ``NAME-K`` of their region ``K`` (in row order within each)."""
        import pyarrow as pa

        order = np.argsort(region, kind="stable")
        rs = region[order]
        cuts = np.flatnonzero(np.diff(rs)) + 1
        for sl in np.split(order, cuts):
            if len(sl) == 0:
                continue
            k = int(region[sl[0]])
            if name == "region":
                self.counts[k] += len(sl)
            r = rows[sl]
            self._writer(f"{name}-{k:05d}").write_table(
                pa.table({"gidx": gidx[r], "wkb": pa.array(wkb[r], pa.binary())})
            )

    def close(self) -> None:
        import pyarrow as pa

        for w in self.writers.values():
            w.close()
        import pyarrow.parquet as pq

        for k in range(self.n):  # a region with no parcel (or no halo) still gets its (empty) partition
            for name in ("region", "halo") if self.halo else ("region",):
                p = self.folder / f"{name}-{k:05d}.parquet"
                if not p.exists():
                    pq.write_table(pa.table({"gidx": pa.array([], pa.int64()), "wkb": pa.array([], pa.binary())}), p)


def _check_unique(ids: np.ndarray, id_field: str | None, where: str) -> None:
    if id_field is None:
        return
    s = pd.Series(ids)
    dup = s[s.duplicated(keep=False)]
    if len(dup):
        groups = []
        for value in list(dict.fromkeys(dup.tolist()))[:20]:
            rows = (np.flatnonzero((s == value).to_numpy()) + 1).tolist()
            groups.append(f"{value!r} (rows {', '.join(map(str, rows))})")
        n = dup.nunique()
        raise InputDataError(
            f"{where}: {n} {id_field} values are used by more than one parcel: {'; '.join(groups)}"
            f"{' and more' if n > 20 else ''}; ids must be unique."
        )


def _start_client(s: AuditSettings, n_regions: int):
    from distributed import Client, LocalCluster

    from landcheck.engine.windows import default_workers

    if s.scheduler_address:
        return Client(s.scheduler_address), None
    n = max(1, min(s.workers or default_workers(), n_regions))
    cluster = LocalCluster(
        n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=logging.ERROR
    )
    return Client(cluster), cluster


def audit_regions(
    dem,
    parcels: str | os.PathLike,
    rules: str | os.PathLike | Mapping | Rulebook,
    out_dir: str | os.PathLike,
    settings: AuditSettings | None = None,
    *,
    regions: int | str = "auto",
    overwrite: bool = False,
    on_step: Callable[[str], None] | None = None,
    on_cluster: Callable[[object], None] | None = None,
    **options,
):
    """Run the audit as region jobs on a Dask cluster and write the output folder of a single run.

    Parameters
    ----------
    dem : path, URL, folder of tiles, list of tile paths, or ``.txt`` list of tiles
        See :mod:`landcheck.inputs.tiles`; workers must read the same paths.
    parcels : path
        A partitioned GeoParquet folder, a GeoParquet file or any vector file (read in parts).
    rules, settings, options
        As :func:`landcheck.core.audit.audit`; ``settings.workers`` sizes the local cluster and
        ``settings.scheduler_address`` sends the region jobs to a running one instead.
        Rasters (``rasters``) and the report (``report``) as in the single run; confidence, the
        capability map and the drafted reclassification are refused (not yet in region runs).
    regions : ``"auto"`` or int
        Region count (see :func:`plan_regions`).
    on_cluster : callable, optional
        Called with the ``distributed.Client`` once the jobs are submitted (tests use it).

    Returns
    -------
    landcheck.core.audit.AuditResult
        With ``run`` None (the parcels' geometries are not held in memory), and ``parcels`` holding only
        the columns the class table and summary are summed from (``parcel_id``, ``class_name`` and
        ``verdict`` as categoricals, the area figures): the whole per-parcel table is ``parcels.csv``.

    Raises
    ------
    InputDataError, RuleFileError, RegionError, OutputExistsError, OutputWriteError
        A failing region raises :class:`RegionError` naming it; finished regions are kept for a rerun.
    """
    from landcheck.core.audit import AuditResult, settings_from_options
    from landcheck.core.run import _check_against_rules, open_rules
    from landcheck.outputs.writers import check_output_path, staged_folder

    s = settings_from_options(settings, **options)
    _refuse_unsupported(s)
    if s.report:
        # the report is a promise: fail now, not after the region jobs, if it cannot be built
        from landcheck.evidence.report import build_report
    rules = open_rules(rules)
    _check_against_rules(s, rules)
    if s.method is None:
        s = dataclasses.replace(s, method=rules.slope_method)
    step = on_step or (lambda m: logger.info(m))
    inputs: list = []
    if isinstance(dem, (str, os.PathLike)):
        inputs.append(dem)
    inputs.append(parcels)
    if not rules.path.startswith("<"):
        inputs.append(rules.path)
    out = check_output_path(out_dir, [*inputs, *rules.layers.values()], overwrite=overwrite)
    started = _dt.datetime.now(_dt.timezone.utc)
    scratch = _scratch_for(out)
    with staged_folder(out, overwrite=overwrite) as stage:
        result, execution = _drive(dem, parcels, rules, s, regions, scratch, stage, step, on_cluster, started)
        if s.report:
            release_heap()
            step("building the report")
            t0 = time.perf_counter()
            build_report(stage)  # reads parcels.gpkg back: the driver holds no parcel geometry
            execution["report_seconds"] = round(time.perf_counter() - t0, 3)
            execution["driver_peak_mib"] = round(_peak_mib(), 1)
        from landcheck.outputs.folder import write_run_times

        write_run_times(stage, started, execution=execution)
    shutil.rmtree(scratch, ignore_errors=True)
    step(f"outputs in {out}")
    return AuditResult(out, result["summary"], result["table"], result["classes"], result["warnings"], None)


def _drive(
    dem_arg, parcels, rules: Rulebook, s: AuditSettings, regions, scratch: Path, stage: Path, step, on_cluster, started
):
    import shapely

    from landcheck.core.run import (
        _input_files,
        _manifest,
        _rewarn,
        check_parcels_on_dem,
        warn_unmatched_classes,
        whole_area_ground_factor,
    )
    from landcheck.core.window_pass import build_plan
    from landcheck.geo.ground_area import ground_areas
    from landcheck.inputs.dem import open_dem, refuse_if_nothing_evaluated
    from landcheck.inputs.layers import validate_parcels
    from landcheck.inputs.partitions import iter_parcel_parts, parcel_files
    from landcheck.inputs.tiles import resolve_dem
    from landcheck.outputs.writers import RasterFormat
    from landcheck.overlay.sums import Totals
    from landcheck.verdicts.evaluate import Verdict, evaluate_parcels, parcel_rules, summarise_classes

    t_start = time.perf_counter()
    scratch.mkdir(parents=True, exist_ok=True)
    collected: list[str] = []
    dem_path, dem_files = resolve_dem(dem_arg, scratch)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LandcheckWarning)
        dem = open_dem(dem_path, band=s.dem_band, crs=s.dem_crs, z_unit=s.z_unit, mask_implausible=s.mask_implausible)
    collected += _rewarn(caught)
    g = dem.grid
    if s.confidence.enabled:
        from landcheck.verdicts.confidence import confidence_settings

        c = s.confidence
        conf = confidence_settings(
            rules, g, rmse_m=c.rmse_m, corr_length_m=c.corr_length_m, realizations=c.realizations, seed=c.seed
        )
        if conf is not None:
            raise InputDataError(
                f"regions: verdict confidence is not yet run in a region run; leave out --dem-rmse and the "
                f"[uncertainty] section of the rulebook {rules.path} (API: skip_confidence=True)."
            )
    layout = plan_regions(g.height, g.width, s.tile_cells, regions)
    nreg = layout.n_regions
    step(
        f"DEM {g.width}x{g.height} cells in {nreg} regions ({layout.n_rows} x {layout.n_cols} blocks of "
        f"{s.tile_cells}-cell windows)"
    )

    # ---- fingerprint: what a finished region's result depends on
    hashes: dict = {}
    pfiles = parcel_files(parcels)
    inputs = [{"role": "dem", "path": _abs(f), "sha256": _sha256_or_name(f, hashes)} for f in dem_files]
    inputs += [{"role": "parcels", "path": _abs(f), "sha256": _sha256_or_name(f, hashes)} for f in pfiles]
    for name, p in rules.layers.items():
        for f in _input_files(p):
            inputs.append({"role": f"layer:{name}", "path": _abs(f), "sha256": _sha256_or_name(f, hashes)})
    from landcheck.about import __version__

    fp_doc = {
        "landcheck": __version__,
        "inputs": [(i["role"], i["sha256"]) for i in inputs],
        "rulebook": rules.sha256,
        "settings": [
            str(getattr(s.method, "value", s.method)),
            s.dem_band,
            s.dem_crs,
            str(dem.z_unit.value),
            s.mask_implausible,
            s.parcels_layer,
            s.parcels_crs,
        ],
        "layout": layout.describe(),
    }
    fingerprint = hashlib.sha256(json.dumps(fp_doc, sort_keys=True, default=str).encode()).hexdigest()
    run_json = scratch / "run.json"
    try:
        previous = json.loads(run_json.read_text(encoding="utf-8")).get("fingerprint")
    except (OSError, ValueError):
        previous = None
    if previous != fingerprint:
        shutil.rmtree(scratch / "results", ignore_errors=True)
        if previous is not None:
            step("scratch folder of an earlier run with other inputs or settings: its regions are not reused")
    run_json.write_text(json.dumps({"fingerprint": fingerprint, **fp_doc}, indent=1, default=str), encoding="utf-8")

    # ---- parcels, part by part
    step("reading and distributing the parcels")
    P = _Parcels()
    rasters = s.rasters is not RasterFormat.NONE
    writers = _PartWriters(scratch / "parcels", nreg, halo=rasters)
    dem_box = shapely.box(*g.bounds)
    n_total = 0
    try:
        for part in iter_parcel_parts(parcels, layer=s.parcels_layer, crs=s.parcels_crs):
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", LandcheckWarning)
                ps = validate_parcels(
                    part.frame,
                    class_field=rules.class_field,
                    id_field=rules.id_field,
                    target_crs_wkt=g.crs_wkt,
                    where=part.where,
                    crs=s.parcels_crs,
                )
            collected += _rewarn(caught)
            frame: Any = ps.frame
            k = len(frame)
            if rules.id_field is None:
                P.ids.append(np.arange(part.first_row + 1, part.first_row + k + 1))
            else:
                P.ids.append(frame["parcel_id"].to_numpy())
            P.class_value.append(frame["class_value"].array)
            P.note.append(frame["geometry_note"].to_numpy())
            area_part, factor_part = ground_areas(frame, g.crs_wkt)
            P.area.append(area_part)
            P.factor.append(factor_part)
            geoms = np.asarray(frame.geometry.values)
            P.empty.append(shapely.is_empty(geoms))
            P.inside.append(shapely.intersects(geoms, dem_box))
            region, rects = _windows_of(geoms, g, layout)
            P.region.append(region)
            P.rects.append(rects)
            P.wheres.append(part.where)
            halo = _halo_pairs(rects, region, layout) if rasters else None
            if halo is not None:
                P.halo_parcel.append(halo[0] + n_total)
                P.halo_region.append(halo[1])
            writers.add(np.arange(n_total, n_total + k, dtype=np.int64), geoms, region, halo)
            n_total += k
            del frame, geoms, ps, part
            release_heap()
    finally:
        writers.close()
    where = os.fspath(parcels)
    ids = np.concatenate(P.ids)
    _check_unique(ids, rules.id_field, where)
    class_value = pd.array(pd.concat([pd.Series(c) for c in P.class_value], ignore_index=True), dtype="string")
    note = np.concatenate(P.note)
    area_m2 = np.concatenate(P.area)
    area_factor = np.concatenate(P.factor)
    empty = np.concatenate(P.empty)
    inside = np.concatenate(P.inside)
    region = np.concatenate(P.region)
    rects = np.concatenate(P.rects)
    halo_parcel = np.concatenate([np.empty(0, np.int64), *P.halo_parcel])
    halo_region = np.concatenate([np.empty(0, np.int64), *P.halo_region])
    del P
    check_parcels_on_dem(inside, empty, where, dem, collected)
    pr = parcel_rules(rules, class_value.to_numpy(dtype=object, na_value=pd.NA))
    warn_unmatched_classes(pr, pd.Series(class_value), where, collected)
    ground_factor = whole_area_ground_factor(g)
    step(
        f"{count_text(n_total, 'parcel')}, {count_text(len(rules.classes), 'class', 'classes')}, "
        f"{count_text(len(rules.zones), 'zone')}"
    )

    # ---- global hazard zones: once, for the whole DEM; regions read their masks per window
    zones = None
    if rules.zones:
        from landcheck.engine.backends import Engine
        from landcheck.zones.prepare import prepare_zones

        zs = dataclasses.replace(s, engine=Engine.from_user("dask", s.workers, s.scheduler_address))
        # the masks live in the run's scratch folder beside the output, which every worker of a
        # cluster reaches when the output is on shared storage (docs/cli.md)
        shutil.rmtree(scratch / "zones", ignore_errors=True)
        zones = prepare_zones(rules, dem, None, pr, zs, step=step, mask_folder=scratch / "zones")
        collected += zones.warnings
        step(f"zones ready: {len(zones.columns)} zone columns")
        release_heap()
    plan = build_plan(rules, pr.class_name, area_factor, ground_factor, zones)

    # ---- region tasks
    order = np.argsort(region, kind="stable")
    cuts = np.searchsorted(region[order], np.arange(nreg + 1))
    tasks = []
    for k in range(nreg):
        idx = order[cuts[k] : cuts[k + 1]]
        halo_idx = np.sort(halo_parcel[halo_region == k])
        job_idx = np.union1d(idx, halo_idx)  # parcel order: the conflict raster's ties go to the lower index
        job_plan = _subset_plan(plan, job_idx)
        if len(halo_idx):
            # the halo adds no sums (they are dropped in the job); no class keeps it out of the histogram
            ci = job_plan.class_index.copy()
            ci[np.isin(job_idx, halo_idx)] = -1
            job_plan = dataclasses.replace(job_plan, class_index=ci)
        wr0, wr1, wc0, wc1 = layout.block(k)
        need = np.zeros((layout.n_win_rows, layout.n_win_cols), bool)
        need[wr0:wr1, wc0:wc1] = True
        rr = rects[idx]
        rr = np.unique(rr[rr[:, 0] >= 0], axis=0)
        for a0, a1, b0, b1 in rr:
            need[a0:a1, b0:b1] = True
        wins = [(int(a), int(b)) for a, b in zip(*np.nonzero(need))]
        r0, r1, c0, c1 = layout.cells(k)
        # each job goes to the scratch folder as it is made: the driver keeps a reference, not the plan
        tasks.append(
            _save_task(
                RegionTask(
                    index=k,
                    n_regions=nreg,
                    fingerprint=fingerprint,
                    scratch=str(scratch),
                    dem=dem,
                    method=s.method,
                    windows=wins,
                    own=(wr0, wr1, wc0, wc1),
                    layout=layout,
                    plan=job_plan,
                    class_names=pr.class_name[job_idx],
                    rules=rules,
                    zones=zones,
                    n_parcels=len(idx),
                    where=f"DEM rows {r0}..{r1 - 1}, cols {c0}..{c1 - 1}; {len(idx)} parcels",
                    rasters=rasters,
                    n_halo=len(halo_idx),
                )
            )
        )
        del job_plan
    release_heap()
    infos = _run_tasks(tasks, s, step, on_cluster)

    # ---- merge: exact integer sums, then everything as the single run computes it
    totals = Totals(n_total, len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    for k in range(nreg):
        npz, _ = _result_paths(str(scratch), k)
        with np.load(npz) as arr:
            totals.add_part(arr, arr["gidx"])
    step("regions merged")
    refuse_if_nothing_evaluated(dem, totals.evaluated_m2, area_m2, where)
    totals.__dict__.pop("_float_cache", None)
    columns = zones.columns if zones is not None else []
    notes = pd.Series(note)

    def parcel_rows(a: int, b: int) -> pd.DataFrame:
        """The rows of parcels ``a .. b - 1`` of parcels.csv (evaluation is parcel by parcel: a slice's rows
        are the whole table's)."""
        rows = evaluate_parcels(
            totals.rows(a, b),
            _subset_plan(plan, np.arange(a, b)),
            rules,
            pr.rows(a, b),
            area_m2[a:b],
            empty[a:b],
            class_value[a:b].to_numpy(dtype=object, na_value=pd.NA),
            columns,
        )
        rows.insert(0, "parcel_id", ids[a:b])
        rows["geometry_note"] = notes.iloc[a:b].reset_index(drop=True)  # the whole column's type in each slice
        return rows

    # ---- the folder of a single run (+ parcels.parquet)
    from landcheck.core.audit import _Background, write_cell_zones
    from landcheck.core.run import _summary
    from landcheck.outputs.writers import write_csv, write_json

    zone_names = [z.name for z in rules.zones]
    hook = _merge_rasters(stage, g, layout, scratch, s, zone_names, step) if rasters else None
    # the COG copies (GDAL, outside the GIL) are made while the tables and layers are written, as in the single run
    closing = _Background(hook.close) if hook is not None else None
    try:
        cell_zone_bits = None
        if zones is not None:
            zones.write_layers(stage)
            cell_zone_bits = write_cell_zones(stage, zones, RasterFormat.from_user(s.rasters))
        step("writing parcels.csv, parcels.gpkg and parcels.parquet")
        kept = _SummedColumns(ids, rules, [f"zone_{c.name}_m2" for c in columns])
        _write_parcel_tables(stage, scratch / "parcels" / "ordered.parquet", parcel_rows, kept.add, g.crs_wkt)
        table = kept.frame()
        del kept
        classes = summarise_classes(table, rules)
        counted = (table["verdict"] != Verdict.NO_DATA).to_numpy() & (table["verdict"] != Verdict.NO_RULE).to_numpy()
        summary = _summary(rules, table, classes, totals, plan, pr, counted, zone_names, collected, columns)
        summary["manifest"] = _manifest(started, dem, parcels, rules, s, g, None, inputs=inputs)
        if zones is not None:
            summary["zones"] = zones.describe()
        if cell_zone_bits is not None:
            summary["cell_zone_bits"] = cell_zone_bits
        write_csv(stage / "classes.csv", classes)
        write_json(stage / "summary.json", summary)
    finally:
        if closing is not None:
            closing.join()
    execution = {
        "tile_cells": s.tile_cells,
        "engine": "dask (region jobs)",
        "workers": s.workers,
        "scheduler": s.scheduler_address,
        "regions": {**layout.describe(), "n_regions": nreg},
        "region_runs": infos,
        "driver_seconds": round(time.perf_counter() - t_start, 3),
        "driver_peak_mib": round(_peak_mib(), 1),
    }
    return {"summary": summary, "table": table, "classes": classes, "warnings": collected}, execution


def _merge_rasters(stage: Path, g, layout: RegionLayout, scratch: Path, s: AuditSettings, zone_names, step):
    """Stream the regions' tiles into ``slope_pct.tif`` and ``conflict.tif`` (the single run's writers, windows
    and window order, so the same bytes); returns the writers, to be closed.  One window in memory at a time.

    Every window belongs to exactly one region's block, and that region's job wrote its tiles: its slope
    (defined wherever the DEM is, parcels or not) and its conflict bits, drawn with every parcel that meets
    the window (its own and its halo), as the single run draws them.
    """
    import rasterio
    from rasterio.errors import RasterioError

    from landcheck.core.audit import _FolderRasters
    from landcheck.core.window_pass import WindowOutput
    from landcheck.engine.windows import progress_bar
    from landcheck.geo.grid import iter_windows
    from landcheck.outputs.writers import RasterFormat

    windows = list(iter_windows(g.height, g.width, s.tile_cells))  # the single run's windows, in its order
    step(f"writing the rasters from the regions' tiles ({len(windows)} windows)")
    hook = _FolderRasters(stage, RasterFormat.from_user(s.rasters))
    t = layout.tile
    opened: dict[int, list] = {}  # region -> its two open tile files, each opened once

    def read_tiles(k: int, rw) -> list[np.ndarray]:
        path = None
        try:
            if k not in opened:
                opened[k] = []
                for path in _raster_paths(str(scratch), k):
                    opened[k].append(rasterio.open(path))
            return [src.read(1, window=rw) for src in opened[k]]
        except RasterioError as exc:
            _result_paths(str(scratch), k)[1].unlink(missing_ok=True)  # redo this region on a rerun
            raise RegionError(
                f"region {k + 1} of {layout.n_regions}: its tiles {path or _raster_paths(str(scratch), k)[0]} "
                f"cannot be read ({exc}); rerun the same command: the other regions are resumed, this one is redone."
            ) from None

    try:
        hook.open(g, zone_names, None)
        with progress_bar(len(windows), "rasters", enabled=s.show_progress) as bar:
            for win in windows:
                k = int(layout.region_of_windows(np.array([win.row_off // t]), np.array([win.col_off // t]))[0])
                r0, _, c0, _ = layout.cells(k)
                rw = rasterio.windows.Window(win.col_off - c0, win.row_off - r0, win.width, win.height)
                slope, conflict = read_tiles(k, rw)
                hook.write(win, WindowOutput(None, slope, conflict))
                bar.update(1)
    except BaseException:
        hook.abort()
        raise
    finally:
        for files in opened.values():
            for src in files:
                src.close()
    return hook


def _abs(path: str) -> str:
    return path if path.startswith("/vsi") or "://" in path else str(Path(path).resolve())


def _subset_plan(plan, idx: np.ndarray):
    from landcheck.overlay.sums import ROLE_PARCEL

    k = len(idx)
    return dataclasses.replace(
        plan,
        limit_index=plan.limit_index[idx],
        near_index=plan.near_index[idx],
        raster_forbid_bits=plan.raster_forbid_bits[idx],
        zone_forbid_bits=plan.zone_forbid_bits[idx],
        area_factor=np.asarray(plan.area_factor)[idx],
        class_index=plan.class_index[idx],
        geom_parcel=np.arange(k, dtype=np.int64),
        geom_role=np.full(k, ROLE_PARCEL, np.int64),
        parcel_col_channel=None if plan.parcel_col_channel is None else plan.parcel_col_channel[idx],
    )


def _run_tasks(tasks: list[_TaskRef], s: AuditSettings, step, on_cluster) -> list[dict]:
    """Run the region jobs not finished before, with per-region and overall progress; any failure fails the run
    once the other regions have finished (their results are kept for a rerun)."""
    from landcheck.engine.windows import progress_bar

    n = len(tasks)
    infos: dict[int, dict] = {}
    todo = []
    for t in tasks:
        info = _finished(t.scratch, t.index, t.fingerprint, t.rasters)
        if info is not None:
            infos[t.index] = {**info, "resumed": True}
        else:
            todo.append(t)
    if infos:
        step(f"{len(infos)} of {n} regions finished in an earlier run: resumed, not redone")
    if todo:
        from distributed import as_completed

        client, cluster = _start_client(s, len(todo))
        seen: dict[int, int] = {}

        def on_progress(event):
            msg = event[1] if isinstance(event, tuple) else event
            try:
                k, d, tot = int(msg["region"]), int(msg["done"]), int(msg["total"])
            except Exception:
                return
            pct = 100 * d // max(tot, 1)
            if pct - seen.get(k, -100) >= 25 or d == tot:
                seen[k] = pct
                step(f"region {k + 1}/{n}: {d}/{tot} windows")

        try:
            try:
                client.subscribe_topic(PROGRESS_TOPIC, on_progress)
            except Exception:  # an older scheduler without events: overall progress only
                pass
            step(f"running {len(todo)} region jobs on {len(client.scheduler_info().get('workers', {}))} Dask workers")
            futures = {
                client.submit(
                    run_region_saved, t.path, key=f"landcheck-region-{t.index:05d}-{t.fingerprint[:12]}", pure=False
                ): t
                for t in todo
            }
            if on_cluster is not None:
                on_cluster(client)
            failures: list[tuple[int, str]] = []
            with progress_bar(n, "regions", enabled=s.show_progress, unit="region") as bar:
                bar.update(len(infos))
                # every region runs to its end even when one fails, so a rerun redoes only the failed ones
                for fut in as_completed(list(futures)):
                    t = futures[fut]
                    try:
                        info = fut.result()
                    except RegionError as exc:
                        failures.append((t.index, str(exc)))
                        step(f"region {t.index + 1}/{n} FAILED: {exc}")
                        continue
                    except Exception as exc:  # lost too often (KilledWorker), cancelled, ...
                        msg = f"region {t.index + 1} of {n} ({t.where}): {type(exc).__name__}: {exc}"
                        failures.append((t.index, msg))
                        step(f"region {t.index + 1}/{n} FAILED: {msg}")
                        continue
                    infos[t.index] = {**info, "resumed": False}
                    bar.update(1)
                    step(
                        f"region {t.index + 1}/{n} done: {info['parcels']} parcels, {info['windows']} windows, "
                        f"{info['seconds']:.1f} s, worker peak {info['peak_mib']:.0f} MiB "
                        f"({len(infos)}/{n} regions)"
                    )
            if failures:
                failures.sort()
                more = f" ({len(failures)} regions failed; the others are listed above)" if len(failures) > 1 else ""
                raise RegionError(
                    f"{failures[0][1]}{more}. The {len(infos)} regions finished are kept; rerun the same "
                    "command to resume them."
                )
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    return [infos[k] for k in range(n)]


class _SummedColumns:
    """The per-parcel columns the class table and the summary are computed from
    (:data:`landcheck.verdicts.evaluate.SUMMED_COLUMNS` and the zone areas), gathered slice by slice:
    numbers and two categorical columns, ≈ 8 B per number per parcel, no text."""

    def __init__(self, ids: np.ndarray, rules: Rulebook, zone_area_columns: list[str]):
        from landcheck.inputs.rulebook import NO_RULE
        from landcheck.verdicts.evaluate import SUMMED_COLUMNS, Verdict

        self.ids = ids
        self.numbers = [c for c in SUMMED_COLUMNS if c not in ("class_name", "verdict")] + zone_area_columns
        self.kinds = {
            "class_name": pd.CategoricalDtype([*(c.name for c in rules.classes), NO_RULE]),
            "verdict": pd.CategoricalDtype(list(Verdict.ALL)),
        }
        self.parts: list[dict] = []

    def add(self, rows: pd.DataFrame) -> None:
        part = {c: rows[c].to_numpy(dtype=np.float64, copy=True) for c in self.numbers}
        part.update({c: pd.Categorical(rows[c], dtype=kind).codes for c, kind in self.kinds.items()})
        self.parts.append(part)

    def frame(self) -> pd.DataFrame:
        """The columns of the whole table (``parcel_id`` first), each one contiguous array as in the table
        :func:`~landcheck.verdicts.evaluate.evaluate_parcels` makes, so pandas sums them to the same bits."""
        cols: dict = {"parcel_id": self.ids}
        for c, kind in self.kinds.items():
            codes = np.concatenate([p[c] for p in self.parts])
            cols[c] = pd.Categorical.from_codes(codes, dtype=kind)
        for c in self.numbers:
            cols[c] = np.concatenate([p.pop(c) for p in self.parts])
        self.parts = []
        return pd.DataFrame(cols)


def _write_parcel_tables(
    stage: Path,
    ordered: Path,
    parcel_rows: Callable[[int, int], pd.DataFrame],
    on_rows: Callable[[pd.DataFrame], None],
    crs_wkt: str,
) -> None:
    """parcels.csv, parcels.gpkg and parcels.parquet, written together slice by slice in parcel order: one
    row group of the scratch geometries (``ordered``, at most :data:`TABLE_ROWS` parcels) at a time, its
    rows from ``parcel_rows(first, end)`` and handed to ``on_rows`` once written."""
    import geopandas as gpd
    import pyarrow.parquet as pq
    import pyogrio
    import shapely
    from geopandas.io.arrow import _geopandas_to_arrow  # the GeoParquet table geopandas itself writes

    from landcheck.outputs.writers import csv_rows, fixed_gpkg_date

    gpkg_tmp = stage / ".parcels.gpkg.tmp.gpkg"
    pq_tmp = stage / ".parcels.parquet.tmp"
    pf = pq.ParquetFile(ordered)
    pw = None
    end = 0
    first = True
    try:
        with fixed_gpkg_date(), csv_rows(stage / "parcels.csv") as add_csv:
            for i in range(pf.num_row_groups):
                rg = pf.read_row_group(i)
                gidx = rg.column("gidx").to_numpy()
                if len(gidx) == 0:
                    continue
                if gidx[0] != end or gidx[-1] != end + len(gidx) - 1:
                    raise RuntimeError(f"{ordered}: row group {i} is not the parcels {end}.. in order")
                rows = parcel_rows(end, end + len(gidx))
                end += len(gidx)
                add_csv(rows)
                geoms = shapely.from_wkb(rg.column("wkb").to_numpy(zero_copy_only=False))
                del rg
                part = gpd.GeoDataFrame(rows, geometry=gpd.GeoSeries(geoms).values, crs=crs_wkt)
                pyogrio.write_dataframe(part, gpkg_tmp, layer="parcels", driver="GPKG", append=not first)
                tab = _geopandas_to_arrow(part, index=False)
                if pw is None:
                    pw = pq.ParquetWriter(pq_tmp, tab.schema)
                pw.write_table(tab)
                first = False
                del part, tab, geoms
                on_rows(rows)
                del rows
                release_heap()
        if pw is not None:
            pw.close()
            pw = None
        os.replace(gpkg_tmp, stage / "parcels.gpkg")
        os.replace(pq_tmp, stage / "parcels.parquet")
    finally:
        if pw is not None:
            pw.close()
        for p in (gpkg_tmp, pq_tmp):
            if p.exists():
                p.unlink()
