"""Provenance: checksums of the files a dataset was built from, and their places.

Each file entry is ``{"path", "bytes", "sha256"}``; a built set's entries also carry
``relative``, the path relative to the folder its recipe writes the set to (its own
``[output] path``, recorded as the provenance's ``set_folder``), so that a set moved together
with its files still finds them (:mod:`goalkit.write.relocate`). That folder comes from the
recipe, not from ``--out``: the same inputs give the same bytes wherever the set is written.
"""

from __future__ import annotations

import hashlib
import os
import tomllib
from pathlib import Path


#: The provenance groups of file entries: (provenance key, what a message calls one).
FILE_GROUPS = (("log_files", "log file"), ("embedding_files", "embedding file"), ("library.files", "library file"))


def file_digest(path, block: int = 8 << 20, stop=None) -> str | None:
    """SHA-256 of a file's bytes, read in blocks of ``block`` bytes into one buffer.

    ``stop``, a :class:`threading.Event`: when it is set the reading ends at the next block and
    None is returned (a digest taken ahead of need, no longer wanted).
    """
    h = hashlib.sha256()
    buf = bytearray(block)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as f:
        while True:
            if stop is not None and stop.is_set():
                return None
            n = f.readinto(buf)
            if not n:
                return h.hexdigest()
            h.update(view[:n])


def describe_files(paths, stop=None) -> list[dict] | None:
    """Return ``[{"path", "bytes", "sha256"}]`` for each file, in the given order (None when
    ``stop`` was set meanwhile, see :func:`file_digest`)."""
    out = []
    for p in paths:
        p = Path(p)
        digest = file_digest(p, stop=stop)
        if digest is None:
            return None
        out.append({"path": str(p.resolve()), "bytes": p.stat().st_size, "sha256": digest})
    return out


def declared_folder(recipe_file, recipe_text: str) -> str | None:
    """The folder a recipe's own ``[output] path`` names, resolved against the recipe's folder.

    None when the recipe has no file or its output path cannot be read (no relative paths are
    recorded then). ``--out`` does not change it, so a set's bytes do not depend on ``--out``.
    """
    if not recipe_file:
        return None
    try:
        declared = tomllib.loads(recipe_text)["output"]["path"]
    except (tomllib.TOMLDecodeError, KeyError, TypeError):
        return None
    if not isinstance(declared, str) or not declared:
        return None
    base = os.path.dirname(os.path.realpath(recipe_file))
    return os.path.dirname(os.path.abspath(os.path.join(base, os.path.expanduser(declared))))


def with_relative(prov: dict, set_folder) -> dict:
    """``prov`` with ``set_folder`` and each file entry's ``relative`` path added (a new dict).

    ``set_folder`` is the folder the recipe writes the set to (:func:`declared_folder`); a path
    that has no relative form (another drive) gets no ``relative``.
    """
    folder = str(set_folder)
    out = dict(prov, set_folder=folder)
    for key, _ in FILE_GROUPS:
        if key == "library.files":
            if isinstance(out.get("library"), dict) and "files" in out["library"]:
                out["library"] = dict(out["library"], files=_add_relative(out["library"]["files"], folder))
        elif key in out:
            out[key] = _add_relative(out[key], folder)
    return out


def _add_relative(entries, folder: str) -> list:
    out = []
    for e in entries:
        e = {k: v for k, v in e.items() if k != "relative"}
        try:
            e["relative"] = os.path.relpath(e["path"], folder)
        except ValueError:   # no relative form (another drive)
            pass
        out.append(e)
    return out
