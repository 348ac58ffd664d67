"""A sharded build's worker pool lent to the log planner as its helper process.

A sharded build starts its workers (local processes or Dask workers) before it plans, so that
their start-up overlaps the planning; until the first shard they have nothing to do. Planning a
grouped log or a per-file folder shares its episodes with one helper
(:mod:`goalkit.logs.planspawn`): for a one-process build the spare interpreter of
:mod:`goalkit.logs.spare`, a third process on a 2-core machine whose start-up competes with the
workers'. Here the pool itself is that helper: :func:`lend` puts a :class:`PoolHelper` in the
spare slot, and the planner's request (``{"call": f, "each": [args, ...]}``) runs as tasks on
the pool, through the runners' ``submit`` hook.

As with any helper, a failure only costs time: a task that fails, a worker that dies, a pool that
breaks, and :meth:`PoolHelper.receive` answers None, so the planner plans that part itself and
the plan (and so every byte of the set) is the serial one.
"""

from __future__ import annotations

import time
from collections import deque

from goalkit.logs import spare

#: Seconds between checks that the pool still has all its workers while an answer is awaited.
POLL_SECONDS = 0.2


def call_each(call, args):
    """``call(*args)``: one piece of a helper request, run on a worker."""
    return call(*args)


class PoolHelper:
    """The helper interface of :class:`goalkit.logs.spare.Spare` on a build's runner.

    Parameters
    ----------
    runner : LocalRunner or DaskRunner
        A runner whose workers were launched (it is not started, stopped or closed here).
    started : float
        ``time.monotonic()`` when the workers were launched (the planner sizes the helper's
        share by how long it has been starting).
    """

    def __init__(self, runner, started: float):
        self.runner = runner
        self.started = started
        self.pending: deque = deque()
        self.closed = False

    @property
    def alive(self) -> bool:
        """False once closed, or when the pool has lost a worker."""
        return not self.closed and not getattr(self.runner, "broken", False)

    def send(self, request: dict) -> bool:
        """Submit each piece of ``request`` as a task; False (and closed) when the pool refuses."""
        try:
            for args in request["each"]:
                self.pending.append(self.runner.submit(call_each, request["call"], tuple(args)))
            return True
        except Exception:                    # noqa: BLE001  a broken pool: the planner does it all
            self.close()
            return False

    def receive(self):
        """The next piece's value, in order; None when it failed or the pool lost a worker."""
        if self.closed or not self.pending:
            return None
        fut = self.pending.popleft()
        dead = getattr(self.runner, "dead_workers", None)
        while True:
            try:
                return fut.result(timeout=POLL_SECONDS)
            except TimeoutError:
                # a local pool can miss a worker that died as it started: do not wait for ever
                if dead is not None and dead():
                    self.close()
                    return None
            except Exception:                # noqa: BLE001  the task failed there; planned here
                return None

    def close(self) -> None:
        """Drop the pieces not yet answered (the runner and its workers are left running)."""
        self.closed = True
        while self.pending:
            self.pending.popleft().cancel()


def lend(runner) -> None:
    """Offer ``runner``'s launched workers (None: no runner, nothing lent) as the planning helper of the current spare scope.

    Nothing is lent when the runner cannot take work yet: a local pool that was not launched or
    is broken, a Dask runner not yet connected (connecting is left to the shards, which report a
    bad scheduler address). The scope stops the helper (not the runner) when it ends.
    """
    if runner is None or getattr(runner, "submit", None) is None or getattr(runner, "broken", False):
        return
    if getattr(runner, "pool", True) is None or getattr(runner, "client", True) is None:
        return
    spare.give_back(PoolHelper(runner, time.monotonic()))
