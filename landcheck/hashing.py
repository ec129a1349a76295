"""File digests recorded in manifests and re-checked by the report (one home for the idea)."""

from __future__ import annotations

import hashlib
import os

__all__ = ["sha256_file"]

#: bytes read per step while hashing (memory stays flat whatever the file size)
HASH_CHUNK_BYTES = 1 << 20


def sha256_file(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes, as 64 lowercase hex digits (FIPS 180-4 via hashlib).

    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "abc.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> sha256_file(p)  # FIPS 180-4 example "abc"
    'ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad'
    """
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(HASH_CHUNK_BYTES), b""):
            h.update(chunk)
    return h.hexdigest()
