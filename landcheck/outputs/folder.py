"""Output folders that never lose a user's file, published atomically under a lock.

An output folder landcheck writes carries its own file list, ``files.json``
(every file with its SHA-256), and ``SHA256SUMS`` (the same in the format
``sha256sum -c`` reads).  That list is how a later run recognises the folder
as its own:

* an existing folder is replaced (with ``overwrite``) only when it is empty or
  when every file in it is one that landcheck listed there; any other file
  ("foreign") makes the run refuse, naming the files, before any work;
* the folder is built in a hidden sibling ``.NAME.partial-XXXX`` carrying a
  marker (``.landcheck-partial``: pid and host) and renamed into place in one
  step, with the target re-checked while a lock is held (``.NAME.lock``
  beside the target, ``fcntl.flock``); the lock is taken when staging starts,
  so of two runs into one folder the second stops at once, saying which
  process holds it;
* partial folders of killed runs (marker present, process gone) are removed by
  the next run into the same folder; hidden ``.NAME.partial-*`` folders without
  the marker are named in a warning and left alone.

Times of the run go to ``run_times.json``, the one file a rerun does not
reproduce (docs/outputs.md).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import json
import logging
import os
import shutil
import socket
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from landcheck.engine.interrupt import raise_if_interrupted
from landcheck.errors import OutputExistsError, OutputWriteError
from landcheck.hashing import sha256_file

__all__ = [
    "FILES_NAME",
    "SUMS_NAME",
    "RUN_TIMES_NAME",
    "check_output_path",
    "staged_folder",
    "foreign_files",
    "write_file_list",
    "write_run_times",
    "source_date_utc",
    "verify_folder",
]

logger = logging.getLogger(__name__)

#: landcheck's list of the files it wrote into an output folder (with SHA-256)
FILES_NAME = "files.json"
#: the same hashes for ``sha256sum -c``
SUMS_NAME = "SHA256SUMS"
#: start and end time of the run: the one file a rerun does not reproduce
RUN_TIMES_NAME = "run_times.json"
#: marker inside a staging folder: which process builds it
PARTIAL_MARKER = ".landcheck-partial"
_OWN_BOOKKEEPING = {FILES_NAME, SUMS_NAME, RUN_TIMES_NAME}
_MAX_LISTED = 20


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _files_under(folder: Path) -> list[str]:
    """Relative POSIX paths of every non-directory entry under ``folder`` (symlinks not followed), sorted."""
    out = []
    for root, dirs, files in os.walk(folder, followlinks=False):
        rel_root = Path(root).relative_to(folder)
        for name in files:
            out.append((rel_root / name).as_posix())
        for name in dirs:  # a symlink to a folder is an entry of its own, never walked into
            if os.path.islink(os.path.join(root, name)):
                out.append((rel_root / name).as_posix())
    return sorted(out)


def _read_file_list(folder: Path) -> dict | None:
    """landcheck's file list of ``folder``, or None when the folder is not one landcheck wrote."""
    p = folder / FILES_NAME
    if not p.is_file() or p.is_symlink():
        return None
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("tool") != "landcheck" or not isinstance(data.get("files"), list):
        return None
    return data


def foreign_files(folder: str | os.PathLike) -> list[str]:
    """Files in ``folder`` that landcheck did not list there (all of them when it has no file list)."""
    folder = Path(folder)
    present = _files_under(folder)
    listed = _read_file_list(folder)
    if listed is None:
        return present
    own = {f.get("path") for f in listed["files"] if isinstance(f, dict)} | _OWN_BOOKKEEPING | {PARTIAL_MARKER}
    return [p for p in present if p not in own]


def _describe(names: list[str]) -> str:
    shown = ", ".join(names[:_MAX_LISTED])
    more = len(names) - _MAX_LISTED
    return shown + (f" and {more} more" if more > 0 else "")


def _refuse_foreign(out: Path) -> None:
    foreign = foreign_files(out)
    if foreign:
        kind = "was not written by landcheck" if _read_file_list(out) is None else "holds files landcheck did not write"
        raise OutputExistsError(
            f"{out}: the folder {kind}: {_describe(foreign)}. landcheck replaces only a folder holding nothing "
            "but its own outputs; move these files away or choose another --out."
        )


def check_output_path(out: str | os.PathLike, inputs: Iterable[str | os.PathLike], *, overwrite: bool) -> Path:
    """Refuse an output folder that is or holds an input, is a file, or exists (without ``overwrite``).

    With ``overwrite`` an existing folder is accepted only when it is empty or holds nothing but the
    files landcheck listed in it; otherwise the foreign files are named.
    """
    given = Path(out)
    out = given.resolve()
    for p in inputs:
        if p is None:
            continue
        ip = Path(p).resolve()
        if ip == out:
            raise OutputWriteError(
                f"{given}: this is an input of the run ({ip}); choose an output folder that is not an input."
            )
        if out in ip.parents:
            raise OutputWriteError(
                f"{out}: the output folder would contain or replace the input {ip}; "
                "choose an output folder outside the inputs."
            )
    if out.exists() or out.is_symlink():
        if not out.is_dir():
            raise OutputExistsError(f"{given}: exists and is a file, not a folder; choose a folder path for --out.")
        empty = not any(out.iterdir())
        if not empty and not overwrite:
            raise OutputExistsError(
                f"{out}: output folder already exists; pass --overwrite to replace it, or choose another."
            )
        if not empty:
            _refuse_foreign(out)
    return out


class _FolderLock:
    """An exclusive ``flock`` on ``.NAME.lock`` beside the target; never blocks."""

    def __init__(self, final: Path):
        self.final = final
        self.path = final.parent / f".{final.name}.lock"
        self.fd: int | None = None

    def acquire(self) -> None:
        import fcntl

        for _ in range(100):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666 & ~_umask())
            except OSError as exc:
                raise OutputWriteError(
                    f"{self.final}: cannot create the lock file {self.path.name} ({exc.strerror or exc})."
                ) from exc
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                holder = b""
                with contextlib.suppress(OSError):
                    holder = os.pread(fd, 64, 0)
                os.close(fd)
                if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    raise OutputWriteError(f"{self.final}: cannot lock {self.path.name} ({exc}).") from exc
                who = holder.decode("ascii", "replace").strip() or "unknown"
                raise OutputExistsError(
                    f"{self.final}: another landcheck run (pid {who}) is writing this output folder; "
                    "wait for it to finish or choose another --out."
                ) from None
            # the file may have been unlinked by its last holder between our open and our lock
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            if same:
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
                self.fd = fd
                return
            os.close(fd)
        raise OutputWriteError(f"{self.final}: could not take the lock {self.path.name}; try again.")

    def release(self) -> None:
        if self.fd is None:
            return
        with contextlib.suppress(OSError):
            os.unlink(self.path)  # while still holding it: a waiting opener notices and retries
        os.close(self.fd)
        self.fd = None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _clean_stale(final: Path) -> None:
    """Remove our own leftovers of killed runs into ``final``; name the hidden folders that are not ours."""
    parent = final.parent
    if not parent.is_dir():
        return
    host = socket.gethostname()
    unknown = []
    for p in sorted(parent.glob(f".{final.name}.partial-*")) + sorted(parent.glob(f".{final.name}.old-*")):
        if not p.is_dir() or p.is_symlink():
            continue
        marker = p / PARTIAL_MARKER
        try:
            info = json.loads(marker.read_text(encoding="ascii"))
            pid, their_host = int(info["pid"]), str(info["host"])
        except (OSError, ValueError, KeyError, TypeError):
            unknown.append(p.name)
            continue
        if their_host == host and pid != os.getpid() and not _pid_alive(pid):
            shutil.rmtree(p, ignore_errors=True)
            logger.warning("removed %s, left by an interrupted landcheck run (pid %d)", p, pid)
        else:
            unknown.append(p.name)
    if unknown:
        logger.warning(
            "%s: hidden folders beside it that this run did not remove (not proven to be leftovers of a "
            "finished landcheck process): %s",
            final,
            _describe(unknown),
        )


def _mark(folder: Path) -> None:
    (folder / PARTIAL_MARKER).write_text(
        json.dumps({"pid": os.getpid(), "host": socket.gethostname()}) + "\n", encoding="ascii"
    )


def write_file_list(folder: str | os.PathLike) -> list[dict]:
    """Write ``files.json`` and ``SHA256SUMS`` for every file in ``folder`` (run times excepted).

    Returns the listed entries.  Both files hold only names, sizes and hashes, so a rerun writes
    them byte for byte again.
    """
    folder = Path(folder)
    names = [n for n in _files_under(folder) if n not in _OWN_BOOKKEEPING and Path(n).name != PARTIAL_MARKER]
    entries = [
        {"path": n, "bytes": (folder / n).stat().st_size, "sha256": sha256_file(folder / n, written=True)}
        for n in names
    ]
    from landcheck.about import __version__

    where = "OUT"  # not the folder's name: a rerun into another folder writes the same bytes
    doc = {
        "tool": "landcheck",
        "version": __version__,
        "about": "Every file landcheck wrote into this folder. A rerun with the same inputs and settings "
        f"reproduces each byte for byte; only {RUN_TIMES_NAME} (when the run happened) differs.",
        "check": [f"landcheck verify {where}", f"cd {where} && sha256sum -c {SUMS_NAME}"],
        "not_reproduced": [RUN_TIMES_NAME],
        "files": entries,
    }
    (folder / FILES_NAME).write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    (folder / SUMS_NAME).write_text("".join(f"{e['sha256']}  {e['path']}\n" for e in entries), encoding="utf-8")
    return entries


def write_run_times(folder: str | os.PathLike, started: _dt.datetime, execution: dict | None = None) -> Path:
    """``run_times.json``: when the run started and finished (UTC) and how it was executed (tile size,
    engine, workers: settings that change no figure), kept out of every other file."""
    path = Path(folder) / RUN_TIMES_NAME
    finished = _dt.datetime.now(_dt.timezone.utc)
    path.write_text(
        json.dumps(
            {
                "started_utc": started.isoformat(timespec="seconds"),
                "finished_utc": finished.isoformat(timespec="seconds"),
                "seconds": round((finished - started).total_seconds(), 3),
                **({"execution": execution} if execution else {}),
            },
            indent=2,
        )
        + "\n",
        encoding="utf-8",
    )
    return path


def source_date_utc() -> str | None:
    """``SOURCE_DATE_EPOCH`` (reproducible-builds convention) as ISO UTC text, or None when unset or invalid.

    The one time that may appear inside reproducible outputs: fixed by whoever runs the audit.
    """
    raw = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    if not raw:
        return None
    try:
        t = _dt.datetime.fromtimestamp(int(raw), _dt.timezone.utc)
    except (ValueError, OverflowError, OSError):
        logger.warning("SOURCE_DATE_EPOCH=%r is not a whole number of seconds; ignored", raw)
        return None
    return t.isoformat(timespec="seconds")


def verify_folder(folder: str | os.PathLike) -> tuple[list[str], list[str], list[str]]:
    """Check an output folder against its file list: (differing or missing, foreign, matching) paths."""
    folder = Path(folder)
    listed = _read_file_list(folder)
    if listed is None:
        raise OutputExistsError(f"{folder}: no {FILES_NAME} written by landcheck here; nothing to verify against.")
    bad, good = [], []
    for e in listed["files"]:
        p = folder / e["path"]
        if p.is_file() and sha256_file(p) == e["sha256"]:
            good.append(e["path"])
        else:
            bad.append(e["path"])
    return bad, foreign_files(folder), good


@contextlib.contextmanager
def staged_folder(final: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Yield a hidden sibling folder; on success it replaces ``final`` in one rename, under a lock.

    The lock is held from here to the publish.  Before publishing the target is checked again:
    without ``overwrite`` it must still be absent (or empty); with it, it must hold nothing but
    landcheck's own files.  On any error or interrupt the staged folder is removed and an existing
    ``final`` is untouched.
    """
    final = Path(final)
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputWriteError(f"{final}: cannot create the output folder ({exc.strerror or exc}).") from exc
    lock = _FolderLock(final)
    lock.acquire()
    stage = None
    try:
        _check_target(final, overwrite, when="already exists")
        _clean_stale(final)
        try:
            stage = Path(tempfile.mkdtemp(prefix=f".{final.name}.partial-", dir=final.parent))
            _mark(stage)
            os.chmod(stage, 0o777 & ~_umask())
        except OSError as exc:
            if stage is not None:
                shutil.rmtree(stage, ignore_errors=True)
            raise OutputWriteError(f"{final}: cannot create the output folder ({exc.strerror or exc}).") from exc
        try:
            yield stage
            raise_if_interrupted()  # a Ctrl-C whose KeyboardInterrupt was lost still publishes nothing
            write_file_list(stage)
            (stage / PARTIAL_MARKER).unlink()
            _check_target(final, overwrite, when="appeared while this run was working")
            _publish(stage, final)
        except OSError as exc:
            shutil.rmtree(stage, ignore_errors=True)
            if isinstance(exc, (OutputExistsError, OutputWriteError)):
                raise
            raise OutputWriteError(
                f"{final}: writing the outputs failed ({exc.strerror or exc}); nothing was left behind."
            ) from exc
        except BaseException:
            shutil.rmtree(stage, ignore_errors=True)
            raise
    finally:
        lock.release()


def _check_target(final: Path, overwrite: bool, *, when: str) -> None:
    if not (final.exists() or final.is_symlink()):
        return
    if not final.is_dir():
        raise OutputExistsError(f"{final}: exists and is a file, not a folder; choose a folder path for --out.")
    if not any(final.iterdir()):
        return
    if not overwrite:
        raise OutputExistsError(
            f"{final}: output folder {when}; nothing was published. Pass --overwrite to replace it, "
            "or choose another folder."
        )
    _refuse_foreign(final)


def _publish(stage: Path, final: Path) -> None:
    if not final.exists():
        os.replace(stage, final)
        return
    if not any(final.iterdir()):
        final.rmdir()
        os.replace(stage, final)
        return
    # every file in it is ours (checked under the lock): set it aside, put the new one in, drop the old
    old = final.with_name(f".{final.name}.old-{os.getpid()}")
    _mark(final)  # so that a run killed right here leaves a folder the next run knows to remove
    os.replace(final, old)
    os.replace(stage, final)
    shutil.rmtree(old, ignore_errors=True)
