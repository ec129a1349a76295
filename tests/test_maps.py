"""Tests of landcheck.evidence.maps on a synthetic audit output folder (tests/report_fixture.py)."""

from __future__ import annotations

import csv
import math
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from _support import write_raster
from report_fixture import build_audit_folder

from landcheck.errors import InputDataError
from landcheck.evidence import charts, maps

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(path) -> tuple[int, int]:
    """Width and height from the IHDR chunk.

    Source: PNG specification (W3C / ISO/IEC 15948), sections 5.2 (8-byte
    signature) and 11.2.2 (IHDR is the first chunk: 4-byte length, "IHDR",
    then width and height as 4-byte big-endian integers).
    """
    data = path.read_bytes()[:24]
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def csv_rows(path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def audit(tmp_path_factory):
    return build_audit_folder(tmp_path_factory.mktemp("maps"))


def test_overview_files_size_and_legend(audit, tmp_path):
    dpi, figsize = 200, (10.0, 8.0)
    files = maps.overview_map(audit.out_dir, dest_dir=tmp_path, dpi=dpi, figsize_in=figsize)
    png, svg = tmp_path / "overview.png", tmp_path / "overview.svg"
    assert list(files) == [png, svg]
    assert png.stat().st_size > 10_000 and svg.stat().st_size > 10_000
    # Source: PNG spec IHDR; a figure of w x h inches at d dpi is w*d x h*d pixels
    # (matplotlib savefig without bbox_inches="tight" keeps the figure size).
    assert png_size(png) == (round(figsize[0] * dpi), round(figsize[1] * dpi))
    # Source: SVG 1.1 (W3C) root <svg> element; matplotlib writes width/height in
    # points, 72 points per inch (PostScript point, common practice).
    root = ET.parse(svg).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert float(root.get("width").removesuffix("pt")) == pytest.approx(figsize[0] * 72)
    assert float(root.get("height").removesuffix("pt")) == pytest.approx(figsize[1] * 72)

    # legend verdicts are exactly the verdicts present in parcels.csv (read with csv, not our loader)
    present = {r["verdict"] for r in csv_rows(audit.out_dir / "parcels.csv")}
    drawn = {e.key for e in files.legend_entries if e.group == "verdict"}
    assert drawn == present
    assert "no_data" not in drawn  # the fixture has no parcel without data
    # each verdict label carries its parcel count from the CSV
    for e in files.legend_entries:
        if e.group == "verdict":
            n = sum(r["verdict"] == e.key for r in csv_rows(audit.out_dir / "parcels.csv"))
            assert e.label.endswith(f"({n})")
    # Source: docs/references.md §7, land-use planning slope classes 0-3-8-18-30-50-over
    slope_keys = [e.key for e in files.legend_entries if e.group == "slope_class"]
    assert slope_keys == ["0-3", "3-8", "8-18", "18-30", "30-50", "50-inf"]
    # the fixture writes one polygon zone and one water line under zones/
    zones = {e.key: e.label for e in files.legend_entries if e.group == "zone"}
    assert set(zones) == {"flood_prone", "tamsel_river"}
    assert zones["tamsel_river"].startswith("water: ")
    # conflict.tif holds cells with bit 0 (slope) and with bit 1 (zone), never both in one cell
    assert {e.key for e in files.legend_entries if e.group == "conflict"} == {"slope", "zone"}
    relief = [e.label for e in files.legend_entries if e.group == "relief" and e.key == "relief"]
    assert relief and "hillshade" in relief[0]


def test_overview_custom_breaks_other_dpi_and_missing_dem(tmp_path):
    # its own audit folder whose DEM is gone (the module-scoped fixture stays untouched)
    own = build_audit_folder(tmp_path / "own")
    own.dem_path.unlink()
    files = maps.overview_map(
        own.out_dir,
        dest_dir=tmp_path,
        dpi=300,
        figsize_in=(5.0, 4.0),
        formats=("png",),
        slope_breaks_pct=[0, 10, 25, math.inf],
    )
    assert list(files) == [tmp_path / "overview.png"]
    # Source: PNG spec IHDR; 5 x 4 in at 300 dpi
    assert png_size(tmp_path / "overview.png") == (1500, 1200)
    assert [e.label for e in files.legend_entries if e.group == "slope_class"] == [
        "0 to under 10 %",
        "10 to under 25 %",
        "25 % and over",
    ]
    relief = [e.label for e in files.legend_entries if e.group == "relief" and e.key == "relief"][0]
    assert "slope shading" in relief and "DEM not found" in relief


def test_closeups_largest_conflict_first(audit, tmp_path):
    rows = csv_rows(audit.out_dir / "parcels.csv")
    # expected order computed from the CSV itself: conflict_m2 descending, ties by id
    expected = [
        r["parcel_id"]
        for r in sorted(
            (r for r in rows if float(r["conflict_m2"] or 0) > 0),
            key=lambda r: (-float(r["conflict_m2"]), r["parcel_id"]),
        )
    ]
    assert len(expected) >= 2
    files = maps.parcel_closeup_maps(
        audit.out_dir, max_maps=12, dest_dir=tmp_path, dpi=200, figsize_in=(8.0, 6.5), formats=("png",)
    )
    assert [it.parcel_id for it in files.items] == expected
    for rank, pid in enumerate(expected, start=1):
        p = tmp_path / f"closeup_{rank:02d}_{pid}.png"
        assert p.exists()
        assert png_size(p) == (1600, 1300)  # Source: PNG spec IHDR; 8 x 6.5 in at 200 dpi
    # a close-up's legend shows only the verdicts of parcels inside its frame
    first = files.items[0]
    verdict_of = {r["parcel_id"]: r["verdict"] for r in rows}
    assert verdict_of[first.parcel_id] in {e.key for e in first.legend_entries if e.group == "verdict"}
    # a smaller limit keeps the largest ones and removes the stale files
    few = maps.parcel_closeup_maps(audit.out_dir, max_maps=1, dest_dir=tmp_path, formats=("png",))
    assert [it.parcel_id for it in few.items] == expected[:1]
    assert sorted(p.name for p in tmp_path.glob("closeup_*")) == [f"closeup_01_{expected[0]}.png"]


def test_charts_written(audit, tmp_path):
    for fn, stem in (
        (charts.class_share_chart, "chart_class_shares"),
        (charts.slope_distribution_chart, "chart_slope_distribution"),
        (charts.sensitivity_chart, "chart_sensitivity"),
    ):
        files = fn(audit.out_dir, dest_dir=tmp_path, dpi=200, formats=("png",))
        assert list(files) == [tmp_path / f"{stem}.png"]
        w, h = png_size(tmp_path / f"{stem}.png")
        # Source: PNG spec IHDR; charts are 8 in wide (7 in for a single column) at 200 dpi
        assert w == 200 * 8 or w == 200 * 7
        assert h > 400


def _srgb_to_lstar(hex_colour: str) -> float:
    """CIE 1976 L* of an sRGB colour.

    Source: IEC 61966-2-1 (sRGB transfer function and D65 luminance row
    0.2126, 0.7152, 0.0722) and CIE 15 (L* = 116 f(Y/Yn) - 16).
    """
    rgb = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
    lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
    y = 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]
    f = y ** (1 / 3) if y > (6 / 29) ** 3 else y / (3 * (6 / 29) ** 2) + 4 / 29
    return 116 * f - 16


@pytest.mark.parametrize("n", [3, 6, 9])
def test_slope_colours_darken_monotonically(n):
    # readable in greyscale and by colour-blind readers when lightness alone orders the classes
    lstar = [_srgb_to_lstar(c) for c in maps.slope_class_colours(n)]
    assert all(a - b > 5.0 for a, b in zip(lstar, lstar[1:])), lstar  # at least 5 L* units per step
    assert lstar[0] > 85 and lstar[-1] < 35


def test_classify_slope_boundaries():
    # Source: docs/references.md §8 test boundary: "18 % or over" means exactly 18.0 counts
    # as at/over, so 18.0 belongs to the 18-30 class and 17.999 to 8-18.
    s = np.array([0.0, 2.999, 3.0, 17.999, 18.0, 49.9, 50.0, 250.0, np.nan])
    assert maps.classify_slope(s).tolist() == [0, 0, 1, 2, 3, 4, 5, 5, -1]
    with pytest.raises(ValueError, match="strictly increasing"):
        maps.classify_slope(s, [0, 18, 18, 30])


def test_hillshade_lambert_values():
    # Source: Horn 1981, "Hill shading and the reflectance map" (Lambertian surface):
    # brightness = cos(angle between normal and sun); flat ground gives sin(altitude).
    flat = np.zeros((5, 5))
    np.testing.assert_allclose(maps.hillshade(flat, 10, 10, altitude_deg=30), math.sin(math.radians(30)), rtol=1e-6)
    # a 45-degree plane facing a sun 45 degrees up, straight towards it, is lit head-on (1.0);
    # ground falling to the north-west rises to the south-east: z = (x - y) / sqrt(2) (x east, y north)
    cols, rows = np.meshgrid(np.arange(6) * 10.0, np.arange(6) * 10.0)
    y_north = -rows
    z = (cols - y_north) / math.sqrt(2)
    np.testing.assert_allclose(maps.hillshade(z, 10, 10, azimuth_deg=315, altitude_deg=45), 1.0, atol=1e-6)
    # the opposite slope faces away: normal . sun = cos(90 deg) -> 0
    np.testing.assert_allclose(maps.hillshade(-z, 10, 10, azimuth_deg=315, altitude_deg=45), 0.0, atol=1e-6)


def test_scale_bar_projected_and_geographic():
    # 1, 2, 5 x 10^k lengths (common practice); 25 % of a 1100 m wide map is 275 m -> 200 m
    bar = maps.choose_scale_bar(500_000, 501_100, 1_600_000, 1_600_900, "EPSG:32651")
    assert (bar.length_m, bar.length_map, bar.label) == (200.0, 200.0, "200 m")
    # geographic: the bar's length in degrees, measured on the WGS84 ellipsoid with
    # pyproj.Geod (Karney's geodesics), must equal its label in metres.
    from pyproj import Geod

    lat = 14.6
    bar = maps.choose_scale_bar(121.0, 121.2, lat - 0.05, lat + 0.05, "EPSG:4326")
    _, _, dist_m = Geod(ellps="WGS84").inv(121.0, lat, 121.0 + bar.length_map, lat)
    assert bar.length_m == 5000.0 and bar.label == "5 km"
    assert dist_m == pytest.approx(bar.length_m, rel=1e-7)


def test_true_north_matches_meridian_convergence():
    # Source: Snyder 1987, USGS PP 1395, transverse Mercator convergence, first term
    # gamma ~= dlon * sin(lat) (from memory); east of the central meridian in the northern
    # hemisphere true north lies west (anticlockwise) of grid north.
    from pyproj import Transformer

    lon, lat = 124.0, 14.5  # UTM zone 51 has its central meridian at 123 E
    x, y = Transformer.from_crs("EPSG:4326", "EPSG:32651", always_xy=True).transform(lon, lat)
    ang = maps.true_north_angle_deg(x, y, "EPSG:32651")
    assert ang == pytest.approx(
        -math.degrees(math.atan(math.tan(math.radians(1.0)) * math.sin(math.radians(lat)))), abs=2e-3
    )
    assert maps.true_north_angle_deg(121.0, 14.0, "EPSG:4326") == 0.0


def test_missing_folder_is_input_error(tmp_path):
    # error contract (common practice: InputDataError naming the missing file)
    with pytest.raises(InputDataError, match="summary.json"):
        maps.overview_map(tmp_path)


def test_display_block_means_equal_gdal_average_resampling(tmp_path):
    """Map blocks are the mean of the valid cells.

    Reference: GDAL's ``average`` resampling (a general-purpose reference tool, docs/references.md
    §19) read into the same block grid for the 33 x 33 whole blocks; nodata cells are left out of
    both.  The partial blocks at the right and bottom edges (233 = 7 * 33 + 2) average the cells
    present, checked against ``np.nanmean`` (rasterio's boundless read pads them differently).
    """
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.windows import Window

    rng = np.random.default_rng(11)
    a = (rng.random((233, 233)) * 60).astype(np.float32)
    a[rng.random(a.shape) < 0.1] = -9999.0
    a[:14, :14] = -9999.0  # whole blocks without data -> NaN
    path = write_raster(tmp_path / "slope.tif", a, nodata=-9999.0)
    grid = maps._read_reduced(path, None, 34, "mean")
    assert grid.factor == 7 and grid.data.shape == (34, 34)
    with rasterio.open(path) as ds:
        ref = ds.read(1, window=Window(0, 0, 231, 231), out_shape=(33, 33), resampling=Resampling.average, masked=True)
    ref = np.ma.filled(ref.astype(np.float32), np.nan)
    assert np.isnan(grid.data[:2, :2]).all()
    np.testing.assert_allclose(grid.data[:33, :33], ref, rtol=1e-6, equal_nan=True)
    valid = np.where(a == -9999.0, np.nan, a.astype(np.float64))
    edge = [np.nanmean(valid[231:, 7 * j : 7 * j + 7]) for j in range(34)]
    np.testing.assert_allclose(grid.data[33, :], edge, rtol=1e-6)
    np.testing.assert_allclose(
        grid.data[:, 33], [np.nanmean(valid[7 * i : 7 * i + 7, 231:]) for i in range(34)], rtol=1e-6
    )


def test_display_block_bits_are_the_or_of_the_cells_inside_parcels(tmp_path):
    """Conflict bits per block: bitwise OR of the cells that are not 255 (outside every parcel);
    255 where a block has none.  Reference: the NumPy formulation (reshape, ``np.bitwise_or.reduce``),
    computed independently here (common practice)."""
    rng = np.random.default_rng(12)
    a = rng.choice(np.array([0, 1, 2, 4, 6, 255], dtype=np.uint8), size=(101, 150))
    a[:5, :5] = 255
    path = write_raster(tmp_path / "conflict.tif", a, nodata=255)
    grid = maps._read_reduced(path, None, 30, "bits")
    f = grid.factor
    assert f == 5
    pad = np.full((105, 150), 255, dtype=np.uint8)
    pad[:101] = a
    blocks = pad.reshape(21, f, 30, f)
    inside = blocks != 255
    ref = np.bitwise_or.reduce(np.bitwise_or.reduce(np.where(inside, blocks, 0).astype(np.uint8), axis=3), axis=1)
    ref[~inside.any(axis=(1, 3))] = 255
    assert grid.data[0, 0] == 255
    np.testing.assert_array_equal(grid.data, ref)


@pytest.mark.parametrize("kind", ["mean", "bits"])
def test_display_reduction_on_threads_equals_one_thread(tmp_path, monkeypatch, kind):
    """A whole raster is reduced chunk by chunk on several threads; each chunk holds whole display rows, so
    the blocks are the same bits as read on one thread (common practice: a parallel path must not change
    results), here with 40 chunks of 7 rows."""
    rng = np.random.default_rng(13)
    if kind == "mean":
        a = (rng.random((280, 150)) * 60).astype(np.float32)
        a[rng.random(a.shape) < 0.05] = -9999.0
        path = write_raster(tmp_path / "r.tif", a, nodata=-9999.0)
    else:
        a = rng.choice(np.array([0, 1, 2, 4, 255], dtype=np.uint8), size=(280, 150))
        path = write_raster(tmp_path / "r.tif", a, nodata=255)
    one = maps._read_reduced(path, None, 40, kind)
    monkeypatch.setattr(maps, "_CHUNK_CELLS", 7 * 150)
    many = maps._read_reduced(path, None, 40, kind)
    assert one.factor == many.factor == 7
    np.testing.assert_array_equal(one.data, many.data)


# --------------------------------------------------------------------------- drawing cost at scale


def _burn_reference(geoms, view, w, h):
    """Burnt outlines in plain Python, the rule written out: every ring of a polygon (exterior and holes)
    and every line, segment by segment between consecutive vertices; a segment from a to b (pixel
    units: column (x - x0) * w / (x1 - x0), row (y1 - y) * h / (y1 - y0)) is sampled at the n + 1
    points a + (b - a) * i / n, i = 0..n, n = max(1, ceil(2 * longest side)), i.e. at most half a
    pixel apart, and the pixel holding each sample is set."""
    x0, y0, x1, y1 = view
    sx, sy = w / (x1 - x0), h / (y1 - y0)
    out = np.zeros((h, w), dtype=bool)

    def rings(g):
        if g is None or g.is_empty:
            return
        if g.geom_type == "Polygon":
            yield g.exterior.coords
            for r in g.interiors:
                yield r.coords
        elif g.geom_type in ("LineString", "LinearRing"):
            yield g.coords
        elif hasattr(g, "geoms"):
            for part in g.geoms:
                yield from rings(part)

    for g in geoms:
        for coords in rings(g):
            pts = [((c[0] - x0) * sx, (y1 - c[1]) * sy) for c in coords]
            for (ax, ay), (bx, by) in zip(pts, pts[1:]):
                n = max(1, math.ceil(2.0 * max(abs(bx - ax), abs(by - ay))))
                for i in range(n + 1):
                    t = i / n
                    col, row = math.floor(ax + (bx - ax) * t), math.floor(ay + (by - ay) * t)
                    if 0 <= col < w and 0 <= row < h:
                        out[row, col] = True
    return out


def _burn_shapes():
    from shapely.geometry import GeometryCollection, LineString, MultiLineString, MultiPolygon, Point, Polygon

    rng = np.random.default_rng(21)
    shapes = []
    for _ in range(60):  # small parcels scattered over the view and beyond its edges
        cx, cy = rng.uniform(-15, 115), rng.uniform(-15, 95)
        k = int(rng.integers(3, 9))
        ang = np.sort(rng.uniform(0, 2 * np.pi, k))
        rad = rng.uniform(0.3, 9.0, k)
        shapes.append(Polygon(np.column_stack([cx + rad * np.cos(ang), cy + rad * np.sin(ang)])))
    hole = Polygon([(10, 10), (40, 10), (40, 35), (10, 35)], [[(15, 15), (25, 15), (25, 25), (15, 25)]])
    shapes += [
        hole,
        MultiPolygon([Polygon([(50, 5), (60, 5), (60, 12)]), Polygon([(70, 70), (80, 72), (75, 79)])]),
        LineString([(0, 40), (33.3, 41.7), (99.9, 79.9)]),
        MultiLineString([[(5, 75), (5, 60)], [(90, 2), (120, 30)]]),
        GeometryCollection([Polygon([(85, 40), (95, 40), (90, 50)]), LineString([(82, 55), (98, 58)]), Point(3, 3)]),
        Polygon([(20, 50), (30, 50), (30, 60), (20, 60)]),  # vertices on pixel edges (1 unit = 1 pixel here)
        Polygon([(44.2, 44.2), (44.4, 44.2), (44.3, 44.6)]),  # inside one pixel
        Polygon(),
        None,
    ]
    return shapes


def test_burnt_outline_pixels_by_hand():
    """One segment by hand: (0.5, 0.5) to (3.5, 2.5) in pixels has n = ceil(2 * 3) = 6 steps; its 7 samples
    (0.5, 0.5), (1, 0.83), (1.5, 1.17), (2, 1.5), (2.5, 1.83), (3, 2.17), (3.5, 2.5) fall in pixels
    (row, col) (0, 0), (0, 1), (1, 1), (1, 2), (1, 2), (2, 3), (2, 3)."""
    from landcheck.evidence.display_loops import burn_segments

    codes = np.zeros((4, 5), dtype=np.uint8)
    xy = np.array([[0.5, 3.5], [3.5, 1.5], [9.0, 9.0]])  # map y runs up: row = (4 - y) here
    ring = np.array([0, 0, 1])  # the third vertex starts another ring: no segment to it
    burn_segments(xy, ring, 0.0, 4.0, 1.0, 1.0, np.uint8(7), codes)
    expected = np.zeros((4, 5), dtype=np.uint8)
    for r, c in [(0, 0), (0, 1), (1, 1), (1, 2), (2, 3)]:
        expected[r, c] = 7
    np.testing.assert_array_equal(codes, expected)


@pytest.mark.parametrize("w,h", [(100, 80), (173, 61)])
def test_burnt_outlines_equal_plain_python_rule(w, h):
    """The compiled burn (maps._outline_vertices + display_loops.burn_segments) sets exactly the pixels of
    the rule written out in plain Python (_burn_reference): polygons with holes, multi-parts, lines,
    collections, vertices on pixel edges, shapes partly or wholly outside the view."""
    from landcheck.evidence.display_loops import burn_segments

    shapes = _burn_shapes()
    view = (0.0, 0.0, 100.0, 80.0)
    xy, ring = maps._outline_vertices(shapes)
    codes = np.zeros((h, w), dtype=np.uint8)
    burn_segments(xy, ring, 0.0, 80.0, w / 100.0, h / 80.0, np.uint8(1), codes)
    ref = _burn_reference(shapes, view, w, h)
    assert ref.sum() > 1000  # the shapes do cover the view
    np.testing.assert_array_equal(codes == 1, ref)
    # and the same rings as the vector outlines of the small-map path
    rings = sorted(tuple(map(tuple, r)) for r in maps._line_segments(shapes))
    split = np.split(xy, np.flatnonzero(np.diff(ring)) + 1)
    assert sorted(tuple(map(tuple, r)) for r in split) == rings


def test_burn_outlines_image_by_verdict():
    """_burn_outlines: one 8-bit image at the axes' pixel width; each verdict's outlines in its colour,
    the first verdict of ``present`` burnt last (on top); elsewhere transparent."""
    from matplotlib.colors import to_rgba

    shapes = np.array(_burn_shapes(), dtype=object)
    verdicts = np.array(["consistent", "conflict"] * (len(shapes) // 2) + ["consistent"] * (len(shapes) % 2))
    fig = maps._new_figure((5.0, 4.0), 40)
    rect = [0.1, 0.1, 0.5, 0.8]  # 5 in * 40 dpi * 0.5 = 100 pixels wide, 80 high for the 100 x 80 view
    ax = fig.add_axes(rect)
    view = (0.0, 0.0, 100.0, 80.0)
    maps._burn_outlines(fig, ax, rect, shapes, verdicts, ["conflict", "consistent"], view)
    img = ax.images[-1].get_array()
    assert img.shape == (80, 100, 4) and img.dtype == np.uint8
    conflict = _burn_reference(shapes[verdicts == "conflict"], view, 100, 80)
    consistent = _burn_reference(shapes[verdicts == "consistent"], view, 100, 80) & ~conflict
    colour = {v: np.round(np.array(to_rgba(maps._VERDICT_STYLE[v][0])) * 255).astype(np.uint8) for v in verdicts}
    assert (img[conflict] == colour["conflict"]).all()
    assert (img[consistent] == colour["consistent"]).all()
    assert (img[~conflict & ~consistent] == 0).all()


def test_tint_bytes_and_painting_over():
    """Tints are 8-bit as matplotlib drew them from float colours (x 255 in float32, truncated):
    (0.09, 0.09, 0.09, 0.5) -> (22, 22, 22, 127); (0.42, 0, 0.36, 0.5) -> (107, 0, 91, 127).  Painting
    one over another is Porter-Duff "over": red then blue, both at alpha 127/255 = a, gives alpha
    a + a (1 - a) = 0.748 (191 of 255), red a (1 - a) / 0.748 (85) and blue a / 0.748 (170)."""
    assert maps._tint_rgba8((0.09, 0.09, 0.09, 0.5)).tolist() == [22, 22, 22, 127]
    assert maps._tint_rgba8((0.42, 0.0, 0.36, 0.5)).tolist() == [107, 0, 91, 127]
    assert maps._tint_rgba8((0.0, 0.0, 0.0, 0.78)).tolist() == [0, 0, 0, 198]
    t = maps._paint_tint(None, np.array([[True, True, False]]), (1.0, 0.0, 0.0, 0.5))
    t = maps._paint_tint(t, np.array([[False, True, True]]), (0.0, 0.0, 1.0, 0.5))
    assert t.tolist() == [[[255, 0, 0, 127], [85, 0, 170, 191], [0, 0, 255, 127]]]


def _canvas_pixels(draw, figsize=(4.0, 3.0), dpi=100):
    fig = maps._new_figure(figsize, dpi)
    ax = fig.add_axes([0.1, 0.12, 0.6, 0.75])
    draw(ax)
    ax.set_xlim(0, 40)
    ax.set_ylim(0, 30)
    ax.set_aspect("equal", adjustable="box")
    fig.canvas.draw()
    return np.asarray(fig.canvas.buffer_rgba()).astype(int)


def test_cell_zone_tints_in_one_image_look_as_one_image_each():
    """The cell-zone tints painted into one 8-bit image look as each zone drawn as its own float image
    (how they were drawn before), compared on the rendered canvases (common practice for a compositing
    change): the same pixels to rounding, one level where one or two zones lie, two where all three
    overlap (each 8-bit blend of the old way rounds once)."""
    from matplotlib.colors import to_rgb

    from landcheck.evidence.map_images import imshow_rgba8

    rng = np.random.default_rng(31)
    relief = rng.integers(0, 256, (23, 29, 4), dtype=np.uint8)
    relief[..., 3] = 255
    masks = [rng.random((23, 29)) < 0.4 for _ in range(3)]
    extent = (-1.3, 42.1, -2.2, 31.7)  # beyond the axes on every side
    colours = [(*to_rgb(c), maps._CELL_ZONE_ALPHA) for c in maps.CELL_ZONE_COLOURS[:3]]

    def before(ax):
        ax.imshow(relief, extent=extent, origin="upper", interpolation="nearest", zorder=1)
        for m, c in zip(masks, colours):
            rgba = np.zeros((*m.shape, 4), dtype=np.float32)
            rgba[m] = c
            ax.imshow(rgba, extent=extent, origin="upper", interpolation="nearest", zorder=2)

    def now(ax):
        imshow_rgba8(ax, relief, extent, zorder=1)
        tint = None
        for m, c in zip(masks, colours):
            tint = maps._paint_tint(tint, m, c)
        imshow_rgba8(ax, tint, extent, zorder=2)

    a, b = _canvas_pixels(before), _canvas_pixels(now)
    diff = np.abs(a - b).max(axis=2)
    # zones over each canvas pixel: their count drawn as an opaque image on the same grid
    count = np.zeros((*relief.shape[:2], 4), dtype=np.uint8)
    count[..., 0] = sum(m.astype(np.uint8) for m in masks)
    count[..., 3] = 255
    layers = _canvas_pixels(lambda ax: ax.imshow(count, extent=extent, origin="upper", interpolation="nearest"))
    layers = layers[..., 0]
    assert (layers == 3).sum() > 1000
    assert diff[layers <= 2].max() <= 1
    assert diff.max() <= 2
    assert (diff > 0).sum() < 0.2 * diff.size


@pytest.mark.parametrize(
    "shape,extent,figsize,dpi,magnification",
    [
        ((143, 143), (0.0, 40.0, 0.0, 30.0), (4.0, 3.0), 100, 1.0),  # fewer pixels than cells
        ((17, 23), (-1.3, 42.1, -2.2, 31.7), (4.0, 3.0), 100, 1.0),  # many pixels a cell, beyond the axes
        ((60, 80), (3.3, 37.9, 1.1, 28.3), (5.3, 3.7), 137, 1.0),  # fractional axes edges
        ((60, 80), (0.0, 40.0, 0.0, 30.0), (4.0, 3.0), 200, 200 / 72),  # the SVG renderer's magnification
    ],
)
def test_rgba8_image_pixels_as_matplotlib_draws_them(shape, extent, figsize, dpi, magnification):
    """map_images.RGBA8Image resamples 8-bit RGBA in 8 bits; matplotlib's AxesImage goes through float32.
    Same pixel grid and position; opaque and transparent pixels the same bytes, semi-transparent ones
    within one level (matplotlib's premultiplied float round trip)."""
    import matplotlib.image as mimage

    from landcheck.evidence.map_images import RGBA8Image, imshow_rgba8

    rng = np.random.default_rng(41)
    a = rng.integers(0, 256, (*shape, 4), dtype=np.uint8)
    a[..., 3] = rng.choice(np.array([0, 107, 127, 198, 255], dtype=np.uint8), size=shape)
    out = {}
    for kind in ("matplotlib", "rgba8"):
        fig = maps._new_figure(figsize, dpi)
        ax = fig.add_axes([0.1, 0.12, 0.6, 0.75])
        if kind == "matplotlib":
            im = ax.imshow(a, extent=extent, origin="upper", interpolation="nearest")
            assert type(im) is mimage.AxesImage
        else:
            im = imshow_rgba8(ax, a, extent, zorder=1)
            assert isinstance(im, RGBA8Image)
        ax.set_xlim(0, 40)
        ax.set_ylim(0, 30)
        ax.set_aspect("equal", adjustable="box")
        fig.canvas.draw()
        out[kind] = im.make_image(fig.canvas.get_renderer(), magnification)
    (ref, rx, ry, _), (got, gx, gy, _) = out["matplotlib"], out["rgba8"]
    assert (gx, gy) == (rx, ry) and got.shape == ref.shape and got.dtype == np.uint8
    alpha = ref[..., 3]
    assert (got[..., 3] == alpha).all()
    opaque, seen = alpha == 255, (alpha > 0) & (alpha < 255)
    assert opaque.any() and seen.any()
    assert (got[opaque] == ref[opaque]).all()
    assert np.abs(got[seen].astype(int) - ref[seen].astype(int)).max() <= 1
    # the byte path runs on the matplotlib versions it was checked against, and only there
    import matplotlib

    from landcheck.evidence import map_images

    minor = ".".join(matplotlib.__version__.split(".")[:2])
    assert map_images._BYTE_PATH is (minor in map_images.CHECKED_MATPLOTLIB)


def test_parcels_in_view_are_those_of_cx(audit):
    """maps._in_view (spatial index) gives the rows of ``gdf.cx`` (every shape intersecting the frame), in order."""
    folder = maps.load_audit_folder(audit.out_dir)
    gdf = folder.parcels_gdf
    x0, y0, x1, y1 = gdf.total_bounds
    for view in [
        (x0, y0, x1, y1),
        (x0 + 120.0, y0 + 95.0, x0 + 410.0, y0 + 330.0),
        (x0 - 50.0, y0 - 50.0, x0 + 1.0, y0 + 1.0),
        (x1 + 10.0, y1 + 10.0, x1 + 20.0, y1 + 20.0),
    ]:
        got = maps._in_view(gdf, view)
        ref = gdf.cx[view[0] : view[2], view[1] : view[3]]
        assert list(got.index) == list(ref.index)
        assert list(got["parcel_id"]) == list(ref["parcel_id"])
    assert 0 < len(maps._in_view(gdf, (x0 + 120.0, y0 + 95.0, x0 + 410.0, y0 + 330.0))) < len(gdf)


def test_closeup_order_cuts_inside_ties():
    """Largest conflict area first, ties by parcel_id, parcels without conflict area left out, also when
    the number of close-ups cuts through a tie (only parcels at or above the n-th largest area are sorted)."""
    import pandas as pd

    df = pd.DataFrame(
        {
            "parcel_id": ["p9", "p1", "p5", "p3", "p2", "p8", "p7", "p4"],
            "conflict_m2": [50.0, 80.0, 50.0, np.nan, 50.0, 0.0, 120.0, 10.0],
        }
    )
    assert maps.closeup_order(df, 12) == ["p7", "p1", "p2", "p5", "p9", "p4"]
    assert maps.closeup_order(df, 3) == ["p7", "p1", "p2"]
    assert maps.closeup_order(df, 4) == ["p7", "p1", "p2", "p5"]
    assert maps.closeup_order(df, 1) == ["p7"]
    assert maps.closeup_order(df, 0) == []


def test_closeups_on_one_figure_equal_fresh_figures(audit, tmp_path, monkeypatch):
    """Close-ups are drawn one after another on one emptied figure (its renderer keeps measured text
    sizes); each file is byte for byte the one drawn on a figure of its own."""
    one = maps.parcel_closeup_maps(audit.out_dir, 12, dest_dir=tmp_path / "one", formats=("png",))
    assert len(one.items) >= 2
    monkeypatch.setattr(maps, "_emptied", lambda fig: maps._new_figure(tuple(fig.get_size_inches()), fig.dpi))
    fresh = maps.parcel_closeup_maps(audit.out_dir, 12, dest_dir=tmp_path / "fresh", formats=("png",))
    assert [p.name for p in one] == [p.name for p in fresh]
    for a, b in zip(one, fresh):
        assert a.read_bytes() == b.read_bytes(), a.name


def test_raster_layers_at_scale_drawn_and_reproducible(audit, tmp_path, monkeypatch):
    """With the thresholds lowered so the fixture takes the paths of 100 000 parcels (outlines burnt,
    conflict cells tinted), the overview lists the conflict kinds of conflict.tif (bit 0 slope, bit 1
    zone, never both in the fixture) and the files are the same bytes when drawn again."""
    monkeypatch.setattr(maps, "_MANY_PARCELS", 0)
    monkeypatch.setattr(maps, "_MANY_CONFLICT_CELLS", 0)
    first = maps.overview_map(audit.out_dir, dest_dir=tmp_path / "a", dpi=100)
    again = maps.overview_map(audit.out_dir, dest_dir=tmp_path / "b", dpi=100)
    assert {e.key for e in first.legend_entries if e.group == "conflict"} == {"slope", "zone"}
    for a, b in zip(first, again):
        assert a.read_bytes() == b.read_bytes(), a.name
    # the SVG holds images, not 4 parcels' worth of vector outlines: the burnt outlines are one of them
    svg = (tmp_path / "a" / "overview.svg").read_text()
    assert svg.count("<image ") >= 2


def test_class_limits_are_the_first_number_of_each_class(tmp_path):
    """AuditFolder.class_limits_pct: per class the first max_slope_pct that is a number, NaN when none,
    classes in the order they first appear (values chosen by hand)."""
    import pandas as pd

    from landcheck.evidence.folder import AuditFolder

    folder = AuditFolder(tmp_path, {})
    folder.__dict__["parcels"] = pd.DataFrame(
        {
            "class_name": ["forest", "urban", "forest", "water", "urban", "forest"],
            "max_slope_pct": [np.nan, 18.0, 30.0, np.nan, 25.0, 12.0],
        }
    )
    limits = folder.class_limits_pct
    assert list(limits) == ["forest", "urban", "water"]
    assert limits["forest"] == 30.0 and limits["urban"] == 18.0 and math.isnan(limits["water"])
