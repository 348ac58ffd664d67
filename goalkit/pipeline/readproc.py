"""Reading a build's chunks from the logs in a second process (the one-process build's reader).

A one-process build reads, relabels and writes on threads, but reading many small HDF5
datasets is Python and HDF5 work that holds the GIL: the threads then take turns on one core.
With a second CPU, the chunks are read instead by a reader process (``python -m
goalkit.pipeline.readproc``: no fork of a process holding HDF5 handles and threads, no re-import
of the user's main module) running the very same ``source.read`` on a pickled copy of the
opened logs, and handing each chunk's :class:`~goalkit.logs.episodes.EpisodeSet` back through
its stdout, in chunk order, pickled. The pipe's small buffer keeps it at most a chunk or two
ahead, so memory stays bounded.

The reader only ever saves time: a chunk it cannot read (any error, including a problem in the
logs, or the process failing to start or dying) is read again by the build itself with
``source.read``, which raises the problem exactly as before. The rows, and so the file's bytes,
are the same either way. ``GOALKIT_READ_PROCESS=0`` turns it off.
"""

from __future__ import annotations

import os
import pickle
import struct
import subprocess
import sys

from goalkit.logs.grouped import GroupedSource
from goalkit.logs.perfile import PerFileSource
from goalkit.logs.planspawn import cpus

#: Sources read in a reader process: their ``read`` is pure file I/O, they pickle small, and it
#: goes one small array at a time (a flat log reads large slices, which gain nothing from it:
#: measured, the reader's start-up made the flat 1M build of bench_build.py 20 % slower).
SOURCES = (GroupedSource, PerFileSource)
#: Fewest chunks, and transitions, worth a reader process (its start-up takes about 0.5 s).
MIN_CHUNKS = 4
MIN_TRANSITIONS = 100_000
#: Environment variable that turns the reader process off (``GOALKIT_READ_PROCESS=0``).
SWITCH = "GOALKIT_READ_PROCESS"
_LENGTH = struct.Struct("<Q")


def wanted(source, chunks) -> bool:
    """True when a reader process is worth starting for these chunks of ``source``."""
    return (type(source) in SOURCES and len(chunks) >= MIN_CHUNKS
            and sum(int(c.transitions) for c in chunks) >= MIN_TRANSITIONS and cpus() >= 2
            and os.environ.get(SWITCH, "1") != "0")


class ChunkReader:
    """Chunks of ``source`` read by a reader process, in order; each falls back to ``source.read``.

    Parameters
    ----------
    source : LogSource
        The opened logs (pickled to the reader).
    bounds : list of (int, int)
        Episode ranges of the chunks, in the order they will be asked for.
    """

    def __init__(self, source, bounds):
        self.source = source
        self.bounds = [(int(a), int(b)) for a, b in bounds]
        self.next = 0
        self.proc = None
        self.started = False

    def _start(self) -> None:
        """Start the reader and hand it the request (on the caller's read thread: the request
        waits in the pipe until the new process has started and reads it)."""
        self.started = True
        try:
            request = pickle.dumps({"source": self.source, "bounds": self.bounds}, protocol=pickle.HIGHEST_PROTOCOL)
            here = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
            path = os.pathsep.join(p for p in (here, os.environ.get("PYTHONPATH", "")) if p)
            self.proc = subprocess.Popen([sys.executable, "-m", "goalkit.pipeline.readproc"],
                                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                         env={**os.environ, "PYTHONPATH": path})
            self.proc.stdin.write(_LENGTH.pack(len(request)) + request)
            self.proc.stdin.close()
        except (OSError, ValueError, pickle.PicklingError):
            self.close()

    def read(self, start: int, stop: int):
        """The EpisodeSet of chunk ``(start, stop)`` (the next one in ``bounds``)."""
        if not self.started:
            self._start()
        expected = self.bounds[self.next] if self.next < len(self.bounds) else None
        self.next += 1
        if self.proc is not None and expected == (int(start), int(stop)):
            found = self._receive()
            if found is not None:
                return found
        elif self.proc is not None:          # asked out of order: the reader is of no use
            self.close()
        return self.source.read(start, stop)

    def _receive(self):
        try:
            head = self.proc.stdout.read(_LENGTH.size)
            if len(head) == _LENGTH.size:
                (size,) = _LENGTH.unpack(head)
                data = self.proc.stdout.read(size)
                if len(data) == size:
                    status, value = pickle.loads(data)
                    if status == "ok":
                        return value
                    return None              # this chunk failed there: read it here
        except Exception:                    # noqa: BLE001  a broken reader: read the rest here
            pass
        self.close()
        return None

    def close(self) -> None:
        """Stop the reader process (it also stops by itself when this process goes away)."""
        proc, self.proc = self.proc, None
        if proc is None:
            return
        try:
            proc.kill()
        except OSError:
            pass
        for stream in (proc.stdin, proc.stdout):
            try:
                if stream is not None:
                    stream.close()
            except OSError:
                pass
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            pass


def serve(stdin, stdout) -> None:
    """The reader process: read every requested chunk, write each result in order."""
    (size,) = _LENGTH.unpack(stdin.read(_LENGTH.size))
    request = pickle.loads(stdin.read(size))
    source = request["source"]
    for a, b in request["bounds"]:
        try:
            data = pickle.dumps(("ok", source.read(a, b)), protocol=pickle.HIGHEST_PROTOCOL)
        except Exception:                    # noqa: BLE001  the build reads this chunk itself
            data = pickle.dumps(("failed", None))
        stdout.write(_LENGTH.pack(len(data)))
        stdout.write(data)
        stdout.flush()


if __name__ == "__main__":
    try:
        serve(sys.stdin.buffer, sys.stdout.buffer)
    except BaseException:                    # noqa: BLE001  the build reads what is left itself
        sys.exit(1)
