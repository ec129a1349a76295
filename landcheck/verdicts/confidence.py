"""Verdict confidence under DEM error: Monte Carlo realizations of the slope test, per parcel and per class.

A verdict computed on one DEM hides how close it sits to the line.  This
module repeats the slope part of the audit on ``N`` equally likely DEMs, each
the DEM plus one seeded, spatially correlated error field
(:mod:`landcheck.terrain.dem_error`), and reports how often each parcel comes out
as a conflict (Hunter & Goodchild 1997; Fisher 1998; the recipe of
docs/references.md §11).

For every realization ``k`` and every window of the audit:

1. the DEM window with its one-cell halo is read **once**;
2. the error field of realization ``k`` on the same haloed window
   (:func:`landcheck.terrain.dem_error.error_field_with_halo`, halo 1) is added;
3. slope is recomputed with the same kernel as the audit
   (:func:`landcheck.terrain.slope.slope_gradient`, compiled backend);
4. the per-parcel over-limit and conflict areas come from the same overlay
   code as the audit (:func:`landcheck.overlay.sums.accumulate_window` with the
   audit's :class:`~landcheck.overlay.sums.OverlayPlan`, reduced to the class
   limits).  Exact coverage fractions depend on geometry only, so they are
   computed **once per window** and reused for every realization;
5. the verdict test is evaluate's own breach rule
   (:func:`landcheck.verdicts.evaluate.is_breach`: breach area over the tolerance share
   of the covered area and at least ``min_breach_m2``).

Reported per parcel: ``P(conflict)`` with its Monte Carlo standard error
``sqrt(P (1 - P) / N)``, the 5th/50th/95th percentiles of the share over the
limit, of the conflict share and of the mean slope, and a label:

* ``robust_conflict``  P >= 0.95
* ``robust_clear``     P <= 0.05
* ``uncertain``        otherwise
* ``not_evaluated``    verdict ``no_data`` or ``no_rule`` (no probability)

Per class: the same percentiles of the class conflict share (conflict area of
the class's evaluated parcels over their covered area), the expected number of
conflicts (sum of P) and the label counts.

What stays fixed across realizations
------------------------------------
* Parcels whose class has **no slope limit** can only breach through zones;
  their conflict area does not depend on the DEM error, so they are taken from
  the audit's own figures and get P = 0 or 1.
* Hazard zones are held at their audit extent, including zones derived from
  the DEM (HAND, sea-level rise, derived streams and shoreline): re-running
  the global hydrology for every realization is out of reach.  Their
  sensitivity to DEM error is therefore **not** part of P.
* The evaluated area (cells with a slope) is the same in every realization:
  the error field has no NaN, so only DEM nodata removes slope.  ``no_data``
  and ``no_rule`` parcels are therefore the audit's own.

Reproducibility
---------------
Realization ``k`` is a function of the seed, ``k``, the error model and the
global cell indices only (see :mod:`landcheck.terrain.dem_error`), so the perturbed
slopes are bit for bit the same whatever the window size, the worker count or
the order in which work is done.  Per-parcel sums of a parcel that spans
several windows are added in window order; a different tiling changes only
the rounding of those sums (relative 1e-15).

Percentiles are numpy's default (linear interpolation between order
statistics, Hyndman & Fan 1996 type 7).
"""

from __future__ import annotations

import dataclasses
import itertools
import logging
import math
import numbers
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from landcheck.errors import InputDataError, RuleFileError
from landcheck.geo.grid import GridSpec, Window
from landcheck.inputs.rulebook import NO_RULE, Rulebook
from landcheck.overlay.coverage import coverage_triplets_aligned
from landcheck.overlay.sums import (
    ROLE_FORBIDDEN_PIECE,
    ROLE_PARCEL,
    OverlayPlan,
    accumulate_window,
)
from landcheck.terrain.dem_error import (
    ErrorModel,
    check_realizations,
    error_field_with_halo,
    probability_standard_error,
)
from landcheck.terrain.slope import HALO_CELLS, SlopeMethod, gradient_to_unit, slope_gradient

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "PERCENTILES",
    "PROCESS_MIN_CELL_REALIZATIONS",
    "ROBUST_CLEAR_P",
    "ROBUST_CONFLICT_P",
    "ConfidenceLabel",
    "ConfidenceSettings",
    "confidence_settings",
    "run_confidence",
]

logger = logging.getLogger(__name__)

#: P(conflict) at or above which a conflict is called robust
ROBUST_CONFLICT_P = 0.95
#: P(conflict) at or below which a parcel is called robustly clear
ROBUST_CLEAR_P = 0.05
#: with ``workers=None``, smaller runs (cells x realizations) stay in this process: one realization
#: costs about 0.3 s per million cells on one core, starting a worker process a few seconds
PROCESS_MIN_CELL_REALIZATIONS = 20_000_000
#: percentiles reported for every distribution (percent)
PERCENTILES = (5, 50, 95)


class ConfidenceLabel:
    ROBUST_CONFLICT = "robust_conflict"
    ROBUST_CLEAR = "robust_clear"
    UNCERTAIN = "uncertain"
    NOT_EVALUATED = "not_evaluated"
    ALL = ("robust_conflict", "uncertain", "robust_clear", "not_evaluated")


@dataclass(frozen=True)
class ConfidenceSettings:
    """A validated Monte Carlo set-up (recorded in the manifest).

    Attributes
    ----------
    model : ErrorModel
        DEM error: RMSE (m) and correlation length (m) at the grid's cell size.
    realizations : int
        Number of error fields, ``MIN_REALIZATIONS`` (10) to ``MAX_REALIZATIONS`` (10 000).
    seed : int
        Whole number >= 0; realization ``k`` of a seed is always the same field.
    """

    model: ErrorModel
    realizations: int
    seed: int

    def describe(self) -> dict:
        return {
            "rmse_m": self.model.rmse_m,
            "corr_length_m": self.model.corr_length_m,
            "cell_size_m": [self.model.cell_size_m, self.model.cell_size_y_m],
            "kernel_sigma_cells": list(self.model.kernel_sigma_cells),
            "realizations": self.realizations,
            "seed": self.seed,
            "numpy_version": np.__version__,
        }


def confidence_settings(
    rules: Rulebook | None,
    grid: GridSpec,
    *,
    rmse_m: float | None = None,
    corr_length_m: float | None = None,
    realizations: int | None = None,
    seed: int | None = None,
) -> ConfidenceSettings | None:
    """Merge command-line values over the rulebook's ``[uncertainty]`` table and validate them.

    Parameters
    ----------
    rules : Rulebook or None
        Its ``uncertainty`` table (if any) gives the defaults.
    grid : GridSpec
        The DEM grid (cell sizes in metres at its centre row).
    rmse_m, corr_length_m, realizations, seed : optional
        Overrides (e.g. ``--dem-rmse``, ``--corr-length``, ``--realizations``, ``--seed``).
        ``corr_length_m`` 0 means independent errors per cell.

    Returns
    -------
    ConfidenceSettings or None
        None when neither the rulebook nor the overrides give an RMSE: no confidence run.

    Raises
    ------
    RuleFileError
        RMSE <= 0, a correlation length shorter than one cell (other than 0) or too long to
        simulate, fewer than 10 or more than 10 000 realizations, a negative seed.
    """
    unc = rules.uncertainty if rules is not None else None
    where = f"{rules.path}, [uncertainty]" if unc is not None else "confidence options"
    rmse = rmse_m if rmse_m is not None else (unc.rmse_m if unc is not None else None)
    if rmse is None:
        if any(v is not None for v in (corr_length_m, realizations, seed)):
            raise RuleFileError(
                f"{where}: a DEM error model needs the DEM's vertical RMSE; give --dem-rmse "
                "(metres) or rmse_m in the rulebook's [uncertainty] table."
            )
        return None
    length = corr_length_m if corr_length_m is not None else (unc.corr_length_m if unc is not None else 0.0)
    n = realizations if realizations is not None else (unc.realizations if unc is not None else 100)
    s = seed if seed is not None else (unc.seed if unc is not None else 0)
    try:
        model = ErrorModel.for_grid(rmse, length, grid)
        n = check_realizations(n)
    except RuleFileError as exc:
        raise RuleFileError(f"{where}: {exc}") from None
    return ConfidenceSettings(model, n, _check_seed(s, where))


def _check_seed(seed, where: str = "confidence options") -> int:
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or int(seed) < 0:
        raise RuleFileError(f"{where}: seed = {seed!r}; expected a whole number >= 0 (e.g. --seed 20240601).")
    return int(seed)


# --------------------------------------------------------------------------- the per-window work


def _realization_plan(plan: OverlayPlan) -> OverlayPlan:
    """The audit's plan reduced to what a realization needs: the class limits and the conflict rule.

    The cell rule is untouched (``slope >= the parcel's limit`` or a forbidden raster zone, plus
    the forbidden vector piece on the other cells); only figures a realization does not use are
    switched off: other thresholds, review band, zone columns, class histograms, land figures.
    """
    li = plan.limit_index
    has = li >= 0
    limits = plan.thresholds_pct[li[has]]
    th = np.unique(limits)
    new_li = np.full_like(li, -1)
    new_li[has] = np.searchsorted(th, limits)
    return dataclasses.replace(
        plan,
        thresholds_pct=th,
        limit_index=new_li,
        near_index=np.full_like(li, -1),
        class_index=np.full_like(plan.class_index, -1),
        col_channel=np.empty(0, np.int64),
        col_zone=np.empty(0, np.int64),
        capability_limit_pct=None,
    )


@dataclass(frozen=True)
class _Context:
    """What every realization needs besides the window data (sent once to each worker process)."""

    grid: GridSpec
    method: SlopeMethod
    plan: OverlayPlan  # reduced plan
    model: ErrorModel
    seed: int


@dataclass
class _WindowData:
    """One window, prepared once in the driver: haloed DEM, zone bits, candidates and exact coverage."""

    index: int
    win: Window
    elev: np.ndarray  # (h + 2, w + 2) metres, NaN invalid
    zone_bits: np.ndarray | None
    candidates: np.ndarray
    triplets: tuple


@dataclass
class _TaskResult:
    window_index: int
    r0: int
    r1: int
    parcels: np.ndarray  # global parcel indices
    covered_m2: np.ndarray
    evaluated_m2: np.ndarray
    over_m2: np.ndarray  # (r1 - r0, k)
    conflict_m2: np.ndarray  # (r1 - r0, k)
    slope_sum: np.ndarray  # (r1 - r0, k), area-weighted slope sums (% m²)


def _prepare_window(
    dem, tree, keep: np.ndarray, geoms: np.ndarray, index: int, win: Window, zones
) -> _WindowData | None:
    """Read and cover one window (driver side: file access and geometry stay out of the workers)."""
    import shapely

    g = dem.grid
    cand = keep[tree.query(shapely.box(*g.window_bounds(win)), predicate="intersects")]
    if len(cand) == 0:
        return None
    cand.sort()
    trip = coverage_triplets_aligned(geoms[cand], g.transform, g.height, g.width, win)
    if len(trip[0]) == 0:
        return None
    zb = zones.bits(win) if zones is not None else None
    return _WindowData(index, win, dem.read_with_halo(win, HALO_CELLS), zb, cand, trip)


def _realizations(ctx: _Context, wd: _WindowData, r0: int, r1: int) -> _TaskResult:
    """Realizations ``r0 .. r1`` of one prepared window: error field + slope + per-parcel sums each."""
    g, win = ctx.grid, wd.win
    nr = r1 - r0
    rows = np.arange(win.row_off, win.row_off + win.height)
    hx, hy = g.cell_size_m(rows)
    cell_area = g.cell_area_m2(rows)
    parcels = None
    for j, k in enumerate(range(r0, r1)):
        z = error_field_with_halo(ctx.model, win, HALO_CELLS, g.height, g.width, ctx.seed, k)
        z += wd.elev  # z is a new array from the generator: the DEM window is never modified
        slope_pct = gradient_to_unit(slope_gradient(z, hx, hy, ctx.method, backend="compiled"), "percent")
        sums, _ = accumulate_window(slope_pct, wd.zone_bits, cell_area, wd.candidates, wd.triplets, ctx.plan)
        if parcels is None:
            parcels = sums.parcels
            cols = np.maximum(ctx.plan.limit_index[parcels], 0)
            over = np.empty((nr, len(parcels)))
            conflict = np.empty((nr, len(parcels)))
            slope_sum = np.empty((nr, len(parcels)))
            covered, evaluated = sums.covered_m2, sums.evaluated_m2
        over[j] = sums.over_m2[np.arange(len(parcels)), cols]
        conflict[j] = sums.conflict_m2
        slope_sum[j] = sums.slope_area_sum
    return _TaskResult(wd.index, r0, r1, parcels, covered, evaluated, over, conflict, slope_sum)


class _RealizationTask:
    """The engine task: realizations ``r0 .. r1`` of one prepared window (picklable: the context is shipped once)."""

    def __init__(self, ctx: _Context):
        self.ctx = ctx

    def __call__(self, item: tuple[_WindowData, int, int]) -> _TaskResult:
        wd, r0, r1 = item
        return _realizations(self.ctx, wd, r0, r1)


def _chunks(n: int, parts: int) -> list[tuple[int, int]]:
    parts = max(1, min(parts, n))
    edges = [round(i * n / parts) for i in range(parts + 1)]
    return [(a, b) for a, b in itertools.pairwise(edges) if b > a]


# --------------------------------------------------------------------------- driver


def run_confidence(
    dem,
    windows,
    geoms: np.ndarray,
    plan: OverlayPlan,
    rules: Rulebook,
    pr,
    settings,
    baseline: pd.DataFrame,
    conf: ConfidenceSettings,
    *,
    zones=None,
    workers: int | None = 1,
    engine=None,
    progress=None,
) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """Monte Carlo confidence of every parcel's verdict (see the module notes).

    Parameters
    ----------
    dem : landcheck.inputs.dem.DemSource
    windows : sequence of Window
        The audit's windows (any tiling gives the same realizations).
    geoms : ndarray of shapely geometries
        The audit's geometries: parcels, then their zone pieces (``all_geoms`` in the audit).
    plan : OverlayPlan
        The audit's plan (from ``_build_plan``).
    rules : Rulebook
    pr : landcheck.verdicts.evaluate.ParcelRules
        Per-parcel rules (tolerance share, minimum breach area).
    settings : AuditSettings, SlopeMethod or str
        The slope method (``settings.method`` when given an AuditSettings).
    baseline : pandas.DataFrame
        The audit's per-parcel table (:func:`landcheck.verdicts.evaluate.evaluate_parcels`), in parcel order;
        uses ``verdict``, ``class_name``, ``covered_m2``, ``evaluated_m2``, ``conflict_m2``,
        ``over_limit_share``, ``conflict_share``, ``slope_mean_pct``, and ``parcel_id`` if present.
    conf : ConfidenceSettings
        Error model, number of realizations and seed (:func:`confidence_settings`).
    zones : landcheck.zones.prepare.ZoneSet, optional
        The audit's zones (raster zone bits per window).
    workers : int or None
        Used only without ``engine``: 1 (default) runs in this process, more run on that many worker
        processes; None uses every core when the run has at least ``PROCESS_MIN_CELL_REALIZATIONS``
        cell-realizations (cells x N) and this process otherwise (starting a worker costs a few seconds).
    engine : landcheck.engine.backends.Engine, optional
        Where the realizations run (threads, processes or Dask; the audit passes its own engine).
        Results are identical on every engine and worker count.
    progress : tqdm-like, optional
        ``update(n)`` is called with the number of window-realizations done.

    Returns
    -------
    parcels : pandas.DataFrame
        One row per parcel, columns in docs/confidence.md.
    classes : pandas.DataFrame
        One row per rulebook class (and ``no_rule`` when present).
    summary : dict
        JSON-ready: settings, label counts, per-class records, timing-free figures.

    Raises
    ------
    RuleFileError
        Realization count or seed out of range.
    InputDataError
        ``baseline`` does not match the parcels of ``plan``.
    """
    from landcheck.verdicts.evaluate import Verdict

    n = check_realizations(conf.realizations)
    seed = _check_seed(conf.seed)
    method = SlopeMethod.from_user(getattr(settings, "method", settings))
    n_parcels = len(pr.class_name)
    if len(baseline) != n_parcels:
        raise InputDataError(
            f"confidence: the baseline table has {len(baseline)} rows for {n_parcels} parcels; "
            "pass the audit's per-parcel table in parcel order."
        )
    verdict = baseline["verdict"].to_numpy().astype(str)
    counted = (verdict != Verdict.NO_DATA) & (verdict != Verdict.NO_RULE)
    varies = counted & (plan.limit_index >= 0)  # slope-limited parcels: their figures change per realization

    rplan = _realization_plan(plan)
    gp, role = plan.geom_parcel, plan.geom_role
    keep = np.flatnonzero(varies[gp] & ((role == ROLE_PARCEL) | (role == ROLE_FORBIDDEN_PIECE)))
    geoms = np.asarray(geoms, dtype=object)
    ctx = _Context(dem.grid, method, rplan, conf.model, seed)

    over = np.zeros((n, n_parcels))
    conflict = np.zeros((n, n_parcels))
    slope_sum = np.zeros((n, n_parcels))
    covered = np.zeros(n_parcels)
    evaluated = np.zeros(n_parcels)
    windows = list(windows)
    if engine is None:
        engine = _default_engine(windows, n, workers)
    n_workers = engine.n_workers

    def merge(res: _TaskResult) -> None:
        p = res.parcels
        over[res.r0 : res.r1, p] += res.over_m2
        conflict[res.r0 : res.r1, p] += res.conflict_m2
        slope_sum[res.r0 : res.r1, p] += res.slope_sum
        if res.r0 == 0:
            covered[p] += res.covered_m2
            evaluated[p] += res.evaluated_m2

    # several realization chunks per window when there are fewer windows than workers
    parts = max(1, math.ceil(n_workers / max(len(windows), 1))) if n_workers > 1 else 1
    chunks = _chunks(n, parts)

    def items():
        import shapely

        if not len(keep):
            return
        tree = shapely.STRtree(geoms[keep])
        for wi, win in enumerate(windows):
            wd = _prepare_window(dem, tree, keep, geoms, wi, win, zones)
            if wd is None:
                if progress is not None:
                    progress.update(n)
                continue
            for r0, r1 in chunks:
                yield wd, r0, r1

    # results come back in submission order, so every realization adds its windows in window order
    # (deterministic sums whatever the engine); at most 2 x workers items are in flight (bounded memory)
    for (_, r0, r1), res in engine.map(_RealizationTask(ctx), items()):
        merge(res)
        if progress is not None:
            progress.update(r1 - r0)

    return _tables(
        rules, pr, baseline, counted, varies, n, seed, conf, method, over, conflict, slope_sum, covered, evaluated
    )


def _default_engine(windows, n: int, workers: int | None):
    """The engine of a stand-alone call without one: this process, or worker processes for big runs."""
    from landcheck.engine.backends import Engine
    from landcheck.engine.windows import default_workers

    if workers is None:  # automatic: processes only when the work outweighs starting them
        cells = sum(w.height * w.width for w in windows)
        workers = default_workers() if cells * n >= PROCESS_MIN_CELL_REALIZATIONS else 1
    workers = max(1, int(workers))
    return Engine.from_user("threads" if workers == 1 else "processes", workers)


def _pct(a: np.ndarray) -> np.ndarray:
    """Percentiles over realizations (axis 0) -> (len(PERCENTILES), ...)."""
    with np.errstate(invalid="ignore"):
        return np.percentile(a, PERCENTILES, axis=0)


def _tables(rules, pr, baseline, counted, varies, n, seed, conf, method, over, conflict, slope_sum, covered, evaluated):
    import pandas as pd

    from landcheck.verdicts.evaluate import is_breach  # the audit's verdict test, shared

    fixed = counted & ~varies
    base_cov = baseline["covered_m2"].to_numpy(float)
    base_cf = baseline["conflict_m2"].to_numpy(float)
    # parcels whose figures cannot change take the audit's values in every realization
    cov = np.where(varies, covered, base_cov)
    ev = np.where(varies, evaluated, baseline["evaluated_m2"].to_numpy(float))
    conflict = np.where(varies[None, :], conflict, base_cf[None, :])
    with np.errstate(invalid="ignore", divide="ignore"):
        over_share = np.where(
            varies[None, :], over / ev[None, :], baseline["over_limit_share"].to_numpy(float)[None, :]
        )
        conflict_share = np.where(cov[None, :] > 0, conflict / cov[None, :], np.nan)
        slope_mean = np.where(
            varies[None, :], slope_sum / ev[None, :], baseline["slope_mean_pct"].to_numpy(float)[None, :]
        )
    is_conflict = is_breach(conflict, cov[None, :], pr.tol_share[None, :], pr.min_breach_m2[None, :])
    p = np.where(counted, is_conflict.mean(axis=0), np.nan)
    se = np.where(counted, probability_standard_error(np.nan_to_num(p), n), np.nan)
    label = np.where(
        ~counted,
        ConfidenceLabel.NOT_EVALUATED,
        np.where(
            p >= ROBUST_CONFLICT_P,
            ConfidenceLabel.ROBUST_CONFLICT,
            np.where(p <= ROBUST_CLEAR_P, ConfidenceLabel.ROBUST_CLEAR, ConfidenceLabel.UNCERTAIN),
        ),
    )
    nan_rows = ~counted
    q_over, q_conf, q_slope = _pct(over_share), _pct(conflict_share), _pct(slope_mean)
    cols = {}
    if "parcel_id" in baseline.columns:
        cols["parcel_id"] = baseline["parcel_id"].to_numpy()
    cols["class_name"] = np.asarray(pr.class_name).astype(str)
    cols["verdict"] = baseline["verdict"].to_numpy().astype(str)
    cols["p_conflict"] = p
    cols["p_conflict_se"] = se
    for name, q in (("over_limit_share", q_over), ("conflict_share", q_conf), ("slope_mean_pct", q_slope)):
        for i, pc in enumerate(PERCENTILES):
            v = q[i].copy()
            v[nan_rows] = np.nan
            cols[f"{name}_p{pc:02d}"] = v
    cols["confidence"] = label
    parcels = pd.DataFrame(cols)

    # per class: share of the class's counted covered area in conflict, per realization
    rows = []
    names = [c.name for c in rules.classes] + ([NO_RULE] if (pr.class_name == NO_RULE).any() else [])
    for name in names:
        sel = pr.class_name == name
        cs = sel & counted
        cov_c = float(cov[cs].sum())
        with np.errstate(invalid="ignore", divide="ignore"):
            share_k = conflict[:, cs].sum(axis=1) / cov_c if cov_c > 0 else np.full(n, np.nan)
        q = _pct(share_k)
        row = {
            "class_name": name,
            "parcels": int(sel.sum()),
            "parcels_evaluated": int(cs.sum()),
            "slope_limited": bool((sel & varies).any()),
            "expected_conflicts": float(np.nansum(p[cs])) if cs.any() else 0.0,
        }
        for lab in ConfidenceLabel.ALL:
            row[f"n_{lab}"] = int((label[sel] == lab).sum())
        for i, pc in enumerate(PERCENTILES):
            row[f"conflict_share_p{pc:02d}"] = float(q[i])
        rows.append(row)
    classes = pd.DataFrame(rows)
    summary = {
        "method": "Monte Carlo DEM error realizations (Hunter & Goodchild 1997; Fisher 1998; docs/references.md)",
        "slope_method": method.value,
        **conf.describe(),
        "realizations": int(n),
        "seed": int(seed),
        "thresholds": {"robust_conflict_p_min": ROBUST_CONFLICT_P, "robust_clear_p_max": ROBUST_CLEAR_P},
        "percentiles": list(PERCENTILES),
        "label_counts": {lab: int((label == lab).sum()) for lab in ConfidenceLabel.ALL},
        "parcels_simulated": int(varies.sum()),
        "parcels_fixed": int(fixed.sum()),
        "held_fixed": "hazard zones (including those derived from the DEM) and classes without a slope limit",
        "classes": classes.to_dict(orient="records"),
    }
    return parcels, classes, summary
