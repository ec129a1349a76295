"""Entry point: the ``landcheck`` command group, logging set-up and error-to-exit-code mapping."""

from __future__ import annotations

import atexit
import functools
import gc
import logging
import sys
import traceback

import click

from landcheck.about import CAUTION, __version__
from landcheck.errors import LandcheckError
from landcheck.versions import show_versions

from .options import CAUTION_HELP, EXIT_INTERNAL

logger = logging.getLogger("landcheck")


def _versions_callback(ctx, _param, value):
    if not value or ctx.resilient_parsing:
        return
    for k, v in show_versions().items():
        click.echo(f"{k}: {v}")
    ctx.exit(0)


def handle_errors(fn):
    """Map library errors to exit codes; tracebacks only with -vv."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        ctx = click.get_current_context()
        try:
            return fn(*args, **kwargs)
        except LandcheckError as exc:
            click.echo(f"landcheck: error: {exc}", err=True)
            ctx.exit(exc.exit_code)
        except (click.exceptions.Exit, click.ClickException, click.Abort):
            raise
        except KeyboardInterrupt:
            click.echo("landcheck: interrupted; no partial outputs were kept.", err=True)
            ctx.exit(130)
        except Exception as exc:  # internal error: say so plainly
            verbosity = (ctx.find_root().obj or {}).get("verbosity", 0)
            click.echo(f"landcheck: internal error: {type(exc).__name__}: {exc}", err=True)
            if verbosity >= 2:
                traceback.print_exc(file=sys.stderr)
            else:
                click.echo(
                    "Run again with -vv for a traceback and include it in a bug report "
                    "with the output of `landcheck --show-versions`.",
                    err=True,
                )
            ctx.exit(EXIT_INTERNAL)

    return wrapper


@click.group(
    help=f"""Screen land classification against terrain.

Derives slope and hazard zones from a DEM, checks every parcel against a
rulebook, and reports the exact area share where classification conflicts
with terrain, per parcel, per class and for the whole area.

\b
{CAUTION_HELP}

\b
Examples:
  landcheck demo
  landcheck audit --dem demo_area/dem.tif --parcels demo_area/parcels.gpkg \\
      --rulebook demo_area/rulebook.toml --out audit-out
  landcheck slope demo_area/dem.tif slope.tif --unit degrees
"""
)
@click.version_option(__version__, prog_name="landcheck")
@click.option(
    "--show-versions",
    is_flag=True,
    expose_value=False,
    is_eager=True,
    callback=_versions_callback,
    help="Print versions of landcheck and its libraries (for bug reports) and exit.",
)
@click.option("-v", "--verbose", count=True, help="More log output on stderr (-v info, -vv debug and tracebacks).")
@click.option("-q", "--quiet", is_flag=True, help="Only errors on stderr; no progress bars.")
@click.pass_context
def cli(ctx, verbose: int, quiet: bool):
    # the final garbage collection at exit walks numba's large type registry (~0.5 s); freezing the
    # heap first skips it (docs/scale.md)
    atexit.register(gc.freeze)
    ctx.ensure_object(dict)
    ctx.obj["verbosity"] = verbose
    ctx.obj["quiet"] = quiet
    level = logging.ERROR if quiet else {0: logging.WARNING, 1: logging.INFO}.get(verbose, logging.DEBUG)
    logging.basicConfig(level=level, format="landcheck: %(levelname)s: %(message)s", stream=sys.stderr, force=True)
    logging.captureWarnings(True)


def _register():
    from . import slope_cmd

    cli.add_command(slope_cmd.slope)
    for mod_name in ("audit_cmd", "demo_cmd", "report_cmd", "prescreen_cmd", "rulebook_cmd", "app_cmd"):
        try:
            mod = __import__(f"landcheck.cli.{mod_name}", fromlist=["command"])
        except ModuleNotFoundError as exc:
            if exc.name != f"landcheck.cli.{mod_name}":
                raise
            continue
        cli.add_command(mod.command)


_register()

__all__ = ["cli", "CAUTION", "handle_errors"]
