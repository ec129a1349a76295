"""Pre-screen of one parcel: the patch kernel, exact buildable areas, input modes, errors and the page."""

from __future__ import annotations

import json
import re
import shutil
import struct
import subprocess

import geopandas as gpd
import numpy as np
import pytest
import shapely
from _support import ramp_dem, require_tool, write_parcels, write_rules
from click.testing import CliRunner
from scipy import ndimage

from landcheck.about import CAUTION
from landcheck.cli.main import cli
from landcheck.core.audit import audit
from landcheck.errors import InputDataError
from landcheck.evidence.prescreen import MAP_SIZE_IN, largest_patch, parse_polygon, prescreen

X0, Y0 = 400000.0, 1600000.0
# ramp_dem: slope = 0.04 x percent at distance x east of the DEM's west edge, so 18 % falls at x = 450 m,
# a cell boundary (10 m cells): cells west of it are below 18 %, cells east of it at or over.
X18 = 450.0
RECT = [(X0 + 400, Y0 - 305), (X0 + 500, Y0 - 305), (X0 + 500, Y0 - 195), (X0 + 400, Y0 - 195)]  # rows cut mid-cell
RAMP_DPI = 100
RECT_TEXT = " ".join(f"{x:.1f},{y:.1f}" for x, y in RECT)


def _png_size(path) -> tuple[int, int]:
    # Source: PNG specification (ISO/IEC 15948) 5.2 signature, 11.2.2 IHDR width and height
    data = path.read_bytes()[:24]
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


# --------------------------------------------------------------------------- kernel


def _scipy_largest(mask, weights, connectivity):
    """Reference: scipy.ndimage.label (structure 4: generate_binary_structure(2, 1); 8: (2, 2))."""
    structure = ndimage.generate_binary_structure(2, 1 if connectivity == 4 else 2)
    labels, n = ndimage.label(mask, structure=structure)
    if n == 0:
        return 0.0, np.zeros(mask.shape, bool)
    sums = ndimage.sum_labels(weights, labels, index=np.arange(1, n + 1))
    best = int(np.argmax(sums)) + 1  # ndimage numbers labels in row-major order of first cell
    return float(sums[best - 1]), labels == best


def test_two_blobs_of_known_size():
    # Closed form: a 3x4 block (12 cells) and a 5-cell L; 25 m² cells -> 300 m² for the block.
    m = np.zeros((10, 12), bool)
    m[1:4, 1:5] = True
    m[6:9, 8] = True
    m[8, 9:11] = True
    area, patch = largest_patch(m, 25.0, 8)
    assert area == 12 * 25.0
    assert patch.sum() == 12 and patch[1:4, 1:5].all()
    # Source: scipy.ndimage.label gives the same two components and the same winner
    ref_area, ref_patch = _scipy_largest(m, np.full(m.shape, 25.0), 8)
    assert ndimage.label(m)[1] == 2
    assert area == ref_area and np.array_equal(patch, ref_patch)


def test_diagonal_pair_joins_only_under_8_connectivity():
    # Closed form: two cells touching at one corner are one patch with corner neighbours, two without.
    m = np.array([[0, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 0]], bool)
    a8, p8 = largest_patch(m, 1.0, 8)
    a4, p4 = largest_patch(m, 1.0, 4)
    assert (a8, int(p8.sum())) == (2.0, 2)
    assert (a4, int(p4.sum())) == (1.0, 1) and p4[1, 1]  # tie: the first cell in row-major order wins
    # Source: scipy.ndimage.label with the 4- and 8-neighbour structures
    assert ndimage.label(m, structure=ndimage.generate_binary_structure(2, 2))[1] == 1
    assert ndimage.label(m, structure=ndimage.generate_binary_structure(2, 1))[1] == 2


def test_hand_worked_4x4_with_row_areas():
    # Hand-worked (rows have areas 1, 2, 3, 4 m², as on a geographic grid):
    #   1 1 0 0      4-connected: A = (0,0) (0,1) (1,1)        -> 1 + 1 + 2     = 4
    #   0 1 0 1                   B = (1,3) (2,2) (2,3) (3,3)  -> 2 + 3 + 3 + 4 = 12
    #   0 0 1 1                   C = (3,0)                    -> 4
    #   1 0 0 1      8-connected: A and B meet at the corner (1,1)-(2,2) -> 16; C stays 4
    m = np.array([[1, 1, 0, 0], [0, 1, 0, 1], [0, 0, 1, 1], [1, 0, 0, 1]], bool)
    rows = np.array([1.0, 2.0, 3.0, 4.0])
    before = m.copy()
    a4, p4 = largest_patch(m, rows, 4)
    a8, p8 = largest_patch(m, rows, 8)
    assert a4 == 12.0 and np.array_equal(np.argwhere(p4), [[1, 3], [2, 2], [2, 3], [3, 3]])
    assert a8 == 16.0 and p8.sum() == 7 and not p8[3, 0]
    assert np.array_equal(m, before)  # the kernel does not mutate its input


@pytest.mark.parametrize("connectivity", [4, 8])
def test_random_masks_match_scipy_label(connectivity):
    # Source: scipy.ndimage.label + sum_labels on 30 random masks with random per-cell weights
    rng = np.random.default_rng(20240611)
    for _ in range(30):
        h, w = rng.integers(1, 40, size=2)
        m = rng.random((h, w)) < rng.uniform(0.2, 0.7)
        wts = rng.uniform(0.1, 100.0, size=(h, w))
        area, patch = largest_patch(m, wts, connectivity)
        ref_area, ref_patch = _scipy_largest(m, wts, connectivity)
        assert area == pytest.approx(ref_area, rel=1e-12)
        assert np.array_equal(patch, ref_patch)


def test_kernel_edge_cases():
    assert largest_patch(np.zeros((3, 3), bool), 1.0)[0] == 0.0
    with pytest.raises(ValueError, match="connectivity"):
        largest_patch(np.ones((2, 2), bool), 1.0, 6)
    with pytest.raises(ValueError, match="cell_area_m2"):
        largest_patch(np.ones((2, 2), bool), np.ones(3))


def test_parse_polygon_names_the_bad_vertex():
    coords, notes = parse_polygon("0,0 10,0 10,10")
    assert coords.tolist() == [[0, 0], [10, 0], [10, 10], [0, 0]] and "not closed" in notes[0]
    assert parse_polygon("0,0 10,0 10,10 0,0")[1] == []
    with pytest.raises(InputDataError, match=r"vertex 3 \('10;10'\)"):
        parse_polygon("0,0 10,0 10;10 0,10")
    with pytest.raises(InputDataError, match=r"vertex 2 \('1e3,abc'\)"):
        parse_polygon("0,0 1e3,abc 5,5")
    with pytest.raises(InputDataError, match="at least 3"):
        parse_polygon("0,0 1,1 0,0")


# --------------------------------------------------------------------------- the ramp parcel


@pytest.fixture(scope="module")
def ramp_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("ramp")
    dem = ramp_dem(d / "dem.tif")
    rules = write_rules(d / "r.toml")
    parcels = write_parcels(d / "one.gpkg", [shapely.Polygon(RECT)], pid=[7], zoning=["R"])
    res = prescreen(dem, rules, d / "out", parcels_path=parcels, dpi=RAMP_DPI)
    return d, res


def test_ramp_buildable_half_and_western_patch(ramp_run):
    d, res = ramp_run
    f = res.figures
    # Closed form: x 400..500 m straddles the 18 % line at 450 m, so exactly half the parcel is below the limit
    # (to 1e-8: sums add pair terms rounded to 2^-20 m², docs/outputs.md "Checking a rerun")
    assert f["buildable"]["share_of_parcel"] == pytest.approx(0.5, abs=1e-8)
    # the buildable part is one rectangle: the largest patch is all of it, the western half
    assert f["largest_patch"]["area_m2"] == pytest.approx(f["buildable"]["area_m2"], rel=1e-12)
    assert f["largest_patch"]["cells"] == 5 * 12  # 5 columns x 12 rows touched (y 195..305 cuts 2 rows)
    west = shapely.box(X0 + 400, Y0 - 305, X0 + X18, Y0 - 195)
    patch = gpd.read_file(d / "out" / "largest_patch.gpkg", layer="largest_patch")
    assert patch.geometry.iloc[0].symmetric_difference(west).area < 1e-6
    # Source: pyproj.Geod (Karney 2013) geodesic area of the western half, from UTM 51N corners densified
    import pyproj

    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    ll = shapely.transform(shapely.segmentize(west, 5.0), lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
    geod_m2 = abs(pyproj.Geod(ellps="WGS84").geometry_area_perimeter(ll)[0])
    assert f["largest_patch"]["area_m2"] == pytest.approx(geod_m2, rel=1e-5)
    assert f["verdict"] == "conflict"  # 50 % over the limit with a 5 % tolerance (docs/rules-file.md)


def test_ramp_histogram(ramp_run):
    _, res = ramp_run
    h = res.figures["slope_histogram"]
    edges = np.array([np.inf if e is None else e for e in h["bin_edges_pct"]])
    area = np.array(h["area_m2"])
    cov = res.figures["parcel"]["covered_m2"]
    # Closed form: the ten 10 m columns have slopes 0.04 * (405, 415, ..., 495) %; bin 16-17 holds 16.2 and 16.6,
    # bin 18-19 holds 18.2 and 18.6, i.e. 2 of 10 columns each (values away from bin edges)
    assert area[edges[:-1] == 16][0] / cov == pytest.approx(0.2, abs=1e-8)
    assert area[edges[:-1] == 18][0] / cov == pytest.approx(0.2, abs=1e-8)
    assert area[edges[:-1] < 18].sum() / cov == pytest.approx(0.5, abs=1e-8)
    # invariants against the audit's own sums: histogram total = evaluated area; mass at/over limit = over-limit area
    assert area.sum() == pytest.approx(res.figures["parcel"]["evaluated_m2"], rel=1e-8)
    assert h["at_or_over_limit_m2"] == pytest.approx(res.figures["over_limit_m2"], rel=1e-8)


def test_page_is_offline_with_caution_and_png_size(ramp_run):
    d, _ = ramp_run
    out = d / "out"
    page = (out / "prescreen.html").read_text(encoding="utf-8")
    # common practice: a self-contained page references nothing on the network
    assert not re.search(r"https?:", page, re.IGNORECASE)
    assert CAUTION in page and 'id="caution"' in page
    assert "@page{size:A4" in page
    # Source: PNG IHDR (ISO/IEC 15948); matplotlib writes figsize x dpi pixels when no tight bbox is asked for
    assert _png_size(out / "map.png") == (round(MAP_SIZE_IN[0] * RAMP_DPI), round(MAP_SIZE_IN[1] * RAMP_DPI))
    data = json.loads((out / "prescreen.json").read_text())
    assert data["caution"] == CAUTION
    assert sorted(p.name for p in out.iterdir()) == [
        "SHA256SUMS",  # the file list every landcheck output folder carries (docs/outputs.md)
        "files.json",
        "histogram.png",
        "largest_patch.gpkg",
        "map.png",
        "prescreen.html",
        "prescreen.json",
    ]


@pytest.mark.reference_tool
def test_page_prints_on_one_a4_sheet(ramp_run, tmp_path):
    # Source: chromium's print engine (headless --print-to-pdf); pages counted as /Type /Page objects (ISO 32000-1, 7.7.3.3)
    chromium = shutil.which("chromium") or shutil.which("chromium-browser") or require_tool("chromium")
    d, _ = ramp_run
    pdf = tmp_path / "page.pdf"
    subprocess.run(
        [
            chromium,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-pdf-header-footer",
            f"--user-data-dir={tmp_path / 'profile'}",
            "--proxy-server=127.0.0.1:9",
            f"--print-to-pdf={pdf}",
            (d / "out" / "prescreen.html").as_uri(),
        ],
        check=True,
        capture_output=True,
        timeout=60,
    )
    body = pdf.read_bytes()
    assert len(re.findall(rb"/Type\s*/Page(?!s)", body)) == 1
    # A4 = 595.28 x 841.89 pt (ISO 216; 1 pt = 1/72 in)
    box = re.search(rb"/MediaBox\s*\[\s*0\s+0\s+([\d.]+)\s+([\d.]+)\s*\]", body)
    assert box and abs(float(box.group(1)) - 595.28) < 1 and abs(float(box.group(2)) - 841.89) < 1


def test_cropped_run_matches_full_audit(ramp_run, tmp_path):
    # Invariant (STYLE 6.4): the pre-screen crops the DEM around the parcel; the audit on the whole DEM must agree
    d, res = ramp_run
    full = audit(d / "dem.tif", d / "one.gpkg", d / "r.toml", tmp_path / "full", make_report=False, show_progress=False)
    row = full.parcels.iloc[0]
    f = res.figures
    assert f["conflict_m2"] == pytest.approx(row["conflict_m2"], rel=1e-8)
    assert f["parcel"]["covered_m2"] == pytest.approx(row["covered_m2"], rel=1e-8)
    assert f["verdict"] == row["verdict"]
    # with slope everywhere, buildable = covered - breach (the audit's exact union of breaches)
    assert f["buildable"]["area_m2"] == pytest.approx(row["covered_m2"] - row["conflict_m2"], rel=1e-8)


# --------------------------------------------------------------------------- forbidden flood polygon


FLOOD_RULES = """
[rulebook]
class_field = "zoning"
id_field = "pid"

[layers]
flood = "flood.gpkg"

[classes.residential]
values = ["R"]
max_slope_pct = 18.0
forbidden_zones = ["flood_high"]

[zones.flood_high]
kind = "flood_polygons"
layer = "flood"
level_field = "hazard_level"
min_level = 3
"""


def test_forbidden_flood_polygon_removes_exactly_its_area(tmp_path):
    ramp_dem(tmp_path / "dem.tif")
    (tmp_path / "r.toml").write_text(FLOOD_RULES)
    # slope 0.04 x: at x 103..297 m every cell is under 12 %, so only the flood polygon limits building
    parcel = shapely.box(X0 + 103.3, Y0 - 406.1, X0 + 296.7, Y0 - 248.9)
    # a 45-degree band about 42 m wide crossing the whole parcel, off the cell lines
    band = shapely.Polygon(
        [(X0 + 150.2, Y0 - 500), (X0 + 210.0, Y0 - 500), (X0 + 460, Y0 - 150), (X0 + 400.2, Y0 - 150)]
    )
    low = shapely.box(X0 + 100, Y0 - 300, X0 + 140, Y0 - 260)  # level 1: reported only, not forbidden
    gpd.GeoDataFrame({"hazard_level": [3, 1]}, geometry=[band, low], crs="EPSG:32651").to_file(tmp_path / "flood.gpkg")
    write_parcels(tmp_path / "p.gpkg", [parcel], pid=[1], zoning=["R"])
    res = prescreen(
        tmp_path / "dem.tif", tmp_path / "r.toml", tmp_path / "out", parcels_path=tmp_path / "p.gpkg", dpi=72
    )
    f = res.figures
    cov = f["parcel"]["covered_m2"]
    # Source: exact polygon intersection (shapely/GEOS) as the closed form of the lost area
    lost_share = parcel.intersection(band).area / parcel.area
    assert 0.1 < lost_share < 0.5
    assert f["buildable"]["share_of_parcel"] == pytest.approx(1 - lost_share, rel=1e-8)
    # the band cuts the parcel in two; the larger remaining piece is the largest patch
    pieces = sorted(shapely.get_parts(parcel.difference(band)), key=lambda p: -p.area)
    assert len(pieces) == 2
    assert f["largest_patch"]["area_m2"] / cov == pytest.approx(pieces[0].area / parcel.area, rel=1e-8)
    patch = gpd.read_file(tmp_path / "out" / "largest_patch.gpkg").geometry.iloc[0]
    assert patch.symmetric_difference(pieces[0]).area < 1e-6 * parcel.area
    zones = {z["name"]: z for z in f["zones"]}
    # the audit's zone share (its own exact-coverage sums; agrees with GEOS to ~1e-9 here)
    assert zones["flood_high"]["forbidden"] and zones["flood_high"]["share"] == pytest.approx(lost_share, rel=1e-7)
    assert f["verdict"] == "conflict" and any("flood" in r for r in f["reasons"])


SEA_RULES = """
[rulebook]
class_field = "zoning"

[classes.residential]
values = ["R"]
max_slope_pct = 18.0
forbidden_zones = ["sea_1m"]

[zones.sea_1m]
kind = "sea_rise"
datum_m = 1.0
rise_m = 1.0
"""


def test_forbidden_cell_zone_uses_whole_dem(tmp_path):
    # Closed form: ramp_dem has z = 0.0002 x^2 m; with the sea at datum 1 m (cells touching the west edge) and a
    # 1 m rise, land at or below 2 m connected to the sea floods (bathtub with connectivity, docs/references.md §10):
    # cell centres x = 5..95 m (z(95) = 1.805 m, z(105) = 2.205 m), i.e. x < 100 m.  A parcel x 60..200 m thus
    # loses 40/140 of its area; its slope (<= 8 %) is under the limit everywhere.
    dem = ramp_dem(tmp_path / "dem.tif")
    (tmp_path / "r.toml").write_text(SEA_RULES)
    poly = f"{X0 + 60},{Y0 - 300} {X0 + 200},{Y0 - 300} {X0 + 200},{Y0 - 200} {X0 + 60},{Y0 - 200} {X0 + 60},{Y0 - 300}"
    res = prescreen(dem, tmp_path / "r.toml", tmp_path / "out", polygon=poly, class_name="residential", dpi=72)
    f = res.figures
    assert f["parameters"]["dem_cropped"] is False  # sea connectivity needs the whole DEM
    assert f["buildable"]["share_of_parcel"] == pytest.approx(100 / 140, abs=1e-8)
    assert f["largest_patch"]["share_of_parcel"] == pytest.approx(100 / 140, abs=1e-8)
    zone = {z["name"]: z for z in f["zones"]}["sea_1m"]
    assert zone["forbidden"] and zone["kind"] == "raster" and zone["share"] == pytest.approx(40 / 140, abs=1e-8)


# --------------------------------------------------------------------------- input modes and errors


@pytest.fixture
def inputs(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    one = write_parcels(tmp_path / "one.gpkg", [shapely.Polygon(RECT)], pid=[7], zoning=["R"])
    many = write_parcels(
        tmp_path / "many.gpkg",
        [
            shapely.box(X0 + 100, Y0 - 200, X0 + 200, Y0 - 100),
            shapely.Polygon(RECT),
            shapely.box(X0 + 600, Y0 - 700, X0 + 650, Y0 - 650),
        ],
        pid=[3, 7, 11],
        zoning=["R", "R", "F"],
    )
    return tmp_path, dem, rules, one, many


def _run(tmp, dem, rules, out, *args):
    # 72 dpi: these tests check figures, not pictures, and small PNGs draw faster
    return CliRunner().invoke(
        cli,
        ["-q", "prescreen", "--dem", str(dem), "--rulebook", str(rules), "--out", str(tmp / out), "--dpi", "72", *args],
    )


_SAME = ("buildable", "largest_patch", "slope_histogram", "verdict", "reasons", "zones", "conflict_m2")


def test_three_input_modes_give_identical_figures(inputs):
    tmp, dem, rules, one, many = inputs
    runs = {
        "file": _run(tmp, dem, rules, "a", "--parcels", str(one)),
        "id": _run(tmp, dem, rules, "b", "--parcels", str(many), "--parcel-id", "7"),
        "polygon": _run(tmp, dem, rules, "c", "--polygon", RECT_TEXT, "--class", "residential"),
    }
    for name, r in runs.items():
        assert r.exit_code == 0, (name, r.output)
    figs = {name: json.loads((tmp / out / "prescreen.json").read_text()) for name, out in zip(runs, ("a", "b", "c"))}
    for name in ("id", "polygon"):
        for key in _SAME:
            assert figs[name][key] == figs["file"][key], (name, key)
        assert figs[name]["parcel"]["area_m2"] == figs["file"]["parcel"]["area_m2"]
    # the polygon had an open ring: closed, with a warning
    assert any("not closed" in w for w in figs["polygon"]["warnings"])
    # --polygon-crs: the same corners given in lon/lat (pyproj round trip, sub-millimetre) give the same figures
    import pyproj

    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    ll_text = " ".join("{:.10f},{:.10f}".format(*tr.transform(x, y)) for x, y in RECT)
    r = _run(
        tmp, dem, rules, "d", "--polygon", ll_text, "--polygon-crs", "EPSG:4326", "--class", "residential", "--json"
    )
    assert r.exit_code == 0, r.output
    ll = json.loads(r.stdout)
    assert ll["buildable"]["area_m2"] == pytest.approx(figs["file"]["buildable"]["area_m2"], rel=1e-6)


@pytest.mark.parametrize(
    "args, message",
    [
        (["--parcels", "{many}", "--parcel-id", "99"], r"no parcel with id '99'.*ids here: 3, 7, 11"),
        (["--parcels", "{many}"], r"holds 3 features; choose one with --parcel-id"),
        (["--polygon", "400400,1599700 400500,1599700 400500;1599800"], r"vertex 3 \('400500;1599800'\)"),
        (
            ["--polygon", RECT_TEXT, "--class", "industrial"],
            r"--class 'industrial': no such class.*residential.*forest",
        ),
        (["--polygon", RECT_TEXT], r"has no 'zoning' value.*--class"),
        (
            ["--polygon", "390000,1500000 390100,1500000 390100,1500100", "--class", "residential"],
            r"lies outside the DEM",
        ),
    ],
)
def test_bad_inputs_exit_3_and_write_nothing(inputs, args, message):
    tmp, dem, rules, _one, many = inputs
    before = sorted(p.name for p in tmp.iterdir())
    r = _run(tmp, dem, rules, "out", *[a.format(many=many) for a in args])
    # exit codes: docs/cli.md (3 = bad input); message names what is wrong
    assert r.exit_code == 3, r.output
    assert re.search(message, " ".join(r.output.split())), r.output
    assert sorted(p.name for p in tmp.iterdir()) == before  # no output folder, no staged leftovers


def test_existing_output_and_self_intersecting_polygon(inputs):
    tmp, dem, rules, one, _many = inputs
    bowtie = (
        f"{X0 + 400},{Y0 - 300} {X0 + 480},{Y0 - 220} {X0 + 480},{Y0 - 300} {X0 + 400},{Y0 - 220} {X0 + 400},{Y0 - 300}"
    )
    r = _run(tmp, dem, rules, "out", "--polygon", bowtie, "--class", "residential", "--json")
    assert r.exit_code == 0, r.output
    data = json.loads(r.stdout)
    assert any("invalid" in w and "repaired" in w for w in data["warnings"])
    # Closed form: the edges cross at (440, -260), leaving two triangles of base 80 m and height 40 m, 3200 m²
    # in the map plane; Source: pyproj.Geod (Karney 2013) for their area on the ellipsoid
    import pyproj

    tris = [
        shapely.Polygon([(X0 + 400, Y0 - 300), (X0 + 440, Y0 - 260), (X0 + 400, Y0 - 220)]),
        shapely.Polygon([(X0 + 480, Y0 - 220), (X0 + 480, Y0 - 300), (X0 + 440, Y0 - 260)]),
    ]
    assert sum(t.area for t in tris) == 3200.0
    tr = pyproj.Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    geod = pyproj.Geod(ellps="WGS84")

    def to_ll(xy):
        return np.column_stack(tr.transform(xy[:, 0], xy[:, 1]))

    expected = sum(
        abs(geod.geometry_area_perimeter(shapely.transform(shapely.segmentize(t, 5.0), to_ll))[0]) for t in tris
    )
    assert data["parcel"]["covered_m2"] == pytest.approx(expected, rel=1e-5)
    before = sorted(p.name for p in (tmp / "out").iterdir())
    r = _run(tmp, dem, rules, "out", "--parcels", str(one))
    assert r.exit_code == 3 and "--overwrite" in r.output
    assert sorted(p.name for p in (tmp / "out").iterdir()) == before
    # usage errors (exit 2): no parcel, or both forms
    assert _run(tmp, dem, rules, "x").exit_code == 2
    assert _run(tmp, dem, rules, "x", "--parcels", str(one), "--polygon", RECT_TEXT).exit_code == 2


def test_help_carries_caution_and_examples():
    # common practice: every command's --help has the caution and runnable examples
    r = CliRunner().invoke(cli, ["prescreen", "--help"])
    assert r.exit_code == 0
    assert "not a survey or legal determination" in r.output and "Examples" in r.output
    assert "--polygon" in r.output and "--parcel-id" in r.output
