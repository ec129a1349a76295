"""Tests for landcheck.terrain.dem_error: DEM error fields for Monte Carlo slope confidence.

Monte Carlo tolerances: every statistical check uses a fixed seed, so the test
is deterministic; each tolerance is stated beside the check as a multiple of
the Monte Carlo standard error (SE) of the statistic, so a correct generator
passes for any seed and a wrong scale, correlation or kernel fails.
"""

from __future__ import annotations

import math
import pickle

import numpy as np
import pytest
from affine import Affine

from landcheck.errors import RuleFileError
from landcheck.geo.grid import GridSpec, Window, grow_window, iter_windows
from landcheck.terrain.dem_error import (
    MAX_REALIZATIONS,
    MIN_REALIZATIONS,
    NOISE_BLOCK_CELLS,
    ErrorModel,
    check_realizations,
    error_field,
    error_field_with_halo,
    probability_standard_error,
)
from landcheck.terrain.slope import _horn_pq, _zt_pq, slope_gradient

# Horn (1981) east-derivative weights on the 3x3 window z1..z9 (docs/references.md §1), times 8 h
HORN_P_WEIGHTS = np.array([[-1.0, 0.0, 1.0], [-2.0, 0.0, 2.0], [-1.0, 0.0, 1.0]])


def _pq(elev, h, formula):
    """p, q of every interior cell of a haloed window, through the project's own formula function."""
    e = elev
    hh = np.full((e.shape[0] - 2, 1), h)
    return formula(
        e[:-2, :-2], e[:-2, 1:-1], e[:-2, 2:], e[1:-1, :-2], e[1:-1, 2:], e[2:, :-2], e[2:, 1:-1], e[2:, 2:], hh, hh
    )


def _horn_var_p(sigma, h, corr_length):
    """var(p) = w^T C w for Horn's weights w and the Gaussian covariance C (docs/references.md §3, derived).

    Written here from the definition rho(d) = exp(-(d/L)^2), independently of the module under test.
    """
    w = (HORN_P_WEIGHTS / (8.0 * h)).ravel()
    rr, cc = np.meshgrid(np.arange(3), np.arange(3), indexing="ij")
    pts = np.column_stack([rr.ravel(), cc.ravel()]) * h
    d2 = ((pts[:, None, :] - pts[None, :, :]) ** 2).sum(axis=2)
    rho = (d2 == 0).astype(float) if corr_length == 0 else np.exp(-d2 / corr_length**2)
    return sigma**2 * float(w @ rho @ w)


def _corr(a, b):
    a = a - a.mean()
    b = b - b.mean()
    return float((a * b).sum() / math.sqrt((a * a).sum() * (b * b).sum()))


# --------------------------------------------------------------------------- flat DEM, independent error


def test_flat_dem_independent_error_gives_published_false_gradient():
    sigma, h, n = 2.0, 10.0, 400
    model = ErrorModel(rmse_m=sigma, corr_length_m=None, cell_size_m=h)
    e = error_field_with_halo(model, Window(0, 0, n, n), 1, n, n, seed=20240601, realization=0)
    elev = 12.5 + e  # flat DEM at 12.5 m plus the error
    p, q = _pq(elev, h, _horn_pq)
    g = slope_gradient(elev, np.full(n, h), np.full(n, h), "horn", backend="numpy")
    # Source: docs/references.md §3 [D]: Horn std(p) h / sigma = sqrt(3)/4 = 0.43301 for iid noise.
    # 160 000 cells; SE of the sample std is ~0.3 % (p is correlated with its neighbours); tolerance 2 % (~6 SE).
    assert np.std(p) * h / sigma == pytest.approx(math.sqrt(3.0) / 4.0, rel=0.02)
    assert np.std(q) * h / sigma == pytest.approx(math.sqrt(3.0) / 4.0, rel=0.02)
    # Source: docs/references.md §3 [D]: mean gradient = std(p) sqrt(pi/2) = 0.5427 sigma / h (Rayleigh); tol 2 %.
    assert float(np.mean(g)) * h / sigma == pytest.approx(0.5427, rel=0.02)
    # Source: docs/references.md §3 [D]: Zevenbergen-Thorne std(p) h / sigma = 1/sqrt(2) = 0.70711; tol 2 %.
    p_zt, _ = _pq(elev, h, _zt_pq)
    assert np.std(p_zt) * h / sigma == pytest.approx(1.0 / math.sqrt(2.0), rel=0.02)


# --------------------------------------------------------------------------- marginal std and correlation


def test_field_std_and_correlation_match_the_stated_gaussian_model():
    sigma, h, length, n = 3.0, 10.0, 40.0, 500
    model = ErrorModel(rmse_m=sigma, corr_length_m=length, cell_size_m=h)
    fields = [error_field(model, Window(0, 0, n, n), n, n, seed=7, realization=k) for k in range(4)]
    # Source: the model's definition, marginal std = RMSE (docs/references.md §11 step 1).
    # 10^6 cells, ~25 cells per independent sample at L = 4 cells: SE of the std ~0.4 %; tolerance 2 %.
    pooled = np.concatenate([f.ravel() for f in fields])
    assert float(np.std(pooled)) == pytest.approx(sigma, rel=0.02)

    # Source: the stated definition rho(d) = exp(-(d/L)^2), so rho(L) = 1/e (Gaussian covariance,
    # docs/references.md §11 step 1).  SE of each estimated correlation ~0.008; absolute tolerance 0.03.
    def lag_corr(dr, dc):
        return float(np.mean([_corr(f[: n - dr, : n - dc], f[dr:, dc:]) for f in fields]))

    assert lag_corr(0, 4) == pytest.approx(math.exp(-1.0), abs=0.03)  # east-west, d = L = 40 m
    assert lag_corr(4, 0) == pytest.approx(math.exp(-1.0), abs=0.03)  # north-south, d = L
    assert lag_corr(3, 4) == pytest.approx(math.exp(-((50.0 / length) ** 2)), abs=0.03)  # diagonal 50 m: isotropy
    assert lag_corr(0, 2) == pytest.approx(math.exp(-0.25), abs=0.03)  # d = L/2
    assert lag_corr(0, 8) == pytest.approx(math.exp(-4.0), abs=0.03)  # d = 2L


def test_rectangular_cells_keep_the_correlation_length_in_metres():
    # Geographic grids have unequal cell sides (docs/references.md §4); the length is in metres on both axes.
    sigma, hx, hy, length, n = 1.0, 7.0, 10.0, 40.0, 500
    model = ErrorModel(rmse_m=sigma, corr_length_m=length, cell_size_m=hx, cell_size_y_m=hy)
    f = error_field(model, Window(0, 0, n, n), n, n, seed=3, realization=1)
    # Source: rho(d) = exp(-(d/L)^2) at d = 6 * 7 m = 42 m east-west and 4 * 10 m = 40 m north-south; tol 0.04 (~4 SE).
    assert _corr(f[:, :-6], f[:, 6:]) == pytest.approx(math.exp(-((42.0 / length) ** 2)), abs=0.04)
    assert _corr(f[:-4, :], f[4:, :]) == pytest.approx(math.exp(-1.0), abs=0.04)
    assert float(np.std(f)) == pytest.approx(sigma, rel=0.03)


def test_independent_errors_are_uncorrelated_between_neighbours():
    n = 400
    model = ErrorModel(rmse_m=1.0, corr_length_m=0, cell_size_m=30.0)
    f = error_field(model, Window(0, 0, n, n), n, n, seed=5, realization=0)
    # Source: independence means zero correlation; SE of a sample correlation is 1/sqrt(n) = 0.0025 (common practice).
    assert abs(_corr(f[:, :-1], f[:, 1:])) < 4.0 / n
    assert abs(_corr(f[:-1, :], f[1:, :])) < 4.0 / n


def test_lattice_correlation_is_within_stated_accuracy_of_the_definition():
    # Source: the definition rho(d) = exp(-(d/L)^2); the module promises 1e-3 at every integer lag.
    for cells in (1.0, 1.3, 2.0, 3.7, 8.0):
        model = ErrorModel(rmse_m=1.0, corr_length_m=cells * 10.0, cell_size_m=10.0)
        for lag in range(0, 3 * int(math.ceil(cells)) + 1):
            want = math.exp(-((lag / cells) ** 2))
            assert model.lattice_correlation(0, lag) == pytest.approx(want, abs=1e-3)
            assert model.lattice_correlation(lag, 1) == pytest.approx(want * math.exp(-1.0 / cells**2), abs=1e-3)


# --------------------------------------------------------------------------- correlation length and false slope


def test_false_gradient_shrinks_as_the_correlation_length_grows():
    sigma, h, n = 1.0, 10.0, 400
    means, zt_stds = [], []
    for length in (0.0, 20.0, 40.0, 80.0):
        model = ErrorModel(rmse_m=sigma, corr_length_m=length, cell_size_m=h)
        p_all, g_all, pzt_all = [], [], []
        for k in range(3):
            elev = error_field_with_halo(model, Window(0, 0, n, n), 1, n, n, seed=99, realization=k)
            p_all.append(_pq(elev, h, _horn_pq)[0])
            pzt_all.append(_pq(elev, h, _zt_pq)[0])
            g_all.append(slope_gradient(elev, np.full(n, h), np.full(n, h), backend="numpy"))
        var_horn = _horn_var_p(sigma, h, length)
        rho_2h = 0.0 if length == 0 else math.exp(-((2.0 * h / length) ** 2))
        # Source: docs/references.md §3 [D]: for Horn var(p) = w^T C w; tolerance 5 % (SE of the std <= 1 % at L = 8 cells).
        assert float(np.std(np.concatenate(p_all))) == pytest.approx(math.sqrt(var_horn), rel=0.05)
        # Source: docs/references.md §3 [D]: for ZT var(p) = 2 sigma^2 [1 - rho(2h)] / (4 h^2); tolerance 5 %.
        want_zt = math.sqrt(2.0 * sigma**2 * (1.0 - rho_2h) / (4.0 * h**2))
        zt_std = float(np.std(np.concatenate(pzt_all)))
        assert zt_std == pytest.approx(want_zt, rel=0.05)
        # Source: docs/references.md §3 [D]: p, q independent with equal variance, so mean |grad| = std(p) sqrt(pi/2).
        mean_g = float(np.mean(np.concatenate(g_all)))
        assert mean_g == pytest.approx(math.sqrt(var_horn) * math.sqrt(math.pi / 2.0), rel=0.05)
        means.append(mean_g)
        zt_stds.append(zt_std)
    # Source: docs/references.md §11 "As the correlation range grows, slope error shrinks toward 0".  For Horn this
    # holds beyond about 2 cells; at L = 2 cells w^T C w (docs/references.md §3) is *above* the independent case,
    # because Horn's 1-2-1 smoothing across the derivative no longer averages the error away.
    assert means[1] > 1.1 * means[0]
    assert all(a > 1.3 * b for a, b in zip(means[1:], means[2:]))
    assert all(a > 1.1 * b for a, b in zip(zt_stds, zt_stds[1:]))


# --------------------------------------------------------------------------- tiling, reproducibility


@pytest.mark.parametrize("length", [0.0, 30.0])
def test_windowed_equals_whole_raster_bit_for_bit_on_tiles_that_do_not_divide_it(length):
    # Source: invariant, tiled == untiled for 7x5 tiles on a 23x31 grid (common practice).
    height, width = 23, 31
    model = ErrorModel(rmse_m=2.5, corr_length_m=length, cell_size_m=10.0)
    whole = error_field(model, Window(0, 0, height, width), height, width, seed=42, realization=3)
    whole_h = error_field_with_halo(model, Window(0, 0, height, width), 1, height, width, seed=42, realization=3)
    assert np.array_equal(whole_h[1:-1, 1:-1], whole)
    for win in iter_windows(height, width, 7, 5):
        part = error_field(model, win, height, width, seed=42, realization=3)
        assert np.array_equal(part, whole[win.rows, win.cols])
        haloed = error_field_with_halo(model, win, 1, height, width, seed=42, realization=3)
        assert haloed.shape == (win.height + 2, win.width + 2)
        # the haloed field lines up with grow_window's clipped read window plus its padding
        inner, ((top, bottom), (left, right)) = grow_window(win, 1, height, width)
        core = haloed[top : haloed.shape[0] - bottom, left : haloed.shape[1] - right]
        assert np.array_equal(core, whole[inner.rows, inner.cols])
        # cells outside the raster equal the whole raster's own halo there
        assert np.array_equal(
            haloed, whole_h[win.row_off : win.row_off + win.height + 2, win.col_off : win.col_off + win.width + 2]
        )
        assert not np.isnan(haloed).any()


def test_windowed_equals_whole_raster_across_noise_block_boundaries():
    # Source: same invariant (common practice), with windows that straddle the fixed noise blocks.
    height, width = 300, 280
    model = ErrorModel(rmse_m=1.0, corr_length_m=50.0, cell_size_m=9.0, cell_size_y_m=10.0)
    whole = error_field(model, Window(0, 0, height, width), height, width, seed=2, realization=17)
    windows = list(iter_windows(height, width, 97, 61))
    b = NOISE_BLOCK_CELLS
    straddle = [
        w
        for w in windows
        if w.row_off // b != (w.row_off + w.height - 1) // b and w.col_off // b != (w.col_off + w.width - 1) // b
    ]
    assert straddle, "test set-up: some windows must cross a block corner"
    for win in windows:
        assert np.array_equal(error_field(model, win, height, width, seed=2, realization=17), whole[win.rows, win.cols])
    # a window sitting exactly on a block corner, grown by a halo of 3
    win = Window(b - 5, b - 5, 10, 10)
    haloed = error_field_with_halo(model, win, 3, height, width, seed=2, realization=17)
    assert np.array_equal(haloed, whole[b - 8 : b + 8, b - 8 : b + 8])


def test_noise_blocks_are_mutually_independent_including_outside_the_raster():
    # The 3 x 3 blocks around the raster's first block (negative indices included) must not repeat each other.
    # Source: independent noise has zero correlation; SE of a correlation over 128^2 cells is 1/128 (common practice).
    b = NOISE_BLOCK_CELLS
    model = ErrorModel(rmse_m=1.0, corr_length_m=None, cell_size_m=10.0)
    f = error_field_with_halo(model, Window(0, 0, b, b), b, 2 * b, 2 * b, seed=31, realization=2)
    blocks = [f[i * b : (i + 1) * b, j * b : (j + 1) * b] for i in range(3) for j in range(3)]
    for i in range(len(blocks)):
        for j in range(i + 1, len(blocks)):
            assert abs(_corr(blocks[i], blocks[j])) < 5.0 / b


def test_same_seed_same_field_and_other_seed_or_realization_differs():
    n = 60
    model = ErrorModel(rmse_m=1.0, corr_length_m=20.0, cell_size_m=10.0)
    win = Window(0, 0, n, n)
    a = error_field(model, win, n, n, seed=123, realization=5)
    assert np.array_equal(a, error_field(model, win, n, n, seed=123, realization=5))
    # a model rebuilt from the same numbers, or shipped to a worker by pickle, gives the same field
    again = ErrorModel(rmse_m=1.0, corr_length_m=20.0, cell_size_m=10.0)
    assert np.array_equal(a, error_field(again, win, n, n, seed=123, realization=5))
    shipped = pickle.loads(pickle.dumps(model))
    assert np.array_equal(a, error_field(shipped, win, n, n, seed=123, realization=5))
    # Source: independent realizations are uncorrelated; SE of a sample correlation ~ sqrt(k/n) with k ~ 6 cells
    # per independent sample at L = 2 cells: ~0.04; bound 0.2 (common practice).
    for other in (
        error_field(model, win, n, n, seed=123, realization=6),
        error_field(model, win, n, n, seed=124, realization=5),
    ):
        assert not np.array_equal(a, other)
        assert abs(_corr(a, other)) < 0.2


@pytest.mark.parametrize("length", [0.0, 20.0])
def test_mean_over_realizations_tends_to_zero_like_one_over_sqrt_n(length):
    sigma, n_real, size = 1.5, 300, 16
    model = ErrorModel(rmse_m=sigma, corr_length_m=length, cell_size_m=10.0)
    stack = np.stack(
        [error_field(model, Window(0, 0, size, size), size, size, seed=8, realization=k) for k in range(n_real)]
    )
    cell_mean = stack.mean(axis=0)
    # Source: the mean of N independent draws has std sigma / sqrt(N) (common practice).  RMS over 256 cells:
    # SE ~4.4 % of it for independent cells, more when cells are correlated; tolerance 25 %.
    assert float(np.sqrt(np.mean(cell_mean**2))) == pytest.approx(sigma / math.sqrt(n_real), rel=0.25)
    # every single realization still has the full spread
    assert float(np.std(stack)) == pytest.approx(sigma, rel=0.05)


# --------------------------------------------------------------------------- geographic grid helper


def test_for_grid_takes_ellipsoidal_cell_sizes_of_the_centre_row():
    # 1 arc-second grid whose centre row is at 45 N.
    # Source: docs/references.md §13 [C]: a 1" cell at 45 deg is 21.902 m (E-W) x 30.870 m (N-S).
    d = 1.0 / 3600.0
    height = 201
    grid = GridSpec(
        transform=Affine(d, 0.0, 120.0, 0.0, -d, 45.0 + (height / 2.0) * d),
        crs_wkt="EPSG:4326",
        width=300,
        height=height,
        geographic=True,
    )
    model = ErrorModel.for_grid(4.0, 300.0, grid)
    assert model.cell_size_m == pytest.approx(21.902, abs=2e-3)
    assert model.cell_size_y_m == pytest.approx(30.870, abs=2e-3)
    assert model.kernel_sigma_cells == pytest.approx((300.0 / (2 * 30.870), 300.0 / (2 * 21.902)), rel=1e-3)


# --------------------------------------------------------------------------- validation


@pytest.mark.parametrize("rmse", [0.0, -1.0, float("nan"), float("inf"), "5 m", True])
def test_bad_rmse_is_refused(rmse):
    with pytest.raises(RuleFileError, match="rmse_m"):
        ErrorModel(rmse_m=rmse, corr_length_m=None, cell_size_m=10.0)


@pytest.mark.parametrize("length", [5.0, 9.99, -20.0, float("nan")])
def test_correlation_length_shorter_than_a_cell_or_invalid_is_refused(length):
    with pytest.raises(RuleFileError, match="corr_length_m") as info:
        ErrorModel(rmse_m=1.0, corr_length_m=length, cell_size_m=10.0)
    assert isinstance(info.value, ValueError)
    if 0 < length < 10:
        assert "shorter than one cell" in str(info.value)


def test_correlation_length_limits_use_the_larger_cell_side_and_a_kernel_cap():
    with pytest.raises(RuleFileError, match="shorter than one cell"):
        ErrorModel(rmse_m=1.0, corr_length_m=8.0, cell_size_m=7.0, cell_size_y_m=10.0)
    with pytest.raises(RuleFileError, match="too long"):
        ErrorModel(rmse_m=1.0, corr_length_m=1.0e6, cell_size_m=1.0)
    with pytest.raises(RuleFileError, match="cell_size_m"):
        ErrorModel(rmse_m=1.0, corr_length_m=0, cell_size_m=0.0)
    # exactly one cell, zero and None are accepted
    assert ErrorModel(rmse_m=1.0, corr_length_m=10.0, cell_size_m=10.0).halo_cells == 4  # ceil(4 * 0.5) + 2
    assert ErrorModel(rmse_m=1.0, corr_length_m=0, cell_size_m=10.0).halo_cells == 0
    assert ErrorModel(rmse_m=1.0, corr_length_m=None, cell_size_m=10.0).independent


def test_realization_count_limits():
    assert check_realizations(MIN_REALIZATIONS) == 10
    assert check_realizations(MAX_REALIZATIONS) == 10_000
    assert check_realizations(np.int64(250)) == 250
    for bad, words in [
        (9, "at least 10"),
        (0, "at least 10"),
        (10_001, "at most 10000"),
        (2.5, "whole number"),
        ("100", "whole number"),
        (True, "whole number"),
    ]:
        with pytest.raises(RuleFileError, match=words):
            check_realizations(bad)


def test_bad_seed_realization_window_and_halo_are_refused():
    model = ErrorModel(rmse_m=1.0, corr_length_m=None, cell_size_m=10.0)
    with pytest.raises(RuleFileError, match="seed"):
        error_field(model, Window(0, 0, 4, 4), 10, 10, seed=-1, realization=0)
    with pytest.raises(RuleFileError, match="realization"):
        error_field(model, Window(0, 0, 4, 4), 10, 10, seed=1, realization=-3)
    with pytest.raises(ValueError, match="not inside"):
        error_field(model, Window(8, 0, 4, 4), 10, 10, seed=1, realization=0)
    with pytest.raises(ValueError, match="halo"):
        error_field_with_halo(model, Window(0, 0, 4, 4), -1, 10, 10, seed=1, realization=0)


def test_probability_standard_error():
    # Source: binomial standard error sqrt(P (1 - P) / N) (docs/references.md §11 step 2).
    assert float(probability_standard_error(0.5, 100)) == pytest.approx(0.05, rel=1e-12)
    assert float(probability_standard_error(0.1, 400)) == pytest.approx(0.015, rel=1e-12)
