"""Output folders never lose a user's file: own-folder recognition, the publish lock, stale partial folders.

Reference: hashlib.sha256 and the `sha256sum -c` format (GNU coreutils) for the file list; the
folder rules themselves are common practice for tools that write into user folders (docs/outputs.md).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
import shapely
from _support import ramp_dem, write_parcels, write_rules
from click.testing import CliRunner

from landcheck.cli.main import cli
from landcheck.errors import OutputExistsError
from landcheck.outputs.folder import FILES_NAME, PARTIAL_MARKER, SUMS_NAME, _FolderLock, staged_folder

X0, Y0 = 400000.0, 1600000.0
REPO = Path(__file__).resolve().parents[1]


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


def _hashes(paths):
    return {str(p): hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in paths}


def _args(inputs, out, *extra):
    dem, parcels, rules = inputs
    return ["audit", "--dem", str(dem), "--parcels", str(parcels), "--rulebook", str(rules), "--out", str(out)] + [
        "--no-report",
        *extra,
    ]


def _audit(inputs, out, *extra):
    return CliRunner().invoke(cli, _args(inputs, out, *extra))


def test_overwrite_refuses_folder_with_a_users_file_and_keeps_it(tmp_path, inputs):
    out = tmp_path / "out"
    assert _audit(inputs, out).exit_code == 0
    notes = out / "notes" / "hearing.txt"
    notes.parent.mkdir()
    notes.write_text("my notes")
    before = sorted(str(p.relative_to(out)) for p in out.rglob("*"))
    r = _audit(inputs, out, "--overwrite")
    assert r.exit_code == 3, r.output
    assert "notes/hearing.txt" in r.output and "did not write" in r.output
    assert notes.read_text() == "my notes"
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == before


def test_overwrite_of_a_working_folder_not_written_by_landcheck_is_refused(tmp_path, inputs):
    work = tmp_path / "work"
    work.mkdir()
    (work / "project.qgz").write_bytes(b"project")
    r = _audit(inputs, work, "--overwrite")
    assert r.exit_code == 3 and "was not written by landcheck" in r.output and "project.qgz" in r.output
    assert (work / "project.qgz").read_bytes() == b"project"
    assert sorted(os.listdir(work)) == ["project.qgz"]


def test_overwrite_replaces_own_folder_and_lists_files_with_hashes(tmp_path, inputs):
    out = tmp_path / "out"
    assert _audit(inputs, out).exit_code == 0
    assert _audit(inputs, out, "--overwrite").exit_code == 0
    listed = json.loads((out / FILES_NAME).read_text())
    names = {e["path"] for e in listed["files"]}
    assert {"parcels.csv", "parcels.gpkg", "summary.json", "slope_pct.tif"} <= names
    assert "run_times.json" not in names and "run_times.json" in listed["not_reproduced"]
    for e in listed["files"]:
        assert hashlib.sha256((out / e["path"]).read_bytes()).hexdigest() == e["sha256"]
    # the sums file is what GNU sha256sum -c reads
    if subprocess.run(["which", "sha256sum"], capture_output=True).returncode == 0:
        done = subprocess.run(["sha256sum", "-c", SUMS_NAME], cwd=out, capture_output=True, text=True)
        assert done.returncode == 0, done.stdout + done.stderr
    r = CliRunner().invoke(cli, ["verify", str(out)])
    assert r.exit_code == 0 and f"{len(names)} files match" in r.output
    (out / "parcels.csv").write_text("changed")
    r = CliRunner().invoke(cli, ["verify", str(out)])
    assert r.exit_code == 1 and "parcels.csv" in r.output


def test_second_run_while_lock_is_held_stops_naming_the_holder(tmp_path, inputs):
    out = tmp_path / "out"
    lock = _FolderLock(out)
    lock.acquire()
    try:
        r = _audit(inputs, out)
    finally:
        lock.release()
    assert r.exit_code == 3 and f"another landcheck run (pid {os.getpid()})" in r.output
    assert not out.exists()
    assert not (tmp_path / ".out.lock").exists()


def test_folder_appearing_during_the_run_is_not_replaced(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(OutputExistsError, match="appeared while this run was working"):
        with staged_folder(out) as stage:
            (stage / "a.csv").write_text("mine")
            out.mkdir()
            (out / "theirs.csv").write_text("theirs")
    assert (out / "theirs.csv").read_text() == "theirs" and sorted(os.listdir(out)) == ["theirs.csv"]
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".out")] == []


def test_two_runs_into_one_folder_exactly_one_publishes(tmp_path, inputs):
    out = tmp_path / "same"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    cmd = [sys.executable, "-m", "landcheck", *_args(inputs, out)]
    procs = [subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)]
    procs.append(subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
    done = [p.communicate(timeout=300) for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes == [0, 3], done
    loser = done[[p.returncode for p in procs].index(3)][1]
    assert "another landcheck run" in loser or "already exists" in loser
    assert "Outputs:" not in loser
    assert json.loads((out / FILES_NAME).read_text())["tool"] == "landcheck"


def test_stale_partial_folder_of_a_killed_run_is_removed_foreign_one_named(tmp_path, inputs):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    import socket

    ours = tmp_path / ".out.partial-dead1"
    ours.mkdir()
    (ours / "slope_pct.tif").write_bytes(b"half")
    (ours / PARTIAL_MARKER).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname()}))
    stranger = tmp_path / ".out.partial-keep"
    stranger.mkdir()
    (stranger / "x.txt").write_text("someone's")
    r = _audit(inputs, tmp_path / "out")
    assert r.exit_code == 0, r.output
    assert not ours.exists()
    assert (stranger / "x.txt").read_text() == "someone's"
    assert ".out.partial-keep" in r.output and "did not remove" in r.output


def test_out_pointing_at_an_input_says_this_is_an_input(tmp_path, inputs):
    dem, parcels, rules = inputs
    before = _hashes(inputs)
    r = _audit(inputs, parcels)
    assert r.exit_code == 3 and "this is an input" in r.output
    assert _hashes(inputs) == before


def test_existing_file_as_out_exit_3(tmp_path, inputs):
    f = tmp_path / "taken.txt"
    f.write_text("keep")
    r = _audit(inputs, f)
    assert r.exit_code == 3 and "is a file, not a folder" in r.output
    assert f.read_text() == "keep"
