"""The run worker: one audit in its own process, reporting stages and progress as JSON lines on stdout.

Started by the app as ``python -m landcheck.app.worker JOB.json``.  It calls
:func:`landcheck.core.audit.audit` (and, when asked, the one-parcel pre-screen) into the run's ``work/``
folder; the app publishes that folder only after a clean exit.  SIGTERM (the app's cancel button, or
the app stopping) becomes KeyboardInterrupt, so the audit's staged folder is removed on the way out.
"""

from __future__ import annotations

import json
import os
import re
import signal
import sys
import traceback
import warnings
from pathlib import Path

__all__ = ["main", "stage_plan", "STAGE_LABELS"]

STAGE_LABELS = {
    "inputs": "Reading inputs",
    "zones": "Hazard zones",
    "audit": "Slope and overlay",
    "confidence": "Confidence under DEM error",
    "capability": "Land-capability map",
    "reclassification": "Drafted reclassification",
    "report": "Report and maps",
    "prescreen": "Pre-screen of one parcel",
}

# step messages of landcheck.core.audit -> the stage they start
_STEP_STAGE = (
    ("DEM ", "inputs"),
    ("zones ready", "audit"),
    ("confidence:", "confidence"),
    ("land-capability map", "capability"),
    ("drafting the reclassification", "reclassification"),
    ("building the report", "report"),
)
_BAR_RE = re.compile(r"(\w+):\s+(\d+)%\|[^|\r\n]*\|\s*(\d+)/(\d+)")


def stage_plan(job: dict, has_zones: bool, has_uncertainty: bool) -> list[str]:
    o = job["options"]
    plan = ["inputs"]
    if has_zones:
        plan.append("zones")
    plan.append("audit")
    conf = o.get("confidence", "off")
    if conf == "custom" or (conf == "rulebook" and has_uncertainty):
        plan.append("confidence")
    if o.get("capability_scheme"):
        plan.append("capability")
    if o.get("draft_mmu_m2") is not None:
        plan.append("reclassification")
    plan.append("report")
    if o.get("prescreen_parcel"):
        plan.append("prescreen")
    return plan


class _Events:
    def __init__(self, stream):
        self.stream = stream

    def emit(self, **ev) -> None:
        self.stream.write(json.dumps(ev, default=str) + "\n")
        self.stream.flush()


class _ProgressStderr:
    """Stands in for sys.stderr: tqdm's bar lines become progress events, other lines go to the log."""

    def __init__(self, events: _Events, log):
        self.events = events
        self.log = log
        self._buf = ""
        self._last: tuple | None = None

    def write(self, s: str) -> int:
        self._buf += s
        parts = re.split(r"[\r\n]", self._buf)
        self._buf = parts.pop()
        for p in parts:
            self._line(p)
        m = _BAR_RE.search(self._buf)
        if m:
            self._bar(m)
        return len(s)

    def _bar(self, m) -> None:
        key = (m.group(1), int(m.group(3)), int(m.group(4)))
        if key != self._last:
            self._last = key
            self.events.emit(ev="bar", name=key[0], n=key[1], total=key[2])

    def _line(self, line: str) -> None:
        m = _BAR_RE.search(line)
        if m:
            self._bar(m)
        elif line.strip():
            self.log.write(line + "\n")
            self.log.flush()

    def flush(self) -> None:
        self.log.flush()

    def isatty(self) -> bool:
        return False


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    job = json.loads(Path(argv[0]).read_text(encoding="utf-8"))
    events = _Events(sys.stdout)
    signal.signal(signal.SIGTERM, _interrupt)
    log = open(job["log"], "a", encoding="utf-8")  # noqa: SIM115 - open for the process's life
    sys.stderr = _ProgressStderr(events, log)
    try:
        return _run(job, events)
    except KeyboardInterrupt:
        events.emit(ev="cancelled")
        return 130
    except Exception as exc:
        from landcheck.errors import LandcheckError

        if isinstance(exc, LandcheckError):
            events.emit(ev="error", message=_plain(str(exc), job), exit=exc.exit_code)
            return exc.exit_code
        traceback.print_exc(file=log)
        events.emit(ev="error", message=f"internal error: {type(exc).__name__}: {_plain(str(exc), job)}", exit=4)
        return 4


def _plain(msg: str, job: dict) -> str:
    """Messages name files as the user knows them (workspace-relative), not by absolute paths."""
    return msg.replace(job["workspace"].rstrip("/") + "/", "").replace("/work/output", "/output")


def _run(job: dict, events: _Events) -> int:
    from landcheck.core.audit import audit
    from landcheck.errors import LandcheckWarning
    from landcheck.inputs.rulebook import load_rules

    o = job["options"]
    rules = load_rules(job["rulebook"])
    plan = stage_plan(job, bool(rules.zones), rules.uncertainty is not None)
    events.emit(ev="plan", stages=[{"key": k, "label": STAGE_LABELS[k]} for k in plan])

    def on_step(msg: str) -> None:
        stage = next((s for p, s in _STEP_STAGE if msg.startswith(p)), None)
        if stage is None and " parcels, " in msg and " classes, " in msg:
            stage = "zones" if rules.zones else "audit"
        events.emit(ev="step", msg=_plain(msg, job), stage=stage if stage in plan else None)

    conf = o.get("confidence", "off")
    kwargs = {}
    if conf == "custom":
        kwargs = {
            "dem_rmse_m": float(o["rmse_m"]),
            "corr_length_m": float(o.get("corr_length_m") or 0.0),
            "realizations": int(o.get("realizations") or 100),
            "seed": int(o.get("seed") or 0),
        }
    work = Path(job["work"])
    out = work / "output"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LandcheckWarning)  # recorded in the result
        result = audit(
            job["dem"],
            job["parcels"],
            job["rulebook"],
            out,
            parcels_layer=job.get("parcels_layer"),
            parcels_crs=job.get("parcels_crs"),
            dem_band=job.get("dem_band"),
            dem_crs=job.get("dem_crs"),
            z_unit=job.get("z_unit"),  # None: the unit the DEM declares
            tile_cells=int(o.get("tile_cells") or 1024),
            workers=o.get("workers"),
            show_progress=True,
            on_step=on_step,
            skip_confidence=conf == "off",
            capability_scheme=o.get("capability_scheme") or None,
            draft_mmu_m2=o.get("draft_mmu_m2"),
            **kwargs,
        )
        if o.get("prescreen_parcel"):
            from landcheck.evidence.prescreen import prescreen

            events.emit(ev="step", msg=f"pre-screen of parcel {o['prescreen_parcel']}", stage="prescreen")
            prescreen(
                job["dem"],
                job["rulebook"],
                work / "prescreen",
                parcels_path=job["parcels"],
                parcel_id=str(o["prescreen_parcel"]),
                parcels_layer=job.get("parcels_layer"),
                parcels_crs=job.get("parcels_crs"),
                dem_band=job.get("dem_band"),
                dem_crs=job.get("dem_crs"),
                z_unit=job.get("z_unit"),  # None: the unit the DEM declares
                on_step=lambda m: events.emit(ev="step", msg=_plain(m, job), stage="prescreen"),
            )
            os.replace(work / "prescreen", out / "prescreen")
    t = result.summary["totals"]
    events.emit(
        ev="done",
        totals=t,
        capability=result.summary["capability"],
        warnings=[_plain(w, job) for w in result.warnings],
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
