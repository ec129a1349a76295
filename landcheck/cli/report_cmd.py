"""``landcheck report``: rebuild the HTML report and maps from an audit's output folder."""

from __future__ import annotations

from pathlib import Path

import click

from landcheck.errors import InputDataError

from .errors import handle_errors
from .options import CAUTION_HELP


@click.command(
    "report",
    help=f"""Rebuild the report and maps of an audit output folder.

Reads only the folder written by `landcheck audit` (and the DEM named in its
manifest, for relief shading), checks the recorded SHA-256 of every input
again, and writes report.html and figures/ (PNG and SVG).

{CAUTION_HELP}

\b
Examples:
  landcheck report landcheck-demo-output
  landcheck report audit-out --dpi 300 --max-closeups 30
""",
)
@click.argument("out_dir", type=click.Path())
@click.option("--report-path", type=click.Path(), default=None, help="Where to write (default OUT_DIR/report.html).")
@click.option(
    "--dpi", type=click.IntRange(72, 600), default=200, show_default=True, help="Resolution of the PNG figures."
)
@click.option(
    "--max-closeups",
    type=click.IntRange(0, 500),
    default=12,
    show_default=True,
    help="Close-up maps of the largest conflicts.",
)
@click.option(
    "--page-size",
    type=click.Choice(["A4", "Letter"], case_sensitive=False),
    default="A4",
    show_default=True,
    help="Printed sheet of report.html (wide tables print on landscape sheets).",
)
@click.pass_context
@handle_errors
def command(ctx, out_dir, report_path, dpi, max_closeups, page_size):
    from landcheck.evidence.report import build_report

    d = Path(out_dir)
    if not (d / "summary.json").exists():
        raise InputDataError(f"{d}: not an audit output folder (no summary.json); run `landcheck audit` first.")
    from landcheck.evidence.figure_worker import start
    from landcheck.evidence.folder import load_audit_folder

    folder = load_audit_folder(d)
    # forked before any other thread runs (landcheck.evidence.figure_worker)
    worker = start()
    try:
        path = build_report(
            folder,
            report_path=report_path,
            dpi=dpi,
            max_closeups=max_closeups,
            page_size=page_size,
            figure_worker=worker,
        )
    finally:
        if worker is not None:
            worker.stop()
    click.echo(str(path))
