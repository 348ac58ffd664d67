"""HDF5 logs held open from one read to the next, in the processes of a build that ask for it.

A build reads a grouped log in ranges of episodes: a shard per task on a worker, a chunk per
request on the reader process. Opening the file for each range and closing it afterwards costs
more than it looks: closing evicts HDF5's metadata cache (every group and dataset header the range
touched, up to the cache's fixed size), about 15 ms per range of a 4,000-episode log with the
4 MiB cache logs had then (a tenth of a build's reading; 256 KiB now, a few ms), and the next
open reads the container group's index again. A process whose life is one build -- a local
worker, the spare helper process -- calls :func:`hold_logs` once (a Dask build asks its
cluster's workers for the time of the build, and stops it when it closes); each read then takes the file
through :func:`open_log`, which opens it the first time and hands back the same open file
afterwards. A sharded build's coordinator holds its logs while it plans (the planning scan and the
reads after it share one open file) and lets go of them with :func:`let_go_soon` once its shards
are submitted, so the close overlaps the wait for the first shards. Everything else (the user's
own process otherwise) keeps opening and closing a log per read.

A held file is handed back only while the path still names the same file (device, inode, size
and modification time as when it was opened); otherwise it is closed and the path opened again,
with every check :func:`~goalkit.logs.access.open_h5` makes. A read that fails closes its file,
so a broken handle is never reused. Files are read-only and the metadata cache stays bounded
(:func:`~goalkit.logs.access.bound_metadata_cache`), so holding costs a file descriptor and a few
MiB per log; the files close when the process exits, or with :func:`release_logs`.
"""

from __future__ import annotations

import contextlib
import os
import threading

from goalkit.logs.access import open_h5

_lock = threading.Lock()
_held: dict = {}          # path -> (identity, h5py.File)
_holding = [False]


def hold_logs(on: bool = True) -> None:
    """Keep logs opened through :func:`open_log` open in this process (``on=False``: stop, and close them)."""
    _holding[0] = bool(on)
    if not on:
        release_logs()


def holding() -> bool:
    """True when this process holds its logs open between reads."""
    return _holding[0]


def release_logs() -> None:
    """Close every held log file."""
    _close_all(_take_all())


def let_go_soon():
    """Stop holding now and close the held files on a side thread; that thread, or None.

    For a process that is about to wait (a build's coordinator once its shards are submitted):
    closing a log evicts its metadata cache, tens of milliseconds that then overlap the wait.
    Join the thread before relying on the files being closed.
    """
    _holding[0] = False
    files = _take_all()
    if not files:
        return None
    closer = threading.Thread(target=_close_all, args=(files,), name="goalkit-log-close")
    closer.start()
    return closer


def _take_all() -> list:
    with _lock:
        files = [h5 for _, h5 in _held.values()]
        _held.clear()
    return files


def _close_all(files) -> None:
    for h5 in files:
        with contextlib.suppress(Exception):
            h5.close()


def file_identity(path):
    """(device, inode, size, modification time in ns) of ``path``, or None when it cannot be read:
    what tells that a path still names the file it named before (a held file here, the file a
    planning helper is asked about in :mod:`goalkit.logs.grouped`)."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns


@contextlib.contextmanager
def open_log(path):
    """An open, read-only h5py file of ``path``: held from earlier reads when this process holds
    its logs (:func:`hold_logs`), else opened now and closed at the end of the block.

    Raises
    ------
    LogError
        As :func:`~goalkit.logs.access.open_h5`.
    """
    if not _holding[0]:
        with open_h5(path) as h5:
            yield h5
        return
    key = str(path)
    ident = file_identity(key)          # None: open_h5 names the problem
    with _lock:
        hit = _held.pop(key, None)      # taken: a second reader at the same time opens its own
    if hit is not None and (ident is None or hit[0] != ident):
        with contextlib.suppress(Exception):
            hit[1].close()
        hit = None
    h5 = open_h5(key) if hit is None else hit[1]
    try:
        yield h5
    except BaseException:
        with contextlib.suppress(Exception):
            h5.close()
        raise
    with _lock:
        if key in _held or ident is None or not _holding[0]:    # (holding may have stopped meanwhile)
            extra = h5
        else:
            _held[key], extra = (ident, h5), None
    if extra is not None:
        with contextlib.suppress(Exception):
            extra.close()
