"""The browser app (``landcheck app``): refusals through its HTTP API, and the whole job in headless Chromium.

The refusals are checked against the CLI's own messages for the same files (``open_dem``, ``load_rules``);
the end-to-end run's ``parcels.csv`` is checked byte for byte against ``landcheck audit`` on the same
inputs and rulebook.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import zipfile
from io import BytesIO
from pathlib import Path

import pytest
from _support import require_tool

pytest.importorskip("starlette")
pytest.importorskip("httpx")
from starlette.testclient import TestClient  # noqa: E402

from landcheck.about import CAUTION  # noqa: E402
from landcheck.app.server import TOKEN_HEADER, create_app  # noqa: E402
from landcheck.app.uploads import UploadRefused, safe_name  # noqa: E402
from landcheck.errors import InputDataError, RuleFileError  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_area"
TWO_CLASSES = {
    "rulebook": {"class_field": "zoning", "id_field": "parcel_id"},
    "classes": {
        "residential": {"values": ["RES-1", "RES-2"], "max_slope_pct": 18.0, "tolerance_pct": 5.0},
        "forest": {"values": ["FOR"], "development": False},
    },
}


@pytest.fixture
def app_client(tmp_path):
    app = create_app(tmp_path / "ws", max_upload_bytes=200_000, token="t0ken")
    with TestClient(app) as c:
        c.headers[TOKEN_HEADER] = "t0ken"
        yield c, app, tmp_path / "ws"


def _project(c) -> int:
    r = c.post("/api/projects", json={"name": "Alderwane test"})
    assert r.status_code == 200, r.text
    return r.json()["id"]


def _files_under(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file()}


def test_page_carries_the_caution_and_the_token(app_client):
    c, _, _ = app_client
    page = c.get("/").text
    assert CAUTION in page
    assert 'name="landcheck-token" content="t0ken"' in page
    assert "http://" not in page.replace("http://www.w3.org", "") and "https://" not in page  # nothing from a network


def test_request_without_token_is_refused(app_client):
    c, app, ws = app_client
    for headers in ({TOKEN_HEADER: ""}, {TOKEN_HEADER: "wrong"}):
        r = c.post("/api/projects", json={"name": "x"}, headers=headers)
        assert r.status_code == 403 and "token" in r.json()["error"]
    bare = TestClient(app)  # no token header at all
    assert bare.post("/api/projects", json={"name": "x"}).status_code == 403
    assert c.get("/api/projects").json()["projects"] == []  # nothing was created
    assert _project(c) == 1  # the same request with the token goes through


def test_foreign_host_header_is_refused(tmp_path):
    app = create_app(tmp_path / "ws", allowed_hosts=["127.0.0.1", "localhost"], token="k")
    with TestClient(app, base_url="http://127.0.0.1") as c:
        assert c.get("/").status_code == 200
        assert c.get("/", headers={"host": "attacker.example"}).status_code == 400


def test_corrupt_dem_is_refused_with_the_cli_message(app_client, tmp_path):
    c, _, ws = app_client
    pid = _project(c)
    junk = b"II*\x00" + b"\x00garbage" * 100  # a TIFF signature and nothing valid after it
    r = c.post(f"/api/projects/{pid}/inputs/dem", files={"file": ("survey.tif", junk)})
    assert r.status_code == 400
    # the CLI's message for the same bytes, naming the file as the user named it
    (tmp_path / "cli").mkdir()
    cli_file = tmp_path / "cli" / "survey.tif"
    cli_file.write_bytes(junk)
    from landcheck.inputs.dem import open_dem

    with pytest.raises(InputDataError) as exc:
        open_dem(cli_file)
    assert r.json()["error"] == str(exc.value).replace(str(cli_file), "survey.tif")
    assert r.json()["error"].startswith("survey.tif: not a raster GDAL can open")
    assert _files_under(ws / "projects" / str(pid) / "inputs") == set()  # nothing kept


def test_rulebook_with_unknown_key_gets_the_cli_line_and_key(app_client, tmp_path):
    c, _, _ = app_client
    pid = _project(c)
    text = '[rulebook]\nclass_field = "zoning"\n\n[classes.residential]\nvalues = ["R"]\nmax_slope = 18.0\n'
    got = c.post(f"/api/projects/{pid}/rulebook/load", json={"text": text}).json()
    assert got["ok"] is False
    f = tmp_path / "rulebook.toml"
    f.write_text(text)
    from landcheck.inputs.rulebook import load_rules

    with pytest.raises(RuleFileError) as exc:
        load_rules(f)
    assert got["message"] == str(exc.value).replace(str(f), "rulebook.toml")
    assert got["message"].startswith("rulebook.toml, line 6, [classes.residential].max_slope: unknown key 'max_slope'")
    # the same refusal when the form's state carries the key, and a run is not accepted with it
    state = {"rulebook": {"class_field": "zoning"}, "classes": {"residential": {"values": ["R"], "max_slope": 18.0}}}
    rendered = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": state}).json()
    assert rendered["ok"] is False and "unknown key 'max_slope'" in rendered["message"]
    r = c.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": {}})
    assert r.status_code == 400 and "max_slope" in r.json()["error"]


def test_rulebook_layer_outside_the_project_is_refused(app_client):
    c, _, _ = app_client
    pid = _project(c)
    text = (
        '[rulebook]\nclass_field = "zoning"\n\n[layers]\nflood = "../../../../etc/hosts"\n\n'
        '[classes.r]\nvalues = ["R"]\nforbidden_zones = ["f"]\n\n'
        '[zones.f]\nkind = "flood_polygons"\nlayer = "flood"\nlevel_field = "x"\nmin_level = 1\n'
    )
    got = c.post(f"/api/projects/{pid}/rulebook/load", json={"text": text}).json()
    assert got["ok"] is False
    assert got["message"].startswith("rulebook.toml, line 5, [layers].flood: 'hosts' is not a layer uploaded")


@pytest.mark.parametrize(
    "name",
    [
        "../evil.tif",
        "..%2fevil.tif",
        "%2e%2e%2fevil.tif",
        "/etc/evil.tif",
        "sub/../../evil.tif",
        "C:\\evil.tif",
        ".hidden.tif",
    ],
)
def test_path_traversal_upload_names_are_refused(app_client, name):
    c, _, ws = app_client
    pid = _project(c)
    before = _files_under(ws.parent)
    r = c.post(f"/api/projects/{pid}/inputs/dem", files={"file": (name, b"x" * 100)})
    assert r.status_code == 400
    if name.startswith("C:"):  # python-multipart keeps only the last part of a Windows path (then: not a raster)
        assert r.json()["error"].startswith("evil.tif: not a raster")
    else:
        assert "not a plain file name" in r.json()["error"]
    after = _files_under(ws.parent)
    assert {p for p in after - before if not p.endswith(("-wal", "-shm"))} == set()  # nothing written anywhere
    assert not (ws.parent / "evil.tif").exists() and not Path("/etc/evil.tif").exists()


def test_safe_name_keeps_plain_names():
    assert safe_name("Alderwane DEM (2024) v2.tif") == "Alderwane DEM (2024) v2.tif"
    with pytest.raises(UploadRefused):
        safe_name("a\x00b.tif")


def test_oversized_upload_is_refused_and_nothing_is_left(app_client):
    c, _, ws = app_client
    pid = _project(c)
    r = c.post(f"/api/projects/{pid}/inputs/dem", files={"file": ("big.tif", b"\x00" * 300_000)})
    assert r.status_code == 413 and "upload limit (0.2 MB)" in r.json()["error"]
    assert _files_under(ws / "projects" / str(pid) / "inputs") == set()


def test_download_paths_stay_inside_the_run_output(app_client):
    c, app, ws = app_client
    pid = _project(c)
    w = app.state.workspace
    # a finished run as the app records one: an output folder, and files beside it that are not output
    rb = w.x(
        "INSERT INTO rulebooks (project_id, version, path, text, sha256, created_utc) VALUES (?, 1, 'x', '', '', '')",
        (pid,),
    )
    rid = w.x(
        "INSERT INTO runs (project_id, rulebook_id, state, options, made_from, created_utc) "
        "VALUES (?, ?, 'done', '{}', '{\"inputs\": []}', '')",
        (pid, rb),
    )
    out = w.run_dir(pid, rid) / "output"
    out.mkdir(parents=True)
    (out / "parcels.csv").write_text("parcel_id,verdict\n1,conflict\n")
    (w.run_dir(pid, rid) / "job.json").write_text('{"secret": 1}')
    (ws.parent / "outside.txt").write_text("outside")
    assert c.get(f"/runs/{rid}/files/parcels.csv").text.startswith("parcel_id,verdict")
    for bad in (
        "../job.json",
        "..%2fjob.json",
        "%2e%2e/job.json",
        "%2e%2e%2f%2e%2e%2f%2e%2e%2f%2e%2e%2f%2e%2e%2foutside.txt",
        "%2Fetc%2Fpasswd",
        "/etc/passwd",
        f"{ws.parent / 'outside.txt'}",
    ):
        r = c.get(f"/runs/{rid}/files/{bad}")
        assert r.status_code == 404, (bad, r.status_code)
        assert "secret" not in r.text and "outside" != r.text and "root:" not in r.text
    z = zipfile.ZipFile(BytesIO(c.get(f"/runs/{rid}/download.zip").content))
    assert z.namelist() == [f"landcheck-run-{rid}/parcels.csv"]


# --------------------------------------------------------------------------- the whole job in a browser


def _start_app(workspace: Path):
    proc = subprocess.Popen(
        [sys.executable, "-m", "landcheck", "app", "--workspace", str(workspace), "--port", "0"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=str(ROOT),
    )
    line = proc.stdout.readline()
    m = re.search(r"http://127\.0\.0\.1:(\d+)/", line)
    if not m:
        proc.kill()
        raise AssertionError(f"no address printed: {line!r} {proc.stderr.read()}")
    return proc, f"http://127.0.0.1:{m.group(1)}"


def _chrome(tmp_path):
    chromium = require_tool("chromium")
    chromedriver = require_tool("chromedriver")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

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
        "--window-size=1400,1800",
        f"--user-data-dir={tmp_path / 'profile'}",
    ):
        opts.add_argument(arg)
    return webdriver.Chrome(service=Service(executable_path=chromedriver), options=opts)


@pytest.mark.reference_tool
def test_whole_job_in_headless_chromium(tmp_path):
    from selenium.common.exceptions import TimeoutException
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as EC
    from selenium.webdriver.support.ui import Select, WebDriverWait

    driver = _chrome(tmp_path)
    proc, base = _start_app(tmp_path / "ws")
    try:
        wait = WebDriverWait(driver, 120)
        driver.get(base + "/")
        assert CAUTION in driver.find_element(By.ID, "caution").text
        # the start page is built by the app's script: wait for it on a loaded machine
        wait.until(EC.presence_of_element_located((By.ID, "new-project-name"))).send_keys("Alderwane hills")
        driver.find_element(By.ID, "new-project-btn").click()
        # inputs: the demo DEM and parcels, each checked and described at once
        for role, f in (("dem", DEMO / "dem.tif"), ("parcels", DEMO / "parcels.gpkg")):
            wait.until(EC.presence_of_element_located((By.ID, f"file-{role}"))).send_keys(str(f))
            driver.find_element(By.ID, f"upload-{role}").click()
            card = wait.until(EC.presence_of_element_located((By.ID, f"card-{role}")))
            assert "EPSG:32651" in card.text  # Source: demo_area/README.md (EPSG:32651)
        assert "1000 × 1000 cells" in driver.find_element(By.ID, "card-dem").text
        assert (
            "453 (MultiPolygon)" in driver.find_element(By.ID, "card-parcels").text
        )  # demo_area/README.md: 453 parcels

        # the rulebook, built in the form
        Select(driver.find_element(By.ID, "class-field")).select_by_value("zoning")
        wait.until(EC.text_to_be_present_in_element((By.ID, "class-values"), "RES-1"))
        Select(driver.find_element(By.ID, "id-field")).select_by_value("parcel_id")

        def add_class(name):
            box = driver.find_element(By.ID, "new-class-name")
            box.clear()
            box.send_keys(name)
            driver.find_element(By.ID, "add-class").click()
            return wait.until(EC.presence_of_element_located((By.CSS_SELECTOR, f'.block[data-class="{name}"]')))

        def block(name):
            return driver.find_element(By.CSS_SELECTOR, f'.block[data-class="{name}"]')

        add_class("residential")
        for v in ("RES-1", "RES-2"):
            block("residential").find_element(By.CSS_SELECTOR, f'input[name="value"][value="{v}"]').click()
        block("residential").find_element(By.NAME, "max_slope_pct").send_keys("18")
        block("residential").find_element(By.NAME, "tolerance_pct").send_keys("5")
        add_class("forest")
        block("forest").find_element(By.CSS_SELECTOR, 'input[name="value"][value="FOR"]').click()
        block("forest").find_element(By.NAME, "development").click()
        wait.until(EC.text_to_be_present_in_element((By.ID, "toml-preview"), "development = false"))
        wait.until(EC.presence_of_element_located((By.ID, "rulebook-ok")))
        toml = driver.find_element(By.ID, "toml-preview").text
        assert (
            "[classes.residential]" in toml and 'values = ["RES-1", "RES-2"]' in toml and "max_slope_pct = 18" in toml
        )

        # run, and watch the bars fill
        wait.until(EC.element_to_be_clickable((By.ID, "start-run"))).click()
        wait.until(EC.presence_of_element_located((By.CSS_SELECTOR, "#progress-panel .stage")))
        WebDriverWait(driver, 240).until(EC.presence_of_element_located((By.ID, "run-done")))
        bars = driver.find_elements(By.CSS_SELECTOR, "#final-stages .stage")
        assert [b.get_attribute("data-stage") for b in bars] == ["inputs", "audit", "report"]
        assert all(b.get_attribute("data-state") == "done" for b in bars)
        assert all(
            b.find_element(By.CSS_SELECTOR, "[role=progressbar]").get_attribute("aria-valuenow") == "100" for b in bars
        )
        run_url = driver.current_url

        # the same job on the command line, with the rulebook version the run was made from
        m = re.search(r"#/r/(\d+)", run_url)
        rid = int(m.group(1))
        import httpx

        run = httpx.get(f"{base}/api/runs/{rid}").json()
        rb_text = httpx.get(f"{base}/api/projects/{run['project_id']}/rulebooks/{run['rulebook_version']}.toml").text
        assert rb_text == toml.rstrip("\n") + "\n" or rb_text.strip().endswith("development = false")
        (tmp_path / "cli").mkdir()
        (tmp_path / "cli" / "rulebook.toml").write_text(rb_text)
        cli = subprocess.run(
            [sys.executable, "-m", "landcheck", "-q", "audit", "--dem", str(DEMO / "dem.tif"), "--parcels",
             str(DEMO / "parcels.gpkg"), "--rulebook", str(tmp_path / "cli" / "rulebook.toml"), "--out",
             str(tmp_path / "cli" / "out"), "--no-report", "--json"],
            capture_output=True, text=True, cwd=str(ROOT),
        )  # fmt: skip
        assert cli.returncode == 0, cli.stderr
        cli_csv = (tmp_path / "cli" / "out" / "parcels.csv").read_bytes()
        verdict_of = {}
        for row in cli_csv.decode().splitlines()[1:]:
            cells = row.split(",")
            verdict_of[cells[0]] = row
        conflicts = [k for k, row in verdict_of.items() if ",conflict," in row]
        assert len(conflicts) == json.loads(cli.stdout)["totals"]["verdict_counts"]["conflict"] > 0

        # click a conflicting parcel on the map and read its verdict
        path = wait.until(
            EC.presence_of_element_located((By.CSS_SELECTOR, f'#parcel-map path[data-id="{conflicts[0]}"]'))
        )
        driver.execute_script("arguments[0].scrollIntoView({block: 'center'});", path)
        try:
            path.click()
        except Exception:  # a neighbour drawn on top: send the click to the shape itself
            driver.execute_script("arguments[0].dispatchEvent(new MouseEvent('click', {bubbles: true}));", path)
        assert wait.until(EC.presence_of_element_located((By.ID, "panel-id"))).text == conflicts[0]
        assert driver.find_element(By.ID, "panel-verdict").text == "conflict"
        shot = tmp_path / "app.png"
        driver.save_screenshot(str(shot))
        assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        if os.environ.get("LANDCHECK_APP_SCREENSHOT"):  # docs/img/app.png is made this way (docs/app.md)
            shutil.copyfile(shot, os.environ["LANDCHECK_APP_SCREENSHOT"])
        # filters: conflict only shows as many rows as the CLI found
        Select(driver.find_element(By.ID, "filter-verdict")).select_by_value("conflict")
        assert len(driver.find_elements(By.CSS_SELECTOR, "#parcel-rows tr")) == len(conflicts)
        assert CAUTION in driver.find_element(By.ID, "caution").text

        # download the zip the page links to; its parcels.csv is the CLI's, byte for byte
        href = driver.find_element(By.ID, "download-zip").get_attribute("href")
        z = zipfile.ZipFile(BytesIO(httpx.get(href, timeout=60).content))
        assert z.read(f"landcheck-run-{rid}/parcels.csv") == cli_csv
        assert f"landcheck-run-{rid}/report.html" in z.namelist()
        # the run's own report shows in the frame (sandboxed: its scripts run, the app's API is out of reach)
        driver.switch_to.frame(driver.find_element(By.ID, "report-frame"))
        assert driver.execute_script("return document.title").startswith("landcheck screening report")
        assert CAUTION in driver.execute_script("return document.body.innerText")
        driver.switch_to.default_content()
        # reopening the run shows what it was made from
        driver.get(run_url)
        made = wait.until(EC.presence_of_element_located((By.ID, "made-from-table"))).text
        import hashlib

        assert hashlib.sha256((DEMO / "dem.tif").read_bytes()).hexdigest() in made
        assert hashlib.sha256((DEMO / "parcels.gpkg").read_bytes()).hexdigest() in made
        # the run's options in plain words, not raw JSON (common practice: a reader sees no code syntax)
        options = driver.find_element(By.ID, "run-options").text
        assert options.startswith("Options: ") and "{" not in options and '"' not in options
        # loading a rulebook with an unknown key into the form: the CLI's line-and-key message, line marked
        bad = tmp_path / "bad.toml"
        bad.write_text(
            '[rulebook]\nclass_field = "zoning"\n\n[classes.residential]\nvalues = ["RES-1"]\nslope_limit = 18\n'
        )
        from landcheck.inputs.rulebook import load_rules

        with pytest.raises(RuleFileError) as exc:
            load_rules(bad)
        driver.get(f"{base}/#/p/{run['project_id']}")
        wait.until(EC.presence_of_element_located((By.ID, "toml-load"))).send_keys(str(bad))
        expected = str(exc.value).replace(str(bad), "rulebook.toml")
        wait.until(EC.presence_of_element_located((By.ID, "rulebook-error")))
        try:  # the element may still show the message of the form's earlier rulebook for a moment
            wait.until(lambda d: d.find_element(By.ID, "rulebook-error").text == expected)
        except TimeoutException:
            pass  # the assertion below reports what is shown
        time.sleep(1.0)  # longer than the form's 200 ms re-check: the refused file's message must stay
        assert driver.find_element(By.ID, "rulebook-error").text == expected
        assert driver.find_element(By.CSS_SELECTOR, "#toml-preview span.hit").text == "slope_limit = 18"
    finally:
        driver.quit()
        proc.terminate()
        proc.wait(30)


# --------------------------------------------------------------------------- runs: queue, cancel, stop


def _upload_demo(post, pid):
    for role, f in (("dem", DEMO / "dem.tif"), ("parcels", DEMO / "parcels.gpkg")):
        with open(f, "rb") as fh:
            r = post(f"/api/projects/{pid}/inputs/{role}", files={"file": (f.name, fh)})
        assert r.status_code == 200, r.text


def _wait(get, rid, states, timeout=90):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        r = get(f"/api/runs/{rid}").json()
        if r["state"] in states:
            return r
        time.sleep(0.2)
    raise AssertionError(f"run {rid} did not reach {states}: {r['state']}")


def test_one_run_at_a_time_and_cancel_keeps_nothing(app_client):
    c, app, ws = app_client
    pid = _project(c)
    # the fixture limits uploads to 0.2 MB; copy the demo in through a second app on the same workspace
    app2 = create_app(ws, token="t0ken")
    with TestClient(app2) as up:
        up.headers[TOKEN_HEADER] = "t0ken"
        _upload_demo(up.post, pid)
    text = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": TWO_CLASSES}).json()["toml"]
    first = c.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": {"tile_cells": 256}}).json()
    second = c.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": {}}).json()
    assert first["state"] == "running" and second["state"] == "queued"  # one run at a time per project
    assert c.post(f"/api/runs/{second['id']}/cancel").json()["state"] == "cancelled"
    _wait(c.get, first["id"], ("running",))
    assert c.post(f"/api/runs/{first['id']}/cancel").json()["state"] == "cancelling"
    done = _wait(c.get, first["id"], ("cancelled", "failed", "done"))
    assert done["state"] == "cancelled" and done["outputs"] == []
    rd = app.state.workspace.run_dir(pid, first["id"])
    assert sorted(p.name for p in rd.iterdir()) == ["job.json", "worker.log"]  # no output, no staged folder
    assert c.get(f"/runs/{first['id']}/files/parcels.csv").status_code == 404
    assert c.get(f"/api/runs/{second['id']}").json()["state"] == "cancelled"  # the queued one never started


def test_stopping_the_server_mid_run_publishes_nothing(tmp_path):
    import httpx

    proc, base = _start_app(tmp_path / "ws")
    try:
        page = httpx.get(base + "/").text
        tok = re.search(r'name="landcheck-token" content="([^"]+)"', page).group(1)
        cl = httpx.Client(base_url=base, headers={TOKEN_HEADER: tok}, timeout=60)
        pid = cl.post("/api/projects", json={"name": "stop"}).json()["id"]
        _upload_demo(cl.post, pid)
        text = cl.post(f"/api/projects/{pid}/rulebook/render", json={"state": TWO_CLASSES}).json()["toml"]
        rid = cl.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": {"tile_cells": 256}}).json()["id"]
        _wait(cl.get, rid, ("running",))
        time.sleep(1.0)
    finally:
        proc.terminate()  # what Ctrl+C or a service manager does
        # uvicorn shuts down gracefully (the app stops its workers), then re-raises the signal it caught
        assert proc.wait(60) in (0, -signal.SIGTERM)
    import sqlite3

    db = sqlite3.connect(tmp_path / "ws" / "landcheck-workspace.sqlite")
    state, msg = db.execute("SELECT state, message FROM runs WHERE id = ?", (rid,)).fetchone()
    assert state == "interrupted" and "nothing of it was kept" in msg
    assert db.execute("SELECT COUNT(*) FROM outputs").fetchone()[0] == 0
    db.close()
    rd = tmp_path / "ws" / "projects" / str(pid) / "runs" / str(rid)
    assert sorted(p.name for p in rd.iterdir()) == ["job.json", "worker.log"]


# --------------------------------------------------------------------------- more inputs, and a failing run


def test_hazard_layer_and_zone_in_the_form(app_client):
    c, _, _ = app_client
    pid = _project(c)
    with open(DEMO / "rivers.gpkg", "rb") as fh:
        r = c.post(f"/api/projects/{pid}/inputs/hazard", files={"file": ("rivers.gpkg", fh)})
    assert r.status_code == 200, r.text
    info = r.json()["info"]
    assert info["key"] == "rivers" and info["epsg"] == 32651  # Source: demo_area/README.md (EPSG:32651)
    assert "width_m" in [f["name"] for f in info["fields"]] and info["features"] == 2  # README: two LineStrings
    state = json.loads(json.dumps(TWO_CLASSES))
    state["layers"] = c.get(f"/api/projects/{pid}").json()["layer_files"]
    state["zones"] = {"river_strip": {"kind": "easement", "layer": "rivers", "width_m": 20.0}}
    state["classes"]["residential"]["forbidden_zones"] = ["river_strip"]
    got = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": state}).json()
    assert got["ok"] is True, got["message"]
    assert '[layers]\nrivers = "rivers.gpkg"' in got["toml"] and "[zones.river_strip]" in got["toml"]
    # and a zone that names a layer the project does not have gets the CLI's line-and-key message
    state["zones"]["river_strip"]["layer"] = "canals"
    bad = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": state}).json()
    assert re.match(
        r"rulebook\.toml, line \d+, \[zones\.river_strip\]\.layer: layer 'canals' is not listed", bad["message"]
    )


def test_zipped_shapefile_upload_and_zip_slip(app_client, tmp_path):
    from _support import write_parcels
    from shapely.geometry import box

    c, _, ws = app_client
    pid = _project(c)
    shp_dir = tmp_path / "shp"
    shp_dir.mkdir()
    write_parcels(shp_dir / "lots.shp", [box(0, 0, 10, 10), box(10, 0, 20, 10)], zoning=["R", "F"], pid=[1, 2])
    good = tmp_path / "lots.zip"
    with zipfile.ZipFile(good, "w") as z:
        for f in shp_dir.iterdir():
            z.write(f, f.name)
    r = c.post(f"/api/projects/{pid}/inputs/parcels", files={"file": ("lots.zip", good.read_bytes())})
    assert r.status_code == 200, r.text
    assert r.json()["info"]["features"] == 2 and [f["name"] for f in r.json()["info"]["fields"]] == ["zoning", "pid"]
    evil = tmp_path / "evil.zip"
    with zipfile.ZipFile(evil, "w") as z:
        for f in shp_dir.iterdir():
            z.write(f, "../../" + f.name)
    r = c.post(f"/api/projects/{pid}/inputs/parcels", files={"file": ("evil.zip", evil.read_bytes())})
    # member names are cut to their last part: the Shapefile lands inside the project, nowhere else
    assert r.status_code == 200, r.text
    stored = [i["path"] for i in c.get(f"/api/projects/{pid}").json()["inputs"]]
    assert stored == [f"projects/{pid}/inputs/evil/lots.shp"]
    assert not (ws.parent / "lots.shp").exists() and not (ws.parent.parent / "lots.shp").exists()  # nothing escaped


def test_failed_run_shows_its_message_and_keeps_nothing(app_client, tmp_path):
    from _support import ramp_dem, write_parcels
    from shapely.geometry import box

    c, app, _ = app_client
    pid = _project(c)
    dem = ramp_dem(tmp_path / "ramp.tif", n=40)  # 400 m square at easting 400000
    far = write_parcels(tmp_path / "far.gpkg", [box(500000, 1500000, 500100, 1500100)], zoning=["R"], pid=[1])
    for role, f in (("dem", dem), ("parcels", far)):
        r = c.post(f"/api/projects/{pid}/inputs/{role}", files={"file": (f.name, f.read_bytes())})
        assert r.status_code == 200, r.text
    state = {"rulebook": {"class_field": "zoning"}, "classes": {"r": {"values": ["R"], "max_slope_pct": 18.0}}}
    text = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": state}).json()["toml"]
    rid = c.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": {}}).json()["id"]
    run = _wait(c.get, rid, ("done", "failed", "cancelled"))
    assert run["state"] == "failed"
    assert run["message"].startswith(f"projects/{pid}/inputs/far.gpkg (layer parcels): no parcel overlaps the DEM")
    rd = app.state.workspace.run_dir(pid, rid)
    assert sorted(p.name for p in rd.iterdir()) == ["job.json", "worker.log"]


def test_cli_refuses_a_public_address_without_the_flag():
    from click.testing import CliRunner

    from landcheck.cli.main import cli

    res = CliRunner().invoke(cli, ["app", "--host", "0.0.0.0", "--port", "0"])
    assert res.exit_code == 2 and "--allow-remote" in res.output
    helptext = CliRunner().invoke(cli, ["app", "--help"]).output
    assert "127.0.0.1" in helptext and "CAUTION: a screening aid" in helptext


def test_run_with_every_option(app_client, tmp_path):
    from _support import ramp_dem, write_parcels
    from shapely.geometry import box

    c, app, _ = app_client
    pid = _project(c)
    # slope = 100 * g * x percent at x metres east of the west edge (tests/_support.ramp_dem; Source:
    # docs/references.md, Terrain: Horn's 3x3 kernel is exact on a quadratic surface): 0 to 40 % over 400 m
    dem = ramp_dem(tmp_path / "ramp.tif", n=40, gradient_per_m=0.001)
    x0, y0 = 400000.0, 1600000.0
    lots = write_parcels(
        tmp_path / "lots.gpkg",
        [box(x0 + 20, y0 - 380, x0 + 150, y0 - 20), box(x0 + 250, y0 - 380, x0 + 380, y0 - 20)],
        zoning=["F", "R"],
        pid=[1, 2],
    )
    for role, f in (("dem", dem), ("parcels", lots)):
        assert c.post(f"/api/projects/{pid}/inputs/{role}", files={"file": (f.name, f.read_bytes())}).status_code == 200
    state = {
        "rulebook": {"class_field": "zoning", "id_field": "pid"},
        "classes": {
            "r": {"values": ["R"], "max_slope_pct": 18.0, "designated_class": "f"},
            "f": {"values": ["F"], "development": False},
        },
    }
    text = c.post(f"/api/projects/{pid}/rulebook/render", json={"state": state}).json()["toml"]
    opts = {
        "confidence": "custom",
        "rmse_m": 0.5,
        "corr_length_m": 0,
        "realizations": 10,
        "seed": 3,
        "capability_scheme": "planning-6",
        "draft_mmu_m2": 0,
        "prescreen_parcel": "2",
    }
    rid = c.post(f"/api/projects/{pid}/runs", json={"rulebook": text, "options": opts}).json()["id"]
    run = _wait(c.get, rid, ("done", "failed", "cancelled"), timeout=240)
    assert run["state"] == "done", run["message"]
    assert [s["key"] for s in run["live"]["stages"]] == [
        "inputs",
        "audit",
        "confidence",
        "capability",
        "reclassification",
        "report",
        "prescreen",
    ]
    files = {o["path"] for o in run["outputs"]}
    for f in ("confidence.csv", "capability.tif", "reclassification_moves.csv", "prescreen/prescreen.html"):
        assert f in files
    rows = {r["parcel_id"]: r for r in c.get(f"/api/runs/{rid}/parcels").json()["rows"]}
    # parcel 2 spans x = 250..380 m: slope 25..38 % everywhere, over the 18 % limit
    assert rows["2"]["verdict"] == "conflict" and rows["1"]["verdict"] == "consistent"
    assert run["made_from"]["options"]["capability_scheme"] == "planning-6"


def test_run_options_are_checked():
    from landcheck.app.server import _run_options

    assert _run_options({})["confidence"] == "off"
    assert _run_options({"capability_scheme": "8,18,30"})["capability_scheme"] == [8.0, 18.0, 30.0]
    for bad, words in (
        ({"confidence": "maybe"}, "confidence"),
        ({"confidence": "custom", "rmse_m": -1}, "rmse_m"),
        ({"capability_scheme": "steep"}, "capability map"),
        ({"draft_mmu_m2": -5}, "minimum mapping unit"),
        ({"tile_cells": 4}, "tile size"),
    ):
        with pytest.raises(ValueError, match=words):
            _run_options(bad)
