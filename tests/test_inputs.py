"""DEM input validation: each refusal names the file and the problem; nothing is written."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from affine import Affine
from click.testing import CliRunner

from landcheck.cli.main import cli
from landcheck.errors import InputDataError
from landcheck.inputs.dem import open_dem

# All checks here are common practice (input validation), no outside values.


def _run_slope(dem, out, *extra):
    return CliRunner().invoke(cli, ["slope", str(dem), str(out), *extra])


def test_missing_file(tmp_path):
    res = _run_slope(tmp_path / "nope.tif", tmp_path / "o.tif")
    assert res.exit_code == 3
    assert "nope.tif" in res.output and "not found" in res.output
    assert not (tmp_path / "o.tif").exists()


def test_not_a_raster(tmp_path):
    bad = tmp_path / "parcels.tif"
    bad.write_text("this is not a raster")
    with pytest.raises(InputDataError, match=r"parcels\.tif: not a raster"):
        open_dem(bad)
    res = _run_slope(bad, tmp_path / "o.tif")
    assert res.exit_code == 3 and "not a raster" in res.output
    assert list(tmp_path.iterdir()) == [bad]


def test_missing_crs_refused_unless_given(tmp_path, raster_writer):
    dem = raster_writer(np.ones((5, 5), "float32"), crs=None)
    with pytest.raises(InputDataError, match="no coordinate reference system.*--dem-crs"):
        open_dem(dem)
    src = open_dem(dem, crs="EPSG:32651")
    assert not src.grid.geographic
    res = _run_slope(dem, tmp_path / "o.tif")
    assert res.exit_code == 3 and "--dem-crs" in res.output
    res = _run_slope(dem, tmp_path / "o.tif", "--dem-crs", "EPSG:32651")
    assert res.exit_code == 0, res.output


def test_rotated_grid_refused(raster_writer):
    dem = raster_writer(np.ones((5, 5), "float32"), transform=Affine(10, 2, 400000, 2, -10, 1600000))
    with pytest.raises(InputDataError, match="rotated or sheared"):
        open_dem(dem)


def test_multiband_needs_band_choice(tmp_path):
    path = tmp_path / "two.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=4,
        height=4,
        count=2,
        dtype="float32",
        crs="EPSG:32651",
        transform=Affine(10, 0, 0, 0, -10, 0),
    ) as ds:
        ds.write(np.stack([np.ones((4, 4)), 2 * np.ones((4, 4))]).astype("float32"))
    with pytest.raises(InputDataError, match=r"two\.tif: the raster has 2 bands.*--dem-band"):
        open_dem(path)
    src = open_dem(path, band=2)
    from landcheck.geo.grid import Window

    assert float(src.read(Window(0, 0, 4, 4))[0, 0]) == 2.0
    with pytest.raises(InputDataError, match="band 3"):
        open_dem(path, band=3)


def test_all_nodata_refused(raster_writer):
    dem = raster_writer(np.full((6, 6), -9999.0, "float32"))
    with pytest.raises(InputDataError, match="every cell .* nodata"):
        open_dem(dem)


def test_feet_units(raster_writer):
    # Common practice: international foot = 0.3048 m. A 10 ft rise per 100 ft run is 10 % whatever the unit.
    from landcheck.geo.grid import Window
    from landcheck.terrain.slope import slope_gradient

    x = np.arange(8) * 100.0
    z = np.tile(0.1 * x, (8, 1)).astype("float32")
    dem = raster_writer(z, crs="EPSG:2227", transform=Affine(100, 0, 6000000, 0, -100, 2000000))  # US ft CRS
    src = open_dem(dem, z_unit="us-ft")
    assert src.grid.unit_m == pytest.approx(1200 / 3937)
    elev = src.read_with_halo(Window(0, 0, 8, 8), 1)
    hx, hy = src.grid.cell_size_m(np.arange(8))
    g = slope_gradient(elev, hx, hy)
    assert np.nanmax(np.abs(g[1:-1, 1:-1] - 0.1)) < 1e-6
    # the same DEM read as metres while the grid is in feet gives a 1/0.3048 x steeper slope: the option matters
    src_m = open_dem(dem, z_unit="m")
    g_m = slope_gradient(src_m.read_with_halo(Window(0, 0, 8, 8), 1), hx, hy)
    assert float(g_m[3, 3]) == pytest.approx(0.1 * 3937 / 1200, rel=1e-6)
