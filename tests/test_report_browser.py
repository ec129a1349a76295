"""The demo report as a person uses it, in headless Chromium with the network cut off.

On screen: the interactive map opens offline, a click on a parcel shows its verdict and
figures in a pop-up (checked against parcels.csv), and a click on a row of the per-parcel
table moves the map to that parcel.  On paper: printed to PDF by Chromium's own print
engine, the report has A4 (or Letter) sheets, the caution in every page, and no element
beyond the right edge of the printable width.
"""

from __future__ import annotations

import base64
import csv
import io
import json
import math
import re
import time
from pathlib import Path

import geopandas as gpd
import pytest
from _support import require_tool

import landcheck
from landcheck.core.audit import audit
from landcheck.evidence.report import build_report

DEMO = Path(__file__).resolve().parents[1] / "demo_area"
MM_PER_IN = 25.4
CSS_PX_PER_IN = 96.0  # Source: CSS Values and Units Level 3, 5.2 absolute lengths (1in = 96px)
PT_PER_IN = 72.0  # Source: ISO 32000-1 8.3.2.3, default user space unit 1/72 inch
A4_MM = (210.0, 297.0)  # Source: ISO 216 A series
LETTER_IN = (8.5, 11.0)  # Source: ANSI/ASME Y14.1 size A (US Letter)
#: page margins of the report's @page rule (left + right), mm
SIDE_MARGINS_MM = 22.0

# the demo parcels include two invalid geometries that the reader repairs, with a warning (tested elsewhere)
pytestmark = [pytest.mark.reference_tool, pytest.mark.filterwarnings("ignore::landcheck.errors.LandcheckWarning")]


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo-report") / "out"
    # as `landcheck demo` runs it: with the land-capability map (confidence run skipped for time)
    audit(
        DEMO / "dem.tif",
        DEMO / "parcels.gpkg",
        DEMO / "rulebook.toml",
        out,
        make_report=False,
        capability_scheme="planning-6",
        skip_confidence=True,
    )
    path = build_report(out, figure_formats=("png",), max_closeups=4, dpi=90)
    return out, path


def _driver(tmp_path, width=1300, height=1100):
    require_tool("chromium")
    require_tool("chromedriver")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    for arg in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--proxy-server=127.0.0.1:9",
        "--host-resolver-rules=MAP * ~NOTFOUND",
        f"--window-size={width},{height}",
        f"--user-data-dir={tmp_path / 'profile'}",
    ):
        opts.add_argument(arg)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    d = webdriver.Chrome(service=Service(executable_path="/usr/bin/chromedriver"), options=opts)
    # no network at all: Chrome DevTools Protocol Network.emulateNetworkConditions(offline)
    d.execute_cdp_cmd("Network.enable", {})
    d.execute_cdp_cmd(
        "Network.emulateNetworkConditions",
        {"offline": True, "latency": 0, "downloadThroughput": 0, "uploadThroughput": 0},
    )
    return d


def _open_map(d, path):
    """Open the report, wait until its map is usable and scroll the map into view; returns the map element."""
    from selenium.webdriver.common.by import By

    d.get(path.as_uri())
    _wait(lambda: d.execute_script("return window.landcheckMapReady === true"))
    el = d.find_element(By.ID, "webmap")
    d.execute_script("arguments[0].scrollIntoView({block: 'center'})", el)
    return el


def _wait(pred, timeout=20.0, step=0.05):
    end = time.time() + timeout
    while time.time() < end:
        v = pred()
        if v:
            return v
        time.sleep(step)
    raise AssertionError("timed out waiting in the browser")


def _map_frame(report_path: Path) -> dict:
    text = report_path.read_text(encoding="utf-8")
    m = re.search(r'<script type="application/json" id="webmap-data">(.*?)</script>', text, re.S)
    assert m, "the report carries its map data inline"
    return json.loads(m.group(1))["frame"]


def _display_xy(frame: dict, x: float, y: float) -> tuple[float, float]:
    """Raster CRS -> the map's display units (docstring of landcheck.evidence.webmap)."""
    return (y - frame["bottom"]) / frame["q"], (x - frame["left"]) / frame["q"] * frame["kx"]


def _rows(out: Path) -> dict[str, dict]:
    with open(out / "parcels.csv", newline="", encoding="utf-8") as f:
        return {r["parcel_id"]: r for r in csv.DictReader(f)}


def test_map_popup_and_table_link_offline(demo_report, tmp_path):
    out, path = demo_report
    rows = _rows(out)
    gdf = gpd.read_file(out / "parcels.gpkg", layer="parcels")
    gdf["parcel_id"] = gdf["parcel_id"].astype(str)
    frame = _map_frame(path)
    # the largest parcel in conflict, by parcels.csv
    conflict = [r for r in rows.values() if r["verdict"] == "conflict"]
    target = max(conflict, key=lambda r: float(r["area_m2"]))
    geom = gdf.loc[gdf["parcel_id"] == target["parcel_id"], "geometry"].iloc[0]
    pt = geom.representative_point()  # a point inside the parcel (GEOS PointOnSurface)
    lat, lng = _display_xy(frame, pt.x, pt.y)

    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By

    d = _driver(tmp_path)
    try:
        el = _open_map(d, path)
        # zoom in on the parcel as a reader would, then click inside it
        d.execute_script(
            "window.landcheckMap.setView([arguments[0], arguments[1]], arguments[2], {animate: false})",
            lat,
            lng,
            frame_zoom(d, geom, frame),
        )
        time.sleep(0.3)
        px, py = d.execute_script(
            "var p = window.landcheckMap.latLngToContainerPoint([arguments[0], arguments[1]]); return [p.x, p.y];",
            lat,
            lng,
        )
        size = el.size
        ActionChains(d).move_to_element_with_offset(
            el, px - size["width"] / 2, py - size["height"] / 2
        ).click().perform()
        pop = _wait(lambda: d.find_elements(By.CSS_SELECTOR, ".leaflet-popup-content .wm-pop"))[0]
        assert pop.get_attribute("data-parcel") == target["parcel_id"]
        assert pop.find_element(By.CSS_SELECTOR, ".wm-verdict").text == "conflict"
        # the pop-up's conflict area is parcels.csv's conflict_m2, in hectares and m²
        m2 = float(target["conflict_m2"])
        assert f"{m2 / 1e4:,.2f} ha ({m2:,.0f} m²)" in pop.text
        # and the map click highlighted the parcel's row in the per-parcel table
        picked = d.find_elements(By.CSS_SELECTOR, "#parcel-table tbody tr.picked")
        assert [p.get_attribute("data-pid") for p in picked] == [target["parcel_id"]]

        # click a table row of a parcel far away: the map flies there and opens its pop-up
        before = d.execute_script("var c = window.landcheckMap.getCenter(); return [c.lat, c.lng];")
        far = max(
            (pid for pid in rows if pid != target["parcel_id"]),
            key=lambda pid: gdf.loc[gdf["parcel_id"] == pid, "geometry"].iloc[0].centroid.distance(pt),
        )
        tr = d.find_element(By.CSS_SELECTOR, f'#parcel-table tbody tr[data-pid="{far}"]')
        d.execute_script("arguments[0].scrollIntoView({block: 'center'})", tr)
        tr.find_elements(By.TAG_NAME, "td")[0].click()
        _wait(
            lambda: d.execute_script(
                "var p = document.querySelector('.leaflet-popup-content .wm-pop');"
                "return p && p.getAttribute('data-parcel') === arguments[0];",
                far,
            )
        )
        after = d.execute_script("var c = window.landcheckMap.getCenter(); return [c.lat, c.lng];")
        fg = gdf.loc[gdf["parcel_id"] == far, "geometry"].iloc[0]
        flat, flng = _display_xy(frame, *fg.envelope.centroid.coords[0])
        half = max(fg.bounds[2] - fg.bounds[0], fg.bounds[3] - fg.bounds[1]) / frame["q"]
        assert math.dist(before, after) > half  # the map moved...
        assert math.dist(after, (flat, flng)) < half  # ...to the parcel
        verdict = d.find_element(By.CSS_SELECTOR, ".leaflet-popup-content .wm-verdict").text
        assert verdict.split(" ")[0] == rows[far]["verdict"].replace("_", " ").split(" ")[0]

        # offline: nothing but inline data was loaded, and the console has no errors
        fetched = d.execute_script(
            "return performance.getEntriesByType('resource').map(function (e) { return e.name; });"
        )
        assert all(n.startswith("data:") for n in fetched), fetched
        assert [e for e in d.get_log("browser") if e.get("level") == "SEVERE"] == []
        shot = tmp_path / "map.png"
        el.screenshot(str(shot))
        assert shot.stat().st_size > 20_000
    finally:
        d.quit()


def _cells_in_zone(out: Path, bit: int, natural_w: int, natural_h: int) -> int:
    """Display blocks with any cell of zone bit ``bit`` in zones/cells.tif, counted with numpy."""
    import numpy as np
    import rasterio

    with rasterio.open(out / "zones" / "cells.tif") as ds:
        a = ds.read(1)
    f = math.ceil(a.shape[1] / natural_w)
    pad = np.zeros((natural_h * f, natural_w * f), dtype=bool)
    pad[: a.shape[0], : a.shape[1]] = (a & (1 << bit)) > 0
    return int(pad.reshape(natural_h, f, natural_w, f).any(axis=(1, 3)).sum())


def test_cell_zone_layers_switch_on(demo_report, tmp_path):
    """Each cell-based hazard zone of the demo rulebook (HAND, sea-level rise) is a layer of its own:
    listed in the layer control by its rulebook label, off at first, drawn once switched on."""
    out, path = demo_report
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    labels = {c["name"]: c["label"] for c in summary["zone_columns"]}
    bits = summary["cell_zone_bits"]
    assert bits == ["flood_hand", "sea_rise_1m"]  # the demo rulebook's two cell-based zones, in rulebook order

    from selenium.webdriver.common.by import By

    d = _driver(tmp_path)
    try:
        _open_map(d, path)
        control = d.find_element(By.CSS_SELECTOR, ".leaflet-control-layers")
        for k, name in enumerate(bits):
            layer = f"Hazard zone: {labels[name]} (cells)"
            # Reference: Chromium - the layer control Leaflet drew, as a reader sees it
            label = [lab for lab in control.find_elements(By.TAG_NAME, "label") if lab.text.strip() == layer]
            assert len(label) == 1, [lab.text for lab in control.find_elements(By.TAG_NAME, "label")]
            box = label[0].find_element(By.CSS_SELECTOR, "input[type=checkbox]")
            assert not box.is_selected()  # off at first
            assert d.find_elements(By.CSS_SELECTOR, f'img.wm-cell-zone[alt="{layer}"]') == []
            box.click()
            img = _wait(lambda layer=layer: d.find_elements(By.CSS_SELECTOR, f'img.wm-cell-zone[alt="{layer}"]'))[0]
            _wait(
                lambda img=img: d.execute_script("return arguments[0].complete && arguments[0].naturalWidth > 0", img)
            )
            assert img.is_displayed()
            # the overlay covers the whole map area, as the relief image does
            rel = d.find_elements(By.CSS_SELECTOR, "img.leaflet-image-layer")[0]
            assert img.rect == pytest.approx(rel.rect, abs=1.0)
            # its coloured pixels, read back by Chromium, are the display blocks holding the zone's
            # cells in zones/cells.tif (Reference: Chromium canvas getImageData; numpy block count)
            w, h, drawn = d.execute_script(
                "var i = arguments[0], c = document.createElement('canvas');"
                "c.width = i.naturalWidth; c.height = i.naturalHeight;"
                "var g = c.getContext('2d'); g.drawImage(i, 0, 0);"
                "var a = g.getImageData(0, 0, c.width, c.height).data, n = 0;"
                "for (var p = 3; p < a.length; p += 4) { if (a[p] > 0) { n++; } }"
                "return [c.width, c.height, n];",
                img,
            )
            expected = _cells_in_zone(out, k, w, h)
            assert expected > 0
            assert drawn == expected
            # the legend under the map names the zone too
            legend = d.find_element(By.CSS_SELECTOR, ".wm-legend").text
            assert f"{labels[name]} (cells)" in legend
            # switched off again, the overlay leaves the map
            box.click()
            _wait(lambda layer=layer: not d.find_elements(By.CSS_SELECTOR, f'img.wm-cell-zone[alt="{layer}"]'))
        assert [e for e in d.get_log("browser") if e.get("level") == "SEVERE"] == []
    finally:
        d.quit()


def test_cell_zones_in_overview_legend(demo_report, tmp_path):
    """The overview map names each cell-based zone in its legend, after the zone's rulebook label."""
    from landcheck.evidence.maps import overview_map

    out, _ = demo_report
    files = overview_map(out, dest_dir=tmp_path, formats=("png",), dpi=60)
    zones = {e.key: e.label for e in files.legend_entries if e.group == "zone"}
    # demo_area/rulebook.toml: zones flood_hand (HAND) and sea_rise_1m (sea-level rise); common practice
    # that a legend uses the names a reader knows from the rulebook
    assert zones["flood_hand"] == "flood hand (cells)"
    assert zones["sea_rise_1m"] == "sea rise 1m (cells)"


def frame_zoom(d, geom, frame) -> float:
    """Zoom at which the parcel spans about 300 px (Leaflet CRS.Simple: 2**zoom px per unit)."""
    span = max(geom.bounds[2] - geom.bounds[0], geom.bounds[3] - geom.bounds[1]) / frame["q"]
    return math.log2(300.0 / span)


def _print_pdf(d, path: Path, paper_in: tuple[float, float]) -> bytes:
    d.get(path.as_uri())
    _wait(lambda: d.execute_script("return document.readyState === 'complete'"))
    res = d.execute_cdp_cmd(
        "Page.printToPDF",
        {"paperWidth": paper_in[0], "paperHeight": paper_in[1], "preferCSSPageSize": True, "printBackground": True},
    )
    return base64.b64decode(res["data"])


@pytest.mark.parametrize(
    ("page_size", "sheet_pt"),
    [
        ("A4", (A4_MM[0] / MM_PER_IN * PT_PER_IN, A4_MM[1] / MM_PER_IN * PT_PER_IN)),
        ("Letter", (LETTER_IN[0] * PT_PER_IN, LETTER_IN[1] * PT_PER_IN)),
    ],
)
def test_printed_pages(demo_report, tmp_path, page_size, sheet_pt):
    pypdf = pytest.importorskip("pypdf")
    out, _ = demo_report
    path = build_report(
        out,
        report_path=out / f"report_{page_size}.html",
        figure_formats=("png",),
        max_closeups=4,
        dpi=90,
        verify_inputs=False,
        page_size=page_size,
    )
    d = _driver(tmp_path)
    try:
        pdf = _print_pdf(d, path, (sheet_pt[0] / PT_PER_IN, sheet_pt[1] / PT_PER_IN))
    finally:
        d.quit()
    reader = pypdf.PdfReader(io.BytesIO(pdf))
    n = len(reader.pages)
    rows = len(_rows(out))
    # a bounded booklet: at most 16 sheets of text, figures and class tables, plus the parcel
    # table at 12 rows or more a landscape sheet (rows with long reasons wrap to five lines);
    # the page before the print layout needed 80 A4 sheets for these 453 parcels
    assert 5 <= n <= 16 + math.ceil(rows / 12)
    caution_start = landcheck.CAUTION[:40]
    portrait = landscape = 0
    for i, page in enumerate(reader.pages, start=1):
        w, h = float(page.mediabox.width), float(page.mediabox.height)
        if w < h:
            portrait += 1
            assert (w, h) == pytest.approx(sheet_pt, abs=1.0)
        else:
            landscape += 1
            assert (h, w) == pytest.approx(sheet_pt, abs=1.0)
        text = " ".join((page.extract_text() or "").split())
        assert caution_start in text, f"page {i}: no caution"
        assert f"page {i} of {n}" in text
    assert portrait >= 3 and landscape >= 1  # wide tables on landscape sheets


def test_nothing_beyond_the_right_margin_in_print(demo_report, tmp_path):
    _, path = demo_report
    d = _driver(tmp_path)
    try:
        d.get(path.as_uri())
        d.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": "print"})
        bad = {}
        # portrait A4 content width for the page, landscape for the wide-table section
        for label, sheet_mm, scope in (
            ("portrait", A4_MM[0], "body > *:not(main), main > section:not(.wide-table)"),
            ("landscape", A4_MM[1], "main > section.wide-table"),
        ):
            width_px = math.floor((sheet_mm - SIDE_MARGINS_MM) / MM_PER_IN * CSS_PX_PER_IN)
            d.execute_cdp_cmd(
                "Emulation.setDeviceMetricsOverride",
                {"width": width_px, "height": 1200, "deviceScaleFactor": 1, "mobile": False},
            )
            time.sleep(0.3)
            bad[label] = d.execute_script(
                "var W = arguments[1], out = [];"
                "document.querySelectorAll(arguments[0]).forEach(function (root) {"
                "  [root].concat(Array.from(root.querySelectorAll('*'))).forEach(function (e) {"
                "    var r = e.getBoundingClientRect(), s = getComputedStyle(e);"
                "    if (s.display !== 'none' && r.width > 0 && r.right > W + 0.5) {"
                "      out.push(e.tagName + '#' + e.id + ' right=' + Math.round(r.right)); } }); });"
                "return out.slice(0, 10);",
                scope,
                width_px,
            )
    finally:
        d.quit()
    assert bad == {"portrait": [], "landscape": []}


def test_demo_prescreen_prints_on_one_a4_sheet(tmp_path):
    pypdf = pytest.importorskip("pypdf")
    import subprocess
    import sys

    out = tmp_path / "lot1051"
    subprocess.run(
        [
            sys.executable,
            "-m",
            "landcheck",
            "-q",
            "prescreen",
            "--dem",
            str(DEMO / "dem.tif"),
            "--rulebook",
            str(DEMO / "rulebook.toml"),
            "--parcels",
            str(DEMO / "parcels.gpkg"),
            "--parcel-id",
            "1051",
            "--out",
            str(out),
        ],
        check=True,
        capture_output=True,
        timeout=300,
    )
    d = _driver(tmp_path)
    try:
        pdf = _print_pdf(d, out / "prescreen.html", (A4_MM[0] / MM_PER_IN, A4_MM[1] / MM_PER_IN))
    finally:
        d.quit()
    reader = pypdf.PdfReader(io.BytesIO(pdf))
    assert len(reader.pages) == 1
    page = reader.pages[0]
    sheet = (A4_MM[0] / MM_PER_IN * PT_PER_IN, A4_MM[1] / MM_PER_IN * PT_PER_IN)
    assert (float(page.mediabox.width), float(page.mediabox.height)) == pytest.approx(sheet, abs=1.0)
    text = " ".join((page.extract_text() or "").split())
    # the sheet ends with the footer: the caution again and the input hashes
    assert text.count(landcheck.CAUTION[:40]) >= 2 and "Inputs:" in text
    # rulebook labels, not keys, in the rule text (demo rulebook: zone keys flood_high, sea_rise_1m)
    assert "flood_high" not in text and "sea_rise_1m" not in text


def _reader_text(path: Path) -> str:
    """The words a reader sees: tags, scripts, styles and the rulebook/WKT listings removed."""
    import html as _html

    t = path.read_text(encoding="utf-8")
    for pat in (r"<script.*?</script>", r"<style.*?</style>", r"<pre.*?</pre>", r"<code.*?</code>"):
        t = re.sub(pat, " ", t, flags=re.S)
    return " ".join(_html.unescape(re.sub(r"<[^>]+>", " ", t)).split())


def test_demo_report_wording(demo_report):
    out, path = demo_report
    text = _reader_text(path)
    # plain words for every state and flag, no raw keys or truncated labels (issue list, common practice)
    for raw in ("True", "False", "not_evaluated", "robust_conflict", "robust_clear", "P(conflict)", "CRS units"):
        assert raw not in text, raw
    # no negative area anywhere, and no "minus" balance line
    assert not re.search(r"[-\u2212]\d[\d,.]* ha", text) and "minus" not in text
    summary = json.loads((out / "summary.json").read_text())
    cap = summary["capability"]
    gap_ha = abs(cap["classified_development_m2"] - cap["land_within_limit_m2"]) / 1e4
    assert f"{gap_ha:,.2f} ha" in text
    # the reference limit is named with where it comes from
    assert f"Reference limit: {cap['reference_limit_pct']:g} %" in text
    # "N parcels with any conflict area" agrees with parcels.csv
    rows = _rows(out).values()
    n_any = sum(float(r["conflict_m2"] or 0) > 0 for r in rows)
    n_conflict = sum(r["verdict"] == "conflict" for r in rows)
    assert f"of the {n_any:,d} parcels with any conflict area ({n_conflict:,d} with the verdict conflict" in text
    # capability classes flat to steep, then hazard zones (capability_legend.csv codes), columns in rulebook order
    with open(out / "capability_legend.csv", newline="", encoding="utf-8") as f:
        legend = {r["label"]: int(r["code"]) for r in csv.DictReader(f)}
    t = path.read_text(encoding="utf-8")
    table = t[t.index('id="capability-class-table"') :]
    table = table[: table.index("</table>")]
    shown = [_html_cell(c) for c in re.findall(r'<tr data-row="\d+"><td data-value="([^"]*)"', table)]
    codes = [legend[s] for s in shown]
    land = [c for c in codes if c != 0]
    assert land == sorted(land) and (0 not in codes or codes[-1] == 0)
    heads = re.findall(r'data-col="([^"]+)" aria-sort', table)[1:]
    with open(out / "classes.csv", newline="", encoding="utf-8") as f:
        order = [r["class_name"] for r in csv.DictReader(f)]
    assert heads == [c for c in order if c in heads]


def _html_cell(text: str) -> str:
    import html as _html

    return _html.unescape(text)
