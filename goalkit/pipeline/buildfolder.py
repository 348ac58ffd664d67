"""The build folder of a scaled-out build: ``.NAME.shards/`` next to the output ``NAME``.

It holds ``build.json`` (the build key and what it was computed from), ``lock`` (an exclusive
``flock`` while a build runs), finished shard files and the spilled large plan objects (the goal
table as ``goal-table.npy``, memory-mapped by workers). It survives an interrupted build, so the
same command resumes; it is removed when the dataset has been written.

The build key is a SHA-256 over everything a shard's rows depend on: the recipe text, the
effective seed (``--seed`` included), the layout text, the SHA-256 and size of every log and
embedding file, the shard partition and the goalkit version. Any change gives another key, and
the folder's old shards are deleted before anything else is written: shards of different
builds are never mixed.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

from goalkit import __version__
from goalkit.errors import DatasetError

try:  # POSIX advisory locks; elsewhere builds are not guarded against running twice
    import fcntl
except ImportError:  # pragma: no cover
    fcntl = None

KEY_FILE = "build.json"
LOCK_FILE = "lock"


def folder_of(output) -> Path:
    """The build folder of output path ``output``."""
    output = Path(output)
    return output.with_name(f".{output.name}.shards")


def build_key(recipe, layout_text: str, log_files: list, embedding_files: list, specs) -> tuple[str, dict]:
    """The key of a build and the record it was hashed from.

    Parameters
    ----------
    recipe : Recipe
    layout_text : str
        The layout file's text ("" when detected).
    log_files, embedding_files : list of dict
        ``{"path", "bytes", "sha256"}`` of each file (:func:`goalkit.write.provenance.describe_files`).
    specs : list of ShardSpec

    Returns
    -------
    (str, dict)
        Hex SHA-256 and the JSON-able record.
    """
    record = {
        "goalkit_version": __version__,
        "recipe_text": recipe.text,
        "seed": recipe.seed,
        "layout_text": layout_text,
        "log_files": [[f["path"], f["bytes"], f["sha256"]] for f in log_files],
        "embedding_files": [[f["path"], f["bytes"], f["sha256"]] for f in embedding_files],
        "shards": [[s.start, s.stop] for s in specs],
    }
    text = json.dumps(record, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest(), record


def _os_error(exc: OSError, what: str, path) -> DatasetError:
    return DatasetError(f"cannot {what} ({exc.strerror or exc})", file=path)


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
        try:
            self.path.mkdir(exist_ok=True)
            self._lock = open(self.path / LOCK_FILE, "a+")
        except OSError as exc:
            raise _os_error(exc, "create the build folder", self.path) from None
        if fcntl is not None:
            try:
                fcntl.flock(self._lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                self._lock.close()
                self._lock = None
                raise DatasetError("another build of this output is running (its build folder is locked); "
                                   "wait for it or stop it", file=self.path) from None
        same = not fresh and self._stored_key() == key
        try:
            self._sweep(keep_shards=same)
            if not same:
                tmp = self.path / f".{KEY_FILE}.partial-{os.getpid()}"
                tmp.write_text(json.dumps({"key": key, **record}, sort_keys=True, indent=1), encoding="utf-8")
                os.replace(tmp, self.path / KEY_FILE)
        except OSError as exc:
            raise _os_error(exc, "write the build folder", self.path) from None
        return same

    def _stored_key(self):
        try:
            return json.loads((self.path / KEY_FILE).read_text(encoding="utf-8")).get("key")
        except (OSError, ValueError, AttributeError):
            return None

    def _sweep(self, keep_shards: bool) -> None:
        """Remove temporary files of killed runs (and the old shards unless ``keep_shards``)."""
        for p in self.path.iterdir():
            if p.name == LOCK_FILE:
                continue
            if ".partial-" in p.name or not keep_shards:
                if p.is_dir():
                    shutil.rmtree(p)
                else:
                    p.unlink(missing_ok=True)
        for p in self.output.parent.glob(f".{self.output.name}.partial-*"):
            pid = p.name.rsplit("-", 1)[-1]
            if pid.isdigit() and not _alive(int(pid)):
                p.unlink(missing_ok=True)

    def remove(self) -> None:
        """Delete the folder (after a successful build) and release the lock."""
        shutil.rmtree(self.path, ignore_errors=True)
        self.release()

    def release(self) -> None:
        """Release the lock; the folder and its shards stay."""
        if self._lock is not None:
            self._lock.close()
            self._lock = None


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
