"""Tests of landcheck.evidence.report: a self-contained HTML page, checked as text and in a real browser."""

from __future__ import annotations

import csv
import hashlib
import html
import re
import shutil
import struct
from html.parser import HTMLParser
from pathlib import Path

import pytest
from report_fixture import build_audit_folder

import landcheck
from landcheck.errors import InputDataError
from landcheck.evidence.report import build_report

# attributes that make a browser fetch or navigate (HTML Living Standard: src, href,
# srcset, poster, data, action, formaction, xlink:href in inline SVG, background)
FETCH_ATTRS = {"src", "href", "srcset", "poster", "data", "action", "formaction", "xlink:href", "background"}


class _Collector(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.attrs: list[tuple[str, str, str]] = []
        self.styles: list[str] = []
        self.scripts: list[str] = []
        self._in: str | None = None
        self.meta: list[dict] = []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            self.attrs.append((tag, k, v or ""))
        if tag in ("style", "script"):
            self._in = tag
        if tag == "meta":
            self.meta.append(dict(attrs))

    def handle_endtag(self, tag):
        if tag == self._in:
            self._in = None

    def handle_data(self, data):
        if self._in == "style":
            self.styles.append(data)
        elif self._in == "script":
            self.scripts.append(data)


#: lower than the default 200 dpi to keep the file fast; test_maps checks the print resolutions
TEST_DPI = 100


def sha256_hex(path) -> str:
    # Source: FIPS 180-4 SHA-256 as implemented by Python's hashlib
    return hashlib.sha256(path.read_bytes()).hexdigest()


def csv_rows(path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    fx = build_audit_folder(tmp_path_factory.mktemp("report"))
    path = build_report(fx.out_dir, figure_formats=("png",), max_closeups=12, dpi=TEST_DPI)
    return fx, path, path.read_text(encoding="utf-8")


def test_report_written_atomically_in_place(built):
    fx, path, text = built
    assert path == fx.out_dir / "report.html"
    # Source: HTML Living Standard 13.1.1, a document starts with the DOCTYPE
    assert text.startswith("<!DOCTYPE html>")
    # write-then-rename (POSIX rename(2), common practice): no temporary file is left behind
    assert not [p.name for p in fx.out_dir.glob(".report.html.*")]


def test_no_network_resource_referenced(built):
    _, _, text = built
    c = _Collector()
    c.feed(text)
    refs = [(tag, k, v) for tag, k, v in c.attrs if k in FETCH_ATTRS]
    assert refs, "expected inline images and links"
    for tag, k, v in refs:
        # every reference is inline data or a fragment on the same page
        assert v.startswith("data:") or v.startswith("#"), (tag, k, v[:80])
        assert not re.match(r"\s*(https?:|//|ftp:|file:)", v, re.I)
    # Source: CSS Syntax / CSS Values: url() and @import are the only ways CSS fetches
    css = "\n".join(c.styles)
    assert "url(" not in css and "@import" not in css.lower()
    # Source: W3C Content Security Policy Level 3: default-src 'none' blocks every fetch
    # not allowed by a more specific directive; img-src allows data: only.
    csp = [m.get("content", "") for m in c.meta if m.get("http-equiv", "").lower() == "content-security-policy"]
    assert csp and "default-src 'none'" in csp[0] and "img-src data:" in csp[0]
    assert "connect-src" not in csp[0]  # so fetch/XHR fall back to 'none'
    # the vendored map library is the npm file byte for byte (minus its source-map comment);
    # it holds URLs only as text (its home page, the SVG namespace) and the CSP above blocks any fetch
    vendored = (Path(landcheck.__file__).parent / "evidence" / "vendor" / "leaflet-1.9.4" / "leaflet.js").read_text(
        encoding="utf-8"
    )
    vendored = vendored.rsplit("//# sourceMappingURL=", 1)[0]
    leaflet = [sc for sc in c.scripts if sc.startswith("/*! Leaflet 1.9.4")]
    assert len(leaflet) == 1 and leaflet[0].endswith(vendored)
    for script in c.scripts:
        if script in leaflet:
            continue
        assert not re.search(r"https?://|fetch\(|XMLHttpRequest|import\(", script)
    # a caution box sits before the first section heading
    assert text.index(html.escape(landcheck.CAUTION)) < text.index("<h2")


def test_manifest_hashes_equal_hashlib(built):
    fx, _, text = built
    # recorded input hashes are shown as written, and equal the files' SHA-256 computed here
    for path in (fx.dem_path, fx.parcels_input_path, fx.zone_input_path, fx.rulebook_path):
        m = re.search(
            r'data-path="' + re.escape(html.escape(str(path))) + r'".*?<code class="sha256">([0-9a-f]{64})', text, re.S
        )
        assert m, path
        assert m.group(1) == sha256_hex(path)
    assert text.count("matches the file") == 4
    # output hashes listed by the report equal hashlib over the output folder's files
    shown = dict(
        re.findall(
            r'<tr data-file="([^"]+)"><td><code>[^<]*</code></td><td class="n">[^<]*</td>'
            r'<td><code class="sha256">([0-9a-f]{64})</code>',
            text,
        )
    )
    assert set(shown) >= {
        "parcels.csv",
        "classes.csv",
        "summary.json",
        "slope_pct.tif",
        "conflict.tif",
        "parcels.gpkg",
        "zones/flood_prone.gpkg",
    }
    for rel, digest in shown.items():
        assert digest == sha256_hex(fx.out_dir / rel), rel


def test_manifest_rulebook_text_parameters(built):
    fx, _, text = built
    # Source: the rulebook file itself, read here; parameters and start time from the fixture's summary.json
    m = re.search(r'<pre id="rulebook-text" class="code">(.*?)</pre>', text, re.S)
    assert html.unescape(m.group(1)) == fx.rulebook_path.read_text(encoding="utf-8")
    assert "<code>review_band_pct</code>" in text and "<code>5.0</code>" in text
    assert 'id="report-built"' in text and "2024-03-05T09:30:00Z" in text
    assert "EPSG:32651" in text


def test_tables_match_csv(built):
    fx, _, text = built
    # Source: the fixture's parcels.csv / classes.csv / summary.json, read here with the csv module
    rows = csv_rows(fx.out_dir / "parcels.csv")
    body = re.search(r'<table id="parcel-table".*?<tbody>(.*?)</tbody>', text, re.S).group(1)
    assert body.count("<tr ") == len(rows)
    head = re.search(r'<table id="parcel-table".*?<thead>(.*?)</thead>', text, re.S).group(1)
    cols = re.findall(r'<th scope="col" data-type="(num|text)" data-col="([^"]+)"', head)
    idx = [c for _, c in cols].index("conflict_m2")
    first = re.findall(r'<td[^>]*data-value="([^"]*)"', body.split("</tr>")[0])
    assert float(first[idx]) == float(rows[0]["conflict_m2"])
    assert dict((c, t) for t, c in cols)["class_name"] == "text"
    assert dict((c, t) for t, c in cols)["area_m2"] == "num"
    # the per-class table lists every row of classes.csv
    classes = [r["class_name"] for r in csv_rows(fx.out_dir / "classes.csv")]
    cbody = re.search(r'<table id="class-table".*?<tbody>(.*?)</tbody>', text, re.S).group(1)
    assert re.findall(r'<tr data-row="\d+"><td data-value="([^"]*)"', cbody) == classes
    # recorded warnings from summary.json are shown
    assert "class value &#x27;X9&#x27; has no rule" in text


def _without_build_time(text: str) -> str:
    return re.sub(r'<time id="report-built">[^<]*</time>', "", text)


def test_rebuild_gives_identical_figures_and_text(built, tmp_path):
    fx, _, text = built
    # invariant (reproducible builds, common practice): same folder -> same figures and text,
    # apart from the build time
    again = build_report(fx.out_dir, report_path=tmp_path / "again.html", figure_formats=("png",), dpi=TEST_DPI)
    text2 = again.read_text(encoding="utf-8")
    imgs = re.findall(r'<img src="(data:image/png;base64,[^"]+)"', text)
    assert len(imgs) >= 6  # 3 charts, the overview and at least 2 close-ups
    assert re.findall(r'<img src="(data:image/png;base64,[^"]+)"', text2) == imgs
    assert _without_build_time(text2) == _without_build_time(text)


def test_changed_and_missing_inputs_are_flagged(built, tmp_path):
    fx = built[0]
    original = fx.rulebook_path.read_bytes()
    moved = fx.dem_path.with_suffix(".moved")
    try:
        with open(fx.rulebook_path, "a", encoding="utf-8") as f:
            f.write("# edited after the audit\n")
        fx.dem_path.rename(moved)
        now = sha256_hex(fx.rulebook_path)
        text = build_report(
            fx.out_dir,
            report_path=tmp_path / "r.html",
            figures_dir=tmp_path / "fig",
            figure_formats=("png",),
            max_closeups=0,
            dpi=TEST_DPI,
        ).read_text(encoding="utf-8")
    finally:
        fx.rulebook_path.write_bytes(original)
        moved.rename(fx.dem_path)
    # Source: hashlib SHA-256 of the edited file, computed above
    assert f'<code class="sha256-now">{now}</code>' in text
    assert "the file changed since the audit" in text
    assert "file not found here" in text
    assert "slope raster is shaded instead" in text
    assert "close-ups show the 0 largest" in text


def test_missing_output_folder(tmp_path):
    # error contract (common practice: errors derive from LandcheckError and name the path)
    with pytest.raises(InputDataError, match="not a folder"):
        build_report(tmp_path / "nope")


# --------------------------------------------------------------------------- real browser


def _browser_paths():
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    return chromium, driver


def _png_size(path) -> tuple[int, int]:
    # Source: PNG specification (ISO/IEC 15948) 5.2 signature, 11.2.2 IHDR width/height
    data = path.read_bytes()[:24]
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.mark.reference_tool
def test_report_in_headless_chromium(built, tmp_path):
    chromium, chromedriver = _browser_paths()
    if not chromium or not chromedriver:
        pytest.skip("chromium and chromedriver are needed (apt-get install chromium chromium-driver)")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By

    fx, path, _ = built
    opts = webdriver.ChromeOptions()
    opts.binary_location = chromium
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
        "--window-size=1280,2200",
        f"--user-data-dir={tmp_path / 'profile'}",
    ):
        opts.add_argument(arg)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=chromedriver), options=opts)
    try:
        driver.get(path.as_uri())
        assert driver.title.startswith("landcheck screening report")
        rows = csv_rows(fx.out_dir / "parcels.csv")

        def column(col: str) -> list[str]:
            return driver.execute_script(
                "var col = arguments[0];"
                "var ths = Array.from(document.querySelectorAll('#parcel-table thead th'));"
                "var i = ths.findIndex(function (t) { return t.dataset.col === col; });"
                "return Array.from(document.querySelectorAll('#parcel-table tbody tr'))"
                ".map(function (r) { return r.cells[i].getAttribute('data-value'); });",
                col,
            )

        def click(col: str) -> str:
            driver.find_element(By.CSS_SELECTOR, f'#parcel-table th[data-col="{col}"] button').click()
            return driver.find_element(By.CSS_SELECTOR, f'#parcel-table th[data-col="{col}"]').get_attribute(
                "aria-sort"
            )

        # numeric column: compared with Python's sorted() over the CSV's values
        area = sorted(float(r["area_m2"]) for r in rows)
        assert click("area_m2") == "ascending"
        assert [float(v) for v in column("area_m2")] == area
        assert click("area_m2") == "descending"
        assert [float(v) for v in column("area_m2")] == area[::-1]
        # text column: code-unit order, which for ASCII equals Python's str ordering
        # the table shows each class's rulebook label (classes.csv)
        label = {r["class_name"]: r["label"] for r in csv_rows(fx.out_dir / "classes.csv")}
        names = sorted(label[r["class_name"]] for r in rows)
        assert click("class_name") == "ascending"
        assert column("class_name") == names
        assert click("class_name") == "descending"
        assert column("class_name") == names[::-1]
        # column with empty cells (no limit): numbers ascending, empties last
        limits = sorted(float(r["max_slope_pct"]) for r in rows if r["max_slope_pct"])
        click("max_slope_pct")
        got = column("max_slope_pct")
        assert [float(v) for v in got if v] == limits and got[len(limits) :] == [""] * (len(rows) - len(limits))

        # nothing was fetched from the network: only inline data
        names_fetched = driver.execute_script(
            "return performance.getEntriesByType('resource').map(function (e) { return e.name; });"
        )
        assert all(n.startswith("data:") for n in names_fetched), names_fetched
        images_ok = driver.execute_script(
            "return Array.from(document.images).every(function (i) { return i.complete && i.naturalWidth > 0; });"
        )
        assert images_ok

        shot = tmp_path / "report.png"
        assert driver.save_screenshot(str(shot))
        assert shot.stat().st_size > 10_000
        w, h = _png_size(shot)
        assert w > 0 and h > 0

        # no errors in the browser console (script errors, CSP violations, failed loads)
        severe = [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]
        assert severe == []
    finally:
        driver.quit()
