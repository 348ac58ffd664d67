"""Run shard tasks on a dask.distributed cluster.

The payload (plan and log index) is written once to the build folder, as for local workers
(:func:`~goalkit.pipeline.workers.save_payload`), and each task carries its path and SHA-256 and
its :class:`~goalkit.pipeline.shardfiles.ShardSpec`; a worker loads the payload on its first
task and keeps it for the next ones (until the build releases the workers,
:func:`end_build`). Scattering it through Dask instead made the coordinator wait, one core
idle, while it crossed the transport and each worker unpickled it on its event loop (0.35 s at
21,000 episodes). Workers read the logs and write shard files themselves, so the logs and the
build folder must be reachable under the same paths from every worker (one machine, or a
shared filesystem).
"""

from __future__ import annotations

import socket
import threading
import uuid

from goalkit.errors import GoalkitError
from goalkit.heapkeep import hold_heap, release_heap, trim_thread_heap
from goalkit.logs.held import hold_logs
from goalkit.pipeline import workers
from goalkit.pipeline.workers import failure, lost_worker, save_payload, warm_up


def begin_build() -> None:
    """On a worker, for the time of a build (until :func:`end_build`): hold the logs open from one
    shard to the next (:func:`goalkit.logs.held.hold_logs`) and keep the memory a shard frees for
    the next one (:func:`goalkit.heapkeep.hold_heap`: Dask's nanny starts its workers with a
    64 KiB trim threshold, under which every large array is mapped and zeroed afresh)."""
    hold_logs(True)
    hold_heap()


def warm_up_holding() -> int:
    """:func:`begin_build`, then :func:`~goalkit.pipeline.workers.warm_up`; the worker's pid."""
    begin_build()
    return warm_up()


def end_build() -> None:
    """On a worker, when a build is done with it: close the logs it held, forget the build's
    payload and put back the memory settings :func:`begin_build` changed, returning the memory
    kept to the system (a long-lived worker keeps nothing of a finished build; see
    :func:`trim_after_build` for the task threads' own heaps)."""
    hold_logs(False)
    workers.forget_payload()
    release_heap()


def trim_after_build() -> bool:
    """A task run on each worker after :func:`end_build`: give back the free top of the heap of
    the task thread it runs on (:func:`goalkit.heapkeep.trim_thread_heap`), which the release,
    run on the worker's event loop, cannot reach."""
    return trim_thread_heap()


def local_addresses() -> set:
    """The network addresses of this machine (every interface's, loopback included) and its name."""
    import psutil   # a dependency of dask.distributed, which any use of this module has

    found = {"localhost", socket.gethostname()}
    for entries in psutil.net_if_addrs().values():
        found.update(e.address.split("%")[0] for e in entries if e.family in (socket.AF_INET, socket.AF_INET6))
    return found


class DaskRunner:
    """Submit shard tasks to a running dask.distributed scheduler.

    Parameters
    ----------
    address : str, optional
        Scheduler address (``tcp://host:8786``); ignored when ``client`` is given.
    client : distributed.Client, optional
        An existing client (e.g. of a ``LocalCluster``); not closed by the runner.
    timeout : float
        Seconds to wait for the scheduler.
    """

    def __init__(self, address: str | None = None, client=None, timeout: float = 20.0):
        if address is None and client is None:
            raise ValueError("give a scheduler address or a client")
        self.address = address
        self.client = client
        self.own_client = client is None
        self.timeout = timeout
        self.futures = []
        self.warm = []
        self.payload = None
        self.holding = False
        self.releaser = None

    @property
    def description(self) -> str:
        return f"Dask scheduler {self.address or self.client.scheduler.address}"

    def _connect(self) -> None:
        try:
            from distributed import Client
        except ImportError:
            raise GoalkitError("--scheduler needs dask.distributed; install it with "
                               "pip install 'goalkit[dask]'", key="--scheduler") from None
        if self.client is None:
            try:
                self.client = Client(self.address, timeout=self.timeout, set_as_default=False)
            except (OSError, TimeoutError, ValueError) as exc:
                raise GoalkitError(f"cannot reach the Dask scheduler ({exc}); expected a running "
                                   f"dask.distributed scheduler address such as tcp://host:8786",
                                   key="--scheduler") from None

    def launch(self) -> None:
        """With a client already connected: each worker imports what a shard task needs, now.

        Called by the build before it plans; the imports (about half a second per worker) then
        overlap the planning instead of delaying the first shards. Nothing is done for a
        scheduler address (connecting is left to :meth:`start`, so that a bad address is reported
        where it always was).
        """
        if self.client is None or self.warm:
            return
        try:
            addresses = list(self.client.scheduler_info().get("workers", {}))
            self.warm = [self.client.submit(warm_up_holding, pure=False, workers=[a], allow_other_workers=False,
                                            key=f"goalkit-warm-{uuid.uuid4().hex[:12]}") for a in addresses]
            self.holding = bool(self.warm)      # asked of every worker; undone by end_build
        except Exception:  # noqa: BLE001  only a head start: the shards import what they need anyway
            self.warm = []

    def ready(self) -> bool:
        """True when connected and every worker of the cluster runs on this machine.

        The build then has a worker stand in for the logs' spare helper process while it plans
        (:class:`~goalkit.pipeline.poolspare.PoolSpare`): the planning helper meets the
        coordinator through a small shared-memory file (:mod:`goalkit.logs.frontier`), which
        workers on other machines cannot open, so a cluster of several machines keeps the logs'
        own spare.
        """
        if self.client is None:
            return False
        try:
            hosts = {w.get("host") for w in self.client.scheduler_info().get("workers", {}).values()}
        except Exception:  # noqa: BLE001  a closed client: no stand-in
            return False
        return bool(hosts) and hosts <= local_addresses()

    def submit(self, fn, *args):
        """Run ``fn(*args)`` on one of the cluster's workers; a ``distributed.Future``.

        The hook by which work other than shards (planning a range of episodes, say) can run on
        the cluster.
        """
        self._connect()
        fut = self.client.submit(fn, *args, pure=False)
        self.futures.append(fut)
        return fut

    def start(self, payload, folder) -> None:
        """Connect (when needed) and write ``payload`` to ``folder`` for the workers to load.

        The workers are also asked to hold the logs open from one shard to the next
        (:func:`goalkit.logs.held.hold_logs`) until :meth:`close`, if :meth:`launch` did not
        already; a cluster that cannot be asked only reads a little slower.

        Raises
        ------
        OSError
            When the payload file cannot be written.
        """
        self._connect()
        self.payload = save_payload(payload, folder)
        self._hold_logs(True)

    def _hold_logs(self, on: bool) -> None:
        """Have every worker hold its logs open between reads (``on``), or close them, forget
        the payload and stop (:func:`end_build`)."""
        if on == self.holding:
            return
        self.holding = on
        try:
            if on:
                self.client.run(begin_build)
            else:
                self.client.run(end_build)
                self._trim_workers()
        except Exception:  # noqa: BLE001  only a speed-up (a worker gone, a closed client)
            pass

    def _trim_workers(self) -> None:
        """One :func:`trim_after_build` task per worker thread, run whenever the worker is free
        (not waited for: it only gives memory back)."""
        from distributed import fire_and_forget

        for address, info in self.client.scheduler_info().get("workers", {}).items():
            for _ in range(max(1, int(info.get("nthreads", 1)))):
                fire_and_forget(self.client.submit(trim_after_build, pure=False, workers=[address],
                                                   allow_other_workers=False,
                                                   key=f"goalkit-trim-{uuid.uuid4().hex[:12]}"))

    def run(self, specs, folder, build_key: str):
        """Submit every shard; yield task outcomes in completion order."""
        from distributed import as_completed

        run_id = uuid.uuid4().hex[:8]
        by_key = {}
        for s in specs:
            fut = self.client.submit(workers.pool_task, self.payload, s, str(folder), build_key, pure=False,
                                     key=f"goalkit-shard-{s.index}-{build_key[:8]}-{run_id}")
            by_key[fut.key] = (fut, s)
        shards = [f for f, _ in by_key.values()]
        self.futures += shards
        for fut in as_completed(shards, loop=self.client.loop):  # the client need not be the default
            spec = by_key[fut.key][1]
            try:
                yield fut.result()
            except Exception as exc:  # a worker died or the task could not run
                yield lost_worker(spec) if type(exc).__name__ == "KilledWorker" else failure(spec, exc)

    def release(self) -> None:
        """Every shard has been computed: the workers close the logs they held, while the build writes.

        Called by the sharded producer as the last shard's outcome arrives. Closing a held log
        evicts its metadata cache (tens of milliseconds per worker); asked from a side thread,
        it overlaps the coordinator's writing of the last rows instead of following it.
        :meth:`close` joins that thread.
        """
        if self.client is None or not self.holding or self.releaser is not None:
            return
        self.releaser = threading.Thread(target=self._hold_logs, args=(False,), name="goalkit-dask-release",
                                         daemon=True)
        self.releaser.start()

    def close(self) -> None:
        """Cancel unfinished tasks; close the client when the runner opened it."""
        if self.client is None:
            return
        try:
            if self.releaser is not None:
                self.releaser.join()
                self.releaser = None
            self._hold_logs(False)          # the workers close the logs this build held open
            if self.futures or self.warm:
                self.client.cancel(self.futures + self.warm)
        finally:
            if self.own_client:
                self.client.close()
                self.client = None
            self.futures, self.warm, self.payload = [], [], None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
