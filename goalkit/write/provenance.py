"""Provenance: checksums of the files a dataset was built from."""

from __future__ import annotations

import hashlib
from pathlib import Path


def file_digest(path, block: int = 8 << 20) -> str:
    """SHA-256 of a file's bytes, read in blocks of ``block`` bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while True:
            data = f.read(block)
            if not data:
                return h.hexdigest()
            h.update(data)


def describe_files(paths) -> list[dict]:
    """Return ``[{"path", "bytes", "sha256"}]`` for each file, in the given order."""
    out = []
    for p in paths:
        p = Path(p)
        out.append({"path": str(p.resolve()), "bytes": p.stat().st_size, "sha256": file_digest(p)})
    return out
