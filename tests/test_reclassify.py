"""Tests for landcheck.verdicts.reclassify: drafted split of conflicting parcels into compliant and non-compliant parts."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_raster
from rasterio.transform import from_origin

from landcheck.core.window_pass import WindowJob as _WindowJob
from landcheck.core.window_pass import build_plan as _build_plan
from landcheck.errors import InputDataError, RuleFileError
from landcheck.geo.grid import iter_windows
from landcheck.inputs.dem import open_dem
from landcheck.inputs.layers import read_parcels
from landcheck.inputs.rulebook import load_rules
from landcheck.overlay.sums import ROLE_FORBIDDEN_PIECE, Totals
from landcheck.terrain.slope import SlopeMethod
from landcheck.verdicts.evaluate import evaluate_parcels, parcel_rules
from landcheck.verdicts.reclassify import (
    PART_COMPLIANT,
    PART_NON_COMPLIANT,
    draft_reclassification,
)
from landcheck.zones.prepare import ZoneColumn, ZoneSet

X0, Y0 = 400000.0, 1600000.0
X18 = 450.0  # the ramp's 18 % line (ramp_dem: slope = 0.04 x %), a cell boundary

RULES = """
[rulebook]
class_field = "zoning"
id_field = "pid"
min_evaluated_share = 0.5

[zones.wet]
kind = "hand"
max_hand_m = 5

[classes.residential]
values = ["R"]
max_slope_pct = 18
forbidden_zones = ["wet"]
designated_class = "forest"

[classes.farmland]
values = ["A"]
max_slope_pct = 18

[classes.forest]
values = ["F", "F2"]
development = false
"""


def _ground_m2(g) -> float:
    """Ground area on the WGS84 ellipsoid (pyproj.Geod, Karney 2013) of a polygon in UTM 51N."""
    import pyproj

    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    ll = shapely.transform(shapely.segmentize(g, 5.0), lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
    return abs(pyproj.Geod(ellps="WGS84").geometry_area_perimeter(ll)[0])


def _setup(tmp_path, dem_path, geoms, zoning, *, rules_text=RULES, zones_fn=None, pieces=()):
    """The audit's preparation and window pass (baseline verdicts); ``pieces`` are (parcel, polygon) pairs
    standing for forbidden vector-zone pieces."""
    parcels_path = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(101, 101 + len(geoms)), zoning=zoning)
    rp = tmp_path / "rules.toml"
    rp.write_text(rules_text)
    dem = open_dem(dem_path)
    g = dem.grid
    rules = load_rules(rp)
    frame = read_parcels(
        parcels_path, class_field=rules.class_field, id_field=rules.id_field, target_crs_wkt=g.crs_wkt
    ).frame
    from landcheck.geo.ground_area import ground_areas

    area_m2, factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    zones = zones_fn(g) if zones_fn else None
    geo = np.asarray(frame.geometry.values)
    pp = np.array([p for p, _ in pieces], np.int64)
    all_geoms = np.concatenate([geo, np.array([q for _, q in pieces], dtype=object)]) if pieces else geo
    plan = _build_plan(rules, pr.class_name, factor, 1.0, zones, pp, np.full(len(pp), ROLE_FORBIDDEN_PIECE, np.int64))
    job = _WindowJob(dem, SlopeMethod.HORN, all_geoms, plan, zones)
    totals = Totals(len(frame), len(plan.thresholds_pct), plan.n_cols, plan.n_classes)
    for win in iter_windows(g.height, g.width, 1024):
        totals.add(job(win)[0])
    cols = zones.columns if zones is not None else ()
    base = evaluate_parcels(
        totals, plan, rules, pr, area_m2, shapely.is_empty(geo), frame["class_value"].to_numpy(), cols
    )
    base.insert(0, "parcel_id", frame["parcel_id"].to_numpy())
    return {"dem": dem, "geoms": all_geoms, "plan": plan, "rules": rules, "pr": pr, "zones": zones, "base": base}


def _draft(s, mmu=0.0):
    return draft_reclassification(
        s["dem"], SlopeMethod.HORN, s["base"], s["geoms"], s["plan"], s["rules"], s["pr"], zones=s["zones"], mmu_m2=mmu
    )


def test_split_on_the_ramp_matches_the_closed_form(tmp_path):
    wet_rows = slice(50, 56)  # a raster zone the residential class forbids: rows 50-55 (y 500-560 m below top)

    def zones_fn(g):
        bits = np.zeros((g.height, g.width), np.uint32)
        bits[wet_rows, :] = 1
        return ZoneSet(g, [ZoneColumn("wet", "wet", 0, 0)], bits, None, {}, [], {})

    span = shapely.Polygon([(X0 + 300, Y0 - 420), (X0 + 600, Y0 - 460), (X0 + 580, Y0 - 640), (X0 + 330, Y0 - 600)])
    flood_piece = shapely.box(X0 + 320, Y0 - 560, X0 + 380, Y0 - 470).intersection(span)  # forbidden vector piece
    flat = shapely.box(X0 + 100, Y0 - 300, X0 + 200, Y0 - 200)  # 4-8 %: consistent, not drafted
    steep_forest = shapely.box(X0 + 700, Y0 - 300, X0 + 800, Y0 - 200)  # over 18 %, but forest has no limit
    s = _setup(
        tmp_path,
        ramp_dem(tmp_path / "ramp.tif", n=100),
        [span, flat, steep_forest],
        ["R", "R", "F"],
        zones_fn=zones_fn,
        pieces=[(0, flood_piece)],
    )
    assert s["base"]["verdict"].tolist() == ["conflict", "consistent", "consistent"]
    parts, moves = _draft(s)
    assert parts["parcel_id"].tolist() == [101, 101] and parts["part"].tolist() == [PART_COMPLIANT, PART_NON_COMPLIANT]
    c, nc = parts.geometry.values
    # Source: closed form: the breach of this parcel is the half-plane x >= 450 m (the ramp's 18 % line) united
    # with the forbidden raster rows and the forbidden vector piece, clipped to the parcel (shapely).
    rows = shapely.box(X0, Y0 - 560, X0 + 1000, Y0 - 500)
    truth = span.intersection(shapely.union_all([shapely.box(X0 + X18, Y0 - 1000, X0 + 1000, Y0), rows, flood_piece]))
    # tolerance: the overlay snap-rounds to 1e-7 of a cell (1 micrometre): at most perimeter x 1e-6 m
    assert nc.symmetric_difference(truth).area < span.length * 1e-6
    assert c.symmetric_difference(span.difference(truth)).area < span.length * 1e-6
    assert nc.area > 0.2 * span.area and c.area > 0.2 * span.area  # both parts are substantial
    # Source: pyproj.Geod ground areas; the parts add up to the parcel (geodesic areas are additive; 1e-8 covers the edge densification).
    assert parts["area_m2"].sum() == pytest.approx(_ground_m2(span), rel=1e-8)
    assert parts["area_m2"].iloc[1] == pytest.approx(_ground_m2(truth), rel=1e-8)
    # and the non-compliant part is the audit's own conflict area (exact coverage; areal factor vs geodesic 1e-6)
    assert parts["area_m2"].iloc[1] == pytest.approx(s["base"]["conflict_m2"].iloc[0], rel=1e-6)
    assert parts["proposed_class"].tolist() == ["residential", "forest"]
    assert parts["proposed_value"].tolist() == ["R", "F"]  # the designated class's first value
    assert moves.to_dict(orient="records") == [
        {
            "from_class": "residential",
            "to_class": "forest",
            "parcels": 1,
            "area_m2": pytest.approx(parts["area_m2"].iloc[1]),
        }
    ]
    # the layer round-trips through a GeoPackage (open standard) with its columns and CRS
    import geopandas as gpd

    from landcheck.outputs.writers import write_gpkg

    write_gpkg(tmp_path / "reclassification.gpkg", parts, layer="parts")
    back = gpd.read_file(tmp_path / "reclassification.gpkg", layer="parts")
    assert list(back.columns) == list(parts.columns) and back.crs.to_epsg() == 32651
    np.testing.assert_allclose(back["area_m2"], parts["area_m2"])


def test_minimum_mapping_unit_merges_slivers(tmp_path):
    dem = ramp_dem(tmp_path / "ramp.tif", n=100)
    pokes_over = shapely.box(X0 + 300, Y0 - 300, X0 + 452, Y0 - 200)  # 2 m x 100 m = 200 m² over the line
    mostly_over = shapely.box(X0 + 448, Y0 - 600, X0 + 640, Y0 - 500)  # 2 m x 100 m = 200 m² under the line
    s = _setup(tmp_path, dem, [pokes_over, mostly_over], ["R", "R"])
    assert s["base"]["verdict"].tolist() == ["conflict", "conflict"]  # tolerance 0
    parts0, _ = _draft(s, mmu=0.0)
    assert parts0["part"].tolist() == [PART_COMPLIANT, PART_NON_COMPLIANT] * 2
    # Source: closed form (strip widths on the ramp) and the documented merge rule: a part below the unit
    # joins the other part, so each parcel keeps one part with its whole area (pyproj.Geod; 1e-8).
    parts, moves = _draft(s, mmu=500.0)
    assert parts["part"].tolist() == [PART_COMPLIANT, PART_NON_COMPLIANT]
    assert parts["area_m2"].iloc[0] == pytest.approx(_ground_m2(pokes_over), rel=1e-8)
    assert parts["area_m2"].iloc[1] == pytest.approx(_ground_m2(mostly_over), rel=1e-8)
    assert parts0["area_m2"].iloc[1] == pytest.approx(
        _ground_m2(shapely.box(X0 + 450, Y0 - 300, X0 + 452, Y0 - 200)), rel=1e-8
    )
    assert moves["area_m2"].sum() == pytest.approx(_ground_m2(mostly_over), rel=1e-8)


def test_real_terrain_parts_add_up_and_match_the_exact_breach(tmp_path):
    from matplotlib import cbook

    # Source: matplotlib's sample DEM (jacksboro_fault_dem.npz), a real 3-arc-second terrain, placed here on a
    # fictional projected 30 m grid so the breach mask is irregular; slopes then reach ~90 %.
    z = cbook.get_sample_data("jacksboro_fault_dem.npz")["elevation"][100:180, 150:240].astype("float64")
    h = 30.0
    dem = write_raster(tmp_path / "real.tif", z, transform=from_origin(X0, Y0, h, h))
    rng = np.random.default_rng(4)
    geoms = []
    for _k in range(6):
        cx, cy = X0 + rng.uniform(400, 2300), Y0 - rng.uniform(400, 2000)
        box = shapely.box(
            cx - rng.uniform(150, 350),
            cy - rng.uniform(150, 350),
            cx + rng.uniform(150, 350),
            cy + rng.uniform(150, 350),
        )
        geoms.append(shapely.affinity.rotate(box, float(rng.uniform(0, 90))))
    text = RULES.replace('max_slope_pct = 18\nforbidden_zones = ["wet"]', "max_slope_pct = 35")
    s = _setup(tmp_path, dem, geoms, ["R"] * len(geoms), rules_text=text)
    base = s["base"]
    conflicted = base.index[base["verdict"] == "conflict"].to_numpy()
    assert len(conflicted) >= 3
    parts, _ = _draft(s)
    mmu = 3 * h * h
    parts_mmu, _ = _draft(s, mmu=mmu)
    cells = np.array(
        [
            shapely.box(X0 + c * h, Y0 - (r + 1) * h, X0 + (c + 1) * h, Y0 - r * h)
            for r in range(z.shape[0])
            for c in range(z.shape[1])
        ],
        dtype=object,
    )
    for i in conflicted:
        pid = base["parcel_id"].iloc[i]
        p0 = parts[parts["parcel_id"] == pid].set_index("part")["area_m2"]
        pm = parts_mmu[parts_mmu["parcel_id"] == pid]
        # Source: pyproj.Geod: compliant + non-compliant = the parcel (geodesic areas are additive; 1e-8 covers the edge densification)
        assert p0.sum() == pytest.approx(_ground_m2(geoms[i]), rel=1e-8)
        assert pm["area_m2"].sum() == pytest.approx(_ground_m2(geoms[i]), rel=1e-8)
        # without a mapping unit the non-compliant part is the exact over-limit area (audit, exact coverage)
        assert p0.get(PART_NON_COMPLIANT, 0.0) == pytest.approx(base["over_limit_m2"].iloc[i], rel=1e-6)
        # with one, it moves by at most one cell's area per cell on the parcel's boundary (cells the boundary
        # crosses, counted here with shapely on the grid) and every remaining polygon reaches the unit
        n_edge = int(shapely.intersects(cells, geoms[i].boundary).sum())
        nc = pm.loc[pm["part"] == PART_NON_COMPLIANT, "area_m2"].sum()
        assert abs(nc - base["over_limit_m2"].iloc[i]) <= n_edge * h * h * 1.001
        for geom in pm.geometry.values:
            for poly in shapely.get_parts(geom):
                assert _ground_m2(poly) >= mmu * (1 - 1e-9)
    # the mapping unit changed something on this terrain (so the check above is not empty)
    assert not np.allclose(
        parts.groupby("part")["area_m2"].sum().to_numpy(), parts_mmu.groupby("part")["area_m2"].sum().to_numpy()
    )


def test_missing_designated_class_and_bad_unit(tmp_path):
    dem = ramp_dem(tmp_path / "ramp.tif", n=100)
    s = _setup(tmp_path, dem, [shapely.box(X0 + 500, Y0 - 300, X0 + 600, Y0 - 200)], ["A"])
    assert s["base"]["verdict"].iloc[0] == "conflict"
    with pytest.raises(
        RuleFileError,
        match=r"class 'farmland' has 1 conflicting parcels but no designated_class; "
        r"add designated_class = \"<class>\" to \[classes.farmland\]",
    ):
        _draft(s)
    with pytest.raises(InputDataError, match=r"minimum mapping unit -5.0; expected an area in m² >= 0"):
        _draft(s, mmu=-5.0)
