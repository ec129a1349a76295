"""Tests for landcheck.verdicts.capability: slope-class x hazard capability map and its per-class areas."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from _support import ramp_dem, write_parcels, write_rules

from landcheck.core.audit import audit
from landcheck.core.window_pass import build_plan as _build_plan
from landcheck.errors import RuleFileError
from landcheck.geo.grid import iter_windows
from landcheck.geo.ground_area import ground_areas
from landcheck.inputs.dem import open_dem
from landcheck.inputs.layers import read_parcels
from landcheck.inputs.rulebook import load_rules
from landcheck.terrain.slope import SlopeMethod
from landcheck.verdicts.capability import (
    HAZARD_FLAG,
    NO_VALUE,
    SEA,
    capability_spec,
    run_capability,
    write_capability_legend,
)
from landcheck.verdicts.evaluate import parcel_rules
from landcheck.zones.prepare import ZoneColumn, ZoneSet

X0, Y0 = 400000.0, 1600000.0
H = 10.0
# Source: land-use planning slope classes 0-3-8-18-30-50 % (docs/references.md §7), written out here
# independently of landcheck.terrain.slope_classes; a class holds slopes from its lower edge ("or over").
PLANNING_LOWER_EDGES_PCT = [3.0, 8.0, 18.0, 30.0, 50.0]

RULES_WITH_ZONES = """
[rulebook]
class_field = "zoning"
id_field = "pid"
min_evaluated_share = 0.5

[layers]
flood_map = "flood.gpkg"

[zones.wet]
kind = "hand"
max_hand_m = 5

[zones.flood]
kind = "flood_polygons"
layer = "flood_map"
level_field = "level"
min_level = 1

[classes.residential]
values = ["R"]
max_slope_pct = 18

[classes.forest]
values = ["F"]
development = false
"""


def _ground_m2(g) -> float:
    """Ground area on the WGS84 ellipsoid (pyproj.Geod, Karney 2013) of a polygon in UTM 51N."""
    import pyproj

    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    ll = shapely.transform(shapely.segmentize(g, 5.0), lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
    return abs(pyproj.Geod(ellps="WGS84").geometry_area_perimeter(ll)[0])


def _expected_class(slope_pct: np.ndarray) -> np.ndarray:
    return 1 + (np.asarray(slope_pct)[..., None] >= np.array(PLANNING_LOWER_EDGES_PCT)).sum(axis=-1)


def _prepare(tmp_path, geoms, zoning, rules_text=None, *, n=130, zones_fn=None):
    dem_path = ramp_dem(tmp_path / "ramp.tif", n=n)
    parcels_path = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, len(geoms) + 1), zoning=zoning)
    rules_path = (
        write_rules(tmp_path / "rules.toml", text=rules_text) if rules_text else write_rules(tmp_path / "rules.toml")
    )
    dem = open_dem(dem_path)
    g = dem.grid
    rules = load_rules(rules_path)
    frame = read_parcels(
        parcels_path, class_field=rules.class_field, id_field=rules.id_field, target_crs_wkt=g.crs_wkt
    ).frame
    area_m2, factor = ground_areas(frame, g.crs_wkt)
    pr = parcel_rules(rules, frame["class_value"].to_numpy())
    zones = zones_fn(g) if zones_fn else None
    plan = _build_plan(rules, pr.class_name, factor, 1.0, zones)
    return {
        "dem": dem,
        "dem_path": dem_path,
        "parcels_path": parcels_path,
        "rules_path": rules_path,
        "rules": rules,
        "geoms": np.asarray(frame.geometry.values),
        "plan": plan,
        "pr": pr,
        "zones": zones,
        "area_m2": area_m2,
    }


def _run(s, out, tile=1024, spec=None):
    g = s["dem"].grid
    spec = spec or capability_spec(s["rules"], s["zones"])
    table, totals = run_capability(
        s["dem"],
        list(iter_windows(g.height, g.width, tile)),
        s["geoms"],
        s["plan"],
        s["rules"],
        spec,
        out,
        method=SlopeMethod.HORN,
        zones=s["zones"],
        workers=1,
    )
    return table, totals, spec


def test_classes_at_known_slopes_on_the_ramp(tmp_path):
    s = _prepare(tmp_path, [shapely.box(X0 + 400, Y0 - 300, X0 + 500, Y0 - 200)], ["R"])
    table, _, spec = _run(s, tmp_path / "capability.tif")
    with rasterio.open(tmp_path / "capability.tif") as ds:
        codes = ds.read(1)
        assert ds.dtypes[0] == "uint8" and ds.nodata == NO_VALUE
        assert "planning-6" in ds.descriptions[0]
    n = codes.shape[1]
    # Source: closed form: the ramp's slope at cell column j is 0.04 x % with x = (j + 0.5) * 10 m (ramp_dem).
    slope = 0.04 * (np.arange(n) + 0.5) * H
    want = _expected_class(slope)
    # the column whose slope is exactly the 3 % break (float32 rounding decides it) is checked in
    # test_slope_classes; the outer ring has no slope (strict-window policy: docs/design.md)
    cols = np.flatnonzero(np.abs(slope - np.round(slope)) > 1e-6)[1:-1]
    cols = cols[np.min(np.abs(slope[cols, None] - np.array(PLANNING_LOWER_EDGES_PCT)), axis=1) > 1e-6]
    np.testing.assert_array_equal(codes[1:-1][:, cols], np.broadcast_to(want[cols], (n - 2, len(cols))))
    assert set(np.unique(want[cols]).tolist()) == {1, 2, 3, 4, 5, 6}  # every class is on this ramp
    assert (codes[0] == NO_VALUE).all() and (codes[:, -1] == NO_VALUE).all()
    # Source: closed form: the parcel spans x = 400..500 m; cells west of 450 m are 8-18 % (class 3), east
    # 18-30 % (class 4); areas on the ground by pyproj.Geod (tolerance 1e-6: centroid areal factor vs geodesic).
    r = table[table["class_name"] == "residential"].set_index("code")["area_m2"]
    assert r[3] == pytest.approx(_ground_m2(shapely.box(X0 + 400, Y0 - 300, X0 + 450, Y0 - 200)), rel=1e-6)
    assert r[4] == pytest.approx(_ground_m2(shapely.box(X0 + 450, Y0 - 300, X0 + 500, Y0 - 200)), rel=1e-6)
    assert r.drop([3, 4]).sum() == pytest.approx(0.0, abs=1e-6)
    # legend: one row per code, JSON and CSV agree
    csv, js = write_capability_legend(tmp_path, spec)
    leg = pd.read_csv(csv)
    data = json.loads(js.read_text())
    assert (
        leg["code"].tolist()
        == [c["code"] for c in data["codes"]]
        == [0, 1, 2, 3, 4, 5, 6, 129, 130, 131, 132, 133, 134, SEA]
    )
    assert data["scheme"] == "planning-6" and "18" in data["source"]


def test_hazard_flag_from_raster_and_vector_zones(tmp_path):
    # vector zone: cells of columns 20-22 fully, column 23 at 0.7; row 20 at 0.7, rows 21-29 fully
    flood = shapely.box(X0 + 200, Y0 - 300, X0 + 237, Y0 - 203)

    def zones_fn(g):
        bits = np.zeros((g.height, g.width), np.uint32)
        bits[60:70, 5:15] = 1  # channel 0: the "wet" raster zone
        cols = [ZoneColumn("wet", "wet", 0, 0), ZoneColumn("flood", "flood", 1, -1, {None: flood})]
        return ZoneSet(g, cols, bits, None, {}, [], {})

    s = _prepare(
        tmp_path,
        [shapely.box(X0 + 20, Y0 - 1000, X0 + 1000, Y0 - 20)],
        ["R"],
        RULES_WITH_ZONES,
        n=110,
        zones_fn=zones_fn,
    )
    _table, _, spec = _run(s, tmp_path / "cap.tif")
    with rasterio.open(tmp_path / "cap.tif") as ds:
        codes = ds.read(1)
    flagged = (codes & HAZARD_FLAG) != 0
    # Source: exact intersection area of the zone with each cell (shapely) and the documented rule
    # "a vector zone flags a cell it covers by at least half of the cell's area".
    want_vec = np.zeros_like(flagged)
    for r in range(18, 32):
        for c in range(18, 26):
            cell = shapely.box(X0 + c * H, Y0 - (r + 1) * H, X0 + (c + 1) * H, Y0 - r * H)
            want_vec[r, c] = cell.intersection(flood).area / cell.area >= 0.5
    assert not want_vec[20, 23] and want_vec[20, 22] and want_vec[21, 23]  # 0.49 vs 0.7 cover
    want = want_vec.copy()
    want[60:70, 5:15] = True
    want[codes == NO_VALUE] = False  # no slope value: no class, no flag
    np.testing.assert_array_equal(flagged, want)
    # the slope class survives the flag: code & 127 is the class of the cell's slope
    slope = 0.04 * (np.arange(codes.shape[1]) + 0.5) * H
    np.testing.assert_array_equal((codes[60:70, 5:15] & 127), np.broadcast_to(_expected_class(slope[5:15]), (10, 10)))
    assert spec.hazard_zones == ("wet", "flood")
    only_wet = capability_spec(s["rules"], s["zones"], hazard_zones=["wet"])
    assert only_wet.hazard_geom is None and only_wet.hazard_channels == 1


def test_per_class_areas_add_up_to_covered_areas(tmp_path):
    geoms = [
        shapely.Polygon([(X0 + 95, Y0 - 40), (X0 + 630, Y0 - 170), (X0 + 250, Y0 - 610)]),
        shapely.box(X0 + 700, Y0 - 900, X0 + 1150, Y0 - 500),
        shapely.box(X0 - 60, Y0 - 300, X0 + 80, Y0 - 100),  # partly outside the DEM and on its NaN ring
        shapely.box(X0 + 300, Y0 - 1100, X0 + 420, Y0 - 950),
    ]
    s = _prepare(tmp_path, geoms, ["R", "R", "F", "F"], n=120)
    table, totals, _ = _run(s, None)
    res = audit(s["dem_path"], s["parcels_path"], s["rules_path"], tmp_path / "audit", make_report=False)
    by_class = res.parcels.groupby("class_name")["covered_m2"].sum()
    sums = table.groupby("class_name")["area_m2"].sum()
    # Source: invariant: the capability codes partition each parcel's covered area (all codes, 0 included),
    # with the audit's exact-coverage weights.
    for name in ("residential", "forest"):
        assert sums[name] == pytest.approx(by_class[name], rel=1e-12)
    # Source: pyproj.Geod (Karney 2013) ground area of the parcels fully inside the DEM; tolerance 1e-6
    # (planar cell areas x the projection's areal factor at the centroid vs the geodesic polygon).
    ground = _ground_m2
    assert sums["residential"] == pytest.approx(ground(geoms[0]) + ground(geoms[1]), rel=1e-6)
    # part of parcel 3 lies on cells without a slope: code 0 carries it
    f = table[table["class_name"] == "forest"].set_index("code")["area_m2"]
    ring_part = shapely.box(X0, Y0 - 300, X0 + 10, Y0 - 100)  # inside the DEM, first column: no slope
    assert f[NO_VALUE] == pytest.approx(ground(ring_part), rel=1e-6)
    # Source: invariant: windows of 7 x 5 cells give the same sums (addition order only)
    _, tiled, _ = _run(s, None, tile=7)
    np.testing.assert_allclose(tiled.area_m2, totals.area_m2, rtol=1e-12, atol=1e-9)


def test_bad_scheme_and_zone_names(tmp_path):
    s = _prepare(tmp_path, [shapely.box(X0 + 400, Y0 - 300, X0 + 500, Y0 - 200)], ["R"], n=30)
    with pytest.raises(RuleFileError, match=r"unknown slope-class scheme 'usda-9'; choose one of: planning-6"):
        capability_spec(s["rules"], None, scheme="usda-9")
    with pytest.raises(RuleFileError, match=r"capability hazard zone 'levee' is not defined"):
        capability_spec(s["rules"], None, hazard_zones=["levee"])
    with pytest.raises(RuleFileError, match=r"slope-class breaks must start at 0 and increase strictly"):
        capability_spec(s["rules"], None, scheme=[18, 8])
    custom = capability_spec(s["rules"], None, scheme=[8, 18, 30])
    assert custom.scheme.lower_pct == (0.0, 8.0, 18.0, 30.0)
