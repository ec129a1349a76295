"""Engines: the Dask engine gives exactly the local-threads results (invariant, common practice)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
import shapely
from _support import ramp_dem, write_parcels, write_rules
from shapely import affinity

from landcheck.core.audit import audit

X0, Y0 = 400000.0, 1600000.0


@pytest.mark.slow
def test_dask_equals_threads(tmp_path):
    # Reference: the local-threads engine (invariant); Source: closed form on the ramp (slope 0.04 x %): the share
    # over 18 % is the area share east of x = 450 m.
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml", tol=5.0, band=3.0)
    rng = np.random.default_rng(3)
    geoms = [
        affinity.rotate(shapely.box(X0 + x, Y0 - y, X0 + x + w, Y0 - y + 70), a, origin="centroid")
        for x, y, w, a in zip(
            rng.uniform(50, 900, 30), rng.uniform(100, 1100, 30), rng.uniform(30, 200, 30), rng.uniform(0, 90, 30)
        )
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 31), zoning=["R"] * 30)
    a = audit(dem, parcels, rules, tmp_path / "threads", make_report=False, tile_cells=29, workers=2)
    b = audit(dem, parcels, rules, tmp_path / "dask", make_report=False, tile_cells=29, workers=2, engine="dask")
    num = [c for c in a.parcels.columns if a.parcels[c].dtype.kind == "f"]
    np.testing.assert_array_equal(a.parcels[num].to_numpy(), b.parcels[num].to_numpy())
    assert a.parcels["verdict"].tolist() == b.parcels["verdict"].tolist()
    truth = [g.intersection(shapely.box(X0 + 450, Y0 - 1e4, X0 + 1e4, Y0 + 1e4)).area / g.area for g in geoms]
    np.testing.assert_allclose(b.parcels["over_limit_share"], truth, atol=1e-9)


def _engine_case(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif", n=80)
    text = (
        write_rules(tmp_path / "tmp.toml", tol=5.0)
        .read_text()
        .replace('values = ["R"]', 'values = ["R"]\ndesignated_class = "forest"')
    )
    rules = tmp_path / "r.toml"
    rules.write_text(text)
    rng = np.random.default_rng(11)
    geoms = [
        affinity.rotate(shapely.box(X0 + x, Y0 - y, X0 + x + w, Y0 - y + 60), a, origin="centroid")
        for x, y, w, a in zip(
            rng.uniform(40, 650, 16), rng.uniform(90, 700, 16), rng.uniform(40, 150, 16), rng.uniform(0, 90, 16)
        )
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 17), zoning=["R"] * 12 + ["F"] * 4)
    return dem, parcels, rules


_EXTRA_FILES = (
    "parcels.csv",
    "classes.csv",
    "confidence.csv",
    "confidence_classes.csv",
    "capability_by_class.csv",
    "reclassification_moves.csv",
)


@pytest.mark.slow
def test_every_pass_gives_identical_files_on_threads_processes_and_dask(tmp_path):
    # Reference: the local-threads engine (invariant, common practice: results come back in window order,
    # so every reduction adds in the same order): the audit, the confidence realizations, the capability
    # areas (folded into the window pass) and the drafted reclassification must give byte-identical files.
    from distributed import LocalCluster

    dem, parcels, rules = _engine_case(tmp_path)
    kw = dict(
        make_report=False,
        rasters="gtiff",
        tile_cells=23,
        dem_rmse_m=1.0,
        corr_length_m=20.0,
        realizations=12,
        seed=4,
        capability_scheme="planning-6",
        draft_mmu_m2=100.0,
    )
    a = audit(dem, parcels, rules, tmp_path / "threads", workers=2, **kw)
    b = audit(dem, parcels, rules, tmp_path / "processes", engine="processes", workers=2, **kw)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        c = audit(dem, parcels, rules, tmp_path / "dask", scheduler_address=cluster.scheduler_address, **kw)
    assert json.loads((c.out_dir / "run_times.json").read_text())["execution"]["engine"] == "dask"
    for name in _EXTRA_FILES:
        ref = (a.out_dir / name).read_bytes()
        assert (b.out_dir / name).read_bytes() == ref, f"processes: {name}"
        assert (c.out_dir / name).read_bytes() == ref, f"dask: {name}"
    for name in ("slope_pct.tif", "conflict.tif", "capability.tif"):
        with rasterio.open(a.out_dir / name) as x, rasterio.open(c.out_dir / name) as y:
            np.testing.assert_array_equal(x.read(), y.read())
    # the run had something to compare: conflicts, uncertain verdicts and drafted parts
    assert a.n_conflicts > 0 and (a.out_dir / "reclassification.gpkg").exists()


@pytest.mark.slow
def test_capability_folded_into_the_pass_equals_the_stand_alone_pass(tmp_path):
    # Reference: run_capability, the stand-alone capability pass (its own slope pass and coverage); the
    # folded pass must give the same per-class areas (the same cell weights, window order preserved).
    import pandas as pd

    from landcheck.core.run import run_audit
    from landcheck.core.settings import AuditSettings, CapabilityOptions
    from landcheck.geo.grid import iter_windows
    from landcheck.verdicts.capability import run_capability

    dem, parcels, rules = _engine_case(tmp_path)
    run = run_audit(dem, parcels, rules, AuditSettings(tile_cells=23, capability=CapabilityOptions("planning-6")))
    folded, spec = run.capability
    job = run._job
    g = run.dem.grid
    alone, _ = run_capability(
        run.dem,
        list(iter_windows(g.height, g.width, 23)),
        np.asarray(run.parcels.geometry.values),  # no zones here: the plan's geometries are the parcels
        job.plan,
        run.rules,
        spec,
        None,
        method=run.settings.method,
    )
    pd.testing.assert_frame_equal(folded, alone, check_exact=False, rtol=1e-12, atol=1e-9)


@pytest.mark.slow
def test_slope_command_same_on_threads_and_dask(tmp_path):
    # Reference: the local-threads engine (invariant): the slope raster and its class raster are the same
    # cells whatever the engine.
    from distributed import LocalCluster

    from landcheck.core.slope_raster import derive_slope

    dem = ramp_dem(tmp_path / "dem.tif", n=70)
    a = derive_slope(dem, tmp_path / "a.tif", tile_cells=19, class_out=tmp_path / "ac.tif", raster_format="gtiff")
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        b = derive_slope(
            dem,
            tmp_path / "b.tif",
            tile_cells=19,
            class_out=tmp_path / "bc.tif",
            raster_format="gtiff",
            engine="dask",
            scheduler_address=cluster.scheduler_address,
        )
    c = derive_slope(dem, tmp_path / "c.tif", tile_cells=19, raster_format="gtiff", engine="processes", workers=2)
    assert (a.valid_cells, a.min_value, a.max_value) == (b.valid_cells, b.min_value, b.max_value)
    assert (a.valid_cells, a.min_value, a.max_value) == (c.valid_cells, c.min_value, c.max_value)
    for x, y in (("a.tif", "b.tif"), ("ac.tif", "bc.tif"), ("a.tif", "c.tif")):
        with rasterio.open(tmp_path / x) as p, rasterio.open(tmp_path / y) as q:
            np.testing.assert_array_equal(p.read(), q.read())
    # Source: closed form on the ramp (slope 0.04 x % at the cell centre x, docs/references.md): max interior slope
    assert a.max_value == pytest.approx(0.04 * (68 + 0.5) * 10.0, rel=1e-6)
