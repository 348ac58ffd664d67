"""Two planners sharing a run of episodes without a fixed split: they meet where they meet.

The caller plans episodes ``0, 1, 2, ...`` upwards and its helper process (see
:mod:`goalkit.logs.planspawn`) plans from the last episode downwards, a batch at a time; each
publishes how far it has claimed before it plans a batch, and stops when the other's claim
reaches it. Neither needs to know in advance how fast the other is (start-up, a busy core, an
event loop sharing the caller's process): whoever is faster plans more.

The two claims live in a 24-byte file mapped by both processes (``int64`` low claim, high
claim, and the batch size both use), under the system's shared-memory folder when there is one;
the caller deletes its name as soon as the helper has claimed a batch (both have it mapped
then), so a planning killed midway leaves no file behind after that point. Only the caller writes the
low claim and only the helper the high one; each value only moves towards the other, and each is
one aligned 8-byte store. A planner reads the other's claim *before* it publishes its own, so the
two can overlap by at most a batch when they read at the same moment (both then plan the same
few episodes, with the same result; the caller keeps its own), but they never leave a gap: a
planner stops only when a claim the other has published covers its next episode, and every
published claim is planned (or, if the helper fails, planned again by the caller).
"""

from __future__ import annotations

import mmap
import os
import tempfile

import numpy as np

from goalkit.outputs import open_no_follow

#: Episodes claimed at a time (about 8 ms of planning at a quarter of a millisecond each): the
#: most the two can overlap, and the longest the caller waits for the helper at the meeting point.
BATCH = 32
_SIZE = 24


def _folder() -> str:
    shm = "/dev/shm"
    return shm if os.path.isdir(shm) and os.access(shm, os.W_OK) else tempfile.gettempdir()


class Frontier:
    """The shared claims of one planning run (see the module text).

    Make one with :meth:`create` (the caller) or :meth:`attach` (the helper).
    """

    def __init__(self, path: str, fd: int, owner: bool, total: int | None = None):
        self.path, self._owner, self._total = path, owner, total
        try:
            self._map = mmap.mmap(fd, _SIZE)
        finally:
            os.close(fd)
        self._claims = np.frombuffer(self._map, dtype=np.int64, count=3)
        self.batch = int(self._claims[2])
        if self.batch < 1:
            self.close()
            raise ValueError("not a planning frontier")

    @classmethod
    def create(cls, total: int) -> "Frontier | None":
        """A new frontier over episodes ``0 .. total - 1`` (the caller's; batches of
        :data:`BATCH`), or None when no shared file can be made (the caller then splits the
        episodes as before)."""
        try:
            fd, path = tempfile.mkstemp(prefix=".goalkit-frontier-", dir=_folder())
        except OSError:
            return None
        try:
            os.write(fd, np.asarray([0, total, BATCH], dtype=np.int64).tobytes())
            return cls(path, fd, owner=True, total=total)
        except (OSError, ValueError):
            _unlink(path)
            return None

    @classmethod
    def attach(cls, path: str) -> "Frontier":
        """The helper's view of the caller's frontier at ``path`` (never through a link).

        Raises
        ------
        OSError, ValueError
            When the file cannot be opened or is not a frontier.
        """
        fd = open_no_follow(path, os.O_RDWR, 0)
        if os.fstat(fd).st_size != _SIZE:
            os.close(fd)
            raise ValueError("not a planning frontier")
        return cls(path, fd, owner=False)

    def low(self) -> int:
        """First episode not claimed by the caller."""
        return int(self._claims[0])

    def high(self) -> int:
        """First episode claimed by the helper (the total when it has claimed none)."""
        return int(self._claims[1])

    def claim_low(self, at: int) -> tuple[int, int] | None:
        """The caller's next batch ``(at, stop)`` from episode ``at``, or None when the helper's
        claim reaches ``at``."""
        high = self.high()
        if self._total is not None and high < self._total:   # the helper has it mapped: the
            self._total = None                                # name is no longer needed
            _unlink(self.path)
        if at >= high:
            return None
        stop = min(at + self.batch, high)
        self._claims[0] = stop
        return at, stop

    def claim_high(self, at: int) -> tuple[int, int] | None:
        """The helper's next batch ``(start, at)`` below episode ``at``, or None when the
        caller's claim reaches ``at``."""
        low = self.low()
        if at <= low:
            return None
        start = max(at - self.batch, low)
        self._claims[1] = start
        return start, at

    def close(self) -> None:
        """Unmap (and, for the caller, delete, if it was not deleted as soon as the helper
        claimed its first batch) the shared file."""
        claims, self._claims = self._claims, None
        if claims is not None:
            del claims
            self._map.close()
            if self._owner and self._total is not None:
                _unlink(self.path)


def _unlink(path: str) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def plan_downwards(frontier: Frontier, total: int, plan_batch) -> int:
    """The helper's loop: claim batches below ``total`` and call ``plan_batch(start, stop)`` for
    each (episodes in increasing order within a batch); the lowest episode planned.
    """
    at = total
    while True:
        got = frontier.claim_high(at)
        if got is None:
            return at
        plan_batch(*got)
        at = got[0]


def plan_upwards(frontier: Frontier, start: int, plan_batch) -> int:
    """The caller's loop: claim batches from ``start`` up and call ``plan_batch(start, stop)``
    for each; the first episode left to the helper."""
    at = start
    while True:
        got = frontier.claim_low(at)
        if got is None:
            return at
        plan_batch(*got)
        at = got[1]
