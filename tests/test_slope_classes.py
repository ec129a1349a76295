"""Slope classes: published breaks and user breaks, "or over" at the lower edge."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner

from landcheck.cli.main import cli
from landcheck.terrain.slope_classes import classify_slope, get_scheme, scheme_from_breaks


def test_planning_scheme_breaks():
    # Source: docs/references.md §7, land-use planning slope classes 0-3, 3-8, 8-18, 18-30, 30-50, >50 %.
    s = get_scheme("planning-6")
    assert s.lower_pct == (0.0, 3.0, 8.0, 18.0, 30.0, 50.0)
    got = classify_slope(np.array([2.999, 3.0, 17.999, 18.0, 29.9, 50.0, 300.0]), s)
    assert got.tolist() == [0, 1, 2, 3, 3, 5, 5]


def test_fao_scheme_breaks():
    # Source: FAO 2006, Guidelines for Soil Description (docs/references.md §7; table number from memory).
    s = get_scheme("fao-2006")
    got = classify_slope(np.array([0.1, 0.3, 0.7, 1.5, 4.0, 9.0, 12.0, 20.0, 45.0, 61.0]), s)
    assert got.tolist() == list(range(10))
    assert s.labels[7] == "moderately steep"


def test_user_breaks_and_validation():
    s = scheme_from_breaks([8, 18, 30])
    assert s.labels == ("0-8 %", "8-18 %", "18-30 %", ">= 30 %")
    assert classify_slope(np.array([np.nan, 7.9, 8.0]), s).tolist() == [255, 0, 1]
    with pytest.raises(ValueError, match="increase strictly"):
        scheme_from_breaks([18, 8])


def test_cli_writes_class_raster(tmp_path, raster_writer):
    # Analytic plane (docs/references.md §2): z = 0.2 x is 20 % everywhere inside -> class 18-30 (index 3).
    x = np.arange(12) * 10.0
    dem = raster_writer(np.tile(0.2 * x, (9, 1)).astype("float32"))
    res = CliRunner().invoke(
        cli, ["slope", str(dem), str(tmp_path / "s.tif"), "--class-raster", str(tmp_path / "c.tif"), "--json"]
    )
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    assert summary["max"] == pytest.approx(20.0, rel=1e-5)
    with rasterio.open(tmp_path / "c.tif") as ds:
        c = ds.read(1)
        assert "18-30" not in ds.descriptions[0] and "rolling to moderately steep" in ds.descriptions[0]
    assert (c[1:-1, 1:-1] == 3).all() and (c[0] == 255).all()
    bad = CliRunner().invoke(cli, ["slope", str(dem), str(tmp_path / "s2.tif"), "--class-scheme", "steep,flat"])
    assert bad.exit_code == 2 and "--class-scheme" in bad.output
