"""The pre-screen takes its numbers from the in-memory core: no temporary file, the audit's own figures.

Reference: run_audit on the whole demo area (the parcel's row of the full audit, docs/outputs.md).
"""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_area"


@pytest.mark.slow
def test_prescreen_writes_no_temporary_file_and_matches_the_full_audit(tmp_path, monkeypatch):
    import landcheck

    scratch = tmp_path / "tmpdir"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))  # every tempfile default lands here

    def refuse(*a, **k):
        raise AssertionError("the pre-screen must not make a temporary directory")

    monkeypatch.setattr(tempfile, "TemporaryDirectory", refuse)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", landcheck.LandcheckWarning)
        one = landcheck.prescreen(
            DEMO / "dem.tif",
            DEMO / "rulebook.toml",
            tmp_path / "lot",
            parcels_path=DEMO / "parcels.gpkg",
            parcel_id="1002",
        )
        full = landcheck.run_audit(
            DEMO / "dem.tif",
            DEMO / "parcels.gpkg",
            DEMO / "rulebook.toml",
            landcheck.AuditSettings(confidence=landcheck.ConfidenceOptions(enabled=False)),
        )
    assert list(scratch.iterdir()) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["lot", "tmpdir"]
    row = full.table.set_index("parcel_id").loc[1002]
    f = one.figures
    # Reference: the full audit's row; the pre-screen runs on a DEM view around the parcel, so only the
    # summation order of the exact-coverage sums may differ (relative 1e-12).
    assert f["verdict"] == row["verdict"] == "conflict"
    assert f["parcel"]["covered_m2"] == pytest.approx(row["covered_m2"], rel=1e-12)
    assert f["conflict_m2"] == pytest.approx(row["conflict_m2"], rel=1e-12)
    assert f["over_limit_m2"] == pytest.approx(row["over_limit_m2"], rel=1e-12)
    assert f["parcel"]["slope_max_pct"] == pytest.approx(row["slope_max_pct"], rel=1e-6)
