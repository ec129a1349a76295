"""The audit as a folder: read -> :func:`landcheck.core.run.run_audit` -> write the output folder.

:func:`audit` prints nothing and returns an :class:`AuditResult`.  The numbers
come from the in-memory core; this module only adds the files
(docs/outputs.md).  The slope, conflict and capability rasters are streamed
from the core's one window pass straight into the staged folder, which
replaces the target in one rename; nothing is written when any error is raised.
"""

from __future__ import annotations

import datetime as _dt
import logging
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path

import numpy as np
import pandas as pd

from landcheck.core.run import AuditRun, _RasterHook, _run_audit, open_rules
from landcheck.core.settings import AuditSettings, CapabilityOptions
from landcheck.engine.backends import EngineKind
from landcheck.engine.memory import release_heap
from landcheck.engine.windows import progress_bar
from landcheck.inputs.gdal_cache import lowered_gdal_cache
from landcheck.inputs.rulebook import Rulebook
from landcheck.outputs.folder import write_run_times
from landcheck.outputs.writers import (
    RasterFormat,
    RasterSink,
    check_output_path,
    staged_folder,
    write_csv,
    write_gpkg,
    write_json,
)
from landcheck.overlay.sums import CONFLICT_OUTSIDE
from landcheck.verdicts.evaluate import Verdict

__all__ = ["audit", "AuditResult", "write_audit_folder"]

logger = logging.getLogger(__name__)

_SETTING_NAMES = {f.name for f in fields(AuditSettings)}
#: keyword options of :func:`audit` kept from earlier releases -> how they map onto the settings
_CONFIDENCE_KEYS = {
    "dem_rmse_m": "rmse_m",
    "corr_length_m": "corr_length_m",
    "realizations": "realizations",
    "seed": "seed",
}


@dataclass
class AuditResult:
    """What :func:`audit` wrote: the folder, and the tables and summary it holds.

    ``parcels`` is the per-parcel table without geometry (``parcels.csv``); ``run`` is the in-memory
    result (:class:`landcheck.core.run.AuditRun`, with the GeoDataFrame).
    """

    out_dir: Path
    summary: dict
    parcels: pd.DataFrame
    classes: pd.DataFrame
    warnings: list[str] = field(default_factory=list)
    run: AuditRun | None = None

    @property
    def n_conflicts(self) -> int:
        return int((self.parcels["verdict"] == Verdict.CONFLICT).sum())


def settings_from_options(settings: AuditSettings | None = None, **options) -> AuditSettings:
    """AuditSettings from keyword options (the names of :class:`AuditSettings`, plus ``make_report``,
    ``skip_confidence``, ``dem_rmse_m``, ``corr_length_m``, ``realizations``, ``seed``,
    ``capability_scheme``); unknown names are refused."""
    import dataclasses

    base = settings if settings is not None else AuditSettings()
    kw: dict = {}
    conf = {}
    for k, v in options.items():
        if k == "make_report":
            kw["report"] = v
        elif k == "skip_confidence":
            conf["enabled"] = not v
        elif k in _CONFIDENCE_KEYS:
            conf[_CONFIDENCE_KEYS[k]] = v
        elif k == "capability_scheme":
            kw["capability"] = None if v is None else CapabilityOptions(v if isinstance(v, str) else tuple(v))
        elif k in _SETTING_NAMES:
            kw[k] = v
        else:
            raise TypeError(f"audit() got an unexpected option {k!r}")
    if conf:
        kw["confidence"] = dataclasses.replace(base.confidence, **conf)
    return dataclasses.replace(base, **kw) if kw else base


def audit_raster_sinks(
    stage: Path,
    g,
    fmt: RasterFormat,
    zone_names: list[str],
    *,
    paths: tuple[Path, Path] | None = None,
    overwrite: bool = False,
) -> tuple[RasterSink, RasterSink]:
    """The streamed writers of ``slope_pct.tif`` and ``conflict.tif`` (docs/outputs.md), for the single run and
    the region run alike: one definition of their types, nodata values and band names.  ``paths``: write them
    elsewhere than ``stage`` (a region job's tiles of its block)."""
    slope_path, conflict_path = paths or (stage / "slope_pct.tif", stage / "conflict.tif")
    slope = RasterSink(
        slope_path, g, dtype="float32", nodata=np.nan, band_names=["slope_pct"], fmt=fmt, overwrite=overwrite
    )
    try:
        conflict = RasterSink(
            conflict_path,
            g,
            dtype="uint8",
            nodata=CONFLICT_OUTSIDE,
            fmt=fmt,
            categorical=True,
            band_names=["conflict bits: 1=slope" + "".join(f", {1 << (i + 1)}={z}" for i, z in enumerate(zone_names))],
            overwrite=overwrite,
        )
    except BaseException:
        slope.abort()
        raise
    return slope, conflict


class _FolderRasters(_RasterHook):
    """Streams the window pass's slope, conflict and capability tiles into the staged folder."""

    def __init__(self, stage: Path, fmt: RasterFormat):
        self.stage = stage
        self.fmt = fmt
        self.sinks: list[RasterSink] = []
        self.cap_sink = None

    def open(self, g, zone_names, capability_spec) -> None:
        self.slope, self.conflict = audit_raster_sinks(self.stage, g, self.fmt, zone_names)
        self.sinks += [self.slope, self.conflict]
        if capability_spec is not None:
            from landcheck.verdicts.capability import capability_sink

            self.cap_sink = capability_sink(self.stage / "capability.tif", g, capability_spec)
            self.sinks.append(self.cap_sink)

    def write(self, win, out) -> None:
        self.slope.write(win, out.slope_pct)
        self.conflict.write(win, out.conflict)
        if self.cap_sink is not None:
            self.cap_sink.write(win, out.capability_codes)

    def adopt(self, sink: RasterSink | None) -> None:
        """Publish ``sink`` (already written) with the pass's rasters."""
        if sink is not None:
            self.sinks.append(sink)

    def finish(self) -> None:
        """End every window stream; from here on :meth:`readable_files` may be read (fast)."""
        for s in self.sinks:
            s.finish()

    def readable_files(self) -> dict[str, Path]:
        """Folder-relative name -> a finished file with that raster's values (the scratch while a COG is laid out)."""
        out = {}
        for s in self.sinks:
            p = s.readable
            if p is not None:
                out[s.final.relative_to(self.stage).as_posix()] = p
        return out

    def publish(self, threads: int | None = None) -> None:
        """Lay out every COG (the long part), with a progress bar; scratch files stay until :meth:`discard_scratch`.

        ``threads``: GDAL's compression threads per copy (default all cores)."""
        bar = progress_bar(len(self.sinks), "COG rasters" if self.fmt.is_cog else "rasters", unit="raster")
        try:
            for s in self.sinks:
                bar.set_postfix_str(s.final.name, refresh=False)
                s.publish(keep_scratch=True, threads=threads, hash_it=True)
                bar.update(1)
        finally:
            bar.close()

    def discard_scratch(self) -> None:
        for s in self.sinks:
            s.discard_scratch()

    def close(self) -> None:
        """Finish and publish every raster, then drop the scratch files (when nothing reads them meanwhile)."""
        self.finish()
        self.publish()
        self.discard_scratch()

    def abort(self) -> None:
        for s in self.sinks:
            s.abort()


class _Background:
    """Run ``fn`` on a thread; :meth:`join` waits and re-raises what it raised."""

    def __init__(self, fn: Callable[[], object]):
        import threading

        self._error: BaseException | None = None

        def target() -> None:
            try:
                fn()
            except BaseException as exc:  # handed to the joining thread
                self._error = exc
            finally:  # GDAL's buffers of this thread's arena back to the system, not kept beside the report
                release_heap()

        self._thread = threading.Thread(target=target, name="landcheck-rasters", daemon=True)
        self._thread.start()

    def join(self) -> None:
        self._thread.join()
        if self._error is not None:
            raise self._error


def _start_figure_worker():
    """Fork the report's figure process (None where it cannot run), its heap trimmed first."""
    from landcheck.evidence.figure_worker import start

    release_heap(collect=True)  # the child starts from a compact heap
    return start()


def _needs_rasters(s: AuditSettings) -> bool:
    return s.rasters is not RasterFormat.NONE or s.capability is not None


#: GDAL block cache while the COGs are laid out beside the report (the pass itself uses GDAL_CACHE_CAP_BYTES)
AFTER_PASS_GDAL_CACHE_BYTES = 16 * 2**20

#: bit k of ``zones/cells.tif`` is the k-th cell-based rulebook zone (summary.json -> ``cell_zone_bits``)
CELL_ZONES_FILE = "zones/cells.tif"


def write_cell_zones(stage: Path, zones, fmt: RasterFormat) -> list[str] | None:
    """Stream the cell-based zones (HAND, sea-level rise, derived strips) into ``zones/cells.tif``.

    One uint8 band of bit flags, bit k = the k-th name returned (summary.json -> ``cell_zone_bits``), so
    the maps can show each zone as its own layer.  Written only when the audit writes rasters and the
    rulebook has cell-based zones (else None is returned); tile by tile from the zone masks, so nothing
    of the size of the raster is held.  The single run and the region run both write it here.
    """
    done = _cell_zones_sink(stage, zones, fmt)
    if done is None:
        return None
    names, sink = done
    sink.close()
    return names


def _cell_zones_sink(stage: Path, zones, fmt: RasterFormat) -> tuple[list[str], RasterSink] | None:
    """:func:`write_cell_zones` up to a finished, not yet published writer (the single run publishes it on
    the raster thread with the pass's rasters)."""
    from landcheck.geo.grid import iter_windows

    cols = zones.cell_columns
    if not cols or fmt is RasterFormat.NONE:
        return None
    g = zones.grid
    names = [c.name for c in cols]
    sink = RasterSink(
        stage / CELL_ZONES_FILE,
        g,
        dtype="uint8",
        nodata=None,
        fmt=fmt,
        categorical=True,
        band_names=["cell zone bits: " + ", ".join(f"{1 << k}={n}" for k, n in enumerate(names))],
    )
    try:
        for win in iter_windows(g.height, g.width, 2048):
            sink.write(win, zones.cell_zone_bits(win))
        sink.finish()
    except BaseException:
        sink.abort()
        raise
    return names, sink


def write_audit_folder(stage: Path, run: AuditRun, *, cell_zones_written: bool = False) -> None:
    """Write every table and layer of ``run`` into ``stage`` (docs/outputs.md).

    ``cell_zones_written``: ``zones/cells.tif`` was already written (the audit publishes it with the
    pass's rasters, on their thread).
    """
    parcels = run.table
    if run.confidence is not None:
        cparcels, cclasses = run.confidence
        write_csv(stage / "confidence.csv", cparcels)
        write_csv(stage / "confidence_classes.csv", cclasses)
    if run.capability is not None:
        from landcheck.verdicts.capability import write_capability_legend

        table, spec = run.capability
        write_csv(stage / "capability_by_class.csv", table)
        write_capability_legend(stage, spec)
    if run.reclassification is not None:
        parts, moves = run.reclassification
        if len(parts):
            write_gpkg(stage / "reclassification.gpkg", parts, layer="parts")
        write_csv(stage / "reclassification_moves.csv", moves)
    if run.zones is not None:
        run.zones.write_layers(stage)
        if not cell_zones_written:
            names = write_cell_zones(stage, run.zones, run.settings.rasters)
            if names is not None:
                run.summary["cell_zone_bits"] = names
    write_gpkg(stage / "parcels.gpkg", run.parcels, layer="parcels")
    write_csv(stage / "parcels.csv", parcels)
    write_csv(stage / "classes.csv", run.classes)
    write_json(stage / "summary.json", run.summary)


def audit(
    dem,
    parcels,
    rules: str | os.PathLike | Mapping | Rulebook,
    out_dir: str | os.PathLike,
    settings: AuditSettings | None = None,
    *,
    overwrite: bool = False,
    on_step: Callable[[str], None] | None = None,
    **options,
) -> AuditResult:
    """Run the audit and write its output folder (docs/outputs.md).

    ``dem``, ``parcels`` and ``rules`` are what :func:`landcheck.core.run.run_audit` takes (paths,
    an opened DEM, a GeoDataFrame, a mapping or a Rulebook).  Options come as ``settings``
    (:class:`AuditSettings`) or as keywords: any
    AuditSettings field, or ``make_report``, ``skip_confidence``, ``dem_rmse_m``, ``corr_length_m``,
    ``realizations``, ``seed``, ``capability_scheme``.

    Optional extras (docs/confidence.md): verdict confidence under DEM error (``dem_rmse_m`` or the
    rulebook's ``[uncertainty]``), a land-capability map (``capability_scheme``, e.g. ``"planning-6"``)
    and a drafted reclassification (``draft_mmu_m2``, minimum mapping unit).

    Raises
    ------
    InputDataError, RuleFileError, OutputExistsError, OutputWriteError
        Bad input or outputs that cannot be written; nothing is written then.
    """
    s = settings_from_options(settings, **options)  # every option validated here, before anything is read
    if s.report:
        # the report is a promise: fail now, not after the window pass, if it cannot be built
        from landcheck.evidence.report import build_report
    rules = open_rules(rules)
    inputs = [p for p in (dem, parcels) if isinstance(p, (str, os.PathLike))]
    if not rules.path.startswith("<"):
        inputs.append(rules.path)
    out = check_output_path(out_dir, [*inputs, *rules.layers.values()], overwrite=overwrite)
    step = on_step or (lambda m: logger.info(m))
    started = _dt.datetime.now(_dt.timezone.utc)
    with staged_folder(out, overwrite=overwrite) as stage:
        hook = _FolderRasters(stage, s.rasters) if _needs_rasters(s) else None
        try:
            run = _run_audit(dem, parcels, rules, s, on_step=step, raster_hook=hook)
        except BaseException:
            if hook is not None:
                hook.abort()
            raise
        cells = None
        if hook is not None:
            try:
                cells = _cell_zones_sink(stage, run.zones, s.rasters) if run.zones is not None else None
                if cells is not None:
                    run.summary["cell_zone_bits"] = cells[0]
                    hook.adopt(cells[1])
                hook.finish()
            except BaseException:
                hook.abort()
                raise
        # The COG copies (GDAL, outside the GIL) are made on a thread while the tables, the layers and the
        # report are written; the report reads the finished scratch files meanwhile.  Beside the report the
        # copies compress on one core and leave the other to it (1.3 s faster at 100 000 parcels than all
        # cores for both).  GDAL's block cache holds nothing worth keeping from here on (every raster is
        # read or copied once): a smaller cap keeps the copies' memory beside the report's low (docs/scale.md).
        threads = 1 if s.report else None
        # The close-ups and charts are drawn by a second process beside the rest of the report; it is
        # forked here, while no other thread works (landcheck.evidence.figure_worker), and gets its job
        # once the tables are written.  Not beside a Dask client, whose threads keep running.
        forkable = s.engine.kind is not EngineKind.DASK
        worker = _start_figure_worker() if s.report and hook is not None and forkable else None
        try:
            with lowered_gdal_cache(AFTER_PASS_GDAL_CACHE_BYTES):
                closing = _Background(lambda: hook.publish(threads)) if hook is not None else None
                try:
                    write_audit_folder(stage, run, cell_zones_written=hook is not None)
                    # memory freed by the pass and the raster thread goes back before the report adds its own
                    release_heap(collect=True)
                    if s.report:
                        step("building the report")
                        # the parcel shapes just written to parcels.gpkg are passed on, not read back
                        build_report(
                            stage,
                            parcel_shapes=run.parcels,
                            raster_files=hook.readable_files() if hook is not None else None,
                            before_output_hashes=closing.join if closing is not None else None,
                            figure_worker=worker,
                        )
                finally:
                    if worker is not None:
                        worker.stop()  # already finished unless the report failed: stopped first
                    if closing is not None:
                        closing.join()
                        hook.discard_scratch()
        finally:
            if worker is not None:
                worker.stop()  # also when the steps before the report failed
        # the one file a rerun changes (docs/outputs.md): times, and how the run was executed
        write_run_times(stage, started, execution={"tile_cells": s.tile_cells, **s.engine.describe()})
    step(f"outputs in {out}")
    return AuditResult(out, run.summary, run.table, run.classes, run.warnings, run)
