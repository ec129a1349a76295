"""Every refusal names the file at fault and exits 3 (docs/cli.md, "Exit codes"); NULL is never ''.

Checks against outside facts: latitude lies within -90..90 degrees and UTM northings of 1.6e6 m are not
degrees (docs/references.md §12: Snyder 1987); a 3 x 3 kernel needs all 8 neighbours
(docs/references.md §1: Horn 1981); pyogrio/GDAL write NULL as NULL (common practice).
"""

from __future__ import annotations

import hashlib

import geopandas as gpd
import numpy as np
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_raster, write_rules
from click.testing import CliRunner
from rasterio.transform import from_origin

from landcheck.cli.main import cli
from landcheck.errors import InputDataError, LandcheckWarning
from landcheck.inputs.layers import read_layer, read_parcels

X0, Y0 = 400000.0, 1600000.0
BOX = shapely.box(X0 + 100, Y0 - 300, X0 + 200, Y0 - 200)


def _run(dem, parcels, rules, out, *extra):
    return CliRunner().invoke(
        cli,
        ["audit", "--dem", str(dem), "--parcels", str(parcels), "--rulebook", str(rules), "--out", str(out)]
        + ["--no-report", *extra],
    )


@pytest.fixture
def good(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    parcels = write_parcels(tmp_path / "p.gpkg", [BOX], pid=[1], zoning=["R"])
    return dem, parcels, rules


def _sha(paths):
    return [hashlib.sha256(open(p, "rb").read()).hexdigest() for p in paths]


def test_truncated_geotiff_is_bad_input_naming_the_file_not_an_internal_error(tmp_path, good):
    _, parcels, rules = good
    z = np.random.default_rng(0).uniform(0, 50, (400, 400))
    dem = write_raster(tmp_path / "big.tif", z)
    data = dem.read_bytes()
    dem.write_bytes(data[: len(data) // 2])
    r = _run(dem, parcels, rules, tmp_path / "out")
    assert r.exit_code == 3, r.output
    assert str(dem) in r.output and "truncated or damaged" in r.output and "internal error" not in r.output
    assert not (tmp_path / "out").exists()


def test_dem_tagged_geographic_with_utm_coordinates_is_refused(tmp_path, good):
    _, parcels, rules = good
    dem = write_raster(tmp_path / "wrong.tif", np.ones((20, 20)), crs="EPSG:4326")  # origin 400000, 1600000
    r = _run(dem, parcels, rules, tmp_path / "out")
    assert r.exit_code == 3 and str(dem) in r.output and "wrong CRS" in r.output


def test_dem_coordinates_outside_its_projected_crs_range_are_refused(tmp_path, good):
    _, parcels, rules = good
    far = from_origin(9.0e9, 9.0e9, 10.0, 10.0)
    dem = write_raster(tmp_path / "far.tif", np.ones((20, 20)), transform=far)
    with pytest.raises(InputDataError, match="outside the valid range of its CRS") as err:
        from landcheck.inputs.dem import open_dem

        open_dem(dem)
    assert str(dem) in str(err.value)
    assert _run(dem, parcels, rules, tmp_path / "o").exit_code == 3


@pytest.mark.parametrize("n", [1, 2])
def test_1x1_and_2x2_dems_are_refused_as_too_small_naming_the_dem(tmp_path, good, n):
    _, parcels, rules = good
    dem = write_raster(tmp_path / f"tiny{n}.tif", np.ones((n, n)), transform=from_origin(X0, Y0, 1000.0, 1000.0))
    r = _run(dem, parcels, rules, tmp_path / "out")
    assert r.exit_code == 3 and str(dem) in r.output and f"{n} x {n} cells" in r.output
    assert "no parcel overlaps" not in r.output


def test_dem_too_coarse_for_the_parcels_is_refused(tmp_path, good):
    _, parcels, rules = good
    # 3 x 3 cells of 1 km: only the centre cell has a slope; the parcel lies in a corner cell
    dem = write_raster(tmp_path / "coarse.tif", np.arange(9.0).reshape(3, 3), transform=from_origin(X0, Y0, 1000, 1000))
    r = _run(dem, parcels, rules, tmp_path / "out")
    assert r.exit_code == 3, r.output
    assert str(dem) in r.output and "too small or too coarse" in r.output
    assert not (tmp_path / "out").exists()


def test_directory_as_dem_or_rulebook_exits_3(tmp_path, good):
    dem, parcels, rules = good
    d = tmp_path / "adir"
    d.mkdir()
    r = _run(d, parcels, rules, tmp_path / "o1")
    assert r.exit_code == 3 and str(d) in r.output
    r = _run(dem, parcels, d, tmp_path / "o2")
    assert r.exit_code == 3 and str(d) in r.output


def test_layer_without_crs_does_not_suggest_parcels_crs(tmp_path):
    path = tmp_path / "flood.geojson"
    path.write_text(
        '{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {"hazard_level": 3}, '
        '"geometry": {"type": "Polygon", "coordinates": [[[0,0],[1,0],[1,1],[0,0]]]}}]}'
    )
    import pyogrio

    # GeoJSON implies WGS 84; strip it by writing a GeoPackage without a CRS
    gdf = gpd.read_file(path).set_crs(None, allow_override=True)
    nocrs = tmp_path / "flood.gpkg"
    pyogrio.write_dataframe(gdf, nocrs, layer="flood")
    with pytest.raises(InputDataError) as err:
        read_layer(nocrs, role="flood layer")
    assert "--parcels-crs" not in str(err.value) and str(nocrs) in str(err.value) and "-a_srs" in str(err.value)


def test_null_class_is_null_not_empty_string_and_never_matches_values_empty(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif")
    text = """
[rulebook]
class_field = "zoning"
id_field = "pid"

[classes.blank]
values = [""]
max_slope_pct = 90.0

[classes.residential]
values = ["R"]
max_slope_pct = 18.0
"""
    rules = write_rules(tmp_path / "r.toml", text=text)
    boxes = [shapely.box(X0 + 100 + 120 * i, Y0 - 300, X0 + 200 + 120 * i, Y0 - 200) for i in range(4)]
    parcels = write_parcels(tmp_path / "p.gpkg", boxes, pid=[11, 12, 13, 14], zoning=["R", None, "", None])
    before = _sha([dem, parcels, rules])
    with pytest.warns(LandcheckWarning, match="no zoning value"):
        ps = read_parcels(parcels, class_field="zoning", id_field="pid", target_crs_wkt="EPSG:32651")
    assert ps.frame["class_value"].isna().tolist() == [False, True, False, True]
    assert any("no zoning value (NULL): pid 12, 14" in w for w in ps.warnings)
    r = _run(dem, parcels, rules, tmp_path / "out")
    assert r.exit_code == 0, r.output
    out = gpd.read_file(tmp_path / "out" / "parcels.gpkg").set_index("parcel_id")
    assert out.loc[12, "class_name"] == "no_rule" and out.loc[14, "class_name"] == "no_rule"
    assert out.loc[13, "class_name"] == "blank"  # a real empty string still matches values = [""]
    assert out["class_value"].isna().tolist() == [False, True, False, True]  # NULL in the GeoPackage
    assert _sha([dem, parcels, rules]) == before


def test_all_duplicated_ids_are_listed(tmp_path):
    boxes = [shapely.box(X0 + 10 * i, Y0 - 20, X0 + 10 * i + 5, Y0 - 10) for i in range(6)]
    parcels = write_parcels(tmp_path / "p.gpkg", boxes, pid=[1, 2, 1, 3, 2, 2], zoning=["R"] * 6)
    with pytest.raises(InputDataError) as err:
        read_parcels(parcels, class_field="zoning", id_field="pid", target_crs_wkt="EPSG:32651")
    msg = str(err.value)
    assert "1 (rows 1, 3)" in msg and "2 (rows 2, 5, 6)" in msg and "2 pid values" in msg


def test_every_command_refuses_a_directory_or_file_in_the_wrong_place_with_exit_3(tmp_path, good):
    dem, parcels, rules = good
    d = tmp_path / "adir"
    d.mkdir()
    taken = tmp_path / "taken.txt"
    taken.write_text("keep")
    cases = [
        ["slope", str(d), str(tmp_path / "s.tif")],
        ["slope", str(dem), str(taken)],
        [
            "prescreen",
            "--dem",
            str(d),
            "--rulebook",
            str(rules),
            "--parcels",
            str(parcels),
            "--out",
            str(tmp_path / "p"),
        ],
        ["report", str(taken)],
    ]
    for args in cases:
        r = CliRunner().invoke(cli, args)
        assert r.exit_code == 3, (args, r.output)
        assert "internal error" not in r.output
    assert taken.read_text() == "keep"
