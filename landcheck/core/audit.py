"""The audit: DEM + parcels + rulebook -> per-parcel, per-class and whole-area figures and outputs.

:func:`audit` wires the steps; it prints nothing and returns an :class:`AuditResult`.
One streamed pass over the DEM windows computes slope, hazard-zone bits and
the exact-coverage sums of every parcel; verdicts and tables follow; every
output is written into a staged folder that replaces the target in one rename.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import logging
import os
import threading
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from landcheck.about import CAUTION, __version__
from landcheck.engine.backends import map_windows
from landcheck.engine.handles import ThreadLocalHandles
from landcheck.engine.windows import progress_bar, slope_window
from landcheck.errors import InputDataError, LandcheckWarning
from landcheck.geo.grid import Window, iter_windows
from landcheck.inputs.dem import DemSource, ZUnit, open_dem, refuse_if_nothing_evaluated
from landcheck.inputs.layers import areal_factor_at, ground_areas, read_parcels
from landcheck.inputs.rulebook import Rulebook, load_rules
from landcheck.outputs.folder import source_date_utc, write_run_times
from landcheck.outputs.writers import (
    RasterFormat,
    RasterSink,
    check_output_path,
    staged_folder,
    write_csv,
    write_gpkg,
    write_json,
)
from landcheck.overlay.coverage import CoverageBuffers, coverage_triplets_aligned, prepare_polygons
from landcheck.overlay.sums import CONFLICT_OUTSIDE, ROLE_PARCEL, OverlayPlan, Totals, accumulate_window_compiled
from landcheck.terrain.slope import SlopeMethod, gradient_to_unit
from landcheck.verdicts.evaluate import (
    SENSITIVITY_LIMITS_PCT,
    Verdict,
    evaluate_parcels,
    parcel_rules,
    sensitivity_table,
    slope_histogram,
    summarise_classes,
)

__all__ = ["audit", "AuditResult", "AuditSettings"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class AuditSettings:
    """Everything that shapes an audit's numbers besides the input files (recorded in the manifest)."""

    method: SlopeMethod
    tile_cells: int = 1024
    dem_band: int | None = None
    dem_crs: str | None = None
    z_unit: ZUnit = ZUnit.METRE
    parcels_layer: str | None = None
    parcels_crs: str | None = None


@dataclass
class AuditResult:
    out_dir: Path
    summary: dict
    parcels: pd.DataFrame
    classes: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    @property
    def n_conflicts(self) -> int:
        return int((self.parcels["verdict"] == Verdict.CONFLICT).sum())


def _rewarn(caught) -> list[str]:
    """Messages of the LandcheckWarnings recorded in ``caught``, warned again to the caller."""
    out = []
    for w in caught:
        if issubclass(w.category, LandcheckWarning):
            out.append(str(w.message))
            warnings.warn(str(w.message), LandcheckWarning, stacklevel=3)
    return out


def sha256_file(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _input_files(path: str) -> list[str]:
    """The file and its sidecars (a Shapefile is several files)."""
    p = Path(path)
    if p.suffix.lower() == ".shp":
        return sorted(str(q) for q in p.parent.glob(p.stem + ".*"))
    return [str(p)] if p.is_file() else []


def _build_plan(
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
                    rbits |= 1 << col.raster_channel
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
    )


class _WindowJob(ThreadLocalHandles):
    """The per-window task: slope, zone bits, exact coverage, sums.  Picklable for Dask."""

    def __init__(self, dem: DemSource, method: SlopeMethod, geoms: np.ndarray, plan: OverlayPlan, zones=None):
        self.dem = dem
        self.method = method
        self.polygons = prepare_polygons(geoms)  # flattened once; each window picks what meets it
        self.all_index = np.arange(len(geoms), dtype=np.int64)
        self.plan = plan
        self.zones = zones
        self._local = threading.local()  # per-thread reusable coverage buffers
        self.keep_rasters = (
            True  # False: hand back no slope/conflict tiles (nothing to write; less to ship from workers)
        )

    def __call__(self, win: Window):
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
        sums, conflict = accumulate_window_compiled(
            slope_pct, zone_bits, g.cell_area_m2(rows), self.all_index, tuple(trip), self.plan, land_mask
        )
        if not self.keep_rasters:
            return sums, None, None
        return sums, slope_pct, conflict


def audit(
    dem_path: str | os.PathLike,
    parcels_path: str | os.PathLike,
    rulebook_path: str | os.PathLike,
    out_dir: str | os.PathLike,
    *,
    parcels_layer: str | None = None,
    parcels_crs: str | None = None,
    dem_band: int | None = None,
    dem_crs: str | None = None,
    z_unit: ZUnit | str | None = None,
    method: SlopeMethod | str | None = None,
    tile_cells: int = 1024,
    workers: int | None = None,
    overwrite: bool = False,
    show_progress: bool | None = None,
    make_report: bool = True,
    on_step: Callable[[str], None] | None = None,
    engine: str = "threads",
    scheduler_address: str | None = None,
    rasters: str = "cog",
    dem_rmse_m: float | None = None,
    corr_length_m: float | None = None,
    realizations: int | None = None,
    seed: int | None = None,
    capability_scheme=None,
    draft_mmu_m2: float | None = None,
    skip_confidence: bool = False,
    mask_implausible: bool = False,
) -> AuditResult:
    """Run the audit and write its output folder (docs/outputs.md).

    Optional extras (docs/confidence.md): verdict confidence under DEM error (``dem_rmse_m`` or the
    rulebook's ``[uncertainty]``), a land-capability map (``capability_scheme``, e.g. ``"planning-6"``)
    and a drafted reclassification of conflicting parcels (``draft_mmu_m2``, minimum mapping unit).

    Raises
    ------
    InputDataError, RuleFileError, OutputExistsError, OutputWriteError
        Bad input or outputs that cannot be written; nothing is written then.
    """
    started = _dt.datetime.now(_dt.timezone.utc)
    step = on_step or (lambda s: logger.info(s))
    rules = load_rules(rulebook_path)
    layer_paths = list(rules.layers.values())
    out = check_output_path(out_dir, [dem_path, parcels_path, rulebook_path, *layer_paths], overwrite=overwrite)
    settings = AuditSettings(
        SlopeMethod.from_user(method) if method else rules.slope_method,
        tile_cells,
        dem_band,
        dem_crs,
        ZUnit.from_user(z_unit) if z_unit is not None else None,
        parcels_layer,
        parcels_crs,
    )
    raster_format = RasterFormat.from_user(rasters)  # cog | gtiff | none (docs/scale.md)
    if raster_format is RasterFormat.NONE and make_report:
        raise InputDataError(
            "rasters='none' writes no slope or conflict raster, and the report maps need them; "
            "turn the report off (--no-report) or choose rasters 'cog' or 'gtiff'."
        )
    collected: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LandcheckWarning)
        dem = open_dem(dem_path, band=dem_band, crs=dem_crs, z_unit=settings.z_unit, mask_implausible=mask_implausible)
    collected += _rewarn(caught)
    settings = replace(settings, z_unit=dem.z_unit)  # the unit read from the data when none was given
    g = dem.grid
    from landcheck.verdicts.confidence import confidence_settings

    conf = (
        None
        if skip_confidence
        else confidence_settings(
            rules, g, rmse_m=dem_rmse_m, corr_length_m=corr_length_m, realizations=realizations, seed=seed
        )
    )
    if draft_mmu_m2 is not None and draft_mmu_m2 < 0:
        raise InputDataError(f"minimum mapping unit: got {draft_mmu_m2} m²; give 0 or a positive area.")
    step(f"DEM {g.width}x{g.height} cells, {'geographic' if g.geographic else 'projected'}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LandcheckWarning)
        ps = read_parcels(
            parcels_path,
            class_field=rules.class_field,
            id_field=rules.id_field,
            target_crs_wkt=g.crs_wkt,
            layer=parcels_layer,
            crs=parcels_crs,
        )
    for w in caught:
        if issubclass(w.category, LandcheckWarning):
            collected.append(str(w.message))
            warnings.warn(str(w.message), LandcheckWarning, stacklevel=2)
    frame = ps.frame
    geoms = np.asarray(frame.geometry.values)
    import shapely

    empty = shapely.is_empty(geoms)
    dem_box = shapely.box(*g.bounds)
    inside = shapely.intersects(geoms, dem_box)
    if not inside.any():
        raise InputDataError(
            f"{ps.where}: no parcel overlaps the DEM {dem.path} (DEM bounds {tuple(round(b, 3) for b in g.bounds)} "
            "in its CRS); check that the parcels and the DEM cover the same area and CRS."
        )
    n_out = int((~inside & ~empty).sum())
    if n_out:
        msg = f"{ps.where}: {n_out} parcels lie entirely outside the DEM; they are reported with verdict no_data."
        collected.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=2)
    area_m2, area_factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    no_rule_valued = (pr.class_name == "no_rule") & frame["class_value"].notna().to_numpy()  # NULLs: warned on read
    unmatched = sorted(set(frame["class_value"][no_rule_valued].astype(str)))
    if unmatched:
        msg = (
            f"{ps.where}: {int(no_rule_valued.sum())} parcels have class values with no rule "
            f"({', '.join(map(repr, unmatched[:10]))}); they are listed with verdict no_rule."
        )
        collected.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=2)
    # whole-area land figures use the map-to-ground factor at the DEM's centre (parcels use their own)
    ground_factor = (
        1.0
        if g.geographic
        else areal_factor_at(g.crs_wkt, (g.bounds[0] + g.bounds[2]) / 2, (g.bounds[1] + g.bounds[3]) / 2)
    )
    step(f"{len(frame)} parcels, {len(rules.classes)} classes, {len(rules.zones)} zones")

    zones = None
    all_geoms = geoms
    piece_parcel = piece_role = None
    if rules.zones:
        from landcheck.zones.prepare import prepare_zones, vector_pieces

        zones = prepare_zones(rules, dem, frame, pr, settings, step=step)
        collected += zones.warnings
        pieces, piece_parcel, piece_role = vector_pieces(zones, rules, geoms, pr.class_name)
        all_geoms = np.concatenate([geoms, pieces]) if len(pieces) else geoms
        step(f"zones ready: {len(zones.columns)} zone columns, {len(pieces)} parcel/zone intersection pieces")
    plan = _build_plan(rules, pr.class_name, area_factor, ground_factor, zones, piece_parcel, piece_role)

    windows = list(iter_windows(g.height, g.width, tile_cells))
    job = _WindowJob(dem, settings.method, all_geoms, plan, zones)
    totals = Totals(len(frame), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    zone_names = [z.name for z in rules.zones]
    columns = zones.columns if zones is not None else []
    job.keep_rasters = raster_format is not RasterFormat.NONE
    with staged_folder(out, overwrite=overwrite) as stage:
        with (
            RasterSink(
                stage / "slope_pct.tif", g, dtype="float32", nodata=np.nan, band_names=["slope_pct"], fmt=raster_format
            ) as slope_sink,
            RasterSink(
                stage / "conflict.tif",
                g,
                dtype="uint8",
                nodata=CONFLICT_OUTSIDE,
                fmt=raster_format,
                categorical=True,
                band_names=[
                    "conflict bits: 1=slope" + "".join(f", {1 << (i + 1)}={z}" for i, z in enumerate(zone_names))
                ],
            ) as conflict_sink,
            progress_bar(len(windows), "audit", enabled=show_progress) as bar,
        ):
            for win, (sums, slope_pct, conflict) in map_windows(
                job, windows, engine=engine, workers=workers, scheduler_address=scheduler_address, progress=bar
            ):
                totals.add(sums)
                slope_sink.write(win, slope_pct)
                conflict_sink.write(win, conflict)
        step("window pass done")
        parcels = evaluate_parcels(totals, plan, rules, pr, area_m2, empty, frame["class_value"].to_numpy(), columns)
        refuse_if_nothing_evaluated(dem, parcels["evaluated_m2"].to_numpy(), area_m2, ps.where)
        parcels.insert(0, "parcel_id", frame["parcel_id"].to_numpy())
        parcels["geometry_note"] = frame["geometry_note"].to_numpy()
        classes = summarise_classes(parcels, rules)
        extra = _extras(
            stage,
            dem,
            windows,
            all_geoms,
            plan,
            rules,
            pr,
            settings,
            parcels,
            zones,
            conf,
            capability_scheme,
            draft_mmu_m2,
            workers,
            show_progress,
            step,
        )
        counted = (parcels["verdict"] != Verdict.NO_DATA).to_numpy() & (
            parcels["verdict"] != Verdict.NO_RULE
        ).to_numpy()
        summary = _summary(rules, parcels, classes, totals, plan, pr, counted, zone_names, collected, columns)
        summary.update(extra)
        summary["manifest"] = _manifest(
            started,
            dem,
            parcels_path,
            rules,
            settings,
            workers,
            g,
            engine,
            conf,
            capability_scheme,
            draft_mmu_m2,
            raster_format.value,
        )
        if zones is not None:
            summary["zones"] = zones.describe()
            zones.write_layers(stage)
        import geopandas as gpd

        gdf = gpd.GeoDataFrame(parcels.copy(), geometry=frame.geometry.values, crs=frame.crs)
        write_gpkg(stage / "parcels.gpkg", gdf, layer="parcels")
        write_csv(stage / "parcels.csv", parcels)
        write_csv(stage / "classes.csv", classes)
        write_json(stage / "summary.json", summary)
        if make_report:
            try:
                from landcheck.evidence.report import build_report
            except ImportError:
                build_report = None
            if build_report is not None:
                step("building the report")
                build_report(stage)
        write_run_times(stage, started)
    step(f"outputs in {out}")
    return AuditResult(out, summary, parcels, classes, collected)


def _extras(
    stage,
    dem,
    windows,
    all_geoms,
    plan,
    rules,
    pr,
    settings,
    parcels,
    zones,
    conf,
    capability_scheme,
    draft_mmu_m2,
    workers,
    show_progress,
    step,
) -> dict:
    """Confidence under DEM error, capability map, drafted reclassification; writes their files, adds columns."""
    extra: dict = {}
    if conf is not None:
        from landcheck.verdicts.confidence import run_confidence

        step(f"confidence: {conf.realizations} realizations of DEM error (RMSE {conf.model.rmse_m:g} m)")
        with progress_bar(conf.realizations * len(windows), "confidence", enabled=show_progress) as cbar:
            cparcels, cclasses, extra["confidence"] = run_confidence(
                dem,
                windows,
                all_geoms,
                plan,
                rules,
                pr,
                settings,
                parcels,
                conf,
                zones=zones,
                workers=workers,
                progress=cbar,
            )
        parcels["p_conflict"] = cparcels["p_conflict"].to_numpy()
        parcels["confidence"] = cparcels["confidence"].to_numpy()
        write_csv(stage / "confidence.csv", cparcels)
        write_csv(stage / "confidence_classes.csv", cclasses)
    if capability_scheme is not None:
        from landcheck.verdicts.capability import capability_spec, run_capability, write_capability_legend

        step("land-capability map")
        spec = capability_spec(rules, zones, scheme=capability_scheme)
        table, _ = run_capability(
            dem,
            windows,
            all_geoms,
            plan,
            rules,
            spec,
            stage / "capability.tif",
            method=settings.method,
            zones=zones,
            workers=workers,
        )
        write_csv(stage / "capability_by_class.csv", table)
        write_capability_legend(stage, spec)
        extra["capability_map"] = {"scheme": spec.scheme.key, "hazard_zones": list(spec.hazard_zones)}
    if draft_mmu_m2 is not None:
        from landcheck.verdicts.reclassify import draft_reclassification

        step("drafting the reclassification of conflicting parcels")
        parts, moves = draft_reclassification(
            dem, settings, parcels, all_geoms, plan, rules, pr, zones=zones, mmu_m2=draft_mmu_m2
        )
        if len(parts):
            write_gpkg(stage / "reclassification.gpkg", parts, layer="parts")
        write_csv(stage / "reclassification_moves.csv", moves)
        extra["reclassification"] = {
            "mmu_m2": draft_mmu_m2,
            "parts": int(len(parts)),
            "moves": moves.to_dict(orient="records"),
        }
    return extra


def _summary(rules, parcels, classes, totals, plan, pr, counted, zone_names, collected, columns) -> dict:
    counts = {v: int((parcels["verdict"] == v).sum()) for v in Verdict.ALL}
    cov = float(parcels.loc[counted, "covered_m2"].sum())
    conflict = float(parcels.loc[counted, "conflict_m2"].sum())
    dev_names = {c.name for c in rules.classes if c.development}
    dev = parcels["class_name"].isin(dev_names).to_numpy()
    total_area = float(parcels["covered_m2"].sum())
    cap = {
        "reference_limit_pct": plan.capability_limit_pct,
        "dem_land_m2": totals.land_m2,
        "land_within_limit_m2": totals.land_within_m2 if plan.capability_limit_pct is not None else None,
        "land_within_limit_share": (totals.land_within_m2 / totals.land_m2)
        if totals.land_m2 > 0 and plan.capability_limit_pct is not None
        else None,
        "classified_m2": total_area,
        "classified_development_m2": float(parcels.loc[dev, "covered_m2"].sum()),
        "classified_development_share": float(parcels.loc[dev, "covered_m2"].sum()) / totals.land_m2
        if totals.land_m2 > 0
        else None,
    }
    return {
        "tool": "landcheck",
        "version": __version__,
        "caution": CAUTION,
        "title": rules.title,
        "totals": {
            "parcels": int(len(parcels)),
            "area_m2": float(parcels["area_m2"].sum()),
            "evaluated_m2": float(parcels["evaluated_m2"].sum()),
            "conflict_m2": conflict,
            "conflict_share": conflict / cov if cov > 0 else None,
            "verdict_counts": counts,
        },
        "capability": cap,
        "classes": classes.to_dict(orient="records"),
        "sensitivity": sensitivity_table(totals, plan, pr, rules, counted),
        "slope_histogram": slope_histogram(totals, rules),
        "conflict_raster_bits": ["slope", *zone_names],
        "zone_columns": [
            {"name": c.name, "label": c.label, "rulebook_zone": c.zone_index is not None} for c in columns
        ],
        "zone_shares_by_class": _zone_shares_by_class(parcels, rules, columns),
        "warnings": collected,
    }


def _zone_shares_by_class(parcels: pd.DataFrame, rules: Rulebook, columns) -> dict:
    """Share of each class's covered area inside each zone column (sea-rise scenarios included)."""
    out = {}
    for c in rules.classes:
        sel = parcels["class_name"] == c.name
        cov = float(parcels.loc[sel, "covered_m2"].sum())
        out[c.name] = {
            col.name: (float(parcels.loc[sel, f"zone_{col.name}_m2"].sum()) / cov if cov > 0 else None)
            for col in columns
        }
    return out


def _manifest(
    started,
    dem: DemSource,
    parcels_path,
    rules: Rulebook,
    settings: AuditSettings,
    workers,
    g,
    engine: str = "threads",
    conf=None,
    capability_scheme=None,
    draft_mmu_m2=None,
    rasters: str = "cog",
) -> dict:
    from landcheck.versions import show_versions

    inputs = [{"role": "dem", "path": str(Path(dem.path).resolve()), "sha256": sha256_file(dem.path)}]
    for f in _input_files(os.fspath(parcels_path)):
        inputs.append({"role": "parcels", "path": str(Path(f).resolve()), "sha256": sha256_file(f)})
    for name, p in rules.layers.items():
        for f in _input_files(p):
            inputs.append({"role": f"layer:{name}", "path": str(Path(f).resolve()), "sha256": sha256_file(f)})
    return {
        "run_times": "run_times.json (the only output a rerun changes; docs/outputs.md)",
        **({"started_utc": source_date_utc()} if source_date_utc() else {}),  # SOURCE_DATE_EPOCH only
        "inputs": inputs,
        "rulebook": {"path": str(Path(rules.path).resolve()), "sha256": rules.sha256, "text": rules.text},
        "parameters": {
            "slope_method": settings.method.value,
            "tile_cells": settings.tile_cells,
            "dem_band": dem.band,
            "dem_crs_override": settings.dem_crs,
            "z_unit": settings.z_unit.value,
            "z_unit_source": dem.z_unit_source,
            "mask_implausible": dem.mask_implausible,
            "parcels_layer": settings.parcels_layer,
            "parcels_crs_override": settings.parcels_crs,
            "workers": workers,
            "engine": engine,
            "rasters": str(rasters),
            "confidence": conf.describe() if conf is not None else None,
            "capability_scheme": str(capability_scheme) if capability_scheme is not None else None,
            "draft_mmu_m2": draft_mmu_m2,
            "edge_policy": "strict window: no slope where the cell or a neighbour the method reads is invalid",
            "coverage": "exact cell-coverage fractions",
        },
        "crs_wkt": g.crs_wkt,
        "grid": {"width": g.width, "height": g.height, "transform": list(g.transform)[:6], "geographic": g.geographic},
        "software": show_versions(),
    }
