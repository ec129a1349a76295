"""Command line: exit codes, JSON on stdout, caution text, overwrite and atomic outputs (common practice)."""

from __future__ import annotations

import errno
import json
import os

import pytest
import shapely
from _support import ramp_dem, write_parcels, write_rules
from click.testing import CliRunner

from landcheck.cli.main import cli

X0, Y0 = 400000.0, 1600000.0


@pytest.fixture
def inputs(tmp_path):
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml")
    parcels = write_parcels(
        tmp_path / "p.gpkg",
        [shapely.box(X0 + 100, Y0 - 300, X0 + 200, Y0 - 200), shapely.box(X0 + 500, Y0 - 300, X0 + 600, Y0 - 200)],
        pid=[1, 2],
        zoning=["R", "R"],
    )
    return dem, parcels, rules


def _audit(inputs, out, *extra):
    dem, parcels, rules = inputs
    return CliRunner().invoke(
        cli,
        [
            "audit",
            "--dem",
            str(dem),
            "--parcels",
            str(parcels),
            "--rulebook",
            str(rules),
            "--out",
            str(out),
            "--no-report",
            *extra,
        ],
    )


def test_help_carries_caution_and_examples():
    for args in ([], ["audit"], ["slope"], ["demo"]):
        r = CliRunner().invoke(cli, [*args, "--help"])
        assert r.exit_code == 0
        assert "not a survey or legal determination" in r.output
        assert "Examples" in r.output


def test_json_exit_codes_and_overwrite(tmp_path, inputs):
    out = tmp_path / "out"
    r = _audit(inputs, out, "--json")
    assert r.exit_code == 0, r.output
    data = json.loads(r.stdout)  # stdout is JSON only
    assert data["totals"]["verdict_counts"]["conflict"] == 1
    assert "not a survey" in data["caution"]
    # existing output refused without --overwrite, exit 3, untouched
    before = sorted(os.listdir(out))
    r = _audit(inputs, out)
    assert r.exit_code == 3 and "--overwrite" in r.output
    assert sorted(os.listdir(out)) == before
    assert _audit(inputs, out, "--overwrite").exit_code == 0
    # conflicts -> exit 1 only when asked
    assert _audit(inputs, out, "--overwrite", "--fail-on-conflict").exit_code == 1
    # bad usage -> 2
    assert CliRunner().invoke(cli, ["audit", "--dem"]).exit_code == 2
    assert CliRunner().invoke(cli, ["slope", "a.tif", "b.tif", "--unit", "furlongs"]).exit_code == 2


def test_output_inside_input_refused(tmp_path, inputs):
    dem, parcels, rules = inputs
    r = _audit(inputs, tmp_path, "--overwrite")  # the folder holding the inputs
    assert r.exit_code == 3 and "would contain or replace the input" in r.output
    assert dem.exists() and parcels.exists() and rules.exists()


def test_disk_full_mid_write_leaves_nothing(tmp_path, inputs, monkeypatch):
    # Simulate ENOSPC while writing the CSV tables, after the rasters and the GeoPackage were written.
    from landcheck.core import audit as audit_mod

    def full_disk(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(audit_mod, "write_csv", full_disk)
    out = tmp_path / "out"
    r = _audit(inputs, out)
    assert r.exit_code == 3, r.output
    assert "No space left on device" in r.output and "nothing was left behind" in r.output
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".out")] == []
    # an earlier complete output survives a failed overwrite
    monkeypatch.undo()
    assert _audit(inputs, out).exit_code == 0
    before = sorted(os.listdir(out))
    monkeypatch.setattr(audit_mod, "write_csv", full_disk)
    assert _audit(inputs, out, "--overwrite").exit_code == 3
    assert sorted(os.listdir(out)) == before


def test_permission_denied(tmp_path, inputs, monkeypatch):
    # Tests run as root in CI, where directory modes are not enforced: simulate the refusal instead.
    import tempfile

    def denied(*a, **k):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(tempfile, "mkdtemp", denied)
    r = _audit(inputs, tmp_path / "out")
    assert r.exit_code == 3 and "cannot create the output folder (Permission denied)" in r.output
    assert not (tmp_path / "out").exists()


def test_internal_error_exit_4(tmp_path, inputs, monkeypatch):
    from landcheck.core import run as run_mod

    def boom(*a, **k):
        raise ZeroDivisionError("bug")

    monkeypatch.setattr(run_mod, "evaluate_parcels", boom)
    r = _audit(inputs, tmp_path / "out")
    assert r.exit_code == 4 and "internal error" in r.output and "-vv" in r.output
    assert not (tmp_path / "out").exists()


def test_show_versions():
    r = CliRunner().invoke(cli, ["--show-versions"])
    assert r.exit_code == 0 and "rasterio:" in r.output and "exactextract:" in r.output


def test_confidence_capability_reclassification_flags(tmp_path, inputs):
    # Common practice (wiring): the extras write their files; out-of-range settings are refused with exit 3.
    rules = inputs[2]
    rules.write_text(
        rules.read_text().replace("review_band_pct = 0.0", 'review_band_pct = 0.0\ndesignated_class = "forest"')
    )
    out = tmp_path / "extras"
    r = _audit(
        inputs,
        out,
        "--dem-rmse",
        "0.5",
        "--corr-length",
        "30",
        "--realizations",
        "10",
        "--seed",
        "3",
        "--capability-map",
        "8,18,30",
        "--draft-reclassification",
        "100",
        "--json",
    )
    assert r.exit_code == 0, r.output
    for name in (
        "confidence.csv",
        "confidence_classes.csv",
        "capability.tif",
        "capability_by_class.csv",
        "reclassification_moves.csv",
        "reclassification.gpkg",
    ):
        assert (out / name).exists(), name
    import pandas as pd

    p = pd.read_csv(out / "parcels.csv")
    # Closed form on the ramp: parcel 2 (x 500..600 m) is far over the 18 % line, parcel 1 (x 100..200) far under
    assert p.loc[1, "p_conflict"] == 1.0 and p.loc[0, "p_conflict"] == 0.0
    bad = _audit(inputs, tmp_path / "bad", "--dem-rmse", "0.5", "--realizations", "5")
    assert bad.exit_code == 3 and "10" in bad.output
    bad = _audit(inputs, tmp_path / "bad2", "--dem-rmse", "-1")
    assert bad.exit_code == 3
    assert not (tmp_path / "bad").exists() and not (tmp_path / "bad2").exists()
