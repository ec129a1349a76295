"""Plain words for every value a reader sees: verdicts, confidence states, flags, zones, counts.

Maps, the report and the pre-screen take their wording from here, so a state is
named the same way everywhere and no raw key (``no_data``, ``robust_conflict``,
``True``) reaches a reader.
"""

from __future__ import annotations

import math

__all__ = [
    "VERDICT_TEXT",
    "CONFIDENCE_TEXT",
    "CONFIDENCE_SHORT",
    "yes_no",
    "count_text",
    "area_ha_text",
]

#: verdict values of parcels.csv -> words shown to readers
VERDICT_TEXT = {
    "conflict": "conflict",
    "review": "review (near a limit)",
    "consistent": "consistent",
    "no_data": "no data (outside the DEM)",
    "no_rule": "no rule for its class",
}

#: confidence states of confidence.csv -> words shown to readers
CONFIDENCE_TEXT = {
    "robust_conflict": "conflict in at least 95 % of DEM-error runs",
    "uncertain": "uncertain (depends on DEM error)",
    "robust_clear": "clear in at least 95 % of DEM-error runs",
    "not_evaluated": "not assessed (no data or no rule)",
    "": "",
}

#: shorter confidence words for table cells
CONFIDENCE_SHORT = {
    "robust_conflict": "conflict in \u2265 95 % of runs",
    "uncertain": "uncertain",
    "robust_clear": "clear in \u2265 95 % of runs",
    "not_evaluated": "not assessed",
    "": "",
}

_M2_PER_HA = 10_000.0


def yes_no(value) -> str:
    """'yes' / 'no' for a flag given as bool or as the text true/false; other values unchanged."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    t = str(value).strip().lower()
    if t in ("true", "1", "yes"):
        return "yes"
    if t in ("false", "0", "no"):
        return "no"
    return str(value)


def count_text(n: int, singular: str, plural: str | None = None) -> str:
    """``1 parcel``, ``2 parcels``, ``1,234 parcels``."""
    word = singular if n == 1 else (plural or singular + "s")
    return f"{n:,d} {word}"


def area_ha_text(m2) -> str:
    """Area on the ground in hectares with m² in brackets, e.g. ``7.70 ha (77,000 m²)``."""
    try:
        f = float(m2)
    except (TypeError, ValueError):
        return "\u2013"
    if math.isnan(f):
        return "\u2013"
    return f"{f / _M2_PER_HA:,.2f} ha ({f:,.0f} m\u00b2)"
