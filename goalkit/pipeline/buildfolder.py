"""The build folder of a scaled-out build: ``.NAME.shards/`` next to the output ``NAME``.

It holds ``build.json`` (the build key and what it was computed from), ``lock`` (an exclusive
``flock`` while a build runs), ``payload.pickle`` (the plan and log index for local workers),
finished shard files and the goal table when it is large (``goal_table.npy``, memory-mapped by
workers). It survives an interrupted build, so the
same command resumes; it is removed when the dataset has been written.

The build key is a SHA-256 over everything a shard's rows depend on: the build's inputs
(:meth:`goalkit.pipeline.build.BuildInputs.key_record`: the recipe text, the effective seed
(``--seed`` included), the layout text, the SHA-256 and size of every log, embedding and library
file, the goalkit version) and the shard partition. Any change gives another key, and
the folder's old shards are deleted before anything else is written: shards of different
builds are never mixed.

The folder is created exclusively and refused when it is a symbolic link or not a folder; files
in it are written through :mod:`goalkit.outputs` (exclusive temporary names). Only names goalkit
gives its own files there (:func:`is_own_entry`) are ever deleted; anything else is left, and the
folder with it.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import stat
from pathlib import Path

from goalkit import __version__
from goalkit.errors import DatasetError, GoalkitError
from goalkit.outputs import open_no_follow, own_folder, parse_temporary, write_text

try:  # POSIX advisory locks; elsewhere builds are not guarded against running twice
    import fcntl
except ImportError:  # pragma: no cover
    fcntl = None

KEY_FILE = "build.json"
#: The plan and log index handed to local worker processes (goalkit.pipeline.workers).
PAYLOAD_FILE = "payload.pickle"
#: A large goal table, memory-mapped by the workers (goalkit.pipeline.workers).
GOAL_TABLE_FILE = "goal_table.npy"
LOCK_FILE = "lock"
_SHARD_NAME = re.compile(r"^shard-[0-9]{5,}\.npz$")


def is_own_entry(name: str) -> bool:
    """True for the names goalkit gives its files in a build folder (the only ones it deletes)."""
    return (name in (KEY_FILE, LOCK_FILE, PAYLOAD_FILE, GOAL_TABLE_FILE) or _SHARD_NAME.match(name) is not None
            or parse_temporary(name) is not None)


def folder_of(output) -> Path:
    """The build folder of output path ``output``."""
    output = Path(output)
    return output.with_name(f".{output.name}.shards")


def build_key(inputs: dict, specs) -> tuple[str, dict]:
    """The key of a build and the record it was hashed from.

    Parameters
    ----------
    inputs : dict
        The build's inputs as a JSON-able record (:meth:`goalkit.pipeline.build.BuildInputs.key_record`).
    specs : list of ShardSpec
        The shard partition.

    Returns
    -------
    (str, dict)
        Hex SHA-256 and the JSON-able record (``inputs`` with the partition added).
    """
    record = {**inputs, "shards": [[s.start, s.stop] for s in specs]}
    text = json.dumps(record, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest(), record


def _os_error(exc: OSError, what: str, path) -> DatasetError:
    return DatasetError(f"cannot {what} ({exc.strerror or exc})", file=path)


def lock_own_folder(path: Path, what: str):
    """Create or adopt goalkit's folder ``path`` (never a link) and lock its ``lock`` file.

    Parameters
    ----------
    path : Path
        The folder (a build folder or a work folder).
    what : str
        Its name in messages ("build folder", "work folder").

    Returns
    -------
    file object
        The open lock file; closing it releases the lock.

    Raises
    ------
    DatasetError
        When the folder cannot be created or written, or another build holds its lock.
    """
    try:
        own_folder(path, what=what)
        lock = os.fdopen(open_no_follow(path / LOCK_FILE, os.O_RDWR | os.O_CREAT), "a+")
    except GoalkitError as exc:
        raise DatasetError(exc.message, file=exc.file) from None
    except OSError as exc:
        raise _os_error(exc, f"create the {what}", path) from None
    if fcntl is not None:
        try:
            fcntl.flock(lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            lock.close()
            raise DatasetError(f"another build of this output is running (its {what} is locked); "
                               "wait for it or stop it", file=path) from None
    return lock


class BuildFolder:
    """The shard folder of one output, locked while in use.

    Parameters
    ----------
    output : Path
        The dataset path; the folder is ``.NAME.shards`` beside it.
    """

    def __init__(self, output):
        self.output = Path(output)
        self.path = folder_of(self.output)
        self._lock = None

    def open(self, key: str, record: dict, fresh: bool = False) -> bool:
        """Create or adopt the folder for build ``key``; lock it.

        Old contents are deleted when the folder belongs to another key, or when ``fresh``.

        Returns
        -------
        bool
            True when the folder already belonged to this build (its shards may be reused).

        Raises
        ------
        DatasetError
            When the folder cannot be created or written, or another build holds it.
        """
        self._lock = lock_own_folder(self.path, "build folder")
        same = not fresh and self._stored_key() == key
        try:
            self._sweep(keep_shards=same)
            if not same:
                write_text(self.path / KEY_FILE, json.dumps({"key": key, **record}, sort_keys=True, indent=1),
                           what="build record")
        except OSError as exc:
            raise _os_error(exc, "write the build folder", self.path) from None
        return same

    def _stored_key(self):
        try:
            fd = open_no_follow(self.path / KEY_FILE, os.O_RDONLY)
            with os.fdopen(fd, encoding="utf-8") as f:
                return json.loads(f.read()).get("key")
        except (OSError, ValueError, AttributeError):
            return None

    def _own_entries(self):
        """Our files in the folder (never a sub-folder, never a foreign name)."""
        for name in sorted(os.listdir(self.path)):
            if is_own_entry(name):
                p = self.path / name
                try:
                    if not stat.S_ISDIR(os.lstat(p).st_mode):
                        yield p
                except FileNotFoundError:
                    continue

    def _sweep(self, keep_shards: bool) -> None:
        """Remove temporary files of killed runs (and our old files unless ``keep_shards``).

        The folder is locked, so no other build is writing in it: every temporary file in it is
        a killed run's. A link is removed as a link; its target is untouched.
        """
        for p in self._own_entries():
            if p.name == LOCK_FILE or (keep_shards and parse_temporary(p.name) is None):
                continue
            p.unlink(missing_ok=True)

    def remove(self) -> None:
        """Delete our files and the folder (after a successful build) and release the lock.

        A file goalkit did not name stays, and the folder with it.
        """
        try:
            for p in self._own_entries():
                if p.name != LOCK_FILE:
                    p.unlink(missing_ok=True)
            (self.path / LOCK_FILE).unlink(missing_ok=True)
            os.rmdir(self.path)
        except OSError:
            pass
        self.release()

    def release(self) -> None:
        """Release the lock; the folder and its shards stay."""
        if self._lock is not None:
            self._lock.close()
            self._lock = None
