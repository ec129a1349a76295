"""File digests recorded in manifests and re-checked by the report (one home for the idea)."""

from __future__ import annotations

import hashlib
import os
import threading

__all__ = ["sha256_file", "remember_written"]

#: bytes read per step while hashing (memory stays flat whatever the file size)
HASH_CHUNK_BYTES = 1 << 20


#: digests of files this process wrote, by (device, inode, size, mtime in ns): see :func:`remember_written`
_WRITTEN: dict[tuple[int, int, int, int], str] = {}
_WRITTEN_LOCK = threading.Lock()


def _key(path: str | os.PathLike) -> tuple[int, int, int, int]:
    st = os.stat(path)
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def remember_written(path: str | os.PathLike) -> str:
    """Hash a file this process has just written and finished, and remember the digest.

    :func:`sha256_file` with ``written=True`` then returns it without reading the file again while
    the file is unchanged (same device, inode, size and modification time, so also after a rename of
    its folder).  The audit hashes its large rasters this way on the thread that wrote them, beside
    the report, instead of twice on the main thread (report manifest, then ``SHA256SUMS``).
    """
    digest = sha256_file(path)
    with _WRITTEN_LOCK:
        _WRITTEN[_key(path)] = digest
    return digest


def sha256_file(path: str | os.PathLike, *, written: bool = False) -> str:
    """SHA-256 of a file's bytes, as 64 lowercase hex digits (FIPS 180-4 via hashlib).

    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "abc.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> sha256_file(p)  # FIPS 180-4 example "abc"
    'ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad'

    ``written=True``: a file of landcheck's own outputs; a digest remembered by
    :func:`remember_written` for the unchanged file is returned instead of reading it again.
    Inputs are always read.
    """
    if written:
        with _WRITTEN_LOCK:
            known = _WRITTEN.get(_key(path))
        if known is not None:
            return known
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(HASH_CHUNK_BYTES), b""):
            h.update(chunk)
    return h.hexdigest()
