"""The work folder of a set built with ``keep_work``: ``.NAME.work/`` beside the output ``NAME``.

It keeps the relabelled rows of every *unit* of the last build (a run of consecutive episodes
of one log file, see :mod:`goalkit.pipeline.reuse`), one shard-format file per unit
(:mod:`goalkit.pipeline.shardfiles`), named by the unit's key: ``unit-<SHA-256>.npz``. The key
covers everything the unit's rows depend on, so a file whose name is a key of the next build
holds exactly the rows that build would compute; its stored checksum is checked on reading.

It holds ``lock`` (an exclusive ``flock`` while a build uses it), unit files and temporary
files of killed runs. Unlike the shard folder it stays after a successful build; units the
build did not use are deleted then, so it holds one build's worth of rows. The folder is
created exclusively and refused when it is a link or not a folder; files are written under
exclusive temporary names and renamed; only names goalkit gives its files here are ever
deleted (anything else stays, and the folder with it).
"""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path

from goalkit.outputs import parse_temporary
from goalkit.pipeline.buildfolder import LOCK_FILE, lock_own_folder
from goalkit.pipeline.shardfiles import ShardError, read_shard, write_shard

_UNIT_NAME = re.compile(r"^unit-[0-9a-f]{64}\.npz$")


def work_folder_of(output) -> Path:
    """The work folder of output path ``output``."""
    output = Path(output)
    return output.with_name(f".{output.name}.work")


def unit_name(key: str) -> str:
    """File name of the unit with key ``key`` (64 hex digits)."""
    return f"unit-{key}.npz"


def is_own_work_entry(name: str) -> bool:
    """True for the names goalkit gives its files in a work folder (the only ones it deletes)."""
    return name == LOCK_FILE or _UNIT_NAME.match(name) is not None or parse_temporary(name) is not None


class WorkFolder:
    """The work folder of one output, locked while in use.

    Parameters
    ----------
    output : Path
        The dataset path; the folder is ``.NAME.work`` beside it.
    """

    def __init__(self, output):
        self.path = work_folder_of(output)
        self._lock = None

    def open(self) -> None:
        """Create or adopt the folder, lock it and remove temporary files of killed runs.

        Raises
        ------
        DatasetError
            When the folder cannot be created or written, or another build holds it.
        """
        self._lock = lock_own_folder(self.path, "work folder")
        for p in self._own_files():
            if parse_temporary(p.name) is not None:
                p.unlink(missing_ok=True)

    def _own_files(self):
        """Our regular files in the folder (never a sub-folder, a link's target or a foreign name)."""
        for name in sorted(os.listdir(self.path)):
            if is_own_work_entry(name) and name != LOCK_FILE:
                p = self.path / name
                try:
                    if stat.S_ISREG(os.lstat(p).st_mode) or stat.S_ISLNK(os.lstat(p).st_mode):
                        yield p
                except FileNotFoundError:
                    continue

    def has(self, key: str) -> bool:
        """True when a regular file (not a link) holds unit ``key``."""
        try:
            return stat.S_ISREG(os.lstat(self.path / unit_name(key)).st_mode)
        except OSError:
            return False

    def read(self, key: str, spec, columns):
        """The rows of unit ``key`` (keys relative to the unit's first transition), or None when
        the file is missing, unreadable or fails its checksum."""
        if not self.has(key):
            return None
        try:
            return read_shard(self.path, spec, key, columns, path=self.path / unit_name(key))
        except ShardError:
            return None

    def write(self, key: str, spec, rows, columns) -> None:
        """Store the rows of unit ``key`` (keys relative to the unit's first transition)."""
        write_shard(self.path, spec, key, rows, columns, path=self.path / unit_name(key))

    def prune(self, keep) -> None:
        """Delete the unit files whose key is not in ``keep`` (and any temporary file)."""
        names = {unit_name(k) for k in keep}
        for p in self._own_files():
            if p.name not in names:
                p.unlink(missing_ok=True)

    def size(self) -> tuple[int, int]:
        """(unit files, bytes) held by the folder."""
        n = total = 0
        for p in self._own_files():
            if _UNIT_NAME.match(p.name):
                n += 1
                total += os.lstat(p).st_size
        return n, total

    def release(self) -> None:
        """Release the lock; the folder and its units stay."""
        if self._lock is not None:
            self._lock.close()
            self._lock = None
