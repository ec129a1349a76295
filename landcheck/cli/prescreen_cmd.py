"""``landcheck prescreen``: a one-page pre-screen of one parcel."""

from __future__ import annotations

import json
import warnings

import click

from landcheck.errors import LandcheckWarning

from .errors import handle_errors
from .options import CAUTION_HELP, dem_options, method_option


@click.command(
    "prescreen",
    help=f"""Pre-screen one parcel: a one-page report before buying or designing.

Give the DEM, the rulebook and ONE parcel: a vector file with one feature
(--parcels), a parcel of a layer (--parcels FILE --parcel-id ID), or polygon
vertices (--polygon "x1,y1 x2,y2 ..." in the DEM's CRS, or in --polygon-crs).
The parcel is tested against its class attribute, or against --class NAME.

The page shows the parcel area, its slope histogram with the class limit,
the buildable area (exact area on cells meeting every rule of the class:
slope below the limit, outside every forbidden zone), the largest contiguous
buildable patch (area and shape), the hazard zones touching the parcel, and
the audit's verdict with reasons. Writes OUT/prescreen.html (print-ready A4),
map.png, histogram.png, prescreen.json and largest_patch.gpkg
(docs/prescreen.md).

{CAUTION_HELP}

\b
Examples:
  landcheck prescreen --dem demo_area/dem.tif --rulebook demo_area/rulebook.toml \\
      --parcels demo_area/parcels.gpkg --parcel-id 1051 --out lot1051
  landcheck prescreen --dem demo_area/dem.tif --rulebook demo_area/rulebook.toml \\
      --polygon "404700,1593500 404800,1593500 404800,1593400 404700,1593400" \\
      --class residential --out lot-sketch
""",
)
@click.option("--dem", required=True, type=click.Path(), help="Elevation raster (GeoTIFF or any GDAL raster).")
@click.option("--rulebook", required=True, type=click.Path(), help="Rulebook (TOML; docs/rules-file.md).")
@click.option(
    "--parcels",
    "parcels_path",
    default=None,
    type=click.Path(),
    help="Vector file holding the parcel: one feature, or choose one with --parcel-id.",
)
@click.option("--parcel-id", default=None, help="Id of the parcel in --parcels (see --id-field).")
@click.option(
    "--id-field",
    default=None,
    help="Attribute holding the ids (default: the rulebook's id_field when present, else the 1-based row).",
)
@click.option("--parcels-layer", default=None, help="Layer of a multi-layer --parcels file.")
@click.option("--parcels-crs", default=None, metavar="CRS", help="CRS to assume when --parcels has none.")
@click.option(
    "--polygon",
    default=None,
    metavar='"X1,Y1 X2,Y2 ..."',
    help="Parcel vertices, x,y pairs separated by spaces; an open ring is closed.",
)
@click.option("--polygon-crs", default=None, metavar="CRS", help="CRS of --polygon (default: the DEM's).")
@click.option(
    "--class",
    "class_name",
    default=None,
    metavar="NAME",
    help="Rulebook class to test against (needed when the parcel has no class attribute; overrides it otherwise).",
)
@click.option(
    "--connectivity",
    type=click.Choice(["4", "8"]),
    default="4",
    show_default=True,
    help="Cells of the largest buildable patch join across edges (4) or also corners (8).",
)
@click.option(
    "--out",
    "out_dir",
    required=True,
    type=click.Path(),
    help="Output folder (must not exist unless --overwrite).",
)
@method_option
@dem_options
@click.option(
    "--dpi", type=click.IntRange(72, 600), default=200, show_default=True, help="Resolution of the PNG figures."
)
@click.option("--overwrite", is_flag=True, help="Replace an existing output folder.")
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON on stdout.")
@click.pass_context
@handle_errors
def command(
    ctx,
    dem,
    rulebook,
    parcels_path,
    parcel_id,
    id_field,
    parcels_layer,
    parcels_crs,
    polygon,
    polygon_crs,
    class_name,
    connectivity,
    out_dir,
    method,
    dem_band,
    dem_crs,
    z_unit,
    dpi,
    overwrite,
    as_json,
):
    from landcheck.evidence.prescreen import prescreen

    if (parcels_path is None) == (polygon is None):
        raise click.UsageError(
            "give the parcel with --parcels FILE (and --parcel-id when it holds several) "
            'or with --polygon "x1,y1 x2,y2 ...", not both.'
        )
    if parcels_path is None and (parcel_id or id_field or parcels_layer or parcels_crs):
        raise click.UsageError("--parcel-id, --id-field, --parcels-layer and --parcels-crs go with --parcels.")
    if polygon is None and polygon_crs:
        raise click.UsageError("--polygon-crs goes with --polygon.")
    quiet = (ctx.find_root().obj or {}).get("quiet")

    def on_step(msg):
        if not quiet:
            click.echo(f"landcheck: {msg}", err=True)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LandcheckWarning)  # printed once below
        res = prescreen(
            dem,
            rulebook,
            out_dir,
            parcels_path=parcels_path,
            parcel_id=parcel_id,
            id_field=id_field,
            parcels_layer=parcels_layer,
            parcels_crs=parcels_crs,
            polygon=polygon,
            polygon_crs=polygon_crs,
            class_name=class_name,
            connectivity=int(connectivity),
            dem_band=dem_band,
            dem_crs=dem_crs,
            z_unit=z_unit,
            method=method,
            overwrite=overwrite,
            dpi=dpi,
            on_step=on_step,
        )
    f = res.figures
    if as_json:
        click.echo(
            json.dumps(
                {
                    "out_dir": str(res.out_dir),
                    **{
                        k: f[k]
                        for k in (
                            "caution",
                            "parcel",
                            "rule",
                            "verdict",
                            "reasons",
                            "buildable",
                            "largest_patch",
                            "zones",
                            "warnings",
                        )
                    },
                },
                allow_nan=False,
            )
        )
    elif not quiet:
        b, lp = f["buildable"], f["largest_patch"]
        share = b["share_of_parcel"]
        click.echo(
            f"parcel {f['parcel']['id']} ({f['parcel']['class_name']}): verdict {f['verdict']}; buildable "
            f"{b['area_m2']:,.0f} m²{'' if share is None else f' ({100 * share:.1f} %)'}, largest patch "
            f"{lp['area_m2']:,.0f} m².",
            err=True,
        )
        for w in res.warnings:
            click.echo(f"warning: {w}", err=True)
        click.echo(f"Outputs: {res.out_dir}", err=True)
        click.echo(CAUTION_HELP, err=True)
