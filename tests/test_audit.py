"""The audit against closed-form shares, geodesic areas and invariants."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_rules
from shapely import affinity

from landcheck.core.audit import audit
from landcheck.errors import LandcheckWarning

X0, Y0 = 400000.0, 1600000.0
# slope(x) = 0.04 x percent with x the distance east of the DEM's west edge (see ramp_dem): 18 % at x = 450 m,
# which is a cell boundary, so "slope >= 18 %" is exactly the half-plane x >= 450 m at cell resolution.
X18 = 450.0


def _run(tmp_path, geoms, zoning, *, name="out", rules_kw=None, **kw):
    dem = ramp_dem(tmp_path / "dem.tif")
    parcels = write_parcels(tmp_path / f"{name}.gpkg", geoms, pid=np.arange(1, len(geoms) + 1), zoning=zoning)
    rules = write_rules(tmp_path / f"{name}.toml", **(rules_kw or {}))
    return audit(dem, parcels, rules, tmp_path / name, make_report=False, **kw)


def _analytic_share_over(poly) -> float:
    """Share of the polygon's area east of X18 (closed form: exact polygon clipping by a half-plane)."""
    east = poly.intersection(shapely.box(X0 + X18, Y0 - 1e6, X0 + 1e6, Y0 + 1e6))
    return east.area / poly.area


def _parcels():
    rect = shapely.box(X0 + 420, Y0 - 700, X0 + 520, Y0 - 600)  # 70 % east of the 18 % line
    rotated = affinity.rotate(shapely.box(X0 + 380, Y0 - 500, X0 + 540, Y0 - 430), 27, origin="centroid")
    small = affinity.rotate(shapely.box(X0 + 441.3, Y0 - 300, X0 + 466.3, Y0 - 280), 41, origin="centroid")  # 0.05 ha
    tri = shapely.Polygon([(X0 + 300, Y0 - 900), (X0 + 700, Y0 - 880), (X0 + 480, Y0 - 760)])
    return [rect, rotated, small, tri]


def test_exact_shares_match_closed_form(tmp_path):
    # Source: closed form — on this ramp the cells at or over 18 % are exactly those east of x = 450 m,
    # so the true share over the limit is the polygon's area fraction east of that line (shapely clip).
    geoms = _parcels()
    res = _run(tmp_path, geoms, ["R"] * 4)
    p = res.parcels
    truth = np.array([_analytic_share_over(g) for g in geoms])
    np.testing.assert_allclose(p["over_limit_share"].to_numpy(), truth, atol=1e-9)
    assert truth[0] == pytest.approx(0.7)

    # How far cell-centre zonal statistics (rasterstats, all_touched=False) land from the truth:
    # recorded here so the gap is visible; on the 0.05 ha parcel it is large.
    import rasterio
    from rasterstats import zonal_stats

    with rasterio.open(res.out_dir / "slope_pct.tif") as ds:
        slope = ds.read(1)
        transform = ds.transform
    over = np.where(np.isfinite(slope), (slope >= 18).astype("float64"), np.nan)
    zs = zonal_stats(geoms, over, affine=transform, stats=["mean"], nodata=np.nan)
    centre = np.array([z["mean"] if z["mean"] is not None else np.nan for z in zs])
    gap = np.abs(centre - truth)
    assert np.nanmax(gap) > 1e-3  # the cell-centre method is not exact here
    print("cell-centre share error per parcel:", np.round(gap, 4).tolist())


def test_areas_match_geodesic_area_projected(tmp_path):
    # Reference: pyproj.Geod.geometry_area_perimeter (Karney 2013) on the parcels in geographic coordinates.
    import pyproj

    geoms = _parcels()
    res = _run(tmp_path, geoms, ["R"] * 4)
    geod = pyproj.Geod(ellps="WGS84")
    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    for g, got_area, got_cov in zip(geoms, res.parcels["area_m2"], res.parcels["covered_m2"]):
        ll = shapely.transform(shapely.segmentize(g, 5.0), lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
        ref = abs(geod.geometry_area_perimeter(ll)[0])
        assert got_area == pytest.approx(ref, rel=1e-6)
        # exact coverage x cell area x areal-scale correction gives the same ground area
        assert got_cov == pytest.approx(ref, rel=2e-6)
        # while the map-plane area differs by the UTM scale factor (~0.9996^2 here): the correction matters
        assert abs(g.area / ref - 1) > 1e-4


def test_areas_on_geographic_raster(tmp_path):
    # Reference: pyproj.Geod polygon area; cell areas from the ellipsoid band formula (docs/references.md §12).
    import pyproj
    from _support import write_raster
    from rasterio.transform import from_origin

    d = 1 / 3600
    n = 80
    z = np.tile(np.arange(n) * 2.0, (n, 1))  # ~6.5 % on 1" cells at 45 N east-west
    dem = write_raster(tmp_path / "geo.tif", z, transform=from_origin(10.0, 45.02, d, d), crs="EPSG:4326")
    geoms = [
        affinity.rotate(shapely.box(10.005, 45.005, 10.015, 45.012), 20, origin="centroid"),
        shapely.Polygon([(10.002, 45.001), (10.02, 45.003), (10.01, 45.018)]),
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, crs="EPSG:4326", pid=[1, 2], zoning=["R", "R"])
    rules = write_rules(tmp_path / "r.toml")
    res = audit(dem, parcels, rules, tmp_path / "out", make_report=False)
    geod = pyproj.Geod(ellps="WGS84")
    for g, area, cov in zip(geoms, res.parcels["area_m2"], res.parcels["covered_m2"]):
        # edges are straight in longitude/latitude (GIS convention); densified, the geodesic polygon follows them
        ref = abs(geod.geometry_area_perimeter(shapely.segmentize(g, 1e-5))[0])
        assert area == pytest.approx(ref, rel=1e-6)
        # coverage in degree space x exact band areas: within 1e-6 of the geodesic area
        assert cov == pytest.approx(ref, rel=1e-6)


def test_verdicts_tolerance_min_breach_review(tmp_path):
    # Hand-worked cases on the ramp (common practice rule semantics, docs/design.md):
    # A: 10 % over -> conflict with tolerance 5 %; B: entirely below 15 % -> consistent;
    # C: reaches 15-18 % (band 3 points) but not 18 % -> review; D: 1 % over the limit (within the 5 % tolerance)
    # but 26 % within the band -> review; with no band D is consistent.
    A = shapely.box(X0 + 360, Y0 - 200, X0 + 460, Y0 - 100)  # x 360..460: 10 % east of 450
    B = shapely.box(X0 + 100, Y0 - 200, X0 + 300, Y0 - 100)  # max 12 %
    C = shapely.box(X0 + 300, Y0 - 400, X0 + 440, Y0 - 300)  # up to 17.6 %
    D = shapely.box(X0 + 150, Y0 - 600, X0 + 453, Y0 - 500)  # 3/303 ~ 1 % east of 450
    res = _run(tmp_path, [A, B, C, D], ["R"] * 4, rules_kw={"tol": 5.0, "band": 3.0})
    assert res.parcels["verdict"].tolist() == ["conflict", "consistent", "review", "review"]
    assert res.parcels["over_limit_share"][3] == pytest.approx(3 / 303, abs=1e-9)
    res0 = _run(tmp_path, [D], ["R"], name="o0", rules_kw={"tol": 5.0, "band": 0.0})
    assert res0.parcels["verdict"].tolist() == ["consistent"]
    assert "slope ≥ 18 %" in res.parcels["reasons"][0]
    # min_breach_m2 larger than A's 1000 m2 breach turns it into review (still near the limit)
    res2 = _run(tmp_path, [A], ["R"], name="o2", rules_kw={"tol": 5.0, "band": 3.0, "min_breach": 1500.0})
    assert res2.parcels["verdict"].tolist() == ["review"]


def test_parcel_order_and_tiles_do_not_change_results(tmp_path):
    # Invariant (common practice): shuffling parcel order and changing tile size / workers changes no per-parcel result.
    geoms = _parcels()
    a = _run(tmp_path, geoms, ["R", "R", "F", "R"], name="a", tile_cells=1024, workers=1)
    order = [2, 0, 3, 1]
    dem = tmp_path / "dem.tif"
    parcels = write_parcels(
        tmp_path / "b.gpkg",
        [geoms[i] for i in order],
        pid=np.array(order) + 1,
        zoning=[["R", "R", "F", "R"][i] for i in order],
    )
    b = audit(dem, parcels, tmp_path / "a.toml", tmp_path / "b", make_report=False, tile_cells=7, workers=2)
    cols = ["area_m2", "covered_m2", "evaluated_m2", "over_limit_m2", "slope_mean_pct", "conflict_m2"]
    bb = b.parcels.set_index("parcel_id").loc[a.parcels["parcel_id"]]
    np.testing.assert_allclose(bb[cols].to_numpy(float), a.parcels[cols].to_numpy(float), rtol=1e-12, atol=1e-6)
    assert bb["verdict"].tolist() == a.parcels["verdict"].tolist()


def test_raising_limit_never_adds_conflicts(tmp_path):
    # Invariant (common practice): a higher slope limit never adds conflicts or over-limit area.
    rng = np.random.default_rng(5)
    geoms = [
        affinity.rotate(shapely.box(X0 + x, Y0 - y, X0 + x + w, Y0 - y + 60), a, origin="centroid")
        for x, y, w, a in zip(
            rng.uniform(50, 900, 25), rng.uniform(100, 1100, 25), rng.uniform(30, 200, 25), rng.uniform(0, 90, 25)
        )
    ]
    prev = None
    for i, limit in enumerate((10.0, 18.0, 25.0, 35.0)):
        r = _run(tmp_path, geoms, ["R"] * 25, name=f"l{i}", rules_kw={"limit": limit})
        conf = (r.parcels["verdict"] == "conflict").to_numpy()
        over = r.parcels["over_limit_m2"].to_numpy()
        if prev is not None:
            assert not (conf & ~prev[0]).any()
            assert (over <= prev[1] + 1e-9).all()
        prev = (conf, over)


def test_cog_outputs_carry_overviews(tmp_path):
    # Source: GDAL COG driver, OVERVIEWS=AUTO with BLOCKSIZE=512: overview levels halve the raster until it
    # fits one 512-cell tile, so 1100 cells -> 550 (factor 2) -> 275 (factor 4): overviews [2, 4].
    import rasterio

    dem = ramp_dem(tmp_path / "dem.tif", n=1100, h=1.0)
    parcels = write_parcels(
        tmp_path / "p.gpkg", [shapely.box(X0 + 100, Y0 - 900, X0 + 900, Y0 - 100)], pid=np.array([1]), zoning=["R"]
    )
    res = audit(dem, parcels, write_rules(tmp_path / "r.toml"), tmp_path / "out", make_report=False)
    for name in ("slope_pct.tif", "conflict.tif"):
        with rasterio.open(res.out_dir / name) as ds:
            assert (ds.width, ds.height) == (1100, 1100)
            assert ds.overviews(1) == [2, 4], name
            assert ds.profile["blockxsize"] == ds.profile["blockysize"] == 512


def test_cog_deflate_holds_the_same_cells(tmp_path):
    # Source: GDAL COG driver (COMPRESS=ZSTD / DEFLATE are lossless, docs/references.md §20): the two COG
    # choices differ only in the codec, so every cell and every overview cell is equal.
    import rasterio

    dem = ramp_dem(tmp_path / "dem.tif", n=1100, h=1.0)
    parcels = write_parcels(
        tmp_path / "p.gpkg", [shapely.box(X0 + 100, Y0 - 900, X0 + 900, Y0 - 100)], pid=np.array([1]), zoning=["R"]
    )
    rules = write_rules(tmp_path / "r.toml")
    runs = {
        fmt: audit(dem, parcels, rules, tmp_path / fmt, make_report=False, rasters=fmt).out_dir
        for fmt in ("cog", "cog-deflate")
    }
    for name in ("slope_pct.tif", "conflict.tif"):
        with rasterio.open(runs["cog"] / name) as a, rasterio.open(runs["cog-deflate"] / name) as b:
            assert (a.profile["compress"], b.profile["compress"]) == ("zstd", "deflate")
            assert a.overviews(1) == b.overviews(1) == [2, 4]
            np.testing.assert_array_equal(a.read(1), b.read(1))
            np.testing.assert_array_equal(a.read(1, out_shape=(275, 275)), b.read(1, out_shape=(275, 275)))


def test_outputs_written_and_consistent(tmp_path):
    # Common practice: machine-readable outputs agree with each other.
    import geopandas as gpd
    import rasterio

    geoms = _parcels()
    with pytest.warns(LandcheckWarning, match=r"1 parcel has a class value with no rule \('X'\)"):
        res = _run(tmp_path, geoms, ["R", "R", "F", "X"])
    out = res.out_dir
    csv = pd.read_csv(out / "parcels.csv")
    gpkg = gpd.read_file(out / "parcels.gpkg", layer="parcels")
    summary = json.loads((out / "summary.json").read_text())
    assert list(csv["verdict"]) == list(gpkg["verdict"]) == list(res.parcels["verdict"])
    assert csv.loc[3, "verdict"] == "no_rule"
    assert summary["totals"]["verdict_counts"]["no_rule"] == 1
    assert "not a survey or legal determination" in summary["caution"]
    assert summary["manifest"]["rulebook"]["text"].startswith("\n[rulebook]")
    with rasterio.open(out / "slope_pct.tif") as ds:
        # docs/scale.md: the default COG is ZSTD level 1 (same size as DEFLATE level 1 here, half the time)
        assert ds.profile["tiled"] and ds.profile["compress"] == "zstd"
        # Source: GDAL COG driver, OVERVIEWS=AUTO: overviews are added only while the raster is larger than
        # one 512-cell tile, so this 120 x 120 raster has none (the next test checks a larger one)
        assert ds.overviews(1) == []
    with rasterio.open(out / "conflict.tif") as ds:
        c = ds.read(1)
        assert set(np.unique(c)) <= {0, 1, 255}
        assert (c == 1).any()
    classes = pd.read_csv(out / "classes.csv")
    res_row = classes[classes["class_name"] == "residential"].iloc[0]
    assert res_row["parcels"] == 2
    assert res_row["conflict_m2"] == pytest.approx(res.parcels.loc[:1, "conflict_m2"].sum())
