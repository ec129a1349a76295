"""Tests for landcheck.verdicts.confidence: Monte Carlo verdict confidence under DEM error.

Every statistical check uses a fixed seed (deterministic) and states its tolerance as a multiple of the
Monte Carlo standard error (SE) of the statistic, so a correct driver passes for any seed while a wrong
error scale, slope kernel, coverage or verdict rule fails.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_raster
from rasterio.transform import from_origin
from scipy import stats

from landcheck.core.window_pass import WindowJob as _WindowJob
from landcheck.core.window_pass import build_plan as _build_plan
from landcheck.errors import RuleFileError
from landcheck.geo.grid import iter_windows
from landcheck.geo.ground_area import ground_areas
from landcheck.inputs.dem import open_dem
from landcheck.inputs.layers import read_parcels
from landcheck.inputs.rulebook import load_rules
from landcheck.overlay.sums import Totals
from landcheck.terrain.dem_error import ErrorModel
from landcheck.terrain.slope import SlopeMethod
from landcheck.verdicts.confidence import (
    ROBUST_CLEAR_P,
    ROBUST_CONFLICT_P,
    ConfidenceLabel,
    ConfidenceSettings,
    confidence_settings,
    run_confidence,
)
from landcheck.verdicts.evaluate import evaluate_parcels, parcel_rules

X0, Y0 = 400000.0, 1600000.0
H = 10.0
#: Horn's false-gradient component std for iid error, times h / sigma: sqrt(3)/4 (docs/references.md §3)
HORN_STD_FACTOR = math.sqrt(3.0) / 4.0


def _prepare(tmp_path, dem_path, geoms, zoning, rules_text, *, tile=1024):
    """The audit's own preparation steps (no zones) and its baseline verdicts."""
    parcels_path = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, len(geoms) + 1), zoning=zoning)
    rules_path = tmp_path / "rules.toml"
    rules_path.write_text(rules_text)
    dem = open_dem(dem_path)
    g = dem.grid
    rules = load_rules(rules_path)
    frame = read_parcels(
        parcels_path, class_field=rules.class_field, id_field=rules.id_field, target_crs_wkt=g.crs_wkt
    ).frame
    geo = np.asarray(frame.geometry.values)
    area_m2, factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    plan = _build_plan(rules, pr.class_name, factor, 1.0)
    windows = list(iter_windows(g.height, g.width, tile))
    job = _WindowJob(dem, SlopeMethod.HORN, geo, plan)
    totals = Totals(len(frame), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    for win in windows:
        totals.add(job(win)[0])
    base = evaluate_parcels(totals, plan, rules, pr, area_m2, shapely.is_empty(geo), frame["class_value"].to_numpy())
    base.insert(0, "parcel_id", frame["parcel_id"].to_numpy())
    return {"dem": dem, "geoms": geo, "plan": plan, "rules": rules, "pr": pr, "baseline": base}


def _run(s, model, n, seed, windows=None, workers=1):
    g = s["dem"].grid
    wins = windows if windows is not None else list(iter_windows(g.height, g.width, 1024))
    return run_confidence(
        s["dem"],
        wins,
        s["geoms"],
        s["plan"],
        s["rules"],
        s["pr"],
        SlopeMethod.HORN,
        s["baseline"],
        ConfidenceSettings(model, n, seed),
        workers=workers,
    )


def _rules(classes: str) -> str:
    return '[rulebook]\nclass_field = "zoning"\nid_field = "pid"\nmin_evaluated_share = 0.5\n' + classes


# --------------------------------------------------------------------------- flat DEM: published false gradient


def test_flat_dem_realizations_reproduce_horn_false_gradient(tmp_path):
    n_cells, sigma = 122, 1.0
    dem = write_raster(tmp_path / "flat.tif", np.full((n_cells, n_cells), 12.5), transform=from_origin(X0, Y0, H, H))
    # the parcel covers every cell with a slope (the outer ring has none: strict-window policy)
    inner = shapely.box(X0 + H, Y0 - (n_cells - 1) * H, X0 + (n_cells - 1) * H, Y0 - H)
    limits = (5.0, 8.0)
    text = _rules(
        "".join(f'[classes.c{i}]\nvalues = ["C{i}"]\nmax_slope_pct = {lim}\n' for i, lim in enumerate(limits))
    )
    s = _prepare(tmp_path, dem, [inner, inner], ["C0", "C1"], text)
    model = ErrorModel(rmse_m=sigma, corr_length_m=0, cell_size_m=H)
    parcels, _, _ = _run(s, model, 10, seed=20240601)

    sigma_p_pct = 100.0 * HORN_STD_FACTOR * sigma / H
    # Source: docs/references.md §3 [D]: mean false gradient (Rayleigh) = 0.5427 sigma / h for Horn, iid noise.
    # 14 400 cells x 10 realizations; SE of the mean slope ~0.3 % (neighbouring cells share noise); tol 2 %.
    assert parcels["slope_mean_pct_p50"].iloc[0] == pytest.approx(100.0 * 0.5427 * sigma / H, rel=0.02)
    # Source: docs/references.md §3 [D]: per-component std = sqrt(3)/4 sigma / h = 0.4330 sigma / h; the gradient
    # is Rayleigh, so the share of cells at or over t is exp(-t^2 / (2 std^2)) and std = t / sqrt(-2 ln share).
    # SE of the inferred std ~0.5 %; tol 2 %.
    for i, lim in enumerate(limits):
        share = parcels["over_limit_share_p50"].iloc[i]
        assert share == pytest.approx(math.exp(-(lim**2) / (2 * sigma_p_pct**2)), abs=0.02)
        assert lim / math.sqrt(-2.0 * math.log(share)) == pytest.approx(sigma_p_pct, rel=0.02)


# --------------------------------------------------------------------------- robust vs. threshold parcels


def _ramp_expected_share(x_centres_m, limit_pct, sigma_p_pct):
    """Expected share of cells read at or over the limit on the ramp (slope 0.04 x %, no north component).

    With iid error, Horn's (p, q) errors are independent normals of equal std (weights orthogonal), so
    |grad|^2 / std^2 is noncentral chi-square with 2 degrees of freedom and noncentrality (p0 / std)^2.
    """
    p0 = 0.04 * np.asarray(x_centres_m)
    return float(np.mean(stats.ncx2.sf((limit_pct / sigma_p_pct) ** 2, 2, (p0 / sigma_p_pct) ** 2)))


def test_robust_and_threshold_parcels(tmp_path):
    sigma, n = 0.5, 100
    dem = ramp_dem(tmp_path / "ramp.tif", n=120)
    y_top, y_bot = Y0 - 200.0, Y0 - 400.0
    far_above = shapely.box(X0 + 700, y_bot, X0 + 900, y_top)  # slopes 28-36 %, all over 18 %
    far_below = shapely.box(X0 + 100, y_bot, X0 + 300, y_top)  # slopes 4-12 %
    # symmetric about the 18 % line (x = 450 m): cell centres 355 .. 545 m, half of it over the limit
    on_line = shapely.box(X0 + 350, y_bot, X0 + 550, y_top)
    sigma_p_pct = 100.0 * HORN_STD_FACTOR * sigma / H
    expected = _ramp_expected_share(np.arange(355.0, 550.0, 10.0), 18.0, sigma_p_pct)
    # tolerance = the expected share over the limit, so the parcel sits exactly on the verdict threshold
    text = _rules(
        '[classes.r]\nvalues = ["R"]\nmax_slope_pct = 18\ntolerance_pct = 5\n'
        f'[classes.t]\nvalues = ["T"]\nmax_slope_pct = 18\ntolerance_pct = {100.0 * expected!r}\n'
    )
    s = _prepare(tmp_path, dem, [far_above, far_below, on_line], ["R", "R", "T"], text)
    model = ErrorModel(rmse_m=sigma, corr_length_m=0, cell_size_m=H)
    parcels, classes, summary = _run(s, model, n, seed=11)

    # Source: closed form on the ramp: every cell of the far parcels is >= 4.6 error std from 18 %,
    # so no realization moves the verdict (P = 1 and 0 exactly).
    assert parcels["p_conflict"].tolist()[:2] == [1.0, 0.0]
    assert parcels["confidence"].tolist()[:2] == [ConfidenceLabel.ROBUST_CONFLICT, ConfidenceLabel.ROBUST_CLEAR]
    assert parcels["over_limit_share_p05"].iloc[0] == pytest.approx(1.0)
    # Source: noncentral chi-square (Rice) law of |grad| (scipy.stats.ncx2) with Horn's std from
    # docs/references.md §3: expected share over 18 % = `expected` (0.5 plus the upward bias of |grad|).
    # SE of the median share over 100 realizations ~0.003; tol 0.012 (~4 SE).
    assert expected > 0.5
    assert parcels["over_limit_share_p50"].iloc[2] == pytest.approx(expected, abs=0.012)
    # Source: the share is a sum of many cell indicators (near normal, median ~ mean), so with the tolerance at
    # its expectation P(conflict) ~ 0.5; binomial SE sqrt(0.25 / 100) = 0.05; tol 0.15 (3 SE).
    p = parcels["p_conflict"].iloc[2]
    assert p == pytest.approx(0.5, abs=0.15)
    assert ROBUST_CLEAR_P < p < ROBUST_CONFLICT_P and parcels["confidence"].iloc[2] == ConfidenceLabel.UNCERTAIN
    # Source: binomial standard error sqrt(P (1 - P) / N) (docs/references.md §11 step 2).
    assert parcels["p_conflict_se"].iloc[2] == pytest.approx(math.sqrt(p * (1 - p) / n))
    assert parcels["p_conflict_se"].iloc[0] == 0.0
    # a class holding one parcel has that parcel's conflict-share percentiles (invariant)
    t = classes.set_index("class_name").loc["t"]
    for pc in ("p05", "p50", "p95"):
        assert t[f"conflict_share_{pc}"] == pytest.approx(parcels[f"conflict_share_{pc}"].iloc[2], rel=1e-12)
    r = classes.set_index("class_name").loc["r"]
    assert r["expected_conflicts"] == pytest.approx(1.0) and r["n_robust_conflict"] == 1 and r["n_robust_clear"] == 1
    assert summary["label_counts"][ConfidenceLabel.UNCERTAIN] == 1


# --------------------------------------------------------------------------- invariants


def _ramp_case(tmp_path):
    dem = ramp_dem(tmp_path / "ramp.tif", n=40)
    geoms = [
        shapely.Polygon([(X0 + 95, Y0 - 40), (X0 + 330, Y0 - 70), (X0 + 250, Y0 - 310), (X0 + 120, Y0 - 220)]),
        shapely.box(X0 + 20, Y0 - 380, X0 + 170, Y0 - 250),
        shapely.box(X0 + 210, Y0 - 390, X0 + 385, Y0 - 320),  # partly on the NaN ring
        shapely.box(X0 + 50, Y0 - 100, X0 + 90, Y0 - 60),  # no slope limit (forest)
    ]
    text = _rules(
        '[classes.r]\nvalues = ["R"]\nmax_slope_pct = 8\ntolerance_pct = 30\n'
        '[classes.f]\nvalues = ["F"]\ndevelopment = false\n'
    )
    return _prepare(tmp_path, dem, geoms, ["R", "R", "R", "F"], text)


def test_windowed_equals_whole_and_seed_reproducible(tmp_path):
    s = _ramp_case(tmp_path)
    g = s["dem"].grid
    model = ErrorModel(rmse_m=2.0, corr_length_m=30.0, cell_size_m=H)
    whole, wc, _ = _run(s, model, 12, seed=5)
    tiled, tc, _ = _run(s, model, 12, seed=5, windows=list(iter_windows(g.height, g.width, 7, 5)))
    again, _, _ = _run(s, model, 12, seed=5)
    auto, _, _ = _run(s, model, 12, seed=5, workers=None)  # small run: stays in this process
    other, _, _ = _run(s, model, 12, seed=6)
    num = [c for c in whole.columns if c.startswith(("p_", "over_", "conflict_", "slope_"))]
    # Source: invariant (docs/design.md "tiled == untiled"): the realizations are window-consistent, so only
    # the summation order of per-window sums differs (relative 1e-12 at most).
    np.testing.assert_allclose(tiled[num].to_numpy(float), whole[num].to_numpy(float), rtol=1e-12, equal_nan=True)
    assert tiled["confidence"].tolist() == whole["confidence"].tolist()
    np.testing.assert_allclose(
        tc.filter(like="share").to_numpy(float), wc.filter(like="share").to_numpy(float), rtol=1e-12, equal_nan=True
    )
    # Source: reproducibility contract of landcheck.terrain.dem_error: same seed, same numbers bit for bit.
    assert again[num].equals(whole[num]) and auto.equals(whole)
    assert not np.allclose(other["over_limit_share_p50"].iloc[:3], whole["over_limit_share_p50"].iloc[:3])
    # the forest parcel has no slope limit: fixed figures, the audit's verdict with P 0
    assert whole["p_conflict"].iloc[3] == 0.0 and np.isnan(whole["over_limit_share_p50"].iloc[3])


def test_worker_processes_give_identical_results(tmp_path):
    s = _ramp_case(tmp_path)
    model = ErrorModel(rmse_m=2.0, corr_length_m=20.0, cell_size_m=H)
    one, c1, _ = _run(s, model, 10, seed=3, workers=1)
    two, c2, _ = _run(s, model, 10, seed=3, workers=2)
    # Source: invariant: realizations are split over processes, merged in window order -> bit-identical.
    assert one.equals(two) and c1.equals(c2)


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    "kw, pattern",
    [
        ({"rmse_m": 0.0}, r"rmse_m = 0.0; expected a finite number greater than 0"),
        ({"rmse_m": -1.0}, r"greater than 0"),
        ({"rmse_m": 2.0, "corr_length_m": 4.0}, r"corr_length_m = 4 m is shorter than one cell \(10 m\)"),
        ({"rmse_m": 2.0, "realizations": 9}, r"realizations = 9 is too few.*at least 10"),
        ({"rmse_m": 2.0, "realizations": 10_001}, r"more than the limit of 10000"),
        ({"rmse_m": 2.0, "seed": -3}, r"seed = -3; expected a whole number >= 0"),
        ({"corr_length_m": 30.0}, r"needs the DEM's vertical RMSE; give --dem-rmse"),
    ],
)
def test_bad_settings_raise_clear_errors(tmp_path, kw, pattern):
    dem = open_dem(ramp_dem(tmp_path / "ramp.tif", n=20))
    with pytest.raises(RuleFileError, match=pattern):
        confidence_settings(None, dem.grid, **kw)


def test_settings_merge_rulebook_and_overrides(tmp_path):
    dem = open_dem(ramp_dem(tmp_path / "ramp.tif", n=20))
    p = tmp_path / "r.toml"
    p.write_text(
        _rules(
            '[classes.r]\nvalues = ["R"]\nmax_slope_pct = 18\n'
            "[uncertainty]\nrmse_m = 3.0\ncorr_length_m = 40.0\nrealizations = 50\nseed = 9\n"
        )
    )
    rules = load_rules(p)
    c = confidence_settings(rules, dem.grid)
    assert (c.model.rmse_m, c.model.corr_length_m, c.realizations, c.seed) == (3.0, 40.0, 50, 9)
    c = confidence_settings(rules, dem.grid, rmse_m=1.5, realizations=20)
    assert (c.model.rmse_m, c.model.corr_length_m, c.realizations, c.seed) == (1.5, 40.0, 20, 9)
    assert confidence_settings(None, dem.grid) is None
    with pytest.raises(RuleFileError, match=r"r.toml, \[uncertainty\]: .*shorter than one cell"):
        confidence_settings(rules, dem.grid, corr_length_m=3.0)
