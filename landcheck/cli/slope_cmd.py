"""``landcheck slope``: a slope raster (COG) from a DEM."""

from __future__ import annotations

import json

import click

from landcheck.terrain.slope import SlopeUnit

from .errors import handle_errors
from .options import CAUTION_HELP, dem_options, engine_options, method_option, run_options


@click.command(
    "slope",
    help=f"""Derive a slope raster from a DEM.

Computes slope window by window (one-cell halo, bounded memory) and writes a
Cloud-Optimized GeoTIFF in percent or degrees. Geographic DEMs get per-row
cell sizes on the ellipsoid. Cells without all the neighbours the method
reads (raster edge, next to nodata) are NaN.

{CAUTION_HELP}

\b
Examples:
  landcheck slope demo_area/dem.tif slope.tif
  landcheck slope demo_area/dem.tif slope_deg.tif --unit degrees --method zevenbergen-thorne
""",
)
@click.argument("dem", type=click.Path())
@click.argument("out", type=click.Path())
@click.option("--unit", type=click.Choice([u.value for u in SlopeUnit]), default="percent", show_default=True)
@method_option
@dem_options
@run_options
@engine_options
@click.option(
    "--class-raster",
    "class_out",
    type=click.Path(),
    default=None,
    help="Also write a uint8 slope-class raster here.",
)
@click.option(
    "--class-scheme",
    default="planning-6",
    show_default=True,
    help="Built-in scheme (planning-6, fao-2006) or comma-separated breaks in percent, e.g. 8,18,30.",
)
@click.option(
    "--raster-format",
    type=click.Choice(["cog", "cog-deflate", "gtiff"]),
    default="cog",
    show_default=True,
    help="Cloud-Optimized GeoTIFF with overviews (ZSTD; cog-deflate for readers older than GDAL 2.3 / "
    "libtiff 4.0.10), or a plain tiled GeoTIFF written straight from the stream.",
)
@click.option("--json", "as_json", is_flag=True, help="Print a JSON summary on stdout.")
@click.pass_context
@handle_errors
def slope(
    ctx,
    dem,
    out,
    unit,
    method,
    dem_band,
    dem_crs,
    z_unit,
    tile_cells,
    workers,
    overwrite,
    class_out,
    class_scheme,
    raster_format,
    engine,
    scheduler_address,
    as_json,
):
    from landcheck.core.slope_raster import derive_slope
    from landcheck.terrain.slope_classes import BUILTIN_SCHEMES, get_scheme, scheme_from_breaks

    if class_scheme in BUILTIN_SCHEMES:
        scheme = get_scheme(class_scheme)
    else:
        try:
            scheme = scheme_from_breaks([float(b) for b in class_scheme.split(",")])
        except ValueError as exc:
            raise click.BadParameter(
                f"{class_scheme!r}: {exc}; give a scheme name or ascending breaks like 8,18,30",
                param_hint="--class-scheme",
            ) from None

    info = derive_slope(
        dem,
        out,
        method=method or "horn",
        unit=unit,
        band=dem_band,
        dem_crs=dem_crs,
        z_unit=z_unit,
        tile_cells=tile_cells,
        workers=workers,
        overwrite=overwrite,
        show_progress=None if not ctx.find_root().obj.get("quiet") else False,
        class_out=class_out,
        class_scheme=scheme,
        raster_format=raster_format,
        engine=engine,
        scheduler_address=scheduler_address,
    )
    summary = {
        "output": str(info.path),
        "width": info.width,
        "height": info.height,
        "valid_cells": info.valid_cells,
        "min": info.min_value,
        "max": info.max_value,
        "unit": info.unit,
        "method": info.method,
    }
    if as_json:
        click.echo(json.dumps(summary))
    elif not ctx.find_root().obj.get("quiet"):
        click.echo(
            f"slope ({info.method}, {info.unit}) written to {info.path}: {info.valid_cells} cells, "
            f"{info.min_value:.2f}..{info.max_value:.2f}",
            err=True,
        )
