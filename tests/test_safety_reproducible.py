"""Same inputs -> byte-identical outputs, across reruns, tile sizes and worker counts.

Reference: hashlib.sha256 of every output file, compared with the SHA256SUMS list landcheck writes
(the `sha256sum -c` format of GNU coreutils); exactness of sums of multiples of a power of two in
IEEE 754 binary64 (docs/references.md §9, from memory: integers below 2^53 are exact).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import shapely
from _support import write_parcels, write_raster, write_rules
from rasterio.transform import from_origin

from landcheck.core.audit import audit
from landcheck.outputs.folder import FILES_NAME, RUN_TIMES_NAME, SUMS_NAME
from landcheck.overlay.sums import AREA_QUANTUM_M2, Totals, WindowSums

X0, Y0 = 400000.0, 1600000.0
REPO = Path(__file__).resolve().parents[1]


def _folder_hashes(folder: Path) -> dict[str, str]:
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.fixture
def rough_inputs(tmp_path):
    # rough terrain and parcels crossing many tile edges: sums whose order changes with the tiling
    rng = np.random.default_rng(5)
    z = np.cumsum(np.cumsum(rng.normal(0, 0.6, (150, 170)), axis=0), axis=1) * 0.05 + 40.0
    dem = write_raster(tmp_path / "dem.tif", z, transform=from_origin(X0, Y0, 7.3, 7.3))
    rules = write_rules(tmp_path / "r.toml", limit=12.0, tol=5.0)
    geoms = [
        shapely.Point(X0 + x, Y0 - y).buffer(r, 7)
        for x, y, r in zip(rng.uniform(150, 1100, 25), rng.uniform(150, 950, 25), rng.uniform(30, 140, 25))
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 26), zoning=["R", "F"] * 12 + ["R"])
    return dem, parcels, rules


def test_other_tile_size_and_worker_count_give_identical_bytes(tmp_path, rough_inputs):
    dem, parcels, rules = rough_inputs
    runs = {
        "a": {"tile_cells": 1024, "workers": 1},
        "b": {"tile_cells": 16, "workers": 2},
        "c": {"tile_cells": 37, "workers": 1},
    }
    hashes = {}
    for name, kw in runs.items():
        audit(dem, parcels, rules, tmp_path / name, make_report=False, skip_confidence=True, show_progress=False, **kw)
        h = _folder_hashes(tmp_path / name)
        h.pop(RUN_TIMES_NAME)
        # tile size and workers change no figure: they are recorded beside the times, in run_times.json
        execution = json.loads((tmp_path / name / RUN_TIMES_NAME).read_text())["execution"]
        assert execution["tile_cells"] == kw["tile_cells"] and execution["workers"] == kw["workers"]
        hashes[name] = h
    for name in ("b", "c"):
        # every file but run_times.json byte for byte: tables, rasters, GeoPackages, summary.json, the lists
        assert hashes[name] == hashes["a"], sorted(k for k in hashes["a"] if hashes["a"][k] != hashes[name].get(k))
    assert hashes["a"]["parcels.gpkg"] == hashes["b"]["parcels.gpkg"] == hashes["c"]["parcels.gpkg"]


def test_rerun_into_new_folder_reproduces_every_file_but_run_times(tmp_path, rough_inputs):
    dem, parcels, rules = rough_inputs
    before = {str(p): hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in rough_inputs}
    for name in ("one", "two"):
        audit(dem, parcels, rules, tmp_path / name, make_report=True, skip_confidence=True, show_progress=False)
    one, two = _folder_hashes(tmp_path / "one"), _folder_hashes(tmp_path / "two")
    assert one.keys() == two.keys()
    assert any(k.startswith("figures/") for k in one) and "report.html" in one
    assert any(k.startswith("zones/") for k in one) or "parcels.gpkg" in one
    differ = sorted(k for k in one if one[k] != two[k])
    assert differ == [RUN_TIMES_NAME]
    listed = {e["path"]: e["sha256"] for e in json.loads((tmp_path / "one" / FILES_NAME).read_text())["files"]}
    assert listed == {k: v for k, v in one.items() if k not in (RUN_TIMES_NAME, FILES_NAME, SUMS_NAME)}
    summary = (tmp_path / "one" / "summary.json").read_text()
    assert "started_utc" not in summary and "finished_utc" not in summary
    times = json.loads((tmp_path / "one" / RUN_TIMES_NAME).read_text())
    assert times["started_utc"] <= times["finished_utc"]
    assert {str(p): hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in rough_inputs} == before


def test_window_sums_merge_exactly_in_any_order():
    # Terms that float addition rounds differently in different orders (0.1 is not a binary fraction):
    # after quantization the totals are the same bit for bit, whatever the order of the windows.
    rng = np.random.default_rng(1)
    n = 3
    parts = []
    for _ in range(40):
        q = np.rint(rng.uniform(0, 1e6, n) / AREA_QUANTUM_M2) * AREA_QUANTUM_M2 + 0.0
        parts.append(
            WindowSums(
                np.arange(n),
                q,
                q,
                q,
                np.full(n, 1.0),
                np.tile(q[:, None], (1, 2)),
                q,
                q,
                q,
                np.zeros((n, 0)),
                np.zeros((1, 101)),
                float(q.sum()),
                0.0,
            )
        )
    results = []
    for order in (range(40), reversed(range(40)), rng.permutation(40)):
        t = Totals(n, 2, 0, 1)
        for i in order:
            t.add(parts[i])
        results.append((t.covered_m2.tobytes(), t.over_m2.tobytes(), t.land_m2, t.slope_area_sum.tobytes()))
    assert results[0] == results[1] == results[2]
    exact = sum(int(np.rint(p.covered_m2[0] / AREA_QUANTUM_M2)) for p in parts) * AREA_QUANTUM_M2
    assert float(np.frombuffer(results[0][0])[0]) == exact


@pytest.mark.filterwarnings("ignore::landcheck.errors.LandcheckWarning")  # the demo's two repaired geometries
def test_demo_rerun_gives_same_sha256_for_every_file_but_run_times_and_leaves_inputs_unmodified(tmp_path):
    demo = REPO / "demo_area"
    inputs_before = _folder_hashes(demo)  # DEM, parcels, hazard layers, rulebook, everything the run may read
    hashes = []
    for name in ("first", "second"):
        audit(
            demo / "dem.tif",
            demo / "parcels.gpkg",
            demo / "rulebook.toml",
            tmp_path / name,
            make_report=True,
            show_progress=False,
        )
        h = _folder_hashes(tmp_path / name)
        assert h.pop(RUN_TIMES_NAME)
        hashes.append(h)
    assert hashes[0] == hashes[1]
    assert {"parcels.gpkg", "summary.json", "report.html", "confidence.csv"} <= hashes[0].keys()
    assert _folder_hashes(demo) == inputs_before  # the run never modified an input
