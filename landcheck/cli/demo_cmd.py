"""``landcheck demo``: the audit on the shipped demo area."""

from __future__ import annotations

from pathlib import Path

import click

from landcheck.errors import InputDataError

from .audit_cmd import run_audit_and_report
from .errors import handle_errors
from .options import CAUTION_HELP


def demo_area_dir() -> Path:
    """The demo_area folder of a source checkout (the demo data are not inside the wheel)."""
    here = Path(__file__).resolve().parents[2] / "demo_area"
    return here


@click.command(
    "demo",
    help=f"""Run the audit on the shipped demo area.

The demo area is the invented coastal town of Alderwane: a 10 m DEM, a few
hundred parcels, shoreline, river and flood-hazard layers and a demo rulebook
(demo_area/). Besides the audit it runs the verdict-confidence Monte Carlo
(the rulebook's [uncertainty]), the land-capability map and a drafted
reclassification (--quick skips them). Outputs go to OUT (default
landcheck-demo-output/).

{CAUTION_HELP}

\b
Examples:
  landcheck demo
  landcheck demo --out /tmp/demo --overwrite --json
""",
)
@click.option("--out", "out_dir", default="landcheck-demo-output", show_default=True, type=click.Path())
@click.option("--overwrite/--no-overwrite", default=True, show_default=True, help="Replace an earlier demo output.")
@click.option("--workers", type=click.IntRange(min=1), default=None, help="Worker threads (default: all cores).")
@click.option("--quick", is_flag=True, help="Skip the confidence run, capability map and drafted reclassification.")
@click.option("--json", "as_json", is_flag=True, help="Print a JSON summary on stdout.")
@click.pass_context
@handle_errors
def command(ctx, out_dir, overwrite, workers, quick, as_json):
    d = demo_area_dir()
    needed = [d / "dem.tif", d / "parcels.gpkg", d / "rulebook.toml"]
    missing = [str(p) for p in needed if not p.exists()]
    if missing:
        raise InputDataError(
            f"demo area incomplete: {', '.join(missing)} missing; run from a source checkout "
            "or regenerate with `python scripts/make_demo_area.py --seed 7 --out demo_area`."
        )
    run_audit_and_report(
        ctx,
        as_json=as_json,
        fail_on_conflict=False,
        dem_path=str(needed[0]),
        parcels_path=str(needed[1]),
        rulebook_path=str(needed[2]),
        out_dir=out_dir,
        overwrite=overwrite,
        workers=workers,
        # the demo rulebook's [uncertainty] section drives the confidence run
        capability_scheme=None if quick else "planning-6",
        draft_mmu_m2=None if quick else 500.0,
        skip_confidence=quick,
    )
