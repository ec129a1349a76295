"""Hazard zones: easement buffers, flood polygons, sea-level rise and HAND inside the audit."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from _support import write_parcels, write_raster
from affine import Affine
from click.testing import CliRunner
from rasterio.transform import from_origin

from landcheck.cli.main import cli
from landcheck.core.audit import audit
from landcheck.errors import InputDataError, RuleFileError
from landcheck.geo.grid import GridSpec
from landcheck.zones.prepare import buffer_ground

X0, Y0 = 400000.0, 1600000.0
UTM = "EPSG:32651"


def _utm_grid():
    import pyproj

    return GridSpec(from_origin(X0, Y0, 10, 10), pyproj.CRS(UTM).to_wkt(), 100, 100, False)


def _scale_k(x, y):
    import pyproj

    lon, lat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    return pyproj.Proj(UTM).get_factors(lon, lat).meridional_scale


def test_straight_shore_buffer_area():
    # Closed form: a straight line of length L buffered by w has area 2 w L + (round caps) pi w^2; shapely draws
    # the caps as polygons with 4*16 sides, whose area is pi w^2 * (n / 2 pi) sin(2 pi / n), n = 64 (common practice).
    L, w = 1000.0, 20.0
    line = shapely.LineString([(X0 + 200, Y0 - 10), (X0 + 200, Y0 - 10 - L)])
    g = _utm_grid()
    k = _scale_k(X0 + 200, Y0 - 510)
    buf = buffer_ground(np.array([line]), w, g)
    wm = w * k  # width in map units: ground width times the projection's point scale
    n = 64
    expected = 2 * wm * L + np.pi * wm**2 * (n / (2 * np.pi)) * np.sin(2 * np.pi / n)
    assert buf.area == pytest.approx(expected, rel=1e-9)
    assert abs(k - 1) > 1e-4  # the scale correction is not a no-op here


def test_circular_pond_buffer_area():
    # Closed form: a pond of radius R with a w-wide strip around it covers pi (R + w)^2 - pi R^2 of land;
    # with 256-gon and 64-segment rounding the polygon areas agree within 0.2 % (stated tolerance).
    R, w = 150.0, 40.0
    pond = shapely.Point(X0 + 500, Y0 - 500).buffer(R, quad_segs=64)
    k = _scale_k(X0 + 500, Y0 - 500)
    strip = buffer_ground(np.array([pond]), w, _utm_grid()).difference(pond)
    expected = np.pi * ((R + w * k) ** 2 - R**2)
    assert strip.area == pytest.approx(expected, rel=2e-3)


def test_geographic_buffer_width_matches_geodesic_distance():
    # Reference: pyproj.Geod inverse distance (Karney 2013) from the buffer edge to the line, at 45 N.
    import pyproj

    g = GridSpec(Affine(1 / 3600, 0, 10.0, 0, -1 / 3600, 45.05), "EPSG:4326", 360, 360, True)
    line = shapely.LineString([(10.05, 45.0), (10.05, 45.04)])  # a meridian
    buf = buffer_ground(np.array([line]), 40.0, g)
    geod = pyproj.Geod(ellps="WGS84")
    minx, _, maxx, _ = buf.bounds
    lat = 45.02
    cut = buf.intersection(shapely.LineString([(minx - 0.01, lat), (maxx + 0.01, lat)]))
    xs = [c[0] for c in cut.coords]
    for x in (min(xs), max(xs)):
        _, _, d = geod.inv(10.05, lat, x, lat)
        assert d == pytest.approx(40.0, abs=0.05)


def _coast_case(
    tmp_path, extra_zones="", forbidden='["shore_strip", "flood_high", "sea_1m"]', scenarios="[0.5, 1.0, 2.0]"
):
    n, h = 100, 10.0
    x = (np.arange(n) + 0.5) * h
    z = np.tile((x - 200) * 0.02, (n, 1))  # sea west of x = 200 m, rising 2 % eastwards
    z[40:60, 60:70] = -0.5  # a basin below sea level behind ground at ~8 m
    dem = write_raster(tmp_path / "dem.tif", z, crs=UTM)
    import geopandas as gpd

    gpd.GeoDataFrame(
        {"name": ["shore"]}, geometry=[shapely.LineString([(X0 + 200, Y0), (X0 + 200, Y0 - 1000)])], crs=UTM
    ).to_file(tmp_path / "shore.gpkg")
    gpd.GeoDataFrame(
        {"lvl": [3, 1]},
        geometry=[
            shapely.box(X0 + 300, Y0 - 300, X0 + 400, Y0 - 200),
            shapely.box(X0 + 300, Y0 - 500, X0 + 400, Y0 - 400),
        ],
        crs=UTM,
    ).to_file(tmp_path / "flood.gpkg")
    polys = [
        shapely.box(X0 + 190, Y0 - 150, X0 + 260, Y0 - 100),  # crosses the shoreline
        shapely.box(X0 + 330, Y0 - 290, X0 + 380, Y0 - 210),  # inside the level-3 flood polygon
        shapely.box(X0 + 590, Y0 - 610, X0 + 720, Y0 - 390),  # holds the closed basin
        shapely.box(X0 + 205, Y0 - 900, X0 + 240, Y0 - 850),  # forest lot by the shore
        shapely.box(X0 + 330, Y0 - 490, X0 + 380, Y0 - 410),
    ]  # inside the level-1 flood polygon
    parcels = write_parcels(tmp_path / "parcels.gpkg", polys, pid=[1, 2, 3, 4, 5], zoning=["R", "R", "R", "F", "R"])
    (tmp_path / "rules.toml").write_text(f"""
[rulebook]
class_field = "zoning"
id_field = "pid"
[layers]
shore = "shore.gpkg"
flood = "flood.gpkg"
[classes.res]
values = ["R"]
context = "urban"
max_slope_pct = 18
forbidden_zones = {forbidden}
[classes.forest]
values = ["F"]
development = false
context = "forest"
[zones.shore_strip]
kind = "easement"
layer = "shore"
width_m = {{ urban = 3.0, agricultural = 20.0, forest = 40.0 }}
[zones.flood_high]
kind = "flood_polygons"
layer = "flood"
level_field = "lvl"
min_level = 3
[zones.sea_1m]
kind = "sea_rise"
rise_m = 1.0
scenarios_m = {scenarios}
{extra_zones}
""")
    return dem, parcels, tmp_path / "rules.toml", polys


def test_zone_areas_are_exact_and_feed_verdicts(tmp_path):
    dem, parcels, rules, polys = _coast_case(tmp_path)
    res = audit(dem, parcels, rules, tmp_path / "out", make_report=False, tile_cells=33)
    p = res.parcels
    k = _scale_k(X0 + 200, Y0 - 500)
    f = p["covered_m2"] / np.array([g.area for g in polys])  # map-plane -> ground factor per parcel
    # closed form: the urban 3 m strip each side of x = 200 m crosses parcel 1 over 50 m of its length
    assert p.loc[0, "zone_shore_strip_m2"] == pytest.approx(2 * 3.0 * k * 50.0 * f[0], rel=1e-6)
    # the forest lot (x 205..240) lies in the 40 m forest strip up to 200 + 40 k
    assert p.loc[3, "zone_shore_strip_m2"] == pytest.approx((200 + 40 * k - 205) * 50 * f[3], rel=1e-6)
    # flood: parcel 2 lies wholly in the level-3 polygon, parcel 5 only in the level-1 polygon (not forbidden)
    assert p.loc[1, "zone_flood_high_share"] == pytest.approx(1.0, abs=1e-12)
    assert p.loc[4, "zone_flood_high_share"] == 0.0
    # sea-level rise (docs/references.md §10, connectivity): z = 0.02 (x - 200) is <= 1 m for x <= 250 m;
    # parcel 1 spans x 190..260 -> 60/70 of it; the closed basin (parcel 3) stays dry.
    assert p.loc[0, "zone_sea_1m_share"] == pytest.approx(60 / 70, abs=1e-9)
    assert p.loc[0, "zone_sea_1m_rise_0p5m_share"] == pytest.approx(40 / 70, abs=1e-9)
    assert p.loc[2, "zone_sea_1m_rise_2m_share"] == 0.0
    # monotone scenarios: more rise never floods less
    sc = p[["zone_sea_1m_rise_0p5m_m2", "zone_sea_1m_rise_1m_m2", "zone_sea_1m_rise_2m_m2"]].to_numpy()
    assert (np.diff(sc, axis=1) >= -1e-9).all()
    # union: parcel 1 breaches by shore strip (x 197..203) and sea (x <= 250): union is x 190..250
    assert p.loc[0, "conflict_m2"] == pytest.approx(60 / 70 * p.loc[0, "covered_m2"], rel=1e-9)
    assert p["verdict"].tolist() == ["conflict", "conflict", "conflict", "consistent", "consistent"]
    assert "inside flood high" in p.loc[1, "reasons"]
    import rasterio

    with rasterio.open(res.out_dir / "conflict.tif") as ds:
        c = ds.read(1)
    # bit 1 = slope, bit 2 = shore strip, bit 4 = flood_high, bit 8 = sea_1m (docs/outputs.md)
    assert (c[c != 255] & 4).any() and (c[c != 255] & 8).any() and (c[c != 255] & 2).any()
    assert (res.out_dir / "zones" / "zone_shore_strip.gpkg").exists()


def test_hand_zone_and_derived_features(tmp_path):
    # HAND (Renno et al. 2008) on a V-valley draining south: HAND = s |x - x_channel| (docs/references.md §9);
    # with s = 0.1 and max_hand_m = 2 the zone is the strip within 20 m of the channel.
    n, h = 60, 10.0
    xc = (np.arange(n) + 0.5) * h
    X, Y = np.meshgrid(xc, xc)
    z = 0.1 * np.abs(X - 305.0) + 0.02 * (n * h - Y) + 10  # rows go south; ground falls southwards
    dem = write_raster(tmp_path / "dem.tif", z, crs=UTM)
    polys = [shapely.box(X0 + 200, Y0 - 300, X0 + 400, Y0 - 200)]
    parcels = write_parcels(tmp_path / "p.gpkg", polys, pid=[1], zoning=["R"])
    (tmp_path / "r.toml").write_text("""
[rulebook]
class_field = "zoning"
id_field = "pid"
[classes.res]
values = ["R"]
forbidden_zones = ["valley_floor"]
[zones.valley_floor]
kind = "hand"
max_hand_m = 2.0
channel_area_m2 = 20000
[zones.stream_strip]
kind = "easement"
derive = "streams"
channel_area_m2 = 20000
width_m = 15.0
""")
    res = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "out", make_report=False, zone_polygons=True)
    p = res.parcels
    # channel cells at x = 300..310 (centre 305); HAND <= 2 m for centres within 20 m: x in 280..330 -> 5 columns
    assert p.loc[0, "zone_valley_floor_share"] == pytest.approx(50 / 200, abs=1e-9)
    assert p.loc[0, "verdict"] == "conflict"
    assert (res.out_dir / "zones" / "derived_streams.gpkg").exists()
    assert (res.out_dir / "zones" / "zone_valley_floor.gpkg").exists()
    # raster strip (docs/scale.md, "Hazard zones"): cell centres within 15 m on the ground of the channel centre x = 305 ->
    # the channel column and its two neighbours (10 m / 0.9996 UTM scale away), 30 of the parcel's 200 m
    assert p.loc[0, "zone_stream_strip_share"] == pytest.approx(30 / 200, abs=1e-9)
    # without the option the cell zones stay rasters: no polygons written, only zones/cells.tif (docs/outputs.md)
    res2 = audit(dem, parcels, tmp_path / "r.toml", tmp_path / "out2", make_report=False)
    assert sorted(q.name for q in (res2.out_dir / "zones").iterdir()) == ["cells.tif"]
    assert res2.summary["cell_zone_bits"] == ["valley_floor", "stream_strip"]  # rulebook order
    import rasterio

    with rasterio.open(res2.out_dir / "zones" / "cells.tif") as ds:
        cells = ds.read(1, window=ds.window(*polys[0].bounds))
    # inside the parcel: the same cells as the zone shares above, 5 columns of HAND <= 2 m and 3 of the strip
    assert int(((cells & 1) > 0).sum()) == 50
    assert int(((cells & 2) > 0).sum()) == 30
    assert res2.parcels["zone_valley_floor_share"].tolist() == p["zone_valley_floor_share"].tolist()


def test_bad_zone_inputs(tmp_path):
    # Common practice (input validation): clear message naming file/feature, non-zero exit, nothing written.
    import geopandas as gpd

    dem, parcels, rules, _ = _coast_case(tmp_path)
    runner = CliRunner()

    def run(out):
        return runner.invoke(
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
            ],
        )

    # a line layer with no CRS
    gpd.GeoDataFrame({"name": ["s"]}, geometry=[shapely.LineString([(X0, Y0), (X0, Y0 - 10)])]).to_file(
        tmp_path / "shore.gpkg"
    )
    r = run("o1")
    assert r.exit_code == 3 and "shore.gpkg" in r.output and "no CRS" in r.output
    assert not (tmp_path / "o1").exists()
    # an empty hazard layer
    gpd.GeoDataFrame({"name": []}, geometry=[], crs=UTM).to_file(tmp_path / "shore.gpkg")
    r = run("o2")
    assert r.exit_code == 3 and "no features" in r.output
    # level attribute non-numeric
    _coast_case(tmp_path)
    gpd.GeoDataFrame(
        {"lvl": ["high", "1"]},
        geometry=[shapely.box(X0, Y0 - 10, X0 + 10, Y0), shapely.box(X0, Y0 - 30, X0 + 10, Y0 - 20)],
        crs=UTM,
    ).to_file(tmp_path / "flood.gpkg")
    r = run("o3")
    assert r.exit_code == 3 and "'lvl' must be numeric" in r.output and "[1]" in r.output
    # level attribute missing
    gpd.GeoDataFrame({"other": [1]}, geometry=[shapely.box(X0, Y0 - 10, X0 + 10, Y0)], crs=UTM).to_file(
        tmp_path / "flood.gpkg"
    )
    r = run("o4")
    assert r.exit_code == 3 and "no attribute 'lvl'" in r.output
    assert not any((tmp_path / o).exists() for o in ("o1", "o2", "o3", "o4"))


def test_bad_sea_point_and_scenarios(tmp_path):
    dem, parcels, rules, _ = _coast_case(tmp_path, scenarios="[1.0, 0.5]")
    with pytest.raises(RuleFileError, match=r"scenarios_m.*not increasing"):
        audit(dem, parcels, rules, tmp_path / "o", make_report=False)
    dem, parcels, rules, _ = _coast_case(tmp_path)
    text = rules.read_text().replace('kind = "sea_rise"', 'kind = "sea_rise"\nsea_point = [10.0, 20.0]')
    rules.write_text(text)
    with pytest.raises(InputDataError, match="sea_point .* outside the DEM"):
        audit(dem, parcels, rules, tmp_path / "o", make_report=False)
    assert not (tmp_path / "o").exists()
