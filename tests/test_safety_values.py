"""Implausible elevations (undeclared fill values) are refused, or masked on request.

Source: docs/references.md §18 (land surface about -430 m .. 8 849 m; the plausible
range -500 m .. 9 000 m adds a margin, common practice).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_raster, write_rules
from click.testing import CliRunner
from rasterio.transform import from_origin

from landcheck.cli.main import cli
from landcheck.errors import InputDataError
from landcheck.inputs.dem import PLAUSIBLE_MAX_M, PLAUSIBLE_MIN_M, open_dem

X0, Y0 = 400000.0, 1600000.0


@pytest.fixture
def fill_block(tmp_path):
    # a steep ramp with a 20 x 20 block of 1e30 (a fill value nobody declared) under parcel 2
    ramp = ramp_dem(tmp_path / "ramp.tif", n=100, gradient_per_m=0.004)
    import rasterio

    with rasterio.open(ramp) as ds:
        z = ds.read(1)
    z[40:60, 60:80] = 1e30
    dem = write_raster(tmp_path / "dem.tif", z, transform=from_origin(X0, Y0, 10.0, 10.0), nodata=-9999.0)
    rules = write_rules(tmp_path / "r.toml", limit=18.0, tol=5.0)
    parcels = write_parcels(
        tmp_path / "p.gpkg",
        [shapely.box(X0 + 100, Y0 - 300, X0 + 200, Y0 - 200), shapely.box(X0 + 630, Y0 - 570, X0 + 770, Y0 - 430)],
        pid=[1, 2],
        zoning=["R", "R"],
    )
    return dem, parcels, rules


def _run(inputs, out, *extra):
    dem, parcels, rules = inputs
    return CliRunner().invoke(
        cli,
        ["audit", "--dem", str(dem), "--parcels", str(parcels), "--rulebook", str(rules), "--out", str(out)]
        + ["--no-report", "--json", *extra],
    )


def test_fill_value_block_is_refused_naming_file_value_and_cell_count(tmp_path, fill_block):
    before = hashlib.sha256(fill_block[0].read_bytes()).hexdigest()
    r = _run(fill_block, tmp_path / "out")
    assert r.exit_code == 3, r.output
    assert str(fill_block[0]) in r.output
    assert "400 of 10000 cells" in r.output and "1e+30" in r.output and "no-data" in r.output
    assert "--mask-implausible" in r.output
    assert not (tmp_path / "out").exists()
    assert hashlib.sha256(fill_block[0].read_bytes()).hexdigest() == before


def test_mask_implausible_masks_with_a_warning_and_never_reports_the_block_as_flat(tmp_path, fill_block):
    import json

    r = _run(fill_block, tmp_path / "out", "--mask-implausible")
    assert r.exit_code == 0, r.output
    data = json.loads(r.stdout)
    assert any("400 of 10000 cells" in w and "treated as no data" in w for w in data["warnings"])
    import pandas as pd

    parcels = pd.read_csv(tmp_path / "out" / "parcels.csv")
    p2 = parcels.set_index("parcel_id").loc[2]
    # before the change the block read as flat: 0 % slope, share 0, 'consistent'
    assert p2["verdict"] == "no_data"
    assert not (p2["slope_mean_pct"] == 0.0)
    import rasterio

    with rasterio.open(tmp_path / "out" / "slope_pct.tif") as ds:
        assert float(np.nanmax(ds.read(1))) < 1000.0  # not 5e30 %


def test_plausible_range_bounds_and_negative_fill(tmp_path):
    assert (PLAUSIBLE_MIN_M, PLAUSIBLE_MAX_M) == (-500.0, 9000.0)
    z = np.full((30, 30), 12.0)
    z[0, :5] = -32767.0  # an undeclared integer-style fill
    dem = write_raster(tmp_path / "d.tif", z, nodata=None)
    with pytest.raises(InputDataError, match=r"5 of 900 cells .*values -32767 m"):
        open_dem(dem)
    z[0, :5] = 8848.0  # the highest summit is plausible
    assert open_dem(write_raster(tmp_path / "ok.tif", z, nodata=None)).grid.width == 30
