"""The elevation unit comes from the data; landcheck never assumes metres silently.

Source: docs/references.md §18 (US survey foot 1200/3937 m, international foot 0.3048 m,
EPSG:2229 in US survey feet); the expected slope of a quadratic ramp is exact for every 3x3 kernel
(docs/references.md §1: Horn 1981).
"""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from _support import write_parcels, write_raster, write_rules
from click.testing import CliRunner
from rasterio.transform import from_origin

from landcheck.cli.main import cli
from landcheck.core.audit import audit
from landcheck.errors import InputDataError
from landcheck.inputs.dem import US_SURVEY_FOOT_M, ZUnit, open_dem, resolve_z_unit

X0_FT, Y0_FT = 6_500_000.0, 1_900_000.0  # inside EPSG:2229 (ftUS)
CELL_FT = 30.0
G = 0.0004  # z = G/2 x^2 (x along the ramp) -> slope 100 G x percent, with x and z in the same unit


def _feet_dem(path, *, units: str | None):
    n = 80
    x = (np.arange(n) + 0.5) * CELL_FT
    z = np.tile(0.5 * G * x**2, (n, 1)) + 100.0
    write_raster(path, z, transform=from_origin(X0_FT, Y0_FT, CELL_FT, CELL_FT), crs="EPSG:2229")
    if units is not None:
        with rasterio.open(path, "r+") as ds:
            ds.units = (units,)
    return path


def _inputs(tmp_path, units):
    dem = _feet_dem(tmp_path / "dem.tif", units=units)
    rules = write_rules(tmp_path / "r.toml", limit=50.0, tol=5.0)
    # parcel around x = 1500 ft from the west edge: slope 100 * G * 1500 = 60 %
    box = shapely.box(X0_FT + 1350, Y0_FT - 1500, X0_FT + 1650, Y0_FT - 900)
    parcels = write_parcels(tmp_path / "p.gpkg", [box], pid=[1], zoning=["R"], crs="EPSG:2229")
    return dem, parcels, rules


def test_band_unit_us_survey_foot_is_read_and_slope_is_not_3_28_times_too_steep(tmp_path):
    dem, parcels, rules = _inputs(tmp_path, "US survey foot")
    src = open_dem(dem)
    assert src.z_unit is ZUnit.US_SURVEY_FOOT and "band 1" in src.z_unit_source
    r = audit(dem, parcels, rules, tmp_path / "out", make_report=False, skip_confidence=True, show_progress=False)
    mean = float(r.parcels["slope_mean_pct"].iloc[0])
    # horizontal and vertical both in US survey feet: the ratio is unitless, 60 % (+/- the ramp's spread)
    assert mean == pytest.approx(60.0, abs=0.5)
    assert r.summary["manifest"]["parameters"]["z_unit"] == "us-ft"
    assert US_SURVEY_FOOT_M == pytest.approx(0.3048006096, rel=1e-10)


def test_feet_crs_without_declared_unit_is_refused_asking_for_z_unit(tmp_path):
    dem, parcels, rules = _inputs(tmp_path, None)
    with pytest.raises(InputDataError, match="--z-unit") as err:
        open_dem(dem)
    assert str(dem) in str(err.value) and "not the metre" in str(err.value)
    r = CliRunner().invoke(
        cli,
        ["audit", "--dem", str(dem), "--parcels", str(parcels), "--rulebook", str(rules), "--out", str(tmp_path / "o")]
        + ["--no-report"],
    )
    assert r.exit_code == 3 and "--z-unit" in r.output and not (tmp_path / "o").exists()
    # given explicitly, it runs and gives the unitless slope
    res = audit(
        dem,
        parcels,
        rules,
        tmp_path / "o2",
        z_unit="us-ft",
        make_report=False,
        skip_confidence=True,
        show_progress=False,
    )
    assert float(res.parcels["slope_mean_pct"].iloc[0]) == pytest.approx(60.0, abs=0.5)


def test_z_unit_contradicting_the_file_is_refused(tmp_path):
    dem = _feet_dem(tmp_path / "dem.tif", units="ft")
    with pytest.raises(InputDataError, match="declares ft"):
        open_dem(dem, z_unit="m")
    assert open_dem(dem).z_unit is ZUnit.FOOT


def test_unknown_band_unit_is_refused_naming_it(tmp_path):
    dem = _feet_dem(tmp_path / "dem.tif", units="cubits")
    with pytest.raises(InputDataError, match="'cubits'"):
        open_dem(dem)


def test_metre_crs_without_unit_says_that_metres_are_assumed(tmp_path, caplog):
    dem = write_raster(tmp_path / "m.tif", np.arange(100.0).reshape(10, 10))
    with caplog.at_level("INFO", logger="landcheck.inputs.dem"):
        src = open_dem(dem)
    assert src.z_unit is ZUnit.METRE
    assert "metres assumed" in src.z_unit_source  # recorded in the manifest
    assert "declares no elevation unit; taken as metres" in caplog.text


class _FakeBand:
    units = ("",)


def test_vertical_axis_of_a_compound_crs_gives_the_unit():
    from landcheck.geo.grid import GridSpec

    crs = pyproj.CRS.from_user_input("EPSG:2229+6360")  # NAD83 / California 5 (ftUS) + NAVD88 height (ftUS)
    grid = GridSpec(from_origin(X0_FT, Y0_FT, 30, 30), crs.to_wkt(), 10, 10, False, US_SURVEY_FOOT_M)
    unit, source = resolve_z_unit(_FakeBand(), 1, grid, "x.tif", None)
    assert unit is ZUnit.US_SURVEY_FOOT and "vertical CRS" in source
