"""Entry point: the ``landcheck`` command group, logging set-up and error-to-exit-code mapping."""

from __future__ import annotations

import atexit
import contextlib
import gc
import logging
import os
import signal
import sys
import threading

import click

from landcheck.about import CAUTION, __version__
from landcheck.engine.interrupt import clear_interrupt, note_interrupt
from landcheck.versions import show_versions

from . import app_cmd, audit_cmd, demo_cmd, prescreen_cmd, report_cmd, slope_cmd, verify_cmd
from .errors import handle_errors
from .options import CAUTION_HELP

logger = logging.getLogger("landcheck")


def _versions_callback(ctx, _param, value):
    if not value or ctx.resilient_parsing:
        return
    for k, v in show_versions().items():
        click.echo(f"{k}: {v}")
    ctx.exit(0)


def _interrupt_once(signum, frame):
    """Ctrl-C: stop the run (KeyboardInterrupt, exit 130); further Ctrl-Cs do not cut the clean-up short."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    note_interrupt()  # in case a C extension swallows the KeyboardInterrupt: the next step re-raises it
    raise KeyboardInterrupt


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
    if threading.current_thread() is threading.main_thread():
        clear_interrupt()
        signal.signal(signal.SIGINT, _interrupt_once)
    # the final garbage collection at exit walks numba's large type registry (~0.5 s); freezing the
    # heap first skips it (docs/scale.md)
    atexit.register(gc.freeze)
    ctx.ensure_object(dict)
    ctx.obj["verbosity"] = verbose
    ctx.obj["quiet"] = quiet
    level = logging.ERROR if quiet else {0: logging.WARNING, 1: logging.INFO}.get(verbose, logging.DEBUG)
    logging.basicConfig(level=level, format="landcheck: %(levelname)s: %(message)s", stream=sys.stderr, force=True)
    logging.captureWarnings(True)


# Command modules import nothing from this module (shared pieces live in .options and .errors), so each
# imports on its own and a missing one fails loudly here.
cli.add_command(slope_cmd.slope)
cli.add_command(audit_cmd.command)
cli.add_command(demo_cmd.command)
cli.add_command(report_cmd.command)
cli.add_command(prescreen_cmd.command)
cli.add_command(verify_cmd.command)
cli.add_command(app_cmd.command)


def main() -> None:
    """The ``landcheck`` command and ``python -m landcheck``: :func:`cli`, then exit.

    After Ctrl-C the command has already removed everything it staged and said so (exit 130).
    Worker threads may still be inside a window's computation; Python's normal exit would wait
    for each of them to finish its window (seconds on a loaded machine), so the process ends
    at once instead, after flushing its output (docs/cli.md).
    """
    try:
        cli()
    except SystemExit as exc:
        if exc.code == 130:
            for stream in (sys.stdout, sys.stderr):
                with contextlib.suppress(Exception):
                    stream.flush()
            os._exit(130)
        raise


__all__ = ["cli", "main", "CAUTION", "handle_errors"]
