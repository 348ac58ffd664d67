"""Reading a build's chunks from the logs in a second process (the one-process build's reader).

A one-process build reads, relabels and writes on threads, but reading many small HDF5
datasets is Python and HDF5 work that holds the GIL: the threads then take turns on one core.
With a second CPU, the chunks are read instead by a reader process (the build's waiting spare,
else a new one: :mod:`goalkit.logs.spare`; no fork of a process holding HDF5 handles and
threads, no re-import of the user's main module) running the very same ``source.read`` on a
pickled copy of the opened logs, and handing each chunk's :class:`~goalkit.logs.episodes.EpisodeSet` back through
its stdout, in chunk order, pickled. The pipe's small buffer keeps it at most a chunk or two
ahead, so memory stays bounded.

The reader only ever saves time: a chunk it cannot read (any error, including a problem in the
logs, or the process failing to start or dying) is read again by the build itself with
``source.read``, which raises the problem exactly as before. The rows, and so the file's bytes,
are the same either way. ``GOALKIT_READ_PROCESS=0`` turns it off.
"""

from __future__ import annotations

import os

from goalkit.logs import spare
from goalkit.logs.grouped import GroupedSource
from goalkit.logs.perfile import PerFileSource
from goalkit.logs.spare import cpus

#: Sources read in a reader process: their ``read`` is pure file I/O, they pickle small, and it
#: goes one small array at a time (a flat log reads large slices, which gain nothing from it:
#: measured, the reader's start-up made the flat 1M build of bench_build.py 20 % slower).
SOURCES = (GroupedSource, PerFileSource)
#: Fewest chunks, and transitions, worth a reader process (its start-up takes about 0.5 s).
MIN_CHUNKS = 4
MIN_TRANSITIONS = 100_000
#: Environment variable that turns the reader process off (``GOALKIT_READ_PROCESS=0``).
SWITCH = "GOALKIT_READ_PROCESS"


def wanted(source, chunks) -> bool:
    """True when a reader process is worth starting for these chunks of ``source``."""
    return _wanted(type(source), len(chunks), sum(int(c.transitions) for c in chunks))


def wanted_ranges(source, bounds) -> bool:
    """:func:`wanted` for chunks given as episode ranges ``(start, stop)`` of ``source`` (a log,
    or a sample of one that reads through it, its ``source``)."""
    lengths = source.lengths
    total = sum(int(lengths[a:b].sum()) for a, b in bounds)
    return _wanted(type(getattr(source, "source", source)), len(bounds), total)


def _wanted(kind, chunks: int, transitions: int) -> bool:
    return (kind in SOURCES and chunks >= MIN_CHUNKS and transitions >= MIN_TRANSITIONS and cpus() >= 2
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
        self.helper = None
        self.started = False

    @property
    def proc(self):
        """The reader's process (None when there is none, or no more)."""
        return None if self.helper is None else self.helper.proc

    def _start(self) -> None:
        """Take the reader (the build's waiting spare, else a new process) and hand it the
        request (on the caller's read thread: the request waits in the pipe until a new process
        has started and reads it)."""
        self.started = True
        helper = spare.take()
        if helper is not None and helper.send({"call": self.source.read, "each": self.bounds}):
            self.helper = helper

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
        found = self.helper.receive()
        if self.proc is None:                # a broken reader: read the rest here
            self.helper = None
        return found

    def close(self) -> None:
        """Stop the reader process (it also stops by itself when this process goes away)."""
        helper, self.helper = self.helper, None
        if helper is not None:
            helper.close()


