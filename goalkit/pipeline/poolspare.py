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
"the waiting spare" as before. Only runners with a ``ready()`` method that says yes are used:
the local pool once launched, and a Dask cluster whose workers all run on this machine (a
``LocalCluster``; :meth:`DaskRunner.ready <goalkit.pipeline.dask_build.DaskRunner.ready>`). The
helper meets the coordinator through a claims file in this machine's shared memory
(:mod:`goalkit.logs.frontier`), which workers on other machines cannot open, so a cluster of
several machines keeps the logs' own spare. On a ``LocalCluster`` the stand-in was measured
slower at first (the planning answer crossing Dask's transport, and the worker's allocations
mapped afresh under the nanny's malloc setting); since the workers keep their heap for the
time of a build (:mod:`goalkit.heapkeep`) it saves the spare's start-up: 0.3 s (200k
transitions, 6 rounds) and 0.4 s (1M, 4 rounds) of median wall time.

Anything going wrong (the pool broken, a worker dead, the task failing, an answer that does not
come back) reads as a failed answer: the caller plans those episodes itself, exactly as when a
spare fails, so the result never depends on it. A dead worker is then reported as always, when
the shards are handed out. ``GOALKIT_POOL_HELPER=0`` turns it off (the logs then start their own
spare when they want one).
"""

from __future__ import annotations

import os
import threading
import time
from collections import deque
from concurrent.futures import Future
from concurrent.futures import TimeoutError as FutureTimeout

from goalkit.logs import planspawn, spare

#: Seconds from a pool's launch to a first task run on one of its workers, while the coordinator
#: plans on the other core (fork server start-up and imports, a fork, the warm-up task):
#: 0.16 s on an idle 2-core machine (median of 5), longer beside the planning; 0.22 s shares a
#: 200k-transition grouped log's planning so that both parts end together (timeline of busy CPUs,
#: 2-core reference machine). The logs' planning counts a spare's start-up as
#: :data:`goalkit.logs.planspawn.STARTUP_SECONDS` from its ``started`` time, so :class:`PoolSpare`
#: dates its start that much later than the launch.
POOL_STARTUP_SECONDS = 0.22
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
        # processes started when it was launched (a runner that does not say: now), and take
        # POOL_STARTUP_SECONDS to run a first task
        launched = getattr(runner, "launched_at", None) or time.monotonic()
        self.started = launched + POOL_STARTUP_SECONDS - planspawn.STARTUP_SECONDS
        self.tasks: deque = deque()      # per request, in order: a future of the task's future
        self.answers: deque = deque()    # answers of the request being read
        self.closed = False

    @property
    def alive(self) -> bool:
        return not self.closed and not getattr(self.runner, "broken", False)

    def send(self, request: dict) -> bool:
        """Run ``request`` as a task on a worker; False (and closed) when the workers are gone.

        It does not wait: a pool still starting (its fork server importing, about 0.15 s) takes
        the task on a side thread, while the caller goes on with its own part of the work. A
        task that cannot be submitted there reads as a failed answer (:meth:`receive`).
        """
        if not self.alive:
            return False
        box: Future = Future()

        def submit():
            try:
                task = self.runner.submit(serve_request, request)
            except BaseException as exc:     # noqa: BLE001  a broken pool, a closed client
                _settle(box, exc=exc)
                return
            if not _settle(box, value=task):     # closed meanwhile
                task.cancel()

        threading.Thread(target=submit, name="goalkit-pool-send", daemon=True).start()
        self.tasks.append(box)
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

    def _result(self, box):
        """The task's result, or None when it could not be submitted, failed, or a worker died meanwhile."""
        fut = self._wait(box)
        return None if fut is None else self._wait(fut)

    def _wait(self, fut):
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
        for box in self.tasks:
            if not box.cancel() and box.exception() is None:    # submitted: cancel the task
                box.result().cancel()
        self.tasks.clear()
        self.answers.clear()


def _settle(box: Future, value=None, exc: BaseException | None = None) -> bool:
    """Set ``box``'s outcome; False when it was cancelled first."""
    try:
        if exc is not None:
            box.set_exception(exc)
        else:
            box.set_result(value)
    except Exception:                        # noqa: BLE001  InvalidStateError: cancelled
        return False
    return True
