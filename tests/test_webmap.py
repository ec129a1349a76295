"""The interactive map's GeoJSON text against a plain reference of its encoding rules.

Source: docs/references.md §21 (RFC 7946 GeoJSON structure, IEEE 754 round-half-even, Douglas-Peucker as
GEOS applies it through shapely); the reference writer below is plain Python, independent of the map's code.

The rules (docstring of landcheck.evidence.webmap): each shape is simplified for display on its own
(shapely's topology-preserving simplifier, docs/references.md §21; a shape it would empty keeps its
original form), moved to display units u = (x - left) / q * kx, v = (y - bottom) / q, rounded to whole
units (ties to even, the sign of a zero kept: docs/references.md §21, IEEE 754) and written as RFC 7946
GeoJSON (docs/references.md §21) with whole numbers, no spaces, one Feature per present, non-empty shape
with its row number as ``id``.  The reference below applies those rules one shape at a time in plain
Python; the map writes whole columns at once, in chunks, on threads.
"""

from __future__ import annotations

import json
import math
import re
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
import shapely
from report_fixture import build_audit_folder
from shapely.geometry import mapping

from landcheck.evidence import webmap
from landcheck.evidence.folder import load_audit_folder
from landcheck.evidence.maps import load_map_data

# display frame of the unit cases: left, bottom, q (m per display unit: a 10 m cell / 8), kx
LEFT, BOTTOM, Q = 1000.0, 5000.0, 1.25
TOLERANCE = 10.0  # one cell


def _frame(left: float, bottom: float, q: float, kx: float) -> webmap._Frame:
    frame = webmap._Frame.__new__(webmap._Frame)
    frame.left, frame.bottom, frame.q, frame.kx = left, bottom, q, kx
    return frame


def _num(v: float) -> str:
    return f"{v:.0f}"  # a whole number; "-0" for a negative zero


def _position(x: float, y: float, frame: dict) -> str:
    # ties to even (Python's round), the sign of a zero kept (copysign), as IEEE 754 roundToIntegralTiesToEven
    u = (x - frame["left"]) / frame["q"] * frame["kx"]
    v = (y - frame["bottom"]) / frame["q"]
    return f"[{_num(math.copysign(round(u), u))},{_num(math.copysign(round(v), v))}]"


def _coordinates(c, frame: dict) -> str:
    if not isinstance(c[0], (tuple, list)):
        return _position(c[0], c[1], frame)  # a position (a third number, z, is not drawn)
    return "[" + ",".join(_coordinates(p, frame) for p in c) + "]"


def _geometry(m: dict, frame: dict) -> str:
    if m["type"] == "GeometryCollection":
        return (
            '{"type":"GeometryCollection","geometries":['
            + ",".join(_geometry(g, frame) for g in m["geometries"])
            + "]}"
        )
    kind = "LineString" if m["type"] == "LinearRing" else m["type"]  # RFC 7946 has no ring type
    return f'{{"type":"{kind}","coordinates":{_coordinates(m["coordinates"], frame)}}}'


def reference_collection(geoms, props: list[str], frame: dict, tolerance: float) -> str:
    features = []
    for i, (g, p) in enumerate(zip(geoms, props)):
        if g is None or g.is_empty:
            continue
        s = shapely.simplify(g, tolerance, preserve_topology=True)
        if s.is_empty:
            s = g
        features.append(f'{{"type":"Feature","id":{i},"properties":{p},"geometry":{_geometry(mapping(s), frame)}}}')
    return '{"type":"FeatureCollection","features":[' + ",".join(features) + "]}"


def _shapes() -> list:
    x, y = LEFT, BOTTOM
    square = [(x + 100, y + 100), (x + 200, y + 100), (x + 200, y + 200), (x + 100, y + 200)]
    # a vertex 2 m off the straight edge: within the tolerance, so simplification drops it
    dent = [(x + 100, y + 100), (x + 150, y + 102), (x + 200, y + 100), (x + 200, y + 200), (x + 100, y + 200)]
    hole = [(x + 130, y + 130), (x + 170, y + 130), (x + 170, y + 170), (x + 130, y + 170)]
    return [
        shapely.Polygon(dent, [hole]),
        None,
        shapely.Polygon(),
        shapely.MultiPolygon([shapely.Polygon(square, [hole]), shapely.box(x + 300, y + 300, x + 340, y + 333.3)]),
        # display units 0.5 and 1.5 (ties: to 0 and 2), a vertex at -0.3 units (written "-0"), and one west of
        # and below the frame
        shapely.Polygon([(x + 0.625, y + 1.875), (x + 90, y - 0.375), (x + 90, y + 90), (x - 33.3, y + 60)]),
        shapely.LineString([(x + 5, y + 5), (x + 55.55, y + 77.7), (x + 120, y + 20)]),
        shapely.MultiLineString([[(x, y), (x + 50, y + 50)], [(x + 60, y), (x + 60, y + 400)]]),
        shapely.Point(x + 12.3, y + 45.6),
        shapely.MultiPoint([(x + 1, y + 2), (x + 300, y + 4)]),
        shapely.GeometryCollection([shapely.Point(x + 10, y + 10), shapely.LineString([(x, y), (x + 30, y + 40)])]),
        shapely.LinearRing(square),
        shapely.Polygon([(px, py, 7.0) for px, py in square]),  # with z
        shapely.Polygon([(x + 1000.4, y + 2000.6), (x + 1003.1, y + 2000.6), (x + 1001.7, y + 2002.2)]),  # tiny
    ]


@pytest.mark.parametrize("chunk", [1, 3, 10_000])
@pytest.mark.parametrize("threads", [1, 2])
@pytest.mark.parametrize("kx", [1.0, math.cos(math.radians(37.5))])
def test_features_follow_the_encoding_rules(monkeypatch, chunk, threads, kx):
    monkeypatch.setattr(webmap, "_GEOJSON_CHUNK", chunk)
    geoms = _shapes()
    kinds = ['{"v":0}', '{"v":1}', '{"v":-1}']
    codes = np.arange(len(geoms)) % len(kinds)
    frame = {"left": LEFT, "bottom": BOTTOM, "q": Q, "kx": kx}
    want = reference_collection(geoms, [kinds[c] for c in codes], frame, TOLERANCE)
    with ThreadPoolExecutor(max_workers=threads) as pool:
        tasks = webmap._feature_tasks(np.array(geoms, dtype=object), kinds, codes, _frame(**frame), TOLERANCE)
        chunks = [pool.submit(t) for t in tasks]
        text, n = webmap._collection(chunks)
    assert text == want
    assert n == len(json.loads(want)["features"]) == len(geoms) - 2  # the missing and the empty shape are left out
    # the cases reach what they are there for: the vertex off the edge is gone, the ties went to even, a
    # negative zero kept its sign, and every number is whole
    assert _position(LEFT + 150, BOTTOM + 102, frame) not in text
    assert _position(LEFT + 0.625, BOTTOM + 1.875, frame) in text and "[0,2]" in text
    assert ",-0]" in text and ".0" not in text


def test_no_feature_at_all(monkeypatch):
    with ThreadPoolExecutor(max_workers=2) as pool:
        geoms = np.array([None, shapely.Polygon(), None], dtype=object)
        tasks = webmap._feature_tasks(geoms, ["{}"], np.zeros(3, dtype=int), _frame(LEFT, BOTTOM, Q, 1.0), 1.0)
        chunks = [pool.submit(t) for t in tasks]
        assert webmap._collection(chunks) == ('{"type":"FeatureCollection","features":[]}', 0)


@pytest.fixture(scope="module")
def fixture_map(tmp_path_factory):
    fx = build_audit_folder(tmp_path_factory.mktemp("webmap"))
    folder = load_audit_folder(fx.out_dir)
    data = load_map_data(folder)
    breaks = np.array([0.0, 8.0, 18.0, 30.0, np.inf])
    labels = {"residential": "Residential", "agricultural": "Agricultural", "conservation": "Conservation"}
    return folder, data, breaks, labels


def test_map_data_of_an_audit_folder(fixture_map):
    folder, data, breaks, labels = fixture_map
    d = webmap.webmap_data(folder, data, breaks, labels)
    gdf = folder.parcels_gdf
    keys = [v["key"] for v in d["verdicts"]]
    props = [f'{{"v":{keys.index(v)}}}' for v in gdf["verdict"]]
    assert d["parcels"] == reference_collection(list(gdf.geometry), props, d["frame"], d["simplify_m"])
    zones = [(n, z) for n, z in folder.zone_layers]
    assert [z["name"] for z in d["zones"]] == [folder.zone_label(n) for n, _ in zones]
    for z, (_, zg) in zip(d["zones"], zones):
        assert z["geojson"] == reference_collection(list(zg.geometry), ["{}"] * len(zg), d["frame"], d["simplify_m"])
    # the rows follow the shapes' order, their text columns are dictionary codes of parcels.csv's text
    csv = folder.parcels.set_index("parcel_id")
    assert d["rows"]["pid"] == list(gdf["parcel_id"])
    # a class without a label is shown by its name, "_" as a space; an empty reason is ""
    class_text = [labels.get(c, c.replace("_", " ")) for c in csv.loc[d["rows"]["pid"], "class_name"]]
    assert [d["classes"][c] for c in d["rows"]["cls"]] == class_text
    reasons = csv.loc[d["rows"]["pid"], "reasons"].fillna("").tolist()
    assert [d["reasons"][r] for r in d["rows"]["reason"]] == reasons
    assert len(set(reasons)) > 2 and "no rule" in class_text  # more than one value to encode
    assert {v["key"]: v["count"] for v in d["verdicts"]} == gdf["verdict"].value_counts().to_dict()
    for got, p in zip(d["rows"]["area_m2"], d["rows"]["pid"]):
        assert abs(got - csv.loc[p, "area_m2"]) <= 0.5


def test_section_carries_the_map_data(fixture_map):
    folder, data, breaks, labels = fixture_map
    html = webmap.webmap_section(folder, data, breaks, labels)
    m = re.search(r'<script type="application/json" id="webmap-data">(.*?)</script>', html, re.S)
    assert m
    # the page's text is the data's JSON text, however it was put together
    assert m.group(1) == webmap._json_for_script(webmap.webmap_data(folder, data, breaks, labels))
