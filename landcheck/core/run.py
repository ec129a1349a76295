"""The in-memory audit: DEM + parcels + rules -> per-parcel GeoDataFrame, class table, summary.

:func:`run_audit` reads nothing it is not given and writes no file.  One
streamed pass over the DEM windows (on the chosen engine) computes slope,
hazard-zone bits, the exact-coverage sums of every parcel and, when asked,
the land-capability areas; verdicts and tables follow, then the optional
extras (confidence, drafted reclassification) on the same engine.

Memory stays bounded by a few windows per worker: the slope and conflict
rasters are not kept.  :meth:`AuditRun.slope_pct` and
:meth:`AuditRun.conflict_bits` recompute any window on demand with the same
kernels (bit for bit what :func:`landcheck.core.audit.audit` writes to
``slope_pct.tif`` and ``conflict.tif``).
"""

from __future__ import annotations

import copy
import datetime as _dt
import logging
import os
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from landcheck.about import CAUTION, __version__
from landcheck.core.settings import AuditSettings, CapabilityOptions
from landcheck.core.window_pass import WindowJob, WindowOutput, build_plan
from landcheck.engine.windows import progress_bar, slope_window
from landcheck.errors import InputDataError, LandcheckWarning, RuleFileError
from landcheck.geo.grid import GridSpec, Window, iter_windows
from landcheck.geo.ground_area import ground_areas
from landcheck.hashing import sha256_file
from landcheck.inputs.dem import DemSource, open_dem, refuse_if_nothing_evaluated
from landcheck.inputs.layers import areal_factor_at, read_parcels, validate_parcels
from landcheck.inputs.rulebook import Rulebook, load_rules, rules_from_mapping
from landcheck.outputs.folder import source_date_utc
from landcheck.overlay.sums import Totals
from landcheck.terrain.slope import gradient_to_unit
from landcheck.verdicts.evaluate import (
    Verdict,
    evaluate_parcels,
    parcel_rules,
    sensitivity_table,
    slope_histogram,
    summarise_classes,
)
from landcheck.wording import count_text

if TYPE_CHECKING:
    import geopandas as gpd

__all__ = ["AuditRun", "open_rules", "run_audit"]

logger = logging.getLogger(__name__)


def open_rules(rules: str | os.PathLike | Mapping | Rulebook) -> Rulebook:
    """A parsed rulebook from a path (TOML file), a mapping shaped like the TOML, or a Rulebook."""
    if isinstance(rules, Rulebook):
        return rules
    if isinstance(rules, Mapping):
        return rules_from_mapping(rules)
    if isinstance(rules, (str, os.PathLike)):
        return load_rules(rules)
    raise RuleFileError(f"rules: expected a path, a mapping or a Rulebook, got {type(rules).__name__}.")


def _open_dem(dem, s: AuditSettings) -> DemSource:
    if isinstance(dem, DemSource):
        return dem
    if isinstance(dem, (str, os.PathLike)):
        return open_dem(dem, band=s.dem_band, crs=s.dem_crs, z_unit=s.z_unit, mask_implausible=s.mask_implausible)
    raise InputDataError(f"dem: expected a path or an opened DEM (open_dem), got {type(dem).__name__}.")


def _input_files(path: str) -> list[str]:
    """The file and its sidecars (a Shapefile is several files)."""
    p = Path(path)
    if p.suffix.lower() == ".shp":
        return sorted(str(q) for q in p.parent.glob(p.stem + ".*"))
    return [str(p)] if p.is_file() else []


@dataclass
class AuditRun:
    """What :func:`run_audit` computed (nothing written).

    Attributes
    ----------
    parcels : geopandas.GeoDataFrame
        One row per parcel, in input order: every column of ``parcels.gpkg`` (docs/outputs.md), with the
        geometry in the DEM's CRS (repaired where it was invalid).
    classes : pandas.DataFrame
        One row per rulebook class (``classes.csv``).
    summary : dict
        The content of ``summary.json`` (totals, capability, sensitivity, histogram, manifest, ...).
    warnings : list of str
        Everything the run noted (also issued as :class:`~landcheck.errors.LandcheckWarning`).
    confidence : tuple (parcels, classes) of DataFrames, or None
        ``confidence.csv`` and ``confidence_classes.csv`` when a DEM error model was given.
    capability : tuple (table, CapabilitySpec), or None
        ``capability_by_class.csv`` and the legend's spec when a capability map was asked for.
    reclassification : tuple (parts GeoDataFrame, moves DataFrame), or None
        The drafted reclassification when ``draft_mmu_m2`` was given.
    zones : landcheck.zones.prepare.ZoneSet or None
        The prepared hazard zones (their layers are what ``zones/*.gpkg`` holds).
    """

    parcels: gpd.GeoDataFrame
    classes: pd.DataFrame
    summary: dict
    warnings: list[str]
    rules: Rulebook
    settings: AuditSettings
    dem: DemSource
    zones: object = None
    confidence: tuple | None = None
    capability: tuple | None = None
    reclassification: tuple | None = None
    _job: WindowJob | None = field(default=None, repr=False)

    @property
    def table(self) -> pd.DataFrame:
        """The per-parcel table without geometry (``parcels.csv``)."""
        return pd.DataFrame(self.parcels.drop(columns=self.parcels.geometry.name))

    @property
    def n_conflicts(self) -> int:
        return int((self.parcels["verdict"] == Verdict.CONFLICT).sum())

    def _window(self, win: Window | None) -> Window:
        g = self.dem.grid
        return Window(0, 0, g.height, g.width) if win is None else win

    def slope_pct(self, win: Window | None = None) -> np.ndarray:
        """Slope (percent, float32, NaN where undefined) of ``win`` (default the whole DEM: mind its size)."""
        return gradient_to_unit(slope_window(self.dem, self._window(win), self.settings.method), "percent")

    def conflict_bits(self, win: Window | None = None) -> np.ndarray:
        """Conflict bits (uint8, ``conflict.tif``'s codes, docs/outputs.md) of ``win`` (default the whole DEM)."""
        job = self._job
        if not job.keep_rasters:
            job = copy.copy(job)  # shares the prepared polygons; only the flag differs
            job.keep_rasters = True
        return job(self._window(win)).conflict


class _RasterHook:
    """Receives every window's output during the pass (the folder writer streams rasters with it)."""

    def open(self, run_grid, zone_names: list[str], capability_spec) -> None:  # pragma: no cover - interface
        pass

    def write(self, win: Window, out: WindowOutput) -> None:  # pragma: no cover - interface
        pass


def run_audit(
    dem: str | os.PathLike | DemSource,
    parcels,
    rules: str | os.PathLike | Mapping | Rulebook,
    settings: AuditSettings | None = None,
    *,
    on_step: Callable[[str], None] | None = None,
) -> AuditRun:
    """Audit parcels against a rulebook on a DEM, in memory: no file or folder is written.

    Parameters
    ----------
    dem : path or DemSource
        A raster path (read with ``settings.dem_band``, ``dem_crs``, ``z_unit``) or an opened DEM
        (:func:`landcheck.inputs.dem.open_dem`).
    parcels : path or geopandas.GeoDataFrame
        A vector file (read like ``--parcels``) or a GeoDataFrame; either way validated the same way
        (CRS required, reprojected to the DEM's CRS, unique ids, invalid geometries repaired with a
        warning).  A GeoDataFrame passed in is not modified.
    rules : path, mapping or Rulebook
        The rulebook file (TOML), a mapping shaped like the parsed TOML, or a parsed :class:`Rulebook`.
    settings : AuditSettings, optional
        Method, tiling, engine, extras (validated when built; the rest is checked here before any pass).
    on_step : callable, optional
        Called with a progress message at each step.

    Returns
    -------
    AuditRun

    Raises
    ------
    InputDataError, RuleFileError
        Bad input or option; raised before the window pass whenever the inputs alone show it.
    """
    return _run_audit(dem, parcels, rules, settings, on_step=on_step)


def _check_against_rules(s: AuditSettings, rules: Rulebook) -> None:
    cap: CapabilityOptions | None = s.capability
    if cap is not None and cap.hazard_zones is not None:
        names = [z.name for z in rules.zones]
        unknown = [z for z in cap.hazard_zones if z not in names]
        if unknown:
            raise RuleFileError(
                f"{rules.path}: capability hazard zone {unknown[0]!r} is not defined; defined zones: "
                f"{', '.join(names) or 'none'}."
            )
    if len(rules.zones) > 7:
        raise InputDataError(
            f"{rules.path}: {len(rules.zones)} zones defined; at most 7 fit the conflict raster's bits."
        )


def check_parcels_on_dem(inside, empty, where: str, dem, collected: list) -> None:
    """Refuse when no parcel meets the DEM; warn about the parcels that lie wholly outside it."""
    g = dem.grid
    if not inside.any():
        raise InputDataError(
            f"{where}: no parcel overlaps the DEM {dem.path} (DEM bounds {tuple(round(b, 3) for b in g.bounds)} "
            "in its CRS); check that the parcels and the DEM cover the same area and CRS."
        )
    n_out = int((~inside & ~empty).sum())
    if n_out:
        msg = (
            f"{where}: {count_text(n_out, 'parcel')} {'lies' if n_out == 1 else 'lie'} entirely outside the DEM; "
            "reported as no data (verdict no_data in parcels.csv)."
        )
        collected.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=4)


def warn_unmatched_classes(pr, class_value, where: str, collected: list) -> None:
    """Warn (once, listing up to ten values) about parcels whose non-NULL class value has no rule."""
    no_rule_valued = (pr.class_name == "no_rule") & class_value.notna().to_numpy()  # NULLs: warned on read
    unmatched = sorted(set(class_value[no_rule_valued].astype(str)))
    if unmatched:
        n = int(no_rule_valued.sum())
        msg = (
            f"{where}: {count_text(n, 'parcel')} {'has a class value' if n == 1 else 'have class values'} with no rule "
            f"({', '.join(map(repr, unmatched[:10]))}); listed as no rule (verdict no_rule in parcels.csv)."
        )
        collected.append(msg)
        warnings.warn(msg, LandcheckWarning, stacklevel=4)


def whole_area_ground_factor(g: GridSpec) -> float:
    """Map-to-ground area factor for the whole-area land figures: the DEM centre's (parcels use their own)."""
    if g.geographic:
        return 1.0
    return areal_factor_at(g.crs_wkt, (g.bounds[0] + g.bounds[2]) / 2, (g.bounds[1] + g.bounds[3]) / 2)


def _run_audit(
    dem,
    parcels,
    rules,
    settings: AuditSettings | None,
    *,
    on_step: Callable[[str], None] | None = None,
    raster_hook: _RasterHook | None = None,
) -> AuditRun:
    import geopandas as gpd
    import shapely

    started = _dt.datetime.now(_dt.timezone.utc)
    step = on_step or (lambda s: logger.info(s))
    s = settings if settings is not None else AuditSettings()
    if not isinstance(s, AuditSettings):
        raise InputDataError(f"settings: expected AuditSettings, got {type(s).__name__}.")
    rules = open_rules(rules)
    _check_against_rules(s, rules)
    if s.method is None:
        import dataclasses

        s = dataclasses.replace(s, method=rules.slope_method)
    collected: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LandcheckWarning)
        dem = _open_dem(dem, s)
    collected += _rewarn(caught)
    g = dem.grid
    from landcheck.verdicts.confidence import confidence_settings

    c = s.confidence
    conf = (
        confidence_settings(
            rules, g, rmse_m=c.rmse_m, corr_length_m=c.corr_length_m, realizations=c.realizations, seed=c.seed
        )
        if c.enabled
        else None
    )
    step(f"DEM {g.width}x{g.height} cells, {'geographic' if g.geographic else 'projected'}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LandcheckWarning)
        if isinstance(parcels, gpd.GeoDataFrame):
            ps = validate_parcels(
                parcels,
                class_field=rules.class_field,
                id_field=rules.id_field,
                target_crs_wkt=g.crs_wkt,
                crs=s.parcels_crs,
            )
        elif isinstance(parcels, (str, os.PathLike)):
            ps = read_parcels(
                parcels,
                class_field=rules.class_field,
                id_field=rules.id_field,
                target_crs_wkt=g.crs_wkt,
                layer=s.parcels_layer,
                crs=s.parcels_crs,
            )
        else:
            raise InputDataError(f"parcels: expected a path or a GeoDataFrame, got {type(parcels).__name__}.")
    collected += _rewarn(caught)
    frame = ps.frame
    geoms = np.asarray(frame.geometry.values)

    empty = shapely.is_empty(geoms)
    dem_box = shapely.box(*g.bounds)
    inside = shapely.intersects(geoms, dem_box)
    check_parcels_on_dem(inside, empty, ps.where, dem, collected)
    area_m2, area_factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    warn_unmatched_classes(pr, frame["class_value"], ps.where, collected)
    ground_factor = whole_area_ground_factor(g)
    step(
        f"{count_text(len(frame), 'parcel')}, {count_text(len(rules.classes), 'class', 'classes')}, "
        f"{count_text(len(rules.zones), 'zone')}"
    )

    zones = None
    all_geoms = geoms
    piece_parcel = piece_role = None
    if rules.zones:
        from landcheck.zones.prepare import prepare_zones, vector_pieces

        zones = prepare_zones(rules, dem, frame, pr, s, step=step)
        collected += zones.warnings
        pieces, piece_parcel, piece_role = vector_pieces(zones, rules, geoms, pr.class_name)
        all_geoms = np.concatenate([geoms, pieces]) if len(pieces) else geoms
        step(f"zones ready: {len(zones.columns)} zone columns, {len(pieces)} parcel/zone intersection pieces")
    plan = build_plan(rules, pr.class_name, area_factor, ground_factor, zones, piece_parcel, piece_role)
    spec = None
    if s.capability is not None:
        from landcheck.verdicts.capability import CapabilityTotals, capability_spec

        spec = capability_spec(rules, zones, scheme=s.capability.scheme, hazard_zones=s.capability.hazard_zones)
        cap_totals = CapabilityTotals(plan.n_classes)

    windows = list(iter_windows(g.height, g.width, s.tile_cells))
    job = WindowJob(dem, s.method, all_geoms, plan, zones, capability=spec, keep_rasters=raster_hook is not None)
    totals = Totals(len(frame), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    zone_names = [z.name for z in rules.zones]
    columns = zones.columns if zones is not None else []
    if raster_hook is not None:
        raster_hook.open(g, zone_names, spec)
    if spec is not None:
        step("land-capability map (in the same window pass)")
    with progress_bar(len(windows), "audit", enabled=s.show_progress) as bar:
        for win, out in s.engine.map(job, windows, progress=bar):
            totals.add(out.sums)
            if spec is not None:
                cap_totals.add(out.capability_m2)
            if raster_hook is not None:
                raster_hook.write(win, out)
    step("window pass done")
    table = evaluate_parcels(totals, plan, rules, pr, area_m2, empty, frame["class_value"].to_numpy(), columns)
    refuse_if_nothing_evaluated(dem, table["evaluated_m2"].to_numpy(), area_m2, ps.where)
    table.insert(0, "parcel_id", frame["parcel_id"].to_numpy())
    table["geometry_note"] = frame["geometry_note"].to_numpy()
    classes = summarise_classes(table, rules)
    extra: dict = {}
    run = AuditRun(None, classes, {}, collected, rules, s, dem, zones, _job=job)
    if conf is not None:
        from landcheck.verdicts.confidence import run_confidence

        step(f"confidence: {conf.realizations} realizations of DEM error (RMSE {conf.model.rmse_m:g} m)")
        with progress_bar(conf.realizations * len(windows), "confidence", enabled=s.show_progress) as cbar:
            cparcels, cclasses, extra["confidence"] = run_confidence(
                dem, windows, all_geoms, plan, rules, pr, s, table, conf, zones=zones, engine=s.engine, progress=cbar
            )
        table["p_conflict"] = cparcels["p_conflict"].to_numpy()
        table["confidence"] = cparcels["confidence"].to_numpy()
        run.confidence = (cparcels, cclasses)
    if spec is not None:
        from landcheck.verdicts.capability import capability_table

        run.capability = (capability_table(cap_totals, rules, spec), spec)
        extra["capability_map"] = {"scheme": spec.scheme.key, "hazard_zones": list(spec.hazard_zones)}
    if s.draft_mmu_m2 is not None:
        from landcheck.verdicts.reclassify import draft_reclassification

        step("drafting the reclassification of conflicting parcels")
        parts, moves = draft_reclassification(
            dem, s, table, all_geoms, plan, rules, pr, zones=zones, mmu_m2=s.draft_mmu_m2, engine=s.engine
        )
        run.reclassification = (parts, moves)
        extra["reclassification"] = {
            "mmu_m2": s.draft_mmu_m2,
            "parts": int(len(parts)),
            "moves": moves.to_dict(orient="records"),
        }
    counted = (table["verdict"] != Verdict.NO_DATA).to_numpy() & (table["verdict"] != Verdict.NO_RULE).to_numpy()
    summary = _summary(rules, table, classes, totals, plan, pr, counted, zone_names, collected, columns)
    summary.update(extra)
    summary["manifest"] = _manifest(started, dem, parcels, rules, s, g, conf)
    if zones is not None:
        summary["zones"] = zones.describe()
    run.summary = summary
    run.parcels = gpd.GeoDataFrame(table, geometry=frame.geometry.values, crs=frame.crs)
    return run


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


def _rewarn(caught) -> list[str]:
    """Messages of the LandcheckWarnings recorded in ``caught``, warned again to the caller."""
    out = []
    for w in caught:
        if issubclass(w.category, LandcheckWarning):
            out.append(str(w.message))
            warnings.warn(str(w.message), LandcheckWarning, stacklevel=4)
    return out


def _resolved(path: str) -> str:
    return path if path.startswith("<") else str(Path(path).resolve())


def _manifest(
    started, dem: DemSource, parcels, rules: Rulebook, s: AuditSettings, g, conf=None, inputs: list | None = None
) -> dict:
    """The manifest of ``summary.json``; ``inputs`` (role, path, sha256 of every input file) is built here
    unless given (the region run hashes its inputs once, before the run, and passes them)."""
    from landcheck.versions import show_versions

    if inputs is None:
        inputs = [{"role": "dem", "path": str(Path(dem.path).resolve()), "sha256": sha256_file(dem.path)}]
        if isinstance(parcels, (str, os.PathLike)):
            for f in _input_files(os.fspath(parcels)):
                inputs.append({"role": "parcels", "path": str(Path(f).resolve()), "sha256": sha256_file(f)})
        for name, p in rules.layers.items():
            for f in _input_files(p):
                inputs.append({"role": f"layer:{name}", "path": str(Path(f).resolve()), "sha256": sha256_file(f)})
    cap = s.capability
    return {
        # how the run was executed (tile size, engine, workers) changes no figure, so it is recorded
        # with the times in run_times.json, the one file a rerun changes (docs/outputs.md)
        "run_times": "run_times.json (the only output a rerun changes; docs/outputs.md)",
        **({"started_utc": source_date_utc()} if source_date_utc() else {}),  # SOURCE_DATE_EPOCH only
        "inputs": inputs,
        "rulebook": {"path": _resolved(rules.path), "sha256": rules.sha256, "text": rules.text},
        "parameters": {
            "slope_method": s.method.value,
            "dem_band": dem.band,
            "dem_crs_override": dem.crs_override,
            "z_unit": dem.z_unit.value,
            "z_unit_source": dem.z_unit_source,
            "mask_implausible": dem.mask_implausible,
            "parcels_layer": s.parcels_layer,
            "parcels_crs_override": s.parcels_crs,
            "parcels_source": "file" if isinstance(parcels, (str, os.PathLike)) else "in-memory GeoDataFrame",
            "rasters": s.rasters.value,
            "confidence": conf.describe() if conf is not None else None,
            "capability_scheme": _scheme_record(cap),
            "draft_mmu_m2": s.draft_mmu_m2,
            "edge_policy": "strict window: no slope where the cell or a neighbour the method reads is invalid",
            "coverage": "exact cell-coverage fractions",
        },
        "crs_wkt": g.crs_wkt,
        "grid": {"width": g.width, "height": g.height, "transform": list(g.transform)[:6], "geographic": g.geographic},
        "software": show_versions(),
    }


def _scheme_record(cap: CapabilityOptions | None):
    if cap is None:
        return None
    sch = cap.scheme
    if sch.key == "custom":
        return [float(b) for b in sch.lower_pct[1:]]
    return sch.key
