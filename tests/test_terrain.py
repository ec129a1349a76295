"""Slope kernels against analytic surfaces (docs/references.md §1)."""

from __future__ import annotations

import numpy as np
import pytest

from landcheck.terrain.slope import SlopeMethod, _horn_pq, _zt_pq, gradient_to_unit, slope_gradient

H = 10.0


def _grid(n, h=H):
    x = np.arange(n) * h
    # row 0 is north: y decreases with the row index
    y = (n - 1 - np.arange(n)) * h
    return np.meshgrid(x, y)


def _sizes(n, h=H):
    return np.full(n - 2, h), np.full(n - 2, h)


@pytest.mark.parametrize("method", list(SlopeMethod))
def test_tilted_plane_is_exact(method):
    # Source: docs/references.md §2 [D, verified C]: every kernel returns a plane's gradient exactly;
    # z = 0.12x + 0.09y has G = 0.15 (15 %).
    X, Y = _grid(40)
    z = 0.12 * X + 0.09 * Y
    hx, hy = _sizes(40)
    g = slope_gradient(z, hx, hy, method, backend="numpy")
    np.testing.assert_allclose(g, 0.15, rtol=1e-6)  # float32 output
    np.testing.assert_allclose(gradient_to_unit(g, "percent"), 15.0, rtol=1e-6)
    # Source: docs/references.md §6: 15 % = atan(0.15) = 8.5308 degrees (computed there to 3 decimals for other values)
    np.testing.assert_allclose(gradient_to_unit(g, "degrees"), np.degrees(np.arctan(0.15)), rtol=1e-6)


def test_eighteen_percent_plane_in_degrees():
    # Source: docs/references.md §6 [C]: 18 % = 10.2040 degrees.
    X, _ = _grid(10)
    z = 0.18 * X
    g = slope_gradient(z, *_sizes(10))
    np.testing.assert_allclose(gradient_to_unit(g, "degrees"), 10.2040, atol=5e-4)


@pytest.mark.parametrize(
    "method, factor",
    [
        # Source: docs/references.md §2 [D, verified C]: exact discrete identities for
        # z = A sin(kx) cos(ly), h = 10 m, wavelengths 200 m (k) and 300 m (l).
        (SlopeMethod.ZEVENBERGEN_THORNE, 0.983631643083466),
        (SlopeMethod.HORN, 0.9728842873857046),
    ],
)
def test_sinusoid_truncation_factor(method, factor):
    k, m = 2 * np.pi / 200.0, 2 * np.pi / 300.0
    X, Y = _grid(64)
    z = 5.0 * np.sin(k * X) * np.cos(m * Y)
    inner = (slice(1, -1), slice(1, -1))
    p_true = (5.0 * k * np.cos(k * X) * np.cos(m * Y))[inner]
    e = z
    z1, z2, z3 = e[:-2, :-2], e[:-2, 1:-1], e[:-2, 2:]
    z4, z6 = e[1:-1, :-2], e[1:-1, 2:]
    z7, z8, z9 = e[2:, :-2], e[2:, 1:-1], e[2:, 2:]
    formula = _horn_pq if method is SlopeMethod.HORN else _zt_pq
    p_est, _ = formula(z1, z2, z3, z4, z6, z7, z8, z9, H, H)
    sel = np.abs(p_true) > 1e-3
    np.testing.assert_allclose(p_est[sel] / p_true[sel], factor, rtol=1e-9)


@pytest.mark.parametrize("method", list(SlopeMethod))
def test_gaussian_hill_error_falls_with_cell_size(method):
    # Source: docs/references.md §5 [D]: |grad z| = (H r / s^2) exp(-r^2 / 2 s^2) for z = H exp(-r^2 / 2 s^2);
    # maximum 0.60653 H/s at r = s (H = 100 m, s = 500 m gives 0.1213061). Second-order kernels:
    # error should fall roughly with h^2 (common practice: halving h divides the error by ~4).
    errors = []
    for h in (40.0, 20.0, 10.0):
        n = int(3000 / h) + 1
        x = np.arange(n) * h - 1500.0
        X, Y = np.meshgrid(x, -x)
        r = np.hypot(X, Y)
        z = 100.0 * np.exp(-(r**2) / (2 * 500.0**2))
        truth = (100.0 * r / 500.0**2) * np.exp(-(r**2) / (2 * 500.0**2))
        g = slope_gradient(z, np.full(n - 2, h), np.full(n - 2, h), method, backend="numpy")
        errors.append(np.max(np.abs(g - truth[1:-1, 1:-1])))
        if h == 10.0:
            assert abs(np.max(truth) - 0.1213061) < 2e-4
            assert abs(float(np.max(g)) - 0.1213061) < 2e-4
    assert errors[0] > errors[1] > errors[2]
    assert errors[1] / errors[2] > 3.0


def test_noise_policy_strict_window():
    # Common practice (documented policy, docs/design.md): no slope where a cell the kernel reads is invalid.
    z = np.arange(49, dtype=float).reshape(7, 7)
    z[3, 3] = np.nan
    g = slope_gradient(z, np.full(5, H), np.full(5, H), "horn")
    # the 3x3 block of output cells around the NaN (output index shifted by the halo) is NaN, the rest finite
    nan_mask = np.isnan(g)
    expected = np.zeros((5, 5), bool)
    expected[1:4, 1:4] = True
    np.testing.assert_array_equal(nan_mask, expected)
    gz = slope_gradient(z, np.full(5, H), np.full(5, H), "zevenbergen-thorne")
    # ZT reads only the four edge neighbours: the NaN centre kills the cell and its 4 edge neighbours
    expected_zt = np.zeros((5, 5), bool)
    expected_zt[2, 1:4] = True
    expected_zt[1:4, 2] = True
    np.testing.assert_array_equal(np.isnan(gz), expected_zt)


@pytest.mark.parametrize("method", list(SlopeMethod))
def test_compiled_backend_bit_identical(method):
    # Common practice: one formula, two backends; they must agree exactly.
    rng = np.random.default_rng(3)
    z = rng.normal(0, 30, (130, 170)).cumsum(axis=0)
    z[50:53, 60:64] = np.nan
    hx = np.linspace(9.0, 11.0, 128)
    hy = np.full(128, 9.5)
    a = slope_gradient(z, hx, hy, method, backend="numpy")
    b = slope_gradient(z, hx, hy, method, backend="compiled")
    np.testing.assert_array_equal(a, b)


def test_bad_shapes_rejected():
    with pytest.raises(ValueError):
        slope_gradient(np.zeros((2, 5)), np.full(0, H), np.full(0, H))
    with pytest.raises(ValueError, match="choose one of"):
        SlopeMethod.from_user("steepest")
