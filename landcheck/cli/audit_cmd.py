"""``landcheck audit``: the main job."""

from __future__ import annotations

import json
import warnings

import click

from landcheck.errors import LandcheckWarning
from landcheck.wording import count_text

from .errors import handle_errors
from .options import CAUTION_HELP, EXIT_CONFLICTS, dem_options, engine_options, method_option, run_options


def run_audit_and_report(ctx, *, as_json: bool, fail_on_conflict: bool, **kwargs):
    """Shared by ``audit`` and ``demo``: run, print the summary, set the exit code."""
    from landcheck.core.audit import audit

    quiet = ctx.find_root().obj.get("quiet")

    def on_step(msg):
        if not quiet:
            click.echo(f"landcheck: {msg}", err=True)

    regions = kwargs.pop("regions", None)
    with warnings.catch_warnings():
        # recorded in the result and printed below once; keep them out of the log stream
        warnings.simplefilter("ignore", LandcheckWarning)
        if regions is not None:
            from landcheck.core.regions import audit_regions

            kwargs.pop("engine", None)  # region jobs always run on Dask (a local cluster unless --scheduler)
            result = audit_regions(
                kwargs.pop("dem_path"),
                kwargs.pop("parcels_path"),
                kwargs.pop("rulebook_path"),
                kwargs.pop("out_dir"),
                regions=regions,
                overwrite=kwargs.pop("overwrite", False),
                show_progress=None if not quiet else False,
                on_step=on_step,
                **kwargs,
            )
        else:
            result = audit(
                kwargs.pop("dem_path"),
                kwargs.pop("parcels_path"),
                kwargs.pop("rulebook_path"),
                kwargs.pop("out_dir"),
                overwrite=kwargs.pop("overwrite", False),
                show_progress=None if not quiet else False,
                on_step=on_step,
                **kwargs,
            )
    t = result.summary["totals"]
    if as_json:
        click.echo(
            json.dumps(
                {
                    "out_dir": str(result.out_dir),
                    "caution": result.summary["caution"],
                    "totals": t,
                    "capability": result.summary["capability"],
                    "warnings": result.warnings,
                }
            )
        )
    elif not quiet:
        vc = t["verdict_counts"]
        share = t["conflict_share"]
        click.echo(
            f"{count_text(t['parcels'], 'parcel')}: {vc['conflict']:,d} conflict, {vc['review']:,d} review, {vc['consistent']:,d} consistent, "
            f"{vc['no_data']:,d} no data, {vc['no_rule']:,d} without a rule. Conflict share of evaluated classified land: "
            f"{'n/a' if share is None else f'{100 * share:.1f} %'}.",
            err=True,
        )
        for w in result.warnings:
            click.echo(f"warning: {w}", err=True)
        click.echo(f"Outputs: {result.out_dir}", err=True)
        click.echo(CAUTION_HELP, err=True)
    if fail_on_conflict and result.n_conflicts:
        ctx.exit(EXIT_CONFLICTS)
    return result


def _regions_value(v):
    if v is None or v == "auto":
        return v
    try:
        n = int(v)
    except ValueError:
        raise click.BadParameter(f"{v!r}: give auto or a whole number of regions", param_hint="--regions") from None
    if n < 1:
        raise click.BadParameter(f"{v!r}: give auto or a whole number >= 1", param_hint="--regions")
    return n


@click.command(
    "audit",
    help=f"""Audit a parcel layer against a rulebook.

For every parcel: exact area (cell-coverage fractions, not cell centres), the
area and share at or over its class's slope limit and inside forbidden hazard
zones, a verdict (consistent, conflict, review, no_data, no_rule) with reasons.
Per class and for the whole area: classified area, compliant area, conflict
share, and land capability versus classification. Writes a folder of
GeoPackage, CSV, JSON, Cloud-Optimized GeoTIFFs and an HTML report
(docs/outputs.md).

{CAUTION_HELP}

\b
Examples:
  landcheck audit --dem demo_area/dem.tif --parcels demo_area/parcels.gpkg \\
      --rulebook demo_area/rulebook.toml --out audit-out
  landcheck audit ... --json --fail-on-conflict   # for scripts: exit 1 when any parcel conflicts
  landcheck audit --dem dem_tiles/ --parcels parcels_parquet/ --rulebook rules.toml \\
      --out country --regions auto --scheduler tcp://10.0.0.5:8786   # a country in region jobs
""",
)
@click.option("--dem", required=True, type=click.Path(), help="Elevation raster (GeoTIFF or any GDAL raster).")
@click.option(
    "--parcels",
    required=True,
    type=click.Path(),
    help="Parcel polygons: GeoPackage, GeoJSON, Shapefile or GeoParquet.",
)
@click.option("--parcels-layer", default=None, help="Layer of a multi-layer parcels file.")
@click.option("--parcels-crs", default=None, metavar="CRS", help="CRS to assume when the parcels have none.")
@click.option("--rulebook", required=True, type=click.Path(), help="Rulebook (TOML; docs/rules-file.md).")
@click.option(
    "--out",
    "out_dir",
    required=True,
    type=click.Path(),
    help="Output folder (must not exist unless --overwrite; an existing one is replaced only when it holds "
    "nothing but landcheck's own outputs).",
)
@method_option
@dem_options
@run_options
@engine_options
@click.option(
    "--dem-rmse",
    "dem_rmse_m",
    type=float,
    default=None,
    metavar="M",
    help="Vertical RMSE of the DEM in metres: adds verdict confidence by Monte Carlo (overrides the "
    "rulebook's [uncertainty]).",
)
@click.option(
    "--corr-length",
    "corr_length_m",
    type=float,
    default=None,
    metavar="M",
    help="Correlation length of the DEM error in metres (0 = independent cells).",
)
@click.option("--realizations", type=int, default=None, help="Monte Carlo realizations (10..10000, default 100).")
@click.option("--seed", type=int, default=None, help="Seed of the error fields (same seed, same numbers).")
@click.option(
    "--capability-map",
    "capability_scheme",
    default=None,
    metavar="SCHEME",
    help="Also write a land-capability map: planning-6, fao-2006 or breaks like 8,18,30.",
)
@click.option(
    "--draft-reclassification",
    "draft_mmu_m2",
    type=float,
    default=None,
    metavar="MMU_M2",
    help="Split conflicting parcels into compliant and non-compliant parts (minimum mapping unit in m²).",
)
@click.option(
    "--rasters",
    type=click.Choice(["cog", "cog-deflate", "gtiff", "none"]),
    default="cog",
    show_default=True,
    help="Slope and conflict rasters as Cloud-Optimized GeoTIFF (ZSTD; cog-deflate for readers older than "
    "GDAL 2.3 / libtiff 4.0.10), plain tiled GeoTIFF (faster for big runs), or none (tables only; needs "
    "--no-report).",
)
@click.option(
    "--zone-polygons",
    is_flag=True,
    help="Also write polygons of the cell-based hazard zones (HAND, sea-level rise, derived easement "
    "strips) to zones/*.gpkg; built tile by tile, slow on large DEMs.",
)
@click.option(
    "--mask-implausible",
    is_flag=True,
    help="Treat DEM elevations below -500 m or above 9000 m as no data (with a warning) instead of refusing "
    "the DEM (docs/cli.md).",
)
@click.option(
    "--regions",
    default=None,
    metavar="auto|N",
    callback=lambda ctx, param, v: _regions_value(v),
    help="Split the run into region jobs (blocks of whole windows) on a Dask cluster: a local one, or "
    "--scheduler's; the same output folder as a single run (tables, rasters, report) plus parcels.parquet; "
    "a rerun resumes finished regions. --dem may then "
    "also be a folder of tiles or a .txt list of tiles, --parcels a partitioned GeoParquet folder "
    "(docs/scale.md).",
)
@click.option("--no-report", is_flag=True, help="Skip the HTML report and maps.")
@click.option("--json", "as_json", is_flag=True, help="Print a JSON summary on stdout.")
@click.option("--fail-on-conflict", is_flag=True, help="Exit with status 1 when any parcel is in conflict.")
@click.pass_context
@handle_errors
def command(
    ctx,
    dem,
    parcels,
    parcels_layer,
    parcels_crs,
    rulebook,
    out_dir,
    method,
    dem_band,
    dem_crs,
    z_unit,
    tile_cells,
    workers,
    overwrite,
    engine,
    scheduler_address,
    dem_rmse_m,
    corr_length_m,
    realizations,
    seed,
    capability_scheme,
    draft_mmu_m2,
    rasters,
    zone_polygons,
    mask_implausible,
    regions,
    no_report,
    as_json,
    fail_on_conflict,
):
    if capability_scheme is not None and "," in capability_scheme:
        try:
            capability_scheme = [float(b) for b in capability_scheme.split(",")]
        except ValueError:
            raise click.BadParameter(
                f"{capability_scheme!r}: give a scheme name or breaks like 8,18,30", param_hint="--capability-map"
            ) from None
    run_audit_and_report(
        ctx,
        as_json=as_json,
        fail_on_conflict=fail_on_conflict,
        dem_path=dem,
        parcels_path=parcels,
        rulebook_path=rulebook,
        out_dir=out_dir,
        parcels_layer=parcels_layer,
        parcels_crs=parcels_crs,
        dem_band=dem_band,
        dem_crs=dem_crs,
        z_unit=z_unit,
        method=method,
        tile_cells=tile_cells,
        workers=workers,
        overwrite=overwrite,
        make_report=not no_report,
        engine=engine,
        scheduler_address=scheduler_address,
        dem_rmse_m=dem_rmse_m,
        corr_length_m=corr_length_m,
        realizations=realizations,
        seed=seed,
        capability_scheme=capability_scheme,
        draft_mmu_m2=draft_mmu_m2,
        rasters=rasters,
        zone_polygons=zone_polygons,
        mask_implausible=mask_implausible,
        regions=regions,
    )
