"""Runs: one worker process per running audit, one run at a time per project (others wait in a queue).

A run's output is published by renaming ``work/output`` to ``output`` after the worker exits cleanly,
then recorded (with every file's SHA-256) in the database.  Cancel and server stop send SIGTERM (then
SIGKILL after a grace period); whatever was staged is removed, so a half-written run is never shown.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

from landcheck.engine.interrupt import die_with_parent

from .workspace import Workspace, utc_now

__all__ = ["RunManager"]

GRACE_S = 15.0
FINAL = ("done", "failed", "cancelled", "interrupted")


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _die_with_parent() -> None:  # pragma: no cover - runs in the child
    """The worker gets SIGTERM when the app's process dies, so it never publishes behind its back."""
    die_with_parent(signal.SIGTERM)


class RunManager:
    def __init__(self, ws: Workspace):
        self.ws = ws
        self._lock = threading.RLock()
        self._procs: dict[int, subprocess.Popen] = {}
        self._live: dict[int, dict] = {}
        self._cancel: set[int] = set()
        self._stopping = False
        self._threads: list[threading.Thread] = []

    # ------------------------------------------------------------------ start-up and stop
    def recover(self) -> None:
        """After a restart: runs that were running are checked, queued ones go back in the queue."""
        for r in self.ws.q("SELECT * FROM runs WHERE state = 'running' ORDER BY id"):
            rd = self.ws.run_dir(r["project_id"], r["id"])
            self.ws.cleanup_partials(rd)
            self.ws.x(
                "UPDATE runs SET state = 'interrupted', finished_utc = ?, message = ? WHERE id = ?",
                (
                    utc_now(),
                    "the app stopped before this run finished; nothing of it was kept. Start it again.",
                    r["id"],
                ),
            )
        for r in self.ws.q("SELECT * FROM runs WHERE state = 'queued' ORDER BY id"):
            self._maybe_start(r["project_id"])

    def shutdown(self) -> None:
        with self._lock:
            self._stopping = True
            procs = dict(self._procs)
        for p in procs.values():
            if p.poll() is None:
                p.terminate()
        for p in procs.values():
            try:
                p.wait(GRACE_S)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
        for t in list(self._threads):
            t.join(GRACE_S)

    # ------------------------------------------------------------------ queue
    def submit(self, pid: int, rid: int) -> None:
        self._maybe_start(pid)

    def _maybe_start(self, pid: int) -> None:
        with self._lock:
            if self._stopping:
                return
            busy = self.ws.one("SELECT id FROM runs WHERE project_id = ? AND state = 'running'", (pid,))
            if busy:
                return
            nxt = self.ws.one("SELECT * FROM runs WHERE project_id = ? AND state = 'queued' ORDER BY id", (pid,))
            if nxt is None:
                return
            self._start(nxt)

    def _start(self, run: dict) -> None:
        rid, pid = run["id"], run["project_id"]
        rd = self.ws.run_dir(pid, rid)
        self.ws.cleanup_partials(rd)
        (rd / "work").mkdir(parents=True)
        job = json.loads((rd / "job.json").read_text(encoding="utf-8"))
        job["work"] = str(rd / "work")
        job["log"] = str(rd / "worker.log")
        job["workspace"] = str(self.ws.root)
        (rd / "work" / "job.json").write_text(json.dumps(job, indent=1), encoding="utf-8")
        env = dict(os.environ)
        pkg_root = str(Path(__file__).resolve().parents[2])
        env["PYTHONPATH"] = pkg_root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        env.setdefault("MPLBACKEND", "Agg")
        proc = subprocess.Popen(
            [sys.executable, "-m", "landcheck.app.worker", str(rd / "work" / "job.json")],
            stdout=subprocess.PIPE,
            stderr=open(rd / "worker.log", "ab"),  # noqa: SIM115 - the child holds it
            stdin=subprocess.DEVNULL,
            cwd=str(rd),
            env=env,
            text=True,
            preexec_fn=_die_with_parent if sys.platform.startswith("linux") else None,
        )
        self._procs[rid] = proc
        self._live[rid] = {"stages": [], "active": None, "messages": [], "warnings": []}
        self.ws.x("UPDATE runs SET state = 'running', started_utc = ? WHERE id = ?", (utc_now(), rid))
        t = threading.Thread(target=self._follow, args=(pid, rid, proc), daemon=True, name=f"run-{rid}")
        self._threads.append(t)
        t.start()

    def cancel(self, rid: int) -> str:
        with self._lock:
            run = self.ws.one("SELECT * FROM runs WHERE id = ?", (rid,))
            if run is None or run["state"] in FINAL:
                return run["state"] if run else "missing"
            if run["state"] == "queued":
                self.ws.x(
                    "UPDATE runs SET state = 'cancelled', finished_utc = ?, message = ? WHERE id = ?",
                    (utc_now(), "cancelled before it started", rid),
                )
                return "cancelled"
            self._cancel.add(rid)
            p = self._procs.get(rid)
        if p is not None and p.poll() is None:
            p.terminate()
            threading.Timer(GRACE_S, lambda: p.poll() is None and p.kill()).start()
        return "cancelling"

    # ------------------------------------------------------------------ following a worker
    def live(self, rid: int) -> dict | None:
        with self._lock:
            v = self._live.get(rid)
            return json.loads(json.dumps(v)) if v is not None else None

    def _event(self, rid: int, ev: dict) -> None:
        with self._lock:
            st = self._live[rid]
            kind = ev.get("ev")
            if kind == "plan":
                st["stages"] = [dict(s, state="waiting", n=0, total=0) for s in ev["stages"]]
                self._activate(st, st["stages"][0]["key"])
            elif kind == "step":
                st["messages"] = (st["messages"] + [ev["msg"]])[-8:]
                if ev.get("stage"):
                    self._activate(st, ev["stage"])
            elif kind == "bar":
                for s in st["stages"]:
                    if s["key"] == ev["name"]:
                        if s["state"] == "waiting":
                            self._activate(st, s["key"])
                        s["n"], s["total"] = ev["n"], ev["total"]
            elif kind == "done":
                for s in st["stages"]:
                    s["state"] = "done"
                st["result"] = ev
            elif kind == "error":
                st["error"] = ev["message"]

    @staticmethod
    def _activate(st: dict, key: str) -> None:
        keys = [s["key"] for s in st["stages"]]
        if key not in keys:
            return
        i = keys.index(key)
        for j, s in enumerate(st["stages"]):
            if j < i:
                s["state"] = "done"
            elif j == i and s["state"] != "done":
                s["state"] = "active"
        st["active"] = key

    def _follow(self, pid: int, rid: int, proc: subprocess.Popen) -> None:
        for line in proc.stdout:
            try:
                ev = json.loads(line)
            except ValueError:
                continue
            self._event(rid, ev)
        rc = proc.wait()
        self._finish(pid, rid, rc)

    def _finish(self, pid: int, rid: int, rc: int) -> None:
        rd = self.ws.run_dir(pid, rid)
        with self._lock:
            st = self._live.get(rid, {})
            cancelled = rid in self._cancel
            stopping = self._stopping
            self._procs.pop(rid, None)
        staged = rd / "work" / "output"
        if rc == 0 and "result" in st and staged.is_dir() and not cancelled:
            os.replace(staged, rd / "output")  # the one rename that publishes the run
            files = sorted(p for p in (rd / "output").rglob("*") if p.is_file())
            for f in files:
                self.ws.x(
                    "INSERT INTO outputs (run_id, path, size, sha256) VALUES (?, ?, ?, ?)",
                    (rid, str(f.relative_to(rd / "output")), f.stat().st_size, _sha256(f)),
                )
            res = st["result"]
            self.ws.x(
                "UPDATE runs SET state = 'done', finished_utc = ?, message = ?, summary = ? WHERE id = ?",
                (utc_now(), None, json.dumps(res), rid),
            )
        else:
            if cancelled:
                state, msg = "cancelled", "cancelled; nothing of it was kept."
            elif stopping:
                state, msg = "interrupted", "the app stopped before this run finished; nothing of it was kept."
            else:
                state = "failed"
                msg = st.get("error") or f"the worker stopped unexpectedly (exit status {rc}); see worker.log."
            self.ws.x(
                "UPDATE runs SET state = ?, finished_utc = ?, message = ? WHERE id = ?", (state, utc_now(), msg, rid)
            )
        shutil.rmtree(rd / "work", ignore_errors=True)
        with self._lock:
            self._cancel.discard(rid)
        if not stopping:
            self._maybe_start(pid)
