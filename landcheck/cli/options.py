"""Options shared by several commands; a flag keeps one meaning everywhere."""

from __future__ import annotations

import click

from landcheck.inputs.dem import ZUnit
from landcheck.terrain.slope import SlopeMethod

EXIT_OK = 0
EXIT_CONFLICTS = 1
EXIT_USAGE = 2
EXIT_BAD_INPUT = 3
EXIT_INTERNAL = 4

CAUTION_HELP = (
    "CAUTION: a screening aid, not a survey or legal determination; local codes, "
    "the mandated agency and licensed practitioners decide."
)


def dem_options(f):
    f = click.option(
        "--dem-band", type=click.IntRange(min=1), default=None, help="Elevation band of a multi-band raster (1-based)."
    )(f)
    f = click.option(
        "--dem-crs", default=None, metavar="CRS", help="CRS to assume when the DEM has none, e.g. EPSG:32651."
    )(f)
    f = click.option(
        "--z-unit",
        type=click.Choice([u.value for u in ZUnit]),
        default=None,
        help="Unit of the DEM's elevation values: m, ft (international foot) or us-ft (US survey foot). "
        "Default: the unit the file declares (band unit or vertical CRS); without one, metres only when "
        "the CRS is in metres or degrees, otherwise landcheck refuses and asks for this option.",
    )(f)
    return f


def method_option(f):
    return click.option(
        "--method",
        type=click.Choice([m.value for m in SlopeMethod]),
        default=None,
        help="Slope method: horn (Horn 1981) or zevenbergen-thorne (Zevenbergen & Thorne 1987). "
        "Default: the rulebook's, else horn.",
    )(f)


def run_options(f):
    f = click.option(
        "--tile-size",
        "tile_cells",
        type=click.IntRange(min=16),
        default=1024,
        show_default=True,
        help="Window size in cells for streamed processing.",
    )(f)
    f = click.option(
        "--workers", type=click.IntRange(min=1), default=None, help="Worker threads (default: all cores)."
    )(f)
    f = click.option("--overwrite", is_flag=True, help="Replace existing outputs.")(f)
    return f


def engine_options(f):
    """``--engine`` and ``--scheduler``: where every window pass of the command runs."""
    f = click.option(
        "--scheduler",
        "scheduler_address",
        default=None,
        metavar="ADDRESS",
        help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (implies --engine dask). Workers must read "
        "the inputs by the same paths.",
    )(f)
    f = click.option(
        "--engine",
        type=click.Choice(["threads", "processes", "dask"]),
        default="threads",
        show_default=True,
        help="Run every window pass on local threads, local worker processes, or a Dask cluster "
        "(a local one unless --scheduler is given). Results are the same on every engine.",
    )(f)
    return f
