"""The workspace folder: project and run folders on disk and their SQLite record (stdlib sqlite3).

Layout::

    WORKSPACE/landcheck-workspace.sqlite
    WORKSPACE/projects/<project id>/inputs/          uploaded files (never overwritten) and rulebook versions
    WORKSPACE/projects/<project id>/inputs/.incoming/ uploads being received (removed when done)
    WORKSPACE/projects/<project id>/runs/<run id>/    job.json, worker.log, output/ (published in one rename)

Every path the app reads or writes goes through :meth:`Workspace.inside`, which refuses any path that
resolves outside the workspace.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import sqlite3
import threading
from pathlib import Path

__all__ = ["Workspace", "OutsideWorkspace", "utc_now"]

DB_NAME = "landcheck-workspace.sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS projects (
    id INTEGER PRIMARY KEY, name TEXT NOT NULL, created_utc TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS inputs (
    id INTEGER PRIMARY KEY, project_id INTEGER NOT NULL REFERENCES projects(id),
    role TEXT NOT NULL, name TEXT NOT NULL, path TEXT NOT NULL, sha256 TEXT NOT NULL, size INTEGER NOT NULL,
    options TEXT NOT NULL, info TEXT NOT NULL, created_utc TEXT NOT NULL, active INTEGER NOT NULL DEFAULT 1);
CREATE TABLE IF NOT EXISTS rulebooks (
    id INTEGER PRIMARY KEY, project_id INTEGER NOT NULL REFERENCES projects(id),
    version INTEGER NOT NULL, path TEXT NOT NULL, text TEXT NOT NULL, sha256 TEXT NOT NULL, created_utc TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY, project_id INTEGER NOT NULL REFERENCES projects(id),
    rulebook_id INTEGER NOT NULL REFERENCES rulebooks(id), state TEXT NOT NULL, options TEXT NOT NULL,
    made_from TEXT NOT NULL, created_utc TEXT NOT NULL, started_utc TEXT, finished_utc TEXT,
    message TEXT, summary TEXT);
CREATE TABLE IF NOT EXISTS outputs (
    id INTEGER PRIMARY KEY, run_id INTEGER NOT NULL REFERENCES runs(id),
    path TEXT NOT NULL, size INTEGER NOT NULL, sha256 TEXT NOT NULL);
"""


class OutsideWorkspace(ValueError):
    """A path that would lead outside the workspace folder."""


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


class Workspace:
    """Folders and database of one workspace; safe to use from several threads."""

    def __init__(self, root: str | os.PathLike):
        self.root = Path(root).resolve()
        self.root.mkdir(parents=True, exist_ok=True)
        (self.root / "projects").mkdir(exist_ok=True)
        self._lock = threading.RLock()
        self._db = sqlite3.connect(self.root / DB_NAME, check_same_thread=False, isolation_level=None)
        self._db.row_factory = sqlite3.Row
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA foreign_keys=ON")
        self._db.executescript(_SCHEMA)

    # ------------------------------------------------------------------ paths
    def inside(self, path: str | os.PathLike, base: str | os.PathLike | None = None) -> Path:
        """``path`` resolved (symbolic links followed); refused unless it lies inside ``base`` (default: the workspace)."""
        base = Path(base).resolve() if base is not None else self.root
        if self.root != base and self.root not in base.parents:
            raise OutsideWorkspace(f"{base}: not inside the workspace")
        p = Path(path)
        if "\x00" in str(p):
            raise OutsideWorkspace("a path with a NUL character")
        full = (base / p).resolve() if not p.is_absolute() else p.resolve()
        if full != base and base not in full.parents:
            raise OutsideWorkspace(f"{path}: outside the allowed folder")
        return full

    def project_dir(self, pid: int) -> Path:
        return self.root / "projects" / str(int(pid))

    def inputs_dir(self, pid: int) -> Path:
        return self.project_dir(pid) / "inputs"

    def run_dir(self, pid: int, rid: int) -> Path:
        return self.project_dir(pid) / "runs" / str(int(rid))

    def rel(self, path: Path) -> str:
        return str(Path(path).resolve().relative_to(self.root))

    # ------------------------------------------------------------------ database
    def q(self, sql: str, args=()) -> list[dict]:
        with self._lock:
            return [dict(r) for r in self._db.execute(sql, args).fetchall()]

    def one(self, sql: str, args=()) -> dict | None:
        rows = self.q(sql, args)
        return rows[0] if rows else None

    def x(self, sql: str, args=()) -> int:
        with self._lock:
            cur = self._db.execute(sql, args)
            return int(cur.lastrowid or 0)

    def close(self) -> None:
        with self._lock:
            self._db.close()

    # ------------------------------------------------------------------ records
    def new_project(self, name: str) -> int:
        with self._lock:
            pid = self.x("INSERT INTO projects (name, created_utc) VALUES (?, ?)", (name, utc_now()))
            self.inputs_dir(pid).mkdir(parents=True, exist_ok=True)
            (self.project_dir(pid) / "runs").mkdir(exist_ok=True)
            return pid

    def project(self, pid: int) -> dict | None:
        return self.one("SELECT * FROM projects WHERE id = ?", (int(pid),))

    def active_inputs(self, pid: int) -> list[dict]:
        rows = self.q("SELECT * FROM inputs WHERE project_id = ? AND active = 1 ORDER BY id", (int(pid),))
        for r in rows:
            r["info"] = json.loads(r["info"])
            r["options"] = json.loads(r["options"])
        return rows

    def add_input(self, pid: int, role: str, name: str, path: Path, sha256: str, options: dict, info: dict) -> int:
        with self._lock:
            if role in ("dem", "parcels"):  # one DEM and one parcel layer per project: the newest is used
                self.x("UPDATE inputs SET active = 0 WHERE project_id = ? AND role = ?", (int(pid), role))
            else:  # a hazard layer of the same name replaces the older one in the list
                self.x(
                    "UPDATE inputs SET active = 0 WHERE project_id = ? AND role = ? AND json_extract(info, '$.key') = ?",
                    (int(pid), role, info.get("key")),
                )
            return self.x(
                "INSERT INTO inputs (project_id, role, name, path, sha256, size, options, info, created_utc) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    int(pid),
                    role,
                    name,
                    self.rel(path),
                    sha256,
                    _size(path),
                    json.dumps(options),
                    json.dumps(info),
                    utc_now(),
                ),
            )

    def cleanup_partials(self, run_dir: Path) -> None:
        """Remove what an unfinished run of this app left in its own run folder (staged outputs)."""
        run_dir = self.inside(run_dir)
        for p in run_dir.glob(".output.*"):
            shutil.rmtree(p, ignore_errors=True)
        work = run_dir / "work"
        if work.exists():
            shutil.rmtree(work, ignore_errors=True)


def _size(path: Path) -> int:
    path = Path(path)
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    if path.suffix.lower() == ".shp":
        return sum(p.stat().st_size for p in path.parent.glob(path.stem + ".*"))
    return path.stat().st_size
