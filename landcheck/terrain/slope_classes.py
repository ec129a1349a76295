"""Slope-class schemes: built-in published tables and user-defined breaks.

A scheme is a list of ascending breaks in percent; class *i* holds slopes
``breaks[i] <= s < breaks[i+1]`` (the last class is open-ended).  Breaks are
"or over" at the lower edge, the convention of slope limits in land law.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SlopeClassScheme", "BUILTIN_SCHEMES", "get_scheme", "classify_slope", "scheme_from_breaks"]

NO_CLASS = 255


@dataclass(frozen=True)
class SlopeClassScheme:
    key: str
    title: str
    lower_pct: tuple[float, ...]
    labels: tuple[str, ...]
    source: str

    def __post_init__(self):
        if len(self.lower_pct) != len(self.labels) or len(self.labels) < 2:
            raise ValueError("a slope-class scheme needs one label per class and at least two classes")
        if self.lower_pct[0] != 0 or any(b >= a for a, b in zip(self.lower_pct[1:], self.lower_pct[:-1])):
            raise ValueError("slope-class breaks must start at 0 and increase strictly")


BUILTIN_SCHEMES = {
    "planning-6": SlopeClassScheme(
        "planning-6",
        "Six slope classes used in land-use planning",
        (0.0, 3.0, 8.0, 18.0, 30.0, 50.0),
        (
            "level to nearly level",
            "gently sloping to undulating",
            "undulating to rolling",
            "rolling to moderately steep",
            "steep",
            "very steep",
        ),
        "Land-use planning slope classes 0-3-8-18-30-50 % (docs/references.md; municipal planning "
        "guidebook classes; 18 % is the key threshold for urban suitability).",
    ),
    "fao-2006": SlopeClassScheme(
        "fao-2006",
        "FAO slope-gradient classes",
        (0.0, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 15.0, 30.0, 60.0),
        (
            "flat",
            "level",
            "nearly level",
            "very gently sloping",
            "gently sloping",
            "sloping",
            "strongly sloping",
            "moderately steep",
            "steep",
            "very steep",
        ),
        "FAO 2006, Guidelines for Soil Description, 4th ed., slope-gradient classes (table number from memory; "
        "docs/references.md).",
    ),
}


def get_scheme(key: str) -> SlopeClassScheme:
    try:
        return BUILTIN_SCHEMES[key]
    except KeyError:
        raise ValueError(f"unknown slope-class scheme {key!r}; choose one of: {', '.join(BUILTIN_SCHEMES)}") from None


def scheme_from_breaks(breaks_pct, labels=None, key: str = "custom") -> SlopeClassScheme:
    """A user scheme from ascending inner breaks, e.g. ``[8, 18, 30]`` -> 0-8, 8-18, 18-30, >=30."""
    inner = [float(b) for b in breaks_pct]
    lower = tuple([0.0] + inner)
    if labels is None:
        uppers = inner + [None]
        labels = [f"{lo:g}-{hi:g} %" if hi is not None else f">= {lo:g} %" for lo, hi in zip(lower, uppers)]
    return SlopeClassScheme(key, "User-defined slope classes", lower, tuple(labels), "user configuration")


def classify_slope(slope_pct: np.ndarray, scheme: SlopeClassScheme) -> np.ndarray:
    """Class index (uint8) of each cell; 255 where slope is NaN.

    >>> classify_slope(np.array([0.0, 2.99, 3.0, 17.9, 18.0, 70.0, np.nan]), get_scheme("planning-6")).tolist()
    [0, 0, 1, 2, 3, 5, 255]
    """
    s = np.asarray(slope_pct)
    idx = np.searchsorted(np.asarray(scheme.lower_pct), s, side="right") - 1
    out = np.clip(idx, 0, len(scheme.labels) - 1).astype(np.uint8)
    out[~np.isfinite(s)] = NO_CLASS
    return out
