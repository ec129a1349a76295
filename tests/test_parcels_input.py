"""Parcel input: formats, repair, reprojection and refusals (common practice: input validation)."""

from __future__ import annotations

import json

import pytest
import shapely
from _support import ramp_dem, write_parcels, write_rules
from click.testing import CliRunner

from landcheck.cli.main import cli
from landcheck.core.audit import audit
from landcheck.errors import LandcheckWarning

X0, Y0 = 400000.0, 1600000.0


def _geoms():
    return [shapely.box(X0 + 100, Y0 - 300, X0 + 200, Y0 - 200), shapely.box(X0 + 500, Y0 - 300, X0 + 600, Y0 - 200)]


@pytest.mark.parametrize("suffix", [".gpkg", ".geojson", ".shp", ".parquet"])
def test_formats_give_same_results(tmp_path, suffix):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    p = write_parcels(tmp_path / f"p{suffix}", _geoms(), pid=[1, 2], zoning=["R", "R"])
    res = audit(dem, p, rules, tmp_path / "out", make_report=False)
    # closed form on the ramp (slope 0.04 x %): parcel 2 spans x 500..600, all >= 18 %; parcel 1 below
    assert res.parcels["over_limit_share"].tolist() == pytest.approx([0.0, 1.0])


def test_reprojection_multipolygon_repair_and_empty(tmp_path):
    import geopandas as gpd

    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    multi = shapely.MultiPolygon(
        [shapely.box(X0 + 100, Y0 - 300, X0 + 150, Y0 - 250), shapely.box(X0 + 500, Y0 - 300, X0 + 550, Y0 - 250)]
    )
    bowtie = shapely.Polygon([(X0 + 300, Y0 - 500), (X0 + 400, Y0 - 400), (X0 + 400, Y0 - 500), (X0 + 300, Y0 - 400)])
    gdf = gpd.GeoDataFrame(
        {"pid": [1, 2, 3], "zoning": ["R", "R", "R"]}, geometry=[multi, bowtie, shapely.Polygon()], crs="EPSG:32651"
    ).to_crs("EPSG:4326")
    gdf.to_file(tmp_path / "p.gpkg", layer="lots")
    with pytest.warns(Warning):
        res = audit(dem, tmp_path / "p.gpkg", rules, tmp_path / "out", make_report=False)
    p = res.parcels
    assert p.loc[0, "over_limit_share"] == pytest.approx(0.5, abs=1e-6)  # half the multipolygon is east of x=450
    assert p.loc[1, "geometry_note"] == "repaired"
    # the repaired bowtie is two triangles of 2,500 m2 each (closed form)
    assert p.loc[1, "covered_m2"] == pytest.approx(5000.0, rel=1e-3)
    assert p.loc[2, "verdict"] == "no_data" and p.loc[2, "geometry_note"] == "empty geometry"
    assert any("repaired" in w for w in res.warnings)


def test_partly_outside_dem_gets_no_data(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")  # min_evaluated_share = 0.5
    geoms = [
        shapely.box(X0 - 300, Y0 - 300, X0 + 100, Y0 - 200),  # 1/4 inside (and its edge column has no slope)
        shapely.box(X0 + 1000, Y0 - 300, X0 + 1400, Y0 - 200),  # 1/5 inside at the east edge
        shapely.box(X0 + 3000, Y0 - 300, X0 + 3100, Y0 - 200),
    ]  # fully outside
    p = write_parcels(tmp_path / "p.gpkg", geoms, pid=[1, 2, 3], zoning=["R", "R", "R"])
    with pytest.warns(LandcheckWarning, match="1 parcel lies entirely outside the DEM"):
        res = audit(dem, p, rules, tmp_path / "out", make_report=False)
    assert res.parcels["verdict"].tolist() == ["no_data", "no_data", "no_data"]
    # covered area: exactly the part inside the DEM extent (x 0..100 and 1000..1200 m)
    assert res.parcels["covered_m2"][0] / res.parcels["area_m2"][0] == pytest.approx(0.25, abs=1e-6)
    assert res.parcels["covered_m2"][1] / res.parcels["area_m2"][1] == pytest.approx(0.5, abs=1e-6)
    assert res.parcels["evaluated_share"][2] == 0.0
    assert "outside the DEM" in res.parcels["reasons"][1]


def _cli(tmp_path, parcels, *extra, rules=None, out="out"):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = rules or write_rules(tmp_path / "r.toml")
    return CliRunner().invoke(
        cli,
        [
            "audit",
            "--dem",
            str(dem),
            "--parcels",
            str(parcels),
            "--rulebook",
            str(rules),
            "--out",
            str(tmp_path / out),
            "--no-report",
            *extra,
        ],
    )


def test_refusals(tmp_path):
    import geopandas as gpd

    # no CRS
    gpd.GeoDataFrame({"pid": [1], "zoning": ["R"]}, geometry=_geoms()[:1]).to_file(
        tmp_path / "nocrs.geojson", driver="GeoJSON"
    )
    # GeoJSON without a crs member is read as WGS84 by GDAL; a Shapefile without .prj has no CRS
    gpd.GeoDataFrame({"pid": [1], "zoning": ["R"]}, geometry=_geoms()[:1]).to_file(tmp_path / "nocrs.shp")
    r = _cli(tmp_path, tmp_path / "nocrs.shp")
    assert r.exit_code == 3 and "nocrs.shp" in r.output and "no CRS" in r.output and "--parcels-crs" in r.output
    assert _cli(tmp_path, tmp_path / "nocrs.shp", "--parcels-crs", "EPSG:32651").exit_code == 0
    # class field missing
    p = write_parcels(tmp_path / "nofield.gpkg", _geoms(), pid=[1, 2], landuse=["R", "R"])
    r = _cli(tmp_path, p, out="o2")
    assert r.exit_code == 3 and "no attribute 'zoning'" in r.output and "landuse" in r.output
    # duplicate ids
    p = write_parcels(tmp_path / "dup.gpkg", _geoms(), pid=[7, 7], zoning=["R", "R"])
    r = _cli(tmp_path, p, out="o3")
    assert r.exit_code == 3 and "7 (rows 1, 2)" in r.output and "more than one parcel" in r.output
    # empty layer
    p = write_parcels(tmp_path / "empty.gpkg", [], pid=[], zoning=[])
    r = _cli(tmp_path, p, out="o4")
    assert r.exit_code == 3 and "has no features" in r.output
    # entirely outside the DEM
    far = [shapely.box(X0 + 9000, Y0 - 300, X0 + 9100, Y0 - 200)]
    p = write_parcels(tmp_path / "far.gpkg", far, pid=[1], zoning=["R"])
    r = _cli(tmp_path, p, out="o5")
    assert r.exit_code == 3 and "no parcel overlaps the DEM" in r.output
    # a CRS that cannot hold these coordinates (projected metres labelled as degrees)
    p = write_parcels(tmp_path / "badcrs.gpkg", _geoms(), crs="EPSG:4326", pid=[1, 2], zoning=["R", "R"])
    r = _cli(tmp_path, p, out="o6")
    assert (
        r.exit_code == 3
        and "badcrs.gpkg" in r.output
        and ("cannot transform" in r.output or "invalid coordinates" in r.output)
    )
    # points are not parcels
    p = write_parcels(tmp_path / "pts.gpkg", [shapely.Point(X0 + 5, Y0 - 5)], pid=[1], zoning=["R"])
    r = _cli(tmp_path, p, out="o7")
    assert r.exit_code == 3 and "1 feature is not a polygon (rows 1, the first is a Point)" in r.output
    # multi-layer file without a layer choice
    write_parcels(tmp_path / "multi.gpkg", _geoms(), layer="a", pid=[1, 2], zoning=["R", "R"])
    write_parcels(tmp_path / "multi.gpkg", _geoms(), layer="b", pid=[1, 2], zoning=["R", "R"])
    r = _cli(tmp_path, tmp_path / "multi.gpkg", out="o8")
    assert r.exit_code == 3 and "holds 2 layers (a, b)" in r.output
    assert _cli(tmp_path, tmp_path / "multi.gpkg", "--parcels-layer", "b", out="o9").exit_code == 0
    for o in ("o2", "o3", "o4", "o5", "o6", "o7", "o8"):
        assert not (tmp_path / o).exists()


def test_unmatched_classes_listed_not_dropped(tmp_path):
    p = write_parcels(tmp_path / "p.gpkg", _geoms(), pid=[1, 2], zoning=["R", "Q9"])
    r = _cli(tmp_path, p, "--json")
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    assert out["totals"]["verdict_counts"]["no_rule"] == 1
    assert any("'Q9'" in w for w in out["warnings"])
