"""Plain words for every value a reader sees: verdicts, confidence states, flags, zones, counts.

Maps, the report and the pre-screen take their wording from here, so a state is
named the same way everywhere and no raw key (``no_data``, ``robust_conflict``,
``True``) reaches a reader.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from landcheck.terrain.slope_classes import NO_CLASS, SlopeClassScheme
from landcheck.terrain.slope_classes import classify_slope as classify_slope_by_scheme
from landcheck.verdicts.labels import VERDICT_LABELS
from landcheck.wording import count_text

__all__ = [
    "VERDICT_TEXT",
    "CONFIDENCE_TEXT",
    "CONFIDENCE_SHORT",
    "yes_no",
    "count_text",
    "area_ha_text",
    "DEFAULT_SLOPE_BREAKS_PCT",
    "classify_slope",
    "slope_class_labels",
    "slope_class_colours",
]

#: verdict values of parcels.csv -> words shown to readers (one home: landcheck.verdicts.labels)
VERDICT_TEXT = VERDICT_LABELS

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


def area_ha_text(m2) -> str:
    """Area on the ground in hectares with m² in brackets, e.g. ``7.70 ha (77,000 m²)``."""
    try:
        f = float(m2)
    except (TypeError, ValueError):
        return "\u2013"
    if math.isnan(f):
        return "\u2013"
    return f"{f / _M2_PER_HA:,.2f} ha ({f:,.0f} m\u00b2)"


# --------------------------------------------------------------------------- slope classes on maps

#: slope-class breaks in percent, land-use planning classes (docs/report.md):
#: 0-3 level, 3-8 gently sloping, 8-18 undulating to rolling, 18-30 rolling to
#: moderately steep, 30-50 steep, 50 and over very steep.
DEFAULT_SLOPE_BREAKS_PCT: tuple[float, ...] = (0.0, 3.0, 8.0, 18.0, 30.0, 50.0, math.inf)


def _check_breaks(breaks_pct: Sequence[float]) -> np.ndarray:
    b = np.asarray([float(v) for v in breaks_pct], dtype=np.float64)
    if b.ndim != 1 or b.size < 2 or np.any(np.isnan(b)) or np.any(np.diff(b) <= 0) or b[0] < 0:
        raise ValueError(
            f"slope_breaks_pct: got {list(breaks_pct)}; expected at least two strictly increasing "
            "percent values starting at 0 or more, e.g. [0, 3, 8, 18, 30, 50, inf]"
        )
    return b


def _fmt_num(v: float) -> str:
    return f"{v:g}"


def slope_class_labels(breaks_pct: Sequence[float] = DEFAULT_SLOPE_BREAKS_PCT) -> list[str]:
    """Legend text per slope class, e.g. ``"3 to under 8 %"`` and ``"50 % and over"``."""
    b = _check_breaks(breaks_pct)
    out = []
    for lo, hi in zip(b[:-1], b[1:]):
        out.append(f"{_fmt_num(lo)} % and over" if math.isinf(hi) else f"{_fmt_num(lo)} to under {_fmt_num(hi)} %")
    return out


# Anchor colours in CIELAB (L*, a*, b*), pale straw to dark plum; L* falls
# strictly, so the ramp reads in greyscale and for every colour-vision type.
_SLOPE_RAMP_LAB = np.array(
    [
        [96.0, -5.0, 28.0],
        [84.0, 4.0, 52.0],
        [70.0, 22.0, 55.0],
        [56.0, 38.0, 38.0],
        [42.0, 40.0, 8.0],
        [27.0, 24.0, -18.0],
    ]
)


_D65_WHITE = (0.95047, 1.0, 1.08883)


def _lab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """CIELAB (D65) to gamma-encoded sRGB 0-1 (CIE 1976 L*a*b*; IEC 61966-2-1), clipped to gamut."""
    lab = np.asarray(lab, dtype=np.float64)
    fy = (lab[..., 0] + 16.0) / 116.0
    fx = fy + lab[..., 1] / 500.0
    fz = fy - lab[..., 2] / 200.0
    delta = 6.0 / 29.0

    def finv(t):
        return np.where(t > delta, t**3, 3.0 * delta**2 * (t - 4.0 / 29.0))

    xyz = np.stack([finv(fx) * _D65_WHITE[0], finv(fy) * _D65_WHITE[1], finv(fz) * _D65_WHITE[2]], axis=-1)
    m = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]])
    lin = np.clip(xyz @ m.T, 0.0, 1.0)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1.0 / 2.4) - 0.055)


def slope_class_colours(n_classes: int) -> list[str]:
    """``n_classes`` hex colours from light (gentle) to dark (steep), evenly spaced along the ramp."""
    if n_classes < 1:
        raise ValueError(f"n_classes: got {n_classes}; expected 1 or more")
    t = np.linspace(0.0, 1.0, n_classes) if n_classes > 1 else np.array([0.0])
    pos = t * (len(_SLOPE_RAMP_LAB) - 1)
    i0 = np.minimum(np.floor(pos).astype(int), len(_SLOPE_RAMP_LAB) - 2)
    frac = (pos - i0)[:, None]
    lab = _SLOPE_RAMP_LAB[i0] * (1 - frac) + _SLOPE_RAMP_LAB[i0 + 1] * frac
    rgb = _lab_to_srgb(lab)
    return ["#" + "".join(f"{int(round(c * 255)):02x}" for c in row) for row in rgb]


def classify_slope(slope_pct: np.ndarray, breaks_pct: Sequence[float] = DEFAULT_SLOPE_BREAKS_PCT) -> np.ndarray:
    """Slope class index per cell: class i holds breaks[i] <= slope < breaks[i+1].

    Parameters
    ----------
    slope_pct : ndarray
        Slope in percent; NaN for no slope.
    breaks_pct : sequence of float
        Strictly increasing class breaks (%); the last may be ``inf``.

    Returns
    -------
    ndarray, int16
        Class index, -1 for NaN or values outside the breaks.
    """
    b = _check_breaks(breaks_pct)
    s = np.asarray(slope_pct, dtype=np.float64)
    # one home for slope classing: landcheck.terrain.slope_classes (class i: lower[i] <= s < lower[i+1])
    lower = tuple(float(v) for v in b[:-1])
    if lower[0] > 0:
        lower = (0.0, *lower)  # a class below the first break, dropped again below
    scheme = SlopeClassScheme("map", "map slope classes", lower, tuple(str(i) for i in range(len(lower))), "maps")
    idx = classify_slope_by_scheme(s, scheme).astype(np.int16)
    idx = np.where(idx == NO_CLASS, -1, idx - (1 if b[0] > 0 else 0)).astype(np.int16)
    bad = np.isnan(s) | (s < b[0]) | (s >= b[-1])
    return np.where(bad, -1, idx).astype(np.int16)
