"""Writing small text files atomically: a temporary sibling, then a rename."""

from __future__ import annotations

import os
from pathlib import Path

from goalkit.errors import GoalkitError


def write_text_atomic(path, text: str) -> Path:
    """Write ``text`` to ``path`` through a temporary file in the same folder, then rename.

    Nothing is left at ``path`` (or beside it) when writing fails; the failure is a one-line
    :class:`~goalkit.errors.GoalkitError` naming the file.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise GoalkitError(f"cannot write ({exc.strerror or exc})", file=path) from None
    return path
