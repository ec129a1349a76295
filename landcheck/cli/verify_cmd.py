"""``landcheck verify OUT``: check an output folder against the SHA-256 list landcheck wrote into it."""

from __future__ import annotations

import click

from .errors import handle_errors
from .options import CAUTION_HELP


@click.command(
    "verify",
    help=f"""Check that an audit's output folder holds exactly the bytes landcheck wrote.

Compares every file listed in OUT/files.json with its SHA-256 (the same list is in
OUT/SHA256SUMS for `sha256sum -c`). A rerun with the same inputs and settings
reproduces every listed file; only run_times.json differs. Exit 0 when every
file matches, 1 when a file differs or is missing, 3 when OUT has no list.

{CAUTION_HELP}

\b
Examples:
  landcheck verify audit-out
  (cd audit-out && sha256sum -c SHA256SUMS)
""",
)
@click.argument("folder", type=click.Path())
@click.pass_context
@handle_errors
def command(ctx, folder):
    from landcheck.outputs.folder import verify_folder

    bad, foreign, good = verify_folder(folder)
    for name in bad:
        click.echo(f"{folder}: {name}: differs from the listed SHA-256 or is missing", err=True)
    for name in foreign:
        click.echo(f"{folder}: {name}: not written by landcheck (not checked)", err=True)
    if bad:
        click.echo(f"{len(bad)} of {len(bad) + len(good)} files differ.", err=True)
        ctx.exit(1)
    click.echo(f"{len(good)} files match their SHA-256.", err=True)
