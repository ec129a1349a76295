"""The public API: docs/api.md runs as a doctest, and run_audit works on a GeoDataFrame without writing a folder.

Reference: the folder audit of the same inputs (invariant: in-memory == folder figures, docs/api.md),
and the demo area's own figures printed in docs/api.md.
"""

from __future__ import annotations

import doctest
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_area"


@pytest.mark.slow
def test_api_doc_examples_run(monkeypatch):
    # Source: common practice (executable documentation): every ```pycon block of docs/api.md must
    # produce the output written under it; a failing example fails this test.
    monkeypatch.chdir(ROOT)
    res = doctest.testfile(
        str(ROOT / "docs" / "api.md"),
        module_relative=False,
        optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE,
        raise_on_error=False,
        verbose=False,
    )
    assert res.attempted > 20
    assert res.failed == 0, f"{res.failed} of {res.attempted} examples in docs/api.md failed (see output above)"


def test_import_is_light_and_public_names_resolve():
    # Invariant: importing the package loads only about/errors; every name in __all__ resolves.
    import subprocess
    import sys

    code = (
        "import sys, landcheck; mods = sorted(m for m in sys.modules if m.startswith('landcheck'));"
        "print(mods); [getattr(landcheck, n) for n in landcheck.__all__]"
    )
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    assert out.stdout.strip() == "['landcheck', 'landcheck.about', 'landcheck.errors']"


@pytest.mark.slow
def test_run_audit_on_a_geodataframe_matches_the_folder_and_writes_nothing(tmp_path, monkeypatch):
    # Reference: audit() on the same inputs given as files (parcels.csv is the documented output,
    # docs/outputs.md); the in-memory result must hold the same columns and values, and no file may appear.
    import geopandas as gpd

    import landcheck
    from landcheck.outputs.writers import write_csv

    monkeypatch.chdir(tmp_path)
    parcels = gpd.read_file(DEMO / "parcels.gpkg")
    original = parcels.copy()
    settings = landcheck.AuditSettings(confidence=landcheck.ConfidenceOptions(enabled=False))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", landcheck.LandcheckWarning)
        run = landcheck.run_audit(DEMO / "dem.tif", parcels, DEMO / "rulebook.toml", settings)
        folder = landcheck.audit(
            DEMO / "dem.tif",
            DEMO / "parcels.gpkg",
            DEMO / "rulebook.toml",
            tmp_path / "out",
            settings,
            rasters="none",
            report=False,
        )
    assert sorted(os.listdir(tmp_path)) == ["out"]  # run_audit wrote nothing (the folder is audit()'s)
    assert isinstance(run.parcels, gpd.GeoDataFrame) and run.parcels.crs == parcels.crs
    pd.testing.assert_frame_equal(parcels, original)  # the input frame is untouched
    gpkg = gpd.read_file(tmp_path / "out" / "parcels.gpkg")
    assert list(gpkg.columns) == list(run.parcels.columns)
    num = [c for c in gpkg.columns if gpkg[c].dtype.kind == "f"]
    np.testing.assert_array_equal(run.parcels[num].to_numpy(float), gpkg[num].to_numpy(float))
    assert run.parcels["verdict"].tolist() == gpkg["verdict"].tolist()
    # the table written the folder's way is parcels.csv byte for byte
    write_csv(tmp_path / "memory.csv", run.table)
    assert (tmp_path / "memory.csv").read_bytes() == (tmp_path / "out" / "parcels.csv").read_bytes()
    assert gpkg.geometry.geom_equals_exact(run.parcels.geometry, tolerance=0).all()
    assert folder.summary["totals"] == run.summary["totals"]


def test_bad_options_are_refused_before_any_input_is_read(tmp_path):
    # Common practice (validate at the edge): a bad capability scheme or mapping unit fails before
    # the DEM is opened (the DEM path here does not exist, so reaching it would raise another error).
    import landcheck

    with pytest.raises(landcheck.RuleFileError, match="unknown slope-class scheme 'usda-9'"):
        landcheck.audit(
            tmp_path / "missing.tif", "p.gpkg", DEMO / "rulebook.toml", tmp_path / "o", capability_scheme="usda-9"
        )
    with pytest.raises(landcheck.InputDataError, match="minimum mapping unit -1"):
        landcheck.audit(tmp_path / "missing.tif", "p.gpkg", DEMO / "rulebook.toml", tmp_path / "o", draft_mmu_m2=-1)
    with pytest.raises(landcheck.RuleFileError, match="capability hazard zone 'levee' is not defined"):
        landcheck.run_audit(
            tmp_path / "missing.tif",
            "p.gpkg",
            DEMO / "rulebook.toml",
            landcheck.AuditSettings(capability=landcheck.CapabilityOptions(hazard_zones=("levee",))),
        )
    assert not (tmp_path / "o").exists()


def test_parcels_without_crs_are_refused(tmp_path):
    import geopandas as gpd
    import shapely

    import landcheck

    gdf = gpd.GeoDataFrame({"zoning": ["RES-1"], "parcel_id": [1]}, geometry=[shapely.box(0, 0, 1, 1)])
    with pytest.raises(landcheck.InputDataError, match=r"parcels \(GeoDataFrame\): the parcels have no CRS"):
        landcheck.run_audit(DEMO / "dem.tif", gdf, DEMO / "rulebook.toml")
