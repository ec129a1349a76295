"""Verdicts: per-parcel sums + rules -> verdict, reasons and the per-class and whole-area tables.

Pure: no file access.  Verdicts (docs/design.md):

* ``no_rule``   the parcel's class value has no rule in the rulebook;
* ``no_data``   empty geometry, or less than ``min_evaluated_share`` of the parcel has a slope value;
* ``conflict``  the area breaching the class rule (slope at or over the limit, or inside a
                forbidden zone) is more than the tolerance share of the parcel's covered area
                **and** at least ``min_breach_m2``;
* ``review``    not a conflict, but it would be one if the limit were lower by the review band;
* ``consistent`` otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from landcheck.inputs.rulebook import NO_RULE, Rulebook
from landcheck.overlay.sums import HIST_EDGES_PCT, OverlayPlan, Totals

__all__ = [
    "Verdict",
    "is_breach",
    "evaluate_parcels",
    "summarise_classes",
    "sensitivity_table",
    "SENSITIVITY_LIMITS_PCT",
    "SUMMED_COLUMNS",
]

#: the per-parcel columns :func:`summarise_classes` and the run summary read, besides the zone areas
#: ``zone_NAME_m2`` (a region run keeps only these for all parcels)
SUMMED_COLUMNS = ("class_name", "verdict", "area_m2", "covered_m2", "evaluated_m2", "over_limit_m2", "conflict_m2")

#: slope limits for the sensitivity curve, percent (10 to 30 in 1-point steps)
SENSITIVITY_LIMITS_PCT = np.arange(10.0, 31.0, 1.0)


class Verdict:
    CONSISTENT = "consistent"
    CONFLICT = "conflict"
    REVIEW = "review"
    NO_DATA = "no_data"
    NO_RULE = "no_rule"
    ALL = (CONSISTENT, CONFLICT, REVIEW, NO_DATA, NO_RULE)


def _fmt_m2(v: float) -> str:
    return f"{v:,.0f} m²" if v >= 10 else f"{v:.1f} m²"


def is_breach(area_m2: np.ndarray, base_m2: np.ndarray, tol_share: np.ndarray, min_m2: np.ndarray) -> np.ndarray:
    """The class rule's breach test: more than the tolerance share of the base area, and at least ``min_m2``."""
    return (area_m2 > tol_share * base_m2) & (area_m2 >= min_m2) & (area_m2 > 0)


@dataclass(frozen=True)
class ParcelRules:
    """Per-parcel rule arrays derived from the rulebook (aligned with the parcel order)."""

    class_name: np.ndarray
    limit_pct: np.ndarray
    band_pct: np.ndarray
    tol_share: np.ndarray
    min_breach_m2: np.ndarray

    def rows(self, start: int, stop: int) -> ParcelRules:
        """The rules of parcels ``start .. stop - 1`` (views)."""
        return ParcelRules(*(getattr(self, f.name)[start:stop] for f in fields(self)))


def parcel_rules(rules: Rulebook, class_values) -> ParcelRules:
    mapping = rules.class_of_value()
    # a NULL class value (None, NaN, pandas <NA>) matches no class, not even values = [""]
    names = np.array([NO_RULE if pd.isna(v) else mapping.get(str(v), NO_RULE) for v in class_values], dtype=object)
    by = {c.name: c for c in rules.classes}
    lim = np.array(
        [by[n].max_slope_pct if n in by and by[n].max_slope_pct is not None else np.nan for n in names], float
    )
    band = np.array([by[n].review_band_pct if n in by else 0.0 for n in names], float)
    tol = np.array([by[n].tolerance_share if n in by else 0.0 for n in names], float)
    mb = np.array([by[n].min_breach_m2 if n in by else 0.0 for n in names], float)
    return ParcelRules(names, lim, band, tol, mb)


def evaluate_parcels(
    totals: Totals,
    plan: OverlayPlan,
    rules: Rulebook,
    pr: ParcelRules,
    area_m2: np.ndarray,
    empty: np.ndarray,
    class_values,
    zone_columns=(),
) -> pd.DataFrame:
    """Per-parcel figures, verdict and reasons (columns documented in docs/outputs.md)."""
    n = len(area_m2)
    cov, ev = totals.covered_m2, totals.evaluated_m2
    with np.errstate(invalid="ignore", divide="ignore"):
        eval_share = np.where(area_m2 > 0, ev / area_m2, 0.0)
        slope_mean = np.where(ev > 0, totals.slope_area_sum / ev, np.nan)
        over = np.where(plan.limit_index >= 0, totals.over_m2[np.arange(n), np.maximum(plan.limit_index, 0)], np.nan)
        near = np.where(plan.near_index >= 0, totals.over_m2[np.arange(n), np.maximum(plan.near_index, 0)], np.nan)
        over_share = np.where(ev > 0, over / ev, np.nan)
        conflict_share = np.where(cov > 0, totals.conflict_m2 / cov, np.nan)

    is_conflict = is_breach(totals.conflict_m2, cov, pr.tol_share, pr.min_breach_m2)
    is_near = is_breach(totals.near_conflict_m2, cov, pr.tol_share, pr.min_breach_m2)
    no_rule = pr.class_name == NO_RULE
    no_data = ~no_rule & (empty | (eval_share < rules.min_evaluated_share))
    verdict = np.where(
        no_rule,
        Verdict.NO_RULE,
        np.where(
            no_data,
            Verdict.NO_DATA,
            np.where(is_conflict, Verdict.CONFLICT, np.where(is_near, Verdict.REVIEW, Verdict.CONSISTENT)),
        ),
    )

    by = {c.name: c for c in rules.classes}
    zone_of_col = [rules.zones[col.zone_index].name if col.zone_index is not None else None for col in zone_columns]
    reasons = []
    for i in range(n):
        r: list[str] = []
        name = pr.class_name[i]
        v = verdict[i]
        if v == Verdict.NO_RULE:
            r.append(
                "class value is NULL (empty attribute)"
                if pd.isna(class_values[i])
                else f"class value {str(class_values[i])!r} has no rule in the rulebook"
            )
        elif empty[i]:
            r.append("empty geometry: nothing to evaluate")
        else:
            if v == Verdict.NO_DATA:
                r.append(
                    f"only {100 * eval_share[i]:.1f} % of the parcel has a slope value (outside the DEM or next to "
                    f"nodata); the rulebook needs {100 * rules.min_evaluated_share:.0f} %"
                )
            cls = by[name]
            tol_txt = f"tolerance {100 * cls.tolerance_share:g} %, minimum {cls.min_breach_m2:g} m²"
            if cls.max_slope_pct is not None and ev[i] > 0:
                if over[i] > 0:
                    r.append(
                        f"slope ≥ {cls.max_slope_pct:g} % on {_fmt_m2(over[i])} "
                        f"({100 * over_share[i]:.1f} % of evaluated area; {tol_txt})"
                    )
                if v == Verdict.REVIEW and near[i] > over[i]:
                    r.append(
                        f"slope within {cls.review_band_pct:g} points of the {cls.max_slope_pct:g} % limit "
                        f"on {_fmt_m2(near[i] - over[i])}"
                    )
            for ci, zn in enumerate(zone_of_col):
                if zn is not None and zn in cls.forbidden_zones and totals.zone_m2[i, ci] > 0:
                    share = totals.zone_m2[i, ci] / cov[i] if cov[i] > 0 else np.nan
                    r.append(
                        f"inside {zone_columns[ci].label} on {_fmt_m2(totals.zone_m2[i, ci])} "
                        f"({100 * share:.1f} % of the parcel)"
                    )
            if v == Verdict.CONFLICT:
                r.insert(0, f"breach {_fmt_m2(totals.conflict_m2[i])} = {100 * conflict_share[i]:.1f} % of the parcel")
            elif v == Verdict.CONSISTENT:
                r.append(
                    "no breach above the tolerance" if totals.conflict_m2[i] > 0 else "no breach of the class rule"
                )
        reasons.append(" | ".join(r))

    df = pd.DataFrame(
        {
            "class_value": pd.array([None if pd.isna(v) else str(v) for v in class_values], dtype="string"),
            "class_name": pr.class_name.astype(str),
            "area_m2": area_m2,
            "covered_m2": cov,
            "evaluated_m2": ev,
            "evaluated_share": eval_share,
            "slope_mean_pct": slope_mean,
            "slope_max_pct": totals.slope_max_pct,
            "max_slope_pct": pr.limit_pct,
            "over_limit_m2": over,
            "over_limit_share": over_share,
            "near_limit_m2": near,
            "conflict_m2": totals.conflict_m2,
            "conflict_share": conflict_share,
        }
    )
    for ci, col in enumerate(zone_columns):
        df[f"zone_{col.name}_m2"] = totals.zone_m2[:, ci]
        with np.errstate(invalid="ignore", divide="ignore"):
            df[f"zone_{col.name}_share"] = np.where(cov > 0, totals.zone_m2[:, ci] / cov, np.nan)
    df["verdict"] = verdict
    df["reasons"] = reasons
    return df


def summarise_classes(parcels: pd.DataFrame, rules: Rulebook) -> pd.DataFrame:
    """One row per rulebook class (and ``no_rule`` when present)."""
    rows = []
    names = [c.name for c in rules.classes] + ([NO_RULE] if (parcels["class_name"] == NO_RULE).any() else [])
    by = {c.name: c for c in rules.classes}
    for name in names:
        sel = parcels["class_name"] == name
        p = parcels[sel]
        counted = p[p["verdict"] != Verdict.NO_DATA]
        ev = float(counted["evaluated_m2"].sum())
        conflict = float(counted["conflict_m2"].sum())
        cov = float(counted["covered_m2"].sum())
        rows.append(
            {
                "class_name": name,
                "label": by[name].label if name in by else "no rule in the rulebook",
                "development": bool(by[name].development) if name in by else False,
                "parcels": int(sel.sum()),
                "area_m2": float(p["area_m2"].sum()),
                "evaluated_m2": ev,
                "compliant_m2": max(cov - conflict, 0.0),
                "conflict_m2": conflict,
                "conflict_share": conflict / cov if cov > 0 else np.nan,
                "over_limit_m2": float(np.nansum(counted["over_limit_m2"])),
                **{
                    f"n_{v}": int((p["verdict"] == v).sum())
                    for v in (Verdict.CONSISTENT, Verdict.CONFLICT, Verdict.REVIEW, Verdict.NO_DATA)
                },
            }
        )
    return pd.DataFrame(rows)


def sensitivity_table(totals: Totals, plan: OverlayPlan, pr: ParcelRules, rules: Rulebook, counted: np.ndarray) -> dict:
    """Share of evaluated land over each limit in ``SENSITIVITY_LIMITS_PCT``, per development class and overall."""
    idx = np.searchsorted(plan.thresholds_pct, SENSITIVITY_LIMITS_PCT)
    out = {"limits_pct": SENSITIVITY_LIMITS_PCT.tolist(), "classes": {}}
    dev_sel = np.zeros(len(pr.class_name), bool)
    for c in rules.classes:
        if not c.development:
            continue
        sel = (pr.class_name == c.name) & counted
        dev_sel |= sel
        out["classes"][c.name] = _over_shares(totals, sel, idx)
    out["all_development"] = _over_shares(totals, dev_sel, idx)
    return out


def _over_shares(totals: Totals, sel: np.ndarray, idx: np.ndarray) -> list:
    """Area over the thresholds ``idx`` / evaluated area, of the parcels ``sel`` (summed threshold by
    threshold: the whole (parcels x thresholds) float view is not made)."""
    ev = totals.evaluated_m2[sel].sum()
    if not ev > 0:
        return [None] * len(idx)
    return (totals.column_sums("over_m2", np.flatnonzero(sel), idx) / ev).tolist()


def slope_histogram(totals: Totals, rules: Rulebook) -> dict:
    edges = [float(e) if np.isfinite(e) else None for e in HIST_EDGES_PCT]
    return {
        "bin_edges_pct": edges,
        "classes": {c.name: totals.class_hist_m2[i].tolist() for i, c in enumerate(rules.classes)},
    }
