"""A sharded build's worker standing in for the logs' spare helper process while the build plans.

A grouped or per-file log's planning helper (:mod:`goalkit.logs.planspawn`) asks the build's
waiting spare (:mod:`goalkit.logs.spare`) to plan the last part of the episodes while the
coordinator plans the first part. A one-process build starts an interpreter for that. A
build on local workers has already started them (:meth:`LocalRunner.launch`), and they sit idle
while the coordinator plans; a third interpreter
would only add its own start-up (about 0.3 CPU seconds, on cores that planning and the workers'
start-up already keep busy). So :meth:`ShardProducer.launch
<goalkit.pipeline.sharded.ShardProducer.launch>` puts a :class:`PoolSpare` in the spare slot: it
has the spare's interface (``send``, ``receive``, ``alive``, ``close``, ``started``) and runs each
request as one task on the runner (``runner.submit``). The logs' code is unchanged: it takes
"the waiting spare" as before. Only runners with a ``ready()`` method are used, i.e. the local
pool: a Dask cluster's workers may sit on other machines, and on a one-machine ``LocalCluster``
the planning part's answer (several MB at 1M transitions) crossing Dask's transport made the
1M build slower (18.7 s against 16.0-16.9 s without, one run each), so a Dask build keeps the
logs' own spare.

Anything going wrong (the pool broken, a worker dead, the task failing, an answer that does not
come back) reads as a failed answer: the caller plans those episodes itself, exactly as when a
spare fails, so the result never depends on it. A dead worker is then reported as always, when
the shards are handed out. ``GOALKIT_POOL_HELPER=0`` turns it off (the logs then start their own
spare when they want one).
"""

from __future__ import annotations

import os
import time
from collections import deque
from concurrent.futures import TimeoutError as FutureTimeout

from goalkit.logs import spare

#: Environment variable that turns the stand-in off (``GOALKIT_POOL_HELPER=0``).
SWITCH = "GOALKIT_POOL_HELPER"
#: Seconds between checks that the runner's workers are alive while an answer is awaited.
CHECK_SECONDS = 0.2


def serve_request(request: dict) -> list:
    """Answer one spare request on a worker: ``("ok", value)`` or ``("failed", None)`` per args.

    The same answers :func:`goalkit.logs.spare.serve` writes on its stdout
    (:func:`goalkit.logs.spare.answers`), as one list.
    """
    return list(spare.answers(request))


def wanted() -> bool:
    """False when ``GOALKIT_POOL_HELPER=0``."""
    return os.environ.get(SWITCH, "1") != "0"


class PoolSpare:
    """The spare helper's interface over a shard runner's workers.

    Parameters
    ----------
    runner : LocalRunner
        Its ``submit(fn, *args)`` runs a task on a worker and returns a future; its
        ``dead_workers()`` ends the wait for an answer when a worker has died.
    """

    #: Not a process of its own (a chunk reader that wants one reads the chunks itself).
    proc = None

    def __init__(self, runner, every: float = CHECK_SECONDS):
        self.runner = runner
        self.every = every
        # the logs' planning shares the episodes by the start-up a spare has left: the pool's
        # processes started when it was launched (a runner that does not say: now)
        self.started = getattr(runner, "launched_at", None) or time.monotonic()
        self.tasks: deque = deque()      # one future per request, in order
        self.answers: deque = deque()    # answers of the request being read
        self.closed = False

    @property
    def alive(self) -> bool:
        return not self.closed and not getattr(self.runner, "broken", False)

    def send(self, request: dict) -> bool:
        """Run ``request`` as a task on a worker; False (and closed) when it cannot be submitted."""
        if not self.alive:
            return False
        try:
            self.tasks.append(self.runner.submit(serve_request, request))
        except Exception:                    # noqa: BLE001  a broken pool, a closed client
            self.close()
            return False
        return True

    def receive(self):
        """The next answer's value; None when it failed there or the workers are gone (then closed)."""
        if not self.answers:
            if not self.tasks or self.closed:
                return None
            found = self._result(self.tasks.popleft())
            if not isinstance(found, list):
                self.close()
                return None
            self.answers.extend(found)
        try:
            status, value = self.answers.popleft()
        except (TypeError, ValueError):
            self.close()
            return None
        return value if status == "ok" else None

    def _result(self, fut):
        """The task's result, or None when it failed or a worker died meanwhile."""
        dead = getattr(self.runner, "dead_workers", None)
        while True:
            try:
                return fut.result(timeout=self.every)
            except (TimeoutError, FutureTimeout):
                if self.closed or (dead is not None and dead()):
                    return None
            except Exception:                # noqa: BLE001  a lost worker, a cancelled task
                return None

    def close(self) -> None:
        """Stop using the workers (idempotent): queued requests are cancelled; the runner stays."""
        self.closed = True
        for fut in self.tasks:
            fut.cancel()
        self.tasks.clear()
        self.answers.clear()
