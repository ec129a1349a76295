"""How a verdict is shown: legend order, plain label, colour and line style (one home for maps, report, pre-screen).

The verdict names themselves are :class:`landcheck.verdicts.evaluate.Verdict`.

>>> VERDICT_LABELS["review"]
'review (near a limit)'
>>> VERDICT_COLOURS["review"]
'#1f7f93'
"""

from __future__ import annotations

from landcheck.verdicts.evaluate import Verdict

__all__ = ["VERDICTS", "VERDICT_LABELS", "VERDICT_COLOURS", "VERDICT_LINES", "verdict_badge_css"]

#: verdict values of parcels.csv, in legend order
VERDICTS: tuple[str, ...] = (Verdict.CONFLICT, Verdict.REVIEW, Verdict.CONSISTENT, Verdict.NO_DATA, Verdict.NO_RULE)

#: plain labels, as a reader of a map legend or report sees them
VERDICT_LABELS: dict[str, str] = {
    Verdict.CONFLICT: "conflict",
    Verdict.REVIEW: "review (near a limit)",
    Verdict.CONSISTENT: "consistent",
    Verdict.NO_DATA: "no data (outside the DEM)",
    Verdict.NO_RULE: "no rule for its class",
}

#: one colour per verdict for map outlines and report badges
VERDICT_COLOURS: dict[str, str] = {
    Verdict.CONFLICT: "#161616",
    Verdict.REVIEW: "#1f7f93",
    Verdict.CONSISTENT: "#24509a",
    Verdict.NO_DATA: "#8f8f8f",
    Verdict.NO_RULE: "#7a3d96",
}

#: map outline width (pt) and dash pattern; every verdict differs in dash or width, so a map still
#: reads in greyscale
VERDICT_LINES: dict[str, tuple[float, object]] = {
    Verdict.CONFLICT: (2.6, "solid"),
    Verdict.REVIEW: (2.0, (0, (5.0, 2.0))),
    Verdict.CONSISTENT: (1.3, "solid"),
    Verdict.NO_DATA: (1.4, (0, (1.0, 1.6))),
    Verdict.NO_RULE: (1.6, (0, (6.0, 2.0, 1.2, 2.0))),
}

# badge text colour and border style in HTML (dashes mirror the map lines)
_BADGE = {
    Verdict.CONFLICT: "background:#161616;color:#fff;border-color:#161616",
    Verdict.REVIEW: f"border-style:dashed;border-color:{VERDICT_COLOURS[Verdict.REVIEW]};color:#0f4f5c",
    Verdict.CONSISTENT: f"border-color:{VERDICT_COLOURS[Verdict.CONSISTENT]};color:#24509a",
    Verdict.NO_DATA: "border-style:dotted;border-color:#6f6f6f;color:#4f4f4f",
    Verdict.NO_RULE: f"border-style:dashed;border-color:{VERDICT_COLOURS[Verdict.NO_RULE]};color:#5e2c75",
}


def verdict_badge_css() -> str:
    """CSS rules ``.v-<verdict>`` for verdict badges, one line each.

    >>> verdict_badge_css().splitlines()[1]
    '.v-review{border-style:dashed;border-color:#1f7f93;color:#0f4f5c}'
    """
    return "".join(f".v-{v}{{{_BADGE[v]}}}\n" for v in VERDICTS)
