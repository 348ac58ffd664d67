"""The logs' SHA-256, taken while they are planned, for a build that needs it as planning ends.

A sharded build's key (:func:`goalkit.pipeline.buildfolder.build_key`) includes the digest of
every log file, and the workers get nothing to do until the key is known. Hashed after the
planning, as the one-process build does (it needs the digests only for the provenance, at the
end), a 120 MB log kept one core idle for about 0.2 s between planning and the first shard. So
the sharded build hashes the files its recipe names on a side thread from the start, beside the
planning; :func:`log_files` hands the result to :func:`~goalkit.pipeline.build.read_inputs`
only when it describes exactly the files the opened log reads and none of them changed (device,
inode, size, modification time) while it was hashed; otherwise the files are hashed again, as
before. The digest never changes what is built: it is the same function of the same bytes.
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from goalkit.logs.held import file_identity
from goalkit.write.provenance import describe_files


class EarlyDigests:
    """``with EarlyDigests(paths) as early:`` -- hash ``paths`` (regular files) on a side thread.

    Leaving the block stops a hash still running within one block (a build that failed early
    does not wait for a large log to be read through).
    """

    def __init__(self, paths):
        self.paths = [str(p) for p in paths]
        self._stop = threading.Event()
        self._pool = None
        self.future = None

    def __enter__(self):
        if self.paths and all(Path(p).is_file() for p in self.paths):
            self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-early-digest")
            self.future = self._pool.submit(_described, self.paths, self._stop)
        return self

    def __exit__(self, *exc):
        self._stop.set()
        if self._pool is not None:
            self._pool.shutdown(wait=True)
        return False

    def log_files(self, source) -> list | None:
        """The digests of ``source.files`` when they were taken here, else None (waits for them)."""
        if self.future is None:
            return None
        try:
            found = self.future.result()
        except OSError:
            return None
        if found is None:
            return None
        try:
            wanted = [str(Path(p).resolve()) for p in source.files]
        except (OSError, TypeError):
            return None
        return found if [f["path"] for f in found] == wanted else None


def _described(paths, stop):
    """``describe_files(paths)`` when no file changed while it was read, else None."""
    before = [file_identity(p) for p in paths]
    if None in before:
        return None
    found = describe_files(paths, stop=stop)
    if found is None or [file_identity(p) for p in paths] != before:
        return None
    return found
