"""The report's second drawing process: the same files as one process, failures and stops handled.

Reference: the one-process report of the same folder (``LANDCHECK_REPORT_PROCESSES=1``); common practice
that a parallel build must reproduce the sequential one byte for byte.
"""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest
import shapely
from _support import write_parcels, write_raster, write_rules
from rasterio.transform import from_origin

from landcheck.core.audit import audit
from landcheck.errors import InputDataError
from landcheck.evidence import figure_worker

X0, Y0 = 400000.0, 1600000.0

pytestmark = pytest.mark.skipif(
    not figure_worker._can_fork(), reason="the figure process needs fork and two cores (Linux)"
)


def _inputs(tmp_path):
    # slope grows from west to east (z = 0.0015 x², slope 0.3 x % at x metres): the eastern lots breach
    # 18 %, and lots touch their neighbours, so every close-up shows neighbouring outlines and labels
    n = 160
    x = (np.arange(n) + 0.5) * 10.0
    dem = np.tile(0.0015 * x**2, (n, 1)).astype(np.float32)
    dem_path = write_raster(tmp_path / "dem.tif", dem, transform=from_origin(X0, Y0, 10.0, 10.0))
    geoms, ids = [], []
    for i in range(6):
        for j in range(7):
            geoms.append(shapely.box(X0 + 100 + 200 * j, Y0 - 300 - 200 * i, X0 + 300 + 200 * j, Y0 - 100 - 200 * i))
            ids.append(f"L{i}{j}")
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.array(ids), zoning=["R"] * len(ids))
    return dem_path, parcels, write_rules(tmp_path / "r.toml", tol=5.0)


def test_two_processes_write_the_files_of_one(tmp_path, monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    dem, parcels, rules = _inputs(tmp_path)
    started = []
    real_start = figure_worker.start

    def spy():
        w = real_start()
        started.append(w)
        return w

    monkeypatch.setattr(figure_worker, "start", spy)
    two = audit(dem, parcels, rules, tmp_path / "two").out_dir
    assert len(started) == 1 and started[0] is not None  # the figures were drawn by the second process
    monkeypatch.setenv("LANDCHECK_REPORT_PROCESSES", "1")
    one = audit(dem, parcels, rules, tmp_path / "one").out_dir
    assert started[1] is None
    names = sorted(p.name for p in (one / "figures").iterdir())
    assert len([n for n in names if n.startswith("closeup_")]) == 12
    assert sorted(p.name for p in (two / "figures").iterdir()) == names
    for name in names:
        assert (two / "figures" / name).read_bytes() == (one / "figures" / name).read_bytes(), name
    assert (two / "report.html").read_bytes() == (one / "report.html").read_bytes()


def test_closeup_subset_holds_every_parcel_a_frame_touches(tmp_path):
    from landcheck.evidence.folder import load_audit_folder
    from landcheck.evidence.maps import closeup_frame, closeup_order

    dem, parcels, rules = _inputs(tmp_path)
    out = audit(dem, parcels, rules, tmp_path / "a", make_report=False).out_dir
    folder = load_audit_folder(out)
    rows, shapes = figure_worker.closeup_subset(folder, 3)
    gdf = folder.parcels_gdf
    assert list(rows["parcel_id"]) == sorted(closeup_order(folder.parcels, 3))  # file order, the three drawn
    frames = [closeup_frame(folder, gdf.geometry[gdf["parcel_id"] == pid].iloc[0]) for pid in rows["parcel_id"]]
    # brute force: a parcel is kept exactly when its shape intersects one of the frames
    want = [any(g.intersects(shapely.box(*f)) for f in frames) for g in gdf.geometry]
    assert list(shapes.index) == list(np.flatnonzero(want))
    assert 3 < len(shapes) < len(gdf)


def test_a_failure_in_the_worker_is_raised_in_the_parent(tmp_path):
    dem, parcels, rules = _inputs(tmp_path)
    out = audit(dem, parcels, rules, tmp_path / "a", rasters="gtiff", make_report=False).out_dir
    (out / "slope_pct.tif").unlink()
    worker = figure_worker.start()
    job = figure_worker.FigureJob(out, tmp_path / "figs", (0.0, 18.0, float("inf")), 2, 50, ("png",), ("png",), None)
    worker.submit(job)
    with pytest.raises(InputDataError, match=r"slope_pct\.tif: not found"):
        worker.collect()
    worker.stop()
    assert worker._proc.exitcode == 1


def _ignores_sigint(pid: int) -> bool:
    with open(f"/proc/{pid}/status") as fh:
        mask = next(int(line.split()[1], 16) for line in fh if line.startswith("SigIgn:"))
    return bool(mask & (1 << (signal.SIGINT - 1)))


def test_stop_ends_a_waiting_worker_that_ignores_ctrl_c():
    worker = figure_worker.start()
    pid = worker._proc.pid
    deadline = time.monotonic() + 20
    while not _ignores_sigint(pid) and time.monotonic() < deadline:  # the child's first step
        time.sleep(0.05)
    os.kill(pid, signal.SIGINT)  # the terminal sends Ctrl-C to the whole group: the parent decides
    time.sleep(0.3)
    assert worker._proc.is_alive()
    worker.stop()
    assert not worker._proc.is_alive()
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)


def test_a_worker_killed_from_outside_is_a_clear_error(tmp_path):
    from landcheck.errors import OutputWriteError

    worker = figure_worker.start()
    os.kill(worker._proc.pid, signal.SIGKILL)  # as the system does when memory runs out
    with pytest.raises(OutputWriteError, match=r"ended unexpectedly \(exit code -9.*LANDCHECK_REPORT_PROCESSES=1"):
        worker.collect()
    worker.stop()


def _running(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as fh:
            state = fh.read().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state not in ("Z", "X")  # a zombie has ended, only its exit status waits to be read


def test_the_worker_ends_with_its_parent():
    import subprocess
    import sys

    # common practice: a helper process must not outlive the run that started it (killed by PR_SET_PDEATHSIG
    # while it draws; while it waits for a job, the closed pipe ends it)
    code = (
        "import os, time; from landcheck.evidence import figure_worker as f; w = f.start(); "
        "print(w._proc.pid, flush=True); time.sleep(1.0); os._exit(0)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    pid = int(out.stdout.split()[0])
    deadline = time.monotonic() + 10
    while _running(pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _running(pid)
