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
